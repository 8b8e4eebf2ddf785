"""The validation harness (swerve.validation), the validate and forecast commands."""

import argparse
import json
import shutil
from pathlib import Path

import numpy as np
import pytest

from swerve.cli import main
from swerve.measurement import parse_error_model
from swerve.validation import (
    coverage_test,
    load_validate_config,
    rank_test,
    sbc_rank,
)

ROOT = Path(__file__).resolve().parents[1]


# ----------------------------------------------------------------- statistics on a toy problem
def _toy_fits(rng, n_trials, n_obs, sigma, width_factor=1.0, n_draws=99):
    """Gaussian mean with known sigma and a flat prior: the exact posterior is
    N(xbar, sigma / sqrt(n)) (conjugate). Truths drawn from a wide prior."""
    truth = rng.uniform(-5, 5, n_trials)
    xbar = truth + rng.normal(0, sigma / np.sqrt(n_obs), n_trials)
    sd = width_factor * sigma / np.sqrt(n_obs)
    draws = xbar[:, None] + sd * rng.standard_normal((n_trials, n_draws))
    lo68, hi68 = xbar - 0.9945 * sd, xbar + 0.9945 * sd  # central 68% of a normal: ±0.9945 sd
    lo95, hi95 = xbar - 1.96 * sd, xbar + 1.96 * sd
    return truth, draws, (truth >= lo68) & (truth <= hi68), (truth >= lo95) & (truth <= hi95)


def test_coverage_and_ranks_nominal_for_exact_posterior(rng):
    truth, draws, in68, in95 = _toy_fits(rng, 2000, 10, 2.0)
    c68, c95 = coverage_test(in68, 0.68), coverage_test(in95, 0.95)
    assert c68["pass"] and c95["pass"]
    assert abs(c68["observed"] - 0.68) < 2 * c68["sigma"]
    assert c68["sigma"] == pytest.approx(np.sqrt(0.68 * 0.32 / 2000))
    ranks = np.array([sbc_rank(d[:, None], [t])[0] for d, t in zip(draws, truth)])
    assert ranks.min() >= 0 and ranks.max() <= 99
    assert rank_test(ranks, 99, 10)["pass"]


def test_overconfident_posterior_fails(rng):
    truth, draws, in68, in95 = _toy_fits(rng, 2000, 10, 2.0, width_factor=0.5)
    assert not coverage_test(in68, 0.68)["pass"]
    assert not coverage_test(in95, 0.95)["pass"]
    ranks = np.array([sbc_rank(d[:, None], [t])[0] for d, t in zip(draws, truth)])
    rt = rank_test(ranks, 99, 10)
    assert not rt["pass"] and rt["histogram"][0] > rt["histogram"][5]  # U-shaped


def test_rank_bins_must_divide():
    with pytest.raises(ValueError, match="rank_bins"):
        rank_test([0, 1], 10, 3)


# ----------------------------------------------------------------------------- error models
def test_parse_error_model_forms(tmp_path):
    em = parse_error_model("pm=0.03,vlos=4,dist=0.2")
    assert em.pm.a == 0.03 and em.vlos.a == 4.0 and em.distance_frac.a == 0.2 and em.parallax is None
    em = parse_error_model("pm=0:0.01:1,plx=0.05")
    assert (em.pm.a, em.pm.b, em.pm.p) == (0.0, 0.01, 1.0) and em.parallax.a == 0.05 and em.distance_frac is None
    assert parse_error_model("none").vlos.a < 0.1
    f = tmp_path / "err.toml"
    f.write_text("pm = 0.05\nvlos = 10.0\ndistance_frac = 0.15\n")
    assert parse_error_model(str(f)).pm.a == 0.05
    with pytest.raises(ValueError, match="expected NAME=VALUE"):
        parse_error_model("pmm=0.02")
    with pytest.raises(ValueError, match="not a number"):
        parse_error_model("pm=abc")


def test_ci_config_is_valid():
    cfg = load_validate_config(ROOT / "training" / "validate-ci.toml")
    assert cfg["seed"] == 1 and cfg["power"]["n_stars"] == [30]


@pytest.mark.parametrize("path", sorted((ROOT / "training").glob("validate-*.toml")), ids=lambda p: p.name)
def test_every_shipped_validation_config_is_valid(path):
    """The configurations RESULTS.md quotes must still load (a renamed or removed key would
    otherwise show only when someone reruns them)."""
    cfg = load_validate_config(path)
    assert cfg["fit"]["nwalkers"] >= 4


# ----------------------------------------------------------------------------- end to end
@pytest.fixture(scope="module")
def held_out_run(tmp_path_factory):
    d = tmp_path_factory.mktemp("held") / "held-out"
    rc = main(["train", str(ROOT / "training" / "smoke.toml"), "--out", str(d), "--held-out", "--no-fit",
               "--no-progress", "--jobs", "2"])
    assert rc == 0
    return d


def test_validate_ci_end_to_end(smoke_run, held_out_run, tmp_path, capsys):
    _, emu = smoke_run
    out = tmp_path / "report"
    rc = main(["validate", "--emulator", str(emu), "--held-out", str(held_out_run), "--out", str(out),
               "--config", str(ROOT / "training" / "validate-ci.toml")])
    assert rc == 0
    doc = json.loads((out / "validation.json").read_text())
    assert set(doc) == {"settings", "accuracy", "calibration", "power"}
    assert doc["accuracy"]["n_rows"] == 8 and np.isfinite(doc["accuracy"]["rms_z"])
    assert set(doc["accuracy"]["rms_z_by_stat"]) >= {"mean_vtf", "log_l_tt"}
    cal = doc["calibration"]
    assert cal["n_catalogs"] == 8 and set(cal["parameters"]) == {"q_y", "q_z", "slope"}
    for v in cal["parameters"].values():
        assert len(v["ranks"]) == cal["n_fitted"] and all(0 <= r <= 19 for r in v["ranks"])
        assert sum(v["rank_test"]["histogram"]) == cal["n_fitted"]
    rows = doc["power"]["rows"]
    assert [r["case"] for r in rows] == ["axisymmetric", "triaxial"]
    assert "ks_success" in rows[0] and "ks_success" not in rows[1]
    assert all(0.0 <= r["swerve_success"] <= 1.0 for r in rows)
    for f in ("accuracy.png", "accuracy_map.png", "calibration.png", "power.png", "power.md"):
        assert (out / f).stat().st_size > 0
    assert "calibration" in capsys.readouterr().out


def test_held_out_run_of_an_older_emulator_is_accepted(smoke_run, held_out_run, tmp_path):
    """An emulator trained before a configuration option existed records a configuration without
    it (and that configuration's hash); a held-out run made now from the same file hashes the
    option at its default. The two are the same training and must match (the shipped default
    emulator predates ``[summaries] vr_edges``); another training configuration is still refused."""
    import hashlib
    import shutil

    from swerve.config import config_hash
    from swerve.validation import check_inputs

    _, emu = smoke_run
    old = tmp_path / "old-emulator"
    shutil.copytree(emu, old)
    doc = json.loads((old / "emulator.json").read_text())

    def write(cfg):
        doc["metadata"]["config"] = cfg
        doc["metadata"]["config_hash"] = config_hash(cfg)
        (old / "emulator.json").write_text(json.dumps(doc))
        (old / "checksums.sha256").write_text("".join(
            f"{hashlib.sha256((old / n).read_bytes()).hexdigest()}  {n}\n" for n in ("emulator.json", "arrays.npz")))

    cfg = doc["metadata"]["config"]
    without = {**cfg, "selection": {k: v for k, v in cfg["selection"].items() if k != "v_min"}}
    assert cfg["selection"]["v_min"] == 0.0  # the option's default: the same training
    write(without)
    # the recorded hashes differ, so only reading the old configuration with today's schema matches them
    assert doc["metadata"]["config_hash"] != json.loads((held_out_run / "run.json").read_text())["config_hash"]
    check_inputs(old, held_out_run)  # accepted
    write({**without, "bank": {**cfg["bank"], "n_orbits": 999}})
    with pytest.raises(ValueError, match="another training configuration"):
        check_inputs(old, held_out_run)


def test_forecast_end_to_end(smoke_run, tmp_path, capsys):
    _, emu = smoke_run
    cfg = tmp_path / "fc.toml"
    cfg.write_text("[fit]\nsamples = 4\nnwalkers = 16\nmax_steps = 100\ncheck_every = 50\nn_draws = 9\n")
    out = tmp_path / "fc"
    rc = main(["forecast", "--emulator", str(emu), "--n", "20,40", "--errors", "pm=0.02,vlos=5,dist=0.1",
               "--catalogs", "2", "--jobs", "1", "--truth", "q_z=0.85", "--out", str(out), "--config", str(cfg)])
    assert rc == 0
    doc = json.loads((out / "forecast.json").read_text())
    assert [r["n_stars"] for r in doc["rows"]] == [20, 40]
    assert doc["settings"]["truth"]["q_z"] == 0.85 and doc["settings"]["side"] == "q_z<1"
    for r in doc["rows"]:
        assert r["width68_q_z"]["median"] > 0 and 0 <= r["p_decisive"] <= 1
    assert (out / "forecast.png").stat().st_size > 0


# ----------------------------------------------------------------------------- CLI
@pytest.mark.parametrize("cmd", ["validate", "forecast"])
def test_help_documents_every_option(cmd, capsys):
    from swerve.cli import build_parser

    with pytest.raises(SystemExit):
        main([cmd, "--help"])
    text = capsys.readouterr().out
    sub = build_parser()._subparsers._group_actions[0].choices[cmd]
    for action in sub._actions:
        assert action.help, f"{cmd} {action.option_strings} has no help"
        if action.help == argparse.SUPPRESS:  # a deprecated old spelling: works, but hidden
            assert "--print-config" in action.option_strings and "--print-config" not in text
            continue
        for opt in action.option_strings:
            assert opt in text


def _one_line_error(capsys, cmd):
    err = capsys.readouterr().err.strip()
    assert err.startswith(f"swerve {cmd}: error:") and "\n" not in err
    return err


def test_validate_bad_input(smoke_run, held_out_run, tmp_path, capsys):
    run_dir, emu = smoke_run
    args = ["--emulator", str(emu), "--out", str(tmp_path / "r"), "--config", str(ROOT / "training" / "validate-ci.toml")]
    assert main(["validate", "--held-out", str(tmp_path / "missing"), *args]) == 1
    assert "does not exist" in _one_line_error(capsys, "validate")
    other = tmp_path / "other"
    shutil.copytree(held_out_run, other)
    rec = json.loads((other / "run.json").read_text())
    rec["config_hash"] = "0" * 64
    (other / "run.json").write_text(json.dumps(rec))
    assert main(["validate", "--held-out", str(other), *args]) == 1
    assert "another training configuration" in _one_line_error(capsys, "validate")
    assert main(["validate", "--held-out", str(run_dir), *args]) == 1
    assert "not a held-out one" in _one_line_error(capsys, "validate")
    assert main(["validate", "--emulator", str(emu), "--out", str(tmp_path / "r")]) == 1
    assert "--held-out is required" in _one_line_error(capsys, "validate")
    assert not (tmp_path / "r").exists()


def test_forecast_bad_input(smoke_run, tmp_path, capsys):
    _, emu = smoke_run
    assert main(["forecast", "--emulator", str(emu), "--out", str(tmp_path), "--n", "20,x"]) == 1
    assert "expected integers" in _one_line_error(capsys, "forecast")
    assert main(["forecast", "--emulator", str(emu), "--out", str(tmp_path), "--truth", "q_z=2.0"]) == 1
    assert "outside the emulator's domain" in _one_line_error(capsys, "forecast")
    assert main(["forecast", "--emulator", str(emu), "--out", str(tmp_path), "--errors", "speed=3"]) == 1
    assert "expected NAME=VALUE" in _one_line_error(capsys, "forecast")
