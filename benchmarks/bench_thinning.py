"""Speed, memory and topology of ``pipeline.thinning.thin`` against scikit-image.

Both routes thin the same volumes, each run in its own subprocess so that the
peak memory (ru_maxrss above the loaded input) is the route's own:

* a 256^3 lattice of tubes from ``/tmp/lat256.npy`` when that file exists;
* a synthetic capillary bed (``pipeline.synthetic.capillary_bed``, 15 %
  vessel), 512^3 by default, cached in ``benchmarks/_work``.

Routes: ``skimage.morphology.skeletonize`` (Lee et al. 1994, one thread) and
``thin`` with one thread and with ``--threads`` threads. ``thin`` is warmed
up on a small volume first, so numba compilation (cached on disk) is not
timed. Euler numbers (26-connectivity) and 26-component counts of input and
skeleton show whether the topology was kept.

Usage::

    python benchmarks/bench_thinning.py [--size 512] [--threads 2] [--repeat 1] [--spin] [--quick]

Prints a markdown table; ``benchmarks/run.py`` collects it into RESULTS.md.
Target (2-core machine, 512^3): ``thin`` with 2 threads at least 3x faster
than skimage.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
WORK = HERE / "_work"
LATTICE = Path("/tmp/lat256.npy")

ROUTE = r"""
import json, resource, sys, time
import numpy as np
route, path, threads, repeat = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
mask = np.load(path)
if route == "thin":
    import numba
    from pipeline.thinning import thin
    numba.set_num_threads(threads)
    warm = np.zeros((40, 40, 40), bool)
    warm[5:35, 5:35, 5:35] = True
    thin(warm)
    run = thin
else:
    from skimage.morphology import skeletonize
    run = skeletonize
base = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
wall, cpu = [], []
skel = None
for _ in range(repeat):
    skel = None  # so that two results never live at once
    t0, c0 = time.perf_counter(), time.process_time()
    skel = run(mask)
    wall.append(time.perf_counter() - t0)
    cpu.append(time.process_time() - c0)
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024 - base
from scipy import ndimage as ndi
from skimage.measure import euler_number
s26 = np.ones((3, 3, 3), bool)
out = {
    "seconds": min(wall), "cpu_seconds": cpu[wall.index(min(wall))], "extra_peak_bytes": peak,
    "voxels": int(np.count_nonzero(skel)), "euler": int(euler_number(skel, connectivity=3)),
    "components": int(ndi.label(skel, s26)[1]), "subset": bool(not (skel & ~mask).any()),
}
print("RESULT " + json.dumps(out))
"""

INFO = r"""
import json, sys
import numpy as np
from scipy import ndimage as ndi
from skimage.measure import euler_number
mask = np.load(sys.argv[1])
print("RESULT " + json.dumps({"shape": list(mask.shape), "foreground": int(np.count_nonzero(mask)),
      "euler": int(euler_number(mask, connectivity=3)), "components": int(ndi.label(mask, np.ones((3, 3, 3), bool))[1])}))
"""


def make_bed(size, fraction, seed=0):
    # The same cached volume as bench_analyze.py, so both measure one bed.
    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bench_analyze import make_volume

    return make_volume(size, fraction, seed)


def _result(cmd, env=None):
    env = None if env is None else {**os.environ, **env}
    proc = subprocess.run([sys.executable, "-c", *cmd], capture_output=True, text=True, cwd=HERE.parent, env=env)
    if proc.returncode != 0:
        raise RuntimeError(f"{cmd[1:]} failed:\n{proc.stderr[-2000:]}")
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")][-1]
    return json.loads(line[7:])


def bench_volume(name, path, threads, repeat, spin):
    info = _result([INFO, str(path)])
    n_vox = math.prod(info["shape"])
    runs = [("skimage skeletonize", "skimage", 1, 1, None)]
    runs += [("thin", "thin", 1, repeat, None)]
    if threads > 1:
        runs += [("thin", "thin", threads, repeat, None)]
        if spin:
            runs += [("thin, idle threads spin (OMP_WAIT_POLICY=ACTIVE)", "thin", threads, repeat, {"OMP_WAIT_POLICY": "ACTIVE"})]
    rows = []
    ref = None
    for label, route, nthr, rep, env in runs:
        r = _result([ROUTE, route, str(path), str(nthr), str(rep)], env)
        if ref is None:
            ref = r["seconds"]
        kept = r["euler"] == info["euler"] and r["components"] == info["components"] and r["subset"]
        rows.append(
            f"| {name} | {label} | {nthr} | {r['seconds']:.2f} | {r['cpu_seconds']:.2f} | {ref / r['seconds']:.1f}x "
            f"| {r['extra_peak_bytes'] / n_vox:.2f} | {r['voxels']} | {info['euler']} -> {r['euler']} "
            f"| {info['components']} -> {r['components']} | {'yes' if kept else 'NO'} |"
        )
    head = f"{name}: {'x'.join(map(str, info['shape']))}, {info['foreground'] / n_vox:.1%} foreground"
    return head, rows


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=512, help="edge of the capillary bed volume")
    ap.add_argument("--fraction", type=float, default=0.15)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=1, help="runs of thin per route (best is reported)")
    ap.add_argument("--quick", action="store_true", help="a 128^3 bed only, for a smoke run")
    ap.add_argument("--spin", action="store_true",
                    help="also time thin with idle OpenMP threads spinning (OpenMP's default; thin makes them sleep)")
    args = ap.parse_args(argv)
    size = 128 if args.quick else args.size

    volumes = []
    if LATTICE.exists() and not args.quick:
        volumes.append(("lattice 256^3", LATTICE))
    t = time.perf_counter()
    volumes.append((f"capillary bed {size}^3", make_bed(size, args.fraction)))
    gen = time.perf_counter() - t

    heads, rows = [], []
    for name, path in volumes:
        head, r = bench_volume(name, path, args.threads, args.repeat, args.spin)
        heads.append(head)
        rows += r
    lines = [
        f"### thinning: `thin` against `skimage.morphology.skeletonize` ({'; '.join(heads)}; bed built or loaded in {gen:.0f} s)",
        "",
        "| volume | route | threads | time (s) | CPU (s) | speedup | extra peak (bytes/voxel) | skeleton voxels "
        "| Euler in -> out | components in -> out | topology kept |",
        "|---|---|---|---|---|---|---|---|---|---|---|",
        *rows,
        "",
        "Speedup is skimage's time over the route's (wall clock). Extra peak: the route's maximum resident memory "
        "above the loaded input, per input voxel.",
        "",
    ]
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())
