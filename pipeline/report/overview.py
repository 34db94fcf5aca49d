"""A sample's summary for readers: a plain-language overview and the measures grouped by topic.

In: ``summary.json`` (a dict) and the flow's plausibility ranges
(decided by :func:`pipeline.report.plausibility.plausibility_checks`). Out: HTML: :func:`overview_html`, a few
sentences on what was measured, how much of the network the flow model
perfuses and what lies outside physiological ranges (and why that matters);
:func:`grouped_summary_html`, the measures in tables by topic (morphology,
topology, tortuosity, flow, bifurcations, orders)
with readable labels, units and number formats (pressures also in mmHg).
Keys no table names are listed last under their ``summary.json`` names, so
nothing is hidden.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

from ..flow.boundary import PA_PER_MMHG
from ..flow.plausibility import plausibility_warnings
from ._common import _esc
from .plausibility import plausibility_checks

__all__ = ["overview_html", "grouped_summary_html", "format_number", "SUMMARY_GROUPS"]

# (summary key, label, unit, style); styles: "n" a count, "pct" a fraction
# shown in per cent, "num" a number, "pa" a pressure in Pa (mmHg beside it),
# "text" as it is.
SUMMARY_GROUPS: tuple[tuple[str, tuple[tuple[str, str, str, str], ...]], ...] = (
    ("Morphology", (
        ("total_length_mm", "Total vessel length", "mm", "num"),
        ("imaged_volume_mm3", "Imaged tissue volume", "mm³", "num"),
        ("vessel_volume_mm3", "Vessel volume", "mm³", "num"),
        ("vessel_volume_fraction", "Vessel volume fraction", "%", "pct"),
        ("length_density_mm_per_mm3", "Length density", "mm/mm³", "num"),
        ("radius_median_um", "Radius, median", "µm", "num"),
        ("radius_mean_um", "Radius, mean", "µm", "num"),
        ("radius_sd_um", "Radius, standard deviation", "µm", "num"),
        ("radius_p10_um", "Radius, 10th percentile", "µm", "num"),
        ("radius_p90_um", "Radius, 90th percentile", "µm", "num"),
        ("radius_length_weighted_mean_um", "Radius, length-weighted mean", "µm", "num"),
        ("tissue_distance_median_um", "Tissue to nearest vessel, median", "µm", "num"),
        ("tissue_distance_p95_um", "Tissue to nearest vessel, 95th percentile", "µm", "num"),
    )),
    ("Topology", (
        ("segments", "Segments", "", "n"),
        ("nodes", "Nodes", "", "n"),
        ("junctions", "Junctions", "", "n"),
        ("blind_ends", "Blind ends (inside the volume)", "", "n"),
        ("border_ends", "Ends cut by the volume", "", "n"),
        ("loop_nodes", "Nodes of closed loops without ends", "", "n"),
        ("components", "Connected pieces", "", "n"),
        ("loops", "Independent loops (cycle rank)", "", "n"),
        ("junction_density_per_mm3", "Junction density", "per mm³", "num"),
        ("endpoint_density_per_mm3", "End density", "per mm³", "num"),
        ("roots", "Root nodes of the branching levels", "", "text"),
        ("segments_without_level", "Segments without a level", "", "n"),
    )),
    ("Tortuosity", (
        ("tortuosity_mean", "Segment distance metric (length / chord), mean", "", "num"),
        ("soam_mean_rad_per_um", "Segment sum of angles, mean", "rad/µm", "num"),
        ("n_vessels", "Vessels (segments chained through junctions)", "", "n"),
        ("vessel_tortuosity_median", "Vessel distance metric, median", "", "num"),
        ("vessel_tortuosity_mean", "Vessel distance metric, mean", "", "num"),
        ("n_vessels_tortuosity_defined", "Vessels with a distance metric", "", "n"),
        ("vessel_soam_median_rad_per_um", "Vessel sum of angles, median", "rad/µm", "num"),
        ("vessel_soam_mean_rad_per_um", "Vessel sum of angles, mean", "rad/µm", "num"),
        ("n_vessels_soam_defined", "Vessels long enough for a sum of angles", "", "n"),
    )),
    ("Flow (model estimate)", (
        ("boundary", "Boundary conditions", "", "text"),
        ("perfused_length_fraction", "Perfused share of the vessel length", "%", "pct"),
        ("total_inflow_nl_min", "Total inflow", "nL/min", "num"),
        ("inlet_pressure_pa", "Mean inlet pressure", "Pa", "pa"),
        ("outlet_pressure_pa", "Mean outlet pressure", "Pa", "pa"),
        ("network_resistance_pa_s_um3", "Network resistance", "Pa·s/µm³", "num"),
        ("n_inlets", "Inlets", "", "n"),
        ("n_outlets", "Outlets", "", "n"),
        ("n_perfused_segments", "Perfused segments", "", "n"),
        ("velocity_median_mm_s", "Mean speed, median over perfused segments", "mm/s", "num"),
        ("velocity_max_mm_s", "Mean speed, fastest segment", "mm/s", "num"),
        ("wss_median_pa", "Wall shear stress, median", "Pa", "num"),
        ("wss_p99_pa", "Wall shear stress, 99th percentile", "Pa", "num"),
        ("max_conservation_residual", "Largest relative conservation residual", "", "num"),
    )),
    ("Bifurcations", (
        ("bifurcations", "Bifurcations (junctions of three or more)", "", "n"),
        ("bifurcations_flagged", "In the review queue (flagged)", "", "n"),
        ("bifurcations_uncertain", "Too uncertain to judge", "", "n"),
        ("bifurcations_low_confidence", "Low confidence", "", "n"),
        ("multifurcations", "Multifurcations (four or more vessels)", "", "n"),
        ("bifurcations_diverging", "Diverging (one inflow)", "", "n"),
        ("bifurcations_converging", "Converging (one outflow)", "", "n"),
        ("bifurcations_mixed", "Mixed flow", "", "n"),
        ("bifurcations_unsolved", "Without flow", "", "n"),
        ("fraction_within_tolerance", "Within Murray's law tolerance (of those judged)", "%", "pct"),
        ("murray_exponent_network", "Network Murray exponent (3 in Murray's law)", "", "num"),
        ("murray_exponent_network_ci_low", "Network exponent, 95 % interval, low", "", "num"),
        ("murray_exponent_network_ci_high", "Network exponent, 95 % interval, high", "", "num"),
        ("murray_exponent_network_junctions", "Junctions in the network fit", "", "n"),
        ("murray_exponent_network_note", "Network fit note", "", "text"),
        ("murray_ratio_median", "Murray ratio (r1³+r2³)/r0³, median (1 in Murray's law)", "", "num"),
        ("murray_ratio_q25", "Murray ratio, 25th percentile", "", "num"),
        ("murray_ratio_q75", "Murray ratio, 75th percentile", "", "num"),
        ("murray_exponent_median", "Junction exponent, median", "", "num"),
        ("murray_exponents_undefined", "Junctions without an exponent", "", "n"),
        ("flow_split_error_median", "Flow split against the cube law, median error", "", "num"),
        ("junctions_skipped", "Junctions skipped (fewer than three vessels)", "", "n"),
    )),
    ("Diameter-defined Strahler orders", (
        ("n_orders", "Orders", "", "n"),
        ("horton_ratio_number", "Horton number ratio", "", "num"),
        ("horton_ratio_diameter", "Horton diameter ratio", "", "num"),
        ("horton_ratio_length", "Horton length ratio", "", "num"),
    )),
)

# The flow statistics by diameter class (shown under Flow plausibility): (key prefix, column label, unit)
_CLASS_COLUMNS = (
    ("n_perfused", "perfused segments", ""),
    ("perfused_length_um", "perfused length", "µm"),
    ("velocity_median_mm_s", "speed, median", "mm/s"),
    ("velocity_p95_mm_s", "speed, 95th percentile", "mm/s"),
    ("wss_median_pa", "wall shear stress, median", "Pa"),
    ("wss_p99_pa", "wall shear stress, 99th percentile", "Pa"),
)
_CLASSES = (("capillary", "capillary"), ("small", "small vessels"), ("large", "large vessels"))


def format_number(v: Any, style: str = "num") -> str:
    """A value as a reader wants it: thousands grouped, three significant digits, no exponent in everyday ranges.

    Parameters
    ----------
    v : object
        A number, None, bool, list or text.
    style : {'num', 'n', 'pct', 'pa', 'text'}

    Returns
    -------
    str
        '–' for None and non-finite numbers.
    """
    if v is None:
        return "–"
    if isinstance(v, bool):
        return "yes" if v else "no"
    if isinstance(v, (list, tuple)):
        return ", ".join(format_number(x, style) for x in v) or "–"
    if style == "text" or isinstance(v, str):
        return str(v).replace("_", " ")
    try:
        x = float(v)
    except (TypeError, ValueError):
        return str(v)
    if not math.isfinite(x):
        return "–"
    if style == "n":
        return f"{int(round(x)):,}"
    if style == "pct":
        return _sig(100.0 * x)
    if style == "pa":
        return f"{_sig(x)} ({_sig(x / PA_PER_MMHG)} mmHg)"
    return _sig(x)


def _sig(x: float) -> str:
    """Three significant digits; grouped thousands above 1,000; exponent only below 0.001."""
    if x == 0:
        return "0"
    a = abs(x)
    if a >= 1000:
        return f"{x:,.0f}"
    if a >= 0.001:
        digits = max(0, 2 - int(math.floor(math.log10(a))))
        text = f"{x:.{digits}f}"
        return text.rstrip("0").rstrip(".") if "." in text else text
    return f"{x:.2g}".replace("e-0", "e-")


def _rows_html(rows):
    body = "".join(f"<tr><th>{_esc(label)}</th><td class=\"num\">{_esc(value)}</td><td>{_esc(unit)}</td></tr>"
                   for label, value, unit in rows)
    return ("<div class=\"scroll\"><table class=\"kv summary\"><thead><tr><th>measure</th><th>value</th>"
            f"<th>unit</th></tr></thead><tbody>{body}</tbody></table></div>")


def _flat(summary: Mapping[str, Any]) -> dict[str, Any]:
    out = {}
    for k, v in summary.items():
        if isinstance(v, Mapping):
            for kk, vv in v.items():
                out[f"{k}.{kk}"] = vv
        else:
            out[k] = v
    return out


def grouped_summary_html(summary: Mapping[str, Any]) -> str:
    """``summary.json`` as tables by topic, with labels, values and units.

    Parameters
    ----------
    summary : mapping
        A sample's ``summary.json``.

    Returns
    -------
    str
        HTML: one ``<h3>`` and table per topic that has a value (side by
        side where the page is wide enough), a pointer to the flow by
        diameter class (under Flow plausibility, with its published ranges),
        and the remaining keys (``<details>``, folded).
    """
    flat = _flat(summary)
    shown = set()
    groups = []
    for group, fields in SUMMARY_GROUPS:
        rows = []
        for key, label, unit, style in fields:
            if key in flat:
                shown.add(key)
                rows.append((label, format_number(flat[key], style), unit))
        if rows:
            groups.append(f"<div class=\"group\"><h3>{_esc(group)}</h3>" + _rows_html(rows) + "</div>")
    parts = ["<div class=\"groups\">" + "".join(groups) + "</div>"]
    by_class = {f"{key}_{cls}" for key, _, _ in _CLASS_COLUMNS for cls, _ in _CLASSES}
    if by_class & set(flat):
        # shown with the published ranges under Flow plausibility
        parts.append("<p class=\"note\">Speeds and wall shear stresses by diameter class, beside their published "
                     "ranges: <a href=\"#plausibility\">Flow plausibility</a>.</p>")
        shown |= by_class
    rest = [(k, format_number(v), "") for k, v in flat.items() if k not in shown]
    if rest:
        parts.append("<details><summary>Every other measure, as named in summary.json "
                     f"({len(rest)})</summary>" + _rows_html(rest) + "</details>")
    return "\n".join(parts)


def _range_sentence(summary: Mapping[str, Any]) -> list[str]:
    """A sentence per flow statistic outside its published range, as :func:`plausibility_checks` decides it."""
    out = []
    for c in plausibility_checks(summary):
        if c["verdict"] not in ("above", "below"):
            continue
        unit = c["unit"]
        out.append(f"The {c['what']} is {_sig(c['value'])} {unit}, outside the {_sig(c['low'])}-{_sig(c['high'])} "
                   f"{unit} expected ({c['source']}). Model flows this far from physiology usually mean boundary "
                   "conditions or radii that do not fit the tissue: read the flows and shear stresses as relative, "
                   "not absolute.")
    return out


def overview_html(summary: Mapping[str, Any], *, flow_solved: bool) -> str:
    """A few plain sentences on the sample: what was measured, the flow model's reach, what is out of range.

    Parameters
    ----------
    summary : mapping
        A sample's ``summary.json``.
    flow_solved : bool, keyword-only
        Whether the flow model ran.

    Returns
    -------
    str
        HTML: a ``<div class="overview">`` of short paragraphs.
    """
    s = summary
    p = []
    if s.get("total_length_mm") is not None:
        text = (f"This sample holds {_sig(s['total_length_mm'])} mm of vessel centreline in "
                f"{_sig(s.get('imaged_volume_mm3') or math.nan)} mm³ of imaged tissue")
        if s.get("vessel_volume_fraction") is not None:
            text += f" ({format_number(s['vessel_volume_fraction'], 'pct')} % of it vessel)"
        text += (f", as {format_number(s.get('segments'), 'n')} segments meeting at "
                 f"{format_number(s.get('junctions'), 'n')} junctions in {format_number(s.get('components'), 'n')} "
                 f"connected piece{'' if s.get('components') == 1 else 's'} with "
                 f"{format_number(s.get('loops'), 'n')} independent loops.")
        if s.get("radius_median_um") is not None:
            text += (f" The median vessel radius is {_sig(s['radius_median_um'])} µm (10th to 90th percentile "
                     f"{_sig(s.get('radius_p10_um') or math.nan)}-{_sig(s.get('radius_p90_um') or math.nan)} µm).")
        p.append(text)
    if flow_solved and s.get("perfused_length_fraction") is not None:
        text = (f"The flow model, an estimate from the geometry and not a measurement, perfuses "
                f"{format_number(s['perfused_length_fraction'], 'pct')} % of the vessel length")
        if s.get("velocity_median_mm_s_capillary") is not None:
            text += (f"; blood in capillaries moves at a median {_sig(s['velocity_median_mm_s_capillary'])} mm/s "
                     f"and the 99th percentile of the wall shear stress is {_sig(s.get('wss_p99_pa') or math.nan)} Pa")
        text += "."
        if plausibility_warnings({"perfused_length_fraction": s["perfused_length_fraction"]}):
            text += (" Less than half of the network carries flow in the model, so its flow statistics describe "
                     "only part of the sample.")
        out_of_range = _range_sentence(s)
        text += (" " + " ".join(out_of_range)) if out_of_range else (
            " Speeds and shear stresses lie within the physiological ranges the report checks "
            "(see Flow plausibility).")
        p.append(text)
    elif not flow_solved:
        p.append("The flow model was not run for this sample.")
    if s.get("bifurcations") is not None:
        text = (f"{format_number(s.get('bifurcations_flagged'), 'n')} of {format_number(s['bifurcations'], 'n')} "
                "bifurcations are in the review queue (their departure from Murray's law is larger than their "
                "measured radius uncertainty explains)")
        if s.get("bifurcations_uncertain"):
            text += (f"; {format_number(s['bifurcations_uncertain'], 'n')} have radii too uncertain to judge and are "
                     "left out of it")
        text += "."
        x = s.get("murray_exponent_network")
        if x is not None:
            lo, hi = s.get("murray_exponent_network_ci_low"), s.get("murray_exponent_network_ci_high")
            ci = f" (95 % interval {_sig(lo)}-{_sig(hi)})" if lo is not None and hi is not None else ""
            text += (f" The network's Murray exponent is {_sig(x)}{ci} over "
                     f"{format_number(s.get('murray_exponent_network_junctions'), 'n')} junctions; Murray's law "
                     "predicts 3.")
        elif s.get("murray_exponent_network_note") == "too_few_junctions":
            text += " Too few junctions could be judged for a network Murray exponent."
        p.append(text)
    return "<div class=\"overview\">" + "".join(f"<p>{_esc(t)}</p>" for t in p) + "</div>"


# The flow step's record (run.json "flow"): (key, label, unit, style)
_FLOW_RECORD = (
    ("boundary", "Boundary conditions", "", "text"),
    ("inlet_pressure_pa", "Mean pressure at the inflowing ends", "Pa", "pa"),
    ("outlet_pressure_pa", "Mean pressure at the outflowing ends", "Pa", "pa"),
    ("viscosity_model", "Viscosity law", "", "text"),
    ("haematocrit_model", "Haematocrit model", "", "text"),
    ("solver", "Linear solver", "", "text"),
    ("solver_iterations", "Solver iterations", "", "n"),
    ("solver_residual", "Solver residual", "", "num"),
    ("rheology_iterations", "Flow-haematocrit-viscosity iterations", "", "n"),
    ("rheology_converged", "Converged", "", "text"),
    ("rheology_flow_change", "Last relative flow change", "", "num"),
    ("rheology_haematocrit_change", "Last haematocrit change", "", "num"),
    ("red_cell_conservation_residual", "Red-cell flux conservation residual", "", "num"),
    ("rheology_parked_segments", "Segments held at their last flow (kept reversing)", "", "n"),
    ("n_unknowns", "Unknown pressures", "", "n"),
    ("n_sealed", "Sealed ends", "", "n"),
    ("n_unsolved_components", "Pieces without flow (touching no boundary)", "", "n"),
)

# Column headings of the per-level and per-order tables: (column, heading)
_TABLE_HEADINGS = {
    "level": "level", "order": "order", "n_segments": "segments", "n_elements": "elements",
    "radius_mean_um": "radius, mean (µm)", "radius_sd_um": "radius, SD (µm)",
    "diameter_mean_um": "diameter, mean (µm)", "diameter_sd_um": "diameter, SD (µm)",
    "length_total_um": "length, total (µm)", "length_mean_um": "length, mean (µm)", "length_sd_um": "length, SD (µm)",
    "branching_ratio": "branching ratio", "radius_ratio": "radius ratio", "length_ratio": "length ratio",
    "n_bifurcations": "bifurcations", "murray_exponent_median": "junction exponent, median",
    "murray_exponents_undefined": "exponents undefined", "murray_ratio_median": "Murray ratio, median",
    "bifurcations_flagged_fraction": "flagged (%)",
}
_COUNT_COLUMNS = {"level", "order", "n_segments", "n_elements", "n_bifurcations", "murray_exponents_undefined"}


def flow_record_html(flow: Mapping[str, Any]) -> str:
    """The flow step's record (``run.json``, ``flow``) with labels and units; the rest folded."""
    rows, shown = [], {"solved"}
    for key, label, unit, style in _FLOW_RECORD:
        if key in flow:
            shown.add(key)
            rows.append((label, format_number(flow[key], style), unit))
    rest = [(k, format_number(v), "") for k, v in flow.items()
            if k not in shown and not any(k == f[0] for _, fields in SUMMARY_GROUPS for f in fields)
            and not any(k.startswith(p) for p, _, _ in _CLASS_COLUMNS)]
    out = _rows_html(rows)
    if rest:
        out += f"<details><summary>The rest of the record ({len(rest)})</summary>" + _rows_html(rest) + "</details>"
    return out


def readable_table(df) -> str:
    """A per-level or per-order table with headings in words and numbers as :func:`format_number` writes them."""
    from ._common import _table

    shown = df.copy()
    for c in shown.columns:
        style = "pct" if c.endswith("_fraction") else "n" if c in _COUNT_COLUMNS else "num"
        shown[c] = [format_number(v, style) for v in shown[c]]
    shown.columns = [_TABLE_HEADINGS.get(c, c) for c in shown.columns]
    return _table(shown, classes="readable")
