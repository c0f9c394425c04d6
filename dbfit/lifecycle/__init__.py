"""Lifecycle: refit, promotion gates, drift snapshots and source fingerprints."""
