"""Writing a synthetic volume and its truth file.

In: a mask, its spacing and truth. Out: a uint8 0/255 ImageJ TIFF with a
``<stem>.truth.json`` beside it.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from ..errors import InputError
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


def write_synthetic(
    path: str | Path,
    kind: str,
    *,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    seed: int = 0,
    artefacts: float = 0.0,
    roughness: float = 0.0,
    specks: int = 0,
    holes: int = 0,
    overwrite: bool = False,
) -> tuple[Path, tuple[int, ...]]:
    """Build a named synthetic volume and write it with its ground truth.

    Parameters
    ----------
    path : str or Path
        TIFF file to write; its truth goes beside it (:func:`truth_path_for`).
    kind : str
        A key of :data:`pipeline.synthetic.SYNTH_KINDS`.
    spacing : sequence of 3 float, keyword-only
        ``(dz, dy, dx)`` µm.
    seed : int, keyword-only
    artefacts : float, keyword-only
        Strength in [0, 1] of every artefact of the hostile model
        (:func:`pipeline.synthetic.hostile_artefacts`); 0 adds none.
    roughness, specks, holes : keyword-only
        Wall roughness, specks and holes (:func:`pipeline.synthetic.rasterize`);
        a non-zero value overrides the one ``artefacts`` sets.
    overwrite : bool, keyword-only
        Replace an existing file.

    Returns
    -------
    path : Path
        The TIFF written.
    shape : tuple of int
        The volume's shape (Z, Y, X).

    Raises
    ------
    InputError
        An unknown kind, a strength outside [0, 1], an existing file
        without ``overwrite``; nothing is written then.
    """
    from .kinds import SYNTH_KINDS, synthesize
    from .raster import hostile_artefacts

    out = Path(path)
    if out.exists() and not overwrite:
        raise InputError(f"'{out}' exists; pass overwrite=True to replace it", param="path")
    if kind not in SYNTH_KINDS:
        raise _bad("kind", "one of " + ", ".join(SYNTH_KINDS), kind)
    if not (isinstance(artefacts, (int, float)) and 0.0 <= artefacts <= 1.0):
        raise _bad("artefacts", "a strength in [0, 1]", artefacts)
    d = tuple(float(x) for x in _spacing(spacing))
    opts: dict[str, Any] = hostile_artefacts(artefacts, spacing=d, seed=seed) if artefacts else {}
    for name, value in (("roughness", roughness), ("specks", specks), ("holes", holes)):
        if value or name not in opts:
            opts[name] = value
    opts.update(spacing=d, seed=seed)
    mask, truth = synthesize(kind, **opts)
    out.parent.mkdir(parents=True, exist_ok=True)
    write_volume(out, mask, spacing=d, truth=truth)
    return out, tuple(mask.shape)
