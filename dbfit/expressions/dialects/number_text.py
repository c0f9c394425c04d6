"""The text of a number, written so that every dialect gives DuckDB's.

A categorical level or a by= group made by casting a number to text (``visits::VARCHAR``) is that text, so it
must not depend on the engine: DuckDB writes a DOUBLE 2 as '2.0', PostgreSQL, Snowflake and BigQuery as '2'
(measured on DuckDB 2.0 and PostgreSQL 15; from memory for the other two). dbfit keeps DuckDB's text as the
one form: the models and labels fitted on DuckDB so far stay as they are, and it tells a whole-number DOUBLE
('2.0') from an INTEGER ('2') as the column's type does. Each cast to text in a query for PostgreSQL, Spark or
SQLite is written as a CASE on the type of its value (``pg_typeof``, ``typeof``): a DOUBLE or REAL holding
a whole number below 1e16 in magnitude becomes its digits and '.0' (DuckDB's form), any other value keeps the
engine's own text. So whole numbers (codes, counts, 0/1 flags kept as DOUBLE) read alike on every engine,
and fractions read alike where the engines write the same shortest digits: PostgreSQL from 1e-4 to 1e15,
Spark from 1e-3 to 1e7 (Java's Double.toString switches to 1.0E7 form beyond), SQLite where 15 significant
digits suffice. -0.0 is written '0.0'. T-SQL, Snowflake and BigQuery keep their own text.
"""

from __future__ import annotations

from sqlglot import exp

MARK = "dbfit_number_text"
WHOLE_LIMIT = 1e16  # DuckDB writes a whole DOUBLE below this with '.0'; from 1e16 on in exponent form
# per dialect: the function naming a value's type, and its names of the floating-point types
TYPE_TESTS = {
    "postgres": ("pg_typeof", ("double precision", "real")),
    "spark": ("typeof", ("double", "float")),
    "sqlite": ("typeof", ("real",)),
}


def write_number_texts(tree: exp.Expression, dialect: str) -> exp.Expression:
    """``tree`` with each cast of a value to text in the form above (``tree`` itself when nothing changes)."""
    if dialect not in TYPE_TESTS:
        return tree
    casts = [node for node in tree.find_all(exp.Cast) if _is_text_cast(node)]
    if not casts:
        return tree
    tree = tree.copy()
    # deepest first, so a cast inside another one's value is written before the outer one copies it
    for cast in reversed([node for node in tree.find_all(exp.Cast) if _is_text_cast(node)]):
        if not (cast.this.meta.get(MARK) or (isinstance(cast.this, exp.Cast) and _is_text(cast.this))):
            cast.replace(_number_text(cast, dialect))  # (text of text needs nothing more)
    return tree


def _is_text(cast: exp.Cast) -> bool:
    return cast.to.is_type(*exp.DataType.TEXT_TYPES)


def _is_text_cast(node: exp.Cast) -> bool:
    if not _is_text(node):
        return False
    if node.this.find(exp.Star) is not None or node.this.find(exp.Column) is None:
        return False  # a constant: PostgreSQL and Spark would fold its unused branch and fail on text
    return not any(parent.meta.get(MARK) for parent in _ancestors(node))


def _ancestors(node: exp.Expression) -> list[exp.Expression]:
    found = []
    parent = node.parent
    while parent is not None:
        found.append(parent)
        parent = parent.parent
    return found


def _number_text(cast: exp.Cast, dialect: str) -> exp.Expression:
    value = cast.this
    function, floating = TYPE_TESTS[dialect]
    text = exp.DataType.build("TEXT")
    kind = exp.Cast(this=exp.Anonymous(this=function, expressions=[value.copy()]), to=text.copy())
    is_floating = exp.In(this=kind, expressions=[exp.Literal.string(name) for name in floating])
    # The value read back as a DOUBLE: written in the branch that only a DOUBLE or REAL reaches, and typed so
    # that it also compiles for a value of another type (the text of a double reads back as itself).
    number = (
        value.copy()
        if dialect == "sqlite"
        else exp.Cast(this=exp.Cast(this=value.copy(), to=text.copy()), to=exp.DataType.build("DOUBLE"))
    )
    whole = exp.Cast(this=number.copy(), to=exp.DataType.build("BIGINT"))
    digits = exp.DPipe(this=exp.Cast(this=whole.copy(), to=text.copy()), expression=exp.Literal.string(".0"))
    own = cast.copy()
    # nested CASEs: each test runs only where the one before held (AND has no order of evaluation)
    written = exp.Case(
        ifs=[
            exp.If(
                this=is_floating,
                true=exp.Case(
                    ifs=[
                        exp.If(
                            this=exp.LT(
                                this=exp.Abs(this=number.copy()), expression=exp.Literal.number(WHOLE_LIMIT)
                            ),
                            true=exp.Case(
                                ifs=[exp.If(this=exp.EQ(this=number.copy(), expression=whole), true=digits)],
                                default=own.copy(),
                            ),
                        )
                    ],
                    default=own.copy(),
                ),
            )
        ],
        default=own,
    )
    written.meta[MARK] = True
    return written
