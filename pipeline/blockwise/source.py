"""A mask too large for memory, read slab by slab into runs.

In: an array-like ``(Z, Y, X)`` that can be sliced along z without loading
the rest (a NumPy memory map, a Zarr array, an HDF5 dataset, a plane-by-plane
TIFF reader), and the threshold rule of :func:`pipeline.reading.binarise`.
Out: the runs of vessel voxels of every row (:func:`pipeline.cleaning.mask_runs`),
the input of :func:`pipeline.cleaning.clean_runs`, holding a few bytes per
vessel run instead of one per voxel.

The value rule is the one files are read with, applied to the whole volume
across slabs: without a threshold, at most two distinct values, one of them
0, and the same non-zero value in every slab.
"""

from __future__ import annotations

import numba
import numpy as np

from ..cleaning import mask_runs
from ..errors import InputError

__all__ = ["scan_runs", "slab_planes"]


def slab_planes(shape, itemsize, budget_bytes):
    """Planes per slab so that a slab and its boolean copy take at most ``budget_bytes``."""
    plane = int(shape[1]) * int(shape[2]) * (int(itemsize) + 1)
    return int(max(1, min(int(shape[0]), budget_bytes // max(plane, 1))))


def _binary(slab, threshold, seen, label):
    """The slab as bool; ``seen`` collects the distinct values found so far (without a threshold)."""
    if threshold is not None:
        return slab > threshold
    if slab.dtype == bool:
        return slab
    if slab.dtype.itemsize == 1 and slab.dtype.kind in "iu":
        # which of the 256 byte values occur, without an 8-byte copy of the slab
        values = np.flatnonzero(_bytes_present(np.ascontiguousarray(slab).reshape(-1).view(np.uint8)))
        values = values.astype(np.uint8).view(slab.dtype)
    else:
        values = np.unique(slab)
    seen.update(v.item() for v in values)
    if len(seen) > 2 or (len(seen) == 2 and 0 not in seen):
        shown = ", ".join(f"{v:g}" for v in sorted(seen)[:4])
        raise InputError(f"{label}: expected a binary mask (0 and one other value), found values {shown}; "
                         "pass a threshold (input.threshold) for an intensity or probability image, "
                         "or 0 to take every non-zero label of a label image as vessel")
    return slab != 0


@numba.njit(cache=True)
def _bytes_present(flat):
    seen = np.zeros(256, dtype=np.bool_)
    for v in flat:
        seen[v] = True
    return seen


def scan_runs(source, *, threshold=None, slab=None, label="mask", progress=None):
    """Runs of vessel voxels of a sliceable ``(Z, Y, X)`` volume, read ``slab`` planes at a time.

    Parameters
    ----------
    source : array-like
        ``shape``, ``dtype`` and slicing along the first axis.
    threshold : float or None
        Vessel is ``value > threshold``; None: binary values (module notes).
    slab : int or None
        Planes per read; default about 128 MiB of input and its mask.
    label : str
        How errors name the volume.
    progress : callable or None
        ``progress(planes_done, planes)``.

    Returns
    -------
    rows : (K,) int64 ndarray
        ``z * Y + y``, sorted.
    x0, x1 : (K,) int32 ndarray
    """
    nz, ny, nx = (int(n) for n in source.shape)
    itemsize = np.dtype(source.dtype).itemsize
    slab = slab or slab_planes(source.shape, itemsize, 128 << 20)
    seen = set()
    parts = []
    for z0 in range(0, nz, slab):
        z1 = min(z0 + slab, nz)
        try:
            raw = np.asarray(source[z0:z1])
        except InputError:
            raise
        except Exception as exc:  # a chunk that does not decode, a file cut short
            reason = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
            raise InputError(f"{label}: planes {z0}-{z1 - 1} cannot be read ({reason})") from None
        parts.append(mask_runs(_binary(raw, threshold, seen, label), row_offset=z0 * ny))
        del raw
        if progress is not None:
            progress(z1, nz)
    if not parts:
        return np.zeros(0, np.int64), np.zeros(0, np.int32), np.zeros(0, np.int32)
    return tuple(np.concatenate([p[i] for p in parts]) for i in range(3))
