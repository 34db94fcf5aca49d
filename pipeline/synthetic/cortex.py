"""A cortex-like network (arteriolar and venular trees feeding a capillary mesh) and its flow truth.

In: box, tree counts and radii, pressures, seed. Out: a
:class:`~pipeline.synthetic.network.VesselNetwork` whose segments carry their
vessel class, and :func:`network_flow_truth`: the whole network solved with
arteriolar roots at one pressure and venular roots at another.
"""

from __future__ import annotations

import math
from typing import Any, NamedTuple, Sequence

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ._common import _bad, _count, _make_segment, _n_steps, _node, _positive, _real, _rng, _vec3
from .network import VesselNetwork, network_tables
from .trees import _bifurcation_record
from ._cortex_trees import _TreeEdges, _grow_trees


# ------------------------------------------------------------------- cortex-like network

#: Pascal per millimetre of mercury.
MMHG_PA = 133.322

#: Vessel classes of :func:`cortex_network` (segment key ``vessel_class``).
VESSEL_CLASSES = ("arteriole", "venule", "capillary")

# Lattice nodes looked at when a terminal branch is joined to the mesh.
_SNAP_CANDIDATES = 8


def _pair(name: str, value: Any, *, low: float = 0.0, high: float | None = None) -> tuple[float, float]:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        arr = None
    ok = (
        arr is not None
        and arr.shape == (2,)
        and bool(np.all(np.isfinite(arr)))
        and arr[0] <= arr[1]
        and arr[0] >= low
        and (high is None or arr[1] <= high)
    )
    if not ok:
        span = f">= {low:g}" if high is None else f"in [{low:g}, {high:g}]"
        raise _bad(name, f"two numbers low <= high, both {span}", value)
    return float(arr[0]), float(arr[1])


def _mesh_nodes(
    rng: np.random.Generator,
    tree_pos: list[np.ndarray],
    terminals: list[int],
    n_cells: np.ndarray,
    cell: np.ndarray,
    jitter: float,
) -> tuple[np.ndarray, np.ndarray, int]:
    """Jittered lattice nodes of the capillary mesh; terminal branches take their nearest free one.

    Returns
    -------
    gid : ndarray of int64, shape (prod(n_cells),)
        Node of each lattice site: the terminal moved onto it, or a new node
        numbered after the tree nodes.
    all_pos : ndarray, shape (N, 3)
        Tree nodes, then the lattice's own nodes, µm.
    n_joined : int
        Terminals that took a lattice node.
    """
    n_tree_nodes = len(tree_pos)
    grid = np.stack(np.meshgrid(*[np.arange(n) for n in n_cells], indexing="ij"), axis=-1).reshape(-1, 3)
    lat = (grid + 0.5) * cell + rng.uniform(-jitter, jitter, size=grid.shape)
    gid = np.full(len(lat), -1, dtype=np.int64)
    order = rng.permutation(len(terminals))
    term = np.asarray(terminals, dtype=np.int64)[order]
    kq = min(_SNAP_CANDIDATES, len(lat))
    if len(term):
        _, cand = cKDTree(lat).query(np.array([tree_pos[i] for i in term]), k=kq)
        cand = np.asarray(cand).reshape(len(term), kq)
        for ti, row in zip(term.tolist(), cand.tolist()):
            free = [j for j in row if gid[j] < 0]
            if free:
                gid[free[0]] = ti
    snapped = gid >= 0
    n_joined = int(snapped.sum())
    gid[~snapped] = n_tree_nodes + np.arange(int((~snapped).sum()))
    all_pos = np.array([*tree_pos, *lat[~snapped]])
    return gid, all_pos, n_joined


def _mesh_links(
    rng: np.random.Generator,
    gid: np.ndarray,
    all_pos: np.ndarray,
    n_cells: np.ndarray,
    *,
    bend: float,
    r_cap_hi: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Bent links between neighbouring lattice sites, as dense polylines.

    Returns
    -------
    la, lb : ndarray of int64, shape (L,)
        End nodes of each link.
    link_pts : ndarray, shape (L, K, 3)
        From ``all_pos[la]`` to ``all_pos[lb]``, bowed sideways by up to ``bend``.
    """
    flat = np.arange(len(gid)).reshape(tuple(n_cells))
    links = np.concatenate([
        np.stack([np.take(flat, np.arange(n_cells[ax] - 1), axis=ax).ravel(),
                  np.take(flat, np.arange(1, n_cells[ax]), axis=ax).ravel()], axis=1)
        for ax in range(3)
    ]) if len(gid) > 1 else np.zeros((0, 2), dtype=np.int64)
    la, lb = gid[links[:, 0]], gid[links[:, 1]]
    a_pos, b_pos = all_pos[la], all_pos[lb]
    chord = b_pos - a_pos
    clen = np.linalg.norm(chord, axis=1)
    keep = clen > 2.0 * r_cap_hi  # two snapped ends can almost meet
    la, lb, a_pos, b_pos, chord, clen = la[keep], lb[keep], a_pos[keep], b_pos[keep], chord[keep], clen[keep]
    n_links = len(la)
    k_pts = _n_steps(float(clen.max(initial=1.0)) + 2.0 * bend) + 1
    tt = np.linspace(0.0, 1.0, k_pts)
    dirs = chord / np.maximum(clen, 1e-12)[:, None]
    ref = np.where(np.abs(dirs[:, :1]) < 0.9, np.array([[1.0, 0, 0]]), np.array([[0, 1.0, 0]]))
    e1 = np.cross(dirs, ref)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(dirs, e1)
    ang = rng.uniform(0, 2 * math.pi, n_links)[:, None]
    e_perp = np.cos(ang) * e1 + np.sin(ang) * e2
    amp = rng.uniform(0.0, bend, n_links)
    link_pts = (
        a_pos[:, None, :]
        + tt[None, :, None] * chord[:, None, :]
        + (amp[:, None] * (np.sin(np.pi * tt) ** 2)[None, :])[:, :, None] * e_perp[:, None, :]
    )
    link_pts[:, 0], link_pts[:, -1] = a_pos, b_pos
    return la, lb, link_pts


def _clashing(
    all_pos: np.ndarray,
    pa: np.ndarray,
    pb: np.ndarray,
    a1: np.ndarray,
    b1: np.ndarray,
    a2: np.ndarray,
    b2: np.ndarray,
    limit: float | np.ndarray,
    dist: np.ndarray,
) -> np.ndarray:
    """Point pairs closer than ``limit``, not both near a node their vessels share.

    Parameters
    ----------
    pa, pb : ndarray, shape (P, 3)
        The pairs' points; ``(a1, b1)`` and ``(a2, b2)`` the end nodes of
        their vessels, ``dist`` their distances, shape (P,).
    """
    shared = np.where((a1 == a2) | (a1 == b2), a1, np.where((b1 == a2) | (b1 == b2), b1, -1))
    meet = shared >= 0
    at = all_pos[np.where(meet, shared, 0)]
    off = np.minimum(np.linalg.norm(pa - at, axis=1), np.linalg.norm(pb - at, axis=1))
    return (dist < limit) & (~meet | (off > 2.0 * limit))


def _clashing_links(
    tr: _TreeEdges,
    all_pos: np.ndarray,
    la: np.ndarray,
    lb: np.ndarray,
    link_pts: np.ndarray,
    *,
    r_cap_hi: float,
) -> np.ndarray:
    """Links that come closer than ``1.25 (r_a + r_b) + gap`` to a tree or to another link.

    Returns
    -------
    ndarray of bool, shape (L,)
    """
    fac, gap = tr.index.factor, tr.gap
    # Clashes, judged on points about 2 µm apart. Vessels meeting at a node may
    # touch within twice their clearance of it (their tubes overlap there anyway);
    # farther out they must keep clear too, so that they part at more than about
    # 30 degrees instead of running fused side by side.
    n_links, k_pts = link_pts.shape[:2]
    sub = np.unique(np.r_[np.arange(0, k_pts, 4), k_pts - 1])
    lp = link_pts[:, sub].reshape(-1, 3)
    l_own = np.repeat(np.arange(n_links), len(sub))
    bad = np.zeros(n_links, dtype=bool)
    n_tree_edges = len(tr.a)
    if n_links and n_tree_edges:
        tp = np.concatenate([p[::2] for p in tr.pts])
        t_own = np.repeat(np.arange(n_tree_edges), [len(p[::2]) for p in tr.pts])
        t_rad = np.asarray(tr.rad)[t_own]
        ta, tb = np.asarray(tr.a)[t_own], np.asarray(tr.b)[t_own]
        reach = fac * (r_cap_hi + float(t_rad.max())) + gap
        sdm = cKDTree(lp).sparse_distance_matrix(cKDTree(tp), reach, output_type="ndarray")
        pi_, tj = sdm["i"], sdm["j"]
        li = l_own[pi_]
        hit = _clashing(
            all_pos, lp[pi_], tp[tj], la[li], lb[li], ta[tj], tb[tj], fac * (r_cap_hi + t_rad[tj]) + gap, sdm["v"]
        )
        bad[np.unique(li[hit])] = True
    if n_links:
        limit = fac * 2.0 * r_cap_hi + gap
        pairs = cKDTree(lp).query_pairs(limit, output_type="ndarray")
        pi_, pj_ = l_own[pairs[:, 0]], l_own[pairs[:, 1]]
        dist = np.linalg.norm(lp[pairs[:, 0]] - lp[pairs[:, 1]], axis=1)
        hit = (pi_ != pj_) & _clashing(
            all_pos, lp[pairs[:, 0]], lp[pairs[:, 1]], la[pi_], lb[pi_], la[pj_], lb[pj_], limit, dist
        )
        clash = np.unique(np.sort(np.stack([pi_, pj_], axis=1)[hit & ~bad[pi_] & ~bad[pj_]], axis=1), axis=0)
        # Drop the link in most clashes until none is left (only links at moved nodes clash).
        while len(clash):
            worst = int(np.argmax(np.bincount(clash.ravel(), minlength=n_links)))
            bad[worst] = True
            clash = clash[(clash[:, 0] != worst) & (clash[:, 1] != worst)]
    return bad


def _thin_to_three(
    rng: np.random.Generator, bad: np.ndarray, la: np.ndarray, lb: np.ndarray, tr: _TreeEdges, n_nodes: int
) -> None:
    """Drop links (``bad`` in place), in random order, while both their nodes keep more than three vessels."""
    deg = np.bincount(np.r_[tr.a, tr.b, la[~bad], lb[~bad]].astype(np.int64), minlength=n_nodes)
    for li_ in rng.permutation(np.flatnonzero(~bad)).tolist():
        a, b = la[li_], lb[li_]
        if deg[a] > 3 and deg[b] > 3:
            bad[li_] = True
            deg[a] -= 1
            deg[b] -= 1


def _build_mesh(
    rng: np.random.Generator,
    tr: _TreeEdges,
    n_cells: np.ndarray,
    cell: np.ndarray,
    spare: float,
    *,
    r_cap_hi: float,
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, int]:
    """The capillary mesh, fed and drained by the trees' terminal branches.

    Returns
    -------
    la, lb : ndarray of int64, shape (L,)
        End nodes of the links kept.
    link_pts : ndarray, shape (L, K, 3)
        Their polylines.
    all_pos : ndarray, shape (N, 3)
        Tree nodes, then the mesh's own nodes, µm.
    n_joined : int
        Terminal branches joined to the mesh.
    """
    spare_jit = min(0.15 * float(cell.min()), 0.3 * spare)
    bend = min(0.1 * float(cell.min()), 0.2 * spare)
    gid, all_pos, n_joined = _mesh_nodes(rng, tr.pos, tr.terminals, n_cells, cell, spare_jit)
    la, lb, link_pts = _mesh_links(rng, gid, all_pos, n_cells, bend=bend, r_cap_hi=r_cap_hi)
    bad = _clashing_links(tr, all_pos, la, lb, link_pts, r_cap_hi=r_cap_hi)
    _thin_to_three(rng, bad, la, lb, tr, len(all_pos))
    ok = ~bad
    return la[ok], lb[ok], link_pts[ok], all_pos, n_joined


class _Joined(NamedTuple):
    """The whole network's edges and nodes before pruning.

    Edges are the tree edges first (oriented root side -> depth), then the
    kept capillary links; all arrays but ``pos`` and ``is_root`` have one
    entry per edge.
    """

    a: np.ndarray  # int64 end nodes
    b: np.ndarray
    cls: np.ndarray  # index into VESSEL_CLASSES
    tree: np.ndarray  # penetrating vessel, -1 for capillaries
    rad: np.ndarray
    pts: list[np.ndarray]  # polylines (K, 3) from a to b
    pos: np.ndarray  # (N, 3) node positions, µm
    is_root: np.ndarray  # (N,) bool
    n_tree_edges: int


def _join(
    rng: np.random.Generator,
    tr: _TreeEdges,
    la: np.ndarray,
    lb: np.ndarray,
    link_pts: np.ndarray,
    all_pos: np.ndarray,
    roots: np.ndarray,
    r_cap: tuple[float, float],
) -> _Joined:
    """One edge list of the trees and the mesh; each capillary link draws its radius."""
    n_cap = len(la)
    # Each capillary link draws its radius now; a merged chain takes that of its
    # first link, so radii stay put while the pruning reshapes chains.
    rad = np.r_[np.asarray(tr.rad, dtype=float), rng.uniform(r_cap[0], r_cap[1], n_cap)]
    is_root = np.zeros(len(all_pos), dtype=bool)
    is_root[roots] = True
    return _Joined(
        a=np.r_[np.asarray(tr.a, dtype=np.int64), la],
        b=np.r_[np.asarray(tr.b, dtype=np.int64), lb],
        cls=np.r_[np.asarray(tr.cls, dtype=np.int64), np.full(n_cap, 2)],
        tree=np.r_[np.asarray(tr.tree, dtype=np.int64), np.full(n_cap, -1)],
        rad=rad,
        pts=list(tr.pts) + list(link_pts),
        pos=all_pos,
        is_root=is_root,
        n_tree_edges=len(tr.a),
    )


def _prune(
    g: _Joined, alive: np.ndarray, roots: np.ndarray, cls_of: np.ndarray, *, shape_um: Any
) -> np.ndarray:
    """The edges of ``alive`` left once dead ends and pieces without both kinds of root are gone.

    Parameters
    ----------
    alive : ndarray of bool, shape (E,)
        Edges to start from (not changed).
    roots, cls_of : ndarray, shape (n,)
        Each tree's root node and class.
    shape_um
        As given, for the error message.

    Returns
    -------
    ndarray of bool, shape (E,)
    """
    n_nodes = len(g.pos)
    alive = alive.copy()
    while True:
        deg = np.bincount(g.a[alive], minlength=n_nodes) + np.bincount(g.b[alive], minlength=n_nodes)
        dead_end = (deg == 1) & ~g.is_root
        kill = alive & (dead_end[g.a] | dead_end[g.b])
        if not kill.any():
            # A tree branch whose end keeps one capillary would merge with it into a
            # segment of two classes; the branch goes, and the capillary end next round.
            lo_c = np.full(n_nodes, 9)
            hi_c = np.full(n_nodes, -1)
            for ends in (g.a, g.b):
                np.minimum.at(lo_c, ends[alive], g.cls[alive])
                np.maximum.at(hi_c, ends[alive], g.cls[alive])
            mixed = (deg == 2) & (lo_c != hi_c)
            kill = alive & (g.cls != 2) & (mixed[g.a] | mixed[g.b])
        if not kill.any():
            break
        alive &= ~kill
    # Keep the pieces that hold an arteriole root and a venule root.
    adj = coo_matrix((np.ones(int(alive.sum())), (g.a[alive], g.b[alive])), shape=(n_nodes, n_nodes))
    _, comp = connected_components(adj, directed=False)
    both = set(comp[roots[cls_of == 0]].tolist()) & set(comp[roots[cls_of == 1]].tolist())
    good = np.zeros(int(comp.max()) + 1, dtype=bool)
    good[sorted(both)] = True
    alive &= good[comp[g.a]]
    if not alive.any():
        raise _bad("shape_um", "a box that holds connected arteriolar and venular trees", shape_um)
    return alive


def _merged_chains(g: _Joined, alive: np.ndarray) -> tuple[list[tuple[list[int], list[int]]], np.ndarray]:
    """Chains of kept edges through nodes of two vessels, tree chains oriented from the root side.

    Returns
    -------
    chains : list of (list of int, list of int)
        Node and edge sequences.
    deg : ndarray of int, shape (N,)
        Kept vessels at each node.
    """
    deg = np.bincount(g.a[alive], minlength=len(g.pos)) + np.bincount(g.b[alive], minlength=len(g.pos))
    incident: dict[int, list[int]] = {}
    for ei in np.flatnonzero(alive).tolist():
        incident.setdefault(int(g.a[ei]), []).append(ei)
        incident.setdefault(int(g.b[ei]), []).append(ei)
    used = np.zeros(len(g.a), dtype=bool)
    chains: list[tuple[list[int], list[int]]] = []
    for nd in sorted(n for n in incident if deg[n] != 2 or g.is_root[n]):
        for ei in incident[nd]:
            if used[ei]:
                continue
            seq_n, seq_e, cur = [nd], [], nd
            while True:
                used[ei] = True
                nxt = int(g.b[ei]) if g.a[ei] == cur else int(g.a[ei])
                seq_e.append(ei)
                seq_n.append(nxt)
                if deg[nxt] != 2 or g.is_root[nxt] or nxt == nd:
                    break
                ei = next(x for x in incident[nxt] if not used[x])
                cur = nxt
            if g.cls[seq_e[0]] != 2 and g.a[seq_e[0]] != seq_n[0]:
                seq_n, seq_e = seq_n[::-1], seq_e[::-1]
            chains.append((seq_n, seq_e))
    return chains, deg


def _assemble(
    g: _Joined, alive: np.ndarray, forks: list[dict]
) -> tuple[list[dict], list[dict], list[dict], list[list[int]]]:
    """Nodes and segments of the kept edges; chains through nodes of two vessels merged.

    Returns
    -------
    nodes, segs, bifs : list of dict
        Nodes, segments and the records of the forks left with three vessels.
    seg_edges : list of list of int
        Each segment's edges, from ``node_from`` on.
    """
    chains, deg = _merged_chains(g, alive)
    # Every piece holds a root (one vessel), so no cycle is left without an end node.
    node_new: dict[int, int] = {}
    nodes: list[dict] = []
    for n_g in sorted({c[0][0] for c in chains} | {c[0][-1] for c in chains}):
        node_new[n_g] = len(nodes)
        nodes.append(_node(len(nodes), g.pos[n_g], "border" if g.is_root[n_g] else "junction"))
    segs: list[dict] = []
    edge_seg = np.full(len(g.a), -1, dtype=np.int64)
    for ci, (seq_n, seq_e) in enumerate(chains):
        cls = int(g.cls[seq_e[0]])
        parts, radii = [], []
        for k, ei in enumerate(seq_e):
            p = g.pts[ei] if g.a[ei] == seq_n[k] else g.pts[ei][::-1]
            p = p if k == 0 else p[1:]
            parts.append(p)
            radii.append(np.full(len(p), g.rad[min(seq_e)] if cls == 2 else g.rad[ei]))
        edge_seg[seq_e] = ci
        segs.append(
            _make_segment(
                ci, nodes[node_new[seq_n[0]]], nodes[node_new[seq_n[-1]]], np.concatenate(parts),
                np.concatenate(radii), vessel_class=VESSEL_CLASSES[cls], tree=int(g.tree[seq_e[0]]),
            )
        )
    bifs = []
    for rec in forks:
        es = [rec["parent"], *rec["kids"]]
        if rec["node"] in node_new and deg[rec["node"]] == 3 and alive[es].all():
            r0, r1, r2 = rec["r"]
            b = _bifurcation_record(
                node_new[rec["node"]], 0, edge_seg[es[0]], edge_seg[es[1]], edge_seg[es[2]], r0, r1, r2,
                3.0, rec["th"][0], rec["th"][1], False,
            )
            del b["level"]  # forks along a trunk and in its branches have no common level
            b["vessel_class"] = VESSEL_CLASSES[int(g.cls[es[0]])]
            bifs.append(b)
    return nodes, segs, bifs, [c[1] for c in chains]


def _subtree(children: dict[int, list[int]], ends: np.ndarray, ei: int) -> list[int]:
    """Tree edge ``ei`` and every tree edge below it (``children``: tree edges by their first node)."""
    out, todo = [], [ei]
    while todo:
        e = todo.pop()
        out.append(e)
        todo.extend(children.get(int(ends[e]), []))
    return out


def _settle(
    g: _Joined,
    alive: np.ndarray,
    *,
    forks: list[dict],
    roots: np.ndarray,
    cls_of: np.ndarray,
    box: np.ndarray,
    flow_consistent: bool,
    shape_um: Any,
) -> tuple[VesselNetwork, np.ndarray, int]:
    """The network of the kept edges; with ``flow_consistent``, tree branches against the flow removed.

    Returns
    -------
    net : VesselNetwork
    alive : ndarray of bool, shape (E,)
        Edges kept.
    n_against : int
        Tree segments removed for their flow.
    """
    children: dict[int, list[int]] = {}
    for ei in range(g.n_tree_edges):
        children.setdefault(int(g.a[ei]), []).append(ei)
    n_against = 0
    while True:
        nodes, segs, bifs, seg_edges = _assemble(g, alive, forks)
        net = VesselNetwork(nodes, segs, kind="cortex", bifurcations=bifs, box_um=tuple(box.tolist()))
        if not flow_consistent:
            break
        res = network_flow_truth(net)
        q = res.segments["flow_nl_min"].to_numpy()
        # A margin over rounding, so that a check of the sign alone never meets a tie.
        tiny = 1e-6 * float(res.summary["total_inflow_nl_min"] or 0.0)
        cls_seg = np.array([VESSEL_CLASSES.index(s["vessel_class"]) for s in segs])
        against = np.flatnonzero(((cls_seg == 0) & (q <= tiny)) | ((cls_seg == 1) & (q >= -tiny)))
        if not len(against):
            break
        n_against += len(against)
        # The branch and everything it feeds or drains go; the pruning tidies up after them.
        kill = np.zeros(len(g.a), dtype=bool)
        for si in against.tolist():
            kill[_subtree(children, g.b, seg_edges[si][0])] = True
        alive = _prune(g, alive & ~kill, roots, cls_of, shape_um=shape_um)
    return net, alive, n_against


def cortex_network(
    *,
    shape_um: Sequence[float] = (400.0, 400.0, 400.0),
    n_arterioles: int = 4,
    n_venules: int = 5,
    seed: int | None = None,
    arteriole_radius_um: float = 7.0,
    venule_radius_factor: float = 1.5,
    depth_fraction: Sequence[float] = (0.6, 0.85),
    trunk_branch_interval_um: Sequence[float] = (40.0, 100.0),
    side_asymmetry: Sequence[float] = (0.5, 0.85),
    asymmetry: Sequence[float] = (0.6, 1.0),
    length_radius_ratio: float = 12.0,
    min_tree_radius_um: float = 2.5,
    capillary_radius_um: Sequence[float] = (2.0, 3.0),
    capillary_spacing_um: float = 60.0,
    min_gap_um: float = 2.0,
    flow_consistent: bool = True,
) -> VesselNetwork:
    """Cortex-like network: penetrating arteriolar and venular trees feeding a capillary mesh.

    The box's face ``z = 0`` is the pial surface. Each penetrating vessel
    (trunk) enters there (a 'border' node, its root) and runs into the depth,
    tilting a little at each node, to ``depth_fraction`` of the box. At every
    trunk node a side branch leaves it, and the trunk's last node forks; side
    branches fork in turn until a daughter would be thinner than
    ``min_tree_radius_um`` (venules: that times ``venule_radius_factor``).
    Every fork obeys Murray's cube law ``r0^3 = r1^3 + r2^3`` (Murray CD
    1926, PNAS 12:207) with the smaller daughter ``q`` times the larger,
    ``q`` drawn uniformly from ``side_asymmetry`` (at trunk nodes: the trunk
    keeps most of its calibre) or ``asymmetry`` (elsewhere); the daughters
    leave at Murray's minimum-work angles (Murray CD 1926, J Gen Physiol
    9:835) in a random plane. Segments are straight and
    ``length_radius_ratio`` times their radius long (times a uniform factor
    in [0.8, 1.25]). Venular trees are arteriolar ones scaled by
    ``venule_radius_factor`` in radius (penetrating venules are about 1.2-2
    times the diameter of penetrating arterioles in rodent cortex; from
    memory). A branch that does not fit (box, clearance) is not made.

    The capillary mesh is a jittered cubic lattice of period about
    ``capillary_spacing_um`` filling the box (no links leave it). Each
    terminal branch of a tree takes the nearest free lattice node and moves
    it onto its end, so the tree feeds (or drains) the mesh there. Lattice
    links that come closer than ``1.25 (r_a + r_b) + min_gap_um`` to a tree
    or to another link are dropped (vessels meeting at a node only beyond
    twice that distance from it); links are then removed in random order
    while both their nodes keep more than three vessels, so most mesh nodes
    join three vessels, as in cortical capillary beds. Dead ends are pruned
    (a tree branch whose end keeps a single capillary goes too), pieces
    without both an arteriole and a venule root are dropped, and chains
    through nodes of two vessels are merged into one segment (a capillary
    chain takes the radius, uniform in ``capillary_radius_um``, of its first
    lattice link; a tree chain keeps each part's radius).

    With ``flow_consistent`` the network is then solved with
    :func:`network_flow_truth` (its defaults: the in-vivo viscosity law), and
    every arteriole or venule whose flow runs against its class (arteriolar
    flow towards the root, venular flow away from it, or less than 1e-6 of
    the total inflow either way) goes with the branches it feeds or drains;
    the pruning and solving repeat until none is left. Such a branch joins
    parts of the mesh at different pressures, which a generated tree can do
    and a perfused one does not keep. Flows scale with the pressure
    difference (viscosities depend on diameters and haematocrits, and
    haematocrits on flow ratios only), so the directions hold for any pair of
    pressures with the arteriolar one higher, for the rheology used.

    Defaults (from memory, mouse cortex): penetrating arteriole diameter
    about 14 µm, capillary diameter 4-6 µm, capillary segments 40-80 µm
    between branch points, a vessel volume fraction of 2-3 %; the default
    box is a typical two-photon stack. With them the truth solve (project
    flow defaults) gives a cortical blood flow of 0.9-1.4 ml/min per g
    (56-90 nl/min into the default box, seeds 0-4; about 1 ml/min per g in
    mice, from memory) and median capillary mean speeds of 0.26-0.39 mm/s.

    Parameters
    ----------
    shape_um : sequence of 3 float
        Box ``(Z, Y, X)`` µm; z is the depth below the pial surface.
    n_arterioles, n_venules : int
        Penetrating arterioles and venules (at least one each).
    seed : int, optional
        Random seed; the network is a function of the seed and parameters.
    arteriole_radius_um : float
        Radius of a penetrating arteriole at the surface.
    venule_radius_factor : float
        Venular over arteriolar radii (>= 1): roots and the thinnest branch.
    depth_fraction : (float, float)
        Range of the trunks' depth, as a fraction of ``Z``.
    trunk_branch_interval_um : (float, float)
        Range of the distance between consecutive trunk nodes.
    side_asymmetry, asymmetry : (float, float)
        Ranges of the daughter radius ratio (small / large), in (0, 1].
    length_radius_ratio : float
        Tree segment length over its radius.
    min_tree_radius_um : float
        No arteriole thinner than this (venules: times
        ``venule_radius_factor``); thinner daughters are not made and their
        parent ends in the mesh.
    capillary_radius_um : (float, float)
        Range of capillary radii.
    capillary_spacing_um : float
        Lattice period of the capillary mesh (cells are fitted to the box).
    min_gap_um : float
        Smallest gap between the walls of vessels that do not meet.
    flow_consistent : bool
        Remove tree branches whose truth flow runs against their class (see
        above). False keeps the network as grown.

    Returns
    -------
    VesselNetwork
        ``kind`` 'cortex', ``box_um = shape_um``. Segments carry
        ``vessel_class`` ('arteriole', 'venule', 'capillary') and ``tree``
        (index of their penetrating vessel, -1 for capillaries); tree
        segments run from the root side (``node_from``) to the depth, so
        arteriolar flow is positive and venular flow negative. Roots are the
        only 'border' nodes, all others are junctions. ``bifurcations`` lists
        the tree forks left with three vessels (radii, Murray angles,
        ``vessel_class``); ``params`` the inputs, ``trunk_sites_um`` and the
        counts ``n_terminals``, ``n_terminals_joined`` (to the mesh),
        ``n_tree_segments_against_flow`` (removed), ``n_edges_pruned`` and
        ``n_segments_by_class``.
    """
    box = _vec3("shape_um", shape_um, positive=True)
    n_art = _count("n_arterioles", n_arterioles, low=1, high=1000)
    n_ven = _count("n_venules", n_venules, low=1, high=1000)
    rng = _rng(seed)
    r_art = _positive("arteriole_radius_um", arteriole_radius_um)
    v_fac = _real("venule_radius_factor", venule_radius_factor, low=1.0)
    depth_rng = _pair("depth_fraction", depth_fraction, low=0.05, high=1.0)
    interval = _pair("trunk_branch_interval_um", trunk_branch_interval_um, low=1.0)
    side_q = _pair("side_asymmetry", side_asymmetry, low=0.05, high=1.0)
    tree_q = _pair("asymmetry", asymmetry, low=0.05, high=1.0)
    ratio = _real("length_radius_ratio", length_radius_ratio, low=2.0)
    r_min = _positive("min_tree_radius_um", min_tree_radius_um)
    r_cap = _pair("capillary_radius_um", capillary_radius_um, low=0.1)
    period = _positive("capillary_spacing_um", capillary_spacing_um)
    gap = _real("min_gap_um", min_gap_um, low=0.0)
    if not isinstance(flow_consistent, (bool, np.bool_)):
        raise _bad("flow_consistent", "True or False", flow_consistent)
    if r_art < r_min:
        raise _bad("arteriole_radius_um", f"a value >= min_tree_radius_um ({r_min:g})", arteriole_radius_um)
    n_cells = np.maximum(1, np.round(box / period)).astype(int)
    cell = box / n_cells
    spare = float(cell.min()) - 2.0 * r_cap[1] - gap
    if spare <= 0:
        raise _bad(
            "capillary_spacing_um",
            f"a lattice period (fitted to the box: {cell.min():.1f} um) above 2 * the largest capillary "
            f"radius + min_gap_um ({2.0 * r_cap[1] + gap:g} um)",
            capillary_spacing_um,
        )

    tr, roots, cls_of, sites = _grow_trees(
        rng, box, n_art=n_art, n_ven=n_ven, r_art=r_art, v_fac=v_fac, r_min=r_min, depth_range=depth_rng,
        interval=interval, side_q=side_q, tree_q=tree_q, ratio=ratio, gap=gap, shape_um=shape_um,
    )
    la, lb, link_pts, all_pos, n_joined = _build_mesh(rng, tr, n_cells, cell, spare, r_cap_hi=r_cap[1])
    g = _join(rng, tr, la, lb, link_pts, all_pos, roots, r_cap)
    alive = _prune(g, np.ones(len(g.a), dtype=bool), roots, cls_of, shape_um=shape_um)
    net, alive, n_against = _settle(
        g, alive, forks=tr.forks, roots=roots, cls_of=cls_of, box=box, flow_consistent=flow_consistent,
        shape_um=shape_um,
    )

    counts = {c: sum(1 for s in net.segments if s["vessel_class"] == c) for c in VESSEL_CLASSES}
    net.params = {
        "shape_um": box,
        "n_arterioles": n_art,
        "n_venules": n_ven,
        "seed": seed,
        "arteriole_radius_um": r_art,
        "venule_radius_factor": v_fac,
        "depth_fraction": list(depth_rng),
        "trunk_branch_interval_um": list(interval),
        "side_asymmetry": list(side_q),
        "asymmetry": list(tree_q),
        "length_radius_ratio": ratio,
        "min_tree_radius_um": r_min,
        "capillary_radius_um": list(r_cap),
        "capillary_spacing_um": period,
        "min_gap_um": gap,
        "flow_consistent": flow_consistent,
        "lattice_period_um": cell,
        "trunk_sites_um": [
            {"vessel_class": VESSEL_CLASSES[int(cls_of[t])], "tree": t, "yx_um": sites[t]}
            for t in range(n_art + n_ven)
        ],
        "n_terminals": len(tr.terminals),
        "n_terminals_joined": n_joined,
        "n_tree_segments_against_flow": n_against,
        "n_edges_pruned": int(len(g.a) - alive.sum()),
        "n_segments_by_class": counts,
    }
    return net


def network_flow_truth(
    net: VesselNetwork,
    *,
    arteriole_pressure_pa: float = 55.0 * MMHG_PA,
    venule_pressure_pa: float = 18.0 * MMHG_PA,
    **flow_options: Any,
):
    """Steady flow of a whole network with its vessel classes as boundary conditions.

    Every 'border' end of an arteriole is held at ``arteriole_pressure_pa``
    (inlets), every 'border' end of a venule at ``venule_pressure_pa``
    (outlets); all other ends are sealed. On a network from
    :func:`cortex_network` these are exactly the roots of the penetrating
    vessels on the pial face. Defaults (from memory): penetrating arterioles
    about 50-60 mmHg, penetrating venules about 15-20 mmHg in rodent cortex.

    Parameters
    ----------
    net : VesselNetwork
        Segments with ``vessel_class`` (see :data:`VESSEL_CLASSES`).
    arteriole_pressure_pa, venule_pressure_pa : float
        Boundary pressures, Pa; the arteriolar one must be the higher.
    **flow_options
        Options of :func:`pipeline.flow.solve_flow` (viscosity law,
        haematocrit and its model, solver); missing ones take the project's
        defaults (the in-vivo viscosity law, with phase separation).
        ``boundary`` ('pressure'), the two pressures, ``blind_ends``
        ('sealed') and ``inlet_flow_nl_min`` (None) are set here.

    Returns
    -------
    FlowResult
        From :func:`pipeline.flow.solve_flow`; its ``segments`` table is keyed
        by the network's segment ids (``segment_id``), ``flow_nl_min`` is
        positive from ``node_from`` to ``node_to``, and ``nodes`` holds each
        node's ``pressure_pa``.

    Raises
    ------
    InputError
        A segment without ``vessel_class``, no arteriolar or no venular
        border end, or pressures in the wrong order.
    """
    from ..flow import solve_flow

    if not isinstance(net, VesselNetwork):
        raise _bad("net", "a VesselNetwork", type(net).__name__)
    p_art = _real("arteriole_pressure_pa", arteriole_pressure_pa)
    p_ven = _real("venule_pressure_pa", venule_pressure_pa)
    if not p_art > p_ven:
        raise _bad("arteriole_pressure_pa", f"a pressure above venule_pressure_pa ({p_ven:g} Pa)", p_art)
    missing = [s["id"] for s in net.segments if s.get("vessel_class") not in VESSEL_CLASSES]
    if missing:
        raise _bad(
            f"segment {missing[0]} vessel_class", "one of " + ", ".join(VESSEL_CLASSES),
            net.segments[[s["id"] for s in net.segments].index(missing[0])].get("vessel_class"),
        )
    segments, nodes = network_tables(net)
    border = set(nodes.loc[nodes["kind"] == "border", "node_id"].tolist())
    ends = {"arteriole": set(), "venule": set()}
    for s in net.segments:
        if s["vessel_class"] in ends:
            ends[s["vessel_class"]] |= {s["node_from"], s["node_to"]} & border
    if not ends["arteriole"] or not ends["venule"]:
        raise _bad("net", "border ends of both arterioles and venules", {k: len(v) for k, v in ends.items()})
    options = {**flow_options, "boundary": "pressure", "inlet_pressure_pa": p_art, "outlet_pressure_pa": p_ven,
               "blind_ends": "sealed", "inlet_flow_nl_min": None}
    return solve_flow(segments, nodes, inlets=sorted(ends["arteriole"]), outlets=sorted(ends["venule"]), **options)

