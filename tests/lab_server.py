"""A lab catalog server of its own for a test: fresh databases on the PostgreSQL that
.ci/services starts, ``quietwell lab-catalog serve`` on a free port, stopped (or killed
and started again) by the test. Used by tests/test_lab_catalog*.py and bench/."""

from __future__ import annotations

import os
import secrets
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
CONFIG = ROOT / "deploy" / "lab-catalog.yml"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class LabServer:
    """Databases, folders and the server process of one lab catalog."""

    def __init__(self, admin_uri: str, base: Path, *, key: str | None = None) -> None:
        from quietwell.store._lab import init_lab_catalog

        tag = secrets.token_hex(4)
        self.base = base
        self.raw = base / "shared-raw"
        self.tables = base / "tables"
        for d in (self.raw, self.tables):
            d.mkdir(parents=True, exist_ok=True)
        self.key = key or ("QwLeakProbe" + secrets.token_hex(12))
        self.db_password = "QwDbSecret" + secrets.token_hex(8)
        os.environ["QWTEST_LAB_DB_PASSWORD"] = self.db_password
        _, self.catalog_db, self.tables_db = init_lab_catalog(
            admin_uri, role="qwtest", catalog_db=f"qwt_{tag}_catalog",
            tables_db=f"qwt_{tag}_tables", password_env="QWTEST_LAB_DB_PASSWORD")
        self.port = free_port()
        self.uri = f"http://127.0.0.1:{self.port}"
        self.log = base / "lab-server.log"
        self.env = {**os.environ, "QUIETWELL_LAB_API_KEY": self.key, "PGUSER": "qwtest",
                    "QUIETWELL_LAB_DB_PASSWORD": self.db_password,
                    "QUIETWELL_LAB_CATALOG_DB": self.catalog_db,
                    "QUIETWELL_LAB_TABLES_DB": self.tables_db,
                    "QUIETWELL_LAB_TABLES_DIR": str(self.tables),
                    "QUIETWELL_LAB_RAW_DIR": str(self.raw),
                    "PYTHONPATH": f"{ROOT / 'src'}:{ROOT / 'sim_devices'}"}
        self.env.pop("PGPASSWORD", None)
        self.proc: subprocess.Popen | None = None

    def start(self, timeout: float = 90.0) -> None:
        with open(self.log, "ab") as log:
            self.proc = subprocess.Popen(
                [sys.executable, "-m", "quietwell.cli", "lab-catalog", "serve", "--config",
                 str(CONFIG), "--port", str(self.port)], env=self.env, stdout=log, stderr=log)
        import httpx

        t0 = time.monotonic()
        while time.monotonic() - t0 < timeout:
            if self.proc.poll() is not None:
                raise RuntimeError(f"lab server ended: {self.log.read_text()[-2000:]}")
            try:
                if httpx.get(f"{self.uri}/api/v1/", timeout=2).status_code == 200:
                    return
            except httpx.HTTPError:
                pass
            time.sleep(0.3)
        raise RuntimeError("lab server did not start")

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            os.kill(self.proc.pid, signal.SIGKILL)
            self.proc.wait()
        self.proc = None

    def stop(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                self.kill()
        self.proc = None

    def client(self):
        from tiled.client import from_uri

        return from_uri(self.uri, api_key=self.key)


def server_profile(dest: Path, name: str, server: LabServer, *, key_env: str = "QWTEST_KEY",
                   extra: str = "", data_extra: str = "", source: str | None = None) -> Path:
    """A copy of profiles/<source or name> whose [data] points at ``server``."""
    text = (ROOT / "profiles" / (source or name) / "setup.toml").read_text(encoding="utf-8")
    if source and source != name:
        text = text.replace(f'name = "{source}"', f'name = "{name}"', 1)
    folder = dest / f"profile-{name}-{secrets.token_hex(3)}"
    folder.mkdir(parents=True)
    text += extra + (f'\n[data]\nstore = "server"\nuri = "{server.uri}"\n'
                     f'api_key_env = "{key_env}"\nraw_dir = "{server.raw / name}"\n{data_extra}')
    (folder / "setup.toml").write_text(text, encoding="utf-8")
    return folder
