"""Shared test fixtures."""

from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


@pytest.fixture
def rng():
    return np.random.default_rng(20261201)


@pytest.fixture(scope="session")
def smoke_run(tmp_path_factory):
    """training/smoke.toml trained once per test session (about 10-20 s on 2 cores):
    returns (run_dir, emulator_dir)."""
    from swerve.cli import main

    run_dir = tmp_path_factory.mktemp("smoke") / "run"
    rc = main(["train", str(ROOT / "training" / "smoke.toml"), "--out", str(run_dir), "--no-progress", "--jobs", "2"])
    if rc != 0:
        raise RuntimeError("swerve train training/smoke.toml failed")
    return run_dir, run_dir / "emulator"


def galpy_lmc_reference(galaxy, t_back, n_orbit, n_force):
    """The LMC-perturbed Galaxy in galpy, the outside reference of tests/test_lmc.py and
    tests/test_trace_lmc.py: the static Galaxy's components, the LMC as a MovingObjectPotential on
    an orbit galpy integrates back ``t_back`` Myr from its present state (``n_orbit`` output
    times), the Milky Way's reflex as a NonInertialFrameForce whose a0 is the LMC's pull on the
    Galactic Centre (a cubic spline through ``n_force`` times). Returns a dict: ``mw`` (the static
    potentials), ``pot`` (all of it), ``lmc_orbit`` (galpy's Orbit), ``track`` (the same LMC orbit
    tabulated every Myr as swerve's LMCTrack, no friction, with the reflex), ``to_galpy`` (a
    Galactocentric position and velocity as galpy's [R, vR, vT, z, vz, phi]), ``ro``, ``vo``."""
    import math

    import astropy.units as u
    from galpy.orbit import Orbit
    from galpy.potential import (
        HernquistPotential,
        KeplerPotential,
        MiyamotoNagaiPotential,
        MovingObjectPotential,
        NFWPotential,
        NonInertialFrameForce,
        PlummerPotential,
    )
    from galpy.util import conversion
    from scipy.interpolate import CubicSpline

    from swerve import units
    from swerve.galaxy.lmc import LMC, LMCTrack, hernquist_acceleration

    ro, vo = 8.0, 220.0
    p = galaxy.params
    bulge = (PlummerPotential(amp=p["m_bulge"] * u.Msun, b=p["b_bulge"] * u.kpc, ro=ro, vo=vo)
             if "b_bulge" in p else
             HernquistPotential(amp=2 * p["m_bulge"] * u.Msun, a=p["a_bulge"] * u.kpc, ro=ro, vo=vo))
    mw = [KeplerPotential(amp=p["m_bh"] * u.Msun, ro=ro, vo=vo),
          bulge,
          MiyamotoNagaiPotential(amp=p["m_disk"] * u.Msun, a=p["a_disk"] * u.kpc, b=p["b_disk"] * u.kpc,
                                 ro=ro, vo=vo),
          NFWPotential(amp=p["m_halo"] * u.Msun, a=p["r_s"] * u.kpc, ro=ro, vo=vo)]

    def to_galpy(x, v):
        R = math.hypot(x[0], x[1])
        return [R / ro, (x[0] * v[0] + x[1] * v[1]) / R / vo, (x[0] * v[1] - x[1] * v[0]) / R / vo,
                x[2] / ro, v[2] / vo, math.atan2(x[1], x[0])]

    def positions(t):
        return np.stack([o.x(t * u.Myr), o.y(t * u.Myr), o.z(t * u.Myr)], axis=1)

    lmc = LMC()
    x0, v0 = lmc.present_state()
    o = Orbit(to_galpy(x0, v0), ro=ro, vo=vo)
    o.integrate(np.linspace(0.0, -t_back, n_orbit) * u.Myr, mw, method="dop853_c")
    tg = np.arange(-t_back, 1e-9, 1.0)
    X = positions(tg)
    V = np.stack([o.vx(tg * u.Myr), o.vy(tg * u.Myr), o.vz(tg * u.Myr)], axis=1)
    track = LMCTrack(t=tg, pos=X, vel=V, acc=galaxy.acceleration(X),
                     gc_acc=hernquist_acceleration(-X, lmc.gm, lmc.a_lmc), gc_vel=np.zeros_like(X),
                     lmc=lmc, friction=False, reflex=True, galaxy=galaxy.to_dict(), solar={})
    tu = conversion.time_in_Gyr(vo, ro) * 1000.0
    fu = conversion.force_in_kmsMyr(vo, ro)
    tf = np.linspace(-t_back, 0.0, n_force)
    a0 = CubicSpline(tf / tu, hernquist_acceleration(-positions(tf), lmc.gm, lmc.a_lmc) * units.KMS_TO_KPC_PER_MYR / fu)
    frame = NonInertialFrameForce(a0=[lambda t, k=k: a0(t)[..., k] for k in range(3)], ro=ro, vo=vo)
    moving = MovingObjectPotential(o, HernquistPotential(amp=2 * lmc.m_lmc * u.Msun, a=lmc.a_lmc * u.kpc,
                                                         ro=ro, vo=vo), ro=ro, vo=vo)
    return {"mw": mw, "pot": mw + [moving, frame], "lmc_orbit": o, "track": track, "to_galpy": to_galpy,
            "ro": ro, "vo": vo}


def catalog_from_galacto(path, pos, vel, *, dist_frac=1e-5, pm_err=1e-6, vlos_err=1e-3):
    """An ECSV catalog of stars with the given Galactocentric phase-space points, tiny errors."""
    from astropy.table import Table

    from swerve.frames import galacto_to_helio

    h = galacto_to_helio(np.atleast_2d(pos), np.atleast_2d(vel))
    n = len(h["ra"])
    t = Table()
    t["id"] = [f"s{i}" for i in range(n)]
    t["ra"], t["dec"] = h["ra"], h["dec"]
    t["ra"].unit = t["dec"].unit = "deg"
    t["distance"], t["distance_err"] = h["distance"], dist_frac * h["distance"]
    t["distance"].unit = t["distance_err"].unit = "kpc"
    for name in ("pmra", "pmdec"):
        t[name], t[f"{name}_err"] = h[name], np.full(n, pm_err)
        t[name].unit = t[f"{name}_err"].unit = "mas / yr"
    t["vlos"], t["vlos_err"] = h["vlos"], np.full(n, vlos_err)
    t["vlos"].unit = t["vlos_err"].unit = "km / s"
    t.write(path, format="ascii.ecsv", overwrite=True)
    return path
