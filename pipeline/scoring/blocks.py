"""Building blocks of the scorer: one-to-one junction matching, cycle rank, centreline sampling.

In: positions, node rows and polylines in µm. Out: matched pairs, counts and samples.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.optimize import linear_sum_assignment
from scipy.sparse import csgraph
from scipy.spatial import cKDTree

from ..errors import InputError
from .truth import _number, _short


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
