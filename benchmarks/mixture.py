"""Mixture with a stellar-halo background: fits of hypervelocity-star mocks contaminated by
halo stars, with and without the mixture, and the cost of a likelihood call with it.

    python benchmarks/mixture.py [--fractions 0.1,0.3,0.5] [--n 100] [--seeds 1] [--emulator emulators/default]
    python benchmarks/mixture.py --time [--n 801]

Mocks: as examples/make_demo.py, on the shipped emulator's model: its Galaxy (swerve-mw-1,
density-flattened halo) at q_y = 1.1, q_z = 0.85 and every other parameter at the midpoint of the
emulator's bounds, its launch family (power law on 700-3000 km/s, flight times up to 300 Myr), its
selection (10-250 kpc, outgoing); errors of the demo (parallax 0.02 mas, distance 10%, proper
motions 0.01 (d / 10 kpc) mas/yr, pmra-pmdec correlation 0.1, vlos 5 km/s). A catalog of N stars
with halo fraction x holds (1 - x) N hypervelocity stars of one mock and x N halo stars placed at
the true positions of other stars of the same mock (so both populations have the same spatial
distribution, where a constant f is the exact model), with velocities drawn from the halo's
velocity ellipsoid (swerve.background.HALO_SIGMA, Bond et al. 2010) truncated to outgoing stars,
and observed with the same error model.

Each catalog is fitted as ``swerve fit`` does by default (64 smoothed distance samples per star,
catalog-level emulator error, curvature adjustment, emcee to convergence) with
``background = "none"`` and ``"halo"`` (f_hvs uniform on [0, 1]); printed: each parameter's
median and 95% interval against the truth, f_hvs against the true fraction of hypervelocity stars
among the stars used, and the mean posterior membership of the true halo and hypervelocity stars.
"""

import argparse
import time

import numpy as np


def _setup(emulator):
    from swerve.emulate import load
    from swerve.simulate import training_setup_from_dict
    from swerve.summaries import SummarySpec

    emu = load(emulator)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    setup = training_setup_from_dict(emu.metadata["config"])
    lo, hi = np.asarray(emu.bounds).T
    truth = dict(zip(emu.parameter_names, 0.5 * (lo + hi)), q_y=1.1, q_z=0.85)
    return emu, spec, setup, truth


ERRORS = dict(parallax=0.02, distance_frac=0.10, pm=(0.0, 0.01, 1.0), corr_pmra_pmdec=0.1, vlos=5.0)


def _error_model():
    from swerve.measurement import ErrorLaw, ErrorModel

    return ErrorModel(parallax=ErrorLaw(ERRORS["parallax"]), distance_frac=ErrorLaw(ERRORS["distance_frac"]),
                      pm=ErrorLaw(*ERRORS["pm"]), corr_pmra_pmdec=ERRORS["corr_pmra_pmdec"],
                      vlos=ErrorLaw(ERRORS["vlos"]))


def contaminated_catalog(setup, truth, n, frac, seed, bank):
    """A Table of n stars, round(frac n) of them halo stars (column ``is_halo``)."""
    from astropy.table import Table, vstack

    from swerve.background import draw_halo_velocities
    from swerve.frames import galacto_to_helio
    from swerve.population import make_mock

    rng = np.random.default_rng(seed)
    n_halo = int(round(frac * n))
    galaxy = setup.galaxy_at(truth)
    launch = setup.launch_at({k: truth[k] for k in setup.launch_names})
    mock = make_mock(galaxy, launch, setup.selection, _error_model(), n + n_halo, rng, bank=bank,
                     flight_time_max=setup.flight_time_max, include_truth=True)
    hvs = mock[:n - n_halo]
    hvs = hvs[[c for c in hvs.colnames if not c.startswith("true_")]]
    hvs["is_halo"] = np.zeros(len(hvs), bool)
    if not n_halo:
        return hvs
    other = mock[n:]  # positions of stars not in the catalog
    pos = np.column_stack([np.asarray(other[f"true_{c}"], dtype=float) for c in "xyz"])
    vel = draw_halo_velocities(pos, rng)
    obs = _error_model().observe(galacto_to_helio(pos, vel, solar=mock.meta["solar"]), rng)
    halo = Table()
    halo["id"] = [f"halo{i:05d}" for i in range(n_halo)]
    for c in hvs.colnames:
        if c in obs:
            halo[c] = np.asarray(obs[c], dtype=float)
            halo[c].unit = hvs[c].unit
    halo["is_halo"] = np.ones(n_halo, bool)
    out = vstack([hvs, halo], metadata_conflicts="silent")
    out.meta = dict(mock.meta)
    return out


def fit(table, emu, spec, background, seed=1, max_steps=None):
    """The posterior as swerve fit's defaults give it: (summary, like, plain posterior, sampler
    result with the adjustment's ``kappa``, star terms)."""
    from threadpoolctl import threadpool_limits

    from swerve.adjustment import adjusted_posterior
    from swerve.catalog import catalog_from_table
    from swerve.fit import load_fit_config, star_terms
    from swerve.frames import SolarParameters
    from swerve.likelihood import Likelihood
    from swerve.sampling import Posterior, credible_summary, resolve_priors, sample_posterior

    cfg = load_fit_config(None)
    cat = catalog_from_table(table, source="mock")
    terms, _ = star_terms(cat, spec, cfg, SolarParameters.from_name(cfg["frame"]["solar"]))
    like = Likelihood(emu, terms, spec, background=background)
    plain = Posterior(like, resolve_priors(like.parameter_names, like.bounds))
    s = cfg["sampler"]
    with threadpool_limits(limits=1, user_api="blas"):
        post, x_map, _, info = adjusted_posterior(plain, like, like.bounds, np.random.default_rng(seed))
        res = sample_posterior(post, seed=seed, max_steps=max_steps or s["max_steps"], check_every=s["check_every"],
                               n_tau=s["n_tau"], tau_rtol=s["tau_rtol"])
    res.kappa = np.asarray(info["kappa"]).tolist()
    return credible_summary(res.samples, res.names), like, plain, res, terms


def run(args):
    import warnings

    from swerve.bank import build_bank
    from swerve.population import bank_region
    from swerve.sampling import ConvergenceWarning, posterior_warnings

    warnings.simplefilter("ignore", ConvergenceWarning)  # reported in the line of each fit
    emu, spec, setup, truth = _setup(args.emulator)
    galaxy = setup.galaxy_at(truth)
    r_min, r_max = bank_region(setup.selection, "v4.0")
    t0 = time.perf_counter()
    bank = build_bank(galaxy, args.bank, 20261205, t_max=setup.flight_time_max, dt=1.0, r_min_store=r_min,
                      r_max=r_max)
    print(f"bank of {args.bank} orbits: {time.perf_counter() - t0:.1f} s")
    print(f"truth: {', '.join(f'{k} = {v:.4g}' for k, v in truth.items())}")
    names = list(emu.parameter_names)
    for frac in args.fractions:
        for seed in range(1, args.seeds + 1):
            table = contaminated_catalog(setup, truth, args.n, frac, 1000 * seed + int(round(100 * frac)), bank)
            for bg in ("none", "halo"):
                t1 = time.perf_counter()
                summ, like, plain, res, terms = fit(table, emu, spec, bg, seed, args.max_steps)
                used_halo = np.isin(terms.ids.astype(str), np.asarray(table["id"][table["is_halo"]], dtype=str))
                cells = []
                for nm in names:
                    s = summ[nm]
                    ok = s["ci95"][0] <= truth[nm] <= s["ci95"][1]
                    cells.append(f"{nm} {s['median']:.4g} [{s['ci95'][0]:.4g}, {s['ci95'][1]:.4g}]"
                                 + ("" if ok else " MISS"))
                line = (f"x = {frac:.1f} seed {seed} background = {bg:<4}: {terms.n} stars used "
                        f"({int(used_halo.sum())} halo); " + "; ".join(cells))
                if bg == "halo":
                    s = summ["f_hvs"]
                    f_true = 1.0 - used_halo.mean()
                    ok = s["ci95"][0] <= f_true <= s["ci95"][1]
                    draws = res.samples[np.random.default_rng(0).choice(len(res.samples), 100, replace=False)]
                    mem = like.membership(plain.full(draws)).mean(axis=0)
                    line += (f"; f_hvs {s['median']:.3f} [{s['ci95'][0]:.3f}, {s['ci95'][1]:.3f}] "
                             f"(true {f_true:.3f}{'' if ok else ' MISS'}); mean membership: halo stars "
                             f"{mem[used_halo].mean() if used_halo.any() else float('nan'):.3f}, "
                             f"hypervelocity stars {mem[~used_halo].mean():.3f}")
                line += (f"; tau max {np.max(res.tau):.0f}, {res.n_steps} steps"
                         f"{'' if res.converged else ' (NOT converged)'}, {time.perf_counter() - t1:.0f} s")
                print(line, flush=True)
                warn = posterior_warnings(res.samples, res.names, plain.priors, kappa=res.kappa, n_stars=terms.n,
                                          catalog_meta=dict(table.meta), emulator_meta=emu.metadata)
                print(f"    kappa {', '.join(f'{k:.2f}' for k in res.kappa)}; warnings: "
                      + ("; ".join(w.split(":")[0] + ": " + w.split(":")[1].strip()[:60] for w in warn) or "none"),
                      flush=True)


def time_calls(args):
    from swerve.bank import build_bank
    from swerve.population import bank_region

    emu, spec, setup, truth = _setup(args.emulator)
    r_min, r_max = bank_region(setup.selection, "v4.0")
    bank = build_bank(setup.galaxy_at(truth), 4000, 11, t_max=setup.flight_time_max, dt=1.0, r_min_store=r_min, r_max=r_max)
    table = contaminated_catalog(setup, truth, args.n, 0.3, 11, bank)
    from threadpoolctl import threadpool_limits

    from swerve.catalog import catalog_from_table
    from swerve.fit import load_fit_config, star_terms
    from swerve.frames import SolarParameters
    from swerve.likelihood import Likelihood

    cfg = load_fit_config(None)
    terms, _ = star_terms(catalog_from_table(table, source="mock"), spec, cfg, SolarParameters.from_name("v4.0"))
    threadpool_limits(limits=1, user_api="blas")
    lo, hi = np.asarray(emu.bounds).T
    th = lo + (hi - lo) * np.random.default_rng(0).uniform(0.3, 0.7, size=(64, len(lo)))
    th_f = np.column_stack([th, np.random.default_rng(1).uniform(0.5, 0.9, 64)])
    t0 = time.perf_counter()
    mix = Likelihood(emu, terms, spec, background="halo")
    t_bg = time.perf_counter() - t0
    plain = Likelihood(emu, terms, spec)

    def tm(f, reps=40):
        f()
        ts = []
        for _ in range(reps):
            t1 = time.perf_counter()
            f()
            ts.append(time.perf_counter() - t1)
        return np.median(ts) * 1e3, np.min(ts) * 1e3

    print(f"{terms.n} stars x {cfg['errors']['samples']} samples; halo densities computed once in "
          f"{1e3 * t_bg:.0f} ms (with the rest of the likelihood's set-up)")
    for W in (32, 64):
        a = tm(lambda: plain(th[:W]))
        b = tm(lambda: mix(th_f[:W]))
        print(f"  call, {W} walkers (median / min of 40): background none {a[0]:.2f} / {a[1]:.2f} ms, "
              f"halo {b[0]:.2f} / {b[1]:.2f} ms")


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--emulator", default="emulators/default")
    ap.add_argument("--fractions", default="0.1,0.3,0.5")
    ap.add_argument("--n", type=int, default=None, help="stars per catalog (default 100; 801 with --time)")
    ap.add_argument("--seeds", type=int, default=1)
    ap.add_argument("--bank", type=int, default=4000)
    ap.add_argument("--max-steps", type=int, default=None, help="step cap of each fit (default swerve fit's)")
    ap.add_argument("--time", action="store_true", help="time likelihood calls with and without the background")
    args = ap.parse_args()
    args.fractions = [float(x) for x in args.fractions.split(",")]
    if args.time:
        args.n = args.n or 801
        return time_calls(args)
    args.n = args.n or 100
    return run(args)


if __name__ == "__main__":
    main()
