"""NIfTI-1 and NIfTI-2 files.

In: a path. Out: an :class:`~pipeline.reading.opened._Opened`, ``(x, y, z)`` transposed to
``(z, y, x)``, the spacing from ``pixdim`` and its unit (a header without a unit is read in the
one unit that makes it plausible).
"""

from __future__ import annotations

import contextlib
import math
from pathlib import Path

import numpy as np

from ..errors import InputError
from ._common import _FileSpacing, _Layout, _axes_error, _collect_library_messages, _corrupt, _short_reason
from .spacing import PLAUSIBLE_SPACING_UM, _float_from_metadata, _fmt_spacing, _plausible
from .values import _check_dtype
from .opened import _Opened

# Spatial unit codes of the NIfTI-1 header as nibabel names them (nifti1.h:
# xyzt_units & 0x07; 1 metre, 2 millimetre, 3 micrometre, 0 unspecified).
_NIFTI_UNIT_TO_UM = {"meter": 1e6, "mm": 1e3, "micron": 1.0}


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
            "pass spacing=(dz, dy, dx) in µm if that is wrong"
        )
        return factor, f"nifti-no-unit-{name}", note, None
    how = "plausible both as µm and as mm" if fits else "plausible neither as µm nor as mm"
    return 1.0, "nifti", None, f"{header} and {shown} is {how} (voxel sizes of {lo:g}-{hi:g} µm)"
