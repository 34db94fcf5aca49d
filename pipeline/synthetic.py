"""Synthetic vessel networks with exact ground truth, and their voxel masks.

In: geometric parameters in micrometres (lengths, radii, angles, a Murray
exponent, random seeds) for one of several builders (straight, curved and
helical tubes, a torus, a Y branch, a 3-D dichotomous tree, a looping
capillary bed, a ladder), then a voxel spacing ``(dz, dy, dx)`` and optional
imperfections (surface roughness, stray specks, enclosed holes).

Out: a :class:`VesselNetwork` (nodes and densely sampled centreline polylines
with radii, in µm), a boolean mask of shape ``(Z, Y, X)`` from
:func:`rasterize` together with a JSON-serialisable truth dictionary (node
positions in µm and in voxel index units, segment lengths and radii,
bifurcation radii, what was added on purpose), and, from
:func:`write_volume`, a uint8 0/255 ImageJ TIFF with a ``<stem>.truth.json``
beside it.

Conventions: axis order (z, y, x); voxel ``(i, j, k)`` has its centre at
``(i*dz, j*dy, k*dx)`` µm. A voxel is vessel when its centre lies inside the
union of capsules along the polyline, the capsule radius interpolated
linearly along each polyline piece.
"""

from __future__ import annotations

import copy
import inspect
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from scipy import ndimage
from scipy.optimize import brentq
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import minimum_spanning_tree
from scipy.spatial import cKDTree

from .errors import InputError

__all__ = [
    "VesselNetwork",
    "SynthKind",
    "SYNTH_KINDS",
    "MAX_STEP_UM",
    "straight_tube",
    "curved_tube",
    "helix",
    "torus",
    "y_branch",
    "binary_tree",
    "capillary_bed",
    "ladder",
    "murray_daughter_radii",
    "murray_angles_deg",
    "rasterize",
    "write_volume",
    "truth_path_for",
    "synthesize",
]

#: Largest distance between consecutive polyline points of every builder (µm).
MAX_STEP_UM = 0.5

NODE_KINDS = ("junction", "blind", "border", "loop")

# The roughness field is clipped to +-2.5 sd, so with roughness <= 0.3 the local
# radius never drops below a quarter of the nominal one and thin tubes stay whole.
_FIELD_CLIP = 2.5
_MAX_ROUGHNESS = 0.3
# Edge length (a power of two, for cheap wrapping) and smoothing of the periodic
# noise texture behind the roughness field. With 12 texels per correlation
# length a nearest-texel lookup changes the field by ~0.1 sd per step, far
# below what a voxel can show, and is several times cheaper than interpolation.
_TEX_N = 128
_TEX_SIGMA = 6.0
# Chords replace arcs in the rasteriser; their sagitta stays below this fraction
# of the finest voxel edge, well under the half-voxel quantisation itself.
_SAGITTA_FRACTION = 0.05
# Candidate voxels evaluated per vectorised batch: ~2 M keeps the temporaries
# near 150 MB while amortising the numpy call overhead.
_BATCH_VOXELS = 1 << 21
# Coordinates this close to a box face count as on it (µm).
_BOX_TOL = 1e-7


# --------------------------------------------------------------------------- checks


def _bad(name: str, expected: str, got: Any) -> InputError:
    return InputError(f"{name}: expected {expected}, got {got!r}")


def _real(
    name: str,
    value: Any,
    *,
    low: float | None = None,
    low_open: bool = False,
    high: float | None = None,
    high_open: bool = False,
) -> float:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise _bad(name, "a number", value)
    v = float(value)
    if not math.isfinite(v):
        raise _bad(name, "a finite number", value)
    if low is not None and (v < low or (low_open and v == low)):
        raise _bad(name, f"a number {'>' if low_open else '>='} {low:g}", value)
    if high is not None and (v > high or (high_open and v == high)):
        raise _bad(name, f"a number {'<' if high_open else '<='} {high:g}", value)
    return v


def _positive(name: str, value: Any) -> float:
    return _real(name, value, low=0.0, low_open=True)


def _count(name: str, value: Any, *, low: int = 0, high: int | None = None) -> int:
    if isinstance(value, (bool, np.bool_)) or not isinstance(value, (int, np.integer)):
        raise _bad(name, "an integer", value)
    v = int(value)
    if v < low or (high is not None and v > high):
        rng = f">= {low}" if high is None else f"in [{low}, {high}]"
        raise _bad(name, f"an integer {rng}", value)
    return v


def _vec3(name: str, value: Any, *, positive: bool = False, nonzero: bool = False) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise _bad(name, "three numbers (z, y, x)", value) from None
    if arr.shape != (3,):
        raise _bad(name, "three numbers (z, y, x)", value)
    if not np.all(np.isfinite(arr)):
        raise _bad(name, "three finite numbers", value)
    if positive and not np.all(arr > 0):
        raise _bad(name, "three numbers > 0", value)
    if nonzero and not np.any(arr != 0):
        raise _bad(name, "a non-zero vector", value)
    return arr


def _spacing(spacing: Any) -> np.ndarray:
    return _vec3("spacing", spacing, positive=True)


def _choice(name: str, value: Any, choices: Sequence[str]) -> str:
    if value not in choices:
        raise _bad(name, "one of " + ", ".join(repr(c) for c in choices), value)
    return value


def _rng(seed: Any) -> np.random.Generator:
    if seed is not None and (
        isinstance(seed, (bool, np.bool_)) or not isinstance(seed, (int, np.integer)) or seed < 0
    ):
        raise _bad("seed", "None or an integer >= 0", seed)
    return np.random.default_rng(seed)


# ------------------------------------------------------------------------- geometry


def _unit(v: np.ndarray) -> np.ndarray:
    v = np.asarray(v, dtype=float)
    return v / np.linalg.norm(v)


def _any_perpendicular(d: np.ndarray) -> np.ndarray:
    # Cross with the axis least aligned with d so the result is well conditioned.
    ref = np.zeros(3)
    ref[int(np.argmin(np.abs(d)))] = 1.0
    return _unit(np.cross(d, ref))


def _rotate(v: np.ndarray, axis: np.ndarray, angle_rad: float) -> np.ndarray:
    """Rodrigues rotation of ``v`` about unit ``axis``."""
    c, s = math.cos(angle_rad), math.sin(angle_rad)
    return v * c + np.cross(axis, v) * s + axis * np.dot(axis, v) * (1.0 - c)


def _polyline_length(points: np.ndarray) -> float:
    return float(np.sum(np.linalg.norm(np.diff(points, axis=0), axis=1)))


def _n_steps(length_um: float) -> int:
    return max(1, int(math.ceil(length_um / MAX_STEP_UM - 1e-9)))


def _line_points(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    n = _n_steps(float(np.linalg.norm(b - a)))
    t = np.linspace(0.0, 1.0, n + 1)[:, None]
    pts = a + t * (b - a)
    pts[0], pts[-1] = a, b
    return pts


def _wiggled_points(
    a: np.ndarray, b: np.ndarray, amplitude_um: float, e_perp: np.ndarray, half_waves: int
) -> np.ndarray:
    """Chord a->b displaced sideways by ``amplitude * sin(pi t) * sin(pi m t)``.

    The ``sin(pi t)`` envelope keeps the ends in place and their tangents along
    the chord, so branching angles at junctions stay as designed and tubes
    meeting at a node do not lean towards each other. The arc is at most chord
    + total variation of the displacement (<= 2 m amplitude), which sets a
    sample count that keeps every step below ``MAX_STEP_UM``.
    """
    chord = float(np.linalg.norm(b - a))
    n = _n_steps(chord + 2.0 * half_waves * abs(amplitude_um))
    t = np.linspace(0.0, 1.0, n + 1)[:, None]
    pts = a + t * (b - a) + amplitude_um * np.sin(np.pi * t) * np.sin(np.pi * half_waves * t) * e_perp
    pts[0], pts[-1] = a, b
    return pts


def _make_segment(
    seg_id: int,
    node_from: dict,
    node_to: dict,
    points: np.ndarray,
    radii: float | np.ndarray,
    *,
    length_um: float | None = None,
    **extra: Any,
) -> dict:
    pts = np.array(points, dtype=float)
    # Shared nodes must be bit-identical with the polyline ends.
    pts[0] = node_from["pos_um"]
    pts[-1] = node_to["pos_um"]
    rad = np.broadcast_to(np.asarray(radii, dtype=float), (len(pts),)).copy()
    seg = {
        "id": int(seg_id),
        "node_from": int(node_from["id"]),
        "node_to": int(node_to["id"]),
        "points_um": pts,
        "radii_um": rad,
    }
    if length_um is not None:
        seg["length_um"] = float(length_um)
    seg.update(extra)
    return seg


def _nominal_radius(points: np.ndarray, radii: np.ndarray) -> float:
    if np.all(radii == radii[0]):
        return float(radii[0])
    w = np.linalg.norm(np.diff(points, axis=0), axis=1)
    mid = 0.5 * (radii[1:] + radii[:-1])
    return float(np.sum(w * mid) / np.sum(w)) if np.sum(w) > 0 else float(np.mean(radii))


def _node(node_id: int, pos: Sequence[float], kind: str) -> dict:
    return {"id": int(node_id), "pos_um": tuple(float(c) for c in pos), "kind": kind}


# --------------------------------------------------------------------------- network


def _jsonable(obj: Any) -> Any:
    """Copy of ``obj`` with numpy arrays and scalars turned into Python types."""
    t = type(obj)
    if t in (str, int, float, bool) or obj is None:
        return obj
    if isinstance(obj, np.ndarray):
        # tolist() already yields Python scalars; walking them again is the slow part.
        return obj.tolist() if obj.dtype != object else [_jsonable(v) for v in obj]
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        return obj.item()
    return obj


def _json_default(obj: Any) -> Any:
    if isinstance(obj, (np.ndarray, np.generic)):
        return obj.tolist()
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


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


# ------------------------------------------------------------------ simple builders


def straight_tube(
    *,
    length_um: float,
    radius_um: float,
    direction: Sequence[float] = (0.0, 0.0, 1.0),
    centre_um: Sequence[float] | None = None,
    ends: str = "border",
) -> VesselNetwork:
    """Straight tube of constant radius.

    Parameters
    ----------
    length_um, radius_um : float
        Centreline length and radius (µm), both > 0.
    direction : sequence of 3 float
        Axis direction (z, y, x); normalised.
    centre_um : sequence of 3 float, optional
        Midpoint of the centreline; default the origin.
    ends : {'border', 'blind'}
        ``'border'``: :func:`rasterize` cuts the tube flat at two box faces
        (voxel count approx ``pi r^2 (L + d)`` for the slab of voxels);
        ``'blind'``: hemispherical caps, volume ``pi r^2 L + 4/3 pi r^3``.

    Returns
    -------
    VesselNetwork
        Two nodes, one segment.
    """
    length = _positive("length_um", length_um)
    radius = _positive("radius_um", radius_um)
    d = _unit(_vec3("direction", direction, nonzero=True))
    c = np.zeros(3) if centre_um is None else _vec3("centre_um", centre_um)
    kind = _choice("ends", ends, ("border", "blind"))
    a, b = c - 0.5 * length * d, c + 0.5 * length * d
    n0, n1 = _node(0, a, kind), _node(1, b, kind)
    seg = _make_segment(
        0, n0, n1, _line_points(np.asarray(n0["pos_um"]), np.asarray(n1["pos_um"])), radius, length_um=length
    )
    params = {"length_um": length, "radius_um": radius, "direction": d, "centre_um": c, "ends": kind}
    return VesselNetwork([n0, n1], [seg], kind="tube", params=params)


def curved_tube(
    *, arc_radius_um: float, angle_deg: float, radius_um: float, ends: str = "border"
) -> VesselNetwork:
    """Tube along a circular arc in the (y, x) plane.

    The arc starts at the origin heading +x and bends towards +y:
    ``x = R sin s, y = R (1 - cos s)``, ``s`` in ``[0, angle]``.

    Parameters
    ----------
    arc_radius_um : float
        Centreline curvature radius R, larger than ``radius_um``.
    angle_deg : float
        Swept angle, in (0, 360).
    radius_um : float
        Tube radius.
    ends : {'border', 'blind'}
        Node kind of both ends (see :func:`straight_tube`); 'border' cuts
        cleanly for angles up to 90 degrees.

    Returns
    -------
    VesselNetwork
        Two nodes, one segment of analytic length ``R * angle``.
    """
    big_r = _positive("arc_radius_um", arc_radius_um)
    ang = _real("angle_deg", angle_deg, low=0.0, low_open=True, high=360.0, high_open=True)
    radius = _positive("radius_um", radius_um)
    kind = _choice("ends", ends, ("border", "blind"))
    if big_r <= radius:
        raise _bad("arc_radius_um", f"a value > radius_um ({radius:g})", arc_radius_um)
    theta = math.radians(ang)
    if ang > 180.0 and 2.0 * big_r * math.sin(theta / 2.0) <= 2.0 * radius + 2.0:
        raise _bad("angle_deg", "an angle whose tube ends do not touch each other", angle_deg)
    length = big_r * theta
    s = np.linspace(0.0, theta, _n_steps(length) + 1)
    pts = np.stack([np.zeros_like(s), big_r * (1.0 - np.cos(s)), big_r * np.sin(s)], axis=1)
    n0, n1 = _node(0, pts[0], kind), _node(1, pts[-1], kind)
    seg = _make_segment(0, n0, n1, pts, radius, length_um=length)
    params = {"arc_radius_um": big_r, "angle_deg": ang, "radius_um": radius, "ends": kind}
    return VesselNetwork([n0, n1], [seg], kind="curved", params=params)


def helix(
    *, coil_radius_um: float, pitch_um: float, turns: float, radius_um: float, ends: str = "blind"
) -> VesselNetwork:
    """Helical tube around the z axis.

    ``z = p t / (2 pi), y = a sin t, x = a cos t`` for ``t`` in ``[0, 2 pi n]``.

    Parameters
    ----------
    coil_radius_um : float
        Helix radius a, larger than ``radius_um``.
    pitch_um : float
        Rise per turn p, larger than ``2 * radius_um`` so turns stay apart.
    turns : float
        Number of turns n > 0.
    radius_um : float
        Tube radius.
    ends : {'blind', 'border'}
        Node kind of both ends; the default caps them because no box face is
        perpendicular to a helix end.

    Returns
    -------
    VesselNetwork
        Two nodes, one segment with analytic length ``n sqrt((2 pi a)^2 + p^2)``.
    """
    a = _positive("coil_radius_um", coil_radius_um)
    p = _positive("pitch_um", pitch_um)
    n_turns = _positive("turns", turns)
    radius = _positive("radius_um", radius_um)
    kind = _choice("ends", ends, ("border", "blind"))
    if a <= radius:
        raise _bad("coil_radius_um", f"a value > radius_um ({radius:g})", coil_radius_um)
    if p <= 2.0 * radius:
        raise _bad("pitch_um", f"a value > 2 * radius_um ({2 * radius:g}) so turns do not touch", pitch_um)
    # helix arc length: standard differential geometry, |r'(t)| = sqrt(a^2 + c^2), c = p / (2 pi).
    length = n_turns * math.sqrt((2.0 * math.pi * a) ** 2 + p**2)
    t = np.linspace(0.0, 2.0 * math.pi * n_turns, _n_steps(length) + 1)
    pts = np.stack([p * t / (2.0 * math.pi), a * np.sin(t), a * np.cos(t)], axis=1)
    n0, n1 = _node(0, pts[0], kind), _node(1, pts[-1], kind)
    seg = _make_segment(0, n0, n1, pts, radius, length_um=length)
    params = {"coil_radius_um": a, "pitch_um": p, "turns": n_turns, "radius_um": radius, "ends": kind}
    return VesselNetwork([n0, n1], [seg], kind="helix", params=params)


def torus(*, major_radius_um: float, minor_radius_um: float) -> VesselNetwork:
    """Closed circular loop in the (y, x) plane: one 'loop' node, one self-loop segment.

    Parameters
    ----------
    major_radius_um : float
        Centreline circle radius R, larger than the tube radius.
    minor_radius_um : float
        Tube radius.

    Returns
    -------
    VesselNetwork
        One node of kind 'loop'; one segment of analytic length ``2 pi R``.
    """
    big_r = _positive("major_radius_um", major_radius_um)
    r = _positive("minor_radius_um", minor_radius_um)
    if big_r <= r:
        raise _bad(
            "major_radius_um", f"a value > minor_radius_um ({r:g}) so the ring has a hole", major_radius_um
        )
    length = 2.0 * math.pi * big_r
    t = np.linspace(0.0, 2.0 * math.pi, _n_steps(length) + 1)
    pts = np.stack([np.zeros_like(t), big_r * np.sin(t), big_r * np.cos(t)], axis=1)
    n0 = _node(0, pts[0], "loop")
    seg = _make_segment(0, n0, n0, pts, r, length_um=length)
    params = {"major_radius_um": big_r, "minor_radius_um": r}
    return VesselNetwork([n0], [seg], kind="torus", params=params)


def ladder(
    *,
    rail_length_um: float = 160.0,
    rail_separation_um: float = 40.0,
    rungs: int = 3,
    rail_radius_um: float = 5.0,
    rung_radius_um: float = 3.5,
    ends: str = "border",
) -> VesselNetwork:
    """Two parallel vessels along x joined by ``rungs`` perpendicular vessels.

    Parameters
    ----------
    rail_length_um, rail_separation_um : float
        Rail length (along x) and centre distance (along y).
    rungs : int
        Number of connecting vessels (>= 1), evenly spaced; the network holds
        ``rungs - 1`` independent loops.
    rail_radius_um, rung_radius_um : float
        Radii.
    ends : {'border', 'blind'}
        Kind of the four rail ends.

    Returns
    -------
    VesselNetwork
        ``4 + 2*rungs`` nodes, ``3*rungs + 2`` segments.
    """
    length = _positive("rail_length_um", rail_length_um)
    sep = _positive("rail_separation_um", rail_separation_um)
    n_rungs = _count("rungs", rungs, low=1)
    r_rail = _positive("rail_radius_um", rail_radius_um)
    r_rung = _positive("rung_radius_um", rung_radius_um)
    kind = _choice("ends", ends, ("border", "blind"))
    if sep <= 2.0 * r_rail + 2.0:
        raise _bad(
            "rail_separation_um", f"a value > 2 * rail_radius_um + 2 ({2 * r_rail + 2:g})", rail_separation_um
        )
    gap = length / (n_rungs + 1)
    if gap <= 2.0 * r_rung + 2.0:
        raise _bad(
            "rungs", f"at most {int(length / (2 * r_rung + 2)) - 1} rungs on a {length:g} um rail", rungs
        )
    xs = np.r_[0.0, gap * np.arange(1, n_rungs + 1), length]
    nodes, segs = [], []
    rail_nodes: list[list[dict]] = []
    for y in (0.0, sep):
        row = []
        for i, x in enumerate(xs):
            end = i in (0, len(xs) - 1)
            row.append(_node(len(nodes), (0.0, y, x), kind if end else "junction"))
            nodes.append(row[-1])
        rail_nodes.append(row)
    for row in rail_nodes:
        for a, b in zip(row[:-1], row[1:]):
            pa, pb = np.asarray(a["pos_um"]), np.asarray(b["pos_um"])
            segs.append(
                _make_segment(len(segs), a, b, _line_points(pa, pb), r_rail, length_um=gap, role="rail")
            )
    for a, b in zip(rail_nodes[0][1:-1], rail_nodes[1][1:-1]):
        pa, pb = np.asarray(a["pos_um"]), np.asarray(b["pos_um"])
        segs.append(_make_segment(len(segs), a, b, _line_points(pa, pb), r_rung, length_um=sep, role="rung"))
    params = {
        "rail_length_um": length,
        "rail_separation_um": sep,
        "rungs": n_rungs,
        "rail_radius_um": r_rail,
        "rung_radius_um": r_rung,
        "ends": kind,
    }
    return VesselNetwork(nodes, segs, kind="ladder", params=params)


# ------------------------------------------------------------------ Murray branching


def murray_daughter_radii(
    parent_radius_um: float, *, exponent: float = 3.0, asymmetry: float = 1.0
) -> tuple[float, float]:
    """Daughter radii with ``r0^x = r1^x + r2^x`` and ``r2 = asymmetry * r1``.

    Murray CD 1926, PNAS 12:207 (cube law for x = 3); other exponents are the
    usual generalisation.

    Returns
    -------
    (float, float)
        ``(r1, r2)`` in µm.
    """
    r0 = _positive("parent_radius_um", parent_radius_um)
    x = _positive("exponent", exponent)
    q = _positive("asymmetry", asymmetry)
    r1 = r0 * (1.0 + q**x) ** (-1.0 / x)
    return r1, q * r1


def murray_angles_deg(r0: float, r1: float, r2: float) -> tuple[float, float]:
    """Minimum-work branching angles of each daughter from the parent axis.

    ``cos(theta1) = (r0^4 + r1^4 - r2^4) / (2 r0^2 r1^2)`` and the same with 1
    and 2 swapped (Murray CD 1926, J Gen Physiol 9:835). Cosines are clipped to
    [-1, 1] for radii that violate the law.

    Returns
    -------
    (float, float)
        ``(theta1, theta2)`` in degrees.
    """
    c1 = (r0**4 + r1**4 - r2**4) / (2.0 * r0**2 * r1**2)
    c2 = (r0**4 + r2**4 - r1**4) / (2.0 * r0**2 * r2**2)
    return math.degrees(math.acos(min(1.0, max(-1.0, c1)))), math.degrees(math.acos(min(1.0, max(-1.0, c2))))


def _daughter_directions(d: np.ndarray, plane_normal: np.ndarray, theta1_deg: float, theta2_deg: float):
    u = _unit(np.cross(plane_normal, d))
    t1, t2 = math.radians(theta1_deg), math.radians(theta2_deg)
    return _unit(math.cos(t1) * d + math.sin(t1) * u), _unit(math.cos(t2) * d - math.sin(t2) * u)


def _angle_pair(angle_deg: Any) -> tuple[float, float] | None:
    if angle_deg is None:
        return None
    if isinstance(angle_deg, (list, tuple, np.ndarray)):
        if len(angle_deg) != 2:
            raise _bad("angle_deg", "None, one angle or two angles in degrees", angle_deg)
        a1, a2 = angle_deg
    else:
        a1 = a2 = angle_deg
    return (
        _real("angle_deg", a1, low=0.0, high=90.0, high_open=True),
        _real("angle_deg", a2, low=0.0, high=90.0, high_open=True),
    )


def _siblings_apart(r1: float, r2: float, th1: float, th2: float, l1: float, l2: float) -> bool:
    """True when two straight daughters separate within 60 % of the shorter one.

    Points at arc length s on two rays opening by theta lie 2 s sin(theta/2)
    apart; the tubes part once that exceeds ``r1 + r2``. Closer pairs would
    merge into one thick vessel over most of their length.
    """
    half = math.radians(th1 + th2) / 2.0
    if half <= 0:
        return False
    return (r1 + r2) / (2.0 * math.sin(half)) <= 0.6 * min(l1, l2)


def _bifurcation_record(node_id, level, parent, d1, d2, r0, r1, r2, x, th1, th2, broken, phi=None) -> dict:
    rec = {
        "node": int(node_id),
        "level": int(level),
        "parent_segment": int(parent),
        "daughter_segments": [int(d1), int(d2)],
        "r0_um": r0,
        "r1_um": r1,
        "r2_um": r2,
        "exponent": x,
        # Relative violation of r0^x = r1^x + r2^x: zero by construction unless broken.
        "murray_residual": (r1**x + r2**x) / r0**x - 1.0,
        "angle1_deg": th1,
        "angle2_deg": th2,
        "broken": bool(broken),
    }
    if phi is not None:
        rec["plane_rotation_deg"] = phi
    return rec


def y_branch(
    *,
    parent_radius_um: float,
    exponent: float = 3.0,
    parent_length_um: float,
    daughter_length_um: float | Sequence[float],
    angle_deg: float | Sequence[float] | None = None,
    asymmetry: float = 1.0,
) -> VesselNetwork:
    """One parent vessel splitting into two daughters.

    The parent starts at the origin on a box face ('border') and runs along +z;
    the daughters open in the (z, x) plane and end blind.

    Parameters
    ----------
    parent_radius_um : float
        Parent radius r0.
    exponent : float
        Murray exponent x: ``r0^x = r1^x + r2^x``.
    parent_length_um : float
        Parent length.
    daughter_length_um : float or (float, float)
        Daughter lengths.
    angle_deg : None, float or (float, float)
        Angle of each daughter from the parent axis; None uses the Murray
        minimum-work optimum (see :func:`murray_angles_deg`).
    asymmetry : float
        ``r2 / r1``.

    Returns
    -------
    VesselNetwork
        Four nodes, three segments, one bifurcation record.
    """
    r0 = _positive("parent_radius_um", parent_radius_um)
    x = _positive("exponent", exponent)
    l0 = _positive("parent_length_um", parent_length_um)
    if isinstance(daughter_length_um, (list, tuple, np.ndarray)):
        if len(daughter_length_um) != 2:
            raise _bad("daughter_length_um", "one or two lengths", daughter_length_um)
        l1, l2 = (_positive("daughter_length_um", v) for v in daughter_length_um)
    else:
        l1 = l2 = _positive("daughter_length_um", daughter_length_um)
    q = _positive("asymmetry", asymmetry)
    r1, r2 = murray_daughter_radii(r0, exponent=x, asymmetry=q)
    angles = _angle_pair(angle_deg)
    th1, th2 = angles if angles is not None else murray_angles_deg(r0, r1, r2)
    if not _siblings_apart(r1, r2, th1, th2, l1, l2):
        raise _bad("angle_deg", "daughter angles wide enough for the daughters to separate", angle_deg)
    d = np.array([1.0, 0.0, 0.0])
    d1, d2 = _daughter_directions(d, np.array([0.0, 1.0, 0.0]), th1, th2)
    n0 = _node(0, (0.0, 0.0, 0.0), "border")
    n1 = _node(1, l0 * d, "junction")
    j = np.asarray(n1["pos_um"])
    n2 = _node(2, j + l1 * d1, "blind")
    n3 = _node(3, j + l2 * d2, "blind")
    segs = [
        _make_segment(0, n0, n1, _line_points(np.zeros(3), j), r0, length_um=l0, level=0),
        _make_segment(1, n1, n2, _line_points(j, np.asarray(n2["pos_um"])), r1, length_um=l1, level=1),
        _make_segment(2, n1, n3, _line_points(j, np.asarray(n3["pos_um"])), r2, length_um=l2, level=1),
    ]
    bif = [_bifurcation_record(1, 0, 0, 1, 2, r0, r1, r2, x, th1, th2, False)]
    params = {
        "parent_radius_um": r0,
        "exponent": x,
        "parent_length_um": l0,
        "daughter_length_um": [l1, l2],
        "angle_deg": angle_deg,
        "asymmetry": q,
        "murray_angles": angles is None,
    }
    return VesselNetwork([n0, n1, n2, n3], segs, kind="ybranch", params=params, bifurcations=bif)


class _Clearance:
    """Spatial index of sampled centreline points with radii, to keep vessels apart.

    Two sample points of different, non-adjacent segments clash when closer than
    ``factor * (r_a + r_b) + gap``; the factor leaves room for roughness.
    """

    def __init__(self, gap_um: float, factor: float = 1.25):
        self.gap, self.factor = gap_um, factor
        self._pts = np.empty((0, 3))
        self._rad = np.empty(0)
        self._sid = np.empty(0, dtype=np.int64)
        self._tree: cKDTree | None = None
        self._n_tree = 0

    def add(self, pts: np.ndarray, radius: float, seg_id: int) -> None:
        self._pts = np.vstack([self._pts, pts])
        self._rad = np.r_[self._rad, np.full(len(pts), radius)]
        self._sid = np.r_[self._sid, np.full(len(pts), seg_id, dtype=np.int64)]
        # Rebuilding the tree on every add is quadratic; rebuild only when the
        # brute-force tail grows large.
        if len(self._pts) - self._n_tree > 4000:
            self._tree, self._n_tree = cKDTree(self._pts), len(self._pts)

    def clear(self, pts: np.ndarray, radius: float, exclude: set[int]) -> bool:
        if len(self._pts) == 0:
            return True
        reach = self.factor * (radius + self._rad.max()) + self.gap
        cand = []
        if self._tree is not None:
            hits = self._tree.query_ball_point(pts, reach)
            lens = np.fromiter((len(h) for h in hits), dtype=np.int64, count=len(hits))
            if lens.sum():
                qi = np.repeat(np.arange(len(pts)), lens)
                pj = np.concatenate([np.asarray(h, dtype=np.int64) for h in hits if h])
                cand.append((qi, pj))
        tail = np.arange(self._n_tree, len(self._pts))
        if len(tail):
            dd = np.linalg.norm(pts[:, None, :] - self._pts[tail][None, :, :], axis=2)
            qi, tj = np.nonzero(dd < reach)
            cand.append((qi, tail[tj]))
        for qi, pj in cand:
            keep = ~np.isin(self._sid[pj], list(exclude))
            qi, pj = qi[keep], pj[keep]
            if len(qi) == 0:
                continue
            dist = np.linalg.norm(pts[qi] - self._pts[pj], axis=1)
            if np.any(dist < self.factor * (radius + self._rad[pj]) + self.gap):
                return False
        return True


def binary_tree(
    *,
    depth: int,
    root_radius_um: float,
    exponent: float = 3.0,
    asymmetry: float = 1.0,
    length_radius_ratio: float = 12.0,
    angle_deg: float | Sequence[float] | None = None,
    min_radius_um: float = 1.0,
    seed: int | None = None,
    jitter_deg: float = 0.0,
    broken_fraction: float = 0.0,
    broken_ratio: float = 0.95,
    wiggle: float = 0.0,
    plane_rotation_deg: float = 90.0,
    clearance_um: float = 2.0,
) -> VesselNetwork:
    """Three-dimensional dichotomous tree obeying a Murray-type radius law.

    The root starts at the origin on a box face (node kind 'border') and runs
    along +z. At each bifurcation the daughter radii satisfy
    ``r0^x = r1^x + r2^x`` with ``r2 = asymmetry * r1`` exactly (Murray CD 1926,
    PNAS 12:207); the branching plane turns by ``plane_rotation_deg`` about the
    parent axis from one level to the next so the tree fills 3-D. If a daughter
    pair would come too close to existing vessels (or cross the root face),
    other plane rotations are tried; if none fits, that end stays blind.

    Parameters
    ----------
    depth : int
        Bifurcation levels (0 = a single root segment); segments have levels
        0..depth.
    root_radius_um : float
        Root radius.
    exponent : float
        Murray exponent x.
    asymmetry : float
        ``r2 / r1`` at every regular bifurcation.
    length_radius_ratio : float
        Segment chord length as a multiple of its own radius (typically 10-15).
    angle_deg : None, float or (float, float)
        Daughter angles from the parent axis; None uses the Murray minimum-work
        optimum for the actual radii (Murray CD 1926, J Gen Physiol 9:835).
    min_radius_um : float
        No daughters thinner than this; such ends stay blind.
    seed : int, optional
        Seed for jitter, wiggle directions and the choice of broken bifurcations.
    jitter_deg : float
        Standard deviation of random perturbations of the branching angles and
        plane rotations (degrees).
    broken_fraction : float
        Fraction in [0, 1] of bifurcations made wrong on purpose: both daughters
        get ``broken_ratio * r0``. They are spread evenly over breadth-first
        order with a random phase, so the count is ``floor`` or ``ceil`` of the
        fraction times the number of bifurcations.
    broken_ratio : float
        Daughter/parent radius ratio at broken bifurcations.
    wiggle : float
        Amplitude of a sideways displacement ``sin(pi t) sin(pi m t)`` (m = 1
        or 2, random direction) of each segment, as a fraction of its chord; the
        envelope keeps branching angles at the nodes. 0 keeps segments straight;
        0.12 gives tortuosities of about 1.03-1.1.
    plane_rotation_deg : float
        Turn of the branching plane between consecutive levels.
    clearance_um : float
        Extra gap kept between non-adjacent vessels.

    Returns
    -------
    VesselNetwork
        Segments carry ``level`` (root 0) and ``parent_segment``;
        ``bifurcations`` hold radii, angles and ``broken`` flags.
    """
    n_levels = _count("depth", depth, low=0, high=14)
    r_root = _positive("root_radius_um", root_radius_um)
    x = _positive("exponent", exponent)
    q = _positive("asymmetry", asymmetry)
    ratio = _real("length_radius_ratio", length_radius_ratio, low=2.0)
    angles = _angle_pair(angle_deg)
    r_min = _real("min_radius_um", min_radius_um, low=0.0)
    rng = _rng(seed)
    jitter = _real("jitter_deg", jitter_deg, low=0.0)
    frac = _real("broken_fraction", broken_fraction, low=0.0, high=1.0)
    b_ratio = _real("broken_ratio", broken_ratio, low=0.0, low_open=True, high=1.0)
    wig = _real("wiggle", wiggle, low=0.0, high=0.3)
    phi0 = _real("plane_rotation_deg", plane_rotation_deg)
    gap = _real("clearance_um", clearance_um, low=0.0)
    if r_root < r_min:
        raise _bad("root_radius_um", f"a value >= min_radius_um ({r_min:g})", root_radius_um)

    nodes: list[dict] = []
    segs: list[dict] = []
    bifs: list[dict] = []
    index = _Clearance(gap)
    origin = np.zeros(3)
    axis0 = np.array([1.0, 0.0, 0.0])

    def add_segment(
        start: dict, end_pos: np.ndarray, radius: float, level: int, parent: int | None, pts: np.ndarray
    ):
        end = _node(len(nodes), end_pos, "blind")
        nodes.append(end)
        length = float(np.linalg.norm(end_pos - np.asarray(start["pos_um"]))) if wig == 0 else None
        seg = _make_segment(len(segs), start, end, pts, radius, length_um=length, level=level)
        if parent is not None:
            seg["parent_segment"] = int(parent)
        segs.append(seg)
        index.add(seg["points_um"][::2], radius, seg["id"])
        return seg, end

    def shape(a: np.ndarray, b: np.ndarray, e_perp: np.ndarray, m: int) -> np.ndarray:
        if wig == 0:
            return _line_points(a, b)
        return _wiggled_points(a, b, wig * float(np.linalg.norm(b - a)), e_perp, m)

    def perp_draw(d: np.ndarray) -> tuple[np.ndarray, int]:
        e = _unit(_rotate(_any_perpendicular(d), d, rng.uniform(0, 2 * math.pi)))
        return e, int(rng.integers(1, 3))

    root_node = _node(0, origin, "border")
    nodes.append(root_node)
    e, m = perp_draw(axis0)
    l_root = ratio * r_root
    root_seg, root_end = add_segment(
        root_node, l_root * axis0, r_root, 0, None, shape(origin, l_root * axis0, e, m)
    )
    # frontier: (segment, end node, chord direction, reference plane normal, radius, level)
    frontier = [(root_seg, root_end, axis0, np.array([0.0, 1.0, 0.0]), r_root, 0)]
    acc = rng.random()  # error-diffusion phase for spreading broken bifurcations
    n_terminated = 0
    rot_steps = (0.0, 30.0, -30.0, 60.0, -60.0, 90.0, 15.0, -15.0, 45.0, -45.0, 75.0, -75.0)
    while frontier:
        nxt = []
        for seg, end, d, n_ref, r0, level in frontier:
            if level >= n_levels:
                continue
            r1, r2 = murray_daughter_radii(r0, exponent=x, asymmetry=q)
            if min(r1, r2) < r_min:
                continue
            broken = False
            acc_before = acc
            if frac > 0:
                acc += frac
                if acc >= 1.0:
                    acc -= 1.0
                    broken = True
            if broken:
                r1 = r2 = b_ratio * r0
            th_nominal = angles if angles is not None else murray_angles_deg(r0, r1, r2)
            apart = _siblings_apart(r1, r2, *th_nominal, ratio * r1, ratio * r2)
            if angles is not None and not apart:
                raise _bad(
                    "angle_deg", "daughter angles wide enough for the daughters to separate", angle_deg
                )
            th1, th2 = th_nominal
            if jitter > 0:
                # Redraw jitter that would close the pair so far that the
                # daughters fuse; after a few misses keep the nominal angles.
                for _ in range(8):
                    j1 = float(np.clip(th_nominal[0] + rng.normal(0, jitter), 1.0, 89.0))
                    j2 = float(np.clip(th_nominal[1] + rng.normal(0, jitter), 1.0, 89.0))
                    if _siblings_apart(r1, r2, j1, j2, ratio * r1, ratio * r2):
                        th1, th2 = j1, j2
                        break
            phi_base = phi0 + (rng.normal(0, jitter) if jitter > 0 else 0.0)
            draws = [perp_draw(d), perp_draw(d)]
            start = np.asarray(end["pos_um"])
            placed = None
            for step in rot_steps if apart else ():
                phi = phi_base + step
                normal = _unit(_rotate(n_ref, d, math.radians(phi)))
                d1, d2 = _daughter_directions(d, normal, th1, th2)
                cand = []
                ok = True
                for dk, rk, (ek, mk) in zip((d1, d2), (r1, r2), draws):
                    ek = _unit(ek - np.dot(ek, dk) * dk)
                    b = start + ratio * rk * dk
                    pts = shape(start, b, ek, mk)
                    sample = pts[::2]
                    # Stay on the tree side of the root face so no branch is cut by it.
                    if np.any((sample - origin) @ axis0 < index.factor * rk + gap):
                        ok = False
                        break
                    if not index.clear(sample, rk, {seg["id"]}):
                        ok = False
                        break
                    cand.append((dk, rk, b, pts))
                if ok:
                    placed = (phi, normal, cand)
                    break
            if placed is None:
                n_terminated += 1
                acc = acc_before  # no bifurcation here, so it takes no share of broken ones
                continue
            phi, normal, cand = placed
            end["kind"] = "junction"
            kids = []
            for dk, rk, b, pts in cand:
                kseg, kend = add_segment(end, b, rk, level + 1, seg["id"], pts)
                kids.append(kseg["id"])
                nxt.append((kseg, kend, dk, normal, rk, level + 1))
            bifs.append(
                _bifurcation_record(
                    end["id"], level, seg["id"], kids[0], kids[1], r0, r1, r2, x, th1, th2, broken, phi
                )
            )
        frontier = nxt
    params = {
        "depth": n_levels,
        "root_radius_um": r_root,
        "exponent": x,
        "asymmetry": q,
        "length_radius_ratio": ratio,
        "angle_deg": angle_deg,
        "min_radius_um": r_min,
        "seed": seed,
        "jitter_deg": jitter,
        "broken_fraction": frac,
        "broken_ratio": b_ratio,
        "wiggle": wig,
        "plane_rotation_deg": phi0,
        "clearance_um": gap,
        "terminated_for_clearance": n_terminated,
    }
    return VesselNetwork(nodes, segs, kind="tree", params=params, bifurcations=bifs)


# -------------------------------------------------------------------- capillary bed


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
    # Each node owns 3*keep links of length s; about 0.85 mean radii of each
    # link vanish into the overlaps at its junctions (measured on rasterised beds).
    overlap = 0.85

    def fraction(s: float) -> float:
        return 3.0 * keep_frac * math.pi * mean_r2 * max(s - overlap * mean_r, 0.0) / s**3

    s_min = 2.0 * r_hi + gap + 0.5  # closest lattice period that keeps parallel tubes apart
    if fraction(s_min) < f_target:
        raise _bad(
            "vessel_fraction",
            f"a value <= {fraction(s_min):.3f} for radius_range_um {tuple(rr)} and min_gap_um {gap:g}",
            vessel_fraction,
        )
    s_far = max(float(box.max()) * 4.0, s_min * 2.0)
    period = brentq(lambda s: fraction(s) - f_target, s_min, s_far) if fraction(s_far) < f_target else s_far
    # Whole cells per axis, never shorter than the period that keeps tubes apart.
    n_max = np.maximum(1, np.floor(box / s_min)).astype(int)
    n_cells = np.clip(np.round(box / period).astype(int), 1, n_max)

    def layout(n_cells: np.ndarray):
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
            * float(np.sum(np.maximum(stretch * cell - overlap * mean_r, 0.0)))
            / float(np.prod(cell))
        )
        return cell, spare, jit, bend, full

    cell, spare, jit, bend, per_cell = layout(n_cells)
    # Rounding to whole cells shifts the fraction by up to ~1/n; the share of
    # kept links absorbs that, and a finer lattice steps in when even all links
    # would fall short (small boxes).
    while per_cell < f_target and np.any(n_cells < n_max):
        grow = int(np.argmax(np.where(n_cells < n_max, cell, -1.0)))
        n_cells[grow] += 1
        cell, spare, jit, bend, per_cell = layout(n_cells)
    if spare <= 0:
        raise _bad(
            "shape_um", f"a box whose lattice period ({cell.min():.1f} um) exceeds 2*r_max + gap", shape_um
        )
    if f_target > per_cell * 1.02:
        raise _bad(
            "vessel_fraction", f"a value <= {per_cell:.3f} for this box and radius_range_um", vessel_fraction
        )
    keep_eff = float(min(1.0, f_target / per_cell))

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

    # Dense bent polylines for every kept link at once: (n_links, K, 3).
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

    # Merge chains through degree-2 nodes into single segments.
    deg = np.bincount(kept.ravel(), minlength=n_pts)
    incident: dict[int, list[int]] = {}
    for li, (a, b) in enumerate(kept.tolist()):
        incident.setdefault(a, []).append(li)
        incident.setdefault(b, []).append(li)
    used = np.zeros(len(kept), dtype=bool)
    chains: list[tuple[list[int], list[int]]] = []  # (node sequence, link sequence)

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


def _clip_network(net: VesselNetwork, lo: np.ndarray, hi: np.ndarray) -> VesselNetwork:
    """Cut every segment to the box ``[lo, hi]``; new cut ends are 'border' nodes.

    Degree-one nodes are then re-labelled: 'border' if their tube reaches a
    box face (distance to the face below the end radius), else 'blind'.
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
        if all_in[si]:
            segs.append(s)
            for nid in (s["node_from"], s["node_to"]):
                new_nodes[nid] = by_id[nid]
            continue
        if not any_in[si]:
            continue
        pts, rad = s["points_um"], s["radii_um"]
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


# ------------------------------------------------------------------------ rasterise


def _auto_place(
    net: VesselNetwork, d: np.ndarray, margin: float, reach: float
) -> tuple[np.ndarray, np.ndarray]:
    """Offset and grid shape that hold the network with ``margin`` µm to spare.

    Box faces are pulled onto 'border' nodes (along the dominant axis of the
    segment leaving them) so those tubes end cut flat at the volume edge.
    """
    pts = np.concatenate([s["points_um"] for s in net.segments])
    rad = np.concatenate([s["radii_um"] for s in net.segments]) * reach
    lo = np.min(pts - rad[:, None], axis=0) - margin
    hi = np.max(pts + rad[:, None], axis=0) + margin
    pull_lo: list[float | None] = [None] * 3
    pull_hi: list[float | None] = [None] * 3
    for n in net.nodes:
        if n["kind"] != "border":
            continue
        for s in net.segments:
            p = s["points_um"]
            if s["node_from"] == n["id"]:
                tangent = p[min(4, len(p) - 1)] - p[0]
            elif s["node_to"] == n["id"]:
                tangent = p[max(len(p) - 5, 0)] - p[-1]
            else:
                continue
            ax = int(np.argmax(np.abs(tangent)))
            c = n["pos_um"][ax]
            if tangent[ax] > 0:
                pull_lo[ax] = c if pull_lo[ax] is None else max(pull_lo[ax], c)
            else:
                pull_hi[ax] = c if pull_hi[ax] is None else min(pull_hi[ax], c)
            break
    offset = np.zeros(3)
    shape = np.zeros(3, dtype=np.int64)
    for ax in range(3):
        a = lo[ax] if pull_lo[ax] is None else pull_lo[ax]
        b = hi[ax] if pull_hi[ax] is None else pull_hi[ax]
        if b <= a:
            raise InputError(
                f"network: expected border ends on opposite faces along axis {ax}, got them crossing"
            )
        if pull_lo[ax] is None and pull_hi[ax] is None:
            n = int(math.ceil((b - a) / d[ax] - 1e-9)) + 1
            offset[ax] = -a + ((n - 1) * d[ax] - (b - a)) / 2.0
        else:
            n = int(math.floor((b - a) / d[ax] + 1e-9)) + 1
            offset[ax] = -a if pull_lo[ax] is not None else (n - 1) * d[ax] - b
        shape[ax] = max(n, 1)
    return offset, shape


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


def _raster_pieces(net: VesselNetwork, tol: float, spacing: np.ndarray, reach_factor: float = 1.0):
    """Chord pieces that stand in for all centrelines when painting.

    The chord length is chosen per segment to minimise bounding-box voxels per
    unit length, given the segment direction, its radius times
    ``reach_factor`` and the voxel ``spacing``: long pieces suit axis-parallel
    tubes, short ones oblique tubes. See :func:`_chord_selection` for bends.

    Returns
    -------
    a, b : ndarray (P, 3)
        Piece ends (µm).
    ra, rb : ndarray (P,)
        Radii at the ends.
    sid : ndarray (P,)
        Index of the segment in ``net.segments``.
    """
    mult = np.array([1.0, 1.5, 2.0, 3.0, 4.0, 6.0, 8.0])

    def best_step(rmin: np.ndarray, rmax: np.ndarray, u_abs: np.ndarray) -> np.ndarray:
        h_try = mult[None, :] * rmin[:, None]
        box = np.prod(
            u_abs[:, None, :] * h_try[:, :, None] + 2.0 * reach_factor * rmax[:, None, None] + spacing, axis=2
        )
        return h_try[np.arange(len(rmin)), np.argmin(box / h_try, axis=1)]

    pts, rad, owner, sel = _chord_selection(net, tol, best_step)
    pair = owner[sel[:-1]] == owner[sel[1:]]
    ia, ib = sel[:-1][pair], sel[1:][pair]
    return pts[ia], pts[ib], rad[ia], rad[ib], owner[ia]


def _noise_texture(rng: np.random.Generator) -> np.ndarray:
    """Periodic unit-variance smooth Gaussian field, shape (_TEX_N,)*3, float32."""
    white = rng.standard_normal((_TEX_N,) * 3).astype(np.float32)
    field_ = ndimage.gaussian_filter(white, _TEX_SIGMA, mode="wrap")
    field_ -= field_.mean()
    field_ /= field_.std()
    return field_


def _paint_tubes(
    mask: np.ndarray, net: VesselNetwork, d: np.ndarray, roughness: float, rng: np.random.Generator
) -> None:
    """Set every voxel whose centre lies in the union of capsules (in place).

    Work is split into chord pieces; the candidate voxels of all pieces'
    bounding boxes are enumerated in flat batches, so numpy, not Python, loops
    over voxels. Per-piece constants are expanded with ``np.repeat`` (a
    sequential fill, much cheaper than fancy indexing) and index arithmetic
    stays in int32 (integer division dominates otherwise).
    """
    shape = np.asarray(mask.shape, dtype=np.int64)
    flat_mask = mask.reshape(-1)
    f_hi = 1.0 + _FIELD_CLIP * roughness
    f_lo = 1.0 - _FIELD_CLIP * roughness
    a, b, ra, rb, sid = _raster_pieces(net, _SAGITTA_FRACTION * float(d.min()), d, f_hi)
    reach = np.maximum(ra, rb)[:, None] * f_hi
    # Exact index range of voxel centres within reach (tolerance against rounding).
    lo = np.ceil((np.minimum(a, b) - reach) / d - 1e-6).astype(np.int64)
    hi = np.floor((np.maximum(a, b) + reach) / d + 1e-6).astype(np.int64)
    lo, hi = np.maximum(lo, 0), np.minimum(hi, shape - 1)
    dims = hi - lo + 1
    live = np.all(dims > 0, axis=1)
    a, b, ra, rb, sid, lo, dims = a[live], b[live], ra[live], rb[live], sid[live], lo[live], dims[live]
    if len(a) == 0:
        return
    counts = np.prod(dims, axis=1)
    v = b - a
    inv_vv = 1.0 / np.maximum(np.einsum("ij,ij->i", v, v), 1e-24)
    # Offsets of each bounding box's first voxel centre from the piece start.
    c0 = (lo * d - a).astype(np.float32)
    v32 = v.astype(np.float32)
    inv32, ra32, dr32 = inv_vv.astype(np.float32), ra.astype(np.float32), (rb - ra).astype(np.float32)
    d32 = d.astype(np.float32)
    nyx32 = (dims[:, 1] * dims[:, 2]).astype(np.int32)
    nx32 = dims[:, 2].astype(np.int32)
    yx = int(shape[1] * shape[2])
    base_lin = (lo[:, 0] * shape[1] + lo[:, 1]) * shape[2] + lo[:, 2]
    if roughness > 0:
        tex_flat = _noise_texture(rng).ravel()
        seg_off = rng.uniform(0, _TEX_N, size=(len(net.segments), 3))
        # Correlation (1/e) length of filtered white noise is 2 sigma texels;
        # map one nominal radius onto it.
        seg_scale = np.array([2.0 * _TEX_SIGMA / s["radius_um"] for s in net.segments])
        # Texture coordinate = w * scale + (piece start * scale + offset).
        tex_scale = seg_scale[sid].astype(np.float32)
        tex_const = (a * seg_scale[sid, None] + seg_off[sid]).astype(np.float32)
    cum = np.cumsum(counts)
    start = 0
    while start < len(counts):
        base = cum[start - 1] if start else 0
        stop = max(int(np.searchsorted(cum, base + _BATCH_VOXELS, side="right")), start + 1)
        c = counts[start:stop]

        def rep(arr: np.ndarray) -> np.ndarray:
            return np.repeat(arr[start:stop], c, axis=0)

        local = np.arange(int(c.sum()), dtype=np.int32) - np.repeat((np.cumsum(c) - c).astype(np.int32), c)
        nyx = rep(nyx32)
        iz = local // nyx
        rem = local - iz * nyx
        del local, nyx
        nx = rep(nx32)
        iy = rem // nx
        ix = rem - iy * nx
        del rem, nx
        idx = (iz, iy, ix)
        w = [rep(c0[:, k]) + idx[k].astype(np.float32) * d32[k] for k in range(3)]
        vk = [rep(v32[:, k]) for k in range(3)]
        t = (w[0] * vk[0] + w[1] * vk[1] + w[2] * vk[2]) * rep(inv32)
        np.clip(t, 0.0, 1.0, out=t)
        dist2 = (w[0] - t * vk[0]) ** 2
        dist2 += (w[1] - t * vk[1]) ** 2
        dist2 += (w[2] - t * vk[2]) ** 2
        del vk
        r = rep(ra32) + t * rep(dr32)
        if roughness <= 0:
            inside = dist2 <= r * r
        else:
            inside = dist2 <= (r * f_lo) ** 2
            maybe = np.nonzero(~inside & (dist2 <= (r * f_hi) ** 2))[0]
            if len(maybe):
                pid = np.repeat(np.arange(start, stop, dtype=np.int32), c)[maybe]
                scale = tex_scale[pid]
                texel = np.zeros(len(maybe), dtype=np.int32)
                for k in range(3):
                    ik = np.floor(w[k][maybe] * scale + tex_const[pid, k]).astype(np.int32)
                    texel = texel * _TEX_N + (ik & (_TEX_N - 1))  # & wraps negatives too
                fld = tex_flat[texel]
                fac = 1.0 + roughness * np.clip(fld, -_FIELD_CLIP, _FIELD_CLIP)
                inside[maybe] = dist2[maybe] <= (r[maybe] * fac) ** 2
        hit = np.flatnonzero(inside)
        lin = rep(base_lin)[hit]
        lin += iz[hit].astype(np.int64) * yx + iy[hit].astype(np.int64) * int(shape[2]) + ix[hit]
        flat_mask[lin] = True
        start = stop


def _cube(k: int) -> np.ndarray:
    r = np.arange(-k, k + 1)
    return np.stack(np.meshgrid(r, r, r, indexing="ij"), axis=-1).reshape(-1, 3)


def _gather(mask: np.ndarray, centres: np.ndarray, offsets: np.ndarray, outside: bool) -> np.ndarray:
    """Mask values at ``centres[:, None] + offsets[None]``; (C, O) bool, ``outside`` off-grid."""
    pos = centres[:, None, :] + offsets[None, :, :]
    shape = np.asarray(mask.shape)
    ok = np.all((pos >= 0) & (pos < shape), axis=2)
    pc = np.clip(pos, 0, shape - 1)
    vals = mask[pc[..., 0], pc[..., 1], pc[..., 2]]
    return np.where(ok, vals, outside)


def _blob_offsets(rng: np.random.Generator, radius_vox: float, k: int) -> tuple[np.ndarray, np.ndarray]:
    """Voxel offsets of a ball of ``radius_vox`` around a jittered sub-voxel centre."""
    centre = rng.uniform(-0.3, 0.3, 3)
    offs = _cube(k)
    sel = np.linalg.norm(offs - centre, axis=1) <= radius_vox
    sel[len(offs) // 2] = True  # the base voxel itself, so tiny radii still leave a mark
    return offs[sel], centre


def _carve_holes(mask, net, d, count, rng) -> list[dict]:
    """Carve ``count`` fully enclosed background cavities on vessel centrelines."""
    if count == 0:
        return []
    need_r = 3.0 * float(d.max())
    shape = np.asarray(mask.shape)
    cands = []
    for s in net.segments:
        pts, rad = s["points_um"], s["radii_um"]
        k = len(pts)
        sel = np.arange(int(0.25 * k), max(int(0.75 * k), int(0.25 * k) + 1))
        sel = sel[rad[sel] >= need_r]
        if len(sel):
            cands.append(np.c_[pts[sel], np.full(len(sel), s["id"])])
    if not cands:
        raise _bad("holes", f"0 when no vessel has radius >= 3 voxels ({need_r:g} um)", count)
    cands = np.concatenate(cands)
    shell = _cube(2)
    out = []
    order = rng.permutation(len(cands))
    for start in range(0, len(order), 512):
        pick = cands[order[start : start + 512]]
        base = np.round(pick[:, :3] / d).astype(np.int64)
        inside = np.all((base >= 3) & (base < shape - 3), axis=1)
        full = np.zeros(len(base), dtype=bool)
        full[inside] = np.all(_gather(mask, base[inside], shell, False), axis=1)
        for i in np.nonzero(full)[0]:
            # Re-check: an earlier hole in this batch may sit in the shell.
            if not np.all(_gather(mask, base[i : i + 1], shell, False)):
                continue
            radius = float(rng.uniform(0.5, 1.0))
            offs, centre = _blob_offsets(rng, radius, 1)
            vox = base[i] + offs
            mask[vox[:, 0], vox[:, 1], vox[:, 2]] = False
            out.append(
                {
                    "centre_vox": (base[i] + centre).tolist(),
                    "centre_um": ((base[i] + centre) * d).tolist(),
                    "radius_vox": radius,
                    "n_voxels": int(len(offs)),
                    "segment": int(pick[i, 3]),
                }
            )
            if len(out) == count:
                return out
    raise _bad("holes", f"at most {len(out)} enclosed cavities for this network and spacing", count)


def _add_specks(mask, d, count, rng) -> list[dict]:
    """Add ``count`` isolated small blobs in the background, apart from everything."""
    if count == 0:
        return []
    shape = np.asarray(mask.shape)
    # A speck reaches <= 2 voxels from its base; an empty 7^3 cube around the base
    # leaves at least one background voxel to any vessel.
    clear = _cube(3)
    out: list[dict] = []
    bases = np.empty((0, 3), dtype=np.int64)
    for _ in range(30):
        cand = (rng.random((8 * (count - len(out)) + 64, 3)) * shape).astype(np.int64)
        empty = ~np.any(_gather(mask, cand, clear, False), axis=1)
        for c in cand[empty]:
            if len(bases) and np.min(np.max(np.abs(bases - c), axis=1)) < 6:
                continue
            radius = float(rng.uniform(0.5, 1.5))
            offs, centre = _blob_offsets(rng, radius, 2)
            vox = c + offs
            okv = np.all((vox >= 0) & (vox < shape), axis=1)
            vox = vox[okv]
            mask[vox[:, 0], vox[:, 1], vox[:, 2]] = True
            bases = np.vstack([bases, c[None]])
            out.append(
                {
                    "centre_vox": (c + centre).tolist(),
                    "centre_um": ((c + centre) * d).tolist(),
                    "radius_vox": radius,
                    "n_voxels": int(len(vox)),
                }
            )
            if len(out) == count:
                return out
    raise _bad("specks", f"at most {len(out)} isolated specks in this volume", count)


def rasterize(
    network: VesselNetwork,
    *,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    shape: Sequence[int] | None = None,
    margin_um: float | None = None,
    roughness: float = 0.0,
    specks: int = 0,
    holes: int = 0,
    seed: int | None = None,
) -> tuple[np.ndarray, dict[str, Any]]:
    """Turn a network into a boolean voxel mask and its ground truth.

    Parameters
    ----------
    network : VesselNetwork
        Network in µm.
    spacing : sequence of 3 float
        Voxel size ``(dz, dy, dx)`` in µm; anisotropic grids are fine.
    shape : sequence of 3 int, optional
        Grid shape ``(Z, Y, X)``. When given (or when the network carries
        ``box_um``) the coordinates are taken as already placed: voxel
        ``(i, j, k)`` sits at ``(i*dz, j*dy, k*dx)``. Otherwise the network is
        shifted into a fitted box with ``margin_um`` to spare, and box faces are
        pulled onto 'border' nodes.
    margin_um : float, optional
        Free space around the network; default ``max(5, 2 * max(spacing))``.
    roughness : float
        Relative standard deviation of a smooth random radius perturbation, in
        [0, 0.3]: a voxel is vessel when its distance to the centreline is
        ``<= r * (1 + roughness * g)`` with ``g`` a unit-variance Gaussian field
        of correlation length about one radius (clipped to +-2.5).
    specks : int
        Number of stray blobs (radius 0.5-1.5 voxels) away from vessels; each is
        its own 26-connected component.
    holes : int
        Number of enclosed background cavities (radius 0.5-1 voxel) carved on
        centrelines where the radius is >= 3 voxels along every axis.
    seed : int, optional
        Seed for roughness, holes and specks (independent streams).

    Returns
    -------
    mask : ndarray of bool, shape (Z, Y, X)
    truth : dict
        :meth:`VesselNetwork.to_truth` of the placed network, cut to the grid
        (segments leaving it end in 'border' nodes), plus ``spacing``,
        ``shape``, ``offset_um``, node ``pos_vox`` (voxel index units),
        ``mask_voxels``, ``mask_volume_um3``, ``rasterize`` options and the
        ``specks`` and ``holes`` actually placed.

    Raises
    ------
    InputError
        On bad arguments, or when nothing of the network lies in the grid.

    Notes
    -----
    Voxel counting is unbiased for the union of capsules, so volumes agree
    across spacings to within the boundary-layer scatter (about 1 % for
    radii of a few voxels). Digitisation is not topology-preserving
    everywhere: in the crease where five or six tubes of a capillary bed meet,
    about 3 % of junctions gain a one-voxel handle, so the mask's loop count
    can exceed the truth's ``cyclomatic_number`` slightly; trees, rings and
    ladders keep their topology at radii of two voxels and more.
    """
    if not isinstance(network, VesselNetwork):
        raise _bad("network", "a VesselNetwork", type(network).__name__)
    d = _spacing(spacing)
    margin = max(5.0, 2.0 * float(d.max())) if margin_um is None else _real("margin_um", margin_um, low=0.0)
    rough = _real("roughness", roughness, low=0.0, high=_MAX_ROUGHNESS)
    n_specks = _count("specks", specks)
    n_holes = _count("holes", holes)
    base_rng = _rng(seed)
    rng_rough, rng_holes, rng_specks = (
        np.random.default_rng(s) for s in base_rng.bit_generator.seed_seq.spawn(3)
    )

    if shape is not None:
        try:
            grid = np.asarray(shape, dtype=np.int64)
            bad = (
                grid.shape != (3,)
                or not np.array_equal(grid, np.asarray(shape, dtype=float))
                or np.any(grid < 1)
            )
        except (TypeError, ValueError):
            bad = True
        if bad:
            raise _bad("shape", "three integers >= 1 (Z, Y, X)", shape)
        offset = np.zeros(3)
        placed = network
    elif network.box_um is not None:
        grid = np.maximum(1, np.round(np.asarray(network.box_um) / d)).astype(np.int64)
        offset = np.zeros(3)
        placed = network
    else:
        offset, grid = _auto_place(network, d, margin, 1.0 + _FIELD_CLIP * rough)
        placed = network.translated(offset)
    if np.prod(grid.astype(float)) > 2**34:
        raise _bad("shape", "at most 2**34 voxels", tuple(grid.tolist()))
    top = (grid - 1) * d
    cut = _clip_network(placed, np.zeros(3), top)

    mask = np.zeros(tuple(int(n) for n in grid), dtype=bool)
    _paint_tubes(mask, placed, d, rough, rng_rough)
    hole_rec = _carve_holes(mask, cut, d, n_holes, rng_holes)
    speck_rec = _add_specks(mask, d, n_specks, rng_specks)

    truth = cut.to_truth()
    for n in truth["nodes"]:
        n["pos_vox"] = (np.asarray(n["pos_um"]) / d).tolist()
    n_vox = int(np.count_nonzero(mask))
    extra = dict(
        spacing=d.tolist(),
        shape=[int(n) for n in grid],
        offset_um=offset.tolist(),
        voxel_volume_um3=float(np.prod(d)),
        mask_voxels=n_vox,
        mask_volume_um3=float(n_vox * np.prod(d)),
        rasterize={
            "roughness": rough,
            "roughness_correlation": "one nominal radius",
            "margin_um": margin,
            "specks": n_specks,
            "holes": n_holes,
            "seed": seed,
        },
        specks=speck_rec,
        holes=hole_rec,
    )
    truth.update(_jsonable(extra))
    return mask, truth


# ------------------------------------------------------------------------------ I/O


def truth_path_for(path: str | Path) -> Path:
    """``<dir>/<stem>.truth.json`` for a volume at ``path``."""
    p = Path(path)
    return p.with_name(p.stem + ".truth.json")


def write_volume(
    path: str | Path,
    mask: np.ndarray,
    *,
    spacing: Sequence[float],
    truth: Mapping[str, Any] | None = None,
    compression: str | None = "zlib",
) -> Path:
    """Write a mask as a uint8 0/255 ImageJ TIFF, and its truth beside it.

    Parameters
    ----------
    path : str or Path
        TIFF file to write.
    mask : ndarray, shape (Z, Y, X)
        Non-zero = vessel.
    spacing : sequence of 3 float
        ``(dz, dy, dx)`` µm, stored as ImageJ resolution and ``spacing``.
    truth : mapping, optional
        Written as JSON to ``<stem>.truth.json`` in the same folder.
    compression : str or None
        tifffile compression name (default ``'zlib'``).

    Returns
    -------
    Path
        The TIFF path.
    """
    import tifffile

    arr = np.asarray(mask)
    if arr.ndim != 3:
        raise _bad("mask", "a 3-D array (Z, Y, X)", f"shape {arr.shape}")
    d = _spacing(spacing)
    if compression is not None and not isinstance(compression, str):
        raise _bad("compression", "None or a compression name such as 'zlib'", compression)
    from .tables import write_atomic

    p = Path(path)
    data = np.where(arr != 0, np.uint8(255), np.uint8(0))
    # Atomic writes: a full disk leaves the earlier file (or none), never half a volume.
    write_atomic(p, lambda tmp: tifffile.imwrite(
        tmp,
        data,
        imagej=True,
        resolution=(1.0 / d[2], 1.0 / d[1]),
        metadata={"spacing": float(d[0]), "unit": "um", "axes": "ZYX"},
        compression=compression,
    ))
    if truth is not None:
        text = json.dumps(truth, separators=(",", ":"), default=_json_default)
        write_atomic(truth_path_for(p), lambda tmp: tmp.write_text(text + "\n", encoding="utf-8"))
    return p


# ---------------------------------------------------------------------- dispatching


@dataclass(frozen=True)
class SynthKind:
    """A named synthetic volume: its builder, small defaults and a one-line summary."""

    builder: Callable[..., VesselNetwork]
    defaults: Mapping[str, Any]
    summary: str


SYNTH_KINDS: dict[str, SynthKind] = {
    "tube": SynthKind(straight_tube, {"length_um": 60.0, "radius_um": 5.0}, "straight tube cut by two faces"),
    "curved": SynthKind(
        curved_tube, {"arc_radius_um": 40.0, "angle_deg": 90.0, "radius_um": 5.0}, "quarter-circle tube"
    ),
    "helix": SynthKind(
        helix, {"coil_radius_um": 15.0, "pitch_um": 20.0, "turns": 2.0, "radius_um": 4.0}, "helical tube"
    ),
    "torus": SynthKind(torus, {"major_radius_um": 30.0, "minor_radius_um": 6.0}, "closed ring, one loop"),
    "ybranch": SynthKind(
        y_branch,
        {"parent_radius_um": 8.0, "parent_length_um": 60.0, "daughter_length_um": 50.0},
        "one Murray bifurcation",
    ),
    "tree": SynthKind(
        binary_tree,
        {"depth": 4, "root_radius_um": 8.0, "length_radius_ratio": 10.0, "min_radius_um": 2.0, "seed": 0},
        "3-D dichotomous cube-law tree",
    ),
    "bed": SynthKind(capillary_bed, {"shape_um": (96.0, 96.0, 96.0), "seed": 0}, "looping capillary lattice"),
    "ladder": SynthKind(ladder, {}, "two rails joined by rungs (loops)"),
}

_RASTER_KEYS = ("spacing", "shape", "margin_um", "roughness", "specks", "holes", "seed")


def synthesize(kind: str, **params: Any) -> tuple[np.ndarray, dict[str, Any]]:
    """Build and rasterise a named synthetic volume.

    Parameters
    ----------
    kind : str
        A key of :data:`SYNTH_KINDS`.
    **params
        Builder keywords and :func:`rasterize` keywords (``spacing``, ``shape``,
        ``margin_um``, ``roughness``, ``specks``, ``holes``, ``seed``); they
        override the kind's defaults. ``seed`` goes to both.

    Returns
    -------
    mask : ndarray of bool, shape (Z, Y, X)
    truth : dict
        As from :func:`rasterize`, plus ``synth_kind`` and ``synth_params``.
    """
    if kind not in SYNTH_KINDS:
        raise _bad("kind", "one of " + ", ".join(SYNTH_KINDS), kind)
    spec = SYNTH_KINDS[kind]
    accepted = set(inspect.signature(spec.builder).parameters)
    merged = {**spec.defaults, **params}
    unknown = sorted(k for k in merged if k not in accepted and k not in _RASTER_KEYS)
    if unknown:
        raise _bad(
            unknown[0],
            f"a parameter of '{kind}' (one of {', '.join(sorted(accepted | set(_RASTER_KEYS)))})",
            merged[unknown[0]],
        )
    net = spec.builder(**{k: v for k, v in merged.items() if k in accepted})
    mask, truth = rasterize(net, **{k: v for k, v in merged.items() if k in _RASTER_KEYS})
    truth["synth_kind"] = kind
    truth["synth_params"] = _jsonable(merged)
    return mask, truth
