"""One catalog-to-posterior path (swerve.inference): ``swerve fit``, the validation harness and
forecasts fit through the same function with the same defaults, so a calibration check checks
the fit that ships."""

import warnings

import numpy as np
import pytest
from scipy import stats

from swerve import inference
from swerve.catalog import read_catalog
from swerve.config import defaults
from swerve.fit import FIT_SCHEMA, load_fit_config, run_fit
from swerve.validation import FIT_KEYS, VALIDATE_SCHEMA, fit_config, fit_many, load_validate_config


@pytest.fixture(scope="module")
def mock(tmp_path_factory, smoke_run):
    """A 40-star mock inside the smoke emulator's domain and selection."""
    from swerve.galaxy import Galaxy
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock, write_mock
    from swerve.selection import Selection

    g = Galaxy.from_name(halo_flattening="density", q_y=1.05, q_z=0.9)
    launch = BoundedPowerLawSpeed(v_min=700.0, v_max=3000.0, slope=-0.5)
    errs = ErrorModel(distance_frac=ErrorLaw(0.05), pm=ErrorLaw(0.0, 0.01, 1.0), vlos=ErrorLaw(5.0))
    t = make_mock(g, launch, Selection(r_min=10.0, r_max=250.0, outgoing=True), errs, 40, 11,
                  flight_time_max=300.0, bank_size=1500)
    path = tmp_path_factory.mktemp("mock") / "mock.ecsv"
    write_mock(t, path)
    return t, path


def test_validation_fit_keys_carry_swerve_fits_defaults():
    """Every [fit] key of a validation configuration is swerve fit's key under a flat name, with
    swerve fit's default: there is one set of defaults."""
    fit_defaults = defaults(FIT_SCHEMA)
    val_defaults = load_validate_config(None)["fit"]
    for flat, (sec, key) in FIT_KEYS.items():
        assert val_defaults[flat] == fit_defaults[sec][key], flat
        assert VALIDATE_SCHEMA.section("fit").key(flat).choices == FIT_SCHEMA.section(sec).key(key).choices
    # with nothing set, a validation fit is configured exactly as `swerve fit` (seeds aside)
    cfg = fit_config({"n_draws": 9}, seed=5)
    ref = load_fit_config(None, {"errors": {"seed": 5}, "sampler": {"seed": 5}})
    assert cfg == ref


def test_unknown_fit_key_is_refused():
    with pytest.raises(ValueError, match=r"\[fit\]: unknown key\(s\) \['walkers'\]"):
        fit_config({"walkers": 8}, seed=1)


def test_harness_fit_is_swerve_fit(mock, smoke_run, tmp_path):
    """The validation harness's record of a catalog equals what `swerve fit` writes for the same
    catalog, configuration and seed (bit for bit: the same path)."""
    table, path = mock
    _, emu_dir = smoke_run
    f = {"samples": 8, "nwalkers": 16, "max_steps": 300, "check_every": 100, "n_tau": 10.0, "tau_rtol": 0.2,
         "n_draws": 19}
    rec, = fit_many(emu_dir, [(table, 3, None)], f)
    assert "error" not in rec
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        out = run_fit(path, emu_dir, tmp_path / "fit", fit_config(f, 3), log=lambda *a: None)
    pars = out.summary["parameters"]
    assert list(pars) == rec["names"]
    np.testing.assert_array_equal(rec["median"], [pars[n]["median"] for n in rec["names"]])
    np.testing.assert_array_equal(rec["lo95"], [pars[n]["ci95"][0] for n in rec["names"]])
    np.testing.assert_array_equal(rec["hi68"], [pars[n]["ci68"][1] for n in rec["names"]])
    assert rec["n_stars"] == out.summary["stars"]["used"]


def test_star_terms_do_not_depend_on_the_other_stars(mock, smoke_run):
    """Each star's distance samples come from its own seed: a star's terms are the same in the
    whole catalog and in a sub-catalog (what makes refits and cached terms exact)."""
    from swerve.emulate import load
    from swerve.frames import SolarParameters

    _, path = mock
    _, emu_dir = smoke_run
    emu = load(emu_dir)
    cat = read_catalog(path)
    cfg = load_fit_config(None, {"errors": {"samples": 8}})
    spec = inference.emulator_spec(emu, emu_dir)
    solar = SolarParameters.from_name("v4.0")
    whole, _, _ = inference.compute_star_terms(cat, spec, cfg, solar)
    part, _, _ = inference.compute_star_terms(inference._subset_catalog(cat, np.arange(5, 15)), spec, cfg, solar)
    j = [list(whole.ids).index(i) for i in part.ids]
    np.testing.assert_array_equal(whole.mean[j], part.mean)
    np.testing.assert_array_equal(whole.log_w[j], part.log_w)


def test_fit_catalog_summary_intervals_are_the_samples_percentiles(mock, smoke_run):
    """The in-memory fit's intervals are the central credible intervals of its samples
    (numpy's percentiles as the outside reference) and P(q_z<1) their fraction below 1."""
    from swerve.emulate import load

    table, _ = mock
    _, emu_dir = smoke_run
    cfg = load_fit_config(None, {"errors": {"samples": 8}, "likelihood": {"adjust": False},
                                 "sampler": {"nwalkers": 16, "max_steps": 300, "check_every": 100, "n_tau": 10.0}})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        fr = inference.fit_catalog(table, load(emu_dir), cfg)
    s = fr.result.samples
    for j, n in enumerate(fr.result.names):
        lo, hi = np.percentile(s[:, j], [2.5, 97.5])
        assert fr.interval(n, 95) == pytest.approx((lo, hi), rel=1e-9)
    j = fr.result.names.index("q_z")
    assert fr.summary["probabilities"]["P(q_z<1)"] == pytest.approx(stats.percentileofscore(s[:, j], 1.0, kind="strict") / 100, abs=1e-12)


def test_catalog_declaring_another_velocity_cut_is_refused_by_the_path(mock, smoke_run):
    """A catalog whose meta declares a measured-velocity cut the emulator was not trained with
    (vlos >= 400 km/s against none) is refused by the one path, in one line naming the cut."""
    from swerve.catalog import catalog_from_table
    from swerve.emulate import load

    table, _ = mock
    _, emu_dir = smoke_run
    t = table.copy()
    sel = dict(t.meta.get("selection") or {})
    sel["vlos_min"] = 400.0
    t.meta["selection"] = sel
    cat = catalog_from_table(t, source="cut.ecsv")
    with pytest.raises(ValueError, match=r"^cut\.ecsv: the catalog declares .*vlos.*400") as err:
        inference.prepare(cat, load(emu_dir), load_fit_config(None, {"errors": {"samples": 4}}))
    assert "\n" not in str(err.value)
