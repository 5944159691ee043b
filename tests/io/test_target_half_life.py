"""programs.csv's optional target_half_life: unit-aware on import, written back as it arrived, in the template."""

from __future__ import annotations

from tracker.db import queries
from tracker.io.specs import PROGRAMS
from tracker.services.importing import export_all, import_path

from ..conftest import SAMPLE, write_files


def test_target_half_life_is_stored_in_seconds_beside_its_text_and_exported_unchanged(migrated_engine, sample_dir, tmp_path):
    import_path(migrated_engine, sample_dir)
    p = queries.programs(migrated_engine).set_index("name")
    assert p.loc["Ashgrove", "target_half_life_s"] == 30 * 3600.0
    assert p.loc["Ashgrove", "target_half_life_text"] == "30 h"
    assert p["target_half_life_s"].isna()["Brackenfold"]
    export_all(migrated_engine, tmp_path / "out")
    text = (tmp_path / "out" / "programs.csv").read_text(encoding="utf-8")
    assert text.splitlines()[0].endswith(",dosing_interval,target_half_life")
    assert "Ashgrove,Kinase AG1,once-daily,0.8,2 h,24 h,,24 h,30 h" in text


def test_a_target_half_life_without_a_time_unit_is_refused_with_file_line_and_column(migrated_engine, tmp_path, db_snapshot):
    import pytest

    from tracker.errors import KrtError

    files = dict(SAMPLE)
    files["programs.csv"] = SAMPLE["programs.csv"].replace("24 h,30 h", "24 h,30 nM")
    folder = write_files(tmp_path / "bad", files)
    before = db_snapshot(migrated_engine)
    with pytest.raises(KrtError) as exc:
        import_path(migrated_engine, folder)
    assert "programs.csv:2: target_half_life:" in str(exc.value)
    assert db_snapshot(migrated_engine) == before


def test_the_programs_template_offers_the_column():
    from tracker.ui.views.load import EXAMPLES, template_csv

    assert "target_half_life" in PROGRAMS.names
    assert EXAMPLES["programs"]["target_half_life"] == "30 h"
    assert b"target_half_life" in template_csv("programs")


def test_an_oral_tmax_beyond_fifty_elimination_time_constants_is_refused_at_import(migrated_engine, tmp_path, db_snapshot):
    # 90 min half-life: 50 time constants = 50 x 1.5 h / ln2 = 108 h; 120 h is beyond
    import pytest

    from tracker.errors import KrtError

    files = dict(SAMPLE)
    files["pk.csv"] = SAMPLE["pk.csv"].replace("BKF-001,dog,oral,90 min,12 nM,30 min", "BKF-001,dog,oral,90 min,12 nM,120 h")
    folder = write_files(tmp_path / "bad", files)
    before = db_snapshot(migrated_engine)
    with pytest.raises(KrtError) as exc:
        import_path(migrated_engine, folder)
    assert "pk.csv:4: tmax: tmax is more than 50 elimination time constants" in str(exc.value)
    assert db_snapshot(migrated_engine) == before
