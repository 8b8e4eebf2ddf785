"""Summaries: recover known moments, honest bootstrap noise, cell geometry."""

import numpy as np
import pytest

from swerve.summaries import (
    N_STAT,
    SummarySpec,
    compute_summaries,
    folded_components,
    stats_to_gaussian,
)

MU = np.array([500.0, 3.0, -1.0])
COV = np.array([[900.0, 30.0, 5.0], [30.0, 16.0, 2.0], [5.0, 2.0, 4.0]])


def _population(rng, n, per_orbit=1):
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    r = rng.uniform(10, 250, n)
    pos = d * r[:, None]
    vc = rng.multivariate_normal(MU, COV, size=n)
    x, y, z = pos.T
    R = np.hypot(x, y)
    er = pos / r[:, None]
    eth = np.stack([z * x / (R * r), z * y / (R * r), -R / r], 1)
    eph = np.stack([-y / R, x / R, 0 * x], 1)
    sz = np.where(z >= 0, 1, -1)
    sxy = np.where(x * y >= 0, 1, -1)
    vel = vc[:, [0]] * er + (vc[:, [1]] * sz[:, None]) * eth + (vc[:, [2]] * sxy[:, None]) * eph
    orbit = np.arange(n) // per_orbit
    return pos, vel, vc, orbit


def test_folded_components_invert_construction(rng):
    pos, vel, vc, _ = _population(rng, 5000)
    np.testing.assert_allclose(folded_components(pos, vel), vc, atol=1e-9)


def test_folded_components_against_astropy_spherical(rng):
    """v_theta and v_phi agree with astropy's spherical differentials (then folded)."""
    from astropy import units as u
    from astropy.coordinates import (
        CartesianDifferential,
        CartesianRepresentation,
        PhysicsSphericalDifferential,
        PhysicsSphericalRepresentation,
    )

    pos = rng.normal(size=(200, 3)) * 30
    vel = rng.normal(size=(200, 3)) * 300
    rep = CartesianRepresentation(pos.T * u.kpc, differentials=CartesianDifferential(vel.T * u.km / u.s))
    sph = rep.represent_as(PhysicsSphericalRepresentation, PhysicsSphericalDifferential)
    dif = sph.differentials["s"]
    r = sph.r.to_value(u.kpc)
    v_theta = (dif.d_theta * sph.r).to(u.km / u.s, u.dimensionless_angles()).value
    v_phi = (dif.d_phi * sph.r * np.sin(sph.theta)).to(u.km / u.s, u.dimensionless_angles()).value
    fc = folded_components(pos, vel)
    np.testing.assert_allclose(fc[:, 0], dif.d_r.to_value(u.km / u.s), rtol=1e-10, atol=1e-9)
    np.testing.assert_allclose(fc[:, 1], v_theta * np.where(pos[:, 2] >= 0, 1, -1), rtol=1e-10, atol=1e-9)
    np.testing.assert_allclose(fc[:, 2], v_phi * np.where(pos[:, 0] * pos[:, 1] >= 0, 1, -1), rtol=1e-10, atol=1e-9)
    assert np.all(r > 0)


def test_recovers_gaussian_moments_and_honest_noise(rng):
    """Cell means/covariances equal the input Gaussian within the bootstrap error, and the
    bootstrap error of the mean equals the analytic sigma / sqrt(n) (independent samples)."""
    spec = SummarySpec(n_boot=200)
    pos, vel, _, orbit = _population(rng, 150_000)
    res = compute_summaries(spec, pos, vel, np.ones(len(pos)), orbit, rng)
    mean, cov = stats_to_gaussian(res.values, spec.n_cells)
    sd_mean = np.sqrt(res.noise_var.reshape(spec.n_cells, N_STAT)[:, :3])
    pull = (mean - MU) / sd_mean
    assert np.sqrt(np.mean(pull**2)) < 1.6
    expected_sd = np.sqrt(np.diag(COV))[None, :] / np.sqrt(res.n_samples)[:, None]
    ratio = sd_mean / expected_sd
    assert 0.8 < np.median(ratio) < 1.2
    # sampling error of a covariance element: var = (C_aa C_bb + C_ab^2) / n
    n = res.n_samples[:, None, None]
    se = np.sqrt((np.diag(COV)[:, None] * np.diag(COV)[None, :] + COV**2)[None] / n)
    assert np.max(np.abs(cov - COV) / se) < 4.5


def test_bootstrap_counts_orbits_not_samples(rng):
    """Ten identical samples per orbit carry the information of one: the noise must say so."""
    spec = SummarySpec(n_boot=100, r_edges=(10.0, 250.0), lat_edges=(0.0, 90.0))
    pos, vel, _, _ = _population(rng, 3000)
    pos10 = np.repeat(pos, 10, axis=0)
    vel10 = np.repeat(vel, 10, axis=0)
    a = compute_summaries(spec, pos, vel, np.ones(3000), np.arange(3000), rng)
    b = compute_summaries(spec, pos10, vel10, np.ones(30000), np.repeat(np.arange(3000), 10), rng)
    np.testing.assert_allclose(a.values, b.values, rtol=1e-10, atol=1e-10)
    ratio = np.sqrt(b.noise_var[:3] / a.noise_var[:3])
    assert np.all((ratio > 0.75) & (ratio < 1.33))


def test_cell_index_geometry():
    spec = SummarySpec()
    pts = np.array([
        [15.0, 0.0, 0.0],  # r bin 0, lat 0
        [0.0, 0.0, 15.0],  # r bin 0, lat 90 -> last lat bin
        [0.0, 0.0, -40.0],  # r bin 2, |lat| 90
        [5.0, 0.0, 0.0],  # inside r_min: outside
        [300.0, 0.0, 0.0],  # beyond r_max: outside
        [30.0 * np.cos(np.radians(45)), 0.0, 30.0 * np.sin(np.radians(45))],  # r bin 1, lat 45
    ])
    np.testing.assert_array_equal(spec.cell_index(pts), [0, 2, 8, -1, -1, 4])


def test_stats_map_to_positive_definite_covariances(rng):
    spec = SummarySpec()
    v = rng.normal(size=(50, spec.n_outputs)) * 3
    _, cov = stats_to_gaussian(v, spec.n_cells)
    assert np.all(np.linalg.eigvalsh(cov) > 0)


def test_sparse_cell_is_refused(rng):
    spec = SummarySpec(min_ess=50)
    pos, vel, _, orbit = _population(rng, 300)
    with pytest.raises(ValueError, match="effective sample size below 50"):
        compute_summaries(spec, pos, vel, np.ones(300), orbit, rng)


@pytest.mark.parametrize("kw", [{"r_edges": (10.0,)}, {"r_edges": (20.0, 10.0)}, {"lat_edges": (0.0, 100.0)}, {"n_boot": 2}])
def test_bad_spec(kw):
    with pytest.raises(ValueError, match="summaries"):
        SummarySpec(**kw)


def test_spec_round_trip():
    spec = SummarySpec(r_edges=(10.0, 50.0, 200.0), lat_edges=(0.0, 45.0, 90.0))
    assert SummarySpec.from_dict(spec.to_dict()) == spec
    assert len(spec.output_names()) == spec.n_outputs == 4 * N_STAT


def test_replicate_noise_matches_analytic_for_independent_samples(rng):
    """With independent samples split into 8 replicates, the replicate estimate of the noise of
    a cell mean equals sigma / sqrt(n) (analytic) within its own sampling error (7 dof)."""
    spec = SummarySpec(n_boot=16, r_edges=(10.0, 250.0), lat_edges=(0.0, 90.0))
    pos, vel, _, orbit = _population(rng, 40_000)
    rep = orbit % 8
    res = compute_summaries(spec, pos, vel, np.ones(len(pos)), orbit, rng, replicate=rep)
    sd = np.sqrt(res.noise_var[:3])
    expected = np.sqrt(np.diag(COV) / len(pos))
    assert np.all((sd / expected > 0.4) & (sd / expected < 1.7))
    assert res.meta["n_replicates"] == 8
    with pytest.raises(ValueError, match="at least two replicates"):
        compute_summaries(spec, pos, vel, np.ones(len(pos)), orbit, rng, replicate=np.zeros(len(pos)))


def test_moment_sums_equal_numpy_bincount(rng):
    # the compiled one-pass moments against numpy's bincount, bit for bit (same order, no FMA)
    from swerve.summaries import _cell_moments

    n, nc = 5000, 17
    cell = rng.integers(0, nc, n)
    cell[:3] = 0
    comps = rng.normal(size=(n, 3)) * [400.0, 20.0, 5.0]
    w = rng.exponential(size=n) * rng.poisson(1.0, n)  # bootstrap-like weights, zeros included
    W, m, s = _cell_moments(cell, comps, w, nc)
    np.testing.assert_array_equal(W, np.bincount(cell, weights=w, minlength=nc))
    for a in range(3):
        np.testing.assert_array_equal(m[:, a], np.bincount(cell, weights=w * comps[:, a], minlength=nc))
    for k, (a, b) in enumerate(((0, 0), (1, 1), (2, 2), (0, 1), (0, 2), (1, 2))):
        np.testing.assert_array_equal(
            s[:, k], np.bincount(cell, weights=w * comps[:, a] * comps[:, b], minlength=nc))
