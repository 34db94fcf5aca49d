"""Block-wise analysis: the stitched graph against the in-memory one, halos, memory budget, failures.

The reference is the in-memory analysis of the same mask (pipeline.analyze),
compared through measures computed here: total length, segment count,
junctions matched one to one within 2 voxels (scipy's Hungarian assignment on
a cKDTree neighbourhood), radii of matched segments and the cycle rank from
networkx. The targets are the issue's (length within 0.5 %, segments within
1 %, junction F1 >= 0.99, median radius difference within 1 %, same cycle
rank); the block-wise route is built to give the identical graph, which the
last test of each case checks too.
"""

import itertools

import networkx as nx
import numpy as np
import pytest
from scipy.optimize import linear_sum_assignment
from scipy.spatial import cKDTree

import pipeline
from pipeline import synthetic
from pipeline.blockwise import BlockError, analyze_blockwise
from pipeline.blockwise import tasks as block_tasks
from pipeline.errors import InputError
from pipeline.thinning import thin

from conftest import start_dask_processes, stop_processes


def _tree(seed, spacing):
    # The hostile artefact model at full strength (wall roughness correlated
    # over 1-2 voxels, blobs, handles, holes, gaps, plane jitter, blur).
    net = synthetic.binary_tree(depth=4, root_radius_um=7.0, exponent=2.7, seed=seed, min_radius_um=1.6,
                                wiggle=0.25)
    mask, _ = synthetic.rasterize(net, **synthetic.hostile_artefacts(1.0, spacing=spacing,
                                                                                      seed=seed))
    return mask


@pytest.fixture(scope="module")
def bed():
    mask, _ = synthetic.rasterize(synthetic.capillary_bed(shape_um=(120, 120, 120), seed=3), spacing=(1, 1, 1),
                                  roughness=0.2, seed=3)
    return mask


def _junctions(result):
    nodes = result.nodes
    j = nodes[nodes["kind"] == "junction"]
    return j[["z_um", "y_um", "x_um"]].to_numpy()


def _f1(a, b, radius):
    """F1 of a one-to-one matching of two point sets within ``radius`` (Hungarian assignment)."""
    if len(a) == 0 and len(b) == 0:
        return 1.0
    if len(a) == 0 or len(b) == 0:
        return 0.0
    cost = np.full((len(a), len(b)), 1e9)
    for i, near in enumerate(cKDTree(b).query_ball_point(a, radius)):
        for k in near:
            cost[i, k] = np.linalg.norm(a[i] - b[k])
    r, c = linear_sum_assignment(cost)
    matched = int((cost[r, c] <= radius).sum())
    return 2 * matched / (len(a) + len(b))


def _cycle_rank(result):
    g = nx.MultiGraph()
    g.add_nodes_from(result.nodes["node_id"])
    g.add_edges_from(zip(result.segments["node_from"], result.segments["node_to"]))
    return g.number_of_edges() - g.number_of_nodes() + nx.number_connected_components(g)


def _compare(mem, blk, spacing):
    s_mem, s_blk = mem.segments, blk.segments
    L0, L1 = s_mem["length_um"].sum(), s_blk["length_um"].sum()
    assert abs(L1 - L0) <= 0.005 * L0
    assert abs(len(s_blk) - len(s_mem)) <= 0.01 * len(s_mem)
    assert _f1(_junctions(mem), _junctions(blk), 2.0 * max(spacing)) >= 0.99
    # matched segments: by their end nodes' positions (both tables number nodes alike when identical)
    key = ["node_from", "node_to"]
    merged = s_mem.merge(s_blk, on=key, suffixes=("_m", "_b"))
    assert len(merged) >= 0.99 * len(s_mem)
    rel = np.abs(merged["radius_um_b"] / merged["radius_um_m"] - 1.0)
    assert np.median(rel) <= 0.01
    assert _cycle_rank(blk) == _cycle_rank(mem)


@pytest.mark.parametrize("seed, spacing, edge", [(0, (2.0, 1.0, 1.0), 64), (1, (3.0, 0.8, 0.8), 64),
                                                 (2, (1.0, 1.0, 1.0), 32)])
def test_artefact_tree_blockwise_matches_in_memory(seed, spacing, edge):
    mask = _tree(seed, spacing)
    mem = pipeline.analyze(mask, spacing=spacing)
    blk = analyze_blockwise(mask, spacing=spacing, block_size=edge)
    assert blk.run["blockwise"]["blocks"] > 1
    _compare(mem, blk, spacing)
    # Built to be the same graph: the tables are equal, not only close.
    cols = ["node_from", "node_to", "length_um", "radius_um"]
    assert np.allclose(mem.segments[cols].to_numpy(float), blk.segments[cols].to_numpy(float), rtol=1e-9)


@pytest.mark.parametrize("edge", [32, 64, 96])
def test_bed_blockwise_matches_in_memory(bed, edge):
    mem = pipeline.analyze(bed, spacing=(1, 1, 1))
    blk = analyze_blockwise(bed, spacing=(1, 1, 1), block_size=edge)
    _compare(mem, blk, (1, 1, 1))
    # The tissue-to-vessel distances are exact across blocks here: each
    # quantile's proven bracket closes on the in-memory value.
    for key, q in (("tissue_distance_median_um", "median"), ("tissue_distance_p95_um", "p95")):
        lo, hi = blk.run["blockwise"]["tissue_distance_bracket_um"][q]
        assert lo == pytest.approx(hi) and hi == pytest.approx(mem.summary[key], abs=1e-9)


@pytest.mark.slow
def test_dense_512_bed_blockwise_matches_in_memory():
    # the bed of benchmarks/bench_analyze.py: 15 % vessel
    net = synthetic.capillary_bed(shape_um=(512, 512, 512), vessel_fraction=0.15, seed=1)
    mask, _ = synthetic.rasterize(net, spacing=(1, 1, 1), shape=(512, 512, 512))
    mem = pipeline.analyze(mask, spacing=(1, 1, 1))
    for edge in (128, 256):
        _compare(mem, analyze_blockwise(mask, spacing=(1, 1, 1), block_size=edge), (1, 1, 1))


def test_thinning_of_blocks_with_halos_is_the_whole_volume_thinning(bed):
    """The property the block-wise centrelines rest on (pipeline/blockwise/plan.py)."""
    whole = thin(bed)
    out = np.zeros_like(whole)
    edge, halo = 32, 8  # both even: blocks in phase with the volume's subfields
    for lo in itertools.product(*(range(0, n, edge) for n in bed.shape)):
        a = [max(c - halo, 0) for c in lo]
        b = [min(c + edge + halo, n) for c, n in zip(lo, bed.shape)]
        sk = thin(bed[a[0]:b[0], a[1]:b[1], a[2]:b[2]])
        core = tuple(slice(c - s, min(c + edge, n) - s) for c, s, n in zip(lo, a, bed.shape))
        out[lo[0]:lo[0] + edge, lo[1]:lo[1] + edge, lo[2]:lo[2] + edge] = sk[core]
    assert np.array_equal(out, whole)


def test_halo_grows_to_the_widest_vessel():
    # A vessel of radius 14 um: the first halo (8 voxels) is too narrow for it.
    net = synthetic.straight_tube(length_um=150, radius_um=14.0, direction=(0, 0, 1))
    mask, _ = synthetic.rasterize(net, spacing=(1, 1, 1))
    blk = analyze_blockwise(mask, spacing=(1, 1, 1), block_size=32)
    rec = blk.run["blockwise"]
    assert rec["largest_radius_um"] >= 13.0
    assert min(rec["halo_voxels_max"]) >= 1.5 * 13.0
    mem = pipeline.analyze(mask, spacing=(1, 1, 1))
    _compare(mem, blk, (1, 1, 1))


def test_memory_limit_below_the_smallest_block_is_refused(bed):
    with pytest.raises(InputError, match="memory_limit: expected at least") as err:
        analyze_blockwise(bed, spacing=(1, 1, 1), memory_limit_bytes=50 << 20)
    assert err.value.param == "memory_limit"


def test_block_size_must_be_even_and_large_enough(bed):
    for bad in (31, 33, 8):
        with pytest.raises(InputError, match="block_size"):
            analyze_blockwise(bed, spacing=(1, 1, 1), block_size=bad)


def test_a_failing_block_is_named_with_its_place(bed, monkeypatch):
    real = block_tasks.thin
    calls = []

    def failing(mask, **kw):
        calls.append(mask.shape)
        if len(calls) == 2:  # the second block
            raise RuntimeError("disk went away")
        return real(mask, **kw)

    monkeypatch.setattr(block_tasks, "thin", failing)
    with pytest.raises(BlockError, match=r"centrelines: block \(\d+, \d+, \d+\) \(voxels z, y, x \d+:\d+, "
                                         r"\d+:\d+, \d+:\d+\) failed: disk went away") as err:
        analyze_blockwise(bed, spacing=(1, 1, 1), block_size=96)
    assert err.value.step == "centrelines" and err.value.box is not None


def test_values_are_checked_across_slabs():
    m = np.zeros((40, 30, 30), np.uint8)
    m[5:10, 10:20, 10:20] = 1
    m[30:35, 10:20, 10:20] = 2  # another non-zero value in a later slab
    with pytest.raises(InputError, match="expected a binary mask"):
        analyze_blockwise(m, spacing=(1, 1, 1), block_size=32)


@pytest.fixture
def two_worker_cluster():
    """A scheduler and two workers started as separate processes on the loopback interface."""
    address, sched, workers = start_dask_processes(2, ("--host", "127.0.0.1"))
    from distributed import Client

    with Client(address, timeout="30s") as client:
        client.wait_for_workers(2, timeout=60)
    yield address
    stop_processes([sched, *workers])


@pytest.mark.integration
def test_real_dask_cluster_gives_the_embedded_result(bed, two_worker_cluster):
    spacing = (1.0, 1.0, 1.0)
    embedded = analyze_blockwise(bed, spacing=spacing, block_size=64)
    remote = analyze_blockwise(bed, spacing=spacing, block_size=64, scheduler=two_worker_cluster)
    local = analyze_blockwise(bed, spacing=spacing, block_size=64, workers=2)
    for other in (remote, local):
        for name in ("segments", "nodes", "bifurcations"):
            a, b = getattr(embedded, name), getattr(other, name)
            assert a.shape == b.shape
            assert np.allclose(a.select_dtypes("number").to_numpy(float), b.select_dtypes("number").to_numpy(float),
                               equal_nan=True, rtol=1e-12), name
        assert other.summary["tissue_distance_median_um"] == embedded.summary["tissue_distance_median_um"]


def test_unreachable_scheduler_is_one_clear_error(bed):
    with pytest.raises(InputError, match="scheduler: cannot connect to a Dask scheduler"):
        analyze_blockwise(bed, spacing=(1, 1, 1), block_size=64, scheduler="tcp://127.0.0.1:9")


def test_an_interrupted_analysis_resumes_from_its_kept_blocks(bed, monkeypatch, tmp_path):
    keep = tmp_path / "kept"
    real = block_tasks.thin
    calls = []

    def failing(mask, **kw):
        calls.append(1)
        if len(calls) == 5:
            raise KeyboardInterrupt  # the user stops the run at the fifth block
        return real(mask, **kw)

    monkeypatch.setattr(block_tasks, "thin", failing)
    with pytest.raises(KeyboardInterrupt):
        analyze_blockwise(bed, spacing=(1, 1, 1), block_size=32, keep_blocks=keep, input_id="bed")
    monkeypatch.setattr(block_tasks, "thin", real)
    assert len(list(keep.glob("centrelines-*.block.npz"))) == 4
    resumed = analyze_blockwise(bed, spacing=(1, 1, 1), block_size=32, keep_blocks=keep, input_id="bed")
    assert resumed.run["blockwise"]["blocks_resumed"] == 4
    fresh = analyze_blockwise(bed, spacing=(1, 1, 1), block_size=32)
    assert resumed.segments.equals(fresh.segments) and resumed.summary == fresh.summary
    # another input (or configuration) does not take up these blocks
    other = analyze_blockwise(bed, spacing=(1, 1, 1), block_size=32, keep_blocks=keep, input_id="another")
    assert other.run["blockwise"]["blocks_resumed"] == 0


def test_the_command_removes_its_kept_blocks_when_the_result_is_written(bed, tmp_path):
    from pipeline.cli import main

    np.save(tmp_path / "bed.npy", bed)
    assert main(["analyze", str(tmp_path / "bed.npy"), "--spacing", "1", "1", "1", "-o", str(tmp_path / "res"),
                 "--blockwise", "--block-size", "64", "--quiet"]) == 0
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bed.npy", "res"]


def test_a_spacing_in_the_wrong_unit_is_refused_before_the_blocks(bed):
    # 2000 x 600 x 600 "µm" voxels (nanometres taken as µm) resampled to 1 µm: about 1e14 voxels
    with pytest.raises(InputError, match="would have .* voxels; check the voxel spacing"):
        analyze_blockwise(bed[:40, :40, :40], spacing=(2000.0, 600.0, 600.0), block_size=32,
                          config={"centrelines": {"resample_spacing_um": 1.0}})
