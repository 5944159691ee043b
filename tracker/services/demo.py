"""The demo scenario: three invented programs, 33 compounds, raw time courses.

``load_demo`` migrates the database, registers three demo users (a lead, a
scientist, a viewer) who share the documented :data:`DEMO_PASSWORD`, imports ``seed_demo/*.csv`` in one transaction and fits
and saves every raw time course listed in ``seed_demo/timecourses/manifest.csv``
through the same services the CLI uses, so the audit trail records all of it.
Loading twice changes nothing, and loading again after using the demo (gate
decisions, actions, own imports) keeps that work: stored programs and
compounds keep their stage and settings; only missing rows are added.
``krt demo open --rebuild`` starts from a fresh database instead.
"""

from __future__ import annotations

import csv
import importlib.resources
from pathlib import Path
from typing import Any

from sqlalchemy import Engine, select

from ..db import migrate
from ..db.models import User
from ..db.uow import UnitOfWork
from ..errors import KrtError
from ..units import parse_quantity

DEMO_USERS = (("demo-lead", "lead"), ("demo-scientist", "scientist"), ("demo-viewer", "viewer"))
#: The one documented password of the invented demo users (printed by ``krt demo load`` and ``krt demo open``).
#: Demo only: anyone who reads this can sign in to a demo database as its lead.
DEMO_PASSWORD = "kinetic-demo-2026"
DEMO_LEAD = "demo-lead"
#: ``krt demo open`` hands the dashboard these two variables; the dashboard then signs in with them through the
#: ordinary password check (local mode only).  Never set them outside a demo.
ENV_DEMO_SIGNIN_USER = "KRT_DEMO_SIGNIN_USER"
ENV_DEMO_SIGNIN_PASSWORD = "KRT_DEMO_SIGNIN_PASSWORD"
IMPORTER = "demo-scientist"


def demo_dir() -> Path:
    """The ``seed_demo`` folder: beside the package in a checkout, else inside the installed package."""
    repo = Path(__file__).resolve().parents[2] / "seed_demo"
    if (repo / "compounds.csv").is_file():
        return repo
    packaged = Path(str(importlib.resources.files("tracker") / "seed_demo"))
    if (packaged / "compounds.csv").is_file():
        return packaged
    raise KrtError("the demo files (seed_demo/) are missing from this installation")


def manifest(folder: Path | None = None) -> list[dict[str, str]]:
    folder = (folder or demo_dir()) / "timecourses"
    with (folder / "manifest.csv").open(newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _ensure_users(engine: Engine) -> None:
    """Register the demo users with the demo password (and give it to demo users made before passwords existed)."""
    from .users import add_user, set_password

    with UnitOfWork(engine, write=False) as uow:
        existing = {r.name: r.password_hash for r in uow.session.execute(select(User.name, User.password_hash))}
    first = not existing
    for name, role in DEMO_USERS:
        if name not in existing:
            add_user(engine, name, role, by=None if first else DEMO_LEAD, password=DEMO_PASSWORD,
                     full_name=name.replace("-", " ").title())
            first = False
        elif existing[name] is None:
            nobody_has_one = not any(existing.values())
            set_password(engine, name, DEMO_PASSWORD, by=None if nobody_has_one else DEMO_LEAD, reason="demo password")
            existing[name] = "set"


def fit_entry(entry: dict[str, str], folder: Path):
    """Read and fit one manifest entry; returns ``(result, raw_frame, options)``."""
    from ..io.timecourse import read_time_course
    from .fits import fit_time_course

    path = folder / entry["file"]
    method = entry["method"]
    # the demo files carry their units in the headers ('time (min)'); the manifest may add them for older files
    df = read_time_course(path, method, time_unit=entry.get("time_unit") or None, conc_unit=entry.get("conc_unit") or None)
    opts: dict[str, Any] = {}
    kinds = {"tracer_kon": "rate2", "tracer_koff": "rate1", "tracer_conc": "concentration"}
    for key, kind in kinds.items():
        if entry.get(key):
            opts[key] = parse_quantity(entry[key], kind).si
    return fit_time_course(method, df, source=entry["file"], **opts), df, opts


def load_demo(engine: Engine) -> dict[str, Any]:
    """Seed ``engine`` with the demo scenario; returns a summary."""
    from .fits import save_fit
    from .history import deferred
    from .importing import import_path

    migrate.upgrade(engine)
    _ensure_users(engine)
    folder = demo_dir()
    # only adds: work done on the demo since (gates, imports, actions) survives a re-load
    with deferred(engine, "demo load", IMPORTER):  # one grading refresh for the import and every fit
        summary = import_path(engine, folder, actor=IMPORTER, progress=False, keep_existing=True)
        saved = 0
        tc_folder = folder / "timecourses"
        for entry in manifest(folder):
            result, df, opts = fit_entry(entry, tc_folder)
            out = save_fit(entry["compound"], result, df, entry["file"], engine=engine, actor=IMPORTER,
                           units=df.attrs.get("units", {}),
                           options={k: entry[k] for k in ("tracer_kon", "tracer_koff", "tracer_conc") if entry.get(k)})
            saved += bool(out["created"])
    return {"import": summary, "fits_saved": saved, "users": [u for u, _ in DEMO_USERS], "demo_password": DEMO_PASSWORD}
