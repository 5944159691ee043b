"""Persistence: schema, engine set-up, unit of work, read-only queries, migrations, audit chain.

* :mod:`.models` - SQLAlchemy 2 typed models (SI floats plus the original text of each quantity).
* :mod:`.session` - :func:`~.session.database_url`, :func:`~.session.make_engine`, retries.
* :mod:`.uow` - :class:`~.uow.UnitOfWork`, rolled back unless committed.
* :mod:`.queries` - one query per view, returned as pandas DataFrames.
* :mod:`.migrate` - Alembic from code (works from an installed wheel).
* :mod:`.audit` - the hash-chained, append-only audit trail.
* :mod:`.triggers` - the database triggers that make tables append-only.
"""
