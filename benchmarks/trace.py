"""Benchmark of ``swerve trace``: 100 stars x 1000 error samples, traced back in the default Galaxy.

The catalog is made here with :func:`swerve.population.make_mock` (the default Galaxy, launch
speeds 800-2500 km/s flat, flight times up to 300 Myr, selection 10-100 kpc outgoing, the error
model of ``swerve mock``'s defaults: parallax 0.02 mas, distance 10%, proper motions
0.01 (d / 10 kpc) mas/yr, vlos 5 km/s), written to a temporary folder, and then the command

    NUMBA_NUM_THREADS=2 swerve trace CATALOG --samples 1000 --out TABLE.ecsv --plot PLOT.png --no-progress

is run as a subprocess (the whole command, start-up and numba cache load included), ``--repeat``
times. Target: under 60 s wall on 2 cores.

With ``--lmc`` the same command with ``--lmc`` (the LMC-perturbed Galaxy, default LMC) is run
side by side with the static one (alternating, ``--repeat`` times each), and then, in this
process on one set of error samples (``--samples`` per star, the command's seed), the back
integration alone (:func:`swerve.trace.trace_samples`) is timed three ways: static, LMC with the
early stop (the default) and LMC without it (every path that passes no origin runs for
``--max-time``); the report compares their results (pass flags and closest approaches with and
without the early stop).

Usage::

    python benchmarks/trace.py [--n 100] [--samples 1000] [--threads 2] [--repeat 2] [--seed 1] [--lmc]

This is a script, not a test: it prints a report and exits 0.
"""

from __future__ import annotations

import argparse
import os
import platform
import resource
import shutil
import subprocess
import sys
import tempfile
import time

import numpy as np


def make_catalog(path, n, seed):
    from swerve.galaxy import Galaxy
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock, write_mock
    from swerve.selection import Selection

    errors = ErrorModel(parallax=ErrorLaw(0.02), distance_frac=ErrorLaw(0.1), pm=ErrorLaw(0.0, 0.01, 1.0),
                        vlos=ErrorLaw(5.0))
    t = make_mock(Galaxy.default(), BoundedPowerLawSpeed(800.0, 2500.0, 0.0),
                  Selection(r_min=10.0, r_max=100.0, outgoing=True), errors, n, seed, flight_time_max=300.0,
                  bank_size=4000)
    write_mock(t, path)


def report_lmc(args, cat, folder, cmd_lmc, walls, cpus, walls_lmc, cpus_lmc):
    """The LMC side of the report: the command's timings beside the static ones, then the back
    integration alone, three ways, on one set of samples."""
    from astropy.table import Table

    from swerve.catalog import read_catalog
    from swerve.galaxy import Galaxy
    from swerve.galaxy.lmc import lmc_orbit
    from swerve.measurement import draw_samples
    from swerve.orbits_lmc import stop_names
    from swerve.trace import DEFAULT_MAX_TIME, trace_samples

    tab = Table.read(os.path.join(folder, "tl.ecsv"))
    print(f"command: NUMBA_NUM_THREADS={args.threads} {' '.join(['swerve', *cmd_lmc[1:]])}")
    for i, (w, c, w0, c0) in enumerate(zip(walls_lmc, cpus_lmc, walls, cpus), 1):
        print(f"run {i} --lmc: wall {w:.2f} s, CPU {c:.2f} s; ratio to the static run beside it: wall {w / w0:.2f}, "
              f"CPU {c / c0:.2f}")
    p, pl = np.asarray(tab["p_origin"]), np.asarray(tab["p_lmc"])
    print(f"result --lmc: median p_origin {np.median(p):.3f}; {int(np.sum(p > 0.5))} stars with p_origin > 0.5; "
          f"{int(np.sum(pl > 0.5))} with p_lmc > 0.5, {int(np.sum(pl > 0))} with p_lmc > 0; failed paths "
          f"{int(np.sum(tab['n_failed']))}; stops {tab.meta['stop_reasons']}")

    import numba

    numba.set_num_threads(min(args.threads, numba.config.NUMBA_NUM_THREADS))
    galaxy = Galaxy.default()
    samples = draw_samples(read_catalog(cat), args.samples, np.random.default_rng(0))
    t0 = time.perf_counter()
    track = lmc_orbit(galaxy, t_min=-DEFAULT_MAX_TIME, solar=samples.settings["solar"])
    t_track = time.perf_counter() - t0
    timings = {}
    results = {}
    for name, kwargs in (("static", {}), ("LMC, early stop", {"lmc": track}),
                         ("LMC, no early stop", {"lmc": track, "early_stop": False})):
        t0 = time.perf_counter()
        results[name] = trace_samples(galaxy, samples, **kwargs)
        timings[name] = time.perf_counter() - t0
    print(f"in-process, {samples.n} stars x {args.samples} samples (seed 0), {numba.get_num_threads()} threads; "
          f"LMC track (0 to -{DEFAULT_MAX_TIME:g} Myr) {t_track:.2f} s:")
    for name, t in timings.items():
        print(f"  {name:<20} {t:7.2f} s  ({t / timings['static']:.2f} x static)")
    early, full = results["LMC, early stop"], results["LMC, no early stop"]
    reasons = np.bincount(early.sample_stop_reason.ravel(), minlength=len(stop_names))
    print("  paths by stop (early stop): " + "; ".join(f"{stop_names[i]} {int(c)}" for i, c in enumerate(reasons)))
    same_gc = int(np.sum(early.sample_pass == full.sample_pass))
    same_lmc = int(np.sum(early.sample_pass_lmc == full.sample_pass_lmc))
    m = early.sample_pass.size
    close = full.sample_d_lmc_min < 3 * early.meta["lmc_radius_kpc"]
    d_rel = np.abs(early.sample_d_lmc_min / full.sample_d_lmc_min - 1)
    r_rel = np.abs(early.sample_r_min / full.sample_r_min - 1)
    print(f"  early stop vs none: Galactic-Centre pass flags equal {same_gc}/{m}, LMC pass flags equal {same_lmc}/{m}; "
          f"r_min differs (> 1e-9 relative) for {int(np.sum(r_rel > 1e-9))} paths, d_lmc_min for "
          f"{int(np.sum(d_rel > 1e-9))} (of them within 3 LMC radii: {int(np.sum((d_rel > 1e-9) & close))}); "
          f"largest p_lmc difference {np.nanmax(np.abs(early.p_lmc - full.p_lmc)):.3g}, "
          f"p_origin {np.nanmax(np.abs(early.p_origin - full.p_origin)):.3g}")
    static = results["static"]
    print(f"  LMC vs static (same samples): median |p_origin difference| "
          f"{np.median(np.abs(early.p_origin - static.p_origin)):.3f}, largest {np.max(np.abs(early.p_origin - static.p_origin)):.3f}; "
          f"median t_flight ratio (stars passing in both) "
          f"{np.nanmedian(early.t_flight / static.t_flight):.4f}")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100)
    ap.add_argument("--samples", type=int, default=1000)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--lmc", action="store_true", help="also time `swerve trace --lmc`, side by side")
    args = ap.parse_args(argv)

    import numba

    from swerve import __version__

    folder = tempfile.mkdtemp(prefix="swerve-bench-trace-")
    try:
        cat = os.path.join(folder, "bench.ecsv")
        t0 = time.perf_counter()
        make_catalog(cat, args.n, args.seed)
        t_cat = time.perf_counter() - t0
        swerve = shutil.which("swerve") or os.path.join(os.path.dirname(sys.executable), "swerve")
        cmd = [swerve, "trace", cat, "--samples", str(args.samples), "--out", os.path.join(folder, "t.ecsv"),
               "--plot", os.path.join(folder, "t.png"), "--no-progress"]
        cmd_lmc = [swerve, "trace", cat, "--samples", str(args.samples), "--out", os.path.join(folder, "tl.ecsv"),
                   "--plot", os.path.join(folder, "tl.png"), "--no-progress", "--lmc"]
        env = dict(os.environ, NUMBA_NUM_THREADS=str(args.threads))
        walls, cpus, walls_lmc, cpus_lmc = [], [], [], []

        def run(command, wall_list, cpu_list):
            ru0 = resource.getrusage(resource.RUSAGE_CHILDREN)
            t0 = time.perf_counter()
            proc = subprocess.run(command, check=False, env=env, capture_output=True, text=True)
            wall_list.append(time.perf_counter() - t0)
            ru1 = resource.getrusage(resource.RUSAGE_CHILDREN)
            cpu_list.append(ru1.ru_utime - ru0.ru_utime + ru1.ru_stime - ru0.ru_stime)
            if proc.returncode != 0:
                print(proc.stdout, proc.stderr)
                raise SystemExit(f"swerve trace failed with exit code {proc.returncode}")

        for _ in range(args.repeat):
            run(cmd, walls, cpus)
            if args.lmc:
                run(cmd_lmc, walls_lmc, cpus_lmc)
        from astropy.table import Table

        tab = Table.read(os.path.join(folder, "t.ecsv"))
        p = np.asarray(tab["p_origin"])
        print(f"swerve {__version__}, Python {platform.python_version()}, numba {numba.__version__}, "
              f"numpy {np.__version__}, {platform.processor() or platform.machine()}, "
              f"{os.cpu_count()} CPUs visible, load average {os.getloadavg()[0]:.2f}")
        print(f"catalog: {args.n} stars (make_mock, seed {args.seed}) in {t_cat:.1f} s")
        print(f"command: NUMBA_NUM_THREADS={args.threads} {' '.join(['swerve', *cmd[1:]])}")
        print(f"paths: {args.n * args.samples:,}")
        for i, (w, c) in enumerate(zip(walls, cpus), 1):
            print(f"run {i}: wall {w:.2f} s, CPU {c:.2f} s  ({args.n * args.samples / w:,.0f} paths/s wall)")
        print(f"result: median p_origin {np.median(p):.3f}; {int(np.sum(p > 0.5))} stars with p_origin > 0.5; "
              f"failed paths {int(np.sum(tab['n_failed']))}")
        print(f"target: < 60 s wall -> {'met' if min(walls) < 60 else 'MISSED'}")
        if args.lmc:
            report_lmc(args, cat, folder, cmd_lmc, walls, cpus, walls_lmc, cpus_lmc)
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
