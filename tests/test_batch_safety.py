"""Batch runs that go wrong: what is kept, what is refused, the state left behind.

Companion of ``test_batch.py`` for the failure paths: user files in a batch
folder, a malformed review in one sample, two batches into one folder, a
damaged result on resume, a full disk, a lost scheduler, a cluster without
workers, Ctrl-C.
"""

import json
import os
import signal
import socket
import subprocess
import sys
import time

import numpy as np
import pandas as pd
import pytest

from conftest import fill_disk, start_dask_processes, stop_processes, write_ybranch
from pipeline import batch, synthetic
from pipeline.cli import main
from pipeline.tables import load_result

pytestmark = pytest.mark.integration  # Dask clusters started, killed and interrupted

SPACING = (1.0, 1.0, 1.0)


@pytest.fixture(scope="module")
def sheet(tmp_path_factory):
    """Four Y-branches in two groups."""
    root = tmp_path_factory.mktemp("bsafe")
    rows = []
    for i, (r, g) in enumerate(((4.0, "control"), (4.5, "control"), (6.0, "treated"), (6.5, "treated"))):
        write_ybranch(root / f"s{i}.tif", r)
        rows.append(f"s{i},{root / f's{i}.tif'},{g}\n")
    path = root / "sheet.csv"
    path.write_text("sample_id,path,group\n" + "".join(rows), encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def lone_run(sheet, tmp_path_factory):
    out = tmp_path_factory.mktemp("lone") / "out"
    assert main(["batch", str(sheet), "-o", str(out), "--workers", "1", "--quiet"]) == 0
    return out


def _state(out):
    return json.loads((out / "batch.json").read_text())


def _err_lines(capsys):
    return [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]


def _batch_cmd(sheet, out, *extra):
    return [sys.executable, "-m", "pipeline", "batch", str(sheet), "-o", str(out), *extra]


# --------------------------------------------------------------------------- user files


def test_overwrite_keeps_user_files_in_a_batch_folder(sheet, lone_run, tmp_path, capsys, snapshot):
    import shutil

    out = tmp_path / "out"
    shutil.copytree(lone_run, out)
    (out / "s1" / "my_analysis.txt").write_text("mine\n")
    (out / "s1" / ".hidden").mkdir()
    before = snapshot(out)
    for extra in ([], ["--overwrite"], ["--force"], ["--force", "--overwrite"]):
        assert main(["batch", str(sheet), "-o", str(out), "--quiet", *extra]) == 2
        err = _err_lines(capsys)
        assert len(err) == 1 and "s1" in err[0] and "my_analysis.txt" in err[0], err
        assert snapshot(out) == before


def test_overwrite_into_a_folder_of_user_files(sheet, tmp_path, capsys, snapshot):
    out = tmp_path / "mine"
    out.mkdir()
    (out / "notes.txt").write_text("keep\n")
    (out / "s0").mkdir()
    (out / "s0" / "raw_stack.tif").write_bytes(b"II*\0")
    before = snapshot(out)
    assert main(["batch", str(sheet), "-o", str(out), "--quiet", "--overwrite"]) == 2
    err = _err_lines(capsys)
    assert len(err) == 1 and "s0" in err[0], err
    assert snapshot(out) == before
    # Names the study tables would take, held by the user's own files, are refused too.
    (out / "s0" / "raw_stack.tif").unlink()
    (out / "s0").rmdir()
    (out / "group_comparison.csv").write_text("my own stats\n")
    before = snapshot(out)
    assert main(["batch", str(sheet), "-o", str(out), "--quiet", "--overwrite"]) == 2
    assert "group_comparison.csv" in _err_lines(capsys)[0]
    assert snapshot(out) == before


# --------------------------------------------------------------------------- reviews


@pytest.mark.parametrize("review", [
    "node_id,decision,note,reviewed_at\n123456789012345678901234567890,artefact,,\n",  # beyond int64
    "node_id,decision,note,reviewed_at\n0,maybe,,\n",  # not a decision
    "node_id,decision\n0,artefact\n",  # columns missing
])
def test_a_malformed_review_is_that_samples_warning(sheet, lone_run, tmp_path, capsys, review):
    import shutil

    out = tmp_path / "out"
    shutil.copytree(lone_run, out)
    (out / "s2" / "review.csv").write_text(review)
    code = main(["batch", str(sheet), "-o", str(out), "--quiet"])
    assert code in (0, 1)  # the study is done; the bad review is reported, not fatal
    err = "\n".join(_err_lines(capsys))
    assert "s2" in err and "review" in err and "Traceback" not in err
    meta = _state(out)
    assert meta["state"] in batch.FINAL_STATES and meta["state"].startswith("complete")
    s2 = next(r for r in meta["samples"] if r["sample_id"] == "s2")
    assert "review" in s2["warning"]
    cohort = pd.read_csv(out / "cohort_summary.csv", keep_default_na=False).set_index("sample_id")
    assert list(cohort.index) == ["s0", "s1", "s2", "s3"]  # every sample in the tables
    assert cohort.loc["s2", "review_problem"] and not cohort.loc["s0", "review_problem"]
    assert (out / "group_comparison.csv").is_file() and (out / "cohort_segments.parquet").is_file()


# --------------------------------------------------------------------------- one batch per folder


def test_a_second_batch_into_the_same_folder_is_refused(sheet, lone_run, tmp_path, capsys):
    out = tmp_path / "out"
    first = subprocess.Popen(_batch_cmd(sheet, out, "--workers", "1", "--quiet"), stderr=subprocess.PIPE,
                             text=True)
    try:
        deadline = time.monotonic() + 120
        while not (out / batch.LOCK_FILE).is_file() or not (out / "batch.json").is_file():
            assert first.poll() is None and time.monotonic() < deadline
            time.sleep(0.05)
        t0 = time.monotonic()
        assert main(["batch", str(sheet), "-o", str(out), "--quiet"]) == 2
        assert time.monotonic() - t0 < 10  # refused at once, not after the first one ends
        err = _err_lines(capsys)
        assert len(err) == 1 and f"process {first.pid}" in err[0] and "in use" in err[0], err
    finally:
        _, tail = first.communicate(timeout=600)
    assert first.returncode == 0, tail
    # The first batch was not disturbed: its tables are those of a lone run.
    for name in ("cohort_summary.csv", "group_comparison.csv"):
        pd.testing.assert_frame_equal(pd.read_csv(out / name), pd.read_csv(lone_run / name))
    assert _state(out)["state"] == "complete" and not (out / batch.LOCK_FILE).exists()


def test_a_lock_left_by_a_dead_process_is_taken_over(sheet, lone_run, tmp_path, capsys):
    import shutil

    out = tmp_path / "out"
    shutil.copytree(lone_run, out)
    dead = subprocess.run([sys.executable, "-c", "import os; print(os.getpid())"], capture_output=True,
                          text=True).stdout.strip()
    (out / batch.LOCK_FILE).write_text(json.dumps({"pid": int(dead), "host": socket.gethostname(),
                                                   "started": "2026-01-01T00:00:00+00:00"}))
    assert main(["batch", str(sheet), "-o", str(out)]) == 0
    err = "\n".join(_err_lines(capsys))
    assert f"took over the lock of an earlier batch (process {dead}" in err
    assert not (out / batch.LOCK_FILE).exists()


# --------------------------------------------------------------------------- resume checks every file


def test_a_truncated_table_is_redone_on_resume(sheet, lone_run, tmp_path):
    import shutil

    out = tmp_path / "out"
    shutil.copytree(lone_run, out)
    segs = out / "s1" / "segments.csv"
    full = segs.read_bytes()
    segs.write_bytes(full[: len(full) // 2])
    assert main(["batch", str(sheet), "-o", str(out), "--quiet"]) == 0
    status = {r["sample_id"]: r["status"] for r in _state(out)["samples"]}
    assert status == {"s0": "skipped", "s1": "done", "s2": "skipped", "s3": "skipped"}
    assert len(load_result(out / "s1").segments) == len(load_result(lone_run / "s1").segments)
    pd.testing.assert_frame_equal(pd.read_parquet(out / "cohort_segments.parquet"),
                                  pd.read_parquet(lone_run / "cohort_segments.parquet"))


# --------------------------------------------------------------------------- full disk


def test_a_full_disk_at_the_study_tables_is_one_line_and_a_final_state(sheet, lone_run, small_disk, capsys):
    import shutil

    disk = small_disk(8192)
    out = disk / "out"
    shutil.copytree(lone_run, out)
    for name in batch.STUDY_FILES:
        (out / name).unlink()
    filler = fill_disk(disk)
    # Room for batch.json (a few KiB, twice while it is replaced) but not for the study tables.
    os.truncate(filler, filler.stat().st_size - 24 * 1024)
    code = main(["batch", str(sheet), "-o", str(out), "--quiet"])
    err = _err_lines(capsys)
    assert code == 1 and len(err) == 1 and "No space left on device" in err[0], err
    meta = _state(out)
    assert meta["state"] == "failed" and "study tables" in meta["error"]
    assert not [n for n in batch.STUDY_FILES if (out / n).exists()]  # no half set of tables
    assert not [p.name for p in out.rglob("*") if ".partial" in p.name]
    assert all(load_result(out / f"s{i}") for i in range(4))  # the samples are kept
    os.unlink(filler)
    assert main(["batch", str(sheet), "-o", str(out), "--quiet"]) == 0  # and resume once there is room
    assert _state(out)["state"] == "complete"


# --------------------------------------------------------------------------- losing the cluster


@pytest.fixture
def external_cluster():
    """A scheduler and one worker as separate processes, as on a lab's cluster."""
    address, sched, workers = start_dask_processes(1, ("--no-nanny",))
    yield {"address": address, "scheduler": sched, "worker": workers[0]}
    stop_processes([sched, *workers])


@pytest.fixture(scope="module")
def many(tmp_path_factory):
    """Eight samples: enough that a batch is still running when its cluster goes."""
    root = tmp_path_factory.mktemp("many")
    net = synthetic.capillary_bed(shape_um=(90, 90, 90), vessel_fraction=0.12, seed=1)
    mask, _ = synthetic.rasterize(net, spacing=SPACING, shape=(90, 90, 90))
    np.save(root / "bed.npy", mask)
    rows = []
    for i in range(8):
        (root / f"b{i}.npy").write_bytes((root / "bed.npy").read_bytes())
        rows.append(f"b{i},{root / f'b{i}.npy'},{'ab'[i % 2]}\n")
    (root / "bed.npy").unlink()
    path = root / "sheet.csv"
    path.write_text("sample_id,path,group\n" + "".join(rows), encoding="utf-8")
    return path


def test_a_lost_scheduler_is_one_line_and_resumable(many, external_cluster, tmp_path):
    out = tmp_path / "out"
    proc = subprocess.Popen(_batch_cmd(many, out, "--scheduler", external_cluster["address"]),
                            stderr=subprocess.PIPE, text=True)
    lines = []
    for line in proc.stderr:
        lines.append(line)
        if " done in " in line:
            external_cluster["scheduler"].kill()
            break
    rest = proc.communicate(timeout=300)[1]
    after = [ln for ln in rest.splitlines() if ln.strip() and " done in " not in ln]
    assert proc.returncode == 1, "".join(lines) + rest
    assert len(after) == 1 and "lost the connection" in after[0] and "resume" in after[0], rest
    meta = _state(out)
    assert meta["state"] == "cluster lost"
    done = [r["sample_id"] for r in meta["samples"] if r["status"] == "done"]
    assert 1 <= len(done) < 8 and not any(r["status"] == "failed" for r in meta["samples"])
    assert not (out / "group_comparison.csv").exists()  # no comparison from part of the study
    for sid in done:
        load_result(out / sid)  # complete and intact
    assert main(["batch", str(many), "-o", str(out), "--workers", "2", "--quiet"]) == 0
    counts = _state(out)["counts"]
    assert counts["skipped"] >= len(done) and counts["skipped"] + counts["done"] == 8


def test_a_cluster_without_workers_stops_with_a_clear_line(many, external_cluster, tmp_path, capsys):
    external_cluster["worker"].kill()
    external_cluster["worker"].wait(timeout=30)
    out = tmp_path / "out"
    t0 = time.monotonic()
    code = main(["batch", str(many), "-o", str(out), "--scheduler", external_cluster["address"], "--quiet",
                 "--worker-timeout", "3"])
    assert code == 1 and time.monotonic() - t0 < 60
    err = _err_lines(capsys)
    assert len(err) == 1 and "no worker for 3 s" in err[0], err
    assert _state(out)["state"] == "cluster lost"


# --------------------------------------------------------------------------- Ctrl-C


def test_ctrl_c_prints_one_line(many, tmp_path):
    out = tmp_path / "out"
    proc = subprocess.Popen(_batch_cmd(many, out, "--workers", "2"), stderr=subprocess.PIPE, text=True,
                            start_new_session=True)
    for line in proc.stderr:
        if " done in " in line:
            os.killpg(proc.pid, signal.SIGINT)  # as a terminal does: to the whole foreground process group
            break
    rest = proc.communicate(timeout=180)[1]
    after = [ln for ln in rest.splitlines() if ln.strip() and " done in " not in ln]
    assert proc.returncode == 130
    assert len(after) == 1 and "interrupted" in after[0], rest
    assert _state(out)["state"] == "interrupted"


def test_batch_files_honour_the_umask(sheet, tmp_path):
    import stat

    out = tmp_path / "out"
    old = os.umask(0o027)  # a lab group may read, others not
    try:
        assert main(["batch", str(sheet), "-o", str(out), "--workers", "1", "--quiet"]) == 0
    finally:
        os.umask(old)
    modes = {p.relative_to(out).as_posix(): stat.S_IMODE(p.stat().st_mode) for p in [out, *out.rglob("*")]}
    # POSIX: mkdir(2) 0777 and open(2) 0666, less the umask 027.
    wrong = {k: oct(m) for k, m in modes.items()
             if m != (0o750 if (out / k).is_dir() else 0o640)}
    assert not wrong, wrong
