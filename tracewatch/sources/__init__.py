"""Sources: where bytes come from (files read once, or files followed as they grow)."""
