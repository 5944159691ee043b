"""Alembic environment for the tracker.

Run from code by :mod:`tracker.db.migrate` (which passes an open connection in
``config.attributes["connection"]`` and owns the transaction), or from a source
checkout with the ``alembic`` command and ``alembic.ini`` at the repository root
(the URL then comes from ``$KRT_DATABASE_URL`` or the default SQLite file).

Every migration runs with ``render_as_batch=True`` so SQLite can alter tables;
batch operations that rebuild an append-only table must re-create its triggers
(see :mod:`tracker.db.triggers`).
"""

from __future__ import annotations

from alembic import context

from tracker.db.models import Base, UTCDateTime

config = context.config
target_metadata = Base.metadata


def _render_item(type_, obj, autogen_context):
    """Render the UTC timestamp type as plain ``sa.DateTime(timezone=True)`` in new revisions."""
    if type_ == "type" and isinstance(obj, UTCDateTime):
        return "sa.DateTime(timezone=True)"
    return False


def _configure(**kw) -> None:
    context.configure(
        target_metadata=target_metadata,
        render_item=_render_item,
        render_as_batch=True,
        compare_type=True,
        transactional_ddl=True,
        **kw,
    )


def run_migrations_offline() -> None:
    from tracker.db.session import database_url

    _configure(url=config.get_main_option("sqlalchemy.url") or database_url(), literal_binds=True)
    with context.begin_transaction():
        context.run_migrations()


def run_migrations_online() -> None:
    connection = config.attributes.get("connection")
    if connection is not None:
        _configure(connection=connection)
        with context.begin_transaction():
            context.run_migrations()
        return
    # Stand-alone `alembic` command: same path as `krt db upgrade`.
    from tracker.db import migrate
    from tracker.db.session import make_engine

    engine = make_engine(config.get_main_option("sqlalchemy.url") or None)
    try:
        with migrate.migration_connection(engine) as conn:
            _configure(connection=conn)
            with context.begin_transaction():
                context.run_migrations()
    finally:
        engine.dispose()


if context.is_offline_mode():
    run_migrations_offline()
else:
    run_migrations_online()
