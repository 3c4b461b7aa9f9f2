"""Alerts: verdicts over the threshold, with their explanation; incidents group them."""
