"""Build hook: ship the default emulator inside the package.

The project's metadata is in ``pyproject.toml``. This file only makes a regular install copy the
repository's ``emulators/default/`` (its source) into ``swerve/emulators/default/`` of the built
package, where :func:`swerve.resources.default_emulator` finds it from any working directory. An
editable install needs no copy: it reads the repository's folder directly.
"""

import shutil
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py

EMULATOR_SOURCE = Path(__file__).resolve().parent / "emulators" / "default"
EMULATOR_FILES = ("emulator.json", "arrays.npz", "checksums.sha256")


class BuildWithEmulator(build_py):
    """``build_py`` that also copies the shipped emulator's files into the built package."""

    def run(self):
        super().run()
        if getattr(self, "editable_mode", False):
            return
        target = Path(self.build_lib) / "swerve" / "emulators" / "default"
        target.mkdir(parents=True, exist_ok=True)
        for name in EMULATOR_FILES:
            source = EMULATOR_SOURCE / name
            if not source.is_file():
                raise FileNotFoundError(f"{source}: the shipped emulator's file is missing; the package cannot be built")
            shutil.copyfile(source, target / name)


setup(cmdclass={"build_py": BuildWithEmulator})
