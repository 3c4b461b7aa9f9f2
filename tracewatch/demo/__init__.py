"""The demo: an invented city network of parcel lockers, with labelled injected anomalies."""
