"""Live analysis: fit each record as it arrives and store the results in the same run."""

from ._feed import TraceFeed
from ._fitter import LiveFitter
from ._record_fit import (
    FIT_QUANTITIES,
    CombinedAnalyzer,
    DriveAnalyzer,
    ModeAnalyzer,
    RecordAnalyzer,
    SidebandAnalyzer,
)

__all__ = [
    "FIT_QUANTITIES",
    "CombinedAnalyzer",
    "DriveAnalyzer",
    "LiveFitter",
    "ModeAnalyzer",
    "RecordAnalyzer",
    "SidebandAnalyzer",
    "TraceFeed",
]
