"""The bifurcation table's columns and codes, config and input checks shared by the step's parts.

In: the config section and the input tables. Out: :data:`COLUMNS`, the reason, uncertainty and flow
pattern codes, the validated ``bifurcations`` section, typed empty tables, medians that count the
undefined.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd

from ..errors import InputError

#: Flag reason codes, in the order they appear in ``flag_reasons``.
REASON_CODES = (
    "ratio_high",
    "ratio_low",
    "exponent_high",
    "exponent_low",
    "exponent_undefined",
    "angle",
    "multi",
)
#: Codes that count against ``fraction_within_tolerance`` (Murray-law violations).
MURRAY_CODES = REASON_CODES[:5]
#: Reasons a junction is ``uncertain`` (not judged), in the order they appear in ``uncertain_reasons``.
UNCERTAIN_CODES = ("low_confidence", "ratio_unresolved", "mixed_flow", "capillary")
#: Values of ``flow_pattern``.
FLOW_PATTERNS = ("diverging", "converging", "mixed", "unsolved")

#: Columns of ``bifurcations.csv``, in order.
COLUMNS = [
    "node_id", "z", "y", "x", "z_um", "y_um", "x_um", "level", "degree", "flow_pattern",
    "parent_segment", "parent_by", "daughter_segments",
    "radius_parent_um", "radius_daughter1_um", "radius_daughter2_um",
    "radius_parent_u_um", "radius_daughter1_u_um", "radius_daughter2_u_um",
    "murray_ratio", "murray_ratio_u", "murray_exponent", "murray_exponent_u", "asymmetry", "area_ratio",
    "angle_daughter1_deg", "angle_daughter2_deg", "angle_between_daughters_deg", "out_of_plane_deg",
    "angle_optimal_daughter1_deg", "angle_optimal_daughter2_deg", "angle_deviation_deg", "angle_deviation_u_deg",
    "flow_split_daughter1", "flow_split_cube_law", "wss_ratio_daughter1", "wss_ratio_daughter2",
    "low_confidence", "confidence_notes", "uncertain", "uncertain_reasons", "flagged", "flag_reasons", "severity",
]
_INT_COLUMNS = ("node_id", "degree", "parent_segment")
_NULLABLE_INT_COLUMNS = ("z", "y", "x", "level")
_BOOL_COLUMNS = ("low_confidence", "uncertain", "flagged")
_STR_COLUMNS = ("flow_pattern", "parent_by", "daughter_segments", "confidence_notes", "uncertain_reasons",
                "flag_reasons")


# ---------------------------------------------------------------------------
# inputs
# ---------------------------------------------------------------------------

def _require(df: Any, name: str, columns: Sequence[str]) -> None:
    if not isinstance(df, pd.DataFrame):
        raise InputError(f"{name}: expected a pandas DataFrame, got {type(df).__name__}")
    missing = [c for c in columns if c not in df.columns]
    if missing:
        raise InputError(f"{name}: missing column(s) {', '.join(missing)}")


def _float_column(df: pd.DataFrame, col: str) -> np.ndarray | None:
    if col not in df.columns:
        return None
    return pd.array(df[col], dtype="Float64").to_numpy(dtype=float, na_value=np.nan)


# ---------------------------------------------------------------------------
# the analysis
# ---------------------------------------------------------------------------

def _empty_table() -> pd.DataFrame:
    return _typed(pd.DataFrame({c: [] for c in COLUMNS}))


def _typed(df: pd.DataFrame) -> pd.DataFrame:
    df = df[COLUMNS].copy()
    for c in _INT_COLUMNS:
        df[c] = df[c].astype(np.int64)
    for c in _NULLABLE_INT_COLUMNS:
        df[c] = pd.array(df[c].to_numpy(dtype=object), dtype="Int64") if len(df) else pd.array([], dtype="Int64")
    for c in _BOOL_COLUMNS:
        df[c] = df[c].astype(bool)
    for c in _STR_COLUMNS:
        df[c] = df[c].astype(object).where(df[c].notna(), "").astype(str) if len(df) else df[c].astype(object)
    for c in COLUMNS:
        if c not in _INT_COLUMNS + _NULLABLE_INT_COLUMNS + _BOOL_COLUMNS + _STR_COLUMNS:
            df[c] = df[c].astype(float)
    return df.reset_index(drop=True)


def _nan_if_none(v) -> float:
    return math.nan if v is None else float(v)


def _median(values: np.ndarray) -> float | None:
    finite = values[np.isfinite(values)]
    return float(np.median(finite)) if finite.size else None


def _median_exponent(values: np.ndarray) -> float | None:
    """Median exponent with undefined ones (NaN) counted as +inf, None when the median is infinite or no row."""
    # An undefined exponent means a daughter at least as wide as the parent:
    # the limit of exponents growing without bound as a daughter's radius
    # approaches the parent's. Counting them as +inf keeps them in the median
    # (dropping them would move the median down, i.e. select on the outcome).
    if values.size == 0:
        return None
    m = float(np.median(np.where(np.isnan(values), np.inf, values)))
    return m if math.isfinite(m) else None
