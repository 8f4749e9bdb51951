"""Shared fixtures: the real services that .ci/services starts (PostgreSQL, Redis,
Chromium).  Outside CI a test that needs a service that is not there is skipped with
the command that starts it; under CI (``CI`` set, as .ci/run does) it fails instead,
so a green CI run means every such test really ran."""

from __future__ import annotations

import os
import shutil

import pytest


def _need(var: str, what: str) -> str:
    value = os.environ.get(var, "")
    if value:
        return value
    message = (f"{what} is not available: {var} is not set "
               "(start the services with: bash .ci/services start && source $QW_SERVICES_DIR/env)")
    if os.environ.get("CI"):
        pytest.fail(message)
    pytest.skip(message)


@pytest.fixture(scope="session")
def pg_admin_uri() -> str:
    """Admin URI of a throw-away PostgreSQL cluster on 127.0.0.1."""
    return _need("QUIETWELL_TEST_PG", "PostgreSQL")


@pytest.fixture(scope="session")
def redis_uri() -> str:
    """URI of a Redis server on 127.0.0.1 (redis://127.0.0.1:PORT)."""
    return _need("QUIETWELL_TEST_REDIS", "Redis")


@pytest.fixture(scope="session")
def chromium_path() -> str:
    """Path of Debian's headless-capable Chromium."""
    path = os.environ.get("QUIETWELL_TEST_CHROMIUM") or shutil.which("chromium") or ""
    if path:
        return path
    return _need("QUIETWELL_TEST_CHROMIUM", "Chromium")


@pytest.fixture(scope="module")
def lab(pg_admin_uri, tmp_path_factory):
    """A lab catalog of the test module's own (tests/lab_server.py): tiled on PostgreSQL,
    fresh databases, a free port; the module's tests may kill and restart it."""
    from lab_server import LabServer

    server = LabServer(pg_admin_uri, tmp_path_factory.mktemp("lab"))
    server.start()
    yield server
    server.stop()
