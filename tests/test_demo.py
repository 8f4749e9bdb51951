"""The main job end to end: ``quietwell demo`` on the simulated bench, read back."""

from __future__ import annotations

import numpy as np
import pytest

import quietwell
from quietwell.cli import main


@pytest.mark.slow
def test_quick_demo_stores_every_record_with_its_fit_and_summary(tmp_path, capsys):
    assert main(["demo", "--quick", "--data-dir", str(tmp_path)]) == 0
    out = capsys.readouterr().out
    assert "radius (pressure sweep) [nm]" in out
    assert "charge [e]" in out
    client = quietwell.open_catalog(tmp_path)
    names = {run.metadata["start"]["plan_name"] for run in client.values()}
    assert names == {"charge_calibration", "thermal_calibration", "pressure_sweep",
                     "gain_sweep", "reheating_cycles", "sideband_thermometry"}
    for run in client.values():
        start = run.metadata["start"]
        assert start["setup"] == "amber" and start["quietwell_version"] == quietwell.__version__
        assert run.metadata["stop"]["exit_status"] == "success"
        primary = run["primary"]
        key = "trace_x" if "trace_x" in primary else "het_trace_beat"
        n_records = primary[key].shape[0]
        fits = run["fits"].read()
        assert len(fits["record_seq_num"]) == n_records
        assert list(np.asarray(fits["record_seq_num"])) == list(range(1, n_records + 1))
        assert len(run["summary"].read()["time"]) == 1
        assert np.all(np.isfinite(np.asarray(primary["pressure"].read())))


def test_demo_with_an_unknown_setup_is_one_line(tmp_path, capsys):
    assert main(["demo", "--setup", "nowhere", "--data-dir", str(tmp_path)]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "not found" in err and "Traceback" not in err
