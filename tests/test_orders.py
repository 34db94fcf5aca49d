"""Diameter-defined Strahler orders, elements and the connectivity matrix.

The ordering rules are those of Kassab GS, Rider CA, Tang NJ, Fung YC (1993),
Am J Physiol 265:H350 (from memory: the full text could not be checked):
terminal segments are order 1; where two or more daughters of highest order
n meet, the parent is n + 1 only if its diameter exceeds
b_n = [(D_n + SD_n) + (D_{n+1} - SD_{n+1})] / 2, else n; otherwise the
parent takes its highest daughter's order; D and SD are recomputed from the
orders and the ordering repeated until nothing changes. Elements are
segments of one order in series; C(m, n) is the number of order-m elements
springing from order-n elements over the number of order-n elements.
"""

import math

import networkx as nx
import numpy as np
import pandas as pd
import pytest
from scipy import stats

import pipeline
from pipeline import synthetic
from pipeline.levels import assign_levels, compute_levels
from pipeline.orders import (
    CONNECTIVITY_COLUMNS,
    ORDER_COLUMNS,
    compute_orders,
    connectivity_table,
    horton_ratios,
    kassab_orders,
    order_elements,
    order_table,
)
from pipeline.tables import RESULT_FILES, load_result, verify_result, write_result


def tree_tables(parent, diameter, length, root_kind="border"):
    """Segment/node tables of a tree given per segment its parent row (-1: root) and size.

    Segment i runs from node ``parent node`` to node i + 1; the root segment
    starts at node 0.
    """
    parent = list(parent)
    segs = pd.DataFrame({
        "segment_id": np.arange(len(parent)),
        "node_from": [0 if p < 0 else p + 1 for p in parent],
        "node_to": np.arange(1, len(parent) + 1),
        "length_um": np.asarray(length, float),
        "radius_um": np.asarray(diameter, float) / 2,
    })
    ids = np.arange(len(parent) + 1)
    deg = np.bincount(np.r_[segs["node_from"], segs["node_to"]], minlength=len(ids))
    nodes = pd.DataFrame({"node_id": ids, "z_um": 0.0, "y_um": 0.0, "x_um": ids.astype(float),
                          "kind": ["border" if i == 0 else ("blind" if deg[i] == 1 else "junction") for i in ids]})
    return segs, nodes


def ordered(segs, nodes, root=0, **kw):
    lv = assign_levels(segs, nodes, [root], **kw)
    return segs.merge(lv, on="segment_id")


# --- the hand-worked tree ----------------------------------------------------

# Segment: parent, diameter (µm). Lengths 10 µm except segment 1 (30 µm).
#
#                 0 (24)
#          1 (16)        2 (16)
#      3 (10)  4 (10)   5 (10)   6 (5)
#     7  8    9  10    11  12   13  14       7-12: 6 µm, 13-14: 4 µm
HAND_PARENT = [-1, 0, 0, 1, 1, 2, 2, 3, 3, 4, 4, 5, 5, 6, 6]
HAND_DIAM = [24, 16, 16, 10, 10, 10, 5, 6, 6, 6, 6, 6, 6, 4, 4]
HAND_LEN = [10, 30] + [10] * 13


def test_hand_worked_tree_orders():
    # Strahler start (Strahler 1957): 7-14 -> 1; 3, 4, 5, 6 -> 2; 1, 2 -> 3; 0 -> 4.
    # Round 1, statistics of the Strahler orders (sample SD):
    #   order 1: six 6s and two 4s: D = 44/8 = 5.5, SS = 6*0.25 + 2*2.25 = 6, SD = sqrt(6/7) = 0.92582
    #   order 2: 10, 10, 10, 5: D = 8.75, SS = 3*1.5625 + 14.0625 = 18.75, SD = sqrt(6.25) = 2.5
    #   order 3: 16, 16: D = 16, SD = 0; order 4: 24, SD = 0 (one segment)
    #   b1 = (5.5 + 0.92582 + 8.75 - 2.5) / 2 = 6.3379; b2 = (8.75 + 2.5 + 16 - 0) / 2 = 13.625; b3 = 20
    # From the periphery: 7-14 -> 1; 3, 4, 5 (two order-1 daughters, 10 > b1) -> 2;
    # 6 (two order-1 daughters, 5 < b1) -> 1; 1 (two order-2 daughters, 16 > b2) -> 3;
    # 2 (daughters 5: order 2, 6: order 1) -> 2; 0 (daughters 1: 3, 2: 2) -> 3.
    # Round 2: order 1: six 6s, two 4s, one 5: D = 49/9 = 5.4444, SS = 6.2222, SD = sqrt(6.2222/8) = 0.88192
    #   order 2: 16, 10, 10, 10: D = 11.5, SS = 27, SD = 3; order 3: 24, 16: D = 20, SD = sqrt(32) = 5.6569
    #   b1 = (5.4444 + 0.88192 + 11.5 - 3) / 2 = 7.4132; b2 = (11.5 + 3 + 20 - 5.6569) / 2 = 14.4216
    #   order 4 is empty: no bound above order 3.
    # Same orders again (10 > 7.41, 5 < 7.41, 16 > 14.42): converged, in 2 rounds.
    expected = [3, 3, 2, 2, 2, 2, 1, 1, 1, 1, 1, 1, 1, 1, 1]
    got, converged, rounds = kassab_orders(np.array(HAND_PARENT), np.array(HAND_DIAM, float))
    assert got.tolist() == expected
    assert converged and rounds == 2
    # The same through the levels step's orientation and column.
    segs, nodes = tree_tables(HAND_PARENT, HAND_DIAM, HAND_LEN)
    out = ordered(segs, nodes)
    assert out["strahler"].tolist() == [4, 3, 3, 2, 2, 2, 2] + [1] * 8
    assert out["strahler_diameter"].tolist() == expected


def test_hand_worked_tree_elements_table_and_connectivity():
    segs, nodes = tree_tables(HAND_PARENT, HAND_DIAM, HAND_LEN)
    res = compute_orders(ordered(segs, nodes))
    el = dict(zip(res.segments["segment_id"], res.segments["element_id"]))
    # Elements (segments of one order in series): {0, 1} (order 3); {2, 5} (order 2: 5 is 2's only
    # order-2 daughter); {3}, {4} (order 2); {6, 13} (order 1: 13 and 14 are both order 1 and equally
    # wide, the smaller id continues); and {7} ... {12}, {14} (order 1). Numbered by first segment id.
    groups = {}
    for s, e in el.items():
        groups.setdefault(e, []).append(s)
    assert sorted(sorted(g) for g in groups.values()) == sorted(
        [[0, 1], [2, 5], [3], [4], [6, 13], [7], [8], [9], [10], [11], [12], [14]])
    assert el[0] == 0 and el[14] == 11
    t = res.table
    assert t.columns.tolist() == list(ORDER_COLUMNS)
    assert t["order"].tolist() == [1, 2, 3]
    assert t["n_elements"].tolist() == [8, 3, 1]
    assert t["n_segments"].tolist() == [9, 4, 2]
    # Element diameters, length-weighted means of their segments:
    #   order 3: (24*10 + 16*30) / 40 = 18; order 2: {2, 5}: (16 + 10) / 2 = 13, {3}: 10, {4}: 10
    #   -> mean 11, SD sqrt((4 + 1 + 1) / 2) = sqrt(3);
    #   order 1: {6, 13}: 4.5, six of 6, {14}: 4 -> mean 44.5 / 8 = 5.5625,
    #   SS = 1.0625^2 + 6 * 0.4375^2 + 1.5625^2 = 4.71875, SD = sqrt(4.71875 / 7).
    np.testing.assert_allclose(t["diameter_mean_um"], [5.5625, 11.0, 18.0], rtol=1e-12)
    np.testing.assert_allclose(t["diameter_sd_um"].iloc[:2], [math.sqrt(4.71875 / 7), math.sqrt(3.0)], rtol=1e-12)
    assert np.isnan(t["diameter_sd_um"].iloc[2])  # one element: no sample SD
    # Element lengths (sums): order 1: 20 and seven of 10 -> mean 11.25, SS = 76.5625 + 7 * 1.5625 = 87.5,
    # SD sqrt(12.5); order 2: 20, 10, 10 -> 40 / 3, SD sqrt(100/3); order 3: 40.
    np.testing.assert_allclose(t["length_mean_um"], [11.25, 40 / 3, 40.0], rtol=1e-12)
    np.testing.assert_allclose(t["length_sd_um"].iloc[:2], [math.sqrt(12.5), math.sqrt(100 / 3)], rtol=1e-12)
    # Connectivity (Kassab et al. 1993): from the order-3 element: 2 (off 0), 3 and 4 (off 1) -> C(2,3) = 3/1;
    # from the three order-2 elements: 6 (off 2), 11, 12 (off 5), 7, 8 (off 3), 9, 10 (off 4) -> 7 order-1
    # elements, C(1,2) = 7/3; from the eight order-1 elements: 14 (off 6) -> C(1,1) = 1/8. Every other C is 0.
    c = res.connectivity
    assert c.columns.tolist() == list(CONNECTIVITY_COLUMNS)
    C = {(int(r.daughter_order), int(r.parent_order)): r.connectivity for r in c.itertuples()}
    expected = {(m, n): 0.0 for m in (1, 2, 3) for n in (1, 2, 3)}
    expected.update({(2, 3): 3.0, (1, 2): 7 / 3, (1, 1): 1 / 8})
    assert C.keys() == expected.keys()
    for k, v in expected.items():
        assert C[k] == pytest.approx(v, rel=1e-12), k
    # Horton ratios: least squares of log10 on order, checked with scipy's linregress.
    slope_n = stats.linregress([1, 2, 3], np.log10([8, 3, 1])).slope
    slope_d = stats.linregress([1, 2, 3], np.log10([5.5625, 11.0, 18.0])).slope
    assert res.summary["n_orders"] == 3
    assert res.summary["horton_ratio_number"] == pytest.approx(10 ** -slope_n, rel=1e-12)
    assert res.summary["horton_ratio_diameter"] == pytest.approx(10 ** slope_d, rel=1e-12)


def test_round_limit_is_recorded():
    # The hand-worked tree needs two rounds (above); one allowed is not converged.
    got, converged, rounds = kassab_orders(np.array(HAND_PARENT), np.array(HAND_DIAM, float), max_iter=1)
    assert not converged and rounds == 1
    segs, nodes = tree_tables(HAND_PARENT, HAND_DIAM, HAND_LEN)
    notes = []
    assign_levels(segs, nodes, [0], max_iter=1, notes=notes)
    assert any("still changing after 1 rounds" in n for n in notes)
    notes = []
    assign_levels(segs, nodes, [0], notes=notes)
    assert any("converged in 2 round(s)" in n for n in notes)


# --- symmetric trees ------------------------------------------------------------

def symmetric_tree(depth, d0=64.0, l0=200.0):
    """A root segment and ``depth`` rounds of symmetric bifurcation, cube-law diameters."""
    parent, diam, gen = [-1], [d0], [0]
    frontier = [0]
    for g in range(1, depth + 1):
        nxt = []
        for p in frontier:
            for _ in range(2):
                parent.append(p)
                # Murray (1926, PNAS 12:207): d0^3 = 2 d^3 at a symmetric split
                diam.append(d0 * 2 ** (-g / 3))
                gen.append(g)
                nxt.append(len(parent) - 1)
        frontier = nxt
    diam = np.asarray(diam)
    return np.asarray(parent), diam, l0 * diam / d0, np.asarray(gen)


@pytest.mark.parametrize("depth", [1, 2, 3, 5, 7])
def test_symmetric_binary_tree(depth):
    parent, diam, length, gen = symmetric_tree(depth)
    segs, nodes = tree_tables(parent, diam, length)
    res = compute_orders(ordered(segs, nodes))
    t = res.table
    # A symmetric binary tree of depth n has n + 1 orders, generation g being order n + 1 - g, and
    # 2^(n+1-k) one-segment elements of order k (Horton 1945 / Strahler 1957 on a complete tree).
    assert res.summary["n_orders"] == depth + 1
    assert t["n_elements"].tolist() == [2 ** (depth + 1 - k) for k in range(1, depth + 2)]
    assert t["n_segments"].tolist() == t["n_elements"].tolist()
    # Branching ratio 2, and with cube-law diameters (Murray 1926) and length proportional to
    # diameter a diameter and length ratio of 2^(1/3); exact up to rounding (1e-9).
    assert res.summary["horton_ratio_number"] == pytest.approx(2.0, rel=1e-9)
    assert res.summary["horton_ratio_diameter"] == pytest.approx(2 ** (1 / 3), rel=1e-9)
    assert res.summary["horton_ratio_length"] == pytest.approx(2 ** (1 / 3), rel=1e-9)
    # Every element of order k > 1 has exactly two order-(k-1) daughters: C(k-1, k) = 2, all else 0.
    c = res.connectivity
    on = c["daughter_order"] == c["parent_order"] - 1
    np.testing.assert_array_equal(c.loc[on, "connectivity"], 2.0)
    np.testing.assert_array_equal(c.loc[~on, "connectivity"], 0.0)


def test_generator_binary_tree_tables():
    # The project's generator (cube law, symmetric): same expectations as above, from its own tables.
    net = synthetic.binary_tree(depth=4, root_radius_um=12.0, exponent=3.0, min_radius_um=1.0, seed=0)
    segs, nodes = synthetic.network_tables(net)
    assert len(segs) == 2 ** 5 - 1  # no end left blind for lack of room
    lv, roots = compute_levels(segs, nodes)
    res = compute_orders(segs.merge(lv, on="segment_id"))
    assert res.summary["n_orders"] == 5
    assert res.summary["horton_ratio_number"] == pytest.approx(2.0, rel=1e-9)
    # Murray (1926): radius ratio 2^(-1/3) per level; the generator's nominal radii are exact.
    assert res.summary["horton_ratio_diameter"] == pytest.approx(2 ** (1 / 3), rel=1e-6)


# --- invariants on random trees and looped beds -----------------------------------

def random_tree(seed, n_junctions=120):
    """A random tree grown at random ends with 2 or 3 daughters, radii from an asymmetric
    Murray split (exponent 2.3-3) with 15 % lognormal measurement noise."""
    rng = np.random.default_rng(seed)
    parent, true_d = [-1], [80.0]
    ends = [0]
    for _ in range(n_junctions):
        p = ends.pop(int(rng.integers(len(ends))))
        k = 2 if rng.random() < 0.85 else 3
        w = rng.dirichlet(np.ones(k) * 2.0)
        x = rng.uniform(2.3, 3.0)
        for wi in w:
            parent.append(p)
            true_d.append(true_d[p] * wi ** (1 / x))
            ends.append(len(parent) - 1)
    d = np.asarray(true_d) * rng.lognormal(0.0, 0.15, len(true_d))
    length = rng.uniform(5.0, 100.0, len(d))
    return np.asarray(parent), d, length


def reference_round(parent, diam, order):
    """One round of the rule in plain Python, the bounds from pandas' groupby (independent code)."""
    g = pd.Series(diam).groupby(order)
    mean, sd = g.mean(), g.std(ddof=1).fillna(0.0)
    bound = {n: (mean[n] + sd[n] + mean[n + 1] - sd[n + 1]) / 2 for n in mean.index if n + 1 in mean.index}
    kids = {}
    for s, p in enumerate(parent):
        kids.setdefault(p, []).append(s)
    out = {}

    def visit(s):
        ks = [visit(k) for k in kids.get(s, [])]
        if not ks:
            o = 1
        else:
            m = max(ks)
            o = m + 1 if ks.count(m) >= 2 and diam[s] > bound.get(m, math.inf) else m
        out[s] = o
        return o

    import sys
    old = sys.getrecursionlimit()
    sys.setrecursionlimit(max(old, 10 * len(parent)))
    try:
        for r in kids[-1]:
            visit(r)
    finally:
        sys.setrecursionlimit(old)
    return np.array([out[s] for s in range(len(parent))])


def check_invariants(parent, diam, length, strahler, order, sid):
    has = parent >= 0
    # no daughter outranks its parent; never above the Strahler order
    assert (order[has] <= order[parent[has]]).all()
    assert (order <= strahler).all() and (order >= 1).all()
    # the converged orders are a fixed point of the rule (Kassab et al. 1993)
    np.testing.assert_array_equal(reference_round(parent, diam, order), order)
    element, heads = order_elements(parent, order, diam, sid)
    # every element is one chain of segments of one order (networkx: a directed path)
    G = nx.DiGraph()
    G.add_nodes_from(range(len(parent)))
    G.add_edges_from((int(p), s) for s, p in enumerate(parent) if p >= 0 and element[p] == element[s])
    for comp in nx.weakly_connected_components(G):
        sub = G.subgraph(comp)
        assert len({element[s] for s in comp}) == 1 and len({order[s] for s in comp}) == 1
        assert all(sub.in_degree(s) <= 1 and sub.out_degree(s) <= 1 for s in comp)
    assert nx.number_weakly_connected_components(G) == len(heads) == element.max() + 1
    t = order_table(element, order, diam, length)
    assert t["n_segments"].sum() == len(order) and t["n_elements"].sum() == len(heads)
    c = connectivity_table(element, order, parent)
    # every element but the roots' springs from exactly one element
    assert c["n_daughter_elements"].sum() == len(heads) - int((parent < 0).sum())
    assert (c.loc[c["daughter_order"] > c["parent_order"], "n_daughter_elements"] == 0).all()


@pytest.mark.parametrize("seed", [0, 1, 2, 3, 4])
def test_random_trees(seed):
    parent, diam, length = random_tree(seed)
    out = ordered(*tree_tables(parent, diam, length))
    order, converged, rounds = kassab_orders(parent, diam)
    assert converged, rounds
    np.testing.assert_array_equal(out["strahler_diameter"].to_numpy(np.int64), order)
    check_invariants(parent, diam, length, out["strahler"].to_numpy(np.int64), order, np.arange(len(parent)))


def test_cycling_orders_stop_at_the_lower_state():
    # Some trees never settle: a couple of segments sit at a bound that their own move shifts back, so
    # the rounds alternate between two states (measured: 5 of 400 random trees of 50 junctions, period 2,
    # 2-3 segments flipping). Find such trees among seeds rather than rely on one.
    cases = []
    for seed in range(400):
        parent, diam, length = random_tree(seed, n_junctions=50)
        order, converged, rounds = kassab_orders(parent, diam, max_iter=500)
        if not converged:
            cases.append((parent, diam, length, order, rounds))
        if len(cases) == 3:
            break
    assert cases, "expected some trees whose orders cycle"
    for parent, diam, length, order, rounds in cases:
        assert rounds < 500  # stopped by the cycle, not the limit
        other = reference_round(parent, diam, order)
        assert not np.array_equal(other, order)
        # a two-state cycle of the rule (checked with the independent round), and the state kept has
        # the lower sum of orders
        np.testing.assert_array_equal(reference_round(parent, diam, other), order)
        assert order.sum() < other.sum()
        has = parent >= 0
        assert (order[has] <= order[parent[has]]).all()
    segs, nodes = tree_tables(parent, diam, length)
    notes = []
    assign_levels(segs, nodes, [0], notes=notes)
    assert any("they cycle" in n for n in notes)


def _bed_tables(kind, seed):
    if kind == "capillary_bed":
        net = synthetic.capillary_bed(shape_um=(120, 120, 120), radius_range_um=(2.0, 5.0), seed=seed)
        return synthetic.network_tables(net)
    rng = np.random.default_rng(seed)
    g = nx.convert_node_labels_to_integers(nx.grid_2d_graph(12, 12))
    kept = nx.Graph([e for e in g.edges if rng.random() < 0.85])
    edges = list(kept.subgraph(max(nx.connected_components(kept), key=len)).edges)
    segs = pd.DataFrame({"segment_id": np.arange(len(edges)), "node_from": [e[0] for e in edges],
                         "node_to": [e[1] for e in edges], "length_um": rng.uniform(10, 50, len(edges)),
                         "radius_um": rng.uniform(2.0, 6.0, len(edges))})
    ids = np.unique(np.r_[segs["node_from"], segs["node_to"]])
    nodes = pd.DataFrame({"node_id": ids, "z_um": 0.0, "y_um": ids // 12 * 20.0, "x_um": ids % 12 * 20.0,
                          "kind": "junction"})
    return segs, nodes


@pytest.mark.parametrize("kind", ["capillary_bed", "grid"])
@pytest.mark.parametrize("seed", [0, 1, 2])
def test_looped_beds(kind, seed):
    segs, nodes = _bed_tables(kind, seed)
    lv, roots = compute_levels(segs, nodes)
    seg = segs.merge(lv, on="segment_id")
    assert nx.cycle_basis(nx.Graph(list(zip(segs["node_from"], segs["node_to"])))), "expected loops"
    ok = seg["strahler_diameter"].notna().to_numpy()
    assert ok.mean() > 0.9  # the root's piece is (nearly) the whole bed
    # the diameter rule is exercised: some segments end below their Strahler order
    assert (seg.loc[ok, "strahler_diameter"] < seg.loc[ok, "strahler"]).any()
    sub = seg[ok].reset_index(drop=True)
    rows = pd.Index(sub["segment_id"])
    par = sub["parent_segment_id"]
    parent = np.where(par.isna(), -1, rows.get_indexer(par.fillna(-1).astype(np.int64)))
    assert (parent[par.notna().to_numpy()] >= 0).all()
    order = sub["strahler_diameter"].to_numpy(np.int64)
    _, converged, _ = kassab_orders(parent, 2 * sub["radius_um"].to_numpy(float))
    assert converged
    check_invariants(parent, 2 * sub["radius_um"].to_numpy(float), sub["length_um"].to_numpy(float),
                     sub["strahler"].to_numpy(np.int64), order, sub["segment_id"].to_numpy(np.int64))


def test_unreached_segments_have_no_order_or_element():
    segs, nodes = tree_tables([-1, 0, 0], [10, 6, 6], [10, 10, 10])
    extra = pd.DataFrame({"segment_id": [3], "node_from": [10], "node_to": [11], "length_um": [5.0],
                          "radius_um": [1.0]})
    nodes = pd.concat([nodes, pd.DataFrame({"node_id": [10, 11], "z_um": 0.0, "y_um": 5.0, "x_um": 0.0,
                                            "kind": "blind"})], ignore_index=True)
    res = compute_orders(ordered(pd.concat([segs, extra], ignore_index=True), nodes))
    assert res.segments["element_id"].isna().tolist() == [False, False, False, True]
    assert res.table["n_segments"].sum() == 3


def test_single_order_has_no_horton_ratio():
    t = order_table(np.array([0]), np.array([1]), np.array([5.0]), np.array([10.0]))
    assert horton_ratios(t) == {"n_orders": 1, "horton_ratio_number": None, "horton_ratio_diameter": None,
                                "horton_ratio_length": None}


# --- end to end -------------------------------------------------------------------

@pytest.fixture(scope="module")
def tree_result(tmp_path_factory):
    net = synthetic.binary_tree(depth=2, root_radius_um=6.0, exponent=3.0, seed=1, min_radius_um=2.0)
    mask, _ = synthetic.rasterize(net, spacing=(1.0, 1.0, 1.0))
    res = pipeline.analyze(mask, spacing=(1.0, 1.0, 1.0), config={"flow": {"enabled": False}})
    out = tmp_path_factory.mktemp("orders") / "result"
    write_result(res, out, run_info={"vesselflow_version": pipeline.__version__, "spacing_um": [1.0, 1.0, 1.0]})
    return res, out


def test_analyze_writes_orders(tree_result):
    res, out = tree_result
    assert {"orders.csv", "order_connectivity.csv"} <= set(RESULT_FILES)
    assert verify_result(out) == []
    back = load_result(out)
    t, seg = back.orders, back.segments
    assert t.columns.tolist() == list(ORDER_COLUMNS)
    assert back.order_connectivity.columns.tolist() == list(CONNECTIVITY_COLUMNS)
    # totals agree with the segments table
    assert t["n_segments"].sum() == seg["strahler_diameter"].notna().sum() == len(seg)
    assert t["n_elements"].sum() == seg["element_id"].nunique()
    # two rounds of bifurcation below the root: three orders (Strahler 1957 on a complete tree)
    assert back.summary["n_orders"] == 3 == len(t)
    for key in ("horton_ratio_number", "horton_ratio_diameter", "horton_ratio_length"):
        assert back.summary[key] is not None and back.summary[key] > 1
    assert back.summary["horton_ratio_number"] == pytest.approx(2.0, rel=1e-9)
