"""Selection on measured line-of-sight velocities: fits of mocks selected on their *measured*
vlos, with the likelihood schemes one could use, side by side (issue 23, item 2).

    python benchmarks/observed_cut.py --work runs/observed-cut [--cut 800] [--sigmas 10,100]
        [--n 1000] [--seeds 1,2,3,4] [--truth q_z=0.9,slope=-0.5] [--jobs 1]
    python benchmarks/observed_cut.py --time-selection [--cut 800]

Two small emulators are trained once into ``--work`` (``swerve train``; reused when there):
``nocut`` and ``cut`` differ only in ``[selection] vlos_min`` (unset / the cut, applied to the
true vlos in training). Both: swerve-mw-1 with a density-flattened halo, q_z in [0.7, 1.3] and the
launch slope in [-1.5, 0.5] inferred (q_y = 1 and the masses fixed at the model's values), 16
Galaxy design points x 4 launch points, banks of 2000 orbits (4 replicates), the 15 cells of
training/coarse.toml, Gaussian cells (no v_r histogram), one GP per output.

Mocks (:func:`swerve.population.make_mock`): that Galaxy at ``--truth``, power-law launch on
700-3000 km/s, flight times <= 300 Myr, 10-250 kpc, outgoing, and ``vlos_min = --cut`` applied to
the MEASURED vlos; errors: parallax 0.02 mas, distance 10%, proper motions 0.01 (d / 10 kpc)
mas/yr, vlos ``sigma`` km/s for each of ``--sigmas``. Each mock is fitted with ``swerve fit``'s
defaults (64 kernel-smoothed distance samples per star, catalog-level emulator error, curvature
adjustment) except ``[sampler] method = "laplace-is"``, by four schemes:

``unaware``      the ``nocut`` emulator, the plain likelihood (the cut not modelled at all);
``trained``      the ``cut`` emulator (trained with the true-value cut), the plain likelihood:
                 swerve's scheme (:mod:`swerve.likelihood`, "Selection on measured velocities");
``trained+P``    the ``cut`` emulator, each star's density divided by
                 ``P(vlos_obs > c | x, θ)`` computed under the cell Gaussian convolved with the
                 star's vlos error (the renormalisation a truncated error distribution suggests;
                 here per star, at its catalog distance and in the cell holding most of its
                 distance samples' weight);
``nocut+P``      the ``nocut`` emulator with that normaliser (exact if the untruncated cell
                 velocity distribution were Gaussian).

Printed per (sigma, scheme): for each parameter the mean over mocks of (median - truth) / (the
95% interval's half-width / 1.96), and how many 95% intervals hold the truth.

``--time-selection``: the selection of one training design point with the cut (4 sub-banks of
500 orbits, 4 launch points, all 8 reflections): ``population_from_bank`` per launch point
against ``select_bank`` once per sub-bank and a reweighting per launch point (what
``swerve.simulate`` does), 3 repeats after a warm-up, same process.
"""

import argparse
import dataclasses
import json
import time
from pathlib import Path

import numpy as np

TRAIN_TOML = """
[galaxy]
model = "swerve-mw-1"
halo_flattening = "density"
infer = {{ q_z = [0.7, 1.3] }}
[launch]
model = "power-law"
infer = {{ slope = [-1.5, 0.5] }}
fixed = {{ v_min = 700.0, v_max = 3000.0 }}
points_per_galaxy = 4
flight_time_max = 300.0
[selection]
r_min = 10.0
r_max = 250.0
outgoing = true
{cut_line}
[summaries]
r_edges = [10.0, 20.0, 35.0, 60.0, 100.0, 250.0]
lat_edges = [0.0, 30.0, 60.0, 90.0]
min_ess = 30.0
n_boot = 16
[bank]
n_orbits = 2000
dt = 1.0
replicates = 4
[design]
method = "sobol"
size = 16
held_out_size = 4
seed = 11
[emulator]
kernel = "matern52"
n_pca = 0
n_restarts = 1
[frame]
solar = "v4.0"
"""


def train(work: Path, cut: float, jobs: int) -> dict:
    """The two emulators, trained when not already in ``work``: {"nocut": dir, "cut": dir}."""
    from swerve.cli import main

    out = {}
    for name, line in (("nocut", ""), ("cut", f"vlos_min = {cut!r}")):
        run = work / f"run-{name}"
        emu = run / "emulator"
        if not (emu / "emulator.json").exists():
            work.mkdir(parents=True, exist_ok=True)
            cfg = work / f"{name}.toml"
            cfg.write_text(TRAIN_TOML.format(cut_line=line))
            t0 = time.perf_counter()
            if main(["train", str(cfg), "--out", str(run), "--no-progress", "--jobs", str(jobs)]) != 0:
                raise SystemExit(f"training {cfg} failed")
            print(f"trained {name} in {time.perf_counter() - t0:.0f} s")
        out[name] = emu
    return out


class Renormalised:
    """A likelihood whose every star's density is divided by ``P(vlos_obs > c | x, θ)`` under its
    cell's Gaussian convolved with its vlos error. ``a`` (n, 3): the line of sight in the star's folded basis, so that
    ``vlos = a · u + off``; ``s2`` (n,): the vlos error variances; ``cell`` (n,)."""

    def __init__(self, like, a, off, s2, cell, cut):
        self.like, self.a, self.off, self.s2, self.cell, self.cut = like, a, off, s2, cell, cut

    def __getattr__(self, name):
        return getattr(self.like, name)

    def log_p(self, theta):
        from scipy.special import log_ndtr

        mu, sig = self.like.cell_gaussians(np.atleast_2d(theta), fold=False)
        m = np.einsum("ni,wni->wn", self.a, mu[:, self.cell]) + self.off
        v = np.einsum("ni,wnij,nj->wn", self.a, sig[:, self.cell], self.a) + self.s2
        return log_ndtr((m - self.cut) / np.sqrt(v))

    def per_star(self, theta):
        return self.like.per_star(theta) - self.log_p(theta)

    def __call__(self, theta):
        theta = np.asarray(theta, dtype=float)
        out = self.like(theta) - self.log_p(theta).sum(axis=1)
        return out if theta.ndim == 2 else float(out[0])


def line_of_sight_terms(catalog, ids, solar):
    """``a`` (n, 3), ``off`` (n,), ``s2`` (n,) of the stars ``ids`` at their catalog distances."""
    from swerve.frames import affine_map, helio_to_galacto
    from swerve.likelihood import _folding_basis

    rot, _t, w = affine_map(solar)
    row = {str(i): k for k, i in enumerate(catalog.ids)}
    k = np.array([row[str(i)] for i in ids])
    ra, dec = np.radians(catalog.ra[k]), np.radians(catalog.dec[k])
    n_icrs = np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], -1)
    n_gc = n_icrs @ rot.T
    d = np.where(np.isfinite(catalog.distance[k]), catalog.distance[k], 1.0 / catalog.parallax[k])
    pos, _ = helio_to_galacto(catalog.ra[k], catalog.dec[k], d, 0.0, 0.0, 0.0, solar=solar)
    a = np.einsum("nij,nj->ni", _folding_basis(pos), n_gc)
    return a, -(n_gc @ w), catalog.vlos_err[k] ** 2


def fit(table, emu, cfg, renorm_cut=None):
    from swerve import inference
    from swerve.catalog import catalog_from_table
    from swerve.sampling import Posterior

    catalog = catalog_from_table(table, source="mock")
    problem = inference.prepare(catalog, emu, cfg)
    if renorm_cut is not None:
        a, off, s2 = line_of_sight_terms(catalog, problem.terms.ids, problem.solar)
        t = problem.terms
        w = np.exp(t.log_w)  # each star's cell: the one holding most of its samples' weight
        n_cells = problem.spec.n_cells
        cw = np.stack([np.sum(np.where(t.cell == c, w, 0.0), axis=1) for c in range(n_cells)], 1)
        like = Renormalised(problem.likelihood, a, off, s2, np.argmax(cw, axis=1), renorm_cut)
        problem = dataclasses.replace(problem, likelihood=like, posterior=Posterior(like, problem.priors))
    post, adjustment = inference.adjust(problem, cfg)
    res = inference.draw(problem, post, adjustment, cfg)
    return inference.summarize(problem, res, adjustment)


def time_selection(cut: float) -> None:
    import tomllib

    from swerve.bank import build_bank
    from swerve.population import population_from_bank, select_bank
    from swerve.simulate import launch_points, training_setup_from_dict

    setup = training_setup_from_dict(tomllib.loads(TRAIN_TOML.format(cut_line=f"vlos_min = {cut!r}")))
    g = setup.galaxy_at({"q_z": 0.9})
    banks = [build_bank(g, 500, s, t_max=300.0, dt=1.0, r_min_store=10.0, r_max=250.0) for s in range(4)]
    launches = [setup.launch_at(dict(zip(setup.launch_names, row)))
                for row in launch_points(setup, np.random.SeedSequence(1))]

    def per_launch():
        for launch in launches:
            [population_from_bank(bk, launch, selection=setup.selection, galaxy=g, mirror="all", solar="v4.0",
                                  flight_time_max=300.0) for bk in banks]

    def once_per_bank():
        views = [select_bank(bk, setup.selection, galaxy=g, mirror="all", solar="v4.0") for bk in banks]
        for launch in launches:
            [v.population(launch, flight_time_max=300.0) for v in views]

    per_launch()
    once_per_bank()
    for _ in range(3):
        t0 = time.perf_counter()
        per_launch()
        t1 = time.perf_counter()
        once_per_bank()
        t2 = time.perf_counter()
        print(f"per launch point {t1 - t0:.2f} s, once per bank {t2 - t1:.2f} s, ratio {(t1 - t0) / (t2 - t1):.2f}")


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--work", default="runs/observed-cut")
    ap.add_argument("--cut", type=float, default=800.0, help="vlos_min, km/s")
    ap.add_argument("--sigmas", default="10,100", help="vlos errors of the mocks, km/s")
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--seeds", default="1,2,3,4")
    ap.add_argument("--truth", default="q_z=0.9,slope=-0.5")
    ap.add_argument("--schemes", default="unaware,trained,trained+P,nocut+P")
    ap.add_argument("--jobs", type=int, default=1)
    ap.add_argument("--json", default=None, help="also write every fit's numbers to this file")
    ap.add_argument("--time-selection", action="store_true", help="time the training's selection only")
    args = ap.parse_args()
    if args.time_selection:
        time_selection(args.cut)
        return

    from swerve.bank import build_bank
    from swerve.emulate import load
    from swerve.fit import load_fit_config
    from swerve.galaxy import Galaxy
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.measurement import ErrorLaw, ErrorModel
    from swerve.population import make_mock
    from swerve.selection import Selection

    work = Path(args.work)
    emus = {k: load(v) for k, v in train(work, args.cut, args.jobs).items()}
    truth = {k: float(v) for k, v in (kv.split("=") for kv in args.truth.split(","))}
    galaxy = Galaxy.from_name("swerve-mw-1", halo_flattening="density", q_z=truth["q_z"])
    launch = BoundedPowerLawSpeed(v_min=700.0, v_max=3000.0, slope=truth["slope"])
    sel = Selection(r_min=10.0, r_max=250.0, outgoing=True, vlos_min=args.cut)
    bank = build_bank(galaxy, 8000, 20261205, t_max=300.0, dt=1.0, r_min_store=10.0, r_max=250.0)
    cfg = load_fit_config(None, {"sampler": {"method": "laplace-is"}})
    names = list(emus["cut"].parameter_names)
    schemes = args.schemes.split(",")
    records = []
    for sigma in (float(s) for s in args.sigmas.split(",")):
        em = ErrorModel(parallax=ErrorLaw(0.02), distance_frac=ErrorLaw(0.1), pm=ErrorLaw(0.0, 0.01, 1.0),
                        vlos=ErrorLaw(sigma))
        pulls = {s: {n: [] for n in names} for s in schemes}
        hits = {s: {n: 0 for n in names} for s in schemes}
        for seed in (int(s) for s in args.seeds.split(",")):
            table = make_mock(galaxy, launch, sel, em, args.n, seed, bank=bank)
            for s in schemes:
                t0 = time.perf_counter()
                emu = emus["nocut" if s in ("unaware", "nocut+P") else "cut"]
                summ = fit(table, emu, cfg, renorm_cut=args.cut if s.endswith("+P") else None)
                line = []
                for n in names:
                    p = summ["parameters"][n]
                    lo, hi = p["ci95"]
                    sd = (hi - lo) / (2 * 1.96)
                    pulls[s][n].append((p["median"] - truth[n]) / sd)
                    hits[s][n] += int(lo <= truth[n] <= hi)
                    line.append(f"{n} {p['median']:.3f} [{lo:.3f}, {hi:.3f}]")
                    records.append({"sigma": sigma, "seed": seed, "scheme": s, "parameter": n,
                                    "median": p["median"], "ci95": [lo, hi], "truth": truth[n]})
                print(f"sigma {sigma:g} seed {seed} {s:10s} pass {table.meta['measured_cut_pass_fraction']:.3f}: "
                      + "; ".join(line) + f" ({time.perf_counter() - t0:.0f} s)", flush=True)
        print(f"\nsigma_vlos = {sigma:g} km/s, cut vlos_min = {args.cut:g} km/s, {args.n} stars, truth {truth}")
        for s in schemes:
            print(f"  {s:10s} " + "   ".join(
                f"{n}: mean pull {np.mean(pulls[s][n]):+.2f}, 95% holds truth {hits[s][n]}/{len(pulls[s][n])}"
                for n in names))
        print(flush=True)
    if args.json:
        Path(args.json).write_text(json.dumps(records, indent=1))


if __name__ == "__main__":
    main()
