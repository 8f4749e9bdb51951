"""The embedded store: batched catalog writes, a journal that loses nothing, recovery."""

from __future__ import annotations

import pathlib

import bluesky.plans as bp
import numpy as np
import pytest
from bluesky import RunEngine
from ophyd.sim import det

import quietwell
from quietwell import InputError
from quietwell.store import EmbeddedStore


def test_run_survives_a_writer_that_dies_mid_run(tmp_path):
    RE = RunEngine({}, context_managers=[])
    with EmbeddedStore(tmp_path, batch_size=10) as st:
        delivered = {"n": 0}
        catalog = st._writer_factory()

        def dying_process(name, doc):
            # the journal sees every document; the catalog writer stops after the 3rd,
            # as if the process had been killed (its batched rows never flushed)
            delivered["n"] += 1
            st.writer.journal(name, doc)
            if delivered["n"] <= 3:
                catalog(name, doc)

        RE.subscribe(dying_process)
        (uid,) = RE(bp.count([det], num=6))
        journal = pathlib.Path(st.journal_dir) / f"{uid}.done.jsonl"
        lines = journal.read_text().splitlines()
        # a killed process never writes the stop document
        journal.unlink()
        (pathlib.Path(st.journal_dir) / f"{uid}.jsonl").write_text("\n".join(lines[:-1]) + "\n")
        assert st.recover() == [uid]
        run = st.client[uid]
        assert run.metadata["stop"]["exit_status"] == "abort"
        assert "recovered" in run.metadata["stop"]["reason"]
        assert np.asarray(run["primary"].read()["det"]).size == 6


def test_a_run_the_catalog_refuses_stays_in_the_journal_and_is_recovered(tmp_path):
    import time
    import uuid

    from quietwell import QuietwellError

    with EmbeddedStore(tmp_path) as st:
        uid = str(uuid.uuid4())
        now = time.time()
        st.writer("start", {"uid": uid, "time": now, "plan_name": "broken"})
        # an event of a descriptor the catalog never saw: the catalog writer fails
        st.writer("event", {"uid": str(uuid.uuid4()), "descriptor": str(uuid.uuid4()),
                            "time": now, "seq_num": 1, "data": {}, "timestamps": {},
                            "filled": {}})
        # the acquisition does not wait for the catalog: the stop returns at once ...
        st.writer("stop", {"uid": str(uuid.uuid4()), "run_start": uid, "time": now,
                           "exit_status": "success", "num_events": {}})
        # ... and reading through the store reports the refused run, once
        with pytest.raises(QuietwellError, match=f"{uid}.*quietwell recover --data-dir"):
            st.wait()
        st.wait()
        assert (pathlib.Path(st.journal_dir) / f"{uid}.jsonl").exists()
        # the next run goes through as usual
        RE = RunEngine({}, context_managers=[])
        RE.subscribe(st.writer)
        (ok,) = RE(bp.count([det], num=2))
        assert np.asarray(st.client[ok]["primary"].read()["det"]).size == 2
        assert (pathlib.Path(st.journal_dir) / f"{ok}.done.jsonl").exists()


def test_open_catalog_reads_a_closed_store_back(tmp_path):
    RE = RunEngine({}, context_managers=[])
    with EmbeddedStore(tmp_path) as st:
        RE.subscribe(st.writer)
        (uid,) = RE(bp.count([det], num=2), plan_tag="readback")
    client = quietwell.open_catalog(tmp_path)
    assert client[uid].metadata["start"]["plan_tag"] == "readback"


def test_bad_data_dir_is_one_line(tmp_path):
    f = tmp_path / "afile"
    f.write_text("x")
    with pytest.raises(InputError, match="is a file, not a directory"):
        EmbeddedStore(f).open()
    with pytest.raises(InputError, match="not a quietwell data directory"):
        quietwell.open_catalog(tmp_path / "empty")
    with pytest.raises(InputError, match="batch_size=0"):
        EmbeddedStore(tmp_path, batch_size=0)


def test_a_catalog_process_that_dies_loses_nothing(tmp_path):
    from quietwell import QuietwellError

    RE = RunEngine({}, context_managers=[])
    st = EmbeddedStore(tmp_path).open()
    RE.subscribe(st.writer)
    st._server.proc.kill()  # as if the catalog process crashed between runs
    st._server.proc.wait()
    with pytest.raises(QuietwellError, match="catalog process has ended"):
        RE(bp.count([det], num=3))
    (journal,) = pathlib.Path(st.journal_dir).glob("*.jsonl")
    uid = journal.stem
    assert st.close() == {uid: "the catalog process ended before writing it"}
    with EmbeddedStore(tmp_path) as again:
        assert again.recover() == [uid]
        run = again.client[uid]
        assert np.asarray(run["primary"].read()["det"]).size == 3
        # the run itself completed: the journal holds its own stop document
        assert run.metadata["stop"]["exit_status"] == "success"


def test_two_stores_on_one_data_directory_are_refused(tmp_path, monkeypatch):
    # two catalog processes on one SQLite catalog would interleave their writes
    monkeypatch.setenv("QUIETWELL_CATALOG_LOCK_WAIT", "1")
    from quietwell import QuietwellError

    with EmbeddedStore(tmp_path):
        with pytest.raises(QuietwellError, match="in use by another quietwell process"):
            EmbeddedStore(tmp_path).open()
    with EmbeddedStore(tmp_path):  # free again once the first is closed
        pass
