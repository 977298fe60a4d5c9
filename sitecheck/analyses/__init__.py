"""The analyses a scan runs (one module each) and their registry."""
