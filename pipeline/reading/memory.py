"""Memory: what an analysis will need and what the machine (or its cgroup) has.

In: a mask's shape and spacing. Out: the estimated peak bytes (:func:`estimate_memory_bytes`, counting
the isotropic thinning grid of :func:`thinning_grid_shape`), the memory available
(:func:`available_memory_bytes`: ``/proc/meminfo`` and the cgroup v1/v2 limit), and
:func:`check_memory`, which refuses a volume that would not fit before anything is loaded.
"""

from __future__ import annotations

import math
import os
import re
from pathlib import Path
from typing import Sequence

import numpy as np

from ..errors import InputError
from ._common import _fmt_axes, _positive_number
from .spacing import _fmt_shown, spacing_problem

# System files read by available_memory_bytes(); module constants so that tests
# can point them at fakes.
_PROC_MEMINFO = Path("/proc/meminfo")
_PROC_SELF_CGROUP = Path("/proc/self/cgroup")
_CGROUP_ROOT = Path("/sys/fs/cgroup")

# cgroup v1 reports "no limit" as a huge page-aligned number close to 2**63.
_CGROUP_UNLIMITED = 1 << 60

_GIB = float(1 << 30)


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
