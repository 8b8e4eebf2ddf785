"""Trajectory banks: integrate a Galaxy's hypervelocity orbits once, reweight to any launch model.

A :class:`TrajectoryBank` holds, for one Galaxy, the positions and velocities of many radial
launches sampled at regular flight times, kept only while inside a region of interest. Any
launch model (speed distribution, lifetimes, maximum flight time) is then a *reweighting* of
the stored samples, with no new integration: see :func:`sample_weights`.

Construction (:func:`build_bank`)
---------------------------------
* **Launch**: radial, from ``r0`` = 3 pc (common practice), speed ``v`` along the unit
  direction ``n``: ``pos0 = r0 n``, ``vel0 = v n``.
* **Proposal** (:class:`SpeedProposal`): quasi-random points of a scrambled Sobol sequence
  (``scipy.stats.qmc.Sobol``, scrambled with the bank's seed) in four dimensions: ``cos θ``
  (uniform), ``φ`` (uniform), ``log v`` uniform on ``[v_lo, v_hi]`` (density
  ``q(v) = 1 / (v ln(v_hi/v_lo))``, recorded), and a flight-time phase ``u`` (below).
* **Octant trick**: every Galaxy component swerve has (point mass, Hernquist bulge,
  Miyamoto–Nagai disk, NFW halo with axes along x, y, z) is symmetric under each reflection
  x→−x, y→−y, z→−z, and reflecting a launch reflects its whole orbit. So with
  ``directions="octant"`` (default) the bank launches only into the positive octant
  (``cos θ ∈ [0, 1]``, ``φ ∈ [0, π/2]``): 8× fewer orbits for the same galactocentric
  information. The symmetry is checked numerically on the Galaxy before the trick is used.
  Galactocentric cuts (radius, outgoing, speed, unbound) are reflection-invariant; for
  heliocentric quantities a population is mirrored into a random octant per sample (or into
  all 8 with weight/8), see :mod:`swerve.population`. ``directions="sphere"`` launches over the
  whole sphere (used by the tests to check the trick).
* **Flight times**: each orbit is sampled at ``t_k = (k + u) Δt``, ``k = 0 … K−1``,
  ``K Δt = t_max``, with the orbit's own phase ``u ∈ [0, 1)`` from the Sobol sequence: a
  stratified sample of the uniform flight-time distribution on ``[0, t_max)`` (unbiased, no
  midpoint-rule bias). Samples come from the integrator's dense output.
* **Early stop and storage**: each orbit stops at its first outward crossing of ``r_stop``
  (default: the region's outer radius ``r_max``; orbits that leave it are assumed not to come
  back within ``t_max``, true for r_max ≳ 100 kpc and t_max ≲ 1 Gyr). Only samples with
  ``r_min_store ≤ r ≤ r_max`` are stored, as float32 positions and velocities, int32 orbit
  index and float32 flight time (32 bytes per stored sample).
* **Memory** (measured, ``benchmarks/RESULTS.md``): 32 bytes per stored sample plus 33 bytes
  per orbit; with Δt = 1 Myr, t_max = 300 Myr and 10–100 kpc stored, 69 samples and 2248 bytes
  per orbit in the default Galaxy (a 20,000-orbit bank: 45 MB). The dense output of one
  integration batch (``chunk`` orbits × t_max/Δt × 48 bytes) is the only temporary.
* **Energy pruning**: a launch whose energy ``v²/2 + Φ(r0 n)`` is below the minimum of Φ on
  the sphere ``r = r_min_store`` can never enter the region (energy is conserved in a static
  potential): it is not integrated and stores no sample (``status = STATUS_PRUNED``).
* **Diagnostics**: per orbit status (the integrator's codes, failures flagged and counted) and
  relative energy error; the largest energy error; :attr:`TrajectoryBank.nbytes`.

Reweighting (:func:`sample_weights`)
------------------------------------
Sample ``j`` (orbit ``o`` launched at speed ``v_o``, flight time ``t_j``) gets the weight::

    w_j = [p_launch(v_o) / q(v_o)] × alive(v_o, t_j) × Δt / N_orbits

so that ``Γ Σ_j w_j [j in a region]`` is the expected number of stars in that region for an
ejection rate Γ (stars per Myr; the octant bank counts one octant's launches as the whole
sky, since every octant holds the same stars). The bank supplies ``Δt / (N_orbits q(v_o))``
and its coverage; the launch model supplies the rest through its ``trajectory_weights``
method (:class:`swerve.launch.BankSamples` in, :class:`swerve.launch.TrajectoryWeights` out),
so a new launch model needs no change here. ``alive`` is ``t < T_max`` (constant ejection
rate, flight times uniform up to the longest flight time of interest ``T_max ≤ t_max``) for
launch models that only give a speed (:class:`~swerve.launch.BoundedPowerLawSpeed`,
:class:`~swerve.launch.TabulatedSpeedDensity`). For :class:`~swerve.launch.HillsLaunch` the
ejected star's mass sets its lifetime (its ejection speed ``v_ej`` is used as the launch speed
at ``r0``, common practice), and mass and speed are correlated, so the product
``p_launch(v) × alive`` is replaced by the joint density
``p(v, alive at t) = p(v) P(t_MS(m) > t | v)``, tabulated from a Monte Carlo of
``HillsLaunch.sample`` as a 2-D table in (log10 v, t) (:class:`swerve.launch.HillsAliveTable`,
also importable from here: a histogram in log10 v, the survival fraction at a grid of flight
times, linear in t between them).

The weights' effective sample size ``(Σw)² / Σw²`` is reported by
:func:`effective_sample_size`; the population module checks it after selection.
"""

from __future__ import annotations

import json
import math
import os
import time
from dataclasses import dataclass, field

import numpy as np
from scipy.stats import qmc

from . import __version__
from .fileio import atomic_path
from .galaxy import Galaxy
from .launch import BankSamples, HillsAliveTable, hills_alive_table
from .orbits import integrate, status_names
from .units import positive_float

__all__ = [
    "BANK_FORMAT_VERSION",
    "STATUS_PRUNED",
    "check_bank_arguments",
    "draw_launches",
    "BankCoverageError",
    "HillsAliveTable",
    "SpeedProposal",
    "TrajectoryBank",
    "build_bank",
    "check_reflection_symmetry",
    "effective_sample_size",
    "hills_alive_table",
    "load_bank",
    "reach_speed",
    "sample_weights",
    "save_bank",
]

#: version of the .npz bank format written by :func:`save_bank`
BANK_FORMAT_VERSION = 1
#: status of an orbit not integrated because its energy cannot reach ``r_min_store``
STATUS_PRUNED = -1

_SAMPLE_ARRAYS = ("pos", "vel", "orbit", "t_flight")
_ORBIT_ARRAYS = ("v_launch", "direction", "phase", "status", "energy_error", "n_samples")


class BankCoverageError(ValueError):
    """A launch model puts weight on launch speeds (or flight times) the bank does not cover."""


# --------------------------------------------------------------------------------------------
# proposal


@dataclass(frozen=True)
class SpeedProposal:
    """Log-uniform proposal of launch speeds on ``[v_lo, v_hi]`` km/s.

    Density ``q(v) = 1 / (v ln(v_hi / v_lo))`` per km/s.
    """

    v_lo: float = 500.0
    v_hi: float = 5000.0

    def __post_init__(self):
        lo, hi = float(self.v_lo), float(self.v_hi)
        if not (math.isfinite(lo) and lo > 0):
            raise ValueError(f"v_lo: expected a positive proposal speed in km/s, got {self.v_lo!r}")
        if not (math.isfinite(hi) and hi > lo):
            raise ValueError(f"v_hi: expected a proposal speed above v_lo = {lo:g} km/s, got {self.v_hi!r}")
        object.__setattr__(self, "v_lo", lo)
        object.__setattr__(self, "v_hi", hi)

    def pdf(self, v):
        """Proposal density per km/s at speeds ``v`` (km/s); 0 outside ``[v_lo, v_hi]``."""
        v = np.asarray(v, dtype=float)
        inside = (v >= self.v_lo) & (v <= self.v_hi)
        return np.where(inside, 1.0 / (np.where(inside, v, 1.0) * math.log(self.v_hi / self.v_lo)), 0.0)

    def ppf(self, u):
        """Speeds (km/s) at quantiles ``u`` in [0, 1]."""
        return self.v_lo * (self.v_hi / self.v_lo) ** np.asarray(u, dtype=float)

    def to_dict(self) -> dict:
        return {"kind": "log_uniform_speed", "v_lo": self.v_lo, "v_hi": self.v_hi}

    @classmethod
    def from_dict(cls, d: dict) -> SpeedProposal:
        if d.get("kind", "log_uniform_speed") != "log_uniform_speed":
            raise ValueError(f"proposal kind: expected 'log_uniform_speed', got {d.get('kind')!r}")
        return cls(float(d["v_lo"]), float(d["v_hi"]))


# --------------------------------------------------------------------------------------------
# the bank


@dataclass(eq=False)
class TrajectoryBank:
    """Orbit samples of one Galaxy, reusable for any launch model (module docstring).

    Attributes
    ----------
    galaxy : dict
        ``Galaxy.to_dict()`` of the Galaxy integrated.
    proposal : SpeedProposal
    seed : int
        Seed of the scrambled Sobol sequence.
    directions : {"octant", "sphere"}
    r0 : float
        Launch radius, kpc.
    dt : float
        Flight-time step Δt, Myr.
    t_max : float
        Longest flight time sampled, Myr (``K Δt``).
    r_min_store, r_max : float
        Radii (kpc) between which samples are stored.
    r_stop : float
        Radius (kpc) at which orbits were stopped (``inf``: never).
    rtol, atol : float
        Integrator tolerances.
    v_launch : float64 array (n_orbits,)
        Launch speed of each orbit, km/s.
    direction : float32 array (n_orbits, 3)
        Unit launch direction.
    phase : float32 array (n_orbits,)
        Flight-time phase ``u``: the orbit's samples are at ``(k + u) Δt``.
    status : int8 array (n_orbits,)
        Integrator status (:data:`swerve.orbits.status_names`) or :data:`STATUS_PRUNED`.
    energy_error : float32 array (n_orbits,)
        ``|ΔE| / |Φ(r0)|`` at the end of each orbit (0 for pruned orbits).
    n_samples : int32 array (n_orbits,)
        Stored samples per orbit.
    pos, vel : float32 arrays (m, 3)
        Galactocentric position (kpc) and velocity (km/s) of each stored sample.
    orbit : int32 array (m,)
        Orbit index of each sample.
    t_flight : float32 array (m,)
        Flight time of each sample, Myr.
    info : dict
        Provenance and diagnostics (swerve version, build time, reach speed, failures...).
    """

    galaxy: dict
    proposal: SpeedProposal
    seed: int
    directions: str
    r0: float
    dt: float
    t_max: float
    r_min_store: float
    r_max: float
    r_stop: float
    rtol: float
    atol: float
    v_launch: np.ndarray
    direction: np.ndarray
    phase: np.ndarray
    status: np.ndarray
    energy_error: np.ndarray
    n_samples: np.ndarray
    pos: np.ndarray
    vel: np.ndarray
    orbit: np.ndarray
    t_flight: np.ndarray
    info: dict = field(default_factory=dict)

    @property
    def n_orbits(self) -> int:
        return int(self.v_launch.shape[0])

    @property
    def n_stored(self) -> int:
        """Number of stored samples."""
        return int(self.orbit.shape[0])

    @property
    def nbytes(self) -> int:
        """Bytes held by the bank's arrays."""
        return int(sum(getattr(self, a).nbytes for a in _SAMPLE_ARRAYS + _ORBIT_ARRAYS))

    @property
    def octant(self) -> bool:
        """True when the launches cover only the positive octant (mirror for the full sky)."""
        return self.directions == "octant"

    @property
    def failed(self) -> np.ndarray:
        """Boolean (n_orbits,): the integration of the orbit failed (flagged, samples kept up to
        the last good step)."""
        return self.status > 1

    @property
    def max_energy_error(self) -> float:
        ok = self.status >= 0
        return float(np.max(self.energy_error[ok])) if np.any(ok) else 0.0

    def metadata(self) -> dict:
        """JSON-safe description of the bank (everything but the arrays)."""
        return {
            "format": "swerve-trajectory-bank",
            "format_version": BANK_FORMAT_VERSION,
            "galaxy": self.galaxy,
            "proposal": self.proposal.to_dict(),
            "seed": int(self.seed),
            "directions": self.directions,
            "r0": self.r0,
            "dt": self.dt,
            "t_max": self.t_max,
            "r_min_store": self.r_min_store,
            "r_max": self.r_max,
            "r_stop": None if not math.isfinite(self.r_stop) else self.r_stop,
            "rtol": self.rtol,
            "atol": self.atol,
            "n_orbits": self.n_orbits,
            "n_stored": self.n_stored,
            "n_failed": int(self.failed.sum()),
            "max_energy_error": self.max_energy_error,
            "info": self.info,
        }

    def summary(self) -> str:
        """One line: orbits, samples, memory, failures, energy error."""
        return (f"bank of {self.n_orbits} orbits ({self.directions}), {self.n_stored} samples in "
                f"{self.r_min_store:g}-{self.r_max:g} kpc, {self.nbytes / 1e6:.1f} MB "
                f"({self.nbytes / max(self.n_orbits, 1):.0f} bytes/orbit), "
                f"{int(self.failed.sum())} failed, max |dE/Phi0| = {self.max_energy_error:.2g}")


# --------------------------------------------------------------------------------------------
# helpers


def _galaxy_of(galaxy):
    if isinstance(galaxy, dict):
        return Galaxy.from_dict(galaxy)
    if not hasattr(galaxy, "kernel_args"):
        raise ValueError(f"galaxy: expected a swerve Galaxy or its to_dict(), got {type(galaxy).__name__}")
    return galaxy


def check_reflection_symmetry(galaxy, r_test=(0.01, 1.0, 8.0, 30.0, 100.0), rtol: float = 1e-10) -> bool:
    """True when the Galaxy's potential is symmetric under x→−x, y→−y and z→−z.

    Checked at fixed pseudo-random points (seed 0) on shells of radius ``r_test`` (kpc).
    """
    g = _galaxy_of(galaxy)
    rng = np.random.default_rng(0)
    pts = []
    for r in r_test:
        d = rng.normal(size=(16, 3))
        pts.append(r * d / np.linalg.norm(d, axis=1)[:, None])
    p = np.concatenate(pts)
    phi = g.potential(p)
    for axis in range(3):
        q = p.copy()
        q[:, axis] *= -1.0
        if not np.allclose(g.potential(q), phi, rtol=rtol, atol=0.0):
            return False
    return True


def _sphere_min_potential(g, r, n_dir: int = 2048) -> float:
    """Minimum of the potential on the sphere of radius r (kpc): the 6 axis points and a
    Fibonacci grid of directions, less a 1% safety margin."""
    k = np.arange(n_dir) + 0.5
    cz = 1.0 - 2.0 * k / n_dir
    ph = math.pi * (1.0 + 5.0 ** 0.5) * k
    sz = np.sqrt(1.0 - cz * cz)
    d = np.concatenate([np.stack([sz * np.cos(ph), sz * np.sin(ph), cz], axis=1),
                        np.vstack([np.eye(3), -np.eye(3)])])
    phi = float(np.min(g.potential(r * d)))
    return phi - 0.01 * abs(phi)


def reach_speed(galaxy, r0: float, r: float) -> float:
    """Smallest launch speed (km/s) from radius ``r0`` that can reach radius ``r`` (kpc), by
    energy: ``sqrt(2 (min Φ(r) − max Φ(r0)))`` over directions, with a 1% margin in Φ(r)."""
    g = _galaxy_of(galaxy)
    phi_r = _sphere_min_potential(g, r)
    d = np.vstack([np.eye(3), -np.eye(3), np.ones((1, 3)) / 3 ** 0.5])
    phi0 = float(np.max(g.potential(r0 * d)))
    return math.sqrt(max(2.0 * (phi_r - phi0), 0.0))


def _check_positive(name, value, unit):
    return positive_float(name, value, unit)


def _sobol(n, seed):
    eng = qmc.Sobol(d=4, scramble=True, seed=np.random.default_rng(seed))
    m = int(math.ceil(math.log2(max(n, 2))))
    return eng.random_base2(m)[:n]  # a power-of-two prefix keeps the balance properties


def check_bank_arguments(n_orbits, seed, t_max, r0, r_max, r_min_store):
    """The arguments every bank builder shares, checked (one-line ValueError naming the argument)
    and converted: ``(n_orbits, seed, t_max, r0, r_max, r_min_store)``."""
    if isinstance(n_orbits, bool) or not isinstance(n_orbits, (int, np.integer)) or n_orbits < 1:
        raise ValueError(f"n_orbits: expected a positive integer, got {n_orbits!r}")
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"seed: expected a non-negative integer, got {seed!r}")
    t_max = _check_positive("t_max", t_max, "Myr")
    r0 = _check_positive("r0", r0, "kpc")
    r_max = _check_positive("r_max", r_max, "kpc")
    r_min_store = float(r_min_store)
    if not (math.isfinite(r_min_store) and 0.0 <= r_min_store < r_max):
        raise ValueError(f"r_min_store: expected a radius in [0, r_max = {r_max:g}) kpc, got {r_min_store!r}")
    return int(n_orbits), int(seed), t_max, r0, r_max, r_min_store


def draw_launches(n_orbits: int, seed: int, directions: str, proposal: SpeedProposal):
    """Unit launch directions (positive octant or whole sphere), launch speeds from the proposal
    and flight-time phases in [0, 1), from one scrambled Sobol sequence (module docstring)."""
    u = _sobol(n_orbits, int(seed))
    if directions == "octant":
        cos_t, ph = u[:, 0], 0.5 * math.pi * u[:, 1]
    else:
        cos_t, ph = 2.0 * u[:, 0] - 1.0, 2.0 * math.pi * u[:, 1]
    sin_t = np.sqrt(np.clip(1.0 - cos_t * cos_t, 0.0, 1.0))
    dirs = np.stack([sin_t * np.cos(ph), sin_t * np.sin(ph), cos_t], axis=1)
    return dirs, proposal.ppf(u[:, 2]), u[:, 3]


# --------------------------------------------------------------------------------------------
# build


def build_bank(galaxy, n_orbits: int, seed: int, *, t_max: float = 300.0, dt: float = 1.0,
               r0: float = 0.003, v_lo: float = 500.0, v_hi: float = 5000.0,
               r_min_store: float = 10.0, r_max: float = 200.0, r_stop="auto",
               directions: str = "octant", rtol: float = 1e-9, atol: float = 1e-12,
               max_steps: int = 100_000, chunk: int = 2048, progress=None) -> TrajectoryBank:
    """Integrate a trajectory bank for one Galaxy (see the module docstring).

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
    n_orbits : int
        Number of launches (in the positive octant for ``directions="octant"``).
    seed : int
        Seed of the scrambled Sobol sequence (recorded).
    t_max : float
        Longest flight time sampled, Myr.
    dt : float
        Flight-time step, Myr (adjusted down so that ``t_max / dt`` is an integer).
    r0 : float
        Launch radius, kpc (3 pc, common practice).
    v_lo, v_hi : float
        Log-uniform proposal range of launch speeds, km/s. Defaults 500–5000 km/s: below
        ~700 km/s no star of the default Galaxy reaches 10 kpc, and 2.5% of the default Hills
        model's ejections are faster than 4000 km/s.
    r_min_store, r_max : float
        Store samples only with ``r_min_store <= r <= r_max`` (kpc).
    r_stop : "auto", float or None
        Stop orbits at their first outward crossing of this radius (kpc); "auto" is ``r_max``,
        None never stops early.
    directions : {"octant", "sphere"}
        Launch directions in the positive octant (mirror later) or over the whole sphere.
    rtol, atol : float
        Integrator tolerances (:func:`swerve.orbits.integrate`); at the defaults the largest
        relative energy error is ~1e-6 of |Φ(r0)| (about 0.01 km/s in speed at 10 kpc).
    max_steps : int
        Step cap per orbit.
    chunk : int
        Orbits integrated per batch (bounds the temporary dense-output memory).
    progress : callable, optional
        Called as ``progress(done, total)`` after each batch.

    Returns
    -------
    TrajectoryBank
    """
    g = _galaxy_of(galaxy)
    n_orbits, seed, t_max, r0, r_max, r_min_store = check_bank_arguments(n_orbits, seed, t_max, r0, r_max,
                                                                         r_min_store)
    dt = _check_positive("dt", dt, "Myr")
    if r_stop == "auto":
        r_stop_v = r_max
    elif r_stop is None:
        r_stop_v = math.inf
    else:
        r_stop_v = _check_positive("r_stop", r_stop, "kpc")
        if r_stop_v < r_max:
            raise ValueError(f"r_stop: expected a radius >= r_max = {r_max:g} kpc, got {r_stop_v:g}")
    if directions not in ("octant", "sphere"):
        raise ValueError(f"directions: expected 'octant' or 'sphere', got {directions!r}")
    if directions == "octant" and not check_reflection_symmetry(g):
        raise ValueError("directions='octant': the Galaxy's potential is not symmetric under x, y, z "
                         "reflections; use directions='sphere'")
    proposal = SpeedProposal(v_lo, v_hi)
    n_orbits = int(n_orbits)
    k_t = max(1, int(math.ceil(t_max / dt - 1e-9)))
    dt = t_max / k_t

    t_start = time.perf_counter()
    dirs, v_launch, phase = draw_launches(n_orbits, seed, directions, proposal)

    # energy pruning: launches that can never reach r_min_store
    phi_min = _sphere_min_potential(g, r_min_store) if r_min_store > 0 else -math.inf
    energy = 0.5 * v_launch ** 2 + g.potential(r0 * dirs)
    active = energy >= phi_min

    status = np.full(n_orbits, STATUS_PRUNED, dtype=np.int8)
    e_err = np.zeros(n_orbits, dtype=np.float32)
    n_samp = np.zeros(n_orbits, dtype=np.int32)
    parts = {a: [] for a in _SAMPLE_ARRAYS}
    idx_active = np.flatnonzero(active)
    t_grid = np.arange(k_t, dtype=float)
    for start in range(0, idx_active.size, int(chunk)):
        idx = idx_active[start:start + int(chunk)]
        t_out = (t_grid[None, :] + phase[idx, None]) * dt
        res = integrate(g, r0 * dirs[idx], v_launch[idx, None] * dirs[idx], t_max, t_out,
                        r_stop=None if not math.isfinite(r_stop_v) else r_stop_v,
                        rtol=rtol, atol=atol, max_steps=max_steps, check_density=False,
                        on_failure="ignore")
        status[idx] = res.status
        e_err[idx] = res.energy_error
        r = np.sqrt(np.einsum("nki,nki->nk", res.pos_out, res.pos_out))
        with np.errstate(invalid="ignore"):
            keep = np.isfinite(r) & (r >= r_min_store) & (r <= r_max)
        oi, ki = np.nonzero(keep)
        parts["pos"].append(res.pos_out[oi, ki].astype(np.float32))
        parts["vel"].append(res.vel_out[oi, ki].astype(np.float32))
        parts["orbit"].append(idx[oi].astype(np.int32))
        parts["t_flight"].append(t_out[oi, ki].astype(np.float32))
        n_samp[idx] = keep.sum(axis=1)
        if progress is not None:
            progress(min(start + int(chunk), idx_active.size), idx_active.size)
    arrays = {}
    for a in _SAMPLE_ARRAYS:
        if parts[a]:
            arrays[a] = np.concatenate(parts[a])
        else:
            arrays[a] = np.zeros((0, 3) if a in ("pos", "vel") else (0,),
                                 dtype=np.int32 if a == "orbit" else np.float32)
    n_failed = int(np.sum(status > 1))
    info = {
        "swerve_version": __version__,
        "build_seconds": time.perf_counter() - t_start,
        "n_flight_times": k_t,
        "n_pruned": int(np.sum(~active)),
        "n_failed": n_failed,
        "reach_speed": reach_speed(g, r0, r_min_store) if r_min_store > 0 else 0.0,
        "stored_dtype": "float32",
    }
    if n_failed:
        info["failures"] = {status_names.get(int(c), str(c)): int(np.sum(status == c))
                            for c in np.unique(status[status > 1])}
    bank = TrajectoryBank(
        galaxy=g.to_dict(), proposal=proposal, seed=int(seed), directions=directions, r0=r0,
        dt=dt, t_max=t_max, r_min_store=r_min_store, r_max=r_max, r_stop=r_stop_v,
        rtol=float(rtol), atol=float(atol), v_launch=v_launch, direction=dirs.astype(np.float32),
        phase=phase.astype(np.float32), status=status, energy_error=e_err, n_samples=n_samp,
        info=info, **arrays)
    if n_orbits and (r_max_reached := float(np.max(np.linalg.norm(bank.pos, axis=1), initial=0.0))):
        g.check_domain(r_max_reached, what="trajectory bank samples")
    return bank


# --------------------------------------------------------------------------------------------
# save / load (no pickle)


def save_bank(bank: TrajectoryBank, path) -> None:
    """Write a bank as ``.npz`` (arrays + a JSON metadata string), atomically."""
    path = os.fspath(path)
    if not path.endswith(".npz"):
        raise ValueError(f"path: expected a file name ending in .npz, got {path!r}")
    meta = json.dumps(bank.metadata(), allow_nan=False)
    arrays = {a: getattr(bank, a) for a in _SAMPLE_ARRAYS + _ORBIT_ARRAYS}
    with atomic_path(path) as tmp:
        np.savez(tmp, metadata=np.array(meta), **arrays)


def load_bank(path) -> TrajectoryBank:
    """Read a bank written by :func:`save_bank` (``allow_pickle=False``); a foreign, truncated
    or inconsistent file is refused with a ValueError naming it."""
    path = os.fspath(path)
    try:
        with np.load(path, allow_pickle=False) as z:
            data = {k: z[k] for k in z.files}
    except FileNotFoundError:
        raise
    except Exception as exc:  # noqa: BLE001 - zip/npy errors of many kinds: one clear line
        raise ValueError(f"{path}: not a readable trajectory bank ({type(exc).__name__}: {exc})") from None
    if "metadata" not in data:
        raise ValueError(f"{path}: not a swerve trajectory bank (no metadata)")
    meta = json.loads(str(data["metadata"]))
    if meta.get("format") != "swerve-trajectory-bank" or meta.get("format_version") != BANK_FORMAT_VERSION:
        raise ValueError(f"{path}: not a swerve trajectory bank of format version {BANK_FORMAT_VERSION}")
    missing = [a for a in _SAMPLE_ARRAYS + _ORBIT_ARRAYS if a not in data]
    if missing:
        raise ValueError(f"{path}: trajectory bank lacks arrays {missing}")
    n, m = int(meta["n_orbits"]), int(meta["n_stored"])
    if any(data[a].shape[0] != n for a in _ORBIT_ARRAYS) or any(data[a].shape[0] != m for a in _SAMPLE_ARRAYS):
        raise ValueError(f"{path}: trajectory bank arrays do not match its metadata (truncated or edited?)")
    r_stop = meta["r_stop"]
    return TrajectoryBank(
        galaxy=meta["galaxy"], proposal=SpeedProposal.from_dict(meta["proposal"]), seed=meta["seed"],
        directions=meta["directions"], r0=meta["r0"], dt=meta["dt"], t_max=meta["t_max"],
        r_min_store=meta["r_min_store"], r_max=meta["r_max"],
        r_stop=math.inf if r_stop is None else r_stop, rtol=meta["rtol"], atol=meta["atol"],
        info=meta.get("info", {}), **{a: data[a] for a in _SAMPLE_ARRAYS + _ORBIT_ARRAYS})


# --------------------------------------------------------------------------------------------
# reweighting


def effective_sample_size(w) -> float:
    """Kish's effective sample size ``(Σw)² / Σw²`` of weights ``w`` (0 when all vanish)."""
    w = np.asarray(w, dtype=float).ravel()
    s2 = float(np.dot(w, w))
    return float(np.sum(w)) ** 2 / s2 if s2 > 0 else 0.0


def sample_weights(bank: TrajectoryBank, launch, *, flight_time_max: float | None = None,
                   mass_range=None, max_missing: float = 0.01, hills_samples: int = 400_000,
                   hills_seed: int = 20100101, samples=None, report_ess: bool = True) -> tuple[np.ndarray, dict]:
    """Weights of the stored samples of ``bank`` for a launch model (module docstring).

    Parameters
    ----------
    bank : TrajectoryBank
    launch : HillsLaunch, BoundedPowerLawSpeed, TabulatedSpeedDensity
        Or any launch model with a ``trajectory_weights`` method (:mod:`swerve.launch`).
    flight_time_max : float, optional
        Longest flight time of interest, Myr (default: the bank's ``t_max``; must not exceed it).
    mass_range : (float, float), optional
        Hills only: ejected stars with mass in this range, Msun.
    max_missing : float
        Largest launch probability allowed at speeds the bank cannot represent (above its
        proposal, or between the proposal's ``v_lo`` and the lowest speed that reaches the
        region); more raises :class:`BankCoverageError`.
    hills_samples, hills_seed : int
        Monte Carlo of the Hills table (:func:`swerve.launch.hills_alive_table`; memoised),
        passed on as the launch model's ``table_samples`` and ``table_seed``.
    samples : int array or (orbit, t_flight) tuple of arrays, optional
        Indices of the stored samples wanted (default: all), or their orbit indices and flight
        times directly. The speed factor is computed once per orbit and gathered, so the cost
        is one gather and one multiply per sample.
    report_ess : bool
        Compute ``info["ess"]`` (one pass over the weights).

    Returns
    -------
    weights : float array (n_stored,) or (len(samples),)
        Myr per unit ejection rate (``Γ Σ w`` = expected number of stars).
    info : dict
        ``launch`` (its dict), ``flight_time_max``, ``missing_fraction``, ``ess`` (of the
        returned weights, with ``report_ess``) and, when every sample of an orbit has the same
        weight (speed-only models, no flight-time cut below ``t_max``), ``orbit_weight``
        (n_orbits,).
    """
    t_cut = bank.t_max if flight_time_max is None else float(flight_time_max)
    if not (math.isfinite(t_cut) and t_cut > 0):
        raise ValueError(f"flight_time_max: expected a positive time in Myr, got {flight_time_max!r}")
    if t_cut > bank.t_max * (1 + 1e-9):
        raise BankCoverageError(f"flight_time_max = {t_cut:g} Myr exceeds the bank's t_max = {bank.t_max:g} Myr; "
                                "build a bank with a longer t_max")
    if not callable(getattr(launch, "trajectory_weights", None)):
        raise ValueError("launch: expected a launch model with a trajectory_weights method (HillsLaunch, "
                         f"BoundedPowerLawSpeed, TabulatedSpeedDensity), got {type(launch).__name__}")
    if samples is not None and isinstance(samples, tuple):
        orbit, t = samples  # precomputed (orbit index, flight time) of the wanted samples
    else:
        orbit = bank.orbit if samples is None else bank.orbit[samples]
        t = bank.t_flight if samples is None else bank.t_flight[samples]
    prop = bank.proposal
    q_o = prop.pdf(bank.v_launch)  # per orbit
    inv_q = np.where(q_o > 0, 1.0 / np.where(q_o > 0, q_o, 1.0), 0.0) * (bank.dt / bank.n_orbits)
    v_reach = float(bank.info.get("reach_speed", 0.0))
    info = {"launch": launch.to_dict(), "flight_time_max": t_cut}
    view = BankSamples(v_launch=bank.v_launch, inv_q=inv_q, orbit=orbit, t=t, t_cut=t_cut, t_max=bank.t_max,
                       v_lo=prop.v_lo, v_hi=prop.v_hi, v_reach=v_reach, galaxy=bank.galaxy)
    res = launch.trajectory_weights(view, mass_range=mass_range, table_samples=hills_samples, table_seed=hills_seed)
    w, missing = res.weights, res.missing_fraction
    info.update(res.info)
    if missing > max_missing:
        raise BankCoverageError(
            res.coverage_message
            or f"launch model puts {missing:.1%} of its launches at speeds the bank does not cover "
               f"(bank proposal {prop.v_lo:g}-{prop.v_hi:g} km/s, reach speed {v_reach:.0f} km/s); "
               f"build a bank with a wider proposal or raise max_missing")
    info["missing_fraction"] = missing
    if report_ess:
        info["ess"] = effective_sample_size(w)
    return w, info
