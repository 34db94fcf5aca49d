"""Directions of a junction's arms from their centrelines, and the angles between them.

In: each arm's centreline (``(K, 3)`` µm) oriented from the junction and its radius. Out: the arm's
unit direction (principal axis of a window of a few radii, batched 3 x 3 eigensolves), angles between
arms in degrees and the daughters' angle out of the parent's plane.
"""

from __future__ import annotations

import numba
import numpy as np


# Points the tangent window is resampled to: 17 evenly spaced samples over a
# window of about two radii keep the sampling step well below a voxel for the
# radii met in practice, so the principal axis follows the arc, not the points.
_TANGENT_SAMPLES = 17


# ---------------------------------------------------------------------------
# geometry
# ---------------------------------------------------------------------------

def _angles_deg(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Angles between paired rows of two (M, 3) arrays, degrees.

    The atan2 form is accurate near 0 and 180 deg. NaN where a vector is not
    finite or both the cross and the dot product vanish.
    """
    cross = np.sqrt((np.cross(a, b) ** 2).sum(axis=1))
    dot = (a * b).sum(axis=1)
    bad = ~(np.isfinite(a).all(axis=1) & np.isfinite(b).all(axis=1)) | ((cross == 0.0) & (dot == 0.0))
    out = np.degrees(np.arctan2(cross, dot))
    out[bad] = np.nan
    return out


def _out_of_plane_deg(t0: np.ndarray, t1: np.ndarray, t2: np.ndarray) -> np.ndarray:
    """Largest angle between one unit direction and the plane of the other two.

    Row-wise over (M, 3) arrays; a pair of parallel directions spans no plane
    and is left out; NaN where none is left or a direction is not finite.
    """
    vecs = (t0, t1, t2)
    vol = np.abs((t0 * np.cross(t1, t2)).sum(axis=1))
    best = np.full(len(t0), np.nan)
    for k in range(3):
        p, q = (vecs[j] for j in range(3) if j != k)
        s = np.sqrt((np.cross(p, q) ** 2).sum(axis=1))
        spans = s > 1e-12  # the other two are not parallel
        ang = np.full(len(t0), np.nan)
        ang[spans] = np.degrees(np.arcsin(np.minimum(1.0, vol[spans] / s[spans])))
        best = np.where(spans & (np.isnan(best) | (ang > best)), ang, best)
    best[~np.all([np.isfinite(v).all(axis=1) for v in vecs], axis=0)] = np.nan
    return best


@numba.njit(cache=True)
def _tangent_windows(points, offsets, seg, from_start, scale, skip, fit, n_samples):
    """Evenly resampled fitting window of each requested segment end.

    Parameters
    ----------
    points : ndarray, shape (P, 3)
        All centrelines, concatenated in segment row order.
    offsets : ndarray of int64, shape (S + 1,)
        Centreline ``s`` is ``points[offsets[s]:offsets[s + 1]]``.
    seg : ndarray of int64, shape (M,)
        Segment row of each end.
    from_start : ndarray of bool, shape (M,)
        The node is at the centreline's first point (else its last).
    scale : ndarray, shape (M,)
        Junction radius at each end.
    skip, fit : float
        Window from ``skip * scale`` to ``min(fit * scale, length / 2)`` of
        arc length from the node.
    n_samples : int
        Samples over the window.

    Returns
    -------
    samples : ndarray, shape (M, n_samples, 3)
        Points at evenly spaced arc lengths over the window (``np.interp`` on
        the arc length of the centreline with repeated points dropped).
    ref : ndarray, shape (M, 3)
        Vector pointing away from the node along the window, to orient the
        fitted axis: last sample minus first sample (minus the node when
        fitted from the node).
    status : ndarray of int8, shape (M,)
        0 fitted past the junction zone, 1 fitted from the node (too short to
        skip it), 2 no window (no length); samples and ref are NaN then.
    """
    m = seg.shape[0]
    samples = np.full((m, n_samples, 3), np.nan)
    ref = np.full((m, 3), np.nan)
    status = np.full(m, 2, dtype=np.int8)
    kmax = 0
    for e in range(m):
        kmax = max(kmax, offsets[seg[e] + 1] - offsets[seg[e]])
    arc = np.empty(kmax)
    pts = np.empty((kmax, 3))
    for e in range(m):
        a = offsets[seg[e]]
        k = offsets[seg[e] + 1] - a
        # Walk from the node outward, dropping repeated points; the running
        # sum matches np.cumsum of the step lengths.
        n = 0
        prev = -1
        for i in range(k):
            j = a + i if from_start[e] else a + k - 1 - i
            if prev < 0:
                pts[0, :] = points[j, :]
                arc[0] = 0.0
                n = 1
            else:
                dz = points[j, 0] - points[prev, 0]
                dy = points[j, 1] - points[prev, 1]
                dx = points[j, 2] - points[prev, 2]
                step = np.sqrt(dz * dz + dy * dy + dx * dx)
                if step > 0:
                    pts[n, :] = points[j, :]
                    arc[n] = arc[n - 1] + step
                    n += 1
            prev = j
        if n < 2:
            continue
        hi = min(fit * scale[e], 0.5 * arc[n - 1])
        lo = skip * scale[e]
        from_node = False
        if not hi > lo:
            # Too short to leave the junction zone out: fit from the node itself.
            lo = 0.0
            from_node = True
        if not hi > 0:
            continue
        # np.linspace(lo, hi, n_samples), then np.interp per axis.
        delta = (hi - lo) / (n_samples - 1)
        j = 0
        for i in range(n_samples):
            x = hi if i == n_samples - 1 else float(i) * delta + lo
            while j + 1 < n and arc[j + 1] <= x:
                j += 1
            if j == n - 1 or arc[j] == x:
                samples[e, i, :] = pts[j, :]
            else:
                for c in range(3):
                    slope = (pts[j + 1, c] - pts[j, c]) / (arc[j + 1] - arc[j])
                    samples[e, i, c] = slope * (x - arc[j]) + pts[j, c]
        for c in range(3):
            ref[e, c] = samples[e, n_samples - 1, c] - (pts[0, c] if from_node else samples[e, 0, c])
        status[e] = 1 if from_node else 0
    return samples, ref, status


def _directions(points: np.ndarray, offsets: np.ndarray, seg: np.ndarray, from_start: np.ndarray,
                scale: np.ndarray, skip: float, fit: float) -> tuple[np.ndarray, np.ndarray]:
    """Unit direction of each requested segment end, pointing away from its node.

    The principal axis (total least squares line) of the evenly resampled
    window from :func:`_tangent_windows`, oriented along the window.

    Returns
    -------
    direction : ndarray, shape (M, 3)
        NaN where there is no window or the window has no extent.
    from_node : ndarray of bool, shape (M,)
        The fit started at the node (segment too short to skip the junction
        zone) or found no direction.
    """
    samples, ref, status = _tangent_windows(points, offsets, seg.astype(np.int64), from_start.astype(np.bool_),
                                            scale.astype(float), float(skip), float(fit), _TANGENT_SAMPLES)
    direction = np.full((len(seg), 3), np.nan)
    bend = np.zeros(len(seg))
    has = np.flatnonzero(status < 2)
    if len(has):
        window = samples[has]
        # The principal axes from the 3 x 3 scatter matrices, one batched
        # symmetric eigensolve (a batched SVD of the windows took ten times
        # longer); singular values are the square roots of the eigenvalues.
        centred = window - window.mean(axis=1, keepdims=True)
        lam, vec = np.linalg.eigh(np.einsum("nki,nkj->nij", centred, centred))
        sv = np.sqrt(np.maximum(lam[:, ::-1], 0.0))
        d = vec[:, :, 2]
        d = np.where(((d * ref[has]).sum(axis=1) < 0)[:, None], -d, d)
        spread = sv[:, 0] > 0
        d = d / np.sqrt((d**2).sum(axis=1))[:, None]
        direction[has[spread]] = d[spread]
        status[has[~spread]] = 2
        # A curved window's line differs from the tangent at its near end.
        # For a parabola y = k x^2 / 2 over [0, l] the residual rms about the
        # best line is k l^2 / sqrt(720) and the rms along it l / sqrt(12),
        # so their ratio is 0.129 k l, while the line differs from the end
        # tangent by about k l / 2: 3.9 times the ratio (radians).
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.sqrt(sv[:, 1] ** 2 + sv[:, 2] ** 2) / sv[:, 0]
        bend[has] = np.degrees(3.9 * np.nan_to_num(ratio))
    return direction, status != 0, bend
