"""The dashboard's edge: local mode listens on the loopback interface only; user text never renders as Markdown."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
import tomllib
import urllib.request
from pathlib import Path

import pytest
from markdown_it import MarkdownIt

from tracker.ui.widgets import md

REPO = Path(__file__).resolve().parents[2]
HOSTILE = "**bold** [x](http://evil) _it_ # h :red[y] <b>t</b> &amp; www.evil.example a@evil.example"
HOSTILE_USER = "**eve** [me](http://evil)"


# ------------------------------------------------------------------ Markdown
@pytest.mark.parametrize("text", [HOSTILE, HOSTILE_USER, "AUR-001", "1. item", "- item", "> quote", "`code`", "a\\*b", "x\ny"])
def test_escaped_text_renders_as_the_same_characters_in_commonmark(text):
    """Checked against markdown-it-py, a CommonMark implementation (CommonMark spec 0.31, "Backslash escapes")."""
    rendered = MarkdownIt("commonmark").renderInline(md(text))
    import html

    # md() adds invisible word joiners (U+2060) that keep GitHub-style autolinks (http://, www., a@b) from forming
    assert rendered.replace("\u2060", "") == html.escape(" ".join(text.split()), quote=False).replace("&quot;", '"')
    assert "<a" not in rendered and "<strong>" not in rendered and "<em>" not in rendered


def _texts(at) -> list[str]:
    out = []
    for kind in ("markdown", "caption", "subheader", "title", "header", "error", "warning", "info", "success"):
        out += [str(e.value) for e in getattr(at, kind)]
    out += [str(b.label) for b in at.button]
    return out


def test_markdown_in_names_renders_as_plain_text_on_every_page(app, ui, demo_engine, tmp_path):
    from tracker.services.importing import import_path

    folder = tmp_path / "hostile"
    folder.mkdir()
    (folder / "programs.csv").write_text(f"program,target\n\"{HOSTILE} P\",T1\n", encoding="utf-8")
    (folder / "compounds.csv").write_text(f"compound,program,series,stage\n\"{HOSTILE}\",\"{HOSTILE} P\",\"{HOSTILE} S\",hit\n", encoding="utf-8")
    (folder / "potency.csv").write_text(f"compound,assay,readout,value,incubation,format\n\"{HOSTILE}\",\"{HOSTILE} A\",IC50,5 nM,30 min,binding\n",
                                        encoding="utf-8")
    (folder / "kinetics.csv").write_text(f"compound,method,kon,koff\n\"{HOSTILE}\",spr,1e6 /M/s,1e-4 /s\n", encoding="utf-8")
    import_path(demo_engine, folder, actor="demo-lead")
    from tracker.services.demo import DEMO_PASSWORD
    from tracker.services.users import add_user

    add_user(demo_engine, HOSTILE_USER, "viewer", by="demo-lead", password=DEMO_PASSWORD)  # signs in like anyone
    at = app(user=HOSTILE_USER)
    seen = _texts(at)
    for view in ("compound", "gate", "queue", "kinetic_map"):
        state = {"krt_compound": HOSTILE} if view in ("compound", "gate") else {}
        ui.open(at, view, **state)
        assert not at.exception, [e.value for e in at.exception]
        seen += _texts(at)
    raw = [t for t in seen if "**bold**" in t or "](http://evil)" in t or "**eve**" in t]
    assert raw == []
    escaped = [t for t in seen if md("**bold**") in t or md(HOSTILE_USER) in t]
    assert any(md(HOSTILE_USER) in t for t in escaped)  # the sidebar shows the user, escaped
    assert sum(md(HOSTILE) in t for t in seen) >= 2  # the compound heading and the gate line at least


# ------------------------------------------------------------------ binding
def test_the_repository_config_binds_the_dashboard_to_loopback():
    config = tomllib.loads((REPO / ".streamlit" / "config.toml").read_text(encoding="utf-8"))
    assert config["server"]["address"] == "127.0.0.1"


def _outside_address() -> str | None:
    """This host's address on its outward interface (no packet is sent), or None without one."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as s:
        try:
            s.connect(("192.0.2.1", 9))  # TEST-NET-1 (RFC 5737): only picks the route
        except OSError:
            return None
        addr = s.getsockname()[0]
    return None if addr.startswith("127.") else addr


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _reachable(host: str, port: int) -> bool:
    try:
        with socket.create_connection((host, port), timeout=2):
            return True
    except OSError:
        return False


def test_demo_open_serves_on_loopback_and_refuses_other_interfaces(tmp_path):
    outside = _outside_address()
    if outside is None:
        pytest.skip("this host has no non-loopback IPv4 address to test from")
    port = _free_port()
    log = tmp_path / "demo-open.log"
    env = dict(os.environ, XDG_DATA_HOME=str(tmp_path / "data"), KRT_USER="demo-lead",
               PYTHONPATH=os.pathsep.join([str(REPO), os.environ.get("PYTHONPATH", "")]))
    env.pop("KRT_DATABASE_URL", None)
    with log.open("wb") as out:
        proc = subprocess.Popen([sys.executable, "-m", "tracker", "demo", "open", "--no-browser", "--port", str(port)],
                                cwd=tmp_path, env=env, stdout=out, stderr=subprocess.STDOUT, start_new_session=True)
    try:
        deadline = time.monotonic() + 240
        while True:
            if proc.poll() is not None:
                pytest.fail(f"krt demo open exited with {proc.returncode}: {log.read_text()[-2000:]}")
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=2) as r:
                    if r.status == 200:
                        break
            except OSError:
                pass
            if time.monotonic() > deadline:
                pytest.fail(f"the dashboard did not become healthy in 240 s: {log.read_text()[-2000:]}")
            time.sleep(0.5)
        assert _reachable("127.0.0.1", port)
        assert not _reachable(outside, port), f"the local-mode dashboard answers on {outside}:{port}"
        assert f"http://127.0.0.1:{port}" in log.read_text()
    finally:
        if proc.poll() is None:
            os.killpg(proc.pid, signal.SIGTERM)  # the process group this test started (krt and its streamlit child)
            try:
                proc.wait(timeout=20)
            except subprocess.TimeoutExpired:
                os.killpg(proc.pid, signal.SIGKILL)
                proc.wait(timeout=20)
