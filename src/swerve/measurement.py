"""The measurement model: survey error laws, mock errors and per-star error samples.

Two directions of one model of how stars are measured:

* **forward** (making mock catalogs): an :class:`ErrorLaw` is an uncertainty that grows with
  heliocentric distance, an :class:`ErrorModel` a survey's laws for parallax, distance, proper
  motion and line-of-sight velocity; :meth:`ErrorModel.observe` adds Gaussian errors to true
  observables (used by :func:`swerve.population.make_mock`). :func:`parse_error_model` reads
  an error model from a short string or a TOML file (``swerve validate``, ``swerve forecast``).
* **backward** (fitting observed catalogs): :func:`draw_samples` draws K samples of each star's
  true observables from its measurement errors, under a distance prior
  (:data:`DISTANCE_PRIORS`, :func:`parallax_log_posterior`), and moves them to the
  Galactocentric frame as :class:`ErrorSamples` with per-sample log-weights;
  :func:`distance_information`, :func:`distance_warning` and :func:`check_parallaxes` say how
  much the distances rest on that prior and refuse parallaxes that "none" cannot use.

Catalog files are read and validated by :mod:`swerve.catalog`; this module starts from its
:class:`~swerve.catalog.Catalog`.

Writing an error law
--------------------
An error law is ``sigma(d) = A + B (d / 10 kpc)**P`` at the star's true heliocentric distance
``d`` (A, B >= 0, not both 0; P >= 0). It is written one way in each kind of input:

==============================  ===========================  ==================================
where                           form                         examples
==============================  ===========================  ==================================
text (options, NAME=VALUE)      ``A`` or ``A:B:P``           ``--error-pm 0:0.01:1``,
                                (``A:B`` means P = 1)        ``"pm=0:0.01:1,vlos=5,dist=0.1"``
a TOML file, Python             a number or ``[A, B, P]``    ``pm = [0.0, 0.01, 1.0]``,
                                (1 to 3 numbers)             ``ErrorModel(pm=[0, 0.01, 1])``
==============================  ===========================  ==================================

The colon keeps a law one item of a comma-separated NAME=VALUE list. A law written with commas
(``"0,0.01,1"``, the form ``swerve mock`` once took) is refused with a one-line error that names
the colon form. :meth:`ErrorLaw.to_dict` writes ``{"a": A, "b": B, "p": P}`` (the record in a
mock catalog's meta); :meth:`ErrorLaw.parse` reads that back too.
"""

from __future__ import annotations

import math
import os
from dataclasses import dataclass

import numpy as np
from astropy import units as u
from scipy.special import log_ndtr, ndtri_exp

from .catalog import Catalog
from .frames import PM_KMS_PER_KPC_MASYR, helio_to_galacto, resolve_solar
from .units import to_internal
from .vocabulary import DISTANCE_PRIORS

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10 needs the tomli backport
    import tomli as tomllib  # type: ignore[no-redef]

__all__ = [
    "DISTANCE_PRIORS",
    "ERROR_D_REF",
    "ERROR_FREE",
    "ErrorLaw",
    "ErrorModel",
    "ErrorSamples",
    "check_parallaxes",
    "distance_information",
    "distance_warning",
    "draw_samples",
    "parallax_log_posterior",
    "parse_error_law",
    "parse_error_model",
]

#: reference distance of the error laws, kpc
ERROR_D_REF = 10.0

#: Distance priors for stars whose distance comes from the parallax (see :func:`draw_samples`).


# --------------------------------------------------------------------------------------------
# error model


@dataclass(frozen=True)
class ErrorLaw:
    """An uncertainty growing with heliocentric distance: ``σ(d) = a + b (d / 10 kpc)**p``.

    ``a`` and ``b`` in the unit of the quantity (mas, mas/yr, km/s, or a fraction); constant
    when ``b = 0``. Examples: ``ErrorLaw(0.02)`` is ±0.02 everywhere; ``ErrorLaw(0, 0.01, 1)``
    is 0.01 at 10 kpc, growing linearly with distance.
    """

    a: float
    b: float = 0.0
    p: float = 1.0

    def __post_init__(self):
        vals = []
        for name in ("a", "b", "p"):
            v = getattr(self, name)
            try:
                fv = float(v)
            except (TypeError, ValueError):
                raise ValueError(f"error law {name}: expected a number, got {v!r}") from None
            if not (math.isfinite(fv) and fv >= 0):
                raise ValueError(f"error law {name}: expected a finite non-negative number, got {v!r}")
            vals.append(fv)
            object.__setattr__(self, name, fv)
        if vals[0] == 0 and vals[1] == 0:
            raise ValueError("error law: a + b must be positive (an uncertainty of zero)")

    def __call__(self, d):
        """σ at heliocentric distances ``d`` (kpc)."""
        return self.a + self.b * (np.asarray(d, dtype=float) / ERROR_D_REF) ** self.p

    def to_dict(self) -> dict:
        return {"a": self.a, "b": self.b, "p": self.p}

    @classmethod
    def parse(cls, value, name="error law") -> ErrorLaw:
        """From a number, a list ``[A, B, P]`` of 1 to 3 numbers, the text ``"A"`` or ``"A:B:P"``
        (:func:`parse_error_law`) or the record ``{"a": A, "b": B, "p": P}`` of :meth:`to_dict`.

        A ValueError names ``name`` and the accepted forms (see the module docstring).
        """
        if isinstance(value, ErrorLaw):
            return value
        if isinstance(value, dict):
            unknown = set(value) - {"a", "b", "p"}
            if unknown:
                raise ValueError(f"{name}: unknown keys {sorted(unknown)}; expected a, b, p")
            return cls(**value)
        if isinstance(value, str):
            value = parse_error_law(value, name)
        if isinstance(value, (int, float)) and not isinstance(value, bool):
            return cls(float(value))
        if isinstance(value, (list, tuple)) and 1 <= len(value) <= 3:
            return cls(*value)
        raise ValueError(f"{name}: expected a number, a list [A, B, P] or the text A or A:B:P, got {value!r}")


#: how an error law is written in text, for error messages
_LAW_TEXT_FORM = "A or A:B:P (sigma(d) = A + B (d/10 kpc)**P; e.g. 5 or 0:0.01:1)"


def parse_error_law(text: str, name: str = "error law") -> list[float]:
    """The numbers ``[A]``, ``[A, B]`` or ``[A, B, P]`` of an error law written as text.

    The text form is ``A`` or ``A:B:P`` (``A:B`` means P = 1); see the module docstring. A law
    written with commas (``"0,0.01,1"``) or anything else is refused with a one-line
    ValueError that starts with ``name`` and names the accepted form. The numbers are not
    range-checked here (:class:`ErrorLaw` does that).
    """
    s = str(text).strip()
    if "," in s:
        raise ValueError(f"{name}: {s!r}: an error law is written with colons, not commas: {_LAW_TEXT_FORM}")
    parts = s.split(":")
    try:
        vals = [float(x) for x in parts]
    except ValueError:
        raise ValueError(f"{name}: {s!r} is not a number; expected {_LAW_TEXT_FORM}") from None
    if len(vals) > 3:
        raise ValueError(f"{name}: {s!r}: expected one to three numbers, {_LAW_TEXT_FORM}")
    return vals


@dataclass(frozen=True)
class ErrorModel:
    """Gaussian measurement errors of a survey, each a :class:`ErrorLaw` of distance.

    Parameters
    ----------
    parallax : ErrorLaw or None
        Parallax uncertainty, mas (the catalog gets ``parallax`` + ``parallax_err``).
    distance_frac : ErrorLaw or None
        Fractional uncertainty of an independent (e.g. spectrophotometric) distance (the
        catalog gets ``distance`` + ``distance_err``). At least one of ``parallax`` and
        ``distance_frac``; with both, both pairs are written (independent measurements).
    pm : ErrorLaw
        Uncertainty of each of pmra (incl. cos dec) and pmdec, mas/yr.
    corr_pmra_pmdec : float
        Correlation of the pmra and pmdec errors, in (-1, 1).
    vlos : ErrorLaw
        Line-of-sight velocity uncertainty, km/s.

    Notes
    -----
    Each σ is evaluated at the star's *true* distance and written as the catalog's ``_err``.
    Observed parallaxes are Gaussian and may be zero or negative: :mod:`swerve.catalog` refuses
    such a row unless it also has a distance, so a parallax-only model warns
    (:func:`make_mock`) when it draws one; add ``distance_frac`` for catalogs that every command
    reads. Observed distances are Gaussian with σ = f d_true, truncated to positive values
    (redrawn).
    """

    parallax: ErrorLaw | None = None
    distance_frac: ErrorLaw | None = None
    pm: ErrorLaw = ErrorLaw(0.0, 0.01, 1.0)
    corr_pmra_pmdec: float = 0.0
    vlos: ErrorLaw = ErrorLaw(5.0)

    def __post_init__(self):
        for name in ("parallax", "distance_frac", "pm", "vlos"):
            v = getattr(self, name)
            if v is not None:
                object.__setattr__(self, name, ErrorLaw.parse(v, f"error model {name}"))
        if self.parallax is None and self.distance_frac is None:
            raise ValueError("error model: give a parallax (mas) or a distance_frac (fraction) uncertainty, or both")
        if self.pm is None or self.vlos is None:
            raise ValueError("error model: pm and vlos uncertainties are required")
        rho = float(self.corr_pmra_pmdec)
        if not (math.isfinite(rho) and -1.0 < rho < 1.0):
            raise ValueError(f"error model corr_pmra_pmdec: expected a correlation in (-1, 1), got {self.corr_pmra_pmdec!r}")
        object.__setattr__(self, "corr_pmra_pmdec", rho)

    def to_dict(self) -> dict:
        return {"parallax": None if self.parallax is None else self.parallax.to_dict(),
                "distance_frac": None if self.distance_frac is None else self.distance_frac.to_dict(),
                "pm": self.pm.to_dict(), "corr_pmra_pmdec": self.corr_pmra_pmdec, "vlos": self.vlos.to_dict(),
                "law": "sigma(d) = a + b (d / 10 kpc)**p at the true heliocentric distance d"}

    @classmethod
    def from_dict(cls, d: dict) -> ErrorModel:
        d = {k: v for k, v in d.items() if k != "law"}
        unknown = set(d) - {"parallax", "distance_frac", "pm", "corr_pmra_pmdec", "vlos"}
        if unknown:
            raise ValueError(f"error model: unknown keys {sorted(unknown)}")
        return cls(**d)

    def observe(self, helio: dict, rng) -> dict:
        """Noisy observables and their uncertainties from true heliocentric ``helio``
        (:func:`swerve.frames.galacto_to_helio` output)."""
        d = np.asarray(helio["distance"], dtype=float)
        n = d.size
        out = {"ra": helio["ra"], "dec": helio["dec"]}
        if self.parallax is not None:
            s = self.parallax(d)
            out["parallax"] = helio["parallax"] + s * rng.standard_normal(n)
            out["parallax_err"] = s
        if self.distance_frac is not None:
            s = self.distance_frac(d) * d
            obs = d + s * rng.standard_normal(n)
            bad = obs <= 0
            for _ in range(1000):
                if not bad.any():
                    break
                obs[bad] = d[bad] + s[bad] * rng.standard_normal(int(bad.sum()))
                bad = obs <= 0
            else:  # pragma: no cover - only for absurd fractional errors
                raise ValueError("error model distance_frac: cannot draw positive distances; lower it")
            out["distance"] = obs
            out["distance_err"] = s
        s_pm = self.pm(d)
        rho = self.corr_pmra_pmdec
        e1 = rng.standard_normal(n)
        e2 = rho * e1 + math.sqrt(1.0 - rho * rho) * rng.standard_normal(n)
        out["pmra"] = helio["pmra"] + s_pm * e1
        out["pmra_err"] = s_pm
        out["pmdec"] = helio["pmdec"] + s_pm * e2
        out["pmdec_err"] = s_pm.copy()
        s_v = self.vlos(d)
        out["vlos"] = helio["vlos"] + s_v * rng.standard_normal(n)
        out["vlos_err"] = s_v
        out["corr_pmra_pmdec"] = np.full(n, rho)
        return out


# --------------------------------------------------------------------------------------------
# error models from text

#: the "error-free" model: errors far below the signal (an ErrorModel needs σ > 0)
ERROR_FREE = {"distance_frac": 1e-4, "pm": 1e-5, "vlos": 0.01}

_ERR_KEYS = {"pm": "pm", "vlos": "vlos", "dist": "distance_frac", "plx": "parallax", "corr": "corr_pmra_pmdec"}


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def parse_error_model(text) -> ErrorModel:
    """An :class:`ErrorModel` from a string or a TOML file.

    Forms:

    * ``"pm=0.02,vlos=5,dist=0.1"``: proper-motion error (mas/yr), line-of-sight velocity
      error (km/s), fractional distance error; optional ``plx=`` (parallax error, mas) and
      ``corr=`` (pmra–pmdec correlation, one number). Each error is an error law in its text
      form ``A`` or ``A:B:P``, σ(d) = A + B (d/10 kpc)^P (e.g. ``pm=0:0.01:1``; see the module
      docstring). Without ``dist`` and ``plx``, ``dist=0.1``; without ``pm``, 0.02 mas/yr;
      without ``vlos``, 5 km/s.
    * ``"none"``: error-free (σ_pm = 1e-5 mas/yr, σ_vlos = 0.01 km/s, 0.01% distances).
    * ``PATH.toml``: keys ``pm``, ``vlos``, ``distance_frac``, ``parallax`` (numbers or
      ``[A, B, P]``), ``corr_pmra_pmdec``.

    Bad input raises a one-line ValueError starting with ``errors:`` (and the file's name).
    """
    if isinstance(text, ErrorModel):
        return text
    s = str(text).strip()
    if s.lower() == "none":
        return ErrorModel(**ERROR_FREE)
    if s.endswith(".toml"):
        if not os.path.isfile(s):
            raise ValueError(f"errors: file {s} does not exist")
        try:
            with open(s, "rb") as fh:
                d = tomllib.load(fh)
            return ErrorModel.from_dict(d)
        except (ValueError, TypeError) as exc:  # TOMLDecodeError is a ValueError
            raise ValueError(f"errors: {s}: {str(exc).splitlines()[0]}") from None
    kw = {}
    for item in s.split(","):
        name, sep, value = item.partition("=")
        name = name.strip()
        if not sep and _is_number(name):
            raise ValueError(f"errors: {item.strip()!r} in {s!r}: an error law's numbers are separated by colons, "
                             f"not commas: NAME=A or NAME=A:B:P (e.g. pm=0:0.01:1,vlos=5,dist=0.1)")
        if not sep or name not in _ERR_KEYS:
            raise ValueError(f"errors: {item.strip()!r} in {s!r}: expected NAME=VALUE with NAME one of "
                             f"{', '.join(_ERR_KEYS)} and VALUE an error law A or A:B:P "
                             f"(e.g. pm=0:0.01:1,vlos=5,dist=0.1), 'none' or a .toml file")
        key = _ERR_KEYS[name]
        parts = parse_error_law(value, f"errors: {item.strip()!r}")
        if key == "corr_pmra_pmdec":
            if len(parts) != 1:
                raise ValueError(f"errors: {item.strip()!r}: expected one number, a correlation in (-1, 1)")
            kw[key] = parts[0]
        else:
            kw[key] = parts[0] if len(parts) == 1 else parts
    if "distance_frac" not in kw and "parallax" not in kw:
        kw["distance_frac"] = 0.1
    kw.setdefault("pm", 0.02)
    kw.setdefault("vlos", 5.0)
    return ErrorModel(**kw)


# --------------------------------------------------------------------------------------------
# error samples


@dataclass
class ErrorSamples:
    """K samples of each star's true observables, transformed to Galactocentric coordinates.

    Attributes
    ----------
    ids : array of str, shape (n,)
    position : array of shape (n, k, 3)
        Galactocentric position, kpc.
    velocity : array of shape (n, k, 3)
        Galactocentric velocity, km/s.
    log_weight : array of shape (n, k)
        ``log_jacobian + log_prior``: the log importance weight of each sample, up to an
        additive constant per star (see :func:`draw_samples`).
    log_jacobian : array of shape (n, k)
        ``2 log(kappa d)``, the log of |det d(v)/d(pmra, pmdec, vlos)| at the sample's distance.
    log_prior : array of shape (n, k)
        The distance part of the importance weight: log(posterior / proposal) of the sampled
        parallax of a parallax star under a volume prior (nearly constant per star), 0 for
        stars sampled from a distance Gaussian and under "none" (see :func:`draw_samples`).
    distance : array of shape (n, k)
        Sampled heliocentric distance, kpc.
    pmra, pmdec : arrays of shape (n, k)
        Sampled proper motions, mas/yr.
    vlos : array of shape (n, k)
        Sampled line-of-sight velocity, km/s.
    ra, dec : arrays of shape (n,)
        The stars' sky positions, deg (not sampled).
    from_parallax : array of bool, shape (n,)
        Whether the star's distance came from its parallax.
    distance_prior : str
    settings : dict
        The prior's settings (length scale, maximum distance) and the solar parameters used
        (:meth:`swerve.frames.SolarParameters.to_dict`).
    """

    ids: np.ndarray
    position: np.ndarray
    velocity: np.ndarray
    log_weight: np.ndarray
    log_jacobian: np.ndarray
    log_prior: np.ndarray
    distance: np.ndarray
    pmra: np.ndarray
    pmdec: np.ndarray
    vlos: np.ndarray
    ra: np.ndarray
    dec: np.ndarray
    from_parallax: np.ndarray
    distance_prior: str
    settings: dict

    @property
    def n(self) -> int:
        """Number of stars."""
        return int(self.position.shape[0])

    @property
    def k(self) -> int:
        """Samples per star."""
        return int(self.position.shape[1])

    def weights(self) -> np.ndarray:
        """Normalised weights, shape (n, k): each star's weights sum to 1."""
        lw = self.log_weight - self.log_weight.max(axis=1, keepdims=True)
        w = np.exp(lw)
        return w / w.sum(axis=1, keepdims=True)

    def effective_sample_size(self) -> np.ndarray:
        """Kish effective sample size per star, ``1 / sum(w**2)`` of the normalised weights, (n,)."""
        w = self.weights()
        return 1.0 / np.sum(w * w, axis=1)


#: "exponential-length" samples distances below this many length scales (prior mass beyond:
#: about 1e-35 of the total).
_EXP_CUTOFF = 100.0


def _truncnorm(mean, sd, low, k, rng):
    """(n, k) draws of N(mean, sd) truncated to > low, by inverse CDF (exact, no rejection).

    With a = (low - mean) / sd, z = -Phi^-1(U Phi(-a)) for U uniform on (0, 1) is N(0, 1)
    truncated to z > a; computed in log space (``log_ndtr``, ``ndtri_exp``), so it stays exact
    however far into the tail ``a`` lies.
    """
    a = (low - mean) / sd
    # uniform on the open interval (0, 1): 53 random bits, offset by half a step
    uni = (rng.integers(0, 2**53, size=(mean.shape[0], k), dtype=np.int64) + 0.5) / 2.0**53
    z = -ndtri_exp(np.log(uni) + log_ndtr(-a)[:, None])
    z = np.maximum(z, a[:, None])  # round-off at the boundary
    out = mean[:, None] + sd[:, None] * z
    return np.maximum(out, np.nextafter(low, np.inf)[:, None])


def distance_information(catalog: Catalog, distance_source: str = "auto", min_snr: float = 5.0) -> dict:
    """Where each star's distance comes from, and how many are set mostly by the distance prior.

    A star is *prior-dominated* when its distance comes from its parallax (see
    ``distance_source`` of :func:`draw_samples`) and the parallax's signal-to-noise ratio
    ``parallax / parallax_err`` is below ``min_snr`` (negative parallaxes included): its
    distance posterior is then mostly the prior's shape (S/N 5 is a fractional parallax error
    of 20%, a usual limit below which 1/parallax is not trusted: common practice).

    Returns
    -------
    dict
        ``n``, ``from_distance``, ``from_parallax``, ``prior_dominated``,
        ``non_positive_parallax`` (counts), ``min_snr`` and ``prior_dominated_ids`` (all of them).
    """
    if distance_source not in ("auto", "distance", "parallax"):
        raise ValueError(f"distance_source: expected 'auto', 'distance' or 'parallax', got {distance_source!r}")
    has_d = catalog.has_distance
    if distance_source == "distance":
        use_p = np.zeros(catalog.n, dtype=bool)
    elif distance_source == "parallax":
        use_p = catalog.has_parallax
    else:
        use_p = ~has_d & catalog.has_parallax
    with np.errstate(all="ignore"):
        snr = catalog.parallax / catalog.parallax_err
    weak = use_p & ~(snr >= min_snr)
    return {
        "n": catalog.n,
        "from_distance": int((has_d & ~use_p).sum()),
        "from_parallax": int(use_p.sum()),
        "prior_dominated": int(weak.sum()),
        "non_positive_parallax": int((use_p & ~(catalog.parallax > 0)).sum()),
        "min_snr": float(min_snr),
        "prior_dominated_ids": [str(x) for x in catalog.ids[weak]],
    }


def check_parallaxes(catalog: Catalog, distance_prior: str, distance_source: str = "auto",
                     max_fractional_parallax_error: float = 0.2) -> None:
    """Refuse parallaxes that ``distance_prior="none"`` cannot use (see :func:`draw_samples`).

    Under "none" (distance = 1/parallax) a star whose distance comes from its parallax needs a
    positive parallax with ``parallax_err / parallax <= max_fractional_parallax_error``. The
    one-line ValueError names the first such star and counts them all; nothing to check under
    the volume priors, which use every parallax.
    """
    if distance_prior != "none":
        return
    if distance_source == "distance":
        use_p = np.zeros(catalog.n, dtype=bool)
    elif distance_source == "parallax":
        use_p = np.ones(catalog.n, dtype=bool)
    else:
        use_p = ~catalog.has_distance
    use_p &= catalog.has_parallax
    if not use_p.any():
        return
    with np.errstate(all="ignore"):
        frac = catalog.parallax_err / catalog.parallax
    poor = use_p & ~((catalog.parallax > 0) & (frac <= max_fractional_parallax_error))
    if poor.any():
        i = int(np.flatnonzero(poor)[0])
        if catalog.parallax[i] > 0:
            why = f"fractional error {frac[i]:.3g} > {max_fractional_parallax_error}"
        else:
            why = "not positive"
        raise ValueError(
            f"{catalog.source}: star {str(catalog.ids[i])!r} (row {int(catalog.rows[i])}) has "
            f"parallax {catalog.parallax[i]:.4g} +- {catalog.parallax_err[i]:.4g} mas ({why}); "
            f"distance = 1/parallax is biased there and refusing such stars biases the sample: "
            f"use the distance prior 'exponential-length' or 'uniform-volume' "
            f"(--distance-prior, [errors] distance_prior) ({int(poor.sum())} of {int(use_p.sum())} "
            f"parallax star(s) like this)"
        )


def distance_warning(catalog: Catalog, distance_prior: str, distance_source: str = "auto",
                     min_snr: float = 5.0) -> str | None:
    """One line on the stars whose distance is prior-dominated (:func:`distance_information`),
    or None if there are none. It starts with ``"most distances are prior-dominated"`` when
    they are more than half the catalog."""
    info = distance_information(catalog, distance_source, min_snr)
    k, n = info["prior_dominated"], info["n"]
    if k == 0:
        return None
    text = (f"{k} of {n} stars have no independent distance and a parallax with S/N < {min_snr:g} "
            f"({info['non_positive_parallax']} of them <= 0): their distances come mostly from the "
            f"distance prior ({distance_prior!r})")
    if 2 * k > n:
        text = ("most distances are prior-dominated: " + text + "; results then depend on that prior: "
                "compare --distance-prior exponential-length and uniform-volume (and --length-scale), "
                "and prefer stars with independent distances")
    return text


#: Grid nodes per star of the distance-posterior proposal (see :func:`parallax_log_posterior`):
#: a log-spaced grid over the prior's whole support, a linear one over the parallax's
#: +-15 sigma and one at the prior's far edge.
_GRID_GLOBAL, _GRID_LOCAL = 1024, 257


def parallax_log_posterior(w, parallax, parallax_err, distance_prior, *, length_scale=10.0,
                           max_distance=300.0):
    """Log density of the true parallax ``w`` given a measured one, up to a constant per star.

    ``log N(parallax | w, parallax_err) + log pi_w(w)``, with ``pi_w(w) = pi(1/w) / w**2`` the
    distance prior moved to parallax: ``w**-4`` for "uniform-volume" (w >= 1/max_distance),
    ``w**-4 exp(-1 / (w L))`` for "exponential-length" (w >= 1/(100 L)), flat for "none"
    (w > 0); ``-inf`` outside the support. In distance, ``log p(d | parallax) =
    parallax_log_posterior(1/d, ...) - 2 log d``: for "exponential-length" its mode solves
    Bailer-Jones's cubic ``d**3 / L - 2 d**2 + (parallax / s**2) d - 1 / s**2 = 0``
    (Bailer-Jones 2015, PASP 127, 994).

    Parameters
    ----------
    w : array_like
        True parallax, mas (kpc^-1), broadcast against the others.
    parallax, parallax_err : array_like
        The measurement and its 1-sigma uncertainty, mas; the parallax may be <= 0.
    distance_prior : {"none", "uniform-volume", "exponential-length"}
    length_scale, max_distance : float
        kpc, as in :func:`draw_samples`.

    Returns
    -------
    ndarray
    """
    w = np.asarray(w, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = -0.5 * ((w - parallax) / parallax_err) ** 2
        if distance_prior == "uniform-volume":
            out = np.where(w >= 1.0 / max_distance, out - 4.0 * np.log(w), -np.inf)
        elif distance_prior == "exponential-length":
            out = np.where(w >= 1.0 / (_EXP_CUTOFF * length_scale),
                           out - 4.0 * np.log(w) - 1.0 / (w * length_scale), -np.inf)
        elif distance_prior == "none":
            out = np.where(w > 0, out, -np.inf)
        else:
            raise ValueError(f"distance_prior: expected one of {', '.join(DISTANCE_PRIORS)}, "
                             f"got {distance_prior!r}")
    return out


def _parallax_grid(plx, sp, w_lo):
    """Grid nodes (m, N), sorted, covering each star's parallax posterior on w >= w_lo."""
    m = plx.size
    # the far edge of the prior (w -> w_lo) holds the mass of a parallax far below w_lo within
    # about sp**2 / (w_lo - plx) of the edge
    gap = w_lo - plx
    with np.errstate(divide="ignore"):
        s_edge = np.where(gap > sp, sp * sp / np.where(gap > 0, gap, 1.0), sp)
    w_top = np.maximum(plx + 15.0 * sp, w_lo + 30.0 * s_edge)
    t = np.linspace(0.0, 1.0, _GRID_GLOBAL)
    g1 = w_lo * (w_top / w_lo)[:, None] ** t[None, :]
    a = np.maximum(w_lo, plx - 15.0 * sp)
    b = np.maximum(plx + 15.0 * sp, a)
    t2 = np.linspace(0.0, 1.0, _GRID_LOCAL)
    g2 = a[:, None] + (b - a)[:, None] * t2[None, :]
    g3 = w_lo + (30.0 * s_edge)[:, None] * t2[None, :]
    nodes = np.sort(np.concatenate([g1, g2, g3], axis=1), axis=1)
    return np.maximum(nodes, w_lo) if m else nodes


def _parallax_posterior_draws(plx, sp, prior, length_scale, max_distance, k, rng):
    """(m, k) draws of the true parallax from a tabulated proposal close to its posterior under
    the distance prior, and their exact log importance weights (posterior / proposal, up to a
    constant per star).

    The proposal: on each cell of :func:`_parallax_grid`, uniform in w, with the cell's mass
    given by the trapezoid rule on the posterior density at its two nodes. The weight divides
    the exact posterior density at the draw by that proposal density, so the weighted draws
    follow the posterior however coarse the grid is (a finer grid only makes the weights more
    even); every w with posterior density > 0 lies in a cell of positive mass unless the
    density at both its nodes underflows (about 1e-320 of the peak).
    """
    w_lo = 1.0 / (max_distance if prior == "uniform-volume" else _EXP_CUTOFF * length_scale)
    nodes = _parallax_grid(plx, sp, w_lo)
    kw = {"length_scale": length_scale, "max_distance": max_distance}
    lf = parallax_log_posterior(nodes, plx[:, None], sp[:, None], prior, **kw)
    top = lf.max(axis=1, keepdims=True)
    f = np.exp(lf - top)
    width = np.diff(nodes, axis=1)
    mass = width * 0.5 * (f[:, 1:] + f[:, :-1])
    total = mass.sum(axis=1, keepdims=True)
    cum = np.cumsum(mass, axis=1) / total
    m = plx.size
    w = np.empty((m, k))
    log_q = np.empty((m, k))
    for i in range(m):
        # side="right" never picks a cell of zero mass; round-off at the top of cum is sent to the
        # last cell with mass
        j = np.searchsorted(cum[i], rng.random(k), side="right")
        j = np.minimum(j, np.flatnonzero(mass[i] > 0)[-1])
        w[i] = nodes[i, j] + width[i, j] * rng.random(k)
        log_q[i] = np.log(mass[i, j] / total[i, 0]) - np.log(width[i, j])
    log_target = parallax_log_posterior(w, plx[:, None], sp[:, None], prior, **kw) - top
    return w, log_target - log_q


def draw_samples(
    catalog: Catalog,
    k: int,
    rng: np.random.Generator,
    distance_prior: str = "none",
    solar=None,
    *,
    distance_source: str = "auto",
    length_scale: float = 10.0,
    max_distance: float = 300.0,
    max_fractional_parallax_error: float = 0.2,
) -> ErrorSamples:
    """Draw K samples per star from its measurement errors and move them to Galactocentric frame.

    Parameters
    ----------
    catalog : Catalog
    k : int
        Samples per star (>= 1).
    rng : numpy.random.Generator
        The only source of randomness.
    distance_prior : {"none", "uniform-volume", "exponential-length"}
        Prior on the distance of stars whose distance comes from the parallax:

        - ``"none"``: distance = 1 / parallax (a prior flat in parallax); refused for a star
          with a parallax <= 0 or ``parallax_err / parallax > max_fractional_parallax_error``.
        - ``"uniform-volume"``: p(d) proportional to d^2 for 0 < d <= ``max_distance``.
        - ``"exponential-length"``: p(d) proportional to d^2 exp(-d / L), L = ``length_scale``
          (the exponentially decreasing space density of Bailer-Jones 2015, PASP 127, 994),
          cut at d = 100 L (where the prior's remaining mass is about 1e-35).

        Under the two volume priors every parallax is used as a measurement, whatever its
        signal-to-noise ratio or sign: the distance posterior is parallax likelihood x prior
        (:func:`parallax_log_posterior`). Where the parallax says little (S/N below about 5)
        that posterior is mostly the prior; :func:`distance_information` counts such stars.
    solar : None, str, dict or SolarParameters
        Solar parameters (default "v4.0"), resolved by :func:`swerve.frames.resolve_solar`.
    distance_source : {"auto", "distance", "parallax"}
        "auto": a star's distance Gaussian where it has one, else its parallax.
    length_scale : float or Quantity ['length']
        L of "exponential-length", kpc. 10 kpc is a swerve choice for halo stars, not a
        published value: set it for your sample.
    max_distance : float or Quantity ['length']
        Upper distance limit of "uniform-volume", kpc.
    max_fractional_parallax_error : float
        The limit of ``parallax_err / parallax`` under ``"none"``.

    Returns
    -------
    ErrorSamples

    Notes
    -----
    **What is sampled.** The proposal is the measurement distribution itself, read as a
    distribution of the true observables: (parallax, pmra, pmdec) from the trivariate normal
    with the catalog's uncertainties and correlations, vlos independent normal; except that a
    parallax star's true parallax w is drawn from (close to) its posterior under the distance
    prior. Under "none" w is drawn from its normal *truncated* to w > 0, exactly by inverse
    CDF. Under the volume priors w is drawn from a tabulated density close to the posterior
    N(parallax | w, s) pi_w(w) (a grid over the prior's whole support, refined around the
    measurement, see :func:`parallax_log_posterior`), with the exact ratio posterior /
    tabulated density as its weight, so the weights are nearly even even for a negative or
    low signal-to-noise parallax. The proper motions are drawn from their conditional normal
    given w, so the correlations hold. A distance star's distance is drawn
    from N(distance, distance_err) truncated to d > 0 and its proper motions from the marginal
    (pmra, pmdec) normal (the parallax, if any, is not used).

    **What the weights mean.** Write the star's data D, its true distance d, proper motions mu
    and line-of-sight velocity w, and p(v | x, theta) the model's density of the Galactocentric
    velocity at position x. The per-star likelihood is

        L(theta) = integral p(v(d, mu, w) | x(d), theta) J(d) p(D | d, mu, w) pi(d) dd dmu dw,

    where J(d) = |det dv/d(mu, w)| = (kappa d)^2 (kappa = 4.74047 km/s per kpc mas/yr): the map
    from (pmra, pmdec, vlos) to v at fixed position is linear (a rotation of
    (kappa d pmra, kappa d pmdec, vlos) plus the solar velocity), so the density of the
    *observables* is the density of v times J(d). J is constant for one star only at fixed
    distance; since the distance is sampled, it varies from sample to sample and is kept in
    ``log_jacobian``. With samples from the proposal q, proportional to p(D | ...) on the
    truncated region, L(theta) is proportional (by a theta-independent factor per star) to the
    weighted mean sum_k w_k p(v_k | x_k, theta) / sum_k w_k, with

    - parallax stars: log w = log J(d) + log[N(parallax | 1/d, s) pi(d) d^2 / q(1/d)], q the
      density the parallax was drawn from; d^2 = |dd/dparallax|^-1 changes the prior on d into
      one on parallax. Under "none" (q the truncated normal) this is log J(d).
    - distance stars: log w = log J(d) (a flat prior on d; the catalog distance is taken to be
      the measurement).

    ``log_prior`` holds the distance part, the log of posterior / proposal (0 for distance
    stars and under "none"; up to a constant per star), and ``log_jacobian`` log J(d). Weights
    ``exp(log_prior)`` alone make the samples a draw from each star's posterior of its true
    observables (what :mod:`swerve.trace` uses). A density in spherical
    components (v_r, v_theta, v_phi), folded or not, needs no further factor (an orthogonal map
    at fixed position). A likelihood that uses the density of fewer than three components must
    not use ``log_jacobian`` as it stands. The same weights serve a likelihood that integrates
    the velocity errors analytically at each distance sample: with v = A(d) eta + b,
    integral p(v) J L(eta) d eta = |det A| N(A eta_obs + b; model mean, model cov + A C A^T),
    and |det A| = J(d).

    Solar parameters are fixed, not sampled: they are shared by all stars, so drawing them per
    star and averaging per star would treat them as independent for each star, which is wrong.
    Vary them as global nuisance parameters of the fit, or rerun with other sets.
    The weights ``exp(log_prior)`` are nearly even by construction; ``log_weight`` also
    carries J(d), so it varies as much as d^2 does over the star's distance posterior: check
    :meth:`ErrorSamples.effective_sample_size`.

    References
    ----------
    Hogg, Myers & Bovy 2010, ApJ 725, 2166 (importance-sampling marginalisation over per-object
    samples); Bailer-Jones 2015, PASP 127, 994 (distance priors).
    """
    if not isinstance(catalog, Catalog):
        raise ValueError(f"catalog: expected a Catalog, got {type(catalog).__name__}")
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or k < 1:
        raise ValueError(f"k: expected a positive integer number of samples, got {k!r}")
    k = int(k)
    if not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng: expected a numpy.random.Generator, got {type(rng).__name__}")
    if distance_prior not in DISTANCE_PRIORS:
        raise ValueError(f"distance_prior: expected one of {', '.join(DISTANCE_PRIORS)}, "
                         f"got {distance_prior!r}")
    if distance_source not in ("auto", "distance", "parallax"):
        raise ValueError(f"distance_source: expected 'auto', 'distance' or 'parallax', "
                         f"got {distance_source!r}")
    checked = {}
    for name, value, kind in (("length_scale", length_scale, "length"),
                              ("max_distance", max_distance, "length"),
                              ("max_fractional_parallax_error", max_fractional_parallax_error, None)):
        if kind is not None and isinstance(value, u.Quantity):
            value = to_internal(value, kind, name)
        if not (isinstance(value, (int, float, np.number)) and not isinstance(value, bool)
                and math.isfinite(value) and value > 0):
            raise ValueError(f"{name}: expected a positive number, got {value!r}")
        checked[name] = float(value)
    length_scale, max_distance = checked["length_scale"], checked["max_distance"]
    max_fractional_parallax_error = checked["max_fractional_parallax_error"]
    solar = resolve_solar(solar)
    n = catalog.n

    has_d, has_p = catalog.has_distance, catalog.has_parallax
    if distance_source == "distance":
        use_p = np.zeros(n, dtype=bool)
        lacking = ~has_d
    elif distance_source == "parallax":
        use_p = np.ones(n, dtype=bool)
        lacking = ~has_p
    else:
        use_p = ~has_d
        lacking = ~(has_d | has_p)
    if lacking.any():
        i = int(np.flatnonzero(lacking)[0])
        what = "distance" if distance_source == "distance" else "parallax"
        raise ValueError(f"{catalog.source}: star {str(catalog.ids[i])!r} (row {int(catalog.rows[i])}) "
                         f"has no {what} to sample (distance_source={distance_source!r})")
    if distance_prior == "none":
        check_parallaxes(catalog, distance_prior, distance_source=distance_source,
                         max_fractional_parallax_error=max_fractional_parallax_error)

    dist = np.empty((n, k))
    pm = np.empty((n, k, 2))
    log_prior = np.zeros((n, k))
    mu = np.stack([catalog.pmra, catalog.pmdec], axis=-1)
    s1, s2 = catalog.pmra_err, catalog.pmdec_err
    rho = catalog.corr_pmra_pmdec
    cov_mm = np.empty((n, 2, 2))
    cov_mm[:, 0, 0], cov_mm[:, 1, 1] = s1**2, s2**2
    cov_mm[:, 0, 1] = cov_mm[:, 1, 0] = rho * s1 * s2

    ds = ~use_p
    if ds.any():
        idx = np.flatnonzero(ds)
        dist[idx] = _truncnorm(catalog.distance[idx], catalog.distance_err[idx], np.zeros(idx.size), k, rng)
        L = np.linalg.cholesky(cov_mm[idx])
        z = rng.standard_normal((idx.size, k, 2))
        pm[idx] = mu[idx, None, :] + np.einsum("nij,nkj->nki", L, z)
    if use_p.any():
        idx = np.flatnonzero(use_p)
        plx, sp = catalog.parallax[idx], catalog.parallax_err[idx]
        if distance_prior == "none":
            low = np.full(idx.size, np.finfo(float).tiny)  # keeps 1/parallax finite
            w = _truncnorm(plx, sp, low, k, rng)
            log_prior[idx] = 0.0
        else:
            w, log_prior[idx] = _parallax_posterior_draws(plx, sp, distance_prior, length_scale,
                                                          max_distance, k, rng)
        c_pw = np.stack([catalog.corr_parallax_pmra[idx] * sp * s1[idx],
                         catalog.corr_parallax_pmdec[idx] * sp * s2[idx]], axis=-1)  # (m, 2)
        gain = c_pw / (sp**2)[:, None]
        cond_mean = mu[idx, None, :] + gain[:, None, :] * (w - plx[:, None])[:, :, None]
        cond_cov = cov_mm[idx] - c_pw[:, :, None] * c_pw[:, None, :] / (sp**2)[:, None, None]
        L = np.linalg.cholesky(cond_cov)
        z = rng.standard_normal((idx.size, k, 2))
        pm[idx] = cond_mean + np.einsum("nij,nkj->nki", L, z)
        dist[idx] = 1.0 / w
    vlos = catalog.vlos[:, None] + catalog.vlos_err[:, None] * rng.standard_normal((n, k))
    log_jac = 2.0 * np.log(PM_KMS_PER_KPC_MASYR * dist)

    ra = np.repeat(catalog.ra, k)
    dec = np.repeat(catalog.dec, k)
    pos, vel = helio_to_galacto(ra, dec, dist.ravel(), pm[..., 0].ravel(), pm[..., 1].ravel(),
                                vlos.ravel(), solar=solar)
    settings = {"distance_source": distance_source, "solar": solar.to_dict()}
    if distance_prior == "exponential-length":
        settings["length_scale_kpc"] = float(length_scale)
    if distance_prior == "uniform-volume":
        settings["max_distance_kpc"] = float(max_distance)
    if distance_prior == "none":
        settings["max_fractional_parallax_error"] = float(max_fractional_parallax_error)
    return ErrorSamples(
        ids=catalog.ids.copy(),
        position=pos.reshape(n, k, 3),
        velocity=vel.reshape(n, k, 3),
        log_weight=log_jac + log_prior,
        log_jacobian=log_jac,
        log_prior=log_prior,
        distance=dist,
        pmra=pm[..., 0],
        pmdec=pm[..., 1],
        vlos=vlos,
        ra=catalog.ra.copy(),
        dec=catalog.dec.copy(),
        from_parallax=use_p,
        distance_prior=distance_prior,
        settings=settings,
    )
