"""Tests of the batch orbit engine (swerve.orbits) against outside references: Kepler's laws
(analytic), conservation laws (energy; L_z in an axisymmetric Galaxy), time reversibility,
scipy's DOP853 step, and gala's DOP853 integrator on an equivalent composite potential."""

import math

import numpy as np
import pytest
from astropy import units as u

from swerve import orbits, units
from swerve.galaxy import Galaxy, NegativeDensityWarning, PointMass

G = units.G
M_BH = 4.0e6


def _hvs(rng, n, t_max=300.0):
    """Radial launches from 3 pc, isotropic directions, 800-2500 km/s, flight times 0-t_max Myr."""
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    v = rng.uniform(800.0, 2500.0, n)
    return 0.003 * d, v[:, None] * d, rng.uniform(0.0, t_max, n)


@pytest.fixture(scope="module")
def galaxy():
    return Galaxy.from_name("swerve-mw-1", q_z=0.8)


@pytest.fixture(scope="module")
def kepler():
    return Galaxy([PointMass(m_bh=M_BH)], name="point mass")


def _kepler_apocentre(a, e):
    """Start at apocentre on the +x axis, moving in +y (vis-viva)."""
    gm = G * M_BH
    r_apo = a * (1.0 + e)
    v_apo = math.sqrt(gm * (2.0 / r_apo - 1.0 / a))
    return np.array([[r_apo, 0.0, 0.0]]), np.array([[0.0, v_apo, 0.0]])


def test_step_matches_scipy_dop853_step(galaxy):
    # one step of the unrolled stepper vs scipy's own DOP853 rk_step (Hairer's coefficients)
    from scipy.integrate._ivp import dop853_coefficients as c
    from scipy.integrate._ivp.rk import rk_step

    kinds, pars, aux = galaxy.kernel_args

    def f(t, y):
        a = galaxy.acceleration(y[None, :3])[0]
        return np.concatenate([y[3:], a])

    y0 = np.array([0.5, -0.3, 0.2, 300.0, 150.0, -80.0])
    h = 2e-4
    K = np.empty((c.N_STAGES + 1, 6))
    y_ref, f_ref = rk_step(f, 0.0, y0, f(0.0, y0), h, c.A[: c.N_STAGES, : c.N_STAGES],
                           c.B, c.C[: c.N_STAGES], K)
    a0 = f(0.0, y0)[3:]
    out = orbits._dop853_step(kinds, pars, aux, *y0, *a0, h, 1e-10, 1e-14)
    np.testing.assert_allclose(out[:6], y_ref, rtol=1e-13, atol=1e-15)
    np.testing.assert_allclose(out[6:9], f_ref[3:], rtol=1e-12)
    # error estimate as in scipy's DOP853 (Hairer's combination of the 5th and 3rd order parts)
    err5 = K.T @ c.E5
    err3 = K.T @ c.E3
    sx = 1e-14 + 1e-10 * max(np.linalg.norm(y0[:3]), np.linalg.norm(y_ref[:3]))
    sv = 1e-14 + 1e-10 * max(np.linalg.norm(y0[3:]), np.linalg.norm(y_ref[3:]))
    e5 = np.sum(err5[:3] ** 2) / sx**2 + np.sum(err5[3:] ** 2) / sv**2
    e3 = np.sum(err3[:3] ** 2) / sx**2 + np.sum(err3[3:] ** 2) / sv**2
    assert out[9] == pytest.approx(h * e5 / math.sqrt(2.0 * (e5 + 0.01 * e3)), rel=1e-6)


def test_kepler_third_law_and_closure(kepler):
    # analytic: period P = 2 pi sqrt(a^3 / GM); pericentre a(1-e) at P/2 after apocentre
    a, e = 0.01, 0.6
    period = 2.0 * math.pi * math.sqrt(a**3 / (G * M_BH))
    p_myr = float(units.internal_to_myr(period))
    pos0, vel0 = _kepler_apocentre(a, e)
    res = orbits.integrate(kepler, pos0, vel0, 0.75 * p_myr, t_out=[0.5 * p_myr])
    assert res.ok[0]
    assert res.t_r_min[0] == pytest.approx(0.5 * p_myr, rel=1e-9)
    assert res.r_min[0] == pytest.approx(a * (1.0 - e), rel=1e-10)
    assert res.r_max[0] == pytest.approx(a * (1.0 + e), rel=1e-12)
    np.testing.assert_allclose(res.pos_out[0, 0], [-a * (1.0 - e), 0.0, 0.0], atol=1e-10 * a)
    # closure after 3 periods, forward and backward
    for sign in (1.0, -1.0):
        res = orbits.integrate(kepler, pos0, vel0, sign * 3.0 * p_myr)
        assert res.ok[0]
        np.testing.assert_allclose(res.pos[0], pos0[0], atol=1e-8 * a)
        np.testing.assert_allclose(res.vel[0], vel0[0], atol=1e-8 * np.linalg.norm(vel0))
        assert res.energy_error[0] < 1e-10
    # backward: the last pericentre before t = 0 is at -P/2
    res = orbits.integrate(kepler, pos0, vel0, -0.75 * p_myr)
    assert res.t_r_min[0] == pytest.approx(-0.5 * p_myr, rel=1e-9)


def test_energy_conserved_on_hvs_orbits(galaxy, rng):
    pos0, vel0, _ = _hvs(rng, 200)
    # every orbit to 300 Myr: the fast ones reach the halo's negative-density region (q_z = 0.8)
    with pytest.warns(NegativeDensityWarning, match="orbits"):
        res = orbits.integrate(galaxy, pos0, vel0, 300.0)
    assert np.all(res.status == orbits.STATUS_OK)
    assert res.energy_error.max() <= 1e-10
    # independent check of the diagnostic: energies from the Galaxy's own potential
    e0 = 0.5 * np.sum(vel0**2, 1) + galaxy.potential(pos0)
    e1 = 0.5 * np.sum(res.vel**2, 1) + galaxy.potential(res.pos)
    np.testing.assert_allclose(np.abs(e1 - e0) / np.abs(galaxy.potential(pos0)), res.energy_error,
                               rtol=0.0, atol=1e-14)
    assert np.all(res.r_min == pytest.approx(0.003, rel=1e-12))
    # 12 evaluations per step attempt, 1 at the start, 12 per Newton iteration of an event
    assert np.all(res.n_force >= 1 + 12 * (res.n_steps + res.n_rejected))
    assert np.all((res.n_force - 1) % 12 == 0)


def test_lz_of_radial_launch_stays_zero(rng):
    pos0, vel0, _ = _hvs(rng, 50)
    for q_y, expect_zero in ((1.0, True), (1.3, False)):
        res = orbits.integrate(Galaxy.from_name("swerve-mw-1", q_y=q_y, q_z=0.8), pos0, vel0, 100.0,
                               t_out=np.linspace(0.0, 100.0, 11), check_density=False)
        x, v = res.pos_out[..., :2], res.vel_out[..., :2]
        R = np.hypot(x[..., 0], x[..., 1])
        v_phi = (x[..., 0] * v[..., 1] - x[..., 1] * v[..., 0]) / R
        if expect_zero:  # axisymmetric: no torque about z, v_phi is round-off
            assert np.nanmax(np.abs(v_phi)) < 1e-8
        else:  # control: a triaxial halo does make v_phi (so the check above can fail)
            assert np.nanmax(np.abs(v_phi)) > 1e-2


def test_forward_then_backward_returns(galaxy, rng):
    pos0, vel0, t = _hvs(rng, 50, t_max=150.0)
    fwd = orbits.integrate(galaxy, pos0, vel0, t, check_density=False)
    back = orbits.integrate(galaxy, fwd.pos, fwd.vel, -t, check_density=False)
    assert np.all(back.ok)
    np.testing.assert_allclose(back.t_final, -t)
    # back at the 3 pc launch point: 1e-9 kpc = 1 micro-pc, velocities to 1e-6 km/s
    np.testing.assert_allclose(back.pos, pos0, atol=1e-9)
    np.testing.assert_allclose(back.vel, vel0, atol=1e-6)
    # tracing back to the centre: the smallest radius is at the launch time
    np.testing.assert_allclose(back.r_min, 0.003, rtol=1e-6)
    np.testing.assert_allclose(back.t_r_min, -t, rtol=1e-9, atol=1e-9)


def test_end_states_agree_with_gala(galaxy, rng):
    # gala's DOP853 (gala.integrate.DOPRI853Integrator) on the equivalent composite potential
    gp = pytest.importorskip("gala.potential")
    gd = pytest.importorskip("gala.dynamics")
    gi = pytest.importorskip("gala.integrate")
    from gala.units import galactic

    pot = gp.CompositePotential()
    pot["bh"] = gp.KeplerPotential(m=M_BH, units=galactic)
    pot["bulge"] = gp.HernquistPotential(m=3.4e10, c=0.7, units=galactic)
    pot["disk"] = gp.MiyamotoNagaiPotential(m=1e11, a=6.5, b=0.26, units=galactic)
    pot["halo"] = gp.NFWPotential(m=0.76e12, r_s=24.8, a=1.0, b=1.0, c=0.8, units=galactic)
    pos0, vel0, _ = _hvs(rng, 20)
    t_end = 120.0
    w0 = gd.PhaseSpacePosition(pos=pos0.T * u.kpc, vel=vel0.T * u.km / u.s)
    orbit = gp.Hamiltonian(pot).integrate_orbit(
        w0, t=[0.0, t_end] * u.Myr, Integrator=gi.DOPRI853Integrator,
        Integrator_kwargs=dict(rtol=1e-13, atol=1e-16))
    ref_pos = orbit.xyz[:, -1].to_value(u.kpc).T
    ref_vel = orbit.v_xyz[:, -1].to_value(u.km / u.s).T
    res = orbits.integrate(galaxy, pos0, vel0, t_end, check_density=False)
    np.testing.assert_allclose(res.pos, ref_pos, rtol=1e-6)
    np.testing.assert_allclose(res.vel, ref_vel, rtol=1e-6)


def test_dense_output_matches_direct_integration(galaxy, rng):
    pos0, vel0, _ = _hvs(rng, 30)
    t_grid = np.linspace(0.0, 200.0, 41)
    dense = orbits.integrate(galaxy, pos0, vel0, 200.0, t_out=t_grid, check_density=False)
    # direct: one integration per (orbit, time), ending exactly at the output time
    rep_p = np.repeat(pos0, t_grid.size, axis=0)
    rep_v = np.repeat(vel0, t_grid.size, axis=0)
    direct = orbits.integrate(galaxy, rep_p, rep_v, np.tile(t_grid, 30), check_density=False)
    p_ref = direct.pos.reshape(30, t_grid.size, 3)
    v_ref = direct.vel.reshape(30, t_grid.size, 3)
    r = np.linalg.norm(p_ref, axis=2)
    w = np.linalg.norm(v_ref, axis=2)
    err_p = np.linalg.norm(dense.pos_out - p_ref, axis=2) / r
    err_v = np.linalg.norm(dense.vel_out - v_ref, axis=2) / w
    # stated accuracy of the quintic Hermite dense output (measured: 7e-10 in position, 2e-8 in
    # velocity; direct integrations differ from each other by ~1e-11; see benchmarks/RESULTS.md)
    assert err_p.max() < 2e-9
    assert err_v.max() < 5e-8
    np.testing.assert_array_equal(dense.pos_out[:, 0], pos0)


def test_early_stop_at_r_stop(galaxy, rng):
    pos0, vel0, t = _hvs(rng, 40)
    res = orbits.integrate(galaxy, pos0, vel0, t, t_out=np.linspace(0.0, 400.0, 81), r_stop=50.0,
                           check_density=False)
    stopped = res.stopped
    assert stopped.sum() > 20 and (~stopped).sum() > 0
    np.testing.assert_allclose(np.linalg.norm(res.pos[stopped], axis=1), 50.0, rtol=1e-10)
    assert np.all(res.t_final[stopped] < t[stopped])
    assert np.all(res.r_max[~stopped] < 50.0)
    # the stop time is where direct integration reaches r = 50 kpc
    direct = orbits.integrate(galaxy, pos0[stopped], vel0[stopped], res.t_final[stopped],
                              check_density=False)
    np.testing.assert_allclose(np.linalg.norm(direct.pos, axis=1), 50.0, rtol=1e-9)
    # outputs after the stop are NaN, before it finite
    after = res.t_out > res.t_final[:, None]
    assert np.all(np.isnan(res.pos_out[after])) and np.all(np.isfinite(res.pos_out[~after & (res.t_out <= t[:, None])]))


def test_per_orbit_end_times_and_output_times(galaxy):
    # two radial launches forward; a disk orbit backward (a launch traced backward would fall
    # through the point mass)
    pos0 = np.array([[0.003, 0.0, 0.0], [8.0, 0.0, 0.5], [0.0, 0.003, 0.0]])
    vel0 = np.array([[1200.0, 0.0, 0.0], [10.0, 230.0, 5.0], [0.0, 900.0, 0.0]])
    t_end = np.array([50.0, -80.0, 120.0])
    t_out = np.array([[40.0, 10.0, np.nan, 60.0],     # 60 is beyond t_end
                      [-20.0, -80.0, 5.0, np.nan],    # +5 is on the wrong side of 0
                      [0.0, 120.0, 30.0, 119.5]])
    res = orbits.integrate(galaxy, pos0, vel0, t_end, t_out=t_out, check_density=False)
    assert res.ok.all()
    np.testing.assert_allclose(res.t_final, t_end)
    nan_rows = np.isnan(res.pos_out[..., 0])
    np.testing.assert_array_equal(nan_rows, [[0, 0, 1, 1], [0, 0, 1, 1], [0, 0, 0, 0]])
    # each output equals a separate integration of that orbit to that time
    for i in range(3):
        for j in range(4):
            if nan_rows[i, j]:
                continue
            one = orbits.integrate(galaxy, pos0[i], vel0[i], t_out[i, j], check_density=False)
            # dense output vs direct integration, relative to |x| (Hermite accuracy, see above)
            assert np.linalg.norm(res.pos_out[i, j] - one.pos[0]) < 2e-9 * np.linalg.norm(one.pos[0])
    # the end state equals the output at t_end
    np.testing.assert_allclose(res.pos[1], res.pos_out[1, 1], rtol=1e-13)
    # Quantities are converted: same orbit given in pc, m/s and Gyr
    q = orbits.integrate(galaxy, pos0[:1] * 1000.0 * u.pc, vel0[:1] * 1000.0 * u.m / u.s,
                         0.05 * u.Gyr, check_density=False)
    np.testing.assert_allclose(q.pos[0], res.pos[0], rtol=1e-12)


def test_bad_input_raises(galaxy):
    p = np.array([[0.003, 0.0, 0.0]])
    v = np.array([[1000.0, 0.0, 0.0]])
    with pytest.raises(ValueError, match="pos0"):
        orbits.integrate(galaxy, [[np.nan, 0.0, 0.0]], v, 10.0)
    with pytest.raises(ValueError, match="pos0"):
        orbits.integrate(galaxy, np.zeros((2, 2)), v, 10.0)
    with pytest.raises(ValueError, match="vel0"):
        orbits.integrate(galaxy, p, np.zeros((2, 3)), 10.0)
    with pytest.raises(ValueError, match="vel0"):
        orbits.integrate(galaxy, p, [[np.inf, 0.0, 0.0]], 10.0)
    with pytest.raises(ValueError, match="t_end"):
        orbits.integrate(galaxy, p, v, [10.0, 20.0])
    with pytest.raises(ValueError, match="t_end"):
        orbits.integrate(galaxy, p, v, np.nan)
    with pytest.raises(ValueError, match="t_out"):
        orbits.integrate(galaxy, p, v, 10.0, t_out=np.zeros((2, 3)))
    with pytest.raises(ValueError, match="t_out"):
        orbits.integrate(galaxy, p, v, 10.0, t_out=[np.inf])
    with pytest.raises(ValueError, match="r_stop"):
        orbits.integrate(galaxy, p, v, 10.0, r_stop=-1.0)
    with pytest.raises(ValueError, match="rtol"):
        orbits.integrate(galaxy, p, v, 10.0, rtol=0.0)
    with pytest.raises(ValueError, match="pos0"):
        orbits.integrate(galaxy, [1.0, 2.0, 3.0] * u.km / u.s, v, 10.0)
    with pytest.raises(ValueError, match="on_failure"):
        orbits.integrate(galaxy, p, v, 10.0, on_failure="ignore it")


def test_failures_are_flagged(galaxy, kepler):
    p = np.array([[0.003, 0.0, 0.0], [0.003, 0.0, 0.0]])
    v = np.array([[1000.0, 0.0, 0.0], [2000.0, 0.0, 0.0]])
    with pytest.warns(orbits.OrbitFailureWarning, match="max_steps"):
        res = orbits.integrate(galaxy, p, v, 100.0, max_steps=10)
    assert np.all(res.status == orbits.STATUS_MAX_STEPS) and not res.ok.any()
    assert np.all(res.t_final < 100.0) and np.all(res.n_steps + res.n_rejected == 10)
    with pytest.raises(orbits.OrbitIntegrationError, match="2 of 2 orbits failed"):
        orbits.integrate(galaxy, p, v, 100.0, max_steps=10, on_failure="raise")
    # radial infall from rest onto a point mass: the orbit reaches the singularity
    with pytest.warns(orbits.OrbitFailureWarning):
        res = orbits.integrate(kepler, [[0.01, 0.0, 0.0]], [[0.0, 0.0, 0.0]], 10.0)
    assert res.status[0] in (orbits.STATUS_STEP_UNDERFLOW, orbits.STATUS_NON_FINITE,
                             orbits.STATUS_MAX_STEPS)
    assert orbits.status_names[int(res.status[0])] in res.failure_summary()
    # starting at the singularity: non-finite energy, flagged at once
    res = orbits.integrate(kepler, [[0.0, 0.0, 0.0]], [[1.0, 0.0, 0.0]], 1.0, on_failure="ignore")
    assert res.status[0] == orbits.STATUS_NON_FINITE


def test_massless_galaxy_gives_straight_lines():
    """Every mass zero: free motion, x(t) = x0 + v t (analytic), and no orbit is flagged."""
    g = Galaxy.default(m_bh=0.0, m_bulge=0.0, m_disk=0.0, m_halo=0.0)
    pos0 = np.array([[8.0, 1.0, -2.0], [0.003, 0.0, 0.0]])
    vel0 = np.array([[100.0, -50.0, 30.0], [1500.0, 0.0, 0.0]])
    res = orbits.integrate(g, pos0, vel0, 100.0, check_density=False)
    assert np.all(res.ok)
    t = 100.0 / units.TIME_UNIT_MYR
    np.testing.assert_allclose(res.pos, pos0 + vel0 * t, rtol=1e-12)
    assert np.all(res.energy_error < 1e-12)
