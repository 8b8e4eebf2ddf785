"""Curvature adjustment of the likelihood (on by default since 2026-12-03: ``swerve fit``'s
``[likelihood] adjust``, a validation configuration's ``[fit] adjust``).

The per-cell Gaussian is a quasi-likelihood: its curvature overstates the information in some
directions (``benchmarks/diagnose_model.py sandwich``: the score of the disk mass and the launch
slope varies 1.5-1.7x more than the curvature says), so its posteriors are too narrow there
(with the adjustment and the 32-cell default emulator of ``training/default.toml`` the 68% and 95%
intervals of every parameter cover the truth at their nominal rates on 100-star catalogs:
benchmarks/RESULTS.md). The
adjustment of composite likelihoods (Chandler & Bate 2007, Biometrika 94, 167; from memory)
replaces ``l(theta)`` by ``l(theta_hat + C (theta - theta_hat))`` with ``C`` chosen at the
maximum ``theta_hat`` so that the adjusted curvature ``C^T H C`` is the Godambe information
``H J^-1 H`` (``H``: minus the Hessian of the log-likelihood; ``J``: the covariance of the score,
estimated as the sum over stars of each star's score times itself, the stars being
independent). Here it only ever widens: directions where the score varies less than the
curvature says are left alone, and so are directions the catalog hardly constrains.
"""

from __future__ import annotations

import numpy as np

from .sampling import Posterior, find_map


def curvature_adjustment(like, theta_hat, low, high, h1: float = 0.02, radius: float = 0.1, n_fit: int = 96,
                         flat: float = 1e-3, seed: int = 0, free=None):
    """The matrix ``C`` (d, d) of the adjustment at ``theta_hat`` (natural units), and a dict of
    diagnostics (``H``, ``J`` per unit of each range, and ``kappa``, the eigenvalues of ``J``
    against ``H`` in ``H``'s informative subspace).

    ``like`` has ``per_star(theta)`` (W, n_star) and ``__call__(theta)`` (W,). The emulated
    surface has small wiggles (0.014-0.029 rms in log L about a parabola over 0.1 of a range;
    benchmarks/RESULTS.md), so both are measured on wider scales: the per-star scores by
    central differences over ``h1`` of each range, ``H`` from a quadratic fitted by least
    squares to the total at ``n_fit`` points within ``radius`` (unit-cube coordinates, inside
    the domain) of ``theta_hat``. Directions whose curvature is below ``flat`` of the largest
    are not adjusted. ``free``: indices of the parameters to adjust (default all); the others
    (fixed by their priors) keep ``theta_hat``'s values, and ``C`` is the identity on them."""
    th_all = np.asarray(theta_hat, dtype=float)
    free = np.arange(th_all.size) if free is None else np.asarray(free, dtype=int)
    if len(free) < th_all.size:
        lo_all, hi_all = np.asarray(low, dtype=float), np.asarray(high, dtype=float)

        class _Sub:  # the likelihood as a function of the free parameters
            def _full(self, t):
                full = np.repeat(th_all[None], len(np.atleast_2d(t)), axis=0)
                full[:, free] = np.atleast_2d(t)
                return full

            def per_star(self, t):
                return like.per_star(self._full(t))

            def __call__(self, t):
                return like(self._full(t))

        Cf, info = curvature_adjustment(_Sub(), th_all[free], lo_all[free], hi_all[free], h1, radius, n_fit, flat, seed)
        C = np.eye(th_all.size)
        C[np.ix_(free, free)] = Cf
        return C, info
    th = th_all
    low, high = np.asarray(low, dtype=float), np.asarray(high, dtype=float)
    span = high - low
    d = th.size
    u0 = (th - low) / span

    def at(us):
        return low + span * np.asarray(us)

    # per-star scores (per unit of each range)
    pts, dx = [], []
    for k in range(d):
        a, b = min(u0[k] + h1, 1.0), max(u0[k] - h1, 0.0)
        pa, pb = u0.copy(), u0.copy()
        pa[k], pb[k] = a, b
        pts += [pa, pb]
        dx.append(a - b)
    ps = like.per_star(at(pts))
    S = (ps[0::2] - ps[1::2]) / np.asarray(dx)[:, None]  # (d, n_star)
    ok = np.all(np.isfinite(S), axis=0)
    J = S[:, ok] @ S[:, ok].T
    # H from a quadratic response surface
    rng = np.random.default_rng(seed)
    z = rng.normal(size=(n_fit, d))
    z *= (radius * rng.uniform(size=(n_fit, 1)) ** (1.0 / d)) / np.linalg.norm(z, axis=1, keepdims=True)
    U = np.clip(u0 + z, 0.0, 1.0)
    v = np.asarray(like(at(U)), dtype=float)
    good = np.isfinite(v)
    X = U[good] - u0
    iu = np.triu_indices(d)
    cols = [np.ones(len(X))] + [X[:, k] for k in range(d)] + [X[:, i] * X[:, j] for i, j in zip(*iu)]
    coef = np.linalg.lstsq(np.column_stack(cols), v[good], rcond=None)[0]
    Q = np.zeros((d, d))
    Q[iu] = coef[1 + d:]
    H = -(Q + Q.T)  # the Hessian of x^T Q x with Q upper-triangular is Q + Q^T
    info = {"H": H, "J": J, "kappa": np.zeros(0), "adjusted": False}
    if not (np.all(np.isfinite(H)) and np.all(np.isfinite(J))):
        return np.eye(d), info
    w, V = np.linalg.eigh(H)
    keep = w > flat * max(w.max(), 0.0)
    if not keep.any():
        return np.eye(d), info
    Vs, ws = V[:, keep], w[keep]
    Wm = Vs / np.sqrt(ws)  # (d, m): H^-1/2 on the informative subspace
    K = Wm.T @ J @ Wm  # the score's covariance in units of the curvature
    kap, Q = np.linalg.eigh(0.5 * (K + K.T))
    kc = np.maximum(kap, 1.0)  # widen only
    Ks = Q @ np.diag(1.0 / np.sqrt(kc)) @ Q.T  # K^-1/2, at most 1
    Cs = np.diag(1.0 / np.sqrt(ws)) @ Ks @ np.diag(np.sqrt(ws))  # in the eigenbasis of H
    C_unit = np.eye(d) + Vs @ (Cs - np.eye(len(ws))) @ Vs.T
    C = C_unit * span[:, None] / span[None, :]  # natural units
    info.update(kappa=kap, adjusted=bool(np.any(kap > 1.0)))
    return C, info


class AdjustedLikelihood:
    """``l(theta_hat + C (theta - theta_hat))``, the argument kept inside the domain (``C``
    from :func:`curvature_adjustment`)."""

    def __init__(self, like, theta_hat, C, low, high):
        self.like = like
        self.theta_hat = np.asarray(theta_hat, dtype=float)
        self.C = np.asarray(C, dtype=float)
        low, high = np.asarray(low, dtype=float), np.asarray(high, dtype=float)
        # a hair inside: the likelihood averages its walkers, and a mean of values at a bound can
        # round outside it
        self.low, self.high = low + 1e-12 * (high - low), high - 1e-12 * (high - low)
        self.parameter_names = getattr(like, "parameter_names", None)

    def _map(self, theta):
        th = np.atleast_2d(np.asarray(theta, dtype=float))
        return np.clip(self.theta_hat + (th - self.theta_hat) @ self.C.T, self.low, self.high)

    def __call__(self, theta):
        out = self.like(self._map(theta))
        return out if np.ndim(theta) == 2 else float(np.asarray(out).ravel()[0])

    def per_star(self, theta):
        return self.like.per_star(self._map(theta))


def adjusted_posterior(post, like, bounds, rng):
    """The posterior ``post`` (:class:`swerve.sampling.Posterior` over ``like``) with its
    likelihood adjusted at its maximum (found with :func:`swerve.sampling.find_map` and ``rng``),
    free parameters only. Returns ``(posterior, x_map, C, info)``; ``x_map`` is over the free
    parameters (the adjusted posterior's maximum too: the adjustment keeps it)."""
    lo, hi = np.asarray(bounds, dtype=float).T
    x_map = find_map(post, rng)
    theta_hat = post.full(x_map)[0]
    C, info = curvature_adjustment(like, theta_hat, lo, hi, free=post.free)
    return Posterior(AdjustedLikelihood(like, theta_hat, C, lo, hi), post.priors), x_map, C, info
