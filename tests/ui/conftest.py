"""Fixtures for the dashboard tests: a demo database per test, and AppTest runs against it.

The demo scenario is loaded once per session into a template SQLite file
(``tracker.services.demo.load_demo``: migrations, demo users, the seed_demo
import and the saved fits); each test gets its own copy, so tests that write
(gates, imports) cannot see each other.  The app reads ``KRT_DATABASE_URL``; in local mode the
fixtures sign in through the sidebar's sign-in form with the documented demo
password, like a person would.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[2]
APP = REPO / "app.py"
VIEWS = "tracker/ui/views"


@pytest.fixture(scope="session")
def demo_template(tmp_path_factory) -> Path:
    """A demo database file, built once per session (do not write to it; copy it)."""
    from tracker.db.session import make_engine
    from tracker.services.demo import load_demo

    path = tmp_path_factory.mktemp("demo") / "demo.sqlite"
    engine = make_engine(f"sqlite:///{path}")
    load_demo(engine)
    with engine.connect() as conn:  # fold the WAL into the main file so a plain copy is complete
        conn.exec_driver_sql("PRAGMA wal_checkpoint(TRUNCATE)")
    engine.dispose()
    return path


@pytest.fixture
def demo_url(demo_template, tmp_path) -> str:
    """URL of a private copy of the demo database."""
    path = tmp_path / "demo.sqlite"
    shutil.copy2(demo_template, path)
    return f"sqlite:///{path}"


@pytest.fixture
def demo_engine(demo_url):
    from tracker.db.session import make_engine

    engine = make_engine(demo_url)
    yield engine
    engine.dispose()


@pytest.fixture(scope="session")
def shared_demo_url(demo_template, tmp_path_factory) -> str:
    """One demo copy shared by the tests that only read: the dashboard's caches then serve them all."""
    path = tmp_path_factory.mktemp("shared") / "demo.sqlite"
    shutil.copy2(demo_template, path)
    return f"sqlite:///{path}"


@pytest.fixture(scope="session")
def demo_graded(shared_demo_url) -> dict:
    """The grading service's answer for the demo, by compound (computed once)."""
    from tracker.db.session import make_engine
    from tracker.services.grading import grade_portfolio

    engine = make_engine(shared_demo_url)
    try:
        return {g["compound"]: g for g in grade_portfolio(engine)}
    finally:
        engine.dispose()


def _app_factory(monkeypatch, default_url: str):
    from streamlit.testing.v1 import AppTest

    def make(user: str | None = "demo-lead", url: str | None = None, secrets: dict | None = None, st_user: dict | None = None,
             password: str | None = None) -> AppTest:
        from tracker.services.demo import DEMO_PASSWORD

        monkeypatch.setenv("KRT_DATABASE_URL", url or default_url)
        at = AppTest.from_file(str(APP), default_timeout=60)
        for k, v in (secrets or {}).items():
            at.secrets[k] = v
        if st_user is not None:
            at.user = st_user
        at.run()
        assert not at.exception, [e.value for e in at.exception]
        if user is not None and not secrets:
            sign_in(at, user, password or DEMO_PASSWORD)
            assert not at.error, [e.value for e in at.error]
        return at

    return make


def sign_in(at, user: str, password: str):
    """Fill the sidebar's sign-in form and submit it."""
    at.sidebar.text_input(key="krt_signin_name").input(user)
    at.sidebar.text_input(key="krt_signin_password").input(password)
    next(b for b in at.sidebar.button if b.label == "Sign in").click().run()
    assert not at.exception, [e.value for e in at.exception]
    return at


@pytest.fixture
def app(monkeypatch, demo_url):
    """``app(user="demo-lead")`` -> an AppTest of app.py on this test's own demo copy, signed in locally as
    ``user`` through the sign-in form (``user=None``: nobody signed in), already run once (the risk overview, which registers the pages).  For tests that write."""
    return _app_factory(monkeypatch, demo_url)


@pytest.fixture
def app_ro(monkeypatch, shared_demo_url):
    """Like ``app`` on the shared demo copy: for tests that only read."""
    return _app_factory(monkeypatch, shared_demo_url)


@pytest.fixture
def shared_engine(shared_demo_url):
    from tracker.db.session import make_engine

    engine = make_engine(shared_demo_url)
    yield engine
    engine.dispose()


def open_page(at, view: str, **state):
    """Set session state, switch to ``tracker/ui/views/<view>.py`` and run it."""
    for k, v in state.items():
        at.session_state[k] = v
    at.switch_page(f"{VIEWS}/{view}.py").run()
    assert not at.exception, [e.value for e in at.exception]
    return at


_MD_ESCAPE = re.compile(r"\\([!-/:-@\[-`{-~])")


def shown(markdown: str) -> str:
    """The characters a reader sees of Markdown source with escaped user text (``tracker.ui.widgets.md``):
    backslash escapes resolved, the invisible word joiners dropped."""
    return _MD_ESCAPE.sub(r"\1", str(markdown)).replace("\u2060", "")


def page_text(at) -> str:
    """Every title, markdown, caption, alert and metric text of the current run, joined (escapes resolved, see ``shown``)."""
    parts = []
    for kind in ("title", "header", "subheader", "markdown", "caption", "success", "info", "warning", "error", "metric", "code"):
        for el in at.get(kind):
            text = f"{getattr(el, 'label', '') or ''} {getattr(el, 'value', '')}"
            parts.append(text if kind == "code" else shown(text))
    return "\n".join(parts)


def chart_count(at) -> int:
    return len(at.get("vega_lite_chart")) + len(at.get("arrow_vega_lite_chart"))


@pytest.fixture
def ui():
    """Helpers for page tests: ``ui.open(at, view, **state)``, ``ui.text(at)``, ``ui.charts(at)``."""
    from types import SimpleNamespace

    return SimpleNamespace(open=open_page, text=page_text, charts=chart_count, shown=shown)
