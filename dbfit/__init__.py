"""dbfit: logistic regression fitted, checked and deployed inside the database."""

from dbfit.connection import connect, install
from dbfit.errors import DbfitError, FitError, FormulaError, SourceError
from dbfit.fitting import fit
from dbfit.irls import IterationReport
from dbfit.model import Model
from dbfit.segments import SegmentedFit

__all__ = [
    "DbfitError",
    "FitError",
    "FormulaError",
    "IterationReport",
    "Model",
    "SegmentedFit",
    "SourceError",
    "connect",
    "fit",
    "install",
]
__version__ = "0.1.0"
