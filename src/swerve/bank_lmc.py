"""Trajectory banks in the LMC-perturbed Galaxy: one integration per present-day star.

The forward model of the time-dependent Galaxy (issue 21, item 2). In a static
Galaxy one orbit gives a present-day star at every flight time, because the star launched
``t`` ago has reached the point the orbit reaches at flight time ``t`` whatever the launch
epoch (:mod:`swerve.bank`, the trajectory-reuse trick). With the LMC moving, a star launched at
epoch ``-t`` feels the LMC where it was then, so its present state depends on ``t`` twice (its
flight time and its launch epoch) and an orbit yields exactly one present-day star. The Galaxy's
reflection symmetry is gone too (the LMC sits in one octant), so launches cover the whole sky.

**The scheme**: each orbit draws its launch direction (whole sphere), its launch speed (the
bank's log-uniform proposal) and its flight time ``t = u t_max`` (uniform) from one scrambled
Sobol point, exactly as :func:`swerve.bank.build_bank` does, and is integrated in the
LMC-perturbed Galaxy (:func:`swerve.orbits_lmc.integrate_lmc`: the LMC's tabulated past orbit
with dynamical friction and the Milky Way's reflex, a rigid Milky Way) from its launch epoch
``-t`` to the present. Its present state is the bank's one sample of that orbit, stored when it
lies in the region. The result is a :class:`swerve.bank.TrajectoryBank` with one flight-time
slot per orbit (``dt = t_max``, the sample at ``(0 + u) dt``), so the reweighting of
:func:`swerve.bank.sample_weights` holds unchanged: the weight ``p(v)/q(v) x alive(v, t) x
dt / N`` with ``dt = t_max`` is the importance weight of a uniform flight time, and every
launch model, population, mock, summary and training step downstream works on it as on a
static bank. Nothing is approximated beyond the integrator's tolerance: each star is an exact
integration; the price is Monte Carlo noise (one star per orbit, so many more orbits for the
same effective sample size; measured in benchmarks/RESULTS.md, "The forward model with the
LMC") and the time-dependent engine's cost per orbit.

The cheaper alternatives considered: reusing a static trajectory for every launch epoch with
a first-order correction along it (the LMC's tidal acceleration integrated along the static
path) is not exact, needs its own validation against this scheme at every m_lmc, and fails
for stars passing near the LMC, which are the ones the LMC-origin probability looks for.

**Energy pruning** as in the static bank but with a margin: a launch whose static energy is
so far below the least potential on the sphere ``r = r_min_store`` that even a gain of
``prune_margin`` (km/s)^2 could not lift it there is not integrated. The LMC changes a star's
energy by at most about its potential at the Galactic Centre, G m_lmc / r_LMC ~ 1.2e4
(km/s)^2 for 1.38e11 Msun at 50 kpc (plus the reflex frame's work); the default margin,
1e5 (km/s)^2, is eight times that (tests/test_bank_lmc.py checks that no pruned-but-integrated
launch reaches the region).
"""

from __future__ import annotations

import math
import time

import numpy as np

from . import __version__
from .bank import (
    STATUS_PRUNED,
    SpeedProposal,
    TrajectoryBank,
    _galaxy_of,
    _sphere_min_potential,
    check_bank_arguments,
    draw_launches,
    reach_speed,
)
from .galaxy.lmc import LMC, lmc_orbit
from .orbits import status_names
from .orbits_lmc import integrate_lmc

__all__ = ["DEFAULT_PRUNE_MARGIN", "build_lmc_bank"]

#: energy margin of the pruning, (km/s)^2 (module docstring)
DEFAULT_PRUNE_MARGIN = 1.0e5


def build_lmc_bank(galaxy, n_orbits: int, seed: int, *, lmc: LMC | None = None, t_max: float = 300.0,
                   r0: float = 0.003, v_lo: float = 500.0, v_hi: float = 5000.0,
                   r_min_store: float = 10.0, r_max: float = 200.0, friction: bool = True,
                   reflex: bool = True, solar=None, prune_margin: float = DEFAULT_PRUNE_MARGIN,
                   rtol: float = 1e-9, atol: float = 1e-12, max_steps: int = 100_000,
                   chunk: int = 4096, progress=None) -> TrajectoryBank:
    """Integrate a trajectory bank of present-day stars in the LMC-perturbed Galaxy.

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
        The static Milky Way.
    n_orbits : int
        Number of launches (whole sphere); each gives at most one stored sample.
    seed : int
        Seed of the scrambled Sobol sequence (recorded).
    lmc : swerve.galaxy.lmc.LMC, optional
        The LMC (default ``LMC()``: its declared defaults, m_lmc = 1.38e11 Msun).
    t_max : float
        Longest flight time, Myr; flight times are uniform on ``[0, t_max)``.
    r0, v_lo, v_hi, r_min_store, r_max, rtol, atol, max_steps
        As :func:`swerve.bank.build_bank`; orbits stop at their first outward crossing of
        ``r_max`` (they are assumed not to come back before the present).
    friction, reflex : bool
        Dynamical friction on the LMC and the Galactic Centre's reflex (:func:`lmc_orbit`).
    solar : optional
        Solar parameters of the LMC's present state (:func:`swerve.frames.resolve_solar`).
    prune_margin : float
        Energy margin of the pruning, (km/s)^2 (module docstring); 0 prunes as a static bank.
    chunk : int
        Orbits per call of the engine (progress granularity).
    progress : callable, optional
        Called as ``progress(done, total)`` after each chunk.

    Returns
    -------
    TrajectoryBank
        ``directions = "sphere"``, ``dt = t_max`` (one flight-time slot per orbit);
        ``info["lmc"]`` holds the LMC, ``info["forward_model"] = "lmc-one-star-per-orbit"``.
    """
    g = _galaxy_of(galaxy)
    lmc = LMC() if lmc is None else lmc
    if not isinstance(lmc, LMC):
        raise ValueError(f"lmc: expected a swerve.galaxy.lmc.LMC, got {type(lmc).__name__}")
    n_orbits, seed, t_max, r0, r_max, r_min_store = check_bank_arguments(n_orbits, seed, t_max, r0, r_max,
                                                                         r_min_store)
    prune_margin = float(prune_margin)
    if not (math.isfinite(prune_margin) and prune_margin >= 0.0):
        raise ValueError(f"prune_margin: expected a non-negative energy in (km/s)^2, got {prune_margin!r}")
    proposal = SpeedProposal(v_lo, v_hi)

    t_start = time.perf_counter()
    track = lmc_orbit(g, lmc, t_min=-(t_max + 5.0), friction=friction, reflex=reflex, solar=solar)
    dirs, v_launch, phase = draw_launches(n_orbits, seed, "sphere", proposal)
    t_flight = phase * t_max

    phi_min = _sphere_min_potential(g, r_min_store) if r_min_store > 0 else -math.inf
    energy = 0.5 * v_launch ** 2 + g.potential(r0 * dirs)
    active = energy + prune_margin >= phi_min

    status = np.full(n_orbits, STATUS_PRUNED, dtype=np.int8)
    e_err = np.zeros(n_orbits, dtype=np.float32)
    n_samp = np.zeros(n_orbits, dtype=np.int32)
    keep_all = np.zeros(n_orbits, dtype=bool)
    pos = np.zeros((n_orbits, 3))
    vel = np.zeros((n_orbits, 3))
    idx_active = np.flatnonzero(active)
    for start in range(0, idx_active.size, int(chunk)):
        idx = idx_active[start:start + int(chunk)]
        res = integrate_lmc(g, track, r0 * dirs[idx], v_launch[idx, None] * dirs[idx], -t_flight[idx], 0.0,
                            r_stop=r_max, rtol=rtol, atol=atol, max_steps=max_steps, on_failure="ignore")
        status[idx] = res.status
        e_err[idx] = res.energy_error
        r = np.linalg.norm(res.pos, axis=1)
        # an orbit stopped at r_max ends before the present: the star is beyond r_max now
        reached_present = np.abs(res.t_final) <= 1e-9 * max(t_max, 1.0)
        with np.errstate(invalid="ignore"):
            keep = res.ok & reached_present & np.isfinite(r) & (r >= r_min_store) & (r <= r_max)
        keep_all[idx] = keep
        pos[idx], vel[idx] = res.pos, res.vel
        if progress is not None:
            progress(min(start + int(chunk), idx_active.size), idx_active.size)
    n_samp[keep_all] = 1
    stored = np.flatnonzero(keep_all)
    n_failed = int(np.sum(status > 1))
    info = {
        "swerve_version": __version__,
        "build_seconds": time.perf_counter() - t_start,
        "n_flight_times": 1,
        "n_pruned": int(np.sum(~active)),
        "n_failed": n_failed,
        "reach_speed": reach_speed(g, r0, r_min_store) if r_min_store > 0 else 0.0,
        "stored_dtype": "float32",
        "forward_model": "lmc-one-star-per-orbit",
        "lmc": {"params": lmc.to_dict(),
                "friction": bool(friction), "reflex": bool(reflex)},
        "prune_margin": prune_margin,
    }
    if n_failed:
        info["failures"] = {status_names.get(int(c), str(c)): int(np.sum(status == c))
                            for c in np.unique(status[status > 1])}
    return TrajectoryBank(
        galaxy=g.to_dict(), proposal=proposal, seed=int(seed), directions="sphere", r0=r0,
        dt=t_max, t_max=t_max, r_min_store=r_min_store, r_max=r_max, r_stop=r_max,
        rtol=float(rtol), atol=float(atol), v_launch=v_launch, direction=dirs.astype(np.float32),
        phase=phase.astype(np.float32), status=status, energy_error=e_err, n_samples=n_samp,
        info=info, pos=pos[stored].astype(np.float32), vel=vel[stored].astype(np.float32),
        orbit=stored.astype(np.int32), t_flight=t_flight[stored].astype(np.float32))
