"""The morning report (``quietwell report``), checked in a real browser.

One small real campaign (tests/data/report-campaign.toml: every kind of step, so every
picture, one record a pressure or gain) is run with ``quietwell run``, killed once in the
middle of its gain sweep and resumed, so that its store holds a superseded run beside the
completed ones (one store for the module). The report of that store is loaded in
headless Chromium (one browser for the module): no console error, no network request,
every picture drawn with a size, and every number of the values table equal to the
summary stream read back through the catalog's own server (``quietwell.open_catalog``),
independently of the report's in-process reader. Those tests are marked ``slow`` (the
campaign takes a minute or two). The fast test loads a real report in Chromium too: that
of a campaign still running before any of its runs reached the store, from a ledger
recorded by a run of the same campaign file (tests/data/report-ledger-running.jsonl).
"""

from __future__ import annotations

import fcntl
import json
import math
import os
import re
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

import quietwell
from quietwell.campaign._ledger import campaign_dirs, read_ledger

ROOT = Path(__file__).resolve().parents[1]
CAMPAIGN = ROOT / "tests" / "data" / "report-campaign.toml"
LEDGER = ROOT / "tests" / "data" / "report-ledger-running.jsonl"
PICTURES = {"psd", "damping", "gain", "reheating", "heating", "sidebands"}


def _cli(*args: str, fault: str | None = None, timeout: float = 600) -> subprocess.CompletedProcess:
    env = {**os.environ, "PYTHONUNBUFFERED": "1"}
    env.pop("QUIETWELL_FAULT", None)
    if fault:
        env["QUIETWELL_FAULT"] = fault
    return subprocess.run([sys.executable, "-m", "quietwell.cli", *args], capture_output=True,
                          text=True, env=env, timeout=timeout, cwd=ROOT)


@pytest.fixture(scope="module")
def store(tmp_path_factory) -> Path:
    """A campaign's store: killed (SIGKILL) at the 10th record, inside the gain sweep
    (thermal calibration 3 records, pump-down 5), then resumed to the end."""
    data = tmp_path_factory.mktemp("report") / "data"
    killed = _cli("run", str(CAMPAIGN), "--setup", "amber", "--data-dir", str(data),
                  fault="event:10")
    assert killed.returncode == -9, killed.stderr[-2000:]
    resumed = _cli("run", "--resume", "--data-dir", str(data))
    assert resumed.returncode == 0, resumed.stderr[-2000:]
    return data


@pytest.fixture(scope="module")
def report(store: Path) -> Path:
    out = store.parent / "morning.html"
    done = _cli("report", "--data-dir", str(store), "-o", str(out))
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stderr == "" and done.stdout.strip() == f"wrote {out}"
    return out


def _ledger(data: Path) -> list[dict]:
    (folder,) = campaign_dirs(data)
    return read_ledger(folder / "ledger.jsonl")


def _artifacts(tmp_path: Path) -> Path:
    where = Path(os.environ.get("QUIETWELL_TEST_ARTIFACTS") or tmp_path)
    where.mkdir(parents=True, exist_ok=True)
    return where


@pytest.fixture(scope="module")
def catalog(store: Path):
    """The store read through its catalog server (not the report's reader)."""
    return quietwell.open_catalog(store)


@pytest.fixture(scope="module")
def browser(chromium_path: str):
    os.environ["SE_OFFLINE"] = "true"  # never let selenium fetch a driver
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = chromium_path
    for flag in ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                 "--no-first-run", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--window-size=1200,900"):
        opts.add_argument(flag)
    profile = tempfile.mkdtemp(prefix="qw-chromium-")
    opts.add_argument(f"--user-data-dir={profile}")
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL", "performance": "ALL"})
    driver = webdriver.Chrome(service=Service("/usr/bin/chromedriver"), options=opts)
    try:
        yield driver
    finally:
        driver.quit()
        shutil.rmtree(profile, ignore_errors=True)


_CELLS = """
return Array.from(document.querySelectorAll('td.derived')).map(td => ({
  uid: td.dataset.uid, key: td.dataset.key, value: td.dataset.value ?? null,
  stderr: td.dataset.stderr ?? null, text: td.dataset.text ?? null,
  units: td.dataset.units, shown: td.textContent}));
"""

_SVGS = """
return Array.from(document.querySelectorAll('figure.plot')).map(f => {
  const s = f.querySelector('svg'); const r = s ? s.getBoundingClientRect() : null;
  return {key: f.dataset.plot, width: r ? r.width : 0, height: r ? r.height : 0,
          missing: f.querySelector('.missing') ? f.textContent : null};});
"""


def _load(browser, page: Path, may_miss: frozenset = frozenset()) -> list[dict]:
    """Load ``page`` in the browser and check it as a reader's browser would show it: no
    console error, no request but the page itself, every picture drawn with a size (but
    those of ``may_miss``, which may say why they are not drawn). Returns the pictures."""
    url = page.resolve().as_uri()
    browser.get_log("performance")  # whatever the browser did before this page
    browser.get_log("browser")
    browser.get(url)

    # no console message of level SEVERE (errors), and no request but the page itself
    errors = [m for m in browser.get_log("browser") if m["level"] == "SEVERE"]
    assert errors == []
    requests = []
    for entry in browser.get_log("performance"):
        msg = json.loads(entry["message"])["message"]
        if msg["method"] == "Network.requestWillBeSent":
            requests.append((msg["params"]["request"]["url"], msg["params"].get("loaderId")))
    # what the page's document loaded: itself only (the browser's own start page, still
    # loading its chrome:// resources under another loader, is not the report's)
    loaders = {loader for u, loader in requests if u == url}
    assert len(loaders) == 1
    assert {u for u, loader in requests if loader in loaders} == {url}
    assert not [u for u, _ in requests if u.split(":")[0] in ("http", "https", "ws", "wss")]

    # every picture is drawn and has a size on the page
    figs = browser.execute_script(_SVGS)
    for f in figs:
        if f["key"] in may_miss and f["missing"] is not None:
            continue
        assert f["missing"] is None, f["missing"]
        assert f["width"] > 100 and f["height"] > 50, f
    return figs


def _stored_summaries(client, uids: list[str]) -> dict[str, dict]:
    """The summary stream of each run, as the catalog's server returns it (independent
    of the report's reader): {uid: {key: (value, units)}}."""
    import numpy as np

    out = {}
    for uid in uids:
        stream = client[uid]["summary"]
        ds = stream.read()
        units = stream.metadata["data_keys"]
        row = {}
        for key in ds.data_vars:
            v = np.asarray(ds[key].values).reshape(-1)[0]
            row[key] = (v.item() if hasattr(v, "item") else v, units[key].get("units", ""))
        out[uid] = row
    return out


@pytest.mark.slow
def test_report_in_a_browser(report: Path, store: Path, catalog, browser,
                             tmp_path: Path) -> None:
    entries = _ledger(store)
    done = {e["uid"]: e["step"] for e in entries if e["event"] == "done"}
    (superseded,) = [e["uid"] for e in entries if e["event"] == "superseded"]
    assert superseded not in done and len(done) == 7

    figs = _load(browser, report)
    assert browser.title.startswith("report-small")
    assert {f["key"] for f in figs} == PICTURES
    assert len([f for f in figs if f["key"] == "reheating"]) == 3

    # the values table: exactly the numbers of the catalog's summary streams of the runs
    # that count (the superseded run's values never appear there)
    cells = browser.execute_script(_CELLS)
    stored = _stored_summaries(catalog, list(done))
    numbers = {(c["uid"], c["key"]): c for c in cells if c["value"] is not None}
    expected = {(uid, k) for uid, row in stored.items() for k, (v, _) in row.items()
                if not k.endswith("_stderr") and isinstance(v, (int, float))
                and not isinstance(v, bool)}
    assert set(numbers) == expected
    assert superseded not in {c["uid"] for c in cells}
    for (uid, key), cell in numbers.items():
        value, units = stored[uid][key]
        shown = float(cell["value"])
        assert shown == value or (math.isnan(shown) and math.isnan(value)), (uid, key)
        assert cell["units"] == units
        if f"{key}_stderr" in stored[uid]:
            err = stored[uid][f"{key}_stderr"][0]
            got = float(cell["stderr"])
            assert got == err or (math.isnan(got) and math.isnan(err)), (uid, key)
        # and the text a reader sees says the same to its 5 significant digits
        first = re.match(r"\s*(nan|[-+0-9.e]+)", cell["shown"]).group(1)
        if math.isfinite(value):
            assert float(first) == pytest.approx(value, rel=1e-4, abs=0), (key, cell["shown"])
    texts = {(c["uid"], c["key"]): c["text"] for c in cells if c["text"] is not None}
    for (uid, key), text in texts.items():
        assert text == str(stored[uid][key][0])

    # the superseded run is in its marked section, with what replaced it
    left = browser.execute_script(
        "return Array.from(document.querySelectorAll('section.leftout tr[data-left-out]'))"
        ".map(r => [r.dataset.leftOut, r.dataset.status, r.textContent]);")
    assert [(u, s) for u, s, _ in left] == [(superseded, "superseded")]
    replacement = [u for u, step in done.items() if step == 2]
    assert replacement[0] in left[0][2]

    # the header: the hashes of the ledger, and every run uid
    head = entries[0]
    field = browser.execute_script(
        "return Object.fromEntries(Array.from(document.querySelectorAll('[data-field]'))"
        ".map(e => [e.dataset.field, e.textContent]));")
    assert field["setup_sha256"] == head["setup_sha256"]
    assert field["campaign_sha256"] == head["campaign_sha256"]
    assert field["campaign_status"] == "completed"
    listed = browser.execute_script(
        "return Array.from(document.querySelectorAll('li[data-uid]')).map(e => e.dataset.uid);")
    assert set(listed) == set(done) | {superseded}

    height = browser.execute_script("return document.documentElement.scrollHeight")
    browser.set_window_size(1200, min(height + 50, 20000))
    shot = _artifacts(tmp_path) / "report-small.png"
    assert browser.save_screenshot(str(shot)) and shot.stat().st_size > 10_000
    print(f"screenshot: {shot}")


@pytest.mark.slow
def test_figures_for_a_notebook(store: Path, catalog) -> None:
    """Each picture is a public function of a run (or a table) returning a Figure; here
    of runs read through the catalog's server, as a notebook may open them."""
    import numpy as np
    from matplotlib.figure import Figure

    from quietwell import InputError
    from quietwell import report as rep
    from quietwell.report import _plots

    client = catalog
    runs = {}
    for e in _ledger(store):
        if e["event"] == "done":
            run = client[e["uid"]]
            runs.setdefault(run.metadata["start"]["plan_name"], []).append(run)
    figs = [rep.psd_figure(runs["thermal_calibration"][0]),
            rep.damping_figure(runs["pressure_sweep"][0]),
            rep.gain_figure(runs["gain_sweep"][0]),
            rep.reheating_figure(runs["reheating_cycles"][0]),
            rep.heating_pressure_figure(rep.heating_table(runs["reheating_cycles"])),
            rep.sideband_figure(runs["sideband_thermometry"][0])]
    assert all(isinstance(f, Figure) and f.axes for f in figs)
    table = rep.heating_table(runs["reheating_cycles"])
    assert list(table["pressure"]) == sorted(table["pressure"]) and len(table) == 3
    with pytest.raises(InputError, match="needs a pressure_sweep run"):
        rep.damping_figure(runs["gain_sweep"][0])

    # array fields are read as float arrays, each of the length the fits stream gives
    t, mean, spread, cycles = _plots.reheating_ensemble(runs["reheating_cycles"][0], "x")
    assert t.dtype == mean.dtype == spread.dtype == np.float64
    assert t.size == mean.size == spread.size > 1 and cycles == 4
    assert np.all(np.diff(t) > 0) and np.isfinite(mean).all()
    # numpy's printed text of an array is refused, never read back short
    for text in ("[ 1.5  2. ]", "[0. 1. 2. ... 7. 8. 9.]"):
        with pytest.raises(InputError, match="came back as text"):
            _plots.as_array(text, "ensemble_mean_x")
    # an unknown uid, in Python as on the command line: one line naming it
    with pytest.raises(InputError, match=r"^uid 0123456789abcdef: not in the store"):
        rep.write_report(store, store.parent / "x.html", uids=["0123456789abcdef"])


def _one_line_error(done: subprocess.CompletedProcess, *words: str) -> None:
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in done.stderr, done.stderr
    for w in words:
        assert w in lines[0], lines[0]


@pytest.mark.slow
def test_bad_input_is_one_line(tmp_path: Path, store: Path) -> None:
    """On the command line: one line and exit status 2 (two cases); the rest of the
    checks of input are the same InputError in Python, each one line naming the value."""
    from quietwell import InputError
    from quietwell.report import write_report

    out = tmp_path / "r.html"
    _one_line_error(_cli("report", "--data-dir", str(tmp_path / "nowhere"), "-o", str(out)),
                    "nowhere", "no such directory")
    _one_line_error(_cli("report", "--data-dir", str(store), "--campaign", "x", "abcdef12",
                         "-o", str(out)), "not both")
    empty = tmp_path / "empty"
    empty.mkdir()
    cases = [((empty, out), {}, ["holds no quietwell store"]),
             ((store, out), {"campaign": "no-such"}, ["--campaign no-such", "report-small"]),
             ((store, tmp_path / "missing" / "r.html"), {}, ["does not exist"]),
             ((store, tmp_path / "r.txt"), {}, [".html"])]
    for args, kw, words in cases:
        with pytest.raises(InputError) as err:
            write_report(*args, **kw)
        assert "\n" not in str(err.value)
        for w in words:
            assert w in str(err.value), str(err.value)
    assert not out.exists()


def _live_copy(store: Path, tmp_path: Path, entries: list[dict], name: str) -> Path:
    """A data directory as a running campaign leaves it: the ledger so far, and the
    store's catalog (its runs of the steps after the cut are not in that ledger)."""
    live = tmp_path / name
    folder = live / "campaigns" / entries[0]["campaign_id"]
    folder.mkdir(parents=True)
    (folder / "ledger.jsonl").write_text(
        "".join(json.dumps(e) + "\n" for e in entries), encoding="utf-8")
    (live / "catalog").mkdir()
    for part in ("catalog.db", "storage.duckdb", "storage.duckdb.wal"):
        if (store / "catalog" / part).exists():
            shutil.copyfile(store / "catalog" / part, live / "catalog" / part)
    return live


def _report_while_held(live: Path, out: Path) -> subprocess.CompletedProcess:
    with open(live / "catalog" / "catalog.lock", "w") as lock:  # as the catalog process does
        fcntl.flock(lock.fileno(), fcntl.LOCK_EX)
        lock.write("4242")
        lock.flush()
        return _cli("report", "--data-dir", str(live), "-o", str(out))


@pytest.mark.slow
def test_running_campaign_is_reported_as_it_stands(tmp_path: Path, store: Path, catalog,
                                                   browser) -> None:
    """A campaign whose process still holds the store: the page says so, shows the steps as
    the ledger has them (the step in progress as running, later steps never reached), and
    the values of the completed steps as the store holds them, read while the lock is
    held."""
    entries = _ledger(store)
    (killed,) = [e["uid"] for e in entries if e["event"] == "superseded"]
    cut = next(i for i, e in enumerate(entries) if e["event"] == "run" and e["uid"] == killed)
    live = _live_copy(store, tmp_path, entries[:cut + 1], "live")
    out = tmp_path / "live.html"
    done = _report_while_held(live, out)
    assert done.returncode == 0, done.stderr
    assert "still running" in done.stderr
    page = out.read_text(encoding="utf-8")
    assert "The campaign is still running (process 4242" in page
    statuses = dict(re.findall(r'<tr data-step="([^"]+)" data-status="([^"]+)"', page))
    assert statuses == {"thermal": "completed", "pumpdown": "completed", "gains": "running",
                        "reheat-1e-6": "never reached", "reheat-1e-7": "never reached",
                        "reheat-1e-8": "never reached", "sidebands": "never reached"}
    # the values of the completed steps are the store's, with their errors and units (the
    # ledger has neither)
    completed = [e["uid"] for e in entries[:cut + 1] if e["event"] == "done"]
    stored = _stored_summaries(catalog, completed)
    cells = {(u, k): (units, float(v), float(e)) for u, k, units, v, e in re.findall(
        r'data-uid="([^"]+)" data-key="([^"]+)" data-units="([^"]*)" data-value="([^"]+)" '
        r'data-stderr="([^"]+)"', page)}
    pump = completed[1]
    units, value, err = cells[(pump, "damping_slope")]
    assert (value, units) == stored[pump]["damping_slope"]
    assert err == stored[pump]["damping_slope_stderr"][0] and units == "1/(s*Pa)"
    checked = 0
    for uid in completed:
        for key, (v, u) in stored[uid].items():
            if (uid, key) in cells:
                assert cells[(uid, key)][:2] == (u, v) or math.isnan(v), (uid, key)
                checked += 1
    assert checked >= 10
    # pictures of the completed steps are drawn from the store (the PSD may say it cannot
    # be: the copy's raw traces stay where the catalog recorded them, outside this copy)
    figs = _load(browser, out, may_miss=frozenset({"psd"}))
    assert {f["key"] for f in figs} == {"psd", "damping"}
    assert [f["missing"] is None for f in figs if f["key"] == "damping"] == [True]

    # the same run ended by Ctrl-C, as the runner writes it: aborted, in the marked section
    # and never among the values
    aborted = {"event": "failed", "time": entries[cut]["time"] + 1, "step": 2, "attempt": 1,
               "uid": killed, "exit_status": "abort", "reason": "interrupted by the user"}
    live2 = _live_copy(store, tmp_path, [*entries[:cut + 1], aborted], "live2")
    done = _report_while_held(live2, tmp_path / "live2.html")
    assert done.returncode == 0, done.stderr
    page = (tmp_path / "live2.html").read_text(encoding="utf-8")
    assert '<tr data-step="gains" data-status="aborted">' in page
    section = page[page.index('data-section="left-out"'):]
    assert f'data-left-out="{killed}" data-status="aborted"' in section
    assert "interrupted by the user" in section
    assert f'data-uid="{killed}" data-key' not in page


def test_running_campaign_without_a_store_in_a_browser(tmp_path: Path, browser) -> None:
    """Fast: a campaign whose process holds the directory and whose runs have not reached
    the store yet is reported from its ledger; the page loads in Chromium with no console
    error and no request, with the steps as the ledger has them and the values of the
    completed steps as the ledger recorded them."""
    from quietwell.report import write_report

    entries = read_ledger(LEDGER)
    live = tmp_path / "live"
    folder = live / "campaigns" / entries[0]["campaign_id"]
    folder.mkdir(parents=True)
    shutil.copyfile(LEDGER, folder / "ledger.jsonl")
    (live / "catalog").mkdir()
    out = tmp_path / "live.html"
    with open(live / "catalog" / "catalog.lock", "w") as lock:  # as the catalog process does
        fcntl.flock(lock.fileno(), fcntl.LOCK_EX)
        lock.write("4242")
        lock.flush()
        data = write_report(live, out)
    assert data.running_pid == "4242"
    assert _load(browser, out) == []  # no picture without a store
    assert browser.title.startswith("report-small")
    rows = browser.execute_script(
        "return Array.from(document.querySelectorAll('tr[data-step]'))"
        ".map(r => [r.dataset.step, r.dataset.status]);")
    assert dict(rows) == {"thermal": "completed", "pumpdown": "completed", "gains": "running",
                          "reheat-1e-6": "never reached", "reheat-1e-7": "never reached",
                          "reheat-1e-8": "never reached", "sidebands": "never reached"}
    assert "still running (process 4242" in browser.find_element("css selector", "main").text
    cells = browser.execute_script(_CELLS)
    done = [e for e in entries if e["event"] == "done"]
    expected = {(e["uid"], k): float(v) for e in done for k, v in e["summary"].items()
                if isinstance(v, (int, float)) and not isinstance(v, bool)
                and not k.endswith("_stderr")}
    shown = {(c["uid"], c["key"]): float(c["value"]) for c in cells if c["value"] is not None}
    assert shown.keys() == expected.keys() and expected
    for key, value in expected.items():
        assert shown[key] == value or (math.isnan(value) and math.isnan(shown[key])), key
