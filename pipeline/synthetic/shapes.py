"""Builders of single vessels and small loops: straight, curved and helical tubes, a torus, a ladder.

In: lengths, radii and turns in µm. Out: a :class:`~pipeline.synthetic.network.VesselNetwork`
with exact centrelines (arc lengths and curvatures known in closed form).
"""

from __future__ import annotations

import math
from typing import Sequence

import numpy as np

from ._common import _bad, _choice, _count, _line_points, _make_segment, _n_steps, _node, _positive, _real, _unit, _vec3
from .network import VesselNetwork


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
