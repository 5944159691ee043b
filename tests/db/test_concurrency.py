"""Several processes writing at once: nothing lost, no "database is locked", the audit chain intact.

Each child is a fresh interpreter (``spawn``) that opens its own engine from
the database URL, like a second ``krt`` process or a dashboard session on
another machine.  SQLite runs in WAL mode with a busy timeout, writers begin
with ``BEGIN IMMEDIATE`` and services retry a transient lock a bounded number
of times (``tracker.db.session``); PostgreSQL serialises the audit chain with
an advisory lock and contested gates with ``SELECT ... FOR UPDATE``.  The
model is SQLite's documented WAL concurrency (one writer, many readers; "WAL
mode", sqlite.org) and PostgreSQL's transaction isolation (PostgreSQL
documentation, "Transaction Isolation").  Seeds are fixed and every loop is bounded.
"""

from __future__ import annotations

import sys
from pathlib import Path
from types import SimpleNamespace

import pytest
from sqlalchemy import func, select

from tracker.db.models import AuditEvent, Compound, Decision, KineticMeasurement, Potency, Program, StageHistory
from tracker.rules import config as rc
from tracker.services.auditlog import verify
from tracker.services.importing import import_path
from tracker.services.users import add_user

HERE = Path(__file__).resolve().parent
N_IMPORTERS = 3
BATCHES = 4
BATCH_SIZE = 15
N_GATERS = 3


@pytest.fixture(scope="module")
def workers():
    """The child-process bodies (importable by name in spawned children) and a warmed spawn pool."""
    sys.path.insert(0, str(HERE))
    try:
        import concurrency_workers

        pool = concurrency_workers.SpawnPool(N_GATERS + 1)
        try:
            yield SimpleNamespace(mod=concurrency_workers, pool=pool)
        finally:
            pool.close()
    finally:
        sys.path.remove(str(HERE))


def _url(engine) -> str:
    return engine.url.render_as_string(hide_password=False)


def _prepare(engine, tmp_path: Path, w) -> None:
    """A lead, a scientist and the program every child writes into."""
    add_user(engine, "lena", "lead", password="test-password-42")
    add_user(engine, "sam", "scientist", by="lena", password="test-password-42")
    folder = tmp_path / "program"
    folder.mkdir()
    (folder / "programs.csv").write_text(f"program,target\n{w.PROGRAM},Kinase CX1\n", encoding="utf-8")
    import_path(engine, folder, actor="lena")


def test_three_processes_importing_disjoint_compounds_at_once_lose_nothing_and_keep_the_audit_chain(migrated_engine, tmp_path, workers):
    w_ = workers.mod
    _prepare(migrated_engine, tmp_path, w_)
    with migrated_engine.connect() as conn:
        # grade snapshots are written after each import only when grades change, so the count leaves them out
        events_before = conn.execute(select(func.count()).select_from(AuditEvent).where(AuditEvent.action != "snapshot")).scalar_one()
    plan = {}
    for w in range(N_IMPORTERS):
        folders = []
        for b in range(BATCHES):
            folder = tmp_path / f"w{w}" / f"b{b}"
            w_.write_batch(folder, w, b, BATCH_SIZE, seed=1000 * w + b)
            if b == 0:  # every importer also brings the same new program: created once, by whoever commits first
                (folder / "programs.csv").write_text("program,target\nShared-New,Kinase SN1\n", encoding="utf-8")
            folders.append(str(folder))
        plan[w] = folders

    reports = workers.pool.run([(w_.importer, (_url(migrated_engine), w, plan[w], "sam")) for w in range(N_IMPORTERS)])

    assert [r["errors"] for r in reports] == [[]] * N_IMPORTERS  # no child saw "database is locked" or anything else
    for r in reports:
        batches = [{t: n for t, n in summary.items() if t != "programs"} for summary in r["imported"]]
        assert batches == [{"compounds": BATCH_SIZE, "potency": BATCH_SIZE, "kinetics": BATCH_SIZE}] * BATCHES
    assert sum(summary.get("programs", 0) for r in reports for summary in r["imported"]) == 1
    expected = {w_.compound_name(w, b, i) for w in range(N_IMPORTERS) for b in range(BATCHES) for i in range(BATCH_SIZE)}
    with migrated_engine.connect() as conn:
        names = set(conn.execute(select(Compound.name)).scalars())
        per_compound = conn.execute(
            select(Compound.name, func.count(Potency.id.distinct()), func.count(KineticMeasurement.id.distinct()))
            .join(Potency, Potency.compound_id == Compound.id).join(KineticMeasurement, KineticMeasurement.compound_id == Compound.id)
            .group_by(Compound.name)).all()
        history = conn.execute(select(func.count()).select_from(StageHistory)).scalar_one()
        events_after = conn.execute(select(func.count()).select_from(AuditEvent).where(AuditEvent.action != "snapshot")).scalar_one()
        shared = conn.execute(select(func.count()).select_from(Program).where(Program.name == "Shared-New")).scalar_one()
        created = conn.execute(select(func.count()).select_from(AuditEvent).where(
            AuditEvent.entity_type == "program", AuditEvent.action == "create")).scalar_one()
        imports = dict(conn.execute(select(AuditEvent.entity_type, func.count()).where(AuditEvent.action == "import")
                                    .group_by(AuditEvent.entity_type)).all())
    assert names == expected
    assert {n: (p, k) for n, p, k in per_compound} == {n: (1, 1) for n in expected}
    assert history == len(expected)
    assert shared == 1 and created == 2  # the prepared program and Shared-New, each created exactly once
    # every import is audited as one event per table it added rows to (tracker.services.importing), plus Shared-New once
    n_imports = N_IMPORTERS * BATCHES
    assert imports == {"compounds": n_imports, "potency": n_imports, "kinetic_measurements": n_imports}
    assert events_after - events_before == 3 * n_imports + 1  # none lost, none doubled
    result = verify(migrated_engine)
    assert result["ok"], result["message"]


def test_processes_deciding_gates_at_once_record_every_decision_and_approve_a_contested_move_once(migrated_engine, tmp_path, workers):
    w_ = workers.mod
    _prepare(migrated_engine, tmp_path, w_)
    own = {w: [f"G{w}-{i}" for i in range(2)] for w in range(N_GATERS)}
    rows = [[n, w_.PROGRAM, "G", "hit", ""] for names in own.values() for n in names] + [["SHARED-1", w_.PROGRAM, "G", "hit", ""]]
    folder = tmp_path / "gate-compounds"
    folder.mkdir()
    (folder / "compounds.csv").write_text(w_._csv(["compound", "program", "series", "stage", "smiles"], rows), encoding="utf-8")
    import_path(migrated_engine, folder, actor="sam")
    # a fourth process imports while the gates run (readers and writers mixed)
    batch = tmp_path / "during"
    w_.write_batch(batch, 9, 0, BATCH_SIZE, seed=9)
    with migrated_engine.connect() as conn:
        decisions_before = conn.execute(select(func.count()).select_from(Decision)).scalar_one()

    waivers = list(rc.RULES)  # one-step moves with every finding waived: approval depends only on the stage
    moves = {w: [("SHARED-1", "hit-to-lead")] + [(c, s) for c in own[w] for s in ("hit-to-lead", "lead-optimization")]
             for w in range(N_GATERS)}
    url = _url(migrated_engine)
    targets = [(w_.gater, (url, w, moves[w], "lena", waivers)) for w in range(N_GATERS)]
    targets.append((w_.importer, (url, 9, [str(batch)], "sam")))
    reports = workers.pool.run(targets)

    assert [r["errors"] for r in reports] == [[]] * len(targets)
    gate_reports = [r for r in reports if "approved" in r]
    approved = [a for r in gate_reports for a in r["approved"]]
    refused = [x for r in gate_reports for x in r["refused"]]
    shared_ok = [a for a in approved if a[0] == "SHARED-1"]
    assert len(shared_ok) == 1 and shared_ok[0][1:3] == ("hit", "hit-to-lead")
    assert len(refused) == N_GATERS - 1
    assert all(c == "SHARED-1" and any("already at hit-to-lead" in why for why in reasons) for c, _to, reasons in refused)
    assert sorted(a[0] for a in approved if a[0] != "SHARED-1") == sorted(c for w in own for c in own[w] for _ in range(2))
    with migrated_engine.connect() as conn:
        stages = dict(conn.execute(select(Compound.name, Compound.stage).where(Compound.series == "G")).all())
        decisions = conn.execute(select(func.count()).select_from(Decision)).scalar_one()
        moved = conn.execute(select(func.count()).select_from(StageHistory).where(StageHistory.decision_id.is_not(None))).scalar_one()
        imported = conn.execute(select(func.count()).select_from(Compound).where(Compound.name.like("W9-%"))).scalar_one()
    assert stages == {**{c: "lead-optimization" for w in own for c in own[w]}, "SHARED-1": "hit-to-lead"}
    assert decisions - decisions_before == sum(len(m) for m in moves.values())  # refused attempts are recorded too
    assert moved == len(approved)
    assert imported == BATCH_SIZE
    result = verify(migrated_engine)
    assert result["ok"], result["message"]
