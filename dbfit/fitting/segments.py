"""One model per segment, all fitted in the same scans.

Each segment keeps its own Newton state (:meth:`dbfit.solver.newton.NewtonRun.steps`); one grouped statistics
query per pass joins every still-running segment's coefficients to its rows and returns its X'WX, score and
log-likelihood. A segment that converges drops out of the join, so later passes skip its rows' arithmetic.
"""

from __future__ import annotations

import dataclasses
import time
from collections.abc import Callable
from decimal import Decimal
from typing import Any

import numpy as np
from sqlglot import exp

from dbfit.design.layout import SEGMENT, Design, segment_profiles
from dbfit.engines.base import Engine
from dbfit.errors import FitError
from dbfit.expressions import builders as sb
from dbfit.expressions.source import source_relation
from dbfit.fitting.cells import cell_factors
from dbfit.fitting.statistics import query_plan, statistics_query, unpack_groups
from dbfit.model import inference
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit, plain_value
from dbfit.solver.information import PassResult
from dbfit.solver.newton import Deviance, IterationReport, NewtonResult, NewtonRules, NewtonRun, Steps
from dbfit.solver.tolerances import UNCONFIRMED_STEP


def fit_segments(
    engine: Engine,
    design: Design,
    fitted: list[int],
    constant: list[int],
    *,
    max_iter: int,
    tol: float,
    reporter: Callable[[IterationReport], None] | None,
    assemble: Callable[..., Model],
    formula: str,
    source: str,
    options: dict[str, Any],
    pooled: NewtonResult | None = None,
) -> SegmentedFit:
    """Fit ``design`` separately within every segment; ``assemble`` builds each segment's model.

    ``pooled``, a fit of one model to a sample of all segments' rows, gives every segment its start (see
    :func:`_segment_start`)."""
    segments: dict[Any, Design] = {}
    failures: dict[Any, str] = {}
    for profile in segment_profiles(engine, design):
        value, reason = profile["segment"], _unfit_reason(profile, len(fitted))
        if reason:
            failures[value] = reason
        else:
            segments[value] = _segment_design(design, profile)
    if not segments:
        raise FitError(
            f"no segment of '{design.segment_text}' can be fitted: "
            + "; ".join(f"{v}: {r}" for v, r in list(failures.items())[:10])
        )

    protected = 1 if design.intercept else 0
    steps = {
        value: NewtonRun(
            Deviance(part.saturated_loglik),
            _segment_start(part, fitted, pooled, design),
            NewtonRules(
                max_passes=max_iter,
                tol=tol,
                protected=protected,
                weight_total=part.trial_sum,
                confirm_above=UNCONFIRMED_STEP,
            ),
        ).steps()
        for value, part in segments.items()
    }
    saturated = {value: part.saturated_loglik for value, part in segments.items()}
    cells = cell_factors(design, segments=len(segments))
    results, passes = _run_together(engine, design, fitted, steps, failures, reporter, saturated, cells=cells)
    null = _null_logliks(engine, design, segments, results, max_iter, tol)

    models: dict[Any, Model] = {}
    own_options = {k: v for k, v in options.items() if k != "by"}
    sources = segment_sources(source, design.segment, list(results))
    for value in segments:
        if value not in results:
            continue
        newton, part = results[value], segments[value]
        active = [fitted[k] for k in newton.active]
        aliased = sorted(constant + [fitted[k] for k in newton.aliased])
        models[value] = assemble(
            part,
            newton,
            active,
            aliased,
            null[value],
            engine.scans,
            formula,
            sources[value],
            {**own_options, "segment": {"by": design.segment_text, "value": plain_value(value)}},
        )
        models[value].stats["statistics_path"] = "cells" if cells else "dense"
    return SegmentedFit(
        by=design.segment_text or "",
        models=models,
        failures=failures,
        passes=passes,
        scans=engine.scans,
        source=source,
        by_expression=design.segment,
        rows_total=design.rows_total,
    )


def _unfit_reason(profile: dict[str, Any], parameters: int) -> str | None:
    used = int(profile["used"] or 0)
    if used < parameters + 1:
        return f"too few rows ({used} used) for {parameters} coefficients"
    successes, trials = float(profile["success_sum"] or 0), float(profile["trial_sum"] or 0)
    if successes <= 0 or successes >= trials:
        return "only one outcome class among its rows"
    return None


def _segment_design(design: Design, profile: dict[str, Any]) -> Design:
    """The segment's own design: its counts and sums, and no segment expression (its source holds one segment)."""
    return dataclasses.replace(
        design,
        segment=None,
        segment_text=None,
        rows_total=int(profile["total"]),
        rows_used=int(profile["used"]),
        weight_sum=float(profile["weight_sum"]),
        success_sum=float(profile["success_sum"]),
        trial_sum=float(profile["trial_sum"]),
        loglik_constant=float(profile.get("loglik_constant") or 0.0),
        saturated_loglik=float(profile.get("saturated_loglik") or 0.0),
    )


def _segment_start(
    part: Design, fitted: list[int], pooled: NewtonResult | None = None, whole: Design | None = None
) -> np.ndarray:
    """Where a segment's Newton run starts: the pooled estimates, when a pooled fit without aliased columns
    is given, with the intercept moved by the segment's logit of its success rate less the pooled one;
    otherwise the intercept-only estimate (the logit of its rate) and zero slopes.

    Segments drawn from one population differ from the pooled estimates by their sampling error, of order
    one over the root of their rows on the standardised scale; Newton's method squares that error with each
    step (Nocedal and Wright 2006, Numerical Optimization, 2nd ed., Theorem 3.5), so from there a segment
    needs about one pass less than from its intercept alone.
    """
    start = np.zeros(len(fitted))
    if pooled is not None and whole is not None and not pooled.aliased:
        start[pooled.active] = pooled.beta
        if part.intercept and part.offset is None:
            start[0] += inference.intercept_only_estimate(part) - inference.intercept_only_estimate(whole)
        return start
    if part.intercept and part.offset is None:
        start[0] = inference.intercept_only_estimate(part)
    return start


def _run_together(
    engine: Engine,
    design: Design,
    fitted: list[int],
    steps: dict[Any, Steps],
    failures: dict[Any, str],
    reporter: Callable[[IterationReport], None] | None,
    saturated: dict[Any, float] | None = None,
    columns: list[int] | None = None,
    intercept: bool | None = None,
    cells: tuple[int, ...] = (),
) -> tuple[dict[Any, NewtonResult], int]:
    """Drive every segment's Newton generator with one grouped query per pass."""
    has_intercept = 1 if design.intercept else 0
    if columns is None:
        columns = [k - has_intercept for k in fitted if not (design.intercept and k == 0)]
        intercept = bool(design.intercept)
    size = len(columns) + (1 if intercept else 0)
    requests: dict[Any, tuple[np.ndarray, list[int]]] = {}
    results: dict[Any, NewtonResult] = {}
    for value, generator in steps.items():
        _advance(value, generator, None, requests, results, failures)
    began, passes = time.perf_counter(), 0
    latest: dict[Any, float] = {}
    placeholder = sb.ValuesTemplate.placeholder("dbfit_coef")
    query = statistics_query(design, columns, bool(intercept), None, coefficients=placeholder, cells=cells)
    plan = query_plan(design, columns, bool(intercept), cells=cells)
    template = sb.ValuesTemplate(
        engine.sql(query),
        engine.sql(placeholder),
        "dbfit_coef",
        [SEGMENT] + [f"c{k}" for k in range(size)],
        engine.dialect,
    )
    while requests:
        passes += 1
        found = engine.fetch_sql(template.render(_coefficient_rows(requests, size)), [])
        rows = unpack_groups(plan, found, separate=True)
        pending = list(requests.items())
        requests = {}
        for value, (_, active) in pending:
            if value not in rows:
                failures[value] = "no rows reached the statistics query"
                continue
            whole = rows[value]
            latest[value] = 2.0 * ((saturated or {}).get(value, 0.0) - whole.loglik)
            _advance(value, steps[value], _subset(whole, active, size), requests, results, failures)
        if reporter:
            reporter(
                IterationReport(
                    passes,
                    float(sum(latest.values())),
                    time.perf_counter() - began,
                    float("nan"),
                    phase=f"{len(pending)} segments ({len(requests)} still running)",
                )
            )
    return results, passes


def _advance(value, generator, sent, requests, results, failures) -> None:
    try:
        requests[value] = generator.send(sent) if sent is not None else next(generator)
    except StopIteration as finished:
        results[value] = finished.value
    except (FloatingPointError, np.linalg.LinAlgError) as err:
        failures[value] = f"the fit broke down numerically ({err})"


def _subset(result: PassResult, active: list[int], size: int) -> PassResult:
    if len(active) == size:
        return result
    return result.restricted(active)


def _coefficient_rows(
    requests: dict[Any, tuple[np.ndarray, list[int]]], size: int
) -> list[tuple[Any, exp.Expression, list[float]]]:
    """(segment, its literal, c0, c1, ...) for the running segments; inactive (aliased) coefficients are 0."""
    rows = []
    for value, (beta, active) in requests.items():
        full = np.zeros(size)
        full[active] = beta
        rows.append((value, segment_literal(value), full.tolist()))
    return rows


def segment_sources(source: str, by: exp.Expression | None, values: list[Any]) -> dict[Any, str]:
    """Each segment's rows as a SELECT over ``source`` (rebuilt by sqlglot): the source of that segment's model.

    It is written as DuckDB SQL, as every source text dbfit keeps, whichever engine fitted the model: readers
    of a model parse its source as DuckDB SQL and write it in their own engine's dialect.

    The query is written once around a placeholder, into which each value's literal (written by sqlglot) goes.
    """
    if by is None:
        raise AssertionError("segment sources need the by expression")
    placeholder = exp.column("dbfit_segment_value_placeholder", quoted=True)
    condition = exp.EQ(this=exp.Paren(this=by.copy()), expression=placeholder)
    text = exp.select("*").from_(source_relation(source)).where(condition).sql("duckdb")
    marker = placeholder.sql("duckdb")
    if text.count(marker) != 1:
        raise FitError(f"the source or by expression may not mention {marker}")
    before, after = text.split(marker)
    return {value: before + segment_literal(value).sql("duckdb") + after for value in values}


def segment_literal(value: Any) -> exp.Expression:
    """A SQL literal for a segment value as DuckDB returned it (a float in exponent form, read as DOUBLE)."""
    if isinstance(value, bool):
        return exp.Boolean(this=value)
    if isinstance(value, int):
        return exp.Literal.number(str(value)) if value >= 0 else exp.Neg(this=exp.Literal.number(str(-value)))
    if isinstance(value, float):
        text = sb.float_text(abs(value))
        return exp.Neg(this=exp.Literal.number(text)) if value < 0 else exp.Literal.number(text)
    if isinstance(value, Decimal):
        return exp.Literal.number(str(value)) if value >= 0 else exp.Neg(this=exp.Literal.number(str(-value)))
    return exp.Literal.string(str(value))


def _null_logliks(engine, design, segments, results, max_iter, tol) -> dict[Any, float]:
    """Each segment's intercept-only log-likelihood (grouped Newton runs when there is an offset)."""
    if design.offset is None:
        return {value: inference.null_loglik_closed_form(segments[value]) for value in results}
    steps = {}
    for value in results:
        part = segments[value]
        rules = NewtonRules(max_passes=max_iter, tol=tol, protected=1, check_aliasing=False)
        start = np.array([inference.intercept_only_estimate(part)])
        steps[value] = NewtonRun(Deviance(part.saturated_loglik), start, rules).steps()
    failures: dict[Any, str] = {}
    null_results, _ = _run_together(engine, design, [0], steps, failures, None, columns=[], intercept=True)
    return {
        value: (
            null_results[value].last.loglik + segments[value].loglik_constant
            if value in null_results
            else float("nan")
        )
        for value in results
    }
