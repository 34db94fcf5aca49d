"""Summaries of the junction table: a sample's Murray statistics and the per-level ones.

In: the bifurcation table. Out: the summary keys (counts by reason and flow pattern, medians and
quartiles, the network exponent of :mod:`pipeline.murray`) and per-level Murray statistics for
``levels.csv`` (:func:`levels_murray`).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd


from ..config import step_options
from ._common import (
    FLOW_PATTERNS, MURRAY_CODES, REASON_CODES, UNCERTAIN_CODES, _empty_table, _median, _median_exponent,
    _nan_if_none, _require,
)


def _code_hits(table: pd.DataFrame, column: str = "flag_reasons", codes: Sequence[str] = REASON_CODES) -> np.ndarray:
    """Boolean (rows, len(codes)) array: which codes each row's ``column`` names (none where it is absent)."""
    if column not in table.columns:  # a table written before the column existed
        return np.zeros((len(table), len(codes)), dtype=bool)
    # A table holds only a handful of distinct code strings: parse each once.
    text = table[column].astype(object).where(table[column].notna(), "").astype(str).to_numpy(dtype=object)
    inverse, texts = pd.factorize(text)
    per_text = np.array([[c in set(t.split(";")) for c in codes] for t in texts], dtype=bool)
    return per_text.reshape(len(texts), len(codes))[inverse]


def _summary(table: pd.DataFrame, *, has_flow: bool, skipped: int,
             cfg: Mapping[str, Any] | None = None) -> dict[str, Any]:
    from ..murray import network_summary

    n = len(table)
    hits = _code_hits(table)
    counts = {c: int(hits[:, k].sum()) for k, c in enumerate(REASON_CODES)}
    why = _code_hits(table, "uncertain_reasons", UNCERTAIN_CODES)
    uncertain = (table["uncertain"].to_numpy(dtype=bool) if "uncertain" in table.columns
                 else np.zeros(n, dtype=bool))
    judged = int((~uncertain).sum())
    within = int((~uncertain & ~hits[:, [REASON_CODES.index(c) for c in MURRAY_CODES]].any(axis=1)).sum())
    pattern = (table["flow_pattern"].astype(str).to_numpy() if "flow_pattern" in table.columns
               else np.full(n, "", dtype=object))
    ratio = table["murray_ratio"].to_numpy(float)
    expo = table["murray_exponent"].to_numpy(float)
    split_err = None
    if has_flow and n:
        err = np.abs(table["flow_split_daughter1"].to_numpy(float) - table["flow_split_cube_law"].to_numpy(float))
        split_err = _median(err)
    out = {
        "bifurcations": int(n),
        "bifurcations_flagged": int(table["flagged"].sum()),
        "bifurcations_uncertain": int(uncertain.sum()),
        "bifurcations_low_confidence": int(table["low_confidence"].sum()),
        "multifurcations": int((table["daughter_segments"].astype(str).str.count(";") >= 2).sum()),
    }
    out.update({f"bifurcations_{k}": int((pattern == k).sum()) for k in FLOW_PATTERNS})
    out.update({
        "flag_counts": counts,
        "uncertain_counts": {c: int(why[:, k].sum()) for k, c in enumerate(UNCERTAIN_CODES)},
        "murray_exponent_median": _median_exponent(expo),
        "murray_ratio_median": _median(ratio),
    })
    out.update(network_summary(table, network_bootstrap_resamples=cfg["network_bootstrap_resamples"],
                               network_bootstrap_seed=cfg["network_bootstrap_seed"]))
    for k in ("diverging", "converging"):
        out[f"murray_exponent_median_{k}"] = _median_exponent(expo[pattern == k])
        out[f"murray_ratio_median_{k}"] = _median(ratio[pattern == k])
    out.update({
        "fraction_within_tolerance": within / judged if judged else None,
        "flow_split_error_median": split_err,
        "junctions_skipped": int(skipped),
    })
    return out


def summarize_bifurcations(table: pd.DataFrame, *, has_flow: bool, skipped: int = 0,
                           network_bootstrap_resamples: int = 2000, network_bootstrap_seed: int = 0,
                           config: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """The bifurcation part of ``summary.json``, from a bifurcations table.

    Parameters
    ----------
    table : DataFrame
        Rows of :data:`COLUMNS` (as returned by :func:`analyze_bifurcations`
        or read back from ``bifurcations.csv``), possibly a subset of them,
        for example without the rows a reviewer marked as artefacts. A table
        without columns counts as no junction.
    has_flow : bool, keyword-only
        Whether the flow model ran (``flow_split_error_median`` is None
        otherwise).
    skipped : int, keyword-only
        ``junctions_skipped``, carried over: it cannot be recomputed from
        the table.
    network_bootstrap_resamples, network_bootstrap_seed : int, keyword-only
        The network fit's bootstrap (the ``bifurcations`` options of the
        same names).
    config : mapping or None, keyword-only
        Deprecated (a DeprecationWarning): a full config or its
        ``bifurcations`` section.

    Returns
    -------
    dict
        The keys listed under ``summary`` in :func:`analyze_bifurcations`.
    """
    cfg = step_options("bifurcations", locals(), config=config, caller="summarize_bifurcations")
    if table.shape[1] == 0:
        table = _empty_table()
    return _summary(table, has_flow=has_flow, skipped=skipped, cfg=cfg)


def levels_murray(table: pd.DataFrame) -> pd.DataFrame:
    """Murray statistics per branching level, to merge into ``levels.csv``.

    Parameters
    ----------
    table : DataFrame
        From :func:`analyze_bifurcations` (needs ``level``,
        ``murray_exponent``, ``murray_ratio``, ``flagged``). A junction's
        level is that of its parent segment, so the row of level ``l``
        describes the junctions at the distal ends of level-``l`` segments.

    Returns
    -------
    DataFrame
        One row per level in increasing order, then one ``<NA>`` row for
        junctions without a level (only if there are any). Columns: ``level``
        (Int64), ``n_bifurcations``, ``murray_exponent_median`` (undefined
        exponents counted as +inf, as in the summary; NaN when the median is
        undefined), ``murray_exponents_undefined`` (their number),
        ``murray_ratio_median`` (over finite values; NaN if none),
        ``bifurcations_flagged_fraction``.
    """
    _require(table, "table", ("level", "murray_exponent", "murray_ratio", "flagged"))
    key = pd.array(table["level"], dtype="Int64")
    na = np.asarray(key.isna())
    lv = key.to_numpy(dtype=float, na_value=np.nan)
    expo = table["murray_exponent"].to_numpy(dtype=float)
    ratio = table["murray_ratio"].to_numpy(dtype=float)
    flagged = table["flagged"].to_numpy(dtype=bool)
    groups = [(int(val), lv == val) for val in np.unique(lv[~na])]
    if na.any():
        groups.append((None, na))
    out = []
    for val, sel in groups:
        out.append({
            "level": val,
            "n_bifurcations": int(sel.sum()),
            "murray_exponent_median": _nan_if_none(_median_exponent(expo[sel])),
            "murray_exponents_undefined": int(np.isnan(expo[sel]).sum()),
            "murray_ratio_median": _nan_if_none(_median(ratio[sel])),
            "bifurcations_flagged_fraction": float(flagged[sel].mean()),
        })
    df = pd.DataFrame(out, columns=["level", "n_bifurcations", "murray_exponent_median", "murray_exponents_undefined",
                                    "murray_ratio_median", "bifurcations_flagged_fraction"])
    levels = df["level"].to_numpy(dtype=object)
    df["level"] = pd.array(levels, dtype="Int64") if len(df) else pd.array([], dtype="Int64")
    df["n_bifurcations"] = df["n_bifurcations"].astype(np.int64)
    df["murray_exponents_undefined"] = df["murray_exponents_undefined"].astype(np.int64)
    for c in ("murray_exponent_median", "murray_ratio_median", "bifurcations_flagged_fraction"):
        df[c] = df[c].astype(float)
    return df
