"""What the commands write, and what they leave behind when they fail (issue 24).

A failed run writes nothing (no empty folder, no stars.npz), bad options are named by their
flag in one line, every column of the tables a fit writes has a description (and a unit where
it has one), a forecast writes each finished row at once and resumes, and swerve.fileio's
writers leave no temporary file behind.
"""

import json

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from swerve.cli import main
from swerve.fit import STARS_COLUMNS, SUMMARY_COLUMNS, load_fit_config, run_fit

pytestmark = pytest.mark.filterwarnings("ignore::swerve.sampling.ConvergenceWarning")

FAST = ["--max-steps", "100", "--samples", "8", "--no-progress"]
HEADER = "id,ra,dec,distance,distance_err,pmra,pmra_err,pmdec,pmdec_err,vlos,vlos_err\n"


@pytest.fixture(scope="module")
def mock_catalog(tmp_path_factory, smoke_run):
    """A mock inside the smoke emulator's domain and selection (as in tests/test_fit.py)."""
    from swerve.galaxy import Galaxy
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock, write_mock
    from swerve.selection import Selection

    g = Galaxy.from_name(halo_flattening="density", q_y=1.05, q_z=0.9)
    launch = BoundedPowerLawSpeed(v_min=700.0, v_max=3000.0, slope=-0.5)
    errs = ErrorModel(distance_frac=ErrorLaw(0.05), pm=ErrorLaw(0.0, 0.01, 1.0), vlos=ErrorLaw(5.0))
    t = make_mock(g, launch, Selection(r_min=10.0, r_max=250.0, outgoing=True), errs, 40, 7,
                  flight_time_max=300.0, bank_size=1500)
    path = tmp_path_factory.mktemp("mock") / "mock.ecsv"
    write_mock(t, path)
    return path


def _one_line(capsys, command="fit"):
    err = capsys.readouterr().err.strip()
    lines = [ln for ln in err.splitlines() if not ln.startswith("swerve: warning:")]
    assert len(lines) == 1 and lines[0].startswith(f"swerve {command}: error:"), err
    assert "Traceback" not in err
    return lines[0]


# --------------------------------------------------------------- a failed fit writes nothing
def test_no_usable_star_leaves_no_folder(tmp_path, smoke_run, capsys):
    """Stars 0.5 kpc from the Sun lie at r ~ 8 kpc, inside every selection's inner radius."""
    _, emu = smoke_run
    cat = tmp_path / "near.csv"
    cat.write_text(HEADER + "a,10,10,0.5,0.01,1,0.05,1,0.05,500,5\nb,200,-20,0.6,0.01,1,0.05,1,0.05,500,5\n")
    out = tmp_path / "fit"
    assert main(["fit", str(cat), "--emulator", str(emu), "--out", str(out), *FAST]) == 1
    assert "no star is usable" in _one_line(capsys)
    assert not out.exists()


def test_distance_precision_failure_leaves_no_folder(tmp_path, smoke_run, capsys):
    """A parallax-only star with a 250% parallax error cannot give a distance without a prior."""
    _, emu = smoke_run
    cat = tmp_path / "plx.csv"
    cat.write_text("id,ra,dec,parallax,parallax_err,pmra,pmra_err,pmdec,pmdec_err,vlos,vlos_err\n"
                   "a,10,10,0.02,0.05,1,0.05,1,0.05,500,5\n")
    out = tmp_path / "nested" / "fit"
    assert main(["fit", str(cat), "--emulator", str(emu), "--out", str(out), *FAST]) == 1
    assert "parallax" in _one_line(capsys)
    assert not (tmp_path / "nested").exists()


def test_prior_error_leaves_no_stars_npz(tmp_path, smoke_run, mock_catalog, capsys):
    _, emu = smoke_run
    cfg = tmp_path / "fit.toml"
    cfg.write_text('[priors]\nparameters = { q_z = { kind = "uniform", low = 0.5, high = 1.0 } }\n')
    out = tmp_path / "fit"
    rc = main(["fit", str(mock_catalog), "--emulator", str(emu), "--config", str(cfg), "--out", str(out), *FAST])
    assert rc == 1
    assert "leaves the emulator's domain" in _one_line(capsys)
    assert not out.exists()


def test_absurd_velocity_is_one_line_and_writes_nothing(tmp_path, smoke_run, mock_catalog, capsys):
    """A line-of-sight velocity of 1e300 km/s (far above the speed of light) in data row 2."""
    _, emu = smoke_run
    t = Table.read(mock_catalog)[:3]
    t["vlos"][1] = 1e300
    cat = tmp_path / "absurd.ecsv"
    t.write(cat, format="ascii.ecsv")
    out = tmp_path / "fit"
    assert main(["fit", str(cat), "--emulator", str(emu), "--out", str(out), *FAST]) == 1
    err = capsys.readouterr().err
    assert "row 2" in err and "Traceback" not in err and "overflow" not in err, err
    assert not out.exists()


def test_out_pointing_at_a_file_is_refused(tmp_path, smoke_run, mock_catalog, capsys):
    _, emu = smoke_run
    out = tmp_path / "taken.txt"
    out.write_text("mine\n")
    assert main(["fit", str(mock_catalog), "--emulator", str(emu), "--out", str(out), *FAST]) == 1
    assert "--out" in _one_line(capsys) and out.read_text() == "mine\n"
    with pytest.raises(ValueError, match="a file is there"):
        run_fit(mock_catalog, emu, out, load_fit_config(None))


def test_a_folder_given_as_the_catalog_is_named_as_such(tmp_path, smoke_run, capsys):
    _, emu = smoke_run
    for command in (["fit", "--emulator", str(emu)], ["trace", "--no-plot"]):
        assert main([command[0], str(tmp_path), *command[1:]]) == 1
        assert f"{tmp_path} is a folder, not a catalog file" in _one_line(capsys, command[0])
    assert list(tmp_path.iterdir()) == []


def test_bad_option_values_are_named_by_their_flag(tmp_path, smoke_run, mock_catalog, capsys):
    """Not the configuration's internals ("<overrides>: [sampler] max_steps")."""
    _, emu = smoke_run
    for flag, value, expected in (("--max-steps", "10", "--max-steps 10: expected an int >= 50"),
                                  ("--samples", "0", "--samples 0: expected an int >= 1"),
                                  ("--seed", "-1", "--seed -1: expected an int >= 0")):
        assert main(["fit", str(mock_catalog), "--emulator", str(emu), "--out", str(tmp_path / "o"),
                     flag, value]) == 1
        line = _one_line(capsys)
        assert expected in line and "[sampler]" not in line and "[errors]" not in line, line
    assert main(["mock", "--n", "0", "--out", str(tmp_path / "m.ecsv")]) == 1
    assert "--n 0: expected an int >= 1" in _one_line(capsys, "mock")
    assert main(["forecast", "--catalogs", "0", "--out", str(tmp_path / "f")]) == 1
    assert "--catalogs 0: expected an int >= 1" in _one_line(capsys, "forecast")
    assert list(tmp_path.iterdir()) == []


def test_a_single_star_fits_with_a_warning(tmp_path, smoke_run, mock_catalog, capsys):
    _, emu = smoke_run
    full = tmp_path / "full"
    run_fit(mock_catalog, emu, full, load_fit_config(None, {"sampler": {"max_steps": 100}, "errors": {"samples": 8}}))
    stars = Table.read(full / "stars.ecsv")
    used_row = int(stars["row"][stars["used"]][0])
    one = tmp_path / "one.ecsv"
    Table.read(mock_catalog)[used_row - 1:used_row].write(one, format="ascii.ecsv")
    out = tmp_path / "fit"
    assert main(["fit", str(one), "--emulator", str(emu), "--out", str(out), *FAST]) == 0
    cap = capsys.readouterr()
    assert "swerve: warning:" in cap.err and "only 1 usable star" in cap.err
    assert "only 1 usable star" in cap.out  # and among the summary's notes
    assert json.loads((out / "summary.json").read_text())["stars"]["used"] == 1


# ------------------------------------------------------------------- units and descriptions
def test_run_folder_tables_have_units_and_descriptions(tmp_path, smoke_run, mock_catalog):
    """A stricter radius cut excludes stars: they are rows of stars.ecsv with their reason."""
    _, emu = smoke_run
    out = tmp_path / "fit"
    cfg = load_fit_config(None, {"sampler": {"max_steps": 100}, "errors": {"samples": 8},
                                 "selection": {"r_min": 30.0}})
    outcome = run_fit(mock_catalog, emu, out, cfg)
    s = Table.read(out / "summary.ecsv")
    assert list(s.colnames) == list(SUMMARY_COLUMNS)
    assert all(s[c].description for c in s.colnames)
    assert list(s["parameter"]) == ["q_y", "q_z", "slope"] and all(v == "" for v in s["unit"].filled(""))
    st = Table.read(out / "stars.ecsv")
    assert set(st.colnames) == set(STARS_COLUMNS)
    for name in st.colnames:
        assert st[name].description, name
        assert str(st[name].unit or "") == STARS_COLUMNS[name][0], name  # '' or 'km / s'
    assert st["v_tf_obs"].unit == u.km / u.s and st["v_tf_err"].unit == u.km / u.s
    ex = outcome.summary["stars"]["excluded"]
    assert ex and int((~st["used"]).sum()) == len(ex) and int(st["used"].sum()) == outcome.summary["stars"]["used"]
    by_id = {str(i): k for k, i in enumerate(st["id"])}
    for e in ex:
        k = by_id[e["id"]]
        assert not st["used"][k] and st["reason"][k] == e["reason"] and st["row"][k] == e["row"]
        assert st["cell"][k] == -1 and np.isnan(st["v_tf_obs"][k])
    # rows are the catalog's data rows (1 = first star), in catalog order
    cat = Table.read(mock_catalog)
    assert list(st["row"]) == sorted(st["row"]) and len(st) == len(cat)
    assert all(str(cat["id"][r - 1]) == str(i) for r, i in zip(st["row"], st["id"]))
    assert (st["cell"][st["used"]] >= 0).all()
    assert len(st.meta["cell_labels"]) > int(st["cell"].max())
    # swerve.fileio's temporary files never stay behind
    assert not [p.name for p in out.iterdir() if p.name.startswith(".") or ".tmp" in p.name]


def test_summary_table_states_mass_units():
    """Masses carry their unit: 1e12 in the row's unit is 1e12 solar masses (IAU 2015 nominal
    solar mass 1.98841e30 kg, as astropy's constants give it)."""
    from swerve.fit import _summary_table

    summary = {"parameters": {"m_halo": {"median": 1.0e12, "ci68": [0.9e12, 1.1e12], "ci95": [0.8e12, 1.2e12],
                                         "tau": 30.0},
                              "q_z": {"median": 0.9, "ci68": [0.85, 0.95], "ci95": [0.8, 1.0], "tau": 40.0}},
               "fixed": {"m_disk": 1.0e11}, "probabilities": {"P(q_z<1)": 0.97},
               "sampler": {"acceptance": 0.3, "converged": True}}
    t = _summary_table(summary, ["m_halo", "q_z"], {"m_halo": str(u.Unit("Msun")), "q_z": "", "m_disk": "solMass"})
    row = t[list(t["parameter"]).index("m_halo")]
    assert (row["median"] * u.Unit(row["unit"])).to_value(u.kg) == pytest.approx(1.98841e42, rel=1e-5)
    assert t.meta["fixed"]["m_disk"] == {"value": 1.0e11, "unit": "solMass"}
    assert all(t[c].description for c in t.colnames)


# ------------------------------------------------------------------------------- forecast
FORECAST_CFG = "[bank]\nn_orbits = 300\n"


def _stand_in_fits(emulator_dir, tasks, fit_cfg, n_jobs=1, solar="v4.0"):
    """Stand-in for swerve.validation.fit_many, as swerve.forecast imports it (the fits are tests/test_validation.py's): a
    "posterior" computed from each catalog's stars and seed, so two forecasts agree only when
    they drew the same catalogs with the same seeds."""
    fits = []
    for table, seed, _ in tasks:
        w = float(np.std(np.asarray(table["vlos"]))) / 1e4
        fits.append({"names": ["q_y", "q_z", "slope"], "lo68": [0.9, 0.85 - w, -0.6], "hi68": [1.1, 0.85 + w, -0.4],
                     "p_below_1": {"q_z": (seed % 1000) / 1000.0}, "converged": True})
    return fits


def test_forecast_writes_each_row_and_resumes(smoke_run, tmp_path, monkeypatch, capsys):
    """Interrupted after the first sample size, forecast.json holds that row; the rerun fits only
    the missing one and ends with the rows of an uninterrupted run."""
    import swerve.forecast as forecast

    _, emu = smoke_run
    cfg = tmp_path / "fc.toml"
    cfg.write_text(FORECAST_CFG)
    args = ["forecast", "--emulator", str(emu), "--n", "20,30", "--catalogs", "2", "--jobs", "1",
            "--config", str(cfg)]
    calls = []

    def counted(emulator_dir, tasks, *a, **k):
        calls.append(len(tasks[0][0]))
        return _stand_in_fits(emulator_dir, tasks, *a, **k)

    monkeypatch.setattr(forecast, "fit_many", counted)
    assert main([*args, "--out", str(tmp_path / "whole")]) == 0
    whole = json.loads((tmp_path / "whole" / "forecast.json").read_text())
    assert whole["settings"]["complete"] and [r["n_stars"] for r in whole["rows"]] == [20, 30]
    assert calls == [20, 30]

    def interrupted(emulator_dir, tasks, *a, **k):
        if len(tasks[0][0]) == 30:
            raise KeyboardInterrupt
        return counted(emulator_dir, tasks, *a, **k)

    monkeypatch.setattr(forecast, "fit_many", interrupted)
    out = tmp_path / "part"
    assert main([*args, "--out", str(out)]) == 130
    part = json.loads((out / "forecast.json").read_text())
    assert not part["settings"]["complete"] and [r["n_stars"] for r in part["rows"]] == [20]
    assert part["rows"][0] == whole["rows"][0]
    assert not [p.name for p in out.iterdir() if p.name.startswith(".")]  # no temporary file left
    calls.clear()
    monkeypatch.setattr(forecast, "fit_many", counted)
    assert main([*args, "--out", str(out)]) == 0
    assert calls == [30]  # only the missing sample size was fitted
    assert "resuming" in capsys.readouterr().out
    done = json.loads((out / "forecast.json").read_text())
    assert done["settings"]["complete"] and done["rows"] == whole["rows"]
    assert (out / "forecast.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    # a forecast of other settings is not mixed into that folder
    assert main([*args, "--seed", "9", "--out", str(out)]) == 1
    assert "other settings" in _one_line(capsys, "forecast")


def test_sigterm_unwinds_like_an_interruption(smoke_run, tmp_path, monkeypatch, capsys):
    """SIGTERM (as `timeout` sends) during a forecast: the finished row stays, the command ends
    with 128 + 15 and a one-line message, and no temporary file is left."""
    import os
    import signal

    import swerve.forecast as forecast

    _, emu = smoke_run
    cfg = tmp_path / "fc.toml"
    cfg.write_text(FORECAST_CFG)

    def terminated(emulator_dir, tasks, *a, **k):
        if len(tasks[0][0]) == 30:
            os.kill(os.getpid(), signal.SIGTERM)
        return _stand_in_fits(emulator_dir, tasks, *a, **k)

    monkeypatch.setattr(forecast, "fit_many", terminated)
    before = signal.getsignal(signal.SIGTERM)
    out = tmp_path / "fc"
    rc = main(["forecast", "--emulator", str(emu), "--n", "20,30", "--catalogs", "2", "--jobs", "1",
               "--config", str(cfg), "--out", str(out)])
    assert rc == 128 + signal.SIGTERM
    assert capsys.readouterr().err.strip() == "swerve forecast: terminated"
    assert [r["n_stars"] for r in json.loads((out / "forecast.json").read_text())["rows"]] == [20]
    assert sorted(p.name for p in out.iterdir()) == ["forecast.json"]
    assert signal.getsignal(signal.SIGTERM) is before  # the handler is the command's only
