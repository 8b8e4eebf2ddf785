"""Back-integration of candidate stars: did each one come from the Galactic Centre, and when?

Every error sample of every star (:func:`swerve.measurement.draw_samples`) is integrated
*backward* in a static Galaxy (:func:`swerve.orbits.integrate`), and per star the weighted
fraction of paths that pass within a radius R of the Galactic Centre is reported, with the
flight time and implied launch speed of those paths.

Method
------
* **Stopping rule.** Each path is integrated backward until it leaves the sphere r = R
  after having been inside it (the integrator's outward ``r_stop`` crossing, in the backward
  direction of time), or until ``max_time``. So a path that passes within R ends right after
  its *first* (most recent) passage, and its closest approach ``r_min`` and the time of it
  are those of that passage; a path that never comes within R runs for ``max_time`` and its
  ``r_min`` is the closest approach within that window. (A grazing passage that enters and
  leaves the sphere inside one integrator step is still found, as a pericentre between steps,
  but does not stop the path early: it costs time, and for a bound path ``r_min`` is then the
  deepest passage within ``max_time``.)
* **Passes** (origin): ``r_min < R``. **Flight time**: the time since the closest approach,
  ``-t_r_min`` (Myr; the integrator locates the pericentre between steps with its own
  accuracy). For a star launched at 3 pc this exceeds the time since launch by the time
  from the centre to 3 pc, ~0.003 Myr at 1000 km/s.
* **Launch speed** (implied): energy conservation in the static Galaxy from the present
  state, ``v_launch^2 = v^2 + 2 [Phi(x) - Phi(r_launch n)]`` with ``r_launch`` = 3 pc
  (common practice) and ``n`` the unit vector of the present position. It needs neither
  the pericentre state nor an accurate passage through the singular point mass; the
  direction matters only through the non-spherical components, whose potential varies by
  ~1e-6 of itself over a 3 pc sphere in the default Galaxy (under 1e-3 km/s in speed).
  It is the speed the path would have at 3 pc from the centre, whether or not it passes
  that close.
* **Unbound**: the present speed exceeds the local escape speed ``sqrt(-2 Phi(x))`` of the
  (untruncated) Galaxy.
* **Failures.** A path traced back to within ``r_launch`` of the centre can pass arbitrarily
  close to the point mass (a star launched exactly radially, as in a noiseless mock), where
  the integrator may stop with a step-size underflow. Such a path has reached the centre and
  is kept (its ``r_min`` and ``t_r_min`` were located before the failure); any other failed
  path is left out of every estimate and counted in ``n_failed``.

With the LMC (``lmc=...``, ``swerve trace --lmc``)
-----------------------------------------------
* **Galaxy.** The paths are integrated in the LMC-perturbed Galaxy of :mod:`swerve.orbits_lmc`:
  the static Galaxy plus the LMC, a Hernquist sphere moving on its past orbit (dynamical
  friction) with the Milky Way's reflex (:func:`swerve.galaxy.lmc.lmc_orbit`, from the present
  state under the samples' solar parameters, back to ``-max_time``). Every Galactic-Centre
  column then comes from this integration too.
* **Second origin.** A path *passes the LMC* when its closest approach to the LMC's moving
  centre (located between steps on the dense output) is below ``lmc_radius`` (default
  :data:`DEFAULT_LMC_RADIUS`, 5 kpc: a choice, stated in :mod:`swerve.orbits_lmc`). Per star:
  ``p_lmc``, the closest approach to the LMC's centre ``d_lmc_min`` and the time since it
  ``t_lmc_min`` (weighted medians over all usable paths), and over the passing paths the flight
  time since the closest approach ``t_flight_lmc`` and the speed relative to the LMC's centre
  there ``v_eject_lmc`` (medians and 16-84% intervals).
* **Stopping rules.** As above, a path stops right after its first (most recent) passage
  within ``radius`` of the Galactic Centre, or at ``max_time``; a passage by the LMC does not
  stop it, so a path that flew through the LMC's region after a Galactic-Centre ejection
  counts for both origins (``p_origin + p_lmc`` can exceed 1: such a star is consistent with
  either). In addition (``early_stop``, default on) a path stops once it recedes from both
  centres while unbound from both (:mod:`swerve.orbits_lmc`, "Early stops"): most paths that
  would run to ``max_time`` in the static trace end far earlier here. Bound paths are never
  cut short. ``r_min``, ``d_lmc_min`` and ``t_lmc_min`` are those of the integrated part of
  each path. A star now inside the LMC's sphere passes it trivially (its closest approach may
  be the present).
* **Launch speed.** The energy is not conserved in a time-dependent potential, but
  ``J = E - int dPhi/dt dt`` is (:mod:`swerve.orbits_lmc`), and the engine keeps the integral
  at the closest approach to the Galactic Centre, ``W``; so
  ``v_launch^2 = 2 [E(0) + W - Phi(r_launch n, t_r_min)]`` with ``Phi`` the potential of the
  Galactic Centre's frame at the time of the closest approach (static Galaxy, the LMC, and the
  frame's acceleration term) and ``n`` the unit vector of the present position, as above.
  Without the LMC's mass this is the static formula.
* **Unbound** stays a statement about the present: speed above the static Galaxy's local
  escape speed.

Weights
-------
The samples are draws from each star's measurement distribution, read as a distribution of
its true observables. For expectations over the star's posterior of its true observables
(distance, proper motions, line-of-sight velocity), with priors flat in the observables
except for the distance prior, the importance weights are the distance-prior weights
``exp(log_prior)`` of :class:`swerve.measurement.ErrorSamples`, normalised per star: 1 for
stars with a distance measurement and under ``distance_prior="none"``; for parallax stars
under a volume prior, the ratio of the parallax likelihood x distance prior to the density
the parallax was drawn from (nearly even: that density is tabulated from the posterior
itself, so negative and low signal-to-noise parallaxes are used too). The Jacobian ``J(d) = (kappa d)^2`` in
``ErrorSamples.log_weight`` is *not* used: it converts a density over the observables into
one over the Galactocentric velocity, which a likelihood of a velocity density needs; here
it would amount to a prior flat in velocity rather than in the observables, and would tilt
every star's distance posterior by d^2.

Quantiles are weighted (Hazen's definition, see :func:`weighted_quantile`); the 16-84%
interval is reported as ``*_lo`` and ``*_hi``.
"""

from __future__ import annotations

import math
import os
import warnings
from dataclasses import dataclass, field

import numpy as np
from astropy.table import Table

from . import __version__
from .fileio import atomic_path, jsonable
from .galaxy import Galaxy
from .galaxy.lmc import LMC, LMCTrack, lmc_orbit
from .measurement import ErrorSamples, draw_samples
from .orbits import (
    DEFAULT_ATOL,
    DEFAULT_RTOL,
    STATUS_NON_FINITE,
    STATUS_OK,
    STATUS_STOPPED,
    OrbitFailureWarning,
    integrate,
)
from .orbits_lmc import (
    DEFAULT_LMC_RADIUS,
    frame_potential,
    integrate_lmc,
    lmc_origin_stats,
    stop_names,
)
from .rng import as_generator
from .units import to_internal
from .vocabulary import DEFAULT_LAUNCH_RADIUS, DEFAULT_MAX_TIME, DEFAULT_RADIUS, LMC_TRACE_COLUMNS, TRACE_COLUMNS

__all__ = [
    "DEFAULT_CHUNK",
    "DEFAULT_LAUNCH_RADIUS",
    "DEFAULT_LMC_RADIUS",
    "DEFAULT_MAX_TIME",
    "DEFAULT_RADIUS",
    "LMC_TRACE_COLUMNS",
    "TRACE_COLUMNS",
    "TraceResult",
    "trace_catalog",
    "trace_orbits",
    "trace_samples",
    "trace_summary",
    "weighted_quantile",
    "write_trace_table",
]

#: Orbits per integration batch (bounds memory; one progress update each).
DEFAULT_CHUNK = 8192


# --------------------------------------------------------------------------------------------
# statistics


def weighted_quantile(x, w, q) -> np.ndarray:
    """Weighted quantiles of ``x`` with weights ``w`` (Hazen's definition).

    The weighted empirical CDF is placed at the middle of each point's weight,
    ``F_i = (W_i - w_i / 2) / W`` (``W_i`` the running sum over sorted ``x``), and the
    quantile is linearly interpolated in it (clamped at the ends). With equal weights this is
    ``numpy.quantile(x, q, method="hazen")``.

    Parameters
    ----------
    x : array (m,)
    w : array (m,), non-negative, positive sum
    q : float or array of floats in [0, 1]

    Returns
    -------
    ndarray of the shape of ``q``; NaN when ``x`` is empty or the weights sum to zero.
    """
    x = np.asarray(x, dtype=float).ravel()
    w = np.asarray(w, dtype=float).ravel()
    q = np.asarray(q, dtype=float)
    if x.shape != w.shape:
        raise ValueError(f"weighted_quantile: x and w differ in shape, {x.shape} vs {w.shape}")
    if np.any(w < 0) or not np.all(np.isfinite(w)):
        raise ValueError("weighted_quantile: weights must be finite and non-negative")
    if np.any((q < 0) | (q > 1)):
        raise ValueError("weighted_quantile: q must lie in [0, 1]")
    keep = w > 0
    x, w = x[keep], w[keep]
    if x.size == 0:
        return np.full(q.shape, np.nan)
    order = np.argsort(x, kind="stable")
    xs, ws = x[order], w[order]
    cdf = (np.cumsum(ws) - 0.5 * ws) / ws.sum()
    return np.interp(q, cdf, xs)


def _wmedian(x, w):
    return float(weighted_quantile(x, w, 0.5))


def _positive(value, kind, name):
    v = to_internal(value, kind, name)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or not (math.isfinite(v) and v > 0):
        raise ValueError(f"{name}: expected a positive finite number, got {value!r}")
    return float(v)


# --------------------------------------------------------------------------------------------
# result


@dataclass
class TraceResult:
    """Per-star results of a back-integration, and the per-sample values behind them.

    Per-star arrays have shape (n,); per-sample arrays (n, k). Units: kpc, km/s, Myr.

    Attributes
    ----------
    ids : array (n,)
    ra, dec : arrays (n,), deg, or None when traced from plain arrays
    distance : array (n,) or None
        Heliocentric distance, weighted median (kpc).
    r_gc, v_gc : arrays (n,)
        Present Galactocentric radius and speed, weighted medians.
    p_origin : array (n,)
        Weighted fraction of the usable paths with ``r_min < radius``.
    n_pass : int array (n,)
    t_flight, t_flight_lo, t_flight_hi : arrays (n,)
        Weighted median and 16th/84th percentiles of the flight time of the passing paths
        (NaN where none passes).
    v_launch, v_launch_lo, v_launch_hi : arrays (n,)
        The same for the implied launch speed.
    p_unbound : array (n,)
    r_min : array (n,)
        Weighted median of the closest approach over the usable paths.
    ess : array (n,)
    n_failed : int array (n,)
    weights : array (n, k)
        Normalised weights (0 for left-out samples; each row sums to 1 over usable samples).
    sample_r_min, sample_t_flight, sample_v_launch : arrays (n, k)
        Closest approach (kpc), time since it (Myr) and implied launch speed (km/s).
    sample_unbound, sample_pass, usable : bool arrays (n, k)
    meta : dict
        Settings, the Galaxy, and provenance (JSON-safe).
    p_lmc, n_pass_lmc, d_lmc_min, t_lmc_min : arrays (n,), or None without the LMC
        The LMC origin (module docstring, "With the LMC"; columns :data:`LMC_TRACE_COLUMNS`).
    t_flight_lmc, t_flight_lmc_lo, t_flight_lmc_hi, v_eject_lmc, v_eject_lmc_lo, v_eject_lmc_hi : arrays (n,) or None
    sample_d_lmc_min, sample_t_lmc_min, sample_v_rel_lmc : arrays (n, k) or None
        Closest approach to the LMC's centre (kpc), the time since it (Myr) and the speed
        relative to the LMC's centre there (km/s).
    sample_pass_lmc : bool array (n, k) or None
    sample_stop_reason : int array (n, k) or None
        Why each path stopped (:data:`swerve.orbits_lmc.stop_names`; LMC runs only).
    samples : swerve.measurement.ErrorSamples or None
        The error samples traced (set by :func:`trace_samples` and :func:`trace_catalog`).
    """

    ids: np.ndarray
    ra: np.ndarray | None
    dec: np.ndarray | None
    distance: np.ndarray | None
    r_gc: np.ndarray
    v_gc: np.ndarray
    p_origin: np.ndarray
    n_pass: np.ndarray
    t_flight: np.ndarray
    t_flight_lo: np.ndarray
    t_flight_hi: np.ndarray
    v_launch: np.ndarray
    v_launch_lo: np.ndarray
    v_launch_hi: np.ndarray
    p_unbound: np.ndarray
    r_min: np.ndarray
    ess: np.ndarray
    n_failed: np.ndarray
    weights: np.ndarray
    sample_r_min: np.ndarray
    sample_t_flight: np.ndarray
    sample_v_launch: np.ndarray
    sample_unbound: np.ndarray
    sample_pass: np.ndarray
    usable: np.ndarray
    meta: dict = field(default_factory=dict)
    p_lmc: np.ndarray | None = None
    n_pass_lmc: np.ndarray | None = None
    d_lmc_min: np.ndarray | None = None
    t_lmc_min: np.ndarray | None = None
    t_flight_lmc: np.ndarray | None = None
    t_flight_lmc_lo: np.ndarray | None = None
    t_flight_lmc_hi: np.ndarray | None = None
    v_eject_lmc: np.ndarray | None = None
    v_eject_lmc_lo: np.ndarray | None = None
    v_eject_lmc_hi: np.ndarray | None = None
    sample_d_lmc_min: np.ndarray | None = None
    sample_t_lmc_min: np.ndarray | None = None
    sample_v_rel_lmc: np.ndarray | None = None
    sample_pass_lmc: np.ndarray | None = None
    sample_stop_reason: np.ndarray | None = None
    samples: object = None

    @property
    def n(self) -> int:
        """Number of stars."""
        return int(self.p_origin.shape[0])

    @property
    def has_lmc(self) -> bool:
        """Whether the paths were traced with the LMC (and the LMC columns are filled)."""
        return self.p_lmc is not None

    @property
    def columns(self) -> dict[str, tuple[str, str]]:
        """The table's columns, name -> (unit, description): :data:`TRACE_COLUMNS`, with
        :data:`LMC_TRACE_COLUMNS` after ``r_min`` when traced with the LMC."""
        if not self.has_lmc:
            return dict(TRACE_COLUMNS)
        out = {}
        for name, spec in TRACE_COLUMNS.items():
            out[name] = spec
            if name == "r_min":
                out.update(LMC_TRACE_COLUMNS)
        return out

    def to_table(self):
        """The per-star results as an :class:`astropy.table.Table` with units, descriptions
        and :attr:`meta` (the columns of :attr:`columns`)."""
        t = Table()
        n = self.n
        nan = np.full(n, np.nan)
        for name, (unit, desc) in self.columns.items():
            value = getattr(self, name if name != "id" else "ids")
            if value is None:
                value = nan
            t[name] = np.asarray(value)
            if unit:
                t[name].unit = unit
            t[name].description = desc
        t.meta.update(_jsonable(self.meta))
        return t


def _jsonable(obj):
    return jsonable(obj)


# --------------------------------------------------------------------------------------------
# tracing


def _lmc_track(galaxy, lmc, max_time, solar):
    """The LMC track of a trace: ``lmc`` True (the default LMC), an LMC or an LMCTrack."""
    if isinstance(lmc, LMCTrack):
        if lmc.t_min > -max_time + 1e-9:
            raise ValueError(
                f"lmc: the LMC track reaches back to {lmc.t_min:g} Myr, short of max_time {max_time:g} Myr; "
                f"make it with lmc_orbit(..., t_min=-{max_time:g})")
        return lmc
    if lmc is True:
        lmc = LMC()
    if not isinstance(lmc, LMC):
        raise ValueError(f"lmc: expected None, True, a swerve.galaxy.lmc.LMC or an LMCTrack, got {lmc!r}")
    return lmc_orbit(galaxy, lmc, t_min=-max_time, solar=solar)


def trace_orbits(galaxy, pos, vel, weights=None, *, radius=DEFAULT_RADIUS, max_time=DEFAULT_MAX_TIME,
                 launch_radius=DEFAULT_LAUNCH_RADIUS, rtol=DEFAULT_RTOL, atol=DEFAULT_ATOL,
                 chunk=DEFAULT_CHUNK, progress=None, ids=None, lmc=None, lmc_radius=DEFAULT_LMC_RADIUS,
                 early_stop=True, solar=None) -> TraceResult:
    """Trace samples of stars backward in a Galaxy (plain arrays; see the module docstring).

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
    pos : array (n, k, 3), kpc
        Present Galactocentric positions: k samples of each of n stars.
    vel : array (n, k, 3), km/s
        Present Galactocentric velocities.
    weights : array (n, k), optional
        Non-negative importance weights of the samples (normalised per star here); default
        equal weights.
    radius : float or Quantity ['length']
        A path "passes" (is consistent with a Galactic-Centre origin) when its closest
        approach is below this radius, kpc (default 1).
    max_time : float or Quantity ['time']
        Longest backward integration, Myr (default 1000).
    launch_radius : float or Quantity ['length']
        Radius at which the implied launch speed is evaluated, kpc (default 3 pc).
    rtol, atol : float
        Integrator tolerances (:func:`swerve.orbits.integrate`).
    chunk : int
        Orbits per integration batch.
    progress : callable, optional
        Called as ``progress(done, total)`` (orbits) after each batch.
    ids : array (n,), optional
        Star identifiers (default 0..n-1).
    lmc : None, bool, swerve.galaxy.lmc.LMC or swerve.galaxy.lmc.LMCTrack
        Trace in the LMC-perturbed Galaxy and report the LMC as a second origin (module
        docstring, "With the LMC"): True for the default LMC (``LMC()``, m_lmc 1.38e11 Msun), an
        :class:`~swerve.galaxy.lmc.LMC` for other values (its track made here from the present
        back to ``-max_time``), or a track already made (reaching ``-max_time``). None or False
        (default): the static Galaxy.
    lmc_radius : float or Quantity ['length']
        A path passes the LMC when its closest approach to the LMC's centre is below this, kpc
        (default :data:`DEFAULT_LMC_RADIUS`). Used with ``lmc`` only.
    early_stop : bool
        With ``lmc``: stop a path once it recedes from both centres, unbound from both
        (:mod:`swerve.orbits_lmc`, "Early stops"). Default True; False integrates every path
        that passes neither origin for the full ``max_time`` (as the static trace does).
    solar : None, str, dict or SolarParameters
        Solar parameters of the LMC's present state when its track is made here (default
        :data:`swerve.frames.DEFAULT_SOLAR`); :func:`trace_samples` passes the samples' own.

    Returns
    -------
    TraceResult
        With ``ra``, ``dec`` and ``distance`` None.

    Examples
    --------
    >>> import numpy as np
    >>> from swerve.galaxy import Galaxy
    >>> x = np.array([[[10.0, 5.0, 20.0]]])
    >>> res = trace_orbits(Galaxy.default(), x, 900.0 * x / np.linalg.norm(x), lmc=True, max_time=200.0)
    >>> float(res.p_origin[0]), float(res.p_lmc[0])
    (1.0, 0.0)
    """
    pos = np.asarray(to_internal(pos, "length", "pos"), dtype=float)
    vel = np.asarray(to_internal(vel, "velocity", "vel"), dtype=float)
    if pos.ndim != 3 or pos.shape[2] != 3:
        raise ValueError(f"pos: expected an array of shape (n, k, 3), got shape {pos.shape}")
    if vel.shape != pos.shape:
        raise ValueError(f"vel: expected shape {pos.shape} like pos, got {vel.shape}")
    n, k = pos.shape[:2]
    if n == 0 or k == 0:
        raise ValueError(f"pos: expected at least one star and one sample, got shape {pos.shape}")
    if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(vel))):
        raise ValueError("pos, vel: expected finite values, got NaN or infinity")
    if weights is None:
        weights = np.ones((n, k))
    weights = np.asarray(weights, dtype=float)
    if weights.shape != (n, k):
        raise ValueError(f"weights: expected shape ({n}, {k}), got {weights.shape}")
    if not np.all(np.isfinite(weights)) or np.any(weights < 0):
        raise ValueError("weights: expected finite non-negative values")
    radius = _positive(radius, "length", "radius")
    max_time = _positive(max_time, "time", "max_time")
    launch_radius = _positive(launch_radius, "length", "launch_radius")
    if isinstance(chunk, bool) or not isinstance(chunk, (int, np.integer)) or chunk < 1:
        raise ValueError(f"chunk: expected a positive integer, got {chunk!r}")
    ids = np.arange(n) if ids is None else np.asarray(ids)
    if ids.shape != (n,):
        raise ValueError(f"ids: expected {n} identifiers, got shape {ids.shape}")
    track = None
    if lmc is not None and lmc is not False:
        lmc_radius = _positive(lmc_radius, "length", "lmc_radius")
        track = _lmc_track(galaxy, lmc, max_time, solar)

    flat_pos = pos.reshape(-1, 3)
    flat_vel = vel.reshape(-1, 3)
    m = flat_pos.shape[0]
    r_min = np.empty(m)
    t_min = np.empty(m)
    r_max = np.empty(m)
    status = np.empty(m, dtype=np.int64)
    if track is not None:
        lmc_cols = {name: np.empty(m) for name in ("d", "td", "vr", "w")}
        stop_reason = np.empty(m, dtype=np.int64)
    for start in range(0, m, int(chunk)):
        stop = min(start + int(chunk), m)
        if track is None:
            res = integrate(galaxy, flat_pos[start:stop], flat_vel[start:stop], -max_time, r_stop=radius,
                            rtol=rtol, atol=atol, check_density=False, on_failure="ignore")
        else:
            res = integrate_lmc(galaxy, track, flat_pos[start:stop], flat_vel[start:stop], 0.0, -max_time,
                                r_stop=radius, no_return=bool(early_stop), rtol=rtol,
                                atol=atol, on_failure="ignore")
            lmc_cols["d"][start:stop] = res.d_lmc_min
            lmc_cols["td"][start:stop] = res.t_d_lmc_min
            lmc_cols["vr"][start:stop] = res.v_rel_lmc
            lmc_cols["w"][start:stop] = res.w_r_min
            stop_reason[start:stop] = res.stop_reason
        r_min[start:stop] = res.r_min
        t_min[start:stop] = res.t_r_min
        r_max[start:stop] = res.r_max
        status[start:stop] = res.status
        # A Galaxy of zero-mass components has Phi = 0 everywhere, and the integrator's relative
        # energy error |dE| / |Phi(x0)| is then 0/0, flagged "non-finite": the path is fine.
        massless = ((res.status == STATUS_NON_FINITE) & (galaxy.potential(flat_pos[start:stop]) == 0.0)
                    & np.all(np.isfinite(res.pos), axis=1) & np.all(np.isfinite(res.vel), axis=1))
        status[start:stop][massless] = STATUS_OK
        if progress is not None:
            progress(stop, m)
    galaxy.check_domain(r_max, what="traced paths")

    ok = status <= STATUS_STOPPED
    reached_centre = ~ok & (r_min <= launch_radius) & np.isfinite(t_min)
    usable = (ok | reached_centre).reshape(n, k)
    r_min = r_min.reshape(n, k)
    t_flight = -t_min.reshape(n, k)
    passes = usable & (r_min < radius)

    # present-state quantities
    phi = galaxy.potential(flat_pos)
    r_now = np.linalg.norm(flat_pos, axis=1)
    unit = np.where(r_now[:, None] > 0, flat_pos / np.where(r_now > 0, r_now, 1.0)[:, None],
                    np.array([1.0, 0.0, 0.0]))
    speed2 = np.sum(flat_vel**2, axis=1)
    if track is None:
        phi_launch = galaxy.potential(launch_radius * unit)
        with np.errstate(invalid="ignore"):
            v_launch = np.sqrt(speed2 + 2.0 * (phi - phi_launch)).reshape(n, k)
    else:
        # v^2/2 + Phi_frame(x, t) - W is conserved (swerve.orbits_lmc): at the closest approach
        e0 = 0.5 * speed2 + frame_potential(galaxy, track, flat_pos, 0.0)
        t_at = np.clip(np.nan_to_num(t_min, nan=0.0), track.t_min, 0.0)
        phi_launch = frame_potential(galaxy, track, launch_radius * unit, t_at)
        with np.errstate(invalid="ignore"):
            v_launch = np.sqrt(2.0 * (e0 + lmc_cols["w"] - phi_launch)).reshape(n, k)
    unbound = (speed2 > np.maximum(-2.0 * phi, 0.0)).reshape(n, k)
    r_now = r_now.reshape(n, k)
    speed = np.sqrt(speed2).reshape(n, k)

    w = np.where(usable, weights, 0.0)
    sums = w.sum(axis=1, keepdims=True)
    w = np.divide(w, sums, out=np.zeros_like(w), where=sums > 0)
    out = {name: np.full(n, np.nan) for name in (
        "r_gc", "v_gc", "p_origin", "t_flight", "t_flight_lo", "t_flight_hi", "v_launch",
        "v_launch_lo", "v_launch_hi", "p_unbound", "r_min", "ess")}
    qs = [0.5, 0.16, 0.84]
    for i in range(n):
        wi = w[i]
        if not np.any(wi > 0):
            continue
        out["r_gc"][i] = _wmedian(r_now[i], wi)
        out["v_gc"][i] = _wmedian(speed[i], wi)
        out["r_min"][i] = _wmedian(r_min[i][usable[i]], wi[usable[i]])
        out["p_unbound"][i] = float(np.sum(wi[unbound[i]]))
        out["ess"][i] = 1.0 / float(np.sum(wi * wi))
        p = passes[i]
        out["p_origin"][i] = float(np.sum(wi[p]))
        if np.any(wi[p] > 0):
            tq = weighted_quantile(t_flight[i][p], wi[p], qs)
            vq = weighted_quantile(v_launch[i][p], wi[p], qs)
            out["t_flight"][i], out["t_flight_lo"][i], out["t_flight_hi"][i] = tq
            out["v_launch"][i], out["v_launch_lo"][i], out["v_launch_hi"][i] = vq
    n_failed = (~usable).sum(axis=1)
    if n_failed.sum():
        warnings.warn(
            f"trace: {int(n_failed.sum())} of {m} paths failed to integrate and are left out "
            f"(in {int(np.sum(n_failed > 0))} stars; see the n_failed column)", OrbitFailureWarning, stacklevel=2)
    meta = {
        "swerve_trace": "backward integration of candidate stars made by swerve.trace",
        "swerve_version": __version__,
        "galaxy": galaxy.to_dict(),
        "radius_kpc": radius,
        "max_time_myr": max_time,
        "launch_radius_kpc": launch_radius,
        "samples_per_star": int(k),
        "rtol": float(rtol),
        "atol": float(atol),
        "n_reached_centre_after_failure": int(reached_centre.sum()),
        "quantiles": "weighted, Hazen definition; *_lo/*_hi are the 16th/84th percentiles",
    }
    lmc_out = {}
    if track is not None:
        shape = (n, k)
        stats = lmc_origin_stats(w, usable, lmc_cols["d"].reshape(shape), lmc_cols["td"].reshape(shape),
                                 lmc_cols["vr"].reshape(shape), lmc_radius)
        lmc_out = {name: stats[name] for name in LMC_TRACE_COLUMNS}
        lmc_out.update(sample_d_lmc_min=lmc_cols["d"].reshape(shape), sample_t_lmc_min=-lmc_cols["td"].reshape(shape),
                       sample_v_rel_lmc=lmc_cols["vr"].reshape(shape), sample_pass_lmc=stats["sample_pass"],
                       sample_stop_reason=stop_reason.reshape(shape))
        track_meta = track.to_dict()
        if track_meta.get("galaxy") == meta["galaxy"]:
            track_meta["galaxy"] = "the traced Galaxy (meta galaxy)"
        meta.update({
            "lmc": track_meta,
            "lmc_radius_kpc": lmc_radius,
            "early_stop": bool(early_stop),
            "stop_reasons": {stop_names[c]: int(np.sum(stop_reason == c)) for c in sorted(stop_names)},
            "lmc_model": "LMC-perturbed Galaxy of swerve.orbits_lmc: a moving Hernquist LMC with dynamical "
                         "friction, the Milky Way's reflex (rigid Milky Way); unbound = above the static "
                         "Galaxy's escape speed",
        })
    return TraceResult(
        ids=ids, ra=None, dec=None, distance=None,
        r_gc=out["r_gc"], v_gc=out["v_gc"], p_origin=out["p_origin"], n_pass=passes.sum(axis=1),
        t_flight=out["t_flight"], t_flight_lo=out["t_flight_lo"], t_flight_hi=out["t_flight_hi"],
        v_launch=out["v_launch"], v_launch_lo=out["v_launch_lo"], v_launch_hi=out["v_launch_hi"],
        p_unbound=out["p_unbound"], r_min=out["r_min"], ess=out["ess"], n_failed=n_failed,
        weights=w, sample_r_min=r_min, sample_t_flight=t_flight, sample_v_launch=v_launch,
        sample_unbound=unbound, sample_pass=passes, usable=usable, meta=meta, **lmc_out,
    )


def trace_samples(galaxy, samples, **kwargs) -> TraceResult:
    """Trace the error samples of a catalog (:func:`swerve.measurement.draw_samples`) backward.

    The weights are the distance-prior weights ``exp(samples.log_prior)``, normalised per
    star (module docstring, "Weights"). Keyword arguments as :func:`trace_orbits`.

    Returns
    -------
    TraceResult
        With ``ra``, ``dec``, ``distance`` (weighted median of the sampled heliocentric
        distances) and ``samples`` filled in, and the solar parameters and distance prior in
        ``meta``. With ``lmc``, the LMC's present state uses the samples' solar parameters
        unless ``solar`` is given.
    """
    if not isinstance(samples, ErrorSamples):
        raise ValueError(f"samples: expected swerve.measurement.ErrorSamples, got {type(samples).__name__}")
    lp = samples.log_prior - samples.log_prior.max(axis=1, keepdims=True)
    weights = np.exp(lp)
    if kwargs.get("lmc") is not None and kwargs.get("lmc") is not False:
        kwargs.setdefault("solar", samples.settings.get("solar"))
    res = trace_orbits(galaxy, samples.position, samples.velocity, weights, ids=samples.ids, **kwargs)
    res.samples = samples
    res.ra = np.asarray(samples.ra, dtype=float)
    res.dec = np.asarray(samples.dec, dtype=float)
    res.distance = np.array([_wmedian(samples.distance[i][res.usable[i]], res.weights[i][res.usable[i]])
                             if res.usable[i].any() else np.nan for i in range(samples.n)])
    res.meta["weights"] = ("distance-prior weights exp(log_prior) of swerve.measurement.draw_samples, "
                           "normalised per star (no velocity Jacobian)")
    res.meta["distance_prior"] = samples.distance_prior
    res.meta["samples_settings"] = samples.settings
    res.meta["solar"] = samples.settings.get("solar")
    return res


def trace_catalog(catalog, galaxy=None, k: int = 500, rng=None, *, distance_prior="none", solar=None,
                  length_scale=10.0, max_distance=300.0, **kwargs) -> TraceResult:
    """Draw ``k`` error samples of every star of ``catalog`` and trace them backward.

    Parameters
    ----------
    catalog : swerve.catalog.Catalog
    galaxy : swerve.galaxy.Galaxy, optional
        Default: ``Galaxy.default()``.
    k : int
        Samples per star.
    rng : numpy.random.Generator or int
        The only source of randomness (an int is a seed, recorded in ``meta``).
    distance_prior, solar, length_scale, max_distance
        As :func:`swerve.measurement.draw_samples`.
    **kwargs
        As :func:`trace_orbits` (radius, max_time, launch_radius, rtol, atol, chunk, progress,
        lmc, lmc_radius, early_stop).

    Returns
    -------
    TraceResult
        With the error samples in ``samples``.

    Examples
    --------
    >>> from swerve.catalog import read_catalog
    >>> res = trace_catalog(read_catalog("examples/demo.ecsv"), k=50, rng=1)  # doctest: +SKIP
    >>> res.to_table()["p_origin"]  # doctest: +SKIP
    """
    rng, seed = as_generator(rng)
    galaxy = Galaxy.default() if galaxy is None else galaxy
    samples = draw_samples(catalog, k, rng, distance_prior=distance_prior, solar=solar,
                           length_scale=length_scale, max_distance=max_distance)
    res = trace_samples(galaxy, samples, **kwargs)
    res.meta["seed"] = seed if seed is not None else "not recorded (a Generator was passed)"
    res.meta["catalog"] = str(catalog.source)
    return res


# --------------------------------------------------------------------------------------------
# outputs


def _atomic(path, write):
    """Call ``write(tmp)`` for a temporary file beside ``path`` (same suffix), then rename it
    (:func:`swerve.fileio.atomic_path`); a missing folder is a ValueError."""
    folder = os.path.dirname(os.path.abspath(os.fspath(path)))
    if not os.path.isdir(folder):
        raise ValueError(f"{os.fspath(path)!r}: folder {folder} does not exist")
    with atomic_path(path) as tmp:
        write(tmp)


def write_trace_table(result: TraceResult, path) -> None:
    """Write the per-star table as ECSV, atomically (temporary file beside it, then rename)."""
    if not os.fspath(path).lower().endswith(".ecsv"):
        raise ValueError(f"out: {os.fspath(path)!r}: expected a file name ending in .ecsv")
    table = result.to_table()
    _atomic(path, lambda tmp: table.write(tmp, format="ascii.ecsv", overwrite=True))


def trace_summary(result: TraceResult, top: int = 20) -> str:
    """A terminal summary: the ``top`` stars by origin probability (Galactic Centre, plus the
    LMC when traced with it), then counts."""
    if isinstance(top, bool) or not isinstance(top, (int, np.integer)) or top < 0:
        raise ValueError(f"top: expected a non-negative integer, got {top!r}")
    meta = result.meta
    lmc = result.has_lmc
    if lmc:
        m_lmc = meta.get("lmc", {}).get("lmc", {}).get("m_lmc", float("nan"))
        lines = [(
            f"Traced {result.n} stars x {meta.get('samples_per_star')} samples back for up to "
            f"{meta.get('max_time_myr'):g} Myr in Galaxy {meta.get('galaxy', {}).get('name')} perturbed by the "
            f"LMC (m_lmc {m_lmc:.3g} Msun, on its past orbit with the Milky Way's reflex); origins: a path within "
            f"{meta.get('radius_kpc'):g} kpc of the Galactic Centre (P_origin) or within "
            f"{meta.get('lmc_radius_kpc'):g} kpc of the LMC's centre (P_LMC)."
        )]
    else:
        lines = [(
            f"Traced {result.n} stars x {meta.get('samples_per_star')} samples back for up to "
            f"{meta.get('max_time_myr'):g} Myr in Galaxy {meta.get('galaxy', {}).get('name')}; "
            f"origin: a path within {meta.get('radius_kpc'):g} kpc of the Galactic Centre."
        )]
    key = np.nan_to_num(result.p_origin, nan=-1.0)
    if lmc:
        key = key + np.nan_to_num(result.p_lmc, nan=0.0)
    order = np.argsort(-key, kind="stable")
    shown = order[: int(top)]
    if len(shown):
        lines.append(f"  {'id':<14} {'d [kpc]':>8} {'P_origin':>8} {'t_flight [Myr]':>22} "
                     f"{'v_launch [km/s]':>22} {'P_unbound':>9} {'r_min [kpc]':>11}"
                     + (f" {'P_LMC':>6} {'t_flight_LMC [Myr]':>22} {'d_LMC [kpc]':>11}" if lmc else ""))

        def _iv(m, lo, hi, fmt):
            if not np.isfinite(m):
                return "--"
            return f"{m:{fmt}} ({lo:{fmt}}-{hi:{fmt}})"

        for i in shown:
            d = result.distance[i] if result.distance is not None else np.nan
            lines.append(
                f"  {str(result.ids[i])[:14]:<14} {d:8.2f} {result.p_origin[i]:8.3f} "
                f"{_iv(result.t_flight[i], result.t_flight_lo[i], result.t_flight_hi[i], '.1f'):>22} "
                f"{_iv(result.v_launch[i], result.v_launch_lo[i], result.v_launch_hi[i], '.0f'):>22} "
                f"{result.p_unbound[i]:9.3f} {result.r_min[i]:11.2f}"
                + (f" {result.p_lmc[i]:6.3f} "
                   f"{_iv(result.t_flight_lmc[i], result.t_flight_lmc_lo[i], result.t_flight_lmc_hi[i], '.1f'):>22} "
                   f"{result.d_lmc_min[i]:11.2f}" if lmc else ""))
        if result.n > len(shown):
            lines.append(f"  ... {result.n - len(shown)} more stars in the table")
    p = np.nan_to_num(result.p_origin)
    lines.append(
        f"  P_origin > 0.5: {int(np.sum(p > 0.5))} stars; > 0.1: {int(np.sum(p > 0.1))}; = 0: "
        f"{int(np.sum(p == 0))}.  P_unbound > 0.5: {int(np.sum(np.nan_to_num(result.p_unbound) > 0.5))} stars.")
    if lmc:
        pl = np.nan_to_num(result.p_lmc)
        stops = meta.get("stop_reasons", {})
        lines.append(
            f"  P_LMC > 0.5: {int(np.sum(pl > 0.5))} stars; > 0.1: {int(np.sum(pl > 0.1))}; = 0: "
            f"{int(np.sum(pl == 0))}.  Paths stopped: "
            + "; ".join(f"{name} {count}" for name, count in stops.items()) + ".")
    n_failed = int(np.sum(result.n_failed))
    if n_failed:
        lines.append(f"  {n_failed} paths failed to integrate (left out; column n_failed).")
    return "\n".join(lines)
