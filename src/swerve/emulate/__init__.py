"""Emulators of summary statistics, and their safe file format.

The training stage fits an emulator to simulated summaries at the design points; the
likelihood calls it at every step of the chain. Three modules, one concern each:

* :mod:`swerve.emulate.gp` -- :class:`GPEmulator`, a Gaussian-process regression
  (scikit-learn) of the summary vector as a function of the Galaxy parameters θ, optionally
  compressed by PCA, that reports its own uncertainty; prediction without scikit-learn.
* :mod:`swerve.emulate.kernels` -- the covariance kernels: scikit-learn builders for the fit
  and compiled cross-kernels for prediction, one table for both.
* :mod:`swerve.emulate.files` -- the folder an emulator is shared as (:func:`save`,
  :func:`load`, :func:`content_hash`, :func:`describe`): JSON, float64 arrays and checksums,
  verified before anything is built; no pickle anywhere.

Every name is importable from ``swerve.emulate`` itself, as before the split.
"""

from .files import (
    ARRAYS_FILE,
    CHECKSUMS_FILE,
    FORMAT_NAME,
    FORMAT_VERSION,
    JSON_FILE,
    EmulatorFileError,
    content_hash,
    describe,
    load,
    register,
    save,
)
from .gp import JITTER, SCALE_FLOOR, GPEmulator
from .kernels import KERNELS, cross_kernel

#: former private name of :func:`swerve.emulate.kernels.cross_kernel`, kept for old imports
_cross_kernel = cross_kernel

__all__ = [  # noqa: RUF022 - in reading order
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "EmulatorFileError",
    "GPEmulator",
    "save",
    "load",
    "describe",
    "content_hash",
    "register",
    "JSON_FILE",
    "ARRAYS_FILE",
    "CHECKSUMS_FILE",
    "JITTER",
    "SCALE_FLOOR",
    "KERNELS",
    "cross_kernel",
]
