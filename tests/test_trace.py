"""swerve trace: back-integration of candidates, checked against analytic results and the
forward model (stars launched from the Galactic Centre by swerve.population.make_mock)."""

import argparse
from pathlib import Path

import numpy as np
import pytest
from astropy.table import Table

from conftest import catalog_from_galacto
from swerve.catalog import read_catalog
from swerve.cli import build_parser, main
from swerve.galaxy import Galaxy
from swerve.measurement import draw_samples
from swerve.trace import (
    TRACE_COLUMNS,
    trace_catalog,
    trace_orbits,
    trace_samples,
    weighted_quantile,
)

DEMO = Path(__file__).resolve().parents[1] / "examples" / "demo.ecsv"
ZERO_MASS = {"m_bh": 0.0, "m_bulge": 0.0, "m_disk": 0.0, "m_halo": 0.0}
MYR_PER_KPC_KMS = 977.792221  # 1 kpc / (1 km/s) in Myr (astropy units; common knowledge)


# ----------------------------------------------------------------------------- statistics ---
def test_weighted_quantile_equal_weights_is_numpy_hazen():
    x = np.random.default_rng(3).normal(size=37)
    q = np.array([0.0, 0.16, 0.5, 0.84, 1.0])
    assert np.allclose(weighted_quantile(x, np.ones_like(x), q), np.quantile(x, q, method="hazen"), rtol=0, atol=1e-14)
    # a dominant weight pulls the median onto its point; zero weights are ignored
    w = np.full(37, 1e-9)
    w[5] = 1.0
    assert weighted_quantile(x, w, 0.5) == pytest.approx(x[5], abs=1e-6)
    assert np.isnan(weighted_quantile(x, np.zeros_like(x), 0.5))
    with pytest.raises(ValueError, match="non-negative"):
        weighted_quantile(x, -np.ones_like(x), 0.5)


# ------------------------------------------------------------------------ analytic checks ---
def test_zero_mass_galaxy_paths_are_straight_lines():
    """No mass: backward paths are straight lines, closest approach at t = -x.v/|v|^2 and
    distance |x cross v|/|v|; the launch speed is the present speed; everything is unbound."""
    g = Galaxy.default(**ZERO_MASS)
    rng = np.random.default_rng(11)
    n, k = 3, 40
    pos = rng.normal(size=(n, k, 3)) * 20.0
    vel = pos / np.linalg.norm(pos, axis=-1, keepdims=True) * rng.uniform(300, 900, (n, k, 1))
    vel += rng.normal(size=(n, k, 3)) * 15.0  # off-radial: closest approaches of ~0.1-2 kpc
    res = trace_orbits(g, pos, vel, radius=1.0, max_time=2000.0)
    xv = np.sum(pos * vel, axis=-1)
    v2 = np.sum(vel * vel, axis=-1)
    t_exact = xv / v2 * MYR_PER_KPC_KMS
    b_exact = np.linalg.norm(np.cross(pos, vel), axis=-1) / np.sqrt(v2)
    assert np.all(xv > 0) and np.all(t_exact < 2000.0)
    assert np.allclose(res.sample_r_min, b_exact, rtol=1e-8, atol=1e-10)
    assert np.array_equal(res.sample_pass, b_exact < 1.0)
    passing = res.sample_pass
    assert passing.sum() > 20 and (~passing).sum() > 20
    assert np.allclose(res.sample_t_flight[passing], t_exact[passing], rtol=1e-8)
    assert np.allclose(res.sample_v_launch, np.sqrt(v2), rtol=1e-12)
    assert np.all(res.p_unbound == 1.0)
    assert np.allclose(res.p_origin, np.mean(b_exact < 1.0, axis=1), rtol=0, atol=1e-12)


def test_zero_mass_galaxy_flight_time_is_distance_over_speed(tmp_path):
    """Through the command line: radial stars in a massless Galaxy, flight time r / v."""
    r = np.array([15.0, 40.0])
    u = np.array([[0.3, 0.5, 0.81], [-0.6, 0.2, -0.77]])
    u /= np.linalg.norm(u, axis=1, keepdims=True)
    speed = np.array([600.0, 1100.0])
    path = catalog_from_galacto(tmp_path / "radial.ecsv", r[:, None] * u, speed[:, None] * u)
    args = ["trace", str(path), "--samples", "32", "--out", str(tmp_path / "t.ecsv"), "--no-plot", "--no-progress"]
    for name, value in ZERO_MASS.items():
        args += ["--param", f"{name}={value:g}"]
    assert main(args) == 0
    t = Table.read(tmp_path / "t.ecsv")
    assert np.all(t["p_origin"] == 1.0)
    assert np.allclose(t["t_flight"], r / speed * MYR_PER_KPC_KMS, rtol=1e-4)
    assert np.allclose(t["v_launch"], speed, rtol=1e-4)
    assert t.meta["galaxy"]["components"][0]["params"]["m_bh"] == 0.0


def test_circular_disk_orbit_has_no_galactic_centre_origin(tmp_path):
    """A star on a circular orbit in the plane (v = v_c(R)) never comes near the centre."""
    g = Galaxy.default()
    R, phi = 12.0, 2.3
    vc = float(g.circular_velocity(R)[0])
    pos = np.array([R * np.cos(phi), R * np.sin(phi), 0.0])
    vel = vc * np.array([np.sin(phi), -np.cos(phi), 0.0])  # the Sun's sense of rotation (+y at x < 0)
    path = catalog_from_galacto(tmp_path / "disk.ecsv", pos, vel, dist_frac=0.02, pm_err=0.02, vlos_err=2.0)
    res = trace_catalog(read_catalog(path), g, k=48, rng=4, max_time=500.0)
    assert res.p_origin[0] == 0.0 and res.n_pass[0] == 0 and np.isnan(res.t_flight[0])
    assert res.r_min[0] == pytest.approx(R, rel=0.1)
    assert res.p_unbound[0] == 0.0


def test_backward_path_matches_gala():
    """Closest approach and its time against gala's DOP853 in the same potential (gala's
    Kepler + Hernquist + Miyamoto-Nagai + NFW; NFW's m is the scale mass of Phi = -G m ln(1+r/r_s)/r)."""
    u = pytest.importorskip("astropy.units")
    gp = pytest.importorskip("gala.potential")
    gd = pytest.importorskip("gala.dynamics")
    from gala.integrate import DOPRI853Integrator
    from gala.units import galactic

    g = Galaxy.from_name("swerve-mw-1")
    pot = gp.CCompositePotential(
        bh=gp.KeplerPotential(m=4e6, units=galactic), bulge=gp.HernquistPotential(m=3.4e10, c=0.7, units=galactic),
        disk=gp.MiyamotoNagaiPotential(m=1e11, a=6.5, b=0.26, units=galactic),
        halo=gp.NFWPotential(m=0.76e12, r_s=24.8, units=galactic))
    x = np.array([8.0, -12.0, 25.0])
    v = 900.0 * x / np.linalg.norm(x) + np.array([6.0, 4.0, 0.0])
    res = trace_orbits(g, x[None, None], v[None, None], max_time=200.0)
    t_ours, r_ours = float(res.sample_t_flight[0, 0]), float(res.sample_r_min[0, 0])
    orb = gp.Hamiltonian(pot).integrate_orbit(
        gd.PhaseSpacePosition(pos=x * u.kpc, vel=v * u.km / u.s), dt=-0.005 * u.Myr, t1=0.0,
        t2=-(t_ours + 2.0) * u.Myr, Integrator=DOPRI853Integrator, Integrator_kwargs={"rtol": 1e-11, "atol": 1e-13})
    r = np.linalg.norm(orb.xyz.to_value(u.kpc), axis=0)
    t = orb.t.to_value(u.Myr)
    i = int(np.argmin(r))
    a, b, c = np.polyfit(t[i - 1:i + 2], r[i - 1:i + 2], 2)  # parabola through the grid minimum
    assert -b / (2 * a) == pytest.approx(-t_ours, abs=1e-4)
    assert c - b * b / (4 * a) == pytest.approx(r_ours, rel=1e-4)
    assert 0.1 < r_ours < 0.5
    # implied launch speed at 3 pc with gala's potential
    def phi(p):
        return float(pot.energy(np.asarray(p)[:, None] * u.kpc).to_value(u.km**2 / u.s**2)[0])

    v_l = np.sqrt(v @ v + 2.0 * (phi(x) - phi(0.003 * x / np.linalg.norm(x))))
    assert float(res.sample_v_launch[0, 0]) == pytest.approx(v_l, rel=1e-9)


# --------------------------------------------------------------------- the forward model ---
@pytest.fixture(scope="module")
def launched(tmp_path_factory):
    """Stars launched radially from 3 pc by the forward model, observed with tiny errors."""
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock, write_mock
    from swerve.selection import Selection

    g = Galaxy.default(q_z=0.9)
    errors = ErrorModel(distance_frac=ErrorLaw(1e-4), pm=ErrorLaw(1e-4), vlos=ErrorLaw(0.05))
    t = make_mock(g, BoundedPowerLawSpeed(800.0, 2000.0, 0.0), Selection(r_min=10.0, r_max=60.0, outgoing=True),
                  errors, 5, 3, include_truth=True, bank_size=256, bank_options={"t_max": 150.0, "dt": 1.0})
    path = tmp_path_factory.mktemp("launched") / "launched.ecsv"
    write_mock(t, path)
    return g, path, t


def test_star_launched_from_the_centre_traces_back_with_its_flight_time(launched):
    g, path, t = launched
    res = trace_catalog(read_catalog(path), g, k=40, rng=8)
    assert np.all(res.p_origin == 1.0) and np.all(res.n_failed == 0)
    true_t = np.asarray(t["true_t_flight"])
    # flight time since the closest approach = time since launch + ~3 pc / v (< 0.005 Myr here)
    assert np.allclose(res.t_flight, true_t, rtol=2e-3, atol=0.01)
    assert np.all(res.t_flight_hi - res.t_flight_lo < 0.01 * true_t + 0.02)
    # implied launch speed at 3 pc (energy conservation) against the forward model's launch speed
    assert np.allclose(res.v_launch, np.asarray(t["true_v_launch"]), rtol=2e-3)
    assert np.all(res.r_min < 0.05)
    true_pos = np.stack([t["true_x"], t["true_y"], t["true_z"]], axis=1)
    true_speed = np.linalg.norm(np.stack([t["true_vx"], t["true_vy"], t["true_vz"]], axis=1), axis=1)
    margin = true_speed - g.escape_speed(true_pos)
    clear = np.abs(margin) > 1.0  # km/s; the samples scatter by ~0.05 km/s
    assert clear.sum() >= 3
    assert np.array_equal(res.p_unbound[clear], (margin[clear] > 0).astype(float))


def test_noiseless_radial_paths_through_the_point_mass_are_kept():
    """The exact truth of a mock passes ~1e-9 kpc from the point mass, where the integrator
    may give up with a step underflow: such a path has reached the centre and is kept."""
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock
    from swerve.selection import Selection

    g = Galaxy.default()
    t = make_mock(g, BoundedPowerLawSpeed(800.0, 2000.0, 0.0), Selection(r_min=10.0, r_max=60.0, outgoing=True),
                  ErrorModel(distance_frac=ErrorLaw(0.1)), 6, 3, include_truth=True, bank_size=256,
                  bank_options={"t_max": 150.0, "dt": 1.0})
    pos = np.stack([t["true_x"], t["true_y"], t["true_z"]], axis=1)[:, None, :]
    vel = np.stack([t["true_vx"], t["true_vy"], t["true_vz"]], axis=1)[:, None, :]
    res = trace_orbits(g, pos, vel)
    assert np.all(res.usable) and np.all(res.p_origin == 1.0)
    assert np.allclose(res.t_flight, t["true_t_flight"], rtol=1e-3, atol=0.01)


# ------------------------------------------------------------------------------- weights ---
def test_weights_are_the_distance_prior_weights_without_the_jacobian(tmp_path):
    t = Table.read(DEMO)[:3]
    for name in ("distance", "distance_err"):
        t.remove_column(name)
    t["parallax"] = [0.08, 0.05, 0.12]
    t["parallax_err"] = [0.02, 0.02, 0.03]
    t["parallax"].unit = t["parallax_err"].unit = "mas"
    t.write(tmp_path / "plx.ecsv")
    cat = read_catalog(tmp_path / "plx.ecsv")
    s = draw_samples(cat, 30, np.random.default_rng(2), distance_prior="exponential-length")
    res = trace_samples(Galaxy.default(), s, max_time=300.0)
    expected = np.exp(s.log_prior - s.log_prior.max(axis=1, keepdims=True))
    expected /= expected.sum(axis=1, keepdims=True)
    assert np.allclose(res.weights, expected, rtol=1e-12)
    assert not np.allclose(res.weights, s.weights(), rtol=1e-3)
    assert res.meta["distance_prior"] == "exponential-length"
    assert res.distance == pytest.approx([weighted_quantile(s.distance[i], expected[i], 0.5) for i in range(3)])


# -------------------------------------------------------------------- the command line ---
def test_trace_help_documents_every_option(capsys):
    parser = build_parser()
    sub = next(a for a in parser._actions if a.__class__.__name__ == "_SubParsersAction").choices["trace"]
    with pytest.raises(SystemExit) as exc:
        main(["trace", "--help"])
    assert exc.value.code == 0
    text = capsys.readouterr().out
    options = [s for a in sub._actions for s in a.option_strings if s.startswith("--")]
    for needed in ("--param", "--halo-flattening", "--samples", "--radius", "--max-time", "--out", "--plot",
                   "--columns", "--units", "--drop-invalid", "--seed", "--distance-prior", "--solar", "--lmc",
                   "--lmc-mass", "--lmc-radius"):
        assert needed in options
    for a in sub._actions:
        if a.option_strings and a.help != argparse.SUPPRESS:  # hidden: deprecated old spellings
            assert a.help and all(s in text for s in a.option_strings), a.option_strings
    assert "--galaxy-param" in options and "--galaxy-param" not in text  # the old spelling, hidden


def test_bad_catalog_reports_every_problem_and_writes_nothing(tmp_path, capsys):
    bad = tmp_path / "bad.csv"
    bad.write_text(
        "id,ra,dec,distance,distance_err,pmra,pmra_err,pmdec,pmdec_err,vlos,vlos_err\n"
        "a,400,10,20,2,0.1,0.01,0.1,0.01,500,5\n"
        "b,10,95,20,-2,0.1,0.01,0.1,0.01,500,5\n"
        "c,10,10,20,2,0.1,0.01,0.1,0.01,oops,5\n"
    )
    out, plot = tmp_path / "t.ecsv", tmp_path / "t.png"
    rc = main(["trace", str(bad), "--out", str(out), "--plot", str(plot), "--no-progress"])
    err = capsys.readouterr().err
    assert rc == 1
    lines = [ln for ln in err.splitlines() if ln.startswith("swerve trace: error:")]
    assert len(lines) == 4, err
    for row, column in ((1, "ra"), (2, "dec"), (2, "distance_err"), (3, "vlos")):
        assert any(f"row {row}" in ln and f"'{column}'" in ln for ln in lines), (row, column, err)
    assert sorted(p.name for p in tmp_path.iterdir()) == ["bad.csv"]


def test_trace_demo_writes_table_and_plot(tmp_path, monkeypatch, capsys):
    monkeypatch.chdir(tmp_path)
    rc = main(["trace", str(DEMO), "--samples", "12", "--seed", "5", "--param", "q_z=0.9", "--top", "5",
               "--no-progress"])
    text = capsys.readouterr().out
    assert rc == 0
    table, plot = tmp_path / "trace-demo.ecsv", tmp_path / "trace-demo.png"
    assert plot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    t = Table.read(table)
    assert t.colnames == list(TRACE_COLUMNS) and len(t) == len(Table.read(DEMO))
    assert str(t["t_flight"].unit) == "Myr" and str(t["v_launch"].unit) == "km / s" and str(t["r_min"].unit) == "kpc"
    assert t.meta["samples_per_star"] == 12 and t.meta["seed"] == 5 and t.meta["solar"]["name"] == "v4.0"
    assert t.meta["galaxy"]["components"][3]["params"]["q_z"] == 0.9 and t.meta["swerve_version"]
    p = np.asarray(t["p_origin"])
    assert np.all((p >= 0) & (p <= 1)) and np.all(np.isnan(t["t_flight"]) == (t["n_pass"] == 0))
    assert "P_origin > 0.5" in text and "more stars in the table" in text
    # reproducible: the same seed gives the same table; the deprecated --galaxy-param still works
    assert main(["trace", str(DEMO), "--samples", "12", "--seed", "5", "--galaxy-param", "q_z=0.9",
                 "--out", "again.ecsv", "--no-plot", "--no-progress"]) == 0
    assert "--galaxy-param is deprecated; use --param" in capsys.readouterr().err
    again = Table.read(tmp_path / "again.ecsv")
    assert np.array_equal(np.asarray(again["t_flight"]), np.asarray(t["t_flight"]), equal_nan=True)


def test_bad_arguments_are_refused_with_one_line(tmp_path, capsys, monkeypatch):
    monkeypatch.chdir(tmp_path)
    g = Galaxy.default()
    pos, vel = np.ones((2, 3, 3)) * 10.0, np.ones((2, 3, 3)) * 300.0
    with pytest.raises(ValueError, match="radius: expected a positive"):
        trace_orbits(g, pos, vel, radius=-1.0)
    with pytest.raises(ValueError, match=r"pos: expected an array of shape \(n, k, 3\)"):
        trace_orbits(g, pos[0], vel[0])
    with pytest.raises(ValueError, match=r"weights: expected shape \(2, 3\)"):
        trace_orbits(g, pos, vel, np.ones(3))
    for extra, message in ((["--radius", "-1"], "--radius -1.0: expected a positive number"),
                           (["--samples", "0"], "--samples 0"),
                           (["--param", "q_w=1"], "unknown Galaxy parameter"),
                           (["--out", str(tmp_path / "t.csv")], "expected a file name ending in .ecsv")):
        assert main(["trace", str(DEMO), "--no-progress", "--no-plot", *extra]) == 1
        err = capsys.readouterr().err
        assert message in err and len(err.strip().splitlines()) == 1, err
    assert list(tmp_path.iterdir()) == []
