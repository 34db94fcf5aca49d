"""The analysis pipeline as one call: mask in, measured vessel graph out.

In: a boolean mask ``(Z, Y, X)`` (or ``(Y, X)``), its spacing in µm, a config.
Out: :class:`Analysis`, with ``segments`` and ``nodes`` DataFrames, a networkx
``graph``, the ``summary`` dict, the smoothed ``centrelines`` and ``run``
bookkeeping (effective config, time per step, counts, warnings).

Steps run strictly in order, each consuming only the previous step's output:
cleaning -> centrelines (thinning + radii) -> graph (build + prune) ->
measures -> summary.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field

import networkx as nx
import numpy as np
import pandas as pd

from . import cleaning, centrelines, graph as graph_step, measures
from .config import load_config
from .errors import InputError

__all__ = ["Analysis", "analyze"]


@dataclass
class Analysis:
    """Result of :func:`analyze`.

    Attributes
    ----------
    segments : DataFrame
        One row per segment; ``segment_id``, ``node_from``, ``node_to``,
        ``length_um``, ``radius_um`` and more (see ``DEVELOPERS.md``).
    nodes : DataFrame
        One row per node; ``node_id``, voxel ``z, y, x``, ``z_um, y_um, x_um``,
        ``degree``, ``kind``.
    graph : networkx.MultiGraph
        Nodes keyed by ``node_id``; edges keyed by ``segment_id`` with the
        segment's columns as attributes.
    summary : dict
        Sample-level measures.
    centrelines : list of (K, 3) float ndarray
        Smoothed centreline of each segment (row order), µm.
    centreline_radii : list of (K,) float ndarray
        Radius along each raw centreline, µm.
    spacing : tuple of 3 float
    run : dict
        ``config``, ``timings_s``, ``counts``, ``warnings``, ``planar``.
    """

    segments: pd.DataFrame
    nodes: pd.DataFrame
    graph: nx.MultiGraph
    summary: dict
    centrelines: list
    centreline_radii: list
    spacing: tuple
    run: dict = field(default_factory=dict)


def _as_mask(mask):
    arr = np.asarray(mask)
    if arr.ndim not in (2, 3):
        raise InputError(f"mask: expected a 2-D (Y, X) or 3-D (Z, Y, X) array, got {arr.ndim} dimensions {arr.shape}")
    if arr.dtype != bool:
        arr = arr != 0
    return arr


def _check_spacing(spacing, ndim):
    try:
        sp = [float(s) for s in spacing]
    except TypeError:
        raise InputError(f"spacing: expected a sequence of {ndim} numbers in µm, got {spacing!r}") from None
    if len(sp) == 2 and ndim == 2:
        sp = [min(sp)] + sp
    if len(sp) != 3:
        raise InputError(f"spacing: expected 3 values (dz, dy, dx) in µm, got {len(sp)}: {spacing!r}")
    for name, s in zip("zyx", sp):
        if not np.isfinite(s) or s <= 0:
            raise InputError(f"spacing: expected a positive finite {name} spacing in µm, got {s!r}")
    return tuple(sp)


def analyze(mask, *, spacing, config=None, planar=None, progress=None):
    """Turn a binary vessel mask into a measured vessel graph.

    Parameters
    ----------
    mask : (Z, Y, X) or (Y, X) array_like
        Vessel mask; any non-zero value is vessel.
    spacing : sequence of float
        Voxel spacing in µm, ``(dz, dy, dx)`` (or ``(dy, dx)`` for 2-D).
    config : dict, str, Path or None
        Configuration overrides or a YAML file; validated here.
    planar : bool or None
        Analyse in-plane. Default: True when the mask is 2-D or has one plane.
    progress : callable or None
        Called as ``progress(step, seconds)`` after each step.

    Returns
    -------
    Analysis

    Raises
    ------
    InputError, ConfigError

    Examples
    --------
    >>> from pipeline import synthetic
    >>> mask, truth = synthetic.rasterize(synthetic.straight_tube(length_um=60, radius_um=4), spacing=(1, 1, 1))
    >>> res = analyze(mask, spacing=(1, 1, 1))
    >>> len(res.segments)
    1
    """
    cfg = load_config(config)
    arr = _as_mask(mask)
    sp = _check_spacing(spacing, arr.ndim)
    if arr.ndim == 2:
        arr = arr[None]
    if planar is None:
        planar = arr.shape[0] == 1
    if not arr.any():
        raise InputError("mask: expected some vessel voxels, got an empty mask (every voxel is 0)")
    if arr.all():
        raise InputError("mask: expected background around the vessels, got a mask where every voxel is vessel")
    timings = {}
    t = time.perf_counter()

    def tick(step):
        nonlocal t
        now = time.perf_counter()
        timings[step] = round(now - t, 4)
        if progress is not None:
            progress(step, now - t)
        t = now

    c = cfg["cleaning"]
    cleaned = cleaning.clean_mask(arr, spacing=sp, min_object_volume_um3=c["min_object_volume_um3"],
                                  min_object_area_um2=c["min_object_area_um2"], fill_cavities=c["fill_cavities"],
                                  planar=planar)
    original_shape = arr.shape
    del arr
    tick("cleaning")
    cc = cfg["centrelines"]
    cl = centrelines.extract_centrelines(
        cleaned.mask, spacing=sp, offset=cleaned.offset, original_shape=original_shape, planar=planar,
        max_anisotropy=cc["max_anisotropy"], resample_spacing_um=cc["resample_spacing_um"],
        half_voxel_correction=cfg["radii"]["half_voxel_correction"],
    )
    tick("centrelines")
    g = graph_step.build_graph(cl)
    p = cfg["pruning"]
    graph_step.prune_graph(g, spur_radius_factor=p["spur_radius_factor"], min_spur_length_um=p["min_spur_length_um"],
                           min_fragment_length_um=p["min_fragment_length_um"], max_rounds=p["max_rounds"])
    tick("graph")
    segs, keys, smoothed = measures.segment_table(g, grid_spacing=cl.grid_spacing, radii_config=cfg["radii"],
                                                  measures_config=cfg["measures"])
    alive = np.flatnonzero(g.node_alive)
    renumber = np.full(len(g.node_pos_um), -1, dtype=np.int64)
    renumber[alive] = np.arange(len(alive))
    segs["node_from"] = renumber[segs["node_from"].to_numpy()]
    segs["node_to"] = renumber[segs["node_to"].to_numpy()]
    nodes = measures.node_table(g, spacing=sp, node_ids=alive)
    tick("measures")
    warnings = []
    if len(segs) == 0:
        warnings.append("no vessel segment survived pruning; the tables are empty")
    td = measures.tissue_distance(cleaned.mask, cleaned.offset, original_shape, sp, planar=planar)
    summary = measures.summarize(segs, nodes, cleaned=cleaned, spacing=sp, planar=planar,
                                 original_shape=original_shape, tissue_dist=td)
    tick("summary")
    G = to_networkx(segs, nodes)
    counts = {**cleaned.stats, **g.counts, "resampled_isotropic": bool(cl.resampled),
              "thinning_grid_spacing_um": list(cl.grid_spacing)}
    run = {"config": cfg, "timings_s": timings, "counts": counts, "warnings": warnings, "planar": bool(planar),
           "shape": list(original_shape), "crop_offset": list(cleaned.offset)}
    return Analysis(segments=segs, nodes=nodes, graph=G, summary=summary, centrelines=smoothed,
                    centreline_radii=[g.seg_radii[k] for k in keys], spacing=sp, run=run)


def to_networkx(segments, nodes):
    """Build the networkx MultiGraph of the tables (edges keyed by ``segment_id``)."""
    G = nx.MultiGraph()
    for row in nodes.to_dict("records"):
        G.add_node(int(row["node_id"]), **row)
    for row in segments.to_dict("records"):
        G.add_edge(int(row["node_from"]), int(row["node_to"]), key=int(row["segment_id"]), **row)
    return G
