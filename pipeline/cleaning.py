"""Step 1, clean-up: drop small pieces, fill enclosed cavities, crop.

In: a boolean mask ``(Z, Y, X)`` and its voxel spacing in µm.
Out: :class:`CleanedMask`, the mask cropped to the bounding box of what is
kept, with the crop offset into the original grid and counts of what changed.

Pieces are 26-connected (the foreground connectivity used throughout); the
background is 6-connected, the complementary choice, so a cavity is a
6-connected background region that touches no face of the volume.
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass

import cc3d
import numba
import numpy as np

from .errors import InputError

__all__ = ["CleanedMask", "clean_mask"]


@dataclass
class CleanedMask:
    """Result of :func:`clean_mask`.

    Attributes
    ----------
    mask : (Z', Y', X') bool ndarray
        Cleaned mask cropped to its bounding box plus one voxel of
        background on every face that is not the volume's edge.
    offset : tuple of 3 int
        Index of ``mask[0, 0, 0]`` in the original grid.
    original_shape : tuple of 3 int
        Shape of the mask before cropping.
    spacing : tuple of 3 float
        Voxel spacing in µm, ``(dz, dy, dx)``.
    stats : dict
        ``removed_pieces``, ``removed_volume_um3``, ``filled_cavity_voxels``,
        ``kept_pieces``, ``vessel_voxels``.
    """

    mask: np.ndarray
    offset: tuple[int, int, int]
    original_shape: tuple[int, int, int]
    spacing: tuple[float, float, float]
    stats: dict


def clean_mask(mask, *, spacing, min_object_volume_um3=1000.0, min_object_area_um2=100.0, fill_cavities=True,
               planar=False):
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
    # For planar masks "volume" is area and the threshold the area threshold.
    voxel_volume = (1.0 if planar else spacing[0]) * spacing[1] * spacing[2]
    if planar:
        min_object_volume_um3 = min_object_area_um2
    # cc3d labels ten times faster than scipy.ndimage.label on large stacks,
    # picks the narrowest label dtype and releases the GIL: the background
    # (cavity) labelling of the input runs in a second thread meanwhile.
    with ThreadPoolExecutor(max_workers=1) as pool:
        bg_job = pool.submit(_background_labels, mask) if fill_cavities and not planar else None
        labels, n = cc3d.connected_components(mask, connectivity=26, return_N=True)
        sizes = _label_sizes(labels.reshape(-1), n)
        bg = bg_job.result() if bg_job is not None else None
    keep = sizes * voxel_volume >= min_object_volume_um3
    keep[0] = False
    removed = int(n - keep[1:].sum())
    removed_volume = float(sizes[1:][~keep[1:]].sum() * voxel_volume)
    unit = "µm²" if planar else "µm³"
    if not keep.any():
        raise InputError(
            f"cleaning.{'min_object_area_um2' if planar else 'min_object_volume_um3'}: every vessel piece is "
            f"smaller than {min_object_volume_um3:g} {unit} (largest {sizes[1:].max() * voxel_volume:.3g} {unit}); "
            "expected at least one piece to keep: lower the threshold"
        )
    filled = 0
    if bg is not None:
        bg_labels, n_bg = bg
        touches, wall = _cavity_walls(bg_labels, labels, n_bg)
        # A cavity is a background piece touching no face of the volume; it is
        # filled when the piece around it is kept (a hollow speck is not).
        fill = ~touches & (wall > 0)
        fill[fill] = keep[wall[fill]]
        fill[0] = False
        if removed or fill.any():
            # A small piece floating inside a filled cavity is filled with it.
            outer = _cavity_walls(labels, bg_labels, n)[1]
            keep_all = keep | ((outer > 0) & fill[np.maximum(outer, 0)])
            keep_all[0] = False
            mask, filled = _combine(labels, keep_all, bg_labels, fill)
        del bg_labels
    elif removed:
        mask = keep[labels]
    del labels, bg
    # Tight bounding box of what is kept, plus one voxel of background (where
    # the volume allows), so that later steps treat the crop's faces
    # correctly: a face with a background margin is tissue, a face on the
    # volume's edge is a cut.
    box = []
    for axis in range(3):
        nz = np.flatnonzero(mask.any(axis=tuple(a for a in range(3) if a != axis)))
        box.append(slice(max(int(nz[0]) - 1, 0), min(int(nz[-1]) + 2, mask.shape[axis])))
    cropped = np.ascontiguousarray(mask[tuple(box)])
    if fill_cavities and planar:
        cropped, filled = _fill_cavities(cropped, planar=planar)
    stats = {
        "kept_pieces": int(keep[1:].sum()),
        "removed_pieces": removed,
        "removed_volume_um3": removed_volume,
        "filled_cavity_voxels": int(filled),
        "vessel_voxels": int(np.count_nonzero(cropped)),
    }
    return CleanedMask(
        mask=cropped,
        offset=tuple(int(b.start) for b in box),
        original_shape=tuple(int(s) for s in mask.shape),
        spacing=spacing,
        stats=stats,
    )


@numba.njit(cache=True)
def _label_sizes(flat, n):
    # A histogram of the labels in one pass; np.bincount would first copy the
    # label volume to int64 (8 bytes per voxel).
    out = np.zeros(n + 1, dtype=np.int64)
    for i in range(flat.size):
        out[flat[i]] += 1
    return out


def _background_labels(mask):
    return cc3d.connected_components(~mask, connectivity=6, return_N=True)


@numba.njit(cache=True)
def _cavity_walls(bg, fg, n_bg):
    """Per label of ``bg``: does it touch a face, and the label of ``fg`` beside it.

    The first voxel of a 6-connected background piece in raster order has a
    vessel voxel just before it along x (otherwise that voxel would belong to
    the piece); for an enclosed cavity that vessel voxel is its wall. With
    the roles swapped (vessel labels as ``bg``) it gives the background piece
    just before each vessel piece, used to find pieces inside cavities.
    """
    nz, ny, nx = bg.shape
    touches = np.zeros(n_bg + 1, dtype=np.bool_)
    wall = np.full(n_bg + 1, -1, dtype=np.int64)
    for z in range(nz):
        for y in range(ny):
            edge_zy = z == 0 or z == nz - 1 or y == 0 or y == ny - 1
            for x in range(nx):
                lab = bg[z, y, x]
                if lab == 0:
                    continue
                if edge_zy or x == 0 or x == nx - 1:
                    touches[lab] = True
                if wall[lab] < 0 and x > 0:
                    wall[lab] = fg[z, y, x - 1]
    return touches, wall


@numba.njit(cache=True)
def _combine(fg, keep, bg, fill):
    out = np.empty(fg.shape, dtype=np.bool_)
    a, b, o = fg.reshape(-1), bg.reshape(-1), out.reshape(-1)
    filled = 0
    for i in range(a.size):
        if keep[a[i]]:
            o[i] = True
        elif fill[b[i]]:
            o[i] = True
            filled += 1
        else:
            o[i] = False
    return out, filled


def _fill_cavities(mask, *, planar):
    # Background touching the crop box's faces connects to the outside
    # (everything beyond the box is background), hence is not a cavity.
    if planar:
        labels, n = cc3d.connected_components(~mask[0], connectivity=4, return_N=True)
        faces = [labels[0], labels[-1], labels[:, 0], labels[:, -1]]
    else:
        labels, n = cc3d.connected_components(~mask, connectivity=6, return_N=True)
        faces = [labels[0], labels[-1], labels[:, 0], labels[:, -1], labels[:, :, 0], labels[:, :, -1]]
    if n == 0:
        return mask, 0
    outside = np.zeros(n + 1, dtype=bool)
    for f in faces:
        outside[np.unique(f)] = True
    cavity = ~outside
    cavity[0] = False
    if not cavity.any():
        return mask, 0
    hole = cavity[labels]
    if planar:
        hole = hole[None]
    filled = int(np.count_nonzero(hole))
    return mask | hole, filled
