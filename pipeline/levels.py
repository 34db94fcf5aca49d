"""Step 8, roots, branching levels and Strahler orders.

In: the ``segments`` table (``segment_id``, ``node_from``, ``node_to``,
``length_um``, ``radius_um``) and the ``nodes`` table (``node_id``,
``z_um``, ``y_um``, ``x_um``, ``kind``) of a vessel multigraph, and a root
specification (config ``levels.root``) or explicit inlet nodes.
Out: per segment (keyed by ``segment_id``) the branching ``level``, the
Horton–Strahler order ``strahler``, the diameter-defined Strahler order
``strahler_diameter`` and ``parent_segment_id`` (pandas nullable ``Int64``,
``<NA>`` for segments that no root reaches), and the per-level table written
to ``levels.csv``.

Roots. ``'auto'`` takes the end node of kind ``'border'`` (a vessel cut by
the volume border) whose segment has the largest radius: in an image of a
vascular territory the widest cut vessel is most often the feeding artery (or
the draining vein; there is no way to tell from the mask alone, so the choice
is recorded and can be overridden). Ties go to the smallest node id. Without
any border end the widest end node of any kind is used, and without any end
node (only closed loops) the node with the widest incident segment; each
fallback is recorded in ``notes``. A position ``(z, y, x)`` in µm selects the
nearest node; ``'node:ID'`` or an integer selects a node id.

Branching level. Segments that touch a root node have level 0; passing
through a junction (a node where three or more segment ends meet, counted
from the segments table; a self-loop counts twice) adds one. In a looped
network the level of a segment is the fewest junctions on any path from a
root, found with Dijkstra's algorithm on a segment/node split graph
(``scipy.sparse.csgraph``): each junction costs ``B`` and each step 1, with
``B`` larger than any path's step count, so that paths are compared by
junction count first and by step count second; ``level = cost // B``. Nodes
of degree two (kind ``'loop'``, or any node where exactly two ends meet) do
not count.

Orientation and Strahler order. The same shortest-path search gives every
reached segment a parent: the segment through which it was reached first
(fewest junctions, then fewest steps). This is a spanning orientation away
from the root(s) in which every segment is a vertex; in a loop, the segments
that close the loop become terminal branches of the segment they were
reached from. Horton–Strahler ordering (Horton 1945, Bull Geol Soc Am
56:275; Strahler 1957, Trans Am Geophys Union 38:913) on that tree: terminal
segments are order 1; a parent whose daughters have largest order ``i`` is
``i + 1`` when two or more daughters have order ``i``, else ``i``
(a multifurcation counts like repeated bifurcations). A chain through a
degree-two node keeps its order.

Diameter-defined order (Kassab GS, Rider CA, Tang NJ, Fung YC 1993, Am J
Physiol 265:H350): on the same orientation, starting from the Strahler
orders, a segment where two or more daughters of the highest order ``n``
meet is ``n + 1`` only if its diameter (``2 * radius_um``) exceeds the bound
``(D_n + SD_n + D_{n+1} - SD_{n+1}) / 2`` between the orders' diameter
ranges, else ``n``; the means and SDs are recomputed and the ordering
repeated until no segment changes (or ``max_iter`` rounds, recorded in
``notes``). See :mod:`pipeline.orders`, which also groups the segments into
elements and tabulates the orders.
"""

from __future__ import annotations

import math
import numbers
from collections.abc import Iterable, Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.sparse import csgraph

from .errors import ConfigError, InputError
from .orders import kassab_orders, strahler_orders

__all__ = [
    "choose_roots",
    "assign_levels",
    "compute_levels",
    "level_table",
]

_SEG_COLUMNS = ("segment_id", "node_from", "node_to")


# ---------------------------------------------------------------------------
# input helpers
# ---------------------------------------------------------------------------

def _require(df: pd.DataFrame, name: str, columns: Iterable[str]) -> None:
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{name}: expected a pandas DataFrame, got {type(df).__name__}")
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise InputError(f"{name}: missing column(s) {', '.join(missing)}")


def _node_index(nodes: pd.DataFrame) -> pd.Index:
    ids = pd.Index(nodes["node_id"].to_numpy(dtype=np.int64))
    if not ids.is_unique:
        raise InputError("nodes: node_id values must be unique")
    return ids


def _segment_ends(segments: pd.DataFrame, ids: pd.Index) -> tuple[np.ndarray, np.ndarray]:
    """Row positions (into ``ids``) of each segment's two end nodes."""
    u = ids.get_indexer(segments["node_from"].to_numpy(dtype=np.int64))
    v = ids.get_indexer(segments["node_to"].to_numpy(dtype=np.int64))
    bad = (u < 0) | (v < 0)
    if bad.any():
        first = int(segments["segment_id"].to_numpy()[np.flatnonzero(bad)[0]])
        raise InputError(
            f"segments: {int(bad.sum())} segment(s) refer to node ids missing from nodes "
            f"(first: segment_id {first})"
        )
    return u, v


def _end_counts(u: np.ndarray, v: np.ndarray, n_nodes: int) -> np.ndarray:
    """Number of segment ends at every node (a self-loop counts twice)."""
    return np.bincount(u, minlength=n_nodes) + np.bincount(v, minlength=n_nodes)


def _as_node_id(value, ids: pd.Index, what: str) -> int:
    try:
        nid = int(value)
    except (TypeError, ValueError):
        raise ConfigError(f"{what}: expected a node id, got {value!r}") from None
    if nid not in ids:
        raise InputError(f"{what}: node id {nid} does not exist in the nodes table")
    return nid


def _parse_position(value, what: str) -> tuple[float, float, float] | None:
    """Return (z, y, x) if ``value`` spells a position, else None."""
    if isinstance(value, str):
        text = value.strip().strip("()[]")
        parts = [p for p in text.replace(";", ",").split(",") if p.strip()]
        if len(parts) != 3:
            return None
        try:
            pos = tuple(float(p) for p in parts)
        except ValueError:
            return None
    elif isinstance(value, Sequence) and len(value) == 3 and all(
        isinstance(p, numbers.Real) and not isinstance(p, bool) for p in value
    ):
        pos = tuple(float(p) for p in value)
    else:
        return None
    if not all(math.isfinite(p) for p in pos):
        raise ConfigError(f"{what}: position must be finite, got {value!r}")
    return pos  # type: ignore[return-value]


# ---------------------------------------------------------------------------
# roots
# ---------------------------------------------------------------------------

def choose_roots(
    nodes: pd.DataFrame,
    segments: pd.DataFrame,
    *,
    root: str | int | Sequence[float] | None = "auto",
    inlets: Iterable[int] = (),
    notes: list[str] | None = None,
) -> list[int]:
    """Pick the root node(s) that levels and orders are counted from.

    Parameters
    ----------
    nodes : DataFrame, shape (N, ...)
        Needs ``node_id`` and ``kind``; ``z_um``, ``y_um``, ``x_um`` for a
        position root.
    segments : DataFrame, shape (S, ...)
        Needs ``segment_id``, ``node_from``, ``node_to`` and, for
        ``'auto'``, ``radius_um``.
    root : {'auto'} or int or str or sequence of 3 float or None, keyword-only
        ``'auto'``: the widest border end (see the module notes for the
        fallbacks); an int or ``'node:ID'``: that node; ``(z, y, x)`` in µm
        (a sequence, or a string ``'z,y,x'``): the nearest node; None: no
        root besides ``inlets``.
    inlets : iterable of int, keyword-only
        Explicit inlet node ids. With ``root='auto'`` they replace the
        automatic choice; with an explicit root they are added to it.
    notes : list of str, optional, keyword-only
        Receives one line per fallback or choice worth recording.

    Returns
    -------
    list of int
        Root node ids, without duplicates, in the order given (root first).
        Empty only when the network has no segment and no inlet.

    Raises
    ------
    InputError
        A given node id does not exist, or a position is asked on a table
        without nodes or coordinates.
    ConfigError
        ``root`` is not one of the accepted forms.
    """
    _require(nodes, "nodes", ("node_id",))
    _require(segments, "segments", _SEG_COLUMNS)
    ids = _node_index(nodes)
    inlet_ids = [_as_node_id(i, ids, "inlets") for i in inlets]
    resolved: list[int] = []

    if root is None:
        pass
    elif isinstance(root, str) and root.strip().lower() == "auto":
        if inlet_ids:
            _note(notes, f"root: auto replaced by {len(inlet_ids)} given inlet node(s)")
        else:
            resolved = _auto_root(nodes, segments, ids, notes)
    elif isinstance(root, (bool, np.bool_)):
        raise ConfigError(f"levels.root: expected 'auto', a node id or a position, got {root!r}")
    elif isinstance(root, (numbers.Integral, np.integer)):
        resolved = [_as_node_id(root, ids, "levels.root")]
    elif isinstance(root, str) and root.strip().lower().startswith("node:"):
        resolved = [_as_node_id(root.strip()[5:].strip(), ids, "levels.root")]
    else:
        pos = _parse_position(root, "levels.root")
        if pos is None:
            raise ConfigError(
                "levels.root: expected 'auto', 'node:ID', a node id or a position 'z,y,x' in µm, "
                f"got {root!r}"
            )
        _require(nodes, "nodes", ("z_um", "y_um", "x_um"))
        if len(nodes) == 0:
            raise InputError("levels.root: a position was given but the nodes table is empty")
        xyz = nodes[["z_um", "y_um", "x_um"]].to_numpy(dtype=float)
        d2 = ((xyz - np.asarray(pos)) ** 2).sum(axis=1)
        k = int(np.argmin(d2))
        nid = int(ids[k])
        resolved = [nid]
        _note(notes, f"root: node {nid} is nearest to {pos} µm (distance {math.sqrt(d2[k]):.3g} µm)")

    out: list[int] = []
    for nid in resolved + inlet_ids:
        if nid not in out:
            out.append(nid)
    return out


def _note(notes: list[str] | None, text: str) -> None:
    if notes is not None:
        notes.append(text)


def _auto_root(nodes, segments, ids, notes) -> list[int]:
    _require(nodes, "nodes", ("kind",))
    _require(segments, "segments", ("radius_um",))
    if len(segments) == 0:
        _note(notes, "root: the network has no segment; no root")
        return []
    u, v = _segment_ends(segments, ids)
    r = segments["radius_um"].to_numpy(dtype=float)
    widest = np.full(len(ids), -np.inf)
    np.maximum.at(widest, u, r)
    np.maximum.at(widest, v, r)
    kind = nodes["kind"].astype(str).to_numpy()
    ends = _end_counts(u, v, len(ids))
    tiers = (
        ((kind == "border") & np.isfinite(widest), None),
        (((kind == "blind") | (kind == "border") | (ends == 1)) & np.isfinite(widest),
         "root: no border end; used the widest end node instead"),
        (np.isfinite(widest), "root: no end node (only closed loops); used the node with the widest segment"),
    )
    for mask, message in tiers:
        if mask.any():
            cand = np.flatnonzero(mask)
            best = widest[cand].max()
            cand = cand[widest[cand] == best]
            nid = int(ids[cand].min())
            if message:
                _note(notes, message)
            _note(notes, f"root: auto chose node {nid} (segment radius {best:.4g} µm)")
            return [nid]
    return []  # pragma: no cover - every segment end gives a finite radius


# ---------------------------------------------------------------------------
# levels and Strahler orders
# ---------------------------------------------------------------------------

def assign_levels(
    segments: pd.DataFrame,
    nodes: pd.DataFrame,
    roots: Iterable[int],
    *,
    max_iter: int = 50,
    notes: list[str] | None = None,
) -> pd.DataFrame:
    """Branching level, Strahler orders and parent of every segment.

    Parameters
    ----------
    segments : DataFrame, shape (S, ...)
        Needs ``segment_id``, ``node_from``, ``node_to``; ``radius_um`` for
        the diameter-defined order.
    nodes : DataFrame, shape (N, ...)
        Needs ``node_id``.
    roots : iterable of int
        Root node ids (see :func:`choose_roots`).
    max_iter : int, keyword-only
        Round limit of the diameter-defined ordering
        (:func:`pipeline.orders.kassab_orders`).
    notes : list of str, optional, keyword-only
        Receives a line on unreached segments and on non-convergence.

    Returns
    -------
    DataFrame, shape (S, 5)
        In the row order of ``segments``: ``segment_id`` (int64) and
        ``level``, ``strahler``, ``strahler_diameter``,
        ``parent_segment_id`` (all ``Int64``, ``<NA>`` where no root reaches
        the segment; ``parent_segment_id`` is also ``<NA>`` for segments at a
        root).

    Raises
    ------
    InputError
        Missing columns, unknown node ids, or a root that is not a node.
    """
    _require(segments, "segments", _SEG_COLUMNS)
    _require(nodes, "nodes", ("node_id",))
    ids = _node_index(nodes)
    seg_id = segments["segment_id"].to_numpy(dtype=np.int64)
    if len(np.unique(seg_id)) != len(seg_id):
        raise InputError("segments: segment_id values must be unique")
    u, v = _segment_ends(segments, ids)
    root_rows = np.array([ids.get_loc(_as_node_id(r, ids, "roots")) for r in roots], dtype=np.int64)
    n_seg, n_nodes = len(seg_id), len(ids)

    level = np.full(n_seg, -1, dtype=np.int64)
    parent = np.full(n_seg, -1, dtype=np.int64)
    strahler = np.full(n_seg, -1, dtype=np.int64)
    dist = np.full(n_seg, np.inf)
    if n_seg and len(root_rows):
        dist, parent = _shortest_levels(u, v, n_nodes, root_rows)
        reached = np.isfinite(dist)
        big = float(_junction_cost(n_seg, n_nodes))
        level[reached] = np.floor(dist[reached] / big).astype(np.int64)
        strahler = _strahler(parent, dist)
    reached = level >= 0
    n_unreached = int((~reached).sum())
    if n_unreached:
        _note(notes, f"levels: {n_unreached} of {n_seg} segment(s) not connected to a root; level <NA>")

    sdiam = np.full(n_seg, -1, dtype=np.int64)
    if reached.any() and "radius_um" in segments.columns:
        diam = 2.0 * segments["radius_um"].to_numpy(dtype=float)
        sdiam, converged, rounds = kassab_orders(parent, diam, start=strahler, max_iter=max_iter)
        if converged:
            _note(notes, f"levels: diameter-defined orders converged in {rounds} round(s)")
        elif rounds < max_iter:
            _note(notes, f"levels: diameter-defined orders did not converge: after {rounds} rounds they cycle "
                         "(segments at a bound flipping in turn); the cycle's state with the fewest promotions "
                         "is kept")
        else:
            _note(notes, f"levels: diameter-defined orders still changing after {rounds} rounds (the limit, "
                         "levels.diameter_order_max_iter); the last round's orders are kept")

    def nullable(a: np.ndarray) -> pd.arrays.IntegerArray:
        return pd.arrays.IntegerArray(np.where(a >= 0, a, 0), a < 0)

    par_ids = np.where(parent >= 0, seg_id[np.maximum(parent, 0)], -1)
    return pd.DataFrame({
        "segment_id": seg_id,
        "level": nullable(level),
        "strahler": nullable(strahler),
        "strahler_diameter": nullable(sdiam),
        "parent_segment_id": nullable(par_ids),
    })


def _junction_cost(n_seg: int, n_nodes: int) -> int:
    # Larger than the step count of any simple path in the split graph.
    return 2 * (n_seg + n_nodes) + 2


def _shortest_levels(u, v, n_nodes, root_rows):
    """Dijkstra on the segment/node split graph.

    Vertices 0..S-1 are segments, S..S+N-1 nodes. Node -> segment costs 1;
    segment -> node costs 1 + B at a junction, 1 elsewhere.

    Returns
    -------
    dist : (S,) float ndarray
        Path cost to every segment (inf where unreached).
    parent : (S,) int ndarray
        Row of the parent segment, -1 at roots and where unreached.
    """
    n_seg = len(u)
    ends = _end_counts(u, v, n_nodes)
    big = _junction_cost(n_seg, n_nodes)
    step_cost = 1.0 + big * (ends >= 3)
    seg = np.arange(n_seg)
    loop = u == v
    # A self-loop gets one edge to its node, not two (duplicates would add up).
    s_all = np.concatenate([seg, seg[~loop]])
    n_all = np.concatenate([u, v[~loop]]) + n_seg
    rows = np.concatenate([n_all, s_all])
    cols = np.concatenate([s_all, n_all])
    w = np.concatenate([np.ones(len(s_all)), step_cost[n_all - n_seg]])
    size = n_seg + n_nodes
    graph = sparse.coo_matrix((w, (rows, cols)), shape=(size, size)).tocsr()
    dist, pred, _ = csgraph.dijkstra(
        graph, directed=True, indices=np.unique(root_rows) + n_seg,
        return_predecessors=True, min_only=True,
    )
    seg_dist = dist[:n_seg]
    via = pred[:n_seg]  # node vertex each segment was entered from
    parent = np.full(n_seg, -1, dtype=np.int64)
    ok = via >= 0
    grand = np.full(n_seg, -1, dtype=np.int64)
    grand[ok] = pred[via[ok]]
    has_parent = ok & (grand >= 0)
    parent[has_parent] = grand[has_parent]
    return seg_dist, parent


def _strahler(parent: np.ndarray, dist: np.ndarray) -> np.ndarray:
    """Horton–Strahler order on the parent forest (-1 where unreached)."""
    return strahler_orders(parent, np.isfinite(dist))


def compute_levels(
    segments: pd.DataFrame,
    nodes: pd.DataFrame,
    *,
    inlets: Iterable[int] = (),
    notes: list[str] | None = None,
    root: Any = "auto",
    diameter_order_max_iter: int = 50,
    config: dict | None = None,
) -> tuple[pd.DataFrame, list[int]]:
    """Choose roots and assign levels and orders.

    Parameters
    ----------
    segments, nodes : DataFrame
        As for :func:`assign_levels`.
    inlets : iterable of int, keyword-only
        Explicit inlet node ids (see :func:`choose_roots`).
    notes : list of str, optional, keyword-only
        Receives the root choice and other remarks.
    root, diameter_order_max_iter : keyword-only
        The options of the ``levels`` section of the config (the root as
        :func:`choose_roots` takes it; the iteration limit of the
        diameter-defined orders); ``pipeline.analyze`` passes
        ``**config['levels']``.
    config : dict, optional, keyword-only
        Deprecated (a DeprecationWarning): a full config or its ``levels``
        section.

    Returns
    -------
    table : DataFrame, shape (S, 5)
        As returned by :func:`assign_levels`.
    roots : list of int
        Root node ids used.
    """
    from .config import step_options

    cfg = step_options("levels", locals(), config=config, caller="compute_levels")
    roots = choose_roots(nodes, segments, root=cfg["root"], inlets=inlets, notes=notes)
    table = assign_levels(segments, nodes, roots, max_iter=cfg["diameter_order_max_iter"], notes=notes)
    return table, roots


# ---------------------------------------------------------------------------
# table
# ---------------------------------------------------------------------------

def level_table(segments_with_levels: pd.DataFrame, *, by: str = "level") -> pd.DataFrame:
    """Per-level morphometry for ``levels.csv``.

    Parameters
    ----------
    segments_with_levels : DataFrame, shape (S, ...)
        Needs ``radius_um``, ``length_um`` and the column named by ``by``.
    by : {'level', 'strahler', 'strahler_diameter'}, keyword-only
        Grouping column.

    Returns
    -------
    DataFrame, one row per value of ``by`` in increasing order, then one row
    with ``<NA>`` for segments without a value (only if there are any).
        Columns: ``by`` (Int64), ``n_segments``, ``radius_mean_um``,
        ``radius_sd_um`` (sample SD, NaN for one segment),
        ``length_total_um``, ``length_mean_um``, and the ratios of this row
        to the row of the previous value (``value - 1``; NaN for the first
        row, a missing previous value and the ``<NA>`` row):
        ``branching_ratio`` = N_l / N_{l-1}, ``radius_ratio`` =
        mean r_l / mean r_{l-1}, ``length_ratio`` = mean length_l / mean
        length_{l-1}. By level these are the daughter-over-parent ratios.
        By Strahler order (orders count up from the periphery) the radius
        and length ratios are Horton's diameter and length ratios
        themselves (order n over order n - 1), while Horton's number
        (bifurcation) ratio N_{n-1} / N_n is the reciprocal of
        ``branching_ratio``. Horton ratios fitted over all orders of
        elements are in ``orders.csv`` and the summary
        (:mod:`pipeline.orders`).

    Raises
    ------
    InputError
        Missing columns or an unknown ``by``.
    """
    if by not in ("level", "strahler", "strahler_diameter"):
        raise InputError(f"level_table: by must be 'level', 'strahler' or 'strahler_diameter', got {by!r}")
    _require(segments_with_levels, "segments", (by, "radius_um", "length_um"))
    key = pd.array(segments_with_levels[by], dtype="Int64")
    r = segments_with_levels["radius_um"].to_numpy(dtype=float)
    length = segments_with_levels["length_um"].to_numpy(dtype=float)
    has = ~np.asarray(key.isna())
    k = key[has].to_numpy(dtype=np.int64)
    values, inv = np.unique(k, return_inverse=True)
    cnt = np.bincount(inv, minlength=len(values)).astype(np.int64)
    rk, lk = r[has], length[has]
    r_mean = np.bincount(inv, weights=rk, minlength=len(values)) / np.maximum(cnt, 1)
    ss = np.bincount(inv, weights=(rk - r_mean[inv]) ** 2, minlength=len(values))
    with np.errstate(divide="ignore", invalid="ignore"):
        r_sd = np.where(cnt > 1, np.sqrt(ss / (cnt - 1)), np.nan)
    l_tot = np.bincount(inv, weights=lk, minlength=len(values))
    l_mean = l_tot / np.maximum(cnt, 1)
    prev_ok = np.r_[False, np.diff(values) == 1] if len(values) else np.zeros(0, dtype=bool)

    def ratio(x: np.ndarray) -> np.ndarray:
        out = np.full(len(x), np.nan)
        if len(x) > 1:
            with np.errstate(divide="ignore", invalid="ignore"):
                out[1:] = x[1:] / x[:-1]
        out[~prev_ok] = np.nan
        return out

    cols = {
        "n_segments": cnt,
        "radius_mean_um": r_mean,
        "radius_sd_um": r_sd,
        "length_total_um": l_tot,
        "length_mean_um": l_mean,
        "branching_ratio": ratio(cnt.astype(float)),
        "radius_ratio": ratio(r_mean),
        "length_ratio": ratio(l_mean),
    }
    mask = np.zeros(len(values), dtype=bool)
    n_missing = int((~has).sum())
    if n_missing:
        rm, lm = r[~has], length[~has]
        tail = {
            "n_segments": n_missing,
            "radius_mean_um": rm.mean(),
            "radius_sd_um": rm.std(ddof=1) if n_missing > 1 else np.nan,
            "length_total_um": lm.sum(),
            "length_mean_um": lm.mean(),
            "branching_ratio": np.nan,
            "radius_ratio": np.nan,
            "length_ratio": np.nan,
        }
        cols = {c: np.append(a, tail[c]) for c, a in cols.items()}
        values = np.append(values, 0)
        mask = np.append(mask, True)
    table = pd.DataFrame({by: pd.arrays.IntegerArray(values.astype(np.int64), mask), **cols})
    table["n_segments"] = table["n_segments"].astype(np.int64)
    return table
