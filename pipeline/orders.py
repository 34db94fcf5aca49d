"""Diameter-defined Strahler orders, elements and the connectivity matrix.

In: per segment its parent in an orientation away from the root(s) (the
levels step's ``parent_segment_id``), the Horton–Strahler order on that
orientation, the diameter (``2 * radius_um``) and ``length_um``.
Out: the converged diameter-defined Strahler order of every segment
(``strahler_diameter``), the element each segment belongs to
(``element_id``), the per-order table written to ``orders.csv``, the
connectivity matrix written to ``order_connectivity.csv`` and the Horton
ratios for the summary.

The method is that of Kassab GS, Rider CA, Tang NJ, Fung YC (1993), Am J
Physiol 265:H350, spelled out again by Jiang ZL, Kassab GS, Fung YC (1994),
J Appl Physiol 76:882. The papers' full text could not be checked when this
was written; the rules below are from memory and from the summary of the
method in the papers' abstracts (order numbers assigned on diameter ranges,
a connectivity matrix, segments in series as elements). The levels step
calls :func:`kassab_orders` for its ``strahler_diameter`` column;
:func:`compute_orders` takes the ordered segments from there.

Ordering, from the periphery up. Terminal segments (no daughter) are order
1. Where the daughters of a segment have highest order ``n``:

- two or more daughters of order ``n``: the segment is ``n + 1`` only if its
  diameter exceeds the bound ``b_n = [(D_n + SD_n) + (D_{n+1} - SD_{n+1})] / 2``
  between orders ``n`` and ``n + 1``, else ``n``;
- one daughter of order ``n`` (the others lower): the segment is ``n``.

So a segment is never of lower order than its highest daughter, and
no daughter outranks its parent. ``D_n`` and ``SD_n`` are the mean and
sample standard deviation (0 for an order of one segment) of the diameters
of the segments of order ``n`` in the previous round; the first round
takes them from the Strahler orders (every bound at minus infinity gives
back the Strahler order). Above the highest order of the previous round
there is no bound (no segment climbs to an order that had no member, so the
number of orders never exceeds the Strahler count). Rounds repeat until no
segment changes order (converged), the rounds come back to an earlier state
(a cycle: its state with the fewest promotions is kept) or ``max_iter``
rounds pass; which one is recorded. Every round's orders obey the rule's
order constraints, so a parent never ranks below its daughters even then. The
statistics are those of segments, since elements only exist once the
orders are known.

Elements. Segments of one order in series (a parent and a daughter of the
same order) form one element. Where a parent has several daughters of its
own order (two order-``n`` daughters whose parent stayed ``n``), the widest
continues the element (ties: the smallest ``segment_id``) and the others
start elements of their own, which count as order ``n`` springing from
order ``n`` (the diagonal of the connectivity matrix). An element's length
is the sum of its segments' lengths; its diameter is the length-weighted
mean of its segments' diameters (the mean diameter along its centreline, so
a short stub between two close junctions counts for its length only; where
every length is zero the plain mean is used).

Connectivity matrix (Kassab et al. 1993): ``C(m, n)`` is the number of
elements of order ``m`` that spring directly from elements of order ``n``
(their first segment's parent belongs to an element of order ``n``),
divided by the number of elements of order ``n``. It is written in long
form, one row per pair of orders present (zeros included).

Horton ratios: least-squares lines of ``log10`` of the number of elements,
the mean element diameter and the mean element length on the order, over
every order present; number ratio ``10 ** -slope`` (numbers fall with
order), diameter and length ratios ``10 ** slope``. Undefined (None) with
fewer than two orders.

Looped networks. The orientation is the levels step's spanning orientation
from the root(s): every reached segment has the parent it was first
reached from (fewest junctions), and a segment that closes a loop is a
terminal branch of the segment it was reached from. The ordering is
therefore deterministic and never depends on the flow solution (flow runs
after this step); segments no root reaches have no order and no element.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field

import numba
import numpy as np
import pandas as pd

from .errors import InputError

__all__ = [
    "ORDER_COLUMNS",
    "CONNECTIVITY_COLUMNS",
    "Orders",
    "kassab_orders",
    "order_elements",
    "order_table",
    "connectivity_table",
    "horton_ratios",
    "compute_orders",
    "empty_orders",
]

#: Columns of ``orders.csv``.
ORDER_COLUMNS = ("order", "n_elements", "n_segments", "diameter_mean_um", "diameter_sd_um", "length_mean_um",
                 "length_sd_um")
#: Columns of ``order_connectivity.csv``.
CONNECTIVITY_COLUMNS = ("parent_order", "daughter_order", "n_daughter_elements", "n_parent_elements",
                        "connectivity")


# ---------------------------------------------------------------------------
# traversal
# ---------------------------------------------------------------------------

@numba.njit(cache=True)
def _root_first(parent, valid):
    """Breadth-first order of the valid segments from the forest's roots.

    A parent always comes before its daughters, so the reverse is a
    leaves-first order. Segments not reachable from a root (only possible
    for invalid input: a parent cycle) are left out.
    """
    n = parent.shape[0]
    start = np.zeros(n + 1, np.int64)
    for s in range(n):
        if valid[s] and parent[s] >= 0:
            start[parent[s] + 1] += 1
    for s in range(n):
        start[s + 1] += start[s]
    fill = start[:-1].copy()
    kids = np.empty(start[n], np.int64)
    for s in range(n):
        if valid[s] and parent[s] >= 0:
            kids[fill[parent[s]]] = s
            fill[parent[s]] += 1
    out = np.empty(n, np.int64)
    k = 0
    for s in range(n):
        if valid[s] and parent[s] < 0:
            out[k] = s
            k += 1
    i = 0
    while i < k:
        s = out[i]
        for j in range(start[s], start[s + 1]):
            out[k] = kids[j]
            k += 1
        i += 1
    return out[:k]


@numba.njit(cache=True)
def _order_round(seq, parent, diam, bound, out):
    """One leaves-first pass of the ordering rule; ``bound[n]`` is b_n (index 0 unused)."""
    n = parent.shape[0]
    top = np.zeros(n, np.int64)
    count = np.zeros(n, np.int64)
    for i in range(seq.shape[0] - 1, -1, -1):
        s = seq[i]
        m = top[s]
        if m == 0:
            o = 1
        elif count[s] >= 2 and diam[s] > bound[m]:
            o = m + 1
        else:
            o = m
        out[s] = o
        p = parent[s]
        if p >= 0:
            if o > top[p]:
                top[p] = o
                count[p] = 1
            elif o == top[p]:
                count[p] += 1


def strahler_orders(parent, valid) -> np.ndarray:
    """Horton–Strahler orders on a parent forest (Horton 1945; Strahler 1957).

    Parameters
    ----------
    parent : (n,) int array
        Row of each segment's parent, -1 for a root.
    valid : (n,) bool array
        Segments to order (those a root reaches).

    Returns
    -------
    (n,) int64 array
        Order per segment (terminal segments 1), -1 where not valid.
    """
    parent = np.asarray(parent, dtype=np.int64)
    out = np.full(parent.shape[0], -1, dtype=np.int64)
    seq = _root_first(parent, np.asarray(valid, dtype=bool))
    # every bound at -inf: the diameter rule always promotes, the plain rule
    _order_round(seq, parent, np.zeros(parent.shape[0]), np.full(2 * parent.shape[0] + 2, -np.inf), out)
    return out


def _bounds(order, diam, n_max):
    """b_n for n = 1..n_max (index n), +inf above the highest populated order.

    Diameters that are not finite take no part in the statistics.
    """
    ok = (order >= 1) & np.isfinite(diam)
    o, d = order[ok], diam[ok]
    cnt = np.bincount(o, minlength=n_max + 2).astype(float)
    tot = np.bincount(o, weights=d, minlength=n_max + 2)
    mean = np.divide(tot, cnt, out=np.full(n_max + 2, np.nan), where=cnt > 0)
    ss = np.bincount(o, weights=(d - mean[o]) ** 2, minlength=n_max + 2)
    sd = np.where(cnt > 1, np.sqrt(ss / np.maximum(cnt - 1, 1)), 0.0)
    b = np.full(n_max + 2, np.inf)
    n = np.arange(1, n_max + 1)
    both = (cnt[n] > 0) & (cnt[n + 1] > 0)
    b[n[both]] = 0.5 * (mean[n[both]] + sd[n[both]] + mean[n[both] + 1] - sd[n[both] + 1])
    return b


def kassab_orders(
    parent: np.ndarray,
    diameter: np.ndarray,
    *,
    start: np.ndarray | None = None,
    max_iter: int = 50,
) -> tuple[np.ndarray, bool, int]:
    """Diameter-defined Strahler order of every segment (Kassab et al. 1993).

    Parameters
    ----------
    parent : (S,) int ndarray
        Row of each segment's parent segment; -1 at a root, and for segments
        left out (see ``start``).
    diameter : (S,) float ndarray
        Segment diameters, µm.
    start : (S,) int ndarray, optional, keyword-only
        Starting orders; < 1 marks a segment left out (no root reaches it).
        Default: the Horton–Strahler order on ``parent`` for every segment.
    max_iter : int, keyword-only
        Largest number of rounds.

    Returns
    -------
    orders : (S,) int64 ndarray
        Converged orders (>= 1), -1 for segments left out.
    converged : bool
        True when the last round changed no segment's order.
    rounds : int
        Rounds run, the last one (which changed nothing when converged)
        included. Not converged with ``rounds < max_iter``: the rounds
        came back to an earlier state (a cycle, seen on large networks
        with a handful of segments at a bound flipping in turn); the
        cycle's state with the lowest sum of orders is returned then.

    Notes
    -----
    See the module docstring for the rule. Each round is one pass over the
    segments, leaves first, in numba.
    """
    parent = np.asarray(parent, dtype=np.int64)
    diam = np.asarray(diameter, dtype=float)
    n = len(parent)
    if diam.shape != (n,):
        raise InputError(f"diameter: expected shape ({n},) like parent, got {diam.shape}")
    if start is None:
        valid = np.ones(n, dtype=bool)
    else:
        start = np.asarray(start, dtype=np.int64)
        if start.shape != (n,):
            raise InputError(f"start: expected shape ({n},) like parent, got {start.shape}")
        valid = start >= 1
    if ((parent >= n) | (parent < -1)).any():
        raise InputError(f"parent: expected rows in -1..{n - 1}, got values outside")
    seq = _root_first(parent, valid)
    cur = np.full(n, -1, dtype=np.int64)
    if start is None:
        # every bound at -inf: the plain Horton–Strahler rule
        _order_round(seq, parent, diam, np.full(2 * n + 2, -np.inf), cur)
    else:
        cur[valid] = start[valid]
    if len(seq) == 0:
        return cur, True, 0
    new = cur.copy()
    seen = {_digest(cur): 0}
    for rounds in range(1, max_iter + 1):
        _order_round(seq, parent, diam, _bounds(cur, diam, int(cur.max())), new)
        if np.array_equal(new, cur):
            return cur, True, rounds
        cur, new = new, cur
        key = _digest(cur)
        if key in seen:
            # A cycle: the rounds would repeat the same states for ever. Go
            # round it once more and keep its state with the lowest sum of
            # orders (the fewest promotions; ties: the smallest digest).
            period = rounds - seen[key]
            best, best_key = cur.copy(), (int(cur.sum()), key)
            for _ in range(period - 1):
                _order_round(seq, parent, diam, _bounds(cur, diam, int(cur.max())), new)
                cur, new = new, cur
                cand = (int(cur.sum()), _digest(cur))
                if cand < best_key:
                    best, best_key = cur.copy(), cand
            return best, False, rounds
        seen[key] = rounds
    return cur, False, max_iter


def _digest(a):
    return hashlib.blake2b(np.ascontiguousarray(a).tobytes(), digest_size=16).digest()


# ---------------------------------------------------------------------------
# elements
# ---------------------------------------------------------------------------

@numba.njit(cache=True)
def _propagate_heads(seq, parent, starts):
    head = np.full(parent.shape[0], -1, np.int64)
    for i in range(seq.shape[0]):
        s = seq[i]
        head[s] = s if starts[s] else head[parent[s]]
    return head


def order_elements(
    parent: np.ndarray,
    order: np.ndarray,
    diameter: np.ndarray,
    segment_id: np.ndarray,
) -> tuple[np.ndarray, np.ndarray]:
    """Group segments of one order in series into elements.

    Parameters
    ----------
    parent : (S,) int ndarray
        Row of each segment's parent; -1 at roots and for unordered segments.
    order : (S,) int ndarray
        Orders (< 1: no order, no element).
    diameter : (S,) float ndarray
        Segment diameters, µm (the widest same-order daughter continues).
    segment_id : (S,) int ndarray
        Tie-break between equally wide daughters (smallest first).

    Returns
    -------
    element : (S,) int64 ndarray
        Element number per segment, 0..E-1 numbered by the ``segment_id`` of
        the element's first (most proximal) segment; -1 where no order.
    head : (E,) int64 ndarray
        Row of each element's first segment.
    """
    parent = np.asarray(parent, dtype=np.int64)
    order = np.asarray(order, dtype=np.int64)
    diam = np.asarray(diameter, dtype=float)
    sid = np.asarray(segment_id, dtype=np.int64)
    n = len(parent)
    valid = order >= 1
    has_p = valid & (parent >= 0)
    same = np.zeros(n, dtype=bool)
    same[has_p] = order[has_p] == order[parent[has_p]]
    cand = np.flatnonzero(same)
    # per parent: the widest candidate (NaN diameters last), ties by segment_id
    dkey = np.where(np.isfinite(diam[cand]), -diam[cand], np.inf)
    srt = cand[np.lexsort((sid[cand], dkey, parent[cand]))]
    first = np.ones(len(srt), dtype=bool)
    first[1:] = parent[srt[1:]] != parent[srt[:-1]]
    cont = np.zeros(n, dtype=bool)
    cont[srt[first]] = True
    starts = valid & ~cont
    seq = _root_first(parent, valid)
    head_row = _propagate_heads(seq, parent, starts)
    heads = np.flatnonzero(starts)
    heads = heads[np.argsort(sid[heads], kind="stable")]
    number = np.full(n, -1, dtype=np.int64)
    number[heads] = np.arange(len(heads))
    element = np.where(head_row >= 0, number[np.maximum(head_row, 0)], -1)
    return element, heads


# ---------------------------------------------------------------------------
# tables
# ---------------------------------------------------------------------------

def _element_arrays(element, order, diameter, length):
    """Per element: order, segment count, length (sum) and diameter (length-weighted mean)."""
    ok = element >= 0
    e, d, ln = element[ok], diameter[ok], length[ok]
    n_el = int(e.max()) + 1 if len(e) else 0
    el_order = np.zeros(n_el, dtype=np.int64)
    el_order[e] = order[ok]
    n_seg = np.bincount(e, minlength=n_el)
    fin = np.isfinite(d) & np.isfinite(ln)
    el_len = np.bincount(e, weights=np.where(np.isfinite(ln), ln, 0.0), minlength=n_el)
    w = np.where(fin, ln, 0.0)
    wsum = np.bincount(e, weights=w, minlength=n_el)
    wd = np.bincount(e, weights=np.where(fin, ln * d, 0.0), minlength=n_el)
    dfin = np.isfinite(d)
    plain_n = np.bincount(e, weights=dfin.astype(float), minlength=n_el)
    plain = np.bincount(e, weights=np.where(dfin, d, 0.0), minlength=n_el)
    with np.errstate(invalid="ignore", divide="ignore"):
        el_diam = np.where(wsum > 0, wd / wsum, plain / plain_n)
    return el_order, n_seg, el_len, el_diam


def order_table(element, order, diameter, length) -> pd.DataFrame:
    """Per-order morphometry of elements, the rows of ``orders.csv``.

    Parameters
    ----------
    element : (S,) int ndarray
        Element number per segment (-1: none), from :func:`order_elements`.
    order : (S,) int ndarray
        Order per segment.
    diameter, length : (S,) float ndarray
        Segment diameter and length, µm.

    Returns
    -------
    DataFrame, one row per order present, increasing
        ``order``, ``n_elements``, ``n_segments``, ``diameter_mean_um``,
        ``diameter_sd_um``, ``length_mean_um``, ``length_sd_um``: means and
        sample SDs (NaN for one element) over the elements of that order of
        the element diameter (length-weighted mean of its segments) and the
        element length (sum of its segments).
    """
    element = np.asarray(element, dtype=np.int64)
    el_order, n_seg, el_len, el_diam = _element_arrays(element, np.asarray(order, dtype=np.int64),
                                                       np.asarray(diameter, dtype=float),
                                                       np.asarray(length, dtype=float))
    values, inv = np.unique(el_order, return_inverse=True)
    k = len(values)

    def stats(x):
        ok = np.isfinite(x)
        cnt = np.bincount(inv[ok], minlength=k).astype(float)
        mean = np.divide(np.bincount(inv[ok], weights=x[ok], minlength=k), cnt, out=np.full(k, np.nan),
                         where=cnt > 0)
        ss = np.bincount(inv[ok], weights=(x[ok] - mean[inv[ok]]) ** 2, minlength=k)
        sd = np.divide(ss, cnt - 1, out=np.full(k, np.nan), where=cnt > 1) ** 0.5
        return mean, sd

    d_mean, d_sd = stats(el_diam)
    l_mean, l_sd = stats(el_len)
    return pd.DataFrame({
        "order": values.astype(np.int64),
        "n_elements": np.bincount(inv, minlength=k).astype(np.int64),
        "n_segments": np.bincount(inv, weights=n_seg, minlength=k).astype(np.int64),
        "diameter_mean_um": d_mean,
        "diameter_sd_um": d_sd,
        "length_mean_um": l_mean,
        "length_sd_um": l_sd,
    }, columns=list(ORDER_COLUMNS))


def connectivity_table(element, order, parent) -> pd.DataFrame:
    """Connectivity matrix C(m, n) of Kassab et al. (1993) in long form.

    Parameters
    ----------
    element : (S,) int ndarray
        Element number per segment (-1: none).
    order : (S,) int ndarray
        Order per segment.
    parent : (S,) int ndarray
        Parent row per segment (-1: root).

    Returns
    -------
    DataFrame, one row per pair (parent order n, daughter order m) of the
    orders present, n then m increasing
        ``parent_order`` (n), ``daughter_order`` (m),
        ``n_daughter_elements`` (elements of order m whose first segment's
        parent lies in an element of order n), ``n_parent_elements``
        (elements of order n) and ``connectivity`` = their ratio, C(m, n).
    """
    element = np.asarray(element, dtype=np.int64)
    order = np.asarray(order, dtype=np.int64)
    parent = np.asarray(parent, dtype=np.int64)
    ok = element >= 0
    n_el = int(element[ok].max()) + 1 if ok.any() else 0
    el_order = np.zeros(n_el, dtype=np.int64)
    el_order[element[ok]] = order[ok]
    values = np.unique(el_order)
    k = len(values)
    if k == 0:
        return pd.DataFrame({c: pd.Series(dtype=float if c == "connectivity" else np.int64)
                             for c in CONNECTIVITY_COLUMNS})
    idx = np.searchsorted(values, el_order)
    n_parent_el = np.bincount(idx, minlength=k)
    # segments that start an element and have a parent segment with an element
    heads = ok & (parent >= 0)
    heads[heads] = element[heads] != element[parent[heads]]
    rows = np.flatnonzero(heads)
    m = np.searchsorted(values, order[rows])
    n = np.searchsorted(values, order[parent[rows]])
    counts = np.zeros((k, k), dtype=np.int64)
    np.add.at(counts, (n, m), 1)
    nn, mm = np.meshgrid(np.arange(k), np.arange(k), indexing="ij")
    nn, mm = nn.ravel(), mm.ravel()
    return pd.DataFrame({
        "parent_order": values[nn],
        "daughter_order": values[mm],
        "n_daughter_elements": counts[nn, mm],
        "n_parent_elements": n_parent_el[nn].astype(np.int64),
        "connectivity": counts[nn, mm] / n_parent_el[nn],
    }, columns=list(CONNECTIVITY_COLUMNS))


def horton_ratios(table: pd.DataFrame) -> dict:
    """Horton ratios of number, diameter and length from an orders table.

    Parameters
    ----------
    table : DataFrame
        As returned by :func:`order_table`.

    Returns
    -------
    dict
        ``n_orders`` (int), ``horton_ratio_number`` (10 ** -slope of
        log10 n_elements on order), ``horton_ratio_diameter`` and
        ``horton_ratio_length`` (10 ** slope of log10 of the mean element
        diameter / length on order); a ratio is None with fewer than two
        orders holding a positive finite value.
    """
    out = {"n_orders": int(len(table))}
    order = table["order"].to_numpy(dtype=float) if len(table) else np.zeros(0)
    for key, col, sign in (("horton_ratio_number", "n_elements", -1.0),
                           ("horton_ratio_diameter", "diameter_mean_um", 1.0),
                           ("horton_ratio_length", "length_mean_um", 1.0)):
        y = table[col].to_numpy(dtype=float) if len(table) else np.zeros(0)
        ok = np.isfinite(y) & (y > 0)
        if ok.sum() < 2:
            out[key] = None
            continue
        slope = np.polyfit(order[ok], np.log10(y[ok]), 1)[0]
        out[key] = float(10.0 ** (sign * slope))
    return out


# ---------------------------------------------------------------------------
# the step
# ---------------------------------------------------------------------------

@dataclass
class Orders:
    """Result of :func:`compute_orders`.

    Attributes
    ----------
    segments : DataFrame, shape (S, 2)
        ``segment_id`` and ``element_id`` (``Int64``, ``<NA>`` without an
        order), in the row order of the input.
    table : DataFrame
        ``orders.csv`` (see :func:`order_table`).
    connectivity : DataFrame
        ``order_connectivity.csv`` (see :func:`connectivity_table`).
    summary : dict
        ``n_orders``, ``horton_ratio_number``, ``horton_ratio_diameter``,
        ``horton_ratio_length``.
    """

    segments: pd.DataFrame
    table: pd.DataFrame
    connectivity: pd.DataFrame
    summary: dict = field(default_factory=dict)


def compute_orders(segments: pd.DataFrame) -> Orders:
    """Elements, the orders table and the connectivity matrix of ordered segments.

    Parameters
    ----------
    segments : DataFrame, shape (S, ...)
        Needs ``segment_id``, ``parent_segment_id`` and ``strahler_diameter``
        (nullable integers; ``<NA>`` parent at a root, ``<NA>`` order where
        no root reaches), ``radius_um`` and ``length_um`` (µm), as the levels
        step leaves them.

    Returns
    -------
    Orders

    Raises
    ------
    InputError
        Missing columns, duplicate segment ids, or a parent id that is not a
        segment.
    """
    need = ("segment_id", "parent_segment_id", "strahler_diameter", "radius_um", "length_um")
    if not isinstance(segments, pd.DataFrame):
        raise InputError(f"segments: expected a pandas DataFrame, got {type(segments).__name__}")
    missing = [c for c in need if c not in segments.columns]
    if missing:
        raise InputError(f"segments: missing column(s) {', '.join(missing)}")
    sid = segments["segment_id"].to_numpy(dtype=np.int64)
    ids = pd.Index(sid)
    if not ids.is_unique:
        raise InputError("segments: segment_id values must be unique")
    par_id = pd.array(segments["parent_segment_id"], dtype="Int64")
    has_par = ~np.asarray(par_id.isna())
    parent = np.full(len(sid), -1, dtype=np.int64)
    parent[has_par] = ids.get_indexer(par_id[has_par].to_numpy(dtype=np.int64))
    if (parent[has_par] < 0).any():
        raise InputError("segments: parent_segment_id refers to a segment_id that is not in the table")
    ordv = pd.array(segments["strahler_diameter"], dtype="Int64")
    order = np.where(np.asarray(ordv.isna()), -1, ordv.fillna(-1).to_numpy(dtype=np.int64))
    diam = 2.0 * segments["radius_um"].to_numpy(dtype=float)
    length = segments["length_um"].to_numpy(dtype=float)
    parent[order < 1] = -1
    element, _ = order_elements(parent, order, diam, sid)
    table = order_table(element, order, diam, length)
    conn = connectivity_table(element, order, parent)
    seg = pd.DataFrame({"segment_id": sid,
                        "element_id": pd.arrays.IntegerArray(np.maximum(element, 0), element < 0)})
    return Orders(segments=seg, table=table, connectivity=conn, summary=horton_ratios(table))


def empty_orders() -> Orders:
    """An :class:`Orders` for a network without segments (tables with their columns, no rows)."""
    table = pd.DataFrame({c: pd.Series(dtype=np.int64 if c in ("order", "n_elements", "n_segments") else float)
                          for c in ORDER_COLUMNS})
    conn = pd.DataFrame({c: pd.Series(dtype=float if c == "connectivity" else np.int64)
                         for c in CONNECTIVITY_COLUMNS})
    seg = pd.DataFrame({"segment_id": pd.Series(dtype=np.int64), "element_id": pd.Series(dtype="Int64")})
    return Orders(segments=seg, table=table, connectivity=conn, summary=horton_ratios(table))
