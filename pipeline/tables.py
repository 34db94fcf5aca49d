"""Writing and reading a result folder.

In: a :class:`~pipeline.result.Result` and the run metadata.
Out: files in a result folder, written atomically (into a temporary sibling
folder that is renamed at the end, so an interrupted run never leaves a
folder that looks complete):

- ``segments.csv``, ``nodes.csv``: the tables (``segment_id``/``node_id`` join them);
- ``levels.csv``: per branching level morphometry and Murray statistics;
- ``bifurcations.csv``: per junction Murray ratio, exponent, angles, flags;
- ``vessels.csv``: per vessel (segments chained through junctions) length and tortuosity;
- ``orders.csv``: per diameter-defined Strahler order, elements, segments,
  element diameter and length (mean, SD); ``order_connectivity.csv``: the
  connectivity matrix C(m, n) in long form (see :mod:`pipeline.orders`);
- ``summary.json``: sample measures;
- ``graph.graphml``: the multigraph with node and segment attributes;
- ``centrelines.npz``: every segment's smoothed centreline, compact:
  ``points_um`` (P, 3) float32, ``radii_um`` (P,) float32 along the raw
  centreline, ``offsets`` (S + 1,) int64 so segment ``i`` is
  ``points_um[offsets[i]:offsets[i + 1]]``;
- ``run.json``: version, input and its checksum, spacing and its source,
  effective config, time per step, counts and warnings, and ``files``: the
  size and SHA-256 of every other file of the result. ``run.json`` is the
  mark of a vesselflow result: ``--overwrite`` replaces only a folder that
  carries it and holds nothing but files vesselflow writes.

:func:`load_result` reads a folder back and checks every file against
``run.json``; :func:`verify_result` does the check alone.

Temporary folders and files are named ``.NAME.partial-HOST-PID-XXXX`` so
that a later run into the same parent can tell the leftovers of a killed
process (:func:`clean_stale_partials`) from the work of one still running.
Everything written honours the process umask, so a lab's shared folder stays
readable to colleagues.
"""

from __future__ import annotations

import errno
import hashlib
import json
import math
import os
import re
import shutil
import socket
import tempfile
import threading
from pathlib import Path

import numpy as np
import pandas as pd

from .errors import InputError, StorageError
from .result import Result
from .tablefiles import write_csv, write_graph_files

__all__ = ["write_result", "load_result", "read_result_mask", "read_result_projection", "Result", "check_outdir", "check_new_file",
           "write_atomic",
           "RESULT_FILES", "OWNED_NAMES", "verify_result", "is_result_folder", "clean_stale_partials",
           "make_partial_dir", "storage_error", "file_digest", "check_writable", "PARQUET_ROWS"]

RESULT_FILES = ("segments.csv", "nodes.csv", "levels.csv", "bifurcations.csv", "summary.json", "graph.graphml",
                "centrelines.npz", "run.json", "vessels.csv", "orders.csv", "order_connectivity.csv")
#: Every name vesselflow itself may write into a result folder (the result,
#: the report, the review and what is derived from it). ``--overwrite``
#: replaces a folder only when it holds nothing else.
OWNED_NAMES = RESULT_FILES + ("report.html", "figures", "review.csv", "review-superseded.csv",
                              "summary_reviewed.json", "segments.parquet", "nodes.parquet",
                              "bifurcations.parquet")
#: Tables with at least this many rows are also written as Parquet.
PARQUET_ROWS = 200_000
_PARTIAL_TAGS = (".partial-", ".old-")


def _jsonable(obj):
    if isinstance(obj, dict):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, (np.integer,)):
        return int(obj)
    if isinstance(obj, (np.floating, float)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return _jsonable(obj.tolist())
    return obj


def to_jsonable(obj):
    """``obj`` with numpy scalars and arrays as Python values and non-finite floats as None."""
    return _jsonable(obj)


def write_atomic(path, write):
    """Write one file atomically.

    ``write(tmp)`` fills a temporary file beside ``path``; it is flushed to
    disk and then renamed over ``path``, so a reader (or a crash) never sees
    half a file. On failure the temporary file is removed and ``path`` is
    left as it was.

    Parameters
    ----------
    path : str or Path
    write : callable
        Called with the temporary file's Path.

    Returns
    -------
    Path
    """
    path = Path(path)
    try:
        fd, tmp = tempfile.mkstemp(prefix=f".{path.name}{_partial_tag('partial')}", dir=path.parent)
    except OSError as exc:
        raise storage_error(exc, path, "write") from None
    os.close(fd)
    tmp = Path(tmp)
    try:
        os.chmod(tmp, 0o666 & ~_umask())  # mkstemp makes 0600 whatever the umask
        write(tmp)
        with open(tmp, "rb+") as fh:
            os.fsync(fh.fileno())  # the data is on disk before the name points at it
        os.replace(tmp, path)
    except BaseException as exc:
        tmp.unlink(missing_ok=True)
        if isinstance(exc, OSError) and not isinstance(exc, StorageError):
            raise storage_error(exc, path, "write") from None
        raise
    return path


# --------------------------------------------------------------------------- #
# Temporary names, the umask, environment failures
# --------------------------------------------------------------------------- #

_UMASK_LOCK = threading.Lock()


def _umask():
    """The process umask, read without changing it where the system allows."""
    try:
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    except (OSError, ValueError, IndexError):
        pass
    with _UMASK_LOCK:  # os.umask can only be read by setting it
        old = os.umask(0o022)
        os.umask(old)
    return old


def _host():
    return re.sub(r"[^A-Za-z0-9]", "", socket.gethostname())[:32] or "host"


def _partial_tag(kind):
    """``.partial-HOST-PID-`` (or ``.old-...``): who made a temporary name."""
    return f".{kind}-{_host()}-{os.getpid()}-"


_TAG_RE = re.compile(r"^\..+\.(partial|old)-([A-Za-z0-9]+)-(\d+)-[^/]*$")


def make_partial_dir(parent, name, kind="partial"):
    """A new temporary folder ``.NAME.partial-HOST-PID-XXXX`` in ``parent``.

    Its mode honours the umask (``tempfile.mkdtemp`` makes 0700 whatever the
    umask), so the result folder it becomes is as readable as any other.
    """
    path = Path(tempfile.mkdtemp(prefix=f".{name}{_partial_tag(kind)}", dir=parent))
    os.chmod(path, 0o777 & ~_umask())
    return path


def _pid_alive(pid):
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # alive, someone else's
        return True
    except OSError:
        return True
    return True


def clean_stale_partials(parent):
    """Remove temporary folders and files that killed vesselflow runs left in ``parent``.

    Only names vesselflow gives its temporary files (``.NAME.partial-HOST-PID-XXXX``,
    ``.NAME.old-HOST-PID-XXXX``) are touched, and only those made on this host
    by a process that no longer exists, so a run still going in the same
    folder (another analyze, another batch) keeps its work.

    Returns
    -------
    list of Path
        What was removed.
    """
    removed = []
    parent = Path(parent)
    try:
        entries = list(parent.iterdir())
    except OSError:
        return removed
    host = _host()
    for p in entries:
        m = _TAG_RE.match(p.name)
        if not m or m.group(2) != host or _pid_alive(int(m.group(3))):
            continue
        try:
            if p.is_dir() and not p.is_symlink():
                shutil.rmtree(p)
            else:
                p.unlink()
            removed.append(p)
        except OSError:
            pass  # not ours to fight over; the next run tries again
    return removed


_STORAGE_NEEDS = {
    errno.ENOSPC: "free some space on that disk or write elsewhere",
    errno.EDQUOT: "free some of your quota or write elsewhere",
    errno.EACCES: "write permission on that folder",
    errno.EPERM: "write permission on that folder",
    errno.EROFS: "a writable file system",
}


def storage_error(exc, path, what="write"):
    """A :class:`StorageError` naming ``path``, the system's reason and what is needed."""
    reason = exc.strerror or type(exc).__name__
    need = _STORAGE_NEEDS.get(exc.errno)
    tail = f"; needs {need}" if need else ""
    return StorageError(f"cannot {what} '{path}': {reason}{tail}; nothing was left half-written")


def write_json(path, data):
    Path(path).write_text(json.dumps(_jsonable(data), indent=2, allow_nan=False) + "\n", encoding="utf-8")


def check_writable(path):
    """Raise :class:`StorageError` early when ``path`` (or the folder it would be made in) cannot be written.

    Catches a read-only file system or a missing permission before any work;
    a full disk can only be found by writing, and :func:`write_result` then
    cleans up after itself.
    """
    p = Path(path).resolve()
    while not p.exists():
        p = p.parent
    if not p.is_dir():
        raise InputError(f"output '{path}': '{p}' is a file, expected a folder")
    try:
        readonly = bool(os.statvfs(p).f_flag & os.ST_RDONLY)
    except (OSError, AttributeError):
        readonly = False
    if readonly:
        raise storage_error(OSError(errno.EROFS, os.strerror(errno.EROFS)), path)
    if not os.access(p, os.W_OK | os.X_OK):
        raise storage_error(OSError(errno.EACCES, os.strerror(errno.EACCES)), path)


def is_result_folder(folder):
    """Whether ``folder`` carries vesselflow's mark: a ``run.json`` that vesselflow wrote."""
    run = _read_json(Path(folder) / "run.json")
    return isinstance(run, dict) and "vesselflow_version" in run


def _foreign_entries(folder):
    """Entries of ``folder`` that vesselflow did not write (names outside OWNED_NAMES)."""
    return sorted(p.name for p in Path(folder).iterdir()
                  if p.name not in OWNED_NAMES and not _TAG_RE.match(p.name))


def check_outdir(outdir, *, overwrite, inputs=()):
    """Check that a result may be written to ``outdir``; raises InputError otherwise.

    Parameters
    ----------
    outdir : str or Path
    overwrite : bool
        Allow replacing an existing result. Only a folder that is a
        vesselflow result (it has vesselflow's ``run.json``) and holds
        nothing but files vesselflow writes is ever replaced; anything else
        is refused, so ``--overwrite`` can never delete a user's files.
    inputs : sequence of str or Path
        Files the run reads: an output folder that is, or contains, one of
        them is refused whatever ``overwrite`` says.
    """
    out = Path(outdir)
    if out.exists() and not out.is_dir():
        raise InputError(f"output '{out}': expected a folder, got an existing file")
    target = out.resolve()
    for src in inputs:
        src = Path(src).resolve()
        if target == src or target in src.parents:
            raise InputError(f"output folder '{out}' contains the input '{src}'; expected a separate folder "
                             "for the result (for example a new sub-folder)")
    if not out.is_dir():
        return
    try:
        empty = not any(p for p in out.iterdir() if not _TAG_RE.match(p.name))
    except OSError as exc:
        raise storage_error(exc, out, "read") from None
    if empty:
        return
    if not overwrite:
        raise InputError(f"output folder '{out}' is not empty; pass overwrite=True to replace it")
    if not is_result_folder(out):
        raise InputError(f"'{out}' is not a vesselflow result folder (no run.json of vesselflow's); "
                         "it is never replaced: choose a new or empty folder", param="overwrite")
    foreign = _foreign_entries(out)
    if foreign:
        shown = ", ".join(foreign[:5]) + (f" and {len(foreign) - 5} more" if len(foreign) > 5 else "")
        raise InputError(f"result folder '{out}' also holds files vesselflow did not write ({shown}); "
                         "move them out first or choose another folder", param="overwrite")


def check_new_file(path, *, suffix, overwrite=False, param="path"):
    """Refuse, before any work, a file name with the wrong suffix or an existing file without ``overwrite``.

    Parameters
    ----------
    path : str or Path
    suffix : str
        Expected suffix, such as ``'.png'`` (any case).
    overwrite : bool, keyword-only
    param : str, keyword-only
        The caller's parameter name, for the error.

    Returns
    -------
    Path

    Raises
    ------
    InputError
    """
    out = Path(path)
    if out.suffix.lower() != suffix:
        raise InputError(f"expected a {suffix} file name, got '{out}'", param=param)
    if out.is_dir():
        raise InputError(f"expected a file name, got the folder '{out}'", param=param)
    if out.exists() and not overwrite:
        raise InputError(f"'{out}' exists; pass overwrite=True to replace it", param=param)
    return out


def file_digest(path):
    """``{"bytes": size, "sha256": hex}`` of a file, read in 1 MiB blocks."""
    h = hashlib.sha256()
    size = 0
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
            size += len(block)
    return {"bytes": size, "sha256": h.hexdigest()}


def _read_json(path):
    try:
        return json.loads(Path(path).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None


def write_result(result, outdir, *, run_info, overwrite=False, extra_tables=None, inputs=()):
    """Write a result folder atomically.

    The folder is filled under a temporary name beside ``outdir`` and renamed
    at the end, ``run.json`` last with the size and SHA-256 of every other
    file, so a folder with a ``run.json`` is complete and can be checked.
    When an earlier result is replaced, its ``review.csv`` is carried over:
    as ``review.csv`` when the input checksum and settings are unchanged (the
    graph is deterministic, so its node ids still apply), else as
    ``review-superseded.csv``; a reviewer's work is never lost.

    Parameters
    ----------
    result : Result
        From :func:`pipeline.analyze`; on success its ``path`` becomes the
        folder and its ``run`` the record written (``run.json``).
    outdir : str or Path
    run_info : dict
        Merged into ``run.json`` (version, input, checksum, spacing source...).
    overwrite : bool
        Replace an existing result (see :func:`check_outdir`).
    extra_tables : dict of str -> DataFrame, optional
        Further CSV tables (for example ``levels.csv``).
    inputs : sequence of str or Path
        Files the run read; ``outdir`` may not be or contain one.

    Raises
    ------
    InputError
        If ``outdir`` may not be written (see :func:`check_outdir`).
    StorageError
        If the disk is full, or the folder is not writable; nothing is left
        behind then and an earlier result is kept as it was.
    """
    out = Path(outdir)
    check_outdir(out, overwrite=overwrite, inputs=inputs)
    parent = out.resolve().parent
    try:
        parent.mkdir(parents=True, exist_ok=True)
        clean_stale_partials(parent)
        tmp = make_partial_dir(parent, out.name)
    except OSError as exc:
        raise storage_error(exc, out) from None
    try:
        _fill_result(tmp, result, extra_tables)
        run = dict(result.run)
        run.update(run_info)
        run["files"] = {f.name: file_digest(f) for f in sorted(tmp.iterdir())}
        if out.is_dir():
            _carry_review(out, tmp, run)
        write_json(tmp / "run.json", run)  # written last: its presence marks a complete folder
        _fsync_dir(tmp)
        if out.exists():
            old = make_partial_dir(parent, out.name, "old")
            os.rename(out, old / "x")
            os.rename(tmp, out)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, out)
    except BaseException as exc:
        shutil.rmtree(tmp, ignore_errors=True)
        if isinstance(exc, OSError) and not isinstance(exc, StorageError):
            raise storage_error(exc, out) from None
        raise
    # the result in memory is now the folder's: what load_result would give
    result.path, result.run = out, run
    return out


def _fill_result(tmp, result, extra_tables):
    # The graph's tables and its GraphML in one pass, each float formatted once for both.
    write_graph_files(result.segments, result.nodes, graphml=tmp / "graph.graphml",
                      segments_csv=tmp / "segments.csv", nodes_csv=tmp / "nodes.csv")
    tables = {"levels.csv": result.levels, "bifurcations.csv": result.bifurcations,
              "vessels.csv": getattr(result, "vessels", pd.DataFrame()),
              "orders.csv": result.orders, "order_connectivity.csv": result.order_connectivity,
              **(extra_tables or {})}
    for name, table in tables.items():
        write_csv(table, tmp / name)
    # Large tables also as Parquet (columnar, typed, compressed): a million
    # rows of CSV take seconds to parse where Parquet takes a fraction.
    for name, table in (("segments", result.segments), ("nodes", result.nodes),
                        ("bifurcations", result.bifurcations)):
        if len(table) >= PARQUET_ROWS:
            table.to_parquet(tmp / f"{name}.parquet", index=False)
    write_json(tmp / "summary.json", result.summary)
    lens = [len(p) for p in result.centrelines]
    offsets = np.r_[0, np.cumsum(lens)].astype(np.int64)
    pts = np.vstack(result.centrelines).astype(np.float32) if lens else np.zeros((0, 3), np.float32)
    rad = (np.concatenate(result.centreline_radii).astype(np.float32) if lens else np.zeros(0, np.float32))
    # Stored, not deflated: float32 coordinates deflate by a quarter only, at
    # 0.5 s on a 512^3 bed, and the GraphML beside them is eight times larger.
    np.savez(tmp / "centrelines.npz", points_um=pts, radii_um=rad, offsets=offsets,
                        segment_id=result.segments["segment_id"].to_numpy(np.int64),
                        spacing_um=np.asarray(result.spacing, float))


def _fsync_dir(folder):
    # The files' data reach the disk before the rename publishes the folder.
    for f in folder.iterdir():
        with open(f, "rb") as fh:
            os.fsync(fh.fileno())


def _carry_review(old_dir, new_dir, new_run):
    src = old_dir / "review.csv"
    if not src.is_file():
        return
    old_run = _read_json(old_dir / "run.json") or {}
    same = ((old_run.get("input") or {}).get("sha256") == (new_run.get("input") or {}).get("sha256")
            and _canonical(old_run.get("config")) == _canonical(new_run.get("config")))
    shutil.copyfile(src, new_dir / ("review.csv" if same else "review-superseded.csv"))


def _canonical(obj):
    return json.loads(json.dumps(_jsonable(obj), sort_keys=True))


def verify_result(outdir):
    """Check a result folder against the sizes and checksums in its ``run.json``.

    Returns
    -------
    list of str
        One line per problem (a file missing, truncated or changed since it
        was written, a ``run.json`` that cannot be read or lists no files);
        empty when the folder is exactly what vesselflow wrote.
    """
    out = Path(outdir)
    problems = [f"{f} is missing" for f in RESULT_FILES if not (out / f).is_file()]
    if problems:
        return problems
    run = _read_json(out / "run.json")
    if not isinstance(run, dict):
        return ["run.json cannot be read as JSON"]
    files = run.get("files")
    if not isinstance(files, dict) or not files:
        return ["run.json lists no file checksums (written by an older vesselflow, or not by vesselflow)"]
    for name, want in sorted(files.items()):
        path = out / name
        if not path.is_file():
            problems.append(f"{name} is missing")
            continue
        try:
            got = file_digest(path)
        except OSError as exc:
            problems.append(f"{name} cannot be read ({exc.strerror})")
            continue
        if not isinstance(want, dict) or got["bytes"] != want.get("bytes"):
            problems.append(f"{name} has {got['bytes']} bytes, run.json recorded "
                            f"{want.get('bytes') if isinstance(want, dict) else '?'}")
        elif got["sha256"] != want.get("sha256"):
            problems.append(f"{name} differs from what was written (SHA-256 does not match run.json)")
    return problems


def _not_a_result(out, missing):
    """Why ``out`` is not a result folder, and what to pick instead."""
    if not out.exists():
        return f"result folder '{out}' does not exist; expected a folder written by vesselflow analyze"
    if not out.is_dir():
        return f"'{out}' is a file; expected a result folder written by vesselflow analyze"
    if (out / "batch.json").is_file() or (out / "cohort_summary.csv").is_file():
        samples = sorted(p.name for p in out.iterdir() if p.is_dir() and (p / "run.json").is_file())
        shown = ", ".join(samples[:5]) + (f" and {len(samples) - 5} more" if len(samples) > 5 else "")
        pick = f"; pick one of its {len(samples)} samples ({shown}), e.g. '{out / samples[0]}'" if samples else ""
        return f"'{out}' is a batch folder, not one sample's result{pick}"
    results = sorted(p.name for p in out.iterdir() if p.is_dir() and (p / "run.json").is_file())
    if results and not (out / "run.json").is_file():
        shown = ", ".join(results[:5]) + (f" and {len(results) - 5} more" if len(results) > 5 else "")
        return (f"'{out}' holds {len(results)} result folder(s) ({shown}), not one result; pick one, e.g. "
                f"'{out / results[0]}'")
    if not (out / "run.json").is_file():
        found = sorted(p.name for p in out.iterdir())[:3]
        held = f" (it holds {', '.join(found)}{', ...' if len(found) == 3 else ''})" if found else " (it is empty)"
        return (f"'{out}' is not a vesselflow result folder{held}; expected a folder written by "
                "vesselflow analyze (run.json, segments.csv, ...)")
    return f"result folder '{out}': expected a complete result, missing {', '.join(missing)}"


def load_result(outdir, *, verify=True):
    """Read a result folder written by :func:`write_result`.

    Parameters
    ----------
    outdir : str or Path
    verify : bool
        Check every file against the sizes and checksums in ``run.json``
        first (:func:`verify_result`). Results of vesselflow versions that
        recorded no checksums are read unchecked.

    Raises
    ------
    InputError
        If the folder is missing or incomplete, or a file was truncated or
        changed after it was written.
    """
    out = Path(outdir)
    missing = [f for f in RESULT_FILES if not (out / f).is_file()]
    if missing:
        raise InputError(_not_a_result(out, missing))
    if verify:
        run = _read_json(out / "run.json")
        if not isinstance(run, dict):
            raise InputError(f"result folder '{out}': run.json cannot be read as JSON; analyse the mask again")
        if run.get("files"):
            problems = verify_result(out)
            if problems:
                raise InputError(f"result folder '{out}': expected the files as written, but "
                                 f"{'; '.join(problems[:3])}; analyse the mask again")
    try:
        segs = pd.read_csv(out / "segments.csv")
        nodes = pd.read_csv(out / "nodes.csv")
        bifs = _read_csv(out / "bifurcations.csv")
        levels = _read_csv(out / "levels.csv")
        vessels = _read_csv(out / "vessels.csv")
        orders = _read_csv(out / "orders.csv")
        order_conn = _read_csv(out / "order_connectivity.csv")
        summary = json.loads((out / "summary.json").read_text(encoding="utf-8"))
        run = json.loads((out / "run.json").read_text(encoding="utf-8"))
        with np.load(out / "centrelines.npz") as z:
            pts, off = z["points_um"], z["offsets"]
            lines = [pts[off[i]:off[i + 1]] for i in range(len(off) - 1)]
            rad = z["radii_um"] if "radii_um" in z.files else None
            radii = None if rad is None else [rad[off[i]:off[i + 1]] for i in range(len(off) - 1)]
    except (ValueError, KeyError, OSError, EOFError, pd.errors.ParserError) as exc:
        raise InputError(f"result folder '{out}': a file cannot be read ({type(exc).__name__}: "
                         f"{' '.join(str(exc).split())[:200]}); analyse the mask again") from None
    return Result(path=out, segments=segs, nodes=nodes, summary=summary, run=run, centrelines=lines,
                  centreline_radii=radii, bifurcations=bifs, levels=levels, vessels=vessels, orders=orders,
                  order_connectivity=order_conn)


def _result_mask_path(result, mask_path):
    """The mask file to read for a result (the recorded one by default), or (None, notes) when it is gone."""
    from .reading.chunked import split_dataset

    recorded = (result.run.get("input") or {}).get("path")
    if mask_path is None:
        if not recorded or not Path(split_dataset(str(recorded))[0]).exists():
            return None, [f"the mask recorded in run.json ('{recorded}') is not there"]
        mask_path = recorded
    if not Path(split_dataset(str(mask_path))[0]).exists():
        raise InputError(f"expected a mask file, got '{mask_path}' (not found)", param="mask_path")
    return mask_path, []


def _read_settings(result):
    """The spacing and threshold a result's mask was read with."""
    run = result.run
    spacing = result.spacing[1:] if run.get("planar") else result.spacing
    return spacing, ((run.get("config") or {}).get("input") or {}).get("threshold")


def _checked_against(result, label, shape, sha256):
    """Notes on a mask read for a result; an error if its shape is not the analysed volume's."""
    run = result.run
    want = tuple(run.get("shape") or ())
    if want and tuple(shape) != want:
        raise InputError(f"{label}: expected shape {want} (the volume this result was computed from), "
                         f"got {tuple(shape)}")
    sha = (run.get("input") or {}).get("sha256")
    if sha and sha256 != sha:
        return [f"the {label} differs from the one analysed (its SHA-256 does not match run.json)"]
    return []


def read_result_mask(result, mask_path=None):
    """Read the mask a result was computed from, for display (viewer, report maps).

    Parameters
    ----------
    result : Result
    mask_path : str or Path, optional
        Default: the input recorded in ``run.json``.

    Returns
    -------
    image : MaskImage or None
        None when no path was given and the recorded file is gone.
    notes : list of str
        Why the mask is missing, or that the file differs from the one
        analysed (its checksum does not match ``run.json``).

    Raises
    ------
    InputError
        If the file cannot be read as a mask, or its shape differs from the
        volume the result was computed from.
    """
    from . import reading

    path, notes = _result_mask_path(result, mask_path)
    if path is None:
        return None, notes
    spacing, threshold = _read_settings(result)
    # Only the boolean mask is held for display, none of the analysis' work arrays.
    img = reading.read_mask(path, spacing=spacing, threshold=threshold, bytes_per_voxel=2.0)
    return img, _checked_against(result, f"mask file '{path}'", img.shape, img.sha256)


def read_result_projection(result, mask_path=None, *, slab_bytes=128 << 20):
    """The mask's maximum projection along z, ``(Y, X)`` bool, read slab by slab (any size of volume).

    Parameters and notes as :func:`read_result_mask`; returns ``(None,
    notes)`` when the recorded mask is gone.
    """
    from . import reading
    from .blockwise.source import slab_planes

    path, notes = _result_mask_path(result, mask_path)
    if path is None:
        return None, notes
    spacing, threshold = _read_settings(result)
    with reading.open_mask(path, spacing=spacing, threshold=threshold) as lazy:
        src = lazy.source
        step = slab_planes(lazy.shape, lazy.dtype.itemsize, slab_bytes)
        mip = np.zeros(lazy.shape[1:], dtype=bool)
        for z0 in range(0, lazy.shape[0], step):
            slab = np.asarray(src[z0:z0 + step])
            mip |= (slab > threshold if threshold is not None else slab != 0).any(axis=0)
        notes = _checked_against(result, f"mask file '{path}'", lazy.shape, lazy.sha256())
    return mip, notes


def _read_csv(path):
    try:
        return pd.read_csv(path)
    except pd.errors.EmptyDataError:  # a table with no columns (no segments)
        return pd.DataFrame()
