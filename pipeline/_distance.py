"""Exact Euclidean distance maps of binary volumes, and their order statistics.

In: a boolean (Z, Y, X) or (Y, X) mask and the voxel spacing. Out: a float32
array of the same shape holding, for every voxel, the Euclidean distance from
its centre to the nearest voxel centre of the other class (a True voxel: to
the nearest False voxel, and the other way round). The array faces are cuts,
not background: nothing lies beyond them. A voxel whose class fills the whole
array gets +inf. One map serves two steps: vessel voxels get their distance
to tissue (the radii), tissue voxels their distance to the nearest vessel
(the summary), at the cost of one transform.

The squared distance is separable (Felzenszwalb & Huttenlocher, "Distance
transforms of sampled functions", Theory of Computing 8:415-428, 2012). The
first pass, along x, is the distance to the nearest class change in the row.
The y and z passes take the lower envelope of the parabolas rooted at the
previous pass's values. With two classes, a voxel's nearest other-class site
along a line is never farther than the voxels bounding its run of equal class,
which are other-class voxels themselves (cost zero), so each run's envelope
is built from the run and those two sites alone.

Most voxels of a vessel volume lie within a few voxels of the other class, so
the strided y and z passes first search a window of ``_REACH`` sites on
either side, on tiles of adjacent lines in lockstep (vectorised, cache-line
sized), and fall back to the exact envelope only on the lines where the
window cannot prove the answer. When it replaced the ``edt`` package's
two-label transform, it took 2.2 s against 4.3 s on the 512^3 benchmark bed
(2 threads), with identical values.
"""

from __future__ import annotations

import math

import numba
from numba import prange
import numpy as np

from ._parallel import start_threads, threads as _threads

__all__ = ["two_label_distance", "volume_distance", "tissue_distance_quantiles", "tissue_quantiles"]

# Columns gathered per tile in the strided passes: a tile row of 32 float32
# spans two cache lines, so each strided load brings in whole lines that are
# all used, and the tile (32 x a few hundred voxels) stays in L1/L2.
_TILE = 32
# Sites searched by brute force on either side of a voxel before falling back
# to the exact lower envelope for that line.
_REACH = 32
# Tiles gathered together, so that strided passes read whole cache lines
# and few pages per step.
_GROUP = 4
# Rows of a tile searched to a common reach.
_BLOCK = 8
# Work items per thread: the scheduler hands chunks out dynamically, so a
# thread slowed by another process does not hold the others back.
_CHUNKS_PER_THREAD = 8


def two_label_distance(mask, *, spacing, threads=None):
    """Distance of every voxel to the nearest voxel of the other class.

    Parameters
    ----------
    mask : (Z, Y, X) or (Y, X) bool ndarray
        The two classes (e.g. vessel True, tissue False).
    spacing : tuple of float, length ``mask.ndim``
        Voxel size along each axis, in the unit of the result.
    threads : int, optional
        Threads to use; the analysis's thread budget by default
        (:func:`pipeline._parallel.threads`).

    Returns
    -------
    (Z, Y, X) or (Y, X) float32 ndarray, C-contiguous
        Euclidean distance from each voxel centre to the nearest voxel centre
        of the other class; +inf where the other class is absent. The array
        faces are not background.

    Examples
    --------
    >>> m = np.zeros((1, 5), dtype=bool); m[0, 1:3] = True
    >>> two_label_distance(m, spacing=(1.0, 2.0))
    array([[2., 2., 2., 2., 4.]], dtype=float32)
    """
    mask = np.asarray(mask)
    if mask.dtype != np.bool_:
        raise TypeError(f"mask must be bool, got {mask.dtype}")
    if mask.ndim not in (2, 3):
        raise ValueError(f"mask must be 2-D or 3-D, got {mask.ndim}-D")
    spacing = tuple(float(s) for s in spacing)
    if len(spacing) != mask.ndim or not all(s > 0 and math.isfinite(s) for s in spacing):
        raise ValueError(f"spacing must be {mask.ndim} positive numbers, got {spacing}")
    shape = mask.shape
    if mask.ndim == 2:
        mask, spacing = mask[None], (1.0,) + spacing
    mask = np.ascontiguousarray(mask)
    out = np.empty(mask.shape, dtype=np.float32)
    if out.size == 0:
        return out.reshape(shape)
    dz2, dy2, dx2 = (s * s for s in spacing)
    start_threads()
    previous = numba.get_num_threads()
    n = _threads() if threads is None else max(1, min(int(threads), numba.config.NUMBA_NUM_THREADS))
    numba.set_num_threads(n)
    try:
        # A single plane is finished by the in-plane passes (no z pass).
        flat = mask.shape[0] == 1
        with numba.parallel_chunksize(1):
            _planes(mask, out, dy2, dx2, min(mask.shape[0], n * _CHUNKS_PER_THREAD), flat)
            if not flat:
                items = mask.shape[1] * (-(-mask.shape[2] // (_GROUP * _TILE)))
                _depth(mask, out, dz2, min(items, n * _CHUNKS_PER_THREAD))
    finally:
        numba.set_num_threads(previous)
    return out.reshape(shape)


def volume_distance(crop, *, offset, shape, spacing):
    """Two-label distance map of the whole volume around a cropped vessel mask.

    Parameters
    ----------
    crop : (z, y, x) or (y, x) bool ndarray
        Vessel mask of the crop; everything outside it is tissue.
    offset : sequence of int
        Index of ``crop``'s first voxel in the volume.
    shape : sequence of int
        Shape of the volume.
    spacing : sequence of float

    Returns
    -------
    full : float32 ndarray of ``shape``
        See :func:`two_label_distance`.
    inside : tuple of slice
        Where the crop lies in ``full``.
    """
    inside = tuple(slice(int(o), int(o) + n) for o, n in zip(offset, crop.shape))
    vessel = np.zeros(tuple(int(n) for n in shape), dtype=bool)
    vessel[inside] = crop
    full = two_label_distance(vessel, spacing=tuple(float(s) for s in spacing))
    return full, inside


def tissue_distance_quantiles(full, crop, inside):
    """Median and 95th percentile of the tissue voxels' distance to the nearest vessel.

    ``full`` and ``inside`` come from :func:`volume_distance` with ``crop``;
    the vessel voxels of ``full`` are set to 0 in place.
    """
    np.putmask(full[inside], crop, 0.0)
    return tissue_quantiles(full.reshape(-1), int(full.size - np.count_nonzero(crop)))


@numba.njit(cache=True)
def _row(m, f, d2):
    """Squared distance along a row to the nearest voxel of the other class."""
    n = m.shape[0]
    a = 0
    while a < n:
        b = a
        while b + 1 < n and m[b + 1] == m[a]:
            b += 1
        for p in range(a, b + 1):
            # Run bounds a-1 and b+1 are the nearest other-class voxels.
            k = n + 1
            if a > 0:
                k = p - a + 1
            if b < n - 1 and b + 1 - p < k:
                k = b + 1 - p
            f[p] = np.inf if k > n else d2 * k * k
        a = b + 1


@numba.njit(cache=True)
def _column(m, f, n, d2, v, g, zb, root):
    """Lower envelope along one line, run by run, in place in ``f[:n]``.

    ``f`` holds each voxel's squared distance to the other class within the
    lower dimensions; ``m`` the classes. ``v``, ``g`` and ``zb`` are scratch
    of length ``n + 3`` (sites, their values, envelope breakpoints). With
    ``root`` the square root is stored.
    """
    inv = 1.0 / d2
    a = 0
    while a < n:
        b = a
        while b + 1 < n and m[b + 1] == m[a]:
            b += 1
        # Sites: the other-class voxel before the run (value 0), the run's
        # voxels with a finite value, the other-class voxel after it.
        k = -1
        for q in range(a - 1, b + 2):
            if q < a:
                if a == 0:
                    continue
                fq = 0.0
            elif q > b:
                if b == n - 1:
                    continue
                fq = 0.0
            else:
                fq = np.float64(f[q])
                if fq == np.inf:
                    continue
            qf = np.float64(q)
            if k < 0:
                k = 0
                v[0] = qf
                g[0] = fq
                zb[0] = -np.inf
                zb[1] = np.inf
                continue
            s = ((fq - g[k]) * inv + (qf + v[k]) * (qf - v[k])) / (2.0 * (qf - v[k]))
            # zb[0] is -inf, so the envelope never empties.
            while s <= zb[k]:
                k -= 1
                s = ((fq - g[k]) * inv + (qf + v[k]) * (qf - v[k])) / (2.0 * (qf - v[k]))
            k += 1
            v[k] = qf
            g[k] = fq
            zb[k] = s
            zb[k + 1] = np.inf
        if k < 0:
            for p in range(a, b + 1):
                f[p] = np.inf
        else:
            j = 0
            for p in range(a, b + 1):
                while zb[j + 1] < p:
                    j += 1
                t = p - v[j]
                val = g[j] + d2 * t * t
                f[p] = math.sqrt(val) if root else val
        a = b + 1


@numba.njit(cache=True)
def _window(c, n, d2, res, best, top):
    """Lines of a tile in lockstep, sites within ``_REACH`` voxels.

    ``c`` holds the site costs of ``_TILE`` adjacent lines: lanes
    ``[0, _TILE)`` for True voxels (their value; 0 at False voxels), lanes
    ``[_TILE, 2 _TILE)`` the other way round, padded by ``_REACH`` rows of
    +inf at both ends. In a voxel's own lane the minimum is its answer; in
    the other lane it is 0 (the voxel itself), so the answer is the larger.
    Returns how many answers exceed what the window proves exact.
    """
    lanes = 2 * _TILE
    exact = np.float32(d2 * (_REACH + 1) * (_REACH + 1))
    missed = 0
    for p0 in range(0, n, _BLOCK):
        p1 = min(p0 + _BLOCK, n)
        for p in range(p0, p1):
            for j in range(lanes):
                best[p, j] = c[_REACH + p, j]
        k = 1
        while k <= _REACH:
            # The block's largest value bounds the distance still worth
            # searching; an elementwise maximum over rows vectorises where a
            # per-row reduction would not.
            for j in range(lanes):
                top[j] = 0.0
            for p in range(p0, p1):
                for j in range(lanes):
                    x = best[p, j]
                    top[j] = x if x > top[j] else top[j]
            mx = 0.0
            for j in range(lanes):
                if top[j] > mx:
                    mx = top[j]
            if not d2 * k * k < mx:
                break
            # Check again after doubling the reach, so a block pays for a
            # few checks only.
            kend = min(max(2 * k - 1, 1), _REACH)
            if mx < np.inf:
                kend = min(kend, int(math.sqrt(mx / d2)) + 1)
            for kk in range(k, kend + 1):
                t = np.float32(d2 * kk * kk)
                for p in range(p0, p1):
                    lo = _REACH + p - kk
                    hi = _REACH + p + kk
                    for j in range(lanes):
                        x = c[lo, j] if c[lo, j] < c[hi, j] else c[hi, j]
                        x = x + t
                        y = best[p, j]
                        best[p, j] = x if x < y else y
            k = kend + 1
        for p in range(p0, p1):
            for i in range(_TILE):
                r = best[p, i] if best[p, i] > best[p, _TILE + i] else best[p, _TILE + i]
                res[p, i] = r
                if r > exact:
                    missed += 1
    return missed


@numba.njit(cache=True)
def _tile(c, n, d2, res, scratch):
    """Minimum over each line's sites of value + squared distance."""
    best, top, fcol, mcol, v, g, zb = scratch
    if _window(c, n, d2, res, best, top) == 0:
        return
    exact = np.float32(d2 * (_REACH + 1) * (_REACH + 1))
    for i in range(_TILE):
        far = False
        for q in range(n):
            if res[q, i] > exact:
                far = True
                break
        if not far:
            continue
        for q in range(n):
            fcol[q] = c[_REACH + q, i] + c[_REACH + q, _TILE + i]
            mcol[q] = c[_REACH + q, _TILE + i] == 0.0
        _column(mcol, fcol, n, d2, v, g, zb, False)
        for q in range(n):
            res[q, i] = fcol[q]


@numba.njit(cache=True)
def _buffers(n):
    c = np.empty((_GROUP, n + 2 * _REACH, 2 * _TILE), dtype=np.float32)
    c[:, :_REACH] = np.inf
    c[:, _REACH + n:] = np.inf
    res = np.empty((_GROUP, n, _TILE), dtype=np.float32)
    scratch = (np.empty((n, 2 * _TILE), dtype=np.float32), np.empty(2 * _TILE, dtype=np.float32),
               np.empty(n, dtype=np.float32), np.empty(n, dtype=np.bool_),
               np.empty(n + 3), np.empty(n + 3), np.empty(n + 3))
    return c, res, scratch


@numba.njit(cache=True, parallel=True)
def _planes(mask, out, dy2, dx2, nchunks, root):
    """x then y pass, plane by plane, while a plane is still in cache."""
    nz, ny, nx = mask.shape
    span = _GROUP * _TILE
    for ch in prange(nchunks):
        c, res, scratch = _buffers(ny)
        for z in range(ch * nz // nchunks, (ch + 1) * nz // nchunks):
            for y in range(ny):
                _row(mask[z, y], out[z, y], dx2)
            for x0 in range(0, nx, span):
                _columns(mask, out, z, x0, False, dy2, root, c, res, scratch)


@numba.njit(cache=True, parallel=True)
def _depth(mask, out, dz2, nchunks):
    """z pass and square root, on groups of adjacent x columns."""
    nz, ny, nx = mask.shape
    span = _GROUP * _TILE
    ngroups = (nx + span - 1) // span
    items = ny * ngroups
    for ch in prange(nchunks):
        c, res, scratch = _buffers(nz)
        for item in range(ch * items // nchunks, (ch + 1) * items // nchunks):
            y = item // ngroups
            _columns(mask, out, y, (item - y * ngroups) * span, True, dz2, True, c, res, scratch)


@numba.njit(cache=True)
def _columns(mask, out, fixed, x0, along_z, d2, root, c, res, scratch):
    """One strided pass over a group of adjacent x columns starting at ``x0``.

    Along y in plane ``z = fixed``, or along z in row ``y = fixed``.
    """
    n = out.shape[0] if along_z else out.shape[1]
    for i in range(n):
        z, y = (i, fixed) if along_z else (fixed, i)
        _gather(mask, out, z, y, x0, c, _REACH + i)
    for t in range(min(_GROUP, (out.shape[2] - x0 + _TILE - 1) // _TILE)):
        _tile(c[t], n, d2, res[t], scratch)
    for i in range(n):
        z, y = (i, fixed) if along_z else (fixed, i)
        _scatter(res, out, z, y, x0, i, root)


@numba.njit(cache=True)
def _gather(mask, out, z, y, x0, c, r):
    """Split a row segment into the True and False cost lanes of row ``r``."""
    w = min(_GROUP * _TILE, out.shape[2] - x0)
    for x in range(w):
        t, i = divmod(x, _TILE)
        val = out[z, y, x0 + x]
        m = mask[z, y, x0 + x]
        c[t, r, i] = val if m else np.float32(0.0)
        c[t, r, _TILE + i] = np.float32(0.0) if m else val
    # Lanes past the array's edge cost 0: they finish at once, unflagged.
    for x in range(w, ((w + _TILE - 1) // _TILE) * _TILE):
        t, i = divmod(x, _TILE)
        c[t, r, i] = 0.0
        c[t, r, _TILE + i] = 0.0


@numba.njit(cache=True)
def _scatter(res, out, z, y, x0, r, root):
    w = min(_GROUP * _TILE, out.shape[2] - x0)
    for x in range(w):
        t, i = divmod(x, _TILE)
        out[z, y, x0 + x] = math.sqrt(res[t, r, i]) if root else res[t, r, i]


def tissue_quantiles(flat, n_tissue):
    """Median and 95th percentile of tissue distances.

    ``flat`` holds 0 for vessel voxels and a positive distance for each of
    the ``n_tissue`` tissue voxels, so the tissue quantiles (numpy's default,
    linear definition) are order statistics of ``flat`` shifted by the vessel
    count. They are selected exactly in two compiled passes (a histogram
    locates the bin of each order statistic, then that bin's values are
    sorted), without copying the map.
    """
    if n_tissue <= 0:
        return 0.0, 0.0
    n_vessel = flat.size - n_tissue
    ranks = [n_vessel + q * (n_tissue - 1) for q in (0.5, 0.95)]
    wanted = sorted({int(np.floor(r)) for r in ranks} | {min(int(np.floor(r)) + 1, flat.size - 1) for r in ranks})
    values = dict(zip(wanted, _order_statistics(flat, np.asarray(wanted, dtype=np.int64), _threads())))
    out = []
    for r in ranks:
        lo = int(np.floor(r))
        hi = min(lo + 1, flat.size - 1)
        out.append(float(values[lo] + (r - lo) * (values[hi] - values[lo])))
    return out[0], out[1]


@numba.njit(cache=True, parallel=True)
def _order_statistics(flat, ks, nchunks=1):
    """Exact k-th smallest values of ``flat`` (non-negative) for sorted ranks ``ks``.

    Three passes, the first two split over threads: the maximum, a histogram
    of 65 536 bins, then one gather of the values in the bins that hold the
    wanted ranks, which are sorted.
    """
    nbins = 1 << 16
    n = flat.size
    nchunks = max(1, nchunks)
    step = (n + nchunks - 1) // nchunks
    his = np.zeros(nchunks, dtype=np.float64)
    for c in prange(nchunks):
        h = 0.0
        for i in range(c * step, min(n, (c + 1) * step)):
            if flat[i] > h:
                h = flat[i]
        his[c] = h
    hi = his.max()
    scale = (nbins - 1) / hi if hi > 0 else 0.0
    part = np.zeros((nchunks, nbins), dtype=np.int64)
    for c in prange(nchunks):
        for i in range(c * step, min(n, (c + 1) * step)):
            part[c, int(flat[i] * scale)] += 1
    counts = part.sum(axis=0)
    cum = np.cumsum(counts)
    # Each wanted rank's bin gets a slot; ranks sharing a bin share it.
    slot_of = np.full(nbins, -1, dtype=np.int64)
    bins = np.empty(len(ks), dtype=np.int64)
    nslots = 0
    for j in range(len(ks)):
        b = np.searchsorted(cum, ks[j], side="right")
        bins[j] = b
        if slot_of[b] < 0:
            slot_of[b] = nslots
            nslots += 1
    starts = np.zeros(nslots + 1, dtype=np.int64)
    for j in range(len(ks)):
        b = bins[j]
        starts[slot_of[b] + 1] = counts[b]
    starts = np.cumsum(starts)
    vals = np.empty(starts[-1], dtype=flat.dtype)
    fill = starts[:-1].copy()
    for i in range(n):
        sl = slot_of[int(flat[i] * scale)]
        if sl >= 0:
            vals[fill[sl]] = flat[i]
            fill[sl] += 1
    for sl in range(nslots):
        vals[starts[sl]:starts[sl + 1]].sort()
    out = np.empty(len(ks), dtype=flat.dtype)
    for j in range(len(ks)):
        b = bins[j]
        before = cum[b - 1] if b > 0 else 0
        out[j] = vals[starts[slot_of[b]] + ks[j] - before]
    return out
