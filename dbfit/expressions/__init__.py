"""Expression handling: formulas, sources, names, the allowlist, dialect rules and sqlglot builders (no I/O)."""
