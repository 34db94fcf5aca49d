"""Speed and memory of ``analyze`` against a direct reference route.

Both routes run on the same synthetic capillary bed, each in its own
subprocess so that peak memory (ru_maxrss) is the route's own. The reference
route uses the general-purpose libraries in their most direct form:
scikit-image ``skeletonize`` on the whole volume, SciPy's full-volume
``distance_transform_edt``, and a networkx graph with one node per skeleton
voxel and an edge per 26-adjacent pair.

Usage::

    python benchmarks/bench_analyze.py [--size 512] [--fraction 0.15]

Prints a markdown table; ``benchmarks/run.py`` collects it into RESULTS.md.
Targets (2-core machine, 512^3, about 15 % vessel): analyze time at most 0.2x
the reference, peak memory at most 12 bytes per input voxel.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
WORK = HERE / "_work"

ROUTE = r"""
import json, resource, sys, time
import numpy as np
if sys.argv[1] == "analyze":
    # Warm up on a tiny volume: compiled kernels load from numba's cache (or
    # compile once per install), which is not per-volume work.
    import pipeline
    from pipeline import synthetic
    pipeline.analyze(synthetic.rasterize(synthetic.ladder(rungs=2), spacing=(1, 1, 1))[0], spacing=(1, 1, 1))
mask = np.load(sys.argv[2])
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
t0 = time.perf_counter()
if sys.argv[1] == "analyze":
    res = pipeline.analyze(mask, spacing=(1.0, 1.0, 1.0))
    out = {"segments": len(res.segments), "nodes": len(res.nodes), "timings": res.run["timings_s"]}
else:
    import networkx as nx
    from scipy import ndimage as ndi
    from skimage.morphology import skeletonize
    skel = skeletonize(mask)
    dist = ndi.distance_transform_edt(mask)
    coords = [tuple(c) for c in np.argwhere(skel)]
    present = set(coords)
    G = nx.Graph()
    for c in coords:
        G.add_node(c, radius=float(dist[c]))
    offsets = [(a, b, d) for a in (-1, 0, 1) for b in (-1, 0, 1) for d in (-1, 0, 1) if (a, b, d) > (0, 0, 0)]
    for c in coords:
        for o in offsets:
            n = (c[0] + o[0], c[1] + o[1], c[2] + o[2])
            if n in present:
                G.add_edge(c, n)
    out = {"skeleton_voxels": len(coords), "edges": G.number_of_edges()}
out["seconds"] = time.perf_counter() - t0
out["peak_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
out["baseline_bytes"] = base
print("RESULT " + json.dumps(out))
"""


def make_volume(size, fraction, seed=0):
    import numpy as np

    from pipeline import synthetic

    WORK.mkdir(exist_ok=True)
    path = WORK / f"bed_{size}_{fraction:g}_{seed}.npy"
    if not path.exists():
        net = synthetic.capillary_bed(shape_um=(size, size, size), vessel_fraction=fraction, seed=seed)
        mask, _ = synthetic.rasterize(net, spacing=(1, 1, 1), shape=(size, size, size))
        np.save(path, mask)
    return path


def run_route(name, path):
    proc = subprocess.run([sys.executable, "-c", ROUTE, name, str(path)], capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"{name} route failed:\n{proc.stderr[-2000:]}")
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")][-1]
    return json.loads(line[7:])


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--fraction", type=float, default=0.15)
    args = ap.parse_args(argv)
    import numpy as np

    t = time.perf_counter()
    path = make_volume(args.size, args.fraction)
    mask = np.load(path, mmap_mode="r")
    n_vox = mask.size
    frac = float(np.count_nonzero(mask)) / n_vox
    del mask
    gen = time.perf_counter() - t
    ours = run_route("analyze", path)
    ref = run_route("reference", path)
    ratio = ours["seconds"] / ref["seconds"]
    bpv = ours["peak_bytes"] / n_vox
    lines = [
        f"### analyze on a {args.size}^3 capillary bed ({frac:.1%} vessel, volume built in {gen:.0f} s)",
        "",
        "| route | time (s) | peak memory (MiB) | bytes per input voxel |",
        "|---|---|---|---|",
        f"| vesselflow analyze | {ours['seconds']:.1f} | {ours['peak_bytes'] / 2**20:.0f} | {bpv:.1f} |",
        f"| reference (skeletonize + full EDT + voxel graph) | {ref['seconds']:.1f} | {ref['peak_bytes'] / 2**20:.0f} | {ref['peak_bytes'] / n_vox:.1f} |",
        "",
        f"Time ratio {ratio:.2f} (target <= 0.20): {'met' if ratio <= 0.2 else 'NOT met'}. "
        f"Memory {bpv:.1f} bytes per voxel (target <= 12): {'met' if bpv <= 12 else 'NOT met'}.",
        f"analyze steps (s): {json.dumps(ours['timings'])}; {ours['segments']} segments, {ours['nodes']} nodes.",
        "",
    ]
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())
