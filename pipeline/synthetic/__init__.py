"""Synthetic vessel networks with exact ground truth, and their voxel masks.

In: geometric parameters in micrometres (lengths, radii, angles, a Murray
exponent, random seeds) for one of several builders (straight, curved and
helical tubes, a torus, a Y branch, a 3-D dichotomous tree, a looping
capillary bed, a ladder, a cortex-like network of penetrating arteriolar
and venular trees feeding a capillary mesh), then a voxel spacing ``(dz,
dy, dx)`` and optional imperfections: the kind ones of the demo volumes
(smooth surface roughness, stray specks, enclosed holes) and the hostile
ones of real segmentations (roughness down to a voxel or two, blobs stuck
to walls, handles and tunnels, open pits, gaps in thin vessels, an
anisotropic point-spread, plane-to-plane motion; :func:`hostile_artefacts`
sets them all from one strength).

Out: a :class:`VesselNetwork` (nodes and densely sampled centreline polylines
with radii, in µm), a boolean mask of shape ``(Z, Y, X)`` from
:func:`rasterize` together with a JSON-serialisable truth dictionary (node
positions in µm and in voxel index units, segment lengths and radii,
bifurcation radii, what was added on purpose), and, from
:func:`write_volume`, a uint8 0/255 ImageJ TIFF with a ``<stem>.truth.json``
beside it. For flow truths: :func:`network_tables` (the segment and node
tables :func:`pipeline.flow.solve_flow` takes), :func:`network_flow_truth`
(the whole network solved with arteriolar roots at one pressure and venular
roots at another, through ``solve_flow``, imported when called) and
:func:`crop_network` (a sub-box, each piece mapped to its source segment).

Conventions: axis order (z, y, x); voxel ``(i, j, k)`` has its centre at
``(i*dz, j*dy, k*dx)`` µm. A voxel is vessel when its centre lies inside the
union of capsules along the polyline, the capsule radius interpolated
linearly along each polyline piece. Artefacts never change the truth's
network; they are listed beside it, with the topology change of each.

Layout (each module's docstring says what comes in and what goes out):
``_common`` (argument checks, geometry helpers) -> ``network`` (the
:class:`VesselNetwork` type, clipping to a box) -> the builders ``shapes``
(tubes, helix, torus, ladder), ``trees`` (Y branch, Murray trees), ``beds``
(capillary bed), ``cortex`` (cortex-like network and its flow truth; its
penetrating trees grow in ``_cortex_trees``) -> ``painting`` (capsule walls
into voxels, imaging) and ``artefacts`` (what real segmentations add) ->
``raster`` (:func:`rasterize`, the mask and its truth) -> ``writing`` (TIFF
and truth file) and ``kinds`` (the named kinds of the ``synth`` command).
"""

from ._common import MAX_STEP_UM
from .network import VesselNetwork, crop_network, network_tables
from .shapes import curved_tube, helix, ladder, straight_tube, torus
from .trees import binary_tree, murray_angles_deg, murray_daughter_radii, y_branch
from .beds import capillary_bed
from .cortex import MMHG_PA, VESSEL_CLASSES, cortex_network, network_flow_truth
from .raster import HOSTILE_AT_FULL_STRENGTH, hostile_artefacts, rasterize
from .writing import truth_path_for, write_synthetic, write_volume
from .kinds import SYNTH_KINDS, SynthKind, synthesize

__all__ = [
    "VesselNetwork",
    "SynthKind",
    "SYNTH_KINDS",
    "MAX_STEP_UM",
    "straight_tube",
    "curved_tube",
    "helix",
    "torus",
    "y_branch",
    "binary_tree",
    "capillary_bed",
    "ladder",
    "cortex_network",
    "network_tables",
    "network_flow_truth",
    "crop_network",
    "VESSEL_CLASSES",
    "MMHG_PA",
    "murray_daughter_radii",
    "murray_angles_deg",
    "rasterize",
    "HOSTILE_AT_FULL_STRENGTH",
    "hostile_artefacts",
    "write_volume",
    "write_synthetic",
    "truth_path_for",
    "synthesize",
]
