"""Import and export use cases: ``krt import`` / ``krt export`` and the dashboard's upload.

An import is all or nothing.  Files are read and validated first (units,
ranges, allowed values, duplicates); then, inside one writing transaction, the
rows are checked against stored data (unknown programs and compounds, stage
changes of existing compounds) and written in dependency order with bulk
inserts.  Any problem anywhere raises :class:`~tracker.errors.ImportErrors`
listing every one as ``file:line: column: message``, and nothing is written.

Re-importing the same rows adds nothing: measurements carry a content hash
unique per compound, programs and compounds are matched by name.  A stage
change of an existing compound is refused (stages change through gates);
other changed fields of programs and compounds are updated and audited with
their before and after values.

An import is one write, and it is audited as one: besides one event per
program created and one per program or compound updated (with before and
after), each table it added rows to gets one ``import`` event naming the
files, the counts, the new rows' ids as ``id_ranges`` and ``rows_sha256``,
a SHA-256 over the stored values of every new row, read back in the same
transaction (:func:`tracker.db.seals.seal_rows`).  The event is part of the
hash chain, so who imported which rows when stays attributable, and a row
later added, dropped or edited (a potency value, a stage) outside the
application no longer matches its event (``krt audit verify``).
Rows are written with :func:`tracker.db.bulk.insert_columns` (executemany on
SQLite, COPY on PostgreSQL).
"""

from __future__ import annotations

import datetime as dt
import math
import sys
from collections.abc import Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any, TextIO

import numpy as np
import pandas as pd
from sqlalchemy import Engine, func, insert, select, update
from sqlalchemy import exc as sa_exc
from sqlalchemy.orm import Session

from ..db.audit import append_events
from ..db.bulk import insert_columns, insert_columns_ids
from ..db.models import Compound, KineticMeasurement, PKProfile, Potency, Program, StageHistory, User
from ..db.seals import seal_rows
from ..db.session import with_retry
from ..db.uow import UnitOfWork
from ..errors import ImportErrors, InputError, PermissionDenied
from ..errors import IntegrityError as KrtIntegrityError
from ..io.names import name_key
from ..io.reading import gather_deferred, iter_csv_chunks
from ..io.specs import COMPOUNDS, PROGRAMS, SPECS
from ..io.validate import Occurrences, Validated, validate_tables

PROGRESS_THRESHOLD = 5_000  # rows; larger imports show progress on stderr
CHUNK = 5_000
STREAM_BYTES = 4_000_000  # a measurement CSV larger than this is read, checked and written in chunks (bounded memory)
STREAM_ROWS = 20_000  # rows per chunk of such a file
MAX_STREAM_ERRORS = 1_000  # problems listed from large files (the rest are counted)
WRITER_ROLES = ("lead", "scientist")

MODELS = {"potency": Potency, "kinetics": KineticMeasurement, "pk": PKProfile}
_PROGRAM_FIELDS = ("target", "intended_profile", "engagement_threshold", "onset_max", "duration_min", "offset_max", "dosing_interval",
                   "target_half_life")


class Progress:
    """A plain progress line on stderr; no dependency.  Silent unless enabled."""

    def __init__(self, enabled: bool, stream: TextIO | None = None):
        self.enabled = enabled
        self.stream = stream or sys.stderr
        self._tty = bool(getattr(self.stream, "isatty", lambda: False)())

    def say(self, text: str, *, transient: bool = False) -> None:
        if not self.enabled:
            return
        if self._tty and transient:
            self.stream.write(f"\rkrt: {text}\x1b[K")
        else:
            self.stream.write(("\r" if self._tty else "") + f"krt: {text}\n")
        self.stream.flush()


# ------------------------------------------------------------------ import
def import_path(
    target: Engine | UnitOfWork,
    path: str | Path,
    table: str | None = None,
    actor: str = "cli",
    *,
    progress: bool | None = None,
    stream: TextIO | None = None,
    keep_existing: bool = False,
) -> dict[str, Any]:
    """Import a CSV file, an ``.xlsx`` workbook or a folder of them; returns a summary dict.

    ``target`` is an engine (a writing unit of work is opened, committed and
    retried on transient lock errors) or an open :class:`UnitOfWork` (the
    caller commits).  ``progress=None`` shows progress for imports over
    5,000 rows.  Raises :class:`ImportErrors` with every problem; then nothing
    has been written.

    ``keep_existing=True`` only adds: programs and compounds already stored
    keep their settings, series, SMILES and stage (changed since by gates or
    other imports), and the file's values for them are ignored instead of
    refused or applied.  The demo re-load uses it.
    """
    path = Path(path)
    raws, source_errors, deferred = gather_deferred(path, table, STREAM_BYTES, tuple(MODELS))
    validated = validate_tables(raws)
    errors = source_errors + [e for e in validated.errors if e not in source_errors]
    if errors:  # report stored-data problems too, so one run lists everything
        if isinstance(target, UnitOfWork):
            errors += _resolve(target.session, validated, keep_existing)[1]
            known = _known_compounds(target.session, validated)
        else:
            with UnitOfWork(target, write=False) as uow:
                errors += _resolve(uow.session, validated, keep_existing)[1]
                known = _known_compounds(uow.session, validated)
        order = {raw.label: i for i, raw in enumerate(raws)}
        errors.sort(key=lambda e: (order.get(e.location.file, -1), e.location.line or 0) if e.location else (-2, 0))
        if deferred:  # large files: checked chunk by chunk, nothing kept
            errors += _scan_deferred(deferred, known)
        raise ImportErrors(errors)
    big = deferred and any(Path(f).stat().st_size > 0 for f, _ in deferred)
    show = progress if progress is not None else (validated.rows > PROGRESS_THRESHOLD or bool(big))
    prog = Progress(show, stream)
    prog.say(f"validated {validated.rows:,} rows from {sum(len(f) for f in validated.files.values())} file(s)"
             + (f"; {len(deferred)} large file(s) follow in chunks of {STREAM_ROWS:,} rows" if deferred else ""))

    def run(uow: UnitOfWork) -> dict[str, Any]:
        summary = _write(uow.session, validated, actor, prog, keep_existing)
        if deferred:
            _write_deferred(uow.session, deferred, actor, prog, summary)
        return summary

    if isinstance(target, UnitOfWork):
        summary = run(target)
    else:
        def attempt():
            with UnitOfWork(target) as uow:
                result = run(uow)
                uow.commit()
                return result

        try:
            summary = with_retry(attempt)
        except sa_exc.IntegrityError:
            # another writer stored some of the same rows meanwhile: once more, against the new state
            try:
                summary = with_retry(attempt)
            except sa_exc.IntegrityError as exc:
                first = str(exc.orig).strip().splitlines()[0] if str(exc.orig).strip() else "constraint violated"
                raise KrtIntegrityError(f"the database refused the import ({first}); nothing was written") from None
    summary["warnings"] = [w.one_line() for w in validated.warnings] + summary.pop("_stream_warnings", [])
    summary["path"] = str(path)
    prog.say("import committed")
    if deferred:
        # A bulk load read in chunks to stay in bounded memory is not followed by a whole-portfolio re-grade in the
        # same process (that would hold every reading at once); the grade history and the actions follow at the
        # next grading write (gate, saved fit, rule change or import).
        summary["follow_up"] = {"snapshots": 0, "closed": [], "deferred": True}
    elif not isinstance(target, UnitOfWork):  # grade history and actions follow the new data (with a UnitOfWork the caller does it)
        from .history import refresh

        summary["follow_up"] = refresh(target, f"import of {', '.join(summary.get('files', [])) or path.name}", actor)
    return summary


def _check_actor(session: Session, actor: str) -> None:
    """Once users exist, only an active lead or scientist may import."""
    if session.execute(select(func.count()).select_from(User)).scalar_one() == 0:
        return
    row = session.execute(select(User.role, User.active).where(User.name == actor)).first()
    if row is None:
        raise PermissionDenied(f"unknown user {actor!r}: imports are recorded under a registered user (pass --by NAME)")
    if not row.active or row.role not in WRITER_ROLES:
        raise PermissionDenied(f"user {actor!r} ({row.role}{'' if row.active else ', inactive'}) may not import data; leads and scientists may")


def _records(df: pd.DataFrame, columns: dict[str, str]) -> list[dict[str, Any]]:
    """Rows as dicts ``{db_column: python value}`` with NaN/NA as ``None`` and numpy scalars unwrapped."""
    cols = _columns(df, columns)
    keys = list(cols)
    return [dict(zip(keys, values)) for values in zip(*cols.values())]


def _columns(df: pd.DataFrame, columns: dict[str, str]) -> dict[str, list[Any]]:
    """``{db_column: list of python values}`` (NaN/NA as ``None``), converted a column at a time."""
    return {db_col: _values(df[src]) for db_col, src in columns.items()}


def _values(s: pd.Series) -> list[Any]:
    kind = s.dtype.kind
    if kind == "f":
        arr = s.to_numpy(dtype=float)
        out = arr.tolist()
        for i in np.flatnonzero(np.isnan(arr)).tolist():
            out[i] = None
        return out
    if kind in "iub":
        return s.tolist()
    return [v if v is None or type(v) is str else _py(v) for v in s.tolist()]


def _py(v: Any) -> Any:
    if v is None:
        return None
    if isinstance(v, float):
        return None if math.isnan(v) else float(v)
    if isinstance(v, np.generic):
        v = v.item()
        return None if isinstance(v, float) and math.isnan(v) else v
    if v is pd.NA or v is pd.NaT:
        return None
    return v


def _db_columns(spec, skip: Iterable[str] = ()) -> dict[str, str]:
    """Mapping db column -> DataFrame column for a spec's plain and quantity columns."""
    cols: dict[str, str] = {}
    for c in spec.columns:
        if c.name in skip or c.db is None or c.kind == "ref":
            continue
        if c.is_quantity:
            cols[c.db] = c.db
            cols[c.text_db] = c.text_db
        elif c.kind == "date":
            cols[c.db] = c.db
        else:
            cols[c.db] = c.name
    return cols


def _write(session: Session, v: Validated, actor: str, prog: Progress, keep_existing: bool = False) -> dict[str, Any]:
    _check_actor(session, actor)
    now = dt.datetime.now(dt.timezone.utc)
    programs_df = v.tables.get("programs", pd.DataFrame(columns=list(PROGRAMS.names))).drop_duplicates(subset=["program"])
    compounds_df = v.tables.get("compounds", pd.DataFrame(columns=list(COMPOUNDS.names))).drop_duplicates(subset=["compound"])

    snap, errors = _resolve(session, v, keep_existing)
    if errors:
        raise ImportErrors(errors)
    stored_programs, stored_compounds = snap.programs, snap.compounds
    program_ids = dict(zip(stored_programs["name"], stored_programs["id"]))
    compound_rows = stored_compounds.set_index("name", drop=False)

    summary: dict[str, Any] = {"tables": {}, "files": [f for fs in v.files.values() for f in fs]}
    events: list[dict[str, Any]] = []
    reason = f"import of {', '.join(Path(f).name for f in summary['files'])}"  # the files' own names, not where they sat

    # -- programs
    if "programs" in v.tables:
        new = programs_df[~programs_df["program"].isin(program_ids.keys())]
        rows = _records(new, {"name": "program", **_db_columns(PROGRAMS, skip=("program",))})
        for r in rows:
            r["created_at"] = now
        # plain executemany, no RETURNING: psycopg converts a short statement once instead of one huge VALUES list
        for i in range(0, len(rows), CHUNK):
            session.execute(insert(Program), rows[i : i + CHUNK])
        if rows:
            program_ids.update(dict(session.execute(select(Program.name, Program.id).where(Program.created_at == now)).all()))
        created = {r["name"]: r for r in rows}
        for name, r in created.items():
            events.append(_event(actor, "create", "program", program_ids[name], None, _public(r), reason))
        updated = 0 if keep_existing else _update_programs(session, programs_df, stored_programs, actor, reason, events)
        summary["tables"]["programs"] = _stat(v, "programs", len(rows), updated, len(programs_df) - len(rows) - updated)

    # -- compounds (+ stage history of new ones): bulk inserts, one summary event for the rows created
    if "compounds" in v.tables:
        existing = compounds_df["compound"].isin(compound_rows.index)
        new = compounds_df[~existing].copy()
        new["_program_id"] = new["program"].map(program_ids)
        cols = _columns(new, {"name": "compound", "program_id": "_program_id", **_db_columns(COMPOUNDS, skip=("compound",))})
        new_ids = dict(zip(cols["name"], _insert(session, Compound.__table__, cols, {"created_at": now}, "compounds", prog, ("name",))))
        n_new = len(new_ids)
        if n_new:
            insert_columns(
                session, StageHistory.__table__,
                {"compound_id": [new_ids[name] for name in cols["name"]], "to_stage": cols["stage"],
                 "note": [f"created by import of {label}" for label in new["_label"].tolist()]},
                {"from_stage": None, "at": now, "by_user": actor, "decision_id": None},
            )
        updated = 0 if keep_existing else _update_compounds(session, compounds_df[existing], compound_rows, actor, reason, events)
        summary["tables"]["compounds"] = _stat(v, "compounds", n_new, updated, int(existing.sum()) - updated)
        if n_new:
            events.append(_event(actor, "import", Compound.__tablename__, None, None,
                                 {"files": v.files["compounds"], "rows": len(compounds_df), "inserted": n_new,
                                  "stages": {k: int(c) for k, c in new["stage"].value_counts().sort_index().items()},
                                  **seal_rows(session, Compound.__tablename__, new_ids.values())}, reason))
        compound_ids = dict(zip(stored_compounds["name"], stored_compounds["id"])) | new_ids
    else:
        compound_ids = dict(zip(stored_compounds["name"], stored_compounds["id"]))

    # -- measurements
    for name, model in MODELS.items():
        if name not in v.tables:
            continue
        df = v.tables[name]
        spec = SPECS[name]
        ids = df["compound"].map(compound_ids)
        stored = {tuple(r) for r in session.execute(select(model.compound_id, model.content_hash))}
        keys = list(zip(ids.tolist(), df["content_hash"].tolist()))
        is_new = np.fromiter((k not in stored for k in keys), dtype=bool, count=len(keys)) if stored else np.ones(len(keys), dtype=bool)
        # replicate rows identical within one import have distinct hashes already (occurrence number)
        new = df[is_new].copy()
        new["_compound_id"] = ids[is_new]
        cols = {"compound_id": "_compound_id", **_db_columns(spec, skip=("compound",)), "content_hash": "content_hash"}
        if name == "kinetics":
            cols.update({"koff_per_s": "koff_per_s", "koff_text": "koff_text", "koff_given_as": "koff_given_as"})
        values = _columns(new, cols)
        new_ids = _insert(session, model.__table__, values, {"created_at": now}, name, prog, ("compound_id", "content_hash"))
        n_rows = len(new_ids)
        summary["tables"][name] = _stat(v, name, n_rows, 0, len(df) - n_rows)
        if n_rows:
            events.append(
                _event(actor, "import", model.__tablename__, None, None,
                       {"files": v.files[name], "rows": len(df), "inserted": n_rows, "duplicates_skipped": len(df) - n_rows,
                        **seal_rows(session, model.__tablename__, new_ids)}, reason)
            )

    append_events(session, events)
    summary["audit_events"] = len(events)
    return summary


# ------------------------------------------------------------------ large files, in bounded memory
def _known_compounds(session: Session, v: Validated) -> set[str]:
    stored = set(session.execute(select(Compound.name)).scalars())
    df = v.tables.get("compounds")
    return stored | (set(df["compound"].dropna()) if df is not None else set())


def _deferred_chunks(deferred: list[tuple[Path, str]], known: Iterable[str] | dict[str, int]):
    """Validated chunks of the large files, table by table: ``(table, files, df or None, errors, warnings)``.

    Replicate numbering (content hashes) runs across all files of a table, as
    in a whole-file import; every row's compound must be known.
    """
    for name in MODELS:
        files = [f for f, t in deferred if t == name]
        if not files:
            continue
        occ = Occurrences()
        labels = [str(f) for f in files]
        for f in files:
            for raw in iter_csv_chunks(Path(f), name, STREAM_ROWS):
                v = validate_tables([raw], occ)
                errors = list(raw.errors) + list(v.errors)
                df = v.tables.get(name)
                if df is not None and not df.empty:
                    unknown = df[df["compound"].notna() & ~df["compound"].isin(known)]
                    for label, line, value in zip(unknown["_label"], unknown["_line"], unknown["compound"]):
                        errors.append(InputError(f"unknown compound {value!r} (not in the database or in this import)",
                                                 file=label, line=int(line), column="compound"))
                    errors.sort(key=lambda e: (e.location.line or 0) if e.location else 0)
                yield name, labels, df, errors, v.warnings


def _capped(errors: list[InputError], more: int) -> list[InputError]:
    if more:
        errors = errors + [InputError(f"... and {more:,} more problems in the large file(s) not listed; fix these and import again")]
    return errors


def _scan_deferred(deferred: list[tuple[Path, str]], known: set[str]) -> list[InputError]:
    errors: list[InputError] = []
    more = 0
    for _, _, _, chunk_errors, _ in _deferred_chunks(deferred, known):
        room = MAX_STREAM_ERRORS - len(errors)
        errors += chunk_errors[:max(room, 0)]
        more += max(len(chunk_errors) - max(room, 0), 0)
    return _capped(errors, more)


def _write_deferred(session: Session, deferred: list[tuple[Path, str]], actor: str, prog: Progress, summary: dict[str, Any]) -> None:
    """Validate and insert the large files chunk by chunk inside the import's transaction.

    Memory stays bounded by the chunk size: only the ids of the inserted rows
    are kept (8 bytes a row); the audit event's value seal reads the rows back
    in blocks, as for a whole-file import.  Any problem raises :class:`ImportErrors` after the whole file was
    checked, and the transaction then writes nothing.
    """
    compound_ids = dict(session.execute(select(Compound.name, Compound.id)).all())
    now = dt.datetime.now(dt.timezone.utc)
    files_all = summary["files"] + [str(f) for f, _ in deferred]
    reason = f"import of {', '.join(Path(f).name for f in files_all)}"  # the files' own names, not where they sat
    summary["files"] = files_all
    errors: list[InputError] = []
    more = 0
    warnings: list[str] = []
    events: list[dict[str, Any]] = []
    state: dict[str, dict[str, Any]] = {}
    for name, labels, df, chunk_errors, chunk_warnings in _deferred_chunks(deferred, compound_ids.keys()):
        st = state.setdefault(name, {"files": labels, "rows": 0, "ids": [],
                                     "stored": session.execute(select(MODELS[name].id).limit(1)).first() is not None})
        warnings += [w.one_line() for w in chunk_warnings[:100]]
        if chunk_errors or errors:
            room = MAX_STREAM_ERRORS - len(errors)
            errors += chunk_errors[:max(room, 0)]
            more += max(len(chunk_errors) - max(room, 0), 0)
            continue
        if df is None or df.empty:
            continue
        model, spec = MODELS[name], SPECS[name]
        st["rows"] += len(df)
        ids = df["compound"].map(compound_ids)
        is_new = np.ones(len(df), dtype=bool)
        if st["stored"]:
            hashes = df["content_hash"].tolist()
            found: set[tuple[int, str]] = set()
            for i in range(0, len(hashes), 500):
                found |= {tuple(r) for r in session.execute(
                    select(model.compound_id, model.content_hash).where(model.content_hash.in_(hashes[i:i + 500])))}
            is_new = np.fromiter(((c, h) not in found for c, h in zip(ids.tolist(), hashes)), dtype=bool, count=len(df))
        new = df[is_new].copy()
        new["_compound_id"] = ids[is_new]
        cols = {"compound_id": "_compound_id", **_db_columns(spec, skip=("compound",)), "content_hash": "content_hash"}
        if name == "kinetics":
            cols.update({"koff_per_s": "koff_per_s", "koff_text": "koff_text", "koff_given_as": "koff_given_as"})
        values = _columns(new, cols)
        new_ids = _insert(session, model.__table__, values, {"created_at": now}, name, prog, ("compound_id", "content_hash"))
        st["ids"].append(np.asarray(new_ids, dtype=np.int64))
        prog.say(f"{name}: {st['rows']:,} rows checked and written", transient=True)
    if errors:
        raise ImportErrors(_capped(errors, more))
    for name, st in state.items():
        ids = np.concatenate(st["ids"]) if st["ids"] else np.empty(0, dtype=np.int64)
        n_rows = len(ids)
        summary["tables"][name] = {"files": st["files"], "rows": st["rows"], "inserted": n_rows, "updated": 0,
                                   "unchanged": st["rows"] - n_rows}
        if n_rows:  # the same value seal as a whole-file import (read back in blocks: memory stays bounded)
            events.append(_event(actor, "import", MODELS[name].__tablename__, None, None,
                                 {"files": st["files"], "rows": st["rows"], "inserted": n_rows,
                                  "duplicates_skipped": st["rows"] - n_rows,
                                  **seal_rows(session, MODELS[name].__tablename__, (int(i) for i in ids))}, reason))
    append_events(session, events)
    summary["audit_events"] = summary.get("audit_events", 0) + len(events)
    summary["_stream_warnings"] = warnings


@dataclass
class _Snapshot:
    programs: pd.DataFrame
    compounds: pd.DataFrame


def _resolve(session: Session, v: Validated, keep_existing: bool = False) -> tuple[_Snapshot, list[InputError]]:
    """Stored programs and compounds, and the errors of ``v`` against them (references, stage changes)."""
    prog_cols = [Program.id, Program.name] + [getattr(Program, n) for n in _program_db_cols()]
    stored_programs = pd.DataFrame(session.execute(select(*prog_cols)).all(), columns=[c.key for c in prog_cols])
    stored_compounds = pd.DataFrame(
        session.execute(select(Compound.id, Compound.name, Compound.program_id, Compound.stage, Compound.series, Compound.smiles)).all(),
        columns=["id", "name", "program_id", "stage", "series", "smiles"],
    )
    programs_df = v.tables.get("programs", pd.DataFrame(columns=list(PROGRAMS.names)))
    compounds_df = v.tables.get("compounds", pd.DataFrame(columns=list(COMPOUNDS.names) + ["_label", "_line"]))
    program_names = dict(zip(stored_programs["id"], stored_programs["name"]))
    compound_rows = stored_compounds.set_index("name", drop=False)
    errors = _reference_errors(
        v,
        set(stored_programs["name"]) | set(programs_df["program"].dropna()),
        set(stored_compounds["name"]) | set(compounds_df["compound"].dropna()),
    )
    if not keep_existing:  # otherwise stored compounds keep their stage and program
        errors += _change_errors(compounds_df.drop_duplicates(subset=["compound"]), compound_rows, program_names)
    errors += _near_duplicate_errors(programs_df, "program", stored_programs["name"])
    errors += _near_duplicate_errors(compounds_df, "compound", stored_compounds["name"])
    return _Snapshot(stored_programs, stored_compounds), errors


def _near_duplicate_errors(df: pd.DataFrame, key: str, stored: pd.Series) -> list[InputError]:
    """New names that a stored name spells differently only by case or look-alike characters (:func:`name_key`)."""
    if df.empty or stored.empty:
        return []
    names = df[key]
    new = df[names.notna() & ~names.isin(set(stored))]
    if new.empty:
        return []
    stored_by_key: dict[str, str] = {}
    for name in stored.tolist():
        stored_by_key.setdefault(name_key(name), name)
    errors = []
    codes, uniques = pd.factorize(new[key].to_numpy(dtype=object))
    hit = np.array([stored_by_key.get(name_key(u)) for u in uniques.tolist()] + [None], dtype=object)[codes]
    for (label, line, value), other in zip(new[["_label", "_line", key]].itertuples(index=False, name=None), hit):
        if other is not None:
            errors.append(InputError(f"{key} {value!r} differs from the stored {key} {other!r} only by case or look-alike "
                                     "characters; use the stored spelling", file=label, line=int(line), column=key))
    return errors


def _program_db_cols() -> list[str]:
    cols = []
    for n in _PROGRAM_FIELDS:
        c = PROGRAMS.col(n)
        cols += [c.db, c.text_db] if c.is_quantity else [c.db]
    return cols


def _stat(v: Validated, table: str, inserted: int, updated: int, unchanged: int) -> dict[str, Any]:
    return {"files": v.files.get(table, []), "rows": len(v.tables.get(table, [])), "inserted": inserted, "updated": updated, "unchanged": unchanged}


def _public(row: dict[str, Any]) -> dict[str, Any]:
    return {k: (v.isoformat() if isinstance(v, (dt.date, dt.datetime)) else v) for k, v in row.items() if k != "created_at" and not k.startswith("_")}


def _insert(session: Session, table, cols: dict[str, list[Any]], constants: dict[str, Any], label: str, prog: Progress,
            key: tuple[str, ...]) -> list[int]:
    """Insert in chunks of :data:`CHUNK` rows (progress after each); returns the new ids in row order.

    Ids come from :func:`insert_columns_ids`; where another writer's rows
    interleaved (PostgreSQL) a chunk's ids are read back by ``key`` columns
    and ``created_at``.
    """
    n = len(next(iter(cols.values()), []))
    ids: list[int] = []
    for i in range(0, n, CHUNK):
        part = {k: v[i : i + CHUNK] for k, v in cols.items()}
        got = insert_columns_ids(session, table, part, constants)
        if got is None:
            by_key = {tuple(r[1:]): r[0] for r in session.execute(
                select(table.c.id, *(table.c[k] for k in key)).where(table.c.created_at == constants["created_at"]))}
            got = [by_key[k] for k in zip(*(part[k] for k in key))]
        ids += got
        prog.say(f"{label} {min(i + CHUNK, n):,}/{n:,}", transient=True)
    return ids


def _event(actor, action, entity_type, entity_id, before, after, reason) -> dict[str, Any]:
    return {"actor": actor, "action": action, "entity_type": entity_type, "entity_id": entity_id, "before": before, "after": after, "reason": reason}


def _reference_errors(v: Validated, programs: set[str], compounds: set[str]) -> list[InputError]:
    errors: list[InputError] = []
    checks = [("compounds", "program", programs, "program")] + [(t, "compound", compounds, "compound") for t in MODELS]
    for table, col, known, word in checks:
        df = v.tables.get(table)
        if df is None or df.empty:
            continue
        unknown = df[df[col].notna() & ~df[col].isin(known)]
        for label, line, value in zip(unknown["_label"], unknown["_line"], unknown[col]):
            errors.append(InputError(f"unknown {word} {value!r} (not in the database or in this import)", file=label, line=int(line), column=col))
    return errors


def _change_errors(compounds_df: pd.DataFrame, stored: pd.DataFrame, program_names: dict[int, str]) -> list[InputError]:
    """Stage or program changes of stored compounds (vectorised: one merge, then only the offending rows)."""
    errors: list[InputError] = []
    if compounds_df.empty or stored.empty:
        return errors
    both = compounds_df.merge(stored.reset_index(drop=True), left_on="compound", right_on="name", suffixes=("", "_db"))
    if both.empty:
        return errors
    stage_changed = (both["stage"].notna() & (both["stage"] != both["stage_db"])).to_numpy(dtype=bool)
    for name, stage, stage_db, label, line in both.loc[stage_changed, ["compound", "stage", "stage_db", "_label", "_line"]].itertuples(index=False, name=None):
        errors.append(InputError(
            f"stage changes go through gates: {name} is {stage_db!r} in the database, the file says {stage!r}",
            file=label, line=int(line), column="stage"))
    have = both["program_id"].map(program_names)
    moved = (both["program"].notna() & (both["program"] != have)).to_numpy(dtype=bool)
    for (name, label, line), h in zip(both.loc[moved, ["compound", "_label", "_line"]].itertuples(index=False, name=None), have[moved]):
        errors.append(InputError(
            f"{name} belongs to program {h!r}; moving a compound between programs is not done by import",
            file=label, line=int(line), column="program"))
    return errors


def _update_programs(session, df, stored, actor, reason, events) -> int:
    if df.empty or stored.empty:
        return 0
    stored = stored.set_index("name")
    both = df[df["program"].isin(stored.index)]
    updates = []
    for _, r in both.iterrows():
        s = stored.loc[r["program"]]
        before, after = {}, {}
        for n in _PROGRAM_FIELDS:
            c = PROGRAMS.col(n)
            text_col = c.text_db if c.is_quantity else c.db
            new_text = r[text_col] if c.is_quantity else r[n]
            if new_text is None or new_text == s[text_col]:
                continue  # an empty cell never clears a stored value
            before[text_col], after[text_col] = _py(s[text_col]), new_text
            if c.is_quantity:
                before[c.db], after[c.db] = _py(s[c.db]), _py(r[c.db])
        if after:
            updates.append({"id": int(s["id"]), **after})
            events.append(_event(actor, "update", "program", int(s["id"]), before, after, reason))
    if updates:
        session.execute(update(Program), updates)
    return len(updates)


def _update_compounds(session, df, stored, actor, reason, events) -> int:
    """Update series/smiles of stored compounds where the file gives a different non-empty value."""
    if df.empty:
        return 0
    both = df[["compound", "series", "smiles"]].merge(
        stored.reset_index(drop=True)[["name", "id", "series", "smiles"]], left_on="compound", right_on="name", suffixes=("", "_db"))
    changed = {f: both[f].notna() & (both[f] != both[f"{f}_db"]) for f in ("series", "smiles")}
    any_change = changed["series"] | changed["smiles"]
    updates = []
    for pos in np.flatnonzero(any_change.to_numpy()):
        row = both.iloc[pos]
        before, after = {}, {}
        for f in ("series", "smiles"):
            if changed[f].iloc[pos]:
                before[f], after[f] = _py(row[f"{f}_db"]), row[f]
        updates.append({"id": int(row["id"]), **after})
        events.append(_event(actor, "update", "compound", int(row["id"]), before, after, reason))
    if updates:
        session.execute(update(Compound), updates)
    return len(updates)


# ------------------------------------------------------------------ export
def export_all(engine: Engine, out_dir: str | Path, xlsx: str | Path | None = None) -> dict[str, Any]:
    """Write every table of the format to ``out_dir`` (CSV) and optionally one ``.xlsx`` workbook (see :mod:`.exporting`).

    Also writes ``audit_head.json``: the audit chain's head read just before
    the export (``krt audit head``), so the export can be tied to the trail
    later (``krt audit verify --expect-head``).
    """
    import json

    from .auditlog import head
    from .exporting import export_tables

    anchor = head(engine)
    summary = export_tables(engine, out_dir, xlsx)
    (Path(out_dir) / AUDIT_HEAD_FILE).write_text(json.dumps(anchor, indent=2) + "\n", encoding="utf-8")
    summary["audit_head"] = anchor
    return summary


AUDIT_HEAD_FILE = "audit_head.json"


__all__ = ["import_path", "export_all", "Progress", "PROGRESS_THRESHOLD"]
