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


def write_ybranch(path, radius, *, spacing=(1.0, 1.0, 1.0)):
    """Write a Y-branch mask of parent radius ``radius`` µm (30 µm arms) as an ImageJ TIFF with its truth."""
    net = synthetic.y_branch(parent_radius_um=radius, parent_length_um=30, daughter_length_um=30)
    mask, truth = synthetic.rasterize(net, spacing=spacing)
    synthetic.write_volume(path, mask, spacing=spacing, truth=truth)


def _tree_snapshot(folder):
    """{relative path: bytes or 'dir'} of everything under ``folder``, hidden entries included."""
    from pathlib import Path

    out = {}
    for p in sorted(Path(folder).rglob("*")):
        out[str(p.relative_to(folder))] = "dir" if p.is_dir() else p.read_bytes()
    return out


@pytest.fixture
def snapshot():
    """Snapshot a folder tree, to assert later that nothing in it changed."""
    return _tree_snapshot


@pytest.fixture
def small_disk(tmp_path):
    """A factory of small tmpfs mounts: ``small_disk(size_kib, readonly=False) -> Path``.

    A real full (or read-only) file system, not a mocked ``write``: the
    errors then come from the kernel exactly as on a lab's full disk. Needs
    root; skipped locally without it, an error under CI (which runs as root).
    """
    import os
    import subprocess

    mounts = []

    def make(size_kib, *, readonly=False):
        where = tmp_path / f"disk{len(mounts)}"
        where.mkdir()
        opts = f"size={int(size_kib)}k" + (",ro" if readonly else "")
        proc = subprocess.run(["mount", "-t", "tmpfs", "-o", opts, "tmpfs", str(where)], capture_output=True,
                              text=True)
        if proc.returncode != 0:
            if os.environ.get("CI") == "true":
                pytest.fail(f"cannot mount a tmpfs for the full-disk tests: {proc.stderr.strip()}")
            pytest.skip(f"cannot mount a tmpfs here (needs root): {proc.stderr.strip()}")
        mounts.append(where)
        return where

    yield make
    for where in reversed(mounts):
        subprocess.run(["umount", "-l", str(where)], capture_output=True)


def fill_disk(folder):
    """Fill the file system holding ``folder`` to the last byte; returns the filler's path."""
    from pathlib import Path

    filler = Path(folder) / "filler.bin"
    with open(filler, "wb", buffering=0) as fh:
        try:
            while True:
                fh.write(bytes(4096))
        except OSError:  # ENOSPC: full
            pass
    return filler
