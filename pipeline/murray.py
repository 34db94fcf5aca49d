"""Network Murray exponent: one exponent per sample, with a bootstrap interval.

In: the rows of ``bifurcations.csv`` (:data:`pipeline.bifurcations.COLUMNS`:
``radius_parent_um``, ``radius_daughter{1,2}_um``, their ``_u_um``
uncertainties, ``daughter_segments``, ``flow_pattern``, ``low_confidence``,
``uncertain_reasons``, ``murray_exponent``, ``murray_ratio``) and the
options of the ``bifurcations`` config section. Out: the summary keys of
:func:`network_summary`. Called from the bifurcation step's summary, so a
summary recomputed after a review recomputes the fit too; the bootstrap seed
is fixed by the config, so the same table gives the same numbers.

Which junctions. The fit uses every bifurcation whose parent and daughters
are defined without looking at the radii law itself (the exponent is never
used to select):

- exactly two daughters: the table keeps the radii of the two largest
  daughters only, so a multifurcation's law cannot be evaluated from it
  (they are counted, ``murray_exponent_network_multifurcations``);
- ``flow_pattern`` diverging, converging or unsolved. Diverging junctions
  take the feeding vessel as the parent, converging ones the trunk the
  tributaries drain into; Murray's argument (flow proportional to r^3 at equal
  wall shear) holds for either direction, and on a cut volume the estimated
  direction of a whole tree can come out reversed (measured: synthetic
  trees whose every junction came out converging), so keeping diverging
  junctions only would drop whole samples. Unsolved junctions (no flow, or
  an unperfused piece) take their parent from the branching level or the
  radius. Mixed junctions (two or more inflows and outflows, or a sealed
  arm) have no parent-daughter structure and are left out;
- not ``capillary`` (parent narrower than
  ``murray_min_parent_diameter_um``): junctions of a capillary mesh of
  near-uniform vessels do not follow a tree's design rule;
- not ``low_confidence``: a segment shorter than two radii, or measured over
  few points, takes its radius from the inflated junction zone, a bias its
  uncertainty does not show.

In the fit the widest of a junction's three arms is its parent (under
r0^x = r1^x + r2^x the parent is wider than either daughter for every x > 0),
whatever arm the flow made the parent in ``bifurcations.csv``: the estimated
flow of a cut tree can enter through a branch.

The ``ratio_unresolved`` reason of the flags is not used: it depends on the
measured ratio, i.e. on the outcome. Junctions whose own exponent is undefined
(a daughter at least as wide as the parent) stay in the fit: their residual
below is defined for every x, and leaving them out would select on the
outcome (it would bias the exponent down). They are counted
(``murray_exponents_undefined``, over all rows of the table).

The fit. For a junction with parent r0 and daughters r1, r2 the residual

    d_j(x) = (1/x) ln(r1^x + r2^x) - ln r0

is the log of the Murray-predicted parent radius over the measured one (0 when
r0^x = r1^x + r2^x). All three radii are measured with error, so this is an
errors-in-variables problem: the residual's variance is taken from the radius
uncertainties by first-order propagation (the effective-variance method,
Orear 1982, Am J Phys 50:912):

    v_j(x) = (u0/r0)^2 + w1^2 (u1/r1)^2 + w2^2 (u2/r2)^2,   w_k = r_k^x / (r1^x + r2^x)

(d d_j / d ln r0 = -1, d d_j / d ln r_k = w_k). The radii enter in logs, so
the fit is scale-free: widening every radius by one factor changes nothing.
The standardised residuals z_j = d_j / (s sqrt(v_j)) enter Tukey's biweight
loss (c = 4.685, 95 % efficiency at the normal; Beaton & Tukey 1974,
Technometrics 16:147, from memory), which gives junctions beyond c scales no
weight at all: a broken junction (both daughters 0.95 r0, d = 0.18 at x = 3,
against about 0.02 for a sound one) cannot drag the estimate, where a Huber
loss would still pull with a constant force per broken junction. The scale s
is 1.4826 times the median |z| at a least-absolute-deviation start (a
convex, scale-free fit), so it absorbs errors the propagated uncertainties
leave out (biological scatter, segmentation) as one common factor. The
biweight is not convex: far from the bulk of the junctions it flattens out,
and its global minimum can lie there, so the estimate is the local minimum
reached downhill from the least-absolute start on a grid of x (``_GRID_STEP``
apart over [``_X_MIN``, ``_X_MAX``]), refined by a parabola through the grid
minimum and its neighbours (each bootstrap resample descends from its own
start). An estimate at either end of
the range is reported with the note ``at_bound``, not clipped silently.

Interval. Nonparametric bootstrap over junctions: B resamples
(``network_bootstrap_resamples``, seed ``network_bootstrap_seed``) as a
multinomial count matrix (B, n) times the per-junction loss on the grid (n,
G), so every resample is one row of a matrix product; each row's minimum is
refined like the estimate. The scale s is held at the full sample's value in
the resamples (the loss surface is computed once). The interval is the
expanded percentile interval (Hesterberg 2015, Am Stat 69:371): the
percentile interval (Efron & Tibshirani 1993, An Introduction to the
Bootstrap, ch. 13; simple and transformation-respecting) with its tail
probabilities taken at sqrt(n / (n - 1)) t_{n-1} rather than the normal
quantile. Measured on 300 replicates of 15 cube-law junctions with 2 % and
4 % lognormal radius noise: the plain percentile interval covered the true
exponent in 91 % and 92 %, the expanded one in 94 % and 94 %. With fewer than
``_MIN_JUNCTIONS`` usable junctions the estimate and interval are None with
the note ``too_few_junctions``.

Sensitivity. For a symmetric junction x = ln 2 / ln(r0 / r1): a relative
bias of 2 % between parent and daughter radii moves x by about 0.25 at x = 3.
The fit is only as good as the radii are unbiased across vessel sizes; a bias
common to all sizes (a threshold widening every vessel by one factor) does
not matter. Measured on binary trees (root 8 µm, asymmetry 0.7, 2 x 1 x 1 µm
voxels, three seeds, segment radius against the truth): clean masks +0.4 %
at radii below 3.5 µm and at 5 µm and above; wall roughness 0.25 (relative,
1.5 µm correlation) +5.5 % and +2.8 %; plane jitter of a voxel +1.5 % and
+0.7 %; blobs +0.5 % and +0.6 %. On straight rough tubes, fitted on the true
axis, the wall fit read 3-5 % wide at radii 2.5, 4 and 7 µm alike, with a
spread between roughness realisations as large as the trees' difference
between thin and thick, so roughness is not shown to bias the exponent; the
jitter's part, halving from thin to thick, is what a circle fit does with
point errors across the wall (a tangential error e lengthens the distance to
the centre by about e^2 / (2 r)) and moves a symmetric cube-law exponent up
by about 0.1.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from .errors import InputError

__all__ = ["network_exponent", "network_summary", "usable_junctions", "SUMMARY_KEYS"]

#: Keys :func:`network_summary` returns.
SUMMARY_KEYS = (
    "murray_exponent_network",
    "murray_exponent_network_ci_low",
    "murray_exponent_network_ci_high",
    "murray_exponent_network_junctions",
    "murray_exponent_network_note",
    "murray_exponent_network_multifurcations",
    "murray_exponents_undefined",
    "murray_ratio_median",
    "murray_ratio_q25",
    "murray_ratio_q75",
)

# Exponent range searched. Measured junction exponents run from about 2 to 3
# (Nakamura & Awa 2014, Physiol Rep 2:e00236); 1 and 8 leave room on either
# side so a sample outside that range shows as such, and an estimate at an
# end is reported as at_bound.
_X_MIN = 1.0
_X_MAX = 8.0
# 0.01 apart: the parabolic refinement then leaves an error far below the
# statistical one (about 0.1 for 15 junctions).
_GRID_STEP = 0.01
# Fewer junctions than this give no estimate: the biweight's scale (a median
# of |z|) and the bootstrap's percentiles need a handful of points (common
# practice).
_MIN_JUNCTIONS = 5
# Tukey biweight constant (95 % efficiency at the normal, Beaton & Tukey 1974).
_TUKEY_C = 4.685
# MAD to standard deviation at the normal.
_MAD_TO_SD = 1.4826
# Floor of a residual's relative variance: a radius uncertainty of 0 (a table
# written without uncertainties) would otherwise give an infinite weight;
# 1e-4 is 1 % relative radius error, the order of the best wall fits
# (DEVELOPERS.md, "Radii").
_VAR_FLOOR = 1e-4
# Bootstrap rows per matrix product: bounds the (rows, n) count block and the
# (rows, G) product to a few MB for networks of thousands of junctions.
_BOOT_CELLS = 2_000_000


def _grid() -> np.ndarray:
    n = int(round((_X_MAX - _X_MIN) / _GRID_STEP)) + 1
    return np.linspace(_X_MIN, _X_MAX, n)


def _residuals(r0: np.ndarray, r1: np.ndarray, r2: np.ndarray, u0: np.ndarray, u1: np.ndarray, u2: np.ndarray,
               x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Residual d_j(x) and its variance v_j(x), both (n, G), for junctions j and exponents x."""
    l1 = np.log(r1 / r0)[:, None]
    l2 = np.log(r2 / r0)[:, None]
    xx = x[None, :]
    # ln(a1^x + a2^x) by log-sum-exp: a daughter much thinner than the parent
    # at a large x underflows otherwise.
    m = np.maximum(l1, l2)
    s = np.exp(xx * (l1 - m)) + np.exp(xx * (l2 - m))
    d = m + np.log(s) / xx
    w1 = np.exp(xx * (l1 - m)) / s
    w2 = 1.0 - w1
    v = (u0 / r0)[:, None] ** 2 + (w1 * (u1 / r1)[:, None]) ** 2 + (w2 * (u2 / r2)[:, None]) ** 2
    return d, np.maximum(v, _VAR_FLOOR)


def _refine(obj: np.ndarray, x: np.ndarray, k: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Grid minima ``k`` of the rows of ``obj`` (R, G) refined by a parabola; and whether each is at an end."""
    at_bound = (k == 0) | (k == len(x) - 1)
    kc = np.clip(k, 1, len(x) - 2)
    rows = np.arange(obj.shape[0])
    fm, f0, fp = obj[rows, kc - 1], obj[rows, kc], obj[rows, kc + 1]
    den = fm - 2.0 * f0 + fp
    with np.errstate(invalid="ignore", divide="ignore"):
        shift = np.where(den > 0, 0.5 * (fm - fp) / den, 0.0)
    shift = np.clip(shift, -1.0, 1.0)  # a parabola through three points peaks between them
    out = np.where(at_bound, x[k], x[kc] + shift * (x[1] - x[0]))
    return out, at_bound


def _argmin_refined(obj: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Minimum of each row of ``obj`` (R, G) over grid ``x``, refined by a parabola; and whether it is at an end."""
    return _refine(obj, x, np.argmin(obj, axis=1))


def _descend(obj: np.ndarray, k0: np.ndarray) -> np.ndarray:
    """Grid index of the local minimum of each row of ``obj`` (R, G) reached downhill from ``k0`` (R,)."""
    k = np.asarray(k0, dtype=np.int64).copy()
    rows = np.arange(obj.shape[0])
    last = obj.shape[1] - 1
    for _ in range(obj.shape[1]):
        here = obj[rows, k]
        left = np.where(k > 0, obj[rows, np.maximum(k - 1, 0)], np.inf)
        right = np.where(k < last, obj[rows, np.minimum(k + 1, last)], np.inf)
        step = np.where((left < here) & (left <= right), -1, np.where(right < here, 1, 0))
        if not step.any():
            break
        k += step
    return k


def _local_min_refined(obj: np.ndarray, x: np.ndarray, k0: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Like :func:`_argmin_refined`, but the local minimum downhill from grid index ``k0`` of each row."""
    return _refine(obj, x, _descend(obj, k0))


def network_exponent(r0, r1, r2, u0=None, u1=None, u2=None, *, n_boot: int = 2000, seed: int = 0,
                     level: float = 0.95) -> dict[str, Any]:
    """One Murray exponent for a set of bifurcations, with a bootstrap interval.

    Parameters
    ----------
    r0, r1, r2 : array_like, shape (n,)
        Parent and daughter radii, µm (any common unit), positive.
    u0, u1, u2 : array_like, shape (n,), optional
        Their standard uncertainties, same unit; None: equal relative
        uncertainties (an unweighted fit in log radius).
    n_boot : int, keyword-only
        Bootstrap resamples (0: no interval).
    seed : int, keyword-only
        Seed of the resampling.
    level : float, keyword-only
        Nominal coverage of the (expanded percentile) interval.

    Returns
    -------
    dict
        ``exponent``, ``ci_low``, ``ci_high`` (float or None), ``n``
        (junctions), ``scale`` (the biweight's scale s, in standardised
        residuals; None without estimate), ``note`` (None, ``at_bound`` or
        ``too_few_junctions``).

    Raises
    ------
    InputError
        Arrays of different lengths, or radii that are not finite and positive.

    Examples
    --------
    >>> r0 = [10.0, 8.0, 6.0, 5.0, 4.0]
    >>> q = [0.5, 0.7, 0.9, 1.0, 0.6]  # r2 / r1
    >>> r1 = [a / (1 + b ** 3) ** (1 / 3) for a, b in zip(r0, q)]
    >>> r2 = [a * b for a, b in zip(r1, q)]
    >>> round(network_exponent(r0, r1, r2, n_boot=0)["exponent"], 3)  # grid 0.01, refined by a parabola
    3.0
    """
    arrays = []
    for name, a in (("r0", r0), ("r1", r1), ("r2", r2)):
        arr = np.asarray(a, dtype=float).ravel()
        arrays.append(arr)
    n = len(arrays[0])
    if any(len(a) != n for a in arrays):
        raise InputError(f"r0, r1, r2: expected arrays of one length, got {[len(a) for a in arrays]}")
    if not all(np.all(np.isfinite(a) & (a > 0)) for a in arrays):
        raise InputError("r0, r1, r2: expected finite positive radii, got a value that is not")
    us = []
    for name, u, r in (("u0", u0, arrays[0]), ("u1", u1, arrays[1]), ("u2", u2, arrays[2])):
        if u is None:
            us.append(np.zeros(n))
            continue
        ua = np.nan_to_num(np.asarray(u, dtype=float).ravel(), nan=0.0)
        if len(ua) != n:
            raise InputError(f"{name}: expected {n} uncertainties, got {len(ua)}")
        us.append(np.abs(ua))
    if isinstance(n_boot, bool) or not isinstance(n_boot, (int, np.integer)) or n_boot < 0:
        raise InputError(f"n_boot: expected a non-negative integer, got {n_boot!r}")
    if not (0.0 < float(level) < 1.0):
        raise InputError(f"level: expected a coverage in (0, 1), got {level!r}")
    out: dict[str, Any] = {"exponent": None, "ci_low": None, "ci_high": None, "n": int(n), "scale": None,
                           "note": None}
    if n < _MIN_JUNCTIONS:
        out["note"] = "too_few_junctions"
        return out

    x = _grid()
    d, v = _residuals(*arrays, *us, x)
    sd = np.sqrt(v)
    # Start: least absolute standardised deviations (convex in each junction's
    # residual, scale-free), its minimum on the grid.
    lad = np.abs(d / sd)
    x0, _ = _argmin_refined(lad.sum(axis=0)[None, :], x)
    k0 = int(np.argmin(np.abs(x - x0[0])))
    s = _MAD_TO_SD * float(np.median(np.abs(d[:, k0] / sd[:, k0])))
    if s > 1e-9:
        u = (d / (s * sd)) / _TUKEY_C
        # Tukey's biweight rho, divided by c^2 / 6 (constant factors do not move a minimum).
        loss = np.where(np.abs(u) < 1.0, 1.0 - (1.0 - u**2) ** 3, 1.0)
    else:
        # Residuals that vanish at the start (radii obeying one law exactly, as
        # in constructed data) leave no scale; nothing is an outlier then, and
        # least squares, smooth at its minimum, is refined exactly by the parabola.
        s = 0.0
        loss = (d / sd) ** 2
    # The biweight is not convex: far from the bulk of the junctions every
    # junction is an outlier and the loss flattens out, and on an
    # unlucky sample its global minimum can sit there (measured: 8.0, the
    # range's end, for a tree built at 2.6). The estimate is the local
    # minimum reached downhill from the convex start, as usual for
    # redescending M-estimators (Maronna, Martin & Yohai 2006, Robust
    # Statistics, sec. 2.8, from memory).
    est, at_bound = _local_min_refined(loss.sum(axis=0)[None, :], x, np.array([k0]))
    out["exponent"] = float(est[0])
    out["scale"] = s
    if at_bound[0]:
        out["note"] = "at_bound"
    if n_boot > 0:
        rng = np.random.default_rng(seed)
        chunk = max(1, _BOOT_CELLS // max(n, len(x)))
        boots = []
        p = np.full(n, 1.0 / n)
        for start in range(0, n_boot, chunk):
            b = min(chunk, n_boot - start)
            counts = rng.multinomial(n, p, size=b).astype(float)
            # each resample descends from its own convex start
            starts = np.argmin(counts @ lad, axis=1)
            boots.append(_local_min_refined(counts @ loss, x, starts)[0])
        boot = np.concatenate(boots)
        # Expanded percentile interval (Hesterberg 2015, Am Stat 69:371): the
        # plain percentile interval is too narrow for small n (it misses the
        # factor sqrt(n / (n - 1)) and uses normal rather than t tails); the
        # tail probability is taken at sqrt(n / (n - 1)) t_{n-1} instead.
        t = stats.t.ppf(0.5 + float(level) / 2.0, n - 1) * math.sqrt(n / (n - 1.0))
        a = 100.0 * stats.norm.sf(t)
        out["ci_low"], out["ci_high"] = (float(q) for q in np.percentile(boot, [a, 100.0 - a]))
    return out


def usable_junctions(table: pd.DataFrame) -> tuple[np.ndarray, int]:
    """Rows of a bifurcations table the network fit uses (module notes), and the multifurcations.

    Parameters
    ----------
    table : DataFrame, shape (J, ...)
        Rows of ``bifurcations.csv``.

    Returns
    -------
    use : ndarray of bool, shape (J,)
    n_multi : int
        Junctions with more than two daughters (not usable).
    """
    n = len(table)
    if n == 0:
        return np.zeros(0, dtype=bool), 0

    def text(col):
        if col not in table.columns:
            return np.full(n, "", dtype=object)
        return table[col].astype(object).where(table[col].notna(), "").astype(str).to_numpy(dtype=object)

    multi = np.array([t.count(";") >= 2 for t in text("daughter_segments")], dtype=bool)
    two = np.array([t.count(";") == 1 for t in text("daughter_segments")], dtype=bool)
    pattern = text("flow_pattern")
    reasons = text("uncertain_reasons")
    capillary = np.array(["capillary" in t.split(";") for t in reasons], dtype=bool)
    low = (table["low_confidence"].astype(bool).to_numpy() if "low_confidence" in table.columns
           else np.zeros(n, dtype=bool))
    radii = np.column_stack([pd.to_numeric(table[c], errors="coerce").to_numpy(float)
                             for c in ("radius_parent_um", "radius_daughter1_um", "radius_daughter2_um")])
    ok_r = np.all(np.isfinite(radii) & (radii > 0), axis=1)
    use = two & (pattern != "mixed") & ~capillary & ~low & ok_r
    return use, int(multi.sum())


def _quantile(values: np.ndarray, q: float) -> float | None:
    finite = values[np.isfinite(values)]
    return float(np.quantile(finite, q)) if finite.size else None


def network_summary(table: pd.DataFrame, *, network_bootstrap_resamples: int = 2000,
                    network_bootstrap_seed: int = 0) -> dict[str, Any]:
    """The network exponent and the Murray ratio's spread for ``summary.json``.

    Parameters
    ----------
    table : DataFrame, shape (J, ...)
        Rows of ``bifurcations.csv`` (possibly a subset, e.g. after a review).
    network_bootstrap_resamples, network_bootstrap_seed : int, keyword-only
        Bootstrap resamples over junctions and their seed (the
        ``bifurcations`` options of the same names).

    Returns
    -------
    dict
        ``murray_exponent_network`` and ``murray_exponent_network_ci_low`` /
        ``_ci_high`` (95 % bootstrap percentile interval; None with fewer
        than five usable junctions), ``murray_exponent_network_junctions``
        (junctions used), ``murray_exponent_network_note`` (None,
        ``at_bound``, ``too_few_junctions``),
        ``murray_exponent_network_multifurcations`` (left out),
        ``murray_exponents_undefined`` (rows whose own exponent is undefined),
        ``murray_ratio_median``, ``murray_ratio_q25``, ``murray_ratio_q75``
        (over the finite ratios of all rows; None without any).
    """
    n_boot, seed = int(network_bootstrap_resamples), int(network_bootstrap_seed)
    use, n_multi = usable_junctions(table)
    ratio = (pd.to_numeric(table["murray_ratio"], errors="coerce").to_numpy(float) if "murray_ratio" in table.columns
             else np.zeros(0))
    expo = (pd.to_numeric(table["murray_exponent"], errors="coerce").to_numpy(float)
            if "murray_exponent" in table.columns else np.zeros(0))

    def col(c):
        if c not in table.columns:
            return None
        return pd.to_numeric(table[c], errors="coerce").to_numpy(float)[use]

    r = [col(c) for c in ("radius_parent_um", "radius_daughter1_um", "radius_daughter2_um")]
    u = [col(c) for c in ("radius_parent_u_um", "radius_daughter1_u_um", "radius_daughter2_u_um")]
    if int(use.sum()) == 0:
        fit = {"exponent": None, "ci_low": None, "ci_high": None, "n": 0, "note": "too_few_junctions"}
    else:
        # The widest arm is the parent of the fit: under r0^x = r1^x + r2^x
        # the parent is wider than either daughter for every x > 0, whichever
        # way the blood flows. The flow-defined parent of bifurcations.csv
        # can be a narrow arm where the estimated flow of a cut tree enters
        # through a branch (measured: 8 of 21 junctions of a rough tree
        # built at 2.6, whose fit then ran to the range's end).
        rr, uu = np.stack(r, axis=1), np.stack([np.nan_to_num(a, nan=0.0) if a is not None else np.zeros(len(r[0]))
                                                for a in u], axis=1)
        order = np.argsort(-rr, axis=1, kind="stable")
        rr = np.take_along_axis(rr, order, axis=1)
        uu = np.take_along_axis(uu, order, axis=1)
        fit = network_exponent(*rr.T, *uu.T, n_boot=n_boot, seed=seed)
    return {
        "murray_exponent_network": fit["exponent"],
        "murray_exponent_network_ci_low": fit["ci_low"],
        "murray_exponent_network_ci_high": fit["ci_high"],
        "murray_exponent_network_junctions": int(fit["n"]),
        "murray_exponent_network_note": fit["note"],
        "murray_exponent_network_multifurcations": n_multi,
        "murray_exponents_undefined": int(np.isnan(expo).sum()) if len(table) else 0,
        "murray_ratio_median": _quantile(ratio, 0.5),
        "murray_ratio_q25": _quantile(ratio, 0.25),
        "murray_ratio_q75": _quantile(ratio, 0.75),
    }

