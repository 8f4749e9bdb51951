"""Loading of recorded traces (``.npy`` and HDF5) for the command line.

Every failure is an :class:`~quietwell.InputError` whose message names the
file, the key or value at fault, what is allowed and what to do.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import h5py
import numpy as np

from quietwell._errors import InputError

__all__ = ["Trace", "load_trace", "load_records", "HDF5_SUFFIXES"]

#: File name endings read as HDF5 (any other file that h5py recognises is too).
HDF5_SUFFIXES = (".h5", ".hdf5", ".hdf", ".he5", ".nxs")


@dataclass(frozen=True)
class Trace:
    """A loaded record.

    Attributes
    ----------
    data : numpy.ndarray
        Samples in units of the record, shape ``(n,)`` or ``(n_channels, n)``.
    sample_rate : float
        Sample rate in Hz.
    source : str
        Where it came from (``file`` or ``file:dataset``), for messages.
    """

    data: np.ndarray
    sample_rate: float
    source: str


def _check_rate(value, where: str) -> float:
    try:
        rate = float(np.asarray(value).reshape(()))
    except (TypeError, ValueError):
        raise InputError(
            f"{where}: sample_rate={value!r} is not a number; give the sample rate in Hz "
            "(e.g. --sample-rate 1e6)"
        ) from None
    if not (math.isfinite(rate) and rate > 0):
        raise InputError(f"{where}: sample_rate={rate!r} Hz must be finite and > 0; give --sample-rate HZ")
    return rate


def _check_layout(shape: tuple[int, ...], dtype: np.dtype, where: str) -> None:
    """Refuse a dtype or shape the analysis cannot use, before reading any data."""
    if not (np.issubdtype(dtype, np.floating) or np.issubdtype(dtype, np.integer)):
        raise InputError(
            f"{where}: dtype {dtype} is not allowed; the record must hold real numbers "
            "(float32, float64 or integers)"
        )
    if len(shape) not in (1, 2):
        raise InputError(
            f"{where}: shape {shape} (ndim={len(shape)}) is not allowed; give a 1-D record "
            "(samples,) or a 2-D record (channels, samples)"
        )
    if len(shape) == 2 and shape[0] > shape[1]:
        raise InputError(
            f"{where}: shape {shape} has more channels than samples; a 2-D record must be "
            "(channels, samples): save its transpose"
        )
    if math.prod(shape) == 0:
        raise InputError(f"{where}: the record is empty (shape {shape}); give samples")


def _datasets(group: h5py.Group) -> list[str]:
    names: list[str] = []
    group.visititems(lambda name, obj: names.append(name) if isinstance(obj, h5py.Dataset) else None)
    return names


def load_trace(path: str | Path, *, dataset: str | None = None, sample_rate: float | None = None) -> Trace:
    """Read a record from a ``.npy`` file or a dataset of an HDF5 file.

    Parameters
    ----------
    path : str or pathlib.Path
        ``.npy`` file (1-D, or 2-D channels x samples) or HDF5 file.
    dataset : str, optional
        Path of the dataset inside an HDF5 file; may be omitted when the file
        holds exactly one dataset.
    sample_rate : float, optional
        Sample rate in Hz; overrides a ``sample_rate`` attribute of the HDF5
        dataset (looked up first) or file.  Required for ``.npy`` files.

    Returns
    -------
    Trace
        Samples (units of the record) and sample rate in Hz.

    Raises
    ------
    InputError
        Missing or unreadable file, unknown dataset, bad dtype or shape, or no
        valid sample rate.
    """
    p = Path(path)
    where = str(p)
    if not p.exists():
        raise InputError(f"{where}: no such file; give the path of a .npy or HDF5 record")
    if p.is_dir():
        raise InputError(f"{where}: is a directory; give the path of a .npy or HDF5 record")
    is_hdf5 = p.suffix.lower() in HDF5_SUFFIXES or (p.suffix.lower() != ".npy" and h5py.is_hdf5(p))
    attr_rate = None
    if is_hdf5:
        try:
            with h5py.File(p, "r") as fh:
                names = _datasets(fh)
                if dataset is None:
                    if len(names) != 1:
                        listed = ", ".join(names[:10]) or "none"
                        raise InputError(
                            f"{where}: holds {len(names)} datasets ({listed}); choose one with --dataset PATH"
                        )
                    dataset = names[0]
                obj = fh.get(dataset)
                if not isinstance(obj, h5py.Dataset):
                    listed = ", ".join(names[:10]) or "none"
                    raise InputError(
                        f"{where}: no dataset {dataset!r} (datasets: {listed}); give one of "
                        "them with --dataset PATH"
                    )
                where = f"{p}:{dataset}"
                if "sample_rate" in obj.attrs:
                    attr_rate = obj.attrs["sample_rate"]
                elif "sample_rate" in fh.attrs:
                    attr_rate = fh.attrs["sample_rate"]
                _check_layout(obj.shape, obj.dtype, where)
                data = obj[()]
        except InputError:
            raise
        except (OSError, ValueError, TypeError, KeyError) as exc:
            raise InputError(
                f"{where}: cannot be read as HDF5 ({exc}); give a valid HDF5 or .npy file"
            ) from None
    else:
        if p.suffix.lower() != ".npy":
            raise InputError(
                f"{where}: suffix {p.suffix!r} is not known; give a .npy file or an HDF5 file "
                f"({', '.join(HDF5_SUFFIXES)})"
            )
        if dataset is not None:
            raise InputError(f"{where}: --dataset {dataset!r} applies to HDF5 files only")
        try:
            data = np.load(p, mmap_mode="r", allow_pickle=False)
        except (OSError, ValueError, EOFError) as exc:
            raise InputError(
                f"{where}: cannot be read as .npy ({exc}); give a file written by numpy.save"
            ) from None
        if not isinstance(data, np.ndarray):
            raise InputError(f"{where}: holds an archive, not one array; save one array")
        _check_layout(data.shape, data.dtype, where)
    if sample_rate is not None:
        rate = _check_rate(sample_rate, where)
    elif attr_rate is not None:
        rate = _check_rate(attr_rate, f"{where} (attribute sample_rate)")
    else:
        raise InputError(
            f"{where}: no sample rate (no 'sample_rate' attribute on the dataset or file); "
            "give it with --sample-rate HZ"
        )
    return Trace(data=data, sample_rate=rate, source=where)


def _is_quietwell_raw(fh: h5py.File) -> bool:
    return isinstance(fh.get("traces"), h5py.Group) and isinstance(
        fh.get("records/sample_rate"), h5py.Dataset
    )


def load_records(
    path: str | Path, *, dataset: str | None = None, sample_rate: float | None = None
) -> list[Trace]:
    """Records of a file: one :class:`Trace` per record of quietwell's own raw HDF5
    layout, else the one record of :func:`load_trace`.

    quietwell's raw files (written by ``quietwell.devices``) hold ``/traces/<channel>``
    of shape ``(records, samples)`` (V) and ``/records/sample_rate`` (Hz, one per
    record): each record of each channel (or of the channel ``dataset``, e.g.
    ``traces/x``) is one 1-D trace, with its own sample rate.
    """
    p = Path(path)
    if p.exists() and p.is_file() and p.suffix.lower() != ".npy" and h5py.is_hdf5(p):
        try:
            with h5py.File(p, "r") as fh:
                if _is_quietwell_raw(fh):
                    return _raw_records(fh, p, dataset, sample_rate)
        except InputError:
            raise
        except (OSError, ValueError, TypeError, KeyError) as exc:
            raise InputError(f"{p}: cannot be read as HDF5 ({exc}); give a valid HDF5 or .npy file") from None
    return [load_trace(p, dataset=dataset, sample_rate=sample_rate)]


def _raw_records(fh: h5py.File, p: Path, dataset: str | None, sample_rate: float | None) -> list[Trace]:
    names = sorted(k for k, v in fh["traces"].items() if isinstance(v, h5py.Dataset))
    if dataset is not None:
        name = dataset.strip("/").removeprefix("traces/")
        if name not in names:
            raise InputError(
                f"{p}: no trace {dataset!r} in this quietwell raw file (traces: "
                f"{', '.join(names) or 'none'}); give one with --dataset traces/NAME"
            )
        names = [name]
    rates = np.asarray(fh["records/sample_rate"][()], dtype=np.float64)
    out = []
    for name in names:
        ds = fh["traces"][name]
        where = f"{p}:traces/{name}"
        if ds.ndim != 2:
            raise InputError(
                f"{where}: shape {ds.shape} is not (records, samples); the file is not a "
                "quietwell raw file"
            )
        _check_layout(ds.shape[1:], ds.dtype, where)
        for i in range(ds.shape[0]):
            src = f"{where}[record {i}]"
            if sample_rate is not None:
                rate = _check_rate(sample_rate, src)
            elif i < rates.size:
                rate = _check_rate(rates[i], f"{p}:records/sample_rate[{i}]")
            else:
                raise InputError(
                    f"{src}: no records/sample_rate entry for this record; give --sample-rate HZ"
                )
            out.append(Trace(data=ds[i], sample_rate=rate, source=src))
    return out
