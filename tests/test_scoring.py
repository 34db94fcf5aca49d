"""Scoring a result against its ground truth: hand-built graphs, reference libraries, real phantoms, the CLI."""

import itertools
import json
from types import SimpleNamespace

import networkx as nx
import numpy as np
import pandas as pd
import pytest

import pipeline
from pipeline import scoring, synthetic
from pipeline.cli import main
from pipeline.errors import InputError
from pipeline.tables import RESULT_FILES, load_result

# --------------------------------------------------------------------------- #
# A hand-built Y and a result that is exactly it
# --------------------------------------------------------------------------- #

# Root (border) -> junction J along z (20 µm, r 4); two daughters of 15 µm
# (3-4-5 triangles: 12 µm along z, 9 µm along x, r 3) ending blind.
Y_NODES = {0: ((0.0, 20.0, 20.0), "border"), 1: ((20.0, 20.0, 20.0), "junction"),
           2: ((32.0, 20.0, 29.0), "blind"), 3: ((32.0, 20.0, 11.0), "blind")}
Y_SEGMENTS = [(0, 0, 1, 4.0), (1, 1, 2, 3.0), (2, 1, 3, 3.0)]  # id, from, to, radius
Y_LENGTH_UM = 20.0 + 15.0 + 15.0


def _truth(nodes, segments, spacing=(1.0, 1.0, 1.0)):
    deg = {n: 0 for n in nodes}
    for _, a, b, _ in segments:
        deg[a] += 1
        deg[b] += 1
    segs = []
    for sid, a, b, r in segments:
        pa, pb = np.asarray(nodes[a][0]), np.asarray(nodes[b][0])
        segs.append({"id": sid, "node_from": a, "node_to": b, "length_um": float(np.linalg.norm(pb - pa)),
                     "radius_um": r, "points_um": [list(pa), list(pb)], "radii_um": [r, r]})
    return {"format": scoring.TRUTH_FORMAT, "spacing": list(spacing),
            "nodes": [{"id": n, "kind": k, "pos_um": list(p), "degree": deg[n]} for n, (p, k) in nodes.items()],
            "segments": segs}


def _result(nodes, segments, *, moved=None, radii=None, lengths=None, id_shift=100):
    """A result with the same geometry, node ids shifted (ids need not agree with the truth's).

    ``moved``: {node: (dz, dy, dx)} shifts a node's table position only (not the centrelines);
    ``radii`` / ``lengths``: {segment: value} override the measured values.
    """
    deg = {n: 0 for n in nodes}
    for _, a, b, _ in segments:
        deg[a] += 1
        deg[b] += 1
    rows = []
    for n, (p, _) in nodes.items():
        q = np.asarray(p) + np.asarray((moved or {}).get(n, (0.0, 0.0, 0.0)))
        kind = "junction" if deg[n] >= 3 else "blind"
        rows.append({"node_id": n + id_shift, "z_um": q[0], "y_um": q[1], "x_um": q[2], "degree": deg[n],
                     "kind": kind})
    lines, segs = [], []
    for sid, a, b, r in segments:
        pa, pb = np.asarray(nodes[a][0]), np.asarray(nodes[b][0])
        lines.append(np.linspace(pa, pb, 25))
        segs.append({"segment_id": sid + id_shift, "node_from": a + id_shift, "node_to": b + id_shift,
                     "length_um": (lengths or {}).get(sid, float(np.linalg.norm(pb - pa))),
                     "radius_um": (radii or {}).get(sid, r)})
    return SimpleNamespace(segments=pd.DataFrame(segs), nodes=pd.DataFrame(rows), centrelines=lines,
                           spacing=(1.0, 1.0, 1.0))


def test_perfect_result_scores_perfect():
    s = scoring.score(_result(Y_NODES, Y_SEGMENTS), _truth(Y_NODES, Y_SEGMENTS))
    assert (s["junctions_true"], s["junctions_found"], s["junctions_matched"]) == (1, 1, 1)
    assert s["junction_precision"] == s["junction_recall"] == s["junction_f1"] == 1.0
    assert s["junction_offset_median_um"] == 0.0
    assert s["radius_rel_error_median"] == s["radius_rel_error_p90"] == s["radius_rel_bias"] == 0.0
    assert s["radius_segments_scored"] == s["radius_segments_eligible"] == 3
    assert s["length_truth_um"] == pytest.approx(Y_LENGTH_UM) and s["length_rel_error"] == pytest.approx(0.0)
    assert s["length_recall"] == pytest.approx(1.0) and s["length_precision"] == pytest.approx(1.0)
    assert (s["cycle_rank_truth"], s["cycle_rank_measured"], s["components_truth"], s["components_measured"]) \
        == (0, 0, 1, 1)
    assert [e["measured_segment_ids"] for e in s["radius_per_segment"]] == [[100], [101], [102]]
    json.dumps(s, allow_nan=False)  # plain JSON as it is


def test_radius_and_length_errors_by_hand():
    # Parent 10 % low, one daughter 10 % high, the other exact: |errors| = 0.1, 0.1, 0 -> median 0.1,
    # 90th percentile (linear) 0.1, signed median 0. Lengths 22 + 15 + 18 = 55 against 50: +10 %.
    res = _result(Y_NODES, Y_SEGMENTS, radii={0: 3.6, 1: 3.3}, lengths={0: 22.0, 2: 18.0})
    s = scoring.score(res, _truth(Y_NODES, Y_SEGMENTS))
    assert s["radius_rel_error_median"] == pytest.approx(0.1)
    assert s["radius_rel_error_p90"] == pytest.approx(0.1)
    assert s["radius_rel_bias"] == pytest.approx(0.0)
    assert [e["rel_error"] for e in s["radius_per_segment"]] == pytest.approx([-0.1, 0.1, 0.0])
    assert s["length_rel_error"] == pytest.approx(0.1)


def test_short_segments_and_junction_regions_are_left_out():
    # A 7 µm daughter of radius 3 is longer than 2 radii, and its last 1 µm lies farther than
    # 1.5 x 4 µm (the junction's match radius) from the junction; a 5 µm one is shorter than 2 radii.
    nodes = dict(Y_NODES)
    nodes[2] = ((20.0 + 7 * 0.8, 20.0, 20.0 + 7 * 0.6), "blind")
    nodes[3] = ((20.0 + 5 * 0.8, 20.0, 20.0 - 5 * 0.6), "blind")
    s = scoring.score(_result(nodes, Y_SEGMENTS), _truth(nodes, Y_SEGMENTS))
    assert [e["status"] for e in s["radius_per_segment"]] == ["scored", "scored", "short"]
    s = scoring.score(_result(nodes, Y_SEGMENTS), _truth(nodes, Y_SEGMENTS), junction_exclusion_radii=1.8)
    assert [e["status"] for e in s["radius_per_segment"]] == ["scored", "no_interior", "short"]
    assert s["radius_segments_eligible"] == 1


# Two junctions: J1 (parent radius 4) and J2 (largest meeting radius 3).
T_NODES = {0: ((0.0, 20.0, 20.0), "border"), 1: ((20.0, 20.0, 20.0), "junction"),
           2: ((32.0, 20.0, 29.0), "blind"), 3: ((32.0, 20.0, 11.0), "junction"),
           4: ((44.0, 20.0, 20.0), "blind"), 5: ((44.0, 20.0, 2.0), "blind")}
T_SEGMENTS = [(0, 0, 1, 4.0), (1, 1, 2, 3.0), (2, 1, 3, 3.0), (3, 3, 4, 2.0), (4, 3, 5, 2.0)]


@pytest.mark.parametrize("node, offset_um, floor_um, matched", [
    (1, 3.9, None, 2),   # within J1's parent radius, 4 µm
    (1, 4.1, None, 1),   # beyond it
    (3, 2.9, None, 2),   # J2: the largest radius meeting there is 3 µm
    (3, 3.1, None, 1),
    (1, 4.1, 5.0, 2),    # a floor above the parent radius widens the match radius
])
def test_moved_junction_beyond_the_match_radius_is_missed(node, offset_um, floor_um, matched):
    res = _result(T_NODES, T_SEGMENTS, moved={node: (0.0, offset_um, 0.0)})
    s = scoring.score(res, _truth(T_NODES, T_SEGMENTS), match_floor_um=floor_um)
    # By hand: two true, two found; precision = recall = F1 = matched / 2.
    assert (s["junctions_true"], s["junctions_found"], s["junctions_matched"]) == (2, 2, matched)
    assert s["junction_precision"] == s["junction_recall"] == s["junction_f1"] == pytest.approx(matched / 2)


def test_default_floor_is_one_voxel_diagonal():
    truth = _truth(Y_NODES, Y_SEGMENTS, spacing=(2.0, 1.0, 1.0))
    res = _result(Y_NODES, Y_SEGMENTS)
    res.spacing = (2.0, 1.0, 1.0)
    s = scoring.score(res, truth)
    assert s["settings"]["match_floor_um"] == pytest.approx(np.sqrt(6.0))
    assert s["settings"]["sample_step_um"] == pytest.approx(0.5)


# --------------------------------------------------------------------------- #
# Topology against networkx
# --------------------------------------------------------------------------- #

EXTRA = {
    "none": ({}, []),
    "loop": ({}, [(9, 2, 3, 2.0)]),                                   # joins the two blind ends
    "piece": ({7: ((0.0, 60.0, 0.0), "border"), 8: ((10.0, 60.0, 0.0), "border")}, [(9, 7, 8, 2.0)]),
    "two loops and a piece": ({7: ((0.0, 60.0, 0.0), "border"), 8: ((10.0, 60.0, 0.0), "border")},
                              [(9, 2, 3, 2.0), (10, 0, 2, 2.0), (11, 7, 8, 2.0)]),
}


@pytest.mark.parametrize("case", list(EXTRA))
def test_cycle_rank_matches_networkx(case):
    nodes = {**Y_NODES, **EXTRA[case][0]}
    segments = Y_SEGMENTS + EXTRA[case][1]
    res = _result(nodes, segments)
    s = scoring.score(res, _truth(Y_NODES, Y_SEGMENTS))
    # Reference: the length of networkx's cycle basis and its component count (simple graphs here).
    G = nx.Graph()
    G.add_nodes_from(nodes)
    G.add_edges_from((a, b) for _, a, b, _ in segments)
    assert s["cycle_rank_measured"] == len(nx.cycle_basis(G))
    assert s["components_measured"] == nx.number_connected_components(G)
    assert (s["cycle_rank_truth"], s["components_truth"]) == (0, 1)


def test_cycle_rank_counts_parallel_segments():
    # Two vessels between the same two nodes enclose one loop: E - V + C = 2 - 2 + 1, and a vessel
    # closing on its node one more (multigraphs, which networkx's cycle_basis does not take).
    assert scoring.cycle_rank(2, [0, 0], [1, 1]) == (1, 1)
    assert scoring.cycle_rank(2, [0, 0, 1], [1, 1, 1]) == (2, 1)
    assert scoring.cycle_rank(3, [], []) == (0, 3)
    assert scoring.cycle_rank(0, [], []) == (0, 0)


# --------------------------------------------------------------------------- #
# Coverage: spurious and missing length
# --------------------------------------------------------------------------- #


def test_spurious_piece_lowers_length_precision():
    nodes = {**Y_NODES, 7: ((0.0, 60.0, 0.0), "border"), 8: ((10.0, 60.0, 0.0), "border")}
    res = _result(nodes, Y_SEGMENTS + [(9, 7, 8, 2.0)])
    s = scoring.score(res, _truth(Y_NODES, Y_SEGMENTS))
    assert s["length_precision"] == pytest.approx(Y_LENGTH_UM / (Y_LENGTH_UM + 10.0))
    assert s["length_recall"] == pytest.approx(1.0)
    assert s["junction_f1"] == 1.0  # junction F1 alone does not see it


def test_missing_branch_lowers_length_recall():
    # Without daughter B, only its first a µm stay within r = 3 µm of the other daughter (angle
    # acos(0.28) = 73.7° apart: distance 0.96 a) or of J: a <= 3 / 0.96 = 3.125 µm.
    res = _result({n: v for n, v in Y_NODES.items() if n != 3}, Y_SEGMENTS[:2])
    s = scoring.score(res, _truth(Y_NODES, Y_SEGMENTS))
    assert s["length_recall"] == pytest.approx((Y_LENGTH_UM - 15.0 + 3.125) / Y_LENGTH_UM, abs=0.01)
    assert s["length_precision"] == pytest.approx(1.0)
    assert s["radius_per_segment"][2]["status"] == "unmatched"
    assert (s["junctions_found"], s["junction_recall"], s["junction_precision"]) == (0, 0.0, None)


def test_empty_result_scores_nothing_found():
    empty = SimpleNamespace(segments=pd.DataFrame(), nodes=pd.DataFrame(), centrelines=[], spacing=(1.0, 1.0, 1.0))
    s = scoring.score(empty, _truth(Y_NODES, Y_SEGMENTS))
    # Nothing found: precision is undefined (0 / 0), recall and F1 are 0.
    assert s["junctions_found"] == 0 and s["junction_precision"] is None
    assert s["junction_recall"] == s["junction_f1"] == 0.0
    assert (s["length_recall"], s["length_precision"], s["length_rel_error"]) == (0.0, None, -1.0)
    assert s["radius_segments_scored"] == 0 and s["radius_rel_error_median"] is None
    assert (s["cycle_rank_measured"], s["components_measured"]) == (0, 0)
    assert "n/a" in scoring.format_score(s)


def test_shape_mismatch_is_refused():
    res = _result(Y_NODES, Y_SEGMENTS)
    res.run = {"shape": [40, 40, 40]}
    with pytest.raises(InputError, match=r"expected the truth's volume shape \[50, 40, 40\], got \[40, 40, 40\]"):
        scoring.score(res, _truth(Y_NODES, Y_SEGMENTS) | {"shape": [50, 40, 40]})


# --------------------------------------------------------------------------- #
# One-to-one assignment
# --------------------------------------------------------------------------- #


def _greedy(true_um, found_um, radius_um):
    """Nearest pair first, as a simple matcher would."""
    d = np.linalg.norm(np.asarray(true_um)[:, None] - np.asarray(found_um)[None], axis=2)
    pairs, used_t, used_f = [], set(), set()
    for i, j in sorted(np.ndindex(d.shape), key=lambda ij: d[ij]):
        if i not in used_t and j not in used_f and d[i, j] <= radius_um[i]:
            pairs.append((i, j))
            used_t.add(i)
            used_f.add(j)
    return pairs


def test_assignment_beats_greedy_where_greedy_fails():
    # A-P is the closest pair (1.9 µm), but taking it leaves B with nothing; A-Q (2.9) and B-P (2.1) match both.
    true_um = [(0.0, 0.0, 0.0), (0.0, 0.0, 4.0)]
    found_um = [(0.0, 0.0, 1.9), (0.0, 0.0, -2.9)]
    radius = [3.0, 3.0]
    assert len(_greedy(true_um, found_um, radius)) == 1
    ti, fi, d = scoring.match_junctions(true_um, found_um, radius_um=radius)
    assert list(zip(ti.tolist(), fi.tolist())) == [(0, 1), (1, 0)]
    assert d == pytest.approx([2.9, 2.1])


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("n_true, n_found", [(5, 5), (4, 6), (6, 3)])
def test_assignment_is_optimal_against_brute_force(seed, n_true, n_found):
    rng = np.random.default_rng(seed)
    t = rng.uniform(0, 8, (n_true, 3))
    f = rng.uniform(0, 8, (n_found, 3))
    r = rng.uniform(1.0, 4.0, n_true)
    d = np.linalg.norm(t[:, None] - f[None], axis=2)
    # Reference: every injective map of the smaller side into the larger; the best keeps the most
    # allowed pairs, then the smallest total distance.
    best = (0, 0.0)
    if n_true <= n_found:
        maps = (list(zip(range(n_true), p)) for p in itertools.permutations(range(n_found), n_true))
    else:
        maps = (list(zip(p, range(n_found))) for p in itertools.permutations(range(n_true), n_found))
    for m in maps:
        ok = [(i, j) for i, j in m if d[i, j] <= r[i]]
        cand = (len(ok), -sum(d[i, j] for i, j in ok))
        best = max(best, cand)
    ti, fi, dist = scoring.match_junctions(t, f, radius_um=r)
    assert len(set(ti.tolist())) == len(ti) and len(set(fi.tolist())) == len(fi)
    assert np.all(dist <= r[ti])
    assert len(ti) == best[0]
    assert dist.sum() == pytest.approx(-best[1])


# --------------------------------------------------------------------------- #
# The truth file
# --------------------------------------------------------------------------- #


def _break(truth, how):
    t = json.loads(json.dumps(truth))
    if how == "format":
        t["format"] = "some-other-format"
    elif how == "no segments":
        del t["segments"]
    elif how == "points shape":
        t["segments"][1]["points_um"] = [1.0, 2.0, 3.0]
    elif how == "unknown node":
        t["segments"][2]["node_to"] = 99
    elif how == "radius":
        t["segments"][0]["radius_um"] = -1
    elif how == "node position":
        t["nodes"][0]["pos_um"] = [0.0, "a", 1.0]
    elif how == "radii length":
        t["segments"][0]["radii_um"] = [4.0]
    return t


@pytest.mark.parametrize("how, words", [
    ("format", "format: expected 'vesselflow-synthetic-truth'"),
    ("no segments", "segments: expected a list, got no such key"),
    ("points shape", "segment 1 points_um: expected an array of shape (K >= 2, 3)"),
    ("unknown node", "segment 2 node_to: expected the id of a node in nodes, got 99"),
    ("radius", "segment 0 radius_um: expected a finite number > 0, got -1"),
    ("node position", "node 0 pos_um"),
    ("radii length", "segment 0 radii_um: expected 2 finite radii"),
])
def test_bad_truth_is_one_clear_line(tmp_path, how, words):
    path = tmp_path / "bad.truth.json"
    path.write_text(json.dumps(_break(_truth(Y_NODES, Y_SEGMENTS), how)))
    with pytest.raises(InputError) as exc:
        scoring.load_truth(path)
    msg = str(exc.value)
    assert words in msg and str(path) in msg and "\n" not in msg


@pytest.mark.parametrize("content, words", [
    (None, "not found"),
    ("{not json", "expected JSON, got a syntax error at line 1"),
    ("[1, 2]", "expected a JSON object"),
])
def test_unreadable_truth(tmp_path, content, words):
    path = tmp_path / "t.truth.json"
    if content is not None:
        path.write_text(content)
    with pytest.raises(InputError, match=words):
        scoring.load_truth(path)


def test_spacing_mismatch_is_refused():
    res = _result(Y_NODES, Y_SEGMENTS)
    res.spacing = (2.0, 1.0, 1.0)
    with pytest.raises(InputError, match=r"expected the truth's spacing \[1.0, 1.0, 1.0\] µm, got \[2.0, 1.0, 1.0\]"):
        scoring.score(res, _truth(Y_NODES, Y_SEGMENTS))


@pytest.mark.parametrize("option, value", [("min_matched_fraction", 0), ("min_matched_fraction", 1.5),
                                           ("sample_step_um", 0), ("match_floor_um", -1.0),
                                           ("junction_exclusion_radii", float("nan"))])
def test_bad_option_names_itself(option, value):
    with pytest.raises(InputError, match=f"^{option}: expected"):
        scoring.score(_result(Y_NODES, Y_SEGMENTS), _truth(Y_NODES, Y_SEGMENTS), **{option: value})


# --------------------------------------------------------------------------- #
# Real phantoms, end to end
# --------------------------------------------------------------------------- #

PHANTOMS = {
    "ybranch": lambda: synthetic.y_branch(parent_radius_um=5, parent_length_um=30, daughter_length_um=30),
    "tree": lambda: synthetic.binary_tree(depth=3, root_radius_um=5, length_radius_ratio=10, min_radius_um=2,
                                          seed=0),
}


@pytest.mark.parametrize("kind, spacing", [("ybranch", (1.0, 1.0, 1.0)), ("ybranch", (2.0, 1.0, 1.0)),
                                           ("tree", (1.0, 1.0, 1.0))])
def test_phantoms_score_well(analyse, kind, spacing):
    _, truth, res = analyse(kind, PHANTOMS[kind], spacing=spacing)
    s = scoring.score(res, truth)
    assert s["junction_f1"] == 1.0
    # Kind phantoms: smooth tubes of radius >= 2 voxels without roughness. Centreline radii read
    # within about 0.15 voxel of the true axis distance (DEVELOPERS.md, Radii), under 8 % at 2 voxels;
    # 15 % leaves room for the trimmed mean over few points on the shortest segments.
    assert s["radius_rel_error_median"] < 0.15
    assert s["radius_segments_scored"] == s["radius_segments_eligible"] == len(truth["segments"])
    # Blind ends retract by about a radius each and border ends stop at the last voxel centre.
    assert abs(s["length_rel_error"]) < 0.1
    assert s["length_recall"] > 0.95 and s["length_precision"] > 0.95
    assert (s["cycle_rank_measured"], s["components_measured"]) == (s["cycle_rank_truth"], 1) == (0, 1)


# --------------------------------------------------------------------------- #
# The command
# --------------------------------------------------------------------------- #


@pytest.fixture(scope="module")
def scored(tmp_path_factory):
    d = tmp_path_factory.mktemp("score")
    tif = d / "ybranch.tif"
    mask, truth = synthetic.rasterize(PHANTOMS["ybranch"](), spacing=(1.0, 1.0, 1.0))
    synthetic.write_volume(tif, mask, spacing=(1.0, 1.0, 1.0), truth=truth)
    out = d / "res"
    assert main(["analyze", str(tif), "-o", str(out), "--quiet", "--no-flow"]) == 0
    return SimpleNamespace(result=out, truth=synthetic.truth_path_for(tif), mask=mask)


def test_cli_prints_and_writes(scored, tmp_path, capsys):
    target = tmp_path / "sub" / "score.json"
    assert main(["score", str(scored.result), str(scored.truth)]) == 0
    printed = capsys.readouterr()
    assert printed.err == ""
    lines = printed.out.strip().splitlines()
    assert len(lines) == 11 and lines[3].split() == ["junction", "F1", "1.000"]
    assert any(line.startswith("length ") and "µm" in line for line in lines)
    assert main(["score", str(scored.result), str(scored.truth), "-o", str(target)]) == 0
    written = json.loads(target.read_text())
    # The same numbers as the library on the folder read back, and on the analysis in memory.
    lib = scoring.score(load_result(scored.result), scoring.load_truth(scored.truth))
    assert {k: v for k, v in written.items() if k not in ("result", "truth")} == json.loads(json.dumps(lib))
    mem = scoring.score(pipeline.analyze(scored.mask, spacing=(1.0, 1.0, 1.0), config={"flow": {"enabled": False}}),
                        scored.truth)
    for key in ("junctions_matched", "radius_rel_error_median", "length_rel_error", "length_recall"):
        assert mem[key] == pytest.approx(lib[key], abs=1e-5)
    # The result folder holds only the result.
    assert sorted(p.name for p in scored.result.iterdir()) == sorted(RESULT_FILES)


def _one_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("vesselflow: error: ")
    return err[0]


def test_cli_refuses_to_replace_without_overwrite(scored, tmp_path, capsys):
    target = tmp_path / "score.json"
    assert main(["score", str(scored.result), str(scored.truth), "-o", str(target)]) == 0
    before = target.read_bytes()
    capsys.readouterr()
    assert main(["score", str(scored.result), str(scored.truth), "-o", str(target)]) == 2
    assert "--overwrite" in _one_line(capsys)
    assert target.read_bytes() == before
    assert main(["score", str(scored.result), str(scored.truth), "-o", str(target), "--overwrite"]) == 0


@pytest.mark.parametrize("where", ["truth", "user file", "inside result"])
def test_cli_never_replaces_other_files(scored, tmp_path, capsys, snapshot, where):
    if where == "truth":
        target = scored.truth
    elif where == "user file":
        target = tmp_path / "notes.json"
        target.write_text('{"mine": 1}')
    else:
        target = scored.result / "score.json"
    before = snapshot(target.parent)
    assert main(["score", str(scored.result), str(scored.truth), "-o", str(target), "--overwrite"]) == 2
    _one_line(capsys)
    assert snapshot(target.parent) == before


@pytest.mark.parametrize("case, words", [
    ("missing truth", "not found"),
    ("bad truth", "expected JSON"),
    ("missing result", "expected a result folder"),
    ("not a result", "not a vesselflow result folder"),
])
def test_cli_bad_input_is_exit_2_one_line(scored, tmp_path, capsys, case, words):
    result, truth = str(scored.result), str(scored.truth)
    if case == "missing truth":
        truth = str(tmp_path / "nothing.truth.json")
    elif case == "bad truth":
        (tmp_path / "bad.truth.json").write_text("{")
        truth = str(tmp_path / "bad.truth.json")
    elif case == "missing result":
        result = str(tmp_path / "no-such-result")
    else:
        (tmp_path / "folder").mkdir()
        result = str(tmp_path / "folder")
    assert main(["score", result, truth]) == 2
    assert words in _one_line(capsys)
