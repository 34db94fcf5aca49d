"""Result-folder writing helpers."""

import numpy as np
import pandas as pd
import pytest

from pipeline.tables import write_atomic


def test_write_atomic_replaces_the_file(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("old\n")
    assert write_atomic(path, lambda tmp: tmp.write_text("new\n")) == path
    assert path.read_text() == "new\n" and sorted(p.name for p in tmp_path.iterdir()) == ["t.csv"]


def test_write_atomic_failure_keeps_the_old_file_and_leaves_nothing(tmp_path):
    path = tmp_path / "t.csv"
    path.write_text("old\n")

    def broken(tmp):
        tmp.write_text("half")
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        write_atomic(path, broken)
    assert path.read_text() == "old\n" and sorted(p.name for p in tmp_path.iterdir()) == ["t.csv"]


@pytest.mark.parametrize("what, words", [
    ("missing", "does not exist"),
    ("file", "is a file"),
    ("empty", "is not a vesselflow result folder (it is empty)"),
    ("other", "is not a vesselflow result folder (it holds notes.txt)"),
    ("batch", "is a batch folder, not one sample's result; pick one of its 2 samples (s1, s2)"),
    ("results", "holds 2 result folder(s) (s1, s2), not one result; pick one"),
])
def test_load_result_says_what_a_folder_is_instead(tmp_path, what, words):
    # `view` and `score` pointed at the wrong folder: one line that says what it is and what to pick.
    from pipeline.errors import InputError
    from pipeline.tables import load_result

    target = tmp_path / "x"
    if what == "file":
        target.write_text("")
    elif what == "empty":
        target.mkdir()
    elif what == "other":
        target.mkdir()
        (target / "notes.txt").write_text("mine")
    elif what in ("batch", "results"):
        target.mkdir()
        if what == "batch":
            (target / "batch.json").write_text("{}")
        for sid in ("s1", "s2"):
            (target / sid).mkdir()
            (target / sid / "run.json").write_text("{}")
    with pytest.raises(InputError) as info:
        load_result(target)
    assert words in str(info.value) and "\n" not in str(info.value)


def test_large_tables_are_also_written_as_parquet(tmp_path, monkeypatch):
    """Parquet beside the CSV from PARQUET_ROWS rows on; pyarrow reads it back to the same table."""
    import pyarrow.parquet as pq

    from pipeline import analyze, synthetic, tables

    mask, _ = synthetic.rasterize(synthetic.capillary_bed(shape_um=(60, 60, 60), seed=1), spacing=(1, 1, 1))
    res = analyze(mask, spacing=(1, 1, 1))
    monkeypatch.setattr(tables, "PARQUET_ROWS", len(res.nodes))  # nodes and segments qualify, bifurcations not
    out = tables.write_result(res, tmp_path / "r", run_info={})
    assert (out / "segments.parquet").is_file() and (out / "nodes.parquet").is_file()
    assert not (out / "bifurcations.parquet").exists()
    back = pq.read_table(out / "segments.parquet").to_pandas()
    csv = pd.read_csv(out / "segments.csv")
    assert list(back.columns) == list(csv.columns) and len(back) == len(csv)
    assert np.allclose(back["length_um"], csv["length_um"]) and (back["segment_id"] == csv["segment_id"]).all()
    assert tables.verify_result(out) == []
