"""Scaling of ``vesselflow batch`` with the number of Dask workers.

Eight synthetic capillary beds run as one batch on an embedded cluster of one
worker and then of two workers, each sample with one thread for its compiled
steps, so that the comparison measures the batch engine's parallelism and
not the steps' own threads. A third run, one worker whose sample uses two
threads, shows what a single worker gets from the cores on its own. Each run
is a fresh batch folder and its time is the whole ``run_batch`` call, cluster
start and study tables included (what a user waits for).

Usage::

    python benchmarks/bench_batch.py [--size 320] [--samples 8]

Prints a markdown table; ``benchmarks/run.py`` collects it into RESULTS.md.
Target: eight samples on two workers at least 1.7x faster than on one.
"""

from __future__ import annotations

import argparse
import os
import shutil
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=320, help="edge of each cubic bed, voxels (1 µm)")
    ap.add_argument("--samples", type=int, default=8)
    ap.add_argument("--fraction", type=float, default=0.15)
    args = ap.parse_args(argv)

    from bench_analyze import make_volume

    from pipeline import batch

    t0 = time.perf_counter()
    sources = [make_volume(args.size, args.fraction, seed=s) for s in range(2)]
    prep = time.perf_counter() - t0
    with tempfile.TemporaryDirectory(prefix="vf-bench-batch-") as tmp:
        tmp = Path(tmp)
        study = tmp / "study"
        for i in range(args.samples):
            group = "control" if i % 2 == 0 else "treated"
            (study / group).mkdir(parents=True, exist_ok=True)
            shutil.copy(sources[i % 2], study / group / f"bed{i:02d}.npy")
        samples = batch.find_samples(study)
        rows = []
        for label, workers, threads in (("1 worker", 1, 1), ("2 workers", 2, 1), ("1 worker, 2 threads", 1, 2)):
            out = tmp / f"out-{workers}-{threads}"
            t = time.perf_counter()
            res = batch.run_batch(samples, out, workers=workers, threads=threads)
            wall = time.perf_counter() - t
            computed = res.status.loc[res.status["status"] == "done", "seconds"]
            assert res.n_failed == 0 and len(computed) == args.samples, res.status
            rows.append((label, workers, threads, wall, float(computed.sum())))
    base = rows[0][3]
    print(f"### batch: {args.samples} capillary beds of {args.size}^3 ({args.fraction:.0%} vessel), "
          f"{os.cpu_count()} CPU(s); beds built or loaded in {prep:.0f} s\n")
    print("| run | workers | threads per sample | wall time (s) | sum of sample times (s) | speedup vs 1 worker |")
    print("|---|---:|---:|---:|---:|---:|")
    for label, w, th, wall, total in rows:
        print(f"| {label} | {w} | {th} | {wall:.1f} | {total:.1f} | {base / wall:.2f}x |")
    speed = base / rows[1][3]
    print(f"\nTarget (two workers at least 1.7x faster than one): {'met' if speed >= 1.7 else 'NOT met'} "
          f"({speed:.2f}x). Wall time includes starting the cluster's worker processes and writing the study "
          "tables.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
