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
half-written review. Reading validates every row; anything malformed (a node
id that is not a whole number from 0 to the int64 maximum, bytes that are not
UTF-8, a folder in place of the file) is one :class:`InputError` line naming
the file, the line, the column and the value. :func:`check_review` adds the
check against the result (every node id a junction of it) and is the one
check behind ``summarize --apply-review``, the study tables and the report.

This module is part of the analysis core: it never imports napari or Qt, so
``vesselflow summarize --apply-review`` and ``vesselflow batch`` work without
the viewer installed.
"""

from __future__ import annotations

import csv
import datetime as _dt
import io
import math
import os
import re
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
    "check_review",
    "save_review",
    "record_decision",
    "clear_decision",
    "apply_review",
    "write_reviewed_summary",
    "REVIEWED_SUMMARY_FILE",
    "changed_measures",
    "check_bifurcation",
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
#: File name of the summary with the review applied (:func:`write_reviewed_summary`).
REVIEWED_SUMMARY_FILE = "summary_reviewed.json"


def empty_review() -> pd.DataFrame:
    """A review table with no rows and the columns of :data:`REVIEW_COLUMNS`."""
    return pd.DataFrame({"node_id": pd.Series([], dtype=np.int64),
                         "decision": pd.Series([], dtype=object),
                         "note": pd.Series([], dtype=object),
                         "reviewed_at": pd.Series([], dtype=object)})


def _now() -> str:
    return _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")


#: Largest node id: node ids are stored as int64.
_MAX_NODE_ID = int(np.iinfo(np.int64).max)
#: Spaces a person may leave around a value (after a comma, say); any other
#: white space (no-break spaces, line breaks) makes the value malformed.
_PAD = " \t"
_DIGITS = re.compile(r"[0-9]+")


#: Longest value quoted whole in a message; longer ones are cut.
_SHOWN_CHARS = 60


def _shown(value: Any) -> str:
    """``value`` for a message: text quoted, bytes that are not UTF-8 as ``\\xNN``, long values cut."""
    text = value if isinstance(value, str) else repr(value)
    more = f" ... ({len(text)} characters)" if len(text) > _SHOWN_CHARS else ""
    text = text[:_SHOWN_CHARS]
    if not isinstance(value, str):
        return text + more
    if _not_utf8(text):
        return repr(text.encode("utf-8", "surrogateescape")) + more
    return repr(text) + more


def _not_utf8(value: Any) -> bool:
    return isinstance(value, str) and any("\udc80" <= ch <= "\udcff" for ch in value)


def _node_id(value: Any) -> int:
    """``value`` as a node id (0 to the int64 maximum); ValueError for anything else."""
    if isinstance(value, (bool, np.bool_)):
        raise ValueError(value)
    if isinstance(value, (int, np.integer)):
        number = int(value)
    elif isinstance(value, (float, np.floating)):
        if not (math.isfinite(value) and float(value).is_integer()):
            raise ValueError(value)
        number = int(value)
    else:
        text = str(value).strip(_PAD)
        # Only ASCII digits: int() would also take '1_000', '+3', Arabic-Indic
        # digits and no-break spaces, none of which a person means as an id.
        if not _DIGITS.fullmatch(text) or len(text.lstrip("0")) > len(str(_MAX_NODE_ID)):
            raise ValueError(value)
        number = int(text)
    if not 0 <= number <= _MAX_NODE_ID:
        raise ValueError(value)
    return number


def _check_columns(columns: list[Any], where: str) -> None:
    bad = [str(c) for c in columns if _not_utf8(c)]
    if bad:
        raise InputError(f"{where}: header: expected UTF-8 text, got {_shown(bad[0])} "
                         "(save the file as UTF-8)")
    seen = set()
    for c in columns:
        if c in seen:
            raise InputError(f"{where}: header: expected each of {', '.join(REVIEW_COLUMNS)} once; "
                             f"column {str(c)!r} appears twice")
        seen.add(c)
    missing = [c for c in REVIEW_COLUMNS if c not in columns]
    if missing:
        raise InputError(f"{where}: expected columns {', '.join(REVIEW_COLUMNS)}; missing {', '.join(missing)}")
    # Plain names as they are; a name with odd spaces or characters quoted, so they show.
    extra = [str(c) if str(c).isprintable() and str(c).strip() == str(c) != "" else repr(str(c))
             for c in columns if c not in REVIEW_COLUMNS]
    if extra:
        raise InputError(f"{where}: expected columns {', '.join(REVIEW_COLUMNS)}; got unknown {', '.join(extra)}")


def _check_rows(rows, *, where: str) -> tuple[pd.DataFrame, dict[int, str]]:
    """Check review rows and return them typed, with where each node id was found.

    ``rows`` yields ``(at, values)``: ``at`` says where the row is (``"line 4"``
    of a file, ``"row 0"`` of a table) and ``values`` holds the cells of
    :data:`REVIEW_COLUMNS` in that order.
    """
    ids, decisions, notes, stamps = [], [], [], []
    found: dict[int, str] = {}
    for at, values in rows:
        node, decision, note, stamp = ("" if _missing(v) else v for v in values)
        for column, value in zip(REVIEW_COLUMNS, (node, decision, note, stamp)):
            if _not_utf8(value):
                raise InputError(f"{where} {at}: {column}: expected UTF-8 text, got {_shown(value)} "
                                 "(save the file as UTF-8)")
        try:
            node_id = _node_id(node)
        except ValueError:
            raise InputError(f"{where} {at}: node_id: expected a node id, a whole number from 0 to "
                             f"{_MAX_NODE_ID}, got {_shown(node)}") from None
        if node_id in found:
            raise InputError(f"{where} {at}: node_id {node_id} is reviewed twice (also on {found[node_id]}); "
                             "expected one row per junction")
        found[node_id] = at
        decision = str(decision).strip(_PAD)
        if decision not in DECISIONS:
            raise InputError(f"{where} {at}: decision: expected one of {', '.join(DECISIONS)}, "
                             f"got {_shown(decision)}")
        stamp = str(stamp).strip(_PAD)
        if stamp:
            try:
                if not stamp.isascii():
                    raise ValueError(stamp)
                _dt.datetime.fromisoformat(stamp)
            except (ValueError, OverflowError):
                raise InputError(f"{where} {at}: reviewed_at: expected an ISO 8601 date and time "
                                 f"(for example 2024-05-01T14:03:00+00:00), got {_shown(stamp)}") from None
        ids.append(node_id)
        decisions.append(decision)
        notes.append(str(note))
        stamps.append(stamp)
    out = pd.DataFrame({"node_id": pd.Series(ids, dtype=np.int64), "decision": pd.Series(decisions, dtype=object),
                        "note": pd.Series(notes, dtype=object), "reviewed_at": pd.Series(stamps, dtype=object)})
    return out.sort_values("node_id", kind="stable").reset_index(drop=True), found


def _validate(raw: pd.DataFrame, *, where: str = "review") -> pd.DataFrame:
    """Check an in-memory review table and return it typed; messages name the row position."""
    return _check_table(raw, where=where)[0]


def _check_table(raw: pd.DataFrame, *, where: str) -> tuple[pd.DataFrame, dict[int, str]]:
    _check_columns(list(raw.columns), where)
    rows = ((f"row {pos}", values) for pos, values in
            enumerate(raw[list(REVIEW_COLUMNS)].itertuples(index=False, name=None)))
    return _check_rows(rows, where=where)


def _missing(v: Any) -> bool:
    return v is None or v is pd.NA or (isinstance(v, (float, np.floating)) and np.isnan(v))


def _read_file(path: Path) -> tuple[pd.DataFrame, dict[int, str]] | None:
    """Read and check a review file; None when there is none.

    Returns the table and, per node id, the line it is on (the first line of
    its row: a quoted note may span several).
    """
    if not os.path.lexists(path):
        return None
    if path.is_dir():
        raise InputError(f"{path}: expected a file, got a folder (move it away or remove it)")
    if not path.exists():
        raise InputError(f"{path}: expected a file, got a link to a missing file")
    if not path.is_file():
        raise InputError(f"{path}: expected a regular file, got a special file")
    try:
        data = path.read_bytes()
    except OSError as exc:
        raise InputError(f"{path}: expected a readable file, got: {exc.strerror or exc}") from None
    # Bytes that are not UTF-8 are kept (as lone surrogates) so that the check
    # below can name the line and column they are in.
    text = data.decode("utf-8-sig", errors="surrogateescape")
    reader = csv.reader(io.StringIO(text, newline=""), strict=True)
    header: list[str] | None = None
    rows: list[tuple[str, list[str]]] = []
    start = 1
    try:
        for record in reader:
            line, start = start, reader.line_num + 1
            if not any(cell.strip(_PAD) for cell in record):
                continue  # a blank line or an empty row carries no decision
            if header is None:
                header = record
                _check_columns(header, f"{path} line {line}")
                continue
            if len(record) > len(header):
                raise InputError(f"{path} line {line}: expected at most {len(header)} fields "
                                 f"({', '.join(header)}), got {len(record)}")
            cells = dict(zip(header, record + [""] * (len(header) - len(record))))
            rows.append((f"line {line}", [cells[c] for c in REVIEW_COLUMNS]))
    except csv.Error as exc:
        if "field limit" in str(exc):
            raise InputError(f"{path} line {start}: expected fields of at most {csv.field_size_limit()} "
                             "characters, got a longer one (a quote that is never closed takes in the lines "
                             "after it)") from None
        raise InputError(f"{path} line {start}: expected CSV with matched quotes (a quoted field ends with a "
                         f"quote followed by a comma or the line end), got: {exc}") from None
    if header is None:
        raise InputError(f"{path}: expected a header line {','.join(REVIEW_COLUMNS)}, got an empty file")
    return _check_rows(rows, where=str(path))


def load_review(outdir: str | os.PathLike[str]) -> pd.DataFrame:
    """Read ``OUTDIR/review.csv``.

    Only the file is checked here; :func:`check_review` also checks it
    against the result (every ``node_id`` a junction of it).

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
        If the file cannot be read (a folder, unreadable, not UTF-8, not
        CSV), a column is missing, unknown or repeated, or a row has a
        ``node_id`` that is not a whole number from 0 to the int64 maximum
        or is repeated, a decision outside :data:`DECISIONS` or a
        ``reviewed_at`` that is not ISO 8601. The message is one line naming
        the file, the line, the column and the value.
    """
    read = _read_file(Path(outdir) / REVIEW_FILE)
    return empty_review() if read is None else read[0]


def check_review(result, review: pd.DataFrame | None = None) -> pd.DataFrame:
    """The review of a result, checked in full against that result.

    This is the one check behind every command that reads a review
    (:func:`apply_review`, so ``summarize --apply-review`` and the study
    tables, and the sample report), so they agree on what is valid.

    Parameters
    ----------
    result : pipeline.tables.Result
        A result folder read with :func:`pipeline.tables.load_result`.
    review : DataFrame, optional
        Columns :data:`REVIEW_COLUMNS`; default: ``review.csv`` of the result
        folder, read with :func:`load_review` (no rows when there is none).

    Returns
    -------
    DataFrame
        The review as :func:`load_review` returns it.

    Raises
    ------
    InputError
        For everything :func:`load_review` rejects; when a ``node_id`` is not
        a junction of ``result`` (a ``node_id`` of ``bifurcations.csv``); or
        when the result has bifurcations switched off but the review has
        rows. One line naming the file and line (``review row N`` for a
        table given in memory: its position in ``review``), the column and
        the value.
    """
    if review is None:
        read = _read_file(Path(result.path) / REVIEW_FILE)
        table, found = read if read is not None else (empty_review(), {})
        where = str(Path(result.path) / REVIEW_FILE)
    else:
        (table, found), where = _check_table(review, where="review"), "review"
    if result.summary.get("bifurcations_enabled") is False and len(table):
        raise InputError(f"{where}: expected no decisions, as this result has no bifurcation table "
                         f"(bifurcations were switched off); got {len(table)}")
    bifs = result.bifurcations
    known = set(bifs["node_id"].astype(np.int64).tolist()) if "node_id" in bifs.columns else set()
    unknown = [int(n) for n in table["node_id"] if int(n) not in known]
    if unknown:
        first = min(unknown, key=lambda n: _line_number(found.get(n)))
        at = f"{where} {found[first]}" if first in found else where
        raise InputError(f"{at}: node_id {first} is not a junction of the result in '{result.path}' (expected a "
                         f"node_id from bifurcations.csv; {_node_kind(result, first)})"
                         + (f"; {len(unknown) - 1} more unknown" if len(unknown) > 1 else ""))
    return table


def _line_number(at: str | None) -> int:
    return int(at.split()[-1]) if at else 0


def _node_kind(result, node_id: int) -> str:
    """What ``nodes.csv`` says about ``node_id``, for a message."""
    nodes = getattr(result, "nodes", None)
    if nodes is None or not {"node_id", "kind"} <= set(nodes.columns):
        return "it is not listed there"
    hit = nodes.loc[nodes["node_id"].astype(np.int64) == node_id, "kind"]
    return f"nodes.csv lists it as a {hit.iloc[0]} node" if len(hit) else "nodes.csv has no such node"


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
    table = _validate(review, where="review")
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
        If ``node_id`` is not a whole number from 0 to the int64 maximum, or
        ``decision`` is not one of :data:`DECISIONS`.
    """
    node_id = _checked_node_id(node_id)
    if decision not in DECISIONS:
        raise InputError(f"decision: expected one of {', '.join(DECISIONS)}, got {decision!r}")
    row = pd.DataFrame({"node_id": [node_id], "decision": [decision], "note": [str(note or "")],
                        "reviewed_at": [reviewed_at or _now()]})
    rest = review[review["node_id"].astype(np.int64) != node_id]
    table = pd.concat([rest[list(REVIEW_COLUMNS)], row], ignore_index=True) if len(rest) else row
    return _validate(table, where="review")


def clear_decision(review: pd.DataFrame, node_id: int) -> pd.DataFrame:
    """A copy of ``review`` without the row of ``node_id`` (back to not reviewed).

    Raises
    ------
    InputError
        If ``node_id`` is not a whole number from 0 to the int64 maximum.
    """
    node_id = _checked_node_id(node_id)
    return review[review["node_id"].astype(np.int64) != node_id].reset_index(drop=True)


def _checked_node_id(node_id: Any) -> int:
    try:
        return _node_id(node_id)
    except ValueError:
        raise InputError(f"expected a node id, a whole number from 0 to {_MAX_NODE_ID}, got {_shown(node_id)}",
                         param="node_id") from None


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
        If :func:`check_review` rejects the review: a malformed file or row,
        a node that is not a junction of this result, or decisions on a
        result with bifurcations switched off.
    """
    review = check_review(result, review)
    bifs = result.bifurcations.copy()
    summary = dict(result.summary)
    if bifs.shape[1] == 0:  # written without columns: no junction at all
        bifs = pd.DataFrame(columns=_bif.COLUMNS)
    decision = dict(zip(review["node_id"].tolist(), review["decision"].tolist()))
    note = dict(zip(review["node_id"].tolist(), review["note"].tolist()))
    ids = bifs["node_id"].astype(np.int64)
    bifs["review_decision"] = pd.Series([decision.get(n, "") for n in ids.tolist()], index=bifs.index, dtype=object)
    bifs["review_note"] = pd.Series([note.get(n, "") for n in ids.tolist()], index=bifs.index, dtype=object)
    # Empty text cells come back from CSV as NaN; the summary parses them as text.
    for c in ("flag_reasons", "daughter_segments", "confidence_notes", "uncertain_reasons", "flow_pattern"):
        if c in bifs.columns:
            bifs[c] = bifs[c].astype(object).where(bifs[c].notna(), "").astype(str)
    if summary.get("bifurcations_enabled") is False:
        return summary, bifs
    artefact = (bifs["review_decision"] == "artefact").to_numpy()
    kept = bifs.loc[~artefact, [c for c in bifs.columns if c not in ("review_decision", "review_note")]]
    has_flow = "flow_nl_min" in result.segments.columns
    # The run's own options, so the network fit's bootstrap uses the same seed
    # and resamples as the analysis did (a result from before they existed: defaults).
    bif_cfg = ((result.run.get("config") or {}).get("bifurcations") or {})
    boot = {k: bif_cfg[k] for k in ("network_bootstrap_resamples", "network_bootstrap_seed") if k in bif_cfg}
    summary.update(_bif.summarize_bifurcations(kept.reset_index(drop=True), has_flow=has_flow,
                                               skipped=int(summary.get("junctions_skipped", 0) or 0), **boot))
    flagged = bifs["flagged"].astype(bool).to_numpy() if len(bifs) else np.zeros(0, bool)
    counts = {d: int((bifs["review_decision"] == d).sum()) for d in DECISIONS}
    counts["flagged_unreviewed"] = int((flagged & (bifs["review_decision"] == "").to_numpy()).sum())
    summary["bifurcations_excluded_by_review"] = int(artefact.sum())
    summary["review_counts"] = counts
    return summary, bifs


def write_reviewed_summary(outdir: str | os.PathLike[str], *, overwrite: bool = False
                           ) -> tuple[Path, list[tuple[str, Any, Any]]]:
    """Apply a result folder's ``review.csv`` and write ``summary_reviewed.json`` beside it.

    Parameters
    ----------
    outdir : str or Path
        A result folder with a ``review.csv``.
    overwrite : bool, keyword-only
        Replace an existing ``summary_reviewed.json``.

    Returns
    -------
    path : Path
        The file written (atomically).
    changes : list of (str, object, object)
        :func:`changed_measures` between the summary and the reviewed one.

    Raises
    ------
    InputError
        No ``review.csv`` (``param`` 'review'), an existing file without
        ``overwrite``, or a review :func:`check_review` rejects.
    """
    from .tables import load_result, write_json

    result = load_result(outdir)
    if not os.path.lexists(Path(outdir) / REVIEW_FILE):  # a folder or a broken link: check_review says why
        raise InputError(f"expected {REVIEW_FILE} in '{outdir}', found none (review the flagged bifurcations "
                         "with: vesselflow view OUTDIR)", param="review")
    out = Path(outdir) / REVIEWED_SUMMARY_FILE
    if out.exists() and not overwrite:
        raise InputError(f"'{out}' exists; pass overwrite=True to replace it")
    summary, _ = apply_review(result)
    write_atomic(out, lambda tmp: write_json(tmp, summary))
    return out, changed_measures(result.summary, summary)


def check_bifurcation(result, node_id: Any) -> int:
    """The node id of a bifurcation of ``result``, checked; InputError (``param`` 'node_id') when it is none.

    Parameters
    ----------
    result : pipeline.tables.Result
    node_id : int

    Returns
    -------
    int
    """
    node_id = _checked_node_id(node_id)
    b = result.bifurcations
    if len(b) and node_id in set(b["node_id"].astype(int).tolist()):
        return node_id
    nodes = result.nodes
    hit = nodes[nodes["node_id"] == node_id] if len(nodes) else nodes
    if not len(hit):
        shown = f"ids {nodes['node_id'].min()} to {nodes['node_id'].max()}" if len(nodes) else "no nodes"
        raise InputError(f"node_id {node_id} is not a node of '{result.path}' (nodes.csv has {shown})",
                         param="node_id")
    raise InputError(f"node {node_id} is a {hit['kind'].iloc[0]} node, not a bifurcation (expected a node_id "
                     "from bifurcations.csv)", param="node_id")


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
