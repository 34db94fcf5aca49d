"""Shared fixtures: synthetic volumes with ground truth, analysed once per module."""

import numpy as np
import pytest
from scipy.spatial import cKDTree

import pipeline
from pipeline import synthetic


@pytest.fixture(scope="session")
def analyse():
    """Rasterise a network and analyse it; cached per argument set."""
    cache = {}

    def run(key, build, *, spacing=(1.0, 1.0, 1.0), config=None, **raster):
        k = (key, tuple(spacing), repr(sorted(raster.items())), repr(config))
        if k not in cache:
            mask, truth = synthetic.rasterize(build(), spacing=spacing, **raster)
            cache[k] = (mask, truth, pipeline.analyze(mask, spacing=spacing, config=config))
        return cache[k]

    return run


def junction_f1(truth, result):
    """F1 of junction detection, a measured junction matching a true one
    within the largest radius of the vessels meeting there."""
    true_nodes = [n for n in truth["nodes"] if n["kind"] == "junction"]
    rad = {}
    for s in truth["segments"]:
        for e in (s["node_from"], s["node_to"]):
            rad[e] = max(rad.get(e, 0.0), s["radius_um"])
    found = result.nodes.loc[result.nodes["kind"] == "junction", ["z_um", "y_um", "x_um"]].to_numpy()
    if not true_nodes or not len(found):
        return 0.0
    tree = cKDTree(found)
    used, hits = set(), 0
    for n in true_nodes:
        d, idx = tree.query(n["pos_um"], k=min(3, len(found)))
        for dd, ii in zip(np.atleast_1d(d), np.atleast_1d(idx)):
            if dd <= rad[n["id"]] and ii not in used:
                used.add(ii)
                hits += 1
                break
    precision, recall = hits / len(found), hits / len(true_nodes)
    return 2 * precision * recall / (precision + recall) if hits else 0.0


def radius_errors(truth, result):
    """Relative radius error per true segment, matched through the measured
    centreline point nearest the true segment's midpoint."""
    pts = np.vstack(result.centrelines)
    owner = np.repeat(np.arange(len(result.centrelines)), [len(c) for c in result.centrelines])
    tree = cKDTree(pts)
    out = []
    for s in truth["segments"]:
        p = np.asarray(s["points_um"])
        _, j = tree.query(p[len(p) // 2])
        out.append(result.segments["radius_um"].iloc[owner[j]] / s["radius_um"] - 1.0)
    return np.asarray(out)
