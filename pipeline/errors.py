"""Exception hierarchy shared by every step.

In: nothing. Out: ``VesselflowError`` and its five subclasses. The CLI maps
``InputError`` and ``ConfigError`` to exit code 2 with a one-line message,
``StorageError`` and anything else to exit code 1 (also one line).
"""

__all__ = ["VesselflowError", "InputError", "ConfigError", "SolverError", "StorageError", "EngineError"]


class VesselflowError(Exception):
    """Base class of every error vesselflow raises on purpose."""


class InputError(VesselflowError, ValueError):
    """The input data (file, array, spacing, sample sheet) is not usable.

    Messages name the parameter, what was expected and what was got.
    """


class ConfigError(VesselflowError, ValueError):
    """A configuration key is unknown or its value is out of range."""


class SolverError(VesselflowError, RuntimeError):
    """A numerical solve did not converge or produced non-finite values."""


class StorageError(VesselflowError, OSError):
    """Writing or reading a file failed for a reason of the environment.

    A full disk, a missing permission, a read-only file system: the message
    names the path, the system's reason and what is needed. Whatever was
    being written is removed again, so nothing is left half-written.
    """


class EngineError(VesselflowError, RuntimeError):
    """The batch engine stopped: the Dask scheduler was lost, or no worker was left.

    Results already on disk are kept; running the same batch again resumes.
    """
