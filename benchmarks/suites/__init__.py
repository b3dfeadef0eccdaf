"""Built-in suite files (TOML)."""
