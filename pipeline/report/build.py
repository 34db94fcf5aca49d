"""Building a report in a result or batch folder, and publishing it atomically.

In: a sample or batch folder. Out: ``report.html`` and ``figures/`` in it, written into a
temporary sibling folder and moved into place, ``report.html`` last.
"""

from __future__ import annotations

import json
import os
import shutil
import warnings
from pathlib import Path
from urllib.parse import quote

import numpy as np
import pandas as pd

from .._version import __version__
from ..errors import InputError, VesselflowError
from ._common import (
    FIGURE_DIR, REPORT_NAME, STUDY_MEASURES, _CAUTION, _LOW_Q, _SECTION_FIGURES, _anchor, _esc, _fmt, _kv_table,
    _fmt_q, _label, _num, _table,
)
from .overview import flow_record_html, format_number, grouped_summary_html, overview_html, readable_table
from .sample import figure_map_level, load_sample, sample_figures
from .study import _COMPARISON_SHOWN, _network_exponent_html, study_figures
from .page import (
    _bifurcation_html, _checked_review, _config_html, _figure_html, _generated, _orders_html, _page,
    _plausibility_html, _render, _render_all, _sources_html, _uncertainty_html, _warnings_html,
)


# --------------------------------------------------------------------------- entry point


def build_report(outdir, *, mask_path=None, overwrite=False, sample_reports=False, **renamed) -> Path:
    """Build ``report.html`` and ``figures/`` for a sample or a batch folder.

    Parameters
    ----------
    outdir : str or Path
        A result folder written by ``vesselflow analyze`` (has ``run.json``
        and ``segments.csv``) or a batch folder (has ``cohort_summary.csv``).
    mask_path : str or Path, optional
        The mask file for the projection map of a sample; default: the input
        recorded in ``run.json``. When neither can be read the map is drawn
        from the centrelines alone and the report says so. Not accepted for a
        batch folder.
    overwrite : bool
        Replace an existing report (``report.html`` and ``figures/``).
    sample_reports : bool, keyword-only
        For a batch folder: also build every sample's own report (in its
        result folder, replaced only with ``overwrite``), which the study
        page then links. Ignored for a sample folder.
    **renamed
        ``mask``, the earlier name of ``mask_path`` (deprecated: a
        FutureWarning, once).

    Returns
    -------
    Path
        The written ``report.html``.

    Raises
    ------
    InputError
        If ``outdir`` is not a sample or batch folder, is incomplete, already
        holds a report and ``overwrite`` is False, ``mask_path`` cannot be read, or
        a sample folder's ``review.csv`` is invalid
        (:func:`pipeline.review.check_review`). Nothing is written then.
    """
    mask_path = _renamed_mask(mask_path, renamed)
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
                         "pass overwrite=True to replace them")
    if kind == "batch":
        if mask_path is not None:
            raise InputError("applies to one sample; a batch folder reads each sample's own", param="mask_path")
        if sample_reports:
            _sample_reports(out, overwrite=overwrite)
        page, figures = _study_report(out)
    else:
        page, figures = _sample_report(out, mask=mask_path)
    return _publish(out, page, figures)


def _sample_reports(out, *, overwrite):
    """Every sample folder of a batch gets its own report; refused, before any is built, where one would be replaced."""
    cohort = _read_table(out / "cohort_summary.csv", ("sample_id", "group"), "cohort summary")
    folders = [out / str(sid) for sid in cohort["sample_id"]]
    folders = [f for f in folders if f.is_dir() and _folder_kind(f) == "sample"]
    taken = [f for f in folders if (f / REPORT_NAME).exists() or (f / FIGURE_DIR).exists()]
    if taken and not overwrite:
        raise InputError(f"report: {len(taken)} sample folder(s) already have a report (first: '{taken[0]}'); "
                         "pass overwrite=True to replace them")
    for f in folders:
        _publish(f, *_sample_report(f, mask=None))


def _folder_kind(out):
    if (out / "cohort_summary.csv").is_file():
        return "batch"
    if (out / "run.json").is_file() and (out / "segments.csv").is_file():
        return "sample"
    return None


def _publish(out, page, figures):
    """Write the report atomically: temp sibling folder, then renames, page last.

    On any failure the earlier report, if there was one, is put back and
    nothing new is left behind.
    """
    from ..tables import clean_stale_partials, make_partial_dir, storage_error

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


def _renamed_mask(mask_path, renamed):
    """``mask_path``, or the value given under its earlier name ``mask`` (with a FutureWarning)."""
    unknown = sorted(set(renamed) - {"mask"})
    if unknown:
        raise TypeError(f"build_report() got an unexpected keyword argument '{unknown[0]}'")
    if "mask" not in renamed:
        return mask_path
    if mask_path is not None:
        raise TypeError("build_report(): give mask_path, not both mask_path and mask")
    warnings.warn("build_report(mask=...) is now build_report(mask_path=...), the name the viewer and "
                  "pipeline.tables use; 'mask' will go in a later version", FutureWarning, stacklevel=3)
    return renamed["mask"]


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
             overview_html(summary, flow_solved=bool((run.get("flow") or {}).get("solved"))),
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
    parts.append("<h2 id=\"summary\">Summary</h2>" + grouped_summary_html(summary))
    parts.append("<h2 id=\"figures\">Figures</h2>")
    parts.append("<div class=\"grid\">" + "".join(_figure_html(r, anchor=f"fig-{r.name}") for r in rendered
                                               if r.name not in _SECTION_FIGURES) + "</div>")
    own = {r.name: r for r in rendered if r.name in _SECTION_FIGURES}
    parts.append("<h2 id=\"plausibility\">Flow plausibility</h2>"
                 + _plausibility_html(data, own.get("flow_plausibility")))
    parts.append("<h2 id=\"uncertainty\">Uncertainty of the flows</h2>"
                 + _uncertainty_html(data, own.get("flow_intervals")))
    parts.append("<h2 id=\"levels\">Branching levels</h2>"
                 + (readable_table(data.levels) if not data.levels.empty else "<p>No levels.</p>"))
    parts.append("<h2 id=\"orders\">Diameter-defined Strahler orders</h2>" + _orders_html(data))
    parts.append("<h2 id=\"bifurcations\">Bifurcations</h2>"
                 + _bifurcation_html(data.bifurcations, review, summary))
    flow = run.get("flow") or {}
    if flow:
        parts.append("<h2 id=\"flow\">Flow model</h2>" + flow_record_html(flow))
    parts.append("<h2 id=\"config\">Effective configuration</h2><details><summary>Every option the analysis "
                 "ran with (YAML, as a config file takes it)</summary>" + _config_html(run.get("config")) + "</details>")
    counts = run.get("counts") or {}
    timings = run.get("timings_s") or {}
    parts.append("<h2 id=\"run\">Run record</h2><details><summary>What each step removed or changed, and the "
                 "time it took</summary>"
                 + _kv_table([(k, _fmt(v) if not isinstance(v, list) else ", ".join(_fmt(x) for x in v))
                              for k, v in counts.items()]
                             + [(f"time: {k} (s)", _fmt(v)) for k, v in timings.items()]) + "</details>")
    parts.append("<h2 id=\"sources\">Sources</h2>" + _sources_html())
    return _page(f"vesselflow report: {data.name}", "\n".join(parts)), rendered


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


def _read_study(out):
    """The batch folder's tables and batch record.

    Returns
    -------
    cohort : DataFrame
        One row per sample, at least one.
    comparison, failures, bookkeeping : DataFrame or None
        None where the file is missing.
    batch : dict
        ``batch.json``; empty when it is missing.
    """
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
    return cohort, comparison, failures, bookkeeping, batch


def _study_samples(out, cohort, notes):
    """Every sample of the cohort, read; what is wrong with one is added to ``notes``.

    Returns
    -------
    samples : list of (str, str, SampleData or None)
        Sample id, group, and the sample (None where its folder is missing
        or incomplete), in the cohort's order.
    bad_reviews : dict of str to str
        The note on each sample whose review is not valid.
    """
    samples = []
    bad_reviews = {}
    for _, row in cohort.iterrows():
        sid = str(row["sample_id"])
        folder = out / sid
        try:
            sd = load_sample(folder)  # with the mask's projection, for the sample's map
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
    return samples, bad_reviews


def _thumbnails(samples):
    """Rendered centreline map of every sample with centrelines, by sample id."""
    thumbs = {}
    for sid, _, sd in samples:
        if sd is not None and sd.centrelines:
            fig = figure_map_level(sd, [])
            thumbs[sid] = _render(fig, f"sample_{_anchor(sid)[2:]}_map_level", f"{sid}: centrelines by level",
                                  "The mask projected along z (grey) with the centrelines coloured by branching "
                                  "level; circles: flagged bifurcations by node id. Where the sample's mask could "
                                  "not be read, the title says so and the map shows the centrelines alone.")
    return thumbs


def _study_header(out, cohort, batch):
    """Title, provenance, caution and navigation of the study page; list of HTML pieces."""
    groups = sorted(cohort["group"].astype(str).unique())
    return [f"<h1>vesselflow study report: {_esc(out.name)}</h1>",
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


def _samples_html(samples):
    """The samples-and-inputs section: a row per sample and links to the samples' sections."""
    srows = []
    for sid, grp, sd in samples:
        run = sd.run if sd is not None else {}
        srows.append({"sample": sid, "group": grp, "mask file": (run.get("input") or {}).get("path", "–"),
                      "spacing (dz, dy, dx) µm": ", ".join(_fmt(s, 4) for s in run.get("spacing_um", [])) or "–",
                      "spacing source": run.get("spacing_source", "–"),
                      "warnings": len(run.get("warnings") or []) if sd is not None else "–",
                      "version": run.get("vesselflow_version", "–")})
    stab = pd.DataFrame(srows)
    return ("<h2 id=\"samples\">Samples and inputs</h2>" + _table(stab)
            + "<p>" + " ".join(f"<a href=\"#{_anchor(sid)}\">{_esc(sid)}</a>" for sid, _, _ in samples)
            + "</p>")


def _comparison_html(comparison, bookkeeping, cohort):
    """The group-comparison section, low q-values highlighted, and the bookkeeping columns; list of HTML pieces."""
    parts = ["<h2 id=\"comparison\">Group comparison</h2>"]
    if comparison is not None and not comparison.empty:
        comparison = _by_effect_size(comparison)
        low = [("low-q" if _num(q) < _LOW_Q else "") for q in comparison["q_value"]]
        shown = _comparison_table(comparison)
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
    return parts


def _comparison_table(comparison):
    """The comparison as shown: numbers at three significant digits, the shift with its interval in one cell.

    group_comparison.csv keeps every column (means, their difference, the
    interval's ends apart); the page keeps what fits a 1300 px window.
    """
    shown = comparison[[c for c, _ in _COMPARISON_SHOWN if c in comparison.columns]].copy()

    def text(v, c):
        if v is None or (isinstance(v, float) and v != v):
            return "–"
        if c in ("p_value", "q_value"):
            return _fmt_q(v)
        return format_number(v, "n" if c in ("n_a", "n_b") else "num")

    for c in shown.columns:
        if c not in ("label", "unit", "group_a", "group_b", "test_note"):
            shown[c] = [text(v, c) for v in shown[c]]
    if {"hodges_lehmann_shift", "hodges_lehmann_ci_low", "hodges_lehmann_ci_high"} <= set(comparison.columns):
        lo = [text(v, "") for v in comparison["hodges_lehmann_ci_low"]]
        hi = [text(v, "") for v in comparison["hodges_lehmann_ci_high"]]
        shown["hodges_lehmann_shift"] = [s if s == "–" else f"{s} [{a}, {b}]"
                                         for s, a, b in zip(shown["hodges_lehmann_shift"], lo, hi)]
    return shown.rename(columns=dict(_COMPARISON_SHOWN))


def _by_effect_size(comparison):
    """The comparison rows, largest effect first (|Cliff's δ|, then q); rows without an effect last."""
    if "cliffs_delta" not in comparison.columns:
        return comparison
    size = pd.to_numeric(comparison["cliffs_delta"], errors="coerce").abs()
    q = pd.to_numeric(comparison["q_value"], errors="coerce")
    order = np.lexsort((q.fillna(np.inf).to_numpy(), -size.fillna(-1.0).to_numpy()))
    return comparison.iloc[order].reset_index(drop=True)


# The cohort table on the page: one row per sample, the measures a reader
# compares first; cohort_summary.csv has every column.
_COHORT_SHOWN = ("length_density_mm_per_mm3", "vessel_volume_fraction", "junction_density_per_mm3",
                 "radius_median_um", "vessel_tortuosity_median", "murray_exponent_network", "murray_ratio_median",
                 "velocity_median_mm_s_capillary", "wss_median_pa_capillary", "perfused_length_fraction")


def _cohort_html(cohort):
    cols = [c for c in _COHORT_SHOWN if c in cohort.columns]
    shown = cohort[["sample_id", "group"] + cols].copy()
    for c in cols:
        shown[c] = [format_number(v, "pct" if c.endswith("fraction") else "num") for v in shown[c]]
    heads = {c: _label(c).replace(" (dimensionless)", "") for c in cols}
    heads.update({c: heads[c].replace("(1)", "(%)") + (" (%)" if c.endswith("fraction") and "%" not in heads[c]
                                                        else "") for c in cols if c.endswith("fraction")})
    shown = shown.rename(columns={"sample_id": "sample", **heads})
    return (f"<p>The measures compared first; cohort_summary.csv has all {cohort.shape[1]} columns.</p>"
            + _table(shown, classes="readable"))


def _shared_warnings(samples):
    """The samples' warnings, each said once: with the samples it concerns, or "every sample"."""
    by_text = {}
    read = [(sid, sd) for sid, _, sd in samples if sd is not None]
    for sid, sd in read:
        for w in dict.fromkeys(sd.run.get("warnings") or []):
            by_text.setdefault(w, []).append(sid)
    out = []
    for w, sids in by_text.items():
        if len(sids) == len(read) and len(read) > 1:
            out.append(f"every sample: {w}")
        elif len(sids) > 3:
            out.append(f"{len(sids)} samples ({', '.join(sids[:3])} and {len(sids) - 3} more): {w}")
        else:
            out.append(f"{', '.join(sids)}: {w}")
    return out


def _sample_section_html(out, sid, grp, sd, *, bad_reviews, thumbs):
    """One sample's section of the study page: inputs, measures, warnings, review and map."""
    sec = [f"<section id=\"{_esc(_anchor(sid))}\"><h3>{_esc(sid)} <span class=\"muted\">({_esc(grp)})</span>"
           "</h3>"]
    if sd is None:
        sec.append("<p>Result folder missing or incomplete (see the notes).</p></section>")
        return "".join(sec)
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
        # a link within the batch folder: opened from the page, nothing fetched into it
        href = f"{quote(sid)}/{REPORT_NAME}"
        sec.append(f"<p><a href=\"{_esc(href)}\">The full report of {_esc(sid)}</a> (its own page, in the "
                   "sample's folder).</p>")
    sec.append("</section>")
    return "".join(sec)


def _study_report(out):
    """The study page of a batch folder and its rendered figures."""
    cohort, comparison, failures, bookkeeping, batch = _read_study(out)
    notes = []
    if comparison is None:
        notes.append("group_comparison.csv is missing: no q-values are shown.")
    if failures is None:
        notes.append("failures.csv is missing: failed samples, if any, are not listed.")

    # Sample sections first: reading them finds folders that are missing.
    samples, bad_reviews = _study_samples(out, cohort, notes)

    figs = study_figures(cohort, comparison)
    thumbs = _thumbnails(samples)
    rendered = _render_all(figs)
    parts = _study_header(out, cohort, batch)
    parts.append(_samples_html(samples))
    allw = _shared_warnings(samples)
    parts.append("<h2 id=\"warnings\">Warnings and notes</h2><h3>From the analyses</h3>" + _warnings_html(allw)
                 + "<h3>From the report</h3>" + _warnings_html(notes))
    parts.append("<h2 id=\"measures\">Measures by group</h2><div class=\"grid\">"
                 + "".join(_figure_html(r, anchor=f"fig-{r.name}") for r in rendered
                           if r.name != "study_network_exponent") + "</div>")
    parts.append("<h2 id=\"network-exponent\">Network Murray exponent</h2>"
                 + "".join(_figure_html(r, anchor=f"fig-{r.name}") for r in rendered
                           if r.name == "study_network_exponent") + _network_exponent_html(cohort))
    parts += _comparison_html(comparison, bookkeeping, cohort)
    parts.append("<h2 id=\"failures\">Failed samples</h2>"
                 + (_table(failures) if failures is not None and not failures.empty else "<p>None.</p>"))
    parts.append("<h2 id=\"cohort\">Cohort summary</h2>" + _cohort_html(cohort))
    parts.append("<h2 id=\"per-sample\">Per sample</h2>")
    for sid, grp, sd in samples:
        parts.append(_sample_section_html(out, sid, grp, sd, bad_reviews=bad_reviews, thumbs=thumbs))
    parts.append("<h2 id=\"config\">Effective configuration</h2>" + _config_html(batch.get("config")))
    parts.append("<h2 id=\"sources\">Sources</h2>" + _sources_html())
    return _page(f"vesselflow study report: {out.name}", "\n".join(parts)), rendered + list(thumbs.values())
