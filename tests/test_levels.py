"""Roots, branching levels and Strahler orders on hand-made graphs.

The graphs are built directly as ``segments``/``nodes`` tables, so these
tests check the ordering logic independently of the image steps.
"""

from collections import deque

import networkx as nx
import numpy as np
import pandas as pd
import pytest

from pipeline.errors import ConfigError, InputError
from pipeline.levels import (
    assign_levels,
    choose_roots,
    compute_levels,
    level_table,
)


def tables(edges, kinds=None, radius=1.0, length=10.0, positions=None):
    """Tables from ``edges`` [(u, v) or (u, v, radius_um)]; kinds by degree unless given."""
    rows = []
    for i, e in enumerate(edges):
        r = e[2] if len(e) > 2 else radius
        rows.append({"segment_id": i, "node_from": e[0], "node_to": e[1], "length_um": length, "radius_um": r})
    segs = pd.DataFrame(rows)
    ids = sorted({e[0] for e in edges} | {e[1] for e in edges} | set(kinds or {}))
    deg = {n: 0 for n in ids}
    for e in edges:
        deg[e[0]] += 1
        deg[e[1]] += 1
    kind = {n: ("blind" if deg[n] == 1 else "junction") for n in ids}
    kind.update(kinds or {})
    pos = positions or {n: (0.0, 0.0, float(n)) for n in ids}
    nodes = pd.DataFrame({
        "node_id": ids,
        "z_um": [pos[n][0] for n in ids], "y_um": [pos[n][1] for n in ids], "x_um": [pos[n][2] for n in ids],
        "degree": [deg[n] for n in ids], "kind": [kind[n] for n in ids], "radius_um": 1.0,
    })
    return segs, nodes


def binary_tree(generations, r0=8.0):
    """Root segment 0-1, then ``generations`` rounds of bifurcation (cube law radii).

    Returns the tables; segment generation g has 2**g segments.
    """
    edges, kinds = [(0, 1, r0)], {0: "border"}
    frontier, nxt = [(1, r0)], 2
    for g in range(generations):
        new = []
        for node, r in frontier:
            for _ in range(2):
                rc = r / 2 ** (1 / 3)
                edges.append((node, nxt, rc))
                new.append((nxt, rc))
                nxt += 1
        frontier = new
    for node, _ in frontier:
        kinds[node] = "border"
    return tables(edges, kinds)


# --- Horton–Strahler -------------------------------------------------------

def test_complete_binary_tree_root_order():
    # Strahler 1957 (Trans Am Geophys Union 38:913): two order-i streams make
    # order i+1. A complete binary tree with 8 terminal segments (3 rounds of
    # bifurcation below the root segment) therefore has root order 4.
    segs, nodes = binary_tree(3)
    out = assign_levels(segs, nodes, [0])
    assert (out["strahler"] == 1).sum() == 8
    assert out.loc[out["segment_id"] == 0, "strahler"].item() == 4
    # Every generation has one order: generation g is order 4 - g.
    assert list(out["strahler"].to_numpy()) == [4] + [3] * 2 + [2] * 4 + [1] * 8


def test_comb_stays_order_two():
    # Horton 1945 / Strahler 1957: joining a lower order does not raise the
    # order, so a main vessel with single terminal side branches is order 2
    # along its whole length (its last piece, itself terminal, is order 1).
    main = list(range(0, 7))
    edges = [(main[i], main[i + 1]) for i in range(len(main) - 1)]
    for k, j in enumerate(main[1:-1]):
        edges.append((j, 100 + k))
    segs, nodes = tables(edges, {0: "border"})
    out = assign_levels(segs, nodes, [0]).set_index("segment_id")
    main_ids = list(range(len(main) - 1))
    assert list(out.loc[main_ids[:-1], "strahler"]) == [2] * (len(main_ids) - 1)
    assert out.loc[main_ids[-1], "strahler"] == 1
    assert (out.loc[len(main_ids):, "strahler"] == 1).all()


def test_multifurcation_counts_like_bifurcations():
    # Three order-1 daughters: at least two share the top order, so the parent is 2.
    segs, nodes = tables([(0, 1), (1, 2), (1, 3), (1, 4)], {0: "border"})
    out = assign_levels(segs, nodes, [0])
    assert out["strahler"].tolist() == [2, 1, 1, 1]


# --- branching levels -------------------------------------------------------

@pytest.mark.parametrize("generations", [1, 2, 3, 5])
def test_dichotomous_tree_has_2_power_l_segments_per_level(generations):
    # A symmetric dichotomous tree: level l holds 2**l segments by construction.
    segs, nodes = binary_tree(generations)
    out = assign_levels(segs, nodes, [0])
    counts = out["level"].value_counts().sort_index()
    assert counts.index.tolist() == list(range(generations + 1))
    assert counts.tolist() == [2**lev for lev in range(generations + 1)]


def test_loop_level_is_fewest_junctions():
    # Root 0-1; from junction 1 a chain 1-2-3-4 through junctions 2 and 3
    # (side branches 2-20, 3-30) and a long bypass 1-4; then 4-5.
    edges = [(0, 1), (1, 2), (2, 3), (3, 4), (1, 4), (4, 5), (2, 20), (3, 30)]
    segs, nodes = tables(edges, {0: "border"})
    segs.loc[4, "length_um"] = 1000.0  # the bypass is long: length must not matter
    out = assign_levels(segs, nodes, [0])
    got = dict(zip(out["segment_id"], out["level"]))
    # Hand count of junctions passed on the best path to each segment.
    assert got == {0: 0, 1: 1, 4: 1, 2: 2, 3: 2, 5: 2, 6: 2, 7: 3}
    assert out["strahler"].notna().all() and (out["strahler"] >= 1).all()


def _brute_levels(segs, root):
    """Independent 0-1 BFS over segments (pure Python) for comparison."""
    ends = {}
    for s, u, v in zip(segs["segment_id"], segs["node_from"], segs["node_to"]):
        ends[s] = (u, v)
    inc = {}
    for s, (u, v) in ends.items():
        inc.setdefault(u, []).append(s)
        inc.setdefault(v, []).append(s)
    deg = {n: len(lst) for n, lst in inc.items()}
    best = {s: 0 for s in inc.get(root, [])}
    dq = deque(best)
    while dq:
        s = dq.popleft()
        for n in set(ends[s]):
            cost = 1 if deg[n] >= 3 else 0
            for t in inc[n]:
                if t != s and best.get(t, 10**9) > best[s] + cost:
                    best[t] = best[s] + cost
                    (dq.append if cost else dq.appendleft)(t)
    return best


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_levels_match_brute_force_on_random_looped_graph(seed):
    rng = np.random.default_rng(seed)
    g = nx.convert_node_labels_to_integers(nx.grid_2d_graph(7, 7))
    keep = [e for e in g.edges if rng.random() < 0.8]
    segs, nodes = tables(keep)
    root = int(segs["node_from"].iloc[0])
    out = assign_levels(segs, nodes, [root])
    expected = _brute_levels(segs, root)
    for s, lev in zip(out["segment_id"], out["level"]):
        if s in expected:
            assert lev == expected[s]
        else:
            assert lev is pd.NA


def test_unreached_segments_are_na_and_reported():
    segs, nodes = tables([(0, 1), (1, 2), (1, 3), (10, 11)], {0: "border"})
    notes = []
    out = assign_levels(segs, nodes, [0], notes=notes)
    assert str(out["level"].dtype) == "Int64"
    assert out["level"].isna().tolist() == [False, False, False, True]
    assert out["strahler"].isna().tolist() == [False, False, False, True]
    assert any("not connected" in n for n in notes)
    table = level_table(segs.merge(out, on="segment_id"))
    assert table["level"].isna().iloc[-1] and table["n_segments"].iloc[-1] == 1


def test_parent_ids_follow_the_tree():
    segs, nodes = binary_tree(2)
    out = assign_levels(segs, nodes, [0]).set_index("segment_id")
    assert out.loc[0, "parent_segment_id"] is pd.NA
    assert out.loc[[1, 2], "parent_segment_id"].tolist() == [0, 0]
    assert out.loc[[3, 4], "parent_segment_id"].tolist() == [1, 1]


# --- diameter-defined orders (more in tests/test_orders.py) ----------------

def test_diameter_order_column_on_tree_agrees_with_strahler_when_separated():
    # Cube-law tree: diameters of successive orders differ by 2^(1/3) and do
    # not overlap, so the diameter-defined order equals the Strahler order.
    segs, nodes = binary_tree(4)
    out = assign_levels(segs, nodes, [0])
    assert out["strahler_diameter"].tolist() == out["strahler"].tolist()


# --- level table -----------------------------------------------------------

def test_level_table_ratios():
    segs, nodes = binary_tree(3)
    out = assign_levels(segs, nodes, [0])
    table = level_table(segs.merge(out, on="segment_id"))
    assert table.columns.tolist() == [
        "level", "n_segments", "radius_mean_um", "radius_sd_um", "length_total_um", "length_mean_um",
        "branching_ratio", "radius_ratio", "length_ratio",
    ]
    assert table["n_segments"].tolist() == [1, 2, 4, 8]
    assert np.isnan(table["branching_ratio"].iloc[0])
    # Cube law (Murray 1926, PNAS 12:207) for a symmetric split: r1 / r0 = 2^(-1/3).
    np.testing.assert_allclose(table["branching_ratio"].iloc[1:], 2.0)
    np.testing.assert_allclose(table["radius_ratio"].iloc[1:], 2 ** (-1 / 3), rtol=1e-12)
    np.testing.assert_allclose(table["length_total_um"], [10.0, 20.0, 40.0, 80.0])
    by_order = level_table(segs.merge(out, on="segment_id"), by="strahler")
    assert by_order["strahler"].tolist() == [1, 2, 3, 4]


# --- roots -----------------------------------------------------------------

def test_auto_root_is_widest_border_end():
    segs, nodes = tables([(0, 1, 3.0), (1, 2, 5.0), (1, 3, 2.0)], {0: "border", 2: "border", 3: "blind"})
    notes = []
    assert choose_roots(nodes, segs, root="auto", notes=notes) == [2]
    assert any("auto chose node 2" in n for n in notes)


def test_auto_root_falls_back_to_widest_end_and_records_it():
    segs, nodes = tables([(0, 1, 3.0), (1, 2, 5.0), (1, 3, 2.0)])
    notes = []
    assert choose_roots(nodes, segs, root="auto", notes=notes) == [2]
    assert any("no border end" in n for n in notes)


def test_auto_root_on_closed_loop_only():
    segs, nodes = tables([(0, 1, 2.0), (1, 2, 4.0), (2, 0, 1.0)])
    notes = []
    assert choose_roots(nodes, segs, root="auto", notes=notes) == [1]
    assert any("only closed loops" in n for n in notes)


@pytest.mark.parametrize(
    "spec, expected",
    [(2, [2]), ("node:3", [3]), ((0.0, 0.0, 2.9), [3]), ("0, 0, 0.2", [0]), ([0, 0, 1.4], [1])],
)
def test_explicit_roots(spec, expected):
    segs, nodes = tables([(0, 1), (1, 2), (1, 3)])
    assert choose_roots(nodes, segs, root=spec) == expected


def test_inlets_replace_auto_and_add_to_explicit_root():
    segs, nodes = tables([(0, 1), (1, 2), (1, 3)], {0: "border"})
    assert choose_roots(nodes, segs, root="auto", inlets=[3, 2]) == [3, 2]
    assert choose_roots(nodes, segs, root="node:0", inlets=[3]) == [0, 3]


@pytest.mark.parametrize("spec, error", [(99, InputError), ("node:99", InputError), ("left", ConfigError),
                                         (True, ConfigError), ("1,2", ConfigError)])
def test_bad_roots_raise(spec, error):
    segs, nodes = tables([(0, 1), (1, 2)])
    with pytest.raises(error):
        choose_roots(nodes, segs, root=spec)


def test_compute_levels_takes_the_levels_options():
    segs, nodes = binary_tree(2)
    table, roots = compute_levels(segs, nodes, root="node:0")
    assert roots == [0]
    assert table["level"].tolist() == [0, 1, 1, 2, 2, 2, 2]
    with pytest.raises(TypeError):
        compute_levels(segs, nodes, nosuch=1)
    with pytest.raises(ConfigError):
        compute_levels(segs, nodes, diameter_order_max_iter=0)
