"""A result folder as napari layers, in µm.

In: a loaded result (:class:`pipeline.tables.Result`) and optionally its mask. Out: napari layer
data tuples: the mask, centrelines coloured by a measure, nodes, the flagged bifurcations coloured
by their review decision.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from napari.utils.colormaps import ensure_colormap

from .. import review as rv, tables
from ..review_session import review_queue


CENTRELINE_COLORMAP = "viridis"
#: Ring colour of a flagged junction not yet reviewed (magenta: not in viridis,
#: so it never blends into the centreline colours).
FLAGGED_RGBA = (1.0, 0.0, 1.0, 1.0)
#: Ring colour of a reviewed flagged junction, per decision.
DECISION_RGBA = {
    "confirmed": (1.0, 0.55, 0.0, 1.0),
    "artefact": (0.5, 0.5, 0.5, 1.0),
    "unsure": (0.35, 0.75, 1.0, 1.0),
}
NO_VALUE_RGBA = (0.6, 0.6, 0.6, 1.0)
NODE_RGBA = (0.85, 0.85, 0.85, 1.0)
CURRENT_RGBA = (1.0, 1.0, 1.0, 1.0)

_META_KEY = "vesselflow_result"
# Markers are rings sized from the local vessel radius, so they read as "this
# junction" without hiding the vessels they point at: a flagged junction's ring
# lies outside its parent's wall (diameter 3.2 parent radii, the line a twelfth
# of it), the ring of the junction under review wider still, and the close-up
# view a few parent diameters across (never below 40 µm, so thin capillaries
# keep context).
_FLAG_SIZE_RADII = 3.2
_FLAG_RING_WIDTH = 0.08
# Colour limits of the centrelines: these percentiles of the finite values (a
# few extreme segments would otherwise make every other vessel one colour),
# on a log scale for flows and shear stresses, which span decades.
_COLOUR_PERCENTILES = (2.0, 98.0)
_LOG_MEASURES = ("flow", "wss")


# ---------------------------------------------------------------------------
# data -> layers
# ---------------------------------------------------------------------------

def read_mask_for(result: tables.Result, mask_path: str | os.PathLike[str] | None = None):
    """The mask of a result, as a boolean (Z, Y, X) array.

    Parameters
    ----------
    result : pipeline.tables.Result
    mask_path : path, optional
        Default: the input recorded in ``run.json``.

    Returns
    -------
    mask : ndarray of bool or None
        None when no path was given and the recorded file no longer exists.
    message : str or None
        Why the mask is missing, or that it differs from the one analysed,
        for a warning.

    Raises
    ------
    InputError
        If ``mask_path`` is given but cannot be read, or the mask's shape
        differs from the one the result was computed from.
    """
    img, notes = tables.read_result_mask(result, mask_path)
    if img is None:
        return None, notes[0] + "; showing the graph without it (pass mask_path=PATH)"
    return img.mask, ("; ".join(notes) or None)


def _colours(values: np.ndarray, *, measure: str):
    """RGBA per value and the colour limits (grey for NaN; log scale, positive values only, for flow and shear).

    Returns
    -------
    rgba : (S, 4) float32 ndarray
    limits : (float, float)
        The values at the two ends of the colour map (values beyond take the
        end colours).
    """
    values = np.asarray(values, dtype=float)
    log = measure in _LOG_MEASURES
    ok = np.isfinite(values) & ((values > 0) if log else True)
    finite = values[ok]
    if finite.size:
        lo, hi = (float(x) for x in np.percentile(finite, _COLOUR_PERCENTILES))
        if not hi > lo:
            lo, hi = float(finite.min()), float(finite.max())
    else:
        lo, hi = (1.0, 10.0) if log else (0.0, 1.0)
    if measure == "murray_ratio" and finite.size:
        # Centre the scale on the cube law (ratio 1) so above and below read alike.
        half = max(abs(hi - 1.0), abs(1.0 - lo), 1e-6)
        lo, hi = 1.0 - half, 1.0 + half
    if log:
        a, b = np.log10(lo), np.log10(hi) if hi > lo else np.log10(lo) + 1.0
        t = (np.log10(np.where(ok, values, lo)) - a) / (b - a)
    else:
        span = hi - lo if hi > lo else 1.0
        t = (np.where(ok, values, lo) - lo) / span
    rgba = np.asarray(ensure_colormap(CENTRELINE_COLORMAP).map(np.clip(t, 0.0, 1.0)),
                      dtype=np.float32).reshape(-1, 4)
    rgba[~ok] = NO_VALUE_RGBA
    return rgba, (lo, hi)


def _centreline_vectors(result: tables.Result):
    """(N, 2, 3) napari vectors (start, step) along every centreline, and each one's segment row."""
    starts, steps, owner = [], [], []
    for row, p in enumerate(result.centrelines):
        p = np.asarray(p, dtype=float)
        if len(p) < 2:
            continue
        starts.append(p[:-1])
        steps.append(np.diff(p, axis=0))
        owner.append(np.full(len(p) - 1, row))
    if not starts:
        return np.zeros((0, 2, 3)), np.zeros(0, dtype=np.int64)
    return np.stack([np.vstack(starts), np.vstack(steps)], axis=1), np.concatenate(owner)


def _flag_colours(node_ids, decisions: dict) -> np.ndarray:
    out = np.array([DECISION_RGBA.get(decisions.get(int(n)), FLAGGED_RGBA) for n in node_ids], dtype=float)
    return out.reshape(-1, 4)


def result_layers(result: tables.Result, *, mask: np.ndarray | None = None, colour_by: str = "radius",
                  review: pd.DataFrame | None = None) -> list[tuple[Any, dict, str]]:
    """napari layer data tuples for a result folder.

    Parameters
    ----------
    result : pipeline.tables.Result
    mask : ndarray of bool, optional, keyword-only
        Shown with ``scale = spacing``.
    colour_by : str, keyword-only
        A key of :data:`pipeline.review.COLOUR_MEASURES`.
    review : DataFrame, optional, keyword-only
        Decisions that colour the flagged junctions (default: none).

    Returns
    -------
    list of (data, kwargs, layer_type)
        ``mask`` (if given), ``centrelines``, ``nodes``,
        ``flagged bifurcations``; every layer's metadata names the folder.
    """
    meta = {_META_KEY: str(Path(result.path).resolve())}
    spacing = tuple(float(s) for s in result.spacing)
    layers: list[tuple[Any, dict, str]] = []
    if mask is not None:
        layers.append((np.asarray(mask).view(np.uint8), dict(
            name="mask", scale=spacing, colormap="gray", contrast_limits=(0, 1), opacity=0.35,
            # A maximum projection added to what lies behind keeps the centrelines
            # inside the vessels visible, and renders several times faster than an
            # iso-surface with software OpenGL.
            rendering="mip", blending="additive", metadata=dict(meta)), "image"))
    values = rv.segment_measure(result, colour_by)
    vec, owner = _centreline_vectors(result)
    rgba, _ = _colours(values, measure=colour_by)
    radius = result.segments["radius_um"].to_numpy(float) if len(result.segments) else np.ones(0)
    width = float(np.clip(0.4 * np.nanmedian(radius), 0.5, 5.0)) if radius.size else 1.0
    layers.append((vec, dict(
        name="centrelines", edge_color=rgba[owner] if len(owner) else "white", edge_width=width, length=1.0,
        vector_style="line", features=pd.DataFrame({
            "segment_id": result.segments["segment_id"].to_numpy(np.int64)[owner] if len(owner) else [],
            "value": values[owner] if len(owner) else []}),
        metadata={**meta, "colour_by": colour_by}), "vectors"))
    nodes = result.nodes
    npos = nodes[["z_um", "y_um", "x_um"]].to_numpy(float) if len(nodes) else np.zeros((0, 3))
    nrad = nodes["radius_um"].to_numpy(float) if "radius_um" in nodes.columns else np.full(len(nodes), 1.0)
    nrad = np.where(np.isfinite(nrad) & (nrad > 0), nrad, 1.0)
    layers.append((npos, dict(
        name="nodes", size=0.8 * nrad, face_color=np.tile(NODE_RGBA, (len(npos), 1)), border_width=0, opacity=0.6,
        features=pd.DataFrame({"node_id": nodes["node_id"].to_numpy(np.int64) if len(nodes) else [],
                               "kind": nodes["kind"].astype(str).to_numpy() if len(nodes) else []}),
        metadata=dict(meta)), "points"))
    flag = review_queue(result)
    decisions = {} if review is None else dict(zip(review["node_id"].astype(int), review["decision"]))
    fpos = flag[["z_um", "y_um", "x_um"]].to_numpy(float) if len(flag) else np.zeros((0, 3))
    frad = flag["radius_parent_um"].to_numpy(float) if len(flag) else np.zeros(0)
    layers.append((fpos, dict(
        name="flagged bifurcations", size=_FLAG_SIZE_RADII * np.where(np.isfinite(frad), frad, 2.0),
        face_color="transparent", border_color=_flag_colours(flag["node_id"], decisions),
        border_width=_FLAG_RING_WIDTH, border_width_is_relative=True, blending="translucent_no_depth",
        features=pd.DataFrame({"node_id": flag["node_id"].to_numpy(np.int64) if len(flag) else []}),
        metadata=dict(meta)), "points"))
    return layers
