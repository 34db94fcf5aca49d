"""The network type every builder returns, its tables, and clipping a network to a box.

In: nodes and densely sampled centreline polylines with radii (µm). Out: a
:class:`VesselNetwork` (its truth dictionary, its chords for the rasteriser);
:func:`network_tables` (the segment and node tables
:func:`pipeline.flow.solve_flow` takes); the part of a network inside an
axis-aligned box with the cut ends as border nodes (:func:`crop_network`,
each piece mapped to its source segment).
"""

from __future__ import annotations

import copy
from dataclasses import dataclass, field
from typing import Any, Callable, Sequence

import numpy as np

from ..errors import InputError
from ._common import (
    NODE_KINDS, _bad, _jsonable, _make_segment, _node, _nominal_radius, _polyline_length, _positive, _vec3,
)

# Coordinates this close to a box face count as on it (µm).
_BOX_TOL = 1e-7


@dataclass
class VesselNetwork:
    """Ground-truth vessel network in physical units (µm, axes z, y, x).

    Attributes
    ----------
    nodes : list of dict
        ``id`` (int), ``pos_um`` ((z, y, x) tuple), ``kind`` (one of
        ``'junction'``, ``'blind'``, ``'border'``, ``'loop'``).
    segments : list of dict
        ``id``, ``node_from``, ``node_to``, ``points_um`` (ndarray (K, 3),
        consecutive points at most ``MAX_STEP_UM`` apart, first/last point equal
        to the node positions), ``radii_um`` (ndarray (K,)), ``length_um``
        (analytic arc length where the builder knows it, else the polyline
        length) and ``radius_um`` (nominal radius: the constant radius, or the
        length-weighted mean). Builders may add keys such as ``level``.
    kind : str
        Name of the builder.
    params : dict
        Builder parameters and derived quantities, JSON-serialisable.
    bifurcations : list of dict
        Per bifurcation: node, parent and daughter segment ids, radii, exponent,
        angles and whether it was made wrong on purpose (``broken``).
    box_um : tuple of float or None
        Physical box ``(Z, Y, X)`` the coordinates are already placed in
        (capillary bed); ``None`` lets :func:`rasterize` place the network.
    """

    nodes: list[dict[str, Any]]
    segments: list[dict[str, Any]]
    kind: str = "custom"
    params: dict[str, Any] = field(default_factory=dict)
    bifurcations: list[dict[str, Any]] = field(default_factory=list)
    box_um: tuple[float, float, float] | None = None

    def __post_init__(self) -> None:
        by_id = {}
        for n in self.nodes:
            if n.get("kind") not in NODE_KINDS:
                raise _bad(f"node {n.get('id')} kind", "one of " + ", ".join(NODE_KINDS), n.get("kind"))
            if n["id"] in by_id:
                raise _bad("nodes", "unique node ids", n["id"])
            n["pos_um"] = tuple(float(c) for c in _vec3(f"node {n['id']} pos_um", n["pos_um"]))
            by_id[n["id"]] = n
        seen = set()
        for s in self.segments:
            sid = s["id"]
            if sid in seen:
                raise _bad("segments", "unique segment ids", sid)
            seen.add(sid)
            pts = np.asarray(s["points_um"], dtype=float)
            if pts.ndim != 2 or pts.shape[1] != 3 or len(pts) < 2:
                raise _bad(f"segment {sid} points_um", "an array of shape (K>=2, 3)", pts.shape)
            rad = np.asarray(s["radii_um"], dtype=float)
            if rad.shape != (len(pts),) or not rad.min() > 0:
                raise _bad(f"segment {sid} radii_um", f"{len(pts)} radii > 0", rad.shape)
            for end, idx in (("node_from", 0), ("node_to", -1)):
                node = by_id.get(s[end])
                if node is None:
                    raise _bad(f"segment {sid} {end}", "an existing node id", s[end])
                if tuple(pts[idx].tolist()) != node["pos_um"]:
                    raise _bad(
                        f"segment {sid} {end}", "the polyline to end exactly at the node", pts[idx].tolist()
                    )
            s["points_um"], s["radii_um"] = pts, rad
            if "length_um" not in s:
                s["length_um"] = _polyline_length(pts)
            if "radius_um" not in s:
                s["radius_um"] = _nominal_radius(pts, rad)

    # ------------------------------------------------------------------ helpers

    def node_by_id(self) -> dict[int, dict]:
        """Map node id -> node dict."""
        return {n["id"]: n for n in self.nodes}

    def degrees(self) -> dict[int, int]:
        """Number of segment ends at each node (a self-loop counts twice)."""
        deg = {n["id"]: 0 for n in self.nodes}
        for s in self.segments:
            deg[s["node_from"]] += 1
            deg[s["node_to"]] += 1
        return deg

    def translated(self, offset_um: Sequence[float]) -> "VesselNetwork":
        """Return a copy shifted by ``offset_um`` (z, y, x)."""
        off = np.asarray(offset_um, dtype=float)
        net = copy.deepcopy(self)
        for n in net.nodes:
            n["pos_um"] = tuple(float(c) for c in np.asarray(n["pos_um"]) + off)
        for s in net.segments:
            s["points_um"] = s["points_um"] + off
        if net.box_um is not None:
            net.box_um = None
        return net

    def cyclomatic_number(self) -> int:
        """Independent loops: segments - nodes + connected components."""
        parent = {n["id"]: n["id"] for n in self.nodes}

        def find(a: int) -> int:
            while parent[a] != a:
                parent[a] = parent[parent[a]]
                a = parent[a]
            return a

        for s in self.segments:
            ra, rb = find(s["node_from"]), find(s["node_to"])
            if ra != rb:
                parent[ra] = rb
        components = len({find(n) for n in parent})
        return len(self.segments) - len(self.nodes) + components

    def to_truth(self, *, points_step_um: float = 5.0, points_tolerance_um: float = 0.02) -> dict[str, Any]:
        """Return the ground truth as a JSON-serialisable dict.

        Parameters
        ----------
        points_step_um : float
            Largest step of the thinned polylines written to the truth.
        points_tolerance_um : float
            Largest distance between a thinned chord and the dense polyline
            (bends keep more points, straight runs fewer). Lengths are computed
            before thinning.

        Returns
        -------
        dict
            ``nodes`` (id, kind, pos_um, degree), ``segments`` (id, ends,
            length_um, radius_um, chord_um, tortuosity, extra builder keys,
            thinned ``points_um`` (K', 3) and ``radii_um`` (K',)),
            ``bifurcations``, ``params`` and a ``summary``.
        """
        step = _positive("points_step_um", points_step_um)
        tol = _positive("points_tolerance_um", points_tolerance_um)
        deg = self.degrees()
        nodes = [
            {"id": n["id"], "kind": n["kind"], "pos_um": list(n["pos_um"]), "degree": deg[n["id"]]}
            for n in self.nodes
        ]
        pts_all, rad_all, owner, sel = _chord_selection(self, tol, lambda rmin, rmax, u: step)
        bounds = np.searchsorted(owner[sel], np.arange(len(self.segments) + 1))
        segs = []
        for i, s in enumerate(self.segments):
            keep = sel[bounds[i] : bounds[i + 1]]
            chord = float(np.linalg.norm(s["points_um"][-1] - s["points_um"][0]))
            entry = {k: v for k, v in s.items() if k not in ("points_um", "radii_um")}
            entry["chord_um"] = chord
            entry["tortuosity"] = float(s["length_um"] / chord) if chord > 0 else None
            entry["points_um"] = np.round(pts_all[keep], 4)
            entry["radii_um"] = np.round(rad_all[keep], 4)
            segs.append(entry)
        kinds = {k: sum(1 for n in self.nodes if n["kind"] == k) for k in NODE_KINDS}
        lengths = np.array([s["length_um"] for s in self.segments])
        radii = np.array([s["radius_um"] for s in self.segments])
        summary = {
            "n_nodes": len(self.nodes),
            "n_segments": len(self.segments),
            "node_kinds": kinds,
            "n_bifurcations": len(self.bifurcations),
            "n_broken_bifurcations": sum(1 for b in self.bifurcations if b.get("broken")),
            "cyclomatic_number": self.cyclomatic_number(),
            "total_length_um": float(lengths.sum()),
            # Sum of pi r^2 L: double-counts junction overlaps and ignores end caps.
            "tube_volume_um3": float(np.sum(np.pi * radii**2 * lengths)),
        }
        return _jsonable(
            {
                "format": "vesselflow-synthetic-truth",
                "version": 1,
                "kind": self.kind,
                "units": {"length": "um", "axes": "zyx"},
                "params": self.params,
                "box_um": self.box_um,
                "points_step_um": step,
                "points_tolerance_um": tol,
                "summary": summary,
                "nodes": nodes,
                "segments": segs,
                "bifurcations": self.bifurcations,
            }
        )


# ------------------------------------------------------------------------- clipping


def _box_crossing(outside: np.ndarray, inside: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> np.ndarray:
    """Point where the piece from ``outside`` to ``inside`` enters the box (Liang-Barsky)."""
    delta = inside - outside
    t = np.zeros(3)
    below, above = outside < lo, outside > hi
    with np.errstate(divide="ignore", invalid="ignore"):
        t = np.where(below, (lo - outside) / delta, t)
        t = np.where(above, (hi - outside) / delta, t)
    ax = int(np.argmax(t))
    p = outside + t[ax] * delta
    p[ax] = lo[ax] if below[ax] else hi[ax]
    return np.clip(p, lo, hi)


def _clip_network(
    net: VesselNetwork, lo: np.ndarray, hi: np.ndarray, *, track_source: bool = False
) -> VesselNetwork:
    """Cut every segment to the box ``[lo, hi]``; new cut ends are 'border' nodes.

    Degree-one nodes are then re-labelled: 'border' if their tube reaches a
    box face (distance to the face below the end radius), else 'blind'.
    With ``track_source`` every kept segment, cut or not, carries
    ``source_segment``, ``source_start_um`` and ``source_end_um`` (see
    :func:`crop_network`); without it only cut pieces carry
    ``source_segment`` (and ``clipped``), as the rasteriser's truth always had.
    """
    by_id = net.node_by_id()
    next_node = max(by_id) + 1
    next_seg = max(s["id"] for s in net.segments) + 1
    new_nodes: dict[int, dict] = {}
    segs: list[dict] = []
    # One vectorised inside test for all points; only straddling segments loop.
    k = np.array([len(s["points_um"]) for s in net.segments], dtype=np.int64)
    starts_all = np.cumsum(k) - k
    pts_all = np.concatenate([s["points_um"] for s in net.segments])
    inside_all = np.all((pts_all >= lo - _BOX_TOL) & (pts_all <= hi + _BOX_TOL), axis=1)
    all_in = np.logical_and.reduceat(inside_all, starts_all)
    any_in = np.logical_or.reduceat(inside_all, starts_all)
    for si, s in enumerate(net.segments):
        if track_source:
            src_id = s.get("source_segment", s["id"])
            src_at = float(s.get("source_start_um", 0.0))
        if all_in[si]:
            if track_source:
                s = dict(s, source_segment=src_id, source_start_um=src_at,
                         source_end_um=src_at + _polyline_length(s["points_um"]))
            segs.append(s)
            for nid in (s["node_from"], s["node_to"]):
                new_nodes[nid] = by_id[nid]
            continue
        if not any_in[si]:
            continue
        pts, rad = s["points_um"], s["radii_um"]
        if track_source:
            arc = np.r_[0.0, np.cumsum(np.linalg.norm(np.diff(pts, axis=0), axis=1))]
        inside = inside_all[starts_all[si] : starts_all[si] + k[si]]
        edges = np.diff(np.r_[0, inside.astype(np.int8), 0])
        starts, stops = np.nonzero(edges == 1)[0], np.nonzero(edges == -1)[0] - 1
        first = True
        for i, j in zip(starts.tolist(), stops.tolist()):
            run_p, run_r = [pts[i : j + 1]], [rad[i : j + 1]]
            if i > 0:
                q = _box_crossing(pts[i - 1], pts[i], lo, hi)
                frac = np.linalg.norm(q - pts[i - 1]) / max(np.linalg.norm(pts[i] - pts[i - 1]), 1e-300)
                run_p.insert(0, q[None])
                run_r.insert(0, [rad[i - 1] + frac * (rad[i] - rad[i - 1])])
                a = _node(next_node, q, "border")
                next_node += 1
            else:
                a = by_id[s["node_from"]]
            if j < len(pts) - 1:
                q = _box_crossing(pts[j + 1], pts[j], lo, hi)
                frac = np.linalg.norm(q - pts[j]) / max(np.linalg.norm(pts[j + 1] - pts[j]), 1e-300)
                run_p.append(q[None])
                run_r.append([rad[j] + frac * (rad[j + 1] - rad[j])])
                b = _node(next_node, q, "border")
                next_node += 1
            else:
                b = by_id[s["node_to"]]
            p = np.concatenate(run_p)
            if _polyline_length(p) < 1e-6:
                continue
            new_nodes[a["id"]], new_nodes[b["id"]] = a, b
            extra = {
                k: v
                for k, v in s.items()
                if k not in ("id", "node_from", "node_to", "points_um", "radii_um", "length_um", "radius_um")
            }
            extra.update(clipped=True, source_segment=s["id"])
            if track_source:
                start = arc[i] - (float(np.linalg.norm(p[1] - p[0])) if i > 0 else 0.0)
                extra.update(
                    source_segment=src_id,
                    source_start_um=src_at + start,
                    source_end_um=src_at + start + _polyline_length(p),
                )
            sid = s["id"] if first else next_seg
            if not first:
                next_seg += 1
            first = False
            segs.append(_make_segment(sid, a, b, p, np.concatenate(run_r), **extra))
    if not segs:
        raise InputError("network: expected at least part of it inside the box, got nothing inside")
    # Shallow copies: positions are tuples and arrays are never modified in place.
    clipped = VesselNetwork(
        [dict(new_nodes[nid]) for nid in sorted(new_nodes)],
        [dict(s) for s in segs],
        kind=net.kind,
        params=copy.deepcopy(net.params),
        bifurcations=[copy.deepcopy(b) for b in net.bifurcations if b["node"] in new_nodes],
        box_um=net.box_um,
    )
    deg = clipped.degrees()
    end_radius = {}
    for s in clipped.segments:
        end_radius[s["node_from"]] = s["radii_um"][0]
        end_radius[s["node_to"]] = s["radii_um"][-1]
    for n in clipped.nodes:
        if deg[n["id"]] == 1 and n["kind"] in ("blind", "border"):
            p = np.asarray(n["pos_um"])
            to_face = float(min(np.min(p - lo), np.min(hi - p)))
            n["kind"] = "border" if to_face < end_radius[n["id"]] else "blind"
    return clipped


def _chord_selection(net: VesselNetwork, tol: float, base_step: Callable[..., np.ndarray]):
    """Polyline points to keep so chords between them follow every curve within ``tol``.

    Each segment is cut into equal index steps of about ``base_step(rmin,
    rmax, u_abs)`` µm (called with per-segment arrays: smallest and largest
    radius, absolute unit chord direction (S, 3)), shortened where the curve
    bends so the sagitta ``h^2 kappa / 8`` stays below ``tol``; kinks (turns >
    20 degrees, e.g. where bed links were merged) and radius jumps are always
    kept. Works on all segments at once.

    Returns
    -------
    pts : ndarray (N, 3)
        All polyline points, segment after segment.
    rad : ndarray (N,)
        Their radii.
    owner : ndarray (N,)
        Segment index of each point.
    sel : ndarray (M,)
        Sorted indices into ``pts`` of the kept points (ends of every segment included).
    """
    k = np.array([len(s["points_um"]) for s in net.segments], dtype=np.int64)
    pts = np.concatenate([s["points_um"] for s in net.segments])
    rad = np.concatenate([s["radii_um"] for s in net.segments])
    starts = np.cumsum(k) - k
    owner = np.repeat(np.arange(len(k)), k)
    same = owner[1:] == owner[:-1]  # steps that stay inside one segment
    delta = np.diff(pts, axis=0)
    step = np.linalg.norm(delta, axis=1) * same
    u = delta / np.maximum(step, 1e-12)[:, None]
    turn = np.arccos(np.clip(np.einsum("ij,ij->i", u[:-1], u[1:]), -1.0, 1.0))
    turn *= same[:-1] & same[1:]
    kink = turn > 0.35
    kappa = np.where(kink, 0.0, turn / np.maximum(0.5 * (step[:-1] + step[1:]), 1e-12))
    kmax = np.zeros(len(k))
    np.maximum.at(kmax, owner[1:-1], kappa)
    total = np.add.reduceat(step, starts)
    smax = np.maximum.reduceat(step, starts)
    chord = pts[starts + k - 1] - pts[starts]
    u_abs = np.abs(chord) / np.maximum(np.linalg.norm(chord, axis=1), 1e-12)[:, None]
    h = np.broadcast_to(
        np.asarray(
            base_step(np.minimum.reduceat(rad, starts), np.maximum.reduceat(rad, starts), u_abs), dtype=float
        ),
        (len(k),),
    ).copy()
    bent = kmax > 0
    h[bent] = np.minimum(h[bent], np.sqrt(8.0 * tol / kmax[bent]))
    h = np.maximum(h, smax)
    m = np.maximum(1, np.ceil(total / h - 1e-9)).astype(np.int64)
    owner_sel = np.repeat(np.arange(len(k)), m + 1)
    j = np.arange(int(np.sum(m + 1))) - np.repeat(np.cumsum(m + 1) - (m + 1), m + 1)
    uniform = starts[owner_sel] + np.rint(j * (k - 1)[owner_sel] / m[owner_sel]).astype(np.int64)
    jumps = np.nonzero((rad[1:] != rad[:-1]) & same)[0]
    sel = np.unique(np.r_[uniform, np.nonzero(kink)[0] + 1, jumps, jumps + 1])
    return pts, rad, owner, sel


# ------------------------------------------------------------------------- tables and boxes


def network_tables(net: VesselNetwork):
    """Segment and node tables of a network, as :func:`pipeline.flow.solve_flow` takes them.

    Parameters
    ----------
    net : VesselNetwork

    Returns
    -------
    segments : DataFrame, shape (S, ...)
        ``segment_id``, ``node_from``, ``node_to``, ``length_um``,
        ``radius_um`` (the nominal radius), ``radius_hydraulic_um`` (the r
        with ``L / r^4 = integral dl / r^4`` along the polyline, radii
        linear between its points, integrated by the midpoint rule on its
        steps of at most ``MAX_STEP_UM``), then every other scalar key the
        segments carry (``vessel_class``, ``tree``, ``source_segment``, ...),
        missing values as NaN or None.
    nodes : DataFrame, shape (N, 6)
        ``node_id``, ``kind``, ``z_um``, ``y_um``, ``x_um``, ``degree``.
    """
    import pandas as pd

    if not isinstance(net, VesselNetwork):
        raise _bad("net", "a VesselNetwork", type(net).__name__)
    k = np.array([len(s["points_um"]) for s in net.segments], dtype=np.int64)
    pts = np.concatenate([s["points_um"] for s in net.segments])
    rad = np.concatenate([s["radii_um"] for s in net.segments])
    starts = np.cumsum(k) - k
    step = np.linalg.norm(np.diff(pts, axis=0), axis=1)
    r_mid = 0.5 * (rad[1:] + rad[:-1])
    # Steps across two segments (the last point of one, the first of the next) weigh nothing.
    inside = np.ones(len(step), dtype=bool)
    inside[(starts[1:] - 1)] = False
    w = np.where(inside, step / r_mid**4, 0.0)
    dl = np.where(inside, step, 0.0)
    # reduceat over each segment's steps: indices starts .. starts + k - 2.
    integral = np.add.reduceat(np.r_[w, 0.0], starts)
    arc = np.add.reduceat(np.r_[dl, 0.0], starts)
    r_h = (arc / integral) ** 0.25
    standard = ("id", "node_from", "node_to", "points_um", "radii_um", "length_um", "radius_um")
    rows = []
    for s, rh in zip(net.segments, r_h.tolist()):
        row = {
            "segment_id": int(s["id"]),
            "node_from": int(s["node_from"]),
            "node_to": int(s["node_to"]),
            "length_um": float(s["length_um"]),
            "radius_um": float(s["radius_um"]),
            "radius_hydraulic_um": rh,
        }
        row.update({key: v for key, v in s.items() if key not in standard and np.ndim(v) == 0})
        rows.append(row)
    segments = pd.DataFrame(rows)
    deg = net.degrees()
    p = np.array([n["pos_um"] for n in net.nodes], dtype=float).reshape(-1, 3)
    nodes = pd.DataFrame({
        "node_id": np.array([n["id"] for n in net.nodes], dtype=np.int64),
        "kind": [n["kind"] for n in net.nodes],
        "z_um": p[:, 0],
        "y_um": p[:, 1],
        "x_um": p[:, 2],
        "degree": np.array([deg[n["id"]] for n in net.nodes], dtype=np.int64),
    })
    return segments, nodes


def crop_network(net: VesselNetwork, box_um: Sequence[Sequence[float]]) -> VesselNetwork:
    """Cut a network to a sub-box, keeping where each piece came from.

    Segments crossing a face of the box are cut there, and their cut ends
    become 'border' nodes; as in the rasteriser's clipping, an end node left
    with one vessel is 'border' when its tube reaches a face (closer than
    its end radius) and 'blind' otherwise. A segment that leaves and
    re-enters the box gives several pieces. Pieces keep the orientation of
    their source (``node_from`` towards the source's ``node_to``), so signed
    flows compare directly.

    Parameters
    ----------
    net : VesselNetwork
    box_um : ((float, float, float), (float, float, float))
        Lower and upper corners ``(z, y, x)`` µm, in the network's
        coordinates.

    Returns
    -------
    VesselNetwork
        In the box's frame (the lower corner moved to the origin) with
        ``box_um`` its size, so :func:`rasterize` keeps the coordinates.
        Every segment carries ``source_segment`` (the id of the segment of
        ``net`` it is part of, or of that segment's own source when ``net``
        was cropped already), ``source_start_um`` and ``source_end_um``
        (arc positions of its ends along the source polyline from the
        source's ``node_from``; their difference is its length);
        ``params`` gains ``crop_lo_um`` and ``crop_hi_um`` (in the source's
        frame, accumulated over repeated crops).

    Raises
    ------
    InputError
        A box that is not two corners with ``lo < hi``, or one that holds no
        part of the network.
    """
    if not isinstance(net, VesselNetwork):
        raise _bad("net", "a VesselNetwork", type(net).__name__)
    try:
        corners = np.asarray(box_um, dtype=float)
    except (TypeError, ValueError):
        corners = None
    if corners is None or corners.shape != (2, 3) or not np.all(np.isfinite(corners)) or not np.all(
        corners[0] < corners[1]
    ):
        raise _bad(
            "box_um", "two corners ((z0, y0, x0), (z1, y1, x1)) with z0 < z1, y0 < y1, x0 < x1", box_um
        )
    lo, hi = corners
    cut = _clip_network(net, lo, hi, track_source=True)
    out = cut.translated(-lo)
    out.box_um = tuple((hi - lo).tolist())
    base = np.asarray(net.params.get("crop_lo_um", np.zeros(3)), dtype=float)
    out.params["crop_lo_um"] = (base + lo).tolist()
    out.params["crop_hi_um"] = (base + hi).tolist()
    return out
