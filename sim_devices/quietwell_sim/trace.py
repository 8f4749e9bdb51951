"""Write one simulated record of a setup to a ``.npy`` file.

Usage::

    python -m quietwell_sim.trace FILE [--setup PROFILE_DIR] [--seconds S]

The file holds a float32 array of shape ``(3, n)``: the detector channels x, y, z in
V, sampled at the setup's ``[detector] sample_rate``, ``n = round(S * sample_rate)``
(default: the setup's record length). The particle starts from its stationary
(thermal) state at the setup's start pressure, with every feedback off. The default
setup is ``profiles/amber``, looked up in the current directory and then in the
repository this package sits in. One line on stdout says what was written; bad
input gives one line on stderr and exit status 2.
"""

from __future__ import annotations

import argparse
import math
import sys
from pathlib import Path

import numpy as np

from quietwell import InputError, LimitError, QuietwellError
from quietwell.setup import load_setup

from ._from_setup import lab_params_from_setup
from ._lab import SimLab

__all__ = ["main", "write_trace", "default_setup_dir"]

_DEFAULT_PROFILE = Path("profiles") / "amber"


class _Usage(Exception):
    pass


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # one line, not usage + message
        raise _Usage(f"{message}; see --help")


def default_setup_dir() -> Path:
    """``profiles/amber`` in the current directory, else in this package's repository."""
    here = Path.cwd() / _DEFAULT_PROFILE
    if (here / "setup.toml").is_file():
        return here
    return Path(__file__).resolve().parents[2] / _DEFAULT_PROFILE


def write_trace(
    path: str | Path, setup_dir: str | Path | None = None, seconds: float | None = None
) -> tuple[Path, tuple[int, int], float, str]:
    """Simulate and save a record; returns (file, shape, sample rate in Hz, setup name).

    ``seconds`` is the record duration in s (default: the setup's record length);
    the number of samples must lie within [2, limits.record_length_max].
    """
    setup = load_setup(default_setup_dir() if setup_dir is None else setup_dir)
    fs = setup.detector.sample_rate
    if seconds is None:
        n = setup.detector.record_length
    else:
        if not (math.isfinite(seconds) and seconds > 0):
            raise InputError(f"--seconds={seconds!r} must be a finite duration > 0 s")
        n = int(round(seconds * fs))
    n_max = setup.limits.record_length_max
    if not 2 <= n <= n_max:
        raise LimitError(
            f"--seconds={seconds!r} gives {n} samples at {fs:g} Hz, outside [2, {n_max}] "
            f"(the setup's record_length_max); choose at most {n_max / fs:g} s"
        )
    lab = SimLab(lab_params_from_setup(setup))
    rec = lab.record(n, channels=("x", "y", "z"))
    data = np.stack([rec.volts[c] for c in ("x", "y", "z")]).astype(np.float32, copy=False)
    out = Path(path)
    if out.suffix != ".npy":
        out = out.with_name(out.name + ".npy")  # what np.save would write
    try:
        np.save(out, data)
    except OSError as exc:
        raise InputError(
            f"cannot write {str(out)!r} ({exc.strerror}); give a path in a writable folder"
        ) from None
    return (
        out,
        (int(data.shape[0]), int(data.shape[1])),
        float(fs),
        f"{setup.name!r} ({setup.source})",
    )


def main(argv: list[str] | None = None) -> int:
    """Command-line entry point; returns the exit status."""
    parser = _Parser(
        prog="python -m quietwell_sim.trace",
        description="Write a simulated x, y, z record (float32 V, shape 3 x n) to a .npy file.",
    )
    parser.add_argument("file", help="output .npy file")
    parser.add_argument(
        "--setup", default=None, help="profile folder or setup.toml (default profiles/amber)"
    )
    parser.add_argument(
        "--seconds", type=float, default=None, help="record duration in s (default: setup's)"
    )
    try:
        args = parser.parse_args(argv)
        out, shape, fs, source = write_trace(args.file, args.setup, args.seconds)
    except (_Usage, QuietwellError) as exc:
        print(f"quietwell_sim.trace: error: {exc}", file=sys.stderr)
        return 2
    print(
        f"wrote {out}: float32 {shape[0]} x {shape[1]} (channels x, y, z in V) at "
        f"{fs:g} Hz, {shape[1] / fs:g} s, thermal state at the start pressure of setup {source}"
    )
    return 0


if __name__ == "__main__":
    sys.exit(main())
