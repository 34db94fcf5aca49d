"""Wall-fit radii (pipeline/radii.py): independent of direction and voxel shape.

Straight capillary tubes of known radius, rasterised by the project's
generator with the axis at a random sub-voxel offset, in six directions
(two axes, a face diagonal, the body diagonal, two oblique), at 1 µm voxels
and at 2.5 x 0.8 x 0.8 µm voxels (a two-photon stack, z step about three
times the pixel). The truth is the radius the tube was drawn with.
"""

import numpy as np
import pytest

import pipeline
from pipeline import radii, synthetic

DIRECTIONS = {"axis x": (0, 0, 1), "axis z": (1, 0, 0), "face diagonal": (0, 1, 1), "body diagonal": (1, 1, 1),
              "oblique 1": (0.3, 0.5, 1.0), "oblique 2": (1.0, 0.2, 0.45)}
SPACINGS = {"isotropic 1 µm": (1.0, 1.0, 1.0), "two-photon 2.5 x 0.8 x 0.8 µm": (2.5, 0.8, 0.8)}
RADII_UM = (2.0, 2.5, 3.5)  # capillaries: 4-8 µm across (common practice)
SEEDS = (0, 1, 2)
BOX_UM = 60.0
CONFIG = {"flow": {"enabled": False}, "cleaning": {"min_object_volume_um3": 100.0}}


def _measured_ratio(spacing, radius, direction, seed, estimator="wall_fit"):
    shape = [int(BOX_UM / s) + 1 for s in spacing]
    rng = np.random.default_rng(seed)
    centre = np.array(shape) * np.array(spacing) / 2 + rng.uniform(-0.5, 0.5, 3) * np.array(spacing)
    net = synthetic.straight_tube(length_um=400, radius_um=radius, direction=direction, centre_um=centre)
    mask, _ = synthetic.rasterize(net, spacing=spacing, shape=shape)
    res = pipeline.analyze(mask, spacing=spacing, config={**CONFIG, "radii": {"estimator": estimator}})
    seg = res.segments.loc[res.segments["length_um"].idxmax()]
    return float(seg["radius_um"]) / radius


@pytest.fixture(scope="module")
def table():
    """measured / true radius for every spacing, radius, direction and seed."""
    return {(sp, r, d, seed): _measured_ratio(SPACINGS[sp], r, DIRECTIONS[d], seed)
            for sp in SPACINGS for r in RADII_UM for d in DIRECTIONS for seed in SEEDS}


@pytest.mark.parametrize("spacing", list(SPACINGS))
@pytest.mark.parametrize("radius", RADII_UM)
def test_every_radius_within_ten_percent(table, spacing, radius):
    # Target of the issue: every capillary radius within 10 % of the truth
    # (a 10 % radius error is a 1.46x resistance error, r^-4).
    ratios = {(d, s): table[(spacing, radius, d, s)] for d in DIRECTIONS for s in SEEDS}
    worst = max(ratios.items(), key=lambda kv: abs(kv[1] - 1))
    assert abs(worst[1] - 1) <= 0.10, worst


@pytest.mark.parametrize("radius", RADII_UM)
def test_isotropic_radii_do_not_depend_on_direction(table, radius):
    # max/min across directions (each direction: mean over seeds) <= 1.15, the target.
    per_dir = [np.mean([table[("isotropic 1 µm", radius, d, s)] for s in SEEDS]) for d in DIRECTIONS]
    assert max(per_dir) / min(per_dir) <= 1.15


@pytest.mark.parametrize("radius", RADII_UM)
def test_two_photon_radii_depend_little_on_direction(table, radius):
    # Measured: max/min 1.05-1.11 over directions; horizontal vessels that
    # run exactly along a lattice row or diagonal at coarse z are the worst
    # (every row crosses the wall at the same phase, so quantisation does not
    # average out along the vessel).
    per_dir = [np.mean([table[("two-photon 2.5 x 0.8 x 0.8 µm", radius, d, s)] for s in SEEDS]) for d in DIRECTIONS]
    assert max(per_dir) / min(per_dir) <= 1.15


def test_the_distance_map_depends_on_direction_where_the_wall_fit_does_not(table):
    # What the wall fit replaces: distances between voxel centres snap to
    # lattice values, so a 2.5 µm tube at 1 µm voxels reads differently along
    # an axis and along a diagonal (measured max/min about 1.2 over the six
    # directions, seed 0).
    old = [_measured_ratio((1.0, 1.0, 1.0), 2.5, d, 0, "distance_map") for d in DIRECTIONS.values()]
    new = [table[("isotropic 1 µm", 2.5, d, 0)] for d in DIRECTIONS]
    assert max(old) / min(old) > 1.15 > max(new) / min(new)


def test_wall_faces_match_a_direct_count():
    rng = np.random.default_rng(3)
    mask = rng.random((7, 8, 9)) < 0.5
    faces = radii._wall_faces(mask)
    for a in range(3):
        for bit, shift in ((2 * a, -1), (2 * a + 1, 1)):
            got = (faces >> bit) & 1
            nb = np.zeros_like(mask)
            src = [slice(None)] * 3
            dst = [slice(None)] * 3
            if shift == 1:
                src[a], dst[a] = slice(1, None), slice(0, -1)
            else:
                src[a], dst[a] = slice(0, -1), slice(1, None)
            nb[tuple(dst)] = ~mask[tuple(src)]  # tissue neighbour inside the array
            want = mask & nb
            assert np.array_equal(got.astype(bool), want), (a, shift)


def test_planar_masks_keep_their_in_plane_radii():
    r0 = np.array([1.5, 2.0, 2.5])
    fit = radii.wall_radii(np.ones((1, 5, 5), bool), spacing=(1, 1, 1), offset=(0, 0, 0),
                           points_um=np.zeros((3, 3)), offsets=np.array([0, 3]), radii_um=r0, planar=True)
    assert np.array_equal(fit.radii, r0) and np.array_equal(fit.plain, r0) and not fit.fitted.any()


ROUGH_DIRECTIONS = ((0.3, 0.5, 0.8), (0.0, 0.2, 1.0), (0.6, 0.6, 0.5), (1.0, 0.0, 0.0), (0.1, 0.9, 0.2))


@pytest.mark.parametrize("radius", (2.5, 4.0, 8.0, 12.0))
def test_rough_walls_read_their_mean_radius(radius):
    # Relative roughness 0.25 varying over 1.5 µm, the hostile end of the
    # artefact model, at 3 x 1 x 1 µm voxels: the generator's wall radius is
    # r (1 + 0.25 g) with g zero-mean, so the truth is the wall's mean over
    # angle. A fit to wall points weighs the wall by arc length and reads
    # r (1 + s^2), 6 % wide at s = 0.25 (the plain fit: +4-5 % at 2-5 µm,
    # mean of five directions). Within 3.5 %: half the uncorrected bias plus
    # the clean tubes' own spread of about 1 %. Measured: +1.3, +2.0, +2.4
    # and +1.1 % at 2.5, 4, 8 and 12 µm; the thick ones read -1 and -3 % when
    # the measured radius's reach was 1.6 distance-map radii, which cut off
    # their outer bulges (module notes of pipeline/radii.py).
    sp = (3.0, 1.0, 1.0)
    vals = []
    for seed, direction in enumerate(ROUGH_DIRECTIONS):
        net = synthetic.straight_tube(length_um=80.0, radius_um=radius, direction=direction)
        mask, _ = synthetic.rasterize(net, spacing=sp, roughness=0.25, roughness_correlation_um=1.5, seed=seed)
        res = pipeline.analyze(mask, spacing=sp, config=CONFIG)
        seg = res.segments.loc[res.segments["length_um"].idxmax()]
        vals.append(float(seg["radius_um"]) / radius)
    assert abs(np.mean(vals) - 1.0) <= 0.035, vals
