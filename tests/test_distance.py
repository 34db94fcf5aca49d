"""Two-label distance maps and their order statistics against SciPy and numpy."""

import numpy as np
import pytest
from scipy import ndimage as ndi

from pipeline import synthetic
from pipeline._distance import _REACH, _order_statistics, tissue_quantiles, two_label_distance


def _reference(mask, spacing):
    # Reference: SciPy's exact Euclidean distance transform, once per class.
    # Neither treats the array faces as background.
    out = np.zeros(mask.shape)
    if (~mask).any():
        out[mask] = ndi.distance_transform_edt(mask, sampling=spacing)[mask]
    else:
        out[mask] = np.inf
    if mask.any():
        out[~mask] = ndi.distance_transform_edt(~mask, sampling=spacing)[~mask]
    else:
        out[~mask] = np.inf
    return out


def _check(mask, spacing):
    got = two_label_distance(mask, spacing=spacing)
    want = _reference(mask, spacing)
    assert got.dtype == np.float32 and got.shape == mask.shape and got.flags.c_contiguous
    assert np.array_equal(np.isinf(got), np.isinf(want))
    fin = np.isfinite(want)
    # float32 result against float64 reference: a few units in the last place.
    np.testing.assert_allclose(got[fin], want[fin], rtol=2e-6, atol=0)


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (3.0, 1.0, 1.0), (0.7, 1.3, 2.1)])
@pytest.mark.parametrize("fraction", [0.03, 0.3, 0.9])
def test_random_volumes_match_scipy(spacing, fraction):
    rng = np.random.default_rng(int(fraction * 100))
    mask = rng.random((23, 37, 70)) < fraction
    _check(mask, spacing)


def test_vessel_volume_matches_scipy():
    mask, _ = synthetic.rasterize(synthetic.y_branch(parent_radius_um=5, parent_length_um=30,
                                                     daughter_length_um=30), spacing=(2, 1, 1))
    _check(mask, (2.0, 1.0, 1.0))


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_far_sites_beyond_the_search_window(axis):
    # A single site far from most voxels: every line's answer lies beyond the
    # windowed search, so the exact lower-envelope fallback must take over.
    shape = [9, 9, 9]
    shape[axis] = 3 * _REACH + 7
    mask = np.zeros(shape, bool)
    mask[(1, 2, 3)] = True
    _check(mask, (1.0, 1.0, 1.0))
    _check(~mask, (1.0, 2.0, 0.5))


@pytest.mark.parametrize("shape", [(1, 40, 33), (40, 33), (1, 1, 50), (5, 1, 1)])
def test_planes_lines_and_2d(shape):
    rng = np.random.default_rng(7)
    mask = rng.random(shape) < 0.2
    mask.flat[0] = True
    mask.flat[-1] = False
    spacing = (1.5, 0.5, 1.0)[-len(shape):]
    _check(mask, spacing)


def test_one_class_is_infinite():
    for value in (True, False):
        got = two_label_distance(np.full((4, 5, 6), value), spacing=(1, 1, 1))
        assert np.isinf(got).all()


@pytest.mark.parametrize("threads", [1, 2])
def test_thread_count_does_not_change_the_map(threads):
    rng = np.random.default_rng(3)
    mask = ndi.binary_dilation(rng.random((30, 40, 150)) < 0.002, iterations=3)
    one = two_label_distance(mask, spacing=(1, 1, 1), threads=1)
    assert np.array_equal(two_label_distance(mask, spacing=(1, 1, 1), threads=threads), one)


def test_rejects_non_boolean_and_bad_spacing():
    with pytest.raises(TypeError, match="bool"):
        two_label_distance(np.zeros((3, 3), np.uint8), spacing=(1, 1))
    with pytest.raises(ValueError, match="spacing"):
        two_label_distance(np.zeros((3, 3), bool), spacing=(1, 0))
    with pytest.raises(ValueError, match="2-D or 3-D"):
        two_label_distance(np.zeros(3, bool), spacing=(1,))


@pytest.mark.parametrize("n, chunks", [(1, 1), (9, 2), (1000, 3), (200_000, 2)])
def test_tissue_quantiles_match_numpy(n, chunks):
    # Reference: numpy.quantile (linear interpolation, numpy's default) on the
    # tissue values alone; the compiled selection must give the same numbers
    # whatever the thread split, with vessel zeros in the map and tied values.
    rng = np.random.default_rng(n)
    flat = np.round(rng.random(n) * 40, 1).astype(np.float32) + 0.1  # ties, as on a voxel grid
    flat[rng.random(n) < 0.3] = 0.0
    tissue = flat[flat > 0]
    got = tissue_quantiles(flat, tissue.size)
    want = np.quantile(tissue, [0.5, 0.95]) if tissue.size else (0.0, 0.0)
    assert got == pytest.approx(tuple(want), rel=1e-6)  # float32 values, float64 interpolation
    ks = np.unique(rng.integers(0, n, 4)).astype(np.int64)
    assert np.array_equal(_order_statistics(flat, ks, chunks), np.sort(flat)[ks])
