"""The command as users run it, end to end, against two reference routes.

``vesselflow analyze BED.npy --spacing 1 1 1 -o OUT`` is run as its own
process (interpreter start, imports, reading, analysis and writing the
result folder), on the capillary bed of ``bench_analyze.py``. In the same run
and on the same file:

- the reference route of ``bench_analyze.py`` (scikit-image ``skeletonize``
  on the whole volume, SciPy's full-volume ``distance_transform_edt`` and a
  networkx graph of one node per skeleton voxel), loading the file, as its
  own process;
- scikit-image's 3-D thinning alone (``skeletonize`` of the loaded volume),
  as its own process.

Wall time from outside each process; peak memory is the process's maximum
resident set (``RUSAGE_CHILDREN`` of a driver that runs only that
process). The command's share spent writing comes from its own progress
line (``writing``).

Usage::

    python benchmarks/bench_command.py [--size 512] [--fraction 0.15]

Targets (2-core machine, 512^3, about 15 % vessel): the command at most 0.15x
the reference route and at most 1.2x scikit-image's thinning alone, at most
15 % of its time writing, at most 12 bytes of peak memory per input voxel.
"""

from __future__ import annotations

import argparse
import json
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

from bench_analyze import ROUTE, make_volume  # noqa: E402

# Runs one command and reports its wall time and the peak memory of the
# process tree it waited for.
DRIVER = r"""
import json, resource, subprocess, sys, time
t0 = time.perf_counter()
proc = subprocess.run(sys.argv[1:], capture_output=True, text=True)
seconds = time.perf_counter() - t0
if proc.returncode != 0:
    sys.stderr.write(proc.stderr[-3000:])
    sys.exit(proc.returncode)
peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
print("RESULT " + json.dumps({"seconds": seconds, "peak_bytes": peak, "stdout": proc.stdout[-20000:],
                              "stderr": proc.stderr[-20000:]}))
"""

THIN = r"""
import sys
import numpy as np
from skimage.morphology import skeletonize
skel = skeletonize(np.load(sys.argv[1]))
print(int(skel.sum()))
"""


def timed(cmd):
    proc = subprocess.run([sys.executable, "-c", DRIVER, *cmd], capture_output=True, text=True)
    if proc.returncode != 0:
        raise RuntimeError(f"{cmd[:3]} failed:\n{proc.stderr[-3000:]}")
    line = [ln for ln in proc.stdout.splitlines() if ln.startswith("RESULT ")][-1]
    return json.loads(line[7:])


def steps_from(text):
    """Seconds per step from the command's progress lines (``vesselflow: STEP  N s``)."""
    out = {}
    for ln in text.splitlines():
        parts = ln.split()
        if len(parts) == 4 and parts[0] == "vesselflow:" and parts[3] == "s":
            try:
                out[parts[1]] = float(parts[2])
            except ValueError:
                pass
    return out


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--size", type=int, default=512)
    ap.add_argument("--fraction", type=float, default=0.15)
    args = ap.parse_args(argv)
    import numpy as np

    path = make_volume(args.size, args.fraction)
    mask = np.load(path, mmap_mode="r")
    n_vox = mask.size
    frac = float(np.count_nonzero(mask)) / n_vox
    del mask
    exe = shutil.which("vesselflow") or str(Path(sys.executable).with_name("vesselflow"))
    work = Path(tempfile.mkdtemp(prefix="bench-command-", dir=HERE / "_work"))
    try:
        ours = timed([exe, "analyze", str(path), "--spacing", "1", "1", "1", "-o", str(work / "out")])
        size = sum(f.stat().st_size for f in (work / "out").iterdir())
    finally:
        shutil.rmtree(work, ignore_errors=True)
    ref = timed([sys.executable, "-c", ROUTE, "reference", str(path)])
    thin = timed([sys.executable, "-c", THIN, str(path)])
    steps = steps_from(ours["stdout"] + ours["stderr"])
    writing = steps.get("writing", float("nan"))
    inside = sum(steps.values())
    r_ref = ours["seconds"] / ref["seconds"]
    r_thin = ours["seconds"] / thin["seconds"]
    share = writing / ours["seconds"]
    bpv = ours["peak_bytes"] / n_vox
    lines = [
        f"### vesselflow analyze, end to end, on a {args.size}^3 capillary bed ({frac:.1%} vessel)",
        "",
        "| route | wall time (s) | peak memory (MiB) | bytes per input voxel |",
        "|---|---|---|---|",
        f"| `vesselflow analyze` (start, read, analyse, write {size / 2**20:.0f} MiB) | {ours['seconds']:.1f} | "
        f"{ours['peak_bytes'] / 2**20:.0f} | {bpv:.1f} |",
        f"| reference (load, skeletonize, full EDT, voxel graph) | {ref['seconds']:.1f} | "
        f"{ref['peak_bytes'] / 2**20:.0f} | {ref['peak_bytes'] / n_vox:.1f} |",
        f"| scikit-image thinning alone (load, skeletonize) | {thin['seconds']:.1f} | "
        f"{thin['peak_bytes'] / 2**20:.0f} | {thin['peak_bytes'] / n_vox:.1f} |",
        "",
        f"Command / reference {r_ref:.2f} (target <= 0.15): {'met' if r_ref <= 0.15 else 'NOT met'}. "
        f"Command / thinning alone {r_thin:.2f} (target <= 1.2): {'met' if r_thin <= 1.2 else 'NOT met'}. "
        f"Writing {writing:.1f} s, {share:.0%} of the command (target <= 15 %): "
        f"{'met' if share <= 0.15 else 'NOT met'}. Memory {bpv:.1f} bytes per voxel (target <= 12): "
        f"{'met' if bpv <= 12 else 'NOT met'}.",
        f"Steps (s, from the progress lines): {json.dumps(steps)}; outside them (interpreter start, imports): "
        f"{ours['seconds'] - inside:.1f} s.",
        "",
    ]
    print("\n".join(lines))
    return 0


if __name__ == "__main__":
    sys.exit(main())
