"""quietwell: characterise an optically levitated nanoparticle with bluesky.

Layers, bottom to top: :mod:`quietwell.physics` (formulas), :mod:`quietwell.analysis`
(spectra and fits), device interfaces, plans, callbacks, storage, command line.
"""

from ._errors import (
    FitError,
    InputError,
    LimitError,
    QuietwellError,
    QuietwellWarning,
    UnresolvedPeakError,
)

__version__ = "0.1.0"

__all__ = [
    "__version__",
    "FitError",
    "InputError",
    "LimitError",
    "QuietwellError",
    "QuietwellWarning",
    "UnresolvedPeakError",
]
