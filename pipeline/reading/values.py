"""Values of a mask image: scanned in blocks, and binarised.

In: an image array of any numeric dtype and an optional threshold. Out: a boolean mask (non-zero is
vessel for a two-valued image, ``value > threshold`` otherwise), or an ``InputError`` saying what
values were found.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any, Iterator

import numpy as np

from ..errors import InputError
from ._common import _CHUNK_VOXELS


# --------------------------------------------------------------------------- #
# Values
# --------------------------------------------------------------------------- #


def _blocks(shape3: tuple[int, int, int]) -> Iterator[tuple[slice, ...]]:
    """Index tuples covering a (Z, Y, X) array in slabs of about _CHUNK_VOXELS voxels."""
    z, y, x = shape3
    plane = max(1, y * x)
    if plane <= _CHUNK_VOXELS:
        step = max(1, _CHUNK_VOXELS // plane)
        for z0 in range(0, z, step):
            yield (slice(z0, min(z, z0 + step)),)
    else:
        rows = max(1, _CHUNK_VOXELS // max(1, x))
        for zi in range(z):
            for y0 in range(0, y, rows):
                yield (slice(zi, zi + 1), slice(y0, min(y, y0 + rows)))


@dataclass
class _ValueScan:
    binary: bool
    vmin: Any = None
    vmax: Any = None


def _check_dtype(label: str, dtype: np.dtype) -> None:
    if dtype.kind not in "biuf":
        raise InputError(
            f"{label} has values of type {dtype}; expected a boolean, integer or floating-point mask"
        )


def _scan_values(label: str, raw: np.ndarray, need_binary: bool) -> _ValueScan:
    """One chunked pass: NaN check, min/max and whether the image is binary-valued.

    Binary-valued means every voxel is 0 or one single non-zero value. Decided
    from per-slab min/max and two counts, so nothing is sorted.
    """
    if raw.dtype == np.bool_:
        return _ValueScan(True, False, True)
    is_float = raw.dtype.kind == "f"
    binary = need_binary
    nonzero_value = None
    vmin = vmax = None
    for idx in _blocks(raw.shape):  # type: ignore[arg-type]
        chunk = raw[idx]
        if chunk.size == 0:
            continue
        if is_float and np.isnan(chunk).any():
            raise InputError(f"{label} contains NaN values; expected a binary mask or a finite-valued image")
        cmin = chunk.min()
        cmax = chunk.max()
        vmin = cmin if vmin is None or cmin < vmin else vmin
        vmax = cmax if vmax is None or cmax > vmax else vmax
        if not binary or cmin == cmax == 0:
            continue
        if cmin < 0 < cmax:
            binary = False  # two different non-zero values
            continue
        value = cmax if cmax != 0 else cmin
        other = cmin if value == cmax else cmax
        if nonzero_value is None:
            nonzero_value = value
        if value != nonzero_value or (cmin != cmax and other != 0):
            binary = False
        elif cmin != cmax and np.count_nonzero(chunk) != np.count_nonzero(chunk == value):
            binary = False  # values strictly between 0 and `value`
    return _ValueScan(binary, vmin, vmax)


def _distinct_values(raw: np.ndarray) -> str:
    """Number of distinct values, exact for <= 16-bit integers, else a lower bound."""
    dtype = raw.dtype
    if dtype.kind in "biu" and dtype.itemsize <= 2:
        unsigned = np.dtype(f"u{dtype.itemsize}") if dtype.kind != "b" else np.dtype("u1")
        seen = np.zeros(1 << (8 * unsigned.itemsize), dtype=bool)
        for idx in _blocks(raw.shape):  # type: ignore[arg-type]
            chunk = np.ascontiguousarray(raw[idx]).view(unsigned).ravel()
            seen |= np.bincount(chunk, minlength=seen.size).astype(bool)
        return str(int(np.count_nonzero(seen)))
    # Wider types: a strided sample of about a million voxels bounds the count
    # from below without sorting the whole volume.
    steps = [max(1, int(math.ceil((raw.size / (1 << 20)) ** (1 / 3))))] * raw.ndim
    sample = np.asarray(raw[tuple(slice(None, None, s) for s in steps)])
    n = int(np.unique(sample).size)
    return str(n) if sample.size == raw.size else f"at least {max(n, 2)}"


def _fmt_value(v: Any) -> str:
    if isinstance(v, (bool, np.bool_)):
        return str(int(v))
    if isinstance(v, (np.integer, int)):
        return str(int(v))
    if isinstance(v, np.floating):
        # Shortest repr in the stored precision: float32 0.99999994 must not
        # print as 1, which would look like a binary image.
        return str(v)
    return f"{float(v):.6g}"


def binarise(array: Any, *, threshold: float | None = None, label: str = "mask") -> np.ndarray:
    """Boolean mask of an array by the rules files are read by.

    Parameters
    ----------
    array : (Z, Y, X) or (Y, X) array_like
        Boolean, integer or floating-point values.
    threshold : float, optional
        Vessel is ``value > threshold``. Without it the array must hold at
        most two distinct values, one of them 0, and vessel is non-zero.
    label : str
        What the array is, for the messages.

    Returns
    -------
    ndarray of bool, same shape as ``array``
        A new array (the input is never changed); a boolean input without a
        threshold is returned as it is.

    Raises
    ------
    InputError
        Values of another type, or more than two distinct values without a
        threshold (an intensity or probability image).
    """
    arr = np.asarray(array)
    if arr.dtype == np.bool_ and threshold is None:
        return arr
    raw = arr if arr.ndim == 3 else arr.reshape((1,) * (3 - arr.ndim) + arr.shape)
    return _binarise(label, raw, threshold=threshold, in_place=False).reshape(arr.shape)


def _binarise(
    label: str,
    raw: np.ndarray,
    *,
    threshold: float | None,
    in_place: bool,
) -> np.ndarray:
    """Boolean (Z, Y, X) mask from a (Z, Y, X) array of stored values.

    With ``in_place`` a 1-byte array is overwritten with its own boolean
    version, so a uint8 volume costs no extra memory; otherwise one bool
    array is allocated and filled slab by slab.
    """
    _check_dtype(label, raw.dtype)
    scan = _scan_values(label, raw, need_binary=threshold is None)
    if threshold is None and not scan.binary:
        if raw.dtype.kind in "biu" and scan.vmin is not None and scan.vmin >= 0:
            # Segmentations are often saved as label images (one integer
            # per class or per object); every label is vessel at 0.
            hint = ("it looks like a label image or an intensity image: pass threshold=T to binarise "
                    "(threshold=0 takes every non-zero label as vessel)")
        else:
            hint = "it looks like an intensity or probability image: pass threshold=T to binarise"
        raise InputError(
            f"{label} has {_distinct_values(raw)} distinct values (min {_fmt_value(scan.vmin)}, "
            f"max {_fmt_value(scan.vmax)}); {hint}"
        )

    operand: Any
    if threshold is None:
        operand, op = 0, "!="
    elif raw.dtype.kind in "biu":
        # For integers x > T  <=>  x > floor(T); comparing in the stored type
        # avoids a float64 temporary per slab.
        if raw.dtype == np.bool_:
            raw = raw.view(np.uint8)
        info = np.iinfo(raw.dtype)
        t = math.floor(threshold)
        if t < info.min:
            operand, op = None, "all"
        elif t >= info.max:
            operand, op = None, "none"
        else:
            operand, op = raw.dtype.type(t), ">"
    else:
        # Compare in the stored float type (no float64 temporaries) unless the
        # threshold does not fit in it.
        fits = abs(threshold) <= float(np.finfo(raw.dtype).max)
        operand, op = (raw.dtype.type(threshold) if fits else np.float64(threshold)), ">"

    if in_place and raw.dtype.itemsize == 1 and raw.flags.c_contiguous and raw.flags.writeable:
        out = raw.view(np.bool_)
    else:
        out = np.empty(raw.shape, dtype=np.bool_)

    if op == "all":
        out[...] = True
    elif op == "none":
        out[...] = False
    else:
        ufunc = np.not_equal if op == "!=" else np.greater
        for idx in _blocks(raw.shape):  # type: ignore[arg-type]
            # Same memory and strides for input and output in the in-place
            # case: numpy treats that as element-wise safe and does not copy.
            ufunc(raw[idx], operand, out=out[idx])

    n_vessel = int(np.count_nonzero(out))
    how = ""
    if threshold is not None:
        how = f" with threshold {threshold:g} (values {_fmt_value(scan.vmin)} to {_fmt_value(scan.vmax)})"
    if n_vessel == 0:
        raise InputError(
            f"{label} has no vessel voxel{how}; expected a binary mask with vessel voxels (non-zero)"
        )
    if n_vessel == out.size:
        raise InputError(f"{label}: every voxel is vessel{how}; expected a binary mask with background")
    return out
