"""The report document: the scan result, its JSON Schema and the gates pipelines act on."""
