"""The npe2 reader: napari opens a result folder (File > Open Folder).

In: a path. Out: a reader function returning the result's layers, or None for a folder that is not
a vesselflow result.
"""

from __future__ import annotations

from pathlib import Path

from .. import review as rv, tables
from .layers import read_mask_for, result_layers


def napari_get_reader(path):
    """npe2 reader: a function reading a vesselflow result folder, or None for other paths."""
    if isinstance(path, (list, tuple)):
        if len(path) != 1:
            return None
        path = path[0]
    p = Path(path)
    if not (p.is_dir() and (p / "run.json").is_file() and (p / "bifurcations.csv").is_file()):
        return None
    return _read_result


def _read_result(path):
    if isinstance(path, (list, tuple)):
        path = path[0]
    result = tables.load_result(path)
    mask, _ = read_mask_for(result)
    return result_layers(result, mask=mask, review=rv.load_review(path))
