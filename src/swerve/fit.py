"""``swerve fit``: its configuration, and the run folder a researcher reads around the one
catalog-to-posterior path (:mod:`swerve.inference`, which validation and forecasts call too).

Data flow: catalog (validated) -> per-star distance samples and analytic velocity moments
(:mod:`swerve.likelihood`, cached per star in the run folder, so a refit after a star is added
recomputes only that star) -> likelihood -> priors -> Laplace-IS or emcee (:mod:`swerve.laplace`,
:mod:`swerve.sampling`) -> results.
A refit after stars are added to a converged fit reweights that fit's chain by the new stars
(importance sampling, :func:`swerve.sampling.importance_weights`) instead of sampling again.

Run folder (``--out``; created only once the inputs are checked, removed again when a fit
into a new folder fails)::

    chain.h5        emcee HDF5 backend (an interrupted fit resumes from it)
    chain.key       what the chain belongs to (its stars, configuration, emulator hash, swerve
                    version, whether it converged): a chain of other data is not resumed. When
                    stars were only added to a converged chain's, the chain is kept and
                    importance-reweighted by the new stars (``[sampler] refit``), else a new
                    chain starts from its last walkers
    stars.npz       the θ-independent terms of every star, with a hash of its inputs
    summary.json    per parameter: median, 68% / 95% credible intervals; P(q_z < 1), P(q_y < 1);
                    autocorrelation times, acceptance, convergence
    summary.ecsv    the same table: one row per free parameter with its ``unit`` column, every
                    column described (:data:`SUMMARY_COLUMNS`)
    stars.ecsv      one row per star in catalog order, used or excluded (with the reason): its
                    log-likelihood at the posterior median, its pull toward a spherical halo
                    (which stars drive the result), measured deflection (km/s) and cell
                    (:data:`STARS_COLUMNS`)
    corner.png      the posterior (corner package)
    ppc.png         observed against emulated deflections in the position cells
    fit.json        the configuration, emulator path and content hash, solar parameters, catalog,
                    swerve version
"""

from __future__ import annotations

import hashlib
import json
import shutil
import time
from dataclasses import dataclass
from pathlib import Path

import astropy.units as u
import emcee
import numpy as np
from astropy.table import Table
from threadpoolctl import threadpool_limits

from . import __version__, inference, plots
from .adjustment import AdjustedLikelihood
from .background import add_membership_column
from .catalog import parse_columns, parse_units, read_catalog
from .config import Key, Schema, Section, defaults, load_config, validate
from .emulate import content_hash, load
from .fileio import atomic_path, write_json
from .inference import FEW_STARS, FewStarsWarning, star_terms
from .likelihood import Likelihood
from .sampling import Posterior, SamplerResult, burn_and_thin, importance_weights

__all__ = ["FEW_STARS", "FIT_SCHEMA", "FewStarsWarning", "FitOutcome", "load_fit_config", "run_fit", "star_terms",
           "terminal_summary"]

FIT_SCHEMA = Schema("fit", (
    Section("catalog", (
        Key("columns", "str", "", doc="column mapping for other names, e.g. 'ra=RA_deg,dec=DE_deg', or a preset: "
            "'gaia' (Gaia DR3 gaia_source names), 'gaia,vlos=my_rv'"),
        Key("units", "str", "", doc="units of unit-less (CSV) columns, e.g. 'distance=pc'"),
        Key("drop_invalid", "bool", False, doc="drop invalid rows (reported) instead of refusing the file"),
        Key("parallax_zero_point", "float", 0.0, min=-1.0, max=1.0,
            doc="parallax zero point Z, mas: parallaxes become parallax - Z (0: none applied; Gaia EDR3's global "
                "quasar offset is about -0.017 mas, Lindegren et al. 2021, A&A 649, A4)"),
    )),
    Section("errors", (
        Key("method", "str", "smoothed", choices=("smoothed", "linear", "samples"),
            doc="distance uncertainty: importance sampling over kernel-smoothed distance samples (smoothed), "
                "propagated linearly at the mean distance (linear, fastest), or plain importance sampling (samples)"),
        Key("samples", "int", 64, min=1, doc="distance samples per star (for the mean and variance, or the sum)"),
        Key("distance_prior", "str", "none", choices=("none", "uniform-volume", "exponential-length"),
            doc="prior on distances from parallaxes"),
        Key("length_scale", "float", 10.0, min=0.01, doc="length scale of 'exponential-length', kpc"),
        Key("max_distance", "float", 300.0, min=0.1, doc="upper limit of 'uniform-volume', kpc"),
        Key("seed", "int", 1, min=0, doc="seed of the per-star error samples"),
    )),
    Section("priors", (
        Key("parameters", "table", {}, doc="per parameter: {kind = 'uniform'|'gaussian'|'beta'|'fixed', low, high, mu, sigma, alpha, beta, value}"),
    )),
    Section("selection", (
        Key("r_min", "float", 0.0, min=0.0, doc="stricter minimum galactocentric radius of the stars used, kpc (0: the emulator's)"),
    )),
    Section("sampler", (
        Key("nwalkers", "int", 0, min=0, doc="walkers (0: max(32, 4 x free parameters))"),
        Key("max_steps", "int", 20000, min=50, doc="step cap"),
        Key("check_every", "int", 250, min=10, doc="steps between autocorrelation checks"),
        Key("n_tau", "float", 50.0, min=1.0, doc="converged when the chain is longer than n_tau x tau ..."),
        Key("tau_rtol", "float", 0.05, min=0.0, doc="... and tau changed by less than this fraction"),
        Key("seed", "int", 1, min=0, doc="seed of the sampler"),
        Key("method", "str", "auto", choices=("emcee", "laplace-is", "auto"),
            doc="emcee: the ensemble sampler; laplace-is: the Laplace approximation at the maximum checked by "
                "importance sampling (swerve.laplace: seconds for large catalogs), emcee started from its draws "
                "when the weights are unreliable; auto: laplace-is from laplace_min_stars usable stars, emcee below"),
        Key("laplace_min_stars", "int", 1000, min=1, doc="catalog size from which method = 'auto' tries laplace-is"),
        Key("refit", "str", "reweight", choices=("reweight", "sample"),
            doc="after stars are added to a converged fit in the same folder: importance-reweight its chain by the "
                "new stars (seconds; falls back to sampling when the weights are unreliable) or always sample anew"),
    )),
    Section("likelihood", (
        Key("adjust", "bool", True,
            doc="widen the likelihood by its curvature adjustment at the maximum (swerve.adjustment): the per-cell "
                "model overstates the information on the launch slope and the disk mass, and the adjustment "
                "calibrates the slope's intervals (benchmarks/RESULTS.md); false: the plain likelihood"),
        # mixture with a background population (swerve.background)
        Key("background", "str", "none", choices=("none", "halo"),
            doc="'halo': each star is a hypervelocity star with probability f_hvs (a parameter, prior in [priors], "
                "uniform on [0, 1] by default) or a stellar-halo star (velocity ellipsoid halo_sigma); per-star "
                "memberships in stars.ecsv; 'none': every star is a hypervelocity star"),
        Key("halo_sigma", "list[float]", [141.0, 75.0, 85.0], min=1.0, length=3,
            doc="the halo's velocity dispersions (sigma_r, sigma_theta, sigma_phi), km/s (Bond et al. 2010)"),
        Key("prior_membership", "str", "",
            doc="catalog column of each star's own prior probability of being a hypervelocity star (replaces "
                "f_hvs for the stars where it is given; needs background = 'halo'); '' for none"),
    )),
    Section("frame", (
        Key("solar", "str", "v4.0", doc="solar-parameter set used to move the stars to the Galactocentric frame"),
    )),
    Section("emulator", (
        Key("include_variance", "bool", True, doc="propagate the emulator's predictive uncertainty (false: take it as exact)"),
        Key("error", "str", "catalog", choices=("catalog", "per-star", "none"),
            doc="marginalise the emulator's error of the cell means (and v_r histograms, where the emulator has "
                "them) once for the catalog (shared by its stars), fold the means' into each star's density "
                "(too optimistic for large catalogs), or take the emulator as exact (none)"),
        Key("velocity_floor", "float", 1.0, min=0.0,
            doc="km/s added in quadrature to every emulated cell dispersion: the model's resolution "
                "(the emulated cells are nearly degenerate; see swerve.likelihood.Likelihood)"),
        Key("variance", "str", "ensemble", choices=("ensemble", "per-walker"),
            doc="evaluate that variance once per call at the walkers' mean (fast) or at every walker (exact)"),
    )),
))


def load_fit_config(path=None, overrides: dict | None = None) -> dict:
    """The fit configuration (defaults when ``path`` is None), with section overrides merged."""
    cfg = load_config(path, FIT_SCHEMA) if path else defaults(FIT_SCHEMA)
    if overrides:
        merged = {k: dict(v) for k, v in cfg.items()}
        for sec, vals in overrides.items():
            merged.setdefault(sec, {}).update(vals)
        cfg = validate(merged, FIT_SCHEMA, source=str(path or "the command line"))
    return cfg


# ------------------------------------------------------------------------------------ fit ------
@dataclass
class FitOutcome:
    summary: dict
    out_dir: Path
    terminal: str


def run_fit(catalog_path, emulator_path, out_dir, cfg: dict, *, progress=False, log=print) -> FitOutcome:
    """Fit a catalog against an emulator and write the run folder (module docstring).

    Nothing is written until the inputs are checked (catalog, configuration, priors, every
    star's terms). A failed fit into a folder it created removes that folder again; into an
    existing run folder it leaves the files of earlier fits (their chain resumes). An
    interruption (KeyboardInterrupt) keeps the folder, so the chain resumes on a rerun.
    """
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise ValueError(f"{out_dir}: a file is there, not a run folder")
    created = out_dir  # the outermost folder this run creates, removed again on failure
    while not created.parent.exists() and created.parent != created:
        created = created.parent
    created = None if out_dir.exists() else created
    try:
        return _run_fit(catalog_path, emulator_path, out_dir, cfg, progress=progress, log=log)
    except Exception:
        if created is not None and created.is_dir():
            shutil.rmtree(created, ignore_errors=True)
        raise


def _run_fit(catalog_path, emulator_path, out_dir, cfg, *, progress=False, log=print) -> FitOutcome:
    """The run folder around :mod:`swerve.inference`'s path: the star cache, the chain (resumed,
    reweighted by added stars, or new) and the outputs."""
    t_start = time.perf_counter()
    emu = load(emulator_path)
    c = cfg["catalog"]
    catalog = read_catalog(catalog_path, columns=parse_columns(c["columns"] or None),
                           units=parse_units(c["units"] or None), drop_invalid=c["drop_invalid"],
                           parallax_zero_point=c["parallax_zero_point"])
    problem = inference.prepare(catalog, emu, cfg, cache_path=out_dir / "stars.npz", log=log,
                                emulator_source=str(emulator_path))
    terms, notes, names = problem.terms, problem.notes, problem.names
    out_dir.mkdir(parents=True, exist_ok=True)  # only once the inputs are known to be good
    inference.write_star_cache(out_dir / "stars.npz", problem.star_hashes, terms)
    s = cfg["sampler"]

    # what defines the chain: the stars, the emulator and the configuration, except the step cap
    # (raising max_steps continues the same chain)
    key_cfg = {k: (dict(v, max_steps=None) if k == "sampler" else v) for k, v in cfg.items()}
    data_key = hashlib.sha256(("".join(sorted(map(str, terms.ids))) + json.dumps(key_cfg, sort_keys=True, default=str)
                               + content_hash(emulator_path)).encode()).hexdigest()
    chain = out_dir / "chain.h5"
    state_file = out_dir / "chain.key"
    # what the chain's target is apart from its stars (reweighting needs this to be unchanged)
    target_key = hashlib.sha256((json.dumps(key_cfg, sort_keys=True, default=str) + content_hash(emulator_path)
                                 + __version__).encode()).hexdigest()
    state = _read_state(state_file)
    changed = chain.exists() and (state is None or state["key"] != data_key)
    added = _stars_added(state, terms.ids, target_key) if changed else []
    reweight = bool(added) and s["refit"] == "reweight"
    if reweight and cfg["likelihood"]["adjust"] and not state.get("adjustment"):
        notes.append("refit: the previous chain records no curvature adjustment, so it is not reweighted "
                     "by the adjusted likelihood; sampled anew")
        reweight = False
    # while a chain is reweighted by added stars, the adjustment stays the chain's own: adding
    # a star moves the estimated maximum and matrix by their noise (the maximum of a wide
    # posterior by a good part of its width), which would shift the target and spoil the
    # weights; a new chain gets a new adjustment
    post, adjustment = inference.adjust(problem, cfg, state["adjustment"] if reweight else None)
    res = previous_start = None
    t1 = time.perf_counter()
    if changed:
        if reweight:
            with threadpool_limits(limits=1, user_api="blas"):
                res, start, why = _reweight(chain, state, post, terms, s, problem.like_options, problem.priors,
                                            problem.bounds if adjustment is not None else None)
            if res is not None:
                notes.append(f"refit: the chain of the previous {len(state['stars'])} stars was reweighted "
                             f"by the {len(added)} added star(s) ({why}); no new sampling")
            else:
                notes.append(f"refit: reweighting the previous chain by the {len(added)} added star(s) was "
                             f"not reliable ({why}); a new chain was started from the reweighted samples")
                previous_start = start
                if adjustment is not None:  # the new chain gets its own adjustment
                    notes[:] = [n for n in notes if not n.startswith("likelihood: curvature adjustment")]
                    post, adjustment = inference.adjust(problem, cfg)
        if res is None:
            if previous_start is None:
                previous_start = _last_walkers(chain, post.ndim)
                notes.append("the data or configuration changed since the chain in this folder: a new chain "
                             "was started from the previous one's final walkers")
            chain.unlink()
    if res is None:
        adj_state = None if adjustment is None else {k: adjustment[k] for k in ("C", "kappa", "widened")}
        if adj_state is not None:
            adj_state["theta_hat"] = [adjustment["theta_hat"][n] for n in names]

        def record(converged):
            _write_state(state_file, data_key, target_key, terms.ids, converged=converged, adjustment=adj_state)

        res = inference.draw(problem, post, adjustment, cfg, chain=chain, progress=progress, start=previous_start,
                             on_chain=record)
    t_sample = time.perf_counter() - t1
    summary = inference.summarize(problem, res, adjustment, seconds_sampling=t_sample,
                                  seconds_total=time.perf_counter() - t_start)
    med = np.array([summary["parameters"][n]["median"] for n in res.names])
    _write_outputs(out_dir, summary, res, post, problem.likelihood, terms, problem.spec, med, catalog, cfg,
                   emulator_path, content_hash(emulator_path), problem.solar, problem.meta, problem.priors)
    text = terminal_summary(summary, catalog_path, emulator_path)
    return FitOutcome(summary, out_dir, text)


def _read_state(path):
    """The run folder's record of what its chain belongs to, or None (absent or unreadable;
    a plain-text key from before the record held more is read as its key alone)."""
    try:
        text = Path(path).read_text().strip()
    except OSError:
        return None
    try:
        st = json.loads(text)
    except ValueError:
        return {"key": text}
    return st if isinstance(st, dict) and "key" in st else None


def _write_state(path, key, target_key, ids, converged, adjustment=None):
    """``adjustment``: the curvature adjustment the chain samples (``theta_hat``, ``C``), or None."""
    st = {"key": key, "target": target_key, "converged": bool(converged), "stars": sorted(map(str, ids))}
    if adjustment is not None:
        st["adjustment"] = adjustment
    _write_json(path, st)


def _stars_added(state, ids, target_key):
    """The stars added since a converged chain of the same target (configuration, emulator,
    swerve version), if the new stars are the old ones and more; else an empty list."""
    if not state or state.get("target") != target_key or not state.get("converged"):
        return []
    old, new = set(state.get("stars", ())), set(map(str, ids))
    return sorted(new - old) if old and old < new else []


def _reweight(chain, state, post, terms, s, like_options, priors, bounds=None):
    """Importance-reweight a converged chain of a subset of the stars by the added stars.

    The ratio of the new to the old posterior is evaluated at every retained sample of the old
    chain (burn-in discarded, thinned as a fit thins it), both posteriors in the same batches so
    the emulator-variance cache is the same for both. With ``bounds`` (the emulator's), the
    chain sampled a curvature-adjusted likelihood: the old posterior is rebuilt with the
    adjustment the state records, and ``post`` is the new catalog's likelihood under that same
    adjustment (``run_fit`` keeps it while reweighting), so the weights are the added stars'
    likelihood and the change of the catalog-level emulator term. Returns
    ``(result, None, diagnostics)``
    when the weights are reliable (:class:`swerve.sampling.ImportanceWeights`), else ``(None,
    start, diagnostics)`` with ``start`` walkers drawn from the reweighted samples."""
    b = emcee.backends.HDFBackend(str(chain), read_only=True)
    n_steps = int(b.iteration)
    with np.errstate(invalid="ignore", divide="ignore"):
        tau = np.asarray(b.get_autocorr_time(tol=0), dtype=float)
    burn, thin = burn_and_thin(tau, n_steps)  # as the fit that made the chain
    x = b.get_chain(discard=burn, thin=thin, flat=True)
    old = np.flatnonzero(np.isin(terms.ids.astype(str), list(state["stars"])))
    like_old = Likelihood(stars=terms.subset(old), **like_options)
    if bounds is not None:
        a = state["adjustment"]
        like_old = AdjustedLikelihood(like_old, a["theta_hat"], a["C"], *np.asarray(bounds, dtype=float).T)
    post_old = Posterior(like_old, priors)
    lp_new, lp_old = np.empty(len(x)), np.empty(len(x))
    for i in range(0, len(x), 64):
        lp_new[i:i + 64] = post(x[i:i + 64])
        lp_old[i:i + 64] = post_old(x[i:i + 64])
    iw = importance_weights(lp_new - lp_old)
    why = f"effective sample size {iw.ess:.0f} of {iw.n}, Pareto k {iw.pareto_k:.2f}"
    if not iw.reliable:
        nw = b.shape[0]
        if np.count_nonzero(iw.weights) < nw:  # too few distinct samples for an ensemble
            return None, None, why
        start = x[np.random.default_rng(s["seed"]).choice(len(x), size=nw, replace=False, p=iw.weights)]
        return None, start, why
    res = SamplerResult(
        samples=x, log_prob=lp_new, tau=tau, acceptance=float(np.mean(b.accepted / max(n_steps, 1))),
        n_steps=n_steps, n_walkers=int(b.shape[0]), converged=True, burn_in=burn, thin=thin,
        x_map=x[np.argmax(lp_new)], names=list(post.free_names), weights=iw.weights,
        importance={"ess": iw.ess, "pareto_k": iw.pareto_k, "n_samples": iw.n,
                    "stars_added": int(terms.n - len(old)), "chain_stars": len(old)})
    return res, None, why


def _last_walkers(chain, ndim):
    try:
        b = emcee.backends.HDFBackend(str(chain), read_only=True)
        last = b.get_last_sample().coords
        if last.shape[1] == ndim:
            return np.array(last, dtype=float)
    except Exception:  # noqa: BLE001 - an unreadable old chain is simply not reused
        return None
    return None


def _write_json(path, obj):
    """Strict JSON, atomically (:func:`swerve.fileio.write_json`)."""
    write_json(path, obj)


#: summary.ecsv's columns: name -> description (values in the row's ``unit``)
SUMMARY_COLUMNS = {
    "parameter": "inferred parameter (the emulator's name)",
    "unit": "unit of this row's median, lo68, hi68, lo95 and hi95 (empty: dimensionless)",
    "median": "posterior median",
    "lo68": "lower end of the central 68% credible interval (16th percentile)",
    "hi68": "upper end of the central 68% credible interval (84th percentile)",
    "lo95": "lower end of the central 95% credible interval (2.5th percentile)",
    "hi95": "upper end of the central 95% credible interval (97.5th percentile)",
    "tau": "integrated autocorrelation time of the chain, steps",
}

#: stars.ecsv's columns: name -> (unit, description)
STARS_COLUMNS = {
    "id": ("", "star identifier, as in the catalog"),
    "row": ("", "data row of the star in the catalog (1 = first star; the header is not counted)"),
    "used": ("", "true: the star is in the fit; false: excluded (see reason)"),
    "reason": ("", "why the star was excluded (empty for a used star)"),
    "loglike_median": ("", "the star's log-likelihood (natural log) at the posterior median; NaN if excluded"),
    "dloglike_vs_spherical": ("", "log L at the posterior median minus log L with q_y = q_z = 1 (positive: "
                                  "the star pulls away from a spherical halo); NaN if excluded"),
    "v_tf_obs": ("km / s", "measured folded polar deflection v_theta sign(z) (positive toward the disk plane), "
                           "weighted mean over the star's distance samples inside the cells; NaN if excluded"),
    "v_tf_err": ("km / s", "measurement uncertainty of v_tf_obs (square root of the weighted mean sample "
                           "variance); NaN if excluded"),
    "cell": ("", "position cell of the emulator's summaries (0-based; labels in the meta's cell_labels) "
                 "holding most of the star's samples; -1 if excluded"),
}


def _summary_table(summary, names, units):
    """summary.ecsv: one row per free parameter, its unit in a column, every column described."""
    t = Table()
    pars = summary["parameters"]
    t["parameter"] = list(names)
    t["unit"] = [units.get(n, "") for n in names]
    for col, key, j in (("median", "median", None), ("lo68", "ci68", 0), ("hi68", "ci68", 1),
                        ("lo95", "ci95", 0), ("hi95", "ci95", 1), ("tau", "tau", None)):
        t[col] = [float(pars[n][key] if j is None else pars[n][key][j]) for n in names]
    for col, desc in SUMMARY_COLUMNS.items():
        t[col].description = desc
    t.meta = {"probabilities": summary["probabilities"],
              "fixed": {n: {"value": v, "unit": units.get(n, "")} for n, v in summary["fixed"].items()},
              "acceptance": summary["sampler"]["acceptance"], "converged": summary["sampler"]["converged"],
              "swerve_version": __version__}
    return t


def _stars_table(terms, catalog, ll_med, dll_sph, spec):
    """stars.ecsv: every catalog star that reached the fit, used or excluded, in catalog order."""
    rows_of = {str(i): int(r) for i, r in zip(catalog.ids, catalog.rows)}
    w = np.exp(terms.log_w)
    used = {
        "id": terms.ids.astype(str), "used": np.ones(terms.n, bool), "reason": [""] * terms.n,
        "loglike_median": np.asarray(ll_med, float),
        "dloglike_vs_spherical": np.asarray(dll_sph if dll_sph is not None else np.full(terms.n, np.nan), float),
        "v_tf_obs": np.sum(w * terms.mean[..., 1], axis=1),
        "v_tf_err": np.sqrt(np.sum(w * terms.cov[..., 1, 1], axis=1)),
        "cell": np.array([int(np.bincount(c[c >= 0]).argmax()) for c in terms.cell], dtype=int),
    }
    ex = terms.excluded
    m = len(ex)
    nan = np.full(m, np.nan)
    cols = {k: np.concatenate([used[k], v]) for k, v in {
        "id": np.array([str(e["id"]) for e in ex], dtype=str), "used": np.zeros(m, bool),
        "reason": np.array([str(e["reason"]) for e in ex], dtype=str), "loglike_median": nan,
        "dloglike_vs_spherical": nan, "v_tf_obs": nan, "v_tf_err": nan, "cell": np.full(m, -1, dtype=int)}.items()}
    cols["row"] = np.array([rows_of.get(str(i), -1) for i in cols["id"]], dtype=int)
    order = np.argsort(cols["row"], kind="stable")
    st = Table()
    for name, (unit, desc) in STARS_COLUMNS.items():
        if name == "dloglike_vs_spherical" and dll_sph is None:
            continue
        values = cols[name][order]
        st[name] = values.astype(str) if name in ("id", "reason") else values
        if unit:
            st[name].unit = unit
        st[name].description = desc
    st.meta = {"excluded": ex, "cell_labels": list(spec.cell_labels()),
               "n_used": int(terms.n), "n_excluded": m, "swerve_version": __version__}
    return st


def _write_outputs(out_dir, summary, res, post, like, terms, spec, med, catalog, cfg, emulator_path, emu_hash,
                   solar, meta, priors):
    _write_json(out_dir / "summary.json", summary)
    units = dict(zip(like.emulator.parameter_names, getattr(like.emulator, "units", None) or ()))
    units = {n: (str(u.Unit(v)) if v else "") for n, v in units.items()}
    _atomic_table(_summary_table(summary, res.names, units), out_dir / "summary.ecsv")

    # per-star contributions at the posterior median, and the pull toward a spherical halo
    full_med = post.full(med[None, :])
    ll_med = like.per_star(full_med)[0]
    names = post.names
    sph = full_med.copy()
    have_sph = False
    for q in ("q_y", "q_z"):
        if q in names:
            j = names.index(q)
            lo, hi = np.asarray(like.emulator.bounds)[j]
            if lo <= 1.0 <= hi:
                sph[0, j] = 1.0
                have_sph = True
    st = _stars_table(terms, catalog, ll_med, ll_med - like.per_star(sph)[0] if have_sph else None, spec)
    if getattr(like, "background", "none") != "none":  # the mixture's memberships (swerve.background)
        add_membership_column(st, like, post, res)
    _atomic_table(st, out_dir / "stars.ecsv")

    fit_record = {
        "swerve_version": __version__,
        "catalog": {"source": str(catalog.source), "n_rows": int(catalog.n), "dropped_rows": list(catalog.dropped_rows)},
        "emulator": {"path": str(emulator_path), "content_hash": emu_hash, "parameters": list(like.emulator.parameter_names),
                     "bounds": np.asarray(like.emulator.bounds).tolist(), "selection": meta.get("selection"),
                     "galaxy": meta.get("galaxy")},
        "priors": [p.to_dict() for p in priors],
        "config": cfg,
        "solar": solar.to_dict(),
        "summaries": spec.to_dict(),
    }
    _write_json(out_dir / "fit.json", fit_record)

    truth = _truth_from_meta(catalog.meta, res.names)
    plots.corner_plot(res.samples, res.names, out_dir / "corner.png", truths=truth, weights=res.weights)
    n_draw = min(200, len(res.samples), int(np.count_nonzero(res.weights)) if res.weights is not None else len(res.samples))
    draws = res.samples[np.random.default_rng(0).choice(len(res.samples), size=n_draw, replace=False, p=res.weights)]
    mu, sig = like.cell_gaussians(post.full(draws))
    plots.posterior_predictive(st[st["used"]], mu, sig, spec, out_dir / "ppc.png")


def _truth_from_meta(meta, names):
    """True parameters stated in a mock catalog's metadata, for the plots (None if absent)."""
    if not isinstance(meta, dict):
        return None
    truth = meta.get("true_parameters") or meta.get("truth")
    if not isinstance(truth, dict):
        return None
    vals = [truth.get(n) for n in names]
    return vals if any(v is not None for v in vals) else None


def _atomic_table(table, path):
    """An ECSV table, atomically (:func:`swerve.fileio.atomic_path`)."""
    with atomic_path(path) as tmp:
        table.write(tmp, format="ascii.ecsv", overwrite=True)


def terminal_summary(summary, catalog_path, emulator_path) -> str:
    """The few lines a person reads at a glance."""
    s = summary["sampler"]
    lines = [f"swerve fit: {catalog_path} against {emulator_path}",
             f"  stars used: {summary['stars']['used']}, excluded: {len(summary['stars']['excluded'])}"
             + (f", reused from the last fit: {summary['stars']['terms_reused']}" if summary['stars']['terms_reused'] else ""),
             f"  chain: {s['n_walkers']} walkers x {s['n_steps']} steps, acceptance {s['acceptance']:.2f}, "
             + ("converged" if s["converged"] else "NOT converged (step cap hit)")]
    imp = s.get("importance")
    if imp and imp.get("method") == "laplace-is":
        lines[-1] = (f"  posterior: Laplace approximation + importance sampling, {imp['rounds']} round(s): "
                     f"effective sample size {imp['ess']:.0f} of {imp['n_samples']}, Pareto k {imp['pareto_k']:.2f}")
    elif imp:
        lines.append(f"  refit: that chain (of {imp['chain_stars']} stars) reweighted by {imp['stars_added']} added "
                     f"star(s): effective sample size {imp['ess']:.0f} of {imp['n_samples']}, "
                     f"Pareto k {imp['pareto_k']:.2f}")
    lines.append("")
    # tau: the chain's autocorrelation time; a fit without a chain (laplace-is) has none
    has_tau = any(p.get("tau") is not None and np.isfinite(p["tau"]) for p in summary["parameters"].values())
    lines.append(f"  {'parameter':<10} {'median':>11} {'68% interval':>26} {'95% interval':>26}"
                 + (f" {'tau':>6}" if has_tau else ""))
    for n, p in summary["parameters"].items():
        lines.append(f"  {n:<10} {p['median']:11.4g} [{p['ci68'][0]:11.4g}, {p['ci68'][1]:11.4g}] "
                     f"[{p['ci95'][0]:11.4g}, {p['ci95'][1]:11.4g}]" + (f" {p['tau']:6.1f}" if has_tau else ""))
    for n, v in summary["fixed"].items():
        lines.append(f"  {n:<10} {v:11.4g}   (fixed)")
    if summary["probabilities"]:
        lines.append("  " + ", ".join(f"{k} = {v:.3f}" for k, v in summary["probabilities"].items()))
    for e in summary["stars"]["excluded"][:5]:
        lines.append(f"  excluded {e['id']} (row {e['row']}): {e['reason']}")
    if len(summary["stars"]["excluded"]) > 5:
        lines.append(f"  ... and {len(summary['stars']['excluded']) - 5} more excluded (see stars.ecsv)")
    for n in summary["notes"]:
        lines.append(f"  note: {n}")
    for n in summary.get("warnings", ()):
        lines.append(f"  WARNING: {n}")
    lines.append(f"  time: {summary['timing_s']['total']:.1f} s")
    return "\n".join(lines)
