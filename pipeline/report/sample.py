"""A sample folder read for the report, and its figures.

In: a result folder (and optionally its mask, for the projection map). Out: :class:`SampleData`
(:func:`load_sample`) and matplotlib figures: maps, distributions, radius by level, the Murray
plot, junction exponents, shear and flow against size (:func:`sample_figures` builds them all).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.collections import LineCollection
from matplotlib.colors import LogNorm, Normalize
from matplotlib.lines import Line2D

from ..errors import InputError
from ._common import (
    FLOW_FIGURES, OKABE_ITO, SAMPLE_FIGURES, _FLAG_COLOUR, _MASK_GREY, _MAX_NUMBERED, _bool_col, _col,
    _level_colours, _log_axes, _new_figure, _no_data, _text_col,
)
from .plausibility import _caption_intervals, _caption_plausibility, figure_flow_intervals, figure_flow_plausibility


# --------------------------------------------------------------------------- sample figures


@dataclass
class SampleData:
    """What the sample figures need, read once."""

    name: str
    segments: pd.DataFrame
    nodes: pd.DataFrame
    bifurcations: pd.DataFrame
    levels: pd.DataFrame
    summary: dict
    run: dict
    centrelines: list
    mip: np.ndarray | None = None
    notes: list = field(default_factory=list)
    orders: pd.DataFrame = field(default_factory=pd.DataFrame)

    @property
    def spacing(self):
        return tuple(float(s) for s in self.run.get("spacing_um", (1.0, 1.0, 1.0)))

    @property
    def has_flow(self):
        return bool(np.isfinite(_col(self.segments, "flow_nl_min")).any())


def load_sample(outdir, *, mask=None, read_mip=True):
    """Read a result folder (and its mask, for the projection) for the figures.

    Parameters
    ----------
    outdir : str or Path
        A result folder written by ``analyze``.
    mask : str or Path, optional
        Mask file; default the input recorded in ``run.json``.
    read_mip : bool
        Read the mask and project it; False draws maps from centrelines only.

    Returns
    -------
    SampleData
    """
    from ..tables import load_result

    out = Path(outdir)

    res = load_result(out)
    data = SampleData(name=out.name, segments=res.segments, nodes=res.nodes, bifurcations=res.bifurcations,
                       levels=res.levels, summary=res.summary, run=res.run, centrelines=res.centrelines,
                       orders=res.orders)
    if read_mip:
        data.mip = _read_mip(data, res, mask)
    return data


def _read_mip(data, result, mask):
    """Maximum-intensity projection of the mask along z, or None with a note."""
    from ..tables import read_result_projection

    explicit = mask is not None
    try:
        mip, notes = read_result_projection(result, mask)
    except InputError as exc:
        if explicit:
            raise  # the caller's own mask_path: its error names it
        data.notes.append(f"The mask recorded in run.json could not be used ({exc}), so the maps show the "
                          "centrelines alone.")
        return None
    if mip is None:
        data.notes.append(f"{notes[0][0].upper()}{notes[0][1:]}, so the maps show the centrelines alone, without "
                          "the mask projection.")
        return None
    data.notes.extend(f"{n[0].upper()}{n[1:]}; its projection is shown as found." for n in notes)
    return mip


def _map_axes(ax, data):
    """Draw the mask projection (if any) and set µm axes with y down, as in the image."""
    dz, dy, dx = data.spacing
    if data.mip is not None:
        ny, nx = data.mip.shape
        ax.imshow(data.mip, cmap=_MASK_GREY, vmin=0, vmax=1, interpolation="nearest", origin="upper",
                  extent=(-dx / 2, (nx - 0.5) * dx, (ny - 0.5) * dy, -dy / 2))
    else:
        pts = np.vstack(data.centrelines) if data.centrelines else np.zeros((0, 3))
        shape = data.run.get("shape")
        if shape is not None:
            ax.set_xlim(-dx / 2, (shape[2] - 0.5) * dx)
            ax.set_ylim((shape[1] - 0.5) * dy, -dy / 2)
        elif len(pts):
            ax.set_xlim(pts[:, 2].min() - 5, pts[:, 2].max() + 5)
            ax.set_ylim(pts[:, 1].max() + 5, pts[:, 1].min() - 5)
    ax.set_aspect("equal")
    ax.set_xlabel("x (µm)")
    ax.set_ylabel("y (µm)")


def _centreline_collection(data, colours=None, **kw):
    lines = [c[:, [2, 1]] for c in data.centrelines]
    r = _col(data.segments, "radius_um")
    rmax = np.nanmax(r) if np.isfinite(r).any() else 1.0
    # Width follows radius so the trunk reads as a trunk; clipped so the
    # thinnest capillaries stay visible.
    widths = 0.6 + 2.4 * np.clip(np.nan_to_num(r / rmax), 0, 1)
    if colours is not None:
        kw["colors"] = colours
    return LineCollection(lines, linewidths=widths, capstyle="round", **kw)


def _flag_overlay(ax, data, numbered_note):
    """Circle (and number) the review queue's most severe junctions; returns how many are circled."""
    b = data.bifurcations
    if b.empty or "flagged" not in b.columns:
        return 0
    fl = b[_bool_col(b, "flagged")]
    if fl.empty:
        return 0
    if "severity" in fl.columns:
        fl = fl.sort_values("severity", ascending=False, kind="stable", na_position="last")
    # The queue, not every junction, and at most _MAX_NUMBERED of it: more
    # circles than that bury the network they are meant to point into.
    shown = fl.head(_MAX_NUMBERED)
    ax.scatter(shown["x_um"], shown["y_um"], s=140, facecolors="none", edgecolors=_FLAG_COLOUR, linewidths=1.3,
               zorder=5, label=f"flagged bifurcation ({len(shown)})", gid="flagged-circles")
    for _, r in shown.iterrows():
        ax.annotate(str(int(r["node_id"])), (r["x_um"], r["y_um"]), xytext=(5, 5), textcoords="offset points",
                    fontsize=7, color=_FLAG_COLOUR, zorder=6,
                    bbox=dict(boxstyle="round,pad=0.1", fc="white", ec="none", alpha=0.8))
    if len(fl) > len(shown):
        numbered_note.append(f"The maps circle the {len(shown)} most severe of the {len(fl)} flagged bifurcations; "
                             "the bifurcation table and bifurcations.csv list them all.")
    return len(shown)


# Colour limits of the maps: these percentiles of the perfused segments'
# values (a few stagnant or extreme segments would stretch the scale over
# decades where nothing else lies); values beyond them take the end colours.
_COLOUR_PERCENTILES = (2.0, 98.0)
# The log axes of the scatter plots reach at most this many decades below
# the median; values below are drawn on the axis's floor and counted.
_FLOOR_DECADES = 4.0
_MIN_SLOPE_POINTS = 20


def _perfused(data):
    """(S,) bool: segments the flow model perfuses (all, for a result from before the column)."""
    if "perfused" in data.segments.columns:
        return _bool_col(data.segments, "perfused")
    return np.ones(len(data.segments), dtype=bool)


def _robust_range(v):
    """Colour limits of positive values: their 2nd and 98th percentiles (min and max when those meet)."""
    lo, hi = np.percentile(v, _COLOUR_PERCENTILES)
    if not hi > lo:
        lo, hi = float(np.min(v)), float(np.max(v))
    if not hi > lo:
        lo, hi = lo / 2, hi * 2
    return float(lo), float(hi)


def _floored(ax, x, y):
    """``y`` with values far below the median raised to a floor, those drawn there as triangles and counted."""
    floor = 10 ** (np.log10(np.median(y)) - _FLOOR_DECADES)
    low = y < floor
    if low.any():
        ax.scatter(x[low], np.full(low.sum(), floor), s=22, marker="v", color="#555555", lw=0, zorder=4,
                   label=f"below {floor:.2g} ({int(low.sum())}), drawn at the axis floor")
    return np.where(low, floor, y)


def figure_map_level(data, notes):
    """Projection map with centrelines coloured by branching level."""
    fig = _new_figure(7.2, 6.4)
    ax = fig.add_subplot()
    _map_axes(ax, data)
    colours, handles, seq = _level_colours(_col(data.segments, "level"))
    ax.add_collection(_centreline_collection(data, colours, zorder=3, gid="centrelines"))
    n = _flag_overlay(ax, data, notes)
    if n:
        total = int(_bool_col(data.bifurcations, "flagged").sum())
        which = f"the {n} most severe of {total} flagged" if total > n else f"flagged bifurcation ({n})"
        handles = handles + [Line2D([], [], ls="none", marker="o", mfc="none", mec=_FLAG_COLOUR, ms=9,
                                    label=f"{which}, numbered by node id")]
    if seq is not None:
        cmap, norm = seq
        from matplotlib.cm import ScalarMappable

        cb = fig.colorbar(ScalarMappable(norm=norm, cmap=cmap), ax=ax, shrink=0.8)
        lv = np.arange(int(norm.boundaries[0] + 0.5), int(norm.boundaries[-1] + 0.5))
        cb.set_ticks(lv[:: max(1, len(lv) // 12)])
        cb.set_label("branching level (generations from the root)")
    if handles:
        # Outside the axes: inside, the legend hides part of the network.
        fig.legend(handles=handles, fontsize=7, loc="outside lower center", ncols=min(4, len(handles)))
    ax.set_title("Centrelines by branching level" + ("" if data.mip is not None else " (no mask found)"))
    return fig


def figure_map_wss(data, notes):
    """Projection map with centrelines coloured by wall shear stress."""
    fig = _new_figure(7.2, 6.4)
    ax = fig.add_subplot()
    _map_axes(ax, data)
    wss = _col(data.segments, "wss_pa")
    good = np.isfinite(wss) & (wss > 0) & _perfused(data)
    if good.any():
        lo, hi = _robust_range(wss[good])
        # A log scale when the range spans more than a decade, else the
        # colour steps would all sit at one end.
        norm = LogNorm(lo, hi) if hi > 10 * lo else Normalize(lo, hi)
        grey = _centreline_collection(data, "#9a9a9a", linestyles="dotted", zorder=2)
        grey.set_visible(not good.all())
        ax.add_collection(grey)
        lc = _centreline_collection(data, cmap="viridis", norm=norm, zorder=3, gid="centrelines")
        arr = np.where(good, np.clip(wss, lo, hi), np.nan)
        lc.set_array(np.ma.masked_invalid(arr))
        ax.add_collection(lc)
        clipped = (wss[good] < lo).any(), (wss[good] > hi).any()
        extend = {(True, True): "both", (True, False): "min", (False, True): "max"}.get(clipped, "neither")
        cb = fig.colorbar(lc, ax=ax, shrink=0.8, extend=extend)
        cb.set_label("wall shear stress (Pa)")
    else:
        _no_data(ax, "no wall shear stress (flow model not run)")
    _flag_overlay(ax, data, [])
    ax.set_title("Centrelines by wall shear stress (model estimate)")
    return fig


def figure_distributions(data, notes):
    """Histograms of segment radius and segment length."""
    fig = _new_figure(9.0, 3.8)
    a1, a2 = fig.subplots(1, 2)
    for ax, col, lab, colour in ((a1, "radius_um", "segment radius (µm)", OKABE_ITO[0]),
                                 (a2, "length_um", "segment length (µm)", OKABE_ITO[1])):
        v = _col(data.segments, col)
        v = v[np.isfinite(v)]
        if len(v):
            ax.hist(v, bins=min(40, max(5, int(np.sqrt(len(v)) * 2))), color=colour, edgecolor="white")
            med = float(np.median(v))
            ax.axvline(med, color="k", ls="--", lw=1, label=f"median {med:.3g} µm")
            ax.legend(fontsize=8)
        else:
            _no_data(ax, "no segments")
        ax.set_xlabel(lab)
        ax.set_ylabel("segments (count)")
    a1.set_title("Radius")
    a2.set_title("Length")
    return fig


def figure_radius_by_level(data, notes):
    """Segment radius per branching level on a log axis, with the level ratios."""
    fig = _new_figure(7.0, 4.8)
    ax = fig.add_subplot()
    lev, r = _col(data.segments, "level"), _col(data.segments, "radius_um")
    ok = np.isfinite(lev) & np.isfinite(r) & (r > 0)
    if not ok.any():
        _no_data(ax, "no branching levels")
    else:
        rng = np.random.default_rng(0)  # fixed jitter: the same figure every run
        jitter = rng.uniform(-0.18, 0.18, ok.sum())
        ax.scatter(lev[ok] + jitter, r[ok], s=12, color=OKABE_ITO[0], alpha=0.6, lw=0, label="segment",
                   gid="segments")
        L = data.levels
        if not L.empty and "level" in L.columns:
            lv, mean = _col(L, "level"), _col(L, "radius_mean_um")
            ax.scatter(lv, mean, marker="_", s=500, color="k", lw=2, zorder=4, label="level mean")
            ratio = _col(L, "radius_ratio")
            top = np.nanmax(r[ok]) * 1.25
            for i in range(len(L)):
                if np.isfinite(ratio[i]) and np.isfinite(lv[i]):
                    ax.text(lv[i] - 0.5, top, f"×{ratio[i]:.2f}", ha="center", va="bottom", fontsize=8)
            ax.set_ylim(np.nanmin(r[ok]) / 1.3, top * 1.35)
        _log_axes(ax, y=[np.nanmin(r[ok]) / 1.3, top * 1.35] if not L.empty else r[ok])
        ax.set_xticks(np.unique(lev[ok]).astype(int))
        ax.legend(fontsize=8, loc="lower left")
    ax.set_xlabel("branching level (generations from the root)")
    ax.set_ylabel("segment radius (µm, log scale)")
    ax.set_title("Radius by level; ×: mean radius ratio to the level before")
    return fig


def _murray_xy(b):
    r0, r1, r2 = _col(b, "radius_parent_um"), _col(b, "radius_daughter1_um"), _col(b, "radius_daughter2_um")
    x, y = r0 ** 3, r1 ** 3 + r2 ** 3
    ok = np.isfinite(x) & np.isfinite(y) & (x > 0) & (y > 0)
    return x, y, ok


def figure_murray(data, notes):
    """Murray plot: r0³ against r1³ + r2³ with the identity line; flagged junctions marked."""
    fig = _new_figure(6.0, 5.6)
    ax = fig.add_subplot()
    b = data.bifurcations
    x, y, ok = _murray_xy(b) if not b.empty else (np.zeros(0), np.zeros(0), np.zeros(0, bool))
    if not ok.any():
        _no_data(ax, "no bifurcations")
    else:
        flag = _bool_col(b, "flagged")
        lo, hi = min(x[ok].min(), y[ok].min()) / 1.5, max(x[ok].max(), y[ok].max()) * 1.5
        ax.plot([lo, hi], [lo, hi], color="k", lw=1, label="identity: r0³ = r1³ + r2³ (Murray 1926)",
                gid="identity")
        cfg = (data.run.get("config") or {}).get("bifurcations", {})
        rmin, rmax = cfg.get("ratio_min"), cfg.get("ratio_max")
        if rmin and rmax:
            ax.plot([lo, hi], [lo * rmax, hi * rmax], color="k", lw=0.8, ls="--",
                    label=f"flag limits: ratio {rmin:g} and {rmax:g}")
            ax.plot([lo, hi], [lo * rmin, hi * rmin], color="k", lw=0.8, ls="--")
        m = ok & ~flag
        ax.scatter(x[m], y[m], s=22, color=OKABE_ITO[0], alpha=0.8, lw=0, label=f"not flagged ({m.sum()})",
                   gid="not-flagged")
        # Flagged for the ratio (outside the dashed limits, beyond its
        # uncertainty) apart from flagged for something else (exponent,
        # angle, more than two daughters), which may well lie inside them.
        by_ratio = _text_col(b, "flag_reasons").str.contains(r"(?:^|;)ratio_(?:high|low)(?:;|$)").to_numpy()
        m = ok & flag & by_ratio
        ax.scatter(x[m], y[m], s=40, marker="X", color=OKABE_ITO[3], lw=0, label=f"flagged: ratio ({m.sum()})",
                   gid="flagged")
        m = ok & flag & ~by_ratio
        ax.scatter(x[m], y[m], s=34, marker="o", facecolors="none", edgecolors=OKABE_ITO[3], lw=1.2,
                   label=f"flagged: exponent, angle or more daughters ({m.sum()})", gid="flagged-other")
        _log_axes(ax, x=[lo, hi], y=[lo, hi])
        ax.set_xlim(lo, hi)
        ax.set_ylim(lo, hi)
        ax.set_aspect("equal")
        ax.legend(fontsize=8, loc="upper left")
        if (~ok).sum():
            notes.append(f"{int((~ok).sum())} junction(s) without three measured radii are left out of the "
                         "Murray plot.")
    ax.set_xlabel("parent radius cubed r0³ (µm³)")
    ax.set_ylabel("sum of daughter radii cubed r1³ + r2³ (µm³)")
    ax.set_title("Murray plot")
    return fig


def figure_exponents(data, notes):
    """Distribution of junction exponents x (r0^x = r1^x + r2^x), with 2 and 3 marked."""
    fig = _new_figure(6.4, 4.4)
    ax = fig.add_subplot()
    e = _col(data.bifurcations, "murray_exponent") if not data.bifurcations.empty else np.zeros(0)
    fin = e[np.isfinite(e)]
    undefined = int(len(e) - len(fin))
    lo, hi = 0.0, 8.0
    if len(fin):
        # Near-equal radii give exponents in the tens; they pile up in the
        # end bins instead of stretching the axis.
        clipped = np.clip(fin, lo + 1e-9, hi - 1e-9)
        ax.hist(clipped, bins=np.arange(lo, hi + 0.25, 0.25), color=OKABE_ITO[5], edgecolor="white")
        beyond = int(((fin <= lo) | (fin >= hi)).sum())
        if beyond:
            notes.append(f"{beyond} junction exponent(s) outside [{lo:g}, {hi:g}] are shown in the end bins.")
        med = float(np.median(fin))
        ax.axvline(med, color="k", lw=1, ls=":", label=f"median {med:.2f}")
    else:
        _no_data(ax, "no defined junction exponents")
    ax.axvline(2.0, color=OKABE_ITO[1], lw=2, label="2: area-preserving", gid="x2")
    ax.axvline(3.0, color=OKABE_ITO[3], lw=2, label="3: Murray's cube law", gid="x3")
    ax.set_xlim(lo, hi)
    ax.legend(fontsize=8)
    ax.set_xlabel("junction exponent x, r0^x = r1^x + r2^x (dimensionless)")
    ax.set_ylabel("bifurcations (count)")
    ax.set_title(f"Junction exponents ({len(fin)} defined, {undefined} undefined)")
    return fig


def figure_wss_diameter(data, notes):
    """Wall shear stress against vessel diameter, perfused segments."""
    fig = _new_figure(6.4, 4.6)
    ax = fig.add_subplot()
    d, w = 2 * _col(data.segments, "radius_um"), _col(data.segments, "wss_pa")
    ok = np.isfinite(d) & np.isfinite(w) & (w > 0) & (d > 0) & _perfused(data)
    if not ok.any():
        _no_data(ax, "no wall shear stress (flow model not run)")
    else:
        y = _floored(ax, d[ok], w[ok])
        ax.scatter(d[ok], y, s=14, color=OKABE_ITO[2], alpha=0.7, lw=0, label=f"perfused segment ({ok.sum()})")
        if y.max() > 10 * y.min():
            _log_axes(ax, y=y)
        ax.legend(fontsize=8)
    ax.set_xlabel("diameter 2r (µm)")
    ax.set_ylabel("wall shear stress (Pa)")
    ax.set_title("Wall shear stress against diameter (model estimate)")
    return fig


def figure_flow_radius(data, notes):
    """|flow| against radius on log-log axes with a slope-3 guide (Q ∝ r³)."""
    fig = _new_figure(6.4, 4.8)
    ax = fig.add_subplot()
    r, q = _col(data.segments, "radius_um"), np.abs(_col(data.segments, "flow_nl_min"))
    ok = np.isfinite(r) & np.isfinite(q) & (r > 0) & (q > 0) & _perfused(data)
    if not ok.any():
        _no_data(ax, "no flows (flow model not run)")
    else:
        lr, lq = np.log10(r[ok]), np.log10(q[ok])
        y = _floored(ax, r[ok], q[ok])
        ax.scatter(r[ok], y, s=14, color=OKABE_ITO[0], alpha=0.7, lw=0, label=f"perfused segment ({ok.sum()})")
        # The guide passes through the median point so it sits on the cloud.
        r_ref, q_ref = 10 ** np.median(lr), 10 ** np.median(lq)
        rg = np.array([r[ok].min(), r[ok].max()])
        ax.plot(rg, q_ref * (rg / r_ref) ** 3, color="k", lw=1.2, ls="--",
                label="slope 3: Q ∝ r³ (Murray 1926)", gid="slope3")
        # A slope says something only over enough segments and radii: at
        # least _MIN_SLOPE_POINTS and a factor of 1.5 between the radii.
        if ok.sum() >= _MIN_SLOPE_POINTS and lr.max() - lr.min() >= np.log10(1.5):
            slope = np.polyfit(lr, lq, 1)[0]
            ax.plot([], [], " ", label=f"least-squares slope {slope:.2f} ({ok.sum()} segments)")
        _log_axes(ax, x=r[ok], y=y)
        ax.legend(fontsize=8, loc="upper left")
    ax.set_xlabel("segment radius (µm, log scale)")
    ax.set_ylabel("|flow| (nL/min, log scale)")
    ax.set_title("Flow against radius (model estimate)")
    return fig


_SAMPLE_BUILDERS = {
    "map_level": (figure_map_level, "Map by branching level",
                  "Projection of the mask along z (grey) with centrelines coloured by branching level "
                  "(Okabe–Ito colours); line width follows radius. Circles: the review queue's most severe "
                  f"bifurcations (up to {_MAX_NUMBERED}), numbered by node id (the bifurcation table below)."),
    "map_wss": (figure_map_wss, "Map by wall shear stress",
                "The same projection with centrelines coloured by model wall shear stress (viridis) of the "
                "perfused segments; colour limits at their 2nd and 98th percentiles (values beyond take the end "
                "colours); dotted grey: segments without flow."),
    "distributions": (figure_distributions, "Radius and length", "Histograms over all segments."),
    "radius_by_level": (figure_radius_by_level, "Radius by branching level",
                        "Segment radii per level (log axis); bars: level means; ×: ratio of the mean radius "
                        "to that of the level before (levels.csv, radius_ratio). Under Murray's cube law a "
                        "symmetric split gives 2^(-1/3) ≈ 0.79."),
    "murray": (figure_murray, "Murray plot",
               "Each point is one junction: parent radius cubed against the sum of daughter radii cubed. "
               "On the identity line the cube law r0³ = r1³ + r2³ holds (Murray 1926); dashed: the flag "
               "limits of the Murray ratio."),
    "exponents": (figure_exponents, "Junction exponents",
                  "The exponent x solving r0^x = r1^x + r2^x at each junction. 2 preserves cross-sectional "
                  "area; 3 is Murray's cube law (minimum work)."),
    "wss_diameter": (figure_wss_diameter, "Wall shear stress against diameter",
                     "Model wall shear stress 4μQ/(πr³) per perfused segment. Under the cube law it is the "
                     "same in every vessel (Murray 1926)."),
    "flow_radius": (figure_flow_radius, "Flow against radius",
                    "Model flow per perfused segment on log-log axes. The dashed guide has slope 3: Murray's "
                    "law predicts Q ∝ r³."),
    # Captions that name the run's settings are built from the data.
    "flow_plausibility": (figure_flow_plausibility, "Speed and wall shear stress against published ranges",
                          _caption_plausibility),
    "flow_intervals": (figure_flow_intervals, "Flow intervals", _caption_intervals),
}


def sample_figures(data, notes):
    """Build the sample figures that the data supports.

    Parameters
    ----------
    data : SampleData
    notes : list of str
        Receives remarks for the report (left-out points, unnumbered flags).

    Returns
    -------
    dict of str -> (Figure, title, caption)
    """
    out = {}
    names = list(SAMPLE_FIGURES)
    if not data.has_flow:
        names = [n for n in names if n not in FLOW_FIGURES]
        notes.append("The flow model was not run (or solved nothing), so the flow figures are left out.")
    if data.bifurcations.empty:
        names = [n for n in names if n not in ("murray", "exponents")]
        notes.append("The network has no bifurcations, so the Murray figures are left out.")
    for n in names:
        fn, title, caption = _SAMPLE_BUILDERS[n]
        out[n] = (fn(data, notes), title, caption(data) if callable(caption) else caption)
    return out
