"""Step 10, Murray's-law checks at every junction.

In: the ``segments`` table (``segment_id``, ``node_from``, ``node_to``,
``length_um``, ``radius_um``; optionally ``radius_sd_um``,
``radius_n_points``, ``n_points`` (centreline points), ``level``
(nullable ``Int64``), ``flow_nl_min`` (signed, positive from ``node_from``
to ``node_to``), ``wss_pa``), the ``nodes`` table (``node_id``; optionally
``z``, ``y``, ``x``, ``z_um``, ``y_um``, ``x_um``), the centreline of every
segment (a list of ``(K, 3)`` arrays in µm in the row order of
``segments``, running from ``node_from`` to ``node_to``) and the config
section ``bifurcations``, and the coarsest voxel spacing of the mask.
Out: the per-junction table written to ``bifurcations.csv`` (one row per node
where three or more segments meet, :data:`COLUMNS`), a summary dict for
``summary.json`` and, from :func:`levels_murray`, per-level statistics to
merge into ``levels.csv``.

Flow pattern and parent. With solved flow every arm (segment end at the
junction) is an inflow, an outflow or carries no flow, by the sign of its
flow relative to the junction (``flow_nl_min`` is signed along the
segment). An arm carries no flow when ``|flow|`` is at most 1e-9 of the
largest ``|flow|`` at the junction or 1e-10 of the largest in the network:
dead-end parts are solved to exactly 0, but a dangling loop is 0 only to
rounding, and the solvers leave errors of that order (on the demo capillary
bed the CG solution, ``flow.cg_rtol`` 1e-10, differs from the direct one by
1.3e-11 of the largest flow, while the smallest flows there are 5e-9 of it,
real and resolved). Column ``flow_pattern``:

``diverging``   one inflow, every other arm (two or more) an outflow; the
                parent is the inflow arm (the feeding vessel).
``converging``  one outflow, every other arm (two or more) an inflow; the
                parent is the outflow arm (the trunk the tributaries drain
                into). Murray's argument (flow proportional to r^3 at equal
                wall shear stress, mass conserved) does not depend on the flow
                direction, so the trunk obeys the same cube law as a feeding
                parent.
``mixed``       flow through the junction, but neither of the above: two or
                more inflows and two or more outflows (a crossing, or two
                bifurcations closer than the skeleton resolves), or arms
                without flow beside flowing ones (a sealed blind branch). The
                parent is the arm with the largest inflow (the first in arm
                order among equals); the parent-daughter law does not describe
                the junction, so it is not judged (``uncertain``, reason
                ``mixed_flow``).
``unsolved``    no flow column, or no arm carries flow (an unperfused part).

Without flow the parent is the segment nearest the root by branching level
(smallest ``level``; ties to the widest), and without levels the widest
segment (ties to the smallest ``segment_id``). Column ``parent_by`` says which
rule chose (``flow``, ``level`` or ``radius``). The other segments are the
daughters (the tributaries of a converging junction), ordered by decreasing
radius: daughter 1 is the larger. Self-loops (both ends at the junction) are
not daughters; they are noted. Junctions with more than two daughters
(multifurcations) are reported with the sums taken over all daughters
(``murray_ratio`` = sum r_i^3 / r0^3, ``area_ratio`` = sum r_i^2 / r0^2, the
exponent x solving r0^x = sum r_i^x, flow split of daughter 1 over all
daughters); their per-daughter columns describe the two largest, and the
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

Flow. With ``flow_nl_min`` at a diverging or converging junction:
``flow_split_daughter1`` = |Q1| / (|Q1| + |Q2| + ...) over the daughters, which
by mass conservation is the share of the parent's flow that daughter 1 takes
(diverging) or that tributary 1 brings into the trunk (converging); NaN at
mixed and unsolved junctions. Its cube-law prediction ``flow_split_cube_law``
= r1^3 / (r1^3 + r2^3 + ...) holds for both directions (Poiseuille flow at
equal wall shear stress, Murray 1926 PNAS). With ``wss_pa``:
``wss_ratio_daughter{1,2}`` = daughter over parent wall shear stress (1 under
the cube law).

Confidence notes (``confidence_notes``, semicolon-separated ``code:segment_id``):
``few_points`` (radius measured over fewer than ``min_radius_points``
centreline points) and ``short`` (segment shorter than ``min_length_radii``
radii, so that its middle part, outside the junction zones, is nearly empty)
make the row ``low_confidence``. Informational notes that do not:
``self_loop`` (a self-loop at the junction, not counted as a daughter) and
``tangent_from_node`` (segment too short to skip the junction zone).

Radius uncertainty (:func:`radius_uncertainty`). A segment's radius is a
robust mean of the wall-fit radii along its middle part. Neighbouring points
share wall points: the wall fit (``pipeline/radii.py``) uses a slab of
half-width h = max(0.75 r, 0.6 v) (v the coarsest voxel spacing) and fits
once per 1.5 h of arc, so the middle part holds about n_eff = n s / (1.5 h)
independent fits (n = ``radius_n_points``, s the centreline step,
``length_um / (n_points - 1)``, else ``voxel_um``; between 1 and n; without
either, n). The standard uncertainty of the radius is
u_r = sqrt(sd^2 / n_eff + (f v)^2), with sd = ``radius_sd_um`` (the spread of
the fitted radii; 0 where missing) and a floor f v (``radius_floor_voxels``
times ``voxel_um``; none without ``voxel_um``) for the error of the wall fit
that does not average out along a vessel (the quantisation of a wall running
along a lattice row). An error shared by all radii of a junction (a
segmentation threshold that widens every vessel by the same factor) leaves
the ratio, exponent and optimal angles unchanged and is not counted.

Propagation (first order, radii independent; Taylor expansion as in the
Guide to the Expression of Uncertainty in Measurement, JCGM 100:2008,
section 5.1.2), with u_0, u_i the parent's and daughters' uncertainties:

``murray_ratio_u``        u_R^2 = sum_i (3 r_i^2 u_i / r0^3)^2 + (3 R u_0 / r0)^2
``murray_exponent_u``     implicit function theorem on F = sum_i w_i - 1,
                          w_i = (r_i / r0)^x: with S = sum_i w_i ln(r_i / r0)
                          (< 0), u_x^2 = (x / S)^2 (sum_i (w_i u_i / r_i)^2 +
                          (u_0 / r0)^2); NaN where x is
``angle_deviation_u_deg`` for the daughter k whose deviation is the larger:
                          u^2 = u_opt,k^2 + ``angle_sd_deg``^2 + b_0^2 +
                          b_k^2, where u_opt,k propagates the radii through
                          Murray's cosine rule (d theta = -d cos theta /
                          sin theta; 0 where the cosine is clipped),
                          ``angle_sd_deg`` is the standard uncertainty of a
                          measured branching angle on straight vessels, and
                          b_0, b_k the bend of the parent's and daughter's
                          fitting windows: a curved vessel's fitted line
                          differs from its tangent at the junction by about
                          3.9 times the ratio of the window's perpendicular
                          to axial rms spread (for a parabolic arc), in
                          degrees

Against Monte Carlo draws of the radii (r0 6, r1 4.8, r2 4.4 µm), the
first-order sd of the ratio is within 0.5 % at 1 % radius uncertainty and
3 % at 4 %; the exponent's within 1.4 % at 1 %, 5 % at 2 %, but 50 % too small
at 4 % (the root of sum (r_i / r0)^x = 1 bends sharply), so at uncertain
radii the exponent's significance is overstated and the ratio, well
conditioned, decides whether a junction is judged at all.

Flags. A Murray-law or angle code is raised only when the value is outside
its band AND differs from the law by more than ``significance_z`` standard
uncertainties: |R - 1| > z u_R for the ratio, |x - 3| > z u_x for the
exponent, dev > z u_dev for the angle (the optimum itself is 0 deviation),
and a daughter wider than its parent by more than z sqrt(u_d^2 + u_0^2) for
``exponent_undefined`` (a daughter as wide as its parent is within the cube
law when the other daughter is thin: 0.99 r0 and 0.3 r0 give R = 0.997).
``severity`` is the largest of these deviations in standard uncertainties
over the quantities outside their band (0 when none is; infinite when an
uncertainty is 0), and orders the review queue (the flagged junctions the
viewer lists, most severe first).

Uncertain junctions (``uncertain`` true, ``uncertain_reasons``
semicolon-separated) are not judged: they carry no flag reason, are not
``flagged`` and not in the review queue, and the summary counts them apart.

``low_confidence``    the row is ``low_confidence`` (``low_confidence_uncertain``):
                      a short segment's radius takes in the inflated
                      junction zones, a bias its spread does not show, and
                      the spread of a few points (one or two wall fits)
                      says little about the error of their mean
``ratio_unresolved``  z u_R is at least the distance from the cube law (1)
                      to the band's edge on the side of the measured ratio,
                      so a junction at the edge could not be told from the
                      cube law, and the ratio is not flagged either
``mixed_flow``        ``flow_pattern`` is ``mixed``
``capillary``         the parent is narrower than
                      ``murray_min_parent_diameter_um``: Murray's law is a
                      design rule of branching trees, and junctions of a
                      capillary mesh, whose vessels are of near-uniform
                      width, do not follow it (three equal vessels give a
                      ratio of 2)

Flag reason codes (``flag_reasons``, semicolon-separated, in this order;
each rule set in the ``bifurcations`` config section, null thresholds switch
a bound off):

``ratio_high``         ``murray_ratio`` > ``ratio_max``, significant
``ratio_low``          ``murray_ratio`` < ``ratio_min``, significant
``exponent_high``      ``murray_exponent`` > ``exponent_max``, significant
``exponent_low``       ``murray_exponent`` < ``exponent_min``, significant
``exponent_undefined`` a daughter significantly wider than the parent
                       (``flag_undefined_exponent``)
``angle``              ``angle_deviation_deg`` > ``angle_deviation_max_deg``,
                       significant
``multi``              more than two daughters (``flag_multi``)

The first five are the Murray-law codes: ``fraction_within_tolerance`` in the
summary is the share of the judged (not uncertain) junctions that carry none
of them.

Summary statistics of the law. ``murray_exponent_median`` counts undefined
junction exponents as +inf (a daughter as wide as the parent is the limit of
exponents growing without bound); dropping them would lower the median, a
selection on the outcome. Their number is ``murray_exponents_undefined``.
One exponent per sample, fitted to all usable bifurcations with a bootstrap
interval, and the Murray ratio's quartiles come from
:func:`pipeline.murray.network_summary` (see ``pipeline/murray.py`` for which
junctions it uses and why).
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
from .measures import radius_uncertainty  # noqa: F401  (public here too)

__all__ = [
    "COLUMNS",
    "REASON_CODES",
    "MURRAY_CODES",
    "UNCERTAIN_CODES",
    "FLOW_PATTERNS",
    "analyze_bifurcations",
    "murray_exponent",
    "murray_exponent_multi",
    "murray_optimal_angles",
    "radius_uncertainty",
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

# Points the tangent window is resampled to: 17 evenly spaced samples over a
# window of about two radii keep the sampling step well below a voxel for the
# radii met in practice, so the principal axis follows the arc, not the points.
_TANGENT_SAMPLES = 17
# An arm's flow at or below this fraction of the largest at its junction, or
# of the largest in the network, counts as none (module notes: solver errors
# measured at 1e-11 of the network's largest flow, real flows down to 5e-9).
_FLOW_RTOL = 1e-9
_FLOW_NETWORK_RTOL = 1e-10


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


def _ratio_u(r0, u0, rd, ud, d_first, ratio):
    """First-order standard uncertainty of ``murray_ratio`` (module notes)."""
    g = np.repeat(np.arange(len(r0)), np.diff(np.r_[d_first, len(rd)]))
    terms = np.add.reduceat((3.0 * rd**2 * ud / r0[g] ** 3) ** 2, d_first)
    return np.sqrt(terms + (3.0 * ratio * u0 / r0) ** 2)


def _exponent_u(r0, u0, rd, ud, d_first, expo):
    """First-order standard uncertainty of ``murray_exponent`` (implicit function theorem; NaN where x is)."""
    g = np.repeat(np.arange(len(r0)), np.diff(np.r_[d_first, len(rd)]))
    out = np.full(len(r0), np.nan)
    ok = np.isfinite(expo)
    if not ok.any():
        return out
    x = np.where(ok, expo, 0.0)
    with np.errstate(invalid="ignore", divide="ignore"):
        lr = np.log(rd / r0[g])
        w = np.exp(x[g] * lr)
        slope = np.add.reduceat(w * lr, d_first)  # dF/dx, < 0 where x is finite
        terms = np.add.reduceat((w * ud / rd) ** 2, d_first) + (u0 / r0) ** 2
        out[ok] = (np.abs(x / slope) * np.sqrt(terms))[ok]
    return out


def _optimal_angles_u(r0, r1, r2, u0, u1, u2):
    """First-order standard uncertainties of both Murray optimal angles, degrees.

    Propagates the radii through ``cos theta1 = r0^2 / (2 r1^2) + r1^2 / (2 r0^2)
    - r2^4 / (2 r0^2 r1^2)`` (and 1, 2 swapped): ``d theta = -d cos / sin``;
    0 where the cosine is clipped to [-1, 1] (the angle stays at 0 or 180 deg
    under small changes).
    """
    def one(a, b, c, ua, ub, uc):
        cos = a**2 / (2 * b**2) + b**2 / (2 * a**2) - c**4 / (2 * a**2 * b**2)
        d_a = a / b**2 - b**2 / a**3 + c**4 / (a**3 * b**2)
        d_b = -(a**2) / b**3 + b / a**2 + c**4 / (a**2 * b**3)
        d_c = -2 * c**3 / (a**2 * b**2)
        inside = np.abs(cos) < 1.0
        sin = np.sqrt(np.clip(1.0 - cos**2, 0.0, None))
        with np.errstate(invalid="ignore", divide="ignore"):
            u = np.sqrt((d_a * ua) ** 2 + (d_b * ub) ** 2 + (d_c * uc) ** 2) / sin
        return np.where(inside, np.degrees(u), 0.0)

    return one(r0, r1, r2, u0, u1, u2), one(r0, r2, r1, u0, u2, u1)


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
    bend = np.zeros(len(seg))
    has = np.flatnonzero(status < 2)
    if len(has):
        window = samples[has]
        # The principal axes from the 3 x 3 scatter matrices, one batched
        # symmetric eigensolve (a batched SVD of the windows took ten times
        # longer); singular values are the square roots of the eigenvalues.
        centred = window - window.mean(axis=1, keepdims=True)
        lam, vec = np.linalg.eigh(np.einsum("nki,nkj->nij", centred, centred))
        sv = np.sqrt(np.maximum(lam[:, ::-1], 0.0))
        d = vec[:, :, 2]
        d = np.where(((d * ref[has]).sum(axis=1) < 0)[:, None], -d, d)
        spread = sv[:, 0] > 0
        d = d / np.sqrt((d**2).sum(axis=1))[:, None]
        direction[has[spread]] = d[spread]
        status[has[~spread]] = 2
        # A curved window's line differs from the tangent at its near end.
        # For a parabola y = k x^2 / 2 over [0, l] the residual rms about the
        # best line is k l^2 / sqrt(720) and the rms along it l / sqrt(12),
        # so their ratio is 0.129 k l, while the line differs from the end
        # tangent by about k l / 2: 3.9 times the ratio (radians).
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = np.sqrt(sv[:, 1] ** 2 + sv[:, 2] ** 2) / sv[:, 0]
        bend[has] = np.degrees(3.9 * np.nan_to_num(ratio))
    return direction, status != 0, bend


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
    # validated whole: the rules that tie two keys live in the config module
    return validate_config({"bifurcations": dict(section)})["bifurcations"]


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
    voxel_um: float | None = None,
) -> tuple[pd.DataFrame, dict[str, Any]]:
    """Radius law, branching angles, flow split and flags at every junction.

    Parameters
    ----------
    segments : DataFrame, shape (S, ...)
        ``segment_id``, ``node_from``, ``node_to``, ``length_um``,
        ``radius_um``; optionally ``radius_sd_um``, ``radius_n_points``,
        ``n_points`` (centreline points), ``level``, ``flow_nl_min``,
        ``wss_pa`` (see the module notes).
    nodes : DataFrame, shape (N, ...)
        ``node_id``; ``z``, ``y``, ``x``, ``z_um``, ``y_um``, ``x_um`` are
        copied to the table when present.
    centrelines : sequence of (K, 3) array_like
        One per segment row, µm, from ``node_from`` to ``node_to``.
    config : mapping or None, keyword-only
        Full validated config or its ``bifurcations`` section; missing keys
        take defaults.
    voxel_um : float, optional, keyword-only
        Coarsest voxel spacing of the mask the segments were measured on, µm
        (module notes, "Radius uncertainty"): without it the radius
        uncertainty has no floor.

    Returns
    -------
    table : DataFrame
        One row per junction where three or more segment ends meet (a
        self-loop counts twice) and at least three segments are not
        self-loops, sorted by ``node_id``; columns :data:`COLUMNS`
        (``_u`` columns: standard uncertainties, in the unit of the
        quantity). Empty (with those columns) when ``enabled`` is false.
    summary : dict
        ``bifurcations`` (rows), ``bifurcations_flagged`` (the review
        queue), ``bifurcations_uncertain`` (not judged),
        ``bifurcations_low_confidence``, ``multifurcations``,
        ``bifurcations_diverging``, ``bifurcations_converging``,
        ``bifurcations_mixed``, ``bifurcations_unsolved`` (rows per
        ``flow_pattern``), ``flag_counts`` (every code of
        :data:`REASON_CODES`), ``uncertain_counts`` (every code of
        :data:`UNCERTAIN_CODES`), ``murray_exponent_median`` (over all
        rows, undefined exponents counted as +inf; None when the median
        itself is infinite), ``murray_ratio_median`` (over finite values of
        all rows), ``murray_exponent_median_diverging``,
        ``murray_ratio_median_diverging`` and the same ``_converging``
        (over the rows of that pattern), the network fit's keys
        (:func:`pipeline.murray.network_summary`:
        ``murray_exponent_network`` with ``_ci_low``, ``_ci_high``,
        ``_junctions``, ``_note``, ``_multifurcations``,
        ``murray_exponents_undefined``, ``murray_ratio_q25``,
        ``murray_ratio_q75``), ``fraction_within_tolerance``
        (share of the junctions not uncertain without a Murray-law code),
        ``flow_split_error_median`` (median ``|flow_split_daughter1 -
        flow_split_cube_law|`` over diverging and converging junctions;
        None without flow), ``junctions_skipped`` (junctions where fewer
        than three segments are not self-loops). Medians and fractions are
        None when there is no row to take them over.
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
    if voxel_um is not None:
        try:
            v = math.nan if isinstance(voxel_um, bool) else float(voxel_um)
        except (TypeError, ValueError):
            v = math.nan
        if not (math.isfinite(v) and v > 0):
            raise InputError(f"voxel_um: expected a positive finite voxel spacing in µm or None, got {voxel_um!r}")
        voxel_um = v

    ids, seg_id, u, v = segment_end_rows(segments, nodes)
    radius = _float_column(segments, "radius_um")
    if not np.all(np.isfinite(radius) & (radius > 0)):
        k = int(np.flatnonzero(~(np.isfinite(radius) & (radius > 0)))[0])
        raise InputError(
            f"segments: radius_um must be finite and > 0 (segment_id {int(seg_id[k])}, value {radius[k]!r})"
        )
    cols = {c: _float_column(segments, c) for c in ("length_um", "radius_n_points", "level", "flow_nl_min", "wss_pa",
                                                    "radius_sd_um", "n_points")}
    has_flow = cols["flow_nl_min"] is not None
    step = None
    if cols["n_points"] is not None:
        with np.errstate(invalid="ignore", divide="ignore"):
            step = cols["length_um"] / (cols["n_points"] - 1.0)
    n_rows = len(radius)
    u_radius = radius_uncertainty(
        radius, cols["radius_sd_um"] if cols["radius_sd_um"] is not None else np.zeros(n_rows),
        cols["radius_n_points"] if cols["radius_n_points"] is not None else np.ones(n_rows),
        step_um=step, voxel_um=voxel_um, floor_voxels=cfg["radius_floor_voxels"])

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
        return _empty_table(), _summary(_empty_table(), has_flow=has_flow, skipped=skipped, cfg=cfg)
    keep = is_junction[arm_node]
    arms = _Arms(
        group=np.searchsorted(node_row, arm_node[keep]),
        seg=arm_seg[keep],
        start=arm_start[keep],
        n_junctions=len(node_row),
    )
    loop_rows = np.flatnonzero(loop & is_junction[u])
    loops = (np.searchsorted(node_row, u[loop_rows]), seg_id[loop_rows])

    table = _junction_table(node_row, arms, loops, ends=ends, ids=ids, seg_id=seg_id, radius=radius,
                            u_radius=u_radius, cols=cols, nodes=nodes, points=points, offsets=offsets, cfg=cfg)
    table = table.sort_values("node_id", kind="stable").reset_index(drop=True)
    return table, _summary(table, has_flow=has_flow, skipped=skipped, cfg=cfg)


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
    """Flow pattern and parent arm of every junction (module notes).

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
    pattern : ndarray of object, shape (J,)
        One of :data:`FLOW_PATTERNS`.
    by_width : ndarray of int, shape (A,)
        All arms, by junction, widest first (ties to the smallest id).
    """
    g, first = arms.group, arms.first
    n = len(first)
    by_width = np.lexsort((sid, -r, g))
    parent = by_width[first]
    parent_by = np.full(n, "radius", dtype=object)
    pattern = np.full(n, "unsolved", dtype=object)
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
        finite = np.isfinite(q_in)
        q_abs = np.where(finite, np.abs(q_in), 0.0)
        network = np.fmax.reduce(np.abs(flow)) if np.isfinite(flow).any() else 0.0  # fmax skips NaN
        thr = np.maximum(_FLOW_RTOL * np.maximum.reduceat(q_abs, first), _FLOW_NETWORK_RTOL * network)
        inflow = finite & (q_in > thr[g])
        outflow = finite & (q_in < -thr[g])
        n_in = np.add.reduceat(inflow, first)
        n_out = np.add.reduceat(outflow, first)
        n_arms = np.diff(np.r_[first, len(g)])
        diverging = (n_in == 1) & (n_out == n_arms - 1)
        converging = (n_out == 1) & (n_in == n_arms - 1)
        solved = (n_in + n_out) > 0
        pattern[solved] = "mixed"
        pattern[diverging] = "diverging"
        pattern[converging] = "converging"
        idx = np.arange(len(g))
        # Diverging and mixed: the (largest) inflow, the first in arm order among
        # equals; converging: the one outflow, the arm with the smallest q_in.
        q_f = np.where(finite, q_in, np.nan)
        top = np.fmax.reduceat(np.where(finite, q_in, -np.inf), first)
        first_top = np.minimum.reduceat(np.where(q_f == top[g], idx, len(g)), first)
        out_arm = np.minimum.reduceat(np.where(outflow, idx, len(g)), first)
        parent = np.where(solved, np.where(converging, out_arm, first_top), parent)
        parent_by[solved] = "flow"
    return parent, parent_by, pattern, by_width


def _join_groups(group: np.ndarray, texts: Sequence[str], n: int) -> list[str]:
    """``";"``-join the texts of each of ``n`` groups, keeping their given order within a group."""
    order = np.argsort(group, kind="stable")
    bounds = np.searchsorted(group[order], np.arange(n + 1))
    t = [texts[i] for i in order.tolist()]
    return [";".join(t[a:b]) for a, b in zip(bounds[:-1].tolist(), bounds[1:].tolist())]


def _code_strings(hits: np.ndarray, codes: Sequence[str]) -> np.ndarray:
    """``";"``-joined codes of each row of a (J, len(codes)) boolean array, in the order of ``codes``."""
    key = hits.astype(np.int64) @ (1 << np.arange(hits.shape[1], dtype=np.int64))
    combos, inverse = np.unique(key, return_inverse=True)  # a handful of distinct combinations
    text = np.array([";".join(c for b, c in enumerate(codes) if k >> b & 1) for k in combos.tolist()],
                    dtype=object)
    return text[inverse.ravel()]


def _junction_table(node_row, arms, loops, *, ends, ids, seg_id, radius, u_radius, cols, nodes, points, offsets,
                    cfg) -> pd.DataFrame:
    """One row per junction, in the order of ``node_row`` (see :func:`analyze_bifurcations`)."""
    n = len(node_row)
    g, first = arms.group, arms.first
    length, npts, level, flow, wss = (cols[c] for c in ("length_um", "radius_n_points", "level", "flow_nl_min",
                                                        "wss_pa"))
    r = radius[arms.seg]
    parent, parent_by, pattern, by_width = _choose_parents(arms, r, seg_id[arms.seg], level, flow)

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

    # Radius law, with sums over all daughters, and its first-order uncertainty.
    r0, rd, r1, r2 = radius[p], radius[ds], radius[d1], radius[d2]
    u0, ud, u1, u2 = u_radius[p], u_radius[ds], u_radius[d1], u_radius[d2]
    sum3 = np.add.reduceat(rd**3, d_first)
    ratio = sum3 / r0**3
    ratio_u = _ratio_u(r0, u0, rd, ud, d_first, ratio)
    area = np.add.reduceat(rd**2, d_first) / r0**2
    expo = _exponents(r0, rd, d_first)
    expo_u = _exponent_u(r0, u0, rd, ud, d_first, expo)
    undefined = np.logical_or.reduceat(rd >= r0[g[daughters]], d_first)
    # The widest daughter (daughter 1) against the parent, for exponent_undefined.
    with np.errstate(invalid="ignore", divide="ignore"):
        wider_sig = (r1 - r0) / np.sqrt(u1**2 + u0**2)

    # Directions pointing away from the node, for parent, daughter 1 and 2;
    # the junction zone scales with the widest vessel meeting there.
    scale = np.maximum.reduceat(r, first)
    trio = np.column_stack([parent, daughters[d_first], daughters[d_first + 1]])  # arms, (n, 3)
    dirs, from_node, bend = _directions(points, offsets, arms.seg[trio.ravel()], arms.start[trio.ravel()],
                                        np.repeat(scale, 3), cfg["tangent_skip_radii"], cfg["tangent_fit_radii"])
    b0, b1, b2 = bend[0::3], bend[1::3], bend[2::3]
    t0, t1, t2 = dirs[0::3], dirs[1::3], dirs[2::3]
    a1, a2 = _angles_deg(t1, -t0), _angles_deg(t2, -t0)
    between = _angles_deg(t1, t2)
    oop = _out_of_plane_deg(t0, t1, t2)
    o1, o2 = murray_optimal_angles(r0, r1, r2)
    ou1, ou2 = _optimal_angles_u(r0, r1, r2, u0, u1, u2)
    e1, e2 = np.abs(a1 - o1), np.abs(a2 - o2)
    dev = np.maximum(e1, e2)  # NaN when either angle is undefined
    dev_u = np.sqrt(np.where(e2 > e1, ou2, ou1) ** 2 + cfg["angle_sd_deg"] ** 2
                    + b0**2 + np.where(e2 > e1, b2, b1) ** 2)
    # The optimum is defined for two daughters.
    o1, o2, dev, dev_u = (np.where(multi, np.nan, x) for x in (o1, o2, dev, dev_u))
    dev_u = np.where(np.isfinite(dev), dev_u, np.nan)

    # Flow split (diverging and converging only: mass balance gives it a
    # meaning there) and shear.
    cube = r1**3 / sum3
    split = np.full(n, np.nan)
    if flow is not None:
        tot = np.add.reduceat(np.abs(flow[ds]), d_first)
        judged_flow = (pattern == "diverging") | (pattern == "converging")
        np.divide(np.abs(flow[d1]), tot, out=split, where=judged_flow & np.isfinite(tot) & (tot > 0))
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
    # tangent_from_node (parent, daughter 1, daughter 2).
    loop_group, loop_id = loops
    tangent_seg = arms.seg[trio.ravel()][from_node]
    note_group = np.concatenate([g[few], g[short], loop_group, np.repeat(np.arange(n), 3)[from_node]])
    note_text = ([f"few_points:{i}" for i in seg_id[members[few]].tolist()]
                 + [f"short:{i}" for i in seg_id[members[short]].tolist()]
                 + [f"self_loop:{i}" for i in loop_id.tolist()]
                 + [f"tangent_from_node:{i}" for i in seg_id[tangent_seg].tolist()])
    notes = _join_groups(note_group, note_text, n)
    daughter_text = _join_groups(g[daughters], [str(i) for i in seg_id[ds].tolist()], n)

    # Flags, in REASON_CODES order: outside the band (a null threshold
    # switches its rule off; NaN compares False and never trips a bound) and
    # farther from the law than z standard uncertainties.
    z = cfg["significance_z"]

    def above(values, key):
        return np.zeros(n, dtype=bool) if cfg[key] is None else values > cfg[key]

    def below(values, key):
        return np.zeros(n, dtype=bool) if cfg[key] is None else values < cfg[key]

    with np.errstate(invalid="ignore", divide="ignore"):
        sig_ratio = np.abs(ratio - 1.0) / ratio_u  # inf where the uncertainty is 0
        sig_expo = np.abs(expo - 3.0) / expo_u
        sig_angle = dev / dev_u
    sig_ratio = np.where(ratio == 1.0, 0.0, sig_ratio)
    sig_expo = np.where(expo == 3.0, 0.0, sig_expo)
    sig_angle = np.where(dev == 0.0, 0.0, sig_angle)
    out_ratio = above(ratio, "ratio_max") | below(ratio, "ratio_min")
    out_expo = above(expo, "exponent_max") | below(expo, "exponent_min")
    out_undef = undefined & bool(cfg["flag_undefined_exponent"])
    out_angle = above(dev, "angle_deviation_max_deg")
    hits = np.column_stack([
        above(ratio, "ratio_max") & (sig_ratio > z), below(ratio, "ratio_min") & (sig_ratio > z),
        above(expo, "exponent_max") & (sig_expo > z), below(expo, "exponent_min") & (sig_expo > z),
        out_undef & (wider_sig > z),
        out_angle & (sig_angle > z),
        multi & bool(cfg["flag_multi"]),
    ])
    severity = np.zeros(n)
    for out, sig in ((out_ratio, sig_ratio), (out_expo, sig_expo), (out_undef, wider_sig), (out_angle, sig_angle)):
        severity = np.where(out & ~np.isnan(sig), np.fmax(severity, sig), severity)

    # Uncertain: not judged (module notes). A ratio is unresolved when z
    # uncertainties reach from the cube law to the band's edge on its side.
    edge = np.full(n, np.inf)
    if cfg["ratio_max"] is not None:
        edge = np.where(ratio >= 1.0, cfg["ratio_max"] - 1.0, edge)
    if cfg["ratio_min"] is not None:
        edge = np.where(ratio < 1.0, 1.0 - cfg["ratio_min"], edge)
    unresolved = (z * ratio_u >= edge) & ~(hits[:, 0] | hits[:, 1])
    # Murray's law is a design rule of branching trees; capillary meshes of
    # near-uniform vessels do not follow it (three equal vessels give a ratio
    # of 2), so junctions whose parent is capillary-sized are not judged.
    cap_min = cfg["murray_min_parent_diameter_um"]
    capillary = (2.0 * r0 < cap_min) if cap_min is not None else np.zeros(n, dtype=bool)
    why = np.column_stack([low_conf & bool(cfg["low_confidence_uncertain"]), unresolved, pattern == "mixed",
                           capillary])
    uncertain = why.any(axis=1)
    hits &= ~uncertain[:, None]

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
        "flow_pattern": pattern,
        "parent_segment": seg_id[p],
        "parent_by": parent_by,
        "daughter_segments": daughter_text,
        "radius_parent_um": r0,
        "radius_daughter1_um": r1,
        "radius_daughter2_um": r2,
        "radius_parent_u_um": u0,
        "radius_daughter1_u_um": u1,
        "radius_daughter2_u_um": u2,
        "murray_ratio": ratio,
        "murray_ratio_u": ratio_u,
        "murray_exponent": expo,
        "murray_exponent_u": expo_u,
        "asymmetry": r2 / r1,
        "area_ratio": area,
        "angle_daughter1_deg": a1,
        "angle_daughter2_deg": a2,
        "angle_between_daughters_deg": between,
        "out_of_plane_deg": oop,
        "angle_optimal_daughter1_deg": o1,
        "angle_optimal_daughter2_deg": o2,
        "angle_deviation_deg": dev,
        "angle_deviation_u_deg": dev_u,
        "flow_split_daughter1": split,
        "flow_split_cube_law": cube,
        "wss_ratio_daughter1": w1,
        "wss_ratio_daughter2": w2,
        "low_confidence": low_conf,
        "confidence_notes": notes,
        "uncertain": uncertain,
        "uncertain_reasons": _code_strings(why, UNCERTAIN_CODES),
        "flagged": hits.any(axis=1),
        "flag_reasons": _code_strings(hits, REASON_CODES),
        "severity": severity,
    })
    return _typed(table)


def _median(values: np.ndarray) -> float | None:
    finite = values[np.isfinite(values)]
    return float(np.median(finite)) if finite.size else None


def _code_hits(table: pd.DataFrame, column: str = "flag_reasons", codes: Sequence[str] = REASON_CODES) -> np.ndarray:
    """Boolean (rows, len(codes)) array: which codes each row's ``column`` names (none where it is absent)."""
    if column not in table.columns:  # a table written before the column existed
        return np.zeros((len(table), len(codes)), dtype=bool)
    # A table holds only a handful of distinct code strings: parse each once.
    text = table[column].astype(object).where(table[column].notna(), "").astype(str).to_numpy(dtype=object)
    inverse, texts = pd.factorize(text)
    per_text = np.array([[c in set(t.split(";")) for c in codes] for t in texts], dtype=bool)
    return per_text.reshape(len(texts), len(codes))[inverse]


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


def _summary(table: pd.DataFrame, *, has_flow: bool, skipped: int,
             cfg: Mapping[str, Any] | None = None) -> dict[str, Any]:
    from .murray import network_summary

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
    out.update(network_summary(table, config=cfg))
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
    config : mapping or None, keyword-only
        Full config or its ``bifurcations`` section (the network fit's
        bootstrap resamples and seed); None: defaults.

    Returns
    -------
    dict
        The keys listed under ``summary`` in :func:`analyze_bifurcations`.
    """
    if table.shape[1] == 0:
        table = _empty_table()
    return _summary(table, has_flow=has_flow, skipped=skipped, cfg=_section(config))


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
    df["level"] = pd.array(df["level"].to_numpy(dtype=object), dtype="Int64") if len(df) else pd.array([], dtype="Int64")
    df["n_bifurcations"] = df["n_bifurcations"].astype(np.int64)
    df["murray_exponents_undefined"] = df["murray_exponents_undefined"].astype(np.int64)
    for c in ("murray_exponent_median", "murray_ratio_median", "bifurcations_flagged_fraction"):
        df[c] = df[c].astype(float)
    return df
