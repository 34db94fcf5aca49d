"""The network as the flow solve sees it: checked tables, boundary nodes, pieces, and the core that can carry flow.

In: the segments and nodes tables, known inlets, outlets and inflows, the flow config. Out: a
:class:`_Network`: node rows, prescribed pressures and flows, open ends, connected pieces and which
can be solved, dead-end parts, and the core segments and nodes the solve works on; the unit
conversions (SI inside the solve).
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.sparse import csgraph

from .._checks import segment_end_rows
from ..errors import InputError
from .linear import _wsum


UM = 1e-6  # m per µm
MPA_S = 1e-3  # Pa·s per mPa·s
NL_MIN_PER_M3_S = 1e12 * 60.0  # (nL/min) per (m³/s)
PA_S_UM3_PER_PA_S_M3 = 1e-18  # (Pa·s/µm³) per (Pa·s/m³)


def _positive(df: pd.DataFrame, col: str) -> np.ndarray:
    x = df[col].to_numpy(dtype=float)
    bad = ~(np.isfinite(x) & (x > 0))
    if bad.any():
        k = int(np.flatnonzero(bad)[0])
        raise InputError(
            f"segments: {col} must be finite and > 0; {int(bad.sum())} value(s) are not "
            f"(first: segment_id {int(df['segment_id'].iloc[k])}, value {x[k]!r})"
        )
    return x


def _node_rows(ids: pd.Index, values: Iterable[int], what: str) -> np.ndarray:
    vals = np.asarray([int(x) for x in values], dtype=np.int64)
    rows = ids.get_indexer(vals) if len(vals) else np.zeros(0, dtype=np.int64)
    if (rows < 0).any():
        raise InputError(f"{what}: node id {int(vals[rows < 0][0])} does not exist in the nodes table")
    return np.unique(rows)


def _ranges(starts: np.ndarray, stops: np.ndarray) -> np.ndarray:
    """Concatenation of ``arange(a, b)`` for every pair (vectorised)."""
    lengths = stops - starts
    total = int(lengths.sum())
    if total == 0:
        return np.zeros(0, dtype=np.int64)
    offsets = np.repeat(starts - np.r_[0, np.cumsum(lengths)[:-1]], lengths)
    return offsets + np.arange(total)


def _dead_ends(u: np.ndarray, v: np.ndarray, active: np.ndarray, anchored: np.ndarray) -> np.ndarray:
    """Active segments removed by repeatedly stripping leaves that are not anchored.

    Parameters
    ----------
    u, v : (S,) int ndarray
        End-node rows.
    active : (S,) bool ndarray
        Segments taking part (self-loops must be excluded).
    anchored : (N,) bool ndarray
        Nodes with a pressure condition; never stripped.

    Returns
    -------
    (S,) bool ndarray
    """
    n_nodes = len(anchored)
    seg = np.flatnonzero(active)
    end_node = np.concatenate([u[seg], v[seg]])
    end_seg = np.concatenate([seg, seg])
    order = np.argsort(end_node, kind="stable")
    inc = end_seg[order]
    indptr = np.r_[0, np.cumsum(np.bincount(end_node, minlength=n_nodes))]
    deg = np.diff(indptr).astype(np.int64)
    alive = active.copy()
    dead = np.zeros(len(u), dtype=bool)
    frontier = np.flatnonzero((deg == 1) & ~anchored)
    while frontier.size:
        s = inc[_ranges(indptr[frontier], indptr[frontier + 1])]
        s = np.unique(s[alive[s]])
        if not s.size:
            break
        alive[s] = False
        dead[s] = True
        np.subtract.at(deg, u[s], 1)
        np.subtract.at(deg, v[s], 1)
        cand = np.unique(np.concatenate([u[s], v[s]]))
        frontier = cand[(deg[cand] == 1) & ~anchored[cand]]
    return dead


# ---------------------------------------------------------------------------
# main entry
# ---------------------------------------------------------------------------

@dataclass
class _Network:
    """The network as the solve sees it: node rows, boundary conditions, pieces and the core that can carry flow.

    Arrays over segments are (S,), over nodes (N,); node rows index ``ids``.
    """

    ids: pd.Index
    seg_id: np.ndarray
    u: np.ndarray
    v: np.ndarray
    length_um: np.ndarray
    radius_um: np.ndarray
    rh: np.ndarray  # hydraulic radius, µm (the radius where the table has none)
    kind: np.ndarray
    ends: np.ndarray  # segment ends at each node
    estimate: bool
    is_inlet: np.ndarray
    out_mask: np.ndarray
    fixed: np.ndarray  # inlets and outlets: a pressure condition
    open_node: np.ndarray  # ends whose pressure and flow are estimated
    known_q: np.ndarray  # prescribed inflow, m³/s (NaN where none)
    known_p: np.ndarray  # prescribed pressure, Pa (NaN where none)
    anchor: np.ndarray
    n_comp: int
    comp: np.ndarray
    comp_in: np.ndarray | None  # pieces with an inlet (fixed pressures only)
    solved_node: np.ndarray
    flowing_node: np.ndarray
    n_unsolved: int
    dead: np.ndarray  # segments of dead-end parts
    core: np.ndarray  # segments that can carry flow
    core_node: np.ndarray

    @property
    def n_nodes(self) -> int:
        return len(self.ids)

    @property
    def length_m(self) -> np.ndarray:
        return self.length_um * UM

    def conductance(self, mu_mpa_s: np.ndarray) -> np.ndarray:
        """``pi r_h^4 / (8 mu L)`` per segment, m³/(Pa·s)."""
        return math.pi * (self.rh * UM) ** 4 / (8.0 * mu_mpa_s * MPA_S * self.length_m)

    def net_out(self, q: np.ndarray) -> np.ndarray:
        """Flow leaving each node into its segments."""
        return _wsum(self.u, q, self.n_nodes) - _wsum(self.v, q, self.n_nodes)


def _check_tables(segments: pd.DataFrame, nodes: pd.DataFrame) -> None:
    for name, df, cols in (
        ("segments", segments, ("segment_id", "node_from", "node_to", "length_um", "radius_um")),
        ("nodes", nodes, ("node_id", "kind")),
    ):
        if not isinstance(df, pd.DataFrame):
            raise InputError(f"{name}: expected a pandas DataFrame, got {type(df).__name__}")
        missing = [c for c in cols if c not in df.columns]
        if missing:
            raise InputError(f"{name}: missing column(s) {', '.join(missing)}")


def _hydraulic_radius(segments: pd.DataFrame, radius_um: np.ndarray, seg_id: np.ndarray) -> np.ndarray:
    if "radius_hydraulic_um" not in segments.columns:
        return radius_um
    rh = segments["radius_hydraulic_um"].to_numpy(dtype=float)
    rh = np.where(np.isnan(rh), radius_um, rh)
    if not (np.isfinite(rh) & (rh > 0)).all():
        k = int(np.flatnonzero(~(np.isfinite(rh) & (rh > 0)))[0])
        raise InputError(
            f"segments: radius_hydraulic_um must be finite and > 0 (segment_id {int(seg_id[k])}, "
            f"value {rh[k]!r})"
        )
    return rh


def _boundary_nodes(ids, kind, inlets, outlets, boundary_flows, cfg, estimate):
    """Inlets, outlets and prescribed inflows as node masks; open ends by the node kinds."""
    n_nodes = len(ids)
    inlet_rows = _node_rows(ids, inlets, "inlets")
    if inlet_rows.size == 0 and not estimate:
        raise InputError("inlets: at least one inlet node is needed")
    is_inlet = np.zeros(n_nodes, dtype=bool)
    is_inlet[inlet_rows] = True
    open_kind = kind == "border"
    if cfg["blind_ends"] == "outlet" or (cfg["blind_ends"] == "open" and not estimate):
        open_kind |= kind == "blind"
    if outlets is None:
        out_mask = open_kind & ~is_inlet if not estimate else np.zeros(n_nodes, dtype=bool)
    else:
        out_rows = _node_rows(ids, outlets, "outlets")
        out_mask = np.zeros(n_nodes, dtype=bool)
        out_mask[out_rows] = True
        both = out_mask & is_inlet
        if both.any():
            raise InputError(f"outlets: node id {int(ids[np.flatnonzero(both)[0]])} is also an inlet")
    known_q = np.full(n_nodes, np.nan)
    if boundary_flows:
        q_rows = _node_rows(ids, list(boundary_flows), "boundary_flows")
        q_vals = np.array([float(boundary_flows[k]) for k in boundary_flows], dtype=float)
        if not np.isfinite(q_vals).all():
            raise InputError("boundary_flows: expected finite flows in nL/min")
        clash = is_inlet[q_rows] | out_mask[q_rows]
        if clash.any():
            raise InputError(f"boundary_flows: node id {int(ids[q_rows[clash][0]])} also has a pressure condition")
        known_q[ids.get_indexer(np.asarray(list(boundary_flows), dtype=np.int64))] = q_vals / NL_MIN_PER_M3_S
    return is_inlet, out_mask, open_kind, known_q


def _network(segments, nodes, inlets, outlets, boundary_flows, cfg, warn) -> _Network:
    """Checked tables -> :class:`_Network`; remarks on pieces that cannot be solved go to ``warn``."""
    _check_tables(segments, nodes)
    ids, seg_id, u, v = segment_end_rows(segments, nodes)
    length_um = _positive(segments, "length_um")
    radius_um = _positive(segments, "radius_um")
    rh = _hydraulic_radius(segments, radius_um, seg_id)
    n_nodes = len(ids)
    kind = nodes["kind"].astype(str).to_numpy()
    ends = np.bincount(u, minlength=n_nodes) + np.bincount(v, minlength=n_nodes)
    estimate = cfg["boundary"] == "estimate"
    is_inlet, out_mask, open_kind, known_q = _boundary_nodes(ids, kind, inlets, outlets, boundary_flows, cfg,
                                                             estimate)
    fixed = is_inlet | out_mask
    # open ends: cut by the volume, pressure and flow unknown (estimated)
    open_node = open_kind & ~fixed & np.isnan(known_q) if estimate else np.zeros(n_nodes, dtype=bool)
    anchor = fixed | open_node | np.isfinite(known_q)
    loop = u == v

    # Components and which of them can be solved.
    if n_nodes:
        link = ~loop
        adj = sparse.coo_matrix((np.ones(int(link.sum())), (u[link], v[link])), shape=(n_nodes, n_nodes))
        n_comp, comp = csgraph.connected_components(adj, directed=False)
    else:
        n_comp, comp = 0, np.zeros(0, dtype=np.int64)
    comp_has_seg = np.bincount(comp[u], minlength=n_comp) > 0
    comp_in = None
    if estimate and cfg["blind_ends"] == "open" and n_nodes:
        # blind ends of a piece that reaches the border (or a given inlet or
        # outlet) are open: in a mask they are mostly vessels the
        # segmentation lost; pieces floating free stay unperfused
        reach = np.bincount(comp[open_node | fixed], minlength=n_comp) > 0
        extra = (kind == "blind") & ~fixed & np.isnan(known_q) & reach[comp]
        open_node = open_node | extra
        anchor = anchor | extra
    if estimate:
        # a piece is solved when it has an open end or a known pressure; it
        # can carry flow when it has two boundary nodes
        n_anchor = np.bincount(comp[anchor], minlength=n_comp)
        comp_fixed = (np.bincount(comp[open_node | fixed], minlength=n_comp) > 0)
        comp_flow = comp_fixed & (n_anchor >= 2)
        solved_node = comp_fixed[comp] if n_nodes else np.zeros(0, dtype=bool)
        flowing_node = comp_flow[comp] if n_nodes else np.zeros(0, dtype=bool)
        n_unsolved = int((comp_has_seg & ~comp_fixed).sum())
        if n_unsolved:
            n_us = int((~solved_node[u]).sum())
            warn.append(
                f"flow: {n_unsolved} connected piece(s) ({n_us} segment(s)) touch neither the volume border "
                "nor a given inlet or outlet; not perfused"
            )
    else:
        comp_in = np.bincount(comp[is_inlet], minlength=n_comp) > 0
        comp_out = np.bincount(comp[out_mask], minlength=n_comp) > 0
        comp_fixed = comp_in | comp_out
        solved_node = comp_fixed[comp] if n_nodes else np.zeros(0, dtype=bool)
        flowing_node = (comp_in & comp_out)[comp] if n_nodes else np.zeros(0, dtype=bool)
        n_unsolved = int((comp_has_seg & ~comp_fixed).sum())
        if n_unsolved:
            n_us = int((~solved_node[u]).sum())
            warn.append(
                f"flow: {n_unsolved} connected piece(s) ({n_us} segment(s)) have no inlet or outlet; not solved"
            )
        no_out = comp_has_seg & comp_in & ~comp_out
        if no_out.any():
            warn.append(f"flow: {int(no_out.sum())} piece(s) with an inlet have no outlet; they carry no flow")

    # Segments that can carry flow: in a piece with two boundary nodes, not a
    # self-loop, not in a dead-end part.
    candidate = ~loop & flowing_node[u]
    dead = _dead_ends(u, v, candidate, anchor)
    core = candidate & ~dead
    core_deg = np.bincount(u[core], minlength=n_nodes) + np.bincount(v[core], minlength=n_nodes)
    core_node = flowing_node & (anchor | (core_deg > 0))
    known_p = np.full(n_nodes, np.nan)
    known_p[is_inlet] = cfg["inlet_pressure_pa"]
    known_p[out_mask] = cfg["outlet_pressure_pa"]
    return _Network(ids=ids, seg_id=seg_id, u=u, v=v, length_um=length_um, radius_um=radius_um, rh=rh, kind=kind,
                    ends=ends, estimate=estimate, is_inlet=is_inlet, out_mask=out_mask, fixed=fixed,
                    open_node=open_node, known_q=known_q, known_p=known_p, anchor=anchor, n_comp=n_comp, comp=comp,
                    comp_in=comp_in, solved_node=solved_node, flowing_node=flowing_node, n_unsolved=n_unsolved,
                    dead=dead, core=core, core_node=core_node)
