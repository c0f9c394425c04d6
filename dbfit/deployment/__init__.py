"""Deployment: scoring SQL and the views that score new rows."""
