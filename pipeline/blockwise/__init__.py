"""Block-wise analysis of volumes larger than memory, on one machine or a Dask cluster.

In: a sliceable ``(Z, Y, X)`` mask (a NumPy memory map, a Zarr or OME-Zarr
array, an HDF5 dataset), its spacing and the configuration. Out: the same
:class:`pipeline.result.Result` as :func:`pipeline.analyze`, from one graph.

Layout: ``source`` (the volume read slab by slab into runs) -> ``plan``
(the thinning grid and the blocks on it) -> ``tasks`` (one block's
centrelines, tissue distances and wall fits) -> ``engine`` (where the
blocks run) -> ``analysis`` (:func:`analyze_blockwise`, which hands the
stitched centrelines to the in-memory graph steps).
"""

from .analysis import SMALLEST_BLOCK, analyze_blockwise, block_edge_for
from .engine import BlockError

__all__ = ["analyze_blockwise", "block_edge_for", "BlockError", "SMALLEST_BLOCK"]
