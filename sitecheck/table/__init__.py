"""The table: column roles and hygiene, units, the encoded matrices every analysis shares, repairs."""
