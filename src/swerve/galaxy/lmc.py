"""The Large Magellanic Cloud: a moving extended mass, its present state and its past orbit.

The LMC is a Hernquist (1990) sphere of mass ``m_lmc`` and scale radius ``a_lmc`` that moves
on its own orbit about the Milky Way.  This module holds

* its parameters, declared once (:data:`LMC_PARAMETERS`, :class:`~swerve.galaxy.params.Parameter`):
  the mass, the measurements that fix its scale radius, and its measured present position and
  velocity, each with its source;
* :class:`LMC`: one set of values, with the scale radius from the rule below and its present
  Galactocentric state (:meth:`LMC.present_state`, through :func:`swerve.frames.helio_to_galacto`);
* :func:`lmc_orbit`: its past orbit, integrated backward with dynamical friction and with the
  Milky Way's reflex, tabulated on a time grid (:class:`LMCTrack`) for the time-dependent orbit
  engine :mod:`swerve.orbits_lmc`;
* :func:`lmc_summary`: parameters, present state and past orbit beside published values.

Physics
-------
* **Profile and scale radius.**  ``Phi_L(d) = -G m_lmc / (|d| + a_lmc)``.  The scale radius
  follows the rule of Erkal et al. (2019, MNRAS 487, 2685; from memory): the Hernquist sphere
  encloses the mass measured from the LMC's rotation curve, ``v_c = 91.7 km/s`` at 8.7 kpc (van
  der Marel & Kallivayalil 2014, ApJ 781, 121; from memory), i.e.
  ``M(<r) = m_lmc r^2 / (r + a)^2 = r v_c^2 / G``, so ``a = r (sqrt(m_lmc / M(<r)) - 1)``
  (16.1 kpc for 1.38e11 Msun).  Below ``M(<r)`` (1.70e10 Msun) the rule has no solution and
  the scale radius is held at its floor :data:`A_LMC_FLOOR` (a choice, stated here); an explicit
  ``a_lmc`` overrides the rule.
* **Present state.**  Centre, distance, proper motion and line-of-sight velocity of
  :data:`LMC_PARAMETERS` converted with astropy's Galactocentric frame under swerve's solar
  parameters (:mod:`swerve.frames`).
* **Two-body orbit with the reflex.**  The Milky Way is *rigid*: its whole mass distribution
  moves with its centre, which is accelerated by the LMC's pull at the centre,
  ``A_0 = -grad Phi_L(x_MW - x_L)``; the LMC feels the static Galaxy's force about the moving
  centre plus dynamical friction.  Both are integrated together in an inertial frame in which
  the Galactic Centre is at rest at the origin today (scipy DOP853, rtol 1e-12).
* **Dynamical friction** (Chandrasekhar; Binney & Tremaine 2008, eq. 8.13):
  ``a_df = -4 pi G^2 m_lmc rho ln(Lambda) / V^2 [erf(X) - 2X/sqrt(pi) exp(-X^2)] V_hat``,
  ``X = V / (sqrt(2) sigma)``, with ``V`` the LMC's velocity relative to the Galactic Centre,
  ``rho`` the Galaxy's density at the LMC (clipped at 0), ``sigma(r)`` the one-dimensional
  dispersion of the isotropic Jeans equation (Binney & Tremaine 2008, eq. 4.216) for the
  Galaxy's angle-averaged density in its angle-averaged radial force, and the Coulomb
  logarithm ``ln Lambda = max(0, alpha ln(r / (C a_lmc)))`` with ``C = 1.22``, ``alpha = 1``
  (van der Marel et al. 2012, ApJ 753, 9, as used by Jethwa, Erkal & Belokurov 2016, MNRAS
  461, 2212; from memory).
* **Track.**  On a uniform grid of times (Myr, from ``t_min`` to 0) :class:`LMCTrack` holds the
  LMC's position, velocity and acceleration relative to the Galactic Centre (for a quintic
  Hermite interpolant), and the Galactic Centre's acceleration and velocity in the inertial
  frame.  In the Galactic Centre's (non-inertial) frame a star then feels
  ``a_MW(x) - grad Phi_L(x - X(t)) - A_0(t)``, which :mod:`swerve.orbits_lmc` integrates.

Units: kpc, km/s, Msun, Myr (times before the present are negative).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import integrate as sp_integrate
from scipy import optimize

from .. import units
from ..frames import helio_to_galacto, resolve_solar
from .params import Parameter

__all__ = [
    "A_LMC_FLOOR",
    "COULOMB_ALPHA",
    "COULOMB_C",
    "LMC",
    "LMCTrack",
    "LMC_PARAMETERS",
    "PUBLISHED_ORBIT",
    "coulomb_logarithm",
    "friction_acceleration",
    "hernquist_acceleration",
    "hernquist_potential",
    "jeans_dispersion_table",
    "lmc_orbit",
    "lmc_summary",
    "scale_radius_from_rotation",
]

#: The LMC's declared parameters: the mass (inferred later), the rotation measurement that fixes
#: its scale radius, and its measured present position and velocity.
LMC_PARAMETERS: dict[str, Parameter] = {p.name: p for p in (
    Parameter("m_lmc", "Msun", 1.38e11, 0.0, 2.5e11, "LMC total mass (Hernquist sphere)",
              "Erkal et al. 2019, MNRAS 487, 2685 (Orphan stream: 1.38 +0.27/-0.24 e11 Msun)",
              kind="mass"),
    Parameter("r_rot_lmc", "kpc", 8.7, 0.0, 100.0, "radius of the LMC's measured circular velocity",
              "van der Marel & Kallivayalil 2014, ApJ 781, 121 (from memory)", low_open=True,
              kind="length"),
    Parameter("v_rot_lmc", "km / s", 91.7, 0.0, 500.0, "LMC circular velocity at r_rot_lmc",
              "van der Marel & Kallivayalil 2014, ApJ 781, 121 (from memory; +/- 18.8 km/s)",
              low_open=True, kind="velocity"),
    Parameter("ra_lmc", "deg", 78.76, 0.0, 360.0, "ICRS right ascension of the LMC's centre",
              "Kallivayalil et al. 2013, ApJ 764, 161 (from memory)", kind="angle"),
    Parameter("dec_lmc", "deg", -69.19, -90.0, 90.0, "ICRS declination of the LMC's centre",
              "Kallivayalil et al. 2013, ApJ 764, 161 (from memory)", kind="angle"),
    Parameter("d_lmc", "kpc", 49.59, 0.0, 1000.0, "heliocentric distance of the LMC",
              "Pietrzynski et al. 2019, Nature 567, 200 (49.59 +/- 0.09 stat +/- 0.54 sys kpc)",
              low_open=True, kind="length"),
    Parameter("pmra_lmc", "mas / yr", 1.910, -100.0, 100.0,
              "LMC proper motion in right ascension (including cos dec)",
              "Kallivayalil et al. 2013, ApJ 764, 161 (mu_W = -1.910 +/- 0.020 mas/yr; from memory)"),
    Parameter("pmdec_lmc", "mas / yr", 0.229, -100.0, 100.0, "LMC proper motion in declination",
              "Kallivayalil et al. 2013, ApJ 764, 161 (mu_N = 0.229 +/- 0.047 mas/yr; from memory)"),
    Parameter("vlos_lmc", "km / s", 262.2, -1000.0, 1000.0, "LMC heliocentric line-of-sight velocity",
              "van der Marel et al. 2002, AJ 124, 2639 (262.2 +/- 3.4 km/s; from memory)",
              kind="velocity"),
)}

#: Floor of the scale radius where the rotation rule has no solution (m_lmc <= M(<r_rot)), kpc.
#: A choice of this module, not a measurement; it matters only for LMC masses below 1.7e10 Msun.
A_LMC_FLOOR = 1.0
#: Coulomb logarithm ln(Lambda) = max(0, alpha ln(r / (C a))): van der Marel et al. 2012, ApJ 753,
#: 9, as used by Jethwa, Erkal & Belokurov 2016, MNRAS 461, 2212 (from memory).
COULOMB_C = 1.22
COULOMB_ALPHA = 1.0

#: Published values of the LMC's past orbit, for comparison (from memory; loose).
PUBLISHED_ORBIT = {
    "r_peri_kpc": (48.0, "recent pericentre ~48 kpc (Besla et al. 2007, ApJ 668, 949; Kallivayalil "
                         "et al. 2013, ApJ 764, 161; from memory)"),
    "t_peri_myr": (-40.0, "pericentre some 30-50 Myr ago (Besla et al. 2007; Kallivayalil et al. "
                          "2013; from memory)"),
    "reflex_kms": (32.0, "Milky Way reflex toward the LMC 32 +/- 4 km/s at 40-120 kpc (Petersen & "
                         "Penarrubia 2021, Nature Astronomy 5, 251); ~40 km/s at ~100 kpc (Chandra "
                         "et al. 2024, ApJ)"),
}


def scale_radius_from_rotation(m_lmc, r_rot=None, v_rot=None) -> float:
    """Hernquist scale radius (kpc) whose sphere of mass ``m_lmc`` (Msun) encloses
    ``r_rot v_rot^2 / G`` inside ``r_rot`` (module docstring); :data:`A_LMC_FLOOR` where
    ``m_lmc`` is not above that enclosed mass."""
    m = LMC_PARAMETERS["m_lmc"].validate(m_lmc)
    r = LMC_PARAMETERS["r_rot_lmc"].validate(LMC_PARAMETERS["r_rot_lmc"].default if r_rot is None else r_rot)
    v = LMC_PARAMETERS["v_rot_lmc"].validate(LMC_PARAMETERS["v_rot_lmc"].default if v_rot is None else v_rot)
    m_enc = r * v * v / units.G
    if m <= m_enc:
        return A_LMC_FLOOR
    return max(r * (math.sqrt(m / m_enc) - 1.0), A_LMC_FLOOR)


@dataclass(frozen=True)
class LMC:
    """One set of LMC values: mass, scale radius and measured present position and velocity.

    Parameters
    ----------
    m_lmc : float or Quantity ['mass']
        Total mass, Msun (default and range in :data:`LMC_PARAMETERS`).
    a_lmc : float or Quantity ['length'], optional
        Hernquist scale radius, kpc; default from :func:`scale_radius_from_rotation`.
    ra_lmc, dec_lmc, d_lmc, pmra_lmc, pmdec_lmc, vlos_lmc : float, optional
        Present centre (deg), distance (kpc), proper motion (mas/yr, ``pmra`` with cos dec)
        and line-of-sight velocity (km/s); defaults in :data:`LMC_PARAMETERS`.

    Examples
    --------
    >>> lmc = LMC()
    >>> round(lmc.a_lmc, 2)  # kpc, from v_c = 91.7 km/s at 8.7 kpc
    16.08
    """

    m_lmc: float = LMC_PARAMETERS["m_lmc"].default
    a_lmc: float | None = None
    ra_lmc: float = LMC_PARAMETERS["ra_lmc"].default
    dec_lmc: float = LMC_PARAMETERS["dec_lmc"].default
    d_lmc: float = LMC_PARAMETERS["d_lmc"].default
    pmra_lmc: float = LMC_PARAMETERS["pmra_lmc"].default
    pmdec_lmc: float = LMC_PARAMETERS["pmdec_lmc"].default
    vlos_lmc: float = LMC_PARAMETERS["vlos_lmc"].default

    def __post_init__(self):
        kinds = {"m_lmc": "mass", "d_lmc": "length", "vlos_lmc": "velocity",
                 "ra_lmc": "angle", "dec_lmc": "angle"}
        for name in ("m_lmc", "ra_lmc", "dec_lmc", "d_lmc", "pmra_lmc", "pmdec_lmc", "vlos_lmc"):
            value = getattr(self, name)
            if name in kinds:
                value = units.to_internal(value, kinds[name], name)
            elif hasattr(value, "unit"):
                value = value.to_value("mas / yr")
            object.__setattr__(self, name, LMC_PARAMETERS[name].validate(value))
        if self.a_lmc is None:
            object.__setattr__(self, "a_lmc", scale_radius_from_rotation(self.m_lmc))
        else:
            a = units.to_internal(self.a_lmc, "length", "a_lmc")
            object.__setattr__(self, "a_lmc", units.positive_float("a_lmc", a, "kpc"))

    @property
    def gm(self) -> float:
        """G m_lmc in kpc (km/s)^2."""
        return units.G * self.m_lmc

    def present_state(self, solar=None) -> tuple[np.ndarray, np.ndarray]:
        """Present Galactocentric position (kpc) and velocity (km/s) of the LMC's centre, each of
        shape (3,), under the solar parameters ``solar`` (default :data:`swerve.frames.DEFAULT_SOLAR`)."""
        pos, vel = helio_to_galacto(self.ra_lmc, self.dec_lmc, self.d_lmc, self.pmra_lmc,
                                    self.pmdec_lmc, self.vlos_lmc, solar=solar)
        return pos[0], vel[0]

    def to_dict(self) -> dict:
        return {name: getattr(self, name) for name in (
            "m_lmc", "a_lmc", "ra_lmc", "dec_lmc", "d_lmc", "pmra_lmc", "pmdec_lmc", "vlos_lmc")}


# --------------------------------------------------------------------------------------------
# forces
def hernquist_acceleration(d, gm, a) -> np.ndarray:
    """Acceleration (km/s)^2/kpc of a Hernquist sphere (``gm`` = G M, scale ``a``) at offsets
    ``d`` (..., 3) kpc from its centre: ``-G M d / (|d| (|d| + a)^2)``."""
    d = np.asarray(d, dtype=float)
    r = np.linalg.norm(d, axis=-1, keepdims=True)
    with np.errstate(invalid="ignore", divide="ignore"):
        f = np.where(r > 0, -gm / (np.where(r > 0, r, 1.0) * (r + a) ** 2), 0.0)
    return f * d


def hernquist_potential(d, gm, a) -> np.ndarray:
    """Potential (km/s)^2 of a Hernquist sphere at offsets ``d`` (..., 3) kpc: ``-G M / (|d| + a)``."""
    return -gm / (np.linalg.norm(np.asarray(d, dtype=float), axis=-1) + a)


def coulomb_logarithm(r, a_lmc, c=COULOMB_C, alpha=COULOMB_ALPHA):
    """``max(0, alpha ln(r / (c a_lmc)))`` (:data:`COULOMB_C`, :data:`COULOMB_ALPHA`)."""
    r = np.asarray(r, dtype=float)
    with np.errstate(divide="ignore"):
        return np.maximum(0.0, alpha * np.log(np.maximum(r, 1e-300) / (c * a_lmc)))


def _fibonacci_directions(n: int) -> np.ndarray:
    """``n`` nearly uniform unit vectors (Fibonacci lattice), shape (n, 3)."""
    i = np.arange(n) + 0.5
    z = 1.0 - 2.0 * i / n
    phi = math.pi * (1.0 + math.sqrt(5.0)) * i
    s = np.sqrt(1.0 - z * z)
    return np.stack([s * np.cos(phi), s * np.sin(phi), z], axis=1)


def jeans_dispersion_table(galaxy, r_min=0.1, r_max=1.0e4, n_r=400, n_dir=64):
    """Angle-averaged density and isotropic Jeans dispersion of a Galaxy on a log grid.

    ``sigma^2(r) = (1 / rho(r)) int_r^inf rho(r') g(r') dr'`` (Binney & Tremaine 2008,
    eq. 4.216 with beta = 0), with ``rho`` the Galaxy's density and ``g = -a . r_hat`` its
    radial force, both averaged over ``n_dir`` directions (density clipped at 0).

    Returns
    -------
    r, rho, sigma : arrays (n_r,)
        Radius (kpc), density (Msun/kpc^3), one-dimensional dispersion (km/s).
    """
    r = np.geomspace(r_min, r_max, n_r)
    dirs = _fibonacci_directions(n_dir)
    pts = (r[:, None, None] * dirs[None, :, :]).reshape(-1, 3)
    rho = np.maximum(galaxy.density(pts), 0.0).reshape(n_r, n_dir).mean(axis=1)
    acc = galaxy.acceleration(pts).reshape(n_r, n_dir, 3)
    g = -np.einsum("ijk,jk->ij", acc, dirs).mean(axis=1)
    integrand = rho * g * r  # d r' = r' d ln r'
    lnr = np.log(r)
    # cumulative integral from r to r_max (the tail beyond 1e4 kpc is negligible)
    seg = 0.5 * (integrand[1:] + integrand[:-1]) * np.diff(lnr)
    tail = np.concatenate([np.cumsum(seg[::-1])[::-1], [0.0]])
    with np.errstate(invalid="ignore", divide="ignore"):
        sigma = np.sqrt(np.where(rho > 0, tail / np.where(rho > 0, rho, 1.0), 0.0))
    return r, rho, sigma


def friction_acceleration(pos, vel, galaxy_density, sigma_of_r, gm_lmc, a_lmc,
                          c=COULOMB_C, alpha=COULOMB_ALPHA) -> np.ndarray:
    """Chandrasekhar dynamical friction (Binney & Tremaine 2008, eq. 8.13) on the LMC.

    Parameters
    ----------
    pos, vel : arrays (3,)
        The LMC's position (kpc) and velocity (km/s) relative to the Galactic Centre.
    galaxy_density : callable
        ``rho(pos (1, 3)) -> (1,)`` in Msun/kpc^3 (clipped at 0 here).
    sigma_of_r : callable
        One-dimensional velocity dispersion (km/s) at radius r (kpc).
    gm_lmc, a_lmc : float
        G m_lmc (kpc (km/s)^2) and scale radius (kpc).

    Returns
    -------
    array (3,)
        (km/s)^2 / kpc, antiparallel to ``vel``.
    """
    v = float(np.linalg.norm(vel))
    if v == 0.0 or gm_lmc == 0.0:
        return np.zeros(3)
    r = float(np.linalg.norm(pos))
    rho = max(float(galaxy_density(np.asarray(pos, dtype=float).reshape(1, 3))[0]), 0.0)
    lnl = float(coulomb_logarithm(r, a_lmc, c, alpha))
    if rho == 0.0 or lnl == 0.0:
        return np.zeros(3)
    sigma = float(sigma_of_r(r))
    x = v / (math.sqrt(2.0) * sigma) if sigma > 0 else math.inf
    factor = 1.0 if not math.isfinite(x) else (math.erf(x) - 2.0 * x / math.sqrt(math.pi) * math.exp(-x * x))
    # G^2 M rho = (G M) (G rho): G rho in (km/s)^2 / kpc^2
    mag = 4.0 * math.pi * gm_lmc * units.G * rho * lnl * factor / (v * v)
    return -mag * np.asarray(vel, dtype=float) / v


# --------------------------------------------------------------------------------------------
# the past orbit
@dataclass
class LMCTrack:
    """The LMC's past orbit relative to the Galactic Centre, tabulated on a uniform time grid.

    Attributes
    ----------
    t : array (n,)
        Times, Myr, increasing from ``t[0] < 0`` to ``t[-1] = 0`` (the present), uniform step.
    pos, vel, acc : arrays (n, 3)
        LMC position (kpc), velocity (km/s) and acceleration ((km/s)^2/kpc) relative to the
        Galactic Centre (the non-inertial frame of the orbit engine).
    gc_acc : array (n, 3)
        Acceleration of the Galactic Centre in the inertial frame ((km/s)^2/kpc): the LMC's pull
        on it (zero without the reflex).
    gc_vel : array (n, 3)
        Velocity of the Galactic Centre in the inertial frame in which it is at rest today, km/s.
    lmc : LMC
    friction, reflex : bool
        Whether dynamical friction and the reflex were included.
    galaxy : dict
        The static Galaxy (``Galaxy.to_dict()``).
    solar : dict
        The solar parameters of the present state.
    """

    t: np.ndarray
    pos: np.ndarray
    vel: np.ndarray
    acc: np.ndarray
    gc_acc: np.ndarray
    gc_vel: np.ndarray
    lmc: LMC
    friction: bool
    reflex: bool
    galaxy: dict
    solar: dict

    @property
    def dt(self) -> float:
        """Grid step, Myr."""
        return float(self.t[1] - self.t[0])

    @property
    def t_min(self) -> float:
        """Earliest tabulated time, Myr."""
        return float(self.t[0])

    def interpolate(self, t) -> tuple[np.ndarray, np.ndarray]:
        """LMC position (kpc) and velocity (km/s) relative to the Galactic Centre at times ``t``
        (Myr, within the grid), from the same quintic Hermite interpolant as the orbit engine;
        shapes (..., 3)."""
        t = np.asarray(t, dtype=float)
        if np.any(~np.isfinite(t)) or np.any(t < self.t[0] - 1e-9) or np.any(t > self.t[-1] + 1e-9):
            raise ValueError(f"t: expected times within the LMC track [{self.t[0]:g}, {self.t[-1]:g}] Myr")
        h = self.dt
        i = np.clip(np.floor((t - self.t[0]) / h).astype(int), 0, len(self.t) - 2)
        th = ((t - self.t[i]) / h)[..., None]
        hi = units.myr_to_internal(h)
        p0, p1 = self.pos[i], self.pos[i + 1]
        d0, d1 = self.vel[i] * hi, self.vel[i + 1] * hi
        s0, s1 = self.acc[i] * hi * hi, self.acc[i + 1] * hi * hi
        t2, t3 = th * th, th * th * th
        t4, t5 = t3 * th, t3 * t2
        pos = ((1 - 10 * t3 + 15 * t4 - 6 * t5) * p0 + (th - 6 * t3 + 8 * t4 - 3 * t5) * d0
               + 0.5 * (t2 - 3 * t3 + 3 * t4 - t5) * s0 + (10 * t3 - 15 * t4 + 6 * t5) * p1
               + (-4 * t3 + 7 * t4 - 3 * t5) * d1 + 0.5 * (t3 - 2 * t4 + t5) * s1)
        dpos = ((-30 * t2 + 60 * t3 - 30 * t4) * p0 + (1 - 18 * t2 + 32 * t3 - 15 * t4) * d0
                + 0.5 * (2 * th - 9 * t2 + 12 * t3 - 5 * t4) * s0 + (30 * t2 - 60 * t3 + 30 * t4) * p1
                + (-12 * t2 + 28 * t3 - 15 * t4) * d1 + 0.5 * (3 * t2 - 8 * t3 + 5 * t4) * s1)
        return pos, dpos / hi

    def pericentre(self) -> dict:
        """The most recent pericentre of the LMC about the Galactic Centre: ``r_peri`` (kpc) and
        ``t_peri`` (Myr), located on the interpolant; ``None`` values when the distance has no
        local minimum on the grid (e.g. a track too short)."""
        rdot = np.einsum("ij,ij->i", self.pos, self.vel)
        # local minima: rdot changes sign from negative to positive (forward in time)
        idx = np.flatnonzero((rdot[:-1] < 0) & (rdot[1:] >= 0))
        if len(idx) == 0:
            return {"r_peri": None, "t_peri": None}
        i = int(idx[-1])

        def g(t):
            p, v = self.interpolate(t)
            return float(np.dot(p, v))

        tp = optimize.brentq(g, self.t[i], self.t[i + 1], xtol=1e-10)
        p, _ = self.interpolate(tp)
        return {"r_peri": float(np.linalg.norm(p)), "t_peri": float(tp)}

    def kernel_args(self) -> tuple[np.ndarray, np.ndarray]:
        """``(table, params)`` for :mod:`swerve.orbits_lmc`: table (n, 9) of position, velocity
        and acceleration relative to the Galactic Centre, params ``[t0, dt, G m_lmc, a_lmc,
        reflex]`` with times in the internal unit kpc/(km/s)."""
        table = np.ascontiguousarray(np.concatenate([self.pos, self.vel, self.acc], axis=1))
        params = np.array([float(units.myr_to_internal(self.t[0])), float(units.myr_to_internal(self.dt)),
                           self.lmc.gm, self.lmc.a_lmc, 1.0 if self.reflex else 0.0])
        return table, params

    def to_dict(self) -> dict:
        """JSON-safe provenance (no arrays)."""
        return {"lmc": self.lmc.to_dict(), "t_min_myr": self.t_min, "dt_myr": self.dt,
                "friction": self.friction, "reflex": self.reflex, "galaxy": self.galaxy,
                "solar": self.solar,
                "coulomb_logarithm": f"max(0, {COULOMB_ALPHA:g} ln(r / ({COULOMB_C:g} a_lmc)))"}


def lmc_orbit(galaxy, lmc: LMC | None = None, *, t_min=-3000.0, dt=1.0, friction=True, reflex=True,
              solar=None, rtol=1e-12) -> LMCTrack:
    """Integrate the LMC's orbit backward from its present state and tabulate it.

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
        The static Milky Way (rigid; it moves with its centre when ``reflex``).
    lmc : LMC, optional
        Default ``LMC()`` (the declared defaults).
    t_min : float or Quantity ['time']
        Earliest time, Myr (negative).
    dt : float or Quantity ['time']
        Grid step of the track, Myr (``-t_min`` is rounded up to a whole number of steps).
    friction, reflex : bool
        Include dynamical friction, the Galactic Centre's reflex.
    solar : None, str, dict or SolarParameters
        Solar parameters of the present state (:func:`swerve.frames.resolve_solar`).
    rtol : float
        Relative tolerance of scipy's DOP853 (absolute tolerance ``rtol`` times 1e-3 kpc or km/s).

    Returns
    -------
    LMCTrack
    """
    lmc = LMC() if lmc is None else lmc
    if not isinstance(lmc, LMC):
        raise ValueError(f"lmc: expected a swerve.galaxy.lmc.LMC, got {type(lmc).__name__}")
    t_min = float(units.to_internal(t_min, "time", "t_min"))
    dt = float(units.to_internal(dt, "time", "dt"))
    if not (math.isfinite(t_min) and t_min < 0):
        raise ValueError(f"t_min: expected a negative time in Myr, got {t_min!r}")
    if not (math.isfinite(dt) and 0 < dt <= -t_min):
        raise ValueError(f"dt: expected a positive step in Myr no longer than -t_min, got {dt!r}")
    n_steps = int(math.ceil(-t_min / dt - 1e-9))
    t_grid = -dt * np.arange(n_steps, -1, -1, dtype=float)
    solar_p = resolve_solar(solar)
    x0, v0 = lmc.present_state(solar_p)
    gm, a = lmc.gm, lmc.a_lmc

    r_tab, _, sig_tab = jeans_dispersion_table(galaxy)
    lnr_tab = np.log(r_tab)

    def sigma_of_r(r):
        return float(np.interp(math.log(max(r, r_tab[0])), lnr_tab, sig_tab))

    def accelerations(y):
        xm, vm, xl, vl = y[0:3], y[3:6], y[6:9], y[9:12]
        rel = xl - xm
        rel_v = vl - vm
        a_l = galaxy.acceleration(rel.reshape(1, 3))[0]
        if friction:
            a_l = a_l + friction_acceleration(rel, rel_v, galaxy.density, sigma_of_r, gm, a)
        a_m = hernquist_acceleration(-rel, gm, a) if reflex else np.zeros(3)
        return a_m, a_l

    def rhs(_t, y):
        a_m, a_l = accelerations(y)
        return np.concatenate([y[3:6], a_m, y[9:12], a_l])

    y0 = np.concatenate([np.zeros(3), np.zeros(3), x0, v0])
    t_end = float(units.myr_to_internal(t_grid[0]))
    sol = sp_integrate.solve_ivp(rhs, (0.0, t_end), y0, method="DOP853", rtol=rtol,
                                 atol=rtol * 1e-3, dense_output=True)
    if not sol.success:
        raise ValueError(f"lmc_orbit: the LMC's orbit could not be integrated ({sol.message})")
    ys = sol.sol(units.myr_to_internal(t_grid)).T
    acc_m = np.empty((len(t_grid), 3))
    acc_l = np.empty((len(t_grid), 3))
    for j, y in enumerate(ys):
        acc_m[j], acc_l[j] = accelerations(y)
    return LMCTrack(
        t=t_grid, pos=ys[:, 6:9] - ys[:, 0:3], vel=ys[:, 9:12] - ys[:, 3:6], acc=acc_l - acc_m,
        gc_acc=acc_m, gc_vel=ys[:, 3:6], lmc=lmc, friction=bool(friction), reflex=bool(reflex),
        galaxy=galaxy.to_dict(), solar=solar_p.to_dict(),
    )


def lmc_summary(galaxy, lmc: LMC | None = None, track: LMCTrack | None = None, *, solar=None,
                t_min=-3000.0) -> dict:
    """The LMC's parameters with their sources, its present state and past orbit, beside
    published values (for ``swerve galaxy``).

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
    lmc : LMC, optional
        Default ``LMC()``.
    track : LMCTrack, optional
        A track already made for ``galaxy`` and ``lmc``; made here (:func:`lmc_orbit`) if None.
    solar : optional
        Solar parameters (:func:`swerve.frames.resolve_solar`).
    t_min : float
        Earliest time of the track made here, Myr.

    Returns
    -------
    dict
        ``parameters``: name -> {value, unit, doc, source, range}; ``scale_radius_rule``;
        ``present``: position (kpc), velocity (km/s), r (kpc), radial and tangential speed
        (km/s); ``orbit``: most recent pericentre (kpc, Myr), the Galactic Centre's velocity
        gained since 500 Myr ago and since ``t_min`` (km/s), friction/reflex flags;
        ``published``: the values of :data:`PUBLISHED_ORBIT`.
    """
    lmc = LMC() if lmc is None else lmc
    if track is None:
        track = lmc_orbit(galaxy, lmc, solar=solar, t_min=t_min)
    params = {}
    for name, p in LMC_PARAMETERS.items():
        value = getattr(lmc, name, p.default)
        params[name] = {"value": float(value), "unit": p.unit, "doc": p.doc, "source": p.source,
                        "range": p.describe_range()}
    params["a_lmc"] = {"value": lmc.a_lmc, "unit": "kpc", "doc": "Hernquist scale radius",
                       "source": "rule of Erkal et al. 2019 (from memory): the sphere encloses "
                                 "r_rot_lmc v_rot_lmc^2 / G inside r_rot_lmc", "range": "(0, inf) kpc"}
    pos, vel = track.pos[-1], track.vel[-1]
    r = float(np.linalg.norm(pos))
    v_r = float(np.dot(pos, vel) / r)
    v_t = float(math.sqrt(max(float(np.dot(vel, vel)) - v_r * v_r, 0.0)))
    peri = track.pericentre()
    i500 = int(np.argmin(np.abs(track.t + 500.0)))
    return {
        "parameters": params,
        "present": {"pos_kpc": pos.tolist(), "vel_kms": vel.tolist(), "r_kpc": r,
                    "v_r_kms": v_r, "v_t_kms": v_t, "speed_kms": float(np.linalg.norm(vel))},
        "orbit": {
            "r_peri_kpc": peri["r_peri"], "t_peri_myr": peri["t_peri"],
            "gc_speed_gained_since_500myr_kms": float(np.linalg.norm(track.gc_vel[-1] - track.gc_vel[i500])),
            "gc_speed_gained_since_t_min_kms": float(np.linalg.norm(track.gc_vel[-1] - track.gc_vel[0])),
            "r_at_t_min_kpc": float(np.linalg.norm(track.pos[0])),
            "t_min_myr": track.t_min, "friction": track.friction, "reflex": track.reflex,
        },
        "published": {k: {"value": v, "source": s} for k, (v, s) in PUBLISHED_ORBIT.items()},
        "track": track.to_dict(),
    }
