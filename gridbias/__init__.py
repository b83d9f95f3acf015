"""gridbias: a grid-stored metadynamics bias (standard and well-tempered) for OpenMM and any Python MD code.

The core (``Grid``, ``GridBias``, ``Wall``) is pure NumPy + numba; ``gridbias.openmm`` plugs it into
OpenMM. Importing this package compiles nothing and imports neither OpenMM nor matplotlib nor MPI.
"""

from importlib.metadata import PackageNotFoundError, version

from .bias import KB, GridBias
from .errors import (
    BlownUpError,
    CheckpointError,
    CVLogError,
    GridBiasError,
    GridError,
    LockError,
    OutputError,
    ParameterError,
)
from .grid import Grid
from .history import HillHistory
from .walls import Wall

try:
    __version__ = version("gridbias")
except PackageNotFoundError:  # running from a source tree that was not installed
    __version__ = "0+unknown"

__all__ = [
    "Grid",
    "GridBias",
    "Wall",
    "HillHistory",
    "KB",
    "GridBiasError",
    "GridError",
    "ParameterError",
    "CheckpointError",
    "LockError",
    "CVLogError",
    "BlownUpError",
    "OutputError",
    "__version__",
]
