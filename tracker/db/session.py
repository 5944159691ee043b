"""Engine set-up: where the database is, and how connections behave.

SQLite follows the SQLAlchemy documentation's recipe for pysqlite: the driver's
own transaction handling is switched off (``isolation_level = None``) and the
``begin`` event emits the ``BEGIN`` itself.  Connections opened for writing
(execution option ``krt_write=True``, set by :class:`tracker.db.uow.UnitOfWork`)
begin with ``BEGIN IMMEDIATE``, so writers queue on the busy timeout instead of
failing with ``SQLITE_BUSY`` when a read transaction tries to become a write
one.  Readers use a plain deferred ``BEGIN``.  Each connection gets
``foreign_keys=ON``, ``journal_mode=WAL`` and ``busy_timeout=30000``.
``synchronous`` stays at its default (FULL): ``NORMAL`` would also be safe
against corruption in WAL mode, but a committed import or gate decision (and
its audit event) could then be lost to a power failure, and the commit of a
10,000-compound import took 24 ms either way here (measured), so there is
nothing to gain.

PostgreSQL URLs must name their driver (``postgresql+psycopg://``).
"""

from __future__ import annotations

import contextlib
import os
import random
import time
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import TypeVar

from sqlalchemy import Engine, create_engine, event
from sqlalchemy.engine import make_url
from sqlalchemy.exc import ArgumentError, DBAPIError, OperationalError

from ..errors import KrtError

APP_NAME = "kinetic-risk-tracker"
ENV_URL = "KRT_DATABASE_URL"
ENV_LOCK_TIMEOUT = "KRT_LOCK_TIMEOUT_S"
SQLITE_BUSY_TIMEOUT_MS = 30_000
WRITE_OPTION = "krt_write"

T = TypeVar("T")


class DatabaseError(KrtError, RuntimeError):
    """The database cannot be reached or is set up wrongly."""


def default_sqlite_path() -> Path:
    """``<user data dir>/tracker.sqlite`` (the folder is created)."""
    from platformdirs import user_data_dir

    folder = Path(user_data_dir(APP_NAME))
    folder.mkdir(parents=True, exist_ok=True)
    return folder / "tracker.sqlite"


def database_url() -> str:
    """``$KRT_DATABASE_URL``, else a SQLite file in the user data folder."""
    url = os.environ.get(ENV_URL, "").strip()
    if url:
        return url
    return f"sqlite:///{default_sqlite_path()}"


def mask_url(url: str) -> str:
    """The URL with its password replaced by ``***``."""
    try:
        return make_url(url).render_as_string(hide_password=True)
    except ArgumentError:
        return "<unreadable database URL>"


def _check_url(url: str):
    try:
        parsed = make_url(url)
    except ArgumentError as exc:
        raise DatabaseError(f"cannot read database URL {url!r}: {exc}") from None
    backend = parsed.get_backend_name()
    if backend == "postgresql" and parsed.drivername != "postgresql+psycopg":
        raise DatabaseError(
            f"PostgreSQL URLs must name the psycopg driver: use 'postgresql+psycopg://...' (got {mask_url(url)})"
        )
    if backend not in ("sqlite", "postgresql"):
        raise DatabaseError(f"unsupported database {backend!r}: use SQLite or PostgreSQL (postgresql+psycopg://)")
    return parsed


def lock_timeout_ms() -> int:
    """How long a writer waits for a lock before giving up: ``$KRT_LOCK_TIMEOUT_S`` seconds, default 30.

    SQLite's ``busy_timeout`` and PostgreSQL's ``lock_timeout`` (without it a
    PostgreSQL writer would wait for a held row lock forever).
    """
    text = os.environ.get(ENV_LOCK_TIMEOUT, "").strip()
    try:
        return max(1, int(float(text) * 1000)) if text else SQLITE_BUSY_TIMEOUT_MS
    except ValueError:
        return SQLITE_BUSY_TIMEOUT_MS


def make_engine(url: str | None = None, **kwargs) -> Engine:
    """An engine for ``url`` (default :func:`database_url`) with the connection set-up above."""
    url = url or database_url()
    parsed = _check_url(url)
    if parsed.get_backend_name() == "sqlite":
        db = parsed.database
        if db and db != ":memory:" and not db.startswith("file:"):
            Path(db).expanduser().parent.mkdir(parents=True, exist_ok=True)
        engine = create_engine(parsed, **kwargs)
        _install_sqlite_events(engine)
        return engine
    kwargs.setdefault("pool_pre_ping", True)
    engine = create_engine(parsed, **kwargs)

    @event.listens_for(engine, "connect")
    def _pg_lock_timeout(dbapi_connection, _record):
        with dbapi_connection.cursor() as cur:
            cur.execute(f"SET lock_timeout = {lock_timeout_ms()}")
        dbapi_connection.commit()

    return engine


def open_engine(url: str | None = None) -> Engine:
    """:func:`make_engine` plus a test connection; an unreachable database is one clear error."""
    engine = make_engine(url)
    try:
        with engine.connect() as conn:
            conn.exec_driver_sql("SELECT 1")
    except DBAPIError as exc:
        engine.dispose()
        reason = str(getattr(exc, "orig", exc)).strip().splitlines()[0] if str(getattr(exc, "orig", exc)).strip() else type(exc).__name__
        raise DatabaseError(f"cannot open database {mask_url(str(engine.url))}: {reason}") from None
    return engine


def _install_sqlite_events(engine: Engine) -> None:
    @event.listens_for(engine, "connect")
    def _on_connect(dbapi_connection, _record):  # pragma: no branch - one path
        dbapi_connection.isolation_level = None  # we emit BEGIN ourselves
        cur = dbapi_connection.cursor()
        cur.execute("PRAGMA foreign_keys=ON")
        cur.execute(f"PRAGMA busy_timeout={lock_timeout_ms()}")
        cur.execute("PRAGMA journal_mode=WAL")
        cur.close()

    @event.listens_for(engine, "begin")
    def _on_begin(conn):
        if conn.get_execution_options().get("isolation_level") == "AUTOCOMMIT":
            return
        conn.exec_driver_sql("BEGIN IMMEDIATE" if conn.get_execution_options().get(WRITE_OPTION) else "BEGIN")


def is_sqlite(bind) -> bool:
    return bind.dialect.name == "sqlite"


def describe_db_error(exc: BaseException) -> str:
    """One line saying what a driver error means for the user (read-only, locked, missing table ...)."""
    orig = getattr(exc, "orig", exc)
    text = str(orig).strip()
    first = text.splitlines()[0] if text else type(orig).__name__
    low = first.lower()
    code = getattr(orig, "sqlstate", None)
    if "readonly database" in low or "read-only transaction" in low or code == "25006":
        return f"the database is read-only here ({first}); nothing was written"
    if "database is locked" in low or "database is busy" in low or code == "55P03":
        return (f"the database stayed locked by another writer for longer than {lock_timeout_ms() / 1000:g} s ({first}); "
                "nothing was written: try again later (${ENV_LOCK_TIMEOUT} sets the wait)")
    if "no such table" in low or code == "42P01":
        return f"a table of the tracker is missing ({first}): run 'krt db current', or restore from a backup if it was dropped"
    if code == "42501" or "permission denied" in low:
        return f"the database refused the write ({first}); nothing was written"
    return first


@contextlib.contextmanager
def database_errors(what: str = "database error") -> Iterator[None]:
    """Turn a driver error escaping a command into one :class:`DatabaseError` line (no traceback)."""
    try:
        yield
    except DBAPIError as exc:
        raise DatabaseError(f"{what}: {describe_db_error(exc)}") from None


# ------------------------------------------------------------------ retries
_PG_TRANSIENT = {"40001", "40P01", "55P03"}  # serialization failure, deadlock, lock not available


def is_transient(exc: BaseException) -> bool:
    """True for errors worth retrying: SQLite busy/locked, PostgreSQL serialization failure or deadlock."""
    if isinstance(exc, OperationalError) and "database is locked" in str(exc).lower():
        return True
    if isinstance(exc, OperationalError) and "database is busy" in str(exc).lower():
        return True
    if isinstance(exc, DBAPIError):
        code = getattr(getattr(exc, "orig", None), "sqlstate", None)
        return code in _PG_TRANSIENT
    return False


def with_retry(fn: Callable[[], T], *, attempts: int = 5, base_delay: float = 0.05, max_delay: float = 2.0) -> T:
    """Call ``fn()`` and retry it on a transient database error, at most ``attempts`` times.

    ``fn`` must run a whole transaction (open its own unit of work), so a retry
    starts from scratch.  Back-off is exponential with jitter.
    """
    for attempt in range(1, attempts + 1):
        try:
            return fn()
        except DBAPIError as exc:
            if attempt == attempts or not is_transient(exc):
                raise
            time.sleep(min(max_delay, base_delay * 2 ** (attempt - 1)) * (0.5 + random.random()))
    raise AssertionError("unreachable")  # pragma: no cover


__all__ = [
    "database_url",
    "default_sqlite_path",
    "mask_url",
    "make_engine",
    "open_engine",
    "is_sqlite",
    "is_transient",
    "with_retry",
    "database_errors",
    "describe_db_error",
    "lock_timeout_ms",
    "DatabaseError",
    "WRITE_OPTION",
]
