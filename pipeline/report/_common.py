"""Constants, labels, number formatting and small figure helpers shared by the report's parts.

In: values, table columns, measure names. Out: text for the page (escaped, formatted), labels with units,
empty matplotlib figures and axes set up alike.
"""

from __future__ import annotations

import html
import math
import re

import numpy as np
import pandas as pd
from matplotlib.colors import BoundaryNorm, ListedColormap, to_rgba
from matplotlib.figure import Figure
from matplotlib.lines import Line2D
from matplotlib.ticker import FuncFormatter, LogLocator, NullFormatter

from ..batch import FALLBACK_MEASURES, SCIENCE_MEASURES

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

# Circling every flagged junction of a dense bed buries the map: the maps
# circle and number the most severe this many, and the table lists them all.
_MAX_NUMBERED = 40
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
    """A numeric column, or all-NaN when it is absent (for example when flow was not solved)."""
    if name in df.columns:
        return pd.to_numeric(df[name], errors="coerce").to_numpy(float)
    return np.full(len(df), np.nan)


def _text_col(df, name):
    """A text column as str, "" where missing (a column read back from CSV with no text at all is float NaN)."""
    if name not in df.columns:
        return pd.Series([""] * len(df), index=df.index, dtype=object)
    s = df[name]
    return s.astype(object).where(s.notna(), "").astype(str)


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


def _num(v):
    try:
        f = float(v)
    except (TypeError, ValueError):
        return float("nan")
    return f
