"""Benchmark of the batch orbit engine (swerve.orbits) on the standard HVS workload, side by side
with gala's and galpy's compiled DOP853 integrators when they are installed.

Standard workload: N orbits launched radially from 3 pc in isotropic directions, speeds uniform in
800-2500 km/s, flight times uniform in 0-300 Myr, in Galaxy.default(q_z=0.8).

Side by side: the same initial conditions, every orbit to a common 300 Myr (gala and galpy
integrate a batch to one shared time grid), each library at the loosest tolerance of a ladder
that gives max |dE|/|Phi(r0)| <= 1e-10, one core each.  galpy has no potential-flattened NFW
halo, so its comparison runs in the spherical halo (q_z = 1) and swerve is rerun there for the
ratio.

Usage::

    python benchmarks/orbits.py [--n 2000] [--flattening {potential,density}] [--seed 1]
                                [--repeat 3] [--no-gala] [--no-galpy]

This is a script, not a test: it prints a report and exits 0.
"""

from __future__ import annotations

import argparse
import os
import platform
import time
import warnings

import numba
import numpy as np

from swerve import orbits
from swerve.galaxy import Galaxy, NegativeDensityWarning

ENERGY_TARGET = 1e-10
LADDER = (1e-9, 5e-10, 2e-10, 1e-10, 5e-11, 2e-11, 1e-11, 5e-12, 2e-12, 1e-12, 5e-13, 2e-13, 1e-13)


def workload(n, seed):
    rng = np.random.default_rng(seed)
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    v = rng.uniform(800.0, 2500.0, n)
    return 0.003 * d, v[:, None] * d, rng.uniform(0.0, 300.0, n)


def make_galaxy(flattening, q_z=0.8):
    try:
        return Galaxy.default(q_z=q_z, halo_flattening=flattening)
    except ValueError as exc:
        print(f"halo_flattening={flattening!r} is not available yet: {exc}")
        return None


def energy_error(galaxy, pos0, vel0, pos, vel):
    phi0 = galaxy.potential(pos0)
    e0 = 0.5 * np.sum(vel0**2, 1) + phi0
    e1 = 0.5 * np.sum(vel**2, 1) + galaxy.potential(pos)
    return np.abs(e1 - e0) / np.abs(phi0), np.abs((e1 - e0) / e0)


def best_time(fn, repeat):
    best = np.inf
    out = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def run_swerve(galaxy, pos0, vel0, t_end, rtol, repeat, threads):
    numba.set_num_threads(threads)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NegativeDensityWarning)
        dt, res = best_time(lambda: orbits.integrate(galaxy, pos0, vel0, t_end, rtol=rtol), repeat)
    if not res.ok.all():
        raise RuntimeError(res.failure_summary())
    return dt, res


def swerve_at_target(galaxy, pos0, vel0, t_end, repeat):
    for rtol in LADDER:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", NegativeDensityWarning)
            res = orbits.integrate(galaxy, pos0, vel0, t_end, rtol=rtol)
        if res.energy_error.max() <= ENERGY_TARGET:
            dt, res = run_swerve(galaxy, pos0, vel0, t_end, rtol, repeat, 1)
            return rtol, dt, res.energy_error.max()
    return None


def gala_potential(galaxy):
    import gala.potential as gp
    from gala.units import galactic

    p = galaxy.params
    pot = gp.CompositePotential()
    pot["bh"] = gp.KeplerPotential(m=p["m_bh"], units=galactic)
    pot["bulge"] = gp.HernquistPotential(m=p["m_bulge"], c=p["a_bulge"], units=galactic)
    pot["disk"] = gp.MiyamotoNagaiPotential(m=p["m_disk"], a=p["a_disk"], b=p["b_disk"], units=galactic)
    pot["halo"] = gp.NFWPotential(m=p["m_halo"], r_s=p["r_s"], a=1.0, b=p["q_y"], c=p["q_z"],
                                  units=galactic)
    return pot


def run_gala(galaxy, pos0, vel0, t_end, repeat):
    import astropy.units as u
    import gala.dynamics as gd
    import gala.integrate as gi
    import gala.potential as gp

    H = gp.Hamiltonian(gala_potential(galaxy))
    w0 = gd.PhaseSpacePosition(pos=pos0.T * u.kpc, vel=vel0.T * u.km / u.s)

    def go(rtol):
        orbit = H.integrate_orbit(w0, t=[0.0, t_end] * u.Myr, Integrator=gi.DOPRI853Integrator,
                                  Integrator_kwargs=dict(rtol=rtol, atol=rtol * 1e-3))
        return (orbit.xyz[:, -1].to_value(u.kpc).T, orbit.v_xyz[:, -1].to_value(u.km / u.s).T)

    for rtol in LADDER:
        pos, vel = go(rtol)
        de, _ = energy_error(galaxy, pos0, vel0, pos, vel)
        if de.max() <= ENERGY_TARGET:
            dt, _ = best_time(lambda r=rtol: go(r), repeat)
            return rtol, dt, de.max()
    return None


def run_galpy(galaxy, pos0, vel0, t_end, repeat):
    import astropy.units as u
    import galpy.potential as gpp
    from galpy.orbit import Orbit

    p = galaxy.params
    ro, vo = 8.0, 220.0
    kw = dict(ro=ro, vo=vo)
    pot = [
        gpp.KeplerPotential(amp=p["m_bh"] * u.Msun, **kw),
        # galpy's Hernquist amplitude is twice the total mass
        gpp.HernquistPotential(amp=2.0 * p["m_bulge"] * u.Msun, a=p["a_bulge"] * u.kpc, **kw),
        gpp.MiyamotoNagaiPotential(amp=p["m_disk"] * u.Msun, a=p["a_disk"] * u.kpc,
                                   b=p["b_disk"] * u.kpc, **kw),
        gpp.NFWPotential(amp=p["m_halo"] * u.Msun, a=p["r_s"] * u.kpc, **kw),
    ]
    x, y, z = pos0.T
    vx, vy, vz = vel0.T
    R = np.hypot(x, y)
    phi = np.arctan2(y, x)
    vR = (x * vx + y * vy) / R
    vT = (x * vy - y * vx) / R
    vxvv = np.stack([R / ro, vR / vo, vT / vo, z / ro, vz / vo, phi], axis=1)
    ts = np.array([0.0, t_end]) * u.Myr

    def go(rtol):
        o = Orbit(vxvv, ro=ro, vo=vo)
        o.integrate(ts, pot, method="dop853_c", numcores=1, progressbar=False, rtol=rtol,
                    atol=rtol * 1e-3)
        t1 = ts[-1]
        pos = np.stack([o.x(t1), o.y(t1), o.z(t1)], axis=1)
        vel = np.stack([o.vx(t1), o.vy(t1), o.vz(t1)], axis=1)
        return np.asarray(pos, float), np.asarray(vel, float)

    for rtol in LADDER:
        pos, vel = go(rtol)
        de, _ = energy_error(galaxy, pos0, vel0, pos, vel)
        if de.max() <= ENERGY_TARGET:
            dt, _ = best_time(lambda r=rtol: go(r), repeat)
            return rtol, dt, de.max()
    return None


def run_galpy_triaxial(galaxy, pos0, vel0, t_end, repeat):
    """galpy's density-flattened TriaxialNFWPotential (Gauss-Legendre, glorder=50) with the
    same baryons, on the same orbits. Energy errors are measured with galpy's own potential:
    swerve's fast form differs from the exact halo by ~3e-7 in potential, more than the
    1e-10 criterion. swerve's halo of scale mass M is galpy's with amp = M / (q_y q_z)."""
    import astropy.units as u
    import galpy.potential as gpp
    from galpy.orbit import Orbit

    p = galaxy.params
    ro, vo = 8.0, 220.0
    kw = dict(ro=ro, vo=vo)
    pot = [
        gpp.KeplerPotential(amp=p["m_bh"] * u.Msun, **kw),
        gpp.HernquistPotential(amp=2.0 * p["m_bulge"] * u.Msun, a=p["a_bulge"] * u.kpc, **kw),
        gpp.MiyamotoNagaiPotential(amp=p["m_disk"] * u.Msun, a=p["a_disk"] * u.kpc,
                                   b=p["b_disk"] * u.kpc, **kw),
        gpp.TriaxialNFWPotential(amp=p["m_halo"] / (p["q_y"] * p["q_z"]) * u.Msun, a=p["r_s"] * u.kpc,
                                 b=p["q_y"], c=p["q_z"], **kw),
    ]
    x, y, z = pos0.T
    vx, vy, vz = vel0.T
    R = np.hypot(x, y)
    phi = np.arctan2(y, x)
    vxvv = np.stack([R / ro, (x * vx + y * vy) / R / vo, (x * vy - y * vx) / R / vo, z / ro, vz / vo, phi], axis=1)
    ts = np.array([0.0, t_end]) * u.Myr

    def energy(o, t):
        return np.asarray(o.E(t, pot=pot, use_physical=False), float)

    def go(rtol):
        o = Orbit(vxvv, ro=ro, vo=vo)
        o.integrate(ts, pot, method="dop853_c", numcores=1, progressbar=False, rtol=rtol, atol=rtol * 1e-3)
        e0, e1 = energy(o, ts[0]), energy(o, ts[-1])
        phi0 = np.asarray(gpp.evaluatePotentials(pot, R / ro, z / ro, phi=phi, use_physical=False), float)
        return np.abs(e1 - e0) / np.abs(phi0)

    for rtol in LADDER:
        de = go(rtol)
        if de.max() <= ENERGY_TARGET:
            dt, _ = best_time(lambda r=rtol: go(r), repeat)
            return rtol, dt, de.max()
    return None


def dense_output_error(galaxy, pos0, vel0, n=100, t_max=300.0, k=61):
    """Largest error of the dense output against direct integration to each output time, and of
    direct integration at the default rtol against rtol=1e-13 (relative to |x| and |v|)."""
    pos0, vel0 = pos0[:n], vel0[:n]
    t_grid = np.concatenate([[0.001, 0.01, 0.1, 1.0], np.linspace(0.0, t_max, k)])
    kw = dict(check_density=False)
    dense = orbits.integrate(galaxy, pos0, vel0, t_max, t_out=t_grid, **kw)
    rp, rv, rt = np.repeat(pos0, t_grid.size, 0), np.repeat(vel0, t_grid.size, 0), np.tile(t_grid, n)
    direct = orbits.integrate(galaxy, rp, rv, rt, **kw)
    truth = orbits.integrate(galaxy, rp, rv, rt, rtol=1e-13, **kw)

    def rel(a, b):
        a, b = a.reshape(-1, 3), b.reshape(-1, 3)
        return float(np.max(np.linalg.norm(a - b, axis=1) / np.linalg.norm(b, axis=1)))

    return (rel(dense.pos_out, direct.pos), rel(dense.vel_out, direct.vel),
            rel(direct.pos, truth.pos), rel(direct.vel, truth.vel),
            float(np.max(np.linalg.norm((dense.vel_out.reshape(-1, 3) - direct.vel), axis=1))))


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=2000)
    ap.add_argument("--flattening", choices=("potential", "density"), default="potential")
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--rtol", type=float, default=orbits.DEFAULT_RTOL)
    ap.add_argument("--no-gala", action="store_true")
    ap.add_argument("--no-galpy", action="store_true")
    args = ap.parse_args(argv)

    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} logical CPUs, "
          f"numba {numba.__version__} (threading layer chosen at first parallel call), "
          f"load average before: {os.getloadavg()}")
    galaxy = make_galaxy(args.flattening)
    if galaxy is None:
        return 0
    pos0, vel0, t_fl = workload(args.n, args.seed)
    # compile (or load from cache) on a small batch
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", NegativeDensityWarning)
        orbits.integrate(galaxy, pos0[:4], vel0[:4], t_fl[:4])

    print(f"\n== standard workload: {args.n} HVS orbits, flight times 0-300 Myr, "
          f"{galaxy.name} (q_z=0.8, halo flattening: {args.flattening}), rtol={args.rtol:g}")
    rates = {}
    for threads in (1, 2):
        if threads > numba.config.NUMBA_NUM_THREADS:
            continue
        dt, res = run_swerve(galaxy, pos0, vel0, t_fl, args.rtol, args.repeat, threads)
        rates[threads] = args.n / dt
        _, de_rel_e = energy_error(galaxy, pos0, vel0, res.pos, res.vel)
        print(f"  {threads} core(s): {args.n / dt:10.0f} orbits/s ({args.n / dt / threads:8.0f} per core); "
              f"force evals/orbit {res.n_force.mean():.0f} (ns per eval per core: "
              f"{dt * threads / res.n_force.sum() * 1e9:.1f}); max |dE|/|Phi0| "
              f"{res.energy_error.max():.2e}; median |dE/E| {np.median(de_rel_e):.2e}")
    if 2 in rates:
        print(f"  2 cores / 1 core: {rates[2] / rates[1]:.2f}x")

    ep, ev, dp, dv, dv_abs = dense_output_error(galaxy, pos0, vel0)
    print(f"  dense output (quintic Hermite) vs direct integration to 65 output times, 100 orbits: "
          f"max relative error {ep:.1e} in position, {ev:.1e} in velocity ({dv_abs:.1e} km/s); "
          f"direct at rtol={orbits.DEFAULT_RTOL:g} vs rtol=1e-13: {dp:.1e}, {dv:.1e}")

    t_common = 300.0
    print(f"\n== side by side, one core each: same {args.n} launches, all to {t_common:g} Myr, "
          f"loosest tolerance with max |dE|/|Phi0| <= {ENERGY_TARGET:g}")
    sw = swerve_at_target(galaxy, pos0, vel0, t_common, args.repeat)
    print(f"  swerve  rtol={sw[0]:.0e}: {args.n / sw[1]:9.0f} orbits/s  (max dE {sw[2]:.2e})")
    if not args.no_gala and args.flattening == "potential":
        try:
            g = run_gala(galaxy, pos0, vel0, t_common, args.repeat)
        except ImportError:
            g = None
            print("  gala not installed")
        if g is not None:
            print(f"  gala    rtol={g[0]:.0e}: {args.n / g[1]:9.0f} orbits/s  (max dE {g[2]:.2e});"
                  f"  swerve / gala = {g[1] / sw[1]:.2f}x")
    if not args.no_galpy:
        sph = make_galaxy(args.flattening, q_z=1.0)
        try:
            gp_ = run_galpy(sph, pos0, vel0, t_common, args.repeat)
        except ImportError:
            gp_ = None
            print("  galpy not installed")
        if gp_ is not None:
            sw1 = swerve_at_target(sph, pos0, vel0, t_common, args.repeat)
            print(f"  (spherical halo, q_z=1) swerve rtol={sw1[0]:.0e}: {args.n / sw1[1]:9.0f} orbits/s; "
                  f"galpy dop853_c rtol={gp_[0]:.0e}: {args.n / gp_[1]:9.0f} orbits/s "
                  f"(max dE {gp_[2]:.2e}); swerve / galpy = {gp_[1] / sw1[1]:.2f}x")
    if not args.no_galpy and args.flattening == "density":
        m = min(args.n, 200)  # galpy's triaxial halo is slow: a subset of the same orbits
        try:
            gt = run_galpy_triaxial(galaxy, pos0[:m], vel0[:m], t_common, 1)
        except ImportError:
            gt = None
        if gt is not None:
            sw_m = swerve_at_target(galaxy, pos0[:m], vel0[:m], t_common, args.repeat)
            print(f"  (density-flattened q_z=0.8, first {m} orbits) swerve: {m / sw_m[1]:9.0f} orbits/s; "
                  f"galpy TriaxialNFWPotential dop853_c rtol={gt[0]:.0e}: {m / gt[1]:9.0f} orbits/s "
                  f"(max dE {gt[2]:.2e}); swerve / galpy = {gt[1] / sw_m[1]:.1f}x")
    print(f"\nload average after: {os.getloadavg()}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
