"""Reading a mask from a file or an array: the entry points.

In: a path (or an array), an optional spacing and threshold. Out: a
:class:`~pipeline.reading._common.MaskImage`; every problem is one ``InputError``.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import os
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from ..errors import InputError
from ._common import (
    MaskImage, SUPPORTED_EXTENSIONS, _check_threshold, _layout_positional, _optional_positive,
    _parse_spacing_argument, _positive_number, _recorded_warnings,
)
from .spacing import _check_mode, _check_spacing_plausible, _resolve_spacing
from .memory import check_memory
from .values import _binarise, _check_dtype
from .opened import _Opened
from .tiff import _open_tiff
from .nifti import _open_nifti
from .numpy_files import _open_npy, _open_npz
from .chunked import HDF5_SUFFIXES, ZARR_SUFFIXES, open_hdf5, open_zarr, split_dataset

_OPENERS: dict[str, Callable[[Path, str, str, contextlib.ExitStack, list[str]], _Opened]] = {
    "tiff": _open_tiff,
    "nifti": _open_nifti,
    "npy": _open_npy,
    "npz": _open_npz,
    "zarr": open_zarr,
    "hdf5": open_hdf5,
}
# Formats that hold several arrays, of which ``dataset`` names one.
_CONTAINERS = ("zarr", "hdf5")


def _format_of(path: Path, path_text: str) -> str:
    name = path.name.lower()
    if name.endswith((".tif", ".tiff")):
        return "tiff"
    if name.endswith((".nii", ".nii.gz")):
        return "nifti"
    if name.endswith(".npy"):
        return "npy"
    if name.endswith(".npz"):
        return "npz"
    if name.endswith(ZARR_SUFFIXES):
        return "zarr"
    if name.endswith(HDF5_SUFFIXES):
        return "hdf5"
    suffixes = path.suffixes
    if len(suffixes) >= 2 and suffixes[-1].lower() == ".gz":
        suffix = "".join(suffixes[-2:])
    else:
        suffix = path.suffix or "(none)"
    raise InputError(
        f"mask '{path_text}': unsupported file type '{suffix}'; expected one of "
        + ", ".join(SUPPORTED_EXTENSIONS)
    )


def sha256_file(path: str | os.PathLike[str]) -> str:
    """SHA-256 hex digest of a file's bytes, read in 4 MiB blocks.

    A folder (a Zarr store) is digested file by file in sorted order of
    their relative paths, each path then its bytes.
    """
    digest = hashlib.sha256()
    p = Path(path)
    files = [p] if p.is_file() else sorted(f for f in p.rglob("*") if f.is_file())
    for f in files:
        if f is not p:
            digest.update(f.relative_to(p).as_posix().encode() + b"\0")
        with open(f, "rb") as fp:
            for block in iter(lambda: fp.read(1 << 22), b""):
                digest.update(block)
    return digest.hexdigest()


def _sha256_array(arr: np.ndarray) -> str:
    contiguous = np.ascontiguousarray(arr)
    # Hashing the buffer directly avoids the full copy tobytes() would make.
    return hashlib.sha256(contiguous.reshape(-1).view(np.uint8)).hexdigest()


# --------------------------------------------------------------------------- #
# Public readers
# --------------------------------------------------------------------------- #


def read_mask(
    path: str | os.PathLike[str],
    *,
    spacing: Sequence[float] | None = None,
    threshold: float | None = None,
    memory_limit_bytes: float | None = None,
    bytes_per_voxel: float = 16.0,
    implausible_spacing: str = "warn",
    max_anisotropy: float | None = None,
    resample_spacing_um: float | None = None,
    dataset: str | None = None,
) -> MaskImage:
    """Read a binary vessel mask from a file.

    Parameters
    ----------
    path : str or path-like
        A ``.tif``/``.tiff``/``.ome.tif``/``.ome.tiff``, ``.nii``/``.nii.gz``,
        ``.npy`` or ``.npz`` file, a Zarr or OME-Zarr store (``.zarr``) or an
        HDF5 file (``.h5``, ``.hdf5``; ``FILE:/path/in/file`` names the
        dataset). For ``.npz`` the mask is the array named ``mask`` or the
        only array; an optional ``spacing`` array holds ``(dz, dy, dx)`` in
        µm. Chunked formats: :mod:`pipeline.reading.chunked`.
    spacing : sequence of float, optional
        Voxel size in µm, ``(dz, dy, dx)``, or ``(dy, dx)`` for a 2-D mask.
        Overrides any spacing stored in the file.
    threshold : float, optional
        Binarise as ``value > threshold``. Required for images that are not
        binary-valued (probability maps, intensity images, label images).
    memory_limit_bytes : float, optional
        Memory the analysis may use; default: :func:`available_memory_bytes`.
    bytes_per_voxel : float, optional
        Peak analysis memory per voxel used for the estimate. Default 16.
    implausible_spacing : {'warn', 'error'}, optional
        What an implausible spacing (:func:`spacing_problem`) gives: a line
        in ``warnings`` (default) or an :class:`InputError`.
    max_anisotropy, resample_spacing_um : float, optional
        The ``centrelines`` options of the analysis that follows; with them
        the memory estimate counts the isotropic thinning grid
        (:func:`thinning_grid_shape`). Default: no resampling is counted.

    Returns
    -------
    MaskImage

    Raises
    ------
    InputError
        Missing, unsupported, truncated or corrupt file; more than three real
        axes; a non-binary image without ``threshold``; NaN values; an empty
        or all-vessel mask; an invalid spacing; a NIfTI header without a unit
        whose values do not tell µm from mm; an implausible spacing with
        ``implausible_spacing='error'``; or a volume that would not fit in
        memory (checked from the header, before pixel data are loaded).

    Notes
    -----
    The spacing is taken, in order of precedence, from ``spacing``, OME-XML
    ``PhysicalSize*``, ImageJ ``unit``/``spacing`` with the TIFF resolution,
    TIFF resolution tags in pixels per centimetre, the NIfTI ``pixdim`` with
    ``xyzt_units`` (no unit: µm or mm, whichever alone makes the values a
    plausible voxel size, with a warning; an error when that is not clear),
    the ``.npz`` ``spacing`` array; otherwise 1 µm with a warning.
    """
    bytes_per_voxel = _positive_number("bytes_per_voxel", bytes_per_voxel)
    if memory_limit_bytes is not None:
        memory_limit_bytes = _positive_number("memory_limit_bytes", memory_limit_bytes)
    max_anisotropy = _optional_positive("max_anisotropy", max_anisotropy)
    resample_spacing_um = _optional_positive("resample_spacing_um", resample_spacing_um)
    threshold = _check_threshold(threshold)
    with open_mask(path, spacing=spacing, threshold=threshold, implausible_spacing=implausible_spacing,
                   dataset=dataset) as lazy:
        notes = list(lazy.warnings)
        note = check_memory(lazy.label, lazy.shape, lazy.spacing, planar=lazy.planar,
                            bytes_per_voxel=bytes_per_voxel, memory_limit_bytes=memory_limit_bytes,
                            max_anisotropy=max_anisotropy, resample_spacing_um=resample_spacing_um)
        if note is not None:
            notes.append(note)
        raw, may_overwrite = lazy._opened.load()
        with _recorded_warnings(notes):
            mask = _binarise(lazy.label, raw, threshold=threshold, in_place=may_overwrite)
        del raw
        if lazy._opened.log is not None:
            notes.extend(f"{lazy.kind}: {m}" for m in lazy._opened.log.messages(logging.WARNING))
    return MaskImage(
        mask=mask,
        spacing=lazy.spacing,
        spacing_source=lazy.spacing_source,
        planar=lazy.planar,
        path=lazy.path,
        sha256=sha256_file(lazy.file),
        original_dtype=str(lazy.dtype),
        axes_found=lazy.axes_found,
        warnings=tuple(dict.fromkeys(notes)),
    )


class LazyMask:
    """A mask file opened, its pixels left on disk (:func:`open_mask`); a context manager.

    Attributes
    ----------
    source : array-like, (Z, Y, X)
        Slicing reads only what it touches (a memory map, Zarr chunks, an
        HDF5 hyperslab); values as stored, binarised by the reader of the
        slabs (:func:`pipeline.blockwise.source.scan_runs`).
    shape, dtype, spacing, spacing_source, planar, path, axes_found, warnings
        As for :class:`MaskImage`; ``label`` names the file in messages,
        ``kind`` its format, ``file`` the file or store on disk.
    """

    def __init__(self, stack, opened, *, label, kind, path, file, spacing, spacing_source, warnings):
        self._stack, self._opened = stack, opened
        self.label, self.kind, self.path, self.file = label, kind, path, file
        self.spacing, self.spacing_source, self.warnings = spacing, spacing_source, tuple(warnings)
        self.shape = opened.layout.shape3
        self.planar = opened.layout.planar
        self.axes_found = opened.layout.axes_found
        self.dtype = opened.dtype
        self._source = None

    @property
    def source(self):
        if self._source is None:
            if self._opened.lazy is not None:
                self._source = self._opened.lazy()
            else:
                self._source, _ = self._opened.load()
        return self._source

    def sha256(self) -> str:
        """Digest of the file (or every file of the store): reads it all."""
        return sha256_file(self.file)

    def close(self) -> None:
        self._source = None
        self._stack.close()

    def __enter__(self) -> "LazyMask":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def open_mask(
    path: str | os.PathLike[str],
    *,
    spacing: Sequence[float] | None = None,
    threshold: float | None = None,
    implausible_spacing: str = "warn",
    dataset: str | None = None,
) -> LazyMask:
    """Open a mask file for reading part by part: header, axes and spacing checked, pixels not loaded.

    Parameters are those of :func:`read_mask`; ``dataset`` names the array of
    a Zarr store or HDF5 file (also written ``FILE:/path`` in ``path``).
    The checks of values (binary, no NaN) happen as the pixels are read.

    Returns
    -------
    LazyMask
        Close it (or use it in a ``with`` block) to release the file.
    """
    arg_spacing = _parse_spacing_argument(spacing)
    _check_threshold(threshold)
    mode = _check_mode(implausible_spacing)
    path_text = os.fspath(path)
    if not isinstance(path_text, str):
        path_text = os.fsdecode(path_text)
    file_text, inner = split_dataset(path_text)
    if inner is not None and dataset is not None and inner.strip("/") != str(dataset).strip("/"):
        raise InputError(f"'{path_text}' names dataset '{inner}', and dataset= names '{dataset}'; "
                         "expected one of them", param="dataset")
    dataset = dataset if dataset is not None else inner
    p = Path(file_text)
    label = f"mask '{path_text}'"
    if not p.exists():
        raise InputError(f"mask file '{file_text}' does not exist")
    kind = _format_of(p, file_text)
    if kind == "zarr" and not p.is_dir():
        raise InputError(f"mask '{file_text}' is not a Zarr store (a folder); expected one of "
                         + ", ".join(SUPPORTED_EXTENSIONS))
    if kind != "zarr" and not p.is_file():
        raise InputError(f"mask '{file_text}' is not a file; expected one of " + ", ".join(SUPPORTED_EXTENSIONS))
    if dataset is not None and kind not in _CONTAINERS:
        raise InputError(f"a {kind} file holds one array; dataset= is for Zarr stores and HDF5 files",
                         param="dataset")
    notes: list[str] = []
    stack = contextlib.ExitStack()
    try:
        with _recorded_warnings(notes):
            if kind in _CONTAINERS:
                opened = _OPENERS[kind](p, file_text, label, stack, notes, dataset=dataset)
            else:
                opened = _OPENERS[kind](p, file_text, label, stack, notes)
            layout = opened.layout
            spacing3, source = _resolve_spacing(
                label, arg_spacing, opened.spacing, opened.spacing_problem, layout.planar, notes
            )
            if source != "default":
                where = "from the spacing argument" if source == "argument" else f"from {opened.spacing.description}"
                _check_spacing_plausible(label, spacing3, where, layout.planar, mode, notes)
    except BaseException:
        stack.close()
        raise
    return LazyMask(stack, opened, label=label, kind=kind, path=path_text, file=file_text, spacing=spacing3,
                    spacing_source=source, warnings=notes)


def mask_from_array(
    array: Any,
    *,
    spacing: Sequence[float] | None = None,
    threshold: float | None = None,
    implausible_spacing: str = "warn",
) -> MaskImage:
    """Make a :class:`MaskImage` from an in-memory array.

    Parameters
    ----------
    array : array-like
        ``(Y, X)`` or ``(Z, Y, X)`` values; extra axes of size 1 are dropped.
        The array is never modified and the mask does not share its memory.
    spacing : sequence of float, optional
        Voxel size in µm, ``(dz, dy, dx)``, or ``(dy, dx)`` for a 2-D mask.
        Without it 1 µm is assumed on every axis, with a warning.
    threshold : float, optional
        Binarise as ``value > threshold``; required for non-binary images.
    implausible_spacing : {'warn', 'error'}, optional
        As for :func:`read_mask`.

    Returns
    -------
    MaskImage
        With ``path=None``, ``sha256`` of the array's C-order bytes and
        ``spacing_source`` ``'argument'`` or ``'default'``.

    Raises
    ------
    InputError
        Same value, axis and spacing checks as :func:`read_mask`.
    """
    arg_spacing = _parse_spacing_argument(spacing)
    threshold = _check_threshold(threshold)
    mode = _check_mode(implausible_spacing)
    label = "mask array"
    arr = np.asarray(array)
    _check_dtype(label, arr.dtype)
    layout, stored = _layout_positional(label, arr.shape)
    notes: list[str] = []
    spacing3, source = _resolve_spacing(label, arg_spacing, None, None, layout.planar, notes)
    if source == "argument":
        _check_spacing_plausible(label, spacing3, "from the spacing argument", layout.planar, mode, notes)
    digest = _sha256_array(arr)
    raw = arr.reshape(stored).reshape(layout.shape3)
    mask = _binarise(label, raw, threshold=threshold, in_place=False)
    return MaskImage(
        mask=mask,
        spacing=spacing3,
        spacing_source=source,
        planar=layout.planar,
        path=None,
        sha256=digest,
        original_dtype=str(arr.dtype),
        axes_found=layout.axes_found,
        warnings=tuple(notes),
    )
