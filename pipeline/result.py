"""The one result type, from :func:`pipeline.analyze` to the result folder and back.

In: the tables, summary and run record the analysis assembles, or the files
of a result folder (:func:`pipeline.tables.load_result`). Out: :class:`Result`,
what the result folder, the batch, the report, the scorer and the viewer all
take. ``pipeline.Analysis`` and ``pipeline.tables.Result`` are this type.

Also the ordered step names (:data:`STEPS`) that progress reports and errors
carry (``exc.step``).
"""

from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING

import pandas as pd

if TYPE_CHECKING:
    import networkx as nx

__all__ = ["Result", "STEPS", "to_networkx"]

#: The steps of one sample, in order: ``progress(step, seconds)`` reports
#: each as it ends, and an error raised during one carries its name as
#: ``exc.step``. ``reading`` and ``writing`` belong to a file's analysis
#: (:func:`pipeline.analysis.analyze_file`); ``radii`` runs with the wall
#: fit, ``flow`` when it is enabled.
STEPS = ("reading", "cleaning", "centrelines", "graph", "radii", "pruning", "measures", "summary", "levels",
         "vessels", "orders", "flow", "bifurcations", "writing")


@dataclass
class Result:
    """A measured vessel graph: in memory from :func:`pipeline.analyze`, or read from its folder.

    Attributes
    ----------
    segments : DataFrame
        One row per segment; ``segment_id``, ``node_from``, ``node_to``,
        ``length_um``, ``radius_um`` and more (see ``DEVELOPERS.md``).
    nodes : DataFrame
        One row per node; ``node_id``, voxel ``z, y, x``, ``z_um, y_um, x_um``,
        ``degree``, ``kind``.
    summary : dict
        Sample-level measures (``summary.json``).
    centrelines : list of (K, 3) float ndarray
        Smoothed centreline of each segment (row order), µm.
    spacing : tuple of 3 float
        ``(dz, dy, dx)`` µm; read back from ``run.json`` when not given.
    run : dict
        ``config``, ``timings_s``, ``counts``, ``warnings``, ``planar``,
        ``roots``, ``flow`` (solver details); read back, also the input,
        spacing, version and file checksums (``run.json``).
    levels : DataFrame
        Per-level morphometry and Murray statistics (``levels.csv``).
    bifurcations : DataFrame
        One row per junction (``bifurcations.csv``).
    vessels : DataFrame
        One row per vessel, segments chained through junctions, with its
        tortuosity (``vessels.csv``, :mod:`pipeline.vessels`).
    orders : DataFrame
        Per diameter-defined Strahler order (``orders.csv``, :mod:`pipeline.orders`).
    order_connectivity : DataFrame
        Connectivity matrix C(m, n) in long form (``order_connectivity.csv``).
    centreline_radii : list of (K,) float ndarray or None
        Radius along each raw centreline, µm (``centrelines.npz``).
    path : Path or None
        The result folder it was read from or written to; None for an
        analysis only in memory.
    graph : networkx.MultiGraph
        Nodes keyed by ``node_id``; edges keyed by ``segment_id`` with the
        segment's columns as attributes. Built from ``segments`` and
        ``nodes`` on first access (:func:`to_networkx`): the tables are the
        result, the graph is their view for networkx, and on a bed of 40,000
        segments it takes 0.7 s and much memory that a caller of the tables
        alone does not need.
    """

    segments: pd.DataFrame
    nodes: pd.DataFrame
    summary: dict
    centrelines: list
    spacing: tuple | None = None
    run: dict = field(default_factory=dict)
    levels: pd.DataFrame = field(default_factory=pd.DataFrame)
    bifurcations: pd.DataFrame = field(default_factory=pd.DataFrame)
    vessels: pd.DataFrame = field(default_factory=pd.DataFrame)
    orders: pd.DataFrame = field(default_factory=pd.DataFrame)
    order_connectivity: pd.DataFrame = field(default_factory=pd.DataFrame)
    centreline_radii: list | None = None
    path: Path | None = None
    _graph: object = field(default=None, repr=False, compare=False)

    def __post_init__(self):
        if self.spacing is None and self.run.get("spacing_um") is not None:
            self.spacing = tuple(float(s) for s in self.run["spacing_um"])

    @property
    def graph(self) -> nx.MultiGraph:
        if self._graph is None:
            self._graph = to_networkx(self.segments, self.nodes)
        return self._graph


def to_networkx(segments, nodes):
    """Build the networkx MultiGraph of the tables (edges keyed by ``segment_id``).

    Every node carries its row of ``nodes`` and every edge its row of
    ``segments`` as attributes.
    """
    import networkx as nx  # only for this view of the tables

    G = nx.MultiGraph()
    G.add_nodes_from((int(row["node_id"]), row) for row in _records(nodes))
    G.add_edges_from((int(row["node_from"]), int(row["node_to"]), int(row["segment_id"]), row)
                     for row in _records(segments))
    return G


def _records(df):
    """Rows of ``df`` as dicts of Python values, as ``df.to_dict("records")`` gives them.

    Column by column (``tolist`` converts a whole column at once) rather
    than value by value: about three times quicker on a table of 40,000
    segments and 40 columns. A missing value of a nullable column
    (``pd.NA``) becomes None, as in ``to_dict``.
    """
    cols = list(df.columns)
    values = []
    for c in cols:
        col = df[c]
        v = col.tolist()
        if isinstance(col.dtype, pd.api.extensions.ExtensionDtype) and col.hasnans:
            v = [None if x is pd.NA else x for x in v]
        values.append(v)
    return [dict(zip(cols, row)) for row in zip(*values)]
