"""Growing the penetrating trees of a cortex-like network.

In: a random generator, the box (µm), tree counts, radii and the ranges of
:func:`~pipeline.synthetic.cortex.cortex_network`. Out: a :class:`_TreeEdges`
holding every tree's nodes and straight edges, the forks made and the
terminal branches left to join the capillary mesh, with each tree's root,
class and site on the pial face.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ._common import _any_perpendicular, _bad, _line_points, _rotate, _unit
from .trees import _Clearance, _daughter_directions, _siblings_apart, murray_angles_deg, murray_daughter_radii


# Directions tried for a branch before its parent is left to end in the mesh.
_BRANCH_TRIES = 12


def _trunk_sites(rng: np.random.Generator, n: int, box: np.ndarray) -> np.ndarray:
    """(n, 2) surface positions (y, x) µm, spread by dart throwing.

    Sites keep a tenth of the box from the side faces, so that trunks and
    their first branches stay inside; the spacing starts at 0.7 of the mean
    nearest-neighbour distance of a hexagonal packing and shrinks by a tenth
    whenever 400 throws in a row miss.
    """
    lo, hi = 0.1 * box[1:], 0.9 * box[1:]
    d_min = 0.7 * math.sqrt(float(np.prod(hi - lo)) / n)
    sites: list[np.ndarray] = []
    misses = 0
    while len(sites) < n:
        p = rng.uniform(lo, hi)
        if all(np.linalg.norm(p - q) >= d_min for q in sites):
            sites.append(p)
            misses = 0
        else:
            misses += 1
            if misses >= 400:
                d_min *= 0.9
                misses = 0
    return np.array(sites)


class _TreeEdges:
    """The penetrating trees as they grow: nodes, straight edges and a clearance index.

    Edge ``e`` runs from node ``a[e]`` to ``b[e]`` (root side first) along
    ``pts[e]``, with radius ``rad[e]``, class ``cls[e]`` (0 arteriole,
    1 venule) and tree ``tree[e]``. ``forks`` records each fork made (node,
    parent and daughter edges, radii, Murray angles) and ``terminals`` the
    ends left to join the mesh.
    """

    def __init__(self, box: np.ndarray, gap: float):
        self.box, self.gap = box, gap
        self.index = _Clearance(gap)
        self.pos: list[np.ndarray] = []
        self.a: list[int] = []
        self.b: list[int] = []
        self.pts: list[np.ndarray] = []
        self.rad: list[float] = []
        self.cls: list[int] = []
        self.tree: list[int] = []
        self.forks: list[dict] = []
        self.terminals: list[int] = []

    def new_node(self, p: np.ndarray) -> int:
        self.pos.append(np.asarray(p, dtype=float))
        return len(self.pos) - 1

    def fits(self, pts: np.ndarray, r: float, exclude: set[int], *, from_surface: bool = False) -> bool:
        """True when a vessel of radius ``r`` along ``pts`` stays in the box and clear of the others."""
        m = self.index.factor * r + self.gap
        lo = np.full(3, m)
        if from_surface:
            lo[0] = 0.0  # a trunk starts on the pial face
        sample = pts[::2]
        if np.any(sample < lo) or np.any(sample > self.box - m):
            return False
        return self.index.clear(sample, r, exclude)

    def add_edge(self, a: int, b: int, pts: np.ndarray, r: float, cls: int, tree: int, clear_r: float) -> int:
        eid = len(self.a)
        self.a.append(a)
        self.b.append(b)
        self.pts.append(pts)
        self.rad.append(r)
        self.cls.append(cls)
        self.tree.append(tree)
        self.index.add(pts[::2], clear_r, eid)
        return eid


def _grow_trunks(
    rng: np.random.Generator,
    tr: _TreeEdges,
    *,
    cls_of: np.ndarray,
    sites: np.ndarray,
    root_r: np.ndarray,
    depth_range: tuple[float, float],
    interval: tuple[float, float],
    shape_um: Any,
) -> tuple[list[tuple[list[int], list[int]]], np.ndarray]:
    """Every penetrating vessel's trunk, from its site on the pial face into the depth.

    Parameters
    ----------
    cls_of, root_r : ndarray, shape (n,)
        Each trunk's class and radius.
    sites : ndarray, shape (n, 2)
        Each trunk's (y, x) on the pial face, µm.
    depth_range, interval : (float, float)
        Depth as a fraction of the box; distance between trunk nodes, µm.
    shape_um
        As given, for the error message.

    Returns
    -------
    trunks : list of (list of int, list of int)
        Each trunk's node ids and edge ids from the root down.
    roots : ndarray of int64, shape (n,)
    """
    box = tr.box
    trunks: list[tuple[list[int], list[int]]] = []
    roots = np.zeros(len(cls_of), dtype=np.int64)
    for t in range(len(cls_of)):
        r0 = float(root_r[t])
        p = np.r_[0.0, sites[t]]
        roots[t] = tr.new_node(p)
        nodes_t, edges_t = [int(roots[t])], []
        z_end = rng.uniform(*depth_range) * box[0]
        while p[0] < z_end - 0.5 * interval[0]:
            step = min(rng.uniform(*interval), max(z_end - p[0], 1.0))
            # A few degrees of tilt per node; the lateral part turns back near the side faces.
            d = _unit(np.r_[1.0, rng.normal(0.0, 0.08, 2)])
            near = ((p[1:] < 0.15 * box[1:]) & (d[1:] < 0)) | ((p[1:] > 0.85 * box[1:]) & (d[1:] > 0))
            d[1:][near] *= -1.0
            q = p + step * d
            pts = _line_points(p, q)
            if not tr.fits(pts, r0, set(edges_t[-1:]), from_surface=not edges_t):
                break
            b = tr.new_node(q)
            edges_t.append(tr.add_edge(nodes_t[-1], b, pts, r0, int(cls_of[t]), t, r0))
            nodes_t.append(b)
            p = q
        if not edges_t:
            raise _bad("shape_um", "a box deep enough for the penetrating vessels", shape_um)
        trunks.append((nodes_t, edges_t))
    return trunks, roots


def _fork(
    rng: np.random.Generator,
    tr: _TreeEdges,
    e: int,
    node: int,
    r: float,
    q_range: tuple[float, float],
    stack: list[tuple[int, int, float]],
    *,
    r_min_cls: tuple[float, float],
    ratio: float,
) -> None:
    """Two daughters at the end of edge ``e``, or none (the end joins the mesh).

    Daughters made go on ``stack`` as (edge, end node, radius).
    """
    q = rng.uniform(*q_range)
    r1, r2 = murray_daughter_radii(r, exponent=3.0, asymmetry=q)
    if r2 < r_min_cls[tr.cls[e]]:
        tr.terminals.append(node)
        return
    th1, th2 = murray_angles_deg(r, r1, r2)
    l1, l2 = ratio * r1 * rng.uniform(0.8, 1.25), ratio * r2 * rng.uniform(0.8, 1.25)
    start = tr.pos[node]
    d = _unit(start - tr.pos[tr.a[e]])
    if _siblings_apart(r1, r2, th1, th2, l1, l2):
        for _ in range(_BRANCH_TRIES):
            normal = _rotate(_any_perpendicular(d), d, rng.uniform(0.0, 2.0 * math.pi))
            d1, d2 = _daughter_directions(d, normal, th1, th2)
            p1, p2 = _line_points(start, start + l1 * d1), _line_points(start, start + l2 * d2)
            if tr.fits(p1, r1, {e}) and tr.fits(p2, r2, {e}):
                kids = []
                for pk, rk in ((p1, r1), (p2, r2)):
                    b = tr.new_node(pk[-1])
                    kids.append(tr.add_edge(node, b, pk, rk, tr.cls[e], tr.tree[e], rk))
                    stack.append((kids[-1], b, rk))
                tr.forks.append(dict(node=node, parent=e, kids=kids, r=(r, r1, r2), th=(th1, th2)))
                return
    tr.terminals.append(node)


def _grow_subtrees(
    rng: np.random.Generator,
    tr: _TreeEdges,
    stack: list[tuple[int, int, float]],
    *,
    q_range: tuple[float, float],
    r_min_cls: tuple[float, float],
    ratio: float,
) -> None:
    """Fork the branches on ``stack`` and their daughters, depth first, until the stack is empty."""
    while stack:
        e, node_s, r_s = stack.pop()
        _fork(rng, tr, e, node_s, r_s, q_range, stack, r_min_cls=r_min_cls, ratio=ratio)


def _side_branch(
    rng: np.random.Generator,
    tr: _TreeEdges,
    t: int,
    node: int,
    e_in: int,
    e_out: int,
    r: float,
    r_cont: float,
    r_side: float,
    *,
    ratio: float,
) -> tuple[int, int] | None:
    """A side branch of radius ``r_side`` leaving trunk ``t`` at ``node``, or None when none fits.

    ``e_in`` and ``e_out`` are the trunk edges into and out of ``node``; the
    trunk goes on with radius ``r_cont``.

    Returns
    -------
    (int, int) or None
        The side edge and its end node.
    """
    th1, th2 = murray_angles_deg(r, r_cont, r_side)
    d = _unit(tr.pos[tr.b[e_out]] - tr.pos[node])
    length = ratio * r_side * rng.uniform(0.8, 1.25)
    for _ in range(_BRANCH_TRIES):
        az = rng.uniform(0.0, 2.0 * math.pi)
        u = _rotate(_any_perpendicular(d), d, az)
        ds = _unit(math.cos(math.radians(th2)) * d + math.sin(math.radians(th2)) * u)
        pts = _line_points(tr.pos[node], tr.pos[node] + length * ds)
        if tr.fits(pts, r_side, {e_in, e_out}):
            b = tr.new_node(pts[-1])
            side = tr.add_edge(node, b, pts, r_side, tr.cls[e_in], t, r_side)
            tr.forks.append(dict(
                node=node, parent=e_in, kids=[e_out, side], r=(r, r_cont, r_side), th=(th1, th2)
            ))
            return side, b
    return None


def _grow_branches(
    rng: np.random.Generator,
    tr: _TreeEdges,
    trunks: list[tuple[list[int], list[int]]],
    root_r: np.ndarray,
    *,
    side_q: tuple[float, float],
    tree_q: tuple[float, float],
    r_min_cls: tuple[float, float],
    ratio: float,
) -> None:
    """Side branches along each trunk and the fork at its end, tree by tree in random order.

    Each trunk edge gets its radius: the root's, less what the side branches
    above it took.
    """
    for t in rng.permutation(len(trunks)).tolist():
        nodes_t, edges_t = trunks[t]
        r = float(root_r[t])
        tr.rad[edges_t[0]] = r
        stack: list[tuple[int, int, float]] = []
        for k in range(1, len(nodes_t) - 1):
            node, e_in, e_out = nodes_t[k], edges_t[k - 1], edges_t[k]
            q = rng.uniform(*side_q)
            r_cont, r_side = murray_daughter_radii(r, exponent=3.0, asymmetry=q)
            if r_side >= r_min_cls[tr.cls[e_in]]:
                side = _side_branch(rng, tr, t, node, e_in, e_out, r, r_cont, r_side, ratio=ratio)
                if side is not None:
                    stack.append((side[0], side[1], r_side))
                    r = r_cont
            tr.rad[e_out] = r
            # Depth first, so each side branch is done before the trunk goes on.
            _grow_subtrees(rng, tr, stack, q_range=tree_q, r_min_cls=r_min_cls, ratio=ratio)
        _fork(rng, tr, edges_t[-1], nodes_t[-1], r, tree_q, stack, r_min_cls=r_min_cls, ratio=ratio)
        _grow_subtrees(rng, tr, stack, q_range=tree_q, r_min_cls=r_min_cls, ratio=ratio)


def _grow_trees(
    rng: np.random.Generator,
    box: np.ndarray,
    *,
    n_art: int,
    n_ven: int,
    r_art: float,
    v_fac: float,
    r_min: float,
    depth_range: tuple[float, float],
    interval: tuple[float, float],
    side_q: tuple[float, float],
    tree_q: tuple[float, float],
    ratio: float,
    gap: float,
    shape_um: Any,
) -> tuple[_TreeEdges, np.ndarray, np.ndarray, np.ndarray]:
    """The penetrating arteriolar and venular trees: all trunks first, then their branches.

    Returns
    -------
    tr : _TreeEdges
    roots : ndarray of int64, shape (n,)
        Root node of each tree (``n = n_art + n_ven``).
    cls_of : ndarray of int, shape (n,)
        Class of each tree: 0 arteriole, 1 venule.
    sites : ndarray, shape (n, 2)
        Trunk sites (y, x) on the pial face, µm.
    """
    tr = _TreeEdges(box, gap)
    n_tot = n_art + n_ven
    cls_of = rng.permutation(np.r_[np.zeros(n_art, dtype=int), np.ones(n_ven, dtype=int)])
    sites = _trunk_sites(rng, n_tot, box)
    root_r = np.where(cls_of == 0, r_art, r_art * v_fac)
    r_min_cls = (r_min, r_min * v_fac)
    trunks, roots = _grow_trunks(
        rng, tr, cls_of=cls_of, sites=sites, root_r=root_r, depth_range=depth_range, interval=interval,
        shape_um=shape_um,
    )
    _grow_branches(rng, tr, trunks, root_r, side_q=side_q, tree_q=tree_q, r_min_cls=r_min_cls, ratio=ratio)
    return tr, roots, cls_of, sites
