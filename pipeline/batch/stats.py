"""Rank statistics of two groups and of one: Hodges-Lehmann shifts with exact intervals, Cliff's delta.

In: samples of values. Out: the Hodges-Lehmann estimate with its distribution-free interval (the
Mann-Whitney or Wilcoxon signed-rank null distribution, exact for small samples) and Cliff's delta
with its interval.
"""

from __future__ import annotations

import math

import numpy as np


def _mw_null_cdf(m, n):
    """Exact null distribution of the Mann-Whitney U of samples of m and n, as P(U <= u), u = 0..mn.

    Recurrence over sample sizes (Mann & Whitney 1947, Ann Math Stat 18:50):
    p_{m,n}(u) = m/(m+n) p_{m-1,n}(u-n) + n/(m+n) p_{m,n-1}(u), a convex
    combination at every step, so it carries no cancellation.
    """
    prev = [np.ones(1)] * (n + 1)  # row a = 0: U = 0 whatever b
    for a in range(1, m + 1):
        row = [np.ones(1)]  # b = 0: U = 0
        for b in range(1, n + 1):
            p = np.zeros(a * b + 1)
            p[b:b + prev[b].size] += a / (a + b) * prev[b]  # the largest value is from the first sample
            p[:row[b - 1].size] += b / (a + b) * row[b - 1]
            row.append(p)
        prev = row
    return np.minimum(np.cumsum(prev[n]), 1.0)


def _signed_rank_null_cdf(n):
    """Exact null distribution of the Wilcoxon signed-rank W+ of n values, as P(W+ <= w), w = 0..n(n+1)/2.

    W+ is a sum of independent terms 0 or i with probability 1/2 each
    (Wilcoxon 1945, Biometrics Bull 1:80): its distribution is the
    convolution of those n two-point laws.
    """
    p = np.ones(1)
    for i in range(1, n + 1):
        q = np.zeros(p.size + i)
        q[:p.size] += 0.5 * p
        q[i:] += 0.5 * p
        p = q
    return np.minimum(np.cumsum(p), 1.0)


# Exact null distributions up to this many pairs (cost grows as its square);
# beyond, the normal approximation of U is used for the interval's rank.
_EXACT_MAX_PAIRS = 10_000


def _order_rank(cdf, alpha):
    """1-based rank k of the interval [D_(k), D_(N-k+1)] and its coverage; (0, nan) when none reaches 1 - alpha."""
    ok = np.flatnonzero(cdf <= alpha / 2 * (1 + 1e-12))
    if ok.size == 0:
        return 0, math.nan
    u = int(ok[-1])
    return u + 1, float(1.0 - 2.0 * cdf[u])


def hodges_lehmann(a, b, *, confidence=0.95):
    """Hodges-Lehmann shift of b against a with its distribution-free interval.

    Parameters
    ----------
    a, b : array_like, shape (n_a,), (n_b,)
        The two groups' values (NaN left out), in the measure's unit.
    confidence : float, keyword-only
        Nominal confidence of the interval.

    Returns
    -------
    shift, low, high, coverage : float
        ``shift`` is the median of the n_a n_b pairwise differences
        ``b_j - a_i`` (Hodges & Lehmann 1963, Ann Math Stat 34:598), in the
        measure's unit. ``[low, high] = [D_(k), D_(N+1-k)]``, order
        statistics of the N pairwise differences, with ``k - 1`` the
        largest ``u`` for which P(U <= u) <= (1 - confidence) / 2 under the
        exact null distribution of the Mann-Whitney U (Bauer 1972, J Am
        Stat Assoc 67:687; Lehmann 1975, Nonparametrics, ch. 2): the shifts
        d for which the exact two-sided test of ``b - d`` against ``a`` does
        not reject. ``coverage`` is the interval's exact confidence
        (discrete, at least ``confidence``); low, high and coverage are NaN
        when no interval reaches it (for 95 %: 3 against 3 or 4, or fewer).
        Beyond 10,000 pairs the rank k comes from the normal approximation
        of U and ``coverage`` is ``confidence``. With ties the interval is
        conservative.

    Examples
    --------
    >>> s, lo, hi, cov = hodges_lehmann([1.0, 2.0, 3.0, 4.0], [5.0, 6.5, 7.0, 9.0])
    >>> float(s), float(lo), float(hi), round(cov, 4)
    (4.25, 1.0, 8.0, 0.9714)
    """
    from scipy import stats

    a = np.asarray(a, float)
    b = np.asarray(b, float)
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size == 0 or b.size == 0:
        return math.nan, math.nan, math.nan, math.nan
    d = np.sort((b[None, :] - a[:, None]).ravel())
    shift = float(np.median(d))
    alpha = 1.0 - confidence
    if d.size <= _EXACT_MAX_PAIRS:
        k, coverage = _order_rank(_mw_null_cdf(a.size, b.size), alpha)
    else:
        m, n = a.size, b.size
        z = stats.norm.isf(alpha / 2)
        k = int(math.floor(m * n / 2 - z * math.sqrt(m * n * (m + n + 1) / 12)))
        coverage = confidence if k >= 1 else math.nan
    if k < 1:
        return shift, math.nan, math.nan, math.nan
    return shift, float(d[k - 1]), float(d[d.size - k]), coverage


def hodges_lehmann_one_sample(x, *, confidence=0.95):
    """One-sample Hodges-Lehmann estimate (pseudo-median) with its signed-rank interval.

    Parameters
    ----------
    x : array_like, shape (n,)
        Values of one group (NaN left out).
    confidence : float, keyword-only
        Nominal confidence of the interval.

    Returns
    -------
    estimate, low, high, coverage : float
        ``estimate``: the median of the n(n+1)/2 Walsh averages
        ``(x_i + x_j) / 2, i <= j`` (Hodges & Lehmann 1963); the interval
        ``[W_(k), W_(M+1-k)]`` of the sorted Walsh averages with ``k - 1``
        the largest ``w`` for which P(W+ <= w) <= (1 - confidence) / 2
        under the exact null distribution of the Wilcoxon signed-rank
        statistic (Hollander & Wolfe 1999, Nonparametric Statistical
        Methods, sec. 3.3; from memory), which assumes a distribution
        symmetric about its centre. With fewer than six values no interval
        reaches 95 %: then the widest one, ``[min x, max x]``, is returned
        with its exact ``coverage`` (for example 1 - 2/2^5 = 0.9375 at
        n = 5), so a reader sees how much less it is. NaN for n < 2.

    Examples
    --------
    >>> est, lo, hi, cov = hodges_lehmann_one_sample([2.4, 2.6, 2.9, 3.1, 3.0, 2.7])
    >>> round(float(est), 3), float(lo), float(hi), round(cov, 4)
    (2.8, 2.4, 3.1, 0.9688)
    """
    x = np.asarray(x, float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return math.nan, math.nan, math.nan, math.nan
    i, j = np.triu_indices(x.size)
    w = np.sort((x[i] + x[j]) / 2.0)
    est = float(np.median(w))
    if x.size < 2:
        return est, math.nan, math.nan, math.nan
    cdf = _signed_rank_null_cdf(x.size)
    k, coverage = _order_rank(cdf, 1.0 - confidence)
    if k < 1:
        k, coverage = 1, float(1.0 - 2.0 * cdf[0])
    return est, float(w[k - 1]), float(w[w.size - k]), coverage


def cliffs_delta(a, b):
    """Cliff's delta of b against a: P(b > a) - P(b < a) over all pairs.

    Parameters
    ----------
    a, b : array_like, shape (n_a,), (n_b,)
        The two groups' values (NaN left out).

    Returns
    -------
    float
        In [-1, 1] (Cliff 1993, Psychol Bull 114:494); positive when group b
        tends to be larger. Equals ``2 U_b / (n_a n_b) - 1`` with ``U_b``
        the Mann-Whitney statistic of b (ties counting one half). NaN when a
        group is empty.

    Examples
    --------
    >>> cliffs_delta([1, 2, 3], [2, 4, 5])  # 7 pairs b > a, 1 tie, 1 b < a
    0.6666666666666666
    """
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size == 0 or b.size == 0:
        return math.nan
    sign = np.sign(b[None, :] - a[:, None])
    return float(sign.mean())
