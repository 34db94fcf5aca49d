"""Shared fixtures: synthetic volumes with ground truth, analysed once per module."""

import numpy as np
import pytest

import pipeline
from pipeline import scoring, synthetic


@pytest.fixture(scope="session")
def broken_tree_result(tmp_path_factory):
    """A result folder of a Murray tree with half its junctions broken on purpose, so several are flagged.

    Analysed once through the command line; tests that write into it take a copy.
    """
    from pipeline.cli import main

    root = tmp_path_factory.mktemp("broken-tree")
    net = synthetic.binary_tree(depth=3, root_radius_um=5.0, exponent=3.0, seed=3, broken_fraction=0.5,
                                broken_ratio=0.95, min_radius_um=2.0)
    mask, _ = synthetic.rasterize(net, spacing=(1.0, 1.0, 1.0))
    np.save(root / "tree.npy", mask)
    out = root / "tree"
    assert main(["analyze", str(root / "tree.npy"), "-o", str(out), "--spacing", "1", "1", "1", "--quiet",
                 "--blind-ends", "outlet"]) == 0
    return out


@pytest.fixture(scope="session")
def analyse():
    """Rasterise a network and analyse it; cached per argument set.

    The builder itself is part of the key: two modules may use one name for
    different networks (a shared "tree" key once handed one module the
    other's tree, so the outcome hung on the order the modules ran in).
    """
    cache = {}

    def run(key, build, *, spacing=(1.0, 1.0, 1.0), config=None, **raster):
        k = (key, build, tuple(spacing), repr(sorted(raster.items())), repr(config))
        if k not in cache:
            mask, truth = synthetic.rasterize(build(), spacing=spacing, **raster)
            cache[k] = (mask, truth, pipeline.analyze(mask, spacing=spacing, config=config))
        return cache[k]

    return run


def junction_f1(truth, result):
    """F1 of junction detection by the project's scorer (:func:`pipeline.scoring.score`:
    optimal one-to-one matching within the largest radius of the vessels meeting there)."""
    return scoring.score(result, truth)["junction_f1"] or 0.0


def radius_errors(truth, result):
    """Relative radius error (measured / true - 1) of every scored true segment, by the scorer
    (length-weighted along each segment's interior, away from its junctions)."""
    per = scoring.score(result, truth)["radius_per_segment"]
    return np.asarray([e["rel_error"] for e in per if e["status"] == "scored"])


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


def _free_port():
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_dask_processes(workers=1, worker_args=()):
    """A Dask scheduler and ``workers`` workers started as separate processes on loopback, as on a lab's cluster.

    Returns the scheduler's address, its process and the worker processes;
    :func:`stop_processes` ends them.
    """
    import socket
    import subprocess
    import sys
    import time

    port = _free_port()

    def start(*args):
        return subprocess.Popen([sys.executable, "-m", *args], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                                start_new_session=True)

    sched = start("distributed.cli.dask_scheduler", "--host", "127.0.0.1", "--port", str(port), "--no-dashboard")
    deadline = time.monotonic() + 60
    while True:
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1).close()
            break
        except OSError:
            assert time.monotonic() < deadline, "the scheduler did not start"
            time.sleep(0.2)
    address = f"tcp://127.0.0.1:{port}"
    procs = [start("distributed.cli.dask_worker", address, "--nthreads", "1", "--no-dashboard", *worker_args)
             for _ in range(workers)]
    return address, sched, procs


def stop_processes(procs):
    for p in procs:
        if p.poll() is None:
            p.kill()
        p.wait(timeout=30)
