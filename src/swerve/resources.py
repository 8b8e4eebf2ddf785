"""Where swerve finds the files it ships: the default emulator.

The source of the shipped emulator is the repository's top-level ``emulators/default/``. A
regular install (``pip install .``) copies it into the package (``swerve/emulators/default``, see
``setup.py``), so it is found from any working directory; an editable install and a source
checkout use the repository's folder itself.
"""

from __future__ import annotations

import os
from pathlib import Path

__all__ = ["DEFAULT_EMULATOR_NAME", "default_emulator"]

#: the shipped emulator's folder name, under ``emulators/``
DEFAULT_EMULATOR_NAME = "default"

_PACKAGE = Path(__file__).resolve().parent


def _candidates() -> list[Path]:
    return [
        _PACKAGE / "emulators" / DEFAULT_EMULATOR_NAME,  # a regular install's copy
        _PACKAGE.parents[1] / "emulators" / DEFAULT_EMULATOR_NAME,  # src/swerve -> the repository's folder
    ]


def default_emulator() -> Path:
    """The shipped default emulator's folder.

    ``$SWERVE_EMULATOR`` when set; else the copy installed with the package; else
    ``emulators/default`` of the source tree the package runs from (an editable install or a
    clone). The working directory plays no part, so the same command finds the same emulator
    wherever it is run.

    Returns
    -------
    pathlib.Path
        The folder; the first candidate when none exists, so that the caller's error names a
        real place to look.
    """
    env = os.environ.get("SWERVE_EMULATOR")
    if env:
        return Path(env)
    candidates = _candidates()
    for path in candidates:
        if (path / "emulator.json").is_file():
            return path
    return candidates[0]
