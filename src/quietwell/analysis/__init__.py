"""Spectral analysis of levitated-particle records: Welch PSD and peak fits.

Pure numpy/scipy: nothing here imports bluesky, ophyd, tiled or the simulated
laboratory (an import contract in ``pyproject.toml`` enforces it).
"""

from quietwell.analysis._fit import (
    GoodnessOfFit,
    PeakFit,
    SpectrumFit,
    fit_channels,
    fit_psd,
    oscillator_peak,
    spectrum_model,
)
from quietwell.analysis._welch import (
    PSDResult,
    bin_correlation_factor,
    welch_effective_averages,
    welch_psd,
)

__all__ = [
    "PSDResult",
    "welch_psd",
    "welch_effective_averages",
    "bin_correlation_factor",
    "oscillator_peak",
    "spectrum_model",
    "fit_psd",
    "fit_channels",
    "PeakFit",
    "SpectrumFit",
    "GoodnessOfFit",
]
