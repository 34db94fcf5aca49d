"""Voxel spacing: units, the file's values against the user's, plausibility.

In: spacings from a file's metadata or the user, with units. Out: ``(dz, dy, dx)`` in µm and
where it came from; :func:`spacing_problem` names a unit mix-up or swapped axes.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np

from ..errors import InputError
from ._common import DEFAULT_SPACING_WARNING, _FileSpacing, _fmt_axes

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


def _check_mode(implausible_spacing: Any) -> str:
    if not isinstance(implausible_spacing, str) or implausible_spacing not in _IMPLAUSIBLE_SPACING_MODES:
        raise InputError(f"implausible_spacing: expected 'warn' or 'error', got {implausible_spacing!r}")
    return implausible_spacing


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
            f"{text}; expected voxel sizes of {lo:g}-{hi:g} µm in Z Y X order: pass the right "
            "spacing=(dz, dy, dx) in µm, or set input.implausible_spacing to warn to go on"
        )
    notes.append(f"{text}; check it, or pass the right spacing=(dz, dy, dx) in µm")


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
        raise InputError(f"{problem}; pass spacing=(dz, dy, dx) in µm to set it")
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
