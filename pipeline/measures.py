"""Steps 6 and 7, measures per segment and per sample.

In: a pruned :class:`~pipeline.graph.VesselGraph`, the spacing, and the
cleaned mask (for volume fraction and tissue distances).
Out: the ``segments`` and ``nodes`` tables (pandas DataFrames, units in the
column names) and the sample ``summary`` dict.

Length estimator. Raw voxel steps overstate the length of oblique and curved
vessels (a staircase of 1 and sqrt(2) steps). The centreline is smoothed
along its arc with a Gaussian of ``smoothing_sigma_um`` (default twice the
finest grid spacing), with point reflection at both ends so that end
positions and straight lines are preserved exactly, and the length is that of
the smoothed polyline.

Tortuosity. The distance metric is length / chord; the sum-of-angles metric
(SOAM) of Bullitt et al. 2003 (IEEE Trans Med Imaging 22:1163) is the summed
in-plane and torsional angle per unit length, in rad/µm, on the smoothed
centreline resampled every ``tortuosity_step_um`` (one step in µm for a whole
study, whatever the voxel size; see ``configs/default.yaml`` for the default
and why). A segment shorter than three steps has no SOAM (NaN, never 0:
one term needs three chords), and the summary mean leaves it out. Whole
vessels, chained through their junctions, are measured by
:mod:`pipeline.vessels`.

The torsional angle needs two osculating planes, and the plane of two nearly
collinear chords is set by voxel wobble, not by the vessel: on straight
tubes rasterised in random directions, a torsional angle counted at every
point made the metric 0.24-0.29 rad/µm at an 8 µm step (three times that of a
helix of coil radius 12 µm), because each plane turned at random. So a plane
counts as defined only where its in-plane angle is at least
``SOAM_PLANE_MIN_ANGLE_RAD`` (0.2 rad; the interior in-plane angles of those
tubes reached 0.15-0.2 rad at 1-3 µm voxels), and the torsional angle is
taken only between two defined planes; at an 8 µm step, torsion is then
counted on curves bent more tightly than a radius of curvature of 40 µm.
Measured (straight tubes, five random directions, and helices of coil radius
12 and 20 µm, at 1, 2 and 3 x 1 x 1 µm voxels): straight tubes at most 0.013
rad/µm, helices within -5 % to +13 % of sqrt(kappa^2 + tau^2).

Radii. A segment's radius is a robust statistic (by default the mean between
the 10th and 90th percentiles, which averages out the lattice quantisation
of voxel distances) of the
radii along its middle part: points within ``junction_exclusion_radii`` radii
of a blind end are left out, because the radius shrinks into the tip, and at
a junction end within that many times the segment's own radius plus the
radius of the thickest vessel meeting there, because a thin vessel leaving a
thick one runs inside the thick one's wall region first (a short capillary
between two arterioles read 12-16 % wide when only its own radius was left
out). A segment shorter than its two zones takes its three points farthest
from both ends.
The hydraulic radius r_h, with L / r_h^4 = integral dl / r^4 over the same
middle part, is what resistance follows (r^-4).
"""

from __future__ import annotations

import math

import numba
import numpy as np
import pandas as pd
from scipy import sparse
from scipy.sparse import csgraph

from ._distance import tissue_distance_quantiles, volume_distance
from .graph import _seg_radius

__all__ = ["segment_table", "node_table", "summarize", "tissue_distance", "path_length"]

END_KINDS = ("junction", "blind", "border", "loop")


def path_length(p):
    """Length of a polyline ``(K, 3)``, in its units."""
    return float(np.sqrt((np.diff(p, axis=0) ** 2).sum(axis=1)).sum())


def node_kinds(g):
    """Kind of every node: 'junction', 'blind', 'border' or 'loop'."""
    deg = g.degrees()
    kinds = np.full(len(deg), "junction", dtype=object)
    end = deg == 1
    kinds[end & g.node_on_border] = "border"
    kinds[end & ~g.node_on_border] = "blind"
    self_only = np.zeros(len(deg), dtype=bool)
    for u, v in g.seg_nodes.values():
        if u == v and deg[u] == 2:
            self_only[u] = True
    kinds[self_only] = "loop"
    kinds[deg == 0] = "isolated"
    return kinds, deg


@numba.njit(cache=True)
def _smooth_one(p, sigma_pts, closed, out):
    k = p.shape[0]
    if sigma_pts <= 0.0 or k < 3:
        out[:] = p
        return
    w = int(np.ceil(4.0 * sigma_pts))
    if not closed:
        w = min(w, k - 1)
    weights = np.empty(2 * w + 1)
    for j in range(-w, w + 1):
        weights[j + w] = np.exp(-0.5 * (j / sigma_pts) ** 2)
    weights /= weights.sum()
    if closed:
        m = k - 1  # the last point repeats the first
        for i in range(m):
            for a in range(3):
                acc = 0.0
                for j in range(-w, w + 1):
                    acc += weights[j + w] * p[(i + j) % m, a]
                out[i, a] = acc
        out[m] = out[0]
        return
    for i in range(k):
        for a in range(3):
            acc = 0.0
            for j in range(-w, w + 1):
                q = i + j
                if q < 0:
                    v = 2.0 * p[0, a] - p[min(-q, k - 1), a]
                elif q >= k:
                    v = 2.0 * p[k - 1, a] - p[max(2 * (k - 1) - q, 0), a]
                else:
                    v = p[q, a]
                acc += weights[j + w] * v
            out[i, a] = acc
    # Point reflection makes the filter odd-symmetric about the ends: they stay put.
    out[0] = p[0]
    out[k - 1] = p[k - 1]


#: Fewest resampled points a sum-of-angles metric needs: one complete term
#: of Bullitt et al. 2003 takes three successive chords (four points), so a
#: curve shorter than three steps has no defined value (NaN, never 0).
SOAM_MIN_POINTS = 4
#: Smallest in-plane angle, rad, at which an osculating plane counts as
#: defined for the torsional term (see :func:`_soam_resampled`).
SOAM_PLANE_MIN_ANGLE_RAD = 0.2


@numba.njit(cache=True)
def _soam_resampled(s, arc, step, plane_min_angle=SOAM_PLANE_MIN_ANGLE_RAD):
    """Sum-of-angles metric of polyline ``s`` resampled every ``step`` along ``arc``.

    Bullitt E, Gerig G, Pizer SM, Lin W, Aylward SR 2003 (IEEE Trans Med
    Imaging 22:1163), definition from memory: at the resampled points
    ``P_k`` with chords ``T1 = P_k - P_k-1``, ``T2 = P_k+1 - P_k``,
    ``T3 = P_k+2 - P_k+1``, the in-plane angle ``IP_k`` is the angle between
    ``T1`` and ``T2``, the torsional angle ``TP_k`` that between the normals
    ``T1 x T2`` and ``T2 x T3`` of successive osculating planes, and
    ``SOAM = sum_k sqrt(IP_k^2 + TP_k^2) / sum |P_k - P_k-1|`` over the points
    where both angles are defined (every chord counts in the length).
    A plane counts as defined only where its in-plane angle is at least
    ``plane_min_angle`` (rad; module notes): elsewhere ``TP_k`` is 0.

    Returns NaN when the resampled curve has fewer than
    :data:`SOAM_MIN_POINTS` points (the curve is shorter than three steps).
    """
    total = arc[-1]
    n = int(np.floor(total / step)) + 1 if step > 0 else 0
    if n < SOAM_MIN_POINTS:
        return np.nan
    q = np.empty((n, 3))
    j = 0
    for i in range(n):
        t = i * step
        while j < len(arc) - 2 and arc[j + 1] < t:
            j += 1
        seg = arc[j + 1] - arc[j]
        f = (t - arc[j]) / seg if seg > 0 else 0.0
        for a in range(3):
            q[i, a] = s[j, a] + f * (s[j + 1, a] - s[j, a])
    m = n - 1
    u = np.empty((m, 3))
    length = 0.0
    for i in range(m):
        d = np.sqrt(((q[i + 1] - q[i]) ** 2).sum())
        length += d
        for a in range(3):
            u[i, a] = (q[i + 1, a] - q[i, a]) / d if d > 0 else 0.0
    ang = np.empty(m - 1)
    for i in range(m - 1):
        c = u[i, 0] * u[i + 1, 0] + u[i, 1] * u[i + 1, 1] + u[i, 2] * u[i + 1, 2]
        ang[i] = np.arccos(min(1.0, max(-1.0, c)))
    acc = 0.0
    for i in range(m - 2):
        ip = ang[i]
        tp = 0.0
        n1 = np.cross(u[i], u[i + 1])
        n2 = np.cross(u[i + 1], u[i + 2])
        a1 = np.sqrt((n1 ** 2).sum())
        a2 = np.sqrt((n2 ** 2).sum())
        if ang[i] >= plane_min_angle and ang[i + 1] >= plane_min_angle and a1 > 1e-12 and a2 > 1e-12:
            cc = (n1 * n2).sum() / (a1 * a2)
            tp = np.arccos(min(1.0, max(-1.0, cc)))
        acc += np.sqrt(ip * ip + tp * tp)
    return acc / length if length > 0 else np.nan


@numba.njit(cache=True)
def _segment_measures(P, R, off, closed, excl_start, excl_end, sigma_um, soam_step, excl_factor, stat,
                      zone_start, zone_end):
    S = len(off) - 1
    out = np.empty((S, 14))
    smooth = np.empty_like(P)
    for s in range(S):
        a, b = off[s], off[s + 1]
        p = P[a:b]
        r = R[a:b]
        k = b - a
        # Smoothing width in points from the mean raw step.
        raw = 0.0
        for i in range(k - 1):
            raw += np.sqrt(((p[i + 1] - p[i]) ** 2).sum())
        mean_step = raw / (k - 1) if k > 1 else 1.0
        sp = smooth[a:b]
        _smooth_one(p, sigma_um / max(mean_step, 1e-12), closed[s], sp)
        arc = np.zeros(k)
        for i in range(k - 1):
            arc[i + 1] = arc[i] + np.sqrt(((sp[i + 1] - sp[i]) ** 2).sum())
        length = arc[k - 1]
        chord = np.sqrt(((p[k - 1] - p[0]) ** 2).sum())
        # The end points are node positions; their radius belongs to the node.
        if k > 2:
            lo, hi = 1, k - 1
        else:
            lo, hi = 0, k
        r0 = np.median(r[lo:hi])
        # The zone at a junction end reaches past the thickest vessel meeting
        # there by the segment's own radius: a thin capillary leaving an
        # arteriole runs inside the arteriole's wall region for the
        # arteriole's radius, and its own cross-section clears that wall one
        # of its own radii later.
        z0 = excl_factor * (r0 + zone_start[s]) if zone_start[s] > 0 else excl_factor * r0
        z1 = excl_factor * (r0 + zone_end[s]) if zone_end[s] > 0 else excl_factor * r0
        keep = np.ones(hi - lo, dtype=np.bool_)
        for i in range(lo, hi):
            if excl_start[s] and arc[i] < z0:
                keep[i - lo] = False
            if excl_end[s] and length - arc[i] < z1:
                keep[i - lo] = False
        if keep.sum() < 3 and hi - lo > 3:
            # A segment short against its junctions: its three points farthest
            # from both ends, the least touched by the junctions' walls.
            depth = np.empty(hi - lo)
            for i in range(lo, hi):
                depth[i - lo] = min(arc[i] if excl_start[s] else np.inf, length - arc[i] if excl_end[s] else np.inf)
            keep[:] = False
            keep[np.argsort(-depth)[:3]] = True
        elif keep.sum() < 3:
            keep[:] = True
        idx = np.flatnonzero(keep) + lo
        rm = r[idx]
        if stat == 0:
            rr = np.median(rm)
        elif stat == 1:
            rr = rm.mean()
        else:
            q10 = np.percentile(rm, 10.0)
            q90 = np.percentile(rm, 90.0)
            sel = rm[(rm >= q10) & (rm <= q90)]
            rr = sel.mean() if len(sel) else rm.mean()
        # Per-point radii for the integrals: excluded zones take the robust radius.
        rp = np.full(k, rr)
        for i in idx:
            rp[i] = r[i]
        vol = 0.0
        surf = 0.0
        for i in range(k - 1):
            step = arc[i + 1] - arc[i]
            rmid = 0.5 * (rp[i] + rp[i + 1])
            vol += np.pi * rmid * rmid * step
            surf += 2.0 * np.pi * rmid * step
        # Hydraulic radius over the middle part, each point weighted by its arc step.
        wsum = 0.0
        inv4 = 0.0
        for i in idx:
            j = min(i, k - 2) if k > 1 else 0
            wgt = arc[j + 1] - arc[j] if k > 1 else 1.0
            wsum += wgt
            inv4 += wgt / max(r[i], 1e-12) ** 4
        rh = (wsum / inv4) ** 0.25 if inv4 > 0 and wsum > 0 else rr
        n = len(rm)
        sd = np.sqrt(((rm - rm.mean()) ** 2).sum() / (n - 1)) if n > 1 else 0.0
        out[s, 0] = length
        out[s, 1] = raw
        out[s, 2] = chord
        out[s, 3] = _soam_resampled(sp, arc, soam_step)
        out[s, 4] = rr
        out[s, 5] = rm.mean()
        out[s, 6] = rm.min()
        out[s, 7] = rm.max()
        out[s, 8] = sd
        out[s, 9] = n
        out[s, 10] = rh
        out[s, 11] = vol
        out[s, 12] = surf
        out[s, 13] = k
    return out, smooth


def segment_table(g, *, grid_spacing, smoothing_sigma_um=None, tortuosity_step_um=8.0, statistic="trimmed_mean",
                  junction_exclusion_radii=1.0):
    """Per-segment measures.

    Parameters
    ----------
    g : VesselGraph
        Pruned graph.
    grid_spacing : sequence of 3 float
        Spacing of the grid the centrelines were traced on, µm.
    smoothing_sigma_um : float or None, keyword-only
        Gaussian smoothing of the centrelines along their arc, µm; None: two
        grid spacings (``measures.smoothing_sigma_um``).
    tortuosity_step_um : float, keyword-only
        Resampling step of the sum-of-angles metric, µm (``measures.tortuosity_step_um``).
    statistic : {'median', 'mean', 'trimmed_mean'}, keyword-only
        Segment radius from its points (``radii.statistic``).
    junction_exclusion_radii : float, keyword-only
        Radii left out at segment ends (``radii.junction_exclusion_radii``).

    Returns
    -------
    segments : DataFrame
        One row per segment, ``segment_id`` 0..S-1 in a stable order.
    seg_keys : list of int
        Graph segment key of each row.
    smoothed : list of (K, 3) ndarray
        Smoothed centreline of each row, µm.
    """
    h = float(min(grid_spacing))
    sigma_um = smoothing_sigma_um
    sigma_um = 2.0 * h if sigma_um is None else float(sigma_um)
    soam_step = float(tortuosity_step_um)
    kinds, _ = node_kinds(g)
    keys = sorted(g.seg_nodes, key=lambda s: (g.seg_nodes[s], s))
    uv = np.array([g.seg_nodes[s] for s in keys], dtype=np.int64).reshape(-1, 2)
    lens = np.array([len(g.seg_path[s]) for s in keys], dtype=np.int64)
    off = np.r_[0, np.cumsum(lens)].astype(np.int64)
    if keys:
        P = np.ascontiguousarray(np.vstack([g.seg_path[s] for s in keys]), dtype=np.float64)
        R = np.ascontiguousarray(np.concatenate([g.seg_radii[s] for s in keys]), dtype=np.float64)
    else:
        P, R = np.zeros((0, 3)), np.zeros(0)
    closed = uv[:, 0] == uv[:, 1]
    k_from = kinds[uv[:, 0]] if len(uv) else np.zeros(0, object)
    k_to = kinds[uv[:, 1]] if len(uv) else np.zeros(0, object)
    # Junction zones (inflated distance) and blind tips (tapering) are left out.
    excl_start = ~closed & np.isin(k_from, ("junction", "blind"))
    excl_end = ~closed & np.isin(k_to, ("junction", "blind"))
    stat = {"median": 0, "mean": 1, "trimmed_mean": 2}[statistic]
    if keys:
        # Each node's thickest vessel: the median radius of its thickest segment.
        seg_r = np.array([_seg_radius(g, s) for s in keys])
        node_r = np.zeros(int(uv.max()) + 1)
        np.maximum.at(node_r, uv[:, 0], seg_r)
        np.maximum.at(node_r, uv[:, 1], seg_r)
        m, smooth = _segment_measures(P, R, off, closed, excl_start, excl_end, sigma_um, soam_step,
                                      float(junction_exclusion_radii), stat,
                                      np.where(k_from == "junction", node_r[uv[:, 0]], 0.0),
                                      np.where(k_to == "junction", node_r[uv[:, 1]], 0.0))
    else:
        m, smooth = np.zeros((0, 14)), P
    with np.errstate(divide="ignore", invalid="ignore"):
        tort = np.where((m[:, 2] > 0) & ~closed, m[:, 0] / m[:, 2], np.nan)
    segs = pd.DataFrame({
        "segment_id": np.arange(len(keys), dtype=np.int64),
        "node_from": uv[:, 0],
        "node_to": uv[:, 1],
        "length_um": m[:, 0],
        "length_raw_um": m[:, 1],
        "chord_um": m[:, 2],
        "tortuosity": tort,
        "soam_rad_per_um": m[:, 3],
        "radius_um": m[:, 4],
        "radius_mean_um": m[:, 5],
        "radius_min_um": m[:, 6],
        "radius_max_um": m[:, 7],
        "radius_sd_um": m[:, 8],
        "radius_n_points": m[:, 9].astype(np.int64),
        "radius_hydraulic_um": m[:, 10],
        "volume_um3": m[:, 11],
        "surface_um2": m[:, 12],
        "end_from": k_from.astype(str),
        "end_to": k_to.astype(str),
        "n_points": m[:, 13].astype(np.int64),
        "reconnected": np.array([s in g.seg_reconnected for s in keys], dtype=bool),
    })
    smoothed = [smooth[off[i]:off[i + 1]] for i in range(len(keys))]
    return segs, keys, smoothed


def node_table(g, *, spacing, node_ids):
    """Per-node table for the nodes still in the graph.

    Parameters
    ----------
    g : VesselGraph
    spacing : sequence of 3 float
        Original voxel spacing, µm (voxel indices refer to the original grid).
    node_ids : (N,) int ndarray
        Graph node ids to list, in output order; row ``i`` gets ``node_id`` i.

    Returns
    -------
    DataFrame
    """
    kinds, deg = node_kinds(g)
    pos = g.node_pos_um[node_ids]
    vox = np.rint(pos / np.asarray(spacing, dtype=float)).astype(np.int64)
    return pd.DataFrame({
        "node_id": np.arange(len(node_ids)),
        "z": vox[:, 0], "y": vox[:, 1], "x": vox[:, 2],
        "z_um": pos[:, 0], "y_um": pos[:, 1], "x_um": pos[:, 2],
        "degree": deg[node_ids],
        "kind": kinds[node_ids].astype(str),
        "radius_um": g.node_radius_um[node_ids],
    })


def tissue_distance(mask, offset, original_shape, spacing, *, planar=False):
    """Distance from every non-vessel voxel to the nearest vessel voxel, µm.

    Returns ``(median, p95)``; the whole imaged volume counts as tissue.
    Used when the centreline step did not already compute it on the
    original grid (resampled stacks).
    """
    if planar:
        mask, offset, original_shape, spacing = mask[0], offset[1:], original_shape[1:], spacing[1:]
    full, inside = volume_distance(mask, offset=offset, shape=original_shape, spacing=spacing)
    return tissue_distance_quantiles(full, mask, inside)


def summarize(segments, nodes, *, cleaned, spacing, planar, original_shape, tissue_dist):
    """Sample summary as a JSON-serialisable dict (units in the keys)."""
    sp = np.asarray(spacing, dtype=float)
    shape = np.asarray(original_shape)
    if planar:
        region = float(shape[1] * shape[2] * sp[1] * sp[2])  # µm², the imaged area
        region_key = "imaged_area_mm2"
        region_val = region * 1e-6
    else:
        region = float(np.prod(shape) * np.prod(sp))
        region_key = "imaged_volume_mm3"
        region_val = region * 1e-9
    n_vox = int(np.prod(shape[1:] if planar else shape))
    total_len = float(segments["length_um"].sum())
    kinds = nodes["kind"].value_counts()
    n_nodes = len(nodes)
    n_segs = len(segments)
    if n_segs:
        # Pieces of the node graph (isolated nodes count as pieces), from
        # node_from/node_to positions in the node table.
        ids = nodes["node_id"].to_numpy()
        order = np.argsort(ids, kind="stable")
        a = order[np.searchsorted(ids, segments["node_from"].to_numpy(), sorter=order)]
        b = order[np.searchsorted(ids, segments["node_to"].to_numpy(), sorter=order)]
        adj = sparse.coo_matrix((np.ones(n_segs, np.int8), (a, b)), shape=(n_nodes, n_nodes))
        n_comp = int(csgraph.connected_components(adj, directed=False)[0])
    else:
        n_comp = 0
    r = segments["radius_um"].to_numpy()
    L = segments["length_um"].to_numpy()
    tort = segments["tortuosity"].to_numpy()
    finite = np.isfinite(tort)
    per = "per_mm2" if planar else "per_mm3"
    summary = {
        "total_length_mm": total_len * 1e-3,
        region_key: region_val,
        "vessel_volume_fraction" if not planar else "vessel_area_fraction": cleaned.stats["vessel_voxels"] / n_vox,
        ("length_density_mm_per_mm3" if not planar else "length_density_mm_per_mm2"): total_len * 1e-3 / region_val,
        "vessel_volume_mm3": float(segments["volume_um3"].sum()) * 1e-9,
        "segments": n_segs,
        "nodes": n_nodes,
        "junctions": int(kinds.get("junction", 0)),
        "blind_ends": int(kinds.get("blind", 0)),
        "border_ends": int(kinds.get("border", 0)),
        "loop_nodes": int(kinds.get("loop", 0)),
        f"junction_density_{per}": int(kinds.get("junction", 0)) / region_val,
        f"endpoint_density_{per}": int(kinds.get("blind", 0) + kinds.get("border", 0)) / region_val,
        "components": int(n_comp),
        "loops": int(n_segs - n_nodes + n_comp),
        "radius_mean_um": float(r.mean()) if n_segs else None,
        "radius_median_um": float(np.median(r)) if n_segs else None,
        "radius_sd_um": float(r.std(ddof=1)) if n_segs > 1 else None,
        "radius_p10_um": float(np.percentile(r, 10)) if n_segs else None,
        "radius_p90_um": float(np.percentile(r, 90)) if n_segs else None,
        "radius_length_weighted_mean_um": float((r * L).sum() / L.sum()) if n_segs and L.sum() > 0 else None,
        "tortuosity_mean": float(tort[finite].mean()) if finite.any() else None,
        # NaN-safe: segments too short for the metric have none (not 0).
        "soam_mean_rad_per_um": (float(np.nanmean(segments["soam_rad_per_um"].to_numpy(float)))
                                 if n_segs and np.isfinite(segments["soam_rad_per_um"].to_numpy(float)).any()
                                 else None),
        "tissue_distance_median_um": tissue_dist[0],
        "tissue_distance_p95_um": tissue_dist[1],
    }
    return summary


def radius_uncertainty(radius_um, sd_um, n_points, *, step_um=None, voxel_um=None, floor_voxels=0.0):
    """Standard uncertainty of segment radii (module notes, "Radius uncertainty").

    Parameters
    ----------
    radius_um, sd_um, n_points : array_like, shape (S,)
        Segment radius, spread (sd) of the wall-fit radii over its middle
        part and their number (``radius_um``, ``radius_sd_um``,
        ``radius_n_points``). A NaN sd counts as 0, a missing or
        non-positive count as one point.
    step_um : array_like, shape (S,), optional, keyword-only
        Arc length between neighbouring centreline points, µm; NaN or absent
        falls back to ``voxel_um``.
    voxel_um : float, optional, keyword-only
        Coarsest voxel spacing of the mask, µm: sets the wall-fit slab of thin
        vessels, the fallback step and the floor.
    floor_voxels : float, keyword-only
        Floor of the uncertainty, in voxels (no floor without ``voxel_um``).

    Returns
    -------
    ndarray, shape (S,)
        ``sqrt(sd^2 / n_eff + (floor_voxels * voxel_um)^2)``, µm, with
        ``n_eff = clip(n * step / (1.5 h), 1, n)``, ``h = max(0.75 r,
        0.6 voxel_um)`` (the wall fit's slab half-width; ``0.75 r`` without
        ``voxel_um``), and ``n_eff = n`` where no step is known.

    Examples
    --------
    >>> float(radius_uncertainty([3.0], [0.2], [16])[0])  # sd / sqrt(n): standard error of a mean
    0.05
    """
    r = np.asarray(radius_um, dtype=float)
    sd = np.nan_to_num(np.asarray(sd_um, dtype=float), nan=0.0)
    n = np.asarray(n_points, dtype=float)
    n = np.where(np.isfinite(n) & (n >= 1), n, 1.0)
    v = math.nan if voxel_um is None else float(voxel_um)
    step = np.full(r.shape, np.nan) if step_um is None else np.asarray(step_um, dtype=float)
    step = np.where(np.isfinite(step) & (step > 0), step, v)
    half = np.maximum(0.75 * r, 0.6 * v) if math.isfinite(v) else 0.75 * r
    with np.errstate(invalid="ignore", divide="ignore"):
        n_eff = np.where(np.isfinite(step), np.clip(n * step / (1.5 * half), 1.0, n), n)
    floor = float(floor_voxels) * v if math.isfinite(v) else 0.0
    return np.sqrt(sd**2 / n_eff + floor**2)
