"""The tamper-evident audit chain.

Every write appends one :class:`~tracker.db.models.AuditEvent`.  Each event's
``hash`` is SHA-256 over the canonical JSON (sorted keys, no spaces, UTF-8) of
all its other fields, ``id`` and ``prev_hash`` included; ``prev_hash`` is the
hash of the event before it (64 zeros for the first).  Changing, removing or
re-ordering any stored event therefore breaks the chain at that event, which
:func:`verify_chain` reports.  On top of that the database refuses UPDATE,
DELETE (and TRUNCATE on PostgreSQL) of the table outright (21 CFR Part 11
§11.10(e): changes must not obscure earlier records).

The chain must not fork when two writers append at once: on PostgreSQL the
appender takes a transaction-scoped advisory lock before reading the last hash;
on SQLite every writing unit of work begins with ``BEGIN IMMEDIATE``, which
serialises writers.  Ids are assigned as last id + 1 under that lock, so the
sequence has no gaps and a deleted event is visible as a missing id.

What the chain cannot show on its own: events cut off the *end* of the table,
or a chain rewritten and re-hashed by someone with database rights.  Keyed
checkpoints and the time check are in :mod:`tracker.db.anchor`; keep
:func:`chain_head` somewhere else (a report, a backup manifest) and check it
with :func:`find_head` (``krt audit verify --expect-head``).

Bulk writes (an import of 10,000 compounds) append one summary event per
table rather than one per row: its ``after`` names the rows by id
(:func:`id_ranges`) and fixes their identity with a SHA-256 digest
(:func:`rows_digest`) over one line per row, so a row added, removed or
renamed outside the application no longer matches the hashed event.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import hmac
import json
import math
from typing import Any

from sqlalchemy import insert, select, text
from sqlalchemy.orm import Session

from . import anchor
from .models import AuditEvent

GENESIS_HASH = "0" * 64
#: Key of the PostgreSQL advisory lock that serialises appends ("KRTAUDIT" as a number).
ADVISORY_LOCK_KEY = 0x4B52544155444954

HASHED_FIELDS = ("id", "at", "actor", "action", "entity_type", "entity_id", "before_json", "after_json", "reason", "prev_hash")


def _plain(value: Any) -> Any:
    """JSON-ready copy: numpy scalars to Python, NaN/inf to None, dates to ISO text."""
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple, set, frozenset)):
        items = [_plain(v) for v in value]
        return sorted(items, key=repr) if isinstance(value, (set, frozenset)) else items
    if isinstance(value, bool) or value is None or isinstance(value, str):
        return value
    if isinstance(value, int):
        return int(value)
    if isinstance(value, float):
        return float(value) if math.isfinite(value) else None
    if isinstance(value, (dt.datetime, dt.date)):
        return value.isoformat()
    if hasattr(value, "item"):  # numpy scalar
        return _plain(value.item())
    if hasattr(value, "tolist"):  # numpy array
        return _plain(value.tolist())
    return str(value)


def canonical_json(value: Any) -> str:
    """Canonical JSON text: sorted keys, compact separators, UTF-8 characters kept, no NaN."""
    return json.dumps(_plain(value), sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False)


def event_hash(fields: dict[str, Any]) -> str:
    """SHA-256 hex of the canonical JSON of the hashed fields of one event."""
    payload = {k: fields.get(k) for k in HASHED_FIELDS}
    return hashlib.sha256(canonical_json(payload).encode("utf-8")).hexdigest()


def utc_stamp() -> str:
    """Now, UTC, ISO-8601 with microseconds: ``2026-03-01T09:15:02.123456+00:00``."""
    return dt.datetime.now(dt.timezone.utc).isoformat(timespec="microseconds")


def _lock_chain(session: Session) -> None:
    if session.get_bind().dialect.name == "postgresql":
        session.execute(text("SELECT pg_advisory_xact_lock(CAST(:k AS BIGINT))"), {"k": ADVISORY_LOCK_KEY})


def event_stamp(session: Session) -> str:
    """The time of a new event: the PostgreSQL server's clock (``clock_timestamp()``), else this machine's, UTC."""
    if session.get_bind().dialect.name == "postgresql":
        now = session.execute(text("SELECT clock_timestamp()")).scalar_one()
        return now.astimezone(dt.timezone.utc).isoformat(timespec="microseconds")
    return utc_stamp()


def _check_clock(session: Session, last_id: int, last_at: str | None, at: str) -> None:
    prev, new = anchor.parse_at(last_at), anchor.parse_at(at)
    tolerance = anchor.clock_tolerance_s()
    if prev is not None and new is not None and (prev - new).total_seconds() > tolerance:
        whose = "the database server's clock" if session.get_bind().dialect.name == "postgresql" else "this machine's clock"
        raise anchor.ClockError(
            f"refused to record an audit event dated {at}: the last event ({last_id}) is dated {last_at}, and events may not "
            f"go back in time by more than {tolerance:g} s (check {whose}); nothing was written")


def append_event(
    session: Session,
    actor: str,
    action: str,
    entity_type: str,
    entity_id: str | int | None,
    before: Any = None,
    after: Any = None,
    reason: str | None = None,
) -> dict[str, Any]:
    """Append one event to the chain inside the caller's transaction; returns its stored fields.

    ``before``/``after`` are any JSON-able values (dicts of the record's fields);
    they are stored as canonical JSON text.  Call inside a writing unit of work.
    """
    event = {"actor": actor, "action": action, "entity_type": entity_type, "entity_id": entity_id,
             "before": before, "after": after, "reason": reason}
    return append_events(session, [event])[0]


def append_events(session: Session, events: list[dict[str, Any]], chunk: int = 5000) -> list[dict[str, Any]]:
    """Append several events at once (one lock, one read of the head, bulk inserts).

    Each event is a dict with the keys of :func:`append_event`'s arguments
    (``actor``, ``action``, ``entity_type``, ``entity_id``, ``before``, ``after``, ``reason``).
    """
    if not events:
        return []
    key = anchor.load_key()
    _lock_chain(session)
    last = session.execute(select(AuditEvent.id, AuditEvent.hash, AuditEvent.at).order_by(AuditEvent.id.desc()).limit(1)).first()
    next_id, prev = ((last.id + 1), last.hash) if last else (1, GENESIS_HASH)
    at = event_stamp(session)
    if last is not None:
        _check_clock(session, last.id, last.at, at)
    stored: list[dict[str, Any]] = []
    pending = list(events)
    for i, ev in enumerate(pending):
        fields: dict[str, Any] = {
            "id": next_id,
            "at": at,
            "actor": str(ev["actor"]),
            "action": str(ev["action"]),
            "entity_type": str(ev["entity_type"]),
            "entity_id": None if ev.get("entity_id") is None else str(ev["entity_id"]),
            "before_json": None if ev.get("before") is None else canonical_json(ev["before"]),
            "after_json": None if ev.get("after") is None else canonical_json(ev["after"]),
            "reason": ev.get("reason"),
            "prev_hash": prev,
        }
        fields["hash"] = prev = event_hash(fields)
        stored.append(fields)
        next_id += 1
        if key is not None and i == len(pending) - 1 and ev.get("action") != anchor.CHECKPOINT_ACTION:
            pending.append(anchor.checkpoint_event(key, str(ev["actor"]), fields["id"], fields["hash"]))
    for i in range(0, len(stored), chunk):
        session.execute(insert(AuditEvent), stored[i : i + chunk])
    return stored


def id_ranges(ids) -> list[list[int]]:
    """Sorted ids as inclusive ``[first, last]`` runs: ``[3, 4, 5, 9]`` -> ``[[3, 5], [9, 9]]``."""
    out: list[list[int]] = []
    for i in sorted(int(x) for x in ids):
        if out and i == out[-1][1] + 1:
            out[-1][1] = i
        elif not out or i != out[-1][1]:
            out.append([i, i])
    return out


def in_ranges(value: int, ranges) -> bool:
    """True when ``value`` lies in one of the ``[first, last]`` runs of :func:`id_ranges`."""
    return any(lo <= value <= hi for lo, hi in ranges or ())


def rows_digest(lines) -> str:
    """SHA-256 hex over the given per-row lines, sorted, joined by newlines (UTF-8).

    Imports use ``"<id>\\t<name>"`` for compounds and
    ``"<id>\\t<compound_id>\\t<content_hash>"`` for measurements.
    """
    return hashlib.sha256("\n".join(sorted(lines)).encode("utf-8")).hexdigest()


def chain_head(session: Session) -> tuple[int, str]:
    """``(last id, last hash)``, or ``(0, GENESIS_HASH)`` for an empty chain."""
    last = session.execute(select(AuditEvent.id, AuditEvent.hash).order_by(AuditEvent.id.desc()).limit(1)).first()
    return (last.id, last.hash) if last else (0, GENESIS_HASH)


def verify_chain(session: Session, batch: int = 5000) -> tuple[bool, int | None, str]:
    """Re-compute every hash and link, in id order.

    Returns ``(ok, first_broken_id, message)``; ``first_broken_id`` is ``None``
    when the chain is intact.
    """
    cols = [getattr(AuditEvent, f) for f in HASHED_FIELDS] + [AuditEvent.hash]
    prev_hash = GENESIS_HASH
    expected_id = 1
    n = 0
    tolerance = anchor.clock_tolerance_s()
    prev_at = None
    result = session.execute(select(*cols).order_by(AuditEvent.id).execution_options(yield_per=batch))
    for row in result:
        fields = row._asdict()
        eid = fields["id"]
        if eid != expected_id:
            result.close()
            if eid > expected_id:
                return False, eid, f"audit event {eid}: events {expected_id}..{eid - 1} are missing"
            return False, eid, f"audit event {eid}: id out of sequence (expected {expected_id})"
        if fields["prev_hash"] != prev_hash:
            result.close()
            return False, eid, f"audit event {eid}: prev_hash does not match the hash of event {eid - 1}"
        if event_hash(fields) != fields["hash"]:
            result.close()
            return False, eid, f"audit event {eid}: stored hash does not match its contents (edited after it was written)"
        at = anchor.parse_at(fields["at"])
        if prev_at is not None and at is not None and (prev_at - at).total_seconds() > tolerance:
            result.close()
            return False, eid, (f"audit event {eid} is dated {fields['at']}, before the event ahead of it "
                                f"({prev_at.isoformat()}) by more than {tolerance:g} s (a clock was set back)")
        prev_at = at if at is not None else prev_at
        prev_hash = fields["hash"]
        expected_id += 1
        n += 1
    return True, None, f"audit chain intact: {n} event(s), head {prev_hash[:12]}"


def verify_checkpoints(session: Session, key: bytes | None) -> tuple[bool, int | None, str]:
    """The keyed checkpoints (see :mod:`tracker.db.anchor`) against the key; call after :func:`verify_chain` passed.

    With a key: every checkpoint's HMAC is right, covers the event just before
    it with that event's current hash, and the chain ends with a checkpoint.
    Without a key: nothing can be checked, and the message says so.
    """
    cps = session.execute(select(AuditEvent.id, AuditEvent.after_json).where(
        AuditEvent.action == anchor.CHECKPOINT_ACTION, AuditEvent.entity_type == anchor.CHECKPOINT_ENTITY).order_by(AuditEvent.id)).all()
    head_id, _ = chain_head(session)
    if key is None:
        if cps:
            return True, None, (f"{len(cps)} keyed checkpoint(s) not checked: no audit key configured "
                                f"(${anchor.ENV_KEY_FILE} or ${anchor.ENV_KEY})")
        return True, None, "no keyed checkpoints (no audit key configured): a rewrite with database rights would go unseen"
    if head_id == 0:
        return True, None, "empty chain, nothing to anchor"
    kid = anchor.key_id(key)
    covered = {r.id: r.hash for r in session.execute(select(AuditEvent.id, AuditEvent.hash).where(
        AuditEvent.id.in_([c.id - 1 for c in cps])))} if cps else {}
    for cid, after in cps:
        try:
            rec = json.loads(after or "{}")
        except ValueError:
            rec = {}
        covers, covers_hash = rec.get("covers"), str(rec.get("covers_hash") or "")
        if covers != cid - 1:
            return False, cid, f"checkpoint event {cid} anchors event {covers}, not the event just before it (moved or forged)"
        if rec.get("key_id") != kid:
            return False, cid, (f"checkpoint event {cid} was made with another audit key ({rec.get('key_id')}; "
                                f"the configured key is {kid})")
        if not hmac.compare_digest(anchor.checkpoint_mac(key, covers, covers_hash), str(rec.get("hmac") or "")):
            return False, cid, f"checkpoint event {cid}: its HMAC does not match (written without the audit key: forged)"
        if covered.get(covers) != covers_hash:
            return False, cid, (f"checkpoint event {cid}: event {covers} no longer has the hash it anchored "
                                "(the chain was rewritten and re-hashed)")
    if not cps:
        return False, 1, (f"no keyed checkpoint anchors the chain's {head_id} event(s) although an audit key is configured "
                          "(written without the key, or the checkpoints were removed)")
    last = cps[-1].id
    if last != head_id:
        return False, last + 1, (f"events {last + 1}..{head_id} come after the last keyed checkpoint (event {last}): "
                                 "written without the audit key, or forged")
    return True, None, f"{len(cps)} keyed checkpoint(s) verified (key {kid}); the chain ends with one"


def find_head(session: Session, head_hash: str) -> int | None:
    """The id of the event whose hash is ``head_hash`` (its hash covers its id, so it can sit nowhere else), or ``None``."""
    return session.execute(select(AuditEvent.id).where(AuditEvent.hash == head_hash)).scalar()


__all__ = ["append_event", "append_events", "verify_chain", "verify_checkpoints", "find_head", "event_stamp", "chain_head", "id_ranges", "in_ranges", "rows_digest", "canonical_json", "event_hash", "utc_stamp", "GENESIS_HASH", "ADVISORY_LOCK_KEY"]
