"""Synthetic vessel networks with exact ground truth, and their voxel masks.

In: geometric parameters in micrometres (lengths, radii, angles, a Murray
exponent, random seeds) for one of several builders (straight, curved and
helical tubes, a torus, a Y branch, a 3-D dichotomous tree, a looping
capillary bed, a ladder, a cortex-like network of penetrating arteriolar
and venular trees feeding a capillary mesh), then a voxel spacing ``(dz,
dy, dx)`` and optional imperfections: the kind ones of the demo volumes
(smooth surface roughness, stray specks, enclosed holes) and the hostile
ones of real segmentations (roughness down to a voxel or two, blobs stuck
to walls, handles and tunnels, open pits, gaps in thin vessels, an
anisotropic point-spread, plane-to-plane motion; :func:`hostile_artefacts`
sets them all from one strength).

Out: a :class:`VesselNetwork` (nodes and densely sampled centreline polylines
with radii, in µm), a boolean mask of shape ``(Z, Y, X)`` from
:func:`rasterize` together with a JSON-serialisable truth dictionary (node
positions in µm and in voxel index units, segment lengths and radii,
bifurcation radii, what was added on purpose), and, from
:func:`write_volume`, a uint8 0/255 ImageJ TIFF with a ``<stem>.truth.json``
beside it. For flow truths: :func:`network_tables` (the segment and node
tables :func:`pipeline.flow.solve_flow` takes), :func:`network_flow_truth`
(the whole network solved with arteriolar roots at one pressure and venular
roots at another, through ``solve_flow``, imported when called) and
:func:`crop_network` (a sub-box, each piece mapped to its source segment).

Conventions: axis order (z, y, x); voxel ``(i, j, k)`` has its centre at
``(i*dz, j*dy, k*dx)`` µm. A voxel is vessel when its centre lies inside the
union of capsules along the polyline, the capsule radius interpolated
linearly along each polyline piece. Artefacts never change the truth's
network; they are listed beside it, with the topology change of each.
"""

from __future__ import annotations

import copy
import inspect
import json
import math
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any, Callable, Mapping, Sequence

import numpy as np
from scipy import ndimage
from scipy.optimize import brentq
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components, minimum_spanning_tree
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
    "cortex_network",
    "network_tables",
    "network_flow_truth",
    "crop_network",
    "VESSEL_CLASSES",
    "MMHG_PA",
    "murray_daughter_radii",
    "murray_angles_deg",
    "rasterize",
    "HOSTILE_AT_FULL_STRENGTH",
    "hostile_artefacts",
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
    from .flow import solve_flow

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


def _cortex_kind(**params: Any) -> VesselNetwork:
    """:func:`cortex_network` with the truth flows of the whole network on its segments.

    Takes the builder's keywords and ``arteriole_pressure_pa``,
    ``venule_pressure_pa`` and ``viscosity_model`` for
    :func:`network_flow_truth` (other flow options at the project's
    defaults); each segment gains ``flow_truth_nl_min`` (positive from
    ``node_from`` to ``node_to``), which the rasteriser's clipping copies
    onto the pieces inside the volume (pieces keep their source's
    orientation), and ``params['flow_truth']`` records the flow options
    used (``config``) and the total inflow.
    """
    from .config import validate_config

    flow_keys = ("arteriole_pressure_pa", "venule_pressure_pa", "viscosity_model")
    flow = {k: params.pop(k) for k in flow_keys if k in params}
    net = cortex_network(**params)
    p_art = flow.get("arteriole_pressure_pa", 55.0 * MMHG_PA)
    p_ven = flow.get("venule_pressure_pa", 18.0 * MMHG_PA)
    model = flow.get("viscosity_model", "pries1994")
    res = network_flow_truth(
        net, arteriole_pressure_pa=p_art, venule_pressure_pa=p_ven, config={"viscosity_model": model}
    )
    q = dict(zip(res.segments["segment_id"].tolist(), res.segments["flow_nl_min"].tolist()))
    for s in net.segments:
        s["flow_truth_nl_min"] = q[s["id"]]
    used = validate_config({"flow": {"viscosity_model": model}})["flow"]
    used.update(boundary="pressure", inlet_pressure_pa=float(p_art), outlet_pressure_pa=float(p_ven),
                blind_ends="sealed", inlet_flow_nl_min=None)
    net.params["flow_truth"] = {
        "arteriole_pressure_pa": float(p_art),
        "venule_pressure_pa": float(p_ven),
        "viscosity_model": model,
        "config": used,
        "total_inflow_nl_min": res.summary["total_inflow_nl_min"],
        "note": "flows of the whole network before clipping; pieces keep their source's orientation",
    }
    return net


# synthesize() routes keywords by the builder's signature: the builder's own plus the flow ones.
_cortex_kind.__signature__ = inspect.Signature(  # type: ignore[attr-defined]
    list(inspect.signature(cortex_network).parameters.values())
    + [
        inspect.Parameter("arteriole_pressure_pa", inspect.Parameter.KEYWORD_ONLY, default=55.0 * MMHG_PA),
        inspect.Parameter("venule_pressure_pa", inspect.Parameter.KEYWORD_ONLY, default=18.0 * MMHG_PA),
        inspect.Parameter("viscosity_model", inspect.Parameter.KEYWORD_ONLY, default="pries1994"),
    ]
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


def _noise_texture(rng: np.random.Generator, n: int = _TEX_N, sigma: float = _TEX_SIGMA) -> np.ndarray:
    """Periodic unit-variance smooth Gaussian field, shape (n,)*3, float32."""
    white = rng.standard_normal((n,) * 3).astype(np.float32)
    field_ = ndimage.gaussian_filter(white, sigma, mode="wrap")
    field_ -= field_.mean()
    field_ /= field_.std()
    return field_


def _random_rotation(rng: np.random.Generator) -> np.ndarray:
    """Uniformly distributed rotation matrix (3, 3): QR of a Gaussian matrix, signs fixed."""
    q, r = np.linalg.qr(rng.standard_normal((3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    return q


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


def _paint_kernel(psi, marg, occ_c, occ_r, soft, a, v, ra, dr, lo, dims, d, shift, rough, f_lo, f_hi, half_w,
                  mode, tex, rot, off, tex_scale, tex_const, clip):
    """Union of rough capsules, one voxel at a time (compiled with numba on first use).

    Binary: ``psi`` keeps the smallest ``dist / r`` over pieces (the smooth
    wall is ``psi <= 1``) and ``marg`` the ``dist / r - (1 + rough g)`` of
    that nearest piece (the rough wall is ``marg <= 0``). Soft: ``occ_c``
    keeps the largest partial-volume occupancy without roughness and
    ``occ_r`` that of the nearest piece with it (``psi`` is kept too), a
    linear ramp across the voxel's width along the radial direction. ``g``
    is the clipped field looked up at the voxel (``mode`` 1, the original
    texture) or at the voxel's radial projection on the nominal wall
    (``mode`` 2).
    """
    n_mask = tex.shape[0] - 1
    dx = d[2]
    for p in range(a.shape[0]):
        v0, v1, v2 = v[p, 0], v[p, 1], v[p, 2]
        vv = max(v0 * v0 + v1 * v1 + v2 * v2, 1e-24)
        inv = 1.0 / vv
        big = max(ra[p], ra[p] + dr[p]) * f_hi + half_w
        alpha = dx * dx * (1.0 - v2 * v2 * inv)
        for iz in range(dims[p, 0]):
            z = lo[p, 0] + iz
            wz = z * d[0] - a[p, 0]
            for iy in range(dims[p, 1]):
                y = lo[p, 1] + iy
                wy = y * d[1] - a[p, 1] - shift[z, 0]
                # Row (z, y): wx = c + x dx. The capsule (radius ``big``, a bound for
                # the reach anywhere on the piece) is convex, so its voxels in the
                # row form one run: the hull of the row's runs through the two end
                # balls and through the cylinder between the end planes.
                c = lo[p, 2] * dx - a[p, 2] - shift[z, 1]
                x0 = np.inf
                x1 = -np.inf
                h = big * big - wz * wz - wy * wy
                if h >= 0.0:
                    h = math.sqrt(h)
                    x0 = min(x0, (-c - h) / dx)
                    x1 = max(x1, (-c + h) / dx)
                h = big * big - (wz - v0) ** 2 - (wy - v1) ** 2
                if h >= 0.0:
                    h = math.sqrt(h)
                    x0 = min(x0, (v2 - c - h) / dx)
                    x1 = max(x1, (v2 - c + h) / dx)
                s0 = wz * v0 + wy * v1 + c * v2
                beta = 2.0 * dx * (c - s0 * v2 * inv)
                gamma = wz * wz + wy * wy + c * c - s0 * s0 * inv - big * big
                c0 = -np.inf
                c1 = np.inf
                if abs(v2) > 1e-12:
                    e0 = -s0 / (dx * v2)
                    e1 = (vv - s0) / (dx * v2)
                    c0 = min(e0, e1)
                    c1 = max(e0, e1)
                elif s0 < 0.0 or s0 > vv:
                    c1 = -np.inf
                if alpha > 1e-12:
                    disc = beta * beta - 4.0 * alpha * gamma
                    if disc < 0.0:
                        c1 = -np.inf
                    else:
                        root = math.sqrt(disc)
                        c0 = max(c0, (-beta - root) / (2.0 * alpha))
                        c1 = min(c1, (-beta + root) / (2.0 * alpha))
                elif gamma > 0.0:
                    c1 = -np.inf
                if c1 >= c0:
                    x0 = min(x0, c0)
                    x1 = max(x1, c1)
                x0 = max(x0, 0.0)
                x1 = min(x1, dims[p, 2] - 1.0)
                if x1 < x0:
                    continue
                first = max(int(math.floor(x0)) - 1, 0)
                last = min(int(math.ceil(x1)) + 1, dims[p, 2] - 1)
                for ix in range(first, last + 1):
                    x = lo[p, 2] + ix
                    wx = c + ix * dx
                    t = min(max((wz * v0 + wy * v1 + wx * v2) * inv, 0.0), 1.0)
                    ez = wz - t * v0
                    ey = wy - t * v1
                    ex = wx - t * v2
                    dist2 = ez * ez + ey * ey + ex * ex
                    r = ra[p] + t * dr[p]
                    reach = r * f_hi + half_w
                    if dist2 > reach * reach:
                        continue
                    dist = math.sqrt(dist2)
                    q = dist / r
                    if soft:
                        width = (abs(ez) * d[0] + abs(ey) * d[1] + abs(ex) * d[2]) / max(dist, 1e-9)
                        width = max(width, 1e-9)
                        oc = min(max(0.5 + (r - dist) / width, 0.0), 1.0)
                        if oc > occ_c[z, y, x]:
                            occ_c[z, y, x] = oc
                        if rough <= 0.0:
                            continue
                    # The rough wall at a voxel is that of the piece whose axis
                    # is nearest (relative to its radius): overlapping pieces
                    # of one vessel look the field up at slightly different
                    # wall points, and taking the most outward of them would
                    # widen every vessel (by 18 % in volume on wiggly trees).
                    if q < psi[z, y, x]:
                        psi[z, y, x] = q
                    else:
                        continue
                    g = 0.0
                    if rough > 0.0 and dist > r * f_lo - half_w:
                        if mode == 2:
                            lift = r / max(dist, 1e-9)
                            pz = a[p, 0] + t * v0 + ez * lift
                            py = a[p, 1] + t * v1 + ey * lift
                            px = a[p, 2] + t * v2 + ex * lift
                            q0 = rot[0, 0] * pz + rot[0, 1] * py + rot[0, 2] * px + off[0]
                            q1 = rot[1, 0] * pz + rot[1, 1] * py + rot[1, 2] * px + off[1]
                            q2 = rot[2, 0] * pz + rot[2, 1] * py + rot[2, 2] * px + off[2]
                            i0 = int(math.floor(q0)) & n_mask
                            i1 = int(math.floor(q1)) & n_mask
                            i2 = int(math.floor(q2)) & n_mask
                        else:
                            i0 = int(math.floor(wz * tex_scale[p] + tex_const[p, 0])) & n_mask
                            i1 = int(math.floor(wy * tex_scale[p] + tex_const[p, 1])) & n_mask
                            i2 = int(math.floor(wx * tex_scale[p] + tex_const[p, 2])) & n_mask
                        g = min(max(tex[i0, i1, i2], -clip), clip)
                    if soft:
                        occ_r[z, y, x] = min(max(0.5 + (r * (1.0 + rough * g) - dist) / width, 0.0), 1.0)
                    else:
                        marg[z, y, x] = q - (1.0 + rough * g)


def _homotopic_kernel(mask, cz, cy, cx, target, passes):
    """Set ``mask`` at the candidates (in order) to ``target`` where the voxel is simple.

    A voxel is simple (26-connected foreground, 6-connected background) when
    the foreground in its 26-neighbourhood forms one 26-component and the
    background in its 18-neighbourhood has one 6-component that touches a
    face of it (Bertrand G, Malandain G 1994, Pattern Recognit Lett 15:169);
    setting or clearing a simple voxel changes no component, cavity or loop.
    The 3x3x3 neighbourhood is a 27-bit word (bit 9 dz + 3 dy + dx, offsets
    from -1), so both flood fills are a few shifts. Candidates refused are
    tried again in up to ``passes`` rounds. Returns how many stay refused.
    """
    # Bits that may receive a shift by +-1 (x) or +-3 (y) without wrapping round
    # a row or column of the cube; bits past 26 are never kept.
    up_x = down_x = up_y = down_y = n18 = 0
    for k in range(27):
        if k % 3 != 0:
            up_x |= 1 << k
        if k % 3 != 2:
            down_x |= 1 << k
        if (k // 3) % 3 != 0:
            up_y |= 1 << k
        if (k // 3) % 3 != 2:
            down_y |= 1 << k
        if k != 13 and abs(k // 9 - 1) + abs((k // 3) % 3 - 1) + abs(k % 3 - 1) <= 2:
            n18 |= 1 << k
    faces = (1 << 4) | (1 << 10) | (1 << 12) | (1 << 14) | (1 << 16) | (1 << 22)
    nz, ny, nx = mask.shape
    left = 0
    for _ in range(passes):
        changed = 0
        left = 0
        for i in range(cz.shape[0]):
            z, y, x = cz[i], cy[i], cx[i]
            if mask[z, y, x] == target[i]:
                continue
            fg = 0
            for k in range(27):
                zz = z + k // 9 - 1
                yy = y + (k // 3) % 3 - 1
                xx = x + k % 3 - 1
                if k != 13 and 0 <= zz < nz and 0 <= yy < ny and 0 <= xx < nx and mask[zz, yy, xx]:
                    fg |= 1 << k
            simple = fg != 0
            if simple:
                grown = fg & -fg
                while True:
                    s = grown | ((grown << 1) & up_x) | ((grown >> 1) & down_x)
                    s = s | ((s << 3) & up_y) | ((s >> 3) & down_y)
                    s = (s | (s << 9) | (s >> 9)) & fg  # fg has no bit past 26
                    if s == grown:
                        break
                    grown = s
                simple = grown == fg
            if simple:
                bg = ~fg & n18
                touch = bg & faces
                simple = touch != 0
                if simple:
                    grown = touch & -touch
                    while True:
                        s = grown | ((grown << 1) & up_x) | ((grown >> 1) & down_x)
                        s |= ((grown << 3) & up_y) | ((grown >> 3) & down_y)
                        s = (s | (grown << 9) | (grown >> 9)) & bg
                        if s == grown:
                            break
                        grown = s
                    simple = (touch & ~grown) == 0
            if simple:
                mask[z, y, x] = target[i]
                changed += 1
            else:
                left += 1
        if changed == 0:
            break
    return left


def _homotopic(start: np.ndarray, goal: np.ndarray, key: np.ndarray) -> int:
    """Turn ``start`` towards ``goal`` in place through simple voxels only.

    Voxels to clear go first, outermost (largest ``key``) first; then voxels
    to set, innermost (smallest ``key``) first, so walls grow and recede one
    layer at a time. Returns the number of voxels left as in ``start``.
    """
    diff = start != goal
    clear = np.flatnonzero(diff & start)
    add = np.flatnonzero(diff & ~start)
    flat_key = key.reshape(-1)
    order = np.r_[
        clear[np.argsort(-flat_key[clear], kind="stable")], add[np.argsort(flat_key[add], kind="stable")]
    ]
    cz, cy, cx = (c.astype(np.int64) for c in np.unravel_index(order, start.shape))
    target = goal.reshape(-1)[order]
    return int(_compiled(_homotopic_kernel)(start, cz, cy, cx, target, 3))


_COMPILED: dict[str, Callable[..., Any]] = {}


def _compiled(fn: Callable[..., Any]) -> Callable[..., Any]:
    """``fn`` compiled by numba, on first use (importing numba costs every command line start)."""
    if fn.__name__ not in _COMPILED:
        import numba

        _COMPILED[fn.__name__] = numba.njit(cache=True, nogil=True)(fn)
    return _COMPILED[fn.__name__]


def _shift_planes(vol: np.ndarray, shift_vox: np.ndarray) -> np.ndarray:
    """Plane ``i`` of ``vol`` moved by ``shift_vox[i]`` (y, x) voxels, bilinear, edges repeated.

    Output ``[i, y, x]`` = input at ``(y - sy, x - sx)``, as ``ndimage.shift``
    with ``order=1, mode='nearest'`` per plane, in a few slices per plane.
    """
    k = int(math.ceil(float(np.abs(shift_vox).max()))) + 1
    pad = np.pad(vol, ((0, 0), (k, k), (k, k)), mode="edge")
    _, ny, nx = vol.shape
    out = np.empty_like(vol)
    for z, (sy, sx) in enumerate(shift_vox):
        iy, ix = int(math.floor(-sy)), int(math.floor(-sx))
        fy, fx = float(-sy - iy), float(-sx - ix)
        y0, x0 = k + iy, k + ix
        p = pad[z]
        rows = p[y0 : y0 + ny + 1]
        mixed = (1.0 - fx) * rows[:, x0 : x0 + nx] + fx * rows[:, x0 + 1 : x0 + 1 + nx]
        out[z] = (1.0 - fy) * mixed[:ny] + fy * mixed[1:]
    return out


def _paint_imaged(
    shape: tuple[int, int, int],
    net: VesselNetwork,
    d: np.ndarray,
    roughness: float,
    rng: np.random.Generator,
    *,
    correlation_um: float | None,
    shift_vox: np.ndarray | None,
    psf_sigma_um: np.ndarray | None,
    psf_threshold: float,
) -> tuple[np.ndarray, int]:
    """Vessels as imaged: rough walls, optional blur and plane motion, thresholded.

    The smooth vessels are imaged too, and the rough mask is reached from
    the smooth one through simple voxels only (:func:`_homotopic`): rough
    walls never add a loop, cavity or piece of their own (steep short-range
    bumps digitised side by side would otherwise arch over the grooves
    between them); the few voxels that would are left smooth. With
    ``correlation_um`` the roughness field (1/e correlation length
    ``correlation_um``) is looked up where the voxel's ray from the axis
    meets the nominal wall, a function of the wall position alone. Without
    it the original field (about one radius, looked up at the voxel) is used.

    Returns
    -------
    mask : ndarray of bool, shape ``shape``
    refused : int
        Voxels of the rough wall left as in the smooth one.
    """
    soft = psf_sigma_um is not None
    f_hi = 1.0 + _FIELD_CLIP * roughness
    f_lo = 1.0 - _FIELD_CLIP * roughness
    # The kernel visits only each row's run inside a piece, so long pieces cost
    # nothing in empty corners and save the end caps that neighbours share.
    pts, rad, owner, sel = _chord_selection(
        net, _SAGITTA_FRACTION * float(d.min()), lambda rmin, rmax, u: 16.0 * rmin
    )
    pair = owner[sel[:-1]] == owner[sel[1:]]
    ia, ib = sel[:-1][pair], sel[1:][pair]
    a, b, ra, rb, sid = pts[ia], pts[ib], rad[ia], rad[ib], owner[ia]
    half_w = 0.5 * float(np.linalg.norm(d)) if soft else 0.0
    # Motion is painted into the sampling unless a blur comes first.
    shift_um = np.zeros((shape[0], 2)) if shift_vox is None or soft else shift_vox * d[1:]
    pad = np.r_[half_w, half_w + np.abs(shift_um).max(axis=0)]
    reach = np.maximum(ra, rb)[:, None] * f_hi + pad
    grid = np.asarray(shape, dtype=np.int64)
    lo = np.maximum(np.ceil((np.minimum(a, b) - reach) / d - 1e-6).astype(np.int64), 0)
    hi = np.minimum(np.floor((np.maximum(a, b) + reach) / d + 1e-6).astype(np.int64), grid - 1)
    dims = hi - lo + 1
    live = np.all(dims > 0, axis=1)
    a, b, ra, rb, sid, lo, dims = a[live], b[live], ra[live], rb[live], sid[live], lo[live], dims[live]
    mode = 0
    tex = np.zeros((1, 1, 1), dtype=np.float32)
    rot = np.eye(3)
    off = np.zeros(3)
    tex_scale = np.zeros(len(a))
    tex_const = np.zeros((len(a), 3))
    if roughness > 0 and correlation_um is None:
        # The original field, drawn as in _paint_tubes: one radius per correlation length.
        mode = 1
        tex = _noise_texture(rng)
        seg_off = rng.uniform(0, _TEX_N, size=(len(net.segments), 3))
        seg_scale = np.array([2.0 * _TEX_SIGMA / s["radius_um"] for s in net.segments])
        tex_scale = seg_scale[sid]
        tex_const = a * seg_scale[sid, None] + seg_off[sid]
    elif roughness > 0:
        mode = 2
        # A quarter of the texels at a quarter of the smoothing: the same period
        # in correlation lengths (about 11), and a texture small enough (128 kB)
        # for the cache, which lookups scattered along rotated rays would keep
        # missing. Texels are a third of a correlation length, finer than the
        # voxels sampling a field correlated over a voxel or two, so the
        # nearest-texel lookup shows no steps.
        tex = _noise_texture(rng, _TEX_N // 4, _TEX_SIGMA / 4)
        # One field for all tubes, turned at random so that no tube runs along a
        # period of the texture; texel edge = correlation / (2 sigma).
        rot = _random_rotation(rng) * (0.5 * _TEX_SIGMA / correlation_um)
        off = rng.uniform(0, _TEX_N // 4, size=3)
    small = (1, 1, 1)
    psi = np.full(small if soft and roughness <= 0 else shape, np.inf, dtype=np.float32)
    marg = np.full(small if soft else shape, np.inf, dtype=np.float32)
    occ_c = np.zeros(shape if soft else small, dtype=np.float32)
    occ_r = np.zeros(shape if soft and roughness > 0 else small, dtype=np.float32)
    _compiled(_paint_kernel)(
        psi, marg, occ_c, occ_r if roughness > 0 else occ_c, soft,
        a, b - a, ra, rb - ra, lo, dims, d, shift_um,
        float(roughness), f_lo, f_hi, half_w, mode, tex, rot, off, tex_scale, tex_const, _FIELD_CLIP,
    )
    if soft:
        fields = [occ_c, occ_r] if roughness > 0 else [occ_c]
        for k, occ in enumerate(fields):
            if np.any(psf_sigma_um > 0):
                occ = ndimage.gaussian_filter(occ, psf_sigma_um / d, mode="nearest")
            if shift_vox is not None:
                # The motion moves what the microscope sees in each plane: shift after the blur.
                occ = _shift_planes(occ, shift_vox)
            fields[k] = occ
        mask = fields[0] >= psf_threshold
        if roughness <= 0:
            return mask, 0
        goal = fields[1] >= psf_threshold
        key = -fields[1]  # most surely inside first
    else:
        mask = psi <= 1.0
        if roughness <= 0:
            return mask, 0
        goal = marg <= 0.0
        key = psi
    refused = _homotopic(mask, goal, key)
    return mask, refused


def _fill_cavities(mask: np.ndarray) -> int:
    """Fill background components (6-connected) that touch no face; return how many."""
    lab, n = ndimage.label(~mask)
    if n == 0:
        return 0
    touching = np.zeros(n + 1, dtype=bool)
    for ax in range(3):
        for end in (0, -1):
            touching[np.unique(np.take(lab, end, axis=ax))] = True
    inner = ~touching
    inner[0] = False
    if not inner.any():
        return 0
    mask[inner[lab]] = True
    return int(np.count_nonzero(inner))


def _euler_26(mask: np.ndarray) -> int:
    """Euler number of the foreground (26-connected; background 6-connected).

    The union of closed voxel cubes is a cubical complex: chi = vertices -
    edges + faces - cubes, each counted once through the voxels around it.
    """
    p = np.pad(mask, 1)
    z, y, x = mask.shape

    def any_of(offsets, size):
        out = np.zeros(size, dtype=bool)
        for o in offsets:
            out |= p[o[0] : o[0] + size[0], o[1] : o[1] + size[1], o[2] : o[2] + size[2]]
        return int(np.count_nonzero(out))

    pairs = (0, 1)
    vertices = any_of([(i, j, k) for i in pairs for j in pairs for k in pairs], (z + 1, y + 1, x + 1))
    edges = (
        any_of([(1, j, k) for j in pairs for k in pairs], (z, y + 1, x + 1))
        + any_of([(i, 1, k) for i in pairs for k in pairs], (z + 1, y, x + 1))
        + any_of([(i, j, 1) for i in pairs for j in pairs], (z + 1, y + 1, x))
    )
    faces = (
        any_of([(i, 1, 1) for i in pairs], (z + 1, y, x))
        + any_of([(1, j, 1) for j in pairs], (z, y + 1, x))
        + any_of([(1, 1, k) for k in pairs], (z, y, x + 1))
    )
    return vertices - edges + faces - int(np.count_nonzero(mask))


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


def _to_image(p: np.ndarray, shift_um: np.ndarray | None, d: np.ndarray) -> np.ndarray:
    """Positions (..., 3) µm moved by the lateral shift of the plane nearest to each."""
    if shift_um is None:
        return p
    plane = np.clip(np.round(p[..., 0] / d[0]).astype(np.int64), 0, len(shift_um) - 1)
    out = np.array(p, dtype=float)
    out[..., 1:] += shift_um[plane]
    return out


def _short(name: str, why: str, count: int, placed: list[dict], fit: bool) -> list[dict]:
    """What was placed when fewer than ``count`` fit: returned with ``fit``, else an error."""
    if fit:
        return placed
    raise _bad(name, why, count)


def _carve_holes(mask, net, d, count, rng, radius_range=(0.5, 1.0), shift_um=None, fit=False) -> list[dict]:
    """Carve ``count`` fully enclosed background cavities on vessel centrelines.

    Each is a ball (radius drawn from ``radius_range``, voxel index units)
    around a sub-voxel centre, inside a cube of half-edge ``k`` voxels; it is
    carved only where the cube one voxel larger is all vessel, so a closed
    shell stays around it.
    """
    if count == 0:
        return []
    r_lo, r_hi = radius_range
    # Radii up to one voxel keep the original 3^3 footprint, so old seeds give old masks.
    k = 1 if r_hi <= 1.0 else int(math.ceil(r_hi + 0.3))
    need_r = (k + 2.0) * float(d.max())
    shape = np.asarray(mask.shape)
    cands = []
    for s in net.segments:
        pts, rad = s["points_um"], s["radii_um"]
        n = len(pts)
        sel = np.arange(int(0.25 * n), max(int(0.75 * n), int(0.25 * n) + 1))
        sel = sel[rad[sel] >= need_r]
        if len(sel):
            cands.append(np.c_[pts[sel], np.full(len(sel), s["id"])])
    if not cands:
        why = f"0 when no vessel has radius >= {k + 2} voxels ({need_r:g} um)"
        return _short("holes", why, count, [], fit)
    cands = np.concatenate(cands)
    shell = _cube(k + 1)
    out = []
    order = rng.permutation(len(cands))
    for start in range(0, len(order), 512):
        pick = cands[order[start : start + 512]]
        base = np.round(_to_image(pick[:, :3], shift_um, d) / d).astype(np.int64)
        inside = np.all((base >= k + 2) & (base < shape - (k + 2)), axis=1)
        full = np.zeros(len(base), dtype=bool)
        full[inside] = np.all(_gather(mask, base[inside], shell, False), axis=1)
        for i in np.nonzero(full)[0]:
            # Re-check: an earlier hole in this batch may sit in the shell.
            if not np.all(_gather(mask, base[i : i + 1], shell, False)):
                continue
            radius = float(rng.uniform(r_lo, r_hi))
            offs, centre = _blob_offsets(rng, radius, k)
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
    why = f"at most {len(out)} enclosed cavities for this network and spacing"
    return _short("holes", why, count, out, fit)


def _add_specks(mask, d, count, rng, fit=False) -> list[dict]:
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
    return _short("specks", f"at most {len(out)} isolated specks in this volume", count, out, fit)


# ----------------------------------------------------------------------- artefacts

# Handles, tunnels and open holes go on vessels at least this many lateral voxels
# in radius (thinner walls leave no room for a loop beside the lumen); gaps cut
# vessels at most this many lateral voxels in radius (capillaries are 2-4 voxels
# across; 2.5 also takes the thinnest vessels of the demo capillary bed).
_THICK_VOX = 3.0
_THIN_VOX = 2.5
_MAX_JITTER_VOX = 3.0
# Attempts per requested artefact before giving up with an error.
_ATTEMPTS = 60
_FULL26 = np.ones((3, 3, 3), dtype=bool)
_FACE6 = ndimage.generate_binary_structure(3, 1)


@dataclass
class _Samples:
    """Centreline samples of the clipped network, in image space (after jitter)."""

    pos: np.ndarray  # (N, 3) µm
    rad: np.ndarray  # (N,) µm
    tan: np.ndarray  # (N, 3) unit tangents
    seg: np.ndarray  # (N,) segment ids of the truth
    arc: np.ndarray  # (N,) arc position along the segment, µm
    to_end: np.ndarray  # (N,) arc distance to the nearer segment end, µm
    to_junction: np.ndarray  # (N,) arc distance to the nearer end where other segments join, µm
    weight: np.ndarray  # (N,) arc length each sample stands for, µm
    tree: cKDTree


def _centreline_samples(net: VesselNetwork, d: np.ndarray, shift_um: np.ndarray | None) -> _Samples:
    k = np.array([len(seg["points_um"]) for seg in net.segments], dtype=np.int64)
    starts = np.cumsum(k) - k
    last = starts + k - 1
    pts = np.concatenate([seg["points_um"] for seg in net.segments])
    owner = np.repeat(np.arange(len(k)), k)
    step = np.linalg.norm(np.diff(pts, axis=0), axis=1)
    step[last[:-1]] = 0.0  # no step from one segment's end to the next one's start
    arc = np.r_[0.0, np.cumsum(step)]
    arc -= arc[starts][owner]
    length = arc[last][owner]
    # Central differences inside a segment, one-sided at its ends.
    nxt = np.minimum(np.arange(len(pts)) + 1, last[owner])
    prv = np.maximum(np.arange(len(pts)) - 1, starts[owner])
    tan = pts[nxt] - pts[prv]
    tan /= np.maximum(np.linalg.norm(tan, axis=1), 1e-12)[:, None]
    before = np.r_[0.0, step][: len(pts)]
    before[starts] = 0.0
    after = np.r_[step, 0.0]
    img = _to_image(pts, shift_um, d)
    deg = net.degrees()
    joined_from = np.array([deg[seg["node_from"]] > 1 for seg in net.segments])[owner]
    joined_to = np.array([deg[seg["node_to"]] > 1 for seg in net.segments])[owner]
    return _Samples(
        img,
        np.concatenate([seg["radii_um"] for seg in net.segments]),
        tan,
        np.array([seg["id"] for seg in net.segments], dtype=np.int64)[owner],
        arc,
        np.minimum(arc, length - arc),
        np.minimum(np.where(joined_from, arc, np.inf), np.where(joined_to, length - arc, np.inf)),
        0.5 * (before + after),
        cKDTree(img),
    )


class _Occupied:
    """Balls already taken by artefacts, so that new ones keep their distance."""

    def __init__(self, margin_um: float):
        self.margin = margin_um
        self.centres: list[np.ndarray] = []
        self.radii: list[float] = []

    def free(self, centre: np.ndarray, radius: float) -> bool:
        if not self.centres:
            return True
        dist = np.linalg.norm(np.asarray(self.centres) - centre, axis=1)
        return bool(np.all(dist >= np.asarray(self.radii) + radius + self.margin))

    def add(self, centre: np.ndarray, radius: float) -> None:
        self.centres.append(np.asarray(centre, dtype=float))
        self.radii.append(float(radius))


def _clear_of_others(
    samp: _Samples, i: int, pts: np.ndarray, radius: float, reach: float, margin: float
) -> bool:
    """True when no other vessel's rough wall comes within ``margin`` of the balls at ``pts``.

    ``reach`` multiplies radii (room for roughness); parts of the same
    segment far away along the arc count as other vessels, so loops and
    coils are not bridged.
    """
    pts = np.atleast_2d(pts)
    span = float(np.max(np.linalg.norm(pts - samp.pos[i], axis=1))) + radius
    hits = samp.tree.query_ball_point(pts, radius + margin + reach * float(samp.rad.max()))
    j = np.unique(np.concatenate([np.asarray(h, dtype=np.int64) for h in hits]))
    if len(j) == 0:
        return True
    far_arc = np.abs(samp.arc[j] - samp.arc[i]) > 2.0 * (span + margin + reach * samp.rad[i])
    j = j[(samp.seg[j] != samp.seg[i]) | far_arc]
    if len(j) == 0:
        return True
    dist, _ = cKDTree(pts).query(samp.pos[j])
    return not bool(np.any(dist < radius + margin + reach * samp.rad[j]))


def _pick(samp: _Samples, ok: np.ndarray, rng: np.random.Generator) -> int:
    """Index of a sample among ``ok``, with probability proportional to arc length."""
    idx = np.flatnonzero(ok)
    cdf = np.cumsum(samp.weight[idx])
    return int(idx[min(int(np.searchsorted(cdf, rng.random() * cdf[-1])), len(idx) - 1)])


def _perpendicular(rng: np.random.Generator, u: np.ndarray) -> np.ndarray:
    v = rng.standard_normal(3)
    v -= np.dot(v, u) * u
    n = float(np.linalg.norm(v))
    return v / n if n > 1e-9 else _any_perpendicular(u)


def _box_voxels(lo_um: np.ndarray, hi_um: np.ndarray, d: np.ndarray, shape: np.ndarray) -> np.ndarray:
    """Indices (M, 3) of voxel centres in the box ``[lo_um, hi_um]``, cut to the grid."""
    lo = np.maximum(np.ceil(lo_um / d - 1e-9).astype(np.int64), 0)
    hi = np.minimum(np.floor(hi_um / d + 1e-9).astype(np.int64), shape - 1)
    if np.any(hi < lo):
        return np.empty((0, 3), dtype=np.int64)
    axes = [np.arange(lo[k], hi[k] + 1) for k in range(3)]
    return np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)


def _curve_voxels(pts: np.ndarray, radius: float, d: np.ndarray, shape: np.ndarray) -> np.ndarray:
    """Voxels of a thin tube along the dense polyline ``pts`` (µm), face-connected.

    The voxels holding consecutive points are joined by steps along one axis
    at a time, so the chain is 6-connected (a carved tunnel is a passage for
    6-connected background); voxel centres within ``radius`` of a point are
    added for thickness.
    """
    v = np.round(pts / d).astype(np.int64)
    chain = [v]
    # Fill in corners where consecutive voxels differ along several axes.
    for ax in range(2):
        mid = v[:-1].copy()
        mid[:, : ax + 1] = v[1:, : ax + 1]
        chain.append(mid)
    vox = [np.concatenate(chain)]
    if radius > 0:
        box = _box_voxels(pts.min(axis=0) - radius, pts.max(axis=0) + radius, d, shape)
        if len(box):
            dist, _ = cKDTree(pts).query(box * d, distance_upper_bound=radius * 1.0001)
            vox.append(box[dist <= radius])
    out = np.unique(np.concatenate(vox), axis=0)
    return out[np.all((out >= 0) & (out < shape), axis=1)]


def _enclosed(background: np.ndarray) -> int:
    """6-connected components of ``background`` touching no face of the array."""
    lab, n = ndimage.label(background)
    if n == 0:
        return 0
    touching = np.zeros(n + 1, dtype=bool)
    for ax in range(3):
        for end in (0, -1):
            touching[np.take(lab, end, axis=ax)] = True
    return int(n - np.count_nonzero(touching[1:]))


def _try_change(mask: np.ndarray, vox: np.ndarray, value: bool, euler_change: int, attach: bool) -> int:
    """Set ``mask[vox] = value`` if that changes the Euler number by exactly ``euler_change``.

    The Euler number is a sum over 2x2x2 configurations, so its change is
    computed exactly on a crop holding the changed voxels with a margin. No
    cavity may appear or vanish in the crop (the margin of 3 voxels holds any
    pit or hole nearby), so a change cannot trade a cavity for a loop. With
    ``attach`` every added voxel must join a component that held vessel
    voxels before (no new piece). Returns the number of voxels changed (0
    when refused or nothing would change).
    """
    from skimage.measure import euler_number

    if len(vox) == 0:
        return 0
    lo = np.maximum(vox.min(axis=0) - 3, 0)
    hi = np.minimum(vox.max(axis=0) + 4, mask.shape)
    sl = tuple(slice(int(a), int(b)) for a, b in zip(lo, hi))
    before = mask[sl].copy()
    after = before.copy()
    loc = vox - lo
    after[loc[:, 0], loc[:, 1], loc[:, 2]] = value
    changed = int(np.count_nonzero(after != before))
    if changed == 0:
        return 0
    if euler_number(after, connectivity=3) - euler_number(before, connectivity=3) != euler_change:
        return 0
    if _enclosed(~after) != _enclosed(~before):
        return 0
    if attach:
        lab, _ = ndimage.label(after, structure=_FULL26)
        if not np.all(np.isin(lab[after & ~before], lab[before])):
            return 0
    mask[sl] = after
    return changed


def _add_blobs(mask, samp, d, count, rng, occupied, fit) -> list[dict]:
    """Add ``count`` ellipsoidal blobs stuck to vessel walls (no new component, no loop)."""
    if count == 0:
        return []
    shape = np.asarray(mask.shape)
    top = (shape - 1) * d
    ok = np.all((samp.pos >= 0) & (samp.pos <= top), axis=1)
    if not np.any(ok):
        return _short("blobs", "0 when no centreline lies in the grid", count, [], fit)
    out: list[dict] = []
    for _ in range(_ATTEMPTS * count):
        i = _pick(samp, ok, rng)
        r, n = float(samp.rad[i]), _perpendicular(rng, samp.tan[i])
        rb = max(float(rng.uniform(0.3, 0.8)) * r, float(d.min()))
        semi = rb * np.array([1.0, rng.uniform(0.6, 1.0), rng.uniform(0.6, 1.0)])
        rot = _random_rotation(rng)
        centre = samp.pos[i] + n * (r + float(rng.uniform(-0.25, 0.5)) * rb)
        if not occupied.free(centre, rb):
            continue
        box = _box_voxels(centre - rb, centre + rb, d, shape)
        q = (box * d - centre) @ rot
        vox = box[np.sum((q / semi) ** 2, axis=1) <= 1.0]
        added = _try_change(mask, vox, True, 0, attach=True)
        if not added:
            continue
        occupied.add(centre, rb)
        out.append(
            {
                "centre_um": centre.tolist(),
                "centre_vox": (centre / d).tolist(),
                "semi_axes_um": semi.tolist(),
                # Rows: unit vectors of the three semi-axes (z, y, x components).
                "axes": rot.T.tolist(),
                "segment": int(samp.seg[i]),
                "vessel_radius_um": r,
                "n_voxels": added,
                "euler_change": 0,
            }
        )
        if len(out) == count:
            return out
    why = f"at most {len(out)} blobs attached to walls for this network and spacing"
    return _short("blobs", why, count, out, fit)


def _thick_sites(mask, samp, d, *, end_clearance_vox):
    """Lateral voxel size and the centreline samples of thick vessels inside the grid, clear of ends."""
    top = (np.asarray(mask.shape) - 1) * d
    lat = float(max(d[1], d[2]))
    ok = (
        (samp.rad >= _THICK_VOX * lat)
        & np.all((samp.pos >= 0) & (samp.pos <= top), axis=1)
        & (samp.to_end >= samp.rad + end_clearance_vox * lat)
    )
    return lat, ok


def _thick_why(lat):
    return f"0 when no vessel has radius >= {_THICK_VOX:g} voxels ({_THICK_VOX * lat:g} um)"


def _add_handles(mask, samp, d, count, rng, occupied, reach, fit) -> list[dict]:
    """Add ``count`` small loops on thick vessels: handles over or tunnels under the wall.

    A handle is a thin arc rising from inside the wall to 1.5-2.5 lateral
    voxels of clearance above it; a tunnel is a thin passage entering the
    wall from outside, running under a bridge 1-2 lateral voxels thick and
    leaving again. Either adds one loop (Euler number - 1) that belongs to no
    vessel. ``clearance_um`` records the gap under an arc or the bridge over
    a tunnel.
    """
    if count == 0:
        return []
    shape = np.asarray(mask.shape)
    lat, ok = _thick_sites(mask, samp, d, end_clearance_vox=4.0)
    if not np.any(ok):
        return _short("handles", _thick_why(lat), count, [], fit)
    out: list[dict] = []
    for _ in range(_ATTEMPTS * count):
        i = _pick(samp, ok, rng)
        r, u = float(samp.rad[i]), samp.tan[i]
        n = _perpendicular(rng, u)
        kind = "handle" if rng.random() < 0.5 else "tunnel"
        half_span = float(rng.uniform(2.0, 3.5)) * lat
        rho = float(rng.uniform(0.5, 1.0)) * lat
        clearance = float(rng.uniform(1.5, 2.5)) * lat
        phi = float(rng.uniform(-0.25 * math.pi, 0.25 * math.pi))
        half_t = max(rho, 0.5 * lat)
        if kind == "tunnel":
            # The bridge over a tunnel may be one voxel thin; the passage must stay
            # within the outer 80 % of the radius, else the vessel gets a handle.
            clearance -= 0.5 * lat
            if clearance + 2.0 * half_t > 0.8 * r:
                kind = "handle"
                clearance += 0.5 * lat
        height = clearance + half_t  # centreline of the arc above (below) the nominal wall
        anchor = 1.5 * lat + rho  # feet below (tunnel mouths above) the nominal wall
        length = 2.0 * half_span + 2.0 * (height + anchor)
        tau = np.linspace(-1.0, 1.0, int(math.ceil(3.0 * length / float(d.min()))) + 2)
        prof = np.sqrt(np.clip(1.0 - tau**2, 0.0, 1.0))
        sign = 1.0 if kind == "handle" else -1.0
        radial = r - sign * anchor + sign * (height + anchor) * prof
        ang = tau * half_span * math.sin(phi) / r
        w = np.cross(u, n)
        pts = (
            samp.pos[i]
            + (tau * half_span * math.cos(phi))[:, None] * u
            + radial[:, None] * (np.cos(ang)[:, None] * n + np.sin(ang)[:, None] * w)
        )
        middle = pts.mean(axis=0)
        extent = float(np.max(np.linalg.norm(pts - middle, axis=1))) + rho
        if not occupied.free(middle, extent):
            continue
        if not _clear_of_others(samp, i, pts[:: max(1, len(pts) // 12)], rho, reach, 2 * lat):
            continue
        vox = _curve_voxels(pts, rho, d, shape)
        changed = _try_change(mask, vox, kind == "handle", -1, attach=kind == "handle")
        if not changed:
            continue
        occupied.add(middle, extent)
        out.append(
            {
                "kind": kind,
                "feet_um": [pts[0].tolist(), pts[-1].tolist()],
                "apex_um": pts[len(pts) // 2].tolist(),
                "apex_vox": (pts[len(pts) // 2] / d).tolist(),
                "span_um": float(np.linalg.norm(pts[-1] - pts[0])),
                "clearance_um": clearance,
                "thickness_um": 2.0 * half_t,
                "segment": int(samp.seg[i]),
                "vessel_radius_um": r,
                "n_voxels": changed,
                "euler_change": -1,
            }
        )
        if len(out) == count:
            return out
    why = f"at most {len(out)} handles for this network and spacing"
    return _short("handles", why, count, out, fit)


def _carve_open_holes(mask, samp, d, count, rng, occupied, reach, fit) -> list[dict]:
    """Carve ``count`` pits into walls, open to the outside.

    Each is a ball of radius 0.5-2 lateral voxels (in µm, so a coarse z step
    sees it in a plane or two) centred on the nominal wall of a vessel with
    radius >= 3 lateral voxels; it must touch background that was there
    before and change no component, loop or cavity.
    """
    if count == 0:
        return []
    shape = np.asarray(mask.shape)
    lat, ok = _thick_sites(mask, samp, d, end_clearance_vox=2.0)
    if not np.any(ok):
        return _short("open_holes", _thick_why(lat), count, [], fit)
    out: list[dict] = []
    for _ in range(_ATTEMPTS * count):
        i = _pick(samp, ok, rng)
        r, n = float(samp.rad[i]), _perpendicular(rng, samp.tan[i])
        radius = float(rng.uniform(0.5, 2.0)) * lat
        centre = samp.pos[i] + r * n  # on the nominal wall
        if not occupied.free(centre, radius) or not _clear_of_others(samp, i, centre, radius, reach, lat):
            continue  # a pit must not bite into a neighbour
        box = _box_voxels(centre - radius, centre + radius, d, shape)
        vox = box[np.linalg.norm(box * d - centre, axis=1) <= radius]
        if len(vox) == 0:
            vox = np.clip(np.round(centre / d).astype(np.int64), 0, shape - 1)[None]
        if not np.any(mask[vox[:, 0], vox[:, 1], vox[:, 2]]):
            continue
        # Open: a removed voxel must touch background that was already there.
        lo = np.maximum(vox.min(axis=0) - 1, 0)
        hi = np.minimum(vox.max(axis=0) + 2, shape)
        sl = tuple(slice(int(a), int(b)) for a, b in zip(lo, hi))
        carved = np.zeros(tuple(int(x) for x in hi - lo), dtype=bool)
        loc = vox - lo
        carved[loc[:, 0], loc[:, 1], loc[:, 2]] = True
        carved &= mask[sl]
        if not np.any(ndimage.binary_dilation(carved, _FACE6) & ~mask[sl]):
            continue
        removed = _try_change(mask, vox, False, 0, attach=False)
        if not removed:
            continue
        occupied.add(centre, radius)
        out.append(
            {
                "centre_um": centre.tolist(),
                "centre_vox": (centre / d).tolist(),
                "radius_um": radius,
                "radius_vox": radius / lat,
                "segment": int(samp.seg[i]),
                "vessel_radius_um": r,
                "n_voxels": removed,
                "euler_change": 0,
            }
        )
        if len(out) == count:
            return out
    why = f"at most {len(out)} open holes for this network and spacing"
    return _short("open_holes", why, count, out, fit)


def _carve_gaps(mask, samp, d, count, rng, occupied, reach, jitter_um, fit) -> list[dict]:
    """Cut ``count`` thin vessels by slabs of background 1-3 voxels long.

    The slab is perpendicular to the local tangent ``u`` and ``g * sum_a |u_a|
    d_a`` long (g = 1, 2 or 3): no two 26-neighbours differ by more than
    ``sum_a |u_a| d_a`` along ``u``, so no vessel voxel on one side touches one
    on the other. Within a disc covering the rough wall plus twice the
    jitter, the slab clears the vessel voxels connected (inside the slab) to
    the vessel's core, so a neighbour passing through the disc is spared.
    """
    if count == 0:
        return []
    shape = np.asarray(mask.shape)
    top = (shape - 1) * d
    lat = float(max(d[1], d[2]))
    margin = 0.5 * float(np.linalg.norm(d))  # half a voxel diagonal: the digitised wall's slack
    ok = (samp.rad <= _THIN_VOX * lat) & np.all((samp.pos >= 0) & (samp.pos <= top), axis=1)
    if not np.any(ok):
        why = f"0 when no vessel has radius <= {_THIN_VOX:g} voxels ({_THIN_VOX * lat:g} um)"
        return _short("gaps", why, count, [], fit)
    out: list[dict] = []
    for _ in range(_ATTEMPTS * count):
        i = _pick(samp, ok, rng)
        u, centre, r = samp.tan[i], samp.pos[i], float(samp.rad[i])
        g = int(rng.integers(1, 4))
        length = g * float(np.sum(np.abs(u) * d))
        disc = r * reach + 2.0 * jitter_um + margin
        extent = math.hypot(disc, 0.5 * length)
        # The junction node outside the disc (tubes meeting there and crossing
        # the slab apart from this one are spared), and off the very tips of
        # blind or cut ends.
        if samp.to_junction[i] < disc + margin or samp.to_end[i] < 0.5 * length + margin:
            continue
        if not occupied.free(centre, extent):
            continue
        box = _box_voxels(centre - extent, centre + extent, d, shape)
        rel = box * d - centre
        along = rel @ u
        across = np.linalg.norm(rel - along[:, None] * u, axis=1)
        box = box[(np.abs(along) <= 0.5 * length) & (across <= disc)]
        across = across[(np.abs(along) <= 0.5 * length) & (across <= disc)]
        if len(box) == 0:
            continue
        lo = box.min(axis=0)
        local = np.zeros(tuple(box.max(axis=0) - lo + 1), dtype=bool)
        loc = box - lo
        local[loc[:, 0], loc[:, 1], loc[:, 2]] = mask[box[:, 0], box[:, 1], box[:, 2]]
        lab, _ = ndimage.label(local, structure=_FULL26)
        labels = lab[loc[:, 0], loc[:, 1], loc[:, 2]]
        core = np.unique(labels[(across <= 0.5 * r + 0.5 * jitter_um + 0.5 * lat) & (labels > 0)])
        if len(core) == 0:
            continue
        vox = box[np.isin(labels, core)]
        removed = _try_change(mask, vox, False, 1, attach=False)
        if not removed:
            continue
        occupied.add(centre, extent)
        out.append(
            {
                "centre_um": centre.tolist(),
                "centre_vox": (centre / d).tolist(),
                "direction": u.tolist(),
                "length_vox": g,
                "length_um": length,
                "segment": int(samp.seg[i]),
                "arc_position_um": float(samp.arc[i]),
                "vessel_radius_um": r,
                "n_voxels": removed,
                "euler_change": 1,
            }
        )
        if len(out) == count:
            return out
    why = f"at most {len(out)} gaps in thin vessels for this network and spacing"
    return _short("gaps", why, count, out, fit)


def _jitter_shifts(rng: np.random.Generator, n_planes: int, jitter_vox: float) -> np.ndarray:
    """Per-plane lateral shifts (n_planes, 2) in voxels, uniform in a disc of radius ``jitter_vox``."""
    rad = jitter_vox * np.sqrt(rng.random(n_planes))
    ang = rng.uniform(0.0, 2.0 * math.pi, n_planes)
    return np.stack([rad * np.sin(ang), rad * np.cos(ang)], axis=1)


def _clipped_normal_second_moment(c: float) -> float:
    """E[min(max(g, -c), c)^2] for a standard normal g."""
    tail = 0.5 * math.erfc(c / math.sqrt(2.0))
    pdf = math.exp(-0.5 * c * c) / math.sqrt(2.0 * math.pi)
    return 1.0 - 2.0 * tail - 2.0 * c * pdf + 2.0 * c * c * tail


def _psf_sigma(value: Any) -> np.ndarray | None:
    if value is None:
        return None
    if isinstance(value, (int, float, np.integer, np.floating)) and not isinstance(value, (bool, np.bool_)):
        value = (value,) * 3
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise _bad("psf_sigma_um", "None, a number or three numbers (sz, sy, sx) >= 0", value) from None
    if arr.shape != (3,) or not np.all(np.isfinite(arr)) or np.any(arr < 0):
        raise _bad("psf_sigma_um", "None, a number or three numbers (sz, sy, sx) >= 0", value)
    return arr


def _radius_range(value: Any) -> tuple[float, float]:
    expected = "two radii (low, high) with 0.5 <= low <= high <= 3"
    try:
        pair = list(value)
    except TypeError:
        pair = []
    if isinstance(value, (str, bytes)) or len(pair) != 2:
        raise _bad("hole_radius_vox", expected, value)
    lo, hi = (_real("hole_radius_vox", v, low=0.5, high=3.0) for v in pair)
    if lo > hi:
        raise _bad("hole_radius_vox", expected, value)
    return lo, hi


def rasterize(
    network: VesselNetwork,
    *,
    spacing: Sequence[float] = (1.0, 1.0, 1.0),
    shape: Sequence[int] | None = None,
    margin_um: float | None = None,
    roughness: float = 0.0,
    roughness_correlation_um: float | None = None,
    specks: int = 0,
    holes: int = 0,
    hole_radius_vox: Sequence[float] = (0.5, 1.0),
    open_holes: int = 0,
    blobs: int = 0,
    handles: int = 0,
    gaps: int = 0,
    psf_sigma_um: float | Sequence[float] | None = None,
    psf_threshold: float = 0.5,
    jitter_vox: float = 0.0,
    fit_artefacts: bool = False,
    seed: int | None = None,
) -> tuple[np.ndarray, dict[str, Any]]:
    """Turn a network into a boolean voxel mask and its ground truth.

    With the original options only (``spacing``, ``shape``, ``margin_um``,
    ``roughness``, ``specks``, ``holes``, ``seed``) masks and truths are
    exactly those of earlier versions. Any artefact option switches to a
    model of a lab's segmentation, made in the order a real one is: vessels
    with rough walls, imaging (point-spread blur, plane-to-plane motion),
    threshold, then the defects of segmenting (enclosed holes, open holes,
    gaps, handles and tunnels, blobs, specks), each checked on the mask when
    placed so that it changes the topology exactly as recorded.

    Parameters
    ----------
    network : VesselNetwork
        Network in µm.
    spacing : sequence of 3 float
        Voxel size ``(dz, dy, dx)`` in µm; anisotropic grids are fine. A
        coarse ``dz`` (2-5 times ``dx``) gives staircase walls in z, and a
        vessel thinner than ``dz / 2`` climbing through the planes breaks
        where its axis passes half-way between two.
    shape : sequence of 3 int, optional
        Grid shape ``(Z, Y, X)``. When given (or when the network carries
        ``box_um``) the coordinates are taken as already placed: voxel
        ``(i, j, k)`` sits at ``(i*dz, j*dy, k*dx)``. Otherwise the network is
        shifted into a fitted box with ``margin_um`` to spare, and box faces are
        pulled onto 'border' nodes.
    margin_um : float, optional
        Free space around the network; default ``max(5, 2 * max(spacing))``.
    roughness : float
        Relative standard deviation of a random radius perturbation, in
        [0, 0.3]: a voxel is vessel when its distance to the centreline is
        ``<= r * (1 + roughness * g)`` with ``g`` a zero-mean unit-variance
        Gaussian field clipped to +-2.5 sd. The mean radius stays the
        truth's; the mean cross-section is ``pi r^2 E[(1 + s g)^2] = pi r^2
        (1 + 0.978 s^2)``, 6.1 % more at 0.25 (measured on 300 um tubes:
        1.061 +- 0.007), recorded as ``roughness_area_factor``.
    roughness_correlation_um : float, optional
        1/e correlation length of ``g`` in µm. None keeps the original field
        (correlation about one nominal radius, looked up at the voxel). A
        value, down to a voxel or two, gives short-range roughness from one
        field for all vessels, looked up where the voxel's ray from the axis
        meets the nominal wall, so the wall radius is a function of the wall
        position alone.
    specks : int
        Number of stray blobs (radius 0.5-1.5 voxels) away from vessels; each is
        its own 26-connected component.
    holes : int
        Number of enclosed background cavities carved on centrelines where the
        radius is at least ``k + 2`` voxels along every axis (``k`` = 1 for
        radii up to one voxel, else ``ceil(high + 0.3)``); each adds one
        cavity (Euler number + 1).
    hole_radius_vox : (float, float)
        Range of the enclosed holes' radii in voxel index units, within
        [0.5, 3]; default (0.5, 1).
    open_holes : int
        Number of pits open to the outside: balls of radius 0.5-2 lateral
        voxels (µm, ``max(dy, dx)`` units) centred on the nominal wall of
        vessels with radius >= 3 lateral voxels. Topology is unchanged.
    blobs : int
        Number of ellipsoids stuck to walls: largest semi-axis 0.3-0.8 of
        the local radius (at least the smallest voxel edge), the others
        0.6-1 of it, turned at random, centred from a quarter of it inside
        to half of it outside the nominal wall. Each touches its vessel (no
        new 26-component) and adds no loop or cavity.
    handles : int
        Number of small loops on vessels with radius >= 3 lateral voxels,
        at random either handles (arcs 1-2 voxels thick with feet 4-7
        voxels apart inside the wall and 1.5-2.5 voxels of clearance over
        it) or tunnels (passages of that size running 1-2 voxels beneath the
        wall, open at both ends; handles where the vessel is too thin). Each
        lowers the Euler number by one and belongs to no vessel.
    gaps : int
        Number of cuts through vessels with radius <= 2.5 lateral voxels:
        the vessel's voxels in a slab across it, ``g`` = 1, 2 or 3 voxel
        steps long along the tangent (``g * sum_a |u_a| d_a``, so no
        26-neighbours span it), away from junctions. Each raises the Euler
        number by one (a piece more, or a loop less).
    psf_sigma_um : float or sequence of 3 float, optional
        Standard deviations ``(sz, sy, sx)`` µm (or one for all axes) of a
        Gaussian point-spread. The partial-volume occupancy of the vessels
        (a linear ramp across each voxel's width along the wall normal) is
        blurred with it (vessels cut by the faces continue) and thresholded
        at ``psf_threshold``.
    psf_threshold : float
        Threshold in (0, 1) on the blurred occupancy. 0.5 keeps a flat wall
        in place; lower values (as automatic thresholds on dim backgrounds
        give) push walls out by about ``sigma Phi^-1(1 - t)`` along each
        axis, so an elongated ``sz`` makes vessels taller in z, small and
        horizontal ones most.
    jitter_vox : float
        Largest lateral shift of a z plane, in [0, 3] voxels (``dy``, ``dx``
        units): plane ``i`` shows the vessels moved by a shift drawn
        uniformly in a disc of that radius (breathing and heartbeat),
        applied to the sampling, or with a point-spread to the blurred plane
        before the threshold.
    fit_artefacts : bool
        False: raise when fewer specks, holes, open holes, blobs, handles or
        gaps fit than asked for. True: place as many as fit, up to each
        count (the truth lists those placed), to sweep one set of counts
        over many networks.
    seed : int, optional
        Seed for every random choice; each kind of artefact draws from its
        own stream, so adding one leaves the others' draws unchanged.

    Returns
    -------
    mask : ndarray of bool, shape (Z, Y, X)
    truth : dict
        :meth:`VesselNetwork.to_truth` of the placed network, cut to the grid
        (segments leaving it end in 'border' nodes), plus ``spacing``,
        ``shape``, ``offset_um``, node ``pos_vox`` (voxel index units),
        ``mask_voxels``, ``mask_volume_um3``, ``rasterize`` options and the
        ``specks`` and ``holes`` actually placed. Nodes, segments and the
        summary (cyclomatic number included) always describe the true
        network, never the artefacts. With an artefact option,
        ``rasterize`` also holds every new option, ``roughness_area_factor``
        and ``fit_artefacts``, and the truth gains:

        - ``open_holes``, ``blobs``, ``handles``, ``gaps``: lists of dicts
          with positions in µm and voxel units (mask coordinates), sizes,
          ``segment`` (truth id), ``vessel_radius_um``, ``n_voxels``
          changed and ``euler_change``; handles have ``kind`` ('handle' or
          'tunnel'), ``feet_um`` and ``apex_um``; gaps ``direction``,
          ``length_vox``, ``length_um`` and ``arc_position_um``;
        - ``jitter``: ``shift_vox`` and ``shift_um``, (Z, 2) (y, x) per
          plane, or None;
        - ``imaged_euler_number``: Euler number (26-connected) of the
          vessels as imaged, before the defects; ``imaged_cavities_filled``;
          ``roughness_voxels_refused``;
        - ``artefact_euler_change``: holes + specks + gaps - handles, so
          that the mask's Euler number is ``imaged_euler_number +
          artefact_euler_change`` exactly.

    Raises
    ------
    InputError
        On bad arguments, when nothing of the network lies in the grid, or
        (without ``fit_artefacts``) when the artefacts asked for do not fit.

    Notes
    -----
    Voxel counting is unbiased for the union of capsules, so volumes agree
    across spacings to within the boundary-layer scatter (about 1 % for
    radii of a few voxels). Digitisation is not topology-preserving
    everywhere: in the crease where five or six tubes of a capillary bed meet,
    about 3 % of junctions gain a one-voxel handle, so the mask's loop count
    can exceed the truth's ``cyclomatic_number`` slightly; trees, rings and
    ladders keep their topology at radii of two voxels and more.

    With artefact options, rough walls are reached from the smooth ones
    through simple voxels only (the few that would join, split, loop or
    enclose are left smooth and counted in ``roughness_voxels_refused``),
    so roughness, however short-ranged, changes no topology; cavities left
    by imaging are filled (``imaged_cavities_filled``), so the only cavities
    are the recorded holes. Blur and motion may still join or break vessels,
    as they do in real stacks; ``imaged_euler_number`` accounts for that.
    """
    if not isinstance(network, VesselNetwork):
        raise _bad("network", "a VesselNetwork", type(network).__name__)
    d = _spacing(spacing)
    margin = max(5.0, 2.0 * float(d.max())) if margin_um is None else _real("margin_um", margin_um, low=0.0)
    rough = _real("roughness", roughness, low=0.0, high=_MAX_ROUGHNESS)
    corr = (
        None
        if roughness_correlation_um is None
        else _positive("roughness_correlation_um", roughness_correlation_um)
    )
    n_specks = _count("specks", specks)
    n_holes = _count("holes", holes)
    hole_range = _radius_range(hole_radius_vox)
    n_open = _count("open_holes", open_holes)
    n_blobs = _count("blobs", blobs)
    n_handles = _count("handles", handles)
    n_gaps = _count("gaps", gaps)
    psf = _psf_sigma(psf_sigma_um)
    psf_t = _real("psf_threshold", psf_threshold, low=0.0, low_open=True, high=1.0, high_open=True)
    jitter = _real("jitter_vox", jitter_vox, low=0.0, high=_MAX_JITTER_VOX)
    if not isinstance(fit_artefacts, (bool, np.bool_)):
        raise _bad("fit_artefacts", "True or False", fit_artefacts)
    fit = bool(fit_artefacts)
    base_rng = _rng(seed)
    # Children 0-2 are the original streams; later ones are new artefacts'.
    streams = [np.random.default_rng(s) for s in base_rng.bit_generator.seed_seq.spawn(8)]
    rng_rough, rng_holes, rng_specks, rng_blobs, rng_handles, rng_open, rng_gaps, rng_jitter = streams
    extended = (
        corr is not None
        or hole_range != (0.5, 1.0)
        or n_open + n_blobs + n_handles + n_gaps > 0
        or psf is not None
        or psf_t != 0.5
        or jitter > 0
        or fit
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
    dims = tuple(int(n) for n in grid)

    shift_vox = _jitter_shifts(rng_jitter, dims[0], jitter) if jitter > 0 else None
    shift_um = None if shift_vox is None else shift_vox * d[1:]
    if not extended:
        mask = np.zeros(dims, dtype=bool)
        _paint_tubes(mask, placed, d, rough, rng_rough)
    else:
        mask, n_refused = _paint_imaged(
            dims, placed, d, rough, rng_rough, correlation_um=corr, shift_vox=shift_vox, psf_sigma_um=psf,
            psf_threshold=psf_t,
        )
        # Imaging can still enclose background (a blur closing a narrow gap, planes
        # shifted over a bend); those cavities are filled, so that the only
        # cavities are the recorded holes. The Euler number of the vessels as
        # imaged is kept so that every recorded change adds to it.
        n_filled = _fill_cavities(mask)
        imaged_euler = _euler_26(mask)
    hole_rec = _carve_holes(mask, cut, d, n_holes, rng_holes, hole_range, shift_um, fit)
    if extended:
        reach = 1.0 + _FIELD_CLIP * rough
        samp = _centreline_samples(cut, d, shift_um) if n_open + n_gaps + n_handles + n_blobs else None
        occupied = _Occupied(float(d.max()))
        for h in hole_rec:
            occupied.add(np.asarray(h["centre_um"]), (h["radius_vox"] + 1.0) * float(d.max()))
        jitter_um = 0.0 if shift_um is None else float(np.max(np.linalg.norm(shift_um, axis=1)))
        open_rec = _carve_open_holes(mask, samp, d, n_open, rng_open, occupied, reach, fit)
        gap_rec = _carve_gaps(mask, samp, d, n_gaps, rng_gaps, occupied, reach, jitter_um, fit)
        handle_rec = _add_handles(mask, samp, d, n_handles, rng_handles, occupied, reach, fit)
        blob_rec = _add_blobs(mask, samp, d, n_blobs, rng_blobs, occupied, fit)
    speck_rec = _add_specks(mask, d, n_specks, rng_specks, fit)

    truth = cut.to_truth()
    for n in truth["nodes"]:
        n["pos_vox"] = (np.asarray(n["pos_um"]) / d).tolist()
    n_vox = int(np.count_nonzero(mask))
    options = {
        "roughness": rough,
        "roughness_correlation": "one nominal radius" if corr is None else f"{corr:g} um",
        "margin_um": margin,
        "specks": n_specks,
        "holes": n_holes,
        "seed": seed,
    }
    extra = dict(
        spacing=d.tolist(),
        shape=[int(n) for n in grid],
        offset_um=offset.tolist(),
        voxel_volume_um3=float(np.prod(d)),
        mask_voxels=n_vox,
        mask_volume_um3=float(n_vox * np.prod(d)),
        rasterize=options,
        specks=speck_rec,
        holes=hole_rec,
    )
    if extended:
        options.update(
            roughness_correlation_um=corr,
            roughness_area_factor=1.0 + rough**2 * _clipped_normal_second_moment(_FIELD_CLIP),
            hole_radius_vox=list(hole_range),
            open_holes=n_open,
            blobs=n_blobs,
            handles=n_handles,
            gaps=n_gaps,
            psf_sigma_um=None if psf is None else psf.tolist(),
            psf_threshold=psf_t,
            jitter_vox=jitter,
            fit_artefacts=fit,
        )
        extra.update(
            open_holes=open_rec,
            blobs=blob_rec,
            handles=handle_rec,
            gaps=gap_rec,
            jitter=None if shift_vox is None else {"shift_vox": shift_vox, "shift_um": shift_um},
            roughness_voxels_refused=n_refused,
            imaged_cavities_filled=n_filled,
            imaged_euler_number=imaged_euler,
            artefact_euler_change=len(hole_rec) + len(speck_rec) + len(gap_rec) - len(handle_rec),
        )
    truth.update(_jsonable(extra))
    return mask, truth


#: What :func:`hostile_artefacts` asks for at strength 1 (counts are rounded
#: after scaling; ``roughness_correlation_vox`` is in lateral voxels and does
#: not scale).
HOSTILE_AT_FULL_STRENGTH: Mapping[str, float] = MappingProxyType({
    "roughness": 0.25,
    "roughness_correlation_vox": 1.5,
    "blobs": 6,
    "handles": 2,
    "holes": 2,
    "open_holes": 4,
    "gaps": 3,
    "specks": 4,
    "jitter_vox": 1.0,
})


def hostile_artefacts(
    strength: float = 1.0, *, spacing: Sequence[float] = (1.0, 1.0, 1.0), seed: int | None = None
) -> dict[str, Any]:
    """Keyword arguments for :func:`rasterize` with every artefact at one strength.

    Parameters
    ----------
    strength : float
        In [0, 1]. Roughness, counts and jitter are those of
        :data:`HOSTILE_AT_FULL_STRENGTH` times ``strength`` (counts rounded);
        the roughness correlation stays 1.5 lateral voxels. 0 gives the
        clean mask, byte for byte.
    spacing : sequence of 3 float
        Voxel size ``(dz, dy, dx)`` µm, passed on and used to turn voxels
        into µm.
    seed : int, optional
        Passed on.

    Returns
    -------
    dict
        ``spacing``, ``seed``, ``roughness``, ``roughness_correlation_um``,
        ``blobs``, ``handles``, ``holes``, ``open_holes``, ``gaps``,
        ``specks``, ``jitter_vox`` and ``fit_artefacts=True``: the counts
        are upper bounds, so one strength suits any network (a tree without
        vessels thin enough for gaps gets none; the truth lists what was
        placed).

    Examples
    --------
    >>> kw = hostile_artefacts(0.5, spacing=(2.0, 1.0, 1.0), seed=1)
    >>> kw["roughness"], kw["blobs"], kw["gaps"], kw["jitter_vox"]
    (0.125, 3, 2, 0.5)
    >>> mask, truth = rasterize(straight_tube(length_um=40.0, radius_um=4.0), **kw)
    >>> len(truth["blobs"]), len(truth["gaps"])
    (3, 0)
    """
    s = _real("strength", strength, low=0.0, high=1.0)
    d = _spacing(spacing)
    full = HOSTILE_AT_FULL_STRENGTH
    lat = float(max(d[1], d[2]))
    names = ("blobs", "handles", "holes", "open_holes", "gaps", "specks")
    counts = {k: int(round(s * full[k])) for k in names}
    rough = s * full["roughness"]
    if s == 0:
        return {"spacing": d.tolist(), "seed": seed}
    return {
        "spacing": d.tolist(),
        "seed": seed,
        "roughness": rough,
        "roughness_correlation_um": full["roughness_correlation_vox"] * lat,
        **counts,
        "jitter_vox": s * full["jitter_vox"],
        "fit_artefacts": True,
    }


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
    "cortex": SynthKind(
        _cortex_kind,
        {"shape_um": (300.0, 300.0, 300.0), "n_arterioles": 2, "n_venules": 3, "seed": 0},
        "arteriolar and venular trees feeding a capillary mesh, with truth flows",
    ),
}

_RASTER_KEYS = (
    "spacing",
    "shape",
    "margin_um",
    "roughness",
    "roughness_correlation_um",
    "specks",
    "holes",
    "hole_radius_vox",
    "open_holes",
    "blobs",
    "handles",
    "gaps",
    "psf_sigma_um",
    "psf_threshold",
    "jitter_vox",
    "fit_artefacts",
    "seed",
)


def synthesize(kind: str, **params: Any) -> tuple[np.ndarray, dict[str, Any]]:
    """Build and rasterise a named synthetic volume.

    Parameters
    ----------
    kind : str
        A key of :data:`SYNTH_KINDS`.
    **params
        Builder keywords and :func:`rasterize` keywords (``spacing``, ``shape``,
        ``margin_um``, ``roughness``, ``specks``, ``holes``, ``seed`` and the
        artefact options ``roughness_correlation_um``, ``hole_radius_vox``,
        ``open_holes``, ``blobs``, ``handles``, ``gaps``, ``psf_sigma_um``,
        ``psf_threshold``, ``jitter_vox``, ``fit_artefacts``); they override the kind's
        defaults. ``seed`` goes to both.

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
