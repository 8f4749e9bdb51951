"""The catalog process of the embedded store: ``python -m quietwell.store._serve``.

Arguments: the catalog directory, the raw-trace directory (listed in the server's
readable storage), the writer's backup directory, its batch size and the pid of the
process that starts this one (the parent).

The process runs the tiled server and the ``TiledWriter`` that fills it. The parent
sends the documents of its runs on standard input, one line ``<uid>\t[name, doc]``
each (the run's uid, a tab, the JSON text it journals), in the order they were
emitted. On standard output the process writes, each on its own line,

* ``uri <URI>`` once, when the server is up (the URI carries the API key);
* ``done <uid>`` after the stop document of a run is written, or
  ``failed <uid> <reason>`` if the writer could not take some document of it (the
  rest of that run is skipped; the parent's journal still holds all of it).

Everything the server itself prints goes to standard error (the parent sends it to
``DIR/catalog/server.log``). End of file on standard input ends the process, after the
queued documents are written: the parent closes the pipe to stop it.

If the parent dies instead (killed, crashed), the process stops after the document in
hand, closes the server and exits, within a second or so (:mod:`quietwell._lifeline`
tells it; the pipe alone would not, if another process shares its write end, e.g. a
fork of the parent). It does not write what is still queued: no one would mark those
runs complete in the parent's journal, so ``quietwell recover`` rebuilds them from the
journal anyway. If closing takes longer than :data:`_ORPHAN_GRACE_S`, it ends at once.

Its own process gives the catalog its own interpreter lock and the second core: the
writer's and the server's work no longer compete with the acquisition for the lock.
A thread reads standard input into an unbounded queue as fast as the lines arrive, so
the parent never blocks on a full pipe while the writer is busy with an HTTP request
(64 KiB of pipe is about 40 records of documents, and one batch of requests takes
longer than that many records on the bench); the parent's journal is the durable copy.
"""

from __future__ import annotations

import gc
import json
import os
import queue
import signal
import sys
import threading
import time

from quietwell._lifeline import follow_parent

#: Seconds the process may take to close once its parent has died, before it just ends.
_ORPHAN_GRACE_S = 5.0


#: Seconds to wait for another catalog process of the same data directory to end (one
#: whose parent was just killed finishes within a few seconds).
_LOCK_WAIT_S = float(os.environ.get("QUIETWELL_CATALOG_LOCK_WAIT", "30"))


def _lock_catalog(catalog_dir: str):
    """An exclusive lock on ``catalog_dir`` for this process's life, or None.

    Two catalog processes on one SQLite catalog would interleave their writes: a second
    ``quietwell run`` on the same data directory, or a resume started while the killed
    campaign's catalog process still finishes, waits here and then gives up with a line
    in the log that names the process holding the directory.
    """
    import fcntl

    path = os.path.join(catalog_dir, "catalog.lock")
    f = open(path, "a+")  # noqa: SIM115 - held for the life of the process
    t0 = time.monotonic()
    while True:
        try:
            fcntl.flock(f.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
            break
        except BlockingIOError:
            if time.monotonic() - t0 > _LOCK_WAIT_S:
                f.seek(0)
                holder = f.read().strip() or "unknown"
                print(f"the data directory is in use by another quietwell process (pid "
                      f"{holder}); stop it, or use another --data-dir", file=sys.stderr,
                      flush=True)
                return None
            time.sleep(0.2)
    f.seek(0)
    f.truncate()
    f.write(str(os.getppid()))
    f.flush()
    return f


def main(argv: list[str]) -> int:
    if argv[:1] == ["--remote"]:
        return remote_main(argv[1:])
    if len(argv) != 5 or not argv[4].isdigit():
        print("usage: python -m quietwell.store._serve CATALOG_DIR RAW_DIR BACKUP_DIR BATCH "
              "PARENT_PID", file=sys.stderr)
        return 2
    catalog_dir, raw_dir, backup_dir, batch, parent = argv
    # Ctrl-C in a terminal, a service manager's stop and `timeout` signal the whole
    # process group: the parent decides how a run ends and closes the pipe, after which
    # this process finishes what it was given. A signal here would lose that.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    lines: queue.SimpleQueue = queue.SimpleQueue()
    orphaned = threading.Event()

    def parent_died() -> None:
        orphaned.set()
        lines.put(None)  # wakes the loop below if it waits for input
        time.sleep(_ORPHAN_GRACE_S)
        print(f"quietwell catalog: the parent process {parent} died and closing took more "
              f"than {_ORPHAN_GRACE_S:g} s; ending now", file=sys.stderr, flush=True)
        os._exit(1)

    follow_parent(int(parent), parent_died)  # before the imports: they take seconds
    lock = _lock_catalog(catalog_dir)
    if lock is None:
        return 3
    # Replies go to the original stdout; the server's own output to stderr.
    replies = os.fdopen(os.dup(1), "w")
    os.dup2(2, 1)
    # The raw files are written in single-writer-multiple-reader mode by another
    # process while the server may read them.
    os.environ["TILED_HDF5_SWMR_DEFAULT"] = "1"
    from bluesky_tiled_plugins import TiledWriter
    from tiled.client import from_uri
    from tiled.server import SimpleTiledServer

    if orphaned.is_set():  # the parent died while this process started
        return 1

    def reply(text: str) -> None:
        try:
            replies.write(text + "\n")
            replies.flush()
        except OSError:  # the pipe is broken: the parent is gone
            orphaned.set()

    with SimpleTiledServer(directory=catalog_dir, readable_storage=[raw_dir]) as server:
        writer = TiledWriter(from_uri(server.uri), batch_size=int(batch),
                             backup_directory=backup_dir)
        reply(f"uri {server.uri}")
        failed: dict[str, str] = {}

        def read_input() -> None:
            for text in sys.stdin:
                lines.put(text)
            lines.put(None)  # end of input: the parent closed the pipe

        threading.Thread(target=read_input, name="quietwell-catalog-input", daemon=True).start()
        while (line := lines.get()) is not None and not orphaned.is_set():
            uid, _, payload = line.partition("\t")
            name, doc = json.loads(payload)
            if uid not in failed:
                try:
                    writer(name, doc)
                except Exception as exc:  # reported to the parent at the run's stop
                    failed[uid] = " ".join(repr(exc).split())
            if name == "stop":
                reason = failed.pop(uid, None)
                reply(f"done {uid}" if reason is None else f"failed {uid} {reason}")
        if orphaned.is_set():
            left = 0
            while not lines.empty():
                left += lines.get() is not None
            print(f"quietwell catalog: the parent process {parent} died; stopping with "
                  f"{left} document line(s) not written (the parent's journal holds them: "
                  "`quietwell recover` rebuilds those runs)", file=sys.stderr, flush=True)
    if orphaned.is_set():
        try:
            replies.close()
        except OSError:
            pass
        return 1
    return 0


# --- the lab's server instead of an embedded one ---------------------------------------

#: Seconds, once the parent has closed the pipe, to wait for an unreachable server
#: before the runs still to write are reported failed (their journals keep them).
_CLOSING_OUTAGE_S = float(os.environ.get("QUIETWELL_CATALOG_OUTAGE_WAIT", "60"))
#: Seconds between attempts to reach a server that stopped answering.
_OUTAGE_POLL_S = 2.0


def map_raw(name: str, doc: dict, local: str, server: str) -> dict:
    """``doc`` with a stream resource's file under folder ``local`` moved to ``server``."""
    if name != "stream_resource" or local == server:
        return doc
    uri = str(doc.get("uri", ""))
    for scheme in ("file://localhost", "file://"):
        if uri.startswith(scheme):
            path = uri[len(scheme):]
            head = local.rstrip("/") + "/"
            if path.startswith(head):
                return {**doc, "uri": scheme + server.rstrip("/") + "/" + path[len(head):]}
            break
    return doc


def remote_main(argv: list[str]) -> int:
    """``--remote CATALOG_DIR URI KEY_ENV BATCH RAW_LOCAL RAW_SERVER PARENT_PID``.

    The same protocol on standard input and output as the embedded mode, with the lab's
    tiled server at URI (its API key in the environment variable KEY_ENV, or "-" for
    none) instead of a server of its own. The documents of the run in hand are kept
    until its stop is written: if the server stops answering, the process waits for
    it (the acquisition goes on; its journal is the durable copy), then deletes the
    partial run there and writes the whole run again. Stream resources under
    RAW_LOCAL are registered under RAW_SERVER (the folder as the server sees it).
    """
    if len(argv) != 7 or not argv[6].isdigit():
        print("usage: python -m quietwell.store._serve --remote CATALOG_DIR URI KEY_ENV BATCH "
              "RAW_LOCAL RAW_SERVER PARENT_PID", file=sys.stderr)
        return 2
    catalog_dir, uri, key_env, batch, raw_local, raw_server, parent = argv
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    signal.signal(signal.SIGTERM, signal.SIG_IGN)
    lines: queue.SimpleQueue = queue.SimpleQueue()
    orphaned, closing = threading.Event(), threading.Event()

    def parent_died() -> None:
        orphaned.set()
        lines.put(None)
        time.sleep(_ORPHAN_GRACE_S)
        os._exit(1)

    follow_parent(int(parent), parent_died)
    lock = _lock_catalog(catalog_dir)
    if lock is None:
        return 3
    replies = os.fdopen(os.dup(1), "w")
    os.dup2(2, 1)
    # Fail fast inside tiled's client: this process does its own waiting for the server.
    os.environ.setdefault("TILED_RETRY_ATTEMPTS", "2")
    os.environ.setdefault("TILED_RETRY_TIMEOUT", "5")
    import httpx
    from bluesky_tiled_plugins import TiledWriter
    from tiled.client import from_uri

    api_key = os.environ.get(key_env) if key_env != "-" else None

    def mapped(name: str, doc: dict) -> dict:
        return map_raw(name, doc, raw_local, raw_server)

    def reply(text: str) -> None:
        try:
            replies.write(text + "\n")
            replies.flush()
        except OSError:
            orphaned.set()

    def log(text: str) -> None:
        print(f"{time.strftime('%Y-%m-%d %H:%M:%S')} quietwell catalog: {text}",
              file=sys.stderr, flush=True)

    def answers() -> bool:
        try:
            r = httpx.get(f"{uri}/api/v1/", timeout=5.0)
            return r.status_code < 500
        except httpx.HTTPError:
            return False

    try:
        client = from_uri(uri, api_key=api_key)
    except Exception as exc:  # noqa: BLE001 - the parent checked the server just before
        print(f"quietwell: the catalog server at {uri} could not be opened "
              f"({type(exc).__name__}); check it and start again", file=sys.stderr, flush=True)
        return 1
    new_writer = lambda: TiledWriter(client, batch_size=int(batch))  # noqa: E731
    writer = new_writer()
    reply(f"uri {uri}")
    failed: dict[str, str] = {}
    held: dict[str, list] = {}  # the documents of the runs not yet stopped
    gave_up = False

    def read_input() -> None:
        for text in sys.stdin:
            lines.put(text)
        closing.set()
        lines.put(None)

    threading.Thread(target=read_input, name="quietwell-catalog-input", daemon=True).start()

    def wait_for_server() -> bool:
        nonlocal gave_up
        log(f"the server {uri} does not answer; waiting for it (the runs are kept in the "
            "journal)")
        closed_at = None
        while not orphaned.is_set():
            if answers():
                log(f"the server {uri} answers again; writing the held runs")
                return True
            if closing.is_set():
                closed_at = closed_at or time.monotonic()
                if time.monotonic() - closed_at > _CLOSING_OUTAGE_S:
                    gave_up = True
                    log(f"gave up waiting for {uri} after {_CLOSING_OUTAGE_S:g} s at close")
                    return False
            time.sleep(_OUTAGE_POLL_S)
        return False

    def write(uid: str, name: str, doc: dict) -> None:
        nonlocal writer
        try:
            writer(name, doc)
            return
        except Exception as exc:  # noqa: BLE001 - sorted out below
            outage = isinstance(exc, httpx.TransportError) or not answers()
            if not outage:
                failed[uid] = " ".join(repr(exc).split())
                return
        while True:  # the server went away: wait, then write the whole run again
            if gave_up or not wait_for_server():
                failed[uid] = "the catalog server did not answer"
                return
            writer = new_writer()
            try:
                if uid in client:
                    client.delete_contents(uid, recursive=True, external_only=False)
                for n, d in held.get(uid, []):
                    writer(n, d)
                return
            except Exception as exc:  # noqa: BLE001
                if isinstance(exc, httpx.TransportError) or not answers():
                    continue
                failed[uid] = " ".join(repr(exc).split())
                return

    while (line := lines.get()) is not None and not orphaned.is_set():
        uid, _, payload = line.partition("\t")
        name, doc = json.loads(payload)
        doc = mapped(name, doc)
        if uid:
            held.setdefault(uid, []).append((name, doc))
        if uid not in failed:
            if gave_up:
                failed[uid] = "the catalog server did not answer"
            else:
                write(uid, name, doc)
        if name == "stop":
            held.pop(uid, None)
            reason = failed.pop(uid, None)
            reply(f"done {uid}" if reason is None else f"failed {uid} {reason}")
    if orphaned.is_set():
        return 1
    return 0


if __name__ == "__main__":
    code = main(sys.argv[1:])
    # The interpreter's last garbage collection walks the whole heap of tiled, pyarrow
    # and duckdb (1-3 s measured) while the parent waits in EmbeddedStore.close(); the
    # server has closed its storage and the replies are flushed, so nothing there needs
    # a finalizer (atexit handlers, e.g. logging's, still run).
    gc.freeze()
    sys.exit(code)
