"""The migrations and the demo ship inside the wheel: `krt db upgrade`, `krt demo load` and
`krt grade` work from a non-editable install (the README's quick start installs one)."""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
import sysconfig
import tomllib
from pathlib import Path

import pytest

from tracker.db.migrate import head

REPO = Path(__file__).resolve().parents[2]


def test_every_package_folder_is_listed_in_pyproject():
    listed = set(tomllib.loads((REPO / "pyproject.toml").read_text())["tool"]["setuptools"]["packages"])
    found = {
        ".".join(p.parent.relative_to(REPO).parts)
        for p in (REPO / "tracker").rglob("__init__.py")
        if "__pycache__" not in p.parts
    }
    found |= {"tracker.migrations", "tracker.migrations.versions"} if (REPO / "migrations" / "versions" / "__init__.py").is_file() else set()
    assert found <= listed, f"add to [tool.setuptools] packages: {sorted(found - listed)}"


@pytest.mark.slow
def test_krt_db_upgrade_works_from_an_installed_wheel(tmp_path):
    src = tmp_path / "src"
    src.mkdir()
    for name in ("pyproject.toml", "README.md"):
        if (REPO / name).exists():
            shutil.copy2(REPO / name, src / name)
    ignore = shutil.ignore_patterns("__pycache__", "*.pyc")
    shutil.copytree(REPO / "tracker", src / "tracker", ignore=ignore)
    shutil.copytree(REPO / "migrations", src / "migrations", ignore=ignore)
    shutil.copytree(REPO / "seed_demo", src / "seed_demo", ignore=ignore)
    wheels = tmp_path / "wheels"
    cmd = [sys.executable, "-m", "pip", "wheel", "--no-deps", "-q", str(src), "-w", str(wheels)]
    build = subprocess.run(cmd, capture_output=True, text=True, timeout=600)
    if build.returncode != 0:  # the isolated build fetches setuptools from the index; retry with the installed one
        retry = subprocess.run(cmd + ["--no-build-isolation"], capture_output=True, text=True, timeout=600)
        assert retry.returncode == 0, build.stderr[-1500:] + "\n--- without isolation ---\n" + retry.stderr[-1500:]
    wheel = next(wheels.glob("kinetic_risk_tracker-*.whl"))

    # A venv that sees this interpreter's dependencies (via a .pth line) but not the source tree
    # (editable-install hooks in this site-packages are not run from an added path).
    venv = tmp_path / "venv"
    subprocess.run([sys.executable, "-m", "venv", "--without-pip", str(venv)], check=True, timeout=300)
    vpy = venv / "bin" / "python"
    vsite = Path(subprocess.run([str(vpy), "-c", "import sysconfig; print(sysconfig.get_paths()['purelib'])"],
                                capture_output=True, text=True, check=True).stdout.strip())
    (vsite / "_krt_test_deps.pth").write_text(sysconfig.get_paths()["purelib"] + "\n")
    install = subprocess.run(
        [sys.executable, "-m", "pip", "--python", str(vpy), "install", "--no-deps", "--no-index", "-q", str(wheel)],
        capture_output=True, text=True, timeout=600,
    )
    assert install.returncode == 0, install.stderr[-2000:]

    db = tmp_path / "x.sqlite"
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH",)} | {"KRT_DATABASE_URL": f"sqlite:///{db}"}
    where = subprocess.run(
        [str(vpy), "-c", "import tracker, tracker.db.migrate as m; print(tracker.__file__); print(m.script_location())"],
        capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120,
    )
    assert where.returncode == 0, where.stderr
    tracker_file, location = where.stdout.split()
    assert tracker_file.startswith(str(venv)) and location.startswith(str(venv)), where.stdout

    run = subprocess.run([str(venv / "bin" / "krt"), "db", "upgrade"], capture_output=True, text=True, cwd=tmp_path, env=env, timeout=300)
    assert run.returncode == 0, run.stderr
    assert f"-> {head()}" in run.stdout
    current = subprocess.run([str(venv / "bin" / "krt"), "db", "current"], capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120)
    assert current.stdout.startswith(f"{head()} (up to date)"), current.stdout + current.stderr

    demo = subprocess.run([str(venv / "bin" / "krt"), "demo", "load"], capture_output=True, text=True, cwd=tmp_path, env=env, timeout=600)
    assert demo.returncode == 0, demo.stderr
    graded = subprocess.run([str(venv / "bin" / "krt"), "grade", "--json"], capture_output=True, text=True, cwd=tmp_path, env=env, timeout=600)
    assert graded.returncode == 0, graded.stderr
    rows = json.loads(graded.stdout)
    assert len(rows) >= 30 and len({r["program"] for r in rows}) >= 2
    app = subprocess.run([str(vpy), "-c", "from tracker.commands.demo import app_path; print(app_path())"],
                         capture_output=True, text=True, cwd=tmp_path, env=env, timeout=120)
    assert app.returncode == 0 and app.stdout.strip().startswith(str(venv)), app.stdout + app.stderr
