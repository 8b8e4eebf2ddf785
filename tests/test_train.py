"""The training stage on the smoke configuration: determinism across backends, resuming,
refusing another configuration, held-out accuracy, and the emulator file it writes."""

import functools
import json

import numpy as np
import pytest

from conftest import ROOT
from swerve.cli import main
from swerve.config import config_hash
from swerve.simulate import load_training_config, simulate_point, training_table
from swerve.training import collect, make_design, run_design

SMOKE = ROOT / "training" / "smoke.toml"


def _run(tmp_path, name, **kw):
    setup = load_training_config(SMOKE)
    d = setup.cfg["design"]
    names, pts = make_design(setup.galaxy_infer, 3, method=d["method"], seed=d["seed"])
    run_design(functools.partial(simulate_point, setup.cfg), pts, names, tmp_path / name, config_hash(setup.cfg),
               d["seed"], progress=False, **kw)
    return collect(tmp_path / name)[2]


@pytest.mark.filterwarnings("ignore::DeprecationWarning:distributed.*")  # distributed's own shutdown notices
def test_smoke_summaries_identical_serial_loky_dask(tmp_path):
    """The same design points give bitwise-identical summaries whatever the backend."""
    serial = _run(tmp_path, "serial", backend="serial")
    loky = _run(tmp_path, "loky", backend="loky", n_jobs=2)
    dask = _run(tmp_path, "dask", backend="dask", dask_local_workers=2)
    for key in ("values", "noise_var", "launch", "ess"):
        np.testing.assert_array_equal(serial[key], loky[key])
        np.testing.assert_array_equal(serial[key], dask[key])
    assert np.all(np.isfinite(serial["values"]))


def test_resume_and_refuse_other_configuration(tmp_path, capsys):
    out = tmp_path / "run"
    assert main(["train", str(SMOKE), "--out", str(out), "--no-fit", "--no-progress", "--jobs", "1"]) == 0
    before = {p.name: p.stat().st_mtime_ns for p in (out / "points").iterdir()}
    assert main(["train", str(SMOKE), "--out", str(out), "--no-fit", "--no-progress", "--jobs", "1"]) == 0
    assert "0 computed, 8 already done" in capsys.readouterr().out
    assert {p.name: p.stat().st_mtime_ns for p in (out / "points").iterdir()} == before
    other = tmp_path / "other.toml"
    other.write_text(SMOKE.read_text().replace("n_orbits = 600", "n_orbits = 601"))
    assert main(["train", str(other), "--out", str(out), "--no-fit", "--no-progress"]) == 1
    err = capsys.readouterr().err
    assert "new --out folder" in err and err.count("\n") == 1


def test_held_out_accuracy_of_the_smoke_emulator(smoke_run, tmp_path):
    """Normalised residuals (emulated - simulated) / (predicted sigma (+) simulation noise) on
    held-out Galaxies have an RMS within 0.7-1.5: the emulator's uncertainty is honest."""
    from swerve.emulate import load

    _, emu_dir = smoke_run
    held = tmp_path / "held"
    assert main(["train", str(SMOKE), "--out", str(held), "--held-out", "--no-progress", "--jobs", "2"]) == 0
    setup = load_training_config(SMOKE)
    _, theta, outputs = collect(held)
    X, Y, V = training_table(setup, theta, outputs)
    emu = load(emu_dir)
    mean, sd = emu.predict(X, return_std=True)
    z = (mean - Y) / np.sqrt(sd**2 + V)
    rms = float(np.sqrt(np.mean(z**2)))
    assert 0.7 <= rms <= 1.5, rms


def test_emulator_records_provenance_and_info(smoke_run, capsys):
    _, emu_dir = smoke_run
    doc = json.loads((emu_dir / "emulator.json").read_text())
    meta = doc["metadata"]
    assert meta["config_hash"] == config_hash(load_training_config(SMOKE).cfg)
    assert meta["galaxy"]["halo_flattening"] == "density"
    assert meta["provenance"]["n_design_points"] == 8
    assert main(["info", str(emu_dir)]) == 0
    out = capsys.readouterr().out
    assert "q_z" in out and "[0.8, 1.2]" in out


def test_potential_flattened_emulator_reports_negative_density(tmp_path, capsys):
    """An emulator trained with a potential-flattened halo records, and swerve info shows,
    where its density is negative inside the selection volume."""
    cfg = tmp_path / "pot.toml"
    text = SMOKE.read_text().replace('halo_flattening = "density"', 'halo_flattening = "potential"')
    text = text.replace("infer = { q_y = [0.8, 1.2], q_z = [0.8, 1.2] }", "infer = { q_y = [0.95, 1.05], q_z = [0.7, 0.9] }")
    text = text.replace("size = 8", "size = 4").replace("points_per_galaxy = 2", "points_per_galaxy = 1")
    cfg.write_text(text)
    out = tmp_path / "run"
    rc = main(["train", str(cfg), "--out", str(out), "--no-progress", "--jobs", "1"])
    assert rc == 0
    assert "negative density" in capsys.readouterr().err  # the orbits' warning, printed by the CLI
    assert main(["info", str(out / "emulator")]) == 0
    text = capsys.readouterr().out
    assert "negative density inside the selection volume" in text


def test_bad_training_config(tmp_path, capsys):
    bad = tmp_path / "bad.toml"
    bad.write_text("[galaxy]\ninfer = { q_zz = [0.8, 1.2] }\n")
    assert main(["train", str(bad), "--out", str(tmp_path / "o")]) == 1
    assert "did you mean 'q_z'" in capsys.readouterr().err
    bad.write_text("[design]\nsise = 3\n")
    assert main(["train", str(bad), "--out", str(tmp_path / "o")]) == 1
    assert "did you mean 'size'" in capsys.readouterr().err


def test_other_emulator_settings_reuse_the_simulations(smoke_run, tmp_path, capsys):
    """[emulator] does not enter the run folder's hash: refitting with scale_azimuthal reuses every
    point, and the refitted emulator's v_pf statistics vanish at q_y = 1, where a radial launch in
    an axisymmetric Galaxy keeps L_z = 0 (so v_φ = 0: an axisymmetric potential conserves L_z,
    Binney & Tremaine 2008 §3.2, from memory); the unscaled smoke emulator only approximates that."""
    import shutil

    from swerve.emulate import SCALE_FLOOR, load
    from swerve.summaries import azimuthal_outputs

    run_dir, emu_dir = smoke_run
    run = tmp_path / "run"
    shutil.copytree(run_dir, run)
    cfg = tmp_path / "scaled.toml"
    cfg.write_text(SMOKE.read_text().replace("[emulator]", "[emulator]\nscale_azimuthal = true"))
    assert main(["train", str(cfg), "--out", str(run), "--no-progress", "--jobs", "1"]) == 0
    assert "0 computed, 8 already done" in capsys.readouterr().out
    setup = load_training_config(SMOKE)
    idx = azimuthal_outputs(setup.spec)
    names = setup.spec.output_names()
    assert {names[i].split("_", 1)[1] for i in idx["linear"]} == {"mean_vpf", "l_pr", "l_pt"}
    assert {names[i].split("_", 1)[1] for i in idx["log"]} == {"log_l_pp"}
    theta = np.array([[1.0, q_z, -0.5] for q_z in (0.8, 1.0, 1.2)])
    scaled = load(run / "emulator").predict(theta)
    assert np.max(np.abs(scaled[:, idx["linear"]])) < 100 * SCALE_FLOOR
    assert np.max(scaled[:, idx["log"]]) < np.log(SCALE_FLOOR) + 5
    plain = load(emu_dir).predict(theta)
    assert np.max(np.abs(plain[:, idx["linear"]])) > 1000 * np.max(np.abs(scaled[:, idx["linear"]]))


def test_scale_azimuthal_needs_q_y_inferred(tmp_path, capsys):
    cfg = tmp_path / "noqy.toml"
    text = SMOKE.read_text().replace("infer = { q_y = [0.8, 1.2], q_z = [0.8, 1.2] }", "infer = { q_z = [0.8, 1.2] }")
    text = text.replace("size = 8", "size = 3").replace("points_per_galaxy = 2", "points_per_galaxy = 1")
    cfg.write_text(text.replace("[emulator]", "[emulator]\nscale_azimuthal = true"))
    assert main(["train", str(cfg), "--out", str(tmp_path / "run"), "--no-progress", "--jobs", "1"]) == 1
    err = capsys.readouterr().err
    assert "scale_azimuthal needs q_y" in err and err.count("\n") == 1
