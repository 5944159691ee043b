"""Child-process bodies for the multi-process tests (imported by name in ``spawn`` children).

Not a test module: ``tests/db/test_concurrency.py`` and ``tests/db/test_backup.py``
put this folder on ``sys.path`` and run these functions in a :class:`SpawnPool`
(worker processes started with the ``spawn`` method), so every child is a fresh
interpreter that opens its own engine from the database URL, exactly as a
second ``krt`` process or dashboard would.  The pool is started once per test
module because starting an interpreter that imports pandas and SQLAlchemy costs
seconds; every call still opens and disposes its own engine.

Each function returns one report dict: what it did and every exception it saw
(type and one-line message).  Nothing is swallowed silently: the tests assert
that the ``errors`` lists are empty.
"""

from __future__ import annotations

import csv
import io
import random
import time
from pathlib import Path

PROGRAM = "Concurrency"
STAGE_PATH = ("hit", "hit-to-lead", "lead-optimization", "advanced-lead")


PASSWORD = "test-password-42"  # tests/conftest.py TEST_PASSWORD: the lead signs every gate decision

def compound_name(worker: int, batch: int, i: int) -> str:
    return f"W{worker}-B{batch:02d}-{i:03d}"


def _csv(header: list[str], rows: list[list[str]]) -> str:
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    w.writerows(rows)
    return buf.getvalue()


def write_batch(folder: Path, worker: int, batch: int, size: int, seed: int) -> dict[str, int]:
    """One import folder: ``size`` new compounds of ``worker``, each with a potency and a kinetics row.

    Values are drawn from ``random.Random(seed)`` (invented data).  Returns the
    rows per table.
    """
    rng = random.Random(seed)
    folder.mkdir(parents=True, exist_ok=True)
    names = [compound_name(worker, batch, i) for i in range(size)]
    (folder / "compounds.csv").write_text(
        _csv(["compound", "program", "series", "stage", "smiles"], [[n, PROGRAM, f"S{worker}", "hit", ""] for n in names]),
        encoding="utf-8")
    pot = []
    kin = []
    for n in names:
        pot.append([n, "binding assay", "IC50", f"{rng.uniform(0.1, 900):.4g} nM", f"{rng.choice([30, 60, 120])} min", "binding"])
        kin.append([n, "spr", f"{10 ** rng.uniform(5, 7):.4g} /M/s", f"{10 ** rng.uniform(-4, -2):.4g} /s"])
    (folder / "potency.csv").write_text(
        _csv(["compound", "assay", "readout", "value", "incubation", "format"], pot), encoding="utf-8")
    (folder / "kinetics.csv").write_text(_csv(["compound", "method", "kon", "koff"], kin), encoding="utf-8")
    return {"compounds": size, "potency": size, "kinetics": size}


def _one_line(exc: BaseException) -> str:
    return f"{type(exc).__name__}: {' '.join(str(exc).split())[:300]}"


def warm(barrier) -> int:
    """Import the services once in this worker (and wait for the others, so every worker is warmed)."""
    import os

    import tracker.services.gates  # noqa: F401
    import tracker.services.importing  # noqa: F401

    barrier.wait(timeout=120)
    return os.getpid()


def importer(url: str, worker: int, folders: list[str], actor: str, barrier) -> dict:
    """Import ``folders`` one after another, as soon as every process is ready."""
    import os

    report = {"worker": worker, "pid": os.getpid(), "imported": [], "errors": [], "seconds": 0.0}
    try:
        from tracker.db.session import make_engine
        from tracker.services.importing import import_path

        engine = make_engine(url)
        try:
            barrier.wait(timeout=180)
            t0 = time.perf_counter()
            for folder in folders:
                try:
                    summary = import_path(engine, folder, actor=actor, progress=False)
                    report["imported"].append({t: s["inserted"] for t, s in summary["tables"].items()})
                except Exception as exc:  # every failure is reported, none is expected
                    report["errors"].append(_one_line(exc))
            report["seconds"] = time.perf_counter() - t0
        finally:
            engine.dispose()
    except Exception as exc:
        report["errors"].append(_one_line(exc))
    return report


def gater(url: str, worker: int, moves: list[tuple[str, str]], lead: str, waivers: list[str], barrier) -> dict:
    """Request the gate moves ``(compound, to_stage)`` in order; record approvals and refusals."""
    import os

    report = {"worker": worker, "pid": os.getpid(), "approved": [], "refused": [], "errors": []}
    try:
        from tracker.db.session import make_engine
        from tracker.errors import GateRefused
        from tracker.services.gates import request_gate

        engine = make_engine(url)
        try:
            barrier.wait(timeout=180)
            for compound, to_stage in moves:
                try:
                    res = request_gate(engine, compound, to_stage, lead, f"worker {worker} moves {compound}", waivers=waivers,
                                       password=PASSWORD)
                    report["approved"].append((compound, res["from_stage"], res["to_stage"], res["decision_id"]))
                except GateRefused as exc:
                    report["refused"].append((compound, to_stage, exc.reasons))
                except Exception as exc:  # anything else is a failure the test reports
                    report["errors"].append(_one_line(exc))
        finally:
            engine.dispose()
    except Exception as exc:
        report["errors"].append(_one_line(exc))
    return report


def steady_writer(url: str, folders: list[str], actor: str, pause_s: float, started, barrier) -> dict:
    """Import ``folders`` one by one with short pauses (a busy app); ``started`` is set after the first commit."""
    report = {"imported": 0, "errors": []}
    try:
        from tracker.db.session import make_engine
        from tracker.services.importing import import_path

        engine = make_engine(url)
        try:
            barrier.wait(timeout=180)
            for k, folder in enumerate(folders):
                try:
                    import_path(engine, folder, actor=actor, progress=False)
                    report["imported"] += 1
                except Exception as exc:
                    report["errors"].append(_one_line(exc))
                if k == 0:
                    started.set()
                time.sleep(pause_s)
        finally:
            engine.dispose()
    except Exception as exc:
        report["errors"].append(_one_line(exc))
    finally:
        started.set()
    return report


class SpawnPool:
    """Worker processes started with ``spawn`` (fresh interpreters), warmed once, reused by several tests.

    ``run([(fn, args), ...])`` runs the calls at once, each in its own worker,
    released together by one barrier appended to ``args``; returns their reports.
    """

    def __init__(self, size: int):
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor

        self.size = size
        ctx = mp.get_context("spawn")
        self.manager = ctx.Manager()
        self.executor = ProcessPoolExecutor(max_workers=size, mp_context=ctx)
        barrier = self.manager.Barrier(size)
        self.pids = set(self.executor.map(warm, [barrier] * size))

    def start(self, calls: list[tuple]) -> list:
        """Submit the calls (each gets the shared barrier as its last argument); their futures."""
        if len(calls) > self.size:
            raise ValueError(f"{len(calls)} calls need {len(calls)} workers; the pool has {self.size}")
        barrier = self.manager.Barrier(len(calls))
        return [self.executor.submit(fn, *args, barrier) for fn, args in calls]

    def run(self, calls: list[tuple], timeout: float = 300) -> list[dict]:
        reports = [f.result(timeout=timeout) for f in self.start(calls)]
        if len({r.get("pid") for r in reports if "pid" in r}) != len([r for r in reports if "pid" in r]):
            raise AssertionError("two calls ran in one worker process")
        return reports

    def close(self) -> None:
        self.executor.shutdown(wait=True, cancel_futures=True)
        self.manager.shutdown()
