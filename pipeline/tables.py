"""Writing and reading a result folder.

In: an :class:`~pipeline.analysis.Analysis` and the run metadata.
Out: files in a result folder, written atomically (into a temporary sibling
folder that is renamed at the end, so an interrupted run never leaves a
folder that looks complete):

- ``segments.csv``, ``nodes.csv``: the tables (``segment_id``/``node_id`` join them);
- ``levels.csv``: per branching level morphometry and Murray statistics;
- ``bifurcations.csv``: per junction Murray ratio, exponent, angles, flags;
- ``summary.json``: sample measures;
- ``graph.graphml``: the multigraph with node and segment attributes;
- ``centrelines.npz``: every segment's smoothed centreline, compact:
  ``points_um`` (P, 3) float32, ``radii_um`` (P,) float32 along the raw
  centreline, ``offsets`` (S + 1,) int64 so segment ``i`` is
  ``points_um[offsets[i]:offsets[i + 1]]``;
- ``run.json``: version, input and its checksum, spacing and its source,
  effective config, time per step, counts and warnings.

:func:`load_result` reads a folder back.
"""

from __future__ import annotations

import json
import math
import os
import shutil
import tempfile
from dataclasses import dataclass
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd

from .errors import InputError

__all__ = ["write_result", "load_result", "read_result_mask", "Result", "check_outdir", "write_atomic",
           "RESULT_FILES"]

RESULT_FILES = ("segments.csv", "nodes.csv", "levels.csv", "bifurcations.csv", "summary.json", "graph.graphml",
                "centrelines.npz", "run.json")


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    return obj


def to_jsonable(obj):
    """``obj`` with numpy scalars and arrays as Python values and non-finite floats as None."""
    return _jsonable(obj)


def write_atomic(path, write):
    """Write one file atomically.

    ``write(tmp)`` fills a temporary file beside ``path``; it is flushed to
    disk and then renamed over ``path``, so a reader (or a crash) never sees
    half a file. On failure the temporary file is removed and ``path`` is
    left as it was.

    Parameters
    ----------
    path : str or Path
    write : callable
        Called with the temporary file's Path.

    Returns
    -------
    Path
    """
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".partial", dir=path.parent)
    os.close(fd)
    tmp = Path(tmp)
    try:
        write(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())  # the data is on disk before the name points at it
        os.replace(tmp, path)
    except BaseException:
        tmp.unlink(missing_ok=True)
        raise
    return path


def write_json(path, data):
    Path(path).write_text(json.dumps(_jsonable(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")


def check_outdir(outdir, *, overwrite):
    """Refuse a non-empty output folder unless ``overwrite``; raises InputError."""
    out = Path(outdir)
    if out.exists() and not out.is_dir():
        raise InputError(f"output '{out}': expected a folder, got an existing file")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise InputError(f"output folder '{out}' is not empty; pass --overwrite to replace it")


def _graphml(G):
    # GraphML attributes must be scalars of one type per key: cast, and drop NaN.
    H = nx.MultiGraph()
    for n, d in G.nodes(data=True):
        H.add_node(n, **{k: _scalar(v) for k, v in d.items() if _scalar(v) is not None})
    for u, v, k, d in G.edges(keys=True, data=True):
        H.add_edge(u, v, key=k, **{a: _scalar(b) for a, b in d.items() if _scalar(b) is not None})
    return H


def _scalar(v):
    if isinstance(v, (bool, np.bool_)):
        return bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return float(v) if math.isfinite(v) else None
    if v is None or (isinstance(v, float) and math.isnan(v)):
        return None
    if v is pd.NA:
        return None
    return str(v)


def write_result(result, outdir, *, run_info, overwrite=False, extra_tables=None):
    """Write a result folder atomically.

    Parameters
    ----------
    result : Analysis
    outdir : str or Path
    run_info : dict
        Merged into ``run.json`` (version, input, checksum, spacing source...).
    overwrite : bool
        Replace a non-empty ``outdir``.
    extra_tables : dict of str -> DataFrame, optional
        Further CSV tables (for example ``levels.csv``).

    Raises
    ------
    InputError
        If ``outdir`` is not empty and ``overwrite`` is False.
    """
    out = Path(outdir)
    check_outdir(out, overwrite=overwrite)
    parent = out.resolve().parent
    parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{out.name}.partial-", dir=parent))
    try:
        result.segments.to_csv(tmp / "segments.csv", index=False)
        result.nodes.to_csv(tmp / "nodes.csv", index=False)
        tables = {"levels.csv": result.levels, "bifurcations.csv": result.bifurcations, **(extra_tables or {})}
        for name, table in tables.items():
            table.to_csv(tmp / name, index=False)
        write_json(tmp / "summary.json", result.summary)
        nx.write_graphml(_graphml(result.graph), tmp / "graph.graphml")
        lens = [len(p) for p in result.centrelines]
        offsets = np.r_[0, np.cumsum(lens)].astype(np.int64)
        pts = np.vstack(result.centrelines).astype(np.float32) if lens else np.zeros((0, 3), np.float32)
        rad = (np.concatenate(result.centreline_radii).astype(np.float32) if lens else np.zeros(0, np.float32))
        np.savez_compressed(tmp / "centrelines.npz", points_um=pts, radii_um=rad, offsets=offsets,
                            segment_id=result.segments["segment_id"].to_numpy(np.int64),
                            spacing_um=np.asarray(result.spacing, float))
        run = dict(result.run)
        run.update(run_info)
        write_json(tmp / "run.json", run)  # written last: its presence marks a complete folder
        if out.exists():
            old = Path(tempfile.mkdtemp(prefix=f".{out.name}.old-", dir=parent))
            os.rename(out, old / "x")
            os.rename(tmp, out)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, out)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return out


@dataclass
class Result:
    """A result folder read back: tables, summary, run info and centrelines."""

    path: Path
    segments: pd.DataFrame
    nodes: pd.DataFrame
    summary: dict
    run: dict
    centrelines: list
    bifurcations: pd.DataFrame
    levels: pd.DataFrame

    @property
    def spacing(self):
        return tuple(self.run["spacing_um"])


def load_result(outdir):
    """Read a result folder written by :func:`write_result`.

    Raises
    ------
    InputError
        If the folder is missing or incomplete.
    """
    out = Path(outdir)
    missing = [f for f in RESULT_FILES if not (out / f).is_file()]
    if missing:
        raise InputError(f"result folder '{out}': expected a complete result, missing {', '.join(missing)}")
    segs = pd.read_csv(out / "segments.csv")
    nodes = pd.read_csv(out / "nodes.csv")
    bifs = _read_csv(out / "bifurcations.csv")
    levels = _read_csv(out / "levels.csv")
    summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    with np.load(out / "centrelines.npz") as z:
        pts, off = z["points_um"], z["offsets"]
        lines = [pts[off[i]:off[i + 1]] for i in range(len(off) - 1)]
    return Result(path=out, segments=segs, nodes=nodes, summary=summary, run=run, centrelines=lines,
                  bifurcations=bifs, levels=levels)


def read_result_mask(result, mask_path=None):
    """Read the mask a result was computed from, for display (viewer, report maps).

    Parameters
    ----------
    result : Result
    mask_path : str or Path, optional
        Default: the input recorded in ``run.json``.

    Returns
    -------
    image : MaskImage or None
        None when no path was given and the recorded file is gone.
    notes : list of str
        Why the mask is missing, or that the file differs from the one
        analysed (its checksum does not match ``run.json``).

    Raises
    ------
    InputError
        If the file cannot be read as a mask, or its shape differs from the
        volume the result was computed from.
    """
    from . import reading

    run = result.run
    recorded = (run.get("input") or {}).get("path")
    if mask_path is None:
        if not recorded or not Path(recorded).is_file():
            return None, [f"the mask recorded in run.json ('{recorded}') is not there"]
        mask_path = recorded
    path = Path(mask_path)
    if not path.is_file():
        raise InputError(f"--mask: expected a mask file, got '{path}' (not found)")
    spacing = result.spacing[1:] if run.get("planar") else result.spacing
    threshold = ((run.get("config") or {}).get("input") or {}).get("threshold")
    # Only the boolean mask is held for display, none of the analysis' work arrays.
    img = reading.read_mask(path, spacing=spacing, threshold=threshold, bytes_per_voxel=2.0)
    shape = tuple(run.get("shape") or ())
    if shape and tuple(img.shape) != shape:
        raise InputError(f"mask '{path}': expected shape {shape} (the volume this result was computed from), "
                         f"got {tuple(img.shape)}")
    notes = []
    sha = (run.get("input") or {}).get("sha256")
    if sha and img.sha256 != sha:
        notes.append(f"the mask file '{path}' differs from the one analysed (its SHA-256 does not match run.json)")
    return img, notes


def _read_csv(path):
    try:
        return pd.read_csv(path)
    except pd.errors.EmptyDataError:  # a table with no columns (no segments)
        return pd.DataFrame()
