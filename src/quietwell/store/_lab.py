"""The lab catalog: one tiled server on PostgreSQL for every setup of a laboratory.

``quietwell lab-catalog init`` creates the database role and the two databases (the
catalog, and the event tables kept apart from it) on a PostgreSQL server and lays
tiled's catalog schema into the first; ``quietwell lab-catalog serve`` checks a server
configuration (``deploy/lab-catalog.yml``) and its environment, then runs ``tiled
serve config`` in the foreground.

Secrets stay out of files, command lines and logs:

* the API key is read from the environment variable the configuration names
  (``${QUIETWELL_LAB_API_KEY}``); tiled accepts letters and digits only;
* the database URIs carry no password: tiled's log prints them. The password comes
  from ``PGPASSWORD`` or ``~/.pgpass`` (both read by asyncpg and by libpq, which the
  catalog and the event tables use); ``QUIETWELL_LAB_DB_PASSWORD`` is passed on as
  ``PGPASSWORD`` to the server process when that is not set;
* the role's password reaches PostgreSQL as a SCRAM-SHA-256 verifier computed here,
  so not even a statement log of the database holds it in clear.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import os
import re
import secrets
import subprocess
import sys
from pathlib import Path
from urllib.parse import urlsplit, urlunsplit

from .._errors import InputError, QuietwellError

__all__ = ["init_lab_catalog", "check_lab_config", "serve_lab_catalog", "scram_verifier",
           "PASSWORD_ENV"]

#: The environment variable with the database role's password (``init`` sets the
#: role's password from it; ``serve`` passes it on as ``PGPASSWORD``).
PASSWORD_ENV = "QUIETWELL_LAB_DB_PASSWORD"

_NAME = re.compile(r"^[a-z_][a-z0-9_]{0,62}$")


def scram_verifier(password: str, *, iterations: int = 4096, salt: bytes | None = None) -> str:
    """PostgreSQL's stored form of ``password`` for SCRAM-SHA-256 (RFC 7677, RFC 5802).

    ``CREATE ROLE ... PASSWORD '<verifier>'`` stores it as is, so the clear password
    never travels to the server.
    """
    salt = salt if salt is not None else secrets.token_bytes(16)
    salted = hashlib.pbkdf2_hmac("sha256", password.encode(), salt, iterations)
    client_key = hmac.new(salted, b"Client Key", hashlib.sha256).digest()
    stored_key = hashlib.sha256(client_key).digest()
    server_key = hmac.new(salted, b"Server Key", hashlib.sha256).digest()

    def b64(b: bytes) -> str:
        return base64.b64encode(b).decode()

    return f"SCRAM-SHA-256${iterations}:{b64(salt)}${b64(stored_key)}:{b64(server_key)}"


def _strip_password(uri: str) -> str:
    parts = urlsplit(uri)
    if parts.password is None:
        return uri
    host = parts.hostname or ""
    netloc = f"{parts.username}@{host}" + (f":{parts.port}" if parts.port else "")
    return urlunsplit(parts._replace(netloc=netloc))


def _db_uri(admin_uri: str, dbname: str) -> str:
    """The URI of ``dbname`` with neither user nor password (they come from PGUSER and
    PGPASSWORD: tiled 0.2.20 turns a user given without password into the password
    "None" for the event tables, and its log prints a password given in the URI)."""
    parts = urlsplit(admin_uri)
    netloc = parts.netloc.rpartition("@")[2]
    return urlunsplit(parts._replace(netloc=netloc, path=f"/{dbname}", query=""))


async def _admin_work(admin_uri: str, role: str, password: str, dbs: list[str]) -> list[str]:
    import asyncpg

    conn = await asyncpg.connect(admin_uri)
    made = []
    try:
        exists = await conn.fetchval("SELECT 1 FROM pg_roles WHERE rolname = $1", role)
        verifier = scram_verifier(password)
        if exists:
            await conn.execute(f"ALTER ROLE {role} LOGIN PASSWORD '{verifier}'")
        else:
            await conn.execute(f"CREATE ROLE {role} LOGIN PASSWORD '{verifier}'")
            made.append(f"role {role}")
        for db in dbs:
            if not await conn.fetchval("SELECT 1 FROM pg_database WHERE datname = $1", db):
                await conn.execute(f"CREATE DATABASE {db} OWNER {role}")
                made.append(f"database {db}")
    finally:
        await conn.close()
    return made


def _run_async(coro):
    import asyncio

    return asyncio.run(coro)


def _pg_error(what: str, exc: BaseException, fix: str) -> InputError:
    text = " ".join(str(exc).split()) or type(exc).__name__
    return InputError(f"{what}: {text}; {fix}")


def init_lab_catalog(admin_uri: str, *, role: str = "quietwell",
                     catalog_db: str = "quietwell_catalog", tables_db: str = "quietwell_tables",
                     password_env: str = PASSWORD_ENV) -> tuple[list[str], str, str]:
    """Create ``role`` and the databases on a PostgreSQL server; initialise the catalog.

    Idempotent: what exists is kept (the role's password is set again). Returns what
    was created and the two database URIs (without password) for the configuration.
    The admin connection's password, if any, comes from ``PGPASSWORD``/``~/.pgpass``.
    """
    for what, name in (("--role", role), ("--catalog-db", catalog_db),
                       ("--tables-db", tables_db)):
        if not _NAME.match(name):
            raise InputError(f"{what} {name!r}: expected a lower-case name of letters, digits "
                             "and _ (at most 63); choose another")
    if catalog_db == tables_db:
        raise InputError(f"--catalog-db and --tables-db are both {catalog_db!r}: keep the event "
                         "tables in a database of their own; give two names")
    password = os.environ.get(password_env, "")
    if len(password) < 12:
        raise InputError(f"environment variable {password_env} is "
                         + ("not set" if not password else "shorter than 12 characters")
                         + f": set it to the password for role {role} (the server gets it the "
                           "same way, or from ~/.pgpass)")
    if not admin_uri.startswith(("postgresql://", "postgres://")):
        raise InputError(f"--admin-uri {_strip_password(admin_uri)!r}: expected "
                         "postgresql://ADMIN@HOST:PORT/postgres; fix it")
    try:
        made = _run_async(_admin_work(admin_uri, role, password, [catalog_db, tables_db]))
    except OSError as exc:
        raise _pg_error(f"--admin-uri {_strip_password(admin_uri)}: cannot connect", exc,
                        "start PostgreSQL or fix the host and port") from None
    except Exception as exc:  # asyncpg's errors: authentication, permissions
        raise _pg_error(f"--admin-uri {_strip_password(admin_uri)}", exc,
                        "connect as a role that may create roles and databases") from None
    catalog_uri, tables_uri = _db_uri(admin_uri, catalog_db), _db_uri(admin_uri, tables_db)
    env = {**os.environ, "PGPASSWORD": password, "PGUSER": role}
    proc = subprocess.run([sys.executable, "-m", "tiled", "catalog", "init", "--if-not-exists",
                           catalog_uri], env=env, capture_output=True, text=True)
    if proc.returncode != 0:
        tail = (proc.stderr.strip().splitlines() or ["no output"])[-1]
        raise QuietwellError(f"initialising the catalog in {catalog_uri} failed ({tail}); "
                             "check that the role may create tables there")
    return made, catalog_uri, tables_uri


_VAR = re.compile(r"\$\{([A-Za-z_][A-Za-z0-9_]*)\}")


def check_lab_config(config: str | Path) -> dict:
    """Check a lab-catalog configuration and its environment before the server starts.

    Returns ``{"catalog": uri, "tables": uri, "raw": [dirs], "key_var": name}``.
    Raises :class:`InputError` with one line for: a variable the file uses that is not
    set, an API key that tiled would refuse, a database URI with a password in it,
    anonymous access switched on, a database that does not exist or is not
    initialised, a raw folder that does not exist.
    """
    import yaml

    path = Path(config)
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise InputError(f"--config {path}: cannot read it ({exc.strerror}); give the lab "
                         "catalog's configuration (see deploy/lab-catalog.yml)") from None
    text = "\n".join(line for line in text.splitlines() if not line.lstrip().startswith("#"))
    missing = sorted({v for v in _VAR.findall(text) if not os.environ.get(v)})
    if missing:
        raise InputError(f"{path}: environment variable(s) {', '.join(missing)} not set; set "
                         "them (see deploy/lab.env.example) before starting the server")
    try:
        cfg = yaml.safe_load(os.path.expandvars(text))
        auth = cfg.get("authentication") or {}
        args = cfg["trees"][0]["args"]
    except (yaml.YAMLError, KeyError, IndexError, TypeError, AttributeError) as exc:
        raise InputError(f"{path}: not a lab-catalog configuration ({type(exc).__name__}: "
                         f"{exc}); start from deploy/lab-catalog.yml") from None
    key_refs = _VAR.findall(text.split("single_user_api_key", 1)[1].splitlines()[0]) \
        if "single_user_api_key" in text else []
    key = str(auth.get("single_user_api_key") or "")
    key_var = key_refs[0] if key_refs else "the single_user_api_key"
    if not key_refs:
        raise InputError(f"{path}: authentication.single_user_api_key must come from an "
                         "environment variable (\"${QUIETWELL_LAB_API_KEY}\"), never the key "
                         "itself; fix the file")
    if not key.isalnum() or len(key) < 16:
        raise InputError(f"{path}: the API key in ${key_var} must be at least 16 letters and "
                         "digits (tiled refuses other characters); make one with: python -c "
                         "\"import secrets; print(secrets.token_hex(24))\"")
    if auth.get("allow_anonymous_access"):
        raise InputError(f"{path}: authentication.allow_anonymous_access is true: anyone on "
                         "the network could read the lab's runs; set it to false")
    uri = str(args.get("uri", ""))
    tables = [s for s in args.get("writable_storage", []) if str(s).startswith("postgres")]
    raw = [str(s) for s in args.get("readable_storage", [])]
    for u in [uri, *tables]:
        if urlsplit(u).password is not None:
            raise InputError(f"{path}: the database URI {_strip_password(u)} holds a password, "
                             "which the server's log would print; remove it and give the "
                             f"password in PGPASSWORD, {PASSWORD_ENV} or ~/.pgpass")
        if urlsplit(u).username is not None:
            raise InputError(f"{path}: the database URI {u} names a user: tiled 0.2.20 then "
                             "sends the password 'None' for the event tables; remove the user "
                             "from the URI and set PGUSER (see deploy/lab.env.example)")
    if not os.environ.get("PGUSER"):
        raise InputError(f"{path}: environment variable PGUSER is not set; set it to the "
                         "database role (quietwell lab-catalog init made it; default quietwell)")
    if not tables:
        raise InputError(f"{path}: writable_storage lists no postgresql:// database for the "
                         "event tables; add the tables database (see deploy/lab-catalog.yml)")
    for d in raw:
        if not Path(d.removeprefix("file://localhost")).is_dir():
            raise InputError(f"{path}: readable_storage folder {d} does not exist; create it "
                             "(the setups' raw HDF5 files arrive there) or fix the path")
    env_pw = os.environ.get("PGPASSWORD") or os.environ.get(PASSWORD_ENV)
    _run_async(_check_databases(path, uri, tables[0], env_pw,
                                bool(args.get("init_if_not_exists"))))
    return {"catalog": uri, "tables": tables[0], "raw": raw, "key_var": key_var}


async def _check_databases(path: Path, catalog: str, tables: str, password: str | None,
                           may_init: bool) -> None:
    import asyncpg

    for uri, what in ((catalog, "catalog"), (tables, "event-table")):
        try:
            conn = await asyncpg.connect(uri, password=password or None)
        except asyncpg.InvalidCatalogNameError:
            raise InputError(f"{path}: the {what} database {_strip_password(uri)} does not "
                             "exist; create it with quietwell lab-catalog init") from None
        except OSError as exc:
            raise _pg_error(f"{path}: the {what} database {_strip_password(uri)} does not "
                            "answer", exc, "start PostgreSQL or fix the host and port") from None
        except Exception as exc:  # noqa: BLE001 - authentication and the like
            raise _pg_error(f"{path}: the {what} database {_strip_password(uri)}", exc,
                            f"give the role's password in PGPASSWORD, {PASSWORD_ENV} or "
                            "~/.pgpass") from None
        try:
            if what == "catalog" and not may_init:
                ready = await conn.fetchval("SELECT to_regclass('public.nodes') IS NOT NULL")
                if not ready:
                    raise InputError(f"{path}: the catalog database {_strip_password(uri)} is "
                                     "not initialised; run quietwell lab-catalog init (or set "
                                     "init_if_not_exists: true)")
        finally:
            await conn.close()


def serve_lab_catalog(config: str | Path, *, host: str, port: int) -> None:
    """Check ``config`` (:func:`check_lab_config`), then become tiled's server on it.

    The process is replaced by ``python -m tiled serve config`` (same pid: a service
    manager or a test stops the server itself). The database password reaches the
    server as ``PGPASSWORD`` (never in a URI, so never in its log).
    """
    check_lab_config(config)
    env = dict(os.environ)
    if not env.get("PGPASSWORD") and env.get(PASSWORD_ENV):
        env["PGPASSWORD"] = env[PASSWORD_ENV]
    env.pop(PASSWORD_ENV, None)
    cmd = [sys.executable, "-m", "tiled", "serve", "config", str(config), "--host", host,
           "--port", str(port)]
    sys.stdout.flush()
    sys.stderr.flush()
    os.execve(sys.executable, cmd, env)
