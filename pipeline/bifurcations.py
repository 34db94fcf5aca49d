"""Step 10, Murray's-law checks at every junction.

In: the ``segments`` table (``segment_id``, ``node_from``, ``node_to``,
``length_um``, ``radius_um``; optionally ``radius_n_points``, ``level``
(nullable ``Int64``), ``flow_nl_min`` (signed, positive from ``node_from``
to ``node_to``), ``wss_pa``), the ``nodes`` table (``node_id``; optionally
``z``, ``y``, ``x``, ``z_um``, ``y_um``, ``x_um``), the centreline of every
segment (a list of ``(K, 3)`` arrays in µm in the row order of
``segments``, running from ``node_from`` to ``node_to``) and the config
section ``bifurcations``.
Out: the per-junction table written to ``bifurcations.csv`` (one row per node
where three or more segments meet, :data:`COLUMNS`), a summary dict for
``summary.json`` and, from :func:`levels_murray`, per-level statistics to
merge into ``levels.csv``.

Parent and daughters. With solved flow the parent is the segment whose flow
enters the junction (the largest inflow when several do; the junction is then
noted ``converging``). Without flow, or where no flow reaches the junction,
the parent is the segment nearest the root by branching level (smallest
``level``; ties to the widest), and without levels the widest segment (ties
to the smallest ``segment_id``). Column ``parent_by`` says which rule chose
(``flow``, ``level`` or ``radius``). The other segments are the daughters,
ordered by decreasing radius: daughter 1 is the larger. Self-loops (both ends
at the junction) are not daughters; they are noted. Junctions with more than
two daughters (multifurcations) are reported with the sums taken over all
daughters (``murray_ratio`` = sum r_i^3 / r0^3, ``area_ratio`` = sum r_i^2 /
r0^2, the exponent x solving r0^x = sum r_i^x, flow split of daughter 1 over
all daughters); their per-daughter columns describe the two largest, and the
optimal angles, which Murray derived for two daughters, are NaN.

Murray's law. The cube law r0^3 = r1^3 + r2^3 (Murray CD 1926, PNAS
12:207) gives ``murray_ratio`` 1 and exponent 3. Measured junction exponents
run from about 2.3 in large arteries to about 3 in small ones (Nakamura &
Awa 2014, Physiol Rep 2:e00236). The exponent is undefined (NaN) when a
daughter is not smaller than the parent: then r0^x < r1^x + r2^x for every
x > 0. Minimum-work branching angles of each daughter from the parent axis
(Murray CD 1926, J Gen Physiol 9:835): cos theta1 = (r0^4 + r1^4 - r2^4) /
(2 r0^2 r1^2), and the same with 1 and 2 swapped; symmetric cube-law
junctions give 37.47 deg per daughter, 74.9 deg between them.

Angles. Each segment's direction at the junction is the principal axis (total
least squares line) of its centreline between ``tangent_skip_radii`` and
``tangent_fit_radii`` junction radii of arc length from the node (the
junction radius is the largest radius among the segments that meet there:
the merged junction zone and the skeleton's bend scale with it), at most half
the segment's length, pointing away from the node. The centreline is
resampled evenly in arc length over that window so the fit weighs arc, not
point density. The first part is skipped because thinning pulls the centreline
towards the junction's centroid there. ``angle_daughter{1,2}_deg`` are the
angles between each daughter's direction and the parent's flow direction
(the reversed parent direction); ``angle_between_daughters_deg`` the angle
between the two daughters; ``out_of_plane_deg`` the largest angle between one
of the three directions (parent, daughter 1, daughter 2) and the plane of
the other two (0 for a planar junction; for one daughter tilted by e out of
the plane of the parent and the other daughter it is e, since the tilted
daughter's angle is the largest of the three when the daughters leave the
parent at less than 90 deg). ``angle_deviation_deg`` is the larger absolute
difference between a daughter's angle and its optimum. A segment too short
to leave the junction zone out (half its length below
``tangent_skip_radii`` junction radii) is fitted from the node on (note
``tangent_from_node``).

Flow. With ``flow_nl_min``: ``flow_split_daughter1`` = |Q1| / (|Q1| + |Q2|)
and its cube-law prediction ``flow_split_cube_law`` = r1^3 / (r1^3 + r2^3)
(Poiseuille flow at equal wall shear stress, Murray 1926 PNAS); with
``wss_pa``: ``wss_ratio_daughter{1,2}`` = daughter over parent wall shear
stress (1 under the cube law).

Confidence notes (``confidence_notes``, semicolon-separated ``code:segment_id``):
``few_points`` (radius measured over fewer than ``min_radius_points``
centreline points) and ``short`` (segment shorter than ``min_length_radii``
radii, so that its middle part, outside the junction zones, is nearly empty)
make the row ``low_confidence``. Informational notes that do not:
``self_loop`` (a self-loop at the junction, not counted as a daughter),
``tangent_from_node`` (segment too short to skip the junction zone), and
``converging`` (without a segment id: more than one segment carries flow
into the junction).

Flag reason codes (``flag_reasons``, semicolon-separated, in this order;
each rule set in the ``bifurcations`` config section, null thresholds switch
a bound off):

``ratio_high``         ``murray_ratio`` > ``ratio_max``
``ratio_low``          ``murray_ratio`` < ``ratio_min``
``exponent_high``      ``murray_exponent`` > ``exponent_max``
``exponent_low``       ``murray_exponent`` < ``exponent_min``
``exponent_undefined`` a daughter not smaller than the parent
                       (``flag_undefined_exponent``)
``angle``              ``angle_deviation_deg`` > ``angle_deviation_max_deg``
``multi``              more than two daughters (``flag_multi``)
``low_confidence``     ``low_confidence`` is true (``flag_low_confidence``)

The first five are the Murray-law codes: ``fraction_within_tolerance`` in the
summary is the share of junctions that carry none of them.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
import pandas as pd
from scipy.optimize import brentq

from .errors import ConfigError, InputError

__all__ = [
    "COLUMNS",
    "REASON_CODES",
    "MURRAY_CODES",
    "analyze_bifurcations",
    "murray_exponent",
    "murray_exponent_multi",
    "murray_optimal_angles",
    "levels_murray",
]

#: Flag reason codes, in the order they appear in ``flag_reasons``.
REASON_CODES = (
    "ratio_high",
    "ratio_low",
    "exponent_high",
    "exponent_low",
    "exponent_undefined",
    "angle",
    "multi",
    "low_confidence",
)
#: Codes that count against ``fraction_within_tolerance`` (Murray-law violations).
MURRAY_CODES = REASON_CODES[:5]

#: Columns of ``bifurcations.csv``, in order.
COLUMNS = [
    "node_id", "z", "y", "x", "z_um", "y_um", "x_um", "level", "degree",
    "parent_segment", "parent_by", "daughter_segments",
    "radius_parent_um", "radius_daughter1_um", "radius_daughter2_um",
    "murray_ratio", "murray_exponent", "asymmetry", "area_ratio",
    "angle_daughter1_deg", "angle_daughter2_deg", "angle_between_daughters_deg", "out_of_plane_deg",
    "angle_optimal_daughter1_deg", "angle_optimal_daughter2_deg", "angle_deviation_deg",
    "flow_split_daughter1", "flow_split_cube_law", "wss_ratio_daughter1", "wss_ratio_daughter2",
    "low_confidence", "confidence_notes", "flagged", "flag_reasons",
]
_INT_COLUMNS = ("node_id", "degree", "parent_segment")
_NULLABLE_INT_COLUMNS = ("z", "y", "x", "level")
_BOOL_COLUMNS = ("low_confidence", "flagged")
_STR_COLUMNS = ("parent_by", "daughter_segments", "confidence_notes", "flag_reasons")

# Points the tangent window is resampled to: 17 evenly spaced samples over a
# window of about two radii keep the sampling step well below a voxel for the
# radii met in practice, so the principal axis follows the arc, not the points.
_TANGENT_SAMPLES = 17
# Flow below this fraction of the largest flow at a junction counts as none
# (rounding in the solver's potentials).
_FLOW_RTOL = 1e-9


# ---------------------------------------------------------------------------
# Murray's law
# ---------------------------------------------------------------------------

def _exponent_one(r0: float, daughters: np.ndarray) -> float:
    """x with r0^x = sum(daughters^x), or NaN when undefined."""
    if not (math.isfinite(r0) and r0 > 0) or daughters.size < 2:
        return math.nan
    if not np.all(np.isfinite(daughters)) or np.any(daughters <= 0):
        return math.nan
    if np.any(daughters >= r0):
        return math.nan  # sum (r_i / r0)^x > 1 for every x > 0: no root
    logs = np.log(daughters / r0)  # all < 0

    def f(x: float) -> float:
        return float(np.exp(x * logs).sum()) - 1.0

    # f(0) = n - 1 > 0 and f decreases; at hi, sum <= n * max_ratio^hi = 1.
    hi = math.log(daughters.size) / -float(logs.max())
    if f(hi) >= 0.0:  # exact root at hi (all daughters equal), up to rounding
        return hi
    return float(brentq(f, 0.0, hi, xtol=1e-14, rtol=1e-13, maxiter=200))


def murray_exponent(r0, r1, r2):
    """Junction exponent x solving ``r0^x = r1^x + r2^x``.

    Parameters
    ----------
    r0, r1, r2 : float or array_like
        Parent and daughter radii (any common unit); broadcast together.

    Returns
    -------
    float or ndarray
        The exponent, found with a bracketed root search
        (:func:`scipy.optimize.brentq` on ``[0, ln 2 / ln(r0 / max(r1, r2))]``,
        where ``(r1/r0)^x + (r2/r0)^x - 1`` changes sign). NaN where a daughter
        is not smaller than the parent (no positive root), or a radius is not
        positive and finite. A float for scalar input, else an array of the
        broadcast shape.

    Examples
    --------
    >>> round(murray_exponent(1.0, 2 ** (-1 / 3), 2 ** (-1 / 3)), 12)
    3.0
    >>> import math; math.isnan(murray_exponent(1.0, 1.0, 0.5))
    True
    """
    a, b, c = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (r0, r1, r2)))
    out = np.empty(a.shape)
    for idx in np.ndindex(a.shape):
        out[idx] = _exponent_one(float(a[idx]), np.array([b[idx], c[idx]]))
    return float(out) if out.ndim == 0 else out


def murray_exponent_multi(r0: float, daughters: Sequence[float]) -> float:
    """Generalised junction exponent x solving ``r0^x = sum_i r_i^x``.

    For two or more daughters; NaN when a daughter is not smaller than the
    parent, a radius is not positive and finite, or there are fewer than two
    daughters.
    """
    return _exponent_one(float(r0), np.asarray(daughters, dtype=float).ravel())


def murray_optimal_angles(r0, r1, r2):
    """Minimum-work branching angles of both daughters from the parent axis.

    ``cos theta1 = (r0^4 + r1^4 - r2^4) / (2 r0^2 r1^2)`` and the same with 1
    and 2 swapped (Murray CD 1926, J Gen Physiol 9:835); cosines are clipped to
    [-1, 1] for radii far from the cube law.

    Parameters
    ----------
    r0, r1, r2 : float or array_like
        Parent and daughter radii, broadcast together.

    Returns
    -------
    (theta1, theta2) : floats or ndarrays
        Degrees; NaN where a radius is not positive and finite.

    Examples
    --------
    >>> t1, t2 = murray_optimal_angles(1.0, 2 ** (-1 / 3), 2 ** (-1 / 3))
    >>> round(t1, 2), round(t1 + t2, 1)
    (37.47, 74.9)
    """
    a, b, c = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (r0, r1, r2)))
    ok = np.isfinite(a) & np.isfinite(b) & np.isfinite(c) & (a > 0) & (b > 0) & (c > 0)
    a, b, c = (np.where(ok, v, 1.0) for v in (a, b, c))
    c1 = (a**4 + b**4 - c**4) / (2.0 * a**2 * b**2)
    c2 = (a**4 + c**4 - b**4) / (2.0 * a**2 * c**2)
    t1 = np.where(ok, np.degrees(np.arccos(np.clip(c1, -1.0, 1.0))), np.nan)
    t2 = np.where(ok, np.degrees(np.arccos(np.clip(c2, -1.0, 1.0))), np.nan)
    if t1.ndim == 0:
        return float(t1), float(t2)
    return t1, t2


# ---------------------------------------------------------------------------
# geometry
# ---------------------------------------------------------------------------

def _angle_deg(a: np.ndarray, b: np.ndarray) -> float:
    """Angle between two vectors, degrees (atan2 form: accurate near 0 and 180)."""
    if not (np.all(np.isfinite(a)) and np.all(np.isfinite(b))):
        return math.nan
    cross = float(np.linalg.norm(np.cross(a, b)))
    dot = float(np.dot(a, b))
    if cross == 0.0 and dot == 0.0:
        return math.nan
    return math.degrees(math.atan2(cross, dot))


def _out_of_plane_deg(t0: np.ndarray, t1: np.ndarray, t2: np.ndarray) -> float:
    """Largest angle between one unit direction and the plane of the other two."""
    vecs = (t0, t1, t2)
    if not all(np.all(np.isfinite(v)) for v in vecs):
        return math.nan
    vol = abs(float(np.dot(t0, np.cross(t1, t2))))
    best = math.nan
    for k in range(3):
        p, q = (vecs[j] for j in range(3) if j != k)
        s = float(np.linalg.norm(np.cross(p, q)))
        if s <= 1e-12:
            continue  # the other two are parallel: they span no plane
        ang = math.degrees(math.asin(min(1.0, vol / s)))
        if math.isnan(best) or ang > best:
            best = ang
    return best


def _direction_from_node(points: np.ndarray, scale: float, skip: float, fit: float) -> tuple[np.ndarray, bool]:
    """Unit direction of a centreline at its first point, pointing along it.

    ``points`` run from the node outward. Returns ``(direction, from_node)``;
    ``from_node`` is True when the segment was too short to skip the junction
    zone (the fit then starts at the node) or has no usable points.
    """
    nan3 = np.full(3, np.nan)
    if len(points) < 2:
        return nan3, True
    step = np.sqrt((np.diff(points, axis=0) ** 2).sum(axis=1))
    keep = np.r_[True, step > 0]
    pts = points[keep]
    if len(pts) < 2:
        return nan3, True
    arc = np.r_[0.0, np.cumsum(step[step > 0])]
    total = float(arc[-1])
    hi = min(fit * scale, 0.5 * total)
    lo = skip * scale
    from_node = False
    if not hi > lo:
        # Too short to leave the junction zone out: fit from the node itself.
        lo, from_node = 0.0, True
    if not hi > 0:
        return nan3, True
    s = np.linspace(lo, hi, _TANGENT_SAMPLES)
    sample = np.column_stack([np.interp(s, arc, pts[:, a]) for a in range(3)])
    centred = sample - sample.mean(axis=0)
    _, sv, vt = np.linalg.svd(centred, full_matrices=False)
    if not sv[0] > 0:
        return nan3, True
    d = vt[0]
    ref = sample[-1] - (pts[0] if from_node else sample[0])
    if np.dot(d, ref) < 0:
        d = -d
    return d / np.linalg.norm(d), from_node


# ---------------------------------------------------------------------------
# configuration and inputs
# ---------------------------------------------------------------------------

def _section(config: Mapping[str, Any] | None) -> dict[str, Any]:
    from .config import SCHEMA, validate_config

    if config is None:
        section: Mapping[str, Any] = {}
    elif not isinstance(config, Mapping):
        raise ConfigError(f"bifurcations config: expected a mapping, got {type(config).__name__}")
    elif "bifurcations" in config:
        section = config["bifurcations"] or {}
    elif set(config) & set(SCHEMA):
        section = {}  # a full config from before this section existed
    else:
        section = config
    cfg = validate_config({"bifurcations": dict(section)})["bifurcations"]
    for lo, hi in (("ratio_min", "ratio_max"), ("exponent_min", "exponent_max")):
        if cfg[lo] is not None and cfg[hi] is not None and cfg[lo] > cfg[hi]:
            raise ConfigError(
                f"config keys 'bifurcations.{lo}' and 'bifurcations.{hi}': expected {lo} <= {hi}, "
                f"got {cfg[lo]!r} > {cfg[hi]!r}"
            )
    return cfg


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


def _check_centrelines(centrelines: Any, n: int) -> list[np.ndarray]:
    if centrelines is None or isinstance(centrelines, (str, bytes)):
        raise InputError(f"centrelines: expected a list of (K, 3) arrays, got {type(centrelines).__name__}")
    try:
        items = list(centrelines)
    except TypeError:
        raise InputError(f"centrelines: expected a list of (K, 3) arrays, got {type(centrelines).__name__}") from None
    if len(items) != n:
        raise InputError(f"centrelines: expected one per segment row ({n}), got {len(items)}")
    out = []
    for i, c in enumerate(items):
        arr = np.asarray(c, dtype=float)
        if arr.ndim != 2 or arr.shape[1] != 3 or len(arr) < 2:
            raise InputError(f"centrelines: expected (K, 3) arrays with K >= 2, got shape {arr.shape} at row {i}")
        if not np.all(np.isfinite(arr)):
            raise InputError(f"centrelines: expected finite coordinates, got a non-finite value at row {i}")
        out.append(arr)
    return out


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


def analyze_bifurcations(
    segments: pd.DataFrame,
    nodes: pd.DataFrame,
    centrelines: Sequence[np.ndarray],
    *,
    config: Mapping[str, Any] | None = None,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Radius law, branching angles and flow split at every junction.

    Parameters
    ----------
    segments : DataFrame, shape (S, ...)
        ``segment_id``, ``node_from``, ``node_to``, ``length_um``,
        ``radius_um``; optionally ``radius_n_points``, ``level``,
        ``flow_nl_min``, ``wss_pa`` (see the module notes).
    nodes : DataFrame, shape (N, ...)
        ``node_id``; ``z``, ``y``, ``x``, ``z_um``, ``y_um``, ``x_um`` are
        copied to the table when present.
    centrelines : sequence of (K, 3) array_like
        One per segment row, µm, from ``node_from`` to ``node_to``.
    config : mapping or None, keyword-only
        Full validated config or its ``bifurcations`` section; missing keys
        take defaults.

    Returns
    -------
    table : DataFrame
        One row per junction where three or more segment ends meet (a
        self-loop counts twice) and at least three segments are not
        self-loops, sorted by ``node_id``; columns :data:`COLUMNS`. Empty
        (with those columns) when ``enabled`` is false.
    summary : dict
        ``bifurcations`` (rows), ``bifurcations_flagged``,
        ``bifurcations_low_confidence``, ``multifurcations``,
        ``flag_counts`` (every code of :data:`REASON_CODES`),
        ``murray_exponent_median``, ``murray_ratio_median`` (over finite
        values), ``fraction_within_tolerance`` (share without a Murray-law
        code), ``flow_split_error_median`` (median ``|flow_split_daughter1 -
        flow_split_cube_law|``; None without flow), ``junctions_skipped``
        (junctions where fewer than three segments are not self-loops).
        Medians and fractions are None when there is no junction.
        With ``enabled`` false: ``{"bifurcations_enabled": False}``.

    Raises
    ------
    InputError
        Missing columns, unknown node ids, duplicate ids, centrelines that do
        not match the segment rows, or radii that are not positive.
    ConfigError
        Invalid ``bifurcations`` options.
    """
    cfg = _section(config)
    if not cfg["enabled"]:
        return _empty_table(), {"bifurcations_enabled": False}
    _require(segments, "segments", ("segment_id", "node_from", "node_to", "length_um", "radius_um"))
    _require(nodes, "nodes", ("node_id",))
    lines = _check_centrelines(centrelines, len(segments))

    ids = pd.Index(nodes["node_id"].to_numpy(dtype=np.int64))
    if not ids.is_unique:
        raise InputError("nodes: node_id values must be unique")
    seg_id = segments["segment_id"].to_numpy(dtype=np.int64)
    if not pd.Index(seg_id).is_unique:
        raise InputError("segments: segment_id values must be unique")
    u = ids.get_indexer(segments["node_from"].to_numpy(dtype=np.int64))
    v = ids.get_indexer(segments["node_to"].to_numpy(dtype=np.int64))
    if (u < 0).any() or (v < 0).any():
        k = int(np.flatnonzero((u < 0) | (v < 0))[0])
        raise InputError(f"segments: segment_id {int(seg_id[k])} refers to a node id missing from nodes")
    radius = _float_column(segments, "radius_um")
    if not np.all(np.isfinite(radius) & (radius > 0)):
        k = int(np.flatnonzero(~(np.isfinite(radius) & (radius > 0)))[0])
        raise InputError(
            f"segments: radius_um must be finite and > 0 (segment_id {int(seg_id[k])}, value {radius[k]!r})"
        )
    length = _float_column(segments, "length_um")
    npts = _float_column(segments, "radius_n_points")
    level = _float_column(segments, "level")
    flow = _float_column(segments, "flow_nl_min")
    wss = _float_column(segments, "wss_pa")

    n_nodes = len(ids)
    loop = u == v
    ends = np.bincount(u, minlength=n_nodes) + np.bincount(v, minlength=n_nodes)
    # Incidence: (node row, segment row, segment leaves the node at its start?).
    inc_node = np.concatenate([u[~loop], v[~loop], u[loop]])
    inc_seg = np.concatenate([np.flatnonzero(~loop), np.flatnonzero(~loop), np.flatnonzero(loop)])
    inc_start = np.concatenate([np.ones((~loop).sum(), bool), np.zeros((~loop).sum(), bool),
                                np.ones(loop.sum(), bool)])
    order = np.argsort(inc_node, kind="stable")
    inc_node, inc_seg, inc_start = inc_node[order], inc_seg[order], inc_start[order]
    bounds = np.searchsorted(inc_node, np.arange(n_nodes + 1))

    node_cols = {c: (_float_column(nodes, c) if c in nodes.columns else None)
                 for c in ("z", "y", "x", "z_um", "y_um", "x_um")}

    rows = []
    skipped = 0
    for n in np.flatnonzero(ends >= 3):
        segs = inc_seg[bounds[n]:bounds[n + 1]]
        starts = inc_start[bounds[n]:bounds[n + 1]]
        is_loop = loop[segs]
        notes = [f"self_loop:{int(seg_id[s])}" for s in segs[is_loop]]
        segs, starts = segs[~is_loop], starts[~is_loop]
        if len(segs) < 3:
            skipped += 1
            continue
        rows.append(_junction_row(n, segs, starts, notes, ends=ends, ids=ids, seg_id=seg_id, radius=radius,
                                  length=length, npts=npts, level=level, flow=flow, wss=wss, lines=lines,
                                  node_cols=node_cols, cfg=cfg))
    table = _typed(pd.DataFrame(rows, columns=COLUMNS)) if rows else _empty_table()
    table = table.sort_values("node_id", kind="stable").reset_index(drop=True)
    return table, _summary(table, has_flow=flow is not None, skipped=skipped)


def _junction_row(n, segs, starts, notes, *, ends, ids, seg_id, radius, length, npts, level, flow, wss, lines,
                  node_cols, cfg) -> dict[str, Any]:
    r = radius[segs]
    # Parent: flow into the node, else smallest level, else widest.
    parent_k, parent_by = None, "radius"
    if flow is not None:
        q = flow[segs]
        q_in = np.where(starts, -q, q)  # flow entering the node through each segment
        qmax = float(np.nanmax(np.abs(q))) if np.any(np.isfinite(q)) else 0.0
        if qmax > 0 and np.nanmax(q_in) > _FLOW_RTOL * qmax:
            q_in_f = np.where(np.isfinite(q_in), q_in, -np.inf)
            parent_k = int(np.argmax(q_in_f))  # first of equal inflows
            parent_by = "flow"
            if int((q_in_f > _FLOW_RTOL * qmax).sum()) > 1:
                notes.append("converging")
    if parent_k is None and level is not None and np.any(np.isfinite(level[segs])):
        lv = np.where(np.isfinite(level[segs]), level[segs], np.inf)
        cand = np.flatnonzero(lv == lv.min())
        parent_k = int(cand[np.lexsort((seg_id[segs][cand], -r[cand]))[0]])
        parent_by = "level"
    if parent_k is None:
        parent_k = int(np.lexsort((seg_id[segs], -r))[0])
    others = np.delete(np.arange(len(segs)), parent_k)
    others = others[np.lexsort((seg_id[segs][others], -r[others]))]  # daughter 1 the widest
    p = segs[parent_k]
    ds = segs[others]
    r0, rd = float(radius[p]), radius[ds]
    r1, r2 = float(rd[0]), float(rd[1])
    multi = len(ds) > 2

    # Radius law.
    ratio = float((rd**3).sum() / r0**3)
    area = float((rd**2).sum() / r0**2)
    expo = _exponent_one(r0, rd)
    undefined = bool(np.any(rd >= r0))

    # Directions pointing away from the node; the junction zone scales with
    # the widest vessel meeting there.
    scale = float(r.max())
    dirs = []
    for k in (parent_k, others[0], others[1]):
        s = segs[k]
        pts = lines[s] if starts[k] else lines[s][::-1]
        d, from_node = _direction_from_node(pts, scale, cfg["tangent_skip_radii"], cfg["tangent_fit_radii"])
        dirs.append(d)
        if from_node:
            notes.append(f"tangent_from_node:{int(seg_id[s])}")
    t0, t1, t2 = dirs
    a1, a2 = _angle_deg(t1, -t0), _angle_deg(t2, -t0)
    between = _angle_deg(t1, t2)
    oop = _out_of_plane_deg(t0, t1, t2)
    if multi:
        o1 = o2 = dev = math.nan
    else:
        o1, o2 = murray_optimal_angles(r0, r1, r2)
        dev = max(abs(a1 - o1), abs(a2 - o2))  # NaN when an angle is NaN

    # Flow split and shear.
    split = w1 = w2 = math.nan
    cube = float(r1**3 / (rd**3).sum())
    if flow is not None:
        qd = np.abs(flow[ds])
        tot = float(qd.sum())
        if np.isfinite(tot) and tot > 0:
            split = float(qd[0] / tot)
    if wss is not None and np.isfinite(wss[p]) and wss[p] > 0:
        w1, w2 = float(wss[ds[0]] / wss[p]), float(wss[ds[1]] / wss[p])

    # Confidence.
    low = []
    for s in np.r_[p, ds]:
        if npts is not None and np.isfinite(npts[s]) and npts[s] < cfg["min_radius_points"]:
            low.append(f"few_points:{int(seg_id[s])}")
    for s in np.r_[p, ds]:
        if np.isfinite(length[s]) and length[s] < cfg["min_length_radii"] * radius[s]:
            low.append(f"short:{int(seg_id[s])}")
    low_conf = bool(low)

    # Flags.
    reasons = []
    if cfg["ratio_max"] is not None and ratio > cfg["ratio_max"]:
        reasons.append("ratio_high")
    if cfg["ratio_min"] is not None and ratio < cfg["ratio_min"]:
        reasons.append("ratio_low")
    if cfg["exponent_max"] is not None and expo > cfg["exponent_max"]:
        reasons.append("exponent_high")
    if cfg["exponent_min"] is not None and expo < cfg["exponent_min"]:
        reasons.append("exponent_low")
    if cfg["flag_undefined_exponent"] and undefined:
        reasons.append("exponent_undefined")
    if cfg["angle_deviation_max_deg"] is not None and dev > cfg["angle_deviation_max_deg"]:
        reasons.append("angle")
    if cfg["flag_multi"] and multi:
        reasons.append("multi")
    if cfg["flag_low_confidence"] and low_conf:
        reasons.append("low_confidence")

    def voxel(c):
        val = node_cols[c]
        return int(round(val[n])) if val is not None and np.isfinite(val[n]) else None

    def micron(c):
        val = node_cols[c]
        return float(val[n]) if val is not None else math.nan

    return {
        "node_id": int(ids[n]),
        "z": voxel("z"), "y": voxel("y"), "x": voxel("x"),
        "z_um": micron("z_um"), "y_um": micron("y_um"), "x_um": micron("x_um"),
        "level": int(level[p]) if level is not None and np.isfinite(level[p]) else None,
        "degree": int(ends[n]),
        "parent_segment": int(seg_id[p]),
        "parent_by": parent_by,
        "daughter_segments": ";".join(str(int(seg_id[s])) for s in ds),
        "radius_parent_um": r0,
        "radius_daughter1_um": r1,
        "radius_daughter2_um": r2,
        "murray_ratio": ratio,
        "murray_exponent": expo,
        "asymmetry": r2 / r1,
        "area_ratio": area,
        "angle_daughter1_deg": a1,
        "angle_daughter2_deg": a2,
        "angle_between_daughters_deg": between,
        "out_of_plane_deg": oop,
        "angle_optimal_daughter1_deg": o1,
        "angle_optimal_daughter2_deg": o2,
        "angle_deviation_deg": dev,
        "flow_split_daughter1": split,
        "flow_split_cube_law": cube,
        "wss_ratio_daughter1": w1,
        "wss_ratio_daughter2": w2,
        "low_confidence": low_conf,
        "confidence_notes": ";".join(low + notes),
        "flagged": bool(reasons),
        "flag_reasons": ";".join(reasons),
    }


def _median(values: np.ndarray) -> float | None:
    finite = values[np.isfinite(values)]
    return float(np.median(finite)) if finite.size else None


def _codes(table: pd.DataFrame) -> list[set[str]]:
    return [set(s.split(";")) - {""} for s in table["flag_reasons"].astype(str)]


def _summary(table: pd.DataFrame, *, has_flow: bool, skipped: int) -> dict[str, Any]:
    n = len(table)
    codes = _codes(table)
    counts = {c: int(sum(c in s for s in codes)) for c in REASON_CODES}
    within = sum(not (s & set(MURRAY_CODES)) for s in codes)
    split_err = None
    if has_flow and n:
        err = np.abs(table["flow_split_daughter1"].to_numpy(float) - table["flow_split_cube_law"].to_numpy(float))
        split_err = _median(err)
    return {
        "bifurcations": int(n),
        "bifurcations_flagged": int(table["flagged"].sum()),
        "bifurcations_low_confidence": int(table["low_confidence"].sum()),
        "multifurcations": int((table["daughter_segments"].astype(str).str.count(";") >= 2).sum()),
        "flag_counts": counts,
        "murray_exponent_median": _median(table["murray_exponent"].to_numpy(float)),
        "murray_ratio_median": _median(table["murray_ratio"].to_numpy(float)),
        "fraction_within_tolerance": within / n if n else None,
        "flow_split_error_median": split_err,
        "junctions_skipped": int(skipped),
    }


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
        (Int64), ``n_bifurcations``, ``murray_exponent_median``,
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
            "murray_exponent_median": _nan_if_none(_median(expo[sel])),
            "murray_ratio_median": _nan_if_none(_median(ratio[sel])),
            "bifurcations_flagged_fraction": float(flagged[sel].mean()),
        })
    df = pd.DataFrame(out, columns=["level", "n_bifurcations", "murray_exponent_median", "murray_ratio_median",
                                    "bifurcations_flagged_fraction"])
    df["level"] = pd.array(df["level"].to_numpy(dtype=object), dtype="Int64") if len(df) else pd.array([], dtype="Int64")
    df["n_bifurcations"] = df["n_bifurcations"].astype(np.int64)
    for c in ("murray_exponent_median", "murray_ratio_median", "bifurcations_flagged_fraction"):
        df[c] = df[c].astype(float)
    return df
