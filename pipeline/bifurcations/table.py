"""The per-junction table: arms, flow pattern and parent, Murray's law checks and flags beyond the uncertainty.

In: the segments and nodes tables, the centrelines, the config and the voxel spacing. Out: one row per
junction of three or more segments (:data:`COLUMNS`) and the summary
(:func:`analyze_bifurcations`).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd

from .._checks import segment_end_rows
from ..errors import InputError
from ..config import step_options
from ..measures import radius_uncertainty
from ._common import REASON_CODES, UNCERTAIN_CODES, _empty_table, _float_column, _require, _typed
from .laws import _exponent_u, _exponents, _optimal_angles_u, _ratio_u, murray_optimal_angles
from .angles import _angles_deg, _directions, _out_of_plane_deg
from .summary import _summary

# An arm's flow at or below this fraction of the largest at its junction, or
# of the largest in the network, counts as none (module notes: solver errors
# measured at 1e-11 of the network's largest flow, real flows down to 5e-9).
_FLOW_RTOL = 1e-9
_FLOW_NETWORK_RTOL = 1e-10


def _check_centrelines(centrelines: Any, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Validate the centrelines and concatenate them.

    Returns ``(points, offsets)``: all points in segment row order, shape
    (P, 3), and the start of each row's points, shape (n + 1,).
    """
    if centrelines is None or isinstance(centrelines, (str, bytes)):
        raise InputError(f"centrelines: expected a list of (K, 3) arrays, got {type(centrelines).__name__}")
    try:
        items = list(centrelines)
    except TypeError:
        raise InputError(f"centrelines: expected a list of (K, 3) arrays, got {type(centrelines).__name__}") from None
    if len(items) != n:
        raise InputError(f"centrelines: expected one per segment row ({n}), got {len(items)}")
    arrays = [np.asarray(c, dtype=float) for c in items]
    bad_shape = next((i for i, a in enumerate(arrays) if a.ndim != 2 or a.shape[1] != 3 or len(a) < 2), n)
    # Rows before the first bad shape are checked for finite values first, so
    # that the error names the first bad row, whatever is wrong with it.
    good = arrays[:bad_shape]
    offsets = np.r_[0, np.cumsum([len(a) for a in good], dtype=np.int64)].astype(np.int64)
    points = np.concatenate(good) if good else np.empty((0, 3))
    finite = np.isfinite(points).all(axis=1)
    if not finite.all():
        i = int(np.searchsorted(offsets, np.flatnonzero(~finite)[0], side="right")) - 1
        raise InputError(f"centrelines: expected finite coordinates, got a non-finite value at row {i}")
    if bad_shape < n:
        raise InputError(f"centrelines: expected (K, 3) arrays with K >= 2, got shape {arrays[bad_shape].shape} "
                         f"at row {bad_shape}")
    return points, offsets


def analyze_bifurcations(
    segments: pd.DataFrame,
    nodes: pd.DataFrame,
    centrelines: Sequence[np.ndarray],
    *,
    voxel_um: float | None = None,
    enabled: bool = True,
    murray_min_parent_diameter_um: float | None = 7.0,
    ratio_min: float | None = 0.6667,
    ratio_max: float | None = 1.5,
    exponent_min: float | None = 2.0,
    exponent_max: float | None = 4.0,
    flag_undefined_exponent: bool = True,
    angle_deviation_max_deg: float | None = 30.0,
    flag_multi: bool = True,
    significance_z: float = 2.0,
    radius_floor_voxels: float = 0.04,
    angle_sd_deg: float = 6.0,
    low_confidence_uncertain: bool = True,
    min_radius_points: int = 5,
    min_length_radii: float = 2.0,
    tangent_fit_radii: float = 3.0,
    tangent_skip_radii: float = 1.0,
    network_bootstrap_resamples: int = 2000,
    network_bootstrap_seed: int = 0,
    config: Mapping[str, Any] | None = None,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Radius law, branching angles, flow split and flags at every junction.

    Parameters
    ----------
    segments : DataFrame, shape (S, ...)
        ``segment_id``, ``node_from``, ``node_to``, ``length_um``,
        ``radius_um``; optionally ``radius_sd_um``, ``radius_n_points``,
        ``n_points`` (centreline points), ``level``, ``flow_nl_min``,
        ``wss_pa`` (see the module notes).
    nodes : DataFrame, shape (N, ...)
        ``node_id``; ``z``, ``y``, ``x``, ``z_um``, ``y_um``, ``x_um`` are
        copied to the table when present.
    centrelines : sequence of (K, 3) array_like
        One per segment row, µm, from ``node_from`` to ``node_to``.
    voxel_um : float, optional, keyword-only
        Coarsest voxel spacing of the mask the segments were measured on, µm
        (module notes, "Radius uncertainty"): without it the radius
        uncertainty has no floor.
    enabled, murray_min_parent_diameter_um, ..., network_bootstrap_seed : keyword-only
        The options of the ``bifurcations`` section of the config, with its
        defaults and meanings (``configs/default.yaml``); ``pipeline.analyze``
        passes the validated section as ``**config['bifurcations']``.
    config : mapping or None, keyword-only
        Deprecated (a DeprecationWarning): a full config or its
        ``bifurcations`` section, as earlier versions took the options.

    Returns
    -------
    table : DataFrame
        One row per junction where three or more segment ends meet (a
        self-loop counts twice) and at least three segments are not
        self-loops, sorted by ``node_id``; columns :data:`COLUMNS`
        (``_u`` columns: standard uncertainties, in the unit of the
        quantity). Empty (with those columns) when ``enabled`` is false.
    summary : dict
        ``bifurcations`` (rows), ``bifurcations_flagged`` (the review
        queue), ``bifurcations_uncertain`` (not judged),
        ``bifurcations_low_confidence``, ``multifurcations``,
        ``bifurcations_diverging``, ``bifurcations_converging``,
        ``bifurcations_mixed``, ``bifurcations_unsolved`` (rows per
        ``flow_pattern``), ``flag_counts`` (every code of
        :data:`REASON_CODES`), ``uncertain_counts`` (every code of
        :data:`UNCERTAIN_CODES`), ``murray_exponent_median`` (over all
        rows, undefined exponents counted as +inf; None when the median
        itself is infinite), ``murray_ratio_median`` (over finite values of
        all rows), ``murray_exponent_median_diverging``,
        ``murray_ratio_median_diverging`` and the same ``_converging``
        (over the rows of that pattern), the network fit's keys
        (:func:`pipeline.murray.network_summary`:
        ``murray_exponent_network`` with ``_ci_low``, ``_ci_high``,
        ``_junctions``, ``_note``, ``_multifurcations``,
        ``murray_exponents_undefined``, ``murray_ratio_q25``,
        ``murray_ratio_q75``), ``fraction_within_tolerance``
        (share of the junctions not uncertain without a Murray-law code),
        ``flow_split_error_median`` (median ``|flow_split_daughter1 -
        flow_split_cube_law|`` over diverging and converging junctions;
        None without flow), ``junctions_skipped`` (junctions where fewer
        than three segments are not self-loops). Medians and fractions are
        None when there is no row to take them over.
        With ``enabled`` false: ``{"bifurcations_enabled": False}``.

    Raises
    ------
    InputError
        Missing columns, unknown node ids, duplicate ids, centrelines that do
        not match the segment rows, or radii that are not positive.
    ConfigError
        Invalid ``bifurcations`` options.
    """
    cfg = step_options("bifurcations", locals(), config=config, caller="analyze_bifurcations")
    if not cfg["enabled"]:
        return _empty_table(), {"bifurcations_enabled": False}
    _require(segments, "segments", ("segment_id", "node_from", "node_to", "length_um", "radius_um"))
    _require(nodes, "nodes", ("node_id",))
    points, offsets = _check_centrelines(centrelines, len(segments))
    if voxel_um is not None:
        try:
            v = math.nan if isinstance(voxel_um, bool) else float(voxel_um)
        except (TypeError, ValueError):
            v = math.nan
        if not (math.isfinite(v) and v > 0):
            raise InputError(f"voxel_um: expected a positive finite voxel spacing in µm or None, got {voxel_um!r}")
        voxel_um = v

    ids, seg_id, u, v = segment_end_rows(segments, nodes)
    radius = _float_column(segments, "radius_um")
    if not np.all(np.isfinite(radius) & (radius > 0)):
        k = int(np.flatnonzero(~(np.isfinite(radius) & (radius > 0)))[0])
        raise InputError(
            f"segments: radius_um must be finite and > 0 (segment_id {int(seg_id[k])}, value {radius[k]!r})"
        )
    cols = {c: _float_column(segments, c) for c in ("length_um", "radius_n_points", "level", "flow_nl_min", "wss_pa",
                                                    "radius_sd_um", "n_points")}
    has_flow = cols["flow_nl_min"] is not None
    step = None
    if cols["n_points"] is not None:
        with np.errstate(invalid="ignore", divide="ignore"):
            step = cols["length_um"] / (cols["n_points"] - 1.0)
    n_rows = len(radius)
    u_radius = radius_uncertainty(
        radius, cols["radius_sd_um"] if cols["radius_sd_um"] is not None else np.zeros(n_rows),
        cols["radius_n_points"] if cols["radius_n_points"] is not None else np.ones(n_rows),
        step_um=step, voxel_um=voxel_um, floor_voxels=cfg["radius_floor_voxels"])

    n_nodes = len(ids)
    loop = u == v
    ends = np.bincount(u, minlength=n_nodes) + np.bincount(v, minlength=n_nodes)
    # Arms: the segment ends that are not self-loops, grouped by node in a
    # stable order (ends at node_from in segment row order, then ends at
    # node_to), which decides between equal inflows.
    nl = np.flatnonzero(~loop)
    arm_node = np.concatenate([u[nl], v[nl]])
    order = np.argsort(arm_node, kind="stable")
    arm_node = arm_node[order]
    arm_seg = np.concatenate([nl, nl])[order]
    arm_start = np.repeat([True, False], len(nl))[order]  # the segment leaves the node at its first point
    is_junction = np.bincount(arm_node, minlength=n_nodes) >= 3
    skipped = int(((ends >= 3) & ~is_junction).sum())
    node_row = np.flatnonzero(is_junction)
    if len(node_row) == 0:
        return _empty_table(), _summary(_empty_table(), has_flow=has_flow, skipped=skipped, cfg=cfg)
    keep = is_junction[arm_node]
    arms = _Arms(
        group=np.searchsorted(node_row, arm_node[keep]),
        seg=arm_seg[keep],
        start=arm_start[keep],
        n_junctions=len(node_row),
    )
    loop_rows = np.flatnonzero(loop & is_junction[u])
    loops = (np.searchsorted(node_row, u[loop_rows]), seg_id[loop_rows])

    table = _junction_table(node_row, arms, loops, ends=ends, ids=ids, seg_id=seg_id, radius=radius,
                            u_radius=u_radius, cols=cols, nodes=nodes, points=points, offsets=offsets, cfg=cfg)
    table = table.sort_values("node_id", kind="stable").reset_index(drop=True)
    return table, _summary(table, has_flow=has_flow, skipped=skipped, cfg=cfg)


class _Arms:
    """The arms (non-loop segment ends) of all junctions, grouped by junction.

    Attributes
    ----------
    group : ndarray of int, shape (A,)
        Junction index of each arm, non-decreasing.
    seg : ndarray of int, shape (A,)
        Segment row of each arm.
    start : ndarray of bool, shape (A,)
        The segment leaves the junction at its first centreline point.
    first : ndarray of int, shape (J,)
        Index of each junction's first arm.
    """

    def __init__(self, *, group: np.ndarray, seg: np.ndarray, start: np.ndarray, n_junctions: int):
        self.group, self.seg, self.start = group, seg, start
        self.first = np.searchsorted(group, np.arange(n_junctions))


def _choose_parents(arms: _Arms, r: np.ndarray, sid: np.ndarray, level: np.ndarray | None,
                    flow: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Flow pattern and parent arm of every junction (module notes).

    Parameters
    ----------
    arms : _Arms
    r, sid : ndarray, shape (A,)
        Radius and segment id of each arm.
    level, flow : ndarray or None
        Per segment row (NaN where missing).

    Returns
    -------
    parent : ndarray of int, shape (J,)
        Index of the parent arm.
    parent_by : ndarray of object, shape (J,)
        ``"flow"``, ``"level"`` or ``"radius"``.
    pattern : ndarray of object, shape (J,)
        One of :data:`FLOW_PATTERNS`.
    by_width : ndarray of int, shape (A,)
        All arms, by junction, widest first (ties to the smallest id).
    """
    g, first = arms.group, arms.first
    n = len(first)
    by_width = np.lexsort((sid, -r, g))
    parent = by_width[first]
    parent_by = np.full(n, "radius", dtype=object)
    pattern = np.full(n, "unsolved", dtype=object)
    if level is not None:
        lv = level[arms.seg]
        known = np.isfinite(lv)
        use = np.logical_or.reduceat(known, first)
        by_level = np.lexsort((sid, -r, np.where(known, lv, np.inf), g))  # lowest level, widest, smallest id
        parent = np.where(use, by_level[first], parent)
        parent_by[use] = "level"
    if flow is not None:
        q = flow[arms.seg]
        q_in = np.where(arms.start, -q, q)  # flow entering the junction through each arm
        finite = np.isfinite(q_in)
        q_abs = np.where(finite, np.abs(q_in), 0.0)
        network = np.fmax.reduce(np.abs(flow)) if np.isfinite(flow).any() else 0.0  # fmax skips NaN
        thr = np.maximum(_FLOW_RTOL * np.maximum.reduceat(q_abs, first), _FLOW_NETWORK_RTOL * network)
        inflow = finite & (q_in > thr[g])
        outflow = finite & (q_in < -thr[g])
        n_in = np.add.reduceat(inflow, first)
        n_out = np.add.reduceat(outflow, first)
        n_arms = np.diff(np.r_[first, len(g)])
        diverging = (n_in == 1) & (n_out == n_arms - 1)
        converging = (n_out == 1) & (n_in == n_arms - 1)
        solved = (n_in + n_out) > 0
        pattern[solved] = "mixed"
        pattern[diverging] = "diverging"
        pattern[converging] = "converging"
        idx = np.arange(len(g))
        # Diverging and mixed: the (largest) inflow, the first in arm order among
        # equals; converging: the one outflow, the arm with the smallest q_in.
        q_f = np.where(finite, q_in, np.nan)
        top = np.fmax.reduceat(np.where(finite, q_in, -np.inf), first)
        first_top = np.minimum.reduceat(np.where(q_f == top[g], idx, len(g)), first)
        out_arm = np.minimum.reduceat(np.where(outflow, idx, len(g)), first)
        parent = np.where(solved, np.where(converging, out_arm, first_top), parent)
        parent_by[solved] = "flow"
    return parent, parent_by, pattern, by_width


def _join_groups(group: np.ndarray, texts: Sequence[str], n: int) -> list[str]:
    """``";"``-join the texts of each of ``n`` groups, keeping their given order within a group."""
    order = np.argsort(group, kind="stable")
    bounds = np.searchsorted(group[order], np.arange(n + 1))
    t = [texts[i] for i in order.tolist()]
    return [";".join(t[a:b]) for a, b in zip(bounds[:-1].tolist(), bounds[1:].tolist())]


def _code_strings(hits: np.ndarray, codes: Sequence[str]) -> np.ndarray:
    """``";"``-joined codes of each row of a (J, len(codes)) boolean array, in the order of ``codes``."""
    key = hits.astype(np.int64) @ (1 << np.arange(hits.shape[1], dtype=np.int64))
    combos, inverse = np.unique(key, return_inverse=True)  # a handful of distinct combinations
    text = np.array([";".join(c for b, c in enumerate(codes) if k >> b & 1) for k in combos.tolist()],
                    dtype=object)
    return text[inverse.ravel()]


def _daughters(arms: _Arms, parent: np.ndarray, by_width: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """The daughter arms of every junction: the arms but the parent, widest first.

    Returns
    -------
    daughters : ndarray of int, shape (A - J,)
        Arm indices, by junction, widest first.
    d_first : ndarray of int, shape (J,)
        Index of each junction's first daughter in ``daughters``.
    """
    # Dropping each junction's parent from the width order leaves every
    # junction's daughters contiguous.
    is_parent = np.zeros(len(arms.group), dtype=bool)
    is_parent[parent] = True
    daughters = by_width[~is_parent[by_width]]
    d_first = arms.first - np.arange(len(arms.first))
    return daughters, d_first


def _radius_law(r0, u0, rd, ud, d_first, r0_of_daughter):
    """Murray's radius law with sums over all daughters, and its first-order uncertainty.

    Parameters
    ----------
    r0, u0 : ndarray, shape (J,)
        Parent radius and its standard uncertainty.
    rd, ud : ndarray, shape (D,)
        Daughter radii and their uncertainties, by junction.
    d_first : ndarray of int, shape (J,)
        Index of each junction's first daughter.
    r0_of_daughter : ndarray, shape (D,)
        The parent radius at each daughter.

    Returns
    -------
    sum3, ratio, ratio_u, area, expo, expo_u : ndarray, shape (J,)
        Sum of the daughters' cubed radii, the Murray ratio and its
        uncertainty, the area ratio, the exponent and its uncertainty.
    undefined : ndarray of bool, shape (J,)
        A daughter at least as wide as the parent (no exponent).
    """
    sum3 = np.add.reduceat(rd**3, d_first)
    ratio = sum3 / r0**3
    ratio_u = _ratio_u(r0, u0, rd, ud, d_first, ratio)
    area = np.add.reduceat(rd**2, d_first) / r0**2
    expo = _exponents(r0, rd, d_first)
    expo_u = _exponent_u(r0, u0, rd, ud, d_first, expo)
    undefined = np.logical_or.reduceat(rd >= r0_of_daughter, d_first)
    return sum3, ratio, ratio_u, area, expo, expo_u, undefined


def _branch_angles(arms: _Arms, trio, scale, radii, uncertainties, multi, *, points, offsets, cfg):
    """Branching angles at every junction against Murray's optimum.

    Parameters
    ----------
    arms : _Arms
    trio : ndarray of int, shape (J, 3)
        Arms of the parent, daughter 1 and daughter 2.
    scale : ndarray, shape (J,)
        Radius of the widest vessel at the junction (the junction zone scales with it).
    radii, uncertainties : tuple of 3 ndarrays, shape (J,)
        Radii of parent, daughter 1 and 2, and their uncertainties.
    multi : ndarray of bool, shape (J,)
        More than two daughters (no optimum).
    points, offsets, cfg : keyword-only
        Centreline points and offsets, the ``bifurcations`` config.

    Returns
    -------
    a1, a2, between, oop, o1, o2, dev, dev_u : ndarray, shape (J,)
        Daughter angles from the parent's continuation, the angle between
        the daughters, out of plane, the optimal angles, the deviation and
        its uncertainty, degrees.
    from_node : ndarray of bool, shape (3 J,)
        Tangents of ``trio.ravel()`` taken from the node.
    """
    r0, r1, r2 = radii
    u0, u1, u2 = uncertainties
    # Directions pointing away from the node, for parent, daughter 1 and 2.
    dirs, from_node, bend = _directions(points, offsets, arms.seg[trio.ravel()], arms.start[trio.ravel()],
                                        np.repeat(scale, 3), cfg["tangent_skip_radii"], cfg["tangent_fit_radii"])
    b0, b1, b2 = bend[0::3], bend[1::3], bend[2::3]
    t0, t1, t2 = dirs[0::3], dirs[1::3], dirs[2::3]
    a1, a2 = _angles_deg(t1, -t0), _angles_deg(t2, -t0)
    between = _angles_deg(t1, t2)
    oop = _out_of_plane_deg(t0, t1, t2)
    o1, o2 = murray_optimal_angles(r0, r1, r2)
    ou1, ou2 = _optimal_angles_u(r0, r1, r2, u0, u1, u2)
    e1, e2 = np.abs(a1 - o1), np.abs(a2 - o2)
    dev = np.maximum(e1, e2)  # NaN when either angle is undefined
    dev_u = np.sqrt(np.where(e2 > e1, ou2, ou1) ** 2 + cfg["angle_sd_deg"] ** 2
                    + b0**2 + np.where(e2 > e1, b2, b1) ** 2)
    # The optimum is defined for two daughters.
    o1, o2, dev, dev_u = (np.where(multi, np.nan, x) for x in (o1, o2, dev, dev_u))
    dev_u = np.where(np.isfinite(dev), dev_u, np.nan)
    return a1, a2, between, oop, o1, o2, dev, dev_u, from_node


def _flow_split(flow, wss, pattern, p, ds, d1, d2, d_first):
    """Daughter 1's share of the daughters' flow, and the daughters' wall shear stress over the parent's.

    The split is given at diverging and converging junctions only: mass
    balance gives it a meaning there. All NaN without flow (or shear).

    Returns
    -------
    split, w1, w2 : ndarray, shape (J,)
    """
    n = len(pattern)
    split = np.full(n, np.nan)
    if flow is not None:
        tot = np.add.reduceat(np.abs(flow[ds]), d_first)
        judged_flow = (pattern == "diverging") | (pattern == "converging")
        np.divide(np.abs(flow[d1]), tot, out=split, where=judged_flow & np.isfinite(tot) & (tot > 0))
    w1, w2 = np.full(n, np.nan), np.full(n, np.nan)
    if wss is not None:
        ok = np.isfinite(wss[p]) & (wss[p] > 0)
        np.divide(wss[d1], wss[p], out=w1, where=ok)
        np.divide(wss[d2], wss[p], out=w2, where=ok)
    return split, w1, w2


def _confidence(arms: _Arms, p, ds, *, npts, length, radius, cfg):
    """Segments of every junction measured on too few radius points or too short, parent first.

    Returns
    -------
    members : ndarray of int, shape (A,)
        Segment rows laid out like the arms: the parent in each junction's
        first slot, then its daughters widest first.
    few, short : ndarray of bool, shape (A,)
        Per member.
    low_conf : ndarray of bool, shape (J,)
        A member of the junction is either.
    """
    g, first = arms.group, arms.first
    members = np.empty(len(g), dtype=np.int64)
    members[first] = p
    rest = np.ones(len(g), dtype=bool)
    rest[first] = False
    members[rest] = ds
    few = np.zeros(len(g), dtype=bool)
    if npts is not None:
        few = np.isfinite(npts[members]) & (npts[members] < cfg["min_radius_points"])
    short = np.isfinite(length[members]) & (length[members] < cfg["min_length_radii"] * radius[members])
    low_conf = np.logical_or.reduceat(few | short, first)
    return members, few, short, low_conf


def _confidence_notes(arms: _Arms, trio, from_node, members, few, short, loops, seg_id) -> list[str]:
    """The ``confidence_notes`` of every junction.

    Notes, in this order within a row: few_points, short, self_loop,
    tangent_from_node (parent, daughter 1, daughter 2), each with its
    segment id.

    Parameters
    ----------
    arms : _Arms
    trio : ndarray of int, shape (J, 3)
        Arms of the parent, daughter 1 and daughter 2.
    from_node : ndarray of bool, shape (3 J,)
        Tangents of ``trio.ravel()`` taken from the node.
    members, few, short : ndarray, shape (A,)
        As :func:`_confidence` returns them.
    loops : tuple of 2 ndarrays
        Junction index and segment id of each self-loop at a junction.
    seg_id : ndarray of int, shape (S,)

    Returns
    -------
    list of str, length J
    """
    g = arms.group
    n = len(arms.first)
    loop_group, loop_id = loops
    tangent_seg = arms.seg[trio.ravel()][from_node]
    note_group = np.concatenate([g[few], g[short], loop_group, np.repeat(np.arange(n), 3)[from_node]])
    note_text = ([f"few_points:{i}" for i in seg_id[members[few]].tolist()]
                 + [f"short:{i}" for i in seg_id[members[short]].tolist()]
                 + [f"self_loop:{i}" for i in loop_id.tolist()]
                 + [f"tangent_from_node:{i}" for i in seg_id[tangent_seg].tolist()])
    return _join_groups(note_group, note_text, n)


def _flags(*, ratio, ratio_u, expo, expo_u, dev, dev_u, undefined, wider_sig, multi, cfg):
    """Flags in :data:`REASON_CODES` order and their severity (module notes).

    A junction is flagged outside the band (a null threshold switches its
    rule off; NaN compares False and never trips a bound) and farther from
    the law than ``significance_z`` standard uncertainties.

    Returns
    -------
    hits : ndarray of bool, shape (J, len(REASON_CODES))
    severity : ndarray, shape (J,)
        The largest significance of the out-of-band quantities, 0 for none.
    """
    n = len(ratio)
    z = cfg["significance_z"]

    def above(values, key):
        return np.zeros(n, dtype=bool) if cfg[key] is None else values > cfg[key]

    def below(values, key):
        return np.zeros(n, dtype=bool) if cfg[key] is None else values < cfg[key]

    with np.errstate(invalid="ignore", divide="ignore"):
        sig_ratio = np.abs(ratio - 1.0) / ratio_u  # inf where the uncertainty is 0
        sig_expo = np.abs(expo - 3.0) / expo_u
        sig_angle = dev / dev_u
    sig_ratio = np.where(ratio == 1.0, 0.0, sig_ratio)
    sig_expo = np.where(expo == 3.0, 0.0, sig_expo)
    sig_angle = np.where(dev == 0.0, 0.0, sig_angle)
    out_ratio = above(ratio, "ratio_max") | below(ratio, "ratio_min")
    out_expo = above(expo, "exponent_max") | below(expo, "exponent_min")
    out_undef = undefined & bool(cfg["flag_undefined_exponent"])
    out_angle = above(dev, "angle_deviation_max_deg")
    hits = np.column_stack([
        above(ratio, "ratio_max") & (sig_ratio > z), below(ratio, "ratio_min") & (sig_ratio > z),
        above(expo, "exponent_max") & (sig_expo > z), below(expo, "exponent_min") & (sig_expo > z),
        out_undef & (wider_sig > z),
        out_angle & (sig_angle > z),
        multi & bool(cfg["flag_multi"]),
    ])
    severity = np.zeros(n)
    for out, sig in ((out_ratio, sig_ratio), (out_expo, sig_expo), (out_undef, wider_sig), (out_angle, sig_angle)):
        severity = np.where(out & ~np.isnan(sig), np.fmax(severity, sig), severity)
    return hits, severity


def _uncertain_reasons(*, ratio, ratio_u, hits, low_conf, pattern, r0, cfg):
    """Why each junction is not judged, in :data:`UNCERTAIN_CODES` order (module notes).

    Returns
    -------
    ndarray of bool, shape (J, len(UNCERTAIN_CODES))
    """
    n = len(ratio)
    z = cfg["significance_z"]
    # A ratio is unresolved when z uncertainties reach from the cube law to
    # the band's edge on its side.
    edge = np.full(n, np.inf)
    if cfg["ratio_max"] is not None:
        edge = np.where(ratio >= 1.0, cfg["ratio_max"] - 1.0, edge)
    if cfg["ratio_min"] is not None:
        edge = np.where(ratio < 1.0, 1.0 - cfg["ratio_min"], edge)
    unresolved = (z * ratio_u >= edge) & ~(hits[:, 0] | hits[:, 1])
    # Murray's law is a design rule of branching trees; capillary meshes of
    # near-uniform vessels do not follow it (three equal vessels give a ratio
    # of 2), so junctions whose parent is capillary-sized are not judged.
    cap_min = cfg["murray_min_parent_diameter_um"]
    capillary = (2.0 * r0 < cap_min) if cap_min is not None else np.zeros(n, dtype=bool)
    return np.column_stack([low_conf & bool(cfg["low_confidence_uncertain"]), unresolved, pattern == "mixed",
                            capillary])


def _location_columns(nodes: pd.DataFrame, node_row: np.ndarray) -> dict[str, Any]:
    """The junction nodes' ``z``, ``y``, ``x`` (nullable integers) and ``z_um``, ``y_um``, ``x_um`` columns."""
    n = len(node_row)

    def voxel(c):
        if c not in nodes.columns:
            return pd.array([None] * n, dtype="Int64")
        val = _float_column(nodes, c)[node_row]
        known = np.isfinite(val)
        return pd.arrays.IntegerArray(np.where(known, np.rint(val), 0).astype(np.int64), ~known)

    def micron(c):
        return _float_column(nodes, c)[node_row] if c in nodes.columns else np.full(n, np.nan)

    return {"z": voxel("z"), "y": voxel("y"), "x": voxel("x"),
            "z_um": micron("z_um"), "y_um": micron("y_um"), "x_um": micron("x_um")}


def _junction_table(node_row, arms, loops, *, ends, ids, seg_id, radius, u_radius, cols, nodes, points, offsets,
                    cfg) -> pd.DataFrame:
    """One row per junction, in the order of ``node_row`` (see :func:`analyze_bifurcations`)."""
    n = len(node_row)
    g, first = arms.group, arms.first
    length, npts, level, flow, wss = (cols[c] for c in ("length_um", "radius_n_points", "level", "flow_nl_min",
                                                        "wss_pa"))
    r = radius[arms.seg]
    parent, parent_by, pattern, by_width = _choose_parents(arms, r, seg_id[arms.seg], level, flow)

    # Daughters: the other arms, widest first.
    daughters, d_first = _daughters(arms, parent, by_width)
    n_daughters = np.diff(np.r_[d_first, len(daughters)])
    multi = n_daughters > 2
    p = arms.seg[parent]
    ds = arms.seg[daughters]
    d1, d2 = ds[d_first], ds[d_first + 1]

    r0, rd, r1, r2 = radius[p], radius[ds], radius[d1], radius[d2]
    u0, ud, u1, u2 = u_radius[p], u_radius[ds], u_radius[d1], u_radius[d2]
    sum3, ratio, ratio_u, area, expo, expo_u, undefined = _radius_law(r0, u0, rd, ud, d_first, r0[g[daughters]])
    # The widest daughter (daughter 1) against the parent, for exponent_undefined.
    with np.errstate(invalid="ignore", divide="ignore"):
        wider_sig = (r1 - r0) / np.sqrt(u1**2 + u0**2)

    trio = np.column_stack([parent, daughters[d_first], daughters[d_first + 1]])  # arms, (n, 3)
    a1, a2, between, oop, o1, o2, dev, dev_u, from_node = _branch_angles(
        arms, trio, np.maximum.reduceat(r, first), (r0, r1, r2), (u0, u1, u2), multi,
        points=points, offsets=offsets, cfg=cfg)
    cube = r1**3 / sum3
    split, w1, w2 = _flow_split(flow, wss, pattern, p, ds, d1, d2, d_first)
    members, few, short, low_conf = _confidence(arms, p, ds, npts=npts, length=length, radius=radius, cfg=cfg)

    notes = _confidence_notes(arms, trio, from_node, members, few, short, loops, seg_id)
    daughter_text = _join_groups(g[daughters], [str(i) for i in seg_id[ds].tolist()], n)

    hits, severity = _flags(ratio=ratio, ratio_u=ratio_u, expo=expo, expo_u=expo_u, dev=dev, dev_u=dev_u,
                            undefined=undefined, wider_sig=wider_sig, multi=multi, cfg=cfg)
    # Uncertain: not judged (module notes).
    why = _uncertain_reasons(ratio=ratio, ratio_u=ratio_u, hits=hits, low_conf=low_conf, pattern=pattern, r0=r0,
                             cfg=cfg)
    uncertain = why.any(axis=1)
    hits &= ~uncertain[:, None]

    lv = level[p] if level is not None else np.full(n, np.nan)
    known_lv = np.isfinite(lv)
    table = pd.DataFrame({
        "node_id": ids.to_numpy()[node_row],
        **_location_columns(nodes, node_row),
        "level": pd.arrays.IntegerArray(np.where(known_lv, lv, 0).astype(np.int64), ~known_lv),
        "degree": ends[node_row],
        "flow_pattern": pattern,
        "parent_segment": seg_id[p],
        "parent_by": parent_by,
        "daughter_segments": daughter_text,
        "radius_parent_um": r0,
        "radius_daughter1_um": r1,
        "radius_daughter2_um": r2,
        "radius_parent_u_um": u0,
        "radius_daughter1_u_um": u1,
        "radius_daughter2_u_um": u2,
        "murray_ratio": ratio,
        "murray_ratio_u": ratio_u,
        "murray_exponent": expo,
        "murray_exponent_u": expo_u,
        "asymmetry": r2 / r1,
        "area_ratio": area,
        "angle_daughter1_deg": a1,
        "angle_daughter2_deg": a2,
        "angle_between_daughters_deg": between,
        "out_of_plane_deg": oop,
        "angle_optimal_daughter1_deg": o1,
        "angle_optimal_daughter2_deg": o2,
        "angle_deviation_deg": dev,
        "angle_deviation_u_deg": dev_u,
        "flow_split_daughter1": split,
        "flow_split_cube_law": cube,
        "wss_ratio_daughter1": w1,
        "wss_ratio_daughter2": w2,
        "low_confidence": low_conf,
        "confidence_notes": notes,
        "uncertain": uncertain,
        "uncertain_reasons": _code_strings(why, UNCERTAIN_CODES),
        "flagged": hits.any(axis=1),
        "flag_reasons": _code_strings(hits, REASON_CODES),
        "severity": severity,
    })
    return _typed(table)
