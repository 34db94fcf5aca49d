"""Red cells through a network: phase separation at diverging nodes, mixing at converging ones.

In: segment ends, signed flows, diameters and the inflow haematocrit. Out: the discharge haematocrit
of every segment, in flow order (the empirical law of Pries et al. 1990 / Pries & Secomb 2005 at
diverging nodes), and the red-cell flux residual at every node; see :mod:`pipeline.flow.rheology`.
"""

from __future__ import annotations

import math

import numba
import numpy as np

from ..errors import ConfigError, InputError

__all__ = ["PHASE_SEPARATION_VERSIONS", "phase_separation", "propagate_haematocrit", "red_cell_residual"]


PHASE_SEPARATION_VERSIONS = ("2005", "1990")



# ---------------------------------------------------------------------------
# phase separation law
# ---------------------------------------------------------------------------

@numba.njit(cache=True)
def _fqe(fqb, d_parent, d_alpha, d_beta, h_parent, version):
    """Red-cell flux fraction into daughter alpha (scalar; see the module docstring).

    ``version`` 0 is the 2005 parameter set, 1 the 1990 one.
    """
    one_minus_h = 1.0 - h_parent
    if version == 0:
        r2 = (d_alpha / d_beta) ** 2
        a = -13.29 * ((r2 - 1.0) / (r2 + 1.0)) * one_minus_h / d_parent
        x0 = 0.964 * one_minus_h / d_parent
    else:
        a = -6.96 * math.log(d_alpha / d_beta) / d_parent
        x0 = 0.4 / d_parent
    b = 1.0 + 6.98 * one_minus_h / d_parent
    if x0 >= 0.5:
        # Limit of the law as X0 -> 1/2: a step at equal flow.
        if fqb > 0.5:
            return 1.0
        if fqb < 0.5:
            return 0.0
        return 0.5
    if fqb <= x0:
        return 0.0
    if fqb >= 1.0 - x0:
        return 1.0
    z = (fqb - x0) / (1.0 - 2.0 * x0)
    t = a + b * (math.log(z) - math.log1p(-z))
    # Logistic function in the form that cannot overflow.
    if t >= 0.0:
        return 1.0 / (1.0 + math.exp(-t))
    e = math.exp(t)
    return e / (1.0 + e)


@numba.njit(cache=True)
def _fqe_many(fqb, d_parent, d_alpha, d_beta, h_parent, version):
    out = np.empty(fqb.shape[0])
    for i in range(fqb.shape[0]):
        out[i] = _fqe(fqb[i], d_parent[i], d_alpha[i], d_beta[i], h_parent[i], version)
    return out


def _version_code(version: str) -> int:
    if version not in PHASE_SEPARATION_VERSIONS:
        raise ConfigError(
            f"version: expected one of {', '.join(PHASE_SEPARATION_VERSIONS)}, got {version!r}"
        )
    return PHASE_SEPARATION_VERSIONS.index(version)


def phase_separation(
    flow_fraction,
    parent_diameter_um,
    daughter_alpha_um,
    daughter_beta_um,
    parent_haematocrit,
    *,
    version: str = "2005",
) -> np.ndarray:
    """Red-cell flux fractions into the two daughters of diverging bifurcations.

    Parameters
    ----------
    flow_fraction : float or (M,) array_like
        FQB, the fraction of the parent's blood flow that enters daughter
        alpha, in [0, 1].
    parent_diameter_um, daughter_alpha_um, daughter_beta_um : float or (M,) array_like
        Diameters D_F, D_alpha, D_beta, µm, > 0.
    parent_haematocrit : float or (M,) array_like
        Discharge haematocrit H_F of the parent, in [0, 1).
    version : {'2005', '1990'}, keyword-only
        Parameter set: Pries & Secomb (2005) or Pries et al. (1990); see the
        module docstring for the formulas and their provenance.

    Returns
    -------
    (M, 2) float ndarray
        FQE of daughter alpha (column 0) and of daughter beta (column 1);
        each row sums to 1. Scalars in give M = 1.

    Raises
    ------
    InputError
        Arrays that do not broadcast, a fraction outside [0, 1], a diameter
        not > 0 or a haematocrit outside [0, 1).
    ConfigError
        An unknown ``version``.
    """
    code = _version_code(version)
    try:
        fqb, dp, da, db, hp = np.broadcast_arrays(
            *(np.atleast_1d(np.asarray(x, dtype=float)) for x in (
                flow_fraction, parent_diameter_um, daughter_alpha_um, daughter_beta_um, parent_haematocrit,
            ))
        )
    except ValueError as exc:
        raise InputError(f"phase_separation: the arguments must broadcast to one shape ({exc})") from None
    if fqb.ndim != 1:
        raise InputError(f"phase_separation: expected scalars or 1-D arrays, got shape {fqb.shape}")
    if not np.all((fqb >= 0) & (fqb <= 1)):
        raise InputError("flow_fraction: expected values in [0, 1], got some outside (or NaN)")
    for name, d in (("parent_diameter_um", dp), ("daughter_alpha_um", da), ("daughter_beta_um", db)):
        if not np.all(np.isfinite(d) & (d > 0)):
            raise InputError(f"{name}: expected finite diameters > 0 µm, got some that are not")
    if not np.all((hp >= 0) & (hp < 1)):
        raise InputError("parent_haematocrit: expected values in [0, 1), got some outside (or NaN)")
    alpha = _fqe_many(
        np.ascontiguousarray(fqb), np.ascontiguousarray(dp), np.ascontiguousarray(da),
        np.ascontiguousarray(db), np.ascontiguousarray(hp), code,
    )
    return np.column_stack([alpha, 1.0 - alpha])


# ---------------------------------------------------------------------------
# propagation in flow order
# ---------------------------------------------------------------------------

@numba.njit(cache=True)
def _capped_split(cells, fqe, q_a, q_b, h_max):
    """Red-cell flux into daughter a (share ``fqe``) and into b (the rest), each capped at ``h_max``.

    A daughter's excess over the cap goes to its sibling, which stays below
    the cap because the parent is; both are capped only where the node's
    blood flow does not balance (then cells are lost, and the residual
    shows it).
    """
    ca = fqe * cells
    cb = cells - ca
    if ca > h_max * q_a:
        ca = h_max * q_a
        cb = cells - ca
    elif cb > h_max * q_b:
        cb = h_max * q_b
        ca = cells - cb
    return ca, cb


@numba.njit(cache=True)
def _propagate(n_nodes, src, dst, aq, diameter, out_ptr, out_seg, in_ptr, in_seg,
               boundary, h_in, version, h_max, h):
    """Fill ``h`` (segments in flow order; NaN stays where no order reaches).

    ``src``/``dst``/``aq`` are each flowing segment's upstream node,
    downstream node and ``|flow|``; ``out_seg[out_ptr[n]:out_ptr[n + 1]]``
    are the segments leaving node n, ``in_seg[...]`` those entering it.
    """
    indeg = np.empty(n_nodes, dtype=np.int64)
    for n in range(n_nodes):
        indeg[n] = in_ptr[n + 1] - in_ptr[n]
    queue = np.empty(n_nodes, dtype=np.int64)
    head = 0
    tail = 0
    for n in range(n_nodes):
        if indeg[n] == 0:
            queue[tail] = n
            tail += 1
    while head < tail:
        n = queue[head]
        head += 1
        k0 = out_ptr[n]
        k1 = out_ptr[n + 1]
        n_out = k1 - k0
        if n_out == 0:
            continue
        # Red-cell flux, blood flow and the flow-weighted diameter arriving
        # through segments.
        cells = 0.0
        q_in = 0.0
        d_parent = 0.0
        q_big = -1.0
        for j in range(in_ptr[n], in_ptr[n + 1]):
            s = in_seg[j]
            cells += h[s] * aq[s]
            q_in += aq[s]
            d_parent += diameter[s] * aq[s]
            if aq[s] > q_big:
                q_big = aq[s]
        if q_in > 0.0:
            d_parent /= q_in
        q_out = 0.0
        for j in range(k0, k1):
            q_out += aq[out_seg[j]]
        if boundary[n] and q_out > q_in:
            # Blood entering the network here from outside.
            cells += h_in[n] * (q_out - q_in)
            q_in = q_out
        if n_out == 2 and q_big > 0.0:
            sa = out_seg[k0]
            sb = out_seg[k0 + 1]
            h_parent = min(cells / q_in, h_max)
            fqe = _fqe(aq[sa] / q_out, d_parent, diameter[sa], diameter[sb], h_parent, version)
            ca, cb = _capped_split(cells, fqe, aq[sa], aq[sb], h_max)
            h[sa] = min(ca / aq[sa], h_max)
            h[sb] = min(cb / aq[sb], h_max)
        elif n_out > 2 and q_big > 0.0:
            # The outflow of largest flow separates from the others taken
            # together (the binary law, their flow-weighted diameter as the
            # sibling's); the others share the rest in proportion to flow.
            sa = out_seg[k0]
            for j in range(k0, k1):
                if aq[out_seg[j]] > aq[sa]:
                    sa = out_seg[j]
            q_rest = q_out - aq[sa]
            d_rest = 0.0
            for j in range(k0, k1):
                s = out_seg[j]
                if s != sa:
                    d_rest += diameter[s] * aq[s]
            d_rest = d_rest / q_rest if q_rest > 0.0 else diameter[sa]
            h_parent = min(cells / q_in, h_max)
            fqe = _fqe(aq[sa] / q_out, d_parent, diameter[sa], d_rest, h_parent, version)
            ca, cb = _capped_split(cells, fqe, aq[sa], q_rest, h_max)
            h[sa] = min(ca / aq[sa], h_max)
            hr = min(cb / q_rest, h_max) if q_rest > 0.0 else 0.0
            for j in range(k0, k1):
                s = out_seg[j]
                if s != sa:
                    h[s] = hr
        else:
            hh = min(cells / q_out, h_max)
            for j in range(k0, k1):
                h[out_seg[j]] = hh
        for j in range(k0, k1):
            m = dst[out_seg[j]]
            indeg[m] -= 1
            if indeg[m] == 0:
                queue[tail] = m
                tail += 1


def _csr(keys: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Segments grouped by node: ``(ptr, seg)`` with ``seg[ptr[n]:ptr[n + 1]]`` at node n."""
    order = np.argsort(keys, kind="stable")
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(keys, minlength=n), out=ptr[1:])
    return ptr, order.astype(np.int64)


def _edges(u, v, flow, diameter_um, n_nodes):
    u = np.asarray(u)
    v = np.asarray(v)
    q = np.asarray(flow, dtype=float)
    d = np.asarray(diameter_um, dtype=float)
    if not (u.ndim == v.ndim == q.ndim == d.ndim == 1 and len(u) == len(v) == len(q) == len(d)):
        raise InputError(
            f"u, v, flow, diameter_um: expected 1-D arrays of one length, got shapes "
            f"{u.shape}, {v.shape}, {q.shape}, {d.shape}"
        )
    if not (np.issubdtype(u.dtype, np.integer) and np.issubdtype(v.dtype, np.integer)) and len(u):
        raise InputError(f"u, v: expected integer node rows, got {u.dtype} and {v.dtype}")
    u = u.astype(np.int64)
    v = v.astype(np.int64)
    if len(u) and (min(u.min(), v.min()) < 0 or max(u.max(), v.max()) >= n_nodes):
        raise InputError(f"u, v: node rows must lie in [0, {n_nodes}), got some outside")
    if not np.all(np.isfinite(q)):
        raise InputError("flow: expected finite values, got NaN or infinity")
    if not np.all(np.isfinite(d) & (d > 0)):
        raise InputError("diameter_um: expected finite diameters > 0 µm, got some that are not")
    return u, v, q, d


def _count_nodes(u, v, inflow_haematocrit) -> int:
    """N when not given: one past the largest node row, or the length of a per-node array."""
    uu = np.asarray(u)
    vv = np.asarray(v)
    h = np.asarray(inflow_haematocrit)
    top = int(max(uu.max(), vv.max())) + 1 if uu.size else 0
    return max(top, h.shape[0] if h.ndim == 1 else 0)


def _node_haematocrit(inflow_haematocrit, n_nodes: int, max_haematocrit: float) -> np.ndarray:
    h = np.asarray(inflow_haematocrit, dtype=float)
    if h.ndim == 0:
        h = np.full(n_nodes, float(h))
    elif h.shape != (n_nodes,):
        raise InputError(
            f"inflow_haematocrit: expected a scalar or one value per node ({n_nodes},), got shape {h.shape}"
        )
    if not np.all((h >= 0) & (h < max_haematocrit)):
        raise InputError(
            f"inflow_haematocrit: expected values in [0, max_haematocrit = {max_haematocrit:g}), "
            f"got some outside (or NaN)"
        )
    return h


def _boundary_mask(inlets, n_nodes: int) -> np.ndarray:
    mask = np.zeros(n_nodes, dtype=bool)
    if inlets is None:
        return mask
    arr = np.asarray(inlets)
    if arr.dtype == bool:
        if arr.shape != (n_nodes,):
            raise InputError(f"inlets: a boolean mask must have shape ({n_nodes},), got {arr.shape}")
        return arr.copy()
    arr = arr.astype(np.int64).ravel()
    if arr.size and (arr.min() < 0 or arr.max() >= n_nodes):
        raise InputError(f"inlets: node rows must lie in [0, {n_nodes}), got some outside")
    mask[arr] = True
    return mask


def _directed(u, v, q, zero_flow_rtol):
    aq = np.abs(q)
    scale = float(aq.max()) if len(aq) else 0.0
    flowing = aq > zero_flow_rtol * scale
    if scale == 0.0:
        flowing[:] = False
    forward = q > 0
    src = np.where(forward, u, v)
    dst = np.where(forward, v, u)
    return src, dst, aq, flowing


def propagate_haematocrit(
    u,
    v,
    flow,
    diameter_um,
    *,
    inflow_haematocrit,
    n_nodes: int | None = None,
    inlets=None,
    version: str = "2005",
    max_haematocrit: float = 0.95,
    zero_flow_rtol: float = 1e-12,
) -> np.ndarray:
    """Discharge haematocrit of every segment, in flow order.

    Parameters
    ----------
    u, v : (S,) int array_like
        End-node rows of each segment (0 <= row < N).
    flow : (S,) float array_like
        Signed volume flow, positive from ``u`` to ``v``; any unit (only
        ratios are used).
    diameter_um : (S,) float array_like
        Vessel diameters, µm, > 0 (the phase-separation law's D).
    inflow_haematocrit : float or (N,) array_like, keyword-only
        Discharge haematocrit of the blood entering at boundary nodes, in
        [0, ``max_haematocrit``); an array gives one value per node (read only
        at boundary nodes).
    n_nodes : int or None, keyword-only
        N; None takes ``max(u, v) + 1`` (or the length of an array
        ``inflow_haematocrit``).
    inlets : (N,) bool or (K,) int array_like or None, keyword-only
        Boundary nodes where blood enters besides the nodes without an
        inflowing segment (which always are). See the module docstring.
    version : {'2005', '1990'}, keyword-only
        Phase-separation parameter set (:func:`phase_separation`).
    max_haematocrit : float, keyword-only
        Cap on a segment's discharge haematocrit, in (0, 1). Packed red cells
        still hold a few per cent of plasma between them (packed cell volume
        after centrifugation; from memory), so 0.95 is a physical ceiling,
        not a fit.
    zero_flow_rtol : float, keyword-only
        Segments with ``|flow|`` at most this times the largest ``|flow|``
        count as not flowing (rounding noise of the flow solve).

    Returns
    -------
    (S,) float ndarray
        Discharge haematocrit in [0, ``max_haematocrit``]; NaN for segments
        without flow and for those no flow order reaches (downstream of a
        directed cycle).

    Raises
    ------
    InputError
        Shapes that do not match, node rows out of range, non-finite flows,
        diameters not > 0, inflow haematocrits out of range.
    ConfigError
        ``version``, ``max_haematocrit`` or ``zero_flow_rtol`` out of range.
    """
    code = _version_code(version)
    if not 0.0 < max_haematocrit < 1.0:
        raise ConfigError(f"max_haematocrit: expected a value in (0, 1), got {max_haematocrit!r}")
    if not zero_flow_rtol >= 0.0:
        raise ConfigError(f"zero_flow_rtol: expected a value >= 0, got {zero_flow_rtol!r}")
    if n_nodes is None:
        n_nodes = _count_nodes(u, v, inflow_haematocrit)
    u, v, q, d = _edges(u, v, flow, diameter_um, n_nodes)
    h_node = _node_haematocrit(inflow_haematocrit, n_nodes, max_haematocrit)
    boundary = _boundary_mask(inlets, n_nodes)

    src, dst, aq, flowing = _directed(u, v, q, zero_flow_rtol)
    seg = np.flatnonzero(flowing)
    # Renumber to the flowing segments only; zero-flow segments take no part.
    f_src, f_dst = src[seg], dst[seg]
    out_ptr, out_seg = _csr(f_src, n_nodes)
    in_ptr, in_seg = _csr(f_dst, n_nodes)
    # Nodes that send blood but receive none through a segment are fed from outside.
    boundary |= (np.diff(out_ptr) > 0) & (np.diff(in_ptr) == 0)
    h_flow = np.full(len(seg), np.nan)
    _propagate(
        n_nodes, f_src, f_dst, np.ascontiguousarray(aq[seg]), np.ascontiguousarray(d[seg]),
        out_ptr, out_seg, in_ptr, in_seg, boundary, h_node, code, float(max_haematocrit), h_flow,
    )
    h = np.full(len(q), np.nan)
    h[seg] = h_flow
    return h


def red_cell_residual(u, v, flow, haematocrit, *, n_nodes: int, inflow_haematocrit, inlets=None,
                      zero_flow_rtol: float = 1e-12) -> float:
    """Largest red-cell flux imbalance at a node, relative to the flux through it.

    Parameters
    ----------
    u, v, flow : (S,) array_like
        As for :func:`propagate_haematocrit`.
    haematocrit : (S,) array_like
        Discharge haematocrit per segment; NaN counts as no red-cell flux
        (segments without flow).
    n_nodes : int, keyword-only
    inflow_haematocrit : float or (N,) array_like, keyword-only
    inlets : as for :func:`propagate_haematocrit`, keyword-only
    zero_flow_rtol : float, keyword-only

    Returns
    -------
    float
        ``max |cells out - cells in| / max(cells in, cells out)`` over the
        nodes with an outflow (cells in including the external inflow at
        boundary nodes); 0 when no red cells flow.
    """
    u = np.asarray(u, dtype=np.int64)
    v = np.asarray(v, dtype=np.int64)
    q = np.asarray(flow, dtype=float)
    h = np.asarray(haematocrit, dtype=float)
    src, dst, aq, flowing = _directed(u, v, q, zero_flow_rtol)
    aq = np.where(flowing, aq, 0.0)
    cells = np.where(flowing, np.nan_to_num(h) * aq, 0.0)
    q_out = np.bincount(src, weights=aq, minlength=n_nodes)
    q_in = np.bincount(dst, weights=aq, minlength=n_nodes)
    c_out = np.bincount(src, weights=cells, minlength=n_nodes)
    c_in = np.bincount(dst, weights=cells, minlength=n_nodes)
    boundary = _boundary_mask(inlets, n_nodes)
    boundary |= (q_out > 0) & (np.bincount(dst, weights=flowing, minlength=n_nodes) == 0)
    h_node = np.broadcast_to(np.asarray(inflow_haematocrit, dtype=float), (n_nodes,))
    c_in = c_in + np.where(boundary, h_node * np.maximum(q_out - q_in, 0.0), 0.0)
    scale = np.maximum(c_in, c_out)
    check = (q_out > 0) & (scale > 0)
    if not check.any():
        return 0.0
    return float((np.abs(c_out - c_in)[check] / scale[check]).max())
