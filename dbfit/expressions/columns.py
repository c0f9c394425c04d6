"""Source column names as the source spells them: every engine gets each column quoted, spelled exactly.

DuckDB matches column names case-insensitively; PostgreSQL folds unquoted names to lower case and refuses
reserved words (``default``) unquoted. Writing each column as the source spells it, quoted, reads the same
column on every engine.
"""

from __future__ import annotations

from sqlglot import exp

from dbfit.errors import FormulaError


def resolve_columns(trees: list[exp.Expression | None], columns: list[str]) -> list[str]:
    """Spell every unqualified column of ``trees`` (changed in place) as the source column it names, quoted.

    Names match case-insensitively, as in DuckDB; when several columns differ only in case, a quoted name
    that matches one exactly picks it, otherwise the name is ambiguous and refused. A name matching no column
    is left as written (the engine then reports it). Returns the source columns used, in order of first use.
    """
    by_folded: dict[str, list[str]] = {}
    for name in columns:
        by_folded.setdefault(name.lower(), []).append(name)
    used: list[str] = []
    for tree in trees:
        if tree is None:
            continue
        for column in list(tree.find_all(exp.Column)):
            if column.table or not isinstance(column.this, exp.Identifier):
                continue
            written, quoted = column.name, column.this.quoted
            matches = by_folded.get(written.lower(), [])
            if len(matches) > 1 and quoted and written in matches:
                matches = [written]
            if len(matches) > 1:
                raise FormulaError(
                    f"column '{written}' is ambiguous: the source has columns "
                    f"{' and '.join(repr(m) for m in matches)}, which differ only in case; "
                    "write the one you mean in double quotes, spelled exactly"
                )
            if matches:
                column.set("this", exp.to_identifier(matches[0], quoted=True))
                if matches[0] not in used:
                    used.append(matches[0])
    return used
