"""Present-day populations and mock catalogs.

:func:`population_from_bank` turns a :class:`~swerve.bank.TrajectoryBank` and any launch model
into a weighted present-day :class:`Population` (weights from :func:`swerve.bank.sample_weights`,
no new integration), mirrors it out of the positive octant when the bank is an octant bank,
applies a :class:`~swerve.selection.Selection` with a report of what each cut removed, and
checks the effective sample size, naming the cause when it is too small. To reweight one bank
to many launch models, :func:`select_bank` does the launch-independent part once (mirroring and
cuts) and :meth:`SelectedSamples.population` then costs only the weights (one gather and one
multiply per sample; see ``benchmarks/forward.py``).

The ESS reported is Kish's ``(Σw)²/Σw²`` over samples; :attr:`Population.ess_orbits` is the
same over the weights summed per bank orbit, a more conservative count (samples of one orbit
at different flight times are different stars but share a launch direction and speed).

:func:`make_mock` draws a finite, unweighted sample of selected stars, adds the errors of a
survey's :class:`swerve.measurement.ErrorModel` (the measurement model), and returns an
astropy Table with exactly the columns and units of an observed catalog
(:data:`swerve.catalog.COLUMNS`), with the true parameters and every setting in its meta;
:func:`write_mock` writes it atomically (ECSV, FITS or CSV, from the file name).

Selection is applied to the *true* positions and velocities (as for the simulated summaries);
errors are added afterwards, except for a cut on a measured quantity
(:data:`swerve.selection.MEASURED_CUTS`, e.g. ``vlos_min``): a mock applies it to the measured
value, dropping the stars whose measurement fails it and drawing others, as a survey would.
"""

from __future__ import annotations

import json
import os
import warnings
from dataclasses import dataclass, field, replace

import numpy as np
from astropy.table import Table

from . import __version__
from .bank import TrajectoryBank, build_bank, effective_sample_size, sample_weights
from .fileio import atomic_path, jsonable
from .frames import folded_v_theta, galacto_to_helio, resolve_solar, spherical_components
from .galaxy import Galaxy
from .measurement import ErrorModel
from .rng import as_generator
from .selection import MEASURED_CUTS

__all__ = [
    "DEFAULT_MIN_ESS",
    "DEFAULT_WARN_ESS",
    "LowESSError",
    "LowESSWarning",
    "Population",
    "SelectedSamples",
    "make_mock",
    "population_from_bank",
    "select_bank",
    "write_mock",
]

#: below this effective sample size a population is refused (LowESSError)
DEFAULT_MIN_ESS = 20.0
#: below this effective sample size a LowESSWarning is issued
DEFAULT_WARN_ESS = 200.0


class LowESSError(ValueError):
    """A weighted population's effective sample size is below the threshold."""


class LowESSWarning(UserWarning):
    """A weighted population's effective sample size is small."""


# --------------------------------------------------------------------------------------------
# population


@dataclass(eq=False)
class Population:
    """A weighted present-day population of stars (plain arrays, internal units).

    Attributes
    ----------
    pos, vel : float arrays (n, 3)
        Galactocentric position (kpc) and velocity (km/s); float32 when made from a bank (its
        storage precision), shared with the :class:`SelectedSamples` it came from.
    weight : float array (n,)
        Weight of each star: Myr per unit ejection rate (``Γ Σ w`` is the expected number of
        stars for Γ ejections per Myr); 1 for a resampled (unweighted) population.
    orbit : int array (n,)
        Bank orbit index (-1 where not from a bank).
    t_flight : float array (n,)
        Flight time, Myr.
    v_launch : float array (n,)
        Launch speed, km/s.
    octant : bool
        True while the stars are folded into the positive octant (an octant bank not yet
        mirrored): galactocentric spherical quantities are right (up to the sign of v_phi),
        heliocentric ones are not; see :meth:`mirror`.
    meta : dict
        Provenance: Galaxy, launch model, bank, selection report, ESS.
    """

    pos: np.ndarray
    vel: np.ndarray
    weight: np.ndarray
    orbit: np.ndarray
    t_flight: np.ndarray
    v_launch: np.ndarray
    octant: bool = False
    meta: dict = field(default_factory=dict)

    @property
    def n(self) -> int:
        return int(self.weight.shape[0])

    @property
    def ess(self) -> float:
        """Kish effective sample size ``(Σw)² / Σw²``."""
        return effective_sample_size(self.weight)

    @property
    def ess_orbits(self) -> float:
        """Effective number of distinct bank orbits: the ESS of the weights summed per orbit."""
        if self.n == 0:
            return 0.0
        _, inv = np.unique(self.orbit, return_inverse=True)
        return effective_sample_size(np.bincount(inv, weights=self.weight))

    @property
    def total_weight(self) -> float:
        return float(np.sum(self.weight))

    def _take(self, idx, **changes) -> Population:
        fields = dict(pos=self.pos[idx], vel=self.vel[idx], weight=self.weight[idx],
                      orbit=self.orbit[idx], t_flight=self.t_flight[idx], v_launch=self.v_launch[idx],
                      meta=dict(self.meta))
        fields.update(changes)
        return replace(self, **fields)

    # --- derived quantities ---------------------------------------------------------------
    def spherical(self) -> dict:
        """``r, theta, phi, v_r, v_theta, v_phi`` (kpc, rad, km/s), see
        :func:`swerve.frames.spherical_components`."""
        return spherical_components(self.pos, self.vel)

    def folded_v_theta(self) -> np.ndarray:
        """Folded polar velocity ``v_θ' = v_θ sign(z)``, km/s (positive: toward the plane)."""
        return folded_v_theta(self.pos, self.vel)  # swerve.frames.folded_v_theta, not this method

    def helio(self, solar=None) -> dict:
        """Heliocentric observables (``ra, dec, distance, parallax, pmra, pmdec, vlos``) via
        :func:`swerve.frames.galacto_to_helio`; ``solar`` recorded as ``meta["solar"]`` by the
        callers that keep it."""
        self._refuse_octant("heliocentric observables")
        return galacto_to_helio(self.pos, self.vel, solar)

    def _refuse_octant(self, what):
        if self.octant:
            raise ValueError(f"{what}: the population is folded into the positive octant (octant bank); "
                             "call .mirror(rng) or .mirror_all() first")

    # --- octant mirroring ----------------------------------------------------------------
    def mirror(self, rng) -> Population:
        """Reflect each star into a random octant (independent signs of x, y, z applied to
        position and velocity): exact in distribution for a reflection-symmetric Galaxy."""
        if not isinstance(rng, np.random.Generator):
            raise ValueError("rng: expected a numpy Generator")
        if not self.octant:
            return self
        s = np.where(rng.random((self.n, 3)) < 0.5, -1.0, 1.0)
        return replace(self, pos=self.pos * s, vel=self.vel * s, octant=False, meta=dict(self.meta))

    def mirror_all(self) -> Population:
        """All 8 reflections of every star, each with weight/8 (deterministic)."""
        if not self.octant:
            return self
        signs = np.array([[sx, sy, sz] for sx in (1, -1) for sy in (1, -1) for sz in (1, -1)], dtype=float)
        pos = (self.pos[None, :, :] * signs[:, None, :]).reshape(-1, 3)
        vel = (self.vel[None, :, :] * signs[:, None, :]).reshape(-1, 3)
        def t8(a):
            return np.tile(a, 8)

        return Population(pos, vel, t8(self.weight) / 8.0, t8(self.orbit), t8(self.t_flight),
                          t8(self.v_launch), octant=False, meta=dict(self.meta))

    # --- selection -------------------------------------------------------------------------
    def select(self, selection, galaxy=None, solar=None, report: bool = False):
        """Stars passing ``selection`` (a :class:`~swerve.selection.Selection`).

        ``galaxy`` is needed by the ``unbound`` cut (default: rebuilt from ``meta["galaxy"]``).
        With ``report=True`` also returns ``{cut: stars removed}`` (applied in order).
        """
        if selection.needs_heliocentric:
            self._refuse_octant(f"selection ({selection.describe()})")
        if selection.unbound and galaxy is None:
            if "galaxy" not in self.meta:
                raise ValueError("select: the unbound cut needs a Galaxy")
            galaxy = Galaxy.from_dict(self.meta["galaxy"])
        mask, removed = selection.apply(self.pos, self.vel, galaxy=galaxy, solar=solar, report=True)
        out = self._take(mask)
        out.meta["selection"] = selection.to_dict()
        out.meta["selection_removed"] = dict(self.meta.get("selection_removed", {}), **removed)
        return (out, removed) if report else out

    # --- ESS -----------------------------------------------------------------------------
    def check_ess(self, min_ess: float = DEFAULT_MIN_ESS, warn_ess: float = DEFAULT_WARN_ESS,
                  what: str = "population", ess: float | None = None) -> float:
        """Raise :class:`LowESSError` below ``min_ess``, warn (:class:`LowESSWarning`) below
        ``warn_ess``; the message names the likely cause. Returns the ESS (``ess``: a value
        already computed for these weights)."""
        ess = self.ess if ess is None else float(ess)
        if ess >= max(warn_ess, min_ess):
            return ess
        removed = self.meta.get("selection_removed", {})
        n_pos = int(np.count_nonzero(self.weight > 0))
        if n_pos == 0 or ess >= 0.5 * n_pos:
            cause = (f"only {n_pos} weighted samples remain (removed: "
                     + (", ".join(f"{k} {v}" for k, v in removed.items()) or "none")
                     + "); use a larger bank or looser cuts")
        else:
            share = float(np.max(self.weight) / self.total_weight) if self.total_weight > 0 else 1.0
            cause = (f"the weights are uneven (largest weight {share:.1%} of the total; "
                     f"{self.ess_orbits:.0f} effective bank orbits): the launch model concentrates on a "
                     "few bank orbits; use a larger bank or a proposal closer to the launch model")
        msg = f"{what}: effective sample size {ess:.1f} of {n_pos} samples: {cause}"
        if ess < min_ess:
            raise LowESSError(msg + f" (threshold {min_ess:g})")
        warnings.warn(msg, LowESSWarning, stacklevel=2)
        return ess

    # --- resampling --------------------------------------------------------------------------
    def resample(self, n: int, rng) -> Population:
        """An unweighted sample of ``n`` stars drawn with probability ∝ weight (with
        replacement); each drawn star of an octant population is mirrored into a random octant.
        """
        if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
            raise ValueError(f"n: expected a positive integer number of stars, got {n!r}")
        if not isinstance(rng, np.random.Generator):
            raise ValueError("rng: expected a numpy Generator")
        tot = self.total_weight
        if self.n == 0 or not tot > 0:
            raise ValueError("resample: the population has no star with positive weight")
        idx = rng.choice(self.n, size=int(n), replace=True, p=self.weight / tot)
        out = self._take(idx, weight=np.ones(int(n)))
        out.meta["resampled"] = {"n": int(n), "from_ess": self.ess, "total_weight": tot}
        return out.mirror(rng) if out.octant else out


@dataclass(eq=False)
class SelectedSamples:
    """The stored samples of a bank that pass a selection, mirrored out of the octant: the
    launch-model-independent part of a population, made once by :func:`select_bank` and
    reweighted cheaply to any number of launch models (:meth:`population`).

    Attributes
    ----------
    bank : TrajectoryBank
    index : int array (m,)
        Indices of the samples in the bank's arrays (repeated 8 times for ``mirror="all"``).
    pos, vel : float32 arrays (m, 3)
        Galactocentric positions (kpc) and velocities (km/s), mirrored.
    orbit, t_flight, v_launch : arrays (m,)
    scale : float
        Weight factor (1/8 for ``mirror="all"``, else 1).
    octant : bool
        True when still folded in the positive octant (``mirror="none"`` of an octant bank).
    meta : dict
        Selection, what each cut removed, mirroring, solar parameters.
    """

    bank: TrajectoryBank
    index: np.ndarray
    pos: np.ndarray
    vel: np.ndarray
    orbit: np.ndarray
    t_flight: np.ndarray
    v_launch: np.ndarray
    scale: float
    octant: bool
    meta: dict
    _counts: np.ndarray | None = field(default=None, repr=False)

    @property
    def n(self) -> int:
        return int(self.index.shape[0])

    def population(self, launch, *, flight_time_max=None, mass_range=None, min_ess: float = DEFAULT_MIN_ESS,
                   warn_ess: float = DEFAULT_WARN_ESS, max_missing: float = 0.01) -> Population:
        """The weighted population of a launch model (weights only: no integration, no copy of
        the positions; the Population shares this object's arrays, which must not be modified
        in place). Samples of zero weight are kept. See :func:`population_from_bank`."""
        bank = self.bank
        w, info = sample_weights(bank, launch, flight_time_max=flight_time_max, mass_range=mass_range,
                                 max_missing=max_missing, samples=(self.orbit, self.t_flight), report_ess=False)
        if self.scale != 1.0:
            w = w * self.scale
        if "orbit_weight" in info:  # sums over orbits: O(n_orbits) instead of O(samples)
            if self._counts is None:
                self._counts = np.bincount(self.orbit, minlength=bank.n_orbits).astype(float)
            w_o = info["orbit_weight"] * self.scale
            s1, s2 = float(np.dot(w_o, self._counts)), float(np.dot(w_o * w_o, self._counts))
            ess = s1 * s1 / s2 if s2 > 0 else 0.0
            n_zero = int(np.dot(w_o == 0, self._counts))
        else:
            ess = None
            n_zero = int(np.count_nonzero(w == 0))
        if n_zero == w.size:
            raise LowESSError(f"launch model {info['launch']}: gives zero weight to every selected sample of the bank "
                              f"(bank speeds {bank.proposal.v_lo:g}-{bank.proposal.v_hi:g} km/s, flight times "
                              f"< {info['flight_time_max']:g} Myr); check the launch speeds and flight times")
        meta = dict(self.meta)
        meta.update({"galaxy": bank.galaxy, "launch": info["launch"], "flight_time_max": info["flight_time_max"],
                     "bank": {"seed": bank.seed, "n_orbits": bank.n_orbits, "directions": bank.directions,
                              "proposal": bank.proposal.to_dict(), "dt": bank.dt, "t_max": bank.t_max,
                              "r_min_store": bank.r_min_store, "r_max": bank.r_max,
                              # the time-dependent forward model (swerve.bank_lmc) and its LMC, if any
                              **{k: bank.info[k] for k in ("forward_model", "lmc") if k in bank.info}},
                     "launch_missing_fraction": info["missing_fraction"],
                     "selection_removed": dict(self.meta.get("selection_removed", {}),
                                               **{"launch model (zero weight)": n_zero})})
        if "mass_range" in info:
            meta["mass_range"] = info["mass_range"]
        pop = Population(self.pos, self.vel, w, self.orbit, self.t_flight, self.v_launch,
                         octant=self.octant, meta=meta)
        pop.meta["ess"] = pop.check_ess(min_ess, warn_ess, ess=ess)
        return pop


def select_bank(bank: TrajectoryBank, selection=None, *, galaxy=None, solar=None, mirror: str = "random",
                rng=None) -> SelectedSamples:
    """Mirror a bank's samples out of the octant and apply a selection, once per bank.

    Galactocentric cuts are reflection-invariant and are applied first (on the octant samples);
    heliocentric cuts after mirroring. Parameters as in :func:`population_from_bank`.
    """
    if mirror not in ("random", "all", "none"):
        raise ValueError(f"mirror: expected 'random', 'all' or 'none', got {mirror!r}")
    if selection is not None and selection.unbound and galaxy is None:
        galaxy = Galaxy.from_dict(bank.galaxy)
    removed: dict = {}
    idx = np.arange(bank.n_stored)
    pos, vel = bank.pos, bank.vel
    if selection is not None:
        helio_cuts = selection.needs_heliocentric
        galacto = selection.galactocentric()
        mask, removed = galacto.apply(pos, vel, galaxy=galaxy, report=True)
        idx = np.flatnonzero(mask)
        pos, vel = pos[idx], vel[idx]
    else:
        helio_cuts = False
    octant = bank.octant
    scale = 1.0
    if octant and mirror == "random":
        rng = rng if rng is not None else np.random.default_rng([int(bank.seed), 8])
        if not isinstance(rng, np.random.Generator):
            raise ValueError("rng: expected a numpy Generator")
        signs = np.where(rng.random((idx.size, 3)) < 0.5, -1.0, 1.0).astype(np.float32)
        pos, vel, octant = pos * signs, vel * signs, False
    elif octant and mirror == "all":
        signs = np.array([[sx, sy, sz] for sx in (1, -1) for sy in (1, -1) for sz in (1, -1)], dtype=np.float32)
        pos = (pos[None, :, :] * signs[:, None, :]).reshape(-1, 3)
        vel = (vel[None, :, :] * signs[:, None, :]).reshape(-1, 3)
        idx = np.tile(idx, 8)
        scale, octant = 0.125, False
    if helio_cuts:
        if octant:
            raise ValueError(f"selection ({selection.describe()}): heliocentric cuts need a mirrored population; "
                             "use mirror='random' or 'all'")
        mask, removed_h = selection.apply(pos, vel, galaxy=galaxy, solar=solar, report=True)
        removed.update({k: v for k, v in removed_h.items() if k not in removed})
        idx, pos, vel = idx[mask], pos[mask], vel[mask]
    if selection is not None and idx.size == 0:
        selection.require_nonempty(np.zeros(1, dtype=bool), what="population from bank")
    orbit = bank.orbit[idx]
    meta = {"selection": None if selection is None else selection.to_dict(), "selection_removed": removed,
            "mirror": mirror if bank.octant else "none (full-sphere bank)"}
    if solar is not None:
        meta["solar"] = resolve_solar(solar).to_dict()
    return SelectedSamples(bank, idx, pos, vel, orbit, bank.t_flight[idx], bank.v_launch[orbit], scale, octant, meta)


def population_from_bank(bank: TrajectoryBank, launch, *, selection=None, galaxy=None, solar=None,
                         flight_time_max=None, mass_range=None, mirror: str = "random", rng=None,
                         min_ess: float = DEFAULT_MIN_ESS, warn_ess: float = DEFAULT_WARN_ESS,
                         max_missing: float = 0.01) -> Population:
    """The present-day population of a launch model, from a bank (no new integration).

    Equivalent to ``select_bank(bank, selection, ...).population(launch, ...)``; to reweight
    one bank to many launch models, call :func:`select_bank` once and
    :meth:`SelectedSamples.population` per model (the benchmarked fast path).

    Parameters
    ----------
    bank : TrajectoryBank
    launch : HillsLaunch, BoundedPowerLawSpeed or TabulatedSpeedDensity
    selection : Selection, optional
        Cuts on the (mirrored) samples; a selection that keeps no star raises
        :class:`~swerve.selection.EmptySelectionError`.
    galaxy : Galaxy, optional
        For the ``unbound`` cut (default: rebuilt from the bank).
    solar : SolarParameters or name, optional
        For heliocentric cuts (recorded in ``meta["solar"]``).
    flight_time_max, mass_range, max_missing
        See :func:`swerve.bank.sample_weights`.
    mirror : {"random", "all", "none"}
        For an octant bank: reflect each sample into a random octant (``rng``; default a
        Generator seeded with ``[bank.seed, 8]``), into all 8 with weight/8, or keep the octant
        (galactocentric use only; heliocentric cuts then refuse).
    min_ess, warn_ess : float
        ESS thresholds of :meth:`Population.check_ess`, applied to the selected population.

    Returns
    -------
    Population
        Samples of zero weight (outside the launch model's speeds or flight times) are kept.
    """
    view = select_bank(bank, selection, galaxy=galaxy, solar=solar, mirror=mirror, rng=rng)
    return view.population(launch, flight_time_max=flight_time_max, mass_range=mass_range,
                           min_ess=min_ess, warn_ess=warn_ess, max_missing=max_missing)


# --------------------------------------------------------------------------------------------
# mock catalogs

_UNITS = {"ra": "deg", "dec": "deg", "distance": "kpc", "distance_err": "kpc", "parallax": "mas",
          "parallax_err": "mas", "pmra": "mas / yr", "pmra_err": "mas / yr", "pmdec": "mas / yr",
          "pmdec_err": "mas / yr", "vlos": "km / s", "vlos_err": "km / s", "corr_pmra_pmdec": ""}


def _jsonable(obj):
    return jsonable(obj)


def bank_region(selection, solar):
    """The galactocentric radii (r_min, r_max) in kpc a trajectory bank must cover for a selection:
    its radius cuts, or its heliocentric distance cut plus the Sun's distance from the centre."""
    r_min = selection.r_min if selection.r_min is not None else 0.0
    r_sun = float(resolve_solar(solar).to_dict().get("galcen_distance", 8.122))
    if selection.r_max is not None:
        r_max = selection.r_max
    elif selection.d_max is not None:
        r_max = selection.d_max + r_sun + 0.1
    else:
        r_max = 200.0
    return r_min, r_max


def make_mock(galaxy, launch, selection, error_model: ErrorModel, n: int, rng, bank=None, *,
              solar=None, flight_time_max=None, mass_range=None, bank_size: int = 4000,
              bank_options: dict | None = None, include_truth: bool = False,
              min_ess: float = DEFAULT_MIN_ESS, warn_ess: float = DEFAULT_WARN_ESS):
    """A mock catalog of ``n`` selected stars with measurement errors.

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
    launch : HillsLaunch, BoundedPowerLawSpeed or TabulatedSpeedDensity
    selection : Selection
        Applied to the true present-day stars.
    error_model : ErrorModel
    n : int
        Stars in the catalog.
    rng : numpy.random.Generator or int
        Randomness of the bank seed (when built here), mirroring, resampling and errors; an int
        is a seed (recorded in the meta).
    bank : TrajectoryBank, optional
        A bank of this Galaxy covering the selection's radii; built here when None
        (``bank_size`` orbits, ``bank_options`` passed to :func:`swerve.bank.build_bank`).
    solar : SolarParameters or name, optional
        Solar parameters of the heliocentric transform (default ``"v4.0"``; recorded).
    flight_time_max, mass_range
        See :func:`swerve.bank.sample_weights`.
    include_truth : bool
        Also write the true values (``true_*`` columns, galactocentric r, v_theta', v_phi,
        flight time, launch speed); a catalog reader carries them along as extra columns.

    Returns
    -------
    astropy.table.Table
        Columns ``id, ra, dec, parallax(+_err) or distance(+_err), pmra, pmra_err, pmdec,
        pmdec_err, vlos, vlos_err, corr_pmra_pmdec`` with units; meta with the true
        parameters, Galaxy, launch model, selection, error model, seed, solar parameters,
        bank provenance, ESS and swerve version.
    """
    rng, seed = as_generator(rng)
    if not isinstance(error_model, ErrorModel):
        raise ValueError(f"error_model: expected an ErrorModel, got {type(error_model).__name__}")
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise ValueError(f"n: expected a positive integer number of stars, got {n!r}")
    sol = resolve_solar(solar)
    r_min, r_max = bank_region(selection, sol)
    if bank is None:
        opts = {"t_max": 300.0 if flight_time_max is None else float(flight_time_max), "dt": 1.0}
        opts.update(bank_options or {})
        opts.setdefault("r_min_store", r_min)
        opts.setdefault("r_max", r_max)
        bank = build_bank(galaxy, int(bank_size), int(rng.integers(2 ** 31 - 1)), **opts)
    else:
        if _jsonable(bank.galaxy) != _jsonable(galaxy.to_dict()):
            raise ValueError("bank: it was built for another Galaxy than the one asked for")
        if bank.r_min_store > r_min + 1e-9 or bank.r_max < r_max - 1e-9:
            raise ValueError(f"bank: it stores {bank.r_min_store:g}-{bank.r_max:g} kpc but the selection "
                             f"needs {r_min:g}-{r_max:g} kpc")
    pop = population_from_bank(bank, launch, selection=selection.true_value_cuts(), galaxy=galaxy, solar=sol,
                               flight_time_max=flight_time_max, mass_range=mass_range, mirror="random",
                               rng=rng, min_ess=min_ess, warn_ess=warn_ess)
    if pop.ess < n:
        warnings.warn(f"mock: {n} stars drawn from a population of effective sample size {pop.ess:.0f}; "
                      "stars will repeat (before errors): use a larger bank", LowESSWarning, stacklevel=2)
    if selection.has_measured_cuts:
        stars, helio, obs, measured = _draw_measured(pop, selection, error_model, int(n), rng, sol)
    else:
        stars = pop.resample(int(n), rng)
        helio = stars.helio(sol)
        obs = error_model.observe(helio, rng)
        measured = None
    if error_model.distance_frac is None and np.any(obs["parallax"] <= 0):
        warnings.warn(f"mock: {int(np.sum(obs['parallax'] <= 0))} of {n} observed parallaxes are <= 0 and the "
                      "error model gives no distance: fit or trace them under a distance prior (--distance-prior), "
                      "or add distance_frac",
                      UserWarning, stacklevel=2)
    width = max(5, len(str(n)))
    t = Table()
    t["id"] = [f"mock{i:0{width}d}" for i in range(1, n + 1)]
    for name in ("ra", "dec", "distance", "distance_err", "parallax", "parallax_err", "pmra", "pmra_err",
                 "pmdec", "pmdec_err", "vlos", "vlos_err", "corr_pmra_pmdec"):
        if name in obs:
            t[name] = np.asarray(obs[name], dtype=float)
            if _UNITS[name]:
                t[name].unit = _UNITS[name]
    if include_truth:
        sph = stars.spherical()
        for k in ("distance", "pmra", "pmdec", "vlos"):
            t[f"true_{k}"] = helio[k]
            t[f"true_{k}"].unit = _UNITS[k]
        t["true_parallax"] = helio["parallax"]
        t["true_parallax"].unit = "mas"
        for i, c in enumerate("xyz"):
            t[f"true_{c}"] = stars.pos[:, i]
            t[f"true_{c}"].unit = "kpc"
            t[f"true_v{c}"] = stars.vel[:, i]
            t[f"true_v{c}"].unit = "km / s"
        t["true_r"] = sph["r"]
        t["true_r"].unit = "kpc"
        for k, arr in (("true_v_r", sph["v_r"]), ("true_v_theta_folded", stars.folded_v_theta()),
                       ("true_v_phi", sph["v_phi"]), ("true_v_launch", stars.v_launch)):
            t[k] = arr
            t[k].unit = "km / s"
        t["true_t_flight"] = stars.t_flight
        t["true_t_flight"].unit = "Myr"
    true_params = dict(galaxy.params)
    true_params.update({k: v for k, v in launch.to_dict().items() if k != "model"})
    t.meta.update(_jsonable({
        "swerve_mock": "mock catalog of hypervelocity stars made by swerve.population.make_mock",
        "swerve_version": __version__,
        "true_parameters": true_params,
        "galaxy": galaxy.to_dict(),
        "launch": launch.to_dict(),
        "flight_time_max": pop.meta["flight_time_max"],
        "mass_range": pop.meta.get("mass_range"),
        "selection": selection.to_dict(),
        "selection_applied_to": "true positions and velocities" if measured is None else
        "true positions and velocities; " + ", ".join(f"{k} to the measured value" for k in measured["cuts"]),
        "error_model": error_model.to_dict(),
        "seed": seed if seed is not None else "not recorded (a Generator was passed)",
        "solar": sol.to_dict(),
        "bank": dict(pop.meta["bank"], n_stored=bank.n_stored, max_energy_error=bank.max_energy_error,
                     n_failed=int(bank.failed.sum()), r0=bank.r0, rtol=bank.rtol),
        "population_ess": pop.ess,
        "population_ess_orbits": pop.ess_orbits,
        "expected_stars_per_ejection_rate_myr": pop.total_weight,
        "selection_removed": pop.meta["selection_removed"] if measured is None else
        dict(pop.meta["selection_removed"], **{f"{k} (measured)": measured["removed"] for k in measured["cuts"]}),
        "n_stars": int(n),
    }))
    if measured is not None:
        t.meta["measured_cut_pass_fraction"] = measured["pass_fraction"]
    return t


def _draw_measured(pop: Population, selection, error_model, n: int, rng, solar, max_factor: int = 200):
    """``n`` stars whose *measured* values pass the selection's measured cuts, as a survey
    selects them: stars are drawn from ``pop`` (selected on true values by the other cuts),
    measured with ``error_model``, and those whose measurement fails a measured cut are dropped,
    in batches until ``n`` are kept. Returns (stars, true heliocentric observables, measured
    observables, {"cuts", "removed", "pass_fraction"}); ``removed`` and ``pass_fraction`` count
    the stars examined up to the last one kept. Refuses (ValueError) a cut that keeps fewer than
    one star in ``max_factor``."""
    parts, kept, examined = [], 0, 0
    frac = None
    while kept < n:
        need = n - kept
        m = max(need, 64) if frac is None else int(min(1.25 * need / max(frac, 1.0 / max_factor) + 32, 10 * n + 1000))
        batch = pop.resample(m, rng)
        helio = batch.helio(solar)
        obs = error_model.observe(helio, rng)
        ok = np.flatnonzero(selection.measured_mask(obs["vlos"]))[:need]
        examined += m if len(ok) < need else int(ok[-1]) + 1
        kept += len(ok)
        parts.append((batch._take(ok), {k: np.asarray(v)[ok] for k, v in helio.items()},
                      {k: np.asarray(v)[ok] for k, v in obs.items()}))
        frac = kept / examined
        if kept < n and examined >= max_factor * n:
            cuts = ", ".join(f"{k} = {getattr(selection, k):g}" for k in MEASURED_CUTS if getattr(selection, k) is not None)
            raise ValueError(f"selection {cuts}: only {kept} of {examined} measured stars pass it; "
                             "loosen the cut (it is applied to the measured values)")
    stars = parts[0][0]
    if len(parts) > 1:
        cat = {f: np.concatenate([getattr(p[0], f) for p in parts]) for f in
               ("pos", "vel", "weight", "orbit", "t_flight", "v_launch")}
        stars = replace(stars, **cat)
    helio = {k: np.concatenate([p[1][k] for p in parts]) for k in parts[0][1]}
    obs = {k: np.concatenate([p[2][k] for p in parts]) for k in parts[0][2]}
    cuts = [k for k in MEASURED_CUTS if getattr(selection, k) is not None]
    return stars, helio, obs, {"cuts": cuts, "removed": examined - n, "pass_fraction": n / examined}


_WRITE_FORMATS = {".ecsv": "ascii.ecsv", ".fits": "fits", ".csv": "ascii.csv"}


def write_mock(table, path) -> str:
    """Write a mock Table atomically (temp file + rename); the format from the extension:
    ``.ecsv`` (units and meta kept), ``.fits`` (units kept; meta as JSON in header cards
    ``SWMnnnnn``), ``.csv`` (no units: readers apply the default units, which are those
    written). Returns the format used."""
    path = os.fspath(path)
    ext = os.path.splitext(path)[1].lower()
    if ext not in _WRITE_FORMATS:
        raise ValueError(f"out: {path!r}: expected a file name ending in {', '.join(_WRITE_FORMATS)}")
    folder = os.path.dirname(os.path.abspath(path))
    if not os.path.isdir(folder):
        raise ValueError(f"out: {path!r}: folder {folder} does not exist")
    fmt = _WRITE_FORMATS[ext]
    out = table
    if fmt == "fits":
        out = table.copy(copy_data=False)
        text = json.dumps(table.meta, separators=(",", ":"))
        out.meta = {f"SWM{i // 60:05d}": text[i:i + 60]
                    for i in range(0, len(text), 60)}
    elif fmt == "ascii.csv":
        out = table.copy(copy_data=False)
        out.meta = {}
    with atomic_path(path) as tmp:
        out.write(tmp, format=fmt, overwrite=True)
    return fmt
