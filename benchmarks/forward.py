"""Benchmark of the forward model: trajectory bank + reweighting vs integrating orbits again.

(a) Present-day population for a *new* launch model from an existing bank vs integrating the
    bank's orbits again (``build_bank`` with the same settings). The launch-independent part
    (mirroring and cuts: ``select_bank``) is done once per bank and selection and timed
    separately; a new launch model then costs its weights only (``SelectedSamples.population``).
(b) Selected stars per CPU-second at equal effective sample size: the bank with reweighting
    (ESS of the selected weighted population; the bank's build cost reported separately and
    amortised over the launch models it serves) vs the plain approach (one orbit per star,
    drawn from the launch model, isotropic, integrated to its own uniform flight time, then
    selected: every selected star is one effective sample). Also given: the more conservative
    ratio with the bank's *orbit-level* ESS (samples of one orbit at different flight times are
    distinct stars but share a launch).
(c) Time, CPU time and memory to build a bank of N orbits (default 20,000) on the cores numba
    uses (set NUMBA_NUM_THREADS=2 for 2 cores).

Workload: Galaxy.default(q_y=1.1, q_z=0.85) (potential-flattened halo unless --flattening
density), bank proposal 500-5000 km/s log-uniform, t_max = 300 Myr, Δt = 1 Myr, stored
10-100 kpc, rtol = 1e-9; launch models BoundedPowerLawSpeed(800, 2500, 0) (the one timed for
(a) and (b)); selection r in 10-100 kpc, outgoing.

Usage::

    NUMBA_NUM_THREADS=2 python benchmarks/forward.py [--n-bank 20000] [--n-plain 20000] [--seed 1]

This is a script, not a test: it prints a report and exits 0.
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import time
import tracemalloc
import warnings

import numba
import numpy as np

from swerve.bank import build_bank
from swerve.galaxy import Galaxy, NegativeDensityWarning
from swerve.launch import BoundedPowerLawSpeed, HillsLaunch
from swerve.orbits import integrate
from swerve.population import population_from_bank, select_bank
from swerve.selection import Selection

BANK_KW = dict(t_max=300.0, dt=1.0, r_min_store=10.0, r_max=100.0, v_lo=500.0, v_hi=5000.0, rtol=1e-9)
SEL = Selection(r_min=10.0, r_max=100.0, outgoing=True)
LAUNCH = BoundedPowerLawSpeed(800.0, 2500.0, 0.0)


def timed(fn):
    w0, c0 = time.perf_counter(), time.process_time()
    out = fn()
    return out, time.perf_counter() - w0, time.process_time() - c0


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n-bank", type=int, default=20000)
    ap.add_argument("--n-plain", type=int, default=20000)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--flattening", default="potential", choices=("potential", "density"))
    args = ap.parse_args(argv)
    warnings.simplefilter("ignore", NegativeDensityWarning)
    g = Galaxy.default(q_y=1.1, q_z=0.85, halo_flattening=args.flattening)
    print(f"machine: {platform.processor() or platform.machine()}, {os.cpu_count()} cpus, "
          f"numba threads {numba.config.NUMBA_NUM_THREADS}; python {platform.python_version()}")
    print(f"galaxy: {g.name} ({args.flattening} flattening, q_y=1.1, q_z=0.85)")
    # warm-up (compile / load caches)
    build_bank(g, 64, 0, **BANK_KW)
    integrate(g, [[0.003, 0, 0]], [[1500.0, 0, 0]], 10.0, check_density=False)

    # (c) bank build: time and memory
    tracemalloc.start()
    rss0 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    bank, wall_b, cpu_b = timed(lambda: build_bank(g, args.n_bank, args.seed, **BANK_KW))
    _, wall_b2, cpu_b2 = timed(lambda: build_bank(g, args.n_bank, args.seed + 100, **BANK_KW))
    wall_b, cpu_b = min(wall_b, wall_b2), min(cpu_b, cpu_b2)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    rss1 = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    print(f"(c) build_bank({args.n_bank}) (best of 2): wall {wall_b:.2f} s, CPU {cpu_b:.2f} s; {bank.summary()}")
    print(f"    bank arrays {bank.nbytes / 1e6:.1f} MB = {bank.nbytes / bank.n_orbits:.0f} bytes/orbit "
          f"({bank.n_stored / bank.n_orbits:.1f} samples/orbit x 32 B + 33 B/orbit); peak traced memory "
          f"during the build {peak / 1e6:.0f} MB; max RSS grew by {(rss1 - rss0) / 1e3:.0f} MB")

    # (a) new launch model from the bank vs integrating again
    view, wall_v, cpu_v = timed(lambda: select_bank(bank, SEL))
    pop = view.population(LAUNCH)
    reps = 20
    models = [BoundedPowerLawSpeed(800.0 + 10 * k, 2500.0 - 10 * k, -0.1 * k) for k in range(reps)]
    walls, cpus = [], []
    for m in models:
        _, w_, c_ = timed(lambda m=m: view.population(m))
        walls.append(w_)
        cpus.append(c_)
    wall_w, cpu_w = float(np.median(walls)), float(np.median(cpus))
    print(f"    per-model wall times over {reps} models: min {1e3 * min(walls):.1f} ms, median {1e3 * wall_w:.1f} ms, "
          f"max {1e3 * max(walls):.1f} ms")
    _, wall_f, _ = timed(lambda: population_from_bank(bank, LAUNCH, selection=SEL))
    hills = HillsLaunch()
    _, wall_h0, _ = timed(lambda: view.population(hills, mass_range=(2.5, 4.0)))
    _, wall_h, _ = timed(lambda: view.population(hills, mass_range=(2.5, 4.0)))
    print(f"(a) select_bank (mirror + cuts, once per bank and selection): wall {wall_v:.3f} s, CPU {cpu_v:.3f} s; "
          f"{view.n} selected samples")
    print(f"    population for a new launch model (weights; median of {reps} power-law models): wall "
          f"{1e3 * wall_w:.1f} ms, CPU {1e3 * cpu_w:.1f} ms (ESS {pop.ess:.0f}, orbit ESS {pop.ess_orbits:.0f})")
    print(f"    vs integrating the bank again: wall {wall_b:.2f} s -> ratio {wall_b / wall_w:.0f}x (wall), "
          f"{cpu_b / cpu_w:.0f}x (CPU)")
    print(f"    one-off population_from_bank (selection included): wall {wall_f:.3f} s -> ratio {wall_b / wall_f:.1f}x")
    print(f"    Hills model (2.5-4 Msun): first call {wall_h0:.3f} s (Monte-Carlo table, 4e5 ejections), "
          f"then {1e3 * wall_h:.1f} ms (table memoised)")

    # (b) plain approach: one orbit per star to its own flight time, then select
    rng = np.random.default_rng(args.seed + 1)
    n = args.n_plain
    v = LAUNCH.sample(n, rng)
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    t = rng.uniform(0.0, 300.0, n)
    def plain():
        res = integrate(g, 0.003 * d, v[:, None] * d, t, rtol=1e-9, atol=1e-12, check_density=False)
        return SEL.apply(res.pos, res.vel)

    keep, wall_p, cpu_p = timed(plain)
    n_sel = int(keep.sum())
    plain_rate = n_sel / cpu_p
    bank_rate = pop.ess / cpu_w
    bank_rate_orbit = pop.ess_orbits / cpu_w
    amort = pop.ess / (cpu_w + cpu_b)
    print(f"(b) plain: {n} orbits, {n_sel} selected in CPU {cpu_p:.2f} s (wall {wall_p:.2f}) -> "
          f"{plain_rate:.0f} selected stars per CPU-s")
    print(f"    bank reweighting: ESS {pop.ess:.0f} in CPU {cpu_w:.3f} s -> {bank_rate:.0f} per CPU-s: "
          f"ratio {bank_rate / plain_rate:.0f}x; with the orbit-level ESS {pop.ess_orbits:.0f}: "
          f"{bank_rate_orbit / plain_rate:.1f}x")
    print(f"    including the bank build once (one launch model): {amort:.0f} per CPU-s, "
          f"ratio {amort / plain_rate:.1f}x; the build is shared by every launch model of this Galaxy")


if __name__ == "__main__":
    main()
