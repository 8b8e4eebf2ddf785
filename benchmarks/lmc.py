"""Benchmark of the time-dependent orbit engine (swerve.orbits_lmc) side by side with the static
engine (swerve.orbits), on the standard HVS workload, in one run.

Workload: N orbits launched radially from 3 pc in isotropic directions, speeds uniform in
800-2500 km/s, flight times uniform in 0-300 Myr, in Galaxy.default(q_z=0.8).  The static
engine integrates each from t = 0 to its flight time; the LMC engine from its launch epoch
(minus the flight time) to the present, (a) with the default LMC (1.38e11 Msun, friction, reflex)
and (b) with m_lmc = 0 (the same equations as the static engine: the overhead of the
time-dependent machinery alone).  Default tolerances (rtol 1e-11, atol 1e-14), one thread
unless --threads says otherwise; best of --repeat runs after a warm-up.

Usage::

    python benchmarks/lmc.py [--n 4000] [--seed 1] [--repeat 3] [--threads 1]

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
from swerve.galaxy.lmc import LMC, lmc_orbit
from swerve.orbits_lmc import integrate_lmc


def workload(n, seed):
    rng = np.random.default_rng(seed)
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    speed = rng.uniform(800.0, 2500.0, n)
    t_flight = rng.uniform(0.0, 300.0, n)
    return 0.003 * d, speed[:, None] * d, t_flight


def best_of(fn, repeat):
    fn()  # warm-up (compilation, caches)
    times = []
    out = None
    for _ in range(repeat):
        t = time.perf_counter()
        out = fn()
        times.append(time.perf_counter() - t)
    return min(times), out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=4000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--threads", type=int, default=1)
    args = ap.parse_args(argv)
    numba.set_num_threads(args.threads)
    warnings.simplefilter("ignore", NegativeDensityWarning)
    galaxy = Galaxy.default(q_z=0.8)
    pos, vel, t_flight = workload(args.n, args.seed)

    t = time.perf_counter()
    track = lmc_orbit(galaxy, t_min=-320.0)
    t_track = time.perf_counter() - t
    track0 = lmc_orbit(galaxy, LMC(m_lmc=0.0), t_min=-320.0)

    t_static, res_s = best_of(lambda: orbits.integrate(galaxy, pos, vel, t_flight, check_density=False), args.repeat)
    t_lmc, res_l = best_of(lambda: integrate_lmc(galaxy, track, pos, vel, -t_flight), args.repeat)
    t_zero, res_0 = best_of(lambda: integrate_lmc(galaxy, track0, pos, vel, -t_flight), args.repeat)

    print(f"machine: {platform.machine()} {platform.processor() or ''} {os.cpu_count()} logical CPUs; "
          f"python {platform.python_version()}, numba {numba.__version__}, numpy {np.__version__}; "
          f"threads {args.threads}")
    print(f"workload: {args.n} HVS orbits from 3 pc, 800-2500 km/s, 0-300 Myr, Galaxy.default(q_z=0.8), seed {args.seed}")
    print(f"LMC track (0 to -320 Myr, 1 Myr grid, friction + reflex): {t_track:.2f} s")
    print(f"| engine | wall (best of {args.repeat}) | orbits/s | force evals / orbit (mean) | max energy error | failed |")
    print("|---|---|---|---|---|---|")
    for name, tt, r in (("static swerve.orbits.integrate", t_static, res_s),
                        ("orbits_lmc, m_lmc = 1.38e11", t_lmc, res_l),
                        ("orbits_lmc, m_lmc = 0", t_zero, res_0)):
        print(f"| {name} | {tt:.3f} s | {args.n / tt:,.0f} | {np.mean(r.n_force):.0f} | "
              f"{np.max(r.energy_error):.2e} | {int(np.sum(~r.ok))} |")
    print(f"cost ratio LMC / static: {t_lmc / t_static:.2f}; m_lmc = 0 / static: {t_zero / t_static:.2f}")
    dpos = np.linalg.norm(res_0.pos - res_s.pos, axis=1) / np.linalg.norm(res_s.pos, axis=1)
    dl = np.linalg.norm(res_l.pos - res_s.pos, axis=1)
    print(f"m_lmc = 0 vs static: max relative position difference {dpos.max():.1e}")
    print(f"LMC vs static present positions: median {np.median(dl):.3f} kpc, max {dl.max():.2f} kpc")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
