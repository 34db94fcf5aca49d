"""Branching builders: a Y branch and a 3-D dichotomous tree following r0^x = r1^x + r2^x.

In: root radius and length, Murray exponent, depth, asymmetry, seeds. Out: a
:class:`~pipeline.synthetic.network.VesselNetwork` whose bifurcations carry their radii and
angles (Murray 1926) in the truth.
"""

from __future__ import annotations

import math
from typing import Any, Sequence

import numpy as np
from scipy.spatial import cKDTree

from ._common import (
    _any_perpendicular, _bad, _count, _line_points, _make_segment, _node, _positive, _real, _rng, _rotate, _unit,
    _wiggled_points,
)
from .network import VesselNetwork


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


# Turns of the branching plane (degrees, from the level's nominal one) tried
# in order before an end is left blind.
_PLANE_TURNS_DEG = (0.0, 30.0, -30.0, 60.0, -60.0, 90.0, 15.0, -15.0, 45.0, -45.0, 75.0, -75.0)


def _perp_draw(rng: np.random.Generator, d: np.ndarray) -> tuple[np.ndarray, int]:
    """A random unit vector perpendicular to ``d`` and a wiggle mode (1 or 2)."""
    e = _unit(_rotate(_any_perpendicular(d), d, rng.uniform(0, 2 * math.pi)))
    return e, int(rng.integers(1, 3))


def _tree_points(a: np.ndarray, b: np.ndarray, e_perp: np.ndarray, m: int, wig: float) -> np.ndarray:
    """Centreline from ``a`` to ``b``: straight, or wiggled along ``e_perp`` with mode ``m``."""
    if wig == 0:
        return _line_points(a, b)
    return _wiggled_points(a, b, wig * float(np.linalg.norm(b - a)), e_perp, m)


def _add_tree_segment(
    nodes: list[dict],
    segs: list[dict],
    index: _Clearance,
    start: dict,
    end_pos: np.ndarray,
    radius: float,
    level: int,
    parent: int | None,
    pts: np.ndarray,
    *,
    wig: float,
) -> tuple[dict, dict]:
    """Append a blind end node and the segment from ``start`` to it; index its points.

    Returns
    -------
    (dict, dict)
        The segment and its end node.
    """
    end = _node(len(nodes), end_pos, "blind")
    nodes.append(end)
    length = float(np.linalg.norm(end_pos - np.asarray(start["pos_um"]))) if wig == 0 else None
    seg = _make_segment(len(segs), start, end, pts, radius, length_um=length, level=level)
    if parent is not None:
        seg["parent_segment"] = int(parent)
    segs.append(seg)
    index.add(seg["points_um"][::2], radius, seg["id"])
    return seg, end


def _next_broken(acc: float, frac: float) -> tuple[float, bool]:
    """One step of the error diffusion that spreads broken bifurcations evenly.

    Returns
    -------
    (float, bool)
        The accumulator after this bifurcation and whether it is broken.
    """
    if frac > 0:
        acc += frac
        if acc >= 1.0:
            return acc - 1.0, True
    return acc, False


def _daughter_angles(
    rng: np.random.Generator,
    r0: float,
    r1: float,
    r2: float,
    *,
    angles: tuple[float, float] | None,
    angle_deg: Any,
    ratio: float,
    jitter: float,
) -> tuple[float, float, bool]:
    """Angles of two daughters from the parent axis, and whether they separate at the nominal ones.

    Parameters
    ----------
    angles : (float, float) or None
        Checked ``angle_deg``; None takes Murray's minimum-work angles.
    angle_deg
        As given, for the error message.
    ratio, jitter : float
        Length over radius of the daughters; standard deviation of the
        angles' jitter, degrees.

    Returns
    -------
    (float, float, bool)
        ``theta1``, ``theta2`` in degrees and whether the pair separates.
    """
    th_nominal = angles if angles is not None else murray_angles_deg(r0, r1, r2)
    apart = _siblings_apart(r1, r2, *th_nominal, ratio * r1, ratio * r2)
    if angles is not None and not apart:
        raise _bad("angle_deg", "daughter angles wide enough for the daughters to separate", angle_deg)
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
    return th1, th2, apart


def _place_daughters(
    index: _Clearance,
    parent_id: int,
    start: np.ndarray,
    d: np.ndarray,
    n_ref: np.ndarray,
    *,
    phi_base: float,
    angles: tuple[float, float],
    radii: tuple[float, float],
    draws: list[tuple[np.ndarray, int]],
    origin: np.ndarray,
    axis0: np.ndarray,
    ratio: float,
    wig: float,
    gap: float,
) -> tuple[float, np.ndarray, list[tuple]] | None:
    """The first turn of the branching plane at which both daughters fit, or None.

    Parameters
    ----------
    parent_id : int
        Segment the daughters leave (their clearance ignores it).
    start, d, n_ref : ndarray, shape (3,)
        Fork position, parent direction and the level's reference plane normal.
    phi_base : float
        Nominal plane rotation, degrees; :data:`_PLANE_TURNS_DEG` are tried about it.
    angles, radii : (float, float)
        Daughters' angles from ``d`` (degrees) and radii.
    draws : list of (ndarray, int)
        Each daughter's wiggle direction and mode (:func:`_perp_draw`).
    origin, axis0 : ndarray, shape (3,)
        Root position and direction: no daughter comes back near the root face.

    Returns
    -------
    (float, ndarray, list) or None
        Plane rotation, plane normal and ``(direction, radius, end, points)``
        of each daughter.
    """
    th1, th2 = angles
    for step in _PLANE_TURNS_DEG:
        phi = phi_base + step
        normal = _unit(_rotate(n_ref, d, math.radians(phi)))
        d1, d2 = _daughter_directions(d, normal, th1, th2)
        cand = []
        ok = True
        for dk, rk, (ek, mk) in zip((d1, d2), radii, draws):
            ek = _unit(ek - np.dot(ek, dk) * dk)
            b = start + ratio * rk * dk
            pts = _tree_points(start, b, ek, mk, wig)
            sample = pts[::2]
            # Stay on the tree side of the root face so no branch is cut by it.
            if np.any((sample - origin) @ axis0 < index.factor * rk + gap):
                ok = False
                break
            if not index.clear(sample, rk, {parent_id}):
                ok = False
                break
            cand.append((dk, rk, b, pts))
        if ok:
            return phi, normal, cand
    return None


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

    root_node = _node(0, origin, "border")
    nodes.append(root_node)
    e, m = _perp_draw(rng, axis0)
    l_root = ratio * r_root
    root_seg, root_end = _add_tree_segment(
        nodes, segs, index, root_node, l_root * axis0, r_root, 0, None,
        _tree_points(origin, l_root * axis0, e, m, wig), wig=wig,
    )
    # frontier: (segment, end node, chord direction, reference plane normal, radius, level)
    frontier = [(root_seg, root_end, axis0, np.array([0.0, 1.0, 0.0]), r_root, 0)]
    acc = rng.random()  # error-diffusion phase for spreading broken bifurcations
    n_terminated = 0
    while frontier:
        nxt = []
        for seg, end, d, n_ref, r0, level in frontier:
            if level >= n_levels:
                continue
            r1, r2 = murray_daughter_radii(r0, exponent=x, asymmetry=q)
            if min(r1, r2) < r_min:
                continue
            acc_before = acc
            acc, broken = _next_broken(acc, frac)
            if broken:
                r1 = r2 = b_ratio * r0
            th1, th2, apart = _daughter_angles(
                rng, r0, r1, r2, angles=angles, angle_deg=angle_deg, ratio=ratio, jitter=jitter
            )
            phi_base = phi0 + (rng.normal(0, jitter) if jitter > 0 else 0.0)
            draws = [_perp_draw(rng, d), _perp_draw(rng, d)]
            placed = None
            if apart:
                placed = _place_daughters(
                    index, seg["id"], np.asarray(end["pos_um"]), d, n_ref, phi_base=phi_base, angles=(th1, th2),
                    radii=(r1, r2), draws=draws, origin=origin, axis0=axis0, ratio=ratio, wig=wig, gap=gap,
                )
            if placed is None:
                n_terminated += 1
                acc = acc_before  # no bifurcation here, so it takes no share of broken ones
                continue
            phi, normal, cand = placed
            end["kind"] = "junction"
            kids = []
            for dk, rk, b, pts in cand:
                kseg, kend = _add_tree_segment(nodes, segs, index, end, b, rk, level + 1, seg["id"], pts, wig=wig)
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
