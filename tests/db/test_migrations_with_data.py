"""Migrations keep the data: fill a database at an old revision, upgrade, and check every row survived.

For the first revision -> head and for every consecutive pair of revisions,
on both backends: the database is migrated to the older revision, every table
*as it exists at that revision* (reflected, not the current models) gets rows
through SQLAlchemy Core (plain values, NULLs, Unicode, extreme floats,
timestamps with microseconds, a real hash-chained audit trail), then it is
upgraded and every row is read back and compared column by column.  At head
the audit chain must still verify and the append-only triggers must still
refuse an UPDATE (a batch rebuild on SQLite drops triggers unless the
revision re-creates them).

Contributor rule (DEVELOPERS.md): every new revision gets this coverage
automatically through the pairwise steps.  If a revision drops or renames a
column or table on purpose, list it in ``EXPECTED_DROPS`` with the revision
id; if it transforms values, add a check of the transformed values.
"""

from __future__ import annotations

import datetime as dt
import re

import pytest
from alembic.script import ScriptDirectory
from sqlalchemy import Boolean, Date, DateTime, Float, Integer, MetaData, String, Text, insert, select, text
from sqlalchemy.exc import DBAPIError
from sqlalchemy.orm import Session

from tracker.db import migrate
from tracker.db.audit import GENESIS_HASH, HASHED_FIELDS, event_hash, verify_chain

ROWS = 3  # per table; the last one has every nullable column NULL
#: {(revision, table): {dropped columns}} or {(revision, table): None} for a dropped table, declared on purpose.
EXPECTED_DROPS: dict[tuple[str, str], set[str] | None] = {}

FLOATS = (1e-12, 3.141592653589793, 6.02214076e23, 1 / 3, 2.5e-15, 1e-3)
TEXTS = ("plain", "µM Ω ä 漢字 ✓", "quote ' and \" and , ; \\ end")


def _revisions() -> list[str]:
    script = ScriptDirectory.from_config(migrate.alembic_config())
    revs = [r.revision for r in script.walk_revisions()]  # head first
    return list(reversed(revs))


def _steps() -> list[tuple[str, str]]:
    revs = _revisions()
    steps = [(revs[0], revs[-1])] + list(zip(revs, revs[1:]))
    return list(dict.fromkeys(steps))


def _reflect(conn) -> MetaData:
    md = MetaData()
    md.reflect(bind=conn)
    md.remove(md.tables["alembic_version"])
    return md


def _allowed_values(conn, table) -> dict[str, list[str]]:
    """Column -> values allowed by a ``col IN (...)`` CHECK constraint of the table at this revision."""
    from sqlalchemy import inspect

    out: dict[str, list[str]] = {}
    for ck in inspect(conn).get_check_constraints(table.name):
        sql = ck.get("sqltext") or ""
        cols = [c.name for c in table.columns if re.search(rf"\b{re.escape(c.name)}\b", sql)]
        values = re.findall(r"'([^']*)'", sql)
        if len(cols) == 1 and values:
            out[cols[0]] = values
    return out


def _value(table, col, i: int, allowed: dict[str, list[str]]):
    """A deterministic, constraint-respecting value of row ``i`` for ``col``."""
    if col.name in allowed:
        choices = allowed[col.name]
        return choices[i % len(choices)]
    t = col.type
    if isinstance(t, Boolean):
        return i % 2 == 0
    if isinstance(t, Integer):
        return 1000 + i
    if isinstance(t, Float):
        return FLOATS[(i + len(col.name)) % len(FLOATS)]
    if isinstance(t, DateTime):
        moment = dt.datetime(2026, 3, 1 + i, 9, 15, 2, 123456 + i)
        return moment.replace(tzinfo=dt.timezone.utc) if t.timezone else moment
    if isinstance(t, Date):
        return dt.date(2024, 2, 29) + dt.timedelta(days=i)
    if isinstance(t, (String, Text)):
        base = f"{table.name}.{col.name}#{i} {TEXTS[i % len(TEXTS)]}"
        if isinstance(t, Text) or not t.length:
            return base + "\nsecond line"
        return base[: t.length]
    raise AssertionError(f"no test value for {table.name}.{col.name} of type {t!r}: extend _value()")


def _audit_rows(n: int) -> list[dict]:
    """A real chain of ``n`` events (hashes computed as tracker.db.audit does)."""
    rows, prev = [], GENESIS_HASH
    for i in range(n):
        fields = {"id": i + 1, "at": f"2026-03-0{i + 1}T09:15:02.12345{i}+00:00", "actor": f"user {TEXTS[i % 3]}",
                  "action": "create", "entity_type": "compound", "entity_id": None if i == n - 1 else str(i + 1),
                  "before_json": None, "after_json": '{"stage":"hit","µ":1e-12}', "reason": None if i == n - 1 else "r",
                  "prev_hash": prev}
        fields["hash"] = prev = event_hash(fields)
        rows.append(fields)
    return rows


def _fill(conn) -> dict[str, int]:
    md = _reflect(conn)
    ids: dict[str, list[int]] = {}
    counts = {}
    for table in md.sorted_tables:
        if table.name == "audit_events" and set(HASHED_FIELDS) <= set(table.columns.keys()):
            rows = _audit_rows(ROWS)
        else:
            allowed = _allowed_values(conn, table)
            rows = []
            for i in range(ROWS):
                row = {}
                for col in table.columns:
                    if col.primary_key:
                        row[col.name] = i + 1
                    elif col.foreign_keys:
                        parent = next(iter(col.foreign_keys)).column.table.name
                        if parent == table.name:  # a self-reference (e.g. superseded_by_id): left empty
                            row[col.name] = None
                        else:
                            row[col.name] = None if (col.nullable and i == ROWS - 1) else ids[parent][i % len(ids[parent])]
                    elif col.nullable and i == ROWS - 1:
                        row[col.name] = None
                    else:
                        row[col.name] = _value(table, col, i, allowed)
                rows.append(row)
        conn.execute(insert(table), rows)
        pk = [c.name for c in table.primary_key.columns]
        ids[table.name] = [r[pk[0]] for r in rows] if len(pk) == 1 else []
        counts[table.name] = len(rows)
    if conn.dialect.name == "postgresql":  # explicit ids: move the sequences past them, as a real database would be
        for table in md.sorted_tables:
            for col in table.primary_key.columns:
                conn.execute(text(f"SELECT setval(pg_get_serial_sequence('{table.name}', '{col.name}'), "
                                  f"(SELECT max({col.name}) FROM {table.name})) WHERE pg_get_serial_sequence('{table.name}', '{col.name}') IS NOT NULL"))
    return counts


def _snapshot(conn) -> dict[str, dict[tuple, dict]]:
    md = _reflect(conn)
    out = {}
    for table in md.sorted_tables:
        pk = list(table.primary_key.columns)
        rows = conn.execute(select(table).order_by(*pk)).mappings().all()
        out[table.name] = {tuple(r[c.name] for c in pk): dict(r) for r in rows}
    return out


def _refuses_update(engine) -> bool:
    with engine.connect() as conn:
        try:
            with conn.begin():
                conn.execute(text("UPDATE audit_events SET actor = 'edited' WHERE id = 1"))
        except DBAPIError:
            return True
    return False


@pytest.mark.parametrize(("start", "end"), _steps(), ids=lambda r: str(r))
def test_every_row_filled_at_an_old_revision_survives_the_upgrade(engine, start, end):
    migrate.upgrade(engine, start)
    assert migrate.current(engine) == start
    with migrate.migration_connection(engine) as conn:
        counts = _fill(conn)
    assert counts and all(n == ROWS for n in counts.values())
    with engine.connect() as conn:
        before = _snapshot(conn)
    assert set(before) == set(counts) and all(len(rows) == ROWS for rows in before.values())

    migrate.upgrade(engine, end)
    assert migrate.current(engine) == end
    with engine.connect() as conn:
        after = _snapshot(conn)
    for table, rows in before.items():
        dropped = EXPECTED_DROPS.get((end, table), set())
        if dropped is None:
            assert table not in after, f"{table} was declared dropped by {end} but still exists"
            continue
        assert table in after, f"table {table} disappeared in the upgrade {start} -> {end}"
        assert set(after[table]) == set(rows), f"{table}: rows lost or added by {start} -> {end}"
        for key, old in rows.items():
            new = after[table][key]
            for column, value in old.items():
                if column in dropped:
                    continue
                assert column in new, f"{table}.{column} disappeared in {start} -> {end} (declare it in EXPECTED_DROPS)"
                assert new[column] == value, f"{table}.{column} of row {key} changed: {value!r} -> {new[column]!r}"

    if end == migrate.head():
        with Session(engine) as session:
            ok, broken, message = verify_chain(session)
        assert ok, message
        assert _refuses_update(engine), "audit_events accepts UPDATE after the upgrade: re-create its append-only triggers"


def test_the_steps_cover_every_revision_from_the_first_to_head():
    revs = _revisions()
    steps = _steps()
    assert steps[0] == (revs[0], migrate.head())
    assert set(zip(revs, revs[1:])) <= set(steps)  # every consecutive pair (with two revisions it is first -> head)


def test_kinetic_measurements_filled_before_supersession_existed_are_not_superseded(engine):
    """0003_fit_supersede adds three nullable columns: every older measurement stays current (graded)."""
    migrate.upgrade(engine, "0002_target_turnover")
    with migrate.migration_connection(engine) as conn:
        _fill(conn)
    migrate.upgrade(engine, "0003_fit_supersede")
    with engine.connect() as conn:
        rows = conn.execute(text("SELECT superseded_by_id, superseded_reason, superseded_at FROM kinetic_measurements")).all()
    assert len(rows) == ROWS and all(r == (None, None, None) for r in rows)
