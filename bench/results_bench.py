"""How fast a store of 100 runs is listed from a cold process.

    python bench/results_bench.py                 # build the store once, then time it
    python bench/results_bench.py --store DIR     # keep the store in DIR (reused if there)
    python bench/results_bench.py --repeats 5

Goal: ``quietwell runs --data-dir DIR`` lists a store of 100 runs in under 3 s, from
the start of a fresh interpreter to its exit.

The store is built once (about 2-4 minutes on 2 cores) with ``open_session("amber",
DIR)`` and short plans: 25 "campaigns" of four runs each, a ``thermal_calibration`` at
3 mbar (3 records of 65536 samples) and three ``reheating_cycles`` (3 cycles) at 1e-6,
1e-7 and 1e-8 mbar, each start document carrying ``campaign_id``, ``campaign_step`` and
``campaign_attempt`` as the campaign runner writes them (the 25 calibrations come first,
then one pump-down for the 75 reheating runs). The store is then closed: no
catalog process holds it.

Paths, each a fresh interpreter timed from just before its start to its exit,
interleaved A B A B ... (``--repeats`` pairs, the minimum and median reported):

A (new)
    ``quietwell runs --data-dir DIR``: the catalog's SQLite file read directly
    (read-only) and the summaries from a copy of the event tables
    (``quietwell/results/_catalog_sql.py``); tiled is not imported.
B (previous)
    the same command with ``QUIETWELL_READ_VIA_TILED=1``: the same read-only files
    read through tiled's catalog adapter in this process (what ``quietwell runs`` did
    before; also the fallback when the catalog's layout is not the expected one).
C (``--with-server``; slow)
    the same listing through ``quietwell.open_catalog(DIR)`` (an embedded tiled server
    in a catalog process): ``python -c`` with the same listing function.

Beside them: the interpreter and the imports of each path alone (A: ``quietwell.results,
sqlite3, duckdb``; B: ``quietwell.results, tiled.catalog, tiled.queries``: tiled's
catalog adapter imports dask and xarray), and A while a writer holds the store (a
session open on DIR in this process: its catalog process holds ``catalog.lock`` and the
event tables), to show that reading never waits for the writer.

Results are printed and written to ``bench/RESULTS-results.md``.
"""

from __future__ import annotations

import argparse
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
ENV = {**os.environ, "PYTHONPATH": os.pathsep.join([str(ROOT / "src"), str(ROOT / "sim_devices")])}
MBAR = 100.0


def build_store(data_dir: Path, n_campaigns: int = 25) -> float:
    """Write ``4 * n_campaigns`` runs into ``data_dir``; the seconds it took."""
    sys.path[:0] = [str(ROOT / "src"), str(ROOT / "sim_devices")]
    from quietwell.plans import LabState, reach_state, reheating_cycles, thermal_calibration
    from quietwell.session import open_session

    t0 = time.perf_counter()

    def md(c, step):
        return {"campaign_id": f"bench-{c:03d}", "campaign_step": step,
                "campaign_attempt": 1, "campaign_step_id": f"step{step}"}

    # All calibrations first, then one pump-down for all reheating runs: the simulated
    # particle is not brought back up to 3 mbar from 1e-8 mbar 25 times over.
    with open_session("amber", data_dir) as s:
        app, RE = s.apparatus, s.RE
        RE(reach_state(app, LabState(pressure=3 * MBAR, feedback="off")))
        for c in range(n_campaigns):
            RE(thermal_calibration([app.detector], 3 * MBAR, apparatus=app, records=3,
                                   settle_time=0.1, sample_rate=1e6, record_length=65536,
                                   input_range=2.0, md=md(c, 0)))
        print(f"  {n_campaigns} calibrations written ({time.perf_counter() - t0:.0f} s)",
              flush=True)
        RE(reach_state(app, LabState(pressure=1e-6 * MBAR, feedback="on", gain=2e4)))
        for c in range(n_campaigns):
            for k, p in enumerate((1e-6, 1e-7, 1e-8)):
                RE(reheating_cycles([app.detector], 3, apparatus=app, feedback_gain=2e4,
                                    pressure=p * MBAR, off_time=4e-3, sample_rate=1e6,
                                    input_range=0.02, n_boot=50, md=md(c, k + 1)))
            print(f"  campaign {c + 1}/{n_campaigns} written "
                  f"({time.perf_counter() - t0:.0f} s)", flush=True)
    return time.perf_counter() - t0


_OLD = """
import sys
import quietwell
from quietwell.results import find_runs, format_runs
client = quietwell.open_catalog(sys.argv[1])
print(format_runs(find_runs(client)))
"""


def _timed(cmd: list[str]) -> tuple[float, str]:
    t0 = time.perf_counter()
    out = subprocess.run(cmd, env=ENV, capture_output=True, text=True, check=False)
    dt = time.perf_counter() - t0
    if out.returncode != 0:
        raise SystemExit(f"{' '.join(cmd[:4])} ... failed ({out.returncode}): "
                         f"{out.stderr.strip()[-400:]}")
    return dt, out.stdout


def _load(avg: tuple[float, float, float]) -> str:
    return "/".join(f"{x:.1f}" for x in avg)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--store", type=Path, help="data directory of the bench store (reused)")
    ap.add_argument("--repeats", type=int, default=5)
    ap.add_argument("--with-server", action="store_true",
                    help="also time C, the listing through an embedded tiled server (slow)")
    args = ap.parse_args(argv)
    store = args.store or Path(tempfile.gettempdir()) / "quietwell-bench-results"
    built = None
    if not (store / "catalog" / "catalog.db").exists():
        print(f"building a store of 100 runs in {store} ...", flush=True)
        built = build_store(store)
    py = sys.executable
    load_before = os.getloadavg()
    new = [py, "-m", "quietwell.cli", "runs", "--data-dir", str(store)]
    prev = ["env", "QUIETWELL_READ_VIA_TILED=1", *new]
    server = [py, "-c", _OLD, str(store)]
    imports_new = [py, "-c", "import quietwell.results, quietwell.results._catalog_sql, duckdb"]
    imports_prev = [py, "-c", "import quietwell.results, tiled.catalog, tiled.queries"]
    paths = [("new", new), ("prev", prev)] + ([("server", server)] if args.with_server else [])
    times: dict[str, list[float]] = {name: [] for name, _ in paths}
    times |= {"imports_new": [], "imports_prev": []}
    outputs = {}
    for i in range(args.repeats):
        order = paths if i % 2 == 0 else paths[::-1]
        for name, cmd in (*order, ("imports_new", imports_new), ("imports_prev", imports_prev)):
            dt, out = _timed(cmd)
            times[name].append(dt)
            outputs[name] = out
        print(f"  round {i + 1}: " + ", ".join(f"{k} {v[-1]:.2f} s" for k, v in times.items()),
              flush=True)
    n_lines = len(outputs["new"].strip().splitlines())
    same = all(outputs[name] == outputs["new"] for name, _ in paths)
    # while a writer holds the store
    sys.path[:0] = [str(ROOT / "src"), str(ROOT / "sim_devices")]
    from quietwell.session import open_session

    busy = []
    with open_session("amber", store):
        for _ in range(max(2, args.repeats // 2)):
            busy.append(_timed(new)[0])
    load_after = os.getloadavg()

    def fig(xs):
        return f"min {min(xs):.2f} s, median {statistics.median(xs):.2f} s"

    ratio = [o / n for o, n in zip(times["prev"], times["new"], strict=True)]
    rows = [
        ("runs listed (lines of `quietwell runs`)", f"{n_lines - 1} runs", ""),
        ("A: `quietwell runs --data-dir DIR` (cold process)", fig(times["new"]),
         "PASS" if statistics.median(times["new"]) < 3.0 else "FAIL"),
        ("B: the same through tiled's catalog adapter (previous path)", fig(times["prev"]), ""),
        ("B / A (per pair)", f"median {statistics.median(ratio):.1f}x, "
                            f"range {min(ratio):.1f}x-{max(ratio):.1f}x", ""),
    ]
    if args.with_server:
        rows.append(("C: the same listing through `open_catalog` (embedded server)",
                     fig(times["server"]), ""))
    rows += [
        ("interpreter + imports of A (quietwell.results, sqlite3, duckdb)",
         fig(times["imports_new"]), ""),
        ("interpreter + imports of B (quietwell.results, tiled.catalog)",
         fig(times["imports_prev"]), ""),
        ("A while a writer's catalog process holds DIR", fig(busy),
         "PASS" if statistics.median(busy) < 3.0 else "FAIL"),
        ("all paths print the same listing", str(same), "PASS" if same else "FAIL"),
    ]
    if built is not None:
        rows.append(("building the store (once, not timed against anything)",
                     f"{built:.0f} s", ""))
    lines = ["# Results listing: a store of 100 runs from a cold process", "",
             f"`python bench/results_bench.py --repeats {args.repeats}"
             f"{' --with-server' if args.with_server else ''}`; store {store}; "
             f"{os.cpu_count()} cores, shared with other jobs; load average (1, 5, 15 min) "
             f"{_load(load_before)} before, {_load(load_after)} after.", "",
             "| what | measured | goal < 3 s |", "|---|---|---|"]
    lines += [f"| {a} | {b} | {c} |" for a, b, c in rows]
    text = "\n".join(lines) + "\n"
    print(text)
    (HERE / "RESULTS-results.md").write_text(text)
    return 0 if all(c != "FAIL" for _, _, c in rows) else 1


if __name__ == "__main__":
    sys.exit(main())
