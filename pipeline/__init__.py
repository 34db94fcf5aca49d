"""vesselflow: from segmented vessel masks to measured vessel graphs.

The public API is :func:`analyze` (array in, tables out) and the step
modules it runs, one per step, each usable on its own.

:func:`analyze` returns a :class:`Result` (``Analysis`` is the same type),
the one type a result folder reads back as (``pipeline.tables.load_result``)
and the batch, the report, the scorer and the viewer take.

Importing the package is cheap: ``analyze``, ``Result`` and ``Analysis`` load the
analysis (numpy, scipy, pandas, numba...) on first use, and the step modules
load when imported (``from pipeline import synthetic``). Nothing here
changes the process environment.
"""

from ._version import __version__
from .errors import ConfigError, InputError, SolverError, VesselflowError

__all__ = ["analyze", "Result", "Analysis", "VesselflowError", "InputError", "ConfigError", "SolverError", "__version__"]

_LAZY = {"analyze", "Result", "Analysis"}


def __getattr__(name):
    # PEP 562: the analysis and its libraries load on first use
    if name in _LAZY:
        from . import analysis

        value = getattr(analysis, name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'pipeline' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | _LAZY)
