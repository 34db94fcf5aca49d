"""Topology-preserving 3-D curve thinning, list-driven and parallel.

In: a binary volume ``(Z, Y, X)``. Out: its curve skeleton, a subset of the
input, one voxel thin, with the topology of the input (26-connected object,
6-connected background; voxels outside the array count as background). It
has the contract of ``skimage.morphology.skeletonize`` on 3-D masks (Lee,
Kashyap & Chu 1994) and is several times faster on large volumes.

Rules
-----
Each iteration runs six sub-iterations, one per direction d in (-z, +z, -y,
+y, -x, +x), as in Lee et al. The candidates of sub-iteration d are the
object voxels whose 6-neighbour in direction d is background, fixed at its
start. They are taken in eight passes, one per subfield: the voxels whose
coordinates have given parities ``(z % 2, y % 2, x % 2)``. A candidate is
deleted when it is *simple* in the current volume and was no *end point*
(exactly one 26-neighbour) at the start of the sub-iteration. Thinning stops
when an iteration deletes nothing; then no voxel is left that is simple and
not an end point. Only end points are protected, so thick parts shrink to
curves (a ball to one or two voxels), not to surfaces. An end point stays
one: its only neighbour cannot be simple. Judging end points at the start of
the sub-iteration, as Lee et al. do, keeps a tip that only appears during a
sub-iteration from being frozen at once; a capsule then thins to its axis
segment rather than almost to its caps.

Simple points: ``p`` is simple for (26, 6) topology iff the topological
numbers ``T26(p, X) = 1`` and ``T6(p, complement) = 1`` (Bertrand &
Malandain 1994, Pattern Recognit Lett 15:169, from memory): the object voxels
of the 26-neighbourhood (``p`` excluded) form one 26-component, and exactly
one 6-component of the background of the 18-neighbourhood is 6-adjacent to
``p``. Both are bit-parallel flood fills on the 27-bit neighbourhood
pattern, where one dilation is a handful of shifts and masks; no table.

Subfields: two voxels of one subfield are never 26-adjacent, so deleting one
does not change the neighbourhood of another; all deletable voxels of a pass
can be judged and deleted at once, and in any order, with the result of
deleting them one by one (subfield-based parallel thinning: Bertrand &
Aktouf 1994, Proc SPIE 2356; Palagyi's subfield-based 3-D thinning
algorithms; from memory). The result is deterministic and does not depend
on the number of threads.

Work
----
Nothing scans the volume after the first listing of the border voxels.
There is one work list per direction, and a voxel is listed only for the
first direction, in the order of the coming sub-iterations, in which its
neighbour is background; its test there leaves it deleted or *clean*. A
clean voxel (tested, not deletable) is not tested again until one of its
26-neighbours is deleted, which lists it again, as a deletion lists the
object face neighbours for which it opens an earlier direction (interior
voxels becoming border voxels among them). A clean voxel listed again while
its sub-iteration runs waits for its next one; apart from that the work
lists only skip tests whose outcome is known. The tests check the result
against a plain whole-volume implementation of these rules.

Order: a pass at a voxel depends only on the previous pass at its
neighbours, so the eight passes run as a wavefront over the planes (pass s
on plane z with pass s - 1 on plane z + 1), and the few planes in work stay
in cache. On several threads the planes are split into regions: phase 1
runs each region's passes, shrinking by one plane per pass at inner region
ends, phase 2 the leftover wedges around the region boundaries; the tasks of
a phase touch disjoint planes, so they run in parallel, each relisting into
its own buffer.

Memory: one uint8 working copy with a one-voxel background pad (object bit
and flags), which also holds the returned skeleton; int32 voxel indices
(int64 beyond 2**28 padded voxels) in lists and buffers whose size follows
the number of border voxels.
"""

from __future__ import annotations

import math

import numba
import numpy as np
from numba import prange

from ._parallel import start_threads

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

# Index of a single set bit b < 2**32 from the top 5 bits of b * 0x077CB531
# (a de Bruijn sequence).
_LOG2_TABLE = np.zeros(32, np.int64)
_LOG2_TABLE[(((1 << np.arange(32)) * 0x077CB531) & 0xFFFFFFFF) >> 27] = np.arange(32)

# Sub-iteration directions -z, +z, -y, +y, -x, +x as neighbour indices, and
# for a face neighbour index j of p the direction in which p lies as seen
# from that neighbour (-1 for other j).
_DIR_J = np.array([4, 22, 10, 16, 12, 14], np.int64)
_FACE_DIR = np.full(27, -1, np.int64)
_FACE_DIR[_DIR_J] = [1, 0, 3, 2, 5, 4]


def _up_to_table():
    # [d, e]: the directions of the sub-iterations after d up to and with e, as a 6-bit mask.
    table = np.zeros((6, 6), np.int64)
    for d in range(6):
        for e in range(6):
            for t in range(1, (e - d - 1) % 6 + 2):
                table[d, e] |= 1 << ((d + t) % 6)
    return table


_UP_TO = _up_to_table()


# Below this many items a step runs on the calling thread only.
_PAR_MIN = 4096

# Initial room in the work lists and in the relisting buffers of parallel
# tasks (see _run).
_LIST_MIN = 1024
_ROOM_DIV = 4

# A parallel sub-iteration splits the planes into regions of at least this
# many planes: a boundary task spans 16 planes and reads and writes one more
# on each side, and two of them must not meet (see _regions).
_REGION_MIN = 18

# Steps that run in parallel chunks (see _in_parallel).
_BORDER_COUNT, _BORDER_FILL, _SELECT_COUNT, _SELECT_FILL, _TASKS, _MERGE_COUNT, _MERGE_FILL, _CLEAR = range(8)


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
    # object voxels of slab z, each for the first direction with a
    # background neighbour (see _relist).
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
                        flat[p] = b | (_INQ0 << d)
                    cnt[z, d] += 1
                    break


@numba.njit(cache=True)
def _divmod(p, div, inv):
    # p // div and p % div for 0 <= p < 2**52 by a float multiply, which is
    # much faster than an integer division; the estimate is off by at most one.
    q = np.int64(p * inv)
    r = p - q * div
    if r < 0:
        q -= 1
        r += div
    elif r >= div:
        q += 1
        r -= div
    return q, r


@numba.njit(cache=True)
def _select_count(flat, lists, d, lo, hi, nz, ny, nx, key, cnt, c):
    # Take entries lo:hi off list d. The candidates (neither deleted nor
    # clean) get a key, subfield-major then plane, counted per chunk c; the
    # others get -1.
    bit = _INQ0 << d
    nyx = ny * nx
    inv_nyx = 1.0 / nyx
    inv_nx = 1.0 / nx
    for i in range(lo, hi):
        p = lists[d, i]
        b = flat[p]
        if not b & _FG:
            key[i] = -1
            continue
        flat[p] = b & ~bit
        if b & _CLEAN:
            key[i] = -1
            continue
        z, r = _divmod(np.int64(p), nyx, inv_nyx)
        y, x = _divmod(r, nx, inv_nx)
        k = ((z & 1) * 4 + (y & 1) * 2 + (x & 1)) * nz + z
        key[i] = k
        cnt[c, k] += 1


@numba.njit(cache=True)
def _select_fill(lists, d, lo, hi, key, cand, slot, c):
    for i in range(lo, hi):
        k = key[i]
        if k >= 0:
            cand[slot[c, k]] = lists[d, i]
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
            for j in range(27):  # branch-free: the patterns are unpredictable
                b = np.int64(flat[p + offs[j]])
                was |= np.int64(b != 0) << j
                nb |= (b & _FG) << j
                clean |= (b & (b >> 1) & 1) << j
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
def _relist(flat, cand, lo, hi, res, visit, offs, doff, d_now, out, meta):
    """Relist the object neighbours of the deleted candidates ``lo:hi`` of sub-iteration ``d_now``.

    A voxel needs one list entry only: for the first direction, in the order
    of the coming sub-iterations, in which its neighbour is background; its
    test there leaves it deleted or clean. A deletion can make a neighbour
    dirty (a clean one: list it there) or give it a new such direction, the
    deleted voxel's (a face neighbour: list it there if that comes before
    every direction it is listed for). Entries go to ``out`` as
    ``8 * voxel + direction``; ``meta[0]`` holds their number. Returns the
    index of the first voxel not done because ``out`` could overflow
    (``hi`` when done).
    """
    room = out.shape[0] - 26
    k = meta[0]
    for i in range(lo, hi):
        if not res[i]:
            continue
        if k > room:
            meta[0] = k
            return i
        p = cand[i]
        v = np.int64(visit[i])
        while v:
            low = v & -v
            v ^= low
            j = _LOG2_TABLE[((low * 0x077CB531) & 0xFFFFFFFF) >> 27]  # index of the lowest set bit
            m = p + offs[j]
            b = np.int64(flat[m])
            e_p = _FACE_DIR[j]  # where p lies as seen from m, if a face neighbour
            if b & _CLEAN:
                e = e_p
                for t in range(1, 7):
                    e = d_now + t
                    if e >= 6:
                        e -= 6
                    if e == e_p or not flat[m + doff[e]] & _FG:
                        break
            elif e_p < 0 or (b >> 2) & _UP_TO[d_now, e_p]:
                # Relisted already (it was clean), or listed for p's
                # direction or an earlier one.
                continue
            else:
                e = e_p
            eb = _INQ0 << e
            nb = b & ~_CLEAN
            if not b & eb:
                out[k] = 8 * np.int64(m) + e
                k += 1
                nb |= eb
            if nb != b:
                flat[m] = nb
    meta[0] = k
    return hi


@numba.njit(cache=True)
def _clear_range(flat, cand, lo, hi, res):
    for i in range(lo, hi):
        if res[i]:
            flat[cand[i]] = 0


# ---------------------------------------------------------------- drivers


@numba.njit(cache=True)
def _task(flat, cand, kstart, nz, offs, doff, d_now, res, visit, out, meta, lo_z, hi_z, state):
    """Run subfield pass s on planes ``lo_z[s]:hi_z[s]`` for s = 0..7, in wavefront order.

    The result depends only on pass s at a voxel running after pass s - 1
    and before pass s + 1 at its 26-neighbours. So instead of one pass after
    the other over the whole volume, the passes run as a wavefront over the
    planes, pass s on plane z together with pass s - 1 on plane z + 1, and
    the few planes being worked on stay in cache. ``kstart[s * nz + z]`` is
    the first candidate of subfield s in plane z. Relisted voxels go to
    ``out``/``meta`` (see _relist).

    ``state`` is (step, s, i, deleted, done): where to resume and the
    running count of deletions. Stops early, returning False, when ``out``
    is full; the caller grows it and calls again.
    """
    base = lo_z[0]
    n_steps = 0
    for s in range(8):
        n_steps = max(n_steps, hi_z[s] - base + s)
    step = state[0]
    s0 = state[1]
    i0 = state[2]
    while step < n_steps:
        for s in range(s0, 8):
            z = base + step - s
            if z < lo_z[s] or z >= hi_z[s]:
                continue
            lo = kstart[s * nz + z]
            hi = kstart[s * nz + z + 1]
            if hi == lo:
                continue
            if i0 < 0:
                nd = _test_range(flat, cand, lo, hi, offs, res, visit)
                if nd == 0:
                    continue
                state[3] += nd
                i = lo
            else:  # resuming inside this unit's relisting
                i = i0
                i0 = -1
            i = _relist(flat, cand, i, hi, res, visit, offs, doff, d_now, out, meta)
            if i < hi:
                state[0] = step
                state[1] = s
                state[2] = i
                return False
        s0 = 0
        step += 1
    state[0] = n_steps
    state[1] = 0
    state[2] = -1
    return True


@numba.njit(cache=True, parallel=True)
def _in_parallel(step, nchunks, n, flat, nz, ny, nx, offs, doff, lists, d, lo, res, cand, visit, cnt, kstart, abuf, aoff, meta,
                 lo_z, hi_z, state):
    """Run one step in ``nchunks`` parallel chunks; all steps share this loop,
    which keeps compile time down.

    Border steps: chunk c is slab c + 1. Selection and clearing: chunk c
    covers items ``lo + n*c//nchunks`` to ``lo + n*(c+1)//nchunks``. Tasks:
    chunk c runs task ``lo + c`` with its own relisting buffer. Merging:
    chunk c moves task c's buffer.
    """
    for c in prange(nchunks):
        a = lo + (n * c) // nchunks
        e = lo + (n * (c + 1)) // nchunks
        if step == _BORDER_COUNT or step == _BORDER_FILL:
            _border_slab(flat, c + 1, ny, nx, doff, cnt, lists, step == _BORDER_FILL)
        elif step == _SELECT_COUNT:
            _select_count(flat, lists, d, a, e, nz, ny, nx, visit, cnt, c)
        elif step == _SELECT_FILL:
            _select_fill(lists, d, a, e, visit, cand, cnt, c)
        elif step == _MERGE_COUNT or step == _MERGE_FILL:
            _merge_task(abuf, aoff, meta, c, cnt, lists, nz, ny * nx, step == _MERGE_FILL)
        elif step == _TASKS:
            t = lo + c
            state[t, 4] = _task(flat, cand, kstart, nz, offs, doff, d, res, visit, abuf[aoff[t] : aoff[t + 1]], meta[t],
                                lo_z[t], hi_z[t], state[t])
        else:
            _clear_range(flat, cand, a, e, res)


@numba.njit(cache=True)
def _grown(lists, lens, need):
    # The lists with room for at least ``need`` entries each, keeping their content.
    cap = lists.shape[1]
    new = np.empty((lists.shape[0], max(need, 2 * cap)), lists.dtype)
    for r in range(lists.shape[0]):
        for i in range(lens[r]):
            new[r, i] = lists[r, i]
    return new


@numba.njit(cache=True)
def _grown_region(abuf, aoff, meta, t):
    # Double task t's region of the relisting buffer, keeping every task's entries.
    n = aoff.shape[0] - 1
    size = np.empty(n, np.int64)
    for u in range(n):
        size[u] = aoff[u + 1] - aoff[u]
    size[t] = 2 * size[t] + 64
    new_off = np.zeros(n + 1, np.int64)
    for u in range(n):
        new_off[u + 1] = new_off[u] + size[u]
    new = np.empty(new_off[n], abuf.dtype)
    for u in range(n):
        for k in range(meta[u, 0]):
            new[new_off[u] + k] = abuf[aoff[u] + k]
    return new, new_off


@numba.njit(cache=True)
def _merge_task(abuf, aoff, meta, t, slot, lists, nz, nyx, fill):
    # Count (fill False) or move (fill True, from the slots) the entries task
    # t relisted, per list and plane: slot[t, e * nz + z].
    inv = 1.0 / nyx
    for k in range(aoff[t], aoff[t] + meta[t, 0]):
        v = abuf[k]
        m = v >> 3
        e = v & 7
        z, _ = _divmod(m, nyx, inv)
        j = e * nz + z
        if fill:
            lists[e, slot[t, j]] = m
        slot[t, j] += 1


@numba.njit(cache=True)
def _regions(nz, n_regions):
    """Plane ranges per pass of the parallel tasks.

    Planes 1 .. nz - 2 are split into regions. Phase 1 runs one task per
    region, pass s on the region shrunk by s + 1 planes at each inner end;
    phase 2 runs one task per inner boundary x, pass s on planes x - s - 1 to
    x + s + 1. Together they cover every (pass, plane) once, and phase 2 only
    needs results of phase 1 and of itself. Tasks of one phase touch disjoint
    planes (each reads and writes one plane beyond its own), so they run in
    parallel. A last row holds all planes, for a sub-iteration on one thread.
    """
    n_tasks = 2 * n_regions - 1
    lo_z = np.zeros((n_tasks + 1, 8), np.int64)
    hi_z = np.zeros((n_tasks + 1, 8), np.int64)
    lo_z[n_tasks] = 1  # one task for all planes, when on one thread
    hi_z[n_tasks] = nz - 1
    inner = nz - 2
    for r in range(n_regions):
        a = 1 + (inner * r) // n_regions
        b = 1 + (inner * (r + 1)) // n_regions
        for s in range(8):
            lo_z[r, s] = a + (s + 1 if r > 0 else 0)
            hi_z[r, s] = b - (s + 1 if r < n_regions - 1 else 0)
            if r < n_regions - 1:
                lo_z[n_regions + r, s] = b - s - 1
                hi_z[n_regions + r, s] = b + s + 1
    return lo_z, hi_z


@numba.njit(cache=True)
def _border_lists(flat, nz, ny, nx, offs, doff, idx_probe, big, list_min, room_div, kstart, abuf, aoff, meta, lo_z,
                  hi_z, state):
    """The six direction lists of border voxels: count per slab, turn counts into slots, fill.

    Returns ``(lists, lens, cap)``: the lists (6, cap), their lengths (6,)
    and their capacity, ``list_min`` plus ``1 / room_div`` of the longest to
    spare; ``cap`` is 0 when the volume has no foreground.
    """
    zero = nz - nz  # a literal 0 argument would compile a specialisation of its own
    cnt = np.zeros((nz, 7), np.int64)
    lists = np.empty((6, 0), idx_probe.dtype)
    res = np.empty(0, np.uint8)
    cand = np.empty(0, idx_probe.dtype)
    visit = np.empty(0, np.int32)
    if big:
        _in_parallel(np.int64(_BORDER_COUNT), nz - 2, zero, flat, nz, ny, nx, offs, doff, lists, zero, zero,
                     res, cand, visit, cnt, kstart, abuf, aoff, meta, lo_z, hi_z, state)
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
        return lists, lens, 0
    longest = 0
    for d in range(6):
        longest = max(longest, lens[d])
    cap = longest + longest // room_div + list_min
    lists = np.empty((6, cap), idx_probe.dtype)
    if big:
        _in_parallel(np.int64(_BORDER_FILL), nz - 2, zero, flat, nz, ny, nx, offs, doff, lists, zero, zero,
                     res, cand, visit, cnt, kstart, abuf, aoff, meta, lo_z, hi_z, state)
    else:
        for z in range(1, nz - 1):
            _border_slab(flat, z, ny, nx, doff, cnt, lists, np.bool_(True))
    return lists, lens, cap


@numba.njit(cache=True)
def _append_relisted(tasks_par, n_tasks, flat, nz, ny, nx, offs, doff, lists, lens, new_lens, d, res, cand, visit,
                     zslot, kstart, abuf, aoff, meta, lo_z, hi_z, state):
    """Append every task's relisted entries to the lists, each batch in plane order; returns the lists (grown if full)."""
    zero = nz - nz
    zslot.fill(0)
    if tasks_par:
        _in_parallel(np.int64(_MERGE_COUNT), n_tasks, zero, flat, nz, ny, nx, offs, doff, lists, d, zero,
                     res, cand, visit, zslot, kstart, abuf, aoff, meta, lo_z, hi_z, state)
    else:
        _merge_task(abuf, aoff, meta, n_tasks, zslot, lists, nz, ny * nx, np.bool_(False))
    need = 0
    for e in range(6):
        pos = lens[e]
        for z in range(nz):
            for t in range(n_tasks + 1):
                k = zslot[t, e * nz + z]
                zslot[t, e * nz + z] = pos
                pos += k
        new_lens[e] = pos
        need = max(need, pos)
    if need > lists.shape[1]:
        lists = _grown(lists, lens, need)
    if tasks_par:
        _in_parallel(np.int64(_MERGE_FILL), n_tasks, zero, flat, nz, ny, nx, offs, doff, lists, d, zero,
                     res, cand, visit, zslot, kstart, abuf, aoff, meta, lo_z, hi_z, state)
    else:
        _merge_task(abuf, aoff, meta, n_tasks, zslot, lists, nz, ny * nx, np.bool_(True))
    for e in range(6):
        lens[e] = new_lens[e]
    return lists


@numba.njit(cache=True)
def _run(flat, nz, ny, nx, offs, doff, idx_probe, threads, par_min, list_min, room_div):
    """Thin the padded volume ``flat`` in place; returns the number of iterations.

    Steps of at least ``par_min`` items run on ``threads`` threads. The
    lists start with ``list_min`` entries plus ``1 / room_div`` of their
    first content to spare, a task's relisting buffer with ``list_min`` plus
    ``1 + 4 / room_div`` entries per candidate; both grow when full.
    """
    zero = nz - nz  # a literal 0 argument would compile a specialisation of its own
    nchunks = 4 * threads
    parallel = threads > 1
    n_regions = min(4 * threads, (nz - 2) // _REGION_MIN)
    parallel_tasks = parallel and n_regions >= 2
    n_regions = max(n_regions, 2)
    n_tasks = 2 * n_regions - 1  # and one more for all planes
    lo_z, hi_z = _regions(nz, n_regions)
    state = np.zeros((n_tasks + 1, 5), np.int64)
    meta = np.zeros((n_tasks + 1, 1), np.int64)  # per task: relisted entries
    aoff = np.zeros(n_tasks + 2, np.int64)
    abuf = np.empty(0, idx_probe.dtype)

    n_keys = 8 * nz
    kstart = np.zeros(n_keys + 1, np.int64)
    big = parallel and flat.shape[0] >= par_min
    lists, lens, cap = _border_lists(flat, nz, ny, nx, offs, doff, idx_probe, big, list_min, room_div, kstart, abuf,
                                     aoff, meta, lo_z, hi_z, state)
    if cap == 0:
        return 0

    cand = np.empty(cap, idx_probe.dtype)
    res = np.empty(cap, np.uint8)  # per candidate: deleted
    visit = np.empty(cap, np.int32)  # per list entry: selection key; then per candidate: neighbours to relist
    kslot = np.zeros((nchunks, n_keys), np.int64)
    zslot = np.zeros((n_tasks + 1, 6 * nz), np.int64)
    new_lens = np.zeros(6, np.int64)
    iterations = 0
    while True:
        iterations += 1
        deleted = 0
        for d in range(6):
            n = lens[d]
            if n == 0:
                continue
            if cand.shape[0] < n:
                cand = np.empty(lists.shape[1], idx_probe.dtype)
                res = np.empty(lists.shape[1], np.uint8)
                visit = np.empty(lists.shape[1], np.int32)

            # Candidates: the listed voxels that are neither deleted nor
            # clean, by subfield and within a subfield by plane.
            big = parallel and n >= par_min
            kslot.fill(0)
            if big:
                _in_parallel(np.int64(_SELECT_COUNT), nchunks, n, flat, nz, ny, nx, offs, doff, lists, d, zero,
                             res, cand, visit, kslot, kstart, abuf, aoff, meta, lo_z, hi_z, state)
            else:
                _select_count(flat, lists, d, zero, n, nz, ny, nx, visit, kslot, zero)
            acc = 0
            for k in range(n_keys):
                kstart[k] = acc
                for c in range(nchunks):
                    q = kslot[c, k]
                    kslot[c, k] = acc
                    acc += q
            kstart[n_keys] = acc
            n_cand = kstart[n_keys]
            if big:
                _in_parallel(np.int64(_SELECT_FILL), nchunks, n, flat, nz, ny, nx, offs, doff, lists, d, zero,
                             res, cand, visit, kslot, kstart, abuf, aoff, meta, lo_z, hi_z, state)
            else:
                _select_fill(lists, d, zero, n, visit, cand, kslot, zero)
            lens[d] = 0

            # Test and relist: on several threads phase 1 (regions), then
            # phase 2 (boundaries); else one task for all planes. Each task
            # relists into its own region of abuf, sized by its candidates; a
            # task whose region fills up stops, and is finished here after
            # the region has grown.
            tasks_par = big and parallel_tasks
            first_task = 0 if tasks_par else n_tasks
            last_task = n_tasks if tasks_par else n_tasks + 1
            for t in range(n_tasks + 1):
                size = 0
                if first_task <= t < last_task:
                    for s in range(8):
                        size += kstart[s * nz + hi_z[t, s]] - kstart[s * nz + lo_z[t, s]]
                    size += 4 * size // room_div + list_min  # observed: up to 1.7 entries per candidate
                aoff[t + 1] = aoff[t] + size
                meta[t, :] = 0
                state[t, :] = 0
                state[t, 2] = -1
            if abuf.shape[0] < aoff[n_tasks + 1]:
                abuf = np.empty(aoff[n_tasks + 1], idx_probe.dtype)
            for phase in range(2 if tasks_par else 1):
                if tasks_par:
                    a = 0 if phase == 0 else n_regions
                    b = n_regions if phase == 0 else n_tasks
                    _in_parallel(np.int64(_TASKS), b - a, zero, flat, nz, ny, nx, offs, doff, lists, d, a,
                                 res, cand, visit, kslot, kstart, abuf, aoff, meta, lo_z, hi_z, state)
                else:
                    a = n_tasks
                    b = n_tasks + 1
                    state[a, 4] = _task(flat, cand, kstart, nz, offs, doff, d, res, visit, abuf[aoff[a] : aoff[b]],
                                        meta[a], lo_z[a], hi_z[a], state[a])
                for t in range(a, b):
                    while state[t, 4] == 0:
                        abuf, aoff = _grown_region(abuf, aoff, meta, t)
                        state[t, 4] = _task(flat, cand, kstart, nz, offs, doff, d, res, visit, abuf[aoff[t] : aoff[t + 1]],
                                            meta[t], lo_z[t], hi_z[t], state[t])
            # Append the relisted entries to the lists, each batch in plane
            # order (which keeps the next selection's reads sequential).
            lists = _append_relisted(tasks_par, n_tasks, flat, nz, ny, nx, offs, doff, lists, lens, new_lens, d, res,
                                     cand, visit, zslot, kstart, abuf, aoff, meta, lo_z, hi_z, state)
            for t in range(n_tasks + 1):
                deleted += state[t, 3]

            # The sub-iteration is over: deleted voxels become background.
            if big:
                _in_parallel(np.int64(_CLEAR), nchunks, n_cand, flat, nz, ny, nx, offs, doff, lists, d, zero,
                             res, cand, visit, kslot, kstart, abuf, aoff, meta, lo_z, hi_z, state)
            else:
                _clear_range(flat, cand, zero, n_cand, res)
        if deleted == 0:
            return iterations


# ------------------------------------------------------------------- API


def thin(mask, *, threads=None, edge_pad=None):
    """Curve skeleton of a 3-D binary mask by topology-preserving thinning.

    Parameters
    ----------
    mask : (Z, Y, X) array_like
        Object where nonzero. Voxels outside the array count as background.
    threads : int, optional
        Number of numba threads; default the current numba setting. The
        result does not depend on it.
    edge_pad : sequence of 3 (before, after) int pairs, optional
        Thin the mask as if extended by that many copies of its edge planes
        on each side (``np.pad(mask, edge_pad, mode="edge")``), without
        making the padded copy: the edge is replicated while the working
        buffer is filled.

    Returns
    -------
    skeleton : (Z', Y', X') bool ndarray
        ``mask.shape`` plus the padding of ``edge_pad``, if any. Subset of the
        (padded) mask: every 26-connected component keeps its number of
        components, cavities and tunnels (hence its Euler number); no voxel
        is left that is simple and has more than one 26-neighbour; end points
        are kept. C-contiguous, in the working buffer of
        (Z'+2)(Y'+2)(X'+2) bytes.
    """
    mask = np.asarray(mask)
    if mask.ndim != 3:
        raise ValueError(f"thin expects a 3-D (Z, Y, X) array, got {mask.ndim}-D")
    pads = np.zeros((3, 2), np.int64)
    if edge_pad is not None:
        pads = np.asarray(edge_pad, dtype=np.int64)
        if pads.shape != (3, 2) or (pads < 0).any():
            raise ValueError(f"edge_pad must be three (before, after) pairs of non-negative ints, got {edge_pad!r}")
        if pads.any() and 0 in mask.shape:
            raise ValueError(f"edge_pad needs a non-empty mask to replicate, got shape {mask.shape}")
    if threads is not None:
        threads = int(threads)
        if not 1 <= threads <= numba.config.NUMBA_NUM_THREADS:
            raise ValueError(f"threads must be in [1, {numba.config.NUMBA_NUM_THREADS}], got {threads}")
    if mask.size == 0:
        return np.zeros(mask.shape, bool)
    start_threads()
    previous = numba.get_num_threads()
    if threads is not None:
        numba.set_num_threads(threads)
    try:
        return _thin(mask, numba.get_num_threads(), pads)
    finally:
        numba.set_num_threads(previous)


@numba.njit(cache=True, parallel=True)
def _load(src, dst, pads):
    """Copy a bool volume (as uint8) into the working volume, with a frame of one background voxel.

    Between the frame and the copy, ``pads[a]`` (before, after) planes along
    axis ``a`` repeat the volume's edge planes.
    """
    nz, ny, nx = src.shape
    dz, dy, dx = dst.shape
    x0 = 1 + pads[2, 0]
    for z in prange(dz):
        zs = min(max(z - 1 - pads[0, 0], 0), nz - 1)
        for y in range(dy):
            if z == 0 or z == dz - 1 or y == 0 or y == dy - 1:
                for x in range(dx):
                    dst[z, y, x] = 0
                continue
            ys = min(max(y - 1 - pads[1, 0], 0), ny - 1)
            dst[z, y, 0] = 0
            dst[z, y, dx - 1] = 0
            for x in range(1, x0):
                dst[z, y, x] = src[zs, ys, 0]
            for x in range(nx):
                dst[z, y, x0 + x] = src[zs, ys, x]
            for x in range(x0 + nx, dx - 1):
                dst[z, y, x] = src[zs, ys, nx - 1]


@numba.njit(cache=True)
def _compact(flat, nz, ny, nx):
    # Move the object bits of the inner voxels to the front of the buffer, in
    # (Z, Y, X) order. Each voxel moves to a lower address and all move in
    # increasing order, so nothing is overwritten before it is read.
    k = 0
    for z in range(1, nz - 1):
        for y in range(1, ny - 1):
            base = (z * ny + y) * nx
            for x in range(1, nx - 1):
                flat[k] = flat[base + x] & _FG
                k += 1


def _thin(mask, threads, pads):
    shape = tuple(int(s + pads[a].sum()) for a, s in enumerate(mask.shape))
    nz, ny, nx = (s + 2 for s in shape)
    work = np.empty((nz, ny, nx), np.uint8)
    if mask.dtype == bool and mask.flags.c_contiguous:
        _load(mask.view(np.uint8), work, pads)
    else:
        _load(np.ascontiguousarray(mask != 0).view(np.uint8), work, pads)
    flat = work.reshape(-1)
    idx = np.int32 if 8 * flat.size < 2**31 else np.int64  # relisted entries pack 8 * index + direction
    d = np.arange(-1, 2)
    offs = (d[:, None, None] * (ny * nx) + d[None, :, None] * nx + d[None, None, :]).reshape(-1).astype(np.int64)
    doff = offs[_DIR_J].copy()
    _run(flat, nz, ny, nx, offs, doff, np.empty(0, idx), threads, _PAR_MIN, _LIST_MIN, _ROOM_DIV)
    # The skeleton is returned in the working buffer, which saves a volume.
    _compact(flat, nz, ny, nx)
    return flat[: math.prod(shape)].view(bool).reshape(shape)
