"""The review model behind the viewer's panel, driven without Qt (pipeline/review_session.py)."""

import shutil

import numpy as np
import pytest

from pipeline import review
from pipeline.errors import InputError
from pipeline.review_session import ReviewSession, review_queue


@pytest.fixture(scope="module")
def folder(broken_tree_result):
    """A result folder of a Murray tree with half its junctions broken on purpose (conftest.py)."""
    return broken_tree_result


@pytest.fixture
def session(folder, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(folder, copy)
    s = ReviewSession(copy)
    assert len(s.queue) >= 2, "the fixture needs at least two flagged junctions"
    return s


def test_queue_is_the_flagged_junctions_most_severe_first(session):
    b = session.result.bifurcations
    assert sorted(session.queue["node_id"]) == sorted(b.loc[b["flagged"].astype(bool), "node_id"])
    sev = session.queue["severity"].to_numpy(float)
    assert np.all(np.diff(sev[np.isfinite(sev)]) <= 0)
    assert [r["node"][0] for r in session.rows()] == [str(int(n)) for n in session.queue["node_id"]]
    assert review_queue(session.result).equals(session.queue)


def test_stepping_wraps_round_the_queue(session):
    order = [int(n) for n in session.queue["node_id"]]
    assert session.current is None
    assert session.step(+1) == order[0]
    assert session.step(-1) == order[-1]
    assert session.step(+1) == order[0]
    assert session.step(+1, order[::-1]) == order[-1]  # in the order the reviewer sorted the table by
    assert session.step(+1, []) is None


def test_a_decision_is_saved_at_once_and_counted(session):
    first = int(session.queue["node_id"].iloc[0])
    assert session.decide("artefact") is None  # no junction under review: nothing saved
    session.go(first)
    path = session.decide("artefact", "a blob on the wall")
    assert path == session.result.path / review.REVIEW_FILE and path.is_file()
    assert session.decision_of(first) == ("artefact", "a blob on the wall")
    saved = review.load_review(session.result.path)
    assert saved["node_id"].tolist() == [first] and saved["decision"].tolist() == ["artefact"]
    c = session.counts()
    assert c["reviewed"] == 1 and c["artefact"] == 1 and c["confirmed"] == 0 and c["flagged"] == len(session.queue)
    assert session.rows()[0]["decision"] == ("artefact", "artefact")
    assert "review: artefact" in session.details(first)[-1]
    # the summary with the review applied leaves it out
    summary, _ = review.apply_review(session.result)
    assert summary["bifurcations_excluded_by_review"] == 1


def test_a_note_alone_is_not_a_review(session):
    first = int(session.queue["node_id"].iloc[0])
    session.go(first)
    assert session.set_note("looks odd") is None
    assert not (session.result.path / review.REVIEW_FILE).exists()
    session.decide("unsure", "looks odd")
    assert session.set_note("looks odd") is None  # unchanged: nothing to save
    assert session.set_note("checked the raw stack") is not None
    assert session.decision_of(first) == ("unsure", "checked the raw stack")
    assert session.clear() is not None
    assert session.decision_of(first) == ("", "")
    assert len(review.load_review(session.result.path)) == 0


def test_a_node_that_is_no_junction_is_refused(session):
    ends = session.result.nodes.loc[session.result.nodes["kind"] != "junction", "node_id"]
    with pytest.raises(InputError) as info:
        session.go(int(ends.iloc[0]))
    assert info.value.param == "node_id" and session.current is None


def test_details_name_the_parent_and_daughters(session):
    node = int(session.queue["node_id"].iloc[0])
    lines = session.details(node)
    assert lines[0].startswith(f"junction {node} at z ")
    assert any(line.startswith("parent (segment ") for line in lines)
    assert any(line.startswith("daughter 1") for line in lines) and any(line.startswith("daughter 2")
                                                                          for line in lines)
    assert any("Murray ratio" in line for line in lines)


def test_a_bad_review_file_stops_the_session(folder, tmp_path):
    copy = tmp_path / "copy"
    shutil.copytree(folder, copy)
    (copy / review.REVIEW_FILE).write_text("node_id,decision,note,reviewed_at\n999999,artefact,,\n")
    with pytest.raises(InputError):
        ReviewSession(copy)


def test_the_model_loads_no_qt(folder):
    import subprocess
    import sys

    code = ("import sys; from pipeline.review_session import ReviewSession; "
            f"ReviewSession({str(folder)!r}); "
            "bad = [m for m in ('napari', 'qtpy', 'PyQt5', 'PyQt6', 'PySide6') if m in sys.modules]; "
            "sys.exit(1 if bad else 0)")
    assert subprocess.run([sys.executable, "-c", code]).returncode == 0
