"""The v_r histogram: its statistics (against numpy) and the likelihood that uses it as the
density of v_r, with the tangential components Gaussian conditional on v_r (against scipy
quadrature of the exact convolution with each sample's measurement error)."""

from pathlib import Path

import numpy as np
import pytest
from scipy import integrate
from scipy.stats import norm

from swerve.likelihood import (
    DEFAULT_VELOCITY_FLOOR,
    Likelihood,
    StarTerms,
    _run_kernels,
)
from swerve.summaries import (
    N_STAT,
    VR_FRACTION_FLOOR,
    SummarySpec,
    compute_summaries,
    folded_components,
    stats_to_gaussian,
    stats_to_vr_density,
)

ROOT = Path(__file__).resolve().parents[1]
EDGES = tuple(np.arange(0.0, 3201.0, 200.0))
SPEC = SummarySpec(r_edges=(10.0, 250.0), lat_edges=(0.0, 90.0), vr_edges=EDGES)


def _fractions(shape):
    """Bin fractions of a gamma distribution of v_r (scale ``shape``), the last bins nearly empty."""
    from scipy.stats import gamma

    c = gamma(3.0, scale=shape).cdf(np.asarray(EDGES))
    f = np.diff(c)
    return f / f.sum()


class HistToyEmulator:
    """One cell: a Gaussian (v_r, v_tf, v_pf) with v_tf correlated with v_r, and a v_r histogram
    whose shape is the parameter ``s`` (km/s, a gamma scale)."""

    parameter_names = ["s"]
    bounds = np.array([[150.0, 450.0]])

    def predict(self, theta, return_std=False, return_cov=False):
        theta = np.atleast_2d(theta)
        y = np.zeros((len(theta), N_STAT + SPEC.n_vbins))
        y[:, 0] = 3.0 * theta[:, 0]  # the gamma's mean
        y[:, 1] = 4.0
        y[:, 3:6] = np.log([np.sqrt(3.0) * 300.0, 6.0, 5.0])
        y[:, 6] = 3.0  # l_tr: v_tf rises with v_r
        y[:, 7] = -2.0
        y[:, 8] = 1.5
        for i, s in enumerate(theta[:, 0]):
            y[i, N_STAT:] = np.log(_fractions(s) + VR_FRACTION_FLOOR)
        if return_cov:
            cov = np.zeros((len(y), y.shape[1], y.shape[1]))
            cov[:, [0, 1, 2], [0, 1, 2]] = 4.0
            return y, cov
        if return_std:
            return y, np.zeros_like(y)
        return y


def _terms(rng, n=9, k=3, err=(6.0, 15.0, 12.0), vr=None):
    """Synthetic star terms: k samples per star, correlated measurement errors."""
    mean = np.empty((n, k, 3))
    vr = rng.uniform(150.0, 2500.0, n) if vr is None else np.asarray(vr, dtype=float)
    mean[..., 0] = vr[:, None] + rng.normal(0, 30.0, (n, k))
    mean[..., 1] = rng.normal(4.0, 10.0, (n, k))
    mean[..., 2] = rng.normal(0.0, 10.0, (n, k))
    A = rng.normal(size=(n, k, 3, 3)) * 0.3 + np.eye(3)
    D = np.diag(err)
    cov = D @ A @ np.swapaxes(A, -1, -2) @ D
    lw = np.log(rng.dirichlet(np.ones(k), n))
    return StarTerms(np.array([f"s{i}" for i in range(n)]), np.zeros((n, k), np.int64), mean, cov, lw, [])


def _exact_star(terms, i, emu, s, floor=DEFAULT_VELOCITY_FLOOR):
    """log L_i by quadrature: for each sample, ∫ p_r(u_r) N(u_t, u_p | u_r) N(m; u, C) du with
    the tangential integral done analytically after conditioning the *error* on u_r (a
    different route from the kernel's), the radial one by scipy.integrate.quad, bin by bin."""
    y = emu.predict(np.array([[s]]))
    mu, Sig = stats_to_gaussian(y, 1)
    mu, Sig = mu[0, 0], Sig[0, 0] + floor**2 * np.eye(3)
    dens = stats_to_vr_density(y, SPEC)[0, 0]
    b = Sig[1:, 0] / Sig[0, 0]
    Scond = Sig[1:, 1:] - np.outer(Sig[1:, 0], Sig[0, 1:]) / Sig[0, 0]
    tot = 0.0
    for kk in range(terms.cell.shape[1]):
        m, C = terms.mean[i, kk], terms.cov[i, kk]
        kap = C[1:, 0] / C[0, 0]
        V = Scond + C[1:, 1:] - np.outer(C[1:, 0], C[0, 1:]) / C[0, 0]
        Vi, (_, ld) = np.linalg.inv(V), np.linalg.slogdet(V)

        def f(ur):
            r = m[1:] - (mu[1:] + b * (ur - mu[0])) - kap * (m[0] - ur)
            g = np.exp(-0.5 * r @ Vi @ r - 0.5 * ld) / (2 * np.pi)
            return g * norm.pdf(m[0], ur, np.sqrt(C[0, 0]))

        val = 0.0
        for j in range(SPEC.n_vbins):
            lo, hi = EDGES[j], EDGES[j + 1]
            if hi < m[0] - 12 * np.sqrt(C[0, 0]) or lo > m[0] + 12 * np.sqrt(C[0, 0]):
                continue
            val += dens[j] * integrate.quad(f, lo, hi, points=[m[0]] if lo < m[0] < hi else None,
                                            epsabs=0, epsrel=1e-11, limit=200)[0]
        tot += np.exp(terms.log_w[i, kk]) * val
    return np.log(tot)


def test_histogram_statistics_match_numpy(rng):
    """The per-cell v_r histogram of compute_summaries is numpy's weighted histogram."""
    spec = SummarySpec(r_edges=(10.0, 60.0, 250.0), lat_edges=(0.0, 45.0, 90.0), vr_edges=EDGES)
    n = 20000
    d = np.abs(rng.normal(size=(n, 3)))
    d /= np.linalg.norm(d, axis=1)[:, None]
    pos = d * rng.uniform(10.0, 250.0, n)[:, None]
    vel = d * rng.gamma(3.0, 300.0, n).clip(1.0, 3100.0)[:, None] + rng.normal(0, 5.0, (n, 3))
    w = rng.uniform(0.5, 2.0, n)
    res = compute_summaries(spec, pos, vel, w, np.arange(n), rng)
    cell = spec.cell_index(pos)
    vr = folded_components(pos, vel)[:, 0]
    got = np.exp(res.values[spec.n_gauss:].reshape(spec.n_cells, spec.n_vbins)) - VR_FRACTION_FLOOR
    for c in range(spec.n_cells):
        m = cell == c
        h, _ = np.histogram(vr[m], bins=EDGES, weights=w[m])
        np.testing.assert_allclose(got[c], h / w[m].sum(), atol=1e-12)
    assert len(spec.output_names()) == spec.n_outputs == spec.n_cells * (N_STAT + 16)


def test_histogram_refuses_speeds_beyond_its_edges(rng):
    spec = SummarySpec(r_edges=(10.0, 250.0), lat_edges=(0.0, 90.0), vr_edges=(0.0, 500.0, 1000.0))
    n = 2000
    d = np.abs(rng.normal(size=(n, 3)))
    d /= np.linalg.norm(d, axis=1)[:, None]
    pos = d * 50.0
    vel = d * rng.uniform(100.0, 1500.0, n)[:, None]
    with pytest.raises(ValueError, match="extend the last edge"):
        compute_summaries(spec, pos, vel, np.ones(n), np.arange(n), rng)


@pytest.mark.parametrize("s", [200.0, 380.0])
def test_histogram_likelihood_equals_quadrature(rng, s):
    """Every star's log-likelihood against scipy quadrature of the exact model (histogram in v_r,
    Gaussian tangential components conditional on v_r, Gaussian measurement errors correlated
    between the components). The kernel evaluates the conditional Gaussian at the measured v_r,
    exact when the histogram is flat over the v_r error and moment-matched near a bin edge; with
    6 km/s errors in 200 km/s bins and strongly correlated errors the difference measured in
    three draws of these stars was at most 3.2e-3 in log L (1.4e-3 in this one). 20 walkers:
    one block of 16 and 4 alone."""
    terms = _terms(rng)
    emu = HistToyEmulator()
    like = Likelihood(emu, terms, SPEC, emulator_error="none")
    theta = np.full((20, 1), s)
    got = like.per_star(theta)
    ref = np.array([_exact_star(terms, i, emu, s) for i in range(terms.n)])
    np.testing.assert_allclose(got[0], ref, atol=5e-3)
    np.testing.assert_allclose(got[16], got[0], rtol=1e-12)  # the block and the single-walker kernels agree


def test_histogram_likelihood_is_exact_without_radial_error(rng):
    """With no v_r error the model is its definition: the histogram density at the measured v_r
    times the Gaussian of the tangential components at that v_r, ``N(m_⊥; μ_⊥ + b (m_r - μ_r),
    S + C_⊥⊥)`` (scipy's multivariate normal); the kernel equals it to 1e-9."""
    from scipy.special import logsumexp
    from scipy.stats import multivariate_normal

    terms = _terms(rng, n=6)
    terms.cov[..., 0, :] = terms.cov[..., :, 0] = 0.0
    emu = HistToyEmulator()
    like = Likelihood(emu, terms, SPEC, emulator_error="none")
    got = like.per_star(np.array([[300.0]]))[0]
    y = emu.predict(np.array([[300.0]]))
    mu, Sig = stats_to_gaussian(y, 1)
    mu, Sig = mu[0, 0], Sig[0, 0] + DEFAULT_VELOCITY_FLOOR**2 * np.eye(3)
    dens = stats_to_vr_density(y, SPEC)[0, 0]
    b = Sig[1:, 0] / Sig[0, 0]
    S = Sig[1:, 1:] - np.outer(Sig[1:, 0], Sig[0, 1:]) / Sig[0, 0]
    for i in range(terms.n):
        v = []
        for kk in range(terms.cell.shape[1]):
            m, C = terms.mean[i, kk], terms.cov[i, kk]
            j = np.searchsorted(EDGES, m[0], side="right") - 1
            v.append(terms.log_w[i, kk] + np.log(dens[j])
                     + multivariate_normal(mu[1:] + b * (m[0] - mu[0]), S + C[1:, 1:]).logpdf(m[1:]))
        np.testing.assert_allclose(got[i], logsumexp(v), rtol=1e-9)


def test_histogram_gradient_in_the_cell_means(rng):
    """The kernel's gradient of the catalog's log L in the cell means (for the catalog-level
    emulator error) against central finite differences, and its Fisher information against
    Σ_ik r_ik Jᵀ M⁻¹ J computed in numpy (r_ik: each sample's responsibility within its star,
    J = ∂(tangential residual)/∂(cell mean), M the residual's covariance)."""
    terms = _terms(rng, n=7)
    emu = HistToyEmulator()
    like = Likelihood(emu, terms, SPEC)
    mu, sig, dens = like._cell_model(np.array([[260.0]]))
    tri = np.stack([sig[..., 0, 0], sig[..., 1, 0], sig[..., 1, 1], sig[..., 2, 0], sig[..., 2, 1], sig[..., 2, 2]], -1)
    _, grad, fisher = _run_kernels(like._packed, mu, tri, True, dens)
    h = 1e-3
    for a in range(3):
        dm = np.zeros_like(mu)
        dm[0, 0, a] = h
        up = _run_kernels(like._packed, mu + dm, tri, False, dens)[0].sum()
        dn = _run_kernels(like._packed, mu - dm, tri, False, dens)[0].sum()
        np.testing.assert_allclose(grad[0, 0, a], (up - dn) / (2 * h), rtol=1e-6, atol=1e-9)
    P = np.zeros((3, 3))
    for i in range(terms.n):
        per = []
        for kk in range(terms.cell.shape[1]):
            Sg, C, m = sig[0, 0], terms.cov[i, kk], terms.mean[i, kk]
            b = Sg[1:, 0] / Sg[0, 0]
            tau = mu[0, 0, 1:] + b * (m[0] - mu[0, 0, 0])
            J = np.column_stack([b, -np.eye(2)])  # ∂r/∂μ for r = m_⊥ - μ_⊥ - b (m_r - μ_r)
            A = np.column_stack([-b, np.eye(2)])  # the residual's map of the measurement error
            M = Sg[1:, 1:] - np.outer(b, Sg[0, 1:]) + A @ C @ A.T
            sd = np.sqrt(C[0, 0])
            mass = np.diff(norm.cdf(np.asarray(EDGES), m[0], sd))
            x = np.asarray(EDGES) - m[0]
            pe = mass @ dens[0, 0]
            shift = sd**2 * np.diff(-norm.pdf(x, 0, sd)) @ dens[0, 0] / pe
            var = (sd**2 * mass - sd**2 * np.diff(x * norm.pdf(x, 0, sd))) @ dens[0, 0] / pe - shift**2
            e = b - C[1:, 0] / C[0, 0]
            M = M + np.outer(e, e) * (var - C[0, 0])
            r = m[1:] - tau - e * shift
            log_g = -0.5 * r @ np.linalg.solve(M, r) - 0.5 * np.log(np.linalg.det(M))
            per.append((terms.log_w[i, kk] + log_g + np.log(mass @ dens[0, 0]), J.T @ np.linalg.solve(M, J)))
        lv = np.array([p[0] for p in per])
        r = np.exp(lv - lv.max())
        r /= r.sum()
        P += sum(rk * M for rk, (_, M) in zip(r, per))
    np.testing.assert_allclose(fisher[0, 0], P[[0, 1, 1, 2, 2, 2], [0, 0, 1, 0, 1, 2]], rtol=1e-8)


def test_star_beyond_the_histogram_is_reported(rng):
    """A star faster than the histogram's last edge is excluded with its reason, never used."""
    from swerve.likelihood import prepare_stars
    from swerve.measurement import draw_samples
    from test_likelihood import _catalog  # toy catalog with v_r ≈ 500 km/s

    cat, _ = _catalog(rng, n=5)
    spec = SummarySpec(r_edges=(10.0, 250.0), lat_edges=(0.0, 90.0), vr_edges=(0.0, 200.0, 400.0))
    terms = prepare_stars(cat, draw_samples(cat, 3, rng), spec, allow_empty=True)
    assert terms.n == 0 and len(terms.excluded) == 5
    assert all("beyond the emulator's v_r histogram" in e["reason"] for e in terms.excluded)


def test_emulators_of_the_removed_scaled_model_are_refused():
    """An emulator recorded with the removed experimental ``tan_scale`` is refused, not read as
    the unscaled model."""
    with pytest.raises(ValueError, match="tan_scale"):
        SummarySpec.from_dict({**SPEC.to_dict(), "tan_scale": 1000.0, "tan_soft": 300.0})


def test_bad_histogram_configuration_names_the_file(tmp_path):
    """A training configuration with unusable v_r edges is refused in one line naming the file."""
    from swerve.simulate import load_training_config

    text = (ROOT / "training" / "smoke.toml").read_text()
    bad = tmp_path / "bad.toml"
    bad.write_text(text.replace("vr_edges = [0.0, 400.0", "vr_edges = [0.0, 4000.0"))
    with pytest.raises(ValueError, match=r"bad\.toml: summaries vr_edges: expected at least three increasing"):
        load_training_config(bad)
