"""Where a likelihood call's time goes, and what taking the Fisher information at the walkers'
mean would change (the groundwork of the inference issue's 5 ms target).

    python benchmarks/likelihood_profile.py [--emulator emulators/default] [--fisher]
    python benchmarks/likelihood_profile.py --compare OTHER_CHECKOUT [--rounds 10] [--other-emulator PATH]

The catalog is benchmarks/fit.py's (an 801-star mock at q_y = 1.1, q_z = 0.85, 64 distance
samples per star). Prints the median and minimum of 40 calls of: the whole call for 64 walkers,
the compiled kernels alone (``swerve.likelihood_kernels._run_kernels``) for 16, 32, 48 and 64
walkers, and the emulator's mean. With ``--fisher``: a converged posterior (emcee, 32 walkers x
2000 steps), 64 walkers drawn from it, and the catalog-level emulator term with the Fisher
information per walker against the same at the walkers' mean.

With ``--compare``, another checkout's ``src/swerve`` (e.g. a ``git worktree`` of an older commit)
is imported beside this one under another name, and the two likelihoods, built from the same
catalog, are timed in alternation in one process (each round: the minimum of 20 calls of each,
for 16 and for 64 walkers); the per-star log-likelihoods of the two are compared too (when both
use the same emulator; ``--other-emulator`` gives the other checkout its own).
"""

import argparse
import time

import numpy as np


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--emulator", default="emulators/default")
    ap.add_argument("--fisher", action="store_true")
    ap.add_argument("--compare", metavar="CHECKOUT", help="another checkout to time side by side")
    ap.add_argument("--rounds", type=int, default=10)
    ap.add_argument("--other-emulator", help="with --compare: the other checkout's emulator (default: --emulator)")
    args = ap.parse_args()

    from threadpoolctl import threadpool_limits

    import swerve.likelihood_kernels as K
    from swerve.catalog import catalog_from_table
    from swerve.emulate import load
    from swerve.fit import load_fit_config, star_terms
    from swerve.frames import SolarParameters
    from swerve.likelihood import Likelihood
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock
    from swerve.simulate import training_setup_from_dict
    from swerve.summaries import SummarySpec

    emu = load(args.emulator)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    setup = training_setup_from_dict(emu.metadata["config"])
    lo, hi = np.asarray(emu.bounds).T
    truth = dict(zip(emu.parameter_names, 0.5 * (lo + hi)), q_y=1.1, q_z=0.85)
    errors = ErrorModel(parallax=ErrorLaw(0.02), distance_frac=ErrorLaw(0.10), pm=ErrorLaw(0.0, 0.01, 1.0),
                        corr_pmra_pmdec=0.1, vlos=ErrorLaw(5.0))
    table = make_mock(setup.galaxy_at(truth), setup.launch_at({n: truth[n] for n in setup.launch_names}),
                      setup.selection, errors, 801, 11, flight_time_max=setup.flight_time_max, bank_size=4000)
    cfg = load_fit_config(None, {"errors": {"samples": 64}})
    terms, _ = star_terms(catalog_from_table(table, source="bench"), spec, cfg, SolarParameters.from_name("v4.0"))
    threadpool_limits(limits=1, user_api="blas")
    like = Likelihood(emu, terms, spec)
    th = lo + (hi - lo) * np.random.default_rng(0).uniform(0.3, 0.7, size=(64, len(lo)))
    like(th)
    mu, sig, dens = like._cell_model(th)
    tri = np.ascontiguousarray(np.stack([sig[..., 0, 0], sig[..., 1, 0], sig[..., 1, 1], sig[..., 2, 0],
                                         sig[..., 2, 1], sig[..., 2, 2]], -1))
    p = like._packed

    if args.compare:
        return compare(args, table, th)

    def tm(f, reps=40):
        f()
        ts = []
        for _ in range(reps):
            t0 = time.perf_counter()
            f()
            ts.append(time.perf_counter() - t0)
        return f"{1e3 * np.median(ts):.2f} / {1e3 * np.min(ts):.2f} ms"

    print(f"{terms.n} stars, {len(p.cols[0])} (star, sample) terms inside the cells; median / minimum of 40 calls")
    print(f"  call, 64 walkers: {tm(lambda: like(th))}")
    for W in (16, 32, 48, 64):
        print(f"  kernels alone, {W} walkers: {tm(lambda: K._run_kernels(p, mu[:W], tri[:W], True, dens))}")
    print(f"  emulator mean, 64 walkers: {tm(lambda: emu.predict(th))}")
    if not args.fisher:
        return
    from swerve.sampling import Posterior, resolve_priors, sample_posterior

    post = Posterior(like, resolve_priors(list(emu.parameter_names), emu.bounds, None))
    res = sample_posterior(post, seed=3, nwalkers=32, max_steps=2000, check_every=250, n_tau=25.0, tau_rtol=0.1)
    w = res.samples[np.random.default_rng(1).choice(len(res.samples), 64, replace=False)]
    out, grad, fisher = like._evaluate(w, True)
    Lf = like._mean_cov_factor(w)
    exact = like.emulator_correction(grad, fisher, Lf)
    _, _, f0 = like._evaluate(w.mean(axis=0, keepdims=True), True)
    d = like.emulator_correction(grad, np.broadcast_to(f0, fisher.shape).copy(), Lf) - exact
    print(f"posterior walkers: total log L sd {(out.sum(axis=1) + exact).std():.2f}; catalog-level emulator term "
          f"mean {exact.mean():.3f}, sd {exact.std():.3f}")
    print(f"Fisher information at the walkers' mean instead of per walker: change mean {d.mean():+.4f}, "
          f"sd {d.std():.4f}, max |change - mean| {np.max(np.abs(d - d.mean())):.4f}")


def _import_other(checkout):
    """The other checkout's ``src/swerve`` as the package ``swerve_other`` (its imports are
    relative), copied to a temporary folder so that its numba cache is its own."""
    import importlib
    import shutil
    import sys
    import tempfile
    from pathlib import Path

    tmp = Path(tempfile.mkdtemp(prefix="swerve-other-"))
    shutil.copytree(Path(checkout) / "src" / "swerve", tmp / "swerve_other",
                    ignore=shutil.ignore_patterns("__pycache__"))
    sys.path.insert(0, str(tmp))
    return importlib.import_module("swerve_other")


def _likelihood_of(pkg, emulator_path, table):
    import importlib

    mod = lambda name: importlib.import_module(f"{pkg}.{name}")  # noqa: E731
    emu = mod("emulate").load(emulator_path)
    spec = mod("summaries").SummarySpec.from_dict(emu.metadata["summaries"])
    cfg = mod("fit").load_fit_config(None, {"errors": {"samples": 64}})
    cat = mod("catalog").catalog_from_table(table, source="bench")
    terms, _ = mod("fit").star_terms(cat, spec, cfg, mod("frames").SolarParameters.from_name("v4.0"))
    return mod("likelihood").Likelihood(emu, terms, spec)


def compare(args, table, th):
    _import_other(args.compare)
    this = _likelihood_of("swerve", args.emulator, table)
    other_emulator = args.other_emulator or args.emulator
    other = _likelihood_of("swerve_other", other_emulator, table)
    for like in (this, other):  # compile, fill the caches
        like(th)
        like(th[:16])
    if other_emulator != args.emulator:
        print(f"this: {args.emulator} ({this.spec.n_cells} cells); other: {other_emulator} ({other.spec.n_cells} cells)")
    else:
        d = this.per_star(th) - other.per_star(th)
        print(f"per-star log-likelihoods, this - other: max |difference| {np.max(np.abs(d)):.2e}; whole call "
              f"(with the catalog-level term) max |difference| {np.max(np.abs(this(th) - other(th))):.2e}")

    def best(f, reps=20):
        ts = []
        for _ in range(reps):
            t0 = time.perf_counter()
            f()
            ts.append(time.perf_counter() - t0)
        return 1e3 * min(ts)

    rows = {(k, W): [] for k in ("this", "other") for W in (16, 64)}
    for _ in range(args.rounds):
        for W in (16, 64):
            rows["this", W].append(best(lambda: this(th[:W])))
            rows["other", W].append(best(lambda: other(th[:W])))
    print(f"call time, ms: median (range) over {args.rounds} alternating rounds of the minimum of 20 calls")
    for W in (16, 64):
        a, b = np.array(rows["this", W]), np.array(rows["other", W])
        print(f"  {W} walkers: this {np.median(a):.2f} ({a.min():.2f}-{a.max():.2f}), other {np.median(b):.2f} "
              f"({b.min():.2f}-{b.max():.2f}); this / other {np.median(a / b):.3f}")


if __name__ == "__main__":
    main()
