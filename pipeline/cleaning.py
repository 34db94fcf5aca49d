"""Step 1, clean-up: drop small pieces, fill enclosed cavities, crop.

In: a boolean mask ``(Z, Y, X)`` and its voxel spacing in µm.
Out: :class:`CleanedMask`, the mask cropped to the bounding box of what is
kept, with the crop offset into the original grid and counts of what changed.

Pieces are 26-connected (the foreground connectivity used throughout); the
background is 6-connected, the complementary choice, so a cavity is a
6-connected background region that touches no face of the volume.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage as ndi

from .errors import InputError

__all__ = ["CleanedMask", "clean_mask"]

_FG = np.ones((3, 3, 3), dtype=bool)  # 26-connectivity
_BG = ndi.generate_binary_structure(3, 1)  # 6-connectivity


@dataclass
class CleanedMask:
    """Result of :func:`clean_mask`.

    Attributes
    ----------
    mask : (Z', Y', X') bool ndarray
        Cleaned mask cropped to its bounding box.
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


def clean_mask(mask, *, spacing, min_object_volume_um3=1000.0, fill_cavities=True, planar=False):
    """Remove small 26-connected pieces, fill cavities and crop.

    Parameters
    ----------
    mask : (Z, Y, X) bool ndarray
        Vessel mask; planar masks have ``Z == 1``.
    spacing : sequence of 3 float
        Voxel spacing ``(dz, dy, dx)`` in µm.
    min_object_volume_um3 : float
        Pieces with a smaller volume are dropped. For planar masks the
        volume of a pixel is its area times 1 µm.
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
    ((3, 3, 3), 27, (1, 1, 1))
    """
    spacing = tuple(float(s) for s in spacing)
    voxel_volume = (1.0 if planar else spacing[0]) * spacing[1] * spacing[2]
    labels, n = ndi.label(mask, structure=_FG, output=np.int32)
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    keep = sizes * voxel_volume >= min_object_volume_um3
    keep[0] = False
    removed = int(n - keep[1:].sum())
    removed_volume = float(sizes[1:][~keep[1:]].sum() * voxel_volume)
    if removed:
        mask = keep[labels]
    del labels
    if not mask.any():
        raise InputError(
            f"cleaning.min_object_volume_um3: every vessel piece is smaller than "
            f"{min_object_volume_um3:g} µm³ (largest {sizes[1:].max() * voxel_volume:.3g} µm³); "
            "expected at least one piece to keep: lower the threshold"
        )
    # Tight bounding box of what is kept.
    box = []
    for axis in range(3):
        other = tuple(a for a in range(3) if a != axis)
        nz = np.flatnonzero(mask.any(axis=other))
        box.append(slice(int(nz[0]), int(nz[-1]) + 1))
    cropped = np.ascontiguousarray(mask[tuple(box)])
    filled = 0
    if fill_cavities:
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


def _fill_cavities(mask, *, planar):
    # Background touching the crop box's faces connects to the outside (the
    # box is tight, so everything beyond it is background), hence is not a cavity.
    if planar:
        plane = mask[0]
        labels, n = ndi.label(~plane, structure=ndi.generate_binary_structure(2, 1), output=np.int32)
        faces = [labels[0], labels[-1], labels[:, 0], labels[:, -1]]
    else:
        labels, n = ndi.label(~mask, structure=_BG, output=np.int32)
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
