"""Centrelines and radii: ridge correction, anisotropic resampling, border ends."""

import numpy as np
import pytest

from pipeline import synthetic
from pipeline.centrelines import extract_centrelines, resample_isotropic


def _tube(radius, direction, spacing=(1.0, 1.0, 1.0), length=50.0):
    mask, truth = synthetic.rasterize(
        synthetic.straight_tube(length_um=length, radius_um=radius, direction=direction), spacing=spacing
    )
    return mask, truth


def _axis_distance(points, truth):
    # Distance of each point from the true tube axis (a straight segment).
    seg = truth["segments"][0]
    p = np.asarray(seg["points_um"])
    a, b = p[0], p[-1]
    d = (b - a) / np.linalg.norm(b - a)
    v = points - a
    return np.linalg.norm(v - np.outer(v @ d, d), axis=1)


@pytest.mark.parametrize("radius", [2.0, 3.0, 4.5, 6.0])
@pytest.mark.parametrize("direction", [(0, 0, 1), (0, 1, 2), (1, 1, 1)])
def test_radius_along_tube(radius, direction):
    mask, truth = _tube(radius, direction)
    cl = extract_centrelines(mask, spacing=(1, 1, 1), offset=(0, 0, 0), original_shape=mask.shape)
    # The centreline hugs the axis: 95 % of it within one voxel, all of it
    # within 1.5 (the last voxels before a cut face can bend by a voxel).
    # Inner: away from the cut faces by more than the radius. A 26-connected
    # line has one voxel per unit step along its dominant axis, so the tube
    # holds about 50 m voxels (m the largest component of its unit
    # direction), less r of them at each end (within the radius of a face).
    inner = ~cl.on_border
    m = np.max(np.abs(direction)) / np.linalg.norm(direction)
    assert inner.sum() >= 0.8 * (50 * m - 2 * radius)
    off_axis = _axis_distance(cl.positions_um[inner], truth)
    assert np.mean(off_axis <= 1.0) >= 0.95 and off_axis.max() <= 1.5
    # Issue acceptance: the radius within half a voxel.
    assert abs(np.median(cl.radii_um[inner]) - radius) <= 0.5


def test_ridge_is_never_worse_on_average():
    errs = {True: [], False: []}
    for radius in (2.5, 3.5, 5.0):
        for direction in ((0, 1, 1), (1, 2, 3)):
            mask, truth = _tube(radius, direction)
            for ridge in (True, False):
                cl = extract_centrelines(mask, spacing=(1, 1, 1), offset=(0, 0, 0), original_shape=mask.shape,
                                         half_voxel_correction=ridge)
                errs[ridge].append(abs(np.median(cl.radii_um[~cl.on_border]) - radius))
    assert np.mean(errs[True]) < np.mean(errs[False])


def test_border_ends_reach_the_face():
    mask, truth = _tube(4.0, (0, 0, 1), length=60.0)
    cl = extract_centrelines(mask, spacing=(1, 1, 1), offset=(0, 0, 0), original_shape=mask.shape)
    # The tube is cut by both x faces: the centreline runs from face to face.
    assert cl.positions_um[:, 2].min() <= 1.0
    assert cl.positions_um[:, 2].max() >= mask.shape[2] - 2.0


def test_resample_isotropic_keeps_the_acquired_planes():
    mask, _ = _tube(3.0, (0, 1, 1), spacing=(3.0, 1.0, 1.0))
    fine = resample_isotropic(mask, spacing=(3.0, 1.0, 1.0), target=1.0)
    assert fine.shape == ((mask.shape[0] - 1) * 3 + 1, mask.shape[1], mask.shape[2])
    # Shape-based interpolation reproduces the data on the planes that were imaged.
    assert np.array_equal(fine[::3], mask)


def _betti(mask):
    """Pieces, cavities and tunnels of a 3-D mask (26-connected vessel, 6-connected background).

    Tunnels from the Euler number of scikit-image, the reference:
    chi = pieces - tunnels + cavities.
    """
    from scipy import ndimage as ndi
    from skimage.measure import euler_number

    pieces = ndi.label(mask, np.ones((3, 3, 3)))[1]
    cavities = ndi.label(np.pad(~mask, 1, constant_values=True))[1] - 1
    return pieces, cavities, pieces + cavities - euler_number(mask, connectivity=3)


def test_resample_keeps_an_edge_contact_across_planes():
    # Two vessel voxels in consecutive planes 2 µm apart that touch by an
    # edge only: one 26-connected piece. The fine plane between them lies
    # half-way, where the interpolated distance is exactly 0 at both voxels
    # (1 µm inside the one, 1 µm outside the other).
    mask = np.zeros((2, 6, 6), bool)
    mask[0, 2, 2] = mask[1, 2, 3] = True
    fine = resample_isotropic(mask, spacing=(2.0, 1.0, 1.0), target=1.0)
    assert _betti(fine)[0] == 1
    # The tie is decided alike at both voxels (by the side beyond it), so
    # the fine plane takes exactly one of the two.
    assert fine[1].sum() == 1


@pytest.mark.parametrize("dz", [2.0, 4.0])
@pytest.mark.parametrize("seed", [0, 1])
def test_resample_keeps_the_tunnels_and_cavities_of_a_hostile_mask(dz, seed):
    # A tree with every artefact at full strength, drawn at an even multiple
    # of the fine step, where half-way planes make ties: resampling must not
    # open or close loops (opening edge contacts made 27-50 tunnels out of
    # the drawn 2).
    net = synthetic.binary_tree(depth=3, root_radius_um=7.0, exponent=3.0, seed=seed, min_radius_um=1.5, wiggle=0.2)
    spacing = (dz, 1.0, 1.0)
    mask, _ = synthetic.rasterize(net, **{"spacing": spacing,
                                          **synthetic.hostile_artefacts(1.0, spacing=spacing, seed=seed)})
    fine = resample_isotropic(mask, spacing=spacing, target=1.0)
    drawn, resampled = _betti(mask), _betti(fine)
    assert resampled[1:] == drawn[1:]


@pytest.mark.parametrize("direction", [(0, 0, 1), (0, 1, 1), (1, 0, 2)])
def test_anisotropic_radius_matches_isotropic(direction):
    radii = {}
    for sp in ((1.0, 1.0, 1.0), (3.0, 1.0, 1.0)):
        mask, _ = _tube(4.0, direction, spacing=sp, length=60.0)
        cl = extract_centrelines(mask, spacing=sp, offset=(0, 0, 0), original_shape=mask.shape)
        radii[sp[0]] = np.mean(cl.radii_um[~cl.on_border])
    # Issue acceptance for whole trees is 5 %; a single tube of 4 um radius
    # (1.3 planes at 3 um) is held to 10 %, the in-plane lattice step.
    assert radii[3.0] == pytest.approx(radii[1.0], rel=0.10)


def test_tissue_distance_from_the_shared_map_matches_scipy():
    from scipy import ndimage as ndi

    from pipeline.cleaning import clean_mask

    mask, _ = synthetic.rasterize(synthetic.y_branch(parent_radius_um=4, parent_length_um=30,
                                                     daughter_length_um=30), spacing=(1, 1, 1))
    c = clean_mask(mask, spacing=(1, 1, 1))
    cl = extract_centrelines(c.mask, spacing=(1, 1, 1), offset=c.offset, original_shape=c.original_shape)
    full = np.zeros(c.original_shape, bool)
    full[tuple(slice(o, o + n) for o, n in zip(c.offset, c.mask.shape))] = c.mask
    # Reference: SciPy's exact EDT of the tissue, numpy's default quantiles.
    ref = ndi.distance_transform_edt(~full)[~full]
    assert cl.tissue_distance_um == pytest.approx((np.quantile(ref, 0.5), np.quantile(ref, 0.95)), rel=1e-5)


@pytest.mark.parametrize("direction", [(0, 0, 1), (0, 1, 2), (1, 1, 1)])
def test_pad_width_from_the_faces_is_enough(direction):
    # The pad measured on the cut faces alone must let the thinning finish
    # eroding the extruded ends inside it: a much wider pad (same parity, so
    # the same subfields) gives the same skeleton inside the volume.
    from pipeline.centrelines import _edge_pads, _pad_width
    from pipeline.thinning import thin

    mask, _ = _tube(5.0, direction, length=60.0)
    faces = [(True, True)] * 3
    width = _pad_width(mask, faces, (1.0, 1.0, 1.0))
    assert width % 2 == 0 and width >= 5 + 2  # radius 5 voxels plus the margin
    inner = {}
    for w in (width, width + 20):
        pads = _edge_pads(faces, w)
        skel = thin(mask, edge_pad=pads)
        inner[w] = skel[tuple(slice(lo, skel.shape[i] - hi) for i, (lo, hi) in enumerate(pads))]
    assert inner[width].any()
    assert np.array_equal(inner[width], inner[width + 20])


def test_ridge_reads_vessel_voxels_only():
    # A one-voxel-thick line: every vessel voxel is one voxel from background,
    # so the ridge (largest distance among the vessel neighbours) is exactly
    # one spacing. The tissue voxels beside the line hold their distance to the
    # vessel in the shared two-label map (sqrt(2) on the diagonals) and must
    # not be read as radii.
    m = np.zeros((9, 9, 40), bool)
    m[4, 4, :] = True
    cl = extract_centrelines(m, spacing=(1, 1, 1), offset=(0, 0, 0), original_shape=(11, 11, 40))
    assert len(cl.radii_um) >= 38
    np.testing.assert_array_equal(cl.radii_um, 1.0)


@pytest.mark.parametrize("shape, pads", [((9, 11, 7), ((2, 0), (1, 3), (0, 2))), ((12, 10), ((3, 1), (0, 0)))])
def test_inner_voxels_are_numpy_argwhere_of_the_inner_view(shape, pads):
    from pipeline.centrelines import _inner_voxels

    skel = np.random.default_rng(1).random(shape) < 0.3
    inner = tuple(slice(lo, n - hi) for n, (lo, hi) in zip(shape, pads))
    expected = np.argwhere(skel[inner])  # numpy's own, the reference
    got = _inner_voxels(skel, pads)
    assert got.dtype == expected.dtype and np.array_equal(got, expected)
