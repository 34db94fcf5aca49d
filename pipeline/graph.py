"""Step 4, graph building: centreline voxels become a vessel graph; and the graph's editing primitives.

In: :class:`~pipeline.centrelines.Centrelines` (centreline voxels with
positions and radii).
Out: :class:`VesselGraph`, nodes (junctions, ends, loop nodes) and segments
(each with its ordered centreline path of positions and radii); a multigraph
(parallel segments and self-loops are valid). The pruning step
(:mod:`pipeline.pruning`) and gap reconnection (:mod:`pipeline.gaps`) edit it
through the primitives here (drop, split, move a node, a segment's radius).

Construction. Centreline voxels are 26-adjacent. A voxel with other than two
neighbours is a node voxel: 26-connected clusters of junction voxels (three
or more neighbours) merge into one node at their centroid; a voxel with one
neighbour is an end node. The remaining voxels form simple paths between node
voxels, traced in one compiled pass; closed loops with no node voxel get a
node on one of their voxels. A self-loop with fewer than three path voxels
cannot enclose a tunnel and is a thinning artefact at a junction: it is dropped
and counted.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, field

import numba
import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

__all__ = ["VesselGraph", "build_graph", "voxel_adjacency"]


@dataclass
class VesselGraph:
    """A vessel multigraph with ordered centreline paths.

    Attributes
    ----------
    node_pos_um : (N, 3) float ndarray
        Node positions, µm (junction: cluster centroid).
    node_radius_um : (N,) float ndarray
        Largest radius among the node's voxels, µm.
    node_on_border : (N,) bool ndarray
        Node lies within one voxel of the volume border, or within its
        radius of the border voxels' plane (``Centrelines.on_border``).
    node_alive : (N,) bool ndarray
        False for nodes removed by pruning.
    seg_nodes : dict int -> (int, int)
        Segment id to its (from, to) node ids.
    seg_path : dict int -> (K, 3) float ndarray
        Ordered centreline positions from ``from`` to ``to``, µm, both
        node positions included.
    seg_radii : dict int -> (K,) float ndarray
        Radius at each path point, µm.
    counts : dict
        What construction and pruning removed.
    seg_length_um : dict int -> float
        Polyline length of each path, µm (kept by pruning; filled on demand
        for segments missing from it).
    seg_reconnected : set of int
        Segments whose path contains a bridge across a gap
        (:func:`reconnect_gaps`); a segment made by joining or splitting
        segments is in it when one of them was.
    """

    node_pos_um: np.ndarray
    node_radius_um: np.ndarray
    node_on_border: np.ndarray
    node_alive: np.ndarray
    seg_nodes: dict
    seg_path: dict
    seg_radii: dict
    counts: dict = field(default_factory=dict)
    seg_length_um: dict = field(default_factory=dict)
    seg_reconnected: set = field(default_factory=set)

    def incidence(self):
        """Map node id to the list of incident segment ids (self-loops twice)."""
        inc = defaultdict(list)
        for s, (u, v) in self.seg_nodes.items():
            inc[u].append(s)
            inc[v].append(s)
        return inc

    def degrees(self):
        """(N,) int array of node degrees (a self-loop counts twice)."""
        deg = np.zeros(len(self.node_pos_um), dtype=np.int64)
        for u, v in self.seg_nodes.values():
            deg[u] += 1
            deg[v] += 1
        return deg


def voxel_adjacency(voxels):
    """Sparse symmetric 26-adjacency among voxel indices.

    Parameters
    ----------
    voxels : (M, D) int ndarray
        Distinct voxel indices, D = 2 or 3.

    Returns
    -------
    (M, M) scipy.sparse.csr_matrix of bool
    """
    m, nd = voxels.shape
    if m == 0:
        return sparse.csr_matrix((0, 0), dtype=bool)
    v = voxels.astype(np.int64) + 1  # a one-voxel margin so neighbours never wrap
    dims = v.max(axis=0) + 2
    strides = np.cumprod(np.r_[1, dims[::-1][:-1]])[::-1]
    lin = v @ strides
    order = np.argsort(lin)
    lin_sorted = lin[order]
    rows, cols = [], []
    for off in np.ndindex(*(3,) * nd):
        o = np.array(off) - 1
        d = int(o @ strides)
        if d <= 0:  # each unordered pair once
            continue
        # Sorted needles: numpy's binary search narrows from the previous
        # hit, several times faster than random-order lookups.
        target = lin_sorted + d
        pos = np.searchsorted(lin_sorted, target)
        pos = np.minimum(pos, m - 1)
        hit = lin_sorted[pos] == target
        rows.append(order[hit])
        cols.append(order[pos[hit]])
    r = np.concatenate(rows)
    c = np.concatenate(cols)
    a = sparse.coo_matrix((np.ones(len(r), dtype=bool), (r, c)), shape=(m, m))
    return (a + a.T).tocsr()


@numba.njit(cache=True)
def _trace(indptr, indices, node_of):
    """Trace the simple paths between node voxels.

    Returns flat arrays: per path its start node, end node, and the range of
    its voxels in ``flat``; loops without a node voxel get node -1 and the
    caller makes a node for them.
    """
    m = len(node_of)
    visited = np.zeros(m, dtype=np.bool_)
    flat = np.empty(m, dtype=np.int64)
    n_flat = 0
    starts = np.empty(2 * m + 1, dtype=np.int64)
    ends = np.empty(2 * m + 1, dtype=np.int64)
    offs = np.empty(2 * m + 2, dtype=np.int64)
    first_vox = np.empty(2 * m + 1, dtype=np.int64)
    last_vox = np.empty(2 * m + 1, dtype=np.int64)
    n_seg = 0
    offs[0] = 0
    for u in range(m):
        if node_of[u] < 0:
            continue
        for k in range(indptr[u], indptr[u + 1]):
            v = indices[k]
            if node_of[v] >= 0:
                # Node voxel next to a node voxel of another node: a path with no inner voxel.
                if node_of[v] != node_of[u] and u < v:
                    starts[n_seg] = node_of[u]
                    ends[n_seg] = node_of[v]
                    first_vox[n_seg] = u
                    last_vox[n_seg] = v
                    n_seg += 1
                    offs[n_seg] = n_flat
                continue
            if visited[v]:
                continue
            prev = u
            cur = v
            visited[cur] = True
            flat[n_flat] = cur
            n_flat += 1
            end = -1
            while True:
                nxt = -1
                for kk in range(indptr[cur], indptr[cur + 1]):
                    w = indices[kk]
                    if w != prev:
                        nxt = w
                        break
                if nxt < 0:
                    break
                if node_of[nxt] >= 0:
                    end = nxt
                    break
                if visited[nxt]:
                    break
                visited[nxt] = True
                flat[n_flat] = nxt
                n_flat += 1
                prev = cur
                cur = nxt
            starts[n_seg] = node_of[u]
            ends[n_seg] = node_of[end] if end >= 0 else -1
            first_vox[n_seg] = u
            last_vox[n_seg] = end
            n_seg += 1
            offs[n_seg] = n_flat
    # Closed loops made only of two-neighbour voxels.
    for s in range(m):
        if node_of[s] >= 0 or visited[s]:
            continue
        visited[s] = True
        flat[n_flat] = s
        n_flat += 1
        prev = -1
        cur = s
        while True:
            nxt = -1
            for kk in range(indptr[cur], indptr[cur + 1]):
                w = indices[kk]
                if w != prev and not visited[w]:
                    nxt = w
                    break
            if nxt < 0:
                break
            visited[nxt] = True
            flat[n_flat] = nxt
            n_flat += 1
            prev = cur
            cur = nxt
        starts[n_seg] = -1
        ends[n_seg] = -1
        first_vox[n_seg] = s
        last_vox[n_seg] = s
        n_seg += 1
        offs[n_seg] = n_flat
    return flat[:n_flat], starts[:n_seg], ends[:n_seg], offs[: n_seg + 1], first_vox[:n_seg], last_vox[:n_seg]


def build_graph(centrelines):
    """Turn centreline voxels into a vessel multigraph.

    Parameters
    ----------
    centrelines : Centrelines

    Returns
    -------
    VesselGraph
        Unpruned; see :func:`pipeline.pruning.prune_graph`.
    """
    vox = centrelines.voxels
    pos = centrelines.positions_um
    rad = centrelines.radii_um
    adj = voxel_adjacency(vox)
    deg = np.diff(adj.indptr)
    m = len(vox)
    node_of = np.full(m, -1, dtype=np.int64)
    junction = np.flatnonzero(deg >= 3)
    ends = np.flatnonzero(deg <= 1)
    n_nodes = 0
    node_pos, node_rad, node_border = [], [], []
    if len(junction):
        sub = adj[junction][:, junction]
        ncl, lab = csgraph.connected_components(sub, directed=False)
        node_of[junction] = lab
        cnt = np.bincount(lab, minlength=ncl).astype(float)
        cen = np.column_stack([np.bincount(lab, weights=pos[junction, a], minlength=ncl)
                               for a in range(3)]) / cnt[:, None]
        rmax = np.full(ncl, -np.inf)
        np.maximum.at(rmax, lab, rad[junction])
        bord = np.zeros(ncl, dtype=bool)
        np.logical_or.at(bord, lab, centrelines.on_border[junction])
        node_pos.append(cen)
        node_rad.append(rmax)
        node_border.append(bord)
        n_nodes = ncl
    if len(ends):
        node_of[ends] = n_nodes + np.arange(len(ends))
        node_pos.append(pos[ends])
        node_rad.append(rad[ends])
        node_border.append(centrelines.on_border[ends])
        n_nodes += len(ends)
    flat, starts, stops, offs, first_vox, last_vox = _trace(adj.indptr, adj.indices.astype(np.int64), node_of)
    # Nodes found so far (junction clusters, then ends), as flat arrays;
    # loop nodes are appended after tracing.
    base_pos = np.vstack(node_pos) if node_pos else np.zeros((0, 3))
    base_rad = np.concatenate(node_rad) if node_rad else np.zeros(0)
    n_inner = np.diff(offs)
    loop = starts < 0  # a closed loop of two-neighbour voxels: its first voxel becomes a node
    # A path that ran into visited voxels only happens on malformed input: skipped.
    normal = ~loop & (stops >= 0)
    tiny_loop = normal & (starts == stops) & (n_inner < 3)
    dropped_loops = int(tiny_loop.sum())
    normal &= ~tiny_loop
    # Every normal path at once: [node u, inner voxels..., node v] as indices
    # into one table of voxel then node positions, cut into per-segment views.
    K = np.flatnonzero(normal)
    bounds = np.r_[0, np.cumsum(n_inner[K] + 2)]
    idx = np.empty(bounds[-1], dtype=np.int64)
    inner = np.ones(bounds[-1], dtype=bool)
    inner[bounds[:-1]] = False
    inner[bounds[1:] - 1] = False
    idx[bounds[:-1]] = m + starts[K]
    idx[bounds[1:] - 1] = m + stops[K]
    idx[inner] = flat[np.repeat(normal, n_inner)]
    pts = np.vstack([pos, base_pos])[idx]
    rads = np.concatenate([rad, base_rad])[idx]
    steps = np.sqrt((np.diff(pts, axis=0) ** 2).sum(axis=1))
    steps[bounds[1:-1] - 1] = 0.0  # not a step: from one path's end to the next path's start
    lengths = np.add.reduceat(np.r_[steps, 0.0], bounds[:-1]) if len(K) else np.zeros(0)
    paths = np.split(pts, bounds[1:-1])
    radii_of = np.split(rads, bounds[1:-1])
    normal_rank = np.cumsum(normal) - 1
    seg_nodes, seg_path, seg_radii, seg_length = {}, {}, {}, {}
    sid = 0
    extra_pos, extra_rad, extra_border = [], [], []
    for k in np.flatnonzero(normal | loop):
        if loop[k]:
            ring = flat[offs[k]:offs[k + 1]]
            u = v = n_nodes + len(extra_pos)
            extra_pos.append(pos[ring[0]])
            extra_rad.append(rad[ring[0]])
            extra_border.append(bool(centrelines.on_border[ring[0]]))
            ring = np.r_[ring, ring[:1]]
            path, radii = pos[ring], rad[ring]
            length = _polyline_length(path)
        else:
            j = normal_rank[k]
            u, v = int(starts[k]), int(stops[k])
            path, radii, length = paths[j], radii_of[j], float(lengths[j])
        seg_nodes[sid] = (u, v)
        seg_path[sid] = path
        seg_radii[sid] = radii
        seg_length[sid] = length
        sid += 1
    all_pos = np.vstack([base_pos] + ([np.asarray(extra_pos)] if extra_pos else []))
    all_rad = np.concatenate([base_rad] + ([np.asarray(extra_rad)] if extra_rad else []))
    if node_border or extra_border:
        all_border = np.concatenate(node_border + ([np.asarray(extra_border, bool)] if extra_border else []))
    else:
        all_border = np.zeros(0, bool)
    g = VesselGraph(
        node_pos_um=all_pos,
        node_radius_um=all_rad,
        node_on_border=all_border,
        node_alive=np.ones(len(all_pos), dtype=bool),
        seg_nodes=seg_nodes,
        seg_path=seg_path,
        seg_radii=seg_radii,
        counts={"centreline_voxels": int(m), "junction_artefact_loops": dropped_loops},
        seg_length_um=seg_length,
    )
    return g


def _polyline_length(p):
    return float(_polyline_length_nb(np.ascontiguousarray(p, dtype=np.float64)))


@numba.njit(cache=True)
def _polyline_length_nb(p):
    acc = 0.0
    for i in range(len(p) - 1):
        acc += np.sqrt(((p[i + 1] - p[i]) ** 2).sum())
    return acc


def _fresh_id(g):
    """A segment id never used by a segment still present or cached."""
    cache = g.__dict__.get("_radius_cache", {})
    return max(list(g.seg_nodes) + list(cache) + list(g.seg_length_um), default=-1) + 1


def _drop_segment(g, inc, s):
    """Remove segment ``s`` from the graph and the incidence lists (its nodes stay)."""
    u, v = g.seg_nodes.pop(s)
    inc[u].remove(s)
    inc[v].remove(s)
    del g.seg_path[s], g.seg_radii[s]
    g.seg_length_um.pop(s, None)
    g.seg_reconnected.discard(s)


def _split_segment(g, inc, s, i):
    """Split segment ``s`` at inner path point ``i`` into two; returns the new node there."""
    u, v = g.seg_nodes[s]
    p, r = g.seg_path[s], g.seg_radii[s]
    flagged = s in g.seg_reconnected
    node = len(g.node_pos_um)
    g.node_pos_um = np.vstack([g.node_pos_um, p[i][None]])
    g.node_radius_um = np.r_[g.node_radius_um, _seg_radius(g, s)]
    g.node_on_border = np.r_[g.node_on_border, False]
    g.node_alive = np.r_[g.node_alive, True]
    _drop_segment(g, inc, s)
    for a, b, sl in ((u, node, slice(0, i + 1)), (node, v, slice(i, None))):
        new = _fresh_id(g)
        g.seg_nodes[new] = (a, b)
        g.seg_path[new] = p[sl]
        g.seg_radii[new] = r[sl]
        g.seg_length_um[new] = _polyline_length(p[sl])
        inc[a].append(new)
        inc[b].append(new)
        if flagged:
            g.seg_reconnected.add(new)
    return node


def _move_nodes(g, inc, nodes, positions):
    """Put each node at its position; the paths of its segments end there too (lengths in one compiled pass)."""
    moved = {}
    for n, pos in zip(nodes, positions):
        g.node_pos_um[n] = pos
        for s in set(inc[n]):
            path = moved.get(s)
            if path is None:
                path = moved[s] = g.seg_path[s].copy()
            u, v = g.seg_nodes[s]
            if u == n:
                path[0] = pos
            if v == n:
                path[-1] = pos
    if not moved:
        return
    keys = list(moved)
    paths = [moved[s] for s in keys]
    off = np.r_[0, np.cumsum([len(p) for p in paths])].astype(np.int64)
    lengths = _polyline_lengths_nb(np.ascontiguousarray(np.vstack(paths), dtype=np.float64), off)
    for s, path, length in zip(keys, paths, lengths.tolist()):
        g.seg_path[s] = path
        g.seg_length_um[s] = length


@numba.njit(cache=True)
def _polyline_lengths_nb(P, off):
    out = np.empty(len(off) - 1)
    for k in range(len(off) - 1):
        out[k] = _polyline_length_nb(P[off[k]:off[k + 1]])
    return out


def _reach(g, s, n):
    """Largest distance from node ``n`` of a point on segment ``s``, µm."""
    return float(np.sqrt(((g.seg_path[s] - g.node_pos_um[n]) ** 2).sum(axis=1).max()))


def _seg_radius(g, s):
    """Median radius along a segment's inner points (cached on the graph; a path's radii never change)."""
    cache = g.__dict__.setdefault("_radius_cache", {})
    val = cache.get(s)
    if val is None:
        r = g.seg_radii[s]
        val = cache[s] = float(_median(np.ascontiguousarray(r[1:-1] if len(r) > 2 else r, dtype=np.float64)))
    return val


@numba.njit(cache=True)
def _median(a):
    return np.median(a)


def _other(uv, n):
    return uv[1] if uv[0] == n else uv[0]


def _oriented(g, s, n, *, at_end):
    """Path of segment ``s`` oriented so that node ``n`` is at its end (or start)."""
    p, r = g.seg_path[s], g.seg_radii[s]
    u, v = g.seg_nodes[s]
    n_is_end = v == n
    if n_is_end != at_end:
        p, r = p[::-1], r[::-1]
    return p, r
