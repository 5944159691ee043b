"""Real-browser smoke test: ``streamlit run app.py`` on the demo database, opened in headless Chromium.

Needs the Debian ``chromium`` package and the ``playwright`` Python package
(test extras); Playwright's own browser download is not used.  Skipped when
either is missing, unless ``KRT_REQUIRE_BROWSER=1`` (CI), which makes that a
failure.
"""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import sys
import time
import urllib.request
from pathlib import Path

import pytest

pytestmark = pytest.mark.browser

REPO = Path(__file__).resolve().parents[2]
CHROMIUM = shutil.which("chromium") or ("/usr/bin/chromium" if Path("/usr/bin/chromium").exists() else None)
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--disable-component-update",
                 "--disable-sync", "--no-first-run"]
PAGES = {  # url path -> page title
    "": "Risk overview", "overview": "Risk overview", "compound": "Compound evidence", "kinetic-map": "Kinetic map", "measure-next": "Measure next",
    "stage-gate": "Stage gate", "what-if": "What-if", "review-pack": "Review pack", "load-data": "Load data",
    "audit-trail": "Audit trail", "fit-time-course": "Fit a time course", "what-changed": "What changed",
}


def _need_browser():
    required = os.environ.get("KRT_REQUIRE_BROWSER") == "1"
    problem = None
    if CHROMIUM is None:
        problem = "chromium is not installed"
    else:
        try:
            import playwright.sync_api  # noqa: F401
        except ImportError:
            problem = "the playwright Python package is not installed (pip install -e '.[test]')"
    if problem:
        if required:
            pytest.fail(problem + " (KRT_REQUIRE_BROWSER=1)")
        pytest.skip(problem)


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


SERVED: dict[str, Path] = {}  # the served database, for tests that check what the browser wrote


@pytest.fixture(scope="module")
def server(demo_template, tmp_path_factory):
    """The dashboard served by ``streamlit run app.py`` on a copy of the demo database; yields its base URL."""
    _need_browser()
    folder = tmp_path_factory.mktemp("browser")
    db = folder / "demo.sqlite"
    shutil.copy2(demo_template, db)
    SERVED["db"] = db
    port = _free_port()
    log = folder / "streamlit.log"
    from tracker.services.demo import DEMO_LEAD, DEMO_PASSWORD, ENV_DEMO_SIGNIN_PASSWORD, ENV_DEMO_SIGNIN_USER

    # as `krt demo open` does: the dashboard signs in as the demo lead with the documented demo password
    env = dict(os.environ, KRT_DATABASE_URL=f"sqlite:///{db}")
    env.pop("KRT_USER", None)
    env[ENV_DEMO_SIGNIN_USER], env[ENV_DEMO_SIGNIN_PASSWORD] = DEMO_LEAD, DEMO_PASSWORD
    cmd = [sys.executable, "-m", "streamlit", "run", str(REPO / "app.py"), "--server.headless", "true",
           "--server.port", str(port), "--server.address", "127.0.0.1", "--browser.gatherUsageStats", "false",
           "--server.fileWatcherType", "none"]
    with log.open("wb") as out:
        proc = subprocess.Popen(cmd, cwd=REPO, env=env, stdout=out, stderr=subprocess.STDOUT)
    base = f"http://127.0.0.1:{port}"
    try:
        deadline = time.monotonic() + 90
        while True:
            if proc.poll() is not None:
                pytest.fail(f"streamlit exited with {proc.returncode}: {log.read_text()[-2000:]}")
            try:
                with urllib.request.urlopen(f"{base}/_stcore/health", timeout=2) as r:
                    if r.status == 200:
                        break
            except OSError:
                pass
            if time.monotonic() > deadline:
                pytest.fail(f"streamlit did not become healthy in 90 s: {log.read_text()[-2000:]}")
            time.sleep(0.5)
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
    _need_browser()
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=CHROMIUM, args=CHROMIUM_ARGS)
        try:
            yield b
        finally:
            b.close()


def _settle(page, timeout_s: float = 60.0) -> None:
    """Wait until the app shell exists, the script has finished running and a page title is drawn."""
    page.wait_for_selector("[data-testid='stApp']", timeout=timeout_s * 1000)
    page.wait_for_selector("h1", timeout=timeout_s * 1000)
    deadline = time.monotonic() + timeout_s
    quiet = 0
    while time.monotonic() < deadline:
        running = page.locator("[data-testid='stStatusWidget']").count() > 0 or \
            page.locator("[data-testid='stSpinner']").count() > 0
        quiet = 0 if running else quiet + 1
        if quiet >= 3:  # not running for ~1.5 s
            return
        time.sleep(0.5)
    raise AssertionError("the app kept running for more than a minute")


def test_the_portfolio_opens_in_a_real_browser_with_grades_and_compound_ids(server, browser, tmp_path, demo_graded):
    page = browser.new_page(viewport={"width": 1500, "height": 1100})
    page.goto(server + "/")
    _settle(page)
    page.wait_for_selector("[data-testid='stDataFrame']", timeout=30_000)
    page.screenshot(path=str(tmp_path / "portfolio.png"), full_page=True)
    body = page.inner_text("body")
    assert "Risk overview" in body
    from tracker.ui import theme

    assert theme.GRADES["high"].badge in body
    assert "Signed in as demo-lead" in body
    # compound ids: the "what the flagged compounds need" list names the high-risk compounds as text on the
    # page with their whole prompt (the table itself draws on a canvas)
    top = next(n for n, g in demo_graded.items() if g["grade"] == "high")
    attention = page.get_by_text("What the flagged compounds need").first
    assert attention.is_visible()
    body = page.inner_text("body")
    listed = body[body.index("What the flagged compounds need"):body.index("compound(s) match")]
    assert top in listed
    assert (tmp_path / "portfolio.png").stat().st_size > 10_000
    assert page.locator("[data-testid='stException']").count() == 0
    page.close()


def test_every_page_renders_in_the_browser_without_an_error(server, browser, tmp_path):
    page = browser.new_page(viewport={"width": 1400, "height": 1000})
    for path, title in PAGES.items():
        page.goto(f"{server}/{path}")
        _settle(page)
        assert page.locator("h1").first.inner_text().strip() == title, path
        assert page.locator("[data-testid='stException']").count() == 0, path
        assert "Page not found" not in page.inner_text("body"), path  # every page answers its own deep link
        page.screenshot(path=str(tmp_path / f"{path or 'overview'}.png"))
    page.close()


def test_the_review_pack_opens_offline_with_its_charts(browser, shared_engine, demo_graded, tmp_path):
    from tracker.ui.review_pack import build_pack

    name = next(n for n, g in demo_graded.items() if g["program"] == "Heronfield" and g["grade"] == "high")
    path = tmp_path / "pack.html"
    path.write_text(build_pack(shared_engine, compounds=[name], graded=list(demo_graded.values())), encoding="utf-8")
    context = browser.new_context(offline=True)
    page = context.new_page()
    requests: list[str] = []
    page.on("request", lambda r: requests.append(r.url))
    page.goto(path.as_uri())
    page.wait_for_load_state("load")
    n_images = page.locator("img.chart").count()
    assert n_images >= 2
    loaded = page.evaluate("Array.from(document.images).every(i => i.complete && i.naturalWidth > 0)")
    assert loaded, "an embedded chart did not decode"
    assert all(u.startswith(("file:", "data:")) for u in requests), requests
    page.screenshot(path=str(tmp_path / "pack.png"), full_page=True)
    context.close()


def test_a_time_course_is_fitted_in_the_browser_with_its_overlay_and_residuals(server, browser, tmp_path):
    """Upload the demo's dissociation file through the real file input; the fit, its band and the residuals render."""
    page = browser.new_page(viewport={"width": 1400, "height": 1400})
    page.goto(f"{server}/fit-time-course")
    _settle(page)
    page.locator("[data-testid='stFileUploader'] input[type='file']").first.set_input_files(
        str(REPO / "seed_demo" / "timecourses" / "QM-2007_dissociation.csv"))
    page.get_by_text("dissociation fit of QM-2007_dissociation.csv").wait_for(timeout=60_000)
    _settle(page)
    page.wait_for_selector("[data-testid='stVegaLiteChart'] canvas, [data-testid='stVegaLiteChart'] svg", timeout=60_000)
    body = page.inner_text("body")
    assert "Residence time" in body and "95% CI" in body
    assert page.locator("[data-testid='stVegaLiteChart']").count() == 2  # the fit overlay and the residuals
    assert page.locator("[data-testid='stException']").count() == 0
    page.screenshot(path=str(tmp_path / "fit.png"), full_page=True)
    page.close()


def test_the_landing_table_fits_1440_pixels_without_scrolling_sideways(server, browser, tmp_path):
    page = browser.new_page(viewport={"width": 1440, "height": 1000})
    page.goto(server + "/")
    _settle(page)
    page.wait_for_selector("[data-testid='stDataFrame']", timeout=30_000)
    sizes = page.evaluate("""() => {
        const s = document.querySelector("[data-testid='stDataFrame'] .dvn-scroller");
        return s ? [s.scrollWidth, s.clientWidth] : null; }""")
    page.screenshot(path=str(tmp_path / "landing-1440.png"))
    assert sizes is not None, "the data grid's scroller was not found"
    scroll_width, client_width = sizes
    assert scroll_width <= client_width + 1, sizes
    page.close()


def test_a_double_click_on_the_gate_confirmation_records_one_decision_and_moves_one_stage(server, browser, tmp_path,
                                                                                      demo_graded):
    """The lead's gate flow in a real browser: choose, review, then a double click on "Confirm and sign"."""
    import re

    from sqlalchemy import text

    from tracker.db.session import make_engine
    from tracker.domain import STAGES
    from tracker.services.demo import DEMO_PASSWORD

    name, g = next((n, g) for n, g in sorted(demo_graded.items())
                   if g["stage"] not in STAGES[-2:] and not any(f["severity"] == "high" for f in g["findings"]))
    to = STAGES[STAGES.index(g["stage"]) + 1]
    engine = make_engine(f"sqlite:///{SERVED['db']}")

    def state():
        with engine.connect() as conn:
            n = conn.execute(text("SELECT count(*) FROM decisions d JOIN compounds c ON c.id = d.compound_id "
                                  "WHERE c.name = :n"), {"n": name}).scalar()
            stage = conn.execute(text("SELECT stage FROM compounds WHERE name = :n"), {"n": name}).scalar()
        return int(n), stage

    before, _ = state()
    page = browser.new_page(viewport={"width": 1440, "height": 1400})
    page.goto(f"{server}/stage-gate?compound={name}")
    _settle(page)
    page.locator("[data-testid='stSelectbox']").filter(has_text="Move to stage").click()
    page.get_by_role("option", name=to, exact=True).click()
    _settle(page)
    page.get_by_label("Reason for the decision").fill("browser review: kinetics acceptable")
    page.get_by_label("Your password (signature)").fill(DEMO_PASSWORD)
    page.get_by_label("Your password (signature)").press("Enter")
    _settle(page)
    page.get_by_role("button", name=re.compile(r"^Review: advance")).click()
    _settle(page)
    assert f"{g['stage']} → {to}" in page.inner_text("body")
    page.get_by_role("button", name=re.compile(r"^Confirm and sign")).dblclick()
    deadline = time.monotonic() + 60  # signing verifies a password hash: wait for the write, not a fixed time
    while state()[0] == before and time.monotonic() < deadline:
        time.sleep(0.5)
    page.get_by_text("Approved:").first.wait_for(timeout=60_000)
    _settle(page)
    time.sleep(2)  # a second decision from the second click would have landed by now
    page.screenshot(path=str(tmp_path / "gate.png"), full_page=True)
    after, stage = state()
    engine.dispose()
    assert after == before + 1, "a double click must record one decision"
    assert stage == to, "and move the compound one stage only"
    page.close()


def test_a_lead_opens_an_action_on_a_drawn_compound_and_sees_it_by_owner(server, browser, tmp_path, demo_graded):
    """The compound page draws the structure (an inline SVG from RDKit) and opens an action from a finding."""
    name = next(n for n, g in demo_graded.items() if g["findings"])
    page = browser.new_page(viewport={"width": 1440, "height": 1100})
    page.goto(f"{server}/compound?compound={name}")
    _settle(page)
    drawing = page.locator(".krt-structure svg").first
    drawing.wait_for(timeout=30_000)
    box = drawing.bounding_box()
    assert box and box["width"] > 100 and box["height"] > 60
    assert drawing.locator("path").count() > 5  # bonds drawn as paths
    page.get_by_label("Note").fill("book the SPR slot")
    page.get_by_role("button", name="Open action").click()
    page.get_by_text("Action opened on").first.wait_for(timeout=30_000)
    _settle(page)
    assert "book the SPR slot" in page.inner_text("body")
    page.screenshot(path=str(tmp_path / "action.png"), full_page=True)
    page.goto(f"{server}/overview")
    _settle(page)
    page.get_by_text("Actions by owner").first.wait_for(timeout=30_000)
    assert page.locator("[data-testid='stException']").count() == 0
    page.close()
