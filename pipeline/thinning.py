"""Topology-preserving 3-D curve thinning, parallel and list-driven.

In: a binary volume ``(Z, Y, X)``. Out: its curve skeleton, a subset of the
input, one voxel thin, with the topology of the input (26-connected
foreground, 6-connected background; voxels outside the array count as
background). It is a drop-in for ``skimage.morphology.skeletonize`` on 3-D
masks (Lee, Kashyap & Chu 1994) with the same contract, several times faster
on large volumes.

Algorithm
---------
Directional sequential thinning as in Lee et al. 1994: each iteration runs six
sub-iterations, one per direction d in (-z, +z, -y, +y, -x, +x). The
candidates of a sub-iteration are the object voxels whose 6-neighbour in
direction d is background, fixed at its start. A candidate is deleted when it
is *simple* and not an *end point* (exactly one 26-neighbour), judged on the
current volume. Thinning stops when an iteration deletes nothing; then no
voxel is left that is simple and not an end point. Only end points are
protected, so thick parts shrink to curves (a solid ball to a point or a
short segment), not to surfaces.

Simple points. ``p`` is simple for (26, 6) topology iff the topological
numbers ``T26(p, X) = 1`` and ``T6(p, complement) = 1`` (Bertrand & Malandain
1994, Pattern Recognit Lett 15:169, from memory): the object voxels of the
26-neighbourhood (``p`` excluded) form one 26-component, and the background
voxels of the 18-neighbourhood form exactly one 6-component that is
6-adjacent to ``p``. Both are computed with bit-parallel flood fills on the
27-bit neighbourhood pattern: one dilation of a 3x3x3 bit set is a handful of
shifts and masks, so a test costs 27 loads and a few dozen integer
operations, with no table.

Parallelism by subfields. The candidates of a sub-iteration are split into
eight subfields by the parities of their coordinates ``(z%2, y%2, x%2)``. Two
voxels of one subfield are never 26-adjacent, so deleting one does not change
the neighbourhood of another, and deleting all deletable voxels of a
subfield at once gives what deleting them one after another would (the idea
of subfield-based parallel thinning: Bertrand & Aktouf 1994, Proc SPIE 2356;
Palagyi's subfield-based 3-D thinning algorithms; from memory). Subfields are
processed in turn, each in parallel. The result is therefore deterministic
and the same for any number of threads.

Work lists. The volume is scanned once, to list the border voxels. From then
on only listed voxels are visited. A voxel tested and found not deletable is
marked *clean* and leaves the list; it can only become deletable when a
26-neighbour is deleted, and then it is listed again (as are interior voxels
that a deletion exposes). Each subfield pass appends the neighbours of its
deleted voxels that are not listed yet; a neighbour of several deleted voxels
is appended by exactly one of them (the first in a fixed neighbour order),
so the appending runs in parallel without locks or duplicates.

Memory. One uint8 working copy with a one-voxel background pad (flag bits per
voxel), the bool output, and int32 (int64 for more than 2**31 padded voxels)
index lists whose length is bounded by the number of object voxels.
"""

from __future__ import annotations

import numba
import numpy as np
from numba import prange

__all__ = ["thin"]

# Per-voxel flags of the working volume (uint8). Background is 0.
_FG = 1  # object voxel
_CLEAN = 2  # object voxel tested not deletable, neighbourhood unchanged since
_INQ0 = 4  # bits 2..7: listed for direction 0..5
_DEL = 2  # value of a voxel deleted in the current sub-iteration (object bit clear)

# 27-bit neighbourhood pattern: bit (dz+1)*9 + (dy+1)*3 + (dx+1); neighbour
# index j is the same number, and 26 - j is the opposite offset.
_FULL = (1 << 27) - 1
_CENTER = 1 << 13


def _bits(pred):
    out = 0
    for j, (dz, dy, dx) in enumerate(np.ndindex(3, 3, 3)):
        if pred(dz - 1, dy - 1, dx - 1):
            out |= 1 << j
    return out


_NOT_X0 = _FULL & ~_bits(lambda dz, dy, dx: dx == -1)
_NOT_X2 = _FULL & ~_bits(lambda dz, dy, dx: dx == 1)
_NOT_Y0 = _FULL & ~_bits(lambda dz, dy, dx: dy == -1)
_NOT_Y2 = _FULL & ~_bits(lambda dz, dy, dx: dy == 1)
_N18 = _bits(lambda dz, dy, dx: 0 < abs(dz) + abs(dy) + abs(dx) <= 2)
_FACE6 = _bits(lambda dz, dy, dx: abs(dz) + abs(dy) + abs(dx) == 1)

# Sub-iteration directions -z, +z, -y, +y, -x, +x as neighbour indices, and
# for each neighbour index j of a deleted voxel p the direction in which p
# lies as seen from that neighbour (-1 unless j is a face).
_DIR_J = np.array([4, 22, 10, 16, 12, 14], np.int64)
_FACE_DIR = np.full(27, -1, np.int64)
_FACE_DIR[_DIR_J] = [1, 0, 3, 2, 5, 4]


def _same_subfield_table():
    # For a voxel m and a neighbour of m at index jb: the indices k < jb of
    # m's other neighbours in the same subfield (same coordinate parities).
    off = np.array(list(np.ndindex(3, 3, 3))) - 1
    table = np.full((27, 8), -1, np.int64)
    for jb in range(27):
        ks = [k for k in range(jb) if k != 13 and ((off[k] - off[jb]) % 2 == 0).all()]
        table[jb, : len(ks)] = ks
    return table


_SAME = _same_subfield_table()

# Below this many items a step runs on the calling thread only.
_PAR_MIN = 4096

# Steps that run in parallel chunks (see _in_parallel).
_BORDER_COUNT, _BORDER_FILL, _SELECT_COUNT, _SELECT_FILL, _TEST, _RELIST_COUNT, _RELIST_WRITE, _CLEAR = range(8)


# ------------------------------------------------------------ simple points


@numba.njit(cache=True)
def _dilate6(c):
    return (
        c
        | ((c & _NOT_X2) << 1)
        | ((c & _NOT_X0) >> 1)
        | ((c & _NOT_Y2) << 3)
        | ((c & _NOT_Y0) >> 3)
        | ((c << 9) & _FULL)
        | (c >> 9)
    )


@numba.njit(cache=True)
def _dilate26(c):
    a = c | ((c & _NOT_X2) << 1) | ((c & _NOT_X0) >> 1)
    b = a | ((a & _NOT_Y2) << 3) | ((a & _NOT_Y0) >> 3)
    return b | ((b << 9) & _FULL) | (b >> 9)


@numba.njit(cache=True)
def _simple_pattern(nb):
    """Whether the centre of the 27-bit object pattern ``nb`` is a simple point."""
    x = nb & (_FULL ^ _CENTER)
    if x == 0:
        return False
    # T6(p, background) = 1: the background of N18 has exactly one
    # 6-component 6-adjacent to p, i.e. all background faces in one.
    bg = (~nb) & _N18
    faces = bg & _FACE6
    if faces == 0:
        return False
    comp = faces & (-faces)
    while True:
        grown = _dilate6(comp) & bg
        if grown == comp:
            break
        comp = grown
    if faces & ~comp:
        return False
    # T26(p, object) = 1: the object voxels of N26 form one 26-component.
    comp = x & (-x)
    while True:
        grown = _dilate26(comp) & x
        if grown == comp:
            break
        comp = grown
    return comp == x


# ------------------------------------------------------------- step bodies


@numba.njit(cache=True)
def _border_slab(flat, z, ny, nx, doff, cnt, lists, fill):
    # Count (fill False) or list (fill True, from the slots in cnt[z]) the
    # object voxels of slab z for each direction with a background neighbour.
    for y in range(1, ny - 1):
        base = (z * ny + y) * nx
        for x in range(1, nx - 1):
            p = base + x
            b = flat[p]
            if not b & _FG:
                continue
            if not fill:
                cnt[z, 6] += 1
            for d in range(6):
                if not flat[p + doff[d]] & _FG:
                    if fill:
                        lists[d, cnt[z, d]] = p
                        b |= _INQ0 << d
                    cnt[z, d] += 1
            if fill:
                flat[p] = b


@numba.njit(cache=True)
def _select_key(p, nz, ny, nx):
    # Subfield-major, then slab: candidates of a subfield in slab order.
    q = p // nx
    z = q // ny
    return ((z & 1) * 4 + ((q - z * ny) & 1) * 2 + ((p - q * nx) & 1)) * nz + z


@numba.njit(cache=True)
def _select_count(flat, lists, d, lo, hi, nz, ny, nx, keep, cnt, c):
    # Take entries lo:hi off list d; mark those that are neither deleted nor
    # clean as candidates and count them per (subfield, slab) key.
    bit = _INQ0 << d
    for i in range(lo, hi):
        p = lists[d, i]
        b = flat[p]
        if not b & _FG:
            keep[i] = 0
            continue
        flat[p] = b & ~bit
        if b & _CLEAN:
            keep[i] = 0
            continue
        keep[i] = 1
        cnt[c, _select_key(p, nz, ny, nx)] += 1


@numba.njit(cache=True)
def _select_fill(lists, d, lo, hi, nz, ny, nx, keep, cand, slot, c):
    for i in range(lo, hi):
        if keep[i]:
            p = lists[d, i]
            k = _select_key(p, nz, ny, nx)
            cand[slot[c, k]] = p
            slot[c, k] += 1


_BATCH = 16


@numba.njit(cache=True)
def _test_range(flat, cand, lo, hi, offs, res, visit):
    """Test candidates ``lo:hi`` of one subfield; mark deletable ones ``_DEL``, the rest clean.

    Voxels of one subfield are pairwise not 26-adjacent, so no test here
    reads a voxel that another one writes, and the neighbourhoods of a batch
    can be read first (many loads in flight), then judged.
    """
    nbs = np.empty(_BATCH, np.int64)  # object now
    wass = np.empty(_BATCH, np.int64)  # object at the start of the sub-iteration
    cleans = np.empty(_BATCH, np.int64)
    nd = 0
    for first in range(lo, hi, _BATCH):
        last = min(first + _BATCH, hi)
        for i in range(first, last):
            p = cand[i]
            nb = 0
            was = 0
            clean = 0
            for j in range(27):
                b = flat[p + offs[j]]
                if b:
                    was |= 1 << j
                    if b & _FG:
                        nb |= 1 << j
                        if b & _CLEAN:
                            clean |= 1 << j
            nbs[i - first] = nb
            wass[i - first] = was
            cleans[i - first] = clean
        for i in range(first, last):
            p = cand[i]
            nb = nbs[i - first]
            w = wass[i - first] ^ _CENTER
            # End points are judged at the start of the sub-iteration, as in Lee et al.
            if (w & (w - 1)) != 0 and _simple_pattern(nb):
                flat[p] = _DEL
                res[i] = 1
                # The relisting step looks at the clean neighbours and the
                # object face neighbours; the tests of this subfield change neither.
                visit[i] = cleans[i - first] | (nb & _FACE6)
                nd += 1
            else:
                flat[p] |= _CLEAN
                res[i] = 0
    return nd


@numba.njit(cache=True)
def _relist_range(flat, cand, lo, hi, res, visit, offs, doff, same, lists, slot, c, write):
    """Relist the neighbours of the deleted candidates ``lo:hi``; parallel-safe.

    A neighbour m is handled by one deleted voxel only, its owner: if m is
    clean, the first deleted voxel among m's neighbours of this subfield (all
    of which visit m); otherwise m was visited as a face neighbour, and the
    owner is the first of the two opposite face neighbours that were deleted.
    The owner lists m for each background direction that it is not listed
    for, and clears its clean flag. Counts into ``slot[c]`` (write False) or
    writes from the slots in ``slot[c]`` (write True); only the owner writes
    m, so both passes see the same decisions.
    """
    for i in range(lo, hi):
        if not res[i]:
            continue
        p = cand[i]
        v = visit[i]
        for j in range(27):
            if not (v >> j) & 1:
                continue
            m = p + offs[j]
            b = flat[m]
            jb = 26 - j
            if b & _CLEAN:
                own = True
                for t in range(8):
                    k = same[jb, t]
                    if k < 0:
                        break
                    if flat[m + offs[k]] == _DEL:
                        own = False
                        break
            else:
                own = not (j < jb and flat[m + offs[j]] == _DEL)
            if not own:
                continue
            add = 0
            for e in range(6):
                eb = _INQ0 << e
                if not (b & eb) and not (flat[m + doff[e]] & _FG):
                    add |= eb
                    if write:
                        lists[e, slot[c, e]] = m
                    slot[c, e] += 1
            if write and (add or (b & _CLEAN)):
                flat[m] = (b | add) & ~_CLEAN


@numba.njit(cache=True)
def _relist_serial(flat, cand, lo, hi, res, visit, offs, doff, face_dir, lists, lens):
    """One-thread relisting of the neighbours of the deleted candidates ``lo:hi``.

    A clean neighbour is listed for all its background directions (its
    neighbourhood changed), another one for the direction of the deleted face
    neighbour (a new background direction). Returns the index of the first
    voxel not done because a list could overflow (``hi`` when done).
    """
    cap = lists.shape[1]
    for i in range(lo, hi):
        if not res[i]:
            continue
        for e in range(6):
            if lens[e] > cap - 26:
                return i
        p = cand[i]
        v = visit[i]
        for j in range(27):
            if not (v >> j) & 1:
                continue
            m = p + offs[j]
            b = flat[m]
            if b & _CLEAN:
                b ^= _CLEAN
                for e in range(6):
                    eb = _INQ0 << e
                    if not (b & eb) and not (flat[m + doff[e]] & _FG):
                        lists[e, lens[e]] = m
                        lens[e] += 1
                        b |= eb
                flat[m] = b
            else:
                # Visited as clean but relisted by an earlier deleted voxel
                # already, or visited as a face neighbour.
                e = face_dir[j]
                if e < 0:
                    continue
                eb = _INQ0 << e
                if not b & eb:
                    lists[e, lens[e]] = m
                    lens[e] += 1
                    flat[m] = b | eb
    return hi


@numba.njit(cache=True)
def _clear_range(flat, cand, lo, hi, res):
    for i in range(lo, hi):
        if res[i]:
            flat[cand[i]] = 0


# ---------------------------------------------------------------- drivers


@numba.njit(cache=True, parallel=True)
def _in_parallel(task, nchunks, n, flat, nz, ny, nx, offs, doff, same, lists, d, lo, res, cand, visit, cnt, out):
    """Run one step over ``n`` items in ``nchunks`` parallel chunks.

    All steps share this one parallel loop, which keeps compile time down.
    Chunk c covers items ``lo + n*c//nchunks`` to ``lo + n*(c+1)//nchunks``;
    for the border steps a chunk is a slab.
    """
    for c in prange(nchunks):
        a = lo + (n * c) // nchunks
        e = lo + (n * (c + 1)) // nchunks
        if task == _BORDER_COUNT or task == _BORDER_FILL:
            _border_slab(flat, c + 1, ny, nx, doff, cnt, lists, task == _BORDER_FILL)
        elif task == _SELECT_COUNT:
            _select_count(flat, lists, d, a, e, nz, ny, nx, res, cnt, c)
        elif task == _SELECT_FILL:
            _select_fill(lists, d, a, e, nz, ny, nx, res, cand, cnt, c)
        elif task == _TEST:
            out[c] = _test_range(flat, cand, a, e, offs, res, visit)
        elif task == _RELIST_COUNT or task == _RELIST_WRITE:
            _relist_range(flat, cand, a, e, res, visit, offs, doff, same, lists, cnt, c, task == _RELIST_WRITE)
        else:
            _clear_range(flat, cand, a, e, res)


@numba.njit(cache=True)
def _grown(lists, lens, cand, res, visit, need, cap_max):
    cap = lists.shape[1]
    new_cap = max(need, min(2 * cap, cap_max))
    new_lists = np.empty((6, new_cap), lists.dtype)
    for d in range(6):
        for i in range(lens[d]):
            new_lists[d, i] = lists[d, i]
    new_cand = np.empty(new_cap, cand.dtype)
    new_res = np.empty(new_cap, np.uint8)
    new_visit = np.empty(new_cap, np.uint32)
    for i in range(cap):
        new_cand[i] = cand[i]
        new_res[i] = res[i]
        new_visit[i] = visit[i]
    return new_lists, new_cand, new_res, new_visit


@numba.njit(cache=True)
def _run(flat, nz, ny, nx, offs, doff, face_dir, same, idx_probe, nchunks, par_min):
    """Thin the padded volume ``flat`` in place; returns the number of iterations.

    ``nchunks`` parallel chunks for steps of at least ``par_min`` items.
    """
    dummy = np.zeros(1, np.int64)
    zero = np.int64(0)  # literal arguments would compile one specialisation per value

    # List the border voxels: count per slab, turn counts into slots, fill.
    cnt = np.zeros((nz, 7), np.int64)
    lists = np.empty((6, 0), idx_probe.dtype)
    res = np.empty(0, np.uint8)
    cand = np.empty(0, idx_probe.dtype)
    visit = np.empty(0, np.uint32)
    parallel = nchunks > 1 and flat.shape[0] >= par_min
    if parallel:
        _in_parallel(np.int64(_BORDER_COUNT), nz - 2, zero, flat, nz, ny, nx, offs, doff, same, lists, zero, zero, res, cand, visit, cnt, dummy)
    else:
        for z in range(1, nz - 1):
            _border_slab(flat, z, ny, nx, doff, cnt, lists, np.bool_(False))
    lens = np.zeros(6, np.int64)
    n_fg = 0
    for z in range(nz):
        n_fg += cnt[z, 6]
        for d in range(6):
            k = cnt[z, d]
            cnt[z, d] = lens[d]
            lens[d] += k
    if n_fg == 0:
        return 0
    longest = 0
    for d in range(6):
        longest = max(longest, lens[d])
    cap_max = n_fg + 32  # no list holds an object voxel twice
    cap = min(cap_max, max(1024, longest + longest // 4))
    lists = np.empty((6, cap), idx_probe.dtype)
    if parallel:
        _in_parallel(np.int64(_BORDER_FILL), nz - 2, zero, flat, nz, ny, nx, offs, doff, same, lists, zero, zero, res, cand, visit, cnt, dummy)
    else:
        for z in range(1, nz - 1):
            _border_slab(flat, z, ny, nx, doff, cnt, lists, np.bool_(True))

    cand = np.empty(cap, idx_probe.dtype)
    res = np.empty(cap, np.uint8)  # subfield tags, then deleted flags, per candidate
    visit = np.empty(cap, np.uint32)
    slot = np.zeros((nchunks, 8), np.int64)
    kslot = np.zeros((nchunks, 8 * nz), np.int64)
    nd_chunk = np.zeros(nchunks, np.int64)
    sub_start = np.zeros(9, np.int64)
    new_lens = np.zeros(6, np.int64)
    iterations = 0
    while True:
        iterations += 1
        deleted = 0
        for d in range(6):
            n = lens[d]
            if n == 0:
                continue
            # Candidates: the listed voxels that are neither deleted nor
            # clean, by subfield and within a subfield by slab (locality).
            kslot[:] = 0
            if n >= par_min and nchunks > 1:
                _in_parallel(np.int64(_SELECT_COUNT), nchunks, n, flat, nz, ny, nx, offs, doff, same, lists, d, zero, res, cand, visit, kslot, dummy)
            else:
                _select_count(flat, lists, d, zero, n, nz, ny, nx, res, kslot, zero)
            acc = 0
            for k in range(8 * nz):
                if k % nz == 0:
                    sub_start[k // nz] = acc
                for c in range(nchunks):
                    q = kslot[c, k]
                    kslot[c, k] = acc
                    acc += q
            sub_start[8] = acc
            if n >= par_min and nchunks > 1:
                _in_parallel(np.int64(_SELECT_FILL), nchunks, n, flat, nz, ny, nx, offs, doff, same, lists, d, zero, res, cand, visit, kslot, dummy)
            else:
                _select_fill(lists, d, zero, n, nz, ny, nx, res, cand, kslot, zero)
            lens[d] = 0

            for s in range(8):
                lo = sub_start[s]
                m = sub_start[s + 1] - lo
                if m == 0:
                    continue
                if m >= par_min and nchunks > 1:
                    _in_parallel(np.int64(_TEST), nchunks, m, flat, nz, ny, nx, offs, doff, same, lists, d, lo, res, cand, visit, slot, nd_chunk)
                    nd = nd_chunk.sum()
                else:
                    nd = _test_range(flat, cand, lo, lo + m, offs, res, visit)
                if nd == 0:
                    continue
                deleted += nd
                if m >= par_min and nchunks > 1:
                    slot[:] = 0
                    _in_parallel(np.int64(_RELIST_COUNT), nchunks, m, flat, nz, ny, nx, offs, doff, same, lists, d, lo, res, cand, visit, slot, dummy)
                    need = 0
                    for e in range(6):
                        acc = lens[e]
                        for c in range(nchunks):
                            k = slot[c, e]
                            slot[c, e] = acc
                            acc += k
                        new_lens[e] = acc
                        need = max(need, acc)
                    if need > lists.shape[1]:
                        lists, cand, res, visit = _grown(lists, lens, cand, res, visit, need, cap_max)
                    for e in range(6):
                        lens[e] = new_lens[e]
                    _in_parallel(np.int64(_RELIST_WRITE), nchunks, m, flat, nz, ny, nx, offs, doff, same, lists, d, lo, res, cand, visit, slot, dummy)
                else:
                    i = lo
                    while True:
                        i = _relist_serial(flat, cand, i, lo + m, res, visit, offs, doff, face_dir, lists, lens)
                        if i == lo + m:
                            break
                        lists, cand, res, visit = _grown(lists, lens, cand, res, visit, lists.shape[1] + 64, cap_max)
            # The sub-iteration is over: deleted voxels become background.
            n = sub_start[8]
            if n >= par_min and nchunks > 1:
                _in_parallel(np.int64(_CLEAR), nchunks, n, flat, nz, ny, nx, offs, doff, same, lists, d, zero, res, cand, visit, slot, dummy)
            else:
                _clear_range(flat, cand, zero, n, res)
        if deleted == 0:
            return iterations


# ------------------------------------------------------------------- API


def thin(mask, *, threads=None):
    """Curve skeleton of a 3-D binary mask by topology-preserving thinning.

    Parameters
    ----------
    mask : (Z, Y, X) array_like
        Object where nonzero. Voxels outside the array count as background.
    threads : int, optional
        Number of numba threads; default the current numba setting. The
        result does not depend on it.

    Returns
    -------
    skeleton : (Z, Y, X) bool ndarray
        Subset of ``mask``: every 26-connected component keeps its number of
        components, cavities and tunnels (hence its Euler number); no voxel
        is left that is simple and has more than one 26-neighbour; end points
        are kept.
    """
    mask = np.asarray(mask)
    if mask.ndim != 3:
        raise ValueError(f"thin expects a 3-D (Z, Y, X) array, got {mask.ndim}-D")
    if threads is not None:
        threads = int(threads)
        if not 1 <= threads <= numba.config.NUMBA_NUM_THREADS:
            raise ValueError(f"threads must be in [1, {numba.config.NUMBA_NUM_THREADS}], got {threads}")
    if mask.size == 0:
        return np.zeros(mask.shape, bool)
    previous = numba.get_num_threads()
    if threads is not None:
        numba.set_num_threads(threads)
    try:
        return _thin(mask, numba.get_num_threads())
    finally:
        numba.set_num_threads(previous)


def _thin(mask, threads):
    nz, ny, nx = (s + 2 for s in mask.shape)
    work = np.zeros((nz, ny, nx), np.uint8)
    inner = work[1:-1, 1:-1, 1:-1]
    np.not_equal(mask, 0, out=inner.view(bool))
    flat = work.reshape(-1)
    idx = np.int32 if flat.size < 2**31 else np.int64
    d = np.arange(-1, 2)
    offs = (d[:, None, None] * (ny * nx) + d[None, :, None] * nx + d[None, None, :]).reshape(-1).astype(np.int64)
    doff = offs[_DIR_J].copy()
    nchunks = 4 * threads if threads > 1 else 1
    _run(flat, nz, ny, nx, offs, doff, _FACE_DIR, _SAME, np.empty(0, idx), nchunks, _PAR_MIN)
    out = np.empty(mask.shape, bool)
    np.bitwise_and(inner, _FG, out=out.view(np.uint8))
    return out
