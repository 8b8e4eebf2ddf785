"""swerve: emulator-accelerated inference of the Milky Way's dark-matter halo shape
from the bent paths of hypervelocity stars."""

from importlib.metadata import PackageNotFoundError
from importlib.metadata import version as _version

try:
    __version__ = _version("swerve")
except PackageNotFoundError:  # pragma: no cover - running from a source tree
    __version__ = "0.0.0+unknown"

__all__ = ["__version__"]
