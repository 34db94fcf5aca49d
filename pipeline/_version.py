"""The package version, in one place (the package, the CLI, run.json and the report read it)."""

__version__ = "0.1.0"
