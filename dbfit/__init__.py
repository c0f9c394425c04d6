"""dbfit: logistic regression fitted, checked and deployed inside the database."""

from dbfit.connection import connect, install
from dbfit.api import drop_model, fit, from_json, load, models, score
from dbfit.deploy import publish
from dbfit.errors import DbfitError, FitError, FormulaError, SourceError, StoreConflictError, StoreError
from dbfit.irls import IterationReport
from dbfit.model import Model

__all__ = [
    "DbfitError",
    "FitError",
    "FormulaError",
    "IterationReport",
    "Model",
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
    "publish",
    "score",
]
__version__ = "0.1.0"
