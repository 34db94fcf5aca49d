"""Scoring a measured vessel graph against a synthetic ground truth.

In: a result (a result folder, or a :class:`~pipeline.result.Result` from
:func:`pipeline.analyze` or :func:`pipeline.tables.load_result`: ``segments``, ``nodes`` and
``centrelines`` in µm) and a ground truth (the ``NAME.truth.json`` that
:func:`pipeline.synthetic.write_volume` writes beside a synthetic volume, or
the dict :func:`pipeline.synthetic.rasterize` returns).
Out: a dict of accuracy measures (:func:`score`) and a readable table of
them (:func:`format_score`).

Both sides are in the same frame: voxel (i, j, k) has its centre at
(i·dz, j·dy, k·dx) µm, in the truth as in the result.

Measures
--------
Junctions
    True junctions are truth nodes of degree 3 or more (degree counted from
    the truth segments, a self-loop twice); measured junctions are result
    nodes of kind ``'junction'`` and degree 3 or more. A true junction may be
    matched to a measured one no farther than its *match radius*: the parent
    radius there, taken as the largest ``radius_um`` of the truth segments
    meeting at it, and at least ``match_floor_um`` (default one voxel
    diagonal, so that junctions of capillaries a voxel or two wide can still
    match). The pairs are one-to-one and optimal: the most pairs, and among
    those the smallest total distance (:func:`match_junctions`,
    ``scipy.optimize.linear_sum_assignment``). Precision = matched / found,
    recall = matched / true, F1 = 2·matched / (true + found).
Radius
    For each truth segment at least ``min_length_radii`` times its radius
    long, its centreline is sampled every ``sample_step_um``; samples closer
    to a junction end than ``junction_exclusion_radii`` times that
    junction's match radius are left out (the measured radius leaves the
    junction region out too). Each remaining (interior) sample is matched to
    the nearest measured centreline sample within the local truth radius
    (at least ``match_floor_um``). When at least ``min_matched_fraction`` of
    the interior samples match, the segment is scored: its measured radius
    is the mean, over the matched samples, of the ``radius_um`` (the robust
    per-segment radius) of the measured segment each sample matched, and its
    relative error is ``measured / truth - 1`` with the truth segment's
    nominal ``radius_um``. Reported: the median and the 90th percentile
    (linear interpolation) of the absolute relative errors, and the median of
    the signed ones (bias).
Length
    ``(sum of measured length_um - sum of truth length_um) / truth``, signed.
    Truth segments are already clipped to the volume. Length recall is the
    fraction of the truth centreline length lying within the local truth
    radius (at least ``match_floor_um``) of a measured centreline; length
    precision the fraction of the measured centreline length within that
    distance of the truth centreline (spurious branches lower it, which
    junction F1 alone does not show).
Topology
    Cycle rank ``E - V + C`` (segments, nodes, connected components) and the
    number of components, with the same formula on both sides.

Relative measures are fractions (0.05 is 5 %). A measure that is undefined
(no true and no measured junctions, no scored segment, no truth length) is
``None``.
"""

from __future__ import annotations

from .truth import TRUTH_FORMAT, check_truth, load_truth
from .blocks import cycle_rank, match_junctions
from .score import SCORE_FORMAT, format_score, score
from .files import check_score_file, write_score

__all__ = ["score", "load_truth", "check_truth", "match_junctions", "cycle_rank", "format_score",
           "check_score_file", "write_score", "TRUTH_FORMAT", "SCORE_FORMAT"]
