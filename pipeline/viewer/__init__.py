"""Look at a result folder in napari and review its flagged bifurcations.

In: a result folder (and the mask it was computed from). Out: napari layers,
the review panel (a dock widget) that writes ``review.csv`` on every change,
and screenshots.

This package and ``napari.yaml`` are the only parts of vesselflow that import napari
or Qt; the command line imports this package only for ``vesselflow view``, and
it needs the optional extra (``pip install 'vesselflow[viewer]'``).

Everything is shown in physical units: the world frame is µm, with voxel
(i, j, k) at (i·dz, j·dy, k·dx). The mask is an image layer with
``scale = spacing``; centrelines, nodes and bifurcations are placed at their
µm positions from ``centrelines.npz``, ``nodes.csv`` and ``bifurcations.csv``
(scale 1).

Layers:

``mask``
    The binary mask, as a faint maximum projection in 3-D.
``centrelines``
    Every segment's smoothed centreline as a chain of short vectors, coloured
    by the chosen measure (:data:`pipeline.review.COLOUR_MEASURES`) with the
    ``viridis`` colour map; grey where a segment has no value. The legend is
    a colour bar in the review panel and a text line on the canvas.
``nodes``
    All nodes, light grey.
``flagged bifurcations``
    The flagged junctions as rings round them (transparent inside, so the
    junction shows), drawn over everything else; magenta until reviewed, then
    orange (``confirmed``), grey (``artefact``) or light blue (``unsure``).
``current bifurcation``
    A white ring round the junction under review.
``current vessels``, ``current labels``
    Its parent and daughters, drawn white over the other centrelines and
    labelled.

The canvas also shows a scale bar (µm) and, in its text, the node id of the
junction under review. Keys: N next, B back, C confirmed, X artefact, U
unsure.

The review panel lists the flagged junctions in a sortable table, at first
by decreasing ``severity`` (deviation from Murray's law in standard
uncertainties, see :mod:`pipeline.bifurcations`); Previous and Next follow
the table's order; choosing a row centres and zooms the
camera on the junction and shows its parent and daughter radii and measures;
the decision buttons and the note field save ``review.csv`` at once.

For napari's own menus the module provides an npe2 reader (open a result
folder: File > Open Folder) and the review panel as a widget
(Plugins > vesselflow > Bifurcation review), which finds the result through
the layers the reader made.

Layout (each module's docstring says what comes in and what goes out):
``layers`` (a result as napari layer data) -> ``panel`` (the review
panel) -> ``session`` (:func:`open_result`, :func:`render_screenshot`) and
``reader`` (the npe2 reader).
"""

from .layers import CENTRELINE_COLORMAP, DECISION_RGBA, FLAGGED_RGBA, read_mask_for, result_layers
from .panel import ReviewPanel
from .session import open_result, render_screenshot
from .reader import napari_get_reader

__all__ = [
    "ReviewPanel",
    "open_result",
    "render_screenshot",
    "read_mask_for",
    "result_layers",
    "napari_get_reader",
    "FLAGGED_RGBA",
    "DECISION_RGBA",
    "CENTRELINE_COLORMAP",
]
