"""Murray's law at one junction: the exponent, the optimal angles, and their first-order uncertainties.

In: parent and daughter radii (arrays, one junction per row). Out: the exponent x of
r0^x = sum r_i^x (Newton on a convex log-sum-exp, all junctions at once), Murray's optimal branching
angles (Murray 1926, J Gen Physiol 9:835), and the standard errors of ratio, exponent and angles
propagated from the radius uncertainties.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np



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
