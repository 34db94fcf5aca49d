"""Batch processing of a whole study on Dask.

In: a folder of mask files or a sample sheet CSV (``sample_id, path, group``
and optionally ``spacing_z, spacing_y, spacing_x``, ``root``), a config.
Out: one result folder per sample under ``OUTDIR/<sample_id>/`` (exactly as
:func:`pipeline.analysis.analyze_file` writes it) and the study tables:

- ``failures.csv``: ``sample_id, path, step, error`` of every failed sample;
- ``cohort_summary.csv``: one row per analysed sample, its group and every
  summary measure (reviewed where a ``review.csv`` exists);
- ``cohort_segments.parquet``, ``cohort_bifurcations.parquet``: every
  sample's rows with ``sample_id`` and ``group`` columns;
- ``group_comparison.csv``: per science measure (:data:`SCIENCE_MEASURES`:
  densities per mm³ of imaged tissue, never raw counts; the network Murray
  exponent, radius, tortuosity, flow and shear by diameter class, tissue
  distances) and pair of groups: n, mean, sd, median, the Hodges-Lehmann
  shift with its distribution-free interval, Cliff's delta, a Mann-Whitney
  U test and its Benjamini-Hochberg q-value across the pair's measures;
  tests with fewer than three samples in a group are skipped with the
  reason (:func:`group_comparison`);
- ``group_bookkeeping.csv``: every other numeric summary column (counts,
  residuals, sizes) per group, n, mean, sd, median, no tests;
- ``batch.json``: version, input, config, state and per-sample status. The
  state ends as ``complete``, ``complete with failures``, ``interrupted``
  (Ctrl-C), ``cluster lost`` (the scheduler went away, or no worker was left
  for ``worker_timeout`` seconds) or ``failed`` (the study tables could not
  be written); finished samples are kept in every case and a rerun resumes.

One batch at a time writes into a folder: a lock file
(``.vesselflow-batch.lock``, an advisory ``flock`` that the system releases
when its process dies) refuses a second batch at once and names the running
one; a lock left by a process that is gone is taken over with a notice.

Samples run as Dask tasks: on an embedded local cluster (one single-threaded
worker process per core, each with a memory limit) or on an existing cluster
given by its scheduler address. A sample whose complete result matches its
input checksum and effective settings is skipped, so an interrupted batch
resumes where it stopped; result folders are written atomically and checked
against the sizes and checksums in their ``run.json``, so an interrupted or
damaged sample is redone, never counted.
"""

from __future__ import annotations

import concurrent.futures
import csv
import datetime as _dt
import json
import math
import os
import re
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from .config import load_config
from .errors import ConfigError, EngineError, InputError, StorageError, VesselflowError

__all__ = ["Sample", "read_sample_sheet", "find_samples", "collect_samples", "run_batch", "BatchResult",
           "cohort_tables", "group_comparison", "group_bookkeeping", "add_densities", "hodges_lehmann",
           "hodges_lehmann_one_sample", "cliffs_delta", "science_measures", "bookkeeping_measures", "StudyMeasure",
           "SCIENCE_MEASURES", "FALLBACK_MEASURES", "SHEET_COLUMNS", "STUDY_FILES"]

SHEET_COLUMNS = ("sample_id", "path", "group")
OPTIONAL_COLUMNS = ("spacing_z", "spacing_y", "spacing_x", "root")
LOCK_FILE = ".vesselflow-batch.lock"
#: Final states of ``batch.json`` (``running`` while a batch runs).
FINAL_STATES = ("complete", "complete with failures", "interrupted", "cluster lost", "failed")
STUDY_FILES = ("failures.csv", "cohort_summary.csv", "cohort_segments.parquet", "cohort_bifurcations.parquet",
               "group_comparison.csv", "group_bookkeeping.csv")
FAILURE_COLUMNS = ("sample_id", "path", "step", "error")
# Order in which one sample's steps run; a failure is charged to the step after
# the last one that finished.
STEPS = ("reading", "cleaning", "centrelines", "graph", "radii", "pruning", "measures", "summary", "levels", "flow", "bifurcations",
         "writing")
_ID_OK = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]*$")


@dataclass(frozen=True)
class Sample:
    """One row of a study: a mask file, its group and per-sample settings."""

    sample_id: str
    path: Path
    group: str
    spacing: tuple | None = None
    root: str | None = None
    origin: str = ""  # where the row came from, for messages


@dataclass
class BatchResult:
    """What :func:`run_batch` did: per-sample status and the study tables."""

    outdir: Path
    status: pd.DataFrame  # sample_id, group, path, status, step, error, seconds
    failures: pd.DataFrame
    cohort_summary: pd.DataFrame
    group_comparison: pd.DataFrame
    group_bookkeeping: pd.DataFrame | None = None

    @property
    def n_failed(self):
        return int((self.status["status"] == "failed").sum())


# --------------------------------------------------------------------------- #
# Inputs
# --------------------------------------------------------------------------- #


def _suffix(name):
    from .reading import SUPPORTED_EXTENSIONS

    low = name.lower()
    for ext in sorted(SUPPORTED_EXTENSIONS, key=len, reverse=True):
        if low.endswith(ext):
            return ext
    return None


def _check_id(sample_id, where):
    if not _ID_OK.match(sample_id):
        raise InputError(f"{where}: sample_id must start with a letter or digit and hold only letters, digits, "
                         f"'.', '_' or '-' (it names the result folder), got '{sample_id}'")


def read_sample_sheet(path):
    """Read and check a sample sheet CSV.

    Parameters
    ----------
    path : str or Path
        CSV with columns ``sample_id, path, group`` and optionally
        ``spacing_z, spacing_y, spacing_x`` (µm, all three or none) and
        ``root`` (as the config's ``levels.root``). Relative paths resolve
        against the sheet's folder.

    Returns
    -------
    list of Sample

    Raises
    ------
    InputError
        Naming the line of the first problem: an unknown or missing column,
        a missing or unsupported file, a duplicate ``sample_id``, a bad
        spacing or root.
    """
    sheet = Path(path)
    try:
        text = sheet.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise InputError(f"sample sheet '{sheet}': file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"sample sheet '{sheet}': cannot be read as UTF-8 text ({exc})") from None
    rows = list(csv.reader(text.splitlines()))
    if not rows or not any(c.strip() for c in rows[0]):
        raise InputError(f"sample sheet '{sheet}': expected a header line with {', '.join(SHEET_COLUMNS)}, "
                         "got an empty file")
    header = [c.strip() for c in rows[0]]
    unknown = [c for c in header if c not in SHEET_COLUMNS + OPTIONAL_COLUMNS]
    if unknown:
        raise InputError(f"sample sheet '{sheet}' line 1: unknown column '{unknown[0]}'; expected "
                         f"{', '.join(SHEET_COLUMNS)} and optionally {', '.join(OPTIONAL_COLUMNS)}")
    missing = [c for c in SHEET_COLUMNS if c not in header]
    if missing:
        raise InputError(f"sample sheet '{sheet}' line 1: missing column '{missing[0]}'; expected "
                         f"{', '.join(SHEET_COLUMNS)}")
    dup_cols = sorted({c for c in header if header.count(c) > 1})
    if dup_cols:
        raise InputError(f"sample sheet '{sheet}' line 1: column '{dup_cols[0]}' appears more than once")
    spacing_cols = [c for c in ("spacing_z", "spacing_y", "spacing_x") if c in header]
    if spacing_cols and len(spacing_cols) != 3:
        raise InputError(f"sample sheet '{sheet}' line 1: expected all of spacing_z, spacing_y, spacing_x or none, "
                         f"got only {', '.join(spacing_cols)}")
    samples, seen = [], {}
    for lineno, raw in enumerate(rows[1:], start=2):
        if not any(c.strip() for c in raw):
            continue  # blank lines are harmless
        where = f"sample sheet '{sheet}' line {lineno}"
        if len(raw) != len(header):
            raise InputError(f"{where}: expected {len(header)} fields as in the header, got {len(raw)}")
        rec = {k: v.strip() for k, v in zip(header, raw)}
        sid = rec["sample_id"]
        if not sid:
            raise InputError(f"{where}: sample_id is empty")
        _check_id(sid, where)
        where = f"{where} (sample '{sid}')"
        if sid in seen:
            raise InputError(f"{where}: duplicate sample_id, first used on line {seen[sid]}")
        seen[sid] = lineno
        if not rec["group"]:
            raise InputError(f"{where}: group is empty; expected a group name such as 'control'")
        if not rec["path"]:
            raise InputError(f"{where}: path is empty")
        p = Path(rec["path"]).expanduser()
        if not p.is_absolute():
            p = sheet.parent / p
        if not p.is_file():
            raise InputError(f"{where}: mask file '{rec['path']}' not found (looked for '{p}')")
        if _suffix(p.name) is None:
            from .reading import SUPPORTED_EXTENSIONS

            raise InputError(f"{where}: unsupported file type of '{rec['path']}'; expected one of "
                             + ", ".join(SUPPORTED_EXTENSIONS))
        spacing = None
        if spacing_cols:
            vals = [rec[c] for c in ("spacing_z", "spacing_y", "spacing_x")]
            if any(vals):
                if not all(vals):
                    raise InputError(f"{where}: expected spacing_z, spacing_y and spacing_x all given or all empty")
                try:
                    spacing = tuple(float(v) for v in vals)
                except ValueError:
                    raise InputError(f"{where}: spacing must be numbers of µm, got {', '.join(vals)}") from None
                bad = [f"{c}={v}" for c, v in zip(("spacing_z", "spacing_y", "spacing_x"), spacing)
                       if not (math.isfinite(v) and v > 0)]
                if bad:
                    raise InputError(f"{where}: spacing must be positive finite µm, got {', '.join(bad)}")
        root = rec.get("root") or None
        if root is not None:
            try:
                load_config({"levels": {"root": root}})
            except ConfigError as exc:
                raise InputError(f"{where}: root: {exc}") from None
        samples.append(Sample(sid, p.resolve(), rec["group"], spacing, root, origin=f"line {lineno}"))
    if not samples:
        raise InputError(f"sample sheet '{sheet}': expected at least one sample row, got none")
    return samples


def find_samples(folder, *, exclude=None):
    """Every supported mask file below ``folder``, as samples.

    The group is the first sub-folder a file lies in (``study/control/a.tif``
    is in group ``control``), or ``all`` for files directly in ``folder``. The
    sample id is the file name without its extension, prefixed by its
    sub-folders where two names collide. Hidden files and folders, and
    ``exclude`` (the batch's own output folder), are skipped.
    """
    root = Path(folder).resolve()
    skip = Path(exclude).resolve() if exclude is not None else None
    files = []
    for dirpath, dirnames, filenames in os.walk(root):
        d = Path(dirpath)
        dirnames[:] = sorted(n for n in dirnames if not n.startswith(".") and (skip is None or d / n != skip))
        files.extend(d / n for n in sorted(filenames) if not n.startswith(".") and _suffix(n) is not None)
    if not files:
        from .reading import SUPPORTED_EXTENSIONS

        raise InputError(f"input folder '{folder}': expected mask files ({', '.join(SUPPORTED_EXTENSIONS)}), "
                         "found none")
    stems = [f.name[: -len(_suffix(f.name))] for f in files]
    counts = {s: stems.count(s) for s in stems}
    samples, seen = [], set()
    for f, stem in zip(files, stems):
        rel = f.relative_to(root)
        sid = stem if counts[stem] == 1 else "_".join([*rel.parent.parts, stem])
        sid = re.sub(r"[^A-Za-z0-9._-]", "_", sid).lstrip("._-") or "sample"
        if sid in seen:
            raise InputError(f"input folder '{folder}': two files map to sample id '{sid}' ({rel}); "
                             "rename one or use a sample sheet")
        seen.add(sid)
        group = rel.parts[0] if len(rel.parts) > 1 else "all"
        samples.append(Sample(sid, f, group, origin=str(rel)))
    return samples


def collect_samples(source, *, exclude=None):
    """Samples of a folder (:func:`find_samples`) or a CSV sheet (:func:`read_sample_sheet`)."""
    p = Path(source)
    if p.is_dir():
        return find_samples(p, exclude=exclude)
    if not p.exists():
        raise InputError(f"batch input '{p}': not found; expected a folder of masks or a sample sheet .csv")
    if p.suffix.lower() != ".csv":
        raise InputError(f"batch input '{p}': expected a folder of masks or a sample sheet .csv, got a "
                         f"'{p.suffix or 'file without extension'}' file")
    return read_sample_sheet(p)


# --------------------------------------------------------------------------- #
# One sample (runs on a Dask worker)
# --------------------------------------------------------------------------- #


def _canonical(obj):
    # As run.json stores it, so that the two compare equal.
    from .tables import to_jsonable

    return json.loads(json.dumps(to_jsonable(obj)))


def _settings(sample, config):
    cfg = load_config(config)
    if sample.root is not None:
        cfg["levels"]["root"] = sample.root
        cfg = load_config(cfg)
    return cfg


def _is_complete(folder, *, sha256, config, spacing):
    """Whether ``folder`` holds a complete result of this input and these settings."""
    from .tables import verify_result

    run = _read_run(folder)
    if run is None or not (run.get("input", {}).get("sha256") == sha256 and run.get("config") == _canonical(config)
                           and run.get("batch", {}).get("spacing_override_um") == (list(spacing) if spacing else None)):
        return False
    # Every file as written (sizes and checksums in run.json): a truncated or
    # edited table is redone, never skipped into the cohort tables.
    return not verify_result(folder)


def _read_run(folder):
    """The result's run.json as a dict, or None when missing or unreadable."""
    try:
        run = json.loads((folder / "run.json").read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return run if isinstance(run, dict) else None


def _batch_run(folder):
    """The batch run that wrote the result in ``folder`` (None if unknown)."""
    return ((_read_run(folder) or {}).get("batch") or {}).get("run")


def _finished_by(folder, run_id):
    """Whether batch run ``run_id`` wrote a complete, intact result in ``folder``."""
    from .tables import verify_result

    return folder.is_dir() and _batch_run(folder) == run_id and not verify_result(folder)


def _worker_share():
    """(threads per sample, memory limit in bytes) on the current Dask worker."""
    from ._parallel import available_cores

    try:
        from distributed import get_worker

        w = get_worker()
        slots = max(1, int(w.state.nthreads))
        limit = getattr(getattr(w, "memory_manager", None), "memory_limit", None)
    except (ImportError, ValueError, AttributeError):
        slots, limit = 1, None
    return max(1, available_cores() // slots), (int(limit) if limit else None)


def process_sample(sample, sample_dir, config, *, force=False, threads=None, memory_limit_bytes=None,
                   batch_run=None):
    """Analyse one sample into ``sample_dir`` unless a matching result is there.

    Never raises for a sample's own problems: returns a status record
    (``status`` is ``done``, ``skipped`` or ``failed``, with the ``step`` and
    ``error`` of a failure), so that one bad sample fails alone.

    ``batch_run`` names the batch run, and is recorded in the result. A
    matching result written by the same run counts as ``done``, not
    ``skipped``: Dask runs a finished task again when the worker holding its
    record dies before the record is collected, and that second call finds
    the result the first one wrote.
    """
    from ._parallel import limit_threads
    from .analysis import analyze_file
    from .reading import sha256_file

    t0 = time.perf_counter()
    out = Path(sample_dir)
    rec = {"sample_id": sample.sample_id, "group": sample.group, "path": str(sample.path), "status": "failed",
           "step": "reading", "error": "", "seconds": 0.0}
    done_steps = []
    cfg = load_config(config)
    try:
        cfg = _settings(sample, cfg)
        sha = sha256_file(sample.path)
        if not force and _is_complete(out, sha256=sha, config=cfg, spacing=sample.spacing):
            this_run = batch_run is not None and _batch_run(out) == batch_run
            rec.update(status="done" if this_run else "skipped", step="", seconds=round(time.perf_counter() - t0, 3))
            return rec
        share_threads, share_memory = _worker_share()
        # An earlier review is carried over by write_result (kept when input
        # and settings match, else set aside as review-superseded.csv).
        with limit_threads(threads or share_threads):
            analyze_file(sample.path, out, spacing=sample.spacing, config=cfg, overwrite=True,
                         progress=lambda step, s: done_steps.append(step),
                         memory_limit_bytes=memory_limit_bytes or share_memory,
                         run_info={"batch": {"sample_id": sample.sample_id, "group": sample.group,
                                             "spacing_override_um": list(sample.spacing) if sample.spacing else None,
                                             "run": batch_run}})
        rec.update(status="done", step="", seconds=round(time.perf_counter() - t0, 3))
    except Exception as exc:  # one sample's failure must not stop the study
        rec["step"] = _failed_step(done_steps, cfg)
        msg = str(exc) if isinstance(exc, VesselflowError) else f"{type(exc).__name__}: {exc}"
        rec.update(error=" ".join(msg.split()), seconds=round(time.perf_counter() - t0, 3))
    return rec


def _failed_step(done_steps, config):
    """The step a failure is charged to: the one after the last that finished."""
    if not done_steps:
        return "reading"
    order = [st for st in STEPS if (st != "flow" or config["flow"]["enabled"])
             and (st != "radii" or config["radii"]["estimator"] == "wall_fit")]
    last = done_steps[-1]
    return order[min(order.index(last) + 1, len(order) - 1)] if last in order else "writing"


# --------------------------------------------------------------------------- #
# The engine
# --------------------------------------------------------------------------- #


class _Progress:
    """Counts on one terminal line, or plain log lines when not on a terminal."""

    def __init__(self, total, *, quiet=False, stream=None):
        self.total, self.quiet = total, quiet
        self.stream = stream or sys.stderr
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.done = self.failed = self.skipped = 0
        self.start = time.monotonic()
        self.pending_line = False  # a status line without its newline is on the terminal

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
        print(f"vesselflow batch: warning: {msg}", file=self.stream, flush=True)

    def finish(self):
        if self.pending_line:
            print(file=self.stream, flush=True)
            self.pending_line = False


def _client(*, workers, scheduler, memory_limit):
    """A Dask client on an existing scheduler or an embedded local cluster."""
    import dask
    from distributed import Client, LocalCluster

    if scheduler:
        _check_reachable(scheduler)
        try:
            return Client(scheduler, timeout="10s", set_as_default=False), None
        except (OSError, TimeoutError) as exc:
            raise InputError(f"--scheduler '{scheduler}': cannot connect to a Dask scheduler there ({exc})") from None
    # A worker killed for memory takes its sample with it: the scheduler gives
    # up on it at once (Dask's default retries 3 times) and run_batch tries it
    # exactly once more.
    # Each worker holds only the sample it runs (saturation 1), so a killed
    # worker takes no queued sample down with it.
    with dask.config.set({"distributed.scheduler.allowed-failures": 0,
                          "distributed.scheduler.worker-saturation": 1.0,
                          "distributed.worker.daemon": False,
                          "distributed.admin.log-level": "error"}):
        cluster = LocalCluster(n_workers=workers, threads_per_worker=1, processes=True, memory_limit=memory_limit,
                               dashboard_address=":0", scheduler_kwargs={"dashboard": False}, host="127.0.0.1",
                               silence_logs=50)
        return Client(cluster, set_as_default=False), cluster


def _check_reachable(address):
    """Fail at once, not after the client's timeout, when nothing listens there."""
    import socket
    from urllib.parse import urlsplit

    parts = urlsplit(address if "://" in address else f"tcp://{address}")
    try:
        host, port = parts.hostname, parts.port
    except ValueError:
        host = port = None
    if parts.scheme not in ("tcp", "tls") or not host or not port:
        raise InputError(f"--scheduler: expected an address such as tcp://HOST:8786, got '{address}'")
    try:
        socket.create_connection((host, port), timeout=5).close()
    except OSError as exc:
        raise InputError(f"--scheduler '{address}': cannot connect to a Dask scheduler there ({exc.strerror or exc})"
                         ) from None


def _default_workers():
    from ._parallel import available_cores

    return available_cores()


def _check_batch_outdir(outdir, *, overwrite, samples):
    """Refuse, before any work, an output folder whose contents a batch could harm.

    A folder holding no earlier batch is written into only with
    ``overwrite``, and then only when none of the batch's own file names is
    taken by a file of the user's. Each sample folder that exists must be a
    vesselflow result holding only files vesselflow writes (a rerun may
    replace it) and must not contain the sample's input.
    """
    from .tables import check_outdir

    out = Path(outdir)
    if out.exists() and not out.is_dir():
        raise InputError(f"output '{out}': expected a folder, got an existing file")
    if not out.is_dir():
        return
    ours = (out / "batch.json").is_file()
    if any(out.iterdir()) and not ours:
        if not overwrite:
            raise InputError(f"output folder '{out}' is not empty and holds no earlier batch; pass --overwrite to "
                             "write into it anyway")
        taken = [n for n in STUDY_FILES if (out / n).exists()]
        if taken:
            raise InputError(f"--overwrite: '{out}' holds no earlier batch but has files named like the study "
                             f"tables ({', '.join(taken)}); they are not vesselflow's and are never replaced: "
                             "choose another folder")
    for s in samples:
        try:
            check_outdir(out / s.sample_id, overwrite=True, inputs=[s.path])
        except InputError as exc:
            raise InputError(f"sample '{s.sample_id}': {exc}") from None


class _BatchLock:
    """One batch per folder: an exclusive ``flock`` on ``OUTDIR/.vesselflow-batch.lock``.

    The system releases the lock when its process dies however it dies, so a
    lock whose process is gone is simply taken over; the file's content (pid,
    host, start time, command) names the holder in the refusal and in the
    takeover notice.
    """

    def __init__(self, path, fd, previous):
        self.path, self.fd, self.previous = path, fd, previous

    @classmethod
    def acquire(cls, outdir):
        import fcntl
        import socket

        path = Path(outdir) / LOCK_FILE
        for _ in range(5):
            fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o666)
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            except BlockingIOError:
                holder = _lock_holder(fd)
                os.close(fd)
                who = (f"process {holder.get('pid')} on {holder.get('host')}, started {holder.get('started')}"
                       if holder else "another process")
                raise InputError(f"batch folder '{outdir}' is in use by another vesselflow batch ({who}); wait for "
                                 "it to finish or choose another folder") from None
            try:
                same = os.fstat(fd).st_ino == os.stat(path).st_ino
            except FileNotFoundError:
                same = False
            if not same:  # the holder removed the file between our open and our lock: try again
                os.close(fd)
                continue
            previous = _lock_holder(fd)
            info = {"pid": os.getpid(), "host": socket.gethostname(),
                    "started": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                    "command": " ".join(sys.argv)}
            os.ftruncate(fd, 0)
            os.pwrite(fd, (json.dumps(info) + "\n").encode("utf-8"), 0)
            return cls(path, fd, previous)
        raise InputError(f"batch folder '{outdir}': could not take its lock {path} (it keeps changing)")

    def takeover_notice(self):
        p = self.previous
        if not p:
            return None
        return (f"took over the lock of an earlier batch (process {p.get('pid')} on {p.get('host')}, started "
                f"{p.get('started')}) that is no longer running")

    def release(self):
        try:
            self.path.unlink(missing_ok=True)  # while still locked: no one else holds this name
        except OSError:
            pass
        os.close(self.fd)


def _lock_holder(fd):
    try:
        data = os.pread(fd, 4096, 0)
        info = json.loads(data.decode("utf-8")) if data.strip() else None
    except (OSError, ValueError):
        return None
    return info if isinstance(info, dict) else None


class _QuietInterrupt:
    """Worker processes ignore SIGINT: a Ctrl-C reaches the whole process group,
    and the batch itself stops them in order; without this every worker
    prints its own KeyboardInterrupt traceback."""

    def setup(self, worker=None):
        import signal
        import threading

        if threading.current_thread() is threading.main_thread():
            signal.signal(signal.SIGINT, signal.SIG_IGN)


def _start_engine(*, workers, scheduler, memory_limit):
    import signal
    import threading

    # Processes started while SIGINT is ignored inherit that across exec, so
    # the workers of the embedded cluster never see the terminal's Ctrl-C.
    main = threading.current_thread() is threading.main_thread()
    old = signal.signal(signal.SIGINT, signal.SIG_IGN) if main and not scheduler else None
    try:
        client, cluster = _client(workers=workers, scheduler=scheduler, memory_limit=memory_limit)
    finally:
        if old is not None:
            signal.signal(signal.SIGINT, old)
    if cluster is not None:
        try:  # workers the nanny restarts later (after a memory kill) get the same
            from distributed.diagnostics.plugin import WorkerPlugin

            plugin = type("VesselflowQuietInterrupt", (_QuietInterrupt, WorkerPlugin), {"name": "vesselflow-quiet"})
            client.register_plugin(plugin())
        except Exception:  # an older distributed: the first workers are covered already
            pass
    return client, cluster


def run_batch(samples, outdir, *, config=None, workers=None, scheduler=None, force=False, overwrite=False,
              memory_limit=None, threads=None, quiet=False, stream=None, input_label=None, worker_timeout=120.0):
    """Analyse every sample on Dask, then write the study tables.

    Parameters
    ----------
    samples : list of Sample
        From :func:`collect_samples`; ids must be unique.
    outdir : str or Path
        Batch folder; an earlier batch there is resumed.
    config : dict or path, optional
        Validated with :func:`pipeline.config.load_config` before any work.
    workers : int, optional
        Worker processes of the embedded cluster; default one per core.
    scheduler : str, optional
        Address of an existing Dask scheduler (``tcp://HOST:PORT``); then
        ``workers`` and ``memory_limit`` are the cluster's business.
    force : bool
        Redo samples whose complete result matches.
    overwrite : bool
        Write into a non-empty folder that holds no earlier batch (never
        replacing a file that is not vesselflow's).
    memory_limit : str or int, optional
        Per worker (bytes, or a Dask size string such as ``"4GB"``); default
        the available memory shared equally.
    threads : int, optional
        Threads of each sample's compiled steps (distance transforms,
        thinning); default the worker's cores divided by its task slots.
    quiet : bool
        No progress output.
    stream : file, optional
        Where progress goes; default stderr.
    input_label : str, optional
        What ``batch.json`` records as the input (the folder or sheet).
    worker_timeout : float
        Seconds the cluster may have no worker at all before the batch stops
        as ``cluster lost`` (a cluster whose workers all died would otherwise
        wait for ever).

    Returns
    -------
    BatchResult

    Raises
    ------
    InputError, ConfigError
        Before any work, for a bad config, output folder or sample list, or
        a folder another batch is writing into.
    EngineError
        The scheduler was lost or no worker was left; ``batch.json`` says
        ``cluster lost`` and finished samples are kept.
    StorageError
        The study tables could not be written (disk full, no permission);
        ``batch.json`` says ``failed``, the sample results are kept.
    KeyboardInterrupt
        After cancelling the samples in flight; finished samples are kept.
    """
    cfg = load_config(config)
    out = Path(outdir)
    ids = [s.sample_id for s in samples]
    if len(set(ids)) != len(ids):
        dup = next(i for i in ids if ids.count(i) > 1)
        raise InputError(f"samples: sample_id '{dup}' appears more than once")
    if not samples:
        raise InputError("samples: expected at least one sample, got none")
    _check_batch_outdir(out, overwrite=overwrite, samples=samples)
    for s in samples:
        _settings(s, cfg)  # a bad per-sample root fails before any work
    if workers is not None and (not isinstance(workers, int) or workers < 1):
        raise InputError(f"--workers: expected a whole number of at least 1, got {workers!r}")
    if threads is not None and (not isinstance(threads, int) or threads < 1):
        raise InputError(f"--threads: expected a whole number of at least 1, got {threads!r}")
    if not (isinstance(worker_timeout, (int, float)) and math.isfinite(worker_timeout) and worker_timeout > 0):
        raise InputError(f"--worker-timeout: expected a positive number of seconds, got {worker_timeout!r}")
    if isinstance(memory_limit, str):
        from dask.utils import parse_bytes

        try:
            memory_limit = int(parse_bytes(memory_limit))
        except (ValueError, TypeError):
            raise InputError(f"--memory-limit: expected a size such as 6GB or 500MB, got '{memory_limit}'") from None
        if memory_limit <= 0:
            raise InputError(f"--memory-limit: expected a positive size, got {memory_limit} bytes")
    nworkers = workers or min(_default_workers(), len(samples))
    if memory_limit is None and not scheduler:
        from .reading import available_memory_bytes

        avail = available_memory_bytes()
        memory_limit = int(avail / nworkers) if avail else "auto"
    from .tables import check_writable, storage_error

    check_writable(out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise storage_error(exc, out, "create") from None
    lock = _BatchLock.acquire(out)
    try:
        return _run_locked(samples, out, cfg, lock=lock, nworkers=nworkers, scheduler=scheduler, force=force,
                           memory_limit=memory_limit, threads=threads, quiet=quiet, stream=stream,
                           input_label=input_label, worker_timeout=float(worker_timeout))
    finally:
        lock.release()


def _run_locked(samples, out, cfg, *, lock, nworkers, scheduler, force, memory_limit, threads, quiet, stream,
                input_label, worker_timeout):
    from .tables import clean_stale_partials, write_atomic, write_json

    prog = _Progress(len(samples), quiet=quiet, stream=stream)
    notice = lock.takeover_notice()
    if notice:
        prog.info(notice)
    clean_stale_partials(out)
    for name in STUDY_FILES:  # derived from the sample folders: stale ones must not outlive this run
        (out / name).unlink(missing_ok=True)
    started = _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds")
    run_id = f"{started}-{os.urandom(4).hex()}"
    meta = {"vesselflow_version": _version(), "created": started, "run": run_id, "state": "running",
            "input": input_label, "config": cfg, "scheduler": scheduler or "local",
            "workers": None if scheduler else nworkers, "force": bool(force)}
    write_atomic(out / "batch.json", lambda p: write_json(p, meta))
    records = {}

    def finish(state, **extra):
        """batch.json in its final state; the per-sample status table."""
        for s in samples:  # what the lost or interrupted run finished on disk still counts
            if s.sample_id not in records and _finished_by(out / s.sample_id, run_id):
                records[s.sample_id] = {"sample_id": s.sample_id, "group": s.group, "path": str(s.path),
                                        "status": "done", "step": "", "error": "", "seconds": 0.0}
        status = pd.DataFrame([records.get(s.sample_id, {"sample_id": s.sample_id, "group": s.group,
                                                          "path": str(s.path), "status": "not run", "step": "",
                                                          "error": "", "seconds": 0.0}) for s in samples])
        meta.update(state=state, finished=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                    counts={k: int((status["status"] == k).sum()) for k in ("done", "skipped", "failed", "not run")},
                    samples=[{k: v for k, v in r.items() if not (isinstance(v, float) and math.isnan(v))}
                             for r in status.to_dict("records")], **extra)
        write_atomic(out / "batch.json", lambda p: write_json(p, meta))
        return status

    prog.info(f"{len(samples)} samples on " + (f"the scheduler at {scheduler}" if scheduler else
                                               f"{nworkers} local worker{'s' if nworkers > 1 else ''}"))
    try:
        ending = _run_samples(samples, out, cfg, records, prog, run_id=run_id, nworkers=nworkers,
                              scheduler=scheduler, force=force, memory_limit=memory_limit, threads=threads,
                              worker_timeout=worker_timeout)
    except KeyboardInterrupt:
        finish("interrupted")
        raise
    except BaseException as exc:
        finish("failed", error=f"{type(exc).__name__}: {' '.join(str(exc).split())}")
        raise
    finally:
        clean_stale_partials(out)
        prog.finish()
    if ending is not None:
        status = finish("cluster lost", error=ending)
        n = int(status["status"].isin(("done", "skipped")).sum())
        raise EngineError(f"{ending}; {n} of {len(samples)} samples are finished and kept in '{out}'; run the same "
                          "command again to resume")
    failed = sum(r["status"] == "failed" for r in records.values())
    try:
        ok = [s for s in samples if records[s.sample_id]["status"] in ("done", "skipped")]
        tables = cohort_tables(out, ok)
        for sid, msg in tables["warnings"].items():
            records[sid]["warning"] = msg
            prog.warn(f"{sid}: {msg}")
        failures = pd.DataFrame([records[s.sample_id] for s in samples if records[s.sample_id]["status"] == "failed"],
                                columns=list(FAILURE_COLUMNS)).reset_index(drop=True)
        write_atomic(out / "failures.csv", lambda p: failures.to_csv(p, index=False, columns=list(FAILURE_COLUMNS)))
        write_atomic(out / "cohort_summary.csv", lambda p: tables["summary"].to_csv(p, index=False))
        write_atomic(out / "cohort_segments.parquet", lambda p: tables["segments"].to_parquet(p, index=False))
        write_atomic(out / "cohort_bifurcations.parquet",
                     lambda p: tables["bifurcations"].to_parquet(p, index=False))
        write_atomic(out / "group_comparison.csv", lambda p: tables["comparison"].to_csv(p, index=False))
        write_atomic(out / "group_bookkeeping.csv", lambda p: tables["bookkeeping"].to_csv(p, index=False))
    except BaseException as exc:
        # Half a set of study tables is worse than none: remove this run's,
        # which also frees the space batch.json needs to record the failure.
        for name in STUDY_FILES:
            (out / name).unlink(missing_ok=True)
        finish("interrupted" if isinstance(exc, KeyboardInterrupt) else "failed",
               error=f"study tables not written: {' '.join(str(exc).split())}")
        raise
    status = finish("complete with failures" if failed else "complete")  # last: marks the batch finished
    prog.info(f"{meta['counts']['done']} analysed, {meta['counts']['skipped']} skipped, "
              f"{meta['counts']['failed']} failed; tables in {out}")
    return BatchResult(outdir=out, status=status, failures=failures, cohort_summary=tables["summary"],
                       group_comparison=tables["comparison"], group_bookkeeping=tables["bookkeeping"])


def _run_samples(samples, out, cfg, records, prog, *, run_id, nworkers, scheduler, force, memory_limit, threads,
                 worker_timeout):
    """Run every sample on the engine, filling ``records``.

    Returns None when every sample has a record, or the reason the cluster
    was lost. Raises KeyboardInterrupt after cancelling what is in flight.
    """
    import logging

    # The engine's own log lines (workers starting and closing, a lost
    # connection) would bury the progress lines; the batch reports what
    # matters itself, in one line.
    import distributed  # noqa: F401  (configures its loggers on import)

    loggers = [logging.getLogger(n) for n in ["distributed", *[n for n in logging.root.manager.loggerDict
                                                                if n.startswith("distributed.")]]]
    levels = [lg.level for lg in loggers]
    for lg in loggers:
        lg.setLevel(logging.CRITICAL)

    def restore_logs():
        for lg, level in zip(loggers, levels):
            lg.setLevel(level)

    try:
        client, cluster = _start_engine(workers=nworkers, scheduler=scheduler, memory_limit=memory_limit)
    except BaseException:
        restore_logs()
        raise
    futures = {}
    try:
        def submit(s, attempt):
            fut = client.submit(process_sample, s, str(out / s.sample_id), cfg, force=force, threads=threads,
                                batch_run=run_id, pure=False,
                                key=f"vesselflow-sample-{s.sample_id}-{attempt}-{os.urandom(4).hex()}")
            futures[fut] = (s, attempt)
            return fut

        pending = {submit(s, 1) for s in samples}
        no_workers_since = None
        where = f"the scheduler at {scheduler}" if scheduler else "the local cluster"
        while pending:
            finished = [f for f in pending if f.done()]
            if not finished:
                if client.status not in ("running", "newly-created"):
                    return f"lost the connection to {where}"
                nw = len((client.scheduler_info() or {}).get("workers", {}))
                now = time.monotonic()
                if nw:
                    no_workers_since = None
                elif no_workers_since is None:
                    no_workers_since = now
                elif now - no_workers_since > worker_timeout:
                    return f"{where} had no worker for {worker_timeout:g} s"
                time.sleep(0.1)
                continue
            for fut in finished:
                pending.discard(fut)
                s, attempt = futures[fut]
                try:
                    rec = fut.result()
                except Exception as exc:  # the worker itself died (memory limit, signal), or the cluster went
                    if _is_cancelled(exc) or client.status not in ("running", "newly-created"):
                        return f"lost the connection to {where}"
                    if _is_killed_worker(exc) and attempt == 1:
                        # Samples queued on a dying worker die with it although they
                        # never ran; one more attempt tells them from the culprit.
                        pending.add(submit(s, 2))
                        continue
                    rec = _worker_failure(s, exc, memory_limit)
                records[s.sample_id] = rec
                prog.update(rec)
        return None
    except KeyboardInterrupt:
        try:
            client.cancel(list(futures), force=True)
        except Exception:  # the cluster may be gone already
            pass
        raise
    finally:
        try:
            client.close(timeout=10)
        except Exception:
            pass
        if cluster is not None:
            try:
                cluster.close(timeout=10)
            except Exception:
                pass
        restore_logs()


def _is_cancelled(exc):
    return isinstance(exc, concurrent.futures.CancelledError)


def _version():
    from ._version import __version__

    return __version__


def _is_killed_worker(exc):
    return type(exc).__name__ == "KilledWorker"


def _worker_failure(sample, exc, memory_limit):
    name = type(exc).__name__
    if _is_killed_worker(exc):
        lim = f" of {memory_limit / 2**30:.1f} GiB" if isinstance(memory_limit, (int, float)) else ""
        error = (f"the worker process died while analysing this sample (most often its memory limit{lim} was "
                 "exceeded; give workers more memory with --memory-limit or use fewer --workers)")
    else:
        error = f"{name}: {' '.join(str(exc).split())}"
    return {"sample_id": sample.sample_id, "group": sample.group, "path": str(sample.path), "status": "failed",
            "step": "worker", "error": error, "seconds": 0.0}


# --------------------------------------------------------------------------- #
# Study tables
# --------------------------------------------------------------------------- #


def _flatten_summary(summary):
    row = {}
    for k, v in summary.items():
        if isinstance(v, dict):
            for kk, vv in v.items():
                if isinstance(vv, (int, float, bool)) or vv is None:
                    row[f"{'flag_count' if k == 'flag_counts' else k}_{kk}"] = vv
        elif isinstance(v, (int, float, bool)) or v is None:
            row[k] = v
    return row


def cohort_tables(outdir, samples):
    """Study tables from the samples' result folders.

    Parameters
    ----------
    outdir : str or Path
        Batch folder holding ``<sample_id>/`` result folders.
    samples : list of Sample
        Those to include (the analysed ones), in order.

    Returns
    -------
    dict
        ``summary`` (with the densities of :func:`add_densities`),
        ``segments``, ``bifurcations``, ``comparison``
        (:func:`group_comparison`) and ``bookkeeping``
        (:func:`group_bookkeeping`) DataFrames, and ``warnings`` (sample
        id -> message). A sample with a
        ``review.csv`` contributes its reviewed summary (bifurcations marked
        ``artefact`` left out) and its decisions as
        ``review_decision``/``review_note`` columns. A review that cannot be
        used (malformed, or naming nodes that are not junctions) is that
        sample's warning, not the study's failure: the sample enters
        unreviewed, with the problem in ``review_problem``. A result that
        cannot be read back is left out with a warning.
    """
    from .review import apply_review
    from .tables import load_result

    rows, segs, bifs, warnings = [], [], [], {}
    for s in samples:
        try:
            res = load_result(Path(outdir) / s.sample_id)
        except InputError as exc:
            warnings[s.sample_id] = f"left out of the study tables: {exc}"
            continue
        summary, bif = res.summary, res.bifurcations
        reviewed, problem = False, ""
        if (res.path / "review.csv").exists():
            try:
                summary, bif = apply_review(res)
                reviewed = True
            except InputError as exc:
                problem = " ".join(str(exc).split())
                warnings[s.sample_id] = f"review not applied: {problem}"
                summary, bif = res.summary, res.bifurcations
        rows.append({"sample_id": s.sample_id, "group": s.group, "reviewed": reviewed, "review_problem": problem,
                     **_flatten_summary(summary)})
        for table, into in ((res.segments, segs), (bif, bifs)):
            t = table.copy()
            t.insert(0, "group", s.group)
            t.insert(0, "sample_id", s.sample_id)
            into.append(t)
    summary = pd.DataFrame(rows)
    if summary.empty:
        summary = pd.DataFrame(columns=["sample_id", "group", "reviewed", "review_problem"])
    summary = add_densities(summary)
    segments = pd.concat(segs, ignore_index=True) if segs else pd.DataFrame(columns=["sample_id", "group"])
    bifurcations = (pd.concat([b for b in bifs if len(b.columns)], ignore_index=True)
                    if any(len(b.columns) for b in bifs) else pd.DataFrame(columns=["sample_id", "group"]))
    return {"summary": summary, "segments": _parquet_safe(segments), "bifurcations": _parquet_safe(bifurcations),
            "comparison": group_comparison(summary), "bookkeeping": group_bookkeeping(summary),
            "warnings": warnings}


def _parquet_safe(df):
    # Columns mixing strings and missing values (reason lists, notes) must be
    # one type for Parquet.
    for c in df.columns:
        if df[c].dtype == object:
            df[c] = df[c].map(lambda v: None if v is None or (isinstance(v, float) and math.isnan(v)) else str(v))
    return df


# --------------------------------------------------------------------------- #
# Group comparison: science measures, effect sizes, bookkeeping
# --------------------------------------------------------------------------- #


@dataclass(frozen=True)
class StudyMeasure:
    """A sample-level science measure compared between groups."""

    name: str  # summary key (cohort_summary.csv column)
    unit: str
    label: str  # plain name for titles and tables
    description: str


def _class_measures():
    # Flow by diameter class: the class bounds are flow.capillary_max_diameter_um
    # and flow.small_vessel_max_diameter_um (8 and 30 µm by default).
    from .flow import DIAMETER_CLASSES

    where = {"capillary": "capillaries (diameter below flow.capillary_max_diameter_um)",
             "small": "small vessels (up to flow.small_vessel_max_diameter_um)",
             "large": "large vessels (above flow.small_vessel_max_diameter_um)"}
    out = []
    for c in DIAMETER_CLASSES:
        out.append(StudyMeasure(f"velocity_median_mm_s_{c}", "mm/s", f"median blood speed, {c}",
                                f"median mean speed of the perfused {where.get(c, c)}, model estimate"))
        out.append(StudyMeasure(f"wss_median_pa_{c}", "Pa", f"median wall shear stress, {c}",
                                f"median wall shear stress of the perfused {where.get(c, c)}, model estimate"))
    return tuple(out)


#: The sample-level science measures of a study, in table order. Sizes enter
#: as densities per mm³ of imaged tissue (the whole imaged volume: no tissue
#: mask is segmented), never as raw counts, because samples differ in the
#: volume imaged; planar samples have the per-mm² analogues. Measures a
#: result does not hold (older versions, flow not solved) are left out of the
#: comparison, or compared through their older stand-in
#: (:data:`FALLBACK_MEASURES`). Every other numeric summary column is bookkeeping
#: (:func:`group_bookkeeping`), described but never tested.
SCIENCE_MEASURES = (
    StudyMeasure("length_density_mm_per_mm3", "mm/mm³", "vessel length density",
                 "total centreline length per imaged volume"),
    StudyMeasure("vessel_volume_fraction", "1", "vessel volume fraction",
                 "vessel voxels per imaged voxel"),
    StudyMeasure("junction_density_per_mm3", "1/mm³", "junction density",
                 "junctions (nodes of degree three or more) per imaged volume"),
    StudyMeasure("segment_density_per_mm3", "1/mm³", "segment density",
                 "segments per imaged volume (computed in the study tables from segments / imaged_volume_mm3)"),
    StudyMeasure("blind_end_density_per_mm3", "1/mm³", "blind-end density",
                 "blind ends inside the volume per imaged volume (computed in the study tables from "
                 "blind_ends / imaged_volume_mm3); ends cut by the border are left out"),
    StudyMeasure("length_density_mm_per_mm2", "mm/mm²", "vessel length density (planar)",
                 "total centreline length per imaged area"),
    StudyMeasure("vessel_area_fraction", "1", "vessel area fraction (planar)", "vessel pixels per imaged pixel"),
    StudyMeasure("junction_density_per_mm2", "1/mm²", "junction density (planar)", "junctions per imaged area"),
    StudyMeasure("segment_density_per_mm2", "1/mm²", "segment density (planar)",
                 "segments per imaged area (computed in the study tables from segments / imaged_area_mm2)"),
    StudyMeasure("blind_end_density_per_mm2", "1/mm²", "blind-end density (planar)",
                 "blind ends per imaged area (computed in the study tables from blind_ends / imaged_area_mm2)"),
    StudyMeasure("murray_exponent_network", "1", "network Murray exponent",
                 "one exponent x fitted to all usable bifurcations of a sample, r0^x = r1^x + r2^x (pipeline.murray)"),
    StudyMeasure("murray_ratio_median", "1", "median Murray ratio",
                 "median over junctions of (r1³ + r2³) / r0³"),
    StudyMeasure("horton_ratio_number", "1", "Horton number ratio",
                 "ratio of element numbers between consecutive diameter-defined orders (Kassab et al. 1993)"),
    StudyMeasure("horton_ratio_diameter", "1", "Horton diameter ratio",
                 "ratio of mean element diameters between consecutive orders"),
    StudyMeasure("horton_ratio_length", "1", "Horton length ratio",
                 "ratio of mean element lengths between consecutive orders"),
    StudyMeasure("radius_median_um", "µm", "median segment radius", "median of the segment radii"),
    StudyMeasure("radius_mean_um", "µm", "mean segment radius", "mean of the segment radii"),
    StudyMeasure("vessel_tortuosity_median", "1", "median vessel tortuosity",
                 "median distance metric (length / chord) along vessels continued through junctions"),
    StudyMeasure("vessel_soam_median_rad_per_um", "rad/µm", "median vessel sum of angles",
                 "median sum-of-angles metric along vessels (Bullitt et al. 2003)"),
) + _class_measures() + (
    StudyMeasure("perfused_length_fraction", "1", "perfused length fraction",
                 "share of the vessel length carrying flow in the model"),
    StudyMeasure("tissue_distance_median_um", "µm", "median tissue-to-vessel distance",
                 "median distance from a tissue voxel to the nearest vessel voxel"),
    StudyMeasure("tissue_distance_p95_um", "µm", "95th percentile tissue-to-vessel distance",
                 "95th percentile of the distance from a tissue voxel to the nearest vessel voxel"),
)
#: Stand-ins for results made before a measure existed, compared in its place
#: only when no sample has the newer one: measure name -> older measure.
FALLBACK_MEASURES = {
    "vessel_tortuosity_median": StudyMeasure(
        "tortuosity_mean", "1", "mean segment tortuosity",
        "mean distance metric (length / chord) of single segments; results without vessel tortuosity"),
    "vessel_soam_median_rad_per_um": StudyMeasure(
        "soam_mean_rad_per_um", "rad/µm", "mean segment sum of angles",
        "mean sum-of-angles metric of single segments; results without vessel tortuosity"),
}
_SCIENCE = {m.name: m for m in SCIENCE_MEASURES + tuple(FALLBACK_MEASURES.values())}
# Columns of the cohort summary that describe a row, not a sample's measure.
_ID_COLUMNS = ("sample_id", "group", "reviewed", "review_problem")
# Densities the study tables derive from a count and the imaged volume or area.
_DERIVED_DENSITIES = (("segment_density", "segments"), ("blind_end_density", "blind_ends"))
#: Fewest samples with a value per group for a test.
MIN_TEST_SAMPLES = 3


def add_densities(summary):
    """The cohort summary with the densities the study tables derive.

    Parameters
    ----------
    summary : DataFrame
        One row per sample with the summary counts ``segments`` and
        ``blind_ends`` and ``imaged_volume_mm3`` (or, planar,
        ``imaged_area_mm2``).

    Returns
    -------
    DataFrame
        A copy with ``segment_density_per_mm3`` and
        ``blind_end_density_per_mm3`` (count / imaged volume, 1/mm³; planar
        rows the ``_per_mm2`` columns instead), added where the summary does
        not hold them already. A row without the count or the volume gets NaN.

    Examples
    --------
    >>> import pandas as pd
    >>> df = pd.DataFrame({"segments": [10, 20], "blind_ends": [1, 2], "imaged_volume_mm3": [0.5, 1.0]})
    >>> add_densities(df)["segment_density_per_mm3"].tolist()
    [20.0, 20.0]
    """
    out = summary.copy()
    for region, per in (("imaged_volume_mm3", "per_mm3"), ("imaged_area_mm2", "per_mm2")):
        if region not in out.columns:
            continue
        size = pd.to_numeric(out[region], errors="coerce").to_numpy(float)
        size = np.where(size > 0, size, np.nan)
        if not np.isfinite(size).any():
            continue
        for stem, count in _DERIVED_DENSITIES:
            name = f"{stem}_{per}"
            if name in out.columns or count not in out.columns:
                continue
            out[name] = pd.to_numeric(out[count], errors="coerce").to_numpy(float) / size
    return out


def _mw_null_cdf(m, n):
    """Exact null distribution of the Mann-Whitney U of samples of m and n, as P(U <= u), u = 0..mn.

    Recurrence over sample sizes (Mann & Whitney 1947, Ann Math Stat 18:50):
    p_{m,n}(u) = m/(m+n) p_{m-1,n}(u-n) + n/(m+n) p_{m,n-1}(u), a convex
    combination at every step, so it carries no cancellation.
    """
    prev = [np.ones(1)] * (n + 1)  # row a = 0: U = 0 whatever b
    for a in range(1, m + 1):
        row = [np.ones(1)]  # b = 0: U = 0
        for b in range(1, n + 1):
            p = np.zeros(a * b + 1)
            p[b:b + prev[b].size] += a / (a + b) * prev[b]  # the largest value is from the first sample
            p[:row[b - 1].size] += b / (a + b) * row[b - 1]
            row.append(p)
        prev = row
    return np.minimum(np.cumsum(prev[n]), 1.0)


def _signed_rank_null_cdf(n):
    """Exact null distribution of the Wilcoxon signed-rank W+ of n values, as P(W+ <= w), w = 0..n(n+1)/2.

    W+ is a sum of independent terms 0 or i with probability 1/2 each
    (Wilcoxon 1945, Biometrics Bull 1:80): its distribution is the
    convolution of those n two-point laws.
    """
    p = np.ones(1)
    for i in range(1, n + 1):
        q = np.zeros(p.size + i)
        q[:p.size] += 0.5 * p
        q[i:] += 0.5 * p
        p = q
    return np.minimum(np.cumsum(p), 1.0)


# Exact null distributions up to this many pairs (cost grows as its square);
# beyond, the normal approximation of U is used for the interval's rank.
_EXACT_MAX_PAIRS = 10_000


def _order_rank(cdf, alpha):
    """1-based rank k of the interval [D_(k), D_(N-k+1)] and its coverage; (0, nan) when none reaches 1 - alpha."""
    ok = np.flatnonzero(cdf <= alpha / 2 * (1 + 1e-12))
    if ok.size == 0:
        return 0, math.nan
    u = int(ok[-1])
    return u + 1, float(1.0 - 2.0 * cdf[u])


def hodges_lehmann(a, b, *, confidence=0.95):
    """Hodges-Lehmann shift of b against a with its distribution-free interval.

    Parameters
    ----------
    a, b : array_like, shape (n_a,), (n_b,)
        The two groups' values (NaN left out), in the measure's unit.
    confidence : float, keyword-only
        Nominal confidence of the interval.

    Returns
    -------
    shift, low, high, coverage : float
        ``shift`` is the median of the n_a n_b pairwise differences
        ``b_j - a_i`` (Hodges & Lehmann 1963, Ann Math Stat 34:598), in the
        measure's unit. ``[low, high] = [D_(k), D_(N+1-k)]``, order
        statistics of the N pairwise differences, with ``k - 1`` the
        largest ``u`` for which P(U <= u) <= (1 - confidence) / 2 under the
        exact null distribution of the Mann-Whitney U (Bauer 1972, J Am
        Stat Assoc 67:687; Lehmann 1975, Nonparametrics, ch. 2): the shifts
        d for which the exact two-sided test of ``b - d`` against ``a`` does
        not reject. ``coverage`` is the interval's exact confidence
        (discrete, at least ``confidence``); low, high and coverage are NaN
        when no interval reaches it (for 95 %: 3 against 3 or 4, or fewer).
        Beyond 10,000 pairs the rank k comes from the normal approximation
        of U and ``coverage`` is ``confidence``. With ties the interval is
        conservative.

    Examples
    --------
    >>> s, lo, hi, cov = hodges_lehmann([1.0, 2.0, 3.0, 4.0], [5.0, 6.5, 7.0, 9.0])
    >>> float(s), float(lo), float(hi), round(cov, 4)
    (4.25, 1.0, 8.0, 0.9714)
    """
    from scipy import stats

    a = np.asarray(a, float)
    b = np.asarray(b, float)
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size == 0 or b.size == 0:
        return math.nan, math.nan, math.nan, math.nan
    d = np.sort((b[None, :] - a[:, None]).ravel())
    shift = float(np.median(d))
    alpha = 1.0 - confidence
    if d.size <= _EXACT_MAX_PAIRS:
        k, coverage = _order_rank(_mw_null_cdf(a.size, b.size), alpha)
    else:
        m, n = a.size, b.size
        z = stats.norm.isf(alpha / 2)
        k = int(math.floor(m * n / 2 - z * math.sqrt(m * n * (m + n + 1) / 12)))
        coverage = confidence if k >= 1 else math.nan
    if k < 1:
        return shift, math.nan, math.nan, math.nan
    return shift, float(d[k - 1]), float(d[d.size - k]), coverage


def hodges_lehmann_one_sample(x, *, confidence=0.95):
    """One-sample Hodges-Lehmann estimate (pseudo-median) with its signed-rank interval.

    Parameters
    ----------
    x : array_like, shape (n,)
        Values of one group (NaN left out).
    confidence : float, keyword-only
        Nominal confidence of the interval.

    Returns
    -------
    estimate, low, high, coverage : float
        ``estimate``: the median of the n(n+1)/2 Walsh averages
        ``(x_i + x_j) / 2, i <= j`` (Hodges & Lehmann 1963); the interval
        ``[W_(k), W_(M+1-k)]`` of the sorted Walsh averages with ``k - 1``
        the largest ``w`` for which P(W+ <= w) <= (1 - confidence) / 2
        under the exact null distribution of the Wilcoxon signed-rank
        statistic (Hollander & Wolfe 1999, Nonparametric Statistical
        Methods, sec. 3.3; from memory), which assumes a distribution
        symmetric about its centre. With fewer than six values no interval
        reaches 95 %: then the widest one, ``[min x, max x]``, is returned
        with its exact ``coverage`` (for example 1 - 2/2^5 = 0.9375 at
        n = 5), so a reader sees how much less it is. NaN for n < 2.

    Examples
    --------
    >>> est, lo, hi, cov = hodges_lehmann_one_sample([2.4, 2.6, 2.9, 3.1, 3.0, 2.7])
    >>> round(float(est), 3), float(lo), float(hi), round(cov, 4)
    (2.8, 2.4, 3.1, 0.9688)
    """
    x = np.asarray(x, float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        return math.nan, math.nan, math.nan, math.nan
    i, j = np.triu_indices(x.size)
    w = np.sort((x[i] + x[j]) / 2.0)
    est = float(np.median(w))
    if x.size < 2:
        return est, math.nan, math.nan, math.nan
    cdf = _signed_rank_null_cdf(x.size)
    k, coverage = _order_rank(cdf, 1.0 - confidence)
    if k < 1:
        k, coverage = 1, float(1.0 - 2.0 * cdf[0])
    return est, float(w[k - 1]), float(w[w.size - k]), coverage


def cliffs_delta(a, b):
    """Cliff's delta of b against a: P(b > a) - P(b < a) over all pairs.

    Parameters
    ----------
    a, b : array_like, shape (n_a,), (n_b,)
        The two groups' values (NaN left out).

    Returns
    -------
    float
        In [-1, 1] (Cliff 1993, Psychol Bull 114:494); positive when group b
        tends to be larger. Equals ``2 U_b / (n_a n_b) - 1`` with ``U_b``
        the Mann-Whitney statistic of b (ties counting one half). NaN when a
        group is empty.

    Examples
    --------
    >>> cliffs_delta([1, 2, 3], [2, 4, 5])  # 7 pairs b > a, 1 tie, 1 b < a
    0.6666666666666666
    """
    a = np.asarray(a, float)
    b = np.asarray(b, float)
    a, b = a[np.isfinite(a)], b[np.isfinite(b)]
    if a.size == 0 or b.size == 0:
        return math.nan
    sign = np.sign(b[None, :] - a[:, None])
    return float(sign.mean())


COMPARISON_COLUMNS = ("measure", "label", "unit", "group_a", "group_b", "n_a", "n_b", "mean_a", "sd_a", "median_a",
                      "mean_b", "sd_b", "median_b", "difference", "hodges_lehmann_shift", "hodges_lehmann_ci_low",
                      "hodges_lehmann_ci_high", "hodges_lehmann_coverage", "cliffs_delta", "mann_whitney_u",
                      "test_method", "p_value", "q_value", "test_note")
BOOKKEEPING_COLUMNS = ("measure", "group", "n", "mean", "sd", "median")


def _finite(values):
    return values[np.isfinite(values)]


def _describe(v):
    if v.size == 0:
        return np.nan, np.nan, np.nan
    return float(np.mean(v)), float(np.std(v, ddof=1)) if v.size > 1 else np.nan, float(np.median(v))


def science_measures(summary):
    """Names of the science measures the cohort summary holds a value of, in table order.

    A measure of :data:`FALLBACK_MEASURES` that no sample has (results of an
    older version) is replaced by its older stand-in where that has values.
    """
    def has(name):
        return name in summary.columns and np.isfinite(pd.to_numeric(summary[name], errors="coerce")
                                                       .to_numpy(float)).any()

    out = []
    for m in SCIENCE_MEASURES:
        if has(m.name):
            out.append(m.name)
        elif m.name in FALLBACK_MEASURES and has(FALLBACK_MEASURES[m.name].name):
            out.append(FALLBACK_MEASURES[m.name].name)
    return out


def bookkeeping_measures(summary):
    """Every other numeric summary column (counts, residuals, sizes, settings): described, never tested."""
    science = {m.name for m in SCIENCE_MEASURES} | set(science_measures(summary))
    return [c for c in summary.columns if c not in science and c not in _ID_COLUMNS
            and pd.api.types.is_numeric_dtype(summary[c]) and not pd.api.types.is_bool_dtype(summary[c])]


def group_comparison(summary, *, group="group", measures=None, confidence=0.95,
                     min_samples=MIN_TEST_SAMPLES):
    """Science measures compared between every pair of groups.

    Parameters
    ----------
    summary : DataFrame
        One row per sample (``cohort_summary.csv``) with a ``group`` column;
        the derived densities are added (:func:`add_densities`).
    group : str, keyword-only
        Name of the group column.
    measures : list of str, optional, keyword-only
        Default: the :data:`SCIENCE_MEASURES` that some sample has a value
        of. Bookkeeping columns are never compared (:func:`group_bookkeeping`).
    confidence : float, keyword-only
        Nominal confidence of the Hodges-Lehmann interval.
    min_samples : int, keyword-only
        Fewest samples with a value in each group for a test.

    Returns
    -------
    DataFrame
        One row per measure and pair of groups (groups in order of first
        appearance; with one group, one row per measure with empty ``b``
        columns), columns :data:`COMPARISON_COLUMNS`: the measure's
        ``label`` and ``unit``; ``n_a``, ``n_b`` (samples with a value),
        mean, sd (n - 1) and median per group; ``difference`` (mean b -
        mean a); the Hodges-Lehmann shift of b against a with its
        distribution-free interval and exact coverage
        (:func:`hodges_lehmann`); ``cliffs_delta`` of b against a
        (:func:`cliffs_delta`); ``mann_whitney_u`` (the statistic of group
        a), ``test_method`` and ``p_value`` of the two-sided Mann-Whitney U
        test (:func:`scipy.stats.mannwhitneyu`, ``method='auto'``: exact
        when a group has at most 8 values and there are no ties, the normal
        approximation with tie correction otherwise); ``q_value``
        (Benjamini-Hochberg over the tested measures of the same pair,
        :func:`scipy.stats.false_discovery_control`). A pair in which a
        group has fewer than ``min_samples`` values, or whose values are
        all equal, is not tested: p, q and the effect sizes are NaN and
        ``test_note`` says why.

    Examples
    --------
    >>> import pandas as pd
    >>> df = pd.DataFrame({"group": ["a"] * 3 + ["b"] * 3, "radius_median_um": [1, 2, 3, 4, 5, 6]})
    >>> row = group_comparison(df).iloc[0]
    >>> float(row["hodges_lehmann_shift"]), float(row["cliffs_delta"]), round(float(row["p_value"]), 3)
    (3.0, 1.0, 0.1)
    """
    from scipy import stats

    if summary.empty or group not in summary:
        return pd.DataFrame(columns=list(COMPARISON_COLUMNS))
    summary = add_densities(summary)
    if measures is None:
        measures = science_measures(summary)
    groups = list(dict.fromkeys(summary[group].astype(str)))
    pairs = [(a, b) for i, a in enumerate(groups) for b in groups[i + 1:]] or [(groups[0], None)]
    labels = summary[group].astype(str).to_numpy()

    rows = []
    for a, b in pairs:
        block = []
        for m in measures:
            info = _SCIENCE.get(m)
            col = (pd.to_numeric(summary[m], errors="coerce").to_numpy(float) if m in summary.columns
                   else np.full(len(summary), np.nan))
            va = _finite(col[labels == a])
            ma, sa, mda = _describe(va)
            row = dict.fromkeys(COMPARISON_COLUMNS, np.nan)
            row.update(measure=m, label=info.label if info else m.replace("_", " "), unit=info.unit if info else "",
                       group_a=a, group_b=b, n_a=va.size, mean_a=ma, sd_a=sa, median_a=mda, n_b=0,
                       test_method="", test_note="")
            if b is None:
                row["test_note"] = "one group: nothing to compare"
                block.append(row)
                continue
            vb = _finite(col[labels == b])
            mb, sb, mdb = _describe(vb)
            row.update(n_b=vb.size, mean_b=mb, sd_b=sb, median_b=mdb,
                       difference=mb - ma if va.size and vb.size else np.nan)
            few = [g for g, v in ((a, va), (b, vb)) if v.size < min_samples]
            if few:
                row["test_note"] = "; ".join(f"fewer than {min_samples} samples in group '{g}'" for g in few)
            elif np.ptp(np.r_[va, vb]) == 0:
                row["test_note"] = "all values equal: no test"
            else:
                ties = np.unique(np.r_[va, vb]).size < va.size + vb.size
                res = stats.mannwhitneyu(va, vb, alternative="two-sided", method="auto")
                shift, lo, hi, cov = hodges_lehmann(va, vb, confidence=confidence)
                row.update(mann_whitney_u=float(res.statistic), p_value=float(res.pvalue),
                           test_method="exact" if min(va.size, vb.size) <= 8 and not ties else "asymptotic",
                           hodges_lehmann_shift=shift, hodges_lehmann_ci_low=lo, hodges_lehmann_ci_high=hi,
                           hodges_lehmann_coverage=cov, cliffs_delta=cliffs_delta(va, vb))
                if not np.isfinite(cov):
                    row["test_note"] = (f"too few samples for a {confidence:.0%} interval of the shift "
                                        f"({va.size} and {vb.size})")
            block.append(row)
        p = np.array([r["p_value"] for r in block], float)
        ok = np.isfinite(p)
        q = np.full(p.shape, np.nan)
        if ok.any():
            q[ok] = stats.false_discovery_control(p[ok], method="bh")
        for r, qq in zip(block, q):
            r["q_value"] = qq
        rows.extend(block)
    out = pd.DataFrame(rows, columns=list(COMPARISON_COLUMNS))
    out["n_a"] = out["n_a"].astype(int)
    out["n_b"] = out["n_b"].astype(int)
    return out


def group_bookkeeping(summary, *, group="group"):
    """Bookkeeping columns of the cohort summary described per group, without tests.

    Parameters
    ----------
    summary : DataFrame
        One row per sample with a ``group`` column.
    group : str, keyword-only
        Name of the group column.

    Returns
    -------
    DataFrame
        One row per bookkeeping column (:func:`bookkeeping_measures`: raw
        counts, run residuals, imaged sizes, flag counts) and group:
        ``measure, group, n, mean, sd, median`` (n: samples with a value;
        sd with n - 1).
    """
    if summary.empty or group not in summary:
        return pd.DataFrame(columns=list(BOOKKEEPING_COLUMNS))
    labels = summary[group].astype(str).to_numpy()
    groups = list(dict.fromkeys(labels))
    rows = []
    for m in bookkeeping_measures(summary):
        col = pd.to_numeric(summary[m], errors="coerce").to_numpy(float)
        for g in groups:
            v = _finite(col[labels == g])
            mean, sd, med = _describe(v)
            rows.append({"measure": m, "group": g, "n": v.size, "mean": mean, "sd": sd, "median": med})
    return pd.DataFrame(rows, columns=list(BOOKKEEPING_COLUMNS))
