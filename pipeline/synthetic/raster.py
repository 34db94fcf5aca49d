"""Rasterising a network with optional artefacts: the mask and its ground truth.

In: a :class:`~pipeline.synthetic.network.VesselNetwork`, a spacing ``(dz, dy, dx)`` in µm and
the imperfections (:func:`hostile_artefacts` sets the hostile ones from one strength).
Out: a boolean ``(Z, Y, X)`` mask and a JSON-serialisable truth dictionary.
"""

from __future__ import annotations

from types import MappingProxyType
from typing import Any, Mapping, Sequence

import numpy as np

from ._common import _bad, _count, _jsonable, _positive, _real, _rng, _spacing
from .network import VesselNetwork, _clip_network
from .painting import _FIELD_CLIP, _MAX_ROUGHNESS, TubePieces, _auto_place, _paint_imaged, _paint_tubes
from .artefacts import (
    _MAX_JITTER_VOX, _Occupied, _add_blobs, _add_handles, _add_specks, _carve_gaps, _carve_holes, _carve_open_holes,
    _centreline_samples, _clipped_normal_second_moment, _euler_26, _fill_cavities, _jitter_shifts, _psf_sigma,
    _radius_range,
)


def _placed_grid(
    network: VesselNetwork, d: np.ndarray, *, shape: Sequence[int] | None, margin: float, rough: float
) -> tuple[np.ndarray, np.ndarray, VesselNetwork]:
    """The grid shape, the shift of the network into it and the network so shifted.

    Parameters
    ----------
    network : VesselNetwork
        Network as given.
    d : ndarray, shape (3,)
        Voxel size, µm.
    shape, margin, rough
        :func:`rasterize`'s ``shape`` (unchecked), margin in µm and roughness.

    Returns
    -------
    grid : ndarray of int64, shape (3,)
    offset : ndarray, shape (3,)
        Added to the network's coordinates, µm.
    placed : VesselNetwork
    """
    if shape is not None:
        try:
            grid = np.asarray(shape, dtype=np.int64)
            bad = (
                grid.shape != (3,)
                or not np.array_equal(grid, np.asarray(shape, dtype=float))
                or np.any(grid < 1)
            )
        except (TypeError, ValueError):
            bad = True
        if bad:
            raise _bad("shape", "three integers >= 1 (Z, Y, X)", shape)
        offset = np.zeros(3)
        placed = network
    elif network.box_um is not None:
        grid = np.maximum(1, np.round(np.asarray(network.box_um) / d)).astype(np.int64)
        offset = np.zeros(3)
        placed = network
    else:
        offset, grid = _auto_place(network, d, margin, 1.0 + _FIELD_CLIP * rough)
        placed = network.translated(offset)
    if np.prod(grid.astype(float)) > 2**34:
        raise _bad("shape", "at most 2**34 voxels", tuple(grid.tolist()))
    return grid, offset, placed


def _paint_as_imaged(
    dims: tuple[int, int, int],
    placed: VesselNetwork,
    d: np.ndarray,
    rough: float,
    rng_rough: np.random.Generator,
    *,
    correlation_um: float | None,
    shift_vox: np.ndarray | None,
    psf_sigma_um: np.ndarray | None,
    psf_threshold: float,
) -> tuple[np.ndarray, dict[str, int]]:
    """The vessels as a lab's imaging shows them, without cavities.

    Returns
    -------
    mask : ndarray of bool, shape ``dims``
    imaged : dict
        ``roughness_voxels_refused``, ``imaged_cavities_filled`` and
        ``imaged_euler_number``, for the truth.
    """
    mask, n_refused = _paint_imaged(
        dims, placed, d, rough, rng_rough, correlation_um=correlation_um, shift_vox=shift_vox,
        psf_sigma_um=psf_sigma_um, psf_threshold=psf_threshold,
    )
    # Imaging can still enclose background (a blur closing a narrow gap, planes
    # shifted over a bend); those cavities are filled, so that the only
    # cavities are the recorded holes. The Euler number of the vessels as
    # imaged is kept so that every recorded change adds to it.
    n_filled = _fill_cavities(mask)
    imaged_euler = _euler_26(mask)
    return mask, {
        "roughness_voxels_refused": n_refused,
        "imaged_cavities_filled": n_filled,
        "imaged_euler_number": imaged_euler,
    }


def _wall_defects(
    mask: np.ndarray,
    cut: VesselNetwork,
    d: np.ndarray,
    hole_rec: list[dict],
    *,
    n_open: int,
    n_gaps: int,
    n_handles: int,
    n_blobs: int,
    rng_open: np.random.Generator,
    rng_gaps: np.random.Generator,
    rng_handles: np.random.Generator,
    rng_blobs: np.random.Generator,
    rough: float,
    shift_um: np.ndarray | None,
    fit: bool,
) -> dict[str, list[dict]]:
    """Open holes, gaps, handles and blobs, in that order, changing ``mask`` in place.

    Each is placed clear of the enclosed holes already carved (``hole_rec``)
    and of the ones placed before it.

    Returns
    -------
    dict
        ``open_holes``, ``blobs``, ``handles`` and ``gaps``: the records of
        those placed.
    """
    reach = 1.0 + _FIELD_CLIP * rough
    samp = _centreline_samples(cut, d, shift_um) if n_open + n_gaps + n_handles + n_blobs else None
    occupied = _Occupied(float(d.max()))
    for h in hole_rec:
        occupied.add(np.asarray(h["centre_um"]), (h["radius_vox"] + 1.0) * float(d.max()))
    jitter_um = 0.0 if shift_um is None else float(np.max(np.linalg.norm(shift_um, axis=1)))
    open_rec = _carve_open_holes(mask, samp, d, n_open, rng_open, occupied, reach, fit)
    gap_rec = _carve_gaps(mask, samp, d, n_gaps, rng_gaps, occupied, reach, jitter_um, fit)
    handle_rec = _add_handles(mask, samp, d, n_handles, rng_handles, occupied, reach, fit)
    blob_rec = _add_blobs(mask, samp, d, n_blobs, rng_blobs, occupied, fit)
    return {"open_holes": open_rec, "blobs": blob_rec, "handles": handle_rec, "gaps": gap_rec}


def _truth_record(
    cut: VesselNetwork,
    mask: np.ndarray | int,
    d: np.ndarray,
    *,
    grid: np.ndarray,
    offset: np.ndarray,
    options: dict[str, Any],
    records: dict[str, Any],
) -> dict[str, Any]:
    """The truth of a rasterised network: its own, then the grid, the mask's size (or its voxel count), options and records."""
    truth = cut.to_truth()
    for n in truth["nodes"]:
        n["pos_vox"] = (np.asarray(n["pos_um"]) / d).tolist()
    n_vox = int(mask) if isinstance(mask, (int, np.integer)) else int(np.count_nonzero(mask))
    extra = dict(
        spacing=d.tolist(),
        shape=[int(n) for n in grid],
        offset_um=offset.tolist(),
        voxel_volume_um3=float(np.prod(d)),
        mask_voxels=n_vox,
        mask_volume_um3=float(n_vox * np.prod(d)),
        rasterize=options,
        **records,
    )
    truth.update(_jsonable(extra))
    return truth


def rasterize(
    network: VesselNetwork,
    *,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    shape: Sequence[int] | None = None,
    margin_um: float | None = None,
    roughness: float = 0.0,
    roughness_correlation_um: float | None = None,
    specks: int = 0,
    holes: int = 0,
    hole_radius_vox: Sequence[float] = (0.5, 1.0),
    open_holes: int = 0,
    blobs: int = 0,
    handles: int = 0,
    gaps: int = 0,
    psf_sigma_um: float | Sequence[float] | None = None,
    psf_threshold: float = 0.5,
    jitter_vox: float = 0.0,
    fit_artefacts: bool = False,
    seed: int | None = None,
) -> tuple[np.ndarray, dict[str, Any]]:
    """Turn a network into a boolean voxel mask and its ground truth.

    With the original options only (``spacing``, ``shape``, ``margin_um``,
    ``roughness``, ``specks``, ``holes``, ``seed``) masks and truths are
    exactly those of earlier versions. Any artefact option switches to a
    model of a lab's segmentation, made in the order a real one is: vessels
    with rough walls, imaging (point-spread blur, plane-to-plane motion),
    threshold, then the defects of segmenting (enclosed holes, open holes,
    gaps, handles and tunnels, blobs, specks), each checked on the mask when
    placed so that it changes the topology exactly as recorded.

    Parameters
    ----------
    network : VesselNetwork
        Network in µm.
    spacing : sequence of 3 float
        Voxel size ``(dz, dy, dx)`` in µm; anisotropic grids are fine. A
        coarse ``dz`` (2-5 times ``dx``) gives staircase walls in z, and a
        vessel thinner than ``dz / 2`` climbing through the planes breaks
        where its axis passes half-way between two.
    shape : sequence of 3 int, optional
        Grid shape ``(Z, Y, X)``. When given (or when the network carries
        ``box_um``) the coordinates are taken as already placed: voxel
        ``(i, j, k)`` sits at ``(i*dz, j*dy, k*dx)``. Otherwise the network is
        shifted into a fitted box with ``margin_um`` to spare, and box faces are
        pulled onto 'border' nodes.
    margin_um : float, optional
        Free space around the network; default ``max(5, 2 * max(spacing))``.
    roughness : float
        Relative standard deviation of a random radius perturbation, in
        [0, 0.3]: a voxel is vessel when its distance to the centreline is
        ``<= r * (1 + roughness * g)`` with ``g`` a zero-mean unit-variance
        Gaussian field clipped to +-2.5 sd. The mean radius stays the
        truth's; the mean cross-section is ``pi r^2 E[(1 + s g)^2] = pi r^2
        (1 + 0.978 s^2)``, 6.1 % more at 0.25 (measured on 300 um tubes:
        1.061 +- 0.007), recorded as ``roughness_area_factor``.
    roughness_correlation_um : float, optional
        1/e correlation length of ``g`` in µm. None keeps the original field
        (correlation about one nominal radius, looked up at the voxel). A
        value, down to a voxel or two, gives short-range roughness from one
        field for all vessels, looked up where the voxel's ray from the axis
        meets the nominal wall, so the wall radius is a function of the wall
        position alone.
    specks : int
        Number of stray blobs (radius 0.5-1.5 voxels) away from vessels; each is
        its own 26-connected component.
    holes : int
        Number of enclosed background cavities carved on centrelines where the
        radius is at least ``k + 2`` voxels along every axis (``k`` = 1 for
        radii up to one voxel, else ``ceil(high + 0.3)``); each adds one
        cavity (Euler number + 1).
    hole_radius_vox : (float, float)
        Range of the enclosed holes' radii in voxel index units, within
        [0.5, 3]; default (0.5, 1).
    open_holes : int
        Number of pits open to the outside: balls of radius 0.5-2 lateral
        voxels (µm, ``max(dy, dx)`` units) centred on the nominal wall of
        vessels with radius >= 3 lateral voxels. Topology is unchanged.
    blobs : int
        Number of ellipsoids stuck to walls: largest semi-axis 0.3-0.8 of
        the local radius (at least the smallest voxel edge), the others
        0.6-1 of it, turned at random, centred from a quarter of it inside
        to half of it outside the nominal wall. Each touches its vessel (no
        new 26-component) and adds no loop or cavity.
    handles : int
        Number of small loops on vessels with radius >= 3 lateral voxels,
        at random either handles (arcs 1-2 voxels thick with feet 4-7
        voxels apart inside the wall and 1.5-2.5 voxels of clearance over
        it) or tunnels (passages of that size running 1-2 voxels beneath the
        wall, open at both ends; handles where the vessel is too thin). Each
        lowers the Euler number by one and belongs to no vessel.
    gaps : int
        Number of cuts through vessels with radius <= 2.5 lateral voxels:
        the vessel's voxels in a slab across it, ``g`` = 1, 2 or 3 voxel
        steps long along the tangent (``g * sum_a |u_a| d_a``, so no
        26-neighbours span it), away from junctions. Each raises the Euler
        number by one (a piece more, or a loop less).
    psf_sigma_um : float or sequence of 3 float, optional
        Standard deviations ``(sz, sy, sx)`` µm (or one for all axes) of a
        Gaussian point-spread. The partial-volume occupancy of the vessels
        (a linear ramp across each voxel's width along the wall normal) is
        blurred with it (vessels cut by the faces continue) and thresholded
        at ``psf_threshold``.
    psf_threshold : float
        Threshold in (0, 1) on the blurred occupancy. 0.5 keeps a flat wall
        in place; lower values (as automatic thresholds on dim backgrounds
        give) push walls out by about ``sigma Phi^-1(1 - t)`` along each
        axis, so an elongated ``sz`` makes vessels taller in z, small and
        horizontal ones most.
    jitter_vox : float
        Largest lateral shift of a z plane, in [0, 3] voxels (``dy``, ``dx``
        units): plane ``i`` shows the vessels moved by a shift drawn
        uniformly in a disc of that radius (breathing and heartbeat),
        applied to the sampling, or with a point-spread to the blurred plane
        before the threshold.
    fit_artefacts : bool
        False: raise when fewer specks, holes, open holes, blobs, handles or
        gaps fit than asked for. True: place as many as fit, up to each
        count (the truth lists those placed), to sweep one set of counts
        over many networks.
    seed : int, optional
        Seed for every random choice; each kind of artefact draws from its
        own stream, so adding one leaves the others' draws unchanged.

    Returns
    -------
    mask : ndarray of bool, shape (Z, Y, X)
    truth : dict
        :meth:`VesselNetwork.to_truth` of the placed network, cut to the grid
        (segments leaving it end in 'border' nodes), plus ``spacing``,
        ``shape``, ``offset_um``, node ``pos_vox`` (voxel index units),
        ``mask_voxels``, ``mask_volume_um3``, ``rasterize`` options and the
        ``specks`` and ``holes`` actually placed. Nodes, segments and the
        summary (cyclomatic number included) always describe the true
        network, never the artefacts. With an artefact option,
        ``rasterize`` also holds every new option, ``roughness_area_factor``
        and ``fit_artefacts``, and the truth gains:

        - ``open_holes``, ``blobs``, ``handles``, ``gaps``: lists of dicts
          with positions in µm and voxel units (mask coordinates), sizes,
          ``segment`` (truth id), ``vessel_radius_um``, ``n_voxels``
          changed and ``euler_change``; handles have ``kind`` ('handle' or
          'tunnel'), ``feet_um`` and ``apex_um``; gaps ``direction``,
          ``length_vox``, ``length_um`` and ``arc_position_um``;
        - ``jitter``: ``shift_vox`` and ``shift_um``, (Z, 2) (y, x) per
          plane, or None;
        - ``imaged_euler_number``: Euler number (26-connected) of the
          vessels as imaged, before the defects; ``imaged_cavities_filled``;
          ``roughness_voxels_refused``;
        - ``artefact_euler_change``: holes + specks + gaps - handles, so
          that the mask's Euler number is ``imaged_euler_number +
          artefact_euler_change`` exactly.

    Raises
    ------
    InputError
        On bad arguments, when nothing of the network lies in the grid, or
        (without ``fit_artefacts``) when the artefacts asked for do not fit.

    Notes
    -----
    Voxel counting is unbiased for the union of capsules, so volumes agree
    across spacings to within the boundary-layer scatter (about 1 % for
    radii of a few voxels). Digitisation is not topology-preserving
    everywhere: in the crease where five or six tubes of a capillary bed meet,
    about 3 % of junctions gain a one-voxel handle, so the mask's loop count
    can exceed the truth's ``cyclomatic_number`` slightly; trees, rings and
    ladders keep their topology at radii of two voxels and more.

    With artefact options, rough walls are reached from the smooth ones
    through simple voxels only (the few that would join, split, loop or
    enclose are left smooth and counted in ``roughness_voxels_refused``),
    so roughness, however short-ranged, changes no topology; cavities left
    by imaging are filled (``imaged_cavities_filled``), so the only cavities
    are the recorded holes. Blur and motion may still join or break vessels,
    as they do in real stacks; ``imaged_euler_number`` accounts for that.
    """
    if not isinstance(network, VesselNetwork):
        raise _bad("network", "a VesselNetwork", type(network).__name__)
    d = _spacing(spacing)
    margin = max(5.0, 2.0 * float(d.max())) if margin_um is None else _real("margin_um", margin_um, low=0.0)
    rough = _real("roughness", roughness, low=0.0, high=_MAX_ROUGHNESS)
    corr = (
        None
        if roughness_correlation_um is None
        else _positive("roughness_correlation_um", roughness_correlation_um)
    )
    n_specks = _count("specks", specks)
    n_holes = _count("holes", holes)
    hole_range = _radius_range(hole_radius_vox)
    n_open = _count("open_holes", open_holes)
    n_blobs = _count("blobs", blobs)
    n_handles = _count("handles", handles)
    n_gaps = _count("gaps", gaps)
    psf = _psf_sigma(psf_sigma_um)
    psf_t = _real("psf_threshold", psf_threshold, low=0.0, low_open=True, high=1.0, high_open=True)
    jitter = _real("jitter_vox", jitter_vox, low=0.0, high=_MAX_JITTER_VOX)
    if not isinstance(fit_artefacts, (bool, np.bool_)):
        raise _bad("fit_artefacts", "True or False", fit_artefacts)
    fit = bool(fit_artefacts)
    base_rng = _rng(seed)
    # Children 0-2 are the original streams; later ones are new artefacts'.
    streams = [np.random.default_rng(s) for s in base_rng.bit_generator.seed_seq.spawn(8)]
    rng_rough, rng_holes, rng_specks, rng_blobs, rng_handles, rng_open, rng_gaps, rng_jitter = streams
    extended = (
        corr is not None
        or hole_range != (0.5, 1.0)
        or n_open + n_blobs + n_handles + n_gaps > 0
        or psf is not None
        or psf_t != 0.5
        or jitter > 0
        or fit
    )

    grid, offset, placed = _placed_grid(network, d, shape=shape, margin=margin, rough=rough)
    top = (grid - 1) * d
    cut = _clip_network(placed, np.zeros(3), top)
    dims = tuple(int(n) for n in grid)

    shift_vox = _jitter_shifts(rng_jitter, dims[0], jitter) if jitter > 0 else None
    shift_um = None if shift_vox is None else shift_vox * d[1:]
    if not extended:
        mask = np.zeros(dims, dtype=bool)
        _paint_tubes(mask, placed, d, rough, rng_rough)
    else:
        mask, imaged = _paint_as_imaged(
            dims, placed, d, rough, rng_rough, correlation_um=corr, shift_vox=shift_vox, psf_sigma_um=psf,
            psf_threshold=psf_t,
        )
    hole_rec = _carve_holes(mask, cut, d, n_holes, rng_holes, hole_range, shift_um, fit)
    if extended:
        defects = _wall_defects(
            mask, cut, d, hole_rec, n_open=n_open, n_gaps=n_gaps, n_handles=n_handles, n_blobs=n_blobs,
            rng_open=rng_open, rng_gaps=rng_gaps, rng_handles=rng_handles, rng_blobs=rng_blobs, rough=rough,
            shift_um=shift_um, fit=fit,
        )
    speck_rec = _add_specks(mask, d, n_specks, rng_specks, fit)

    options = {
        "roughness": rough,
        "roughness_correlation": "one nominal radius" if corr is None else f"{corr:g} um",
        "margin_um": margin,
        "specks": n_specks,
        "holes": n_holes,
        "seed": seed,
    }
    records = {"specks": speck_rec, "holes": hole_rec}
    if extended:
        options.update(
            roughness_correlation_um=corr,
            roughness_area_factor=1.0 + rough**2 * _clipped_normal_second_moment(_FIELD_CLIP),
            hole_radius_vox=list(hole_range),
            open_holes=n_open,
            blobs=n_blobs,
            handles=n_handles,
            gaps=n_gaps,
            psf_sigma_um=None if psf is None else psf.tolist(),
            psf_threshold=psf_t,
            jitter_vox=jitter,
            fit_artefacts=fit,
        )
        records.update(defects)
        records["jitter"] = None if shift_vox is None else {"shift_vox": shift_vox, "shift_um": shift_um}
        records.update(imaged)
        records["artefact_euler_change"] = (
            len(hole_rec) + len(speck_rec) + len(defects["gaps"]) - len(defects["handles"])
        )
    return mask, _truth_record(cut, mask, d, grid=grid, offset=offset, options=options, records=records)


#: What :func:`hostile_artefacts` asks for at strength 1 (counts are rounded
#: after scaling; ``roughness_correlation_vox`` is in lateral voxels and does
#: not scale).
HOSTILE_AT_FULL_STRENGTH: Mapping[str, float] = MappingProxyType({
    "roughness": 0.25,
    "roughness_correlation_vox": 1.5,
    "blobs": 6,
    "handles": 2,
    "holes": 2,
    "open_holes": 4,
    "gaps": 3,
    "specks": 4,
    "jitter_vox": 1.0,
})


def hostile_artefacts(
    strength: float = 1.0, *, spacing: Sequence[float] = (1.0, 1.0, 1.0), seed: int | None = None
) -> dict[str, Any]:
    """Keyword arguments for :func:`rasterize` with every artefact at one strength.

    Parameters
    ----------
    strength : float
        In [0, 1]. Roughness, counts and jitter are those of
        :data:`HOSTILE_AT_FULL_STRENGTH` times ``strength`` (counts rounded);
        the roughness correlation stays 1.5 lateral voxels. 0 gives the
        clean mask, byte for byte.
    spacing : sequence of 3 float
        Voxel size ``(dz, dy, dx)`` µm, passed on and used to turn voxels
        into µm.
    seed : int, optional
        Passed on.

    Returns
    -------
    dict
        ``spacing``, ``seed``, ``roughness``, ``roughness_correlation_um``,
        ``blobs``, ``handles``, ``holes``, ``open_holes``, ``gaps``,
        ``specks``, ``jitter_vox`` and ``fit_artefacts=True``: the counts
        are upper bounds, so one strength suits any network (a tree without
        vessels thin enough for gaps gets none; the truth lists what was
        placed).

    Examples
    --------
    >>> kw = hostile_artefacts(0.5, spacing=(2.0, 1.0, 1.0), seed=1)
    >>> kw["roughness"], kw["blobs"], kw["gaps"], kw["jitter_vox"]
    (0.125, 3, 2, 0.5)
    >>> from pipeline.synthetic import straight_tube
    >>> mask, truth = rasterize(straight_tube(length_um=40.0, radius_um=4.0), **kw)
    >>> len(truth["blobs"]), len(truth["gaps"])
    (3, 0)
    """
    s = _real("strength", strength, low=0.0, high=1.0)
    d = _spacing(spacing)
    full = HOSTILE_AT_FULL_STRENGTH
    lat = float(max(d[1], d[2]))
    names = ("blobs", "handles", "holes", "open_holes", "gaps", "specks")
    counts = {k: int(round(s * full[k])) for k in names}
    rough = s * full["roughness"]
    if s == 0:
        return {"spacing": d.tolist(), "seed": seed}
    return {
        "spacing": d.tolist(),
        "seed": seed,
        "roughness": rough,
        "roughness_correlation_um": full["roughness_correlation_vox"] * lat,
        **counts,
        "jitter_vox": s * full["jitter_vox"],
        "fit_artefacts": True,
    }


class BlockRaster:
    """A network rasterised box by box, for volumes that do not fit in memory.

    The same mask as :func:`rasterize` with ``spacing``, ``shape``,
    ``margin_um``, ``roughness`` and ``seed`` (no other artefact: holes,
    specks and the hostile model are placed by looking at the whole mask):
    every voxel depends only on its position, so :meth:`paint` of boxes that
    tile :attr:`shape` gives the whole mask exactly.

    Attributes
    ----------
    shape : tuple of 3 int
        The grid.
    """

    def __init__(self, network: VesselNetwork, *, spacing: Sequence[float] = (1.0, 1.0, 1.0),
                 shape: Sequence[int] | None = None, margin_um: float | None = None, roughness: float = 0.0,
                 seed: int | None = None):
        if not isinstance(network, VesselNetwork):
            raise _bad("network", "a VesselNetwork", type(network).__name__)
        self.d = _spacing(spacing)
        margin = max(5.0, 2.0 * float(self.d.max())) if margin_um is None else _real("margin_um", margin_um, low=0.0)
        self.rough = _real("roughness", roughness, low=0.0, high=_MAX_ROUGHNESS)
        self.seed, self.margin = seed, margin
        base_rng = _rng(seed)
        # the first of rasterize's streams, the roughness texture's
        self._rng = np.random.default_rng(base_rng.bit_generator.seed_seq.spawn(8)[0])
        self.grid, self.offset, self.placed = _placed_grid(network, self.d, shape=shape, margin=margin,
                                                           rough=self.rough)
        self.shape = tuple(int(n) for n in self.grid)
        self.cut = _clip_network(self.placed, np.zeros(3), (self.grid - 1) * self.d)
        self._pieces = TubePieces(self.placed, self.d, self.rough, self._rng)

    def paint(self, lo: Sequence[int], hi: Sequence[int]) -> np.ndarray:
        """The mask of the box ``[lo, hi)``, bool."""
        box = np.zeros(tuple(int(b) - int(a) for a, b in zip(lo, hi)), dtype=bool)
        if box.size:
            self._pieces.paint(box, origin=lo)
        return box

    def truth(self, mask_voxels: int) -> dict[str, Any]:
        """The truth :func:`rasterize` would give, with the painted boxes' vessel voxel count."""
        options = {"roughness": self.rough, "roughness_correlation": "one nominal radius",
                   "margin_um": self.margin,
                   "specks": 0, "holes": 0, "seed": self.seed}
        return _truth_record(self.cut, int(mask_voxels), self.d, grid=self.grid, offset=self.offset,
                             options=options, records={"specks": [], "holes": []})
