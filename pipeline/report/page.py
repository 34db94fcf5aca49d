"""The HTML page: figures rendered and embedded, and the page's sections built as text.

In: figures, tables and a sample's or study's data. Out: self-contained HTML (base64 PNG figures,
inline styles, a Content-Security-Policy that forbids loading anything else).
"""

from __future__ import annotations

import base64
import datetime as _dt
import io
import math
import os
from dataclasses import dataclass

import pandas as pd

from ._common import _DPI, _bool_col, _esc, _fmt, _kv_table, _num, _table, _text_col
from .plausibility import (
    DIRECTION_CONFIDENCE_MIN, _flow_cfg, flow_uncertainty, plausibility_checks, plausibility_messages,
)
from .overview import format_number, readable_table


@dataclass
class _Rendered:
    """One figure rendered in memory."""

    name: str
    title: str
    caption: str
    png: bytes
    svg: bytes


def _render(fig, name, title, caption):
    import logging

    import matplotlib

    png, svg = io.BytesIO(), io.BytesIO()
    # Tick labels such as 10^-3 are set as mathematics, in the page's own
    # font; where a font installation lacks matplotlib's display fonts it
    # falls back to DejaVu Sans and logs each fallback on the terminal, which
    # says nothing to a reader of the report.
    fonts = logging.getLogger("matplotlib.font_manager")
    level = fonts.level
    fonts.setLevel(logging.ERROR)
    try:
        with matplotlib.rc_context({"mathtext.fontset": "dejavusans"}):
            fig.savefig(png, format="png", dpi=_DPI, metadata={"Software": None})
            # A fixed hash salt and no date keep the SVG identical from run to run.
            with matplotlib.rc_context({"svg.hashsalt": "vesselflow", "svg.fonttype": "path"}):
                fig.savefig(svg, format="svg", metadata={"Date": None})
    finally:
        fonts.setLevel(level)
    return _Rendered(name=name, title=title, caption=caption, png=png.getvalue(), svg=svg.getvalue())


# --------------------------------------------------------------------------- HTML


_CSS = """
body{font-family:"DejaVu Sans",Arial,Helvetica,sans-serif;margin:2em auto;max-width:1100px;color:#1a1a1a;
line-height:1.4;padding:0 1em;overflow-wrap:break-word}
h1{font-size:1.6em;margin-bottom:.2em}h2{border-bottom:2px solid #0072B2;padding-bottom:.2em;margin-top:1.6em}
.caution{border-left:6px solid #D55E00;background:#fff4ec;padding:.6em 1em;margin:1em 0}
table{border-collapse:collapse;margin:.5em 0;font-size:.85em}
th,td{border:1px solid #c8c8c8;padding:.2em .5em;text-align:left;vertical-align:top;overflow-wrap:anywhere}
thead th{background:#eef3f8}table.kv th{background:#f6f6f6;font-weight:normal;color:#333;min-width:10em}
tr.low-q td{background:#fff7d6}tr.flag td{background:#fdf0ea}
figure{margin:1em 0;page-break-inside:avoid}figure img{max-width:100%;height:auto;border:1px solid #ddd}
figcaption{font-size:.85em;color:#333;margin-top:.3em}
.grid{display:flex;flex-wrap:wrap;gap:1em}.grid figure{flex:1 1 460px;margin:0}
pre{background:#f6f6f6;padding:.6em;overflow-x:auto;font-size:.8em}
.note{font-size:.85em;color:#444}ul.warn li{color:#7a3300}nav a{margin-right:1em}
.muted{color:#666}.scroll{overflow-x:auto;max-width:100%}
.overview{background:#f3f8fc;border-left:6px solid #0072B2;padding:.3em 1em;margin:1em 0}
table.summary td.num,table.classes td.num{text-align:right;font-variant-numeric:tabular-nums}
.groups{display:flex;flex-wrap:wrap;gap:0 2em}.group{flex:1 1 420px;min-width:0}table.summary{width:100%}
details{margin:.6em 0}summary{cursor:pointer;color:#0b4f7a}
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
    from ..review import REVIEW_FILE, check_review
    from ..tables import Result

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
            "in order_connectivity.csv).</p>" + readable_table(data.orders) + ratios)


def _plausibility_html(data, fig):
    """The flow plausibility section: warnings, the checked statistics, the class table and the figure."""
    from ..flow import DIAMETER_CLASSES

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
             "members whose flow runs the way of the estimate (direction confidence). Wide intervals and low "
             "confidence mark the flows the image does not pin down.</p>",
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


# The flagged junctions listed on the page, most severe first: a reader
# works down the top of the queue; the CSV holds the rest.
_MAX_TABLE_ROWS = 50
# Their columns and headings (words wrap; the page fits 1300 px).
_FLAGGED_COLUMNS = {"node_id": "node", "severity": "severity", "flow_pattern": "flow pattern", "level": "level",
                    "radius_parent_um": "parent r (µm)", "radius_daughter1_um": "daughter 1 r (µm)",
                    "radius_daughter2_um": "daughter 2 r (µm)", "murray_ratio": "Murray ratio",
                    "murray_exponent": "exponent", "angle_deviation_deg": "angle deviation (°)",
                    "flag_reasons": "reasons"}


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
        from ..bifurcations import UNCERTAIN_CODES

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
    cols = [c for c in _FLAGGED_COLUMNS if c in fl.columns]
    fl, note = _review_table(fl[cols].copy(), review)
    for c in cols:
        if c == "severity":
            fl[c] = [_severity_text(v) for v in fl[c]]
        elif c == "flag_reasons":
            fl[c] = _text_col(fl, c).str.replace(";", ", ").str.replace("_", " ")
        elif c in ("node_id", "level"):
            fl[c] = [format_number(v, "n") for v in fl[c]]
        elif c != "flow_pattern":
            fl[c] = [format_number(v) for v in fl[c]]
    fl = fl.rename(columns=_FLAGGED_COLUMNS)
    full = ("<a href=\"bifurcations.csv\">bifurcations.csv</a> (beside this page) has every junction with all "
            "its columns")
    shown = (f"<p class=\"note\">The {len(fl)} flagged junctions, most severe first; {full}.</p>"
             if len(fl) <= _MAX_TABLE_ROWS else
             f"<p class=\"note\">The {_MAX_TABLE_ROWS} most severe of {len(fl)} flagged junctions; {full} "
             "(column flagged).</p>")
    parts.append("<h3>Flagged junctions</h3>" + (f"<p class=\"note\">{_esc(note)}</p>" if note else "") + shown
                 + _table(fl, classes="bif", max_rows=_MAX_TABLE_ROWS))
    return "".join(parts)
