"""Pictures of the reports and the viewer for the README, made from the demo study.

Runs the demo study (``synthetic_volumes/tw-study.csv``) through ``vesselflow
batch --report`` into a scratch folder, renders the top of the study report and
of one sample's report in headless Chromium at 1300 px, and takes a viewer
screenshot of that sample's most severe flagged junction (under ``xvfb-run``
when there is no display). Writes ``docs/screenshots/*.png``; run it with
``make screenshots`` after a change that shows.

Needs chromium and, for the viewer, napari with Xvfb (``.ci/run`` installs
them).
"""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

import pandas as pd
from PIL import Image

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "docs" / "screenshots"
SAMPLE = "tw-trt-01"
WIDTH, HEIGHT = 1300, 1500  # the part of a page a reader sees first, at a common laptop width


def _run(cmd, **kw):
    print("+", " ".join(str(c) for c in cmd), flush=True)
    subprocess.run([str(c) for c in cmd], check=True, **kw)


def _page(chromium, html, png, tmp):
    full = tmp / "page.png"
    _run([chromium, "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
          f"--user-data-dir={tmp / 'profile'}", f"--window-size={WIDTH},{HEIGHT}", f"--screenshot={full}",
          html.as_uri()], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    Image.open(full).convert("RGB").save(png, optimize=True)


def main():
    chromium = shutil.which("chromium") or shutil.which("chromium-browser")
    if chromium is None:
        sys.exit("make_screenshots: chromium is needed (Debian: apt-get install chromium)")
    vesselflow = Path(sys.executable).with_name("vesselflow")
    OUT.mkdir(parents=True, exist_ok=True)
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        # A copy of the demo volumes in a folder of neutral name: the reports
        # show the mask files' paths, and the pictures go into the repository.
        demo = tmp / "demo-study"
        shutil.copytree(ROOT / "synthetic_volumes", demo)
        study = tmp / "results"
        _run([vesselflow, "batch", "demo-study/tw-study.csv", "-o", "results", "--report", "--quiet",
              "--workers", "2", "--config", ROOT / "configs" / "tumour-window-demo.yaml"], cwd=tmp)
        _page(chromium, study / "report.html", OUT / "study-report.png", tmp)
        _page(chromium, study / SAMPLE / "report.html", OUT / "sample-report.png", tmp)
        b = pd.read_csv(study / SAMPLE / "bifurcations.csv")
        b = b[b["flagged"].astype(bool)].sort_values("severity", ascending=False)
        view = [vesselflow, "view", study / SAMPLE, "--screenshot", OUT / "viewer.png", "--overwrite",
                "--size", "1200", "800"]
        if len(b):
            view += ["--bifurcation", int(b["node_id"].iloc[0])]
        if not os.environ.get("DISPLAY") and shutil.which("xvfb-run"):
            view = ["xvfb-run", "-a", "-s", "-screen 0 1600x1200x24"] + view
        _run(view, env={**os.environ, "LIBGL_ALWAYS_SOFTWARE": "1"})
    print(f"make_screenshots: wrote {', '.join(p.name for p in sorted(OUT.glob('*.png')))} in {OUT}")


if __name__ == "__main__":
    main()
