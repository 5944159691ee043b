"""Run the Alembic migrations from code (``krt db upgrade``), also from an installed wheel.

The scripts live in ``migrations/`` of a source checkout, which the wheel
installs as the package ``tracker.migrations``; :func:`script_location` finds
either.  Each command runs on one connection in one transaction.  On SQLite,
foreign keys are switched off *before* that transaction starts (the pragma is a
no-op inside one), so a batch rebuild of a parent table cannot cascade into its
children; ``PRAGMA foreign_key_check`` runs before the commit and refuses a
migration that left dangling references.
"""

from __future__ import annotations

import contextlib
import io
import re
from collections.abc import Iterator
from importlib import resources
from pathlib import Path

from typing import TYPE_CHECKING

from sqlalchemy import Connection, Engine

from .session import WRITE_OPTION, DatabaseError

if TYPE_CHECKING:  # alembic is imported where it is used: loading it costs ~0.35 s, which commands
    from alembic.config import Config  # that never touch the schema (krt fit, simulate, --help) need not pay


def script_location() -> str:
    """Folder of the Alembic scripts: the source checkout's ``migrations/`` first, else ``tracker.migrations``."""
    repo = Path(__file__).resolve().parents[2]
    local = repo / "migrations"
    if (repo / "pyproject.toml").is_file() and (local / "env.py").is_file():
        return str(local)
    try:
        found = resources.files("tracker.migrations")
    except ModuleNotFoundError:
        raise DatabaseError("the migration scripts are missing from this installation (tracker.migrations)") from None
    path = Path(str(found))
    if not (path / "env.py").is_file():
        raise DatabaseError(f"the migration scripts are missing from {path}")
    return str(path)


def alembic_config(connection: Connection | None = None) -> Config:
    from alembic.config import Config

    cfg = Config(stdout=io.StringIO())
    cfg.set_main_option("script_location", script_location())
    if connection is not None:
        cfg.attributes["connection"] = connection
    return cfg


@contextlib.contextmanager
def migration_connection(engine: Engine) -> Iterator[Connection]:
    """A writing connection inside one transaction; on SQLite with foreign keys off until the end."""
    with engine.connect() as conn:
        sqlite = engine.dialect.name == "sqlite"
        if sqlite:  # must happen outside any transaction; .connection does not begin one
            conn.connection.driver_connection.execute("PRAGMA foreign_keys=OFF")
        conn = conn.execution_options(**{WRITE_OPTION: True})
        try:
            with conn.begin():
                yield conn
                if sqlite:
                    bad = conn.exec_driver_sql("PRAGMA foreign_key_check").fetchall()
                    if bad:
                        raise DatabaseError(f"migration left {len(bad)} row(s) with dangling foreign keys, e.g. {tuple(bad[0])}; rolled back")
        finally:
            if sqlite:
                conn.connection.driver_connection.execute("PRAGMA foreign_keys=ON")


def upgrade(engine: Engine, rev: str = "head") -> str | None:
    """Upgrade the schema to ``rev``; returns the new revision."""
    from alembic import command

    with migration_connection(engine) as conn:
        command.upgrade(alembic_config(conn), rev)
    return current(engine)


def downgrade(engine: Engine, rev: str) -> str | None:
    """Downgrade the schema to ``rev`` (``"base"`` drops every table); returns the new revision."""
    from alembic import command

    with migration_connection(engine) as conn:
        command.downgrade(alembic_config(conn), rev)
    return current(engine)


def current(engine: Engine) -> str | None:
    """The database's schema revision, or ``None`` for an empty database."""
    from alembic.migration import MigrationContext

    with engine.connect() as conn:
        return MigrationContext.configure(conn).get_current_revision()


def head() -> str:
    """The newest revision the scripts know."""
    from alembic.script import ScriptDirectory

    return ScriptDirectory.from_config(alembic_config()).get_current_head()


_REVISION = re.compile(r"""^revision\s*(?::[^=]*)?=\s*["']([^"']+)["']""", re.M)
_DOWN = re.compile(r"""^down_revision\s*(?::[^=]*)?=\s*(?:None|["']([^"']*)["'])""", re.M)


def scripted_head() -> str:
    """The newest revision, read from the scripts' ``revision``/``down_revision`` lines without loading Alembic
    (which costs about a second of start-up); Alembic's own answer when the files say anything unusual."""
    revisions, parents = set(), set()
    for path in Path(script_location(), "versions").glob("*.py"):
        text = path.read_text(encoding="utf-8")
        rev, down = _REVISION.search(text), _DOWN.search(text)
        if rev is None or down is None:
            continue
        revisions.add(rev.group(1))
        if down.group(1):
            parents.add(down.group(1))
    heads = revisions - parents
    return heads.pop() if len(heads) == 1 else head()


def stamped(engine: Engine) -> str | None:
    """The revision stamped in the database (``alembic_version``), read with plain SQL; ``None`` when empty."""
    from sqlalchemy import inspect, text

    with engine.connect() as conn:
        if not inspect(conn).has_table("alembic_version"):
            return None
        return conn.execute(text("SELECT version_num FROM alembic_version")).scalar()


def is_current(engine: Engine) -> bool:
    return current(engine) == head()


def require_current(engine: Engine) -> None:
    """Refuse to work on a database whose schema is not at head, with the fix in the message.

    Reads the stamp and the scripts directly (every command calls this; loading Alembic would double the
    start-up of a quick command such as ``krt grade``)."""
    have, want = stamped(engine), scripted_head()
    if have != want:
        state = "has no tracker schema" if have is None else f"is at schema revision {have}, expected {want}"
        raise DatabaseError(f"the database {state}; run 'krt db upgrade'")


def check_models_match(engine: Engine) -> list:
    """Differences between the ORM models and the migrated database (empty when they agree)."""
    from alembic.autogenerate import compare_metadata
    from alembic.migration import MigrationContext

    from .models import Base

    with engine.connect() as conn:
        ctx = MigrationContext.configure(conn, opts={"compare_type": True, "render_as_batch": True})
        diffs = compare_metadata(ctx, Base.metadata)
    return list(diffs)


__all__ = [
    "script_location",
    "alembic_config",
    "migration_connection",
    "upgrade",
    "downgrade",
    "current",
    "head",
    "scripted_head",
    "stamped",
    "is_current",
    "require_current",
    "check_models_match",
]
