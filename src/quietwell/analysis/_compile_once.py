"""The first call of the numba kernels, made by one thread at a time.

On its first compilation in a process numba runs the ``init`` entry points of the
other installed packages that extend it (entry point group ``numba_extensions``;
awkward and sparse, which tiled installs, have one) and marks them as run *before*
they have finished.  A second thread that compiles a kernel meanwhile types it
against registries that the loading then changes under it, and the compilation
fails in lowering with e.g. ``KeyError: (int64,)``.  That is what happened when
the threads of :func:`~quietwell.analysis.welch_psd` (or of
:func:`~quietwell.analysis.fit_channels`) called a kernel for the first time
together with numba's cache empty.

So the kernels are first called here, with tiny arrays of the types the real
calls pass, in the thread that is about to hand work to a pool and under one lock
for the whole package: numba's initialisation then completes in that one thread,
and the pool's threads find every kernel compiled (or loaded from numba's cache)
and compile nothing.  After the first time, :func:`compile_once` costs one set
lookup.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Hashable

__all__ = ["compile_once"]

_lock = threading.Lock()
_done: set[Hashable] = set()


def compile_once(key: Hashable, first_call: Callable[[], object]) -> None:
    """Run ``first_call`` once per process for ``key``, one thread at a time.

    ``first_call`` calls the kernels named by ``key`` with small inputs of the
    types the real calls pass (the same dtypes, dimensions, layouts and
    writeability, or numba compiles another specialisation later).  If it raises,
    ``key`` is not marked and the next caller tries again.
    """
    if key in _done:
        return
    with _lock:
        if key not in _done:
            first_call()
            _done.add(key)
