"""Step 5, pruning: what the segmentation added to the vessels goes, the vessels stay.

In: a :class:`~pipeline.graph.VesselGraph` with wall-fit radii. Out: the same graph, edited in place:
terminal spurs, blobs and spikes of a rough wall, wall loops and handles, junction clusters of thick
vessels and crossings merged into one node, junctions moved to where their vessels' axes meet, small
fragments dropped, nodes of two segments dissolved; every rule relative to the local radius and the
voxel size, and counted in ``g.counts``.

The rules (repeated until nothing changes): terminal spurs, segments from a
junction to an end inside the tissue that are shorter than
``spur_radius_factor`` times the junction's radius or than
``min_spur_length_um``, are removed (ends cut by the volume border are real
vessels and are kept); nodes left with two segments dissolve and their
segments merge; connected pieces with less than ``min_fragment_length_um`` of
centreline in all are dropped. :func:`prune_graph` documents every rule with
its measurements.
"""

from __future__ import annotations

import heapq
from collections import defaultdict

import numba
import numpy as np
from scipy import sparse
from scipy.sparse import csgraph

from .graph import _drop_segment, _fresh_id, _move_nodes, _oriented, _other, _polyline_length, _reach, _seg_radius
from .gaps import reconnect_gaps

__all__ = ["prune_graph"]

def prune_graph(g, *, spur_radius_factor=1.5, min_spur_length_um=2.0, min_fragment_length_um=10.0, max_rounds=20,
                junction_merge_radii=1.0, wall_loop_radii=2.0, spur_protrusion_radii=3.0, wall_spike_radii=1.0,
                small_loop_radii=8.0, web_loop_radii=20.0, border_spur_radii=0.75, voxel_um=None, reconnect=False,
                spacing_um=None, volume_um=None, max_gap_voxels=3.0, max_gap_angle_deg=35.0):
    """Remove spurs, wall artefacts and small fragments; dissolve degree-2 nodes (in place).

    Parameters
    ----------
    g : VesselGraph
    spur_radius_factor : float
        A terminal spur shorter than this times its junction's radius goes.
    min_spur_length_um : float
        A terminal spur shorter than this goes regardless of radius.
    min_fragment_length_um : float
        Connected pieces with less centreline than this go.
    max_rounds : int
        Upper bound on spur/merge rounds.
    junction_merge_radii : float
        Two junctions joined by a segment shorter than this times the largest
        of their radii and the segment's own radius (or than two voxels) are
        one junction of a thick vessel or crossing seen through a bumpy wall:
        they merge, and the segment goes.
        0 turns merging off.
    wall_loop_radii : float
        A loop whose vessels are not each longer than this times the local
        radius is a handle or hole through a vessel wall, not an
        anastomosis: a self-loop shorter than this, or of two parallel
        segments between the same junctions the thinner when one of them is
        shorter than this, goes. 0 keeps every loop.
    spur_protrusion_radii : float
        A terminal spur that sticks out of its junction's vessel (its
        farthest point from the junction less the junction's radius) by less
        than this many of its own radii
        is a blob on the wall, not a branch, and goes. 0 turns this off.
    wall_spike_radii : float
        A terminal spur to a blind end that never gets farther out of its
        junction's vessel than this many of that vessel's radii (its
        farthest point from the junction less the vessel's radius) is a
        spike of the rough wall, however thin, and goes. A spur at least a
        third as thick as the vessel is taken by ``spur_protrusion_radii``
        first. 0 turns this off.
    small_loop_radii : float
        A loop whose whole perimeter is shorter than this times the largest
        radius on it encircles a hole in a vessel wall or runs through a
        handle: its thinnest segment goes (repeated while such loops
        remain). 0 keeps every loop.
    web_loop_radii : float
        The same for a loop closed by a web: a segment between two
        junctions, thinner than the vessels at both ends, whose length less
        those vessels' radii is under one and a half of its own radii (two
        vessels touching, typically daughters that part slowly past their
        branch point). A tube that long would be wider than it is long
        outside the walls it joins. Used when larger than
        ``small_loop_radii``; 0 turns it off.
    border_spur_radii : float
        A branch from a junction to the volume's face goes when its radius is
        less than this fraction of the junction's vessel's, it is shorter
        than the two radii together and that vessel is cut by a face there
        (the junction within its radius of a face, ``volume_um``, or a fan
        of four or more vessels): the face cutting a rough thick vessel, not
        a vessel leaving the volume. Branches to the face at least this
        fraction as thick as that vessel and within the same reach are the
        vessel's own cut face when two or more leave one junction: all but
        the longest go where they stay within the vessel's radius of the
        junction. 0 keeps every branch to the face.
    voxel_um : float, optional
        The coarsest spacing of the grid the centrelines were traced on, µm:
        twice it is the floor of what counts as short.
    reconnect : bool
        Bridge blind ends facing another vessel or end across a short gap
        (:func:`reconnect_gaps`), after the pruning rounds and before the
        fragment rule; the rounds then run again.
    spacing_um : float or sequence of 3 float, optional
        Voxel spacing of the mask, µm (the unit of ``max_gap_voxels``);
        default ``voxel_um``. Needed only with ``reconnect``.
    volume_um : sequence of 3 float, optional
        Position of the last voxel centre of the whole volume along each
        axis, µm (``(shape - 1) * spacing``; the first is at 0): the faces
        the border rule measures from. Without it, a branch to the face is
        judged as if its junction lay on that face.
    max_gap_voxels, max_gap_angle_deg : float
        Largest gap bridged (voxel layers along the bridge) and largest
        angle between an end's direction and its bridge; see
        :func:`reconnect_gaps`.

    Returns
    -------
    VesselGraph
        ``g`` itself, with ``counts`` updated: ``spurs_removed``,
        ``junctions_merged``, ``wall_loops_removed``, ``nodes_dissolved``,
        ``fragments_removed``, ``pruning_rounds``, ``gaps_reconnected``
        (0 unless ``reconnect``).
    """
    pr = _Pruner(g, spur_radius_factor=spur_radius_factor, min_spur_length_um=min_spur_length_um,
                 max_rounds=max_rounds, junction_merge_radii=junction_merge_radii, wall_loop_radii=wall_loop_radii,
                 spur_protrusion_radii=spur_protrusion_radii, wall_spike_radii=wall_spike_radii,
                 small_loop_radii=small_loop_radii, web_loop_radii=web_loop_radii,
                 border_spur_radii=border_spur_radii, voxel_um=voxel_um, volume_um=volume_um)
    pr.settle()
    reconnected = 0
    if reconnect:
        # After the rounds, so that only ends of vessels that pruning keeps
        # are bridged (not the tips of spurs and blobs), and before the
        # fragment rule, so that a piece cut off by a gap is joined back
        # rather than dropped. The rounds run again on what the bridges made:
        # two ends joined leave no node behind, a bridge to a centreline adds
        # a junction that the spur, merge and loop rules judge like any other.
        reconnected = reconnect_gaps(g, spacing_um=spacing_um if spacing_um is not None else voxel_um or 1.0,
                                     max_gap_voxels=max_gap_voxels,
                                     max_angle_deg=max_gap_angle_deg, small_loop_radii=small_loop_radii,
                                     step_um=voxel_um, inc=pr.inc)
        if reconnected:
            pr.next_id = _fresh_id(g)
            pr.settle()
    if junction_merge_radii > 0:
        # a crossing thinned into three or more junctions merges pair by pair
        for _ in range(max_rounds):
            n_merged = _merge_crossings(g, pr.inc, pr.seg_len, pr.remove_segment, junction_merge_radii)
            pr.merged += n_merged
            if not n_merged:
                break
    fragments = pr.remove_fragments(min_fragment_length_um)
    _refine_junctions(g, pr.inc, min_window_radius_um=_WINDOW_VOXELS * float(voxel_um) if voxel_um else 0.0)
    # Nodes with no segment left (isolated voxels) are not part of the graph.
    g.node_alive &= np.array([len(pr.inc[i]) > 0 for i in range(len(g.node_pos_um))], dtype=bool)
    g.counts.update(
        spurs_removed=pr.spurs, junctions_merged=pr.merged, wall_loops_removed=pr.loops,
        nodes_dissolved=pr.dissolved, fragments_removed=fragments, pruning_rounds=pr.rounds
    )
    g.counts["gaps_reconnected"] = reconnected
    return g


class _Pruner:
    """The pruning rounds of :func:`prune_graph` over one graph, with their counts.

    Holds the graph, its incidence lists and the options; the rules that
    need no state of their own are module functions called with
    :meth:`seg_len` and :meth:`remove_segment`.
    """

    def __init__(self, g, *, spur_radius_factor, min_spur_length_um, max_rounds, junction_merge_radii,
                 wall_loop_radii, spur_protrusion_radii, wall_spike_radii, small_loop_radii, web_loop_radii,
                 border_spur_radii, voxel_um, volume_um):
        self.g = g
        self.inc = g.incidence()
        self.bridged = g.seg_reconnected
        self.lengths = g.seg_length_um
        self.spurs = self.dissolved = self.rounds = self.merged = self.loops = 0
        self.floor = 2.0 * float(voxel_um) if voxel_um else 0.0
        self.next_id = max(g.seg_nodes, default=-1) + 1
        self.spur_radius_factor = spur_radius_factor
        self.min_spur_length_um = min_spur_length_um
        self.max_rounds = max_rounds
        self.junction_merge_radii = junction_merge_radii
        self.wall_loop_radii = wall_loop_radii
        self.spur_protrusion_radii = spur_protrusion_radii
        self.wall_spike_radii = wall_spike_radii
        self.small_loop_radii = small_loop_radii
        self.web_loop_radii = web_loop_radii
        self.border_spur_radii = border_spur_radii
        # the far faces of the volume; a planar volume has no z faces
        self.face_hi = None if volume_um is None else np.asarray(volume_um, dtype=float)
        self.face_axes = None if self.face_hi is None else self.face_hi > 0

    def seg_len(self, s):
        """Polyline length of segment ``s``, µm (cached)."""
        lengths = self.lengths
        if s not in lengths:
            lengths[s] = _polyline_length(self.g.seg_path[s])
        return lengths[s]

    def remove_segment(self, s):
        _drop_segment(self.g, self.inc, s)

    def face_distance(self, n):
        """Distance of node ``n`` from the nearest face of the volume, µm (0 without ``volume_um``)."""
        if self.face_hi is None or not self.face_axes.any():
            return 0.0
        p = self.g.node_pos_um[n][self.face_axes]
        return float(min(p.min(), (self.face_hi[self.face_axes] - p).min()))

    def along_face(self, s, end, rj):
        """Whether segment ``s`` stays within ``rj`` of the face its border end ``end`` lies on."""
        if self.face_hi is None or not self.face_axes.any():
            return False
        g = self.g
        axes = np.flatnonzero(self.face_axes)
        p = g.node_pos_um[end][axes]
        gap = np.r_[p, self.face_hi[axes] - p]
        k = int(np.argmin(gap))
        ax = axes[k % len(axes)]
        plane = 0.0 if k < len(axes) else self.face_hi[ax]
        return float(np.abs(g.seg_path[s][:, ax] - plane).max()) < rj

    def cut_at_face(self, junc, rj):
        """Whether junction ``junc``'s vessel (radius ``rj``) is cut by a face near it.

        It is when the junction lies within the vessel's radius of a face,
        or when it is a fan of four or more vessels: a rough thick vessel's
        cut end thins into several branches, whose junction at coarse z can
        lie a little deeper (on beds of 2-8 µm vessels at z 3 and full
        strength, keeping those fans made the centreline 5-14 % too long).
        """
        return self.face_distance(junc) < rj or len(self.inc[junc]) > 3

    def settle(self):
        """Prune rounds until the graph stops changing (or ``max_rounds`` of them)."""
        loops_done = False
        for _ in range(self.max_rounds):
            self.rounds += 1
            changed = self._remove_spurs()
            if self.junction_merge_radii > 0:
                n_merged = _merge_close_junctions(self.g, self.inc, self.seg_len, self.remove_segment,
                                                  self.junction_merge_radii, self.floor)
                self.merged += n_merged
                changed |= n_merged > 0
            if self.wall_loop_radii > 0:
                n_loops = _remove_wall_loops(self.g, self.inc, self.seg_len, self.remove_segment,
                                             self.wall_loop_radii, self.floor)
                self.loops += n_loops
                changed |= n_loops > 0
            cheap_changed = changed
            if not changed and self.small_loop_radii > 0 and not loops_done:
                # Last, on the graph the cheaper rules have settled: the search
                # for short loops is the costly one. What it removes may leave
                # nodes to dissolve (and two segments joined there may close a
                # new short loop), so the rounds go on until neither changes.
                loops_done = True
                n_loops = _remove_small_loops(self.g, self.inc, self.seg_len, self.remove_segment,
                                              self.small_loop_radii, web_factor=self.web_loop_radii)
                self.loops += n_loops
                changed |= n_loops > 0
            if self._dissolve_two_way_nodes():
                changed = cheap_changed = True
            if cheap_changed:
                loops_done = False  # the graph moved on since the last search for short loops
            if not changed:
                break

    def _doomed_spurs(self):
        """Terminal spurs the spur rules remove this round, as ``(segment, end node)`` pairs."""
        g, inc = self.g, self.inc
        doomed = []
        cut_ends = defaultdict(list)  # junction -> thick branches to a face cutting its vessel
        for s, (u, v) in g.seg_nodes.items():
            if u == v:
                continue
            du, dv = len(inc[u]), len(inc[v])
            if du == 1 and dv >= 3:
                end, junc = u, v
            elif dv == 1 and du >= 3:
                end, junc = v, u
            else:
                continue
            # The junction's vessel: the largest of the inscribed radius at
            # the node and the other vessels' radii there.
            rj = max([g.node_radius_um[junc]] + [_seg_radius(g, t) for t in inc[junc] if t != s])
            if g.node_on_border[end]:
                # A vessel cut by the volume's face may be short, so only one
                # kind of branch to the face goes: one clearly thinner than
                # the junction's vessel that ends before it is out of that
                # vessel's wall, which is how a rough thick vessel's cut face
                # thins (several such branches at coarse z steps). Nothing of
                # it could be measured as a vessel of its own. Its reach, not
                # its arc: such branches run along the face. Only where the
                # vessel itself is cut there (cut_at_face): a thin vessel
                # leaving a thick one further in and reaching the face
                # 10-15 µm on is a vessel (on 120 µm beds of 2-8 µm vessels,
                # up to 3 of about 50 junctions went, and 2 µm stacks lost
                # up to 7 % of their length to it against the same beds at
                # 1 µm).
                rs = _seg_radius(g, s)
                reach = _reach(g, s, junc)
                if self.border_spur_radii > 0 and reach < rj + rs:
                    if rs >= self.border_spur_radii * rj:
                        cut_ends[junc].append((s, end, reach < rj))
                    elif self.cut_at_face(junc, rj):
                        doomed.append((s, end))
                elif self.border_spur_radii > 0 and rs < self.border_spur_radii * rj and self.along_face(s, end, rj):
                    # A thin branch that never gets deeper than the vessel's
                    # radius below the face it ends on runs along the cut
                    # strip of a vessel that grazes that face: cut along its
                    # length, its surface thins into such branches however far
                    # they reach (cortex crops at 3 x 0.6 x 0.6 µm, every
                    # artefact: 31 of 67 false border ends went and 1 of 104
                    # true; on the beds of the accuracy grid none either way).
                    doomed.append((s, end))
                continue
            limit = max(self.spur_radius_factor * rj, self.min_spur_length_um)
            # What sticks out of the junction's vessel, against the spur's own
            # thickness: a blob on the wall protrudes by about its own width,
            # a branch by many of its radii. Measured by how far the spur
            # gets from the junction, not by its arc: a thinned blob's
            # centreline wanders inside the blob.
            protrusion = _reach(g, s, junc) - rj
            rs = _seg_radius(g, s)
            stub = self.spur_protrusion_radii > 0 and protrusion < self.spur_protrusion_radii * rs
            # A spur that stays within the wall's own relief: wall roughness
            # of a quarter of the radius, narrow bumps included, puts spikes
            # up to about 0.6 radii outside the mean wall (2.5 sd), which
            # thin into spurs of a voxel or two in radius, so many of their
            # own radii long that the rule above keeps them.
            # Measured against the truth on cortex crops at 3 x 0.6 x 0.6 µm
            # (every artefact, seeds 4 and 5): the 38 blind spurs thinner
            # than half their vessel and within one radius of its wall lay on
            # no vessel of the truth (true thin branches got 3 or more radii
            # out); removing them took junction precision from 0.83 to 0.85
            # and 0.78 to 0.82, recall unchanged. Limits of 1.5 radii cut
            # vessels broken by a gap (beds of 2-8 µm vessels lost up to
            # 1.3 % of their length); branches to a face are left to the
            # border rules: there thin vessels leaving a thick one are
            # cut by the face within its radius (same beds).
            spike = self.wall_spike_radii > 0 and protrusion < self.wall_spike_radii * rj
            if self.seg_len(s) < limit or stub or spike:
                doomed.append((s, end))
        # Two or more branches about as thick as the junction's vessel, each
        # reaching the face within the two radii together: the cut face of
        # one thick vessel thinned into a fork (z steps of 4 µm on trees of
        # 7 µm root radius: stubs of 2-11 µm from junctions 2.5-9 µm from the
        # face, deeper than the vessel's radius at coarse z). The longest
        # stays as the vessel's end; another goes when it never leaves the
        # vessel's radius of the junction, so that nothing of it could be
        # measured as a vessel. Daughters of a bifurcation cut by the face
        # just past it reach further (beds of 2-8 µm vessels at z 4:
        # 4.4-8.6 µm against radii of 4.1-4.6 µm; taking every one cost a
        # true junction and 1-2 % of the length).
        for items in cut_ends.values():
            if len(items) >= 2:
                items = sorted(items, key=lambda it: self.seg_len(it[0]))[:-1]
                doomed.extend((s, end) for s, end, inside in items if inside)
        return doomed

    def _remove_spurs(self):
        """Remove this round's terminal spurs; True when any went.

        Decided on the current graph, then removed together, so the result
        does not depend on iteration order within a round.
        """
        g = self.g
        changed = False
        # A junction keeps two segments: where only one would be left, the
        # spurs are the forked tip of that vessel, and the longest is its end.
        # Not at a junction on the border (its inscribed ball reaches a face):
        # there the spurs are a rough cut face that thinned short of the face
        # and curled back into the vessel, and the junction itself is where
        # the vessel leaves the volume (beds of 2-8 µm vessels at full
        # strength: the longest spur, kept, later went as a stub with the
        # whole vessel behind it, and two true junctions with it).
        by_junction = defaultdict(list)
        for s, end in self._doomed_spurs():
            u, v = g.seg_nodes[s]
            by_junction[v if end == u else u].append((s, end))
        for junc, items in by_junction.items():
            if len(items) >= len(self.inc[junc]) - 1 and not g.node_on_border[junc]:
                items = sorted(items, key=lambda it: self.seg_len(it[0]))[:-1]
            for s, end in items:
                self.remove_segment(s)
                g.node_alive[end] = False
                self.spurs += 1
                changed = True
        return changed

    def _dissolve_two_way_nodes(self):
        """Join the two segments at every node with exactly two segment ends (not a self-loop); True when any."""
        g, inc, lengths = self.g, self.inc, self.lengths
        changed = False
        for n in np.flatnonzero(g.node_alive):
            segs = inc[n]
            if len(segs) != 2 or segs[0] == segs[1]:
                continue
            a, b = segs
            pa, ra = _oriented(g, a, n, at_end=True)
            pb, rb = _oriented(g, b, n, at_end=False)
            ua = _other(g.seg_nodes[a], n)
            ub = _other(g.seg_nodes[b], n)
            merged_length = self.seg_len(a) + self.seg_len(b)  # the paths share node n's point
            self.remove_segment(a)
            self.remove_segment(b)
            s = self.next_id
            self.next_id += 1
            g.seg_nodes[s] = (ua, ub)
            g.seg_path[s] = np.vstack([pa, pb[1:]])
            g.seg_radii[s] = np.r_[ra, rb[1:]]
            lengths[s] = merged_length
            if a in self.bridged or b in self.bridged:
                self.bridged.add(s)
            inc[ua].append(s)
            inc[ub].append(s)
            g.node_alive[n] = False
            self.dissolved += 1
            changed = True
        return changed

    def remove_fragments(self, min_fragment_length_um):
        """Drop connected pieces with less centreline than ``min_fragment_length_um``; returns how many."""
        g = self.g
        alive = np.flatnonzero(g.node_alive)
        if not len(alive):
            return 0
        seg_ids = list(g.seg_nodes)
        n = len(g.node_pos_um)
        if seg_ids:
            uv = np.array([g.seg_nodes[s] for s in seg_ids])
            a = sparse.coo_matrix((np.ones(len(uv)), (uv[:, 0], uv[:, 1])), shape=(n, n))
        else:
            a = sparse.coo_matrix((n, n))
        _, comp = csgraph.connected_components(a, directed=False)
        comp_len = np.zeros(comp.max() + 1)
        for s in seg_ids:
            comp_len[comp[g.seg_nodes[s][0]]] += self.seg_len(s)
        small = comp_len < min_fragment_length_um
        for s in seg_ids:
            if small[comp[g.seg_nodes[s][0]]]:
                self.remove_segment(s)
        dead = small[comp] & g.node_alive
        g.node_alive &= ~dead
        return int(np.unique(comp[dead]).size)


# Smallest radius, in voxels of the thinning grid, by which a junction's line
# windows are measured (_refine_junctions).
_WINDOW_VOXELS = 3.0


def _refine_junctions(g, inc, *, near_radii=0.5, far_radii=3.0, far_straight_radii=4.0, straight_rms_radii=0.25,
                      min_spread=0.02, max_move_radii=3.0, min_window_radius_um=0.0):
    """Move each junction to where its vessels' axes meet.

    Thinning places a junction where the medial axes of the branches split,
    which lies downstream of the branch point: by a fraction of a radius
    where the daughters leave at wide angles, by two or three daughter radii
    where they leave side by side and part slowly (measured on trees of
    Murray's law with curved vessels, the offset runs along the parent's
    axis, rarely across it). Each incident segment's centreline between
    ``near_radii`` and ``far_radii`` of its own radii along its arc from the
    node is fitted with a line (its principal axis); the junction moves to
    the point nearest all the lines in the least-squares sense (weighted by
    each vessel's cross-section), when the lines are not nearly parallel
    (smallest eigenvalue of the normal matrix at least ``min_spread`` of the
    largest) and the point is within ``max_move_radii`` junction radii of
    the thinned one. Segment paths end at their nodes, so their end points
    move with it. The window is short because vessels curve: a line fitted
    further out points past the branch point. Where the vessel runs straight
    out to ``far_straight_radii`` (its points there within
    ``straight_rms_radii`` of its radius of their line, root mean square),
    that longer window is used: near a junction thinned past the branch
    point the centreline bends towards the node, and a line over the near
    part alone follows the bend. Measured on straight-vessel trees at
    strength 1 (bench_accuracy): junctions at z steps of 3 and 4 times xy
    went from F1 0.93 (one seed each, placed 3.7 and 5.9 µm from branch
    points of parent radius 3.5 µm) to 1.00 and 0.97, and on five further
    seeds at z 2-4 from four imperfect cases to two.

    The windows are measured in radii of at least ``min_window_radius_um``
    (three voxels of the thinning grid, from prune_graph): a capillary of
    1.5-2.5 µm at 1 µm voxels has only four to seven centreline points
    between half and three of its radii, on the voxel lattice, too few for
    a direction. Measured on thin capillary beds with every artefact at full
    strength (benchmarks/RESULTS.md): junction F1 at z 2 from 0.935-0.971 to
    0.972-0.992 (seeds 0, 1, 2 and 7), at z 3 from 0.965-0.990 to
    0.975-0.995, at 1 µm from 0.980-0.984 to 0.990-0.995. The lines are
    still weighted by each vessel's own cross-section.
    """
    nodes = [n for n in np.flatnonzero(g.node_alive) if len(inc[n]) >= 3 and len(set(inc[n])) == len(inc[n])]
    if not nodes:
        return
    # Flat arrays for the compiled fit: per junction its segments' paths,
    # each oriented to start at the junction.
    seg_off, paths, radii, node_seg = [0], [], [], [0]
    for n in nodes:
        for s in inc[n]:
            u, _ = g.seg_nodes[s]
            p = g.seg_path[s] if u == n else g.seg_path[s][::-1]
            paths.append(p)
            seg_off.append(seg_off[-1] + len(p))
            radii.append(_seg_radius(g, s))
        node_seg.append(len(radii))
    P = np.ascontiguousarray(np.vstack(paths), dtype=np.float64)
    radii = np.asarray(radii, np.float64)
    new = _meeting_points(P, np.asarray(seg_off, np.int64), radii, np.maximum(radii, float(min_window_radius_um)),
                          np.asarray(node_seg, np.int64), g.node_pos_um[nodes].astype(np.float64),
                          g.node_radius_um[nodes].astype(np.float64), near_radii, far_radii, far_straight_radii,
                          straight_rms_radii, min_spread, max_move_radii)
    ok = np.flatnonzero(np.isfinite(new).all(axis=1))
    _move_nodes(g, inc, [nodes[k] for k in ok], new[ok])


@numba.njit(cache=True)
def _axis_line(path, lo, hi):
    """Centroid, unit direction and mean squared distance from the line of the path points at arc ``lo..hi``."""
    # The points in the window are a run from the start: stop at the first
    # beyond ``hi`` (paths run hundreds of points, windows a few radii).
    arc = 0.0
    first = -1
    last = -1
    for i in range(len(path)):
        if i > 0:
            arc += np.sqrt(((path[i] - path[i - 1]) ** 2).sum())
        if arc > hi:
            break
        if arc >= lo:
            if first < 0:
                first = i
            last = i
    c = np.zeros(3)
    if first < 0 or last - first + 1 < 3:
        return c, c, -1.0
    m = last - first + 1
    for i in range(first, last + 1):
        c += path[i]
    c /= m
    C = np.zeros((3, 3))
    for i in range(first, last + 1):
        q = path[i] - c
        C += np.outer(q, q)
    vals, vecs = np.linalg.eigh(C)
    return c, vecs[:, 2].copy(), (vals[0] + vals[1]) / m


@numba.njit(cache=True, parallel=True)
def _meeting_points(P, seg_off, seg_r, win_r, node_seg, pos, rad, near, far, far_straight, straight_rms, min_spread,
                    max_move):
    out = np.full((len(pos), 3), np.nan)
    # Junctions are independent: each reads its own segments and writes its own row.
    for k in numba.prange(len(pos)):
        p0 = pos[k]
        A = np.zeros((3, 3))
        b = np.zeros(3)
        used = 0
        for j in range(node_seg[k], node_seg[k + 1]):
            path = P[seg_off[j]:seg_off[j + 1]]
            r = win_r[j]
            # The longer window where the vessel runs straight over it (points
            # within straight_rms radii of the line, root mean square): the
            # skeleton bends towards a junction thinned past the branch point,
            # which a line over the near part alone follows.
            c, t, ms = _axis_line(path, near * r, far_straight * r)
            if far_straight <= far or ms < 0.0 or ms > (straight_rms * r) ** 2:
                c, t, ms = _axis_line(path, near * r, far * r)
            if ms < 0.0:
                continue
            Pm = np.eye(3) - np.outer(t, t)
            w = seg_r[j] * seg_r[j]
            A += w * Pm
            b += w * (Pm @ c)
            used += 1
        if used < 3:
            continue
        ev = np.linalg.eigvalsh(A)
        if ev[0] <= min_spread * ev[2]:  # lines nearly parallel: the meeting point is ill-posed along them
            continue
        x = np.linalg.solve(A, b)
        if np.sqrt(((x - p0) ** 2).sum()) <= max_move * rad[k]:
            out[k] = x
    return out


def _remove_small_loops(g, inc, seg_len, remove_segment, factor, web_factor=0.0, web_free_radii=1.5):
    """Remove the thinnest segment of each loop shorter than ``factor`` times its largest radius; returns how many.

    The loop's largest radius is that of its segments, its nodes and every
    vessel at its nodes; the search for the loop's other side is bounded by
    the largest radius that can be on it near the candidate (its ends' nodes
    and segments), then the loop found is checked against its own largest
    radius.

    A web, a segment between two junctions that is thinner than the vessels
    at both of its ends and whose free length (its length less those
    vessels' radii) is under ``web_free_radii`` of its own radii, is judged
    against ``web_factor`` instead, when that is larger: it is where two
    vessels touch (two daughters that part slowly past a branch point,
    merged by the wall's roughness or by coarse z), not a vessel of its
    own, since a tube leaving one wall and entering the other would be
    longer than it is wide.
    """
    # The candidates and their order are fixed on the graph as it comes in;
    # the search itself runs compiled (_small_loops_nb) on flat arrays, with
    # each node's segments in the order of ``inc`` and removals marked in
    # place, so it makes the same choices as a search over the lists would.
    ids = list(g.seg_nodes)
    if not ids:
        return 0
    row = {t: k for k, t in enumerate(ids)}
    uv = np.array([g.seg_nodes[t] for t in ids], dtype=np.int64).reshape(-1, 2)
    seg_r = np.array([_seg_radius(g, t) for t in ids])
    slen = np.array([seg_len(t) for t in ids])
    node_r = np.asarray(g.node_radius_um, dtype=np.float64)
    n_nodes = len(node_r)
    counts = np.array([len(inc[n]) for n in range(n_nodes)], dtype=np.int64)
    inc_ptr = np.zeros(n_nodes + 1, dtype=np.int64)
    np.cumsum(counts, out=inc_ptr[1:])
    inc_seg = np.fromiter((row[t] for n in range(n_nodes) for t in inc[n]), dtype=np.int64, count=int(inc_ptr[-1]))
    args = (float(factor), float(web_factor), float(web_free_radii))
    keep = _small_loop_candidates_nb(uv, seg_r, slen, node_r, inc_ptr, inc_seg, *args)
    # Candidates, thinnest first (ties by segment id): a loop is broken at
    # its thinnest segment.
    cand = np.flatnonzero(keep)
    cand = cand[np.lexsort((np.asarray(ids, dtype=np.int64)[cand], seg_r[cand]))]
    removed = _small_loops_nb(uv, seg_r, slen, node_r, inc_ptr, inc_seg, cand, *args)
    for k in removed:
        remove_segment(ids[k])
    return len(removed)


@numba.njit(cache=True)
def _wide_at(n, skip, inc_ptr, inc_seg, alive, seg_r):
    """Largest radius of the live segments at node ``n`` other than segment ``skip`` (-1: none skipped)."""
    out = 0.0
    for i in range(inc_ptr[n], inc_ptr[n + 1]):
        t = inc_seg[i]
        if alive[t] and t != skip and seg_r[t] > out:
            out = seg_r[t]
    return out


@numba.njit(cache=True)
def _degree(n, inc_ptr, inc_seg, alive):
    d = 0
    for i in range(inc_ptr[n], inc_ptr[n + 1]):
        if alive[inc_seg[i]]:
            d += 1
    return d


@numba.njit(cache=True)
def _is_web(t, uv, seg_r, slen, inc_ptr, inc_seg, alive, factor, web_factor, web_free):
    u, v = uv[t, 0], uv[t, 1]
    if web_factor <= factor or u == v:
        return False
    if _degree(u, inc_ptr, inc_seg, alive) < 3 or _degree(v, inc_ptr, inc_seg, alive) < 3:
        return False
    ru = _wide_at(u, t, inc_ptr, inc_seg, alive, seg_r)
    rv = _wide_at(v, t, inc_ptr, inc_seg, alive, seg_r)
    rt = seg_r[t]
    return rt < min(ru, rv) and slen[t] < ru + rv + web_free * rt


@numba.njit(cache=True)
def _small_loop_candidates_nb(uv, seg_r, slen, node_r, inc_ptr, inc_seg, factor, web_factor, web_free):
    """Segments short enough to close a small loop, or webs (see :func:`_remove_small_loops`)."""
    S = len(seg_r)
    alive = np.ones(S, dtype=np.bool_)
    # The largest radius at each node, over the node and its segments, gives
    # every segment's bound at once.
    widest = node_r.copy()
    for t in range(S):
        for e in range(2):
            if seg_r[t] > widest[uv[t, e]]:
                widest[uv[t, e]] = seg_r[t]
    keep = np.zeros(S, dtype=np.bool_)
    for t in range(S):
        keep[t] = (slen[t] < factor * max(widest[uv[t, 0]], widest[uv[t, 1]])
                   or _is_web(t, uv, seg_r, slen, inc_ptr, inc_seg, alive, factor, web_factor, web_free))
    return keep


@numba.njit(cache=True)
def _small_loops_nb(uv, seg_r, slen, node_r, inc_ptr, inc_seg, cand, factor, web_factor, web_free):
    """The search of :func:`_remove_small_loops` over ``cand`` in order; returns the rows removed, in order."""
    S = len(seg_r)
    N = len(node_r)
    alive = np.ones(S, dtype=np.bool_)
    dist = np.full(N, np.inf)
    big = np.zeros(N)
    touched = np.empty(N, dtype=np.int64)
    removed = []
    for s in cand:
        if not alive[s]:
            continue
        u, v = uv[s, 0], uv[s, 1]
        limit = factor * max(node_r[u], node_r[v], _wide_at(u, -1, inc_ptr, inc_seg, alive, seg_r),
                             _wide_at(v, -1, inc_ptr, inc_seg, alive, seg_r))
        f = factor
        if _is_web(s, uv, seg_r, slen, inc_ptr, inc_seg, alive, factor, web_factor, web_free):
            f = web_factor
            limit *= web_factor / factor
        if slen[s] >= limit:
            continue
        if u == v:
            alive[s] = False  # a self-loop this short
            removed.append(s)
            continue
        # Shortest other path from u to v within the budget (Dijkstra, bounded).
        rs = seg_r[s]
        budget = limit - slen[s]
        n_touched = 0
        dist[u] = 0.0
        touched[n_touched] = u
        n_touched += 1
        # The loop's size is judged against the widest vessel at any of its
        # nodes, those running on beyond it included: a hole splitting a thick
        # vessel into two strands is measured against that vessel, not against
        # the strands (which the hole makes thinner).
        big[u] = max(rs, node_r[u], node_r[v], _wide_at(u, -1, inc_ptr, inc_seg, alive, seg_r),
                     _wide_at(v, -1, inc_ptr, inc_seg, alive, seg_r))
        heap = [(0.0, u)]
        found = False
        while len(heap) > 0:
            d, n = heapq.heappop(heap)
            if n == v:
                found = slen[s] + d < f * big[v]
                break
            if d > dist[n]:
                continue
            for i in range(inc_ptr[n], inc_ptr[n + 1]):
                t = inc_seg[i]
                if t == s or not alive[t]:
                    continue
                m = uv[t, 1] if uv[t, 0] == n else uv[t, 0]
                nd = d + slen[t]
                # Only loops whose other segments are at least as thick: the
                # thinnest segment is the one broken.
                if nd <= budget and seg_r[t] >= rs and nd < dist[m]:
                    if dist[m] == np.inf:
                        touched[n_touched] = m
                        n_touched += 1
                    dist[m] = nd
                    big[m] = max(big[n], seg_r[t], node_r[m], _wide_at(m, -1, inc_ptr, inc_seg, alive, seg_r))
                    heapq.heappush(heap, (nd, m))
        for i in range(n_touched):
            dist[touched[i]] = np.inf
        if found:
            alive[s] = False
            removed.append(s)
    return np.array(removed, dtype=np.int64)


def _merge_close_junctions(g, inc, seg_len, remove_segment, factor, floor):
    """Merge junction pairs joined by a segment short against their radii; returns how many."""
    cands = []
    node_r = g.node_radius_um.tolist()  # plain floats: this loop visits many segments
    if not g.seg_nodes:
        return 0
    # Segments between two junctions, found on arrays (this runs every
    # pruning round over every segment).
    deg = np.array([len(inc.get(n, ())) for n in range(len(node_r))], dtype=np.int64)
    ids = np.fromiter(g.seg_nodes.keys(), dtype=np.int64, count=len(g.seg_nodes))
    uv = np.array(list(g.seg_nodes.values()), dtype=np.int64).reshape(-1, 2)
    keep = (uv[:, 0] != uv[:, 1]) & (deg[uv[:, 0]] >= 3) & (deg[uv[:, 1]] >= 3)
    for s, u, v in np.column_stack([ids, uv])[keep].tolist():
        # Against the larger of the junctions' inscribed radii and the
        # joining segment's own (wall) radius: the distance map reads low at
        # a crossing on rough or jittered walls, and how low depends on the
        # grid (in-plane or 3-D distance), while a segment shorter than its
        # own radius between two junctions lies inside the crossing. Written
        # as two tests so the segment's radius is looked up only when the
        # junctions' radii do not decide (same result as one max of three).
        length = seg_len(s)
        if length < max(factor * max(node_r[u], node_r[v]), floor) or length < factor * _seg_radius(g, s):
            cands.append((length, s))
    return _merge_pairs(g, inc, remove_segment, cands)


def _merge_pairs(g, inc, remove_segment, cands):
    """Merge the junction pairs of ``cands`` ((length, segment) pairs), shortest first; returns how many."""
    touched = set()
    n = 0
    moves = []  # (node, position): moved together at the end, their paths' lengths in one compiled pass
    for _, s in sorted(cands):  # shortest first; each node merges once per round
        u, v = g.seg_nodes[s]
        if u in touched or v in touched:
            continue
        touched.update((u, v))
        remove_segment(s)
        # The merged node sits between the two, weighted by cross-section.
        wu, wv = g.node_radius_um[u] ** 2, g.node_radius_um[v] ** 2
        pos = (wu * g.node_pos_um[u] + wv * g.node_pos_um[v]) / max(wu + wv, 1e-12)
        g.node_radius_um[u] = max(g.node_radius_um[u], g.node_radius_um[v])
        g.node_on_border[u] |= g.node_on_border[v]
        for t in list(inc[v]):
            a, b = g.seg_nodes[t]
            g.seg_nodes[t] = (u if a == v else a, u if b == v else b)
            inc[u].append(t)
        inc[v] = []
        g.node_alive[v] = False
        moves.append((u, pos))
        n += 1
    # Each node merges once, and no merge reads a position or path, so moving
    # them all at once gives what moving each after its merge gave.
    if moves:
        _move_nodes(g, inc, [u for u, _ in moves], [pos for _, pos in moves])
    return n


def _merge_crossings(g, inc, seg_len, remove_segment, factor):
    """Merge junction pairs that are one crossing of several vessels; returns how many.

    Where four to six vessels meet at one point, the overlap of their walls
    is a blob wider than each of them, and the thinning splits it into two
    or more junctions joined by short segments inside it: on beds of 1.5-2.5
    µm capillaries at z steps of 2-3 µm they lay 2.5-6.5 µm apart, more than
    the first merge test allows. Such a segment never leaves the two
    junctions' inscribed balls: it is shorter than their radii added (each
    at least the segment's own wall radius), times ``factor``, and it is at
    least as wide as the thinnest other vessel at each end (it runs through
    the blob). A thinner one is a web or vessel of its own between two
    vessels; pairs joined by a second segment (a loop) are left to the loop
    rules. Run after the pruning rounds, on the junctions they kept. The
    price: two branch points closer together than that, such as side
    branches leaving a thick vessel within about its diameter of each
    other, become one junction (degree 4).
    """
    node_r = g.node_radius_um.tolist()
    cands = []
    for s, (u, v) in g.seg_nodes.items():
        if u == v or len(inc[u]) < 3 or len(inc[v]) < 3:
            continue
        r_s = _seg_radius(g, s)
        if seg_len(s) >= factor * (max(node_r[u], r_s) + max(node_r[v], r_s)):
            continue
        if len(set(inc[u]) & set(inc[v])) > 1:
            continue
        # thinner than a branch at either end: a web or vessel of its own
        if r_s < max(min(_seg_radius(g, t) for t in inc[u] if t != s),
                     min(_seg_radius(g, t) for t in inc[v] if t != s)):
            continue
        cands.append((seg_len(s), s))
    return _merge_pairs(g, inc, remove_segment, cands)


def _remove_wall_loops(g, inc, seg_len, remove_segment, factor, floor):
    """Remove self-loops and parallel segments short against the local radius; returns how many."""
    doomed = set()
    node_r = g.node_radius_um.tolist()
    if not g.seg_nodes:
        return 0
    # Self-loops and node pairs joined more than once, found on arrays (this
    # runs every pruning round over every segment).
    ids = np.fromiter(g.seg_nodes.keys(), dtype=np.int64, count=len(g.seg_nodes))
    uv = np.array(list(g.seg_nodes.values()), dtype=np.int64).reshape(-1, 2)
    lo, hi = uv.min(axis=1), uv.max(axis=1)
    for k in np.flatnonzero(lo == hi).tolist():
        s, u = int(ids[k]), int(lo[k])
        if seg_len(s) < max(factor * node_r[u], floor):
            doomed.add(s)
    pairs = defaultdict(list)
    two = np.flatnonzero(lo != hi)
    key = lo[two] * (int(hi.max()) + 1) + hi[two]
    order = np.argsort(key, kind="stable")
    ks = key[order]
    dup = np.zeros(len(ks), dtype=bool)
    dup[1:] = ks[1:] == ks[:-1]
    dup[:-1] |= dup[1:]
    for k in two[order[dup]].tolist():
        pairs[(int(lo[k]), int(hi[k]))].append(int(ids[k]))
    for (u, v), segs in pairs.items():
        local = max(factor * max(node_r[u], node_r[v]), floor)
        if min(seg_len(s) for s in segs) >= local:
            continue  # every vessel of the loop is long: a real loop
        # Keep the thickest of the parallel paths: the vessel; the others run
        # through the wall.
        thick = max(segs, key=lambda s: (float(np.median(g.seg_radii[s])), -seg_len(s)))
        doomed.update(s for s in segs if s != thick)
    for s in doomed:
        remove_segment(s)
    return len(doomed)
