"""Term functions of the formula: ``spline(...)`` and ``bins(...)``, written as plain SQL arithmetic.

A term function is recognised by the formula layer before the allowlist of :mod:`dbfit.expressions.rules`
sees the term; its first argument (the expression it transforms) is checked against the allowlist like any
other term, its other arguments are literal numbers. Signatures (named arguments with ``=>`` or ``:=``):

``spline(x, k)``
    natural cubic spline of ``x`` with ``k`` degrees of freedom (``k`` >= 1): ``k + 1`` knots, the two
    boundary knots at the minimum and maximum of ``x`` and ``k - 1`` interior knots at equally spaced
    quantiles between them, computed in the database.
``spline(x, k, boundary => [0.05, 0.95])``
    the same with the boundary knots at these quantiles of ``x`` (the interior ones equally spaced between).
``spline(x, knots => [a, b, ..., z])``
    at the knots listed, the first and last being the boundary knots (``k`` = number of knots - 1).

The basis is the truncated-power basis of a natural cubic spline of Hastie, Tibshirani and Friedman (2009),
The Elements of Statistical Learning, 2nd ed., Springer, eqs. (5.4)-(5.5): with knots xi_1 < ... < xi_K,
N_1(x) = x and N_{j+1}(x) = d_j(x) - d_{K-1}(x) for j = 1..K-2, where d_j(x) = ((x - xi_j)_+^3 -
(x - xi_K)_+^3) / (xi_K - xi_j). The constant N_0 = 1 is the model's intercept. Linear beyond the boundary
knots. Here every truncated cube is taken of (x - xi_j) / (xi_K - xi_1), which multiplies each N by a
constant (so it spans the same space) and keeps the values near 1; the design centres and scales the
columns like any other numeric column. ``(v)_+^3`` is written ``CASE WHEN v > 0 THEN v*v*v WHEN v <= 0 THEN
0 END``, which is NULL for a NULL ``x`` in every dialect (GREATEST ignores NULL in PostgreSQL).

``bins(x, k)``
    ``x`` cut into ``k`` bins at the quantiles 1/k, ..., (k-1)/k of ``x`` computed in the database,
``bins(x, edges => [a, b, c])``
    cut at the edges listed (increasing): bins ``(-inf, a)``, ``[a, b)``, ``[b, c)``, ``[c, inf)``,

entered as a categorical whose levels are the intervals; ``reference => j`` makes bin ``j`` (1-based,
default 1) the reference level, ``missing => 'bin'`` puts NULL into a level of its own (``missing``) instead
of dropping the row.

A call whose knots or edges are computed (``spline(x, 4)``, ``bins(x, 5)``) is *unresolved*; the fit
computes them in one scan (:mod:`dbfit.design.term_scan`) and writes the model's formula with them listed
(:meth:`SplineCall.resolved_text`), so the stored model, refit and scoring reuse them.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, replace
from typing import Any

import sqlglot
from sqlglot import exp
from sqlglot.errors import SqlglotError

from dbfit.errors import FormulaError
from dbfit.expressions import builders as sb
from dbfit.expressions.rules import check_expression

SPLINE, BINS = "spline", "bins"
MISSING_LEVEL = "missing"
MAX_PIECES = 50


@dataclass(frozen=True)
class SplineCall:
    """``spline(argument, ...)``: the degrees of freedom, and the knots once known."""

    text: str  # the call as written
    argument: exp.Expression
    argument_text: str
    df: int
    boundary: tuple[float, float] = (0.0, 1.0)  # quantiles of the boundary knots
    knots: tuple[float, ...] | None = None
    computed: bool = False  # knots at quantiles computed by a fit (recomputed on request)

    @property
    def name(self) -> str:
        return f"spline({self.argument_text})"

    @property
    def resolved(self) -> bool:
        return self.knots is not None

    def quantiles(self) -> list[float]:
        """The quantiles of the knots: the boundary ones and ``df - 1`` equally spaced between them."""
        low, high = self.boundary
        return [low + (high - low) * j / self.df for j in range(self.df + 1)]

    def with_values(self, values: list[float]) -> SplineCall:
        return replace(self, knots=tuple(values), computed=True)

    def unresolved_text(self) -> str:
        """The call asking for its knots at quantiles again (as written before a fit listed them)."""
        boundary = f", boundary => {_number_list(self.boundary)}" if self.boundary != (0.0, 1.0) else ""
        return f"spline({self.argument_text}, {self.df}{boundary})"

    def resolved_text(self) -> str:
        knots = f"knots => {_number_list(self.knots or ())}"
        if not self.computed:
            return f"spline({self.argument_text}, {knots})"
        return f"{self.unresolved_text()[:-1]}, {knots})"

    def columns(self) -> list[tuple[str, exp.Expression]]:
        """(label, SQL expression) of each basis column: ``spline(x)[1]`` .. ``spline(x)[df]``."""
        assert self.knots is not None
        knots, x = self.knots, sb.as_double(self.argument.copy())
        width = knots[-1] - knots[0]

        def cube(knot: float) -> exp.Expression:
            return _positive_cube(sb.div(sb.paren(sb.sub(x.copy(), _double(knot))), _double(width)))

        last = len(knots) - 1

        def d(j: int) -> exp.Expression:
            return sb.div(
                sb.paren(sb.sub(cube(knots[j]), cube(knots[last]))), _double((knots[last] - knots[j]) / width)
            )

        basis = [x.copy()]
        basis += [sb.sub(d(j), d(last - 1)) for j in range(last - 1)]
        return [(f"{self.name}[{j + 1}]", node) for j, node in enumerate(basis)]


@dataclass(frozen=True)
class BinsCall:
    """``bins(argument, ...)``: the number of bins, the reference bin, NULL as a bin, and the edges once known."""

    text: str
    argument: exp.Expression
    argument_text: str
    count: int
    reference: int = 1
    missing_bin: bool = False
    edges: tuple[float, ...] | None = None
    computed: bool = False  # edges at quantiles computed by a fit (recomputed on request)

    @property
    def name(self) -> str:
        return f"bins({self.argument_text})"

    @property
    def resolved(self) -> bool:
        return self.edges is not None

    def quantiles(self) -> list[float]:
        return [j / self.count for j in range(1, self.count)]

    def with_values(self, values: list[float]) -> BinsCall:
        return replace(self, edges=tuple(values), computed=True)

    def _options_text(self) -> str:
        return (f", reference => {self.reference}" if self.reference != 1 else "") + (
            ", missing => 'bin'" if self.missing_bin else ""
        )

    def unresolved_text(self) -> str:
        """The call asking for its edges at quantiles again (as written before a fit listed them)."""
        return f"bins({self.argument_text}, {self.count}{self._options_text()})"

    def resolved_text(self) -> str:
        edges = f"edges => {_number_list(self.edges or ())}"
        count = f"{self.count}, " if self.computed else ""
        return f"bins({self.argument_text}, {count}{edges}{self._options_text()})"

    def labels(self) -> list[str]:
        """The interval of each bin, with the edges written as short as keeps them apart."""
        assert self.edges is not None
        shown = _short_numbers(list(self.edges))
        bounds = ["-inf", *shown, "inf"]
        return [f"{'(' if k == 0 else '['}{bounds[k]}, {bounds[k + 1]})" for k in range(len(self.edges) + 1)]

    @property
    def reference_label(self) -> str:
        return self.labels()[self.reference - 1]

    def expression(self) -> exp.Expression:
        """CASE mapping the argument to the interval label of its bin (NULL stays NULL unless a bin)."""
        assert self.edges is not None
        x, labels = sb.as_double(self.argument.copy()), self.labels()
        ifs: list[exp.Expression] = []
        if self.missing_bin:
            ifs.append(
                exp.If(
                    this=exp.Is(this=x.copy(), expression=exp.Null()), true=exp.Literal.string(MISSING_LEVEL)
                )
            )
        for edge, label in zip(self.edges, labels):
            ifs.append(
                exp.If(this=exp.LT(this=x.copy(), expression=_double(edge)), true=exp.Literal.string(label))
            )
        last = exp.GTE(this=x.copy(), expression=_double(self.edges[-1]))
        ifs.append(exp.If(this=last, true=exp.Literal.string(labels[-1])))
        return exp.Case(ifs=ifs)

    def columns(self) -> list[tuple[str, exp.Expression]]:
        return [(self.name, self.expression())]


TermCall = SplineCall | BinsCall


def recognise(text: str, where: str) -> TermCall | None:
    """The term function ``text`` calls, or None when it is an ordinary expression."""
    head = text.lstrip().split("(", 1)[0].strip().lower()
    if head not in (SPLINE, BINS):
        return None
    try:
        node = sqlglot.parse_one(text, read="duckdb")
    except SqlglotError:
        return None
    if not isinstance(node, exp.Anonymous) or node.name.lower() != head:
        return None
    term = f"term '{text}' ({where})"
    positional: list[exp.Expression] = []
    named: dict[str, exp.Expression] = {}
    for argument in node.expressions:
        if isinstance(argument, (exp.Kwarg, exp.PropertyEQ)):
            named[argument.this.name.lower()] = argument.expression
        elif named:
            raise FormulaError(f"{term}: a positional argument follows a named one")
        else:
            positional.append(argument)
    if not positional:
        raise FormulaError(f"{term}: give the numeric expression first, e.g. '{head}(distance_km, 4)'")
    argument = check_expression(positional[0], where)
    argument_text = positional[0].sql(dialect="duckdb")
    if head == SPLINE:
        return _spline_call(text, term, argument, argument_text, positional[1:], named)
    return _bins_call(text, term, argument, argument_text, positional[1:], named)


def _spline_call(
    text: str, term: str, argument: exp.Expression, argument_text: str, rest: list, named: dict
) -> SplineCall:
    _refuse_unknown(term, named, {"df", "knots", "boundary"}, len(rest), 1)
    df_node = rest[0] if rest else named.get("df")
    knots = None
    if "knots" in named:
        knots = _numbers(term, "knots", named["knots"])
        if len(knots) < 2:
            raise FormulaError(f"{term}: knots => needs at least the two boundary knots (got {len(knots)})")
        _increasing(term, "knots", knots)
    if df_node is None:
        if knots is None:
            raise FormulaError(
                f"{term}: give the degrees of freedom, e.g. 'spline({argument_text}, 4)', or knots =>"
            )
        if "boundary" in named:
            raise FormulaError(f"{term}: boundary => goes with the degrees of freedom, not with knots =>")
        return SplineCall(text, argument, argument_text, len(knots) - 1, knots=tuple(knots))
    df = _whole(term, "the degrees of freedom", df_node)
    boundary = (0.0, 1.0)
    if "boundary" in named:
        low_high = _numbers(term, "boundary", named["boundary"])
        if len(low_high) != 2 or not 0.0 <= low_high[0] < low_high[1] <= 1.0:
            raise FormulaError(
                f"{term}: boundary => takes two quantiles 0 <= low < high <= 1, e.g. [0.05, 0.95] "
                f"(got {low_high})"
            )
        boundary = (low_high[0], low_high[1])
    if knots is not None and len(knots) != df + 1:
        raise FormulaError(
            f"{term}: {df} degrees of freedom take {df + 1} knots, but knots => lists {len(knots)}"
        )
    return SplineCall(
        text,
        argument,
        argument_text,
        df,
        boundary=boundary,
        knots=None if knots is None else tuple(knots),
        computed=knots is not None,
    )


def _bins_call(
    text: str, term: str, argument: exp.Expression, argument_text: str, rest: list, named: dict
) -> BinsCall:
    _refuse_unknown(term, named, {"count", "edges", "reference", "missing"}, len(rest), 1)
    missing = named.get("missing")
    if missing is not None and not (
        isinstance(missing, exp.Literal) and missing.is_string and missing.name in ("bin", "drop")
    ):
        raise FormulaError(
            f"{term}: missing => takes 'bin' (NULL as a bin of its own) or 'drop' (the default)"
        )
    missing_bin = missing is not None and missing.name == "bin"
    count_node = rest[0] if rest else named.get("count")
    edges = None
    if "edges" in named:
        edges = _numbers(term, "edges", named["edges"])
        if not edges:
            raise FormulaError(f"{term}: edges => needs at least one edge")
        _increasing(term, "edges", edges)
    if count_node is None:
        if edges is None:
            raise FormulaError(
                f"{term}: give the number of bins, e.g. 'bins({argument_text}, 5)', or edges =>"
            )
        call = BinsCall(
            text, argument, argument_text, len(edges) + 1, missing_bin=missing_bin, edges=tuple(edges)
        )
    else:
        count = _whole(term, "the number of bins", count_node, least=2)
        if edges is not None and len(edges) != count - 1:
            raise FormulaError(
                f"{term}: {count} bins take {count - 1} edges, but edges => lists {len(edges)}"
            )
        call = BinsCall(
            text,
            argument,
            argument_text,
            count,
            missing_bin=missing_bin,
            edges=None if edges is None else tuple(edges),
            computed=edges is not None,
        )
    if "reference" in named:
        reference = _whole(term, "reference", named["reference"])
        if reference > call.count:
            raise FormulaError(f"{term}: reference => {reference}, but there are {call.count} bins")
        call = replace(call, reference=reference)
    return call


def check_values(call: TermCall, values: list[float], distinct: int) -> None:
    """Refuse computed knots or edges that tie (fewer distinct values than the call needs)."""
    what = "knots" if isinstance(call, SplineCall) else "edges"
    needed = call.df + 1 if isinstance(call, SplineCall) else call.count
    if distinct < needed or any(not b > a for a, b in zip(values, values[1:])):
        raise FormulaError(
            f"term '{call.text}': '{call.argument_text}' has {distinct} distinct values among the rows used, "
            f"and its quantile {what} tie ({_number_list(values)}); ask for fewer than {call.df if isinstance(call, SplineCall) else call.count} "
            f"or list the {what} with {what} => [...]"
        )


def _positive_cube(value: exp.Expression) -> exp.Expression:
    """(value)_+^3 as CASE, NULL when value is NULL."""
    zero, value = sb.number(0), sb.paren(value)
    return exp.Case(
        ifs=[
            exp.If(
                this=exp.GT(this=value.copy(), expression=zero),
                true=sb.mul(value.copy(), value.copy(), value.copy()),
            ),
            exp.If(this=exp.LTE(this=value.copy(), expression=zero.copy()), true=_double(0.0)),
        ]
    )


def _double(value: float) -> exp.Expression:
    return sb.as_double(sb.number(value))


def _refuse_unknown(term: str, named: dict, known: set[str], positional: int, most: int) -> None:
    unknown = sorted(set(named) - known)
    if unknown:
        raise FormulaError(f"{term}: unknown argument {unknown[0]!r} (known: {', '.join(sorted(known))})")
    if positional > most:
        raise FormulaError(
            f"{term}: too many positional arguments; name the others ({', '.join(sorted(known))})"
        )


def _whole(term: str, what: str, node: exp.Expression, least: int = 1) -> int:
    value = _number(term, what, node)
    if value != int(value) or value < least or value > MAX_PIECES:
        raise FormulaError(
            f"{term}: {what} must be a whole number from {least} to {MAX_PIECES} (got {node.sql()})"
        )
    return int(value)


def _numbers(term: str, what: str, node: exp.Expression) -> list[float]:
    if not isinstance(node, exp.Array):
        raise FormulaError(f"{term}: {what} => takes a list of numbers, e.g. [1, 2.5, 4]")
    return [_number(term, what, item) for item in node.expressions]


def _number(term: str, what: str, node: exp.Expression) -> float:
    sign = 1.0
    if isinstance(node, exp.Neg):
        sign, node = -1.0, node.this
    if not (isinstance(node, exp.Literal) and not node.is_string):
        raise FormulaError(f"{term}: {what} must be a number (got {node.sql()})")
    value = sign * float(node.name)
    if not math.isfinite(value):
        raise FormulaError(f"{term}: {what} must be finite (got {node.sql()})")
    return value


def _increasing(term: str, what: str, values: list[float]) -> None:
    for a, b in zip(values, values[1:]):
        if not b > a:
            raise FormulaError(
                f"{term}: {what} must increase strictly; {sb.float_text(b)} follows {sb.float_text(a)}"
            )


def _number_list(values: Any) -> str:
    return "[" + ", ".join(repr(float(v)) for v in values) + "]"


def _short_numbers(values: list[float]) -> list[str]:
    """The values with the fewest significant digits (at least 3) that keep neighbours apart, written
    without an exponent between 1e-4 and 1e15 (``20000``, ``3.46``, ``0.0123``)."""
    for digits in range(3, 18):
        shown = [_significant(v, digits) for v in values]
        if len(set(shown)) == len(shown) and all(float(a) < float(b) for a, b in zip(shown, shown[1:])):
            return shown
    return [repr(v) for v in values]


def _significant(value: float, digits: int) -> str:
    rounded = float(f"{value:.{digits}g}")
    if rounded == 0 or 1e-4 <= abs(rounded) < 1e15:
        text = f"{rounded:.{max(0, digits - 1 - math.floor(math.log10(abs(rounded or 1))))}f}"
        return text.rstrip("0").rstrip(".") if "." in text else text
    return f"{value:.{digits}g}"


def spline_basis_values(call: SplineCall, x: Any) -> Any:
    """The basis columns of ``call`` at the numbers ``x`` (numpy, shape len(x) x df): the same arithmetic as
    :meth:`SplineCall.columns` writes in SQL, for curves drawn outside the database."""
    import numpy as np

    assert call.knots is not None
    knots, x = call.knots, np.asarray(x, dtype=float)
    width, last = knots[-1] - knots[0], len(knots) - 1

    def d(j: int) -> Any:
        cubes = [np.maximum((x - knots[k]) / width, 0.0) ** 3 for k in (j, last)]
        return (cubes[0] - cubes[1]) / ((knots[last] - knots[j]) / width)

    return np.column_stack([x] + [d(j) - d(last - 1) for j in range(last - 1)])
