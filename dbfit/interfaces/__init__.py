"""Interfaces: the Python API, the SQL surface, the command line, the demo and the benchmark."""
