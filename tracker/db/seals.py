"""Seals: what an audit event fixes of the rows it wrote, so an edit made later outside the application shows.

A *seal* is a SHA-256 over the stored **values** of rows, read back from the
database in the writing transaction itself (so the verifier, reading the same
columns later, sees exactly the same representation on either engine).  Each
row is the list of its values in the order of ``row_columns`` (floats written with
``repr``, so every bit of a stored value counts; times in UTC as ISO text).
In id order, each block of :data:`BLOCK_ROWS` rows is hashed as the compact
JSON list of those lists followed by a newline, in one streaming pass
(bounded memory; one C-level encode per block).

* :func:`seal_rows` seals the rows of an import: ``{"id_ranges", "row_columns",
  "rows_sha256", "rows_format": 2}``, stored in the import's summary event;
* :func:`seal_row` seals one row (a saved fit): ``{"row_columns", "row_sha256"}``.

The event carries its own ``row_columns``, so a column added to a table by a
later migration does not disturb older seals.  :mod:`tracker.services.auditlog`
re-computes every seal (``krt audit verify``).
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
from collections.abc import Iterable, Mapping
from typing import Any

from sqlalchemy import Table, and_, or_, select
from sqlalchemy.orm import Session

from .audit import id_ranges
from .models import Base

__all__ = ["ROWS_FORMAT", "BLOCK_ROWS", "sealed_columns", "encode_block", "seal_rows", "seal_row", "digest_rows", "table"]

#: ``rows_format`` of value seals (format 1, before it, hashed ids, names and content hashes only).
ROWS_FORMAT = 2


def table(name: str) -> Table:
    return Base.metadata.tables[name]


def sealed_columns(name: str) -> list[str]:
    """Every column of table ``name``, in table order (the seal of a new write covers them all)."""
    return [c.name for c in table(name).columns]


#: Rows per hashed block (part of ``rows_format`` 2: changing it changes every digest).
BLOCK_ROWS = 1000


def _default(value: Any) -> str:
    if isinstance(value, dt.datetime):
        if value.tzinfo is not None:
            value = value.astimezone(dt.timezone.utc)
        return value.isoformat()
    if isinstance(value, dt.date):
        return value.isoformat()
    if hasattr(value, "item"):  # numpy scalars
        return value.item()
    return str(value)


_ENCODER = json.JSONEncoder(ensure_ascii=False, separators=(",", ":"), default=_default)


def encode_block(rows: list[list[Any]]) -> str:
    """A block of rows as compact JSON (a list of lists; floats by ``repr``, times in UTC as ISO text)."""
    return _ENCODER.encode(rows)


def _range_filter(t: Table, ranges) -> Any:
    parts = [t.c.id == lo if lo == hi else and_(t.c.id >= lo, t.c.id <= hi) for lo, hi in ranges]
    return or_(*parts) if len(parts) > 1 else parts[0]


def digest_rows(session: Session, name: str, columns: list[str], ranges, overrides: Mapping[int, Mapping[str, Any]] | None = None,
                chunk: int = 500) -> tuple[int, str]:
    """``(rows found, SHA-256 hex)`` over the rows of ``name`` whose ids lie in ``ranges``, in id order.

    ``overrides`` replaces values of some rows before hashing (``{id: {column: value}}``):
    the verifier uses it to put back what later audited changes altered.
    """
    t = table(name)
    cols = [t.c[c] for c in columns]
    h = hashlib.sha256()
    n = 0
    ranges = [(int(lo), int(hi)) for lo, hi in ranges]
    block: list[list[Any]] = []

    def flush() -> None:
        h.update(encode_block(block).encode("utf-8"))
        h.update(b"\n")
        block.clear()

    for i in range(0, len(ranges), chunk):
        part = ranges[i : i + chunk]
        stmt = select(*cols, t.c.id.label("_seal_id")).where(_range_filter(t, part)).order_by(t.c.id)
        for row in session.execute(stmt.execution_options(yield_per=5000)):
            values = list(row[:-1])
            if overrides:
                changes = overrides.get(row[-1])
                if changes:
                    values = [changes[c] if c in changes else v for c, v in zip(columns, values)]
            block.append(values)
            n += 1
            if len(block) == BLOCK_ROWS:
                flush()
    if block:
        flush()
    return n, h.hexdigest()


def seal_rows(session: Session, name: str, ids: Iterable[int]) -> dict[str, Any]:
    """The seal of rows ``ids`` of table ``name`` as an import's summary event records it."""
    ranges = id_ranges(ids)
    columns = sealed_columns(name)
    _, digest = digest_rows(session, name, columns, ranges)
    return {"id_ranges": ranges, "row_columns": columns, "rows_sha256": digest, "rows_format": ROWS_FORMAT}


def seal_row(session: Session, name: str, row_id: int) -> dict[str, Any]:
    """The seal of one row: ``{"row_columns", "row_sha256"}``."""
    columns = sealed_columns(name)
    _, digest = digest_rows(session, name, columns, [(int(row_id), int(row_id))])
    return {"row_columns": columns, "row_sha256": digest}
