"""Shared checks of the segment and node tables that later steps receive.

In: ``segments`` and ``nodes`` DataFrames. Out: node ids and the row index
of each segment's two end nodes, or an :class:`InputError` naming the first
bad row. Used by the steps that also serve as public functions on user
tables (flow, bifurcations).
"""

import numpy as np
import pandas as pd

from .errors import InputError


def segment_end_rows(segments, nodes):
    """Return ``(ids, seg_id, u, v)``: node ids, segment ids and end-node rows.

    Raises
    ------
    InputError
        Duplicate node or segment ids, or a segment whose node is missing.
    """
    ids = pd.Index(nodes["node_id"].to_numpy(dtype=np.int64))
    if not ids.is_unique:
        raise InputError("nodes: node_id values must be unique")
    seg_id = segments["segment_id"].to_numpy(dtype=np.int64)
    if not pd.Index(seg_id).is_unique:
        raise InputError("segments: segment_id values must be unique")
    u = ids.get_indexer(segments["node_from"].to_numpy(dtype=np.int64))
    v = ids.get_indexer(segments["node_to"].to_numpy(dtype=np.int64))
    if (u < 0).any() or (v < 0).any():
        k = int(np.flatnonzero((u < 0) | (v < 0))[0])
        raise InputError(f"segments: segment_id {int(seg_id[k])} refers to a node id missing from nodes")
    return ids, seg_id, u, v
