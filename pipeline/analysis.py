"""The analysis pipeline as one call: mask in, measured vessel graph out.

In: a boolean mask ``(Z, Y, X)`` (or ``(Y, X)``), its spacing in µm, a config.
Out: :class:`~pipeline.result.Result` (``Analysis`` is the same type), with ``segments`` and ``nodes`` DataFrames, a networkx
``graph``, the ``summary`` dict, the smoothed ``centrelines`` and ``run``
bookkeeping (effective config, time per step, counts, warnings).

Steps run strictly in order, each consuming only the previous step's output:
cleaning -> centrelines (thinning + radii) -> graph (build + prune) ->
measures -> summary -> levels (root, branching levels, Strahler and
diameter-defined Strahler orders) -> vessels (segments chained through
junctions, their tortuosity) -> orders (elements, orders table,
connectivity matrix) -> flow (Poiseuille/Kirchhoff network solve) ->
bifurcations (Murray's law, angles, flags).
"""

from __future__ import annotations

import math
from pathlib import Path as _Path
from types import SimpleNamespace
import time
import numpy as np
import pandas as pd

from . import bifurcations as bif_step
from . import cleaning, centrelines, flow as flow_step, graph as graph_step, levels as levels_step, measures
from . import pruning as pruning_step
from . import orders as orders_step
from . import radii as radii_step
from . import vessels as vessels_step
from . import reading
from .config import load_config
from .errors import InputError
from .result import STEPS, Result, to_networkx

__all__ = ["Analysis", "Result", "STEPS", "analyze", "analyze_file", "to_networkx"]

# Median segment radius, µm, beyond which the spacing is more likely wrong
# than the sample (common practice): capillaries have radii of 2-4 µm and the
# widest vessels micro-CT casts resolve, even an aorta, stay below 1 mm;
# below 0.1 µm is far under optical resolution.
_PLAUSIBLE_MEDIAN_RADIUS_UM = (0.1, 1000.0)
# Share of the centreline length in vessels thinner than the z step above
# which the result carries a warning. A vessel thinner than the z step that
# runs near the image plane falls between planes: the mask breaks or loses
# it. Measured on synthetic capillary beds (100 µm, every vessel 1-3 µm in
# radius, no other artefact, xy 1 µm): with 30-42 % of the length that thin
# (z 3 and 4 µm) the length read 8-15 % low and 12-42 % of the loops were
# lost; with 2-4 % (z 2 and 3 µm, thicker beds) the length was within 0.4 %.
_THIN_BELOW_Z_STEP_SHARE = 0.1


#: The type :func:`analyze` returns: :class:`pipeline.result.Result`, also
#: what :func:`pipeline.tables.load_result` reads back (one result type).
Analysis = Result


def _as_mask(mask, threshold):
    arr = np.asarray(mask)
    if arr.ndim not in (2, 3):
        raise InputError(f"mask: expected a 2-D (Y, X) or 3-D (Z, Y, X) array, got {arr.ndim} dimensions {arr.shape}")
    # the rules files are read by: two values (0 and vessel), or a threshold
    return reading.binarise(arr, threshold=threshold, label="mask")


def _check_spacing(spacing, ndim):
    try:
        sp = [float(s) for s in spacing]
    except TypeError:
        raise InputError(f"spacing: expected a sequence of {ndim} numbers in µm, got {spacing!r}") from None
    if len(sp) == 2 and ndim == 2:
        sp = [min(sp)] + sp
    if len(sp) != 3:
        raise InputError(f"spacing: expected 3 values (dz, dy, dx) in µm, got {len(sp)}: {spacing!r}")
    for name, s in zip("zyx", sp):
        if not np.isfinite(s) or s <= 0:
            raise InputError(f"spacing: expected a positive finite {name} spacing in µm, got {s!r}")
    return tuple(sp)


def analyze(mask, *, spacing, config=None, planar=None, inlets=(), outlets=(), progress=None,
            memory_limit_bytes=None):
    """Turn a binary vessel mask into a measured vessel graph.

    Parameters
    ----------
    mask : (Z, Y, X) or (Y, X) array_like
        Vessel mask: boolean, or two values of which one is 0 (the other is
        vessel), as a file is read (:func:`pipeline.reading.binarise`); an
        intensity or probability image needs ``input.threshold`` in the
        config (vessel is ``value > threshold``).
    spacing : sequence of float
        Voxel spacing in µm, ``(dz, dy, dx)`` (or ``(dy, dx)`` for 2-D).
    config : dict, str, Path or None
        Configuration overrides or a YAML file; validated here.
    planar : bool or None
        Analyse in-plane. Default: True when the mask is 2-D or has one plane.
    inlets, outlets : sequence
        Extra inlet / named outlet nodes for the flow model, each a node id,
        ``'node:ID'`` or a position ``(z, y, x)`` / ``'z,y,x'`` in µm (nearest
        node). The root comes from ``config['levels']['root']``; without
        named outlets, ends cut by the volume border are outlets.
    progress : callable or None
        Called as ``progress(step, seconds)`` after each step.
    memory_limit_bytes : int or None
        Memory the analysis may use; default: the available memory. A volume
        whose estimate (:func:`pipeline.reading.check_memory`, counting the
        isotropic thinning grid) exceeds it is refused before any work.

    Returns
    -------
    Analysis

    Raises
    ------
    InputError, ConfigError

    Examples
    --------
    >>> from pipeline import synthetic
    >>> mask, truth = synthetic.rasterize(synthetic.straight_tube(length_um=60, radius_um=4), spacing=(1, 1, 1))
    >>> res = analyze(mask, spacing=(1, 1, 1))
    >>> len(res.segments)
    1
    """
    try:
        cfg, arr, sp, planar = _checked_input(mask, spacing, config, planar, memory_limit_bytes)
    except BaseException as exc:
        _charge(exc, "reading")  # the checks of the input, as a file's are part of reading it
        raise
    clock = _Clock(progress, cfg)
    try:
        return _analyze_steps(arr, sp, cfg, planar=planar, inlets=inlets, outlets=outlets, clock=clock)
    except BaseException as exc:
        _charge(exc, clock.running())
        raise


def _checked_input(mask, spacing, config, planar, memory_limit_bytes):
    """The config, mask (Z, Y, X), spacing and planar flag of :func:`analyze`, checked."""
    cfg = load_config(config)
    arr = _as_mask(mask, cfg["input"]["threshold"])
    sp = _check_spacing(spacing, arr.ndim)
    if arr.ndim == 2:
        arr = arr[None]
    if planar is None:
        planar = arr.shape[0] == 1
    cc = cfg["centrelines"]
    reading.check_memory("mask array", arr.shape, sp, planar=planar, memory_limit_bytes=memory_limit_bytes,
                         max_anisotropy=cc["max_anisotropy"], resample_spacing_um=cc["resample_spacing_um"])
    if not arr.any():
        raise InputError("mask: expected some vessel voxels, got an empty mask (every voxel is 0)")
    if arr.all():
        raise InputError("mask: expected background around the vessels, got a mask where every voxel is vessel")
    return cfg, arr, sp, planar


def _charge(exc, step):
    """Name on ``exc`` the step it was raised in (``exc.step``), unless a step inside named it first."""
    if getattr(exc, "step", None) is None:
        try:
            exc.step = step
        except AttributeError:  # an exception type without attributes of its own
            pass


def _analyze_steps(arr, sp, cfg, *, planar, inlets, outlets, clock):
    """The steps of :func:`analyze` on a checked mask, each timed by ``clock``."""
    c = cfg["cleaning"]
    cleaned = cleaning.clean_mask(arr, spacing=sp, min_object_volume_um3=c["min_object_volume_um3"],
                                  min_object_area_um2=c["min_object_area_um2"],
                                  keep_elongation=c["keep_elongation"], fill_cavities=c["fill_cavities"],
                                  planar=planar)
    original_shape = arr.shape
    del arr
    clock.tick("cleaning")

    def fit(points, offsets, radii):
        return radii_step.wall_radii(cleaned.mask, spacing=sp, offset=cleaned.offset, points_um=points,
                                     offsets=offsets, radii_um=radii, planar=planar)

    # Handed straight on, so that graph_steps alone holds the centrelines.
    return graph_steps(_centrelines_step(cleaned, sp, cfg, shape=original_shape, planar=planar, clock=clock),
                       cleaned, sp, cfg, shape=original_shape, planar=planar, inlets=inlets, outlets=outlets,
                       clock=clock, wall_fit=fit)


def _centrelines_step(cleaned, sp, cfg, *, shape, planar, clock):
    cc = cfg["centrelines"]
    cl = centrelines.extract_centrelines(
        cleaned.mask, spacing=sp, offset=cleaned.offset, original_shape=shape, planar=planar,
        max_anisotropy=cc["max_anisotropy"], resample_spacing_um=cc["resample_spacing_um"],
        half_voxel_correction=cfg["radii"]["half_voxel_correction"],
    )
    clock.tick("centrelines")
    return cl


def graph_steps(cl, cleaned, sp, cfg, *, shape, planar, inlets, outlets, clock, wall_fit):
    """The steps of :func:`analyze` from the centrelines on: graph, radii, pruning, tables and the network steps.

    ``cleaned`` needs ``stats`` and ``offset`` (and ``mask`` only when the
    centrelines carry no tissue distances); ``wall_fit(points, offsets,
    radii)`` returns the :class:`pipeline.radii.WallRadii` of the graph's
    centreline points. The block-wise analysis comes in here with its own.
    """
    original_shape = tuple(shape)
    g = graph_step.build_graph(cl)
    # Only these are read from here on; the centreline voxels' arrays go
    # (on a large volume they are hundreds of megabytes).
    cl = SimpleNamespace(grid_spacing=cl.grid_spacing, resampled=cl.resampled,
                         tissue_distance_um=cl.tissue_distance_um)
    clock.tick("graph")
    # Radii from the wall before pruning: the pruning rules compare lengths
    # with radii, and the distance map's inscribed radius reads low on rough
    # walls (it touches the deepest dent), which keeps bumps as branches.
    wall = None
    if cfg["radii"]["estimator"] == "wall_fit":
        wall = _fit_wall_radii(g, wall_fit)
        clock.tick("radii")
    _prune(g, cfg["pruning"], grid_spacing=cl.grid_spacing, spacing=sp, planar=planar, shape=original_shape)
    if wall is not None:
        _to_mean_radii(g, *wall)
    del wall
    clock.tick("pruning")
    segs, nodes, keys, smoothed = _graph_tables(g, cfg, grid_spacing=cl.grid_spacing, spacing=sp)
    # The tables hold what is measured; of the graph only these go on (the
    # flow model of a large network needs the memory the graph held).
    graph_counts, centreline_radii = g.counts, [g.seg_radii[k] for k in keys]
    del g
    clock.tick("measures")
    warnings = []
    summary = _sample_summary(segs, nodes, cleaned, cl, spacing=sp, planar=planar, shape=original_shape,
                              warnings=warnings)
    clock.tick("summary")
    net = _network_steps(segs, nodes, smoothed, cfg, inlets=inlets, outlets=outlets, spacing=sp, planar=planar,
                         summary=summary, warnings=warnings, clock=clock)
    counts = {**cleaned.stats, **graph_counts, "resampled_isotropic": bool(cl.resampled),
              "thinning_grid_spacing_um": list(cl.grid_spacing)}
    run = {"config": cfg, "timings_s": clock.timings, "counts": counts, "warnings": warnings, "planar": bool(planar),
           "shape": list(original_shape), "crop_offset": list(cleaned.offset), "roots": [int(r) for r in net["roots"]],
           "notes": net["notes"], "flow": net["flow"]}
    return Result(segments=net["segments"], nodes=net["nodes"], summary=summary, centrelines=smoothed,
                  centreline_radii=centreline_radii, spacing=sp, levels=net["levels"],
                  bifurcations=net["bifurcations"], run=run, vessels=net["vessels"], orders=net["orders"].table,
                  order_connectivity=net["orders"].connectivity)


class _Clock:
    """Seconds per step for run.json, each also handed to ``progress(step, seconds)``.

    Knows which step is running (:meth:`running`): the one after the last
    that ended, among the :data:`STEPS` this config runs.
    """

    def __init__(self, progress, cfg):
        self.progress, self.timings, self.t = progress, {}, time.perf_counter()
        self.order = [st for st in STEPS if st not in ("reading", "writing")
                      and (st != "flow" or cfg["flow"]["enabled"])
                      and (st != "radii" or cfg["radii"]["estimator"] == "wall_fit")]
        self.passed = 0

    def tick(self, step):
        now = time.perf_counter()
        self.timings[step] = round(now - self.t, 4)
        if self.progress is not None:
            self.progress(step, now - self.t)
        self.t = now
        self.skip(step)

    def skip(self, step):
        """Mark ``step`` as over without a time of its own (it had nothing to do)."""
        if step in self.order:
            self.passed = max(self.passed, self.order.index(step) + 1)

    def running(self):
        return self.order[min(self.passed, len(self.order) - 1)]


def _prune(g, p, *, grid_spacing, spacing, planar, shape):
    """The pruning step with the ``pruning`` section's options (in place)."""
    pruning_step.prune_graph(g, spur_radius_factor=p["spur_radius_factor"], min_spur_length_um=p["min_spur_length_um"],
                             junction_merge_radii=p["junction_merge_radii"], wall_loop_radii=p["wall_loop_radii"],
                             spur_protrusion_radii=p["spur_protrusion_radii"], wall_spike_radii=p["wall_spike_radii"],
                             small_loop_radii=p["small_loop_radii"],
                             web_loop_radii=p["web_loop_radii"], border_spur_radii=p["border_spur_radii"],
                             voxel_um=float(max(grid_spacing[1:] if planar else grid_spacing)),
                             min_fragment_length_um=p["min_fragment_length_um"], max_rounds=p["max_rounds"],
                             reconnect=p["reconnect_gaps"], spacing_um=spacing,
                             volume_um=(np.asarray(shape) - 1) * np.asarray(spacing),
                             max_gap_voxels=p["max_gap_voxels"], max_gap_angle_deg=p["max_gap_angle_deg"])


def _graph_tables(g, cfg, *, grid_spacing, spacing):
    """Segments and nodes tables of the pruned graph, nodes numbered 0..N-1; path keys and smoothed centrelines."""
    r, m = cfg["radii"], cfg["measures"]
    segs, keys, smoothed = measures.segment_table(g, grid_spacing=grid_spacing,
                                                  smoothing_sigma_um=m["smoothing_sigma_um"],
                                                  tortuosity_step_um=m["tortuosity_step_um"],
                                                  statistic=r["statistic"],
                                                  junction_exclusion_radii=r["junction_exclusion_radii"])
    alive = np.flatnonzero(g.node_alive)
    renumber = np.full(len(g.node_pos_um), -1, dtype=np.int64)
    renumber[alive] = np.arange(len(alive))
    segs["node_from"] = renumber[segs["node_from"].to_numpy()]
    segs["node_to"] = renumber[segs["node_to"].to_numpy()]
    nodes = measures.node_table(g, spacing=spacing, node_ids=alive)
    return segs, nodes, keys, smoothed


def _sample_summary(segs, nodes, cleaned, cl, *, spacing, planar, shape, warnings):
    """The sample's morphometry summary; remarks on an empty or implausible result go to ``warnings``."""
    if len(segs) == 0:
        warnings.append("no vessel segment survived pruning; the tables are empty")
    td = cl.tissue_distance_um
    if td is None:
        td = measures.tissue_distance(cleaned.mask, cleaned.offset, shape, spacing, planar=planar)
    summary = measures.summarize(segs, nodes, cleaned=cleaned, spacing=spacing, planar=planar,
                                 original_shape=shape, tissue_dist=td)
    median_radius = float(segs["radius_um"].median()) if len(segs) else math.nan
    lo, hi = _PLAUSIBLE_MEDIAN_RADIUS_UM
    if math.isfinite(median_radius) and not lo <= median_radius <= hi:
        shown = ", ".join(f"{v:g}" for v in spacing)
        warnings.append(f"median vessel radius {median_radius:.3g} µm is outside {lo:g}-{hi:g} µm, the vessels "
                        f"microscopy and micro-CT resolve; check the voxel spacing ({shown} µm, Z Y X) and its unit")
    if not planar and len(segs):
        length = segs["length_um"].to_numpy(float)
        thin = 2.0 * segs["radius_um"].to_numpy(float) < spacing[0]
        share = float(length[thin].sum() / length.sum()) if length.sum() > 0 else 0.0
        if share >= _THIN_BELOW_Z_STEP_SHARE:
            warnings.append(
                f"{share:.0%} of the centreline length lies in vessels thinner than the z step ({spacing[0]:g} µm): "
                "where such vessels run near the image plane the mask breaks or loses them, so length, junction "
                "and loop counts read low (on synthetic capillary beds with a third of the length that thin, "
                "length 8-15 % low and up to 42 % of the loops lost)")
    return summary


def _network_steps(segs, nodes, smoothed, cfg, *, inlets, outlets, spacing, planar, summary, warnings, clock):
    """Levels, vessels, orders, flow and bifurcations over the graph's tables; updates ``summary``."""
    out = {"segments": segs, "nodes": nodes, "levels": pd.DataFrame(), "roots": [], "notes": [],
           "vessels": pd.DataFrame(columns=vessels_step.VESSEL_COLUMNS),
           "bifurcations": pd.DataFrame(columns=bif_step.COLUMNS), "flow": {"solved": False},
           "orders": orders_step.empty_orders()}
    if len(segs):
        inlet_ids = _resolve_nodes(inlets, nodes, segs, "inlet")
        outlet_ids = _resolve_nodes(outlets, nodes, segs, "outlet")
        lv, roots = levels_step.compute_levels(segs, nodes, inlets=inlet_ids, notes=out["notes"],
                                                **cfg["levels"])
        segs = segs.merge(lv, on="segment_id", how="left", validate="one_to_one")
        level_table = levels_step.level_table(segs)
        summary["roots"] = [int(r) for r in roots]
        summary["segments_without_level"] = int(segs["level"].isna().sum())
        clock.tick("levels")
        mc = cfg["measures"]
        assign, out["vessels"] = vessels_step.build_vessels(segs, nodes, smoothed, step_um=mc["tortuosity_step_um"],
                                                            window_um=mc["vessel_window_um"], roots=roots)
        segs = segs.merge(assign[["segment_id", "vessel_id"]], on="segment_id", how="left", validate="one_to_one")
        summary.update(vessels_step.vessel_summary(out["vessels"]))
        clock.tick("vessels")
        ordered = orders_step.compute_orders(segs)
        segs = segs.merge(ordered.segments, on="segment_id", how="left", validate="one_to_one")
        clock.tick("orders")
        if cfg["flow"]["enabled"] and roots:
            segs, nodes, out["flow"] = _flow(segs, nodes, cfg, roots=roots, inlet_ids=inlet_ids,
                                             outlet_ids=outlet_ids, summary=summary, warnings=warnings)
            clock.tick("flow")
        elif cfg["flow"]["enabled"]:
            warnings.append("flow not solved: no root or inlet node could be chosen")
            clock.skip("flow")
        # The wall fit's slab and quantisation follow the coarsest spacing of
        # the mask (planar: in-plane) the radii were fitted on.
        bif_table, bif_summary = bif_step.analyze_bifurcations(segs, nodes, smoothed,
                                                               voxel_um=float(max(spacing[1:] if planar else spacing)),
                                                               **cfg["bifurcations"])
        summary.update(bif_summary)
        if len(bif_table) and len(level_table):
            per_level = bif_step.levels_murray(bif_table)
            level_table = level_table.merge(per_level, on="level", how="left")
        clock.tick("bifurcations")
        out.update(segments=segs, nodes=nodes, levels=level_table, roots=roots, bifurcations=bif_table,
                   orders=ordered)
    summary.update(out["orders"].summary)
    return out


def _flow(segs, nodes, cfg, *, roots, inlet_ids, outlet_ids, summary, warnings):
    """The flow step merged into the tables and the summary; returns (segments, nodes, run.json's flow record)."""
    known = roots
    if cfg["flow"]["boundary"] == "estimate" and str(cfg["levels"]["root"]).strip().lower() == "auto":
        # the automatic root is a guess for counting levels, not a
        # measured inlet: only inlets the user named are known
        known = inlet_ids
    options = {k: v for k, v in cfg["flow"].items() if k != "enabled"}
    fr = flow_step.solve_flow(segs, nodes, inlets=known, outlets=outlet_ids or None, **options)
    new = [c for c in fr.segments.columns if c == "segment_id" or c not in segs.columns]
    segs = segs.merge(fr.segments[new], on="segment_id", how="left", validate="one_to_one")
    nodes = nodes.merge(fr.nodes, on="node_id", how="left", validate="one_to_one")
    for key in ("total_inflow_nl_min", "network_resistance_pa_s_um3", "perfused_length_fraction",
                "max_conservation_residual", "n_inlets", "n_outlets"):
        summary[key] = fr.summary.get(key)
    # speed and shear by diameter class, and what is checked against
    # physiological ranges
    for key in fr.summary:
        if key.startswith(("velocity_", "wss_", "n_perfused_", "perfused_length_um_")):
            summary[key] = fr.summary[key]
    warnings.extend(fr.warnings)
    return segs, nodes, {"solved": True, **fr.summary}


def _paths(g):
    """Segment ids, path offsets (S + 1,) and every path's points concatenated (M, 3); ([], None, None) if none."""
    keys = list(g.seg_path)
    if not keys:
        return keys, None, None
    off = np.r_[0, np.cumsum([len(g.seg_path[s]) for s in keys])].astype(np.int64)
    return keys, off, np.vstack([g.seg_path[s] for s in keys])


def _fit_wall_radii(g, wall_fit):
    """Replace each segment's distance-map radii by the plain wall fit (pipeline/radii.py).

    ``wall_fit(points, offsets, radii)`` makes the fits. Returns the fitted
    points (M, 3) and, at each, the mean radius over angle over the plain
    one, for :func:`_to_mean_radii` after pruning; None when the graph has
    no segment.
    """
    keys, off, P = _paths(g)
    if not keys:
        return None
    R0 = np.concatenate([g.seg_radii[s] for s in keys])
    fit = wall_fit(P, off, R0)
    for i, s in enumerate(keys):
        g.seg_radii[s] = fit.plain[off[i]:off[i + 1]]
    # where no radius was found (0) there is nothing to move
    factor = np.divide(fit.radii, fit.plain, out=np.ones_like(fit.radii), where=fit.plain > 0)
    return P, factor


def _to_mean_radii(g, points, factor):
    """Move the pruned graph's radii from the plain wall fit to the mean over angle.

    Pruning compares lengths with the plain fit, which counts a rough wall's
    bulges (a spur must clear them); the measured radius is the wall's mean
    over angle. Pruning joins, splits and trims the fitted paths, which keep
    their points' coordinates, so each point takes the factor of the fitted
    point at the same position (a hash lookup; a nearest-neighbour search
    took 1.5-2 s on the 512^3 benchmark bed). Points pruning made (a moved
    junction, a bridged gap) take the factor of the nearest fitted point
    along their path, or none.
    """
    keys, off, query = _paths(g)
    if not keys or len(points) == 0:
        return
    fitted = pd.MultiIndex.from_arrays(points.T)
    first = ~fitted.duplicated()
    pos = fitted[first].get_indexer(pd.MultiIndex.from_arrays(query.T))
    f = pd.Series(np.where(pos >= 0, factor[first][np.maximum(pos, 0)], np.nan))
    if (pos < 0).any():
        by_segment = f.groupby(np.repeat(np.arange(len(keys)), np.diff(off)))
        f = by_segment.ffill().fillna(by_segment.bfill()).fillna(1.0)
    f = f.to_numpy()
    for i, s in enumerate(keys):
        g.seg_radii[s] = g.seg_radii[s] * f[off[i]:off[i + 1]]
    # the graph caches each segment's median radius (graph._seg_radius)
    g.__dict__.pop("_radius_cache", None)


def _resolve_nodes(specs, nodes, segments, what):
    """Node ids for inlet/outlet specs (ids, 'node:ID' or positions in µm)."""
    out = []
    for spec in specs or ():
        ids = levels_step.choose_roots(nodes, segments, root=spec, inlets=())
        out.extend(i for i in ids if i not in out)
    return out


def analyze_file(path, outdir, *, spacing=None, config=None, overwrite=False, inlets=(), outlets=(),
                 progress=None, warn=None, run_info=None, memory_limit_bytes=None, blockwise=None, block_size=None,
                 scheduler=None, workers=None, dataset=None, block_progress=None):
    """Read one mask file, analyse it and write its result folder.

    Parameters
    ----------
    path : str or Path
        Mask file (any format :func:`pipeline.reading.read_mask` reads).
    outdir : str or Path
        Result folder, written atomically (see :mod:`pipeline.tables`).
    spacing : sequence of float, optional
        ``(dz, dy, dx)`` µm overriding the file's metadata.
    config : dict or path, optional
        Validated with :func:`pipeline.config.load_config`.
    overwrite : bool
        Replace a non-empty ``outdir``.
    inlets, outlets : sequence, optional
        Passed to :func:`analyze`.
    progress : callable, optional
        ``progress(step, seconds)`` after each step, ``"reading"`` first and
        ``"writing"`` (the result folder) last.
    warn : callable, optional
        ``warn(message)`` for every warning as it arises.
    run_info : dict, optional
        Extra entries for ``run.json`` (the command line, batch bookkeeping).
    memory_limit_bytes : int, optional
        Memory the analysis may use; overrides ``input.max_memory_gb``.
    blockwise : bool or None
        Analyse block by block (:func:`pipeline.blockwise.analyze_blockwise`):
        True always, False never (a volume over the memory limit is then
        refused), None (default) when the in-memory analysis would need more
        than the memory limit.
    block_size, scheduler, workers, block_progress
        Options of :func:`pipeline.blockwise.analyze_blockwise`.
    dataset : str, optional
        The array of a Zarr store or HDF5 file that holds several.

    Returns
    -------
    outdir : Path
        The result folder.
    result : Result
        The analysis that was written.

    Raises
    ------
    InputError
        For unreadable or invalid input, a non-empty ``outdir`` without
        ``overwrite``, an ``outdir`` that is not a vesselflow result or holds
        files vesselflow did not write, or one that contains the input;
        nothing is written then.
    StorageError
        When the result cannot be written (disk full, no permission);
        nothing is left half-written.
    """
    import datetime as _dt
    import platform

    from . import tables
    from ._version import __version__

    try:
        cfg = load_config(config)
        tables.check_outdir(outdir, overwrite=overwrite, inputs=[path])
        tables.check_writable(outdir)
    except BaseException as exc:
        _charge(exc, "writing")  # where the result would go, checked before any work
        raise
    try:
        limit = _memory_limit(cfg, memory_limit_bytes)
        lazy = _opened_for_blocks(path, spacing, cfg, limit, blockwise, dataset)
        if lazy is None:
            img, read_s, limit = _read(path, spacing, cfg, limit, progress, warn, dataset)
    except BaseException as exc:
        _charge(exc, "reading")
        raise
    if lazy is not None:
        with lazy:
            for w in lazy.warnings:
                if warn is not None:
                    warn(w)
            from .blockwise import analyze_blockwise

            keep = _kept_blocks_folder(outdir)
            result = analyze_blockwise(lazy.source, spacing=lazy.spacing, config=cfg, block_size=block_size,
                                       memory_limit_bytes=limit, scheduler=scheduler, workers=workers,
                                       inlets=inlets, outlets=outlets, progress=progress,
                                       block_progress=block_progress, label=lazy.label, keep_blocks=keep,
                                       input_id=_file_identity(lazy.file))
            img = SimpleNamespace(sha256=lazy.sha256(), original_dtype=str(lazy.dtype), axes_found=lazy.axes_found,
                                  spacing=lazy.spacing, spacing_source=lazy.spacing_source, warnings=lazy.warnings)
        read_s = result.run["timings_s"].pop("reading", 0.0)
    else:
        result = analyze(img.mask, spacing=img.spacing, config=cfg, planar=img.planar, inlets=inlets,
                         outlets=outlets, progress=progress, memory_limit_bytes=limit)
    result.run["timings_s"] = {"reading": round(read_s, 4), **result.run["timings_s"]}
    result.run["warnings"] = list(img.warnings) + list(result.run["warnings"])
    info = {
        "vesselflow_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "input": {"path": str(_Path(path).resolve()), "sha256": img.sha256, "dtype": img.original_dtype,
                  "axes": img.axes_found},
        "spacing_um": list(img.spacing),
        "spacing_source": img.spacing_source,
        "python": platform.python_version(),
        **(run_info or {}),
    }
    t0 = time.perf_counter()
    try:
        out = tables.write_result(result, outdir, run_info=info, overwrite=overwrite, inputs=[path])
    except BaseException as exc:
        _charge(exc, "writing")
        raise
    if progress is not None:
        progress("writing", time.perf_counter() - t0)
    if lazy is not None:
        # the result is safe: the blocks kept for a resumed run go
        from .blockwise.engine import KeptBlocks

        KeptBlocks.remove_folder(_kept_blocks_folder(outdir))
    return out, result


def _kept_blocks_folder(outdir):
    """Where a block-wise analysis into ``outdir`` keeps its finished blocks: ``.NAME.blocks`` beside it."""
    out = _Path(outdir).resolve()
    return out.parent / f".{out.name}.blocks"


def _file_identity(path):
    """Path, sizes and modification times of a file or of every file of a store: what resuming blocks checks."""
    p = _Path(path).resolve()
    files = [p] if p.is_file() else sorted(f for f in p.rglob("*") if f.is_file())
    return [str(p)] + [[str(f.relative_to(p)) if f != p else "", f.stat().st_size, f.stat().st_mtime_ns]
                       for f in files]


def _memory_limit(cfg, memory_limit_bytes):
    """The memory the analysis may use: the argument, ``input.max_memory_gb``, or what is available now."""
    limit = memory_limit_bytes
    if limit is None and cfg["input"]["max_memory_gb"] is not None:
        limit = int(cfg["input"]["max_memory_gb"] * 2**30)
    if limit is None:
        # One figure, taken before the mask is loaded, for both memory checks.
        limit = reading.available_memory_bytes()
    return limit


def _opened_for_blocks(path, spacing, cfg, limit, blockwise, dataset):
    """The mask opened lazily when it is to be analysed block by block, else None."""
    if blockwise is False:
        return None
    lazy = reading.open_mask(path, spacing=spacing, threshold=cfg["input"]["threshold"],
                             implausible_spacing=cfg["input"]["implausible_spacing"], dataset=dataset)
    try:
        if blockwise is None:
            cc = cfg["centrelines"]
            grid = reading.thinning_grid_shape(lazy.shape, lazy.spacing, planar=lazy.planar,
                                               max_anisotropy=cc["max_anisotropy"],
                                               resample_spacing_um=cc["resample_spacing_um"])
            need = reading.estimate_memory_bytes(lazy.shape, grid_shape=grid)
            # A spacing in the wrong unit makes the estimate astronomical: the
            # in-memory route refuses it with the likely mistake named.
            wrong = reading.spacing_problem(lazy.spacing, planar=lazy.planar) is not None
            if lazy.planar or limit is None or need <= limit or wrong:
                lazy.close()
                return None
        elif lazy.planar:
            raise InputError(f"{lazy.label}: a single plane is analysed in memory; the block-wise analysis is "
                             "for 3-D volumes", param="blockwise")
    except BaseException:
        lazy.close()
        raise
    return lazy


def _read(path, spacing, cfg, limit, progress, warn, dataset=None):
    """The mask file read and checked (:func:`pipeline.reading.read_mask`), the seconds it took, the memory limit."""
    t0 = time.perf_counter()
    cc = cfg["centrelines"]
    img = reading.read_mask(path, spacing=spacing, threshold=cfg["input"]["threshold"], memory_limit_bytes=limit,
                            implausible_spacing=cfg["input"]["implausible_spacing"],
                            max_anisotropy=cc["max_anisotropy"], resample_spacing_um=cc["resample_spacing_um"],
                            dataset=dataset)
    for w in img.warnings:
        if warn is not None:
            warn(w)
    seconds = time.perf_counter() - t0
    if progress is not None:
        progress("reading", seconds)
    return img, seconds, limit
