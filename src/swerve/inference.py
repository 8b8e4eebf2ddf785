"""The one path from a catalog to a posterior.

Everything that fits a catalog goes through this module, with one set of defaults (the
configuration of ``swerve fit``, :data:`swerve.fit.FIT_SCHEMA`): ``swerve fit`` and its
variants (run folders, resumable chains, reweighted refits: :mod:`swerve.fit`), the validation
harness (:mod:`swerve.validation`) and survey forecasts (:mod:`swerve.forecast`). A calibration
check therefore checks the fit that ships, not a sibling of it. The stages::

    problem = prepare(catalog, emulator, cfg)         # star terms, likelihood, priors
    post, adjustment = adjust(problem, cfg)           # curvature adjustment (when configured)
    result = draw(problem, post, adjustment, cfg)     # Laplace-IS or emcee, as configured
    summary = summarize(problem, result, adjustment)  # medians, intervals, warnings

:func:`fit_catalog` runs the four in memory (no files): what validation and forecasts call.

Per-star terms: every star's distance samples are drawn from its own seed (``[errors] seed``
and the star's id), so a star's terms do not depend on the other stars of the catalog; a run
folder caches them (``stars.npz``) and a refit recomputes only new or changed stars.
"""

from __future__ import annotations

import dataclasses
import hashlib
import json
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from threadpoolctl import threadpool_limits

from .adjustment import AdjustedLikelihood, adjusted_posterior
from .background import prior_membership
from .catalog import Catalog, catalog_from_table
from .fileio import write_atomic
from .frames import SolarParameters
from .laplace import laplace_is
from .likelihood import Likelihood, StarTerms, linearised_samples, prepare_stars, smoothed_samples
from .measurement import check_parallaxes, distance_warning, draw_samples
from .sampling import Posterior, credible_summary, posterior_warnings, resolve_priors, sample_posterior
from .selection import check_declared
from .summaries import SummarySpec

#: fewer usable stars than this fit with a :class:`FewStarsWarning`
FEW_STARS = 10


class FewStarsWarning(UserWarning):
    """A fit of very few stars: its posterior is mostly the prior and the emulator's error."""


# ------------------------------------------------------------------------------ star terms -----
def _star_hash(catalog, i, settings: str) -> str:
    fields = ("ra", "dec", "distance", "distance_err", "parallax", "parallax_err", "pmra", "pmra_err", "pmdec",
              "pmdec_err", "vlos", "vlos_err", "corr_pmra_pmdec", "corr_parallax_pmra", "corr_parallax_pmdec")
    vals = np.array([getattr(catalog, f)[i] for f in fields], dtype=float)
    h = hashlib.sha256()
    h.update(str(catalog.ids[i]).encode())
    h.update(vals.tobytes())
    h.update(settings.encode())
    return h.hexdigest()


def _subset_catalog(catalog, idx):
    arrays = {f.name: getattr(catalog, f.name)[idx] for f in dataclasses.fields(catalog)
              if isinstance(getattr(catalog, f.name), np.ndarray)}
    return dataclasses.replace(catalog, **arrays)


def _star_seed(seed: int, star_id: str) -> np.random.SeedSequence:
    digest = hashlib.sha256(str(star_id).encode()).digest()
    return np.random.SeedSequence([seed, int.from_bytes(digest[:8], "little")])


def star_terms(catalog, spec, cfg, solar, cache_path=None, r_min=None, vlos_min=None):
    """θ-independent terms of every star (a :class:`~swerve.likelihood.StarTerms`), each star's
    distance samples drawn from its own seed (``[errors] seed`` and its id), reusing the cached
    terms of unchanged stars from ``cache_path`` and rewriting it (atomically). Returns
    (terms, n_reused)."""
    terms, reused, hashes = compute_star_terms(catalog, spec, cfg, solar, cache_path, r_min, vlos_min)
    if cache_path is not None:
        write_star_cache(cache_path, hashes, terms)
    return terms, reused


def write_star_cache(path, hashes, terms) -> None:
    """``stars.npz``: each used star's input hash and θ-independent terms (written atomically)."""
    write_atomic(path, lambda fh: np.savez(fh, hash=np.asarray(hashes), cell=terms.cell, mean=terms.mean,
                                           cov=terms.cov, log_w=terms.log_w))


def _read_star_cache(cache_path) -> dict:
    if cache_path is None or not Path(cache_path).is_file():
        return {}
    cached = {}
    try:
        with np.load(cache_path, allow_pickle=False) as z:  # each z[name] reads the file: once each
            hsh, cell, mean, cov, log_w = (z[k] for k in ("hash", "cell", "mean", "cov", "log_w"))
        for j, h in enumerate(hsh):
            cached[str(h)] = (cell[j], mean[j], cov[j], log_w[j])
    except (OSError, KeyError, ValueError):
        return {}
    return cached


def compute_star_terms(catalog, spec, cfg, solar, cache_path=None, r_min=None, vlos_min=None):
    """:func:`star_terms` without writing the cache: (terms, n_reused, input hash of each used star).

    A star whose measurements give non-finite terms (e.g. an absurd velocity that overflows in
    the frame transform) is a ValueError naming its row and id."""
    e = cfg["errors"]
    settings = json.dumps({"k": e["samples"], "method": e["method"], "prior": e["distance_prior"], "L": e["length_scale"],
                           "dmax": e["max_distance"], "seed": e["seed"], "solar": solar.to_dict(),
                           "spec": spec.to_dict(), "r_min": r_min, "v": 1,
                           **({"vlos_min": vlos_min} if vlos_min is not None else {})}, sort_keys=True)
    hashes = [_star_hash(catalog, i, settings) for i in range(catalog.n)]
    cached = _read_star_cache(cache_path)
    cells, means, covs, logws, keep_hash, ids, excluded = [], [], [], [], [], [], []
    reused = 0
    for i in range(catalog.n):
        if hashes[i] in cached:
            c, m, cv, lw = cached[hashes[i]]
            reused += 1
        else:
            sub = _subset_catalog(catalog, [i])
            rng = np.random.default_rng(_star_seed(e["seed"], catalog.ids[i]))
            smp = draw_samples(sub, e["samples"], rng, distance_prior=e["distance_prior"], solar=solar,
                               length_scale=e["length_scale"], max_distance=e["max_distance"])
            # overflow of absurd inputs is caught by the finiteness check below, with the star named
            with np.errstate(over="ignore", invalid="ignore"):
                _check_finite_samples(catalog, i, smp)
                if e["method"] == "linear":
                    smp = linearised_samples(sub, smp, solar)
                elif e["method"] == "smoothed":
                    smp = smoothed_samples(sub, smp, solar)
                t = prepare_stars(sub, smp, spec, solar=solar, r_min=r_min, allow_empty=True, vlos_min=vlos_min)
            if t.n == 0:  # outside the selection: reported, never silently used
                excluded.extend(t.excluded)
                continue
            c, m, cv, lw = t.cell[0], t.mean[0], t.cov[0], t.log_w[0]
            inside = np.isfinite(lw)  # samples inside the cells (log weight -inf outside)
            if not (inside.any() and np.all(np.isfinite(m[inside])) and np.all(np.isfinite(cv[inside]))
                    and not np.any(np.isnan(lw))):
                raise ValueError(f"{catalog.source}: row {int(catalog.rows[i])} (id {str(catalog.ids[i])!r}): "
                                 "its measurements give non-finite Galactocentric velocities; check the "
                                 "vlos, pmra, pmdec and distance (or parallax) columns")
        cells.append(c)
        means.append(m)
        covs.append(cv)
        logws.append(lw)
        keep_hash.append(hashes[i])
        ids.append(catalog.ids[i])
    if not ids:
        first = excluded[0] if excluded else {"id": "?", "reason": "empty catalog"}
        raise ValueError(f"{catalog.source}: no star is usable inside the emulator's selection "
                         f"({len(excluded)} excluded; first: {first['id']!r}: {first['reason']})")
    terms = StarTerms(np.asarray(ids), np.asarray(cells), np.asarray(means), np.asarray(covs),
                      np.asarray(logws), excluded)
    return terms, reused, keep_hash


def _check_finite_samples(catalog, i, smp) -> None:
    """Refuse a star whose distance or velocity samples are not finite (one line, row and id)."""
    for name in ("distance", "position", "velocity"):
        arr = getattr(smp, name, None)
        if arr is not None and not np.all(np.isfinite(np.asarray(arr, dtype=float))):
            raise ValueError(f"{catalog.source}: row {int(catalog.rows[i])} (id {str(catalog.ids[i])!r}): "
                             f"its measurements give non-finite {name} samples; check the vlos, pmra, pmdec "
                             "and distance (or parallax) columns")


# ------------------------------------------------------------------------------- the problem -----
@dataclass
class Problem:
    """A catalog made ready to fit: its star terms, the likelihood and the priors."""

    catalog: object
    emulator: object
    spec: SummarySpec
    solar: SolarParameters
    terms: StarTerms
    likelihood: Likelihood
    #: the keywords the likelihood was built with (less the stars): a refit rebuilds it for a subset
    like_options: dict
    priors: list
    posterior: Posterior
    names: list
    bounds: np.ndarray
    notes: list
    star_hashes: list
    reused: int
    seconds_terms: float

    @property
    def meta(self) -> dict:
        return self.emulator.metadata or {}


def emulator_spec(emulator, source) -> SummarySpec:
    """The summary definition an emulator records (refused when it was not made by swerve train)."""
    meta = emulator.metadata or {}
    if "summaries" not in meta:
        raise ValueError(f"{source}: the emulator records no summary definition; it was not made by swerve train")
    return SummarySpec.from_dict(meta["summaries"])


def prepare(catalog, emulator, cfg: dict, *, cache_path=None, log=None, emulator_source="the emulator") -> Problem:
    """Check a catalog against an emulator and build its likelihood and posterior.

    ``catalog`` is a :class:`swerve.catalog.Catalog`; ``cfg`` a validated fit configuration
    (:func:`swerve.fit.load_fit_config`). ``cache_path``: a ``stars.npz`` of earlier star terms
    to reuse (read only). ``log`` receives warnings as they are found (a long fit says them
    before it samples); every note and warning is also kept in :attr:`Problem.notes`.
    """
    meta = emulator.metadata or {}
    # a catalog declaring another velocity selection than the emulator's is refused (swerve.selection)
    check_declared(getattr(catalog, "meta", None), meta.get("selection"), catalog.source)
    vlos_min = (meta.get("selection") or {}).get("vlos_min")
    spec = emulator_spec(emulator, emulator_source)
    solar = SolarParameters.from_name(cfg["frame"]["solar"])
    notes = []
    emu_solar = (meta.get("solar") or {}).get("name")
    if emu_solar and emu_solar != solar.name:
        notes.append(f"the fit moves stars with solar parameters {solar.name!r}; the emulator was trained "
                     f"with {emu_solar!r} (the emulator is galactocentric, so only the stars' transform changes)")
    emu_rmin = (meta.get("selection") or {}).get("r_min") or 0.0
    r_min = cfg["selection"]["r_min"]
    if r_min and r_min < emu_rmin:
        raise ValueError(f"[selection] r_min = {r_min:g} kpc is looser than the emulator's selection "
                         f"(r >= {emu_rmin:g} kpc): stars there are outside what it was trained on")
    if r_min and r_min > spec.r_edges[0]:
        notes.append(f"stars with r < {r_min:g} kpc are excluded (stricter than the emulator's {emu_rmin:g} kpc)")
    for p in catalog.problems:
        notes.append(f"dropped: {p}")
    for hint in catalog.hints + (distance_warning(catalog, cfg["errors"]["distance_prior"]),):
        if hint:  # said now (the sampling takes a while) and kept in summary.json's notes
            notes.append(f"warning: {hint}")
            if log:
                log(f"swerve fit: warning: {hint}")
    check_parallaxes(catalog, cfg["errors"]["distance_prior"])  # every unusable parallax counted at once
    t0 = time.perf_counter()
    terms, reused, star_hashes = compute_star_terms(catalog, spec, cfg, solar, cache_path=cache_path,
                                                    r_min=r_min or None, vlos_min=vlos_min)
    seconds_terms = time.perf_counter() - t0
    if terms.n < FEW_STARS:
        few = (f"only {terms.n} usable star(s): the posterior is then mostly the prior and the emulator's "
               f"own error, and its intervals are unreliable (a fit wants at least {FEW_STARS} stars)")
        notes.append(few)
        warnings.warn(f"{catalog.source}: {few}", FewStarsWarning, stacklevel=2)
    em = cfg["emulator"]
    like_options = dict(emulator=emulator, spec=spec, include_emulator_variance=em["include_variance"],
                        emulator_variance=em["variance"], emulator_error=em["error"],
                        velocity_floor=em["velocity_floor"], vlos_min=vlos_min)
    lk = cfg["likelihood"]
    if lk["background"] != "none":  # the mixture (swerve.background)
        like_options.update(background=lk["background"], halo_sigma=lk["halo_sigma"])
        if lk["prior_membership"]:
            terms.prior_membership = prior_membership(catalog, terms.ids, lk["prior_membership"])
    elif lk["prior_membership"]:
        raise ValueError("[likelihood] prior_membership needs a background population (background = 'halo')")
    like = Likelihood(stars=terms, **like_options)
    names = list(like.parameter_names)  # the emulator's, and f_hvs with a background
    bounds = np.asarray(like.bounds, dtype=float)
    priors = resolve_priors(names, bounds, cfg["priors"]["parameters"])
    return Problem(catalog=catalog, emulator=emulator, spec=spec, solar=solar, terms=terms, likelihood=like,
                   like_options=like_options, priors=priors, posterior=Posterior(like, priors), names=names,
                   bounds=bounds, notes=notes, star_hashes=star_hashes, reused=reused, seconds_terms=seconds_terms)


# ------------------------------------------------------------------------------- the posterior -----
def adjust(problem: Problem, cfg: dict, recorded=None):
    """The posterior to sample and the summary's record of its curvature adjustment.

    Without ``[likelihood] adjust``: (the plain posterior, None). With it: the curvature-adjusted
    posterior estimated at the maximum (:func:`swerve.adjustment.adjusted_posterior`), or, with
    ``recorded`` (a chain state's ``theta_hat``, ``C`` and, when recorded, ``kappa``), that one
    reused. The note it adds goes to ``problem.notes``.
    """
    if not cfg["likelihood"]["adjust"]:
        return problem.posterior, None
    plain, like, bounds = problem.posterior, problem.likelihood, problem.bounds
    if recorded is not None:
        theta_hat, C = np.asarray(recorded["theta_hat"], dtype=float), np.asarray(recorded["C"], dtype=float)
        post = Posterior(AdjustedLikelihood(like, theta_hat, C, *bounds.T), plain.priors)
        kappa, widened = recorded.get("kappa"), recorded.get("widened")
        problem.notes.append("likelihood: curvature adjustment of the chain being reweighted (kept while stars are added)")
    else:
        with threadpool_limits(limits=1, user_api="blas"):
            post, x_map, C, info = adjusted_posterior(plain, like, bounds,
                                                      np.random.default_rng(cfg["sampler"]["seed"]))
        theta_hat = plain.full(x_map)[0]
        kappa, widened = np.asarray(info["kappa"]).tolist(), bool(info["adjusted"])
        problem.notes.append("likelihood: curvature adjustment at the maximum; the score-to-curvature ratios of its "
                             "informative directions: " + ", ".join(f"{k:.2f}" for k in kappa))
    return post, {"theta_hat": dict(zip(problem.names, np.asarray(theta_hat, dtype=float).tolist())),
                  "C": np.asarray(C, dtype=float).tolist(), "kappa": kappa, "widened": widened,
                  "reused": recorded is not None}


def n_walkers(cfg: dict, ndim: int) -> int:
    """The ensemble size: ``[sampler] nwalkers``, or max(32, 4 x free parameters); even."""
    n = cfg["sampler"]["nwalkers"] or max(32, 4 * ndim)
    return n + n % 2


def uses_laplace(cfg: dict, n_stars: int) -> bool:
    """Whether ``[sampler] method`` asks for the Laplace approximation first."""
    s = cfg["sampler"]
    return s["method"] == "laplace-is" or (s["method"] == "auto" and n_stars >= s["laplace_min_stars"])


def draw(problem: Problem, post, adjustment, cfg: dict, *, chain=None, progress=False, start=None,
         on_chain=None):
    """Posterior samples (a :class:`swerve.sampling.SamplerResult`) by the configured method.

    ``[sampler] method``: the Laplace approximation checked by importance sampling
    (:mod:`swerve.laplace`) when configured, emcee started from its draws when its weights are
    unreliable; else emcee. ``chain``: the emcee HDF5 backend to write (and resume), or None
    (in memory). ``start``: walkers to start emcee from (e.g. a previous chain's last ones).
    ``on_chain(converged)`` is called before emcee runs (with False) and after (with its
    convergence): a run folder records what its chain belongs to.
    """
    s = cfg["sampler"]
    with threadpool_limits(limits=1, user_api="blas"):
        # BLAS on one thread while sampling: the emulator's matrices are small (threads only add
        # overhead, 5x measured) and the compiled likelihood kernel already uses every core
        if uses_laplace(cfg, problem.terms.n):
            res, start = _laplace(post, s, problem.names, adjustment, problem.notes, progress, start,
                                  n_walkers(cfg, post.ndim))
            if res is not None:
                return res
        if on_chain is not None:
            on_chain(False)
        res = _emcee(post, cfg, chain, progress, start)
        if on_chain is not None:
            on_chain(res.converged)
    return res


def _laplace(post, s, names, adjustment, notes, progress, previous_start, nw):
    """The posterior by swerve.laplace; (result, None) when its weights are reliable, else
    (None, starting walkers for emcee drawn from it)."""
    x0 = None
    if adjustment is not None:
        x0 = np.array([adjustment["theta_hat"][n] for n in post.free_names])
    lap = laplace_is(post, seed=s["seed"], x_map=x0, progress=progress)
    if lap.reliable:
        notes.append(f"posterior: Laplace approximation corrected by importance sampling (ESS {lap.ess:.0f} of "
                     f"{len(lap.samples)}, Pareto k {lap.pareto_k:.2f}); no chain")
        return lap.to_sampler_result(), None
    notes.append(f"posterior: the Laplace approximation was not reliable (Pareto k {lap.pareto_k:.2f}, "
                 f"ESS {lap.ess:.0f}); emcee was started from its draws")
    return None, lap.start_walkers(nw, np.random.default_rng(s["seed"]))


def _emcee(post, cfg, chain, progress, start):
    """emcee; ``start``: walkers (nwalkers, ndim) to start from, or None."""
    s = cfg["sampler"]
    walkers = x_map = None
    if start is not None:
        if start.shape[0] == n_walkers(cfg, post.ndim):
            walkers = start
        else:  # another ensemble size: start a ball at the previous ensemble's median
            x_map = np.median(start, axis=0)
    return sample_posterior(post, seed=s["seed"], nwalkers=s["nwalkers"] or None, max_steps=s["max_steps"],
                            check_every=s["check_every"], n_tau=s["n_tau"], tau_rtol=s["tau_rtol"],
                            backend_path=chain, progress=progress, x_map=x_map, walkers=walkers)


def method_of(res) -> str:
    """How the samples were made: sampled (emcee), laplace-is, or reweighted (a refit)."""
    if (res.importance or {}).get("method") == "laplace-is":
        return "laplace-is"
    return "reweighted" if res.weights is not None else "sampled"


def summarize(problem: Problem, res, adjustment, *, seconds_sampling=float("nan"), seconds_total=float("nan")) -> dict:
    """The fit's summary (``summary.json``'s document): per parameter its median, 68% and 95%
    central credible intervals and autocorrelation time; P(q < 1); the sampler's record; the
    stars used and excluded; notes and posterior sanity warnings
    (:func:`swerve.sampling.posterior_warnings`)."""
    summ = credible_summary(res.samples, res.names, res.weights)
    for j, n in enumerate(res.names):
        summ[n]["tau"] = float(res.tau[j])
    w = res.weights if res.weights is not None else np.full(len(res.samples), 1.0 / len(res.samples))
    probs = {f"P({q}<1)": float(np.sum(w * (res.samples[:, res.names.index(q)] < 1.0)))
             for q in ("q_z", "q_y") if q in res.names}
    terms = problem.terms
    summary = {
        "parameters": summ,
        "fixed": {p.name: p.value for p in problem.priors if p.kind == "fixed"},
        "probabilities": probs,
        "sampler": {"n_walkers": res.n_walkers, "n_steps": res.n_steps, "burn_in": res.burn_in, "thin": res.thin,
                    "acceptance": res.acceptance, "converged": res.converged, "resumed_from": res.resumed_from,
                    "n_samples": int(len(res.samples)), "method": method_of(res), "importance": res.importance},
        "stars": {"used": terms.n, "excluded": terms.excluded, "terms_reused": problem.reused},
        "likelihood": {"adjustment": adjustment},
        "timing_s": {"star_terms": round(problem.seconds_terms, 2), "sampling": round(seconds_sampling, 2),
                     "total": round(seconds_total, 2)},
        "notes": problem.notes,
    }
    summary["warnings"] = posterior_warnings(res.samples, res.names, problem.priors, weights=res.weights,
                                             kappa=(adjustment or {}).get("kappa"), n_stars=terms.n,
                                             catalog_meta=problem.catalog.meta, emulator_meta=problem.meta)
    return summary


# ------------------------------------------------------------------------------- in memory -----
@dataclass
class FitResult:
    """An in-memory fit: the summary document, the samples and the problem it fitted."""

    summary: dict
    result: object  # SamplerResult
    problem: Problem
    posterior: Posterior
    adjustment: dict | None
    seconds: float

    def interval(self, name: str, level: int = 95) -> tuple[float, float]:
        lo, hi = self.summary["parameters"][name][f"ci{level}"]
        return float(lo), float(hi)


def fit_catalog(catalog, emulator, cfg: dict | None = None, *, progress=False, log=None) -> FitResult:
    """Fit one catalog against an emulator in memory: :func:`prepare`, :func:`adjust`,
    :func:`draw`, :func:`summarize` with the fit configuration ``cfg`` (swerve fit's
    defaults when None). ``catalog``: a :class:`swerve.catalog.Catalog` or an astropy Table
    in catalog columns (e.g. from :func:`swerve.population.make_mock`)."""
    from .fit import load_fit_config  # noqa: PLC0415 - swerve.fit imports this module (its configuration lives there)

    t0 = time.perf_counter()
    cfg = cfg or load_fit_config(None)
    if not isinstance(catalog, Catalog):
        catalog = catalog_from_table(catalog, source="mock catalog")
    problem = prepare(catalog, emulator, cfg, log=log)
    post, adjustment = adjust(problem, cfg)
    t1 = time.perf_counter()
    res = draw(problem, post, adjustment, cfg, progress=progress)
    t2 = time.perf_counter()
    summary = summarize(problem, res, adjustment, seconds_sampling=t2 - t1, seconds_total=t2 - t0)
    return FitResult(summary, res, problem, post, adjustment, t2 - t0)
