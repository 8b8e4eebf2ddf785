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

``--variants new old`` runs the Laplace path twice: ``new``, laplace_is's defaults (a mixture
proposal over up to 4 maxima, a defensive component); ``old``, one Student-t and no defensive
component (``max_modes=1, defensive=0``: the path before 2026-12-05); ``single``, one Student-t with
the defensive component. Where the weights are unreliable the path goes on as a fit does, with
emcee started from its draws (timed, and added to the path's time).
``--mocks K`` fits K mocks per size (mock seeds ``--seed`` + N + i); ``--emcee-cap N:0`` skips emcee
at size N:

    python benchmarks/large_catalogs.py --n-stars 10000 --mocks 3 --variants new old --emcee-cap 10000:0

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
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock, write_mock
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


def run(n, args, folder, emcee_steps_ref, mock_seed):
    from threadpoolctl import threadpool_limits

    from swerve.catalog import read_catalog
    from swerve.emulate import load
    from swerve.fit import load_fit_config
    from swerve.inference import adjust, n_walkers, prepare
    from swerve.sampling import sample_posterior

    t0 = time.perf_counter()
    path = make_catalog(n, mock_seed, args.bank_size, folder)
    t_mock = time.perf_counter() - t0
    cfg = load_fit_config()
    emu = load(args.emulator)
    problem = prepare(read_catalog(path), emu, cfg)  # the star terms, as swerve fit computes them
    terms, t_terms = problem.terms, problem.seconds_terms
    s = dict(cfg["sampler"])
    t0 = time.perf_counter()
    post, adjustment = adjust(problem, cfg)
    t_adjust = time.perf_counter() - t0
    x_map = np.array([adjustment["theta_hat"][nm] for nm in post.free_names])
    print(f"\n== {n} stars ({terms.n} used; mock seed {mock_seed}): mock {t_mock:.0f} s (not counted); star terms "
          f"{t_terms:.1f} s; maximum + curvature adjustment {t_adjust:.1f} s", flush=True)
    cap = args.cap.get(n)
    max_steps = cap or s["max_steps"]
    emcee_kw = dict(seed=s["seed"], nwalkers=s["nwalkers"] or None, max_steps=max_steps,
                    check_every=min(s["check_every"], max_steps), n_tau=s["n_tau"], tau_rtol=s["tau_rtol"])

    laps = [laplace_path(post, x_map, s, v, n_walkers(cfg, post.ndim), emcee_kw) for v in args.variants]
    if cap == 0:  # emcee skipped at this size
        for mm, (_, t_lap, t_fall, fall) in zip(args.variants, laps):
            print(f"fit time, laplace path ({mm}): {t_terms + t_adjust + t_lap + t_fall:.0f} s "
                  f"(star terms + maximum and adjustment + laplace-is{' + emcee from its draws' if fall else ''}); "
                  f"peak RSS so far {resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB", flush=True)
        return
    with threadpool_limits(limits=1, user_api="blas"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        bar = progress_recorder() if args.progress_trace else False
        res = sample_posterior(post, x_map=x_map, progress=bar, **emcee_kw)
        t_emcee = time.perf_counter() - t0
    if args.progress_trace:
        print("progress bar totals (step: total): " + ", ".join(f"{a}: {b}" for a, b in bar.made[-1].trace)
              + f"; steps run {res.n_steps}", flush=True)
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
    if res.converged:
        print_intervals("emcee", quantiles(res.samples), post.free_names)
    shared = t_terms + t_adjust
    tot_e = shared + t_emcee_full
    for mm, (lap, t_lap, t_fall, fall) in zip(args.variants, laps):
        tot_l = shared + t_lap + t_fall
        print(f"fit time ({mm}): emcee {tot_e:.0f} s{' (extrapolated)' if not res.converged else ''}, "
              f"laplace path {tot_l:.0f} s{' (laplace-is + emcee from its draws)' if fall else ''}, "
              f"ratio {tot_e / tot_l:.1f}; sampling alone {t_emcee_full:.0f} s vs {t_lap + t_fall:.1f} s "
              f"(ratio {t_emcee_full / (t_lap + t_fall):.0f}); peak RSS so far "
              f"{resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024:.0f} MB", flush=True)
        if res.converged and lap.reliable:
            compare(quantiles(res.samples), quantiles(lap.samples, lap.weights), res.samples.std(axis=0),
                    res.n_walkers * (res.n_steps - res.burn_in) / np.max(res.tau), lap.ess, post.free_names)


def progress_recorder():
    """A tqdm class that writes nothing and records (steps so far, total) at every change of its
    total: sample_posterior's estimate of the run's length."""
    import io

    from tqdm import tqdm

    class Recorder(tqdm):
        made = []

        def __init__(self, *a, **kw):
            self.trace = []
            Recorder.made.append(self)
            super().__init__(*a, file=io.StringIO(), **kw)

        @property
        def total(self):
            return self.__dict__.get("_total")

        @total.setter
        def total(self, value):
            self.__dict__["_total"] = value
            self.trace.append((getattr(self, "n", 0), value))

    return Recorder


#: laplace_is keywords of the variants --variants picks
VARIANTS = {"new": {}, "single": {"max_modes": 1}, "old": {"max_modes": 1, "defensive": 0.0}}


def laplace_path(post, x_map, s, variant, nwalkers, emcee_kw):
    """laplace-is from the adjustment's maximum, and, when its weights are unreliable, what a
    fit then does: emcee started from walkers drawn from its weighted draws. Returns (result,
    seconds, seconds of the emcee fall back, its SamplerResult or None)."""
    from threadpoolctl import threadpool_limits

    from swerve.laplace import laplace_is
    from swerve.sampling import sample_posterior

    with threadpool_limits(limits=1, user_api="blas"):
        t0 = time.perf_counter()
        lap = laplace_is(post, seed=s["seed"], x_map=x_map, **VARIANTS[variant])
        t_lap = time.perf_counter() - t0
    hist = "; ".join(f"round {i + 1}: {h['components']} component(s), ESS {h['ess']:.0f} of {h['n_draws']}, "
                     f"k {h['pareto_k']:.2f}" for i, h in enumerate(lap.history))
    print(f"laplace-is ({variant}): {t_lap:.1f} s, {lap.n_evaluations} posterior evaluations; "
          f"{lap.verdict} ({hist})", flush=True)
    for m in lap.maxima:
        print(f"  maximum: log posterior {m['log_post']:.2f} at {np.round(m['centre'], 4).tolist()}")
    for c in lap.components:
        print(f"  component: weight {c['weight']:.3f}, posterior mass {c['mass']:.3f}, centre "
              f"{np.round(c['centre'], 4).tolist()}")
    print_intervals("laplace-is", quantiles(lap.samples, lap.weights), post.free_names)
    if lap.reliable:
        return lap, t_lap, 0.0, None
    with threadpool_limits(limits=1, user_api="blas"), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        t0 = time.perf_counter()
        fall = sample_posterior(post, walkers=lap.start_walkers(nwalkers, np.random.default_rng(s["seed"])),
                                **dict(emcee_kw, nwalkers=nwalkers))
        t_fall = time.perf_counter() - t0
    print(f"  then emcee from its draws: {t_fall:.1f} s, {fall.n_steps} steps, "
          f"{'converged' if fall.converged else 'NOT converged'}; tau {np.round(fall.tau, 1).tolist()}", flush=True)
    print_intervals("emcee from laplace-is", quantiles(fall.samples), post.free_names)
    return lap, t_lap, t_fall, fall


def print_intervals(label, q, names):
    print(f"  {label}: median [68%] [95%]: " + "; ".join(
        f"{nm} {q[j, 2]:.4g} [{q[j, 1]:.4g}, {q[j, 3]:.4g}] [{q[j, 0]:.4g}, {q[j, 4]:.4g}]" for j, nm in enumerate(names)))


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
    ap.add_argument("--emcee-cap", default="", help="N:steps,... step caps of emcee per catalog size (0: no emcee)")
    ap.add_argument("--progress-trace", action="store_true",
                    help="print the emcee progress bar's total at each change (its estimate of the run's length)")
    ap.add_argument("--mocks", type=int, default=1, help="mocks per size (mock seeds seed + N + i)")
    ap.add_argument("--variants", nargs="+", default=["new"], choices=sorted(VARIANTS),
                    help="laplace_is settings, each run in turn (old: as before 2026-12-05)")
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
            for i in range(args.mocks):
                run(n, args, folder, ref, args.seed + n + i)


if __name__ == "__main__":
    main()
