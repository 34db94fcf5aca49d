"""TIFF, BigTIFF and OME-TIFF files.

In: a path. Out: an :class:`~pipeline.reading.opened._Opened` with the spacing from the ImageJ,
resolution or OME metadata and the axes the file names.
"""

from __future__ import annotations

import contextlib
import logging
import math
import xml.etree.ElementTree as ET
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import InputError
from ._common import _FileSpacing, _collect_library_messages, _corrupt, _layout_named, _short_reason
from .spacing import _unit_factor
from .values import _check_dtype
from .opened import _Opened


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

    def planes() -> "_TiffPlanes":
        return _TiffPlanes(series, layout.shape3, dtype, label, path_text)

    return _Opened(layout, dtype, found, problem, load, lazy=planes)


class _TiffPlanes:
    """A TIFF stack seen as (Z, Y, X), read plane by plane as it is sliced along z.

    One page per plane (ImageJ and OME stacks, multi-page TIFF) is read page by
    page; an uncompressed contiguous series is memory-mapped; anything else
    (planes tiled across pages in another order) is read whole on first use.
    """

    def __init__(self, series, shape3, dtype, label, path_text):
        self.series, self.shape, self.dtype, self.ndim = series, tuple(shape3), np.dtype(dtype), 3
        self.label, self.path_text = label, path_text
        self._whole = None
        pages = len(series.pages)
        self._by_page = pages == shape3[0] and all(
            p is not None and math.prod(p.shape) == shape3[1] * shape3[2] for p in series.pages[:2])
        if not self._by_page and series.dataoffset is not None:
            import tifffile

            self._whole = tifffile.memmap(series.parent.filehandle.path, mode="r", offset=series.dataoffset,
                                          shape=shape3, dtype=series.dtype)

    def __getitem__(self, index):
        if not isinstance(index, tuple):
            index = (index,)
        try:
            if self._whole is None and not self._by_page:
                self._whole = self.series.asarray().reshape(self.shape)
            if self._whole is not None:
                return np.asarray(self._whole[index])
            zsel, rest = index[0], index[1:]
            zs = range(self.shape[0])[zsel] if isinstance(zsel, slice) else [int(zsel)]
            stack = np.stack([self.series.pages[z].asarray().reshape(self.shape[1:]) for z in zs])
            return stack[(slice(None),) + rest] if isinstance(zsel, slice) else stack[(0,) + rest]
        except MemoryError:
            raise InputError(f"{self.label}: not enough memory to read its planes") from None
        except Exception as exc:
            raise _corrupt("TIFF", self.path_text, _short_reason(exc)) from None
