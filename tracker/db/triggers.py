"""Database triggers that make tables append-only.

SQLite: ``BEFORE UPDATE`` / ``BEFORE DELETE`` triggers that ``SELECT RAISE(ABORT, ...)``.
PostgreSQL: one plpgsql trigger function raising an exception, attached per row
to UPDATE and DELETE and per statement to TRUNCATE.

Migrations call :func:`create_append_only` / :func:`drop_append_only`.  A batch
migration that rebuilds one of these tables on SQLite loses its triggers (the
table is copied), so such a migration must call :func:`create_append_only`
again for that table.
"""

from __future__ import annotations

from collections.abc import Callable

PG_FUNCTION = "krt_refuse_append_only_change"


def _sqlite_sql(table: str) -> list[str]:
    return [
        f"CREATE TRIGGER trg_{table}_no_update BEFORE UPDATE ON {table} "
        f"BEGIN SELECT RAISE(ABORT, '{table} is append-only, UPDATE refused'); END",
        f"CREATE TRIGGER trg_{table}_no_delete BEFORE DELETE ON {table} "
        f"BEGIN SELECT RAISE(ABORT, '{table} is append-only, DELETE refused'); END",
    ]


def _pg_function_sql() -> str:
    return (
        f"CREATE OR REPLACE FUNCTION {PG_FUNCTION}() RETURNS trigger LANGUAGE plpgsql AS $body$ "
        "BEGIN RAISE EXCEPTION '% is append-only, % refused', TG_TABLE_NAME, TG_OP "
        "USING ERRCODE = 'integrity_constraint_violation'; END; $body$"
    )


def _pg_sql(table: str) -> list[str]:
    return [
        f"CREATE TRIGGER trg_{table}_no_update_delete BEFORE UPDATE OR DELETE ON {table} "
        f"FOR EACH ROW EXECUTE FUNCTION {PG_FUNCTION}()",
        f"CREATE TRIGGER trg_{table}_no_truncate BEFORE TRUNCATE ON {table} "
        f"FOR EACH STATEMENT EXECUTE FUNCTION {PG_FUNCTION}()",
    ]


def create_append_only(execute: Callable[[str], object], dialect: str, tables: tuple[str, ...]) -> None:
    """Create the triggers for ``tables``; ``execute`` runs one SQL statement (e.g. ``op.execute``)."""
    if dialect == "sqlite":
        for table in tables:
            for sql in _sqlite_sql(table):
                execute(sql)
    elif dialect == "postgresql":
        execute(_pg_function_sql())
        for table in tables:
            for sql in _pg_sql(table):
                execute(sql)
    else:  # pragma: no cover - make_engine refuses other backends
        raise NotImplementedError(f"append-only triggers for {dialect}")


def drop_append_only(execute: Callable[[str], object], dialect: str, tables: tuple[str, ...], drop_function: bool = True) -> None:
    """Drop the triggers of ``tables`` (and, on PostgreSQL, the shared function)."""
    if dialect == "sqlite":
        for table in tables:
            execute(f"DROP TRIGGER IF EXISTS trg_{table}_no_update")
            execute(f"DROP TRIGGER IF EXISTS trg_{table}_no_delete")
    elif dialect == "postgresql":
        for table in tables:
            execute(f"DROP TRIGGER IF EXISTS trg_{table}_no_update_delete ON {table}")
            execute(f"DROP TRIGGER IF EXISTS trg_{table}_no_truncate ON {table}")
        if drop_function:
            execute(f"DROP FUNCTION IF EXISTS {PG_FUNCTION}()")


__all__ = ["create_append_only", "drop_append_only", "PG_FUNCTION"]
