"""Launch models: launch speeds, stellar masses, lifetimes and flight-time weights.

Every star is launched radially from the Galactic Centre (the direction and launch radius are
the orbit bank's business); this module only says *how fast*, *how heavy* and *for how long*
it can be seen. Two launch-speed models share the same small surface (``pdf``/``logpdf`` of the
launch speed, a sampler, ``to_dict``):

* :class:`HillsLaunch` -- the Hills mechanism: a binary drawn from an IMF, a mass-ratio law and
  an Öpik (log-flat) separation law is disrupted by the central black hole; one star is
  ejected with the speed of Sari, Kobayashi & Rossi (2010). Its launch-speed density is a
  Monte-Carlo histogram in log v (:meth:`HillsLaunch.speed_density`).
* :class:`BoundedPowerLawSpeed` -- swerve's cheap nuisance family, ``p(v) ∝ v**slope`` on
  ``[v_min, v_max]``, with an analytic pdf and sampler.

Lifetimes: :func:`main_sequence_lifetime` (crude power law); with a constant ejection rate the
flight times of stars of one mass are uniform up to their lifetime
(:func:`flight_time_weight`).

Weighting a trajectory bank: every launch model owns the weights of a bank's stored samples,
its method ``trajectory_weights(samples, *, mass_range, table_samples, table_seed)``, which
:func:`swerve.bank.sample_weights` calls (so a new launch model needs no change of the bank).
It receives the samples as a :class:`BankSamples` (launch speeds, the proposal's ``Δt / (N q(v))``
per orbit, flight times, the bank's coverage) and returns a :class:`TrajectoryWeights` (the
weights, the launch probability the bank cannot represent, and what to record). Speed-only
models weight by ``p(v) / q(v)`` and a flight-time cut; :class:`HillsLaunch` by the joint
density of speed and survival, :class:`HillsAliveTable` (:func:`hills_alive_table`).

Units: masses Msun, speeds km/s, times Myr, separations AU (``_rsun`` where marked). Every
numeric model parameter is declared once as a :class:`swerve.galaxy.params.Parameter`
(name, unit, default, allowed range, source); validation and ``to_dict`` come from there.

References
----------
Kroupa P., 2001, MNRAS 322, 231 (IMF).
Salpeter E. E., 1955, ApJ 121, 161 (IMF).
Eggleton P. P., 1983, ApJ 268, 368 (Roche-lobe radius).
Sari R., Kobayashi S., Rossi E. M., 2010, ApJ 708, 605 (Hills ejection speed; either star 50%).
Kobulnicky H. A., Fryer C. L., 2007, ApJ 670, 747 (Öpik law for massive binaries).
Hurley J. R., Pols O. R., Tout C. A., 2000, MNRAS 315, 543 (better lifetimes than used here).
"""

from __future__ import annotations

import json
import math
from dataclasses import dataclass, field
from typing import NamedTuple

import numpy as np
from astropy import constants as const
from astropy import units as u

from .galaxy.params import Parameter
from .units import G, positive_float

__all__ = [
    "IMF_NAMES",
    "BrokenPowerLawIMF",
    "imf_from_name",
    "imf_pdf",
    "sample_imf",
    "mass_ratio_pdf",
    "sample_mass_ratio",
    "main_sequence_radius",
    "roche_lobe_fraction",
    "roche_contact_separation",
    "hills_ejection_speed",
    "HillsLaunch",
    "TabulatedSpeedDensity",
    "BoundedPowerLawSpeed",
    "main_sequence_lifetime",
    "flight_time_weight",
    "launch_model_from_dict",
    "BankSamples",
    "TrajectoryWeights",
    "HillsAliveTable",
    "hills_alive_table",
    "AU_KPC",
    "RSUN_AU",
]

#: 1 AU in kpc (astropy constants).
AU_KPC = float((1.0 * u.au).to_value(u.kpc))
#: 1 solar radius in AU (astropy constants, IAU nominal).
RSUN_AU = float((const.R_sun / const.au).decompose().value)


# --------------------------------------------------------------------------------------------
# small helpers


def _check_rng(rng):
    if not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng: expected a numpy Generator (numpy.random.default_rng(seed)), got {type(rng).__name__}")
    return rng


def _check_n(n):
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 0:
        raise ValueError(f"n: expected a non-negative integer number of samples, got {n!r}")
    return int(n)


def _check_m_bh(m_bh):
    return positive_float("m_bh", m_bh, "Msun", what="the black-hole mass (a positive number)")


def _powerlaw_norm(lo, hi, k):
    """Integral of x**k over [lo, hi] (lo > 0)."""
    if abs(k + 1.0) < 1e-12:
        return math.log(hi / lo)
    return (hi ** (k + 1.0) - lo ** (k + 1.0)) / (k + 1.0)


def _powerlaw_cdf(x, lo, hi, k):
    x = np.clip(np.asarray(x, dtype=float), lo, hi)
    if abs(k + 1.0) < 1e-12:
        return np.log(x / lo) / math.log(hi / lo)
    return (x ** (k + 1.0) - lo ** (k + 1.0)) / (hi ** (k + 1.0) - lo ** (k + 1.0))


def _powerlaw_ppf(p, lo, hi, k):
    """Inverse CDF of p(x) ∝ x**k on [lo, hi]."""
    p = np.asarray(p, dtype=float)
    if abs(k + 1.0) < 1e-12:
        return lo * (hi / lo) ** p
    a, b = lo ** (k + 1.0), hi ** (k + 1.0)
    return np.clip((a + p * (b - a)) ** (1.0 / (k + 1.0)), lo, hi)


def _validate_declared(params, values):
    return {p.name: p.validate(values[p.name]) for p in params}


# --------------------------------------------------------------------------------------------
# initial mass functions

#: Broken power laws dN/dm ∝ m**-alpha: (break masses in Msun, slopes alpha per segment).
#: Kroupa (2001): breaks 0.08 and 0.5 Msun, alpha = 0.3, 1.3, 2.3 (from memory; the same
#: values appear as defaults of ProSpect's ``IMF_Kroupa`` documentation, a secondary check).
#: Salpeter (1955): alpha = 2.35.
_IMF_TABLE = {
    "kroupa": ((0.08, 0.5), (0.3, 1.3, 2.3)),
    "salpeter": ((), (2.35,)),
}
IMF_NAMES = tuple(sorted(_IMF_TABLE))


@dataclass(frozen=True)
class BrokenPowerLawIMF:
    """A continuous broken power-law IMF ``dN/dm ∝ m**-alpha_k`` truncated to [m_min, m_max].

    Parameters
    ----------
    breaks : tuple of float
        Break masses, Msun, increasing.
    slopes : tuple of float
        ``alpha`` of each segment (``len(breaks) + 1`` values).
    m_min, m_max : float
        Truncation, Msun, ``0 < m_min < m_max``.
    name : str
        Label recorded in :meth:`to_dict`.
    """

    breaks: tuple
    slopes: tuple
    m_min: float
    m_max: float
    name: str = "custom"
    _segments: tuple = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        try:
            m_min, m_max = float(self.m_min), float(self.m_max)
        except (TypeError, ValueError):
            raise ValueError(
                f"IMF m_min, m_max: expected numbers in Msun, got {self.m_min!r}, {self.m_max!r}") from None
        if not (math.isfinite(m_min) and m_min > 0):
            raise ValueError(f"IMF m_min: expected a positive mass in Msun, got {self.m_min!r}")
        if not (math.isfinite(m_max) and m_max > m_min):
            raise ValueError(f"IMF m_max: expected a mass above m_min = {m_min:g} Msun, got {self.m_max!r}")
        breaks = tuple(float(b) for b in self.breaks)
        slopes = tuple(float(a) for a in self.slopes)
        if len(slopes) != len(breaks) + 1 or any(b2 <= b1 for b1, b2 in zip(breaks, breaks[1:])):
            raise ValueError("IMF breaks/slopes: expected increasing breaks and one more slope than breaks")
        object.__setattr__(self, "m_min", m_min)
        object.__setattr__(self, "m_max", m_max)
        object.__setattr__(self, "breaks", breaks)
        object.__setattr__(self, "slopes", slopes)
        # Continuity coefficients over the full break list, then clip to [m_min, m_max].
        edges = (0.0,) + breaks + (math.inf,)
        coef = [1.0]
        for i, b in enumerate(breaks):
            coef.append(coef[-1] * b ** (slopes[i + 1] - slopes[i]))
        segs = []
        for i, alpha in enumerate(slopes):
            lo, hi = max(edges[i], m_min), min(edges[i + 1], m_max)
            if hi > lo:
                segs.append((lo, hi, -alpha, coef[i], coef[i] * _powerlaw_norm(lo, hi, -alpha)))
        total = sum(s[4] for s in segs)
        object.__setattr__(self, "_segments", tuple((lo, hi, k, c / total, w / total) for lo, hi, k, c, w in segs))

    def pdf(self, m):
        """Normalised density dN/dm, 1/Msun (0 outside [m_min, m_max])."""
        m = np.asarray(m, dtype=float)
        out = np.zeros_like(m)
        for lo, hi, k, c, _ in self._segments:
            sel = (m >= lo) & (m <= hi)
            out = np.where(sel, c * np.where(sel, m, 1.0) ** k, out)
        return out

    def cdf(self, m):
        """Cumulative distribution at mass ``m`` (Msun)."""
        m = np.asarray(m, dtype=float)
        out = np.zeros_like(m)
        for lo, hi, k, _, w in self._segments:
            out = out + w * _powerlaw_cdf(m, lo, hi, k)
        return out

    def sample(self, n, rng):
        """``n`` masses (Msun) by exact inverse-CDF sampling, shape (n,)."""
        n, rng = _check_n(n), _check_rng(rng)
        weights = np.array([s[4] for s in self._segments])
        which = rng.choice(len(weights), size=n, p=weights / weights.sum())
        p = rng.random(n)
        out = np.empty(n)
        for j, (lo, hi, k, _, _) in enumerate(self._segments):
            sel = which == j
            out[sel] = _powerlaw_ppf(p[sel], lo, hi, k)
        return out

    def to_dict(self) -> dict:
        return {"name": self.name, "breaks": list(self.breaks), "slopes": list(self.slopes),
                "m_min": self.m_min, "m_max": self.m_max}


def imf_from_name(name: str = "kroupa", m_min: float = 0.1, m_max: float = 100.0) -> BrokenPowerLawIMF:
    """A named IMF (``"kroupa"``: Kroupa 2001; ``"salpeter"``: Salpeter 1955) on [m_min, m_max] Msun."""
    if name not in _IMF_TABLE:
        raise ValueError(f"imf: unknown IMF {name!r}; expected one of {', '.join(IMF_NAMES)}")
    breaks, slopes = _IMF_TABLE[name]
    return BrokenPowerLawIMF(breaks, slopes, m_min, m_max, name=name)


def imf_pdf(m, name: str = "kroupa", m_min: float = 0.1, m_max: float = 100.0):
    """Normalised IMF density dN/dm (1/Msun) at masses ``m`` (Msun); see :func:`imf_from_name`."""
    return imf_from_name(name, m_min, m_max).pdf(m)


def sample_imf(n, rng, name: str = "kroupa", m_min: float = 0.1, m_max: float = 100.0):
    """``n`` stellar masses (Msun) drawn from a named IMF on [m_min, m_max]."""
    return imf_from_name(name, m_min, m_max).sample(n, rng)


# --------------------------------------------------------------------------------------------
# binaries


def _check_q_law(q_min, q_slope):
    if not (math.isfinite(q_min) and 0.0 < q_min < 1.0):
        raise ValueError(f"q_min: expected a mass ratio in (0, 1), got {q_min!r}")
    if not math.isfinite(q_slope):
        raise ValueError(f"q_slope: expected a finite number, got {q_slope!r}")


def mass_ratio_pdf(q, q_min: float = 0.1, q_slope: float = 0.0):
    """Density of the mass ratio ``q = m2/m1``: ``p(q) ∝ q**q_slope`` on [q_min, 1] (flat: 0)."""
    _check_q_law(float(q_min), float(q_slope))
    q = np.asarray(q, dtype=float)
    inside = (q >= q_min) & (q <= 1.0)
    return np.where(inside, np.where(inside, q, 1.0) ** q_slope / _powerlaw_norm(q_min, 1.0, q_slope), 0.0)


def sample_mass_ratio(n, rng, q_min: float = 0.1, q_slope: float = 0.0):
    """``n`` mass ratios from :func:`mass_ratio_pdf`, shape (n,)."""
    _check_q_law(float(q_min), float(q_slope))
    n, rng = _check_n(n), _check_rng(rng)
    return _powerlaw_ppf(rng.random(n), float(q_min), 1.0, float(q_slope))


def main_sequence_radius(m):
    """Main-sequence radius ``R = Rsun (m/Msun)**0.8``, Rsun (common practice, crude)."""
    return np.asarray(m, dtype=float) ** 0.8


def roche_lobe_fraction(q):
    """Eggleton (1983) Roche-lobe radius over separation, ``r_L/a``.

    ``r_L/a = 0.49 q**(2/3) / (0.6 q**(2/3) + ln(1 + q**(1/3)))`` with ``q`` the mass of the
    star whose lobe is wanted over its companion's mass.
    """
    q = np.asarray(q, dtype=float)
    q23 = q ** (2.0 / 3.0)
    return 0.49 * q23 / (0.6 * q23 + np.log1p(q ** (1.0 / 3.0)))


def roche_contact_separation(m1, m2):
    """Smallest separation (AU) at which neither star overfills its Roche lobe.

    ``a_min = max(R1 / f(m1/m2), R2 / f(m2/m1))`` with ``R`` from :func:`main_sequence_radius`
    and ``f`` from :func:`roche_lobe_fraction`.
    """
    m1, m2 = np.asarray(m1, dtype=float), np.asarray(m2, dtype=float)
    a1 = main_sequence_radius(m1) / roche_lobe_fraction(m1 / m2)
    a2 = main_sequence_radius(m2) / roche_lobe_fraction(m2 / m1)
    return np.maximum(a1, a2) * RSUN_AU


def hills_ejection_speed(m_ejected, m_companion, a_au, m_bh):
    """Ejection speed of the Hills mechanism, km/s.

    ``v_ej = sqrt(2 G m_c / a) (M_bh / m_b)**(1/6)`` with ``m_c`` the companion (the star that
    stays bound), ``m_b`` the binary mass and ``a`` the semi-major axis (Sari, Kobayashi &
    Rossi 2010, ApJ 708, 605; form from memory, see REFERENCES.md). This is the speed at
    infinity from the black hole's potential alone; the Galaxy's potential is the orbit
    integrator's business.

    Parameters
    ----------
    m_ejected, m_companion : float or array
        Masses of the ejected star and its companion, Msun.
    a_au : float or array
        Binary semi-major axis, AU.
    m_bh : float
        Black-hole mass, Msun.
    """
    m_bh = _check_m_bh(m_bh)
    me = np.asarray(m_ejected, dtype=float)
    mc = np.asarray(m_companion, dtype=float)
    a = np.asarray(a_au, dtype=float) * AU_KPC
    return np.sqrt(2.0 * G * mc / a) * (m_bh / (me + mc)) ** (1.0 / 6.0)


# --------------------------------------------------------------------------------------------
# weighting a trajectory bank (the surface every launch model implements)


@dataclass(frozen=True, eq=False)
class BankSamples:
    """A trajectory bank's stored samples as a launch model weights them.

    Built by :func:`swerve.bank.sample_weights`; plain arrays, so that this module needs no
    bank. A sample's weight is ``p(launch at v_o, visible at t_j) × inv_q[o]`` (see
    :mod:`swerve.bank`).

    Attributes
    ----------
    v_launch : float array (n_orbits,)
        Launch speed of each orbit, km/s.
    inv_q : float array (n_orbits,)
        ``Δt / (N_orbits q(v_o))``, Myr km/s: the bank's step over its proposal density of the
        orbit's launch speed (0 where that density is 0).
    orbit : int array (n,)
        Orbit index of each sample to weight.
    t : float array (n,)
        Flight time of each sample, Myr.
    t_cut : float
        Longest flight time of interest, Myr (``≤ t_max``).
    t_max : float
        The bank's longest flight time, Myr.
    v_lo, v_hi : float
        The bank's proposal range of launch speeds, km/s.
    v_reach : float
        Lowest launch speed that reaches the bank's region, km/s: speeds below it carry no
        sample and are not missing.
    galaxy : dict
        ``Galaxy.to_dict()`` of the bank (e.g. its black-hole mass).
    """

    v_launch: np.ndarray
    inv_q: np.ndarray
    orbit: np.ndarray
    t: np.ndarray
    t_cut: float
    t_max: float
    v_lo: float
    v_hi: float
    v_reach: float
    galaxy: dict


class TrajectoryWeights(NamedTuple):
    """What a launch model's ``trajectory_weights`` returns."""

    #: float array (n,): weight of each sample, Myr per unit ejection rate
    weights: np.ndarray
    #: launch probability at speeds the bank cannot represent (above its proposal, or between
    #: the proposal's v_lo and the reach speed)
    missing_fraction: float
    #: entries for the weights' record (e.g. ``orbit_weight`` (n_orbits,) when every sample of an
    #: orbit has the same weight)
    info: dict
    #: a message more specific than the bank's own when ``missing_fraction`` is too large, or None
    coverage_message: str | None = None


def _no_mass_range(mass_range):
    if mass_range is not None:
        raise ValueError("mass_range: only meaningful for the Hills launch model")


def _speed_only_weights(model, s: BankSamples, missing: float, message: str | None = None) -> TrajectoryWeights:
    """Weights of a model that only gives a launch speed: ``p(v_o) / q(v_o) Δt / N``, times
    ``t < t_cut`` (constant ejection rate, flight times uniform up to ``t_cut``)."""
    ratio_o = model.pdf(s.v_launch) * s.inv_q
    w = ratio_o[s.orbit]
    info = {}
    if s.t_cut < s.t_max:  # every stored flight time is below t_max
        w = w * (s.t < s.t_cut)
    else:
        info["orbit_weight"] = ratio_o  # every sample of orbit o has this weight
    return TrajectoryWeights(w, missing, info, message)


# --------------------------------------------------------------------------------------------
# tabulated launch-speed density


@dataclass(frozen=True, eq=False)
class TabulatedSpeedDensity:
    """A launch-speed density tabulated as a histogram in log10 v.

    Parameters
    ----------
    log10_edges : array of shape (n_bins + 1,)
        Bin edges in log10(v / (km/s)), increasing.
    density : array of shape (n_bins,)
        Density per dex in each bin, integrating to 1 over the edges.
    meta : dict
        JSON-safe record of how the table was made (model, seed, samples, ...).
    """

    log10_edges: np.ndarray
    density: np.ndarray
    meta: dict = field(default_factory=dict)

    def __post_init__(self):
        e = np.asarray(self.log10_edges, dtype=float)
        d = np.asarray(self.density, dtype=float)
        if e.ndim != 1 or d.ndim != 1 or e.size != d.size + 1 or e.size < 2:
            raise ValueError("log10_edges/density: expected n_bins + 1 edges and n_bins densities")
        if np.any(np.diff(e) <= 0) or not np.all(np.isfinite(e)):
            raise ValueError("log10_edges: expected finite, strictly increasing edges")
        if np.any(d < 0) or not np.all(np.isfinite(d)):
            raise ValueError("density: expected finite, non-negative values")
        norm = float(np.sum(d * np.diff(e)))
        if not norm > 0:
            raise ValueError("density: integrates to zero")
        e.setflags(write=False)
        d = d / norm
        d.setflags(write=False)
        object.__setattr__(self, "log10_edges", e)
        object.__setattr__(self, "density", d)

    @property
    def v_min(self) -> float:
        return float(10.0 ** self.log10_edges[0])

    @property
    def v_max(self) -> float:
        return float(10.0 ** self.log10_edges[-1])

    def pdf_log10(self, v):
        """Density per dex at speeds ``v`` (km/s); 0 outside the table."""
        x = np.log10(np.maximum(np.asarray(v, dtype=float), 1e-300))
        i = np.searchsorted(self.log10_edges, x, side="right") - 1
        inside = (i >= 0) & (i < self.density.size)
        return np.where(inside, self.density[np.clip(i, 0, self.density.size - 1)], 0.0)

    def pdf(self, v):
        """Density per km/s at speeds ``v`` (km/s): ``pdf_log10(v) / (v ln 10)``."""
        v = np.asarray(v, dtype=float)
        return np.where(v > 0, self.pdf_log10(v) / (np.where(v > 0, v, 1.0) * math.log(10.0)), 0.0)

    def logpdf(self, v):
        """Natural log of :meth:`pdf` (-inf where the density is 0)."""
        p = self.pdf(v)
        with np.errstate(divide="ignore"):
            return np.log(p)

    def sample(self, n, rng):
        """``n`` speeds (km/s) from the table (uniform in log10 v within a bin), shape (n,)."""
        n, rng = _check_n(n), _check_rng(rng)
        w = self.density * np.diff(self.log10_edges)
        i = rng.choice(w.size, size=n, p=w / w.sum())
        x = self.log10_edges[i] + rng.random(n) * np.diff(self.log10_edges)[i]
        return 10.0 ** x

    def trajectory_weights(self, samples: BankSamples, *, mass_range=None, table_samples: int = 400_000,
                           table_seed: int = 20100101) -> TrajectoryWeights:
        """Weights ``p(v) / q(v) Δt / N`` of a bank's samples (:class:`BankSamples`); the
        missing fraction by the table's CDF. ``table_samples``, ``table_seed``: unused."""
        _no_mass_range(mass_range)
        s = samples
        vv = np.logspace(self.log10_edges[0], self.log10_edges[-1], 4001)
        pv = self.pdf(vv)
        cdf = np.concatenate([[0.0], np.cumsum(0.5 * (pv[1:] + pv[:-1]) * np.diff(vv))])
        cdf /= cdf[-1]
        bad = (vv > s.v_hi) | ((vv < s.v_lo) & (vv >= s.v_reach))
        missing = float(np.sum(np.diff(cdf)[bad[1:]]))
        return _speed_only_weights(self, s, missing)

    def to_dict(self) -> dict:
        return {"model": "tabulated_speed", "log10_edges": self.log10_edges.tolist(),
                "density": self.density.tolist(), "meta": dict(self.meta)}

    @classmethod
    def from_dict(cls, d: dict) -> TabulatedSpeedDensity:
        try:
            return cls(np.asarray(d["log10_edges"]), np.asarray(d["density"]), dict(d.get("meta", {})))
        except KeyError as err:
            raise ValueError(f"tabulated speed density: missing key {err.args[0]!r}") from None


# --------------------------------------------------------------------------------------------
# Hills mechanism

_HILLS_PARAMETERS = (
    Parameter("m_min", "Msun", 1.0, 0.0, 150.0, "lower mass of the primary's IMF",
              "our choice: stars that live long enough to reach the halo are above ~1 Msun",
              low_open=True, kind="mass"),
    Parameter("m_max", "Msun", 10.0, 0.0, 150.0, "upper mass of the primary's IMF",
              "our choice: late-B stars, the bulk of known hypervelocity stars, are below ~10 Msun",
              low_open=True, kind="mass"),
    Parameter("q_min", "", 0.1, 0.0, 1.0, "lowest mass ratio m2/m1",
              "common practice", low_open=True, high_open=True),
    Parameter("q_slope", "", 0.0, -3.0, 3.0, "power-law index of p(q) ∝ q**q_slope (0: flat)",
              "common practice (flat)"),
    Parameter("a_max_rsun", "Rsun", 1000.0, 0.0, 1.0e5, "upper limit of the log-flat separation law",
              "common practice (~1e3 Rsun); Kobulnicky & Fryer 2007 for the Öpik law",
              low_open=True),
)


@dataclass(frozen=True)
class HillsLaunch:
    """Hills-mechanism launch model.

    A binary is built as: primary mass ``m1`` from the IMF on [m_min, m_max]; mass ratio
    ``q = m2/m1`` from ``p(q) ∝ q**q_slope`` on [q_min, 1]; semi-major axis flat in log a
    between Roche-lobe contact (:func:`roche_contact_separation`, per binary) and
    ``a_max_rsun``. The black hole ejects either star with probability 1/2 (Sari, Kobayashi &
    Rossi 2010) at speed :func:`hills_ejection_speed`.

    Parameters
    ----------
    imf : {"kroupa", "salpeter"}
        IMF of the primary.
    m_min, m_max : float
        Primary-mass range, Msun.
    q_min : float
        Smallest mass ratio, in (0, 1).
    q_slope : float
        Index of the mass-ratio law (0 = flat in q).
    a_max_rsun : float
        Largest semi-major axis, Rsun.
    """

    PARAMETERS = _HILLS_PARAMETERS

    imf: str = "kroupa"
    m_min: float = _HILLS_PARAMETERS[0].default
    m_max: float = _HILLS_PARAMETERS[1].default
    q_min: float = _HILLS_PARAMETERS[2].default
    q_slope: float = _HILLS_PARAMETERS[3].default
    a_max_rsun: float = _HILLS_PARAMETERS[4].default

    def __post_init__(self):
        if self.imf not in IMF_NAMES:
            raise ValueError(f"imf: unknown IMF {self.imf!r}; expected one of {', '.join(IMF_NAMES)}")
        values = _validate_declared(self.PARAMETERS, {p.name: getattr(self, p.name) for p in self.PARAMETERS})
        for k, v in values.items():
            object.__setattr__(self, k, v)
        if not self.m_min < self.m_max:
            raise ValueError(
                f"m_min: expected m_min < m_max, got m_min = {self.m_min:g} >= m_max = {self.m_max:g} Msun")
        q = np.linspace(self.q_min, 1.0, 64)
        widest_contact = float(np.max(roche_contact_separation(self.m_max, q * self.m_max))) / RSUN_AU
        if self.a_max_rsun <= widest_contact:
            raise ValueError(
                f"a_max_rsun = {self.a_max_rsun:g} Rsun is inside Roche-lobe contact of the heaviest "
                f"binaries ({widest_contact:.3g} Rsun); increase a_max_rsun or lower m_max"
            )

    @property
    def imf_model(self) -> BrokenPowerLawIMF:
        return imf_from_name(self.imf, self.m_min, self.m_max)

    def sample(self, n, rng, m_bh) -> dict:
        """Draw ``n`` ejections.

        Parameters
        ----------
        n : int
            Number of ejections.
        rng : numpy.random.Generator
        m_bh : float
            Black-hole mass, Msun.

        Returns
        -------
        dict of arrays of shape (n,)
            ``mass`` (ejected star, Msun), ``companion_mass`` (Msun), ``v_ej`` (km/s),
            ``primary_mass``, ``secondary_mass`` (Msun), ``q``, ``a_au`` (semi-major axis, AU),
            ``a_min_au`` (its Roche-contact lower limit, AU), ``ejected_primary`` (bool).
        """
        n, rng, m_bh = _check_n(n), _check_rng(rng), _check_m_bh(m_bh)
        m1 = self.imf_model.sample(n, rng)
        q = sample_mass_ratio(n, rng, self.q_min, self.q_slope)
        m2 = q * m1
        a_min = roche_contact_separation(m1, m2)
        a_max = self.a_max_rsun * RSUN_AU
        a = a_min * (a_max / a_min) ** rng.random(n)
        primary = rng.random(n) < 0.5
        mass = np.where(primary, m1, m2)
        companion = np.where(primary, m2, m1)
        return {
            "mass": mass,
            "companion_mass": companion,
            "v_ej": hills_ejection_speed(mass, companion, a, m_bh),
            "primary_mass": m1,
            "secondary_mass": m2,
            "q": q,
            "a_au": a,
            "a_min_au": a_min,
            "ejected_primary": primary,
        }

    def speed_density(self, m_bh, mass_range=None, n_samples: int = 400_000, seed: int = 20100101,
                      n_bins: int = 120, log10_v_range=(1.5, 4.5)) -> TabulatedSpeedDensity:
        """Monte-Carlo launch-speed density of this model, a histogram in log10 v.

        Deterministic: a fixed ``seed`` (recorded in ``meta``). Use it as the target density when
        reweighting a trajectory bank (weight = target / proposal density of launch speed).

        Parameters
        ----------
        m_bh : float
            Black-hole mass, Msun.
        mass_range : (float, float), optional
            Keep only ejected stars with mass in [lo, hi] Msun (the density conditioned on it).
        n_samples : int
            Ejections simulated (before the mass cut).
        seed : int
            Seed of the numpy Generator.
        n_bins : int
            Number of bins over ``log10_v_range``.
        log10_v_range : (float, float)
            Range of log10(v / km/s) tabulated; speeds outside are dropped (their fraction is
            recorded in ``meta["fraction_outside"]``).
        """
        m_bh = _check_m_bh(m_bh)
        if not isinstance(n_bins, (int, np.integer)) or n_bins < 1:
            raise ValueError(f"n_bins: expected a positive integer, got {n_bins!r}")
        lo_v, hi_v = (float(x) for x in log10_v_range)
        if not hi_v > lo_v:
            raise ValueError(f"log10_v_range: expected (low, high) with low < high, got {log10_v_range!r}")
        s = self.sample(_check_n(n_samples), np.random.default_rng(seed), m_bh)
        keep = np.ones(s["mass"].size, dtype=bool)
        if mass_range is not None:
            m_lo, m_hi = (float(x) for x in mass_range)
            if not (m_lo >= 0 and m_hi > m_lo):
                raise ValueError(f"mass_range: expected (low, high) in Msun with 0 <= low < high, got {mass_range!r}")
            keep &= (s["mass"] >= m_lo) & (s["mass"] <= m_hi)
        if keep.sum() < 1000:
            raise ValueError(
                f"mass_range: only {int(keep.sum())} of {n_samples} ejections fall in {mass_range!r}; "
                "widen the range or raise n_samples"
            )
        x = np.log10(s["v_ej"][keep])
        inside = (x >= lo_v) & (x <= hi_v)
        edges = np.linspace(lo_v, hi_v, int(n_bins) + 1)
        counts, _ = np.histogram(x[inside], bins=edges)
        meta = {"model": self.to_dict(), "m_bh": m_bh, "mass_range": None if mass_range is None else [m_lo, m_hi],
                "n_samples": int(n_samples), "n_kept": int(inside.sum()), "seed": int(seed),
                "fraction_outside": float(1.0 - inside.mean())}
        return TabulatedSpeedDensity(edges, counts / (inside.sum() * np.diff(edges)), meta)

    def trajectory_weights(self, samples: BankSamples, *, mass_range=None, table_samples: int = 400_000,
                           table_seed: int = 20100101) -> TrajectoryWeights:
        """Weights of a bank's samples (:class:`BankSamples`) by the joint density of launch
        speed and survival, ``p(v, alive at t) Δt / (N q(v))``, ``t < t_cut``.

        The ejected star's mass sets its lifetime and is correlated with its speed, so the
        density is tabulated from ``table_samples`` ejections drawn with ``table_seed``
        (:func:`hills_alive_table`, memoised) for the bank's black hole, up to its ``t_max``.

        Parameters
        ----------
        samples : BankSamples
        mass_range : (float, float), optional
            Only ejected stars with mass in this range, Msun.
        table_samples, table_seed : int
            Monte Carlo of the table.
        """
        s = samples
        info = {}
        if mass_range is not None:
            info["mass_range"] = [float(mass_range[0]), float(mass_range[1])]
        table = _hills_table_cached(self, _m_bh_of(s.galaxy), s.t_max, mass_range, table_samples, table_seed)
        centres = 0.5 * (table.log10_edges[1:] + table.log10_edges[:-1])
        mass_per_bin = table.value[:, 0] * np.diff(table.log10_edges)
        outside = (10 ** centres > s.v_hi) | ((10 ** centres < s.v_lo) & (10 ** centres >= s.v_reach))
        missing = float(np.sum(mass_per_bin[outside]) + table.meta["fraction_outside_table"])
        info["hills_table"] = table.meta
        # per orbit: speed bin and 1 / (q(v) v ln 10); per sample: linear interpolation in t
        v_o = s.v_launch
        b_o = np.searchsorted(table.log10_edges, np.log10(v_o), side="right") - 1
        in_o = (b_o >= 0) & (b_o < table.value.shape[0])
        b_o = np.clip(b_o, 0, table.value.shape[0] - 1)
        f_o = np.where(in_o, s.inv_q / (v_o * math.log(10.0)), 0.0)
        tg = table.t_grid
        fi = np.clip((s.t - tg[0]) / (tg[1] - tg[0]), 0.0, tg.size - 1 - 1e-9)
        i = fi.astype(np.int64)
        f = fi - i
        b = b_o[s.orbit]
        val = (1.0 - f) * table.value[b, i] + f * table.value[b, np.minimum(i + 1, tg.size - 1)]
        w = val * f_o[s.orbit] * (s.t < s.t_cut)
        return TrajectoryWeights(w, missing, info)

    def to_dict(self) -> dict:
        d = {"model": "hills", "imf": self.imf}
        d.update({p.name: getattr(self, p.name) for p in self.PARAMETERS})
        return d

    @classmethod
    def from_dict(cls, d: dict) -> HillsLaunch:
        return cls(**_strip_model(d, "hills", ("imf",) + tuple(p.name for p in cls.PARAMETERS)))


# --------------------------------------------------------------------------------------------
# parametric nuisance family

_BPL_PARAMETERS = (
    Parameter("v_min", "km/s", 800.0, 0.0, 1.0e5, "lowest launch speed", "our choice",
              low_open=True, kind="velocity"),
    Parameter("v_max", "km/s", 2500.0, 0.0, 1.0e5, "highest launch speed", "our choice",
              low_open=True, kind="velocity"),
    Parameter("slope", "", 0.0, -10.0, 10.0, "power-law index of p(v) ∝ v**slope (0: uniform)", "our choice"),
)


@dataclass(frozen=True)
class BoundedPowerLawSpeed:
    """swerve's cheap launch-speed family: ``p(v) ∝ v**slope`` on [v_min, v_max] km/s.

    ``slope = 0`` is uniform in v (e.g. 800–2500 km/s), ``slope = -1`` log-flat; three numbers
    to vary as nuisance parameters. The pdf and sampler are analytic.

    Parameters
    ----------
    v_min, v_max : float
        Speed range, km/s, ``0 < v_min < v_max``.
    slope : float
        Power-law index.
    """

    PARAMETERS = _BPL_PARAMETERS

    v_min: float = _BPL_PARAMETERS[0].default
    v_max: float = _BPL_PARAMETERS[1].default
    slope: float = _BPL_PARAMETERS[2].default

    def __post_init__(self):
        values = _validate_declared(self.PARAMETERS, {p.name: getattr(self, p.name) for p in self.PARAMETERS})
        for k, v in values.items():
            object.__setattr__(self, k, v)
        if not self.v_max > self.v_min:
            raise ValueError(f"v_max: expected v_max > v_min = {self.v_min:g} km/s, got {self.v_max:g}")

    def pdf(self, v):
        """Density per km/s at speeds ``v`` (km/s); 0 outside [v_min, v_max]."""
        v = np.asarray(v, dtype=float)
        inside = (v >= self.v_min) & (v <= self.v_max)
        norm = _powerlaw_norm(self.v_min, self.v_max, self.slope)
        return np.where(inside, np.where(inside, v, 1.0) ** self.slope / norm, 0.0)

    def logpdf(self, v):
        """Natural log of :meth:`pdf` (-inf outside the range)."""
        v = np.asarray(v, dtype=float)
        inside = (v >= self.v_min) & (v <= self.v_max)
        norm = _powerlaw_norm(self.v_min, self.v_max, self.slope)
        return np.where(inside, self.slope * np.log(np.where(inside, v, 1.0)) - math.log(norm), -np.inf)

    def cdf(self, v):
        """Cumulative distribution at speeds ``v`` (km/s)."""
        return _powerlaw_cdf(v, self.v_min, self.v_max, self.slope)

    def sample(self, n, rng):
        """``n`` launch speeds (km/s), shape (n,)."""
        n, rng = _check_n(n), _check_rng(rng)
        return _powerlaw_ppf(rng.random(n), self.v_min, self.v_max, self.slope)

    def trajectory_weights(self, samples: BankSamples, *, mass_range=None, table_samples: int = 400_000,
                           table_seed: int = 20100101) -> TrajectoryWeights:
        """Weights ``p(v) / q(v) Δt / N`` of a bank's samples (:class:`BankSamples`); the
        missing fraction by the analytic CDF. ``table_samples``, ``table_seed``: unused."""
        _no_mass_range(mass_range)
        s = samples
        hi = self.v_max
        missing = float(1.0 - self.cdf(s.v_hi))
        if s.v_lo > s.v_reach:
            missing += float(self.cdf(s.v_lo) - self.cdf(s.v_reach))
        message = None
        if hi > s.v_hi:
            message = (f"launch v_max = {hi:g} km/s exceeds the bank's proposal range [{s.v_lo:g}, {s.v_hi:g}] km/s "
                       f"({missing:.1%} of launches faster than the bank's orbits); build a bank with v_hi >= {hi:g}")
        return _speed_only_weights(self, s, missing, message)

    def to_dict(self) -> dict:
        d = {"model": "bounded_power_law_speed"}
        d.update({p.name: getattr(self, p.name) for p in self.PARAMETERS})
        return d

    @classmethod
    def from_dict(cls, d: dict) -> BoundedPowerLawSpeed:
        return cls(**_strip_model(d, "bounded_power_law_speed", tuple(p.name for p in cls.PARAMETERS)))


def _strip_model(d, model, allowed):
    if not isinstance(d, dict):
        raise ValueError(f"{model}: expected a dict, got {type(d).__name__}")
    if d.get("model", model) != model:
        raise ValueError(f"model: expected {model!r}, got {d.get('model')!r}")
    rest = {k: v for k, v in d.items() if k != "model"}
    extra = set(rest) - set(allowed)
    if extra:
        raise ValueError(f"{model}: unknown keys {sorted(extra)}; expected some of {list(allowed)}")
    return rest


_MODELS = {"hills": HillsLaunch, "bounded_power_law_speed": BoundedPowerLawSpeed,
           "tabulated_speed": TabulatedSpeedDensity}


def launch_model_from_dict(d: dict):
    """Rebuild any launch model from its :meth:`to_dict` output (dispatch on ``d["model"]``)."""
    if not isinstance(d, dict) or d.get("model") not in _MODELS:
        got = d.get("model") if isinstance(d, dict) else type(d).__name__
        raise ValueError(f"model: expected one of {sorted(_MODELS)}, got {got!r}")
    return _MODELS[d["model"]].from_dict(d)


# --------------------------------------------------------------------------------------------
# lifetimes and flight times


def main_sequence_lifetime(mass):
    """Main-sequence lifetime ``t = 10 Gyr (m/Msun)**-2.5``, in Myr.

    Common practice and crude (3 Msun: 642 Myr, 4 Msun: 312 Myr); the fits of Hurley, Pols &
    Tout (2000) are better and may replace this law.

    Parameters
    ----------
    mass : float or array
        Stellar mass, Msun (> 0).
    """
    m = np.asarray(mass, dtype=float)
    if np.any(~(m > 0)):
        raise ValueError("mass: expected positive stellar masses in Msun")
    return 1.0e4 * m ** -2.5


def flight_time_weight(t_flight, mass, t_max=None, normalise: bool = True):
    """Flight-time weight of stars of given mass under a constant ejection rate.

    With a constant ejection rate and the star ejected young (its age at ejection neglected,
    a common simplification), the flight times of visible stars of mass ``m`` are uniform on
    ``[0, T)`` with ``T = min(t_MS(m), t_max)``.

    Parameters
    ----------
    t_flight : float or array
        Flight time since ejection, Myr.
    mass : float or array
        Stellar mass, Msun (broadcast against ``t_flight``).
    t_max : float, optional
        Longest flight time considered (e.g. the bank's integration time), Myr.
    normalise : bool
        True: the normalised density ``1/T`` where alive, else 0 (1/Myr; integrates to 1 over
        t_flight). False: the alive indicator (1.0 or 0.0) -- the weight to multiply by the
        sampling step Δt when counting the present-day population, since longer-lived stars
        are proportionally more numerous.

    Returns
    -------
    array
        Weights, shape of the broadcast inputs.
    """
    t = np.asarray(t_flight, dtype=float)
    T = main_sequence_lifetime(mass)
    if t_max is not None:
        t_max = float(t_max)
        if not (math.isfinite(t_max) and t_max > 0):
            raise ValueError(f"t_max: expected a positive time in Myr, got {t_max!r}")
        T = np.minimum(T, t_max)
    alive = (t >= 0) & (t < T)
    if normalise:
        return np.where(alive, 1.0 / T, 0.0)
    return alive.astype(float)


# --------------------------------------------------------------------------------------------
# the Hills model's joint density of launch speed and survival


@dataclass(frozen=True, eq=False)
class HillsAliveTable:
    """Joint density of launch speed and survival for the Hills model, tabulated.

    ``value[b, g]`` is the density per dex of launch speed in bin ``b`` of log10 v of stars that
    are still on the main sequence at flight time ``t_grid[g]``; linear in t between grid points.
    Normalised per ejection (of a star in ``mass_range`` when one is given).
    """

    log10_edges: np.ndarray
    t_grid: np.ndarray
    value: np.ndarray
    meta: dict

    def __call__(self, v, t):
        """Density per km/s of (launch speed ``v``, alive at flight time ``t`` [Myr])."""
        v = np.asarray(v, dtype=float)
        t = np.asarray(t, dtype=float)
        x = np.log10(np.maximum(v, 1e-300))
        b = np.searchsorted(self.log10_edges, x, side="right") - 1
        inside = (b >= 0) & (b < self.value.shape[0])
        b = np.clip(b, 0, self.value.shape[0] - 1)
        tg = self.t_grid
        fi = np.clip((t - tg[0]) / (tg[1] - tg[0]), 0.0, tg.size - 1 - 1e-12)
        i = fi.astype(np.int64)
        f = fi - i
        val = (1.0 - f) * self.value[b, i] + f * self.value[b, np.minimum(i + 1, tg.size - 1)]
        return np.where(inside & (t >= tg[0]) & (t <= tg[-1]), val / (v * math.log(10.0)), 0.0)


def hills_alive_table(launch, m_bh: float, t_max: float, *, mass_range=None, n_samples: int = 400_000,
                      seed: int = 20100101, n_bins: int = 120, log10_v_range=(1.5, 4.5),
                      n_t: int = 301) -> HillsAliveTable:
    """Monte-Carlo table of ``p(v, alive at t)`` for a :class:`HillsLaunch`.

    Parameters
    ----------
    launch : HillsLaunch
    m_bh : float
        Black-hole mass, Msun.
    t_max : float
        Largest flight time tabulated, Myr.
    mass_range : (float, float), optional
        Keep only ejected stars with mass in [lo, hi] Msun (normalised per such ejection).
    n_samples, seed : int
        Ejections simulated and the seed of their Generator (recorded).
    n_bins, log10_v_range : int, (float, float)
        Histogram in log10 v.
    n_t : int
        Flight-time grid points on [0, t_max].
    """
    s = launch.sample(int(n_samples), np.random.default_rng(seed), m_bh)
    keep = np.ones(s["mass"].size, dtype=bool)
    if mass_range is not None:
        lo, hi = (float(x) for x in mass_range)
        if not (0 <= lo < hi):
            raise ValueError(f"mass_range: expected (low, high) in Msun with 0 <= low < high, got {mass_range!r}")
        keep = (s["mass"] >= lo) & (s["mass"] <= hi)
        if keep.sum() < 1000:
            raise ValueError(f"mass_range: only {int(keep.sum())} of {n_samples} Hills ejections fall in "
                             f"{list(mass_range)} Msun; widen the range or check the launch model's m_min, m_max")
    x = np.log10(s["v_ej"][keep])
    life = main_sequence_lifetime(s["mass"][keep])
    edges = np.linspace(float(log10_v_range[0]), float(log10_v_range[1]), int(n_bins) + 1)
    t_grid = np.linspace(0.0, float(t_max), int(n_t))
    b = np.searchsorted(edges, x, side="right") - 1
    ok = (b >= 0) & (b < n_bins)
    # for each speed bin, the number of its stars alive at each grid time
    order = np.argsort(life[ok])
    b_ok, life_ok = b[ok][order], life[ok][order]
    value = np.zeros((int(n_bins), t_grid.size))
    for j in range(int(n_bins)):
        lj = life_ok[b_ok == j]
        value[j] = lj.size - np.searchsorted(lj, t_grid, side="right")
    value /= keep.sum() * np.diff(edges)[:, None]
    meta = {"model": launch.to_dict(), "m_bh": float(m_bh), "n_samples": int(n_samples), "seed": int(seed),
            "mass_range": None if mass_range is None else [float(mass_range[0]), float(mass_range[1])],
            "fraction_outside_table": float(1.0 - ok.sum() / keep.sum())}
    return HillsAliveTable(edges, t_grid, value, meta)


def _m_bh_of(galaxy_dict) -> float:
    for c in galaxy_dict.get("components", []):
        if "m_bh" in c.get("params", {}):
            return float(c["params"]["m_bh"])
    raise ValueError("Hills launch: the bank's Galaxy has no central black hole (m_bh)")


_HILLS_CACHE: dict = {}


def _hills_table_cached(launch, m_bh, t_max, mass_range, n_samples, seed):
    """:func:`hills_alive_table`, memoised on its (deterministic) inputs."""
    key = json.dumps([launch.to_dict(), m_bh, t_max, None if mass_range is None else list(map(float, mass_range)),
                      int(n_samples), int(seed)], sort_keys=True)
    if key not in _HILLS_CACHE:
        if len(_HILLS_CACHE) >= 32:
            _HILLS_CACHE.pop(next(iter(_HILLS_CACHE)))
        _HILLS_CACHE[key] = hills_alive_table(launch, m_bh, t_max, mass_range=mass_range,
                                              n_samples=n_samples, seed=seed)
    return _HILLS_CACHE[key]
