"""Sampler: emcee on analytic posteriors, the AR(1) autocorrelation check, priors, resuming."""

import numpy as np
import pytest

from swerve.sampling import (
    ConvergenceWarning,
    Posterior,
    Prior,
    credible_summary,
    find_map,
    resolve_priors,
    sample_posterior,
)

MEAN = np.array([0.3, -1.0])
COV = np.array([[0.04, 0.012], [0.012, 0.09]])
ICOV = np.linalg.inv(COV)


def gauss_loglike(theta):
    d = np.atleast_2d(theta)[:, :2] - MEAN
    return -0.5 * np.einsum("wi,ij,wj->w", d, ICOV, d)


def test_posterior_matches_analytic_gaussian():
    """Sampled mean and covariance of a 2-D Gaussian posterior agree with the analytic ones
    within Monte Carlo error (effective samples ~ n_samples / 1 after thinning by tau/2)."""
    pri = resolve_priors(["a", "b"], [[-5, 5], [-6, 4]])
    post = Posterior(gauss_loglike, pri)
    res = sample_posterior(post, seed=3, max_steps=6000)
    assert res.converged
    n_eff = res.n_walkers * (res.n_steps - res.burn_in) / np.max(res.tau)
    se = np.sqrt(np.diag(COV) / n_eff)
    assert np.all(np.abs(res.samples.mean(0) - MEAN) < 5 * se)
    # Monte Carlo error of a covariance element: var = (C_aa C_bb + C_ab^2) / n_eff
    se_cov = np.sqrt((np.outer(np.diag(COV), np.diag(COV)) + COV**2) / n_eff)
    assert np.all(np.abs(np.cov(res.samples.T) - COV) < 5 * se_cov)
    s = credible_summary(res.samples, res.names)
    # 68% interval of a Gaussian is mean +- 1 sigma
    assert s["a"]["ci68"][1] - s["a"]["ci68"][0] == pytest.approx(2 * 0.2, rel=0.1)
    assert 0.15 < res.acceptance < 0.9


def test_emcee_autocorrelation_of_ar1():
    """REFERENCES.md: AR(1) with phi = 0.9 has tau = (1+phi)/(1-phi) = 19 (analytic)."""
    import emcee

    rng = np.random.default_rng(0)
    phi, n, nw = 0.9, 50_000, 16
    x = np.empty((n, nw))
    x[0] = rng.standard_normal(nw)
    e = rng.standard_normal((n, nw)) * np.sqrt(1 - phi**2)
    for t in range(1, n):
        x[t] = phi * x[t - 1] + e[t]
    tau = emcee.autocorr.integrated_time(x[:, :, None], c=5)
    assert tau[0] == pytest.approx(19.0, rel=0.1)


def test_fixed_and_gaussian_priors():
    pri = resolve_priors(["a", "b"], [[-5, 5], [-6, 4]],
                         {"a": {"kind": "fixed", "value": 0.3}, "b": {"kind": "gaussian", "mu": 0.0, "sigma": 0.3}})
    post = Posterior(gauss_loglike, pri)
    assert post.free_names == ["b"]
    # posterior of b given a = mean_a: Gaussian likelihood (conditional) x Gaussian prior
    cond_var = 1.0 / ICOV[1, 1]
    var = 1.0 / (1.0 / cond_var + 1.0 / 0.09)
    mean = var * (MEAN[1] / cond_var)
    res = sample_posterior(post, seed=5, max_steps=6000)
    assert res.samples[:, 0].mean() == pytest.approx(mean, abs=0.03)
    assert res.samples[:, 0].std() == pytest.approx(np.sqrt(var), rel=0.1)


def test_map_finds_the_mode():
    post = Posterior(gauss_loglike, resolve_priors(["a", "b"], [[-5, 5], [-6, 4]]))
    np.testing.assert_allclose(find_map(post, np.random.default_rng(1)), MEAN, atol=1e-4)


@pytest.mark.parametrize(
    "priors, fragment",
    [
        ({"a": {"kind": "uniform", "low": -9, "high": 1}}, "leaves the emulator's domain"),
        ({"a": {"kind": "gaussian", "mu": 7, "sigma": 1}}, "outside the emulator's domain"),
        ({"a": {"kind": "fixed", "value": 9}}, "outside the emulator's domain"),
        ({"aa": {"kind": "fixed", "value": 0}}, "did you mean 'a'"),
        ({"a": {"kind": "lognormal"}}, "not one of"),
    ],
)
def test_bad_priors_refused(priors, fragment):
    with pytest.raises(ValueError, match=fragment):
        resolve_priors(["a", "b"], [[-5, 5], [-6, 4]], priors)


def test_step_cap_warns():
    post = Posterior(gauss_loglike, resolve_priors(["a", "b"], [[-5, 5], [-6, 4]]))
    with pytest.warns(ConvergenceWarning, match="step cap"):
        res = sample_posterior(post, seed=1, max_steps=100, check_every=50)
    assert not res.converged


def test_resume_from_hdf5(tmp_path):
    """An interrupted fit resumes: the second call continues the same chain file."""
    post = Posterior(gauss_loglike, resolve_priors(["a", "b"], [[-5, 5], [-6, 4]]))
    path = tmp_path / "chain.h5"
    with pytest.warns(ConvergenceWarning):
        first = sample_posterior(post, seed=2, max_steps=300, check_every=100, backend_path=path)
    second = sample_posterior(post, seed=2, max_steps=6000, backend_path=path)
    assert first.n_steps == 300
    assert second.resumed_from == 300 and second.n_steps > 300 and second.converged
    with pytest.raises(ValueError, match="walkers"):
        sample_posterior(post, seed=2, nwalkers=40, max_steps=400, backend_path=path)


def test_reproducible():
    post = Posterior(gauss_loglike, resolve_priors(["a", "b"], [[-5, 5], [-6, 4]]))
    with pytest.warns(ConvergenceWarning):
        a = sample_posterior(post, seed=11, max_steps=200, check_every=100)
    with pytest.warns(ConvergenceWarning):
        b = sample_posterior(post, seed=11, max_steps=200, check_every=100)
    np.testing.assert_array_equal(a.samples, b.samples)


def test_prior_dataclass_validation():
    with pytest.raises(ValueError, match="positive sigma"):
        Prior("a", "gaussian", mu=0.0, sigma=-1.0)


def test_start_from_a_previous_ensemble():
    """A refit's start: walkers already spread over the posterior (draws from the analytic
    Gaussian, a few put outside the support) give the analytic mean without a maximisation,
    and an ensemble of the wrong shape is refused."""
    post = Posterior(gauss_loglike, resolve_priors(["a", "b"], [[-5, 5], [-6, 4]]))
    rng = np.random.default_rng(7)
    walkers = rng.multivariate_normal(MEAN, COV, 32)
    walkers[:2] = [9.0, 9.0]  # outside the prior: re-drawn near the ensemble's median
    res = sample_posterior(post, seed=5, max_steps=6000, walkers=walkers)
    assert res.converged
    n_eff = res.n_walkers * (res.n_steps - res.burn_in) / np.max(res.tau)
    assert np.all(np.abs(res.samples.mean(0) - MEAN) < 5 * np.sqrt(np.diag(COV) / n_eff))
    assert np.all(np.isfinite(post(res.samples)))
    with pytest.raises(ValueError, match="walkers: expected shape"):
        sample_posterior(post, seed=5, max_steps=100, walkers=walkers[:10])


# ------------------------------------------------------------------ importance reweighting ----
def test_importance_weights_give_the_analytic_posterior():
    """Samples of N(0, 1) reweighted by one more Gaussian datum, N(x; 0.3, 2²): the product is
    the Gaussian with precision 1 + 1/4 and mean 0.3/4 / 1.25 (conjugate normal update). Mean,
    standard deviation and the 16/84% quantiles agree within Monte Carlo error."""
    from scipy.stats import norm

    from swerve.sampling import credible_summary, importance_weights

    rng = np.random.default_rng(3)
    x = rng.standard_normal(20000)
    iw = importance_weights(norm.logpdf(0.3, loc=x, scale=2.0))
    prec = 1.0 + 0.25
    mean, sd = 0.3 / 4.0 / prec, 1.0 / np.sqrt(prec)
    s = credible_summary(x[:, None], ["a"], iw.weights)["a"]
    assert iw.reliable and iw.pareto_k < 0.5 and iw.ess > 0.9 * iw.n
    tol = 4 * sd / np.sqrt(iw.ess)
    assert abs(s["mean"] - mean) < tol
    assert abs(s["std"] - sd) < tol
    np.testing.assert_allclose(s["ci68"], norm.ppf([0.16, 0.84], mean, sd), atol=2 * tol)


def test_importance_weights_refuse_a_distant_target():
    """A new datum far out in the samples' tail, N(x; 4, 0.3²): a few samples carry all the
    weight, the diagnostics say so."""
    from scipy.stats import norm

    from swerve.sampling import importance_weights

    x = np.random.default_rng(4).standard_normal(20000)
    iw = importance_weights(norm.logpdf(4.0, loc=x, scale=0.3))
    assert not iw.reliable
    assert iw.ess < 0.05 * iw.n


@pytest.mark.parametrize("k", [0.2, 0.9])
def test_pareto_k_recovers_the_tail_shape(k):
    """Weights drawn from a generalised Pareto distribution of shape k (scipy): the fitted
    shape of their upper tail is k within the estimator's spread (~0.1 for 424 tail points)."""
    from scipy.stats import genpareto

    from swerve.sampling import pareto_k

    w = genpareto(c=k).rvs(20000, random_state=np.random.default_rng(5))
    assert abs(pareto_k(np.log(w)) - k) < 0.25


# --------------------------------------------------------------------- posterior sanity warnings
def _priors():
    return resolve_priors(["a", "f_hvs"], [[0.0, 1.0], [0.0, 1.0]])


def test_warning_for_mass_piled_against_a_bound():
    """More than 20% of the mass within 2% of the range from a bound is reported, naming the
    parameter and the side; a posterior in the middle is not; the mixture's fraction at its
    physical bound 1 (a clean catalog) is not."""
    from swerve.sampling import posterior_warnings

    rng = np.random.default_rng(0)
    mid = np.column_stack([rng.normal(0.5, 0.1, 4000), rng.normal(0.5, 0.1, 4000)])
    assert posterior_warnings(mid, ["a", "f_hvs"], _priors()) == []
    piled = np.column_stack([np.abs(rng.normal(0.0, 0.02, 4000)), 1.0 - np.abs(rng.normal(0.0, 0.01, 4000))])
    w = posterior_warnings(piled, ["a", "f_hvs"], _priors())
    assert len(w) == 1 and w[0].startswith("a: ") and "lower bound 0" in w[0]


def test_warning_for_several_modes():
    """A 60/40 mixture of two unit Gaussians 6 sd apart has two modes; a Gaussian, a skewed gamma
    and a uniform have one (the generating densities are known)."""
    from swerve.sampling import _modes, posterior_warnings

    rng = np.random.default_rng(1)
    two = np.concatenate([rng.normal(0, 1, 3000), rng.normal(6, 1, 2000)])
    assert _modes(two) == 2
    for one in (rng.normal(size=5000), rng.gamma(2.0, size=5000), rng.uniform(size=5000)):
        assert _modes(one) == 1
    x = np.column_stack([(two + 4) / 14, rng.uniform(0.3, 0.7, 5000)])
    w = posterior_warnings(x, ["a", "f_hvs"], _priors())
    assert len(w) == 1 and "2 separated modes" in w[0]


def test_warnings_for_kappa_and_catalog_size():
    from swerve.sampling import CALIBRATED_STARS, KAPPA_EXTREME, posterior_warnings

    x = np.random.default_rng(2).uniform(0.3, 0.7, (2000, 2))
    assert posterior_warnings(x, ["a", "f_hvs"], _priors(), kappa=[0.1, 1.9], n_stars=CALIBRATED_STARS) == []
    w = posterior_warnings(x, ["a", "f_hvs"], _priors(), kappa=[1.5, KAPPA_EXTREME + 1], n_stars=300)
    assert len(w) == 2 and "5.00" in w[0] and "300 stars" in w[1]


def test_warnings_for_a_catalog_made_with_another_model():
    """The demo catalog is made on the default emulator's model (examples/make_demo.py): no
    warning; the same meta with another disk scale length, launch-speed range and a velocity cut
    gives one warning each, naming the value; a narrower spatial cut (r_max) gives none."""
    import copy

    from astropy.table import Table

    from swerve.emulate import load
    from swerve.sampling import posterior_warnings

    emu = load("emulators/default")
    meta = dict(Table.read("examples/demo.ecsv").meta)
    pri = resolve_priors(emu.parameter_names, emu.bounds)
    lo, hi = np.asarray(emu.bounds).T
    x = lo + (hi - lo) * np.random.default_rng(3).uniform(0.3, 0.7, (2000, len(lo)))
    assert posterior_warnings(x, emu.parameter_names, pri, catalog_meta=meta, emulator_meta=emu.metadata) == []
    other = copy.deepcopy(meta)
    other["galaxy"]["components"][2]["params"]["a_disk"] = 2.75
    other["launch"]["v_min"] = 800.0
    other["selection"]["v_min"] = 275.0
    other["selection"]["r_max"] = 60.0
    w = posterior_warnings(x, emu.parameter_names, pri, catalog_meta=other, emulator_meta=emu.metadata)
    assert len(w) == 3
    assert "another Galaxy" in w[0] and "a_disk = 2.75" in w[0]
    assert "another launch model" in w[1] and "v_min = 800.0" in w[1]
    assert "another velocity selection" in w[2] and "v_min = 275.0" in w[2]


class _RecordingBar:
    """A tqdm subclass (made in the test, so tqdm is imported lazily) recording every total
    assigned to it, writing to a string instead of stderr."""

    @staticmethod
    def make():
        import io

        from tqdm import tqdm

        class Recording(tqdm):
            made = []

            def __init__(self, *args, **kwargs):
                self.totals = []
                self.descs = []
                Recording.made.append(self)
                super().__init__(*args, file=io.StringIO(), mininterval=0, **kwargs)

            @property
            def total(self):
                return self.__dict__.get("_total")

            @total.setter
            def total(self, value):
                self.__dict__["_total"] = value
                self.totals.append(value)

            def set_description(self, desc=None, refresh=True):
                self.descs.append(desc)
                super().set_description(desc, refresh=refresh)

        return Recording


def test_progress_total_follows_the_autocorrelation_estimate(tmp_path):
    """The bar's total is the step cap until τ is measured, then at every check n_tau x τ_max
    (τ recomputed here with emcee.autocorr.integrated_time on the same chain, read back from
    its HDF5 file) rounded up to the next check; when the chain converges early the final total
    is the steps actually run. The convergence rule itself, checked against emcee's τ: the
    chain stops at the first check where it is longer than n_tau τ and τ moved by less than
    tau_rtol since the last check."""
    import emcee

    from swerve.sampling import estimated_steps

    post = Posterior(gauss_loglike, resolve_priors(["a", "b"], [[-5, 5], [-6, 4]]))
    Bar = _RecordingBar.make()
    check, n_tau, rtol, cap = 50, 30.0, 0.1, 20000
    res = sample_posterior(post, seed=4, max_steps=cap, check_every=check, n_tau=n_tau, tau_rtol=rtol,
                           backend_path=tmp_path / "chain.h5", progress=Bar)
    bar = Bar.made[-1]
    assert res.converged and res.n_steps < cap
    assert bar.totals[0] == cap  # no estimate before the first check
    assert bar.totals[-1] == res.n_steps == bar.n  # ends full, at the steps run
    chain = emcee.backends.HDFBackend(str(tmp_path / "chain.h5"), read_only=True).get_chain()
    assert chain.shape[0] == res.n_steps
    checks = list(range(check, res.n_steps + 1, check))
    assert len(checks) >= 4  # several estimates to compare (6 checks with this seed)
    taus = [emcee.autocorr.integrated_time(chain[:it], c=5, tol=0) for it in checks]
    # the rule: not met at any earlier check, met at the last
    prev = np.full(2, np.inf)
    for it, tau in zip(checks, taus):
        met = bool(np.all(n_tau * tau < it) and np.all(np.abs(prev - tau) < rtol * tau))
        assert met == (it == res.n_steps), it
        prev = tau
    # the estimates: one per check before the last, each n_tau τ_max rounded up to a check
    estimates = bar.totals[1:-1]
    assert len(estimates) == len(checks) - 1 and len(bar.descs) == len(estimates)
    for it, tau, total in zip(checks[:-1], taus[:-1], estimates):
        need = n_tau * np.max(tau)
        assert total == min(cap, max(it + check, check * np.ceil(need / check))), it
        assert need <= total < need + check or total == it + check
        assert total == estimated_steps(tau, it, check, cap, n_tau)
    assert f"{n_tau:g} x tau_max" in bar.descs[-1]
    # the last estimate before stopping was within one check of the length run
    assert abs(estimates[-1] - res.n_steps) <= check
    assert estimated_steps([np.nan, 3.0], 100, 50, 1000, 50.0) is None


def test_progress_total_at_the_step_cap():
    """A run stopped by its cap ends with the cap as total (the estimate never exceeds it)."""
    post = Posterior(gauss_loglike, resolve_priors(["a", "b"], [[-5, 5], [-6, 4]]))
    Bar = _RecordingBar.make()
    with pytest.warns(ConvergenceWarning):
        res = sample_posterior(post, seed=1, max_steps=300, check_every=100, progress=Bar)
    bar = Bar.made[-1]
    assert res.n_steps == 300 and bar.n == 300
    assert bar.totals[0] == 300 and bar.totals[-1] == 300 and max(bar.totals) == 300
