"""Reviewer decisions on bifurcations, and the summary that honours them.

In: a result folder (:class:`pipeline.tables.Result`) and its ``review.csv``.
Out: the review table, and a summary recomputed without the bifurcations a
reviewer marked as segmentation artefacts.

An automatic flag is a question; the answer is a person's. ``review.csv``
holds one row per reviewed junction:

==============  ==========================================================
``node_id``     the junction's ``node_id`` (joins ``bifurcations.csv``)
``decision``    ``confirmed`` (a real departure from Murray's law),
                ``artefact`` (a segmentation artefact: leave it out of the
                numbers) or ``unsure``
``note``        free text, may be empty
``reviewed_at`` when the decision was made, ISO 8601 with a UTC offset
==============  ==========================================================

The file is rewritten whole on every change, atomically (a temporary file in
the same folder replaced with :func:`os.replace`), so a crash never leaves a
half-written review. Reading validates every row and names the line and the
value that is wrong.

This module is part of the analysis core: it never imports napari or Qt, so
``vesselflow summarize --apply-review`` and ``vesselflow batch`` work without
the viewer installed.
"""

from __future__ import annotations

import datetime as _dt
import os
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from . import bifurcations as _bif
from .errors import InputError
from .tables import write_atomic

__all__ = [
    "REVIEW_FILE",
    "REVIEW_COLUMNS",
    "DECISIONS",
    "empty_review",
    "load_review",
    "save_review",
    "record_decision",
    "clear_decision",
    "apply_review",
    "changed_measures",
    "COLOUR_MEASURES",
    "segment_measure",
    "available_measures",
]

#: File name of the review table inside a result folder.
REVIEW_FILE = "review.csv"
#: Columns of ``review.csv``, in order.
REVIEW_COLUMNS = ("node_id", "decision", "note", "reviewed_at")
#: Allowed decisions.
DECISIONS = ("confirmed", "artefact", "unsure")


def empty_review() -> pd.DataFrame:
    """A review table with no rows and the columns of :data:`REVIEW_COLUMNS`."""
    return pd.DataFrame({"node_id": pd.Series([], dtype=np.int64),
                         "decision": pd.Series([], dtype=object),
                         "note": pd.Series([], dtype=object),
                         "reviewed_at": pd.Series([], dtype=object)})


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


def _validate(raw: pd.DataFrame, *, where: str, first_line: int) -> pd.DataFrame:
    """Check a review table of strings and return it typed.

    ``first_line`` is the line number of the first data row in ``where``
    (2 for a CSV file with a header), so messages point at the line a person
    would open; for an in-memory table it is the row position.
    """
    missing = [c for c in REVIEW_COLUMNS if c not in raw.columns]
    if missing:
        raise InputError(f"{where}: expected columns {', '.join(REVIEW_COLUMNS)}; missing {', '.join(missing)}")
    extra = [str(c) for c in raw.columns if c not in REVIEW_COLUMNS]
    if extra:
        raise InputError(f"{where}: expected columns {', '.join(REVIEW_COLUMNS)}; got unknown {', '.join(extra)}")
    ids, decisions, notes, stamps = [], [], [], []
    seen: dict[int, int] = {}
    for pos, row in enumerate(raw[list(REVIEW_COLUMNS)].itertuples(index=False)):
        line = pos + first_line
        node, decision, note, stamp = ("" if _missing(v) else v for v in row)
        try:
            node_id = _as_int(node)
        except ValueError:
            raise InputError(f"{where} line {line}: node_id: expected an integer node id, got {str(node)!r}") from None
        if node_id in seen:
            raise InputError(f"{where} line {line}: node_id {node_id} is reviewed twice (also on line "
                             f"{seen[node_id]}); expected one row per junction")
        seen[node_id] = line
        decision = str(decision).strip()
        if decision not in DECISIONS:
            raise InputError(f"{where} line {line}: decision: expected one of {', '.join(DECISIONS)}, "
                             f"got {decision!r}")
        stamp = str(stamp).strip()
        if stamp:
            try:
                _dt.datetime.fromisoformat(stamp)
            except ValueError:
                raise InputError(f"{where} line {line}: reviewed_at: expected an ISO 8601 date and time "
                                 f"(for example 2024-05-01T14:03:00+00:00), got {stamp!r}") from None
        ids.append(node_id)
        decisions.append(decision)
        notes.append(str(note))
        stamps.append(stamp)
    out = pd.DataFrame({"node_id": pd.Series(ids, dtype=np.int64), "decision": pd.Series(decisions, dtype=object),
                        "note": pd.Series(notes, dtype=object), "reviewed_at": pd.Series(stamps, dtype=object)})
    return out.sort_values("node_id", kind="stable").reset_index(drop=True)


def _missing(v: Any) -> bool:
    return v is None or v is pd.NA or (isinstance(v, float) and np.isnan(v))


def _as_int(v: Any) -> int:
    if isinstance(v, (bool, np.bool_)):
        raise ValueError(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        if float(v).is_integer():
            return int(v)
        raise ValueError(v)
    text = str(v).strip()
    return int(text)  # raises ValueError for '', '3.5', 'abc'


def load_review(outdir: str | os.PathLike[str]) -> pd.DataFrame:
    """Read ``OUTDIR/review.csv``.

    Parameters
    ----------
    outdir : str or path-like
        A result folder.

    Returns
    -------
    DataFrame
        Columns :data:`REVIEW_COLUMNS` (``node_id`` int64, the others str;
        an empty ``note`` or ``reviewed_at`` is ``""``), sorted by
        ``node_id``. No rows when the folder has no ``review.csv``.

    Raises
    ------
    InputError
        If the file cannot be parsed, a column is missing or unknown, or a
        row has a non-integer or repeated ``node_id``, a decision outside
        :data:`DECISIONS` or a ``reviewed_at`` that is not ISO 8601; the
        message names the line and the value.
    """
    path = Path(outdir) / REVIEW_FILE
    if not path.is_file():
        return empty_review()
    try:
        raw = pd.read_csv(path, dtype=str, keep_default_na=False)
    except pd.errors.EmptyDataError:
        raise InputError(f"{path}: expected a header line {','.join(REVIEW_COLUMNS)}, got an empty file") from None
    except (pd.errors.ParserError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: expected a CSV file with columns {', '.join(REVIEW_COLUMNS)}: "
                         f"{str(exc).strip()}") from None
    return _validate(raw, where=str(path), first_line=2)


def save_review(outdir: str | os.PathLike[str], review: pd.DataFrame) -> Path:
    """Write ``OUTDIR/review.csv`` atomically.

    Parameters
    ----------
    outdir : str or path-like
        An existing result folder.
    review : DataFrame
        Columns :data:`REVIEW_COLUMNS`; validated as :func:`load_review` does.
        A row without ``reviewed_at`` is stamped with the current UTC time.

    Returns
    -------
    Path
        The file written.

    Raises
    ------
    InputError
        If ``outdir`` is not a folder or a row is invalid (the message names
        its position in ``review``).
    """
    out = Path(outdir)
    if not out.is_dir():
        raise InputError(f"review: expected an existing result folder, got '{out}'")
    table = _validate(review, where="review", first_line=0)
    table.loc[table["reviewed_at"] == "", "reviewed_at"] = _now()
    def write(tmp):
        with open(tmp, "w", encoding="utf-8", newline="") as fh:
            table.to_csv(fh, index=False, columns=list(REVIEW_COLUMNS))

    return write_atomic(out / REVIEW_FILE, write)


def record_decision(review: pd.DataFrame, node_id: int, *, decision: str, note: str = "",
                    reviewed_at: str | None = None) -> pd.DataFrame:
    """A copy of ``review`` with the decision on ``node_id`` set (replacing any earlier one).

    Parameters
    ----------
    review : DataFrame
        Columns :data:`REVIEW_COLUMNS`.
    node_id : int
        The junction.
    decision : {'confirmed', 'artefact', 'unsure'}, keyword-only
    note : str, keyword-only
    reviewed_at : str, optional, keyword-only
        ISO 8601; default now (UTC).

    Raises
    ------
    InputError
        If ``decision`` is not one of :data:`DECISIONS`.
    """
    if decision not in DECISIONS:
        raise InputError(f"decision: expected one of {', '.join(DECISIONS)}, got {decision!r}")
    row = pd.DataFrame({"node_id": [int(node_id)], "decision": [decision], "note": [str(note or "")],
                        "reviewed_at": [reviewed_at or _now()]})
    rest = review[review["node_id"].astype(np.int64) != int(node_id)]
    table = pd.concat([rest[list(REVIEW_COLUMNS)], row], ignore_index=True) if len(rest) else row
    return _validate(table, where="review", first_line=0)


def clear_decision(review: pd.DataFrame, node_id: int) -> pd.DataFrame:
    """A copy of ``review`` without the row of ``node_id`` (back to not reviewed)."""
    return review[review["node_id"].astype(np.int64) != int(node_id)].reset_index(drop=True)


def apply_review(result, review: pd.DataFrame | None = None) -> tuple[dict[str, Any], pd.DataFrame]:
    """Summary and bifurcations table with a review taken into account.

    Parameters
    ----------
    result : pipeline.tables.Result
        A result folder read with :func:`pipeline.tables.load_result`.
    review : DataFrame, optional
        Columns :data:`REVIEW_COLUMNS`; default: ``review.csv`` of the result
        folder if there is one (else no decisions).

    Returns
    -------
    summary : dict
        ``result.summary`` with its bifurcation part (see
        :func:`pipeline.bifurcations.summarize_bifurcations`) recomputed
        over the junctions not marked ``artefact``, plus
        ``bifurcations_excluded_by_review`` (the number left out) and
        ``review_counts``: ``confirmed``, ``artefact``, ``unsure`` (rows per
        decision) and ``flagged_unreviewed`` (flagged junctions without a
        decision). The input summary is not changed.
    bifurcations : DataFrame
        ``result.bifurcations`` (all rows, artefacts included) with
        ``review_decision`` and ``review_note`` (``""`` where not reviewed).

    Raises
    ------
    InputError
        If the review names a node that is not a junction of this result, or
        the result has bifurcations switched off but a review has rows.
    """
    review = load_review(result.path) if review is None else _validate(review, where="review", first_line=0)
    bifs = result.bifurcations.copy()
    summary = dict(result.summary)
    if bifs.shape[1] == 0:  # written without columns: no junction at all
        bifs = pd.DataFrame(columns=_bif.COLUMNS)
    if summary.get("bifurcations_enabled") is False and len(review):
        raise InputError(f"review: {len(review)} decision(s) given, but this result has no bifurcation table "
                         "(bifurcations were switched off)")
    known = set(bifs["node_id"].astype(np.int64).tolist())
    unknown = [int(n) for n in review["node_id"] if int(n) not in known]
    if unknown:
        raise InputError(f"review: node_id {unknown[0]} is not a junction of the result in '{result.path}' "
                         f"(expected a node_id from bifurcations.csv)"
                         + (f"; {len(unknown) - 1} more unknown" if len(unknown) > 1 else ""))
    decision = dict(zip(review["node_id"].tolist(), review["decision"].tolist()))
    note = dict(zip(review["node_id"].tolist(), review["note"].tolist()))
    ids = bifs["node_id"].astype(np.int64)
    bifs["review_decision"] = pd.Series([decision.get(n, "") for n in ids.tolist()], index=bifs.index, dtype=object)
    bifs["review_note"] = pd.Series([note.get(n, "") for n in ids.tolist()], index=bifs.index, dtype=object)
    # Empty text cells come back from CSV as NaN; the summary parses them as text.
    for c in ("flag_reasons", "daughter_segments", "confidence_notes"):
        if c in bifs.columns:
            bifs[c] = bifs[c].astype(object).where(bifs[c].notna(), "").astype(str)
    if summary.get("bifurcations_enabled") is False:
        return summary, bifs
    artefact = (bifs["review_decision"] == "artefact").to_numpy()
    kept = bifs.loc[~artefact, [c for c in bifs.columns if c not in ("review_decision", "review_note")]]
    has_flow = "flow_nl_min" in result.segments.columns
    summary.update(_bif.summarize_bifurcations(kept.reset_index(drop=True), has_flow=has_flow,
                                               skipped=int(summary.get("junctions_skipped", 0) or 0)))
    flagged = bifs["flagged"].astype(bool).to_numpy() if len(bifs) else np.zeros(0, bool)
    counts = {d: int((bifs["review_decision"] == d).sum()) for d in DECISIONS}
    counts["flagged_unreviewed"] = int((flagged & (bifs["review_decision"] == "").to_numpy()).sum())
    summary["bifurcations_excluded_by_review"] = int(artefact.sum())
    summary["review_counts"] = counts
    return summary, bifs


def changed_measures(before: Mapping[str, Any], after: Mapping[str, Any]) -> list[tuple[str, Any, Any]]:
    """``(key, before, after)`` for every summary value that differs; nested dicts as ``a.b`` keys."""
    def flat(d, prefix=""):
        out = {}
        for k, v in d.items():
            if isinstance(v, Mapping):
                out.update(flat(v, f"{prefix}{k}."))
            else:
                out[f"{prefix}{k}"] = v
        return out

    a, b = flat(before), flat(after)
    rows = []
    for k in list(a) + [k for k in b if k not in a]:
        va, vb = a.get(k), b.get(k)
        if not _same(va, vb):
            rows.append((k, va, vb))
    return rows


def _same(a: Any, b: Any) -> bool:
    if isinstance(a, (int, float)) and isinstance(b, (int, float)) and not isinstance(a, bool):
        return a == b or (np.isnan(a) and np.isnan(b))
    return a == b


#: Measures the viewer can colour centrelines by: name -> (label, unit).
COLOUR_MEASURES = {
    "radius": ("radius", "µm"),
    "level": ("branching level", ""),
    "flow": ("flow (magnitude)", "nL/min"),
    "wss": ("wall shear stress (magnitude)", "Pa"),
    "murray_ratio": ("Murray ratio at the distal junction", ""),
}


def segment_measure(result, measure: str) -> np.ndarray:
    """One value per segment row of ``result.segments`` for colouring centrelines.

    Parameters
    ----------
    result : pipeline.tables.Result
    measure : str
        A key of :data:`COLOUR_MEASURES`: ``radius`` (``radius_um``),
        ``level``, ``flow`` (``|flow_nl_min|``: the sign only says which end
        the segment was traced from), ``wss`` (``|wss_pa|``) or
        ``murray_ratio`` (the ratio of the junction the segment is the parent
        of; NaN for terminal segments).

    Returns
    -------
    ndarray of float, shape (S,)
        NaN where the measure is not defined for a segment.

    Raises
    ------
    InputError
        For an unknown measure, or one the result does not have (flow and
        wall shear stress without the flow model, levels without a root,
        Murray ratios without a bifurcation table).
    """
    if measure not in COLOUR_MEASURES:
        raise InputError(f"colour measure: expected one of {', '.join(COLOUR_MEASURES)}, got {measure!r}")
    segs = result.segments
    column = {"radius": "radius_um", "level": "level", "flow": "flow_nl_min", "wss": "wss_pa"}.get(measure)
    if column is not None:
        if column not in segs.columns:
            why = "the flow model did not run" if measure in ("flow", "wss") else "no branching levels were assigned"
            raise InputError(f"colour measure {measure!r}: this result has no '{column}' column ({why}); "
                             f"choose another of {', '.join(available_measures(result))}")
        values = pd.to_numeric(segs[column], errors="coerce").to_numpy(dtype=float, na_value=np.nan)
        return np.abs(values) if measure in ("flow", "wss") else values
    bifs = result.bifurcations
    if not {"parent_segment", "murray_ratio"} <= set(bifs.columns):
        raise InputError(f"colour measure 'murray_ratio': this result has no bifurcation table; choose another of "
                         f"{', '.join(available_measures(result))}")
    ratio = dict(zip(bifs["parent_segment"].astype(np.int64).tolist(), bifs["murray_ratio"].astype(float).tolist()))
    return segs["segment_id"].astype(np.int64).map(ratio).to_numpy(dtype=float, na_value=np.nan)


def available_measures(result) -> list[str]:
    """The keys of :data:`COLOUR_MEASURES` that ``result`` can be coloured by."""
    cols = set(result.segments.columns)
    need = {"radius": "radius_um", "level": "level", "flow": "flow_nl_min", "wss": "wss_pa"}
    out = [m for m, c in need.items() if c in cols]
    if {"parent_segment", "murray_ratio"} <= set(result.bifurcations.columns):
        out.append("murray_ratio")
    return out
