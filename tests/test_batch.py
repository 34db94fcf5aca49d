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
    # check the table against numpy computed directly on the per-sample values.
    comp = pd.read_csv(out / "group_comparison.csv", keep_default_na=False, na_values=[""])
    r = comp.set_index("measure").loc["radius_median_um"]
    a = cs.loc[cs["group"] == "control", "radius_median_um"].to_numpy()
    b = cs.loc[cs["group"] == "treated", "radius_median_um"].to_numpy()
    assert (r["group_a"], r["group_b"], r["n_a"], r["n_b"]) == ("control", "treated", 3, 2)
    assert (r["label"], r["unit"]) == ("median segment radius", "µm")
    assert r["mean_a"] == pytest.approx(a.mean()) and r["sd_b"] == pytest.approx(b.std(ddof=1))
    assert r["difference"] == pytest.approx(b.mean() - a.mean()) and r["difference"] > 0
    # Two treated samples: no test, and the table says why.
    assert np.isnan(r["p_value"]) and np.isnan(r["q_value"]) and np.isnan(r["hodges_lehmann_shift"])
    assert r["test_note"] == "fewer than 3 samples in group 'treated'"
    # Only science measures are compared; the bookkeeping is described apart.
    science = {m.name for m in batch.SCIENCE_MEASURES}
    assert set(comp["measure"]) <= science and "length_density_mm_per_mm3" in set(comp["measure"])
    book = pd.read_csv(out / "group_bookkeeping.csv")
    assert list(book.columns) == ["measure", "group", "n", "mean", "sd", "median"]
    for key in ("segments", "junctions", "imaged_volume_mm3", "max_conservation_residual", "junctions_skipped"):
        assert key not in set(comp["measure"]) and key in set(book["measure"]), key
    assert not set(book["measure"]) & science
    # The study tables derive segment density from the count and the imaged volume.
    assert cs["segment_density_per_mm3"].to_numpy() == pytest.approx(
        cs["segments"].to_numpy(float) / cs["imaged_volume_mm3"].to_numpy(float), rel=1e-12)


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
    for name in ("cohort_summary.csv", "group_comparison.csv", "group_bookkeeping.csv"):
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
        "length_density_mm_per_mm3": np.r_[rng.normal(10, 1, n_a), rng.normal(13, 1, n_b)],
        "radius_median_um": np.r_[rng.normal(4, 0.3, n_a), rng.normal(4.1, 0.3, n_b)],
        "junction_density_per_mm3": np.r_[rng.integers(10, 20, n_a), rng.integers(15, 30, n_b)],
        "junctions": np.r_[rng.integers(10, 20, n_a), rng.integers(15, 30, n_b)],  # bookkeeping
        "reviewed": [False] * (n_a + n_b),
    })
    df.loc[2, "radius_median_um"] = np.nan  # a missing value is left out of its measure
    return df


def test_group_comparison_matches_scipy(constructed):
    comp = batch.group_comparison(constructed).set_index("measure")
    # science measures in table order; counts, booleans and ids are not compared
    assert list(comp.index) == ["length_density_mm_per_mm3", "junction_density_per_mm3", "radius_median_um"]
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
    comp = batch.group_comparison(df, measures=["x"])
    # Exact two-sided Mann-Whitney for complete separation of 3 vs 3:
    # 2 / C(6, 3) = 0.1 (Mann & Whitney 1947, Ann Math Stat 18:50).
    assert comp.loc[0, "p_value"] == pytest.approx(0.1)


def test_three_groups_give_every_pair_and_one_group_no_test():
    df = pd.DataFrame({"group": list("aaabbbccc"), "radius_median_um": [1.0, 2, 3, 4, 5, 6, 7, 8, 9]})
    comp = batch.group_comparison(df)
    assert list(zip(comp["group_a"], comp["group_b"])) == [("a", "b"), ("a", "c"), ("b", "c")]
    assert np.isfinite(comp["p_value"]).all()
    one = batch.group_comparison(df.assign(group="all"))
    assert len(one) == 1 and one.loc[0, "n_a"] == 9 and np.isnan(one.loc[0, "p_value"])
    assert one.loc[0, "test_note"] == "one group: nothing to compare"


# --------------------------------------------------------------------------- #
# Effect sizes, skipped tests, science against bookkeeping
# --------------------------------------------------------------------------- #


def _no_ties(rng, n):
    # continuous draws: ties have probability zero, so scipy's exact method applies
    return rng.normal(0.0, 1.0, n)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
@pytest.mark.parametrize("n_a, n_b", [(3, 5), (4, 4), (5, 5), (6, 9), (8, 3)])
def test_hodges_lehmann_shift_and_interval_invert_the_exact_test(seed, n_a, n_b):
    rng = np.random.default_rng(seed)
    a, b = _no_ties(rng, n_a), _no_ties(rng, n_b) + 0.7
    shift, lo, hi, cov = batch.hodges_lehmann(a, b)
    # Hodges & Lehmann 1963 (Ann Math Stat 34:598): the median of all pairwise
    # differences b_j - a_i, here by brute force.
    assert shift == np.median([y - x for x in a for y in b])
    # Bauer 1972 (J Am Stat Assoc 67:687): the interval is the set of shifts d
    # for which the exact two-sided Mann-Whitney test of b - d against a does
    # not reject at 5 %. Checked with scipy just inside and just outside each
    # end; the pairwise differences are continuous draws at least ~1e-4
    # apart, so 1e-9 steps cross no other one.
    def p(d):
        return stats.mannwhitneyu(b - d, a, alternative="two-sided", method="exact").pvalue

    eps = 1e-9
    assert p(lo + eps) > 0.05 and p(hi - eps) > 0.05
    assert p(lo - eps) <= 0.05 and p(hi + eps) <= 0.05
    # The exact coverage is one minus the p-value just outside the interval.
    assert cov == pytest.approx(1.0 - p(lo - eps), rel=1e-12)
    assert cov >= 0.95
    # and on a grid: inside exactly where not rejected (grid points on a
    # pairwise difference itself are left out: there the test sees a tie)
    d_all = (b[None, :] - a[:, None]).ravel()
    grid = np.linspace(d_all.min() - 1, d_all.max() + 1, 121)
    grid = grid[np.min(np.abs(grid[:, None] - d_all[None, :]), axis=1) > 1e-9]
    inside = (grid >= lo) & (grid <= hi)
    assert np.array_equal(inside, np.array([p(d) > 0.05 for d in grid]))


@pytest.mark.parametrize("n_a, n_b", [(3, 3), (3, 4), (2, 9)])
def test_no_hodges_lehmann_interval_where_no_shift_is_rejected(n_a, n_b):
    # With 3 against 3 the smallest exact two-sided p-value is 2 / C(6, 3) = 0.1
    # (Mann & Whitney 1947, Ann Math Stat 18:50); 3 against 4: 2/35 = 0.057;
    # 2 against 9: 2/55 = 0.036 but the interval rule needs P(U <= u) <= 0.025
    # on one side: 1/55 = 0.018, so an interval exists there.
    rng = np.random.default_rng(5)
    a, b = _no_ties(rng, n_a), _no_ties(rng, n_b)
    shift, lo, hi, cov = batch.hodges_lehmann(a, b)
    far = 100.0  # complete separation: the smallest p-value the sizes allow
    pmin = stats.mannwhitneyu(b - far, a, alternative="two-sided", method="exact").pvalue
    if pmin > 0.05:
        assert np.isnan(lo) and np.isnan(hi) and np.isnan(cov) and np.isfinite(shift)
    else:
        assert lo <= shift <= hi and cov == pytest.approx(1 - pmin)


def test_hodges_lehmann_large_groups_use_the_normal_rank():
    # 120 x 100 pairs: beyond the exact table; the rank comes from the normal
    # approximation of U, so the interval must agree with the asymptotic
    # test inversion (scipy, method='asymptotic') to within a few order
    # statistics (continuity correction and rounding of the rank).
    rng = np.random.default_rng(11)
    a, b = rng.normal(0, 1, 120), rng.normal(0.5, 1, 100)
    shift, lo, hi, cov = batch.hodges_lehmann(a, b)
    d = np.sort((b[None, :] - a[:, None]).ravel())
    pv = np.array([stats.mannwhitneyu(b - x, a, method="asymptotic").pvalue for x in d[::20]])
    kept = d[::20][pv > 0.05]
    k_lo, k_hi = np.searchsorted(d, [lo, hi])
    assert abs(k_lo - np.searchsorted(d, kept.min())) <= 40 and abs(k_hi - np.searchsorted(d, kept.max())) <= 40
    assert cov == 0.95 and lo < shift < hi


@pytest.mark.parametrize("seed", [0, 1, 2])
@pytest.mark.parametrize("n", [6, 8, 12])
def test_one_sample_hodges_lehmann_inverts_the_signed_rank_test(seed, n):
    rng = np.random.default_rng(seed)
    x = rng.normal(2.8, 0.2, n)
    est, lo, hi, cov = batch.hodges_lehmann_one_sample(x)
    # Hodges & Lehmann 1963: the median of the Walsh averages, by brute force
    assert est == pytest.approx(np.median([(x[i] + x[j]) / 2 for i in range(n) for j in range(i, n)]), abs=1e-15)

    def p(m):  # Wilcoxon 1945 signed-rank test, exact (scipy)
        return stats.wilcoxon(x - m, method="exact").pvalue

    eps = 1e-9
    assert p(lo + eps) > 0.05 and p(hi - eps) > 0.05 and p(lo - eps) <= 0.05 and p(hi + eps) <= 0.05
    assert cov == pytest.approx(1 - p(lo - eps), rel=1e-12)


def test_one_sample_hodges_lehmann_of_five_states_its_coverage():
    # No signed-rank interval reaches 95 % with 5 values: the widest, [min, max],
    # covers 1 - 2 / 2^5 = 0.9375 (P(W+ = 0) = 2^-n; Wilcoxon 1945).
    x = np.array([2.9, 2.5, 3.1, 2.7, 3.0])
    est, lo, hi, cov = batch.hodges_lehmann_one_sample(x)
    assert (lo, hi) == (2.5, 3.1) and cov == pytest.approx(0.9375, abs=1e-15)


def test_cliffs_delta_worked_example_and_relation_to_u():
    # By hand (Cliff 1993, Psychol Bull 114:494: delta = P(b > a) - P(b < a)):
    # a = 1, 2, 3; b = 2, 4, 5. Of the 9 pairs b - a: 2-1 > 0, 2-2 = 0, 2-3 < 0,
    # and 4 and 5 exceed all three a: 7 greater, 1 tie, 1 smaller.
    # delta = (7 - 1) / 9 = 2/3.
    assert batch.cliffs_delta([1, 2, 3], [2, 4, 5]) == pytest.approx(2 / 3, abs=1e-15)


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4])
def test_cliffs_delta_is_a_rescaled_mann_whitney_u(seed):
    # delta = 2 U_b / (n_a n_b) - 1 with U_b scipy's statistic of b (ties count
    # one half); integer draws so that ties occur.
    rng = np.random.default_rng(seed)
    a, b = rng.integers(0, 6, 7).astype(float), rng.integers(1, 7, 5).astype(float)
    u_b = stats.mannwhitneyu(b, a).statistic
    assert batch.cliffs_delta(a, b) == pytest.approx(2 * u_b / (a.size * b.size) - 1, abs=1e-12)


@pytest.mark.parametrize("n_b", [1, 2])
def test_a_group_of_one_or_two_gets_no_test_and_the_reason(n_b):
    df = pd.DataFrame({"group": ["ctrl"] * 4 + ["small"] * n_b,
                       "radius_median_um": np.arange(4 + n_b, dtype=float),
                       "murray_exponent_network": np.linspace(2.5, 3.0, 4 + n_b)})
    comp = batch.group_comparison(df)
    assert (comp["n_a"] == 4).all() and (comp["n_b"] == n_b).all()  # n per group is stated
    assert comp["p_value"].isna().all() and comp["q_value"].isna().all() and comp["cliffs_delta"].isna().all()
    assert (comp["test_note"] == "fewer than 3 samples in group 'small'").all()


def test_q_values_over_the_tested_measures_of_a_pair_only():
    rng = np.random.default_rng(3)
    df = pd.DataFrame({"group": ["a"] * 5 + ["b"] * 5,
                       "radius_median_um": rng.normal(4, 1, 10), "radius_mean_um": rng.normal(4, 1, 10),
                       "vessel_volume_fraction": rng.uniform(0.01, 0.1, 10),
                       "murray_exponent_network": np.r_[2.6, 2.7, np.nan, np.nan, np.nan, 2.9, 3.0, 2.8, 3.1, 2.9]})
    comp = batch.group_comparison(df).set_index("measure")
    tested = comp["p_value"].notna()
    assert not tested["murray_exponent_network"] and tested.sum() == 3
    # Benjamini & Hochberg 1995 over the three tested p-values alone
    assert comp.loc[tested, "q_value"].to_numpy() == pytest.approx(_bh(comp.loc[tested, "p_value"]), rel=1e-12)


def test_exact_test_for_small_samples_without_ties():
    # 5 against 5 fully separated: exact two-sided p = 2 / C(10, 5) = 2/252
    # = 0.0079 (Mann & Whitney 1947), the smallest the sizes allow; the normal
    # approximation would give 0.012 (continuity-corrected, from scipy).
    df = pd.DataFrame({"group": ["lo"] * 5 + ["hi"] * 5,
                       "murray_exponent_network": [2.41, 2.55, 2.47, 2.62, 2.50, 3.05, 2.93, 2.98, 3.11, 2.88]})
    row = batch.group_comparison(df).iloc[0]
    assert row["p_value"] == pytest.approx(2 / 252, rel=1e-12) and row["test_method"] == "exact"
    assert row["hodges_lehmann_shift"] > 0 and row["cliffs_delta"] == 1.0 and row["hodges_lehmann_ci_low"] > 0
    # with a tie scipy's 'auto' takes the normal approximation with tie correction
    tied = df.assign(murray_exponent_network=df["murray_exponent_network"].replace(2.62, 2.55))
    row = batch.group_comparison(tied).iloc[0]
    assert row["test_method"] == "asymptotic"
    assert row["p_value"] == pytest.approx(stats.mannwhitneyu(tied.iloc[:5, 1], tied.iloc[5:, 1],
                                                              method="asymptotic").pvalue, rel=1e-12)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_clear_shift_five_against_five_is_significant(seed):
    # Two groups of five network exponents around 2.5 and 3.0 with sd 0.1:
    # separated completely, so p = 2/252 < 0.05 (exact Mann-Whitney, see above).
    rng = np.random.default_rng(seed)
    x = np.r_[rng.normal(2.5, 0.1, 5), rng.normal(3.0, 0.1, 5)]
    df = pd.DataFrame({"sample_id": [f"s{i}" for i in range(10)], "group": ["x25"] * 5 + ["x30"] * 5,
                       "murray_exponent_network": x})
    row = batch.group_comparison(df).set_index("measure").loc["murray_exponent_network"]
    assert row["p_value"] < 0.05 and row["q_value"] < 0.05
    assert row["hodges_lehmann_ci_low"] <= 0.5 <= row["hodges_lehmann_ci_high"] and row["hodges_lehmann_shift"] > 0


def _summary_rows():
    # Two samples of the same tissue, the second imaged in a volume twice as
    # large: twice the counts, the same densities.
    base = {"segments": 120, "junctions": 50, "blind_ends": 8, "border_ends": 30, "nodes": 200,
            "imaged_volume_mm3": 0.004, "junction_density_per_mm3": 50 / 0.004, "n_inlets": 3,
            "max_conservation_residual": 1e-12, "junctions_skipped": 1, "radius_median_um": 4.0}
    double = {k: (2 * v if k in ("segments", "junctions", "blind_ends", "nodes", "imaged_volume_mm3") else v)
              for k, v in base.items()}
    return pd.DataFrame([{"sample_id": "small", "group": "g", **base}, {"sample_id": "large", "group": "g", **double}])


def test_densities_are_per_mm3():
    out = batch.add_densities(_summary_rows())
    # by hand: 120 segments / 0.004 mm³ = 30,000 per mm³; 8 blind ends -> 2,000
    assert out["segment_density_per_mm3"].to_numpy() == pytest.approx([30_000, 30_000], rel=1e-12)
    assert out["blind_end_density_per_mm3"].to_numpy() == pytest.approx([2_000, 2_000], rel=1e-12)
    planar = pd.DataFrame({"segments": [10], "blind_ends": [0], "imaged_area_mm2": [0.25]})
    assert batch.add_densities(planar)["segment_density_per_mm2"].iloc[0] == pytest.approx(40.0, rel=1e-12)


def test_bookkeeping_is_described_apart_and_never_tested():
    df = pd.concat([_summary_rows(), _summary_rows().assign(group="h")], ignore_index=True)
    df["sample_id"] = [f"s{i}" for i in range(4)]
    comp = batch.group_comparison(df)
    book = batch.group_bookkeeping(df)
    bookkeeping = ("segments", "junctions", "blind_ends", "border_ends", "nodes", "imaged_volume_mm3", "n_inlets",
                   "max_conservation_residual", "junctions_skipped")
    assert not set(bookkeeping) & set(comp["measure"])
    assert set(comp["measure"]) == {"segment_density_per_mm3", "blind_end_density_per_mm3",
                                    "junction_density_per_mm3", "radius_median_um"}
    assert set(book["measure"]) == set(bookkeeping) and set(book["group"]) == {"g", "h"}
    seg = book[(book["measure"] == "segments") & (book["group"] == "g")].iloc[0]
    assert (seg["n"], seg["mean"], seg["median"]) == (2, 180.0, 180.0)
    assert seg["sd"] == pytest.approx(np.std([120, 240], ddof=1), rel=1e-12)
    # A result without the newer keys (older version) compares what it has.
    assert "vessel_tortuosity_median" not in set(comp["measure"])


def test_older_results_compare_segment_tortuosity_in_place_of_vessel_tortuosity():
    rng = np.random.default_rng(4)
    old = pd.DataFrame({"group": ["a"] * 3 + ["b"] * 3, "tortuosity_mean": rng.uniform(1.0, 1.2, 6),
                        "radius_median_um": rng.normal(4, 0.5, 6)})
    comp = batch.group_comparison(old).set_index("measure")
    assert comp.loc["tortuosity_mean", "label"] == "mean segment tortuosity"
    assert "tortuosity_mean" not in set(batch.group_bookkeeping(old)["measure"])
    # with the vessel measure present the segment mean is bookkeeping
    new = old.assign(vessel_tortuosity_median=rng.uniform(1.0, 1.2, 6))
    assert list(batch.group_comparison(new)["measure"]) == ["radius_median_um", "vessel_tortuosity_median"]
    assert "tortuosity_mean" in set(batch.group_bookkeeping(new)["measure"])


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


@pytest.mark.integration  # worker processes killed mid-sample
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
                samples, out, scheduler=cluster.scheduler_address)))
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

    from pipeline.cli import _BatchProgress

    class Terminal(io.StringIO):
        def isatty(self):
            return True

    recs = [{"sample_id": "a", "status": "done", "seconds": 2.0, "step": "", "error": ""},
            {"sample_id": "b", "status": "failed", "seconds": 0.1, "step": "reading", "error": "bad file"},
            {"sample_id": "c", "status": "skipped", "seconds": 0.0, "step": "", "error": ""}]
    term, log = Terminal(), io.StringIO()
    for stream in (term, log):
        p = _BatchProgress(4, stream=stream)
        for r in recs:
            p("sample", r)
        p("finish")
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


def test_failure_steps_are_the_steps_the_analysis_reports(tmp_path):
    # Progress reports the steps of pipeline.result.STEPS, in order, and a
    # failure is charged to one of them (tests/test_analysis.py).
    from pipeline.analysis import analyze_file

    mask, _ = synthetic.rasterize(synthetic.straight_tube(length_um=40, radius_um=3), spacing=(1, 1, 1))
    path = tmp_path / "t.npy"
    np.save(path, mask)
    seen = []
    analyze_file(path, tmp_path / "out", spacing=(1, 1, 1), progress=lambda step, s: seen.append(step))
    assert tuple(seen) == batch.STEPS


@pytest.mark.parametrize("where, step", [("solve_flow", "flow"), ("analyze_bifurcations", "bifurcations"),
                                         ("build_vessels", "vessels")])
def test_a_failed_sample_is_charged_to_the_step_that_failed(tmp_path, monkeypatch, where, step):
    from pipeline import analysis
    from pipeline.errors import SolverError

    module = {"solve_flow": analysis.flow_step, "analyze_bifurcations": analysis.bif_step,
              "build_vessels": analysis.vessels_step}[where]

    def fail(*a, **k):
        raise SolverError("did not converge")

    monkeypatch.setattr(module, where, fail)
    mask, _ = synthetic.rasterize(synthetic.y_branch(parent_radius_um=4, parent_length_um=30,
                                                     daughter_length_um=30), spacing=(1, 1, 1))
    (tmp_path / "in").mkdir()
    np.save(tmp_path / "in" / "y.npy", mask)
    samples = batch.collect_samples(tmp_path / "in")
    rec = batch.process_sample(samples[0], tmp_path / "out" / "y", config=None)
    assert rec["status"] == "failed" and rec["step"] == step and "did not converge" in rec["error"]


def test_the_library_prints_nothing_and_reports_through_the_callback(beds, tmp_path, capsys):
    # run_batch tells its progress to the caller (the command line draws it),
    # as analyze reports its steps: nothing on stdout or stderr of its own.
    samples = batch.collect_samples(beds)[:2]
    events = []
    res = batch.run_batch(samples, tmp_path / "out", workers=1,
                          progress=lambda kind, value: events.append((kind, value)))
    out = capsys.readouterr()
    assert "vesselflow batch" not in out.out + out.err
    finished = [v for k, v in events if k == "sample"]
    assert sorted(r["sample_id"] for r in finished) == sorted(s.sample_id for s in samples)
    assert all(r["status"] == "done" for r in finished) and res.n_failed == 0
    assert any(k == "info" for k, _ in events)
