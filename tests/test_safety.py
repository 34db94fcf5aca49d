"""The users' data: what vesselflow may replace, and the state it leaves after a failure.

Each case comes from a way a user lost files or got a half-written folder:
``--overwrite`` pointed at the input's folder or at a folder of their own
files, a full or read-only disk, a killed run, a changed result file, a
umask that makes shared folders readable.
"""

import json
import os
import stat

import pytest

from conftest import fill_disk
from pipeline import synthetic
from pipeline.cli import main
from pipeline.errors import InputError
from pipeline.tables import RESULT_FILES, clean_stale_partials, load_result, verify_result


@pytest.fixture(scope="module")
def mask_tif(tmp_path_factory):
    d = tmp_path_factory.mktemp("safety")
    mask, truth = synthetic.rasterize(synthetic.y_branch(parent_radius_um=4, parent_length_um=30,
                                                         daughter_length_um=30), spacing=(1, 1, 1))
    path = d / "y.tif"
    synthetic.write_volume(path, mask, spacing=(1, 1, 1), truth=truth)
    return path


@pytest.fixture(scope="module")
def result_dir(mask_tif, tmp_path_factory):
    out = tmp_path_factory.mktemp("res") / "y"
    assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet"]) == 0
    return out


def _one_error_line(capsys):
    # Warnings about the sample printed while it was analysed may precede the error.
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip() and "warning:" not in ln]
    assert len(err) == 1, err
    return err[0]


def _user_folder(root):
    """A folder as a user keeps it: notes, a raw stack in a sub-folder, a hidden config, a mask."""
    root.mkdir(parents=True, exist_ok=True)
    (root / "notes.txt").write_text("animal 3, window day 12\n")
    (root / "sub").mkdir()
    (root / "sub" / "raw_stack.tif").write_bytes(b"II*\0raw")
    (root / ".lab-config").write_text("scope: 2p\n")
    return root


# --------------------------------------------------------------------------- overwrite


def test_overwrite_into_the_inputs_own_folder_is_refused(mask_tif, tmp_path, capsys, snapshot):
    folder = tmp_path / "masks"
    folder.mkdir()
    mask = folder / "a.tif"
    mask.write_bytes(mask_tif.read_bytes())
    (folder / "b.tif").write_bytes(mask_tif.read_bytes())
    (folder / "notes.txt").write_text("mine\n")
    before = snapshot(folder)
    assert main(["analyze", str(mask), "-o", str(folder), "--overwrite", "--quiet"]) == 2
    assert "contains the input" in _one_error_line(capsys)
    assert snapshot(folder) == before
    # A folder above the input's folder contains it too.
    assert main(["analyze", str(mask), "-o", str(tmp_path), "--overwrite", "--quiet"]) == 2
    assert "contains the input" in _one_error_line(capsys)
    assert snapshot(folder) == before


def test_overwrite_onto_a_folder_of_user_files_is_refused(mask_tif, tmp_path, capsys, snapshot):
    folder = _user_folder(tmp_path / "mine")
    before = snapshot(folder)
    assert main(["analyze", str(mask_tif), "-o", str(folder), "--overwrite", "--quiet"]) == 2
    assert "not a vesselflow result" in _one_error_line(capsys)
    assert snapshot(folder) == before


def test_overwrite_replaces_a_result_but_never_files_added_to_it(mask_tif, tmp_path, capsys, snapshot):
    out = tmp_path / "res"
    assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet"]) == 0
    first = json.loads((out / "run.json").read_text())["created"]
    # A result folder and nothing else: replaced.
    assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet", "--overwrite"]) == 0
    assert sorted(p.name for p in out.iterdir()) == sorted(RESULT_FILES)
    assert json.loads((out / "run.json").read_text())["created"] >= first
    # A user's file dropped into it: the folder is no longer only ours, so it is kept whole.
    (out / "my_analysis.txt").write_text("do not lose\n")
    before = snapshot(out)
    capsys.readouterr()
    assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet", "--overwrite"]) == 2
    assert "my_analysis.txt" in _one_error_line(capsys)
    assert snapshot(out) == before


def test_overwrite_keeps_the_review(mask_tif, tmp_path):
    out = tmp_path / "res"
    assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet"]) == 0
    review = "node_id,decision,note,reviewed_at\n0,artefact,blob,2026-01-01T00:00:00+00:00\n"
    (out / "review.csv").write_text(review)
    # Same input and settings: the node ids still apply, the review stays in force.
    assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet", "--overwrite"]) == 0
    assert (out / "review.csv").read_text() == review
    # Other settings: the review is set aside, not lost.
    assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet", "--overwrite", "--no-flow"]) == 0
    assert not (out / "review.csv").exists() and (out / "review-superseded.csv").read_text() == review


def test_demo_overwrite_never_touches_other_files(mask_tif, tmp_path, capsys, snapshot):
    src = tmp_path / "volumes"
    src.mkdir()
    (src / "y.tif").write_bytes(mask_tif.read_bytes())
    out = _user_folder(tmp_path / "results")
    (out / "y").mkdir()
    (out / "y" / "keep.txt").write_text("mine\n")
    before = snapshot(out)
    assert main(["demo", "-o", str(out), "--input-dir", str(src), "--overwrite", "--quiet"]) == 2
    assert "not a vesselflow result" in _one_error_line(capsys)
    assert snapshot(out) == before


# --------------------------------------------------------------------------- integrity


@pytest.mark.parametrize("name", ["segments.csv", "centrelines.npz", "summary.json"])
def test_a_truncated_file_is_found(result_dir, tmp_path, name):
    import shutil

    copy = tmp_path / "copy"
    shutil.copytree(result_dir, copy)
    assert verify_result(copy) == []
    data = (copy / name).read_bytes()
    (copy / name).write_bytes(data[: len(data) // 2])
    problems = verify_result(copy)
    assert len(problems) == 1 and name in problems[0]
    with pytest.raises(InputError, match=name):
        load_result(copy)


def test_run_json_records_every_file(result_dir):
    run = json.loads((result_dir / "run.json").read_text())
    assert sorted(run["files"]) == sorted(f for f in RESULT_FILES if f != "run.json")
    assert all(len(v["sha256"]) == 64 and v["bytes"] == (result_dir / k).stat().st_size
               for k, v in run["files"].items())


# --------------------------------------------------------------------------- permissions


def test_files_and_folders_honour_the_umask(mask_tif, tmp_path):
    old = os.umask(0o022)
    try:
        out = tmp_path / "res"
        assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet", "--report"]) == 0
    finally:
        os.umask(old)
    for p in [out, *out.rglob("*")]:
        mode = stat.S_IMODE(p.stat().st_mode)
        # umask 022: folders rwxr-xr-x, files rw-r--r-- (POSIX open(2)/mkdir(2) with modes 0666/0777).
        assert mode == (0o755 if p.is_dir() else 0o644), (p, oct(mode))


# --------------------------------------------------------------------------- killed runs


def test_leftovers_of_killed_runs_are_cleaned_and_live_ones_kept(mask_tif, tmp_path):
    import socket
    import subprocess
    import sys

    host = "".join(c for c in socket.gethostname() if c.isalnum())[:32] or "host"
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True).stdout.strip()
    stale = tmp_path / f".old-sample.partial-{host}-{dead}-x1y2"
    stale.mkdir()
    (stale / "segments.csv").write_text("half")
    live = tmp_path / f".other.partial-{host}-{os.getpid()}-a3b4"  # a run still going
    live.mkdir()
    foreign = tmp_path / ".userthing.partial-notours"  # not a name vesselflow makes
    foreign.mkdir()
    assert main(["analyze", str(mask_tif), "-o", str(tmp_path / "res"), "--quiet"]) == 0
    assert not stale.exists() and live.exists() and foreign.exists()
    assert clean_stale_partials(tmp_path) == []


# --------------------------------------------------------------------------- full and read-only disks


def _no_partials(folder):
    return [p.name for p in folder.rglob("*") if ".partial" in p.name or ".old-" in p.name]


def test_analyze_on_a_full_disk_is_one_line_and_leaves_nothing(mask_tif, small_disk, capsys):
    disk = small_disk(1024)
    filler = fill_disk(disk)
    # Leave 8 KiB: the first tables fit, the disk fills in the middle of the result (tens of KiB).
    os.truncate(filler, filler.stat().st_size - 8192)
    out = disk / "res"
    assert main(["analyze", str(mask_tif), "-o", str(out), "--quiet"]) == 1
    line = _one_error_line(capsys)
    assert "No space left on device" in line and str(out) in line
    assert not out.exists() and _no_partials(disk) == [] and sorted(p.name for p in disk.iterdir()) == ["filler.bin"]


def test_analyze_on_a_read_only_disk_is_one_line(mask_tif, small_disk, capsys):
    disk = small_disk(1024, readonly=True)
    assert main(["analyze", str(mask_tif), "-o", str(disk / "res"), "--quiet"]) == 1
    line = _one_error_line(capsys)
    assert "Read-only file system" in line and "needs a writable file system" in line


@pytest.fixture
def result_on_full_disk(result_dir, small_disk):
    import shutil

    disk = small_disk(4096)
    res = disk / "res"
    shutil.copytree(result_dir, res)
    (res / "review.csv").write_text("node_id,decision,note,reviewed_at\n")
    fill_disk(disk)
    return res


def test_summarize_on_a_full_disk_is_one_line(result_on_full_disk, capsys, snapshot):
    before = snapshot(result_on_full_disk)
    assert main(["summarize", str(result_on_full_disk), "--apply-review"]) == 1
    line = _one_error_line(capsys)
    assert "No space left on device" in line and "summary_reviewed.json" in line
    assert snapshot(result_on_full_disk) == before


def test_report_on_a_full_disk_is_one_line(result_on_full_disk, capsys, snapshot):
    before = snapshot(result_on_full_disk)
    assert main(["report", str(result_on_full_disk), "--quiet"]) == 1
    line = _one_error_line(capsys)
    assert "No space left on device" in line and "report.html" in line
    assert snapshot(result_on_full_disk) == before


@pytest.mark.parametrize("command", ["analyze", "synth", "demo", "batch"])
def test_every_command_on_a_read_only_disk_is_one_line(command, mask_tif, small_disk, tmp_path, capsys):
    disk = small_disk(1024, readonly=True)
    sheet = tmp_path / "sheet.csv"
    sheet.write_text(f"sample_id,path,group\ny,{mask_tif},all\n", encoding="utf-8")
    args = {"analyze": ["analyze", str(mask_tif), "-o", str(disk / "res")],
            "synth": ["synth", "tube", "-o", str(disk / "t.tif")],
            "demo": ["demo", "--input-dir", str(mask_tif.parent), "-o", str(disk / "demo")],
            "batch": ["batch", str(sheet), "-o", str(disk / "study"), "--workers", "1"]}[command]
    assert main([*args, "--quiet"]) == 1
    line = _one_error_line(capsys)
    assert "Read-only file system" in line and str(disk) in line, line


def test_synth_on_a_full_disk_leaves_nothing(small_disk, capsys):
    disk = small_disk(1024)
    filler = fill_disk(disk)
    os.truncate(filler, filler.stat().st_size - 4096)
    assert main(["synth", "bed", "-o", str(disk / "bed.tif")]) == 1
    assert "No space left on device" in _one_error_line(capsys)
    assert sorted(p.name for p in disk.iterdir()) == ["filler.bin"]
