"""The sample report's words and numbers for readers (pipeline/report/overview.py)."""

import json
import re
import subprocess
import sys
from html.parser import HTMLParser

import numpy as np
import pytest

from pipeline import synthetic
from pipeline.cli import main
from pipeline.report.overview import SUMMARY_GROUPS, format_number, grouped_summary_html, overview_html


@pytest.mark.parametrize("value, style, text", [
    (12.619585, "num", "12.6"),
    (6017.4874, "num", "6,017"),
    (0.002097152, "num", "0.0021"),
    (3.97e-15, "num", "4e-15"),
    (0.154815, "pct", "15.5"),
    (1.0, "pct", "100"),
    (754, "n", "754"),
    (150203.7, "n", "150,204"),
    # 60 mmHg = 7999.32 Pa (1 mmHg = 133.322 Pa, the conventional value)
    (7999.32, "pa", "7,999 (60 mmHg)"),
    (None, "num", "–"),
    (float("nan"), "num", "–"),
    ("too_few_junctions", "text", "too few junctions"),
    (True, "text", "yes"),
])
def test_numbers_are_written_as_a_reader_wants_them(value, style, text):
    assert format_number(value, style) == text


class _Cells(HTMLParser):
    """The text of every table cell, per table, outside <details>."""

    def __init__(self):
        super().__init__()
        self.depth_details = 0
        self.tables, self.cell, self.in_cell = [], None, False

    def handle_starttag(self, tag, attrs):
        if tag == "details":
            self.depth_details += 1
        elif tag == "table" and not self.depth_details:
            self.tables.append([])
        elif tag in ("td", "th") and not self.depth_details and self.tables:
            self.in_cell, self.cell = True, ""

    def handle_endtag(self, tag):
        if tag == "details":
            self.depth_details -= 1
        elif tag in ("td", "th") and self.in_cell:
            self.tables[-1].append(self.cell.strip())
            self.in_cell = False

    def handle_data(self, data):
        if self.in_cell:
            self.cell += data


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    d = tmp_path_factory.mktemp("overview")
    mask, _ = synthetic.synthesize("bed", spacing=(1.0, 1.0, 1.0), seed=2)
    tif = d / "bed.tif"
    synthetic.write_volume(tif, mask, spacing=(1.0, 1.0, 1.0))
    out = d / "bed"
    assert main(["analyze", str(tif), "-o", str(out), "--quiet"]) == 0
    return out


def test_summary_tables_have_labels_and_units_not_raw_keys(sample):
    summary = json.loads((sample / "summary.json").read_text())
    page = grouped_summary_html(summary)
    p = _Cells()
    p.feed(page)
    cells = [c for t in p.tables for c in t]
    # every shown cell is words, a number or a unit: no summary.json key
    raw = [c for c in cells if re.fullmatch(r"[a-z0-9]+(_[a-z0-9]+)+", c)]
    assert not raw, raw[:5]
    assert "Total vessel length" in cells and "mm" in cells and "Vessel volume fraction" in cells
    # every labelled key of the summary appears once, with its label
    labels = {label for _, fields in SUMMARY_GROUPS for key, label, _, _ in fields if key in summary}
    assert labels <= set(cells)
    # nothing is hidden: the keys no table names are listed, folded
    assert "<details>" in page and "summary.json" in page


def test_overview_says_what_was_measured_and_how_much_is_perfused(sample):
    summary = json.loads((sample / "summary.json").read_text())
    text = re.sub(r"<[^>]+>", "", overview_html(summary, flow_solved=True))
    assert f"{format_number(summary['total_length_mm'])} mm of vessel centreline" in text
    assert f"perfuses {format_number(summary['perfused_length_fraction'], 'pct')} % of the vessel length" in text
    assert f"{summary['bifurcations_flagged']} of {summary['bifurcations']} bifurcations" in text
    assert "estimate" in text and "not a measurement" in text


def test_overview_names_a_value_outside_its_published_range():
    # PLAUSIBLE (pipeline.flow.plausibility): 99th percentile wall shear
    # stress at most 30 Pa; a value of 120 Pa must be called out, with why.
    s = {"total_length_mm": 1.0, "imaged_volume_mm3": 0.1, "segments": 10, "junctions": 4, "components": 1,
         "loops": 0, "perfused_length_fraction": 0.3, "velocity_median_mm_s_capillary": 0.4, "wss_p99_pa": 120.0}
    text = overview_html(s, flow_solved=True)
    assert "120 Pa, outside the 0-30 Pa" in text and "Less than half" in text
    assert "relative, not absolute" in text
    assert "flow model was not run" in overview_html(s, flow_solved=False)


def test_report_page_leads_with_the_overview_and_prints_no_font_noise(sample):
    # The command says what it wrote and nothing else (matplotlib's font
    # fallbacks are not the reader's business).
    proc = subprocess.run([sys.executable, "-m", "pipeline", "report", str(sample)], capture_output=True, text=True)
    assert proc.returncode == 0
    assert proc.stderr.strip().splitlines() == [f"vesselflow: wrote {sample / 'report.html'}"]
    page = (sample / "report.html").read_text(encoding="utf-8")
    assert page.index('class="overview"') < page.index('id="inputs"') < page.index('id="summary"')
    assert "mmHg" in page  # pressures of the flow record, also in mmHg
    assert re.search(r"<details><summary>Every option the analysis ran with", page)


# --- robust figures on extreme model values (issue: axes to 1e-19, 1,300 circles) ---


@pytest.fixture
def data(sample):
    from pipeline import report

    return report.load_sample(sample)


def _extreme(data, seed=0):
    """Flows and shear stresses spread over 18 decades, as an ill-posed boundary gives them."""
    rng = np.random.default_rng(seed)
    n = len(data.segments)
    segs = data.segments.copy()
    segs["wss_pa"] = 10.0 ** rng.uniform(-17, 1, n)
    segs["flow_nl_min"] = 10.0 ** rng.uniform(-19, 2, n)
    segs["perfused"] = True
    data.segments = segs
    return data


def test_map_colour_limits_are_percentiles_of_the_perfused_segments(data):
    from pipeline.report.sample import figure_map_wss

    data = _extreme(data)
    wss = data.segments["wss_pa"].to_numpy()
    fig = figure_map_wss(data, [])
    lc = [c for c in fig.axes[0].collections if c.get_gid() == "centrelines"][0]
    lo, hi = lc.norm.vmin, lc.norm.vmax
    # numpy's percentiles of the same values (the 2nd and 98th)
    assert lo == pytest.approx(np.percentile(wss, 2)) and hi == pytest.approx(np.percentile(wss, 98))
    assert lo > wss.min() and hi < wss.max()


def test_scatter_axes_stop_four_decades_below_the_median(data):
    from pipeline.report.sample import figure_flow_radius, figure_wss_diameter

    data = _extreme(data)
    for make, col in ((figure_wss_diameter, "wss_pa"), (figure_flow_radius, "flow_nl_min")):
        v = np.abs(data.segments[col].to_numpy())
        ax = make(data, []).axes[0]
        floor = 10 ** (np.log10(np.median(v)) - 4)
        assert ax.get_ylim()[0] >= floor / 10  # a margin below the floor, never 1e-19
        labels = [t.get_text() for t in ax.get_legend().get_texts()]
        assert any(lab.startswith("below ") and f"({int((v < floor).sum())})" in lab for lab in labels)


def test_no_slope_from_a_handful_of_segments(data):
    from pipeline.report.sample import figure_flow_radius

    segs = data.segments.copy()
    keep = np.zeros(len(segs), bool)
    keep[:8] = True
    segs.loc[~keep, "flow_nl_min"] = np.nan
    data.segments = segs
    labels = [t.get_text() for t in figure_flow_radius(data, []).axes[0].get_legend().get_texts()]
    assert not any("least-squares" in lab for lab in labels)


def test_maps_circle_only_the_most_severe_of_a_long_queue(data):
    from pipeline.report._common import _MAX_NUMBERED
    from pipeline.report.sample import figure_map_level

    b = data.bifurcations.copy()
    b["flagged"] = True
    b["severity"] = np.arange(len(b), dtype=float)
    data.bifurcations = b
    assert len(b) > _MAX_NUMBERED, "the fixture needs more junctions than the maps circle"
    notes = []
    ax = figure_map_level(data, notes).axes[0]
    circles = [c for c in ax.collections if c.get_gid() == "flagged-circles"][0]
    assert len(circles.get_offsets()) == _MAX_NUMBERED
    numbers = sorted(int(t.get_text()) for t in ax.texts)
    top = b.sort_values("severity", ascending=False)["node_id"].head(_MAX_NUMBERED).astype(int)
    assert numbers == sorted(top)
    assert any(f"{_MAX_NUMBERED} most severe of the {len(b)}" in n for n in notes)
