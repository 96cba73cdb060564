"""Constrained calibration of the volatilities to option quotes (cvxpy, Clarabel).

Hold kappa and the drifts at their historical estimate; fit ``sigma_spot``, ``sigma_yield``
and ``rho`` (constant, correlation held, or per expiry bucket) so that the model reprices the
day's options, under the constraint families of :mod:`calib.calibrate.constraints`. See
:mod:`calib.calibrate.calibrator` for the method.
"""

from calib.calibrate.calibrator import Calibrator, bucket_edges, fit, frontier
from calib.calibrate.constraints import FAMILIES, Constraint, Limits, check_feasible
from calib.calibrate.quotes import DroppedQuote, OptionQuotes
from calib.calibrate.result import BucketVols, CalibrationResult, ConstraintReport, FrontierPoint
from calib.calibrate.settings import CalibrationSettings

__all__ = [
    "FAMILIES",
    "BucketVols",
    "CalibrationResult",
    "CalibrationSettings",
    "Calibrator",
    "Constraint",
    "ConstraintReport",
    "DroppedQuote",
    "FrontierPoint",
    "Limits",
    "OptionQuotes",
    "bucket_edges",
    "check_feasible",
    "fit",
    "frontier",
]
