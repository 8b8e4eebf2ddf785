"""Recovery from large catalogs: a bias that hides inside the intervals of 100 stars can
exclude the truth at 800. Draws ``--catalogs`` mocks of ``--n-stars`` stars (each from its own
full simulation) at the power grid's q_y = 1.1, q_z = 0.85 Galaxy (other parameters at the
midpoints of the domain, slope -0.5), errors pm 0.02 mas/yr, vlos 5 km/s, 10% distances, and
fits the same catalogs with every emulator given (32 distance samples, 32 walkers).

    python benchmarks/big_catalogs.py --seed 11 emulators/default OTHER_EMULATOR ...
    python benchmarks/big_catalogs.py --seed 11 --adjust emulators/default   # and adjusted
"""

import argparse
import time
import warnings

import numpy as np


def main():
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("emulators", nargs="+")
    ap.add_argument("--seed", type=int, default=11)
    ap.add_argument("--n-stars", type=int, default=800)
    ap.add_argument("--catalogs", type=int, default=4)
    ap.add_argument("--adjust", action="store_true", help="also fit with the experimental curvature adjustment")
    args = ap.parse_args()

    from swerve.emulate import load
    from swerve.measurement import parse_error_model
    from swerve.simulate import training_setup_from_dict
    from swerve.validation import (
        _grid_theta,
        draw_catalogs,
        fit_many,
        validation_bank,
    )

    emu = load(args.emulators[0])
    setup = training_setup_from_dict(emu.metadata["config"])
    rng = np.random.default_rng(args.seed)
    gt, lt = _grid_theta(setup, emu, 1.1, 0.85)
    gal = setup.galaxy_at(gt)
    truth = {**gt, **lt}
    tasks = []
    for _ in range(args.catalogs):
        bank = validation_bank(setup, gal, int(rng.integers(2 ** 31)))
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            tabs, _ = draw_catalogs(setup, gal, setup.launch_at(lt), bank,
                                    parse_error_model("pm=0.02,vlos=5,dist=0.1"), args.n_stars, 1, rng)
        tasks.append((tabs[0], int(rng.integers(2 ** 31)), None))
    cfg = dict(samples=32, nwalkers=32, max_steps=3000, check_every=250, n_tau=25.0, tau_rtol=0.1, n_draws=49,
               adjust=False)
    print("truth: " + ", ".join(f"{k} {truth[k]:.4g}" for k in emu.parameter_names))
    runs = [(path, cfg, "") for path in args.emulators]
    if args.adjust:
        runs += [(path, dict(cfg, adjust=True), " (curvature adjustment)") for path in args.emulators]
    for path, c, label in runs:
        t0 = time.time()
        res = fit_many(path, tasks, c, n_jobs=2)
        print(f"{path}{label}: {time.time() - t0:.0f} s; median [95% interval] per catalog")
        for name in emu.parameter_names:
            j = list(res[0]["names"]).index(name)
            cells = [f"{r['median'][j]:.4g} [{r['lo95'][j]:.4g}, {r['hi95'][j]:.4g}]"
                     + ("" if r["lo95"][j] <= truth[name] <= r["hi95"][j] else " MISS") for r in res]
            print(f"  {name:7s} " + "; ".join(cells))


if __name__ == "__main__":
    main()
