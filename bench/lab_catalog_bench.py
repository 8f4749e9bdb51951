"""Lab catalog bench: runs per second from one writer into the lab's tiled server on
PostgreSQL, and the catalog's cost per record.

    source $QW_SERVICES_DIR/env     # QUIETWELL_TEST_PG (bash .ci/services start)
    PYTHONPATH=src:sim_devices python bench/lab_catalog_bench.py [--runs 30]

Starts a server of its own (fresh databases, ``quietwell lab-catalog serve`` on a free
port), then writes through one :class:`quietwell.store.ServerStore` (journal, catalog
process, the server): ``--runs`` runs of 1 record and as many of ``--records`` records
(3 scalars each, as a short plan's events), timing from the first document to
``store.wait()`` (the catalog holds every run). Runs per second come from the 1-record
runs; the cost per record is the difference of the two, divided by the extra records.
Writes bench/RESULTS-lab-catalog.md.
"""

from __future__ import annotations

import argparse
import os
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "tests"))


def _write(store, n_runs: int, n_records: int, tag: str) -> float:
    from event_model import compose_run

    t0 = time.perf_counter()
    for i in range(n_runs):
        b = compose_run(metadata={"setup": "bench", "bench_tag": tag, "i": i})
        store.writer("start", b.start_doc)
        d = b.compose_descriptor(name="primary", data_keys={
            k: {"dtype": "number", "shape": [], "source": "bench", "units": "V"}
            for k in ("x", "y", "z")})
        store.writer("descriptor", d.descriptor_doc)
        for k in range(n_records):
            now = time.time()
            store.writer("event", d.compose_event(data={"x": 1.0 * k, "y": 2.0, "z": 3.0},
                                                  timestamps={"x": now, "y": now, "z": now}))
        store.writer("stop", b.compose_stop())
    store.wait()
    return time.perf_counter() - t0


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("--runs", type=int, default=30)
    ap.add_argument("--records", type=int, default=200)
    ap.add_argument("--batch", type=int, default=100)
    args = ap.parse_args()
    admin = os.environ.get("QUIETWELL_TEST_PG")
    if not admin:
        print("lab_catalog_bench: QUIETWELL_TEST_PG is not set; start the services: bash "
              ".ci/services start && source $QW_SERVICES_DIR/env", file=sys.stderr)
        return 2
    from lab_server import LabServer

    from quietwell.setup import DataSpec
    from quietwell.store import ServerStore

    with tempfile.TemporaryDirectory() as tmp:
        server = LabServer(admin, Path(tmp))
        server.start()
        os.environ["QWBENCH_KEY"] = server.key
        try:
            spec = DataSpec(store="server", uri=server.uri, api_key_env="QWBENCH_KEY")
            with ServerStore(Path(tmp) / "data", spec, batch_size=args.batch) as store:
                _write(store, 3, 1, "warmup")
                t_short = _write(store, args.runs, 1, "short")
                t_long = _write(store, args.runs, args.records, "long")
        finally:
            server.stop()
    per_run = t_short / args.runs
    per_record = (t_long - t_short) / (args.runs * (args.records - 1))
    rows = [
        ("runs per second, one writer (1 record each, journal to catalog)",
         f"{args.runs / t_short:.2f} runs/s ({1e3 * per_run:.0f} ms per run)"),
        (f"catalog cost per record ({args.records} records of 3 scalars per run, "
         f"batches of {args.batch})", f"{1e3 * per_record:.2f} ms per record"),
        (f"{args.runs} runs of {args.records} records", f"{t_long:.1f} s "
         f"({args.runs / t_long:.2f} runs/s)"),
    ]
    lines = ["# Lab catalog bench (bench/lab_catalog_bench.py)", "",
             f"{time.strftime('%Y-%m-%d')}, tiled on PostgreSQL 15 on the same 2-core machine "
             "(shared with other jobs), one uvicorn worker; timed from the first document "
             "to store.wait().", "", "| quantity | measured |", "|---|---|"]
    lines += [f"| {a} | {b} |" for a, b in rows]
    text = "\n".join(lines) + "\n"
    (ROOT / "bench" / "RESULTS-lab-catalog.md").write_text(text, encoding="utf-8")
    print(text)
    return 0


if __name__ == "__main__":
    sys.exit(main())
