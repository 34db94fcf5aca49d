"""Reconnection of broken thin vessels (``pruning.reconnect_gaps``, :func:`pipeline.gaps.reconnect_gaps`).

End to end on rasterised tubes cut by slabs of background, and on hand-made
centreline voxel sets for the geometry of the rule (direction, distance,
splitting a vessel into a junction).
"""

import numpy as np
import pytest

import pipeline
from pipeline import synthetic
from pipeline.centrelines import Centrelines
from pipeline.gaps import reconnect_gaps
from pipeline.graph import build_graph
from pipeline.pruning import prune_graph

# The pieces of a cut 2 µm tube hold about 30 µm x pi x 4 µm² = 380 µm³,
# below the default speck size (1000 µm³), so the clean-up would drop them
# before any graph is built; flow and Murray checks are not what is tested.
_CFG = {"cleaning": {"min_object_volume_um3": 100.0}, "flow": {"enabled": False},
        "bifurcations": {"enabled": False}}


@pytest.fixture(scope="module")
def tube():
    """A 60 µm long, 2 µm radius tube along x at 1 µm voxels, face to face, and its analysis."""
    mask, truth = synthetic.rasterize(synthetic.straight_tube(length_um=60.0, radius_um=2.0), spacing=(1, 1, 1))
    return mask, truth, pipeline.analyze(mask, spacing=(1, 1, 1), config=_CFG)


def _cut(mask, gap):
    m = mask.copy()
    x0 = m.shape[2] // 2
    m[:, :, x0:x0 + gap] = False  # a slab across the tube, ``gap`` voxels long
    return m


def _analyze(mask, on, **pruning):
    cfg = {**_CFG, "pruning": {"reconnect_gaps": on, **pruning}}
    return pipeline.analyze(mask, spacing=(1, 1, 1), config=cfg)


@pytest.mark.parametrize("gap", [1, 2, 3])
def test_cut_tube_is_one_vessel_again(tube, gap):
    mask, truth, intact = tube
    off = _analyze(_cut(mask, gap), False)
    assert len(off.segments) == 2  # the cut really breaks it
    res = _analyze(_cut(mask, gap), True)
    assert len(res.segments) == 1 and bool(res.segments["reconnected"].iloc[0])
    assert res.run["counts"]["gaps_reconnected"] == 1
    assert sorted([res.segments["end_from"].iloc[0], res.segments["end_to"].iloc[0]]) == ["border", "border"]
    # Analytic geometry: the tube is 60 µm face to face (the truth records
    # it), the bridge a straight line on its axis. Half a voxel at either
    # border face is what quantisation allows the intact tube too.
    assert res.segments["length_um"].iloc[0] == pytest.approx(truth["segments"][0]["length_um"], abs=1.0)
    assert res.segments["length_um"].iloc[0] == pytest.approx(intact.segments["length_um"].iloc[0], abs=1.0)


def test_gap_beyond_the_limit_stays_open(tube):
    mask, _, _ = tube
    res = _analyze(_cut(mask, 4), True)  # one voxel more than max_gap_voxels (3)
    assert len(res.segments) == 2 and not res.segments["reconnected"].any()
    assert res.run["counts"]["gaps_reconnected"] == 0
    # ... and the limit is the config key's: 4 voxels bridge with a limit of 4.
    assert len(_analyze(_cut(mask, 4), True, max_gap_voxels=4.0).segments) == 1


def test_option_off_changes_nothing(tube):
    mask, _, intact = tube
    default = pipeline.analyze(_cut(mask, 2), spacing=(1, 1, 1), config=_CFG)
    off = _analyze(_cut(mask, 2), False)
    assert default.run["config"]["pruning"]["reconnect_gaps"] is False
    assert default.run["counts"]["gaps_reconnected"] == 0
    assert not default.segments["reconnected"].any()
    assert default.segments.equals(off.segments)
    # Nothing to bridge: on and off give the same tables.
    on = _analyze(mask, True)
    assert on.segments.equals(intact.segments) and on.run["counts"]["gaps_reconnected"] == 0


# --- the rule's geometry on hand-made centrelines (1 µm voxels) ---

def _centrelines(pieces, border=()):
    """Centreline voxels of ``pieces`` (list of (voxel list, radius)); ``border`` voxels are cut by the face."""
    rad = {}
    for vox, r in pieces:
        for v in vox:
            rad[tuple(v)] = r
    vox = np.asarray(sorted(rad), dtype=np.int64)
    return Centrelines(voxels=vox, positions_um=vox.astype(float), radii_um=np.array([rad[tuple(v)] for v in vox]),
                       grid_spacing=(1.0, 1.0, 1.0), grid_shape=tuple(vox.max(0) + 1),
                       on_border=np.array([tuple(v) in border for v in vox]), resampled=False)


def _line(a, b):
    a, b = np.asarray(a), np.asarray(b)
    n = int(np.abs(b - a).max())
    return [tuple(np.rint(a + (b - a) * t / n).astype(int)) for t in range(n + 1)]


def _pruned(pieces, border, reconnect):
    g = build_graph(_centrelines(pieces, border))
    prune_graph(g, min_fragment_length_um=1.0, reconnect=reconnect, spacing_um=(1.0, 1.0, 1.0), voxel_um=1.0)
    return g


def _components(g):
    import networkx as nx

    G = nx.MultiGraph()
    G.add_nodes_from(np.flatnonzero(g.node_alive).tolist())
    G.add_edges_from(g.seg_nodes.values())
    return nx.number_connected_components(G)


def test_parallel_tubes_side_by_side_are_not_joined():
    # Two parallel vessels 4 voxels apart (surfaces 2 apart) whose blind ends
    # lie side by side: each end points along its own axis, at nothing.
    a = _line((5, 5, 0), (5, 5, 20))
    b = _line((5, 9, 40), (5, 9, 18))
    g = _pruned([(a, 1.0), (b, 1.0)], {(5, 5, 0), (5, 9, 40)}, True)
    assert g.counts["gaps_reconnected"] == 0 and len(g.seg_nodes) == 2


def test_collinear_ends_beyond_the_limit_are_not_joined():
    # Tips 6 voxels apart on one axis: a gap of 5 voxels, over the limit of 3.
    a = _line((5, 5, 0), (5, 5, 20))
    b = _line((5, 5, 26), (5, 5, 46))
    g = _pruned([(a, 1.0), (b, 1.0)], {(5, 5, 0), (5, 5, 46)}, True)
    assert g.counts["gaps_reconnected"] == 0 and _components(g) == 2


def test_end_pointing_away_is_not_joined_but_facing_is():
    # A vessel's blind tip at x = 20 points along +x. A thicker vessel across
    # it (along y) 3 voxels behind the tip and 4 above it: the line to it is
    # 127 degrees off the tip's direction (atan2(4, -3)). In front of the tip,
    # 4 voxels ahead, the same vessel is within the angle and its surface
    # 4 - 1.5 - 0.5 = 2 voxel layers away.
    tip = _line((5, 5, 0), (5, 5, 20))
    behind = _line((9, 0, 17), (9, 12, 17))
    g = _pruned([(tip, 1.0), (behind, 1.5)], {(5, 5, 0), (9, 0, 17), (9, 12, 17)}, True)
    assert g.counts["gaps_reconnected"] == 0 and _components(g) == 2
    ahead = _line((5, 0, 24), (5, 12, 24))
    g = _pruned([(tip, 1.0), (ahead, 1.5)], {(5, 5, 0), (5, 0, 24), (5, 12, 24)}, True)
    assert g.counts["gaps_reconnected"] == 1 and _components(g) == 1


def test_daughter_cut_off_at_its_start_gets_its_junction_back():
    # A parent (radius 2) along x and a daughter (radius 1) leaving it at 45
    # degrees from (5, 5, 20), its first 5 voxels missing: its tip at
    # (5, 10, 25) points at the branch point, 5 sqrt(2) = 7.1 voxels away,
    # 7.1 - 2 (parent radius) - 0.5 = 4.6 voxel layers along the diagonal
    # of a y-x plane (a layer there is 2 / sqrt(2) = 1.41 voxels: 3.3 layers).
    parent = _line((5, 5, 0), (5, 5, 40))
    daughter = _line((5, 10, 25), (5, 25, 40))
    border = {(5, 5, 0), (5, 5, 40), (5, 25, 40)}
    off = _pruned([(parent, 2.0), (daughter, 1.0)], border, False)
    assert off.counts["gaps_reconnected"] == 0 and _components(off) == 2
    assert (off.degrees() >= 3).sum() == 0
    g = _pruned([(parent, 2.0), (daughter, 1.0)], border, True)
    deg = g.degrees()
    assert g.counts["gaps_reconnected"] == 1 and _components(g) == 1
    junctions = np.flatnonzero((deg == 3) & g.node_alive)
    assert len(junctions) == 1 and len(g.seg_nodes) == 3
    # The junction lies on the parent's axis within one parent radius of the
    # true branch point (geometry of the construction); the junction
    # refinement then moves it to where the three axes meet.
    assert np.linalg.norm(g.node_pos_um[junctions[0]] - (5, 5, 20)) <= 2.0
    # Only the daughter's segment holds the bridge.
    flagged = [s for s in g.seg_nodes if s in g.seg_reconnected]
    assert len(flagged) == 1
    u, v = g.seg_nodes[flagged[0]]
    assert junctions[0] in (u, v)


def test_reconnect_gaps_alone_joins_facing_tips_into_one_segment():
    # Called on its own (not from prune_graph), two facing tips 3 voxels
    # apart merge into one segment: no degree-2 node is left behind.
    a = _line((5, 5, 0), (5, 5, 20))
    b = _line((5, 5, 23), (5, 5, 43))
    g = build_graph(_centrelines([(a, 1.0), (b, 1.0)], {(5, 5, 0), (5, 5, 43)}))
    assert reconnect_gaps(g, spacing_um=1.0) == 1
    assert len(g.seg_nodes) == 1
    (s,) = g.seg_nodes
    assert s in g.seg_reconnected
    assert g.seg_length_um[s] == pytest.approx(43.0)  # straight from x = 0 to x = 43
    # Bridge points at most one grid step apart, radii interpolated (both 1 here).
    assert np.all(np.linalg.norm(np.diff(g.seg_path[s], axis=0), axis=1) <= 1.0 + 1e-9)
    assert np.allclose(g.seg_radii[s], 1.0)
