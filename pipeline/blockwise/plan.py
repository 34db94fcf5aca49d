"""Where the blocks of a block-wise analysis lie, on which grid, and how much memory one needs.

In: the cleaned crop (its shape and offset in the volume), the voxel
spacing, the ``centrelines`` options and a block edge. Out: a :class:`Frame`
(the thinning grid: the original one, or the isotropic grid the centrelines
step resamples a coarse stack to) and the :class:`Block` cores that tile it.

Block boundaries lie at the crop's first voxel plus whole multiples of an
even block edge, so every block starts on the same voxel parity as the
crop. The thinning (:mod:`pipeline.thinning`) works in subfields of voxel
parities; blocks in phase with the crop thin exactly as the whole crop does
wherever the halo is wide enough (checked in ``tests/test_blockwise.py``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..centrelines import _single_coarse_axis

__all__ = ["Frame", "Block", "thinning_frame", "blocks", "BYTES_PER_BLOCK_VOXEL"]

# Working memory of one block per voxel of its extent (core and halos): the
# painted mask (1), the thinning buffer (1), the two-label distance map (4),
# the wall faces (1) and their bit words, the tissue distances' scratch and,
# on coarse stacks, the signed distance and its resampled copy (4 + 1);
# rounded up.
BYTES_PER_BLOCK_VOXEL = 16


@dataclass(frozen=True)
class Frame:
    """The grid the centrelines are thinned on.

    Attributes
    ----------
    shape : tuple of 3 int
        Shape of the grid.
    spacing : tuple of 3 float
        Its voxel spacing, µm.
    origin : tuple of 3 int
        Grid index of the crop's first voxel (block boundaries are in phase
        with it).
    resampled : bool
        The grid is the crop resampled to isotropic voxels (then its index 0
        is the crop's first voxel); otherwise it is the original volume's grid.
    coarse : int or None
        The one coarse axis of a resampled stack, whose radii are measured in
        plane (:func:`pipeline.centrelines._in_plane_distance`).
    """

    shape: tuple
    spacing: tuple
    origin: tuple
    resampled: bool
    coarse: int | None


@dataclass(frozen=True)
class Block:
    """One block: its index in the block grid and its core ``[lo, hi)`` on the frame."""

    index: tuple
    lo: tuple
    hi: tuple

    def extent(self, halo, shape):
        """The core grown by ``halo`` voxels per axis, within ``shape``: (lo, hi)."""
        lo = tuple(max(a - h, 0) for a, h in zip(self.lo, halo))
        hi = tuple(min(b + h, n) for b, h, n in zip(self.hi, halo, shape))
        return lo, hi


def thinning_frame(crop_shape, crop_offset, original_shape, spacing, *, max_anisotropy=1.5,
                   resample_spacing_um=None):
    """The thinning grid of :func:`pipeline.centrelines.extract_centrelines` for this crop."""
    sp = np.asarray(spacing, dtype=float)
    resampled = False
    target = None
    if sp.max() / sp.min() > max_anisotropy:
        target = float(resample_spacing_um or sp.min())
        resampled = True
    elif resample_spacing_um is not None and not np.allclose(sp, resample_spacing_um):
        target = float(resample_spacing_um)
        resampled = True
    if not resampled:
        return Frame(tuple(int(n) for n in original_shape), tuple(float(s) for s in sp),
                     tuple(int(o) for o in crop_offset), False, None)
    # pipeline.centrelines.resample_isotropic's output grid
    shape = tuple(int(np.floor((n - 1) * s / target + 1e-9)) + 1 for n, s in zip(crop_shape, sp))
    return Frame(shape, (target,) * 3, (0, 0, 0), True, _single_coarse_axis(sp, max_anisotropy))


def _cuts(n, origin, edge):
    """Block boundaries along one axis: ``origin + k * edge`` inside ``(0, n)``, and 0 and n."""
    first = origin % edge
    inner = [c for c in range(first, n, edge) if 0 < c < n]
    return [0] + inner + [n]


def blocks(shape, origin, edge):
    """The blocks tiling ``shape``, boundaries in phase with ``origin``; ``edge`` (even) voxels a side.

    Returns
    -------
    list of Block, in C order of their index.
    """
    cuts = [_cuts(int(n), int(o), int(edge)) for n, o in zip(shape, origin)]
    out = []
    for i in range(len(cuts[0]) - 1):
        for j in range(len(cuts[1]) - 1):
            for k in range(len(cuts[2]) - 1):
                out.append(Block((i, j, k), (cuts[0][i], cuts[1][j], cuts[2][k]),
                                 (cuts[0][i + 1], cuts[1][j + 1], cuts[2][k + 1])))
    return out
