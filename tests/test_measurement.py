"""The measurement model (swerve.measurement): one written form of an error law everywhere, and
the error samples checked against references outside swerve (scipy's truncated normal, the
analytic mode of the uniform-volume distance posterior)."""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
import tomllib
from astropy import units as u
from astropy.table import Table
from scipy import stats

import swerve.catalog
import swerve.population
import swerve.validation
from swerve.catalog import catalog_from_table
from swerve.cli import build_parser, main
from swerve.measurement import (
    ERROR_FREE,
    ErrorLaw,
    ErrorModel,
    _truncnorm,
    draw_samples,
    parallax_log_posterior,
    parse_error_law,
    parse_error_model,
)

ROOT = Path(__file__).resolve().parents[1]


# ------------------------------------------------------------------------------------------
# one written form of an error law


@pytest.mark.parametrize("value,law", [
    (5, (5.0, 0.0, 1.0)),
    (0.02, (0.02, 0.0, 1.0)),
    ([0, 0.01, 1], (0.0, 0.01, 1.0)),
    ([0.1, 0.2], (0.1, 0.2, 1.0)),
    ((1.0,), (1.0, 0.0, 1.0)),
    ("5", (5.0, 0.0, 1.0)),
    ("0:0.01:1", (0.0, 0.01, 1.0)),
    (" 1 : 2 ", (1.0, 2.0, 1.0)),
    ("0.5:0.01:2.5", (0.5, 0.01, 2.5)),
    ({"a": 0.0, "b": 0.01, "p": 1.0}, (0.0, 0.01, 1.0)),
])
def test_accepted_forms_of_an_error_law(value, law):
    got = ErrorLaw.parse(value, "pm")
    assert (got.a, got.b, got.p) == law
    assert ErrorLaw.parse(got.to_dict()) == got  # the record in a mock's meta reads back


@pytest.mark.parametrize("text,fragment", [
    ("0,0.01,1", "colons, not commas"),
    ("0.02,", "colons, not commas"),
    ("abc", "not a number"),
    ("", "not a number"),
    ("1:2:3:4", "one to three numbers"),
])
def test_other_forms_of_an_error_law_are_refused_in_one_line(text, fragment):
    with pytest.raises(ValueError) as exc:
        ErrorLaw.parse(text, "pm")
    msg = str(exc.value)
    assert "\n" not in msg and msg.startswith("pm: ") and fragment in msg
    assert "A or A:B:P" in msg  # names the accepted form
    with pytest.raises(ValueError, match="A or A:B:P"):
        parse_error_law(text, "pm")


def test_error_law_values_are_range_checked():
    with pytest.raises(ValueError, match="non-negative"):
        ErrorLaw.parse("-1")
    with pytest.raises(ValueError, match="a \\+ b"):
        ErrorLaw.parse("0:0:1")
    with pytest.raises(ValueError, match="finite"):
        ErrorLaw.parse("nan")


def test_error_model_string_uses_the_same_law_form():
    em = parse_error_model("pm=0:0.01:1,vlos=5,dist=0.1,plx=0.02:0.01,corr=0.2")
    assert em == ErrorModel(pm=[0, 0.01, 1], vlos=5.0, distance_frac=0.1, parallax=[0.02, 0.01],
                            corr_pmra_pmdec=0.2)
    assert parse_error_model("none") == ErrorModel(**ERROR_FREE)
    assert parse_error_model(em) is em
    # a law written with commas splits the NAME=VALUE list: refused, naming the colon form
    with pytest.raises(ValueError) as exc:
        parse_error_model("pm=0,0.01,1")
    assert "\n" not in str(exc.value) and "colons, not commas" in str(exc.value)
    assert "pm=0:0.01:1" in str(exc.value)
    with pytest.raises(ValueError, match="one number"):
        parse_error_model("corr=0.1:0.2")
    with pytest.raises(ValueError, match="A or A:B:P"):
        parse_error_model("pmm=0.02")
    # still reachable where it used to live (the validation harness)
    assert swerve.validation.parse_error_model is parse_error_model


def test_error_model_file_takes_numbers_or_lists(tmp_path):
    f = tmp_path / "err.toml"
    f.write_text("pm = [0.0, 0.01, 1.0]\nvlos = 5\ndistance_frac = 0.1\ncorr_pmra_pmdec = 0.1\n")
    g = tmp_path / "err2.toml"
    g.write_text('pm = "0:0.01:1"\nvlos = 5.0\ndistance_frac = [0.1]\ncorr_pmra_pmdec = 0.1\n')
    ref = ErrorModel(pm=ErrorLaw(0.0, 0.01, 1.0), vlos=ErrorLaw(5.0), distance_frac=ErrorLaw(0.1),
                     corr_pmra_pmdec=0.1)
    assert parse_error_model(str(f)) == ref and parse_error_model(str(g)) == ref
    bad = tmp_path / "bad.toml"
    bad.write_text('pm = "0,0.01,1"\n')
    with pytest.raises(ValueError) as exc:
        parse_error_model(str(bad))
    msg = str(exc.value)
    assert "\n" not in msg and str(bad) in msg and "colons, not commas" in msg


def test_shipped_validation_configs_use_the_accepted_form():
    """Every error model in training/*.toml parses (they are written in the accepted form)."""
    seen = 0
    for path in sorted((ROOT / "training").glob("*.toml")):
        cfg = tomllib.loads(path.read_text())
        for section in ("calibration", "power"):
            errs = cfg.get(section, {}).get("errors")
            for text in [errs] if isinstance(errs, str) else errs or []:
                assert isinstance(parse_error_model(text), ErrorModel), (path, text)
                seen += 1
    assert seen > 0


def test_mock_command_takes_the_same_form(tmp_path, capsys):
    """`swerve mock`: --error-pm 0:0.01:1 on the command line and pm = [0, 0.01, 1] in its
    TOML file give the same error model; the comma form is refused in one line before
    anything is built or written."""
    from swerve.commands.mock import _build, _config

    out = tmp_path / "m.ecsv"
    parser = build_parser()
    cfg_cli, params, _ = _config(parser.parse_args(["mock", "--out", str(out), "--error-pm", "0:0.01:1",
                                                    "--error-vlos", "4", "--error-parallax", "none"]))
    f = tmp_path / "mock.toml"
    f.write_text("[errors]\npm = [0.0, 0.01, 1.0]\nvlos = [4.0]\nparallax = []\n")
    cfg_file, _, _ = _config(parser.parse_args(["mock", "--out", str(out), "--config", str(f)]))
    assert cfg_cli["errors"] == cfg_file["errors"]
    em = _build(cfg_cli, params)[3]
    assert em.pm == ErrorLaw(0.0, 0.01, 1.0) and em.vlos == ErrorLaw(4.0) and em.parallax is None
    capsys.readouterr()
    assert main(["mock", "--out", str(out), "--error-pm", "0,0.01,1"]) == 1
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "--error-pm" in err and "A or A:B:P" in err and "commas" in err
    assert not out.exists()


def test_the_measurement_model_has_one_home():
    """The moved names live in swerve.measurement only: neither the catalog reader nor the
    population re-exports them (examples/make_demo.py imports them from swerve.measurement)."""
    for name in ("draw_samples", "ErrorSamples", "parallax_log_posterior", "distance_information",
                 "check_parallaxes", "distance_warning", "DISTANCE_PRIORS", "_truncnorm"):
        assert not hasattr(swerve.catalog, name), name
    for name in ("ErrorLaw", "parse_error_model"):  # (ErrorModel is imported there, to type make_mock's argument)
        assert not hasattr(swerve.population, name), name
    assert not hasattr(swerve.validation, "_ERR_KEYS")


# ------------------------------------------------------------------------------------------
# error samples against outside references


@pytest.mark.parametrize("mean,sd,low", [(1.0, 2.0, 0.5), (0.0, 1.0, 3.0), (10.0, 1.0, 0.0), (0.0, 1.0, 8.0),
                                         (-5.0, 0.5, 0.0)])
def test_truncated_normal_matches_scipy(mean, sd, low):
    """_truncnorm's draws follow scipy.stats.truncnorm (KS test at a fixed seed), down to a
    truncation point 10 sd above the mean, with every draw above the bound."""
    k = 20000
    x = _truncnorm(np.array([mean]), np.array([sd]), np.array([low]), k, np.random.default_rng(3))[0]
    assert x.shape == (k,) and np.all(x > low)
    ref = stats.truncnorm((low - mean) / sd, np.inf, loc=mean, scale=sd)
    assert stats.kstest(x, ref.cdf).pvalue > 1e-3
    assert abs(x.mean() - ref.mean()) < 5.0 * ref.std() / math.sqrt(k)


def _star(**cols):
    """A one-star catalog: a distance star unless a parallax is given."""
    base = {"id": ["s1"], "ra": [30.0] * u.deg, "dec": [-20.0] * u.deg, "pmra": [0.3] * u.mas / u.yr,
            "pmra_err": [0.05] * u.mas / u.yr, "pmdec": [-0.2] * u.mas / u.yr, "pmdec_err": [0.05] * u.mas / u.yr,
            "vlos": [400.0] * u.km / u.s, "vlos_err": [5.0] * u.km / u.s}
    base.update(cols)
    return catalog_from_table(Table(base))


def test_distance_star_draws_follow_scipy_truncated_normal():
    """A distance star's sampled distance is N(distance, distance_err) truncated to d > 0:
    compared with scipy.stats.truncnorm by a KS test (a = -1.33, so the cut matters)."""
    cat = _star(distance=[2.0] * u.kpc, distance_err=[1.5] * u.kpc)
    s = draw_samples(cat, 20000, np.random.default_rng(5))
    ref = stats.truncnorm(-2.0 / 1.5, np.inf, loc=2.0, scale=1.5)
    assert np.all(s.distance > 0) and stats.kstest(s.distance[0], ref.cdf).pvalue > 1e-3
    assert np.all(s.log_prior == 0.0)


@pytest.mark.parametrize("plx,sig", [(0.1, 0.01), (0.05, 0.01), (0.2, 0.03), (0.5, 0.02)])
def test_uniform_volume_posterior_mode_is_the_analytic_root(plx, sig):
    """Under the uniform-volume prior p(d) ~ d^2 (Bailer-Jones 2015, PASP 127, 994), the distance
    posterior d^2 exp(-(plx - 1/d)^2 / (2 s^2)) has d/dd log p = 2/d - (plx - 1/d) / (s^2 d^2) = 0,
    i.e. 2 s^2 d^2 - plx d + 1 = 0, whose smaller root (plx - sqrt(plx^2 - 8 s^2)) / (4 s^2)
    is the mode (derived here). swerve's density in distance,
    parallax_log_posterior(1/d) - 2 log d, peaks there; and the weighted draws of
    draw_samples put half their weight below the posterior median found by quadrature of
    the same analytic density."""
    from scipy.integrate import quad

    dmax = 300.0
    mode = (plx - math.sqrt(plx * plx - 8.0 * sig * sig)) / (4.0 * sig * sig)
    d = np.geomspace(0.5, dmax, 400001)
    lp = parallax_log_posterior(1.0 / d, plx, sig, "uniform-volume", max_distance=dmax) - 2.0 * np.log(d)
    assert d[np.argmax(lp)] == pytest.approx(mode, rel=1e-4)

    def dens(x):
        return x * x * math.exp(-0.5 * ((plx - 1.0 / x) / sig) ** 2)

    z = quad(dens, 0.0, dmax, points=[mode], limit=500, epsabs=0)[0]
    lo, hi = 1e-3, dmax  # the median by bisection on the quadrature CDF
    for _ in range(60):
        mid = 0.5 * (lo + hi)
        lo, hi = (mid, hi) if quad(dens, 0.0, mid, points=[p for p in [mode] if p < mid], limit=500,
                                   epsabs=0)[0] < 0.5 * z else (lo, mid)
    median = 0.5 * (lo + hi)
    cat = _star(parallax=[plx] * u.mas, parallax_err=[sig] * u.mas)
    s = draw_samples(cat, 40000, np.random.default_rng(8), distance_prior="uniform-volume", max_distance=dmax)
    w = np.exp(s.log_prior[0] - s.log_prior[0].max())
    w /= w.sum()
    below = float(w[s.distance[0] < median].sum())
    assert below == pytest.approx(0.5, abs=5 * 0.5 / math.sqrt(40000))
