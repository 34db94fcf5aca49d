"""Score files: where a score may be written, and writing it.

In: a score dict and a file name. Out: a JSON file beside the user's files, never over them.
"""

from __future__ import annotations

import json
from pathlib import Path

from ..errors import InputError
from .score import SCORE_FORMAT


# --------------------------------------------------------------------------- #
# Score files
# --------------------------------------------------------------------------- #


def check_score_file(path, *, result_dir=None, overwrite=False):
    """Refuse, before any work, a score file name that would harm what is there.

    A score file is a ``.json`` file outside the result folder (which holds
    only the result's own files). An existing file is replaced only with
    ``overwrite`` and only when it is a score file (``format`` is
    :data:`SCORE_FORMAT`): anything else is the user's and is never replaced.

    Parameters
    ----------
    path : str or Path
        The score file to write.
    result_dir : str or Path, optional, keyword-only
        The result folder scored.
    overwrite : bool, keyword-only

    Returns
    -------
    Path

    Raises
    ------
    InputError
        With ``param`` 'path' or 'overwrite'.
    """
    from ..tables import check_new_file

    # a .json name, not a folder, not an existing file without overwrite
    out = check_new_file(path, suffix=".json", overwrite=overwrite)
    if result_dir is not None and Path(result_dir).resolve() in out.resolve().parents:
        raise InputError(f"expected a file outside the result folder '{result_dir}' (a result folder holds only "
                         f"the result's own files), got '{out}'", param="path")
    if out.exists() or out.is_symlink():
        if not overwrite:
            raise InputError(f"'{out}' exists; pass overwrite=True to replace it", param="path")
        try:
            old = json.loads(out.read_text(encoding="utf-8"))
        except (OSError, ValueError):
            old = None
        if not (isinstance(old, dict) and old.get("format") == SCORE_FORMAT):
            raise InputError(f"'{out}' is not a score file vesselflow wrote; it is never replaced: choose another "
                             "file name", param="overwrite")
    return out


def write_score(s, path, *, result_dir=None, truth_path=None, overwrite=False):
    """Write a :func:`score` dict to a JSON file, atomically.

    Parameters
    ----------
    s : dict
        From :func:`score`.
    path : str or Path
        Checked as :func:`check_score_file` checks it.
    result_dir, truth_path : str or Path, optional, keyword-only
        Recorded in the file as ``result`` and ``truth``.
    overwrite : bool, keyword-only

    Returns
    -------
    Path
        The file written.
    """
    from ..tables import write_atomic, write_json

    out = check_score_file(path, result_dir=result_dir, overwrite=overwrite)
    doc = {**s, "result": None if result_dir is None else str(result_dir),
           "truth": None if truth_path is None else str(truth_path)}
    out.parent.mkdir(parents=True, exist_ok=True)
    write_atomic(out, lambda tmp: write_json(tmp, doc))
    return out
