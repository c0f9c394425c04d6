"""Engines: the only code that runs SQL (DuckDB, PostgreSQL, Spark) and the factory that picks one."""
