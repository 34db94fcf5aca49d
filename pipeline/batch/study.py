"""The study tables: the cohort from the result folders, the science measures and the group comparison.

In: the finished sample folders (``summary.json``, tables). Out: ``cohort_summary.csv``, the cohort's
segments and bifurcations, :data:`SCIENCE_MEASURES` (densities per mm³ of tissue, the network
exponent, radius, tortuosity, flow and shear by diameter class) compared between groups
(Mann-Whitney with Benjamini-Hochberg, Hodges-Lehmann shift, Cliff's delta), bookkeeping apart.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError
from .stats import cliffs_delta, hodges_lehmann


# --------------------------------------------------------------------------- #
# Study tables
# --------------------------------------------------------------------------- #


def _flatten_summary(summary):
    row = {}
    for k, v in summary.items():
        if isinstance(v, dict):
            for kk, vv in v.items():
                if isinstance(vv, (int, float, bool)) or vv is None:
                    row[f"{'flag_count' if k == 'flag_counts' else k}_{kk}"] = vv
        elif isinstance(v, (int, float, bool)) or v is None:
            row[k] = v
    return row


def cohort_tables(outdir, samples):
    """Study tables from the samples' result folders.

    Parameters
    ----------
    outdir : str or Path
        Batch folder holding ``<sample_id>/`` result folders.
    samples : list of Sample
        Those to include (the analysed ones), in order.

    Returns
    -------
    dict
        ``summary`` (with the densities of :func:`add_densities`),
        ``segments``, ``bifurcations``, ``comparison``
        (:func:`group_comparison`) and ``bookkeeping``
        (:func:`group_bookkeeping`) DataFrames, and ``warnings`` (sample
        id -> message). A sample with a
        ``review.csv`` contributes its reviewed summary (bifurcations marked
        ``artefact`` left out) and its decisions as
        ``review_decision``/``review_note`` columns. A review that cannot be
        used (malformed, or naming nodes that are not junctions) is that
        sample's warning, not the study's failure: the sample enters
        unreviewed, with the problem in ``review_problem``. A result that
        cannot be read back is left out with a warning.
    """
    from ..review import apply_review
    from ..tables import load_result

    rows, segs, bifs, warnings = [], [], [], {}
    for s in samples:
        try:
            res = load_result(Path(outdir) / s.sample_id)
        except InputError as exc:
            warnings[s.sample_id] = f"left out of the study tables: {exc}"
            continue
        summary, bif = res.summary, res.bifurcations
        reviewed, problem = False, ""
        if (res.path / "review.csv").exists():
            try:
                summary, bif = apply_review(res)
                reviewed = True
            except InputError as exc:
                problem = " ".join(str(exc).split())
                warnings[s.sample_id] = f"review not applied: {problem}"
                summary, bif = res.summary, res.bifurcations
        rows.append({"sample_id": s.sample_id, "group": s.group, "reviewed": reviewed, "review_problem": problem,
                     **_flatten_summary(summary)})
        for table, into in ((res.segments, segs), (bif, bifs)):
            t = table.copy()
            t.insert(0, "group", s.group)
            t.insert(0, "sample_id", s.sample_id)
            into.append(t)
    summary = pd.DataFrame(rows)
    if summary.empty:
        summary = pd.DataFrame(columns=["sample_id", "group", "reviewed", "review_problem"])
    summary = add_densities(summary)
    segments = pd.concat(segs, ignore_index=True) if segs else pd.DataFrame(columns=["sample_id", "group"])
    bifurcations = (pd.concat([b for b in bifs if len(b.columns)], ignore_index=True)
                    if any(len(b.columns) for b in bifs) else pd.DataFrame(columns=["sample_id", "group"]))
    return {"summary": summary, "segments": _parquet_safe(segments), "bifurcations": _parquet_safe(bifurcations),
            "comparison": group_comparison(summary), "bookkeeping": group_bookkeeping(summary),
            "warnings": warnings}


def _parquet_safe(df):
    # Columns mixing strings and missing values (reason lists, notes) must be
    # one type for Parquet.
    for c in df.columns:
        if df[c].dtype == object:
            df[c] = df[c].map(lambda v: None if v is None or (isinstance(v, float) and math.isnan(v)) else str(v))
    return df


# --------------------------------------------------------------------------- #
# Group comparison: science measures, effect sizes, bookkeeping
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class StudyMeasure:
    """A sample-level science measure compared between groups."""

    name: str  # summary key (cohort_summary.csv column)
    unit: str
    label: str  # plain name for titles and tables
    description: str


def _class_measures():
    # Flow by diameter class: the class bounds are flow.capillary_max_diameter_um
    # and flow.small_vessel_max_diameter_um (8 and 30 µm by default).
    from ..flow import DIAMETER_CLASSES

    where = {"capillary": "capillaries (diameter below flow.capillary_max_diameter_um)",
             "small": "small vessels (up to flow.small_vessel_max_diameter_um)",
             "large": "large vessels (above flow.small_vessel_max_diameter_um)"}
    out = []
    for c in DIAMETER_CLASSES:
        out.append(StudyMeasure(f"velocity_median_mm_s_{c}", "mm/s", f"median blood speed, {c}",
                                f"median mean speed of the perfused {where.get(c, c)}, model estimate"))
        out.append(StudyMeasure(f"wss_median_pa_{c}", "Pa", f"median wall shear stress, {c}",
                                f"median wall shear stress of the perfused {where.get(c, c)}, model estimate"))
    return tuple(out)


#: The sample-level science measures of a study, in table order. Sizes enter
#: as densities per mm³ of imaged tissue (the whole imaged volume: no tissue
#: mask is segmented), never as raw counts, because samples differ in the
#: volume imaged; planar samples have the per-mm² analogues. Measures a
#: result does not hold (older versions, flow not solved) are left out of the
#: comparison, or compared through their older stand-in
#: (:data:`FALLBACK_MEASURES`). Every other numeric summary column is bookkeeping
#: (:func:`group_bookkeeping`), described but never tested.
SCIENCE_MEASURES = (
    StudyMeasure("length_density_mm_per_mm3", "mm/mm³", "vessel length density",
                 "total centreline length per imaged volume"),
    StudyMeasure("vessel_volume_fraction", "1", "vessel volume fraction",
                 "vessel voxels per imaged voxel"),
    StudyMeasure("junction_density_per_mm3", "1/mm³", "junction density",
                 "junctions (nodes of degree three or more) per imaged volume"),
    StudyMeasure("segment_density_per_mm3", "1/mm³", "segment density",
                 "segments per imaged volume (computed in the study tables from segments / imaged_volume_mm3)"),
    StudyMeasure("blind_end_density_per_mm3", "1/mm³", "blind-end density",
                 "blind ends inside the volume per imaged volume (computed in the study tables from "
                 "blind_ends / imaged_volume_mm3); ends cut by the border are left out"),
    StudyMeasure("length_density_mm_per_mm2", "mm/mm²", "vessel length density (planar)",
                 "total centreline length per imaged area"),
    StudyMeasure("vessel_area_fraction", "1", "vessel area fraction (planar)", "vessel pixels per imaged pixel"),
    StudyMeasure("junction_density_per_mm2", "1/mm²", "junction density (planar)", "junctions per imaged area"),
    StudyMeasure("segment_density_per_mm2", "1/mm²", "segment density (planar)",
                 "segments per imaged area (computed in the study tables from segments / imaged_area_mm2)"),
    StudyMeasure("blind_end_density_per_mm2", "1/mm²", "blind-end density (planar)",
                 "blind ends per imaged area (computed in the study tables from blind_ends / imaged_area_mm2)"),
    StudyMeasure("murray_exponent_network", "1", "network Murray exponent",
                 "one exponent x fitted to all usable bifurcations of a sample, r0^x = r1^x + r2^x (pipeline.murray)"),
    StudyMeasure("murray_ratio_median", "1", "median Murray ratio",
                 "median over junctions of (r1³ + r2³) / r0³"),
    StudyMeasure("horton_ratio_number", "1", "Horton number ratio",
                 "ratio of element numbers between consecutive diameter-defined orders (Kassab et al. 1993)"),
    StudyMeasure("horton_ratio_diameter", "1", "Horton diameter ratio",
                 "ratio of mean element diameters between consecutive orders"),
    StudyMeasure("horton_ratio_length", "1", "Horton length ratio",
                 "ratio of mean element lengths between consecutive orders"),
    StudyMeasure("radius_median_um", "µm", "median segment radius", "median of the segment radii"),
    StudyMeasure("radius_mean_um", "µm", "mean segment radius", "mean of the segment radii"),
    StudyMeasure("vessel_tortuosity_median", "1", "median vessel tortuosity",
                 "median distance metric (length / chord) along vessels continued through junctions"),
    StudyMeasure("vessel_soam_median_rad_per_um", "rad/µm", "median vessel sum of angles",
                 "median sum-of-angles metric along vessels (Bullitt et al. 2003)"),
) + _class_measures() + (
    StudyMeasure("perfused_length_fraction", "1", "perfused length fraction",
                 "share of the vessel length carrying flow in the model"),
    StudyMeasure("tissue_distance_median_um", "µm", "median tissue-to-vessel distance",
                 "median distance from a tissue voxel to the nearest vessel voxel"),
    StudyMeasure("tissue_distance_p95_um", "µm", "95th percentile tissue-to-vessel distance",
                 "95th percentile of the distance from a tissue voxel to the nearest vessel voxel"),
)
#: Stand-ins for results made before a measure existed, compared in its place
#: only when no sample has the newer one: measure name -> older measure.
FALLBACK_MEASURES = {
    "vessel_tortuosity_median": StudyMeasure(
        "tortuosity_mean", "1", "mean segment tortuosity",
        "mean distance metric (length / chord) of single segments; results without vessel tortuosity"),
    "vessel_soam_median_rad_per_um": StudyMeasure(
        "soam_mean_rad_per_um", "rad/µm", "mean segment sum of angles",
        "mean sum-of-angles metric of single segments; results without vessel tortuosity"),
}
_SCIENCE = {m.name: m for m in SCIENCE_MEASURES + tuple(FALLBACK_MEASURES.values())}
# Columns of the cohort summary that describe a row, not a sample's measure.
_ID_COLUMNS = ("sample_id", "group", "reviewed", "review_problem")
# Densities the study tables derive from a count and the imaged volume or area.
_DERIVED_DENSITIES = (("segment_density", "segments"), ("blind_end_density", "blind_ends"))
#: Fewest samples with a value per group for a test.
MIN_TEST_SAMPLES = 3


def add_densities(summary):
    """The cohort summary with the densities the study tables derive.

    Parameters
    ----------
    summary : DataFrame
        One row per sample with the summary counts ``segments`` and
        ``blind_ends`` and ``imaged_volume_mm3`` (or, planar,
        ``imaged_area_mm2``).

    Returns
    -------
    DataFrame
        A copy with ``segment_density_per_mm3`` and
        ``blind_end_density_per_mm3`` (count / imaged volume, 1/mm³; planar
        rows the ``_per_mm2`` columns instead), added where the summary does
        not hold them already. A row without the count or the volume gets NaN.

    Examples
    --------
    >>> import pandas as pd
    >>> df = pd.DataFrame({"segments": [10, 20], "blind_ends": [1, 2], "imaged_volume_mm3": [0.5, 1.0]})
    >>> add_densities(df)["segment_density_per_mm3"].tolist()
    [20.0, 20.0]
    """
    out = summary.copy()
    for region, per in (("imaged_volume_mm3", "per_mm3"), ("imaged_area_mm2", "per_mm2")):
        if region not in out.columns:
            continue
        size = pd.to_numeric(out[region], errors="coerce").to_numpy(float)
        size = np.where(size > 0, size, np.nan)
        if not np.isfinite(size).any():
            continue
        for stem, count in _DERIVED_DENSITIES:
            name = f"{stem}_{per}"
            if name in out.columns or count not in out.columns:
                continue
            out[name] = pd.to_numeric(out[count], errors="coerce").to_numpy(float) / size
    return out


COMPARISON_COLUMNS = ("measure", "label", "unit", "group_a", "group_b", "n_a", "n_b", "mean_a", "sd_a", "median_a",
                      "mean_b", "sd_b", "median_b", "difference", "hodges_lehmann_shift", "hodges_lehmann_ci_low",
                      "hodges_lehmann_ci_high", "hodges_lehmann_coverage", "cliffs_delta", "mann_whitney_u",
                      "test_method", "p_value", "q_value", "test_note")
BOOKKEEPING_COLUMNS = ("measure", "group", "n", "mean", "sd", "median")


def _finite(values):
    return values[np.isfinite(values)]


def _describe(v):
    if v.size == 0:
        return np.nan, np.nan, np.nan
    return float(np.mean(v)), float(np.std(v, ddof=1)) if v.size > 1 else np.nan, float(np.median(v))


def science_measures(summary):
    """Names of the science measures the cohort summary holds a value of, in table order.

    A measure of :data:`FALLBACK_MEASURES` that no sample has (results of an
    older version) is replaced by its older stand-in where that has values.
    """
    def has(name):
        return name in summary.columns and np.isfinite(pd.to_numeric(summary[name], errors="coerce")
                                                       .to_numpy(float)).any()

    out = []
    for m in SCIENCE_MEASURES:
        if has(m.name):
            out.append(m.name)
        elif m.name in FALLBACK_MEASURES and has(FALLBACK_MEASURES[m.name].name):
            out.append(FALLBACK_MEASURES[m.name].name)
    return out


def bookkeeping_measures(summary):
    """Every other numeric summary column (counts, residuals, sizes, settings): described, never tested."""
    science = {m.name for m in SCIENCE_MEASURES} | set(science_measures(summary))
    return [c for c in summary.columns if c not in science and c not in _ID_COLUMNS
            and pd.api.types.is_numeric_dtype(summary[c]) and not pd.api.types.is_bool_dtype(summary[c])]


def group_comparison(summary, *, group="group", measures=None, confidence=0.95,
                     min_samples=MIN_TEST_SAMPLES):
    """Science measures compared between every pair of groups.

    Parameters
    ----------
    summary : DataFrame
        One row per sample (``cohort_summary.csv``) with a ``group`` column;
        the derived densities are added (:func:`add_densities`).
    group : str, keyword-only
        Name of the group column.
    measures : list of str, optional, keyword-only
        Default: the :data:`SCIENCE_MEASURES` that some sample has a value
        of. Bookkeeping columns are never compared (:func:`group_bookkeeping`).
    confidence : float, keyword-only
        Nominal confidence of the Hodges-Lehmann interval.
    min_samples : int, keyword-only
        Fewest samples with a value in each group for a test.

    Returns
    -------
    DataFrame
        One row per measure and pair of groups (groups in order of first
        appearance; with one group, one row per measure with empty ``b``
        columns), columns :data:`COMPARISON_COLUMNS`: the measure's
        ``label`` and ``unit``; ``n_a``, ``n_b`` (samples with a value),
        mean, sd (n - 1) and median per group; ``difference`` (mean b -
        mean a); the Hodges-Lehmann shift of b against a with its
        distribution-free interval and exact coverage
        (:func:`hodges_lehmann`); ``cliffs_delta`` of b against a
        (:func:`cliffs_delta`); ``mann_whitney_u`` (the statistic of group
        a), ``test_method`` and ``p_value`` of the two-sided Mann-Whitney U
        test (:func:`scipy.stats.mannwhitneyu`, ``method='auto'``: exact
        when a group has at most 8 values and there are no ties, the normal
        approximation with tie correction otherwise); ``q_value``
        (Benjamini-Hochberg over the tested measures of the same pair,
        :func:`scipy.stats.false_discovery_control`). A pair in which a
        group has fewer than ``min_samples`` values, or whose values are
        all equal, is not tested: p, q and the effect sizes are NaN and
        ``test_note`` says why.

    Examples
    --------
    >>> import pandas as pd
    >>> df = pd.DataFrame({"group": ["a"] * 3 + ["b"] * 3, "radius_median_um": [1, 2, 3, 4, 5, 6]})
    >>> row = group_comparison(df).iloc[0]
    >>> float(row["hodges_lehmann_shift"]), float(row["cliffs_delta"]), round(float(row["p_value"]), 3)
    (3.0, 1.0, 0.1)
    """
    from scipy import stats

    if summary.empty or group not in summary:
        return pd.DataFrame(columns=list(COMPARISON_COLUMNS))
    summary = add_densities(summary)
    if measures is None:
        measures = science_measures(summary)
    groups = list(dict.fromkeys(summary[group].astype(str)))
    pairs = [(a, b) for i, a in enumerate(groups) for b in groups[i + 1:]] or [(groups[0], None)]
    labels = summary[group].astype(str).to_numpy()

    rows = []
    for a, b in pairs:
        block = []
        for m in measures:
            info = _SCIENCE.get(m)
            col = (pd.to_numeric(summary[m], errors="coerce").to_numpy(float) if m in summary.columns
                   else np.full(len(summary), np.nan))
            va = _finite(col[labels == a])
            ma, sa, mda = _describe(va)
            row = dict.fromkeys(COMPARISON_COLUMNS, np.nan)
            row.update(measure=m, label=info.label if info else m.replace("_", " "), unit=info.unit if info else "",
                       group_a=a, group_b=b, n_a=va.size, mean_a=ma, sd_a=sa, median_a=mda, n_b=0,
                       test_method="", test_note="")
            if b is None:
                row["test_note"] = "one group: nothing to compare"
                block.append(row)
                continue
            vb = _finite(col[labels == b])
            mb, sb, mdb = _describe(vb)
            row.update(n_b=vb.size, mean_b=mb, sd_b=sb, median_b=mdb,
                       difference=mb - ma if va.size and vb.size else np.nan)
            few = [g for g, v in ((a, va), (b, vb)) if v.size < min_samples]
            if few:
                row["test_note"] = "; ".join(f"fewer than {min_samples} samples in group '{g}'" for g in few)
            elif np.ptp(np.r_[va, vb]) == 0:
                row["test_note"] = "all values equal: no test"
            else:
                ties = np.unique(np.r_[va, vb]).size < va.size + vb.size
                res = stats.mannwhitneyu(va, vb, alternative="two-sided", method="auto")
                shift, lo, hi, cov = hodges_lehmann(va, vb, confidence=confidence)
                row.update(mann_whitney_u=float(res.statistic), p_value=float(res.pvalue),
                           test_method="exact" if min(va.size, vb.size) <= 8 and not ties else "asymptotic",
                           hodges_lehmann_shift=shift, hodges_lehmann_ci_low=lo, hodges_lehmann_ci_high=hi,
                           hodges_lehmann_coverage=cov, cliffs_delta=cliffs_delta(va, vb))
                if not np.isfinite(cov):
                    row["test_note"] = (f"too few samples for a {confidence:.0%} interval of the shift "
                                        f"({va.size} and {vb.size})")
            block.append(row)
        p = np.array([r["p_value"] for r in block], float)
        ok = np.isfinite(p)
        q = np.full(p.shape, np.nan)
        if ok.any():
            q[ok] = stats.false_discovery_control(p[ok], method="bh")
        for r, qq in zip(block, q):
            r["q_value"] = qq
        rows.extend(block)
    out = pd.DataFrame(rows, columns=list(COMPARISON_COLUMNS))
    out["n_a"] = out["n_a"].astype(int)
    out["n_b"] = out["n_b"].astype(int)
    return out


def group_bookkeeping(summary, *, group="group"):
    """Bookkeeping columns of the cohort summary described per group, without tests.

    Parameters
    ----------
    summary : DataFrame
        One row per sample with a ``group`` column.
    group : str, keyword-only
        Name of the group column.

    Returns
    -------
    DataFrame
        One row per bookkeeping column (:func:`bookkeeping_measures`: raw
        counts, run residuals, imaged sizes, flag counts) and group:
        ``measure, group, n, mean, sd, median`` (n: samples with a value;
        sd with n - 1).
    """
    if summary.empty or group not in summary:
        return pd.DataFrame(columns=list(BOOKKEEPING_COLUMNS))
    labels = summary[group].astype(str).to_numpy()
    groups = list(dict.fromkeys(labels))
    rows = []
    for m in bookkeeping_measures(summary):
        col = pd.to_numeric(summary[m], errors="coerce").to_numpy(float)
        for g in groups:
            v = _finite(col[labels == g])
            mean, sd, med = _describe(v)
            rows.append({"measure": m, "group": g, "n": v.size, "mean": mean, "sd": sd, "median": med})
    return pd.DataFrame(rows, columns=list(BOOKKEEPING_COLUMNS))
