"""Exception classes. Each specific error also inherits the matching builtin."""

__all__ = [
    "GridBiasError",
    "GridError",
    "ParameterError",
    "CheckpointError",
    "LockError",
    "CVLogError",
    "BlownUpError",
    "WriteError",
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


class WriteError(GridBiasError, RuntimeError):
    """A file could not be written (disk full, quota, I/O error): a failure of the work, not bad input.

    Attributes
    ----------
    path : str or None
        The file that could not be written.
    last_checkpoint : str or None
        The last checkpoint written by the run that stopped (None: none was written, or not a run).
    last_checkpoint_step : int or None
        Its MD step.
    bias : GridBias or None
        When a run stops on write failures: the bias in memory with every hill, to save elsewhere
        (``err.bias.save(path)``).
    """

    def __init__(self, message, *, path=None, last_checkpoint=None, last_checkpoint_step=None, bias=None):
        super().__init__(message)
        self.path = path
        self.last_checkpoint = last_checkpoint
        self.last_checkpoint_step = last_checkpoint_step
        self.bias = bias


class OutputError(WriteError):
    """A result file (a table, a figure, a report) that could not be written; an older file there is intact."""
