"""The one exception family of dbfit.

Every error dbfit raises on purpose derives from :class:`DbfitError`, itself a ``ValueError``,
so callers can catch the whole family with one clause.
"""

from __future__ import annotations


class DbfitError(ValueError):
    """Base of every error dbfit raises on purpose."""


class FormulaError(DbfitError):
    """The formula, a term, or an option expression cannot be used (syntax, unknown column, unsafe SQL)."""


class SourceError(DbfitError):
    """The data source is not a table, view, file path or single SELECT, or cannot be read."""


class AbortedTransactionError(DbfitError):
    """A query failed while reading rows inside the caller's open DuckDB transaction, and DuckDB (which has no
    savepoints) aborted that transaction: the caller must ROLLBACK. Never raised for errors dbfit finds before
    running a query (unknown columns, tables, types, bad options)."""


class FitError(DbfitError):
    """The data cannot be fitted as asked (bad target values, no rows, non-finite predictors, ...)."""


class StoreError(DbfitError):
    """The model store cannot do what was asked: unknown model or version, bad name, locked or busy file."""


class StoreConflictError(StoreError):
    """Another connection wrote the same version at the same time (dbfit retries these a few times itself)."""


class GateRefusedError(DbfitError):
    """A candidate version failed its model's promotion gates; the current version stays. ``result`` holds the
    decision (versions, figures, reasons) as recorded in the audit table."""

    def __init__(self, message: str, result: dict | None = None) -> None:
        super().__init__(message)
        self.result = result or {}


class UsageError(DbfitError):
    """A command or spec file lacks a setting it needs (the command line exits with code 2, as for bad usage)."""
