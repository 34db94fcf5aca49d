"""Run every benchmark and write benchmarks/RESULTS.md.

Each benchmark script prints a markdown section measured against its own
reference route in the same run; this collects them with the machine's
description. Usage: ``python benchmarks/run.py [--quick]``.
"""

from __future__ import annotations

import argparse
import datetime as dt
import os
import platform
import subprocess
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent

# (script, full-size arguments, quick arguments)
BENCHES = [
    ("bench_analyze.py", ["--size", "512"], ["--size", "192"]),
    ("bench_command.py", ["--size", "512"], ["--size", "192"]),
    ("bench_thinning.py", [], ["--quick"]),
    ("bench_flow.py", ["--segments", "1000000", "--timeout", "120"], ["--segments", "20000"]),
    ("bench_batch.py", ["--size", "320"], ["--size", "96", "--samples", "4"]),
    ("bench_blockwise.py", ["--size", "768"], ["--size", "192", "--skip-speed"]),
    ("bench_accuracy.py", ["--seeds", "5"], ["--seeds", "1", "--strengths", "1", "--z-ratios", "1", "--tube-seeds", "1"]),
    ("bench_spheres.py", ["--seeds", "6"], ["--seeds", "1", "--z-steps", "3"]),
]


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes, for a smoke run")
    args = ap.parse_args(argv)
    sections = []
    for script, full, quick in BENCHES:
        path = HERE / script
        if not path.exists():
            continue
        cmd = [sys.executable, str(path), *(quick if args.quick else full)]
        print("running", " ".join(cmd[1:]), flush=True)
        proc = subprocess.run(cmd, capture_output=True, text=True)
        if proc.returncode != 0:
            sections.append(f"## {script}\n\nFAILED:\n\n```\n{proc.stderr[-3000:]}\n```\n")
        else:
            sections.append(f"## {script}\n\n{proc.stdout.strip()}\n")
    head = (
        "# Benchmark results\n\n"
        f"Run {dt.date.today().isoformat()} on {platform.machine()}, {os.cpu_count()} cores, "
        f"Python {platform.python_version()}{' (quick sizes)' if args.quick else ''}. "
        "Regenerate with `make bench`.\n\n"
    )
    if not args.quick:
        (HERE / "RESULTS.md").write_text(head + "\n".join(sections), encoding="utf-8")
    print(head + "\n".join(sections))
    return 0


if __name__ == "__main__":
    sys.exit(main())
