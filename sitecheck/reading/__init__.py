"""Reading a table and its configuration: file formats, missing-value codes, cell idioms, TOML roles and options."""
