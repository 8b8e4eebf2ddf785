"""Laplace approximation + importance sampling (swerve.laplace) on posteriors with known answers."""

import numpy as np
import pytest

from swerve.laplace import LaplaceResult, TMixture, laplace_covariance, laplace_is
from swerve.sampling import Posterior, credible_summary, resolve_priors, sample_posterior, weighted_percentile

MEAN = np.array([0.3, -1.0, 2.0])
COV = np.array([[0.04, 0.012, -0.01], [0.012, 0.09, 0.02], [-0.01, 0.02, 0.25]])
ICOV = np.linalg.inv(COV)
BOUNDS = [[-5, 5], [-6, 4], [-3, 8]]


def gauss_loglike(theta):
    d = np.atleast_2d(theta) - MEAN
    return -0.5 * np.einsum("wi,ij,wj->w", d, ICOV, d)


def gauss_post():
    return Posterior(gauss_loglike, resolve_priors(["a", "b", "c"], BOUNDS))


def banana_post(b):
    """x ~ N(0, 1), y | x ~ N(b x², 0.5²) (analytic: E y = b, var y = 0.25 + 2 b²)."""
    def loglike(th):
        th = np.atleast_2d(th)
        x, y = th[:, 0], th[:, 1]
        return -0.5 * x**2 - 0.5 * ((y - b * x**2) / 0.5) ** 2

    return Posterior(loglike, resolve_priors(["x", "y"], [[-10, 10], [-10, 40]]))


def test_curvature_of_a_gaussian_is_exact():
    """The log posterior of a Gaussian is a quadratic: the least-squares fit recovers its
    mean and covariance to rounding (analytic), from any starting scale and from a start three
    standard deviations off (one Newton step)."""
    post = gauss_post()
    span = post.high - post.low
    for sd0 in (0.002, 0.02, 0.2):
        for start in (MEAN, MEAN + 3 * np.sqrt(np.diag(COV))):
            c, cov_u, info = laplace_covariance(post, start, rng=np.random.default_rng(1), initial_sd=sd0)
            assert np.allclose(post.low + span * c, MEAN, rtol=0, atol=1e-8)
            assert np.allclose(cov_u * np.outer(span, span), COV, rtol=1e-6, atol=1e-10)
            assert info["n_flat"] == 0 and info["converged"]


def test_gaussian_posterior_moments_and_intervals():
    """Weighted mean, covariance and intervals of a 3-D Gaussian agree with the analytic ones
    within Monte Carlo error (standard errors from the effective sample size; 5 sigma)."""
    res = laplace_is(gauss_post(), seed=4, x_map=MEAN, inflate=1.0)
    assert isinstance(res, LaplaceResult)
    assert res.reliable and res.rounds == 1
    assert res.pareto_k < 0.5  # t proposal, Gaussian target: the weights are bounded
    assert res.ess > 0.8 * len(res.samples)  # ~0.9 for a t_10 of the same scale (measured in the module note)
    w = res.weights
    m = w @ res.samples
    se = np.sqrt(np.diag(COV) / res.ess)
    assert np.all(np.abs(m - MEAN) < 5 * se)
    c = (res.samples - m).T @ ((res.samples - m) * w[:, None])
    se_cov = np.sqrt((np.outer(np.diag(COV), np.diag(COV)) + COV**2) / res.ess)
    assert np.all(np.abs(c - COV) < 5 * se_cov)
    s = credible_summary(res.samples, res.names, res.weights)
    for j, name in enumerate(res.names):
        sd = np.sqrt(COV[j, j])
        # central 68% / 95% intervals of a Gaussian: mean ± 0.9945 σ / ± 1.960 σ (analytic)
        assert s[name]["ci68"][0] == pytest.approx(MEAN[j] - 0.9945 * sd, abs=0.1 * sd)
        assert s[name]["ci68"][1] == pytest.approx(MEAN[j] + 0.9945 * sd, abs=0.1 * sd)
        assert s[name]["ci95"][0] == pytest.approx(MEAN[j] - 1.960 * sd, abs=0.15 * sd)
        assert s[name]["ci95"][1] == pytest.approx(MEAN[j] + 1.960 * sd, abs=0.15 * sd)
    # the SamplerResult a fit reads, weights carried
    sr = res.to_sampler_result()
    assert sr.weights is w and sr.converged and sr.names == ["a", "b", "c"]
    assert sr.importance["method"] == "laplace-is" and np.all(np.isnan(sr.tau))


def test_finds_its_own_maximum_and_is_reproducible():
    a = laplace_is(gauss_post(), seed=7, n_draws=500, min_ess=100)
    b = laplace_is(gauss_post(), seed=7, n_draws=500, min_ess=100)
    assert np.array_equal(a.samples, b.samples) and np.array_equal(a.weights, b.weights)
    assert np.allclose(a.x_map, MEAN, atol=1e-3)
    assert np.allclose(a.mean, MEAN, atol=1e-6)  # the centre of the Laplace fit: the mean itself


def test_default_wider_first_proposal_is_reliable_in_one_round():
    """With the default 1.5 times wider first proposal a Gaussian still needs one round: the
    effective size stays above MIN_ESS of 4000 draws; mean within 5 standard errors."""
    res = laplace_is(gauss_post(), seed=8, x_map=MEAN)
    assert res.reliable and res.rounds == 1 and res.ess >= 1000
    assert np.all(np.abs(res.weights @ res.samples - MEAN) < 5 * np.sqrt(np.diag(COV) / res.ess))


def test_mildly_skewed_posterior_is_corrected_by_the_weights():
    """A weak banana: a Gaussian at the mode (y = 0) would miss the mean of y
    (analytic E y = b = 0.1, var y = 0.25 + 2 b² = 0.27) by 11 standard errors; the weighted
    draws recover both. (Stronger bananas, b = 0.2-0.3, give Pareto k 0.2-0.8 from seed to seed
    at 4000 draws: a borderline case either way.)"""
    b = 0.1
    res = laplace_is(banana_post(b), seed=2, x_map=np.zeros(2))
    assert res.reliable
    y = res.samples[:, 1]
    m = res.weights @ y
    var = res.weights @ (y - m) ** 2
    assert m == pytest.approx(b, abs=4 * np.sqrt(0.27 / res.ess))  # the mode is at y = 0
    assert var == pytest.approx(0.25 + 2 * b**2, rel=0.1)


def test_strong_banana_is_flagged_unreliable():
    """A curved posterior far from any Gaussian: the weights' tail is too heavy (Pareto k above
    0.7, Vehtari et al. 2024, JMLR 25, 72), even after the second, moment-matched proposal; the
    result says so and still gives emcee a starting ensemble spread over the posterior."""
    res = laplace_is(banana_post(3.0), seed=1, x_map=np.zeros(2), max_rounds=2)
    assert not res.reliable
    assert res.pareto_k > 0.7
    assert res.rounds == 2 and len(res.history) == 2 and len(res.samples) == 2 * 4000
    assert not res.to_sampler_result().converged
    walkers = res.start_walkers(32, np.random.default_rng(0))
    assert walkers.shape == (32, 2)
    assert len(np.unique(walkers, axis=0)) == 32
    assert np.all(np.isfinite(banana_post(3.0)(walkers)))
    assert np.ptp(walkers[:, 1]) > 1.0  # spread along the banana, not a ball at the mode


def test_truncated_support_gets_zero_weight():
    """A Gaussian cut by its prior at one standard deviation above the mean: draws beyond the
    bound weigh nothing, and the weighted mean is the truncated normal's, -φ(1)/Φ(1) = -0.2876
    (analytic)."""
    post = Posterior(lambda th: -0.5 * np.atleast_2d(th)[:, 0] ** 2, resolve_priors(["x"], [[-8.0, 1.0]]))
    res = laplace_is(post, seed=3, x_map=np.array([0.0]))
    outside = res.samples[:, 0] > 1.0
    assert outside.any() and np.all(res.weights[outside] == 0)
    assert res.weights @ res.samples[:, 0] == pytest.approx(-0.2876, abs=5 * 0.8 / np.sqrt(res.ess))


def test_resample_and_bad_arguments():
    res = laplace_is(gauss_post(), seed=5, x_map=MEAN, n_draws=2000)
    eq = res.resample(3000, np.random.default_rng(1))
    assert eq.shape == (3000, 3)
    assert np.all(np.abs(eq.mean(0) - MEAN) < 5 * np.sqrt(np.diag(COV) / min(res.ess, 3000)))
    with pytest.raises(ValueError, match="degrees of freedom"):
        laplace_is(gauss_post(), seed=1, x_map=MEAN, df=2.0)
    with pytest.raises(ValueError, match="x_map"):
        laplace_is(gauss_post(), seed=1, x_map=MEAN[:2])
    with pytest.raises(ValueError, match="n_draws"):
        laplace_is(gauss_post(), seed=1, x_map=MEAN, n_draws=10)


# a two-mode posterior: 0.7 N(MU0, S0) + 0.3 N(MU1, S1), the modes 6-8 standard deviations apart in a
MIX_W = np.array([0.7, 0.3])
MIX_MU = np.array([[0.0, 0.0, 0.0], [1.2, 0.3, -0.2]])
MIX_S = np.array([[[0.04, 0.01, 0.0], [0.01, 0.09, 0.02], [0.0, 0.02, 0.16]],
                  [[0.02, -0.005, 0.0], [-0.005, 0.05, 0.0], [0.0, 0.0, 0.1]]])


def mixture_post():
    from scipy.stats import multivariate_normal

    comps = [multivariate_normal(m, S) for m, S in zip(MIX_MU, MIX_S)]

    def loglike(th):
        th = np.atleast_2d(th)
        return np.logaddexp(np.log(MIX_W[0]) + comps[0].logpdf(th), np.log(MIX_W[1]) + comps[1].logpdf(th))

    return Posterior(loglike, resolve_priors(["a", "b", "c"], [[-3, 4], [-3, 3], [-3, 3]])), comps


def _share_of_second(samples, weights, comps):
    """The weighted mean of each draw's probability of belonging to the second component (exact,
    scipy): an estimate of that component's weight whose expectation is the weight itself."""
    l0 = np.log(MIX_W[0]) + comps[0].logpdf(samples)
    l1 = np.log(MIX_W[1]) + comps[1].logpdf(samples)
    return float(weights @ np.exp(l1 - np.logaddexp(l0, l1)))


@pytest.mark.parametrize("start", [0, 1])
def test_two_mode_posterior_gets_a_mixture_proposal(start):
    """From either mode, the draws find the other maximum, and the mixture proposal's weighted
    draws recover the mixture: the second mode's weight 0.3, the mean and covariance of the
    mixture (analytic), and its 2.5/50/97.5% marginal quantiles (scipy.stats.norm's CDF of the
    mixture, solved by brentq), within 5 Monte Carlo standard errors from the effective sample
    size (the covariance's from the mixture's own fourth moments, by a scipy sample)."""
    from scipy.optimize import brentq
    from scipy.stats import multivariate_normal, norm

    post, comps = mixture_post()
    res = laplace_is(post, seed=2, x_map=MIX_MU[start])
    assert res.reliable, res.verdict
    assert len(res.maxima) == 2 and res.history[-1]["components"] == 2
    for j in range(2):  # each maximum within 0.1 standard deviation of a component's mean
        found = min(res.maxima, key=lambda m: np.sum((np.array(m["centre"]) - MIX_MU[j]) ** 2))
        assert np.all(np.abs(np.array(found["centre"]) - MIX_MU[j]) < 0.1 * np.sqrt(np.diag(MIX_S[j])))
    se_w = np.sqrt(MIX_W[0] * MIX_W[1] / res.ess)
    assert _share_of_second(res.samples, res.weights, comps) == pytest.approx(MIX_W[1], abs=5 * se_w)
    masses = sorted(c["mass"] for c in res.components)
    assert masses == pytest.approx(sorted(MIX_W), abs=0.05)  # the components sit on the modes
    mean = MIX_W @ MIX_MU
    cov = sum(w * (S + np.outer(m - mean, m - mean)) for w, m, S in zip(MIX_W, MIX_MU, MIX_S))
    w, X = res.weights, res.samples
    m = w @ X
    assert np.all(np.abs(m - mean) < 5 * np.sqrt(np.diag(cov) / res.ess))
    rng = np.random.default_rng(0)
    ref = np.vstack([multivariate_normal(mu, S).rvs(int(200_000 * wk), random_state=rng)
                     for wk, mu, S in zip(MIX_W, MIX_MU, MIX_S)]) - mean
    var_prod = np.var(ref[:, :, None] * ref[:, None, :], axis=0)  # variance of each (x_a - m_a)(x_b - m_b)
    c = (X - m).T @ ((X - m) * w[:, None])
    assert np.all(np.abs(c - cov) < 5 * np.sqrt(var_prod / res.ess))
    for j in range(3):
        def cdf(x, j=j):
            return sum(wk * norm.cdf(x, mu[j], np.sqrt(S[j, j])) for wk, mu, S in zip(MIX_W, MIX_MU, MIX_S))

        def pdf(x, j=j):
            return sum(wk * norm.pdf(x, mu[j], np.sqrt(S[j, j])) for wk, mu, S in zip(MIX_W, MIX_MU, MIX_S))

        for p, got in zip((0.025, 0.5, 0.975), weighted_percentile(X[:, j], w, [2.5, 50, 97.5])):
            q = brentq(lambda x, p=p: cdf(x) - p, -5, 5)
            assert got == pytest.approx(q, abs=5 * np.sqrt(p * (1 - p) / res.ess) / pdf(q))


def test_one_curved_mode_is_not_split():
    """A banana (one maximum, curved): the straight line between points on its two arms dips,
    but every polished maximum is the same one, so the proposal stays one Student-t."""
    res = laplace_is(banana_post(1.0), seed=1, x_map=np.zeros(2))
    assert len(res.history) > 1  # unreliable after round 1, so the draws were searched
    assert len(res.maxima) == 1
    assert all(h["components"] == 1 for h in res.history)


def test_mixture_density_matches_scipy():
    """TMixture's log density is the weighted sum of scipy.stats.multivariate_t densities, and
    its draws have the mixture's mean (analytic; 5 standard errors)."""
    from scipy.stats import multivariate_t

    rng = np.random.default_rng(3)
    scales = [np.array([[1.0, 0.3], [0.3, 0.5]]), np.array([[0.2, 0.0], [0.0, 2.0]])]
    means = [np.array([0.0, 1.0]), np.array([3.0, -1.0])]
    mix = TMixture.from_scales([0.25, 0.75], means, scales, 7.0)
    U = rng.normal(size=(50, 2)) * 3
    ref = np.log(0.25 * multivariate_t(means[0], scales[0], df=7).pdf(U)
                 + 0.75 * multivariate_t(means[1], scales[1], df=7).pdf(U))
    assert np.allclose(mix.logpdf(U), ref, rtol=0, atol=1e-10)
    X = mix.draw(rng, 40000)
    mean = 0.25 * means[0] + 0.75 * means[1]
    # covariance of the mixture: the t's covariance is df / (df - 2) times its scale
    cov = sum(a * (7 / 5 * S + np.outer(mu - mean, mu - mean)) for a, mu, S in zip((0.25, 0.75), means, scales))
    assert np.all(np.abs(X.mean(0) - mean) < 5 * np.sqrt(np.diag(cov) / len(X)))


def test_unreliable_weights_fall_back_to_emcee_from_the_draws():
    """One round only on the two-mode posterior: a single Student-t at one mode cannot carry the
    other, the result says so, and emcee started from its draws (walkers at both modes, in
    proportion to the weighted draws) recovers the second mode's weight 0.3 (scipy; 5 standard
    errors from emcee's effective sample size)."""
    post, comps = mixture_post()
    res = laplace_is(post, seed=1, x_map=MIX_MU[0], max_rounds=1)
    assert not res.reliable
    assert "NOT reliable" in res.verdict and "start_walkers" in res.verdict
    walkers = res.start_walkers(32, np.random.default_rng(1))
    assert len(np.unique(walkers, axis=0)) == 32
    at_second = int(np.sum(comps[1].logpdf(walkers) > comps[0].logpdf(walkers)))
    assert 3 <= at_second <= 20  # about 0.3 x 32 = 9.6; the weights of one round are noisy
    chain = sample_posterior(post, seed=1, walkers=walkers, max_steps=20000)
    assert chain.converged
    n_eff = chain.n_walkers * (chain.n_steps - chain.burn_in) / np.max(chain.tau)
    share = _share_of_second(chain.samples, np.full(len(chain.samples), 1.0 / len(chain.samples)), comps)
    assert share == pytest.approx(MIX_W[1], abs=5 * np.sqrt(MIX_W[0] * MIX_W[1] / n_eff))
