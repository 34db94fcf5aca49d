"""Reading binary vessel masks from disk or from arrays.

In: a path to a TIFF / BigTIFF / OME-TIFF (``.tif``, ``.tiff``, ``.ome.tif``,
``.ome.tiff``; uncompressed or LZW/zlib/zstd compressed), NIfTI-1/2 (``.nii``,
``.nii.gz``) or NumPy (``.npy``, ``.npz``) file, or an in-memory array; an
optional voxel spacing and an optional threshold. Out: a :class:`MaskImage`
holding a C-contiguous boolean ``(Z, Y, X)`` mask, the voxel spacing in µm as
``(dz, dy, dx)``, where that spacing came from, and provenance (file hash,
stored dtype, axes found, warning strings for the run record).

Every problem with the input is reported as one :class:`~pipeline.errors.InputError`
line naming the file or parameter, what was expected and what was found. The
module never emits Python warnings: anything worth telling the user is returned
in ``MaskImage.warnings``.

Conventions
-----------
* Axis order is ``(z, y, x)``; voxel ``(i, j, k)`` has its centre at
  ``(i*dz, j*dy, k*dx)`` µm. NIfTI stores ``(x, y, z)`` and is transposed on
  reading; its orientation (affine) is otherwise ignored because vessel
  measurements do not depend on axis flips.
* A mask with a single z plane (a 2-D file, or a 3-D one with one slice) is
  returned with shape ``(1, Y, X)`` and ``planar=True``. Its z spacing is set to
  ``min(dy, dx)``; the analysis of planar masks is in-plane and never uses it.
* A voxel is vessel when it is non-zero, provided the image has at most two
  distinct values one of which is 0. Anything else needs an explicit threshold
  (vessel = value > threshold).
* Spacing is checked for plausibility before any pixel data are loaded: a
  value outside :data:`PLAUSIBLE_SPACING_UM` (a unit mix-up: nanometres or
  millimetres taken as µm) or in-plane axes far apart with z finer than one
  of them (values given in X Y Z order) gives one warning, or an error when
  asked for (``implausible_spacing='error'``). A NIfTI header without a
  spatial unit is read in the one unit (µm or mm) that makes its ``pixdim``
  plausible, and refused when both or neither do.
* The memory check counts the isotropic grid that the centrelines step thins
  on when it resamples (see :func:`thinning_grid_shape`), so a spacing that
  would make that grid astronomical fails here, before any allocation.
"""

from __future__ import annotations

import contextlib
import hashlib
import logging
import math
import os
import re
import warnings
import xml.etree.ElementTree as ET
import zipfile
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import numpy as np

from .errors import InputError

__all__ = [
    "MaskImage",
    "read_mask",
    "mask_from_array",
    "estimate_memory_bytes",
    "available_memory_bytes",
    "check_memory",
    "thinning_grid_shape",
    "spacing_problem",
    "PLAUSIBLE_SPACING_UM",
    "SUPPORTED_EXTENSIONS",
    "DEFAULT_SPACING_WARNING",
    "sha256_file",
]

SUPPORTED_EXTENSIONS: tuple[str, ...] = (
    ".tif",
    ".tiff",
    ".ome.tif",
    ".ome.tiff",
    ".nii",
    ".nii.gz",
    ".npy",
    ".npz",
)

DEFAULT_SPACING_WARNING = "no voxel spacing in the file or arguments; assuming 1 µm on every axis"

_AXES_EXPECTED = "expected a 2-D or 3-D binary mask (Y, X or Z, Y, X)"

# Voxel sizes, µm, that the imaging this package is for produces (common
# practice): optical microscopy resolves about 0.2 µm at best, so even
# oversampled pixels stay above about 0.05 µm; micro-CT of vascular casts has
# voxels of a few to tens of µm, whole-animal scans up to about 100 µm. A
# value outside is almost always a unit mix-up: nanometres read as µm are
# 1000x too large, millimetres read as µm 1000x too small.
PLAUSIBLE_SPACING_UM: tuple[float, float] = (0.05, 100.0)

# Scanners and cameras sample x and y alike, so the in-plane pixel sizes of a
# stack agree or nearly so, and z is the coarsest axis or equal (common
# practice). In-plane sizes further apart than this factor, with z finer than
# the coarser of them, look like a spacing given in X Y Z order.
_IN_PLANE_RATIO_MAX = 3.0

_IMPLAUSIBLE_SPACING_MODES = ("warn", "error")

# Spatial unit codes of the NIfTI-1 header as nibabel names them (nifti1.h:
# xyzt_units & 0x07; 1 metre, 2 millimetre, 3 micrometre, 0 unspecified).
_NIFTI_UNIT_TO_UM = {"meter": 1e6, "mm": 1e3, "micron": 1.0}

# Slabs of about 4 Mi voxels keep per-step temporaries (bool comparisons,
# bincounts) in the tens of MiB whatever the volume size.
_CHUNK_VOXELS = 1 << 22

# System files read by available_memory_bytes(); module constants so that tests
# can point them at fakes.
_PROC_MEMINFO = Path("/proc/meminfo")
_PROC_SELF_CGROUP = Path("/proc/self/cgroup")
_CGROUP_ROOT = Path("/sys/fs/cgroup")

# cgroup v1 reports "no limit" as a huge page-aligned number close to 2**63.
_CGROUP_UNLIMITED = 1 << 60

_GIB = float(1 << 30)

# Length units to µm. Keys are lower-case; ImageJ writes the micro sign as the
# literal escape "\u00b5", which _unit_factor() normalises first.
_UNIT_TO_UM: dict[str, float] = {
    "m": 1e6,
    "meter": 1e6,
    "metre": 1e6,
    "cm": 1e4,
    "mm": 1e3,
    "millimeter": 1e3,
    "millimetre": 1e3,
    "µm": 1.0,
    "um": 1.0,
    "micron": 1.0,
    "microns": 1.0,
    "micrometer": 1.0,
    "micrometre": 1.0,
    "micrometers": 1.0,
    "micrometres": 1.0,
    "nm": 1e-3,
    "nanometer": 1e-3,
    "nanometre": 1e-3,
    "pm": 1e-6,
    "å": 1e-4,
    "angstrom": 1e-4,
    "inch": 25400.0,
    "in": 25400.0,
}

# ImageJ's way of saying "not calibrated".
_UNCALIBRATED_UNITS = {"", "pixel", "pixels", "px"}

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
# Memory
# --------------------------------------------------------------------------- #


def estimate_memory_bytes(shape: Sequence[int], bytes_per_voxel: float = 16.0, *,
                          grid_shape: Sequence[int] | None = None) -> int:
    """Estimate the memory needed to analyse a volume.

    Parameters
    ----------
    shape : sequence of int
        Volume shape, e.g. ``(Z, Y, X)``.
    bytes_per_voxel : float, optional
        Peak working memory per voxel of the whole analysis (mask, distance
        map, labels, skeleton, ...). Default 16.
    grid_shape : sequence of int, optional
        Shape of the isotropic grid the centrelines are thinned on when the
        volume is resampled (:func:`thinning_grid_shape`).

    Returns
    -------
    int
        ``ceil(n_voxels * bytes_per_voxel)`` in bytes; with ``grid_shape``,
        the larger of that and ``n_grid * bytes_per_voxel + 2 * n_voxels``.

    Notes
    -----
    On a resampled volume the thinning, distance and radius steps work on
    the grid, while the mask and its cleaned copy (one byte per voxel each)
    stay alive on the input grid.
    """
    bpv = _positive_number("bytes_per_voxel", bytes_per_voxel)
    n_voxels = math.prod(int(n) for n in shape)  # Python ints: no overflow for huge shapes
    need = n_voxels * bpv
    if grid_shape is not None:
        n_grid = math.prod(int(n) for n in grid_shape)
        need = max(need, n_grid * bpv + 2 * n_voxels)
    return int(math.ceil(need))


def thinning_grid_shape(
    shape: Sequence[int],
    spacing: Sequence[float],
    *,
    planar: bool = False,
    max_anisotropy: float | None = None,
    resample_spacing_um: float | None = None,
) -> tuple[int, int, int] | None:
    """Shape of the isotropic grid the centrelines step thins a volume on.

    Follows the rule of :func:`pipeline.centrelines.extract_centrelines`: the
    volume is resampled when its coarsest spacing exceeds the finest by more
    than ``max_anisotropy`` (to ``resample_spacing_um``, or the finest
    spacing), or when ``resample_spacing_um`` is set and differs from the
    spacing.

    Parameters
    ----------
    shape : sequence of 3 int
        Volume shape ``(Z, Y, X)``.
    spacing : sequence of 3 float
        Voxel spacing in µm, ``(dz, dy, dx)``.
    planar : bool, optional
        In-plane analysis: only y and x are resampled.
    max_anisotropy : float, optional
        ``centrelines.max_anisotropy``; None: no resampling for anisotropy.
    resample_spacing_um : float, optional
        ``centrelines.resample_spacing_um``.

    Returns
    -------
    tuple of 3 int or None
        The grid's shape, or None when the input grid is thinned as it is.
        An upper bound: the step resamples the mask cropped to its vessels.
    """
    grid = _thinning_grid(shape, spacing, planar, max_anisotropy, resample_spacing_um)
    return None if grid is None else grid[0]


def _thinning_grid(shape: Sequence[int], spacing: Sequence[float], planar: bool,
                   max_anisotropy: float | None,
                   resample_spacing_um: float | None) -> tuple[tuple[int, int, int], float] | None:
    axes = (1, 2) if planar else (0, 1, 2)
    sp = [float(spacing[a]) for a in axes]
    if max_anisotropy is not None and max(sp) / min(sp) > max_anisotropy:
        target = float(resample_spacing_um or min(sp))
    elif resample_spacing_um is not None and not np.allclose(sp, resample_spacing_um):
        target = float(resample_spacing_um)
    else:
        return None
    out = [int(n) for n in shape]
    for a in axes:
        # The output shape of pipeline.centrelines.resample_isotropic, in Python
        # floats and ints so that an absurd grid is a number, not an overflow.
        out[a] = int(math.floor((out[a] - 1) * float(spacing[a]) / target + 1e-9)) + 1
    return (out[0], out[1], out[2]), target


def available_memory_bytes() -> int | None:
    """Memory this process can still use, in bytes.

    The smallest of ``MemAvailable`` from ``/proc/meminfo`` and the cgroup
    memory limit (v2 ``memory.max`` or v1 ``memory.limit_in_bytes``, of the
    process's cgroup and its ancestors) when one is set. Falls back to
    ``os.sysconf`` available physical pages where ``/proc`` is missing.

    Returns
    -------
    int or None
        Bytes, or None when nothing could be determined.
    """
    candidates: list[int] = []
    mem_available = _meminfo_available(_PROC_MEMINFO)
    if mem_available is not None:
        candidates.append(mem_available)
    limit = _cgroup_memory_limit()
    if limit is not None:
        candidates.append(limit)
    if mem_available is None:
        try:
            pages = os.sysconf("SC_AVPHYS_PAGES")
            page_size = os.sysconf("SC_PAGE_SIZE")
        except (AttributeError, ValueError, OSError):
            pages = page_size = -1
        if pages > 0 and page_size > 0:
            candidates.append(int(pages) * int(page_size))
    return min(candidates) if candidates else None


def _meminfo_available(path: Path) -> int | None:
    try:
        text = path.read_text()
    except OSError:
        return None
    match = re.search(r"^MemAvailable:\s+(\d+)\s*kB", text, flags=re.MULTILINE)
    return int(match.group(1)) * 1024 if match else None


def _read_limit(path: Path) -> int | None:
    try:
        text = path.read_text().strip()
    except OSError:
        return None
    if not text.isdigit():  # "max" (v2) or garbage: no limit
        return None
    value = int(text)
    return value if 0 < value < _CGROUP_UNLIMITED else None


def _cgroup_memory_limit() -> int | None:
    """Tightest cgroup memory limit on the path from this process's cgroup to the root."""
    v2_rel: str | None = None
    v1_rel: str | None = None
    try:
        lines = _PROC_SELF_CGROUP.read_text().splitlines()
    except OSError:
        lines = []
    for line in lines:
        parts = line.split(":", 2)
        if len(parts) != 3:
            continue
        if parts[0] == "0" and parts[1] == "":
            v2_rel = parts[2]
        elif "memory" in parts[1].split(","):
            v1_rel = parts[2]

    limits: list[int] = []
    # Inside containers the own cgroup is usually mounted as the root, and the
    # path from /proc/self/cgroup may not exist: always look at the root too.
    for base, rel, name in (
        (_CGROUP_ROOT, v2_rel, "memory.max"),
        (_CGROUP_ROOT / "memory", v1_rel, "memory.limit_in_bytes"),
    ):
        dirs = [base]
        if rel:
            d = base / rel.strip("/")
            while d != base and base in d.parents:
                dirs.append(d)
                d = d.parent
        for d in dirs:
            value = _read_limit(d / name)
            if value is not None:
                limits.append(value)
    return min(limits) if limits else None


def _format_bytes(n: float) -> str:
    for unit, size in (("PiB", float(1 << 50)), ("TiB", float(1 << 40)), ("GiB", _GIB),
                       ("MiB", float(1 << 20)), ("KiB", 1024.0)):
        if n >= size:
            return f"{n / size:.1f} {unit}"
    return f"{int(n)} bytes"


def check_memory(
    label: str,
    shape: Sequence[int],
    spacing: Sequence[float],
    *,
    planar: bool = False,
    bytes_per_voxel: float = 16.0,
    memory_limit_bytes: float | None = None,
    max_anisotropy: float | None = None,
    resample_spacing_um: float | None = None,
) -> str | None:
    """Refuse a volume whose analysis would not fit in memory.

    Parameters
    ----------
    label : str
        How messages name the volume, e.g. ``"mask 'a.tif'"``.
    shape : sequence of 3 int
        Volume shape ``(Z, Y, X)``.
    spacing : sequence of 3 float
        Voxel spacing in µm, ``(dz, dy, dx)``.
    planar : bool, optional
        In-plane analysis.
    bytes_per_voxel : float, optional
        Peak analysis memory per voxel (see :func:`estimate_memory_bytes`).
    memory_limit_bytes : float, optional
        Memory the analysis may use; default: :func:`available_memory_bytes`.
    max_anisotropy, resample_spacing_um : float, optional
        The ``centrelines`` options, to count the thinning grid
        (:func:`thinning_grid_shape`).

    Returns
    -------
    str or None
        A note when the available memory could not be determined (nothing
        was checked), else None.

    Raises
    ------
    InputError
        When the estimate exceeds the limit; the message gives the shapes,
        both sizes, and the likely mistake when the spacing is implausible.
    """
    shape3 = tuple(int(n) for n in shape)
    grid = _thinning_grid(shape3, spacing, planar, max_anisotropy, resample_spacing_um)
    need = estimate_memory_bytes(shape3, bytes_per_voxel, grid_shape=None if grid is None else grid[0])
    limit = memory_limit_bytes if memory_limit_bytes is not None else available_memory_bytes()
    if limit is None:
        return "could not determine the available memory; memory check skipped"
    if need <= limit:
        return None
    z, y, x = shape3
    what = f"{z} x {y} x {x} voxels"
    remedy = "crop or downsample the mask, or raise the memory limit"
    if grid is not None:
        (gz, gy, gx), target = grid
        what += f"; {gz} x {gy} x {gx} voxels once resampled to {target:g} µm for thinning"
        remedy = ("crop or downsample the mask, set centrelines.resample_spacing_um to a coarser "
                  "spacing, or raise the memory limit")
    message = (f"{label} ({what}) needs about {_format_bytes(need)} to analyse; "
               f"only {_format_bytes(limit)} are available; {remedy}")
    problem = spacing_problem(spacing, planar=planar)
    if problem is not None:
        shown = _fmt_shown(spacing, planar)
        message += f"; the voxel spacing {_fmt_axes(planar)} = {shown} µm looks wrong: {problem}"
    raise InputError(message)


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


def _check_mode(implausible_spacing: Any) -> str:
    if not isinstance(implausible_spacing, str) or implausible_spacing not in _IMPLAUSIBLE_SPACING_MODES:
        raise InputError(f"implausible_spacing: expected 'warn' or 'error', got {implausible_spacing!r}")
    return implausible_spacing


def _optional_positive(name: str, value: Any) -> float | None:
    return None if value is None else _positive_number(name, value)


# --------------------------------------------------------------------------- #
# Spacing plausibility
# --------------------------------------------------------------------------- #


def _plausible(values: Sequence[float]) -> bool:
    lo, hi = PLAUSIBLE_SPACING_UM
    return all(lo <= v <= hi for v in values)


def spacing_problem(spacing: Sequence[float], *, planar: bool = False) -> str | None:
    """The likely mistake behind an implausible voxel spacing, in words.

    Parameters
    ----------
    spacing : sequence of 3 float
        Voxel spacing in µm, ``(dz, dy, dx)``.
    planar : bool, optional
        Only ``dy`` and ``dx`` matter (a single plane).

    Returns
    -------
    str or None
        None when every value lies within :data:`PLAUSIBLE_SPACING_UM` and,
        for a stack, the in-plane values agree within a factor of 3 or z is
        the coarsest axis; otherwise what looks wrong and what was likely
        meant.

    Examples
    --------
    >>> spacing_problem((2.0, 0.6, 0.6)) is None
    True
    >>> spacing_problem((0.6, 0.6, 3.0)).startswith("in-plane spacings")
    True
    """
    dz, dy, dx = (float(v) for v in spacing)
    values = (dy, dx) if planar else (dz, dy, dx)
    lo, hi = PLAUSIBLE_SPACING_UM
    problems = []
    if any(v > hi for v in values):
        text = f"values above {hi:g} µm are coarser than microscopy and micro-CT voxels"
        scaled = tuple(v / 1000 for v in values)
        if _plausible(scaled):
            text += (f"; 1000x too large, likely nanometres given as µm (or µm values labelled as "
                     f"millimetres), i.e. {_fmt_spacing(scaled)} µm")
        problems.append(text)
    if any(v < lo for v in values):
        text = f"values below {lo:g} µm are finer than optical microscopy resolves"
        scaled = tuple(v * 1000 for v in values)
        if _plausible(scaled):
            text += f"; 1000x too small, likely millimetres given as µm, i.e. {_fmt_spacing(scaled)} µm"
        problems.append(text)
    if not problems and not planar:
        fine, coarse = sorted((dy, dx))
        if coarse > _IN_PLANE_RATIO_MAX * fine and dz < coarse:
            problems.append(
                f"in-plane spacings dy, dx differ {coarse / fine:.3g}x and z is not the coarsest axis, "
                f"where stacks have dy ≈ dx and dz ≥ dy; likely given in X Y Z order instead of Z Y X, "
                f"i.e. {_fmt_spacing((dx, dy, dz))} µm"
            )
    return "; ".join(problems) or None


def _fmt_axes(planar: bool) -> str:
    return "(dy, dx)" if planar else "(dz, dy, dx)"


def _fmt_shown(spacing: Sequence[float], planar: bool) -> str:
    return _fmt_spacing(tuple(spacing)[1:] if planar else spacing)


def _check_spacing_plausible(label: str, spacing: tuple[float, float, float], where: str, planar: bool,
                             mode: str, notes: list[str]) -> None:
    """One warning line in ``notes``, or an InputError in mode 'error'."""
    problem = spacing_problem(spacing, planar=planar)
    if problem is None:
        return
    text = (f"{label}: voxel spacing {_fmt_axes(planar)} = {_fmt_shown(spacing, planar)} µm ({where}) "
            f"looks wrong: {problem}")
    if mode == "error":
        lo, hi = PLAUSIBLE_SPACING_UM
        raise InputError(
            f"{text}; expected voxel sizes of {lo:g}-{hi:g} µm in Z Y X order: pass the right spacing "
            "(--spacing Z Y X in µm), or set input.implausible_spacing to warn to go on"
        )
    notes.append(f"{text}; check it, or pass the right spacing (--spacing Z Y X in µm)")


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


def _unit_factor(unit: Any) -> float | None:
    """µm per ``unit``, 0.0 for an uncalibrated unit, None when unknown."""
    text = str(unit).strip()
    text = text.replace("\\u00B5", "µ").replace("\\u00b5", "µ").replace("\u03bc", "µ")
    text = text.lower()
    if text in _UNCALIBRATED_UNITS:
        return 0.0
    return _UNIT_TO_UM.get(text)


def _float_from_metadata(value: Any) -> float:
    # float32 header values (NIfTI pixdim) print as their shortest decimal;
    # going through str() gives 0.6 rather than 0.6000000238418579.
    if isinstance(value, np.floating):
        return float(str(value))
    return float(value)


def _resolve_spacing(
    label: str,
    arg: tuple[float, ...] | None,
    found: _FileSpacing | None,
    problem: str | None,
    planar: bool,
    notes: list[str],
) -> tuple[tuple[float, float, float], str]:
    if arg is not None:
        if len(arg) == 2:
            if not planar:
                raise InputError(
                    f"spacing: {label} is 3-D, expected 3 values (dz, dy, dx) in µm, got 2 values {arg}"
                )
            dy, dx = arg
            dz = min(dy, dx)
        else:
            dz, dy, dx = arg
        if found is not None:
            file_values = (found.dz if found.dz is not None else dz, found.dy, found.dx)
            compare = (dy, dx) if planar else (dz, dy, dx)
            file_compare = file_values[1:] if planar else file_values
            if not np.allclose(compare, file_compare, rtol=1e-6, atol=0):
                notes.append(
                    f"spacing argument {_fmt_spacing(compare)} µm overrides the spacing "
                    f"{_fmt_spacing(file_compare)} µm in {found.description} of {label}"
                )
        result = (dz, dy, dx)
        source = "argument"
    elif found is not None:
        if found.note is not None:
            notes.append(found.note)
        for axis, value in (("dz", found.dz), ("dy", found.dy), ("dx", found.dx)):
            if value is None or (axis == "dz" and planar):
                continue
            if not math.isfinite(value) or value <= 0:
                raise InputError(
                    f"voxel spacing {axis} in {found.description} of {label} must be a positive "
                    f"finite number of µm, got {value!r}; pass spacing=(dz, dy, dx) to override"
                )
        dz = found.dz
        if dz is None and not planar:
            dz = found.dz_default
            notes.append(
                f"no z spacing in {found.description} of {label}; assuming dz = {dz:g} µm"
            )
        result = (dz if dz is not None else min(found.dy, found.dx), found.dy, found.dx)
        source = found.source
    elif problem is not None:
        raise InputError(f"{problem}; pass spacing=(dz, dy, dx) in µm (--spacing) to set it")
    else:
        notes.append(DEFAULT_SPACING_WARNING)
        result = (1.0, 1.0, 1.0)
        source = "default"
    dz, dy, dx = (float(v) for v in result)
    if planar:
        # The z spacing of a single plane is meaningless; a defined value keeps
        # downstream code that multiplies by spacing well-behaved.
        dz = min(dy, dx)
    return (dz, dy, dx), source


def _fmt_spacing(values: Sequence[float]) -> str:
    return "(" + ", ".join(f"{v:g}" for v in values) + ")"


def _tiff_spacing(tf: Any, series: Any, label: str, notes: list[str]) -> tuple[_FileSpacing | None, str | None]:
    """Spacing from OME, then ImageJ, then plain TIFF resolution tags."""
    problem: str | None = None

    if tf.is_ome and tf.ome_metadata:
        found, problem = _ome_spacing(tf.ome_metadata, label, notes)
        if found is not None or problem is not None:
            return found, problem

    page = series.keyframe if getattr(series, "keyframe", None) is not None else tf.pages.first
    xres = _tag_rational(page, "XResolution")
    yres = _tag_rational(page, "YResolution")
    resunit_tag = page.tags.get("ResolutionUnit")
    resunit = int(resunit_tag.value) if resunit_tag is not None else 2  # TIFF default: inch

    ij = tf.imagej_metadata if tf.is_imagej else None
    if ij and "unit" in ij:
        factor = _unit_factor(ij["unit"])
        if factor is None:
            return None, f"{label}: unknown length unit {ij['unit']!r} in the ImageJ metadata"
        if factor > 0:
            dx = factor / xres if xres else factor
            dy = factor / yres if yres else dx
            dz = float(ij["spacing"]) * factor if "spacing" in ij else None
            return _FileSpacing(dz, dy, dx, "imagej", "the ImageJ metadata", dz_default=factor), None

    if xres and yres and resunit == 3:  # pixels per centimetre
        return _FileSpacing(None, 1e4 / yres, 1e4 / xres, "tiff-resolution",
                            "the TIFF resolution tags"), None
    if xres and yres and resunit == 2 and not (xres == 1 and yres == 1):
        # Dots per inch is what image editors write by default (72, 96, 300 dpi);
        # taken as voxel size it would silently give ~0.1-0.4 mm pixels.
        notes.append(
            f"TIFF resolution of {label} is {xres:g} x {yres:g} dots per inch, a display "
            "setting rather than a voxel size; ignored"
        )
    return None, problem


def _tag_rational(page: Any, name: str) -> float | None:
    tag = page.tags.get(name)
    if tag is None:
        return None
    value = tag.value
    try:
        if isinstance(value, tuple) and len(value) == 2:
            num, den = value
            result = float(num) / float(den) if den else 0.0
        else:
            result = float(value)
    except (TypeError, ValueError):
        return None
    return result if math.isfinite(result) and result > 0 else None


def _ome_spacing(xml_text: str, label: str, notes: list[str]) -> tuple[_FileSpacing | None, str | None]:
    try:
        root = ET.fromstring(xml_text)
    except ET.ParseError as exc:
        notes.append(f"could not parse the OME-XML metadata of {label} ({exc}); ignored")
        return None, None
    pixels = next((el for el in root.iter() if el.tag.rsplit("}", 1)[-1] == "Pixels"), None)
    if pixels is None:
        return None, None

    def size(axis: str) -> tuple[float | None, float]:
        text = pixels.get(f"PhysicalSize{axis}")
        unit = pixels.get(f"PhysicalSize{axis}Unit", "µm")
        factor = _unit_factor(unit)
        if factor is None or factor == 0.0:
            raise _UnknownUnit(unit)
        if text is None:
            return None, factor
        try:
            return float(text) * factor, factor
        except ValueError:
            raise _UnknownUnit(f"PhysicalSize{axis}={text!r}") from None

    try:
        dx, _ = size("X")
        dy, _ = size("Y")
        dz, z_factor = size("Z")
    except _UnknownUnit as exc:
        return None, f"{label}: cannot interpret {exc.args[0]!r} in the OME metadata as a length"
    if dx is None and dy is None:
        return None, None
    dx = dx if dx is not None else dy
    dy = dy if dy is not None else dx
    return _FileSpacing(dz, dy, dx, "ome", "the OME metadata", dz_default=z_factor), None


class _UnknownUnit(Exception):
    pass


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
        raise InputError(
            f"{label} has {_distinct_values(raw)} distinct values (min {_fmt_value(scan.vmin)}, "
            f"max {_fmt_value(scan.vmax)}); it looks like an intensity or probability image: "
            "pass threshold=T (--threshold T) to binarise"
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


# --------------------------------------------------------------------------- #
# Format readers: header first, pixel data on demand
# --------------------------------------------------------------------------- #


@dataclass
class _Opened:
    layout: _Layout
    dtype: np.dtype
    spacing: _FileSpacing | None
    spacing_problem: str | None
    load: Callable[[], tuple[np.ndarray, bool]]  # -> ((Z, Y, X) array, may overwrite)
    log: _LogCollector | None = None  # library log records worth passing on


def _open_tiff(path: Path, path_text: str, label: str, stack: contextlib.ExitStack,
               notes: list[str]) -> _Opened:
    import tifffile

    log = stack.enter_context(_collect_library_messages("tifffile"))

    def check_log() -> None:
        for message in log.messages(logging.WARNING, logging.ERROR):
            text = f"tifffile: {message}"
            if text not in notes:
                notes.append(text)
        errors = log.messages(logging.ERROR)
        if errors:
            # tifffile logs, rather than raises, when IFDs are cut off or a
            # series cannot be assembled, then returns fewer planes or drops
            # metadata: any logged error means the file cannot be trusted.
            raise _corrupt("TIFF", path_text, errors[0])

    try:
        tf = stack.enter_context(tifffile.TiffFile(path))
        series_list = tf.series
        if not series_list:
            raise ValueError("no image data")
        series = series_list[0]
        axes = series.get_axes(False)
        shape = series.get_shape(False)
        dtype = np.dtype(series.dtype)
    except InputError:
        raise
    except Exception as exc:  # tifffile raises many kinds on malformed files
        check_log()
        raise _corrupt("TIFF", path_text, _short_reason(exc)) from None
    check_log()

    if len(series_list) > 1:
        notes.append(f"{label} holds {len(series_list)} image series; read the first")
    layout = _layout_named(label, axes, shape)
    _check_dtype(label, dtype)
    try:
        found, problem = _tiff_spacing(tf, series, label, notes)
    except Exception as exc:
        notes.append(f"could not interpret the TIFF spacing metadata of {label} ({_short_reason(exc)}); ignored")
        found, problem = None, None

    def load() -> tuple[np.ndarray, bool]:
        file_size = path.stat().st_size
        try:
            # A file cut inside the pixel data is not reliably reported by every
            # decoder (a short compressed strip can decode to a partial plane),
            # so check that every data segment lies inside the file.
            for page in series.pages:
                if page is None:
                    raise ValueError("missing image plane")
                offsets = getattr(page, "dataoffsets", ()) or ()
                counts = getattr(page, "databytecounts", ()) or ()
                for off, cnt in zip(offsets, counts):
                    if cnt and off + cnt > file_size:
                        raise ValueError(
                            f"image data ends at byte {off + cnt} but the file has {file_size} bytes"
                        )
            raw = series.asarray()
        except MemoryError:
            raise InputError(f"{label}: not enough memory to load the pixel data") from None
        except Exception as exc:
            check_log()
            raise _corrupt("TIFF", path_text, _short_reason(exc)) from None
        check_log()
        if raw.size != math.prod(layout.shape3):
            raise _corrupt("TIFF", path_text, f"decoded {raw.size} voxels, expected {math.prod(layout.shape3)}")
        return raw.reshape(layout.shape3), True

    return _Opened(layout, dtype, found, problem, load)


_NIFTI_AXES = "XYZTUVW"


def _open_nifti(path: Path, path_text: str, label: str, stack: contextlib.ExitStack,
                notes: list[str]) -> _Opened:
    import nibabel as nib

    log = stack.enter_context(_collect_library_messages("nibabel"))
    try:
        img = nib.load(str(path))
        header = img.header
        shape = tuple(int(n) for n in header.get_data_shape())
        dtype = np.dtype(header.get_data_dtype())
        zooms = tuple(header.get_zooms())
        space_unit = header.get_xyzt_units()[0]
        unit_code = int(header["xyzt_units"]) & 0x07  # nifti1.h XYZT_TO_SPACE
    except Exception as exc:
        raise _corrupt("NIfTI", path_text, _short_reason(exc)) from None

    names = _NIFTI_AXES[: len(shape)]
    # NIfTI fixes the meaning of dimensions: 1-3 are x, y, z, 4 is time, 5+
    # are other quantities. Only the first three may be real.
    extra = [(names[i].lower(), n) for i, n in enumerate(shape) if i >= 3 and n != 1]
    if len(shape) < 2 or extra:
        raise _axes_error(label, [(names[i].lower(), n) for i, n in enumerate(shape)])
    spatial = list(shape[:3]) + [1] * (3 - min(3, len(shape)))
    x, y, z = spatial
    layout = _Layout((z, y, x), z == 1, names)
    _check_dtype(label, dtype)

    found: _FileSpacing | None = None
    problem: str | None = None
    if len(zooms) >= 2:
        pixdim = [_float_from_metadata(v) for v in zooms[: 3 if len(shape) >= 3 else 2]]
        factor = _NIFTI_UNIT_TO_UM.get(space_unit)
        source = "nifti"
        note = None
        if factor is None:
            factor, source, note, problem = _unitless_nifti_unit(label, pixdim, unit_code, layout.planar)
        if problem is None:
            zx, zy = pixdim[0] * factor, pixdim[1] * factor
            zz = pixdim[2] * factor if len(pixdim) == 3 else None
            found = _FileSpacing(zz, zy, zx, source, "the NIfTI header", dz_default=factor, note=note)

    def load() -> tuple[np.ndarray, bool]:
        try:
            arr = np.asanyarray(img.dataobj)
        except MemoryError:
            raise InputError(f"{label}: not enough memory to load the pixel data") from None
        except Exception as exc:
            raise _corrupt("NIfTI", path_text, _short_reason(exc)) from None
        # Uncompressed files come back memory-mapped: never write through them
        # (copy-on-write pages would silently duplicate the volume).
        writable = not isinstance(arr, np.memmap) and arr.flags.writeable
        arr = arr.reshape(tuple(spatial))
        return arr.transpose(2, 1, 0), writable

    return _Opened(layout, dtype, found, problem, load, log)


def _unitless_nifti_unit(label: str, pixdim: list[float], unit_code: int,
                         planar: bool) -> tuple[float, str, str | None, str | None]:
    """µm per pixdim unit for a header without a spatial unit, or why none can be chosen.

    The NIfTI-1 standard (nifti1.h) defines spatial unit code 0 as
    "unspecified units" and names no default. Files written without a unit
    hold millimetres (MRI tools) as well as micrometres (microscopy exports),
    so the unit is the one, µm or mm, that makes every ``pixdim`` value a
    plausible voxel size (:data:`PLAUSIBLE_SPACING_UM`).

    Returns
    -------
    factor : float
        µm per pixdim unit.
    source : str
        ``'nifti-no-unit-um'`` or ``'nifti-no-unit-mm'``.
    note : str or None
        The choice, for the warnings (used only when no spacing argument
        overrides the header).
    problem : str or None
        When both or neither unit fit: the message asking for a spacing.
    """
    values = pixdim[:2] if planar else pixdim
    axes = "(x, y)" if len(values) == 2 else "(x, y, z)"
    shown = f"pixdim {axes} = {_fmt_spacing(values)}"
    header = f"{label}: the NIfTI header gives no spatial unit (xyzt_units spatial code {unit_code})"
    if not all(math.isfinite(v) and v > 0 for v in values):
        # Not a size in any unit: the spacing check names the bad value.
        return 1.0, "nifti", None, None
    fits = [(name, word, factor) for name, word, factor in (("um", "micrometres", 1.0), ("mm", "millimetres", 1e3))
            if _plausible([v * factor for v in values])]
    lo, hi = PLAUSIBLE_SPACING_UM
    if len(fits) == 1:
        name, word, factor = fits[0]
        spacing = [v * factor for v in values][::-1]  # (z,) y, x
        note = (
            f"{header}; {shown} is a plausible voxel size ({lo:g}-{hi:g} µm) only in {word}, so the "
            f"spacing is read as {_fmt_spacing(spacing)} µm ({'Y X' if len(spacing) == 2 else 'Z Y X'}); "
            "pass --spacing Z Y X in µm if that is wrong"
        )
        return factor, f"nifti-no-unit-{name}", note, None
    how = "plausible both as µm and as mm" if fits else "plausible neither as µm nor as mm"
    return 1.0, "nifti", None, f"{header} and {shown} is {how} (voxel sizes of {lo:g}-{hi:g} µm)"


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


_OPENERS: dict[str, Callable[[Path, str, str, contextlib.ExitStack, list[str]], _Opened]] = {
    "tiff": _open_tiff,
    "nifti": _open_nifti,
    "npy": _open_npy,
    "npz": _open_npz,
}


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
    """SHA-256 hex digest of a file's bytes, read in 4 MiB blocks."""
    digest = hashlib.sha256()
    with open(path, "rb") as fp:
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
) -> MaskImage:
    """Read a binary vessel mask from a file.

    Parameters
    ----------
    path : str or path-like
        A ``.tif``/``.tiff``/``.ome.tif``/``.ome.tiff``, ``.nii``/``.nii.gz``,
        ``.npy`` or ``.npz`` file. For ``.npz`` the mask is the array named
        ``mask`` or the only array; an optional ``spacing`` array holds
        ``(dz, dy, dx)`` in µm.
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
    arg_spacing = _parse_spacing_argument(spacing)
    threshold = _check_threshold(threshold)
    bytes_per_voxel = _positive_number("bytes_per_voxel", bytes_per_voxel)
    if memory_limit_bytes is not None:
        memory_limit_bytes = _positive_number("memory_limit_bytes", memory_limit_bytes)
    mode = _check_mode(implausible_spacing)
    max_anisotropy = _optional_positive("max_anisotropy", max_anisotropy)
    resample_spacing_um = _optional_positive("resample_spacing_um", resample_spacing_um)

    path_text = os.fspath(path)
    if not isinstance(path_text, str):
        path_text = os.fsdecode(path_text)
    p = Path(path_text)
    label = f"mask '{path_text}'"
    if not p.exists():
        raise InputError(f"mask file '{path_text}' does not exist")
    if not p.is_file():
        raise InputError(f"mask '{path_text}' is not a file; expected one of " + ", ".join(SUPPORTED_EXTENSIONS))
    kind = _format_of(p, path_text)

    notes: list[str] = []
    with _recorded_warnings(notes), contextlib.ExitStack() as stack:
        opened = _OPENERS[kind](p, path_text, label, stack, notes)
        layout = opened.layout
        spacing3, source = _resolve_spacing(
            label, arg_spacing, opened.spacing, opened.spacing_problem, layout.planar, notes
        )
        if source != "default":
            where = "from the spacing argument" if source == "argument" else f"from {opened.spacing.description}"
            _check_spacing_plausible(label, spacing3, where, layout.planar, mode, notes)
        note = check_memory(label, layout.shape3, spacing3, planar=layout.planar,
                            bytes_per_voxel=bytes_per_voxel, memory_limit_bytes=memory_limit_bytes,
                            max_anisotropy=max_anisotropy, resample_spacing_um=resample_spacing_um)
        if note is not None:
            notes.append(note)
        raw, may_overwrite = opened.load()
        mask = _binarise(label, raw, threshold=threshold, in_place=may_overwrite)
        del raw
        if opened.log is not None:
            notes.extend(f"{kind}: {m}" for m in opened.log.messages(logging.WARNING))
    digest = sha256_file(p)
    return MaskImage(
        mask=mask,
        spacing=spacing3,
        spacing_source=source,
        planar=layout.planar,
        path=path_text,
        sha256=digest,
        original_dtype=str(opened.dtype),
        axes_found=layout.axes_found,
        warnings=tuple(dict.fromkeys(notes)),
    )


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
