"""A file opened for reading, before its pixels are loaded.

In: what a format's opener found. Out: :class:`_Opened`: the array (lazy where the format allows),
its layout, spacing and metadata messages.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from ._common import _FileSpacing, _Layout, _LogCollector


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
    # A (Z, Y, X) view read part by part as it is sliced, where the format
    # allows more than ``load`` (a TIFF read plane by plane).
    lazy: Callable[[], object] | None = None
