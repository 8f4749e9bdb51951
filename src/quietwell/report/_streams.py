"""Reading a run's streams for the report: each stream once, arrays as arrays.

tiled's table client reads an event table through a dask DataFrame; dask's default
``dataframe.convert-string`` turns every object column into text, so an array field
(``envelope_*``, ``ensemble_*``: a list of floats in each event) came back as numpy's
printed text (``"[ 1.5  2. ]"``, rounded, and summarised with ``...`` when long). The
report reads with that conversion off, so an array field is a float64 array per event.

Each stream of a run is read once and kept for the life of the run client (a report
reads the same ``summary`` and ``fits`` for its tables, checks and pictures).
"""

from __future__ import annotations

from collections import OrderedDict
from typing import Any

__all__ = ["stream", "read", "has", "primary_column"]

#: Runs whose reads are kept, newest last (the run client is kept alive with them).
_KEEP = 64
_CACHE: OrderedDict[int, tuple[Any, dict]] = OrderedDict()

#: The scalar columns of ``primary`` the report uses (never the traces).
_PRIMARY_SCALARS = ("seq_num", "pressure", "sample_rate", "het_sample_rate")


def _memo(run: Any) -> dict:
    key = id(run)
    hit = _CACHE.get(key)
    if hit is not None and hit[0] is run:
        _CACHE.move_to_end(key)
        return hit[1]
    memo: dict = {}
    _CACHE[key] = (run, memo)
    while len(_CACHE) > _KEEP:
        _CACHE.popitem(last=False)
    return memo


def _keys(run: Any) -> set[str]:
    memo = _memo(run)
    if "keys" not in memo:
        memo["keys"] = set(run)
    return memo["keys"]


def has(run: Any, name: str) -> bool:
    """Whether ``run`` holds the stream ``name``."""
    return name in _keys(run)


def stream(run: Any, name: str) -> Any:
    """The stream client ``run[name]`` (looked up once)."""
    memo = _memo(run)
    key = ("stream", name)
    if key not in memo:
        memo[key] = run[name]
    return memo[key]


def _read_dataset(client: Any, **kw: Any) -> Any:
    import dask

    # dask would turn object columns (an array per event) into text: keep the arrays
    with dask.config.set({"dataframe.convert-string": False}):
        return client.read(**kw)


def read(run: Any, name: str) -> Any:
    """``run[name].read()`` (an xarray Dataset), read once; array fields as arrays."""
    memo = _memo(run)
    key = ("read", name)
    if key not in memo:
        memo[key] = _read_dataset(stream(run, name))
    return memo[key]


def primary_column(run: Any, key: str) -> Any:
    """One scalar column of the ``primary`` stream as a numpy array; all of the columns
    the report uses are read together, once, and never the traces."""
    import numpy as np

    memo = _memo(run)
    if "primary" not in memo:
        prim = stream(run, "primary")
        names = set(prim)
        wanted = [k for k in _PRIMARY_SCALARS if k in names]
        memo["primary"] = _read_dataset(prim, variables=wanted) if wanted else {}
        memo["primary_names"] = names
    ds = memo["primary"]
    if key not in ds:
        if key not in memo["primary_names"]:
            raise KeyError(key)
        return np.asarray(stream(run, "primary")[key].read())
    return np.asarray(ds[key].values)
