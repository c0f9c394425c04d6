"""dbfit: logistic regression fitted, checked and deployed inside the database."""

from dbfit.connection import connect, install
from dbfit.api import (assess, assessment_tables, cross_validate, decisions, drop_model, fit, from_json, load, models,
                       population_stability, score)
from dbfit.gates import Gates, gates_of, set_gates
from dbfit.refit import promote, refit
from dbfit.comparison import comparison_table, likelihood_ratio_test
from dbfit.splits import Holdout, KFold
from dbfit.deploy import publish
from dbfit.errors import (DbfitError, FitError, FormulaError, GateRefusedError, SourceError, StoreConflictError,
                          StoreError)
from dbfit.irls import IterationReport
from dbfit.model import Model
from dbfit.segments import SegmentedFit
from dbfit.segmentscoring import publish_segments
from dbfit.priorcorrection import prior_corrected
from dbfit.robust import with_robust_errors

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
    "comparison_table",
    "connect",
    "cross_validate",
    "decisions",
    "drop_model",
    "fit",
    "from_json",
    "gates_of",
    "install",
    "likelihood_ratio_test",
    "load",
    "models",
    "population_stability",
    "prior_corrected",
    "promote",
    "publish",
    "publish_segments",
    "refit",
    "score",
    "set_gates",
    "with_robust_errors",
]
__version__ = "0.1.0"
