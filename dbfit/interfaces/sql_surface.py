"""The ``dbfit.`` SQL functions: table macros in an attached in-memory catalog ``dbfit`` over Python functions.

Nothing of it is written to the user's database file: the catalog lives in memory and the Python functions
belong to the connection. The Python functions run their queries on a second connection of the same database
(DuckDB cannot run a query on the connection that is executing the calling query), so they see committed data
only; ``dbfit.fit`` compares the row count the caller sees with what it fitted and says so when they differ.
``dbfit.score`` returns a query that the calling connection itself runs, through DuckDB's ``query()``.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

import duckdb
from sqlglot import exp

from dbfit.assessment import metrics as assessment
from dbfit.assessment.effects import EFFECT_COLUMNS, marginal_effects
from dbfit.assessment.groups import GROUP_COLUMNS, MIN_GROUP_ROWS, assess_groups
from dbfit.deployment.segment_views import publish_segments
from dbfit.deployment.views import build_scoring, check_score_columns, publish
from dbfit.engines.duckdb_engine import DuckDBEngine
from dbfit.errors import FitError, SourceError, StoreError
from dbfit.expressions.formula import holds_top_level_tilde
from dbfit.expressions.names import model_name
from dbfit.expressions.source import source_relation
from dbfit.fitting import driver as fitting
from dbfit.fitting.likelihood_ratio_terms import LR_COLUMNS, term_tests
from dbfit.fitting.options import FitOptions
from dbfit.lifecycle import saving
from dbfit.lifecycle.drift import psi_table
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit
from dbfit.store import model_store as store

CATALOG = "dbfit"
EARLIER_FIT_ORDER = (
    "deprecated: dbfit.fit(model, source, formula) goes in the next release; "
    "write dbfit.fit(model, formula, source)"
)
T = duckdb.sqltype
COEFFICIENT_FIELDS = {"model": T("VARCHAR"), "version": T("INTEGER"), "term": T("VARCHAR")} | {
    c: T("DOUBLE") for c in store.COEFFICIENT_COLUMNS[1:]
}
# dbfit.fit: with by := each segment's model is stored as 'model.segment'; a segment that could not be fitted
# is one row with its reason in ``note`` and no model. ``note`` otherwise holds the model's warnings.
FIT_FIELDS = (
    {"model": T("VARCHAR"), "version": T("INTEGER"), "segment": T("VARCHAR"), "term": T("VARCHAR")}
    | {c: T("DOUBLE") for c in store.COEFFICIENT_COLUMNS[1:]}
    | {"note": T("VARCHAR")}
)
VERSION_FIELDS = {
    "model": T("VARCHAR"),
    "version": T("INTEGER"),
    "created_at": T("TIMESTAMP"),
    "formula": T("VARCHAR"),
    "source": T("VARCHAR"),
    "source_rows": T("BIGINT"),
    "rows_used": T("BIGINT"),
    "deviance": T("DOUBLE"),
    "aic": T("DOUBLE"),
    "converged": T("BOOLEAN"),
    "warnings_count": T("INTEGER"),
    "current": T("BOOLEAN"),
}
PUBLISHED_FIELDS = {
    "view": T("VARCHAR"),
    "model": T("VARCHAR"),
    "version": T("INTEGER"),
    "mode": T("VARCHAR"),
}
SEGMENT_VIEW_FIELDS = {"view": T("VARCHAR"), "segments": T("INTEGER"), "mode": T("VARCHAR")}
DROPPED_FIELDS = {"model": T("VARCHAR"), "version": T("INTEGER")}
CUTOFF_COLUMNS = (
    "threshold",
    "true_positive_rate",
    "false_positive_rate",
    "precision",
    "recall",
    "specificity",
    "share_flagged",
)
CALIBRATION_COLUMNS = (
    "mean_predicted",
    "observed_rate",
    "wilson_low",
    "wilson_high",
    "lowest_score",
    "highest_score",
)
DRIFT_FIELDS = {
    "variable": T("VARCHAR"),
    "kind": T("VARCHAR"),
    "bins": T("BIGINT"),
    "training_rows": T("BIGINT"),
    "new_rows": T("BIGINT"),
    "psi": T("DOUBLE"),
    "reading": T("VARCHAR"),
}
EFFECT_FIELDS = {c: T("VARCHAR") for c in EFFECT_COLUMNS[:4]} | {c: T("DOUBLE") for c in EFFECT_COLUMNS[4:]}
TERM_TEST_FIELDS = {
    "term": T("VARCHAR"),
    "df": T("BIGINT"),
    "wald_chi_square": T("DOUBLE"),
    "wald_p_value": T("DOUBLE"),
    **{c: T("DOUBLE") for c in list(LR_COLUMNS)[:2]},
    "refit_scans": T("BIGINT"),
    "note": T("VARCHAR"),
}
GAINS_COLUMNS = ("share_of_rows", "share_of_positives", "lift", "cumulative_lift")
GROUP_FIELDS = {
    name: {"string": T("VARCHAR"), "bool": T("BOOLEAN"), "int64": T("BIGINT")}.get(str(kind), T("DOUBLE"))
    for name, kind in GROUP_COLUMNS.items()
}

_ROWS = "SELECT dbfit_row.* FROM (SELECT unnest({call}) AS dbfit_row)"
_SCORE_OPTIONS = ", standard_error := false, level := 0.95, unseen := 'null'"
_SCORE = (
    "SELECT * FROM query(dbfit_sql_score(model, source, {version}, standard_error, level::VARCHAR, unseen))"
)
MACROS = {
    "fit": [
        (
            'model, formula, source, weights := NULL, "offset" := NULL, trials := NULL, reference := NULL, '
            'positive := NULL, max_iter := 50, tol := 1e-10, robust := NULL, "cluster" := NULL, firth := false, '
            'population_rate := NULL, shrinkage := NULL, l1_share := 0.0, "by" := NULL',
            _ROWS.format(
                call='dbfit_sql_fit(model, formula, source, weights, "offset", trials, reference, '
                "positive, max_iter::VARCHAR, tol::VARCHAR, "
                "(SELECT dbfit_count.n FROM query(dbfit_sql_count(formula, source)) "
                'AS dbfit_count), robust, "cluster", firth::VARCHAR, '
                'population_rate::VARCHAR, shrinkage::VARCHAR, l1_share::VARCHAR, "by")'
            ),
        )
    ],
    "models": [("", _ROWS.format(call="dbfit_sql_models()"))],
    "coefficients": [
        ("model", _ROWS.format(call="dbfit_sql_coefficients(model, NULL)")),
        ("model, version", _ROWS.format(call="dbfit_sql_coefficients(model, version)")),
    ],
    "score": [
        ("model, source" + _SCORE_OPTIONS, _SCORE.format(version="NULL")),
        ("model, source, version" + _SCORE_OPTIONS, _SCORE.format(version="version")),
    ],
    "publish": [
        (
            "model, source, view, version := NULL, live := false, unseen := 'null', \"replace\" := false",
            _ROWS.format(call='dbfit_sql_publish(model, source, view, version, live, unseen, "replace")'),
        )
    ],
    "publish_segments": [
        (
            "model, source, view, unseen := 'null', \"replace\" := false",
            _ROWS.format(call='dbfit_sql_publish_segments(model, source, view, unseen, "replace")'),
        )
    ],
    "assess": [
        (
            "model, source, threshold := 0.5",
            _ROWS.format(call="dbfit_sql_assess(model, source, threshold::VARCHAR, 'metrics')"),
        ),
        (
            'model, source, "by", reference := NULL, threshold := 0.5, min_rows := ' + str(MIN_GROUP_ROWS),
            _ROWS.format(
                call='dbfit_sql_assess_groups(model, source, "by", reference::VARCHAR, threshold::VARCHAR, '
                "min_rows::VARCHAR)"
            ),
        ),
    ],
    "confusion": [
        (
            "model, source, threshold := 0.5",
            _ROWS.format(call="dbfit_sql_confusion(model, source, threshold::VARCHAR, 'confusion')"),
        )
    ],
    "cutoffs": [("model, source", _ROWS.format(call="dbfit_sql_cutoffs(model, source, '0.5', 'curve')"))],
    "roc": [
        (
            "model, source",
            "SELECT threshold, false_positive_rate, true_positive_rate FROM "
            + _ROWS.format(call="dbfit_sql_cutoffs(model, source, '0.5', 'curve')").replace(
                "SELECT ", "(SELECT ", 1
            )
            + ")",
        )
    ],
    "calibration": [
        ("model, source", _ROWS.format(call="dbfit_sql_calibration(model, source, '0.5', 'calibration')"))
    ],
    "gains": [("model, source", _ROWS.format(call="dbfit_sql_gains(model, source, '0.5', 'gains')"))],
    "drift": [("model, source", _ROWS.format(call="dbfit_sql_drift(model, source)"))],
    "marginal_effects": [
        (
            "model, source := NULL, \"at\" := 'overall', at_values := NULL, variables := NULL",
            _ROWS.format(call='dbfit_sql_effects(model, source, "at", at_values, variables)'),
        )
    ],
    "term_tests": [
        (
            "model, likelihood_ratio := false",
            _ROWS.format(call="dbfit_sql_term_tests(model, likelihood_ratio)"),
        )
    ],
    "drop_model": [
        ("model", _ROWS.format(call="dbfit_sql_drop(model, NULL)")),
        ("model, version", _ROWS.format(call="dbfit_sql_drop(model, version)")),
    ],
}


def register(con: duckdb.DuckDBPyConnection) -> None:
    """Attach the in-memory ``dbfit`` catalog and create the table macros and their Python functions."""
    attached = con.execute(
        "SELECT path FROM duckdb_databases() WHERE database_name = ?", [CATALOG]
    ).fetchall()
    if attached and attached[0][0] is not None:
        raise StoreError(
            f"this connection's database is named '{CATALOG}' (file {attached[0][0]}), the name dbfit's SQL functions "
            "need: rename the file or attach it under another name (ATTACH 'dbfit.duckdb' AS sales)"
        )
    if not attached:
        con.execute(f"ATTACH ':memory:' AS {CATALOG} (READ_WRITE)").fetchall()
    _register_functions(con)
    for name, overloads in MACROS.items():
        bodies = ", ".join(f"({parameters}) AS TABLE ({body})" for parameters, body in overloads)
        con.execute(f"CREATE OR REPLACE MACRO {CATALOG}.main.{name} {bodies}").fetchall()


class SqlFunctions:
    """The Python functions behind the ``dbfit.`` macros, each on a connection of its own (``second``)."""

    def __init__(self, con: duckdb.DuckDBPyConnection) -> None:
        self.con = con

    def second(self) -> duckdb.DuckDBPyConnection:
        """A connection of its own: a cursor of the caller's connection, so nothing runs in the caller's transaction."""
        return self.con.cursor()

    def fit_rows(
        self,
        model,
        formula,
        source,
        weights,
        offset,
        trials,
        reference,
        positive,
        max_iter,
        tol,
        visible_rows,
        robust,
        cluster,
        firth,
        population_rate,
        shrinkage,
        l1_share,
        by,
    ):
        model_name(model)
        formula, source, earlier = formula_and_source(formula, source)
        options = FitOptions.from_text(
            weights=weights,
            offset=offset,
            trials=trials,
            reference=reference,
            positive=positive,
            max_iter=max_iter,
            tol=tol,
            robust=robust,
            cluster=cluster,
            firth=firth,
            population_rate=population_rate,
            shrinkage=shrinkage,
            l1_share=l1_share,
            by=by,
        )
        with self.second() as reader:
            fitted = _fit_on_second_connection(reader, source, formula, visible_rows, options)
            if isinstance(fitted, SegmentedFit):
                rows = _segment_rows(fitted, saving.save_segments(reader, fitted, model))
            else:
                version = saving.save_model(reader, fitted, model)
                rows = [
                    {
                        "model": model,
                        "version": version,
                        "segment": None,
                        **row,
                        "note": _warnings_note(fitted),
                    }
                    for row in fitted.coefficients.to_pylist()
                ]
        if earlier:
            for row in rows:
                row["note"] = "; ".join(filter(None, [EARLIER_FIT_ORDER, row["note"]]))
        return rows

    def count_sql(self, formula, source):
        source = formula_and_source(formula, source)[1]
        with self.second() as reader:
            check_readable(reader, source)
        return (
            exp.select(exp.alias_(exp.Count(this=exp.Star()), "n"))
            .from_(source_relation(source))
            .sql("duckdb")
        )

    def version_rows(self):
        with self.second() as reader:
            return [{k: row[k] for k in VERSION_FIELDS} for row in store.version_rows(reader)]

    def coefficient_rows(self, model, version):
        with self.second() as reader:
            return store.coefficient_rows(reader, model, version)

    def score_sql(self, model, source, version, standard_error, level, unseen):
        level = _text_number(level, "level", 0.95)
        with self.second() as reader:
            if source is not None:
                check_readable(reader, source)
            fitted = store.load_model(reader, model, version)
            try:
                check_score_columns(reader, source_relation(source), bool(standard_error))
            except SourceError:
                pass  # not visible to the second connection (a temporary table?): the calling query reads it
        query = build_scoring(
            None, fitted, source, unseen=unseen or "null", standard_error=bool(standard_error), level=level
        )
        return query.sql("duckdb")

    def publish_rows(self, model, source, view, version, live, unseen, replace):
        with self.second() as writer:
            made = publish(
                writer,
                model,
                source=source,
                view=view,
                version=version,
                live=bool(live),
                unseen=unseen or "null",
                replace=bool(replace),
            )
        return [{k: made[k] for k in PUBLISHED_FIELDS}]

    def publish_segment_rows(self, model, source, view, unseen, replace):
        with self.second() as writer:
            made = publish_segments(
                writer, model, source=source, view=view, unseen=unseen or "null", replace=bool(replace)
            )
        return [{k: made[k] for k in SEGMENT_VIEW_FIELDS}]

    def drop_rows(self, model, version):
        with self.second() as writer:
            return [{"model": m, "version": v} for m, v in store.drop_model(writer, model, version)]

    def assessment_rows(self, model, source, threshold, table):
        with self.second() as reader:
            fitted = store.load_model(reader, model, None)
            engine = DuckDBEngine(reader)
            text, note = fitted.assessed_rows(source, None)
            scored = assessment.scored_relation(fitted, text)
            threshold = _text_number(threshold, "threshold", 0.5)
            if table == "metrics":
                return assessment.metrics(engine, scored, threshold, rows_note=note).table().to_pylist()
            builders = {
                "confusion": lambda: assessment.confusion_table(engine, scored, threshold),
                "curve": lambda: assessment.curve_points(engine, scored),
                "calibration": lambda: assessment.calibration_table(engine, scored),
                "gains": lambda: assessment.gains_table(engine, scored),
            }
            return builders[table]().to_pylist()

    def group_assessment_rows(self, model, source, by, reference, threshold, min_rows):
        with self.second() as reader:
            fitted = store.load_model(reader, model, None)
            text, note = fitted.assessed_rows(source, None)
            made = assess_groups(
                DuckDBEngine(reader),
                fitted,
                text,
                by,
                reference=reference,
                threshold=_text_number(threshold, "threshold", 0.5),
                min_rows=_whole_number(min_rows, "min_rows", MIN_GROUP_ROWS),
                rows_note=note,
            )
            return made.table.to_pylist()

    def drift_rows(self, model, source):
        with self.second() as reader:
            return psi_table(reader, store.load_model(reader, model, None), source).to_pylist()

    def effect_rows(self, model, source, at, at_values, variables):
        with self.second() as reader:
            fitted = store.load_model(reader, model, None)
            chosen = dict(at_values) if at_values is not None else (at or "overall")
            table = marginal_effects(DuckDBEngine(reader), fitted, source, at=chosen, variables=variables)
            return table.to_pylist()

    def term_test_rows(self, model, likelihood_ratio):
        with self.second() as reader:
            fitted = store.load_model(reader, model, None)
            rows = term_tests(
                DuckDBEngine(reader), fitted, likelihood_ratio=bool(likelihood_ratio)
            ).to_pylist()
        return [{name: row.get(name) for name in TERM_TEST_FIELDS} for row in rows]

    def signatures(self) -> list[tuple[str, Callable[..., Any], list[Any], Any]]:
        """Each SQL function: its name, the method, its parameter types and its return type."""
        V, I, D, B = T("VARCHAR"), T("INTEGER"), T("DOUBLE"), T("BOOLEAN")
        reference_type = duckdb.map_type(V, V)
        functions: list[tuple[str, Callable[..., Any], list[Any], Any]] = [
            (
                "dbfit_sql_fit",
                self.fit_rows,
                [V, V, V, V, V, V, reference_type, V, V, V, T("BIGINT"), V, V, V, V, V, V, V],
                _rows_of(FIT_FIELDS),
            ),
            ("dbfit_sql_count", self.count_sql, [V, V], V),
            ("dbfit_sql_models", self.version_rows, [], _rows_of(VERSION_FIELDS)),
            ("dbfit_sql_coefficients", self.coefficient_rows, [V, I], _rows_of(COEFFICIENT_FIELDS)),
            ("dbfit_sql_score", self.score_sql, [V, V, I, B, V, V], V),
            ("dbfit_sql_publish", self.publish_rows, [V, V, V, I, B, V, B], _rows_of(PUBLISHED_FIELDS)),
            (
                "dbfit_sql_publish_segments",
                self.publish_segment_rows,
                [V, V, V, V, B],
                _rows_of(SEGMENT_VIEW_FIELDS),
            ),
            ("dbfit_sql_drop", self.drop_rows, [V, I], _rows_of(DROPPED_FIELDS)),
            (
                "dbfit_sql_assess",
                self.assessment_rows,
                [V, V, V, V],
                _rows_of({"metric": V, "value": D, "note": V}),
            ),
            (
                "dbfit_sql_confusion",
                self.assessment_rows,
                [V, V, V, V],
                _rows_of({"actual": I, "predicted": I, "rows": T("BIGINT")}),
            ),
            (
                "dbfit_sql_cutoffs",
                self.assessment_rows,
                [V, V, V, V],
                _rows_of({c: D for c in CUTOFF_COLUMNS}),
            ),
            (
                "dbfit_sql_calibration",
                self.assessment_rows,
                [V, V, V, V],
                _rows_of({"group": I, "rows": T("BIGINT"), **{c: D for c in CALIBRATION_COLUMNS}}),
            ),
            (
                "dbfit_sql_gains",
                self.assessment_rows,
                [V, V, V, V],
                _rows_of({"group": I, **{c: D for c in GAINS_COLUMNS}}),
            ),
            (
                "dbfit_sql_assess_groups",
                self.group_assessment_rows,
                [V, V, V, V, V, V],
                _rows_of(GROUP_FIELDS),
            ),
            ("dbfit_sql_drift", self.drift_rows, [V, V], _rows_of(DRIFT_FIELDS)),
            (
                "dbfit_sql_effects",
                self.effect_rows,
                [V, V, V, duckdb.map_type(V, V), duckdb.list_type(V)],
                _rows_of(EFFECT_FIELDS),
            ),
            ("dbfit_sql_term_tests", self.term_test_rows, [V, B], _rows_of(TERM_TEST_FIELDS)),
        ]
        return functions


def _register_functions(con: duckdb.DuckDBPyConnection) -> None:
    for name, function, parameters, returns in SqlFunctions(con).signatures():
        try:
            con.create_function(
                name, function, parameters, returns, null_handling="special", side_effects=True
            )
        except duckdb.NotImplementedException as err:
            if "already created" not in str(err):
                raise
            # installed on this connection before: the existing function serves the same connection


def formula_and_source(second: str, third: str) -> tuple[str, str, bool]:
    """The formula and source of ``dbfit.fit(model, formula, source)``, and whether they came in the order of
    earlier releases, ``dbfit.fit(model, source, formula)``: the argument holding a top-level ``~`` is the
    formula (today's order wins when both hold one and the second is not a query)."""
    earlier = holds_top_level_tilde(third) and (not holds_top_level_tilde(second) or _is_query(second))
    return (third, second, True) if earlier else (second, third, False)


def _is_query(text: str) -> bool:
    return text.lstrip().lstrip("(").lstrip()[:6].upper() in {"SELECT", "WITH ", "FROM ", "VALUES"}


def _segment_rows(fitted: SegmentedFit, saved: dict[Any, tuple[str, int]]) -> list[dict[str, Any]]:
    """Every stored segment model's coefficient rows, then one row per segment that could not be fitted."""
    rows = [
        {
            "model": saved[value][0],
            "version": saved[value][1],
            "segment": str(value),
            **row,
            "note": _warnings_note(model),
        }
        for value, model in fitted.models.items()
        for row in model.coefficients.to_pylist()
    ]
    blank = {c: None for c in store.COEFFICIENT_COLUMNS}
    return rows + [
        {"model": None, "version": None, "segment": str(value), **blank, "note": f"not fitted: {reason}"}
        for value, reason in fitted.failures.items()
    ]


def _warnings_note(model: Model) -> str | None:
    return "; ".join(model.warnings) or None


def _rows_of(fields: dict[str, Any]) -> Any:
    return duckdb.list_type(duckdb.struct_type(fields))


def _fit_on_second_connection(
    reader: duckdb.DuckDBPyConnection,
    source: str,
    formula: str,
    visible_rows: int | None,
    options: FitOptions,
):
    """Fit on the second connection; explain plainly when it sees other rows than the calling connection."""
    invisible = (
        f"source {source!r} has {visible_rows} rows on your connection, but the second connection that the SQL "
        "dbfit.fit reads on"
    )
    advice = (
        "temporary tables and rows or tables of a transaction not yet committed are invisible to it. "
        "COMMIT first, copy the data into a permanent table, or call dbfit.fit from Python, which has no such limit"
    )
    try:
        model = fitting.fit_with(reader, formula, source, options, progress=False)
    except SourceError as err:
        raise SourceError(f"{invisible} cannot read it ({err}): {advice}") from None
    if visible_rows is not None and model.rows_total != visible_rows:
        raise SourceError(f"{invisible} sees {model.rows_total}: {advice}")
    return model


def check_readable(reader: duckdb.DuckDBPyConnection, source: str) -> None:
    """Refuse a source the database cannot read (a missing file, say); a table the second connection cannot find
    may be a temporary table of the calling connection, which the calling query itself reads."""
    try:
        DuckDBEngine(reader).describe(exp.select("*").from_(source_relation(source)))
    except SourceError as err:
        if "cannot be found" not in str(err):
            raise


def _whole_number(text: str | None, name: str, default: int) -> int:
    number = _text_number(text, name, default)
    if not float(number).is_integer():
        raise FitError(f"{name} := {text!r} is not a whole number")
    return int(number)


def _text_number(text: str | None, name: str, default: float) -> float:
    if text is None:
        return default
    try:
        return float(text)
    except ValueError:
        raise FitError(f"{name} := {text!r} is not a number") from None
