"""``krt demo open`` end to end: it builds the demo database, prints the demo password and serves the
dashboard signed in as the demo lead (the browser smoke test drives the signed-in dashboard itself)."""

from __future__ import annotations

import os
import socket
import subprocess
import sys
import time
import urllib.request

import pytest


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@pytest.mark.slow
def test_demo_open_prints_the_demo_password_and_serves_the_dashboard(tmp_path):
    from tracker.db.session import make_engine
    from tracker.services.users import authenticate

    port = _free_port()
    env = dict(os.environ, XDG_DATA_HOME=str(tmp_path / "data"), KRT_CONFIG_DIR=str(tmp_path / "config"))
    env.pop("KRT_DATABASE_URL", None)
    log = tmp_path / "demo-open.log"
    with log.open("wb") as out:
        proc = subprocess.Popen([sys.executable, "-m", "tracker", "demo", "open", "--no-browser", "--port", str(port)],
                                env=env, stdout=out, stderr=subprocess.STDOUT)
    try:
        deadline = time.monotonic() + 240
        while True:
            try:
                with urllib.request.urlopen(f"http://127.0.0.1:{port}/_stcore/health", timeout=2) as r:
                    if r.status == 200:
                        break
            except OSError:
                pass
            if proc.poll() is not None or time.monotonic() > deadline:
                pytest.fail(f"krt demo open did not serve: {log.read_text()[-2000:]}")
            time.sleep(1)
    finally:
        proc.terminate()
        proc.wait(timeout=30)
    text = log.read_text()
    line = next(x for x in text.splitlines() if "demo password" in x)
    password = line.rsplit(":", 1)[1].strip()
    assert "signed in as demo-lead" in line
    db = tmp_path / "data" / "krt" / "demo.sqlite"
    if not db.exists():  # platformdirs' folder name is the package's APP_NAME
        db = next((tmp_path / "data").rglob("demo.sqlite"))
    engine = make_engine(f"sqlite:///{db}")
    try:
        assert authenticate(engine, "demo-lead", password)["role"] == "lead"
    finally:
        engine.dispose()
