"""Writing a synthetic volume and its truth file.

In: a mask (or a painter of its boxes), its spacing and truth. Out: a uint8
0/255 ImageJ TIFF, or an OME-Zarr image (NGFF 0.4, one full-resolution
level, spacing in micrometres) written block by block, with a
``<stem>.truth.json`` beside it.
"""

from __future__ import annotations

import json
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from ..errors import InputError
from ._common import _bad, _json_default, _spacing


# ------------------------------------------------------------------------------ I/O


def truth_path_for(path: str | Path) -> Path:
    """``<dir>/<stem>.truth.json`` for a volume at ``path`` (``a.ome.zarr`` -> ``a.truth.json``)."""
    p = Path(path)
    stem = p.name[: -len(".ome.zarr")] if p.name.lower().endswith(".ome.zarr") else p.stem
    return p.with_name(stem + ".truth.json")


def write_ome_zarr(path: str | Path, shape: Sequence[int], paint: Callable[[tuple, tuple], np.ndarray], *,
                   spacing: Sequence[float], chunk: int = 128, block: int = 256,
                   progress: Callable[[int, int], None] | None = None) -> int:
    """Write a volume as an OME-Zarr image, block by block, never holding more than one block.

    Parameters
    ----------
    path : str or Path
        The store to create (a folder, ``.ome.zarr``); written in a
        temporary folder beside it and renamed when complete, so a failure
        leaves nothing.
    shape : sequence of 3 int
    paint : callable
        ``paint(lo, hi)`` -> the mask of the box ``[lo, hi)`` (non-zero =
        vessel).
    spacing : sequence of 3 float
        ``(dz, dy, dx)`` µm, stored as the level's scale in micrometres.
    chunk : int
        Chunk edge on disk.
    block : int
        Edge of the boxes painted at a time (a multiple of ``chunk``).
    progress : callable, optional
        ``progress(done, total)`` after each block.

    Returns
    -------
    int
        Vessel voxels written.
    """
    import shutil
    import tempfile

    import zarr

    d = _spacing(spacing)
    shape = tuple(int(n) for n in shape)
    p = Path(path)
    tmp = Path(tempfile.mkdtemp(prefix=".partial-", dir=p.parent))
    try:
        store = tmp / p.name
        root = zarr.open_group(str(store), mode="w-", zarr_format=2)
        arr = root.create_array("0", shape=shape, chunks=(min(chunk, shape[0]), min(chunk, shape[1]),
                                                          min(chunk, shape[2])), dtype="uint8", fill_value=0)
        root.attrs["multiscales"] = [{
            "version": "0.4", "name": p.name,
            "axes": [{"name": n, "type": "space", "unit": "micrometer"} for n in "zyx"],
            "datasets": [{"path": "0", "coordinateTransformations": [{"type": "scale",
                                                                      "scale": [float(v) for v in d]}]}],
        }]
        step = max(chunk, block - block % chunk)
        corners = [(z, y, x) for z in range(0, shape[0], step) for y in range(0, shape[1], step)
                   for x in range(0, shape[2], step)]
        n_vox = 0
        for i, lo in enumerate(corners):
            hi = tuple(min(a + step, n) for a, n in zip(lo, shape))
            box = np.asarray(paint(lo, hi)) != 0
            n_vox += int(np.count_nonzero(box))
            if box.any():
                arr[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]] = np.where(box, np.uint8(255), np.uint8(0))
            if progress is not None:
                progress(i + 1, len(corners))
        if p.exists():
            # replace only a Zarr store (what this function writes), never another folder
            if not (p.is_dir() and (p / ".zgroup").exists()):
                raise InputError(f"'{p}' exists and is not a Zarr store; expected a new path or a store to replace",
                                 param="path")
            shutil.rmtree(p)
        store.rename(p)
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
    return n_vox


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
    size_um: Sequence[float] | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> tuple[Path, tuple[int, ...]]:
    """Build a named synthetic volume and write it with its ground truth.

    Parameters
    ----------
    path : str or Path
        TIFF file to write, or an OME-Zarr store (``.ome.zarr``), written
        block by block (:func:`write_ome_zarr`; without specks, holes or
        artefacts the volume is never whole in memory); its truth goes
        beside it (:func:`truth_path_for`).
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
    size_um : sequence of 3 float, optional
        ``(Z, Y, X)`` extent in µm, for the kinds built in a box (``bed``,
        ``cortex``).
    progress : callable, optional
        ``progress(done, total)`` per block of an OME-Zarr store.

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
    if size_um is not None:
        opts["shape_um"] = tuple(float(v) for v in size_um)
    out.parent.mkdir(parents=True, exist_ok=True)
    if out.name.lower().endswith(".zarr"):
        return _write_zarr(out, kind, opts, progress)
    mask, truth = synthesize(kind, **opts)
    write_volume(out, mask, spacing=d, truth=truth)
    return out, tuple(mask.shape)


def _write_zarr(out: Path, kind: str, opts: dict[str, Any], progress) -> tuple[Path, tuple[int, ...]]:
    """A synthetic volume as OME-Zarr: painted block by block when no artefact needs the whole mask."""
    from ..tables import write_atomic
    from ._common import _jsonable
    from .kinds import SYNTH_KINDS, build_network, synthesize
    from .raster import BlockRaster

    d = opts["spacing"]
    blockable = set(opts) <= {"spacing", "seed", "roughness", "specks", "holes", "shape_um", "shape", "margin_um"} \
        and not opts.get("specks") and not opts.get("holes")
    if blockable:
        net, raster = build_network(kind, **opts)
        painter = BlockRaster(net, **{k: v for k, v in raster.items() if k in ("spacing", "shape", "margin_um",
                                                                             "roughness", "seed")})
        n_vox = write_ome_zarr(out, painter.shape, painter.paint, spacing=d, progress=progress)
        truth = painter.truth(n_vox)
        truth["synth_kind"] = kind
        truth["synth_params"] = _jsonable({**SYNTH_KINDS[kind].defaults, **opts})
        shape = painter.shape
    else:
        mask, truth = synthesize(kind, **opts)
        shape = mask.shape

        def paint(lo, hi):
            return mask[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]]

        write_ome_zarr(out, shape, paint, spacing=d, progress=progress)
    text = json.dumps(truth, separators=(",", ":"), default=_json_default)
    write_atomic(truth_path_for(out), lambda tmp: tmp.write_text(text + "\n", encoding="utf-8"))
    return out, tuple(int(n) for n in shape)
