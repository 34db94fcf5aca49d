"""Network flow: Poiseuille networks with closed-form answers, viscosity laws,
boundary conditions and solver paths.

Graphs are built directly as ``segments``/``nodes`` tables. Unless a test
says otherwise the viscosity is constant (3.5 mPa·s) and the direct solver
is used; all checks are against closed forms or independent code.
"""

import math

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from pipeline.errors import ConfigError, InputError, SolverError
from pipeline.flow import (
    NL_MIN_PER_M3_S,
    relative_viscosity_vitro,
    relative_viscosity_vivo,
    solve_flow,
)
from pipeline.levels import assign_levels

MU = 3.5e-3  # Pa·s, the default constant viscosity
P_IN, P_OUT = 8000.0, 2000.0


def tables(edges, kinds=None):
    """Tables from ``edges`` [(u, v, length_um, radius_um)]; kinds by degree unless given."""
    segs = pd.DataFrame(
        [{"segment_id": i, "node_from": u, "node_to": v, "length_um": float(L), "radius_um": float(r),
          "radius_hydraulic_um": float(r)} for i, (u, v, L, r) in enumerate(edges)]
    )
    ids = sorted({e[0] for e in edges} | {e[1] for e in edges} | set(kinds or {}))
    deg = dict.fromkeys(ids, 0)
    for u, v, *_ in edges:
        deg[u] += 1
        deg[v] += 1
    kind = {n: ("blind" if deg[n] == 1 else "junction") for n in ids}
    kind.update(kinds or {})
    nodes = pd.DataFrame({"node_id": ids, "kind": [kind[n] for n in ids], "degree": [deg[n] for n in ids]})
    return segs, nodes


def cfg(**flow):
    # the fixed-pressure mode with constant viscosity, where closed forms hold
    base = {"inlet_pressure_pa": P_IN, "outlet_pressure_pa": P_OUT, "solver": "direct", "boundary": "pressure",
            "viscosity_model": "constant", "blind_ends": "sealed"}
    base.update(flow)
    return base


def poiseuille_r(length_um, radius_um, mu=MU):
    """Hagen–Poiseuille resistance 8 mu L / (pi r^4), Pa·s/m³."""
    return 8 * mu * length_um * 1e-6 / (math.pi * (radius_um * 1e-6) ** 4)


# --- closed forms -----------------------------------------------------------

@pytest.mark.parametrize("length_um, radius_um", [(100.0, 5.0), (37.0, 2.5), (2000.0, 60.0)])
def test_single_tube_hagen_poiseuille(length_um, radius_um):
    # Hagen–Poiseuille (any fluid-mechanics text): Q = pi r^4 dP / (8 mu L),
    # tau = 4 mu Q / (pi r^3) = r dP / (2 L), mean velocity Q / (pi r^2),
    # peak twice the mean. No unknowns are solved for, so only rounding
    # separates the result from the formula; 1e-9 leaves a wide margin.
    segs, nodes = tables([(0, 1, length_um, radius_um)], {0: "border", 1: "border"})
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    row = res.segments.iloc[0]
    r, L, dp = radius_um * 1e-6, length_um * 1e-6, P_IN - P_OUT
    q = math.pi * r**4 * dp / (8 * MU * L)
    assert row["flow_nl_min"] == pytest.approx(q * NL_MIN_PER_M3_S, rel=1e-9)
    assert row["wss_pa"] == pytest.approx(r * dp / (2 * L), rel=1e-9)
    assert row["velocity_mm_s"] == pytest.approx(q / (math.pi * r**2) * 1e3, rel=1e-9)
    assert row["velocity_peak_mm_s"] == pytest.approx(2 * row["velocity_mm_s"], rel=1e-12)
    assert row["shear_rate_s"] == pytest.approx(4 * q / (math.pi * r**3), rel=1e-9)
    v = q / (math.pi * r**2)
    assert row["reynolds"] == pytest.approx(1055.0 * v * 2 * r / MU, rel=1e-9)
    assert row["transit_time_s"] == pytest.approx(L / v, rel=1e-9)
    assert row["resistance_pa_s_um3"] == pytest.approx(poiseuille_r(length_um, radius_um) * 1e-18, rel=1e-9)
    assert row["perfused"]
    assert res.summary["total_inflow_nl_min"] == pytest.approx(q * NL_MIN_PER_M3_S, rel=1e-9)
    assert res.nodes["role"].tolist() == ["inlet", "outlet"]


def test_tubes_in_series_add_resistances():
    # Series resistances add (Kirchhoff + Hagen–Poiseuille). Unknown nodes are
    # solved directly; 1e-9 covers rounding of a 2x2 solve.
    parts = [(80.0, 4.0), (50.0, 3.0), (120.0, 6.0)]
    segs, nodes = tables([(i, i + 1, L, r) for i, (L, r) in enumerate(parts)], {0: "border", 3: "border"})
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    r_total = sum(poiseuille_r(L, r) for L, r in parts)
    q = (P_IN - P_OUT) / r_total * NL_MIN_PER_M3_S
    np.testing.assert_allclose(res.segments["flow_nl_min"], q, rtol=1e-9)
    assert res.summary["network_resistance_pa_s_um3"] == pytest.approx(r_total * 1e-18, rel=1e-9)
    # Pressure falls by Q R_i along each tube.
    p = res.nodes.set_index("node_id")["pressure_pa"]
    assert p[1] == pytest.approx(P_IN - (P_IN - P_OUT) * poiseuille_r(*parts[0]) / r_total, rel=1e-9)


def test_tubes_in_parallel_add_conductances():
    # Parallel conductances add; each parallel segment is its own conductance,
    # so flows split as r^4 / L.
    parts = [(100.0, 3.0), (100.0, 5.0), (60.0, 4.0)]
    edges = [(0, 1, 10.0, 20.0)] + [(1, 2, L, r) for L, r in parts] + [(2, 3, 10.0, 20.0)]
    segs, nodes = tables(edges, {0: "border", 3: "border"})
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    r_par = 1.0 / sum(1.0 / poiseuille_r(L, r) for L, r in parts)
    r_total = poiseuille_r(10.0, 20.0) * 2 + r_par
    assert res.summary["network_resistance_pa_s_um3"] == pytest.approx(r_total * 1e-18, rel=1e-9)
    q = res.segments["flow_nl_min"].to_numpy()
    share = np.array([1.0 / poiseuille_r(L, r) for L, r in parts])
    np.testing.assert_allclose(q[1:4] / q[0], share / share.sum(), rtol=1e-9)


def test_flow_sign_follows_segment_direction():
    segs, nodes = tables([(0, 1, 50.0, 4.0), (2, 1, 50.0, 4.0)], {0: "border", 2: "border"})
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    q = res.segments["flow_nl_min"].to_numpy()
    assert q[0] > 0 and q[1] < 0  # second segment points against the flow
    assert q[0] == pytest.approx(-q[1], rel=1e-12)
    assert (res.segments["velocity_mm_s"] > 0).all()


def random_grid(n, seed, *, multigraph=False):
    """n x n grid with random radii (3-8 µm) and lengths (20-80 µm)."""
    rng = np.random.default_rng(seed)
    g = nx.convert_node_labels_to_integers(nx.grid_2d_graph(n, n))
    edges = [(u, v, rng.uniform(20, 80), rng.uniform(3, 8)) for u, v in g.edges]
    if multigraph:
        u, v = edges[0][:2]
        edges.append((u, v, 45.0, 5.0))  # a parallel segment
        edges.append((7, 7, 30.0, 4.0))  # a self-loop
    return edges


@pytest.mark.parametrize("seed, multigraph", [(0, False), (1, False), (2, True)])
def test_effective_resistance_equals_networkx_resistance_distance(seed, multigraph):
    # networkx.resistance_distance (docs: with invert_weight=True the weight
    # is a resistance and is inverted; invert_weight=False takes the weight
    # as the conductance itself; multi-edges combine, self-loops are ignored).
    # Units: conductance in µm³/(Pa·s), so the distance is in Pa·s/µm³.
    # networkx uses a dense pseudo-inverse of a 49-node Laplacian: relative
    # error around 1e-12, so 1e-8 is safe.
    n = 7
    edges = random_grid(n, seed, multigraph=multigraph)
    a, b = 0, n * n - 1
    segs, nodes = tables(edges)
    res = solve_flow(segs, nodes, inlets=[a], outlets=[b], **cfg())
    g = nx.MultiGraph()
    for u, v, L, r in edges:
        g.add_edge(u, v, conductance=math.pi * r**4 / (8 * MU * L))
    expected = nx.resistance_distance(g, a, b, weight="conductance", invert_weight=False)
    assert res.summary["network_resistance_pa_s_um3"] == pytest.approx(expected, rel=1e-8)


def test_continuity_at_every_internal_node():
    # Kirchhoff's current law: signed flows at every node without a pressure
    # condition sum to zero. Direct solve: residual at rounding level; 1e-9
    # of the inflow is the required bound.
    edges = random_grid(9, 3)
    segs, nodes = tables(edges)
    res = solve_flow(segs, nodes, inlets=[0, 1], outlets=[80, 79, 44], **cfg())
    q = res.segments["flow_nl_min"].to_numpy()
    net = np.zeros(81)
    np.add.at(net, segs["node_from"].to_numpy(), q)
    np.add.at(net, segs["node_to"].to_numpy(), -q)
    internal = (res.nodes["role"] == "internal").to_numpy()
    inflow = res.summary["total_inflow_nl_min"]
    assert inflow > 0
    assert np.abs(net[internal]).max() <= 1e-9 * inflow
    assert res.summary["max_conservation_residual"] <= 1e-9
    # Inflow equals outflow.
    outflow = -net[(res.nodes["role"] == "outlet").to_numpy()].sum()
    assert outflow == pytest.approx(inflow, rel=1e-9)


def random_tree(depth, seed, *, cube_law=False, length_per_radius=None):
    """Full binary tree, root segment 0-1, oriented away from the root.

    Random split fractions; with ``cube_law`` daughters satisfy
    r0^3 = r1^3 + r2^3 (Murray 1926); with ``length_per_radius`` L = k r.
    """
    rng = np.random.default_rng(seed)
    edges, kinds = [], {0: "border"}
    r_root = 20.0

    def length(r):
        return length_per_radius * r if length_per_radius else rng.uniform(30, 300)

    edges.append((0, 1, length(r_root), r_root))
    frontier, nxt = [(1, r_root)], 2
    for _ in range(depth):
        new = []
        for node, r in frontier:
            f = rng.uniform(0.2, 0.8) if cube_law else None
            for k in range(2):
                if cube_law:
                    rc = r * (f if k == 0 else 1 - f) ** (1 / 3)
                else:
                    rc = r * rng.uniform(0.5, 0.9)
                edges.append((node, nxt, length(rc), rc))
                new.append((nxt, rc))
                nxt += 1
        frontier = new
    for node, _ in frontier:
        kinds[node] = "border"
    return tables(edges, kinds)


def test_parent_flow_equals_sum_of_daughters():
    # Conservation at bifurcations of a tree: Q_parent = Q_d1 + Q_d2, with the
    # tree orientation from the levels step. Tolerance as for continuity.
    segs, nodes = random_tree(6, 4)
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    lv = assign_levels(segs, nodes, [0])
    q = dict(zip(res.segments["segment_id"], res.segments["flow_nl_min"]))
    parent = lv.dropna(subset=["parent_segment_id"])
    sums = parent.groupby("parent_segment_id")["segment_id"].apply(lambda s: sum(q[i] for i in s))
    inflow = res.summary["total_inflow_nl_min"]
    for p, total in sums.items():
        assert abs(q[p] - total) <= 1e-9 * inflow
    assert (res.segments["flow_nl_min"] > 0).all()  # all oriented downstream


def test_cube_law_symmetric_tree_has_uniform_wss():
    # Murray 1926 (PNAS 12:207): with r0^3 = r1^3 + r2^3 and the flow split as
    # r^3, Q / r^3 and hence tau = 4 mu Q / (pi r^3) is the same in every
    # vessel. A symmetric tree with equal outlet pressures splits the flow
    # in halves whatever the lengths (each generation has one random length).
    rng = np.random.default_rng(5)
    depth, r = 6, 30.0
    edges, kinds, nxt, frontier = [(0, 1, 200.0, r)], {0: "border"}, 2, [1]
    for g in range(depth):
        rc = r / 2 ** ((g + 1) / 3)
        L = rng.uniform(20, 400)
        new = []
        for node in frontier:
            for _ in range(2):
                edges.append((node, nxt, L, rc))
                new.append(nxt)
                nxt += 1
        frontier = new
    kinds.update({n: "border" for n in frontier})
    segs, nodes = tables(edges, kinds)
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    wss = res.segments["wss_pa"].to_numpy()
    # Exact in theory; the brief asks for 1 %, the direct solve gives rounding only.
    np.testing.assert_allclose(wss, wss[0], rtol=1e-9)
    lv = assign_levels(segs, nodes, [0])
    per_level = pd.Series(wss).groupby(lv["level"].to_numpy()).mean()
    np.testing.assert_allclose(per_level, wss[0], rtol=0.01)


def test_cube_law_asymmetric_tree_with_length_proportional_to_radius():
    # With L = k r every segment has R ∝ 1/r^3; a cube-law tree with all
    # outlets at the same depth then has the same pressure drop per segment
    # and tau = r dP / (2 L) = dP / (2 k) everywhere (Murray 1926: flow ∝ r^3).
    segs, nodes = random_tree(5, 6, cube_law=True, length_per_radius=10.0)
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    wss = res.segments["wss_pa"].to_numpy()
    np.testing.assert_allclose(wss, wss[0], rtol=1e-9)
    ratio = res.segments["flow_nl_min"].to_numpy() / segs["radius_um"].to_numpy() ** 3
    np.testing.assert_allclose(ratio, ratio[0], rtol=1e-9)


# --- viscosity laws -----------------------------------------------------------

def pries_vitro_as_published(d, h):
    # Pries, Neuhaus & Gaehtgens 1992 (Am J Physiol 263:H1770), typed here
    # independently of the module (formula as recalled):
    # eta = 1 + (eta45 - 1) ((1 - H)^C - 1) / ((1 - 0.45)^C - 1)
    eta45 = 220 * math.exp(-1.3 * d) + 3.2 - 2.44 * math.exp(-0.06 * d**0.645)
    c = (0.8 + math.exp(-0.075 * d)) * (-1 + 1 / (1 + 1e-11 * d**12)) + 1 / (1 + 1e-11 * d**12)
    return 1 + (eta45 - 1) * ((1 - h) ** c - 1) / ((1 - 0.45) ** c - 1)


def pries_vivo_as_published(d, h):
    # Pries et al. 1994 (Circ Res 75:904), typed independently (as recalled).
    eta45 = 6 * math.exp(-0.085 * d) + 3.2 - 2.44 * math.exp(-0.06 * d**0.645)
    c = (0.8 + math.exp(-0.075 * d)) * (-1 + 1 / (1 + 1e-11 * d**12)) + 1 / (1 + 1e-11 * d**12)
    w = (d / (d - 1.1)) ** 2
    return (1 + (eta45 - 1) * ((1 - h) ** c - 1) / ((1 - 0.45) ** c - 1) * w) * w


@pytest.mark.parametrize("d", [5.0, 10.0, 20.0, 100.0])
@pytest.mark.parametrize("h", [0.45, 0.3, 0.6])
def test_pries_vitro_matches_formula(d, h):
    # Same formula, two codings; only rounding differs (1e-12).
    assert relative_viscosity_vitro(d, h) == pytest.approx(pries_vitro_as_published(d, h), rel=1e-12)
    assert relative_viscosity_vivo(d, h) == pytest.approx(pries_vivo_as_published(d, h), rel=1e-12)


def test_pries_vitro_shape():
    # Pries et al. 1992 (values from memory of the paper's figure, loose
    # checks): at H_D 0.45 relative viscosity has its minimum, about 1.2-1.3,
    # near 6-7 µm, and rises towards the bulk value 3.2 of the fit in wide tubes.
    d = np.linspace(3.5, 30.0, 531)
    eta = relative_viscosity_vitro(d, 0.45)
    assert 5.0 < d[np.argmin(eta)] < 9.0
    assert 1.15 < eta.min() < 1.35
    assert relative_viscosity_vitro(10.0, 0.45) == pytest.approx(1.33, abs=0.05)
    assert relative_viscosity_vitro(100.0, 0.45) == pytest.approx(2.44, abs=0.1)
    assert relative_viscosity_vitro(5000.0, 0.45) == pytest.approx(3.2, abs=0.01)
    # Without red cells the fluid is plasma: relative viscosity 1.
    np.testing.assert_allclose(relative_viscosity_vitro(d, 0.0), 1.0, rtol=1e-12)


def test_pries_haematocrit_term_is_smooth_where_c_changes_sign():
    # C crosses zero near 8.05 µm, where ((1-H)^C - 1)/((0.55)^C - 1) is 0/0;
    # the law must stay continuous there (limit ln(1-H)/ln(0.55)).
    d = np.linspace(7.9, 8.2, 3001)
    eta = relative_viscosity_vitro(d, 0.3)
    assert np.all(np.isfinite(eta))
    assert np.abs(np.diff(eta)).max() < 1e-4


def test_vivo_over_vitro_about_four_at_10_um():
    # Pries et al. 1994 abstract: in 10 µm vessels at normal haematocrit the
    # in-vivo resistance is about four times the glass-tube value. "About
    # four" carries one significant figure, so accept 3.5-4.5.
    ratio = relative_viscosity_vivo(10.0, 0.45) / relative_viscosity_vitro(10.0, 0.45)
    assert 3.5 <= ratio <= 4.5


def test_pries_model_in_solver_and_clamped_diameters():
    segs, nodes = tables([(0, 1, 100.0, 5.0), (1, 2, 100.0, 1.0)], {0: "border", 2: "border"})
    res = solve_flow(segs, nodes, inlets=[0], **cfg(viscosity_model="pries1992", haematocrit=0.45,
                                                          plasma_viscosity_mpa_s=1.2))
    mu = res.segments["viscosity_mpa_s"].to_numpy()
    assert mu[0] == pytest.approx(1.2 * pries_vitro_as_published(10.0, 0.45), rel=1e-12)
    # 2 µm is below the 3.3 µm lower limit: evaluated at 3.3 µm and reported.
    assert mu[1] == pytest.approx(1.2 * pries_vitro_as_published(3.3, 0.45), rel=1e-12)
    assert any("narrower than 3.3" in w for w in res.warnings)
    # Resistance and WSS use the segment's own viscosity.
    row = res.segments.iloc[0]
    assert row["resistance_pa_s_um3"] == pytest.approx(poiseuille_r(100.0, 5.0, mu[0] * 1e-3) * 1e-18, rel=1e-9)


# --- boundary conditions and unperfused parts ---------------------------------

def test_disconnected_piece_without_inlet_is_unperfused():
    edges = [(0, 1, 50.0, 4.0), (10, 11, 50.0, 4.0), (11, 12, 50.0, 4.0)]
    segs, nodes = tables(edges, {0: "border", 1: "border"})
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    s = res.segments.set_index("segment_id")
    assert s.loc[0, "perfused"] and not s.loc[1, "perfused"] and not s.loc[2, "perfused"]
    assert s.loc[1, "flow_nl_min"] == 0.0 and s.loc[2, "flow_nl_min"] == 0.0
    p = res.nodes.set_index("node_id")["pressure_pa"]
    assert np.isnan(p[[10, 11, 12]]).all() and np.isfinite(p[[0, 1]]).all()
    assert res.summary["n_unsolved_components"] == 1
    assert any("no inlet or outlet" in w for w in res.warnings)
    assert res.summary["perfused_length_fraction"] == pytest.approx(1 / 3)


def test_piece_with_outlets_only_carries_no_flow():
    edges = [(0, 1, 50.0, 4.0), (10, 11, 50.0, 4.0), (11, 12, 50.0, 4.0)]
    segs, nodes = tables(edges, {0: "border", 1: "border", 10: "border", 12: "border"})
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    s = res.segments.set_index("segment_id")
    assert (s.loc[[1, 2], "flow_nl_min"] == 0.0).all() and not s.loc[[1, 2], "perfused"].any()
    p = res.nodes.set_index("node_id")["pressure_pa"]
    np.testing.assert_allclose(p[[10, 11, 12]], P_OUT)


def y_network():
    # inlet 0 -> junction 1 -> border outlet 2, and junction 1 -> 3 -> blind 4 / blind 5
    edges = [(0, 1, 100.0, 6.0), (1, 2, 100.0, 5.0), (1, 3, 80.0, 4.0), (3, 4, 40.0, 3.0), (3, 5, 40.0, 3.0)]
    return tables(edges, {0: "border", 2: "border", 4: "blind", 5: "blind"})


def test_sealed_blind_ends_carry_no_flow():
    segs, nodes = y_network()
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    s = res.segments.set_index("segment_id")
    assert (s.loc[[2, 3, 4], "flow_nl_min"] == 0.0).all()
    assert not s.loc[[2, 3, 4], "perfused"].any() and s.loc[[0, 1], "perfused"].all()
    assert np.isnan(s.loc[[2, 3, 4], "transit_time_s"]).all()
    roles = res.nodes.set_index("node_id")["role"]
    assert roles[4] == "sealed" and roles[5] == "sealed" and roles[1] == "internal"
    # A sealed branch has no pressure drop: it sits at the junction pressure.
    p = res.nodes.set_index("node_id")["pressure_pa"]
    np.testing.assert_allclose(p[[3, 4, 5]], p[1], rtol=1e-12)
    # What enters leaves through the one outlet (series of segments 0 and 1).
    r_total = poiseuille_r(100.0, 6.0) + poiseuille_r(100.0, 5.0)
    assert res.summary["total_inflow_nl_min"] == pytest.approx((P_IN - P_OUT) / r_total * NL_MIN_PER_M3_S,
                                                               rel=1e-9)


def test_blind_ends_as_outlets_carry_flow():
    segs, nodes = y_network()
    res = solve_flow(segs, nodes, inlets=[0], **cfg(blind_ends="outlet"))
    s = res.segments.set_index("segment_id")
    assert (s.loc[[2, 3, 4], "flow_nl_min"] > 0).all() and s["perfused"].all()
    assert res.summary["n_outlets"] == 3
    assert (res.nodes.set_index("node_id").loc[[2, 4, 5], "role"] == "outlet").all()


def test_prescribed_inflow_is_reproduced():
    edges = random_grid(6, 7)
    segs, nodes = tables(edges)
    target = 123.4
    res = solve_flow(segs, nodes, inlets=[0, 5], outlets=[35, 30], **cfg(inlet_flow_nl_min=target))
    # Linear scaling of the unit solution: exact up to rounding.
    assert res.summary["total_inflow_nl_min"] == pytest.approx(target, rel=1e-12)
    assert res.summary["boundary"] == "flow"
    p = res.nodes.set_index("node_id")["pressure_pa"]
    assert p[0] == pytest.approx(p[5], rel=1e-12)  # inlets share one pressure
    assert p[0] == pytest.approx(res.summary["inlet_pressure_pa"], rel=1e-12)
    # The same pressure as an inlet pressure gives the same flow.
    res2 = solve_flow(segs, nodes, inlets=[0, 5], outlets=[35, 30],
                      **cfg(inlet_pressure_pa=float(p[0])))
    assert res2.summary["total_inflow_nl_min"] == pytest.approx(target, rel=1e-9)


def test_prescribed_inflow_without_outlet_is_an_input_error():
    segs, nodes = tables([(0, 1, 50.0, 4.0)], {0: "border", 1: "blind"})
    with pytest.raises(InputError, match="inlet_flow_nl_min"):
        solve_flow(segs, nodes, inlets=[0], **cfg(inlet_flow_nl_min=10.0))


def test_self_loop_carries_no_flow_and_changes_nothing():
    base = [(0, 1, 60.0, 4.0), (1, 2, 60.0, 4.0), (1, 3, 60.0, 3.0)]
    kinds = {0: "border", 2: "border", 3: "border"}
    segs, nodes = tables(base, kinds)
    segs_l, nodes_l = tables(base + [(1, 1, 40.0, 3.0)], kinds)
    a = solve_flow(segs, nodes, inlets=[0], **cfg())
    b = solve_flow(segs_l, nodes_l, inlets=[0], **cfg())
    assert b.segments["flow_nl_min"].iloc[3] == 0.0 and not b.segments["perfused"].iloc[3]
    np.testing.assert_allclose(b.segments["flow_nl_min"].iloc[:3], a.segments["flow_nl_min"], rtol=1e-12)


def test_levels_pass_through():
    segs, nodes = random_tree(2, 0)
    lv = assign_levels(segs, nodes, [0])
    res = solve_flow(segs.merge(lv, on="segment_id"), nodes, inlets=[0], **cfg())
    assert res.segments["level"].tolist() == lv["level"].tolist()
    assert res.segments.columns[:4].tolist() == ["segment_id", "level", "strahler", "strahler_diameter"]


# --- solver paths -------------------------------------------------------------

def lattice_3d(n, seed):
    rng = np.random.default_rng(seed)
    g = nx.convert_node_labels_to_integers(nx.grid_graph(dim=[n, n, n]))
    edges = [(u, v, rng.uniform(20, 80), rng.uniform(2, 8)) for u, v in g.edges]
    return tables(edges), n


def test_cg_matches_direct_on_mid_size_graph():
    # CG stops at a relative residual of 1e-12; the pressure error is at most
    # cond(A) * 1e-12 relative, and the condition number of the scaled
    # Laplacian of a 12^3 lattice with r^4 spread of (8/2)^4 is well below
    # 1e5, so 1e-6 of the pressure drop is a safe bound.
    (segs, nodes), n = lattice_3d(12, 8)
    outlets = list(range(n * n * n - n * n, n * n * n))
    direct = solve_flow(segs, nodes, inlets=list(range(n * n)), outlets=outlets, **cfg(solver="direct"))
    cg = solve_flow(segs, nodes, inlets=list(range(n * n)), outlets=outlets,
                    **cfg(solver="cg", cg_rtol=1e-12))
    assert cg.summary["solver"] == "cg" and cg.summary["solver_iterations"] > 0
    diff = np.abs(cg.nodes["pressure_pa"] - direct.nodes["pressure_pa"]).max()
    assert diff <= 1e-6 * (P_IN - P_OUT)
    assert cg.summary["max_conservation_residual"] <= 1e-9
    assert cg.summary["total_inflow_nl_min"] == pytest.approx(direct.summary["total_inflow_nl_min"], rel=1e-8)


def test_auto_solver_switches_on_size():
    (segs, nodes), n = lattice_3d(5, 9)
    kw = dict(inlets=list(range(n * n)), outlets=list(range(n**3 - n * n, n**3)))
    assert solve_flow(segs, nodes, **cfg(solver="auto"), **kw).summary["solver"] == "direct"
    res = solve_flow(segs, nodes, **cfg(solver="auto", cg_threshold_nodes=10), **kw)
    assert res.summary["solver"] == "cg"


def test_cg_that_does_not_converge_raises():
    (segs, nodes), n = lattice_3d(6, 10)
    with pytest.raises(SolverError, match="did not converge"):
        solve_flow(segs, nodes, inlets=[0], outlets=[n**3 - 1], **cfg(solver="cg", cg_max_iter=2))


def test_component_without_pressure_condition_is_not_assembled():
    # A closed loop with no inlet or outlet would make the Laplacian singular;
    # it must be left out, not crash either solver.
    edges = [(0, 1, 50.0, 4.0), (10, 11, 50.0, 4.0), (11, 12, 50.0, 4.0), (12, 10, 50.0, 4.0)]
    segs, nodes = tables(edges, {0: "border", 1: "border"})
    for solver in ("direct", "cg"):
        res = solve_flow(segs, nodes, inlets=[0], **cfg(solver=solver))
        assert res.segments["perfused"].tolist() == [True, False, False, False]


# --- input errors ---------------------------------------------------------------

@pytest.mark.parametrize(
    "change, kwargs, error, fragment",
    [
        (None, {"inlets": [99]}, InputError, "node id 99"),
        (None, {"inlets": []}, InputError, "at least one inlet"),
        (None, {"inlets": [0], "outlets": [0]}, InputError, "also an inlet"),
        (("length_um", -1.0), {"inlets": [0]}, InputError, "length_um"),
        (("radius_um", float("nan")), {"inlets": [0]}, InputError, "radius_um"),
        (("node_to", 42), {"inlets": [0]}, InputError, "missing from nodes"),
    ],
)
def test_bad_inputs_raise_input_error(change, kwargs, error, fragment):
    segs, nodes = tables([(0, 1, 50.0, 4.0), (1, 2, 50.0, 4.0)], {0: "border", 2: "border"})
    if change:
        segs.loc[0, change[0]] = change[1]
    with pytest.raises(error, match=fragment):
        solve_flow(segs, nodes, **cfg(), **kwargs)


@pytest.mark.parametrize("flow", [{"viscosity_model": "casson"}, {"haematocrit": 1.5},
                                  {"blind_ends": "leaky"}, {"boundary": "guess"}, {"min_valid_diameter_um": 1.0}])
def test_bad_config_raises_config_error(flow):
    segs, nodes = tables([(0, 1, 50.0, 4.0)], {0: "border", 1: "border"})
    with pytest.raises(ConfigError):
        solve_flow(segs, nodes, inlets=[0], **flow)


def test_options_are_keywords_with_the_config_defaults():
    # One way to give options: keywords with the defaults of the config's
    # flow section in the signature (analyze passes **config["flow"]); an
    # unknown one is Python's TypeError, the earlier config= still works but
    # says it is deprecated.
    import inspect

    from pipeline.config import SCHEMA

    params = inspect.signature(solve_flow).parameters
    for key, p in SCHEMA["flow"].items():
        if key != "enabled":
            assert params[key].default == p.default and params[key].kind is inspect.Parameter.KEYWORD_ONLY
    segs, nodes = tables([(0, 1, 50.0, 4.0)], {0: "border", 1: "border"})
    with pytest.raises(TypeError):
        solve_flow(segs, nodes, inlets=[0], nosuch=1)
    with pytest.warns(DeprecationWarning, match="keywords"):
        old = solve_flow(segs, nodes, inlets=[0], config={"flow": cfg()})
    new = solve_flow(segs, nodes, inlets=[0], **cfg())
    pd.testing.assert_frame_equal(old.segments, new.segments)


def test_cg_kernel_agrees_with_scipy_cg():
    # The module's CG loop against scipy.sparse.linalg.cg on the same SPD
    # system (a shifted random graph Laplacian): both stop at relative
    # residual 1e-12, so the solutions agree to about cond * 1e-12 (cond < 1e3 here).
    import scipy.sparse as sp
    from scipy.sparse.linalg import cg

    from pipeline.flow.linear import _cg

    rng = np.random.default_rng(11)
    g = nx.gnm_random_graph(400, 1200, seed=11)
    w = rng.uniform(0.5, 2.0, g.number_of_edges())
    u, v = np.array(g.edges).T
    adj = sp.coo_matrix((np.r_[w, w], (np.r_[u, v], np.r_[v, u])), shape=(400, 400)).tocsr()
    lap = sp.diags(np.asarray(adj.sum(axis=1)).ravel()) - adj
    a = (lap + 0.5 * sp.identity(400)).tocsr()  # Laplacian + 0.5 I: SPD
    b = rng.normal(size=400)
    x, iterations, converged = _cg(a, b, np.zeros(400), rtol=1e-12, max_iter=5000)
    ref, info = cg(a, b, rtol=1e-12, atol=0.0, maxiter=5000)
    assert converged and info == 0 and iterations > 0
    np.testing.assert_allclose(x, ref, rtol=0, atol=1e-8 * np.abs(ref).max())
    assert np.linalg.norm(b - a @ x) <= 1e-11 * np.linalg.norm(b)


def test_auto_solver_keeps_direct_for_trees():
    # Sparse LU of a tree has no fill: auto stays direct above the size threshold.
    segs, nodes = random_tree(6, 12)
    res = solve_flow(segs, nodes, inlets=[0], **cfg(solver="auto", cg_threshold_nodes=10))
    assert res.summary["solver"] == "direct"


@pytest.mark.parametrize("sd_rel", [0.05, 0.1])
def test_ensemble_interval_of_a_tube_matches_the_lognormal_law(sd_rel):
    # One tube between fixed pressures: Q = pi r^4 dP / (8 mu L), so a radius
    # factor exp(N(0, s)) gives a flow factor exp(N(0, 4 s)) (lognormal), whose
    # 5th and 95th percentiles are at exp(-/+ 1.645 * 4 s) (scipy.stats.norm).
    # The radius sd is given with one point, so the measured uncertainty is
    # the sd itself; the floor is switched off. 2000 members: the sample
    # percentiles' relative error is a few per cent; 5 % tolerance.
    from scipy import stats

    segs, nodes = tables([(0, 1, 100.0, 4.0)], {0: "border", 1: "border"})
    segs["radius_sd_um"] = 4.0 * sd_rel
    segs["radius_n_points"] = 1
    res = solve_flow(segs, nodes, inlets=[0], **cfg(ensemble_size=2000, radius_uncertainty_floor=0.0))
    row = res.segments.iloc[0]
    z = stats.norm.ppf(0.95)
    assert row["flow_p05_nl_min"] / row["flow_nl_min"] == pytest.approx(math.exp(-z * 4 * sd_rel), rel=0.05)
    assert row["flow_p95_nl_min"] / row["flow_nl_min"] == pytest.approx(math.exp(z * 4 * sd_rel), rel=0.05)
    assert row["direction_confidence"] == 1.0


def test_ensemble_off_gives_no_interval():
    segs, nodes = tables([(0, 1, 100.0, 4.0)], {0: "border", 1: "border"})
    res = solve_flow(segs, nodes, inlets=[0], **cfg(ensemble_size=0))
    assert res.segments[["flow_p05_nl_min", "flow_p95_nl_min", "direction_confidence"]].isna().all().all()


def test_plausibility_warns_outside_published_ranges_only():
    # Ranges of pipeline.flow.PLAUSIBLE (sources named there): a median
    # capillary speed of 0.02 mm/s (below the 0.1 mm/s floor; red cells in
    # mouse cortex move at about 0.5-2 mm/s, from memory) and 45 % perfused
    # length warn; values inside every range do not.
    from pipeline.flow import plausibility_warnings

    ok = {"perfused_length_fraction": 0.9, "velocity_median_mm_s_capillary": 0.6, "wss_p99_pa": 12.0,
          "velocity_max_mm_s": 8.0}
    assert plausibility_warnings(ok) == []
    bad = dict(ok, velocity_median_mm_s_capillary=0.02, perfused_length_fraction=0.45)
    notes = plausibility_warnings(bad)
    assert len(notes) == 2
    assert any("median capillary speed (mm/s) is 0.02" in n for n in notes)
    assert any("45 %" in n for n in notes)


def test_class_statistics_split_at_the_documented_bounds():
    # capillary < 8 µm <= small <= 30 µm < large; medians against numpy
    from pipeline.flow import class_statistics

    d = np.array([5.0, 7.9, 8.0, 30.0, 30.1, 60.0])
    v = np.array([0.5, 0.7, 2.0, 3.0, 10.0, 20.0])
    w = np.array([3.0, 4.0, 2.0, 2.5, 1.5, 1.0])
    perf = np.array([True, True, True, True, True, False])
    st = class_statistics(d, v, w, perf, np.ones(6))
    assert st["n_perfused_capillary"] == 2 and st["n_perfused_small"] == 2 and st["n_perfused_large"] == 1
    assert st["velocity_median_mm_s_capillary"] == pytest.approx(np.median([0.5, 0.7]))
    assert st["velocity_max_mm_s"] == 10.0  # the unperfused segment does not count
    assert st["wss_p99_pa"] == pytest.approx(np.percentile(w[perf], 99))
