"""Reconnection of broken thin vessels across short gaps (optional, ``pruning.reconnect_gaps``).

In: a :class:`~pipeline.graph.VesselGraph` with its incidence lists, the spacing and the largest gap.
Out: the graph with bridges (straight segments, flagged ``reconnected``) from blind ends that face
another vessel or blind end across at most ``max_gap_voxels`` voxel layers; the count of bridges.
"""

from __future__ import annotations

import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

from .graph import _drop_segment, _fresh_id, _oriented, _other, _polyline_length, _seg_radius, _split_segment

__all__ = ["reconnect_gaps"]

def reconnect_gaps(g, *, spacing_um, max_gap_voxels=3.0, max_angle_deg=35.0, small_loop_radii=8.0,
                   fit_radii=3.0, step_um=None, inc=None, max_passes=10):
    """Bridge blind ends that face another vessel or end across a short gap (in place).

    A thin vessel that the segmentation breaks (a few voxels of it below the
    threshold) thins into two blind ends facing each other, or, when the
    break is at its start, into a piece whose end faces the side of its
    parent vessel. Each blind end (one segment, not on the volume's border)
    is given a direction: the principal axis of its centreline within
    ``fit_radii`` of its own radii (at least three grid steps) of the tip.
    A *target* is a centreline point of another segment (or an end node)
    such that

    - the line from the tip to it is within ``max_angle_deg`` of the end's
      direction;
    - the gap along that line is at most ``max_gap_voxels`` voxel layers.
      A layer is ``sum_a |u_a| d_a`` thick for a unit direction ``u`` and
      spacing ``d``, the thinnest slab of background that keeps
      26-connected voxels on its two sides apart, so the limit follows a
      coarse z step only as far as the line runs along z. To a centreline
      point the gap is the distance from the tip less the target's radius
      (its segment's median) and half a layer (the tip voxel's centre lies
      half a voxel inside its face); to another tip, the distance less one
      layer. The end's own radius is not taken off: thinning keeps a broken
      vessel's tip at the break (a 2 µm tube cut by 1-6 voxels at 1 µm
      voxels thinned to tips exactly gap + 1 voxels apart), so taking it
      off would bridge gaps wider than the limit by a diameter;
    - joining does not close a loop, unless it joins two blind ends that
      face each other (each within the angle of the other's direction) and
      the loop is at least ``small_loop_radii`` times the larger radius
      round (what pruning keeps as a real loop). A loop is what a wrong
      bridge costs most (a tree gets an anastomosis it does not have), so
      a bridge inside one connected piece needs the evidence of both ends.

    When the end's axis runs into a target vessel (passes within its
    radius of its centreline), the first vessel so hit is joined where the
    axis comes nearest its centreline; otherwise the closest target by gap
    wins. The bridge is a straight path
    sampled every ``step_um`` with radii interpolated linearly between the
    two segments' radii. Joined to another blind end, the two segments and
    the bridge become one segment; joined to a point within a radius (or
    two grid steps) of a node of the target segment, the bridge ends at
    that node; otherwise the target segment is split there and the point
    becomes a junction. Ends are handled closest first, each at most once a
    pass, and passes repeat until no bridge is added (an end may face a
    piece that was itself bridged).

    Parameters
    ----------
    g : VesselGraph
        Pruned graph (see :func:`pipeline.pruning.prune_graph`, which calls this with
        ``reconnect=True``).
    spacing_um : float or sequence of 3 float
        Voxel spacing of the mask (z, y, x), µm: the unit of the gap.
    max_gap_voxels : float
        Largest gap bridged, in voxel layers along the bridge.
    max_angle_deg : float
        Largest angle between an end's direction and its bridge, degrees.
    small_loop_radii : float
        A bridge that closes a loop shorter than this times the larger of
        the two radii is not made.
    fit_radii : float
        Length of centreline that gives an end's direction, in its radii.
    step_um : float, optional
        Point spacing of the bridge paths; default the finest spacing.
    inc : dict, optional
        Incidence lists (``g.incidence()``), kept up to date when given.
    max_passes : int
        Upper bound on passes.

    Returns
    -------
    int
        Number of bridges made; the segments holding them are in
        ``g.seg_reconnected``.
    """
    if inc is None:
        inc = g.incidence()
    d = np.broadcast_to(np.asarray(spacing_um, dtype=float), (3,)).copy()
    h = float(step_um) if step_um else float(d.min())
    total = 0
    for _ in range(max_passes):
        made = _reconnect_pass(g, inc, d, h, max_gap_voxels, np.cos(np.radians(max_angle_deg)),
                               small_loop_radii, fit_radii)
        total += made
        if not made:
            break
    return total


def _end_direction(p, length):
    """Unit direction of a path's last ``length`` of arc (``p`` ends at the tip), pointing out of the tip."""
    steps = np.sqrt((np.diff(p, axis=0) ** 2).sum(axis=1))
    back = np.r_[np.cumsum(steps[::-1])[::-1], 0.0]  # arc from each point to the tip
    q = p[back <= length]
    if len(q) < 2:
        q = p[-2:]
    chord = p[-1] - q[0]
    if len(q) >= 3:
        _, _, vt = np.linalg.svd(q - q.mean(axis=0), full_matrices=False)
        t = vt[0]
    else:
        t = chord
    if t @ chord < 0:
        t = -t
    nrm = np.linalg.norm(t)
    return t / nrm if nrm > 0 else None


def _reconnect_pass(g, inc, d, h, max_gap_voxels, cos_max, small_loop_radii, fit_radii):
    """One pass of :func:`reconnect_gaps`: propose a bridge for every blind end, make them closest first."""
    alive = np.flatnonzero(g.node_alive)
    ends = [int(n) for n in alive if len(inc[n]) == 1 and not g.node_on_border[n]]
    if not ends or not g.seg_nodes:
        return 0
    cl = _Centrelines(g)
    # Each end: its segment, radius, tip and direction.
    info = {}
    for e in ends:
        s = inc[e][0]
        p, _ = _oriented(g, s, e, at_end=True)
        r = _seg_radius(g, s)
        t = _end_direction(p, max(fit_radii * r, 3.0 * h))
        if t is not None:
            info[e] = (s, r, p[-1], t)
    if not info:
        return 0
    from scipy.spatial import cKDTree

    tree = cKDTree(cl.P)
    order = list(info)
    tips = np.array([info[e][2] for e in order])
    reach = np.array([info[e][1] for e in order]) + cl.rseg.max() + max_gap_voxels * d.sum()
    hits = tree.query_ball_point(tips, reach)
    proposals = []
    for e, cand in zip(order, hits):
        best = _best_target(g, inc, cl, info, e, np.asarray(cand, dtype=np.int64), d=d, h=h,
                            max_gap_voxels=max_gap_voxels, cos_max=cos_max, small_loop_radii=small_loop_radii)
        if best is not None:
            proposals.append(best)
    return _make_bridges(g, inc, proposals, h)


class _Centrelines:
    """Every centreline point of a graph in one array, with its segment and place along it.

    Attributes
    ----------
    keys : list of int
        Segment ids in row order; ``rank`` maps an id to its row.
    rseg : (S,) float ndarray
        Median radius of each segment, µm.
    P : (K, 3) float ndarray
        All path points, segment after segment, µm.
    owner, index : (K,) int ndarray
        Row of each point's segment and its position along the path.
    arc, arc_left : (K,) float ndarray
        Arc from the segment's first node to the point, and from the point
        to its last node, µm.
    adj : sparse (N, N) matrix
        Node graph weighted by segment length, µm; ``comp`` (N,) the
        connected piece of each node (a bridge within one closes a loop).
    """

    def __init__(self, g):
        keys = self.keys = list(g.seg_nodes)
        self.rseg = np.array([_seg_radius(g, s) for s in keys])
        lens = np.array([len(g.seg_path[s]) for s in keys])
        P = self.P = np.vstack([g.seg_path[s] for s in keys])
        self.owner = np.repeat(np.arange(len(keys)), lens)
        first = np.r_[0, np.cumsum(lens)[:-1]]
        self.index = np.arange(len(P)) - np.repeat(first, lens)  # position along its path
        steps = np.r_[0.0, np.sqrt((np.diff(P, axis=0) ** 2).sum(axis=1))]
        steps[first] = 0.0
        arc = np.cumsum(steps)
        arc -= np.repeat(arc[first], lens)  # arc from the segment's first node
        self.arc = arc
        self.arc_left = np.repeat(arc[first + lens - 1], lens) - arc  # arc to its last node
        n_nodes = len(g.node_pos_um)
        uv = np.array([g.seg_nodes[s] for s in keys])
        w = np.array([g.seg_length_um.get(s) or _polyline_length(g.seg_path[s]) for s in keys])
        self.adj = sparse.coo_matrix((np.maximum(w, 1e-9), (uv[:, 0], uv[:, 1])),
                                     shape=(n_nodes, n_nodes)).tocsr()
        _, self.comp = csgraph.connected_components(self.adj, directed=False)
        self.rank = {s: k for k, s in enumerate(keys)}


def _best_target(g, inc, cl, info, e, c, *, d, h, max_gap_voxels, cos_max, small_loop_radii):
    """The bridge proposed for blind end ``e`` among the centreline points ``c`` near it, or None.

    Returns
    -------
    tuple or None
        ``(gap, e, s, kind, ts, node, i, target_pos, within, piece_e,
        piece_t)`` as :func:`_make_bridges` takes them.
    """
    s, r, tip, t = info[e]
    owner, rseg = cl.owner, cl.rseg
    c = c[owner[c] != cl.rank[s]]
    if not len(c):
        return None
    vec = cl.P[c] - tip
    dist = np.sqrt((vec ** 2).sum(axis=1))
    ok = dist > 0
    c, vec, dist = c[ok], vec[ok], dist[ok]
    u = vec / dist[:, None]
    layer = np.abs(u) @ d  # one voxel layer along each line
    # Gaps in voxel layers: to a centreline point, from the tip to the
    # target's surface, less the half layer between the tip's voxel centre
    # and its face; to another tip, the distance less one layer.
    gap_line = (dist - rseg[owner[c]]) / layer - 0.5
    gap_tip = dist / layer - 1.0
    ok = (u @ t >= cos_max) & (np.minimum(gap_line, gap_tip) <= max_gap_voxels)
    valid = []
    for k in np.flatnonzero(ok):
        j = int(c[k])
        ts = cl.keys[owner[j]]
        tu, tv = g.seg_nodes[ts]
        snap = max(rseg[owner[j]], 2.0 * h)
        node = tu if cl.arc[j] <= snap else tv if cl.arc_left[j] <= snap else None
        if node is not None:
            kind = "end" if len(inc[node]) == 1 else "node"
            if node == e or (kind == "end" and g.node_on_border[node]):
                continue  # where a vessel leaves the volume is no broken end
            target_pos = g.node_pos_um[node]
            if kind == "end":
                j_gap = np.linalg.norm(target_pos - tip) / layer[k] - 1.0
            else:
                j_gap = gap_line[k]
        else:
            kind, target_pos, j_gap = "split", cl.P[j], gap_line[k]
        if j_gap > max_gap_voxels:
            continue
        within = cl.comp[e] == cl.comp[tu]
        if within:
            # Within one piece: only two blind ends facing each other,
            # joined by a loop that pruning would keep.
            if kind != "end" or node not in info or -u[k] @ info[node][3] < cos_max:
                continue
            limit = small_loop_radii * max(r, rseg[owner[j]])
            around = csgraph.dijkstra(cl.adj, indices=e, limit=limit)[node]
            if around + dist[k] < limit:
                continue
        along = float(vec[k] @ t)
        off_axis = float(np.sqrt(max(dist[k] ** 2 - along ** 2, 0.0)))
        valid.append((off_axis <= rseg[owner[j]], along, off_axis, float(j_gap), ts,
                      (float(j_gap), e, s, kind, ts, node, int(cl.index[j]), target_pos, within,
                       int(cl.comp[e]), int(cl.comp[tu]))))
    if not valid:
        return None
    # Where the end's axis runs into a vessel, the contact is where it
    # meets that vessel's axis (the first vessel hit, its point nearest
    # the ray): a daughter cut off at its start is joined at its branch
    # point, not at the parent's surface point nearest its tip. An axis
    # that hits nothing joins the closest target by gap.
    hits = [v for v in valid if v[0]]
    if hits:
        first = min(hits, key=lambda v: v[1])[4]
        best = min((v for v in valid if v[4] == first), key=lambda v: v[2])
    else:
        best = min(valid, key=lambda v: v[3])
    return best[5]


def _make_bridges(g, inc, proposals, h):
    """Make the proposed bridges, closest first, each end, node and segment once; returns how many."""
    made = 0
    used_nodes, touched = set(), set()
    piece = {}  # pieces joined by this pass's bridges (union-find)

    def find(c):
        while c in piece:
            c = piece[c]
        return c

    for gap, e, s, kind, ts, node, i, target_pos, within, ce, ct in sorted(proposals, key=lambda p: (p[0], p[1])):
        if e in used_nodes or s in touched or ts in touched or (node is not None and node in used_nodes):
            continue
        if not within and find(ce) == find(ct):
            continue  # an earlier bridge joined the two pieces: this one would close a loop unchecked
        if s not in g.seg_nodes or ts not in g.seg_nodes:
            continue
        tip = g.node_pos_um[e]
        r_t = _seg_radius(g, ts)
        bp, br = _bridge(tip, np.asarray(target_pos, dtype=float), _seg_radius(g, s), r_t, h)
        pa, ra = _oriented(g, s, e, at_end=True)
        start = _other(g.seg_nodes[s], e)
        if kind == "end":
            pb, rb = _oriented(g, ts, node, at_end=False)
            stop = _other(g.seg_nodes[ts], node)
            path = np.vstack([pa, bp[1:-1], pb])
            radii = np.r_[ra, br[1:-1], rb]
            _drop_segment(g, inc, ts)
            g.node_alive[node] = False
            used_nodes.add(node)
        else:
            if kind == "split":
                node = _split_segment(g, inc, ts, i)
            stop = node
            path = np.vstack([pa, bp[1:]])
            radii = np.r_[ra, br[1:]]
        _drop_segment(g, inc, s)
        g.node_alive[e] = False
        new = _fresh_id(g)
        g.seg_nodes[new] = (start, stop)
        g.seg_path[new] = path
        g.seg_radii[new] = radii
        g.seg_length_um[new] = _polyline_length(path)
        inc[start].append(new)
        inc[stop].append(new)
        g.seg_reconnected.add(new)
        used_nodes.update((e, node))
        touched.update((s, ts))
        if find(ce) != find(ct):
            piece[find(ce)] = find(ct)
        made += 1
    return made


def _bridge(a, b, ra, rb, h):
    """Straight path from ``a`` to ``b`` with points at most ``h`` apart, radii linear from ``ra`` to ``rb``."""
    n = max(int(np.ceil(np.linalg.norm(b - a) / h)), 1)
    f = np.linspace(0.0, 1.0, n + 1)
    return a + f[:, None] * (b - a), ra + f * (rb - ra)
