"""Background populations of a candidate list: the stellar halo's velocity ellipsoid, its
density at each star's measured velocity, membership probabilities, and halo stars for mocks.

Lists of hypervelocity-star candidates hold stars of other origins, above all ordinary halo
stars. The fit's mixture model (:class:`swerve.likelihood.Likelihood` with
``background="halo"``) gives every star the density

    p_i(θ, f) = π_i p_hvs,i(θ) + (1 - π_i) p_halo,i,        π_i = f (or the star's own prior),

where ``p_hvs`` is the emulated density of the star's velocity at its position (the likelihood's
usual term) and ``p_halo`` the density of the same velocity under the halo's velocity ellipsoid
at the same position, both marginalised over the same distance samples and velocity errors.

Design: conditioning on position
--------------------------------
swerve's likelihood is the density of each star's *velocity* given its *position*: the spatial
selection function, and the spatial density of either population, never enter. So ``f`` is the
fraction of the catalog's members *at a star's position* that are hypervelocity stars. A
constant ``f`` is the simplest choice, and the one made here: it holds when the halo stars of
the list are spread in space like its hypervelocity stars. Where they are not (the halo's
density falls as r^-2.5 to r^-3.5, hypervelocity stars' as about r^-2), the ratio of the two
spatial densities times the selection could enter later as a position-dependent ``f(x)``. A
star's own prior membership (e.g. from a back-traced origin) replaces ``f`` for that star
(:func:`prior_membership`).

The halo's velocity ellipsoid
-----------------------------
Gaussian in the spherical components (v_r, v_θ, v_φ) about the Galactic Centre, with mean zero
(no net rotation or radial flow) and dispersions :data:`HALO_SIGMA` = (141, 75, 85) km/s
(Bond et al. 2010, ApJ 716, 1: the inner halo from SDSS stars, constant in spherical
coordinates; values from memory. Smith et al. 2009, MNRAS 399, 1223 found a similar ellipsoid,
(σ_R, σ_φ, σ_z) ≈ (143, 82, 77) km/s in cylindrical coordinates, from memory). Those values
are measured within ~10 kpc of the Sun; further out the radial dispersion falls (to ~100 km/s
at 50 kpc and below beyond; e.g. Deason et al. 2012, MNRAS 425, 2840, from memory), so
``sigma`` is an option. Because the ellipsoid has zero mean and is aligned with the spherical
axes, it is unchanged by the likelihood's folding ``u = (v_r, v_θ sign z, v_φ sign xy)``.

The selection: the emulator models outgoing stars (v_r > 0), so the halo's term is the
ellipsoid truncated to ``u_r > 0`` and renormalised (a factor 2), which keeps both terms
densities over the same selected velocities. With Gaussian measurement errors (mean ``m``,
covariance ``C`` of the folded velocity at a distance sample), the convolution is analytic:

    ∫_{u_r > 0} 2 N(u; 0, Σ) N(m; u, C) du = 2 N(m; 0, Σ + C) Φ(a / s),

with ``a`` and ``s²`` the mean and variance of ``u_r`` given ``m`` (``a = [Σ (Σ + C)⁻¹ m]_r``,
``s² = [Σ - Σ (Σ + C)⁻¹ Σ]_rr``). It does not depend on θ: it is computed once per star.
"""

from __future__ import annotations

import math

import numpy as np
from scipy.special import log_ndtr

from .fileio import did_you_mean

__all__ = [
    "BACKGROUNDS",
    "HALO_SIGMA",
    "MIXTURE_PARAMETER",
    "add_membership_column",
    "draw_halo_velocities",
    "halo_log_density",
    "membership",
    "mixture_loglike",
    "prior_membership",
]

#: the background populations a fit can model
BACKGROUNDS = ("none", "halo")

#: the stellar halo's velocity dispersions (σ_r, σ_θ, σ_φ), km/s: Bond et al. 2010, ApJ 716, 1
#: (from memory)
HALO_SIGMA = (141.0, 75.0, 85.0)

#: the name of the hypervelocity-star fraction among the fit's parameters
MIXTURE_PARAMETER = "f_hvs"

_LOG_2PI = math.log(2.0 * math.pi)


def _check_sigma(sigma) -> np.ndarray:
    s = np.asarray(sigma, dtype=float)
    if s.shape != (3,) or not np.all(np.isfinite(s)) or np.any(s <= 0):
        raise ValueError(f"halo sigma: expected three positive dispersions (sigma_r, sigma_theta, sigma_phi) "
                         f"in km/s, got {sigma!r}")
    return s


def halo_log_density(mean, cov, log_w, sigma=HALO_SIGMA, outgoing: bool = True) -> np.ndarray:
    """log of each star's density under the halo's velocity ellipsoid, marginalised over its
    distance samples and its velocity errors (module docstring).

    Parameters
    ----------
    mean : array of shape (n, k, 3)
        Mean of each sample's folded velocity ``u`` (``StarTerms.mean``), km/s.
    cov : array of shape (n, k, 3, 3)
        Its measurement covariance (``StarTerms.cov``), (km/s)².
    log_w : array of shape (n, k)
        Normalised log weights of the samples (``StarTerms.log_w``; -inf for samples left out).
    sigma : sequence of 3 floats
        The ellipsoid's dispersions (σ_r, σ_θ, σ_φ), km/s.
    outgoing : bool
        Truncate the ellipsoid to ``u_r > 0`` (the emulator's selection of outgoing stars) and
        renormalise.

    Returns
    -------
    array of shape (n,)
        ``log Σ_k w_ik p_halo(m_ik, C_ik)``, with ``p_halo`` in (km/s)^-3 like the likelihood's
        per-star densities.
    """
    s = _check_sigma(sigma)
    m = np.asarray(mean, dtype=float)
    S = np.asarray(cov, dtype=float) + np.diag(s * s)
    lw = np.asarray(log_w, dtype=float)
    ok = np.isfinite(lw)
    out = np.full(lw.shape, -np.inf)
    if ok.any():
        Sv, mv = S[ok], m[ok]
        L = np.linalg.cholesky(Sv)
        y = np.linalg.solve(L, mv[..., None])[..., 0]
        logdet = 2.0 * np.sum(np.log(np.diagonal(L, axis1=-2, axis2=-1)), axis=-1)
        lp = -0.5 * np.sum(y * y, axis=-1) - 0.5 * logdet - 1.5 * _LOG_2PI
        if outgoing:
            Si = np.linalg.inv(Sv)
            sr2 = s[0] ** 2
            a = sr2 * np.einsum("...j,...j->...", Si[..., 0, :], mv)  # [Σ S⁻¹ m]_r (Σ diagonal)
            var = np.maximum(sr2 - sr2 * sr2 * Si[..., 0, 0], 1e-300)
            lp = lp + math.log(2.0) + log_ndtr(a / np.sqrt(var))
        out[ok] = lp + lw[ok]
    best = np.max(out, axis=1, keepdims=True)
    fin = np.isfinite(best[:, 0])
    res = np.full(lw.shape[0], -np.inf)
    res[fin] = best[fin, 0] + np.log(np.sum(np.exp(out[fin] - best[fin]), axis=1))
    return res


def _log_pi(pi):
    """log π and log(1 - π), without warnings at 0 and 1."""
    with np.errstate(divide="ignore"):
        return np.log(pi), np.log1p(-pi)


def mixture_loglike(log_hvs, log_bg, pi) -> np.ndarray:
    """Per-star log-likelihood of the mixture, ``log(π p_hvs + (1 - π) p_bg)``.

    Parameters
    ----------
    log_hvs : array of shape (W, n)
        log p_hvs of every star for each of W parameter points.
    log_bg : array of shape (n,)
        log p_bg of every star.
    pi : array broadcastable to (W, n)
        Prior probability that each star is a hypervelocity star, in [0, 1].
    """
    lp, l1p = _log_pi(np.asarray(pi, dtype=float))
    return np.logaddexp(lp + log_hvs, l1p + np.asarray(log_bg)[None, :])


def membership(log_hvs, log_bg, pi) -> np.ndarray:
    """Probability that each star is a hypervelocity star given its velocity (Bayes' rule),
    ``π p_hvs / (π p_hvs + (1 - π) p_bg)``, same shapes as :func:`mixture_loglike`."""
    lp, l1p = _log_pi(np.asarray(pi, dtype=float))
    a = lp + log_hvs
    b = l1p + np.asarray(log_bg)[None, :]
    with np.errstate(invalid="ignore"):
        r = np.exp(a - np.logaddexp(a, b))
    return np.where(np.isnan(r), 0.0, r)  # NaN only where both densities vanish


def prior_membership(catalog, ids, column: str) -> np.ndarray:
    """Each star's own prior probability of being a hypervelocity star, from a catalog column
    (e.g. one written by a back-trace), for the stars ``ids`` (the fit's, in its order); NaN
    where the column is empty (the star then takes the fit's ``f``).

    Raises ValueError naming the file, row and column for a value outside [0, 1], and when the
    column is absent.
    """
    extra = getattr(catalog, "extra", {}) or {}
    if column not in extra:
        raise ValueError(f"{catalog.source}: no column {column!r} of prior memberships"
                         f"{did_you_mean(column, list(extra))}; the catalog's other columns: "
                         f"{', '.join(sorted(extra)) or 'none'}")
    try:
        vals = np.asarray(np.ma.filled(np.ma.asarray(extra[column], dtype=float), np.nan), dtype=float)
    except (TypeError, ValueError):
        raise ValueError(f"{catalog.source}: column {column!r}: expected probabilities in [0, 1] (numbers), "
                         f"got {np.asarray(extra[column]).dtype}") from None
    bad = np.flatnonzero(np.isfinite(vals) & ((vals < 0) | (vals > 1)) | np.isinf(vals))
    if bad.size:
        i = int(bad[0])
        row = int(catalog.rows[i])
        raise ValueError(f"{catalog.source}: row {row}, column {column!r}: expected a probability in [0, 1] "
                         f"(or empty), got {vals[i]!r}")
    where = {str(s): j for j, s in enumerate(catalog.ids)}
    return np.array([vals[where[str(i)]] for i in ids], dtype=float)


def draw_halo_velocities(pos, rng, sigma=HALO_SIGMA, outgoing: bool = True) -> np.ndarray:
    """Galactocentric velocities (n, 3), km/s, of halo stars at positions ``pos`` (n, 3), kpc,
    drawn from the velocity ellipsoid (zero mean, dispersions ``sigma`` along the spherical
    unit vectors e_r, e_θ, e_φ), truncated to v_r > 0 when ``outgoing`` (for mock catalogs)."""
    s = _check_sigma(sigma)
    pos = np.atleast_2d(np.asarray(pos, dtype=float))
    n = pos.shape[0]
    v = rng.standard_normal((n, 3)) * s
    if outgoing:
        v[:, 0] = np.abs(v[:, 0])  # the half-normal: a zero-mean Gaussian truncated to v_r > 0
    x, y, z = pos.T
    R = np.hypot(x, y)
    r = np.sqrt(R * R + z * z)
    Rs = np.where(R > 0, R, 1.0)
    e_r = pos / r[:, None]
    e_th = np.stack([z * x / (Rs * r), z * y / (Rs * r), -R / r], 1)
    e_ph = np.stack([-y / Rs, x / Rs, np.zeros(n)], 1)
    return v[:, :1] * e_r + v[:, 1:2] * e_th + v[:, 2:] * e_ph


def add_membership_column(table, like, post, res, n_draws: int = 200, seed: int = 0) -> None:
    """Add ``p_hvs`` to a fit's stars table (``stars.ecsv``, rows matched by ``id``): each
    used star's posterior mean probability of being a hypervelocity star,
    ``E[π p_hvs / (π p_hvs + (1 - π) p_bg)]`` over up to ``n_draws`` posterior draws of ``res``
    (a :class:`swerve.sampling.SamplerResult`, its weights honoured) under the likelihood
    ``like`` (with a background) and the posterior ``post`` (for the fixed parameters); NaN for
    excluded stars."""
    rng = np.random.default_rng(seed)
    w = res.weights
    n = min(int(n_draws), len(res.samples), int(np.count_nonzero(w)) if w is not None else len(res.samples))
    draws = res.samples[rng.choice(len(res.samples), size=n, replace=False, p=w)]
    mem = np.mean(like.membership(post.full(draws)), axis=0)
    where = {str(i): j for j, i in enumerate(like.stars.ids)}
    table["p_hvs"] = np.array([mem[where[str(i)]] if str(i) in where else np.nan for i in table["id"]], dtype=float)
    table["p_hvs"].description = ("posterior mean probability that the star is a hypervelocity star rather than a "
                                  "halo star (the mixture of [likelihood] background)")
