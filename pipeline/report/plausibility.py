"""Flow plausibility and uncertainty of a sample: checks against published ranges, and their figures.

In: a sample's summary and segments table (flow solved). Out: the class statistics checked against
:data:`pipeline.flow.PLAUSIBLE` (:func:`plausibility_checks`, :func:`plausibility_messages`), the
ensemble's interval widths and direction confidence (:func:`flow_uncertainty`), and their figures.
"""

from __future__ import annotations

import math
import re

import numpy as np
from matplotlib.collections import LineCollection
from matplotlib.colors import to_rgba
from matplotlib.lines import Line2D

from ._common import OKABE_ITO, _SUFFIXES, _bool_col, _col, _log_axes, _new_figure, _no_data, _num


# --------------------------------------------------------------------------- flow plausibility and uncertainty


#: Direction confidence (share of ensemble members with the estimate's flow
#: sign) from which the report counts a segment's flow direction as settled.
DIRECTION_CONFIDENCE_MIN = 0.9

# Display names of the diameter classes of pipeline.flow.DIAMETER_CLASSES,
# plus the column of all perfused segments.
_ALL = "all"
# Shaded bands of the published ranges: light colours that the box outlines
# and the points keep their contrast on; one per range, in PLAUSIBLE order.
_BAND_COLOURS = (OKABE_ITO[2], OKABE_ITO[5], OKABE_ITO[7], OKABE_ITO[4])
_BAND_ALPHA = 0.2


def _flow_cfg(data):
    """The run's flow config, with the schema defaults for keys older results lack."""
    from ..config import default_config

    cfg = default_config()["flow"]
    cfg.update((data.run.get("config") or {}).get("flow") or {})
    return cfg


def diameter_class(diameter_um, *, capillary_max_um=8.0, small_max_um=30.0):
    """Diameter class index of each segment, as the flow summary classes them.

    Parameters
    ----------
    diameter_um : (S,) array_like
        Segment diameters, µm.
    capillary_max_um, small_max_um : float, keyword-only
        Class bounds (``flow.capillary_max_diameter_um``,
        ``flow.small_vessel_max_diameter_um``): capillary below the first,
        small up to and including the second, large above.

    Returns
    -------
    (S,) int ndarray
        0 capillary, 1 small, 2 large, in the order of
        :data:`pipeline.flow.DIAMETER_CLASSES`; -1 where the diameter is not
        finite.
    """
    d = np.asarray(diameter_um, dtype=float)
    cls = np.where(d < capillary_max_um, 0, np.where(d <= small_max_um, 1, 2))
    return np.where(np.isfinite(d), cls, -1)


def _unit(key):
    """Unit of a summary key from its unit suffix, a diameter class name after it allowed."""
    from ..flow import DIAMETER_CLASSES

    base = key
    for name in DIAMETER_CLASSES:
        if key.endswith("_" + name):
            base = key[: -len(name) - 1]
    for suf, unit in _SUFFIXES:
        if base.endswith(suf):
            return unit
    return ""


def _what(what):
    """A PLAUSIBLE entry's name without a unit in brackets at its end (the report writes units itself)."""
    return re.sub(r"\s*\([^()]*\)\s*$", "", what)


def _plausible_target(key):
    """(quantity, class) of a PLAUSIBLE key: quantity 'velocity' or 'wss' (None otherwise), class or 'all'."""
    from ..flow import DIAMETER_CLASSES

    quantity = "velocity" if key.startswith("velocity") else "wss" if key.startswith("wss") else None
    cls = next((n for n in DIAMETER_CLASSES if key.endswith("_" + n)), _ALL)
    return quantity, cls


def plausibility_checks(summary):
    """Each published range of :data:`pipeline.flow.PLAUSIBLE` against the sample's summary.

    Whether a value is outside its range is decided by
    :func:`pipeline.flow.plausibility_warnings` itself, so the report and the
    run's warnings never disagree.

    Parameters
    ----------
    summary : mapping
        The sample's ``summary.json``.

    Returns
    -------
    list of dict
        One per range, in :data:`~pipeline.flow.PLAUSIBLE` order: ``key``,
        ``what``, ``value`` (float or None), ``low``, ``high``, ``unit``,
        ``verdict`` ('within', 'above', 'below' or 'no value'), ``source``.
    """
    from ..flow import PLAUSIBLE, plausibility_warnings

    rows = []
    for key, lo, hi, what, source in PLAUSIBLE:
        v = _num(summary.get(key))
        if not math.isfinite(v):
            verdict = "no value"
        elif plausibility_warnings({key: v}):
            verdict = "above" if v > hi else "below"
        else:
            verdict = "within"
        rows.append(dict(key=key, what=_what(what), value=v if math.isfinite(v) else None, low=lo, high=hi,
                         unit=_unit(key), verdict=verdict, source=source))
    return rows


def plausibility_messages(summary):
    """The flow plausibility warnings of a sample in plain sentences.

    Parameters
    ----------
    summary : mapping
        The sample's ``summary.json``.

    Returns
    -------
    list of str
        One sentence per warning of :func:`pipeline.flow.plausibility_warnings`:
        less than half of the vessel length perfused, then each checked
        statistic outside its published range. Empty when there is none.
    """
    from ..flow import plausibility_warnings

    out = []
    frac = _num(summary.get("perfused_length_fraction"))
    if math.isfinite(frac) and plausibility_warnings({"perfused_length_fraction": frac}):
        out.append(f"Only {100 * frac:.0f} % of the vessel length carries flow in the model (the rest is "
                   "unsolved, sealed or in dead ends), so the speed and shear statistics describe less than half "
                   "of the network.")
    for c in plausibility_checks(summary):
        if c["verdict"] in ("above", "below"):
            u = f" {c['unit']}" if c["unit"] else ""
            out.append(f"{c['what'][0].upper()}{c['what'][1:]}: {c['value']:.3g}{u} in the model, {c['verdict']} "
                       f"the published range {c['low']:g}–{c['high']:g}{u}. Source: {c['source']}. Check the "
                       "boundary conditions and the radii before relying on the flows.")
    return out


def flow_uncertainty(segments, *, confidence_min=DIRECTION_CONFIDENCE_MIN):
    """Summary of the per-segment flow intervals of the flow ensemble.

    Parameters
    ----------
    segments : DataFrame, shape (S, ...)
        ``segments.csv``: ``perfused``, ``flow_nl_min``, ``flow_p05_nl_min``,
        ``flow_p95_nl_min``, ``direction_confidence`` (absent columns read as
        NaN: no ensemble).
    confidence_min : float, keyword-only
        Direction confidence from which a direction counts as settled.

    Returns
    -------
    dict
        ``n_perfused``; ``n_ensemble`` (perfused segments with a finite
        direction confidence); ``n_confident`` and ``confident_fraction``
        (of those, direction confidence >= ``confidence_min``; the fraction
        NaN without any); ``n_width`` (perfused segments with a finite
        interval and a non-zero flow); ``relative_width_median`` and
        ``relative_width_p90``, the median and 90th percentile of
        ``(p95 - p05) / |flow|`` (dimensionless, NaN without any);
        ``n_interval_includes_zero`` (perfused segments whose 5-95 %
        interval reaches zero or the opposite direction).
    """
    perf = _bool_col(segments, "perfused")
    q, lo, hi = (_col(segments, c) for c in ("flow_nl_min", "flow_p05_nl_min", "flow_p95_nl_min"))
    conf = _col(segments, "direction_confidence")
    has_conf = perf & np.isfinite(conf)
    n_conf = int((conf[has_conf] >= confidence_min).sum())
    w_ok = perf & np.isfinite(q) & np.isfinite(lo) & np.isfinite(hi) & (q != 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        rel = (hi - lo)[w_ok] / np.abs(q[w_ok])
    return {
        "n_perfused": int(perf.sum()),
        "n_ensemble": int(has_conf.sum()),
        "n_confident": n_conf,
        "confident_fraction": n_conf / has_conf.sum() if has_conf.any() else float("nan"),
        "n_width": int(w_ok.sum()),
        "relative_width_median": float(np.median(rel)) if len(rel) else float("nan"),
        "relative_width_p90": float(np.percentile(rel, 90)) if len(rel) else float("nan"),
        "n_interval_includes_zero": int((w_ok & (lo <= 0) & (hi >= 0)).sum()),
    }


def _class_columns(data):
    """Perfused segments per plot column: the diameter classes, then all; with the class bounds."""
    from ..flow import DIAMETER_CLASSES

    cfg = _flow_cfg(data)
    cap, small = float(cfg["capillary_max_diameter_um"]), float(cfg["small_vessel_max_diameter_um"])
    perf = _bool_col(data.segments, "perfused")
    cls = diameter_class(2 * _col(data.segments, "radius_um"), capillary_max_um=cap, small_max_um=small)
    names = list(DIAMETER_CLASSES) + [_ALL]
    sel = [perf & (cls == k) for k in range(len(DIAMETER_CLASSES))] + [perf]
    bounds = {DIAMETER_CLASSES[0]: f"< {cap:g} µm", DIAMETER_CLASSES[1]: f"{cap:g}–{small:g} µm",
              DIAMETER_CLASSES[2]: f"> {small:g} µm", _ALL: "perfused"}
    return names, sel, bounds


def _class_panel(ax, data, quantity, column, ylabel, summary):
    """Box and points per diameter class for one quantity, published ranges shaded; returns legend handles."""
    from matplotlib.patches import Patch

    from ..flow import PLAUSIBLE, plausibility_warnings

    names, sel, bounds = _class_columns(data)
    v = _col(data.segments, column)
    vals = [v[s & np.isfinite(v) & (v > 0)] for s in sel]
    pos = np.arange(len(names))
    colours = [OKABE_ITO[0], OKABE_ITO[1], OKABE_ITO[3], "#555555"]
    rng = np.random.default_rng(0)  # fixed jitter: the same figure every run
    for p, d, c, n in zip(pos, vals, colours, names):
        if len(d):
            ax.boxplot([d], positions=[p], widths=0.55, showfliers=False, medianprops=dict(color="k", lw=1.5),
                       boxprops=dict(color="#555555"), whiskerprops=dict(color="#555555"),
                       capprops=dict(color="#555555"))
            ax.scatter(p + rng.uniform(-0.14, 0.14, len(d)), d, s=10, color=c, alpha=0.6, lw=0, zorder=3,
                       gid=f"{quantity}-{n}")
        else:
            ax.text(p, 0.5, "no perfused\nsegments", ha="center", va="center", fontsize=8, color="#555555",
                    transform=ax.get_xaxis_transform())
    # Each range keeps its colour (its place in PLAUSIBLE) across both panels.
    ranges = [(i, k, lo, hi, _what(what)) for i, (k, lo, hi, what, _) in enumerate(PLAUSIBLE)
              if _plausible_target(k)[0] == quantity]
    # Axis limits from the segments and the finite, positive ends of the
    # ranges drawn: a range's lower end of 0 must not pull a log axis down.
    ends = [e for _, _, lo, hi, _ in ranges for e in (lo, hi) if math.isfinite(e) and e > 0]
    # The checked values too, so that a value far outside its range is drawn where it is.
    ends += [v for v in (_num(summary.get(k)) for _, k, _, _, _ in ranges) if math.isfinite(v) and v > 0]
    ends = np.array(ends, float)
    allv = np.concatenate(vals + [ends])
    handles = []
    if not len(np.concatenate(vals)):
        _no_data(ax, "no perfused segments")
        allv = ends if len(ends) else np.array([1.0])
    log = allv.max() > 10 * allv.min()
    ymin, ymax = (allv.min() / 1.6, allv.max() * 1.6) if log else (0.0, allv.max() * 1.12)
    for i, key, lo, hi, what in ranges:
        cls = _plausible_target(key)[1]
        # A range over all segments spans the panel; a class's spans its column.
        x0, x1 = (-0.5, pos[-1] + 0.5) if cls == _ALL else (names.index(cls) - 0.45, names.index(cls) + 0.45)
        colour = _BAND_COLOURS[i % len(_BAND_COLOURS)]
        unit = _unit(key)
        ax.fill_between([x0, x1], max(lo, ymin), min(hi, ymax), color=colour, alpha=_BAND_ALPHA, lw=0, zorder=0,
                        gid=f"band-{key}")
        handles.append(Patch(color=colour, alpha=_BAND_ALPHA + 0.15,
                             label=f"published range, {what}: {lo:g}–{hi:g} {unit}"))
        val = _num(summary.get(key))
        if math.isfinite(val) and val > 0:
            inside = not plausibility_warnings({key: val})  # the flow step's own rule
            xm = names.index(cls)
            ax.plot([xm], [val], ls="none", marker="D", ms=7, mec="k",
                    mfc="white" if inside else OKABE_ITO[3], zorder=5, gid=f"value-{key}")
            handles.append(Line2D([], [], ls="none", marker="D", ms=7, mec="k",
                                  mfc="white" if inside else OKABE_ITO[3],
                                  label=f"model {what}: {val:.3g} {unit}" + ("" if inside else " (outside)")))
    ax.set_xlim(-0.5, pos[-1] + 0.5)
    ax.set_ylim(ymin, ymax)
    if log:
        _log_axes(ax, y=[ymin, ymax])
    ax.set_xticks(pos)
    ax.set_xticklabels([f"{n}\n{bounds[n]}\nn = {len(d)}" for n, d in zip(names, vals)], fontsize=8)
    ax.set_xlabel("diameter class (µm)")
    ax.set_ylabel(ylabel + (", log scale)" if log else ")"))
    return handles


def figure_flow_plausibility(data, notes):
    """Mean speed and wall shear stress per diameter class against published ranges.

    Parameters
    ----------
    data : SampleData
    notes : list of str
        Unused; the common figure signature.

    Returns
    -------
    Figure
        Two panels, mean speed (mm/s) and wall shear stress (Pa) of the
        perfused segments by diameter class and overall (boxes and points),
        the ranges of :data:`pipeline.flow.PLAUSIBLE` shaded (gid
        ``band-KEY``) and the summary value each range checks marked (gid
        ``value-KEY``).
    """
    fig = _new_figure(11.0, 5.4)
    a1, a2 = fig.subplots(1, 2)
    h = _class_panel(a1, data, "velocity", "velocity_mm_s", "mean speed (mm/s", data.summary)
    h += _class_panel(a2, data, "wss", "wss_pa", "wall shear stress (Pa", data.summary)
    a1.set_title("Mean speed |Q| / (πr²) (model estimate)", fontsize=10)
    a2.set_title("Wall shear stress 4μ|Q| / (πr³) (model estimate)", fontsize=10)
    if h:
        fig.legend(handles=h, fontsize=7, loc="outside lower center", ncols=2)
    return fig


def _caption_plausibility(data):
    from ..flow import PLAUSIBLE

    cfg = _flow_cfg(data)
    srcs = "; ".join(f"{_what(what)}, {lo:g}–{hi:g} {_unit(k)}: {src}" for k, lo, hi, what, src in PLAUSIBLE)
    return ("Perfused segments by diameter 2r: capillary below "
            f"{cfg['capillary_max_diameter_um']:g} µm, small up to {cfg['small_vessel_max_diameter_um']:g} µm, "
            "large above (flow.capillary_max_diameter_um, flow.small_vessel_max_diameter_um), and all together. "
            "Boxes: median and quartiles, whiskers to 1.5 interquartile ranges; points: segments. Shaded: the "
            "published physiological range of each statistic the flow step checks, over the class it concerns; "
            "diamonds: the model's value of that statistic (filled: outside the range). Ranges and sources: "
            f"{srcs}.")


def figure_flow_intervals(data, notes):
    """Each perfused segment's flow estimate against its ensemble interval.

    Parameters
    ----------
    data : SampleData
    notes : list of str
        Receives a remark when no segment has an interval.

    Returns
    -------
    Figure
        |flow| (x, log) against the 5th-95th percentile of the ensemble's
        flows in the estimate's direction (vertical lines, gid
        ``intervals``; intervals reaching zero or the opposite direction run
        to the bottom of the axis and end in a triangle, gid ``to-zero``),
        the estimate on the identity line (gid ``identity``).
    """
    fig = _new_figure(9.0, 5.0)
    ax = fig.add_subplot()
    s = data.segments
    q, lo, hi = (_col(s, c) for c in ("flow_nl_min", "flow_p05_nl_min", "flow_p95_nl_min"))
    conf = _col(s, "direction_confidence")
    ok = _bool_col(s, "perfused") & np.isfinite(q) & np.isfinite(lo) & np.isfinite(hi) & (q != 0)
    if not ok.any():
        _no_data(ax, "no flow intervals (no ensemble)")
        notes.append("No segment has a flow interval (flow.ensemble_size 0, or nothing perfused).")
        ax.set_xlabel("|flow| estimate (nL/min)")
        ax.set_ylabel("flow, 5th–95th percentile (nL/min)")
        return fig
    sign = np.sign(q[ok])
    a = np.abs(q[ok])
    # In the estimate's direction, so a positive interval is one that keeps it.
    b0, b1 = np.minimum(sign * lo[ok], sign * hi[ok]), np.maximum(sign * lo[ok], sign * hi[ok])
    zero = b0 <= 0
    pos = np.concatenate([a, b0[~zero], b1[b1 > 0]])
    ymin, ymax = pos.min() / 2.0, pos.max() * 2.0
    xmin, xmax = a.min() / 1.6, a.max() * 1.6
    settled = np.nan_to_num(conf[ok], nan=0.0) >= DIRECTION_CONFIDENCE_MIN
    colours = np.where(settled[:, None], np.array([to_rgba(OKABE_ITO[0], 0.7)]),
                       np.array([to_rgba(OKABE_ITO[3], 0.9)]))
    segs = np.stack([np.c_[a, np.where(zero, ymin, b0)], np.c_[a, np.clip(b1, ymin, None)]], axis=1)
    ax.add_collection(LineCollection(segs, colors=colours, linewidths=1.4, zorder=3, gid="intervals"))
    ax.plot([min(xmin, ymin), max(xmax, ymax)], [min(xmin, ymin), max(xmax, ymax)], color="#777777", lw=0.8,
            ls="--", zorder=1, gid="identity", label="estimate (y = x)")
    ax.scatter(a, a, s=10, color="k", zorder=4, lw=0, label=f"segment estimate ({ok.sum()})")
    if zero.any():
        ax.scatter(a[zero], np.full(zero.sum(), ymin), marker="v", s=30, color=OKABE_ITO[3], zorder=5,
                   clip_on=False, gid="to-zero",
                   label=f"interval reaches zero or reverses ({zero.sum()})")
    ax.plot([], [], color=OKABE_ITO[0], lw=1.4,
            label=f"5–95 % interval, direction confidence ≥ {DIRECTION_CONFIDENCE_MIN:g} ({settled.sum()})")
    if (~settled).any():
        ax.plot([], [], color=OKABE_ITO[3], lw=1.4,
                label=f"5–95 % interval, direction confidence < {DIRECTION_CONFIDENCE_MIN:g} ({(~settled).sum()})")
    # The widest relative intervals are named, so they can be found in segments.csv.
    ids = _col(s, "segment_id")[ok]
    rel = (b1 - b0) / a
    for i in np.argsort(-rel, kind="stable")[: min(5, len(rel))]:
        if np.isfinite(ids[i]):
            ax.annotate(f"{int(ids[i])}", (a[i], max(b1[i], ymin)), xytext=(3, 3), textcoords="offset points",
                        fontsize=7, color="#333333")
    ax.set_xlim(xmin, xmax)
    ax.set_ylim(ymin, ymax)
    _log_axes(ax, x=[xmin, xmax], y=[ymin, ymax])
    ax.legend(fontsize=7, loc="upper left")
    ax.set_xlabel("|flow| estimate (nL/min, log scale)")
    ax.set_ylabel("flow 5–95 % interval, in the estimate's direction (nL/min, log scale)")
    ax.set_title("Flow estimates and their intervals; numbers: segment ids of the widest")
    return fig


def _caption_intervals(data):
    cfg = _flow_cfg(data)
    k, floor, spread = int(cfg["ensemble_size"]), float(cfg["radius_uncertainty_floor"]), float(cfg["target_spread"])
    estimated = cfg.get("boundary") == "estimate"
    text = (f"Each perfused segment: its flow estimate (dot on the dashed identity line) and the 5th–95th "
            f"percentile of its flow over an ensemble of {k} members (vertical line, in the estimate's direction; "
            "a line that reaches the bottom axis includes zero flow or the opposite direction). Each member "
            "scales every segment's radius by a lognormal factor of its measured radius uncertainty (the spread "
            "of its wall-fit radii over their number of independent fits, combined with a floor of "
            f"{100 * floor:g} % for the wall fit's systematic error)")
    if estimated:
        text += (f" and the target shear rate of the boundary estimate by a lognormal factor of log-sd {spread:g} "
                 "for the whole network times one of half that per segment (the spread of plausible boundary "
                 "conditions); each member is a first-order update of the estimate with its target flow directions "
                 "kept, so another choice of directions by the estimate is not in the interval")
    text += ("; viscosities stay at their converged values. Errors of the segmentation itself (missed or false "
             "vessels) and of the flow model are not in the interval.")
    return text
