"""Exception hierarchy shared by every step.

In: nothing. Out: ``VesselflowError`` and its five subclasses. The CLI maps
``InputError`` and ``ConfigError`` to exit code 2 with a one-line message,
``StorageError`` and anything else to exit code 1 (also one line).
"""

__all__ = ["VesselflowError", "InputError", "ConfigError", "SolverError", "StorageError", "EngineError"]


class VesselflowError(Exception):
    """Base class of every error vesselflow raises on purpose.

    Parameters
    ----------
    message : str
        What was expected and what was got.
    param : str, optional
        The Python parameter the message is about (``'workers'``,
        ``'overwrite'``): the message then reads ``'param: message'``, and
        the command line shows the parameter's option instead
        (``'--workers: ...'``). Hints in the message name parameters as
        Python spells them (``overwrite=True``); the command line rewrites
        those too.
    """

    def __init__(self, message="", *, param=None):
        super().__init__(f"{param}: {message}" if param else message)
        self.param = param
        self.detail = message

    def __reduce__(self):
        # the keyword survives pickling (errors travel from Dask workers)
        return _rebuild, (type(self), self.detail, self.param)


def _rebuild(cls, detail, param):
    return cls(detail, param=param)


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
