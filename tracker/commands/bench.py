"""``krt bench [--repeats N] [--quick] [--only NAMES] [--json] [--markdown FILE]``: every benchmark, one table.

The benchmarks live in the repository's ``benchmarks/`` folder, which is not
part of the installed package (they generate 10,000-compound portfolios and
time scipy reference loops; nobody needs them at run time).  This command
finds that folder beside the package of an editable install or source
checkout (or at ``$KRT_BENCHMARKS_DIR``) and runs ``benchmarks/run_all.py``;
from a plain wheel install it says so in one line.
"""

from __future__ import annotations

import argparse
import importlib.util
import os
import sys
from pathlib import Path

from ..errors import KrtError

ENV_DIR = "KRT_BENCHMARKS_DIR"
MODULE = "krt_benchmarks_run_all"


def checkout_benchmarks() -> Path:
    """Where ``benchmarks/`` sits in a source checkout: beside the ``tracker`` package folder."""
    return Path(__file__).resolve().parents[2] / "benchmarks"


def benchmarks_dir() -> Path | None:
    """The folder holding ``run_all.py``: ``$KRT_BENCHMARKS_DIR``, else ``benchmarks/`` of the source checkout."""
    candidates = []
    if os.environ.get(ENV_DIR, "").strip():
        candidates.append(Path(os.environ[ENV_DIR]).expanduser())
    candidates.append(checkout_benchmarks())
    for folder in candidates:
        if (folder / "run_all.py").is_file():
            return folder
    return None


def load_runner(folder: Path):
    """Import ``run_all.py`` from ``folder`` (with the folder and the repository root on ``sys.path``)."""
    for p in (str(folder.parent), str(folder)):
        if p not in sys.path:
            sys.path.insert(0, p)
    path = folder / "run_all.py"
    loaded = sys.modules.get(MODULE)
    if loaded is not None and Path(getattr(loaded, "__file__", "")).resolve() == path.resolve():
        return loaded
    spec = importlib.util.spec_from_file_location(MODULE, path)
    if spec is None or spec.loader is None:
        raise KrtError(f"cannot load the benchmarks from {path}")
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # dataclasses look their module up while the file runs
    try:
        spec.loader.exec_module(module)
    except BaseException:
        sys.modules.pop(spec.name, None)
        raise
    return module


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("bench", help="run every benchmark and print one table (needs a source checkout)",
                       description="Run every benchmark (figure and baseline in the same run) and print one table "
                                   "with the machine, the versions, medians, ratios and goals.")
    p.add_argument("--repeats", type=int, default=3, metavar="N", help="runs per figure; the table shows medians (default 3)")
    p.add_argument("--quick", action="store_true", help="one run per figure and a smaller solve_ivp subset (a smoke run)")
    p.add_argument("--only", metavar="NAMES", help="comma-separated subset of grade,simulation,fit,page")
    p.add_argument("--json", action="store_true", help="print JSON instead of the table")
    p.add_argument("--markdown", metavar="FILE", help="also write the table as Markdown to FILE (for the README)")
    p.set_defaults(func=_bench)


def _bench(args) -> int:
    folder = benchmarks_dir()
    if folder is None:
        raise KrtError("krt bench needs the repository's benchmarks/ folder, which is not installed with the package: "
                       f"run it from a source checkout ('pip install -e .' there) or set {ENV_DIR} to that folder")
    if args.repeats < 1:
        raise KrtError("--repeats must be at least 1")
    return load_runner(folder).run_from_args(args)
