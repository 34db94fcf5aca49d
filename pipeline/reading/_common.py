"""What every reader shares: the mask type, argument checks, axis layouts, library messages.

In: arguments and file metadata. Out: :class:`MaskImage` (the result type of reading), checked
numbers and spacings (an ``InputError`` naming the parameter otherwise), the ``(z, y, x)`` layout
of a file's axes, and the messages of the imaging libraries collected as warnings.
"""

from __future__ import annotations

import contextlib
import logging
import math
import re
import warnings
from dataclasses import dataclass
from typing import Any, Iterator, Sequence

import numpy as np

from ..errors import InputError

SUPPORTED_EXTENSIONS: tuple[str, ...] = (
    ".tif",
    ".tiff",
    ".ome.tif",
    ".ome.tiff",
    ".nii",
    ".nii.gz",
    ".npy",
    ".npz",
    ".zarr",
    ".ome.zarr",
    ".h5",
    ".hdf5",
)


DEFAULT_SPACING_WARNING = "no voxel spacing in the file or arguments; assuming 1 µm on every axis"

_AXES_EXPECTED = "expected a 2-D or 3-D binary mask (Y, X or Z, Y, X)"

# Slabs of about 4 Mi voxels keep per-step temporaries (bool comparisons,
# bincounts) in the tens of MiB whatever the volume size.
_CHUNK_VOXELS = 1 << 22

# tifffile axis letters that can stand for the stack (depth) axis: Z proper,
# Q (unknown, used for plain multi-page or "shaped" files) and I (image sequence).
_DEPTH_LETTERS = "ZQI"


@dataclass(frozen=True, eq=False)
class MaskImage:
    """A binary vessel mask with its voxel spacing and provenance.

    Attributes
    ----------
    mask : numpy.ndarray
        Boolean array of shape ``(Z, Y, X)``, C-contiguous; ``True`` is vessel.
        2-D inputs have ``Z == 1``.
    spacing : tuple of float
        Voxel size in µm as ``(dz, dy, dx)``. For planar masks ``dz`` is
        ``min(dy, dx)``.
    spacing_source : str
        Where the spacing came from: ``'argument'``, ``'ome'``, ``'imagej'``,
        ``'tiff-resolution'``, ``'nifti'``, ``'npz'`` or ``'default'``; for a
        NIfTI header without a spatial unit, ``'nifti-no-unit-um'`` or
        ``'nifti-no-unit-mm'``: the unit chosen because only it makes the
        ``pixdim`` values a plausible voxel size (the choice is also in
        ``warnings``).
    planar : bool
        True when the input has a single z plane (a 2-D image).
    path : str or None
        The file read, or None for arrays.
    sha256 : str
        Hex SHA-256 of the file bytes, or of the C-order bytes of the input
        array for :func:`mask_from_array`.
    original_dtype : str
        The stored dtype before binarisation, e.g. ``'uint8'``.
    axes_found : str
        The axes as stored, one letter per axis, e.g. ``'ZYX'``, ``'TZCYXS'``
        (TIFF), ``'XYZ'`` (NIfTI). Singleton axes dropped from unnamed arrays
        are shown as ``'Q'``.
    warnings : tuple of str
        Messages for the user and the run record (assumed spacing, ignored
        metadata, ...).

    Notes
    -----
    Equality is identity (``eq=False``): comparing arrays element-wise inside
    a generated ``__eq__`` would be ambiguous.
    """

    mask: np.ndarray
    spacing: tuple[float, float, float]
    spacing_source: str
    planar: bool
    path: str | None
    sha256: str
    original_dtype: str
    axes_found: str
    warnings: tuple[str, ...] = ()

    @property
    def shape(self) -> tuple[int, int, int]:
        """Shape of the mask, ``(Z, Y, X)``."""
        return tuple(int(n) for n in self.mask.shape)  # type: ignore[return-value]


# --------------------------------------------------------------------------- #
# Argument checks
# --------------------------------------------------------------------------- #


def _is_real_number(value: Any) -> bool:
    return isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(
        value, (bool, np.bool_)
    )


def _positive_number(name: str, value: Any) -> float:
    if not _is_real_number(value):
        raise InputError(f"{name}: expected a positive number, got {value!r}")
    value = float(value)
    if not math.isfinite(value) or value <= 0:
        raise InputError(f"{name}: expected a positive finite number, got {value!r}")
    return value


def _check_threshold(threshold: Any) -> float | None:
    if threshold is None:
        return None
    if not _is_real_number(threshold):
        raise InputError(f"threshold: expected a number, got {threshold!r}")
    value = float(threshold)
    if not math.isfinite(value):
        raise InputError(f"threshold: expected a finite number, got {value!r}")
    return value


def _parse_spacing_argument(spacing: Any) -> tuple[float, ...] | None:
    if spacing is None:
        return None
    if isinstance(spacing, (str, bytes)) or not hasattr(spacing, "__len__"):
        raise InputError(
            f"spacing: expected 2 values (dy, dx) or 3 values (dz, dy, dx) in µm, got {spacing!r}"
        )
    values = list(np.asarray(spacing, dtype=object).ravel()) if isinstance(spacing, np.ndarray) else list(spacing)
    if len(values) not in (2, 3):
        raise InputError(
            f"spacing: expected 2 values (dy, dx) or 3 values (dz, dy, dx) in µm, got {len(values)} values"
        )
    names = ("dy", "dx") if len(values) == 2 else ("dz", "dy", "dx")
    out = []
    for axis, v in zip(names, values):
        if not _is_real_number(v):
            raise InputError(f"spacing: {axis} must be a positive finite number of µm, got {v!r}")
        f = float(v)
        if not math.isfinite(f) or f <= 0:
            raise InputError(f"spacing: {axis} must be a positive finite number of µm, got {f!r}")
        out.append(f)
    return tuple(out)


def _optional_positive(name: str, value: Any) -> float | None:
    return None if value is None else _positive_number(name, value)


def _fmt_axes(planar: bool) -> str:
    return "(dy, dx)" if planar else "(dz, dy, dx)"


# --------------------------------------------------------------------------- #
# Spacing from metadata
# --------------------------------------------------------------------------- #


@dataclass
class _FileSpacing:
    """Spacing found in a file, in µm; ``dz`` None when the file has none."""

    dz: float | None
    dy: float
    dx: float
    source: str
    description: str  # e.g. "the OME metadata", for messages
    dz_default: float = 1.0  # µm assumed for a missing dz on 3-D data
    note: str | None = None  # for the warnings when this spacing is used


# --------------------------------------------------------------------------- #
# Axes
# --------------------------------------------------------------------------- #


@dataclass
class _Layout:
    """How the stored array maps onto (Z, Y, X)."""

    shape3: tuple[int, int, int]
    planar: bool
    axes_found: str


def _axes_error(label: str, pairs: Sequence[tuple[str, int]], tail: str = "") -> InputError:
    listed = ", ".join(f"{name}={n}" for name, n in pairs)
    count = "1 axis" if len(pairs) == 1 else f"{len(pairs)} axes"
    return InputError(f"{label} has {count} ({listed}); {_AXES_EXPECTED}{tail}")


def _layout_named(label: str, axes: str, shape: Sequence[int]) -> _Layout:
    """Layout of a tifffile series from its axis letters."""
    kept = [(a, int(n)) for a, n in zip(axes, shape) if int(n) != 1 or a in "YX"]
    letters = "".join(a for a, _ in kept)
    if letters == "YX":
        y, x = (n for _, n in kept)
        return _Layout((1, y, x), True, axes)
    if len(letters) == 3 and letters[0] in _DEPTH_LETTERS and letters[1:] == "YX":
        z, y, x = (n for _, n in kept)
        return _Layout((z, y, x), z == 1, axes)
    tail = ""
    if "S" in letters:
        tail = "; S is the colour-sample axis and colour images are not masks"
    elif len(kept) == 3:
        other = next(a for a in letters if a not in "YX")
        tail = f"; axis {other} is not a z axis"
    raise _axes_error(label, kept, tail)


def _layout_positional(label: str, shape: Sequence[int]) -> tuple[_Layout, tuple[int, ...]]:
    """Layout of an unnamed array: (Y, X) or (Z, Y, X); padding axes of size 1 dropped.

    Returns the layout and the shape to reshape the stored array to.
    """
    shape = tuple(int(n) for n in shape)
    if len(shape) > 3:
        kept = tuple(n for n in shape if n != 1)
        if len(kept) > 3 or len(kept) < 2:
            raise _axes_error(label, [(f"axis {i}", n) for i, n in enumerate(shape)])
        letters = iter("ZYX"[-len(kept):])
        axes_found = "".join("Q" if n == 1 else next(letters) for n in shape)
    else:
        kept = shape
        axes_found = "ZYX"[-len(shape):] if shape else ""
    if len(kept) == 2:
        return _Layout((1, kept[0], kept[1]), True, axes_found), kept
    if len(kept) == 3:
        return _Layout((kept[0], kept[1], kept[2]), kept[0] == 1, axes_found), kept
    raise _axes_error(label, [(f"axis {i}", n) for i, n in enumerate(shape)])


# --------------------------------------------------------------------------- #
# Library noise
# --------------------------------------------------------------------------- #


class _LogCollector(logging.Handler):
    def __init__(self) -> None:
        super().__init__(level=logging.WARNING)
        self.records: list[logging.LogRecord] = []

    def emit(self, record: logging.LogRecord) -> None:
        self.records.append(record)

    def messages(self, min_level: int, max_level: int = logging.CRITICAL + 1) -> list[str]:
        out = []
        for r in self.records:
            if min_level <= r.levelno < max_level:
                # tifffile prefixes messages with the object repr, e.g. "<tifffile.TiffPages @8>".
                out.append(_clean_message(r.getMessage()))
        return out


@contextlib.contextmanager
def _collect_library_messages(logger_name: str) -> Iterator[_LogCollector]:
    """Route a library's log records to a collector instead of stderr."""
    logger = logging.getLogger(logger_name)
    handler = _LogCollector()
    old_propagate = logger.propagate
    logger.addHandler(handler)
    logger.propagate = False
    try:
        yield handler
    finally:
        logger.removeHandler(handler)
        logger.propagate = old_propagate


@contextlib.contextmanager
def _recorded_warnings(notes: list[str]) -> Iterator[None]:
    """Turn Python warnings raised by libraries into warning strings."""
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        try:
            yield
        finally:
            for w in caught:
                text = f"{w.category.__name__}: {w.message}"
                if text not in notes:
                    notes.append(text)


def _short_reason(exc: BaseException) -> str:
    text = str(exc).strip()
    line = text.splitlines()[0].strip() if text else type(exc).__name__
    return _clean_message(line) or type(exc).__name__


def _clean_message(text: str) -> str:
    """Strip tifffile's object reprs and "raised Error('...')" wrappers from a message."""
    text = text.strip()
    wrapped = re.fullmatch(r"raised \w+\((['\"])(.*)\1\)", text)
    if wrapped:
        text = wrapped.group(2)
    text = re.sub(r"<[^<>]*>\s*", "", text).strip()
    return text if len(text) <= 160 else text[:157] + "..."


def _corrupt(kind: str, path_text: str, reason: str) -> InputError:
    return InputError(
        f"could not read {kind} '{path_text}': {reason}; the file may be truncated or corrupt"
    )
