"""Cost of storing one detector record through quietwell, against bare h5py.

    python bench/store_bench.py            # full run (about 10 minutes on 2 cores)
    python bench/store_bench.py --quick    # smaller run (about 3 minutes)
    python bench/store_bench.py --src /tmp/scratch/src   # a scratch copy of quietwell

Paths compared side by side in one process, interleaved (plugin, h5py, plugin, ...):

plugin
    a ``bluesky.RunEngine`` running ``count`` of N records of a
    ``quietwell.devices.MotionDetector`` (4 float32 channels) into a
    ``quietwell.store.EmbeddedStore``: event documents, one external SWMR HDF5 file,
    stream_resource / stream_datum registration through the store's ``TiledWriter``
    (journal in this process, the writer and the tiled server in the store's catalog
    process, with the store's batch size). The run's time ends when the RunEngine
    returns, as a plan's does: the catalog finishes the run on the other core. The
    bench then waits for it (``store.wait()``, untimed in the run's figure, reported
    as the time the catalog needs after the run, beside the catalog process's CPU
    time) so that it never overlaps the next path's timed run.
    The backend returns precomputed random arrays, so generating them costs nothing.
acquisition alone (in ``per_record``)
    the same RunEngine and detector (still writing its HDF5 file) with a subscriber
    that stores nothing, so that the cost of storing can be told from the cost of
    acquiring.
h5py
    the same arrays written with h5py alone, in the same layout: one file, one
    ``(records, samples)`` float32 dataset per channel with ``(1, samples)`` chunks,
    plus the per-record ``start_time`` and ``sample_rate`` datasets, SWMR, resized,
    written and flushed per record.

Per-record cost is measured honestly: each path runs N and 2N records, and
``per record = (T(2N) - T(N)) / N``; the rest, ``T(N) - N * per record``, is the fixed
cost of a run (open_run, stage, file creation, unstage, close_run, for the plugin).
Starting the tiled server is timed separately and is in neither figure.  In
``per_record`` every timed run starts after ``os.sync()`` (no dirty pages left by the
previous one) and after touching and freeing as much memory as the run writes (see
``_settle``: free page reporting of the virtual machine), every path first makes one
untimed run of 2N records, and each figure is the median over ``--repeat``
interleaved rounds.

The figures are printed as a table and written to ``bench/RESULTS-store.md``.
"""

from __future__ import annotations

import argparse
import cProfile
import io
import os
import platform
import pstats
import re
import shutil
import sys
import tempfile
import time
from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

CHANNELS = ("x", "y", "z", "intensity")
SAMPLES = 2**18
FAST_SAMPLES = 2**23
BIG_SAMPLES = 2**20
RATE_HZ = 1e6
GOAL = 1.5


# ------------------------------------------------------------------ framework


@dataclass
class Row:
    """One line of the results table."""

    name: str
    value: str
    goal: str = ""
    verdict: str = ""  # "PASS", "FAIL" or "" (for information)


@dataclass
class Config:
    quick: bool
    repeat: int
    n_records: int
    n_big: int
    work: Path
    src: Path


def _mb(n_bytes: float) -> str:
    return f"{n_bytes / 2**20:.1f} MiB"


def _ms(seconds: float) -> str:
    return f"{seconds * 1e3:.1f} ms"


# ------------------------------------------------------------- in-memory backend


class CannedBackend:
    """A ``MotionBackend`` that hands out precomputed random float32 records.

    Two different record sets are made once and returned alternately, so no cost
    of generating data reaches the timed paths (only building the small frozen
    record object around the arrays).
    """

    def __init__(self, samples: int, seed: int = 7) -> None:
        from quietwell.devices import RecordData

        self._record_type = RecordData
        rng = np.random.default_rng(seed)
        self.sets = [
            {ch: rng.standard_normal(samples, dtype=np.float32) * 0.1 for ch in CHANNELS}
            for _ in range(2)
        ]
        self.samples = samples
        self.calls = 0
        self.rate = RATE_HZ

    async def configure(self, sample_rate_hz: float, input_range_v: float) -> None:
        self.rate = float(sample_rate_hz)

    async def record(self, n_samples: int):
        if n_samples != self.samples:
            raise ValueError(f"CannedBackend holds {self.samples}-sample records, not {n_samples}")
        arrays = self.sets[self.calls % 2]
        t0 = self.calls * n_samples / self.rate
        self.calls += 1
        return self._record_type(sample_rate_hz=self.rate, start_time_s=t0, **arrays)


# ------------------------------------------------------------------ plugin path


class PluginPath:
    """RunEngine + MotionDetector + a store (``EmbeddedStore`` unless told otherwise)."""

    def __init__(self, store, samples: int, writer: Callable | None = None) -> None:
        from bluesky import RunEngine

        self.store = store
        self.samples = samples
        self.backend = CannedBackend(samples)
        self.RE = RunEngine({}, call_returns_result=False)
        self.writer = writer if writer is not None else store.writer
        self.RE.subscribe(self.writer)
        self.raw_dir = Path(store.raw_dir)
        self.det = self._make_detector()

    def _make_detector(self):
        from bluesky.run_engine import call_in_bluesky_event_loop
        from ophyd_async.core import StaticPathProvider, UUIDFilenameProvider

        from quietwell.devices import MotionDetector

        det = MotionDetector(
            self.backend,
            StaticPathProvider(UUIDFilenameProvider(), self.raw_dir),
            max_sample_rate_hz=RATE_HZ,
            max_record_length=self.samples,
            input_ranges_v=(1.0,),
            sample_rate_hz=RATE_HZ,
            record_length=self.samples,
            input_range_v=1.0,
            name="psd",
        )
        call_in_bluesky_event_loop(det.connect())
        return det

    def run(self, n: int) -> tuple[float, str]:
        """Wall time in s of one ``count`` of ``n`` records, and the run's uid."""
        import bluesky.plans as bp

        t0 = time.perf_counter()
        (uid,) = self.RE(bp.count([self.det], num=n))
        return time.perf_counter() - t0, uid

    def remove_files(self) -> None:
        for f in self.raw_dir.glob("*.h5"):
            f.unlink()


# -------------------------------------------------------------------- h5py path


def h5py_run(path: Path, n: int, sets: list[dict[str, np.ndarray]], samples: int) -> float:
    """Wall time in s of writing ``n`` records with h5py alone (the plugin's layout)."""
    import h5py

    t0 = time.perf_counter()
    with h5py.File(path, "w", libver="latest") as f:
        traces = {}
        for ch in CHANNELS:
            ds = f.create_dataset(
                f"/traces/{ch}",
                shape=(0, samples),
                maxshape=(None, samples),
                chunks=(1, samples),
                dtype=np.float32,
            )
            ds.attrs["units"] = "V"
            traces[ch] = ds
        start = f.create_dataset(
            "/records/start_time", shape=(0,), maxshape=(None,), chunks=(1024,), dtype="f8"
        )
        rate = f.create_dataset(
            "/records/sample_rate", shape=(0,), maxshape=(None,), chunks=(1024,), dtype="f8"
        )
        f.swmr_mode = True
        for i in range(n):
            arrays = sets[i % 2]
            for ch, ds in traces.items():
                ds.resize(i + 1, axis=0)
                ds[i] = arrays[ch]
                ds.flush()
            for ds, value in ((start, i * samples / RATE_HZ), (rate, RATE_HZ)):
                ds.resize(i + 1, axis=0)
                ds[i] = value
                ds.flush()
    dt = time.perf_counter() - t0
    path.unlink()
    return dt


# -------------------------------------------------------------------- measuring


@dataclass
class PerRecord:
    """Figures of one path from runs of N and 2N records."""

    t_n: float
    t_2n: float
    n: int

    @property
    def per_record(self) -> float:
        return (self.t_2n - self.t_n) / self.n

    @property
    def fixed(self) -> float:
        return self.t_n - self.n * self.per_record


def check_round_trip(plugin: PluginPath) -> None:
    """The plugin path really stores the records: read two back through tiled."""
    _t, uid = plugin.run(2)
    primary = plugin.store.client[uid]["primary"]
    for ch in CHANNELS:
        got = np.asarray(primary[f"trace_{ch}"].read())
        want = np.stack([plugin.backend.sets[i % 2][ch] for i in range(2)])
        if got.shape != want.shape or not np.array_equal(got, want):
            raise SystemExit(f"round trip failed for trace_{ch}: got shape {got.shape}")
    plugin.remove_files()


def _settle(n_bytes: int) -> None:
    """Bring memory to the same state before every timed run, whatever ran before.

    ``os.sync()`` first, so no dirty pages of the previous run are written back
    during this one. Then ``n_bytes`` (the run's data) plus a quarter are touched
    and freed at once, so the page cache the run fills comes from memory the guest
    holds. On this project's virtual machines the kernel reports free memory to
    the host after about 2 s (virtio-balloon free page reporting), and writing
    into reported pages was measured at 2-4x the cost of writing into pages freed
    a moment ago; a path whose runs end with a pause (the store's wait for the
    catalog) would otherwise pay that on its next run and a path without pauses
    would not.  On a machine without page reporting this only costs time.
    """
    os.sync()
    buf = np.ones(int(n_bytes * 1.25) // 8)
    del buf


def open_store(directory: Path):
    from quietwell.store import EmbeddedStore

    t0 = time.perf_counter()
    store = EmbeddedStore(directory).open()
    return store, time.perf_counter() - t0


# --------------------------------------------------------------------- sections


class _AppendTimer:
    """Adds up the time the detector spends in ``TraceFile.append`` (the HDF5 write)."""

    def __init__(self) -> None:
        from quietwell.devices import _trace_file

        self._module = _trace_file
        self._original = _trace_file.TraceFile.append
        self.total = 0.0

    def __enter__(self) -> _AppendTimer:
        original = self._original

        def timed(tf, *args, **kwargs):
            t0 = time.perf_counter()
            original(tf, *args, **kwargs)
            self.total += time.perf_counter() - t0

        self._module.TraceFile.append = timed
        return self

    def __exit__(self, *exc) -> None:
        self._module.TraceFile.append = self._original


def _null_writer(name, doc) -> None:
    """A subscriber that stores nothing (the acquisition alone)."""


def _three_paths(cfg: Config, out: dict, key: str, samples: int, n: int,
                 label: str) -> list[Row]:
    """Plugin with the store, the acquisition alone, and bare h5py, interleaved.

    The acquisition alone is the same RunEngine and detector (still writing its HDF5
    file) with a subscriber that stores nothing. The cost of *storing* a record through
    the plugin is the HDF5 append inside the detector plus what subscribing the store
    adds to the run: ``append + (plugin - acquisition alone)``. The all-in figure
    (RunEngine, detector and store together) is shown beside it.
    """
    record_bytes = len(CHANNELS) * samples * 4
    store, t_start = open_store(cfg.work / f"store-{key}")
    try:
        plugin = PluginPath(store, samples)
        check_round_trip(plugin)
        bare = PluginPath(store, samples, writer=_null_writer)
        catalog_pid = store._server.proc.pid

        def catalog_cpu() -> float:
            """CPU seconds used so far by the catalog process (server and writer)."""
            fields = Path(f"/proc/{catalog_pid}/stat").read_text().rsplit(")", 1)[1].split()
            return (int(fields[11]) + int(fields[12])) / os.sysconf("SC_CLK_TCK")

        # One untimed run of 2N records per path first: the first writes of a run
        # this size fault fresh memory in (page cache, and the host's pages under
        # a virtual machine) and were measured at up to 4x the steady cost.
        for path in (plugin, bare):
            path.run(2 * n)
            path.remove_files()
        h5py_run(cfg.work / "baseline.h5", 2 * n, plugin.backend.sets, samples)
        reps: list[dict] = []
        for _ in range(cfg.repeat):
            got: dict = {}
            for k in (n, 2 * n):
                for name, path in (("plugin", plugin), ("bare", bare)):
                    _settle(k * record_bytes)
                    cpu0 = catalog_cpu()
                    with _AppendTimer() as timer:
                        t, _uid = path.run(k)
                    # The RunEngine has returned; the catalog finishes the run on the
                    # other core. Wait for it (untimed in the run's figure) so that it
                    # never overlaps the next path's timed run.
                    t0 = time.perf_counter()
                    store.wait()
                    got[(name + ":drain", k)] = time.perf_counter() - t0
                    got[(name + ":catalog_cpu", k)] = catalog_cpu() - cpu0
                    path.remove_files()
                    got[(name, k)] = t
                    got[(name + ":append", k)] = timer.total
                _settle(k * record_bytes)
                got[("h5py", k)] = h5py_run(cfg.work / "baseline.h5", k, plugin.backend.sets,
                                            samples)
            reps.append(got)
    finally:
        t0 = time.perf_counter()
        store.close()
        t_close = time.perf_counter() - t0

    def per(r: dict, name: str) -> float:
        """Per record in round ``r``: (T(2N) - T(N)) / N of the same round."""
        return (r[(name, 2 * n)] - r[(name, n)]) / n

    def med(name: str) -> PerRecord:
        # the round with the median per-record figure, and its T(N)
        per_record, t_n = sorted((per(r, name), r[(name, n)]) for r in reps)[len(reps) // 2]
        return PerRecord(t_n, t_n + n * per_record, n)

    p, a, h = med("plugin"), med("bare"), med("h5py")
    append = med("plugin:append").per_record
    append_bare = med("bare:append").per_record

    # Paired within each round (the three paths ran back to back under the same
    # conditions): storing = append + (plugin - acquisition alone), over h5py; the
    # median and the quartiles of that ratio over the rounds.
    ratios = np.array(
        [
            (per(r, "plugin:append") + per(r, "plugin") - per(r, "bare")) / per(r, "h5py")
            for r in reps
        ]
    )
    ratio = float(np.median(ratios))
    q1, q3 = (float(v) for v in np.percentile(ratios, [25, 75]))
    storing = ratio * h.per_record
    all_in = p.per_record / h.per_record
    # The goal: a whole run of 2N records, each path's fixed cost included, paired
    # per round: (append + plugin - acquisition alone) / h5py, the median over the
    # rounds. The plugin's run ends when the RunEngine returns: the catalog finishes
    # the run on the other core while the next run acquires (its figures follow).
    def whole(r: dict, extra: str | None = None) -> float:
        k = 2 * n
        cost = r[("plugin:append", k)] + r[("plugin", k)] - r[("bare", k)]
        if extra:
            cost += r[(extra, k)]
        return cost / r[("h5py", k)]

    runs = np.array([whole(r) for r in reps])
    amortised = float(np.median(runs))
    r1, r3 = (float(v) for v in np.percentile(runs, [25, 75]))
    waited = float(np.median([whole(r, "plugin:drain") for r in reps]))
    drain = float(np.median([r[("plugin:drain", 2 * n)] for r in reps]))
    cat_cpu = float(np.median([r[("plugin:catalog_cpu", 2 * n)] for r in reps]))
    cat_per_record = cat_cpu / (2 * n)
    record_s_at_10ms = samples / 10e6
    out[key] = dict(p=p, h=h, a=a, ratio=ratio, all_in=all_in, storing=storing,
                    append=append, t_start=t_start, t_close=t_close, size=record_bytes)
    return [
        Row(f"record size ({label})", _mb(record_bytes)),
        Row(f"(a) plugin with the store, per record (runs of {n} and {2 * n}, "
            f"median of {cfg.repeat})", _ms(p.per_record)),
        Row("(b) the same acquisition storing nothing, per record", _ms(a.per_record)),
        Row("(c) HDF5 append inside the detector, per record", _ms(append)),
        Row("    the same append in (b), the acquisition storing nothing", _ms(append_bare),
            "(information)"),
        Row("(d) h5py alone, per record", _ms(h.per_record)),
        Row("(e) storing a record through the plugin, (c) + (a) - (b), paired per round",
            _ms(storing)),
        Row(f"(e) / (d): per-record increments only (median of the rounds' ratios; "
            f"quartiles {q1:.2f} to {q3:.2f}; order and memory effects reach the sign)",
            f"{ratio:.2f}x", "(information)"),
        Row("(a) / (d): all in (RunEngine + detector + store) / h5py", f"{all_in:.2f}x",
            "(information)"),
        Row(f"storing a run of {2 * n} records / h5py writing them, fixed costs included, "
            f"the acquisition's time (the catalog finishes on the other core; median of "
            f"rounds; quartiles {r1:.2f} to {r3:.2f})",
            f"{amortised:.2f}x", f"<= {GOAL}x", "PASS" if amortised <= GOAL else "FAIL"),
        Row("the catalog holds the run this long after the RunEngine returns (median)",
            _ms(drain), "(information)"),
        Row("the same, had the run waited for the catalog (store.wait() after it)",
            f"{waited:.2f}x", "(information)"),
        Row(f"catalog process CPU per run of {2 * n} records (server + writer, other core)",
            f"{cat_cpu:.2f} s", "(information)"),
        Row(f"the same per record of that run; the catalog keeps up while records arrive "
            f"slower than that (a record of this length lasts {record_s_at_10ms * 1e3:.0f} "
            f"ms at 10 MS/s)", _ms(cat_per_record), "(information)"),
        Row("(b) - (c): RunEngine + detector per record, no storage",
            _ms(a.per_record - append), "(information)"),
        Row("plugin fixed cost per run (open/stage/close, journal and pipe)", _ms(p.fixed)),
        Row("h5py fixed cost per run (file create/close)", _ms(h.fixed)),
        Row("catalog process start / stop (in neither figure)",
            f"{_ms(t_start)} / {_ms(t_close)}"),
    ]


def section_per_record(cfg: Config, out: dict) -> list[Row]:
    """The goal at the setup's record length (2**18 samples per channel, 4 channels)."""
    return _three_paths(cfg, out, "main", SAMPLES, cfg.n_records,
                        "4 ch x 2^18 float32, the profiles' record_length")


def section_big_record(cfg: Config, out: dict) -> list[Row]:
    """The same comparison at 2**20 samples per channel."""
    return _three_paths(cfg, out, "big", BIG_SAMPLES, cfg.n_big * 4, "4 ch x 2^20 float32")


def section_fast_record(cfg: Config, out: dict) -> list[Row]:
    """The same at the detector's fastest scale: 2**23 samples (0.84 s at 10 MS/s)."""
    return _three_paths(cfg, out, "fast", FAST_SAMPLES, max(2, cfg.n_big // 2),
                        "4 ch x 2^23 float32, 0.84 s at 10 MS/s")


class _TimedWriter:
    """Wraps a document callback and adds up the time spent in it per document name."""

    def __init__(self, target: Callable) -> None:
        self.target = target
        self.spent: dict[str, float] = defaultdict(float)
        self.count: dict[str, int] = defaultdict(int)

    def __call__(self, name, doc):
        t0 = time.perf_counter()
        self.target(name, doc)
        self.spent[name] += time.perf_counter() - t0
        self.count[name] += 1


def section_where_time_goes(cfg: Config, out: dict) -> list[Row]:
    """Break the plugin's per-record time down (writer per document, HDF5, the rest)."""
    store, _t = open_store(cfg.work / "store-c")
    n = cfg.n_records
    timed = _TimedWriter(store.writer)
    try:
        plugin = PluginPath(store, SAMPLES, writer=timed)
        plugin.run(2)  # warm
        timed.spent.clear()
        timed.count.clear()
        with _AppendTimer() as appends:
            total, _uid = plugin.run(n)
        store.wait()
        spent, count, appended = dict(timed.spent), dict(timed.count), appends.total
        plugin.remove_files()
        # The RunEngine runs its plan in its own thread: profile that thread.
        from bluesky.run_engine import call_in_bluesky_event_loop

        prof = cProfile.Profile()

        async def _on():
            prof.enable()

        async def _off():
            prof.disable()

        call_in_bluesky_event_loop(_on())
        plugin.run(n)
        call_in_bluesky_event_loop(_off())
        store.wait()
        plugin.remove_files()
    finally:
        store.close()
    text = io.StringIO()
    pstats.Stats(prof, stream=text).sort_stats("cumulative").print_stats(30)
    out["profile_text"] = text.getvalue()
    per = {k: v / n for k, v in spent.items()}
    writer_total = sum(spent.values())
    steady = spent["event"] + spent["stream_datum"]
    rest = total - writer_total - appended
    out["breakdown"] = dict(total=total, writer=spent, counts=count, append=appended, rest=rest,
                            n=n)
    return [
        Row(f"run of {n} records, all in", _ms(total)),
        Row("  store (journal + pipe): event documents, per record", _ms(per.get("event", 0.0))),
        Row("  store (journal + pipe): stream_datum (4 per record), per record",
            _ms(per.get("stream_datum", 0.0))),
        Row("  store: start/descriptor/stream_resource/stop (journal + pipe), per run",
            _ms(writer_total - steady)),
        Row("  HDF5 append+flush inside the detector, per record", _ms(appended / n)),
        Row("  RunEngine, ophyd-async, checks (the rest), per record", _ms(rest / n)),
    ]


SECTIONS: dict[str, Callable[[Config, dict], list[Row]]] = {
    "per_record": section_per_record,
    "big_record": section_big_record,
    "fast_record": section_fast_record,
    "where_time_goes": section_where_time_goes,
}


# ------------------------------------------------------------------- reporting


def render(rows_by_section: dict[str, list[Row]]) -> str:
    lines = ["| section | figure | value | goal | result |", "|---|---|---|---|---|"]
    for sec, rows in rows_by_section.items():
        for r in rows:
            lines.append(f"| {sec} | {r.name} | {r.value} | {r.goal} | {r.verdict} |")
    return "\n".join(lines)


def print_table(rows_by_section: dict[str, list[Row]]) -> None:
    w = max(len(r.name) for rows in rows_by_section.values() for r in rows)
    for sec, rows in rows_by_section.items():
        print(f"\n[{sec}]")
        for r in rows:
            print(f"  {r.name:<{w}}  {r.value:>22}  {r.goal:>14}  {r.verdict}")


def write_results(path: Path, cfg: Config, rows_by_section, out: dict, elapsed: float) -> None:
    import bluesky
    import h5py
    import tiled

    head = [
        "# Store benchmark: one detector record through quietwell vs bare h5py",
        "",
        f"Written by `bench/store_bench.py{' --quick' if cfg.quick else ''}` "
        f"({time.strftime('%Y-%m-%d %H:%M')}, {elapsed:.0f} s).",
        f"Machine: {platform.machine()}, {os.cpu_count()} cores, Python "
        f"{platform.python_version()}; bluesky {bluesky.__version__}, tiled "
        f"{tiled.__version__}, h5py {h5py.__version__} (HDF5 {h5py.version.hdf5_version}).",
        f"Runs of N and 2N records (N={cfg.n_records} at 2^18, {max(2, cfg.n_big // 2)} at "
        f"2^23), one untimed warm-up run of 2N per path, then {cfg.repeat} interleaved "
        "rounds, each run after os.sync() and after touching and freeing as much memory as "
        "it writes (free page reporting, see `_settle`); per record = (T(2N) - T(N)) / N and fixed = "
        "T(N) - N * per record, the median over the rounds. Data directory on "
        f"`{cfg.work}`.",
        "",
        render(rows_by_section),
        "",
    ]
    if "breakdown" in out:
        b = out["breakdown"]
        head += ["## Store documents in the acquisition (one run of "
                 f"{b['n']} records; the catalog's HTTP requests are in its own process)", "",
                 "| document | count | time |", "|---|---|---|"]
        for name, t in b["writer"].items():
            head.append(f"| {name} | {b['counts'][name]} | {_ms(t)} |")
        head.append("")
    if "profile_text" in out:
        head += ["## cProfile of one plugin run (RunEngine thread, cumulative; "
                 "the catalog process is not in it)", "",
                 "```", out["profile_text"].strip(), "```", ""]
    text = "\n".join(head)
    # No paths of this machine in the results: packages and this checkout, relative.
    text = re.sub(r"\S*/site-packages/", "", text)
    text = re.sub(r"/\S*/lib/python[0-9.]+/", "<stdlib>/", text)
    text = text.replace(str(ROOT) + "/", "").replace(str(cfg.work), "<a temporary directory>")
    path.write_text(text)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--quick", action="store_true", help="fewer and shorter runs")
    ap.add_argument("--only", choices=list(SECTIONS), action="append",
                    help="run only this section (repeatable)")
    ap.add_argument("--repeat", type=int, default=None, help="interleaved runs per timing")
    ap.add_argument("--src", type=Path, default=ROOT / "src",
                    help="the quietwell source tree to import (default: this checkout)")
    ap.add_argument("--results", type=Path, default=HERE / "RESULTS-store.md",
                    help="where to write the figures")
    ap.add_argument("--workdir", type=Path, default=None,
                    help="data directory parent (default: a fresh temporary directory)")
    args = ap.parse_args(argv)
    if not (args.src / "quietwell").is_dir():
        print(f"error: --src {args.src} holds no quietwell package", file=sys.stderr)
        return 2
    sys.path.insert(0, str(args.src.resolve()))
    work = Path(tempfile.mkdtemp(prefix="qw-store-bench-", dir=args.workdir))
    cfg = Config(
        quick=args.quick,
        repeat=args.repeat or (5 if args.quick else 7),
        n_records=50 if args.quick else 100,
        n_big=4 if args.quick else 8,
        work=work,
        src=args.src,
    )
    t0 = time.perf_counter()
    rows: dict[str, list[Row]] = {}
    out: dict = {}
    try:
        for name in args.only or SECTIONS:
            print(f"running {name} ...", flush=True)
            rows[name] = SECTIONS[name](cfg, out)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    elapsed = time.perf_counter() - t0
    print_table(rows)
    write_results(args.results, cfg, rows, out, elapsed)
    print(f"\nwritten {args.results} ({elapsed:.0f} s)")
    main_rows = rows.get("per_record", [])
    return 0 if all(r.verdict != "FAIL" for r in main_rows) else 1


if __name__ == "__main__":
    sys.exit(main())
