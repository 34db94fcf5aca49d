"""Step 4b, sub-voxel radii from the vessel wall.

In: the cleaned mask ``(Z, Y, X)`` on its original grid (its spacing in µm and
crop offset), and the centreline of every segment (points in µm, from the
graph step) with a first radius at each point (the distance-map radius).
Out: a radius at every centreline point, in µm, that does not depend on the
vessel's orientation against the voxel grid or on the voxel shape.

Why not the distance map. A distance transform measures from voxel centres
to voxel centres, so a radius read from it takes only the values the lattice
offers (1, 1.41, 1.73, 2, 2.24, ... voxels) and depends on the direction the
vessel runs: a tube of radius 2.5 voxels reads 2.0 along an axis and 2.83
along the body diagonal. With z steps several times the in-plane pixel, the
coarse axis adds up to half a plane (1-2.5 µm) of error, which is as large
as a capillary radius. Resistance goes as r^-4, so these errors are
multiplied four times in every flow.

The estimator. Where a vessel voxel and a tissue voxel are face neighbours,
the wall crosses the segment between their centres; its midpoint is an
estimate of a wall point with an error of at most half a voxel along that
axis, zero on average (with the usual labelling rule, a voxel is vessel when
its centre is inside, the crossing is uniform between the two centres). At
each centreline point, the wall points within a slab across the vessel
(half-width ``max(0.75 r, the coarsest spacing)`` along the tangent) are
projected onto the cross-section plane and a circle is fitted to them by
weighted, robust least squares (Gauss-Newton on the geometric distance;
Tukey's biweight against attached blobs, handles and neighbouring vessels).
Each wall point is weighted by the inverse square of its uncertainty, the
spacing of the axis it was found along, so on a stack with 2.5 µm z steps
the in-plane walls, known to 0.4 µm, carry the fit, and the z walls only
settle where the circle sits. Points of the wall on one plane then lie on
the true circle whatever the plane's offset from the axis, which is what
makes the radius independent of the z step. The centre may move off the
thinned centreline (which sits on voxel centres) with a weak pull towards it,
which settles the direction no wall point constrains.

Measured on straight tubes of radius 2, 2.5 and 3.5 µm in six directions
(axes, face and body diagonals, two oblique) at 1 µm voxels and at
2.5 x 0.8 x 0.8 µm voxels: see ``tests/test_radii.py`` for the numbers the
tests hold it to. The fit falls back to the distance-map radius where fewer
than six wall points are found or the fit does not converge to a plausible
circle (within a factor of 2.5 of the first radius).
"""

from __future__ import annotations

import numba
import numpy as np

__all__ = ["wall_radii", "segment_tangents"]


@numba.njit(cache=True)
def _tangents(P, off, k):
    T = np.zeros_like(P)
    S = len(off) - 1
    for s in range(S):
        a, b = off[s], off[s + 1]
        for i in range(a, b):
            lo = max(a, i - k)
            hi = min(b - 1, i + k)
            d = P[hi] - P[lo]
            n = np.sqrt((d ** 2).sum())
            if n > 0:
                T[i] = d / n
            else:
                T[i, 2] = 1.0
    return T


def segment_tangents(points_um, offsets, *, window_points=3):
    """Unit tangent at every centreline point, from the points ``window_points`` before and after.

    Parameters
    ----------
    points_um : (M, 3) float ndarray
        Every segment's centreline points, concatenated.
    offsets : (S + 1,) int ndarray
        Segment ``s`` is ``points_um[offsets[s]:offsets[s + 1]]``.
    window_points : int
        Half-width of the difference, in points.

    Returns
    -------
    (M, 3) float ndarray
    """
    P = np.ascontiguousarray(points_um, dtype=np.float64)
    off = np.ascontiguousarray(offsets, dtype=np.int64)
    return _tangents(P, off, int(window_points))


@numba.njit(cache=True)
def _circle_fit(u, v, w, r0, lam):
    """Weighted robust geometric circle fit in the plane; returns (r, ok)."""
    n = len(u)
    cx, cy = 0.0, 0.0
    wsum = w.sum()
    r = 0.0
    for i in range(n):
        r += w[i] * np.sqrt(u[i] * u[i] + v[i] * v[i])
    r /= wsum
    rw = w.copy()
    for outer in range(4):
        for it in range(12):
            # Normal equations of sum rw (rho - r)^2 + lam (cx^2 + cy^2).
            A = np.zeros((3, 3))
            g = np.zeros(3)
            for i in range(n):
                dx = u[i] - cx
                dy = v[i] - cy
                rho = np.sqrt(dx * dx + dy * dy)
                if rho < 1e-9:
                    continue
                e = rho - r
                j0 = -dx / rho
                j1 = -dy / rho
                j2 = -1.0
                wi = rw[i]
                A[0, 0] += wi * j0 * j0
                A[0, 1] += wi * j0 * j1
                A[0, 2] += wi * j0 * j2
                A[1, 1] += wi * j1 * j1
                A[1, 2] += wi * j1 * j2
                A[2, 2] += wi * j2 * j2
                g[0] += wi * j0 * e
                g[1] += wi * j1 * e
                g[2] += wi * j2 * e
            A[1, 0] = A[0, 1]
            A[2, 0] = A[0, 2]
            A[2, 1] = A[1, 2]
            A[0, 0] += lam
            A[1, 1] += lam
            g[0] += lam * cx
            g[1] += lam * cy
            det = np.linalg.det(A)
            if not np.isfinite(det) or abs(det) < 1e-12:
                return r0, False
            step = np.linalg.solve(A, -g)
            cx += step[0]
            cy += step[1]
            r += step[2]
            if abs(step[0]) + abs(step[1]) + abs(step[2]) < 1e-4 * max(r0, 1e-6):
                break
        # Tukey's biweight on the residuals: blobs, handles and the walls of
        # other vessels in the slab weigh nothing.
        res = np.empty(n)
        for i in range(n):
            dx = u[i] - cx
            dy = v[i] - cy
            res[i] = abs(np.sqrt(dx * dx + dy * dy) - r)
        scale = 1.4826 * np.median(res)
        floor = 0.15 * r0
        if scale < floor:
            scale = floor
        c = 4.685 * scale
        for i in range(n):
            q = res[i] / c
            rw[i] = w[i] * (1.0 - q * q) ** 2 if q < 1.0 else 0.0
        if rw.sum() < 0.5 * wsum:
            break
    ok = np.isfinite(r) and r > 0
    return r, ok


@numba.njit(parallel=True, cache=True)
def _fit_all(mask, sp, origin, P, T, R0, out, nfit):
    nz, ny, nx = mask.shape
    smin = min(sp[0], min(sp[1], sp[2]))
    smax = max(sp[0], max(sp[1], sp[2]))
    wax = np.empty(3)
    for a in range(3):
        wax[a] = (smin / sp[a]) ** 2
    M = len(P)
    for i in numba.prange(M):
        p = P[i]
        t = T[i]
        r0 = R0[i]
        out[i] = r0
        nfit[i] = 0
        if not (r0 > 0):
            continue
        h = max(0.75 * r0, smax)
        reach = 1.8 * r0 + 1.5 * smax
        # Cross-section basis e1, e2 perpendicular to t.
        e1 = np.empty(3)
        if abs(t[0]) < 0.9:  # e1 from the z axis, or from y when t is nearly along z
            e1[0], e1[1], e1[2] = 1.0 - t[0] * t[0], -t[0] * t[1], -t[0] * t[2]
        else:
            e1[0], e1[1], e1[2] = -t[1] * t[0], 1.0 - t[1] * t[1], -t[1] * t[2]
        e1 /= np.sqrt((e1 ** 2).sum())
        e2 = np.empty(3)
        e2[0] = t[1] * e1[2] - t[2] * e1[1]
        e2[1] = t[2] * e1[0] - t[0] * e1[2]
        e2[2] = t[0] * e1[1] - t[1] * e1[0]
        lo = np.empty(3, np.int64)
        hi = np.empty(3, np.int64)
        ext = max(reach, h)
        for a in range(3):
            c = (p[a] - origin[a]) / sp[a]
            lo[a] = max(0, int(np.floor(c - ext / sp[a])))
            hi[a] = min(mask.shape[a] - 1, int(np.ceil(c + ext / sp[a])))
        cap = 6 * (hi[0] - lo[0] + 1) * (hi[1] - lo[1] + 1) * (hi[2] - lo[2] + 1)
        if cap <= 0:
            continue
        U = np.empty(cap)
        V = np.empty(cap)
        W = np.empty(cap)
        n = 0
        for z in range(lo[0], hi[0] + 1):
            for y in range(lo[1], hi[1] + 1):
                for x in range(lo[2], hi[2] + 1):
                    if not mask[z, y, x]:
                        continue
                    for a in range(3):
                        for sgn in (-1, 1):
                            zz, yy, xx = z, y, x
                            if a == 0:
                                zz += sgn
                            elif a == 1:
                                yy += sgn
                            else:
                                xx += sgn
                            # A face on the array's edge is a cut, not a wall.
                            if zz < 0 or yy < 0 or xx < 0 or zz >= nz or yy >= ny or xx >= nx:
                                continue
                            if mask[zz, yy, xx]:
                                continue
                            q0 = origin[0] + (z + (0.5 * sgn if a == 0 else 0.0)) * sp[0] - p[0]
                            q1 = origin[1] + (y + (0.5 * sgn if a == 1 else 0.0)) * sp[1] - p[1]
                            q2 = origin[2] + (x + (0.5 * sgn if a == 2 else 0.0)) * sp[2] - p[2]
                            along = q0 * t[0] + q1 * t[1] + q2 * t[2]
                            if abs(along) > h:
                                continue
                            c0 = q0 - along * t[0]
                            c1 = q1 - along * t[1]
                            c2 = q2 - along * t[2]
                            if c0 * c0 + c1 * c1 + c2 * c2 > reach * reach:
                                continue
                            U[n] = c0 * e1[0] + c1 * e1[1] + c2 * e1[2]
                            V[n] = c0 * e2[0] + c1 * e2[1] + c2 * e2[2]
                            W[n] = wax[a]
                            n += 1
        if n < 6:
            continue
        # A weak pull of the centre towards the centreline: 5 % of the
        # total weight per µm^2, enough to settle a direction no wall point
        # constrains, too little to bias a well-posed fit.
        lam = 0.05 * W[:n].sum() / max(r0 * r0, smin * smin)
        r, ok = _circle_fit(U[:n], V[:n], W[:n], r0, lam)
        if ok and r0 / 2.5 <= r <= 2.5 * r0:
            out[i] = r
            nfit[i] = n


def wall_radii(mask, *, spacing, offset, points_um, offsets, radii_um, planar=False):
    """Radius at every centreline point from a circle fitted to the nearby vessel wall.

    Parameters
    ----------
    mask : (Z, Y, X) bool ndarray
        Cleaned mask (cropped), on its original grid.
    spacing : sequence of 3 float
        Voxel spacing of ``mask``, µm.
    offset : sequence of 3 int
        Index of ``mask[0, 0, 0]`` in the original volume.
    points_um : (M, 3) float ndarray
        Centreline points of every segment, concatenated, µm in the original frame.
    offsets : (S + 1,) int ndarray
        Segment boundaries in ``points_um``.
    radii_um : (M,) float ndarray
        First radius at each point (the distance-map radius): sets the search
        reach and the slab, and stands where no fit can be made.
    planar : bool
        In-plane analysis: the distance-map radii are returned unchanged
        (a planar mask has no cross-section to fit).

    Returns
    -------
    radii : (M,) float ndarray
        µm.
    fitted : (M,) bool ndarray
        Where the wall fit replaced the first radius.
    """
    R0 = np.ascontiguousarray(radii_um, dtype=np.float64)
    if planar or len(R0) == 0:
        return R0.copy(), np.zeros(len(R0), dtype=bool)
    sp = np.asarray(spacing, dtype=np.float64)
    origin = np.asarray(offset, dtype=np.float64) * sp
    P = np.ascontiguousarray(points_um, dtype=np.float64)
    T = segment_tangents(P, offsets)
    out = np.empty_like(R0)
    nfit = np.zeros(len(R0), dtype=np.int64)
    _fit_all(np.ascontiguousarray(mask), sp, origin, P, T, R0, out, nfit)
    return out, nfit > 0
