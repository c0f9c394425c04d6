"""The model subcommands of the ``dbfit`` command line: fit, refit, models, gates, promote, decisions, publish,
assess, drift, effects, term-tests and report. Each prints plain lines, or with ``--json`` exactly one JSON object on stdout."""

from __future__ import annotations

import argparse
import json
import math
import sys
from collections.abc import Callable
from datetime import date, datetime
from typing import Any

import duckdb

from dbfit.assessment.groups import MIN_GROUP_ROWS
from dbfit.errors import DbfitError, GateRefusedError, UsageError
from dbfit.model.fitted import ROW_CHOICES

ROWS_HELP = "this part of the model's split (of --source if given)"

OK, REFUSED, DATA_ERROR = 0, 3, 4
Command = Callable[[str, str], argparse.ArgumentParser]


def add_model_commands(command: Command) -> None:
    """Add the model subcommands through ``command(name, help)``, which returns a subparser."""

    def base(name: str, text: str, *, model: bool = True) -> argparse.ArgumentParser:
        parser = command(name, text)
        if model:
            parser.add_argument("name", help="the stored model's name")
        parser.add_argument(
            "--database",
            required=name != "fit",
            help="DuckDB file, or postgresql:// URI, of the database holding the data and the store",
        )
        parser.add_argument("--json", action="store_true", help="print one JSON object instead of text")
        return parser

    fit = base(
        "fit", "fit a model from a spec file or arguments and store it as the current version", model=False
    )
    fit.add_argument("--spec", help="JSON or TOML (.toml) file of settings; arguments given here override it")
    fit.add_argument("--name", help="model name to store the fit under")
    fit.add_argument("--formula", help="target ~ term + ...")
    fit.add_argument("--source", help="table or view name, Parquet/CSV path, or a single SELECT")
    for option in ("weights", "offset", "trials", "positive"):
        fit.add_argument(f"--{option}", help=f"the fit's {option} (as dbfit.fit)")
    fit.add_argument(
        "--reference", action="append", metavar="TERM=LEVEL", help="reference level (repeatable)"
    )
    fit.add_argument(
        "--missing",
        action="append",
        metavar="POLICY|TERM=POLICY",
        help="NULLs in terms: drop (default), indicator or level, for every term or per term (repeatable)",
    )
    fit.add_argument("--max-iter", type=int, help="most Newton passes (default 50)")
    fit.add_argument("--tol", type=float, help="convergence tolerance (default 1e-10)")
    fit.add_argument("--firth", action="store_true", default=None, help="Firth's bias-reduced fit")
    fit.add_argument(
        "--by", help="SQL expression of a segment: one model per value, stored as NAME.<segment>"
    )
    fit.add_argument(
        "--holdout-key", help="SQL expression to hash for a held-out part (enables held-out gates)"
    )
    fit.add_argument(
        "--holdout-share", type=float, help="share of rows held out (default 0.2 with --holdout-key)"
    )
    fit.add_argument(
        "--threshold", type=float, help="probability cut-off of the held-out metrics (default 0.5)"
    )

    refit = base(
        "refit", "refit the current version on current data, warm-started; promote only through the gates"
    )
    refit.add_argument("--source", help="fit this source instead of the stored one")
    refit.add_argument(
        "--skip-unchanged",
        action="store_true",
        help="do nothing when the source's fingerprint (row count and row checksum) is unchanged",
    )
    refit.add_argument(
        "--cold", action="store_true", help="start from the intercept-only fit, not the current estimates"
    )
    refit.add_argument(
        "--recompute-knots",
        action="store_true",
        help="compute the quantile knots and bin edges of spline() and bins() terms again on the new rows",
    )

    base("models", "list stored models and versions (the current one marked)", model=False)
    gates = base("gates", "show the promotion gates of a model, or set some with the options")
    gates.add_argument(
        "--auc-margin", type=_number_or_none, help="largest allowed drop in held-out AUC ('none': off)"
    )
    gates.add_argument(
        "--log-loss-margin", type=_number_or_none, help="largest allowed rise in held-out log loss"
    )
    gates.add_argument(
        "--max-shift", type=_number_or_none, help="largest coefficient move, in current standard errors"
    )
    gates.add_argument(
        "--require-converged", choices=["yes", "no"], help="refuse non-converged or separated fits"
    )
    promote = base("promote", "make a stored version current after its gates (or --force)")
    promote.add_argument("version", type=int, help="the version to promote")
    promote.add_argument("--force", action="store_true", help="skip the gates (the audit row says so)")
    base("decisions", "the audit trail of promotion decisions of a model")

    publish = base("publish", "create a scoring view of a model (or replace one dbfit published)")
    publish.add_argument("--view", required=True, help="view name ([schema.]name)")
    publish.add_argument("--source", help="rows to score (default: the source it was fitted from, all rows)")
    publish.add_argument("--version", type=int, help="pin this version (default: the current one)")
    publish.add_argument(
        "--live", action="store_true", help="read the current version's estimates at query time"
    )
    publish.add_argument(
        "--replace",
        action="store_true",
        help="replace a view of that name even when dbfit did not publish it",
    )
    publish.add_argument(
        "--reasons", type=int, default=0, help="add the top N reason codes per row (reason_1, ...)"
    )
    publish.add_argument(
        "--baseline", type=json.loads, help="JSON object of each variable's baseline value for the reasons"
    )

    assess = base("assess", "metrics of a model on a source (AUC, log loss, Brier score, ...)")
    assess.add_argument(
        "--source",
        help="rows to assess on (default: the held-out rows of a holdout fit, "
        "else all rows of the model's source)",
    )
    assess.add_argument("--rows", choices=ROW_CHOICES, help=ROWS_HELP)
    assess.add_argument("--version", type=int, help="stored version (default: the current one)")
    assess.add_argument(
        "--threshold", type=float, default=0.5, help="probability cut-off (default %(default)s)"
    )
    assess.add_argument("--by", help="SQL expression of a group: one row of metrics and gaps per value")
    assess.add_argument(
        "--reference", help="with --by: the group the others are compared with (default: largest)"
    )
    assess.add_argument(
        "--min-rows",
        type=int,
        default=MIN_GROUP_ROWS,
        help="with --by: a group of fewer rows gets counts only (default %(default)s)",
    )

    drift = base("drift", "population stability index per variable between the training rows and a source")
    drift.add_argument("--source", required=True, help="the new rows")
    drift.add_argument("--version", type=int, help="stored version (default: the current one)")

    effects = base("effects", "effects of each factor on the probability, with delta-method standard errors")
    effects.add_argument("--source", help="rows to average over (default: the rows the model was fitted on)")
    effects.add_argument(
        "--at", choices=["overall", "means"], default="overall", help="average over rows, or at their means"
    )
    effects.add_argument(
        "--at-value",
        action="append",
        metavar="FACTOR=VALUE",
        help="a point's value (repeatable; others at means)",
    )
    effects.add_argument("--variable", action="append", help="take effects of this factor only (repeatable)")
    effects.add_argument("--version", type=int, help="stored version (default: the current one)")

    tests = base("term-tests", "joint Wald test per formula term (and, on request, likelihood-ratio tests)")
    tests.add_argument(
        "--likelihood-ratio", action="store_true", help="also refit without each term (costs scans)"
    )
    tests.add_argument("--version", type=int, help="stored version (default: the current one)")

    report = base("report", "write the HTML report of a model")
    report.add_argument("--output", required=True, help="HTML file to write")
    report.add_argument("--source", help="rows to assess in the report (default: as for assess)")
    report.add_argument("--rows", choices=ROW_CHOICES, help=ROWS_HELP)
    report.add_argument("--version", type=int, help="stored version (default: the current one)")
    report.add_argument("--by", help="also assess by group: a SQL expression (as assess --by)")
    report.add_argument("--reference", help="with --by: the reference group (default: the largest)")
    report.add_argument(
        "--threshold", type=float, default=0.5, help="probability cut-off (default %(default)s)"
    )
    report.add_argument(
        "--likelihood-ratio",
        action="store_true",
        help="also the likelihood-ratio test per term (one warm-started refit per term)",
    )


def run_model_command(args: argparse.Namespace) -> int:
    """Run one model subcommand; print its result; return the exit code."""
    try:
        result, code = _run(args)
    except GateRefusedError as err:
        result, code = err.result | {"ok": False, "error": str(err)}, REFUSED
        print(f"dbfit: {err}", file=sys.stderr)
    except UsageError:
        raise
    except (DbfitError, duckdb.Error) as err:
        print(f"dbfit: {err}", file=sys.stderr)
        if not args.json:
            return DATA_ERROR
        result, code = {"ok": False, "error": str(err)}, DATA_ERROR
    if code == REFUSED and "error" not in result:
        print(
            f"dbfit: the candidate of '{result['model']}' was refused: {'; '.join(result['reasons'])}",
            file=sys.stderr,
        )
    result = {"ok": code == OK, "command": args.command, "exit_code": code, **result}
    print(json.dumps(_plain(result), sort_keys=False) if args.json else _text(result))
    return code


def _run(args: argparse.Namespace) -> tuple[dict[str, Any], int]:
    import dbfit
    from dbfit.interfaces.connection import connect_existing

    if args.command == "fit":
        return _fit(args), OK
    con = connect_existing(args.database)
    try:
        if args.command == "refit":
            result = dbfit.refit(
                con,
                args.name,
                source=args.source,
                skip_unchanged=args.skip_unchanged,
                cold=args.cold,
                recompute_knots=args.recompute_knots,
            )
            return result, REFUSED if result["decision"] == "refused" else OK
        if args.command == "models":
            return {"versions": dbfit.models(con)}, OK
        if args.command == "gates":
            return _gates(con, args), OK
        if args.command == "promote":
            return dbfit.promote(con, args.name, version=args.version, force=args.force), OK
        if args.command == "decisions":
            return {"model": args.name, "decisions": dbfit.decisions(con, args.name)}, OK
        if args.command == "publish":
            source = args.source or _fitted_source(con, args.name, args.version)
            made = dbfit.publish(
                con,
                args.name,
                source,
                args.view,
                version=args.version,
                live=args.live,
                replace=args.replace,
                reasons=args.reasons,
                baseline=args.baseline,
            )
            return made, OK
        if args.command == "assess" and args.by is not None:
            return _assess_groups(con, args), OK
        if args.command == "assess":
            table = dbfit.assess(
                con, args.name, args.source, rows=args.rows, threshold=args.threshold, version=args.version
            )
            return {"model": args.name, "rows": _rows_note(table), "metrics": table.to_pylist()}, OK
        if args.command == "drift":
            table = dbfit.drift(con, args.name, args.source, version=args.version)
            return {
                "model": args.name,
                "source": args.source,
                "variables": table.to_pylist(),
                "bands": "common practice: PSI below 0.1 stable, 0.1-0.25 some shift, above 0.25 large shift",
            }, OK
        if args.command == "effects":
            return _effects(con, args), OK
        if args.command == "term-tests":
            table = dbfit.term_tests(
                con, args.name, likelihood_ratio=args.likelihood_ratio, version=args.version
            )
            scans = int(table.schema.metadata[b"dbfit_scans"])
            return {"model": args.name, "scans": scans, "terms": table.to_pylist()}, OK
        if args.command == "report":
            return _report(con, args), OK
        raise UsageError(f"unknown command {args.command}")
    finally:
        con.close()


def _fit(args: argparse.Namespace) -> dict[str, Any]:
    import dbfit
    from dbfit.fitting.options import FitOptions
    from dbfit.interfaces.python_api import fit_options
    from dbfit.interfaces.spec_files import FIT_OPTIONS, merge, read_spec

    reference = None
    if args.reference:
        pairs = [item.split("=", 1) for item in args.reference]
        if any(len(p) != 2 for p in pairs):
            raise UsageError("--reference takes TERM=LEVEL")
        reference = dict(pairs)
    missing: Any = None
    if args.missing:
        pairs = [item.split("=", 1) for item in args.missing]
        if len(pairs) == 1 and len(pairs[0]) == 1:
            missing = pairs[0][0]
        elif any(len(p) != 2 for p in pairs):
            raise UsageError("--missing takes one POLICY, or TERM=POLICY (repeatable)")
        else:
            missing = dict(pairs)
    given = {
        k: getattr(args, k)
        for k in (
            "database",
            "name",
            "formula",
            "source",
            "weights",
            "offset",
            "trials",
            "positive",
            "max_iter",
            "tol",
            "firth",
            "by",
            "holdout_key",
            "holdout_share",
            "threshold",
        )
    }
    settings = merge(
        read_spec(args.spec) if args.spec else {}, given | {"reference": reference, "missing": missing}
    )
    options = {k: settings[k] for k in FIT_OPTIONS if settings.get(k) is not None}
    split = None
    if settings.get("holdout_key"):
        split = dbfit.Holdout(settings["holdout_key"], settings.get("holdout_share") or 0.2)
    elif settings.get("holdout_share") is not None:
        raise UsageError("--holdout-share needs --holdout-key")
    chosen = FitOptions.of(**options)
    con = dbfit.connect(settings["database"])
    try:
        model = fit_options(
            con,
            settings["formula"],
            settings["source"],
            chosen,
            name=settings["name"],
            split=split,
            threshold=settings.get("threshold") or 0.5,
            progress=False,
        )
        if isinstance(model, dbfit.SegmentedFit):
            return _segmented_result(con, model, settings.get("gates"))
        if settings.get("gates"):
            dbfit.set_gates(con, settings["name"], **settings["gates"])
        return {
            "model": model.name,
            "version": model.version,
            "rows_used": model.stats["n_used"],
            "iterations": model.stats["iterations"],
            "scans": model.stats["scans"],
            "converged": model.stats["converged"],
            "holdout": model.stats.get("holdout"),
            "coefficients": model.coefficients.select(["term", "estimate", "std_error"]).to_pylist(),
        }
    finally:
        con.close()


def _segmented_result(
    con: duckdb.DuckDBPyConnection, fitted: Any, gates: dict[str, Any] | None
) -> dict[str, Any]:
    """What ``fit --by`` stored: one row per segment model (each gets the spec's gates), and the unfitted segments."""
    import dbfit

    rows = []
    for value, model in fitted.models.items():
        if gates:
            dbfit.set_gates(con, model.name, **gates)
        rows.append(
            {
                "segment": str(value),
                "model": model.name,
                "version": model.version,
                "rows_used": model.stats["n_used"],
                "iterations": model.stats["iterations"],
                "converged": model.stats["converged"],
                "warnings": len(model.warnings),
            }
        )
    return {
        "by": fitted.by,
        "passes": fitted.passes,
        "scans": fitted.scans,
        "models": rows,
        "failures": {str(value): reason for value, reason in fitted.failures.items()},
    }


def _fitted_source(con: duckdb.DuckDBPyConnection, name: str, version: int | None) -> str:
    """The source the model was fitted from, whole (a held-out fit's model source is its training part)."""
    import dbfit
    from dbfit.lifecycle.fingerprint import origin_source

    model = dbfit.load(con, name, version=version)
    return origin_source(model.options, model.source)


def _gates(con: duckdb.DuckDBPyConnection, args: argparse.Namespace) -> dict[str, Any]:
    import dataclasses

    import dbfit

    settings = {
        k: v
        for k, v in (
            ("auc_margin", args.auc_margin),
            ("log_loss_margin", args.log_loss_margin),
            ("max_shift", args.max_shift),
        )
        if v is not None
    }
    settings |= {k: (None if v == "none" else v) for k, v in settings.items()}
    if args.require_converged is not None:
        settings["require_converged"] = args.require_converged == "yes"
    gates = dbfit.set_gates(con, args.name, **settings) if settings else dbfit.gates_of(con, args.name)
    return {"model": args.name, "gates": dataclasses.asdict(gates)}


def _effects(con: duckdb.DuckDBPyConnection, args: argparse.Namespace) -> dict[str, Any]:
    import dbfit

    at: Any = args.at
    if args.at_value:
        pairs = [item.split("=", 1) for item in args.at_value]
        if any(len(p) != 2 for p in pairs):
            raise UsageError("--at-value takes FACTOR=VALUE")
        at = dict(pairs)
    table = dbfit.marginal_effects(
        con, args.name, args.source, at=at, variables=args.variable, version=args.version
    )
    metadata = {k.decode(): v.decode() for k, v in (table.schema.metadata or {}).items()}
    return {
        "model": args.name,
        "at": metadata["dbfit_at"],
        "rows": metadata["dbfit_rows"],
        "scans": int(metadata["dbfit_scans"]),
        "effects": table.to_pylist(),
    }


def _report(con: duckdb.DuckDBPyConnection, args: argparse.Namespace) -> dict[str, Any]:
    import dbfit
    from dbfit.assessment.report import write_report
    from dbfit.interfaces.python_api import report_assessment

    model = dbfit.load(con, args.name, version=args.version)
    # Assessed on --source (with drift against the training rows), else on the held-out rows of a holdout
    # fit, else on the rows it was fitted on.
    tables = None
    if model.design.trials is None:
        tables = report_assessment(
            con,
            model,
            args.source,
            rows=args.rows,
            threshold=args.threshold,
            by=args.by,
            reference=args.reference,
            likelihood_ratio=args.likelihood_ratio,
        )
    path = write_report(model, args.output, assessment=tables)
    rows = (
        _rows_note(tables["metrics"])
        if tables
        else ("none: a model of successes out of trials is not assessed")
    )
    return {"model": model.name, "version": model.version, "rows": rows, "output": str(path)}


def _assess_groups(con: duckdb.DuckDBPyConnection, args: argparse.Namespace) -> dict[str, Any]:
    import dbfit

    table = dbfit.assess(
        con,
        args.name,
        args.source,
        rows=args.rows,
        threshold=args.threshold,
        version=args.version,
        by=args.by,
        reference=args.reference,
        min_rows=args.min_rows,
    )
    made = {k.decode().removeprefix("dbfit_"): v.decode() for k, v in (table.schema.metadata or {}).items()}
    return {"model": args.name, **made, "groups": table.to_pylist()}


def _rows_note(metrics: Any) -> str | None:
    """Which rows an assessment used: the note of its metric ``rows``."""
    return dict(zip(metrics["metric"].to_pylist(), metrics["note"].to_pylist())).get("rows")


def _number_or_none(text: str) -> float | str:
    if text.lower() == "none":
        return "none"
    try:
        return float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number or 'none'") from None


def _plain(value: Any) -> Any:
    """JSON-ready: dicts and lists walked, times as ISO text, NaN and infinities as null."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_plain(v) for v in value]
    if isinstance(value, (datetime, date)):
        return value.isoformat()
    if hasattr(value, "item") and hasattr(value, "dtype"):  # a numpy scalar
        value = value.item()
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    return value


def _text(result: dict[str, Any]) -> str:
    """Plain lines: one `key: value` per scalar, one line per row of each list."""
    lines = []
    for key, value in result.items():
        if key in ("ok", "exit_code", "command"):
            continue
        if isinstance(value, list) and value and isinstance(value[0], dict):
            lines.append(f"{key}:")
            lines += ["  " + "  ".join(f"{k}={_short(v)}" for k, v in row.items()) for row in value]
        elif isinstance(value, dict):
            lines.append(f"{key}: " + ", ".join(f"{k}={_short(v)}" for k, v in value.items()))
        else:
            lines.append(f"{key}: {_short(value)}")
    return "\n".join(lines)


def _short(value: Any) -> str:
    if isinstance(value, float):
        return f"{value:.6g}"
    text = str(_plain(value))
    return text if len(text) <= 80 else text[:77] + "..."
