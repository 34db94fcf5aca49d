"""Step 9, steady network flow, wall shear stress and transit times.

In: the ``segments`` table (``segment_id``, ``node_from``, ``node_to``,
``length_um``, ``radius_um``, optionally ``radius_hydraulic_um``) and the
``nodes`` table (``node_id``, ``kind``) of a vessel multigraph, the inlet
node ids, optionally the outlet node ids, and the config section ``flow``.
Out: :class:`FlowResult`, per-segment flow quantities keyed by
``segment_id``, per-node pressure and role, a summary dict and warning
strings.

Model. Every segment is a rigid straight tube in steady laminar
(Hagen–Poiseuille) flow, resistance ``R = 8 mu L / (pi r^4)`` with the
hydraulic radius (``radius_hydraulic_um``, the r with ``L / r^4 =
integral dl / r^4``; ``radius_um`` where it is absent or NaN). Kirchhoff's
current law at every node without a pressure condition gives ``L_UU p_U =
-L_UD p_D`` with the weighted graph Laplacian ``L`` (conductances
``1 / R``; parallel segments add), symmetric positive definite once the
Dirichlet nodes are eliminated, because only the parts of connected
components that hold both an inlet and an outlet are assembled. The system is assembled
vectorised (``scipy.sparse.coo_matrix``) in SI units and solved for the
dimensionless potential ``phi`` (1 at inlets, 0 at outlets); pressures are
``p_out + dP * phi`` and flows ``dP * G * (phi_from - phi_to)``, which
keeps small pressure drops exact. Conversions to table units happen once,
at the end.

Solvers. ``direct``: sparse LU (SuperLU, minimum-degree ordering on
``A^T + A``, symmetric mode, no pivoting, which is stable for this SPD
matrix). ``cg``: conjugate gradients (Hestenes & Stiefel 1952, J Res Natl
Bur Stand 49:409) with Jacobi preconditioning, applied as the symmetric
scaling ``D^-1/2 A D^-1/2``; the loop is written here with numpy kernels
that use no BLAS thread pool, so that its run time stays steady on a busy
machine (threaded BLAS level-1 calls slowed it several-fold under load);
it stops at relative residual ``cg_rtol`` of the scaled system or fails
after ``cg_max_iter`` iterations. ``auto``: direct up to
``cg_threshold_nodes`` unknowns or when the network is nearly a tree (at
most one independent loop per 1000 unknowns; sparse LU of a tree has no
fill), else CG. A CG run that does not converge,
a singular factorisation or a non-finite result raises
:class:`~pipeline.errors.SolverError`; the true residual is recomputed
after the solve and reported.

Boundary conditions (``boundary``). ``estimate`` (the default): the ends
cut by the volume (``'border'`` nodes, and ``'blind'`` ends of pieces that
reach the border with ``blind_ends: open``) have unknown pressure and flow;
:mod:`pipeline.flow.boundary` estimates them (Fry et al. 2012) from a target
pressure and a target wall shear stress, with Kirchhoff's law and the known
conditions (given inlets at ``inlet_pressure_pa``, outlets at
``outlet_pressure_pa``, ``boundary_flows``) as constraints. ``pressure``:
inlets (given) are at ``inlet_pressure_pa``; outlets are, unless given
explicitly, every open end that is not an inlet, at
``outlet_pressure_pa``; with ``inlet_flow_nl_min`` set, all inlets share one
unknown pressure chosen so that the total inflow equals that value (the
problem is linear, so the unit-potential solution is scaled). Other end
nodes are sealed (zero net flow, Neumann). With haematocrit phase separation
the estimated end pressures are held while haematocrit and viscosity are
iterated (:mod:`pipeline.flow.rheology`). Segments slower than
``perfused_min_velocity_mm_s`` are not perfused.

Unsolved and unperfused parts. A connected component without any inlet or
outlet is not solved: its nodes get ``pressure_pa`` NaN, its segments flow
0 and ``perfused`` False, and a warning counts them. A component with
inlets only or outlets only is at that one pressure, without flow.
``perfused`` is True for a segment whose component holds both an inlet and
an outlet, that is not a self-loop (a self-loop has zero net pressure drop
and carries no flow) and that is not in a dead-end part: the parts removed
by repeatedly stripping segments at sealed end nodes (a blind sprout and the
subtree behind it) carry no flow in steady state. They are left out of the
linear system, get flow exactly 0 and the pressure of the node they hang
from. A dangling closed loop attached at a single node is not detected as
dead-end; its flow is zero to rounding.

Derived quantities per segment (``r`` = ``radius_um``, the robust vessel
radius, for the local quantities; ``mu`` the segment's viscosity): mean
speed ``|Q| / (pi r^2)``, peak speed twice the mean (parabolic profile),
wall shear rate ``4 |Q| / (pi r^3)``, wall shear stress ``4 mu |Q| / (pi
r^3)``, Reynolds number ``rho v 2r / mu``, transit time ``L / v`` (NaN
where the flow is 0).

Viscosity. ``constant``: ``viscosity_mpa_s``. ``pries1992``: in-vitro
relative apparent viscosity of Pries, Neuhaus & Gaehtgens (1992, Am J
Physiol 263:H1770), times the plasma viscosity. ``pries1994``: in-vivo law
of Pries et al. (1994, Circ Res 75:904). Both take the tube diameter
``2 * r_hydraulic`` in µm and the discharge haematocrit; diameters below
``min_valid_diameter_um`` are evaluated at that diameter and counted in a
warning. The formulas are in :func:`relative_viscosity_vitro` and
:func:`relative_viscosity_vivo`.

Layout (each module's docstring says what comes in and what goes out):
``boundary`` (the boundary estimate of a cut network, Fry et al. 2012),
``viscosity`` (the viscosity laws), ``haematocrit`` (phase separation and
red cells through the network), ``rheology`` (the damped
flow-haematocrit-viscosity iteration), ``linear`` (the Kirchhoff system and its solvers) and
``plausibility`` (statistics by diameter class against published ranges)
-> ``network`` (the tables checked, boundary nodes, pieces, the core) ->
``solve`` (:func:`solve_flow`, :class:`FlowResult`).
"""

from .viscosity import relative_viscosity_vitro, relative_viscosity_vivo, segment_viscosity_mpa_s
from .plausibility import DIAMETER_CLASSES, PLAUSIBLE, class_statistics, plausibility_warnings
from .network import NL_MIN_PER_M3_S
from .solve import FlowResult, solve_flow

__all__ = [
    "FlowResult",
    "DIAMETER_CLASSES",
    "PLAUSIBLE",
    "class_statistics",
    "plausibility_warnings",
    "solve_flow",
    "relative_viscosity_vitro",
    "relative_viscosity_vivo",
    "segment_viscosity_mpa_s",
    "NL_MIN_PER_M3_S",
]
