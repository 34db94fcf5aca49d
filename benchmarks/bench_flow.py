"""Speed of the network flow solve against a direct reference route.

The graph is a synthetic capillary bed of about ``--segments`` segments, in
the form the graph step produces: a cubic lattice of nodes 50 µm apart in
which each bond is kept with probability ``--keep`` (0.5 by default, mean
degree about 3, well above the bond-percolation threshold of about 0.25 of
the cubic lattice, so most of it is one connected piece), chains through
degree-2 nodes merged into single segments (lengths add, the hydraulic
radius combines as ``L / r_h^4 = sum l / r^4``), border stubs on the two
z faces (inlets at the bottom face, outlets at the top), blind ends where a
node kept a single bond, and small disconnected pieces left as they are.
Bond radii are uniform in 2-8 µm and lengths in 20-80 µm.

Routes, each in its own subprocess (wall time and peak memory are its own):

- ``vesselflow``: :func:`pipeline.flow.solve_flow` with fixed pressures
  (``boundary: pressure``), constant viscosity, one haematocrit and no
  ensemble, that is the linear solve alone (``solver: auto``; CG with Jacobi
  preconditioning above ``cg_threshold_nodes`` unknowns), including table
  output.
- ``estimate``: the same with every cut end estimated (``boundary:
  estimate``, Fry et al. 2012; nothing known), the default boundary
  conditions. Target: at most 3x the ``vesselflow`` route at one million
  segments.
- ``reference``: the textbook route on the same arrays and boundary
  conditions (inlets at the inlet pressure, every other cut or blind end at
  the outlet pressure), the full node Laplacian with Dirichlet rows replaced
  by identity rows and nodes without any pressure condition pinned, solved with ``scipy.sparse.linalg.spsolve``
  (SuperLU, default ordering). It is stopped after ``--timeout`` seconds
  and runs under an address-space limit of ``--ref-memory-gb`` (its fill-in
  grows fast; failing is better than swapping a shared machine).

Usage::

    python benchmarks/bench_flow.py [--segments 1000000] [--timeout 600] [--ref-memory-gb 8]

Prints a markdown table (the lead collects it). Target: the vesselflow
route at most 10 s for one million segments on a 2-core machine.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
ROOT = HERE.parent

ROUTE = r"""
import json, resource, sys, time
import numpy as np
import pandas as pd
data = np.load(sys.argv[2])
route = sys.argv[1]
t0 = time.perf_counter()
if route in ("vesselflow", "estimate"):
    from pipeline.flow import solve_flow
    segs = pd.DataFrame({
        "segment_id": np.arange(len(data["u"])), "node_from": data["u"], "node_to": data["v"],
        "length_um": data["length_um"], "radius_um": data["radius_um"],
        "radius_hydraulic_um": data["radius_hydraulic_um"],
    })
    nodes = pd.DataFrame({"node_id": np.arange(len(data["kind"])), "kind": data["kind"].astype(str)})
    t0 = time.perf_counter()
    # the linear solve alone: constant viscosity, one haematocrit, no ensemble
    plain = {"viscosity_model": "constant", "haematocrit_model": "uniform", "ensemble_size": 0}
    if route == "vesselflow":
        res = solve_flow(segs, nodes, inlets=data["inlets"], **{**plain, "boundary": "pressure"})
    else:  # every cut end estimated (Fry et al. 2012), nothing known
        res = solve_flow(segs, nodes, **{**plain, "boundary": "estimate"})
    seconds = time.perf_counter() - t0
    p = res.nodes["pressure_pa"].to_numpy()
    out = {"summary": {k: res.summary[k] for k in ("solver", "solver_iterations", "n_unknowns",
                                                   "max_conservation_residual", "total_inflow_nl_min")}}
else:
    limit = int(float(sys.argv[4]) * 2**30)
    resource.setrlimit(resource.RLIMIT_AS, (limit, limit))  # fail, don't swap the machine
    import scipy.sparse as sp
    from scipy.sparse.linalg import spsolve
    u, v = data["u"], data["v"]
    n = len(data["kind"])
    mu = 3.5e-3
    g = np.pi * (data["radius_hydraulic_um"] * 1e-6) ** 4 / (8 * mu * data["length_um"] * 1e-6)
    keep = u != v
    u, v, g = u[keep], v[keep], g[keep]
    lap = sp.coo_matrix((np.r_[g, g, -g, -g], (np.r_[u, v, u, v], np.r_[u, v, v, u])), shape=(n, n)).tocsr()
    kind = data["kind"].astype(str)
    fixed = np.zeros(n, bool)
    fixed[data["inlets"]] = True
    # every other open end, cut or blind, is an outlet, as in solve_flow's
    # fixed-pressure mode with its default blind_ends: open (the pressures
    # compared below differed by the whole drop at blind ends while the
    # reference sealed them)
    ends = (kind == "border") | (kind == "blind")
    fixed |= ends
    p_in, p_out = 7999.32, 2666.44
    rhs = np.zeros(n)
    rhs[ends] = p_out
    rhs[data["inlets"]] = p_in
    # Pin nodes of pieces without a pressure condition (else singular).
    from scipy.sparse.csgraph import connected_components
    _, comp = connected_components(lap, directed=False)
    has = np.zeros(comp.max() + 1, bool)
    has[comp[fixed]] = True
    pin = fixed | ~has[comp]
    keep_rows = sp.diags((~pin).astype(float)) @ lap
    a = (keep_rows + sp.diags(pin.astype(float))).tocsc()
    p = spsolve(a, rhs)
    p[~has[comp]] = np.nan
    seconds = time.perf_counter() - t0
    out = {}
np.save(sys.argv[3], p)
out["seconds"] = seconds
out["peak_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
print(json.dumps(out))
"""


def capillary_bed(n_segments: int, *, keep: float = 0.5, seed: int = 0) -> dict[str, np.ndarray]:
    """Synthetic pipeline-like network of about ``n_segments`` segments.

    Returns
    -------
    dict of ndarray
        ``u``, ``v`` (S,) node ids; ``length_um``, ``radius_um``,
        ``radius_hydraulic_um`` (S,); ``kind`` (N,) str; ``inlets`` (K,).
    """
    rng = np.random.default_rng(seed)
    # Merging degree-2 chains leaves about 0.84 segments per kept bond at keep 0.5.
    n = max(3, int(round((n_segments / (3 * keep * 0.84)) ** (1 / 3))))
    idx = np.arange(n**3).reshape(n, n, n)
    bonds = [np.stack([np.take(idx, range(n - 1), axis=ax).ravel(),
                       np.take(idx, range(1, n), axis=ax).ravel()], 1) for ax in range(3)]
    bonds = np.concatenate(bonds)
    # Stubs through the z faces: bottom ones are inlets, top ones outlets.
    bottom, top = idx[0].ravel(), idx[-1].ravel()
    stub_nodes = np.arange(n**3, n**3 + 2 * n * n)
    stubs = np.stack([np.r_[bottom, top], stub_nodes], 1)
    bonds = np.concatenate([bonds, stubs])
    bonds = bonds[rng.random(len(bonds)) < keep]
    n_all = n**3 + 2 * n * n
    length = rng.uniform(20.0, 80.0, len(bonds))
    radius = rng.uniform(2.0, 8.0, len(bonds))
    deg = np.bincount(bonds.ravel(), minlength=n_all)
    is_stub = np.zeros(n_all, bool)
    is_stub[stub_nodes] = True
    chain = (deg == 2) & ~is_stub
    # Bonds meeting at a chain node belong to one segment.
    from scipy import sparse
    from scipy.sparse.csgraph import connected_components

    b_id = np.arange(len(bonds))
    ends = np.r_[bonds[:, 0], bonds[:, 1]]
    owner = np.r_[b_id, b_id]
    at_chain = chain[ends]
    order = np.argsort(ends[at_chain], kind="stable")
    pairs = owner[at_chain][order].reshape(-1, 2)
    link = sparse.coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])), shape=(len(bonds),) * 2)
    n_seg, seg_of = connected_components(link, directed=False)
    # Segment end nodes: bond ends that are not chain nodes (two per segment;
    # closed chains without any have none and are dropped).
    term = ~at_chain
    t_seg, t_node = seg_of[owner[term]], ends[term]
    order = np.argsort(t_seg, kind="stable")
    t_seg, t_node = t_seg[order], t_node[order]
    count = np.bincount(t_seg, minlength=n_seg)
    ok = count == 2
    first = np.r_[0, np.cumsum(count)[:-1]]
    seg_u = np.full(n_seg, -1)
    seg_v = np.full(n_seg, -1)
    seg_u[ok] = t_node[first[ok]]
    seg_v[ok] = t_node[first[ok] + 1]
    seg_len = np.bincount(seg_of, weights=length, minlength=n_seg)
    seg_inv4 = np.bincount(seg_of, weights=length / radius**4, minlength=n_seg)
    seg_rl = np.bincount(seg_of, weights=length * radius, minlength=n_seg)
    u, v = seg_u[ok], seg_v[ok]
    seg_len, seg_inv4, seg_rl = seg_len[ok], seg_inv4[ok], seg_rl[ok]
    used = np.unique(np.r_[u, v])
    remap = np.full(n_all, -1)
    remap[used] = np.arange(len(used))
    kind = np.where(deg[used] == 1, "blind", "junction").astype("<U8")
    kind[is_stub[used]] = "border"
    inlet_old = stub_nodes[: n * n]
    inlets = remap[inlet_old[remap[inlet_old] >= 0]]
    return {
        "u": remap[u], "v": remap[v], "length_um": seg_len,
        "radius_um": seg_rl / seg_len, "radius_hydraulic_um": (seg_len / seg_inv4) ** 0.25,
        "kind": kind, "inlets": inlets,
    }


def run_route(route: str, graph: Path, timeout: float, memory_gb: float) -> dict:
    out = graph.with_name(f"p_{route}.npy")
    env = dict(os.environ, PYTHONPATH=str(ROOT) + os.pathsep + os.environ.get("PYTHONPATH", ""))
    t0 = time.perf_counter()
    try:
        proc = subprocess.run([sys.executable, "-c", ROUTE, route, str(graph), str(out), str(memory_gb)],
                              capture_output=True, text=True, timeout=timeout, env=env, check=False)
    except subprocess.TimeoutExpired:
        return {"timeout": True, "seconds": time.perf_counter() - t0}
    if proc.returncode != 0:
        if route == "reference":  # most often the memory limit; say what happened
            lines = proc.stderr.strip().splitlines()
            why = lines[-1][:80] if lines else f"exit status {proc.returncode}"
            return {"failed": why, "seconds": time.perf_counter() - t0}
        raise RuntimeError(f"route {route} failed:\n{proc.stderr}")
    res = json.loads(proc.stdout.strip().splitlines()[-1])
    res["pressure"] = np.load(out)
    return res


def main(argv: list[str] | None = None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--segments", type=int, default=1_000_000, help="approximate number of segments")
    ap.add_argument("--keep", type=float, default=0.5, help="bond keep probability of the lattice")
    ap.add_argument("--timeout", type=float, default=600.0, help="seconds before a route is stopped")
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--ref-memory-gb", type=float, default=8.0,
                    help="address-space limit of the reference route, GiB")
    ap.add_argument("--no-reference", action="store_true", help="time the vesselflow routes only")
    ap.add_argument("--no-estimate", action="store_true", help="skip the boundary-estimate route")
    args = ap.parse_args(argv)

    t0 = time.perf_counter()
    g = capillary_bed(args.segments, keep=args.keep, seed=args.seed)
    t_gen = time.perf_counter() - t0
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "graph.npz"
        np.savez(path, **g)
        ours = run_route("vesselflow", path, args.timeout, args.ref_memory_gb)
        est = None if args.no_estimate else run_route("estimate", path, args.timeout, args.ref_memory_gb)
        ref = None if args.no_reference else run_route("reference", path, args.timeout, args.ref_memory_gb)

    s_count, n_count = len(g["u"]), len(g["kind"])
    print(f"### Flow solve, synthetic capillary bed ({s_count:,} segments, {n_count:,} nodes, "
          f"{os.cpu_count()} CPU(s); graph built in {t_gen:.1f} s)\n")
    print("| route | solver | unknowns | iterations | time (s) | peak memory (MiB) | max rel. conservation residual |")
    print("| --- | --- | ---: | ---: | ---: | ---: | ---: |")

    def mib(r):
        return f"{r['peak_bytes'] / 2**20:.0f}" if "peak_bytes" in r else "-"

    def route_row(label, result, solver=None):
        if result.get("timeout"):
            print(f"| {label} | - | - | - | > {args.timeout:.0f} (stopped) | - | - |")
            return
        sm = result["summary"]
        res_txt = "-" if sm["max_conservation_residual"] is None else f"{sm['max_conservation_residual']:.1e}"
        its = sm["solver_iterations"] if sm["solver_iterations"] is not None else "-"
        print(f"| {label} | {solver or sm['solver']} | {sm['n_unknowns']:,} | {its} | "
              f"{result['seconds']:.2f} | {mib(result)} | {res_txt} |")

    route_row("vesselflow `solve_flow`", ours)
    if est is not None:
        route_row("vesselflow, boundary estimate (sign iterations)", est, "KKT, SuperLU in METIS order")
    if ref is not None:
        if ref.get("timeout"):
            print(f"| reference: full Laplacian + `spsolve` | SuperLU | {n_count:,} | - | "
                  f"> {args.timeout:.0f} (stopped) | - | - |")
        elif ref.get("failed"):
            print(f"| reference: full Laplacian + `spsolve` | SuperLU | {n_count:,} | - | "
                  f"failed after {ref['seconds']:.0f} s ({ref['failed']}) | "
                  f"limit {args.ref_memory_gb * 1024:.0f} | - |")
        else:
            print(f"| reference: full Laplacian + `spsolve` | SuperLU | {n_count:,} | - | "
                  f"{ref['seconds']:.2f} | {mib(ref)} | - |")
    print()
    if ref is not None and "pressure" in ref and "pressure" in ours:
        a, b = ours["pressure"], ref["pressure"]
        both = np.isfinite(a) & np.isfinite(b)
        span = 7999.32 - 2666.44
        diff = float(np.abs(a[both] - b[both]).max() / span) if both.any() else float("nan")
        print(f"Largest pressure difference between the routes: {diff:.1e} of the inlet-outlet drop.")
        print(f"Speed-up over the reference: {ref['seconds'] / ours['seconds']:.1f}x.")
    if est is not None and not ours.get("timeout"):
        if est.get("timeout"):
            print(f"Boundary estimate: stopped after {args.timeout:.0f} s; target (<= 3x the plain solve): NOT met.")
        else:
            ratio = est["seconds"] / ours["seconds"]
            verdict = ("met" if ratio <= 3 else "NOT met") if s_count >= 900_000 else "not judged below 1M segments"
            print(f"Boundary estimate / plain solve: {ratio:.1f}x (target <= 3x at 1M segments: {verdict}).")
    if not ours.get("timeout"):
        verdict = "met" if ours["seconds"] <= 10.0 else "NOT met"
        if s_count >= 900_000:
            print(f"Target (<= 10 s for 1M segments): {verdict}.")
    return 0


if __name__ == "__main__":
    sys.exit(main())
