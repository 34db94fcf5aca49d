"""Scoring a measured vessel graph against a synthetic ground truth.

In: a result (a result folder, or a :class:`~pipeline.result.Result` from
:func:`pipeline.analyze` or :func:`pipeline.tables.load_result`: ``segments``, ``nodes`` and
``centrelines`` in µm) and a ground truth (the ``NAME.truth.json`` that
:func:`pipeline.synthetic.write_volume` writes beside a synthetic volume, or
the dict :func:`pipeline.synthetic.rasterize` returns).
Out: a dict of accuracy measures (:func:`score`) and a readable table of
them (:func:`format_score`).

Both sides are in the same frame: voxel (i, j, k) has its centre at
(i·dz, j·dy, k·dx) µm, in the truth as in the result.

Measures
--------
Junctions
    True junctions are truth nodes of degree 3 or more (degree counted from
    the truth segments, a self-loop twice); measured junctions are result
    nodes of kind ``'junction'`` and degree 3 or more. A true junction may be
    matched to a measured one no farther than its *match radius*: the parent
    radius there, taken as the largest ``radius_um`` of the truth segments
    meeting at it, and at least ``match_floor_um`` (default one voxel
    diagonal, so that junctions of capillaries a voxel or two wide can still
    match). The pairs are one-to-one and optimal: the most pairs, and among
    those the smallest total distance (:func:`match_junctions`,
    ``scipy.optimize.linear_sum_assignment``). Precision = matched / found,
    recall = matched / true, F1 = 2·matched / (true + found).
Radius
    For each truth segment at least ``min_length_radii`` times its radius
    long, its centreline is sampled every ``sample_step_um``; samples closer
    to a junction end than ``junction_exclusion_radii`` times that
    junction's match radius are left out (the measured radius leaves the
    junction region out too). Each remaining (interior) sample is matched to
    the nearest measured centreline sample within the local truth radius
    (at least ``match_floor_um``). When at least ``min_matched_fraction`` of
    the interior samples match, the segment is scored: its measured radius
    is the mean, over the matched samples, of the ``radius_um`` (the robust
    per-segment radius) of the measured segment each sample matched, and its
    relative error is ``measured / truth - 1`` with the truth segment's
    nominal ``radius_um``. Reported: the median and the 90th percentile
    (linear interpolation) of the absolute relative errors, and the median of
    the signed ones (bias).
Length
    ``(sum of measured length_um - sum of truth length_um) / truth``, signed.
    Truth segments are already clipped to the volume. Length recall is the
    fraction of the truth centreline length lying within the local truth
    radius (at least ``match_floor_um``) of a measured centreline; length
    precision the fraction of the measured centreline length within that
    distance of the truth centreline (spurious branches lower it, which
    junction F1 alone does not show).
Topology
    Cycle rank ``E - V + C`` (segments, nodes, connected components) and the
    number of components, with the same formula on both sides.

Relative measures are fractions (0.05 is 5 %). A measure that is undefined
(no true and no measured junctions, no scored segment, no truth length) is
``None``.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from scipy import sparse
from scipy.optimize import linear_sum_assignment
from scipy.sparse import csgraph
from scipy.spatial import cKDTree

from .errors import InputError

__all__ = ["score", "load_truth", "check_truth", "match_junctions", "cycle_rank", "format_score",
           "check_score_file", "write_score", "TRUTH_FORMAT", "SCORE_FORMAT"]

#: The ``format`` key of a ground-truth file written by :mod:`pipeline.synthetic`.
TRUTH_FORMAT = "vesselflow-synthetic-truth"
#: The ``format`` key of the dict :func:`score` returns (and of score files).
SCORE_FORMAT = "vesselflow-score"
SCORE_VERSION = 1
# At most this many samples along all truth (or all measured) centrelines:
# the sampling step grows on very long networks so memory stays bounded.
_MAX_SAMPLES = 2_000_000


# --------------------------------------------------------------------------- #
# The truth
# --------------------------------------------------------------------------- #


@dataclass
class _Truth:
    node_pos: np.ndarray  # (N, 3) µm
    seg_id: list
    seg_from: np.ndarray  # (S,) node row index
    seg_to: np.ndarray  # (S,) node row index
    seg_length: np.ndarray  # (S,) µm
    seg_radius: np.ndarray  # (S,) µm
    seg_points: list  # (K, 3) µm each
    seg_radii: list  # (K,) µm each
    spacing: np.ndarray | None
    shape: list | None


def load_truth(path):
    """Read and check a ground-truth JSON file.

    Parameters
    ----------
    path : str or Path
        A ``NAME.truth.json`` as written by :func:`pipeline.synthetic.write_volume`.

    Returns
    -------
    dict
        The truth as read (checked by :func:`check_truth`).

    Raises
    ------
    InputError
        One line naming the file and what is wrong: missing, not JSON, another
        format, or a node or segment without the keys scoring needs.
    """
    p = Path(path)
    if not p.exists():
        raise InputError(f"truth: expected a truth JSON file, got '{p}' (not found)")
    if p.is_dir():
        raise InputError(f"truth: expected a truth JSON file, got the folder '{p}'")
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(f"truth '{p}': expected UTF-8 JSON text, got bytes that are not UTF-8") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"truth '{p}': expected JSON, got a syntax error at line {exc.lineno} column "
                         f"{exc.colno} ({exc.msg})") from None
    check_truth(data, source=p)
    return data


def check_truth(truth, *, source=None):
    """Check that a truth dict has what scoring needs; raises :class:`InputError` otherwise.

    Needed: ``nodes`` (each with ``id`` and ``pos_um`` (3,) µm) and
    ``segments`` (each with ``id``, ``node_from``, ``node_to`` (node ids),
    ``length_um`` >= 0, ``radius_um`` > 0, ``points_um`` (K >= 2, 3) µm and
    optionally ``radii_um`` (K,) > 0). ``format``, when present, must be
    ``'vesselflow-synthetic-truth'``; ``spacing`` and ``shape``, when present,
    three positive numbers.

    Parameters
    ----------
    truth : mapping
    source : str or Path, optional
        Named in the messages.
    """
    _parse_truth(truth, source)


def _parse_truth(truth, source=None):
    where = f"truth '{source}'" if source is not None else "truth"

    def bad(what, expected, got):
        return InputError(f"{where}: {what}: expected {expected}, got {got}")

    if not isinstance(truth, Mapping):
        raise bad("content", "a JSON object with nodes and segments", type(truth).__name__)
    fmt = truth.get("format")
    if fmt is not None and fmt != TRUTH_FORMAT:
        raise bad("format", f"'{TRUTH_FORMAT}'", repr(fmt))
    for key in ("nodes", "segments"):
        if key not in truth:
            raise bad(key, "a list", "no such key")
        if not isinstance(truth[key], list):
            raise bad(key, "a list", type(truth[key]).__name__)
    ids, pos = {}, []
    for i, n in enumerate(truth["nodes"]):
        if not isinstance(n, Mapping) or "id" not in n:
            raise bad(f"nodes[{i}]", "an object with id and pos_um", _short(n))
        nid = n["id"]
        if not _is_int(nid):
            raise bad(f"nodes[{i}] id", "an integer", _short(nid))
        if nid in ids:
            raise bad(f"node {nid}", "unique node ids", "a second node with this id")
        ids[nid] = i
        pos.append(_array(n.get("pos_um"), (3,), f"node {nid} pos_um", "3 finite numbers (z, y, x) µm", bad))
    seg_id, seg_from, seg_to, length, radius, points, radii = [], [], [], [], [], [], []
    for i, s in enumerate(truth["segments"]):
        if not isinstance(s, Mapping) or "id" not in s:
            raise bad(f"segments[{i}]", "an object with id, node_from, node_to, length_um, radius_um, points_um",
                      _short(s))
        sid = s["id"]
        name = f"segment {sid}"
        for end, out in (("node_from", seg_from), ("node_to", seg_to)):
            nid = s.get(end)
            if not _is_int(nid) or nid not in ids:
                raise bad(f"{name} {end}", "the id of a node in nodes", _short(nid))
            out.append(ids[nid])
        ln = _number(s.get("length_um"))
        if ln is None or ln < 0:
            raise bad(f"{name} length_um", "a finite number >= 0", _short(s.get("length_um")))
        r = _number(s.get("radius_um"))
        if r is None or r <= 0:
            raise bad(f"{name} radius_um", "a finite number > 0", _short(s.get("radius_um")))
        pts = _array(s.get("points_um"), (None, 3), f"{name} points_um", "an array of shape (K >= 2, 3) µm", bad)
        if len(pts) < 2:
            raise bad(f"{name} points_um", "an array of shape (K >= 2, 3) µm", f"{len(pts)} point")
        if s.get("radii_um") is None:
            rad = np.full(len(pts), r)
        else:
            rad = _array(s["radii_um"], (len(pts),), f"{name} radii_um", f"{len(pts)} finite radii > 0 µm", bad)
            if not np.all(rad > 0):
                raise bad(f"{name} radii_um", f"{len(pts)} finite radii > 0 µm", f"a minimum of {rad.min():g}")
        seg_id.append(sid)
        length.append(ln)
        radius.append(r)
        points.append(pts)
        radii.append(rad)
    spacing = shape = None
    if truth.get("spacing") is not None:
        spacing = _array(truth["spacing"], (3,), "spacing", "3 positive numbers (dz, dy, dx) µm", bad)
        if not np.all(spacing > 0):
            raise bad("spacing", "3 positive numbers (dz, dy, dx) µm", spacing.tolist())
    if truth.get("shape") is not None:
        sh = truth["shape"]
        if not (isinstance(sh, list) and len(sh) == 3 and all(_is_int(v) and v > 0 for v in sh)):
            raise bad("shape", "3 positive integers (Z, Y, X)", _short(sh))
        shape = [int(v) for v in sh]
    return _Truth(node_pos=np.asarray(pos, float).reshape(-1, 3), seg_id=seg_id,
                  seg_from=np.asarray(seg_from, np.int64), seg_to=np.asarray(seg_to, np.int64),
                  seg_length=np.asarray(length, float), seg_radius=np.asarray(radius, float),
                  seg_points=points, seg_radii=radii, spacing=spacing, shape=shape)


def _is_int(v):
    return isinstance(v, (int, np.integer)) and not isinstance(v, bool)


def _number(v):
    if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _short(v):
    text = repr(v)
    return text if len(text) <= 60 else text[:57] + "..."


def _array(value, shape, what, expected, bad):
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise bad(what, expected, _short(value)) from None
    ok = arr.ndim == len(shape) and all(want is None or got == want for got, want in zip(arr.shape, shape))
    if not ok:
        raise bad(what, expected, f"shape {arr.shape}" if arr.ndim else _short(value))
    if not np.all(np.isfinite(arr)):
        raise bad(what, expected, "a value that is not finite")
    return arr


# --------------------------------------------------------------------------- #
# The result
# --------------------------------------------------------------------------- #


def _as_result(result):
    if isinstance(result, (str, Path)):
        from .tables import load_result

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
# Building blocks
# --------------------------------------------------------------------------- #


def match_junctions(true_um, found_um, *, radius_um):
    """Optimal one-to-one matching of true to measured junctions within a radius.

    A pair (t, f) is allowed when ``|true_um[t] - found_um[f]| <= radius_um[t]``.
    Among the one-to-one sets of allowed pairs, the one with the most pairs
    and, among those, the smallest total distance is returned. The allowed
    pairs split into independent groups (connected components of the
    bipartite graph of allowed pairs); each group is solved exactly with
    ``scipy.optimize.linear_sum_assignment``, where a disallowed pair costs
    more than any set of allowed ones, so no dense matrix of all junctions is
    ever made.

    Parameters
    ----------
    true_um : (T, 3) array_like
        True junction positions, µm.
    found_um : (F, 3) array_like
        Measured junction positions, µm.
    radius_um : float or (T,) array_like
        Match radius of each true junction, µm.

    Returns
    -------
    true_idx, found_idx : (M,) int ndarray
        Matched pairs, sorted by ``true_idx``.
    distance_um : (M,) float ndarray
        Distance of each pair.
    """
    t = np.asarray(true_um, float).reshape(-1, 3)
    f = np.asarray(found_um, float).reshape(-1, 3)
    r = np.broadcast_to(np.asarray(radius_um, float), (len(t),))
    empty = (np.zeros(0, np.int64), np.zeros(0, np.int64), np.zeros(0))
    if not len(t) or not len(f):
        return empty
    hits = cKDTree(f).query_ball_point(t, r=r)
    rows = np.repeat(np.arange(len(t)), [len(h) for h in hits])
    cols = np.fromiter((j for h in hits for j in h), dtype=np.int64, count=len(rows))
    if not len(rows):
        return empty
    n = len(t) + len(f)
    adj = sparse.coo_matrix((np.ones(len(rows)), (rows, len(t) + cols)), shape=(n, n))
    _, label = csgraph.connected_components(adj, directed=False)
    out_t, out_f = [], []
    order = np.argsort(label[rows], kind="stable")
    groups = np.split(order, np.flatnonzero(np.diff(label[rows][order])) + 1)
    for g in groups:
        ti, fi = np.unique(rows[g]), np.unique(cols[g])
        d = np.linalg.norm(t[ti][:, None, :] - f[fi][None, :, :], axis=2)
        ok = d <= r[ti][:, None]
        big = min(len(ti), len(fi)) * float(d[ok].max(initial=0.0)) + 1.0
        a, b = linear_sum_assignment(np.where(ok, d, big))
        keep = ok[a, b]
        out_t.append(ti[a[keep]])
        out_f.append(fi[b[keep]])
    ti, fi = np.concatenate(out_t), np.concatenate(out_f)
    o = np.argsort(ti)
    ti, fi = ti[o], fi[o]
    return ti, fi, np.linalg.norm(t[ti] - f[fi], axis=1)


def cycle_rank(n_nodes, node_from, node_to):
    """Cycle rank and connected components of a multigraph.

    Parameters
    ----------
    n_nodes : int
        Nodes ``0 .. n_nodes - 1`` (a node without edges is a component).
    node_from, node_to : (E,) array_like of int
        End rows of each edge; parallel edges and self-loops count.

    Returns
    -------
    rank : int
        ``E - V + C``, the number of independent cycles.
    components : int
        ``C``.
    """
    u = np.asarray(node_from, np.int64)
    v = np.asarray(node_to, np.int64)
    if n_nodes == 0:
        return 0, 0
    adj = sparse.coo_matrix((np.ones(len(u)), (u, v)), shape=(n_nodes, n_nodes))
    c, _ = csgraph.connected_components(adj, directed=False)
    return int(len(u) - n_nodes + c), int(c)


def _sample(lines, step, values=None):
    """Samples at the midpoints of pieces at most ``step`` long along polylines.

    Parameters
    ----------
    lines : list of (K, 3) ndarray
    step : float
    values : list of (K,) ndarray, optional
        Interpolated linearly to the samples.

    Returns
    -------
    points : (P, 3) ndarray
    weight : (P,) ndarray
        Length each sample stands for; they sum to the polylines' lengths.
    owner : (P,) int ndarray
        Index of the line of each sample.
    vals : (P,) ndarray or None
    """
    pts, wts, own, vals = [], [], [], []
    for i, p in enumerate(lines):
        p = np.asarray(p, float).reshape(-1, 3)
        if len(p) == 0:
            continue
        if len(p) == 1:
            p = np.vstack([p, p])
        d = np.diff(p, axis=0)
        ln = np.linalg.norm(d, axis=1)
        k = np.maximum(1, np.ceil(ln / step)).astype(np.int64)
        edge = np.repeat(np.arange(len(ln)), k)
        start = np.r_[0, np.cumsum(k)[:-1]]
        frac = (np.arange(k.sum()) - np.repeat(start, k) + 0.5) / np.repeat(k, k)
        pts.append(p[edge] + d[edge] * frac[:, None])
        wts.append(ln[edge] / k[edge])
        own.append(np.full(len(edge), i, np.int64))
        if values is not None:
            v = np.asarray(values[i], float).reshape(-1)
            if len(v) == 1:
                v = np.r_[v, v]
            vals.append(v[edge] + (v[edge + 1] - v[edge]) * frac)
    if not pts:
        return np.zeros((0, 3)), np.zeros(0), np.zeros(0, np.int64), (np.zeros(0) if values is not None else None)
    return (np.vstack(pts), np.concatenate(wts), np.concatenate(own),
            np.concatenate(vals) if values is not None else None)


def _positive_option(name, value, *, low_ok=False):
    v = _number(value)
    if v is None or v < 0 or (v == 0 and not low_ok):
        raise InputError(f"{name}: expected a finite number {'>= 0' if low_ok else '> 0'}, got {_short(value)}")
    return v


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


# --------------------------------------------------------------------------- #
# Score files
# --------------------------------------------------------------------------- #


def check_score_file(path, *, result_dir=None, overwrite=False):
    """Refuse, before any work, a score file name that would harm what is there.

    A score file is a ``.json`` file outside the result folder (which holds
    only the result's own files). An existing file is replaced only with
    ``overwrite`` and only when it is a score file (``format`` is
    :data:`SCORE_FORMAT`): anything else is the user's and is never replaced.

    Parameters
    ----------
    path : str or Path
        The score file to write.
    result_dir : str or Path, optional, keyword-only
        The result folder scored.
    overwrite : bool, keyword-only

    Returns
    -------
    Path

    Raises
    ------
    InputError
        With ``param`` 'path' or 'overwrite'.
    """
    from .tables import check_new_file

    # a .json name, not a folder, not an existing file without overwrite
    out = check_new_file(path, suffix=".json", overwrite=overwrite)
    if result_dir is not None and Path(result_dir).resolve() in out.resolve().parents:
        raise InputError(f"expected a file outside the result folder '{result_dir}' (a result folder holds only "
                         f"the result's own files), got '{out}'", param="path")
    if out.exists() or out.is_symlink():
        if not overwrite:
            raise InputError(f"'{out}' exists; pass overwrite=True to replace it", param="path")
        try:
            old = json.loads(out.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            old = None
        if not (isinstance(old, dict) and old.get("format") == SCORE_FORMAT):
            raise InputError(f"'{out}' is not a score file vesselflow wrote; it is never replaced: choose another "
                             "file name", param="overwrite")
    return out


def write_score(s, path, *, result_dir=None, truth_path=None, overwrite=False):
    """Write a :func:`score` dict to a JSON file, atomically.

    Parameters
    ----------
    s : dict
        From :func:`score`.
    path : str or Path
        Checked as :func:`check_score_file` checks it.
    result_dir, truth_path : str or Path, optional, keyword-only
        Recorded in the file as ``result`` and ``truth``.
    overwrite : bool, keyword-only

    Returns
    -------
    Path
        The file written.
    """
    from .tables import write_atomic, write_json

    out = check_score_file(path, result_dir=result_dir, overwrite=overwrite)
    doc = {**s, "result": None if result_dir is None else str(result_dir),
           "truth": None if truth_path is None else str(truth_path)}
    out.parent.mkdir(parents=True, exist_ok=True)
    write_atomic(out, lambda tmp: write_json(tmp, doc))
    return out
