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


def open_catalog(dir_or_uri):
    """The tiled client of a quietwell store (a data directory or a tiled URI).

    See :func:`quietwell.store.open_catalog`.
    """
    from .store import open_catalog as _open

    return _open(dir_or_uri)


__all__ = [
    "__version__",
    "open_catalog",
    "FitError",
    "InputError",
    "LimitError",
    "QuietwellError",
    "QuietwellWarning",
    "UnresolvedPeakError",
]
