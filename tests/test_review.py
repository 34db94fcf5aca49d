"""Tests of pipeline/review.py: the review.csv format and the reviewed summary (no napari, no Qt)."""

import csv
import hashlib
import json
import math
import statistics
import subprocess
import sys

import numpy as np
import pytest

from pipeline import review, synthetic, tables
from pipeline.cli import main
from pipeline.errors import InputError

# Murray-law reason codes, as README.md's "Bifurcation flags" table lists them.
MURRAY_CODES = {"ratio_high", "ratio_low", "exponent_high", "exponent_low", "exponent_undefined"}


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """A result folder of a Murray tree with half its junctions broken on purpose, so several are flagged."""
    root = tmp_path_factory.mktemp("review")
    net = synthetic.binary_tree(depth=3, root_radius_um=5.0, exponent=3.0, seed=3, broken_fraction=0.5,
                                broken_ratio=0.95, min_radius_um=2.0)
    mask, _ = synthetic.rasterize(net, spacing=(1.0, 1.0, 1.0))
    np.save(root / "tree.npy", mask)
    out = root / "tree"
    assert main(["analyze", str(root / "tree.npy"), "-o", str(out), "--spacing", "1", "1", "1", "--quiet",
                 "--blind-ends", "outlet"]) == 0
    return out


def _csv_rows(path):
    with open(path, newline="", encoding="utf-8") as fh:
        return list(csv.DictReader(fh))


def _fresh(folder, tmp_path):
    """A private copy of the result folder, so tests do not see each other's review.csv."""
    import shutil

    dst = tmp_path / "copy"
    shutil.copytree(folder, dst)
    return dst


def test_save_and_load_round_trip(folder, tmp_path):
    out = _fresh(folder, tmp_path)
    r = review.record_decision(review.empty_review(), 3, decision="artefact", note='merged "kiss", two vessels')
    r = review.record_decision(r, 1, decision="unsure")
    r = review.record_decision(r, 3, decision="confirmed", note="")  # replaces the earlier decision on 3
    review.save_review(out, r)
    # Read back with the standard library's csv module, not the code under test.
    rows = _csv_rows(out / "review.csv")
    assert list(rows[0]) == ["node_id", "decision", "note", "reviewed_at"]
    assert [(x["node_id"], x["decision"], x["note"]) for x in rows] == [("1", "unsure", ""), ("3", "confirmed", "")]
    for x in rows:
        # ISO 8601 with a UTC offset (Python's datetime.fromisoformat is the reference parser).
        assert __import__("datetime").datetime.fromisoformat(x["reviewed_at"]).utcoffset() is not None
    back = review.load_review(out)
    assert back["node_id"].tolist() == [1, 3] and back["decision"].tolist() == ["unsure", "confirmed"]
    # Atomic write: no temporary file is left beside it.
    assert not [p.name for p in out.iterdir() if p.name.startswith(".review.csv")]


def test_note_with_comma_and_quotes_survives(folder, tmp_path):
    out = _fresh(folder, tmp_path)
    note = 'kissing vessels, "merged" by the threshold'
    review.save_review(out, review.record_decision(review.empty_review(), 2, decision="artefact", note=note))
    assert _csv_rows(out / "review.csv")[0]["note"] == note  # csv module quoting rules (RFC 4180)
    assert review.load_review(out)["note"].iloc[0] == note


def test_no_review_file_is_an_empty_review(folder, tmp_path):
    out = _fresh(folder, tmp_path)
    assert len(review.load_review(out)) == 0


@pytest.mark.parametrize("text, expected", [
    ("node_id,decision,note,reviewed_at\n0,maybe,,\n", r"line 2: decision: expected one of .*got 'maybe'"),
    ("node_id,decision,note,reviewed_at\n0,confirmed,,\nx,artefact,,\n", r"line 3: node_id: .*got 'x'"),
    ("node_id,decision,note,reviewed_at\n0,confirmed,,\n0,artefact,,\n", r"line 3: node_id 0 is reviewed twice"),
    ("node_id,decision,note,reviewed_at\n0,confirmed,,yesterday\n", r"line 2: reviewed_at: .*got 'yesterday'"),
    ("node_id,decision,note\n0,confirmed,\n", r"missing reviewed_at"),
    ("node_id,decision,note,reviewed_at,score\n0,confirmed,,,1\n", r"unknown score"),
    ("", r"empty file"),
])
def test_invalid_review_names_line_and_value(folder, tmp_path, text, expected):
    out = _fresh(folder, tmp_path)
    (out / "review.csv").write_text(text, encoding="utf-8")
    with pytest.raises(InputError, match=expected):
        review.load_review(out)


def test_apply_review_drops_artefacts_from_the_summary(folder, tmp_path):
    out = _fresh(folder, tmp_path)
    rows = _csv_rows(out / "bifurcations.csv")  # read with the csv module, independent of pandas and the code
    flagged = [r for r in rows if r["flagged"] == "True"]
    assert len(flagged) >= 3, "the broken tree should give several flagged junctions"
    artefacts = {int(flagged[0]["node_id"]), int(flagged[1]["node_id"])}
    confirmed = int(flagged[2]["node_id"])
    r = review.empty_review()
    for n in artefacts:
        r = review.record_decision(r, n, decision="artefact")
    r = review.record_decision(r, confirmed, decision="confirmed")
    unsure = next(int(x["node_id"]) for x in rows if x["flagged"] == "False")  # decisions on unflagged rows count too
    r = review.record_decision(r, unsure, decision="unsure")
    review.save_review(out, r)

    result = tables.load_result(out)
    summary, bifs = review.apply_review(result)  # review=None reads review.csv

    kept = [x for x in rows if int(x["node_id"]) not in artefacts]
    expo = [float(x["murray_exponent"]) for x in kept if x["murray_exponent"] not in ("", "nan")]
    expo = [v for v in expo if math.isfinite(v)]
    ratio = [float(x["murray_ratio"]) for x in kept if x["murray_ratio"] not in ("", "nan")]
    within = [x for x in kept if not (set(x["flag_reasons"].split(";")) & MURRAY_CODES)]
    # Expected values from the definitions in README.md ("median Murray exponent", "fraction within
    # tolerance" = share without a Murray-law code), computed with the statistics module.
    assert summary["bifurcations"] == len(rows) - 2
    assert summary["bifurcations_flagged"] == len(flagged) - 2
    assert summary["bifurcations_excluded_by_review"] == 2
    assert summary["murray_exponent_median"] == pytest.approx(statistics.median(expo), rel=1e-12)  # float round-off
    assert summary["murray_ratio_median"] == pytest.approx(statistics.median(ratio), rel=1e-12)
    assert summary["fraction_within_tolerance"] == pytest.approx(len(within) / len(kept), rel=1e-12)
    assert summary["review_counts"] == {"confirmed": 1, "artefact": 2, "unsure": 1,
                                        "flagged_unreviewed": len(flagged) - 3}
    # Keys outside the bifurcation part are untouched.
    assert summary["total_length_mm"] == result.summary["total_length_mm"]
    assert result.summary["bifurcations"] == len(rows)  # the input summary is not modified
    # All rows come back, with the decisions joined on node_id.
    assert len(bifs) == len(rows)
    got = dict(zip(bifs["node_id"], bifs["review_decision"]))
    assert {n for n, d in got.items() if d == "artefact"} == artefacts
    assert got[confirmed] == "confirmed" and got[unsure] == "unsure"
    assert sum(d == "" for d in got.values()) == len(rows) - 4


def test_apply_review_without_decisions_keeps_the_summary(folder):
    result = tables.load_result(folder)
    summary, _ = review.apply_review(result, review.empty_review())
    # The recomputed bifurcation part equals what the analysis wrote (summary.json read with json).
    written = json.loads((folder / "summary.json").read_text())
    for key in ("bifurcations", "bifurcations_flagged", "flag_counts", "murray_exponent_median",
                "murray_ratio_median", "fraction_within_tolerance", "flow_split_error_median"):
        assert summary[key] == pytest.approx(written[key], rel=1e-12) if isinstance(written[key], float) \
            else summary[key] == written[key]
    assert summary["bifurcations_excluded_by_review"] == 0


def test_apply_review_rejects_unknown_node(folder):
    result = tables.load_result(folder)
    bad = int(result.nodes["node_id"].max()) + 100
    r = review.record_decision(review.empty_review(), bad, decision="artefact")
    with pytest.raises(InputError, match=f"node_id {bad} is not a junction"):
        review.apply_review(result, r)


def test_summarize_apply_review_cli(folder, tmp_path, capsys):
    out = _fresh(folder, tmp_path)
    assert main(["summarize", str(out), "--apply-review"]) == 2  # no review.csv yet
    assert "review.csv" in capsys.readouterr().err
    before = hashlib.sha256((out / "summary.json").read_bytes()).hexdigest()
    flagged = [r for r in _csv_rows(out / "bifurcations.csv") if r["flagged"] == "True"]
    review.save_review(out, review.record_decision(review.empty_review(), int(flagged[0]["node_id"]),
                                                   decision="artefact"))
    assert main(["summarize", str(out), "--apply-review"]) == 0
    printed = capsys.readouterr().out
    assert f"bifurcations_flagged: {len(flagged)} -> {len(flagged) - 1}" in printed
    reviewed = json.loads((out / "summary_reviewed.json").read_text())
    assert reviewed["bifurcations_flagged"] == len(flagged) - 1
    assert hashlib.sha256((out / "summary.json").read_bytes()).hexdigest() == before  # never overwritten
    assert main(["summarize", str(out), "--apply-review"]) == 2  # refuses to replace without --overwrite
    assert "--overwrite" in capsys.readouterr().err
    assert main(["summarize", str(out), "--apply-review", "--overwrite"]) == 0


def test_segment_measure_murray_ratio_is_the_distal_junction(folder):
    result = tables.load_result(folder)
    values = review.segment_measure(result, "murray_ratio")
    rows = _csv_rows(folder / "bifurcations.csv")
    parent = {int(r["parent_segment"]): float(r["murray_ratio"]) for r in rows}
    for sid, v in zip(result.segments["segment_id"], values):
        if sid in parent:
            assert v == pytest.approx(parent[sid], rel=1e-12)
        else:
            assert math.isnan(v)  # a terminal segment is nobody's parent
    flow = review.segment_measure(result, "flow")
    assert np.all(flow[np.isfinite(flow)] >= 0)  # |Q|: the sign only says the tracing direction
    with pytest.raises(InputError, match="expected one of"):
        review.segment_measure(result, "colour")


def test_core_does_not_import_napari(folder, tmp_path):
    # The analysis core must run without the viewer extra: check sys.modules in a fresh interpreter.
    code = (
        "import sys, numpy as np\n"
        "import pipeline, pipeline.cli, pipeline.review, pipeline.tables\n"
        "from pipeline import synthetic\n"
        "m, _ = synthetic.rasterize(synthetic.straight_tube(radius_um=4, length_um=40), spacing=(1, 1, 1))\n"
        f"np.save({str(tmp_path / 't.npy')!r}, m)\n"
        f"assert pipeline.cli.main(['analyze', {str(tmp_path / 't.npy')!r}, '-o', {str(tmp_path / 'o')!r}, "
        "'--quiet', '--spacing', '1', '1', '1']) == 0\n"
        f"pipeline.review.apply_review(pipeline.tables.load_result({str(folder)!r}))\n"
        "bad = sorted(k for k in sys.modules if k.split('.')[0] in ('napari', 'qtpy', 'PyQt6', 'PySide6', 'vispy'))\n"
        "print(bad)\n"
        "assert not bad, bad\n"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-2000:]
