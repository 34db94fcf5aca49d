"""Boundary conditions estimated for networks cut by the volume (Fry et al. 2012).

Networks are built directly as ``segments``/``nodes`` tables (see
``tests/test_flow.py``); the flow step is called with ``boundary:
estimate`` and constant viscosity unless a test says otherwise.
"""

import math

import numpy as np
import pandas as pd
import pytest
from scipy import sparse
from scipy.sparse import linalg as spla

from pipeline.flow.boundary import PA_PER_MMHG, set_point_wss_pa
from pipeline.flow import solve_flow

MU = 3.5e-3  # Pa·s


def cfg(**flow):
    base = {"boundary": "estimate", "viscosity_model": "constant", "viscosity_mpa_s": MU * 1e3}
    base.update(flow)
    return base


def tables(u, v, length_um, radius_um, kinds):
    segs = pd.DataFrame({"segment_id": np.arange(len(u)), "node_from": u, "node_to": v,
                         "length_um": length_um, "radius_um": radius_um})
    n = int(max(np.max(u), np.max(v))) + 1
    nodes = pd.DataFrame({"node_id": np.arange(n), "kind": [kinds.get(i, "junction") for i in range(n)]})
    return segs, nodes


def cube_law_tree(seed, depth=6, root_radius=20.0):
    """Asymmetric tree: flow fractions f ~ U(0.2, 0.8), radii r0 f^(1/3) and
    r0 (1 - f)^(1/3) (Murray 1926, PNAS 12:207: r0^3 = r1^3 + r2^3), lengths
    8-15 radii. Node 0 is the root's border end; leaves are border ends."""
    rng = np.random.default_rng(seed)
    u, v, r, L = [0], [1], [root_radius], [200.0]
    front, nid = [(1, root_radius, 0)], 2
    while front:
        node, r0, d = front.pop()
        if d >= depth:
            continue
        f = rng.uniform(0.2, 0.8)
        for rr in (r0 * f ** (1 / 3), r0 * (1 - f) ** (1 / 3)):
            u.append(node)
            v.append(nid)
            r.append(rr)
            L.append(rr * rng.uniform(8, 15))
            front.append((nid, rr, d + 1))
            nid += 1
    u, v = np.array(u), np.array(v)
    deg = np.bincount(u, minlength=nid) + np.bincount(v, minlength=nid)
    kinds = {i: "border" for i in np.flatnonzero(deg == 1)}
    return tables(u, v, np.array(L), np.array(r), kinds)


@pytest.mark.parametrize("seed", [0, 1, 2, 3])
def test_cube_law_tree_with_only_the_root_known_splits_by_the_cube_law(seed):
    # Murray (1926, PNAS 12:207): at equal wall shear stress, Poiseuille flow
    # splits as r^3, Q1 / (Q1 + Q2) = r1^3 / (r1^3 + r2^3). The acceptance
    # asks for >= 80 % of bifurcations within 0.1 of that split.
    segs, nodes = cube_law_tree(seed)
    res = solve_flow(segs, nodes, inlets=[0], **cfg())
    q = res.segments["flow_nl_min"].to_numpy()
    u, r = segs["node_from"].to_numpy(), segs["radius_um"].to_numpy()
    ok = []
    for node in np.unique(u[1:]):
        kids = np.flatnonzero(u == node)
        q1, q2 = np.abs(q[kids])
        r1, r2 = r[kids]
        ok.append(abs(q1 / (q1 + q2) - r1**3 / (r1**3 + r2**3)) <= 0.1)
    assert np.mean(ok) >= 0.8
    # the known root is the inlet; the flow leaves through the leaves
    assert res.nodes.set_index("node_id").loc[0, "role"] == "inlet"
    assert (q > 0).mean() >= 0.9


def laplacian_solve(u, v, g, n, fixed, p_fixed):
    """Independent reference: Kirchhoff's law with Dirichlet nodes, scipy spsolve."""
    lap = sparse.coo_matrix((np.r_[g, g, -g, -g], (np.r_[u, v, u, v], np.r_[u, v, v, u])), shape=(n, n)).tocsr()
    free = np.flatnonzero(~fixed)
    p = np.zeros(n)
    p[fixed] = p_fixed
    rhs = -lap[free][:, np.flatnonzero(fixed)] @ p[fixed]
    p[free] = spla.spsolve(lap[free][:, free].tocsc(), rhs)
    return p


@pytest.mark.parametrize("seed", [0, 1])
def test_with_every_end_known_the_estimate_is_the_kirchhoff_solution(seed):
    # With all boundary pressures known the flow equations have one solution
    # (Kirchhoff + Poiseuille); the targets must not change it. Reference:
    # the Laplacian system solved by scipy's spsolve. Both are direct solves:
    # 1e-7 relative leaves room for the refinement's stopping test.
    rng = np.random.default_rng(seed)
    n = 6
    idx = np.arange(n * n).reshape(n, n)
    e = np.r_[np.c_[idx[:, :-1].ravel(), idx[:, 1:].ravel()], np.c_[idx[:-1].ravel(), idx[1:].ravel()]]
    ends = np.r_[idx[0], idx[-1]]
    stubs = np.arange(n * n, n * n + ends.size)
    e = np.r_[e, np.c_[ends, stubs]]
    L, r = rng.uniform(20, 80, len(e)), rng.uniform(2.5, 6, len(e))
    segs, nodes = tables(e[:, 0], e[:, 1], L, r, {int(s): "border" for s in stubs})
    inlets, outlets = stubs[: n // 2], stubs[n // 2:]
    res = solve_flow(segs, nodes, inlets=inlets, outlets=outlets, **cfg(
        inlet_pressure_pa=7000.0, outlet_pressure_pa=2500.0))
    g = math.pi * (r * 1e-6) ** 4 / (8 * MU * L * 1e-6)
    fixed = np.zeros(stubs.max() + 1, bool)
    fixed[stubs] = True
    p_fixed = np.where(np.isin(np.flatnonzero(fixed), inlets), 7000.0, 2500.0)
    p = laplacian_solve(e[:, 0], e[:, 1], g, len(fixed), fixed, p_fixed)
    np.testing.assert_allclose(res.nodes["pressure_pa"].to_numpy(), p, rtol=1e-7)


@pytest.mark.parametrize("narrow_first", [True, False])
def test_two_trunks_orient_flow_from_the_narrow_one_to_the_wide_one(narrow_first):
    # A piece with nothing known: a narrow and a wide trunk joined by
    # parallel capillaries. Arterioles are narrower than the venules that
    # drain them (rodent cortex, from memory), and the pressure-dependent
    # shear target (Pries et al. 1998, Am J Physiol 275:H349) prefers high
    # shear at high pressure: the narrow trunk must be the inlet.
    u, v, L, r = [0, 3], [1, 2], [150.0, 150.0], [6.0, 9.0] if narrow_first else [9.0, 6.0]
    for k in range(6):
        u.append(1)
        v.append(3)
        L.append(60.0 + 5 * k)
        r.append(2.6)
    segs, nodes = tables(np.array(u), np.array(v), np.array(L), np.array(r), {0: "border", 2: "border"})
    res = solve_flow(segs, nodes, **cfg())
    roles = res.nodes.set_index("node_id")["role"]
    narrow, wide = (0, 2) if narrow_first else (2, 0)
    assert roles[narrow] == "inlet" and roles[wide] == "outlet"
    q = res.segments["flow_nl_min"].to_numpy()
    assert (q > 0).all() if narrow_first else (q < 0).all()


def lattice_with_stubs(n, seed):
    """Cubic lattice of n^3 nodes, 70 % of bonds kept, a border stub on every face node."""
    rng = np.random.default_rng(seed)
    idx = np.arange(n**3).reshape(n, n, n)
    e = np.concatenate([np.c_[np.take(idx, range(n - 1), axis=ax).ravel(), np.take(idx, range(1, n), axis=ax).ravel()]
                        for ax in range(3)])
    e = e[rng.random(len(e)) < 0.7]
    face = np.unique(np.r_[idx[0].ravel(), idx[-1].ravel(), idx[:, 0].ravel(), idx[:, -1].ravel(),
                           idx[:, :, 0].ravel(), idx[:, :, -1].ravel()])
    stubs = np.arange(n**3, n**3 + face.size)
    e = np.r_[e, np.c_[face, stubs]]
    L, r = rng.uniform(40, 80, len(e)), rng.uniform(2.0, 3.5, len(e))
    return tables(e[:, 0], e[:, 1], L, r, {int(s): "border" for s in stubs})


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_estimated_flow_is_conserved_and_physiological_on_a_cut_lattice(seed):
    # A capillary lattice cut on every face (every face end open, nothing
    # known). Kirchhoff's current law at every interior node to 1e-9 of the
    # total inflow (direct solve). Mean speeds: red cells in mouse cortical
    # capillaries move at about 0.5-2 mm/s (from memory, e.g. two-photon line
    # scans); the acceptance range for the model is 0.1-5 mm/s.
    n = 7
    segs, nodes = lattice_with_stubs(n, seed)
    e = segs[["node_from", "node_to"]].to_numpy()
    stubs = nodes.index[nodes["kind"] == "border"].to_numpy()
    res = solve_flow(segs, nodes, **cfg())
    q = res.segments["flow_nl_min"].to_numpy()
    net = np.bincount(e[:, 0], q, minlength=stubs.max() + 1) - np.bincount(e[:, 1], q, minlength=stubs.max() + 1)
    interior = np.ones(stubs.max() + 1, bool)
    interior[stubs] = False
    total = res.summary["total_inflow_nl_min"]
    assert total > 0
    assert np.abs(net[interior]).max() <= 1e-9 * total
    perf = res.segments["perfused"].to_numpy()
    assert res.summary["perfused_length_fraction"] >= 0.7
    assert 0.1 <= np.median(res.segments.loc[perf, "velocity_mm_s"]) <= 5.0


def test_a_piece_touching_nothing_stays_unperfused_and_says_so():
    # A closed floating piece (no border end, no named inlet) cannot be fed.
    u, v = np.array([0, 1, 2, 4, 5]), np.array([1, 2, 3, 5, 6])
    segs, nodes = tables(u, v, np.full(5, 50.0), np.full(5, 3.0),
                         {0: "border", 3: "border", 4: "blind", 6: "blind"})
    res = solve_flow(segs, nodes, **cfg(blind_ends="open"))
    perf = res.segments.set_index("segment_id")["perfused"]
    assert perf[[0, 1, 2]].all() and not perf[[3, 4]].any()
    assert any("touch neither the volume border" in w for w in res.warnings)
    assert res.segments.set_index("segment_id").loc[[3, 4], "transit_time_s"].isna().all()


def test_speed_floor_marks_next_to_stagnant_segments_unperfused():
    # A rung between two symmetric paths carries no flow by symmetry (the
    # Wheatstone bridge balance): it must not count as perfused and must have
    # no transit time (a transit time of 1e20 s is meaningless).
    u = np.array([0, 1, 1, 2, 3, 4, 5])
    v = np.array([1, 2, 3, 4, 5, 6, 6])
    L = np.array([50.0, 60.0, 60.0, 40.0, 60.0, 60.0, 50.0])
    r = np.array([5.0, 3.0, 3.0, 3.0, 3.0, 3.0, 5.0])
    # bridge 2-3 instead of 2-4: rebuild as a square with a rung
    u = np.array([0, 1, 1, 2, 3, 2, 4])
    v = np.array([1, 2, 3, 4, 4, 3, 5])
    L = np.array([50.0, 60.0, 60.0, 60.0, 60.0, 30.0, 50.0])
    r = np.array([5.0, 3.0, 3.0, 3.0, 3.0, 3.0, 5.0])
    segs, nodes = tables(u, v, L, r, {0: "border", 5: "border"})
    res = solve_flow(segs, nodes, inlets=[0], outlets=[5], **cfg())
    rung = res.segments.iloc[5]
    assert abs(rung["flow_nl_min"]) < 1e-9 * res.summary["total_inflow_nl_min"]
    assert not rung["perfused"] and math.isnan(rung["transit_time_s"])
    assert res.segments.drop(index=5)["perfused"].all()


@pytest.mark.parametrize("mmhg, pa", [(15.0, 1.43), (30.0, 3.90), (60.0, 9.48)])
def test_set_point_shear_stress_at_worked_points(mmhg, pa):
    # tau = 100 - 86 exp(-5000 (log10 log10 P)^5.4) dyn/cm^2 (Pries, Secomb &
    # Gaehtgens 1998, Am J Physiol 275:H349; formula from memory), worked by
    # hand: P = 30 mmHg: log10 30 = 1.4771, log10 of that = 0.16942,
    # ^5.4 = 6.83e-5, x 5000 = 0.3415, exp(-) = 0.7107, tau = 38.88 dyn/cm^2.
    # 1 dyn/cm^2 = 0.1 Pa. Hand rounding: 0.01 Pa.
    assert float(set_point_wss_pa(mmhg * PA_PER_MMHG)) == pytest.approx(pa, abs=0.01)


def cortex_crop_estimate(seed, width_um):
    """Truth flows of a whole cortex-like network (pipeline.synthetic:
    penetrating arteriolar and venular cube-law trees feeding a capillary
    mesh, every arteriole root at 55 mmHg, every venule root at 18 mmHg),
    then the estimate on a crop from the surface, with nothing known."""
    from pipeline import synthetic as sy

    net = sy.cortex_network(seed=seed)
    truth = sy.network_flow_truth(net).segments.set_index("segment_id")["flow_nl_min"]
    lo = (0.0, (400.0 - width_um) / 2, (400.0 - width_um) / 2)
    crop = sy.crop_network(net, box_um=(lo, tuple(x + width_um for x in lo)))
    segs, nodes = sy.network_tables(crop)
    q = solve_flow(segs, nodes).segments["flow_nl_min"].to_numpy()
    qt = truth.loc[segs["source_segment"].to_numpy()].to_numpy()
    ok = np.abs(qt) > 1e-9 * np.abs(qt).max()
    right = float(np.mean(np.sign(q[ok]) == np.sign(qt[ok])))
    err = float(np.median(np.abs(np.abs(q[ok]) - np.abs(qt[ok])) / np.abs(qt[ok])))
    return right, err


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_cut_cortex_network_directions_better_than_chance(seed):
    # In the spirit of Fry et al. (2012, Microcirculation 19:530): solve a
    # large network with full boundary conditions, crop it, estimate the
    # crop's cut ends from the crop alone (nothing known), compare. Measured
    # on 300 µm crops of 400 µm networks (seeds 0-2): 79-89 % of directions
    # right (every arteriole; venules 81-97 %, capillaries 73-83 %), median
    # relative flow error 59-64 % (the estimate's flows are about half the
    # truth's, whose default pressures give wall shear stresses above the
    # estimate's targets). Chance is 50 %; 0.75 guards what was reached
    # (the start before trees were classed by their trunks gave 73-85 %).
    right, err = cortex_crop_estimate(seed, 300.0)
    assert right >= 0.75
    assert err < 1.0


@pytest.mark.parametrize("seed", [0, 1])
def test_known_boundary_flows_are_kept_with_the_default_rheology(seed):
    # A known inflow is a constraint of the estimate (Fry et al. 2012) and
    # must hold in the result, also after the haematocrit iteration (the
    # defaults: in-vivo viscosity, phase separation), which holds the
    # estimated pressures of the open ends. The net inflow at each node is
    # summed here from the segment flows. Known: the truth's flows at the
    # widest cut arteriole and the widest cut venule of a cortex crop, as the
    # paper's tests prescribed two or three boundary flows. Before the fix
    # the venule's drifted by 18 %; 1e-6 allows for the linear solves.
    from pipeline import synthetic as sy

    net = sy.cortex_network(seed=seed)
    truth = sy.network_flow_truth(net).segments.set_index("segment_id")["flow_nl_min"]
    crop = sy.crop_network(net, box_um=((0.0, 50.0, 50.0), (300.0, 350.0, 350.0)))
    segs, nodes = sy.network_tables(crop)
    cls = {s["id"]: s.get("vessel_class") for s in net.segments}
    widest = {}
    for n in nodes.loc[nodes["kind"] == "border", "node_id"]:
        j = np.flatnonzero(((segs["node_from"] == n) | (segs["node_to"] == n)).to_numpy())[0]
        c = cls[int(segs["source_segment"].iloc[j])]
        q = truth.loc[int(segs["source_segment"].iloc[j])] * (1 if segs["node_from"].iloc[j] == n else -1)
        if c in ("arteriole", "venule") and segs["radius_um"].iloc[j] > widest.get(c, (0, 0, 0))[0]:
            widest[c] = (segs["radius_um"].iloc[j], int(n), float(q))
    known = {n: q for _, n, q in widest.values()}
    assert len(known) == 2
    res = solve_flow(segs, nodes, boundary_flows=known)
    assert res.summary["rheology_iterations"] > 1
    q = res.segments.set_index("segment_id").loc[segs["segment_id"], "flow_nl_min"].to_numpy()
    for n, q_known in known.items():
        out = q[(segs["node_from"] == n).to_numpy()].sum() - q[(segs["node_to"] == n).to_numpy()].sum()
        assert out == pytest.approx(q_known, rel=1e-6)


@pytest.mark.xfail(strict=True, reason="measured 79-89 % of directions right and 59-64 % median flow error on "
                   "300 µm crops; the acceptance asks for 90 % and 30 %. With the truth's flows prescribed at "
                   "every cut arteriole and venule, 80-85 % (see the module notes of pipeline/flow/boundary.py "
                   "on what a crop alone can tell)")
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_cut_cortex_network_meets_the_validation_targets(seed):
    right, err = cortex_crop_estimate(seed, 300.0)
    assert right >= 0.9 and err <= 0.3


def test_nested_dissection_order_gives_the_minimum_degree_solution(monkeypatch):
    # The KKT system is factorised in a nested-dissection order (METIS) on
    # large networks and in SuperLU's minimum-degree order on small ones;
    # the order changes the rounding, not the solution. Both end in
    # iterative refinement to a residual of 1e-12 of the right-hand side,
    # so flows agree far below 1e-8 of the largest (measured: 3e-12 on a
    # 40,000-segment bed).
    from pipeline.flow import boundary

    segs, nodes = lattice_with_stubs(14, seed=3)
    n_nodes = len(nodes)
    assert n_nodes >= boundary._DISSECTION_MIN_NODES
    a, b = segs["node_from"].to_numpy(), segs["node_to"].to_numpy()
    owner = np.r_[np.arange(n_nodes), np.arange(0, n_nodes, 2)]
    perm = boundary._kkt_order(a, b, n_nodes, owner)
    assert perm is not None and np.array_equal(np.sort(perm), np.arange(owner.size))
    # a node's unknowns stay next to each other, the pressure first
    pos = np.empty_like(perm)
    pos[perm] = np.arange(perm.size)
    assert np.all(pos[n_nodes:] == pos[np.arange(0, n_nodes, 2)] + 1)

    dissected = solve_flow(segs, nodes, **cfg()).segments["flow_nl_min"].to_numpy()
    monkeypatch.setattr(boundary, "_DISSECTION_MIN_NODES", 10**9)
    plain = solve_flow(segs, nodes, **cfg()).segments["flow_nl_min"].to_numpy()
    assert np.abs(dissected - plain).max() <= 1e-8 * np.abs(plain).max()


def test_cut_off_trees_take_the_volume_s_trunk_classes():
    # A volume whose main piece has a narrow trunk (4 µm) feeding a small
    # capillary mesh drained by a wide one (6 µm), and two trees the volume
    # cut off from the mesh: one from a 6 µm root, one from a 4 µm root.
    # Nothing in a tree alone tells whether it feeds or drains (module notes
    # of pipeline/flow/boundary.py); the volume's classes do: narrow trunks feed,
    # wide ones drain (penetrating venules are wider than arterioles in
    # rodent cortex, from memory). Flow runs from the leaves to the 6 µm root
    # and from the 4 µm root to the leaves.
    u = np.array([0, 1, 1, 2, 2, 3, 4, 6, 7, 7, 10, 11, 11])
    v = np.array([1, 2, 3, 3, 4, 4, 5, 7, 8, 9, 11, 12, 13])
    r = np.array([4.0, 2.0, 2.0, 2.0, 2.0, 2.0, 6.0, 6.0, 4.76, 4.76, 4.0, 3.17, 3.17])
    L = np.array([100.0, 80.0, 80.0, 60.0, 80.0, 80.0, 100.0, 90.0, 70.0, 70.0, 90.0, 60.0, 60.0])
    ends = (0, 5, 6, 8, 9, 10, 12, 13)
    segs, nodes = tables(u, v, L, r, {e: "border" for e in ends})
    q = solve_flow(segs, nodes, **cfg()).segments.set_index("segment_id")["flow_nl_min"]
    assert q[0] > 0 and q[6] > 0  # the main piece: 4 µm trunk in, 6 µm trunk out
    assert q[7] < 0 and q[8] < 0 and q[9] < 0  # the 6 µm tree drains to its root (node 6)
    assert q[10] > 0 and q[11] > 0 and q[12] > 0  # the 4 µm tree feeds from its root (node 10)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_trunk_classes_split_as_otsus_threshold(seed):
    # The trunks' two width classes are split by Otsu's rule (Otsu 1979,
    # IEEE Trans Syst Man Cybern 9:62); the reference is scikit-image's
    # threshold_otsu on the same values (values <= threshold are the lower
    # class). Its threshold is a bin centre of a 4096-bin histogram, so it
    # can sit up to one bin width below the last value of the lower class;
    # the values are kept at least 0.01 apart in log radius (about 60 bins)
    # so that no bin holds two of them.
    from skimage.filters import threshold_otsu

    from pipeline.flow.boundary import _two_classes

    rng = np.random.default_rng(seed)
    narrow = np.log(rng.uniform(5.5, 7.5, 12))
    wide = np.log(rng.uniform(9.0, 10.5, 5))
    x = np.sort(np.r_[narrow, wide])
    x = x[np.r_[True, np.diff(x) >= 0.01]]
    j = _two_classes(x)
    t = threshold_otsu(x, nbins=4096)
    bin_width = (x[-1] - x[0]) / 4096
    assert x[j] - bin_width <= t < x[j + 1]


@pytest.mark.parametrize("seed", range(3, 12))
def test_cut_cortex_network_directions_on_held_out_seeds(seed):
    # Crops of seeds never used to choose a setting (same 300 µm crops as
    # above). Measured: 84, 89, 82, 77, 62, 80, 73, 77, 81 % of directions
    # right for seeds 3-11. Two rules guard against whole pieces coming out
    # reversed, which is what 0.6 catches (chance is 50 %):
    # - trunks split by Otsu's rule: seed 3's trunk radii have no gap of
    #   1.2, and the largest-gap split left its piece unclassed (49 %);
    # - a piece started from trunk classes keeps their orientation: seed 9
    #   was reversed by the objective's comparison (29 %), seed 10 in part
    #   (74 %).
    right, _ = cortex_crop_estimate(seed, 300.0)
    assert right >= 0.6
