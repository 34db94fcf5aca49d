"""Block-wise analysis: speed against the in-memory command, memory under a limit, a volume of billions of voxels.

Every route is ``vesselflow analyze`` as users run it, in its own process,
timed from outside; memory is the summed resident memory of the command and
every process it starts (sampled every 50 ms through ``/proc``, children
included), so a local Dask cluster's workers count too.

1. Speed, side by side in one run, on the dense 512^3 capillary bed of
   ``bench_analyze.py`` (``.npy``): the in-memory command, then
   ``--blockwise`` with blocks of 256 and 128 voxels (one process, one
   worker), then with 2 local Dask workers. Target: block-wise on one machine at
   most 1.5x the in-memory time.
2. Memory: a dense ``--size`` bed (default 768^3) written as OME-Zarr block
   by block, analysed with ``--memory-limit 1.5GB``. Target: summed
   resident memory under 1.5 GB.
3. Scale (``--big Z Y X``, e.g. ``--big 1024 2048 2048`` for 4.3 Gvox):
   the bed written as OME-Zarr and analysed block by block with
   ``--memory-limit`` (default 16GB) and ``--boundary pressure`` (the
   boundary estimate's direct factorisation does not reach a million
   segments; see ``bench_flow.py``); time, peak memory and throughput in
   Mvox/s.

Usage::

    python benchmarks/bench_blockwise.py [--size 768] [--big Z Y X] [--skip-speed]

The tables of every block-wise route are compared with the in-memory
route's (``segments.csv`` byte for byte) in the speed part.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
import threading
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_analyze import make_volume  # noqa: E402
from bench_command import steps_from  # noqa: E402

WORK = HERE / "_work"


def _tree_rss(pid):
    """Resident bytes of a process and all its descendants, from /proc."""
    import psutil

    try:
        root = psutil.Process(pid)
        procs = [root, *root.children(recursive=True)]
    except psutil.NoSuchProcess:
        return 0
    total = 0
    for p in procs:
        try:
            total += p.memory_info().rss
        except psutil.NoSuchProcess:
            pass
    return total


def run(cmd):
    """Wall time, peak summed resident memory of the process tree, and its output."""
    t0 = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    peak = [0]

    def watch():
        while proc.poll() is None:
            peak[0] = max(peak[0], _tree_rss(proc.pid))
            time.sleep(0.05)

    t = threading.Thread(target=watch, daemon=True)
    t.start()
    out, err = proc.communicate()
    seconds = time.perf_counter() - t0
    t.join()
    if proc.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd[:4])} failed:\n{err[-3000:]}")
    return {"seconds": seconds, "peak_bytes": peak[0], "steps": steps_from(err)}


def _exe():
    return shutil.which("vesselflow") or str(Path(sys.executable).with_name("vesselflow"))


def _bed_zarr(shape, name):
    """A dense capillary bed (15 % vessel) of ``shape`` voxels at 1 µm, written as OME-Zarr block by block."""
    from pipeline import synthetic
    from pipeline.synthetic.raster import BlockRaster
    from pipeline.synthetic.writing import write_ome_zarr

    WORK.mkdir(exist_ok=True)
    path = WORK / name
    if not path.exists():
        net = synthetic.capillary_bed(shape_um=tuple(float(n) for n in shape), vessel_fraction=0.15, seed=0)
        br = BlockRaster(net, spacing=(1, 1, 1), shape=shape)
        write_ome_zarr(path, br.shape, br.paint, spacing=(1, 1, 1))
    return path


def speed(work):
    path = make_volume(512, 0.15)
    exe = _exe()
    base = [exe, "analyze", str(path), "--spacing", "1", "1", "1", "--quiet"]
    routes = [("in memory", []), ("block-wise, blocks of 256", ["--blockwise", "--block-size", "256"]),
              ("block-wise, blocks of 128", ["--blockwise", "--block-size", "128"]),
              ("block-wise, blocks of 128, 2 local Dask workers", ["--blockwise", "--block-size", "128", "--workers",
                                                                   "2"])]
    rows, ref, ref_csv = [], None, None
    for i, (name, extra) in enumerate(routes):
        out = work / f"speed{i}"
        r = run(base + ["-o", str(out)] + extra)
        csv = (out / "segments.csv").read_bytes()
        if ref is None:
            ref, ref_csv = r, csv
        same = "yes" if csv == ref_csv else "NO"
        rows.append(f"| {name} | {r['seconds']:.1f} | {r['seconds'] / ref['seconds']:.2f} | "
                    f"{r['peak_bytes'] / 2**20:.0f} | {same} |")
        shutil.rmtree(out, ignore_errors=True)
    worst = max(float(r.split("|")[3]) for r in rows[1:3])
    return [
        "### Speed: the 512^3 capillary bed (`.npy`), the command end to end",
        "",
        "| route | wall time (s) | / in memory | peak memory, all processes (MiB) | segments.csv identical |",
        "|---|---|---|---|---|",
        *rows,
        "",
        f"Block-wise in one process at most {worst:.2f}x the in-memory time (target <= 1.5): "
        f"{'met' if worst <= 1.5 else 'NOT met'}. Workers: the in-process routes are one worker (each block on "
        "both cores, one after another); `--workers 2` starts a local Dask cluster of two single-threaded worker "
        "processes, each running its own blocks.",
        "",
    ]


def memory(work, size, limit="1.5GB"):
    path = _bed_zarr((size,) * 3, f"bed_{size}.ome.zarr")
    out = work / "memory"
    r = run([_exe(), "analyze", str(path), "-o", str(out), "--memory-limit", limit])
    rec = json.loads((out / "run.json").read_text())
    bw = rec.get("blockwise", {})
    n = size**3
    shutil.rmtree(out, ignore_errors=True)
    from dask.utils import parse_bytes

    ok = r["peak_bytes"] < parse_bytes(limit)
    return [
        f"### Memory: a dense {size}^3 bed stored as OME-Zarr, `--memory-limit {limit}`",
        "",
        f"Wall time {r['seconds']:.1f} s ({n / r['seconds'] / 1e6:.1f} Mvox/s); peak resident memory of all "
        f"processes {r['peak_bytes'] / 2**20:.0f} MiB ({r['peak_bytes'] / 1e9:.2f} GB; target < {limit}): "
        f"{'met' if ok else 'NOT met'}. {bw.get('blocks')} blocks of {bw.get('block_edge')} voxels, halo "
        f"{bw.get('halo_voxels_max')} voxels, largest radius {bw.get('largest_radius_um', 0):.1f} µm.",
        f"Steps (s): {json.dumps(r['steps'])}",
        "",
    ]


def big(work, shape, limit):
    path = _bed_zarr(tuple(shape), "bed_{}x{}x{}.ome.zarr".format(*shape))
    out = work / "big"
    r = run([_exe(), "analyze", str(path), "-o", str(out), "--memory-limit", limit, "--boundary", "pressure"])
    rec = json.loads((out / "run.json").read_text())
    summ = json.loads((out / "summary.json").read_text())
    bw = rec.get("blockwise", {})
    n = shape[0] * shape[1] * shape[2]
    shutil.rmtree(out, ignore_errors=True)
    return [
        f"### Scale: a dense {shape[0]} x {shape[1]} x {shape[2]} bed ({n / 1e9:.1f} Gvox) stored as OME-Zarr",
        "",
        f"`vesselflow analyze --memory-limit {limit} --boundary pressure`: {r['seconds'] / 60:.1f} min, "
        f"{n / r['seconds'] / 1e6:.1f} Mvox/s, peak resident memory of all processes "
        f"{r['peak_bytes'] / 2**30:.1f} GiB; {summ['segments']} segments, {summ['nodes']} nodes, "
        f"{bw.get('blocks')} blocks of {bw.get('block_edge')} voxels.",
        f"Steps (s): {json.dumps(r['steps'])}",
        "",
    ]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=768, help="edge of the bed of the memory test (voxels)")
    ap.add_argument("--big", type=int, nargs=3, metavar=("Z", "Y", "X"), help="also the scale test at this shape")
    ap.add_argument("--big-limit", default="16GB")
    ap.add_argument("--skip-speed", action="store_true")
    args = ap.parse_args(argv)
    WORK.mkdir(exist_ok=True)
    work = Path(tempfile.mkdtemp(prefix="bench-blockwise-", dir=WORK))
    lines = ["## bench_blockwise.py", ""]
    try:
        if not args.skip_speed:
            lines += speed(work)
        lines += memory(work, args.size)
        if args.big:
            lines += big(work, args.big, args.big_limit)
    finally:
        shutil.rmtree(work, ignore_errors=True)
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())
