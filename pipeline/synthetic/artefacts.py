"""Artefacts of real segmentations added to a painted mask, each recorded with its topology change.

In: a boolean ``(Z, Y, X)`` mask, the network's centreline samples, counts and a random
generator. Out: the mask changed in place (specks, holes, blobs on walls, handles and
open holes through thick walls, gaps in thin vessels) and one record per artefact placed.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import ndimage
from scipy.spatial import cKDTree

from ._common import _any_perpendicular, _bad, _real
from .network import VesselNetwork
from .painting import _random_rotation


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
