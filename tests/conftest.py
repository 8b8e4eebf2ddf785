"""Shared test fixtures."""

from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def smoke_run(tmp_path_factory):
    """training/smoke.toml trained once per test session (about 10-20 s on 2 cores):
    returns (run_dir, emulator_dir)."""
    from swerve.cli import main

    run_dir = tmp_path_factory.mktemp("smoke") / "run"
    rc = main(["train", str(ROOT / "training" / "smoke.toml"), "--out", str(run_dir), "--no-progress", "--jobs", "2"])
    if rc != 0:
        raise RuntimeError("swerve train training/smoke.toml failed")
    return run_dir, run_dir / "emulator"
