"""Errors the tool reports as one line with exit code 2 (never a traceback)."""


class SparkAlignError(Exception):
    """Root of every error the tool reports as one line (exit code 2)."""


class InputError(SparkAlignError, ValueError):
    """Bad user input: names the row or line and the cause."""


class ConfigError(SparkAlignError, ValueError):
    """An invalid option or configuration value; names the key."""


class RunDirError(SparkAlignError):
    """The run directory cannot be used: unwritable, or it belongs to another run."""


class CheckpointMismatchError(RunDirError):
    """``--resume`` against a run with a different corpus or incompatible configuration."""


class CheckpointError(SparkAlignError):
    """A checkpoint is missing, damaged, or from a newer format version."""


class NumericalError(SparkAlignError, ArithmeticError):
    """Training produced a non-finite value (names the stage and iteration)."""
