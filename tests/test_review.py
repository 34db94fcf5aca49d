"""Tests of pipeline/review.py: the review.csv format and the reviewed summary (no napari, no Qt)."""

import csv
import dataclasses
import hashlib
import json
import math
import re
import statistics
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from pipeline import review, tables
from pipeline.cli import main
from pipeline.errors import InputError

# Murray-law reason codes, as README.md's "Bifurcation flags" table lists them.
MURRAY_CODES = {"ratio_high", "ratio_low", "exponent_high", "exponent_low", "exponent_undefined"}


@pytest.fixture(scope="module")
def folder(broken_tree_result):
    """A result folder of a Murray tree with half its junctions broken on purpose (conftest.py)."""
    return broken_tree_result


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
    judged = [x for x in kept if x["uncertain"] != "True"]
    within = [x for x in judged if not (set(x["flag_reasons"].split(";")) & MURRAY_CODES)]
    # Expected values from the definitions in README.md ("median Murray exponent", "fraction within
    # tolerance" = share of the judged junctions without a Murray-law code), computed with the
    # statistics module.
    assert summary["bifurcations"] == len(rows) - 2
    assert summary["bifurcations_flagged"] == len(flagged) - 2
    assert summary["bifurcations_excluded_by_review"] == 2
    assert summary["murray_exponent_median"] == pytest.approx(statistics.median(expo), rel=1e-12)  # float round-off
    assert summary["murray_ratio_median"] == pytest.approx(statistics.median(ratio), rel=1e-12)
    assert summary["fraction_within_tolerance"] == pytest.approx(len(within) / len(judged), rel=1e-12)
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


# --------------------------------------------------------------------------- malformed review files

HEADER = b"node_id,decision,note,reviewed_at\n"
# Malformed files, each with the value its one error line must name (a regular expression).
# None as the content: review.csv is a folder.
MALFORMED = {
    "id-30-digits": (HEADER + b"123456789012345678901234567890,artefact,,\n",
                     r"line 2: node_id: expected .*got '123456789012345678901234567890'"),
    "id-minus-30-digits": (HEADER + b"-123456789012345678901234567890,artefact,,\n",
                           r"line 2: node_id: expected .*got '-123456789012345678901234567890'"),
    "id-past-int64": (HEADER + b"9223372036854775808,artefact,,\n", r"line 2: node_id: .*got '9223372036854775808'"),
    "id-negative": (HEADER + b"-1,artefact,,\n", r"line 2: node_id: .*got '-1'"),
    "id-1e400": (HEADER + b"1e400,artefact,,\n", r"line 2: node_id: .*got '1e400'"),
    "id-nan": (HEADER + b"nan,artefact,,\n", r"line 2: node_id: .*got 'nan'"),
    "id-inf": (HEADER + b"inf,artefact,,\n", r"line 2: node_id: .*got 'inf'"),
    "id-float": (HEADER + b"3.5,artefact,,\n", r"line 2: node_id: .*got '3.5'"),
    "id-empty": (HEADER + b",artefact,,\n", r"line 2: node_id: .*got ''"),
    # Python's int() accepts all of these; none is a node id a person or vesselflow writes.
    "id-no-break-space": (HEADER + "\u00a03,artefact,,\n".encode(), r"line 2: node_id: .*got '\\xa03'"),
    "id-inner-space": (HEADER + b"1 2,artefact,,\n", r"line 2: node_id: .*got '1 2'"),
    "id-underscore": (HEADER + b"1_0,artefact,,\n", r"line 2: node_id: .*got '1_0'"),
    "id-arabic-digit": (HEADER + "\u0663,artefact,,\n".encode(), "line 2: node_id: .*got '\u0663'"),
    "decision": (HEADER + b"0,maybe,,\n", r"line 2: decision: expected one of .*got 'maybe'"),
    "date": (HEADER + b"0,artefact,,2024-13-45T00:00:00+00:00\n", r"line 2: reviewed_at: .*got '2024-13-45T"),
    "duplicated-id": (HEADER + b"0,artefact,,\n0,confirmed,,\n", r"line 3: node_id 0 is reviewed twice"),
    "unknown-column": (b"node_id,decision,note,reviewed_at,score\n0,artefact,,,1\n", r"line 1: .*unknown score"),
    "repeated-column": (b"node_id,decision,note,reviewed_at,note\n0,artefact,,,\n", r"'note' appears twice"),
    "too-many-fields": (HEADER + b"0,artefact,,,extra\n", r"line 2: expected at most 4 fields.*got 5"),
    "unclosed-quote": (HEADER + b'0,artefact,"starts a note,\n1,confirmed,,\n', r"line 2: .*quote"),
    "non-utf8-note": (HEADER + b"0,artefact,caf\xe9,\n", r"line 2: note: expected UTF-8 text, got .*caf\\xe9"),
    "non-utf8-header": (b"node_id,d\xe9cision,note,reviewed_at\n0,artefact,,\n", r"line 1: .*expected UTF-8 text"),
    # The line a person opens: the second row starts on line 4, after a note over two lines.
    "line-after-multiline-note": (HEADER + b'0,artefact,"two\nlines",\n1,maybe,,\n', r"line 4: decision: .*'maybe'"),
    "folder": (None, r"expected a file, got a folder"),
}


def _write_review(out, content):
    path = out / "review.csv"
    if content is None:
        path.mkdir()
        (path / "inside.csv").write_bytes(HEADER)
    else:
        path.write_bytes(content)
    return path


def _one_error_line(capsys):
    captured = capsys.readouterr()
    err = captured.err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("vesselflow: error: "), err
    assert "Traceback" not in captured.err and not captured.out
    return err[0]


@pytest.mark.parametrize("content, expected", MALFORMED.values(), ids=MALFORMED.keys())
def test_malformed_review_is_one_input_error(folder, tmp_path, content, expected):
    out = _fresh(folder, tmp_path)
    path = _write_review(out, content)
    with pytest.raises(InputError, match=expected) as err:
        review.load_review(out)
    assert str(err.value).startswith(str(path))  # names the file
    assert "\n" not in str(err.value)
    with pytest.raises(InputError, match=expected):
        review.check_review(tables.load_result(out))


@pytest.mark.parametrize("content, expected", MALFORMED.values(), ids=MALFORMED.keys())
def test_malformed_review_stops_summarize_and_report(folder, tmp_path, capsys, content, expected):
    out = _fresh(folder, tmp_path)
    _write_review(out, content)
    assert main(["summarize", str(out), "--apply-review"]) == 2
    line = _one_error_line(capsys)
    assert re.search(expected, line) and "review.csv" in line, line
    assert not (out / "summary_reviewed.json").exists()
    listing = sorted(p.name for p in out.iterdir())
    assert main(["report", str(out), "--quiet"]) == 2
    line = _one_error_line(capsys)
    assert re.search(expected, line) and "review.csv" in line, line
    assert sorted(p.name for p in out.iterdir()) == listing  # no report.html, no figures/, no temporary folder


def test_unreadable_review_is_one_input_error(folder, tmp_path, capsys, monkeypatch):
    out = _fresh(folder, tmp_path)
    _write_review(out, HEADER)
    real = Path.read_bytes

    def denied(self):
        if self.name == "review.csv":
            raise PermissionError(13, "Permission denied", str(self))
        return real(self)

    # The tests may run as root, which chmod does not stop: refuse the read instead.
    monkeypatch.setattr(Path, "read_bytes", denied)
    with pytest.raises(InputError, match=r"review.csv: expected a readable file.*Permission denied"):
        review.load_review(out)
    assert main(["summarize", str(out), "--apply-review"]) == 2
    assert "Permission denied" in _one_error_line(capsys)
    assert main(["report", str(out), "--quiet"]) == 2
    assert "Permission denied" in _one_error_line(capsys)
    assert not (out / "summary_reviewed.json").exists() and not (out / "report.html").exists()


def test_unknown_node_id_is_rejected_alike_by_summarize_and_report(folder, tmp_path, capsys):
    out = _fresh(folder, tmp_path)
    ends = [r["node_id"] for r in _csv_rows(out / "nodes.csv") if r["kind"] != "junction"]
    flagged = [r["node_id"] for r in _csv_rows(out / "bifurcations.csv") if r["flagged"] == "True"]
    # Syntactically valid, so the file itself reads; the second row names an end point, not a junction.
    (out / "review.csv").write_bytes(HEADER + f"{flagged[0]},artefact,,\n{ends[0]},confirmed,,\n".encode())
    assert len(review.load_review(out)) == 2
    with pytest.raises(InputError, match=rf"review.csv line 3: node_id {ends[0]} is not a junction"):
        review.check_review(tables.load_result(out))
    with pytest.raises(InputError, match=rf"review.csv line 3: node_id {ends[0]} is not a junction"):
        review.apply_review(tables.load_result(out))
    assert main(["summarize", str(out), "--apply-review"]) == 2
    from_summarize = _one_error_line(capsys)
    assert main(["report", str(out), "--quiet"]) == 2
    from_report = _one_error_line(capsys)
    # The same check, word for word; report only says which command failed.
    assert from_report == from_summarize.replace("vesselflow: error: ", "vesselflow: error: report: ", 1)
    assert not (out / "summary_reviewed.json").exists() and not (out / "report.html").exists()


def test_check_review_returns_the_validated_table(folder, tmp_path):
    out = _fresh(folder, tmp_path)
    result = tables.load_result(out)
    assert len(review.check_review(result)) == 0  # no review.csv: no decisions
    flagged = [int(r["node_id"]) for r in _csv_rows(out / "bifurcations.csv") if r["flagged"] == "True"]
    r = review.record_decision(review.empty_review(), flagged[0], decision="artefact")
    assert review.check_review(result, r)["node_id"].tolist() == [flagged[0]]
    review.save_review(out, r)
    got = review.check_review(result)
    assert got["node_id"].tolist() == [flagged[0]] and got["node_id"].dtype == np.int64
    with pytest.raises(InputError, match=r"review row 1: node_id 123456 is not a junction .*has no such node"):
        review.check_review(result, review.record_decision(r, 123456, decision="unsure"))
    off = dataclasses.replace(result, summary={**result.summary, "bifurcations_enabled": False})
    with pytest.raises(InputError, match=r"review.csv: expected no decisions.*switched off\); got 1"):
        review.check_review(off)


@pytest.mark.parametrize("value", [10**30, -(10**30), 2**63, -1, 3.5, float("inf"), float("nan"), "1e400", True])
def test_in_memory_review_rejects_bad_node_ids(tmp_path, value):
    import pandas as pd

    table = pd.DataFrame({"node_id": [value], "decision": ["artefact"], "note": [""], "reviewed_at": [""]},
                         dtype=object)
    with pytest.raises(InputError, match=r"review row 0: node_id: expected"):
        review.save_review(tmp_path, table)
    assert not list(tmp_path.iterdir())
    if not isinstance(value, (float, bool, str)):
        with pytest.raises(InputError, match=r"node_id: expected"):
            review.record_decision(review.empty_review(), value, decision="artefact")


def test_legitimate_csv_variants_still_read(folder, tmp_path, capsys):
    out = _fresh(folder, tmp_path)
    flagged = [r["node_id"] for r in _csv_rows(out / "bifurcations.csv") if r["flagged"] == "True"]
    a, b = flagged[:2]
    note = 'two vessels, "kissing"\nsecond line of the note'
    # A byte-order mark (spreadsheets write one), CRLF line ends, a quoted note over two lines, a blank line,
    # an empty row, spaces after the commas and a row that leaves out its empty last field.
    text = ("\ufeffnode_id,decision,note,reviewed_at\r\n"
            f'{a},artefact,"{note.replace(chr(34), chr(34) * 2)}",2024-05-01T14:03:00+00:00\r\n'
            "\r\n,,,\r\n"
            f" {b}, unsure ,caf\u00e9\r\n")
    (out / "review.csv").write_bytes(text.encode("utf-8"))
    got = review.load_review(out)
    assert got["node_id"].tolist() == sorted([int(a), int(b)])
    by_id = dict(zip(got["node_id"], zip(got["decision"], got["note"])))
    assert by_id[int(a)] == ("artefact", note) and by_id[int(b)] == ("unsure", "caf\u00e9")
    assert main(["summarize", str(out), "--apply-review"]) == 0
    assert json.loads((out / "summary_reviewed.json").read_text())["bifurcations_excluded_by_review"] == 1
    capsys.readouterr()
    # The note over two lines survives a save and a read (RFC 4180 quoting).
    review.save_review(out, got)
    assert review.load_review(out)["note"].tolist() == got["note"].tolist()
    assert _csv_rows(out / "review.csv")[0]["note"] == note


def test_damaged_review_files_never_raise_anything_but_input_error(folder, tmp_path):
    # Byte-level damage (flipped, dropped and inserted bytes) of a valid review: every outcome is a table
    # or an InputError, never another exception.
    out = _fresh(folder, tmp_path)
    flagged = [r["node_id"] for r in _csv_rows(out / "bifurcations.csv") if r["flagged"] == "True"]
    good = (HEADER + "".join(f'{n},artefact,"a note, with ""quotes""",2024-05-01T14:03:00+00:00\n'
                             for n in flagged).encode())
    result = tables.load_result(out)
    rng = np.random.default_rng(7)
    alphabet = np.frombuffer(b'0123456789-+.eE ,"\n\r\t\x00\xff\xc3', dtype=np.uint8)
    outcomes = set()
    for _ in range(300):
        data = bytearray(good)
        for _ in range(int(rng.integers(1, 4))):
            i = int(rng.integers(0, len(data)))
            how = int(rng.integers(0, 3))
            if how == 0:
                data[i] = int(rng.choice(alphabet))
            elif how == 1:
                del data[i]
            else:
                data[i:i] = bytes(rng.choice(alphabet, size=int(rng.integers(1, 30))))
        (out / "review.csv").write_bytes(bytes(data))
        try:
            review.check_review(result)
            outcomes.add("read")
        except InputError as exc:
            assert "\n" not in str(exc), str(exc)
            outcomes.add("rejected")
    assert outcomes == {"read", "rejected"}
