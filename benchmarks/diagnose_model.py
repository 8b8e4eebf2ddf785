"""Diagnostics behind the "Validation" section of RESULTS.md: how far the per-cell Gaussian is
from the stars, and where calibration misses sit.

    python benchmarks/diagnose_model.py cells                # a 4000-star mock at the q_z = 1 grid Galaxy
    python benchmarks/diagnose_model.py edges runs/calibration-floor/validation.json
    python benchmarks/diagnose_model.py shape                # v_r and deflection shapes, no errors
    python benchmarks/diagnose_model.py fixed --param m_disk # repeated fits at fixed truths
    python benchmarks/diagnose_model.py along --param m_disk # emulator against precise simulations
    python benchmarks/diagnose_model.py sandwich             # information equality at the truth
    python benchmarks/diagnose_model.py prior-cut            # what a face alone does to z (Monte Carlo)
    python benchmarks/diagnose_model.py conditional          # v_tf | v_r: linear vs 1/v_r model, per cell

``cells``: draws one error-free and one realistic-error mock (full simulation, 4000 stars) at the
power grid's q_z = 1 Galaxy and prints the smallest standard deviation of each emulated cell
Gaussian (no velocity floor), the Mahalanobis distances of the stars at the truth (χ²₃ for a
correct model: mean 3, 1% beyond 11.34), and per cell the skewness and excess kurtosis of the
folded velocities.

``shape``: the error-free selected population of the grid Galaxy (q_y = q_z = 1, or
``--q-z``) at three launch slopes: per cell holding >= 2% of the stars, the weighted mean,
standard deviation, skewness and excess kurtosis of v_r and the fraction a Gaussian of those
moments puts below v_r = 0; then, at slope -0.5, the mean and spread of v_tf in bands of v_r
against the cell Gaussian's linear regression and its single conditional spread.

``fixed``: at three truths along ``--param`` (``--at``, as fractions of its range; the other
parameters at ``--others`` of theirs, off the symmetric q_y = 1 point), ``--catalogs`` catalogs of
``--n-stars`` stars, each from its own full simulation, fitted as the 64-sample calibration
fits them; per parameter the coverage of the 68% and 95% intervals and the mean and spread of
``z = (median - truth) / (68% half-width)``. A calibrated posterior need not cover at a fixed
truth near a face (the prior's cut pulls the median inward by about 0.45 of z at 0.08 of the
range from the face, for a Gaussian likelihood of that width); the spread of z tells the width.
``--emulator-error`` refits the same catalogs (same ``--seed``) with another treatment of the
emulator's error.

``along``: at the same truths, the summaries of a simulation of 8 banks of 4000 orbits (8× a
training point's) at the domain's middle launch slope against the emulator, z per output by
the emulator's standard deviation and the simulation's noise; and the value of ``--param`` that
minimises χ² over all outputs with the others at the truth (where the emulator alone would put
it).

``sandwich``: at the same truths, ``--catalogs`` catalogs of ``--n-stars`` stars (each from its
own full simulation, distance samples as the fits draw them) and, per parameter, the
likelihood's score at the truth (central differences, 1e-4 of the range; per star, central differences over 0.02 of the range) and
its curvature (a parabola fitted to the total over 0.1 of the range either side: the emulated
surface has wiggles of ~0.03 in log L on scales of ~0.01, whose second differences would swamp
a finer stencil). For a correctly specified
likelihood the score's variance equals the expected curvature (the information equality); a
ratio ``Var(score) / E[-curvature]`` above 1 means posteriors too narrow by about its square
root (Chandler & Bate 2007, Biometrika 94, 167, for the adjustment of composite likelihoods;
from memory). Two estimates of the variance: across catalogs, and per catalog as the sum of
the stars' squared scores (the stars are independent).

``prior-cut``: the reference for ``fixed`` near a face: a Gaussian likelihood of width ``--sigma``
(fractions of the range) centred on a noisy draw about a truth ``--distance`` from the upper
face, a flat prior cut at the faces; the mean and spread of z and the coverages (20,000 draws).

``edges``: from a `swerve validate` report, the extreme simulation-based-calibration ranks
(0, 1, n-1 or n of n draws) of truths in the outer eighth of each parameter's range against the
rest.
"""

from __future__ import annotations

import argparse
import json
import warnings

import numpy as np


def cells(args):
    from scipy import stats

    from swerve.catalog import catalog_from_table
    from swerve.emulate import load
    from swerve.likelihood import Likelihood, prepare_stars, smoothed_samples
    from swerve.measurement import draw_samples, parse_error_model
    from swerve.simulate import training_setup_from_dict
    from swerve.summaries import SummarySpec
    from swerve.validation import _grid_theta, draw_catalogs, validation_bank

    emu = load(args.emulator)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    setup = training_setup_from_dict(emu.metadata["config"])
    rng = np.random.default_rng(5)
    names = list(emu.parameter_names)
    gal_t, lau_t = _grid_theta(setup, emu, 1.0, 1.0)
    gal = setup.galaxy_at(gal_t)
    bank = validation_bank(setup, gal, 7)
    truth = np.array([[{**gal_t, **lau_t}[n] for n in names]])
    like = None
    for err in ("none", "pm=0.02,vlos=5,dist=0.1"):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tabs, _ = draw_catalogs(setup, gal, setup.launch_at(lau_t), bank, parse_error_model(err), args.n_stars, 1, rng)
        cat = catalog_from_table(tabs[0], source="mock")
        st = prepare_stars(cat, smoothed_samples(cat, draw_samples(cat, 16, rng)), spec)
        like = Likelihood(emu, st, spec, emulator_error="none", velocity_floor=0.0)
        mu, sig = like.cell_gaussians(truth)
        k = np.argmax(st.log_w, axis=1)
        idx = np.arange(st.n)
        c, u, C = st.cell[idx, k], st.mean[idx, k], st.cov[idx, k]
        d = u - mu[0, c]
        q = np.einsum("ni,ni->n", d, np.linalg.solve(sig[0, c] + C, d[..., None])[..., 0])
        print(f"errors {err!r}, {st.n} stars: Mahalanobis distance at the truth (most probable sample): "
              f"mean {q.mean():.1f}, median {np.median(q):.2f}, beyond 11.34: {np.mean(q > 11.34):.3f}, max {q.max():.0f}")
        for cc in range(spec.n_cells):
            m = c == cc
            if m.sum() > 50:
                print(f"  cell {cc:2d} ({m.sum():4d} stars): skewness v_r {stats.skew(u[m, 0]):5.2f}; excess kurtosis "
                      + " ".join(f"{stats.kurtosis(u[m, a]):6.2f}" for a in range(3)) + " (v_r, v_θ', v_φ')")
    sd_min = np.sqrt(np.linalg.eigvalsh(like.cell_gaussians(truth)[1][0])[:, 0])
    print("smallest standard deviation of each emulated cell Gaussian, km/s:", np.round(sd_min, 2))


def shape(args):
    from scipy.stats import norm

    from swerve.emulate import load
    from swerve.population import population_from_bank
    from swerve.simulate import training_setup_from_dict
    from swerve.summaries import SummarySpec, folded_components
    from swerve.validation import _grid_theta, validation_bank

    emu = load(args.emulator)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    setup = training_setup_from_dict(emu.metadata["config"])
    gal_t, _ = _grid_theta(setup, emu, 1.0, args.q_z)
    gal = setup.galaxy_at(gal_t)
    bank = validation_bank(setup, gal, 7)
    for slope in (-1.5, -0.5, 0.5):
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            pop = population_from_bank(bank, setup.launch_at({"slope": slope}), selection=setup.selection,
                                       galaxy=gal, flight_time_max=setup.flight_time_max,
                                       rng=np.random.default_rng(1))
        u = folded_components(pop.pos, pop.vel)
        w = pop.weight / pop.weight.sum()
        c = spec.cell_index(pop.pos)
        print(f"slope {slope}: v_r per cell (fraction of stars, mean, sd, skewness, excess kurtosis, "
              f"Gaussian mass below 0)")
        for cc in range(spec.n_cells):
            m = c == cc
            if w[m].sum() < 0.02:
                continue
            ww, x = w[m] / w[m].sum(), u[m, 0]
            mu = ww @ x
            sd = np.sqrt(ww @ (x - mu) ** 2)
            z = (x - mu) / sd
            print(f"  cell {cc:2d}  {w[m].sum():.3f}  {mu:6.0f}  {sd:5.0f}  {ww @ z**3:5.2f}  {ww @ z**4 - 3:5.2f}  "
                  f"{norm.cdf(-mu / sd):.3f}")
        if slope != -0.5:
            continue
        edges_ = np.array([0, 300, 600, 900, 1200, 1600, 2000, 3200.0])
        print("  v_tf in v_r bands " + str(edges_.tolist()) + ": band mean / cell Gaussian's regression mean / band sd")
        for cc in range(spec.n_cells):
            m = c == cc
            if w[m].sum() < 0.02:
                continue
            ww, x = w[m] / w[m].sum(), u[m]
            mu = ww @ x
            C = ((x - mu) * ww[:, None]).T @ (x - mu)
            b = C[1, 0] / C[0, 0]
            line = []
            for lo, hi in zip(edges_[:-1], edges_[1:]):
                sel = (x[:, 0] >= lo) & (x[:, 0] < hi)
                if ww[sel].sum() < 0.01:
                    line.append("   --")
                    continue
                wv = ww[sel] / ww[sel].sum()
                mt = wv @ x[sel, 1]
                line.append(f"{mt:5.1f}/{mu[1] + b * (wv @ x[sel, 0] - mu[0]):5.1f}/{np.sqrt(wv @ (x[sel, 1] - mt) ** 2):4.1f}")
            print(f"  cell {cc:2d} conditional sd {np.sqrt(C[1, 1] - C[1, 0] ** 2 / C[0, 0]):5.1f}: " + " ".join(line))


def _cond_fit(vr, y, w, kind):
    """Weighted fit of v_tf given v_r: ``linear`` (the cell Gaussian's conditional: mean a + b v_r,
    one spread) or ``inverse`` (mean a + b / v_r, spread c / v_r: a Gaussian in v_tf v_r with mean
    linear in v_r). Returns a function giving each star's log density of v_tf."""
    v = np.maximum(vr, V_R_FLOOR)
    if kind == "linear":
        X, t = np.column_stack([np.ones_like(v), v]), y
    else:
        X, t = np.column_stack([np.ones_like(v), v]), y * v  # v_tf v_r = a v_r + b
    beta = np.linalg.solve(X.T @ (X * w[:, None]), X.T @ (w * t))
    s2 = float(w @ (t - X @ beta) ** 2 / w.sum())

    def logpdf(vr2, y2):
        v2 = np.maximum(vr2, V_R_FLOOR)
        X2 = np.column_stack([np.ones_like(v2), v2])
        t2 = y2 if kind == "linear" else y2 * v2
        lp = -0.5 * (t2 - X2 @ beta) ** 2 / s2 - 0.5 * np.log(2 * np.pi * s2)
        return lp if kind == "linear" else lp + np.log(v2)  # the Jacobian of v_tf -> v_tf v_r

    return logpdf


#: v_r below which the inverse model holds v_r fixed (km/s): the selection keeps outgoing stars,
#: a few with v_r near 0
V_R_FLOOR = 100.0


def conditional(args):
    """Per cell, the two conditional models of v_tf given v_r fitted to one half of the error-free
    population of the grid Galaxy (q_y = 1, q_z = ``--q-z``, launch slope -0.5) and scored on the
    other half: the weighted mean log density of v_tf | v_r per star (higher: the model describes
    the stars better)."""
    from swerve.emulate import load
    from swerve.population import population_from_bank
    from swerve.simulate import training_setup_from_dict
    from swerve.summaries import SummarySpec, folded_components
    from swerve.validation import _grid_theta, validation_bank

    emu = load(args.emulator)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    setup = training_setup_from_dict(emu.metadata["config"])
    gal_t, _ = _grid_theta(setup, emu, 1.0, args.q_z)
    gal = setup.galaxy_at(gal_t)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        pop = population_from_bank(validation_bank(setup, gal, 7, args.n_orbits), setup.launch_at({"slope": -0.5}),
                                   selection=setup.selection, galaxy=gal, flight_time_max=setup.flight_time_max,
                                   rng=np.random.default_rng(7))
    u, w, c = folded_components(pop.pos, pop.vel), pop.weight, spec.cell_index(pop.pos)
    half = np.random.default_rng(3).random(len(w)) < 0.5
    print(f"q_z = {args.q_z}, slope -0.5, error-free; per cell: share of stars, held-out mean log density of "
          "v_tf | v_r per star: linear (mean a + b v_r, one spread) / inverse (mean a + b / v_r, spread c / v_r)")
    tot = np.zeros(2)
    for cc in range(spec.n_cells):
        m = c == cc
        share = w[m].sum() / w.sum()
        if share < 0.02:
            continue
        lps = []
        for kind in ("linear", "inverse"):
            fit = _cond_fit(u[m & half, 0], u[m & half, 1], w[m & half], kind)
            ww = w[m & ~half]
            lps.append(float(ww @ fit(u[m & ~half, 0], u[m & ~half, 1]) / ww.sum()))
        tot += share * np.array(lps)
        print(f"  cell {cc:2d}  {share:.3f}  {lps[0]:7.3f} / {lps[1]:7.3f}")
    print(f"  share-weighted over these cells: {tot[0]:.3f} / {tot[1]:.3f}")

def edges(args):
    d = json.load(open(args.report))
    c = d["calibration"]
    names = list(c["parameters"])
    T = np.array(c["truths"], dtype=float)
    emu_bounds = d["settings"].get("emulator_bounds")
    from swerve.emulate import load

    b = np.asarray(emu_bounds if emu_bounds else load(d["settings"]["emulator"]).bounds, dtype=float)
    n_draws = int(c["n_draws"])
    print(f"{len(T)} catalogs; extreme rank = 0, 1, {n_draws - 1} or {n_draws} of {n_draws} draws "
          f"({4 / (n_draws + 1):.0%} expected when calibrated)")
    for j, n in enumerate(names):
        u = (T[:, j] - b[j, 0]) / (b[j, 1] - b[j, 0])
        edge = (u < 1 / 8) | (u > 7 / 8)
        r = np.asarray(c["parameters"][n]["ranks"])
        ext = (r <= 1) | (r >= n_draws - 1)
        print(f"{n:8s} edge truths {ext[edge].sum():2d} / {edge.sum():2d} extreme; interior {ext[~edge].sum():2d} / {(~edge).sum():2d}")


def _truths(emu, param, at, others):
    names = list(emu.parameter_names)
    lo, hi = np.asarray(emu.bounds).T
    for a in at:
        u = np.full(len(names), others)
        u[names.index(param)] = a
        yield a, dict(zip(names, lo + (hi - lo) * u))


def fixed(args):
    import time

    from swerve.emulate import load
    from swerve.measurement import parse_error_model
    from swerve.simulate import training_setup_from_dict
    from swerve.validation import draw_catalogs, fit_many, validation_bank

    emu = load(args.emulator)
    setup = training_setup_from_dict(emu.metadata["config"])
    rng = np.random.default_rng(args.seed)
    cfg = dict(samples=64, nwalkers=32, max_steps=2500, check_every=250, n_tau=25.0, tau_rtol=0.1, n_draws=49,
               emulator_error=args.emulator_error, adjust=args.adjust)
    for a, truth in _truths(emu, args.param, args.at, args.others):
        gal = setup.galaxy_at({n: truth[n] for n in setup.galaxy_names})
        launch = setup.launch_at({n: truth[n] for n in setup.launch_names})
        tasks = []
        t0 = time.time()
        for _ in range(args.catalogs):
            bank = validation_bank(setup, gal, int(rng.integers(2 ** 31)))
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                tabs, _ = draw_catalogs(setup, gal, launch, bank, parse_error_model(args.errors), args.n_stars, 1, rng)
            tasks.append((tabs[0], int(rng.integers(2 ** 31)), None))
        res = fit_many(args.emulator, tasks, cfg, n_jobs=2)
        print(f"== {args.param} at {a:.3g} of its range ({truth[args.param]:.4g}); {len(res)} catalogs, "
              f"{time.time() - t0:.0f} s")
        for n in emu.parameter_names:
            j = list(res[0]["names"]).index(n)
            med, l68, h68, l95, h95 = (np.array([r[k][j] for r in res]) for k in ("median", "lo68", "hi68", "lo95", "hi95"))
            t = truth[n]
            z = (med - t) / (0.5 * (h68 - l68))
            print(f"  {n:7s} truth {t:<10.4g} coverage 68% {np.mean((l68 <= t) & (t <= h68)):.2f}, "
                  f"95% {np.mean((l95 <= t) & (t <= h95)):.2f}; z mean {z.mean():+.2f} (± {z.std(ddof=1) / np.sqrt(len(z)):.2f}), "
                  f"sd {z.std(ddof=1):.2f}")


def along(args):
    from swerve.bank import build_bank
    from swerve.emulate import load
    from swerve.population import population_from_bank
    from swerve.simulate import training_setup_from_dict
    from swerve.summaries import compute_summaries

    emu = load(args.emulator)
    setup = training_setup_from_dict(emu.metadata["config"])
    b = setup.cfg["bank"]
    names = list(emu.parameter_names)
    lo, hi = np.asarray(emu.bounds).T
    k = names.index(args.param)
    grid = np.linspace(0.0, 1.0, 161)
    rng = np.random.default_rng(args.seed)
    R = 8
    for a, truth in _truths(emu, args.param, args.at, args.others):
        gal = setup.galaxy_at({n: truth[n] for n in setup.galaxy_names})
        launch = setup.launch_at({n: truth[n] for n in setup.launch_names})
        banks = [build_bank(gal, b["n_orbits"], int(rng.integers(2 ** 31)), t_max=setup.flight_time_max, dt=b["dt"],
                            v_lo=b["v_lo"], v_hi=b["v_hi"], r_min_store=setup.spec.r_edges[0],
                            r_max=setup.spec.r_edges[-1], rtol=b["rtol"]) for _ in range(R)]
        parts = [population_from_bank(bk, launch, selection=setup.selection, galaxy=gal, mirror="none",
                                      flight_time_max=setup.flight_time_max) for bk in banks]
        off = np.cumsum([0] + [bk.n_orbits for bk in banks])
        res = compute_summaries(setup.spec, np.concatenate([p.pos for p in parts]), np.concatenate([p.vel for p in parts]),
                                np.concatenate([p.weight / R for p in parts]),
                                np.concatenate([p.orbit + off[j] for j, p in enumerate(parts)]), rng,
                                replicate=np.concatenate([np.full(p.n, j) for j, p in enumerate(parts)]))
        y, v = np.asarray(res.values), np.asarray(res.noise_var)
        th = np.repeat(np.array([truth[n] for n in names])[None], len(grid), axis=0)
        th[:, k] = lo[k] + (hi[k] - lo[k]) * grid
        yh, sd = emu.predict(th, return_std=True)
        chi2 = np.nansum((yh - y) ** 2 / (sd ** 2 + v), axis=1)
        yt, sdt = emu.predict(th[:1] * 0 + np.array([truth[n] for n in names]), return_std=True)
        z = (yt[0] - y) / np.sqrt(sdt[0] ** 2 + v)
        best = lo[k] + (hi[k] - lo[k]) * grid[np.argmin(chi2)]
        chi_t = np.nansum(z ** 2)
        print(f"{args.param} at {a:.3g} of its range ({truth[args.param]:.4g}): {len(z)} outputs, RMS z {np.sqrt(np.nanmean(z ** 2)):.2f}, "
              f"mean z {np.nanmean(z):+.2f}, |z| > 3: {int(np.sum(np.abs(z) > 3))}; chi2 {chi_t:.0f} at the truth, "
              f"{chi2.min():.0f} at {args.param} = {best:.4g} (the minimum along {args.param})")
        stat = np.array([o.split("_", 1)[1] for o in emu.output_names])
        print("    RMS z per statistic: " + ", ".join(f"{t} {np.sqrt(np.nanmean(z[stat == t] ** 2)):.2f}"
                                                   for t in dict.fromkeys(stat)))


def sandwich(args):
    import time

    from swerve.catalog import catalog_from_table
    from swerve.emulate import load
    from swerve.likelihood import Likelihood, prepare_stars, smoothed_samples
    from swerve.measurement import draw_samples, parse_error_model
    from swerve.simulate import training_setup_from_dict
    from swerve.summaries import SummarySpec
    from swerve.validation import draw_catalogs, validation_bank

    emu = load(args.emulator)
    setup = training_setup_from_dict(emu.metadata["config"])
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    names = list(emu.parameter_names)
    lo, hi = np.asarray(emu.bounds).T
    span = hi - lo
    d = len(names)
    rng = np.random.default_rng(args.seed)
    h1 = 0.02  # score step: wider than the emulated surface's small wiggles (see RESULTS.md)
    g = np.linspace(-0.1, 0.1, 11)  # curvature: a parabola fitted over +-0.1 of each range
    for a, truth in _truths(emu, args.param, args.at, args.others):
        t0 = time.time()
        gal = setup.galaxy_at({n: truth[n] for n in setup.galaxy_names})
        launch = setup.launch_at({n: truth[n] for n in setup.launch_names})
        th = np.array([truth[n] for n in names])
        pts, dx, lines = [], [], []
        for k in range(d):
            for sgn in (1, -1):
                p = th.copy()
                p[k] = np.clip(th[k] + sgn * h1 * span[k], lo[k], hi[k])
                pts.append(p)
            dx.append((pts[-2][k] - pts[-1][k]) / span[k])
            inside = (th[k] + g * span[k] >= lo[k]) & (th[k] + g * span[k] <= hi[k])
            lines.append((len(pts), g[inside]))
            for gi in g[inside]:
                p = th.copy()
                p[k] = th[k] + gi * span[k]
                pts.append(p)
        pts = np.array(pts)
        S, J, H = [], [], []
        for _ in range(args.catalogs):
            bank = validation_bank(setup, gal, int(rng.integers(2 ** 31)))
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                tabs, _ = draw_catalogs(setup, gal, launch, bank, parse_error_model(args.errors), args.n_stars, 1, rng)
            cat = catalog_from_table(tabs[0], source="mock")
            smp = smoothed_samples(cat, draw_samples(cat, 64, rng))
            like = Likelihood(emu, prepare_stars(cat, smp, spec), spec, emulator_error="none")
            ps = like.per_star(pts)  # (n_points, n_star)
            tot = ps.sum(axis=1)
            s_k, j_k, h_k = [], [], []
            for k in range(d):
                i = lines[k][0] - 2
                s_i = (ps[i] - ps[i + 1]) / dx[k]  # per-star score, per unit of the range
                j0, gk = lines[k]
                h_k.append(2.0 * np.polyfit(gk, tot[j0:j0 + len(gk)], 2)[0])
                s_k.append(s_i.sum())
                j_k.append(np.sum(s_i**2))
            S.append(s_k)
            J.append(j_k)
            H.append(h_k)
        S, J, H = np.array(S), np.array(J), np.array(H)
        print(f"== {args.param} at {a:.3g} of its range ({truth[args.param]:.4g}); {len(S)} catalogs of {args.n_stars} stars, "
              f"{time.time() - t0:.0f} s")
        for k, n in enumerate(names):
            info = -H[:, k].mean()
            print(f"  {n:7s} E[-curvature] {info:10.4g}; Var(score) across catalogs {S[:, k].var(ddof=1):10.4g} "
                  f"(ratio {S[:, k].var(ddof=1) / info:5.2f}), sum of squared star scores {J[:, k].mean():10.4g} "
                  f"(ratio {J[:, k].mean() / info:5.2f}); mean score {S[:, k].mean():+.3g} "
                  f"(± {S[:, k].std(ddof=1) / np.sqrt(len(S)):.2g})")


def prior_cut(args):
    from scipy.stats import truncnorm

    rng = np.random.default_rng(0)
    t = 1.0 - args.distance
    for sig in args.sigma:
        z, c68, c95 = [], [], []
        for _ in range(20000):
            m = rng.normal(t, sig)
            q = truncnorm.ppf([0.025, 0.16, 0.5, 0.84, 0.975], (0 - m) / sig, (1 - m) / sig, loc=m, scale=sig)
            z.append((q[2] - t) / (0.5 * (q[3] - q[1])))
            c68.append(q[1] <= t <= q[3])
            c95.append(q[0] <= t <= q[4])
        z = np.array(z)
        print(f"sigma {sig:.3g}, truth {args.distance:.3g} of the range below the face: z mean {z.mean():+.2f}, "
              f"sd {z.std():.2f}; coverage 68% {np.mean(c68):.2f}, 95% {np.mean(c95):.2f}")


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = ap.add_subparsers(dest="what", required=True)
    a = sub.add_parser("cells")
    a.add_argument("--emulator", default="emulators/default")
    a.add_argument("--n-stars", type=int, default=4000)
    sh = sub.add_parser("shape")
    sh.add_argument("--emulator", default="emulators/default")
    sh.add_argument("--q-z", type=float, default=1.0)
    cd = sub.add_parser("conditional")
    cd.add_argument("--emulator", default="emulators/default")
    cd.add_argument("--q-z", type=float, default=1.0)
    cd.add_argument("--n-orbits", type=int, default=0, help="orbits per bank (0: the training configuration's)")
    for name in ("fixed", "along", "sandwich"):
        f = sub.add_parser(name)
        f.add_argument("--emulator", default="emulators/default")
        f.add_argument("--param", default="m_disk")
        f.add_argument("--at", type=lambda t: [float(x) for x in t.split(",")], default=[0.5, 0.92, 0.08],
                       help="truths, as fractions of the parameter's range (comma-separated)")
        f.add_argument("--others", type=float, default=0.45, help="the other parameters, as a fraction of their ranges")
        f.add_argument("--seed", type=int, default=5)
        if name in ("fixed", "sandwich"):
            f.add_argument("--catalogs", type=int, default=16 if name == "fixed" else 32)
            f.add_argument("--n-stars", type=int, default=100)
            f.add_argument("--errors", default="pm=0.02,vlos=5,dist=0.1")
            f.add_argument("--emulator-error", default="catalog", choices=("catalog", "per-star", "none"),
                           help="the fits' treatment of the emulator's error (the same seed refits the same catalogs)")
            f.add_argument("--adjust", action="store_true", help="the fits' experimental curvature adjustment")
    pc = sub.add_parser("prior-cut")
    pc.add_argument("--distance", type=float, default=0.08)
    pc.add_argument("--sigma", type=lambda t: [float(x) for x in t.split(",")], default=[0.2, 0.235, 0.3])
    e = sub.add_parser("edges")
    e.add_argument("report", help="validation.json of a swerve validate run with calibration")
    args = ap.parse_args()
    {"cells": cells, "shape": shape, "edges": edges, "fixed": fixed, "along": along, "sandwich": sandwich, "prior-cut": prior_cut,
     "conditional": conditional}[args.what](args)


if __name__ == "__main__":
    main()
