"""Writing a synthetic volume and its truth file.

In: a mask, its spacing and truth. Out: a uint8 0/255 ImageJ TIFF with a
``<stem>.truth.json`` beside it.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from ._common import _bad, _json_default, _spacing


# ------------------------------------------------------------------------------ I/O


def truth_path_for(path: str | Path) -> Path:
    """``<dir>/<stem>.truth.json`` for a volume at ``path``."""
    p = Path(path)
    return p.with_name(p.stem + ".truth.json")


def write_volume(
    path: str | Path,
    mask: np.ndarray,
    *,
    spacing: Sequence[float],
    truth: Mapping[str, Any] | None = None,
    compression: str | None = "zlib",
) -> Path:
    """Write a mask as a uint8 0/255 ImageJ TIFF, and its truth beside it.

    Parameters
    ----------
    path : str or Path
        TIFF file to write.
    mask : ndarray, shape (Z, Y, X)
        Non-zero = vessel.
    spacing : sequence of 3 float
        ``(dz, dy, dx)`` µm, stored as ImageJ resolution and ``spacing``.
    truth : mapping, optional
        Written as JSON to ``<stem>.truth.json`` in the same folder.
    compression : str or None
        tifffile compression name (default ``'zlib'``).

    Returns
    -------
    Path
        The TIFF path.
    """
    import tifffile

    arr = np.asarray(mask)
    if arr.ndim != 3:
        raise _bad("mask", "a 3-D array (Z, Y, X)", f"shape {arr.shape}")
    d = _spacing(spacing)
    if compression is not None and not isinstance(compression, str):
        raise _bad("compression", "None or a compression name such as 'zlib'", compression)
    from ..tables import write_atomic

    p = Path(path)
    data = np.where(arr != 0, np.uint8(255), np.uint8(0))
    # Atomic writes: a full disk leaves the earlier file (or none), never half a volume.
    write_atomic(p, lambda tmp: tifffile.imwrite(
        tmp,
        data,
        imagej=True,
        resolution=(1.0 / d[2], 1.0 / d[1]),
        metadata={"spacing": float(d[0]), "unit": "um", "axes": "ZYX"},
        compression=compression,
    ))
    if truth is not None:
        text = json.dumps(truth, separators=(",", ":"), default=_json_default)
        write_atomic(truth_path_for(p), lambda tmp: tmp.write_text(text + "\n", encoding="utf-8"))
    return p
