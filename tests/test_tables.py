"""Result-folder writing helpers."""

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
