"""Step 10, Murray's-law checks at every junction.

In: the ``segments`` table (``segment_id``, ``node_from``, ``node_to``,
``length_um``, ``radius_um``; optionally ``radius_sd_um``,
``radius_n_points``, ``n_points`` (centreline points), ``level``
(nullable ``Int64``), ``flow_nl_min`` (signed, positive from ``node_from``
to ``node_to``), ``wss_pa``), the ``nodes`` table (``node_id``; optionally
``z``, ``y``, ``x``, ``z_um``, ``y_um``, ``x_um``), the centreline of every
segment (a list of ``(K, 3)`` arrays in µm in the row order of
``segments``, running from ``node_from`` to ``node_to``) and the config
section ``bifurcations``, and the coarsest voxel spacing of the mask.
Out: the per-junction table written to ``bifurcations.csv`` (one row per node
where three or more segments meet, :data:`COLUMNS`), a summary dict for
``summary.json`` and, from :func:`levels_murray`, per-level statistics to
merge into ``levels.csv``.

Flow pattern and parent. With solved flow every arm (segment end at the
junction) is an inflow, an outflow or carries no flow, by the sign of its
flow relative to the junction (``flow_nl_min`` is signed along the
segment). An arm carries no flow when ``|flow|`` is at most 1e-9 of the
largest ``|flow|`` at the junction or 1e-10 of the largest in the network:
dead-end parts are solved to exactly 0, but a dangling loop is 0 only to
rounding, and the solvers leave errors of that order (on the demo capillary
bed the CG solution, ``flow.cg_rtol`` 1e-10, differs from the direct one by
1.3e-11 of the largest flow, while the smallest flows there are 5e-9 of it,
real and resolved). Column ``flow_pattern``:

``diverging``   one inflow, every other arm (two or more) an outflow; the
                parent is the inflow arm (the feeding vessel).
``converging``  one outflow, every other arm (two or more) an inflow; the
                parent is the outflow arm (the trunk the tributaries drain
                into). Murray's argument (flow proportional to r^3 at equal
                wall shear stress, mass conserved) does not depend on the flow
                direction, so the trunk obeys the same cube law as a feeding
                parent.
``mixed``       flow through the junction, but neither of the above: two or
                more inflows and two or more outflows (a crossing, or two
                bifurcations closer than the skeleton resolves), or arms
                without flow beside flowing ones (a sealed blind branch). The
                parent is the arm with the largest inflow (the first in arm
                order among equals); the parent-daughter law does not describe
                the junction, so it is not judged (``uncertain``, reason
                ``mixed_flow``).
``unsolved``    no flow column, or no arm carries flow (an unperfused part).

Without flow the parent is the segment nearest the root by branching level
(smallest ``level``; ties to the widest), and without levels the widest
segment (ties to the smallest ``segment_id``). Column ``parent_by`` says which
rule chose (``flow``, ``level`` or ``radius``). The other segments are the
daughters (the tributaries of a converging junction), ordered by decreasing
radius: daughter 1 is the larger. Self-loops (both ends at the junction) are
not daughters; they are noted. Junctions with more than two daughters
(multifurcations) are reported with the sums taken over all daughters
(``murray_ratio`` = sum r_i^3 / r0^3, ``area_ratio`` = sum r_i^2 / r0^2, the
exponent x solving r0^x = sum r_i^x, flow split of daughter 1 over all
daughters); their per-daughter columns describe the two largest, and the
optimal angles, which Murray derived for two daughters, are NaN.

Murray's law. The cube law r0^3 = r1^3 + r2^3 (Murray CD 1926, PNAS
12:207) gives ``murray_ratio`` 1 and exponent 3. Measured junction exponents
run from about 2.3 in large arteries to about 3 in small ones (Nakamura &
Awa 2014, Physiol Rep 2:e00236). The exponent is undefined (NaN) when a
daughter is not smaller than the parent: then r0^x < r1^x + r2^x for every
x > 0. Minimum-work branching angles of each daughter from the parent axis
(Murray CD 1926, J Gen Physiol 9:835): cos theta1 = (r0^4 + r1^4 - r2^4) /
(2 r0^2 r1^2), and the same with 1 and 2 swapped; symmetric cube-law
junctions give 37.47 deg per daughter, 74.9 deg between them.

Angles. Each segment's direction at the junction is the principal axis (total
least squares line) of its centreline between ``tangent_skip_radii`` and
``tangent_fit_radii`` junction radii of arc length from the node (the
junction radius is the largest radius among the segments that meet there:
the merged junction zone and the skeleton's bend scale with it), at most half
the segment's length, pointing away from the node. The centreline is
resampled evenly in arc length over that window so the fit weighs arc, not
point density. The first part is skipped because thinning pulls the centreline
towards the junction's centroid there. ``angle_daughter{1,2}_deg`` are the
angles between each daughter's direction and the parent's flow direction
(the reversed parent direction); ``angle_between_daughters_deg`` the angle
between the two daughters; ``out_of_plane_deg`` the largest angle between one
of the three directions (parent, daughter 1, daughter 2) and the plane of
the other two (0 for a planar junction; for one daughter tilted by e out of
the plane of the parent and the other daughter it is e, since the tilted
daughter's angle is the largest of the three when the daughters leave the
parent at less than 90 deg). ``angle_deviation_deg`` is the larger absolute
difference between a daughter's angle and its optimum. A segment too short
to leave the junction zone out (half its length below
``tangent_skip_radii`` junction radii) is fitted from the node on (note
``tangent_from_node``).

Flow. With ``flow_nl_min`` at a diverging or converging junction:
``flow_split_daughter1`` = |Q1| / (|Q1| + |Q2| + ...) over the daughters, which
by mass conservation is the share of the parent's flow that daughter 1 takes
(diverging) or that tributary 1 brings into the trunk (converging); NaN at
mixed and unsolved junctions. Its cube-law prediction ``flow_split_cube_law``
= r1^3 / (r1^3 + r2^3 + ...) holds for both directions (Poiseuille flow at
equal wall shear stress, Murray 1926 PNAS). With ``wss_pa``:
``wss_ratio_daughter{1,2}`` = daughter over parent wall shear stress (1 under
the cube law).

Confidence notes (``confidence_notes``, semicolon-separated ``code:segment_id``):
``few_points`` (radius measured over fewer than ``min_radius_points``
centreline points) and ``short`` (segment shorter than ``min_length_radii``
radii, so that its middle part, outside the junction zones, is nearly empty)
make the row ``low_confidence``. Informational notes that do not:
``self_loop`` (a self-loop at the junction, not counted as a daughter) and
``tangent_from_node`` (segment too short to skip the junction zone).

Radius uncertainty (:func:`radius_uncertainty`). A segment's radius is a
robust mean of the wall-fit radii along its middle part. Neighbouring points
share wall points: the wall fit (``pipeline/radii.py``) uses a slab of
half-width h = max(0.75 r, 0.6 v) (v the coarsest voxel spacing) and fits
once per 1.5 h of arc, so the middle part holds about n_eff = n s / (1.5 h)
independent fits (n = ``radius_n_points``, s the centreline step,
``length_um / (n_points - 1)``, else ``voxel_um``; between 1 and n; without
either, n). The standard uncertainty of the radius is
u_r = sqrt(sd^2 / n_eff + (f v)^2), with sd = ``radius_sd_um`` (the spread of
the fitted radii; 0 where missing) and a floor f v (``radius_floor_voxels``
times ``voxel_um``; none without ``voxel_um``) for the error of the wall fit
that does not average out along a vessel (the quantisation of a wall running
along a lattice row). An error shared by all radii of a junction (a
segmentation threshold that widens every vessel by the same factor) leaves
the ratio, exponent and optimal angles unchanged and is not counted.

Propagation (first order, radii independent; Taylor expansion as in the
Guide to the Expression of Uncertainty in Measurement, JCGM 100:2008,
section 5.1.2), with u_0, u_i the parent's and daughters' uncertainties:

``murray_ratio_u``        u_R^2 = sum_i (3 r_i^2 u_i / r0^3)^2 + (3 R u_0 / r0)^2
``murray_exponent_u``     implicit function theorem on F = sum_i w_i - 1,
                          w_i = (r_i / r0)^x: with S = sum_i w_i ln(r_i / r0)
                          (< 0), u_x^2 = (x / S)^2 (sum_i (w_i u_i / r_i)^2 +
                          (u_0 / r0)^2); NaN where x is
``angle_deviation_u_deg`` for the daughter k whose deviation is the larger:
                          u^2 = u_opt,k^2 + ``angle_sd_deg``^2 + b_0^2 +
                          b_k^2, where u_opt,k propagates the radii through
                          Murray's cosine rule (d theta = -d cos theta /
                          sin theta; 0 where the cosine is clipped),
                          ``angle_sd_deg`` is the standard uncertainty of a
                          measured branching angle on straight vessels, and
                          b_0, b_k the bend of the parent's and daughter's
                          fitting windows: a curved vessel's fitted line
                          differs from its tangent at the junction by about
                          3.9 times the ratio of the window's perpendicular
                          to axial rms spread (for a parabolic arc), in
                          degrees

Against Monte Carlo draws of the radii (r0 6, r1 4.8, r2 4.4 µm), the
first-order sd of the ratio is within 0.5 % at 1 % radius uncertainty and
3 % at 4 %; the exponent's within 1.4 % at 1 %, 5 % at 2 %, but 50 % too small
at 4 % (the root of sum (r_i / r0)^x = 1 bends sharply), so at uncertain
radii the exponent's significance is overstated and the ratio, well
conditioned, decides whether a junction is judged at all.

Flags. A Murray-law or angle code is raised only when the value is outside
its band AND differs from the law by more than ``significance_z`` standard
uncertainties: |R - 1| > z u_R for the ratio, |x - 3| > z u_x for the
exponent, dev > z u_dev for the angle (the optimum itself is 0 deviation),
and a daughter wider than its parent by more than z sqrt(u_d^2 + u_0^2) for
``exponent_undefined`` (a daughter as wide as its parent is within the cube
law when the other daughter is thin: 0.99 r0 and 0.3 r0 give R = 0.997).
``severity`` is the largest of these deviations in standard uncertainties
over the quantities outside their band (0 when none is; infinite when an
uncertainty is 0), and orders the review queue (the flagged junctions the
viewer lists, most severe first).

Uncertain junctions (``uncertain`` true, ``uncertain_reasons``
semicolon-separated) are not judged: they carry no flag reason, are not
``flagged`` and not in the review queue, and the summary counts them apart.

``low_confidence``    the row is ``low_confidence`` (``low_confidence_uncertain``):
                      a short segment's radius takes in the inflated
                      junction zones, a bias its spread does not show, and
                      the spread of a few points (one or two wall fits)
                      says little about the error of their mean
``ratio_unresolved``  z u_R is at least the distance from the cube law (1)
                      to the band's edge on the side of the measured ratio,
                      so a junction at the edge could not be told from the
                      cube law, and the ratio is not flagged either
``mixed_flow``        ``flow_pattern`` is ``mixed``
``capillary``         the parent is narrower than
                      ``murray_min_parent_diameter_um``: Murray's law is a
                      design rule of branching trees, and junctions of a
                      capillary mesh, whose vessels are of near-uniform
                      width, do not follow it (three equal vessels give a
                      ratio of 2)

Flag reason codes (``flag_reasons``, semicolon-separated, in this order;
each rule set in the ``bifurcations`` config section, null thresholds switch
a bound off):

``ratio_high``         ``murray_ratio`` > ``ratio_max``, significant
``ratio_low``          ``murray_ratio`` < ``ratio_min``, significant
``exponent_high``      ``murray_exponent`` > ``exponent_max``, significant
``exponent_low``       ``murray_exponent`` < ``exponent_min``, significant
``exponent_undefined`` a daughter significantly wider than the parent
                       (``flag_undefined_exponent``)
``angle``              ``angle_deviation_deg`` > ``angle_deviation_max_deg``,
                       significant
``multi``              more than two daughters (``flag_multi``)

The first five are the Murray-law codes: ``fraction_within_tolerance`` in the
summary is the share of the judged (not uncertain) junctions that carry none
of them.

Summary statistics of the law. ``murray_exponent_median`` counts undefined
junction exponents as +inf (a daughter as wide as the parent is the limit of
exponents growing without bound); dropping them would lower the median, a
selection on the outcome. Their number is ``murray_exponents_undefined``.
One exponent per sample, fitted to all usable bifurcations with a bootstrap
interval, and the Murray ratio's quartiles come from
:func:`pipeline.murray.network_summary` (see ``pipeline/murray.py`` for which
junctions it uses and why).

Layout (each module's docstring says what comes in and what goes out):
``_common`` (columns, codes, checks) -> ``laws`` (Murray's law at one
junction, with uncertainties) and ``angles`` (arm directions) ->
``summary`` (a sample's and each level's Murray statistics) -> ``table``
(:func:`analyze_bifurcations`: arms, flow pattern, parent, checks, flags).
"""

from ..measures import radius_uncertainty  # public here too: the radius uncertainty the flags use
from ._common import COLUMNS, FLOW_PATTERNS, MURRAY_CODES, REASON_CODES, UNCERTAIN_CODES
from .laws import murray_exponent, murray_exponent_multi, murray_optimal_angles
from .summary import levels_murray, summarize_bifurcations
from .table import analyze_bifurcations

__all__ = [
    "COLUMNS",
    "REASON_CODES",
    "MURRAY_CODES",
    "UNCERTAIN_CODES",
    "FLOW_PATTERNS",
    "analyze_bifurcations",
    "murray_exponent",
    "murray_exponent_multi",
    "murray_optimal_angles",
    "radius_uncertainty",
    "levels_murray",
    "summarize_bifurcations",
]
