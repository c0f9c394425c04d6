"""dbfit: logistic regression fitted, checked and deployed inside the database."""

from dbfit.connection import connect, install
from dbfit.api import assess, assessment_tables, cross_validate, drop_model, fit, from_json, load, models, score
from dbfit.comparison import comparison_table, likelihood_ratio_test
from dbfit.splits import Holdout, KFold
from dbfit.deploy import publish
from dbfit.errors import DbfitError, FitError, FormulaError, SourceError, StoreConflictError, StoreError
from dbfit.irls import IterationReport
from dbfit.model import Model
from dbfit.segments import SegmentedFit
from dbfit.priorcorrection import prior_corrected
from dbfit.robust import with_robust_errors

__all__ = [
    "DbfitError",
    "Holdout",
    "KFold",
    "FitError",
    "FormulaError",
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
    "drop_model",
    "fit",
    "from_json",
    "install",
    "likelihood_ratio_test",
    "load",
    "models",
    "prior_corrected",
    "publish",
    "score",
    "with_robust_errors",
]
__version__ = "0.1.0"
