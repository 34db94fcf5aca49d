"""The report: figures and a self-contained report.html per sample and per study."""

import base64
import html
import json
import os
import re
import shutil
import subprocess
import xml.etree.ElementTree as ET
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from matplotlib import colormaps
from matplotlib import image as mpimg
from matplotlib.colors import to_hex
from scipy import stats

import pipeline
from pipeline import report, synthetic
from pipeline.report import build as report_build
from pipeline.report._common import _anchor, _fmt
from pipeline.report.page import _CSP
from pipeline.report.sample import _SAMPLE_BUILDERS
from pipeline.cli import main

SPACING = (2.0, 1.0, 1.0)
CONFIG = "flow:\n  blind_ends: outlet\n"  # small trees: let terminal branches drain, so flow is solved


def _tree(*, seed, exponent, broken):
    # Depth 3 keeps each analysis well under a second.
    return synthetic.binary_tree(depth=3, root_radius_um=5.0, exponent=exponent, length_radius_ratio=7.0,
                                 min_radius_um=1.8, jitter_deg=6.0, broken_fraction=broken, seed=seed)


def _write_tree(path, **kw):
    mask, truth = synthetic.rasterize(_tree(**kw), spacing=SPACING, specks=3, seed=3)
    synthetic.write_volume(path, mask, spacing=SPACING, truth=truth)
    return mask


@pytest.fixture(scope="module")
def sample(tmp_path_factory):
    """One tree analysed through the CLI with --report; half its junctions broken on purpose."""
    d = tmp_path_factory.mktemp("report")
    tif = d / "tree.tif"
    mask = _write_tree(tif, seed=29, exponent=2.3, broken=0.5)
    out = d / "tree"
    assert main(["analyze", str(tif), "-o", str(out), "--blind-ends", "outlet", "--report", "--quiet"]) == 0
    return tif, out, mask


def _not_blank(path):
    """A rendered image with content: an empty canvas has one colour and zero spread."""
    img = mpimg.imread(path)
    rgb = img[..., :3].reshape(-1, 3)
    q = (rgb * 255).round().astype(np.int64)
    colours = len(np.unique(q[:, 0] << 16 | q[:, 1] << 8 | q[:, 2]))
    non_white = float((rgb.min(axis=1) < 0.95).mean())
    # Thresholds: a figure with axes, labels and data has hundreds of colours
    # (anti-aliasing) and several per cent of ink; a blank or text-only page
    # has a handful of colours and well under one per cent.
    return rgb.std() > 0.03 and colours > 64 and non_white > 0.02


class _Refs(HTMLParser):
    """Every reference a page makes, the ids it defines, and its tags."""

    def __init__(self):
        super().__init__()
        self.refs, self.ids, self.tags, self.imgs = [], set(), [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        for k, v in attrs:
            if k in ("src", "href", "srcset", "poster", "data", "action", "background"):
                self.refs.append((tag, k, v or ""))
            if k == "id":
                self.ids.add(v)
            if tag == "img" and k == "src":
                self.imgs.append(v)


def _parse(page):
    p = _Refs()
    p.feed(page.read_text(encoding="utf-8"))
    return p


# --------------------------------------------------------------------------- sample report


def test_sample_report_files(sample):
    _, out, _ = sample
    figs = out / "figures"
    assert (out / "report.html").is_file()
    # A tree with solved flow and junctions has every sample figure.
    assert sorted(p.stem for p in figs.glob("*.png")) == sorted(report.SAMPLE_FIGURES)
    assert sorted(p.stem for p in figs.glob("*.svg")) == sorted(report.SAMPLE_FIGURES)
    for png in figs.glob("*.png"):
        assert _not_blank(png), png.name
    for svg in figs.glob("*.svg"):
        root = ET.parse(svg).getroot()  # W3C SVG 1.1: the document element is <svg> in the SVG namespace
        assert root.tag == "{http://www.w3.org/2000/svg}svg", svg.name
    assert not [p for p in out.iterdir() if p.name.startswith(".report")]  # no temporary leftovers


def test_html_references_only_embedded_content(sample):
    _, out, _ = sample
    page = out / "report.html"
    p = _parse(page)
    text = page.read_text(encoding="utf-8")
    assert {"script", "link", "iframe", "object", "embed"}.isdisjoint(p.tags)
    assert "url(" not in text and "@import" not in text  # no CSS fetches
    for tag, attr, ref in p.refs:
        # embedded data, an anchor, or a link to a table of the result beside the page (nothing fetched)
        table = tag == "a" and attr == "href" and ref.endswith(".csv") and (out / ref).is_file()
        assert ref.startswith("data:") or ref.startswith("#") or table, (tag, attr, ref[:80])
        if ref.startswith("#"):
            assert ref[1:] in p.ids, ref  # every in-page link lands somewhere
    # Each embedded image is byte for byte the PNG written under figures/.
    written = {f.read_bytes() for f in (out / "figures").glob("*.png")}
    embedded = {base64.b64decode(s.split(",", 1)[1]) for s in p.imgs}
    assert embedded == written


def test_report_lists_provenance(sample):
    tif, out, _ = sample
    text = (out / "report.html").read_text(encoding="utf-8")
    run = json.loads((out / "run.json").read_text())
    assert str(tif.resolve()) in text and run["input"]["sha256"] in text
    assert "2, 1, 1" in text and run["spacing_source"] == "imagej" and ">imagej<" in text
    assert f"vesselflow {pipeline.__version__}" in text
    assert "spur_radius_factor: 1.5" in text  # the effective config, as YAML
    assert "Research use only" in text and "not be used for clinical decisions" in text
    assert 'id="warnings"' in text


def test_map_shows_the_mask_projection_and_flagged_junctions(sample):
    _, out, mask = sample
    data = report.load_sample(out)
    fig = report.figure_map_level(data, [])
    ax = fig.axes[0]
    img = ax.images[0]
    # The maximum-intensity projection of a binary mask along z is its
    # logical OR over z; computed here from the mask the volume was made of.
    assert np.array_equal(np.asarray(img.get_array()), mask.any(axis=0))
    dz, dy, dx = SPACING
    ny, nx = mask.shape[1:]
    # Voxel (i, j, k) has its centre at (i dz, j dy, k dx) µm (README), so
    # pixel edges sit half a voxel either side of the centres.
    assert np.allclose(img.get_extent(), (-dx / 2, (nx - 0.5) * dx, (ny - 0.5) * dy, -dy / 2))
    b = pd.read_csv(out / "bifurcations.csv")
    flagged = b[b["flagged"].astype(bool)]
    assert len(flagged) > 0  # the fixture breaks half the junctions on purpose
    circles = [c for c in ax.collections if c.get_gid() == "flagged-circles"][0]
    got = np.asarray(circles.get_offsets())
    want = flagged[["x_um", "y_um"]].to_numpy()
    assert np.allclose(got[np.lexsort(got.T)], want[np.lexsort(want.T)])
    numbers = sorted(int(t.get_text()) for t in ax.texts if t.get_text().isdigit())
    assert numbers == sorted(flagged["node_id"].astype(int))


def test_murray_plot_identity_and_flagged_points(sample):
    _, out, _ = sample
    data = report.load_sample(out, read_mip=False)
    ax = report.figure_murray(data, []).axes[0]
    ident = [ln for ln in ax.get_lines() if ln.get_gid() == "identity"][0]
    # Murray CD (1926) PNAS 12:207: the cube law r0³ = r1³ + r2³ is the line y = x here.
    assert np.allclose(ident.get_xdata(), ident.get_ydata()) and np.ptp(ident.get_xdata()) > 0
    assert ax.get_xscale() == ax.get_yscale() == "log"
    b = pd.read_csv(out / "bifurcations.csv")
    x = b["radius_parent_um"] ** 3
    y = b["radius_daughter1_um"] ** 3 + b["radius_daughter2_um"] ** 3
    flagged = b["flagged"].astype(bool)
    by_ratio = b["flag_reasons"].fillna("").astype(str).str.contains(r"(?:^|;)ratio_(?:high|low)(?:;|$)")
    # flagged for the ratio apart from flagged for another reason (which may lie inside the limits)
    for gid, sel in (("flagged", flagged & by_ratio), ("flagged-other", flagged & ~by_ratio),
                     ("not-flagged", ~flagged)):
        pts = np.asarray([c for c in ax.collections if c.get_gid() == gid][0].get_offsets())
        want = np.c_[x[sel], y[sel]]
        assert len(pts) == len(want)
        assert np.allclose(pts[np.lexsort(pts.T)], want[np.lexsort(want.T)], rtol=1e-12)
    # The written SVG holds the same number of flagged markers (one <use> each).
    svg = ET.parse(out / "figures" / "murray.svg").getroot()
    n_use = 0
    for gid in ("flagged", "flagged-other"):
        group = [g for g in svg.iter("{http://www.w3.org/2000/svg}g") if g.get("id") == gid][0]
        n_use += sum(1 for e in group.iter() if e.tag == "{http://www.w3.org/2000/svg}use")
    assert n_use == int(flagged.sum())


def test_flow_guide_has_slope_three(sample):
    _, out, _ = sample
    ax = report.figure_flow_radius(report.load_sample(out, read_mip=False), []).axes[0]
    guide = [ln for ln in ax.get_lines() if ln.get_gid() == "slope3"][0]
    lx, ly = np.log10(guide.get_xdata()), np.log10(guide.get_ydata())
    # Murray CD (1926) PNAS 12:207: under the cube law flow scales as r³,
    # a slope of 3 on log-log axes. Tolerance: float rounding only.
    assert np.ptp(lx) > 0 and np.isclose(np.diff(ly) / np.diff(lx), 3.0, rtol=1e-9).all()
    assert ax.get_xscale() == ax.get_yscale() == "log"


def test_exponent_marks_at_two_and_three(sample):
    _, out, _ = sample
    ax = report.figure_exponents(report.load_sample(out, read_mip=False), []).axes[0]
    marks = {ln.get_gid(): set(ln.get_xdata()) for ln in ax.get_lines() if ln.get_gid()}
    # x = 2: area-preserving branching; x = 3: Murray's cube law (Murray 1926, PNAS 12:207).
    assert marks["x2"] == {2.0} and marks["x3"] == {3.0}


def test_colours_read_in_grey_and_for_colour_blind_readers(sample):
    _, out, _ = sample
    data = report.load_sample(out, read_mip=False)
    # Okabe M, Ito K (2002) Color Universal Design: the eight colours as
    # recalled (black, orange, sky blue, bluish green, yellow, blue,
    # vermillion, reddish purple), the set widely reproduced since.
    okabe_ito = {"#000000", "#e69f00", "#56b4e9", "#009e73", "#f0e442", "#0072b2", "#d55e00", "#cc79a7"}
    assert {c.lower() for c in report.OKABE_ITO} == okabe_ito
    ax = report.figure_map_level(data, []).axes[0]
    lines = [c for c in ax.collections if c.get_gid() == "centrelines"][0]
    assert {to_hex(c) for c in lines.get_colors()} <= okabe_ito
    wss = [c for c in report.figure_map_wss(data, []).axes[0].collections if c.get_gid() == "centrelines"][0]
    lut = colormaps[wss.get_cmap().name](np.linspace(0, 1, 256))[:, :3]
    # Grey rendering keeps the order of values when luma rises monotonically
    # (ITU-R BT.709 luma weights 0.2126, 0.7152, 0.0722).
    luma = lut @ np.array([0.2126, 0.7152, 0.0722])
    assert np.all(np.diff(luma) > 0)


def test_every_axis_has_a_label(sample):
    _, out, _ = sample
    data = report.load_sample(out)
    for name, (fig, _, _) in report.sample_figures(data, []).items():
        for ax in fig.axes:
            if ax.get_label() == "<colorbar>":
                assert ax.get_ylabel() or ax.get_xlabel(), name
                continue
            assert ax.get_xlabel() and ax.get_ylabel(), name
            # Units in brackets, or a count, or dimensionless by name.
            for lab in (ax.get_xlabel(), ax.get_ylabel()):
                assert re.search(r"\((.+)\)", lab), (name, lab)


def _mask_gone(out, tmp_path):
    """A copy of a result folder whose recorded mask no longer exists."""
    copy = tmp_path / "moved"
    shutil.copytree(out, copy)
    run = json.loads((copy / "run.json").read_text())
    run["input"]["path"] = str(tmp_path / "gone.tif")
    (copy / "run.json").write_text(json.dumps(run))
    return copy


def test_map_without_the_mask_says_so(sample, tmp_path):
    _, out, _ = sample
    copy = _mask_gone(out, tmp_path)
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
    text = (copy / "report.html").read_text(encoding="utf-8")
    assert "centrelines alone" in text and "gone.tif" in text
    assert _not_blank(copy / "figures" / "map_level.png")
    data = report.load_sample(copy)
    assert data.mip is None and not report.figure_map_level(data, []).axes[0].images


def test_mask_path_and_its_earlier_name(sample, tmp_path):
    # One name per concept: the mask file is ``mask_path`` in the report, the
    # viewer and pipeline.tables. The earlier ``mask`` still works, with a
    # FutureWarning; both at once is a mistake.
    tif, out, _ = sample
    copy = _mask_gone(out, tmp_path)
    report.build_report(copy, mask_path=tif, overwrite=True)
    assert "centrelines alone" not in (copy / "report.html").read_text(encoding="utf-8")
    with pytest.warns(FutureWarning, match="mask_path"):
        report.build_report(copy, mask=tif, overwrite=True)
    assert "centrelines alone" not in (copy / "report.html").read_text(encoding="utf-8")
    with pytest.raises(TypeError):
        report.build_report(copy, mask=tif, mask_path=tif, overwrite=True)
    with pytest.raises(TypeError):
        report.build_report(copy, mask_file=tif, overwrite=True)


def test_no_flow_sample_leaves_flow_figures_out(sample, tmp_path):
    tif, _, _ = sample
    out = tmp_path / "noflow"
    assert main(["analyze", str(tif), "-o", str(out), "--no-flow", "--report", "--quiet"]) == 0
    names = {p.stem for p in (out / "figures").glob("*.png")}
    assert names == set(report.SAMPLE_FIGURES) - {"map_wss", "wss_diameter", "flow_radius", "flow_plausibility",
                                                   "flow_intervals"}
    text = (out / "report.html").read_text(encoding="utf-8")
    assert "flow model was not run" in text
    assert "nothing to check" in _section(text, "plausibility") and "no flow intervals" in _section(text, "uncertainty")


# --------------------------------------------------------------------------- CLI and atomic writes


def _one_error_line(capsys):
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("vesselflow: error: "), err
    return err[0]


def _listing(folder):
    return sorted(str(p.relative_to(folder)) for p in folder.rglob("*"))


def test_report_refuses_bad_folders(tmp_path, capsys):
    f = tmp_path / "file.txt"
    f.write_text("x")
    before = _listing(tmp_path)
    assert main(["report", str(f)]) == 2
    assert "expected a result folder" in _one_error_line(capsys)
    assert main(["report", str(tmp_path / "absent")]) == 2
    assert "does not exist" in _one_error_line(capsys)
    empty = tmp_path / "empty"
    empty.mkdir()
    assert main(["report", str(empty)]) == 2
    assert "cohort_summary.csv" in _one_error_line(capsys)
    part = tmp_path / "part"
    part.mkdir()
    (part / "run.json").write_text("{}")
    (part / "segments.csv").write_text("segment_id\n")
    assert main(["report", str(part)]) == 2
    assert "missing" in _one_error_line(capsys)
    assert _listing(tmp_path) == sorted(before + ["empty", "part", "part/run.json", "part/segments.csv"])


def test_report_refuses_to_overwrite(sample, tmp_path, capsys):
    _, out, _ = sample
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    old = (copy / "report.html").read_bytes()
    assert main(["report", str(copy)]) == 2
    assert "--overwrite" in _one_error_line(capsys)
    assert (copy / "report.html").read_bytes() == old
    assert main(["report", str(copy), "--mask", str(tmp_path / "nope.tif"), "--overwrite"]) == 2
    assert "nope.tif" in _one_error_line(capsys)
    assert (copy / "report.html").read_bytes() == old
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
    assert (copy / "report.html").read_bytes() != old  # the build time differs
    assert not [p for p in copy.iterdir() if p.name.startswith(".report")]


def test_failed_build_keeps_the_old_report(sample, tmp_path, monkeypatch):
    _, out, _ = sample
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    before = {p: p.read_bytes() for p in [copy / "report.html", *sorted((copy / "figures").iterdir())]}

    def boom(*a, **k):
        raise RuntimeError("drawing failed")

    monkeypatch.setitem(_SAMPLE_BUILDERS, "exponents", (boom, "t", "c"))
    with pytest.raises(RuntimeError):
        report.build_report(copy, overwrite=True)
    monkeypatch.undo()

    real_replace = os.replace

    def fail_replace(src, dst):
        if Path(dst).name == "report.html":
            raise OSError("disk full")
        return real_replace(src, dst)

    monkeypatch.setattr(report_build.os, "replace", fail_replace)
    with pytest.raises(OSError):
        report.build_report(copy, overwrite=True)
    after = {p: p.read_bytes() for p in [copy / "report.html", *sorted((copy / "figures").iterdir())]}
    assert after == before
    assert not [p for p in copy.iterdir() if p.name.startswith(".report")]


# --------------------------------------------------------------------------- study report


def _bh(p):
    # Benjamini Y, Hochberg Y (1995) J R Stat Soc B 57:289: step-up adjusted p-values.
    p = np.asarray(p, float)
    order = np.argsort(p)
    ranked = p[order] * len(p) / np.arange(1, len(p) + 1)
    q = np.minimum.accumulate(ranked[::-1])[::-1].clip(max=1)
    out = np.empty_like(q)
    out[order] = q
    return out


def _hand_made_batch(out, rows):
    """The batch folder format, written by hand from result folders as the batch spec says."""
    from pipeline.tables import load_result

    cohort = []
    for r in rows:
        s = load_result(out / r["sample_id"]).summary
        flat = {k: v for k, v in s.items() if isinstance(v, (int, float)) and not isinstance(v, bool)}
        flat.update({f"flag_count_{k}": v for k, v in s["flag_counts"].items()})
        cohort.append({"sample_id": r["sample_id"], "group": r["group"], **flat})
    cohort = pd.DataFrame(cohort)
    cohort.to_csv(out / "cohort_summary.csv", index=False)
    comp = []
    for m in [c for c in cohort.columns if c not in ("sample_id", "group")]:
        a = cohort.loc[cohort.group == "ctrl", m].astype(float)
        b = cohort.loc[cohort.group == "trt", m].astype(float)
        u, p = stats.mannwhitneyu(a, b, alternative="two-sided")
        comp.append(dict(measure=m, group_a="ctrl", group_b="trt", n_a=len(a), mean_a=a.mean(), sd_a=a.std(),
                         median_a=a.median(), n_b=len(b), mean_b=b.mean(), sd_b=b.std(), median_b=b.median(),
                         difference=b.mean() - a.mean(), mann_whitney_u=u, p_value=p))
    comp = pd.DataFrame(comp)
    comp["q_value"] = _bh(comp["p_value"].fillna(1.0))
    comp.to_csv(out / "group_comparison.csv", index=False)
    pd.DataFrame([dict(sample_id="ctrl-bad", path=str(out.parent / "bad.tif"), step="reading",
                       error="not a TIFF file")]).to_csv(out / "failures.csv", index=False)
    (out / "batch.json").write_text(json.dumps({"version": pipeline.__version__, "created": "now",
                                                "config": {"flow": {"blind_ends": "outlet"}}}))


@pytest.fixture(scope="module")
def study_inputs(tmp_path_factory):
    """Two groups of two trees (cube law against a flatter law with broken junctions) and one bad file."""
    d = tmp_path_factory.mktemp("study")
    rows = []
    for i, (group, exponent, broken) in enumerate((("ctrl", 3.0, 0.0), ("ctrl", 3.0, 0.0), ("trt", 2.3, 0.5),
                                                   ("trt", 2.3, 0.5))):
        path = d / f"{group}{i}.tif"
        _write_tree(path, seed=10 + i, exponent=exponent, broken=broken)
        rows.append({"sample_id": f"{group}-{i}", "path": str(path), "group": group})
    (d / "bad.tif").write_bytes(b"not a tiff " * 10)
    cfg = d / "cfg.yaml"
    cfg.write_text(CONFIG)
    return d, rows, cfg


@pytest.fixture(scope="module")
def study(study_inputs):
    """A batch folder written to the batch format by hand, so the report tests do not hang on a cluster."""
    d, rows, cfg = study_inputs
    out = d / "batch"
    out.mkdir()
    for r in rows:
        assert main(["analyze", r["path"], "-o", str(out / r["sample_id"]), "--config", str(cfg), "--quiet"]) == 0
    _hand_made_batch(out, rows)
    assert main(["report", str(out), "--quiet"]) == 0
    return out, rows


def test_report_of_a_real_batch(study_inputs):
    d, rows, cfg = study_inputs
    sheet = d / "sheet.csv"
    bad = {"sample_id": "ctrl-bad", "path": str(d / "bad.tif"), "group": "ctrl"}
    pd.DataFrame(rows + [bad]).to_csv(sheet, index=False)
    out = d / "real-batch"
    # Exit code 1: one sample fails on purpose; the other four are the study.
    assert main(["batch", str(sheet), "-o", str(out), "--workers", "1", "--quiet", "--config", str(cfg)]) == 1
    assert main(["report", str(out), "--quiet"]) == 0
    cohort = pd.read_csv(out / "cohort_summary.csv")
    assert sorted(cohort["sample_id"]) == sorted(r["sample_id"] for r in rows)
    for m in (m for m in report.STUDY_MEASURES if m in cohort.columns and cohort[m].notna().any()):
        assert _not_blank(out / "figures" / f"study_{m}.png"), m
    text = (out / "report.html").read_text(encoding="utf-8")
    assert "ctrl-bad" in text and all(f'id="{_anchor(r["sample_id"])}"' in text for r in rows)


def test_study_report_files(study):
    out, rows = study
    cohort = pd.read_csv(out / "cohort_summary.csv")
    measures = [m for m in report.STUDY_MEASURES if m in cohort.columns and cohort[m].notna().any()]
    assert len(measures) >= 8
    figs = out / "figures"
    for m in measures:
        assert _not_blank(figs / f"study_{m}.png"), m
        assert ET.parse(figs / f"study_{m}.svg").getroot().tag.endswith("svg")
    p = _parse(out / "report.html")
    for tag, attr, ref in p.refs:
        assert ref.startswith("data:") or (ref.startswith("#") and ref[1:] in p.ids), (tag, ref[:80])
    text = (out / "report.html").read_text(encoding="utf-8")
    for r in rows:  # a section per sample, linked from the sample list
        assert f'href="#{_anchor(r["sample_id"])}"' in text
    assert "ctrl-bad" in text and "not a TIFF file" in text  # the failure is listed
    assert "Research use only" in text


def test_study_plots_show_the_cohort_and_its_q_values(study):
    out, _ = study
    cohort = pd.read_csv(out / "cohort_summary.csv")
    comp = pd.read_csv(out / "group_comparison.csv")
    groups = sorted(cohort["group"].astype(str).unique())
    for m in ("total_length_mm", "murray_exponent_median", "bifurcations_flagged"):
        ax = report.figure_study_measure(cohort, comp, m, groups).axes[0]
        for i, g in enumerate(groups):
            vals = np.sort(cohort.loc[cohort["group"] == g, m].to_numpy(float))
            pts = [c for c in ax.collections if c.get_label().startswith(f"{g} (")][0]
            assert np.allclose(np.sort(np.asarray(pts.get_offsets())[:, 1]), vals)
            # The box's middle line is the group median (numpy's median).
            med = [ln for ln in ax.get_lines()
                   if len(ln.get_xdata()) == 2 and np.allclose(ln.get_xdata(), [i + 0.75, i + 1.25])]
            assert any(np.allclose(ln.get_ydata(), np.median(vals)) for ln in med), (m, g)
        q_shown = float(re.search(r"q\s=\s([0-9.e+-]+)", ax.get_title()).group(1))  # \s: no-break spaces too
        q_csv = float(comp.loc[comp["measure"] == m, "q_value"].iloc[0])
        # Two significant digits are shown: rounding moves a value by at most 5 %.
        assert q_shown == pytest.approx(q_csv, rel=0.05)
        assert "(" in ax.get_ylabel()


def test_study_report_refuses_a_mask(study, capsys):
    out, _ = study
    assert main(["report", str(out), "--mask", "x.tif", "--overwrite"]) == 2
    assert "--mask" in _one_error_line(capsys)


# --------------------------------------------------------------------------- headless browser


def _chromium():
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    if exe is None:
        if os.environ.get("CI") == "true":
            pytest.fail("CI=true but chromium is not installed (.ci/run installs Debian's chromium)")
        pytest.skip("chromium not installed; CI installs it")
    return exe


def _render(exe, page, tmp, *, dump=False):
    """Render a page headless; returns (exit code, stdout, console lines, screenshot path)."""
    shot = tmp / "shot.png"
    cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           "--disable-dev-shm-usage", f"--user-data-dir={tmp / 'profile'}", "--enable-logging=stderr", "--v=0",
           "--window-size=1200,2000"]
    cmd += ["--dump-dom"] if dump else [f"--screenshot={shot}"]
    proc = subprocess.run(cmd + [page.resolve().as_uri()], capture_output=True, text=True, timeout=120,
                          stdin=subprocess.DEVNULL)
    # The page has no script, so any console message is a blocked load, a
    # policy violation or a parse problem.
    console = [ln for ln in proc.stderr.splitlines() if ":CONSOLE" in ln or "Uncaught" in ln]
    return proc.returncode, proc.stdout, console, shot


@pytest.mark.integration  # headless Chromium
def test_console_check_catches_a_broken_page(tmp_path):
    # The check below must be able to fail: a page that loads a missing file
    # under the report's own Content-Security-Policy logs a console line.
    exe = _chromium()
    bad = tmp_path / "bad.html"
    bad.write_text(f'<!DOCTYPE html><html><head><meta http-equiv="Content-Security-Policy" '
                   f'content="{_CSP}"></head><body><img src="missing.png"></body></html>')
    rc, _, console, _ = _render(exe, bad, tmp_path)
    assert rc == 0 and console


@pytest.mark.integration  # headless Chromium
@pytest.mark.parametrize("which", ["sample", "study"])
def test_report_renders_in_headless_chromium(which, request, tmp_path):
    exe = _chromium()
    out = request.getfixturevalue(which)[1 if which == "sample" else 0]
    page = out / "report.html"
    rc, _, console, shot = _render(exe, page, tmp_path / "a")
    assert rc == 0 and not console, console
    assert shot.is_file() and _not_blank(shot)
    rc, dom, console, _ = _render(exe, page, tmp_path / "b", dump=True)
    assert rc == 0 and not console, console
    assert "<h1>vesselflow" in dom and dom.count("<img") == len(list((out / "figures").glob("*.png")))


def test_review_decisions_appear_in_the_flagged_table(sample, tmp_path, capsys):
    from pipeline import review

    _, out, _ = sample
    copy = tmp_path / "reviewed"
    shutil.copytree(out, copy)
    flagged = pd.read_csv(copy / "bifurcations.csv").query("flagged")["node_id"].tolist()
    assert flagged
    review.save_review(copy, review.record_decision(review.empty_review(), flagged[0], decision="artefact",
                                                    note="two vessels crossing"))
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
    text = (copy / "report.html").read_text(encoding="utf-8")
    assert "two vessels crossing" in text and "artefact" in text
    # An invalid review stops the report, as it stops summarize --apply-review; the old report stays.
    old = (copy / "report.html").read_bytes()
    (copy / "review.csv").write_text("node_id,decision\n1,maybe\n", encoding="utf-8")
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 2
    assert "missing note, reviewed_at" in _one_error_line(capsys)
    assert (copy / "report.html").read_bytes() == old


_REVIEW_HEAD = "node_id,decision,note,reviewed_at\n"


@pytest.mark.parametrize("rows, expected", [
    ("123456789012345678901234567890,artefact,,\n", r"review.csv line 2: node_id: .*'123456789012345678901234567890'"),
    ("1e400,artefact,,\n", r"review.csv line 2: node_id: .*'1e400'"),
    ("{flagged},artefact,,\n{flagged},unsure,,\n", r"review.csv line 3: node_id \d+ is reviewed twice"),
    ("{flagged},artefact,,\n{end},unsure,,\n", r"review.csv line 3: node_id \d+ is not a junction"),
], ids=["id-30-digits", "id-1e400", "duplicated-id", "not-a-junction"])
def test_report_refuses_an_invalid_review(sample, tmp_path, capsys, rows, expected):
    _, out, _ = sample
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    flagged = pd.read_csv(copy / "bifurcations.csv").query("flagged")["node_id"].iloc[0]
    nodes = pd.read_csv(copy / "nodes.csv")
    end = nodes.loc[nodes["kind"] != "junction", "node_id"].iloc[0]
    (copy / "review.csv").write_text(_REVIEW_HEAD + rows.format(flagged=flagged, end=end), encoding="utf-8")
    before = _listing(copy)
    old = (copy / "report.html").read_bytes()
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 2
    line = _one_error_line(capsys)
    assert re.search(expected, line), line
    assert line.startswith("vesselflow: error: report: ")
    assert _listing(copy) == before and (copy / "report.html").read_bytes() == old
    # summarize --apply-review rejects the same file with the same words.
    assert main(["summarize", str(copy), "--apply-review"]) == 2
    assert _one_error_line(capsys) == line.replace("error: report: ", "error: ", 1)


def test_a_bad_review_is_a_note_in_the_study_report(study, tmp_path, capsys):
    out, rows = study
    copy = tmp_path / "batch"
    shutil.copytree(out, copy)
    sid = rows[2]["sample_id"]
    (copy / sid / "review.csv").write_text(_REVIEW_HEAD + "123456789012345678901234567890,artefact,,\n",
                                           encoding="utf-8")
    # One sample's review does not stop the study report.
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
    assert not capsys.readouterr().err
    text = (copy / "report.html").read_text(encoding="utf-8")
    section = text[text.index(f'<section id="{_anchor(sid)}"'):]
    section = section[:section.index("</section>")]
    assert "The review of this sample is not valid" in section and "123456789012345678901234567890" in section
    assert text.count("The review of this sample is not valid") == 2  # the section and the report's notes


# --------------------------------------------------------------------------- flow plausibility, uncertainty, junctions


@pytest.fixture(scope="module")
def bed(tmp_path_factory):
    """A small looping capillary bed: converging and mixed junctions, uncertain ones, intervals reaching zero."""
    d = tmp_path_factory.mktemp("bed")
    net = synthetic.capillary_bed(shape_um=(40.0, 70.0, 70.0), seed=1)
    mask, truth = synthetic.rasterize(net, spacing=(1.0, 1.0, 1.0), seed=1)
    synthetic.write_volume(d / "bed.tif", mask, spacing=(1.0, 1.0, 1.0), truth=truth)
    out = d / "bed"
    assert main(["analyze", str(d / "bed.tif"), "-o", str(out), "--report", "--quiet"]) == 0
    return out


@pytest.fixture(params=["sample", "bed"])
def result(request):
    """Each analysed result folder: the tree (all diverging) and the bed (loops, every flow pattern)."""
    got = request.getfixturevalue(request.param)
    return got[1] if request.param == "sample" else got


class _Tables(HTMLParser):
    """Every table of a piece of HTML as its class and rows of cell texts (header row first)."""

    def __init__(self):
        super().__init__()
        self.tables, self._row, self._cell = [], None, None

    def handle_starttag(self, tag, attrs):
        if tag == "table":
            self.tables.append((dict(attrs).get("class"), []))
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in ("td", "th"):
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr":
            self.tables[-1][1].append(self._row)

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _section(text, sid):
    """The HTML of the section whose heading has id ``sid``, up to the next section."""
    start = text.index(f'<h2 id="{sid}"')
    end = text.find("<h2", start + 1)
    return text[start:end if end > 0 else None]


def _tables(html_text, cls):
    p = _Tables()
    p.feed(html_text)
    return [pd.DataFrame(rows[1:], columns=rows[0]) for c, rows in p.tables if c == cls]


def _kv(html_text):
    p = _Tables()
    p.feed(html_text)
    return {r[0]: r[1] for c, rows in p.tables if c == "kv" for r in rows}


def _shown(cell):
    """A number as the report shows it; None for the dash of a missing value."""
    return None if cell == "–" else float(cell.split()[0])


# Numbers are shown to three significant digits: rounding moves a value by at
# most half a unit of the third digit, 0.5 % of it.
_SHOWN_RTOL = 5e-3


def _rewrite(folder, name, df_or_obj):
    """Replace one file of a copied result and record its new checksum, as a changed result would be."""
    from pipeline.tables import file_digest

    path = folder / name
    if isinstance(df_or_obj, pd.DataFrame):
        df_or_obj.to_csv(path, index=False)
    else:
        path.write_text(json.dumps(df_or_obj), encoding="utf-8")
    run = json.loads((folder / "run.json").read_text(encoding="utf-8"))
    run["files"][name] = file_digest(path)
    (folder / "run.json").write_text(json.dumps(run), encoding="utf-8")


def _classes(seg, run):
    # The class bounds the run used (flow.capillary_max_diameter_um 8 and
    # flow.small_vessel_max_diameter_um 30 by default): capillary below,
    # small up to and including, large above.
    flow = run["config"]["flow"]
    d = 2 * seg["radius_um"].to_numpy(float)
    perf = seg["perfused"].astype(bool).to_numpy()
    cap, small = flow["capillary_max_diameter_um"], flow["small_vessel_max_diameter_um"]
    return {"capillary": perf & (d < cap), "small": perf & (d >= cap) & (d <= small), "large": perf & (d > small),
            "all": perf}


def test_plausibility_section_numbers_match_the_tables(result):
    text = (result / "report.html").read_text(encoding="utf-8")
    sec = _section(text, "plausibility")
    seg = pd.read_csv(result / "segments.csv")
    run = json.loads((result / "run.json").read_text())
    perf = seg["perfused"].astype(bool).to_numpy()
    length = seg["length_um"].to_numpy(float)
    # One decimal of a percentage is shown: within 0.05 points.
    frac = _shown(_kv(sec)["perfused length fraction"])
    assert frac == pytest.approx(100 * length[perf].sum() / length.sum(), abs=0.05 + 1e-9)
    table = _tables(sec, "classes")[0].set_index("class")
    v, w = seg["velocity_mm_s"].to_numpy(float), seg["wss_pa"].to_numpy(float)
    for name, sel in _classes(seg, run).items():
        if name == "all":
            continue
        row = table.loc[name]
        assert int(row["perfused segments"]) == sel.sum(), name
        # Whole µm are shown: within half a µm.
        assert _shown(row["perfused length (µm)"]) == pytest.approx(length[sel].sum(), abs=0.5 + 1e-9)
        want = {"median speed (mm/s)": (v, 50), "95th percentile speed (mm/s)": (v, 95),
                "median wall shear stress (Pa)": (w, 50), "99th percentile wall shear stress (Pa)": (w, 99)}
        for col, (x, q) in want.items():
            got = _shown(row[col])
            if not sel.any():
                assert got is None, (name, col)
            else:
                # numpy's percentile (linear interpolation), as the summary defines them.
                assert got == pytest.approx(np.percentile(x[sel], q), rel=_SHOWN_RTOL), (name, col)
    checks = _tables(sec, "checks")[0]
    assert len(checks) >= 3 and {"within", "above", "below"} >= set(checks["verdict"])


def _band(ax, key):
    """The (x, y) extent of a shaded published range."""
    band = [c for c in ax.collections if c.get_gid() == f"band-{key}"][0]
    xy = np.vstack([p.vertices for p in band.get_paths()])
    return (xy[:, 0].min(), xy[:, 0].max()), (xy[:, 1].min(), xy[:, 1].max())


def test_plausibility_figure_shows_classes_and_published_ranges(result):
    data = report.load_sample(result, read_mip=False)
    fig = report.figure_flow_plausibility(data, [])
    av, aw = fig.axes[:2]
    seg = pd.read_csv(result / "segments.csv")
    run = json.loads((result / "run.json").read_text())
    classes = _classes(seg, run)
    for ax, quantity, col in ((av, "velocity", "velocity_mm_s"), (aw, "wss", "wss_pa")):
        x = seg[col].to_numpy(float)
        shown = []
        for i, (name, sel) in enumerate(classes.items()):
            want = np.sort(x[sel & (x > 0)])
            pts = [c for c in ax.collections if c.get_gid() == f"{quantity}-{name}"]
            if not len(want):
                assert not pts
                continue
            assert np.allclose(np.sort(np.asarray(pts[0].get_offsets())[:, 1]), want, rtol=1e-12)
            # The box's middle line is the class median (numpy's median).
            med = [ln for ln in ax.get_lines() if len(ln.get_xdata()) == 2
                   and np.allclose(ln.get_xdata(), [i - 0.275, i + 0.275])]
            assert any(np.allclose(ln.get_ydata(), np.median(want)) for ln in med), (quantity, name)
            shown.append(want)
        allv = np.concatenate(shown)
        lo, hi = ax.get_ylim()
        # Limits from the data and the ranges' ends: not pulled towards 0 by a
        # range starting at 0 on a log axis. Three decades: the perfused
        # segments' speeds and the published ranges' ends lie within them.
        assert ax.get_yscale() == "log" and allv.min() / 1e3 < lo < allv.min() and hi > allv.max()
    # Red cells in rodent cortical capillaries move at about 0.5-2 mm/s
    # (Kleinfeld D et al. 1998, PNAS 95:15741; from memory): the shaded range
    # of the median capillary speed holds that, over the capillary column only.
    (x0, x1), (y0, y1) = _band(av, "velocity_median_mm_s_capillary")
    assert y0 <= 0.5 and y1 >= 2.0 and -0.5 <= x0 < x1 <= 0.5
    # Arteriolar wall shear stress of about 1-5 Pa (Reneman RS, Hoeks APG 2008,
    # Med Biol Eng Comput 46:499): inside the range for the 99th percentile,
    # as far as the axis shows it, over every column.
    (x0, x1), (y0, y1) = _band(aw, "wss_p99_pa")
    assert y0 <= max(1.0, aw.get_ylim()[0]) and y1 >= 5.0 and x0 <= -0.5 and x1 >= 2.5
    assert y0 == pytest.approx(aw.get_ylim()[0])  # a range from 0 is drawn from the axis bottom


def test_plausibility_caption_names_the_sources(sample):
    text = (sample[1] / "report.html").read_text(encoding="utf-8")
    fig = _section(text, "plausibility")
    fig = fig[fig.index("<figcaption>"):]
    for source in ("Kleinfeld", "Reneman", "intravital"):
        assert source in fig, source


@pytest.mark.parametrize("key, value, expected", [
    # 50 mm/s is 25 times the red-cell speed in cortical capillaries
    # (0.5-2 mm/s, Kleinfeld et al. 1998, PNAS 95:15741; from memory) ...
    ("velocity_median_mm_s_capillary", 50.0, "Median capillary speed: 50 mm/s in the model, above"),
    # ... and 1 µm/s is flow all but stopped; 1 mm/s lies inside that range.
    ("velocity_median_mm_s_capillary", 0.001, "Median capillary speed: 0.001 mm/s in the model, below"),
    ("velocity_median_mm_s_capillary", 1.0, None),
    # Less than half of the length perfused: the statistics describe the minority of the network.
    ("perfused_length_fraction", 0.3, "Only 30 % of the vessel length carries flow"),
], ids=["capillary-fast", "capillary-stalled", "capillary-typical", "perfused-30pc"])
def test_plausibility_warning_appears_only_out_of_range(sample, tmp_path, key, value, expected):
    _, out, _ = sample
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    summary = json.loads((copy / "summary.json").read_text())
    summary[key] = value
    _rewrite(copy, "summary.json", summary)
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
    sec = _section((copy / "report.html").read_text(encoding="utf-8"), "plausibility")
    if expected is None:
        assert "No warning" in sec and "Outside the published ranges" not in sec
        assert "capillary speed" in sec  # the check is still listed, as within
    else:
        assert "Outside the published ranges" in sec and expected in sec
        assert sec.count("<li>") == 1  # only the changed statistic


def _uncertainty_numpy(seg):
    # Straight from the columns' definitions (pipeline/flow/solve.py, segments.csv).
    perf = seg["perfused"].astype(bool).to_numpy()
    q, lo, hi = (seg[c].to_numpy(float) for c in ("flow_nl_min", "flow_p05_nl_min", "flow_p95_nl_min"))
    conf = seg["direction_confidence"].to_numpy(float)
    c = conf[perf & np.isfinite(conf)]
    ok = perf & np.isfinite(q) & np.isfinite(lo) & np.isfinite(hi) & (q != 0)
    rel = (hi[ok] - lo[ok]) / np.abs(q[ok])
    return dict(n_conf=int((c >= 0.9).sum()), n_ens=len(c), share=(c >= 0.9).mean(), median=np.median(rel),
                p90=np.percentile(rel, 90), zero=int(((lo[ok] <= 0) & (hi[ok] >= 0)).sum()), n_width=int(ok.sum()))


def _check_uncertainty_html(folder):
    seg = pd.read_csv(folder / "segments.csv")
    want = _uncertainty_numpy(seg)
    kv = _kv(_section((folder / "report.html").read_text(encoding="utf-8"), "uncertainty"))
    share = kv["direction confidence ≥ 0.9 (share of perfused segments)"]
    # One decimal of a percentage is shown: within 0.05 points.
    assert _shown(share) == pytest.approx(100 * want["share"], abs=0.05 + 1e-9)
    assert f"({want['n_conf']} of {want['n_ens']})" in share
    assert _shown(kv["median relative interval width (p95 − p05) / |flow|"]) == pytest.approx(want["median"],
                                                                                               rel=_SHOWN_RTOL)
    assert _shown(kv["90th percentile of the relative interval width"]) == pytest.approx(want["p90"],
                                                                                          rel=_SHOWN_RTOL)
    assert kv["intervals including zero flow or the opposite direction"] == f"{want['zero']} of {want['n_width']}"
    # The function behind the table, at full precision.
    got = report.flow_uncertainty(seg)
    assert got["n_confident"] == want["n_conf"] and got["n_ensemble"] == want["n_ens"]
    assert np.isclose(got["relative_width_median"], want["median"], rtol=1e-12)
    assert got["n_interval_includes_zero"] == want["zero"]
    return want


def test_uncertainty_section_numbers_match_the_tables(result):
    _check_uncertainty_html(result)
    assert "lognormal" in _section((result / "report.html").read_text(encoding="utf-8"), "uncertainty")


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_uncertainty_numbers_on_changed_intervals(bed, tmp_path, seed):
    # Confidences and intervals drawn at random (shares of 16 members, as the
    # default ensemble gives), so the numbers are not all 1 and the medians
    # are not the fixture's by chance.
    copy = tmp_path / "copy"
    shutil.copytree(bed, copy)
    seg = pd.read_csv(copy / "segments.csv")
    rng = np.random.default_rng(seed)
    perf = seg["perfused"].astype(bool).to_numpy()
    q = seg["flow_nl_min"].to_numpy(float)
    seg["direction_confidence"] = np.where(perf, rng.integers(8, 17, len(seg)) / 16, np.nan)
    seg["flow_p05_nl_min"] = np.where(perf, q - np.abs(q) * rng.uniform(0.0, 1.5, len(seg)), np.nan)
    seg["flow_p95_nl_min"] = np.where(perf, q + np.abs(q) * rng.uniform(0.0, 1.5, len(seg)), np.nan)
    _rewrite(copy, "segments.csv", seg)
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
    want = _check_uncertainty_html(copy)
    assert 0 < want["share"] < 1 and want["zero"] > 0  # the draw exercises both sides of each count


def test_interval_figure_draws_each_segment_interval(result):
    data = report.load_sample(result, read_mip=False)
    ax = report.figure_flow_intervals(data, []).axes[0]
    seg = pd.read_csv(result / "segments.csv")
    perf = seg["perfused"].astype(bool).to_numpy()
    q, lo, hi = (seg[c].to_numpy(float) for c in ("flow_nl_min", "flow_p05_nl_min", "flow_p95_nl_min"))
    ok = perf & np.isfinite(lo) & np.isfinite(hi) & (q != 0)
    # In the estimate's direction: the upper end is the larger of s p05 and s p95.
    s = np.sign(q[ok])
    top = np.maximum(s * lo[ok], s * hi[ok])
    bottom = np.minimum(s * lo[ok], s * hi[ok])
    lines = [c for c in ax.collections if c.get_gid() == "intervals"][0].get_segments()
    got = np.array([[ln[0, 0], ln[1, 1]] for ln in lines])
    want = np.c_[np.abs(q[ok]), top]
    assert np.allclose(got[np.lexsort(got.T)], want[np.lexsort(want.T)], rtol=1e-12)
    zero = [c for c in ax.collections if c.get_gid() == "to-zero"]
    assert (len(zero[0].get_offsets()) if zero else 0) == int((bottom <= 0).sum())
    ymin = ax.get_ylim()[0]
    # Limits from the data: a decade at most below the smallest positive end shown.
    smallest = np.concatenate([np.abs(q[ok]), bottom[bottom > 0]]).min()
    assert smallest / 10 < ymin < smallest
    ident = [ln for ln in ax.get_lines() if ln.get_gid() == "identity"][0]
    assert np.allclose(ident.get_xdata(), ident.get_ydata())  # the estimate on y = x


def _flagged_table(folder):
    sec = _section((folder / "report.html").read_text(encoding="utf-8"), "bifurcations")
    tabs = _tables(sec, "bif")
    return sec, (tabs[0] if tabs else None)


def _severity_order(b):
    fl = b[b["flagged"].astype(bool)]
    sev = fl["severity"].to_numpy(float)
    return fl["node_id"].to_numpy()[np.argsort(-sev, kind="stable")]


def test_flagged_junctions_most_severe_first(result):
    b = pd.read_csv(result / "bifurcations.csv")
    sec, table = _flagged_table(result)
    want = _severity_order(b)
    assert f"{len(want)} of {len(b)} bifurcations flagged" in sec
    if len(want):  # the tree has several; the bed's capillary-sized junctions are not judged
        assert table["node"].astype(int).tolist() == want.tolist()[:50]  # the page lists the 50 most severe
        assert set(table["flow pattern"]) <= {"diverging", "converging"}  # flagged ones are judged ones
    else:
        assert table is None
    listed = set(table["node"].astype(int)) if table is not None else set()
    unc = b["uncertain"].astype(bool)
    assert not set(b.loc[unc, "node_id"]) & listed  # uncertain ones are not listed
    if unc.any():
        counts = _tables(sec, "uncertain")[0].set_index("reason")["junctions"].astype(int)
        reasons = b.loc[unc, "uncertain_reasons"].fillna("").str.split(";")
        for code in set(counts.index) | {c for r in reasons for c in r if c}:
            assert counts[code] == sum(code in r for r in reasons), code
        assert f"{int(unc.sum())} uncertain junction(s)" in sec
    # Murray medians per flow pattern: numpy's median of the finite ratios of that pattern.
    murray = _tables(sec, "murray")[0].set_index("flow pattern")
    for pattern in ("diverging", "converging"):
        r = b.loc[b["flow_pattern"] == pattern, "murray_ratio"].to_numpy(float)
        r = r[np.isfinite(r)]
        got = _shown(murray.loc[pattern, "median Murray ratio (r1³+r2³)/r0³"])
        assert got == (None if not len(r) else pytest.approx(np.median(r), rel=_SHOWN_RTOL)), pattern


def test_severity_order_with_infinite_and_uncertain_rows(sample, tmp_path):
    # An infinite severity (an uncertainty of 0) goes first and reads as ∞;
    # junctions marked uncertain are counted by reason and never listed.
    _, out, _ = sample
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    b = pd.read_csv(copy / "bifurcations.csv", dtype={"uncertain_reasons": object})
    flagged = b.index[b["flagged"].astype(bool)]
    calm = b.index[~b["flagged"].astype(bool)]
    assert len(flagged) >= 2 and len(calm) >= 2
    b.loc[flagged[-1], "severity"] = np.inf
    b.loc[calm[:2], "uncertain"] = True
    b.loc[calm[:2], "uncertain_reasons"] = ["mixed_flow", "low_confidence;ratio_unresolved"]
    _rewrite(copy, "bifurcations.csv", b)
    assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
    sec, table = _flagged_table(copy)
    assert table["node"].astype(int).tolist() == _severity_order(b).tolist()
    assert int(table["node"].iloc[0]) == int(b.loc[flagged[-1], "node_id"]) and table["severity"].iloc[0] == "∞"
    sev = [float(v) for v in table["severity"].iloc[1:]]
    assert sev == sorted(sev, reverse=True)
    counts = _tables(sec, "uncertain")[0].set_index("reason")["junctions"].astype(int).to_dict()
    assert {k: v for k, v in counts.items() if v} == {"low_confidence": 1, "ratio_unresolved": 1, "mixed_flow": 1}
    assert "2 uncertain junction(s)" in sec


# --------------------------------------------------------------------------- network exponent and comparison


_NETWORK_KEYS = ("murray_exponent_network", "murray_exponent_network_ci_low", "murray_exponent_network_ci_high")


def _with_network_exponent(cohort, seed):
    """The cohort with network exponents around 3.0 (ctrl) and 2.3 (trt) and intervals of +-0.1 to 0.2."""
    rng = np.random.default_rng(seed)
    x = np.where(cohort["group"] == "ctrl", 3.0, 2.3) + rng.normal(0, 0.05, len(cohort))
    return cohort.assign(murray_exponent_network=x, murray_exponent_network_ci_low=x - rng.uniform(0.1, 0.2, len(x)),
                         murray_exponent_network_ci_high=x + rng.uniform(0.1, 0.2, len(x)),
                         murray_exponent_network_junctions=rng.integers(5, 20, len(x)))


@pytest.mark.parametrize("seed", [0, 1])
def test_network_exponent_figure_shows_each_interval_and_the_group_estimate(seed):
    n = 6
    cohort = _with_network_exponent(pd.DataFrame({"sample_id": [f"s{i}" for i in range(2 * n)],
                                                  "group": ["ctrl"] * n + ["trt"] * n}), seed)
    groups = ["ctrl", "trt"]
    ax = report.figure_network_exponent(cohort, groups).axes[0]
    per, grp = report.network_exponent_table(cohort)
    for g in groups:
        rows = cohort[cohort["group"] == g]
        # the sample markers sit at the summary values
        bars = [c for c in ax.containers if c.get_label() == f"{g} (n = {n})"][0]
        assert np.allclose(bars.lines[0].get_ydata(), rows["murray_exponent_network"])
        x = rows["murray_exponent_network"].to_numpy()
        r = grp.set_index("group").loc[g]
        # Hodges & Lehmann 1963: the median of the Walsh averages, by brute force
        walsh = [(x[i] + x[j]) / 2 for i in range(n) for j in range(i, n)]
        assert r["hodges_lehmann_estimate"] == pytest.approx(np.median(walsh), abs=1e-12)
        # n = 6: the widest signed-rank interval [min, max] covers 1 - 2/2^6
        # (Wilcoxon 1945: P(W+ = 0) = 2^-n), the first n above 95 %
        assert (r["ci_low"], r["ci_high"]) == (x.min(), x.max()) and r["coverage"] == pytest.approx(1 - 2 / 64)
    # every sample's interval is drawn: error bar segments from ci_low to ci_high
    segs = np.concatenate([np.asarray(c.get_segments()) for c in ax.collections if hasattr(c, "get_segments")])
    ends = {(round(float(s[0, 1]), 9), round(float(s[1, 1]), 9)) for s in segs}
    for _, row in cohort.iterrows():
        assert (round(row["murray_exponent_network_ci_low"], 9), round(row["murray_exponent_network_ci_high"], 9)) in ends


def test_study_titles_are_plain_names_with_units(study):
    out, _ = study
    cohort = pd.read_csv(out / "cohort_summary.csv")
    comp = pd.read_csv(out / "group_comparison.csv")
    ax = report.figure_study_measure(cohort, comp, "length_density_mm_per_mm3", ["ctrl", "trt"]).axes[0]
    assert ax.get_title().startswith("vessel length density") and "length_density" not in ax.get_title()
    assert ax.get_ylabel() == "vessel length density (mm/mm³)"


def test_study_report_shows_the_network_exponent_or_says_it_is_absent(study, tmp_path):
    out, rows = study
    cohort = pd.read_csv(out / "cohort_summary.csv")
    for case in ("absent", "present"):
        copy = tmp_path / case
        shutil.copytree(out, copy)
        c = cohort.drop(columns=[k for k in cohort.columns if k.startswith("murray_exponent_network")])
        if case == "present":
            c = _with_network_exponent(c, 3)
        c.to_csv(copy / "cohort_summary.csv", index=False)
        assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
        text = (copy / "report.html").read_text(encoding="utf-8")
        section = text[text.index('id="network-exponent"'):text.index('id="comparison"')]
        if case == "absent":
            assert "hold no network Murray exponent" in section
            assert not (copy / "figures" / "study_network_exponent.png").exists()
        else:
            assert _not_blank(copy / "figures" / "study_network_exponent.png")
            for v in c["murray_exponent_network"]:
                assert _fmt(v) in section
            assert "exact coverage" in section


def test_batch_report_builds_and_links_each_sample_report(study, tmp_path):
    # batch --report: every sample gets its own report, and the study page
    # links it (a link inside the batch folder; nothing is fetched into the page).
    out, rows = study
    copy = tmp_path / "batch"
    shutil.copytree(out, copy)
    report.build_report(copy, overwrite=True, sample_reports=True)
    text = (copy / "report.html").read_text(encoding="utf-8")
    for r in rows:
        assert (copy / r["sample_id"] / "report.html").is_file()
        assert f'href="{r["sample_id"]}/report.html"' in text
    p = _parse(copy / "report.html")
    for tag, attr, ref in p.refs:
        local = tag == "a" and attr == "href" and (copy / ref).is_file() and ref.endswith("/report.html")
        assert ref.startswith("data:") or (ref.startswith("#") and ref[1:] in p.ids) or local, (tag, ref[:80])
    # Without overwrite an existing sample report is never replaced, and nothing is written.
    fresh = tmp_path / "batch2"
    shutil.copytree(out, fresh)
    (fresh / rows[0]["sample_id"] / "report.html").write_text("mine")
    (fresh / "report.html").unlink()
    shutil.rmtree(fresh / "figures")
    before = sorted(p.relative_to(fresh) for p in fresh.rglob("*"))
    with pytest.raises(pipeline.InputError, match="already have a report"):
        report.build_report(fresh, sample_reports=True)
    assert sorted(p.relative_to(fresh) for p in fresh.rglob("*")) == before
    assert (fresh / rows[0]["sample_id"] / "report.html").read_text() == "mine"


def test_a_warning_of_every_sample_is_said_once():
    from types import SimpleNamespace

    from pipeline.report.build import _shared_warnings

    def one(sid, *warnings):
        return sid, "g", SimpleNamespace(run={"warnings": list(warnings)})

    got = _shared_warnings([one("a", "w1", "w2"), one("b", "w1"), one("c", "w1", "w3"),
                            one("d", "w1"), one("e", "w1", "w2", "w2")])
    assert got == ["every sample: w1", "a, e: w2", "c: w3"]


def test_study_maps_are_drawn_from_the_masks(study, tmp_path, monkeypatch):
    # Every sample's mask exists, so no per-sample map may be drawn without it
    # (its title would say "(no mask found)").
    from pipeline.report import build

    out, rows = study
    copy = tmp_path / "batch"
    shutil.copytree(out, copy)
    seen = {}
    real = build.figure_map_level

    def spy(data, notes):
        seen[data.name] = data.mip is not None
        return real(data, notes)

    monkeypatch.setattr(build, "figure_map_level", spy)
    report.build_report(copy, overwrite=True)
    assert len(seen) == len(rows) and all(seen.values()), seen


def _layout(exe, page, tmp, width=1300):
    """Widths a real browser lays the page out at: the page, and every scroll box and <pre> wider than its box.

    A copy of the page without its Content-Security-Policy gets a script that
    measures after loading and writes the numbers into the DOM, which
    ``--dump-dom`` returns; the report itself carries no script.
    """
    src = page.read_text(encoding="utf-8")
    # folded sections opened: a reader who opens one must not have to scroll sideways either
    src = re.sub(r'<meta http-equiv="Content-Security-Policy"[^>]*>', "", src).replace("<details>", "<details open>")
    script = ("<script>window.addEventListener('load', () => {const d = document.documentElement;"
              "const wide = [...document.querySelectorAll('.scroll, pre')].filter(e => e.scrollWidth > "
              "e.clientWidth + 1).map(e => e.scrollWidth);"
              "const p = document.createElement('p'); p.id = 'layout'; p.textContent = JSON.stringify("
              "{page: d.scrollWidth, client: d.clientWidth, wide: wide}); document.body.appendChild(p);});"
              "</script></body>")
    probe = page.with_name("layout-probe.html")
    probe.write_text(src.replace("</body>", script), encoding="utf-8")
    try:
        cmd = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--no-first-run", "--disable-dev-shm-usage",
               f"--user-data-dir={tmp / 'profile'}", f"--window-size={width},1000", "--dump-dom", probe.as_uri()]
        dom = subprocess.run(cmd, capture_output=True, text=True, timeout=120, stdin=subprocess.DEVNULL).stdout
    finally:
        probe.unlink()
    m = re.search(r'<p id="layout">(.*?)</p>', dom)
    assert m, dom[-300:]
    return json.loads(html.unescape(m.group(1)))


@pytest.mark.integration  # headless Chromium
@pytest.mark.parametrize("which", ["sample", "study"])
def test_pages_fit_a_1300_px_window(which, request, tmp_path):
    # Issue of readers: a page (and every table on it) fits its content
    # without horizontal scrolling on a 1300 px wide window.
    exe = _chromium()
    out = request.getfixturevalue(which)[1 if which == "sample" else 0]
    copy = tmp_path / "copy"
    shutil.copytree(out, copy)
    if which == "sample":
        # a lab's paths are long and have no spaces to break at
        run = json.loads((copy / "run.json").read_text())
        run["input"]["path"] = "/data/" + "/".join(f"two_photon_imaging_cohort_{i}_segmented_final" for i in range(5))
        run["command"] = ["vesselflow", "analyze", run["input"]["path"], "-o", "/results/" + "x" * 150]
        (copy / "run.json").write_text(json.dumps(run))
        assert main(["report", str(copy), "--overwrite", "--quiet"]) == 0
    got = _layout(exe, copy / "report.html", tmp_path)
    assert got["page"] <= got["client"] and not got["wide"], got


@pytest.mark.integration  # headless Chromium
def test_reader_sees_the_summary_with_labels_and_units(sample, tmp_path):
    exe = _chromium()
    _, out, _ = sample
    rc, dom, console, _ = _render(exe, out / "report.html", tmp_path, dump=True)
    assert rc == 0 and not console, console
    body = dom[dom.index('id="summary"'):]
    assert "Total vessel length" in body and "<td>mm</td>" in body and "Vessel volume fraction" in body
    assert dom.index('class="overview"') < dom.index('id="summary"')


@pytest.mark.integration  # headless Chromium
def test_layout_check_catches_a_wide_table(sample, tmp_path):
    # The check above must be able to fail: a table of 40 unbreakable column
    # names in a scroll box is wider than its box.
    exe = _chromium()
    _, out, _ = sample
    page = tmp_path / "wide.html"
    heads = "".join(f"<th>column_name_{i:02d}_without_spaces</th>" for i in range(40))
    text = (out / "report.html").read_text(encoding="utf-8")
    page.write_text(text.replace("</body>", f'<div class="scroll"><table><tr>{heads}</tr></table></div></body>'),
                    encoding="utf-8")
    got = _layout(exe, page, tmp_path)
    assert got["wide"], got


def test_group_plots_of_four_groups_with_long_names_fit():
    # Four groups give six pairs: the title keeps the comparisons with the
    # first group, each line short enough for the figure; long names wrap.
    from pipeline.report.study import _TITLE_CHARS, figure_study_measure

    groups = ["control", "low dose treatment", "high dose treatment", "vehicle only"]
    rng = np.random.default_rng(0)
    cohort = pd.DataFrame({"sample_id": [f"s{i}" for i in range(16)], "group": np.repeat(groups, 4),
                           "radius_median_um": rng.normal(3, 0.3, 16)})
    pairs = [(a, b) for i, a in enumerate(groups) for b in groups[i + 1:]]
    comparison = pd.DataFrame([dict(measure="radius_median_um", group_a=a, group_b=b, p_value=0.5, q_value=0.7,
                                    hodges_lehmann_shift=-1234.5678, hodges_lehmann_ci_low=-98765.4321,
                                    hodges_lehmann_ci_high=12345.6789, test_note="") for a, b in pairs])
    ax = figure_study_measure(cohort, comparison, "radius_median_um", groups).axes[0]
    lines = ax.get_title().replace("\u00a0", " ").splitlines()[1:]
    assert all(len(ln) <= _TITLE_CHARS for ln in lines)
    joined = " ".join(lines).replace("   ", " ").split(" q = 0.7")[:-1]  # continuation lines start indented
    assert [c.strip(" ,").split(" − ")[0] for c in joined] == groups[1:]  # each against the first group
    assert all(max(len(part) for part in t.get_text().split("\n")) <= len("treatment") + 3
               for t in ax.get_xticklabels())


def _inside_figure(fig, artist):
    """Whether a drawn artist lies wholly inside its figure (matplotlib's own layout, in pixels)."""
    fig.canvas.draw()
    box, frame = artist.get_window_extent(), fig.bbox
    return box.x0 >= frame.x0 - 1 and box.x1 <= frame.x1 + 1 and box.y0 >= frame.y0 - 1 and box.y1 <= frame.y1 + 1


def test_no_study_plot_title_or_label_is_clipped(study):
    # Issue of readers: the q-value line over a group plot was cut off on both
    # sides. Every title and tick label of every study figure must lie inside
    # the figure, also with four groups of long names.
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    from pipeline.report.study import figure_study_measure, study_figures

    out, _ = study
    cohort = pd.read_csv(out / "cohort_summary.csv")
    comp = pd.read_csv(out / "group_comparison.csv")
    figs = [f for f, _, _ in study_figures(cohort, comp).values()]
    groups = ["control", "low dose treatment", "high dose treatment", "vehicle only"]
    four = pd.DataFrame({"sample_id": [f"s{i}" for i in range(16)], "group": np.repeat(groups, 4),
                         "radius_median_um": np.linspace(2, 4, 16)})
    pairs = [(a, b) for i, a in enumerate(groups) for b in groups[i + 1:]]
    comp4 = pd.DataFrame([dict(measure="radius_median_um", group_a=a, group_b=b, p_value=0.5, q_value=0.7,
                               hodges_lehmann_shift=-1234.5678, hodges_lehmann_ci_low=-98765.4321,
                               hodges_lehmann_ci_high=12345.6789, test_note="") for a, b in pairs])
    figs.append(figure_study_measure(four, comp4, "radius_median_um", groups))
    for fig in figs:
        FigureCanvasAgg(fig)
        for ax in fig.axes:
            for artist in [ax.title, *ax.get_xticklabels()]:
                if artist.get_text():
                    assert _inside_figure(fig, artist), artist.get_text()[:60]
    # the check can fail: a title of 200 characters runs out of the figure on both sides
    from matplotlib.figure import Figure

    control = Figure(figsize=(5.2, 4.4), layout="constrained")
    FigureCanvasAgg(control)
    control.add_subplot().set_title("x" * 200)
    assert not _inside_figure(control, control.axes[0].title)
