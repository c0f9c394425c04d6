"""dbfit: logistic regression fitted, checked and deployed inside the database."""

from dbfit.connection import connect, install
from dbfit.api import drop_model, fit, from_json, load, models, score
from dbfit.deploy import publish
from dbfit.errors import DbfitError, FitError, FormulaError, SourceError, StoreConflictError, StoreError
from dbfit.irls import IterationReport
from dbfit.model import Model
from dbfit.segments import SegmentedFit
from dbfit.priorcorrection import prior_corrected
from dbfit.robust import with_robust_errors

__all__ = [
    "DbfitError",
    "FitError",
    "FormulaError",
    "IterationReport",
    "Model",
    "SegmentedFit",
    "SourceError",
    "StoreConflictError",
    "StoreError",
    "connect",
    "drop_model",
    "fit",
    "from_json",
    "install",
    "load",
    "models",
    "prior_corrected",
    "publish",
    "score",
    "with_robust_errors",
]
__version__ = "0.1.0"
