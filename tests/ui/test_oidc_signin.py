"""Team-mode sign-in end to end: a real OpenID Connect provider, ``streamlit run`` with ``[auth]``, headless Chromium.

The provider is PyPI ``oidc-provider-mock`` (a complete OIDC provider: discovery,
authorization code flow, signed ID tokens, userinfo), served by this test on
127.0.0.1 at a free port.  The dashboard runs with an ``[auth]`` secrets section
pointing at it; Chromium clicks *Sign in*, picks the person on the provider's
page and comes back signed in.  The OIDC identity maps to a ``users`` row by its
claims (here the preferred username of the demo's lead), so the sidebar shows the
lead role; a person with no registered claim is a viewer; Markdown in a claimed
name shows as plain characters.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

import pytest

pytestmark = pytest.mark.browser

REPO = Path(__file__).resolve().parents[2]
CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--no-first-run"]
LEAD_SUB = "sub-ana-7"
STRANGER_SUB = "sub-zed-9"
HOSTILE_NAME = "**eve** [x](http://evil.example)"


def _need(module: str) -> None:
    required = os.environ.get("KRT_REQUIRE_BROWSER") == "1"
    problem = None
    if CHROMIUM is None:
        problem = "chromium is not installed"
    else:
        try:
            __import__(module)
            import playwright.sync_api  # noqa: F401
        except ImportError as exc:
            problem = f"{exc.name} is not installed (pip install -e '.[test]')"
    if problem:
        if required:
            pytest.fail(problem + " (KRT_REQUIRE_BROWSER=1)")
        pytest.skip(problem)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_healthy(url: str, proc: subprocess.Popen | None, log: Path | None, seconds: float = 90) -> None:
    deadline = time.monotonic() + seconds
    while True:
        if proc is not None and proc.poll() is not None:
            pytest.fail(f"server exited with {proc.returncode}: {log.read_text()[-2000:] if log else ''}")
        try:
            with urllib.request.urlopen(url, timeout=2) as r:
                if r.status == 200:
                    return
        except OSError:
            pass
        if time.monotonic() > deadline:
            pytest.fail(f"{url} did not answer in {seconds:.0f} s: {log.read_text()[-2000:] if log else ''}")
        time.sleep(0.3)


@pytest.fixture(scope="module")
def oidc_provider():
    """A real OpenID Connect provider on 127.0.0.1 (free port), in a thread of this test process; yields its base URL."""
    _need("oidc_provider_mock")
    import oidc_provider_mock
    import werkzeug.serving

    users = [
        oidc_provider_mock.User(sub=LEAD_SUB, claims={"email": "ana@example.org", "preferred_username": "demo-lead",
                                                      "name": "Ana Lead"}),
        oidc_provider_mock.User(sub=STRANGER_SUB, claims={"email": "zed@example.org", "name": HOSTILE_NAME}),
    ]
    server = werkzeug.serving.make_server("127.0.0.1", _free_port(), oidc_provider_mock.app(user_claims=users), threaded=True)
    thread = threading.Thread(target=server.serve_forever, kwargs={"poll_interval": 0.1}, daemon=True)
    thread.start()
    base = f"http://127.0.0.1:{server.server_port}"
    try:
        _wait_healthy(f"{base}/.well-known/openid-configuration", None, None, 30)
        yield base
    finally:
        server.shutdown()
        server.server_close()
        thread.join(5)


@pytest.fixture(scope="module")
def team_server(oidc_provider, demo_template, tmp_path_factory):
    """``streamlit run app.py`` with ``[auth]`` secrets naming the provider, on a copy of the demo database."""
    folder = tmp_path_factory.mktemp("team")
    db = folder / "demo.sqlite"
    shutil.copy2(demo_template, db)
    port = _free_port()
    base = f"http://127.0.0.1:{port}"
    (folder / ".streamlit").mkdir()
    (folder / ".streamlit" / "secrets.toml").write_text(
        "[auth]\n"
        f'redirect_uri = "{base}/oauth2callback"\n'
        'cookie_secret = "test-cookie-secret-0123456789abcdefghijklmnop"\n'
        'client_id = "krt-dashboard"\n'
        'client_secret = "krt-dashboard-secret"\n'
        f'server_metadata_url = "{oidc_provider}/.well-known/openid-configuration"\n', encoding="utf-8")
    log = folder / "streamlit.log"
    env = dict(os.environ, KRT_DATABASE_URL=f"sqlite:///{db}", PYTHONPATH=os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]))
    env.pop("KRT_USER", None)
    cmd = [sys.executable, "-m", "streamlit", "run", str(REPO / "app.py"), "--server.headless", "true",
           "--server.port", str(port), "--server.address", "127.0.0.1", "--browser.gatherUsageStats", "false",
           "--server.fileWatcherType", "none"]
    with log.open("wb") as out:
        proc = subprocess.Popen(cmd, cwd=folder, env=env, stdout=out, stderr=subprocess.STDOUT)  # cwd: its .streamlit/secrets.toml
    try:
        _wait_healthy(f"{base}/_stcore/health", proc, log)
        yield base
    finally:
        proc.terminate()
        try:
            proc.wait(timeout=15)
        except subprocess.TimeoutExpired:
            proc.kill()
            proc.wait(timeout=15)


@pytest.fixture(scope="module")
def browser():
    _need("oidc_provider_mock")
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            yield b
        finally:
            b.close()


def _sidebar_text(page, must_contain: str, timeout_s: float = 60) -> str:
    page.wait_for_selector("[data-testid='stSidebar']", timeout=timeout_s * 1000)
    deadline = time.monotonic() + timeout_s
    text = ""
    while time.monotonic() < deadline:
        text = page.inner_text("[data-testid='stSidebar']").replace("\u2060", "")  # md() word joiners are invisible
        if must_contain in text:
            return text
        time.sleep(0.5)
    raise AssertionError(f"{must_contain!r} never appeared in the sidebar: {text!r}")


def _sign_in(browser, base: str, sub: str, tmp_path: Path, shot: str):
    context = browser.new_context(viewport={"width": 1400, "height": 1000})
    page = context.new_page()
    page.goto(base + "/")
    _sidebar_text(page, "Not signed in")
    page.get_by_role("button", name="Sign in").click()
    # the provider's own authorization page: pick the person (predefined users are buttons named by subject)
    page.wait_for_url("**/oauth2/authorize**", timeout=30_000)
    page.get_by_role("button", name=sub).click()
    page.wait_for_url(base + "/**", timeout=30_000)
    return context, page


def test_oidc_sign_in_maps_the_identity_to_its_user_row_and_role(team_server, browser, tmp_path):
    context, page = _sign_in(browser, team_server, LEAD_SUB, tmp_path, "lead")
    try:
        text = _sidebar_text(page, "Signed in as")
        page.screenshot(path=str(tmp_path / "signed-in-lead.png"), full_page=True)
        assert "Ana Lead · lead" in text  # display name from the token, role from the users row "demo-lead"
        assert "Signed in as demo-lead" in text
        assert "Not signed in" not in text and "LOCAL MODE" not in text
    finally:
        context.close()


def test_an_unknown_identity_is_a_viewer_and_markdown_in_its_name_stays_text(team_server, browser, tmp_path):
    context, page = _sign_in(browser, team_server, STRANGER_SUB, tmp_path, "stranger")
    try:
        text = _sidebar_text(page, "Signed in as")
        page.screenshot(path=str(tmp_path / "signed-in-stranger.png"), full_page=True)
        assert f"{HOSTILE_NAME} · viewer" in text  # the characters as typed: no bold text, no link
        assert "Signed in as zed@example.org" in text
        assert "Not in the users table: read-only" in text
        links = page.locator("[data-testid='stSidebar'] a[href*='evil.example']")
        assert links.count() == 0, links.first.evaluate("e => e.parentElement.outerHTML")
        # the sidebar bolds the display name as a whole; the name's own ** make no nested bold
        assert page.locator("[data-testid='stSidebar'] strong strong, [data-testid='stSidebar'] strong em").count() == 0
        bold = page.locator("[data-testid='stSidebar'] strong", has_text="eve")
        assert bold.count() == 1 and bold.inner_text().replace("\u2060", "") == HOSTILE_NAME
    finally:
        context.close()


def test_before_sign_in_the_sidebar_offers_only_the_sign_in(team_server, browser):
    context = browser.new_context()
    try:
        page = context.new_page()
        page.goto(team_server + "/")
        text = _sidebar_text(page, "Not signed in")
        assert "Signed in as" not in text and "LOCAL MODE" not in text
    finally:
        context.close()
