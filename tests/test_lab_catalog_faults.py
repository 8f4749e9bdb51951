"""Bad input and faults of the lab catalog: each is one line that says what is wrong and
what to do, and no run starts writing into nothing (README, "Lab deployment")."""

from __future__ import annotations

import dataclasses
import http.server
import json
import os
import subprocess
import sys
import threading
import time

import pytest
from lab_server import CONFIG, ROOT, free_port, server_profile

TINY = ROOT / "tests" / "data" / "tiny-campaign.toml"


def _refused(lab, tmp_path, prof, env_extra: dict) -> str:
    """Run the campaign CLI and return its one line of error; check nothing started."""
    env = {k: v for k, v in lab.env.items() if not k.startswith(("QUIETWELL_LAB_", "PGUSER"))}
    env.pop("QWTEST_KEY", None)
    env.update(env_extra)
    data = tmp_path / "data"
    done = subprocess.run([sys.executable, "-m", "quietwell.cli", "run", str(TINY), "--setup",
                           str(prof), "--data-dir", str(data)], env=env, capture_output=True,
                          text=True, cwd=ROOT, timeout=300)
    assert done.returncode == 2, done.stderr
    lines = [x for x in done.stderr.splitlines() if x.startswith("quietwell run: error:")]
    assert len(lines) == 1 and "Traceback" not in done.stderr, done.stderr
    assert not list((data / "journal").glob("*.jsonl")) if (data / "journal").exists() else True
    assert lab.key not in done.stderr + done.stdout
    return lines[0]


def test_a_server_that_is_down_or_a_wrong_uri(lab, tmp_path):
    prof = server_profile(tmp_path, "amber", lab)
    text = (prof / "setup.toml").read_text().replace(lab.uri, f"http://127.0.0.1:{free_port()}")
    (prof / "setup.toml").write_text(text)
    line = _refused(lab, tmp_path, prof, {"QWTEST_KEY": lab.key})
    assert "no catalog server answers there" in line and "lab-catalog serve" in line
    assert "no run was started" in line


def test_a_refused_key(lab, tmp_path):
    prof = server_profile(tmp_path, "amber", lab)
    line = _refused(lab, tmp_path, prof, {"QWTEST_KEY": "WrongKey123456789"})
    assert "refused the API key in QWTEST_KEY" in line and "HTTP 401" in line


def test_a_key_variable_that_is_not_set(lab, tmp_path):
    prof = server_profile(tmp_path, "amber", lab)
    line = _refused(lab, tmp_path, prof, {})
    assert "QWTEST_KEY is not set" in line


def test_two_profiles_claiming_one_setup_name(lab, tmp_path):
    """A second profile of another description under a name the catalog already has
    is refused before its first run; supersedes = <old sha256 prefix> accepts it."""
    from event_model import compose_run

    from quietwell.setup import load_setup
    from quietwell.store import CatalogServerError, ServerStore
    from quietwell.store._server import check_setup_claim

    os.environ["QWTEST_KEY"] = lab.key
    try:
        first = load_setup(server_profile(tmp_path, "ash", lab, source="amber"))
        with ServerStore(tmp_path / "d1", first.data, setup=first) as store:
            b = compose_run(metadata={"setup": "ash", "setup_sha256": first.sha256})
            store.writer("start", b.start_doc)
            store.writer("stop", b.compose_stop())
        other = load_setup(server_profile(tmp_path, "ash", lab, source="cobalt"))
        assert other.sha256 != first.sha256
        with pytest.raises(CatalogServerError) as info:
            ServerStore(tmp_path / "d2", other.data, setup=other).open()
        msg = str(info.value)
        assert "'ash' is already used" in msg and f'supersedes = "{first.sha256[:12]}"' in msg
        assert "\n" not in msg and not (tmp_path / "d2" / "journal").exists()
        newer = dataclasses.replace(other, data=dataclasses.replace(
            other.data, supersedes=first.sha256[:12]))
        check_setup_claim(lab.client(), newer)  # accepted
        check_setup_claim(lab.client(), first)  # the same description: the same setup
    finally:
        os.environ.pop("QWTEST_KEY", None)


class _OpenServer(http.server.BaseHTTPRequestHandler):
    """Answers like a tiled server without authentication (every request allowed)."""

    def do_GET(self):  # noqa: N802 - http.server's hook
        body = json.dumps({"api_version": 0} if self.path == "/api/v1/" else {"data": {}})
        self.send_response(200)
        self.send_header("Content-Type", "application/json")
        self.end_headers()
        self.wfile.write(body.encode())

    def log_message(self, *args):
        pass


def test_a_server_without_authentication_is_refused_unless_allowed():
    from quietwell.setup import DataSpec
    from quietwell.store import CatalogServerError
    from quietwell.store._server import check_server

    httpd = http.server.HTTPServer(("127.0.0.1", 0), _OpenServer)
    threading.Thread(target=httpd.serve_forever, daemon=True).start()
    uri = f"http://127.0.0.1:{httpd.server_address[1]}"
    try:
        with pytest.raises(CatalogServerError, match="asks for no API key"):
            check_server(DataSpec(store="server", uri=uri, api_key_env="PATH"))
        assert check_server(DataSpec(store="server", uri=uri, allow_unauthenticated=True)) is None
    finally:
        httpd.shutdown()


def test_profile_data_section_is_checked():
    from quietwell import InputError
    from quietwell.setup import setup_from_dict
    from quietwell.setup._schema import _data_spec, _Section

    def spec(**kw):
        return _data_spec(_Section(kw, "data", "p.toml"))

    assert spec().store == "embedded"
    with pytest.raises(InputError, match="api_key_env is missing"):
        spec(store="server", uri="http://h:1")
    assert spec(store="server", uri="http://h:1", allow_unauthenticated=True).api_key_env == ""
    with pytest.raises(InputError, match="holds a credential"):
        spec(store="server", uri="http://u:secret@h:1", api_key_env="K")
    with pytest.raises(InputError, match="NAME of an environment variable"):
        spec(store="server", uri="http://h:1", api_key_env="abc-123-key")
    with pytest.raises(InputError, match="only used with store"):
        spec(uri="http://h:1")
    with pytest.raises(InputError, match="expected the catalog server's address"):
        spec(store="server", uri="h:1", api_key_env="K")
    assert setup_from_dict  # the loader reads [data] through the same function


def test_lab_catalog_check_refuses_an_uninitialised_database(lab, pg_admin_uri):
    """quietwell lab-catalog check: a catalog database that exists but holds no catalog
    is one line naming the database and the command that initialises it."""
    import asyncio

    import asyncpg

    name = f"qwt_empty_{time.time_ns() % 10**8}"

    async def make():
        conn = await asyncpg.connect(pg_admin_uri)
        try:
            await conn.execute(f"CREATE DATABASE {name} OWNER qwtest")
        finally:
            await conn.close()

    asyncio.run(make())
    env = {**lab.env, "QUIETWELL_LAB_CATALOG_DB": lab.catalog_db.rsplit("/", 1)[0] + "/" + name}
    done = subprocess.run([sys.executable, "-m", "quietwell.cli", "lab-catalog", "check",
                           "--config", str(CONFIG)], env=env, capture_output=True, text=True,
                          cwd=ROOT, timeout=120)
    assert done.returncode == 2, done.stderr
    assert f"{name} is not initialised" in done.stderr and "lab-catalog init" in done.stderr
    assert len(done.stderr.strip().splitlines()) == 1
    ok = subprocess.run([sys.executable, "-m", "quietwell.cli", "lab-catalog", "check",
                         "--config", str(CONFIG)], env=lab.env, capture_output=True, text=True,
                        cwd=ROOT, timeout=120)
    assert ok.returncode == 0 and "ok" in ok.stdout, ok.stderr
    bad_key = subprocess.run([sys.executable, "-m", "quietwell.cli", "lab-catalog", "check",
                              "--config", str(CONFIG)],
                             env={**lab.env, "QUIETWELL_LAB_API_KEY": "has-hyphens-123456"},
                             capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert bad_key.returncode == 2 and "letters and" in bad_key.stderr
    assert "has-hyphens" not in bad_key.stderr


def test_scram_verifier_matches_rfc_7677_example():
    """The SCRAM-SHA-256 stored key and server key for the example of RFC 7677 (section
    3: password "pencil", salt W22ZaJ0SNY7soEsUEjb6gQ==, 4096 iterations)."""
    import base64

    from quietwell.store._lab import scram_verifier

    salt = base64.b64decode("W22ZaJ0SNY7soEsUEjb6gQ==")
    v = scram_verifier("pencil", salt=salt)
    assert v.startswith("SCRAM-SHA-256$4096:W22ZaJ0SNY7soEsUEjb6gQ==$")
    # the client proof of RFC 7677 follows from these; checked here through the server
    # signature: ServerKey = HMAC(SaltedPassword, "Server Key"); verified independently:
    import hashlib
    import hmac

    salted = hashlib.pbkdf2_hmac("sha256", b"pencil", salt, 4096)
    client_first_bare = "n=user,r=rOprNGfwEbeRWgbNEkqO"
    server_first = ("r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0,"
                    "s=W22ZaJ0SNY7soEsUEjb6gQ==,i=4096")
    final_wo_proof = "c=biws,r=rOprNGfwEbeRWgbNEkqO%hvYDpWUa2RaTCAfuxFIlj)hNlF$k0"
    auth = f"{client_first_bare},{server_first},{final_wo_proof}".encode()
    server_key = base64.b64decode(v.rsplit(":", 1)[1])
    assert server_key == hmac.new(salted, b"Server Key", hashlib.sha256).digest()
    signature = hmac.new(server_key, auth, hashlib.sha256).digest()
    assert base64.b64encode(signature).decode() == "6rriTRBi23WpRR/wtup+mMhUZUn/dB5nLTJRsjl95G4="
