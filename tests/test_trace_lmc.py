"""swerve trace with the LMC: back-integration in the LMC-perturbed Galaxy, the LMC as a second origin.

Outside reference: galpy (its MovingObjectPotential for the moving LMC and NonInertialFrameForce
for the Milky Way's reflex, as in tests/test_lmc.py) launches one star from the LMC's centre and
one from the Galactic Centre at known past times and speeds; swerve traces their present states
back. Also checked: with a massless LMC the trace is the static one (swerve.orbits), the early
stop changes no result against full-length integration, the command line and its errors.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

from conftest import catalog_from_galacto, galpy_lmc_reference
from swerve.cli import main
from swerve.galaxy import Galaxy
from swerve.galaxy.lmc import LMC, lmc_orbit
from swerve.orbits_lmc import STOP_GC, STOP_NO_RETURN, integrate_lmc
from swerve.trace import LMC_TRACE_COLUMNS, TRACE_COLUMNS, trace_orbits

DEMO = Path(__file__).resolve().parents[1] / "examples" / "demo.ecsv"
T_LMC_LAUNCH = -150.0   # Myr: the LMC star leaves the LMC's centre
V_LMC_KICK = 900.0      # km/s relative to the LMC's centre
T_GC_LAUNCH = -100.0    # Myr: the Galactic-Centre star leaves 3 pc from the centre
V_GC_LAUNCH = 1200.0    # km/s at 3 pc


@pytest.fixture(scope="module")
def galaxy():
    return Galaxy.default()


@pytest.fixture(scope="module")
def galpy_launches(galaxy):
    """galpy: the LMC on its orbit in the static Galaxy (a MovingObjectPotential), the reflex as a
    NonInertialFrameForce; a star launched from the LMC's centre and one from the Galactic Centre,
    integrated forward to the present. Returns the LMC track swerve uses (the same LMC orbit,
    tabulated) and the two present states."""
    import warnings

    import astropy.units as u
    from galpy.orbit import Orbit
    from galpy.util import galpyWarningVerbose

    def state(o, t):
        return (np.array([o.x(t * u.Myr), o.y(t * u.Myr), o.z(t * u.Myr)]),
                np.array([o.vx(t * u.Myr), o.vy(t * u.Myr), o.vz(t * u.Myr)]))

    with warnings.catch_warnings():  # galpy names the integrator it uses in a verbose warning
        warnings.simplefilter("ignore", galpyWarningVerbose)
        ref = galpy_lmc_reference(galaxy, 320.0, 32001, 6401)
        o, track, pot, to_galpy, ro, vo = (ref[k] for k in ("lmc_orbit", "track", "pot", "to_galpy", "ro", "vo"))
        # from the LMC's centre (3 pc off it, along the kick), 900 km/s relative to it
        XL, VL = state(o, T_LMC_LAUNCH)
        kick = np.array([0.3, -0.8, 0.52])
        kick /= np.linalg.norm(kick)
        s = Orbit(to_galpy(XL + 0.003 * kick, VL + V_LMC_KICK * kick), ro=ro, vo=vo)
        s.integrate(np.linspace(T_LMC_LAUNCH, 0.0, 3001) * u.Myr, pot, method="dop853_c")
        lmc_star = state(s, 0.0)
        # from 3 pc of the Galactic Centre, radially at 1200 km/s
        n = np.array([0.45, 0.62, -0.64])
        n /= np.linalg.norm(n)
        g = Orbit(to_galpy(0.003 * n, V_GC_LAUNCH * n), ro=ro, vo=vo)
        g.integrate(np.linspace(T_GC_LAUNCH, 0.0, 2001) * u.Myr, pot, method="dop853_c")
        gc_star = state(g, 0.0)
    return track, lmc_star, gc_star


def _samples(states, k, seed, dx=1e-4, dv=0.3):
    """k samples per star around the given present states (the first exact): (n, k, 3) arrays."""
    rng = np.random.default_rng(seed)
    pos = np.array([np.repeat(x[None], k, axis=0) for x, _ in states])
    vel = np.array([np.repeat(v[None], k, axis=0) for _, v in states])
    pos[:, 1:] += rng.normal(size=pos[:, 1:].shape) * dx
    vel[:, 1:] += rng.normal(size=vel[:, 1:].shape) * dv
    return pos, vel


# --------------------------------------------------------------------- against galpy ---
def test_galpy_launches_trace_back_to_their_origins(galaxy, galpy_launches):
    """A star launched from the LMC's centre 150 Myr ago (galpy) has p_lmc = 1, p_origin = 0,
    its flight time and relative speed; a Galactic-Centre star has p_origin = 1, p_lmc = 0, and
    its launch speed from the time-dependent energy bookkeeping."""
    track, lmc_star, gc_star = galpy_launches
    pos, vel = _samples([lmc_star, gc_star], 12, 1)
    res = trace_orbits(galaxy, pos, vel, lmc=track, max_time=300.0)
    assert res.has_lmc and np.all(res.n_failed == 0)
    assert res.p_lmc.tolist() == [1.0, 0.0]
    assert res.p_origin.tolist() == [0.0, 1.0]
    # the exact present state (sample 0): the closest approach is the launch point
    assert res.sample_d_lmc_min[0, 0] < 0.01
    assert res.sample_t_lmc_min[0, 0] == pytest.approx(-T_LMC_LAUNCH, abs=0.01)
    assert res.sample_v_rel_lmc[0, 0] == pytest.approx(V_LMC_KICK, rel=2e-3)
    assert res.t_flight_lmc[0] == pytest.approx(-T_LMC_LAUNCH, abs=0.5)
    assert res.v_eject_lmc[0] == pytest.approx(V_LMC_KICK, rel=5e-3)
    assert res.d_lmc_min[0] < 0.2
    assert np.isnan(res.t_flight[0]) and res.r_min[0] > 20.0
    # the Galactic-Centre star: flight time and launch speed at 3 pc (energy + int dPhi/dt dt)
    assert res.sample_r_min[1, 0] < 0.01
    assert res.sample_t_flight[1, 0] == pytest.approx(-T_GC_LAUNCH, abs=0.01)
    assert res.sample_v_launch[1, 0] == pytest.approx(V_GC_LAUNCH, rel=1e-3)
    assert res.t_flight[1] == pytest.approx(-T_GC_LAUNCH, abs=0.5)
    assert res.v_launch[1] == pytest.approx(V_GC_LAUNCH, rel=5e-3)
    assert np.isnan(res.t_flight_lmc[1]) and res.d_lmc_min[1] > 20.0
    # the exact path may end in the point mass (kept: it reached the centre); the others stop on
    # leaving the 1 kpc sphere
    assert np.all(res.sample_stop_reason[1, 1:] == STOP_GC)
    # the static trace of the LMC star misses the LMC's motion: no Galactic-Centre origin either,
    # and its LMC-perturbed launch speed differs from the static energy's
    static = trace_orbits(galaxy, pos, vel, max_time=300.0)
    assert static.p_origin[0] == 0.0
    assert abs(static.sample_v_launch[1, 0] - V_GC_LAUNCH) > 5.0 * abs(res.sample_v_launch[1, 0] - V_GC_LAUNCH)


# ------------------------------------------------------------ internal consistency ---
def test_massless_lmc_gives_the_static_trace(galaxy):
    """m_lmc = 0: the Galactic-Centre columns equal the static engine's (swerve.orbits), the
    launch speed formula reduces to the static energy conservation."""
    rng = np.random.default_rng(5)
    n, k = 4, 10
    d = rng.normal(size=(n, 1, 3))
    d /= np.linalg.norm(d, axis=-1, keepdims=True)
    r = rng.uniform(10.0, 60.0, (n, 1, 1))
    pos = r * d + rng.normal(size=(n, k, 3)) * 0.3
    vel = rng.uniform(500.0, 1100.0, (n, 1, 1)) * d + rng.normal(size=(n, k, 3)) * 20.0
    static = trace_orbits(galaxy, pos, vel, max_time=400.0)
    zero = trace_orbits(galaxy, pos, vel, max_time=400.0, lmc=LMC(m_lmc=0.0), early_stop=False)
    assert np.array_equal(zero.sample_pass, static.sample_pass)
    assert 0 < static.sample_pass.sum() < n * k
    np.testing.assert_allclose(zero.sample_r_min, static.sample_r_min, rtol=1e-7, atol=1e-9)
    p = static.sample_pass
    np.testing.assert_allclose(zero.sample_t_flight[p], static.sample_t_flight[p], rtol=1e-7, atol=1e-6)
    np.testing.assert_allclose(zero.sample_v_launch, static.sample_v_launch, rtol=1e-10)
    for name in TRACE_COLUMNS:
        if name not in ("id", "ra", "dec", "distance"):
            np.testing.assert_allclose(getattr(zero, name), getattr(static, name), rtol=1e-6, atol=1e-6,
                                       err_msg=name)


def _mixed_population(galaxy, track, n_each, seed):
    """Present states of stars launched from the Galactic Centre and from the LMC's centre (in
    swerve's own LMC-perturbed Galaxy) and of halo stars, with 5-10% scatter: (m, 3) arrays."""
    rng = np.random.default_rng(seed)
    d = rng.normal(size=(n_each, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    t_gc = -rng.uniform(10.0, 250.0, n_each)
    gc = integrate_lmc(galaxy, track, 0.003 * d, rng.uniform(600.0, 1800.0, (n_each, 1)) * d, t_gc)
    t_l = -rng.uniform(10.0, 250.0, n_each)
    X, V = track.interpolate(t_l)
    e = rng.normal(size=(n_each, 3))
    e /= np.linalg.norm(e, axis=1)[:, None]
    lm = integrate_lmc(galaxy, track, X + 0.003 * e, V + rng.uniform(400.0, 1500.0, (n_each, 1)) * e, t_l)
    halo_pos = rng.normal(size=(n_each, 3)) * 40.0
    halo_vel = rng.normal(size=(n_each, 3)) * 150.0
    pos = np.concatenate([gc.pos, lm.pos, halo_pos])
    vel = np.concatenate([gc.vel, lm.vel, halo_vel])
    pos = pos * (1.0 + rng.normal(size=(len(pos), 1)) * 0.05)
    vel = vel + rng.normal(size=vel.shape) * 0.1 * np.linalg.norm(vel, axis=1, keepdims=True) / math.sqrt(3)
    return pos, vel


def _check_early_stop_changes_nothing(galaxy, n_each, seed, max_time):
    track = lmc_orbit(galaxy, t_min=-max_time)
    pos, vel = _mixed_population(galaxy, track, n_each, seed)
    pos, vel = pos[:, None, :], vel[:, None, :]
    early = trace_orbits(galaxy, pos, vel, lmc=track, max_time=max_time)
    full = trace_orbits(galaxy, pos, vel, lmc=track, max_time=max_time, early_stop=False)
    stopped = early.sample_stop_reason == STOP_NO_RETURN
    assert stopped.mean() > 0.2 and not np.any(full.sample_stop_reason == STOP_NO_RETURN)
    assert np.array_equal(early.sample_pass, full.sample_pass)
    assert np.array_equal(early.sample_pass_lmc, full.sample_pass_lmc)
    assert 0.05 < full.sample_pass.mean() < 0.9 and 0.05 < full.sample_pass_lmc.mean() < 0.9
    # the closest approaches to both centres were already behind the stopped paths: to the
    # Galactic Centre always; to the LMC's centre for every path that comes within 3 LMC radii of
    # it. Far from the LMC the rule is an approximation (the Milky Way's tide on the star and the
    # LMC): measured, 2 of 9000 paths of the large check have a later, closer approach at ~100 kpc.
    np.testing.assert_allclose(early.sample_r_min, full.sample_r_min, rtol=1e-9)
    near = full.sample_d_lmc_min < 3.0 * early.meta["lmc_radius_kpc"]
    assert near.sum() > 0.1 * near.size
    np.testing.assert_allclose(early.sample_d_lmc_min[near], full.sample_d_lmc_min[near], rtol=1e-9)
    np.testing.assert_allclose(early.sample_t_lmc_min[near], full.sample_t_lmc_min[near], rtol=1e-9, atol=1e-9)
    differ = ~np.isclose(early.sample_d_lmc_min, full.sample_d_lmc_min, rtol=1e-9, atol=0.0)
    assert differ.mean() < 1e-3
    return stopped.mean()


def test_early_stop_changes_no_result(galaxy):
    """Paths stopped by the no-return rule (receding, unbound, from both centres) have the same
    pass flags and closest approaches as the same paths integrated for the full max_time."""
    _check_early_stop_changes_nothing(galaxy, 60, 2, 800.0)


@pytest.mark.slow
def test_early_stop_changes_no_result_large(galaxy):
    frac = _check_early_stop_changes_nothing(galaxy, 3000, 3, 1000.0)
    assert frac > 0.2


# ------------------------------------------------------------------- command line ---
def test_cli_lmc_finds_an_lmc_star(galaxy, tmp_path, capsys):
    """`swerve trace --lmc`: a star launched from the LMC's centre (in the LMC-perturbed default
    Galaxy with the track the command makes itself) and a Galactic-Centre star; table columns,
    units, descriptions, meta, summary and the two-panel plot."""
    m_lmc = 1.2e11
    track = lmc_orbit(galaxy, LMC(m_lmc=m_lmc), t_min=-300.0)
    X, V = track.interpolate(-120.0)
    kick = 700.0 * np.array([0.0, 0.6, 0.8])
    star = integrate_lmc(galaxy, track, X + 0.003 * kick / 700.0, V + kick, -120.0)
    d = np.array([0.5, -0.3, 0.81]) / np.linalg.norm([0.5, -0.3, 0.81])
    gc = integrate_lmc(galaxy, track, 0.003 * d, 1100.0 * d, -60.0)
    path = catalog_from_galacto(tmp_path / "two.ecsv", np.vstack([star.pos, gc.pos]), np.vstack([star.vel, gc.vel]))
    out, plot = tmp_path / "t.ecsv", tmp_path / "t.png"
    rc = main(["trace", str(path), "--lmc-mass", f"{m_lmc:g}", "--lmc-radius", "3", "--max-time", "300",
               "--samples", "8", "--out", str(out), "--plot", str(plot), "--no-progress"])
    text = capsys.readouterr().out
    assert rc == 0
    t = Table.read(out)
    names = list(TRACE_COLUMNS)
    i = names.index("r_min") + 1
    assert t.colnames == names[:i] + list(LMC_TRACE_COLUMNS) + names[i:]
    for name, (unit, desc) in LMC_TRACE_COLUMNS.items():
        assert str(t[name].unit or "") == unit and t[name].description == desc
    assert t["p_lmc"].tolist() == [1.0, 0.0] and t["p_origin"].tolist() == [0.0, 1.0]
    assert t["t_flight_lmc"][0] == pytest.approx(120.0, abs=0.05)
    assert t["v_eject_lmc"][0] == pytest.approx(700.0, rel=2e-3)
    assert t["t_flight"][1] == pytest.approx(60.0, abs=0.05)
    assert t["v_launch"][1] == pytest.approx(1100.0, rel=1e-3)
    assert t.meta["lmc"]["lmc"]["m_lmc"] == m_lmc and t.meta["lmc_radius_kpc"] == 3.0
    assert t.meta["lmc"]["friction"] and t.meta["lmc"]["reflex"] and t.meta["early_stop"]
    assert "P_LMC" in text and "within 3 kpc of the LMC's centre" in text and "m_lmc 1.2e+11" in text
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"


def test_cli_default_lmc_on_the_demo(tmp_path, monkeypatch, capsys):
    """`--lmc` alone: the published default mass (Erkal et al. 2019: 1.38e11 Msun) and radius."""
    monkeypatch.chdir(tmp_path)
    t = Table.read(DEMO)[:12]
    t.write(tmp_path / "few.ecsv")
    assert main(["trace", "few.ecsv", "--lmc", "--samples", "6", "--max-time", "400", "--no-progress"]) == 0
    table = Table.read(tmp_path / "trace-few.ecsv")
    assert table.meta["lmc"]["lmc"]["m_lmc"] == 1.38e11 and table.meta["lmc_radius_kpc"] == 5.0
    p = np.asarray(table["p_lmc"])
    assert np.all((p >= 0) & (p <= 1)) and np.all(np.isnan(table["t_flight_lmc"]) == (table["n_pass_lmc"] == 0))
    assert (tmp_path / "trace-few.png").exists()
    assert "P_LMC > 0.5" in capsys.readouterr().out


@pytest.mark.parametrize("extra, message", [
    (["--lmc-mass", "3e11"], "--lmc-mass 3e+11: parameter m_lmc = 3e+11 is outside its allowed range"),
    (["--lmc", "--lmc-mass", "nan"], "--lmc-mass nan: parameter m_lmc: expected a finite number"),
    (["--lmc-radius", "-2"], "--lmc-radius -2.0: expected a positive number"),
])
def test_bad_lmc_options_are_one_line_errors(tmp_path, monkeypatch, capsys, extra, message):
    monkeypatch.chdir(tmp_path)
    assert main(["trace", str(DEMO), "--no-progress", *extra]) == 1
    err = capsys.readouterr().err
    assert message in err and len(err.strip().splitlines()) == 1, err
    assert list(tmp_path.iterdir()) == []


def test_bad_lmc_arguments_of_the_api(galaxy):
    pos, vel = np.full((1, 2, 3), 20.0), np.full((1, 2, 3), 300.0)
    with pytest.raises(ValueError, match="lmc: expected None, True, a swerve.galaxy.lmc.LMC or an LMCTrack"):
        trace_orbits(galaxy, pos, vel, lmc="yes")
    with pytest.raises(ValueError, match="short of max_time 1000 Myr"):
        trace_orbits(galaxy, pos, vel, lmc=lmc_orbit(galaxy, t_min=-100.0))
    with pytest.raises(ValueError, match="lmc_radius: expected a positive"):
        trace_orbits(galaxy, pos, vel, lmc=True, lmc_radius=0.0, max_time=10.0)
