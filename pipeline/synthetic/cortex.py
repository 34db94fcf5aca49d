"""A cortex-like network (arteriolar and venular trees feeding a capillary mesh) and its flow truth.

In: box, tree counts and radii, pressures, seed. Out: a
:class:`~pipeline.synthetic.network.VesselNetwork` whose segments carry their
vessel class, and :func:`network_flow_truth`: the whole network solved with
arteriolar roots at one pressure and venular roots at another.
"""

from __future__ import annotations

import math
from typing import Any, Mapping, Sequence

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from ._common import (
    _any_perpendicular, _bad, _count, _line_points, _make_segment, _n_steps, _node, _positive, _real, _rng, _rotate,
    _unit, _vec3,
)
from .network import VesselNetwork, network_tables
from .trees import (
    _Clearance, _bifurcation_record, _daughter_directions, _siblings_apart, murray_angles_deg,
    murray_daughter_radii,
)


# ------------------------------------------------------------------- cortex-like network

#: Pascal per millimetre of mercury.
MMHG_PA = 133.322

#: Vessel classes of :func:`cortex_network` (segment key ``vessel_class``).
VESSEL_CLASSES = ("arteriole", "venule", "capillary")

# Directions tried for a branch before its parent is left to end in the mesh.
_BRANCH_TRIES = 12
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

    # ---- trees: trunks first (all of them), then their branches, tree by tree.
    pos: list[np.ndarray] = []
    e_a: list[int] = []
    e_b: list[int] = []
    e_pts: list[np.ndarray] = []
    e_rad: list[float] = []
    e_cls: list[int] = []
    e_tree: list[int] = []
    index = _Clearance(gap)
    fac = index.factor
    bif_design: list[dict] = []
    terminals: list[int] = []

    def new_node(p: np.ndarray) -> int:
        pos.append(np.asarray(p, dtype=float))
        return len(pos) - 1

    def fits(pts: np.ndarray, r: float, exclude: set[int], *, from_surface: bool = False) -> bool:
        m = fac * r + gap
        lo = np.full(3, m)
        if from_surface:
            lo[0] = 0.0  # a trunk starts on the pial face
        sample = pts[::2]
        if np.any(sample < lo) or np.any(sample > box - m):
            return False
        return index.clear(sample, r, exclude)

    def add_edge(a: int, b: int, pts: np.ndarray, r: float, cls: int, tree: int, clear_r: float) -> int:
        eid = len(e_a)
        e_a.append(a)
        e_b.append(b)
        e_pts.append(pts)
        e_rad.append(r)
        e_cls.append(cls)
        e_tree.append(tree)
        index.add(pts[::2], clear_r, eid)
        return eid

    n_tot = n_art + n_ven
    cls_of = rng.permutation(np.r_[np.zeros(n_art, dtype=int), np.ones(n_ven, dtype=int)])
    sites = _trunk_sites(rng, n_tot, box)
    root_r = np.where(cls_of == 0, r_art, r_art * v_fac)
    r_min_cls = (r_min, r_min * v_fac)
    trunks: list[tuple[list[int], list[int]]] = []  # (node ids, edge ids) from the root down
    roots = np.zeros(n_tot, dtype=np.int64)
    for t in range(n_tot):
        r0 = float(root_r[t])
        p = np.r_[0.0, sites[t]]
        roots[t] = new_node(p)
        nodes_t, edges_t = [int(roots[t])], []
        z_end = rng.uniform(*depth_rng) * box[0]
        while p[0] < z_end - 0.5 * interval[0]:
            step = min(rng.uniform(*interval), max(z_end - p[0], 1.0))
            # A few degrees of tilt per node; the lateral part turns back near the side faces.
            d = _unit(np.r_[1.0, rng.normal(0.0, 0.08, 2)])
            near = ((p[1:] < 0.15 * box[1:]) & (d[1:] < 0)) | ((p[1:] > 0.85 * box[1:]) & (d[1:] > 0))
            d[1:][near] *= -1.0
            q = p + step * d
            pts = _line_points(p, q)
            if not fits(pts, r0, set(edges_t[-1:]), from_surface=not edges_t):
                break
            b = new_node(q)
            edges_t.append(add_edge(nodes_t[-1], b, pts, r0, int(cls_of[t]), t, r0))
            nodes_t.append(b)
            p = q
        if not edges_t:
            raise _bad("shape_um", "a box deep enough for the penetrating vessels", shape_um)
        trunks.append((nodes_t, edges_t))

    def fork(e: int, node: int, r: float, q_range: tuple[float, float], stack: list) -> None:
        """Two daughters at the end of edge ``e``, or none (the end joins the mesh)."""
        q = rng.uniform(*q_range)
        r1, r2 = murray_daughter_radii(r, exponent=3.0, asymmetry=q)
        if r2 < r_min_cls[e_cls[e]]:
            terminals.append(node)
            return
        th1, th2 = murray_angles_deg(r, r1, r2)
        l1, l2 = ratio * r1 * rng.uniform(0.8, 1.25), ratio * r2 * rng.uniform(0.8, 1.25)
        start = pos[node]
        d = _unit(start - pos[e_a[e]])
        if _siblings_apart(r1, r2, th1, th2, l1, l2):
            for _ in range(_BRANCH_TRIES):
                normal = _rotate(_any_perpendicular(d), d, rng.uniform(0.0, 2.0 * math.pi))
                d1, d2 = _daughter_directions(d, normal, th1, th2)
                p1, p2 = _line_points(start, start + l1 * d1), _line_points(start, start + l2 * d2)
                if fits(p1, r1, {e}) and fits(p2, r2, {e}):
                    kids = []
                    for pk, rk in ((p1, r1), (p2, r2)):
                        b = new_node(pk[-1])
                        kids.append(add_edge(node, b, pk, rk, e_cls[e], e_tree[e], rk))
                        stack.append((kids[-1], b, rk))
                    bif_design.append(dict(node=node, parent=e, kids=kids, r=(r, r1, r2), th=(th1, th2)))
                    return
        terminals.append(node)

    for t in rng.permutation(n_tot).tolist():
        nodes_t, edges_t = trunks[t]
        r = float(root_r[t])
        e_rad[edges_t[0]] = r
        stack: list[tuple[int, int, float]] = []
        for k in range(1, len(nodes_t) - 1):
            node, e_in, e_out = nodes_t[k], edges_t[k - 1], edges_t[k]
            q = rng.uniform(*side_q)
            r_cont, r_side = murray_daughter_radii(r, exponent=3.0, asymmetry=q)
            placed = False
            if r_side >= r_min_cls[e_cls[e_in]]:
                th1, th2 = murray_angles_deg(r, r_cont, r_side)
                d = _unit(pos[nodes_t[k + 1]] - pos[node])
                length = ratio * r_side * rng.uniform(0.8, 1.25)
                for _ in range(_BRANCH_TRIES):
                    az = rng.uniform(0.0, 2.0 * math.pi)
                    u = _rotate(_any_perpendicular(d), d, az)
                    ds = _unit(math.cos(math.radians(th2)) * d + math.sin(math.radians(th2)) * u)
                    pts = _line_points(pos[node], pos[node] + length * ds)
                    if fits(pts, r_side, {e_in, e_out}):
                        b = new_node(pts[-1])
                        side = add_edge(node, b, pts, r_side, e_cls[e_in], t, r_side)
                        bif_design.append(dict(
                            node=node, parent=e_in, kids=[e_out, side], r=(r, r_cont, r_side), th=(th1, th2)
                        ))
                        stack.append((side, b, r_side))
                        placed = True
                        break
            if placed:
                r = r_cont
            e_rad[e_out] = r
            while stack:  # depth first, so each side branch is done before the trunk goes on
                e, node_s, r_s = stack.pop()
                fork(e, node_s, r_s, tree_q, stack)
        fork(edges_t[-1], nodes_t[-1], r, tree_q, stack)
        while stack:
            e, node_s, r_s = stack.pop()
            fork(e, node_s, r_s, tree_q, stack)

    # ---- capillary lattice; terminal branches take their nearest free node.
    n_tree_nodes = len(pos)
    spare_jit = min(0.15 * float(cell.min()), 0.3 * spare)
    bend = min(0.1 * float(cell.min()), 0.2 * spare)
    grid = np.stack(np.meshgrid(*[np.arange(n) for n in n_cells], indexing="ij"), axis=-1).reshape(-1, 3)
    lat = (grid + 0.5) * cell + rng.uniform(-spare_jit, spare_jit, size=grid.shape)
    gid = np.full(len(lat), -1, dtype=np.int64)
    order = rng.permutation(len(terminals))
    term = np.asarray(terminals, dtype=np.int64)[order]
    kq = min(_SNAP_CANDIDATES, len(lat))
    if len(term):
        _, cand = cKDTree(lat).query(np.array([pos[i] for i in term]), k=kq)
        cand = np.asarray(cand).reshape(len(term), kq)
        for ti, row in zip(term.tolist(), cand.tolist()):
            free = [j for j in row if gid[j] < 0]
            if free:
                gid[free[0]] = ti
    snapped = gid >= 0
    n_joined = int(snapped.sum())
    gid[~snapped] = n_tree_nodes + np.arange(int((~snapped).sum()))
    pos.extend(lat[~snapped])
    all_pos = np.array(pos)

    flat = np.arange(len(grid)).reshape(tuple(n_cells))
    links = np.concatenate([
        np.stack([np.take(flat, np.arange(n_cells[ax] - 1), axis=ax).ravel(),
                  np.take(flat, np.arange(1, n_cells[ax]), axis=ax).ravel()], axis=1)
        for ax in range(3)
    ]) if len(grid) > 1 else np.zeros((0, 2), dtype=np.int64)
    la, lb = gid[links[:, 0]], gid[links[:, 1]]
    a_pos, b_pos = all_pos[la], all_pos[lb]
    chord = b_pos - a_pos
    clen = np.linalg.norm(chord, axis=1)
    keep = clen > 2.0 * r_cap[1]  # two snapped ends can almost meet
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

    # Clashes, judged on points about 2 µm apart. Vessels meeting at a node may
    # touch within twice their clearance of it (their tubes overlap there anyway);
    # farther out they must keep clear too, so that they part at more than about
    # 30 degrees instead of running fused side by side.
    sub = np.unique(np.r_[np.arange(0, k_pts, 4), k_pts - 1])
    lp = link_pts[:, sub].reshape(-1, 3)
    l_own = np.repeat(np.arange(n_links), len(sub))
    bad = np.zeros(n_links, dtype=bool)
    n_tree_edges = len(e_a)

    def clashing(pa, pb, a1, b1, a2, b2, limit, dist):
        """Point pairs closer than ``limit``, not both near a node their vessels share."""
        shared = np.where((a1 == a2) | (a1 == b2), a1, np.where((b1 == a2) | (b1 == b2), b1, -1))
        meet = shared >= 0
        at = all_pos[np.where(meet, shared, 0)]
        off = np.minimum(np.linalg.norm(pa - at, axis=1), np.linalg.norm(pb - at, axis=1))
        return (dist < limit) & (~meet | (off > 2.0 * limit))

    if n_links and n_tree_edges:
        tp = np.concatenate([p[::2] for p in e_pts])
        t_own = np.repeat(np.arange(n_tree_edges), [len(p[::2]) for p in e_pts])
        t_rad = np.asarray(e_rad)[t_own]
        ta, tb = np.asarray(e_a)[t_own], np.asarray(e_b)[t_own]
        reach = fac * (r_cap[1] + float(t_rad.max())) + gap
        sdm = cKDTree(lp).sparse_distance_matrix(cKDTree(tp), reach, output_type="ndarray")
        pi_, tj = sdm["i"], sdm["j"]
        li = l_own[pi_]
        hit = clashing(
            lp[pi_], tp[tj], la[li], lb[li], ta[tj], tb[tj], fac * (r_cap[1] + t_rad[tj]) + gap, sdm["v"]
        )
        bad[np.unique(li[hit])] = True
    if n_links:
        limit = fac * 2.0 * r_cap[1] + gap
        pairs = cKDTree(lp).query_pairs(limit, output_type="ndarray")
        pi_, pj_ = l_own[pairs[:, 0]], l_own[pairs[:, 1]]
        dist = np.linalg.norm(lp[pairs[:, 0]] - lp[pairs[:, 1]], axis=1)
        hit = (pi_ != pj_) & clashing(
            lp[pairs[:, 0]], lp[pairs[:, 1]], la[pi_], lb[pi_], la[pj_], lb[pj_], limit, dist
        )
        clash = np.unique(np.sort(np.stack([pi_, pj_], axis=1)[hit & ~bad[pi_] & ~bad[pj_]], axis=1), axis=0)
        # Drop the link in most clashes until none is left (only links at moved nodes clash).
        while len(clash):
            worst = int(np.argmax(np.bincount(clash.ravel(), minlength=n_links)))
            bad[worst] = True
            clash = clash[(clash[:, 0] != worst) & (clash[:, 1] != worst)]
    n_nodes = len(all_pos)
    deg = np.bincount(np.r_[e_a, e_b, la[~bad], lb[~bad]].astype(np.int64), minlength=n_nodes)
    for li_ in rng.permutation(np.flatnonzero(~bad)).tolist():
        a, b = la[li_], lb[li_]
        if deg[a] > 3 and deg[b] > 3:
            bad[li_] = True
            deg[a] -= 1
            deg[b] -= 1

    # ---- one edge list (tree edges first, oriented root side -> depth), then
    # dead ends pruned, chains merged and, optionally, branches against the flow removed.
    ok = ~bad
    n_cap = int(ok.sum())
    E_a = np.r_[np.asarray(e_a, dtype=np.int64), la[ok]]
    E_b = np.r_[np.asarray(e_b, dtype=np.int64), lb[ok]]
    E_cls = np.r_[np.asarray(e_cls, dtype=np.int64), np.full(n_cap, 2)]
    E_tree = np.r_[np.asarray(e_tree, dtype=np.int64), np.full(n_cap, -1)]
    # Each capillary link draws its radius now; a merged chain takes that of its
    # first link, so radii stay put while the pruning below reshapes chains.
    E_rad = np.r_[np.asarray(e_rad, dtype=float), rng.uniform(r_cap[0], r_cap[1], n_cap)]
    E_pts = list(e_pts) + list(link_pts[ok])
    n_e = len(E_a)
    is_root = np.zeros(n_nodes, dtype=bool)
    is_root[roots] = True
    children: dict[int, list[int]] = {}
    for ei in range(n_tree_edges):
        children.setdefault(int(E_a[ei]), []).append(ei)

    def prune(alive: np.ndarray) -> np.ndarray:
        alive = alive.copy()
        while True:
            deg = np.bincount(E_a[alive], minlength=n_nodes) + np.bincount(E_b[alive], minlength=n_nodes)
            dead_end = (deg == 1) & ~is_root
            kill = alive & (dead_end[E_a] | dead_end[E_b])
            if not kill.any():
                # A tree branch whose end keeps one capillary would merge with it into a
                # segment of two classes; the branch goes, and the capillary end next round.
                lo_c = np.full(n_nodes, 9)
                hi_c = np.full(n_nodes, -1)
                for ends in (E_a, E_b):
                    np.minimum.at(lo_c, ends[alive], E_cls[alive])
                    np.maximum.at(hi_c, ends[alive], E_cls[alive])
                mixed = (deg == 2) & (lo_c != hi_c)
                kill = alive & (E_cls != 2) & (mixed[E_a] | mixed[E_b])
            if not kill.any():
                break
            alive &= ~kill
        # Keep the pieces that hold an arteriole root and a venule root.
        adj = coo_matrix((np.ones(int(alive.sum())), (E_a[alive], E_b[alive])), shape=(n_nodes, n_nodes))
        _, comp = connected_components(adj, directed=False)
        both = set(comp[roots[cls_of == 0]].tolist()) & set(comp[roots[cls_of == 1]].tolist())
        good = np.zeros(int(comp.max()) + 1, dtype=bool)
        good[sorted(both)] = True
        alive &= good[comp[E_a]]
        if not alive.any():
            raise _bad("shape_um", "a box that holds connected arteriolar and venular trees", shape_um)
        return alive

    def assemble(alive: np.ndarray) -> tuple[list[dict], list[dict], list[list[int]], np.ndarray]:
        """Nodes and segments of the kept edges; chains through nodes of two vessels merged."""
        deg = np.bincount(E_a[alive], minlength=n_nodes) + np.bincount(E_b[alive], minlength=n_nodes)
        incident: dict[int, list[int]] = {}
        for ei in np.flatnonzero(alive).tolist():
            incident.setdefault(int(E_a[ei]), []).append(ei)
            incident.setdefault(int(E_b[ei]), []).append(ei)
        used = np.zeros(n_e, dtype=bool)
        chains: list[tuple[list[int], list[int]]] = []
        for nd in sorted(n for n in incident if deg[n] != 2 or is_root[n]):
            for ei in incident[nd]:
                if used[ei]:
                    continue
                seq_n, seq_e, cur = [nd], [], nd
                while True:
                    used[ei] = True
                    nxt = int(E_b[ei]) if E_a[ei] == cur else int(E_a[ei])
                    seq_e.append(ei)
                    seq_n.append(nxt)
                    if deg[nxt] != 2 or is_root[nxt] or nxt == nd:
                        break
                    ei = next(x for x in incident[nxt] if not used[x])
                    cur = nxt
                if E_cls[seq_e[0]] != 2 and E_a[seq_e[0]] != seq_n[0]:
                    seq_n, seq_e = seq_n[::-1], seq_e[::-1]
                chains.append((seq_n, seq_e))
        # Every piece holds a root (one vessel), so no cycle is left without an end node.
        node_new: dict[int, int] = {}
        nodes: list[dict] = []
        for g in sorted({c[0][0] for c in chains} | {c[0][-1] for c in chains}):
            node_new[g] = len(nodes)
            nodes.append(_node(len(nodes), all_pos[g], "border" if is_root[g] else "junction"))
        segs: list[dict] = []
        edge_seg = np.full(n_e, -1, dtype=np.int64)
        for ci, (seq_n, seq_e) in enumerate(chains):
            cls = int(E_cls[seq_e[0]])
            parts, radii = [], []
            for k, ei in enumerate(seq_e):
                p = E_pts[ei] if E_a[ei] == seq_n[k] else E_pts[ei][::-1]
                p = p if k == 0 else p[1:]
                parts.append(p)
                radii.append(np.full(len(p), E_rad[min(seq_e)] if cls == 2 else E_rad[ei]))
            edge_seg[seq_e] = ci
            segs.append(
                _make_segment(
                    ci, nodes[node_new[seq_n[0]]], nodes[node_new[seq_n[-1]]], np.concatenate(parts),
                    np.concatenate(radii), vessel_class=VESSEL_CLASSES[cls], tree=int(E_tree[seq_e[0]]),
                )
            )
        bifs = []
        for rec in bif_design:
            es = [rec["parent"], *rec["kids"]]
            if rec["node"] in node_new and deg[rec["node"]] == 3 and alive[es].all():
                r0, r1, r2 = rec["r"]
                b = _bifurcation_record(
                    node_new[rec["node"]], 0, edge_seg[es[0]], edge_seg[es[1]], edge_seg[es[2]], r0, r1, r2,
                    3.0, rec["th"][0], rec["th"][1], False,
                )
                del b["level"]  # forks along a trunk and in its branches have no common level
                b["vessel_class"] = VESSEL_CLASSES[int(E_cls[es[0]])]
                bifs.append(b)
        return nodes, segs, bifs, [c[1] for c in chains]

    def subtree(ei: int) -> list[int]:
        out, todo = [], [ei]
        while todo:
            e = todo.pop()
            out.append(e)
            todo.extend(children.get(int(E_b[e]), []))
        return out

    alive = prune(np.ones(n_e, dtype=bool))
    n_against = 0
    while True:
        nodes, segs, bifs, seg_edges = assemble(alive)
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
        kill = np.zeros(n_e, dtype=bool)
        for si in against.tolist():
            kill[subtree(seg_edges[si][0])] = True
        alive = prune(alive & ~kill)

    counts = {c: sum(1 for s in segs if s["vessel_class"] == c) for c in VESSEL_CLASSES}
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
            for t in range(n_tot)
        ],
        "n_terminals": len(terminals),
        "n_terminals_joined": n_joined,
        "n_tree_segments_against_flow": n_against,
        "n_edges_pruned": int(n_e - alive.sum()),
        "n_segments_by_class": counts,
    }
    return net


def network_flow_truth(
    net: VesselNetwork,
    *,
    arteriole_pressure_pa: float = 55.0 * MMHG_PA,
    venule_pressure_pa: float = 18.0 * MMHG_PA,
    config: Mapping[str, Any] | None = None,
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
    config : mapping, optional
        Full config or its ``flow`` section for :func:`pipeline.flow.solve_flow`
        (viscosity law, haematocrit and its model, solver); missing keys take
        the project's defaults (the in-vivo viscosity law, with phase
        separation). ``boundary`` ('pressure'), the two pressures,
        ``blind_ends`` ('sealed') and ``inlet_flow_nl_min`` (None) are set
        here.

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
    section = dict({} if config is None else config.get("flow", config))
    section.update(
        boundary="pressure", inlet_pressure_pa=p_art, outlet_pressure_pa=p_ven, blind_ends="sealed",
        inlet_flow_nl_min=None,
    )
    return solve_flow(
        segments, nodes, inlets=sorted(ends["arteriole"]), outlets=sorted(ends["venule"]), config=section
    )

