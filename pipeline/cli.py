"""Command-line interface, a thin layer over the library API.

In: command-line arguments. Out: result folders, exit codes
(0 success, 2 bad input or usage with one clear line and nothing written,
1 unexpected failure).

Commands: ``analyze`` (one mask), ``synth`` (a synthetic volume with its
ground truth), ``demo`` (the bundled volumes).
"""

from __future__ import annotations

import argparse
import datetime as _dt
import platform
import sys
import time
from pathlib import Path

from . import __version__
from .errors import ConfigError, InputError, VesselflowError

__all__ = ["main"]


class _Reporter:
    def __init__(self, quiet):
        self.quiet = quiet
        self.tty = sys.stderr.isatty()

    def step(self, name, seconds):
        if not self.quiet:
            print(f"vesselflow: {name:<12} {seconds:7.2f} s", file=sys.stderr, flush=True)

    def info(self, msg):
        if not self.quiet:
            print(f"vesselflow: {msg}", file=sys.stderr, flush=True)

    def warn(self, msg):
        print(f"vesselflow: warning: {msg}", file=sys.stderr, flush=True)


def _parser():
    p = argparse.ArgumentParser(prog="vesselflow", description="Measured vessel graphs from binary vessel masks.")
    p.add_argument("--version", action="version", version=f"vesselflow {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    a = sub.add_parser("analyze", help="analyse one mask into a result folder")
    a.add_argument("mask", help="mask file: .tif/.tiff, .ome.tif, .nii/.nii.gz, .npy, .npz")
    a.add_argument("-o", "--output", required=True, help="result folder (must be empty unless --overwrite)")
    _common(a)

    s = sub.add_parser("synth", help="write a synthetic volume and its ground truth")
    s.add_argument("kind", help="what to build (see --help of the synthetic module)")
    s.add_argument("-o", "--output", required=True, help="output TIFF path")
    s.add_argument("--spacing", nargs=3, type=float, metavar=("Z", "Y", "X"), default=(1.0, 1.0, 1.0))
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--roughness", type=float, default=0.0)
    s.add_argument("--specks", type=int, default=0)
    s.add_argument("--holes", type=int, default=0)
    s.add_argument("--overwrite", action="store_true")

    d = sub.add_parser("demo", help="analyse the bundled synthetic volumes")
    d.add_argument("-o", "--output", default="results", help="folder for one result folder per volume")
    d.add_argument("--input-dir", default="synthetic_volumes")
    d.add_argument("--config", help="YAML config file")
    d.add_argument("--overwrite", action="store_true")
    d.add_argument("--quiet", action="store_true")
    return p


def _common(a):
    a.add_argument("--spacing", nargs="+", type=float, metavar="S",
                   help="voxel spacing in µm: Z Y X (or Y X for 2-D); overrides the file's metadata")
    a.add_argument("--threshold", type=float, help="binarise an intensity or probability image at T (vessel > T)")
    a.add_argument("--config", help="YAML config file (defaults: configs/default.yaml)")
    a.add_argument("--overwrite", action="store_true", help="replace a non-empty output folder")
    a.add_argument("--quiet", action="store_true", help="no progress lines")
    f = a.add_argument_group("flow model")
    f.add_argument("--root", help="root for levels and the main inlet: auto (widest border end), node:ID, "
                                  "or Z,Y,X in µm (nearest node)")
    f.add_argument("--inlet", action="append", default=[], metavar="SPEC",
                   help="another inlet (node:ID or Z,Y,X µm); repeatable")
    f.add_argument("--outlet", action="append", default=[], metavar="SPEC",
                   help="a named outlet (node:ID or Z,Y,X µm); repeatable; default: ends cut by the border")
    f.add_argument("--blind-ends", choices=("sealed", "outlet"),
                   help="blind ends inside the tissue carry no flow (sealed, default) or are outlets")
    f.add_argument("--no-flow", action="store_true", help="skip the flow model")


def _load_cfg(args):
    from .config import load_config

    cfg = load_config(args.config) if args.config else load_config(None)
    if getattr(args, "threshold", None) is not None:
        cfg["input"]["threshold"] = args.threshold
    if getattr(args, "root", None) is not None:
        cfg["levels"]["root"] = args.root
    if getattr(args, "blind_ends", None) is not None:
        cfg["flow"]["blind_ends"] = args.blind_ends
    if getattr(args, "no_flow", False):
        cfg["flow"]["enabled"] = False
    return load_config(cfg)


def run_analyze(mask_path, output, *, spacing=None, config, overwrite, reporter, command=None, inlets=(),
                outlets=()):
    """Read, analyse and write one sample; returns the output path."""
    from . import reading, tables
    from .analysis import analyze

    tables.check_outdir(output, overwrite=overwrite)
    t0 = time.perf_counter()
    limit = None
    if config["input"]["max_memory_gb"] is not None:
        limit = int(config["input"]["max_memory_gb"] * 2**30)
    img = reading.read_mask(mask_path, spacing=spacing, threshold=config["input"]["threshold"],
                            memory_limit_bytes=limit)
    for w in img.warnings:
        reporter.warn(w)
    reporter.step("reading", time.perf_counter() - t0)
    result = analyze(img.mask, spacing=img.spacing, config=config, planar=img.planar, inlets=inlets,
                     outlets=outlets, progress=reporter.step)
    for w in result.run["warnings"]:
        reporter.warn(w)
    result.run["timings_s"] = {"reading": round(time.perf_counter() - t0 - sum(result.run["timings_s"].values()), 4),
                               **result.run["timings_s"]}
    result.run["warnings"] = list(img.warnings) + list(result.run["warnings"])
    info = {
        "vesselflow_version": __version__,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        "command": command,
        "input": {"path": str(Path(mask_path).resolve()), "sha256": img.sha256, "dtype": img.original_dtype,
                  "axes": img.axes_found},
        "spacing_um": list(img.spacing),
        "spacing_source": img.spacing_source,
        "python": platform.python_version(),
    }
    out = tables.write_result(result, output, run_info=info, overwrite=overwrite)
    reporter.info(f"wrote {out} ({len(result.segments)} segments, {len(result.nodes)} nodes)")
    return out


def _cmd_analyze(args):
    cfg = _load_cfg(args)
    rep = _Reporter(args.quiet)
    run_analyze(args.mask, args.output, spacing=args.spacing, config=cfg, overwrite=args.overwrite,
                reporter=rep, command=sys.argv, inlets=args.inlet, outlets=args.outlet)
    return 0


def _cmd_synth(args):
    from . import synthetic

    out = Path(args.output)
    if out.exists() and not args.overwrite:
        raise InputError(f"output '{out}' exists; pass --overwrite to replace it")
    if args.kind not in synthetic.SYNTH_KINDS:
        raise InputError(f"synth kind: expected one of {', '.join(synthetic.SYNTH_KINDS)}, got '{args.kind}'")
    out.parent.mkdir(parents=True, exist_ok=True)
    mask, truth = synthetic.synthesize(args.kind, spacing=tuple(args.spacing), seed=args.seed,
                                       roughness=args.roughness, specks=args.specks, holes=args.holes)
    synthetic.write_volume(out, mask, spacing=tuple(args.spacing), truth=truth)
    print(f"vesselflow: wrote {out} {mask.shape} and its ground truth", file=sys.stderr)
    return 0


def _cmd_demo(args):
    from . import tables

    src = Path(args.input_dir)
    files = sorted(p for p in src.glob("*.tif")) if src.is_dir() else []
    if not files:
        raise InputError(f"demo: expected .tif volumes in '{src}', found none")
    out = Path(args.output)
    tables.check_outdir(out, overwrite=args.overwrite)
    cfg = _load_cfg(args)
    rep = _Reporter(args.quiet)
    out.mkdir(parents=True, exist_ok=True)
    for f in files:
        rep.info(f"analysing {f.name}")
        run_analyze(f, out / f.name.split(".")[0], config=cfg, overwrite=True, reporter=rep, command=sys.argv)
    return 0


def main(argv=None):
    """Entry point of the ``vesselflow`` command; returns the exit code."""
    parser = _parser()
    args = parser.parse_args(argv)
    handlers = {"analyze": _cmd_analyze, "synth": _cmd_synth, "demo": _cmd_demo}
    try:
        return handlers[args.command](args)
    except (InputError, ConfigError) as exc:
        print(f"vesselflow: error: {exc}", file=sys.stderr)
        return 2
    except VesselflowError as exc:
        print(f"vesselflow: failed: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("vesselflow: interrupted; nothing was written", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
