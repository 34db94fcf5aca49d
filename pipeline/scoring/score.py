"""The score of a result against its truth, and its table for the terminal.

In: a result (folder, or :class:`pipeline.result.Result`) and a truth. Out: the score dict
(:func:`score`) and its lines (:func:`format_score`).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy.spatial import cKDTree

from ..errors import InputError
from .blocks import _positive_option, _sample, cycle_rank, match_junctions
from .truth import _number, _parse_truth, _short, load_truth

#: The ``format`` key of the dict :func:`score` returns (and of score files).
SCORE_FORMAT = "vesselflow-score"
SCORE_VERSION = 1
# At most this many samples along all truth (or all measured) centrelines:
# the sampling step grows on very long networks so memory stays bounded.
_MAX_SAMPLES = 2_000_000


# --------------------------------------------------------------------------- #
# The result
# --------------------------------------------------------------------------- #


def _as_result(result):
    if isinstance(result, (str, Path)):
        from ..tables import load_result

        p = Path(result)
        if not p.is_dir():
            raise InputError(f"result: expected a result folder, got '{p}' "
                             f"({'a file' if p.exists() else 'not found'})")
        return load_result(p)
    for attr in ("segments", "nodes", "centrelines"):
        if not hasattr(result, attr):
            raise InputError(f"result: expected a result folder, Result or Analysis (with segments, nodes and "
                             f"centrelines), got {type(result).__name__} without {attr}")
    return result


def _result_spacing(result):
    try:
        sp = result.spacing
    except (AttributeError, KeyError, TypeError):
        return None
    try:
        sp = np.asarray(sp, float)
    except (TypeError, ValueError):
        return None
    return sp if sp.shape == (3,) and np.all(np.isfinite(sp)) and np.all(sp > 0) else None


# --------------------------------------------------------------------------- #
# The score
# --------------------------------------------------------------------------- #


def _check_result_tables(segs, nodes, lines):
    """Raise InputError when the result lacks a needed column or a centreline per segment."""
    for col in ("segment_id", "node_from", "node_to", "length_um", "radius_um"):
        if len(segs) and col not in segs.columns:
            raise InputError(f"result: segments: expected a column {col}, got columns {', '.join(segs.columns)}")
    for col in ("node_id", "z_um", "y_um", "x_um", "degree", "kind"):
        if len(nodes) and col not in nodes.columns:
            raise InputError(f"result: nodes: expected a column {col}, got columns {', '.join(nodes.columns)}")
    if len(lines) != len(segs):
        raise InputError(f"result: centrelines: expected one per segment ({len(segs)}), got {len(lines)}")


def _check_same_volume(tr, res, spacing):
    """Raise InputError when the result's spacing or volume shape differs from the truth's."""
    if tr.spacing is not None and spacing is not None and not np.allclose(tr.spacing, spacing, rtol=1e-6):
        raise InputError(f"result: expected the truth's spacing {tr.spacing.tolist()} µm, got "
                         f"{spacing.tolist()} µm (the result was not analysed from this truth's volume, or with "
                         "another spacing)")
    run = getattr(res, "run", None)
    run_shape = run.get("shape") if isinstance(run, dict) else None
    if tr.shape is not None and isinstance(run_shape, (list, tuple)) and len(run_shape) == 3:
        got = [int(v) for v in run_shape]
        if got != tr.shape:
            raise InputError(f"result: expected the truth's volume shape {tr.shape}, got {got} (the result was "
                             "not analysed from this truth's volume)")


def _sample_step(sample_step_um, grid, tr, lines):
    """Step of the samples along the centrelines, µm (``score``'s ``sample_step_um``, default resolved).

    Parameters
    ----------
    sample_step_um : float or None
    grid : (3,) ndarray or None
        Voxel spacing, µm.
    tr : _Truth
    lines : list of (K, 3) array_like
        Measured centrelines, µm.
    """
    truth_len_poly = sum(float(np.linalg.norm(np.diff(p, axis=0), axis=1).sum()) for p in tr.seg_points)
    meas_len_poly = sum(float(np.linalg.norm(np.diff(np.asarray(p, float).reshape(-1, 3), axis=0), axis=1).sum())
                        for p in lines)
    if sample_step_um is None:
        if grid is not None:
            step = 0.5 * float(np.min(grid))
        else:
            step = 0.25 * float(tr.seg_radius.min()) if len(tr.seg_radius) else 0.5
        return max(step, max(truth_len_poly, meas_len_poly) / _MAX_SAMPLES)
    return _positive_option("sample_step_um", sample_step_um)


def _junctions(tr, nodes, floor):
    """True junctions and their match with the measured ones.

    Returns
    -------
    is_junction : (N,) bool ndarray
        Truth nodes of degree 3 or more.
    match_r : (N,) float ndarray
        Match radius of every truth node, µm.
    n_true, n_found : int
    dist : (M,) float ndarray
        Distance of each matched pair, µm.
    """
    n_truth_nodes = len(tr.node_pos)
    deg = np.bincount(np.r_[tr.seg_from, tr.seg_to], minlength=n_truth_nodes)
    node_r = np.zeros(n_truth_nodes)
    np.maximum.at(node_r, tr.seg_from, tr.seg_radius)
    np.maximum.at(node_r, tr.seg_to, tr.seg_radius)
    match_r = np.maximum(node_r, floor)
    is_junction = deg >= 3
    true_j = np.flatnonzero(is_junction)
    if len(nodes):
        jmask = (nodes["kind"].astype(str).to_numpy() == "junction") & (nodes["degree"].to_numpy() >= 3)
        found_pos = nodes.loc[jmask, ["z_um", "y_um", "x_um"]].to_numpy(float)
    else:
        found_pos = np.zeros((0, 3))
    _, _, dist = match_junctions(tr.node_pos[true_j], found_pos, radius_um=match_r[true_j])
    return is_junction, match_r, len(true_j), len(found_pos), dist


@dataclass
class _Samples:
    """Samples along the truth's centrelines and their nearest measured samples."""

    t_pts: np.ndarray  # (P, 3) µm, truth samples
    t_own: np.ndarray  # (P,) truth segment row of each
    t_hit: np.ndarray  # (P,) bool, within the local tolerance of a measured sample
    j_t: np.ndarray  # (P,) nearest measured sample
    m_own: np.ndarray  # (Q,) measured segment row of each measured sample
    length_recall: float | None
    length_precision: float | None


def _match_samples(tr, lines, step, floor):
    """Samples along both networks, matched each way within the local truth radius (at least ``floor``)."""
    t_pts, t_w, t_own, t_rad = _sample(tr.seg_points, step, tr.seg_radii)
    m_pts, m_w, m_own, _ = _sample(lines, step)
    t_tol = np.maximum(t_rad, floor)
    if len(m_pts) and len(t_pts):
        d_t, j_t = cKDTree(m_pts).query(t_pts)
        d_m, j_m = cKDTree(t_pts).query(m_pts)
        t_hit = d_t <= t_tol
        m_hit = d_m <= t_tol[j_m]
    else:
        t_hit = np.zeros(len(t_pts), bool)
        j_t = np.zeros(len(t_pts), np.int64)
        m_hit = np.zeros(len(m_pts), bool)
    length_recall = float(t_w[t_hit].sum() / t_w.sum()) if t_w.sum() > 0 else None
    length_precision = float(m_w[m_hit].sum() / m_w.sum()) if m_w.sum() > 0 else None
    return _Samples(t_pts, t_own, t_hit, j_t, m_own, length_recall, length_precision)


def _radius_errors(tr, segs, smp, *, is_junction, match_r, excl, min_len, frac_min):
    """Relative radius error of every truth segment that can be scored (module notes, Radius).

    Parameters
    ----------
    tr : _Truth
    segs : DataFrame
        Measured segments.
    smp : _Samples
    is_junction, match_r : (N,) ndarray, keyword-only
        As :func:`_junctions` returns them.
    excl, min_len, frac_min : float, keyword-only
        ``junction_exclusion_radii``, ``min_length_radii``,
        ``min_matched_fraction``.

    Returns
    -------
    per_seg : list of dict
        ``radius_per_segment`` of the score.
    errors : (K,) float ndarray
        Signed relative errors of the scored segments.
    eligible : int
        Segments scored or unmatched.
    """
    t_pts, t_own, t_hit, j_t, m_own = smp.t_pts, smp.t_own, smp.t_hit, smp.j_t, smp.m_own
    meas_radius = segs["radius_um"].to_numpy(float) if len(segs) else np.zeros(0)
    meas_ids = segs["segment_id"].to_numpy() if len(segs) else np.zeros(0, np.int64)
    per_seg = []
    errors = []
    bounds = np.searchsorted(t_own, np.arange(len(tr.seg_id) + 1))
    for s in range(len(tr.seg_id)):
        r = float(tr.seg_radius[s])
        entry = {"truth_segment_id": tr.seg_id[s], "status": "scored", "radius_truth_um": r,
                 "radius_measured_um": None, "rel_error": None, "matched_fraction": None,
                 "measured_segment_ids": []}
        per_seg.append(entry)
        if tr.seg_length[s] < min_len * r:
            entry["status"] = "short"
            continue
        sl = slice(bounds[s], bounds[s + 1])
        keep = np.ones(bounds[s + 1] - bounds[s], bool)
        for end in (tr.seg_from[s], tr.seg_to[s]):
            if is_junction[end]:
                near = np.linalg.norm(t_pts[sl] - tr.node_pos[end], axis=1) < excl * match_r[end]
                keep &= ~near
        if not keep.any():
            entry["status"] = "no_interior"
            continue
        hit = t_hit[sl][keep]
        entry["matched_fraction"] = float(hit.mean())
        owners = m_own[j_t[sl][keep][hit]] if hit.any() else np.zeros(0, np.int64)
        radii = meas_radius[owners]
        good = np.isfinite(radii)
        if hit.mean() < frac_min or not good.any():
            entry["status"] = "unmatched"
            continue
        r_meas = float(radii[good].mean())
        err = r_meas / r - 1.0
        entry.update(radius_measured_um=r_meas, rel_error=err,
                     measured_segment_ids=[int(v) for v in np.unique(meas_ids[owners[good]])])
        errors.append(err)
    eligible = sum(1 for e in per_seg if e["status"] in ("scored", "unmatched"))
    return per_seg, np.asarray(errors), eligible


def _measured_topology(segs, nodes):
    """Cycle rank and components of the measured graph; (0, 0) without nodes."""
    if not len(nodes):
        return 0, 0
    idx = nodes["node_id"].to_numpy()
    order = {int(v): i for i, v in enumerate(idx)}
    try:
        u = [order[int(v)] for v in segs["node_from"]] if len(segs) else []
        v = [order[int(w)] for w in segs["node_to"]] if len(segs) else []
    except KeyError as exc:
        raise InputError(f"result: segments: expected node ids from nodes, got node {exc.args[0]}, which "
                         "nodes does not have") from None
    return cycle_rank(len(nodes), u, v)


def score(result, truth, *, match_floor_um=None, junction_exclusion_radii=1.5, min_length_radii=2.0,
          min_matched_fraction=0.5, sample_step_um=None):
    """Score a measured vessel graph against its ground truth.

    The measures and their exact definitions are in the module docstring
    (``pipeline.scoring``).

    Parameters
    ----------
    result : str, Path, Result or Analysis
        A result folder (read with :func:`pipeline.tables.load_result`), or
        an object with ``segments`` (``segment_id, node_from, node_to,
        length_um, radius_um``), ``nodes`` (``node_id, z_um, y_um, x_um,
        degree, kind``) and ``centrelines`` (list of (K, 3) µm arrays in
        segment row order), and optionally ``spacing`` (3,) µm.
    truth : str, Path or mapping
        A truth JSON file (:func:`load_truth`) or the dict itself
        (:func:`pipeline.synthetic.rasterize`).
    match_floor_um : float, optional
        Smallest match radius for junctions and smallest distance for
        centreline matching, µm. Default: one voxel diagonal
        ``sqrt(dz² + dy² + dx²)`` of the truth's spacing (else the result's;
        0 when neither is known).
    junction_exclusion_radii : float
        Truth samples closer to a junction end of their segment than this
        many times the junction's match radius are left out of the radius
        error.
    min_length_radii : float
        Truth segments shorter than this many times their radius are left
        out of the radius error.
    min_matched_fraction : float
        Fraction in (0, 1] of a truth segment's interior samples that must
        match a measured centreline for the segment to be scored.
    sample_step_um : float, optional
        Step of the samples along truth and measured centrelines, µm.
        Default: half the smallest voxel spacing (a quarter of the smallest
        truth radius when no spacing is known), larger only when the
        centrelines would need more than two million samples.

    Returns
    -------
    dict
        ``format`` ('vesselflow-score'), ``version``;
        ``junctions_true``, ``junctions_found``, ``junctions_matched`` (int),
        ``junction_precision``, ``junction_recall``, ``junction_f1``,
        ``junction_offset_median_um`` (median distance of matched pairs);
        ``radius_rel_error_median``, ``radius_rel_error_p90`` (of
        ``|measured / truth - 1|``), ``radius_rel_bias`` (median signed),
        ``radius_segments_scored``, ``radius_segments_eligible`` (int);
        ``length_truth_um``, ``length_measured_um``, ``length_rel_error``,
        ``length_recall``, ``length_precision``;
        ``cycle_rank_truth``, ``cycle_rank_measured``, ``components_truth``,
        ``components_measured`` (int);
        ``settings`` (the options as used, defaults resolved) and
        ``radius_per_segment``: one dict per truth segment
        (``truth_segment_id``, ``status`` 'scored', 'short', 'no_interior'
        or 'unmatched', ``radius_truth_um``, ``radius_measured_um``,
        ``rel_error``, ``matched_fraction``, ``measured_segment_ids``).
        Undefined measures are None.

    Raises
    ------
    InputError
        A bad truth, a result without the needed tables, a result whose
        spacing or shape differs from the truth's, or a bad option.
    """
    res = _as_result(result)
    if isinstance(truth, (str, Path)):
        source = Path(truth)
        truth = load_truth(source)
    else:
        source = None
    tr = _parse_truth(truth, source)
    excl = _positive_option("junction_exclusion_radii", junction_exclusion_radii, low_ok=True)
    min_len = _positive_option("min_length_radii", min_length_radii, low_ok=True)
    frac_min = _number(min_matched_fraction)
    if frac_min is None or not 0 < frac_min <= 1:
        raise InputError(f"min_matched_fraction: expected a number in (0, 1], got {_short(min_matched_fraction)}")

    segs, nodes, lines = res.segments, res.nodes, list(res.centrelines)
    _check_result_tables(segs, nodes, lines)
    spacing = _result_spacing(res)
    _check_same_volume(tr, res, spacing)
    grid = tr.spacing if tr.spacing is not None else spacing
    if match_floor_um is None:
        floor = float(np.linalg.norm(grid)) if grid is not None else 0.0
    else:
        floor = _positive_option("match_floor_um", match_floor_um, low_ok=True)
    step = _sample_step(sample_step_um, grid, tr, lines)

    is_junction, match_r, n_true, n_found, dist = _junctions(tr, nodes, floor)
    n_match = len(dist)
    smp = _match_samples(tr, lines, step, floor)
    per_seg, errors, eligible = _radius_errors(tr, segs, smp, is_junction=is_junction, match_r=match_r, excl=excl,
                                               min_len=min_len, frac_min=frac_min)
    length_truth = float(tr.seg_length.sum())
    length_meas = float(np.nansum(segs["length_um"].to_numpy(float))) if len(segs) else 0.0
    cr_truth, cc_truth = cycle_rank(len(tr.node_pos), tr.seg_from, tr.seg_to)
    cr_meas, cc_meas = _measured_topology(segs, nodes)

    return {
        "format": SCORE_FORMAT,
        "version": SCORE_VERSION,
        "junctions_true": n_true,
        "junctions_found": n_found,
        "junctions_matched": n_match,
        "junction_precision": n_match / n_found if n_found else None,
        "junction_recall": n_match / n_true if n_true else None,
        "junction_f1": 2.0 * n_match / (n_true + n_found) if n_true + n_found else None,
        "junction_offset_median_um": float(np.median(dist)) if len(dist) else None,
        "radius_rel_error_median": float(np.median(np.abs(errors))) if len(errors) else None,
        "radius_rel_error_p90": float(np.percentile(np.abs(errors), 90)) if len(errors) else None,
        "radius_rel_bias": float(np.median(errors)) if len(errors) else None,
        "radius_segments_scored": int(len(errors)),
        "radius_segments_eligible": int(eligible),
        "length_truth_um": length_truth,
        "length_measured_um": length_meas,
        "length_rel_error": (length_meas - length_truth) / length_truth if length_truth > 0 else None,
        "length_recall": smp.length_recall,
        "length_precision": smp.length_precision,
        "cycle_rank_truth": cr_truth,
        "cycle_rank_measured": cr_meas,
        "components_truth": cc_truth,
        "components_measured": cc_meas,
        "settings": {"match_floor_um": floor, "junction_exclusion_radii": excl, "min_length_radii": min_len,
                     "min_matched_fraction": frac_min, "sample_step_um": step},
        "radius_per_segment": per_seg,
    }


def _pct(v, signed=False):
    if v is None:
        return "n/a"
    return f"{100.0 * v:+.1f} %" if signed else f"{100.0 * v:.1f} %"


def _num(v, fmt=".3f"):
    return "n/a" if v is None else format(v, fmt)


def format_score(s):
    """A small table of a :func:`score` dict: one line per measure, with units.

    Parameters
    ----------
    s : dict

    Returns
    -------
    str
        Lines joined by newlines (no trailing newline).
    """
    rows = [
        ("junctions", f"true {s['junctions_true']}, found {s['junctions_found']}, matched {s['junctions_matched']}"),
        ("junction precision", _num(s["junction_precision"])),
        ("junction recall", _num(s["junction_recall"])),
        ("junction F1", _num(s["junction_f1"])),
        ("junction offset", f"{_num(s['junction_offset_median_um'], '.2f')} µm (median, matched pairs)"),
        ("radius error", f"median {_pct(s['radius_rel_error_median'])}, 90th percentile "
                         f"{_pct(s['radius_rel_error_p90'])}, bias {_pct(s['radius_rel_bias'], True)} "
                         f"({s['radius_segments_scored']} of {s['radius_segments_eligible']} segments)"),
        ("length", f"measured {s['length_measured_um']:.1f} µm, truth {s['length_truth_um']:.1f} µm, "
                   f"error {_pct(s['length_rel_error'], True)}"),
        ("length recall", f"{_pct(s['length_recall'])} of the truth length near a measured centreline"),
        ("length precision", f"{_pct(s['length_precision'])} of the measured length near the truth"),
        ("cycle rank", f"measured {s['cycle_rank_measured']}, truth {s['cycle_rank_truth']}"),
        ("components", f"measured {s['components_measured']}, truth {s['components_truth']}"),
    ]
    return "\n".join(f"{name:<19}{text}" for name, text in rows)
