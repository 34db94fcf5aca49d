"""Step 1, clean-up: drop small pieces, fill enclosed cavities, crop.

In: a boolean mask ``(Z, Y, X)`` and its voxel spacing in µm.
Out: :class:`CleanedMask`, the mask cropped to the bounding box of what is
kept, with the crop offset into the original grid and counts of what changed.

Pieces are 26-connected (the foreground connectivity used throughout); the
background is 6-connected, the complementary choice, so a cavity is a
6-connected background region that touches no face of the volume. Planar
masks use the 2-D pair, 8-connected vessel and 4-connected background.

Both are found on runs, not voxels: each row (fixed z and y) of the mask is
listed as its runs of vessel voxels in one parallel scan, and runs are joined
with a union-find where they touch runs of the rows before them (26-adjacent:
overlapping once widened by one voxel; 6-adjacent: overlapping). A vessel
volume has a few runs per row, so this labels a 512^3 stack several times
faster than a labelled voxel volume would, and with no label volume at all:
the pieces' sizes are sums of run lengths, the cavities the background runs
(the gaps between kept runs) whose component reaches no face.
"""

from __future__ import annotations

from dataclasses import dataclass

import numba
from numba import prange
import numpy as np

from ._parallel import threads as _threads
from .errors import InputError

__all__ = ["CleanedMask", "CleanedRuns", "clean_mask", "clean_runs", "mask_runs", "piece_elongation"]


@dataclass
class CleanedMask:
    """Result of :func:`clean_mask`.

    Attributes
    ----------
    mask : (Z', Y', X') bool ndarray
        Cleaned mask cropped to its bounding box plus one voxel of
        background on every face that is not the volume's edge;
        C-contiguous.
    offset : tuple of 3 int
        Index of ``mask[0, 0, 0]`` in the original grid.
    original_shape : tuple of 3 int
        Shape of the mask before cropping.
    spacing : tuple of 3 float
        Voxel spacing in µm, ``(dz, dy, dx)``.
    stats : dict
        ``removed_pieces``, ``removed_volume_um3``, ``filled_cavity_voxels``,
        ``kept_pieces``, ``kept_elongated_pieces`` (kept below the size
        limit by their shape), ``vessel_voxels``.
    """

    mask: np.ndarray
    offset: tuple[int, int, int]
    original_shape: tuple[int, int, int]
    spacing: tuple[float, float, float]
    stats: dict


def clean_mask(mask, *, spacing, min_object_volume_um3=1000.0, min_object_area_um2=100.0, keep_elongation=3.0,
               fill_cavities=True, planar=False):
    """Remove small 26-connected pieces, fill cavities and crop.

    Parameters
    ----------
    mask : (Z, Y, X) bool ndarray
        Vessel mask; planar masks have ``Z == 1``.
    spacing : sequence of 3 float
        Voxel spacing ``(dz, dy, dx)`` in µm.
    min_object_volume_um3 : float
        Pieces with a smaller volume are dropped (3-D masks).
    min_object_area_um2 : float
        Pieces with a smaller area are dropped (planar masks).
    keep_elongation : float
        A piece below the size limit is kept when it is at least this many
        times longer, within the planes, than it is wide
        (:func:`piece_elongation`): a piece of a thin vessel cut off by a
        gap, not a speck. 0 drops every small piece.
    fill_cavities : bool
        Fill background regions enclosed by vessel (segmentation holes).
    planar : bool
        The mask is one plane; cavities are then holes in the plane.

    Returns
    -------
    CleanedMask

    Raises
    ------
    InputError
        If nothing is left after clean-up.

    Examples
    --------
    >>> m = np.zeros((5, 5, 5), bool); m[1:4, 1:4, 1:4] = True; m[2, 2, 2] = False
    >>> c = clean_mask(m, spacing=(1, 1, 1), min_object_volume_um3=0)
    >>> c.mask.shape, int(c.mask.sum()), c.offset
    ((5, 5, 5), 27, (0, 0, 0))
    """
    spacing = tuple(float(s) for s in spacing)
    mask = np.ascontiguousarray(mask, dtype=bool)
    threads = _threads()
    rows, x0, x1 = _runs(mask, threads)
    runs = clean_runs(rows, x0, x1, mask.shape, spacing=spacing, min_object_volume_um3=min_object_volume_um3,
                      min_object_area_um2=min_object_area_um2, keep_elongation=keep_elongation,
                      fill_cavities=fill_cavities, planar=planar)
    del mask
    return CleanedMask(
        mask=runs.paint(threads),
        offset=runs.offset,
        original_shape=runs.original_shape,
        spacing=spacing,
        stats=runs.stats,
    )



@dataclass
class CleanedRuns:
    """The cleaned, cropped mask as runs of vessel voxels along x (no volume).

    The same mask as :attr:`CleanedMask.mask`, held as the runs of each row
    (``row = z * Y' + y`` of the crop), so a volume that does not fit in
    memory can be cleaned whole and painted back block by block
    (:meth:`paint`).

    Attributes
    ----------
    rows, x0, x1 : (K,) int ndarray
        Runs of kept vessel voxels: crop row, first x, x past the last;
        sorted by row.
    cavity_rows, cavity_x0, cavity_x1 : (C,) int ndarray
        Runs of filled cavities, sorted by row.
    shape : tuple of 3 int
        Shape of the crop.
    offset, original_shape, stats
        As for :class:`CleanedMask`.
    """

    rows: np.ndarray
    x0: np.ndarray
    x1: np.ndarray
    cavity_rows: np.ndarray
    cavity_x0: np.ndarray
    cavity_x1: np.ndarray
    shape: tuple[int, int, int]
    offset: tuple[int, int, int]
    original_shape: tuple[int, int, int]
    stats: dict

    def region(self, lo, hi):
        """The runs inside the crop box ``[lo, hi)``, in that box's frame (a smaller :class:`CleanedRuns`).

        Its ``offset`` is the box's first voxel in the original grid.
        """
        lo = [int(v) for v in lo]
        hi = [int(v) for v in hi]
        shape = tuple(b - a for a, b in zip(lo, hi))
        parts = []
        for rows, x0, x1 in ((self.rows, self.x0, self.x1), (self.cavity_rows, self.cavity_x0, self.cavity_x1)):
            parts.append(_clip_runs(rows, x0, x1, self.shape[1], lo, hi))
        return CleanedRuns(*parts[0], *parts[1], shape=shape,
                           offset=tuple(int(o) + a for o, a in zip(self.offset, lo)),
                           original_shape=self.original_shape, stats=self.stats)

    def paint(self, threads=None):
        """The mask of these runs, ``shape`` bool, C-contiguous."""
        threads = _threads() if threads is None else threads
        out = np.empty(self.shape, dtype=bool)
        if out.size == 0:
            return out
        flat = out.reshape(-1, self.shape[2])
        _paint(flat, self.rows, self.x0, self.x1, True, threads)
        if len(self.cavity_rows):
            _paint(flat, self.cavity_rows, self.cavity_x0, self.cavity_x1, False, threads)
        return out

    def face(self, axis, side):
        """The plane of the crop at index 0 (``side`` 0) or at the end (``side`` 1) of ``axis``, bool 2-D."""
        n = self.shape[axis]
        lo = [0, 0, 0]
        hi = list(self.shape)
        lo[axis] = 0 if side == 0 else n - 1
        hi[axis] = lo[axis] + 1
        return np.take(self.region(lo, hi).paint(), 0, axis=axis)


def _clip_runs(rows, x0, x1, ny, lo, hi):
    """Runs of rows within ``[lo, hi)`` (z, y), clipped to ``[lo[2], hi[2])`` in x and re-based.

    Rows are sorted, so each plane's rows of the box are one slice of the
    runs, found by bisection: the cost follows the box, not the volume.
    """
    z = np.arange(lo[0], hi[0], dtype=np.int64)
    first = np.searchsorted(rows, z * ny + lo[1])
    last = np.searchsorted(rows, z * ny + hi[1])
    n = last - first
    idx = np.repeat(first - np.r_[0, np.cumsum(n)[:-1]], n) + np.arange(int(n.sum()))
    r, a, b = rows[idx], np.maximum(x0[idx], lo[2]), np.minimum(x1[idx], hi[2])
    keep = a < b
    zz, yy = np.divmod(r[keep], ny)
    nrow = (zz - lo[0]) * (hi[1] - lo[1]) + (yy - lo[1])
    return nrow.astype(np.int64), (a[keep] - lo[2]).astype(np.int32), (b[keep] - lo[2]).astype(np.int32)


def clean_runs(rows, x0, x1, shape, *, spacing, min_object_volume_um3=1000.0, min_object_area_um2=100.0,
               keep_elongation=3.0, fill_cavities=True, planar=False):
    """:func:`clean_mask` on the runs of a mask: the same decisions, with no volume.

    Parameters
    ----------
    rows, x0, x1 : (K,) ndarray
        Runs of vessel voxels of the whole mask: row ``z * Y + y`` (int64,
        sorted), first x and x past the last (int32). Consumed (reordered in
        place).
    shape : tuple of 3 int
        Shape ``(Z, Y, X)`` of the mask.
    spacing, min_object_volume_um3, min_object_area_um2, keep_elongation, fill_cavities, planar
        As for :func:`clean_mask`.

    Returns
    -------
    CleanedRuns
    """
    nz, ny, nx = (int(n) for n in shape)
    voxel_volume = (1.0 if planar else spacing[0]) * spacing[1] * spacing[2]
    if planar:
        min_object_volume_um3 = min_object_area_um2
    piece = _join_runs(rows, x0, x1, ny, nz * ny, True)
    n = int(piece.max()) + 1 if len(piece) else 0
    sizes = _piece_sizes(piece, x0, x1, n)
    keep = sizes * voxel_volume >= min_object_volume_um3
    elongated = 0
    if keep_elongation > 0 and not keep.all():
        small = ~keep
        moments = _piece_moments(piece, rows, x0, x1, ny, small)
        sp = (1.0, spacing[1], spacing[2]) if planar else spacing
        long_ = small & (piece_elongation(moments, sp, planar=planar) >= keep_elongation)
        elongated = int(long_.sum())
        keep |= long_
    removed = int(n - keep.sum())
    removed_volume = float(sizes[~keep].sum() * voxel_volume)
    unit = "µm²" if planar else "µm³"
    if not keep.any():
        raise InputError(
            f"cleaning.{'min_object_area_um2' if planar else 'min_object_volume_um3'}: every vessel piece is "
            f"smaller than {min_object_volume_um3:g} {unit} (largest {sizes.max(initial=0) * voxel_volume:.3g} {unit}); "
            "expected at least one piece to keep: lower the threshold"
        )
    # Tight bounding box of what is kept, plus one voxel of background (where
    # the volume allows), so that later steps treat the crop's faces
    # correctly: a face with a background margin is tissue, a face on the
    # volume's edge is a cut. The kept runs move to the crop's frame in place.
    k, lo, hi = _keep_runs(rows, x0, x1, piece, keep, ny)
    del piece
    box = tuple(slice(max(int(a) - 1, 0), min(int(b) + 1, n_)) for a, b, n_ in zip(lo, hi, (nz, ny, nx)))
    crop = tuple(b.stop - b.start for b in box)
    rows, x0, x1 = rows[:k], x0[:k], x1[:k]
    _to_crop(rows, x0, x1, ny, crop[1], box[0].start, box[1].start, box[2].start)
    empty = (np.zeros(0, np.int64), np.zeros(0, np.int32), np.zeros(0, np.int32))
    cavities = _cavity_runs(crop, rows, x0, x1, planar=planar) if fill_cavities else empty
    filled = int((cavities[2] - cavities[1]).sum())
    stats = {
        "kept_pieces": int(keep.sum()),
        "kept_elongated_pieces": elongated,
        "removed_pieces": removed,
        "removed_volume_um3": removed_volume,
        "filled_cavity_voxels": filled,
        "vessel_voxels": int(sizes[keep].sum()) + filled,
    }
    return CleanedRuns(rows, x0, x1, *cavities, shape=crop, offset=tuple(int(b.start) for b in box),
                       original_shape=(nz, ny, nx), stats=stats)


def mask_runs(mask, *, row_offset=0):
    """Runs of True voxels of a (Z, Y, X) bool block: rows (+ ``row_offset``), first x, x past the last."""
    rows, x0, x1 = _runs(np.ascontiguousarray(mask, dtype=bool), _threads())
    if row_offset:
        rows += row_offset
    return rows, x0, x1


@numba.njit(cache=True, parallel=True)
def _runs(mask, threads):
    """Runs of True voxels in each row: sorted row index ``z * Y + y``, start, stop."""
    nz, ny, nx = mask.shape
    flat = mask.reshape(nz * ny, nx)
    nrows = nz * ny
    nchunks = min(nrows, 4 * threads)
    counts = np.zeros(nrows, dtype=np.int64)
    for c in prange(nchunks):
        for r in range(c * nrows // nchunks, (c + 1) * nrows // nchunks):
            row = flat[r]
            k = 0
            prev = False
            for x in range(nx):
                v = row[x]
                if v and not prev:
                    k += 1
                prev = v
            counts[r] = k
    start = np.zeros(nrows + 1, dtype=np.int64)
    start[1:] = np.cumsum(counts)
    total = start[nrows]
    rows = np.empty(total, dtype=np.int64)
    # Row lengths fit in 32 bits; halving the run arrays halves their page faults.
    x0 = np.empty(total, dtype=np.int32)
    x1 = np.empty(total, dtype=np.int32)
    for c in prange(nchunks):
        for r in range(c * nrows // nchunks, (c + 1) * nrows // nchunks):
            if counts[r] == 0:
                continue
            row = flat[r]
            k = start[r]
            prev = False
            for x in range(nx):
                v = row[x]
                if v and not prev:
                    rows[k] = r
                    x0[k] = x
                elif prev and not v:
                    x1[k] = x
                    k += 1
                prev = v
            if prev:
                x1[k] = nx
    return rows, x0, x1


@numba.njit(cache=True)
def _find(parent, i):
    while parent[i] != i:
        parent[i] = parent[parent[i]]  # path halving
        i = parent[i]
    return i


@numba.njit(cache=True)
def _join_rows(parent, x0, x1, a, a_end, b, b_end, widen):
    """Join the runs ``a:a_end`` of one row with the runs ``b:b_end`` of another."""
    while a < a_end and b < b_end:
        if x0[a] < x1[b] + widen and x0[b] < x1[a] + widen:
            ra = _find(parent, a)
            rb = _find(parent, b)
            if ra != rb:
                # The smaller index wins, so labels follow row-major order.
                if ra < rb:
                    parent[rb] = ra
                else:
                    parent[ra] = rb
        if x1[a] < x1[b]:
            a += 1
        else:
            b += 1


@numba.njit(cache=True)
def _join_runs(rows, x0, x1, ny, nrows, diagonal):
    """Component of each run, numbered 0.. in order of first appearance."""
    n = len(rows)
    start = np.searchsorted(rows, np.arange(nrows + 1))
    # 32-bit run indices: half the memory to touch (2^31 runs would need a
    # volume of several terabytes).
    parent = np.arange(n, dtype=np.int32)
    # 26-adjacency (diagonal): the row before in the plane and the three rows
    # around it in the plane before, runs widened by one voxel. 6-adjacency:
    # the row before in the plane and the same row in the plane before.
    widen = 1 if diagonal else 0
    for r in range(nrows):
        a, a_end = start[r], start[r + 1]
        if a == a_end:
            continue
        z, y = r // ny, r % ny
        if y > 0:
            _join_rows(parent, x0, x1, a, a_end, start[r - 1], start[r], widen)
        if z > 0:
            q = r - ny
            if diagonal:
                lo_row = q - 1 if y > 0 else q
                hi_row = q + 1 if y < ny - 1 else q
                for p in range(lo_row, hi_row + 1):
                    _join_rows(parent, x0, x1, a, a_end, start[p], start[p + 1], widen)
            else:
                _join_rows(parent, x0, x1, a, a_end, start[q], start[q + 1], widen)
    label = np.empty(n, dtype=np.int32)
    k = 0
    for i in range(n):
        root = _find(parent, i)
        if root == i:
            label[i] = k
            k += 1
        else:
            label[i] = label[root]  # the root has the smaller index: labelled already
    return label


@numba.njit(cache=True)
def _piece_sizes(piece, x0, x1, n):
    sizes = np.zeros(n, dtype=np.int64)
    for i in range(len(piece)):
        sizes[piece[i]] += x1[i] - x0[i]
    return sizes


def piece_elongation(moments, spacing, *, planar=False):
    """Length over width of pieces from their voxels' moments, the length taken within the planes.

    Each voxel counts as a box of the spacing (its own second moment
    ``d^2 / 12`` per axis added), so a line one voxel thick has a width.
    The length is that of a uniform rod with the piece's largest variance
    (``L^2 / 12``), times the in-plane part of that axis's direction; the
    width the diameter of a uniform disc with the mean of the other
    variances (``r^2 / 4`` along any diameter), of the one other for
    planar pieces. A ball reads about 0.9, a cylinder lying in the planes
    its length over its diameter, a column along z about 0.

    Why within the planes: a microscope's axial point-spread stretches
    every speck along z (at two-photon the axial width is some three to
    five times the lateral one, from memory), and a voxel of a coarse z step is itself
    tall (one voxel of 4 x 1 x 1 µm reads 3.5 over its full length), so
    length along z is no evidence of a vessel. Moments with the voxel box
    are the same for a mask and for the mask with every plane repeated at
    half the z step, so the rule does not depend on the z step.

    Parameters
    ----------
    moments : (n, 10) float ndarray
        Per piece: voxel count, sums of z, y, x, of zz, yy, xx, zy, zx, yx
        (voxel indices), as :func:`_piece_moments` gives them.
    spacing : sequence of 3 float
        Voxel spacing, µm.
    planar : bool
        Pieces of one plane (z is not an axis).

    Returns
    -------
    (n,) float ndarray
        Elongation; 0 for a row without voxels.
    """
    m = np.asarray(moments, dtype=float)
    d = np.asarray(spacing, dtype=float)
    cnt = np.maximum(m[:, 0], 1.0)
    mean = m[:, 1:4] / cnt[:, None]
    cov = np.empty((len(m), 3, 3))
    pairs = {(0, 0): 4, (1, 1): 5, (2, 2): 6, (0, 1): 7, (0, 2): 8, (1, 2): 9}
    for (a, b), col in pairs.items():
        c = (m[:, col] / cnt - mean[:, a] * mean[:, b]) * d[a] * d[b]
        cov[:, a, b] = cov[:, b, a] = c
    cov[:, (0, 1, 2), (0, 1, 2)] += d ** 2 / 12.0
    if planar:
        cov[:, 0, :] = cov[:, :, 0] = 0.0
    lam, vec = np.linalg.eigh(cov)  # ascending
    side = lam[:, 1] if planar else 0.5 * (lam[:, 0] + lam[:, 1])
    in_plane = np.sqrt(vec[:, 1, -1] ** 2 + vec[:, 2, -1] ** 2)  # y, x components of the long axis
    length = np.sqrt(12.0 * np.maximum(lam[:, -1], 0.0)) * in_plane
    width = 4.0 * np.sqrt(np.maximum(side, 1e-12))
    return np.where(m[:, 0] > 0, length / width, 0.0)


@numba.njit(cache=True)
def _piece_moments(piece, rows, x0, x1, ny, want):
    """Voxel count and first and second moments (z, y, x indices) of the pieces marked in ``want``."""
    out = np.zeros((len(want), 10))
    for i in range(len(piece)):
        p = piece[i]
        if not want[p]:
            continue
        z, y = divmod(rows[i], ny)
        a, b = float(x0[i]), float(x1[i])
        m = b - a
        sx = (a + b - 1.0) * m / 2.0
        # sum of x^2 for x in [a, b): S(b - 1) - S(a - 1), S(n) = n (n + 1) (2n + 1) / 6
        sxx = ((b - 1.0) * b * (2.0 * b - 1.0) - (a - 1.0) * a * (2.0 * a - 1.0)) / 6.0
        out[p, 0] += m
        out[p, 1] += z * m
        out[p, 2] += y * m
        out[p, 3] += sx
        out[p, 4] += z * z * m
        out[p, 5] += y * y * m
        out[p, 6] += sxx
        out[p, 7] += z * y * m
        out[p, 8] += z * sx
        out[p, 9] += y * sx
    return out


@numba.njit(cache=True)
def _keep_runs(rows, x0, x1, piece, keep, ny):
    """Move the runs of kept pieces to the front, in order; count and bounding box."""
    k = 0
    lo = np.full(3, np.iinfo(np.int64).max)
    hi = np.zeros(3, dtype=np.int64)
    for i in range(len(rows)):
        if not keep[piece[i]]:
            continue
        r = rows[i]
        rows[k], x0[k], x1[k] = r, x0[i], x1[i]
        k += 1
        z, y = r // ny, r % ny
        lo[0], hi[0] = min(lo[0], z), max(hi[0], z + 1)
        lo[1], hi[1] = min(lo[1], y), max(hi[1], y + 1)
        lo[2], hi[2] = min(lo[2], x0[i]), max(hi[2], x1[i])
    return k, lo, hi


@numba.njit(cache=True)
def _to_crop(rows, x0, x1, ny, crop_ny, z0, y0, xs):
    # Row-major order is kept, so the rows stay sorted.
    for i in range(len(rows)):
        z, y = rows[i] // ny, rows[i] % ny
        rows[i] = (z - z0) * crop_ny + (y - y0)
        x0[i] -= xs
        x1[i] -= xs


@numba.njit(cache=True, parallel=True)
def _paint(flat, rows, x0, x1, clear, threads):
    """Set the runs in the row-major ``flat`` (rows, X); with ``clear`` zero every row first.

    Rows are split over threads, so the first touch of a new array's pages
    is shared too.
    """
    nrows = flat.shape[0]
    start = np.searchsorted(rows, np.arange(nrows + 1))
    nchunks = min(nrows, 4 * threads)
    for c in prange(nchunks):
        for r in range(c * nrows // nchunks, (c + 1) * nrows // nchunks):
            if clear:
                flat[r, :] = False
            for i in range(start[r], start[r + 1]):
                flat[r, x0[i]:x1[i]] = True


@numba.njit(cache=True)
def _gaps(rows, x0, x1, nrows, nx):
    """Runs of background of each row, given the sorted vessel runs."""
    n = len(rows)
    total = n + nrows
    brow = np.empty(total, dtype=np.int64)
    b0 = np.empty(total, dtype=x0.dtype)
    b1 = np.empty(total, dtype=x1.dtype)
    k = 0
    i = 0
    for r in range(nrows):
        x = 0
        while i < n and rows[i] == r:
            if x0[i] > x:
                brow[k], b0[k], b1[k] = r, x, x0[i]
                k += 1
            x = x1[i]
            i += 1
        if x < nx:
            brow[k], b0[k], b1[k] = r, x, nx
            k += 1
    return brow[:k], b0[:k], b1[:k]


@numba.njit(cache=True)
def _enclosed(brow, b0, b1, label, nz, ny, nx, planar):
    """Compact the background runs whose component touches no face to the front; their count."""
    n = len(brow)
    reach = np.zeros(label.max() + 1 if n else 0, dtype=np.bool_)
    for i in range(n):
        z, y = brow[i] // ny, brow[i] % ny
        face = b0[i] == 0 or b1[i] == nx or y == 0 or y == ny - 1
        if not planar:
            face = face or z == 0 or z == nz - 1
        if face:
            reach[label[i]] = True
    k = 0
    for i in range(n):
        if not reach[label[i]]:
            brow[k], b0[k], b1[k] = brow[i], b0[i], b1[i]
            k += 1
    return k


def _cavity_runs(shape, rows, x0, x1, *, planar):
    """Background runs not connected to the crop box's faces (the cavities), sorted by row.

    Background beyond the box is all background, so background touching a
    face connects to the outside and is no cavity. In a planar mask the
    plane itself is not a face.
    """
    nz, ny, nx = shape
    brow, b0, b1 = _gaps(rows, x0, x1, nz * ny, nx)
    label = _join_runs(brow, b0, b1, ny, nz * ny, False)
    k = _enclosed(brow, b0, b1, label, nz, ny, nx, planar)
    return brow[:k].copy(), b0[:k].copy(), b1[:k].copy()
