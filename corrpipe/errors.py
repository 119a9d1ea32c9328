"""Exception types raised by corrpipe for problems the user can fix."""

from __future__ import annotations

__all__ = [
    "CorrpipeError",
    "ConfigError",
    "InputError",
    "CheckpointError",
    "StageError",
    "LockError",
]


class CorrpipeError(Exception):
    """Base class of every error corrpipe raises on purpose.

    The message says what is wrong, where (file, column, key) and how to fix it.
    The command-line interface prints it as a one-line reason and exits non-zero.
    """


class ConfigError(CorrpipeError):
    """A configuration file or value is invalid."""


class InputError(CorrpipeError):
    """An input catalogue, footprint or array is invalid."""


class CheckpointError(CorrpipeError):
    """A stage checkpoint is missing, damaged or from an incompatible schema."""


class StageError(CorrpipeError):
    """A pipeline stage cannot run with the inputs it was given."""


class LockError(CorrpipeError):
    """Another run holds the lock on the output folder."""
