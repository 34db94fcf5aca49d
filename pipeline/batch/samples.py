"""The samples of a study: a sample sheet read and checked, or the mask files of a folder.

In: a CSV/TSV sheet (``sample_id``, ``path``, ``group``, optional per-sample spacing and notes) or a
folder. Out: :class:`Sample` records, every problem one ``InputError`` naming the row and column.
"""

from __future__ import annotations

import csv
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path

from ..config import load_config
from ..errors import ConfigError, InputError


SHEET_COLUMNS = ("sample_id", "path", "group")
OPTIONAL_COLUMNS = ("spacing_z", "spacing_y", "spacing_x", "root")
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


# --------------------------------------------------------------------------- #
# Inputs
# --------------------------------------------------------------------------- #


def _suffix(name):
    from ..reading import SUPPORTED_EXTENSIONS

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
            from ..reading import SUPPORTED_EXTENSIONS

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
        from ..reading import SUPPORTED_EXTENSIONS

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
