"""The sample report's words and numbers for readers (pipeline/report/overview.py)."""

import json
import re
import subprocess
import sys
from html.parser import HTMLParser

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
