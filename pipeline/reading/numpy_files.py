"""NumPy ``.npy`` and ``.npz`` files.

In: a path. Out: an :class:`~pipeline.reading.opened._Opened` (memory-mapped where uncompressed), with
an optional ``spacing`` array of an ``.npz``.
"""

from __future__ import annotations

import contextlib
import zipfile
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ._common import _FileSpacing, _corrupt, _layout_positional, _short_reason
from .values import _check_dtype
from .opened import _Opened


def _read_npy_header(fp: Any) -> tuple[tuple[int, ...], bool, np.dtype]:
    version = np.lib.format.read_magic(fp)
    if version == (1, 0):
        return np.lib.format.read_array_header_1_0(fp)
    if version == (2, 0):
        return np.lib.format.read_array_header_2_0(fp)
    raise ValueError(f"unsupported .npy format version {version}")


def _open_npy(path: Path, path_text: str, label: str, stack: contextlib.ExitStack,
              notes: list[str]) -> _Opened:
    try:
        with open(path, "rb") as fp:
            shape, _fortran, dtype = _read_npy_header(fp)
    except Exception as exc:
        raise _corrupt("NPY", path_text, _short_reason(exc)) from None
    dtype = np.dtype(dtype)
    layout, stored = _layout_positional(label, shape)
    _check_dtype(label, dtype)

    def load() -> tuple[np.ndarray, bool]:
        try:
            arr = np.load(path, mmap_mode="r", allow_pickle=False)
        except Exception as exc:
            raise _corrupt("NPY", path_text, _short_reason(exc)) from None
        # A read-only map: slabs are paged in while binarising, so the stored
        # volume itself never has to fit in memory.
        return arr.reshape(stored).reshape(layout.shape3), False

    return _Opened(layout, dtype, None, None, load)


def _open_npz(path: Path, path_text: str, label: str, stack: contextlib.ExitStack,
              notes: list[str]) -> _Opened:
    try:
        zf = stack.enter_context(zipfile.ZipFile(path))
        members = {name[:-4]: name for name in zf.namelist() if name.endswith(".npy")}
    except Exception as exc:
        raise _corrupt("NPZ", path_text, _short_reason(exc)) from None
    if "mask" in members:
        key = "mask"
    else:
        candidates = [k for k in members if k != "spacing"]
        if len(candidates) != 1:
            found_keys = ", ".join(sorted(members)) or "none"
            raise InputError(
                f"{label}: expected an array named 'mask' or a single array, found arrays: {found_keys}"
            )
        key = candidates[0]
    try:
        with zf.open(members[key]) as fp:
            shape, _fortran, dtype = _read_npy_header(fp)
    except Exception as exc:
        raise _corrupt("NPZ", path_text, _short_reason(exc)) from None
    dtype = np.dtype(dtype)
    layout, stored = _layout_positional(label, shape)
    _check_dtype(label, dtype)

    found: _FileSpacing | None = None
    if "spacing" in members:
        try:
            with zf.open(members["spacing"]) as fp:
                sp = np.lib.format.read_array(fp, allow_pickle=False)
        except Exception as exc:
            raise _corrupt("NPZ", path_text, f"array 'spacing': {_short_reason(exc)}") from None
        sp = np.asarray(sp).ravel()
        if sp.dtype.kind not in "iuf" or sp.size not in ((2, 3) if layout.planar else (3,)):
            expected = "3 values (dz, dy, dx)" + (" or 2 values (dy, dx)" if layout.planar else "")
            raise InputError(
                f"{label}: array 'spacing' must hold {expected} in µm, got {sp.size} values of type {sp.dtype}"
            )
        values = [float(v) for v in sp]
        if len(values) == 2:
            values = [None, *values]  # type: ignore[list-item]
        found = _FileSpacing(values[0], values[1], values[2], "npz", "the 'spacing' array")

    def load() -> tuple[np.ndarray, bool]:
        try:
            with zf.open(members[key]) as fp:
                arr = np.lib.format.read_array(fp, allow_pickle=False)
        except MemoryError:
            raise InputError(f"{label}: not enough memory to load the pixel data") from None
        except Exception as exc:
            raise _corrupt("NPZ", path_text, f"array '{key}': {_short_reason(exc)}") from None
        return arr.reshape(stored).reshape(layout.shape3), True

    return _Opened(layout, dtype, found, None, load)
