"""Unit of work: one transaction, rolled back unless committed.

>>> with UnitOfWork(engine) as uow:           # doctest: +SKIP
...     uow.session.execute(insert(Program), rows)
...     append_event(uow.session, "ana", "create", "program", "7", None, {...}, None)
...     uow.commit()

A writing unit of work (the default) opens its SQLite transaction with
``BEGIN IMMEDIATE``; ``write=False`` gives a plain deferred read transaction.
Services take a unit of work (or an engine, from which they open one), so the
CLI and the dashboard stay thin.
"""

from __future__ import annotations

from sqlalchemy import Connection, Engine
from sqlalchemy.orm import Session

from .session import WRITE_OPTION


class UnitOfWork:
    """Context manager around one :class:`~sqlalchemy.orm.Session` transaction."""

    def __init__(self, engine: Engine, write: bool = True):
        self.engine = engine
        self.write = write
        self._session: Session | None = None
        self.committed = False

    @property
    def session(self) -> Session:
        """The open session (only inside ``with``)."""
        if self._session is None:
            raise RuntimeError("the unit of work is not open: use it in a with statement")
        return self._session

    def __enter__(self) -> UnitOfWork:
        bind = self.engine.execution_options(**{WRITE_OPTION: self.write})
        self._session = Session(bind=bind, expire_on_commit=False, autoflush=False)
        self.session.begin()
        self.session.connection()  # start the transaction now (BEGIN IMMEDIATE for writers)
        self.committed = False
        return self

    def commit(self) -> None:
        if not self.write:
            raise RuntimeError("a read-only unit of work cannot commit")
        self.session.commit()
        self.committed = True

    def rollback(self) -> None:
        self.session.rollback()

    def __exit__(self, exc_type: object, exc: object, tb: object) -> None:
        try:
            if not self.committed:
                self.session.rollback()
        finally:
            self.session.close()
            self._session = None

    @property
    def connection(self) -> Connection:
        return self.session.connection()

    @property
    def dialect(self) -> str:
        return self.engine.dialect.name


__all__ = ["UnitOfWork"]
