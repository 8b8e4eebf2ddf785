"""Summary statistics of a selected present-day population: what the emulator learns.

The population is described by its velocity components in the galactocentric spherical frame,

* ``v_r``: radial velocity (km/s);
* ``v_tf`` = v_θ · sign(z): the folded polar deflection, positive toward the disk plane;
* ``v_pf`` = v_φ · sign(x y): the folded azimuthal deflection (a triaxial halo aligned with
  the axes torques a radial orbit in z by ``∝ x y (1/q_y² − 1)``, so the folding makes the
  sign of the mean depend only on q_y: positive for q_y > 1),

conditioned on the star's position through **cells**: bins of galactocentric radius ``r`` and of
the absolute galactocentric latitude ``|β| = |90° − θ|`` (the deflection vanishes on the
axis and in the plane, so any model of it must depend on latitude, not only on r).

In each cell the summary is the weighted mean vector and covariance matrix of
(v_r, v_tf, v_pf), written through the covariance's Cholesky factor ``L`` (lower triangular,
``Σ = L Lᵀ``) as nine numbers, so that every real vector the emulator predicts maps to a valid
covariance:

``mean_vr, mean_vtf, mean_vpf, log_l_rr, log_l_tt, log_l_pp, l_tr, l_pr, l_pt``

``l_rr`` is the standard deviation of v_r; ``l_tr / l_rr`` the regression slope of v_tf on v_r
and ``l_tt`` the scatter of v_tf at fixed v_r; ``l_pp`` the scatter of v_pf at fixed
(v_r, v_tf) (km/s; logs natural). The likelihood uses them as a Gaussian density of the three
components in each cell (a synthetic likelihood in the sense of Wood 2010, Nature 466, 1102),
so that a star's tangential velocity is modelled conditionally on its radial velocity
through the cell's covariance.

The radial velocities are far from Gaussian in a cell (they inherit the launch-speed
distribution: skewness 0.1-1.8 and excess kurtosis -1.1 to +3 in the default Galaxy across the
launch slopes, with a hard floor at v_r = 0), so a Gaussian in v_r misstates what the v_r of a
catalog can tell. With ``vr_edges`` set, every cell also gets a **histogram of v_r** on those
fixed edges (km/s), one statistic per bin, ``log(f + VR_FRACTION_FLOOR)`` with ``f`` the
weighted fraction of the cell's stars in the bin; the likelihood then uses the histogram as
the density of v_r and the Gaussian only for the tangential components conditional on v_r
(:mod:`swerve.likelihood`). The histogram outputs follow the ``n_cells × 9`` Gaussian ones, cell
by cell: ``cellCC_vr_bin_BB``.

Simulation noise: every summary gets a variance from a Poisson bootstrap over orbits (each
orbit of the bank, with all its samples, is one independent unit; samples along one
trajectory are correlated, so resampling samples would underestimate the noise).
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numba as nb
import numpy as np

STAT_NAMES = (
    "mean_vr", "mean_vtf", "mean_vpf",
    "log_l_rr", "log_l_tt", "log_l_pp",
    "l_tr", "l_pr", "l_pt",
)
N_STAT = len(STAT_NAMES)

#: added to every v_r bin fraction before its log (the emulated statistic is ``log(f + floor)``),
#: so that empty bins have a finite value; the likelihood subtracts it again and keeps every
#: fraction at least :data:`VR_FRACTION_MIN`
VR_FRACTION_FLOOR = 1e-3
#: the smallest v_r bin fraction the likelihood uses (an emulated fraction at or below the
#: floor means "next to nothing", not "impossible")
VR_FRACTION_MIN = 1e-5


@dataclass(frozen=True)
class SummarySpec:
    """Definition of the summaries (stated as data; recorded in every emulator).

    Parameters
    ----------
    r_edges : tuple of float
        Galactocentric radius bin edges, kpc, increasing.
    lat_edges : tuple of float
        Absolute galactocentric latitude bin edges, deg, increasing within [0, 90].
    min_ess : float
        Smallest effective sample size accepted in a cell.
    n_boot : int
        Poisson-bootstrap replicates for the simulation noise.
    vr_edges : tuple of float
        Edges of the per-cell histogram of v_r, km/s, increasing from 0 (empty: no histogram,
        the v_r density is the cell Gaussian's, as in emulators trained before it existed).
    """

    r_edges: tuple = (10.0, 20.0, 35.0, 60.0, 100.0, 250.0)
    lat_edges: tuple = (0.0, 30.0, 60.0, 90.0)
    min_ess: float = 30.0
    n_boot: int = 64
    vr_edges: tuple = ()

    def __post_init__(self):
        r = np.asarray(self.r_edges, dtype=float)
        b = np.asarray(self.lat_edges, dtype=float)
        if r.ndim != 1 or len(r) < 2 or np.any(np.diff(r) <= 0) or r[0] < 0 or not np.all(np.isfinite(r)):
            raise ValueError(f"summaries r_edges: expected at least two increasing radii >= 0 kpc, got {self.r_edges!r}")
        if b.ndim != 1 or len(b) < 2 or np.any(np.diff(b) <= 0) or b[0] < 0 or b[-1] > 90:
            raise ValueError(f"summaries lat_edges: expected increasing latitudes within [0, 90] deg, got {self.lat_edges!r}")
        if not self.min_ess > 0:
            raise ValueError(f"summaries min_ess: expected a positive number, got {self.min_ess!r}")
        if int(self.n_boot) < 8:
            raise ValueError(f"summaries n_boot: expected at least 8 bootstrap replicates, got {self.n_boot!r}")
        v = np.asarray(self.vr_edges, dtype=float)
        if len(v) and (v.ndim != 1 or len(v) < 3 or v[0] != 0 or np.any(np.diff(v) <= 0) or not np.all(np.isfinite(v))):
            raise ValueError(f"summaries vr_edges: expected at least three increasing speeds from 0 km/s "
                             f"(or none), got {self.vr_edges!r}")
        object.__setattr__(self, "vr_edges", tuple(float(x) for x in v))
        object.__setattr__(self, "r_edges", tuple(float(x) for x in r))
        object.__setattr__(self, "lat_edges", tuple(float(x) for x in b))
        object.__setattr__(self, "n_boot", int(self.n_boot))

    @property
    def n_r(self) -> int:
        return len(self.r_edges) - 1

    @property
    def n_lat(self) -> int:
        return len(self.lat_edges) - 1

    @property
    def n_cells(self) -> int:
        return self.n_r * self.n_lat

    @property
    def n_vbins(self) -> int:
        """Bins of the per-cell v_r histogram (0 without one)."""
        return max(len(self.vr_edges) - 1, 0)

    @property
    def n_gauss(self) -> int:
        """Outputs of the cell Gaussians (the first block of the summary vector)."""
        return self.n_cells * N_STAT

    @property
    def n_outputs(self) -> int:
        return self.n_cells * (N_STAT + self.n_vbins)

    def output_names(self) -> list[str]:
        return ([f"cell{c:02d}_{s}" for c in range(self.n_cells) for s in STAT_NAMES]
                + [f"cell{c:02d}_vr_bin_{b:02d}" for c in range(self.n_cells) for b in range(self.n_vbins)])

    def cell_labels(self) -> list[str]:
        out = []
        for i in range(self.n_r):
            for j in range(self.n_lat):
                out.append(
                    f"r {self.r_edges[i]:g}-{self.r_edges[i + 1]:g} kpc, |lat| "
                    f"{self.lat_edges[j]:g}-{self.lat_edges[j + 1]:g} deg"
                )
        return out

    def cell_index(self, pos) -> np.ndarray:
        """Cell of each position (n, 3) in kpc; -1 outside every cell."""
        pos = np.asarray(pos, dtype=float)
        r = np.sqrt(np.sum(pos * pos, axis=-1))
        with np.errstate(invalid="ignore", divide="ignore"):
            lat = np.degrees(np.arcsin(np.clip(np.abs(pos[..., 2]) / r, 0.0, 1.0)))
        ir = np.searchsorted(self.r_edges, r, side="right") - 1
        ib = np.searchsorted(self.lat_edges, lat, side="right") - 1
        ib = np.where(lat == self.lat_edges[-1], self.n_lat - 1, ib)
        ok = (ir >= 0) & (ir < self.n_r) & (ib >= 0) & (ib < self.n_lat) & np.isfinite(r)
        return np.where(ok, ir * self.n_lat + ib, -1).astype(np.int64)

    def to_dict(self) -> dict:
        d = {
            "r_edges": list(self.r_edges),
            "lat_edges": list(self.lat_edges),
            "min_ess": self.min_ess,
            "n_boot": self.n_boot,
            "stats": list(STAT_NAMES),
            "components": ["v_r", "v_theta*sign(z)", "v_phi*sign(x*y)"],
        }
        if self.vr_edges:  # absent when unused: the records of emulators trained before it stay as they were
            d["vr_edges"] = list(self.vr_edges)
        return d

    @classmethod
    def from_dict(cls, d: dict) -> SummarySpec:
        if d.get("tan_scale"):
            raise ValueError("summaries: recorded with tan_scale, an experimental cell model (scaled deflections) "
                             "that swerve no longer has (it biased the disk mass); retrain the emulator without it")
        d = {k: v for k, v in d.items() if k in ("r_edges", "lat_edges", "min_ess", "n_boot", "vr_edges")}
        return cls(**{k: tuple(v) if isinstance(v, list) else v for k, v in d.items()})


def folded_components(pos, vel) -> np.ndarray:
    """(v_r, v_tf, v_pf) of positions/velocities (n, 3); see the module docstring. Returns (n, 3).

    z = 0 counts as northern and x y = 0 as positive (sign +1), as in :mod:`swerve.frames`.
    """
    pos = np.asarray(pos, dtype=float)
    vel = np.asarray(vel, dtype=float)
    x, y, z = pos[..., 0], pos[..., 1], pos[..., 2]
    vx, vy, vz = vel[..., 0], vel[..., 1], vel[..., 2]
    R = np.hypot(x, y)
    r = np.sqrt(R * R + z * z)
    v_r = (x * vx + y * vy + z * vz) / r
    with np.errstate(invalid="ignore", divide="ignore"):
        v_theta = np.where(R > 0, (z * (x * vx + y * vy) / R - R * vz) / r, -vz * np.sign(z))
        v_phi = np.where(R > 0, (x * vy - y * vx) / R, 0.0)
    sz = np.where(z >= 0, 1.0, -1.0)
    sxy = np.where(x * y >= 0, 1.0, -1.0)
    return np.stack([v_r, v_theta * sz, v_phi * sxy], axis=-1)


@nb.njit(cache=True)
def _moment_sums(cell, comps, w, n_cells):
    """One pass over the samples: per cell W, sum w v (3), sum w v v^T (6; pairs rr, tt, pp, rt,
    rp, tp).  Strict arithmetic (no fused multiply-add) in sample order, so every sum equals
    ``np.bincount(cell, weights=w * v_a * v_b)`` bit for bit (tests/test_summaries.py).  The
    training stage calls it 21 times per launch point (summary, bootstrap, replicates); replacing
    ten bincounts and their temporaries by this pass made a design point 2.8x faster
    (benchmarks/RESULTS.md, "Training cost")."""
    out = np.zeros((n_cells, 10))
    for i in range(cell.shape[0]):
        c = cell[i]
        wi = w[i]
        a = comps[i, 0]
        b = comps[i, 1]
        d = comps[i, 2]
        wa = wi * a
        wb = wi * b
        wd = wi * d
        out[c, 0] += wi
        out[c, 1] += wa
        out[c, 2] += wb
        out[c, 3] += wd
        out[c, 4] += wa * a
        out[c, 5] += wb * b
        out[c, 6] += wd * d
        out[c, 7] += wa * b
        out[c, 8] += wa * d
        out[c, 9] += wb * d
    return out


def _cell_moments(cell, comps, w, n_cells):
    """Weighted sums per cell: W, sum w v (3), sum w v v^T (6)."""
    out = _moment_sums(np.ascontiguousarray(cell, dtype=np.int64), np.ascontiguousarray(comps, dtype=float),
                       np.ascontiguousarray(w, dtype=float), int(n_cells))
    return out[:, 0], out[:, 1:4], out[:, 4:10]


def _stats_from_moments(W, m, s):
    """Nine statistics per cell from weighted sums; NaN where a cell is empty."""
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = m / W[:, None]
        c_rr = s[:, 0] / W - mean[:, 0] ** 2
        c_tt = s[:, 1] / W - mean[:, 1] ** 2
        c_pp = s[:, 2] / W - mean[:, 2] ** 2
        c_rt = s[:, 3] / W - mean[:, 0] * mean[:, 1]
        c_rp = s[:, 4] / W - mean[:, 0] * mean[:, 2]
        c_tp = s[:, 5] / W - mean[:, 1] * mean[:, 2]
        tiny = 1e-12
        l_rr = np.sqrt(np.maximum(c_rr, tiny))
        l_tr = c_rt / l_rr
        l_pr = c_rp / l_rr
        l_tt = np.sqrt(np.maximum(c_tt - l_tr**2, tiny))
        l_pt = (c_tp - l_pr * l_tr) / l_tt
        l_pp = np.sqrt(np.maximum(c_pp - l_pr**2 - l_pt**2, tiny))
        out = np.stack(
            [mean[:, 0], mean[:, 1], mean[:, 2], np.log(l_rr), np.log(l_tt), np.log(l_pp), l_tr, l_pr, l_pt],
            axis=1,
        )
    return out


def _vr_histogram(cell, v_r, w, n_cells, vr_edges):
    """Weighted fraction of each cell's weight in each v_r bin, (n_cells, n_bins); NaN where a
    cell is empty."""
    nb = len(vr_edges) - 1
    b = np.searchsorted(vr_edges, v_r, side="right") - 1
    ok = (b >= 0) & (b < nb)
    H = np.bincount(cell[ok] * nb + b[ok], weights=w[ok], minlength=n_cells * nb).reshape(n_cells, nb)
    W = np.bincount(cell, weights=w, minlength=n_cells)
    with np.errstate(invalid="ignore", divide="ignore"):
        return H / W[:, None]


def _cell_stats(spec: SummarySpec, cell, comps, w):
    """The summary vector (spec.n_outputs,) of cell-assigned samples: the cell Gaussians' nine
    statistics per cell, then (with ``spec.vr_edges``) each cell's v_r histogram as
    ``log(f + VR_FRACTION_FLOOR)``."""
    nc = spec.n_cells
    W, m, s = _cell_moments(cell, comps, w, nc)
    g = _stats_from_moments(W, m, s).reshape(-1)
    if not spec.n_vbins:
        return g
    f = _vr_histogram(cell, comps[:, 0], w, nc, np.asarray(spec.vr_edges))
    return np.concatenate([g, np.log(f + VR_FRACTION_FLOOR).reshape(-1)])


@dataclass
class SummaryResult:
    """Summaries of one population (plain arrays)."""

    values: np.ndarray  # (n_outputs,)
    noise_var: np.ndarray  # (n_outputs,)
    ess: np.ndarray  # (n_cells,)
    n_samples: np.ndarray  # (n_cells,)
    meta: dict = field(default_factory=dict)


def compute_summaries(spec: SummarySpec, pos, vel, weight, orbit, rng, strict: bool = True,
                      replicate=None) -> SummaryResult:
    """Summaries of a selected, weighted population.

    Parameters
    ----------
    spec : SummarySpec
    pos, vel : arrays (n, 3)
        Galactocentric positions (kpc) and velocities (km/s) of the selected samples.
    weight : array (n,)
        Non-negative sample weights.
    orbit : int array (n,)
        Index of the independent unit (orbit) each sample belongs to, for the bootstrap.
    rng : numpy.random.Generator
    strict : bool
        Raise when a cell's effective sample size is below ``spec.min_ess`` (default); otherwise
        leave NaN there.
    replicate : int array (n,), optional
        Index of the independent replicate each sample comes from (e.g. sub-banks drawn from
        independently scrambled quasi-random sequences). Given, the noise variance of each
        summary is the spread of the per-replicate summaries divided by their number (the
        randomized quasi-Monte Carlo estimate); the Poisson bootstrap over orbits, which
        assumes independent orbits, overestimates the noise of quasi-random banks 5-20 fold
        (measured: 4 independent banks at one Galaxy). Statistics a replicate cannot estimate
        (an empty cell) fall back to the bootstrap.
    """
    pos = np.asarray(pos, dtype=float)
    vel = np.asarray(vel, dtype=float)
    w = np.asarray(weight, dtype=float)
    orbit = np.asarray(orbit)
    if len(pos) == 0:
        raise ValueError("summaries: the population is empty (the selection kept no star)")
    cell = spec.cell_index(pos)
    keep = cell >= 0
    cell, w_k, orbit_k = cell[keep], w[keep], orbit[keep]
    comps = folded_components(pos[keep], vel[keep])
    nc = spec.n_cells
    W = np.bincount(cell, weights=w_k, minlength=nc)
    W2 = np.bincount(cell, weights=w_k**2, minlength=nc)
    with np.errstate(invalid="ignore", divide="ignore"):
        ess = np.where(W2 > 0, W**2 / W2, 0.0)
    low = np.flatnonzero(ess < spec.min_ess)
    if len(low) and strict:
        labels = spec.cell_labels()
        raise ValueError(
            f"summaries: {len(low)} cell(s) have an effective sample size below {spec.min_ess:g} "
            f"(first: {labels[low[0]]}, ESS {ess[low[0]]:.1f}); enlarge the bank or merge cells"
        )
    values = _cell_stats(spec, cell, comps, w_k)
    if spec.n_vbins:
        f = np.exp(values[spec.n_gauss:].reshape(nc, spec.n_vbins)) - VR_FRACTION_FLOOR
        with np.errstate(invalid="ignore"):
            beyond = 1.0 - np.sum(f, axis=1)
        bad = np.flatnonzero(beyond > 1e-3)
        if len(bad):
            raise ValueError(
                f"summaries: {100 * beyond[bad[0]]:.1f}% of the stars of {spec.cell_labels()[bad[0]]} have v_r outside "
                f"vr_edges (0-{spec.vr_edges[-1]:g} km/s); extend the last edge of [summaries] vr_edges")

    # Poisson bootstrap over orbits
    uniq, inv = np.unique(orbit_k, return_inverse=True)
    boots = np.empty((spec.n_boot, values.size))
    for b in range(spec.n_boot):
        k = rng.poisson(1.0, size=len(uniq)).astype(float)
        boots[b] = _cell_stats(spec, cell, comps, w_k * k[inv])
    with np.errstate(invalid="ignore"):
        noise_var = np.nanvar(boots, axis=0, ddof=1)
    meta = {"n_orbits": int(len(uniq)), "n_boot": spec.n_boot, "noise": "poisson bootstrap over orbits"}
    if replicate is not None:
        rep = np.asarray(replicate)[keep]
        labels = np.unique(rep)
        if len(labels) < 2:
            raise ValueError("summaries: replicate noise needs at least two replicates")
        per = np.empty((len(labels), values.size))
        for j, r in enumerate(labels):
            sel = rep == r
            per[j] = _cell_stats(spec, cell[sel], comps[sel], w_k[sel])
        ok = np.all(np.isfinite(per), axis=0)
        rep_var = np.var(per, axis=0, ddof=1) / len(labels)
        noise_var = np.where(ok, rep_var, noise_var)
        meta.update(noise=f"spread of {len(labels)} independent replicates", n_replicates=int(len(labels)),
                    n_bootstrap_fallback=int(np.sum(~ok)))
    counts = np.bincount(cell, minlength=nc)
    return SummaryResult(values=values, noise_var=noise_var, ess=ess, n_samples=counts, meta=meta)


def azimuthal_outputs(spec: SummarySpec) -> dict:
    """Indices of the statistics of v_pf's row in every cell: ``{"linear": mean_vpf, l_pr, l_pt;
    "log": log_l_pp}``. A radial orbit's v_φ responds linearly to the triaxial torque
    ``∝ (1/q_y² − 1)``: all four vanish at q_y = 1 (``log_l_pp`` goes to its floor), which the
    emulator builds in by emulating them divided by that factor
    (:class:`swerve.emulate.GPEmulator`'s ``scaled_outputs``; ``[emulator] scale_azimuthal``)."""
    base = np.arange(spec.n_cells) * N_STAT
    lin = np.sort(np.concatenate([base + STAT_NAMES.index(n) for n in ("mean_vpf", "l_pr", "l_pt")]))
    return {"linear": lin.tolist(), "log": (base + STAT_NAMES.index("log_l_pp")).tolist()}


def stats_to_gaussian(values, n_cells: int):
    """Per-cell mean vectors (..., n_cells, 3) and covariance matrices (..., n_cells, 3, 3) from
    summary vectors (..., n_cells * 9, or longer: the first n_cells * 9 values are used); every
    input maps to a positive-definite covariance."""
    v = np.asarray(values, dtype=float)[..., :n_cells * N_STAT]
    v = v.reshape(v.shape[:-1] + (n_cells, N_STAT))
    mean = v[..., 0:3]
    L = np.zeros(v.shape[:-1] + (3, 3))
    L[..., 0, 0] = np.exp(v[..., 3])
    L[..., 1, 1] = np.exp(v[..., 4])
    L[..., 2, 2] = np.exp(v[..., 5])
    L[..., 1, 0] = v[..., 6]
    L[..., 2, 0] = v[..., 7]
    L[..., 2, 1] = v[..., 8]
    cov = L @ np.swapaxes(L, -1, -2)
    return mean, cov


def stats_to_vr_density(values, spec: SummarySpec):
    """Per-cell v_r histogram densities (..., n_cells, n_bins), per km/s, from summary vectors
    (..., spec.n_outputs): each fraction ``exp(stat) - VR_FRACTION_FLOOR`` kept at least
    :data:`VR_FRACTION_MIN`, the cell's fractions normalised to one, divided by the bin width."""
    if not spec.n_vbins:
        raise ValueError("summaries: this summary definition has no v_r histogram (vr_edges is empty)")
    v = np.asarray(values, dtype=float)
    if v.shape[-1] != spec.n_outputs:
        raise ValueError(f"summaries: expected {spec.n_outputs} values per vector, got {v.shape[-1]}")
    h = v[..., spec.n_gauss:].reshape(v.shape[:-1] + (spec.n_cells, spec.n_vbins))
    f = np.maximum(np.exp(h) - VR_FRACTION_FLOOR, VR_FRACTION_MIN)
    f /= np.sum(f, axis=-1, keepdims=True)
    return f / np.diff(np.asarray(spec.vr_edges))
