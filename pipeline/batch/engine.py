"""Running a study on Dask: one task per sample, a lock on the output, progress, failures charged to a step.

In: the samples, the output folder, the config and the cluster settings. Out: one result folder per
sample (:func:`process_sample`), ``failures.csv``, ``batch.json`` and the study tables
(:func:`run_batch`); samples already done with the same input and settings are not run again.
"""

from __future__ import annotations

import concurrent.futures
import datetime as _dt
import json
import math
import os
import sys
import time
from dataclasses import dataclass
from pathlib import Path

import pandas as pd

from ..config import load_config
from ..errors import EngineError, InputError, VesselflowError
from .study import cohort_tables


LOCK_FILE = ".vesselflow-batch.lock"
#: Final states of ``batch.json`` (``running`` while a batch runs).
FINAL_STATES = ("complete", "complete with failures", "interrupted", "cluster lost", "failed")
STUDY_FILES = ("failures.csv", "cohort_summary.csv", "cohort_segments.parquet", "cohort_bifurcations.parquet",
               "group_comparison.csv", "group_bookkeeping.csv")
FAILURE_COLUMNS = ("sample_id", "path", "step", "error")
# Order in which one sample's steps run; a failure is charged to the step after
# the last one that finished.


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
# One sample (runs on a Dask worker)
# --------------------------------------------------------------------------- #


def _canonical(obj):
    # As run.json stores it, so that the two compare equal.
    from ..tables import to_jsonable

    return json.loads(json.dumps(to_jsonable(obj)))


def _settings(sample, config):
    cfg = load_config(config)
    if sample.root is not None:
        cfg["levels"]["root"] = sample.root
        cfg = load_config(cfg)
    return cfg


def _is_complete(folder, *, sha256, config, spacing):
    """Whether ``folder`` holds a complete result of this input and these settings."""
    from ..tables import verify_result

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
    from ..tables import verify_result

    return folder.is_dir() and _batch_run(folder) == run_id and not verify_result(folder)


def _worker_share():
    """(threads per sample, memory limit in bytes) on the current Dask worker."""
    from .._parallel import available_cores

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
    from .._parallel import limit_threads
    from ..analysis import analyze_file
    from ..reading import sha256_file

    t0 = time.perf_counter()
    out = Path(sample_dir)
    rec = {"sample_id": sample.sample_id, "group": sample.group, "path": str(sample.path), "status": "failed",
           "step": "reading", "error": "", "seconds": 0.0}
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
                         memory_limit_bytes=memory_limit_bytes or share_memory,
                         run_info={"batch": {"sample_id": sample.sample_id, "group": sample.group,
                                             "spacing_override_um": list(sample.spacing) if sample.spacing else None,
                                             "run": batch_run}})
        rec.update(status="done", step="", seconds=round(time.perf_counter() - t0, 3))
    except Exception as exc:  # one sample's failure must not stop the study
        # analyze_file names the step that failed; what fails before it is the sample's reading
        rec["step"] = getattr(exc, "step", None) or "reading"
        msg = str(exc) if isinstance(exc, VesselflowError) else f"{type(exc).__name__}: {exc}"
        rec.update(error=" ".join(msg.split()), seconds=round(time.perf_counter() - t0, 3))
    return rec


# --------------------------------------------------------------------------- #
# The engine
# --------------------------------------------------------------------------- #


class _Events:
    """What the engine tells as it goes, handed to the caller's ``progress(kind, value)``.

    Kinds: ``"info"`` (a message), ``"sample"`` (a finished sample's record:
    ``sample_id``, ``status`` done/skipped/failed, ``step``, ``error``,
    ``seconds``), ``"warning"`` (a message) and ``"finish"`` (nothing more
    for now: a caller drawing a status line ends it).
    """

    def __init__(self, progress):
        self.progress = progress

    def _say(self, kind, value=None):
        if self.progress is not None:
            self.progress(kind, value)

    def info(self, msg):
        self._say("info", msg)

    def update(self, rec):
        self._say("sample", rec)

    def warn(self, msg):
        self._say("warning", msg)

    def finish(self):
        self._say("finish")


def _client(*, workers, scheduler, memory_limit):
    """A Dask client on an existing scheduler or an embedded local cluster."""
    import dask
    from distributed import Client, LocalCluster

    if scheduler:
        _check_reachable(scheduler)
        try:
            return Client(scheduler, timeout="10s", set_as_default=False), None
        except (OSError, TimeoutError) as exc:
            raise InputError(f"cannot connect to a Dask scheduler at '{scheduler}' ({exc})",
                             param="scheduler") from None
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
        raise InputError(f"expected an address such as tcp://HOST:8786, got '{address}'", param="scheduler")
    try:
        socket.create_connection((host, port), timeout=5).close()
    except OSError as exc:
        raise InputError(f"cannot connect to a Dask scheduler at '{address}' ({exc.strerror or exc})",
                         param="scheduler") from None


def _default_workers():
    from .._parallel import available_cores

    return available_cores()


def _check_batch_outdir(outdir, *, overwrite, samples):
    """Refuse, before any work, an output folder whose contents a batch could harm.

    A folder holding no earlier batch is written into only with
    ``overwrite``, and then only when none of the batch's own file names is
    taken by a file of the user's. Each sample folder that exists must be a
    vesselflow result holding only files vesselflow writes (a rerun may
    replace it) and must not contain the sample's input.
    """
    from ..tables import check_outdir

    out = Path(outdir)
    if out.exists() and not out.is_dir():
        raise InputError(f"output '{out}': expected a folder, got an existing file")
    if not out.is_dir():
        return
    ours = (out / "batch.json").is_file()
    if any(out.iterdir()) and not ours:
        if not overwrite:
            raise InputError(f"output folder '{out}' is not empty and holds no earlier batch; pass overwrite=True "
                             "to write into it anyway")
        taken = [n for n in STUDY_FILES if (out / n).exists()]
        if taken:
            raise InputError(f"'{out}' holds no earlier batch but has files named like the study "
                             f"tables ({', '.join(taken)}); they are not vesselflow's and are never replaced: "
                             "choose another folder", param="overwrite")
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
              memory_limit=None, threads=None, progress=None, input_label=None, worker_timeout=120.0):
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
    progress : callable, optional
        Called as ``progress(kind, value)`` as the batch goes: ``"info"`` and
        ``"warning"`` with a message, ``"sample"`` with each finished
        sample's record (``sample_id``, ``status``, ``step``, ``error``,
        ``seconds``), ``"finish"`` when a status line should end. The
        library prints nothing itself; the command line draws the counts.
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
        raise InputError(f"expected a whole number of at least 1, got {workers!r}", param="workers")
    if threads is not None and (not isinstance(threads, int) or threads < 1):
        raise InputError(f"expected a whole number of at least 1, got {threads!r}", param="threads")
    if not (isinstance(worker_timeout, (int, float)) and math.isfinite(worker_timeout) and worker_timeout > 0):
        raise InputError(f"expected a positive number of seconds, got {worker_timeout!r}", param="worker_timeout")
    if isinstance(memory_limit, str):
        from dask.utils import parse_bytes

        try:
            memory_limit = int(parse_bytes(memory_limit))
        except (ValueError, TypeError):
            raise InputError(f"expected a size such as 6GB or 500MB, got '{memory_limit}'",
                             param="memory_limit") from None
        if memory_limit <= 0:
            raise InputError(f"expected a positive size, got {memory_limit} bytes", param="memory_limit")
    nworkers = workers or min(_default_workers(), len(samples))
    if memory_limit is None and not scheduler:
        from ..reading import available_memory_bytes

        avail = available_memory_bytes()
        memory_limit = int(avail / nworkers) if avail else "auto"
    from ..tables import check_writable, storage_error

    check_writable(out)
    try:
        out.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise storage_error(exc, out, "create") from None
    lock = _BatchLock.acquire(out)
    try:
        return _run_locked(samples, out, cfg, lock=lock, nworkers=nworkers, scheduler=scheduler, force=force,
                           memory_limit=memory_limit, threads=threads, progress=progress,
                           input_label=input_label, worker_timeout=float(worker_timeout))
    finally:
        lock.release()


def _run_locked(samples, out, cfg, *, lock, nworkers, scheduler, force, memory_limit, threads, progress,
                input_label, worker_timeout):
    from ..tables import clean_stale_partials, write_atomic, write_json

    prog = _Events(progress)
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
    from .._version import __version__

    return __version__


def _is_killed_worker(exc):
    return type(exc).__name__ == "KilledWorker"


def _worker_failure(sample, exc, memory_limit):
    name = type(exc).__name__
    if _is_killed_worker(exc):
        lim = f" of {memory_limit / 2**30:.1f} GiB" if isinstance(memory_limit, (int, float)) else ""
        error = (f"the worker process died while analysing this sample (most often its memory limit{lim} was "
                 "exceeded; give workers more memory or use fewer of them)")
    else:
        error = f"{name}: {' '.join(str(exc).split())}"
    return {"sample_id": sample.sample_id, "group": sample.group, "path": str(sample.path), "status": "failed",
            "step": "worker", "error": error, "seconds": 0.0}
