"""The validation harness: is the emulator-driven inference right, and how powerful is it?

Against held-out full simulations (Galaxy points not in the training design, made by
``swerve train CONFIG --held-out``):

accuracy
    For every held-out point and launch point, the emulated summaries against the simulated
    ones, ``z = (emu − sim) / sqrt(σ_emu² + σ_sim²)`` (σ_emu the emulator's predictive standard
    deviation, σ_sim the bootstrap simulation noise). RMS of z overall and per statistic
    type; the worst |z| of each point against pairs of parameters.
calibration
    Synthetic catalogs drawn from the **full simulation** of each held-out point (one
    trajectory bank per point, many catalogs from it with :func:`swerve.population.make_mock`),
    never from the emulator; truth = the held-out Galaxy parameters and a launch parameter
    drawn uniformly within its bounds per catalog (held-out Galaxy points are a space-filling
    design of the bounds, so the truths are close to draws from the uniform prior, as
    simulation-based calibration needs). Each is fitted in memory
    (:func:`swerve.inference.fit_catalog`, the path swerve fit runs, with its defaults);
    simulation-based calibration ranks (Talts et al. 2018,
    arXiv 1804.06788) and the coverage of the 68% / 95% central credible intervals, with
    binomial error bars and a pass/fail (:func:`coverage_test`, :func:`rank_test`).
power
    For sample sizes N and error models, halos on a grid of q_z (axisymmetric, q_y = 1; and a
    triaxial case, q_y ≠ 1), the fraction of catalogs whose posterior median of q_z, rounded
    to the grid, is the true grid value; side by side with the KS-test baseline
    (:mod:`swerve.baseline`) on the same catalogs (axisymmetric case). Catalogs come from one
    bank per grid Galaxy, the baseline's mocks from a second, independent bank of the same
    Galaxy (mocks sharing the catalog's own orbits would favour the true value; the other Galaxy and launch
    parameters at the midpoints of the emulator's bounds, or at the training configuration's
    fixed values). The fits leave the other parameters free (``others = "free"``, uniform
    priors over the emulator's domain) or fix them at their true values (``"fixed"``).

The configuration is a TOML file (:data:`VALIDATE_SCHEMA`; ``swerve validate --template``
writes a commented template). :func:`run_validation` returns the ``validation.json`` document
(layout in its docstring) and writes it with the figures.

Parallelism: catalogs are fitted by joblib (``n_jobs`` processes); inside each worker numba
runs single-threaded to avoid oversubscription.
"""

from __future__ import annotations

import dataclasses
import math
import os
import time
import warnings
from pathlib import Path

import numba
import numpy as np
from joblib import Parallel, delayed
from scipy.stats import chisquare

from . import __version__, inference, plots
from .bank import build_bank
from .baseline import ks_choice, observed_v_theta_folded
from .catalog import catalog_from_table
from .config import Key, Schema, Section, config_hash, defaults, load_config, validate
from .emulate import content_hash, load
from .fileio import jsonable, write_text
from .fileio import write_json as _write_json
from .fit import FIT_SCHEMA, load_fit_config
from .measurement import ERROR_FREE, parse_error_model  # noqa: F401  (re-exported: swerve.validation.parse_error_model)
from .population import make_mock
from .sampling import ConvergenceWarning
from .simulate import simulation_hash, training_setup_from_dict, training_table
from .summaries import N_STAT, STAT_NAMES
from .training import collect, run_status

# --------------------------------------------------------------------------- configuration --
#: the ``[fit]`` keys of a validation (and forecast) configuration -> swerve fit's (section, key):
#: every catalog is fitted by swerve fit's own path (:mod:`swerve.inference`) with swerve fit's
#: defaults, and a key given here overrides that one setting
FIT_KEYS = {
    "samples": ("errors", "samples"),
    "distance_method": ("errors", "method"),
    "nwalkers": ("sampler", "nwalkers"),
    "max_steps": ("sampler", "max_steps"),
    "check_every": ("sampler", "check_every"),
    "n_tau": ("sampler", "n_tau"),
    "tau_rtol": ("sampler", "tau_rtol"),
    "sampler": ("sampler", "method"),
    "laplace_min_stars": ("sampler", "laplace_min_stars"),
    "velocity_floor": ("emulator", "velocity_floor"),
    "emulator_error": ("emulator", "error"),
    "adjust": ("likelihood", "adjust"),
    "background": ("likelihood", "background"),
}


def _fit_keys() -> tuple:
    """swerve fit's keys (type, range, default, doc) under their flat names."""
    return tuple(dataclasses.replace(FIT_SCHEMA.section(sec).key(key), name=flat)
                 for flat, (sec, key) in FIT_KEYS.items())


def fit_config(fit: dict, seed: int, priors: dict | None = None, solar: str = "v4.0") -> dict:
    """swerve fit's configuration for one validation or forecast fit: its defaults, the
    ``[fit]`` section's settings (:data:`FIT_KEYS`), ``seed`` for the star samples and the
    sampler, per-parameter ``priors`` and the solar parameters."""
    unknown = set(fit) - set(FIT_KEYS) - {"n_draws"}
    if unknown:
        raise ValueError(f"[fit]: unknown key(s) {sorted(unknown)}; expected some of {sorted(FIT_KEYS)} or n_draws")
    over = {"errors": {"seed": int(seed)}, "sampler": {"seed": int(seed)}, "frame": {"solar": solar},
            "priors": {"parameters": dict(priors or {})}}
    for flat, (sec, key) in FIT_KEYS.items():
        if flat in fit:
            over.setdefault(sec, {})[key] = fit[flat]
    return load_fit_config(None, over)


VALIDATE_SCHEMA = Schema("validate", (
    Section("", (
        Key("seed", "int", 1, min=0, doc="master seed of every random draw"),
        Key("n_jobs", "int", 2, min=1, doc="worker processes for the fits"),
        Key("solar", "str", "v4.0", doc="solar-parameter set of the mock catalogs and the fits"),
    )),
    Section("fit", _fit_keys() + (
        Key("n_draws", "int", 99, min=3, doc="posterior draws kept per fit for the ranks"),
    ), doc="the fits: swerve fit's settings under flat names, with swerve fit's defaults (FIT_KEYS)"),
    Section("bank", (
        Key("n_orbits", "int", 0, min=0, doc="orbits per validation bank (0: the training configuration's)"),
    ), doc="trajectory banks of the held-out and grid Galaxies"),
    Section("accuracy", (
        Key("enabled", "bool", True, doc="emulated vs simulated summaries at the held-out points"),
    )),
    Section("calibration", (
        Key("enabled", "bool", True, doc="simulation-based calibration on held-out simulations"),
        Key("catalogs_per_point", "int", 8, min=1, doc="catalogs fitted per held-out point"),
        Key("n_stars", "int", 100, min=2, doc="stars per catalog"),
        Key("errors", "str", "pm=0.02,vlos=5,dist=0.1", doc="error model (see parse_error_model)"),
        Key("rank_bins", "int", 10, min=2, doc="bins of the rank histograms (must divide n_draws + 1)"),
        Key("max_points", "int", 0, min=0, doc="use at most this many held-out points (0: all)"),
    )),
    Section("power", (
        Key("enabled", "bool", True, doc="success rate of swerve and the KS baseline vs sample size"),
        Key("n_stars", "list[int]", [20, 50, 100, 200, 400, 800], min=2, doc="sample sizes"),
        Key("q_z_grid", "list[float]", [0.7, 0.8, 0.9, 1.0, 1.1, 1.2, 1.3], min=0.0,
            doc="true q_z grid (clipped to the emulator's domain)"),
        Key("catalogs", "int", 20, min=1, doc="catalogs per grid value, sample size and error model"),
        Key("ks_mocks", "int", 50, min=1, doc="KS baseline: mock catalogs per grid value"),
        Key("errors", "list[str]", ["none", "pm=0.02,vlos=5,dist=0.1"],
            doc="error models ('none': error-free; see parse_error_model)"),
        Key("others", "str", "free", choices=("free", "fixed"),
            doc="other parameters in the fits: free (uniform priors) or fixed at the truth"),
        Key("q_y_triaxial", "float", 1.1, min=0.0, doc="q_y of the triaxial case (0: skip it)"),
    )),
), doc="swerve validate configuration")


def load_validate_config(path=None) -> dict:
    """The validation configuration from a TOML file (defaults when ``path`` is None)."""
    cfg = load_config(path, VALIDATE_SCHEMA) if path else defaults(VALIDATE_SCHEMA)
    return _finish_config(cfg, path or "<defaults>")


def _finish_config(cfg: dict, source) -> dict:
    """Top-level keys (section "") moved to the top; cross-key checks."""
    cfg = {**{k: v for k, v in cfg.items() if k}, **cfg.get("", {})}
    c = cfg["calibration"]
    if c["enabled"] and (cfg["fit"]["n_draws"] + 1) % c["rank_bins"]:
        raise ValueError(f"{source}: [calibration] rank_bins = {c['rank_bins']} must divide "
                         f"[fit] n_draws + 1 = {cfg['fit']['n_draws'] + 1}")
    return cfg


# ---------------------------------------------------------------------------- statistics ----
def binomial_sigma(p: float, n: int) -> float:
    """Standard deviation of an observed fraction of ``n`` Bernoulli(p) trials."""
    return math.sqrt(p * (1.0 - p) / n) if n > 0 else float("nan")


def coverage_test(inside, nominal: float, n_sigma: float = 2.0) -> dict:
    """Observed coverage of a credible interval and its pass/fail.

    Parameters
    ----------
    inside : bool array of shape (n,)
        Whether each fit's interval contained the truth.
    nominal : float
        The interval's nominal probability (0.68 or 0.95).

    Returns
    -------
    dict with ``observed``, ``nominal``, ``sigma`` (binomial, under the nominal rate), ``n``
    and ``pass`` (|observed − nominal| ≤ n_sigma σ).
    """
    inside = np.asarray(inside, dtype=bool)
    n = int(inside.size)
    obs = float(inside.mean()) if n else float("nan")
    sig = binomial_sigma(nominal, n)
    return {"observed": obs, "nominal": nominal, "sigma": sig, "n": n,
            "pass": bool(n > 0 and abs(obs - nominal) <= n_sigma * sig)}


def sbc_rank(draws, truth) -> np.ndarray:
    """Rank of the truth among posterior draws (Talts et al. 2018): the number of draws below it.

    draws (L, d), truth (d,) -> int array (d,) with values in 0..L.
    """
    draws = np.asarray(draws, dtype=float)
    return np.sum(draws < np.asarray(truth, dtype=float)[None, :], axis=0).astype(int)


def rank_test(ranks, n_draws: int, n_bins: int, p_min: float = 0.01) -> dict:
    """Chi-square test of a rank histogram against uniform.

    Parameters
    ----------
    ranks : int array of shape (n,)
        Ranks in 0..n_draws.
    n_draws : int
        Posterior draws per fit (ranks take n_draws + 1 values).
    n_bins : int
        Histogram bins; must divide n_draws + 1.
    """
    if (n_draws + 1) % n_bins:
        raise ValueError(f"rank_bins: {n_bins} must divide n_draws + 1 = {n_draws + 1}")
    ranks = np.asarray(ranks, dtype=int)
    counts = np.bincount(ranks * n_bins // (n_draws + 1), minlength=n_bins)
    p = float(chisquare(counts).pvalue) if ranks.size else float("nan")
    return {"histogram": counts.tolist(), "chi2_p": p, "pass": bool(ranks.size > 0 and p > p_min)}


# ------------------------------------------------------------------------------ accuracy ----
def emulator_accuracy(emulator, setup, theta_gal, outputs) -> dict:
    """Emulated vs simulated summaries at held-out points, normalised by both uncertainties.

    Parameters
    ----------
    emulator : GPEmulator
    setup : TrainingSetup
    theta_gal : array (n_points, n_galaxy)
    outputs : dict from :func:`swerve.training.collect` of the held-out run

    Returns
    -------
    dict: ``z`` (n_rows, n_outputs) array, ``theta`` (n_rows, d) inputs, ``rms_z``,
    ``rms_z_by_stat``, ``fraction_abs_z_gt_3``, ``worst`` per row (|z|, output name).
    """
    X, Y, V = training_table(setup, theta_gal, outputs)
    pred, sd = emulator.predict(X, return_std=True)
    z = (np.asarray(pred) - Y) / np.sqrt(np.asarray(sd) ** 2 + V)
    names = setup.spec.output_names()
    by_stat = {}
    zg = z[:, :setup.spec.n_gauss]
    for s, sname in enumerate(STAT_NAMES):
        col = zg[:, s::N_STAT]
        by_stat[sname] = float(np.sqrt(np.nanmean(col ** 2)))
    if setup.spec.n_vbins:
        by_stat["vr_bin"] = float(np.sqrt(np.nanmean(z[:, setup.spec.n_gauss:] ** 2)))
    absz = np.where(np.isfinite(z), np.abs(z), -np.inf)
    worst_idx = np.argmax(absz, axis=1)
    return {
        "z": z, "theta": X,
        "rms_z": float(np.sqrt(np.nanmean(z ** 2))),
        "rms_z_by_stat": by_stat,
        "fraction_abs_z_gt_3": float(np.nanmean(np.abs(z) > 3)),
        "worst": [(float(absz[i, j]), names[j]) for i, j in enumerate(worst_idx)],
    }


# ---------------------------------------------------------------------------- the fits -----
_EMULATORS: dict = {}


def _emulator(path):
    key = os.fspath(path)
    if key not in _EMULATORS:
        _EMULATORS[key] = load(key)
    return _EMULATORS[key]


def fit_record(fr: inference.FitResult, n_draws: int, seed: int) -> dict:
    """What the harness keeps of one fit (:func:`swerve.inference.fit_catalog`): ``names`` (free
    parameters), ``median``, ``lo68``, ``hi68``, ``lo95``, ``hi95`` (arrays over ``names``, from the
    fit's summary), ``draws`` (``n_draws`` posterior draws, by the samples' weights where
    importance-weighted), ``p_below_1`` (per name, P(θ<1)), ``converged``, ``n_steps``, ``tau``,
    ``method``, ``n_stars``, ``seconds``."""
    res, pars = fr.result, fr.summary["parameters"]
    names = list(res.names)
    col = {k: np.array([pars[n][key] if j is None else pars[n][key][j] for n in names])
           for k, key, j in (("median", "median", None), ("lo68", "ci68", 0), ("hi68", "ci68", 1),
                             ("lo95", "ci95", 0), ("hi95", "ci95", 1))}
    w = res.weights
    n_distinct = len(res.samples) if w is None else int(np.count_nonzero(w))
    rng = np.random.default_rng([seed, 2])
    pick = rng.choice(len(res.samples), size=n_draws, replace=n_distinct < n_draws, p=w)
    wt = np.full(len(res.samples), 1.0 / len(res.samples)) if w is None else w
    return {"names": names, **col, "draws": res.samples[pick],
            "p_below_1": {n: float(np.sum(wt * (res.samples[:, j] < 1.0))) for j, n in enumerate(names)},
            "converged": bool(res.converged), "n_steps": int(res.n_steps), "tau": np.asarray(res.tau).tolist(),
            "method": fr.summary["sampler"]["method"], "n_stars": int(fr.problem.terms.n), "seconds": fr.seconds}


def _fit_task(emulator_dir, table, fit_cfg, seed, priors, solar, single_thread):
    """One catalog through swerve fit's path (:func:`swerve.inference.fit_catalog`)."""
    if single_thread:
        numba.set_num_threads(1)
    emu = _emulator(emulator_dir)
    try:
        cfg = fit_config(fit_cfg, seed, priors, solar)
        cat = catalog_from_table(table, source="mock catalog")
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)  # counted in converged_fraction
            warnings.simplefilter("ignore", inference.FewStarsWarning)
            fr = inference.fit_catalog(cat, emu, cfg)
        return fit_record(fr, fit_cfg["n_draws"], seed)
    except ValueError as exc:  # e.g. no usable star: reported, not fatal
        return {"error": str(exc).splitlines()[0]}


def fit_many(emulator_dir, tasks, fit_cfg, n_jobs: int = 1, solar="v4.0") -> list[dict]:
    """Fit many catalogs: ``tasks`` is a list of (table, seed, priors); joblib over catalogs."""
    if n_jobs <= 1 or len(tasks) <= 1:
        return [_fit_task(emulator_dir, t, fit_cfg, s, p, solar, False) for t, s, p in tasks]
    return Parallel(n_jobs=n_jobs, backend="loky")(
        delayed(_fit_task)(emulator_dir, t, fit_cfg, s, p, solar, True) for t, s, p in tasks)


# ---------------------------------------------------------------------------- mocks --------
def validation_bank(setup, galaxy, seed: int, n_orbits: int = 0):
    """One trajectory bank of ``galaxy`` with the training configuration's settings."""
    b = setup.cfg["bank"]
    return build_bank(galaxy, int(n_orbits or b["n_orbits"]), int(seed), t_max=setup.flight_time_max, dt=b["dt"],
                      v_lo=b["v_lo"], v_hi=b["v_hi"], r_min_store=setup.spec.r_edges[0],
                      r_max=setup.spec.r_edges[-1], rtol=b["rtol"])


def draw_catalogs(setup, galaxy, launch, bank, error_model, n_stars: int, n_catalogs: int, rng, solar="v4.0"):
    """``n_catalogs`` independent mock catalogs of ``n_stars`` from one bank (the full simulation).

    Stars of a mock are independent draws (with replacement) from the bank's weighted
    population, each with independent errors, so one mock of ``n_catalogs × n_stars`` split in
    blocks is ``n_catalogs`` independent mocks. Returns (list of Tables, n_low_ess_warnings).
    """
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        big = make_mock(galaxy, launch, setup.selection, error_model, int(n_stars * n_catalogs), rng, bank=bank,
                        solar=solar, flight_time_max=setup.flight_time_max)
    n_warn = sum(1 for w in caught if "effective sample size" in str(w.message))
    return [big[i * n_stars:(i + 1) * n_stars] for i in range(n_catalogs)], n_warn


# ---------------------------------------------------------------------------- checks --------
def check_inputs(emulator_dir, held_out_dir):
    """Load the emulator and the held-out run, refusing a mismatch with a one-line message.

    Returns (emulator, setup, names, theta_gal, outputs).
    """
    held_out_dir = Path(held_out_dir)
    if not held_out_dir.is_dir():
        raise ValueError(f"--held-out: folder {held_out_dir} does not exist")
    if not Path(emulator_dir).is_dir():
        raise ValueError(f"--emulator: folder {emulator_dir} does not exist")
    emu = load(emulator_dir)
    meta = emu.metadata or {}
    if "config" not in meta:
        raise ValueError(f"--emulator: {emulator_dir} records no training configuration; it was not made by swerve train")
    setup = training_setup_from_dict(meta["config"], source=f"{emulator_dir} (training configuration)")
    status = run_status(held_out_dir)
    # the emulator's configuration as recorded, and as today's schema reads it (options added
    # since, at their defaults, do not change the training), in full (run folders made before
    # swerve 0.1's simulation hash) or without [emulator] (made since): swerve train hashes the latter
    if status.config_hash not in (meta.get("config_hash"), config_hash(setup.cfg), simulation_hash(setup.cfg)):
        raise ValueError(f"--held-out: {held_out_dir} was made with another training configuration "
                         f"(hash {status.config_hash[:12]}) than the emulator's ({str(meta.get('config_hash'))[:12]})")
    if not status.held_out:
        raise ValueError(f"--held-out: {held_out_dir} is a training run, not a held-out one "
                         f"(make one with swerve train CONFIG --out DIR --held-out)")
    names, theta, outputs = collect(held_out_dir)
    if list(names) != setup.galaxy_names:
        raise ValueError(f"--held-out: {held_out_dir} has parameters {names}, the emulator's Galaxy "
                         f"parameters are {setup.galaxy_names}")
    return emu, setup, list(names), theta, outputs


# ---------------------------------------------------------------------------- calibration ---
def run_calibration(emulator_dir, emu, setup, theta_gal, cfg, rng, log=None) -> dict:
    """Simulation-based calibration on held-out full simulations (module docstring)."""
    c, f = cfg["calibration"], cfg["fit"]
    em = parse_error_model(c["errors"])
    pts = theta_gal if not c["max_points"] else theta_gal[:c["max_points"]]
    lo = np.array([setup.launch_infer[n][0] for n in setup.launch_names])
    hi = np.array([setup.launch_infer[n][1] for n in setup.launch_names])
    tasks, truths, n_warn = [], [], 0
    for i, th in enumerate(pts):
        gal = setup.galaxy_at(dict(zip(setup.galaxy_names, th)))
        bank = validation_bank(setup, gal, int(rng.integers(2 ** 31)), cfg["bank"]["n_orbits"])
        for _ in range(c["catalogs_per_point"]):
            lp = lo + rng.uniform(size=lo.size) * (hi - lo)
            launch = setup.launch_at(dict(zip(setup.launch_names, lp)))
            tabs, nw = draw_catalogs(setup, gal, launch, bank, em, c["n_stars"], 1, rng, solar=cfg["solar"])
            n_warn += nw
            tasks.append((tabs[0], int(rng.integers(2 ** 31)), None))
            truths.append(np.concatenate([th, lp]))
        if log:
            log(f"calibration: held-out point {i + 1}/{len(pts)}: {c['catalogs_per_point']} catalogs drawn")
    t0 = time.perf_counter()
    fits = fit_many(emulator_dir, tasks, f, n_jobs=cfg["n_jobs"], solar=cfg["solar"])
    ok = [(r, t) for r, t in zip(fits, truths) if "error" not in r]
    names = list(emu.parameter_names)
    out = {"n_catalogs": len(tasks), "n_fitted": len(ok), "n_stars": c["n_stars"], "errors": c["errors"],
           "error_model": em.to_dict(), "n_points": len(pts), "catalogs_per_point": c["catalogs_per_point"],
           "failed": [r["error"] for r in fits if "error" in r][:10],
           "converged_fraction": float(np.mean([r["converged"] for r, _ in ok])) if ok else float("nan"),
           "low_ess_warnings": n_warn, "fit_seconds": round(time.perf_counter() - t0, 1),
           "mean_fit_seconds": float(np.mean([r["seconds"] for r, _ in ok])) if ok else float("nan"),
           "parameters": {}, "truths": [t.tolist() for _, t in ok]}
    all_pass = bool(ok)
    for j, n in enumerate(names):
        truth = np.array([t[j] for _, t in ok])
        ranks = np.array([sbc_rank(r["draws"][:, [j]], [t[j]])[0] for r, t in ok], dtype=int)
        in68 = [r["lo68"][j] <= t[j] <= r["hi68"][j] for r, t in ok]
        in95 = [r["lo95"][j] <= t[j] <= r["hi95"][j] for r, t in ok]
        rt = rank_test(ranks, f["n_draws"], c["rank_bins"])
        c68, c95 = coverage_test(in68, 0.68), coverage_test(in95, 0.95)
        med = np.array([r["median"][j] for r, _ in ok])
        passed = bool(rt["pass"] and c68["pass"] and c95["pass"])
        all_pass &= passed
        out["parameters"][n] = {"coverage68": c68, "coverage95": c95, "ranks": ranks.tolist(), "rank_test": rt,
                                "bias_median": float(np.mean(med - truth)) if ok else float("nan"),
                                "rms_error_median": float(np.sqrt(np.mean((med - truth) ** 2))) if ok else float("nan"),
                                "pass": passed}
    out["pass"] = all_pass
    out["n_draws"] = f["n_draws"]
    return out


# ---------------------------------------------------------------------------- power ---------
def _grid_theta(setup, emu, q_y: float, q_z: float) -> tuple[dict, dict]:
    """Galaxy and launch truths of one grid point: q_y, q_z given, the rest at the emulator's midpoints."""
    bounds = dict(zip(emu.parameter_names, np.asarray(emu.bounds, dtype=float)))
    gal = {n: float(np.mean(bounds[n])) for n in setup.galaxy_names}
    gal["q_z"] = float(q_z)
    if "q_y" in gal:
        gal["q_y"] = float(q_y)
    lau = {n: float(np.mean(bounds[n])) for n in setup.launch_names}
    return gal, lau


def power_grid(emu, grid) -> np.ndarray:
    """The q_z grid clipped to the emulator's domain (values outside are dropped)."""
    names = list(emu.parameter_names)
    if "q_z" not in names:
        raise ValueError(f"power: the emulator does not infer q_z (its parameters are {names})")
    lo, hi = np.asarray(emu.bounds, dtype=float)[names.index("q_z")]
    g = np.array(sorted({round(float(v), 10) for v in grid}))
    g = g[(g >= lo - 1e-9) & (g <= hi + 1e-9)]
    if g.size < 2:
        raise ValueError(f"[power] q_z_grid: fewer than 2 values inside the emulator's q_z domain [{lo:g}, {hi:g}]")
    return g


def _nearest(grid, x):
    return float(grid[int(np.argmin(np.abs(grid - x)))])


def run_power(emulator_dir, emu, setup, cfg, rng, log=None) -> dict:
    """Success rate against sample size, swerve and the KS baseline side by side (module docstring)."""
    p, f = cfg["power"], cfg["fit"]
    grid = power_grid(emu, p["q_z_grid"])
    names = list(emu.parameter_names)
    cases = [("axisymmetric", 1.0)]
    if p["q_y_triaxial"] > 0:
        if "q_y" not in names:
            raise ValueError("[power] q_y_triaxial: the emulator does not infer q_y; set it to 0")
        lo, hi = np.asarray(emu.bounds, dtype=float)[names.index("q_y")]
        if not lo <= p["q_y_triaxial"] <= hi:
            raise ValueError(f"[power] q_y_triaxial = {p['q_y_triaxial']:g} lies outside the emulator's q_y "
                             f"domain [{lo:g}, {hi:g}]")
        cases.append(("triaxial", p["q_y_triaxial"]))
    if "q_y" in names:
        lo, hi = np.asarray(emu.bounds, dtype=float)[names.index("q_y")]
        if not lo <= 1.0 <= hi:
            raise ValueError(f"power: q_y = 1 (axisymmetric) lies outside the emulator's q_y domain [{lo:g}, {hi:g}]")
    rows, n_warn = [], 0
    t0 = time.perf_counter()
    for case, q_y in cases:
        banks = {}
        for g in grid:
            gal_t, lau_t = _grid_theta(setup, emu, q_y, g)
            gal = setup.galaxy_at(gal_t)
            banks[g] = (gal, setup.launch_at(lau_t), validation_bank(setup, gal, int(rng.integers(2 ** 31)),
                                                                    cfg["bank"]["n_orbits"]),
                        {**gal_t, **lau_t},
                        # the KS baseline's mocks come from an independent bank of the same Galaxy:
                        # mocks sharing the catalog's own orbits would favour the true grid value
                        validation_bank(setup, gal, int(rng.integers(2 ** 31)), cfg["bank"]["n_orbits"]))
        for err in p["errors"]:
            em = parse_error_model(err)
            for n in p["n_stars"]:
                tasks, truth_g, ks_est = [], [], []
                refs = None
                if case == "axisymmetric":  # the KS baseline's mocks of every grid value
                    refs = []
                    for g in grid:
                        gal, lau, _, _, ref_bank = banks[g]
                        tabs, nw = draw_catalogs(setup, gal, lau, ref_bank, em, n, p["ks_mocks"], rng, cfg["solar"])
                        n_warn += nw
                        refs.append([observed_v_theta_folded(catalog_from_table(t, source="mock"), cfg["solar"])
                                     for t in tabs])
                for g in grid:
                    gal, lau, bank, truth, _ = banks[g]
                    tabs, nw = draw_catalogs(setup, gal, lau, bank, em, n, p["catalogs"], rng, cfg["solar"])
                    n_warn += nw
                    priors = None
                    if p["others"] == "fixed":
                        priors = {k: {"kind": "fixed", "value": v} for k, v in truth.items() if k != "q_z"}
                    for t in tabs:
                        tasks.append((t, int(rng.integers(2 ** 31)), priors))
                        truth_g.append(g)
                        if refs is not None:
                            v = observed_v_theta_folded(catalog_from_table(t, source="mock"), cfg["solar"])
                            ks_est.append(ks_choice(v, grid, refs)[0])
                fits = fit_many(emulator_dir, tasks, f, n_jobs=cfg["n_jobs"], solar=cfg["solar"])
                truth_g = np.array(truth_g)
                est = np.array([_nearest(grid, r["median"][r["names"].index("q_z")]) if "error" not in r else np.nan
                                for r in fits])
                conv = [r["converged"] for r in fits if "error" not in r]
                row = {"case": case, "q_y": q_y, "errors": err, "n_stars": int(n), "n_catalogs": len(fits),
                       "swerve_success": float(np.mean(est == truth_g)),
                       "swerve_success_by_q_z": {f"{g:g}": float(np.mean(est[truth_g == g] == g)) for g in grid},
                       "converged_fraction": float(np.mean(conv)) if conv else float("nan"),
                       "n_failed": int(sum("error" in r for r in fits))}
                if refs is not None:
                    ks = np.array(ks_est)
                    row["ks_success"] = float(np.mean(ks == truth_g))
                    row["ks_success_by_q_z"] = {f"{g:g}": float(np.mean(ks[truth_g == g] == g)) for g in grid}
                rows.append(row)
                if log:
                    ks_txt = f", KS {row['ks_success']:.2f}" if "ks_success" in row else ""
                    log(f"power: {case}, errors {err}, N = {n}: swerve {row['swerve_success']:.2f}{ks_txt}")
    return {"grid": grid.tolist(), "others": p["others"], "catalogs_per_grid_value": p["catalogs"],
            "ks_mocks": p["ks_mocks"], "n_stars": list(p["n_stars"]), "errors": list(p["errors"]),
            "rows": rows, "low_ess_warnings": n_warn, "seconds": round(time.perf_counter() - t0, 1),
            "note": ("truth: q_y (1 or q_y_triaxial) and q_z on the grid, every other parameter at the midpoint "
                     "of the emulator's bounds; catalogs and KS mocks from one bank per grid Galaxy")}


def power_table(power: dict) -> str:
    """The power rows as a Markdown table (swerve and KS success side by side)."""
    lines = ["| case | errors | N | swerve | KS baseline | converged | catalogs |",
             "|---|---|---|---|---|---|---|"]
    for r in power["rows"]:
        ks = f"{r['ks_success']:.2f}" if "ks_success" in r else "—"
        lines.append(f"| {r['case']} (q_y={r['q_y']:g}) | {r['errors']} | {r['n_stars']} | {r['swerve_success']:.2f} "
                     f"| {ks} | {r['converged_fraction']:.2f} | {r['n_catalogs']} |")
    return "\n".join(lines)


# ---------------------------------------------------------------------------- figures -------
def _jsonable(o):
    return jsonable(o)


def write_json(path, doc):
    """Write ``doc`` as strict JSON atomically (NaN written as null; :func:`swerve.fileio.write_json`)."""
    _write_json(path, doc, indent=1)


def run_validation(emulator_dir, held_out_dir, out_dir, cfg: dict, log=None) -> dict:
    """Run the harness and write ``out_dir``: ``validation.json`` and the figures.

    ``validation.json`` layout::

        settings     configuration, emulator path and content hash, held-out run, swerve
                     version, timings (s)
        accuracy     n_points, n_rows, rms_z, rms_z_by_stat, fraction_abs_z_gt_3,
                     points: [{theta, worst_abs_z, worst_output}]      (or {"enabled": false})
        calibration  n_catalogs, n_fitted, n_stars, errors, converged_fraction,
                     parameters: {name: {coverage68, coverage95 ({observed, nominal, sigma, n,
                     pass}), ranks, rank_test ({histogram, chi2_p, pass}), bias_median,
                     rms_error_median, pass}}, pass
        power        grid, others, n_stars, errors, rows: [{case, q_y, errors, n_stars,
                     n_catalogs, swerve_success, swerve_success_by_q_z, ks_success,
                     ks_success_by_q_z (axisymmetric only), converged_fraction}]
    """
    t_all = time.perf_counter()
    emu, setup, _names, theta, outputs = check_inputs(emulator_dir, held_out_dir)
    out_dir = Path(out_dir)
    out_dir.mkdir(parents=True, exist_ok=True)
    ss = np.random.SeedSequence(cfg["seed"])
    s_cal, s_pow = ss.spawn(2)
    timing = {}
    doc = {"settings": {"config": cfg, "emulator": os.fspath(emulator_dir), "emulator_hash": content_hash(emulator_dir),
                        "held_out": os.fspath(held_out_dir), "held_out_points": len(theta),
                        "swerve_version": __version__, "timing_s": timing,
                        "figures": []}}
    t0 = time.perf_counter()
    if cfg["accuracy"]["enabled"]:
        acc = emulator_accuracy(emu, setup, theta, outputs)
        plots.accuracy_plots(acc, list(emu.parameter_names), out_dir / "accuracy.png", out_dir / "accuracy_map.png")
        doc["settings"]["figures"] += ["accuracy.png", "accuracy_map.png"]
        L = outputs["values"].shape[1]
        doc["accuracy"] = {
            "n_points": len(theta), "n_rows": int(acc["z"].shape[0]), "rms_z": acc["rms_z"],
            "rms_z_by_stat": acc["rms_z_by_stat"], "fraction_abs_z_gt_3": acc["fraction_abs_z_gt_3"],
            "points": [{"theta": dict(zip(emu.parameter_names, acc["theta"][i].tolist())), "galaxy_point": i // L,
                        "worst_abs_z": w, "worst_output": o} for i, (w, o) in enumerate(acc["worst"])]}
        if log:
            log(f"accuracy: RMS z = {acc['rms_z']:.2f} over {acc['z'].shape[0]} held-out rows")
    else:
        doc["accuracy"] = {"enabled": False}
    timing["accuracy"] = round(time.perf_counter() - t0, 1)
    t0 = time.perf_counter()
    if cfg["calibration"]["enabled"]:
        cal = run_calibration(emulator_dir, emu, setup, theta, cfg, np.random.default_rng(s_cal), log=log)
        if cal["n_fitted"]:
            plots.calibration_plot(cal, out_dir / "calibration.png")
            doc["settings"]["figures"].append("calibration.png")
        doc["calibration"] = cal
    else:
        doc["calibration"] = {"enabled": False}
    timing["calibration"] = round(time.perf_counter() - t0, 1)
    t0 = time.perf_counter()
    if cfg["power"]["enabled"]:
        pw = run_power(emulator_dir, emu, setup, cfg, np.random.default_rng(s_pow), log=log)
        plots.power_plot(pw, out_dir / "power.png")
        write_text(out_dir / "power.md", power_table(pw) + "\n")
        doc["settings"]["figures"].append("power.png")
        doc["power"] = pw
    else:
        doc["power"] = {"enabled": False}
    timing["power"] = round(time.perf_counter() - t0, 1)
    timing["total"] = round(time.perf_counter() - t_all, 1)
    write_json(out_dir / "validation.json", doc)
    return doc


def validate_config_dict(d: dict, source="<config>") -> dict:
    """Validate a configuration given as a dict (tests, programmatic use)."""
    return _finish_config(validate(d, VALIDATE_SCHEMA, source=source), source)
