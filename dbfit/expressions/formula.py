"""Parse ``target ~ term + term + ...`` into SQL expression trees.

Notation after Wilkinson and Rogers (1973), "Symbolic description of factorial models for analysis of
variance", Applied Statistics 22(3), 392-399: ``+`` adds a term, a top-level ``:`` joins factors into an
interaction, ``- 1`` or ``+ 0`` drops the intercept and ``- term`` removes a term. Every factor is one
scalar SQL expression in the DuckDB dialect; ``::`` keeps its SQL meaning of a cast.
"""

from __future__ import annotations

from dataclasses import dataclass

import sqlglot
from sqlglot import exp
from sqlglot.errors import SqlglotError
from sqlglot.tokens import TokenType

from dbfit.errors import FormulaError
from dbfit.expressions.basis_terms import TermCall, recognise
from dbfit.expressions.rules import check_expression
from dbfit.expressions.term_functions import factor_tree, read_call

DIALECT = "duckdb"

_OPENERS = {TokenType.L_PAREN, TokenType.L_BRACKET, TokenType.L_BRACE, TokenType.CASE}
_CLOSERS = {TokenType.R_PAREN, TokenType.R_BRACKET, TokenType.R_BRACE, TokenType.END}


@dataclass(frozen=True)
class Term:
    """One model term: a single factor, or an interaction of several factors (joined by ``:``)."""

    factors: tuple[exp.Expression, ...]
    texts: tuple[str, ...]
    # a term function (dbfit.expressions.basis_terms): the call, and the column label of its factor
    call: TermCall | None = None
    names: tuple[str, ...] = ()

    @property
    def label(self) -> str:
        return ":".join(self.names or self.texts)

    @property
    def group(self) -> str:
        """The term its columns belong to: one spline term for all its basis columns, else the label."""
        return self.call.name if self.call is not None else self.label

    def name_of(self, text: str) -> str:
        """How a factor of this term reads in a column label (a term function's own label, else its text)."""
        return self.names[self.texts.index(text)] if self.names else text

    @property
    def unresolved(self) -> bool:
        """A term function whose knots or edges the fit has yet to compute."""
        return self.call is not None and not self.call.resolved


@dataclass(frozen=True)
class Formula:
    """A parsed formula: the target expression, the terms in order, and whether there is an intercept."""

    text: str
    target: exp.Expression
    target_text: str
    terms: tuple[Term, ...]
    intercept: bool

    def factor_texts(self) -> list[str]:
        """Distinct factor texts in order of first appearance."""
        seen: dict[str, None] = {}
        for term in self.terms:
            for text in term.texts:
                seen.setdefault(text, None)
        return list(seen)


def parse_expression(text: str, what: str, where: str | None = None) -> exp.Expression:
    """Parse one row-wise scalar SQL expression, refusing anything off the allowlist of
    :mod:`dbfit.expressions.rules` (subqueries, aggregates, statements, volatile or unknown functions).

    ``what`` names the place the text comes from, for the error message; ``where`` ("term 3 of the formula")
    says it in full when it differs.
    """
    if not isinstance(text, str) or not text.strip():
        raise FormulaError(f"{what} is empty")
    try:
        tokens = sqlglot.tokenize(text, read=DIALECT)
    except SqlglotError as err:
        raise FormulaError(f"{what} {text!r} is not valid SQL: {err}") from None
    if any(token.token_type == TokenType.SEMICOLON for token in tokens):
        raise FormulaError(f"{what} {text!r} contains ';': only a single scalar expression is allowed")
    try:
        parsed = sqlglot.parse(text, read=DIALECT)
    except SqlglotError as err:
        raise FormulaError(f"{what} {text!r} is not a valid SQL expression: {_first_line(err)}") from None
    parsed = [node for node in parsed if node is not None]
    if len(parsed) != 1:
        raise FormulaError(f"{what} {text!r} must be exactly one scalar SQL expression")
    node = parsed[0]
    if isinstance(node, (exp.Alias,)):
        raise FormulaError(f"{what} {text!r} must not carry an alias")
    return check_expression(node, where or what)


def parse_formula(text: str) -> Formula:
    """Parse a formula ``target ~ terms``; raise :class:`FormulaError` naming the problem."""
    target_text, rhs_tokens = _split_formula(text)
    target = parse_expression(target_text, "the target")
    intercept, terms = _parse_terms(text, rhs_tokens)
    return Formula(
        text=text, target=target, target_text=target_text, terms=_expanded(terms), intercept=intercept
    )


def _split_formula(text: str) -> tuple[str, list]:
    """The target's text and the tokens after the top-level ``~``, the formula's shape checked."""
    if not isinstance(text, str) or not text.strip():
        raise FormulaError("the formula is empty; write it as 'target ~ term + term'")
    try:
        tokens = sqlglot.tokenize(text, read=DIALECT)
    except SqlglotError as err:
        raise FormulaError(f"formula {text!r} cannot be read: {_first_line(err)}") from None
    if any(token.token_type == TokenType.SEMICOLON for token in tokens):
        raise FormulaError(f"formula {text!r} contains ';': a formula holds expressions, never statements")

    depth = 0
    tilde_at = None
    for token in tokens:
        depth += _depth_change(token.token_type)
        if depth < 0:
            raise FormulaError(f"formula {text!r} has an unbalanced ')' at position {token.start}")
        if depth == 0 and token.token_type == TokenType.TILDE:
            if tilde_at is not None:
                raise FormulaError(f"formula {text!r} has more than one top-level '~'")
            tilde_at = token
    if depth != 0:
        raise FormulaError(f"formula {text!r} has an unclosed '(' or CASE")
    if tilde_at is None:
        raise FormulaError(f"formula {text!r} has no '~'; write it as 'target ~ term + term'")
    return text[: tilde_at.start].strip(), [t for t in tokens if t.start > tilde_at.end]


def holds_top_level_tilde(text: object) -> bool:
    """Whether ``text`` has a ``~`` outside parentheses and CASE, as a formula has (text that cannot be read
    as tokens has none)."""
    if not isinstance(text, str):
        return False
    try:
        tokens = sqlglot.tokenize(text, read=DIALECT)
    except SqlglotError:
        return False
    depth = 0
    for token in tokens:
        depth += _depth_change(token.token_type)
        if depth == 0 and token.token_type == TokenType.TILDE:
            return True
    return False


def _depth_change(token_type: TokenType) -> int:
    if token_type in _OPENERS:
        return 1
    if token_type in _CLOSERS:
        return -1
    return 0


def _signed_pieces(text: str, tokens: list) -> list[tuple[str, list]]:
    """Split the right-hand side at top-level ``+`` and ``-``: (sign, tokens of the piece)."""
    pieces: list[tuple[str, list]] = []
    sign, current, depth = "+", [], 0
    for token in tokens:
        if depth == 0 and token.token_type in (TokenType.PLUS, TokenType.DASH):
            if current:
                pieces.append((sign, current))
                sign, current = ("+" if token.token_type == TokenType.PLUS else "-"), []
            elif token.token_type == TokenType.DASH:
                sign = "-" if sign == "+" else "+"
            continue
        depth += _depth_change(token.token_type)
        current.append(token)
    if current:
        pieces.append((sign, current))
    elif tokens:
        raise FormulaError(f"formula {text!r} ends with a dangling '+' or '-'")
    if not pieces:
        raise FormulaError(
            f"formula {text!r} has no terms after '~' (write '~ 1' for an intercept-only model)"
        )
    return pieces


def _parse_terms(text: str, tokens: list) -> tuple[bool, list[Term]]:
    """Split the right-hand side at top-level ``+`` and ``-``; each piece may hold top-level ``:``."""
    pieces = _signed_pieces(text, tokens)
    intercept = True
    terms: list[Term] = []
    removed: list[Term] = []
    for sign, piece in pieces:
        piece_text = text[piece[0].start : piece[-1].end + 1].strip()
        if piece_text in ("0", "1"):
            intercept = (piece_text == "1") == (sign == "+")
            continue
        term = _parse_term(text, piece, len(terms) + len(removed) + 1)
        (terms if sign == "+" else removed).append(term)

    kept: list[Term] = []
    for term in terms:
        if term.label not in {t.label for t in kept}:
            kept.append(term)
    for term in removed:
        if term.label not in {t.label for t in kept}:
            raise FormulaError(f"formula removes '{term.label}', which is not among its terms")
        kept = [t for t in kept if t.label != term.label]
    return intercept, kept


def _factor_groups(tokens: list) -> list[list]:
    """The tokens of a piece split at its top-level ``:``."""
    groups: list[list] = [[]]
    depth = 0
    for token in tokens:
        if depth == 0 and token.token_type == TokenType.COLON:
            groups.append([])
            continue
        depth += _depth_change(token.token_type)
        groups[-1].append(token)
    return groups


def _parse_term(text: str, tokens: list, position: int) -> Term:
    groups = _factor_groups(tokens)
    if any(not group for group in groups):
        raise FormulaError(f"formula {text!r} has an empty factor around ':'")
    texts = tuple(text[g[0].start : g[-1].end + 1].strip() for g in groups)
    if len(set(texts)) != len(texts):
        raise FormulaError(f"interaction '{':'.join(texts)}' repeats a factor")
    where = f"term {position} of the formula"
    calls = [recognise(t, where) for t in texts]
    if any(calls):
        if len(texts) > 1:
            raise FormulaError(f"term '{':'.join(texts)}': a spline or bins term cannot enter an interaction")
        return Term(factors=(calls[0].argument,), texts=texts, call=calls[0])  # type: ignore[union-attr]
    factors = tuple(parse_factor(t, where) for t in texts)
    return Term(factors=factors, texts=texts)


def parse_factor(text: str, where: str) -> exp.Expression:
    """One factor of a term: a date or missing-value term function of
    :mod:`dbfit.expressions.term_functions` (its plain SQL), the argument of a spline or bins term of
    :mod:`dbfit.expressions.basis_terms`, or any allowed scalar expression."""
    call = read_call(text) if isinstance(text, str) else None
    if call is not None:
        return factor_tree(call)
    basis = recognise(text, where) if isinstance(text, str) else None
    return basis.argument if basis is not None else parse_expression(text, "term", where)


def formula_pieces(text: str) -> tuple[str, list[tuple[str, list[str]]]]:
    """The target text and the right-hand side's pieces as written: (sign, factor texts), in order; the
    intercept pieces '0' and '1' come as one-factor pieces. For rewriting a formula before it is parsed."""
    target_text, rhs_tokens = _split_formula(text)
    pieces: list[tuple[str, list[str]]] = []
    for sign, piece in _signed_pieces(text, rhs_tokens):
        groups = _factor_groups(piece)
        pieces.append((sign, [text[g[0].start : g[-1].end + 1].strip() for g in groups if g]))
    return target_text, pieces


def _expanded(terms: list[Term]) -> tuple[Term, ...]:
    """Term functions with known knots or edges become their columns: one term per spline basis column,
    one categorical term per bins call."""
    expanded: list[Term] = []
    for term in terms:
        call = term.call
        if call is None or not call.resolved:
            expanded.append(term)
            continue
        for name, node in call.columns():
            expanded.append(
                Term(factors=(node,), texts=(node.sql(dialect=DIALECT),), call=call, names=(name,))
            )
    return tuple(expanded)


def _first_line(err: Exception) -> str:
    return str(err).strip().splitlines()[0] if str(err).strip() else type(err).__name__
