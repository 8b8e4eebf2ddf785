"""Why the likelihood has a velocity floor: q_z posteriors of error-free catalogs, with and without it.

For each halo of the power grid (q_y = 1, q_z = 0.7 ... 1.3, every other parameter at the
midpoint of the emulator's bounds, as `swerve validate`'s power section), draws catalogs of N
error-free stars from a full simulation (a trajectory bank, not the emulator), and evaluates
the posterior of q_z on a fine grid with every other parameter fixed at its true value (flat
prior), for several values of the likelihood's ``velocity_floor``. Prints, per floor and halo,
the posterior medians, the mean 68% width and the fraction of catalogs whose median rounds to
the true grid value (the power criterion), and the fraction of true values inside the 68% and
95% intervals.

    python benchmarks/velocity_floor.py --n-stars 100 --catalogs 6 --floors 0,0.5,1,2
"""

from __future__ import annotations

import argparse
import os
import time
import warnings

import numpy as np


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--emulator", default="emulators/default")
    ap.add_argument("--n-stars", type=int, default=100)
    ap.add_argument("--catalogs", type=int, default=6)
    ap.add_argument("--floors", default="0,0.5,1,2", help="velocity floors to compare, km/s")
    ap.add_argument("--errors", default="none", help="error model (swerve validate's form)")
    ap.add_argument("--samples", type=int, default=16, help="distance samples per star")
    ap.add_argument("--seed", type=int, default=5)
    args = ap.parse_args()

    from swerve.catalog import catalog_from_table
    from swerve.emulate import load
    from swerve.likelihood import Likelihood, prepare_stars, smoothed_samples
    from swerve.measurement import draw_samples, parse_error_model
    from swerve.simulate import training_setup_from_dict
    from swerve.summaries import SummarySpec
    from swerve.validation import _grid_theta, draw_catalogs, validation_bank

    floors = [float(f) for f in args.floors.split(",")]
    emu = load(args.emulator)
    spec = SummarySpec.from_dict(emu.metadata["summaries"])
    setup = training_setup_from_dict(emu.metadata["config"])
    rng = np.random.default_rng(args.seed)
    em = parse_error_model(args.errors)
    names = list(emu.parameter_names)
    lo, hi = np.asarray(emu.bounds)[names.index("q_z")]
    qgrid = np.linspace(lo, hi, 121)
    halos = [0.7, 0.8, 0.9, 1.0, 1.1, 1.2, 1.3]
    print(f"load average {os.getloadavg()[0]:.2f}; N = {args.n_stars}, errors {args.errors!r}, "
          f"{args.catalogs} catalogs per halo, {args.samples} distance samples per star")
    t0 = time.perf_counter()
    stars = []
    for g in halos:  # the same catalogs for every floor
        gal_t, lau_t = _grid_theta(setup, emu, 1.0, g)
        gal = setup.galaxy_at(gal_t)
        bank = validation_bank(setup, gal, int(rng.integers(2 ** 31)))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tabs, _ = draw_catalogs(setup, gal, setup.launch_at(lau_t), bank, em, args.n_stars, args.catalogs, rng)
        truth = {**gal_t, **lau_t}
        th = np.array([[truth[n] if n != "q_z" else q for n in names] for q in qgrid])
        for t in tabs:
            cat = catalog_from_table(t, source="mock")
            stars.append((g, th, prepare_stars(cat, smoothed_samples(cat, draw_samples(cat, args.samples, rng)), spec)))
    print(f"catalogs: {time.perf_counter() - t0:.1f} s")
    for floor in floors:
        rows = {}
        for g, th, st in stars:
            ll = Likelihood(emu, st, spec, velocity_floor=floor)(th)
            p = np.exp(ll - ll.max())
            c = np.cumsum(p) / p.sum()
            q = {k: qgrid[min(np.searchsorted(c, k), len(qgrid) - 1)] for k in (0.025, 0.16, 0.5, 0.84, 0.975)}
            rows.setdefault(g, []).append(q)
        succ, cov68, cov95 = [], [], []
        print(f"\nvelocity_floor = {floor:g} km/s")
        for g, qs in rows.items():
            med = np.array([q[0.5] for q in qs])
            width = np.mean([q[0.84] - q[0.16] for q in qs])
            ok = np.abs(med - g) < 0.05 + 1e-9
            succ += list(ok)
            cov68 += [q[0.16] <= g <= q[0.84] for q in qs]
            cov95 += [q[0.025] <= g <= q[0.975] for q in qs]
            print(f"  q_z = {g:.1f}: medians {np.array2string(med, precision=2)}; mean 68% width {width:.3f}; "
                  f"success {np.mean(ok):.2f}")
        print(f"  all halos: success {np.mean(succ):.2f}, truth inside 68% {np.mean(cov68):.2f}, "
              f"inside 95% {np.mean(cov95):.2f} ({len(succ)} catalogs)")


if __name__ == "__main__":
    main()
