"""A looping capillary bed in a box.

In: box size (µm), vessel fraction, radius range, seed. Out: a
:class:`~pipeline.synthetic.network.VesselNetwork` of capillaries meeting at junctions, clipped
to the box (its cut ends are border nodes).
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np
from scipy.optimize import brentq
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import minimum_spanning_tree

from ._common import _bad, _make_segment, _n_steps, _node, _real, _rng, _vec3
from .network import VesselNetwork, _clip_network


# -------------------------------------------------------------------- capillary bed


# Each node owns 3*keep links of length s; about 0.85 mean radii of each
# link vanish into the overlaps at its junctions (measured on rasterised beds).
_JUNCTION_OVERLAP = 0.85


def _bed_fraction(s: float, *, keep_frac: float, mean_r2: float, mean_r: float) -> float:
    """Vessel fraction of a lattice of period ``s`` keeping ``keep_frac`` of its links."""
    return 3.0 * keep_frac * math.pi * mean_r2 * max(s - _JUNCTION_OVERLAP * mean_r, 0.0) / s**3


def _bed_layout(
    box: np.ndarray, n_cells: np.ndarray, *, r_hi: float, gap: float, mean_r2: float, mean_r: float
) -> tuple[np.ndarray, float, float, float, float]:
    """Cell size, spare room, jitter, bend and the fraction with every link kept, for whole cells.

    Returns
    -------
    cell : ndarray, shape (3,)
        Cell edges, µm.
    spare, jit, bend : float
        Room between parallel tubes beyond ``2 r_hi + gap``, and the node
        jitter and link bend taken from it, µm.
    full : float
        Vessel volume fraction with every link kept.
    """
    cell = box / n_cells
    spare = float(cell.min()) - 2.0 * r_hi - gap
    # Parallel neighbours approach by at most 2*jitter + 2*bend; split the spare room.
    jit = min(0.15 * float(cell.min()), 0.3 * spare)
    bend = min(0.1 * float(cell.min()), 0.2 * spare)
    # Mean link arc over cell: sideways jitter of both ends (variance 4 j^2 / 3)
    # lengthens the chord by var / (2 s^2); a bend of amplitude A ~ U(0, bend)
    # adds (pi^2 / 4) E[A^2] / s^2 (small-slope expansion of the arc length).
    stretch = (
        1.0 + (4.0 * jit**2 / 3.0) / (2.0 * cell**2) + (math.pi**2 / 4.0) * (bend**2 / 3.0) / cell**2
    )
    # Volume fraction with every link kept; each axis contributes links of its own cell length.
    full = (
        math.pi
        * mean_r2
        * float(np.sum(np.maximum(stretch * cell - _JUNCTION_OVERLAP * mean_r, 0.0)))
        / float(np.prod(cell))
    )
    return cell, spare, jit, bend, full


def _fit_lattice(
    box: np.ndarray,
    f_target: float,
    s_min: float,
    *,
    keep_frac: float,
    r_hi: float,
    gap: float,
    mean_r2: float,
    mean_r: float,
) -> tuple[np.ndarray, np.ndarray, float, float, float, float]:
    """Whole cells per axis whose lattice can reach ``f_target``, and their layout.

    The period is solved for ``keep_frac`` of the links, then rounded to
    whole cells, never shorter than ``s_min``.

    Returns
    -------
    n_cells : ndarray of int, shape (3,)
    cell, spare, jit, bend, full
        As :func:`_bed_layout`.
    """

    def fraction(s: float) -> float:
        return _bed_fraction(s, keep_frac=keep_frac, mean_r2=mean_r2, mean_r=mean_r)

    s_far = max(float(box.max()) * 4.0, s_min * 2.0)
    period = brentq(lambda s: fraction(s) - f_target, s_min, s_far) if fraction(s_far) < f_target else s_far
    # Whole cells per axis, never shorter than the period that keeps tubes apart.
    n_max = np.maximum(1, np.floor(box / s_min)).astype(int)
    n_cells = np.clip(np.round(box / period).astype(int), 1, n_max)
    cell, spare, jit, bend, per_cell = _bed_layout(box, n_cells, r_hi=r_hi, gap=gap, mean_r2=mean_r2, mean_r=mean_r)
    # Rounding to whole cells shifts the fraction by up to ~1/n; the share of
    # kept links absorbs that, and a finer lattice steps in when even all links
    # would fall short (small boxes).
    while per_cell < f_target and np.any(n_cells < n_max):
        grow = int(np.argmax(np.where(n_cells < n_max, cell, -1.0)))
        n_cells[grow] += 1
        cell, spare, jit, bend, per_cell = _bed_layout(
            box, n_cells, r_hi=r_hi, gap=gap, mean_r2=mean_r2, mean_r=mean_r
        )
    return n_cells, cell, spare, jit, bend, per_cell


def _bed_lattice(
    rng: np.random.Generator, n_cells: np.ndarray, cell: np.ndarray, jit: float, keep_eff: float
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Jittered lattice nodes and the links kept between them.

    Returns
    -------
    pos : ndarray, shape (N, 3)
        Node positions, µm, the ghost layer outside each face included.
    real : ndarray of bool, shape (N,)
        Nodes inside the box.
    kept : ndarray of int, shape (L, 2)
        Kept links between real nodes, then kept stubs to ghosts.
    """
    # Lattice including one ghost layer outside each face; ghosts only anchor border stubs.
    dims = n_cells + 2
    grid = np.stack(np.meshgrid(*[np.arange(-1, n + 1) for n in n_cells], indexing="ij"), axis=-1).reshape(
        -1, 3
    )
    real = np.all((grid >= 0) & (grid < n_cells), axis=1)
    pos = (grid + 0.5) * cell + rng.uniform(-jit, jit, size=grid.shape)
    flat = np.arange(len(grid)).reshape(tuple(dims))
    links = []
    for ax in range(3):
        a = np.take(flat, np.arange(dims[ax] - 1), axis=ax).ravel()
        b = np.take(flat, np.arange(1, dims[ax]), axis=ax).ravel()
        links.append(np.stack([a, b], axis=1))
    links = np.concatenate(links)
    both = real[links[:, 0]] & real[links[:, 1]]
    stub = real[links[:, 0]] ^ real[links[:, 1]]
    inner = links[both]
    # A random-weight spanning tree keeps the bed one connected network.
    n_pts = len(grid)
    w = rng.random(len(inner)) + 1e-3
    mst = minimum_spanning_tree(coo_matrix((w, (inner[:, 0], inner[:, 1])), shape=(n_pts, n_pts))).tocoo()
    in_tree = set(zip(np.minimum(mst.row, mst.col).tolist(), np.maximum(mst.row, mst.col).tolist()))
    tree_mask = np.fromiter(
        ((min(a, b), max(a, b)) in in_tree for a, b in inner), dtype=bool, count=len(inner)
    )
    n_tree = int(tree_mask.sum())
    p_extra = (
        0.0
        if len(inner) == n_tree
        else float(np.clip((keep_eff * len(inner) - n_tree) / (len(inner) - n_tree), 0, 1))
    )
    keep_inner = tree_mask | (rng.random(len(inner)) < p_extra)
    stubs = links[stub]
    keep_stub = rng.random(len(stubs)) < keep_eff
    kept = np.concatenate([inner[keep_inner], stubs[keep_stub]])
    return pos, real, kept


def _bent_links(rng: np.random.Generator, pos: np.ndarray, kept: np.ndarray, bend: float) -> np.ndarray:
    """Dense bent polylines for every kept link at once.

    Returns
    -------
    ndarray, shape (L, K, 3)
        From ``pos[kept[:, 0]]`` to ``pos[kept[:, 1]]``, bowed sideways by up
        to ``bend`` in a random direction.
    """
    a_pos, b_pos = pos[kept[:, 0]], pos[kept[:, 1]]
    chord = b_pos - a_pos
    clen = np.linalg.norm(chord, axis=1)
    k_pts = _n_steps(float(clen.max()) + 2.0 * bend) + 1
    t = np.linspace(0.0, 1.0, k_pts)
    dirs = chord / clen[:, None]
    ref = np.where(np.abs(dirs[:, :1]) < 0.9, np.array([[1.0, 0, 0]]), np.array([[0, 1.0, 0]]))
    e1 = np.cross(dirs, ref)
    e1 /= np.linalg.norm(e1, axis=1, keepdims=True)
    e2 = np.cross(dirs, e1)
    ang = rng.uniform(0, 2 * math.pi, len(kept))[:, None]
    e_perp = np.cos(ang) * e1 + np.sin(ang) * e2
    amp = rng.uniform(0.0, bend, len(kept))
    link_pts = (
        a_pos[:, None, :]
        + t[None, :, None] * chord[:, None, :]
        + (amp[:, None] * (np.sin(np.pi * t) ** 2)[None, :])[:, :, None] * e_perp[:, None, :]
    )
    link_pts[:, 0], link_pts[:, -1] = a_pos, b_pos
    return link_pts


def _degree_two_chains(kept: np.ndarray, deg: np.ndarray) -> list[tuple[list[int], list[int]]]:
    """Chains of links through nodes of degree two, as (node sequence, link sequence).

    Chains run between nodes of another degree; pure cycles of degree-two
    nodes start and end at one of them.
    """
    incident: dict[int, list[int]] = {}
    for li, (a, b) in enumerate(kept.tolist()):
        incident.setdefault(a, []).append(li)
        incident.setdefault(b, []).append(li)
    used = np.zeros(len(kept), dtype=bool)
    chains: list[tuple[list[int], list[int]]] = []

    def walk(start: int, li: int) -> tuple[list[int], list[int]]:
        seq_n, seq_l = [start], []
        cur = start
        while True:
            used[li] = True
            a, b = kept[li]
            nxt = b if a == cur else a
            seq_l.append(li)
            seq_n.append(int(nxt))
            if deg[nxt] != 2 or nxt == start:
                return seq_n, seq_l
            li = next(l2 for l2 in incident[nxt] if not used[l2])
            cur = int(nxt)

    for nd in np.nonzero((deg > 0) & (deg != 2))[0].tolist():
        for li in incident[nd]:
            if not used[li]:
                chains.append(walk(nd, li))
    for li in np.nonzero(~used)[0].tolist():  # pure cycles of degree-2 nodes
        if not used[li]:
            chains.append(walk(int(kept[li, 0]), li))
    return chains


def _chain_segments(
    rng: np.random.Generator,
    chains: list[tuple[list[int], list[int]]],
    kept: np.ndarray,
    link_pts: np.ndarray,
    pos: np.ndarray,
    real: np.ndarray,
    deg: np.ndarray,
    *,
    r_lo: float,
    r_hi: float,
) -> tuple[list[dict], list[dict]]:
    """Nodes and segments of the chains, each segment with a radius uniform in [r_lo, r_hi].

    Returns
    -------
    (list of dict, list of dict)
        Nodes (ghosts as 'border', a pure cycle's start as 'loop') and segments.
    """
    node_ids: dict[int, int] = {}
    nodes: list[dict] = []
    loop_starts = {c[0][0] for c in chains if c[0][0] == c[0][-1] and deg[c[0][0]] == 2}

    def node_for(g: int) -> dict:
        if g not in node_ids:
            if not real[g]:
                kind = "border"
            elif g in loop_starts:
                kind = "loop"
            elif deg[g] == 1:
                kind = "blind"
            else:
                kind = "junction"
            node_ids[g] = len(nodes)
            nodes.append(_node(len(nodes), pos[g], kind))
        return nodes[node_ids[g]]

    radii = rng.uniform(r_lo, r_hi, len(chains))
    segs = []
    for ci, (seq_n, seq_l) in enumerate(chains):
        parts = []
        for k, li in enumerate(seq_l):
            p = link_pts[li] if kept[li, 0] == seq_n[k] else link_pts[li][::-1]
            parts.append(p if k == 0 else p[1:])
        pts = np.concatenate(parts)
        segs.append(
            _make_segment(ci, node_for(seq_n[0]), node_for(seq_n[-1]), pts, radii[ci], n_links=len(seq_l))
        )
    return nodes, segs


def capillary_bed(
    *,
    shape_um: Sequence[float],
    vessel_fraction: float = 0.15,
    radius_range_um: Sequence[float] = (2.0, 4.0),
    seed: int | None = None,
    link_fraction: float = 0.75,
    min_gap_um: float = 2.0,
) -> VesselNetwork:
    """Interconnected looping network filling a box: a jittered 3-D lattice of tubes.

    Lattice nodes sit on a cubic grid with random offsets; neighbouring nodes
    are linked by gently bent tubes. A random spanning tree keeps every node
    connected, and further links are kept until about ``link_fraction`` of
    all lattice links remain (nudged so whole lattice cells meet the target
    fraction; the share used is ``params['kept_link_fraction']``). Chains
    through nodes of degree two are merged into one segment, then each
    segment gets a radius drawn uniformly from ``radius_range_um``. Links leaving the box are cut at its faces ('border'
    nodes). The lattice period is solved so that the tube volume (with an
    allowance for overlaps at junctions) matches ``vessel_fraction``; the
    rasterised fraction lands within about 10 % of it. Jitter and bending are
    bounded so non-adjacent tubes stay at least ``min_gap_um`` apart.

    Parameters
    ----------
    shape_um : sequence of 3 float
        Box size (Z, Y, X) in µm; coordinates run from 0 to ``shape_um``.
    vessel_fraction : float
        Target vessel volume fraction in (0, 0.5].
    radius_range_um : (float, float)
        Lower and upper radius.
    seed : int, optional
        Random seed.
    link_fraction : float
        Fraction of lattice links kept, in (0, 1].
    min_gap_um : float
        Smallest gap between non-adjacent tube surfaces.

    Returns
    -------
    VesselNetwork
        With ``box_um = shape_um`` so :func:`rasterize` keeps its coordinates.
    """
    box = _vec3("shape_um", shape_um, positive=True)
    f_target = _real("vessel_fraction", vessel_fraction, low=0.0, low_open=True, high=0.5)
    try:
        rr = np.asarray(radius_range_um, dtype=float)
    except (TypeError, ValueError):
        rr = None
    if rr is None or rr.shape != (2,) or not np.all(np.isfinite(rr)) or not (0 < rr[0] <= rr[1]):
        raise _bad("radius_range_um", "two radii 0 < low <= high", radius_range_um)
    r_lo, r_hi = float(rr[0]), float(rr[1])
    rng = _rng(seed)
    keep_frac = _real("link_fraction", link_fraction, low=0.0, low_open=True, high=1.0)
    gap = _real("min_gap_um", min_gap_um, low=0.0)

    mean_r2 = (r_hi**3 - r_lo**3) / (3.0 * (r_hi - r_lo)) if r_hi > r_lo else r_lo**2
    mean_r = 0.5 * (r_lo + r_hi)
    s_min = 2.0 * r_hi + gap + 0.5  # closest lattice period that keeps parallel tubes apart
    f_max = _bed_fraction(s_min, keep_frac=keep_frac, mean_r2=mean_r2, mean_r=mean_r)
    if f_max < f_target:
        raise _bad(
            "vessel_fraction",
            f"a value <= {f_max:.3f} for radius_range_um {tuple(rr)} and min_gap_um {gap:g}",
            vessel_fraction,
        )
    n_cells, cell, spare, jit, bend, per_cell = _fit_lattice(
        box, f_target, s_min, keep_frac=keep_frac, r_hi=r_hi, gap=gap, mean_r2=mean_r2, mean_r=mean_r
    )
    if spare <= 0:
        raise _bad(
            "shape_um", f"a box whose lattice period ({cell.min():.1f} um) exceeds 2*r_max + gap", shape_um
        )
    if f_target > per_cell * 1.02:
        raise _bad(
            "vessel_fraction", f"a value <= {per_cell:.3f} for this box and radius_range_um", vessel_fraction
        )
    keep_eff = float(min(1.0, f_target / per_cell))

    pos, real, kept = _bed_lattice(rng, n_cells, cell, jit, keep_eff)
    link_pts = _bent_links(rng, pos, kept, bend)
    # Merge chains through degree-2 nodes into single segments.
    deg = np.bincount(kept.ravel(), minlength=len(pos))
    chains = _degree_two_chains(kept, deg)
    nodes, segs = _chain_segments(rng, chains, kept, link_pts, pos, real, deg, r_lo=r_lo, r_hi=r_hi)
    params = {
        "shape_um": box,
        "vessel_fraction": f_target,
        "radius_range_um": [r_lo, r_hi],
        "seed": seed,
        "link_fraction": keep_frac,
        "min_gap_um": gap,
        "lattice_period_um": cell,
        "kept_link_fraction": keep_eff,
        "jitter_um": jit,
        "bend_um": bend,
    }
    net = VesselNetwork(nodes, segs, kind="bed", params=params)
    net = _clip_network(net, np.zeros(3), box)
    net.box_um = tuple(float(v) for v in box)
    return net
