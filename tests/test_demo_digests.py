"""The results on the demo volumes do not change unless someone means them to.

Each demo volume of ``synthetic_volumes/`` is analysed as the command does
(:func:`pipeline.analysis.analyze_file`, defaults), and every table of its
result and its summary are reduced to a digest that is compared with the
one stored in ``tests/data/demo_digests.json``. A refactoring must leave
them all as they were; a change that is meant to move results regenerates
the file on purpose, and the commit says why::

    python tests/test_demo_digests.py --update

Floats enter the digest at six significant digits, and values below 1e-9 of
their column's largest as zero (solver round-off, such as a 1e-17 flow in a
stagnant segment or a conservation residual, differs in its last bits
between machines); timings and residuals stay out.
"""

import hashlib
import json
import math
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1]
STORE = ROOT / "tests" / "data" / "demo_digests.json"
VOLUMES = ("tw-bed-01", "tw-ctrl-01", "tw-trt-01")
TABLES = ("segments", "nodes", "bifurcations", "levels", "vessels", "orders", "order_connectivity")
# summary keys of numerical round-off, not results
NOISE = ("residual",)


def _float_text(values):
    v = np.asarray(values, dtype=float)
    finite = np.isfinite(v)
    scale = float(np.abs(v[finite]).max()) if finite.any() else 0.0
    v = np.where(finite & (np.abs(v) < 1e-9 * scale), 0.0, v)
    return ["" if math.isnan(x) else f"{x:.6g}" for x in v.tolist()]


def _table_digest(df):
    cols = {}
    for name in df.columns:
        col = df[name]
        if pd.api.types.is_float_dtype(col.dtype):
            cols[name] = _float_text(col.to_numpy(dtype=float, na_value=np.nan))
        else:
            cols[name] = ["" if m else str(x) for x, m in zip(col.tolist(), col.isna().tolist())]
    text = ",".join(map(str, df.columns)) + "\n" + "\n".join(",".join(r) for r in zip(*cols.values()))
    return hashlib.sha256(text.encode()).hexdigest()[:16]


def _summary_digest(summary):
    def canon(x):
        if isinstance(x, bool) or x is None or isinstance(x, str):
            return x
        if isinstance(x, (int, np.integer)):
            return int(x)
        if isinstance(x, (float, np.floating)):
            return None if math.isnan(x) else f"{float(x):.6g}"
        if isinstance(x, dict):
            return {str(k): canon(v) for k, v in x.items() if not any(n in str(k) for n in NOISE)}
        if isinstance(x, (list, tuple)):
            return [canon(v) for v in x]
        return str(x)

    return hashlib.sha256(json.dumps(canon(summary), sort_keys=True).encode()).hexdigest()[:16]


def digests(name, tmp):
    """Digest of every table and of the summary of one demo volume's result."""
    from pipeline.analysis import analyze_file

    _, res = analyze_file(ROOT / "synthetic_volumes" / f"{name}.tif", Path(tmp) / name)
    out = {t: _table_digest(getattr(res, t)) for t in TABLES}
    out["summary"] = _summary_digest(res.summary)
    out["rows"] = {t: len(getattr(res, t)) for t in TABLES}
    return out


@pytest.fixture(scope="module")
def stored():
    return json.loads(STORE.read_text(encoding="utf-8"))


@pytest.mark.parametrize("name", VOLUMES)
def test_demo_results_are_unchanged(name, stored, tmp_path):
    got = digests(name, tmp_path)
    want = stored[name]
    assert got["rows"] == want["rows"]
    changed = sorted(k for k in want if k != "rows" and got[k] != want[k])
    assert not changed, f"{name}: {', '.join(changed)} changed (regenerate on purpose: see this module's docstring)"


def _update():
    import tempfile

    with tempfile.TemporaryDirectory() as tmp:
        data = {name: digests(name, tmp) for name in VOLUMES}
    STORE.parent.mkdir(parents=True, exist_ok=True)
    STORE.write_text(json.dumps(data, indent=1, sort_keys=True) + "\n", encoding="utf-8")
    print(f"wrote {STORE}")


if __name__ == "__main__":
    if sys.argv[1:] == ["--update"]:
        _update()
    else:
        sys.exit("usage: python tests/test_demo_digests.py --update")
