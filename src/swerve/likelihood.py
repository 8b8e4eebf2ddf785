"""The likelihood of a catalog given emulated summaries: every star's errors, exactly.

Model
-----
In each position cell ``c`` of the summaries (:mod:`swerve.summaries`) the emulator predicts the
mean ``μ_c(θ)`` and covariance ``Σ_c(θ)`` of the three velocity components
``u = (v_r, v_θ·sign z, v_φ·sign xy)`` of the selected population.  A star's likelihood is the
density of its *true* velocity at its *true* position, marginalised over its measurement errors
(Hogg, Myers & Bovy 2010, ApJ 725, 2166):

* the position uncertainty (distance, from the parallax or a distance measurement) is
  marginalised by importance sampling over K distance samples per star
  (:func:`swerve.measurement.draw_samples`), with their θ-independent weights (distance prior and
  the Jacobian ``J(d) = (κ d)²`` of the map from (pmra, pmdec, vlos) to velocity);
* at each distance sample the velocity uncertainty is marginalised **analytically**: the
  measured proper motions (conditional on the sampled parallax, so that parallax–proper-motion
  correlations hold) and line-of-sight velocity map linearly to a Gaussian in ``u`` with mean
  ``m_ik`` and covariance ``C_ik``, so ``∫ N(u; μ_c, Σ_c) N(m_ik; u, C_ik) du =
  N(m_ik; μ_c, Σ_c + C_ik)``.  The tangential signal is a few km/s against errors of tens of
  km/s, where Monte Carlo over velocity samples would be hopelessly noisy; the analytic form has
  no such noise.

so that

    log L_i(θ) = log Σ_k w_ik N(m_ik; μ_c(ik)(θ), Σ_c(ik)(θ) + C_ik),   Σ_k w_ik = 1,

**With a v_r histogram** (emulators trained with ``[summaries] vr_edges``, e.g.
``training/histogram.toml``) the radial velocity is not modelled as Gaussian: v_r in a cell inherits the
launch-speed distribution (skewness up to 1.8, excess kurtosis from -1.1 to +3, nothing below
0), and a Gaussian quasi-likelihood misstates how much a catalog's v_r tell about the disk mass
and the launch slope. The cell's density is then the emulated histogram of v_r times the cell
Gaussian's tangential components conditional on v_r,
``p(u) = h_c(u_r) N(u_⊥; μ_⊥ + b (u_r - μ_r), S)``, and each sample's term is

    w_ik  p̃_c(m_r)  N(r_ik; (b - κ) δ, M_ik),    r_ik = m_⊥ - μ_⊥ - b (m_r - μ_r),

with ``p̃_c`` the histogram convolved exactly with the sample's v_r error (θ-independent bin
masses, precomputed), ``M = S + Var(e_⊥ - b e_r)`` the residual's covariance and, within a few
errors of a bin edge, the first two moments of the true v_r given the step in the histogram
(``δ``, and the variance added to ``M``; :func:`_term_cond`). This is exact when the histogram
is flat over the v_r error (a few km/s against 200 km/s bins) and agrees with quadrature of the
exact convolution to a few 1e-3 in log L near the edges (``tests/test_vr_histogram.py``).

where the sum runs over the samples inside the emulator's cells (the model is conditional on
the star lying inside the selection volume). The emulator's own uncertainty in the cell means
is one error shared by all stars, so it is marginalised at the level of the catalog, not star by
star: ``log L(θ) = Σ_i log L_i(θ) + Δ(θ)`` with ``Δ`` the Gaussian integral over that error
(:class:`Likelihood`, ``emulator_error``). Everything that does not depend on θ (cells,
``m_ik``, ``C_ik``, ``w_ik``) is computed once, in :func:`prepare_stars`; one likelihood call
is one emulator prediction, one compiled loop (vectorised over blocks of 16 walkers, parallel
over those blocks and chunks of stars), and one small dense solve per walker.

Stars outside the emulator's selection are never silently used: a star with less than half of
its sample weight inside the cells, moving inward (v_r < 0), or (with ``vlos_min``) measured below
the selection's line-of-sight velocity cut, is excluded and reported.

Selection on measured velocities
--------------------------------
A survey that keeps the stars whose *measured* heliocentric line-of-sight velocity
``y = vlos + e`` exceeds ``c`` (``[selection] vlos_min``; ``e ~ N(0, σ²)``, the star's vlos
error) truncates each star's error distribution. With ``s = a·u + b`` the true vlos (a linear
projection of the folded velocity: ``a`` the line of sight in the star's folded basis, ``b`` the
Sun's velocity along it, ``-n̂·v_sun``) and ``f`` the cell's velocity density *without* the cut,
the exact density of a kept star is

    p(m | x, θ, kept) = (f ⊗ N_C)(m) 1[y ≥ c] / Z,    Z = ∫ f(u) Φ((s(u) - c) / σ) du,

``N_C`` the star's measurement errors (``m``: its measured velocity; ``y`` a linear function of
it). The emulator is trained with the cut on the **true** value (the training population has no
errors), so it models ``g = f 1[s ≥ c] / F``, ``F = P_f(s ≥ c)``. Writing
``f = F g + f 1[s < c]``:

* ``Z = F + O(σ² f'(c))``: as many stars scatter into the selection as out of it, to first
  order (``∫ f (Φ((s - c)/σ) - 1[s ≥ c]) ds = -σ² f'(c) / 2 + O(σ⁴)``);
* the stars scattered in add ``(f 1[s < c] ⊗ N_C)(m) = (g ⊗ N_C)(m) F r(y)``, nonzero within a
  few σ of the cut, with ``r(y) = Φ((c - y)/σ) / Φ((y - c)/σ)`` up to ``O(σ f'/f)``: a factor
  that does not depend on θ to leading order.

So ``log p = log (g ⊗ N_C)(m) + (terms free of θ) + O(σ²)``: **the plain likelihood of an
emulator trained with the same cut on the true value is the truncated likelihood to first order
in the vlos error**, at no cost per call. This is swerve's scheme: train with
``[selection] vlos_min = c``, fit with ``Likelihood(..., vlos_min=c)`` (which checks the
emulator's cut) and stars from ``prepare_stars(..., vlos_min=c)`` (which excludes stars measured
below it). The term neglected is second order: near the cut the kept stars' vlos errors are
biased upward by about ``σ² f(c) / F``, and the tangential errors correlated with them
(regression ``κ`` of each tangential error on the vlos error, the line of sight's projection on
``e_θ``, ``e_φ``: of order r_sun / d, with signs that cancel around the sky) shift a star's
measured deflection by ``(κ - β) σ² f(c) / F`` (``β``: the cell's own regression on v_r).

Two alternatives were measured and rejected (``benchmarks/observed_cut.py``, RESULTS.md
"Selection on measured velocities"): dividing each star's density by ``P(y ≥ c | x, θ)``
computed under the trained cell Gaussian convolved with the star's error counts the truncation
twice (the cell model already holds the cut: under exact densities it keeps the stars scattered
out but not those scattered in, an O(σ) error; under the cell Gaussian, fitted to a truncated
population, its mass below ``c`` is of order one) and moved the launch slope by 3.4 posterior
standard deviations at every vlos error tried (0.01-100 km/s); with an emulator trained
*without* the cut the same normaliser would be exact only if the uncut cell distribution were
Gaussian, and the v_r of hypervelocity stars spans 300-3000 km/s with the cut in its bulk (slope
off by 5-6 and q_z by 3-5 standard deviations). With the plain likelihood and the emulator
trained with the cut, 43 of 48 95% intervals held the truth, and the medians at σ = 10 and 100
km/s moved by under half a standard deviation from those of a cut on the true value. A catalog
fitted with an emulator unaware of the cut is biased far more (slope at the bound of its range):
:func:`swerve.selection.check_declared` refuses a catalog whose declared selection differs from
the emulator's.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass, field

import numpy as np
from scipy.linalg import solve_triangular
from scipy.special import ndtr

from .background import BACKGROUNDS, HALO_SIGMA, MIXTURE_PARAMETER, halo_log_density, membership, mixture_loglike
from .frames import PM_KMS_PER_KPC_MASYR, affine_map, helio_to_galacto
from .likelihood_kernels import _cell_gaussians_tri, _half_quad_minus_logdet, _run_kernels
from .summaries import (
    N_STAT,
    VR_FRACTION_FLOOR,
    VR_FRACTION_MIN,
    SummarySpec,
    stats_to_gaussian,
    stats_to_vr_density,
)


# ------------------------------------------------------------------ θ-independent star terms
@dataclass
class StarTerms:
    """Precomputed, θ-independent terms of the stars used in a fit (plain arrays).

    Attributes
    ----------
    ids : array (n,)
    cell : int array (n, k)
        Summary cell of each distance sample (-1 outside every cell).
    mean : array (n, k, 3)
        Mean of the star's folded velocity components ``u`` at each sample, km/s.
    cov : array (n, k, 3, 3)
        Measurement covariance of ``u`` at each sample, (km/s)².
    log_w : array (n, k)
        Normalised log weights of the samples inside the cells (-inf outside).
    excluded : list of dict
        Stars left out, each with ``id``, ``row`` and ``reason``.
    prior_membership : array (n,) or None
        Each star's own prior probability of being a hypervelocity star, for a fit with a
        background population (:mod:`swerve.background`); NaN (or None for all) where the star
        takes the fit's fraction ``f_hvs``.
    """

    ids: np.ndarray
    cell: np.ndarray
    mean: np.ndarray
    cov: np.ndarray
    log_w: np.ndarray
    excluded: list = field(default_factory=list)
    prior_membership: np.ndarray | None = None

    @property
    def n(self) -> int:
        return int(self.ids.shape[0])

    def concat(self, other: StarTerms) -> StarTerms:
        """These stars and ``other``'s (same k): a refit after adding stars reuses both."""
        if other.cell.shape[1] != self.cell.shape[1]:
            raise ValueError(f"stars: expected {self.cell.shape[1]} samples per star, got {other.cell.shape[1]}")
        dup = set(map(str, self.ids)) & set(map(str, other.ids))
        if dup:
            raise ValueError(f"stars: id {sorted(dup)[0]!r} is already in the fit")
        return StarTerms(
            np.concatenate([self.ids, other.ids]),
            np.concatenate([self.cell, other.cell]),
            np.concatenate([self.mean, other.mean]),
            np.concatenate([self.cov, other.cov]),
            np.concatenate([self.log_w, other.log_w]),
            self.excluded + other.excluded,
            None if self.prior_membership is None and other.prior_membership is None else
            np.concatenate([self._prior_or_nan(), other._prior_or_nan()]),
        )

    def _prior_or_nan(self) -> np.ndarray:
        return np.full(self.n, np.nan) if self.prior_membership is None else np.asarray(self.prior_membership, float)

    def subset(self, keep) -> StarTerms:
        keep = np.asarray(keep)
        return StarTerms(self.ids[keep], self.cell[keep], self.mean[keep], self.cov[keep], self.log_w[keep],
                         list(self.excluded),
                         None if self.prior_membership is None else np.asarray(self.prior_membership)[keep])


def _folding_basis(pos):
    """Rows (e_r, e_θ·sign z, e_φ·sign xy) at positions (..., 3): array (..., 3, 3)."""
    x, y, z = pos[..., 0], pos[..., 1], pos[..., 2]
    R = np.hypot(x, y)
    r = np.sqrt(R * R + z * z)
    Rs = np.where(R > 0, R, 1.0)
    sz = np.where(z >= 0, 1.0, -1.0)
    sxy = np.where(x * y >= 0, 1.0, -1.0)
    B = np.empty(pos.shape[:-1] + (3, 3))
    B[..., 0, 0], B[..., 0, 1], B[..., 0, 2] = x / r, y / r, z / r
    B[..., 1, 0] = sz * z * x / (Rs * r)
    B[..., 1, 1] = sz * z * y / (Rs * r)
    B[..., 1, 2] = -sz * R / r
    B[..., 2, 0] = -sxy * y / Rs
    B[..., 2, 1] = sxy * x / Rs
    B[..., 2, 2] = 0.0
    return B


def velocity_moments(catalog, samples, solar=None):
    """Galactocentric velocity mean (n, k, 3) and covariance (n, k, 3, 3) of each star at each of
    its distance samples, from its measured proper motions (conditional on the sampled parallax
    where the distance comes from the parallax) and line-of-sight velocity.

    The map ``(vlos, pmra, pmdec) -> v = R [r̂, κ d ê_α, κ d ê_δ] (vlos, pmra, pmdec)ᵀ + w`` is
    linear at fixed distance (:func:`swerve.frames.affine_map`), so the moments are exact.
    """
    rot, _t, w_sun = affine_map(solar if solar is not None else samples.settings.get("solar"))
    n, k = samples.distance.shape
    ra = np.radians(catalog.ra)
    dec = np.radians(catalog.dec)
    rhat = np.stack([np.cos(dec) * np.cos(ra), np.cos(dec) * np.sin(ra), np.sin(dec)], -1)
    e_a = np.stack([-np.sin(ra), np.cos(ra), np.zeros_like(ra)], -1)
    e_d = np.stack([-np.sin(dec) * np.cos(ra), -np.sin(dec) * np.sin(ra), np.cos(dec)], -1)

    # proper-motion moments at each sample: conditional on the parallax for parallax stars
    mu = np.stack([catalog.pmra, catalog.pmdec], -1)
    s1, s2 = catalog.pmra_err, catalog.pmdec_err
    cmm = np.empty((n, 2, 2))
    cmm[:, 0, 0], cmm[:, 1, 1] = s1**2, s2**2
    cmm[:, 0, 1] = cmm[:, 1, 0] = catalog.corr_pmra_pmdec * s1 * s2
    pm_mean = np.broadcast_to(mu[:, None, :], (n, k, 2)).copy()
    pm_cov = np.broadcast_to(cmm[:, None], (n, k, 2, 2)).copy()
    fp = np.asarray(samples.from_parallax, dtype=bool)
    if fp.any():
        sp = catalog.parallax_err[fp]
        c_pw = np.stack([catalog.corr_parallax_pmra[fp] * sp * s1[fp],
                         catalog.corr_parallax_pmdec[fp] * sp * s2[fp]], -1)
        gain = c_pw / (sp**2)[:, None]
        plx_k = 1.0 / samples.distance[fp]
        pm_mean[fp] = mu[fp, None, :] + gain[:, None, :] * (plx_k - catalog.parallax[fp][:, None])[:, :, None]
        pm_cov[fp] = (cmm[fp] - c_pw[:, :, None] * c_pw[:, None, :] / (sp**2)[:, None, None])[:, None]

    kd = PM_KMS_PER_KPC_MASYR * samples.distance  # (n, k)
    # Jacobian columns in ICRS, then rotated: G (n, k, 3, 3) acting on (vlos, pmra, pmdec)
    G = np.empty((n, k, 3, 3))
    G[..., :, 0] = (rhat @ rot.T)[:, None, :]
    G[..., :, 1] = kd[..., None] * (e_a @ rot.T)[:, None, :]
    G[..., :, 2] = kd[..., None] * (e_d @ rot.T)[:, None, :]
    obs_mean = np.concatenate([np.broadcast_to(catalog.vlos[:, None, None], (n, k, 1)), pm_mean], -1)
    obs_cov = np.zeros((n, k, 3, 3))
    obs_cov[..., 0, 0] = (catalog.vlos_err**2)[:, None]
    obs_cov[..., 1:, 1:] = pm_cov
    v_mean = np.einsum("nkij,nkj->nki", G, obs_mean) + w_sun
    v_cov = G @ obs_cov @ np.swapaxes(G, -1, -2)
    return v_mean, v_cov


def _distance_stratum_cov(catalog, samples, solar, u_mean):
    """Covariance (n, k, 3, 3) of the folded velocity within each sample's distance stratum
    (see :func:`prepare_stars`)."""
    d = samples.distance
    order = np.argsort(d, axis=1)
    ds = np.take_along_axis(d, order, axis=1)
    gaps = np.diff(ds, axis=1)
    spacing = np.empty_like(ds)
    spacing[:, 1:-1] = 0.5 * (gaps[:, 1:] + gaps[:, :-1])
    spacing[:, 0] = gaps[:, 0]
    spacing[:, -1] = gaps[:, -1]
    var = np.empty_like(ds)
    np.put_along_axis(var, order, spacing**2 / 12.0, axis=1)
    g = _velocity_gradient(catalog, samples, solar)
    return g[..., :, None] * g[..., None, :] * var[..., None, None]


def linearised_samples(catalog, samples, solar=None):
    """Collapse each star's distance samples to one point: the weighted mean distance, with the
    weighted distance variance kept in ``samples.settings["distance_var"]`` for
    :func:`prepare_stars` to propagate linearly into the velocity (see its ``distance``).

    Returns a new ErrorSamples with k = 1.
    """
    w = np.exp(samples.log_prior - samples.log_prior.max(axis=1, keepdims=True))
    w /= w.sum(axis=1, keepdims=True)
    d_mean = np.sum(w * samples.distance, axis=1)
    d_var = np.sum(w * (samples.distance - d_mean[:, None]) ** 2, axis=1)
    pos, _ = helio_to_galacto(catalog.ra, catalog.dec, d_mean, 0.0, 0.0, 0.0,
                              solar=solar if solar is not None else samples.settings.get("solar"))
    one = lambda a: np.asarray(a)[:, None]  # noqa: E731
    settings = dict(samples.settings, distance_var=d_var.tolist(), distance_method="linear")
    return dataclasses.replace(
        samples, position=pos[:, None, :], velocity=np.full((catalog.n, 1, 3), np.nan),
        log_weight=one(2.0 * np.log(PM_KMS_PER_KPC_MASYR * d_mean)), log_jacobian=one(np.zeros(catalog.n)),
        log_prior=one(np.zeros(catalog.n)), distance=one(d_mean), pmra=one(catalog.pmra), pmdec=one(catalog.pmdec),
        vlos=one(catalog.vlos), settings=settings,
    )


def smoothed_samples(catalog, samples, solar=None):
    """Kernel-smoothed distance samples: each star's K samples are shrunk toward their mean so
    that, with a Gaussian kernel of bandwidth ``h = σ_d K^(-1/5)`` (Silverman's rule) around each,
    the mixture keeps the sampled mean and variance; :func:`prepare_stars` then propagates the
    kernel's variance ``h²`` linearly into each sample's velocity covariance. As K grows, h -> 0
    and the sum tends to plain importance sampling; for small K the density along each star's
    line of sight is smooth instead of K spikes.
    """
    w = np.exp(samples.log_prior - samples.log_prior.max(axis=1, keepdims=True))
    w /= w.sum(axis=1, keepdims=True)
    n, k = samples.distance.shape
    d_mean = np.sum(w * samples.distance, axis=1, keepdims=True)
    var = np.sum(w * (samples.distance - d_mean) ** 2, axis=1, keepdims=True)
    h2 = var * k ** (-0.4)
    shrink = np.sqrt(np.clip(1.0 - h2 / np.where(var > 0, var, 1.0), 0.0, 1.0))
    d_new = d_mean + (samples.distance - d_mean) * shrink
    d_new = np.maximum(d_new, 1e-6)
    pos, _ = helio_to_galacto(np.repeat(catalog.ra, k), np.repeat(catalog.dec, k), d_new.ravel(), 0.0, 0.0, 0.0,
                              solar=solar if solar is not None else samples.settings.get("solar"))
    settings = dict(samples.settings, distance_var=np.broadcast_to(h2, (n, k)).tolist(), distance_method="smoothed")
    return dataclasses.replace(samples, distance=d_new, position=pos.reshape(n, k, 3),
                               log_jacobian=2.0 * np.log(PM_KMS_PER_KPC_MASYR * d_new),
                               log_weight=samples.log_prior + 2.0 * np.log(PM_KMS_PER_KPC_MASYR * d_new),
                               settings=settings)


def _velocity_gradient(catalog, samples, solar):
    """du/dd (n, k, 3) of the folded velocity at each sample, by a central difference along the
    line of sight."""
    d = samples.distance
    n, k = d.shape
    eps = 1e-3 * d
    ra = np.repeat(catalog.ra, k)
    dec = np.repeat(catalog.dec, k)
    out = []
    for sign in (1.0, -1.0):
        dd = d + sign * eps
        pos, _ = helio_to_galacto(ra, dec, dd.ravel(), 0.0, 0.0, 0.0, solar=solar if solar is not None
                                  else samples.settings.get("solar"))
        shifted = dataclasses.replace(samples, distance=dd, position=pos.reshape(n, k, 3))
        vm, _ = velocity_moments(catalog, shifted, solar)
        out.append(np.einsum("nkij,nkj->nki", _folding_basis(shifted.position), vm))
    return (out[0] - out[1]) / (2.0 * eps[..., None])


def prepare_stars(catalog, samples, spec: SummarySpec, solar=None, min_inside: float = 0.5,
                  r_min: float | None = None, allow_empty: bool = False,
                  stratum_variance: bool = True, vlos_min: float | None = None) -> StarTerms:
    """The θ-independent terms of every usable star; stars outside the selection are excluded
    and listed in ``StarTerms.excluded`` (never silently used).

    Parameters
    ----------
    catalog : swerve.catalog.Catalog
    samples : swerve.measurement.ErrorSamples
        Distance samples of the same stars (``draw_samples(catalog, k, rng, ...)``).
    spec : SummarySpec
        The emulator's summary definition (its cells).
    min_inside : float
        Smallest fraction of a star's sample weight inside the cells for it to be used.
    r_min : float, optional
        A stricter minimum galactocentric radius (kpc) than the cells': samples inside it are
        treated as outside the selection.
    allow_empty : bool
        Return an empty StarTerms (with the reasons in ``excluded``) instead of raising when no
        star is usable.
    stratum_variance : bool
        Treat each distance sample as the centre of its stratum of the star's distance
        distribution and add the velocity spread within that stratum, propagated linearly
        (``g gᵀ σ_k²`` with ``g = du/dd`` by finite differences and ``σ_k² = Δ_k² / 12`` from the
        spacing Δ_k of the sorted samples). Without it the folded velocity at a sample is
        exact for that distance, and with precise proper motions each sample's density is a
        narrow spike: K samples of a 10% distance error then spread a star's velocity by tens
        of km/s against an intrinsic width of a few, and the importance sum is dominated by
        whichever sample lands closest (measured: fits of 100-star mocks with 10% distances and
        precise proper motions ran into the corners of the domain). With it, the sum is a
        smooth mixture that tends to the exact marginal as K grows.
    vlos_min : float, optional
        The selection's cut on the measured heliocentric line-of-sight velocity, km/s (the
        emulator's ``[selection] vlos_min``): a star whose measured vlos lies below it is
        excluded (it is outside the selection the emulator models; see "Selection on measured
        velocities" in the module docstring).
    """
    if samples.n != catalog.n:
        raise ValueError(f"samples: expected {catalog.n} stars (the catalog's), got {samples.n}")
    pos = samples.position
    cell = spec.cell_index(pos)
    r_lo = spec.r_edges[0]
    if r_min is not None and r_min > r_lo:
        cell = np.where(np.linalg.norm(pos, axis=-1) < r_min, -1, cell)
        r_lo = r_min
    v_mean, v_cov = velocity_moments(catalog, samples, solar)
    B = _folding_basis(pos)
    u_mean = np.einsum("nkij,nkj->nki", B, v_mean)
    u_cov = B @ v_cov @ np.swapaxes(B, -1, -2)
    if samples.settings.get("distance_method") in ("linear", "smoothed"):
        g = _velocity_gradient(catalog, samples, solar)
        dv = np.asarray(samples.settings["distance_var"], dtype=float)
        dv = dv[:, None] if dv.ndim == 1 else dv
        u_cov = u_cov + g[..., :, None] * g[..., None, :] * dv[..., None, None]
    elif stratum_variance and samples.k > 1:
        u_cov = u_cov + _distance_stratum_cov(catalog, samples, solar, u_mean)
    lw = samples.log_weight - np.max(samples.log_weight, axis=1, keepdims=True)
    w = np.exp(lw)
    w /= w.sum(axis=1, keepdims=True)
    inside = np.where(cell >= 0, w, 0.0).sum(axis=1)
    vr_mean = np.sum(w * u_mean[..., 0], axis=1)
    excluded = []
    keep = np.ones(catalog.n, dtype=bool)
    for i in range(catalog.n):
        reason = None
        if inside[i] < min_inside:
            r_med = float(np.median(np.linalg.norm(pos[i], axis=-1)))
            reason = (f"only {100 * inside[i]:.0f}% of its distance samples lie inside the emulator's cells "
                      f"(r in [{r_lo:g}, {spec.r_edges[-1]:g}] kpc; median r = {r_med:.1f} kpc)")
        elif vr_mean[i] <= 0:
            reason = f"it moves inward (v_r = {vr_mean[i]:.0f} km/s); the emulator models outgoing stars"
        elif vlos_min is not None and not catalog.vlos[i] >= vlos_min:
            reason = (f"its measured vlos = {catalog.vlos[i]:.0f} km/s is below the selection's vlos_min = "
                      f"{vlos_min:g} km/s; the emulator models stars selected above it")
        elif spec.vr_edges and vr_mean[i] >= spec.vr_edges[-1]:
            reason = (f"its v_r = {vr_mean[i]:.0f} km/s lies beyond the emulator's v_r histogram "
                      f"(0-{spec.vr_edges[-1]:g} km/s)")
        if reason:
            keep[i] = False
            excluded.append({"id": str(catalog.ids[i]), "row": int(catalog.rows[i]), "reason": reason})
    w_in = np.where(cell >= 0, w, 0.0)
    with np.errstate(divide="ignore", invalid="ignore"):
        log_w = np.log(w_in / np.maximum(w_in.sum(axis=1, keepdims=True), 1e-300))
    terms = StarTerms(np.asarray(catalog.ids), cell, u_mean, u_cov, log_w, excluded)
    out = terms.subset(keep)
    out.excluded = excluded
    if out.n == 0 and not allow_empty:
        raise ValueError(
            f"{catalog.source}: no star is usable inside the emulator's selection "
            f"({len(excluded)} excluded; first: {excluded[0]['id']!r}: {excluded[0]['reason']})"
        )
    return out


# ------------------------------------------------------------------------ compiled kernel -----
@dataclass
class _Packed:
    """Samples grouped into (star, cell) segments, structure-of-arrays, for the kernel."""

    seg_cell: np.ndarray
    seg_start: np.ndarray
    seg_star: np.ndarray
    n_star: int
    cols: tuple  # m0, m1, m2, c00, c10, c11, c20, c21, c22, w
    chunk: np.ndarray  # segment indices starting each group of whole stars (parallel tasks)
    vstart: np.ndarray  # first v_r histogram bin each sample's window covers (n_samples,)
    vcount: np.ndarray  # bins of the window the sample needs (n_samples,)
    vbeta: np.ndarray  # (n_samples, K): the sample's v_r error mass in each bin of its window
    vgamma: np.ndarray  # (n_samples, K): the first moment of that error in each bin (see _vr_window)
    vgamma2: np.ndarray  # (n_samples, K): its second moment in each bin
    kap1: np.ndarray  # (n_samples,): regression of the sample's v_tf error on its v_r error
    kap2: np.ndarray  # (n_samples,): the same for v_pf
    cond: float  # 1: v_r from the histogram, tangential components conditional on it; 0: joint Gaussian


#: groups of whole stars the kernels split a catalog into, as parallel tasks (with the walker
#: blocks); more than the cores of a laptop, so the tasks balance
_N_CHUNKS = 16


def _vr_window(m_r, var_r, vr_edges, tol: float = 1e-10):
    """Each sample's v_r histogram window: first bin (n,), ``β`` (n, K) and ``γ`` (n, K).

    ``β_q`` is the mass of the sample's Gaussian v_r error (mean ``m_r``, variance ``var_r``) in
    bin ``start + q``, so that the histogram density convolved with the error is exactly
    ``p̃ = Σ_q β_q dens_(start+q)`` (``dens`` per km/s,
    :func:`swerve.summaries.stats_to_vr_density`). ``γ_q = ∫_bin (u - m_r) N(u; m_r, var_r) du``,
    so that ``δ = Σ_q γ_q dens_q / p̃`` is the shift of the true v_r from the measured one given
    the histogram (nonzero within a few errors of a bin edge, where the density steps);
    ``γ2_q = ∫_bin (u - m_r)² N(u; m_r, var_r) du`` likewise gives that shift's variance,
    ``Σ_q γ2_q dens_q / p̃ - δ²`` (``var_r`` away from the edges). Bins holding less than ``tol``
    of the mass are left out; K is the widest window any sample needs, ``count`` (n,) the bins of
    its window each sample needs (the kernels loop over those only: one sample with a wide v_r
    error must not make every sample pay for K bins). Returns (start, count, β, γ, γ2)."""
    e = np.asarray(vr_edges, dtype=float)
    sd = np.sqrt(np.maximum(var_r, 0.0))[:, None]
    with np.errstate(divide="ignore", invalid="ignore"):
        z = (e[None, :] - m_r[:, None]) / np.where(sd > 0, sd, 1.0)
    cdf = np.where(sd > 0, ndtr(z), (e[None, :] > m_r[:, None]).astype(float))
    mass = np.diff(cdf, axis=1)  # (n, nb)
    hit = mass > tol
    nb = mass.shape[1]
    first = np.where(hit.any(axis=1), np.argmax(hit, axis=1), 0)
    last = np.where(hit.any(axis=1), nb - 1 - np.argmax(hit[:, ::-1], axis=1), 0)
    K = int(np.max(last - first + 1)) if len(first) else 1
    start = np.minimum(first, nb - K)
    count = (np.maximum(last, first) - start + 1).astype(np.int64)  # bins of the window each sample needs
    idx = start[:, None] + np.arange(K)[None, :]
    beta = np.take_along_axis(mass, idx, axis=1)
    with np.errstate(invalid="ignore"):
        phi = np.where(sd > 0, np.exp(-0.5 * z * z) / np.sqrt(2 * np.pi) * sd, 0.0)  # σ² N(e; m, σ²)
    gamma = np.take_along_axis(phi[:, :-1] - phi[:, 1:], idx, axis=1)
    with np.errstate(invalid="ignore"):
        xphi = np.where(np.isfinite(z), z * phi * sd, 0.0)  # σ² x N(x; 0, σ²) at x = e - m
    gamma2 = np.take_along_axis(sd * sd * mass - (xphi[:, 1:] - xphi[:, :-1]), idx, axis=1)
    return (start.astype(np.int64), count, np.ascontiguousarray(beta), np.ascontiguousarray(gamma),
            np.ascontiguousarray(gamma2))


def _pack(stars: StarTerms, vr_edges=()) -> _Packed:
    n, k = stars.cell.shape
    inside = (stars.cell >= 0) & np.isfinite(stars.log_w)
    star_idx = np.repeat(np.arange(n), k).reshape(n, k)[inside]
    cell = stars.cell[inside]
    order = np.lexsort((cell, star_idx))
    star_idx, cell = star_idx[order], cell[order]
    mean = stars.mean[inside][order]
    cov = stars.cov[inside][order]
    w = np.exp(stars.log_w[inside][order])
    key = star_idx * (cell.max() + 1 if len(cell) else 1) + cell
    brk = np.flatnonzero(np.diff(key)) + 1
    starts = np.concatenate([[0], brk, [len(key)]]).astype(np.int64)
    cols = tuple(np.ascontiguousarray(a, dtype=float) for a in (
        mean[:, 0], mean[:, 1], mean[:, 2], cov[:, 0, 0], cov[:, 1, 0], cov[:, 1, 1],
        cov[:, 2, 0], cov[:, 2, 1], cov[:, 2, 2], w))
    seg_star = star_idx[starts[:-1]].astype(np.int64)
    # chunks of whole stars with about equal numbers of samples (the kernels' parallel tasks)
    first = np.flatnonzero(np.diff(seg_star, prepend=-1))  # first segment of every star
    n_chunks = min(_N_CHUNKS, len(first))
    cut = np.searchsorted(starts[first], np.arange(1, n_chunks) * (len(key) / n_chunks))
    inner = first[np.clip(cut, 0, len(first) - 1)] if len(first) else np.zeros(0, np.int64)
    chunk = np.unique(np.concatenate([[0], inner, [len(seg_star)]])).astype(np.int64)
    if len(vr_edges):
        vstart, vcount, vbeta, vgamma, vgamma2 = _vr_window(mean[:, 0], cov[:, 0, 0], vr_edges)
        with np.errstate(invalid="ignore", divide="ignore"):
            kap = np.where(cov[:, :1, 0] > 0, cov[:, 1:, 0] / cov[:, :1, 0], 0.0)
        cond = 1.0
    else:  # one dummy bin of density 1: the joint Gaussian alone
        vstart, vcount, vbeta, cond = np.zeros(len(w), np.int64), np.ones(len(w), np.int64), np.ones((len(w), 1)), 0.0
        vgamma, vgamma2 = np.zeros((len(w), 1)), np.zeros((len(w), 1))
        kap = np.zeros((len(w), 2))
    return _Packed(cell[starts[:-1]].astype(np.int64), starts, seg_star, n, cols, chunk, vstart, vcount, vbeta,
                   vgamma, vgamma2, np.ascontiguousarray(kap[:, 0]), np.ascontiguousarray(kap[:, 1]), cond)


# ------------------------------------------------------------------------------ likelihood ----
def check_measured_cut(emulator, vlos_min):
    """``vlos_min`` as a float (or None), after checking that ``emulator`` was trained with the
    same cut on the true vlos (its ``metadata["selection"]``); a one-line ValueError otherwise."""
    if vlos_min is None:
        return None
    try:
        vlos_min = float(vlos_min)
    except (TypeError, ValueError):
        raise ValueError(f"vlos_min: expected a number of km/s, got {vlos_min!r}") from None
    if not np.isfinite(vlos_min):
        raise ValueError(f"vlos_min: expected a finite number of km/s, got {vlos_min!r}")
    meta = getattr(emulator, "metadata", None) or {}
    if not isinstance(meta.get("selection"), dict):
        raise ValueError(f"vlos_min = {vlos_min:g} km/s: the emulator records no selection, so it cannot be "
                         "checked to be trained with that cut; train one with [selection] vlos_min")
    trained = meta["selection"].get("vlos_min")
    if trained is None or abs(float(trained) - vlos_min) > 1e-9 * max(1.0, abs(vlos_min)):
        was = "no vlos_min cut" if trained is None else f"vlos_min = {float(trained):g} km/s"
        raise ValueError(f"vlos_min = {vlos_min:g} km/s: the stars were selected on their measured vlos with "
                         f"this cut but the emulator was trained with {was}; train one with [selection] "
                         f"vlos_min = {vlos_min:g}")
    return vlos_min


EMULATOR_ERROR_MODES = ("catalog", "per-star", "none")

#: km/s added in quadrature to every emulated cell dispersion (see ``Likelihood``'s ``velocity_floor``)
DEFAULT_VELOCITY_FLOOR = 1.0


class Likelihood:
    """Vectorised log-likelihood of a set of stars under an emulator.

    Parameters
    ----------
    emulator : object with ``predict(theta, return_std=True)`` (and ``return_cov=True`` for the
        catalog-level treatment of its error), ``parameter_names``, ``bounds``
        Predicts the summary vector (``spec.n_outputs`` values per θ, in ``spec.output_names()``
        order).
    stars : StarTerms
    spec : SummarySpec
    emulator_error : {"catalog", "per-star", "none"}
        How the emulator's own uncertainty in the cell means enters.

        ``"catalog"`` (default): marginalised once for the whole catalog. The emulator's error
        is one draw shared by every star of a cell (and, through the principal components,
        correlated between cells), so it does not average down with more stars. With the
        catalog's log-likelihood expanded to second order in the 3 × n_cells cell means around
        the emulated ones (gradient ``g`` and Fisher information ``P`` accumulated by the
        compiled kernel) and the emulator's predictive covariance ``E`` of those means, the
        Gaussian integral gives ``log L = log L(μ̂) + ½ gᵀ (P + E⁻¹)⁻¹ g − ½ log det(I + E P)``
        (exact when the stars' densities are Gaussian in the cell mean,
        ``tests/test_likelihood.py``). With a v_r histogram (``spec.vr_edges``) its emulated
        log-fractions join the means in the same integral (:meth:`_histogram_correction`). The
        emulator's error in the cell *covariances* is not propagated.

        ``"per-star"``: the variance of each cell mean is added to every star's density, as if
        each star saw an independent emulator error; too optimistic for large catalogs (kept
        for comparison). ``"none"``: the emulator is taken as exact.
    include_emulator_variance : bool
        False is the same as ``emulator_error="none"`` (kept for older callers).
    emulator_variance : {"ensemble", "per-walker"}
        Where that variance is evaluated. ``"per-walker"``: at every θ (exact; the variance of a
        GP costs O(n_train²) per θ and component, most of a call's time). ``"ensemble"`` (default):
        once per call, at the mean of the walkers passed, and used for all of them: the
        variance changes on the scale of the GP's length scales, far wider than an ensemble
        near convergence (``tests/test_fit.py`` checks the difference); it is recomputed only
        when that mean has moved by more than ``variance_refresh`` of the training range of
        some parameter since the last evaluation (the variance of a GP costs a triangular
        solve with every component's training covariance, several ms).
        In ``"ensemble"`` mode the Fisher information ``P`` of the catalog-level term is also
        taken at the walkers' mean, so that only the gradient ``g`` changes from walker to walker
        (``½ gᵀ (P + E⁻¹)⁻¹ g`` is then one matrix product per walker instead of a Cholesky
        factorisation of a 3 n_cells square matrix, and the compiled kernel skips the Fisher
        sums; benchmarks/RESULTS.md). ``P`` varies with θ on the scale of the cell covariances,
        faster than ``E``: it is recomputed whenever the mean has moved by more than
        ``fisher_refresh`` of a training range. Measured on a converged 768-star posterior:
        the catalog term changes by sd 0.0056 (max 0.0125) in log L from walker to walker
        (``benchmarks/likelihood_profile.py --fisher``). A single θ (the optimiser's) always
        gets both at itself.
    variance_refresh : float
        See above, as a fraction of each parameter's training range.
    fisher_refresh : float
        See above, as a fraction of each parameter's training range.
    velocity_floor : float
        km/s added in quadrature to every emulated cell dispersion (``σ_floor² I`` added to each
        cell's covariance). At fixed position and launch speed the deflection is nearly
        deterministic, so the emulated cell Gaussians are nearly degenerate (their smallest
        standard deviations are 0.01-0.15 km/s in the default emulator) while the real
        distribution inside a cell is not Gaussian on that scale; with precise velocities the
        likelihood is then dominated by a few stars in the tails and the posterior is far too
        narrow and biased (measured by ``benchmarks/velocity_floor.py``: error-free 100-star
        catalogs gave q_z posteriors 0.000-0.008 wide, and in 3 of the 7 halos every median
        missed the true grid value; 52% success overall, 95% with a 1 km/s floor). The floor
        sets the resolution of the model and changes nothing for stars with realistic errors
        (several km/s; the calibration in ``benchmarks/RESULTS.md`` is the same with and
        without it). 0 disables it.
    background : {"none", "halo"}
        ``"halo"``: a mixture; each star is a hypervelocity star with probability ``f_hvs`` (one
        more parameter, appended to the emulator's, bounds [0, 1]; or the star's own
        ``stars.prior_membership``) or a halo star, whose density is the halo's velocity
        ellipsoid at the star's position, marginalised over the same distance samples and
        velocity errors (:mod:`swerve.background`; computed once, θ-independent). Per star
        ``log(π p_hvs(θ) + (1 - π) p_halo)``; in the catalog-level emulator term each star's
        gradient and Fisher information are weighted by its membership (the Fisher information of
        a mixture is approximated by the membership times the star's own). ``"none"``: every star
        is a hypervelocity star.
    halo_sigma : sequence of 3 floats
        The halo's velocity dispersions (σ_r, σ_θ, σ_φ), km/s (default
        :data:`swerve.background.HALO_SIGMA`).
    vlos_min : float, optional
        The cut the stars were selected with on their *measured* heliocentric line-of-sight
        velocity, km/s (a catalog's declared ``selection``). The emulator must have been trained
        with the same cut on the true value (its metadata's ``selection``; refused otherwise, and
        an emulator that records no selection is refused too): with that, the plain likelihood is
        the truncated one to first order in the vlos errors and no per-call term is needed (module
        docstring, "Selection on measured velocities"). The stars should come from
        :func:`prepare_stars` with the same ``vlos_min``, which excludes stars below it. None:
        the stars' selection is not stated (not checked).
    """

    def __init__(self, emulator, stars: StarTerms, spec: SummarySpec, include_emulator_variance: bool = True,
                 emulator_variance: str = "ensemble", variance_refresh: float = 0.25,
                 emulator_error: str = "catalog", velocity_floor: float = DEFAULT_VELOCITY_FLOOR,
                 fisher_refresh: float = 0.02, background: str = "none", halo_sigma=None,
                 vlos_min: float | None = None):
        if emulator_variance not in ("ensemble", "per-walker"):
            raise ValueError(f"emulator_variance: expected 'ensemble' or 'per-walker', got {emulator_variance!r}")
        if emulator_error not in EMULATOR_ERROR_MODES:
            raise ValueError(f"emulator_error: expected one of {', '.join(EMULATOR_ERROR_MODES)}, "
                             f"got {emulator_error!r}")
        if not (np.isfinite(velocity_floor) and velocity_floor >= 0):
            raise ValueError(f"velocity_floor: expected a non-negative number of km/s, got {velocity_floor!r}")
        self.velocity_floor = float(velocity_floor)
        self.vlos_min = check_measured_cut(emulator, vlos_min)
        self.emulator = emulator
        self.stars = stars
        self.spec = spec
        self.emulator_error = emulator_error if include_emulator_variance else "none"
        self.include_emulator_variance = self.emulator_error != "none"
        self.emulator_variance = emulator_variance
        self.variance_refresh = float(variance_refresh)
        self.fisher_refresh = float(fisher_refresh)
        b = np.asarray(emulator.bounds, dtype=float)
        self._lo, self._span = b[:, 0], b[:, 1] - b[:, 0]
        self._cache = {}  # what -> (unit-cube point where computed, value): "sd", "mean_cov_factor"
        self._last_prediction = None  # (theta, emulated summaries) of the last cell model
        self.parameter_names = list(emulator.parameter_names)
        self.n_theta = len(self.parameter_names)
        self.bounds = np.asarray(emulator.bounds, dtype=float)
        if background not in BACKGROUNDS:
            raise ValueError(f"background: expected one of {', '.join(BACKGROUNDS)}, got {background!r}")
        self.background = background
        self.halo_sigma = tuple(float(x) for x in (HALO_SIGMA if halo_sigma is None else halo_sigma))
        self.log_bg = None
        if background == "halo":
            if MIXTURE_PARAMETER in self.parameter_names:
                raise ValueError(f"emulator: a parameter is named {MIXTURE_PARAMETER!r}, the mixture's fraction")
            self.parameter_names.append(MIXTURE_PARAMETER)
            self.bounds = np.vstack([self.bounds, [[0.0, 1.0]]])
            # finite: the kernels are compiled with fastmath (no infinities)
            self.log_bg = np.maximum(halo_log_density(stars.mean, stars.cov, stars.log_w, self.halo_sigma), -1e4)
        pm = stars.prior_membership
        self._prior = None
        if pm is not None and np.any(np.isfinite(pm)):
            pm = np.asarray(pm, dtype=float)
            if background == "none":
                raise ValueError("likelihood: the stars carry prior memberships, but no background population "
                                 "is modelled (background = 'none')")
            if np.any(np.isfinite(pm) & ((pm < 0) | (pm > 1))):
                raise ValueError("likelihood: prior memberships must lie in [0, 1]")
            self._prior = pm
        self._packed = _pack(stars, spec.vr_edges)
        nc = spec.n_cells
        self._mean_idx = (np.arange(nc)[:, None] * N_STAT + np.arange(3)[None, :]).ravel()
        if spec.n_vbins:
            # the stars' expected counts in every (cell, v_r bin): each sample's weight within its
            # star times its v_r error's mass in the bin (θ-independent; for the histogram's
            # emulator error, see _histogram_correction)
            pk = self._packed
            nb = spec.n_vbins
            w_s = pk.cols[-1]
            cell_s = np.repeat(pk.seg_cell, np.diff(pk.seg_start))
            tot = np.maximum(pk.vbeta.sum(axis=1), 1e-300)
            counts = np.zeros((nc, nb))
            for q in range(pk.vbeta.shape[1]):
                ok = q < pk.vcount
                np.add.at(counts, (cell_s[ok], pk.vstart[ok] + q), (w_s * pk.vbeta[:, q] / tot)[ok])
            self._hist_counts = counts
            self._hist_idx = spec.n_gauss + np.arange(nc * nb)

    # ------------------------------------------------------------------------------ mixture
    def _split(self, theta):
        """(emulator parameters (W, d), hypervelocity fraction f (W,) or None) of ``theta``."""
        th = np.atleast_2d(np.asarray(theta, dtype=float))
        want = len(self.parameter_names)
        if th.shape[1] != want:
            raise ValueError(f"likelihood: expected {want} parameters ({', '.join(self.parameter_names)}), "
                             f"got {th.shape[1]}")
        if self.background == "none":
            return th, None
        return th[:, :self.n_theta], th[:, self.n_theta]

    def _pi(self, f) -> np.ndarray:
        """Each star's prior probability of being a hypervelocity star, (W, n_star)."""
        pi = np.broadcast_to(np.clip(f, 0.0, 1.0)[:, None], (len(f), self.stars.n))
        if self._prior is not None:
            pi = np.where(np.isfinite(self._prior)[None, :], self._prior[None, :], pi)
        return pi

    def _mix_off(self, f):
        """log background density plus log prior odds of background, (W, n_star), or None."""
        if f is None:
            return None
        pi = self._pi(f)
        with np.errstate(divide="ignore"):
            return np.log1p(-pi) - np.log(pi) + self.log_bg[None, :]

    def _mix(self, log_hvs, f):
        if f is None:
            return log_hvs
        return mixture_loglike(log_hvs, self.log_bg, self._pi(f))

    def membership(self, theta) -> np.ndarray:
        """Probability that each star is a hypervelocity star given its velocity and ``theta``
        (with ``f_hvs`` last), (W, n_star); ones without a background population."""
        th, f = self._split(theta)
        out = self._evaluate(th, False)[0]
        if f is None:
            return np.ones_like(out)
        return membership(out, self.log_bg, self._pi(f))  # swerve.background.membership, not this method

    # ----------------------------------------------------------------- emulator's uncertainty
    def _cached(self, theta, what, compute):
        """``compute(centre)`` at the walkers' mean, reused while the mean stays within
        ``variance_refresh`` of the training range (the "ensemble" evaluation)."""
        centre = theta.mean(axis=0, keepdims=True)
        u = (centre[0] - self._lo) / self._span
        hit = self._cache.get(what)
        if hit is None or np.max(np.abs(u - hit[0])) > self.variance_refresh:
            hit = self._cache[what] = (u, compute(centre))
        return hit[1]

    def _mean_cov_factor(self, theta):
        """Cholesky factor of the emulator's predictive covariance of the cell means,
        (W or 1, 3 n_cells, 3 n_cells)."""
        idx = self._mean_idx

        def factor(th):
            try:
                _, cov = self.emulator.predict(th, return_cov=True)
            except TypeError:
                raise ValueError(f"emulator: {type(self.emulator).__name__} gives no predictive covariance "
                                 "(predict(..., return_cov=True)), which emulator_error='catalog' needs; "
                                 "use 'per-star' or 'none'") from None
            E = np.asarray(cov, dtype=float)[:, idx][:, :, idx]
            E = 0.5 * (E + np.swapaxes(E, -1, -2))
            jit = 1e-12 * np.max(np.diagonal(E, axis1=-2, axis2=-1), axis=-1) + 1e-300
            E[:, np.arange(len(idx)), np.arange(len(idx))] += jit[:, None]
            return np.linalg.cholesky(E)

        if self.emulator_variance == "per-walker" or len(theta) == 1:
            return factor(theta)
        return self._cached(theta, "mean_cov_factor", factor)

    def emulator_correction(self, grad, fisher, Lf) -> np.ndarray:
        """``½ gᵀ (P + E⁻¹)⁻¹ g − ½ log det(I + E P)`` per walker (see ``emulator_error``), with
        ``E = Lf Lfᵀ``, ``g`` the gradient (W, n_cells, 3) and ``P`` the Fisher information
        (W, n_cells, 6) of the catalog's log-likelihood in the cell means."""
        W = grad.shape[0]
        B = self._catalog_matrix(fisher, Lf)
        g = grad.reshape(W, -1)
        cvec = np.einsum("wji,wj->wi", Lf, g) if Lf.shape[0] == W else g @ Lf[0]
        return _half_quad_minus_logdet(np.ascontiguousarray(B), np.ascontiguousarray(cvec))

    @staticmethod
    def _catalog_matrix(fisher, Lf) -> np.ndarray:
        """``B = I + Lfᵀ P Lf`` per walker (W, 3 n_cells, 3 n_cells), ``P`` block-diagonal from
        the Fisher information's lower triangles ``fisher`` (W, n_cells, 6); ``Lf`` (W or 1, ...)."""
        W, nc, _ = fisher.shape
        n = 3 * nc
        P = np.zeros((W, nc, 3, 3))
        for k, (a, b) in enumerate(((0, 0), (1, 0), (1, 1), (2, 0), (2, 1), (2, 2))):
            P[:, :, a, b] = fisher[:, :, k]
            P[:, :, b, a] = fisher[:, :, k]
        # Lfᵀ P Lf with P block-diagonal: the 3 rows of Lf of each cell times its 3 x 3 block
        PL = (P @ Lf.reshape(Lf.shape[0], nc, 3, n)).reshape(W, n, n)  # rows (cell, component)
        B = np.swapaxes(Lf, -1, -2) @ PL
        B[:, np.arange(n), np.arange(n)] += 1.0
        return B

    def _catalog_factor(self, theta, f=None):
        """``(Q, log det B)`` with ``B = I + Lfᵀ P Lf`` and ``Q = Lf C⁻ᵀ`` (``C`` the Cholesky
        factor of ``B``), both at the walkers' mean (``E = Lf Lfᵀ`` from
        :meth:`_mean_cov_factor`'s cache, ``P`` from the kernel at the mean, refreshed after
        ``fisher_refresh``), so that :meth:`emulator_correction` becomes
        ``½ |g Q|² − ½ log det B`` per walker."""
        Lf_cached = self._mean_cov_factor(theta)  # the cache's own array: its identity says E is unchanged

        f_c = None if f is None else np.array([np.mean(f)])

        def factor(centre):
            _, _, f0 = self._evaluate(centre, True, f=f_c)
            C = np.linalg.cholesky(self._catalog_matrix(f0, Lf_cached)[0])
            return solve_triangular(C, Lf_cached[0].T, lower=True).T, 2.0 * np.sum(np.log(np.diag(C)))

        centre = theta.mean(axis=0, keepdims=True)
        u = (centre[0] - self._lo) / self._span
        if f_c is not None:  # the memberships move the Fisher information too
            u = np.append(u, f_c)
        hit = self._cache.get("catalog_factor")
        if hit is None or hit[1] is not Lf_cached or np.max(np.abs(u - hit[0])) > self.fisher_refresh:
            hit = self._cache["catalog_factor"] = (u, Lf_cached, *factor(centre))  # also when E was refreshed
        return hit[2], hit[3]

    # --------------------------------------------------------------------------- densities
    def cell_gaussians(self, theta, fold: bool | None = None):
        """Per-walker cell means (W, n_cells, 3) and covariances (W, n_cells, 3, 3), the latter
        with ``velocity_floor²`` added to the diagonal; with ``fold`` (default:
        ``emulator_error == "per-star"``) the emulator's variance of the cell means too."""
        return self._cell_model(theta, fold)[:2]

    def vr_densities(self, theta) -> np.ndarray:
        """Per-walker v_r histogram densities (W, n_cells, n_bins), per km/s (emulators with a
        v_r histogram only, ``spec.vr_edges``)."""
        return self._cell_model(theta)[2]

    def _cell_model(self, theta, fold: bool | None = None):
        """(cell means, cell covariances, v_r densities or None) from one emulator prediction."""
        theta = np.atleast_2d(np.asarray(theta, dtype=float))[:, :self.n_theta]  # f_hvs, if given, aside
        fold = self.emulator_error == "per-star" if fold is None else fold
        sd = None
        if fold and (self.emulator_variance == "per-walker" or len(theta) == 1):
            y, sd = self.emulator.predict(theta, return_std=True)
        else:
            y = self.emulator.predict(theta)
            if fold:
                sd = np.broadcast_to(self._cached(theta, "sd", lambda c: self.emulator.predict(c, return_std=True)[1]),
                                     np.shape(y))
        y = self._record(theta, y)
        mu, sig = stats_to_gaussian(y, self.spec.n_cells)
        add = np.full(mu.shape, self.velocity_floor**2)
        if sd is not None:
            add = add + (np.asarray(sd, dtype=float)[..., :self.spec.n_gauss]
                         .reshape(y.shape[0], self.spec.n_cells, N_STAT)[..., :3]) ** 2
        for a in range(3):
            sig[..., a, a] += add[..., a]
        dens = np.ascontiguousarray(stats_to_vr_density(y, self.spec)) if self.spec.n_vbins else None
        return np.ascontiguousarray(mu), np.ascontiguousarray(sig), dens

    def _record(self, theta, y) -> np.ndarray:
        """The emulated summaries ``y`` of ``theta`` as floats, kept as the last prediction and
        checked against the summary definition."""
        y = np.asarray(y, dtype=float)
        self._last_prediction = (theta.copy(), y)
        if y.shape[-1] != self.spec.n_outputs:
            raise ValueError(
                f"emulator: predicts {y.shape[-1]} outputs, the summary definition has {self.spec.n_outputs}")
        return y

    def _evaluate(self, theta, want_grad: bool, want_fisher: bool = True, f=None):
        """Per-star hypervelocity-star logs, gradient and Fisher sums at emulator parameters
        ``theta`` (W, d); with the mixture's ``f`` (W,), those sums weighted by membership."""
        mix_off = self._mix_off(f) if want_grad else None
        if self.emulator_error != "per-star" and not self.spec.n_vbins:  # the hot path: one compiled pass
            theta = np.atleast_2d(np.asarray(theta, dtype=float))
            y = self._record(theta, self.emulator.predict(theta))
            mu, tri = _cell_gaussians_tri(np.ascontiguousarray(y), self.spec.n_cells, self.velocity_floor**2)
            return _run_kernels(self._packed, mu, tri, want_grad, None, want_fisher, mix_off)
        mu, sig, dens = self._cell_model(theta)
        tri = np.ascontiguousarray(np.stack(
            [sig[..., 0, 0], sig[..., 1, 0], sig[..., 1, 1], sig[..., 2, 0], sig[..., 2, 1], sig[..., 2, 2]], -1))
        return _run_kernels(self._packed, mu, tri, want_grad, dens, want_fisher, mix_off)

    def per_star(self, theta) -> np.ndarray:
        """Log-likelihood of every star, (W, n_stars) (without the catalog-level emulator
        correction, which belongs to no single star); with a background, of the mixture."""
        th, f = self._split(theta)
        return self._mix(self._evaluate(th, False)[0], f)

    def _histogram_correction(self, theta, grad, f_mix=None) -> np.ndarray:
        """The catalog-level marginalisation of the emulator's error in the cell means *and* the
        v_r histograms (emulators with ``vr_edges``), per walker.

        With the log-likelihood expanded to second order in those outputs around the emulated
        ones, ``log L = log L(ŷ) + ½ gᵀ (P + E⁻¹)⁻¹ g - ½ log det(I + E P)`` as for the means
        alone (:meth:`emulator_correction`), with: the means' gradient from the kernel; the
        histogram's, per cell and bin, ``a_b (n_b - n f_b)`` (``n_b`` the stars' expected counts
        in the bin, ``f_b`` the emulated fraction, ``a_b = ∂ log f_b / ∂ stat_b``), the score of
        a multinomial; and ``P`` block-diagonal (means: the kernel's Fisher information;
        histogram: the multinomial's, ``n diag(a) (diag(f) - f fᵀ) diag(a)``), taken at the
        walkers' mean and kept with the emulator's covariance ``E`` until that is refreshed (a
        285-dimensional solve per walker would cost more than the rest of the call), so that
        only the gradient changes from walker to walker; ``emulator_variance="per-walker"``
        evaluates both at every walker instead. With a background population (``f_mix``, the
        walkers' ``f_hvs``), the means' gradient and Fisher information are membership-weighted
        (:meth:`_evaluate`), but the histogram's counts ``n_b`` are every used star's: halo stars
        are counted as hypervelocity stars in this term (a limitation of the mixture with v_r
        histogram emulators)."""
        spec = self.spec
        nc, nb = spec.n_cells, spec.n_vbins
        f_centre = None if f_mix is None else np.array([np.mean(f_mix)])  # the mixture's fraction, if any

        def hist_terms(th):
            last = self._last_prediction
            y = last[1] if last is not None and last[0].shape == th.shape and np.array_equal(last[0], th) \
                else np.asarray(self.emulator.predict(th), dtype=float)
            h = y[:, spec.n_gauss:].reshape(len(th), nc, nb)
            e = np.exp(h)
            g = np.maximum(e - VR_FRACTION_FLOOR, VR_FRACTION_MIN)
            a = np.where(e - VR_FRACTION_FLOOR > VR_FRACTION_MIN, e / g, 0.0)
            f = g / g.sum(axis=-1, keepdims=True)
            return a, f

        n_c = self._hist_counts.sum(axis=1)

        def factor(centre, fc=f_centre):
            idx = np.concatenate([self._mean_idx, self._hist_idx])
            _, cov = self.emulator.predict(centre, return_cov=True)
            E = np.asarray(cov, dtype=float)[0][np.ix_(idx, idx)]
            E = 0.5 * (E + E.T)
            E[np.diag_indices_from(E)] += 1e-12 * np.max(np.diag(E)) + 1e-300
            Lf = np.linalg.cholesky(E)
            # P at the centre: the means' from the kernel, the histogram's multinomial
            _, _, f0 = self._evaluate(centre, True, f=fc)
            n = len(idx)
            P = np.zeros((n, n))
            for c in range(nc):
                blk = np.zeros((3, 3))
                for k, (i, j) in enumerate(((0, 0), (1, 0), (1, 1), (2, 0), (2, 1), (2, 2))):
                    blk[i, j] = blk[j, i] = f0[0, c, k]
                P[3 * c:3 * c + 3, 3 * c:3 * c + 3] = blk
            a, f = hist_terms(centre)
            for c in range(nc):
                o = 3 * nc + c * nb
                P[o:o + nb, o:o + nb] = n_c[c] * (a[0, c][:, None] * (np.diag(f[0, c]) - np.outer(f[0, c], f[0, c]))
                                                   * a[0, c][None, :])
            B = Lf.T @ P @ Lf
            B[np.diag_indices_from(B)] += 1.0
            C = np.linalg.cholesky(B)
            # gᵀ (P + E⁻¹)⁻¹ g = |C⁻¹ Lfᵀ g|² = |g Q|² with Q = Lf C⁻ᵀ
            Q = solve_triangular(C, Lf.T, lower=True).T
            return Q, 2.0 * np.sum(np.log(np.diag(C)))

        a, f = hist_terms(theta)
        gh = a * (self._hist_counts[None] - n_c[None, :, None] * f)
        g = np.concatenate([grad.reshape(len(theta), -1), gh.reshape(len(theta), -1)], axis=1)
        if self.emulator_variance == "per-walker" and len(theta) > 1:  # exact: E and P at every walker
            out = np.empty(len(theta))
            for i in range(len(theta)):
                Q, logdet = factor(theta[i:i + 1], None if f_mix is None else f_mix[i:i + 1])
                y = g[i] @ Q
                out[i] = 0.5 * y @ y - 0.5 * logdet
            return out
        Q, logdet = factor(theta) if len(theta) == 1 else self._cached(theta, "hist_cov_factor", factor)
        y = g @ Q
        return 0.5 * np.einsum("wi,wi->w", y, y) - 0.5 * logdet

    def __call__(self, theta) -> np.ndarray:
        """Total log-likelihood, (W,) for theta of shape (W, d) (or a float for (d,))."""
        theta = np.asarray(theta, dtype=float)
        th2, f = self._split(theta)
        if self.emulator_error == "catalog":
            exact = self.emulator_variance == "per-walker" or len(th2) == 1
            # the histogram's correction takes P at the walkers' mean (or per walker) itself
            out, grad, fisher = self._evaluate(th2, True, want_fisher=exact and not self.spec.n_vbins, f=f)
            out = self._mix(out, f)
            if self.spec.n_vbins:
                tot = out.sum(axis=1) + self._histogram_correction(th2, grad, f)
            elif exact:
                tot = out.sum(axis=1) + self.emulator_correction(grad, fisher, self._mean_cov_factor(th2))
            else:
                Q, logdet = self._catalog_factor(th2, f)
                y = grad.reshape(len(th2), -1) @ Q
                tot = out.sum(axis=1) + 0.5 * np.einsum("wi,wi->w", y, y) - 0.5 * logdet
        else:
            tot = self._mix(self._evaluate(th2, False)[0], f).sum(axis=1)
        return tot if theta.ndim == 2 else float(tot[0])
