"""Large measurement files are read, checked and written in chunks: same rows, same audit, same errors, all or nothing.

``STREAM_BYTES = 0`` sends every measurement CSV through the chunked path and
``STREAM_ROWS = 2`` makes chunks of two rows, so the sample files exercise
chunk boundaries (replicates split across chunks, errors in later chunks).
The peak memory of a 1,000,000-row import is measured by
``benchmarks/bench_import_memory.py`` (README benchmark table) and checked by
the slow test at the end.
"""

from __future__ import annotations

import json
import os
import resource
import subprocess
import sys
from pathlib import Path

import pandas as pd
import pytest

from tracker.db import queries
from tracker.db.uow import UnitOfWork
from tracker.errors import ImportErrors
from tracker.io.reading import iter_csv_chunks, read_csv
from tracker.services import importing
from tracker.services.importing import import_path

REPO = Path(__file__).resolve().parents[2]
VOLATILE = {"id", "created_at", "compound_id", "at"}


@pytest.fixture
def chunked(monkeypatch):
    monkeypatch.setattr(importing, "STREAM_BYTES", 0)
    monkeypatch.setattr(importing, "STREAM_ROWS", 2)


def _import_events(engine) -> dict[str, dict]:
    ev = queries.audit_events(engine, action="import")
    return {t: {k: v for k, v in json.loads(a).items() if k != "files"} for t, a in zip(ev["entity_type"], ev["after_json"])}


def _with_replicates(sample_dir: Path) -> Path:
    text = (sample_dir / "potency.csv").read_text(encoding="utf-8").splitlines()
    rows = text[1:]
    # replicates: the same row three times, split over chunks of two
    (sample_dir / "potency.csv").write_text("\n".join([text[0]] + rows + rows[:1] * 3 + rows[1:]) + "\n", encoding="utf-8")
    return sample_dir


def test_chunks_number_lines_like_the_whole_file_reader(sample_dir):
    path = _with_replicates(sample_dir) / "potency.csv"
    with path.open("a", encoding="utf-8") as fh:
        fh.write('\nAGR-001,"two\nline assay",IC50,3 nM,1 h,binding,,,,,,\n')
    whole = read_csv(path, "potency")
    chunks = list(iter_csv_chunks(path, "potency", rows=3))
    assert len(chunks) > 2 and not any(c.errors for c in chunks)
    assert sum((c.lines for c in chunks), []) == whole.lines
    pd.testing.assert_frame_equal(pd.concat([c.cells for c in chunks], ignore_index=True), whole.cells)


def test_a_chunked_import_writes_the_same_rows_and_audit_as_a_whole_file_import(
        migrated_engine, second_migrated_engine, sample_dir, monkeypatch):
    _with_replicates(sample_dir)
    whole = import_path(migrated_engine, sample_dir, actor="ana")
    monkeypatch.setattr(importing, "STREAM_BYTES", 0)
    monkeypatch.setattr(importing, "STREAM_ROWS", 2)
    summary = import_path(second_migrated_engine, sample_dir, actor="ana")
    assert summary["tables"]["potency"]["inserted"] == whole["tables"]["potency"]["inserted"] == 10  # replicates kept
    assert {t: s["inserted"] for t, s in summary["tables"].items()} == {t: s["inserted"] for t, s in whole["tables"].items()}
    for frame in (queries.potency, queries.kinetics, queries.pk):
        a, b = frame(migrated_engine), frame(second_migrated_engine)
        pd.testing.assert_frame_equal(a.drop(columns=[c for c in a if c in VOLATILE]), b.drop(columns=[c for c in b if c in VOLATILE]))
    # same id runs, counts and sealed columns; the value seals themselves differ between the two databases only
    # because they cover every column, creation times included; each is checked against its own rows below
    strip = lambda evs: {t: {k: v for k, v in e.items() if k != "rows_sha256"} for t, e in evs.items()}  # noqa: E731
    assert strip(_import_events(migrated_engine)) == strip(_import_events(second_migrated_engine))
    assert all(e.get("rows_format") == 2 for e in _import_events(second_migrated_engine).values())  # value-sealed
    from tracker.services.auditlog import verify

    result = verify(second_migrated_engine)
    assert result["ok"], result["message"]
    # a second chunked import of the same files adds nothing (replicates keep their numbers across chunks)
    again = import_path(second_migrated_engine, sample_dir, actor="ana")
    assert all(t["inserted"] == 0 for t in again["tables"].values())


def test_a_bad_row_in_a_later_chunk_writes_nothing_and_is_located(chunked, migrated_engine, sample_dir, db_snapshot):
    import_path(migrated_engine, sample_dir, actor="ana")
    before = db_snapshot(migrated_engine)
    path = sample_dir / "potency.csv"
    lines = path.read_text(encoding="utf-8").splitlines()
    lines[1] = lines[1].replace("AGR-001,TR-FRET", "AGR-001,TR-FRET-2")  # new rows in the first chunks
    lines.append("AGR-001,late,IC50,3 nQ,30 min,binding,,,,,,")
    lines.append("NOPE-9,late,IC50,3 nM,30 min,binding,,,,,,")
    lines.append("AGR-002,late,IC50,2 M,30 min,binding,,,,,,")
    path.write_text("\n".join(lines) + "\n", encoding="utf-8")
    with pytest.raises(ImportErrors) as info:
        import_path(migrated_engine, sample_dir, actor="ana")
    got = [str(e).replace(str(path), "potency.csv") for e in info.value.errors]
    assert any(m.startswith("potency.csv:6: value: unknown unit 'nQ'") for m in got), got
    assert any(m.startswith("potency.csv:7: compound: unknown compound 'NOPE-9'") for m in got), got
    assert any(m.startswith("potency.csv:8: value: '2 M' is above the plausible maximum") for m in got), got
    assert db_snapshot(migrated_engine) == before


def test_a_large_file_that_is_not_utf8_gets_the_located_byte_error(chunked, migrated_engine, sample_dir):
    import_path(migrated_engine, sample_dir, actor="ana")
    path = sample_dir / "pk.csv"
    path.write_bytes(path.read_bytes() + "AGR-002,b\xe9agle,iv,2 h,10 nM,,,\n".encode("latin-1"))
    with pytest.raises(ImportErrors) as info:
        import_path(migrated_engine, sample_dir, actor="ana")
    assert any(str(e).startswith(f"{path}:5: species: byte 0xE9") for e in info.value.errors), [str(e) for e in info.value.errors]


@pytest.mark.slow
def test_a_million_row_potency_import_peaks_below_500_mb(tmp_path):
    """The benchmark's own run at full size, as a subprocess; its peak RSS (ru_maxrss) must stay at or under 500 MB."""
    out = subprocess.run([sys.executable, str(REPO / "benchmarks" / "bench_import_memory.py"), "--rows", "1000000",
                          "--markdown", str(tmp_path / "table.md")], capture_output=True, text=True, cwd=REPO,
                         env=dict(os.environ, PYTHONPATH=str(REPO)))
    assert out.returncode == 0, out.stdout + out.stderr[-3000:]
    assert "| met |" in (tmp_path / "table.md").read_text()
