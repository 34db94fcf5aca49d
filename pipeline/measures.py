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
centreline resampled every ``soam_step_um`` (default four grid spacings, so
that voxel-scale jitter does not count as turning).

Radii. A segment's radius is a robust statistic (median by default) of the
radii along its middle part: points within ``junction_exclusion_radii`` radii
of a junction end or a blind end are left out, because there the distance to
background is inflated by the other branches or shrinks into the tip.
The hydraulic radius r_h, with L / r_h^4 = integral dl / r^4 over the same
middle part, is what resistance follows (r^-4).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import ndimage as ndi

__all__ = ["segment_table", "node_table", "summarize", "smooth_path", "soam", "path_length"]

END_KINDS = ("junction", "blind", "border", "loop")


def path_length(p):
    """Length of a polyline ``(K, 3)``, in its units."""
    return float(np.sqrt((np.diff(p, axis=0) ** 2).sum(axis=1)).sum())


def smooth_path(p, sigma_points, *, closed=False):
    """Gaussian-smooth a polyline along its arc.

    Parameters
    ----------
    p : (K, 3) float ndarray
    sigma_points : float
        Gaussian width in points.
    closed : bool
        Treat as a loop (periodic); otherwise ends are fixed by point reflection.

    Returns
    -------
    (K, 3) float ndarray
    """
    k = len(p)
    if sigma_points <= 0 or k < 3:
        return p
    if closed:
        q = p[:-1]
        out = ndi.gaussian_filter1d(q, sigma_points, axis=0, mode="wrap")
        return np.vstack([out, out[:1]])
    w = int(min(k - 1, np.ceil(4 * sigma_points)))
    head = 2 * p[0] - p[1:w + 1][::-1]
    tail = 2 * p[-1] - p[-w - 1:-1][::-1]
    ext = np.vstack([head, p, tail])
    out = ndi.gaussian_filter1d(ext, sigma_points, axis=0, mode="nearest", truncate=4.0)
    out = out[w:w + k]
    # The reflection makes the filter odd-symmetric about the ends: they stay put.
    out[0], out[-1] = p[0], p[-1]
    return out


def _resample(p, step):
    d = np.sqrt((np.diff(p, axis=0) ** 2).sum(axis=1))
    s = np.r_[0.0, np.cumsum(d)]
    if s[-1] <= step:
        return p[[0, -1]]
    n = int(np.floor(s[-1] / step))
    t = np.linspace(0.0, s[-1], n + 1)
    return np.column_stack([np.interp(t, s, p[:, a]) for a in range(p.shape[1])])


def soam(p):
    """Sum-of-angles metric of a polyline (Bullitt et al. 2003), rad per unit length.

    For consecutive vectors T1, T2, T3 between points, the in-plane angle is
    the angle between T1 and T2, the torsional angle the angle between the
    normals T1 x T2 and T2 x T3; SOAM is the sum of sqrt(IP^2 + TP^2) over the
    total length.
    """
    if len(p) < 3:
        return 0.0
    t = np.diff(p, axis=0)
    length = np.sqrt((t ** 2).sum(axis=1)).sum()
    if length == 0:
        return 0.0
    u = t / np.maximum(np.linalg.norm(t, axis=1, keepdims=True), 1e-300)
    ip = np.arccos(np.clip((u[:-1] * u[1:]).sum(axis=1), -1.0, 1.0))
    tp = np.zeros_like(ip)
    if len(u) >= 3:
        nrm = np.cross(u[:-1], u[1:])
        nn = np.linalg.norm(nrm, axis=1)
        ok = (nn[:-1] > 1e-9) & (nn[1:] > 1e-9)
        c = np.ones(len(nn) - 1)
        c[ok] = (nrm[:-1][ok] * nrm[1:][ok]).sum(axis=1) / (nn[:-1][ok] * nn[1:][ok])
        tp[:-1] = np.arccos(np.clip(c, -1.0, 1.0))
    return float(np.sqrt(ip ** 2 + tp ** 2).sum() / length)


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


def segment_table(g, *, grid_spacing, radii_config, measures_config):
    """Per-segment measures.

    Parameters
    ----------
    g : VesselGraph
        Pruned graph.
    grid_spacing : sequence of 3 float
        Spacing of the grid the centrelines were traced on, µm.
    radii_config, measures_config : dict
        The ``radii`` and ``measures`` config sections.

    Returns
    -------
    segments : DataFrame
        One row per segment, ``segment_id`` 0..S-1 in a stable order.
    seg_keys : list of int
        Graph segment key of each row.
    smoothed : list of (K, 3) ndarray
        Smoothed centreline of each row, µm.
    """
    h = float(min(s for s in grid_spacing))
    sigma_um = measures_config["smoothing_sigma_um"]
    sigma_um = 2.0 * h if sigma_um is None else sigma_um
    soam_step = measures_config["soam_step_um"] or 4.0 * h
    excl = radii_config["junction_exclusion_radii"]
    stat = radii_config["statistic"]
    kinds, deg = node_kinds(g)
    keys = sorted(g.seg_nodes, key=lambda s: (g.seg_nodes[s], s))
    rows, smoothed = [], []
    for new_id, s in enumerate(keys):
        u, v = g.seg_nodes[s]
        p = g.seg_path[s]
        r = g.seg_radii[s]
        closed = u == v
        raw_step = np.sqrt((np.diff(p, axis=0) ** 2).sum(axis=1))
        mean_step = raw_step.mean() if len(raw_step) else h
        sp = smooth_path(p, sigma_um / max(mean_step, 1e-12), closed=closed)
        steps = np.sqrt((np.diff(sp, axis=0) ** 2).sum(axis=1))
        length = float(steps.sum())
        arc = np.r_[0.0, np.cumsum(steps)]
        chord = float(np.linalg.norm(p[-1] - p[0]))
        ku, kv = kinds[u], kinds[v]
        # Points on the path proper (node positions at the ends are excluded:
        # a junction centroid's radius belongs to the junction, not the segment).
        inner = np.arange(1, len(p) - 1) if len(p) > 2 else np.arange(len(p))
        r_inner = r[inner]
        r0 = float(np.median(r_inner)) if len(r_inner) else float(np.median(r))
        keep = np.ones(len(inner), dtype=bool)
        if ku in ("junction", "blind") and not closed:
            keep &= arc[inner] >= excl * r0
        if kv in ("junction", "blind") and not closed:
            keep &= (length - arc[inner]) >= excl * r0
        if keep.sum() < 3:
            keep[:] = True
        rm = r_inner[keep] if len(r_inner) else r
        if stat == "median":
            rr = float(np.median(rm))
        elif stat == "mean":
            rr = float(np.mean(rm))
        else:
            lo, hi = np.percentile(rm, [10, 90])
            sel = rm[(rm >= lo) & (rm <= hi)]
            rr = float(sel.mean()) if len(sel) else float(np.mean(rm))
        # Per-point radii for integrals: the junction zones take the robust radius.
        rp = np.full(len(p), rr)
        rp[inner[keep]] = r_inner[keep]
        rmid = 0.5 * (rp[1:] + rp[:-1])
        volume = float(np.pi * (rmid ** 2 * steps).sum())
        surface = float(2 * np.pi * (rmid * steps).sum())
        mid_w = steps[np.minimum(inner[keep], len(steps) - 1)] if len(steps) else np.ones(1)
        with np.errstate(divide="ignore"):
            inv4 = (mid_w / np.maximum(rm, 1e-12) ** 4).sum()
        r_h = float((mid_w.sum() / inv4) ** 0.25) if inv4 > 0 else rr
        rows.append({
            "segment_id": new_id,
            "node_from": u,
            "node_to": v,
            "length_um": length,
            "length_raw_um": float(raw_step.sum()),
            "chord_um": chord,
            "tortuosity": length / chord if chord > 0 and not closed else np.nan,
            "soam_rad_per_um": soam(_resample(sp, soam_step)),
            "radius_um": rr,
            "radius_mean_um": float(np.mean(rm)),
            "radius_min_um": float(np.min(rm)),
            "radius_max_um": float(np.max(rm)),
            "radius_sd_um": float(np.std(rm, ddof=1)) if len(rm) > 1 else 0.0,
            "radius_n_points": int(len(rm)),
            "radius_hydraulic_um": r_h,
            "volume_um3": volume,
            "surface_um2": surface,
            "end_from": ku,
            "end_to": kv,
            "n_points": int(len(p)),
        })
        smoothed.append(sp)
    cols = ["segment_id", "node_from", "node_to", "length_um", "length_raw_um", "chord_um", "tortuosity",
            "soam_rad_per_um", "radius_um", "radius_mean_um", "radius_min_um", "radius_max_um", "radius_sd_um",
            "radius_n_points", "radius_hydraulic_um", "volume_um3", "surface_um2", "end_from", "end_to", "n_points"]
    return pd.DataFrame(rows, columns=cols), keys, smoothed


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
    """
    import edt

    full = np.zeros(original_shape, dtype=bool)
    sl = tuple(slice(o, o + n) for o, n in zip(offset, mask.shape))
    full[sl] = mask
    if planar:
        d = edt.edt(~full[0], anisotropy=tuple(spacing[1:]), black_border=False, parallel=2)
        bg = ~full[0]
    else:
        d = edt.edt(~full, anisotropy=tuple(spacing), black_border=False, parallel=2)
        bg = ~full
    del full
    vals = d[bg]
    del d, bg
    if vals.size == 0:
        return 0.0, 0.0
    n = vals.size
    k50, k95 = (n - 1) // 2, int(np.ceil(0.95 * (n - 1)))
    vals.partition([k50, k95])
    med = float(vals[k50]) if n % 2 else float(0.5 * (vals[k50] + np.min(vals[k50 + 1:])))
    return med, float(vals[k95])


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
        import networkx as nx

        gg = nx.MultiGraph()
        gg.add_nodes_from(nodes["node_id"])
        gg.add_edges_from(zip(segments["node_from"], segments["node_to"]))
        n_comp = nx.number_connected_components(gg)
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
        "soam_mean_rad_per_um": float(segments["soam_rad_per_um"].mean()) if n_segs else None,
        "tissue_distance_median_um": tissue_dist[0],
        "tissue_distance_p95_um": tissue_dist[1],
    }
    return summary
