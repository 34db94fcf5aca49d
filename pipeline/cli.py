"""Command-line interface, a thin layer over the library API.

In: command-line arguments. Out: result folders, exit codes
(0 success, 2 bad input or usage with one clear line and nothing written,
1 unexpected failure).

Commands: ``analyze`` (one mask), ``batch`` (a whole study on Dask),
``report`` (figures and an HTML report of a result or batch folder),
``synth`` (a synthetic volume with its ground truth), ``score`` (a result
against a ground truth), ``demo`` (the bundled volumes), ``summarize`` (a result's summary, optionally with the review
applied), ``view`` (napari viewer and bifurcation review; imports napari only
when run).
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

from ._version import __version__
from .errors import ConfigError, InputError, VesselflowError

__all__ = ["main"]

# The library's errors name its Python parameters (VesselflowError.param) and
# its hints spell a call (``overwrite=True``); the command line shows its own
# options instead. Per command where one parameter name means different things.
_OPTION_OF = {"overwrite": "--overwrite", "spacing": "--spacing", "threshold": "--threshold",
              "scheduler": "--scheduler", "workers": "--workers", "threads": "--threads",
              "worker_timeout": "--worker-timeout", "memory_limit": "--memory-limit", "config": "--config"}
_OPTION_OF_COMMAND = {"analyze": {"mask": "MASK", "block_size": "--block-size", "dataset": "--dataset",
                                  "blockwise": "--blockwise"},
                      "view": {"path": "--screenshot", "node_id": "--bifurcation", "mask_path": "--mask",
                               "size": "--size"},
                      "report": {"mask": "--mask", "mask_path": "--mask"},
                      "synth": {"path": "--output", "artefacts": "--artefacts", "seed": "--seed",
                                "roughness": "--roughness", "specks": "--specks", "holes": "--holes",
                                "size_um": "--size", "shape_um": "--size"},
                      "score": {"path": "--output"}, "summarize": {"review": "--apply-review"}}
_HINT_OF = {"overwrite=True": "--overwrite", "spacing=(dz, dy, dx)": "--spacing Z Y X",
            "threshold=T": "--threshold T", "threshold=0": "--threshold 0", "mask_path=PATH": "--mask PATH",
            "dataset=NAME": "--dataset NAME"}


def _as_options(text):
    """A library message with the parameters in its hints spelled as options."""
    for call, option in _HINT_OF.items():
        text = text.replace(call, option)
    return text


def _message(exc, command=None):
    """One line for an error: its parameter as the command's option, hints as options."""
    param = getattr(exc, "param", None)
    option = _OPTION_OF_COMMAND.get(command, {}).get(param) or _OPTION_OF.get(param)
    return _as_options(f"{option}: {exc.detail}" if option else str(exc))


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
        print(f"vesselflow: warning: {_as_options(msg)}", file=sys.stderr, flush=True)

    def blocks(self, step, done, total):
        """Blocks of a block-wise step: one updating line on a terminal, else a line per tenth."""
        if self.quiet:
            return
        text = f"vesselflow: {step:<12} block {done}/{total}"
        if self.tty:
            print("\r" + text + ("\n" if done == total else ""), end="", file=sys.stderr, flush=True)
        elif done == total or done % max(1, total // 10) == 0:
            print(text, file=sys.stderr, flush=True)


class _BatchProgress:
    """The batch's progress for ``run_batch(progress=...)``.

    Counts on one terminal line, or plain log lines when not on a terminal.
    """

    def __init__(self, total, *, quiet=False, stream=None):
        self.total, self.quiet = total, quiet
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.done = self.failed = self.skipped = 0
        self.start = time.monotonic()
        self.pending_line = False  # a status line without its newline is on the terminal

    def __call__(self, kind, value=None):
        {"info": self.info, "sample": self.update, "warning": self.warn, "finish": lambda _: self.finish()}[kind](value)

    def _eta(self):
        # Skipped samples cost next to nothing: the rate is that of the analysed ones.
        left = self.total - self.done - self.failed - self.skipped
        if not left or not self.done + self.failed:
            return ""
        elapsed = time.monotonic() - self.start
        per = elapsed / max(1, self.done + self.failed)
        secs = per * left
        return f", ETA {int(secs // 60)}m{int(secs % 60):02d}s"

    def line(self):
        left = self.total - self.done - self.failed - self.skipped
        return (f"{self.done + self.skipped}/{self.total} done ({self.skipped} skipped), {self.failed} failed, "
                f"{left} left{self._eta()}")

    def update(self, rec):
        status = rec["status"]
        if status == "done":
            self.done += 1
        elif status == "skipped":
            self.skipped += 1
        else:
            self.failed += 1
        if self.quiet:
            return
        if self.tty:
            if status == "failed":
                self.info(f"{rec['sample_id']} failed in {rec['step']}: {rec['error']}")
            print(f"\rvesselflow batch: {self.line()}\x1b[K", end="", file=self.stream, flush=True)
            self.pending_line = True
        else:
            what = {"done": f"done in {rec['seconds']:.1f} s", "skipped": "skipped (complete result matches)",
                    "failed": f"failed in {rec['step']}: {rec['error']}"}[status]
            print(f"vesselflow batch: {rec['sample_id']} {what} [{self.line()}]", file=self.stream, flush=True)

    def info(self, msg):
        if not self.quiet:
            self.finish()
            print(f"vesselflow batch: {msg}", file=self.stream, flush=True)

    def warn(self, msg):
        self.finish()  # warnings show even with quiet
        print(f"vesselflow batch: warning: {_as_options(msg)}", file=self.stream, flush=True)

    def finish(self):
        if self.pending_line:
            print(file=self.stream, flush=True)
            self.pending_line = False


def _parser():
    p = argparse.ArgumentParser(prog="vesselflow", description="Measured vessel graphs from binary vessel masks.")
    p.add_argument("--version", action="version", version=f"vesselflow {__version__}")
    sub = p.add_subparsers(dest="command", required=True)

    a = sub.add_parser("analyze", help="analyse one mask into a result folder")
    a.add_argument("mask", help="mask file: .tif/.tiff, .ome.tif, .nii/.nii.gz, .npy, .npz, .h5/.hdf5, or a "
                                "Zarr / OME-Zarr store (.zarr)")
    a.add_argument("-o", "--output", required=True, help="result folder (must be empty unless --overwrite)")
    a.add_argument("--report", action="store_true", help="also write report.html and figures/ into the result")
    _common(a)
    g = a.add_argument_group("large volumes")
    g.add_argument("--blockwise", action="store_true",
                   help="analyse block by block, into one graph (default: only when the volume needs more than "
                        "the memory limit)")
    g.add_argument("--memory-limit", metavar="SIZE",
                   help="memory the analysis may use, all its processes together, e.g. 1.5GB (default: the "
                        "available memory); a volume that needs more is analysed block by block")
    g.add_argument("--block-size", type=int, metavar="N", help="edge of a block in voxels (even, at least 32; "
                                                                 "default: the largest the memory limit allows)")
    g.add_argument("--workers", type=int, metavar="N", help="block-wise: local Dask worker processes (default 1: "
                                                             "the blocks one after another in this process)")
    g.add_argument("--scheduler", metavar="ADDRESS",
                   help="block-wise: run the blocks on an existing Dask cluster, e.g. tcp://HOST:8786 (the "
                        "workers must see the mask file)")
    g.add_argument("--dataset", metavar="PATH", help="the array inside a Zarr store or HDF5 file that holds several "
                                                     "(or write MASK:/PATH)")

    r = sub.add_parser("report", help="figures and a self-contained report.html of a result or batch folder")
    r.add_argument("outdir", help="a result folder (from analyze) or a batch folder (from batch)")
    r.add_argument("--mask", help="mask file for the projection map (default: the input recorded in run.json)")
    r.add_argument("--overwrite", action="store_true", help="replace an existing report.html and figures/")
    r.add_argument("--quiet", action="store_true", help="no progress lines")

    from .synthetic import SYNTH_KINDS

    kinds = "\n".join(f"  {name:8s} {k.summary}" for name, k in SYNTH_KINDS.items())
    s = sub.add_parser("synth", help="write a synthetic volume and its ground truth",
                       formatter_class=argparse.RawDescriptionHelpFormatter, epilog="kinds:\n" + kinds)
    s.add_argument("kind", help="what to build: one of the kinds below")
    s.add_argument("-o", "--output", required=True,
                   help="output TIFF path, or an OME-Zarr store (.ome.zarr), written block by block")
    s.add_argument("--size", nargs=3, type=float, metavar=("Z", "Y", "X"),
                   help="extent in µm of the kinds built in a box (bed, cortex)")
    s.add_argument("--spacing", nargs=3, type=float, metavar=("Z", "Y", "X"), default=(1.0, 1.0, 1.0))
    s.add_argument("--seed", type=int, default=0)
    s.add_argument("--roughness", type=float, default=0.0)
    s.add_argument("--specks", type=int, default=0)
    s.add_argument("--holes", type=int, default=0)
    s.add_argument("--artefacts", type=float, default=0.0, metavar="STRENGTH",
                   help="the artefacts of real segmentations at a strength in [0, 1] (short-range wall roughness, "
                        "blobs, handles, holes, gaps in thin vessels, specks, plane jitter; 1: as hostile as real "
                        "stacks); --roughness, --specks and --holes, when given, override the preset's")
    s.add_argument("--overwrite", action="store_true")
    s.add_argument("--quiet", action="store_true", help="no progress lines")

    b = sub.add_parser("batch", help="analyse a whole study (a folder or a sample sheet) on Dask")
    b.add_argument("input", help="folder of mask files (groups = first sub-folders) or a sample sheet .csv "
                                 "(sample_id, path, group[, spacing_z, spacing_y, spacing_x, root])")
    b.add_argument("-o", "--output", required=True, help="batch folder (an earlier batch there is resumed)")
    b.add_argument("--config", help="YAML config file (defaults: configs/default.yaml)")
    b.add_argument("--workers", type=int, help="local worker processes (default: one per core)")
    b.add_argument("--scheduler", metavar="ADDRESS", help="run on an existing Dask cluster, e.g. tcp://HOST:8786")
    b.add_argument("--memory-limit", metavar="SIZE", help="memory per local worker, e.g. 6GB (default: the "
                                                          "available memory shared equally)")
    b.add_argument("--threads", type=int, help="threads per sample for the compiled steps "
                                               "(default: the worker's cores shared by its samples)")
    b.add_argument("--worker-timeout", type=float, default=120.0, metavar="SECONDS",
                   help="stop the batch (state 'cluster lost') when the cluster has had no worker this long "
                        "(default: 120)")
    b.add_argument("--force", action="store_true", help="redo samples that already have a matching result")
    b.add_argument("--overwrite", action="store_true", help="write into a non-empty folder that holds no batch")
    b.add_argument("--quiet", action="store_true", help="no progress lines")
    b.add_argument("--report", action="store_true",
                   help="also write the study report (report.html) and each sample's report, linked from it")

    d = sub.add_parser("demo", help="analyse the bundled synthetic volumes")
    d.add_argument("-o", "--output", default="results", help="folder for one result folder per volume")
    d.add_argument("--input-dir", default="synthetic_volumes")
    d.add_argument("--config", help="YAML config file")
    d.add_argument("--overwrite", action="store_true")
    d.add_argument("--quiet", action="store_true")
    d.add_argument("--report", action="store_true", help="also write each volume's report.html")

    c = sub.add_parser("score", help="score a result against the ground truth of a synthetic volume")
    c.add_argument("outdir", metavar="RESULT_DIR", help="result folder (from analyze)")
    c.add_argument("truth", metavar="TRUTH.json", help="the volume's ground truth, NAME.truth.json (from synth)")
    c.add_argument("-o", "--output", metavar="SCORE.json", help="also write the scores as JSON to this file "
                                                                "(outside the result folder)")
    c.add_argument("--overwrite", action="store_true", help="replace an existing score file")
    _review_parsers(sub)
    return p


def _review_parsers(sub):
    from .review import COLOUR_MEASURES

    m = sub.add_parser("summarize", help="print a result's summary, or recompute it with the review applied")
    m.add_argument("outdir", help="result folder")
    m.add_argument("--apply-review", action="store_true",
                   help="leave out the bifurcations marked 'artefact' in review.csv; writes summary_reviewed.json")
    m.add_argument("--overwrite", action="store_true", help="replace an existing summary_reviewed.json")

    v = sub.add_parser("view", help="inspect a result in napari and review its flagged bifurcations")
    v.add_argument("outdir", help="result folder")
    v.add_argument("--mask", help="mask file to show (default: the input recorded in run.json)")
    v.add_argument("--colour-by", default="radius", choices=tuple(COLOUR_MEASURES),
                   help="measure that colours the centrelines (default: radius)")
    v.add_argument("--bifurcation", type=int, metavar="NODE_ID", help="centre and zoom on this junction")
    v.add_argument("--screenshot", metavar="FILE.png", help="render a picture without a window, then exit")
    v.add_argument("--size", nargs=2, type=int, metavar=("W", "H"), default=(1024, 768),
                   help="width and height of the screenshot in pixels (default: 1024 768)")
    v.add_argument("--overwrite", action="store_true", help="replace an existing screenshot file")


def _common(a):
    a.add_argument("--spacing", nargs="+", type=float, metavar="S",
                   help="voxel spacing in µm: Z Y X (or Y X for 2-D); overrides the file's metadata")
    a.add_argument("--threshold", type=float, help="binarise an intensity or probability image at T (vessel > T)")
    a.add_argument("--config", help="YAML config file (defaults: configs/default.yaml)")
    a.add_argument("--overwrite", action="store_true", help="replace a non-empty output folder")
    a.add_argument("--quiet", action="store_true", help="no progress lines")
    f = a.add_argument_group("flow model")
    f.add_argument("--root", help="root for levels: auto (widest border end), node:ID, or Z,Y,X in µm "
                                  "(nearest node); a root given here is also a known inlet of the flow model")
    f.add_argument("--inlet", action="append", default=[], metavar="SPEC",
                   help="a known inlet (node:ID or Z,Y,X µm), at flow.inlet_pressure_pa; repeatable")
    f.add_argument("--outlet", action="append", default=[], metavar="SPEC",
                   help="a known outlet (node:ID or Z,Y,X µm), at flow.outlet_pressure_pa; repeatable")
    f.add_argument("--boundary", choices=("estimate", "pressure"),
                   help="ends cut by the volume: estimated from target pressure and shear stress (estimate, "
                        "default) or outlets at a fixed pressure (pressure)")
    f.add_argument("--blind-ends", choices=("open", "sealed", "outlet"),
                   help="blind ends inside the tissue: treated like cut ends (open, default), no flow (sealed) "
                        "or outlets")
    f.add_argument("--no-flow", action="store_true", help="skip the flow model")


def _load_cfg(args):
    from .config import load_config

    cfg = load_config(args.config) if args.config else load_config(None)
    if getattr(args, "threshold", None) is not None:
        cfg["input"]["threshold"] = args.threshold
    if getattr(args, "root", None) is not None:
        cfg["levels"]["root"] = args.root
    if getattr(args, "boundary", None) is not None:
        cfg["flow"]["boundary"] = args.boundary
    if getattr(args, "blind_ends", None) is not None:
        cfg["flow"]["blind_ends"] = args.blind_ends
    if getattr(args, "no_flow", False):
        cfg["flow"]["enabled"] = False
    return load_config(cfg)


def run_analyze(mask_path, output, *, spacing=None, config, overwrite, reporter, command=None, inlets=(),
                outlets=(), large=None):
    """Read, analyse and write one sample with progress lines; returns the output path.

    ``large``: the keyword options of :func:`pipeline.analysis.analyze_file`
    for volumes larger than memory (``blockwise``, ``memory_limit_bytes``, ...).
    """
    from .analysis import analyze_file

    out, result = analyze_file(mask_path, output, spacing=spacing, config=config, overwrite=overwrite,
                               inlets=inlets, outlets=outlets, progress=reporter.step, warn=reporter.warn,
                               run_info={"command": command}, block_progress=reporter.blocks, **(large or {}))
    reporter.info(f"wrote {out} ({len(result.segments)} segments, {len(result.nodes)} nodes)")
    return out


def _large_options(args):
    """The block-wise options of ``analyze`` as :func:`pipeline.analysis.analyze_file` keywords."""
    limit = None
    if args.memory_limit is not None:
        from dask.utils import parse_bytes

        try:
            limit = int(parse_bytes(args.memory_limit))
        except (ValueError, TypeError):
            raise InputError(f"expected a size such as 1.5GB or 800MB, got '{args.memory_limit}'",
                             param="memory_limit") from None
        if limit <= 0:
            raise InputError(f"expected a positive size, got '{args.memory_limit}'", param="memory_limit")
    if args.workers is not None and args.workers < 1:
        raise InputError(f"expected at least 1 worker, got {args.workers}", param="workers")
    blockwise = True if (args.blockwise or args.scheduler or args.workers or args.block_size) else None
    return {"blockwise": blockwise, "memory_limit_bytes": limit, "block_size": args.block_size,
            "workers": args.workers, "scheduler": args.scheduler, "dataset": args.dataset}


def _cmd_analyze(args):
    cfg = _load_cfg(args)
    rep = _Reporter(args.quiet)
    out = run_analyze(args.mask, args.output, spacing=args.spacing, config=cfg, overwrite=args.overwrite,
                      reporter=rep, command=sys.argv, inlets=args.inlet, outlets=args.outlet,
                      large=_large_options(args))
    if args.report:
        from .report import build_report

        t0 = time.perf_counter()
        page = build_report(out)
        rep.step("report", time.perf_counter() - t0)
        rep.info(f"wrote {page}")
    return 0


def _cmd_report(args):
    from .report import build_report

    page = build_report(args.outdir, mask_path=args.mask, overwrite=args.overwrite)
    _Reporter(args.quiet).info(f"wrote {page}")
    return 0


def _cmd_synth(args):
    from . import synthetic

    rep = _Reporter(args.quiet)
    out, shape = synthetic.write_synthetic(args.output, args.kind, spacing=tuple(args.spacing), seed=args.seed,
                                           artefacts=args.artefacts, roughness=args.roughness, specks=args.specks,
                                           holes=args.holes, overwrite=args.overwrite, size_um=args.size,
                                           progress=lambda done, total: rep.blocks("writing", done, total))
    rep.info(f"wrote {out} {shape} and its ground truth")
    return 0


def _cmd_batch(args):
    import logging

    from . import batch

    # The engine logs its own view of a lost connection or a closing worker,
    # in tracebacks, sometimes after the batch has returned; the batch says
    # what matters in one line, and this process ends with the command.
    import distributed  # noqa: F401  (its logging config sets levels on child loggers: set them after)

    for name in ["distributed", *[n for n in logging.root.manager.loggerDict if n.startswith("distributed.")]]:
        logging.getLogger(name).setLevel(logging.CRITICAL + 1)
    cfg = _load_cfg(args)
    samples = batch.collect_samples(args.input, exclude=args.output)
    res = batch.run_batch(samples, args.output, config=cfg, workers=args.workers, scheduler=args.scheduler,
                          force=args.force, overwrite=args.overwrite, memory_limit=args.memory_limit,
                          threads=args.threads, progress=_BatchProgress(len(samples), quiet=args.quiet),
                          input_label=str(Path(args.input).resolve()),
                          worker_timeout=args.worker_timeout)
    if args.report:
        from .report import build_report

        page = build_report(res.outdir, overwrite=True, sample_reports=True)
        _Reporter(args.quiet).info(f"wrote {page}")
    return 1 if res.n_failed else 0


def _cmd_demo(args):
    from . import tables

    src = Path(args.input_dir)
    files = sorted(p for p in src.glob("*.tif")) if src.is_dir() else []
    if not files:
        raise InputError(f"demo: expected .tif volumes in '{src}', found none")
    out = Path(args.output)
    if out.exists() and not out.is_dir():
        raise InputError(f"output '{out}': expected a folder, got an existing file")
    if out.is_dir() and any(out.iterdir()) and not args.overwrite:
        raise InputError(f"output folder '{out}' is not empty; pass --overwrite to replace the demo results in it")
    targets = [(f, out / f.name.split(".")[0]) for f in files]
    for f, target in targets:  # every refusal before any work
        tables.check_outdir(target, overwrite=args.overwrite, inputs=[f])
    cfg = _load_cfg(args)
    rep = _Reporter(args.quiet)
    out.mkdir(parents=True, exist_ok=True)
    for f, target in targets:
        rep.info(f"analysing {f.name}")
        res = run_analyze(f, target, config=cfg, overwrite=True, reporter=rep, command=sys.argv)
        if args.report:
            from .report import build_report

            rep.info(f"wrote {build_report(res, overwrite=True)}")
    return 0


def _cmd_summarize(args):
    import json

    from . import review, tables

    if not args.apply_review:
        print(json.dumps(tables.load_result(args.outdir).summary, indent=2))
        return 0
    out, changes = review.write_reviewed_summary(args.outdir, overwrite=args.overwrite)
    for key, before, after in changes:
        print(f"{key}: {after}" if before is None else f"{key}: {before} -> {after}")
    print(f"vesselflow: wrote {out}", file=sys.stderr)
    return 0


def _cmd_view(args):
    import os as _os

    from . import review, tables

    # clear errors before the slow napari import
    result = tables.load_result(args.outdir)
    if args.bifurcation is not None:
        review.check_bifurcation(result, args.bifurcation)
    if args.screenshot:
        tables.check_new_file(args.screenshot, suffix=".png", overwrite=args.overwrite)
    if sys.platform.startswith("linux") and not (_os.environ.get("DISPLAY") or _os.environ.get("WAYLAND_DISPLAY")):
        raise InputError("view: no display (DISPLAY is not set); on a machine without a screen run it under a "
                         "virtual one, for example: xvfb-run -a vesselflow view ...")
    try:
        from . import viewer
    except ImportError as exc:
        raise InputError(f"view: needs napari and a Qt 6 binding ({exc}); install them with: "
                         "pip install 'vesselflow[viewer]'") from None
    if args.screenshot:
        viewer.render_screenshot(args.outdir, args.screenshot, mask_path=args.mask, colour_by=args.colour_by,
                                 bifurcation=args.bifurcation, overwrite=args.overwrite,
                                 size=(args.size[1], args.size[0]))
        print(f"vesselflow: wrote {args.screenshot}", file=sys.stderr)
        return 0
    import napari

    v, panel = viewer.open_result(args.outdir, mask_path=args.mask, colour_by=args.colour_by, show=True)
    if args.bifurcation is not None:
        panel.goto(args.bifurcation)
    napari.run()
    return 0


def _cmd_score(args):
    from . import scoring

    if args.output:  # every refusal before any work
        scoring.check_score_file(args.output, result_dir=args.outdir, overwrite=args.overwrite)
    truth = scoring.load_truth(args.truth)
    s = scoring.score(args.outdir, truth)  # reads and checks the result folder
    print(scoring.format_score(s))
    if args.output:
        out = scoring.write_score(s, args.output, result_dir=args.outdir, truth_path=args.truth,
                                  overwrite=args.overwrite)
        print(f"vesselflow: wrote {out}", file=sys.stderr)
    return 0


def _quiet_stdout():
    """Point stdout at /dev/null, so that Python's flush at exit meets no closed pipe either."""
    import os

    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):
        pass


def main(argv=None):
    """Entry point of the ``vesselflow`` command; returns the exit code."""
    parser = _parser()
    args = parser.parse_args(argv)
    handlers = {"analyze": _cmd_analyze, "synth": _cmd_synth, "demo": _cmd_demo, "batch": _cmd_batch,
                "report": _cmd_report, "summarize": _cmd_summarize, "view": _cmd_view,
                "score": _cmd_score}
    try:
        return handlers[args.command](args)
    except BrokenPipeError:
        # the reader of our output went away (``vesselflow summarize DIR | head``): nothing more to say
        _quiet_stdout()
        return 0
    except (InputError, ConfigError) as exc:
        print(f"vesselflow: error: {_message(exc, args.command)}", file=sys.stderr)
        return 2
    except VesselflowError as exc:
        print(f"vesselflow: failed: {_message(exc, args.command)}", file=sys.stderr)
        return 1
    except OSError as exc:  # the environment (disk, permissions) rather than a bug: one line, no traceback
        where = f" '{exc.filename}'" if exc.filename else ""
        print(f"vesselflow: failed: cannot access{where}: {exc.strerror or exc}", file=sys.stderr)
        return 1
    except MemoryError:
        print(f"vesselflow: failed: not enough memory for '{args.command}'; crop or downsample the input, or use "
              "a machine with more memory", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        if args.command == "batch":
            print("vesselflow: interrupted; finished samples are kept, run the same command again to resume",
                  file=sys.stderr)
        else:
            print("vesselflow: interrupted; nothing was written", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
