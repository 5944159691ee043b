"""All benchmarks, one table: ``python benchmarks/run_all.py`` or ``krt bench``.

Runs the per-topic benchmarks of this folder, each of which measures its
figure *and* its baseline in the same run, and prints one table with the
machine, the library versions and, per figure, the median over several runs,
the baseline's median, their ratio, the goal and whether it is met:

=============================================  ========================================  ==========
figure                                          baseline (same run)                        goal
=============================================  ========================================  ==========
import + grade of 10,000 compounds             pandas ``read_csv`` of the same CSV files    <= 10x
vectorised engagement of 10,000 compounds      per-compound scipy ``solve_ivp`` loop        >= 1000x
Motulsky-Mahan plate fit (closed form)         the same fit with the ODE model              >= 50x
portfolio page rerun under AppTest (10,000)    the DB read of the same table                <= 3x
demo review pack, first build                   grading the same portfolio                   <= 3 s
peak memory of the 10,000-compound grade       (reported, no baseline)
=============================================  ========================================  ==========

Options: ``--repeats N`` (runs per figure, default 3), ``--quick`` (one run,
a smaller solve_ivp subset), ``--only grade,simulation,fit,page``,
``--json`` (machine-readable), ``--markdown FILE`` (the table as Markdown,
for the README).  Goals are judged here, never asserted in tests.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import platform
import statistics
import sys
import time
import traceback
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent
for _p in (str(ROOT), str(HERE)):
    if _p not in sys.path:
        sys.path.insert(0, _p)

BENCHMARKS = ("grade", "simulation", "fit", "page", "pack")
VERSIONED = ("numpy", "scipy", "pandas", "sqlalchemy", "streamlit", "alembic")


@dataclass
class Row:
    """One line of the table.  ``ratio`` is in the goal's own sense (slower: figure/baseline; faster: baseline/figure)."""

    figure: str
    value: str
    baseline: str = ""
    baseline_value: str = ""
    ratio: float | None = None
    sense: str = ""  # "slower" | "faster" | ""
    goal: float | None = None
    met: bool | None = None
    runs: int = 0
    note: str = ""
    sub: bool = False  # an informational breakdown row under the figure above it


@dataclass
class Report:
    started: str
    machine: dict[str, Any]
    versions: dict[str, str]
    rows: list[Row] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    raw: dict[str, Any] = field(default_factory=dict)
    seconds: float = 0.0


# ------------------------------------------------------------------ machine and versions
def machine() -> dict[str, Any]:
    cpu = ""
    try:
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.lower().startswith("model name"):
                cpu = line.split(":", 1)[1].strip()
                break
    except OSError:
        pass
    ram_gb = None
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemTotal:"):
                ram_gb = int(line.split()[1]) / 2**20
                break
    except OSError:
        try:
            ram_gb = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES") / 2**30
        except (ValueError, OSError, AttributeError):
            pass
    try:
        usable = len(os.sched_getaffinity(0))
    except AttributeError:  # not on every platform
        usable = os.cpu_count()
    return {"cpu": cpu or platform.processor() or platform.machine(), "cores": os.cpu_count(), "usable_cores": usable,
            "ram_gb": round(ram_gb, 1) if ram_gb else None, "os": platform.platform(terse=True)}


def versions() -> dict[str, str]:
    from importlib import metadata

    out = {"python": platform.python_version()}
    for name in VERSIONED:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    try:
        import tracker

        out["tracker"] = tracker.__version__
    except ImportError:  # pragma: no cover
        pass
    return out


# ------------------------------------------------------------------ figures
def _median(values):
    return statistics.median(values)


def _s(seconds: float) -> str:
    if seconds < 1e-3:
        return f"{seconds * 1e6:.0f} µs"
    if seconds < 1:
        return f"{seconds * 1e3:.1f} ms"
    return f"{seconds:.2f} s"


def bench_grade_rows(repeats: int, quick: bool) -> tuple[list[Row], Any]:
    import bench_grade

    rows = bench_grade.run(repeats=repeats)
    by = {r["step"]: r for r in rows}
    both, floor = by["import + grade"], by["read_csv (floor)"]
    info = f"{both['compounds']:,} compounds, {both['potency_rows']:,} potency, {both['kinetics_rows']:,} kinetics, {both['pk_rows']:,} PK rows; SQLite file"
    goal = bench_grade.GOAL_RATIO
    out = [Row("import + grade, 10,000 compounds", _s(both["median_s"]), "pandas read_csv of the same CSVs", _s(floor["median_s"]),
               both["ratio_to_floor"], "slower", goal, both["ratio_to_floor"] <= goal, repeats, info)]
    for step in ("import", "grade"):
        r = by[step]
        out.append(Row(f"  of which {step}", _s(r["median_s"]), "", "", r["ratio_to_floor"], "slower", None, None, repeats, "", sub=True))
    out.append(Row("peak memory, grade of 10,000 compounds", f"{both['grade_peak_traced_MB']:.0f} MB", "", "", None, "", None, None, 1,
                   f"tracemalloc peak of one grade (Python + numpy allocations); whole benchmark process peak RSS {both['process_peak_rss_MB']:.0f} MB"))
    return out, rows


def bench_simulation_rows(repeats: int, quick: bool) -> tuple[list[Row], Any]:
    import bench_simulation

    subset = 50 if quick else 200
    runs = [bench_simulation.run(repeats=1, subset=subset) for _ in range(repeats)]
    both = [next(r for r in rows if r["case"] == "engagement, single + repeat") for rows in runs]
    vec = _median([b["vectorised_s"] for b in both])
    loop = _median([b["loop_rtol1e-10_s"] for b in both])
    worst = max(b["max_rel_diff"] for b in both)
    mismatch = sum(b["defined_mismatch"] for b in both)
    ratio = loop / vec
    goal = bench_simulation.GOAL_SPEEDUP
    met = ratio >= goal and worst <= bench_simulation.GOAL_REL and mismatch == 0
    note = (f"single-dose + {bench_simulation.DOSES}-dose engagement (onset, offset); loop = solve_ivp LSODA rtol 1e-10 on {subset} "
            f"compounds, scaled x{10_000 // subset}; max rel. difference {worst:.1e} (goal <= {bench_simulation.GOAL_REL:g})")
    out = [Row("vectorised engagement simulation, 10,000 compounds", _s(vec), "per-compound solve_ivp loop", _s(loop), ratio, "faster",
               goal, met, repeats, note)]
    cases = [r["case"] for r in runs[0] if r["case"].startswith("engagement,") and r["case"] != "engagement, single + repeat"]
    for case in cases + ["apparent KD (saturation)"]:
        rs = [next(r for r in rows if r["case"] == case) for rows in runs]
        v, lp = _median([r["vectorised_s"] for r in rs]), _median([r["loop_rtol1e-10_s"] for r in rs])
        label = f"  of which {case}" if case.startswith("engagement") else "  apparent KD (saturation), 10,000 compounds"
        out.append(Row(label, _s(v), "", _s(lp), lp / v, "faster", None, None, repeats, "", sub=True))
    info = [next(r for r in rows if r.get("info")) for rows in runs]
    out.append(Row("  single dose, every metric (no loop equivalent)", _s(_median([r["vectorised_s"] for r in info])), "", "", None, "",
                   None, None, repeats, "", sub=True))
    return out, runs


def bench_fit_rows(repeats: int, quick: bool) -> tuple[list[Row], Any]:
    import bench_fit_plate

    runs = [bench_fit_plate.run(repeats=1) for _ in range(repeats)]
    first = [rows[0] for rows in runs]
    cf = _median([r["closed_form_s"] for r in first])
    ode = _median([r["ode_s"] for r in first])
    ratio = ode / cf
    agree = all(r["agree_3_sig_figs"] for r in first)
    goal = bench_fit_plate.GOAL
    note = (f"{bench_fit_plate.N_COMPOUNDS} compounds x {bench_fit_plate.N_WELLS} wells x {bench_fit_plate.N_TIMES} points, one global fit each, "
            f"same procedure, only the model swapped; k3/k4 agree to 3 s.f.: {'yes' if agree else 'NO'}")
    out = [Row("Motulsky-Mahan plate fit (closed form)", _s(cf), "same fit, ODE model (solve_ivp)", _s(ode), ratio, "faster", goal,
               ratio >= goal and agree, repeats, note)]
    pub = [rows[1] for rows in runs]
    p = _median([r["closed_form_s"] for r in pub])
    out.append(Row("  public fit_competition_kinetics (grid + 3 starts)", _s(p), "", _s(ode), ode / p, "faster", None, None, repeats, "", sub=True))
    return out, runs


def bench_page_rows(repeats: int, quick: bool) -> tuple[list[Row], Any]:
    import bench_portfolio_page

    rows = bench_portfolio_page.run(repeats=repeats)
    out = []
    for r in rows:
        if r["goal"] is not None:
            out.append(Row(f"portfolio {r['case']}, {r['compounds']:,} compounds", _s(r["render_s"]), "DB read of the same table",
                           _s(r["db_read_s"]), r["ratio"], "slower", r["goal"], r["met"], repeats,
                           "server-side run of the page under Streamlit AppTest"))
        else:
            out.append(Row(f"  {r['case']}", _s(r["render_s"]), "", _s(r["db_read_s"]), r["ratio"], "slower", None, None, repeats, "", sub=True))
    return out, rows


def bench_pack_rows(repeats: int, quick: bool) -> tuple[list[Row], Any]:
    import bench_review_pack

    r = bench_review_pack.run(repeats=1 if quick else repeats)
    return [Row(f"demo review pack ({r['compounds']} compounds, {r['charts']} charts), first build", _s(r["pack_s"]),
                "grading the same portfolio", _s(r["grade_s"]), r["ratio"], "slower", None, r["met"], r["repeats"],
                f"goal: within {r['goal_s']:g} s (absolute)")], r


RUNNERS: dict[str, Callable[[int, bool], tuple[list[Row], Any]]] = {
    "grade": bench_grade_rows,
    "simulation": bench_simulation_rows,
    "fit": bench_fit_rows,
    "page": bench_page_rows,
    "pack": bench_pack_rows,
}
TITLES = {"grade": "import + grade", "simulation": "simulation", "fit": "plate fit", "page": "portfolio page",
          "pack": "review pack"}


def collect(repeats: int = 3, quick: bool = False, only: list[str] | None = None, progress: Callable[[str], None] | None = None) -> Report:
    """Run the benchmarks; a :class:`Report` (failures become rows that say so, the others still run)."""
    say = progress or (lambda _m: None)
    names = [n for n in BENCHMARKS if not only or n in only]
    t0 = time.perf_counter()
    report = Report(dt.datetime.now(dt.timezone.utc).strftime("%Y-%m-%d %H:%M UTC"), machine(), versions())
    for i, name in enumerate(names, 1):
        say(f"benchmark {i}/{len(names)}: {TITLES[name]} ({repeats} run(s)) ...")
        t = time.perf_counter()
        try:
            rows, raw = RUNNERS[name](repeats, quick)
            report.rows.extend(rows)
            report.raw[name] = raw
        except Exception as exc:  # one broken benchmark must not hide the others
            report.rows.append(Row(TITLES[name], "error", note=f"{type(exc).__name__}: {' '.join(str(exc).split())[:200]}", met=False))
            report.raw[name] = {"error": traceback.format_exc()}
        say(f"  done in {time.perf_counter() - t:.0f} s")
    report.seconds = time.perf_counter() - t0
    report.notes = _notes(report)
    return report


def _notes(report: Report) -> list[str]:
    notes = []
    subs = [r for r in report.rows if r.sub and r.figure.strip().startswith("of which") and r.sense == "slower" and r.ratio]
    if subs:
        slow = max(subs, key=lambda r: r.ratio)
        notes.append(f"Slowest step of import + grade: {slow.figure.strip().removeprefix('of which ')} ({slow.value}, {slow.ratio:.0f}x the CSV read); "
                     "profile it with 'python benchmarks/bench_grade.py --profile' (grade) or cProfile around import_path.")
    missed = [r.figure for r in report.rows if r.goal is not None and r.met is False]
    if missed:
        notes.append("Goals missed: " + "; ".join(missed) + ".")
    return notes


# ------------------------------------------------------------------ rendering
def _ratio_text(r: Row) -> str:
    if r.ratio is None:
        return ""
    number = f"{r.ratio:.2f}" if r.ratio < 1 else f"{r.ratio:.1f}" if r.ratio < 100 else f"{r.ratio:.0f}"
    return f"{number}x faster" if r.sense == "faster" else f"{number}x the baseline"


def _goal_text(r: Row) -> str:
    if r.goal is None:
        return ""
    return f"<= {r.goal:g}x the baseline" if r.sense == "slower" else f">= {r.goal:g}x faster"


def _met_text(r: Row) -> str:
    return "" if r.met is None else ("met" if r.met else "MISSED")


def table_lines(report: Report) -> list[str]:
    """The figures as a Markdown table (readable as plain text too)."""
    head = ["figure", "median", "baseline (same run)", "baseline median", "ratio", "goal", "met", "runs"]
    body = [[r.figure, r.value, r.baseline, r.baseline_value, _ratio_text(r), _goal_text(r), _met_text(r), str(r.runs or "")]
            for r in report.rows]
    widths = [max(len(h), *(len(row[i]) for row in body)) if body else len(h) for i, h in enumerate(head)]

    def line(cells):
        return "| " + " | ".join(c.ljust(w) for c, w in zip(cells, widths)) + " |"

    return [line(head), "|" + "|".join("-" * (w + 2) for w in widths) + "|"] + [line(row) for row in body]


def render(report: Report) -> str:
    m, v = report.machine, report.versions
    lines = [
        f"Benchmarks, {report.started}: {m['cpu']}, {m['cores']} cores"
        + (f" ({m['usable_cores']} usable)" if m.get("usable_cores") not in (None, m["cores"]) else "")
        + (f", {m['ram_gb']:g} GB RAM" if m.get("ram_gb") else "") + f", {m['os']}",
        "Versions: " + ", ".join(f"{k} {val}" for k, val in v.items()),
        "",
        *table_lines(report),
        "",
    ]
    notes = [f"- {r.figure.strip()}: {r.note}" for r in report.rows if r.note and not r.sub]
    lines += notes + [f"- {n}" for n in report.notes]
    lines.append(f"- Median of {max((r.runs for r in report.rows), default=0)} run(s) per figure; each baseline is measured in the same run as its figure. "
                 f"Total {report.seconds:.0f} s.")
    return "\n".join(lines) + "\n"


def to_json(report: Report) -> dict[str, Any]:
    def clean(x):
        if isinstance(x, dict):
            return {str(k): clean(val) for k, val in x.items()}
        if isinstance(x, (list, tuple)):
            return [clean(val) for val in x]
        if isinstance(x, float):
            return x if x == x and abs(x) != float("inf") else None
        if isinstance(x, (str, int, bool)) or x is None:
            return x
        if hasattr(x, "item"):
            return clean(x.item())
        return str(x)

    return clean({"started": report.started, "machine": report.machine, "versions": report.versions,
                  "rows": [asdict(r) for r in report.rows], "notes": report.notes, "seconds": report.seconds, "raw": report.raw})


# ------------------------------------------------------------------ entry point
def build_parser(parser: argparse.ArgumentParser | None = None) -> argparse.ArgumentParser:
    p = parser or argparse.ArgumentParser(prog="run_all.py", description="Run every benchmark and print one table.")
    p.add_argument("--repeats", type=int, default=3, metavar="N", help="runs per figure; the table shows medians (default 3)")
    p.add_argument("--quick", action="store_true", help="one run per figure and a smaller solve_ivp subset (a smoke run)")
    p.add_argument("--only", metavar="NAMES", help=f"comma-separated subset of {','.join(BENCHMARKS)}")
    p.add_argument("--json", action="store_true", help="print JSON instead of the table")
    p.add_argument("--markdown", metavar="FILE", help="also write the table as Markdown to FILE (for the README)")
    return p


def run_from_args(args) -> int:
    only = [s.strip() for s in args.only.split(",")] if args.only else None
    unknown = [n for n in only or [] if n not in BENCHMARKS]
    if unknown:
        print(f"run_all: unknown benchmark {unknown[0]!r}; choose from {', '.join(BENCHMARKS)}", file=sys.stderr)
        return 2
    repeats = 1 if args.quick else args.repeats
    if repeats < 1:
        print("run_all: --repeats must be at least 1", file=sys.stderr)
        return 2
    report = collect(repeats, args.quick, only, progress=lambda msg: print(msg, file=sys.stderr, flush=True))
    text = render(report)
    if args.json:
        json.dump(to_json(report), sys.stdout, indent=2)
        sys.stdout.write("\n")
    else:
        sys.stdout.write(text)
    if args.markdown:
        Path(args.markdown).write_text(text, encoding="utf-8")
        print(f"table written to {args.markdown}", file=sys.stderr)
    return 1 if any(r.value == "error" for r in report.rows) else 0  # a missed goal is a result, not a failure


def main(argv: list[str] | None = None) -> int:
    return run_from_args(build_parser().parse_args(argv))


if __name__ == "__main__":
    sys.exit(main())
