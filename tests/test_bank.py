"""Trajectory banks: construction, storage, pruning, reweighting and coverage errors."""

import math

import numpy as np
import pytest

from swerve import bank as B
from swerve.frames import spherical_components
from swerve.galaxy import Galaxy
from swerve.launch import (
    BoundedPowerLawSpeed,
    HillsAliveTable,
    HillsLaunch,
    TabulatedSpeedDensity,
    TrajectoryWeights,
    main_sequence_lifetime,
)
from swerve.orbits import integrate

KW = dict(t_max=150.0, dt=2.0, r_min_store=10.0, r_max=60.0)


@pytest.fixture(scope="module")
def bank_sph():
    return B.build_bank(Galaxy.default(), 512, 7, **KW)


@pytest.fixture(scope="module")
def bank_tri():
    return B.build_bank(Galaxy.default(q_y=1.2, q_z=0.9), 512, 7, **KW)


def test_proposal_density_normalised_and_ppf():
    p = B.SpeedProposal(500.0, 5000.0)
    v = np.geomspace(500.0, 5000.0, 200001)
    integral = np.trapezoid(p.pdf(v), v)
    assert integral == pytest.approx(1.0, rel=1e-8)
    # ppf is the inverse CDF of the log-uniform law: median = geometric mean
    assert float(p.ppf(0.5)) == pytest.approx(math.sqrt(500.0 * 5000.0), rel=1e-12)
    assert p.pdf(400.0) == 0.0 and p.pdf(6000.0) == 0.0
    with pytest.raises(ValueError, match="v_hi"):
        B.SpeedProposal(500.0, 400.0)


def test_bank_structure(bank_sph):
    b = bank_sph
    assert b.n_orbits == 512 and b.octant
    assert b.pos.dtype == np.float32 and b.vel.dtype == np.float32 and b.orbit.dtype == np.int32
    r = np.linalg.norm(b.pos.astype(float), axis=1)
    assert np.all(r >= 10.0 - 1e-4) and np.all(r <= 60.0 + 1e-4)
    # launches into the positive octant only (bound stars that fall back through the centre come out on the far side)
    assert np.all(b.direction >= 0) and np.mean(np.all(b.pos >= 0, axis=1)) > 0.8
    # flight times on each orbit's stratified grid (k + phase) dt
    k = b.t_flight / b.dt - b.phase[b.orbit]
    assert np.allclose(k, np.round(k), atol=1e-3)
    assert np.all((b.t_flight >= 0) & (b.t_flight < b.t_max))
    assert np.array_equal(np.bincount(b.orbit, minlength=b.n_orbits), b.n_samples)
    assert b.nbytes == sum(getattr(b, a).nbytes for a in ("pos", "vel", "orbit", "t_flight", "v_launch",
                                                          "direction", "phase", "status", "energy_error",
                                                          "n_samples"))
    assert not np.any(b.failed) and b.max_energy_error < 1e-6
    # launch speeds log-uniform (Sobol): the mean of log v is the midpoint to < 1%
    assert np.mean(np.log(b.v_launch)) == pytest.approx(0.5 * math.log(500.0 * 5000.0), rel=1e-3)


def test_energy_pruning_is_exact(bank_sph):
    """Pruned launches, integrated anyway, never reach r_min_store."""
    b = bank_sph
    pruned = np.flatnonzero(b.status == B.STATUS_PRUNED)
    assert pruned.size > 10 and np.all(b.n_samples[pruned] == 0)
    idx = pruned[np.argsort(b.v_launch[pruned])[-16:]]  # the fastest pruned ones
    d = b.direction[idx].astype(float)
    res = integrate(Galaxy.default(), b.r0 * d, b.v_launch[idx, None] * d, b.t_max, check_density=False)
    assert np.all(res.r_max < b.r_min_store)
    assert b.info["reach_speed"] == pytest.approx(float(np.min(b.v_launch[b.status >= 0])), rel=0.05)


def test_vphi_zero_axisymmetric_nonzero_triaxial(bank_sph, bank_tri):
    """Radial launches keep L_z = 0 in an axisymmetric Galaxy (angular momentum about z is conserved: analytic)."""
    for b, triaxial in ((bank_sph, False), (bank_tri, True)):
        c = spherical_components(b.pos.astype(float), b.vel.astype(float))
        speed = np.linalg.norm(b.vel.astype(float), axis=1)
        rel = np.abs(c["v_phi"]) / speed
        if triaxial:
            assert np.median(np.abs(c["v_phi"])) > 0.05  # km/s, far above float32 round-off
        else:
            assert np.max(rel) < 1e-6  # float32 storage: eps = 6e-8


def test_save_load_roundtrip(bank_sph, tmp_path):
    path = tmp_path / "bank.npz"
    B.save_bank(bank_sph, path)
    b2 = B.load_bank(path)
    assert b2.metadata() == bank_sph.metadata()
    for a in ("pos", "vel", "orbit", "t_flight", "v_launch", "status"):
        assert np.array_equal(getattr(b2, a), getattr(bank_sph, a))
    # a truncated / edited file is refused
    with np.load(path, allow_pickle=False) as z:
        data = {k: z[k] for k in z.files}
    data["pos"] = data["pos"][:-5]
    bad = tmp_path / "bad.npz"
    np.savez(bad, **data)
    with pytest.raises(ValueError, match="do not match"):
        B.load_bank(bad)
    with pytest.raises(ValueError, match=".npz"):
        B.save_bank(bank_sph, tmp_path / "bank.pkl")


def test_weights_of_the_proposal_itself_are_uniform(bank_sph):
    """slope = -1 on the proposal's range is the proposal: p/q = 1, so every w = dt / N."""
    w, info = B.sample_weights(bank_sph, BoundedPowerLawSpeed(500.0, 5000.0, -1.0))
    assert np.allclose(w, bank_sph.dt / bank_sph.n_orbits, rtol=1e-9)
    assert info["ess"] == pytest.approx(bank_sph.n_stored)
    w2, _ = B.sample_weights(bank_sph, BoundedPowerLawSpeed(500.0, 5000.0, -1.0), flight_time_max=50.0)
    assert np.all(w2[bank_sph.t_flight >= 50.0] == 0) and np.all(w2[bank_sph.t_flight < 50.0] > 0)


def test_coverage_errors(bank_sph):
    with pytest.raises(B.BankCoverageError, match="v_max = 8000"):
        B.sample_weights(bank_sph, BoundedPowerLawSpeed(900.0, 8000.0))
    with pytest.raises(B.BankCoverageError, match="t_max"):
        B.sample_weights(bank_sph, BoundedPowerLawSpeed(900.0, 2000.0), flight_time_max=400.0)
    with pytest.raises(ValueError, match="mass_range"):
        B.sample_weights(bank_sph, BoundedPowerLawSpeed(900.0, 2000.0), mass_range=(2, 3))
    with pytest.raises(ValueError, match="v_max"):
        BoundedPowerLawSpeed(2000.0, 1000.0)  # impossible launch parameters
    with pytest.raises(ValueError, match="mass_range"):
        B.sample_weights(bank_sph, HillsLaunch(), mass_range=(50.0, 60.0), hills_samples=20000)


def test_hills_alive_table_against_lifetimes():
    """Analytic survival: t_MS = 10 Gyr m^-2.5 (common practice) bounds the alive fraction."""
    h = HillsLaunch()
    # speed density at t = 0 equals HillsLaunch.speed_density (same seed, same bins)
    tab = B.hills_alive_table(h, 4e6, 400.0, n_samples=100_000, seed=5)
    sd = h.speed_density(4e6, n_samples=100_000, seed=5)
    c = 0.5 * (sd.log10_edges[1:] + sd.log10_edges[:-1])
    v = 10 ** c
    assert np.allclose(tab(v, 0.0), sd.pdf(v) * (1 - sd.meta["fraction_outside"]), rtol=1e-9, atol=0)
    # stars of 4-5 Msun live 179-312 Myr: all alive at 150 Myr, none at 320 Myr
    assert main_sequence_lifetime(5.0) > 150 and main_sequence_lifetime(4.0) < 320
    t45 = B.hills_alive_table(h, 4e6, 400.0, mass_range=(4.0, 5.0), n_samples=100_000, seed=5)
    assert np.allclose(t45(v, 150.0), t45(v, 0.0), rtol=1e-12)
    assert np.all(t45(v, 320.0) == 0)
    # between: the alive fraction equals the fraction of stars with t_MS > t
    s = h.sample(100_000, np.random.default_rng(5), 4e6)
    m = s["mass"][(s["mass"] >= 4.0) & (s["mass"] <= 5.0)]
    dens = t45.value[:, 0] * np.diff(t45.log10_edges)
    frac = np.sum(t45.value[:, 150] * np.diff(t45.log10_edges)) / np.sum(dens)
    assert frac == pytest.approx(np.mean(main_sequence_lifetime(m) > t45.t_grid[150]), abs=1e-12)


def test_hills_weights(bank_sph):
    w, info = B.sample_weights(bank_sph, HillsLaunch(), mass_range=(2.5, 4.0), hills_samples=100_000)
    assert np.all(w >= 0) and info["ess"] > 100
    assert info["missing_fraction"] < 0.01


def test_reflection_symmetry_check():
    assert B.check_reflection_symmetry(Galaxy.default(q_y=1.1, q_z=0.8))
    with pytest.raises(ValueError, match="directions"):
        B.build_bank(Galaxy.default(), 8, 1, directions="cube")


def test_tabulated_density_equal_to_the_proposal_gives_uniform_weights(bank_sph):
    """A table flat per dex on the proposal's range is the proposal: p/q = 1, every w = dt / N."""
    edges = np.linspace(math.log10(500.0), math.log10(5000.0), 11)
    tab = TabulatedSpeedDensity(edges, np.ones(10))
    w, info = B.sample_weights(bank_sph, tab)
    assert np.allclose(w, bank_sph.dt / bank_sph.n_orbits, rtol=1e-9, atol=0)
    assert info["missing_fraction"] < 1e-3 and np.allclose(info["orbit_weight"], bank_sph.dt / bank_sph.n_orbits)


class _ShortLived:
    """A launch model written outside swerve (no edit of swerve.bank): the proposal's own
    log-flat speeds, stars visible for their first 40 Myr; ``missing`` declared by hand."""

    def __init__(self, proposal, missing=0.0):
        self.proposal, self.missing = proposal, missing

    def to_dict(self):
        return {"model": "short_lived (test)"}

    def trajectory_weights(self, samples, *, mass_range=None, table_samples=0, table_seed=0):
        s = samples
        w = (self.proposal.pdf(s.v_launch) * s.inv_q)[s.orbit] * (s.t < min(40.0, s.t_cut))
        return TrajectoryWeights(w, self.missing, {"lifetime_myr": 40.0}, "short-lived stars: bank too small")


def test_a_new_launch_model_plugs_in_through_its_own_method(bank_sph):
    b = bank_sph
    w, info = B.sample_weights(b, _ShortLived(b.proposal))
    # p/q = 1 below 40 Myr, 0 after: w = dt / N there (the module docstring's formula)
    assert np.allclose(w[b.t_flight < 40.0], b.dt / b.n_orbits, rtol=1e-9, atol=0)
    assert np.all(w[b.t_flight >= 40.0] == 0)
    assert info["lifetime_myr"] == 40.0 and info["launch"] == {"model": "short_lived (test)"}
    assert info["ess"] == pytest.approx(np.sum(b.t_flight < 40.0))
    with pytest.raises(B.BankCoverageError, match="short-lived stars: bank too small"):
        B.sample_weights(b, _ShortLived(b.proposal, missing=0.5))
    with pytest.raises(ValueError, match="trajectory_weights method"):
        B.sample_weights(b, {"model": "hills"})


def test_hills_alive_table_lives_with_the_launch_models():
    assert B.HillsAliveTable is HillsAliveTable and B.hills_alive_table.__module__ == "swerve.launch"
