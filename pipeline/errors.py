"""The altigrade error hierarchy.

Every error the package raises on purpose derives from :class:`AltigradeError` and from a
builtin, so callers may catch either. The CLI turns any :class:`AltigradeError` into a single
line on stderr and exit status 2; anything else is an internal error (exit status 1).
"""

from __future__ import annotations

__all__ = [
    "AltigradeError",
    "ConfigError",
    "InputFileError",
    "OutputError",
]


class AltigradeError(Exception):
    """Root of every error altigrade raises on purpose."""


class ConfigError(AltigradeError, ValueError):
    """The run configuration is malformed: names the file and the key path."""


class InputFileError(AltigradeError, ValueError):
    """An input file cannot be used as a whole: names the file (and row, where one is at fault)."""


class OutputError(AltigradeError, OSError):
    """The output folder cannot be written (permissions, disk full, path outside the run folder)."""
