"""The review of one result folder, without a window: the model behind the viewer's panel.

In: a result folder (:func:`pipeline.tables.load_result`) and its ``review.csv``.
Out: :class:`ReviewSession`, the review queue (flagged junctions, most severe
first), the junction under review, its measures as text, and every decision or
note saved to ``review.csv`` at once (:func:`pipeline.review.save_review`).

The napari panel (:class:`pipeline.viewer.panel.ReviewPanel`) draws this model
and forwards its buttons to it; scripts and tests drive it without Qt.
"""

from __future__ import annotations

import math
import os
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import review as rv
from .errors import InputError

__all__ = ["ReviewSession", "review_queue"]


def review_queue(result) -> pd.DataFrame:
    """The flagged junctions of a result, most severe first (ties, and results without ``severity``, by row).

    Parameters
    ----------
    result : pipeline.result.Result

    Returns
    -------
    DataFrame
        Rows of ``result.bifurcations`` with ``flagged`` true, index 0..n-1.
    """
    b = result.bifurcations
    if b.shape[1] == 0 or "flagged" not in b.columns:
        return pd.DataFrame(columns=["node_id", "z_um", "y_um", "x_um", "radius_parent_um"])
    fl = b[b["flagged"].astype(bool)]
    if "severity" in fl.columns:
        fl = fl.sort_values("severity", ascending=False, kind="stable", na_position="last")
    return fl.reset_index(drop=True)


def _num(v: Any) -> float:
    try:
        return float(v)
    except (TypeError, ValueError):
        return math.nan


def _fmt(v: Any, digits: int = 3) -> str:
    x = _num(v)
    return "–" if math.isnan(x) else f"{x:.{digits}g}"


class ReviewSession:
    """A reviewer's pass over one result folder's flagged bifurcations.

    Parameters
    ----------
    outdir : str or Path
        A result folder.

    Attributes
    ----------
    result : pipeline.result.Result
    review : DataFrame
        The decisions so far (columns :data:`pipeline.review.REVIEW_COLUMNS`).
    queue : DataFrame
        :func:`review_queue` of the result.
    current : int or None
        The junction under review.

    Raises
    ------
    InputError
        An incomplete folder, or a ``review.csv`` that
        :func:`pipeline.review.check_review` rejects.
    """

    #: Columns of :meth:`rows`.
    COLUMNS = ("node", "level", "reasons", "ratio", "exponent", "severity", "decision", "note")

    def __init__(self, outdir: str | os.PathLike[str]):
        from .tables import load_result

        self.result = load_result(outdir)
        self.review = rv.load_review(outdir)
        rv.check_review(self.result, self.review)
        self.queue = review_queue(self.result)
        self.current: int | None = None

    # -- reading ------------------------------------------------------------
    def decision_of(self, node_id: int) -> tuple[str, str]:
        """``(decision, note)`` of a junction; ``('', '')`` when not reviewed."""
        hit = self.review[self.review["node_id"].astype(np.int64) == int(node_id)]
        if len(hit):
            return str(hit["decision"].iloc[0]), str(hit["note"].iloc[0])
        return "", ""

    def decisions(self) -> dict[int, str]:
        """Decision per reviewed junction."""
        return dict(zip(self.review["node_id"].astype(int).tolist(), self.review["decision"].tolist()))

    def junction(self, node_id: int) -> pd.Series:
        """The row of ``bifurcations.csv`` of a junction; InputError (``param`` 'node_id') when it is none."""
        b = self.result.bifurcations
        hit = b[b["node_id"].astype(np.int64) == int(node_id)] if len(b) else b
        if not len(hit):
            raise InputError(f"node_id {node_id} is not a junction of '{self.result.path}' (expected a node_id "
                             "from bifurcations.csv)", param="node_id")
        return hit.iloc[0]

    def counts(self) -> dict[str, int]:
        """``flagged``, ``bifurcations``, ``reviewed`` (flagged junctions with a decision) and one count per decision."""
        reviewed = set(self.review["node_id"].astype(int).tolist())
        out = {"flagged": len(self.queue), "bifurcations": len(self.result.bifurcations),
               "reviewed": sum(int(n) in reviewed for n in self.queue["node_id"])}
        out.update({d: int((self.review["decision"] == d).sum()) for d in rv.DECISIONS})
        return out

    def rows(self) -> list[dict[str, Any]]:
        """One dict per queued junction (:attr:`COLUMNS`), each value a pair ``(text, sort key)``."""
        out = []
        for b in self.queue.itertuples(index=False):
            node = int(b.node_id)
            decision, note = self.decision_of(node)
            level = _num(getattr(b, "level", math.nan))
            reasons = getattr(b, "flag_reasons", "")
            reasons = "" if not isinstance(reasons, str) else reasons.replace(";", ", ")
            severity = getattr(b, "severity", math.nan)
            out.append({
                "node": (str(node), float(node)),
                "level": ("–" if math.isnan(level) else str(int(level)), level),
                "reasons": (reasons, reasons),
                "ratio": (_fmt(b.murray_ratio), _num(b.murray_ratio)),
                "exponent": (_fmt(b.murray_exponent), _num(b.murray_exponent)),
                "severity": (_fmt(severity), _num(severity)),
                "decision": (decision, decision),
                "note": (note, note),
            })
        return out

    def details(self, node_id: int) -> list[str]:
        """The junction's measures as lines of text: position, flags, parent and daughters, Murray, angles, flow."""
        b = self.junction(node_id)
        decision, _ = self.decision_of(node_id)
        lines = [f"junction {int(b['node_id'])} at z {b['z_um']:.1f}, y {b['y_um']:.1f}, "
                 f"x {b['x_um']:.1f} µm; level {_fmt(b.get('level'))}"]
        reasons = b.get("flag_reasons")
        lines.append("flags: " + (reasons.replace(";", ", ") if isinstance(reasons, str) and reasons else "none"))
        daughters = [int(x) for x in str(b.get("daughter_segments", "")).split(";") if x.strip().isdigit()]
        lines.append(self._segment_line("parent", int(b["parent_segment"]), b["radius_parent_um"]))
        lines.append(self._segment_line("daughter 1", daughters[0] if daughters else None, b["radius_daughter1_um"]))
        lines.append(self._segment_line("daughter 2", daughters[1] if len(daughters) > 1 else None,
                                        b["radius_daughter2_um"]))
        if len(daughters) > 2:
            lines.append(f"further daughters: {', '.join(str(d) for d in daughters[2:])}")
        lines.append(f"Murray ratio (r1³+r2³)/r0³ = {_fmt(b['murray_ratio'])}; exponent = "
                     f"{_fmt(b['murray_exponent'])}; asymmetry r2/r1 = {_fmt(b.get('asymmetry'))}")
        lines.append(f"angles {_fmt(b.get('angle_daughter1_deg'))}° / {_fmt(b.get('angle_daughter2_deg'))}° "
                     f"(optimum {_fmt(b.get('angle_optimal_daughter1_deg'))}° / "
                     f"{_fmt(b.get('angle_optimal_daughter2_deg'))}°)")
        if math.isfinite(_num(b.get("flow_split_daughter1"))):
            lines.append(f"flow split to daughter 1: {_fmt(b['flow_split_daughter1'])} "
                         f"(cube law {_fmt(b.get('flow_split_cube_law'))})")
        notes = b.get("confidence_notes")
        if isinstance(notes, str) and notes:
            lines.append(f"notes: {notes.replace(';', ', ')}")
        lines.append(f"review: {decision or 'not reviewed'}")
        return lines

    def _segment_line(self, role: str, sid: int | None, radius: Any) -> str:
        segs = self.result.segments.set_index("segment_id")
        extra = ""
        if sid is not None and sid in segs.index:
            s = segs.loc[sid]
            extra = f", length {_fmt(s.get('length_um'))} µm"
            if "flow_nl_min" in segs.columns:
                extra += f", |flow| {_fmt(abs(_num(s.get('flow_nl_min'))))} nL/min"
            if "wss_pa" in segs.columns:
                extra += f", WSS {_fmt(abs(_num(s.get('wss_pa'))))} Pa"
        name = "" if sid is None else f" (segment {sid})"
        return f"{role}{name}: r = {_fmt(radius)} µm{extra}"

    # -- moving -------------------------------------------------------------
    def go(self, node_id: int) -> pd.Series:
        """Make ``node_id`` the junction under review; returns its row (InputError when it is no junction)."""
        row = self.junction(node_id)
        self.current = int(node_id)
        return row

    def step(self, k: int, order: list[int] | None = None) -> int | None:
        """Go ``k`` junctions on (negative: back) in ``order`` (default: the queue's), wrapping round.

        From no junction (or one not in ``order``) the first step forward goes
        to the first and the first step back to the last. Returns the
        junction now under review, or None when ``order`` is empty.
        """
        order = [int(n) for n in (self.queue["node_id"] if order is None else order)]
        if not order:
            return None
        if self.current in order:
            i = (order.index(self.current) + k) % len(order)
        else:
            i = 0 if k > 0 else len(order) - 1
        self.go(order[i])
        return self.current

    # -- deciding -----------------------------------------------------------
    def decide(self, decision: str, note: str = "") -> Path | None:
        """Record ``decision`` (and ``note``) for the junction under review and save; None without one."""
        if self.current is None:
            return None
        self.review = rv.record_decision(self.review, self.current, decision=decision, note=note)
        return rv.save_review(self.result.path, self.review)

    def clear(self) -> Path | None:
        """Remove the decision on the junction under review and save; None without one."""
        if self.current is None:
            return None
        self.review = rv.clear_decision(self.review, self.current)
        return rv.save_review(self.result.path, self.review)

    def set_note(self, text: str) -> Path | None:
        """Change the note of the junction under review, saved at once when it has a decision.

        Returns the file saved, or None when nothing was saved: no junction,
        the same note, or no decision yet (a note alone is not a review).
        """
        if self.current is None:
            return None
        decision, note = self.decision_of(self.current)
        if not decision or note == text:
            return None
        return self.decide(decision, text)
