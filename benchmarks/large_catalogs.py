"""Fit time of large catalogs: emcee (the path ``swerve fit`` runs) against the Laplace
approximation checked by importance sampling (:mod:`swerve.laplace`), on mocks of the demo
scenario (examples/make_demo.py: q_y = 1.1, q_z = 0.85, slope -0.5, its errors and selection).

Both paths share what comes before sampling, timed once: the star terms (``swerve.fit``'s own
per-star computation, 64 smoothed distance samples), the maximum and the curvature adjustment
(``[likelihood] adjust``, the default). Then emcee runs with ``swerve fit``'s default sampler
settings (walkers max(32, 4 d), checks every 250 steps, n_tau 50, tau_rtol 0.05), and the
Laplace path from the adjustment's maximum. Where ``--emcee-cap`` stops emcee before it
converges, its time is extrapolated: seconds per step times the steps the smallest catalog's
converged run needed (stated in the output). Medians and 68/95% intervals of the two paths are
compared in units of emcee's posterior standard deviation, beside their Monte Carlo errors.

    python benchmarks/large_catalogs.py --n-stars 800 10000 --emcee-cap 10000:300

``--against-fit RUN_FOLDER`` instead compares the Laplace path with the converged chain of a
finished ``swerve fit`` run folder (its stars.npz, the adjustment recorded in chain.key, chain.h5;
default emulator settings), without sampling again:

    python benchmarks/large_catalogs.py --against-fit RUN_FOLDER --emulator EMULATOR
"""

import argparse
import resource
import sys
import tempfile
import time
import warnings
from pathlib import Path

import numpy as np


def make_catalog(n, seed, bank_size, folder):
    from swerve.galaxy import HALO_FLATTENINGS, Galaxy
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.population import ErrorLaw, ErrorModel, make_mock, write_mock
    from swerve.selection import Selection

    flat = "density" if "density" in HALO_FLATTENINGS else "potential"
    gal = Galaxy.from_name(halo_flattening=flat, q_y=1.1, q_z=0.85)
    errors = ErrorModel(parallax=ErrorLaw(0.02), distance_frac=ErrorLaw(0.10), pm=ErrorLaw(0.0, 0.01, 1.0),
                        corr_pmra_pmdec=0.1, vlos=ErrorLaw(5.0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        table = make_mock(gal, BoundedPowerLawSpeed(v_min=700.0, v_max=3000.0, slope=-0.5),
                          Selection(r_min=10.0, r_max=100.0, outgoing=True), errors, n, seed, solar="v4.0",
                          flight_time_max=300.0, bank_size=bank_size, bank_options={"dt": 1.0})
    path = Path(folder) / f"mock{n}.ecsv"
    write_mock(table, path)
    return path


def quantiles(samples, weights=None):
    from swerve.sampling import weighted_percentile

    q = [2.5, 16, 50, 84, 97.5]
    if weights is None:
        return np.percentile(samples, q, axis=0).T
    return np.array([weighted_percentile(samples[:, j], weights, q) for j in range(samples.shape[1])])


def mc_error(ess):
    """Monte Carlo standard error (in posterior sd, for a Gaussian) of the 2.5/16/50/84/97.5%
    quantiles from ``ess`` effective samples: sqrt(p (1 - p)) / phi(z_p) / sqrt(ess)."""
    from scipy.stats import norm

    p = np.array([0.025, 0.16, 0.5, 0.84, 0.975])
    return np.sqrt(p * (1 - p)) / norm.pdf(norm.ppf(p)) / np.sqrt(ess)


def run(n, args, folder, emcee_steps_ref):
    from threadpoolctl import threadpool_limits

    from swerve.catalog import read_catalog
    from swerve.emulate import load
    from swerve.fit import _adjusted, _star_terms, load_fit_config
    from swerve.frames import SolarParameters
    from swerve.laplace import laplace_is
    from swerve.likelihood import Likelihood
    from swerve.sampling import Posterior, resolve_priors, sample_posterior
    from swerve.summaries import SummarySpec

    t0 = time.perf_counter()
    path = make_catalog(n, args.seed + n, args.bank_size, folder)
    t_mock = time.perf_counter() - t0
    cfg = load_fit_config()
    emu = load(args.emulator)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    solar = SolarParameters.from_name(cfg["frame"]["solar"])
    catalog = read_catalog(path)
    t0 = time.perf_counter()
    terms, _, _ = _star_terms(catalog, spec, cfg, solar)
    t_terms = time.perf_counter() - t0
    e = cfg["emulator"]
    like = Likelihood(emulator=emu, stars=terms, spec=spec, include_emulator_variance=e["include_variance"],
                      emulator_variance=e["variance"], emulator_error=e["error"], velocity_floor=e["velocity_floor"])
    bounds = np.asarray(like.bounds, dtype=float)
    names = list(like.parameter_names)
    priors = resolve_priors(names, bounds, cfg["priors"]["parameters"])
    plain = Posterior(like, priors)
    s = dict(cfg["sampler"])
    t0 = time.perf_counter()
    post, adjustment = _adjusted(plain, like, bounds, s, names, [])
    t_adjust = time.perf_counter() - t0
    x_map = np.array([adjustment["theta_hat"][nm] for nm in post.free_names])
    print(f"\n== {n} stars ({terms.n} used): mock {t_mock:.0f} s (not counted); star terms {t_terms:.1f} s; "
          f"maximum + curvature adjustment {t_adjust:.1f} s", flush=True)

    with threadpool_limits(limits=1, user_api="blas"):
        t0 = time.perf_counter()
        lap = laplace_is(post, seed=s["seed"], x_map=x_map)
        t_lap = time.perf_counter() - t0
    hist = "; ".join(f"round {i + 1}: ESS {h['ess']:.0f} of {h['n_draws']}, k {h['pareto_k']:.2f}"
                     for i, h in enumerate(lap.history))
    print(f"laplace-is: {t_lap:.1f} s, {lap.n_evaluations} posterior evaluations, "
          f"{'reliable' if lap.reliable else 'NOT reliable (emcee would take over)'} ({hist})", flush=True)

    cap = args.cap.get(n)
    max_steps = cap or s["max_steps"]
    with threadpool_limits(limits=1, user_api="blas"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        res = sample_posterior(post, seed=s["seed"], nwalkers=s["nwalkers"] or None, max_steps=max_steps,
                               check_every=min(s["check_every"], max_steps), n_tau=s["n_tau"],
                               tau_rtol=s["tau_rtol"], x_map=x_map)
        t_emcee = time.perf_counter() - t0
    per_step = t_emcee / res.n_steps
    if res.converged:
        emcee_steps_ref.setdefault("steps", res.n_steps)
        emcee_steps_ref.setdefault("n", n)
        t_emcee_full, how = t_emcee, f"converged after {res.n_steps} steps"
    else:
        ref = emcee_steps_ref.get("steps", 3250)
        src = (f"the {emcee_steps_ref['n']}-star run's" if "n" in emcee_steps_ref
               else "the 5000-star fit's (lead's measurement)")
        t_emcee_full = per_step * ref
        how = (f"capped at {res.n_steps} steps ({per_step:.3f} s/step); extrapolated to {ref} steps, "
               f"{src} converged length")
    print(f"emcee: {t_emcee:.1f} s, {how}; tau {np.round(res.tau, 1).tolist()}", flush=True)
    shared = t_terms + t_adjust
    tot_e, tot_l = shared + t_emcee_full, shared + t_lap
    print(f"fit time: emcee {tot_e:.0f} s{' (extrapolated)' if not res.converged else ''}, laplace-is {tot_l:.0f} s, "
          f"ratio {tot_e / tot_l:.1f}; sampling alone {t_emcee_full:.0f} s vs {t_lap:.1f} s "
          f"(ratio {t_emcee_full / t_lap:.0f}); peak RSS so far "
          f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB", flush=True)
    if res.converged:
        compare(quantiles(res.samples), quantiles(lap.samples, lap.weights), res.samples.std(axis=0),
                res.n_walkers * (res.n_steps - res.burn_in) / np.max(res.tau), lap.ess, post.free_names)


def compare(qe, ql, sd, ess_e, ess_l, names):
    tol = np.sqrt(mc_error(ess_e) ** 2 + mc_error(ess_l) ** 2)
    print(f"quantiles 2.5/16/50/84/97.5%: laplace-is minus emcee, in emcee's posterior sd "
          f"(combined Monte Carlo sd of each: {np.round(tol, 3).tolist()}; emcee ESS ~{ess_e:.0f}, "
          f"laplace-is ESS {ess_l:.0f})")
    worst = 0.0
    for j, name in enumerate(names):
        dz = (ql[j] - qe[j]) / sd[j]
        worst = max(worst, float(np.max(np.abs(dz) / tol)))
        print(f"  {name:8s} emcee median {qe[j, 2]:.4g} sd {sd[j]:.3g}; diff {np.round(dz, 3).tolist()}")
    print(f"  largest difference: {worst:.1f} combined Monte Carlo sd")


def against_fit(folder, args):
    """The Laplace path on the posterior of a finished fit, compared with its chain."""
    import json

    import emcee
    from threadpoolctl import threadpool_limits

    from swerve.adjustment import AdjustedLikelihood
    from swerve.emulate import load
    from swerve.laplace import laplace_is
    from swerve.likelihood import Likelihood, StarTerms
    from swerve.sampling import Posterior, burn_and_thin, resolve_priors
    from swerve.summaries import SummarySpec

    folder = Path(folder)
    emu = load(args.emulator)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    with np.load(folder / "stars.npz", allow_pickle=False) as z:
        cell, mean, cov, log_w = (z[k] for k in ("cell", "mean", "cov", "log_w"))
    terms = StarTerms(np.arange(len(cell)).astype(str), cell, mean, cov, log_w)
    e = json.loads((folder / "fit.json").read_text())["config"]["emulator"]
    like = Likelihood(emulator=emu, stars=terms, spec=spec, include_emulator_variance=e["include_variance"],
                      emulator_variance=e["variance"], emulator_error=e["error"], velocity_floor=e["velocity_floor"])
    a = json.loads((folder / "chain.key").read_text())["adjustment"]
    bounds = np.asarray(like.bounds, dtype=float)
    post = Posterior(AdjustedLikelihood(like, a["theta_hat"], a["C"], *bounds.T),
                     resolve_priors(like.parameter_names, bounds))
    b = emcee.backends.HDFBackend(str(folder / "chain.h5"), read_only=True)
    tau = b.get_autocorr_time(tol=0)
    burn, thin = burn_and_thin(tau, b.iteration)
    chain = b.get_chain(discard=burn, thin=thin, flat=True)
    x_map = np.asarray(a["theta_hat"], dtype=float)[post.free]
    print(f"{folder}: {terms.n} stars; chain {b.shape[0]} walkers x {b.iteration} steps; log posterior at the "
          f"recorded maximum {post(x_map[None])[0]:.2f}, highest in the chain "
          f"{np.max(b.get_log_prob(discard=burn, thin=thin, flat=True)):.2f}")
    with threadpool_limits(limits=1, user_api="blas"):
        t0 = time.perf_counter()
        lap = laplace_is(post, seed=1, x_map=x_map)
        t_lap = time.perf_counter() - t0
    hist = "; ".join(f"round {i + 1}: ESS {h['ess']:.0f} of {h['n_draws']}, k {h['pareto_k']:.2f}"
                     for i, h in enumerate(lap.history))
    print(f"laplace-is: {t_lap:.1f} s, {lap.n_evaluations} posterior evaluations, "
          f"{'reliable' if lap.reliable else 'NOT reliable'} ({hist})")
    compare(quantiles(chain), quantiles(lap.samples, lap.weights), chain.std(axis=0),
            b.shape[0] * (b.iteration - burn) / np.max(tau), lap.ess, post.free_names)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--n-stars", type=int, nargs="+", default=[800, 10000])
    ap.add_argument("--emcee-cap", default="", help="N:steps,... step caps of emcee per catalog size")
    ap.add_argument("--bank-size", type=int, default=8000)
    ap.add_argument("--seed", type=int, default=20261201)
    ap.add_argument("--emulator", default=None)
    ap.add_argument("--against-fit", default=None, help="a finished swerve fit run folder to compare with")
    args = ap.parse_args(argv)
    if args.emulator is None:
        from swerve.resources import default_emulator

        args.emulator = str(default_emulator())
    args.cap = {int(a): int(b) for a, b in (x.split(":") for x in args.emcee_cap.split(",") if x)}
    print(" ".join([Path(sys.argv[0]).name] + (argv if argv is not None else sys.argv[1:])))
    if args.against_fit:
        against_fit(args.against_fit, args)
        return
    ref = {}
    with tempfile.TemporaryDirectory() as folder:
        for n in sorted(args.n_stars):
            run(n, args, folder, ref)


if __name__ == "__main__":
    main()
