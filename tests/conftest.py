"""Shared fixtures: real databases on both backends.

``db_url`` is parametrised over ``sqlite`` (a temporary file) and
``postgresql`` (a freshly created database with a random name on the server at
``$KRT_TEST_POSTGRES_URL``, default ``postgresql+psycopg://postgres@127.0.0.1:5432/test``,
dropped afterwards).  PostgreSQL tests are skipped when the server cannot be
reached, unless ``KRT_REQUIRE_POSTGRES=1`` (CI), which makes that a failure.
The terminal summary says how many tests ran on each backend.
"""

from __future__ import annotations

import os
import re
import shutil
import uuid
from collections import Counter

import pytest

#: the password every test user gets (tests sign in like people do: ``krt login`` / the dashboard form)
TEST_PASSWORD = "test-password-42"

PG_URL = os.environ.get("KRT_TEST_POSTGRES_URL", "postgresql+psycopg://postgres@127.0.0.1:5432/test")
BACKENDS = ("sqlite", "postgresql")
_ran: Counter = Counter()
_pg_state: dict[str, object] = {}


def _pg_conninfo(url: str, database: str | None = None) -> str:
    from sqlalchemy.engine import make_url

    u = make_url(url).set(drivername="postgresql")
    if database:
        u = u.set(database=database)
    return u.render_as_string(hide_password=False)


def _pg_admin():
    """An autocommit psycopg connection to the test server's maintenance database, or a skip/fail."""
    import psycopg

    if "error" not in _pg_state:
        try:
            psycopg.connect(_pg_conninfo(PG_URL), connect_timeout=3).close()
            _pg_state["error"] = None
        except psycopg.Error as exc:
            _pg_state["error"] = str(exc).strip().splitlines()[0] if str(exc).strip() else type(exc).__name__
    if _pg_state["error"]:
        message = f"PostgreSQL not reachable at {PG_URL}: {_pg_state['error']}"
        if os.environ.get("KRT_REQUIRE_POSTGRES") == "1":
            pytest.fail(message + " (KRT_REQUIRE_POSTGRES=1)")
        pytest.skip(message)
    return psycopg.connect(_pg_conninfo(PG_URL), autocommit=True, connect_timeout=5)


def _pg_create(template: str | None = None) -> str:
    """Create a database (optionally from ``template``); returns its SQLAlchemy URL."""
    from sqlalchemy.engine import make_url

    name = f"krt_test_{uuid.uuid4().hex[:12]}"
    with _pg_admin() as admin:
        if template:
            admin.execute(f'CREATE DATABASE "{name}" TEMPLATE "{template}" STRATEGY FILE_COPY')
        else:
            admin.execute(f'CREATE DATABASE "{name}"')
    return make_url(PG_URL).set(database=name).render_as_string(hide_password=False)


def _pg_drop(url: str) -> None:
    from sqlalchemy.engine import make_url

    name = make_url(url).database
    with _pg_admin() as admin:
        admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')


def _migrate(url: str) -> None:
    from tracker.db import migrate
    from tracker.db.session import make_engine

    eng = make_engine(url)
    try:
        migrate.upgrade(eng)
    finally:
        eng.dispose()


@pytest.fixture(scope="session")
def _migrated_templates(tmp_path_factory):
    """Per backend, one database migrated to head, copied for each test (cheaper than migrating each time)."""
    made: dict[str, str] = {}

    def get(backend: str) -> str:
        if backend not in made:
            if backend == "sqlite":
                url = f"sqlite:///{tmp_path_factory.mktemp('template') / 'migrated.sqlite'}"
            else:
                url = _pg_create()
            _migrate(url)
            made[backend] = url
        return made[backend]

    yield get
    if "postgresql" in made:
        _pg_drop(made["postgresql"])


def _new_database(backend: str, tmp_path, migrated: bool, templates) -> str:
    if backend == "sqlite":
        path = tmp_path / f"krt-{uuid.uuid4().hex[:8]}.sqlite"
        if migrated:
            shutil.copyfile(templates("sqlite").removeprefix("sqlite:///"), path)
        return f"sqlite:///{path}"
    if migrated:
        from sqlalchemy.engine import make_url

        return _pg_create(template=make_url(templates("postgresql")).database)
    return _pg_create()


@pytest.fixture(params=BACKENDS)
def backend(request) -> str:
    """``sqlite`` or ``postgresql``; PostgreSQL is skipped (or fails under KRT_REQUIRE_POSTGRES=1) when unreachable."""
    if request.param == "postgresql":
        _pg_admin().close()
    return request.param


@pytest.fixture
def db_url(backend, tmp_path, _migrated_templates):
    """URL of an empty database (no schema yet) on each backend; dropped afterwards."""
    url = _new_database(backend, tmp_path, False, _migrated_templates)
    yield url
    if backend == "postgresql":
        _pg_drop(url)


@pytest.fixture
def engine(db_url):
    """An engine on the empty database of ``db_url``, disposed afterwards."""
    from tracker.db.session import make_engine

    eng = make_engine(db_url)
    yield eng
    eng.dispose()


def _migrated(backend, tmp_path, templates):
    from tracker.db.session import make_engine

    url = _new_database(backend, tmp_path, True, templates)
    eng = make_engine(url)
    try:
        yield eng
    finally:
        eng.dispose()
        if backend == "postgresql":
            _pg_drop(url)


@pytest.fixture
def migrated_engine(backend, tmp_path, _migrated_templates):
    """An engine on a fresh database migrated to head (URL: ``engine.url.render_as_string(hide_password=False)``)."""
    yield from _migrated(backend, tmp_path, _migrated_templates)


@pytest.fixture
def second_migrated_engine(backend, tmp_path, _migrated_templates):
    """A second, independent migrated database on the same backend (for round trips)."""
    yield from _migrated(backend, tmp_path, _migrated_templates)


# ------------------------------------------------------------------ quick local loop
def _full_run(config) -> bool:
    return bool(config.getoption("--run-slow") or os.environ.get("KRT_FULL_TESTS") == "1"
                or os.environ.get("CI", "").lower() in ("1", "true"))


def pytest_addoption(parser):
    parser.addoption("--run-slow", action="store_true", default=False,
                     help="also run the tests marked slow (statistical coverage, fuzzing, packaging); CI always does")


def pytest_collection_modifyitems(config, items):
    if _full_run(config):
        return
    skip = pytest.mark.skip(reason="slow: run with --run-slow (CI runs every test)")
    for item in items:
        if "slow" in item.keywords:
            item.add_marker(skip)


# ------------------------------------------------------------------ identity
@pytest.fixture(scope="session", autouse=True)
def _cheap_password_hashing():
    """argon2's cheapest parameters inside the test process: the real ones cost ~1 s per hash on a busy CI box,
    and the suite hashes hundreds of passwords.  The algorithm and code path are the same; the shipped
    parameters are pinned by tests/services/test_identity.py, and subprocesses (the browser test) use them."""
    from argon2 import PasswordHasher, profiles

    from tracker.services import users

    original = users._hasher
    cheap = PasswordHasher.from_parameters(profiles.CHEAPEST)
    users._hasher = lambda: cheap
    users._dummy_hash.cache_clear()
    yield original
    users._hasher = original
    users._dummy_hash.cache_clear()


@pytest.fixture(autouse=True)
def _private_config_dir(tmp_path, monkeypatch):
    """Every test keeps its ``krt login`` sessions in its own folder, never in the real config folder,
    and no test inherits an identity from the environment."""
    monkeypatch.setenv("KRT_CONFIG_DIR", str(tmp_path / "krt-config"))
    monkeypatch.delenv("KRT_USER", raising=False)
    monkeypatch.delenv("KRT_SESSION_HOURS", raising=False)


def cli_login(url: str, name: str, password: str = TEST_PASSWORD) -> int:
    """``krt --database URL login NAME --password-stdin`` with ``password`` on stdin; returns the exit code."""
    import io
    import sys

    from tracker.cli import main

    old = sys.stdin
    sys.stdin = io.StringIO(password + "\n")
    try:
        return main(["--database", url, "login", name, "--password-stdin"])
    finally:
        sys.stdin = old


@pytest.fixture
def test_password() -> str:
    return TEST_PASSWORD


@pytest.fixture
def login():
    """``login(url_or_engine, name, password=TEST_PASSWORD)``: sign in on the command line (asserts success)."""
    def run(target, name: str, password: str = TEST_PASSWORD) -> None:
        url = target if isinstance(target, str) else target.url.render_as_string(hide_password=False)
        assert cli_login(url, name, password) == 0, f"krt login {name} failed"

    return run


# ------------------------------------------------------------------ backend summary
_PARAM = re.compile(r"\[(.*)\]$")


def pytest_runtest_logreport(report):
    if report.when != "call" or report.outcome == "skipped":
        return
    m = _PARAM.search(report.nodeid)
    if not m:
        return
    parts = set(m.group(1).split("-"))
    for backend in BACKENDS:
        if backend in parts:
            _ran[backend] += 1


def pytest_terminal_summary(terminalreporter, exitstatus, config):
    line = ", ".join(f"{b}={_ran[b]} tests" for b in BACKENDS)
    terminalreporter.write_line(f"backends: {line}")


# ------------------------------------------------------------------ invented sample data
SAMPLE = {
    "programs.csv": (
        "program,target,intended_profile,engagement_threshold,onset_max,duration_min,offset_max,dosing_interval,target_half_life\n"
        "Ashgrove,Kinase AG1,once-daily,0.8,2 h,24 h,,24 h,30 h\n"
        "Brackenfold,Receptor BF2,short-acting,50 %,15 min,,4 h,,\n"
    ),
    "compounds.csv": (
        "compound,program,series,stage,smiles\n"
        "AGR-001,Ashgrove,S1,hit,CCO\n"
        "AGR-002,Ashgrove,S1,lead-optimization,\n"
        "AGR-003,Ashgrove,S2,candidate,c1ccccc1\n"
        "BKF-001,Brackenfold,,hit-to-lead,\n"
    ),
    "potency.csv": (
        "compound,assay,readout,value,incubation,format,tracer_conc,tracer_kd,tracer_residence_time,max_response_fraction,date,source\n"
        "AGR-001,TR-FRET binding,IC50,3.2 nM,30 min,competition-binding,5 nM,2 nM,10 min,,2026-01-05,\n"
        "AGR-002,enzyme activity,Ki,12 µM,1 h,enzyme,,,,,,lab-notebook-17\n"
        "AGR-003,cell reporter,EC50,0.45 nM,4 h,functional,,,,0.7,2026-02-11,\n"
        "BKF-001,radioligand,Kb,8e-9 M,90 min,binding,,,,,,\n"
    ),
    "kinetics.csv": (
        "compound,method,kon,koff,residence_time,kd,kon_low,kon_high,koff_low,koff_high,date,source\n"
        "AGR-001,spr,1e6 /M/s,1e-3 /s,,1 nM,5e5 /M/s,2e6 /M/s,5e-4 /s,2e-3 /s,2026-01-10,\n"
        "AGR-002,jump-dilution,,,3 h,,,,,,,\n"
        "AGR-003,competition-kinetics,0.06 /nM/min,,45 min,,,,,,2026-02-01,\n"
        "AGR-003,competition-kinetics,0.05 /nM/min,,60 min,,,,,,2026-03-01,\n"
    ),
    "pk.csv": (
        "compound,species,route,half_life,free_cmax,tmax,dosing_interval,source\n"
        "AGR-003,rat,oral,4 h,50 nM,1 h,24 h,\n"
        "AGR-003,rat,iv,3 h,200 nM,,,\n"
        "BKF-001,dog,oral,90 min,12 nM,30 min,,study-9\n"
    ),
}


def write_files(folder, files: dict[str, str | bytes]):
    folder.mkdir(parents=True, exist_ok=True)
    for name, content in files.items():
        path = folder / name
        if isinstance(content, bytes):
            path.write_bytes(content)
        else:
            path.write_text(content, encoding="utf-8")
    return folder


@pytest.fixture
def sample_dir(tmp_path):
    """A folder with one CSV per table of invented data."""
    return write_files(tmp_path / "sample", SAMPLE)


@pytest.fixture
def db_snapshot():
    """A function returning every row of every table (by id), to prove a failed import wrote nothing."""
    from sqlalchemy import select

    from tracker.db.models import Base

    def snap(engine) -> dict[str, list[tuple]]:
        out = {}
        with engine.connect() as conn:
            for table in Base.metadata.sorted_tables:
                out[table.name] = [tuple(r) for r in conn.execute(select(table).order_by(*table.primary_key.columns))]
        return out

    return snap
