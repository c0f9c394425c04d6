"""Names that users give dbfit: model names (stored as values) and view names (written as identifiers).

Both are checked here and never spliced into SQL: a model name travels as a bound parameter or a string
literal tree; a view name is parsed with sqlglot and rebuilt as a quoted (catalog.)(schema.)name tree.
"""

from __future__ import annotations

import numbers
import re

import sqlglot
from sqlglot import exp
from sqlglot.errors import SqlglotError

from dbfit.errors import StoreError
from dbfit.expressions.formula import DIALECT

MODEL_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_.\-]{0,127}$")


def model_name(name: object) -> str:
    """Return ``name`` if it is a valid model name (a letter, then letters, digits, '_', '.', '-'; <= 128)."""
    if not isinstance(name, str) or not MODEL_NAME.match(name):
        raise StoreError(
            f"model name {name!r} is not allowed: use a letter followed by letters, digits, '_', '.' or '-' "
            "(at most 128 characters)"
        )
    return name


def model_version(version: object) -> int | None:
    """Return ``version`` if it is None or a whole number of at least 1 (a stored version number)."""
    if version is None:
        return None
    if isinstance(version, bool) or not isinstance(version, numbers.Integral) or version < 1:
        raise StoreError(
            f"version must be a whole number of at least 1, or None for the current one (got {version!r})"
        )
    return int(version)


def relation_name(text: object, what: str = "view name") -> exp.Table:
    """Parse a (catalog.)(schema.)name and rebuild it with quoted identifiers; refuse anything else."""
    if not isinstance(text, str) or not text.strip():
        raise StoreError(f"the {what} is empty")
    try:
        tokens = sqlglot.tokenize(text, read=DIALECT)
        statements = [s for s in sqlglot.parse(text, read=DIALECT) if s is not None]
    except SqlglotError:
        raise StoreError(
            f"{what} {text!r} is not a name: write name, schema.name or catalog.schema.name"
        ) from None
    allowed = {"VAR", "IDENTIFIER", "DOT"}
    if len(statements) != 1 or any(token.token_type.name not in allowed for token in tokens):
        raise StoreError(
            f"{what} {text!r} is not a plain name: write name, schema.name or catalog.schema.name"
        )
    node = statements[0]
    parts = [p for p in node.parts] if isinstance(node, (exp.Column, exp.Table)) else []
    if not parts or len(parts) > 3 or not all(isinstance(p, exp.Identifier) for p in parts):
        raise StoreError(
            f"{what} {text!r} is not a plain name: write name, schema.name or catalog.schema.name"
        )
    names = [exp.to_identifier(p.name, quoted=True) for p in parts]
    return exp.Table(
        this=names[-1],
        db=names[-2] if len(names) > 1 else None,
        catalog=names[-3] if len(names) > 2 else None,
    )
