"""The analysis of a volume block by block, stitched into one graph.

In: a sliceable ``(Z, Y, X)`` mask (a memory map, Zarr array, HDF5 dataset),
its spacing and the configuration. Out: the same :class:`pipeline.result.Result`
as :func:`pipeline.analysis.analyze`.

The steps and where each runs:

1. reading and clean-up, on the whole volume as runs of vessel voxels
   (:func:`pipeline.blockwise.source.scan_runs`,
   :func:`pipeline.cleaning.clean_runs`): pieces and cavities that cross
   blocks are decided on the whole volume, with the same rules;
2. centrelines and their radii, per block with a measured halo
   (:func:`pipeline.blockwise.tasks.centreline_block`); the cores' voxels
   together are the whole volume's centreline voxels, so the graph is
   built once from all of them and there is no seam to mend;
3. the wall fits, per block of the original grid, for the points in each
   core (:func:`pipeline.blockwise.tasks.wall_block`);
4. everything after (pruning, measures, levels, flow, bifurcations) on the
   one graph, as in memory (:func:`pipeline.analysis.graph_steps`).

The tissue-to-vessel distances of the summary come from per-block
histograms (bins of 1 % of the finest spacing); ``run.json`` records, under
``blockwise``, the bracket each quantile is proven to lie in.
"""

from __future__ import annotations

import hashlib
import json
import math
from types import SimpleNamespace

import numpy as np

from .. import centrelines as centrelines_step
from ..analysis import _charge, _check_spacing, _Clock, graph_steps
from ..centrelines import pad_width_of_faces
from ..cleaning import clean_runs
from ..config import load_config
from ..errors import InputError
from ..radii import finish_wall_radii, wall_fit_plan
from ..reading.memory import _format_bytes, available_memory_bytes
from .._version import __version__
from .engine import BlockRunner, KeptBlocks
from .plan import BYTES_PER_BLOCK_VOXEL, blocks, thinning_frame
from .source import scan_runs
from .tasks import CENTRELINE_HALO_RADII, centreline_block, histogram_bins, needed_halo, tissue_block, wall_block

__all__ = ["analyze_blockwise", "block_edge_for", "SMALLEST_BLOCK", "PROCESS_BYTES"]

# The smallest block edge worth running (voxels): below it the halos are
# most of every block.
SMALLEST_BLOCK = 32
# What the process holds besides the blocks: the interpreter with the
# compiled steps, the graph and the tables (measured about 250 MiB for the
# interpreter and imports).
PROCESS_BYTES = 300 << 20
# First halo before measuring (grid voxels); grown per block as needed.
_FIRST_HALO = 8


def block_edge_for(budget_bytes, *, halo=16, largest=512):
    """Largest even block edge whose extent (edge + 2 halo, cubed) fits ``budget_bytes`` of working memory."""
    if budget_bytes <= 0:
        return 0
    edge = int((budget_bytes / BYTES_PER_BLOCK_VOXEL) ** (1 / 3)) - 2 * int(halo)
    edge = min(edge - edge % 2, int(largest))
    return edge


def analyze_blockwise(mask, *, spacing, config=None, block_size=None, memory_limit_bytes=None, scheduler=None,
                      workers=None, inlets=(), outlets=(), progress=None, block_progress=None, label="mask",
                      keep_blocks=None, input_id=None):
    """Analyse a volume too large for memory, block by block, into one graph.

    Parameters
    ----------
    mask : (Z, Y, X) array-like
        Sliceable along z without loading the rest (NumPy memory map, Zarr
        array, HDF5 dataset, or an array); binary, or with
        ``input.threshold`` in the config.
    spacing : sequence of 3 float
        ``(dz, dy, dx)`` in µm.
    config : dict, str, Path or None
        As for :func:`pipeline.analysis.analyze`.
    block_size : int or None
        Edge of a block's core in voxels of the thinning grid (even, at
        least :data:`SMALLEST_BLOCK`); default from the memory limit.
    memory_limit_bytes : int or None
        Memory the analysis may use, all its processes together; default
        the available memory.
    scheduler : str, distributed.Client or None
        A running Dask scheduler to send the blocks to.
    workers : int or None
        Local Dask worker processes; default 1, the blocks in this process.
    inlets, outlets, progress
        As for :func:`pipeline.analysis.analyze`.
    block_progress : callable or None
        ``block_progress(step, done, total)`` after each block.
    label : str
        How messages name the volume.
    keep_blocks : str or Path, optional
        Folder where finished blocks are kept (:class:`~pipeline.blockwise.engine.KeptBlocks`):
        an analysis interrupted and started again with the same folder,
        input, configuration and blocks takes them up instead of redoing
        them. The caller removes the folder when the result is safe.
    input_id : str, optional
        What identifies the input for ``keep_blocks`` (a file's path, size
        and times); without it the blocks are kept under the configuration
        alone.

    Returns
    -------
    Result
        As :func:`pipeline.analysis.analyze`; ``run["blockwise"]`` records
        the blocks, halos and the tissue-distance brackets.

    Raises
    ------
    InputError, ConfigError, BlockError
    """
    try:
        cfg = load_config(config)
        sp = _check_spacing(spacing, 3)
        shape = tuple(int(n) for n in getattr(mask, "shape", ()))
        if len(shape) != 3 or min(shape) < 1:
            raise InputError(f"{label}: expected a 3-D (Z, Y, X) volume for a block-wise analysis, got shape "
                             f"{shape}")
        limit = memory_limit_bytes if memory_limit_bytes is not None else available_memory_bytes()
        edge = _block_edge(block_size, limit, workers, scheduler)
    except BaseException as exc:
        _charge(exc, "reading")
        raise
    clock = _Clock(_returning_memory(progress), cfg)
    try:
        kept = None
        if keep_blocks is not None:
            key = json.dumps({"input": input_id, "config": cfg, "spacing": list(sp), "edge": edge, "shape": shape,
                              "version": __version__}, sort_keys=True, default=str)
            kept = KeptBlocks(keep_blocks, hashlib.sha256(key.encode()).hexdigest())
        return _steps(mask, shape, sp, cfg, edge=edge, limit=limit, scheduler=scheduler, workers=workers,
                      inlets=inlets, outlets=outlets, clock=clock, block_progress=block_progress, label=label,
                      kept=kept)
    except BaseException as exc:
        _charge(exc, clock.running())
        raise


def _returning_memory(progress):
    """``progress`` after the C heap's free pages go back to the system (glibc's ``malloc_trim``).

    A step frees hundreds of megabytes (blocks, the centreline voxels, the
    runs) in pieces the allocator keeps; the next step's peak then counts
    them too. Where there is no glibc this does nothing more than ``progress``.
    """
    try:
        import ctypes

        trim = ctypes.CDLL("libc.so.6").malloc_trim
    except (OSError, AttributeError):
        trim = None

    def step(name, seconds):
        if trim is not None:
            trim(0)
        if progress is not None:
            progress(name, seconds)

    return step


def _block_edge(block_size, limit, workers, scheduler):
    """The block edge asked for, or the largest the memory limit allows; refuses a limit too small."""
    if block_size is not None:
        b = int(block_size)
        if b != block_size or b < SMALLEST_BLOCK or b % 2:
            raise InputError(f"expected an even number of voxels of at least {SMALLEST_BLOCK}, "
                             f"got {block_size!r}", param="block_size")
        return b
    if limit is None:
        return 256
    local = 1 if scheduler is not None else max(1, int(workers or 1))
    budget = (limit - PROCESS_BYTES * local) / local
    edge = block_edge_for(budget)
    if edge < SMALLEST_BLOCK:
        smallest = PROCESS_BYTES * local + local * BYTES_PER_BLOCK_VOXEL * (SMALLEST_BLOCK + 32) ** 3
        raise InputError(f"expected at least {_format_bytes(smallest)} for the smallest workable "
                         f"block ({SMALLEST_BLOCK} voxels a side with its halos, {local} process(es)), got "
                         f"{_format_bytes(limit)}", param="memory_limit")
    return edge


def _steps(mask, shape, sp, cfg, *, edge, limit, scheduler, workers, inlets, outlets, clock, block_progress, label,
           kept):
    c, cc = cfg["cleaning"], cfg["centrelines"]

    def report(step):
        if block_progress is None:
            return None
        return lambda done, total: block_progress(step, done, total)

    rows, x0, x1 = scan_runs(mask, threshold=cfg["input"]["threshold"], label=label, progress=report("reading"))
    if len(rows) == 0:
        raise InputError(f"{label}: expected some vessel voxels, got an empty mask (every voxel is 0)")
    if len(rows) == shape[0] * shape[1] and bool(np.all(x1 - x0 == shape[2])):
        raise InputError(f"{label}: expected background around the vessels, got a mask where every voxel is "
                         "vessel")
    clock.tick("reading")
    runs = clean_runs(rows, x0, x1, shape, spacing=sp, min_object_volume_um3=c["min_object_volume_um3"],
                      min_object_area_um2=c["min_object_area_um2"], keep_elongation=c["keep_elongation"],
                      fill_cavities=c["fill_cavities"])
    del rows, x0, x1
    clock.tick("cleaning")
    frame = thinning_frame(runs.shape, runs.offset, shape, sp, max_anisotropy=cc["max_anisotropy"],
                           resample_spacing_um=cc["resample_spacing_um"])
    n_grid = math.prod(frame.shape)
    if frame.resampled and n_grid > 1e11 and n_grid > 64 * math.prod(shape):
        from ..reading import spacing_problem

        why = spacing_problem(sp)
        raise InputError(f"{label}: resampled to {frame.spacing[0]:g} µm for thinning, the volume would have "
                         f"{n_grid:.3g} voxels; check the voxel spacing {tuple(sp)} µm (Z Y X)"
                         + (f": {why}" if why else ""))
    record = {"block_edge": int(edge), "grid": "isotropic" if frame.resampled else "original",
              "memory_limit_bytes": None if limit is None else int(limit)}
    cleaned = SimpleNamespace(stats=runs.stats, offset=runs.offset, mask=None)
    with BlockRunner(scheduler=scheduler, workers=workers) as runner:
        # The runs are held here alone, and dropped once the wall fits (the
        # last step to read the mask) are made: the graph steps of a large
        # volume need the memory.
        held = {"runs": runs, "shared": runner.share(runs)}
        del runs

        def fit(points, offsets, radii):
            try:
                return _wall_fits(runner, held["shared"], held["runs"], shape, sp, points, offsets, radii,
                                  edge=edge, progress=report("radii"), kept=kept)
            finally:
                runner.release(held.pop("shared"))
                held.clear()

        # Handed straight on, so that graph_steps alone holds the centrelines.
        result = graph_steps(_centrelines(runner, held["shared"], held["runs"], frame, shape, sp, cfg, edge=edge,
                                          limit=limit, record=record, report=report, clock=clock, kept=kept),
                             cleaned, sp, cfg, shape=shape, planar=False, inlets=inlets, outlets=outlets,
                             clock=clock, wall_fit=fit)
        if "shared" in held:  # no segment: no wall fit was asked for
            runner.release(held.pop("shared"))
    record["blocks_resumed"] = 0 if kept is None else kept.resumed
    result.run["blockwise"] = record
    if not _closed(record["tissue_distance_bracket_um"]):
        b = record["tissue_distance_bracket_um"]
        result.run["warnings"].append(
            "tissue_distance: the tissue-to-vessel distances are estimates (tissue far from every vessel, "
            f"beyond what a block's halo can hold in memory): median between {b['median'][0]:.3g} and "
            f"{b['median'][1]:.3g} µm, 95th percentile between {b['p95'][0]:.3g} and {b['p95'][1]:.3g} µm; the "
            "summary gives the upper values")
    return result


def _centrelines(runner, shared, runs, frame, shape, sp, cfg, *, edge, limit, record, report, clock, kept):
    """The whole volume's :class:`~pipeline.centrelines.Centrelines`, from its blocks."""
    border = [(o == 0, o + n == N) for o, n, N in zip(runs.offset, runs.shape, shape)]
    pad = pad_width_of_faces(runs.face, border, sp, frame.spacing)
    bins = histogram_bins(sp, shape)
    tiles = blocks(frame.shape, frame.origin, edge)
    first = (_FIRST_HALO,) * 3
    common = dict(frame=frame, crop_offset=runs.offset, original_shape=shape, spacing=sp, pad_width=pad,
                  halo=first, ridge=cfg["radii"]["half_voxel_correction"],
                  bins=None if frame.resampled else bins)
    # The first block measures the halo the others start from (each still
    # grows its own where wider vessels need it).
    progress = report("centrelines")
    parts = runner.map(centreline_block, shared, tiles[:1], step="centrelines", kwargs_of=lambda i: common,
                       kept=kept)
    common["halo"] = parts[0]["halo"]
    if progress is not None:
        progress(1, len(tiles))
    if len(tiles) > 1:
        parts += runner.map(centreline_block, shared, tiles[1:], step="centrelines", kwargs_of=lambda i: common,
                            progress=None if progress is None else lambda done, total: progress(done + 1, total + 1),
                            kept=kept)
    halos = np.array([p["halo"] for p in parts])
    rmax = max((p["rmax_um"] for p in parts), default=0.0)
    record.update(blocks=len(tiles), halo_voxels_max=[int(h) for h in halos.max(axis=0)],
                  largest_radius_um=float(rmax), pad_voxels=int(pad))
    if frame.resampled:
        tissue = _tissue_pass(runner, shared, runs, shape, sp, bins, edge=edge,
                              halo=needed_halo(rmax, sp, radii=CENTRELINE_HALO_RADII), report=report, kept=kept)
    else:
        tissue = parts
    quantiles, bracket = _tissue_quantiles(tissue, bins)
    if not _closed(bracket):
        # Tissue far from every vessel: one more pass with a halo as wide as
        # the 95th percentile's upper bound proves every distance below it.
        halo = tuple(int(np.ceil(bracket["p95"][1] / s)) + 2 for s in sp)
        edge_t = _tissue_edge(limit, halo)
        if edge_t is not None:
            tissue = _tissue_pass(runner, shared, runs, shape, sp, bins, edge=edge_t, halo=halo, report=report,
                                  kept=kept)
            quantiles, bracket = _tissue_quantiles(tissue, bins)
    record["tissue_distance_bracket_um"] = bracket
    vox = np.concatenate([p["voxels"] for p in parts]) if parts else np.zeros((0, 3), np.int64)
    radii = np.concatenate([p["radii_um"] for p in parts]) if parts else np.zeros(0)
    # The in-memory step lists voxels in C order of the crop; so does this.
    crop = np.asarray(runs.offset) if not frame.resampled else np.zeros(3, np.int64)
    vox = vox - crop
    order = np.lexsort((vox[:, 2], vox[:, 1], vox[:, 0]))
    grid_shape = runs.shape if not frame.resampled else frame.shape
    cl = centrelines_step.from_voxels(vox[order], radii[order], grid_spacing=frame.spacing, grid_shape=grid_shape,
                                      offset=runs.offset, spacing=sp, original_shape=shape, planar=False,
                                      resampled=frame.resampled, tissue_distance_um=quantiles)
    clock.tick("centrelines")
    return cl


def _tissue_pass(runner, shared, runs, shape, sp, bins, *, edge, halo, report, kept):
    """Tissue-distance histograms of the original grid's blocks of ``edge`` with ``halo``."""
    grid = blocks(shape, runs.offset, edge)
    return runner.map(tissue_block, shared, grid, step="centrelines",
                      kwargs_of=lambda i: dict(crop_offset=runs.offset, original_shape=shape, spacing=sp,
                                               halo=halo, bins=bins),
                      progress=report("tissue distances"),
                      kept=None if kept is None else _Named(kept, "tissue-{}-{}-{}-{}".format(edge, *halo)))


# Working memory of a tissue-distance block: per voxel of its extent the
# mask and the distance map (5 bytes), per voxel of its core the distances
# gathered for the histograms (about 40 bytes).
_TISSUE_EXTENT_BYTES = 5
_TISSUE_CORE_BYTES = 40


def _tissue_edge(limit, halo):
    """The largest even block edge whose tissue pass fits the memory limit with ``halo``, or None."""
    if limit is None:
        return 256
    budget = limit - PROCESS_BYTES
    edge = 512
    while edge >= SMALLEST_BLOCK:
        ext = np.prod([edge + 2 * h for h in halo], dtype=float)
        if ext * _TISSUE_EXTENT_BYTES + edge**3 * _TISSUE_CORE_BYTES <= budget:
            return edge
        edge -= 32
    return None


def _closed(bracket):
    return all(abs(bracket[q][1] - bracket[q][0]) <= 1e-9 * max(1.0, abs(bracket[q][1])) for q in ("median", "p95"))


class _Named:
    """Kept blocks of a pass under its own name (the step names the error, the pass the files)."""

    def __init__(self, kept, name):
        self.kept, self.name = kept, name

    def get(self, step, block):
        return self.kept.get(self.name, block)

    def put(self, step, block, result):
        self.kept.put(self.name, block, result)


def _tissue_quantiles(parts, bins):
    """Median and 95th percentile of the tissue distances from the blocks' histograms, and their brackets."""
    width, n = bins
    upper = np.zeros((2, n))
    proven = np.zeros((2, n))
    for p in parts:
        upper += p["tissue_upper"]
        proven += p["tissue_proven"]
    total = int(round(upper[0].sum()))
    if total == 0:
        return (0.0, 0.0), {"median": [0.0, 0.0], "p95": [0.0, 0.0], "bin_um": float(width)}

    def quantile(hist, q):
        # numpy's linear rule between the order statistics around rank q (n - 1);
        # each statistic is the mean of its bin (module notes of tasks.py)
        cum = np.cumsum(hist[0])
        r = q * (total - 1)
        k = int(math.floor(r))
        b = [int(np.searchsorted(cum, j + 0.5)) for j in (k, min(k + 1, total - 1))]
        v = [hist[1, i] / hist[0, i] for i in b]
        return v[0] + (r - k) * (v[1] - v[0])

    med = (quantile(proven, 0.5), quantile(upper, 0.5))
    p95 = (quantile(proven, 0.95), quantile(upper, 0.95))
    bracket = {"median": [float(med[0]), float(med[1])], "p95": [float(p95[0]), float(p95[1])],
               "bin_um": float(width)}
    return (float(med[1]), float(p95[1])), bracket


def _wall_fits(runner, shared, runs, shape, sp, points, offsets, radii, *, edge, progress, kept):
    """:class:`~pipeline.radii.WallRadii` of the graph's points, each fitted in the block of the original grid holding it."""
    P, off, T, todo = wall_fit_plan(points, offsets, radii, spacing=sp)
    R0 = np.ascontiguousarray(radii, dtype=np.float64)
    grid = blocks(shape, runs.offset, edge)
    cuts = [sorted({b.lo[a] for b in grid} | {b.hi[a] for b in grid}) for a in range(3)]
    idx = np.clip(np.floor(P[todo] / np.asarray(sp) + 0.5).astype(np.int64), 0, np.asarray(shape) - 1)
    cell = [np.searchsorted(cuts[a], idx[:, a], side="right") - 1 for a in range(3)]
    dims = [len(cuts[a]) - 1 for a in range(3)]
    key = np.ravel_multi_index(cell, dims)
    order = np.argsort(key, kind="stable")
    starts = np.searchsorted(key[order], np.arange(len(grid) + 1))
    busy = [i for i in range(len(grid)) if starts[i + 1] > starts[i]]

    def kwargs_of(j):
        sel = todo[order[starts[busy[j]]:starts[busy[j] + 1]]]
        return dict(crop_offset=runs.offset, original_shape=shape, spacing=sp, points_um=P[sel], tangents=T[sel],
                    radii_um=R0[sel])

    parts = runner.map(wall_block, shared, [grid[i] for i in busy], step="radii", kwargs_of=kwargs_of,
                       progress=progress, kept=kept)
    plain = np.empty(len(todo))
    mean = np.empty(len(todo))
    nfit = np.empty(len(todo), np.int64)
    for j, part in zip(busy, parts):
        at = order[starts[j]:starts[j + 1]]
        plain[at], mean[at], nfit[at] = part["plain"], part["mean"], part["nfit"]
    return finish_wall_radii(P, off, R0, todo, plain, mean, nfit)
