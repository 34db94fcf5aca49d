"""Painting a network into voxels: smooth or rough capsule walls, an imaging point-spread, plane motion.

In: a :class:`~pipeline.synthetic.network.VesselNetwork`, the voxel spacing, the wall and
imaging options. Out: a boolean ``(Z, Y, X)`` mask of the union of capsules along the
centrelines (a voxel is vessel when its centre lies inside), rough walls reached from
the smooth ones through simple voxels only.
"""

from __future__ import annotations

import math
from typing import Any, Callable, Sequence

import numpy as np
from scipy import ndimage

from ..errors import InputError
from .network import VesselNetwork, _chord_selection

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
    mask: np.ndarray, net: VesselNetwork, d: np.ndarray, roughness: float, rng: np.random.Generator,
    *, origin: Sequence[int] = (0, 0, 0),
) -> None:
    """Set every voxel whose centre lies in the union of capsules (in place).

    Work is split into chord pieces; the candidate voxels of all pieces'
    bounding boxes are enumerated in flat batches, so numpy, not Python, loops
    over voxels. Per-piece constants are expanded with ``np.repeat`` (a
    sequential fill, much cheaper than fancy indexing) and index arithmetic
    stays in int32 (integer division dominates otherwise).

    ``mask`` may be a box of the grid whose first voxel is ``origin``: each
    voxel's value depends only on its position (and ``rng``'s state, which
    draws the roughness texture first), so boxes tile the whole volume's mask
    exactly (:class:`TubePieces` keeps the pieces and texture for many boxes).
    """
    TubePieces(net, d, roughness, rng).paint(mask, origin=origin)


class TubePieces:
    """The chord pieces and roughness texture of a network, drawn once, painted into any box."""

    def __init__(self, net: VesselNetwork, d: np.ndarray, roughness: float, rng: np.random.Generator):
        self.d, self.roughness = d, roughness
        f_hi = 1.0 + _FIELD_CLIP * roughness
        self.a, self.b, self.ra, self.rb, self.sid = _raster_pieces(net, _SAGITTA_FRACTION * float(d.min()), d, f_hi)
        reach = np.maximum(self.ra, self.rb)[:, None] * f_hi
        # Exact index range of voxel centres within reach (tolerance against rounding).
        self.lo = np.ceil((np.minimum(self.a, self.b) - reach) / d - 1e-6).astype(np.int64)
        self.hi = np.floor((np.maximum(self.a, self.b) + reach) / d + 1e-6).astype(np.int64)
        if roughness > 0:
            self.tex_flat = _noise_texture(rng).ravel()
            seg_off = rng.uniform(0, _TEX_N, size=(len(net.segments), 3))
            # Correlation (1/e) length of filtered white noise is 2 sigma texels;
            # map one nominal radius onto it.
            seg_scale = np.array([2.0 * _TEX_SIGMA / s["radius_um"] for s in net.segments])
            # Texture coordinate = w * scale + (piece start * scale + offset).
            self.tex_scale = seg_scale[self.sid].astype(np.float32)
            self.tex_const = (self.a * seg_scale[self.sid, None] + seg_off[self.sid]).astype(np.float32)

    def paint(self, mask: np.ndarray, *, origin: Sequence[int] = (0, 0, 0)) -> None:
        """Set the voxels of ``mask`` (a box of the grid starting at ``origin``) inside the tubes."""
        _paint_box(mask, self, np.asarray(origin, dtype=np.int64))


def _paint_box(mask: np.ndarray, tp: TubePieces, org: np.ndarray) -> None:
    d, roughness = tp.d, tp.roughness
    shape = np.asarray(mask.shape, dtype=np.int64)
    flat_mask = mask.reshape(-1)
    f_hi = 1.0 + _FIELD_CLIP * roughness
    f_lo = 1.0 - _FIELD_CLIP * roughness
    lo, hi = np.maximum(tp.lo, org), np.minimum(tp.hi, org + shape - 1)
    dims = hi - lo + 1
    live = np.flatnonzero(np.all(dims > 0, axis=1))
    a, b, ra, rb, lo, dims = tp.a[live], tp.b[live], tp.ra[live], tp.rb[live], lo[live], dims[live]
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
    rel = lo - org
    base_lin = (rel[:, 0] * shape[1] + rel[:, 1]) * shape[2] + rel[:, 2]
    if roughness > 0:
        tex_flat = tp.tex_flat
        tex_scale, tex_const = tp.tex_scale[live], tp.tex_const[live]
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
