"""Benchmark of ``swerve trace``: 100 stars x 1000 error samples, traced back in the default Galaxy.

The catalog is made here with :func:`swerve.population.make_mock` (the default Galaxy, launch
speeds 800-2500 km/s flat, flight times up to 300 Myr, selection 10-100 kpc outgoing, the error
model of ``swerve mock``'s defaults: parallax 0.02 mas, distance 10%, proper motions
0.01 (d / 10 kpc) mas/yr, vlos 5 km/s), written to a temporary folder, and then the command

    NUMBA_NUM_THREADS=2 swerve trace CATALOG --samples 1000 --out TABLE.ecsv --plot PLOT.png --no-progress

is run as a subprocess (the whole command, start-up and numba cache load included), ``--repeat``
times. Target: under 60 s wall on 2 cores.

Usage::

    python benchmarks/trace.py [--n 100] [--samples 1000] [--threads 2] [--repeat 2] [--seed 1]

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
    from swerve.population import ErrorLaw, ErrorModel, make_mock, write_mock
    from swerve.selection import Selection

    errors = ErrorModel(parallax=ErrorLaw(0.02), distance_frac=ErrorLaw(0.1), pm=ErrorLaw(0.0, 0.01, 1.0),
                        vlos=ErrorLaw(5.0))
    t = make_mock(Galaxy.default(), BoundedPowerLawSpeed(800.0, 2500.0, 0.0),
                  Selection(r_min=10.0, r_max=100.0, outgoing=True), errors, n, seed, flight_time_max=300.0,
                  bank_size=4000)
    write_mock(t, path)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=100)
    ap.add_argument("--samples", type=int, default=1000)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--seed", type=int, default=1)
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
        env = dict(os.environ, NUMBA_NUM_THREADS=str(args.threads))
        walls, cpus = [], []
        for _ in range(args.repeat):
            ru0 = resource.getrusage(resource.RUSAGE_CHILDREN)
            t0 = time.perf_counter()
            proc = subprocess.run(cmd, check=False, env=env, capture_output=True, text=True)
            walls.append(time.perf_counter() - t0)
            ru1 = resource.getrusage(resource.RUSAGE_CHILDREN)
            cpus.append(ru1.ru_utime - ru0.ru_utime + ru1.ru_stime - ru0.ru_stime)
            if proc.returncode != 0:
                print(proc.stdout, proc.stderr)
                raise SystemExit(f"swerve trace failed with exit code {proc.returncode}")
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
    finally:
        shutil.rmtree(folder, ignore_errors=True)
    return 0


if __name__ == "__main__":
    sys.exit(main())
