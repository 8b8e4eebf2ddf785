"""Mock catalogs: valid catalog files with units and meta, reproducibility, the CLI."""

import numpy as np
import pytest
from astropy.table import Table

from swerve.bank import build_bank
from swerve.catalog import COLUMNS, read_catalog
from swerve.cli import main
from swerve.galaxy import Galaxy
from swerve.launch import BoundedPowerLawSpeed
from swerve.measurement import ErrorLaw, ErrorModel
from swerve.population import make_mock, write_mock
from swerve.selection import Selection

SEL = Selection(r_min=10.0, r_max=60.0, outgoing=True)
EM = ErrorModel(parallax=0.02, distance_frac=0.1, pm=ErrorLaw(0.0, 0.01, 1.0), corr_pmra_pmdec=0.1, vlos=5.0)


@pytest.fixture(scope="module")
def setup():
    g = Galaxy.default(q_z=0.85, q_y=1.1)
    bank = build_bank(g, 512, 21, t_max=200.0, dt=2.0, r_min_store=10.0, r_max=60.0)
    return g, bank


def test_mock_is_a_valid_catalog_with_units(setup, tmp_path):
    g, bank = setup
    launch = BoundedPowerLawSpeed(600.0, 2200.0, -0.5)
    t = make_mock(g, launch, SEL, EM, 120, 5, bank=bank)
    assert set(t.colnames) <= set(COLUMNS) and len(t) == 120
    assert t["pmra"].unit == "mas / yr" and t["distance"].unit == "kpc" and t["vlos_err"].unit == "km / s"
    assert t.meta["true_parameters"]["q_z"] == 0.85 and t.meta["true_parameters"]["slope"] == -0.5
    assert t.meta["seed"] == 5 and t.meta["solar"] and t.meta["selection"]["r_min"] == 10.0
    for ext in ("ecsv", "fits", "csv"):
        path = tmp_path / f"mock.{ext}"
        write_mock(t, path)
        cat = read_catalog(path)
        assert cat.n == 120
    back = Table.read(tmp_path / "mock.ecsv")
    assert back.meta["galaxy"] == g.to_dict() and str(back["pmdec"].unit) == "mas / yr"
    # errors follow the error model at the true distance: pm error / (d/10 kpc) = 0.01 mas/yr
    t2 = make_mock(g, launch, SEL, EM, 50, 5, bank=bank, include_truth=True)
    assert np.allclose(t2["pmra_err"], 0.01 * t2["true_distance"] / 10.0, rtol=1e-12)
    assert np.allclose(t2["distance_err"], 0.1 * t2["true_distance"], rtol=1e-12)
    # the truth is consistent: selected stars are outgoing beyond 10 kpc
    assert np.all(t2["true_r"] >= 10.0) and np.all(t2["true_v_r"] > 0)


def test_mock_reproducible_and_checks_bank(setup):
    g, bank = setup
    launch = BoundedPowerLawSpeed(600.0, 2200.0, -0.5)
    a = make_mock(g, launch, SEL, EM, 40, 9, bank=bank)
    b = make_mock(g, launch, SEL, EM, 40, 9, bank=bank)
    assert np.array_equal(a["pmra"], b["pmra"]) and np.array_equal(a["ra"], b["ra"])
    with pytest.raises(ValueError, match="another Galaxy"):
        make_mock(Galaxy.default(), launch, SEL, EM, 10, 1, bank=bank)
    with pytest.raises(ValueError, match="selection needs"):
        make_mock(g, launch, Selection(r_min=5.0, r_max=60.0), EM, 10, 1, bank=bank)


def test_cli_mock_end_to_end(tmp_path, capsys):
    out = tmp_path / "cli.ecsv"
    rc = main(["mock", "--n", "40", "--seed", "3", "--out", str(out), "--param", "q_z=0.9",
               "--param", "v_min=900", "--bank-size", "256", "--bank-dt", "2", "--cut", "r_max=60",
               "--error-distance-frac", "0.1", "--flight-time-max", "150", "--halo-flattening", "density"])
    assert rc == 0, capsys.readouterr().err
    cat = read_catalog(out)
    assert cat.n == 40
    meta = Table.read(out).meta
    assert meta["true_parameters"]["q_z"] == 0.9 and meta["true_parameters"]["v_min"] == 900.0
    assert meta["seed"] == 3 and meta["flight_time_max"] == 150.0
    assert meta["galaxy"]["halo_flattening"] == "density"


def test_cli_mock_saves_and_reuses_a_bank(tmp_path, capsys):
    bank = tmp_path / "bank.npz"
    base = ["mock", "--n", "20", "--param", "q_z=0.9", "--cut", "r_max=60", "--bank-dt", "2"]
    assert main(base + ["--out", str(tmp_path / "a.ecsv"), "--bank-size", "256", "--save-bank", str(bank)]) == 0
    assert bank.exists()
    assert main(base + ["--out", str(tmp_path / "b.ecsv"), "--bank-file", str(bank), "--seed", "1"]) == 0
    assert read_catalog(tmp_path / "b.ecsv").n == 20
    capsys.readouterr()
    # a bank of another Galaxy is refused, naming the cause
    assert main(["mock", "--n", "20", "--param", "q_z=0.8", "--cut", "r_max=60", "--out", str(tmp_path / "c.ecsv"),
                 "--bank-file", str(bank)]) == 1
    assert "another Galaxy" in capsys.readouterr().err


def test_cli_mock_config_and_errors(tmp_path, capsys):
    cfg = tmp_path / "mock.toml"
    cfg.write_text('n = 30\nseed = 4\n[galaxy]\nparams = {q_y = 1.1}\n[selection]\nr_max = 60.0\n'
                   '[errors]\nparallax = [0.02]\ndistance_frac = [0.1]\n[bank]\nsize = 256\ndt = 2.0\n')
    out = tmp_path / "c.ecsv"
    assert main(["mock", "--config", str(cfg), "--out", str(out)]) == 0
    assert Table.read(out).meta["true_parameters"]["q_y"] == 1.1 and len(Table.read(out)) == 30
    capsys.readouterr()
    bad = tmp_path / "bad.toml"
    bad.write_text("[bank]\nsise = 3\n")
    assert main(["mock", "--config", str(bad), "--out", str(out)]) == 1
    assert "sise" in capsys.readouterr().err
    assert main(["mock", "--out", str(out), "--param", "qz=0.8"]) == 1
    assert "qz" in capsys.readouterr().err
    assert main(["mock", "--out", str(out), "--cut", "r_mni=3"]) == 1
    assert "r_mni" in capsys.readouterr().err
    assert main(["mock", "--n", "5"]) == 1
    assert "--out" in capsys.readouterr().err
    assert main(["mock", "--out", str(out), "--error-pm", "a,b"]) == 1
    assert "--error-pm" in capsys.readouterr().err
    with pytest.raises(SystemExit):
        main(["mock", "--help"])
    text = capsys.readouterr().out
    for opt in ("--n", "--seed", "--out", "--param", "--config", "--halo-flattening", "--launch",
                "--bank-size", "--error-parallax", "--error-pm", "--error-vlos", "--cut"):
        assert opt in text


def test_mock_defaults_are_the_shipped_emulators_model():
    """A mock made with `swerve mock`'s defaults lies inside the shipped emulator's model: its
    halo flattening, launch family and fixed speeds, and selection are those recorded in the
    emulator's configuration, and the default slope is the middle of its inferred range."""
    import json

    from swerve.commands.mock import EMULATOR_MODEL_DEFAULTS, _schema
    from swerve.config import validate
    from swerve.resources import default_emulator

    config = json.loads((default_emulator() / "emulator.json").read_text())["metadata"]["config"]
    d = EMULATOR_MODEL_DEFAULTS
    assert d["halo_flattening"] == config["galaxy"]["halo_flattening"]
    assert config["launch"]["model"] == "power-law"
    for name, value in config["launch"]["fixed"].items():
        assert d["launch_params"][name] == value
    lo, hi = config["launch"]["infer"]["slope"]
    assert d["launch_params"]["slope"] == 0.5 * (lo + hi)
    for name in ("r_min", "r_max", "outgoing"):
        assert d[name] == config["selection"][name]
    cfg = validate({}, _schema(), source="<defaults>")
    assert cfg["galaxy"]["halo_flattening"] == d["halo_flattening"]
    assert cfg["selection"]["r_max"] == d["r_max"] and cfg["selection"]["r_min"] == d["r_min"]
