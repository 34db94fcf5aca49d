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

Rough walls. Wall points sample a wall by arc length, and a rough wall has
more arc where it bulges than where it dips, so a circle fitted to them
reads the radius-weighted mean ``E[rho^2] / E[rho] = r + var / r`` (6 % wide
at a relative roughness of 0.25). The radial spread of the kept points, less
the points' own quantisation (a uniform error over one voxel step along the
axis each was found on), is the wall's variance, and ``var / r`` is taken
off: the radius is the wall's mean over angle, and a smooth wall's is left
as it is. The graph's pruning keeps the plain fit: its rules ask whether a
branch clears the wall, bulges included. Measured on straight tubes with
relative roughness 0.25 varying over 1.5 µm at 3 x 1 x 1 µm voxels (five
directions each): +1-2 % from 2 to 5 µm, where the plain fit read +4-5 %
(``tests/test_radii.py``). The search reach comes from the distance-map
radius, which on a rough wall is the inscribed one (it touches the deepest
dent): within 1.6 of it, a thick rough vessel's outer bulges were cut off
and it read low, -5 % at 8 µm at relative roughness 0.25, so the network
Murray exponent of such trees came out 0.17-0.26 high (it moves by about
0.12 per 1 % of relative radius error between parent and daughters). The
measured radius is therefore refitted over twice the distance-map radius
(the points of the first fit and those beyond, in one scan): on depth-4
trees with roots of 8 µm at strength 1 and z steps of 2 µm the radius
error by size is now -1 to +4 % from 2.6 to 8 µm, and the exponent's error
-0.20 to +0.11 (three seeds at 2.3, 2.6 and 3.0). The plain fit, which the
pruning reads, keeps the narrower reach, so the graph does not change.

Where the fits are made. Neighbouring slabs overlap, so the fit is made
once per three quarters of a slab's width along each segment and
interpolated between; beyond the first and last fitted point a segment
takes their values. A segment's ends are not fitted: an end is a junction,
where the slab also holds the other branches and each of the three or more
segments meeting there fitted the same wall again, or a tip or a cut end,
where the slab runs out of wall. Fitting the ends was a third of all fits
(85,000 of 265,000 on the 512^3 benchmark bed; the step went from 3.4 to
2.5 s), and their values entered only the ramps to the first clean fit,
which segment radii already leave out near junctions
(``pipeline/measures.py``).

Measured on straight tubes of radius 2, 2.5 and 3.5 µm in six directions
(axes, face and body diagonals, two oblique) at 1 µm voxels and at
2.5 x 0.8 x 0.8 µm voxels: see ``tests/test_radii.py`` for the numbers the
tests hold it to. The fit falls back to the distance-map radius where fewer
than six wall points are found or the fit does not converge to a plausible
circle (within a factor of 2.5 of the first radius).
"""

from __future__ import annotations

from typing import NamedTuple

import numba
import numpy as np
from numba.cpython.unsafe.numbers import trailing_zeros

from ._parallel import start_threads

__all__ = ["WallRadii", "wall_radii", "segment_tangents", "wall_fit_plan", "fit_wall_points", "finish_wall_radii"]

# Search reach of the wall fits, in distance-map radii (plus two voxels): the
# plain fit's (which pruning reads) and the wider one of the measured radius
# (module notes, "Rough walls").
_REACH_RADII = 1.6
_MEAN_REACH_RADII = 2.0


class WallRadii(NamedTuple):
    """Radii of :func:`wall_radii`, one value per centreline point."""

    radii: np.ndarray
    fitted: np.ndarray
    plain: np.ndarray


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
def _solve3(a00, a01, a02, a11, a12, a22, b0, b1, b2):
    """Solve a symmetric 3 x 3 system by Cramer's rule; returns (x0, x1, x2, ok)."""
    c00 = a11 * a22 - a12 * a12
    c01 = a02 * a12 - a01 * a22
    c02 = a01 * a12 - a02 * a11
    det = a00 * c00 + a01 * c01 + a02 * c02
    scale = abs(a00 * a11 * a22) + 1e-300
    if not np.isfinite(det) or abs(det) < 1e-12 * scale:
        return 0.0, 0.0, 0.0, False
    c11 = a00 * a22 - a02 * a02
    c12 = a01 * a02 - a00 * a12
    c22 = a00 * a11 - a01 * a01
    x0 = (c00 * b0 + c01 * b1 + c02 * b2) / det
    x1 = (c01 * b0 + c11 * b1 + c12 * b2) / det
    x2 = (c02 * b0 + c12 * b1 + c22 * b2) / det
    return x0, x1, x2, True


@numba.njit(cache=True)
def _kasa(u, v, w, lam):
    """Weighted algebraic circle fit (Kasa 1976): u^2 + v^2 + D u + E v + F = 0.

    ``lam`` pulls the centre (-D/2, -E/2) towards the origin. Returns
    (cx, cy, r, ok).
    """
    s_uu = s_uv = s_vv = s_u = s_v = s_w = s_uz = s_vz = s_z = 0.0
    for i in range(len(u)):
        wi = w[i]
        if wi == 0.0:
            continue
        z = u[i] * u[i] + v[i] * v[i]
        s_uu += wi * u[i] * u[i]
        s_uv += wi * u[i] * v[i]
        s_vv += wi * v[i] * v[i]
        s_u += wi * u[i]
        s_v += wi * v[i]
        s_w += wi
        s_uz += wi * u[i] * z
        s_vz += wi * v[i] * z
        s_z += wi * z
    d, e, f, ok = _solve3(s_uu + 0.25 * lam, s_uv, s_u, s_vv + 0.25 * lam, s_v, s_w, -s_uz, -s_vz, -s_z)
    if not ok:
        return 0.0, 0.0, 0.0, False
    cx, cy = -0.5 * d, -0.5 * e
    r2 = cx * cx + cy * cy - f
    if not r2 > 0:
        return 0.0, 0.0, 0.0, False
    return cx, cy, np.sqrt(r2), True


@numba.njit(cache=True)
def _median(a, n):
    """Median of ``a[:n]`` (mean of the two middle values when ``n`` is even), reordering ``a[:n]``.

    The same value as ``np.median`` for values without NaN, by selection
    (Hoare's partition around the middle element, Wirth's loop) in the
    caller's buffer: no copy and no sort (at a couple of hundred wall points
    about a quarter quicker than ``np.median``).
    """
    k = (n - 1) // 2
    lo = 0
    hi = n - 1
    while lo < hi:
        x = a[k]
        i = lo
        j = hi
        while i <= j:
            while a[i] < x:
                i += 1
            while x < a[j]:
                j -= 1
            if i <= j:
                a[i], a[j] = a[j], a[i]
                i += 1
                j -= 1
        if j < k:
            lo = i
        if k < i:
            hi = j
    m = a[k]
    if n % 2 == 1:
        return m
    # Every value after position k is at least a[k]: the next order
    # statistic is their minimum.
    m2 = a[k + 1]
    for i in range(k + 2, n):
        if a[i] < m2:
            m2 = a[i]
    return (m + m2) / 2


@numba.njit(cache=True, inline="always")
def _polar(ui, vi, cx, cy):
    """Offset of a wall point from the centre and its distance."""
    dx = ui - cx
    dy = vi - cy
    return dx, dy, np.sqrt(dx * dx + dy * dy)


@numba.njit(cache=True)
def _circle_fit(u, v, w, qu, qv, r0, lam, res, rw):
    """Weighted robust circle fit in the plane; returns (r, r_mean, ok).

    An algebraic fit (one linear solve) gives the circle, Tukey's biweight on
    the distances to it removes what is not this vessel's wall (attached
    blobs, handles, another vessel in the slab), a second algebraic fit uses
    what is left, and two Gauss-Newton steps on the geometric distance take
    off the algebraic fit's small bias: ``r``, the wall's arc-length mean.
    ``r_mean`` is the wall's mean over angle (below). ``qu, qv``
    are the in-plane components of the voxel step along the axis each wall
    point was found on; ``res`` and ``rw`` are scratch buffers of at least
    ``2 len(u)`` and ``len(u)`` values.
    """
    n = len(u)
    rw = rw[:n]
    cx, cy, r, ok = _kasa(u, v, w, lam)
    if not ok:
        return r0, r0, False
    finite = True
    for i in range(n):
        res[i] = abs(np.sqrt((u[i] - cx) ** 2 + (v[i] - cy) ** 2) - r)
        res[n + i] = res[i]
        finite &= not np.isnan(res[i])
    # Selection needs ordered values; a circle fitted out to infinity gives
    # NaN distances, which np.median reports as they are.
    med = _median(res[n:2 * n], n) if finite else np.median(res[:n])
    scale = max(1.4826 * med, 0.15 * r0)
    c = 4.685 * scale
    wsum = 0.0
    kept = 0.0
    for i in range(n):
        q = res[i] / c
        rw[i] = w[i] * (1.0 - q * q) ** 2 if q < 1.0 else 0.0
        wsum += w[i]
        kept += rw[i]
    if kept < 0.3 * wsum:
        return r0, r0, False
    cx, cy, r, ok = _kasa(u, v, rw, lam)
    if not ok:
        return r0, r0, False
    for it in range(2):
        a00 = a01 = a02 = a11 = a12 = a22 = 0.0
        g0 = g1 = g2 = 0.0
        for i in range(n):
            wi = rw[i]
            if wi == 0.0:
                continue
            dx, dy, rho = _polar(u[i], v[i], cx, cy)
            if rho < 1e-9:
                continue
            e = rho - r
            j0 = -dx / rho
            j1 = -dy / rho
            a00 += wi * j0 * j0
            a01 += wi * j0 * j1
            a02 -= wi * j0
            a11 += wi * j1 * j1
            a12 -= wi * j1
            a22 += wi
            g0 += wi * j0 * e
            g1 += wi * j1 * e
            g2 -= wi * e
        s0, s1, s2, ok = _solve3(a00 + lam, a01, a02, a11 + lam, a12, a22, -(g0 + lam * cx), -(g1 + lam * cy), -g2)
        if not ok:
            break
        cx += s0
        cy += s1
        r += s2
    ok = np.isfinite(r) and r > 0
    if not ok:
        return r, r, ok
    # The arc-length bias of a rough wall (module notes, "Rough walls"): the
    # kept points' radial spread less their quantisation (variance step^2 /
    # 12 along the point's axis, of which the radial part counts) is the
    # wall's variance, and var / r comes off.
    sw = 0.0
    spread = 0.0
    quant = 0.0
    for i in range(n):
        dx, dy, rho = _polar(u[i], v[i], cx, cy)
        if rw[i] > 0.0 and rho >= 1e-9:
            radial = (qu[i] * dx + qv[i] * dy) / rho
            sw += rw[i]
            spread += rw[i] * (rho - r) ** 2
            quant += rw[i] * radial * radial / 12.0
    r_mean = r
    if sw > 0.0:
        excess = (spread - quant) / sw
        if excess > 0.0:
            # at most the clip of the roughness the correction is for
            # (relative sd 0.3: var / r = 0.09 r)
            r_mean = r - min(excess / r, 0.1 * r)
    return r, r_mean, ok


def _wall_faces(mask):
    """Bit ``2a + (s > 0)`` set where a vessel voxel's neighbour at ``s`` along axis ``a`` is tissue.

    Faces on the array's edge are cuts through a vessel, not walls, and are
    left out. One byte per voxel, so the fit visits walls without testing
    six neighbours of every voxel near every centreline point; made plane by
    plane in parallel with no temporary volume.
    """
    faces = np.zeros(mask.shape, dtype=np.uint8)
    _faces_into(mask, faces)
    return faces


@numba.njit(parallel=True, cache=True)
def _faces_into(mask, faces):
    nz, ny, nx = mask.shape
    for z in numba.prange(nz):
        for y in range(ny):
            for x in range(nx):
                if not mask[z, y, x]:
                    continue
                f = 0
                if z > 0 and not mask[z - 1, y, x]:
                    f |= 1
                if z < nz - 1 and not mask[z + 1, y, x]:
                    f |= 2
                if y > 0 and not mask[z, y - 1, x]:
                    f |= 4
                if y < ny - 1 and not mask[z, y + 1, x]:
                    f |= 8
                if x > 0 and not mask[z, y, x - 1]:
                    f |= 16
                if x < nx - 1 and not mask[z, y, x + 1]:
                    f |= 32
                faces[z, y, x] = f


def _wall_words(faces):
    """One bit per voxel, set where ``faces`` is non-zero: 64 voxels of a row in each word.

    Wall voxels are a few percent of a box around a centreline point, so the
    fit reads the words of a row and jumps from set bit to set bit instead
    of testing every voxel's byte; ``(Z, Y, ceil(X / 64))`` words, an eighth
    of a byte per voxel.
    """
    nz, ny, nx = faces.shape
    words = np.zeros((nz, ny, (nx + 63) // 64), dtype=np.uint64)
    _words_into(faces, words)
    return words


@numba.njit(parallel=True, cache=True)
def _words_into(faces, words):
    nz, ny, nx = faces.shape
    one = np.uint64(1)
    for z in numba.prange(nz):
        for y in range(ny):
            for x in range(nx):
                if faces[z, y, x] != 0:
                    words[z, y, x >> 6] |= one << np.uint64(x & 63)


@numba.njit(cache=True)
def _box(shape, sp, origin, base, p, t, h, reach, lo, hi):
    """Voxel box around the disc of radius ``reach`` and half-thickness ``h``; returns its voxel count.

    Positions are reckoned from ``origin``, the frame's first voxel; the
    array's first voxel is the frame's ``base`` (integers, so a block's box
    is the whole array's, shifted, bit for bit).
    """
    vol = 1
    for a in range(3):
        ext = h * abs(t[a]) + reach * np.sqrt(max(0.0, 1.0 - t[a] * t[a])) + 0.5 * sp[a]
        c = (p[a] - origin[a]) / sp[a]
        lo[a] = max(0, int(np.floor(c - ext / sp[a])) - base[a])
        hi[a] = min(shape[a] - 1, int(np.ceil(c + ext / sp[a])) - base[a])
        vol *= max(0, hi[a] - lo[a] + 1)
    return vol


@numba.njit(cache=True, inline="always")
def _take_faces(f, z, y, x, sp, origin, p, t, h, reach, slack, e1, e2, wax, U, V, W, QU, QV, n):
    # z, y, x: indices in the frame of ``origin``
    """Append the wall points of voxel ``(z, y, x)`` (face bits ``f``) that lie in the slab and reach; returns the new count."""
    # Whole voxel outside the slab or beyond reach (with half a voxel to
    # spare): none of its faces can count.
    v0 = origin[0] + z * sp[0] - p[0]
    v1 = origin[1] + y * sp[1] - p[1]
    v2 = origin[2] + x * sp[2] - p[2]
    va = v0 * t[0] + v1 * t[1] + v2 * t[2]
    if abs(va) > h + slack:
        return n
    w0 = v0 - va * t[0]
    w1 = v1 - va * t[1]
    w2 = v2 - va * t[2]
    if w0 * w0 + w1 * w1 + w2 * w2 > (reach + slack) ** 2:
        return n
    cap = len(U)
    for bit in range(6):
        if not (f >> bit) & 1:
            continue
        a = bit // 2
        half = 0.5 if bit & 1 else -0.5
        # A face midpoint moves off the voxel centre along its own axis only;
        # the other two coordinates are the centre's, to the last bit.
        q0 = origin[0] + (z + half) * sp[0] - p[0] if a == 0 else v0
        q1 = origin[1] + (y + half) * sp[1] - p[1] if a == 1 else v1
        q2 = origin[2] + (x + half) * sp[2] - p[2] if a == 2 else v2
        along = q0 * t[0] + q1 * t[1] + q2 * t[2]
        if abs(along) > h:
            continue
        c0 = q0 - along * t[0]
        c1 = q1 - along * t[1]
        c2 = q2 - along * t[2]
        if c0 * c0 + c1 * c1 + c2 * c2 > reach * reach or n >= cap:
            continue
        U[n] = c0 * e1[0] + c1 * e1[1] + c2 * e1[2]
        V[n] = c0 * e2[0] + c1 * e2[1] + c2 * e2[2]
        W[n] = wax[a]
        QU[n] = e1[a] * sp[a]
        QV[n] = e2[a] * sp[a]
        n += 1
    return n


@numba.njit(cache=True)
def _fit_one(faces, words, sp, origin, base, p, t, r0, smin, smax, wax, lo, hi, U, V, W, QU, QV, R, RW, OUT):
    """Radius from the wall around one centreline point; returns (r, r_mean, number of wall points) or (r0, r0, 0).

    ``OUT`` (5, at least ``len(U)``) holds the points beyond the plain fit's
    reach while they are moved behind the others.
    """
    h = max(0.75 * r0, 0.6 * smax)
    reach = _REACH_RADII * r0 + 2.0 * smin
    reach_m = _MEAN_REACH_RADII * r0 + 2.0 * smin
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
    n = 0
    slack = 0.5 * smax
    one = np.uint64(1)
    w_lo = lo[2] >> 6
    w_hi = hi[2] >> 6
    # Bits of the first and last word that lie inside the box.
    first = ~((one << np.uint64(lo[2] & 63)) - one)
    last = ((one << np.uint64(hi[2] & 63)) << one) - one if (hi[2] & 63) < 63 else ~np.uint64(0)
    for z in range(lo[0], hi[0] + 1):
        for y in range(lo[1], hi[1] + 1):
            for wi in range(w_lo, w_hi + 1):
                word = words[z, y, wi]
                if wi == w_lo:
                    word &= first
                if wi == w_hi:
                    word &= last
                # Set bits in increasing x: the wall points come in the same
                # order as a voxel-by-voxel scan, so the sums are too.
                while word != 0:
                    x = (wi << 6) + np.int64(trailing_zeros(word))
                    word &= word - one
                    n = _take_faces(faces[z, y, x], z + base[0], y + base[1], x + base[2], sp, origin, p, t, h,
                                    reach_m, slack, e1, e2, wax, U, V, W, QU, QV, n)
    # The points within the plain fit's reach first, each part in scan order:
    # inner points move down in place (never past their own slot), outer ones
    # wait in OUT and go behind them.
    ni = 0
    n_out = 0
    for i in range(n):
        if U[i] * U[i] + V[i] * V[i] <= reach * reach:
            U[ni], V[ni], W[ni], QU[ni], QV[ni] = U[i], V[i], W[i], QU[i], QV[i]
            ni += 1
        else:
            OUT[0, n_out], OUT[1, n_out], OUT[2, n_out] = U[i], V[i], W[i]
            OUT[3, n_out], OUT[4, n_out] = QU[i], QV[i]
            n_out += 1
    for i in range(n_out):
        U[ni + i], V[ni + i], W[ni + i] = OUT[0, i], OUT[1, i], OUT[2, i]
        QU[ni + i], QV[ni + i] = OUT[3, i], OUT[4, i]
    if ni < 6:
        return r0, r0, 0
    # A weak pull of the centre towards the centreline: 5 % of the total
    # weight per µm^2, enough to settle a direction no wall point
    # constrains, too little to bias a well-posed fit.
    lam = 0.05 * W[:ni].sum() / max(r0 * r0, smin * smin)
    r, r_mean, ok = _circle_fit(U[:ni], V[:ni], W[:ni], QU[:ni], QV[:ni], r0, lam, R, RW)
    if not (ok and r0 / 2.5 <= r <= 2.5 * r0):
        return r0, r0, 0
    if ni < n:
        # The wider reach for the measured radius: the distance-map radius is
        # the inscribed one, which on a rough wall touches the deepest dent,
        # so the plain reach cuts off a thick rough vessel's outer bulges.
        lam = 0.05 * W[:n].sum() / max(r0 * r0, smin * smin)
        r_w, r_mean_w, ok = _circle_fit(U[:n], V[:n], W[:n], QU[:n], QV[:n], r0, lam, R, RW)
        if ok and r0 / 2.5 <= r_w <= 2.5 * r0:
            r_mean = r_mean_w
    return r, r_mean, n


@numba.njit(parallel=True, cache=True)
def _fit_all(faces, words, sp, origin, base, P, T, R0, todo, out, out_mean, nfit, nchunks):
    smin = min(sp[0], min(sp[1], sp[2]))
    smax = max(sp[0], max(sp[1], sp[2]))
    wax = np.empty(3)
    for a in range(3):
        wax[a] = (smin / sp[a]) ** 2
    M = len(todo)
    for chunk in numba.prange(nchunks):
        # One set of buffers per chunk of points, grown when a box needs more.
        U = np.empty(4096)
        V = np.empty(4096)
        W = np.empty(4096)
        QU = np.empty(4096)
        QV = np.empty(4096)
        R = np.empty(2 * 4096)
        RW = np.empty(4096)
        OUT = np.empty((5, 4096))
        lo = np.empty(3, np.int64)
        hi = np.empty(3, np.int64)
        for j in range(chunk * M // nchunks, (chunk + 1) * M // nchunks):
            i = todo[j]
            r0 = R0[i]
            out[i] = r0
            out_mean[i] = r0
            nfit[i] = 0
            if not (r0 > 0):
                continue
            h = max(0.75 * r0, 0.6 * smax)
            reach = _MEAN_REACH_RADII * r0 + 2.0 * smin
            # A face per voxel on average at most, six at the very most.
            need = 6 * _box(faces.shape, sp, origin, base, P[i], T[i], h, reach, lo, hi)
            if need > len(U):
                U = np.empty(need)
                V = np.empty(need)
                W = np.empty(need)
                QU = np.empty(need)
                QV = np.empty(need)
                R = np.empty(2 * need)
                RW = np.empty(need)
                OUT = np.empty((5, need))
            r, r_mean, k = _fit_one(faces, words, sp, origin, base, P[i], T[i], r0, smin, smax, wax, lo, hi,
                                    U, V, W, QU, QV, R, RW, OUT)
            out[i] = r
            out_mean[i] = r_mean
            nfit[i] = k


@numba.njit(cache=True)
def _stride_points(P, off, R0, smax):
    """Points to fit: one per three quarters of a slab width along each segment, none at its ends.

    The first lies half a stride from the segment's start, so its slab
    reaches back over the end; a segment shorter than that gets its middle
    point, one of one or two points its first. The ends themselves are left out: a segment's end is a junction
    (where the slab holds the other branches too, and each of the three or
    more segments meeting there fitted the same wall again) or a tip or cut
    end, where the slab runs out of wall.
    """
    keep = np.zeros(len(P), dtype=np.bool_)
    for s in range(len(off) - 1):
        a, b = off[s], off[s + 1]
        if b - a <= 2:
            keep[a] = True
            continue
        acc = 0.0
        need = 0.75 * max(0.75 * R0[a], 0.6 * smax)
        any_kept = False
        for i in range(a + 1, b - 1):
            acc += np.sqrt(((P[i] - P[i - 1]) ** 2).sum())
            if acc >= need:
                keep[i] = True
                any_kept = True
                acc = 0.0
                need = 1.5 * max(0.75 * R0[i], 0.6 * smax)
        if not any_kept:
            keep[(a + b - 1) // 2] = True
            continue
        # The last slab must reach the end too: from the last kept point,
        # more than half a stride of arc left gets one more point.
        acc += np.sqrt(((P[b - 1] - P[b - 2]) ** 2).sum())
        if acc > 0.75 * max(0.75 * R0[b - 1], 0.6 * smax):
            keep[b - 2] = True
    return np.flatnonzero(keep)


@numba.njit(cache=True)
def _fill_between(P, off, out, nfit):
    """Linear interpolation along the arc between fitted points, the nearest fitted value beyond them.

    A segment without a fitted point keeps its first radius.
    """
    for s in range(len(off) - 1):
        a, b = off[s], off[s + 1]
        prev = -1
        for i in range(a, b):
            if nfit[i] < 0:
                continue
            if prev < 0:
                for k in range(a, i):
                    out[k] = out[i]
            elif i - prev > 1:
                arc = np.zeros(i - prev + 1)
                for k in range(prev + 1, i + 1):
                    arc[k - prev] = arc[k - prev - 1] + np.sqrt(((P[k] - P[k - 1]) ** 2).sum())
                tot = arc[-1]
                for k in range(prev + 1, i):
                    w = arc[k - prev] / tot if tot > 0 else 0.5
                    out[k] = (1.0 - w) * out[prev] + w * out[i]
            prev = i
        if prev >= 0:
            for k in range(prev + 1, b):
                out[k] = out[prev]


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
    WallRadii
        ``radii`` (M,) float, the wall's mean radius over angle, µm (the
        measurement); ``fitted`` (M,) bool, where the wall fit replaced the
        first radius; ``plain`` (M,) float, the plain fit, the wall's
        arc-length mean within the first radius's reach, µm, which counts the
        bulges of a rough wall (module notes).
    """
    R0 = np.ascontiguousarray(radii_um, dtype=np.float64)
    if planar or len(R0) == 0:
        return WallRadii(R0.copy(), np.zeros(len(R0), dtype=bool), R0.copy())
    P, off, T, todo = wall_fit_plan(points_um, offsets, R0, spacing=spacing)
    plain, mean, nfit = fit_wall_points(mask, spacing=spacing, offset=offset, points_um=P[todo],
                                        tangents=T[todo], radii_um=R0[todo])
    return finish_wall_radii(P, off, R0, todo, plain, mean, nfit)


def wall_fit_plan(points_um, offsets, radii_um, *, spacing):
    """Which points :func:`wall_radii` fits, and the tangent at every point.

    Returns
    -------
    P : (M, 3) float ndarray
        The points, C-contiguous float64.
    off : (S + 1,) int64 ndarray
    T : (M, 3) float ndarray
        Unit tangent at each point.
    todo : (F,) int64 ndarray
        Indices of the points to fit (the rest are interpolated by
        :func:`finish_wall_radii`).
    """
    sp = np.asarray(spacing, dtype=np.float64)
    P = np.ascontiguousarray(points_um, dtype=np.float64)
    off = np.ascontiguousarray(offsets, dtype=np.int64)
    R0 = np.ascontiguousarray(radii_um, dtype=np.float64)
    T = segment_tangents(P, off)
    # Slabs of neighbouring points overlap: fitting once per three quarters
    # of a slab's width (slabs overlapping by a quarter) and interpolating
    # between loses nothing the slab resolves; segment ends are not fitted
    # (module notes).
    return P, off, T, _stride_points(P, off, R0, float(sp.max()))


def fit_wall_points(mask, *, spacing, offset, points_um, tangents, radii_um, frame_offset=None):
    """Wall fits at the given points, on a mask that holds their surroundings.

    A point's fit reads the mask within about ``2 r + 2`` voxels of it
    (``r`` its first radius, :data:`_MEAN_REACH_RADII`); a mask that is a
    block of the volume gives the whole volume's answer at points at least
    that far from the block's faces that are not the volume's.

    Parameters
    ----------
    mask : (Z, Y, X) bool ndarray
        Cleaned mask (or a block of it), on the original grid.
    spacing : sequence of 3 float
    offset : sequence of 3 int
        Index of ``mask[0, 0, 0]`` in the original volume.
    points_um, tangents : (F, 3) float ndarray
    radii_um : (F,) float ndarray
    frame_offset : sequence of 3 int, optional
        The voxel positions are reckoned from (default ``offset``): a block
        fitted with the whole mask's frame gives its fits bit for bit.

    Returns
    -------
    plain, mean : (F,) float ndarray
        The plain and the mean-over-angle fits (the first radius where no fit).
    nfit : (F,) int ndarray
        Wall points used, 0 where the fit failed.
    """
    sp = np.asarray(spacing, dtype=np.float64)
    frame = np.asarray(offset if frame_offset is None else frame_offset, dtype=np.int64)
    origin = frame * sp
    base = np.asarray(offset, dtype=np.int64) - frame
    P = np.ascontiguousarray(points_um, dtype=np.float64)
    T = np.ascontiguousarray(tangents, dtype=np.float64)
    R0 = np.ascontiguousarray(radii_um, dtype=np.float64)
    out = R0.copy()
    out_mean = R0.copy()
    nfit = np.zeros(len(R0), dtype=np.int64)
    if len(R0) == 0:
        return out, out_mean, nfit
    start_threads()
    nchunks = max(1, min(len(R0), 64 * numba.get_num_threads()))
    faces = _wall_faces(np.ascontiguousarray(mask, dtype=bool))
    todo = np.arange(len(R0), dtype=np.int64)
    _fit_all(faces, _wall_words(faces), sp, origin, base, P, T, R0, todo, out, out_mean, nfit, nchunks)
    return out, out_mean, nfit


def finish_wall_radii(P, off, R0, todo, plain, mean, nfit):
    """:class:`WallRadii` of every point from the fits at ``todo`` (interpolated between them)."""
    out = R0.copy()
    out_mean = R0.copy()
    # -1: not fitted here (filled by interpolation); 0: fit failed; > 0: wall points used.
    count = np.full(len(R0), -1, dtype=np.int64)
    out[todo] = plain
    out_mean[todo] = mean
    count[todo] = nfit
    _fill_between(P, off, out, count)
    _fill_between(P, off, out_mean, count)
    return WallRadii(out_mean, count > 0, out)
