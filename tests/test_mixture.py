"""The mixture with a stellar-halo background: the halo's density against Monte Carlo, Bayes'
rule for the memberships, the kernels' membership-weighted gradient against finite differences,
the Beta prior against scipy, and the fraction of hypervelocity stars recovered on a toy."""

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table
from scipy import stats

from swerve.background import (
    HALO_SIGMA,
    draw_halo_velocities,
    halo_log_density,
    membership,
    mixture_loglike,
    prior_membership,
)
from swerve.catalog import catalog_from_table
from swerve.frames import galacto_to_helio, spherical_components
from swerve.likelihood import Likelihood, prepare_stars
from swerve.measurement import draw_samples
from swerve.summaries import SummarySpec

SPEC1 = SummarySpec(r_edges=(10.0, 250.0), lat_edges=(0.0, 90.0))
SIG = np.array([100.0, 5.0, 4.0])  # the toy's intrinsic sd of (v_r, v_tf, v_pf)


class ToyEmulator:
    """One cell; mean v_tf = a, the rest fixed (as tests/test_likelihood.py's toy)."""

    parameter_names = ["a"]
    bounds = np.array([[-50.0, 50.0]])

    def predict(self, theta, return_std=False, return_cov=False):
        theta = np.atleast_2d(theta)
        y = np.zeros((len(theta), 9))
        y[:, 0] = 500.0
        y[:, 1] = theta[:, 0]
        y[:, 3:6] = np.log(SIG)
        if return_std:
            return y, np.full_like(y, 0.5)
        if return_cov:
            cov = np.zeros((len(y), 9, 9))
            cov[:, [0, 1, 2], [0, 1, 2]] = 0.25
            return y, cov
        return y


def _basis(pos):
    x, y, z = pos.T
    R = np.hypot(x, y)
    r = np.linalg.norm(pos, axis=1)
    er = pos / r[:, None]
    eth = np.stack([z * x / (R * r), z * y / (R * r), -R / r], 1) * np.where(z >= 0, 1, -1)[:, None]
    eph = np.stack([-y / R, x / R, 0 * x], 1) * np.where(x * y >= 0, 1, -1)[:, None]
    return er, eth, eph


def _mixed_catalog(rng, n_hvs, n_halo, a_true, pm_err=0.01, vlos_err=5.0):
    """n_hvs toy hypervelocity stars and n_halo halo stars (Bond et al. 2010 ellipsoid,
    outgoing) at random positions 20-80 kpc from the Galactic Centre; returns the catalog and
    which rows are halo stars."""
    n = n_hvs + n_halo
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    pos = d * rng.uniform(20, 80, n)[:, None]
    er, eth, eph = _basis(pos)
    uvec = np.column_stack([rng.normal(500, SIG[0], n), rng.normal(a_true, SIG[1], n), rng.normal(0, SIG[2], n)])
    vel = uvec[:, [0]] * er + uvec[:, [1]] * eth + uvec[:, [2]] * eph
    halo = np.zeros(n, bool)
    halo[n_hvs:] = True
    vel[halo] = draw_halo_velocities(pos[halo], rng)
    h = galacto_to_helio(pos, vel)
    t = Table()
    t["id"] = [f"s{i}" for i in range(n)]
    t["ra"], t["dec"] = h["ra"] * u.deg, h["dec"] * u.deg
    t["distance"] = h["distance"] * u.kpc
    t["distance_err"] = 1e-9 * h["distance"] * u.kpc
    t["pmra"] = (h["pmra"] + pm_err * rng.standard_normal(n)) * u.mas / u.yr
    t["pmdec"] = (h["pmdec"] + pm_err * rng.standard_normal(n)) * u.mas / u.yr
    t["pmra_err"] = np.full(n, pm_err) * u.mas / u.yr
    t["pmdec_err"] = np.full(n, pm_err) * u.mas / u.yr
    t["vlos"] = (h["vlos"] + vlos_err * rng.standard_normal(n)) * u.km / u.s
    t["vlos_err"] = np.full(n, vlos_err) * u.km / u.s
    return t, halo


def test_halo_ellipsoid_values():
    """Bond et al. 2010, ApJ 716, 1 (from memory): (sigma_r, sigma_theta, sigma_phi) = (141, 75, 85) km/s."""
    assert HALO_SIGMA == (141.0, 75.0, 85.0)


def test_halo_draws_have_the_ellipsoid_in_spherical_components(rng):
    """Velocities drawn at random positions have, in swerve.frames' spherical components, a
    half-normal v_r of scale sigma_r and Gaussian v_theta, v_phi of zero mean and sd sigma."""
    n = 40000
    pos = rng.normal(size=(n, 3)) * 30.0
    sph = spherical_components(pos, draw_halo_velocities(pos, rng))
    assert np.all(sph["v_r"] >= 0)
    # half-normal: mean sigma sqrt(2/pi), second moment sigma^2
    assert np.mean(sph["v_r"]) == pytest.approx(141.0 * np.sqrt(2 / np.pi), rel=0.01)
    assert np.sqrt(np.mean(sph["v_r"] ** 2)) == pytest.approx(141.0, rel=0.01)
    assert np.std(sph["v_theta"]) == pytest.approx(75.0, rel=0.01)
    assert np.std(sph["v_phi"]) == pytest.approx(85.0, rel=0.01)
    assert abs(np.mean(sph["v_phi"])) < 5 * 85.0 / np.sqrt(n)


def test_halo_density_is_the_gaussian_convolved_with_errors(rng):
    """Untruncated: exactly scipy's N(m; 0, Sigma + C). Truncated to v_r > 0 (renormalised):
    the Monte Carlo mean of N(m; u, C) over u drawn from the half ellipsoid, within 5 standard
    errors, for measurements near and far from v_r = 0 and with correlated errors."""
    sigma = np.array([141.0, 75.0, 85.0])
    A = rng.normal(size=(4, 3, 3)) * 30.0
    C = A @ np.swapaxes(A, -1, -2) + np.eye(3) * 25.0  # correlated errors, tens of km/s
    m = np.array([[40.0, 20.0, -60.0], [-30.0, 100.0, 10.0], [250.0, -50.0, 80.0], [5.0, 0.0, 0.0]])
    lw = np.zeros((4, 1))
    plain = halo_log_density(m[:, None], C[:, None], lw, sigma, outgoing=False)
    for i in range(4):
        assert plain[i] == pytest.approx(stats.multivariate_normal(np.zeros(3), np.diag(sigma**2) + C[i]).logpdf(m[i]),
                                         abs=1e-10)
    trunc = halo_log_density(m[:, None], C[:, None], lw, sigma, outgoing=True)
    n = 400000
    uu = rng.standard_normal((n, 3)) * sigma
    uu[:, 0] = np.abs(uu[:, 0])
    for i in range(4):
        p = stats.multivariate_normal(m[i], C[i]).pdf(uu)  # N(m; u, C) = N(u; m, C)
        mc, se = p.mean(), p.std() / np.sqrt(n)
        assert abs(np.exp(trunc[i]) - mc) < 5 * se, (i, np.exp(trunc[i]), mc, se)
    # samples: the weighted mean of the per-sample densities
    two = halo_log_density(m[:2][None], C[:2][None], np.log([[0.25, 0.75]]), sigma)
    assert two[0] == pytest.approx(np.log(0.25 * np.exp(trunc[0]) + 0.75 * np.exp(trunc[1])), abs=1e-12)
    with pytest.raises(ValueError, match="three positive dispersions"):
        halo_log_density(m[:, None], C[:, None], lw, (141.0, -1.0, 85.0))


def test_membership_is_bayes_rule():
    """pi p1 / (pi p1 + (1 - pi) p0) on a toy of known densities, and the mixture's log."""
    p1 = np.array([[0.02, 1e-5, 3e-3]])
    p0 = np.array([1e-3, 2e-3, 3e-3])
    for pi in (0.0, 0.3, 0.9, 1.0):
        expect = pi * p1 / (pi * p1 + (1 - pi) * p0)
        np.testing.assert_allclose(membership(np.log(p1), np.log(p0), pi), expect, rtol=1e-12)
        np.testing.assert_allclose(mixture_loglike(np.log(p1), np.log(p0), pi), np.log(pi * p1 + (1 - pi) * p0),
                                   rtol=1e-12)
    # far tails: no overflow, no NaN
    r = membership(np.array([[-5000.0, 0.0]]), np.array([0.0, -5000.0]), 0.5)
    np.testing.assert_allclose(r, [[0.0, 1.0]], atol=1e-300)


def test_likelihood_mixture_per_star_and_memberships(rng):
    """Likelihood(background='halo'): per star log(f p_hvs + (1 - f) p_halo) with p_hvs from the
    plain likelihood and p_halo from halo_log_density; memberships by Bayes' rule; f = 1 is the
    plain likelihood (the catalog-level emulator term included); a star's own prior replaces f."""
    t, halo = _mixed_catalog(rng, 30, 10, 3.0)
    cat = catalog_from_table(t, source="toy")
    terms = prepare_stars(cat, draw_samples(cat, 3, rng), SPEC1)
    plain = Likelihood(ToyEmulator(), terms, SPEC1)
    mix = Likelihood(ToyEmulator(), terms, SPEC1, background="halo")
    assert mix.parameter_names == ["a", "f_hvs"]
    np.testing.assert_array_equal(mix.bounds[-1], [0.0, 1.0])
    lbg = halo_log_density(terms.mean, terms.cov, terms.log_w)
    a = np.array([[1.0], [3.0], [6.0]])
    f = np.array([[0.2], [0.7], [1.0]])
    lh = plain.per_star(a)
    with np.errstate(divide="ignore"):  # log(1 - f) at f = 1
        expect = np.logaddexp(np.log(f) + lh, np.log1p(-f) + lbg)
    np.testing.assert_allclose(mix.per_star(np.hstack([a, f])), expect, rtol=1e-12)
    r = mix.membership(np.hstack([a, f]))
    np.testing.assert_allclose(r, f * np.exp(lh) / (f * np.exp(lh) + (1 - f) * np.exp(lbg)), rtol=1e-9)
    np.testing.assert_allclose(mix(np.hstack([a, np.ones_like(a)])), plain(a), rtol=1e-12)
    # the halo stars are told apart: their memberships at f = 0.7 are small, the others' near 1
    terms_halo = np.isin(terms.ids, t["id"][halo])
    assert np.median(r[1, terms_halo]) < 0.05 and np.median(r[1, ~terms_halo]) > 0.95
    # a star's own prior replaces f
    terms.prior_membership = np.full(terms.n, np.nan)
    terms.prior_membership[0] = 0.5
    own = Likelihood(ToyEmulator(), terms, SPEC1, background="halo")
    r2 = own.membership(np.array([[3.0, 0.1], [3.0, 0.9]]))
    assert r2[0, 0] == pytest.approx(r2[1, 0], rel=1e-12)
    assert r2[0, 0] == pytest.approx(np.exp(lh[1, 0]) / (np.exp(lh[1, 0]) + np.exp(lbg[0])), rel=1e-9)
    assert r2[0, 1] < r2[1, 1]
    with pytest.raises(ValueError, match="expected 2 parameters"):
        mix(a)
    with pytest.raises(ValueError, match="background"):
        Likelihood(ToyEmulator(), terms, SPEC1, background="disk")


def test_kernel_gradient_is_the_mixture_gradient(rng):
    """With memberships, the kernels' gradient in the cell means is the derivative of the
    mixture's log-likelihood sum (central differences), for whole walker blocks and the rest."""
    from swerve.likelihood_kernels import _cell_gaussians_tri, _run_kernels

    t, _ = _mixed_catalog(rng, 20, 10, 3.0, pm_err=0.05)
    cat = catalog_from_table(t, source="toy")
    terms = prepare_stars(cat, draw_samples(cat, 3, rng), SPEC1)
    like = Likelihood(ToyEmulator(), terms, SPEC1, background="halo")
    W = 19
    th = np.column_stack([np.linspace(-5, 8, W), np.linspace(0.1, 0.95, W)])
    y = ToyEmulator().predict(th[:, :1])
    mu, tri = _cell_gaussians_tri(y, 1, 1.0)
    mix_off = like._mix_off(th[:, 1])
    _, grad, _ = _run_kernels(like._packed, mu, tri, True, None, True, mix_off)
    _, grad_plain, _ = _run_kernels(like._packed, mu, tri, True, None, True)

    def total(m):
        return like._mix(_run_kernels(like._packed, m, tri, False)[0], th[:, 1]).sum(axis=1)

    h = 1e-4
    for c in range(3):
        dm = np.zeros_like(mu)
        dm[:, 0, c] = h
        fd = (total(mu + dm) - total(mu - dm)) / (2 * h)
        np.testing.assert_allclose(grad[:, 0, c], fd, rtol=1e-5, atol=1e-7)
    assert not np.allclose(grad, grad_plain)  # the weighting matters here


def test_beta_prior_is_scipys_up_to_a_constant():
    from swerve.sampling import Posterior, resolve_priors

    pri = resolve_priors(["a", "f_hvs"], [[-1, 1], [0, 1]], {"f_hvs": {"kind": "beta", "alpha": 2.0, "beta": 5.0}})
    post = Posterior(lambda th: np.zeros(len(th)), pri)
    x = np.column_stack([np.zeros(5), [0.05, 0.2, 0.4, 0.7, 0.95]])
    diff = post.log_prior(x) - stats.beta(2.0, 5.0).logpdf(x[:, 1])
    np.testing.assert_allclose(diff, diff[0], atol=1e-12)
    with pytest.raises(ValueError, match="positive alpha and beta"):
        resolve_priors(["f"], [[0, 1]], {"f": {"kind": "beta", "alpha": 0.0, "beta": 1.0}})
    with pytest.raises(ValueError, match="leaves"):
        resolve_priors(["f"], [[0, 1]], {"f": {"kind": "beta", "alpha": 1.0, "beta": 1.0, "low": -0.5}})


def test_prior_membership_column(rng):
    t, _ = _mixed_catalog(rng, 4, 1, 3.0)
    t["p_hvs_prior"] = [0.9, np.nan, 0.1, 1.0, 0.0]
    cat = catalog_from_table(t, source="toy.ecsv")
    np.testing.assert_array_equal(prior_membership(cat, ["s2", "s1", "s0"], "p_hvs_prior"), [0.1, np.nan, 0.9])
    with pytest.raises(ValueError, match="no column 'p_hvs_prio'"):
        prior_membership(cat, ["s0"], "p_hvs_prio")
    t["p_hvs_prior"][3] = 1.5
    bad = catalog_from_table(t, source="toy.ecsv")
    with pytest.raises(ValueError, match=r"toy.ecsv: row 4, column 'p_hvs_prior': expected a probability"):
        prior_membership(bad, ["s0"], "p_hvs_prior")


def test_fraction_and_parameter_recovered_on_a_toy(rng):
    """150 toy hypervelocity stars and 50 halo stars (f = 0.75): the posterior of (a, f_hvs)
    under the mixture holds both truths in its 95% intervals, and f's interval excludes 1."""
    from swerve.sampling import Posterior, credible_summary, resolve_priors, sample_posterior

    a_true, n_hvs, n_halo = 10.0, 150, 50
    t, _ = _mixed_catalog(rng, n_hvs, n_halo, a_true, pm_err=0.02)
    cat = catalog_from_table(t, source="toy")
    terms = prepare_stars(cat, draw_samples(cat, 1, rng), SPEC1)
    assert terms.n > 0.9 * (n_hvs + n_halo / 2)  # halo stars are outgoing by construction
    f_true = n_hvs / terms.n
    like = Likelihood(ToyEmulator(), terms, SPEC1, background="halo", emulator_error="none")
    post = Posterior(like, resolve_priors(like.parameter_names, like.bounds))
    res = sample_posterior(post, seed=2, nwalkers=16, max_steps=1500, check_every=250, n_tau=25)
    s = credible_summary(res.samples, res.names)
    assert s["a"]["ci95"][0] < a_true < s["a"]["ci95"][1]
    assert s["f_hvs"]["ci95"][0] < f_true < s["f_hvs"]["ci95"][1]
    assert s["f_hvs"]["ci95"][1] < 0.95
