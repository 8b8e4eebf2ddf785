"""swerve fit end to end on the smoke emulator: outputs, refits, resuming, bad input."""

import json

import numpy as np
import pytest
from astropy.table import Table

from swerve.cli import main
from swerve.fit import load_fit_config, run_fit

# Short chains keep these plumbing tests fast; whether they converge is not what they check
# (tests/test_sampling.py checks convergence), so the convergence warning is ignored here only.
pytestmark = pytest.mark.filterwarnings("ignore::swerve.sampling.ConvergenceWarning")

FAST = {"sampler": {"max_steps": 300, "check_every": 100, "n_tau": 5.0, "tau_rtol": 0.5}, "errors": {"samples": 8}}


@pytest.fixture(scope="module")
def mock_catalog(tmp_path_factory, smoke_run):
    """A mock from the forward model inside the smoke emulator's domain and selection."""
    from swerve.galaxy import Galaxy
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock, write_mock
    from swerve.selection import Selection

    g = Galaxy.from_name(halo_flattening="density", q_y=1.05, q_z=0.9)
    launch = BoundedPowerLawSpeed(v_min=700.0, v_max=3000.0, slope=-0.5)
    errs = ErrorModel(distance_frac=ErrorLaw(0.05), pm=ErrorLaw(0.0, 0.01, 1.0), vlos=ErrorLaw(5.0))
    t = make_mock(g, launch, Selection(r_min=10.0, r_max=250.0, outgoing=True), errs, 60, 5,
                  flight_time_max=300.0, bank_size=1500)
    path = tmp_path_factory.mktemp("mock") / "mock.ecsv"
    write_mock(t, path)
    return path


def test_fit_writes_the_run_folder(tmp_path, smoke_run, mock_catalog):
    _, emu = smoke_run
    out = tmp_path / "fit"
    outcome = run_fit(mock_catalog, emu, out, load_fit_config(None, FAST))
    for name in ("chain.h5", "summary.json", "summary.ecsv", "stars.ecsv", "corner.png", "ppc.png", "fit.json",
                 "stars.npz"):
        assert (out / name).is_file(), name
    s = json.loads((out / "summary.json").read_text())
    assert set(s["parameters"]) == {"q_y", "q_z", "slope"}
    for p in s["parameters"].values():
        assert p["ci95"][0] <= p["ci68"][0] <= p["median"] <= p["ci68"][1] <= p["ci95"][1]
    assert 0.0 <= s["probabilities"]["P(q_z<1)"] <= 1.0
    rec = json.loads((out / "fit.json").read_text())
    assert len(rec["emulator"]["content_hash"]) == 64 and rec["solar"]["name"] == "v4.0"
    stars = Table.read(out / "stars.ecsv")
    assert int(stars["used"].sum()) == s["stars"]["used"] and "dloglike_vs_spherical" in stars.colnames
    assert len(stars) == s["stars"]["used"] + len(s["stars"]["excluded"])  # the excluded stars are rows too
    assert "q_z" in outcome.terminal and "68% interval" in outcome.terminal


def test_laplace_is_agrees_with_emcee(tmp_path, smoke_run, mock_catalog):
    """[sampler] method = "laplace-is" (swerve.laplace) against the emcee chain on the same catalog:
    medians within 0.3 posterior sd and 68% widths within 30% (Monte Carlo error of a short chain);
    no chain is written, and the summary says which method made the samples."""
    _, emu = smoke_run
    cfg_e = load_fit_config(None, FAST)
    cfg_l = load_fit_config(None, {**FAST, "sampler": {**FAST["sampler"], "method": "laplace-is"}})
    run_fit(mock_catalog, emu, tmp_path / "e", cfg_e)
    outcome = run_fit(mock_catalog, emu, tmp_path / "l", cfg_l)
    se = json.loads((tmp_path / "e" / "summary.json").read_text())
    sl = json.loads((tmp_path / "l" / "summary.json").read_text())
    assert sl["sampler"]["converged"]  # the weights were judged reliable on this catalog
    assert sl["sampler"]["method"] == "laplace-is" and not (tmp_path / "l" / "chain.h5").exists()
    assert "Laplace" in outcome.terminal
    assert " tau" not in outcome.terminal and "nan" not in outcome.terminal  # no chain: no tau column
    for n, pe in se["parameters"].items():
        pl = sl["parameters"][n]
        sd = 0.5 * (pe["ci68"][1] - pe["ci68"][0])
        assert abs(pl["median"] - pe["median"]) < 0.3 * sd, n
        assert abs((pl["ci68"][1] - pl["ci68"][0]) / (2 * sd) - 1.0) < 0.3, n


def _fit_all_but_the_last_star(tmp_path, emu, mock_catalog, out, cfg):
    """Fit the mock less its last star into ``out`` (the first fit of a refit test)."""
    first = tmp_path / "first.ecsv"
    Table.read(mock_catalog)[:-1].write(first, format="ascii.ecsv")
    return run_fit(first, emu, out, cfg)


def test_refit_after_adding_a_star_reuses_the_others(tmp_path, smoke_run, mock_catalog):
    _, emu = smoke_run
    out = tmp_path / "fit"
    cfg = load_fit_config(None, {**FAST, "sampler": {**FAST["sampler"], "refit": "sample"}})
    a = _fit_all_but_the_last_star(tmp_path, emu, mock_catalog, out, cfg)
    b = run_fit(mock_catalog, emu, out, cfg)
    n_used_a = a.summary["stars"]["used"]
    assert b.summary["stars"]["terms_reused"] == n_used_a
    assert any("data or configuration changed" in n for n in b.summary["notes"])
    assert b.summary["sampler"]["method"] == "sampled"
    # the reused terms equal a fresh computation
    fresh = tmp_path / "fresh"
    c = run_fit(mock_catalog, emu, fresh, cfg)
    za, zc = np.load(out / "stars.npz"), np.load(fresh / "stars.npz")
    np.testing.assert_array_equal(za["mean"], zc["mean"])
    assert c.summary["stars"]["terms_reused"] == 0


REWEIGHT = {**FAST, "sampler": {**FAST["sampler"], "max_steps": 1500, "check_every": 250, "n_tau": 20.0,
                                 "tau_rtol": 0.3}}


def test_refit_reweights_the_previous_chain(tmp_path, smoke_run, mock_catalog):
    """A star added to a converged fit: the chain is kept and importance-reweighted by it, no
    new sampling, and the answer agrees with a fresh fit of all the stars (the weights'
    correctness itself is checked against analytic Gaussians in tests/test_sampling.py)."""
    import emcee

    _, emu = smoke_run
    out = tmp_path / "fit"
    cfg = load_fit_config(None, REWEIGHT)
    a = _fit_all_but_the_last_star(tmp_path, emu, mock_catalog, out, cfg)
    assert a.summary["sampler"]["converged"] and a.summary["sampler"]["method"] == "sampled"
    steps = emcee.backends.HDFBackend(str(out / "chain.h5"), read_only=True).iteration
    b = run_fit(mock_catalog, emu, out, cfg)
    smp = b.summary["sampler"]
    assert smp["method"] == "reweighted" and smp["importance"]["stars_added"] == 1
    assert smp["importance"]["ess"] >= 0.5 * smp["importance"]["n_samples"]
    assert any("reweighted by the 1 added star" in n for n in b.summary["notes"])
    assert "reweighted by 1 added star" in b.terminal
    assert emcee.backends.HDFBackend(str(out / "chain.h5"), read_only=True).iteration == steps  # not resampled
    fresh = run_fit(mock_catalog, emu, tmp_path / "fresh", cfg)
    for n, p in fresh.summary["parameters"].items():
        q = b.summary["parameters"][n]
        assert abs(q["median"] - p["median"]) < 0.5 * p["std"], n
        assert 0.7 < q["std"] / p["std"] < 1.4, n


def test_refit_falls_back_to_sampling_when_weights_are_unreliable(tmp_path, smoke_run, mock_catalog, monkeypatch):
    import swerve.sampling

    _, emu = smoke_run
    out = tmp_path / "fit"
    cfg = load_fit_config(None, REWEIGHT)
    _fit_all_but_the_last_star(tmp_path, emu, mock_catalog, out, cfg)
    monkeypatch.setattr(swerve.sampling, "MIN_ESS_FRACTION", 2.0)  # no weights can pass
    b = run_fit(mock_catalog, emu, out, cfg)
    assert b.summary["sampler"]["method"] == "sampled"
    assert any("was not reliable" in n for n in b.summary["notes"])
    # the new chain gets its own curvature adjustment, estimated on all the stars
    assert b.summary["likelihood"]["adjustment"]["reused"] is False
    assert sum("curvature adjustment" in n for n in b.summary["notes"]) == 1


def test_interrupted_fit_resumes(tmp_path, smoke_run, mock_catalog):
    _, emu = smoke_run
    out = tmp_path / "fit"
    short = load_fit_config(None, {**FAST, "sampler": {**FAST["sampler"], "max_steps": 200, "n_tau": 1e3}})
    run_fit(mock_catalog, emu, out, short)
    longer = load_fit_config(None, {**FAST, "sampler": {**FAST["sampler"], "max_steps": 400, "n_tau": 1e3}})
    b = run_fit(mock_catalog, emu, out, longer)
    # same data and configuration except the step cap: the chain file is resumed, not restarted
    assert b.summary["sampler"]["resumed_from"] == 200
    assert b.summary["sampler"]["n_steps"] > 200


def test_prior_outside_domain_refused(tmp_path, smoke_run, mock_catalog, capsys):
    _, emu = smoke_run
    cfg = tmp_path / "fit.toml"
    cfg.write_text('[priors]\nparameters = { q_z = { kind = "uniform", low = 0.5, high = 1.0 } }\n')
    rc = main(["fit", str(mock_catalog), "--emulator", str(emu), "--config", str(cfg), "--out", str(tmp_path / "o")])
    assert rc == 1
    assert "leaves the emulator's domain" in capsys.readouterr().err


def test_looser_selection_refused(tmp_path, smoke_run, mock_catalog, capsys):
    _, emu = smoke_run
    cfg = tmp_path / "fit.toml"
    cfg.write_text("[selection]\nr_min = 5.0\n")
    rc = main(["fit", str(mock_catalog), "--emulator", str(emu), "--config", str(cfg), "--out", str(tmp_path / "o")])
    assert rc == 1
    assert "looser than the emulator's selection" in capsys.readouterr().err


def test_stars_outside_selection_reported(tmp_path, smoke_run, mock_catalog):
    """A stricter radius cut excludes the inner stars, each reported with its reason."""
    _, emu = smoke_run
    cfg = load_fit_config(None, {**FAST, "selection": {"r_min": 40.0}})
    out = run_fit(mock_catalog, emu, tmp_path / "fit", cfg)
    ex = out.summary["stars"]["excluded"]
    assert ex and all("inside the emulator's cells" in e["reason"] and "[40," in e["reason"] for e in ex)
    assert out.summary["stars"]["used"] + len(ex) == len(Table.read(mock_catalog))


def test_variants_side_by_side(tmp_path, smoke_run, mock_catalog):
    _, emu = smoke_run
    v = tmp_path / "variants.toml"
    v.write_text(
        '[[variant]]\nname = "baseline"\n\n'
        '[[variant]]\nname = "slope fixed"\npriors.parameters.slope = { kind = "fixed", value = -0.5 }\n\n'
        '[[variant]]\nname = "beyond 20 kpc"\nselection.r_min = 20.0\n'
    )
    cfgp = tmp_path / "fit.toml"
    cfgp.write_text("[sampler]\nmax_steps = 300\ncheck_every = 100\nn_tau = 5.0\ntau_rtol = 0.5\n[errors]\nsamples = 8\n")
    rc = main(["fit", str(mock_catalog), "--emulator", str(emu), "--config", str(cfgp), "--variants", str(v),
                   "--out", str(tmp_path / "var")])
    assert rc == 0
    t = Table.read(tmp_path / "var" / "variants.ecsv")
    assert list(t["variant"]) == ["baseline", "slope fixed", "beyond 20 kpc"]
    assert (tmp_path / "var" / "variants.png").is_file()
    assert (tmp_path / "var" / "slope-fixed" / "summary.json").is_file()


def test_bad_variants_file(tmp_path):
    from swerve.variants import read_variants

    p = tmp_path / "v.toml"
    p.write_text('[[variant]]\nname = "a"\npriros = {}\n')
    with pytest.raises(ValueError, match="did you mean 'priors'"):
        read_variants(p)


def test_malformed_catalog_lists_every_problem_and_writes_nothing(tmp_path, smoke_run, capsys):
    _, emu = smoke_run
    bad = tmp_path / "bad.csv"
    bad.write_text("id,ra,dec,distance,distance_err,pmra,pmra_err,pmdec,pmdec_err,vlos,vlos_err\n"
                   "a,400,0,50,5,0.1,-0.05,0.1,0.05,500,5\n"
                   "a,10,95,50,5,0.1,0.05,nan,0.05,500,5\n")
    out = tmp_path / "fit"
    assert main(["fit", str(bad), "--emulator", str(emu), "--out", str(out)]) == 1
    err = capsys.readouterr().err
    for fragment in ("column 'ra'", "column 'pmra_err'", "unique id", "column 'dec'", "column 'pmdec'"):
        assert fragment in err
    assert "Traceback" not in err
    assert not out.exists()


def test_ensemble_emulator_variance_is_close_to_per_walker(smoke_run, mock_catalog):
    """The 'ensemble' shortcut (emulator variance at the walkers' mean) changes the log-likelihood
    of an ensemble spread like a posterior by far less than one unit."""
    from swerve.catalog import read_catalog
    from swerve.emulate import load
    from swerve.frames import SolarParameters
    from swerve.likelihood import Likelihood
    from swerve.summaries import SummarySpec

    _, emu_dir = smoke_run
    emu = load(emu_dir)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    cat = read_catalog(mock_catalog)
    from swerve.fit import star_terms

    terms, _ = star_terms(cat, spec, load_fit_config(None, FAST), SolarParameters.from_name("v4.0"))
    rng = np.random.default_rng(3)
    th = np.array([1.05, 0.9, -0.5]) + rng.normal(0, [0.03, 0.03, 0.1], size=(16, 3))
    exact = Likelihood(emu, terms, spec, emulator_variance="per-walker")(th)
    fast = Likelihood(emu, terms, spec, emulator_variance="ensemble")(th)
    assert np.max(np.abs(exact - fast)) < 0.1
    assert not np.array_equal(exact, fast)


def test_fit_with_the_curvature_adjustment(tmp_path, smoke_run, mock_catalog):
    """``[likelihood] adjust`` (on by default): the adjustment is recorded (its matrix, the score-to-curvature
    ratios) and noted; intervals are no narrower than without it on the same catalog and seed
    beyond Monte Carlo noise (the adjustment only widens; tests/test_adjustment.py checks its
    size against the analytic case); a refit after a star is added reweights the chain by the
    ratio of the two adjusted posteriors and agrees with the adjusted fit sampled on all stars."""
    _, emu = smoke_run
    plain = run_fit(mock_catalog, emu, tmp_path / "plain", load_fit_config(None, {**REWEIGHT, "likelihood": {"adjust": False}}))
    cfg = load_fit_config(None, REWEIGHT)  # the adjustment is the default
    adj = run_fit(mock_catalog, emu, tmp_path / "adj", cfg)
    rec = adj.summary["likelihood"]["adjustment"]
    assert np.shape(rec["C"]) == (3, 3) and len(rec["kappa"]) >= 1
    assert any("curvature adjustment" in n for n in adj.summary["notes"])
    assert plain.summary["likelihood"]["adjustment"] is None
    for n, p in plain.summary["parameters"].items():
        assert adj.summary["parameters"][n]["std"] > 0.8 * p["std"], n
    out = tmp_path / "refit"
    _fit_all_but_the_last_star(tmp_path, emu, mock_catalog, out, cfg)
    first = json.loads((out / "summary.json").read_text())["likelihood"]["adjustment"]
    b = run_fit(mock_catalog, emu, out, cfg)
    assert b.summary["sampler"]["method"] == "reweighted", b.summary["notes"]
    assert any("reweighted" in n for n in b.summary["notes"])
    # the chain's own adjustment is kept while reweighting (re-estimating it moves the target by
    # the noise of the maximum of a wide posterior)
    kept = b.summary["likelihood"]["adjustment"]
    assert kept["reused"] and not first["reused"]
    assert kept["theta_hat"] == first["theta_hat"] and kept["C"] == first["C"] and kept["kappa"] == first["kappa"]
    for n, p in adj.summary["parameters"].items():  # Monte Carlo agreement with sampling anew
        assert abs(b.summary["parameters"][n]["median"] - p["median"]) < 0.3 * p["std"], n
        assert b.summary["parameters"][n]["std"] == pytest.approx(p["std"], rel=0.25), n
