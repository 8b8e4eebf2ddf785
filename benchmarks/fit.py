"""Benchmark of the main job: one likelihood call, a converged fit, a refit after adding a star
(reweighting the previous chain, and sampling anew), and the brute-force alternative (one forward
simulation per likelihood call).

    python benchmarks/fit.py [--emulator emulators/default] [--n-stars 800] [--samples 64]

The catalog is a mock from the forward model inside the emulator's domain (q_y = 1.1,
q_z = 0.85, other parameters at the centre of the domain), with the demo's error model.
"""

import argparse
import os
import tempfile
import time
from pathlib import Path

import numpy as np


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--emulator", default="emulators/default")
    ap.add_argument("--n-stars", type=int, default=800)
    ap.add_argument("--samples", type=int, default=64)
    ap.add_argument("--walkers", type=int, default=64)
    ap.add_argument("--skip-fit", action="store_true")
    args = ap.parse_args()

    import numba

    from swerve.catalog import catalog_from_table
    from swerve.emulate import load
    from swerve.fit import load_fit_config, run_fit, star_terms
    from swerve.frames import SolarParameters
    from swerve.likelihood import Likelihood
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock, write_mock
    from swerve.simulate import simulate_point, training_setup_from_dict
    from swerve.summaries import SummarySpec

    print(f"load average {os.getloadavg()[0]:.2f}, numba threads {numba.get_num_threads()}")
    emu = load(args.emulator)
    setup = training_setup_from_dict(emu.metadata["config"])
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    centre = {n: 0.5 * (lo + hi) for n, (lo, hi) in zip(emu.parameter_names, np.asarray(emu.bounds))}
    truth = dict(centre, q_y=1.1, q_z=0.85) if "q_y" in centre else centre
    galaxy = setup.galaxy_at(truth)
    launch = setup.launch_at({n: truth[n] for n in setup.launch_names})
    errors = ErrorModel(parallax=ErrorLaw(0.02), distance_frac=ErrorLaw(0.10), pm=ErrorLaw(0.0, 0.01, 1.0),
                        corr_pmra_pmdec=0.1, vlos=ErrorLaw(5.0))
    t0 = time.perf_counter()
    table = make_mock(galaxy, launch, setup.selection, errors, args.n_stars + 1, 11,
                      flight_time_max=setup.flight_time_max, bank_size=4000)
    print(f"mock of {len(table)} stars: {time.perf_counter() - t0:.1f} s")

    cat = catalog_from_table(table, source="bench")
    cfg = load_fit_config(None, {"errors": {"samples": args.samples}})
    solar = SolarParameters.from_name("v4.0")
    t0 = time.perf_counter()
    terms, _ = star_terms(cat, spec, cfg, solar)
    print(f"star terms ({terms.n} stars; {args.samples} distance samples each, method {cfg['errors']['method']!r}): "
          f"{time.perf_counter() - t0:.2f} s")
    like = Likelihood(emu, terms, spec)
    rng = np.random.default_rng(0)
    lo, hi = np.asarray(emu.bounds).T
    th = lo + (hi - lo) * rng.uniform(0.3, 0.7, size=(args.walkers, len(lo)))
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=1, user_api="blas")  # as swerve fit does while sampling
    like(th)
    reps = 20
    t0 = time.perf_counter()
    for _ in range(reps):
        emu.predict(th, return_std=True)
    t_pred = (time.perf_counter() - t0) / reps
    print(f"emulator predict with std, {args.walkers} theta: {t_pred * 1e3:.2f} ms")
    # the emulator's error treatments side by side (the default, "catalog", last)
    for mode in ("none", "per-star", "catalog"):
        lk = Likelihood(emu, terms, spec, emulator_error=mode)
        lk(th)
        ts = []
        for _ in range(2 * reps):
            t0 = time.perf_counter()
            lk(th)
            ts.append(time.perf_counter() - t0)
        t_like = float(np.median(ts))
        print(f"log-likelihood ({mode!r} emulator error), {args.walkers} walkers, {terms.n} stars "
              f"({terms.cell.shape[1]} term(s) each): median {t_like * 1e3:.1f} ms, minimum {min(ts) * 1e3:.1f} ms "
              f"of {2 * reps} calls (target 5 ms)")

    t0 = time.perf_counter()
    simulate_point(setup.cfg, {n: truth[n] for n in setup.galaxy_names}, 1)
    t_sim = time.perf_counter() - t0
    print(f"brute force: one forward simulation (one design point, {setup.cfg['bank']['n_orbits']} orbits, "
          f"{setup.points_per_galaxy} launch points) {t_sim:.1f} s = {t_sim / (t_like / args.walkers):.0f}x "
          f"one walker's likelihood through the emulator")
    if args.skip_fit:
        return
    with tempfile.TemporaryDirectory() as tmp:
        path_all = Path(tmp) / "all.ecsv"
        path_less = Path(tmp) / "less.ecsv"
        write_mock(table, path_all)
        write_mock(table[:-1], path_less)
        out = Path(tmp) / "fit"
        t0 = time.perf_counter()
        a = run_fit(path_less, args.emulator, out, cfg)
        t_fit = time.perf_counter() - t0
        print(f"converged fit of {a.summary['stars']['used']} stars: {t_fit:.1f} s wall "
              f"(converged: {a.summary['sampler']['converged']}, {a.summary['sampler']['n_steps']} steps)")
        # the refit both ways: the default reweights the previous chain; "sample" samples anew
        # from its final walkers (each from a copy of the first fit's folder)
        import shutil

        results = {}
        for mode in ("reweight", "sample"):
            folder = Path(tmp) / f"refit-{mode}"
            shutil.copytree(out, folder)
            cfg_m = load_fit_config(None, {"errors": {"samples": args.samples}, "sampler": {"refit": mode}})
            t0 = time.perf_counter()
            b = results[mode] = run_fit(path_all, args.emulator, folder, cfg_m)
            t_refit = time.perf_counter() - t0
            smp = b.summary["sampler"]
            how = (f"reweighted: effective sample size {smp['importance']['ess']:.0f} of "
                   f"{smp['importance']['n_samples']}, Pareto k {smp['importance']['pareto_k']:.2f}"
                   if smp["method"] == "reweighted" else f"sampled: {smp['n_steps']} steps, converged {smp['converged']}")
            print(f"refit after adding one star, refit = {mode!r}: {t_refit:.1f} s wall "
                  f"(terms reused: {b.summary['stars']['terms_reused']}; {how})")
        for n, p in results["reweight"].summary["parameters"].items():
            q = results["sample"].summary["parameters"][n]
            print(f"  {n}: reweighted {p['median']:.4g} [{p['ci95'][0]:.4g}, {p['ci95'][1]:.4g}], "
                  f"sampled {q['median']:.4g} [{q['ci95'][0]:.4g}, {q['ci95'][1]:.4g}] (truth {truth.get(n)})")


if __name__ == "__main__":
    main()
