"""Chunked volumes: OME-Zarr, plain Zarr arrays and HDF5 datasets, read lazily.

In: a path to a Zarr store (a ``.zarr`` folder, formats 2 and 3; an
OME-Zarr image or any array in it) or an HDF5 file (``.h5``, ``.hdf5``), and
optionally which array inside (``dataset``, or ``FILE:/path/in/file``).
Out: an :class:`~pipeline.reading.opened._Opened` whose pixels stay on disk:
``load()`` returns a ``(Z, Y, X)`` view that reads only the chunks a slice
touches, so a slab-by-slab scan (:func:`pipeline.reading.values._binarise`,
:func:`pipeline.blockwise.source.scan_runs`) never holds the volume.

Spacing:

- OME-Zarr (NGFF 0.4 and 0.5): the full-resolution level (the first of the
  multiscale's ``datasets``) is read; its spacing is the product of that
  level's ``scale`` transformation and the multiscale's own, in the unit each
  spatial axis states (``micrometer``, ``nanometer``, ``millimeter``, ...).
  Axes of type ``time`` and ``channel`` must have length 1.
- HDF5: the dataset's ``element_size_um`` attribute (z, y, x in µm), a
  convention of several imaging tools, when present.
- A plain Zarr array has no spacing: pass one.

Every problem is one :class:`~pipeline.errors.InputError` line: a store or
file that cannot be opened, no array where one was expected (the arrays
found are listed), a dataset path that does not exist, axes that are not
(z, y, x), chunks that do not decode (when they are read).
"""

from __future__ import annotations

import contextlib
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ._common import _FileSpacing, _layout_positional, _short_reason
from .opened import _Opened
from .spacing import _unit_factor
from .values import _check_dtype

__all__ = ["split_dataset", "ZARR_SUFFIXES", "HDF5_SUFFIXES"]

ZARR_SUFFIXES = (".zarr", ".ome.zarr")
HDF5_SUFFIXES = (".h5", ".hdf5", ".he5")


def split_dataset(path_text: str) -> tuple[str, str | None]:
    """``'a.h5:/group/mask'`` -> ``('a.h5', '/group/mask')``; a path without ``:/`` after a known suffix as it is."""
    lower = path_text.lower()
    for suffix in HDF5_SUFFIXES + ZARR_SUFFIXES:
        at = lower.find(suffix + ":")
        if at >= 0:
            cut = at + len(suffix)
            return path_text[:cut], path_text[cut + 1:] or None
    return path_text, None


class _Volume:
    """A stored array seen as (Z, Y, X): axes of length 1 dropped, read errors as one InputError line."""

    def __init__(self, array: Any, label: str, kept: tuple[int, ...]):
        self.array, self.label, self.kept = array, label, kept
        self.shape = tuple(int(array.shape[a]) for a in kept)
        if len(self.shape) == 2:
            self.shape = (1,) + self.shape
        self.dtype = np.dtype(array.dtype)
        self.ndim = 3

    def __getitem__(self, index: Any) -> np.ndarray:
        if not isinstance(index, tuple):
            index = (index,)
        index = index + (slice(None),) * (3 - len(index))
        planes = len(self.kept) == 2  # a 2-D array seen as one plane: index[0] selects on that plane axis
        full: list[Any] = [0] * len(self.array.shape)
        for a, sel in zip(self.kept, index[1:] if planes else index):
            full[a] = sel
        try:
            out = np.asarray(self.array[tuple(full)])
        except Exception as exc:
            raise InputError(f"{self.label}: the stored data cannot be read ({_short_reason(exc)})") from None
        if planes:
            out = out[None][index[0]]
        return out

    def __array__(self, dtype=None, copy=None):
        out = self[:, :, :]
        return out.astype(dtype) if dtype is not None else out


def _kept_axes(label: str, shape: tuple[int, ...]) -> tuple[int, ...]:
    _layout_positional(label, shape)  # the same axis rules as other formats
    if len(shape) <= 3:
        return tuple(range(len(shape)))
    return tuple(a for a, n in enumerate(shape) if n != 1)


def _opened(array: Any, label: str, found: _FileSpacing | None, kept: tuple[int, ...] | None = None) -> _Opened:
    shape = tuple(int(n) for n in array.shape)
    layout, _ = _layout_positional(label, shape)
    dtype = np.dtype(array.dtype)
    _check_dtype(label, dtype)
    volume = _Volume(array, label, kept if kept is not None else _kept_axes(label, shape))

    def load() -> tuple[Any, bool]:
        return volume, False

    return _Opened(layout, dtype, found, None, load)


# --------------------------------------------------------------------------- #
# Zarr and OME-Zarr
# --------------------------------------------------------------------------- #


def _arrays_in(group: Any, prefix: str = "") -> list[str]:
    names = []
    for name, member in group.members():
        path = f"{prefix}/{name}" if prefix else name
        if hasattr(member, "shape") and hasattr(member, "dtype"):
            names.append(path)
        else:
            names.extend(_arrays_in(member, path))
    return names


def _multiscale(attrs: dict) -> dict | None:
    ome = attrs.get("ome")
    if isinstance(ome, dict) and ome.get("multiscales"):
        return ome["multiscales"][0]
    if attrs.get("multiscales"):
        return attrs["multiscales"][0]
    return None


def _scale_of(transforms: Any) -> list[float] | None:
    for t in transforms or ():
        if isinstance(t, dict) and t.get("type") == "scale":
            return [float(v) for v in t["scale"]]
    return None


def _ome_spacing(label: str, ms: dict, level: dict, shape: tuple[int, ...]) -> tuple[_FileSpacing | None, tuple]:
    """Spacing of the full-resolution level of an OME-Zarr multiscale, and the array axes of z, y, x."""
    axes = ms.get("axes") or []
    names = [a.get("name") if isinstance(a, dict) else str(a) for a in axes]
    types = [a.get("type") if isinstance(a, dict) else None for a in axes]
    units = [a.get("unit") if isinstance(a, dict) else None for a in axes]
    if len(names) != len(shape):
        raise InputError(f"{label}: the OME-Zarr metadata names {len(names)} axes ({', '.join(map(str, names))}) "
                         f"but the full-resolution array has {len(shape)}")
    for name, kind, n in zip(names, types, shape):
        if (kind in ("time", "channel") or name in ("t", "c")) and n != 1:
            raise InputError(f"{label}: expected a single {kind or name} (a binary mask), got axis '{name}' of "
                             f"length {n}; save one channel and time point")
    spatial = [i for i, (name, kind) in enumerate(zip(names, types))
               if kind == "space" or (kind is None and name in ("z", "y", "x"))]
    if [names[i] for i in spatial] not in (["z", "y", "x"], ["y", "x"]):
        raise InputError(f"{label}: expected spatial axes z, y, x in that order, got "
                         f"{', '.join(names[i] for i in spatial) or 'none'}")
    scale = _scale_of(level.get("coordinateTransformations"))
    overall = _scale_of(ms.get("coordinateTransformations"))
    if scale is None:
        return None, tuple(spatial)
    if overall is not None:
        scale = [a * b for a, b in zip(scale, overall)]
    um = []
    for i in spatial:
        factor = _unit_factor(units[i]) if units[i] is not None else None
        if not factor:
            raise InputError(f"{label}: axis '{names[i]}' has unit {units[i]!r}, which is not a length vesselflow "
                             "knows; pass spacing=(dz, dy, dx) in µm")
        um.append(scale[i] * factor)
    dz = um[0] if len(um) == 3 else None
    return _FileSpacing(dz, um[-2], um[-1], "ome-zarr", "the OME-Zarr metadata"), tuple(spatial)


def open_zarr(path: Path, path_text: str, label: str, stack: contextlib.ExitStack, notes: list[str],
              dataset: str | None = None) -> _Opened:
    import zarr

    try:
        node = zarr.open(store=str(path), mode="r")
    except Exception as exc:
        raise InputError(f"{label}: cannot be opened as a Zarr store ({_short_reason(exc)})") from None
    if dataset:
        try:
            node = node[dataset.strip("/")] if not hasattr(node, "shape") else None
        except KeyError:
            node = None
        if node is None or not hasattr(node, "shape"):
            raise InputError(f"{label}: no array '{dataset}' in the store", param="dataset")
        return _opened(node, label, None)
    if hasattr(node, "shape"):
        return _opened(node, label, None)
    ms = _multiscale(dict(node.attrs))
    if ms is not None:
        level = (ms.get("datasets") or [{}])[0]
        try:
            array = node[str(level.get("path"))]
        except KeyError:
            raise InputError(f"{label}: the OME-Zarr metadata names the full-resolution array "
                             f"'{level.get('path')}', which the store does not hold") from None
        found, spatial = _ome_spacing(label, ms, level, tuple(int(n) for n in array.shape))
        return _opened(array, label, found, kept=spatial)
    arrays = sorted(_arrays_in(node))
    if len(arrays) == 1:
        return _opened(node[arrays[0]], label, None)
    listed = ", ".join(arrays[:8]) or "none"
    raise InputError(f"{label}: expected an OME-Zarr image or a single array, found arrays: {listed}; name one "
                     "with dataset=NAME (or STORE.zarr:/NAME)")


# --------------------------------------------------------------------------- #
# HDF5
# --------------------------------------------------------------------------- #


def open_hdf5(path: Path, path_text: str, label: str, stack: contextlib.ExitStack, notes: list[str],
              dataset: str | None = None) -> _Opened:
    import h5py

    try:
        f = h5py.File(path, "r")
    except Exception as exc:
        raise InputError(f"{label}: cannot be opened as an HDF5 file ({_short_reason(exc)})") from None
    stack.callback(f.close)
    if dataset is None:
        found: list[str] = []
        f.visititems(lambda name, obj: found.append(name) if isinstance(obj, h5py.Dataset) else None)
        found.sort()
        if len(found) != 1:
            listed = ", ".join("/" + n for n in found[:8]) or "none"
            raise InputError(f"{label}: expected a single dataset, found: {listed}; name one with dataset=NAME "
                             "(or FILE.h5:/NAME)")
        dataset = found[0]
    obj = f.get(dataset)
    if not isinstance(obj, h5py.Dataset):
        raise InputError(f"{label}: no dataset '{dataset}' in the file", param="dataset")
    spacing = None
    size = obj.attrs.get("element_size_um")
    if size is not None:
        size = [float(v) for v in np.ravel(size)]
        if len(size) == 3:
            spacing = _FileSpacing(size[0], size[1], size[2], "hdf5", "the HDF5 element_size_um attribute")
        elif len(size) == 2:
            spacing = _FileSpacing(None, size[0], size[1], "hdf5", "the HDF5 element_size_um attribute")
    return _opened(obj, label, spacing)
