"""vesselflow: from segmented vessel masks to measured vessel graphs.

The public API is :func:`analyze` (array in, tables out) and the step
modules it runs, one per step, each usable on its own.
"""

from .analysis import Analysis, analyze
from .errors import ConfigError, InputError, SolverError, VesselflowError

__version__ = "0.1.0"

__all__ = ["analyze", "Analysis", "VesselflowError", "InputError", "ConfigError", "SolverError", "__version__"]
