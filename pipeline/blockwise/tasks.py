"""The work of one block: centrelines with their radii, tissue distances, wall fits.

In: the cleaned crop as runs (:class:`pipeline.cleaning.CleanedRuns`, or
anything with its ``region(lo, hi)``), a :class:`~pipeline.blockwise.plan.Block`
of a :class:`~pipeline.blockwise.plan.Frame`, and the options of the
centrelines and radii steps. Out: plain arrays (the block's centreline
voxels in its core, their radii, a histogram of its tissue voxels'
distances; or the wall fits of the points in its core), small enough to
send between processes.

Each task paints its block grown by a halo from the runs, and runs the same
functions as the in-memory steps (:func:`pipeline.thinning.thin`,
:func:`pipeline._distance.two_label_distance`, the ridge correction, the
in-plane radii of coarse stacks, :func:`pipeline.radii.fit_wall_points`).
What a voxel of the core gets depends only on the mask within a few radii
of it, so the halo makes the core's answer the whole volume's:

- thinning erodes a vessel cut by the block's face back by about its radius
  and leaves everything deeper as it was (the subfields keep their phase,
  :mod:`pipeline.blockwise.plan`);
- a vessel voxel's distance to tissue is at most the largest radius;
- a wall fit reads the mask within ``2 r + 2`` voxels of its point, plus the
  slab's half-width.

The halo is measured, not guessed: each task reads the largest distance to
tissue in its extent and, when the halo is narrower than
:func:`needed_halo` of it, grows the halo and starts again.

Tissue voxels can lie far from every vessel, further than any halo, so
their distances are exact only up to the halo: each task returns two
histograms (counts and sums per bin of 1 % of the finest spacing), of the
distance found within its extent (an upper bound) and of what is proven
(the smaller of that and the distance to the extent's faces inside the
volume); the quantiles of both bracket the true ones.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from .._distance import two_label_distance
from ..centrelines import _edge_pads, _in_plane_distance, _in_plane_radii, _inner_voxels, _ridge, resampled_inside
from ..radii import fit_wall_points
from ..thinning import thin

__all__ = ["needed_halo", "centreline_block", "tissue_block", "wall_block", "histogram_bins"]

# The halo in the largest radii found in the extent, plus voxels. Thinning
# erodes a vessel cut by the extent's face back by about its radius, and a
# vessel voxel's distance to tissue is at most the largest radius: one and a
# half radii leave a margin. A wall fit reads two radii and two voxels
# beyond its point, plus a slab of 0.75 radius (pipeline/radii.py).
CENTRELINE_HALO_RADII = 1.5
WALL_HALO_RADII = 3.0
_HALO_VOXELS = 4


def needed_halo(rmax_um, spacing, *, radii=WALL_HALO_RADII):
    """Halo (voxels per axis, even) for vessels up to ``rmax_um`` on a grid of ``spacing``."""
    sp = np.asarray(spacing, dtype=float)
    reach = radii * float(rmax_um) + 2.0 * float(sp.min()) + float(sp.max())
    h = np.ceil(reach / sp).astype(int) + _HALO_VOXELS
    return tuple(int(v + v % 2) for v in h)


def histogram_bins(spacing, original_shape):
    """Bin width (µm) and count of the tissue-distance histograms: 1 % of the finest spacing, up to the diagonal."""
    sp = np.asarray(spacing, dtype=float)
    width = 0.01 * float(sp.min())
    diagonal = float(np.sqrt((((np.asarray(original_shape) - 1) * sp) ** 2).sum()))
    return width, int(diagonal / width) + 2


def _paint(runs, crop_offset, lo, hi):
    """The cleaned mask over the original-grid box ``[lo, hi)`` (zero outside the crop)."""
    shape = tuple(b - a for a, b in zip(lo, hi))
    m = np.zeros(shape, dtype=bool)
    c_lo = [min(max(a - o, 0), n) for a, o, n in zip(lo, crop_offset, runs.shape)]
    c_hi = [min(max(b - o, 0), n) for b, o, n in zip(hi, crop_offset, runs.shape)]
    if all(b > a for a, b in zip(c_lo, c_hi)):
        at = tuple(slice(a + o - l, b + o - l) for a, b, o, l in zip(c_lo, c_hi, crop_offset, lo))
        m[at] = runs.region(c_lo, c_hi).paint()
    return m, c_lo, c_hi


def _largest_radius(dist, mask):
    r = float(np.max(dist, where=mask, initial=0.0))
    return r if math.isfinite(r) else float("inf")


def _pads(frame_lo, frame_hi, thin_lo, thin_hi, border, width):
    """Edge pads of a block's thinned box: ``width`` where it reaches a crop face on the volume border."""
    faces = [(bool(lo_b and a == flo), bool(hi_b and b == fhi))
             for (lo_b, hi_b), a, b, flo, fhi in zip(border, thin_lo, thin_hi, frame_lo, frame_hi)]
    return _edge_pads(faces, width)


def _tissue_histograms(dist, mask, core, lo, hi, shape, spacing, bins):
    """Histograms (upper bound, proven) of the tissue voxels of ``core`` (slices into the extent).

    Each is (2, n): counts and sums of the distances per bin. A bin's mean
    is its value wherever the bin holds one distinct distance (lattice
    distances near d lie about s^2 / (2 d) apart, more than the bin up to
    d = 50 s).
    """
    width, n = bins
    sp = np.asarray(spacing, dtype=float)
    # Per axis, the distance from each core index to the first plane beyond
    # the extent on faces inside the volume: no vessel outside is nearer.
    gaps = []
    for a in range(3):
        idx = np.arange(core[a].start, core[a].stop)
        g = np.full(len(idx), np.inf)
        if lo[a] > 0:
            g = np.minimum(g, (idx + 1) * sp[a])
        if hi[a] < shape[a]:
            g = np.minimum(g, (dist.shape[a] - idx) * sp[a])
        gaps.append(g)
    up = np.zeros((2, n))
    pr = np.zeros((2, n))
    _histograms(dist, mask, np.array([c.start for c in core], np.int64), gaps[0], gaps[1], gaps[2], float(width),
                up, pr)
    return up, pr


@numba.njit(cache=True)
def _histograms(dist, mask, start, g0, g1, g2, width, up, pr):
    n = up.shape[1]
    cap = (n - 2) * width
    for i in range(len(g0)):
        z = start[0] + i
        for j in range(len(g1)):
            y = start[1] + j
            gzy = min(g0[i], g1[j])
            for k in range(len(g2)):
                x = start[2] + k
                if mask[z, y, x]:
                    continue
                d = min(np.float64(dist[z, y, x]), cap)
                b = int(d / width)
                up[0, b] += 1.0
                up[1, b] += d
                q = min(d, min(gzy, g2[k]))
                b = int(q / width)
                pr[0, b] += 1.0
                pr[1, b] += q


def centreline_block(runs, block, *, frame, crop_offset, original_shape, spacing, pad_width, halo, ridge=True,
                     bins=None):
    """Centreline voxels of a block's core with their radii (and, on the original grid, its tissue distances).

    Parameters
    ----------
    runs : CleanedRuns
        The cleaned crop.
    frame : Frame
    block : Block
        On ``frame``.
    crop_offset, original_shape : sequence of 3 int
    spacing : sequence of 3 float
        Original voxel spacing, µm.
    pad_width : int
        Edge padding of the crop's faces on the volume border
        (:func:`pipeline.centrelines._pad_width`).
    halo : sequence of 3 int
        First halo, grid voxels; grown when the extent holds wider vessels.
    ridge : bool
        The ridge correction of the radii.
    bins : (float, int) or None
        Tissue-distance histogram bins (:func:`histogram_bins`); on the
        original grid only.

    Returns
    -------
    dict
        ``voxels`` (K, 3) int64 on the frame, ``radii_um`` (K,), ``halo``
        used, ``rmax_um`` the largest distance to tissue in the extent, and
        with ``bins`` the histograms ``tissue_upper``, ``tissue_proven``.
    """
    halo = tuple(int(h) for h in halo)
    while True:
        lo, hi = block.extent(halo, frame.shape)
        out = (_resampled_block if frame.resampled else _original_block)(
            runs, frame, block, lo, hi, crop_offset=crop_offset, original_shape=original_shape, spacing=spacing,
            pad_width=pad_width, ridge=ridge, bins=bins, halo=halo)
        if "voxels" in out:
            out["halo"] = halo
            return out
        need = needed_halo(out["rmax_um"], frame.spacing, radii=CENTRELINE_HALO_RADII)
        halo = tuple(max(n, h) for n, h in zip(need, halo))


def _too_narrow(rmax_um, frame, lo, hi, halo):
    """Whether ``halo`` is narrower than the vessels of the extent need (and the extent could grow)."""
    need = needed_halo(rmax_um, frame.spacing, radii=CENTRELINE_HALO_RADII)
    whole = all(a == 0 and b == n for a, b, n in zip(lo, hi, frame.shape))
    return not whole and any(n > h for n, h in zip(need, halo))


def _original_block(runs, frame, block, lo, hi, *, crop_offset, original_shape, spacing, pad_width, ridge, bins,
                    halo):
    m, c_lo, c_hi = _paint(runs, crop_offset, lo, hi)
    dist = two_label_distance(m, spacing=tuple(float(s) for s in spacing))
    out = {"rmax_um": _largest_radius(dist, m)}
    if _too_narrow(out["rmax_um"], frame, lo, hi, halo):
        return out
    core = tuple(slice(a - e, b - e) for a, b, e in zip(block.lo, block.hi, lo))
    if bins is not None:
        out["tissue_upper"], out["tissue_proven"] = _tissue_histograms(dist, m, core, lo, hi, original_shape,
                                                                       spacing, bins)
    # Thin the crop's part of the extent: outside it there is no vessel, and
    # the crop's first voxel sets the subfields' phase.
    t_lo = [a + o - e for a, o, e in zip(c_lo, crop_offset, lo)]
    t_hi = [b + o - e for b, o, e in zip(c_hi, crop_offset, lo)]
    vox = np.zeros((0, 3), dtype=np.int64)
    radii = np.zeros(0)
    if all(b > a for a, b in zip(t_lo, t_hi)):
        border = [(o == 0, o + n == N) for o, n, N in zip(crop_offset, runs.shape, original_shape)]
        pads = _pads((0, 0, 0), runs.shape, c_lo, c_hi, border, pad_width)
        box = tuple(slice(a, b) for a, b in zip(t_lo, t_hi))
        skel = thin(m[box], edge_pad=pads)
        vox = _inner_voxels(skel, pads) + np.asarray(t_lo)
        del skel
        inside = np.all((vox >= [c.start for c in core]) & (vox < [c.stop for c in core]), axis=1)
        vox = vox[inside]
        radii = _ridge(dist, vox, m) if ridge else dist[tuple(vox.T)].astype(np.float64)
    out["voxels"] = vox + np.asarray(lo)
    out["radii_um"] = np.asarray(radii, dtype=np.float64)
    return out


def _resampled_block(runs, frame, block, lo, hi, *, crop_offset, original_shape, spacing, pad_width, ridge, bins,
                     halo):
    sp = np.asarray(spacing, dtype=float)
    t = float(frame.spacing[0])
    scale = t / sp
    # The crop's voxels the linear interpolation of the extent reads, and one more.
    c_lo = [max(int(np.floor(a * s)) - 1, 0) for a, s in zip(lo, scale)]
    c_hi = [min(int(np.ceil((b - 1) * s)) + 2, n) for b, s, n in zip(hi, scale, runs.shape)]
    m = runs.region(c_lo, c_hi).paint()
    phi = two_label_distance(m, spacing=tuple(sp))
    out = {"rmax_um": _largest_radius(phi, m)}
    if _too_narrow(out["rmax_um"], frame, lo, hi, halo):
        return out
    np.negative(phi, out=phi, where=~m)
    shape = tuple(b - a for a, b in zip(lo, hi))
    fine = resampled_inside(phi, scale, first=lo, shape=shape, origin=c_lo)
    del phi
    border = [(o == 0, o + n == N) for o, n, N in zip(crop_offset, runs.shape, original_shape)]
    pads = _pads((0, 0, 0), frame.shape, lo, hi, border, pad_width)
    skel = thin(fine, edge_pad=pads)
    vox = _inner_voxels(skel, pads)
    del skel
    core = (vox >= np.asarray(block.lo) - lo) & (vox < np.asarray(block.hi) - lo)
    vox = vox[np.all(core, axis=1)]
    if frame.coarse is not None:
        plane = _in_plane_distance(m, sp, frame.coarse)
        radii = _in_plane_radii(plane, sp, frame.coarse, (vox + lo) * t, ridge=ridge, origin_index=c_lo)
    else:
        dist = two_label_distance(fine, spacing=(t, t, t))
        radii = _ridge(dist, vox, fine) if ridge else dist[tuple(vox.T)].astype(np.float64)
    out["voxels"] = vox + np.asarray(lo)
    out["radii_um"] = np.asarray(radii, dtype=np.float64)
    return out


def tissue_block(runs, block, *, crop_offset, original_shape, spacing, halo, bins):
    """Tissue-distance histograms of a block of the original grid (for resampled stacks)."""
    lo, hi = block.extent(halo, tuple(original_shape))
    m, _, _ = _paint(runs, crop_offset, lo, hi)
    dist = two_label_distance(m, spacing=tuple(float(s) for s in spacing))
    core = tuple(slice(a - e, b - e) for a, b, e in zip(block.lo, block.hi, lo))
    up, pr = _tissue_histograms(dist, m, core, lo, hi, original_shape, spacing, bins)
    return {"tissue_upper": up, "tissue_proven": pr}


def wall_block(runs, block, *, crop_offset, original_shape, spacing, points_um, tangents, radii_um):
    """Wall fits (:func:`pipeline.radii.fit_wall_points`) of points in a block's core of the original grid."""
    if len(radii_um) == 0:
        z = np.zeros(0)
        return {"plain": z, "mean": z, "nfit": np.zeros(0, np.int64)}
    halo = needed_halo(float(np.max(radii_um)), spacing)
    lo, hi = block.extent(halo, tuple(original_shape))
    m, _, _ = _paint(runs, crop_offset, lo, hi)
    plain, mean, nfit = fit_wall_points(m, spacing=spacing, offset=lo, points_um=points_um, tangents=tangents,
                                        radii_um=radii_um, frame_offset=crop_offset)
    return {"plain": plain, "mean": mean, "nfit": nfit}
