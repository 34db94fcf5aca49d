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

import numba
import numpy as np
import pandas as pd

from ._checks import segment_end_rows
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
    "summarize_bifurcations",
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

# The exponent is found for all junctions at once by Newton's method on
# g(x) = ln(sum_i (r_i / r0)^x), which is convex and decreasing (a log-sum-exp
# of linear functions with negative slopes) and root-bracketed by
# [ln n / ln(r0 / min r_i), ln n / ln(r0 / max r_i)]. Started at the lower
# end, every Newton step stays below the root (the tangent of a convex
# function lies under it), so the iteration increases monotonically to the
# root without a safeguard; in log form g is nearly linear and it converges
# in a few steps even for exponents in the thousands (daughters almost as wide
# as the parent). The cap only guards against a stall.
_NEWTON_MAX_ITER = 100
_NEWTON_RTOL = 4 * np.finfo(float).eps


def _exponents(r0: np.ndarray, daughters: np.ndarray, start: np.ndarray) -> np.ndarray:
    """Exponents x with ``r0[j]^x = sum(daughters[start[j]:start[j + 1]]^x)``.

    Parameters
    ----------
    r0 : ndarray, shape (J,)
        Parent radius of each junction.
    daughters : ndarray, shape (D,)
        Daughter radii, grouped by junction.
    start : ndarray of int, shape (J,)
        Index in ``daughters`` of each junction's first daughter, increasing;
        every group is non-empty.

    Returns
    -------
    ndarray, shape (J,)
        NaN where a junction has fewer than two daughters, a radius is not
        positive and finite, or a daughter is not smaller than the parent
        (then ``sum (r_i / r0)^x > 1`` for every x > 0: no root).
    """
    r0 = np.asarray(r0, dtype=float)
    d = np.asarray(daughters, dtype=float)
    out = np.full(len(r0), np.nan)
    if len(r0) == 0:
        return out
    count = np.diff(np.r_[start, len(d)])
    group = np.repeat(np.arange(len(r0)), count)
    fine = np.isfinite(d) & (d > 0) & (d < r0[group])  # False where r0 is NaN
    ok = np.isfinite(r0) & (r0 > 0) & (count >= 2) & np.logical_and.reduceat(fine, start)
    if not ok.any():
        return out
    sel = ok[group]
    n = count[ok]
    grp = np.repeat(np.arange(len(n)), n)
    st = np.r_[0, np.cumsum(n)[:-1]]
    logs = np.log(d[sel] / r0[group[sel]])  # all < 0
    ln_n = np.log(n.astype(float))
    hi = ln_n / -np.maximum.reduceat(logs, st)  # sum <= n * max_ratio^hi = 1
    lo = ln_n / -np.minimum.reduceat(logs, st)  # sum >= n * min_ratio^lo = 1
    # Equal daughters have their root exactly at hi (= lo), up to rounding.
    at_hi = np.add.reduceat(np.exp(hi[grp] * logs), st) - 1.0 >= 0.0
    x = np.where(at_hi, hi, lo)
    active = ~at_hi
    for _ in range(_NEWTON_MAX_ITER):
        if not active.any():
            break
        w = np.exp(x[grp] * logs)
        s = np.add.reduceat(w, st)
        slope = np.add.reduceat(logs * w, st) / s  # g'(x) <= max(logs) < 0
        x_new = np.minimum(x - np.log(s) / slope, hi)
        moved = x_new - x > _NEWTON_RTOL * x
        x = np.where(active, x_new, x)
        active &= moved
    out[ok] = x
    return out


def murray_exponent(r0, r1, r2):
    """Junction exponent x solving ``r0^x = r1^x + r2^x``.

    Parameters
    ----------
    r0, r1, r2 : float or array_like
        Parent and daughter radii (any common unit); broadcast together.

    Returns
    -------
    float or ndarray
        The exponent, found for all elements at once by Newton's method on
        ``ln((r1/r0)^x + (r2/r0)^x)``, which is convex and decreasing, from
        the lower end of the bracket ``[ln 2 / ln(r0 / min(r1, r2)),
        ln 2 / ln(r0 / max(r1, r2))]`` (monotone convergence to the root, to
        rounding). NaN where a daughter is not smaller than the parent (no
        positive root), or a radius is not positive and finite. A float for
        scalar input, else an array of the broadcast shape.

    Examples
    --------
    >>> round(murray_exponent(1.0, 2 ** (-1 / 3), 2 ** (-1 / 3)), 12)
    3.0
    >>> import math; math.isnan(murray_exponent(1.0, 1.0, 0.5))
    True
    """
    a, b, c = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (r0, r1, r2)))
    pairs = np.column_stack([b.ravel(), c.ravel()]).ravel()  # (r1, r2) of each element in turn
    out = _exponents(a.ravel(), pairs, np.arange(0, pairs.size, 2)).reshape(a.shape)
    return float(out) if out.ndim == 0 else out


def murray_exponent_multi(r0: float, daughters: Sequence[float]) -> float:
    """Generalised junction exponent x solving ``r0^x = sum_i r_i^x``.

    For two or more daughters; NaN when a daughter is not smaller than the
    parent, a radius is not positive and finite, or there are fewer than two
    daughters.
    """
    d = np.asarray(daughters, dtype=float).ravel()
    if d.size == 0:
        return math.nan
    return float(_exponents(np.array([float(r0)]), d, np.array([0]))[0])


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

def _angles_deg(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Angles between paired rows of two (M, 3) arrays, degrees.

    The atan2 form is accurate near 0 and 180 deg. NaN where a vector is not
    finite or both the cross and the dot product vanish.
    """
    cross = np.sqrt((np.cross(a, b) ** 2).sum(axis=1))
    dot = (a * b).sum(axis=1)
    bad = ~(np.isfinite(a).all(axis=1) & np.isfinite(b).all(axis=1)) | ((cross == 0.0) & (dot == 0.0))
    out = np.degrees(np.arctan2(cross, dot))
    out[bad] = np.nan
    return out


def _out_of_plane_deg(t0: np.ndarray, t1: np.ndarray, t2: np.ndarray) -> np.ndarray:
    """Largest angle between one unit direction and the plane of the other two.

    Row-wise over (M, 3) arrays; a pair of parallel directions spans no plane
    and is left out; NaN where none is left or a direction is not finite.
    """
    vecs = (t0, t1, t2)
    vol = np.abs((t0 * np.cross(t1, t2)).sum(axis=1))
    best = np.full(len(t0), np.nan)
    for k in range(3):
        p, q = (vecs[j] for j in range(3) if j != k)
        s = np.sqrt((np.cross(p, q) ** 2).sum(axis=1))
        spans = s > 1e-12  # the other two are not parallel
        ang = np.full(len(t0), np.nan)
        ang[spans] = np.degrees(np.arcsin(np.minimum(1.0, vol[spans] / s[spans])))
        best = np.where(spans & (np.isnan(best) | (ang > best)), ang, best)
    best[~np.all([np.isfinite(v).all(axis=1) for v in vecs], axis=0)] = np.nan
    return best


@numba.njit(cache=True)
def _tangent_windows(points, offsets, seg, from_start, scale, skip, fit, n_samples):
    """Evenly resampled fitting window of each requested segment end.

    Parameters
    ----------
    points : ndarray, shape (P, 3)
        All centrelines, concatenated in segment row order.
    offsets : ndarray of int64, shape (S + 1,)
        Centreline ``s`` is ``points[offsets[s]:offsets[s + 1]]``.
    seg : ndarray of int64, shape (M,)
        Segment row of each end.
    from_start : ndarray of bool, shape (M,)
        The node is at the centreline's first point (else its last).
    scale : ndarray, shape (M,)
        Junction radius at each end.
    skip, fit : float
        Window from ``skip * scale`` to ``min(fit * scale, length / 2)`` of
        arc length from the node.
    n_samples : int
        Samples over the window.

    Returns
    -------
    samples : ndarray, shape (M, n_samples, 3)
        Points at evenly spaced arc lengths over the window (``np.interp`` on
        the arc length of the centreline with repeated points dropped).
    ref : ndarray, shape (M, 3)
        Vector pointing away from the node along the window, to orient the
        fitted axis: last sample minus first sample (minus the node when
        fitted from the node).
    status : ndarray of int8, shape (M,)
        0 fitted past the junction zone, 1 fitted from the node (too short to
        skip it), 2 no window (no length); samples and ref are NaN then.
    """
    m = seg.shape[0]
    samples = np.full((m, n_samples, 3), np.nan)
    ref = np.full((m, 3), np.nan)
    status = np.full(m, 2, dtype=np.int8)
    kmax = 0
    for e in range(m):
        kmax = max(kmax, offsets[seg[e] + 1] - offsets[seg[e]])
    arc = np.empty(kmax)
    pts = np.empty((kmax, 3))
    for e in range(m):
        a = offsets[seg[e]]
        k = offsets[seg[e] + 1] - a
        # Walk from the node outward, dropping repeated points; the running
        # sum matches np.cumsum of the step lengths.
        n = 0
        prev = -1
        for i in range(k):
            j = a + i if from_start[e] else a + k - 1 - i
            if prev < 0:
                pts[0, :] = points[j, :]
                arc[0] = 0.0
                n = 1
            else:
                dz = points[j, 0] - points[prev, 0]
                dy = points[j, 1] - points[prev, 1]
                dx = points[j, 2] - points[prev, 2]
                step = np.sqrt(dz * dz + dy * dy + dx * dx)
                if step > 0:
                    pts[n, :] = points[j, :]
                    arc[n] = arc[n - 1] + step
                    n += 1
            prev = j
        if n < 2:
            continue
        hi = min(fit * scale[e], 0.5 * arc[n - 1])
        lo = skip * scale[e]
        from_node = False
        if not hi > lo:
            # Too short to leave the junction zone out: fit from the node itself.
            lo = 0.0
            from_node = True
        if not hi > 0:
            continue
        # np.linspace(lo, hi, n_samples), then np.interp per axis.
        delta = (hi - lo) / (n_samples - 1)
        j = 0
        for i in range(n_samples):
            x = hi if i == n_samples - 1 else float(i) * delta + lo
            while j + 1 < n and arc[j + 1] <= x:
                j += 1
            if j == n - 1 or arc[j] == x:
                samples[e, i, :] = pts[j, :]
            else:
                for c in range(3):
                    slope = (pts[j + 1, c] - pts[j, c]) / (arc[j + 1] - arc[j])
                    samples[e, i, c] = slope * (x - arc[j]) + pts[j, c]
        for c in range(3):
            ref[e, c] = samples[e, n_samples - 1, c] - (pts[0, c] if from_node else samples[e, 0, c])
        status[e] = 1 if from_node else 0
    return samples, ref, status


def _directions(points: np.ndarray, offsets: np.ndarray, seg: np.ndarray, from_start: np.ndarray,
                scale: np.ndarray, skip: float, fit: float) -> tuple[np.ndarray, np.ndarray]:
    """Unit direction of each requested segment end, pointing away from its node.

    The principal axis (total least squares line) of the evenly resampled
    window from :func:`_tangent_windows`, oriented along the window.

    Returns
    -------
    direction : ndarray, shape (M, 3)
        NaN where there is no window or the window has no extent.
    from_node : ndarray of bool, shape (M,)
        The fit started at the node (segment too short to skip the junction
        zone) or found no direction.
    """
    samples, ref, status = _tangent_windows(points, offsets, seg.astype(np.int64), from_start.astype(np.bool_),
                                            scale.astype(float), float(skip), float(fit), _TANGENT_SAMPLES)
    direction = np.full((len(seg), 3), np.nan)
    has = np.flatnonzero(status < 2)
    if len(has):
        window = samples[has]
        # One batched SVD (the same LAPACK routine as one call per window).
        _, sv, vt = np.linalg.svd(window - window.mean(axis=1, keepdims=True), full_matrices=False)
        d = vt[:, 0, :]
        d = np.where(((d * ref[has]).sum(axis=1) < 0)[:, None], -d, d)
        spread = sv[:, 0] > 0
        d = d / np.sqrt((d**2).sum(axis=1))[:, None]
        direction[has[spread]] = d[spread]
        status[has[~spread]] = 2
    return direction, status != 0


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


def _check_centrelines(centrelines: Any, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Validate the centrelines and concatenate them.

    Returns ``(points, offsets)``: all points in segment row order, shape
    (P, 3), and the start of each row's points, shape (n + 1,).
    """
    if centrelines is None or isinstance(centrelines, (str, bytes)):
        raise InputError(f"centrelines: expected a list of (K, 3) arrays, got {type(centrelines).__name__}")
    try:
        items = list(centrelines)
    except TypeError:
        raise InputError(f"centrelines: expected a list of (K, 3) arrays, got {type(centrelines).__name__}") from None
    if len(items) != n:
        raise InputError(f"centrelines: expected one per segment row ({n}), got {len(items)}")
    arrays = [np.asarray(c, dtype=float) for c in items]
    bad_shape = next((i for i, a in enumerate(arrays) if a.ndim != 2 or a.shape[1] != 3 or len(a) < 2), n)
    # Rows before the first bad shape are checked for finite values first, so
    # that the error names the first bad row, whatever is wrong with it.
    good = arrays[:bad_shape]
    offsets = np.r_[0, np.cumsum([len(a) for a in good], dtype=np.int64)].astype(np.int64)
    points = np.concatenate(good) if good else np.empty((0, 3))
    finite = np.isfinite(points).all(axis=1)
    if not finite.all():
        i = int(np.searchsorted(offsets, np.flatnonzero(~finite)[0], side="right")) - 1
        raise InputError(f"centrelines: expected finite coordinates, got a non-finite value at row {i}")
    if bad_shape < n:
        raise InputError(f"centrelines: expected (K, 3) arrays with K >= 2, got shape {arrays[bad_shape].shape} "
                         f"at row {bad_shape}")
    return points, offsets


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
    points, offsets = _check_centrelines(centrelines, len(segments))

    ids, seg_id, u, v = segment_end_rows(segments, nodes)
    radius = _float_column(segments, "radius_um")
    if not np.all(np.isfinite(radius) & (radius > 0)):
        k = int(np.flatnonzero(~(np.isfinite(radius) & (radius > 0)))[0])
        raise InputError(
            f"segments: radius_um must be finite and > 0 (segment_id {int(seg_id[k])}, value {radius[k]!r})"
        )
    cols = {c: _float_column(segments, c) for c in ("length_um", "radius_n_points", "level", "flow_nl_min", "wss_pa")}
    has_flow = cols["flow_nl_min"] is not None

    n_nodes = len(ids)
    loop = u == v
    ends = np.bincount(u, minlength=n_nodes) + np.bincount(v, minlength=n_nodes)
    # Arms: the segment ends that are not self-loops, grouped by node in a
    # stable order (ends at node_from in segment row order, then ends at
    # node_to), which decides between equal inflows.
    nl = np.flatnonzero(~loop)
    arm_node = np.concatenate([u[nl], v[nl]])
    order = np.argsort(arm_node, kind="stable")
    arm_node = arm_node[order]
    arm_seg = np.concatenate([nl, nl])[order]
    arm_start = np.repeat([True, False], len(nl))[order]  # the segment leaves the node at its first point
    is_junction = np.bincount(arm_node, minlength=n_nodes) >= 3
    skipped = int(((ends >= 3) & ~is_junction).sum())
    node_row = np.flatnonzero(is_junction)
    if len(node_row) == 0:
        return _empty_table(), _summary(_empty_table(), has_flow=has_flow, skipped=skipped)
    keep = is_junction[arm_node]
    arms = _Arms(
        group=np.searchsorted(node_row, arm_node[keep]),
        seg=arm_seg[keep],
        start=arm_start[keep],
        n_junctions=len(node_row),
    )
    loop_rows = np.flatnonzero(loop & is_junction[u])
    loops = (np.searchsorted(node_row, u[loop_rows]), seg_id[loop_rows])

    table = _junction_table(node_row, arms, loops, ends=ends, ids=ids, seg_id=seg_id, radius=radius, cols=cols,
                            nodes=nodes, points=points, offsets=offsets, cfg=cfg)
    table = table.sort_values("node_id", kind="stable").reset_index(drop=True)
    return table, _summary(table, has_flow=has_flow, skipped=skipped)


class _Arms:
    """The arms (non-loop segment ends) of all junctions, grouped by junction.

    Attributes
    ----------
    group : ndarray of int, shape (A,)
        Junction index of each arm, non-decreasing.
    seg : ndarray of int, shape (A,)
        Segment row of each arm.
    start : ndarray of bool, shape (A,)
        The segment leaves the junction at its first centreline point.
    first : ndarray of int, shape (J,)
        Index of each junction's first arm.
    """

    def __init__(self, *, group: np.ndarray, seg: np.ndarray, start: np.ndarray, n_junctions: int):
        self.group, self.seg, self.start = group, seg, start
        self.first = np.searchsorted(group, np.arange(n_junctions))


def _choose_parents(arms: _Arms, r: np.ndarray, sid: np.ndarray, level: np.ndarray | None,
                    flow: np.ndarray | None) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Parent arm of every junction (module notes: flow, else level, else width).

    Parameters
    ----------
    arms : _Arms
    r, sid : ndarray, shape (A,)
        Radius and segment id of each arm.
    level, flow : ndarray or None
        Per segment row (NaN where missing).

    Returns
    -------
    parent : ndarray of int, shape (J,)
        Index of the parent arm.
    parent_by : ndarray of object, shape (J,)
        ``"flow"``, ``"level"`` or ``"radius"``.
    converging : ndarray of bool, shape (J,)
        More than one arm carries flow into the junction.
    by_width : ndarray of int, shape (A,)
        All arms, by junction, widest first (ties to the smallest id).
    """
    g, first = arms.group, arms.first
    n = len(first)
    by_width = np.lexsort((sid, -r, g))
    parent = by_width[first]
    parent_by = np.full(n, "radius", dtype=object)
    converging = np.zeros(n, dtype=bool)
    if level is not None:
        lv = level[arms.seg]
        known = np.isfinite(lv)
        use = np.logical_or.reduceat(known, first)
        by_level = np.lexsort((sid, -r, np.where(known, lv, np.inf), g))  # lowest level, widest, smallest id
        parent = np.where(use, by_level[first], parent)
        parent_by[use] = "level"
    if flow is not None:
        q = flow[arms.seg]
        q_in = np.where(arms.start, -q, q)  # flow entering the junction through each arm
        any_finite = np.logical_or.reduceat(np.isfinite(q), first)
        qmax = np.where(any_finite, np.fmax.reduceat(np.abs(q), first), 0.0)  # fmax skips NaN
        thr = _FLOW_RTOL * qmax
        use = (qmax > 0) & (np.fmax.reduceat(q_in, first) > thr)
        q_in_f = np.where(np.isfinite(q_in), q_in, -np.inf)
        top = np.maximum.reduceat(q_in_f, first)
        idx = np.arange(len(g))
        first_top = np.minimum.reduceat(np.where(q_in_f == top[g], idx, len(g)), first)  # first of equal inflows
        parent = np.where(use, first_top, parent)
        parent_by[use] = "flow"
        converging = use & (np.add.reduceat(q_in_f > thr[g], first) > 1)
    return parent, parent_by, converging, by_width


def _join_groups(group: np.ndarray, texts: Sequence[str], n: int) -> list[str]:
    """``";"``-join the texts of each of ``n`` groups, keeping their given order within a group."""
    order = np.argsort(group, kind="stable")
    bounds = np.searchsorted(group[order], np.arange(n + 1))
    t = [texts[i] for i in order.tolist()]
    return [";".join(t[a:b]) for a, b in zip(bounds[:-1].tolist(), bounds[1:].tolist())]


def _reason_strings(hits: np.ndarray) -> np.ndarray:
    """``flag_reasons`` of each row of a (J, len(REASON_CODES)) boolean array."""
    key = hits.astype(np.int64) @ (1 << np.arange(hits.shape[1], dtype=np.int64))
    combos, inverse = np.unique(key, return_inverse=True)  # a handful of distinct combinations
    text = np.array([";".join(c for b, c in enumerate(REASON_CODES) if k >> b & 1) for k in combos.tolist()],
                    dtype=object)
    return text[inverse.ravel()]


def _junction_table(node_row, arms, loops, *, ends, ids, seg_id, radius, cols, nodes, points, offsets,
                    cfg) -> pd.DataFrame:
    """One row per junction, in the order of ``node_row`` (see :func:`analyze_bifurcations`)."""
    n = len(node_row)
    g, first = arms.group, arms.first
    length, npts, level, flow, wss = (cols[c] for c in ("length_um", "radius_n_points", "level", "flow_nl_min",
                                                        "wss_pa"))
    r = radius[arms.seg]
    parent, parent_by, converging, by_width = _choose_parents(arms, r, seg_id[arms.seg], level, flow)

    # Daughters: the other arms, widest first. Dropping each junction's parent
    # from the width order leaves every junction's daughters contiguous.
    is_parent = np.zeros(len(g), dtype=bool)
    is_parent[parent] = True
    daughters = by_width[~is_parent[by_width]]
    d_first = first - np.arange(n)
    n_daughters = np.diff(np.r_[d_first, len(daughters)])
    multi = n_daughters > 2
    p = arms.seg[parent]
    ds = arms.seg[daughters]
    d1, d2 = ds[d_first], ds[d_first + 1]

    # Radius law, with sums over all daughters.
    r0, rd, r1, r2 = radius[p], radius[ds], radius[d1], radius[d2]
    sum3 = np.add.reduceat(rd**3, d_first)
    ratio = sum3 / r0**3
    area = np.add.reduceat(rd**2, d_first) / r0**2
    expo = _exponents(r0, rd, d_first)
    undefined = np.logical_or.reduceat(rd >= r0[g[daughters]], d_first)

    # Directions pointing away from the node, for parent, daughter 1 and 2;
    # the junction zone scales with the widest vessel meeting there.
    scale = np.maximum.reduceat(r, first)
    trio = np.column_stack([parent, daughters[d_first], daughters[d_first + 1]])  # arms, (n, 3)
    dirs, from_node = _directions(points, offsets, arms.seg[trio.ravel()], arms.start[trio.ravel()],
                                  np.repeat(scale, 3), cfg["tangent_skip_radii"], cfg["tangent_fit_radii"])
    t0, t1, t2 = dirs[0::3], dirs[1::3], dirs[2::3]
    a1, a2 = _angles_deg(t1, -t0), _angles_deg(t2, -t0)
    between = _angles_deg(t1, t2)
    oop = _out_of_plane_deg(t0, t1, t2)
    o1, o2 = murray_optimal_angles(r0, r1, r2)
    e1, e2 = np.abs(a1 - o1), np.abs(a2 - o2)
    dev = np.maximum(e1, e2)  # NaN when either angle is undefined
    o1, o2, dev = (np.where(multi, np.nan, x) for x in (o1, o2, dev))  # optimum defined for two daughters

    # Flow split and shear.
    cube = r1**3 / sum3
    split = np.full(n, np.nan)
    if flow is not None:
        tot = np.add.reduceat(np.abs(flow[ds]), d_first)
        np.divide(np.abs(flow[d1]), tot, out=split, where=np.isfinite(tot) & (tot > 0))
    w1, w2 = np.full(n, np.nan), np.full(n, np.nan)
    if wss is not None:
        ok = np.isfinite(wss[p]) & (wss[p] > 0)
        np.divide(wss[d1], wss[p], out=w1, where=ok)
        np.divide(wss[d2], wss[p], out=w2, where=ok)

    # Confidence, over the parent and all daughters, parent first.
    members = np.empty(len(g), dtype=np.int64)  # laid out like the arms: parent in each junction's first slot
    members[first] = p
    rest = np.ones(len(g), dtype=bool)
    rest[first] = False
    members[rest] = ds
    few = np.zeros(len(g), dtype=bool)
    if npts is not None:
        few = np.isfinite(npts[members]) & (npts[members] < cfg["min_radius_points"])
    short = np.isfinite(length[members]) & (length[members] < cfg["min_length_radii"] * radius[members])
    low_conf = np.logical_or.reduceat(few | short, first)

    # Notes, in this order within a row: few_points, short, self_loop,
    # converging, tangent_from_node (parent, daughter 1, daughter 2).
    loop_group, loop_id = loops
    tangent_seg = arms.seg[trio.ravel()][from_node]
    note_group = np.concatenate([g[few], g[short], loop_group, np.flatnonzero(converging),
                                 np.repeat(np.arange(n), 3)[from_node]])
    note_text = ([f"few_points:{i}" for i in seg_id[members[few]].tolist()]
                 + [f"short:{i}" for i in seg_id[members[short]].tolist()]
                 + [f"self_loop:{i}" for i in loop_id.tolist()]
                 + ["converging"] * int(converging.sum())
                 + [f"tangent_from_node:{i}" for i in seg_id[tangent_seg].tolist()])
    notes = _join_groups(note_group, note_text, n)
    daughter_text = _join_groups(g[daughters], [str(i) for i in seg_id[ds].tolist()], n)

    # Flags, in REASON_CODES order; a null threshold switches its rule off.
    # NaN values compare False, so they never trip a bound.
    def above(values, key):
        return np.zeros(n, dtype=bool) if cfg[key] is None else values > cfg[key]

    def below(values, key):
        return np.zeros(n, dtype=bool) if cfg[key] is None else values < cfg[key]

    hits = np.column_stack([
        above(ratio, "ratio_max"), below(ratio, "ratio_min"),
        above(expo, "exponent_max"), below(expo, "exponent_min"),
        undefined & bool(cfg["flag_undefined_exponent"]),
        above(dev, "angle_deviation_max_deg"),
        multi & bool(cfg["flag_multi"]),
        low_conf & bool(cfg["flag_low_confidence"]),
    ])

    def voxel(c):
        if c not in nodes.columns:
            return pd.array([None] * n, dtype="Int64")
        val = _float_column(nodes, c)[node_row]
        known = np.isfinite(val)
        return pd.arrays.IntegerArray(np.where(known, np.rint(val), 0).astype(np.int64), ~known)

    def micron(c):
        return _float_column(nodes, c)[node_row] if c in nodes.columns else np.full(n, np.nan)

    lv = level[p] if level is not None else np.full(n, np.nan)
    known_lv = np.isfinite(lv)
    table = pd.DataFrame({
        "node_id": ids.to_numpy()[node_row],
        "z": voxel("z"), "y": voxel("y"), "x": voxel("x"),
        "z_um": micron("z_um"), "y_um": micron("y_um"), "x_um": micron("x_um"),
        "level": pd.arrays.IntegerArray(np.where(known_lv, lv, 0).astype(np.int64), ~known_lv),
        "degree": ends[node_row],
        "parent_segment": seg_id[p],
        "parent_by": parent_by,
        "daughter_segments": daughter_text,
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
        "confidence_notes": notes,
        "flagged": hits.any(axis=1),
        "flag_reasons": _reason_strings(hits),
    })
    return _typed(table)


def _median(values: np.ndarray) -> float | None:
    finite = values[np.isfinite(values)]
    return float(np.median(finite)) if finite.size else None


def _code_hits(table: pd.DataFrame) -> np.ndarray:
    """Boolean (rows, len(REASON_CODES)) array: which codes each row's ``flag_reasons`` names."""
    # A table holds only a handful of distinct reason strings: parse each once.
    inverse, texts = pd.factorize(table["flag_reasons"].astype(str).to_numpy(dtype=object))
    per_text = np.array([[c in set(t.split(";")) for c in REASON_CODES] for t in texts], dtype=bool)
    return per_text.reshape(len(texts), len(REASON_CODES))[inverse]


def _summary(table: pd.DataFrame, *, has_flow: bool, skipped: int) -> dict[str, Any]:
    n = len(table)
    hits = _code_hits(table)
    counts = {c: int(hits[:, k].sum()) for k, c in enumerate(REASON_CODES)}
    within = int((~hits[:, [REASON_CODES.index(c) for c in MURRAY_CODES]].any(axis=1)).sum())
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


def summarize_bifurcations(table: pd.DataFrame, *, has_flow: bool, skipped: int = 0) -> dict[str, Any]:
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

    Returns
    -------
    dict
        The keys listed under ``summary`` in :func:`analyze_bifurcations`.
    """
    if table.shape[1] == 0:
        table = _empty_table()
    return _summary(table, has_flow=has_flow, skipped=skipped)


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
