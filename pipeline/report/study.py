"""Figures and tables of a study: science measures per group, the network Murray exponent.

In: the cohort summary and group comparison tables of a batch folder. Out: box-and-point figures
per measure and the network exponent per sample and per group (:func:`network_exponent_table`).
"""

from __future__ import annotations

import math
import textwrap

import numpy as np
import pandas as pd

from ..batch import add_densities, hodges_lehmann_one_sample, science_measures
from ._common import NETWORK_EXPONENT_KEYS, OKABE_ITO, _col, _fmt_q, _label, _new_figure, _no_data, _num, _table
from .overview import format_number


# --------------------------------------------------------------------------- study figures

# Characters per line that fit the figure's width: the annotation lines over a
# plot (fontsize 9 on a 5.2 inch figure) and a group name under its box.
_TITLE_CHARS = 62
_TICK_CHARS = 12


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
    # long group names wrap onto several lines rather than run into each other
    ax.set_xticklabels([textwrap.fill(str(g), _TICK_CHARS) for g in groups])


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
        if len(groups) > 2:
            # Every pair of four groups is six lines over the plot: only the
            # comparisons with the first group are written there; the table
            # below the figures has them all.
            rows = rows[rows["group_a"].astype(str) == str(groups[0])]
        for _, r in rows.iterrows():
            shift = _num(r.get("hodges_lehmann_shift"))
            lo, hi = _num(r.get("hodges_lehmann_ci_low")), _num(r.get("hodges_lehmann_ci_high"))
            text = f"{r['group_b']} − {r['group_a']}"
            note = r.get("test_note")
            if not math.isfinite(_num(r.get("p_value"))) and isinstance(note, str) and note:
                lines.append(f"{text}: no test ({note})")
                continue
            # no-break spaces inside the interval and "q = ...": a wrapped line breaks between them
            if math.isfinite(shift):
                text += f" {format_number(shift)}" + (f" [{format_number(lo)},\u00a0{format_number(hi)}]"
                                                       if math.isfinite(lo) else "")
            lines.append(f"{text}, q\u00a0=\u00a0{_fmt_q(_num(r.get('q_value')))}")
    lines = [textwrap.fill(line, _TITLE_CHARS, subsequent_indent="  ") for line in lines]
    ax.set_title(_label(measure).split(" (")[0] + ("\n" + "\n".join(lines) if lines else ""), fontsize=9)
    ax.set_xlabel("group")
    ax.set_ylabel(_label(measure))
    ax.legend(fontsize=7, loc="best")
    return fig


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
                                             "group)." + (" With more than two groups the title has the "
                                                          f"comparisons with {groups[0]}; the table, every pair."
                                                          if len(groups) > 2 else ""))
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
                     ("hodges_lehmann_shift", "shift b − a [95 % interval]"),
                     ("hodges_lehmann_coverage", "coverage"), ("cliffs_delta", "Cliff's δ"), ("p_value", "p"),
                     ("q_value", "q"), ("test_note", "note"))
