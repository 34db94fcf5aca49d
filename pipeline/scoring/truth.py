"""The ground truth of a synthetic volume, read and checked.

In: a ``NAME.truth.json`` file or the dict :func:`pipeline.synthetic.rasterize` returns. Out: the
truth's junctions, segments and centreline samples (:class:`_Truth`), or one :class:`InputError` line.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from ..errors import InputError

#: The ``format`` key of a ground-truth file written by :mod:`pipeline.synthetic`.
TRUTH_FORMAT = "vesselflow-synthetic-truth"


# --------------------------------------------------------------------------- #
# The truth
# --------------------------------------------------------------------------- #


@dataclass
class _Truth:
    node_pos: np.ndarray  # (N, 3) µm
    seg_id: list
    seg_from: np.ndarray  # (S,) node row index
    seg_to: np.ndarray  # (S,) node row index
    seg_length: np.ndarray  # (S,) µm
    seg_radius: np.ndarray  # (S,) µm
    seg_points: list  # (K, 3) µm each
    seg_radii: list  # (K,) µm each
    spacing: np.ndarray | None
    shape: list | None


def load_truth(path):
    """Read and check a ground-truth JSON file.

    Parameters
    ----------
    path : str or Path
        A ``NAME.truth.json`` as written by :func:`pipeline.synthetic.write_volume`.

    Returns
    -------
    dict
        The truth as read (checked by :func:`check_truth`).

    Raises
    ------
    InputError
        One line naming the file and what is wrong: missing, not JSON, another
        format, or a node or segment without the keys scoring needs.
    """
    p = Path(path)
    if not p.exists():
        raise InputError(f"truth: expected a truth JSON file, got '{p}' (not found)")
    if p.is_dir():
        raise InputError(f"truth: expected a truth JSON file, got the folder '{p}'")
    try:
        text = p.read_text(encoding="utf-8")
    except UnicodeDecodeError:
        raise InputError(f"truth '{p}': expected UTF-8 JSON text, got bytes that are not UTF-8") from None
    try:
        data = json.loads(text)
    except json.JSONDecodeError as exc:
        raise InputError(f"truth '{p}': expected JSON, got a syntax error at line {exc.lineno} column "
                         f"{exc.colno} ({exc.msg})") from None
    check_truth(data, source=p)
    return data


def check_truth(truth, *, source=None):
    """Check that a truth dict has what scoring needs; raises :class:`InputError` otherwise.

    Needed: ``nodes`` (each with ``id`` and ``pos_um`` (3,) µm) and
    ``segments`` (each with ``id``, ``node_from``, ``node_to`` (node ids),
    ``length_um`` >= 0, ``radius_um`` > 0, ``points_um`` (K >= 2, 3) µm and
    optionally ``radii_um`` (K,) > 0). ``format``, when present, must be
    ``'vesselflow-synthetic-truth'``; ``spacing`` and ``shape``, when present,
    three positive numbers.

    Parameters
    ----------
    truth : mapping
    source : str or Path, optional
        Named in the messages.
    """
    _parse_truth(truth, source)


def _parse_truth(truth, source=None):
    where = f"truth '{source}'" if source is not None else "truth"

    def bad(what, expected, got):
        return InputError(f"{where}: {what}: expected {expected}, got {got}")

    if not isinstance(truth, Mapping):
        raise bad("content", "a JSON object with nodes and segments", type(truth).__name__)
    fmt = truth.get("format")
    if fmt is not None and fmt != TRUTH_FORMAT:
        raise bad("format", f"'{TRUTH_FORMAT}'", repr(fmt))
    for key in ("nodes", "segments"):
        if key not in truth:
            raise bad(key, "a list", "no such key")
        if not isinstance(truth[key], list):
            raise bad(key, "a list", type(truth[key]).__name__)
    ids, pos = {}, []
    for i, n in enumerate(truth["nodes"]):
        if not isinstance(n, Mapping) or "id" not in n:
            raise bad(f"nodes[{i}]", "an object with id and pos_um", _short(n))
        nid = n["id"]
        if not _is_int(nid):
            raise bad(f"nodes[{i}] id", "an integer", _short(nid))
        if nid in ids:
            raise bad(f"node {nid}", "unique node ids", "a second node with this id")
        ids[nid] = i
        pos.append(_array(n.get("pos_um"), (3,), f"node {nid} pos_um", "3 finite numbers (z, y, x) µm", bad))
    seg_id, seg_from, seg_to, length, radius, points, radii = [], [], [], [], [], [], []
    for i, s in enumerate(truth["segments"]):
        if not isinstance(s, Mapping) or "id" not in s:
            raise bad(f"segments[{i}]", "an object with id, node_from, node_to, length_um, radius_um, points_um",
                      _short(s))
        sid = s["id"]
        name = f"segment {sid}"
        for end, out in (("node_from", seg_from), ("node_to", seg_to)):
            nid = s.get(end)
            if not _is_int(nid) or nid not in ids:
                raise bad(f"{name} {end}", "the id of a node in nodes", _short(nid))
            out.append(ids[nid])
        ln = _number(s.get("length_um"))
        if ln is None or ln < 0:
            raise bad(f"{name} length_um", "a finite number >= 0", _short(s.get("length_um")))
        r = _number(s.get("radius_um"))
        if r is None or r <= 0:
            raise bad(f"{name} radius_um", "a finite number > 0", _short(s.get("radius_um")))
        pts = _array(s.get("points_um"), (None, 3), f"{name} points_um", "an array of shape (K >= 2, 3) µm", bad)
        if len(pts) < 2:
            raise bad(f"{name} points_um", "an array of shape (K >= 2, 3) µm", f"{len(pts)} point")
        if s.get("radii_um") is None:
            rad = np.full(len(pts), r)
        else:
            rad = _array(s["radii_um"], (len(pts),), f"{name} radii_um", f"{len(pts)} finite radii > 0 µm", bad)
            if not np.all(rad > 0):
                raise bad(f"{name} radii_um", f"{len(pts)} finite radii > 0 µm", f"a minimum of {rad.min():g}")
        seg_id.append(sid)
        length.append(ln)
        radius.append(r)
        points.append(pts)
        radii.append(rad)
    spacing = shape = None
    if truth.get("spacing") is not None:
        spacing = _array(truth["spacing"], (3,), "spacing", "3 positive numbers (dz, dy, dx) µm", bad)
        if not np.all(spacing > 0):
            raise bad("spacing", "3 positive numbers (dz, dy, dx) µm", spacing.tolist())
    if truth.get("shape") is not None:
        sh = truth["shape"]
        if not (isinstance(sh, list) and len(sh) == 3 and all(_is_int(v) and v > 0 for v in sh)):
            raise bad("shape", "3 positive integers (Z, Y, X)", _short(sh))
        shape = [int(v) for v in sh]
    return _Truth(node_pos=np.asarray(pos, float).reshape(-1, 3), seg_id=seg_id,
                  seg_from=np.asarray(seg_from, np.int64), seg_to=np.asarray(seg_to, np.int64),
                  seg_length=np.asarray(length, float), seg_radius=np.asarray(radius, float),
                  seg_points=points, seg_radii=radii, spacing=spacing, shape=shape)


def _is_int(v):
    return isinstance(v, (int, np.integer)) and not isinstance(v, bool)


def _number(v):
    if isinstance(v, bool) or not isinstance(v, (int, float, np.integer, np.floating)):
        return None
    v = float(v)
    return v if math.isfinite(v) else None


def _short(v):
    text = repr(v)
    return text if len(text) <= 60 else text[:57] + "..."


def _array(value, shape, what, expected, bad):
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise bad(what, expected, _short(value)) from None
    ok = arr.ndim == len(shape) and all(want is None or got == want for got, want in zip(arr.shape, shape))
    if not ok:
        raise bad(what, expected, f"shape {arr.shape}" if arr.ndim else _short(value))
    if not np.all(np.isfinite(arr)):
        raise bad(what, expected, "a value that is not finite")
    return arr
