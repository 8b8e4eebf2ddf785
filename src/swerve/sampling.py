"""Priors, the posterior, its maximum, and the emcee driver with convergence and resuming.

The sampler loop is emcee's ``EnsembleSampler.sample`` generator underneath; :func:`sample_posterior`
checks the integrated autocorrelation time every ``check_every`` steps and stops when the chain
is longer than ``n_tau`` autocorrelation times and τ has changed by less than ``tau_rtol``
since the last check (emcee docs; Foreman-Mackey et al. 2013, PASP 125, 306), or warns
(:class:`ConvergenceWarning`) when the step cap is hit first.  Chains go to emcee's HDF5 backend,
so an interrupted fit resumes from its file.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import emcee
import numpy as np
from scipy import optimize
from scipy.stats import gaussian_kde, genpareto
from tqdm import tqdm

from .fileio import did_you_mean

PRIOR_KINDS = ("uniform", "gaussian", "beta", "fixed")


class ConvergenceWarning(UserWarning):
    """The chain hit its step cap before the autocorrelation criterion was met."""


@dataclass(frozen=True)
class Prior:
    """Prior of one parameter: uniform on [low, high], Gaussian (mu, sigma) truncated to the
    emulator's domain, a Beta distribution (alpha, beta) stretched over [low, high] (default the
    domain; e.g. for the mixture's fraction ``f_hvs`` on [0, 1]), or fixed at ``value``."""

    name: str
    kind: str = "uniform"
    low: float | None = None
    high: float | None = None
    mu: float | None = None
    sigma: float | None = None
    value: float | None = None
    alpha: float | None = None
    beta: float | None = None

    def __post_init__(self):
        if self.kind not in PRIOR_KINDS:
            raise ValueError(f"prior of {self.name}: kind {self.kind!r} is not one of {', '.join(PRIOR_KINDS)}")
        if self.kind == "gaussian" and not (self.sigma is not None and self.sigma > 0 and self.mu is not None):
            raise ValueError(f"prior of {self.name}: a gaussian prior needs mu and a positive sigma")
        if self.kind == "beta" and not all(v is not None and np.isfinite(v) and v > 0 for v in (self.alpha, self.beta)):
            raise ValueError(f"prior of {self.name}: a beta prior needs positive alpha and beta")
        if self.kind == "fixed" and self.value is None:
            raise ValueError(f"prior of {self.name}: a fixed prior needs a value")

    def to_dict(self) -> dict:
        return {k: v for k, v in self.__dict__.items() if v is not None}


def resolve_priors(names, bounds, priors: dict | None = None) -> list[Prior]:
    """One prior per emulator parameter: uniform over the emulator domain unless ``priors`` says
    otherwise; a prior that leaves the domain is refused with a message naming the parameter."""
    priors = dict(priors or {})
    unknown = set(priors) - set(names)
    if unknown:
        key = sorted(unknown)[0]
        hint = did_you_mean(key, names) or f"; the emulator's parameters are {list(names)}"
        raise ValueError(f"prior for unknown parameter {key!r}{hint}")
    out = []
    for name, (lo, hi) in zip(names, np.asarray(bounds, dtype=float)):
        p = priors.get(name)
        if p is None:
            p = Prior(name, "uniform", float(lo), float(hi))
        elif isinstance(p, dict):
            p = Prior(name=name, **p)
        dom = f"the emulator's domain [{lo:g}, {hi:g}]"
        if p.kind == "uniform":
            low = lo if p.low is None else p.low
            high = hi if p.high is None else p.high
            if not (lo <= low < high <= hi):
                raise ValueError(f"prior of {name}: uniform [{low:g}, {high:g}] leaves {dom}")
            p = Prior(name, "uniform", float(low), float(high))
        elif p.kind == "gaussian":
            if not lo <= p.mu <= hi:
                raise ValueError(f"prior of {name}: gaussian mean {p.mu:g} lies outside {dom}")
            p = Prior(name, "gaussian", float(lo), float(hi), float(p.mu), float(p.sigma))
        elif p.kind == "beta":
            low = lo if p.low is None else p.low
            high = hi if p.high is None else p.high
            if not (lo <= low < high <= hi):
                raise ValueError(f"prior of {name}: beta on [{low:g}, {high:g}] leaves {dom}")
            p = Prior(name, "beta", float(low), float(high), alpha=float(p.alpha), beta=float(p.beta))
        else:
            if not lo <= p.value <= hi:
                raise ValueError(f"prior of {name}: fixed value {p.value:g} lies outside {dom}")
        out.append(p)
    return out


class Posterior:
    """log posterior over the free parameters, vectorised over walkers.

    Parameters
    ----------
    loglike : callable (W, d) -> (W,)
        Log-likelihood over all emulator parameters, in ``names`` order.
    priors : list of Prior, one per parameter (see :func:`resolve_priors`).
    """

    def __init__(self, loglike, priors):
        self.loglike = loglike
        self.priors = list(priors)
        self.names = [p.name for p in self.priors]
        self.free = [i for i, p in enumerate(self.priors) if p.kind != "fixed"]
        self.free_names = [self.names[i] for i in self.free]
        self.ndim = len(self.free)
        if self.ndim == 0:
            raise ValueError("priors: every parameter is fixed; nothing to fit")
        self._fixed = np.array([p.value if p.kind == "fixed" else np.nan for p in self.priors])
        self.low = np.array([self.priors[i].low for i in self.free])
        self.high = np.array([self.priors[i].high for i in self.free])

    def full(self, x) -> np.ndarray:
        """Free parameters (W, ndim) -> all emulator parameters (W, d)."""
        x = np.atleast_2d(x)
        th = np.broadcast_to(self._fixed, (x.shape[0], len(self.priors))).copy()
        th[:, self.free] = x
        return th

    def log_prior(self, x) -> np.ndarray:
        x = np.atleast_2d(x)
        lp = np.zeros(x.shape[0])
        inside = np.all((x >= self.low) & (x <= self.high), axis=1)
        for j, i in enumerate(self.free):
            p = self.priors[i]
            if p.kind == "gaussian":
                lp += -0.5 * ((x[:, j] - p.mu) / p.sigma) ** 2
            elif p.kind == "beta":  # unnormalised: (α - 1) log t + (β - 1) log(1 - t), t in [0, 1]
                t = np.clip((x[:, j] - p.low) / (p.high - p.low), 0.0, 1.0)
                with np.errstate(divide="ignore", invalid="ignore"):
                    lb = np.where(p.alpha != 1.0, (p.alpha - 1.0) * np.log(t), 0.0) + \
                        np.where(p.beta != 1.0, (p.beta - 1.0) * np.log1p(-t), 0.0)
                lp += np.where(np.isnan(lb), -np.inf, lb)
        return np.where(inside, lp, -np.inf)

    def __call__(self, x) -> np.ndarray:
        x = np.atleast_2d(np.asarray(x, dtype=float))
        lp = self.log_prior(x)
        out = np.full(x.shape[0], -np.inf)
        ok = np.isfinite(lp)
        if ok.any():
            ll = np.asarray(self.loglike(self.full(x[ok])), dtype=float)
            out[ok] = lp[ok] + np.where(np.isfinite(ll), ll, -np.inf)
        return out


def find_map(posterior: Posterior, rng: np.random.Generator, n_starts: int = 2) -> np.ndarray:
    """Maximum a posteriori point: L-BFGS-B (bounded to the prior support) from the best
    ``n_starts`` of a vectorised batch of 256 random points; returns the best optimum found.
    Gradients by forward differences, each evaluated as one batch of ndim + 1 points."""
    span = posterior.high - posterior.low
    starts = posterior.low + span * rng.uniform(0.05, 0.95, size=(256, posterior.ndim))
    lp = posterior(starts)
    order = np.argsort(-lp)[:n_starts]

    d = posterior.ndim
    h = 1e-7  # finite-difference step, in units of each parameter's prior range

    def f_and_grad(z):
        # the value and a one-sided difference in every direction, in one vectorised call
        # (d + 1 walkers at once instead of d + 1 calls; away from the bound at 1)
        step = np.where(z + h <= 1.0, h, -h)
        pts = np.vstack([z, z + np.diag(step)])
        v = posterior(posterior.low + span * pts)
        if not np.all(np.isfinite(v)):
            return (1e300 if not np.isfinite(v[0]) else -v[0]), np.zeros(d)
        return -v[0], -(v[1:] - v[0]) / step

    best_x, best_v = starts[order[0]], lp[order[0]]
    for j in order:
        res = optimize.minimize(f_and_grad, (starts[j] - posterior.low) / span, jac=True, method="L-BFGS-B",
                                bounds=[(0.0, 1.0)] * d, options={"maxiter": 500})
        if -res.fun > best_v:
            best_v, best_x = -res.fun, posterior.low + span * res.x
    return np.asarray(best_x, dtype=float)


@dataclass
class SamplerResult:
    """Outcome of :func:`sample_posterior`."""

    samples: np.ndarray  # (n_samples, ndim), burn-in discarded and thinned
    log_prob: np.ndarray  # (n_samples,)
    tau: np.ndarray  # (ndim,)
    acceptance: float
    n_steps: int
    n_walkers: int
    converged: bool
    burn_in: int
    thin: int
    x_map: np.ndarray
    names: list = field(default_factory=list)
    resumed_from: int = 0
    weights: np.ndarray | None = None  # normalised, for an importance-reweighted chain (else None)
    importance: dict | None = None  # its diagnostics: ess, pareto_k, stars added


def _buffered_backend(path, flush_every: int):
    """emcee's HDF5 backend, writing every ``flush_every`` steps instead of every step.

    emcee's backend opens and closes the file at each step (~10 ms here, as much as a
    likelihood call); this keeps steps in memory and writes them in blocks, and before every
    read. An interrupted fit loses at most ``flush_every`` steps; the file always holds whole
    steps with a consistent iteration count.
    """
    class BufferedHDFBackend(emcee.backends.HDFBackend):
        def __init__(self, *a, **kw):
            super().__init__(*a, **kw)
            self._buf = []

        def save_step(self, state, accepted):
            # (emcee's own _check would open the file at every step; the sampler's shapes are
            # fixed by reset/resume, checked once in sample_posterior)
            self._buf.append((np.array(state.coords), np.array(state.log_prob), np.array(accepted),
                              state.random_state))
            if len(self._buf) >= flush_every:
                self.flush()

        def flush(self):
            if not self._buf:
                return
            buf, self._buf = self._buf, []
            with super().open("a") as f:
                g = f[self.name]
                it = g.attrs["iteration"]
                n = len(buf)
                g["chain"][it:it + n] = np.stack([b[0] for b in buf])
                g["log_prob"][it:it + n] = np.stack([b[1] for b in buf])
                g["accepted"][:] += np.sum([b[2] for b in buf], axis=0)
                for i, v in enumerate(buf[-1][3]):
                    g.attrs[f"random_state_{i}"] = v
                g.attrs["iteration"] = it + n

        def open(self, mode="r"):
            if mode == "r" and getattr(self, "_buf", None):
                self.flush()
            return super().open(mode)

    return BufferedHDFBackend(str(path))


def _autocorr(sampler) -> np.ndarray:
    """emcee's integrated autocorrelation time, NaN (not a warning) for a parameter whose chain
    has not moved yet in some walker (emcee divides by its zero variance)."""
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.asarray(sampler.get_autocorr_time(tol=0), dtype=float)


def _initial_walkers(posterior, x0, nwalkers, rng):
    span = posterior.high - posterior.low
    p0 = x0 + 1e-3 * span * rng.standard_normal((nwalkers, posterior.ndim))
    p0 = np.clip(p0, posterior.low + 1e-6 * span, posterior.high - 1e-6 * span)
    lp = posterior(p0)
    for _ in range(20):  # re-draw any walker that landed outside the support
        bad = ~np.isfinite(lp)
        if not bad.any():
            break
        p0[bad] = x0 + 1e-4 * span * rng.standard_normal((int(bad.sum()), posterior.ndim))
        lp[bad] = posterior(p0[bad])
    if not np.all(np.isfinite(lp)):
        raise ValueError("sampler: could not place the walkers where the posterior is finite")
    return p0


def estimated_steps(tau, it: int, check_every: int, max_steps: int, n_tau: float) -> int | None:
    """The chain length :func:`sample_posterior` now expects to stop at, from the autocorrelation
    times ``tau`` measured at step ``it``: ``n_tau`` x max τ (the length the convergence rule
    asks for), rounded up to the next check (the chain stops only at a check) and at least the
    next check after ``it`` (τ must also be stable from one check to the next), at most
    ``max_steps``. None while some τ is not yet finite (no estimate)."""
    tau = np.asarray(tau, dtype=float)
    if not np.all(np.isfinite(tau)):
        return None
    need = math.ceil(n_tau * float(np.max(tau)))
    at_check = check_every * math.ceil(need / check_every)
    return int(min(max_steps, max(at_check, it + check_every)))


def _progress_bar(progress, max_steps: int, resumed: int, n_tau: float):
    """The sampler's bar (stderr), or None. ``progress``: True for tqdm's bar, or a tqdm-like
    class (called as tqdm is; the tests pass a subclass that records its totals). Its total
    starts at the step cap and follows :func:`estimated_steps` from the first check on."""
    if not progress:
        return None
    if progress is True:
        progress = tqdm
    return progress(total=max_steps, initial=resumed, unit="step", leave=False,
                    desc=f"emcee: steps (cap {max_steps}; to {n_tau:g} tau once tau is measured)")


def _update_estimate(bar, tau, it, check_every, max_steps, n_tau):
    est = estimated_steps(tau, it, check_every, max_steps, n_tau)
    if est is None:
        return
    bar.total = est
    what = "the step cap" if est == max_steps else f"{n_tau:g} x tau_max {float(np.max(tau)):.1f}"
    bar.set_description(f"emcee: steps (estimate {est}: {what})", refresh=False)
    bar.refresh()


def sample_posterior(posterior: Posterior, *, seed: int, nwalkers: int | None = None, max_steps: int = 20000,
                     check_every: int = 250, n_tau: float = 50.0, tau_rtol: float = 0.05,
                     backend_path=None, progress: bool = False, x_map=None, moves: str = "de",
                     walkers=None) -> SamplerResult:
    """Run emcee until converged (chain > ``n_tau`` τ and τ stable) or ``max_steps``.

    Parameters
    ----------
    seed : int
        Makes the run reproducible (walker start and emcee's moves).
    nwalkers : int, optional
        Default ``max(32, 4 ndim)``, even.
    backend_path : path, optional
        emcee HDF5 backend; an existing file with the same walkers and dimension is resumed.
    x_map : array, optional
        Start point (default: :func:`find_map`).
    walkers : array (nwalkers, ndim), optional
        A whole starting ensemble, e.g. the final walkers of a previous fit of nearly the same
        posterior (a refit after a star is added): already spread over the posterior, so no
        maximisation and no re-expansion from a small ball. Walkers where this posterior is not
        finite are re-drawn near the ensemble's median.
    moves : {"de", "stretch"}
        emcee proposal: ``"de"`` 80% differential-evolution moves (DEMove; ter Braak 2006) and
        20% emcee's affine-invariant stretch move (Goodman & Weare 2010): autocorrelation times
        26 instead of 70 steps on the demo fit. (DESnookerMove was dropped: it divides by the
        distance between walkers and proposed NaN on a very narrow posterior.) ``"stretch"``:
        the stretch move alone, emcee's default.
    progress : bool or tqdm-like class
        A bar over the steps (stderr) whose total is the run's expected length, not the step
        cap: from the first autocorrelation check on, ``n_tau`` x the largest τ rounded up to the
        next check (:func:`estimated_steps`), so its remaining-time estimate follows
        convergence; at the end the total is the steps run. A class (a tqdm subclass) is
        called instead of tqdm.
    """
    rng = np.random.default_rng(seed)
    ndim = posterior.ndim
    nwalkers = int(nwalkers or max(32, 4 * ndim))
    nwalkers += nwalkers % 2
    if nwalkers < 2 * ndim:
        raise ValueError(f"nwalkers: expected at least 2 x {ndim} = {2 * ndim} walkers, got {nwalkers}")
    backend = None
    resumed = 0
    if backend_path is not None:
        backend = _buffered_backend(backend_path, flush_every=max(1, min(check_every, 100)))
        try:
            it = backend.iteration
        except (OSError, KeyError, AttributeError):
            it = 0
        if it > 0:
            shape = backend.shape
            if tuple(shape) != (nwalkers, ndim):
                raise ValueError(
                    f"{backend_path}: holds a chain of {shape[0]} walkers x {shape[1]} parameters, "
                    f"this fit needs {nwalkers} x {ndim}; use a new --out folder"
                )
            resumed = it
        else:
            backend.reset(nwalkers, ndim)
    if walkers is not None:
        walkers = np.array(walkers, dtype=float)
        if walkers.shape != (nwalkers, ndim):
            raise ValueError(f"walkers: expected shape ({nwalkers}, {ndim}), got {walkers.shape}")
        x_map = np.median(walkers, axis=0) if x_map is None else x_map
    if x_map is None:
        x_map = find_map(posterior, rng)
    if moves == "de":
        move_list = [(emcee.moves.DEMove(), 0.8), (emcee.moves.StretchMove(), 0.2)]
    elif moves == "stretch":
        move_list = None
    else:
        raise ValueError(f"moves: expected 'de' or 'stretch', got {moves!r}")
    sampler = emcee.EnsembleSampler(nwalkers, ndim, posterior, vectorize=True, backend=backend, moves=move_list)
    sampler.random_state = np.random.RandomState(int(rng.integers(2**31))).get_state()
    if resumed:
        start = backend.get_last_sample()
    elif walkers is not None:
        start = walkers
        lp = posterior(start)
        bad = ~np.isfinite(lp)
        if bad.any():
            start[bad] = _initial_walkers(posterior, x_map, int(bad.sum()), rng)
    else:
        start = _initial_walkers(posterior, x_map, nwalkers, rng)
    old_tau = np.full(ndim, np.inf)
    converged = False
    tau = np.full(ndim, np.nan)
    steps_left = max(0, max_steps - resumed)
    it = resumed
    bar = _progress_bar(progress, max_steps, resumed, n_tau)
    try:
        for _ in sampler.sample(start, iterations=steps_left, progress=False):
            it += 1  # counted here: sampler.iteration would read (and flush) the backend every step
            if bar is not None:
                bar.update(1)
            if it % check_every:
                continue
            tau = _autocorr(sampler)
            if np.all(np.isfinite(tau)) and np.all(n_tau * tau < it) and np.all(np.abs(old_tau - tau) < tau_rtol * tau):
                converged = True
                break
            old_tau = tau
            if bar is not None:
                _update_estimate(bar, tau, it, check_every, max_steps, n_tau)
        if bar is not None:  # the steps run: the bar ends full, whether converged or at the cap
            bar.total = it
            bar.refresh()
    finally:
        if bar is not None:
            bar.close()
    if backend is not None:
        backend.flush()
    n_steps = sampler.iteration
    tau = _autocorr(sampler)
    if not converged:
        warnings.warn(
            f"sampler: stopped at the step cap ({n_steps} steps) before the chain was {n_tau:g} "
            f"autocorrelation times long with a stable estimate (tau = {np.round(tau, 1).tolist()}); "
            f"the intervals may be unreliable: raise max_steps",
            ConvergenceWarning, stacklevel=2,
        )
    burn, thin = burn_and_thin(tau, n_steps)
    flat = sampler.get_chain(discard=burn, thin=thin, flat=True)
    lp = sampler.get_log_prob(discard=burn, thin=thin, flat=True)
    return SamplerResult(
        samples=flat, log_prob=lp, tau=np.asarray(tau), acceptance=float(np.mean(sampler.acceptance_fraction)),
        n_steps=int(n_steps), n_walkers=nwalkers, converged=converged, burn_in=burn, thin=thin,
        x_map=np.asarray(x_map), names=list(posterior.free_names), resumed_from=resumed,
    )


def weighted_percentile(x, weights, q) -> np.ndarray:
    """Percentiles ``q`` (0-100) of ``x`` under normalised ``weights``: the weighted empirical
    distribution function, each sample at the middle of its own mass, interpolated linearly."""
    order = np.argsort(x)
    xs, w = np.asarray(x, dtype=float)[order], np.asarray(weights, dtype=float)[order]
    cdf = (np.cumsum(w) - 0.5 * w) / np.sum(w)
    return np.interp(np.asarray(q, dtype=float) / 100.0, cdf, xs)


def burn_and_thin(tau, n_steps: int) -> tuple[int, int]:
    """Burn-in (2 τ_max, at most half the chain) and thinning (τ_max / 2) of a chain of
    ``n_steps`` with autocorrelation times ``tau`` (τ_max = n_steps / 10 if none is finite)."""
    tau = np.asarray(tau, dtype=float)
    tmax = float(np.nanmax(tau)) if np.any(np.isfinite(tau)) else n_steps / 10
    return int(min(n_steps // 2, math.ceil(2 * tmax))), max(1, int(tmax // 2))


def credible_summary(samples: np.ndarray, names, weights=None) -> dict:
    """Median, 68% and 95% central credible intervals of each parameter (of the weighted
    samples, when ``weights`` are given: an importance-reweighted chain)."""
    out = {}
    for j, name in enumerate(names):
        x = samples[:, j]
        if weights is None:
            q = np.percentile(x, [2.5, 16, 50, 84, 97.5])
            mean, std = np.mean(x), np.std(x)
        else:
            q = weighted_percentile(x, weights, [2.5, 16, 50, 84, 97.5])
            mean = np.sum(weights * x) / np.sum(weights)
            std = np.sqrt(np.sum(weights * (x - mean) ** 2) / np.sum(weights))
        out[name] = {"median": float(q[2]), "ci68": [float(q[1]), float(q[3])], "ci95": [float(q[0]), float(q[4])],
                     "mean": float(mean), "std": float(std)}
    return out


# ----------------------------------------------------------------- importance reweighting ----
#: reweighting is trusted when the Pareto shape of the weights' upper tail is below this
#: (Vehtari, Simpson, Gelman, Yao & Gabry 2024, JMLR 25, 72: above 0.7 the estimate is unreliable
#: for any practical sample size) ...
MAX_PARETO_K = 0.7
#: ... and the weights keep at least this fraction of the samples' effective number
MIN_ESS_FRACTION = 0.5


@dataclass
class ImportanceWeights:
    """Normalised importance weights of a set of samples with their diagnostics."""

    weights: np.ndarray  # (n,), sum 1
    ess: float  # Kish's effective sample size, 1 / sum w²
    pareto_k: float  # shape of a generalised Pareto fitted to the largest weights
    n: int

    @property
    def reliable(self) -> bool:
        return bool(self.pareto_k < MAX_PARETO_K and self.ess >= MIN_ESS_FRACTION * self.n)


def pareto_k(log_w) -> float:
    """Shape k of the generalised Pareto distribution fitted (maximum likelihood, scipy) to the
    M = min(n/5, 3 √n) largest importance weights above the next largest, the tail diagnostic of
    Pareto-smoothed importance sampling (Vehtari et al. 2024; their estimator is Zhang &
    Stephens' Bayesian one, this is the plain MLE). k < 0.5: the weights have a finite variance;
    k > 0.7: too heavy-tailed to trust. NaN with fewer than 5 tail samples."""
    lw = np.asarray(log_w, dtype=float)
    lw = lw[np.isfinite(lw)]
    n = lw.size
    m = int(np.ceil(min(0.2 * n, 3.0 * np.sqrt(n))))
    if m < 5:
        return float("nan")
    w = np.sort(np.exp(lw - lw.max()))
    tail, cut = w[-m:], w[-m - 1]
    exceed = tail - cut
    if not np.any(exceed > 0):
        return -np.inf  # all tail weights equal: no tail at all
    k, _, _ = genpareto.fit(exceed / np.max(exceed), floc=0.0)
    return float(k)


def importance_weights(log_w) -> ImportanceWeights:
    """Normalised weights, effective sample size and Pareto k of log importance ratios."""
    lw = np.asarray(log_w, dtype=float)
    finite = np.isfinite(lw)
    if not finite.any():
        return ImportanceWeights(np.full(lw.size, 1.0 / max(lw.size, 1)), 0.0, float("inf"), lw.size)
    w = np.where(finite, np.exp(np.where(finite, lw, -np.inf) - np.max(lw[finite])), 0.0)
    w /= w.sum()
    return ImportanceWeights(w, float(1.0 / np.sum(w * w)), pareto_k(lw), lw.size)


# ------------------------------------------------------------------ posterior sanity warnings ----
#: catalog size (stars) at which the fit's calibration was shown: the 68% and 95% intervals of every
#: parameter cover the truth at their nominal rates on 100-star catalogs with the default emulator;
#: at 300 and 1000 stars the masses' intervals are too narrow (benchmarks/RESULTS.md, "Calibration by catalog size")
CALIBRATED_STARS = 100
#: a bound is "piled against" when more than this share of the posterior lies within ...
BOUND_MASS = 0.2
#: ... this fraction of the prior's range from it (a flat posterior puts 2% there)
BOUND_BAND = 0.02
#: score-to-curvature ratios (swerve.adjustment's kappa) above this are reported: the per-star scores
#: vary that much more than the curvature says (clean 100-star mocks give about 0.9-2 for the
#: disk mass, benchmarks/RESULTS.md). Small ratios are not reported: near a physical bound (the
#: hypervelocity fraction at 1) the curvature fitted over a box is not the score's scale, and the
#: adjustment never narrows
KAPPA_EXTREME = 4.0
#: velocity cuts of a selection: where a catalog's differ from the emulator's, the velocity density
#: the emulator learnt is not the catalog's (spatial cuts do not matter: the likelihood conditions on
#: each star's position)
VELOCITY_CUTS = ("outgoing", "v_min", "unbound")


def _modes(x, w=None, min_mass: float = 0.1, max_dip: float = 0.5) -> int:
    """Separated modes of a 1-D sample: local maxima of a Gaussian kernel density estimate (scipy,
    Scott's bandwidth) split at the lowest point between neighbours, counted when each side holds
    at least ``min_mass`` of the sample and the dip falls below ``max_dip`` of the lower peak."""
    x = np.asarray(x, dtype=float)
    if x.size < 20 or np.ptp(x) == 0:
        return 1
    kde = gaussian_kde(x, weights=w)
    grid = np.linspace(x.min(), x.max(), 256)
    d = kde(grid)
    peaks = [i for i in range(1, len(d) - 1) if d[i] >= d[i - 1] and d[i] > d[i + 1]]
    if len(peaks) < 2:
        return 1
    cdf = np.cumsum(d) / np.sum(d)
    n = 1
    keep = peaks[0]
    for p in peaks[1:]:
        lo = keep + int(np.argmin(d[keep:p + 1]))
        dip_ok = d[lo] < max_dip * min(d[keep], d[p])
        if dip_ok and cdf[lo] >= min_mass * n and 1.0 - cdf[lo] >= min_mass:
            n += 1
            keep = p
        elif d[p] > d[keep]:
            keep = p
    return n


def posterior_warnings(samples, names, priors, *, weights=None, kappa=None, kappa_names=None, n_stars=None,
                       catalog_meta=None, emulator_meta=None, skip_bounds=("f_hvs",)) -> list[str]:
    """Plain-language warnings about a posterior and its inputs (an empty list when all is well).

    Checks: mass piled against a prior bound (more than :data:`BOUND_MASS` of the posterior
    within :data:`BOUND_BAND` of a bound's range; the emulator's bounds are those of its training,
    so the data want values it never saw; ``skip_bounds`` are physical bounds, like the
    hypervelocity fraction's [0, 1], not reported); several separated modes in a parameter's
    marginal (:func:`_modes`); extreme score-to-curvature ratios ``kappa`` of the curvature
    adjustment (above :data:`KAPPA_EXTREME`); a catalog larger than
    :data:`CALIBRATED_STARS`; and a catalog whose metadata (a mock's: ``galaxy``, ``launch``,
    ``flight_time_max``, ``selection``) names another Galaxy, launch model or velocity selection
    than the emulator's metadata (``galaxy.base``, ``launch``, ``selection``).

    Parameters
    ----------
    samples : array (n, d)
        Posterior samples of the free parameters ``names``.
    priors : list of Prior
        All parameters' priors (:func:`resolve_priors`); only those of ``names`` are used.
    weights : array (n,), optional
    kappa : sequence of float, optional
        The adjustment's ratios (swerve.adjustment.curvature_adjustment's ``info["kappa"]``).
    n_stars : int, optional
    catalog_meta, emulator_meta : dict, optional
    """
    out = []
    samples = np.atleast_2d(np.asarray(samples, dtype=float))
    by_name = {p.name: p for p in priors}
    w = None if weights is None else np.asarray(weights, dtype=float) / np.sum(weights)
    for j, name in enumerate(names):
        p = by_name.get(name)
        x = samples[:, j]
        if p is not None and p.kind != "fixed" and name not in skip_bounds and p.low is not None:
            band = BOUND_BAND * (p.high - p.low)
            for side, near in (("lower", x <= p.low + band), ("upper", x >= p.high - band)):
                mass = float(np.mean(near) if w is None else np.sum(w[near]))
                if mass > BOUND_MASS:
                    bound = p.low if side == "lower" else p.high
                    out.append(f"{name}: {100 * mass:.0f}% of the posterior lies within {100 * BOUND_BAND:g}% of the "
                               f"prior's range from its {side} bound {bound:g} (the emulator's training range): the "
                               "data want values outside it, or the model does not describe them (contaminants, "
                               "units, another Galaxy or selection); the intervals are not to be trusted")
        m = _modes(x, w)
        if m > 1:
            out.append(f"{name}: the posterior has {m} separated modes; a median and interval summarise it badly "
                       "(see corner.png)")
    if kappa is not None and len(kappa):
        k = np.asarray(kappa, dtype=float)
        bad = k[k > KAPPA_EXTREME]
        if bad.size:
            out.append(f"likelihood: score-to-curvature ratio(s) {', '.join(f'{v:.2f}' for v in bad)} (of the curvature "
                       f"adjustment) above {KAPPA_EXTREME:g}: the stars' scores scatter far more than the model "
                       "expects; look for contaminants (a background population: [likelihood] background) or "
                       "underestimated errors")
    if n_stars is not None and n_stars > CALIBRATED_STARS:
        out.append(f"catalog: {n_stars} stars; the fit's calibration was shown for catalogs of {CALIBRATED_STARS} "
                   "stars (at 300 and 1000 stars the masses' 95% intervals covered the truth in 84-88% of 64 catalogs, "
                   "their 68% intervals in 52-56% at 1000; benchmarks/RESULTS.md): with more "
                   "stars the emulator's and the model's own errors weigh more against the shrinking statistical "
                   "error, and the intervals may be too narrow")
    out.extend(_meta_mismatches(catalog_meta, emulator_meta, set(by_name)))
    return out


def _close(a, b) -> bool:
    if isinstance(a, bool) or isinstance(b, bool) or a is None or b is None:
        return a == b
    try:
        return math.isclose(float(a), float(b), rel_tol=1e-6, abs_tol=1e-12)
    except (TypeError, ValueError):
        return a == b


def _meta_mismatches(cat, emu, free=()) -> list[str]:
    """What a catalog's metadata (a swerve mock's) states differently from the emulator's, apart
    from the parameters ``free`` (the emulator's inputs, which the fit infers)."""
    if not isinstance(cat, dict) or not isinstance(emu, dict):
        return []
    out = []
    free = set(free)
    cg = cat.get("galaxy")
    eg = (emu.get("galaxy") or {}).get("base")
    if isinstance(cg, dict) and isinstance(eg, dict):
        diffs = []
        if cg.get("halo_flattening") != eg.get("halo_flattening"):
            diffs.append(f"halo flattened in the {cg.get('halo_flattening')} (emulator: {eg.get('halo_flattening')})")
        ck = [c.get("kind") for c in cg.get("components", [])]
        ek = [c.get("kind") for c in eg.get("components", [])]
        if ck != ek:
            diffs.append(f"components {ck} (emulator: {ek})")
        else:
            for cc, ec in zip(cg.get("components", []), eg.get("components", [])):
                for k, v in (ec.get("params") or {}).items():
                    cv = (cc.get("params") or {}).get(k)
                    if k not in free and not _close(cv, v):
                        diffs.append(f"{k} = {cv} (emulator: {v})")
        if diffs:
            out.append("catalog: its metadata names another Galaxy than the emulator's: " + "; ".join(diffs))
    cl, el = cat.get("launch"), emu.get("launch")
    if isinstance(cl, dict) and isinstance(el, dict):
        diffs = []
        # the training configuration's name of a launch family -> the launch model's own (swerve.simulate)
        family = {"power-law": "bounded_power_law_speed"}.get(el.get("model"), el.get("model"))
        if cl.get("model") != family:
            diffs.append(f"model {cl.get('model')!r} (emulator: {el.get('model')!r})")
        for k, v in (el.get("fixed") or {}).items():
            if not _close(cl.get(k), v):
                diffs.append(f"{k} = {cl.get(k)} (emulator: {v})")
        cf, ef = cat.get("flight_time_max"), el.get("flight_time_max")
        if cf is not None and ef is not None and not _close(cf, ef):
            diffs.append(f"flight times up to {cf} Myr (emulator: {ef})")
        if diffs:
            out.append("catalog: its metadata names another launch model than the emulator's: " + "; ".join(diffs))
    cs, es = cat.get("selection"), emu.get("selection")
    if isinstance(cs, dict) and isinstance(es, dict):
        diffs = [f"{k} = {cs.get(k)} (emulator: {es.get(k)})" for k in VELOCITY_CUTS
                 if k in cs and not _close(cs.get(k), es.get(k))]
        if diffs:
            out.append("catalog: its metadata names another velocity selection than the emulator's: " + "; ".join(diffs)
                       + "; the emulated velocity distribution is not the catalog's")
    return out
