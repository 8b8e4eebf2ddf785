"""A long emcee chain on the 10,000-star mock of benchmarks/large_catalogs.py (seed 20261201 + N),
to judge the Laplace-IS path's quantiles, tails included, against: emcee started from its draws and
run for 12,000 steps (n_tau 300 keeps it from stopping early). About 30 minutes on 2 cores.

    python benchmarks/laplace_tail.py [N] [EMULATOR]    # defaults: 10000 emulators/default

With ``SWERVE_TAIL_IS=1`` in the environment it instead repeats Laplace-IS alone (seed 1 with the
default 4000 draws per round, seeds 2 and 3 with 40,000) and prints each one's share of m_halo
below 5.8e11 with its error from the effective sample size (about 4 minutes):

    SWERVE_TAIL_IS=1 python benchmarks/laplace_tail.py

Results: benchmarks/RESULTS.md, "Large catalogs" (a mixture proposal and a defensive share).
"""
import os
import sys
import tempfile
import time
import warnings
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))
import large_catalogs as lc  # noqa: E402
import numpy as np
from threadpoolctl import threadpool_limits

from swerve.catalog import read_catalog
from swerve.emulate import load
from swerve.fit import load_fit_config
from swerve.inference import adjust, n_walkers, prepare
from swerve.laplace import laplace_is
from swerve.sampling import sample_posterior

N = int(sys.argv[1]) if len(sys.argv) > 1 else 10000
EMULATOR = sys.argv[2] if len(sys.argv) > 2 else str(Path(__file__).resolve().parents[1] / "emulators" / "default")
with tempfile.TemporaryDirectory() as folder:
    path = lc.make_catalog(N, 20261201 + N, 8000, folder)
    cfg = load_fit_config()
    problem = prepare(read_catalog(path), load(EMULATOR), cfg)
post, adj = adjust(problem, cfg)
s = cfg["sampler"]
x_map = np.array([adj["theta_hat"][nm] for nm in post.free_names])
j = post.free_names.index("m_halo")
if os.environ.get("SWERVE_TAIL_IS"):
    for seed, nd in [(1, 4000), (2, 40000), (3, 40000)]:
        with threadpool_limits(limits=1, user_api="blas"):
            t0 = time.perf_counter()
            lap = laplace_is(post, seed=seed, x_map=x_map, n_draws=nd)
        w, x = lap.weights, lap.samples[:, j]
        p = float(w[x < 5.8e11].sum())
        q = lc.quantiles(lap.samples, lap.weights)[j]
        print(f"seed {seed} n_draws {nd}: {time.perf_counter() - t0:.0f} s; {lap.verdict}; P(m_halo < 5.8e11) = "
              f"{p:.4f} (+- {np.sqrt(p * (1 - p) / lap.ess):.4f} by ESS); m_halo 2.5% {q[0]:.4g}", flush=True)
    sys.exit(0)
with threadpool_limits(limits=1, user_api="blas"):
    t0 = time.perf_counter()
    lap = laplace_is(post, seed=s["seed"], x_map=x_map)
    print(f"laplace-is {time.perf_counter()-t0:.1f} s; {lap.verdict}", flush=True)
    q = lc.quantiles(lap.samples, lap.weights)
    lc.print_intervals("laplace-is", q, post.free_names)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        nw = n_walkers(cfg, post.ndim)
        res = sample_posterior(post, seed=7, walkers=lap.start_walkers(nw, np.random.default_rng(7)),
                               nwalkers=nw, max_steps=12000, check_every=500, n_tau=300, tau_rtol=0.05)
print(f"emcee {time.perf_counter()-t0:.0f} s, {res.n_steps} steps, burn-in {res.burn_in}, tau {np.round(res.tau,1).tolist()}", flush=True)
qe = lc.quantiles(res.samples)
lc.print_intervals("long emcee", qe, post.free_names)
ess_e = res.n_walkers * (res.n_steps - res.burn_in) / np.max(res.tau)
lc.compare(qe, q, res.samples.std(axis=0), ess_e, lap.ess, post.free_names)
print("share of the long chain's m_halo below 5.8e11:", float(np.mean(res.samples[:, j] < 5.8e11)))
