"""The fitted model: estimates on the original scale, their covariance, fit statistics and warnings."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from datetime import UTC, datetime
from html import escape
from typing import Any

import numpy as np
import pyarrow as pa

from dbfit.design.layout import Design
from dbfit.errors import DbfitError, UsageError
from dbfit.expressions.splits import Holdout, part_source
from dbfit.model import document
from dbfit.model.spline_curves import spline_curve_lines, spline_terms

ROW_CHOICES = ("held_out", "training", "all")


@dataclass
class Model:
    """A fitted logistic regression.

    ``coefficients`` is a pyarrow table (one row per term, NULL estimates for aliased terms),
    ``covariance`` the p x p covariance of the estimates on the original scale (NaN rows for aliased
    terms), ``stats`` a dict of fit statistics and ``warnings`` plain-language problems found in the fit.
    """

    formula: str
    source: str  # the whole source the user gave; with a holdout split the fit used its training rows
    design: Design
    labels: list[str]
    estimates: np.ndarray
    covariance: np.ndarray
    coefficients: pa.Table
    stats: dict[str, Any]
    warnings: list[str] = field(default_factory=list)
    options: dict[str, Any] = field(default_factory=dict)
    fitted_at: datetime = field(default_factory=lambda: datetime.now(UTC))
    name: str | None = None  # set once saved to (or loaded from) a model store
    version: int | None = None
    source_is_data: bool = False  # read from a model document: its source is text to show, never run unasked

    def source_or_own(self, source: str | None) -> str:
        """``source`` when given, else the training source (refused for a model read from a document)."""
        if source is not None:
            return source
        if self.source_is_data:
            raise DbfitError(
                "this model was read from a JSON document, whose source is data, not a query dbfit runs: "
                "give the source to score or assess explicitly (source=...)"
            )
        return self.source

    @property
    def rows_total(self) -> int:
        """Rows of the source, used or not."""
        return int(self.design.rows_total)

    @property
    def split(self) -> Holdout | None:
        """The holdout split the model was fitted with (recorded in ``options["split"]``), or None."""
        recorded = self.options.get("split")
        return Holdout(recorded["key"], recorded["share"]) if recorded else None

    @property
    def default_rows(self) -> str:
        """The rows assessed and reported by default: the held-out rows of a holdout fit, else all rows."""
        return "held_out" if self.split is not None else "all"

    def rows_source(self, rows: str, source: str | None = None) -> str:
        """``rows`` ("held_out", "training", "all") of ``source`` (default: the model's) as source text."""
        if rows not in ROW_CHOICES:
            raise UsageError(f"rows={rows!r} is not a choice; choose one of {', '.join(ROW_CHOICES)}")
        whole = self.source_or_own(source)
        if rows == "all":
            return whole
        split = self.split
        if split is None:
            if rows == "training" and source is None:
                return whole
            raise UsageError(
                f"rows={rows!r} needs a model fitted with split=dbfit.Holdout(...); this one has none"
            )
        return part_source(whole, split, "holdout" if rows == "held_out" else "train")

    def rows_note(self, rows: str | None, source: str | None = None) -> str:
        """Which rows a command used, in words (``rows=None``: all rows of a given ``source``)."""
        whole = source if source is not None else self.source
        split = self.split
        if rows is None:
            return f"all rows of the given source {whole}"
        if split is None:
            fitted = ": the rows the model was fitted on (in-sample)" if source is None else ""
            return f"all rows of {whole}{fitted}"
        how = f"split on the hash of {split.key}, held-out share {split.share:g}"
        return {
            "held_out": f"held-out rows of {whole} ({how}): out-of-sample",
            "training": f"training rows of {whole} ({how}): the rows the model was fitted on (in-sample)",
            "all": f"all rows of {whole}, training and held-out together ({how})",
        }[rows]

    def assessed_rows(self, source: str | None, rows: str | None) -> tuple[str, str]:
        """The source text and the rows note of an assessment or report on ``source`` / ``rows``.

        Neither given: the model's :attr:`default_rows`. ``source`` alone: all its rows. ``rows`` alone: that
        part of the model's source. Both: that part of ``source`` by the model's split rule.
        """
        if rows is None and source is None:
            rows = self.default_rows
        if rows is None and source is not None:
            return source, self.rows_note(None, source)
        chosen = rows if rows is not None else self.default_rows
        return self.rows_source(chosen, source), self.rows_note(chosen, source)

    def to_json(self) -> str:
        """The model as a JSON document (format ``dbfit-model`` 1, see README.md); read back with ``dbfit.from_json``."""
        return document.to_json(self)

    def estimate(self, label: str) -> float:
        """The estimate of one term by its label (NaN when aliased)."""
        return float(self.estimates[self.labels.index(label)])

    def summary(self) -> str:
        """A plain-text report of the fit, in dbfit's own layout."""
        s = self.stats
        lines = [
            f"dbfit | logistic model of  {self.formula}",
            f"  data      {self.source}",
            *(
                [
                    f"  split     fitted on the training rows; share {self.split.share:g} held out by the hash of "
                    f"{self.split.key} (figures in stats['holdout'])"
                ]
                if self.split is not None
                else []
            ),
            f"  rows      {s['n_used']:,} used, {s['n_excluded']:,} set aside for NULLs"
            + (
                f"; {s['rows_zero_trials']:,} used rows have 0 trials (no information)"
                if s.get("rows_zero_trials")
                else ""
            ),
            f"  fit       {'converged' if s['converged'] else 'NOT converged'} after {s['iterations']} Newton passes"
            f" ({s['scans']} scans of the data)",
            f"  deviance  {s['deviance']:,.4f} on {s['df_residual']:,} df; intercept-only {s['null_deviance']:,.4f}",
            f"  log-lik   {s['log_likelihood']:,.4f}   AIC {s['aic']:,.4f}   BIC {s['bic']:,.4f}",
            *[f"  {note}" for note in s.get("notes", [])],
            "",
            "  effects on the log-odds, with the odds multiplier per unit and its 95% Wald interval",
        ]
        width = max([len(label) for label in self.labels] + [4])
        lines.append(
            f"  {'term':<{width}}  {'log-odds':>11} {'std.err':>10} {'z':>8} {'p':>9}   {'odds x':>9}  [95% interval]"
        )
        splines = spline_terms(self)
        basis = {f"{name}[{j + 1}]": name for name, call in splines.items() for j in range(call.df)}
        for row in self.coefficients.to_pylist():
            if row["term"] in basis:
                name = basis[row["term"]]
                if row["term"] == f"{name}[1]":
                    lines.append(f"  {name:<{width}}  {'a curve: see the spline curves below':>40}")
                continue
            if row["estimate"] is None:
                lines.append(f"  {row['term']:<{width}}  {'aliased: no estimate':>40}")
                continue
            if row["std_error"] is None:
                note = (
                    "exactly 0: removed by the penalty" if row["estimate"] == 0 else "penalised: no std.err"
                )
                lines.append(
                    f"  {row['term']:<{width}}  {row['estimate']:>11.5g}   {note:<38}   {row['odds_ratio']:>9.4g}"
                )
                continue
            lines.append(
                f"  {row['term']:<{width}}  {row['estimate']:>11.5g} {row['std_error']:>10.4g} {row['wald_z']:>8.3g}"
                f" {_p_text(row['p_value']):>9}   {row['odds_ratio']:>9.4g}  [{row['odds_ratio_low']:.4g}, {row['odds_ratio_high']:.4g}]"
            )
        for name in splines:
            lines += ["", *spline_curve_lines(self, name)]
        if self.warnings:
            lines.append("")
            lines.append("  warnings")
            lines += [f"  ! {w}" for w in self.warnings]
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        """A compact HTML summary for notebooks: identity, rows, deviance, AIC and one row per term."""
        s = self.stats
        stored = f" &middot; stored as {escape(self.name)} v{self.version}" if self.name is not None else ""
        facts = [
            ("rows used", f"{s['n_used']:,} of {self.rows_total:,}"),
            ("deviance", f"{s['deviance']:,.4f}"),
            ("AIC", f"{s['aic']:,.4f}"),
            ("fit", f"{'converged' if s['converged'] else 'not converged'}, {s['iterations']} passes"),
        ]
        head = "".join(
            f"<th style='text-align:right'>{h}</th>" for h in ("estimate", "std. error", "odds x", "p")
        )
        body = []
        for row in self.coefficients.to_pylist():
            cells = [_html_number(row["estimate"], ".5g"), _html_number(row["std_error"], ".4g")]
            cells += [_html_number(row["odds_ratio"], ".4g"), escape(_p_text(row["p_value"]))]
            tds = "".join(f"<td style='text-align:right'>{cell}</td>" for cell in cells)
            body.append(f"<tr><td>{escape(row['term'])}</td>{tds}</tr>")
        notes = "".join(f"<li>{escape(w)}</li>" for w in self.warnings)
        return (
            f"<div class='dbfit-model'><p><b>dbfit logistic model</b>{stored}<br>"
            f"<code>{escape(self.formula)}</code> on <code>{escape(self.source)}</code></p>"
            + "<p>"
            + " &middot; ".join(f"{label}: {value}" for label, value in facts)
            + "</p>"
            + f"<table><thead><tr><th style='text-align:left'>term</th>{head}</tr></thead>"
            + f"<tbody>{''.join(body)}</tbody></table>"
            + (f"<p>warnings:</p><ul>{notes}</ul>" if notes else "")
            + "</div>"
        )

    def __repr__(self) -> str:
        return f"<dbfit.Model {self.formula!r}: {self.stats['n_used']} rows, deviance {self.stats['deviance']:.6g}>"


def _html_number(value: float | None, style: str) -> str:
    return "&ndash;" if value is None or value != value else format(value, style)


def _p_text(p: float | None) -> str:
    if p is None or math.isnan(p):
        return "-"
    return "<1e-300" if p < 1e-300 else f"{p:.3g}"
