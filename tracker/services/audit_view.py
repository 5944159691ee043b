"""Audit events as people read them: names instead of row ids, and a before → after diff.

The audit table stores what was fixed at the time (entity type and row id,
before/after JSON).  :func:`describe` adds, for a page of events, an
``entity_label`` (``compound HF-104``, ``kinetic measurement of HF-104 (spr)``,
``user demo-lead``) looked up with one query per entity type, and a ``change``
text listing each changed field as ``field: old → new``.  The stored events
are never altered; this is a view.
"""

from __future__ import annotations

import json
from collections.abc import Iterable
from typing import Any

import pandas as pd
from sqlalchemy import select

from ..db.models import Compound, Decision, KineticMeasurement, PKProfile, Potency, Program, TimeCourse, User

__all__ = ["describe", "entity_labels", "change_text"]

MAX_VALUE_CHARS = 80


def _ids(values: Iterable[Any]) -> list[int]:
    out = []
    for v in values:
        try:
            out.append(int(str(v)))
        except (TypeError, ValueError):
            continue
    return sorted(set(out))


def _by_compound(conn, model, ids: list[int], what: str, extra) -> dict[int, str]:
    rows = conn.execute(select(model.id, Compound.name, extra).join(Compound, Compound.id == model.compound_id)
                        .where(model.id.in_(ids))).all()
    return {int(i): f"{what} of {name}" + (f" ({x})" if x else "") for i, name, x in rows}


def entity_labels(conn, pairs: Iterable[tuple[str, Any]]) -> dict[tuple[str, str], str]:
    """``{(entity_type, entity_id): label}`` for the given pairs; one query per entity type present."""
    wanted: dict[str, list[Any]] = {}
    for kind, ident in pairs:
        wanted.setdefault(str(kind), []).append(ident)
    out: dict[tuple[str, str], str] = {}
    for kind, raw in wanted.items():
        ids = _ids(raw)
        if not ids:
            continue
        found: dict[int, str] = {}
        if kind == "program":
            found = {int(i): f"program {n}" for i, n in conn.execute(select(Program.id, Program.name).where(Program.id.in_(ids)))}
        elif kind == "compound":
            found = {int(i): f"compound {n}" for i, n in conn.execute(select(Compound.id, Compound.name).where(Compound.id.in_(ids)))}
        elif kind == "user":
            found = {int(i): f"user {n}" for i, n in conn.execute(select(User.id, User.name).where(User.id.in_(ids)))}
        elif kind == "kinetic_measurement":
            found = _by_compound(conn, KineticMeasurement, ids, "kinetic measurement", KineticMeasurement.method)
        elif kind == "time_course":
            found = _by_compound(conn, TimeCourse, ids, "time course", TimeCourse.method)
        elif kind == "potency":
            found = _by_compound(conn, Potency, ids, "potency", Potency.assay)
        elif kind == "pk_profile":
            found = _by_compound(conn, PKProfile, ids, "PK profile", PKProfile.species)
        elif kind == "decision":
            found = _by_compound(conn, Decision, ids, "gate decision", Decision.to_stage)
        for i, label in found.items():
            out[(kind, str(i))] = label
    return out


def _load(text: Any) -> Any:
    if not isinstance(text, str) or not text:
        return None
    try:
        return json.loads(text)
    except ValueError:
        return text


def _short(v: Any) -> str:
    text = v if isinstance(v, str) else json.dumps(v, ensure_ascii=False, sort_keys=True, default=str)
    return text if len(text) <= MAX_VALUE_CHARS else text[: MAX_VALUE_CHARS - 1] + "…"


def change_text(before_json: Any, after_json: Any) -> str:
    """Changed fields as ``field: old → new`` lines (``new field: value`` for a creation, ``…: removed``)."""
    before, after = _load(before_json), _load(after_json)
    if before is None and isinstance(after, dict):
        before = {}
    if not isinstance(before, dict) or not isinstance(after, dict):
        if before is None and after is None:
            return ""
        if before is None:
            return _short(after)
        return f"{_short(before)} → {_short(after) if after is not None else 'removed'}"
    lines = []
    for key in sorted(set(before) | set(after)):
        old, new = before.get(key), after.get(key)
        if key not in before:
            lines.append(f"{key}: {_short(new)}")
        elif key not in after:
            lines.append(f"{key}: {_short(old)} → removed")
        elif old != new:
            lines.append(f"{key}: {_short(old)} → {_short(new)}")
    return "\n".join(lines)


def describe(conn, events: pd.DataFrame) -> pd.DataFrame:
    """``events`` (columns of the audit table) with ``entity_label`` and ``change`` added."""
    if events.empty:
        return events.assign(entity_label=pd.Series(dtype=object), change=pd.Series(dtype=object))
    labels = entity_labels(conn, zip(events["entity_type"], events["entity_id"]))
    entity = [labels.get((str(k), str(i)), f"{str(k).replace('_', ' ')}" + (f" {i}" if isinstance(i, str) and i else ""))
              for k, i in zip(events["entity_type"], events["entity_id"])]
    change = [change_text(b, a) for b, a in zip(events["before_json"], events["after_json"])]
    return events.assign(entity_label=entity, change=change)
