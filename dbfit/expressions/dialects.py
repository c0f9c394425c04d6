"""The one place for what PostgreSQL and Spark need differently from DuckDB in the queries dbfit writes.

Every query is built once as a sqlglot tree in DuckDB's terms; :func:`adapt` rewrites the few constructs
that another engine treats differently, and sqlglot then writes the tree in that engine's dialect.
- exp(x): PostgreSQL raises on underflow and overflow, so x is clamped to [-700, 700] (exp(-700) is about
  1e-304, far below anything that changes a sum of terms of size one).
- isfinite(x): neither PostgreSQL (for numbers) nor Spark has it.
- the sorted list of distinct levels: Spark collects a set and sorts it.
- PostgreSQL inlines a subquery's expressions into every aggregate above it; ``OFFSET 0`` fences each one.
- column names: DuckDB matches them case-insensitively, PostgreSQL folds unquoted names to lower case and
  refuses reserved words (``default``), so :func:`resolve_columns` spells each column as the source does,
  quoted.
"""

from __future__ import annotations

from sqlglot import exp

from dbfit.errors import FormulaError

EXP_LIMIT = 700.0


def adapt(query: exp.Expression, dialect: str) -> exp.Expression:
    """A copy of ``query`` rewritten for ``dialect`` (DuckDB's own trees pass unchanged)."""
    if dialect == "duckdb":
        return query
    tree = query.copy()
    tree = tree.transform(lambda node: _rewrite(node, dialect))
    if dialect == "postgres":
        for subquery in list(tree.find_all(exp.Subquery)):
            inner = subquery.this
            if isinstance(inner, exp.Select) and not inner.args.get("offset") and not inner.args.get("limit"):
                inner.set("offset", exp.Offset(expression=exp.Literal.number(0)))
    return tree


def _rewrite(node: exp.Expression, dialect: str) -> exp.Expression:
    if isinstance(node, exp.Exp):
        argument, low, high = node.this, exp.Neg(this=exp.Literal.number(EXP_LIMIT)), exp.Literal.number(EXP_LIMIT)
        return exp.Exp(this=exp.Case(ifs=[
            exp.If(this=exp.LT(this=argument.copy(), expression=low.copy()), true=low),
            exp.If(this=exp.GT(this=argument.copy(), expression=high.copy()), true=high),
        ], default=argument.copy()))
    if isinstance(node, exp.Anonymous) and node.name.lower() == "isfinite":
        value = node.expressions[0]
        infinite = [exp.Cast(this=exp.Literal.string(t), to=exp.DataType.build("DOUBLE")) for t in ("Infinity", "-Infinity")]
        if dialect == "postgres":
            nan = exp.Cast(this=exp.Literal.string("NaN"), to=exp.DataType.build("DOUBLE"))
            return exp.Not(this=exp.In(this=value.copy(), expressions=[*infinite, nan]))
        return exp.and_(exp.Not(this=exp.In(this=value.copy(), expressions=infinite)),
                        exp.Not(this=exp.Anonymous(this="isnan", expressions=[value.copy()])))
    if dialect == "spark" and isinstance(node, exp.ArrayAgg) and isinstance(node.this, exp.Order):
        distinct = node.this.this
        return exp.Anonymous(this="array_sort", expressions=[
            exp.Anonymous(this="collect_set", expressions=[distinct.expressions[0].copy()])])
    return node


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
                raise FormulaError(f"column '{written}' is ambiguous: the source has columns "
                                   f"{' and '.join(repr(m) for m in matches)}, which differ only in case; "
                                   "write the one you mean in double quotes, spelled exactly")
            if matches:
                column.set("this", exp.to_identifier(matches[0], quoted=True))
                if matches[0] not in used:
                    used.append(matches[0])
    return used

