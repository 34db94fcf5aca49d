"""Figures and a self-contained HTML report over a result folder or a batch folder.

In: a folder written by vesselflow, read back and never changed apart from
the two report entries below:

- a **sample folder** (``run.json`` and ``segments.csv``, as ``analyze``
  writes it, read with :func:`pipeline.tables.load_result`), and optionally
  the mask it was made from (``run.json["input"]["path"]`` or ``mask=``),
  read with :func:`pipeline.reading.read_mask` for the projection map; an
  optional ``review.csv`` of review decisions is shown beside the flagged
  bifurcations (checked as ``summarize --apply-review`` checks it: an
  invalid one stops a sample report, and is a note in that sample's section
  of a study report);
- a **batch folder** (``cohort_summary.csv``, ``group_comparison.csv``,
  ``failures.csv``, ``batch.json`` and one sample folder per sample).

Out: ``report.html`` and ``figures/<name>.png`` + ``figures/<name>.svg`` in
that folder. The HTML is self-contained: figures are embedded as base64 PNG
``data:`` URIs, styles are inline, there is no script, and a
Content-Security-Policy in the page forbids loading anything else, so it
opens offline and can be mailed as one file. Everything is built in memory
first, then written into a temporary sibling folder and moved into place;
``report.html`` is moved last, so its presence marks a complete report.

Figures of a sample: a projection map of the mask along z with centrelines
coloured by branching level and one coloured by wall shear stress (flagged
bifurcations circled and numbered by node id), radius and length
distributions, radius by branching level with the ratios between levels, the
Murray plot of r0³ against r1³ + r2³ with the identity line, the junction
exponents with 2 and 3 marked, wall shear stress against diameter, and flow
against radius with a slope-3 guide (Q ∝ r³ under Murray's law; Murray CD
1926, PNAS 12:207). Figures of a study: box-and-point plots per group for
the science measures of :data:`pipeline.batch.SCIENCE_MEASURES` (titled by
their plain names and units), annotated with the comparison table's
Hodges-Lehmann shift and q-values, and the network Murray exponent with its
95 % interval per sample (``murray_exponent_network``, ``_ci_low``,
``_ci_high`` of each summary) and per group: the group's one-sample
Hodges-Lehmann estimate with its Wilcoxon signed-rank interval
(:func:`pipeline.batch.hodges_lehmann_one_sample`; exact coverage stated,
below 95 % for fewer than six samples). The bookkeeping columns
(``group_bookkeeping.csv``) are listed apart, untested. Results without the
network exponent (older versions) get a sentence saying so.

Flow sections of a sample (when flow was solved): **flow plausibility**,
the mean speed and wall shear stress of the perfused segments by diameter
class (``flow.capillary_max_diameter_um``,
``flow.small_vessel_max_diameter_um``) against the published ranges of
:data:`pipeline.flow.PLAUSIBLE` (shaded, sources in the caption), the
perfused length fraction, the class statistics of ``summary.json`` and the
warnings of :func:`pipeline.flow.plausibility_warnings` in plain sentences
(:func:`plausibility_messages`); **uncertainty**, the share of perfused
segments whose direction confidence is at least
:data:`DIRECTION_CONFIDENCE_MIN`, the relative width ``(p95 - p05) /
|flow|`` of the ensemble's flow intervals (:func:`flow_uncertainty`) and a
plot of every segment's flow against its interval. The bifurcation section
lists the flagged junctions from the most severe (``severity``) with their
``flow_pattern``, counts the uncertain ones by reason without listing them,
and shows the Murray medians per flow pattern where the summary has them.

Colours: continuous values use viridis or cividis, whose lightness rises
monotonically so they read in grey and by colour-blind readers; categories
(branching levels, groups) use the Okabe–Ito palette (Okabe M, Ito K (2002)
Color Universal Design (CUD): how to make figures and presentations that
are friendly to colorblind people). Rendering uses matplotlib
:class:`~matplotlib.figure.Figure` objects directly (no pyplot, no display).
"""

from __future__ import annotations

import base64
import datetime as _dt
import html
import io
import json
import math
import os
import re
import shutil
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd
from matplotlib.collections import LineCollection
from matplotlib.colors import BoundaryNorm, ListedColormap, LogNorm, Normalize, to_rgba
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from ._version import __version__
from .batch import FALLBACK_MEASURES, SCIENCE_MEASURES, add_densities, hodges_lehmann_one_sample, science_measures
from .errors import InputError, VesselflowError

__all__ = ["build_report", "load_sample", "SampleData", "sample_figures", "study_figures", "figure_map_level",
           "figure_map_wss", "figure_distributions", "figure_radius_by_level", "figure_murray", "figure_exponents",
           "figure_wss_diameter", "figure_flow_radius", "figure_flow_plausibility", "figure_flow_intervals",
           "figure_study_measure", "figure_network_exponent", "network_exponent_table", "diameter_class",
           "flow_uncertainty", "plausibility_checks",
           "plausibility_messages", "DIRECTION_CONFIDENCE_MIN", "OKABE_ITO", "SAMPLE_FIGURES", "FLOW_FIGURES",
           "STUDY_MEASURES"]

#: Okabe–Ito colour-blind-safe palette (Okabe & Ito 2002), reordered so the
#: colours that stand out most on a light grey background come first.
OKABE_ITO = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#000000", "#F0E442")

#: Figure names of a sample report, in page order.
SAMPLE_FIGURES = ("map_level", "map_wss", "distributions", "radius_by_level", "murray", "exponents",
                  "wss_diameter", "flow_radius", "flow_plausibility", "flow_intervals")
#: Sample figures that need solved flow.
FLOW_FIGURES = ("map_wss", "wss_diameter", "flow_radius", "flow_plausibility", "flow_intervals")
# Figures shown in a section of their own instead of the figure grid: name -> section id.
_SECTION_FIGURES = {"flow_plausibility": "plausibility", "flow_intervals": "uncertainty"}

#: Summary measures shown per group in a study report (those present are
#: used): the science measures the group comparison tests.
STUDY_MEASURES = tuple(m.name for m in SCIENCE_MEASURES)
#: Summary keys of the network Murray exponent and its 95 % interval.
NETWORK_EXPONENT_KEYS = ("murray_exponent_network", "murray_exponent_network_ci_low",
                         "murray_exponent_network_ci_high")

REPORT_NAME = "report.html"
FIGURE_DIR = "figures"

# Numbering every flagged junction on a dense capillary bed buries the map
# in digits; past this many they are circled only and the table lists them.
_MAX_NUMBERED = 60
# Projection maps: the mask is shown in light grey so that every palette
# colour (and the dark flag circles) keeps its contrast on top of it.
_MASK_GREY = ListedColormap(["#ffffff", "#d0d0d0"])
_FLAG_COLOUR = "#000000"
_DPI = 150
_LOW_Q = 0.05

_CAUTION = ("Research software. Flows, pressures and wall shear stresses in this report are model estimates "
            "from idealised physics (Poiseuille flow in rigid tubes, Kirchhoff's law) on a segmented image; "
            "they are not measurements and must not be used for clinical decisions. A flagged bifurcation is "
            "a question for review, not a verdict: many are segmentation artefacts.")

# Labels with units for summary measures; anything else is labelled from its
# name's unit suffix by _label().
_LABELS = {
    "total_length_mm": "total vessel length (mm)",
    "length_density_mm_per_mm3": "length density (mm/mm³)",
    "vessel_volume_fraction": "vessel volume fraction (dimensionless)",
    "junction_density_per_mm3": "junction density (per mm³)",
    "endpoint_density_per_mm3": "end-point density (per mm³)",
    "radius_median_um": "median segment radius (µm)",
    "radius_mean_um": "mean segment radius (µm)",
    "tortuosity_mean": "mean tortuosity, length/chord (dimensionless)",
    "murray_exponent_median": "median junction exponent (dimensionless)",
    "murray_ratio_median": "median Murray ratio (r1³+r2³)/r0³ (dimensionless)",
    "fraction_within_tolerance": "bifurcations within tolerance (fraction)",
    "bifurcations_flagged": "flagged bifurcations (count)",
    "total_inflow_nl_min": "total inflow (nL/min)",
    "perfused_length_fraction": "perfused length (fraction)",
}
_SCIENCE = {m.name: m for m in SCIENCE_MEASURES + tuple(FALLBACK_MEASURES.values())}
_SUFFIXES = (("_mm_per_mm3", "mm/mm³"), ("_per_mm3", "per mm³"), ("_pa_s_um3", "Pa·s/µm³"),
             ("_rad_per_um", "rad/µm"), ("_nl_min", "nL/min"), ("_mm3", "mm³"), ("_um2", "µm²"),
             ("_um3", "µm³"), ("_mm", "mm"), ("_um", "µm"), ("_pa", "Pa"), ("_mm_s", "mm/s"), ("_s", "s"),
             ("_deg", "°"), ("_fraction", "fraction"))


# --------------------------------------------------------------------------- entry point


def build_report(outdir, *, mask=None, overwrite=False) -> Path:
    """Build ``report.html`` and ``figures/`` for a sample or a batch folder.

    Parameters
    ----------
    outdir : str or Path
        A result folder written by ``vesselflow analyze`` (has ``run.json``
        and ``segments.csv``) or a batch folder (has ``cohort_summary.csv``).
    mask : str or Path, optional
        The mask file for the projection map of a sample; default: the input
        recorded in ``run.json``. When neither can be read the map is drawn
        from the centrelines alone and the report says so. Not accepted for a
        batch folder.
    overwrite : bool
        Replace an existing report (``report.html`` and ``figures/``).

    Returns
    -------
    Path
        The written ``report.html``.

    Raises
    ------
    InputError
        If ``outdir`` is not a sample or batch folder, is incomplete, already
        holds a report and ``overwrite`` is False, ``mask`` cannot be read, or
        a sample folder's ``review.csv`` is invalid
        (:func:`pipeline.review.check_review`). Nothing is written then.
    """
    out = Path(outdir)
    if not out.exists():
        raise InputError(f"report: folder '{out}' does not exist; expected a result or batch folder")
    if not out.is_dir():
        raise InputError(f"report: '{out}' is a file; expected a result folder (run.json, segments.csv) "
                         "or a batch folder (cohort_summary.csv)")
    kind = _folder_kind(out)
    if kind is None:
        raise InputError(f"report: folder '{out}' is neither a result folder (expected run.json and "
                         "segments.csv) nor a batch folder (expected cohort_summary.csv)")
    if not overwrite and ((out / REPORT_NAME).exists() or (out / FIGURE_DIR).exists()):
        raise InputError(f"report: '{out}' already has {REPORT_NAME} or {FIGURE_DIR}/; "
                         "pass --overwrite to replace them")
    if kind == "batch":
        if mask is not None:
            raise InputError("report: --mask applies to one sample; a batch folder reads each sample's own")
        page, figures = _study_report(out)
    else:
        page, figures = _sample_report(out, mask=mask)
    return _publish(out, page, figures)


def _folder_kind(out):
    if (out / "cohort_summary.csv").is_file():
        return "batch"
    if (out / "run.json").is_file() and (out / "segments.csv").is_file():
        return "sample"
    return None


@dataclass
class _Rendered:
    """One figure rendered in memory."""

    name: str
    title: str
    caption: str
    png: bytes
    svg: bytes


def _render(fig, name, title, caption):
    png, svg = io.BytesIO(), io.BytesIO()
    fig.savefig(png, format="png", dpi=_DPI, metadata={"Software": None})
    # A fixed hash salt and no date keep the SVG identical from run to run.
    import matplotlib

    with matplotlib.rc_context({"svg.hashsalt": "vesselflow", "svg.fonttype": "path"}):
        fig.savefig(svg, format="svg", metadata={"Date": None})
    return _Rendered(name=name, title=title, caption=caption, png=png.getvalue(), svg=svg.getvalue())


def _publish(out, page, figures):
    """Write the report atomically: temp sibling folder, then renames, page last.

    On any failure the earlier report, if there was one, is put back and
    nothing new is left behind.
    """
    from .tables import clean_stale_partials, make_partial_dir, storage_error

    try:
        clean_stale_partials(out)
        tmp = make_partial_dir(out, "report")
    except OSError as exc:
        raise storage_error(exc, out / REPORT_NAME) from None
    old, moved, placed = None, [], False
    try:
        fdir = tmp / FIGURE_DIR
        fdir.mkdir()
        for r in figures:
            (fdir / f"{r.name}.png").write_bytes(r.png)
            (fdir / f"{r.name}.svg").write_bytes(r.svg)
        (tmp / REPORT_NAME).write_text(page, encoding="utf-8")
        old = make_partial_dir(out, "report", "old")
        # The old page goes first so that no moment shows a complete-looking
        # report next to figures that are not its own.
        for name in (REPORT_NAME, FIGURE_DIR):
            if (out / name).exists():
                os.rename(out / name, old / name)
                moved.append(name)
        os.rename(fdir, out / FIGURE_DIR)
        placed = True
        os.replace(tmp / REPORT_NAME, out / REPORT_NAME)
    except BaseException as exc:
        if placed:
            shutil.rmtree(out / FIGURE_DIR, ignore_errors=True)
        for name in moved:
            os.rename(old / name, out / name)
        if isinstance(exc, OSError) and not isinstance(exc, VesselflowError):
            raise storage_error(exc, out / REPORT_NAME) from None
        raise
    finally:
        shutil.rmtree(tmp, ignore_errors=True)
        if old is not None:
            shutil.rmtree(old, ignore_errors=True)
    return out / REPORT_NAME


# --------------------------------------------------------------------------- helpers


def _label(measure):
    if measure in _SCIENCE:
        m = _SCIENCE[measure]
        return f"{m.label} ({'dimensionless' if m.unit == '1' else m.unit})"
    if measure in _LABELS:
        return _LABELS[measure]
    text = measure
    for suf, unit in _SUFFIXES:
        if measure.endswith(suf):
            return f"{measure[: -len(suf)].replace('_', ' ')} ({unit})"
    if measure.startswith("flag_count_") or measure in ("segments", "nodes", "junctions", "bifurcations"):
        return f"{text.replace('_', ' ')} (count)"
    return f"{text.replace('_', ' ')} (dimensionless)"


def _col(df, name):
    """A numeric column, or all-NaN when it is absent (for example with --no-flow)."""
    if name in df.columns:
        return pd.to_numeric(df[name], errors="coerce").to_numpy(float)
    return np.full(len(df), np.nan)


def _bool_col(df, name):
    if name not in df.columns:
        return np.zeros(len(df), bool)
    s = df[name]
    if s.dtype == bool:
        return s.to_numpy()
    return s.astype(str).str.strip().str.lower().isin(("true", "1", "yes")).to_numpy()


def _fmt(v, digits=3):
    if v is None:
        return "–"
    if isinstance(v, (bool, np.bool_)):
        return "yes" if v else "no"
    if isinstance(v, (int, np.integer)):
        return str(int(v))
    if isinstance(v, (float, np.floating)):
        f = float(v)
        if not math.isfinite(f):
            return "–"
        if f == int(f) and abs(f) < 1e6:
            return str(int(f))
        return f"{f:.{digits}g}"
    return str(v)


def _fmt_q(q):
    if q is None or not np.isfinite(q):
        return "n/a"
    return f"{q:.2g}" if q >= 0.001 else f"{q:.1e}"


def _esc(v):
    return html.escape(str(v), quote=True)


def _anchor(text):
    return "s-" + re.sub(r"[^A-Za-z0-9_-]+", "-", str(text)).strip("-")


def _table(df, *, classes=None, max_rows=None, row_class=None):
    """An HTML table from a DataFrame; every cell escaped."""
    rows = df if max_rows is None else df.head(max_rows)
    head = "".join(f"<th>{_esc(c)}</th>" for c in rows.columns)
    body = []
    for i, (_, r) in enumerate(rows.iterrows()):
        cls = f' class="{row_class[i]}"' if row_class is not None and row_class[i] else ""
        body.append(f"<tr{cls}>" + "".join(f"<td>{_esc(_fmt(v))}</td>" for v in r.to_list()) + "</tr>")
    note = ""
    if max_rows is not None and len(df) > max_rows:
        note = f'<p class="note">First {max_rows} of {len(df)} rows; the CSV file has them all.</p>'
    cls = f' class="{classes}"' if classes else ""
    return (f"<div class=\"scroll\"><table{cls}><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody>"
            f"</table></div>{note}")


def _kv_table(pairs):
    rows = "".join(f"<tr><th>{_esc(k)}</th><td>{_esc(v)}</td></tr>" for k, v in pairs)
    return f'<div class="scroll"><table class="kv"><tbody>{rows}</tbody></table></div>'


def _new_figure(w=6.4, h=4.8):
    return Figure(figsize=(w, h), layout="constrained")


def _no_data(ax, text):
    ax.text(0.5, 0.5, text, ha="center", va="center", transform=ax.transAxes, fontsize=11, color="#333333")


def _log_axes(ax, *, x=None, y=None):
    """Log scale on the axes whose data are given, ticks written as plain numbers.

    Over less than two decades ticks go at 1, 2 and 5 × 10^k (matplotlib's
    default then labels minor ticks in scientific notation and crowds the
    axis); over more, at powers of ten only.
    """
    for values, axis, setter in ((x, ax.xaxis, ax.set_xscale), (y, ax.yaxis, ax.set_yscale)):
        if values is None:
            continue
        v = np.asarray(values, float)
        v = v[np.isfinite(v) & (v > 0)]
        setter("log")
        decades = np.log10(v.max() / v.min()) if len(v) else 0.0
        axis.set_major_locator(LogLocator(base=10, subs=(1.0, 2.0, 5.0) if decades < 2 else (1.0,)))
        axis.set_major_formatter(FuncFormatter(lambda t, _: f"{t:g}"))
        axis.set_minor_formatter(NullFormatter())


def _level_colours(levels):
    """Colour per segment by branching level, with legend entries.

    Up to eight distinct levels take Okabe–Ito colours; deeper networks take a
    discrete cividis map, since eight categorical colours are all the palette
    has and a sequential map still reads in order and in grey.
    """
    lev = np.asarray(levels, float)
    present = np.unique(lev[np.isfinite(lev)]).astype(int)
    colours = np.tile(np.array([[0.6, 0.6, 0.6, 1.0]]), (len(lev), 1))
    if len(present) <= len(OKABE_ITO):
        lut = {lv: to_rgba(OKABE_ITO[i]) for i, lv in enumerate(present)}
        for i, v in enumerate(lev):
            if np.isfinite(v):
                colours[i] = lut[int(v)]
        handles = [Line2D([], [], color=lut[lv], lw=2.5, label=f"level {lv}") for lv in present]
        return colours, handles, None
    from matplotlib import colormaps

    cmap = colormaps["cividis"].resampled(len(present))
    bounds = np.arange(present.min() - 0.5, present.max() + 1.5)
    norm = BoundaryNorm(bounds, cmap.N)
    ok = np.isfinite(lev)
    colours[ok] = cmap(norm(lev[ok]))
    return colours, [], (cmap, norm)


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
    from .tables import load_result

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
    from .tables import read_result_mask

    explicit = mask is not None
    try:
        img, notes = read_result_mask(result, mask)
    except InputError as exc:
        if explicit:
            raise InputError(f"report: {exc}") from None
        data.notes.append(f"The mask recorded in run.json could not be used ({exc}), so the maps show the "
                          "centrelines alone.")
        return None
    if img is None:
        data.notes.append(f"{notes[0][0].upper()}{notes[0][1:]}, so the maps show the centrelines alone, without "
                          "the mask projection.")
        return None
    data.notes.extend(f"{n[0].upper()}{n[1:]}; its projection is shown as found." for n in notes)
    return img.mask.any(axis=0)


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
    b = data.bifurcations
    if b.empty or "flagged" not in b.columns:
        return 0
    fl = b[_bool_col(b, "flagged")]
    if fl.empty:
        return 0
    ax.scatter(fl["x_um"], fl["y_um"], s=140, facecolors="none", edgecolors=_FLAG_COLOUR, linewidths=1.3,
               zorder=5, label=f"flagged bifurcation ({len(fl)})", gid="flagged-circles")
    if len(fl) <= _MAX_NUMBERED:
        for _, r in fl.iterrows():
            ax.annotate(str(int(r["node_id"])), (r["x_um"], r["y_um"]), xytext=(5, 5), textcoords="offset points",
                        fontsize=7, color=_FLAG_COLOUR, zorder=6,
                        bbox=dict(boxstyle="round,pad=0.1", fc="white", ec="none", alpha=0.8))
    else:
        numbered_note.append(f"{len(fl)} flagged bifurcations are circled but not numbered (too many to read); "
                             "the bifurcation table lists them.")
    return len(fl)


def figure_map_level(data, notes):
    """Projection map with centrelines coloured by branching level."""
    fig = _new_figure(7.2, 6.4)
    ax = fig.add_subplot()
    _map_axes(ax, data)
    colours, handles, seq = _level_colours(_col(data.segments, "level"))
    ax.add_collection(_centreline_collection(data, colours, zorder=3, gid="centrelines"))
    n = _flag_overlay(ax, data, notes)
    if n:
        how = ", numbered by node id" if n <= _MAX_NUMBERED else ""
        handles = handles + [Line2D([], [], ls="none", marker="o", mfc="none", mec=_FLAG_COLOUR, ms=9,
                                    label=f"flagged bifurcation ({n}){how}")]
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
    good = np.isfinite(wss) & (wss > 0)
    if good.any():
        lo, hi = np.nanmin(wss[good]), np.nanmax(wss[good])
        # A log scale when the range spans more than a decade, else the
        # colour steps would all sit at one end.
        norm = LogNorm(lo, hi) if hi > 10 * lo else Normalize(lo, hi)
        grey = _centreline_collection(data, "#9a9a9a", linestyles="dotted", zorder=2)
        grey.set_visible(not good.all())
        ax.add_collection(grey)
        lc = _centreline_collection(data, cmap="viridis", norm=norm, zorder=3, gid="centrelines")
        arr = np.where(good, wss, np.nan)
        lc.set_array(np.ma.masked_invalid(arr))
        ax.add_collection(lc)
        cb = fig.colorbar(lc, ax=ax, shrink=0.8)
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
        m = ok & flag
        ax.scatter(x[m], y[m], s=40, marker="X", color=OKABE_ITO[3], lw=0, label=f"flagged ({m.sum()})",
                   gid="flagged")
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
    ok = np.isfinite(d) & np.isfinite(w) & (w > 0) & (d > 0)
    if not ok.any():
        _no_data(ax, "no wall shear stress (flow model not run)")
    else:
        ax.scatter(d[ok], w[ok], s=14, color=OKABE_ITO[2], alpha=0.7, lw=0, label=f"segment ({ok.sum()})")
        if w[ok].max() > 10 * w[ok].min():
            _log_axes(ax, y=w[ok])
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
    ok = np.isfinite(r) & np.isfinite(q) & (r > 0) & (q > 0)
    if not ok.any():
        _no_data(ax, "no flows (flow model not run)")
    else:
        lr, lq = np.log10(r[ok]), np.log10(q[ok])
        ax.scatter(r[ok], q[ok], s=14, color=OKABE_ITO[0], alpha=0.7, lw=0, label=f"segment ({ok.sum()})")
        # The guide passes through the median point so it sits on the cloud.
        r_ref, q_ref = 10 ** np.median(lr), 10 ** np.median(lq)
        rg = np.array([r[ok].min(), r[ok].max()])
        ax.plot(rg, q_ref * (rg / r_ref) ** 3, color="k", lw=1.2, ls="--",
                label="slope 3: Q ∝ r³ (Murray 1926)", gid="slope3")
        if len(np.unique(lr)) > 1:
            slope = np.polyfit(lr, lq, 1)[0]
            ax.plot([], [], " ", label=f"least-squares slope {slope:.2f}")
        _log_axes(ax, x=r[ok], y=q[ok])
        ax.legend(fontsize=8, loc="upper left")
    ax.set_xlabel("segment radius (µm, log scale)")
    ax.set_ylabel("|flow| (nL/min, log scale)")
    ax.set_title("Flow against radius (model estimate)")
    return fig


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
    from .config import default_config

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
    from .flow import DIAMETER_CLASSES

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
    from .flow import DIAMETER_CLASSES

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
    from .flow import PLAUSIBLE, plausibility_warnings

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
    from .flow import plausibility_warnings

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
    from .flow import DIAMETER_CLASSES

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

    from .flow import PLAUSIBLE, plausibility_warnings

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
    from .flow import PLAUSIBLE

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


_SAMPLE_BUILDERS = {
    "map_level": (figure_map_level, "Map by branching level",
                  "Projection of the mask along z (grey) with centrelines coloured by branching level "
                  "(Okabe–Ito colours); line width follows radius. Circles: flagged bifurcations, numbered "
                  "by node id (the bifurcation table below)."),
    "map_wss": (figure_map_wss, "Map by wall shear stress",
                "The same projection with centrelines coloured by model wall shear stress (viridis); "
                "dotted grey: segments without flow."),
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


# --------------------------------------------------------------------------- study figures


def _box_and_points(ax, groups, values, colours):
    pos = np.arange(1, len(groups) + 1)
    data = [v[np.isfinite(v)] for v in values]
    ax.boxplot([d if len(d) else [np.nan] for d in data], positions=pos, widths=0.5, showfliers=False,
               medianprops=dict(color="k", lw=1.5), boxprops=dict(color="#555555"),
               whiskerprops=dict(color="#555555"), capprops=dict(color="#555555"))
    rng = np.random.default_rng(0)
    for p, d, c, g in zip(pos, data, colours, groups):
        ax.scatter(p + rng.uniform(-0.12, 0.12, len(d)), d, s=30, color=c, edgecolor="k", lw=0.5, zorder=3,
                   label=f"{g} (n = {len(d)})")
    ax.set_xticks(pos)
    ax.set_xticklabels([str(g) for g in groups])


def figure_study_measure(cohort, comparison, measure, groups):
    """Box-and-point plot of one summary measure per group, annotated with q."""
    fig = _new_figure(5.2, 4.4)
    ax = fig.add_subplot()
    colours = [OKABE_ITO[i % len(OKABE_ITO)] for i in range(len(groups))]
    vals = [pd.to_numeric(cohort.loc[cohort["group"].astype(str) == g, measure], errors="coerce").to_numpy(float)
            for g in groups]
    _box_and_points(ax, groups, vals, colours)
    lines = []
    if comparison is not None and not comparison.empty:
        rows = comparison[comparison["measure"] == measure]
        for _, r in rows.iterrows():
            shift = _num(r.get("hodges_lehmann_shift"))
            lo, hi = _num(r.get("hodges_lehmann_ci_low")), _num(r.get("hodges_lehmann_ci_high"))
            text = f"{r['group_b']} − {r['group_a']}"
            note = r.get("test_note")
            if not math.isfinite(_num(r.get("p_value"))) and isinstance(note, str) and note:
                lines.append(f"{text}: no test ({note})")
                continue
            if math.isfinite(shift):
                text += f" {_fmt(shift)}" + (f" [{_fmt(lo)}, {_fmt(hi)}]" if math.isfinite(lo) else "")
            lines.append(f"{text}, q = {_fmt_q(_num(r.get('q_value')))}")
    ax.set_title(_label(measure).split(" (")[0] + ("\n" + "\n".join(lines) if lines else ""), fontsize=9)
    ax.set_xlabel("group")
    ax.set_ylabel(_label(measure))
    ax.legend(fontsize=7, loc="best")
    return fig


def _num(v):
    try:
        f = float(v)
    except (TypeError, ValueError):
        return float("nan")
    return f


def study_figures(cohort, comparison):
    """Build one box-and-point figure per main measure present in the cohort table.

    Returns
    -------
    dict of str -> (Figure, title, caption)
    """
    cohort = add_densities(cohort)
    groups = sorted(cohort["group"].astype(str).unique())
    out = {}
    if (all(k in cohort.columns for k in NETWORK_EXPONENT_KEYS)
            and np.isfinite(_col(cohort, NETWORK_EXPONENT_KEYS[0])).any()):
        out["study_network_exponent"] = (figure_network_exponent(cohort, groups), "Network Murray exponent",
                                         _NETWORK_EXPONENT_CAPTION)
    for m in science_measures(cohort):
        fig = figure_study_measure(cohort, comparison, m, groups)
        out[f"study_{m}"] = (fig, _label(m), "Boxes: median and quartiles per group; points: samples. Title: "
                                             "Hodges–Lehmann shift of the second group against the first with "
                                             "its distribution-free 95 % interval, and q, the "
                                             "Benjamini–Hochberg-adjusted p-value of the Mann–Whitney U test "
                                             "(group_comparison.csv; no test with fewer than 3 samples in a "
                                             "group).")
    return out


_NETWORK_EXPONENT_CAPTION = (
    "One exponent x of r0^x = r1^x + r2^x fitted per sample to its diverging bifurcations; bars: the sample's "
    "95 % bootstrap interval over junctions (2 preserves cross-sectional area, 3 is Murray's cube law). "
    "Diamonds: the group's one-sample Hodges–Lehmann estimate (median of the Walsh averages of its samples' "
    "exponents) with the Wilcoxon signed-rank interval, labelled with its exact coverage (below 95 % with "
    "fewer than six samples: with n samples the widest interval covers 1 − 2^(1−n)).")


def network_exponent_table(cohort, *, group="group"):
    """The network Murray exponent per sample and per group, or None without the summary keys.

    Parameters
    ----------
    cohort : DataFrame
        ``cohort_summary.csv``: one row per sample with ``sample_id``, the
        group column and :data:`NETWORK_EXPONENT_KEYS` (dimensionless).
    group : str, keyword-only
        Name of the group column.

    Returns
    -------
    (DataFrame, DataFrame) or None
        Per sample: ``sample_id, group, exponent, ci_low, ci_high`` and
        ``junctions`` (``murray_exponent_network_junctions`` where present).
        Per group: ``group, n`` (samples with an exponent),
        ``hodges_lehmann_estimate, ci_low, ci_high, coverage``
        (:func:`pipeline.batch.hodges_lehmann_one_sample`) and ``median``.
        None when the cohort has no such keys (results of older versions).
    """
    if not all(k in cohort.columns for k in NETWORK_EXPONENT_KEYS):
        return None
    per = pd.DataFrame({"sample_id": cohort["sample_id"].astype(str), "group": cohort[group].astype(str),
                        "exponent": _col(cohort, NETWORK_EXPONENT_KEYS[0]),
                        "ci_low": _col(cohort, NETWORK_EXPONENT_KEYS[1]),
                        "ci_high": _col(cohort, NETWORK_EXPONENT_KEYS[2]),
                        "junctions": _col(cohort, "murray_exponent_network_junctions")})
    rows = []
    for g in sorted(per["group"].unique()):
        x = per.loc[per["group"] == g, "exponent"].to_numpy(float)
        x = x[np.isfinite(x)]
        est, lo, hi, cov = hodges_lehmann_one_sample(x)
        rows.append({"group": g, "n": int(x.size), "hodges_lehmann_estimate": est, "ci_low": lo, "ci_high": hi,
                     "coverage": cov, "median": float(np.median(x)) if x.size else np.nan})
    return per, pd.DataFrame(rows)


def figure_network_exponent(cohort, groups):
    """Network Murray exponent with its interval per sample, and per group (:func:`network_exponent_table`)."""
    fig = _new_figure(6.4, 4.4)
    ax = fig.add_subplot()
    table = network_exponent_table(cohort)
    if table is None:
        _no_data(ax, "no network exponent in these results")
        return fig
    per, grp = table
    x0 = 0.0
    ticks, names = [], []
    for i, g in enumerate(groups):
        c = OKABE_ITO[i % len(OKABE_ITO)]
        rows = per[per["group"] == g].reset_index(drop=True)
        xs = x0 + np.arange(len(rows))
        y, lo, hi = rows["exponent"].to_numpy(float), rows["ci_low"].to_numpy(float), rows["ci_high"].to_numpy(float)
        ok = np.isfinite(y)
        err = np.vstack([np.where(np.isfinite(lo), y - lo, 0.0), np.where(np.isfinite(hi), hi - y, 0.0)])
        if ok.any():
            ax.errorbar(xs[ok], y[ok], yerr=err[:, ok], fmt="o", color=c, ecolor=c, capsize=3, ms=5,
                        label=f"{g} (n = {int(ok.sum())})")
        ticks.extend(xs.tolist())
        names.extend(rows["sample_id"].tolist())
        gr = grp[grp["group"] == g]
        if len(gr) and np.isfinite(gr["hodges_lehmann_estimate"].iloc[0]):
            gx = x0 + len(rows) + 0.2
            est, glo, ghi, cov = (float(gr[k].iloc[0]) for k in ("hodges_lehmann_estimate", "ci_low", "ci_high",
                                                                  "coverage"))
            if math.isfinite(glo):
                ax.errorbar([gx], [est], yerr=[[est - glo], [ghi - est]], fmt="D", color="k", ecolor="k",
                            capsize=5, ms=7, mfc=c)
                # the exact coverage beside the bar: below 95 % with fewer than six samples
                ax.annotate(f"{cov:.1%}", (gx, ghi), xytext=(4, 2), textcoords="offset points", fontsize=7)
            else:
                ax.plot([gx], [est], "D", color="k", mfc=c, ms=7)
            ticks.append(gx)
            names.append(f"{g}: group")
        x0 += len(rows) + 1.5
    for ref in (2.0, 3.0):
        ax.axhline(ref, color="#888888", lw=0.8, ls="--", zorder=0)
    ax.set_xticks(ticks)
    ax.set_xticklabels(names, rotation=60, ha="right", fontsize=7)
    ax.set_ylabel("network Murray exponent (dimensionless)")
    if ax.get_legend_handles_labels()[0]:
        ax.legend(fontsize=7, loc="best")
    return fig


def _network_exponent_html(cohort):
    table = network_exponent_table(cohort)
    if table is None:
        return ("<p>These results hold no network Murray exponent (summary key murray_exponent_network): they "
                "were made by a version of vesselflow before it was added. Analyse the samples again to see "
                "it.</p>")
    per, grp = table
    per = per.rename(columns={"exponent": "network exponent", "ci_low": "95 % low", "ci_high": "95 % high",
                              "junctions": "junctions used"})
    grp = grp.rename(columns={"n": "samples", "hodges_lehmann_estimate": "Hodges–Lehmann estimate",
                              "ci_low": "interval low", "ci_high": "interval high",
                              "coverage": "exact coverage"})
    return ("<p>Per sample: the exponent fitted to the sample's diverging bifurcations with its 95 % interval. "
            "Per group: the one-sample Hodges–Lehmann estimate of the samples' exponents with its Wilcoxon "
            "signed-rank interval and that interval's exact coverage (distribution-free for a distribution "
            "symmetric about its centre; below 95 % with fewer than six samples, where no such interval "
            "reaches 95 %).</p>" + _table(per) + _table(grp))


# Columns of group_comparison.csv shown in the report, in order (those present).
_COMPARISON_SHOWN = (("label", "measure"), ("unit", "unit"), ("group_a", "group a"), ("group_b", "group b"),
                     ("n_a", "n a"), ("n_b", "n b"), ("median_a", "median a"), ("median_b", "median b"),
                     ("hodges_lehmann_shift", "shift b − a"), ("hodges_lehmann_ci_low", "shift low"),
                     ("hodges_lehmann_ci_high", "shift high"), ("hodges_lehmann_coverage", "coverage"),
                     ("cliffs_delta", "Cliff's δ"), ("difference", "mean b − mean a"), ("p_value", "p"),
                     ("q_value", "q"), ("test_note", "note"))


# --------------------------------------------------------------------------- HTML


_CSS = """
body{font-family:"DejaVu Sans",Arial,Helvetica,sans-serif;margin:2em auto;max-width:1100px;color:#1a1a1a;
line-height:1.4;padding:0 1em}
h1{font-size:1.6em;margin-bottom:.2em}h2{border-bottom:2px solid #0072B2;padding-bottom:.2em;margin-top:1.6em}
.caution{border-left:6px solid #D55E00;background:#fff4ec;padding:.6em 1em;margin:1em 0}
table{border-collapse:collapse;margin:.5em 0;font-size:.85em}
th,td{border:1px solid #c8c8c8;padding:.2em .5em;text-align:left;vertical-align:top}
thead th{background:#eef3f8}table.kv th{background:#f6f6f6;font-weight:normal;color:#333}
tr.low-q td{background:#fff7d6}tr.flag td{background:#fdf0ea}
figure{margin:1em 0;page-break-inside:avoid}figure img{max-width:100%;height:auto;border:1px solid #ddd}
figcaption{font-size:.85em;color:#333;margin-top:.3em}
.grid{display:flex;flex-wrap:wrap;gap:1em}.grid figure{flex:1 1 460px;margin:0}
pre{background:#f6f6f6;padding:.6em;overflow-x:auto;font-size:.8em}
.note{font-size:.85em;color:#444}ul.warn li{color:#7a3300}nav a{margin-right:1em}
.muted{color:#666}.scroll{overflow-x:auto;max-width:100%}
"""

# The page loads nothing from outside: images only as data: URIs, no
# scripts, no fonts; the browser enforces it.
_CSP = "default-src 'none'; img-src data:; style-src 'unsafe-inline'"


def _page(title, body):
    return ("<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
            f"<meta http-equiv=\"Content-Security-Policy\" content=\"{_CSP}\">\n"
            "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">\n"
            f"<title>{_esc(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n{body}\n</body>\n</html>\n")


def _figure_html(r, *, anchor=None):
    uri = "data:image/png;base64," + base64.b64encode(r.png).decode("ascii")
    aid = f' id="{_esc(anchor)}"' if anchor else ""
    return (f"<figure{aid}><img src=\"{uri}\" alt=\"{_esc(r.title)}\">"
            f"<figcaption><b>{_esc(r.title)}.</b> {_esc(r.caption)} "
            f"<span class=\"muted\">(figures/{_esc(r.name)}.png, .svg)</span></figcaption></figure>")


def _render_all(figs):
    rendered = []
    for name, (fig, title, caption) in figs.items():
        rendered.append(_render(fig, name, title, caption))
    return rendered


def _warnings_html(items):
    if not items:
        return "<p>None.</p>"
    return '<ul class="warn">' + "".join(f"<li>{_esc(w)}</li>" for w in items) + "</ul>"


def _config_html(cfg):
    import yaml

    text = yaml.safe_dump(cfg or {}, sort_keys=False, default_flow_style=False, allow_unicode=True)
    return f"<pre>{_esc(text)}</pre>"


def _summary_rows(summary):
    rows = []
    for k, v in summary.items():
        if isinstance(v, dict):
            for kk, vv in v.items():
                rows.append((f"{k}.{kk}", _fmt(vv)))
        elif isinstance(v, list):
            rows.append((k, ", ".join(_fmt(x) for x in v)))
        else:
            rows.append((k, _fmt(v)))
    return rows


def _generated():
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _sources_html():
    return ("<ul>"
            "<li>Murray CD (1926) The physiological principle of minimum work. I. The vascular system and the "
            "cost of blood volume. PNAS 12:207–214 (cube law, Q ∝ r³, equal wall shear stress).</li>"
            "<li>Murray CD (1926) The physiological principle of minimum work applied to the angle of "
            "branching of arteries. J Gen Physiol 9:835–841 (optimal angles).</li>"
            "<li>Benjamini Y, Hochberg Y (1995) Controlling the false discovery rate. J R Stat Soc B "
            "57:289–300 (q-values in the study report).</li>"
            "<li>Hodges JL, Lehmann EL (1963) Estimates of location based on rank tests. Ann Math Stat "
            "34:598–611; Bauer DF (1972) Constructing confidence sets using rank statistics. J Am Stat Assoc "
            "67:687–690 (shift and its interval).</li>"
            "<li>Cliff N (1993) Dominance statistics: ordinal analyses to answer ordinal questions. Psychol "
            "Bull 114:494–509 (Cliff's δ).</li>"
            "<li>Okabe M, Ito K (2002) Color Universal Design (CUD): how to make figures and presentations "
            "that are friendly to colorblind people (category colours); viridis and cividis for continuous "
            "values.</li></ul>")


def _checked_review(out, data):
    """The sample's ``review.csv`` checked against its result, or None when it has none.

    The same check as ``summarize --apply-review`` (:func:`pipeline.review.check_review`),
    so both accept and reject the same files.

    Raises
    ------
    InputError
        If the review is malformed or names a node that is not a junction.
    """
    from .review import REVIEW_FILE, check_review
    from .tables import Result

    if not os.path.lexists(out / REVIEW_FILE):
        return None
    result = Result(path=out, segments=data.segments, nodes=data.nodes, summary=data.summary, run=data.run,
                    centrelines=data.centrelines, bifurcations=data.bifurcations, levels=data.levels)
    return check_review(result)


def _review_table(fl, review):
    """Join checked review decisions (or None: no ``review.csv``) onto the flagged junctions by node id."""
    if review is None:
        return fl, None
    rev = review.rename(columns={c: f"review {c}" for c in review.columns if c != "node_id"})
    return fl.merge(rev, on="node_id", how="left"), f"Review decisions from review.csv ({len(rev)} rows)."


def _sample_report(out, *, mask):
    data = load_sample(out, mask=mask)
    try:
        review = _checked_review(out, data)
    except InputError as exc:
        raise InputError(f"report: {exc}") from None
    notes = list(data.notes)
    figs = sample_figures(data, notes)
    rendered = _render_all(figs)
    run, summary = data.run, data.summary
    inp = run.get("input") or {}
    parts = [f"<h1>vesselflow report: {_esc(data.name)}</h1>",
             f"<p class=\"muted\">Built {_esc(_generated())} by vesselflow {_esc(__version__)} from the result "
             f"folder written {_esc(run.get('created', '?'))} by vesselflow "
             f"{_esc(run.get('vesselflow_version', '?'))}.</p>",
             f"<div class=\"caution\"><b>Research use only.</b> {_esc(_CAUTION)}</div>",
             "<nav><a href=\"#inputs\">Inputs</a><a href=\"#warnings\">Warnings</a><a href=\"#summary\">Summary</a>"
             "<a href=\"#figures\">Figures</a><a href=\"#plausibility\">Plausibility</a><a href=\"#uncertainty\">"
             "Uncertainty</a><a href=\"#levels\">Levels</a><a href=\"#orders\">Orders</a>"
             "<a href=\"#bifurcations\">Bifurcations</a>"
             "<a href=\"#config\">Configuration</a></nav>"]
    spacing = run.get("spacing_um")
    parts.append("<h2 id=\"inputs\">Inputs</h2>" + _kv_table([
        ("mask file", inp.get("path", "?")),
        ("SHA-256", inp.get("sha256", "?")),
        ("stored type and axes", f"{inp.get('dtype', '?')}, {inp.get('axes', '?')}"),
        ("shape (Z, Y, X) voxels", ", ".join(str(s) for s in run.get("shape", []))),
        ("spacing (dz, dy, dx) µm", ", ".join(_fmt(s, 4) for s in spacing) if spacing else "?"),
        ("spacing source", run.get("spacing_source", "?")),
        ("planar (2-D)", _fmt(bool(run.get("planar", False)))),
        ("command", " ".join(str(c) for c in run.get("command") or []) or "(library call)"),
        ("analysis version", run.get("vesselflow_version", "?")),
        ("report version", __version__),
        ("projection map", "mask projection" if data.mip is not None else "centrelines only (mask not read)"),
    ]))
    if run.get("spacing_source") == "default":
        notes.insert(0, "No spacing was found in the file or given: 1 µm was assumed, so every length, "
                        "density and flow in this report scales with that assumption.")
    parts.append("<h2 id=\"warnings\">Warnings and notes</h2><h3>From the analysis (run.json)</h3>"
                 + _warnings_html(run.get("warnings") or []) + "<h3>From the report</h3>" + _warnings_html(notes)
                 + ("<h3>Run notes</h3>" + _warnings_html(run["notes"]) if run.get("notes") else ""))
    parts.append("<h2 id=\"summary\">Summary</h2>" + _kv_table(_summary_rows(summary)))
    parts.append("<h2 id=\"figures\">Figures</h2>")
    parts.append("<div class=\"grid\">" + "".join(_figure_html(r, anchor=f"fig-{r.name}") for r in rendered
                                               if r.name not in _SECTION_FIGURES) + "</div>")
    own = {r.name: r for r in rendered if r.name in _SECTION_FIGURES}
    parts.append("<h2 id=\"plausibility\">Flow plausibility</h2>"
                 + _plausibility_html(data, own.get("flow_plausibility")))
    parts.append("<h2 id=\"uncertainty\">Uncertainty of the flows</h2>"
                 + _uncertainty_html(data, own.get("flow_intervals")))
    parts.append("<h2 id=\"levels\">Branching levels</h2>"
                 + (_table(data.levels) if not data.levels.empty else "<p>No levels.</p>"))
    parts.append("<h2 id=\"orders\">Diameter-defined Strahler orders</h2>" + _orders_html(data))
    parts.append("<h2 id=\"bifurcations\">Bifurcations</h2>"
                 + _bifurcation_html(data.bifurcations, review, summary))
    flow = run.get("flow") or {}
    if flow:
        parts.append("<h2 id=\"flow\">Flow model</h2>" + _kv_table([(k, _fmt(v)) for k, v in flow.items()]))
    parts.append("<h2 id=\"config\">Effective configuration</h2>" + _config_html(run.get("config")))
    counts = run.get("counts") or {}
    timings = run.get("timings_s") or {}
    parts.append("<h2 id=\"run\">Run record</h2>"
                 + _kv_table([(k, _fmt(v) if not isinstance(v, list) else ", ".join(_fmt(x) for x in v))
                              for k, v in counts.items()]
                             + [(f"time: {k} (s)", _fmt(v)) for k, v in timings.items()]))
    parts.append("<h2 id=\"sources\">Sources</h2>" + _sources_html())
    return _page(f"vesselflow report: {data.name}", "\n".join(parts)), rendered


def _orders_html(data):
    """The orders section: orders.csv and the Horton ratios fitted over it (Kassab et al. 1993)."""
    if data.orders.empty:
        return "<p>No orders.</p>"
    s = data.summary
    ratios = _kv_table([("number of orders", _fmt(s.get("n_orders"))),
                        ("Horton ratio of number (elements)", _fmt(s.get("horton_ratio_number"))),
                        ("Horton ratio of diameter", _fmt(s.get("horton_ratio_diameter"))),
                        ("Horton ratio of length", _fmt(s.get("horton_ratio_length")))])
    return ("<p>Orders after Kassab et al. (1993, Am J Physiol 265:H350); an element is the segments of one "
            "order in series; diameters and lengths are of elements (orders.csv; the connectivity matrix is "
            "in order_connectivity.csv).</p>" + _table(data.orders) + ratios)


def _plausibility_html(data, fig):
    """The flow plausibility section: warnings, the checked statistics, the class table and the figure."""
    from .flow import DIAMETER_CLASSES

    s = data.summary
    if not data.has_flow:
        return "<p>The flow model was not run (or solved nothing), so there is nothing to check.</p>"
    parts = ["<p>The flows are model estimates. Here the model's mean speeds and wall shear stresses are set "
             "against published physiological ranges: a value outside them is a reason to check the boundary "
             "conditions and the radii, not a finding about the tissue.</p>"]
    msgs = plausibility_messages(s)
    if msgs:
        parts.append("<div class=\"caution\"><b>Outside the published ranges.</b>" + _warnings_html(msgs)
                     + "</div>")
    else:
        parts.append("<p>No warning: every checked statistic is within its published range and at least half "
                     "of the vessel length is perfused.</p>")
    frac, total = _num(s.get("perfused_length_fraction")), _num(s.get("total_length_mm"))
    parts.append(_kv_table([
        ("perfused length fraction", f"{100 * frac:.1f} %" if math.isfinite(frac) else "–"),
        ("vessel length (mm)", _fmt(total)),
    ]))
    checks = plausibility_checks(s)
    parts.append("<h3>Checked statistics</h3>" + _table(pd.DataFrame({
        "statistic": [c["what"] for c in checks],
        "model value": [f"{_fmt(c['value'])} {c['unit']}".strip() for c in checks],
        "published range": [f"{c['low']:g}–{c['high']:g} {c['unit']}".strip() for c in checks],
        "verdict": [c["verdict"] for c in checks],
        "source": [c["source"] for c in checks],
    }), classes="checks", row_class=["flag" if c["verdict"] in ("above", "below") else "" for c in checks]))
    cfg = _flow_cfg(data)
    cap, small = float(cfg["capillary_max_diameter_um"]), float(cfg["small_vessel_max_diameter_um"])
    bounds = (f"< {cap:g}", f"{cap:g}–{small:g}", f"> {small:g}")
    rows = []
    for name, b in zip(DIAMETER_CLASSES, bounds):
        rows.append({"class": name, "diameter (µm)": b,
                     "perfused segments": s.get(f"n_perfused_{name}"),
                     # Whole µm: the digits past them are below the centreline's resolution.
                     "perfused length (µm)": _round_or_none(s.get(f"perfused_length_um_{name}")),
                     "median speed (mm/s)": s.get(f"velocity_median_mm_s_{name}"),
                     "95th percentile speed (mm/s)": s.get(f"velocity_p95_mm_s_{name}"),
                     "median wall shear stress (Pa)": s.get(f"wss_median_pa_{name}"),
                     "99th percentile wall shear stress (Pa)": s.get(f"wss_p99_pa_{name}")})
    parts.append("<h3>By diameter class</h3><p class=\"note\">Perfused segments only (summary.json).</p>"
                 + _table(pd.DataFrame(rows), classes="classes"))
    if fig is not None:
        parts.append(_figure_html(fig, anchor=f"fig-{fig.name}"))
    return "".join(parts)


def _round_or_none(v):
    f = _num(v)
    return int(round(f)) if math.isfinite(f) else None


def _uncertainty_html(data, fig):
    """The uncertainty section: the ensemble's interval statistics and the interval figure."""
    if not data.has_flow:
        return "<p>The flow model was not run (or solved nothing), so there are no flow intervals.</p>"
    u = flow_uncertainty(data.segments)
    if u["n_ensemble"] == 0 and u["n_width"] == 0:
        return ("<p>No flow intervals: the ensemble was not run (flow.ensemble_size 0) or nothing is "
                "perfused.</p>")
    k = int(_flow_cfg(data)["ensemble_size"])
    conf = (f"{100 * u['confident_fraction']:.1f} % ({u['n_confident']} of {u['n_ensemble']})"
            if u["n_ensemble"] else "–")
    parts = ["<p>The flow step recomputes the flows for an ensemble of perturbed radii and boundary targets; "
             "each segment gets the 5th and 95th percentile of its flow over the members and the share of "
             "members whose flow runs the way of the estimate (direction confidence). Wide intervals and low confidence mark "
             "the flows the image does not pin down.</p>",
             _kv_table([
                 ("ensemble members (flow.ensemble_size)", _fmt(k)),
                 ("perfused segments", _fmt(u["n_perfused"])),
                 (f"direction confidence ≥ {DIRECTION_CONFIDENCE_MIN:g} (share of perfused segments)", conf),
                 ("median relative interval width (p95 − p05) / |flow|", _fmt(u["relative_width_median"])),
                 ("90th percentile of the relative interval width", _fmt(u["relative_width_p90"])),
                 ("intervals including zero flow or the opposite direction",
                  f"{u['n_interval_includes_zero']} of {u['n_width']}"),
             ])]
    if fig is not None:
        parts.append(_figure_html(fig, anchor=f"fig-{fig.name}"))
    return "".join(parts)


# Plain words for the reasons a junction is not judged (pipeline.bifurcations.UNCERTAIN_CODES);
# a code without words here is shown by its name alone.
_UNCERTAIN_WORDS = {
    "low_confidence": "a radius measured over too few points or on a segment too short",
    "ratio_unresolved": "the Murray ratio's uncertainty reaches from the cube law to the flag limit",
    "mixed_flow": "flow neither diverges nor converges (a crossing, or arms without flow)",
    "capillary": "a capillary-sized parent: capillary meshes do not follow Murray's law",
}


def _severity_text(v):
    f = _num(v)
    if math.isinf(f) and f > 0:
        return "∞"
    return _fmt(f)


def _bifurcation_html(b, review, summary=None):
    """Flagged junctions most severe first, uncertain ones counted apart, Murray medians per flow pattern."""
    if b.empty or "flagged" not in b.columns:
        return "<p>No bifurcations.</p>"
    summary = summary or {}
    flagged = _bool_col(b, "flagged")
    uncertain = _bool_col(b, "uncertain")
    fl = b[flagged]
    how = (", listed below from the most severe (severity: the largest deviation from the cube law or the "
           "optimal angle, in standard uncertainties, among the quantities outside their limits; ∞ where the "
           "uncertainty is 0); the node id is the number on the maps." if len(fl) else ".")
    parts = [f"<p>{len(fl)} of {len(b)} bifurcations flagged{how}</p>"]
    if uncertain.any():
        codes = b.loc[uncertain, "uncertain_reasons"] if "uncertain_reasons" in b.columns else pd.Series([], dtype=str)
        from .bifurcations import UNCERTAIN_CODES

        codes = codes.fillna("").astype(str)
        counts = {c: int(codes.str.contains(rf"(?:^|;){c}(?:;|$)").sum()) for c in UNCERTAIN_CODES}
        parts.append(f"<p>{int(uncertain.sum())} uncertain junction(s) are not judged and not listed (the "
                     "CSV has them, column uncertain); a junction may have several reasons:</p>"
                     + _table(pd.DataFrame({"reason": list(counts),
                                            "meaning": [_UNCERTAIN_WORDS.get(c, "") for c in counts],
                                            "junctions": list(counts.values())}), classes="uncertain"))
    else:
        parts.append("<p>No junction is uncertain: every one was judged.</p>")
    patterns = [p for p in ("diverging", "converging") if f"murray_ratio_median_{p}" in summary]
    if patterns:
        rows = [{"flow pattern": p, "junctions": summary.get(f"bifurcations_{p}"),
                 "median Murray ratio (r1³+r2³)/r0³": summary.get(f"murray_ratio_median_{p}"),
                 "median junction exponent": summary.get(f"murray_exponent_median_{p}")} for p in patterns]
        rows.append({"flow pattern": "all", "junctions": summary.get("bifurcations", len(b)),
                     "median Murray ratio (r1³+r2³)/r0³": summary.get("murray_ratio_median"),
                     "median junction exponent": summary.get("murray_exponent_median")})
        parts.append("<h3>Murray's law by flow pattern</h3><p class=\"note\">Under the cube law the ratio is 1 "
                     "and the exponent 3 (Murray 1926), for feeding parents (diverging) and draining trunks "
                     "(converging) alike. Medians over every junction of the pattern, uncertain ones included "
                     "(summary.json).</p>" + _table(pd.DataFrame(rows), classes="murray"))
    if fl.empty:
        return "".join(parts)
    fl = fl.sort_values("severity", ascending=False, kind="mergesort", na_position="last") \
        if "severity" in fl.columns else fl
    cols = [c for c in ("node_id", "severity", "flow_pattern", "level", "degree", "radius_parent_um",
                        "radius_daughter1_um", "radius_daughter2_um", "murray_ratio", "murray_exponent",
                        "angle_deviation_deg", "low_confidence", "flag_reasons") if c in fl.columns]
    fl = fl[cols].copy()
    if "severity" in fl.columns:
        fl["severity"] = [_severity_text(v) for v in fl["severity"]]
    if "flag_reasons" in fl.columns:
        fl["flag_reasons"] = fl["flag_reasons"].fillna("").astype(str).str.replace(";", ", ")
    fl, note = _review_table(fl, review)
    parts.append("<h3>Flagged junctions</h3>" + (f"<p class=\"note\">{_esc(note)}</p>" if note else "")
                 + _table(fl, classes="bif"))
    return "".join(parts)


def _read_table(path, required, what):
    try:
        df = pd.read_csv(path)
    except FileNotFoundError:
        return None
    except (pd.errors.ParserError, pd.errors.EmptyDataError, UnicodeDecodeError) as exc:
        raise InputError(f"report: {what} '{path}' could not be read as CSV ({exc})") from None
    missing = [c for c in required if c not in df.columns]
    if missing:
        raise InputError(f"report: {what} '{path}': expected columns {', '.join(required)}; "
                         f"missing {', '.join(missing)}")
    return df


def _study_report(out):
    cohort = _read_table(out / "cohort_summary.csv", ("sample_id", "group"), "cohort summary")
    if cohort.empty:
        raise InputError(f"report: cohort summary '{out / 'cohort_summary.csv'}' has no samples; "
                         "expected one row per sample")
    comparison = _read_table(out / "group_comparison.csv",
                             ("measure", "group_a", "group_b", "p_value", "q_value"), "group comparison")
    failures = _read_table(out / "failures.csv", ("sample_id", "path", "step", "error"), "failures table")
    bookkeeping = _read_table(out / "group_bookkeeping.csv", ("measure", "group"), "bookkeeping table")
    try:
        batch = json.loads((out / "batch.json").read_text(encoding="utf-8"))
    except FileNotFoundError:
        batch = {}
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise InputError(f"report: '{out / 'batch.json'}' is not valid JSON ({exc})") from None
    notes = []
    if comparison is None:
        notes.append("group_comparison.csv is missing: no q-values are shown.")
    if failures is None:
        notes.append("failures.csv is missing: failed samples, if any, are not listed.")

    # Sample sections first: reading them finds folders that are missing.
    samples = []
    bad_reviews = {}
    for _, row in cohort.iterrows():
        sid = str(row["sample_id"])
        folder = out / sid
        try:
            sd = load_sample(folder, read_mip=False)
        except InputError as exc:
            notes.append(f"sample {sid}: {exc}")
            sd = None
        if sd is not None:
            # One sample's bad review is that sample's problem, not the study's.
            try:
                _checked_review(folder, sd)
            except InputError as exc:
                bad_reviews[sid] = f"The review of this sample is not valid: {exc}. Fix or remove review.csv."
                notes.append(f"sample {sid}: {bad_reviews[sid]}")
        samples.append((sid, str(row["group"]), sd))

    figs = study_figures(cohort, comparison)
    thumbs = {}
    for sid, _, sd in samples:
        if sd is not None and sd.centrelines:
            fig = figure_map_level(sd, [])
            thumbs[sid] = _render(fig, f"sample_{_anchor(sid)[2:]}_map_level", f"{sid}: centrelines by level",
                                  "Centrelines projected along z, coloured by branching level; circles: flagged "
                                  "bifurcations by node id (drawn without the mask).")
    rendered = _render_all(figs)
    groups = sorted(cohort["group"].astype(str).unique())
    parts = [f"<h1>vesselflow study report: {_esc(out.name)}</h1>",
             f"<p class=\"muted\">Built {_esc(_generated())} by vesselflow {_esc(__version__)}; batch run "
             f"{_esc(batch.get('created', '?'))} by vesselflow "
             f"{_esc(batch.get('version') or batch.get('vesselflow_version') or '?')} on "
             f"{_esc(batch.get('input', '?'))}. "
             f"{len(cohort)} samples in {len(groups)} groups: {_esc(', '.join(groups))}.</p>",
             f"<div class=\"caution\"><b>Research use only.</b> {_esc(_CAUTION)} Group differences are "
             "exploratory unless the study was designed and powered for them.</div>",
             "<nav><a href=\"#samples\">Samples</a><a href=\"#warnings\">Warnings</a><a href=\"#measures\">Measures"
             "</a><a href=\"#network-exponent\">Network exponent</a><a href=\"#comparison\">Comparison</a>"
             "<a href=\"#failures\">Failures</a>"
             "<a href=\"#config\">Configuration</a></nav>"]
    srows = []
    for sid, grp, sd in samples:
        run = sd.run if sd is not None else {}
        srows.append({"sample": sid, "group": grp, "mask file": (run.get("input") or {}).get("path", "–"),
                      "spacing (dz, dy, dx) µm": ", ".join(_fmt(s, 4) for s in run.get("spacing_um", [])) or "–",
                      "spacing source": run.get("spacing_source", "–"),
                      "warnings": len(run.get("warnings") or []) if sd is not None else "–",
                      "version": run.get("vesselflow_version", "–")})
    stab = pd.DataFrame(srows)
    parts.append("<h2 id=\"samples\">Samples and inputs</h2>" + _table(stab)
                 + "<p>" + " ".join(f"<a href=\"#{_anchor(sid)}\">{_esc(sid)}</a>" for sid, _, _ in samples)
                 + "</p>")
    allw = [f"{sid}: {w}" for sid, _, sd in samples if sd is not None for w in (sd.run.get("warnings") or [])]
    parts.append("<h2 id=\"warnings\">Warnings and notes</h2><h3>From the analyses</h3>" + _warnings_html(allw)
                 + "<h3>From the report</h3>" + _warnings_html(notes))
    parts.append("<h2 id=\"measures\">Measures by group</h2><div class=\"grid\">"
                 + "".join(_figure_html(r, anchor=f"fig-{r.name}") for r in rendered
                           if r.name != "study_network_exponent") + "</div>")
    parts.append("<h2 id=\"network-exponent\">Network Murray exponent</h2>"
                 + "".join(_figure_html(r, anchor=f"fig-{r.name}") for r in rendered
                           if r.name == "study_network_exponent") + _network_exponent_html(cohort))
    parts.append("<h2 id=\"comparison\">Group comparison</h2>")
    if comparison is not None and not comparison.empty:
        low = [("low-q" if _num(q) < _LOW_Q else "") for q in comparison["q_value"]]
        shown = comparison[[c for c, _ in _COMPARISON_SHOWN if c in comparison.columns]].rename(
            columns=dict(_COMPARISON_SHOWN))
        parts.append(f"<p>Highlighted: q &lt; {_LOW_Q:g} (Benjamini–Hochberg across the measures of a pair of "
                     "groups). Shift: Hodges–Lehmann estimate, the median of all differences b − a between "
                     "samples, with its distribution-free interval from the Mann–Whitney distribution and that "
                     "interval's exact coverage (Bauer 1972); Cliff's δ = P(b &gt; a) − P(b &lt; a) (Cliff 1993). "
                     "p: two-sided Mann–Whitney U test, exact for small groups without ties; no test when a "
                     "group has fewer than 3 samples with a value (the note says which). Samples per group: "
                     + _esc(", ".join(f"{g} {n}" for g, n in cohort["group"].astype(str).value_counts(sort=False)
                                      .items()))
                     + "; n a, n b: the samples with a value of the measure"
                     + ".</p>" + _table(shown, row_class=low))
    else:
        parts.append("<p>No comparison table.</p>")
    if bookkeeping is not None and not bookkeeping.empty:
        parts.append("<details><summary>Bookkeeping columns per group (group_bookkeeping.csv: counts, "
                     "residuals, sizes; described, not tested)</summary>" + _table(bookkeeping) + "</details>")
    parts.append("<h2 id=\"failures\">Failed samples</h2>"
                 + (_table(failures) if failures is not None and not failures.empty else "<p>None.</p>"))
    parts.append("<h2 id=\"cohort\">Cohort summary</h2>" + _table(cohort))
    parts.append("<h2 id=\"per-sample\">Per sample</h2>")
    for sid, grp, sd in samples:
        sec = [f"<section id=\"{_esc(_anchor(sid))}\"><h3>{_esc(sid)} <span class=\"muted\">({_esc(grp)})</span>"
               "</h3>"]
        if sd is None:
            sec.append("<p>Result folder missing or incomplete (see the notes).</p></section>")
            parts.append("".join(sec))
            continue
        run, s = sd.run, sd.summary
        inp = run.get("input") or {}
        sec.append(_kv_table([("mask file", inp.get("path", "?")),
                              ("spacing (dz, dy, dx) µm", ", ".join(_fmt(v, 4) for v in run.get("spacing_um", []))),
                              ("spacing source", run.get("spacing_source", "?"))]
                             + [(_label(m), _fmt(s.get(m))) for m in STUDY_MEASURES if m in s]))
        sec.append("<p><b>Warnings:</b></p>" + _warnings_html(run.get("warnings") or []))
        if sid in bad_reviews:
            sec.append(f"<p class=\"note\"><b>Review:</b> {_esc(bad_reviews[sid])}</p>")
        if sid in thumbs:
            sec.append(_figure_html(thumbs[sid]))
        if (out / sid / REPORT_NAME).is_file():
            sec.append(f"<p class=\"note\">This sample has its own report: {_esc(sid)}/{REPORT_NAME}.</p>")
        sec.append("</section>")
        parts.append("".join(sec))
    parts.append("<h2 id=\"config\">Effective configuration</h2>" + _config_html(batch.get("config")))
    parts.append("<h2 id=\"sources\">Sources</h2>" + _sources_html())
    return _page(f"vesselflow study report: {out.name}", "\n".join(parts)), rendered + list(thumbs.values())
