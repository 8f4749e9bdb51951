"""`quietwell analyze`: values against the truth of a synthetic record, and refusals."""

from __future__ import annotations

import json
import math
import os
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

from quietwell.analysis import spectrum_model
from quietwell.cli import main

TWO_PI = 2.0 * math.pi
FS = 1e6
N = 2**19
# Three axes, each channel seeing its own mode (area in V**2) and a white floor.
TRUTH = [
    (45e3, TWO_PI * 800.0, 1e-4, 1e-12),
    (130e3, TWO_PI * 1500.0, 5e-5, 2e-12),
    (160e3, TWO_PI * 1200.0, 3e-5, 1e-12),
]


def sampled_oscillator(fs, n, f0, gamma, area, background, seed):
    """Record of one damped oscillator plus white floor, in V.

    Gaussian Fourier coefficients with ``E|X_k|**2 = S_k fs n/2``, where ``S`` is
    the one-sided spectrum of the continuous oscillator folded into 0..fs/2
    (``sum_m S(|f + m fs|)``, aliasing included) plus the floor.
    """
    fk = np.fft.rfftfreq(n, 1.0 / fs)
    s = np.full(fk.size, background)
    for m in range(-20, 21):
        s += spectrum_model(np.abs(fk + m * fs), [(f0, gamma, area)], 0.0)
    rng = np.random.default_rng(seed)
    coef = np.sqrt(s * fs * n / 4.0) * (rng.normal(size=fk.size) + 1j * rng.normal(size=fk.size))
    coef[0] = 0.0
    coef[-1] = coef[-1].real * math.sqrt(2.0)
    return np.fft.irfft(coef, n)


@pytest.fixture(scope="module")
def record():
    return np.array([sampled_oscillator(FS, N, *t, seed=i) for i, t in enumerate(TRUTH)], dtype=np.float32)


@pytest.fixture(scope="module")
def npy_file(record, tmp_path_factory):
    path = tmp_path_factory.mktemp("rec") / "three_axes.npy"
    np.save(path, record)
    return path


@pytest.fixture(scope="module")
def h5_file(record, tmp_path_factory):
    path = tmp_path_factory.mktemp("rec") / "three_axes.h5"
    with h5py.File(path, "w") as fh:
        fh.attrs["sample_rate"] = 2 * FS  # wrong on purpose: the dataset's attribute wins
        grp = fh.create_group("run7")
        ds = grp.create_dataset("traces", data=record)
        ds.attrs["sample_rate"] = FS
        fh.create_dataset("other", data=np.zeros(10))
    return path


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def check_against_truth(doc):
    # Truth of the synthetic record within 5 standard errors.
    assert list(doc) == ["channels"]
    assert [c["index"] for c in doc["channels"]] == [0, 1, 2]
    for chan, (f0, gamma, area, floor) in zip(doc["channels"], TRUTH, strict=True):
        (pk,) = chan["peaks"]
        assert abs(pk["f0_hz"] - f0) < 5 * pk["f0_hz_stderr"]
        assert abs(pk["gamma"] - gamma) < 5 * pk["gamma_stderr"]
        assert abs(pk["area"] - area) < 5 * pk["area_stderr"]
        assert abs(pk["background"] - floor) < 5 * pk["background_stderr"]
        assert 0 < pk["area_stderr"] < 0.1 * pk["area"]


def test_json_values_match_the_truth(npy_file, capsys):
    code, out, err = run(["analyze", npy_file, "--sample-rate", FS, "--json"], capsys)
    assert code == 0, err
    assert err == ""
    check_against_truth(json.loads(out))


def test_hdf5_dataset_and_its_sample_rate(h5_file, capsys):
    code, out, err = run(["analyze", h5_file, "--dataset", "run7/traces", "--json"], capsys)
    assert code == 0, err
    check_against_truth(json.loads(out))


def test_flag_overrides_the_sample_rate_attribute(h5_file, capsys):
    code, out, _ = run(
        ["analyze", h5_file, "--dataset", "run7/traces", "--sample-rate", 0.5 * FS, "--json"],
        capsys,
    )
    assert code == 0
    f0 = json.loads(out)["channels"][0]["peaks"][0]["f0_hz"]
    assert f0 == pytest.approx(0.5 * TRUTH[0][0], rel=1e-3)


def test_table_names_units(npy_file, capsys):
    code, out, _ = run(["analyze", npy_file, "--sample-rate", FS], capsys)
    assert code == 0
    for word in ("Hz", "1/s", "V**2", "V**2/Hz", "channel 2"):
        assert word in out
    code, out, _ = run(["analyze", npy_file, "--sample-rate", FS, "--units", "m"], capsys)
    assert "m**2/Hz" in out and "V**2" not in out


def test_one_dimensional_record_and_peak_count(record, tmp_path, capsys):
    path = tmp_path / "x.npy"
    np.save(path, record[1] + record[2])  # one channel with two modes
    code, out, err = run(["analyze", path, "--sample-rate", FS, "--json", "--peaks", "2"], capsys)
    assert code == 0, err
    peaks = json.loads(out)["channels"][0]["peaks"]
    assert [round(p["f0_hz"], -3) for p in peaks] == [130e3, 160e3]


def test_subprocess_module_entry(npy_file):
    env = {
        **os.environ,
        "PYTHONPATH": os.pathsep.join([str(Path("src").resolve()), os.environ.get("PYTHONPATH", "")]),
    }
    res = subprocess.run(
        [sys.executable, "-m", "quietwell.cli", "analyze", str(npy_file), "--sample-rate",
         str(FS), "--json"],
        capture_output=True, text=True, timeout=120, env=env,
        cwd=Path(__file__).resolve().parents[1],
    )  # fmt: skip
    assert res.returncode == 0, res.stderr
    check_against_truth(json.loads(res.stdout))


# ----------------------------------------------------------------- bad input


def _bad_files(tmp: Path, record: np.ndarray) -> dict[str, tuple[list, str]]:
    """name -> (argv after 'analyze', a word the message must contain)."""
    (tmp / "garbage.npy").write_bytes(b"this is not numpy")
    np.save(tmp / "cube.npy", np.zeros((2, 3, 4)))
    nan = record[0, :50_000].copy()
    nan[1234] = np.nan
    np.save(tmp / "nan.npy", nan)
    np.save(tmp / "short.npy", record[0, :1000])
    np.save(tmp / "tall.npy", record[:, :100].T)
    t = np.arange(2**16) / FS
    line = np.sin(TWO_PI * 50e3 * t) + 1e-3 * np.random.default_rng(1).normal(size=t.size)
    np.save(tmp / "line.npy", line)  # a pure tone: narrower than one bin
    np.save(tmp / "noise.npy", np.random.default_rng(0).normal(size=2**16))
    np.save(tmp / "text.npy", np.array(["a", "b"]))
    with h5py.File(tmp / "norate.h5", "w") as fh:
        fh.create_dataset("x", data=record[0, : 2**15])
    (tmp / "record.csv").write_text("1,2,3\n")
    return {
        "missing file": (["nosuchfile.npy", "--sample-rate", FS], "no such file"),
        "unreadable": (["garbage.npy", "--sample-rate", FS], "cannot be read"),
        "wrong ndim": (["cube.npy", "--sample-rate", FS], "ndim=3"),
        "channels last": (["tall.npy", "--sample-rate", FS], "transpose"),
        "nan": (["nan.npy", "--sample-rate", FS], "index 1234"),
        "no sample rate": (["nan.npy"], "--sample-rate"),
        "too short": (["short.npy", "--sample-rate", FS, "--nperseg", 4096], "too short"),
        "unresolved line": (["line.npy", "--sample-rate", FS, "--nperseg", 256], "nperseg"),
        "no peak": (["noise.npy", "--sample-rate", FS], "found 0 peak"),
        "unknown dataset": (["norate.h5", "--dataset", "y", "--sample-rate", FS], "'y'"),
        "hdf5 without rate": (["norate.h5"], "sample_rate"),
        "strings": (["text.npy", "--sample-rate", FS], "dtype"),
        "unknown suffix": (["record.csv", "--sample-rate", FS], ".csv"),
        "negative rate": (["nan.npy", "--sample-rate", -5], "--sample-rate"),
        "bad nperseg": (["nan.npy", "--sample-rate", FS, "--nperseg", "many"], "many"),
        "unknown command": ([], "invalid choice"),
    }


BAD_CASES = [
    "missing file", "unreadable", "wrong ndim", "channels last", "nan", "no sample rate",
    "too short", "unresolved line", "no peak", "unknown dataset", "hdf5 without rate",
    "strings", "unknown suffix", "negative rate", "bad nperseg", "unknown command",
]  # fmt: skip


@pytest.mark.parametrize("case", BAD_CASES)
def test_bad_input_exits_2_with_one_line(case, record, tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    argv, word = _bad_files(tmp_path, record)[case]
    argv = ["frobnicate"] if case == "unknown command" else ["analyze", *argv]
    code, out, err = run(argv, capsys)
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert "Traceback" not in err
    assert lines[0].startswith("quietwell analyze: error: " if argv[0] == "analyze" else "quietwell")
    assert word in lines[0], lines[0]


def test_bad_input_in_a_subprocess_has_no_traceback(tmp_path):
    env = {
        **os.environ,
        "PYTHONPATH": os.pathsep.join([str(Path("src").resolve()), os.environ.get("PYTHONPATH", "")]),
    }
    res = subprocess.run(
        [sys.executable, "-m", "quietwell.cli", "analyze", str(tmp_path / "none.npy")],
        capture_output=True, text=True, timeout=60, env=env,
        cwd=Path(__file__).resolve().parents[1],
    )  # fmt: skip
    assert res.returncode == 2
    assert res.stderr.count("\n") == 1 and "Traceback" not in res.stderr


def test_help_exits_0(capsys):
    assert main(["analyze", "--help"]) == 0
    assert "--sample-rate" in capsys.readouterr().out


# ------------------------------------------------------- channels fail alone


@pytest.fixture(scope="module")
def one_bad_channel(record, tmp_path_factory):
    bad = record.copy()
    bad[1] = np.random.default_rng(9).normal(scale=math.sqrt(1e-12 * FS / 2), size=N)  # no line
    path = tmp_path_factory.mktemp("rec") / "one_bad.npy"
    np.save(path, bad)
    return path


def test_a_failed_channel_does_not_hide_the_others_json(one_bad_channel, capsys):
    code, out, err = run(["analyze", one_bad_channel, "--sample-rate", FS, "--json"], capsys)
    assert code == 3  # documented: some channels failed
    assert len(err.strip().splitlines()) == 1 and "1 of 3" in err
    doc = json.loads(out)
    chans = doc["channels"]
    assert [c["status"] for c in chans] == ["ok", "failed", "ok"]
    assert chans[1]["error_type"] == "UnresolvedPeakError"
    assert "found 0 peak" in chans[1]["error"]
    for i in (0, 2):
        f0, gamma, area, _ = TRUTH[i]
        (pk,) = chans[i]["peaks"]
        assert abs(pk["f0_hz"] - f0) < 5 * pk["f0_hz_stderr"]
        assert abs(pk["gamma"] - gamma) < 5 * pk["gamma_stderr"]


def test_a_failed_channel_does_not_hide_the_others_table(one_bad_channel, capsys):
    code, out, _ = run(["analyze", one_bad_channel, "--sample-rate", FS], capsys)
    assert code == 3
    assert "channel 1: FAILED (UnresolvedPeakError)" in out
    assert "channel 0: background" in out and "channel 2: background" in out


def test_analyze_path_does_not_import_heavy_modules(npy_file):
    # start fast: scipy.signal and scipy.stats (about 0.7 s of imports) are not needed
    code = (
        "import sys; from quietwell.cli import main; "
        f"rc = main(['analyze', {str(npy_file)!r}, '--sample-rate', '{FS}', '--json']); "
        "heavy = [m for m in ('scipy.signal', 'scipy.stats', 'scipy.optimize') if m in sys.modules]; "
        "print(heavy, file=sys.stderr); sys.exit(rc if not heavy else 9)"
    )
    env = {**os.environ, "PYTHONPATH": str(Path("src").resolve())}
    res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=120,
                         env=env, cwd=Path(__file__).resolve().parents[1])
    assert res.returncode == 0, res.stderr


# ------------------------------------------- quietwell raw files, several files


def test_quietwell_raw_file_records_are_records(record, tmp_path, capsys):
    # the layout of quietwell.devices._trace_file.TraceFile: /traces/<ch> (records, samples)
    # and /records/sample_rate (Hz, one per record)
    from quietwell.devices._trace_file import TraceFile

    tf = TraceFile(tmp_path / "raw.h5", ["x", "y"], N)
    for i in range(2):
        tf.append({"x": record[0] if i == 0 else record[2], "y": record[1]}, float(i), FS)
    tf.close()
    code, out, err = run(["analyze", tmp_path / "raw.h5", "--dataset", "traces/x", "--json"], capsys)
    assert code == 0, err
    files = json.loads(out)["files"]
    assert [f["source"].split(":")[-1] for f in files] == ["traces/x[record 0]", "traces/x[record 1]"]
    for doc, truth in zip(files, (TRUTH[0], TRUTH[2]), strict=True):
        (pk,) = doc["channels"][0]["peaks"]
        assert abs(pk["f0_hz"] - truth[0]) < 5 * pk["f0_hz_stderr"]


def test_several_files_folder_and_glob(npy_file, one_bad_channel, tmp_path, capsys):
    code, out, _ = run(["analyze", npy_file, npy_file.parent / "*.npy", "--sample-rate", FS,
                        "--json"], capsys)
    assert code == 0
    files = json.loads(out)["files"]
    assert len(files) == 2 and all(len(f["channels"]) == 3 for f in files)
    # a folder, with a file whose channel fails: the others are kept, exit 3
    code, out, err = run(["analyze", one_bad_channel.parent, npy_file, "--sample-rate", FS], capsys)
    assert code == 3 and "FAILED" in out and out.count("channel 0: background") == 2
