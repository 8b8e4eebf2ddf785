"""A fast posterior for large catalogs: a Laplace approximation at the maximum, checked and
corrected by importance sampling.

With many stars the posterior is nearly Gaussian, and an ensemble sampler spends thousands of
likelihood evaluations per walker to say so: the cost of a fit is then (number of posterior
evaluations) x (cost per star). This path needs a few thousand evaluations in all:

1. a start at the maximum ``x_map`` (:func:`swerve.sampling.find_map`, or the caller's, e.g. the
   one the curvature adjustment found);
2. centre and curvature from quadratics fitted by least squares to the log posterior at points
   spread like the posterior itself (:func:`laplace_covariance`: a few rounds, each on the scale
   of the last round's covariance, each moving the centre by a Newton step to the fitted maximum),
   in the unit-cube coordinates the priors use (each free parameter over its prior range): a fit
   on that scale is not thrown by the emulated surface's small wiggles, which a finite difference
   on a tiny step would follow, nor held by a shoulder where a maximiser stopped;
3. ``n_draws`` draws from a multivariate Student-t proposal (``df`` degrees of freedom: heavier
   tails than the posterior, so the importance weights stay bounded) centred there with that
   covariance; the exact log posterior at every draw, in vectorised batches;
4. importance weights ``p / q`` (the first proposal ``DEFAULT_INFLATE`` times wider than the
   approximation; each later one, while the weights are unreliable, from the weighted mean and
   covariance of the draws so far, every draw weighted against the mixture of all proposals),
   judged by the Pareto shape ``k`` of their upper tail and their
   effective sample size (:func:`swerve.sampling.importance_weights`; Vehtari, Simpson, Gelman,
   Yao & Gabry 2024, JMLR 25, 72: below k = 0.7 the weighted estimates are reliable). The
   adaptation is population Monte Carlo (Cappé, Guillin, Marin & Robert 2004, J. Comput. Graph.
   Stat. 13, 907; from memory).

Reliable weights: the weighted draws are the posterior (:meth:`LaplaceResult.to_sampler_result`
gives what :func:`swerve.sampling.sample_posterior` returns, with its ``weights``). Unreliable:
the result says so, and :meth:`LaplaceResult.start_walkers` gives an ensemble already spread over
the posterior for emcee to continue from (no burn-in from a small ball).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.special import gammaln

#: degrees of freedom of the Student-t proposal: on a Gaussian posterior in 5-9 dimensions the
#: effective sample size stays near 0.87-0.92 of the draws, while tails as heavy as a t_10's keep
#: the weights bounded where the posterior's tails are a little wider than a Gaussian's
DEFAULT_DF = 10.0
#: draws from each proposal
DEFAULT_DRAWS = 4000
#: the first proposal is this much wider than the Laplace approximation: on a Gaussian in 3, 5
#: and 7 dimensions it still keeps 0.56, 0.42 and 0.34 of the draws' effective size, and where the maximum sits on a
#: shoulder or the posterior is skewed (measured on a 5000-star mock, benchmarks/RESULTS.md) its
#: draws reach the rest of the mass, so the next, moment-matched proposal is a good one
DEFAULT_INFLATE = 1.5
#: an importance-sampled posterior needs at least this effective sample size (an emcee fit of
#: 32 walkers x 3000 steps with τ ~ 30 steps has ~ 3000 independent samples; 1000 gives the 2.5%
#: and 97.5% percentiles to ~ 0.1 σ) ...
MIN_ESS = 1000.0
#: ... and weights with a Pareto tail shape below this (Vehtari et al. 2024)
MAX_K = 0.7
#: a direction with no measurable curvature gets this standard deviation (unit cube): the proposal
#: then spans the prior there, and the weights judge the result
MAX_SD = 0.5


@dataclass
class LaplaceResult:
    """Importance-sampled posterior around the Laplace approximation (:func:`laplace_is`).

    Attributes
    ----------
    samples : array (rounds x n_draws, ndim)
        Draws from the proposals, natural units of the free parameters.
    log_prob : array (n_draws,)
        The exact log posterior at each draw (-inf outside the prior's support).
    weights : array (n_draws,)
        Normalised importance weights (sum 1).
    ess : float
        Kish's effective sample size of the weights.
    pareto_k : float
        Pareto shape of the weights' upper tail.
    reliable : bool
        ``pareto_k < max_k`` and ``ess >= min_ess``: the weighted draws can stand for the posterior.
    x_map : array (ndim,)
        The maximum the approximation is built at, natural units.
    mean, cov : arrays (ndim,), (ndim, ndim)
        The last proposal's centre and scale matrix (for a Student-t, the covariance is
        ``df / (df - 2)`` times it), natural units.
    names : list of str
    n_evaluations : int
        Posterior evaluations spent (curvature fits and draws; not the maximisation).
    rounds : int
        Proposals tried (1: the Laplace approximation was enough).
    history : list of dict
        Per round: ``ess`` and ``pareto_k`` of all draws so far, ``n_draws`` so far,
        ``n_outside`` (this round's draws outside the prior's support).
    """

    samples: np.ndarray
    log_prob: np.ndarray
    weights: np.ndarray
    ess: float
    pareto_k: float
    reliable: bool
    x_map: np.ndarray
    mean: np.ndarray
    cov: np.ndarray
    names: list
    n_evaluations: int
    rounds: int
    df: float
    history: list = field(default_factory=list)

    def diagnostics(self) -> dict:
        """Plain data for a summary: method, effective sample size, Pareto k, verdict."""
        return {"method": "laplace-is", "ess": float(self.ess), "pareto_k": float(self.pareto_k),
                "n_samples": int(len(self.samples)), "reliable": bool(self.reliable), "rounds": int(self.rounds),
                "n_evaluations": int(self.n_evaluations), "df": float(self.df),
                "history": [dict(h) for h in self.history]}

    def to_sampler_result(self):
        """The weighted draws as a :class:`swerve.sampling.SamplerResult` (``weights`` set;
        ``tau`` NaN: there is no chain; ``converged`` is :attr:`reliable`)."""
        from .sampling import SamplerResult

        nd = self.samples.shape[1]
        return SamplerResult(samples=self.samples, log_prob=self.log_prob, tau=np.full(nd, np.nan),
                             acceptance=float("nan"), n_steps=0, n_walkers=0, converged=bool(self.reliable),
                             burn_in=0, thin=1, x_map=np.asarray(self.x_map), names=list(self.names),
                             weights=self.weights, importance=self.diagnostics())

    def resample(self, n: int, rng: np.random.Generator) -> np.ndarray:
        """``n`` equally weighted draws (n, ndim) by systematic resampling of the weighted ones,
        for a caller that takes no weights."""
        n = int(n)
        if n < 1:
            raise ValueError(f"resample: expected a positive number of draws, got {n}")
        cdf = np.cumsum(self.weights)
        cdf /= cdf[-1]
        u = (rng.uniform() + np.arange(n)) / n
        return self.samples[np.minimum(np.searchsorted(cdf, u), len(cdf) - 1)]

    def start_walkers(self, nwalkers: int, rng: np.random.Generator) -> np.ndarray:
        """A starting ensemble (nwalkers, ndim) for emcee, spread over the posterior: distinct
        draws picked with probability proportional to their weights, or, where fewer than
        ``nwalkers`` draws carry weight, the finite draws nearest the top of the posterior."""
        nz = np.flatnonzero(self.weights > 0)
        if len(nz) >= nwalkers:
            idx = rng.choice(len(self.weights), size=nwalkers, replace=False, p=self.weights)
        else:
            finite = np.flatnonzero(np.isfinite(self.log_prob))
            if len(finite) < nwalkers:
                raise ValueError(f"start_walkers: only {len(finite)} draws lie where the posterior is finite, "
                                 f"{nwalkers} walkers wanted")
            idx = finite[np.argsort(-self.log_prob[finite])[:nwalkers]]
        return np.array(self.samples[idx], dtype=float)


# ---------------------------------------------------------------------------- curvature ----
def _quadratic(U, v, c):
    """Gradient (d,) and Hessian (d, d) at ``c`` of the quadratic fitted by least squares to
    values ``v`` at points ``U`` (n, d)."""
    d = U.shape[1]
    X = U - c
    iu = np.triu_indices(d)
    A = np.column_stack([np.ones(len(X)), X, X[:, iu[0]] * X[:, iu[1]]])
    coef = np.linalg.lstsq(A, v, rcond=None)[0]
    Q = np.zeros((d, d))
    Q[iu] = coef[1 + d:]
    return coef[1:1 + d], Q + Q.T  # the Hessian of x^T Q x with Q upper-triangular is Q + Q^T


def _floored_cov(H, max_sd: float):
    """Covariance ``(-H)^-1`` with every eigenvalue of ``-H`` raised to at least ``1 / max_sd²``
    (a flat or upward-curved direction gets standard deviation ``max_sd``); and the number raised."""
    P = -0.5 * (H + H.T)
    w, V = np.linalg.eigh(P)
    floor = 1.0 / max_sd**2
    n_flat = int(np.sum(~(w > floor)))
    w = np.where(w > floor, w, floor)
    return (V / w) @ V.T, n_flat


def laplace_covariance(posterior, x_map, *, rng: np.random.Generator, rounds: int = 8, n_fit: int | None = None,
                       initial_sd: float = 0.05, max_sd: float = MAX_SD, rtol: float = 0.1, max_step: float = 3.0,
                       grow: float = 3.0):
    """Centre and covariance of the Laplace approximation near ``x_map``, from quadratic fits of
    the log posterior (unit-cube coordinates of the free parameters' prior ranges).

    Round 0 fits points drawn from a Gaussian of standard deviation ``initial_sd`` (of each
    range) around ``x_map``; every later round draws them from the last round's Gaussian (where
    the posterior's mass is, so the fit sees the posterior's curvature on its own scale). After
    every fit the centre takes a Newton step to the fitted quadratic's maximum (at most
    ``max_step`` standard deviations, inside the unit cube): the maximum of the posterior
    smoothed on its own scale. A maximiser on a tiny step can stop on a wiggle or shoulder of
    the emulated surface, a few units of log posterior below the top; these fits walk past it.
    Rounds stop when the step is below ``rtol`` standard deviations and the standard deviations
    and correlations change by less than ``rtol``.

    Parameters
    ----------
    posterior : swerve.sampling.Posterior
        Or any callable (W, ndim) -> (W,) with ``low``, ``high`` and ``ndim``.
    x_map : array (ndim,)
        Start: the maximum (or any point near the top), natural units.
    rng : numpy.random.Generator
    n_fit : int, optional
        Points per fit (default ``max(48, 3 x`` the quadratic's coefficients``)``).

    Returns
    -------
    centre : array (ndim,)
        Unit-cube centre.
    cov : array (ndim, ndim)
        Unit-cube covariance.
    info : dict
        ``rounds`` (fits made), ``n_evaluations``, ``n_flat`` (directions floored to ``max_sd``),
        ``converged``, ``step`` (the last Newton step, standard deviations), ``trace`` (per
        round: log posterior at the centre, centre and standard deviations in natural units,
        directions floored).
    """
    from scipy.linalg import solve_triangular

    low, high = np.asarray(posterior.low, dtype=float), np.asarray(posterior.high, dtype=float)
    span = high - low
    d = len(low)
    c = np.clip((np.asarray(x_map, dtype=float) - low) / span, 0.0, 1.0)
    n_coef = 1 + d + d * (d + 1) // 2
    n_fit = int(n_fit or max(48, 3 * n_coef))
    cov = np.eye(d) * initial_sd**2
    n_eval, n_flat, converged, done, step_sd = 0, 0, False, 0, float("nan")
    trace = []
    for r in range(rounds):
        L = np.linalg.cholesky(cov)
        U = c + rng.standard_normal((n_fit, d)) @ L.T
        v = np.asarray(posterior(low + span * U), dtype=float)
        n_eval += n_fit
        ok = np.isfinite(v)
        done = r + 1
        if ok.sum() < n_coef + d:  # most points outside the support: shrink and try again
            cov = cov / 4.0
            continue
        g, H = _quadratic(U[ok], v[ok], c)
        new, n_flat = _floored_cov(H, max_sd)
        # a trust region for the scale too: each round's standard deviations at most ``grow``
        # times (and at least 1 / grow² times) the last round's, in every direction, so that one
        # fit over a plateau or a shoulder does not throw the next round's points over the prior
        Li = solve_triangular(L, np.eye(d), lower=True)
        ew, EV = np.linalg.eigh(Li @ new @ Li.T)
        ew = np.clip(ew, grow**-4, grow**2)
        new = L @ ((EV * ew) @ EV.T) @ L.T
        new = 0.5 * (new + new.T)
        # Newton step to the fitted quadratic's maximum, at most max_step standard deviations of
        # this round's points, kept only where the posterior rises (halved up to 4 times)
        step = new @ g
        step_sd = float(np.linalg.norm(solve_triangular(L, step, lower=True)))
        if step_sd > max_step:
            step = step * (max_step / step_sd)
        here = float(posterior(low + span * c[None])[0])
        n_eval += 1
        for _ in range(5):
            cand = np.clip(c + step, 0.0, 1.0)
            there = float(posterior(low + span * cand[None])[0])
            n_eval += 1
            if np.isfinite(there) and there >= here - 0.5:
                c, here = cand, there
                break
            step = step / 2.0
        else:
            step = np.zeros(d)
        trace.append({"log_post": here, "centre": (low + span * c).tolist(),
                      "sd": (span * np.sqrt(np.diag(new))).tolist(), "n_flat": n_flat})
        step_sd = float(np.linalg.norm(solve_triangular(np.linalg.cholesky(new), step, lower=True)))
        sd_old, sd_new = np.sqrt(np.diag(cov)), np.sqrt(np.diag(new))
        change = max(np.max(np.abs(np.log(sd_new / sd_old))),
                     np.max(np.abs(new / np.outer(sd_new, sd_new) - cov / np.outer(sd_old, sd_old))))
        cov = new
        if r > 0 and change < rtol and step_sd < rtol:
            converged = True
            break
    return c, cov, {"rounds": done, "n_evaluations": n_eval, "n_flat": n_flat, "converged": converged,
                    "step": step_sd, "trace": trace}


# ------------------------------------------------------------------------ the proposal -----
def _t_draws(rng, mean, L, df, n):
    d = len(mean)
    z = rng.standard_normal((n, d))
    g = rng.chisquare(df, size=n) / df
    return mean + (z / np.sqrt(g)[:, None]) @ L.T


def _t_logpdf(U, mean, L, df):
    """log density of the multivariate t (centre ``mean``, scale ``L Lᵀ``), normalised."""
    d = len(mean)
    from scipy.linalg import solve_triangular

    s = solve_triangular(L, (U - mean).T, lower=True)
    r2 = np.sum(s * s, axis=0)
    return (gammaln(0.5 * (df + d)) - gammaln(0.5 * df) - 0.5 * d * np.log(df * np.pi)
            - np.sum(np.log(np.diag(L))) - 0.5 * (df + d) * np.log1p(r2 / df))


def _evaluate(posterior, X, batch, progress_bar=None):
    out = np.empty(len(X))
    for i in range(0, len(X), batch):
        out[i:i + batch] = posterior(X[i:i + batch])
        if progress_bar is not None:
            progress_bar.update(min(batch, len(X) - i))
    return out


def laplace_is(posterior, *, seed: int, x_map=None, n_draws: int = DEFAULT_DRAWS, df: float = DEFAULT_DF,
               batch: int = 256, max_rounds: int = 3, min_ess: float = MIN_ESS, max_k: float = MAX_K,
               inflate: float = DEFAULT_INFLATE, progress: bool = False) -> LaplaceResult:
    """Importance-sampled posterior with a Student-t proposal at the Laplace approximation.

    Parameters
    ----------
    posterior : swerve.sampling.Posterior
        Log posterior over the free parameters, vectorised over rows (W, ndim) -> (W,).
    seed : int
        Makes the draws reproducible (with the maximisation, when ``x_map`` is not given).
    x_map : array (ndim,), optional
        The maximum, natural units (default: :func:`swerve.sampling.find_map`).
    n_draws : int
        Draws per proposal.
    df : float
        Degrees of freedom of the Student-t proposal (> 2).
    batch : int
        Draws per posterior call.
    max_rounds : int
        Proposals tried: the Laplace approximation, then (while the weights are unreliable) ones
        from the weighted mean and covariance of the last round's draws.
    inflate : float
        The first proposal's scale matrix is ``inflate²`` times the Laplace covariance.
    min_ess, max_k : float
        The weights are reliable when their effective sample size is at least ``min_ess`` and
        their Pareto shape ``k`` is below ``max_k``. (Unlike the reweighting of a chain, no
        fraction of the draws is required: the draws come from a proposal chosen to be wider
        than the posterior, which costs some effective size by design.)
    progress : bool
        A tqdm bar over the draws (stderr).

    Returns
    -------
    LaplaceResult
    """
    from .sampling import find_map, importance_weights

    if not df > 2:
        raise ValueError(f"df: expected more than 2 degrees of freedom (a finite covariance), got {df!r}")
    n_draws = int(n_draws)
    if n_draws < 100:
        raise ValueError(f"n_draws: expected at least 100 draws, got {n_draws}")
    if max_rounds < 1:
        raise ValueError(f"max_rounds: expected at least 1, got {max_rounds}")
    rng = np.random.default_rng(seed)
    low, high = np.asarray(posterior.low, dtype=float), np.asarray(posterior.high, dtype=float)
    span = high - low
    d = len(low)
    if x_map is None:
        x_map = find_map(posterior, rng)
    x_map = np.asarray(x_map, dtype=float)
    if x_map.shape != (d,):
        raise ValueError(f"x_map: expected {d} free parameters, got shape {x_map.shape}")
    mean_u, cov_u, info = laplace_covariance(posterior, x_map, rng=rng)
    cov_u = cov_u * inflate**2
    n_eval = info["n_evaluations"]
    history = []
    bar = None
    if progress:
        from tqdm import tqdm

        bar = tqdm(total=n_draws * max_rounds, desc="laplace-is", unit="draw", leave=False)
    props, Us, lps = [], [], []
    try:
        for r in range(max_rounds):
            L = np.linalg.cholesky(cov_u)
            props.append((mean_u, L))
            U = _t_draws(rng, mean_u, L, df, n_draws)
            Us.append(U)
            lps.append(_evaluate(posterior, low + span * U, batch, bar))
            n_eval += n_draws
            # every round's draws, weighted against the mixture of the proposals so far (the
            # balance heuristic of multiple importance sampling; Veach & Guibas 1995, Owen & Zhou
            # 2000; adaptive: Cornuet, Marin, Mira & Robert 2012, Scand. J. Stat. 39, 798; from memory)
            Ua, lp = np.vstack(Us), np.concatenate(lps)
            lq = np.logaddexp.reduce([_t_logpdf(Ua, m, Lr, df) for m, Lr in props], axis=0) - np.log(len(props))
            iw = importance_weights(np.where(np.isfinite(lp), lp - lq, -np.inf))
            reliable = bool(np.isfinite(iw.pareto_k) and iw.pareto_k < max_k and iw.ess >= min_ess)
            history.append({"ess": iw.ess, "pareto_k": iw.pareto_k, "n_draws": len(lp),
                            "n_outside": int(np.sum(~np.isfinite(lps[-1])))})
            result = LaplaceResult(samples=low + span * Ua, log_prob=lp, weights=iw.weights, ess=iw.ess,
                                   pareto_k=iw.pareto_k, reliable=reliable, x_map=x_map, mean=low + span * mean_u,
                                   cov=(L @ L.T) * np.outer(span, span),
                                   names=list(getattr(posterior, "free_names", [])), n_evaluations=n_eval,
                                   rounds=r + 1, df=df, history=history)
            if reliable or r + 1 == max_rounds or iw.ess < d + 2:
                break
            # the next proposal: the weighted mean and covariance of the draws so far (the t's
            # scale matrix is its covariance times (df - 2) / df)
            w = iw.weights
            m = w @ Ua
            C = (Ua - m).T @ ((Ua - m) * w[:, None])
            C = 0.5 * (C + C.T) * (df - 2.0) / df
            try:
                np.linalg.cholesky(C)
            except np.linalg.LinAlgError:
                break
            mean_u, cov_u = m, C
    finally:
        if bar is not None:
            bar.close()
    return result
