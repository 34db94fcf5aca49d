"""Steady network flow: the solve and the derived measures.

In: the segments and nodes tables, known inlets and outlets, the flow config. Out: a
:class:`FlowResult`: per-segment flow, pressures, speed, wall shear stress, haematocrit and flow
intervals, per-node pressures and roles, the summary and warnings (see :mod:`pipeline.flow`).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
from scipy import sparse
from scipy.sparse import csgraph

from .._parallel import thread_map
from ..config import step_options
from ..errors import InputError
from .boundary import estimate_pressures
from .linear import _assemble, _nearly_tree, _solve_linear, _wsum
from .network import MPA_S, NL_MIN_PER_M3_S, PA_S_UM3_PER_PA_S_M3, UM, _Network, _network
from .plausibility import class_statistics, plausibility_warnings
from .rheology import iterate_rheology
from .viscosity import segment_viscosity_mpa_s

# Solves without progress after which the haematocrit iteration stops (not
# converged), for networks where it cycles. 10 stopped a 531-segment bed of
# 2-8 µm vessels at z 3 four solves before it converged (an Anderson
# restart after a jump had reset its progress); with 15 it converges
# (measured).
_STALL_WINDOW = 15

SEGMENT_COLUMNS = [
    "flow_nl_min",
    "pressure_from_pa",
    "pressure_to_pa",
    "velocity_mm_s",
    "velocity_peak_mm_s",
    "shear_rate_s",
    "wss_pa",
    "reynolds",
    "transit_time_s",
    "resistance_pa_s_um3",
    "viscosity_mpa_s",
    "perfused",
]
PASS_THROUGH = ("level", "strahler", "strahler_diameter")


@dataclass
class FlowResult:
    """Result of :func:`solve_flow`.

    Attributes
    ----------
    segments : DataFrame, shape (S, ...)
        ``segment_id`` in the input order, then ``level``, ``strahler``,
        ``strahler_diameter`` when the input has them, then
        ``flow_nl_min`` (signed, positive from ``node_from`` to
        ``node_to``), ``pressure_from_pa``, ``pressure_to_pa`` (NaN in
        unsolved components), ``velocity_mm_s`` (mean speed, >= 0),
        ``velocity_peak_mm_s``, ``shear_rate_s`` (1/s), ``wss_pa``,
        ``reynolds``, ``transit_time_s`` (NaN where the flow is 0),
        ``resistance_pa_s_um3``, ``viscosity_mpa_s``, ``perfused`` (bool).
    nodes : DataFrame, shape (N, 4)
        ``node_id``, ``pressure_pa`` (NaN in unsolved components),
        ``role`` ('inlet', 'outlet', 'sealed', 'internal'),
        ``inflow_nl_min`` (flow entering the network at the node: positive
        at inlets, negative at outlets, zero to rounding elsewhere).
    summary : dict
        ``total_inflow_nl_min``, ``network_resistance_pa_s_um3``
        (inlet-outlet pressure difference over total inflow; None without
        flow), ``perfused_length_fraction``, ``max_conservation_residual``
        (largest ``|net flow|`` at a node without a pressure condition,
        relative to the total inflow; None without flow), ``n_inlets``,
        ``n_outlets``, ``n_sealed``, ``n_segments``, ``n_perfused_segments``,
        ``n_unsolved_components``, ``n_unknowns``, ``boundary`` ('pressure'
        or 'flow'), ``inlet_pressure_pa``, ``outlet_pressure_pa``,
        ``viscosity_model``, ``solver`` ('direct', 'cg' or 'none'),
        ``solver_iterations`` (CG only, else None), ``solver_residual``
        (relative residual of the linear system).
    warnings : list of str
        Remarks for the run log (clamped diameters, unsolved components,
        components without an outlet, large residuals).
    """

    segments: pd.DataFrame
    nodes: pd.DataFrame
    summary: dict[str, Any]
    warnings: list[str] = field(default_factory=list)


# ---------------------------------------------------------------------------
# input
# ---------------------------------------------------------------------------

def _finite_or_none(x: float) -> float | None:
    return float(x) if math.isfinite(x) else None


class _Solver:
    """Solves of one network for given segment viscosities; ``info`` keeps the last one's pressures and bookkeeping."""

    def __init__(self, net: _Network, cfg: dict[str, Any]):
        self.net, self.cfg = net, cfg
        self.info: dict[str, Any] = {}
        self._held_x = None
        self._neumann_ok = None

    def once(self, mu_mpa_s: np.ndarray) -> np.ndarray:
        """Pressures and flows for given segment viscosities; flows, m³/s."""
        net = self.net
        conductance = net.conductance(mu_mpa_s)  # m³/(Pa·s)
        info: dict[str, Any] = {"conductance": conductance, "phi": None, "dp": float("nan")}
        if net.estimate:
            pressure = self._estimate(mu_mpa_s, conductance, info)
            dp_seg = np.nan_to_num(pressure[net.u]) - np.nan_to_num(pressure[net.v])
        else:
            pressure = self._potential(conductance, info)
            # from the potential: keeps small pressure drops exact
            dp_seg = info["dp"] * (np.nan_to_num(info["phi"][net.u]) - np.nan_to_num(info["phi"][net.v]))
        q = np.where(net.core, conductance * dp_seg, 0.0)
        info["pressure"] = pressure
        self.info = info
        return q

    def _estimate(self, mu_mpa_s, conductance, info):
        """Pressures by the boundary estimate of the cut network (Fry et al. 2012)."""
        net, cfg = self.net, self.cfg
        core = net.core
        est = estimate_pressures(
            net.u[core], net.v[core], conductance[core],
            radius_m=net.radius_um[core] * UM, length_m=net.length_m[core], n_nodes=net.n_nodes,
            open_node=net.open_node, known_pressure_pa=net.known_p, known_inflow_m3_s=net.known_q,
            target_pressure_pa=cfg["target_pressure_pa"], viscosity_pa_s=mu_mpa_s[core] * MPA_S,
            target_shear_rate_s=cfg["target_shear_rate_s"],
            pressure_dependent_target=cfg["target_shear_rate_by_pressure"],
            pressure_weight=cfg["pressure_weight"], max_iter=cfg["estimate_max_iter"],
        )
        info.update(notes=est.notes, method="direct", iterations=est.iterations, lin_res=0.0,
                    n_unknown=int(net.core_node.sum()), estimate=est)
        pressure = est.pressure_pa
        pressure[net.solved_node & ~net.core_node] = np.nan
        return pressure

    def _potential(self, conductance, info):
        """Pressures from the potential phi (1 at inlets, 0 at outlets) of the core's reduced system."""
        net, cfg = self.net, self.cfg
        n_nodes, u, v = net.n_nodes, net.u, net.v
        # dead-end parts and pieces without flow need no solve
        unknown = net.core_node & ~net.fixed
        unknown_index = np.full(n_nodes, -1, dtype=np.int64)
        unknown_index[unknown] = np.arange(int(unknown.sum()))
        A, b = _assemble(u, v, conductance, unknown_index, net.is_inlet.astype(float), net.core)
        n_unknown = A.shape[0]
        method = cfg["solver"]
        if method == "auto":
            method = "direct" if n_unknown <= cfg["cg_threshold_nodes"] or _nearly_tree(A) else "cg"
        x, iterations = _solve_linear(A, b, method=method, rtol=cfg["cg_rtol"], max_iter=cfg["cg_max_iter"])
        if n_unknown:
            bn = float(np.linalg.norm(b))
            lin_res = float(np.linalg.norm(b - A @ x) / bn) if bn > 0 else 0.0
        else:
            lin_res = 0.0
        notes = []
        if method == "cg" and lin_res > 10.0 * cfg["cg_rtol"]:
            notes.append(f"flow: CG true relative residual {lin_res:.2e} exceeds 10 × cg_rtol")
        phi = np.full(n_nodes, np.nan)
        if net.n_comp:
            # Pieces without an inlet-outlet pair have a constant potential.
            phi[net.solved_node] = net.comp_in[net.comp[net.solved_node]].astype(float)
        phi[net.is_inlet] = 1.0
        phi[net.out_mask] = 0.0
        phi[unknown] = x
        p_out = cfg["outlet_pressure_pa"]
        if cfg["inlet_flow_nl_min"] is None:
            dp = cfg["inlet_pressure_pa"] - p_out
        else:
            q_unit = np.where(net.core, conductance * (np.nan_to_num(phi[u]) - np.nan_to_num(phi[v])), 0.0)
            unit_inflow = float(net.net_out(q_unit)[net.is_inlet].sum())
            if not unit_inflow > 0:
                raise InputError(
                    "flow.inlet_flow_nl_min: a total inflow is prescribed but no inlet is connected to an outlet"
                )
            dp = cfg["inlet_flow_nl_min"] / NL_MIN_PER_M3_S / unit_inflow
        info.update(notes=notes, method=method, iterations=iterations, lin_res=lin_res, n_unknown=n_unknown,
                    phi=phi, dp=dp)
        return p_out + dp * phi

    def held(self, mu_mpa_s: np.ndarray, held: np.ndarray) -> np.ndarray:
        """Flows with the estimate's open ends held at its pressures and known inflows kept."""
        net, cfg = self.net, self.cfg
        n_nodes, u, v = net.n_nodes, net.u, net.v
        if self._neumann_ok is None:
            # Known inflows stay inflows in the held solves where their piece
            # has a held node besides (else its pressure level is free).
            held_comp = np.bincount(net.comp[net.core_node & (net.open_node | net.fixed)], minlength=net.n_comp) > 0
            self._neumann_ok = held_comp[net.comp] if net.n_comp else np.zeros(n_nodes, dtype=bool)
        conductance = net.conductance(mu_mpa_s)
        dirichlet = net.core_node & (net.open_node | net.fixed | (np.isfinite(net.known_q) & ~self._neumann_ok))
        unknown = net.core_node & ~dirichlet
        unknown_index = np.full(n_nodes, -1, dtype=np.int64)
        unknown_index[unknown] = np.arange(int(unknown.sum()))
        A, b = _assemble(u, v, conductance, unknown_index, np.nan_to_num(held), net.core)
        # A known inflow stays a known inflow (it leaves the node into its
        # segments): holding its node at the first estimate's pressure let
        # the flow drift with the viscosities, by 18 % on a cortex crop.
        kq = unknown & np.isfinite(net.known_q)
        b += _wsum(unknown_index[kq], net.known_q[kq], A.shape[0])
        method = cfg["solver"]
        if method == "auto":
            method = "direct" if A.shape[0] <= cfg["cg_threshold_nodes"] or _nearly_tree(A) else "cg"
        # Successive solves differ only by the viscosity update: CG from the
        # last pressures takes few iterations, where a direct solve would
        # refactorise every time.
        last = self._held_x
        if method == "direct" and A.shape[0] > 5000 and cfg["solver"] == "auto":
            method = "cg"
        x, _ = _solve_linear(A, b, method=method, rtol=cfg["cg_rtol"], max_iter=cfg["cg_max_iter"],
                             x0=last if last is not None and last.size == A.shape[0] else None)
        self._held_x = x
        pressure = held.copy()
        pressure[unknown] = x
        q = np.where(net.core, conductance * (np.nan_to_num(pressure[u]) - np.nan_to_num(pressure[v])), 0.0)
        self.info = dict(self.info, conductance=conductance, pressure=pressure)
        return q


def _flows(net: _Network, cfg: dict[str, Any], solver: _Solver, warn: list[str]):
    """Viscosity, then the solve, iterated with the haematocrit when asked; (q, mu, haematocrit, rheology)."""
    mu_mpa_s, vnotes = segment_viscosity_mpa_s(
        2.0 * net.rh,
        model=cfg["viscosity_model"],
        viscosity_mpa_s=cfg["viscosity_mpa_s"],
        haematocrit=cfg["haematocrit"],
        plasma_viscosity_mpa_s=cfg["plasma_viscosity_mpa_s"],
        min_valid_diameter_um=cfg["min_valid_diameter_um"],
    )
    warn += vnotes
    haematocrit = np.where(net.core, cfg["haematocrit"], np.nan)
    if not (cfg["haematocrit_model"] == "phase_separation" and cfg["viscosity_model"] == "pries1994"
            and net.core.any()):
        return solver.once(mu_mpa_s), mu_mpa_s, haematocrit, None

    def rheology(solve):
        return iterate_rheology(
            solve, net.u, net.v, 2.0 * net.rh, inflow_haematocrit=cfg["haematocrit"], n_nodes=net.n_nodes,
            plasma_viscosity_mpa_s=cfg["plasma_viscosity_mpa_s"],
            min_valid_diameter_um=cfg["min_valid_diameter_um"], damping=cfg["rheology_damping"],
            rtol=cfg["rheology_rtol"], max_iterations=cfg["rheology_max_iter"], stall_window=_STALL_WINDOW,
            # the flow of the perfusion floor in each segment (parks
            # stagnant segments that keep reversing; pipeline/flow/rheology.py)
            stagnant_flow=cfg["perfused_min_velocity_mm_s"] * 1e-3 * math.pi * (net.radius_um * UM) ** 2,
        )

    if net.estimate:
        # The estimate's KKT matrix depends on the viscosities; refactorising
        # it at every step of the haematocrit iteration would cost tens of
        # factorisations. Instead the end pressures are estimated with the
        # uniform haematocrit's viscosities and held while haematocrit and
        # viscosity converge (plain solves). A second estimate with the
        # converged viscosities moved capillary speeds by a few per cent
        # on the project's beds, for twice the time.
        solver.once(mu_mpa_s)
        held = solver.info["pressure"].copy()
        rheo = rheology(lambda mu_k: solver.held(mu_k, held))
    else:
        rheo = rheology(solver.once)
    if not rheo.converged:
        warn.append(f"flow: haematocrit and viscosity did not converge ({rheo.message})")
    if rheo.n_parked:
        warn.append(f"flow: {rheo.n_parked} stagnant segment(s) kept reversing in the haematocrit iteration "
                    "and are taken to carry no red cells (haematocrit empty)")
    return rheo.flow, rheo.viscosity_mpa_s, np.where(net.core, rheo.haematocrit, np.nan), rheo


def _fill_pressures(net: _Network, cfg: dict[str, Any], pressure: np.ndarray) -> None:
    """Pressures of the nodes off the core, in place."""
    hang = net.flowing_node & ~net.core_node
    if hang.any():
        # Each dead-end part hangs from exactly one core node and shares its
        # pressure (no flow, no pressure drop).
        dead = net.dead
        link = sparse.coo_matrix(
            (np.ones(int(dead.sum())), (net.u[dead], net.v[dead])), shape=(net.n_nodes, net.n_nodes)
        )
        _, part = csgraph.connected_components(link, directed=False)
        part_p = np.full(int(part.max()) + 1, np.nan)
        part_p[part[net.core_node]] = pressure[net.core_node]
        pressure[hang] = part_p[part[hang]]
    if net.estimate:
        # a piece with a single boundary node, or open ends only through
        # dead-end parts, carries no flow: it sits at the target pressure
        pressure[net.solved_node & np.isnan(pressure)] = cfg["target_pressure_pa"]


def _rheology_summary(cfg, rheo) -> dict[str, Any]:
    return {
        "haematocrit_model": cfg["haematocrit_model"] if rheo is not None else "uniform",
        "rheology_iterations": rheo.iterations if rheo is not None else None,
        "rheology_converged": rheo.converged if rheo is not None else None,
        "rheology_flow_change": _last(rheo.flow_change) if rheo is not None else None,
        "rheology_haematocrit_change": _last(rheo.haematocrit_change) if rheo is not None else None,
        "red_cell_conservation_residual": _last(rheo.red_cell_residual) if rheo is not None else None,
        "rheology_parked_segments": rheo.n_parked if rheo is not None else None,
    }


def _segment_columns(net, cfg, segments, q, pressure, mu_mpa_s, haematocrit, perfused, conductance):
    """The segments table of the result but for the ensemble's columns (robust radius for the local measures)."""
    r_m = net.radius_um * UM
    mu = mu_mpa_s * MPA_S
    aq = np.abs(q)
    speed = aq / (math.pi * r_m**2)  # m/s
    shear = 4.0 * aq / (math.pi * r_m**3)  # 1/s
    with np.errstate(divide="ignore", invalid="ignore"):
        transit = np.where(perfused, net.length_m / np.where(perfused, speed, 1.0), np.nan)
    out = pd.DataFrame({"segment_id": net.seg_id})
    for col in PASS_THROUGH:
        if col in segments.columns:
            out[col] = segments[col].array  # keeps nullable Int64 with <NA>
    out["flow_nl_min"] = q * NL_MIN_PER_M3_S
    out["pressure_from_pa"] = pressure[net.u]
    out["pressure_to_pa"] = pressure[net.v]
    out["velocity_mm_s"] = speed * 1e3
    out["velocity_peak_mm_s"] = 2.0 * speed * 1e3
    out["shear_rate_s"] = shear
    out["wss_pa"] = mu * shear
    out["reynolds"] = cfg["blood_density_kg_m3"] * speed * 2.0 * r_m / mu
    out["transit_time_s"] = transit
    out["resistance_pa_s_um3"] = 1.0 / conductance * PA_S_UM3_PER_PA_S_M3  # from Pa·s/m³
    out["viscosity_mpa_s"] = mu_mpa_s
    out["haematocrit"] = haematocrit
    out["perfused"] = perfused
    return out


def solve_flow(
    segments: pd.DataFrame,
    nodes: pd.DataFrame,
    *,
    inlets: Iterable[int] = (),
    outlets: Iterable[int] | None = None,
    boundary_flows: Mapping[int, float] | None = None,
    boundary: str = "estimate",
    viscosity_model: str = "pries1994",
    viscosity_mpa_s: float = 3.5,
    haematocrit: float = 0.45,
    haematocrit_model: str = "phase_separation",
    plasma_viscosity_mpa_s: float = 1.2,
    inlet_pressure_pa: float = 7999.32,
    outlet_pressure_pa: float = 2666.44,
    inlet_flow_nl_min: float | None = None,
    blind_ends: str = "open",
    target_pressure_pa: float = 3999.66,
    target_shear_rate_s: float = 500.0,
    target_shear_rate_by_pressure: bool = False,
    pressure_weight: float = 0.1,
    estimate_max_iter: int = 100,
    perfused_min_velocity_mm_s: float = 0.01,
    ensemble_size: int = 16,
    ensemble_seed: int = 0,
    radius_uncertainty_floor: float = 0.05,
    target_spread: float = 0.3,
    capillary_max_diameter_um: float = 8.0,
    small_vessel_max_diameter_um: float = 30.0,
    rheology_damping: float = 0.5,
    rheology_rtol: float = 1e-4,
    rheology_max_iter: int = 50,
    blood_density_kg_m3: float = 1055.0,
    solver: str = "auto",
    cg_threshold_nodes: int = 50000,
    cg_rtol: float = 1e-10,
    cg_max_iter: int = 20000,
    min_valid_diameter_um: float = 3.3,
    config: Mapping[str, Any] | None = None,
) -> FlowResult:
    """Steady Hagen–Poiseuille flow in a vessel network.

    Parameters
    ----------
    segments : DataFrame, shape (S, ...)
        ``segment_id``, ``node_from``, ``node_to``, ``length_um`` (> 0),
        ``radius_um`` (> 0), optionally ``radius_hydraulic_um`` (used for the
        resistance; NaN or missing falls back to ``radius_um``) and
        ``level``/``strahler``/``strahler_diameter`` (copied to the result).
    nodes : DataFrame, shape (N, ...)
        ``node_id`` and ``kind`` ('junction', 'blind', 'border', 'loop').
    inlets : iterable of int, keyword-only
        Inlet node ids (at least one).
    outlets : iterable of int or None, keyword-only
        Outlet node ids; None takes the border ends (and the blind ends with
        ``blind_ends: outlet``) that are not inlets.
    boundary, viscosity_model, ..., min_valid_diameter_um : keyword-only
        The options of the ``flow`` section of the config, with its defaults
        and meanings (``configs/default.yaml`` explains each);
        ``pipeline.analyze`` passes the validated section as
        ``**config['flow']`` without ``enabled``.
    config : mapping or None, keyword-only
        Deprecated (a DeprecationWarning): a full config or its ``flow``
        section, as earlier versions took the options.

    Returns
    -------
    FlowResult

    Raises
    ------
    InputError
        Missing columns, invalid lengths or radii, unknown or no inlets, a
        node both inlet and outlet, or a prescribed inflow with no inlet
        connected to an outlet.
    ConfigError
        Invalid ``flow`` options.
    SolverError
        The linear solve failed or did not converge.
    """
    cfg = step_options("flow", locals(), config=config, caller="solve_flow")
    warn: list[str] = []
    net = _network(segments, nodes, inlets, outlets, boundary_flows, cfg, warn)
    solver = _Solver(net, cfg)
    q, mu_mpa_s, haematocrit, rheo = _flows(net, cfg, solver, warn)
    info = solver.info
    warn += info["notes"]
    pressure = info["pressure"]
    _fill_pressures(net, cfg, pressure)
    u, v, estimate = net.u, net.v, net.estimate
    node_net = net.net_out(q)
    # A segment counts as perfused when its mean speed reaches the floor:
    # below it the model's flow is rounding or a stalled vessel, and its
    # transit time would be meaningless.
    r_m = net.radius_um * UM
    floor_m_s = cfg["perfused_min_velocity_mm_s"] * 1e-3
    perfused = net.core & (np.abs(q) / (math.pi * r_m ** 2) >= floor_m_s)
    roles = _node_roles(net, cfg, q, node_net, pressure, info["dp"])

    out = _segment_columns(net, cfg, segments, q, pressure, mu_mpa_s, haematocrit, perfused, info["conductance"])
    p05, p95, conf = _ensemble(
        cfg, segments, q, perfused, net.core, net.radius_um, net.rh, net.length_m, mu_mpa_s, u, v, info,
        solver.once, estimate,
    )
    out["flow_p05_nl_min"] = p05
    out["flow_p95_nl_min"] = p95
    out["direction_confidence"] = conf

    node_out = pd.DataFrame({
        "node_id": net.ids.to_numpy(),
        "pressure_pa": pressure,
        "role": roles.role.astype(str),
        "inflow_nl_min": np.where(net.solved_node, node_net, 0.0) * NL_MIN_PER_M3_S,
    })
    summary = _flow_summary(net, cfg, info, roles, node_net, perfused, rheo, warn)
    summary.update(class_statistics(
        2.0 * net.radius_um, out["velocity_mm_s"].to_numpy(), out["wss_pa"].to_numpy(), perfused, net.length_um,
        capillary_max_um=cfg["capillary_max_diameter_um"], small_max_um=cfg["small_vessel_max_diameter_um"],
    ))
    warn += plausibility_warnings(summary)
    return FlowResult(segments=out, nodes=node_out, summary=summary, warnings=warn)


@dataclass
class _Roles:
    """What each node of a solved network is, and the boundary pressures that follow."""

    is_inlet: np.ndarray  # (N,) bool
    out_mask: np.ndarray  # (N,) bool
    fixed: np.ndarray  # (N,) bool: inlet or outlet
    role: np.ndarray  # (N,) object: 'inlet', 'outlet', 'sealed' or 'internal'
    p_out: float  # mean outlet pressure, Pa (NaN without outlets)
    dp: float  # mean inlet less mean outlet pressure, Pa
    inflow: float  # total inflow, m^3/s


def _node_roles(net, cfg, q, node_net, pressure, dp):
    """Inlets, outlets and sealed ends of the solved network (:class:`_Roles`).

    ``dp`` is the solve's pressure drop; with the estimate, the open ends
    are inlets or outlets by the sign of their net flow, and the mean
    pressures at them give the drop instead.
    """
    p_out = float("nan") if net.estimate else cfg["outlet_pressure_pa"]
    is_inlet, out_mask, fixed = net.is_inlet, net.out_mask, net.fixed
    if net.estimate:
        # open ends are inlets or outlets by the estimated flow
        tiny = 1e-9 * (float(np.abs(q).max()) if q.size else 0.0)
        is_inlet = is_inlet | (net.open_node & (node_net > tiny))
        out_mask = out_mask | (net.open_node & (node_net < -tiny))
        fixed = is_inlet | out_mask
        p_in = float(pressure[is_inlet].mean()) if is_inlet.any() else float("nan")
        p_out = float(pressure[out_mask].mean()) if out_mask.any() else float("nan")
        dp = p_in - p_out
    kind = net.kind
    role = np.full(net.n_nodes, "internal", dtype=object)
    role[((kind == "blind") | (kind == "border") | (net.ends <= 1)) & ~fixed] = "sealed"
    role[out_mask] = "outlet"
    role[is_inlet] = "inlet"
    return _Roles(is_inlet=is_inlet, out_mask=out_mask, fixed=fixed, role=role, p_out=p_out, dp=dp,
                  inflow=float(node_net[is_inlet].sum()))


def _flow_summary(net, cfg, info, roles, node_net, perfused, rheo, warn):
    """The flow step's summary keys but the class statistics; a large conservation residual warns in ``warn``."""
    inflow, dp, p_out = roles.inflow, roles.dp, roles.p_out
    interior = net.solved_node & ~roles.fixed
    if inflow > 0:
        residual = float(np.abs(node_net[interior]).max() / inflow) if interior.any() else 0.0
        net_r = dp / inflow * PA_S_UM3_PER_PA_S_M3 if math.isfinite(dp) else None
    else:
        residual, net_r = None, None
    if residual is not None and residual > 1e-6:
        warn.append(f"flow: largest relative conservation residual {residual:.2e} at a node")
    length_um = net.length_um
    total_len = float(length_um.sum())
    n_unknown = info["n_unknown"]
    return {
        "total_inflow_nl_min": inflow * NL_MIN_PER_M3_S,
        "network_resistance_pa_s_um3": net_r,
        "perfused_length_fraction": float(length_um[perfused].sum() / total_len) if total_len > 0 else 0.0,
        "max_conservation_residual": residual,
        "n_inlets": int(roles.is_inlet.sum()),
        "n_outlets": int(roles.out_mask.sum()),
        "n_sealed": int((roles.role == "sealed").sum()),
        "n_segments": int(len(net.seg_id)),
        "n_perfused_segments": int(perfused.sum()),
        "n_unsolved_components": net.n_unsolved,
        "n_unknowns": int(n_unknown),
        "boundary": "estimate" if net.estimate else ("pressure" if cfg["inlet_flow_nl_min"] is None else "flow"),
        "inlet_pressure_pa": _finite_or_none(p_out + dp),
        "outlet_pressure_pa": _finite_or_none(p_out),
        "viscosity_model": cfg["viscosity_model"],
        "solver": info["method"] if n_unknown else "none",
        "solver_iterations": info["iterations"],
        "solver_residual": info["lin_res"],
        **_rheology_summary(cfg, rheo),
    }


def _ensemble(cfg, segments, q, perfused, core, radius_um, rh, length_m, mu_mpa_s, u, v, info, solve_once,
              estimate):
    """Per-segment flow interval and direction confidence from a small ensemble.

    Members perturb every segment's radius by its measured uncertainty
    (:func:`pipeline.measures.radius_uncertainty` from ``radius_sd_um`` and
    ``radius_n_points``, combined with a floor of ``radius_uncertainty_floor``
    of the radius for the systematic error of the wall fit) as a lognormal
    factor, and, with estimated boundary conditions, scale the target shear
    rate by a lognormal factor of log-sd ``target_spread`` for the whole
    network times one of half that per segment (the spread of plausible
    boundary conditions). Viscosities stay at the converged values. With the
    estimate every member reuses its factorisation (refinement, directions
    kept); with fixed pressures every member is a plain solve.

    Returns
    -------
    p05, p95 : (S,) float ndarray
        5th and 95th percentiles of the signed flow, nL/min (NaN where not
        perfused or without an ensemble).
    confidence : (S,) float ndarray
        Share of members whose flow has the sign of the estimate (NaN where
        not perfused or without an ensemble).
    """
    n_seg = len(q)
    k = int(cfg["ensemble_size"])
    nan = np.full(n_seg, np.nan)
    if k == 0 or not perfused.any():
        return nan, nan.copy(), nan.copy()
    from ..measures import radius_uncertainty

    sd = segments["radius_sd_um"].to_numpy(dtype=float) if "radius_sd_um" in segments.columns else np.zeros(n_seg)
    npts = (segments["radius_n_points"].to_numpy(dtype=float) if "radius_n_points" in segments.columns
            else np.ones(n_seg))
    with np.errstate(invalid="ignore", divide="ignore"):
        step = length_m / UM / np.maximum(npts - 1.0, 1.0)
    u_r = radius_uncertainty(radius_um, sd, npts, step_um=step)
    rel = np.sqrt((u_r / radius_um) ** 2 + cfg["radius_uncertainty_floor"] ** 2)
    rng = np.random.default_rng(cfg["ensemble_seed"])
    mu = mu_mpa_s * MPA_S
    members = np.empty((k, n_seg))
    est = info.get("estimate")
    # Every member's random numbers are drawn first, in member order, so the
    # members are the same however they are run.
    draws = []
    for _ in range(k):
        f = np.exp(rng.normal(0.0, rel))
        scale = None
        if estimate:
            scale = np.exp(rng.normal(0.0, cfg["target_spread"])) * np.exp(
                rng.normal(0.0, 0.5 * cfg["target_spread"], int(core.sum())))
        draws.append((f, scale))

    def member(i):
        f, scale = draws[i]
        r_k, rh_k = radius_um * f, rh * f
        cond_k = math.pi * (rh_k * UM) ** 4 / (8.0 * mu * length_m)
        p_k = est.resolve(cond_k[core], r_k[core] * UM, mu[core], scale)
        members[i] = np.where(core, cond_k * (np.nan_to_num(p_k[u]) - np.nan_to_num(p_k[v])), 0.0)

    if estimate:
        # Members with the estimate share its factorisation read-only and
        # spend most of their time in its triangular solves, which release
        # the GIL: they run side by side on the cores there are.
        thread_map(member, range(k))
    else:
        for i, (f, _) in enumerate(draws):
            members[i] = solve_once(mu_mpa_s / f**4)  # the same conductances as radii r f
    members *= NL_MIN_PER_M3_S
    p05 = np.where(perfused, np.percentile(members, 5, axis=0), np.nan)
    p95 = np.where(perfused, np.percentile(members, 95, axis=0), np.nan)
    conf = np.where(perfused, (np.sign(members) == np.sign(q)).mean(axis=0), np.nan)
    return p05, p95, conf


def _last(values) -> float | None:
    return float(values[-1]) if len(values) and math.isfinite(values[-1]) else None
