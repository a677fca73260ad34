"""One module per CLI command; each defines a click command named ``command``."""
