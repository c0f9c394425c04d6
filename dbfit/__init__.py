"""dbfit: logistic regression fitted, checked and deployed inside the database."""

from dbfit.assessment.comparison import comparison_table, likelihood_ratio_test
from dbfit.deployment.segment_views import publish_segments
from dbfit.deployment.views import publish
from dbfit.errors import (
    DbfitError,
    FitError,
    FormulaError,
    GateRefusedError,
    SourceError,
    StoreConflictError,
    StoreError,
)
from dbfit.expressions.splits import Holdout, KFold
from dbfit.fitting.prior_correction import prior_corrected
from dbfit.fitting.robust import with_robust_errors
from dbfit.interfaces.connection import connect, install
from dbfit.interfaces.deprecated import attach as _attach_deprecated_methods
from dbfit.interfaces.python_api import (
    assess,
    assessment_tables,
    bin_screening,
    cross_validate,
    decisions,
    drift,
    drop_model,
    fit,
    from_json,
    load,
    marginal_effects,
    models,
    population_stability,
    promote,
    report_assessment,
    save,
    score,
    scoring_sql,
    spline_curve,
    term_tests,
    write_report,
)
from dbfit.lifecycle.gates import Gates, gates_of, set_gates
from dbfit.lifecycle.refit import refit
from dbfit.model.fitted import Model
from dbfit.model.segmented import SegmentedFit
from dbfit.solver.newton import IterationReport

_attach_deprecated_methods()

__all__ = [
    "DbfitError",
    "Holdout",
    "KFold",
    "FitError",
    "FormulaError",
    "GateRefusedError",
    "Gates",
    "IterationReport",
    "Model",
    "SegmentedFit",
    "SourceError",
    "StoreConflictError",
    "StoreError",
    "assess",
    "assessment_tables",
    "bin_screening",
    "comparison_table",
    "connect",
    "cross_validate",
    "decisions",
    "drift",
    "drop_model",
    "fit",
    "from_json",
    "gates_of",
    "install",
    "likelihood_ratio_test",
    "load",
    "marginal_effects",
    "models",
    "population_stability",
    "prior_corrected",
    "promote",
    "publish",
    "publish_segments",
    "refit",
    "report_assessment",
    "save",
    "score",
    "scoring_sql",
    "spline_curve",
    "set_gates",
    "term_tests",
    "with_robust_errors",
    "write_report",
]
__version__ = "0.1.0"
