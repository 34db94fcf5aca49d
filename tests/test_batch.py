"""Batch processing: sample sheets, Dask engine, resume, failures, cohort tables."""

import json
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from conftest import write_ybranch
from pipeline import batch, synthetic
from pipeline.cli import main
from pipeline.tables import RESULT_FILES, load_result

SPACING = (1.0, 1.0, 1.0)


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    """Two groups of Y-branches of different calibre, a corrupt TIFF and an empty mask."""
    root = tmp_path_factory.mktemp("study")
    vols = root / "volumes"
    vols.mkdir()
    rows = []
    for i, r in enumerate((4.0, 4.5, 5.0)):
        write_ybranch(vols / f"ctrl{i}.tif", r)
        rows.append((f"ctrl{i}", f"volumes/ctrl{i}.tif", "control"))
    for i, r in enumerate((6.0, 6.5)):
        write_ybranch(vols / f"trt{i}.tif", r)
        rows.append((f"trt{i}", f"volumes/trt{i}.tif", "treated"))
    good = (vols / "ctrl0.tif").read_bytes()
    (vols / "corrupt.tif").write_bytes(good[: len(good) // 3])  # truncated in its image data
    np.save(vols / "empty.npy", np.zeros((20, 20, 20), np.uint8))
    rows += [("corrupt", "volumes/corrupt.tif", "treated"), ("empty", "volumes/empty.npy", "treated")]
    sheet = root / "sheet.csv"
    sheet.write_text("sample_id,path,group\n" + "".join(f"{a},{b},{c}\n" for a, b, c in rows), encoding="utf-8")
    return {"root": root, "sheet": sheet, "good": [r[0] for r in rows[:5]]}


@pytest.fixture(scope="module")
def first_run(study):
    out = study["root"] / "out"
    code = main(["batch", str(study["sheet"]), "-o", str(out), "--workers", "2", "--quiet"])
    return {"out": out, "code": code, "mtimes": {s: (out / s / "segments.csv").stat().st_mtime_ns
                                                   for s in study["good"]}}


def test_failures_are_recorded_and_the_rest_complete(study, first_run):
    out = first_run["out"]
    assert first_run["code"] == 1  # exit code 1 when any sample failed
    fails = pd.read_csv(out / "failures.csv")
    assert list(fails.columns) == ["sample_id", "path", "step", "error"]
    assert sorted(fails["sample_id"]) == ["corrupt", "empty"]
    by_id = fails.set_index("sample_id")
    assert by_id.loc["corrupt", "step"] == "reading"
    assert "corrupt" in by_id.loc["corrupt", "error"] or "truncated" in by_id.loc["corrupt", "error"]
    assert "empty" in by_id.loc["empty", "error"]
    for sid in study["good"]:
        assert all((out / sid / f).is_file() for f in RESULT_FILES)
        res = load_result(out / sid)
        assert res.run["batch"]["sample_id"] == sid
    assert not (out / "corrupt").exists() and not (out / "empty").exists()
    assert not list(out.glob(".*partial*"))
    meta = json.loads((out / "batch.json").read_text())
    assert meta["state"] == "complete with failures"
    assert meta["counts"] == {"done": 5, "skipped": 0, "failed": 2, "not run": 0}


def test_cohort_tables(study, first_run):
    out = first_run["out"]
    cs = pd.read_csv(out / "cohort_summary.csv")
    assert list(cs["sample_id"]) == study["good"]
    assert list(cs["group"]) == ["control"] * 3 + ["treated"] * 2
    for sid in study["good"]:
        summary = json.loads((out / sid / "summary.json").read_text())
        row = cs.set_index("sample_id").loc[sid]
        assert row["total_length_mm"] == pytest.approx(summary["total_length_mm"], rel=1e-12)
        assert row["junctions"] == summary["junctions"]
    segs = pd.read_parquet(out / "cohort_segments.parquet")
    bifs = pd.read_parquet(out / "cohort_bifurcations.parquet")
    for sid in study["good"]:
        n = len(pd.read_csv(out / sid / "segments.csv"))
        assert (segs["sample_id"] == sid).sum() == n
        assert (bifs["sample_id"] == sid).sum() == len(pd.read_csv(out / sid / "bifurcations.csv"))
    # Y-branches of larger calibre: the treated group's radii are larger;
    # check the table against scipy.stats computed directly on the per-sample values.
    comp = pd.read_csv(out / "group_comparison.csv").set_index("measure")
    r = comp.loc["radius_median_um"]
    a = cs.loc[cs["group"] == "control", "radius_median_um"].to_numpy()
    b = cs.loc[cs["group"] == "treated", "radius_median_um"].to_numpy()
    assert (r["group_a"], r["group_b"], r["n_a"], r["n_b"]) == ("control", "treated", 3, 2)
    assert r["mean_a"] == pytest.approx(a.mean()) and r["sd_b"] == pytest.approx(b.std(ddof=1))
    assert r["difference"] == pytest.approx(b.mean() - a.mean()) and r["difference"] > 0
    mw = stats.mannwhitneyu(a, b, alternative="two-sided")
    assert r["mann_whitney_u"] == pytest.approx(mw.statistic) and r["p_value"] == pytest.approx(mw.pvalue)


def test_second_run_skips_and_force_redoes(study, first_run):
    out = first_run["out"]
    code = main(["batch", str(study["sheet"]), "-o", str(out), "--workers", "2", "--quiet"])
    assert code == 1  # the two bad samples fail again
    meta = json.loads((out / "batch.json").read_text())
    assert meta["counts"]["skipped"] == 5 and meta["counts"]["done"] == 0
    for sid in study["good"]:  # untouched outputs
        assert (out / sid / "segments.csv").stat().st_mtime_ns == first_run["mtimes"][sid]
    before = pd.read_csv(out / "cohort_summary.csv")
    code = main(["batch", str(study["sheet"]), "-o", str(out), "--workers", "2", "--quiet", "--force"])
    meta = json.loads((out / "batch.json").read_text())
    assert code == 1 and meta["counts"]["done"] == 5 and meta["counts"]["skipped"] == 0
    for sid in study["good"]:
        assert (out / sid / "segments.csv").stat().st_mtime_ns != first_run["mtimes"][sid]
    pd.testing.assert_frame_equal(pd.read_csv(out / "cohort_summary.csv"), before)  # deterministic


def test_changed_config_redoes(study, tmp_path):
    sheet = tmp_path / "one.csv"
    src = study["root"] / "volumes" / "ctrl0.tif"
    sheet.write_text(f"sample_id,path,group\nc0,{src},control\n", encoding="utf-8")
    out = tmp_path / "out"
    assert main(["batch", str(sheet), "-o", str(out), "--workers", "1", "--quiet"]) == 0
    cfg = tmp_path / "c.yaml"
    cfg.write_text("pruning:\n  min_fragment_length_um: 12.0\n", encoding="utf-8")
    assert main(["batch", str(sheet), "-o", str(out), "--workers", "1", "--quiet", "--config", str(cfg),
                 "--report"]) == 0
    meta = json.loads((out / "batch.json").read_text())
    assert meta["counts"]["done"] == 1
    assert (out / "report.html").is_file() and any((out / "figures").glob("*.png"))
    assert load_result(out / "c0").run["config"]["pruning"]["min_fragment_length_um"] == 12.0


def test_existing_scheduler_gives_the_same_tables(study, first_run, tmp_path):
    from distributed import LocalCluster

    good = study["root"] / "good.csv"
    lines = study["sheet"].read_text().splitlines()
    good.write_text("\n".join(lines[:6]) + "\n", encoding="utf-8")
    ref = tmp_path / "ref"
    assert main(["batch", str(good), "-o", str(ref), "--workers", "1", "--quiet"]) == 0
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=":0") as cluster:
        assert cluster.scheduler_address.startswith("tcp://127.0.0.1:")
        out = tmp_path / "remote"
        assert main(["batch", str(good), "-o", str(out), "--scheduler", cluster.scheduler_address,
                     "--quiet"]) == 0
    for name in ("cohort_summary.csv", "group_comparison.csv"):
        pd.testing.assert_frame_equal(pd.read_csv(out / name), pd.read_csv(ref / name))
    pd.testing.assert_frame_equal(pd.read_parquet(out / "cohort_segments.parquet"),
                                  pd.read_parquet(ref / "cohort_segments.parquet"))


def test_unreachable_scheduler_is_a_clear_error(study, tmp_path, capsys):
    code = main(["batch", str(study["sheet"]), "-o", str(tmp_path / "o"), "--scheduler", "tcp://127.0.0.1:9",
                 "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and "--scheduler" in err[0]


# --------------------------------------------------------------------------- #
# Group statistics against scipy.stats computed directly
# --------------------------------------------------------------------------- #


def _bh(p):
    # Benjamini Y, Hochberg Y (1995) J R Stat Soc B 57:289-300: with p sorted
    # ascending, q_(i) = min over j >= i of m p_(j) / j.
    p = np.asarray(p, float)
    m = p.size
    order = np.argsort(p)
    q = np.empty(m)
    running = 1.0
    for rank in range(m, 0, -1):
        i = order[rank - 1]
        running = min(running, p[i] * m / rank)
        q[i] = running
    return q


@pytest.fixture
def constructed():
    rng = np.random.default_rng(7)
    n_a, n_b = 6, 8
    df = pd.DataFrame({
        "sample_id": [f"s{i}" for i in range(n_a + n_b)],
        "group": ["ctrl"] * n_a + ["trt"] * n_b,
        "length_mm": np.r_[rng.normal(10, 1, n_a), rng.normal(13, 1, n_b)],
        "radius_um": np.r_[rng.normal(4, 0.3, n_a), rng.normal(4.1, 0.3, n_b)],
        "junctions": np.r_[rng.integers(10, 20, n_a), rng.integers(15, 30, n_b)],
        "reviewed": [False] * (n_a + n_b),
    })
    df.loc[2, "radius_um"] = np.nan  # a missing value is left out of its measure
    return df


def test_group_comparison_matches_scipy(constructed):
    comp = batch.group_comparison(constructed).set_index("measure")
    assert list(comp.index) == ["length_mm", "radius_um", "junctions"]  # booleans and ids are not measures
    for m in comp.index:
        a = constructed.loc[constructed.group == "ctrl", m].dropna().to_numpy(float)
        b = constructed.loc[constructed.group == "trt", m].dropna().to_numpy(float)
        row = comp.loc[m]
        assert (row["n_a"], row["n_b"]) == (a.size, b.size)
        assert row["mean_a"] == pytest.approx(np.mean(a)) and row["mean_b"] == pytest.approx(np.mean(b))
        assert row["sd_a"] == pytest.approx(np.std(a, ddof=1)) and row["median_b"] == pytest.approx(np.median(b))
        assert row["difference"] == pytest.approx(np.mean(b) - np.mean(a))
        mw = stats.mannwhitneyu(a, b, alternative="two-sided")
        assert row["mann_whitney_u"] == pytest.approx(mw.statistic)
        assert row["p_value"] == pytest.approx(mw.pvalue, rel=1e-12)
    assert comp["q_value"].to_numpy() == pytest.approx(_bh(comp["p_value"].to_numpy()), rel=1e-12)
    assert (comp["q_value"] >= comp["p_value"]).all()


def test_bh_reference_example():
    # Worked check of the BH step-up rule (Benjamini & Hochberg 1995) on
    # p = 0.01, 0.02, 0.03, 0.5: q = 0.04, 0.04, 0.04, 0.5.
    df = pd.DataFrame({"group": ["a"] * 3 + ["b"] * 3, "x": [1, 2, 3, 4, 5, 6]})
    assert _bh([0.01, 0.02, 0.03, 0.5]) == pytest.approx([0.04, 0.04, 0.04, 0.5])
    comp = batch.group_comparison(df)
    # Exact two-sided Mann-Whitney for complete separation of 3 vs 3:
    # 2 / C(6, 3) = 0.1 (Mann & Whitney 1947, Ann Math Stat 18:50).
    assert comp.loc[0, "p_value"] == pytest.approx(0.1)


def test_three_groups_give_every_pair_and_one_group_no_test():
    df = pd.DataFrame({"group": list("aabbcc"), "x": [1.0, 2, 3, 4, 5, 6]})
    comp = batch.group_comparison(df)
    assert list(zip(comp["group_a"], comp["group_b"])) == [("a", "b"), ("a", "c"), ("b", "c")]
    one = batch.group_comparison(df.assign(group="all"))
    assert len(one) == 1 and one.loc[0, "n_a"] == 6 and np.isnan(one.loc[0, "p_value"])


# --------------------------------------------------------------------------- #
# Sample sheets and folders
# --------------------------------------------------------------------------- #


@pytest.mark.parametrize("content, needle", [
    ("sample_id,path,group,colour\na,ctrl0.tif,c,red\n", "line 1: unknown column 'colour'"),
    ("sample_id,path\na,ctrl0.tif\n", "missing column 'group'"),
    ("sample_id,path,group\na,ctrl0.tif,c\nb,nothere.tif,c\n", "line 3 (sample 'b'): mask file 'nothere.tif' not found"),
    ("sample_id,path,group\na,ctrl0.tif,c\na,ctrl1.tif,c\n", "line 3 (sample 'a'): duplicate sample_id, first used on line 2"),
    ("sample_id,path,group,spacing_z,spacing_y,spacing_x\na,ctrl0.tif,c,0,1,1\n", "line 2 (sample 'a'): spacing must be positive"),
    ("sample_id,path,group,spacing_z\na,ctrl0.tif,c,2\n", "all of spacing_z, spacing_y, spacing_x"),
    ("sample_id,path,group\n../up,ctrl0.tif,c\n", "line 2: sample_id must start"),
    ("sample_id,path,group\na,ctrl0.tif,\n", "line 2 (sample 'a'): group is empty"),
    ("sample_id,path,group,root\na,ctrl0.tif,c,middle\n", "line 2 (sample 'a'): root"),
    ("sample_id,path,group\n", "at least one sample"),
])
def test_bad_sheet_fails_before_any_work(study, tmp_path, capsys, content, needle):
    sheet = tmp_path / "sheet.csv"
    sheet.write_text(content, encoding="utf-8")
    for name in ("ctrl0.tif", "ctrl1.tif"):
        (tmp_path / name).write_bytes((study["root"] / "volumes" / name).read_bytes())
    out = tmp_path / "out"
    code = main(["batch", str(sheet), "-o", str(out), "--quiet"])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and needle in err[0], err
    assert not out.exists()  # nothing written


def test_sheet_spacing_and_root_reach_the_sample(study, tmp_path):
    src = study["root"] / "volumes" / "ctrl0.tif"
    sheet = tmp_path / "sheet.csv"
    sheet.write_text("sample_id,path,group,spacing_z,spacing_y,spacing_x,root\n"
                     f"a,{src},c,2,1,1,node:0\n", encoding="utf-8")
    samples = batch.read_sample_sheet(sheet)
    assert samples[0].spacing == (2.0, 1.0, 1.0) and samples[0].root == "node:0"
    out = tmp_path / "out"
    assert main(["batch", str(sheet), "-o", str(out), "--workers", "1", "--quiet"]) == 0
    res = load_result(out / "a")
    assert res.spacing == (2.0, 1.0, 1.0) and res.run["spacing_source"] != "default"
    assert res.run["config"]["levels"]["root"] == "node:0"


def test_folder_input_groups_by_subfolder(study, tmp_path):
    for g in ("control", "treated"):
        (tmp_path / "in" / g).mkdir(parents=True)
    vols = study["root"] / "volumes"
    for name, g in (("ctrl0.tif", "control"), ("ctrl1.tif", "control"), ("trt0.tif", "treated")):
        (tmp_path / "in" / g / name).write_bytes((vols / name).read_bytes())
    (tmp_path / "in" / "treated" / "notes.txt").write_text("not a mask")
    samples = batch.find_samples(tmp_path / "in")
    assert [(s.sample_id, s.group) for s in samples] == [("ctrl0", "control"), ("ctrl1", "control"),
                                                         ("trt0", "treated")]
    # The batch's own output below the input folder is not an input.
    out = tmp_path / "in" / "results"
    out.mkdir()
    np.save(out / "stray.npy", np.zeros((3, 3, 3)))
    assert len(batch.collect_samples(tmp_path / "in", exclude=out)) == 3


@pytest.mark.parametrize("args, needle", [(["--memory-limit", "lots"], "--memory-limit"),
                                          (["--workers", "0"], "--workers"), (["--threads", "0"], "--threads")])
def test_bad_engine_options_fail_before_any_work(study, tmp_path, capsys, args, needle):
    out = tmp_path / "out"
    code = main(["batch", str(study["sheet"]), "-o", str(out), "--quiet", *args])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and needle in err[0] and not out.exists()


def test_refuses_a_foreign_non_empty_folder(study, tmp_path, capsys):
    out = tmp_path / "out"
    out.mkdir()
    (out / "precious.txt").write_text("keep me")
    code = main(["batch", str(study["sheet"]), "-o", str(out), "--quiet"])
    assert code == 2 and "--overwrite" in capsys.readouterr().err
    assert (out / "precious.txt").read_text() == "keep me" and len(list(out.iterdir())) == 1


# --------------------------------------------------------------------------- #
# Interruptions
# --------------------------------------------------------------------------- #


def _bed(path, seed):
    net = synthetic.capillary_bed(shape_um=(110, 110, 110), vessel_fraction=0.12, seed=seed)
    mask, _ = synthetic.rasterize(net, spacing=SPACING, shape=(110, 110, 110))
    np.save(path, mask)


@pytest.fixture(scope="module")
def beds(tmp_path_factory):
    d = tmp_path_factory.mktemp("beds")
    _bed(d / "bed0.npy", 0)
    for i in range(1, 6):
        (d / f"bed{i}.npy").write_bytes((d / "bed0.npy").read_bytes())
    return d


def _complete_or_absent(out, ids):
    for sid in ids:
        folder = out / sid
        if folder.exists():
            assert all((folder / f).is_file() for f in RESULT_FILES), sid
            load_result(folder)
    assert not list(out.glob(".*partial*")), "no half-written folder is left"


def test_ctrl_c_leaves_no_half_written_sample_and_resumes(beds, tmp_path):
    out = tmp_path / "out"
    cmd = [sys.executable, "-m", "pipeline", "batch", str(beds), "-o", str(out), "--workers", "1"]
    proc = subprocess.Popen(cmd, stderr=subprocess.PIPE, text=True, start_new_session=True)
    lines = []
    for line in proc.stderr:  # wait for the first finished sample, then press Ctrl-C
        lines.append(line)
        if " done in " in line:
            proc.send_signal(signal.SIGINT)
            break
    rest = proc.communicate(timeout=120)[1]
    assert proc.returncode == 130, "".join(lines) + rest
    assert "resume" in rest
    ids = [f"bed{i}" for i in range(6)]
    _complete_or_absent(out, ids)
    meta = json.loads((out / "batch.json").read_text())
    assert meta["state"] == "interrupted"
    assert not (out / "cohort_summary.csv").exists()
    finished = [sid for sid in ids if (out / sid).exists()]
    assert 1 <= len(finished) < 6
    assert main(["batch", str(beds), "-o", str(out), "--workers", "2", "--quiet"]) == 0
    meta = json.loads((out / "batch.json").read_text())
    assert meta["counts"]["skipped"] == len(finished) and meta["counts"]["done"] == 6 - len(finished)


def test_a_result_of_the_same_run_counts_as_done(tmp_path):
    # Dask runs a finished task again when the worker holding its record dies
    # before the record is collected; the second call finds the result the
    # first one wrote. It was analysed by this run: "done", not "skipped".
    # A later run finds the same result and skips it.
    path = tmp_path / "y.tif"
    write_ybranch(path, 4.0)
    sample = batch.find_samples(tmp_path)[0]
    out = tmp_path / "out" / sample.sample_id
    first = batch.process_sample(sample, str(out), None, batch_run="run-a")
    mtime = (out / "segments.csv").stat().st_mtime_ns
    again = batch.process_sample(sample, str(out), None, batch_run="run-a")
    later = batch.process_sample(sample, str(out), None, batch_run="run-b")
    assert (first["status"], again["status"], later["status"]) == ("done", "done", "skipped")
    assert (out / "segments.csv").stat().st_mtime_ns == mtime  # found complete, not redone
    assert json.loads((out / "run.json").read_text())["batch"]["run"] == "run-a"


def test_a_killed_worker_fails_its_sample_alone(beds, tmp_path):
    # A worker killed mid-sample (as the OS or Dask's nanny does when memory
    # runs out) fails that sample only; the restarted worker does the rest.
    import dask
    from distributed import Client, LocalCluster

    # Saturation 1: a worker holds only the sample it runs, so killing it
    # never hits a sample merely queued behind bed0.
    with dask.config.set({"distributed.scheduler.allowed-failures": 0,
                          "distributed.scheduler.worker-saturation": 1.0}):
        cluster = LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address=":0")
    out = tmp_path / "out"
    try:
        with Client(cluster, set_as_default=False) as client:
            samples = batch.find_samples(beds)
            result = {}
            t = threading.Thread(target=lambda: result.update(r=batch.run_batch(
                samples, out, scheduler=cluster.scheduler_address, quiet=True)))
            t.start()
            # bed0 stands for a sample that always outgrows its worker: kill
            # the worker whenever it runs bed0, until the batch ends.
            kills = 0
            while t.is_alive():
                busy = [w for w, keys in client.processing().items() if any("-bed0-" in k for k in keys)]
                if busy:
                    pids = client.run(os.getpid, workers=busy)
                    for pid in pids.values():
                        os.kill(pid, signal.SIGKILL)
                        kills += 1
                    time.sleep(0.5)
                time.sleep(0.02)
            t.join(timeout=300)
    finally:
        cluster.close()
    res = result["r"]
    assert kills >= 2  # the first attempt and the retry
    assert res.n_failed == 1
    row = res.failures.iloc[0]
    assert row["sample_id"] == "bed0"
    assert row["step"] == "worker" and "worker process died" in row["error"]
    done = res.status[res.status["status"] == "done"]["sample_id"]
    assert len(done) == 5
    _complete_or_absent(out, [s.sample_id for s in samples])


# --------------------------------------------------------------------------- #
# Reviews
# --------------------------------------------------------------------------- #


def test_batch_picks_up_reviews_and_keeps_them(tmp_path):
    from pipeline import review

    net = synthetic.binary_tree(depth=3, root_radius_um=5.0, exponent=3.0, seed=3, broken_fraction=0.5,
                                broken_ratio=0.95, min_radius_um=2.0)
    mask, _ = synthetic.rasterize(net, spacing=SPACING)
    np.save(tmp_path / "tree.npy", mask)
    sheet = tmp_path / "sheet.csv"
    sheet.write_text(f"sample_id,path,group\ntree,{tmp_path / 'tree.npy'},treated\n", encoding="utf-8")
    out = tmp_path / "out"
    run = ["batch", str(sheet), "-o", str(out), "--workers", "1", "--quiet"]
    assert main(run) == 0
    bifs = pd.read_csv(out / "tree" / "bifurcations.csv")
    flagged = bifs.loc[bifs["flagged"], "node_id"].tolist()
    assert len(flagged) >= 2
    before = pd.read_csv(out / "cohort_summary.csv").iloc[0]
    assert not before["reviewed"] and before["bifurcations_flagged"] == len(flagged)
    decisions = review.record_decision(review.empty_review(), flagged[0], decision="artefact", note="merged lumen")
    review.save_review(out / "tree", review.record_decision(decisions, flagged[1], decision="confirmed"))

    assert main(run) == 0  # skipped, but the tables now count the review
    after = pd.read_csv(out / "cohort_summary.csv").iloc[0]
    assert after["reviewed"] and after["bifurcations_flagged"] == len(flagged) - 1
    cb = pd.read_parquet(out / "cohort_bifurcations.parquet").set_index("node_id")
    assert cb.loc[flagged[0], "review_decision"] == "artefact" and cb.loc[flagged[0], "review_note"] == "merged lumen"
    assert cb.loc[flagged[1], "review_decision"] == "confirmed"

    saved = review.load_review(out / "tree")
    assert main(run + ["--force"]) == 0  # same input and settings: the review still applies
    pd.testing.assert_frame_equal(review.load_review(out / "tree"), saved)
    assert pd.read_csv(out / "cohort_summary.csv").iloc[0]["bifurcations_flagged"] == len(flagged) - 1
    cfg = tmp_path / "c.yaml"
    cfg.write_text("pruning:\n  spur_radius_factor: 2.0\n", encoding="utf-8")
    assert main(run + ["--config", str(cfg)]) == 0  # new settings: node ids may differ, set the review aside
    assert not (out / "tree" / "review.csv").exists()
    assert (out / "tree" / "review-superseded.csv").is_file()
    assert not pd.read_csv(out / "cohort_summary.csv").iloc[0]["reviewed"]


def test_progress_on_a_terminal_and_in_a_log():
    import io

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    recs = [{"sample_id": "a", "status": "done", "seconds": 2.0, "step": "", "error": ""},
            {"sample_id": "b", "status": "failed", "seconds": 0.1, "step": "reading", "error": "bad file"},
            {"sample_id": "c", "status": "skipped", "seconds": 0.0, "step": "", "error": ""}]
    term, log = Terminal(), io.StringIO()
    for stream in (term, log):
        p = batch._Progress(4, stream=stream)
        for r in recs:
            p.update(r)
        p.finish()
    t = term.getvalue()
    # One rewritten status line (carriage returns), failures on lines of their own.
    assert t.count("\r") == 3 and "\nvesselflow batch: b failed in reading: bad file\n" in t
    assert "2/4 done (1 skipped), 1 failed, 1 left, ETA" in t and t.endswith("\n")
    lines = log.getvalue().splitlines()
    assert "\r" not in log.getvalue() and len(lines) == 3
    assert lines[1].startswith("vesselflow batch: b failed in reading: bad file")


def test_shipped_demo_sheet_is_valid():
    # The example sheet in synthetic_volumes/ must keep matching its volumes.
    sheet = Path(__file__).resolve().parents[1] / "synthetic_volumes" / "tw-study.csv"
    samples = batch.read_sample_sheet(sheet)
    assert [(s.sample_id, s.group) for s in samples][:2] == [("tw-ctrl-01", "control"), ("tw-trt-01", "treated")]
    # Seven animals per group (synthetic_volumes/README.md): enough for an exact Mann-Whitney test to reach 0.05.
    assert [s.group for s in samples].count("control") == 7 and [s.group for s in samples].count("treated") == 7
    assert all(s.path.is_file() for s in samples)
