"""Reference frames: heliocentric ICRS <-> Galactocentric, and galactocentric spherical components.

swerve uses astropy's Galactocentric convention: the Galactic Centre at the origin, the Sun at
negative x, z toward the north Galactic pole. The solar parameters (distance to the Galactic
Centre, solar velocity, height above the plane, roll) come from a named, recorded parameter set,
:class:`SolarParameters`, by default astropy's ``"v4.0"``; every output records the resolved
values through :meth:`SolarParameters.to_dict`.

Fast path
---------
The ICRS -> Galactocentric transform is affine: ``pos_gc = R @ x_icrs + t`` and
``vel_gc = R @ v_icrs + w``. For each :class:`SolarParameters` the matrix ``R``, the translation
``t`` and the velocity offset ``w`` are derived once (cached) by pushing six basis points through
astropy's own transform, then applied with numpy. A million stars take well under a second and
agree with astropy's ``SkyCoord.transform_to`` to about 1e-14 relative.

Units (plain floats): angles in deg, distances in kpc, proper motions in mas/yr (``pmra``
includes the ``cos(dec)`` factor), velocities in km/s, parallax in mas. astropy Quantities are
accepted at these public functions and converted.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass, field
from functools import lru_cache

import numpy as np
from astropy import units as u
from astropy.coordinates import (
    ICRS,
    CartesianDifferential,
    CartesianRepresentation,
    Galactic,
    Galactocentric,
    galactocentric_frame_defaults,
)

from .units import to_internal

__all__ = [
    "DEFAULT_SOLAR",
    "SolarParameters",
    "resolve_solar",
    "known_solar_names",
    "affine_map",
    "helio_to_galacto",
    "galacto_to_helio",
    "spherical_components",
    "folded_v_theta",
    "galactic_coordinates",
    "galactic_latitude",
    "PM_KMS_PER_KPC_MASYR",
]

#: Name of the default solar-parameter set (astropy's Galactocentric defaults "v4.0").
DEFAULT_SOLAR = "v4.0"

#: 1 mas/yr at 1 kpc in km/s (about 4.74047), from astropy units (Julian year).
PM_KMS_PER_KPC_MASYR = float(
    (1.0 * u.mas / u.yr * u.kpc).to_value(u.km / u.s, equivalencies=u.dimensionless_angles())
)

#: Names astropy has registered, used when its registry cannot be listed (see known_solar_names).
_FALLBACK_NAMES = ("pre-v4.0", "v4.0")


def known_solar_names() -> tuple[str, ...]:
    """Names of the solar-parameter sets astropy knows (``galactocentric_frame_defaults``).

    astropy offers no public listing, so this reads its registry when present and falls back to
    the names known at astropy 8 (``"pre-v4.0"``, ``"v4.0"``). ``"latest"`` is deliberately not
    accepted: outputs must record a resolved version.
    """
    registry = getattr(galactocentric_frame_defaults, "_registry", None)
    if isinstance(registry, dict) and registry:
        return tuple(sorted(str(k) for k in registry))
    return _FALLBACK_NAMES


@dataclass(frozen=True)
class SolarParameters:
    """A named set of solar parameters for the Galactocentric frame.

    Parameters
    ----------
    name : str
        The set's name: an astropy parameter-set name (``"v4.0"``, ``"pre-v4.0"``) or
        ``"custom"`` (or any label the user chose) for explicit values.
    galcen_distance_kpc : float
        Sun -- Galactic Centre distance, kpc.
    galcen_v_sun_kms : tuple of 3 floats
        Velocity of the Sun in the Galactocentric frame (x, y, z), km/s.
    z_sun_kpc : float
        Height of the Sun above the Galactic midplane, kpc.
    roll_deg : float
        Roll angle of the frame about the Sun -- Galactic Centre line, deg.
    galcen_ra_deg, galcen_dec_deg : float
        ICRS position of the Galactic Centre, deg (astropy's defaults, Reid & Brunthaler 2004).
    """

    name: str
    galcen_distance_kpc: float
    galcen_v_sun_kms: tuple[float, float, float]
    z_sun_kpc: float
    roll_deg: float = 0.0
    galcen_ra_deg: float = 266.4051
    galcen_dec_deg: float = -28.936175
    references: dict | None = field(default=None, compare=False, hash=False)

    def __post_init__(self):
        if not isinstance(self.name, str) or not self.name:
            raise ValueError(f"SolarParameters name: expected a non-empty string, got {self.name!r}")
        for key in ("galcen_distance_kpc", "z_sun_kpc", "roll_deg", "galcen_ra_deg", "galcen_dec_deg"):
            value = getattr(self, key)
            try:
                v = float(value)
            except (TypeError, ValueError):
                raise ValueError(f"SolarParameters {key}: expected a number, got {value!r}") from None
            if not math.isfinite(v):
                raise ValueError(f"SolarParameters {key}: expected a finite number, got {v!r}")
            object.__setattr__(self, key, v)
        if not self.galcen_distance_kpc > 0:
            raise ValueError(
                f"SolarParameters galcen_distance_kpc: expected > 0 kpc, got {self.galcen_distance_kpc!r}"
            )
        if not -90.0 <= self.galcen_dec_deg <= 90.0:
            raise ValueError(
                f"SolarParameters galcen_dec_deg: expected a value in [-90, 90] deg, got {self.galcen_dec_deg!r}"
            )
        try:
            vsun = tuple(float(x) for x in self.galcen_v_sun_kms)
        except (TypeError, ValueError):
            raise ValueError(
                f"SolarParameters galcen_v_sun_kms: expected 3 numbers (km/s), got {self.galcen_v_sun_kms!r}"
            ) from None
        if len(vsun) != 3 or not all(math.isfinite(x) for x in vsun):
            raise ValueError(
                f"SolarParameters galcen_v_sun_kms: expected 3 finite numbers (km/s), got {self.galcen_v_sun_kms!r}"
            )
        object.__setattr__(self, "galcen_v_sun_kms", vsun)

    @classmethod
    def from_name(cls, name: str = DEFAULT_SOLAR) -> SolarParameters:
        """The solar-parameter set astropy registers under ``name`` (e.g. ``"v4.0"``).

        Raises
        ------
        ValueError
            If astropy does not know ``name``; the message lists the known names.
        """
        known = known_solar_names()
        if not isinstance(name, str) or name not in known:
            raise ValueError(f"unknown solar-parameter set {name!r}; known names: {', '.join(known)}")
        entry = galactocentric_frame_defaults.get_from_registry(name)
        p = entry["parameters"]
        refs = entry.get("references", {})
        vsun = p["galcen_v_sun"]
        vsun_xyz = vsun.d_xyz if hasattr(vsun, "d_xyz") else vsun.xyz
        coord = p["galcen_coord"]
        return cls(
            name=name,
            galcen_distance_kpc=float(p["galcen_distance"].to_value(u.kpc)),
            galcen_v_sun_kms=tuple(float(x) for x in vsun_xyz.to_value(u.km / u.s)),
            z_sun_kpc=float(p["z_sun"].to_value(u.kpc)),
            roll_deg=float(p["roll"].to_value(u.deg)),
            galcen_ra_deg=float(coord.ra.to_value(u.deg)),
            galcen_dec_deg=float(coord.dec.to_value(u.deg)),
            references={str(k): v for k, v in refs.items()},
        )

    @classmethod
    def custom(
        cls,
        galcen_distance_kpc=8.122,
        galcen_v_sun_kms=(12.9, 245.6, 7.78),
        z_sun_kpc=0.0208,
        roll_deg=0.0,
        galcen_ra_deg=266.4051,
        galcen_dec_deg=-28.936175,
        name: str = "custom",
    ) -> SolarParameters:
        """Explicit solar parameters (defaults are astropy's ``"v4.0"`` values).

        Quantities are accepted: ``galcen_distance_kpc`` and ``z_sun_kpc`` as lengths,
        ``galcen_v_sun_kms`` as a velocity (3 components), the angles as angles.
        """
        return cls(
            name=name,
            galcen_distance_kpc=to_internal(galcen_distance_kpc, "length", "galcen_distance_kpc"),
            galcen_v_sun_kms=tuple(np.atleast_1d(to_internal(galcen_v_sun_kms, "velocity", "galcen_v_sun_kms"))),
            z_sun_kpc=to_internal(z_sun_kpc, "length", "z_sun_kpc"),
            roll_deg=to_internal(roll_deg, "angle", "roll_deg"),
            galcen_ra_deg=to_internal(galcen_ra_deg, "angle", "galcen_ra_deg"),
            galcen_dec_deg=to_internal(galcen_dec_deg, "angle", "galcen_dec_deg"),
        )

    def to_dict(self) -> dict:
        """JSON-safe dictionary of every value (kpc, km/s, deg), for recording in outputs."""
        d = asdict(self)
        d["galcen_v_sun_kms"] = list(self.galcen_v_sun_kms)
        if d["references"] is None:
            del d["references"]
        return d

    @classmethod
    def from_dict(cls, d: dict) -> SolarParameters:
        """Inverse of :meth:`to_dict`; unknown or missing keys raise ValueError."""
        if not isinstance(d, dict):
            raise ValueError(f"solar parameters: expected a dict, got {type(d).__name__}")
        allowed = {
            "name", "galcen_distance_kpc", "galcen_v_sun_kms", "z_sun_kpc", "roll_deg",
            "galcen_ra_deg", "galcen_dec_deg", "references",
        }
        required = {"name", "galcen_distance_kpc", "galcen_v_sun_kms", "z_sun_kpc"}
        extra = set(d) - allowed
        if extra:
            raise ValueError(f"solar parameters: unknown keys {sorted(extra)}; expected {sorted(allowed)}")
        missing = required - set(d)
        if missing:
            raise ValueError(f"solar parameters: missing keys {sorted(missing)}")
        return cls(**d)

    def to_astropy(self) -> Galactocentric:
        """The astropy :class:`~astropy.coordinates.Galactocentric` frame with these values."""
        return Galactocentric(
            galcen_coord=ICRS(ra=self.galcen_ra_deg * u.deg, dec=self.galcen_dec_deg * u.deg),
            galcen_distance=self.galcen_distance_kpc * u.kpc,
            galcen_v_sun=CartesianDifferential(list(self.galcen_v_sun_kms) * (u.km / u.s)),
            z_sun=self.z_sun_kpc * u.kpc,
            roll=self.roll_deg * u.deg,
        )


def resolve_solar(solar=None) -> SolarParameters:
    """``None`` -> the default set, a name -> :meth:`SolarParameters.from_name`, a dict ->
    :meth:`SolarParameters.from_dict`, a :class:`SolarParameters` -> itself."""
    if solar is None:
        return SolarParameters.from_name(DEFAULT_SOLAR)
    if isinstance(solar, SolarParameters):
        return solar
    if isinstance(solar, str):
        return SolarParameters.from_name(solar)
    if isinstance(solar, dict):
        return SolarParameters.from_dict(solar)
    raise ValueError(
        f"solar: expected None, a parameter-set name, a dict or SolarParameters, got {type(solar).__name__}"
    )


#: Size of the basis points pushed through astropy (kpc and km/s): large against the solar
#: offsets (~8 kpc, ~250 km/s) so the derived rotation is accurate to round-off.
_BASIS_SCALE = 1.0e3


@lru_cache(maxsize=32)
def _affine_cached(solar: SolarParameters):
    # Six points +-s e_i (kpc) with velocities +-s e_i (km/s): the affine map sends
    # p -> R p + t and v -> R v + w, so t, w are the means and R's columns the half differences.
    basis = _BASIS_SCALE * np.vstack([np.eye(3), -np.eye(3)])
    rep = CartesianRepresentation(basis.T * u.kpc)
    rep = rep.with_differentials(CartesianDifferential(basis.T * (u.km / u.s)))
    out = ICRS(rep).transform_to(solar.to_astropy())
    pos = out.cartesian.xyz.to_value(u.kpc).T
    vel = out.velocity.d_xyz.to_value(u.km / u.s).T
    t = 0.5 * (pos[:3] + pos[3:]).mean(axis=0)
    w = 0.5 * (vel[:3] + vel[3:]).mean(axis=0)
    rot = (0.5 * (pos[:3] - pos[3:])).T / _BASIS_SCALE
    rot_v = (0.5 * (vel[:3] - vel[3:])).T / _BASIS_SCALE
    # The velocity part of astropy's transform uses the same rotation; if a future astropy
    # ever made the map non-affine or rotated velocities differently, refuse to go on.
    if not np.allclose(rot, rot_v, rtol=0.0, atol=1e-12) or not np.allclose(
        rot @ rot.T, np.eye(3), rtol=0.0, atol=1e-12
    ):
        raise RuntimeError("astropy's ICRS -> Galactocentric transform is not a rigid affine map")
    for arr in (rot, t, w):
        arr.setflags(write=False)
    return rot, t, w


def affine_map(solar=None):
    """The cached affine map ICRS (heliocentric cartesian) -> Galactocentric cartesian.

    Derived once per :class:`SolarParameters` from astropy's own transform.

    Returns
    -------
    rot : array of shape (3, 3)
        Rotation matrix: ``pos_gc = rot @ x_icrs + t`` and ``vel_gc = rot @ v_icrs + w``.
    t : array of shape (3,)
        Translation, kpc (the Sun's Galactocentric position).
    w : array of shape (3,)
        Velocity offset, km/s (the Sun's Galactocentric velocity, ``galcen_v_sun``).
    """
    return _affine_cached(resolve_solar(solar))


def _arr(value, kind, name):
    return np.asarray(to_internal(value, kind, name), dtype=float)


def _pm(value, name):
    if isinstance(value, u.Quantity):
        try:
            return np.asarray(value.to_value(u.mas / u.yr), dtype=float)
        except u.UnitConversionError:
            raise ValueError(f"{name}: expected a proper motion (convertible to mas/yr), got unit {value.unit}") from None
    return np.asarray(value, dtype=float)


def _icrs_basis(ra_rad, dec_rad):
    ca, sa = np.cos(ra_rad), np.sin(ra_rad)
    cd, sd = np.cos(dec_rad), np.sin(dec_rad)
    rhat = np.stack([cd * ca, cd * sa, sd], axis=-1)
    ahat = np.stack([-sa, ca, np.zeros_like(ca)], axis=-1)
    dhat = np.stack([-sd * ca, -sd * sa, cd], axis=-1)
    return rhat, ahat, dhat


def helio_to_galacto(ra_deg, dec_deg, distance_kpc, pmra_masyr, pmdec_masyr, vlos_kms, solar=None):
    """Heliocentric ICRS observables to Galactocentric cartesian position and velocity.

    Parameters
    ----------
    ra_deg, dec_deg : float or array of shape (n,)
        ICRS right ascension and declination, deg.
    distance_kpc : float or array of shape (n,)
        Heliocentric distance, kpc (> 0).
    pmra_masyr : float or array of shape (n,)
        Proper motion in right ascension including ``cos(dec)``, mas/yr.
    pmdec_masyr : float or array of shape (n,)
        Proper motion in declination, mas/yr.
    vlos_kms : float or array of shape (n,)
        Line-of-sight (heliocentric radial) velocity, km/s.
    solar : None, str, dict or SolarParameters
        Solar parameters (default ``DEFAULT_SOLAR``).

    Returns
    -------
    pos : array of shape (n, 3)
        Galactocentric position, kpc.
    vel : array of shape (n, 3)
        Galactocentric velocity, km/s.
    """
    ra = np.deg2rad(_arr(ra_deg, "angle", "ra_deg"))
    dec = np.deg2rad(_arr(dec_deg, "angle", "dec_deg"))
    d = _arr(distance_kpc, "length", "distance_kpc")
    pmra = _pm(pmra_masyr, "pmra_masyr")
    pmdec = _pm(pmdec_masyr, "pmdec_masyr")
    vlos = _arr(vlos_kms, "velocity", "vlos_kms")
    try:
        ra, dec, d, pmra, pmdec, vlos = np.broadcast_arrays(ra, dec, d, pmra, pmdec, vlos)
    except ValueError:
        raise ValueError(
            "helio_to_galacto: ra_deg, dec_deg, distance_kpc, pmra_masyr, pmdec_masyr and vlos_kms "
            "must have broadcastable shapes"
        ) from None
    ra, dec, d, pmra, pmdec, vlos = (np.atleast_1d(x).ravel() for x in (ra, dec, d, pmra, pmdec, vlos))
    if np.any(~(d > 0)):
        raise ValueError("distance_kpc: expected positive distances (kpc); got a value <= 0 or NaN")
    rot, t, w = affine_map(solar)
    rhat, ahat, dhat = _icrs_basis(ra, dec)
    x = d[:, None] * rhat
    k = PM_KMS_PER_KPC_MASYR * d
    v = vlos[:, None] * rhat + (k * pmra)[:, None] * ahat + (k * pmdec)[:, None] * dhat
    return x @ rot.T + t, v @ rot.T + w


def _as_n3(a, name):
    a = np.asarray(a, dtype=float)
    if a.ndim == 1 and a.shape[0] == 3:
        a = a[None, :]
    if a.ndim != 2 or a.shape[1] != 3:
        raise ValueError(f"{name}: expected an array of shape (n, 3), got shape {a.shape}")
    return a


def galacto_to_helio(pos, vel, solar=None) -> dict:
    """Galactocentric cartesian position and velocity to heliocentric ICRS observables.

    Parameters
    ----------
    pos : array of shape (n, 3) or (3,)
        Galactocentric position, kpc.
    vel : array of shape (n, 3) or (3,)
        Galactocentric velocity, km/s.
    solar : None, str, dict or SolarParameters
        Solar parameters (default ``DEFAULT_SOLAR``).

    Returns
    -------
    dict of arrays of shape (n,)
        ``ra`` and ``dec`` (deg, ra in [0, 360)), ``distance`` (kpc), ``parallax`` (mas),
        ``pmra`` (including cos(dec)) and ``pmdec`` (mas/yr), ``vlos`` (km/s).
    """
    pos = _as_n3(to_internal(pos, "length", "pos"), "pos")
    vel = _as_n3(to_internal(vel, "velocity", "vel"), "vel")
    if pos.shape != vel.shape:
        raise ValueError(f"vel: expected the shape of pos {pos.shape}, got {vel.shape}")
    rot, t, w = affine_map(solar)
    # rot is orthogonal to round-off, so its inverse is its transpose.
    x = (pos - t) @ rot
    v = (vel - w) @ rot
    d = np.sqrt(np.einsum("ij,ij->i", x, x))
    if np.any(d == 0):
        raise ValueError("pos: a position coincides with the Sun (heliocentric distance 0)")
    # Unit vectors straight from the cartesian components (accurate also near the poles).
    rho = np.hypot(x[:, 0], x[:, 1])
    ra = np.arctan2(x[:, 1], x[:, 0])
    dec = np.arctan2(x[:, 2], rho)
    ca, sa = np.cos(ra), np.sin(ra)
    cd, sd = rho / d, x[:, 2] / d
    rhat = x / d[:, None]
    ahat = np.stack([-sa, ca, np.zeros_like(ca)], axis=-1)
    dhat = np.stack([-sd * ca, -sd * sa, cd], axis=-1)
    k = PM_KMS_PER_KPC_MASYR * d
    return {
        "ra": np.mod(np.rad2deg(ra), 360.0),
        "dec": np.rad2deg(dec),
        "distance": d,
        "parallax": 1.0 / d,
        "pmra": np.einsum("ij,ij->i", v, ahat) / k,
        "pmdec": np.einsum("ij,ij->i", v, dhat) / k,
        "vlos": np.einsum("ij,ij->i", v, rhat),
    }


def spherical_components(pos, vel) -> dict:
    """Galactocentric spherical coordinates and velocity components.

    Parameters
    ----------
    pos : array of shape (n, 3) or (3,)
        Galactocentric position, kpc.
    vel : array of shape (n, 3) or (3,)
        Galactocentric velocity, km/s.

    Returns
    -------
    dict of arrays of shape (n,)
        ``r`` (kpc); ``theta`` the polar angle from +z in [0, pi] (rad); ``phi`` the azimuth
        in (-pi, pi] (rad, ``arctan2(y, x)``); ``v_r``, ``v_theta`` (positive toward increasing
        theta, i.e. southward), ``v_phi`` (positive toward increasing phi), km/s.
        On the z axis ``phi`` is ``arctan2(0, x)`` (0 for x = +0) and the unit vectors follow from
        that angle; at r = 0 every angle and component is NaN.
    """
    pos = _as_n3(pos, "pos")
    vel = _as_n3(vel, "vel")
    if pos.shape != vel.shape:
        raise ValueError(f"vel: expected the shape of pos {pos.shape}, got {vel.shape}")
    x, y, z = pos.T
    vx, vy, vz = vel.T
    R = np.hypot(x, y)
    r = np.hypot(R, z)
    theta = np.arctan2(R, z)
    phi = np.arctan2(y, x)
    ct, st = np.cos(theta), np.sin(theta)
    cp, sp = np.cos(phi), np.sin(phi)
    v_r = st * (cp * vx + sp * vy) + ct * vz
    v_theta = ct * (cp * vx + sp * vy) - st * vz
    v_phi = -sp * vx + cp * vy
    at_origin = r == 0
    if np.any(at_origin):
        theta, phi, v_r, v_theta, v_phi = (
            np.where(at_origin, np.nan, a) for a in (theta, phi, v_r, v_theta, v_phi)
        )
    return {"r": r, "theta": theta, "phi": phi, "v_r": v_r, "v_theta": v_theta, "v_phi": v_phi}


def folded_v_theta(pos, vel) -> np.ndarray:
    """Hemisphere-folded polar velocity ``v_theta * sign(z)``, km/s, shape (n,).

    Positive means a deflection toward the disk plane in either hemisphere (north: v_theta > 0
    points toward the plane; south: v_theta < 0 does). Stars exactly in the plane (z == 0) are
    counted as northern (sign +1), so the value there is v_theta itself; NaN at r = 0.
    """
    pos = _as_n3(pos, "pos")
    comp = spherical_components(pos, vel)
    sign = np.where(pos[:, 2] < 0, -1.0, 1.0)
    return comp["v_theta"] * sign


@lru_cache(maxsize=1)
def _icrs_to_galactic_matrix():
    rep = CartesianRepresentation(np.eye(3) * u.one)
    out = ICRS(rep).transform_to(Galactic()).cartesian.xyz.to_value(u.one)
    m = np.array(out, dtype=float)  # column j = image of e_j
    m.setflags(write=False)
    return m


def galactic_coordinates(ra_deg, dec_deg):
    """Galactic longitude and latitude (deg) of ICRS directions.

    Uses the fixed rotation ICRS -> astropy ``Galactic`` (derived once from astropy).

    Parameters
    ----------
    ra_deg, dec_deg : float or array
        ICRS right ascension and declination, deg.

    Returns
    -------
    l_deg : array
        Galactic longitude in [0, 360), deg.
    b_deg : array
        Galactic latitude in [-90, 90], deg.
    """
    ra = np.deg2rad(_arr(ra_deg, "angle", "ra_deg"))
    dec = np.deg2rad(_arr(dec_deg, "angle", "dec_deg"))
    ra, dec = np.broadcast_arrays(ra, dec)
    rhat, _, _ = _icrs_basis(ra, dec)
    g = rhat @ _icrs_to_galactic_matrix().T
    b = np.rad2deg(np.arcsin(np.clip(g[..., 2], -1.0, 1.0)))
    l = np.mod(np.rad2deg(np.arctan2(g[..., 1], g[..., 0])), 360.0)
    return l, b


def galactic_latitude(ra_deg, dec_deg):
    """Galactic latitude b (deg) of ICRS directions; see :func:`galactic_coordinates`."""
    return galactic_coordinates(ra_deg, dec_deg)[1]
