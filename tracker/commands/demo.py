"""``krt demo load`` seeds the demo scenario; ``krt demo open`` also serves the dashboard on it."""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

from ..errors import KrtError

LOCAL_ADDRESS = "127.0.0.1"  # the dashboard of local mode is reachable from this computer only


def register(subparsers) -> None:
    p = subparsers.add_parser("demo", help="the invented demo portfolio")
    sub = p.add_subparsers(dest="demo_command", metavar="ACTION", required=True)
    load = sub.add_parser("load", help="seed the current database with the demo scenario")
    load.add_argument("--json", action="store_true", help="print the summary as JSON")
    load.set_defaults(func=run_load)
    op = sub.add_parser("open", help="build the demo database (first use) and open the dashboard on it")
    op.add_argument("--port", type=int, default=8501, help="port of the dashboard (default 8501)")
    op.add_argument("--rebuild", action="store_true", help="start again from a fresh demo database")
    op.add_argument("--no-browser", action="store_true", help="serve without opening a browser")
    op.set_defaults(func=run_open)


def run_load(args) -> int:
    from ..db.session import database_url, mask_url, open_engine
    from ..services.demo import load_demo

    engine = open_engine()
    summary = load_demo(engine)
    if args.json:
        print(json.dumps(summary, indent=2, default=str))
    else:
        print(f"demo loaded into {mask_url(database_url())}: {summary['fits_saved']} new fits saved; "
              f"users {', '.join(summary['users'])}")
        print(f"demo password (every demo user): {summary['demo_password']}   e.g. krt login demo-lead")
    return 0


def demo_database_path() -> Path:
    from ..db.session import default_sqlite_path

    return default_sqlite_path().with_name("demo.sqlite")


def app_path() -> Path:
    repo_app = Path(__file__).resolve().parents[2] / "app.py"
    if repo_app.is_file():
        return repo_app
    from ..ui import main as ui_main

    return Path(ui_main.__file__)


def run_open(args) -> int:
    from ..db.session import open_engine
    from ..services.demo import load_demo

    path = demo_database_path()
    if args.rebuild and path.exists():
        for suffix in ("", "-wal", "-shm"):
            Path(str(path) + suffix).unlink(missing_ok=True)
    url = f"sqlite:///{path}"
    engine = open_engine(url)
    load_demo(engine)
    engine.dispose()
    # The demo dashboard signs in as the demo lead with the documented demo password (checked against its
    # stored hash like any sign-in); the gate page still asks for the password again to sign a decision.
    from ..services.demo import DEMO_LEAD, DEMO_PASSWORD, ENV_DEMO_SIGNIN_PASSWORD, ENV_DEMO_SIGNIN_USER

    env = dict(os.environ, KRT_DATABASE_URL=url)
    env[ENV_DEMO_SIGNIN_USER], env[ENV_DEMO_SIGNIN_PASSWORD] = DEMO_LEAD, DEMO_PASSWORD
    # local mode: listen on the loopback interface only, so no other host can reach the lead's controls
    cmd = [sys.executable, "-m", "streamlit", "run", str(app_path()), "--server.port", str(args.port),
           "--server.address", LOCAL_ADDRESS, "--browser.gatherUsageStats", "false"]
    from ..ui.theme import APP_THEME

    for key, value in APP_THEME.items():
        cmd += [f"--theme.{key}", value]
    if args.no_browser:
        cmd += ["--server.headless", "true"]
    print(f"demo database: {path}\nsigned in as {DEMO_LEAD}; demo password (every demo user, also to sign gate decisions): "
          f"{DEMO_PASSWORD}\nopening the dashboard at http://{LOCAL_ADDRESS}:{args.port}  (Ctrl+C to stop)")
    try:
        return subprocess.call(cmd, env=env)
    except FileNotFoundError as exc:  # pragma: no cover
        raise KrtError(f"cannot start streamlit: {exc}") from None
