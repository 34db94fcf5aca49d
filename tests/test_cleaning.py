"""Clean-up: specks dropped, cavities filled, crop with a background margin."""

import numpy as np
import pytest
from scipy import ndimage as ndi

from pipeline import synthetic
from pipeline.cleaning import _join_runs, _piece_moments, _runs, clean_mask, piece_elongation
from pipeline.errors import InputError


@pytest.fixture(scope="module")
def dirty():
    net = synthetic.straight_tube(length_um=80, radius_um=6, direction=(0, 1, 1))
    return synthetic.rasterize(net, spacing=(1, 1, 1), specks=40, holes=4, seed=5)


def test_specks_removed_and_counted(dirty):
    mask, truth = dirty
    c = clean_mask(mask, spacing=(1, 1, 1), min_object_volume_um3=100.0)
    # Reference count of pieces: scipy.ndimage.label with 26-connectivity.
    n_pieces = ndi.label(mask, structure=np.ones((3, 3, 3)))[1]
    assert c.stats["removed_pieces"] == n_pieces - 1 == len(truth["specks"])
    assert c.stats["kept_pieces"] == 1


def test_cavities_filled(dirty):
    mask, truth = dirty
    c = clean_mask(mask, spacing=(1, 1, 1), min_object_volume_um3=100.0)
    # Every enclosed hole is filled: the cleaned piece equals scipy's binary_fill_holes of it.
    sl = tuple(slice(o, o + n) for o, n in zip(c.offset, c.mask.shape))
    piece = np.zeros_like(mask)
    piece[sl] = c.mask
    assert np.array_equal(piece, ndi.binary_fill_holes(piece))
    assert c.stats["filled_cavity_voxels"] > 0 and len(truth["holes"]) > 0


def test_crop_keeps_one_voxel_of_background():
    m = np.zeros((20, 20, 20), bool)
    m[5:9, 6:10, 0:20] = True  # cut by both x faces
    c = clean_mask(m, spacing=(1, 1, 1), min_object_volume_um3=0)
    assert c.offset == (4, 5, 0)
    assert c.mask.shape == (6, 6, 20)
    assert not c.mask[0].any() and not c.mask[-1].any()  # tissue margin in z and y
    assert c.mask[:, :, 0].any() and c.mask[:, :, -1].any()  # the cut faces stay cut


def test_nothing_left_is_an_input_error():
    m = np.zeros((10, 10, 10), bool)
    m[2:4, 2:4, 2:4] = True
    with pytest.raises(InputError, match="min_object_volume_um3"):
        clean_mask(m, spacing=(1, 1, 1), min_object_volume_um3=1000.0)


def test_speck_inside_a_filled_cavity_is_filled_with_it():
    m = np.zeros((24, 24, 24), bool)
    m[2:22, 2:22, 2:22] = True
    m[6:18, 6:18, 6:18] = False  # an enclosed cavity...
    m[11:13, 11:13, 11:13] = True  # ...with a small piece floating in it
    c = clean_mask(m, spacing=(1, 1, 1), min_object_volume_um3=100.0)
    # The result is the solid block: scipy's binary_fill_holes of the input.
    sl = tuple(slice(o, o + n) for o, n in zip(c.offset, c.mask.shape))
    out = np.zeros_like(m)
    out[sl] = c.mask
    assert np.array_equal(out, ndi.binary_fill_holes(m))
    assert c.stats["removed_pieces"] == 1


def test_hollow_speck_is_removed_not_filled():
    m = np.zeros((30, 30, 30), bool)
    m[:, 10:16, 10:16] = True  # a vessel crossing the volume
    m[22:27, 22:27, 22:27] = True
    m[24, 24, 24] = False  # a small hollow speck
    c = clean_mask(m, spacing=(1, 1, 1), min_object_volume_um3=200.0)
    assert c.stats["removed_pieces"] == 1 and c.stats["filled_cavity_voxels"] == 0
    assert c.stats["vessel_voxels"] == 30 * 36


def test_cavity_fill_never_writes_into_the_callers_array():
    # The crop can be the whole input (a mask touching every face); filling
    # its cavity in place must work on a copy.
    m = np.ones((5, 5, 5), bool)
    m[2, 2, 2] = False
    before = m.copy()
    out = clean_mask(m, spacing=(1, 1, 1), min_object_volume_um3=0)
    assert out.mask[2, 2, 2] and out.stats["filled_cavity_voxels"] == 1
    assert np.array_equal(m, before)
    # Later steps (thinning, distance transforms) walk the crop in C order.
    assert out.mask.flags.c_contiguous


def test_cavity_fill_reaches_out_through_faces_only():
    # Background is 6-connected, the complement of the vessel's 26-connectivity
    # (Kong & Rosenfeld 1989, Comput Vision Graph Image Process 48:357, from memory;
    # topology): a void joined to the outside only by edge-diagonal steps is
    # enclosed, so it and the diagonal chain are filled; a face-connected
    # channel to the outside is not.
    m = np.ones((7, 7, 7), bool)
    for p in [(3, 3, 3), (2, 2, 3), (1, 1, 3), (0, 0, 3)]:
        m[p] = False
    for z in range(0, 4):
        m[z, 5, 5] = False  # a face-connected channel from the z = 0 face
    out = clean_mask(m, spacing=(1, 1, 1), min_object_volume_um3=0)
    assert out.stats["filled_cavity_voxels"] == 3
    assert not out.mask[:4, 5, 5].any()
    # The reference: skimage's Euler number drops by the number of cavities filled.
    from skimage.measure import euler_number
    assert euler_number(m, connectivity=3) - euler_number(out.mask, connectivity=3) == 3


def _scipy_clean(mask, voxel_volume, threshold, planar):
    # Reference route: scipy.ndimage.label (26- or 8-connected pieces), drop
    # the small ones, then binary_fill_holes, whose default structure makes
    # the background 6- (4- in a plane) connected.
    m = mask[0] if planar else mask
    labels, n = ndi.label(m, structure=np.ones((3,) * m.ndim))
    sizes = np.bincount(labels.ravel(), minlength=n + 1)
    keep = sizes * voxel_volume >= threshold
    keep[0] = False
    out = ndi.binary_fill_holes(keep[labels])
    return (out[None] if planar else out), int(n - keep[1:].sum())


@pytest.mark.parametrize("seed", range(4))
@pytest.mark.parametrize("planar", [False, True])
def test_matches_scipy_label_and_fill_holes(seed, planar):
    # Random masks with many pieces, diagonal contacts, nested cavities and
    # pieces inside cavities: every rule of the clean-up at once.
    rng = np.random.default_rng(seed)
    shape = (1, 90, 110) if planar else (30, 40, 50)
    mask = rng.random(shape) < (0.55 if seed % 2 else 0.3)
    if seed % 2:  # smoother pieces with larger cavities, opened within the plane when planar
        mask = ndi.binary_opening(mask[0])[None] if planar else ndi.binary_opening(mask)
    spacing = (1.0, 0.5, 0.7) if seed < 2 else (2.0, 1.0, 1.0)
    vv = (1.0 if planar else spacing[0]) * spacing[1] * spacing[2]
    threshold = 6 * vv
    # The size rule alone: scipy has no counterpart of the elongation rule
    # (tested below), and random pieces of a few voxels in a row would meet it.
    c = clean_mask(mask, spacing=spacing, min_object_volume_um3=threshold, min_object_area_um2=threshold,
                   keep_elongation=0, planar=planar)
    want, removed = _scipy_clean(mask, vv, threshold, planar)
    got = np.zeros_like(mask)
    got[tuple(slice(o, o + n) for o, n in zip(c.offset, c.mask.shape))] = c.mask
    assert np.array_equal(got, want)
    assert c.stats["removed_pieces"] == removed
    assert c.stats["vessel_voxels"] == int(want.sum())
    assert c.mask.flags.c_contiguous


# ---------------------------------------------------------------------------
# Small pieces kept by shape
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("seed", range(3))
def test_piece_moments_match_numpy_on_labelled_voxels(seed):
    # Reference: scipy.ndimage.label (26-connected) for the pieces, and the
    # voxel coordinates' sums computed by numpy for each.
    rng = np.random.default_rng(seed)
    mask = ndi.binary_opening(rng.random((20, 24, 28)) < 0.45)
    rows, x0, x1 = _runs(mask, 1)
    piece = _join_runs(rows, x0, x1, mask.shape[1], mask.shape[0] * mask.shape[1], True)
    n = int(piece.max()) + 1
    got = _piece_moments(piece, rows, x0, x1, mask.shape[1], np.ones(n, dtype=bool))
    labels, n_ref = ndi.label(mask, structure=np.ones((3, 3, 3)))
    assert n == n_ref
    want = []
    for k in range(1, n_ref + 1):
        z, y, x = np.nonzero(labels == k)
        want.append([len(z), z.sum(), y.sum(), x.sum(), (z * z).sum(), (y * y).sum(), (x * x).sum(), (z * y).sum(),
                     (z * x).sum(), (y * x).sum()])
    # Pieces are numbered differently: compare as sorted rows (integer sums, exact).
    assert np.array_equal(np.array(sorted(map(tuple, got))), np.array(sorted(map(tuple, np.asarray(want, float)))))


def _moments_of(mask):
    z, y, x = np.nonzero(mask)
    return np.array([[len(z), z.sum(), y.sum(), x.sum(), (z * z).sum(), (y * y).sum(), (x * x).sum(), (z * y).sum(),
                      (z * x).sum(), (y * x).sum()]], dtype=float)


def _grid(shape, spacing):
    return np.meshgrid(*[np.arange(n) * s for n, s in zip(shape, spacing)], indexing="ij")


@pytest.mark.parametrize("spacing", [(1.0, 1.0, 1.0), (2.0, 0.6, 0.6)])
def test_elongation_of_a_ball_and_of_cylinders(spacing):
    # Second moments of uniform solids (any mechanics text): a ball of radius
    # r has variance r^2 / 5 along every axis, so it reads at most
    # sqrt(12 / 5) r / (4 r / sqrt(5)) = sqrt(3) / 2 (less when its longest
    # axis, by a voxel's box, is z); a cylinder of length L and radius r has
    # L^2 / 12 along its axis and r^2 / 4 across, so it reads L / (2 r)
    # times the in-plane part of its axis. Digitised at a few voxels per
    # radius the values move by the voxels' staircase: 10 % allows for it
    # (measured: 0.1 % at 1 µm voxels, 2-6 % at 2 x 0.6 x 0.6 µm, where a
    # z step is two thirds of the radius).
    z, y, x = _grid((60, 120, 120), spacing)
    c = np.array([30 * spacing[0], 60 * spacing[1], 60 * spacing[2]])
    rel = np.stack([z - c[0], y - c[1], x - c[2]])
    ball = (rel ** 2).sum(axis=0) <= 6.0 ** 2
    assert piece_elongation(_moments_of(ball), spacing)[0] <= 1.1 * np.sqrt(3) / 2
    for axis, in_plane in (((0.0, 1.0, 1.0), 1.0), ((1.0, 1.0, 0.0), np.sqrt(0.5))):
        u = np.asarray(axis) / np.linalg.norm(axis)
        along = np.tensordot(u, rel, axes=1)
        tube = (np.abs(along) <= 20.0) & ((rel ** 2).sum(axis=0) - along ** 2 <= 3.0 ** 2)  # 40 µm, radius 3 µm
        assert piece_elongation(_moments_of(tube), spacing)[0] == pytest.approx(in_plane * 40.0 / 6.0, rel=0.1)


def test_a_speck_stretched_along_z_is_not_a_vessel_piece():
    # One voxel of 4 x 1 x 1 µm is 3.5 times taller than wide (box moments,
    # d^2 / 12 per axis), and the axial point-spread stretches specks the
    # same way; length along z is no evidence of a vessel, so such pieces
    # read about 0 and go. A capillary piece lying in the planes, 20 µm
    # long and 2 µm wide at the same spacing, stays.
    spacing = (4.0, 1.0, 1.0)
    one = np.zeros((9, 9, 9), bool)
    one[4, 4, 4] = True
    assert piece_elongation(_moments_of(one), spacing)[0] == pytest.approx(0.0, abs=1e-6)
    net = synthetic.straight_tube(length_um=120, radius_um=6.0, direction=(0, 1, 1))
    mask, _ = synthetic.rasterize(net, spacing=spacing)
    big = int(mask.sum())
    zc = mask.shape[0] // 2
    mask[zc - 1:zc + 2, 2, 3:5] = True  # a speck three planes (12 µm) tall, far from the tube
    mask[zc, mask.shape[1] - 4:mask.shape[1] - 2, 2:22] = True  # a thin piece 20 µm long, 2 µm wide
    c = clean_mask(mask, spacing=spacing)
    assert c.stats["kept_elongated_pieces"] == 1 and c.stats["removed_pieces"] == 1
    assert c.stats["vessel_voxels"] == big + 40 + c.stats["filled_cavity_voxels"]


def test_elongation_is_the_same_with_every_plane_repeated():
    # The moments with each voxel's box are those of the same solid, so a
    # mask and the mask with every plane repeated at half the z step read
    # the same (issue acceptance: the z step must not change the result).
    rng = np.random.default_rng(7)
    mask = ndi.binary_opening(rng.random((12, 40, 40)) < 0.5)
    labels = ndi.label(mask, structure=np.ones((3, 3, 3)))[0]
    assert labels.max() >= 5
    for k in range(1, min(labels.max(), 20) + 1):
        one = labels == k
        a = piece_elongation(_moments_of(one), (3.0, 1.0, 1.0))[0]
        b = piece_elongation(_moments_of(np.repeat(one, 2, axis=0)), (1.5, 1.0, 1.0))[0]
        assert b == pytest.approx(a, rel=1e-9, abs=1e-9)


def test_a_thin_vessel_cut_by_a_gap_keeps_both_pieces():
    # A capillary of radius 2 µm, 60 µm long, cut by the generator's gap
    # artefact: both pieces (about 380 µm^3 each) are below the 1000 µm^3
    # size limit, so the size rule alone drops the whole vessel; by shape
    # they stay. The generator's specks (a voxel or two in radius) still go.
    net = synthetic.straight_tube(length_um=60, radius_um=2.0, direction=(0, 1, 1), ends="blind")
    mask, truth = synthetic.rasterize(net, spacing=(1, 1, 1), gaps=1, specks=6, seed=3)
    assert len(truth["gaps"]) == 1 and len(truth["specks"]) == 6
    n_pieces = ndi.label(mask, structure=np.ones((3, 3, 3)))[1]
    c = clean_mask(mask, spacing=(1, 1, 1))
    assert c.stats["kept_pieces"] == c.stats["kept_elongated_pieces"] == 2
    assert c.stats["removed_pieces"] == n_pieces - 2 == 6
    with pytest.raises(InputError, match="min_object_volume_um3"):
        clean_mask(mask, spacing=(1, 1, 1), keep_elongation=0)

