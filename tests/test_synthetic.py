"""Tests of the synthetic ground-truth generator (pipeline.synthetic)."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import tifffile
from scipy import ndimage
from skimage.measure import euler_number

from pipeline import synthetic as syn
from pipeline.errors import InputError

FULL = np.ones((3, 3, 3), dtype=bool)  # 26-connectivity for vessels


def n_components(mask: np.ndarray) -> int:
    return int(ndimage.label(mask, structure=FULL)[1])


def n_cavities(mask: np.ndarray) -> int:
    """Background components (6-connected, the dual of 26) not touching the border."""
    lab, n = ndimage.label(~mask)
    border = np.unique(np.concatenate([np.unique(lab[sl]) for sl in _faces(mask.ndim)]))
    return n - int(np.count_nonzero(border))


def _faces(ndim: int):
    for ax in range(ndim):
        for end in (0, -1):
            sl = [slice(None)] * ndim
            sl[ax] = end
            yield tuple(sl)


def shell_tolerance(area_um2: float, spacing, volume_um3: float) -> float:
    """Relative 3-sigma bound on voxel-counting error of a smooth body.

    Only voxels whose centre lies within one voxel diagonal of the surface can
    be misclassified; treating each as an independent error of at most half a
    voxel volume (sd <= dV/2) gives sd <= dV/2 * sqrt(N_shell),
    N_shell = area * diagonal / dV.
    """
    dv = float(np.prod(spacing))
    diag = float(np.linalg.norm(spacing))
    n_shell = area_um2 * diag / dv
    return 3.0 * 0.5 * dv * math.sqrt(n_shell) / volume_um3


SMALL_TREE = dict(depth=3, root_radius_um=6.0, length_radius_ratio=8.0, min_radius_um=2.0, seed=5)


@pytest.fixture(scope="module")
def tree() -> syn.VesselNetwork:
    return syn.binary_tree(**SMALL_TREE)


@pytest.fixture(scope="module")
def tree_raster(tree):
    return syn.rasterize(tree, spacing=(1.0, 1.0, 1.0))


# ------------------------------------------------------------------ volumes


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (2.0, 1.0, 1.0), (3.0, 1.0, 1.0), (0.7, 0.9, 1.1)])
def test_oblique_tube_cut_by_faces_has_volume_pi_r2_l(spacing):
    r, direction = 5.0, np.array([0.3, 0.5, 1.0])
    mask, truth = syn.rasterize(
        syn.straight_tube(length_um=80.0, radius_um=r, direction=direction), spacing=spacing
    )
    u = direction / np.linalg.norm(direction)
    length = truth["segments"][0]["length_um"]
    # Cavalieri: slices across x are ellipses of area pi r^2 / cos(alpha); the
    # voxel slab spans the clipped centreline plus one voxel along x.
    slab_um = length + spacing[2] / u[2]
    expected = math.pi * r**2 * slab_um
    got = mask.sum() * np.prod(spacing)
    tol = shell_tolerance(2 * math.pi * r * slab_um, spacing, expected)
    assert abs(got / expected - 1) < tol
    assert [n["kind"] for n in truth["nodes"]] == ["border", "border"]
    # The clipped length is the x extent of the voxel-centre box over cos(alpha).
    assert length == pytest.approx((mask.shape[2] - 1) * spacing[2] / u[2], rel=1e-9)


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (3.0, 1.0, 1.0)])
def test_blind_tube_is_a_capsule(spacing):
    r, length = 5.0, 60.0
    mask, truth = syn.rasterize(
        syn.straight_tube(length_um=length, radius_um=r, direction=(1.0, 0.4, 0.3), ends="blind"),
        spacing=spacing,
    )
    # Capsule: cylinder plus two hemispheres (elementary geometry).
    expected = math.pi * r**2 * length + 4.0 / 3.0 * math.pi * r**3
    got = mask.sum() * np.prod(spacing)
    assert abs(got / expected - 1) < shell_tolerance(
        2 * math.pi * r * length + 4 * math.pi * r**2, spacing, expected
    )
    assert truth["segments"][0]["length_um"] == length
    assert [n["kind"] for n in truth["nodes"]] == ["blind", "blind"]


def test_axis_parallel_tube_ends_on_faces():
    mask, truth = syn.rasterize(syn.straight_tube(length_um=40.0, radius_um=4.0), spacing=(1.0, 1.0, 2.0))
    assert mask.shape[2] == 21  # 40 um at dx = 2: centres 0..40
    pos = sorted(n["pos_vox"][2] for n in truth["nodes"])
    assert pos == [0.0, 20.0]
    assert truth["segments"][0]["length_um"] == pytest.approx(40.0)
    assert mask[:, :, 0].any() and mask[:, :, -1].any()


@pytest.mark.parametrize("spacing", [(3.0, 1.0, 1.0), (5.0, 1.0, 1.0)])
def test_same_tree_same_volume_on_anisotropic_grid(tree, tree_raster, spacing):
    mask_iso, truth_iso = tree_raster
    mask, truth = syn.rasterize(tree, spacing=spacing)
    assert truth["mask_volume_um3"] == pytest.approx(mask.sum() * np.prod(spacing))
    assert truth["mask_volume_um3"] / truth_iso["mask_volume_um3"] == pytest.approx(1.0, abs=0.03)
    assert truth["summary"]["n_segments"] == truth_iso["summary"]["n_segments"]


def test_capillary_bed_meets_volume_fraction():
    mask, truth = syn.rasterize(syn.capillary_bed(shape_um=(96, 96, 96), vessel_fraction=0.15, seed=3))
    assert mask.shape == (96, 96, 96)
    # Small boxes hold only ~100 lattice nodes, so allow 15 % sampling scatter.
    assert mask.mean() == pytest.approx(0.15, rel=0.15)
    assert truth["summary"]["cyclomatic_number"] > 20
    assert n_components(mask) == 1


# ------------------------------------------------------------------ lengths


@pytest.mark.parametrize("a, p, n", [(15.0, 20.0, 2.0), (8.0, 30.0, 1.5), (30.0, 12.0, 3.0)])
def test_helix_analytic_length_matches_polyline(a, p, n):
    net = syn.helix(coil_radius_um=a, pitch_um=p, turns=n, radius_um=4.0)
    seg = net.segments[0]
    # helix arc length: standard differential geometry, L = n sqrt((2 pi a)^2 + p^2).
    analytic = n * math.sqrt((2 * math.pi * a) ** 2 + p**2)
    assert seg["length_um"] == pytest.approx(analytic, rel=1e-12)
    # Chords of a curve of curvature k with step h are short by ~ (k h)^2 / 24.
    poly = float(np.sum(np.linalg.norm(np.diff(seg["points_um"], axis=0), axis=1)))
    assert poly == pytest.approx(analytic, rel=1e-4)


def test_arc_and_ring_lengths():
    arc = syn.curved_tube(arc_radius_um=40.0, angle_deg=90.0, radius_um=5.0).segments[0]
    # circular arc length R * theta, circumference 2 pi R (elementary geometry)
    assert arc["length_um"] == pytest.approx(40.0 * math.pi / 2, rel=1e-12)
    ring = syn.torus(major_radius_um=30.0, minor_radius_um=5.0)
    assert ring.segments[0]["length_um"] == pytest.approx(2 * math.pi * 30.0, rel=1e-12)
    assert [n["kind"] for n in ring.nodes] == ["loop"]
    assert ring.segments[0]["node_from"] == ring.segments[0]["node_to"]


@pytest.mark.parametrize("kind", sorted(syn.SYNTH_KINDS))
def test_polylines_are_dense_and_meet_their_nodes(kind):
    spec = syn.SYNTH_KINDS[kind]
    net = spec.builder(**spec.defaults)
    pos = {n["id"]: n["pos_um"] for n in net.nodes}
    for s in net.segments:
        pts = s["points_um"]
        assert np.max(np.linalg.norm(np.diff(pts, axis=0), axis=1)) <= syn.MAX_STEP_UM + 1e-9
        assert tuple(pts[0]) == pos[s["node_from"]] and tuple(pts[-1]) == pos[s["node_to"]]
        assert s["radii_um"].shape == (len(pts),)


# ------------------------------------------------------------------ Murray trees


@pytest.mark.parametrize("exponent", [3.0, 2.3])
@pytest.mark.parametrize("asymmetry", [1.0, 0.6])
def test_tree_obeys_radius_law_exactly(exponent, asymmetry):
    net = syn.binary_tree(
        depth=4, root_radius_um=8.0, exponent=exponent, asymmetry=asymmetry, min_radius_um=1.0, seed=1
    )
    radius = {s["id"]: s["radius_um"] for s in net.segments}
    assert len(net.bifurcations) >= 7  # thin asymmetric branches stop at min_radius_um
    for b in net.bifurcations:
        r0 = radius[b["parent_segment"]]
        r1, r2 = (radius[i] for i in b["daughter_segments"])
        # Murray CD 1926, PNAS 12:207: r0^3 = r1^3 + r2^3, generalised exponent x.
        assert r1**exponent + r2**exponent == pytest.approx(r0**exponent, rel=1e-12)
        assert r2 / r1 == pytest.approx(asymmetry, rel=1e-12)
        assert not b["broken"]


def test_default_angles_are_murray_optimum():
    net = syn.binary_tree(depth=3, root_radius_um=8.0, asymmetry=0.7, seed=2)
    seg = {s["id"]: s for s in net.segments}

    def direction(s):
        v = s["points_um"][-1] - s["points_um"][0]
        return v / np.linalg.norm(v)

    for b in net.bifurcations:
        d0 = direction(seg[b["parent_segment"]])
        r0, r1, r2 = b["r0_um"], b["r1_um"], b["r2_um"]
        # Murray CD 1926, J Gen Physiol 9:835: cos(theta1) = (r0^4 + r1^4 - r2^4) / (2 r0^2 r1^2).
        cos1 = (r0**4 + r1**4 - r2**4) / (2 * r0**2 * r1**2)
        cos2 = (r0**4 + r2**4 - r1**4) / (2 * r0**2 * r2**2)
        d1, d2 = (direction(seg[i]) for i in b["daughter_segments"])
        assert np.dot(d0, d1) == pytest.approx(cos1, abs=1e-9)
        assert np.dot(d0, d2) == pytest.approx(cos2, abs=1e-9)


def test_tree_is_three_dimensional_with_levels(tree):
    pts = np.concatenate([s["points_um"] for s in tree.segments])
    sv = np.linalg.svd(pts - pts.mean(axis=0), compute_uv=False)
    # Turning the branching plane by 90 degrees per level fills all three axes.
    assert sv[2] / sv[0] > 0.2
    levels = sorted({s["level"] for s in tree.segments})
    assert levels == [0, 1, 2, 3]
    kinds = {n["id"]: n["kind"] for n in tree.nodes}
    root = next(s for s in tree.segments if s["level"] == 0)
    assert kinds[root["node_from"]] == "border"
    deg = tree.degrees()
    assert all(kinds[i] == "blind" for i, k in deg.items() if k == 1 and i != root["node_from"])
    assert all(kinds[i] == "junction" and k == 3 for i, k in deg.items() if k > 1)


@pytest.mark.parametrize("fraction", [0.25, 0.5])
def test_broken_bifurcations_are_recorded(fraction):
    net = syn.binary_tree(depth=4, root_radius_um=8.0, broken_fraction=fraction, min_radius_um=0.5, seed=4)
    n = len(net.bifurcations)
    broken = [b for b in net.bifurcations if b["broken"]]
    assert len(broken) in (math.floor(fraction * n), math.ceil(fraction * n))
    for b in broken:
        assert b["r1_um"] == b["r2_um"] == pytest.approx(0.95 * b["r0_um"])
        assert b["murray_residual"] > 0.5
    truth = net.to_truth()
    assert truth["summary"]["n_broken_bifurcations"] == len(broken)


# ------------------------------------------------------------------ defects


def test_specks_add_separate_components(tree):
    mask, truth = syn.rasterize(tree, specks=7, seed=3)
    assert n_components(mask) == 1 + 7
    assert len(truth["specks"]) == 7


def test_holes_are_enclosed_cavities(tree, tree_raster):
    assert n_cavities(tree_raster[0]) == 0
    mask, truth = syn.rasterize(tree, holes=4, seed=3)
    assert n_cavities(mask) == 4
    assert len(truth["holes"]) == 4
    assert n_components(mask) == 1


def test_roughness_perturbs_surface_reproducibly(tree, tree_raster):
    rough, truth = syn.rasterize(tree, roughness=0.15, seed=8)
    again, _ = syn.rasterize(tree, roughness=0.15, seed=8)
    assert np.array_equal(rough, again)
    # Same placement without roughness (the auto box is wider for rough walls).
    smooth, _ = syn.rasterize(tree.translated(truth["offset_um"]), shape=truth["shape"])
    changed = np.count_nonzero(rough ^ smooth) / smooth.sum()
    assert changed > 0.05
    # E[(1 + s g)^2] = 1 + s^2: the mean cross-section grows by ~2 %.
    assert rough.sum() / smooth.sum() == pytest.approx(1.0 + 0.15**2, abs=0.05)
    assert n_components(rough) == 1


# ------------------------------------------------------------------ truth and topology


@pytest.mark.parametrize("kind", ["tree", "ladder", "torus", "helix", "ybranch", "bed"])
@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (3.0, 1.0, 1.0)])
def test_truth_voxel_positions_hit_vessel(kind, spacing):
    params = {"shape_um": (64.0, 64.0, 64.0)} if kind == "bed" else {}
    mask, truth = syn.synthesize(kind, spacing=spacing, **params)
    d = np.asarray(spacing)
    for n in truth["nodes"]:
        vox = np.asarray(n["pos_vox"])
        assert np.allclose(vox * d, n["pos_um"])
        idx = np.round(vox).astype(int)
        assert np.all(idx >= 0) and np.all(idx < mask.shape)
        assert mask[tuple(idx)], n
    json.dumps(truth)


def test_topology_of_loops_and_trees(tree_raster):
    # Euler characteristic of a solid handlebody of genus g is 1 - g.
    ring, _ = syn.synthesize("torus")
    assert euler_number(ring, connectivity=3) == 0
    mask, truth = syn.rasterize(syn.ladder(rungs=4))
    assert truth["summary"]["cyclomatic_number"] == 3
    assert euler_number(mask, connectivity=3) == 1 - 3
    assert euler_number(tree_raster[0], connectivity=3) == 1


def test_capillary_bed_loops_match_truth():
    mask, truth = syn.rasterize(syn.capillary_bed(shape_um=(80, 80, 80), seed=1))
    loops = truth["summary"]["cyclomatic_number"]
    assert loops > 10
    assert n_components(mask) == 1 and n_cavities(mask) == 0
    # Voxelising the crease where five or six tubes cross adds a one-voxel
    # handle at ~3 % of junctions; a lost loop (or many more) would mean broken
    # or fused tubes.
    extra = (1 - euler_number(mask, connectivity=3)) - loops
    assert 0 <= extra <= max(3, 0.1 * loops)


def test_given_shape_cuts_segments_at_the_box(tree):
    root = np.asarray(tree.nodes[0]["pos_um"])
    placed = tree.translated(np.array([0.0, 20.0, 20.0]) - root)
    shape = (60, 40, 40)  # smaller than the tree, so branches leave the box
    mask, truth = syn.rasterize(placed, spacing=(1.0, 1.0, 1.0), shape=shape)
    assert mask.shape == shape
    top = np.asarray(shape) - 1
    kinds = [n["kind"] for n in truth["nodes"]]
    assert kinds.count("border") > 2
    for n in truth["nodes"]:
        p = np.asarray(n["pos_vox"])
        assert np.all(p >= -1e-9) and np.all(p <= top + 1e-9)
        on_face = np.any(np.isclose(p, 0.0) | np.isclose(p, top))
        if n["kind"] == "border" and n["degree"] == 1 and n["id"] >= len(tree.nodes):
            assert on_face
    for s in truth["segments"]:
        q = np.asarray(s["points_um"])
        assert np.all(q >= -1e-9) and np.all(q <= top + 1e-9)


# ------------------------------------------------------------------ I/O and dispatch


def test_write_volume_round_trip(tmp_path, tree_raster):
    mask, truth = tree_raster
    path = syn.write_volume(tmp_path / "vol.tif", mask, spacing=(2.0, 1.0, 0.5), truth=truth)
    with tifffile.TiffFile(path) as tif:
        data = tif.asarray()
        meta = tif.imagej_metadata
        page = tif.pages[0]
        xres = page.tags["XResolution"].value
        yres = page.tags["YResolution"].value
        compression = page.compression
    assert data.dtype == np.uint8 and data.shape == mask.shape
    assert set(np.unique(data)) == {0, 255}
    assert np.array_equal(data == 255, mask)
    assert meta["spacing"] == 2.0 and meta["unit"] == "um"
    assert xres[0] / xres[1] == pytest.approx(1 / 0.5) and yres[0] / yres[1] == pytest.approx(1.0)
    assert compression == tifffile.COMPRESSION.ADOBE_DEFLATE
    back = json.loads((tmp_path / "vol.truth.json").read_text(encoding="utf-8"))
    assert back["summary"] == truth["summary"] and back["shape"] == list(mask.shape)


@pytest.mark.parametrize("kind", sorted(syn.SYNTH_KINDS))
def test_synthesize_every_kind(kind):
    params = {"shape_um": (48.0, 48.0, 48.0)} if kind == "bed" else {}
    mask, truth = syn.synthesize(kind, **params)
    assert mask.dtype == bool and mask.ndim == 3 and mask.any()
    assert truth["synth_kind"] == kind and truth["kind"] == truth["synth_kind"]
    assert truth["shape"] == list(mask.shape)
    json.dumps(truth)


@pytest.mark.parametrize(
    "call, name",
    [
        (lambda: syn.straight_tube(length_um=10.0, radius_um=-1.0), "radius_um"),
        (lambda: syn.straight_tube(length_um=0.0, radius_um=1.0), "length_um"),
        (lambda: syn.straight_tube(length_um=10.0, radius_um=1.0, direction=(0, 0, 0)), "direction"),
        (lambda: syn.helix(coil_radius_um=10.0, pitch_um=5.0, turns=2, radius_um=3.0), "pitch_um"),
        (lambda: syn.torus(major_radius_um=3.0, minor_radius_um=4.0), "major_radius_um"),
        (lambda: syn.binary_tree(depth=-1, root_radius_um=5.0), "depth"),
        (lambda: syn.binary_tree(depth=2, root_radius_um=5.0, broken_fraction=1.5), "broken_fraction"),
        (
            lambda: syn.y_branch(parent_radius_um=0.0, parent_length_um=10, daughter_length_um=10),
            "parent_radius_um",
        ),
        (lambda: syn.capillary_bed(shape_um=(50, 50, 50), radius_range_um=(4, 2)), "radius_range_um"),
        (lambda: syn.capillary_bed(shape_um=(50, 50, 50), vessel_fraction=0.5), "vessel_fraction"),
        (
            lambda: syn.rasterize(syn.torus(major_radius_um=10, minor_radius_um=2), spacing=(0, 1, 1)),
            "spacing",
        ),
        (lambda: syn.rasterize(syn.torus(major_radius_um=10, minor_radius_um=2), roughness=0.5), "roughness"),
        (lambda: syn.rasterize(syn.torus(major_radius_um=10, minor_radius_um=2), shape=(10, 10)), "shape"),
        (lambda: syn.rasterize(syn.torus(major_radius_um=10, minor_radius_um=2), holes=1), "holes"),
        (lambda: syn.synthesize("cube"), "kind"),
        (lambda: syn.synthesize("tube", colour="red"), "colour"),
        (lambda: syn.write_volume("x.tif", np.zeros((4, 4), bool), spacing=(1, 1, 1)), "mask"),
    ],
)
def test_bad_arguments_raise_input_error(call, name):
    with pytest.raises(InputError, match=rf"^{name}: expected"):
        call()
