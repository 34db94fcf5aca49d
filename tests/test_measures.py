"""Per-segment and sample measures against independent computations."""

import math

import numpy as np
import pytest
from scipy import ndimage as ndi

import pipeline
from pipeline import synthetic
from pipeline.measures import _smooth_one, _soam_resampled, tissue_distance


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (2.0, 1.0, 0.5)])
def test_tissue_distance_matches_scipy(spacing):
    rng = np.random.default_rng(0)
    crop = rng.random((20, 30, 25)) < 0.03
    shape, offset = (30, 40, 35), (4, 6, 3)
    full = np.zeros(shape, bool)
    full[4:24, 6:36, 3:28] = crop
    # Reference: SciPy's exact EDT and numpy's default quantiles over tissue voxels.
    ref = ndi.distance_transform_edt(~full, sampling=spacing)[~full]
    med, p95 = tissue_distance(crop, offset, shape, spacing)
    assert med == pytest.approx(np.quantile(ref, 0.5), rel=1e-5)
    assert p95 == pytest.approx(np.quantile(ref, 0.95), rel=1e-5)


def test_smoothing_keeps_straight_lines_and_ends():
    t = np.linspace(0, 1, 40)[:, None]
    line = np.array([1.0, 2.0, 3.0]) + t * np.array([10.0, -4.0, 7.0])
    out = np.empty_like(line)
    _smooth_one(line, 3.0, False, out)
    # Point reflection makes the Gaussian odd-symmetric at the ends: a
    # straight, evenly sampled line is a fixed point and the ends stay put.
    assert np.allclose(out, line, atol=1e-12)


def test_smoothing_removes_staircase_excess():
    # A 26-connected digital line at 22.5 degrees overstates the length by
    # about 8 % in raw steps; after smoothing the polyline is within 1 %.
    k = np.arange(0, 200)
    pts = np.column_stack([np.zeros_like(k), np.rint(k * math.tan(math.radians(22.5))), k]).astype(float)
    true_len = np.linalg.norm(pts[-1] - pts[0])
    raw = np.linalg.norm(np.diff(pts, axis=0), axis=1).sum()
    out = np.empty_like(pts)
    _smooth_one(pts, 2.0, False, out)
    smooth = np.linalg.norm(np.diff(out, axis=0), axis=1).sum()
    assert raw / true_len - 1 > 0.05
    assert smooth / true_len == pytest.approx(1.0, abs=0.01)


@pytest.mark.parametrize("a, p", [(12.0, 20.0), (5.0, 40.0)])
def test_soam_of_an_exact_helix(a, p):
    # Bullitt et al. 2003 (IEEE Trans Med Imaging 22:1163): SOAM sums in-plane
    # and torsional angles per length; for a finely sampled curve it tends to
    # sqrt(kappa^2 + tau^2) = 1 / sqrt(a^2 + c^2) for a helix, c = p / (2 pi).
    c = p / (2 * math.pi)
    t = np.linspace(0, 6 * math.pi, 6000)
    pts = np.column_stack([c * t, a * np.cos(t), a * np.sin(t)])
    arc = np.r_[0.0, np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))]
    # 2 %: chord sampling every 1 µm on a curve of radius >= 5 µm. Every
    # torsional angle counts here (plane floor 0): at a 1 µm step the in-plane
    # angles are below the floor that keeps voxel wobble out of the torsion.
    assert _soam_resampled(pts, arc, 1.0, 0.0) == pytest.approx(1 / math.sqrt(a * a + c * c), rel=0.02)


def test_soam_of_a_straight_line_is_zero():
    pts = np.column_stack([np.linspace(0, 50, 101), np.zeros(101), np.linspace(0, 20, 101)])
    arc = np.r_[0.0, np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))]
    assert _soam_resampled(pts, arc, 2.0) == pytest.approx(0.0, abs=1e-6)


@pytest.mark.parametrize("length_um, step_um", [(5.0, 2.0), (23.9, 8.0)])
def test_soam_of_a_curve_shorter_than_three_steps_is_undefined(length_um, step_um):
    # Bullitt et al. 2003: one term needs three successive chords (four points);
    # a shorter curve has no value (NaN), not a turning of 0.
    t = np.linspace(0, length_um / 20.0, 200)
    pts = np.column_stack([np.zeros_like(t), 20 * np.cos(t), 20 * np.sin(t)])
    arc = np.r_[0.0, np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))]
    assert math.isnan(_soam_resampled(pts, arc, step_um))


def test_planar_tissue_distance_matches_scipy():
    # Planar masks are held as (1, Y, X): the distance is in-plane only.
    rng = np.random.default_rng(1)
    crop = rng.random((1, 20, 30)) < 0.05
    full = np.zeros((30, 40), bool)
    full[4:24, 6:36] = crop[0]
    # Reference: SciPy's exact EDT in the plane, numpy's default quantiles.
    ref = ndi.distance_transform_edt(~full, sampling=(0.5, 2.0))[~full]
    med, p95 = tissue_distance(crop, (0, 4, 6), (1, 30, 40), (3.0, 0.5, 2.0), planar=True)
    assert (med, p95) == pytest.approx(tuple(np.quantile(ref, [0.5, 0.95])), rel=1e-5)  # float32 map


@pytest.mark.parametrize("separation_um", [20.0, 24.0, 30.0])
def test_short_thin_vessel_between_thick_ones_keeps_its_radius(separation_um):
    # A capillary of radius 2 µm joining two vessels of radius 6 µm over 8-18 µm
    # of centreline (rail centres 20-30 µm apart): near each end it runs
    # inside the thick vessel's wall region, about that vessel's radius deep,
    # so its radius must come from its middle, not from within its own radius
    # of the junctions. Truth: the generator's radius; 10 % is the issue's
    # radius target.
    net = synthetic.ladder(rail_length_um=80.0, rail_separation_um=separation_um, rungs=2, rail_radius_um=6.0,
                           rung_radius_um=2.0)
    mask, truth = synthetic.rasterize(net, spacing=(1.0, 1.0, 1.0))
    res = pipeline.analyze(mask, spacing=(1.0, 1.0, 1.0), config={"flow": {"enabled": False}})
    assert {s["radius_um"] for s in truth["segments"]} == {6.0, 2.0}
    # The rungs run along y, the rails along x.
    ends = np.array([[c[0], c[-1]] for c in res.centrelines])
    chord = ends[:, 1] - ends[:, 0]
    along_y = np.abs(chord[:, 1]) > 0.9 * np.linalg.norm(chord, axis=1)
    assert along_y.sum() == 2
    assert res.segments.loc[along_y, "radius_um"].to_numpy() == pytest.approx([2.0, 2.0], rel=0.10)
