"""The likelihood: exact error propagation (against astropy) and the analytic Gaussian case."""

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import ICRS, Galactocentric, SkyCoord
from astropy.table import Table

from swerve.catalog import catalog_from_table
from swerve.frames import galacto_to_helio
from swerve.likelihood import DEFAULT_VELOCITY_FLOOR, Likelihood, prepare_stars, velocity_moments
from swerve.measurement import draw_samples
from swerve.summaries import SummarySpec, folded_components

SPEC1 = SummarySpec(r_edges=(10.0, 250.0), lat_edges=(0.0, 90.0))
SIG = np.array([100.0, 5.0, 4.0])  # intrinsic sd of (v_r, v_tf, v_pf)


class ToyEmulator:
    """An emulator with an analytic answer: mean_vtf = a, all else fixed, one cell."""

    parameter_names = ["a"]
    bounds = np.array([[-50.0, 50.0]])

    def __init__(self, emu_sd=0.0):
        self.emu_sd = emu_sd

    def predict(self, theta, return_std=False, return_cov=False):
        theta = np.atleast_2d(theta)
        y = np.zeros((len(theta), 9))
        y[:, 0] = 500.0
        y[:, 1] = theta[:, 0]
        y[:, 3:6] = np.log(SIG)
        if return_std:
            return y, np.full_like(y, self.emu_sd)
        if return_cov:  # an error of the cell means only, the same at every theta
            cov = np.zeros((len(y), 9, 9))
            cov[:, [0, 1, 2], [0, 1, 2]] = self.emu_sd**2
            return y, cov
        return y


def _catalog(rng, n=40, pm_err=0.02, vlos_err=5.0, a_true=3.0, dist_err_frac=1e-11, rho=0.3):
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    r = rng.uniform(20, 80, n)
    pos = d * r[:, None]
    uvec = np.column_stack([rng.normal(500, SIG[0], n), rng.normal(a_true, SIG[1], n), rng.normal(0, SIG[2], n)])
    x, y, z = pos.T
    R = np.hypot(x, y)
    er = pos / r[:, None]
    eth = np.stack([z * x / (R * r), z * y / (R * r), -R / r], 1) * np.where(z >= 0, 1, -1)[:, None]
    eph = np.stack([-y / R, x / R, 0 * x], 1) * np.where(x * y >= 0, 1, -1)[:, None]
    vel = uvec[:, [0]] * er + uvec[:, [1]] * eth + uvec[:, [2]] * eph
    h = galacto_to_helio(pos, vel)
    cov = np.array([[1.0, rho], [rho, 1.0]]) * pm_err**2
    pm = np.column_stack([h["pmra"], h["pmdec"]]) + rng.multivariate_normal([0, 0], cov, n)
    t = Table()
    t["id"] = [f"s{i}" for i in range(n)]
    t["ra"], t["dec"] = h["ra"] * u.deg, h["dec"] * u.deg
    t["distance"] = h["distance"] * u.kpc
    t["distance_err"] = dist_err_frac * h["distance"] * u.kpc
    t["pmra"], t["pmdec"] = pm[:, 0] * u.mas / u.yr, pm[:, 1] * u.mas / u.yr
    t["pmra_err"] = np.full(n, pm_err) * u.mas / u.yr
    t["pmdec_err"] = np.full(n, pm_err) * u.mas / u.yr
    t["corr_pmra_pmdec"] = np.full(n, rho)
    t["vlos"] = (h["vlos"] + rng.normal(0, vlos_err, n)) * u.km / u.s
    t["vlos_err"] = np.full(n, vlos_err) * u.km / u.s
    return catalog_from_table(t, source="toy"), pos


def test_velocity_moments_agree_with_astropy_monte_carlo(rng):
    """Mean and covariance of the galactocentric velocity at fixed distance equal those of
    astropy transforms of Monte Carlo draws of (pmra, pmdec, vlos) with the same errors."""
    cat, _ = _catalog(rng, n=3, pm_err=0.05, vlos_err=10.0)
    smp = draw_samples(cat, 2, rng)
    mean, cov = velocity_moments(cat, smp)
    m = 40000
    for i in range(cat.n):
        c = np.array([[1.0, 0.3], [0.3, 1.0]]) * 0.05**2
        pm = rng.multivariate_normal([cat.pmra[i], cat.pmdec[i]], c, m)
        vl = rng.normal(cat.vlos[i], 10.0, m)
        sc = SkyCoord(ra=np.full(m, cat.ra[i]) * u.deg, dec=np.full(m, cat.dec[i]) * u.deg,
                      distance=np.full(m, smp.distance[i, 0]) * u.kpc, pm_ra_cosdec=pm[:, 0] * u.mas / u.yr,
                      pm_dec=pm[:, 1] * u.mas / u.yr, radial_velocity=vl * u.km / u.s, frame=ICRS())
        v = sc.transform_to(Galactocentric()).velocity.d_xyz.to_value(u.km / u.s).T
        emp_cov = np.cov(v.T)
        se_mean = np.sqrt(np.diag(emp_cov) / m)
        assert np.all(np.abs(v.mean(0) - mean[i, 0]) < 5 * se_mean)
        np.testing.assert_allclose(cov[i, 0], emp_cov, rtol=0.05, atol=0.05 * np.max(np.diag(emp_cov)))


def _analytic_posterior(terms):
    """Flat prior on a; the likelihood is Gaussian in a: GLS mean and precision."""
    e = np.array([0.0, 1.0, 0.0])
    mu0 = np.array([500.0, 0.0, 0.0])
    prec, b = 0.0, 0.0
    for i in range(terms.n):
        S = np.diag(SIG**2 + DEFAULT_VELOCITY_FLOOR**2) + terms.cov[i, 0]
        Si = np.linalg.inv(S)
        prec += e @ Si @ e
        b += e @ Si @ (terms.mean[i, 0] - mu0)
    return b / prec, 1.0 / np.sqrt(prec)


def test_likelihood_is_the_analytic_gaussian(rng):
    """With fixed positions and a Gaussian emulator, log L(a) is the exact Gaussian of the
    generalised-least-squares solution: its curvature and maximum agree to 1e-6."""
    cat, _ = _catalog(rng)
    smp = draw_samples(cat, 4, rng)
    terms = prepare_stars(cat, smp, SPEC1)
    like = Likelihood(ToyEmulator(), terms, SPEC1)
    a_hat, a_sd = _analytic_posterior(terms)
    grid = np.linspace(a_hat - 3 * a_sd, a_hat + 3 * a_sd, 7)[:, None]
    ll = like(grid)
    expected = -0.5 * ((grid[:, 0] - a_hat) / a_sd) ** 2
    np.testing.assert_allclose(ll - ll[3], expected - expected[3], atol=1e-6)


def test_velocity_floor_adds_in_quadrature(rng):
    """The floor is the model's resolution: floor² on the diagonal of every cell covariance."""
    cat, _ = _catalog(rng, n=5)
    terms = prepare_stars(cat, draw_samples(cat, 2, rng), SPEC1)
    th = np.array([[1.0]])
    _, bare = Likelihood(ToyEmulator(), terms, SPEC1, velocity_floor=0.0).cell_gaussians(th)
    _, floored = Likelihood(ToyEmulator(), terms, SPEC1, velocity_floor=2.5).cell_gaussians(th)
    np.testing.assert_allclose(bare[0, 0], np.diag(SIG**2), rtol=1e-12)
    np.testing.assert_allclose(floored[0, 0] - bare[0, 0], 6.25 * np.eye(3), rtol=1e-12)
    with pytest.raises(ValueError, match="velocity_floor"):
        Likelihood(ToyEmulator(), terms, SPEC1, velocity_floor=-1.0)


@pytest.mark.parametrize("mode", ["catalog", "per-star"])
def test_emulator_variance_widens_the_likelihood(rng, mode):
    cat, _ = _catalog(rng)
    terms = prepare_stars(cat, draw_samples(cat, 4, rng), SPEC1)
    a = np.array([[0.0], [6.0]])
    d0 = np.diff(Likelihood(ToyEmulator(0.0), terms, SPEC1, emulator_error=mode)(a))[0]
    d1 = np.diff(Likelihood(ToyEmulator(3.0), terms, SPEC1, emulator_error=mode)(a))[0]
    assert abs(d1) < abs(d0)


def test_catalog_level_error_needs_a_predictive_covariance(rng):
    class NoCov(ToyEmulator):
        def predict(self, theta, return_std=False):
            return ToyEmulator.predict(self, theta, return_std)

    cat, _ = _catalog(rng, n=5)
    terms = prepare_stars(cat, draw_samples(cat, 2, rng), SPEC1)
    with pytest.raises(ValueError, match="predictive covariance"):
        Likelihood(NoCov(1.0), terms, SPEC1)(np.array([[1.0], [2.0]]))
    assert np.all(np.isfinite(Likelihood(NoCov(1.0), terms, SPEC1, emulator_error="per-star")(np.array([[1.0]]))))


def test_catalog_level_emulator_error_is_the_exact_joint_gaussian(rng):
    """Stars with Gaussian errors at fixed positions and an emulator whose cell mean carries one
    Gaussian error shared by all stars: the stars are jointly Gaussian with covariance
    blockdiag(S_i) + 1 1ᵀ ⊗ E (a textbook result for a shared random offset), so log L(a) is
    known in closed form. The catalog-level marginalisation reproduces it to 1e-6; folding the
    error into every star separately ("per-star") does not (it lets the error average down)."""
    cat, _ = _catalog(rng, n=60)
    terms = prepare_stars(cat, draw_samples(cat, 4, rng), SPEC1)
    e = 1.5
    grid = np.linspace(-3.0, 9.0, 21)[:, None]  # 21 walkers: one block of 16 and 5 singly (both kernels)
    n = terms.n
    S = np.zeros((3 * n, 3 * n))
    for i in range(n):
        S[3 * i:3 * i + 3, 3 * i:3 * i + 3] = np.diag(SIG**2 + DEFAULT_VELOCITY_FLOOR**2) + terms.cov[i, 0]
    C = S + np.kron(np.ones((n, n)), np.eye(3) * e**2)
    _, logdet = np.linalg.slogdet(C)
    exact = []
    for a in grid[:, 0]:
        r = terms.mean[:, 0].ravel() - np.tile([500.0, a, 0.0], n)
        exact.append(-0.5 * r @ np.linalg.solve(C, r) - 0.5 * logdet - 1.5 * n * np.log(2 * np.pi))
    exact = np.array(exact)
    cat_ll = Likelihood(ToyEmulator(e), terms, SPEC1, emulator_error="catalog")(grid)
    np.testing.assert_allclose(cat_ll, exact, atol=1e-6)
    star_ll = Likelihood(ToyEmulator(e), terms, SPEC1, emulator_error="per-star")(grid)
    assert np.max(np.abs((star_ll - star_ll[10]) - (exact - exact[10]))) > 1.0


class ToyWidthEmulator(ToyEmulator):
    """:class:`ToyEmulator` whose cell dispersions also grow with ``a`` (``sd × e^{0.002 a}``: 20%
    over the range, as a real emulator's might), so that each star's Fisher information in the
    cell means depends on θ."""

    def predict(self, theta, return_std=False, return_cov=False):
        out = ToyEmulator.predict(self, theta, return_std, return_cov)
        y = out[0] if isinstance(out, tuple) else out
        y[:, 3:6] += 0.002 * np.atleast_2d(theta)[:, [0]]
        return out


def test_fisher_information_at_the_walkers_mean(rng):
    """The "ensemble" shortcut of the catalog-level emulator term takes the Fisher information at
    the walkers' mean: exact (the per-walker computation, to round-off) for a single θ and for
    walkers that coincide, recomputed once the mean has moved by more than ``fisher_refresh`` of
    the training range (a cache that never refreshes gives a different answer, so the check can
    fail), and close to exact, not equal, for walkers spread like a posterior."""
    cat, _ = _catalog(rng, n=40)
    terms = prepare_stars(cat, draw_samples(cat, 4, rng), SPEC1)
    emu = ToyWidthEmulator(1.5)
    exact = Likelihood(emu, terms, SPEC1, emulator_variance="per-walker")
    fast = Likelihood(emu, terms, SPEC1)
    stale = Likelihood(emu, terms, SPEC1, fisher_refresh=2.0)
    at = lambda a, w=16: np.full((w, 1), a)  # noqa: E731  walkers that coincide
    for like in (fast, stale):
        np.testing.assert_allclose(like(at(0.0)), exact(at(0.0)), rtol=0, atol=1e-9)
        np.testing.assert_allclose(like(np.array([3.0])), exact(np.array([3.0])), rtol=0, atol=1e-9)
    # 10 units = 10% of the range, past the 2% refresh; the stale cache still holds a = 0
    np.testing.assert_allclose(fast(at(10.0)), exact(at(10.0)), rtol=0, atol=1e-9)
    assert np.max(np.abs(stale(at(10.0)) - exact(at(10.0)))) > 1e-4
    spread = 3.0 + rng.normal(0.0, 1.0, size=(21, 1))  # one block of 16 and 5 single walkers
    d = fast(spread) - exact(spread)
    assert 0 < np.max(np.abs(d)) < 0.05  # log L; a posterior moves with changes of order 1


def test_kernels_without_the_fisher_sums(rng):
    """Skipping the Fisher sums (the ensemble shortcut) leaves the log-likelihoods and the gradient
    as they were, in the vectorised walker blocks and in the single-walker kernel alike."""
    from swerve.likelihood_kernels import _run_kernels

    cat, _ = _catalog(rng, n=30)
    terms = prepare_stars(cat, draw_samples(cat, 4, rng), SPEC1)
    like = Likelihood(ToyWidthEmulator(1.0), terms, SPEC1)
    th = rng.uniform(-10.0, 10.0, size=(21, 1))
    mu, sig, dens = like._cell_model(th)
    tri = np.ascontiguousarray(np.stack([sig[..., 0, 0], sig[..., 1, 0], sig[..., 1, 1], sig[..., 2, 0],
                                         sig[..., 2, 1], sig[..., 2, 2]], -1))
    out1, grad1, fisher1 = _run_kernels(like._packed, mu, tri, True, dens, want_fisher=True)
    out0, grad0, fisher0 = _run_kernels(like._packed, mu, tri, True, dens, want_fisher=False)
    np.testing.assert_allclose(out0, out1, rtol=1e-13, atol=0)
    np.testing.assert_allclose(grad0, grad1, rtol=1e-12, atol=1e-15 * np.abs(grad1).max())
    assert np.all(fisher0 == 0.0) and np.all(fisher1[..., [0, 2, 5]] > 0)


def test_per_star_sums_and_refit_reuses_terms(rng):
    cat, _ = _catalog(rng, n=30)
    terms = prepare_stars(cat, draw_samples(cat, 8, rng), SPEC1)
    like = Likelihood(ToyEmulator(), terms, SPEC1)
    th = np.array([[1.0], [4.0]])
    np.testing.assert_allclose(like.per_star(th).sum(axis=1), like(th))
    a, b = terms.subset(np.arange(20)), terms.subset(np.arange(20, 30))
    both = Likelihood(ToyEmulator(), a.concat(b), SPEC1)
    np.testing.assert_allclose(both(th), like(th), rtol=1e-12)
    with pytest.raises(ValueError, match="already in the fit"):
        a.concat(a)


def test_stars_outside_selection_are_reported(rng):
    cat, pos = _catalog(rng, n=20)
    spec = SummarySpec(r_edges=(30.0, 250.0), lat_edges=(0.0, 90.0))
    terms = prepare_stars(cat, draw_samples(cat, 4, rng), spec)
    r = np.linalg.norm(pos, axis=1)
    assert terms.n == int(np.sum(r >= 30))
    assert len(terms.excluded) == int(np.sum(r < 30))
    assert all("inside the emulator's cells" in e["reason"] for e in terms.excluded)
    with pytest.raises(ValueError, match="no star is usable"):
        prepare_stars(cat, draw_samples(cat, 4, rng), SummarySpec(r_edges=(200.0, 250.0), lat_edges=(0.0, 90.0)))


def test_folding_basis_matches_summaries(rng):
    """The likelihood's velocity components are exactly those the summaries are computed from."""
    from swerve.likelihood import _folding_basis

    pos = rng.normal(size=(100, 3)) * 30
    vel = rng.normal(size=(100, 3)) * 300
    np.testing.assert_allclose(np.einsum("nij,nj->ni", _folding_basis(pos), vel), folded_components(pos, vel),
                               atol=1e-9)



def _brute_force(terms, emu, a):
    """Direct evaluation with scipy: log sum_k w_k N(m_k; mu, Sigma + C_k)."""
    from scipy.special import logsumexp
    from scipy.stats import multivariate_normal

    mu = np.array([500.0, a, 0.0])
    out = []
    for i in range(terms.n):
        v = [terms.log_w[i, k] + multivariate_normal(mu, np.diag(SIG**2 + DEFAULT_VELOCITY_FLOOR**2) + terms.cov[i, k]).logpdf(terms.mean[i, k])
             for k in range(terms.cell.shape[1]) if terms.cell[i, k] >= 0]
        out.append(logsumexp(v))
    return np.array(out)


@pytest.mark.parametrize("a", [2.0, 400.0])
def test_kernel_equals_scipy_including_far_tails(rng, a):
    """The compiled kernel equals scipy's multivariate normal, also where the linear-space sum
    underflows (a = 400 puts every star ~80 sigma from the model: the log-space path)."""
    cat, _ = _catalog(rng, n=12, pm_err=0.001, vlos_err=0.5)
    terms = prepare_stars(cat, draw_samples(cat, 3, rng), SPEC1)
    like = Likelihood(ToyEmulator(), terms, SPEC1)
    got = like.per_star(np.array([[a]]))[0]
    np.testing.assert_allclose(got, _brute_force(terms, ToyEmulator(), a), rtol=1e-9)
    assert np.all(np.isfinite(got))


def test_walker_blocks_equal_scipy(rng):
    """Ensembles of 16 walkers and more go through the kernel vectorised over walkers
    (``_loglike_blocks``), the rest one by one: 19 walkers, some far in the tails, against scipy."""
    cat, _ = _catalog(rng, n=8, pm_err=0.001, vlos_err=0.5)
    terms = prepare_stars(cat, draw_samples(cat, 3, rng), SPEC1)
    like = Likelihood(ToyEmulator(), terms, SPEC1)
    a = np.concatenate([np.linspace(-20.0, 20.0, 16), [300.0, 0.5, -450.0]])
    got = like.per_star(a[:, None])
    for row, ai in zip(got, a):
        np.testing.assert_allclose(row, _brute_force(terms, ToyEmulator(), ai), rtol=1e-9)


def test_batched_cholesky_term_matches_numpy(rng):
    """The catalog-level emulator term's compiled ½ cᵀ B⁻¹ c − ½ log det B equals numpy's
    (numpy.linalg.solve and slogdet), and a matrix that is not positive definite gives NaN."""
    from swerve.likelihood import _half_quad_minus_logdet

    W, n = 7, 45
    A = rng.normal(size=(W, n, n))
    B = A @ np.swapaxes(A, 1, 2) / n + np.eye(n)
    c = rng.normal(size=(W, n))
    ref = 0.5 * np.einsum("wi,wi->w", c, np.linalg.solve(B, c[..., None])[..., 0]) - 0.5 * np.linalg.slogdet(B)[1]
    np.testing.assert_allclose(_half_quad_minus_logdet(B, c), ref, rtol=1e-12, atol=1e-12)
    bad = B.copy()
    bad[3] = -np.eye(n)
    out = _half_quad_minus_logdet(bad, c)
    assert np.isnan(out[3]) and np.all(np.isfinite(np.delete(out, 3)))


def test_compiled_cell_gaussians_match_the_summaries_definition(rng):
    """The likelihood's one-pass conversion of emulated statistics to cell means and covariance
    triangles equals ``swerve.summaries.stats_to_gaussian`` (the definition the emulator was
    trained on) plus the velocity floor."""
    from swerve.likelihood_kernels import _cell_gaussians_tri
    from swerve.summaries import stats_to_gaussian

    nc = 7
    y = rng.normal(size=(5, 9 * nc)) * np.tile([300.0, 5.0, 3.0, 1.0, 1.0, 1.0, 20.0, 10.0, 5.0], nc)
    mu, tri = _cell_gaussians_tri(y, nc, 1.5**2)
    m_ref, s_ref = stats_to_gaussian(y, nc)
    s_ref = s_ref + 1.5**2 * np.eye(3)
    np.testing.assert_allclose(mu, m_ref, rtol=0, atol=0)
    rows, cols = [0, 1, 1, 2, 2, 2], [0, 0, 1, 0, 1, 2]
    np.testing.assert_allclose(tri, s_ref[..., rows, cols], rtol=1e-13, atol=1e-12)


def test_fast_exp_matches_numpy():
    """The kernel's vectorisable exp against numpy's, over the whole range the kernel uses."""
    import numba as nb

    from swerve.fastmath import FAST_EXP_MIN, fast_exp

    @nb.njit
    def apply(x):
        out = np.empty_like(x)
        for i in range(x.size):
            out[i] = fast_exp(x[i])
        return out

    x = np.concatenate([-np.geomspace(1e-300, 700.0, 200_001), [0.0], np.linspace(-707.9, -700, 1001)])
    np.testing.assert_allclose(apply(x), np.exp(x), rtol=1e-13, atol=0)
    below = np.array([FAST_EXP_MIN - 1e-9, -745.0, -1e5, -np.inf])
    assert np.all(apply(below) == 0.0)


def test_wide_vector_attribute_reaches_the_compiled_code():
    """``prefer_512`` sets LLVM's ``"prefer-vector-width"="512"`` attribute on the compiled
    function it is called in, and changes no result: the same loop with and without it, inside
    a ``prange`` body shaped like the kernels' (a task loop around an inner loop), agrees to the
    last bit with numpy's ``exp``. Which vector width LLVM then picks is the CPU's tuning (256 or
    512 bits, by model), not something a test may assert: ``python
    benchmarks/vector_width.py`` reports it for the machine at hand."""
    import numba as nb

    from swerve.fastmath import fast_exp, prefer_512

    def wide(x, out):
        for t in nb.prange(4):
            prefer_512()
            for i in range(t * 256, (t + 1) * 256):
                out[i] = fast_exp(-x[i]) * x[i]

    def plain(x, out):
        for t in nb.prange(4):
            for i in range(t * 256, (t + 1) * 256):
                out[i] = fast_exp(-x[i]) * x[i]

    def serial(x, out):
        prefer_512()
        for i in range(x.size):
            out[i] = fast_exp(-x[i]) * x[i]

    fw = nb.njit(parallel=True, fastmath=True)(wide)  # not cached: the code can be inspected
    fp = nb.njit(parallel=True, fastmath=True)(plain)
    fs = nb.njit(fastmath=True)(serial)
    x = np.linspace(0.0, 50.0, 1024)
    a, b, c = np.empty_like(x), np.empty_like(x), np.empty_like(x)
    fw(x, a)
    fp(x, b)
    fs(x, c)
    np.testing.assert_allclose(a, x * np.exp(-x), rtol=1e-13, atol=0)
    np.testing.assert_allclose(a, b, rtol=1e-15, atol=0)
    np.testing.assert_allclose(c, a, rtol=1e-15, atol=0)
    # the attribute reaches the function's LLVM IR (a parfor body is a separate library whose IR
    # numba does not expose, hence the serial function)
    ir = "".join(fs.inspect_llvm().values())
    assert '"prefer-vector-width"="512"' in ir


def test_sampled_posterior_matches_analytic(rng):
    """End to end: emcee on the likelihood of a Gaussian toy emulator gives the analytic
    posterior of a (flat prior): mean and standard deviation within Monte Carlo error."""
    from swerve.sampling import Posterior, resolve_priors, sample_posterior

    cat, _ = _catalog(rng, n=40)
    terms = prepare_stars(cat, draw_samples(cat, 1, rng), SPEC1)
    like = Likelihood(ToyEmulator(), terms, SPEC1)
    a_hat, a_sd = _analytic_posterior(terms)
    post = Posterior(like, resolve_priors(["a"], ToyEmulator.bounds))
    res = sample_posterior(post, seed=4, max_steps=8000)
    assert res.converged
    n_eff = res.n_walkers * (res.n_steps - res.burn_in) / res.tau[0]
    assert abs(res.samples[:, 0].mean() - a_hat) < 5 * a_sd / np.sqrt(n_eff)
    assert res.samples[:, 0].std() == pytest.approx(a_sd, rel=0.08)


def test_linear_distance_propagation_matches_brute_force_integration(rng):
    """With 10% distance errors and precise velocities, the linearised marginal likelihood
    (mean distance, velocity covariance + g g^T var(d)) equals the brute-force integral over
    distance (importance sampling with 20,000 samples per star) in its dependence on the
    model: log-likelihood differences between two models agree to 15% (12% measured: the
    linearisation of the velocity in distance is an approximation; its effect on calibration is
    measured by swerve validate, benchmarks/RESULTS.md)."""
    from swerve.likelihood import linearised_samples

    cat, _ = _catalog(rng, n=6, pm_err=1e-4, vlos_err=0.5, dist_err_frac=0.1)
    big = draw_samples(cat, 20000, rng)
    # no velocity floor: the check is about the distance propagation alone
    brute = Likelihood(ToyEmulator(), prepare_stars(cat, big, SPEC1, stratum_variance=False), SPEC1,
                       velocity_floor=0.0)
    lin = Likelihood(ToyEmulator(), prepare_stars(cat, linearised_samples(cat, big), SPEC1), SPEC1,
                     velocity_floor=0.0)
    a = np.array([[0.0], [6.0]])
    d_brute = np.diff(brute(a))[0]
    d_lin = np.diff(lin(a))[0]
    assert abs(d_brute) > 1.0  # the check can fail: the two models are distinguishable
    assert d_lin == pytest.approx(d_brute, rel=0.15)


def test_configuration_defaults_match_the_likelihood():
    """swerve fit's and swerve validate's schemas state the likelihood's defaults and modes."""
    from swerve.config import defaults
    from swerve.fit import FIT_SCHEMA
    from swerve.likelihood import EMULATOR_ERROR_MODES
    from swerve.validation import VALIDATE_SCHEMA

    fit, val = defaults(FIT_SCHEMA), defaults(VALIDATE_SCHEMA)
    assert fit["emulator"]["velocity_floor"] == DEFAULT_VELOCITY_FLOOR == val["fit"]["velocity_floor"]
    assert fit["emulator"]["error"] == val["fit"]["emulator_error"] == EMULATOR_ERROR_MODES[0]
    choices = {k.name: k.choices for k in VALIDATE_SCHEMA.section("fit").keys}
    assert tuple(choices["emulator_error"]) == EMULATOR_ERROR_MODES
