"""The README's main job: `swerve fit examples/demo.ecsv` on the shipped default emulator
recovers the demo's stated truth (examples/make_demo.py), and the shipped files are sound."""

import json

import pytest
from astropy.table import Table

from conftest import ROOT
from swerve.cli import main
from swerve.emulate import load

EMULATOR = ROOT / "emulators" / "default"
DEMO = ROOT / "examples" / "demo.ecsv"


def test_shipped_emulator_loads_and_covers_the_demo_truth():
    emu = load(EMULATOR)
    truth = Table.read(DEMO).meta["true_parameters"]
    for name, (lo, hi) in zip(emu.parameter_names, emu.bounds):
        assert lo <= truth[name] <= hi, name
    assert emu.metadata["galaxy"]["halo_flattening"] == "density"
    size = sum(p.stat().st_size for p in EMULATOR.iterdir())
    assert size < 5e6  # shipped emulators stay a few MB


@pytest.mark.filterwarnings("ignore::swerve.sampling.ConvergenceWarning")
def test_fit_of_the_demo_recovers_the_truth(tmp_path, capsys):
    out = tmp_path / "fit-demo"
    assert main(["fit", str(DEMO), "--out", str(out), "--no-progress", "--emulator", str(EMULATOR)]) == 0
    s = json.loads((out / "summary.json").read_text())
    truth = Table.read(DEMO).meta["true_parameters"]
    for name, p in s["parameters"].items():
        lo, hi = p["ci95"]
        assert lo <= truth[name] <= hi, f"{name}: truth {truth[name]} outside the 95% interval [{lo}, {hi}]"
    assert s["sampler"]["converged"]
