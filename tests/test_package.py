"""The package as a whole: what importing it loads, what running it leaves in the process.

Each check runs in a fresh interpreter (``sys.modules`` and ``os.environ``
of this test process are shared with every other test).
"""

import json
import subprocess
import sys

import pytest

# Libraries the bare import must not load: the analysis stack (loaded on
# first use of ``analyze``) and the optional extras (batch, report, viewer).
HEAVY = ("pandas", "numba", "scipy", "networkx", "skimage", "dask", "distributed", "matplotlib", "napari", "qtpy",
         "PyQt5", "PyQt6", "PySide2", "PySide6", "vispy", "zarr", "h5py", "pyarrow")
# Extras the analysis core never loads (the CLI's analyze command included).
EXTRAS = ("dask", "distributed", "matplotlib", "napari", "qtpy", "PyQt5", "PyQt6", "PySide2", "PySide6", "vispy",
          "zarr", "h5py")


def _run(code):
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, timeout=300)
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


def test_bare_import_loads_no_heavy_library_and_leaves_the_environment():
    out = _run(
        "import json, os, sys\n"
        "before = dict(os.environ)\n"
        "import pipeline\n"
        "print(json.dumps({'loaded': sorted({m.split('.')[0] for m in sys.modules}), "
        "'env_same': dict(os.environ) == before, 'all': pipeline.__all__}))\n"
    )
    assert not set(out["loaded"]) & set(HEAVY), sorted(set(out["loaded"]) & set(HEAVY))
    assert out["env_same"]
    assert {"analyze", "Analysis", "InputError"} <= set(out["all"])


def test_analyze_loads_on_first_use_and_runs_without_the_extras(tmp_path):
    out = _run(
        "import json, os, sys\n"
        "before = dict(os.environ)\n"
        "import pipeline, pipeline.cli\n"
        "from pipeline import synthetic\n"
        "import numpy as np\n"
        "net = synthetic.y_branch(parent_radius_um=5, parent_length_um=40, daughter_length_um=35)\n"
        "m, _ = synthetic.rasterize(net, spacing=(1, 1, 1))\n"
        f"np.save({str(tmp_path / 'y.npy')!r}, m)\n"
        f"code = pipeline.cli.main(['analyze', {str(tmp_path / 'y.npy')!r}, '-o', {str(tmp_path / 'out')!r}, "
        "'--quiet', '--spacing', '1', '1', '1'])\n"
        "res = pipeline.analyze(m, spacing=(1, 1, 1))\n"
        "print(json.dumps({'code': code, 'segments': len(res.segments), "
        "'loaded': sorted({k.split('.')[0] for k in sys.modules}), 'env_same': dict(os.environ) == before}))\n"
    )
    assert out["code"] == 0 and out["segments"] == 3
    assert not set(out["loaded"]) & set(EXTRAS), sorted(set(out["loaded"]) & set(EXTRAS))
    # The thread pool starts with sleeping idle threads, without leaving a
    # variable behind (pipeline._parallel.start_threads).
    assert out["env_same"]


@pytest.mark.parametrize("preset", [None, "ACTIVE"])
def test_thread_pool_start_keeps_the_users_wait_policy(preset):
    setup = "" if preset is None else f"os.environ['OMP_WAIT_POLICY'] = {preset!r}\n"
    out = _run(
        "import json, os\n" + setup +
        "from pipeline import _parallel\n"
        "_parallel.start_threads()\n"
        "import numba\n"
        "print(json.dumps({'policy': os.environ.get('OMP_WAIT_POLICY'), 'layer': numba.threading_layer()}))\n"
    )
    assert out["policy"] == preset
    assert out["layer"] in ("omp", "tbb", "workqueue")


# Modules over about 800 lines that are one algorithm each, as the
# contributor guide (DEVELOPERS.md, "Sizes, and what is still too long")
# explains; any other module that grows past the line is a knot to untie.
ONE_ALGORITHM = {"thinning.py", "pruning.py", "flow/boundary.py"}
MODULE_LINES = 800
FUNCTION_CODE_LINES = 120


def _code_lines(lines, node):
    """Lines of a function that hold code: no docstring, comment or blank line."""
    import ast

    doc = set()
    if ast.get_docstring(node) is not None:
        doc = set(range(node.body[0].lineno, node.body[0].end_lineno + 1))
    return sum(1 for i in range(node.lineno, node.end_lineno + 1)
               if i not in doc and lines[i - 1].strip() and not lines[i - 1].strip().startswith("#"))


def test_modules_and_functions_stay_within_the_house_sizes():
    # The house rule of the package's layout: no module over about 800 lines
    # unless it is one cohesive algorithm, no function over about 120 lines
    # of code (signatures and numpydoc docstrings apart).
    import ast
    from pathlib import Path

    root = Path(__file__).resolve().parents[1] / "pipeline"
    long_modules, long_functions = [], []
    for path in sorted(root.rglob("*.py")):
        rel = path.relative_to(root).as_posix()
        text = path.read_text(encoding="utf-8")
        lines = text.splitlines()
        if len(lines) > MODULE_LINES and rel not in ONE_ALGORITHM:
            long_modules.append((rel, len(lines)))
        for node in ast.walk(ast.parse(text)):
            if isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef)):
                n = _code_lines(lines, node)
                if n > FUNCTION_CODE_LINES:
                    long_functions.append((rel, node.name, n))
    assert not long_modules, long_modules
    assert not long_functions, long_functions
