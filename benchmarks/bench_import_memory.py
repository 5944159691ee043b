"""Peak memory of a large potency import: ``python benchmarks/bench_import_memory.py [--rows 1000000]``.

Builds a SQLite database with 2 programs and 1,000 compounds, writes a
``potency.csv`` of ``--rows`` invented rows (every tenth row repeats the one
before it, as replicate measurements do) and imports it with ``krt import`` in
a fresh Python process, whose peak resident set size (``ru_maxrss`` of
``resource.getrusage``) is the figure.  The baseline, measured in the same run,
is the same process importing nothing but the 1,000 compounds (the interpreter,
numpy, pandas and SQLAlchemy loaded).  Goal: peak RSS <= 500 MB for 1,000,000
rows, with the import still all or nothing.

Prints a table; ``--markdown FILE`` also writes it as Markdown.
"""

from __future__ import annotations

import argparse
import os
import platform
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
GOAL_MB = 500.0
N_COMPOUNDS = 1000

CHILD = r"""
import resource, sys, time
from tracker.cli import main
t0 = time.perf_counter()
rc = main(["import", sys.argv[1], "--by", "bench"])
dt = time.perf_counter() - t0
print(f"RESULT {rc} {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss} {dt}")
"""


def write_base(folder: Path) -> Path:
    base = folder / "base"
    base.mkdir()
    (base / "programs.csv").write_text("program,target\nMemBench A,Target MA\nMemBench B,Target MB\n", encoding="utf-8")
    with (base / "compounds.csv").open("w", encoding="utf-8") as fh:
        fh.write("compound,program,series,stage\n")
        for i in range(N_COMPOUNDS):
            fh.write(f"MB-{i:05d},MemBench {'AB'[i % 2]},S{i % 7},hit\n")
    return base


def write_potency(path: Path, rows: int) -> None:
    readouts = ("IC50", "Ki", "KD", "EC50")
    formats = ("binding", "functional", "enzyme", "competition-binding")
    with path.open("w", encoding="utf-8", newline="") as fh:
        fh.write("compound,assay,readout,value,incubation,format,date,source\n")
        line = ""
        for i in range(rows):
            if i % 10 != 9:  # every tenth row repeats the previous one (a replicate)
                j = i // 10
                line = (f"MB-{i % N_COMPOUNDS:05d},assay {j % 37},{readouts[i % 4]},{(i % 9973) / 100 + 0.01:.2f} nM,"
                        f"{(i % 24) + 1} h,{formats[i % 4]},2026-{(i % 12) + 1:02d}-{(i % 28) + 1:02d},run-{j}\n")
            fh.write(line)


BENCH_PASSWORD = "bench-import-memory"  # an invented user of a throw-away database


def _env(url: str, config: Path) -> dict[str, str]:
    env = dict(os.environ, KRT_DATABASE_URL=url, KRT_CONFIG_DIR=str(config),
               PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    env.pop("KRT_USER", None)
    return env


def sign_in(url: str, config: Path) -> None:
    """Sign the importing user in, as a person would (``krt login --password-stdin``)."""
    out = subprocess.run([sys.executable, "-m", "tracker", "login", "bench", "--password-stdin"], input=BENCH_PASSWORD + "\n",
                         env=_env(url, config), capture_output=True, text=True, cwd=ROOT)
    if out.returncode != 0:
        raise SystemExit(f"krt login failed: {out.stderr.strip()[-2000:]}")


def run_import(url: str, path: Path) -> tuple[int, float, float]:
    env = _env(url, path.parent / "config")
    out = subprocess.run([sys.executable, "-c", CHILD, str(path)], env=env, capture_output=True, text=True, cwd=ROOT)
    lines = [ln for ln in out.stdout.splitlines() if ln.startswith("RESULT")]
    if out.returncode != 0 or not lines:
        raise SystemExit(f"import failed ({out.returncode}): {out.stderr.strip()[-2000:]}")
    _, rc, maxrss_kb, seconds = lines[-1].split()
    if rc != "0":
        raise SystemExit(f"krt import returned {rc}: {out.stderr.strip()[-2000:]}")
    return int(rc), int(maxrss_kb) / 1024.0, float(seconds)


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--rows", type=int, default=1_000_000)
    ap.add_argument("--markdown", metavar="FILE")
    args = ap.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="krt-mem-") as tmp:
        folder = Path(tmp)
        url = f"sqlite:///{folder / 'bench.sqlite'}"
        from tracker.db import migrate
        from tracker.db.session import make_engine

        from tracker.services.users import add_user

        engine = make_engine(url)
        migrate.upgrade(engine)
        add_user(engine, "bench", "lead", password=BENCH_PASSWORD)  # the first user: the bootstrap lead
        engine.dispose()
        sign_in(url, folder / "config")
        base = write_base(folder)
        _, base_mb, base_s = run_import(url, base)
        potency = folder / "potency.csv"
        t0 = time.perf_counter()
        write_potency(potency, args.rows)
        gen_s = time.perf_counter() - t0
        size_mb = potency.stat().st_size / 1e6
        _, peak_mb, seconds = run_import(url, potency)
    met = "met" if peak_mb <= GOAL_MB else "MISSED"
    rows = [
        ("figure", "value", "baseline (same run)", "baseline", "goal", "met"),
        (f"peak RSS, import of {args.rows:,} potency rows ({size_mb:.0f} MB CSV)", f"{peak_mb:.0f} MB",
         f"import of {N_COMPOUNDS:,} compounds", f"{base_mb:.0f} MB", f"<= {GOAL_MB:.0f} MB", met),
        ("  time of that import", f"{seconds:.1f} s", "", f"{base_s:.1f} s", "", ""),
        ("  rows per second", f"{args.rows / seconds:,.0f}", "", "", "", ""),
    ]
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    print(f"{platform.processor() or platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}; "
          f"CSV written in {gen_s:.1f} s")
    for r in rows:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths)))
    if args.markdown:
        md = ["| " + " | ".join(rows[0]) + " |", "|" + "|".join("---" for _ in rows[0]) + "|"]
        md += ["| " + " | ".join(r) + " |" for r in rows[1:]]
        Path(args.markdown).write_text("\n".join(md) + "\n", encoding="utf-8")
    return 0 if met == "met" else 1


if __name__ == "__main__":
    raise SystemExit(main())
