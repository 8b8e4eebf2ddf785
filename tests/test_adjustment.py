"""The curvature adjustment (swerve.adjustment) against the analytic case of a Gaussian
quasi-likelihood with the wrong variance: data x_i ~ N(mu, s_true^2) fitted with a likelihood
that assumes s_model. Its curvature is n / s_model^2, its score variance n s_true^2 / s_model^4,
so the Godambe information H J^-1 H is n / s_true^2, the correct one (a textbook property of the
sandwich; e.g. Chandler & Bate 2007, from memory), and the adjusted likelihood's width is
s_true / sqrt(n)."""

import numpy as np
import pytest

from swerve.adjustment import AdjustedLikelihood, curvature_adjustment


class GaussianQuasi:
    """Per-star log N(x_i; mu_k, s_k^2) summed over independent dimensions k (theta = mu)."""

    def __init__(self, x, s_model):
        self.x = np.asarray(x, dtype=float)  # (n, d)
        self.s = np.asarray(s_model, dtype=float)  # (d,)

    def per_star(self, theta):
        th = np.atleast_2d(theta)
        r = (self.x[None, :, :] - th[:, None, :]) / self.s
        return -0.5 * np.sum(r * r, axis=2)

    def __call__(self, theta):
        return self.per_star(theta).sum(axis=1)


def _mle_curvature(like, theta_hat, i, h):
    e = np.zeros_like(theta_hat)
    e[i] = h
    v = like(np.array([theta_hat - e, theta_hat, theta_hat + e]))
    return -(v[0] - 2 * v[1] + v[2]) / h**2


@pytest.mark.parametrize("s_true, s_model", [(2.0, 1.0), (1.5, 1.0)])
def test_adjustment_restores_the_correct_width(s_true, s_model):
    rng = np.random.default_rng(4)
    n = 4000
    mu = np.array([0.3, -0.2])
    # dimension 0 misspecified (s_model < s_true), dimension 1 correct
    x = mu + rng.normal(size=(n, 2)) * np.array([s_true, 1.0])
    like = GaussianQuasi(x, [s_model, 1.0])
    lo, hi = np.array([-1.0, -1.0]), np.array([1.0, 1.0])
    theta_hat = x.mean(axis=0)  # the maximum
    C, info = curvature_adjustment(like, theta_hat, lo, hi)
    adj = AdjustedLikelihood(like, theta_hat, C, lo, hi)
    # adjusted curvature in dimension 0: n / s_true^2 (sampling error of the variance ~ sqrt(2/n))
    got = _mle_curvature(adj, theta_hat, 0, 1e-3)
    assert got == pytest.approx(n / s_true**2, rel=0.06)
    # the correctly specified dimension stays as it is (kappa ~ 1: widened by at most its noise)
    assert _mle_curvature(adj, theta_hat, 1, 1e-3) == pytest.approx(n / 1.0, rel=0.06)
    assert C[0, 0] == pytest.approx(s_model / s_true, rel=0.03)
    assert abs(C[0, 1]) < 0.03 and abs(C[1, 0]) < 0.03
    assert info["adjusted"]
    # the maximum and its value are unchanged
    assert adj(theta_hat) == pytest.approx(like(theta_hat[None])[0])


def test_fixed_parameters_are_left_alone():
    """With a parameter fixed by its prior, only the free ones are adjusted: C is the identity on
    the fixed one, and the free one gets the analytic factor s_model / s_true."""
    rng = np.random.default_rng(6)
    x = np.array([0.1, 0.0]) + rng.normal(size=(4000, 2)) * np.array([2.0, 1.5])
    like = GaussianQuasi(x, [1.0, 1.0])  # both misspecified
    lo, hi = np.array([-1.0, -1.0]), np.array([1.0, 1.0])
    theta_hat = np.array([x[:, 0].mean(), 0.05])  # the second parameter fixed at 0.05
    C, _ = curvature_adjustment(like, theta_hat, lo, hi, free=[0])
    assert C[0, 0] == pytest.approx(0.5, rel=0.03)
    np.testing.assert_array_equal(C[1], [0.0, 1.0])
    np.testing.assert_array_equal(C[:, 1], [0.0, 1.0])


def test_adjustment_never_narrows():
    """A likelihood wider than the data (s_model > s_true) is left alone: the adjustment only widens."""
    rng = np.random.default_rng(5)
    x = rng.normal(size=(3000, 1)) * 0.5
    like = GaussianQuasi(x, [1.0])
    C, info = curvature_adjustment(like, x.mean(axis=0), np.array([-1.0]), np.array([1.0]))
    assert info["kappa"][0] == pytest.approx(0.25, rel=0.1)
    np.testing.assert_allclose(C, np.eye(1), atol=1e-12)
    assert not info["adjusted"]


def test_validation_fit_with_the_adjustment(smoke_run):
    """``[fit] adjust`` runs end to end in a validation fit (smoke emulator) and, on the same
    catalog and seed, gives intervals no narrower than without it beyond Monte Carlo noise."""
    import warnings

    from swerve.emulate import load
    from swerve.measurement import parse_error_model
    from swerve.simulate import training_setup_from_dict
    from swerve.validation import draw_catalogs, fit_many, validation_bank

    _, emu_dir = smoke_run
    emu = load(emu_dir)
    setup = training_setup_from_dict(emu.metadata["config"])
    lo, hi = np.asarray(emu.bounds).T
    truth = dict(zip(emu.parameter_names, 0.5 * (lo + hi) + 0.05 * (hi - lo)))
    gal = setup.galaxy_at({n: truth[n] for n in setup.galaxy_names})
    launch = setup.launch_at({n: truth[n] for n in setup.launch_names})
    rng = np.random.default_rng(2)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tabs, _ = draw_catalogs(setup, gal, launch, validation_bank(setup, gal, 3), parse_error_model("pm=0.02,vlos=5,dist=0.1"),
                                60, 1, rng)
    cfg = dict(samples=8, nwalkers=16, max_steps=600, check_every=100, n_tau=10.0, tau_rtol=0.2, n_draws=19)
    # swerve fit's own path (swerve.inference.fit_catalog), as the harness fits
    plain, = fit_many(emu_dir, [(tabs[0], 11, None)], dict(cfg, adjust=False))
    adj, = fit_many(emu_dir, [(tabs[0], 11, None)], dict(cfg, adjust=True))
    for r in (plain, adj):
        assert np.all(np.isfinite(r["median"])) and np.all((r["lo95"] >= lo) & (r["hi95"] <= hi))
    w_plain = np.asarray(plain["hi68"]) - np.asarray(plain["lo68"])
    w_adj = np.asarray(adj["hi68"]) - np.asarray(adj["lo68"])
    assert np.all(w_adj > 0.7 * w_plain)
