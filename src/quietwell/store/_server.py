"""The store of a setup whose profile points at the lab's shared catalog server.

``[data] store = "server"`` in ``profiles/<setup>/setup.toml`` (see
:class:`quietwell.setup.DataSpec`). The acquisition works as with the embedded store:
every document is journalled in ``DATA_DIR/journal`` first and passed to a catalog
process of its own (:func:`quietwell.store._serve.remote_main`), which writes it to
the lab's tiled server with the API key from the environment variable the profile
names. The HDF5 traces go to the profile's ``raw_dir``, which the server reads (a
shared folder, or one a sync tool copies there).

Before anything is written, :meth:`ServerStore.open` checks the server: it answers,
it is a tiled server, it asks for a key (or the profile allows a server that does
not), it takes this key, its catalog answers, and no other setup of the same name
writes there (:func:`check_setup_claim`). Each failure is one line saying what is
wrong and what to do. The key itself is never written anywhere: not into the data
directory, a run, the ledger, a log or a message.
"""

from __future__ import annotations

import json
import os
from pathlib import Path
from typing import Any

from .._errors import InputError, QuietwellError
from ._embedded import EmbeddedStore, _CatalogProcess, _StoreWriter, make_store_dirs
from ._journal import Journal

__all__ = ["CatalogServerError", "ServerStore", "check_server", "check_setup_claim", "explain_http_error",
           "open_store", "store_for_data_dir"]

_PROBE_TIMEOUT_S = 10.0


class CatalogServerError(QuietwellError):
    """The lab's catalog server is not there, refuses the key, or cannot be used."""


def _key(spec) -> str | None:
    if not spec.api_key_env:
        return None
    key = os.environ.get(spec.api_key_env, "")
    if not key:
        raise InputError(f"[data] api_key_env = {spec.api_key_env!r}: the environment variable "
                         f"{spec.api_key_env} is not set; set it to the API key of the catalog "
                         f"server {spec.uri} (ask whoever runs it)")
    return key


def check_server(spec, where: str = "[data]") -> str | None:
    """Check the catalog server of ``spec`` (a DataSpec) before any run; return the key.

    Raises :class:`CatalogServerError` (one line) if it does not answer, is not a tiled
    server, lets anyone in without ``allow_unauthenticated``, refuses the key, or
    cannot reach its catalog database.
    """
    import httpx

    key = _key(spec)
    uri = spec.uri
    base = f"{where} uri = {uri!r}"
    try:
        r = httpx.get(f"{uri}/api/v1/", timeout=_PROBE_TIMEOUT_S)
    except httpx.HTTPError as exc:
        why = " ".join(str(exc).split()) or type(exc).__name__
        raise CatalogServerError(f"{base}: no catalog server answers there ({why}); start it "
                                 "(quietwell lab-catalog serve, see the README, \"Lab "
                                 "deployment\") or fix the uri; no run was started") from None
    try:
        about = r.json()
        ok = r.status_code == 200 and "api_version" in about
    except ValueError:
        ok = False
    if not ok:
        raise CatalogServerError(f"{base}: the server there is not a tiled catalog server "
                                 f"(HTTP {r.status_code} on /api/v1/); fix the uri; no run was "
                                 "started")
    try:
        anon = httpx.get(f"{uri}/api/v1/metadata/", timeout=_PROBE_TIMEOUT_S)
    except httpx.HTTPError as exc:
        raise CatalogServerError(f"{base}: the server stopped answering ({type(exc).__name__}); "
                                 "check it and start again; no run was started") from None
    if anon.status_code == 200 and not spec.allow_unauthenticated:
        raise CatalogServerError(f"{base}: the server asks for no API key, so anyone who reaches "
                                 "it can change the lab's runs; switch its authentication on "
                                 "(deploy/lab-catalog.yml), or accept this with "
                                 "allow_unauthenticated = true in [data]; no run was started")
    if key is None:
        if anon.status_code in (401, 403):
            raise CatalogServerError(f"{base}: the server asks for an API key and [data] names "
                                     "none; set api_key_env to the name of the environment "
                                     "variable that holds it; no run was started")
        status = anon.status_code
    else:
        try:
            status = httpx.get(f"{uri}/api/v1/metadata/", timeout=_PROBE_TIMEOUT_S,
                               headers={"Authorization": f"Apikey {key}"}).status_code
        except httpx.HTTPError as exc:
            raise CatalogServerError(f"{base}: the server stopped answering "
                                     f"({type(exc).__name__}); check it and start again; no "
                                     "run was started") from None
        if status in (401, 403):
            raise CatalogServerError(f"{base}: the server refused the API key in "
                                     f"{spec.api_key_env} (HTTP {status}); set {spec.api_key_env}"
                                     " to the server's key; no run was started")
    if status >= 500:
        raise CatalogServerError(f"{base}: the server answers but its catalog does not (HTTP "
                                 f"{status}): its database is missing, not initialised or down "
                                 "(see the server's log; quietwell lab-catalog init); no run "
                                 "was started")
    if status != 200:
        raise CatalogServerError(f"{base}: unexpected HTTP {status} from the server's catalog; "
                                 "check the server's log; no run was started")
    return key


def check_setup_claim(client: Any, setup: Any) -> None:
    """Refuse a setup whose name another profile already writes under in the catalog.

    The rule: in a shared catalog a setup name stands for one profile. The latest run
    of that name carries its ``setup_sha256``; a profile with another sha256 is
    refused, unless its ``[data] supersedes`` names the sha256 it replaces (after an
    intentional change of the setup; the message gives the exact line). The same name
    with the same description is the same setup.
    """
    from tiled.queries import Key

    if setup is None:
        return
    runs = client.search(Key("start.setup") == setup.name)
    if len(runs) == 0:
        return
    last = runs.values().last()
    theirs = str(last.metadata.get("start", {}).get("setup_sha256", ""))
    if not theirs or theirs == setup.sha256:
        return
    claim = setup.data.supersedes
    if claim and theirs.startswith(claim):
        return
    raise CatalogServerError(
        f"{setup.source}: setup name {setup.name!r} is already used in the catalog "
        f"{setup.data.uri} by another description (sha256 {theirs[:12]}, this profile "
        f"{setup.sha256[:12]}); if this profile is a new version of that setup, add "
        f'supersedes = "{theirs[:12]}" to its [data]; if it is another setup, give it its own '
        "[setup] name; no run was started")


class ServerStore(EmbeddedStore):
    """A store whose catalog is the lab's tiled server (``[data] store = "server"``).

    The same interface as :class:`EmbeddedStore` (``open``, ``writer``, ``client``,
    ``wait``, ``recover``, ``close``, ``raw_dir``, ``journal_dir``, ``data_dir``). The
    local data directory holds the journal, the catalog process's log
    (``DATA_DIR/catalog/server.log``), ``store.json`` (where the runs go, never the key)
    and the campaigns' ledgers; the traces go to ``[data] raw_dir``.
    """

    def __init__(self, data_dir: str | Path, spec: Any, *, setup: Any = None,
                 batch_size: int = 100) -> None:
        super().__init__(data_dir, batch_size=batch_size)
        self.spec, self.setup = spec, setup
        if spec.raw_dir:
            self.raw_dir = Path(spec.raw_dir).expanduser().resolve()
        self.server_raw_dir = Path(spec.server_raw_dir).expanduser() if spec.server_raw_dir \
            else self.raw_dir

    def open(self) -> ServerStore:
        """Check the server, then start the catalog process (idempotent)."""
        if self._server is not None:
            return self
        from tiled.client import from_uri

        key = check_server(self.spec)
        try:
            client = from_uri(self.spec.uri, api_key=key)
        except Exception as exc:  # noqa: BLE001 - checked a moment ago: report in one line
            raise CatalogServerError(f"[data] uri = {self.spec.uri!r}: opening the catalog "
                                     f"failed ({explain_http_error(exc)}); no run was "
                                     "started") from None
        check_setup_claim(client, self.setup)
        make_store_dirs(self, "choose a writable --data-dir, or fix [data] raw_dir")
        self._write_store_json()
        from bluesky_tiled_plugins import TiledWriter

        journal = Journal(self.journal_dir)
        self._server = _CatalogProcess(
            self.catalog_dir,
            ["--remote", str(self.catalog_dir), self.spec.uri, self.spec.api_key_env or "-",
             str(self.batch_size), str(self.raw_dir),
             str(self.server_raw_dir)], on_done=journal.finish)
        self._uri = self.spec.uri
        import atexit

        atexit.register(self.close)
        self._client = client
        from ._serve import map_raw

        local, server = str(self.raw_dir), str(self.server_raw_dir)

        def factory():
            w = TiledWriter(self._client, batch_size=self.batch_size)
            return lambda name, doc: w(name, map_raw(name, doc, local, server))

        self._writer_factory = factory
        self.writer = _StoreWriter(journal, self._server)
        return self

    def _write_store_json(self) -> None:
        s = self.spec
        info = {"store": "server", "uri": s.uri, "api_key_env": s.api_key_env,
                "raw_dir": str(self.raw_dir), "server_raw_dir": str(self.server_raw_dir),
                "raw_transfer": s.raw_transfer, "allow_unauthenticated": s.allow_unauthenticated,
                "setup": getattr(self.setup, "name", None)}
        path = self.data_dir / "store.json"
        tmp = path.with_suffix(".tmp")
        tmp.write_text(json.dumps(info, indent=1) + "\n", encoding="utf-8")
        tmp.replace(path)


def open_store(setup: Any, data_dir: str | Path, *, batch_size: int = 100) -> EmbeddedStore:
    """The open store the profile's ``[data]`` asks for: embedded (default) or server."""
    spec = getattr(setup, "data", None)
    if spec is None or spec.store == "embedded":
        return EmbeddedStore(data_dir, batch_size=batch_size).open()
    return ServerStore(data_dir, spec, setup=setup, batch_size=batch_size).open()


def store_for_data_dir(data_dir: str | Path) -> EmbeddedStore | None:
    """A server store as recorded in ``DATA_DIR/store.json`` (None: an embedded store)."""
    from ..setup import DataSpec

    path = Path(data_dir).expanduser() / "store.json"
    if not path.exists():
        return None
    info = json.loads(path.read_text(encoding="utf-8"))
    spec = DataSpec(store="server", uri=info["uri"], api_key_env=info.get("api_key_env", ""),
                    raw_dir=info.get("raw_dir", ""), server_raw_dir=info.get("server_raw_dir", ""),
                    raw_transfer=info.get("raw_transfer", "shared"),
                    allow_unauthenticated=bool(info.get("allow_unauthenticated")))
    return ServerStore(data_dir, spec)


def explain_http_error(exc: BaseException) -> str:
    """One line for an error of tiled's client (HTTP status or connection), no secrets."""
    import httpx

    if isinstance(exc, httpx.HTTPStatusError):
        code = exc.response.status_code
        if code == 500:
            return ("the catalog server could not read this run's data (HTTP 500): its raw "
                    "HDF5 file has not reached the server's readable folder yet (a synced "
                    "raw_dir copies it later) or that folder is not in the server's "
                    "readable_storage; wait for the sync and read again, or check the server's "
                    "log")
        if code in (401, 403):
            return (f"the catalog server refused the API key (HTTP {code}); set the "
                    "environment variable named by [data] api_key_env (or --api-key-env) to "
                    "the server's key")
        if code == 404:
            return f"not found in the catalog (HTTP 404: {exc.request.url.path})"
        return f"the catalog server answered HTTP {code} for {exc.request.url.path}"
    if isinstance(exc, httpx.TransportError):
        return (f"the catalog server does not answer ({type(exc).__name__}); check that it "
                "runs (quietwell lab-catalog serve) and the address")
    return " ".join(str(exc).split()) or type(exc).__name__
