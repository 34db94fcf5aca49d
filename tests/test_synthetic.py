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
from pipeline.synthetic._common import _make_segment, _node
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


# Small boxes keep the box-filling kinds quick.
SMALL_KIND_PARAMS = {
    "bed": {"shape_um": (48.0, 48.0, 48.0)},
    "cortex": {"shape_um": (160.0, 160.0, 160.0), "n_arterioles": 1, "n_venules": 1},
}


@pytest.mark.parametrize("kind", sorted(syn.SYNTH_KINDS))
def test_synthesize_every_kind(kind):
    params = SMALL_KIND_PARAMS.get(kind, {})
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
        (lambda: syn.cortex_network(n_arterioles=0), "n_arterioles"),
        (lambda: syn.cortex_network(capillary_radius_um=(3.0, 2.0)), "capillary_radius_um"),
        (lambda: syn.cortex_network(venule_radius_factor=0.8), "venule_radius_factor"),
        (lambda: syn.cortex_network(shape_um=(99, 99, 99), capillary_spacing_um=5.0), "capillary_spacing_um"),
        (lambda: syn.crop_network(syn.torus(major_radius_um=10, minor_radius_um=2), [[0, 0, 0], [5, 0, 5]]),
         "box_um"),
        (lambda: syn.network_flow_truth(syn.torus(major_radius_um=10, minor_radius_um=2)),
         "segment 0 vessel_class"),
        (lambda: syn.synthesize("cube"), "kind"),
        (lambda: syn.synthesize("tube", colour="red"), "colour"),
        (lambda: syn.write_volume("x.tif", np.zeros((4, 4), bool), spacing=(1, 1, 1)), "mask"),
    ],
)
def test_bad_arguments_raise_input_error(call, name):
    with pytest.raises(InputError, match=rf"^{name}: expected"):
        call()


# ------------------------------------------------------------------ hostile artefacts

# sha256 of np.packbits(mask) and of json.dumps(truth, sort_keys=True) with floats at
# 9 significant digits, made by the generator as it was before the artefact options
# existed (recomputed with that generator when the rounding came in): defaults must
# not move a voxel or a digit.
BEFORE_ARTEFACTS = {
    "tree_iso": (
        "a077ca6f9e20a8b3a008b1b9734f9c7a973020935bcebfea0b757ffffbe2cbeb",
        "bba9b48b4e4023cf17513729de065bf20e750ae3c443d0a57d56442aaa55d181",
    ),
    "tree_defects": (
        "2a38d90cfdc60fd6055b2c25b6d54c290050d4878b46df842f19bd4638f0ddfb",
        "9335cb51bd2dcf1851154a4eae07005baeae32d03893843d011b2869297ede1a",
    ),
    "tube_2.5": (
        "687c7271f72dd79e4de69716a465c0958151d77e232bcde6e6fe3504e4650fc1",
        "3aace5dba7c65682d1d5b18a46078cf4681dbc9290d1d25cf89e0cafd77cb446",
    ),
    "bed_4": (
        "f6aa24fce5f945e54e8f66af069134da0b6f4ea409d0640eca6d1baae40fdc0e",
        "977a99cd80eca340ed1c866840f51253ca5e14418a7c855a60df74fcd58d41d9",
    ),
}


def _before_case(name, tree):
    if name == "tree_iso":
        return syn.rasterize(tree)
    if name == "tree_defects":
        return syn.rasterize(tree, spacing=(2.0, 1.0, 1.0), roughness=0.15, specks=3, holes=2, seed=8)
    if name == "tube_2.5":
        tube = syn.straight_tube(length_um=40.0, radius_um=2.0, direction=(0.2, 0.5, 1.0))
        return syn.rasterize(tube, spacing=(2.5, 0.8, 0.8))
    return syn.synthesize(
        "bed", shape_um=(48.0, 48.0, 48.0), spacing=(4.0, 1.0, 1.0), roughness=0.05, specks=2, seed=4
    )


def _rounded(obj):
    """Floats to 9 significant digits, recursively."""
    if isinstance(obj, float):
        return float(f"{obj:.9g}")
    if isinstance(obj, dict):
        return {k: _rounded(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_rounded(v) for v in obj]
    return obj


def _sha(mask, truth):
    import hashlib

    # The truth's floats are hashed at 9 significant digits: releases of
    # numpy change the last bits of its vectorised sin/cos/exp, which moved
    # the last digit of a bed's truth (numpy 2.4) while the generator before
    # the artefact options, run on the same numpy, still gave the same
    # output as today's. Every voxel of the mask stays exact.
    return (
        hashlib.sha256(np.packbits(mask).tobytes()).hexdigest(),
        hashlib.sha256(json.dumps(_rounded(truth), sort_keys=True).encode()).hexdigest(),
    )


@pytest.mark.parametrize("name", sorted(BEFORE_ARTEFACTS))
def test_defaults_are_byte_identical_to_before(name, tree):
    mask, truth = _before_case(name, tree)
    assert _sha(mask, truth) == BEFORE_ARTEFACTS[name]


def test_hostile_strength_zero_is_the_clean_mask(tree):
    kw = syn.hostile_artefacts(0.0, spacing=(2.0, 1.0, 1.0), seed=8)
    assert _sha(*syn.rasterize(tree, **kw)) == _sha(*syn.rasterize(tree, spacing=(2.0, 1.0, 1.0), seed=8))


def _placed_like(net, truth, spacing, **kw):
    """The same network on the same grid as ``truth`` (auto placement depends on roughness)."""
    return syn.rasterize(net.translated(truth["offset_um"]), spacing=spacing, shape=truth["shape"], **kw)


@pytest.mark.parametrize("spacing", [(2.5, 0.8, 0.8), (4.0, 1.0, 1.0)])
def test_horizontal_capillary_on_coarse_z_is_a_staircase(spacing):
    # A capillary of radius 1.5 um lying in the (y, x) plane spans one or two
    # z planes, and an oblique one climbs through them in steps.
    dz = spacing[0]
    lying = syn.straight_tube(
        length_um=80.0, radius_um=1.5, direction=(0, 0.3, 1), centre_um=(2.3 * dz, 30.0, 40.0)
    )
    flat, _ = syn.rasterize(lying, spacing=spacing, shape=(6, int(60 / spacing[1]), int(80 / spacing[2])))
    planes = np.flatnonzero(flat.any(axis=(1, 2)))
    assert 1 <= len(planes) <= 2 and n_components(flat) == 1
    # Climbing through the planes it stays whole while a voxel centre lies within
    # r of the axis in every plane (r > dz / 2), and falls apart where the axis
    # passes half-way between planes (r < dz / 2).
    climb = (0.25, 0.0, 1.0)
    steep, _ = syn.rasterize(
        syn.straight_tube(length_um=60.0, radius_um=0.55 * dz, direction=climb), spacing=spacing
    )
    assert n_components(steep) == 1
    thin, _ = syn.rasterize(
        syn.straight_tube(length_um=60.0, radius_um=0.4 * dz, direction=climb), spacing=spacing
    )
    assert n_components(thin) > 1
    # Along x the lowest occupied plane only ever steps up, by at most one.
    cols = np.flatnonzero(steep.any(axis=(0, 1)))
    low = [int(np.flatnonzero(steep[:, :, k].any(axis=1))[0]) for k in cols]
    assert np.all(np.diff(low) >= 0) and np.all(np.diff(low) <= 1) and low[-1] > low[0]


@pytest.mark.parametrize("spacing", [(2.5, 0.8, 0.8), (4.0, 1.0, 1.0)])
def test_oblique_tube_volume_on_staircase_grids(spacing):
    test_oblique_tube_cut_by_faces_has_volume_pi_r2_l(spacing)


def _acf(a: np.ndarray, lag: int) -> float:
    a = a - a.mean()
    return float(np.mean(a[:-lag] * a[lag:]) / np.mean(a * a))


def test_short_roughness_has_its_correlation_length():
    # Per-slice cross-section areas along an axis-parallel tube: to first order
    # in the roughness the area is the circumferential mean of the field, so its
    # autocorrelation along the axis is the field's, exp(-lag^2 / l^2) for a
    # 1/e length l (plus white digitisation noise, which lowers it a little).
    # Over 300 slices the acf has a standard error of ~0.07, so l estimated
    # from lag 1 lies within [1.0, 2.0] um for l = 1.5 um at ~3 sd.
    tube = syn.straight_tube(length_um=300.0, radius_um=4.0)
    short, truth = syn.rasterize(tube, roughness=0.2, roughness_correlation_um=1.5, seed=0)
    area = short.sum(axis=(0, 1)).astype(float)
    ell = 1.0 / math.sqrt(-math.log(_acf(area, 1)))
    assert 1.0 <= ell <= 2.0
    assert abs(_acf(area, 4)) < 0.2  # gone after ~3 correlation lengths
    assert truth["rasterize"]["roughness_correlation_um"] == 1.5
    # The original field is correlated over about one radius (4 um): still
    # correlated at 2 um, where the short one is nearly gone.
    long, truth_long = syn.rasterize(tube, roughness=0.2, seed=0)
    assert _acf(long.sum(axis=(0, 1)).astype(float), 2) > 0.6 > 0.3 > _acf(area, 2)
    assert truth_long["rasterize"]["roughness_correlation"] == "one nominal radius"


@pytest.mark.parametrize("seed", [0, 1])
def test_rough_tube_mean_area_is_the_recorded_factor(seed):
    # The radius perturbation r (1 + s g) is zero-mean, so the mean radius is the
    # truth's and the mean area is pi r^2 E[(1 + s g)^2] = pi r^2 (1 + s^2 E[g^2]),
    # E[g^2] = 0.978 for g clipped at 2.5 sd: +6.1 % at s = 0.25. A 300 um tube of
    # radius 4 um holds ~2 pi r L / l^2 ~ 3000 independent wall patches at
    # l = 1.5 um; the ratio to the same smooth tube then scatters by ~0.7 %
    # (measured over seeds), so 3 % is > 4 sd.
    tube = syn.straight_tube(length_um=300.0, radius_um=4.0, direction=(0.2, 0.3, 1.0))
    rough, truth = syn.rasterize(tube, roughness=0.25, roughness_correlation_um=1.5, seed=seed)
    smooth, _ = _placed_like(tube, truth, (1.0, 1.0, 1.0))
    factor = truth["rasterize"]["roughness_area_factor"]
    assert factor == pytest.approx(1.061, abs=1e-3)
    assert rough.sum() / smooth.sum() == pytest.approx(factor, abs=0.03)
    # Short-range roughness leaves the topology of the smooth tube.
    assert n_components(rough) == 1 and n_cavities(rough) == 0
    assert euler_number(rough, connectivity=3) == euler_number(smooth, connectivity=3) == 1


@pytest.mark.parametrize("psf", [None, (0.5, 0.3, 0.3)])
@pytest.mark.parametrize("seed", [0, 1])
def test_rough_curved_tree_keeps_the_recorded_area_factor(seed, psf):
    # A curved vessel is painted as many short overlapping pieces. Each looks the
    # roughness field up at its own wall point; if the most outward of them won,
    # every vessel would widen (the volume rose by 18 % on these trees, three
    # times the recorded +6.1 %). The nearest piece decides, so the volume grows
    # by the factor of a straight tube (above); junctions, where pieces of
    # different vessels overlap, take a little off. 3 % as above.
    net = syn.binary_tree(depth=4, root_radius_um=7.0, exponent=3.0, seed=seed, min_radius_um=1.5, wiggle=0.2)
    rough, truth = syn.rasterize(net, seed=seed, psf_sigma_um=psf, roughness=0.25, roughness_correlation_um=1.5,
                                 fit_artefacts=True)
    smooth, _ = _placed_like(net, truth, (1.0, 1.0, 1.0), seed=seed, psf_sigma_um=psf)
    factor = truth["rasterize"]["roughness_area_factor"]
    assert rough.sum() / smooth.sum() == pytest.approx(factor, abs=0.03)


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (2.5, 0.8, 0.8)])
def test_short_roughness_adds_no_loops_to_a_capillary_bed(spacing):
    # Steep bumps digitised side by side would arch over the grooves between them
    # and neighbours would touch; the rough wall is reached from the smooth one
    # through simple voxels only, so loops, cavities and pieces stay as they were.
    bed = syn.capillary_bed(shape_um=(64.0, 64.0, 64.0), seed=1)
    rough, truth = syn.rasterize(bed, spacing=spacing, roughness=0.25, roughness_correlation_um=1.5, seed=2)
    smooth, _ = syn.rasterize(bed, spacing=spacing, fit_artefacts=True)
    assert np.count_nonzero(rough ^ smooth) > 0.1 * smooth.sum()
    assert euler_number(rough, connectivity=3) == euler_number(smooth, connectivity=3)
    assert euler_number(rough, connectivity=3) == truth["imaged_euler_number"]
    assert n_components(rough) == n_components(smooth) and n_cavities(rough) == 0
    assert truth["roughness_voxels_refused"] < 0.02 * np.count_nonzero(rough ^ smooth)


def test_psf_elongates_a_sphere_in_z_as_predicted():
    # A ball of radius R blurred along z only (sigma sz) has, at lateral distance
    # rho and height z, the value Phi((h - z) / sz) - Phi((-h - z) / sz) with
    # h = sqrt(R^2 - rho^2): thresholding that closed form gives the expected
    # region. Its second moments match the mask's within 5 % (the partial-volume
    # ramp stands in for the box average of a voxel, which adds d^2 / 12 to the
    # blur variance; digitising a ~3000-voxel region moves moments by ~1 %).
    from scipy.special import ndtr

    radius, sz, level, spacing = 5.0, 2.5, 0.25, (1.0, 0.5, 0.5)
    ball = syn.straight_tube(length_um=1e-3, radius_um=radius, ends="blind")
    mask, truth = syn.rasterize(
        ball, spacing=spacing, margin_um=15.0, psf_sigma_um=(sz, 0.0, 0.0), psf_threshold=level
    )
    assert truth["rasterize"]["psf_sigma_um"] == [sz, 0.0, 0.0]
    centre = np.mean([n["pos_um"] for n in truth["nodes"]], axis=0)
    pos = np.indices(mask.shape).reshape(3, -1).T * np.asarray(spacing) - centre
    rho2 = pos[:, 1] ** 2 + pos[:, 2] ** 2
    h = np.sqrt(np.clip(radius**2 - rho2, 0.0, None))
    value = np.where(rho2 < radius**2, ndtr((h - pos[:, 0]) / sz) - ndtr((-h - pos[:, 0]) / sz), 0.0)
    expected = value >= level
    got = mask.reshape(-1)
    smooth, _ = _placed_like(ball, truth, spacing)
    flat = smooth.reshape(-1)

    def moment(sel, ax):
        return float(np.mean(pos[sel, ax] ** 2))

    assert moment(got, 0) == pytest.approx(moment(expected, 0), rel=0.05)
    assert moment(got, 2) == pytest.approx(moment(expected, 2), rel=0.05)
    # Taller in z by about a factor sqrt(2), hardly wider.
    assert moment(got, 0) / moment(flat, 0) > 1.8
    assert moment(got, 2) / moment(flat, 2) < 1.1


@pytest.mark.parametrize("psf", [None, (1.0, 0.5, 0.5)])
def test_jitter_shifts_each_plane_as_recorded(psf):
    # A vertical tube: in every plane its disc centroid moves by the recorded
    # shift. Digitising a disc of radius 4 voxels moves its centroid by up to
    # ~0.2 voxel (a boundary voxel weighs 4/50 of a voxel).
    spacing = (2.0, 1.0, 1.0)
    tube = syn.straight_tube(length_um=60.0, radius_um=4.0, direction=(1.0, 0.0, 0.0))
    mask, truth = syn.rasterize(tube, spacing=spacing, jitter_vox=1.0, psf_sigma_um=psf, seed=3)
    still, _ = _placed_like(tube, truth, spacing, psf_sigma_um=psf, fit_artefacts=True)
    shift = np.asarray(truth["jitter"]["shift_vox"])
    assert shift.shape == (mask.shape[0], 2)
    assert np.all(np.linalg.norm(shift, axis=1) <= 1.0 + 1e-12) and np.std(shift) > 0.2
    assert np.allclose(truth["jitter"]["shift_um"], shift * np.asarray(spacing[1:]))
    moved = np.array(
        [
            np.subtract(ndimage.center_of_mass(mask[z]), ndimage.center_of_mass(still[z]))
            for z in range(mask.shape[0])
        ]
    )
    assert np.max(np.abs(moved - shift)) < 0.25 and np.mean(np.abs(moved - shift)) < 0.1


def test_blobs_stick_to_walls(tree):
    base, _ = syn.rasterize(tree, fit_artefacts=True)
    mask, truth = syn.rasterize(tree, blobs=6, seed=4)
    assert len(truth["blobs"]) == 6 and truth["rasterize"]["blobs"] == 6
    assert np.all(mask >= base)
    assert int(mask.sum() - base.sum()) == sum(b["n_voxels"] for b in truth["blobs"])
    # Attached (no new 26-component), and no loop or cavity.
    assert n_components(mask) == 1 and n_cavities(mask) == 0
    assert euler_number(mask, connectivity=3) == euler_number(base, connectivity=3)
    for b in truth["blobs"]:
        largest = max(b["semi_axes_um"])
        assert 0.3 * b["vessel_radius_um"] - 1e-9 <= largest <= max(0.8 * b["vessel_radius_um"], 1.0)
        assert np.allclose(np.asarray(b["axes"]) @ np.asarray(b["axes"]).T, np.eye(3))
    # The truth's network is the true one.
    assert truth["summary"] == syn.rasterize(tree)[1]["summary"]


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (2.5, 0.8, 0.8)])
def test_handles_each_add_one_loop(tree, spacing):
    base, _ = syn.rasterize(tree, spacing=spacing, fit_artefacts=True)
    mask, truth = syn.rasterize(tree, spacing=spacing, handles=3, seed=5)
    assert len(truth["handles"]) == 3
    # Euler number = components - loops + cavities: one loop more per handle.
    assert euler_number(mask, connectivity=3) == euler_number(base, connectivity=3) - 3
    assert n_components(mask) == 1 and n_cavities(mask) == 0
    assert truth["summary"]["cyclomatic_number"] == 0  # the truth is still a tree
    for h in truth["handles"]:
        assert h["kind"] in ("handle", "tunnel") and h["euler_change"] == -1
        assert h["vessel_radius_um"] >= 3.0 * max(spacing[1:])


def test_handles_come_as_arcs_and_tunnels():
    tube = syn.straight_tube(length_um=120.0, radius_um=7.0)
    base, _ = syn.rasterize(tube, fit_artefacts=True)
    mask, truth = syn.rasterize(tube, handles=6, seed=2)
    kinds = [h["kind"] for h in truth["handles"]]
    assert set(kinds) == {"handle", "tunnel"}
    # Arcs add voxels, tunnels take them away.
    added = int(np.count_nonzero(mask & ~base))
    removed = int(np.count_nonzero(base & ~mask))
    assert added == sum(h["n_voxels"] for h in truth["handles"] if h["kind"] == "handle")
    assert removed == sum(h["n_voxels"] for h in truth["handles"] if h["kind"] == "tunnel")
    assert euler_number(mask, connectivity=3) == 1 - 6


def test_enclosed_holes_of_several_sizes(tree):
    mask, truth = syn.rasterize(tree, holes=3, hole_radius_vox=(1.5, 2.5), seed=6)
    assert n_cavities(mask) == 3 and n_components(mask) == 1
    assert all(1.5 <= h["radius_vox"] <= 2.5 and h["n_voxels"] >= 14 for h in truth["holes"])
    assert truth["rasterize"]["hole_radius_vox"] == [1.5, 2.5]


def test_open_holes_are_pits_open_to_the_outside(tree):
    base, _ = syn.rasterize(tree, fit_artefacts=True)
    mask, truth = syn.rasterize(tree, open_holes=5, seed=7)
    assert len(truth["open_holes"]) == 5
    assert np.all(mask <= base)
    assert int(base.sum() - mask.sum()) == sum(p["n_voxels"] for p in truth["open_holes"])
    # No cavity, no loop, no piece: every pit is part of the outside background.
    assert n_cavities(mask) == 0 and n_components(mask) == 1
    assert euler_number(mask, connectivity=3) == euler_number(base, connectivity=3)
    radii = [p["radius_vox"] for p in truth["open_holes"]]
    assert all(0.5 <= r <= 2.0 for r in radii) and max(radii) - min(radii) > 0.5


# Radii of at most 2.5 lateral voxels that still stay whole when the tube climbs
# through coarse z planes (a voxel centre within r of the axis in every plane).
@pytest.mark.parametrize(
    "spacing, radius", [((1.0, 1.0, 1.0), 1.5), ((2.5, 0.8, 0.8), 1.9), ((4.0, 1.0, 1.0), 2.2)]
)
def test_gaps_break_thin_vessels(spacing, radius):
    tube = syn.straight_tube(length_um=120.0, radius_um=radius, direction=(0.1, 0.4, 1.0))
    assert n_components(syn.rasterize(tube, spacing=spacing)[0]) == 1
    mask, truth = syn.rasterize(tube, spacing=spacing, gaps=2, seed=8)
    assert n_components(mask) == 3
    d = np.asarray(spacing)
    for g in truth["gaps"]:
        assert g["length_vox"] in (1, 2, 3) and g["segment"] == truth["segments"][0]["id"]
        assert g["length_um"] == pytest.approx(g["length_vox"] * np.sum(np.abs(g["direction"]) * d))
        assert not mask[tuple(np.round(np.asarray(g["centre_um"]) / d).astype(int))]
    # In a ring a gap removes the loop instead of adding a piece: Euler + 1 either way.
    ring, truth_ring = syn.rasterize(
        syn.torus(major_radius_um=20.0, minor_radius_um=radius), spacing=spacing, gaps=2, seed=8
    )
    assert n_components(ring) == 2 and euler_number(ring, connectivity=3) == 2
    assert truth_ring["artefact_euler_change"] == 2 and truth_ring["imaged_euler_number"] == 0


def test_gaps_need_thin_vessels(tree):
    with pytest.raises(InputError, match=r"^gaps: expected 0 when no vessel has radius <= 2.5 voxels"):
        syn.rasterize(tree, gaps=1, seed=1)
    _, truth = syn.rasterize(tree, gaps=1, seed=1, fit_artefacts=True)
    assert truth["gaps"] == []


@pytest.mark.parametrize("kind", ["tree", "bed", "cortex"])
def test_hostile_volume_accounts_for_every_change(kind):
    # Euler number of the mask = that of the vessels as imaged + the recorded
    # changes (holes and specks +1, gaps +1, handles -1; blobs and pits 0); the only
    # cavities are the recorded holes; the truth's network is the clean one.
    if kind == "cortex":
        # Trunks of radius 7-10.5 um take holes and handles, capillaries of 2-3 um the gaps.
        net = syn.cortex_network(shape_um=(200.0, 200.0, 200.0), n_arterioles=2, n_venules=2, seed=3)
    elif kind == "bed":
        # Radii up to 4.5 um: enclosed holes need vessels of >= 3 voxels radius,
        # gaps thin ones; this bed has room for the full count of both.
        net = syn.capillary_bed(shape_um=(64.0, 64.0, 64.0), radius_range_um=(2.0, 4.5), seed=3)
    else:
        net = syn.binary_tree(depth=4, root_radius_um=6.0, length_radius_ratio=8.0, min_radius_um=1.5, seed=5)
    kw = syn.hostile_artefacts(1.0, spacing=(1.0, 1.0, 1.0), seed=9)
    mask, truth = syn.rasterize(net, **kw)
    again, truth_again = syn.rasterize(net, **kw)
    assert np.array_equal(mask, again) and truth == truth_again
    placed = {k: len(truth[k]) for k in ("blobs", "handles", "holes", "open_holes", "gaps", "specks")}
    full = {"blobs": 6, "handles": 2, "holes": 2, "open_holes": 4, "gaps": 3, "specks": 4}
    assert placed == full
    assert euler_number(mask, connectivity=3) == truth["imaged_euler_number"] + truth["artefact_euler_change"]
    change = placed["holes"] + placed["specks"] + placed["gaps"] - placed["handles"]
    assert truth["artefact_euler_change"] == change
    assert n_cavities(mask) == placed["holes"]
    clean = syn.rasterize(net)[1]
    for key in ("n_nodes", "n_segments", "cyclomatic_number", "n_bifurcations"):
        assert truth["summary"][key] == clean["summary"][key]
    other, _ = syn.rasterize(net, **{**kw, "seed": 10})
    assert other.shape == mask.shape and not np.array_equal(other, mask)
    json.dumps(truth)


def test_artefacts_have_their_own_random_streams(tree):
    alone, truth_alone = syn.rasterize(tree, open_holes=3, jitter_vox=0.5, seed=11)
    _, truth_all = syn.rasterize(tree, open_holes=3, jitter_vox=0.5, blobs=4, handles=2, specks=3, seed=11)
    # Pits come before handles, blobs and specks; the plane shifts come first.
    assert truth_all["open_holes"] == truth_alone["open_holes"]
    assert truth_all["jitter"] == truth_alone["jitter"]
    _, truth_specks = syn.rasterize(tree, open_holes=3, jitter_vox=0.5, blobs=4, handles=2, seed=11)
    assert truth_specks["blobs"] == truth_all["blobs"] and truth_specks["handles"] == truth_all["handles"]


def test_synthesize_passes_artefact_options():
    mask, truth = syn.synthesize("tube", blobs=2, open_holes=1, seed=1)
    assert len(truth["blobs"]) == 2 and len(truth["open_holes"]) == 1
    assert truth["synth_params"]["blobs"] == 2


@pytest.mark.parametrize(
    "kwargs, name",
    [
        ({"roughness_correlation_um": 0.0}, "roughness_correlation_um"),
        ({"blobs": -1}, "blobs"),
        ({"handles": 1.5}, "handles"),
        ({"open_holes": "2"}, "open_holes"),
        ({"gaps": True}, "gaps"),
        ({"hole_radius_vox": (2.0, 1.0)}, "hole_radius_vox"),
        ({"hole_radius_vox": 1.0}, "hole_radius_vox"),
        ({"psf_sigma_um": (1.0, 2.0)}, "psf_sigma_um"),
        ({"psf_sigma_um": -1.0}, "psf_sigma_um"),
        ({"psf_threshold": 1.0}, "psf_threshold"),
        ({"jitter_vox": 4.0}, "jitter_vox"),
        ({"fit_artefacts": "yes"}, "fit_artefacts"),
        ({"handles": 1}, "handles"),
    ],
)
def test_bad_artefact_options_raise_input_error(kwargs, name):
    thin = syn.straight_tube(length_um=30.0, radius_um=2.0)
    with pytest.raises(InputError, match=rf"^{name}: expected"):
        syn.rasterize(thin, **kwargs)


def test_bad_strength_raises_input_error():
    with pytest.raises(InputError, match=r"^strength: expected"):
        syn.hostile_artefacts(1.5)


# ------------------------------------------------------------------ cortex-like network

CORTEX_SEEDS = (0, 1, 2)


@pytest.fixture(scope="module")
def cortex():
    """Default cortex networks (400 um box) and their truth solves, by seed."""
    nets = {seed: syn.cortex_network(seed=seed) for seed in CORTEX_SEEDS}
    return {seed: (net, syn.network_flow_truth(net)) for seed, net in nets.items()}


def _end_radius(seg: dict, node: int) -> float:
    return float(seg["radii_um"][0] if seg["node_from"] == node else seg["radii_um"][-1])


def _by_node(net):
    out: dict[int, list[dict]] = {}
    for s in net.segments:
        out.setdefault(s["node_from"], []).append(s)
        out.setdefault(s["node_to"], []).append(s)
    return out


@pytest.mark.parametrize("seed", CORTEX_SEEDS)
@pytest.mark.parametrize("cls", ["arteriole", "venule"])
def test_cortex_forks_obey_the_cube_law(cortex, seed, cls):
    net, _ = cortex[seed]
    forks = {
        node: sorted((_end_radius(s, node) for s in segs), reverse=True)
        for node, segs in _by_node(net).items()
        if len(segs) == 3 and all(s["vessel_class"] == cls for s in segs)
    }
    assert len(forks) >= 5  # every tree forks several times; none would make the check empty
    for r0, r1, r2 in forks.values():
        # Murray CD 1926, PNAS 12:207: r0^3 = r1^3 + r2^3 (exact by construction; float rounding only).
        assert r1**3 + r2**3 == pytest.approx(r0**3, rel=1e-9)
    # Realistic asymmetry: both near-symmetric and clearly asymmetric forks occur
    # (rodent cortical trees, from memory: daughter radius ratios of about 0.5-1).
    ratios = [r2 / r1 for _, r1, r2 in forks.values()]
    assert min(ratios) < 0.75 and max(ratios) > 0.85


@pytest.mark.parametrize("seed", CORTEX_SEEDS)
def test_cortex_sizes_are_mouse_cortex_like(cortex, seed):
    net, _ = cortex[seed]
    by_class = {c: [s for s in net.segments if s["vessel_class"] == c] for c in syn.VESSEL_CLASSES}
    assert all(by_class.values())
    roots = {n["id"] for n in net.nodes if n["kind"] == "border"}
    root_r = {c: [_end_radius(s, s["node_from"]) for s in by_class[c] if s["node_from"] in roots]
              for c in ("arteriole", "venule")}
    assert len(root_r["arteriole"]) == 4 and len(root_r["venule"]) == 5
    # Penetrating venules are about 1.2-2 times as wide as penetrating arterioles (rodent
    # cortex, from memory).
    assert 1.2 <= min(root_r["venule"]) / max(root_r["arteriole"]) and max(root_r["venule"]) / min(
        root_r["arteriole"]) <= 2.0
    # Roots on the pial face z = 0, trees running into the depth.
    assert all(n["pos_um"][0] == 0.0 for n in net.nodes if n["kind"] == "border")
    # Mouse cortical capillaries (from memory): radius 2-3 um, 40-80 um between branch points.
    cap_r = np.array([s["radius_um"] for s in by_class["capillary"]])
    cap_len = np.array([s["length_um"] for s in by_class["capillary"]])
    assert cap_r.min() >= 2.0 and cap_r.max() <= 3.0
    assert 40.0 <= np.median(cap_len) <= 80.0
    # Most capillary junctions join three vessels, as in cortical beds (from memory);
    # tree ends joined to the mesh add one more.
    deg = net.degrees()
    inner = [d for n, d in deg.items() if all(s["vessel_class"] == "capillary" for s in _by_node(net)[n])]
    assert np.mean(np.asarray(inner) == 3) > 0.6
    # Vessel volume fraction of mouse cortex about 2-3 % (from memory); sum of pi r^2 L over the box.
    frac = sum(math.pi * s["radius_um"] ** 2 * s["length_um"] for s in net.segments) / np.prod(net.box_um)
    assert 0.01 <= frac <= 0.04


def test_cortex_is_a_function_of_its_seed():
    small = dict(shape_um=(160.0, 160.0, 160.0), n_arterioles=1, n_venules=1)
    a, b = syn.cortex_network(seed=4, **small), syn.cortex_network(seed=4, **small)
    assert json.dumps(a.to_truth(), sort_keys=True) == json.dumps(b.to_truth(), sort_keys=True)
    c = syn.cortex_network(seed=5, **small)
    assert json.dumps(c.to_truth(), sort_keys=True) != json.dumps(a.to_truth(), sort_keys=True)


@pytest.mark.parametrize("seed", CORTEX_SEEDS)
def test_cortex_truth_flow_conserves_mass(cortex, seed):
    net, res = cortex[seed]
    seg, nodes = res.segments, res.nodes.set_index("node_id")
    st = syn.network_tables(net)[0].set_index("segment_id").loc[seg["segment_id"]]
    ids = {n: i for i, n in enumerate(nodes.index)}
    u = np.array([ids[n] for n in st["node_from"]])
    v = np.array([ids[n] for n in st["node_to"]])
    q = seg["flow_nl_min"].to_numpy()
    # Kirchhoff's current law (Kirchhoff 1845, Ann Phys Chem 64:497): net flow is zero at every
    # node without a pressure condition; numpy bincount, independent of the solver.
    net_in = np.bincount(v, weights=q, minlength=len(ids)) - np.bincount(u, weights=q, minlength=len(ids))
    total = res.summary["total_inflow_nl_min"]
    role = nodes["role"].to_numpy()
    assert total > 0
    # The direct solve is exact to rounding: 1e-9 of the total is many orders above it.
    assert np.abs(net_in[role == "internal"]).max() <= 1e-9 * total
    assert -net_in[role == "inlet"].sum() == pytest.approx(total, rel=1e-9)
    assert net_in[role == "outlet"].sum() == pytest.approx(total, rel=1e-9)
    # Hagen-Poiseuille per segment: Q = pi r_h^4 dP / (8 mu L), from the node pressures.
    p = nodes["pressure_pa"]
    dp = p.loc[st["node_from"]].to_numpy() - p.loc[st["node_to"]].to_numpy()
    mu = seg["viscosity_mpa_s"].to_numpy() * 1e-3
    r_h, length = st["radius_hydraulic_um"].to_numpy() * 1e-6, st["length_um"].to_numpy() * 1e-6
    q_hp = math.pi * r_h**4 * dp / (8 * mu * length)
    assert q == pytest.approx(q_hp * 1e12 * 60, rel=1e-9, abs=1e-12 * total)


@pytest.mark.parametrize("seed", CORTEX_SEEDS)
def test_cortex_flow_runs_arterioles_capillaries_venules(cortex, seed):
    import networkx as nx

    net, res = cortex[seed]
    q = dict(zip(res.segments["segment_id"], res.segments["flow_nl_min"]))
    pressure = dict(zip(res.nodes["node_id"], res.nodes["pressure_pa"]))
    roots = [n["id"] for n in net.nodes if n["kind"] == "border"]
    for cls, sign in (("arteriole", 1.0), ("venule", -1.0)):
        g = nx.Graph([(s["node_from"], s["node_to"]) for s in net.segments if s["vessel_class"] == cls])
        hops = nx.multi_source_dijkstra_path_length(g, [r for r in roots if r in g])
        for s in (s for s in net.segments if s["vessel_class"] == cls):
            # Hop distance from the roots (networkx) orients each vessel independently of the
            # generator: arterioles carry flow away from their root, venules towards it.
            away = hops[s["node_to"]] - hops[s["node_from"]]
            assert away != 0 and sign * q[s["id"]] * away > 0
    p_art, p_ven = 55.0 * syn.MMHG_PA, 18.0 * syn.MMHG_PA
    for s in (s for s in net.segments if s["vessel_class"] == "capillary"):
        pa, pb = pressure[s["node_from"]], pressure[s["node_to"]]
        # Poiseuille: flow from the higher to the lower pressure; discrete maximum principle:
        # pressures inside the network lie between the two boundary pressures.
        assert np.sign(q[s["id"]]) == np.sign(pa - pb)
        assert p_ven < min(pa, pb) and max(pa, pb) < p_art


@pytest.mark.parametrize("seed", CORTEX_SEEDS)
def test_cortex_truth_flow_is_physiological(cortex, seed):
    net, res = cortex[seed]
    cls = dict(zip(*(lambda t: (t["segment_id"], t["vessel_class"]))(syn.network_tables(net)[0])))
    v = res.segments["velocity_mm_s"].to_numpy()
    cap = np.array([cls[i] == "capillary" for i in res.segments["segment_id"]])
    assert res.summary["viscosity_model"] == "pries1994"
    # Red cell speeds in mouse cortical capillaries are about 0.5-2 mm/s (from memory); the
    # mean blood speed is lower than the cells' (Fahraeus effect), hence 0.1-5 mm/s.
    assert 0.1 <= np.median(v[cap]) <= 5.0 and 0.1 <= np.mean(v[cap]) <= 5.0
    # Cortical blood flow about 1 ml/min per g in mice (from memory; tissue ~1 g/ml):
    # 0.5-2.5 ml/min/g allows for anaesthesia and the model.
    ml_min_per_cm3 = res.summary["total_inflow_nl_min"] * 1e-6 / (np.prod(net.box_um) * 1e-12)
    assert 0.5 <= ml_min_per_cm3 <= 2.5


def test_cortex_flow_directions_do_not_depend_on_the_pressures(cortex):
    # Flows scale with the pressure difference (Hagen-Poiseuille; the in-vivo viscosity
    # depends on diameter and haematocrit, and phase separation on flow fractions only,
    # Pries et al. 1994, Circ Res 75:904; Pries et al. 1990, Circ Res 67:826).
    net, res = cortex[0]
    other = syn.network_flow_truth(net, arteriole_pressure_pa=7999.0, venule_pressure_pa=1999.0)
    scale = (7999.0 - 1999.0) / (55.0 * syn.MMHG_PA - 18.0 * syn.MMHG_PA)
    assert other.segments["flow_nl_min"].to_numpy() == pytest.approx(
        scale * res.segments["flow_nl_min"].to_numpy(), rel=1e-9, abs=1e-12)
    with pytest.raises(InputError, match=r"^arteriole_pressure_pa: expected"):
        syn.network_flow_truth(net, arteriole_pressure_pa=1000.0, venule_pressure_pa=2000.0)


def _length_inside(points: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> float:
    """Length of a polyline inside a box: each straight step clipped by the slab method
    (Liang & Barsky 1984, ACM Trans Graph 3:1), written here independently of the generator."""
    a, b = points[:-1], points[1:]
    d = b - a
    with np.errstate(divide="ignore", invalid="ignore"):
        t1, t2 = (lo - a) / d, (hi - a) / d
    t_in = np.where(d == 0, np.where((a >= lo) & (a <= hi), -np.inf, np.inf), np.minimum(t1, t2))
    t_out = np.where(d == 0, np.where((a >= lo) & (a <= hi), np.inf, -np.inf), np.maximum(t1, t2))
    enter = np.maximum(t_in.max(axis=1), 0.0)
    leave = np.minimum(t_out.min(axis=1), 1.0)
    return float(np.sum(np.maximum(leave - enter, 0.0) * np.linalg.norm(d, axis=1)))


def _point_at(points: np.ndarray, arc_um: float) -> np.ndarray:
    arc = np.r_[0.0, np.cumsum(np.linalg.norm(np.diff(points, axis=0), axis=1))]
    return np.array([np.interp(arc_um, arc, points[:, k]) for k in range(3)])


@pytest.mark.parametrize("seed", CORTEX_SEEDS)
@pytest.mark.parametrize("lo", [(100.0, 100.0, 100.0), (0.0, 57.0, 143.0)])
def test_crop_maps_every_piece_to_its_source(cortex, seed, lo):
    net, _ = cortex[seed]
    lo = np.asarray(lo)
    hi = lo + 200.0
    sub = syn.crop_network(net, (lo, hi))
    assert sub.box_um == (200.0, 200.0, 200.0) and sub.params["crop_lo_um"] == lo.tolist()
    src = {s["id"]: s for s in net.segments}
    pieces: dict[int, float] = {}
    for s in sub.segments:
        orig = src[s["source_segment"]]
        assert s["vessel_class"] == orig["vessel_class"]
        assert s["source_end_um"] - s["source_start_um"] == pytest.approx(s["length_um"], abs=1e-9)
        # Same orientation: the piece starts and ends where its arc positions say on the source.
        for end, arc in ((0, s["source_start_um"]), (-1, s["source_end_um"])):
            assert s["points_um"][end] + lo == pytest.approx(_point_at(orig["points_um"], arc), abs=1e-6)
        assert np.all(s["points_um"] >= -1e-6) and np.all(s["points_um"] <= 200.0 + 1e-6)
        pieces[s["source_segment"]] = pieces.get(s["source_segment"], 0.0) + s["length_um"]
    # Lengths add up: the pieces of each source cover exactly its length inside the box.
    inside = {i: _length_inside(s["points_um"], lo, hi) for i, s in src.items()}
    for i, length in inside.items():
        assert pieces.get(i, 0.0) == pytest.approx(length, abs=1e-6)
    # Cut ends are border nodes on the box's faces; no blind end appears.
    deg = sub.degrees()
    for n in sub.nodes:
        if deg[n["id"]] == 1:
            p = np.asarray(n["pos_um"])
            assert n["kind"] == "border" and min(p.min(), (200.0 - p).min()) <= 1e-6
    assert sum(n["kind"] == "border" for n in sub.nodes) >= 10


def test_crop_of_a_crop_maps_to_the_first_network(cortex):
    net, _ = cortex[0]
    first = syn.crop_network(net, ((50.0, 50.0, 50.0), (350.0, 350.0, 350.0)))
    second = syn.crop_network(first, ((50.0, 50.0, 50.0), (250.0, 250.0, 250.0)))
    direct = syn.crop_network(net, ((100.0, 100.0, 100.0), (300.0, 300.0, 300.0)))
    assert second.params["crop_lo_um"] == [100.0] * 3 and second.params["crop_hi_um"] == [300.0] * 3

    def key(n):
        return sorted((s["source_segment"], round(s["source_start_um"], 6), round(s["source_end_um"], 6))
                      for s in n.segments)

    assert key(second) == key(direct)


def test_synthesize_cortex_carries_classes_and_truth_flows():
    # A grid smaller than the box crops the volume, as for the other kinds; seed goes to the
    # builder and to the artefacts.
    kw = syn.hostile_artefacts(0.5, spacing=(2.0, 1.0, 1.0), seed=1)
    mask, truth = syn.synthesize(
        "cortex", shape_um=(200.0, 200.0, 200.0), n_arterioles=2, n_venules=2, shape=(60, 150, 150), **kw
    )
    assert mask.shape == (60, 150, 150) and mask.any()
    json.dumps(truth)
    segs = truth["segments"]
    assert {s["vessel_class"] for s in segs} == set(syn.VESSEL_CLASSES)
    assert truth["params"]["flow_truth"]["viscosity_model"] == "pries1994"
    # Pieces of vessels cut by the volume's faces keep the flow of the whole network, so
    # Kirchhoff's current law (Kirchhoff 1845, Ann Phys Chem 64:497) holds at every node
    # inside the volume, the cut (border) ends excepted.
    net_in: dict[int, float] = {}
    for s in segs:
        net_in[s["node_to"]] = net_in.get(s["node_to"], 0.0) + s["flow_truth_nl_min"]
        net_in[s["node_from"]] = net_in.get(s["node_from"], 0.0) - s["flow_truth_nl_min"]
    total = truth["params"]["flow_truth"]["total_inflow_nl_min"]
    inner = [abs(net_in[n["id"]]) for n in truth["nodes"] if n["kind"] != "border"]
    assert len(inner) >= 5 and max(inner) <= 1e-9 * total
    assert any(s.get("clipped") for s in segs)


def test_network_tables_hydraulic_radius_of_a_taper():
    # A straight tube tapering linearly from r1 to r2 over L: integral of dl / r^4 is
    # L (r1^-3 - r2^-3) / (3 (r2 - r1)) (elementary calculus), so r_h^4 = 3 (r2 - r1) / (r1^-3 - r2^-3).
    r1, r2, length = 2.0, 5.0, 80.0
    pts = np.linspace([0.0, 0.0, 0.0], [0.0, 0.0, length], 161)
    nodes = [_node(0, pts[0], "border"), _node(1, pts[-1], "border")]
    seg = _make_segment(0, nodes[0], nodes[1], pts, np.linspace(r1, r2, 161), vessel_class="capillary")
    seg2 = _make_segment(1, nodes[1], nodes[0], pts[::-1], 3.0, vessel_class="arteriole")
    segments, node_table = syn.network_tables(syn.VesselNetwork(nodes, [seg, seg2]))
    expected = (3 * (r2 - r1) / (r1**-3 - r2**-3)) ** 0.25
    # Midpoint rule on 0.5 um steps: relative error ~ (h / r)^2 / 24 < 1e-3.
    assert segments["radius_hydraulic_um"].iloc[0] == pytest.approx(expected, rel=1e-3)
    assert segments["radius_hydraulic_um"].iloc[1] == pytest.approx(3.0, rel=1e-12)
    assert segments["vessel_class"].tolist() == ["capillary", "arteriole"]
    assert node_table["degree"].tolist() == [2, 2] and node_table["z_um"].tolist() == [0.0, 0.0]
