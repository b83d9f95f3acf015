"""Exception classes. Each specific error also inherits the matching builtin."""

__all__ = [
    "GridBiasError",
    "GridError",
    "ParameterError",
    "CheckpointError",
    "LockError",
    "CVLogError",
    "BlownUpError",
    "OutputError",
]


class GridBiasError(Exception):
    """Base class of every error gridbias raises on purpose."""


class GridError(GridBiasError, ValueError):
    """An invalid grid specification or points that do not fit the grid."""


class ParameterError(GridBiasError, ValueError):
    """An invalid bias, wall or adapter parameter."""


class CheckpointError(GridBiasError, ValueError):
    """A checkpoint file that is missing, truncated, altered, foreign or incompatible."""


class LockError(GridBiasError, RuntimeError):
    """A checkpoint path already held by another live process."""


class CVLogError(GridBiasError, ValueError):
    """A CV log file that is not ours, is damaged, or does not fit the request."""


class BlownUpError(GridBiasError, RuntimeError):
    """The simulation produced non-finite positions, velocities or CV values; nothing was deposited or saved."""


class OutputError(GridBiasError, OSError):
    """A result file (a table, a figure, a report) that could not be written; an older file there is intact."""
