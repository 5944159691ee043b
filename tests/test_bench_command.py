"""``krt bench``: finding the benchmarks, and the one table it prints (no timing is asserted here)."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from tracker.cli import main
from tracker.commands import bench

REPO = Path(__file__).resolve().parents[1]


@pytest.fixture
def run_all():
    return bench.load_runner(REPO / "benchmarks")


def test_krt_bench_says_in_one_line_when_the_benchmarks_are_not_installed(monkeypatch, tmp_path, capsys):
    monkeypatch.delenv(bench.ENV_DIR, raising=False)
    monkeypatch.setattr(bench, "checkout_benchmarks", lambda: tmp_path / "site-packages" / "benchmarks")
    assert main(["bench", "--quick"]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "benchmarks/" in err[0] and "source checkout" in err[0] and bench.ENV_DIR in err[0]


def test_krt_bench_finds_the_checkout_folder_or_the_one_named_in_the_environment(monkeypatch, tmp_path):
    monkeypatch.delenv(bench.ENV_DIR, raising=False)
    assert bench.benchmarks_dir() == REPO / "benchmarks"
    (tmp_path / "run_all.py").write_text("")
    monkeypatch.setenv(bench.ENV_DIR, str(tmp_path))
    assert bench.benchmarks_dir() == tmp_path


def _fake(rows):
    def runner(repeats, quick):
        return rows(repeats), {"repeats": repeats, "quick": quick}
    return runner


def test_one_table_with_machine_versions_medians_ratios_goals_and_a_markdown_copy(run_all, monkeypatch, tmp_path, capsys):
    Row = run_all.Row
    monkeypatch.setattr(run_all, "RUNNERS", {
        "grade": _fake(lambda n: [Row("import + grade", "4.00 s", "read_csv", "40.0 ms", 100.0, "slower", 10.0, False, n)]),
        "simulation": _fake(lambda n: [Row("simulation", "1.00 s", "solve_ivp loop", "300 s", 300.0, "faster", 100.0, True, n)]),
        "fit": _fake(lambda n: [Row("plate fit", "0.20 s", "ODE fit", "12 s", 60.0, "faster", 50.0, True, n)]),
        "page": _fake(lambda n: [Row("page rerun", "0.10 s", "DB read", "0.20 s", 0.5, "slower", 3.0, True, n)]),
        "pack": _fake(lambda n: [Row("demo review pack", "2.00 s", "grading", "1.00 s", 2.0, "slower", None, True, n)]),
    })
    md = tmp_path / "bench.md"
    assert main(["bench", "--repeats", "5", "--markdown", str(md)]) == 0
    out = capsys.readouterr().out
    assert md.read_text() == out
    lines = out.splitlines()
    assert lines[0].startswith("Benchmarks, ") and "cores" in lines[0]
    assert lines[1].startswith("Versions: python ") and all(f"{lib} " in lines[1] for lib in ("numpy", "scipy", "pandas", "sqlalchemy", "streamlit"))
    table = [ln for ln in lines if ln.startswith("|")]
    assert len(table) == 2 + 5 and "| figure" in table[0] and "baseline (same run)" in table[0]
    assert "100x the baseline" in table[2] and "<= 10x the baseline" in table[2] and "MISSED" in table[2]
    assert "300x faster" in table[3] and ">= 100x faster" in table[3] and "| met" in table[3]
    assert "0.50x the baseline" in table[5]
    assert all(row.rstrip().endswith("| 5    |") for row in table[2:])  # medians of the requested number of runs
    assert "Goals missed: import + grade." in out


def test_a_broken_benchmark_is_a_row_that_says_so_and_a_failing_exit(run_all, monkeypatch, capsys):
    def broken(repeats, quick):
        raise RuntimeError("solver exploded")

    monkeypatch.setattr(run_all, "RUNNERS", {"grade": broken, "simulation": _fake(lambda n: [run_all.Row("simulation", "1 s")])})
    assert main(["bench", "--quick", "--only", "grade,simulation", "--json"]) == 1
    data = json.loads(capsys.readouterr().out)
    assert data["rows"][0]["value"] == "error" and "solver exploded" in data["rows"][0]["note"]
    assert data["rows"][1]["figure"] == "simulation" and data["raw"]["simulation"] == {"repeats": 1, "quick": True}


def test_an_unknown_benchmark_name_is_refused(capsys):
    assert main(["bench", "--only", "everything"]) == 2
    assert "unknown benchmark 'everything'" in capsys.readouterr().err
