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
4. importance weights ``p / q``, every draw weighted against the mixture of all rounds'
   proposals, judged by the Pareto shape ``k`` of their upper tail and their effective sample
   size (:func:`swerve.sampling.importance_weights`; Vehtari, Simpson, Gelman, Yao & Gabry 2024,
   JMLR 25, 72: below k = 0.7 the weighted estimates are reliable). The first proposal is
   ``DEFAULT_INFLATE`` times wider than the approximation;
5. while the weights are unreliable, the draws so far are searched for other maxima
   (:func:`find_maxima`: high draws from which the straight line to every known maximum dips,
   each polished by :func:`laplace_covariance` and kept when it is not a known one). With
   several, the next proposal is a mixture of Student-t's, one at each maximum with its own
   Laplace covariance (a large catalog's emulated surface can have two maxima a few units of log
   posterior apart, which one Student-t covers badly: benchmarks/RESULTS.md); with none, the last
   proposal moved to the weighted draws. Either is fitted to the weighted draws by importance-
   weighted EM steps (for one Student-t: their weighted mean and covariance). The adaptation is
   population Monte Carlo (Cappé, Guillin, Marin & Robert 2004, J. Comput. Graph. Stat. 13, 907;
   with mixtures: Cappé, Douc, Guillin, Marin & Robert 2008, Stat. Comput. 18, 447; from memory).

Reliable weights: the weighted draws are the posterior (:meth:`LaplaceResult.to_sampler_result`
gives what :func:`swerve.sampling.sample_posterior` returns, with its ``weights``). Unreliable
after ``max_rounds``: the result says so (:attr:`LaplaceResult.verdict`), and
:meth:`LaplaceResult.start_walkers` gives an ensemble already spread over the posterior (over
every maximum, in proportion to the weighted draws) for emcee to continue from, which is what
``swerve fit`` then does.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import solve_triangular
from scipy.special import gammaln
from tqdm import tqdm

from .sampling import SamplerResult, find_map, importance_weights

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
#: a mixture proposal has a Student-t at each of at most this many maxima (the emulated surface of
#: a 10,000-star catalog has separate maxima: one mock's two, 0.16 apart in log posterior, carrying
#: 79% and 21% of the posterior; benchmarks/RESULTS.md, "Large catalogs")
MAX_MODES = 4
#: two points are in separate basins when the log posterior on the line between them dips more than
#: this below the lower one (smaller dips are the emulated surface's wiggles within one mode, which
#: one Student-t covers)
MODE_DIP = 1.0
#: EM steps that fit a mixture proposal to the weighted draws before the next round's draws (one
#: is all a single Student-t needs: its weighted mean and covariance)
EM_STEPS = 3
#: no component of a mixture proposal gets less than this weight (a defensive share: the draws
#: that weigh the components are few where a maximum was missed)
MIN_COMPONENT_WEIGHT = 0.05
#: every proposal gives this share of its draws to a defensive component ...
DEFENSIVE_WEIGHT = 0.1
#: ... this many times wider than the posterior (the Laplace approximation in round 1, then the
#: weighted draws' covariance), centred on it: on a 10,000-star mock the posterior of m_halo has a
#: long, nearly flat low tail that a Student-t at the maximum hardly draws (without this share the
#: weights stayed unreliable, k 0.79 after 3 rounds). With it the weights were reliable (k 0.17),
#: but that tail's 2.5% point lay 0.83 posterior sd below a 12,000-step emcee chain's, the other
#: quantiles within 0.06 sd (benchmarks/RESULTS.md, "Large catalogs": which tail is right is open)
DEFENSIVE_SCALE = 3.0


@dataclass
class LaplaceResult:
    """Importance-sampled posterior around the Laplace approximation (:func:`laplace_is`).

    Attributes
    ----------
    samples : array (rounds x n_draws, ndim)
        Draws from the proposals, natural units of the free parameters.
    log_prob : array (rounds x n_draws,)
        The exact log posterior at each draw (-inf outside the prior's support).
    weights : array (rounds x n_draws,)
        Normalised importance weights (sum 1).
    ess : float
        Kish's effective sample size of the weights.
    pareto_k : float
        Pareto shape of the weights' upper tail.
    reliable : bool
        ``pareto_k < max_k`` and ``ess >= min_ess``: the weighted draws can stand for the posterior.
    x_map : array (ndim,)
        The start the approximation was polished from (the caller's maximum, or
        :func:`swerve.sampling.find_map`'s), natural units; the polished maxima are in
        :attr:`maxima`.
    mean, cov : arrays (ndim,), (ndim, ndim)
        The last proposal's centre and scale matrix (for a Student-t, the covariance is
        ``df / (df - 2)`` times it; for a mixture, its mean and the weighted scale matrices plus
        the spread of the components' centres about it: :meth:`TMixture.moments`), natural units.
    names : list of str
    n_evaluations : int
        Posterior evaluations spent (curvature fits, the search for other maxima and the draws;
        not the maximisation).
    rounds : int
        Proposals tried (1: the Laplace approximation was enough).
    history : list of dict
        Per round: ``ess`` and ``pareto_k`` of all draws so far, ``n_draws`` so far,
        ``n_outside`` (this round's draws outside the prior's support), ``components`` (of this
        round's proposal), ``n_evaluations`` (spent by the end of the round).
    maxima : list of dict
        The distinct maxima found (the polished ``x_map`` first): ``centre``, ``sd`` (of the
        Laplace approximation there; natural units) and ``log_post``.
    components : list of dict
        The last proposal's components: ``weight`` in the proposal, ``mass`` (the posterior's
        share by the components' responsibilities for the weighted draws), ``centre``, ``sd``.
    min_ess, max_k : float
        The thresholds :attr:`reliable` was judged by.
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
    maxima: list = field(default_factory=list)
    components: list = field(default_factory=list)
    min_ess: float = MIN_ESS
    max_k: float = MAX_K

    @property
    def verdict(self) -> str:
        """One line: whether the weighted draws stand for the posterior, and if not, why and
        what takes over."""
        parts = f"Pareto k {self.pareto_k:.2f}, ESS {self.ess:.0f} of {len(self.samples)}"
        if len(self.maxima) > 1:
            parts += f", {len(self.maxima)} separate maxima"
        if self.reliable:
            return f"laplace-is: reliable ({parts}, {self.rounds} round(s))"
        why = []
        if not (np.isfinite(self.pareto_k) and self.pareto_k < self.max_k):
            why.append(f"the weights' tail is too heavy (k >= {self.max_k:g})")
        if not self.ess >= self.min_ess:
            why.append(f"too few effective draws (< {self.min_ess:g})")
        return (f"laplace-is: NOT reliable after {self.rounds} round(s) ({parts}): {' and '.join(why)}; "
                "emcee is to start from walkers drawn from the weighted draws (start_walkers)")

    def diagnostics(self) -> dict:
        """Plain data for a summary: method, effective sample size, Pareto k, verdict."""
        return {"method": "laplace-is", "ess": float(self.ess), "pareto_k": float(self.pareto_k),
                "n_samples": int(len(self.samples)), "reliable": bool(self.reliable), "rounds": int(self.rounds),
                "n_evaluations": int(self.n_evaluations), "df": float(self.df),
                "history": [dict(h) for h in self.history], "maxima": [dict(m) for m in self.maxima],
                "components": [dict(c) for c in self.components], "verdict": self.verdict}

    def to_sampler_result(self):
        """The weighted draws as a :class:`swerve.sampling.SamplerResult` (``weights`` set;
        ``tau`` NaN: there is no chain; ``converged`` is :attr:`reliable`)."""

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
        """A starting ensemble (nwalkers, ndim) for emcee, spread over the posterior as the
        weighted draws say: ``nwalkers`` draws picked by systematic resampling of the weights
        (so each region, e.g. each of several maxima, gets walkers in proportion to its mass),
        a draw picked m times standing for itself and its m - 1 nearest other draws (distances
        scaled by the weighted standard deviations; emcee's moves need distinct walkers). Where
        fewer than ``nwalkers`` draws carry weight: the finite draws nearest the top of the
        posterior."""
        nwalkers = int(nwalkers)
        finite = np.flatnonzero(np.isfinite(self.log_prob))
        if len(finite) < nwalkers:
            raise ValueError(f"start_walkers: only {len(finite)} draws lie where the posterior is finite, "
                             f"{nwalkers} walkers wanted")
        if np.count_nonzero(self.weights > 0) < nwalkers:
            idx = finite[np.argsort(-self.log_prob[finite])[:nwalkers]]
            return np.array(self.samples[idx], dtype=float)
        cdf = np.cumsum(self.weights)
        cdf /= cdf[-1]
        picks = np.minimum(np.searchsorted(cdf, (rng.uniform() + np.arange(nwalkers)) / nwalkers), len(cdf) - 1)
        uniq, counts = np.unique(picks, return_counts=True)
        m = self.weights @ self.samples
        sd = np.sqrt(self.weights @ (self.samples - m) ** 2)
        sd = np.where(sd > 0, sd, 1.0)
        X = self.samples[finite] / sd
        taken = np.zeros(len(self.samples), dtype=bool)
        taken[uniq] = True
        chosen = list(uniq)
        for u, c in zip(uniq, counts):
            if c < 2:
                continue
            dist = np.sum((X - self.samples[u] / sd) ** 2, axis=1)
            order = finite[np.argsort(dist, kind="stable")]
            extra = order[~taken[order]][:c - 1]
            taken[extra] = True
            chosen.extend(extra)
        return np.array(self.samples[np.array(chosen)], dtype=float)


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
                       grow: float = 3.0, initial_cov=None):
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
    initial_cov : array (ndim, ndim), optional
        Round 0's Gaussian (unit cube) instead of ``initial_sd``: e.g. a scale learnt at another
        maximum of the same posterior.

    Returns
    -------
    centre : array (ndim,)
        Unit-cube centre.
    cov : array (ndim, ndim)
        Unit-cube covariance.
    info : dict
        ``rounds`` (fits made), ``n_evaluations``, ``n_flat`` (directions floored to ``max_sd``),
        ``converged``, ``step`` (the last Newton step, standard deviations), ``newton`` (the
        last fit's distance from the centre to its quadratic's maximum, before the trust region,
        in standard deviations of that fit: small at a maximum, large on a slope or a curved
        ridge), ``log_post`` (at the centre), ``trace`` (per
        round: log posterior at the centre, centre and standard deviations in natural units,
        directions floored).
    """

    low, high = np.asarray(posterior.low, dtype=float), np.asarray(posterior.high, dtype=float)
    span = high - low
    d = len(low)
    c = np.clip((np.asarray(x_map, dtype=float) - low) / span, 0.0, 1.0)
    n_coef = 1 + d + d * (d + 1) // 2
    n_fit = int(n_fit or max(48, 3 * n_coef))
    cov = np.eye(d) * initial_sd**2 if initial_cov is None else np.array(initial_cov, dtype=float)
    n_eval, n_flat, converged, done, step_sd, here = 0, 0, False, 0, float("nan"), float("nan")
    newton = float("nan")
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
        newton = float(np.linalg.norm(solve_triangular(np.linalg.cholesky(new), step, lower=True)))
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
    if not trace:  # no round had enough finite points for a fit
        here = float(posterior(low + span * c[None])[0])
        n_eval += 1
    return c, cov, {"rounds": done, "n_evaluations": n_eval, "n_flat": n_flat, "converged": converged,
                    "step": step_sd, "newton": newton, "log_post": here, "trace": trace}


# ------------------------------------------------------------------------ the proposal -----
def _t_draws(rng, mean, L, df, n):
    d = len(mean)
    z = rng.standard_normal((n, d))
    g = rng.chisquare(df, size=n) / df
    return mean + (z / np.sqrt(g)[:, None]) @ L.T


def _t_logpdf(U, mean, L, df):
    """log density of the multivariate t (centre ``mean``, scale ``L Lᵀ``), normalised."""
    d = len(mean)
    r2 = _mahalanobis2(U, mean, L)
    return (gammaln(0.5 * (df + d)) - gammaln(0.5 * df) - 0.5 * d * np.log(df * np.pi)
            - np.sum(np.log(np.diag(L))) - 0.5 * (df + d) * np.log1p(r2 / df))


def _mahalanobis2(U, centre, L):
    """Squared distances of the rows of ``U`` from ``centre`` in the metric ``(L Lᵀ)^-1``."""
    s = solve_triangular(L, (np.atleast_2d(U) - centre).T, lower=True)
    return np.sum(s * s, axis=0)


@dataclass
class TMixture:
    """A mixture of multivariate Student-t densities with common degrees of freedom (the
    proposal; unit-cube coordinates inside :func:`laplace_is`).

    Attributes
    ----------
    alpha : array (K,)
        Component weights (sum 1).
    means : array (K, d)
    chols : array (K, d, d)
        Lower Cholesky factors of the components' scale matrices.
    df : float
    """

    alpha: np.ndarray
    means: np.ndarray
    chols: np.ndarray
    df: float

    @classmethod
    def from_scales(cls, alpha, means, scales, df):
        a = np.asarray(alpha, dtype=float)
        return cls(a / a.sum(), np.atleast_2d(np.asarray(means, dtype=float)),
                   np.array([np.linalg.cholesky(0.5 * (S + S.T)) for S in scales]), float(df))

    @property
    def k(self) -> int:
        return len(self.alpha)

    def component_logpdf(self, U) -> np.ndarray:
        """(K, n): log density of each component (not weighted) at the rows of ``U``."""
        return np.array([_t_logpdf(U, m, L, self.df) for m, L in zip(self.means, self.chols)])

    def logpdf(self, U) -> np.ndarray:
        return np.logaddexp.reduce(np.log(self.alpha)[:, None] + self.component_logpdf(U), axis=0)

    def responsibilities(self, U) -> np.ndarray:
        """(K, n): probability that each component drew each row."""
        lc = np.log(self.alpha)[:, None] + self.component_logpdf(U)
        return np.exp(lc - np.logaddexp.reduce(lc, axis=0))

    def draw(self, rng, n: int) -> np.ndarray:
        counts = rng.multinomial(n, self.alpha)
        return np.vstack([_t_draws(rng, m, L, self.df, c) for m, L, c in zip(self.means, self.chols, counts)])

    def moments(self):
        """Mean and the mixture of the scale matrices about it (for one component: its centre
        and scale matrix; the covariance is ``df / (df - 2)`` times it)."""
        m = self.alpha @ self.means
        S = sum(a * (L @ L.T + np.outer(mu - m, mu - m)) for a, L, mu in zip(self.alpha, self.chols, self.means))
        return m, S


def _em_step(mix: TMixture, U, w, min_ess: float, fixed=None, min_weight: float = 0.0):
    """One importance-weighted EM step of the mixture towards the target the normalised weights
    ``w`` of draws ``U`` stand for: each component takes the weighted share, mean and covariance
    of the draws by its responsibilities (for one component: the moment-matched proposal). The
    adaptation of mixture proposals by population Monte Carlo (Cappé, Douc, Guillin, Marin &
    Robert 2008, Stat. Comput. 18, 447; from memory).

    A component whose share rests on fewer than ``min_ess`` effective draws keeps its old centre
    and scale; the ``fixed`` ones (bool (K,): e.g. a maximum just found, which the draws so far
    reach too seldom to place or weigh it) keep their centre, scale and weight, the others share
    the rest of the weight; an unfixed one with no share is dropped. Every weight is raised to at least ``min_weight`` (then all renormalised). Returns the new mixture
    and its ``fixed`` flags, or (None, None) when nothing is left."""
    fixed = np.zeros(mix.k, dtype=bool) if fixed is None else np.asarray(fixed, dtype=bool)
    r = mix.responsibilities(U) * w[None, :]
    share = r.sum(axis=1)
    alpha, means, scales, keep_fixed = [], [], [], []
    for k in range(mix.k):
        if not share[k] > 1e-3 and not fixed[k]:
            continue
        old = (mix.means[k], mix.chols[k] @ mix.chols[k].T)
        rk = r[k] / share[k] if share[k] > 0 else r[k]
        if fixed[k] or 1.0 / np.sum(rk * rk) < min_ess:
            new = old
        else:
            m = rk @ U
            C = (U - m).T @ ((U - m) * rk[:, None])
            C = 0.5 * (C + C.T) * (mix.df - 2.0) / mix.df
            try:
                np.linalg.cholesky(C)
                new = (m, C)
            except np.linalg.LinAlgError:
                new = old
        alpha.append(mix.alpha[k] if fixed[k] else share[k])
        means.append(new[0])
        scales.append(new[1])
        keep_fixed.append(fixed[k])
    if not alpha:
        return None, None
    a, keep_fixed = np.asarray(alpha, dtype=float), np.array(keep_fixed)
    free_share = np.sum(a[~keep_fixed])
    if free_share > 0:
        a[~keep_fixed] *= max(0.0, 1.0 - np.sum(a[keep_fixed])) / free_share
    a = a / np.sum(a)
    return TMixture.from_scales(np.maximum(a, min_weight), means, scales, mix.df), keep_fixed


# ------------------------------------------------------------------------ distinct maxima -----
def _separated(posterior, low, span, A, lpa, B, lpb, n_line: int, dip: float):
    """For pairs of unit-cube points (rows of ``A`` and ``B``, log posterior ``lpa``, ``lpb``):
    whether the log posterior on the straight line between them falls more than ``dip`` below
    the lower of the two (``n_line`` interior points, one vectorised call)."""
    n, d = A.shape
    t = np.arange(1, n_line + 1) / (n_line + 1.0)
    P = A[:, None, :] + t[None, :, None] * (B - A)[:, None, :]
    v = np.asarray(posterior(low + span * P.reshape(-1, d)), dtype=float).reshape(n, n_line)
    v = np.where(np.isfinite(v), v, -np.inf)
    return np.min(v, axis=1) < np.minimum(lpa, lpb) - dip


def _joined_via_draws(posterior, low, span, c, lpc, mode, U, lp, n_line: int, dip: float, n_way: int = 6):
    """Whether a path of two straight segments through one of the draws joins ``c`` (log
    posterior ``lpc``) to a known maximum ``mode`` without falling more than ``dip`` below the
    lower end: the ``n_way`` draws nearest both (in the maximum's metric) of those high enough
    are tried, in one vectorised call. A curved ridge (a banana) is joined so; two basins are
    not. Returns (joined, evaluations)."""
    floor = min(lpc, mode["log_post"]) - dip
    ok = np.flatnonzero(np.isfinite(lp) & (lp >= floor))
    if not len(ok):
        return False, 0
    far = np.maximum(_mahalanobis2(U[ok], c, mode["chol"]), _mahalanobis2(U[ok], mode["centre"], mode["chol"]))
    way = ok[np.argsort(far, kind="stable")[:n_way]]
    n = len(way)
    A = np.vstack([np.repeat(c[None], n, axis=0), U[way]])
    B = np.vstack([U[way], np.repeat(mode["centre"][None], n, axis=0)])
    # each segment judged against the path's lower end: dips below ``floor`` break it
    t = np.arange(1, n_line + 1) / (n_line + 1.0)
    P = A[:, None, :] + t[None, :, None] * (B - A)[:, None, :]
    v = np.asarray(posterior(low + span * P.reshape(-1, A.shape[1])), dtype=float).reshape(2 * n, n_line)
    v = np.where(np.isfinite(v), v, -np.inf).min(axis=1)
    return bool(np.any((v[:n] >= floor) & (v[n:] >= floor))), 2 * n * n_line


def find_maxima(posterior, modes, U, lp, *, rng, max_modes: int, weights=None, drop: float = 8.0, dip: float = 1.0,
                near: float = 1.0, n_pool: int = 24, n_test: int = 12, n_line: int = 4, max_tries: int | None = None):
    """Other maxima of the log posterior among draws ``U`` (unit cube, log posterior ``lp``).

    Candidates are the ``n_pool`` highest draws and the ``n_pool`` draws of largest importance
    ``weights`` (where the proposal so far covers the posterior worst), of those within ``drop``
    of the best log posterior seen and more than ``near`` standard deviations (of each known
    maximum's Laplace covariance) from every known maximum. A candidate lies in another basin
    when the log posterior on the straight line to every known maximum dips more than ``dip``
    below the lower end (a vectorised test of ``n_test`` candidates at a time, the heaviest
    first, or with no ``weights`` the highest); the first such candidate is polished into a
    maximum with its own curvature (:func:`laplace_covariance`, started on half the
    nearest maximum's scale, Newton steps of at most one standard deviation, the scale growing
    at most 1.5 times a round: kept local, so that it does not walk over the dip to the maximum
    it is separated from, as it did on a 10,000-star mock with the defaults). A polishing whose
    last quadratic fit puts the top more than one standard deviation away ended on a slope (the
    arm of a curved ridge), not at a maximum, and is dropped. A polished
    maximum within one standard deviation of a known one, or joined to it without such a dip by
    a straight line or by two through one of the draws (:func:`_joined_via_draws`: a curved
    ridge), is the same maximum (the higher of the
    two is kept); else it is added. Stops at ``max_modes`` maxima, when no candidate is left, or
    after ``max_tries`` polishings (default ``max_modes``). The search costs at most
    ``2 n_pool x max_modes x n_line`` evaluations for the line tests and ``max_tries`` fits
    of :func:`laplace_covariance`.

    Parameters
    ----------
    modes : list of dict
        The maxima known so far, each with ``centre`` (unit cube), ``cov`` (its Laplace
        covariance, unit cube) and ``log_post``; extended in place.
    U, lp : arrays (n, ndim), (n,)
        The draws (unit cube) and their log posterior.
    weights : array (n,), optional
        Their importance weights.

    Returns
    -------
    modes : list of dict
    n_evaluations : int
    """
    low, high = np.asarray(posterior.low, dtype=float), np.asarray(posterior.high, dtype=float)
    span = high - low
    max_tries = max_modes if max_tries is None else int(max_tries)
    for m in modes:
        m.setdefault("chol", np.linalg.cholesky(m["cov"]))
    n_eval, tries = 0, 0
    ok = np.isfinite(lp)
    if not ok.any():
        return modes, 0
    top = max(float(np.max(lp[ok])), max(m["log_post"] for m in modes))
    pool = np.flatnonzero(ok & (lp >= top - drop))
    for m in modes:
        pool = pool[_mahalanobis2(U[pool], m["centre"], m["chol"]) > near**2]
    highest = pool[np.argsort(-lp[pool], kind="stable")][:n_pool]
    heavy = pool[np.argsort(-np.asarray(weights)[pool], kind="stable")][:n_pool] if weights is not None else highest
    pool = np.union1d(highest, heavy)
    # heaviest first: where the proposal so far misses most of the posterior (else highest first)
    pool = pool[np.argsort(-(lp[pool] if weights is None else np.asarray(weights)[pool]), kind="stable")]
    while len(modes) < max_modes and len(pool) and tries < max_tries:
        far = np.ones(len(pool), dtype=bool)
        for m in modes:
            far &= _mahalanobis2(U[pool], m["centre"], m["chol"]) > near**2
        pool = pool[far]
        if not len(pool):
            break
        cand = pool[:n_test]
        K = len(modes)
        centres = np.array([m["centre"] for m in modes])
        lpc = np.array([m["log_post"] for m in modes])
        sep = _separated(posterior, low, span, np.repeat(U[cand], K, axis=0), np.repeat(lp[cand], K),
                         np.tile(centres, (len(cand), 1)), np.tile(lpc, len(cand)), n_line, dip)
        n_eval += len(cand) * K * n_line
        sep = sep.reshape(len(cand), K).all(axis=1)
        pool = pool[~np.isin(pool, cand[~sep])]  # joined to a known maximum by a rise: its basin
        if not sep.any():
            continue
        j = cand[np.argmax(sep)]  # the first candidate in a basin of its own
        nearest = modes[int(np.argmin([_mahalanobis2(U[j], m["centre"], m["chol"])[0] for m in modes]))]
        c, cov, info = laplace_covariance(posterior, low + span * U[j], rng=rng, initial_cov=nearest["cov"] / 4.0,
                                          max_step=1.0, grow=1.5)
        n_eval += info["n_evaluations"]
        tries += 1
        L = np.linalg.cholesky(cov)
        new = {"centre": c, "cov": cov, "chol": L, "log_post": float(info["log_post"])}
        if not info["newton"] < 1.0:  # the polishing ended on a slope, not at a maximum
            pool = pool[(pool != j) & (_mahalanobis2(U[pool], U[j], nearest["chol"]) > near**2)]
            continue
        # the same maximum as a known one when within a standard deviation of it or joined to it
        # without a dip, straight or through one of the draws (a curved ridge)
        K = len(modes)
        apart = _separated(posterior, low, span, np.repeat(c[None], K, axis=0), np.full(K, new["log_post"]),
                           np.array([m["centre"] for m in modes]), np.array([m["log_post"] for m in modes]),
                           n_line, dip)
        n_eval += K * n_line
        for k in np.flatnonzero(apart):
            joined, ne = _joined_via_draws(posterior, low, span, c, new["log_post"], modes[k], U, lp, n_line, dip)
            n_eval += ne
            apart[k] = not joined
        same = [k for k, m in enumerate(modes)
                if not apart[k] or min(_mahalanobis2(c, m["centre"], m["chol"])[0],
                                       _mahalanobis2(m["centre"], c, L)[0]) < 1.0]
        if not same:
            modes.append(new)
        elif np.isfinite(new["log_post"]) and new["log_post"] > modes[same[0]]["log_post"]:
            modes[same[0]] = new  # the same maximum, found higher: keep the best
        # the start's neighbourhood is done with either way
        pool = pool[(pool != j) & (_mahalanobis2(U[pool], U[j], nearest["chol"]) > near**2)]
    return modes, n_eval


def _mode_mixture(modes, inflate: float, df: float, min_weight: float = MIN_COMPONENT_WEIGHT) -> TMixture:
    """A Student-t at every maximum, its scale ``inflate²`` times the maximum's Laplace
    covariance, weighted by the Laplace approximation of each maximum's mass (the density at the
    top times the square root of the covariance's determinant), every weight at least
    ``min_weight`` (the masses are a guess until the draws weigh them)."""
    la = np.array([m["log_post"] + 0.5 * np.linalg.slogdet(m["cov"])[1] for m in modes])
    a = np.exp(la - np.max(la))
    a = a / a.sum()
    a = np.maximum(a, min_weight)
    return TMixture.from_scales(a, [m["centre"] for m in modes], [m["cov"] * inflate**2 for m in modes], df)


def _defended(core: TMixture, centre, scale, weight: float) -> TMixture:
    """``core`` with a defensive component added: a Student-t at ``centre`` with scale matrix
    ``scale`` (much wider than the posterior), taking ``weight`` of the mixture, so that every
    region within a few posterior widths gets draws and the weights stay bounded there
    (defensive importance sampling: Hesterberg 1995, Technometrics 37, 185; from memory)."""
    if not weight > 0:
        return core
    return TMixture(np.append(core.alpha * (1.0 - weight), weight), np.vstack([core.means, centre]),
                    np.concatenate([core.chols, np.linalg.cholesky(0.5 * (scale + scale.T))[None]]), core.df)


def _evaluate(posterior, X, batch, progress_bar=None):
    out = np.empty(len(X))
    for i in range(0, len(X), batch):
        out[i:i + batch] = posterior(X[i:i + batch])
        if progress_bar is not None:
            progress_bar.update(min(batch, len(X) - i))
    return out


def laplace_is(posterior, *, seed: int, x_map=None, n_draws: int = DEFAULT_DRAWS, df: float = DEFAULT_DF,
               batch: int = 256, max_rounds: int = 3, min_ess: float = MIN_ESS, max_k: float = MAX_K,
               inflate: float = DEFAULT_INFLATE, progress: bool = False, max_modes: int = MAX_MODES,
               mode_dip: float = MODE_DIP, defensive: float = DEFENSIVE_WEIGHT,
               defensive_scale: float = DEFENSIVE_SCALE) -> LaplaceResult:
    """Importance-sampled posterior with a Student-t proposal at the Laplace approximation, a
    mixture of them where the draws find several maxima.

    Round 1 draws from one Student-t at the polished maximum (:func:`laplace_covariance` from
    ``x_map``), ``inflate`` times wider than its Laplace approximation. While the weights are
    unreliable, the draws so far are searched for other maxima (:func:`find_maxima`); each new
    one joins the proposal as a Student-t of its own Laplace shape (:func:`_mode_mixture`),
    and importance-weighted EM steps fit the other components and all the weights to the
    weighted draws (:func:`_em_step`; one component: their weighted mean and covariance). Every
    draw is weighted against the mixture of all rounds' proposals. Still unreliable after
    ``max_rounds``: the result says so (:attr:`LaplaceResult.reliable` False, with
    :attr:`LaplaceResult.verdict`), and :meth:`LaplaceResult.start_walkers` gives emcee an
    ensemble drawn from the weighted draws, across every maximum found; ``swerve fit``
    (``[sampler] method = "laplace-is"`` or ``"auto"``) then runs emcee from there.

    Parameters
    ----------
    posterior : swerve.sampling.Posterior
        Log posterior over the free parameters, vectorised over rows (W, ndim) -> (W,).
    seed : int
        Makes the draws reproducible (with the maximisation, when ``x_map`` is not given).
    x_map : array (ndim,), optional
        The maximum, natural units (default: :func:`swerve.sampling.find_map`); it is polished
        by :func:`laplace_covariance` before the proposal is built.
    n_draws : int
        Draws per proposal.
    df : float
        Degrees of freedom of the Student-t proposal (> 2).
    batch : int
        Draws per posterior call.
    max_rounds : int
        Proposals tried.
    inflate : float
        The first proposal's scale matrix (and that of each maximum's component of a mixture)
        is ``inflate²`` times the Laplace covariance.
    min_ess, max_k : float
        The weights are reliable when their effective sample size is at least ``min_ess`` and
        their Pareto shape ``k`` is below ``max_k``. (Unlike the reweighting of a chain, no
        fraction of the draws is required: the draws come from a proposal chosen to be wider
        than the posterior, which costs some effective size by design.)
    progress : bool
        A tqdm bar over the draws (stderr).
    max_modes : int
        At most this many maxima in a mixture proposal (1: a single Student-t, as before
        2026-12-05).
    mode_dip : float
        Two points are in separate basins when the log posterior between them dips by more
        than this (:func:`find_maxima`).

    Returns
    -------
    LaplaceResult
    """

    if not df > 2:
        raise ValueError(f"df: expected more than 2 degrees of freedom (a finite covariance), got {df!r}")
    n_draws = int(n_draws)
    if n_draws < 100:
        raise ValueError(f"n_draws: expected at least 100 draws, got {n_draws}")
    if max_rounds < 1:
        raise ValueError(f"max_rounds: expected at least 1, got {max_rounds}")
    if max_modes < 1:
        raise ValueError(f"max_modes: expected at least 1, got {max_modes}")
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
    modes = [{"centre": mean_u, "cov": cov_u, "log_post": float(info["log_post"])}]
    proposal = TMixture.from_scales([1.0], [mean_u], [cov_u * inflate**2], df)
    guard = (mean_u, cov_u * defensive_scale**2)  # the defensive component: centre, scale matrix
    n_eval = info["n_evaluations"]
    history = []
    bar = None
    if progress:

        bar = tqdm(total=n_draws * max_rounds, desc="laplace-is", unit="draw", leave=False)
    props, Us, lps = [], [], []
    try:
        for r in range(max_rounds):
            drawn = _defended(proposal, *guard, defensive)
            props.append(drawn)
            U = drawn.draw(rng, n_draws)
            Us.append(U)
            lps.append(_evaluate(posterior, low + span * U, batch, bar))
            n_eval += n_draws
            # every round's draws, weighted against the mixture of the proposals so far (the
            # balance heuristic of multiple importance sampling; Veach & Guibas 1995, Owen & Zhou
            # 2000; adaptive: Cornuet, Marin, Mira & Robert 2012, Scand. J. Stat. 39, 798; from memory)
            Ua, lp = np.vstack(Us), np.concatenate(lps)
            lq = np.logaddexp.reduce([q.logpdf(Ua) for q in props], axis=0) - np.log(len(props))
            iw = importance_weights(np.where(np.isfinite(lp), lp - lq, -np.inf))
            reliable = bool(np.isfinite(iw.pareto_k) and iw.pareto_k < max_k and iw.ess >= min_ess)
            history.append({"ess": iw.ess, "pareto_k": iw.pareto_k, "n_draws": len(lp),
                            "n_outside": int(np.sum(~np.isfinite(lps[-1]))), "components": proposal.k,
                            "n_evaluations": n_eval})
            if reliable or r + 1 == max_rounds:
                break
            # the next proposal: a Student-t at each maximum when the draws found new ones, else
            # the last one moved by the weighted draws (not with fewer effective draws than
            # parameters: then the weights say nothing, and the fit goes to emcee)
            n_known = len(modes)
            if max_modes > 1:
                modes, ne = find_maxima(posterior, modes, Ua, lp, rng=rng, max_modes=max_modes, weights=iw.weights,
                                        dip=mode_dip)
                n_eval += ne
                history[-1]["n_evaluations"] = n_eval
            if len(modes) == n_known and iw.ess < d + 2:
                break
            # the new maxima join the proposal as Student-t's of their own Laplace shape (kept
            # while the draws so far hardly reach them), and EM steps fit the rest and the weights
            # (weighted by their Laplace masses against the known maxima's)
            nxt, fixed = proposal, np.zeros(proposal.k, dtype=bool)
            if len(modes) > n_known:
                every = _mode_mixture(modes, inflate, df)
                a_new = every.alpha[n_known:]
                k_all = proposal.k + len(a_new)
                nxt = TMixture(np.concatenate([proposal.alpha * (1.0 - a_new.sum()), a_new]),
                               np.vstack([proposal.means, every.means[n_known:]]),
                               np.concatenate([proposal.chols, every.chols[n_known:]]), df)
                fixed = np.arange(k_all) >= proposal.k
            for _ in range(EM_STEPS if nxt.k > 1 else 1):
                step, step_fixed = _em_step(nxt, Ua, iw.weights, d + 2, fixed, min_weight=MIN_COMPONENT_WEIGHT)
                if step is None:
                    break
                nxt, fixed = step, step_fixed
            if nxt is proposal:
                break
            proposal = nxt
            # the defensive component follows the weighted draws' spread
            wm = iw.weights @ Ua
            wc = (Ua - wm).T @ ((Ua - wm) * iw.weights[:, None])
            wc = 0.5 * (wc + wc.T) * (df - 2.0) / df
            if iw.ess >= d + 2 and np.all(np.linalg.eigvalsh(wc) > 0):
                guard = (wm, wc * defensive_scale**2)
    finally:
        if bar is not None:
            bar.close()
    core = proposal  # the last proposal without its defensive component
    m, S = core.moments()
    resp = core.responsibilities(Ua) * iw.weights[None, :]
    comps = [{"weight": float(a), "mass": float(resp[k].sum()), "centre": (low + span * mu).tolist(),
              "sd": (span * np.sqrt(np.diag(L @ L.T))).tolist()}
             for k, (a, mu, L) in enumerate(zip(core.alpha, core.means, core.chols))]
    found = [{"centre": (low + span * md["centre"]).tolist(), "log_post": float(md["log_post"]),
              "sd": (span * np.sqrt(np.diag(md["cov"]))).tolist()} for md in modes]
    return LaplaceResult(samples=low + span * Ua, log_prob=lp, weights=iw.weights, ess=iw.ess,
                         pareto_k=iw.pareto_k, reliable=reliable, x_map=x_map, mean=low + span * m,
                         cov=S * np.outer(span, span), names=list(getattr(posterior, "free_names", [])),
                         n_evaluations=n_eval, rounds=len(props), df=df, history=history, maxima=found,
                         components=comps, min_ess=float(min_ess), max_k=float(max_k))
