"""The network's linear algebra: the Kirchhoff system assembled and solved.

In: segment ends, conductances, which nodes are unknown and the known pressures. Out: the sparse
symmetric positive definite system of the unknown pressures (:func:`_assemble`) and its solution,
direct (SuperLU) or by Jacobi-preconditioned conjugate gradients (:func:`_solve_linear`).
"""

from __future__ import annotations

import math
import warnings as _warnings

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph
from scipy.sparse import linalg as spla

from ..errors import SolverError


def _wsum(index: np.ndarray, weights: np.ndarray, n: int) -> np.ndarray:
    """Float ``bincount`` (numpy returns integers for empty input)."""
    return np.bincount(index, weights=weights, minlength=n).astype(float, copy=False)


# ---------------------------------------------------------------------------
# linear algebra
# ---------------------------------------------------------------------------

def _assemble(u, v, g, unknown_index, phi_fixed, use):
    """Reduced Laplacian system ``A x = b`` over the unknown nodes.

    Parameters
    ----------
    u, v : (S,) int ndarray
        End-node rows.
    g : (S,) float ndarray
        Conductances, m³/(Pa·s).
    unknown_index : (N,) int ndarray
        Position of each node among the unknowns, -1 for fixed or unsolved
        nodes.
    phi_fixed : (N,) float ndarray
        Potential of the fixed nodes (ignored elsewhere).
    use : (S,) bool ndarray
        Segments to assemble (no self-loops, solved components only).

    Returns
    -------
    A : (n, n) scipy.sparse.csr_matrix
    b : (n,) float ndarray
    """
    n = int(unknown_index.max()) + 1 if len(unknown_index) else 0
    uu, vv, gg = u[use], v[use], g[use]
    a, c = unknown_index[uu], unknown_index[vv]
    ia, ic = a >= 0, c >= 0
    diag = _wsum(a[ia], gg[ia], n) + _wsum(c[ic], gg[ic], n)
    both = ia & ic
    rows = np.concatenate([np.arange(n), a[both], c[both]])
    cols = np.concatenate([np.arange(n), c[both], a[both]])
    vals = np.concatenate([diag, -gg[both], -gg[both]])
    A = sparse.coo_matrix((vals, (rows, cols)), shape=(n, n)).tocsr()
    only_a = ia & ~ic
    only_c = ic & ~ia
    b = _wsum(a[only_a], gg[only_a] * phi_fixed[vv[only_a]], n)
    b += _wsum(c[only_c], gg[only_c] * phi_fixed[uu[only_c]], n)
    return A, b


def _dot(a: np.ndarray, b: np.ndarray) -> float:
    # einsum runs its own single-threaded loop: no BLAS thread pool, so the
    # run time does not collapse when the machine is busy, and sums are
    # reproducible.
    return float(np.einsum("i,i->", a, b))


def _cg(A, b: np.ndarray, x: np.ndarray, *, rtol: float, max_iter: int) -> tuple[np.ndarray, int, bool]:
    """Plain conjugate gradients (Hestenes & Stiefel 1952) for SPD ``A``.

    Parameters
    ----------
    A : (n, n) sparse matrix
        Symmetric positive definite.
    b : (n,) float ndarray
    x : (n,) float ndarray
        Initial guess; updated in place.
    rtol : float, keyword-only
        Stop when ``||b - A x|| <= rtol ||b||`` (recursive residual).
    max_iter : int, keyword-only

    Returns
    -------
    x : (n,) float ndarray
    iterations : int
    converged : bool
    """
    r = b - A @ x
    tol = rtol * math.sqrt(_dot(b, b))
    rr = _dot(r, r)
    if math.sqrt(rr) <= tol:
        return x, 0, True
    p = r.copy()
    tmp = np.empty_like(r)
    for it in range(1, max_iter + 1):
        q = A @ p
        pq = _dot(p, q)
        if not pq > 0:  # lost positive definiteness (or NaN)
            return x, it, False
        alpha = rr / pq
        np.multiply(p, alpha, out=tmp)
        x += tmp
        np.multiply(q, alpha, out=tmp)
        r -= tmp
        rr_new = _dot(r, r)
        if math.sqrt(rr_new) <= tol:
            return x, it, True
        p *= rr_new / rr
        p += r
        rr = rr_new
    return x, max_iter, False


def _nearly_tree(A) -> bool:
    """True when the matrix graph has at most one independent loop per 1000 nodes.

    Sparse LU of a tree has no fill; with a few loops the fill stays small
    (a 1.2 M-segment random tree solved in 3 s direct against 6 s CG; with
    1 % extra random links 4.5 s against 8 s, but with 3 % 104 s against 8 s),
    so ``auto`` keeps the direct solver only well below that cliff.
    """
    n = A.shape[0]
    if n == 0:
        return True
    n_comp, _ = csgraph.connected_components(A, directed=False)
    loops = (A.nnz - n) // 2 - n + n_comp
    return loops <= 0.001 * n


def _solve_linear(A, b, *, method: str, rtol: float, max_iter: int,
                  x0: np.ndarray | None = None) -> tuple[np.ndarray, int | None]:
    """Solve the SPD system; raise SolverError on failure (``x0``: CG's start)."""
    n = A.shape[0]
    if n == 0:
        return np.zeros(0), None
    iterations: int | None = None
    if method == "direct":
        try:
            with _warnings.catch_warnings():
                _warnings.simplefilter("error")
                lu = spla.splu(
                    A.tocsc(), permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                    options={"SymmetricMode": True},
                )
                x = lu.solve(b)
        except (RuntimeError, Warning) as exc:
            raise SolverError(f"flow: direct solve failed ({exc}); the network matrix is singular") from None
    else:
        diag = A.diagonal()
        if not (np.all(np.isfinite(diag)) and np.all(diag > 0)):
            raise SolverError("flow: CG needs a positive diagonal; the network matrix is not positive definite")
        # Jacobi preconditioning as a symmetric diagonal scaling, D^-1/2 A D^-1/2
        # (the same iterates as Jacobi-preconditioned CG); the stopping test is
        # on the scaled residual.
        scale = 1.0 / np.sqrt(diag)
        dsc = sparse.diags(scale)
        As = (dsc @ A @ dsc).tocsr()
        bs = scale * b
        start = np.sqrt(diag) * 0.5 if x0 is None else np.sqrt(diag) * x0
        y, iterations, converged = _cg(As, bs, start, rtol=rtol, max_iter=max_iter)
        if not converged:
            raise SolverError(
                f"flow: conjugate gradients did not converge to rtol {rtol:g} within {max_iter} "
                f"iterations; raise flow.cg_max_iter or use flow.solver: direct"
            )
        x = scale * y
    if not np.all(np.isfinite(x)):
        raise SolverError("flow: the solve produced non-finite pressures")
    return x, iterations
