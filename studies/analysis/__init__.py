"""Statistics core: agreement, consensus, repeatability, drift, detector scoring.

Django-free: takes and returns numpy arrays and pandas DataFrames.
"""

from .consensus import METHODS, ConsensusEstimate, estimate_consensus, leave_one_out_centres
from .geomedian import geometric_median
from .icc import icc_single
from .kappa import fleiss_kappa
from .pipeline import TABLE_NAMES, AnalysisParameterError, AnalysisResult, run_analysis
from .table import (
    DenseStudy,
    PlacementTableError,
    read_placements_csv,
    to_dense,
    validate_placements,
)

__all__ = [
    "METHODS",
    "TABLE_NAMES",
    "AnalysisParameterError",
    "AnalysisResult",
    "ConsensusEstimate",
    "DenseStudy",
    "PlacementTableError",
    "estimate_consensus",
    "fleiss_kappa",
    "geometric_median",
    "icc_single",
    "leave_one_out_centres",
    "read_placements_csv",
    "run_analysis",
    "to_dense",
    "validate_placements",
]
