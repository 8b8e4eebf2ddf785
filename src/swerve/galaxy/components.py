"""Galaxy components: potential, acceleration (compiled) and density (analytic, for checks).

Every component declares its parameters once (:class:`~swerve.galaxy.params.Parameter`); the
base class owns validation, ``repr``, serialisation and evaluation over arrays, each subclass
only its compiled row (:meth:`Component._compile`, naming its kind in
:data:`swerve.galaxy.kernels.COMPONENT_KINDS`) and its analytic density.  A subclass that
declares a ``kind_name`` is registered under it (:data:`COMPONENT_CLASSES`, read by
:func:`swerve.galaxy.component_class` and ``Galaxy.from_dict``); one that declares a
``halo_flattening`` is also a halo of the named models (:data:`HALO_FLATTENINGS`).
"""

from __future__ import annotations

import math
from typing import ClassVar

import numpy as np
from scipy import optimize

from .. import units
from . import kernels
from .params import Parameter

_NO_AUX = np.zeros(0)

#: component classes by kind name (as written in files), filled as the classes are defined
COMPONENT_CLASSES: dict[str, type] = {}
#: halo component classes by halo flattening (the ``halo`` of the named Galaxy models)
HALO_FLATTENINGS: dict[str, type] = {}


def _as_points(pos) -> np.ndarray:
    p = units.to_internal(pos, "length", "position")
    p = np.atleast_2d(np.asarray(p, dtype=float))
    if p.shape[-1] != 3:
        raise ValueError(f"position: expected an array of shape (n, 3) in kpc, got shape {np.shape(p)}")
    if not np.all(np.isfinite(p)):
        raise ValueError("position: expected finite coordinates, got NaN or infinity")
    return np.ascontiguousarray(p.reshape(-1, 3))


class Component:
    """Base class of one mass component of a Galaxy."""

    #: declared parameters, in order
    parameters: ClassVar[tuple[Parameter, ...]] = ()
    #: short kind name written into files
    kind_name: ClassVar[str] = ""
    #: True when the density is spherically symmetric for every parameter value
    always_spherical: ClassVar[bool] = True
    #: for a halo: its flattening's name in :data:`HALO_FLATTENINGS` (e.g. "potential")
    halo_flattening: ClassVar[str | None] = None

    def __init_subclass__(cls, **kwargs):
        super().__init_subclass__(**kwargs)
        for attr, registry in (("kind_name", COMPONENT_CLASSES), ("halo_flattening", HALO_FLATTENINGS)):
            key = cls.__dict__.get(attr)
            if not key:
                continue
            if key in registry and registry[key].__qualname__ != cls.__qualname__:
                raise ValueError(
                    f"{cls.__name__}: {attr} {key!r} is already declared by {registry[key].__name__}"
                )
            registry[key] = cls

    def __init__(self, **values):
        known = {p.name: p for p in self.parameters}
        unknown = set(values) - set(known)
        if unknown:
            raise ValueError(
                f"{type(self).__name__}: unknown parameter(s) {sorted(unknown)}; expected {sorted(known)}"
            )
        self.values = {
            p.name: p.validate(values.get(p.name, p.default)) for p in self.parameters
        }

    # --- compiled form -------------------------------------------------------------------
    def _compile(self) -> tuple[int, np.ndarray, np.ndarray]:
        raise NotImplementedError

    def compile(self) -> tuple[int, np.ndarray, np.ndarray]:
        """(kind code, pars row of length ``kernels.N_PAR``, aux array) for the kernels."""
        if not hasattr(self, "_compiled"):
            kind, row, aux = self._compile()
            full = np.zeros(kernels.N_PAR)
            full[: len(row)] = row
            self._compiled = (kind, full, np.asarray(aux, dtype=float))
        return self._compiled

    def _arrays(self):
        kind, row, aux = self.compile()
        return np.array([kind], dtype=np.int64), row.reshape(1, -1), aux

    # --- evaluation ----------------------------------------------------------------------
    def potential(self, pos) -> np.ndarray:
        """Potential in (km/s)^2 at positions of shape (n, 3) in kpc."""
        return kernels.potential_many(*self._arrays(), _as_points(pos))

    def acceleration(self, pos) -> np.ndarray:
        """Acceleration in (km/s)^2/kpc at positions of shape (n, 3) in kpc; returns (n, 3)."""
        return kernels.accel_many(*self._arrays(), _as_points(pos))

    def density(self, pos) -> np.ndarray:
        """Mass density in Msun/kpc^3 at positions of shape (n, 3) in kpc."""
        raise NotImplementedError

    @property
    def is_spherical(self) -> bool:
        return self.always_spherical

    def enclosed_mass(self, r) -> np.ndarray:
        """Mass inside spherical radius ``r`` (kpc), Msun; only for spherical components."""
        raise ValueError(f"{type(self).__name__} is not spherical: enclosed mass is not defined")

    def to_dict(self) -> dict:
        return {"kind": self.kind_name, "params": dict(self.values)}

    def __repr__(self) -> str:
        vals = ", ".join(f"{k}={v:g}" for k, v in self.values.items())
        return f"{type(self).__name__}({vals})"

    def __eq__(self, other) -> bool:
        return type(self) is type(other) and self.values == other.values

    def __hash__(self) -> int:
        return hash((type(self).__name__, tuple(sorted(self.values.items()))))


def _mass(name, default, doc, source, high=1e14):
    return Parameter(name, "Msun", default, 0.0, high, doc, source, kind="mass")


def _length(name, default, doc, source, high=1e4):
    return Parameter(name, "kpc", default, 0.0, high, doc, source, low_open=True, kind="length")


class PointMass(Component):
    """Keplerian point mass (the central black hole): Phi = -G M / r."""

    kind_name = "point_mass"
    parameters = (
        _mass("m_bh", 4.0e6, "mass of the central black hole",
              "round value; GRAVITY Collaboration 2019, A&A 625, L10 measure 4.15e6 Msun (from memory)",
              high=1e10),
    )

    def _compile(self):
        return kernels.KIND_POINT_MASS, [units.G * self.values["m_bh"]], _NO_AUX

    def density(self, pos):
        return np.zeros(len(_as_points(pos)))

    def enclosed_mass(self, r):
        return np.full(np.shape(r), self.values["m_bh"])


class HernquistBulge(Component):
    """Hernquist (1990) sphere: Phi = -G M / (r + a)."""

    kind_name = "hernquist"
    parameters = (
        _mass("m_bulge", 3.4e10, "bulge mass", "Law & Majewski 2010, ApJ 714, 229"),
        _length("a_bulge", 0.7, "bulge scale radius", "Law & Majewski 2010, ApJ 714, 229"),
    )

    def _compile(self):
        v = self.values
        return kernels.KIND_HERNQUIST, [units.G * v["m_bulge"], v["a_bulge"]], _NO_AUX

    def density(self, pos):
        p = _as_points(pos)
        m, a = self.values["m_bulge"], self.values["a_bulge"]
        r = np.linalg.norm(p, axis=1)
        with np.errstate(divide="ignore"):
            return m * a / (2 * np.pi * r * (r + a) ** 3)

    def enclosed_mass(self, r):
        m, a = self.values["m_bulge"], self.values["a_bulge"]
        r = np.asarray(r, dtype=float)
        return m * r**2 / (r + a) ** 2


class PlummerBulge(Component):
    """Plummer (1911) sphere: Phi = -G M / sqrt(r^2 + b^2) (a Miyamoto-Nagai disk with a = 0)."""

    kind_name = "plummer"
    parameters = (
        _mass("m_bulge", 443 * 2.325e7, "bulge mass",
              "Bajkova & Bobylev 2016, Astronomy Letters 42, 567: 443 M_gal, M_gal = 2.325e7 Msun "
              "(from memory)"),
        _length("b_bulge", 0.2672, "bulge scale radius",
                "Bajkova & Bobylev 2016, Astronomy Letters 42, 567 (from memory)"),
    )

    def _compile(self):
        v = self.values
        return kernels.KIND_PLUMMER, [units.G * v["m_bulge"], v["b_bulge"] ** 2], _NO_AUX

    def density(self, pos):
        p = _as_points(pos)
        m, b = self.values["m_bulge"], self.values["b_bulge"]
        r2 = np.sum(p**2, axis=1)
        return 3.0 * m / (4.0 * np.pi * b**3) * (1.0 + r2 / b**2) ** -2.5

    def enclosed_mass(self, r):
        m, b = self.values["m_bulge"], self.values["b_bulge"]
        r = np.asarray(r, dtype=float)
        return m * r**3 / (r**2 + b**2) ** 1.5


class MiyamotoNagaiDisk(Component):
    """Miyamoto & Nagai (1975) disk: Phi = -G M / sqrt(R^2 + (a + sqrt(z^2 + b^2))^2)."""

    kind_name = "miyamoto_nagai"
    always_spherical = False
    parameters = (
        _mass("m_disk", 1.0e11, "disk mass", "Law & Majewski 2010, ApJ 714, 229"),
        Parameter("a_disk", "kpc", 6.5, 0.0, 1e3, "disk scale length",
                  "Law & Majewski 2010, ApJ 714, 229", kind="length"),
        _length("b_disk", 0.26, "disk scale height", "Law & Majewski 2010, ApJ 714, 229"),
    )

    def _compile(self):
        v = self.values
        return (kernels.KIND_MIYAMOTO_NAGAI,
                [units.G * v["m_disk"], v["a_disk"], v["b_disk"]], _NO_AUX)

    def density(self, pos):
        p = _as_points(pos)
        m, a, b = self.values["m_disk"], self.values["a_disk"], self.values["b_disk"]
        R2 = p[:, 0] ** 2 + p[:, 1] ** 2
        zeta = np.sqrt(p[:, 2] ** 2 + b**2)
        num = a * R2 + (a + 3 * zeta) * (a + zeta) ** 2
        den = (R2 + (a + zeta) ** 2) ** 2.5 * zeta**3
        return b**2 * m / (4 * np.pi) * num / den


def _axis_ratio(name, doc):
    return Parameter(name, "", 1.0, 0.0, 10.0, doc,
                     "spherical by default", low_open=True)


class NFWHaloPotentialFlat(Component):
    """NFW halo flattened in the potential.

    ``Phi = -G M ln(1 + m / r_s) / m`` with the ellipsoidal radius
    ``m^2 = x^2 + (y/q_y)^2 + (z/q_z)^2``; ``M`` is the scale mass (``4 pi rho_0 r_s^3``), so at
    ``q_y = q_z = 1`` the halo is exactly the spherical NFW profile.  q_z < 1 is oblate,
    q_z > 1 prolate.  The implied density turns negative at large radius for every q != 1
    (see :meth:`negative_density_radius`).
    """

    kind_name = "nfw_potential_flattened"
    halo_flattening = "potential"
    parameters = (
        _mass("m_halo", 0.76e12, "NFW scale mass 4 pi rho_0 r_s^3",
              "Rossi et al. 2017, MNRAS 467, 1844 (from memory)", high=1e15),
        _length("r_s", 24.8, "NFW scale radius", "Rossi et al. 2017, MNRAS 467, 1844 (from memory)"),
        _axis_ratio("q_y", "halo axis ratio y/x"),
        _axis_ratio("q_z", "halo axis ratio z/x (q_z < 1 oblate)"),
    )

    @property
    def is_spherical(self) -> bool:
        return self.values["q_y"] == 1.0 and self.values["q_z"] == 1.0

    def _compile(self):
        v = self.values
        return (kernels.KIND_NFW_POTENTIAL_FLAT,
                [units.G * v["m_halo"], v["r_s"], 1.0 / v["q_y"] ** 2, 1.0 / v["q_z"] ** 2],
                _NO_AUX)

    # d Phi / dm and d^2 Phi / dm^2 of Phi(m) = -GM ln(1+m/rs)/m, in units GM = rs = 1
    @staticmethod
    def _derivs(u):
        u = np.asarray(u, dtype=float)
        L = np.log1p(u)
        d1 = L / u**2 - 1.0 / (u * (1.0 + u))
        d2 = -2.0 * L / u**3 + 1.0 / (u**2 * (1.0 + u)) + (1.0 + 2.0 * u) / (u**2 * (1.0 + u) ** 2)
        return d1, d2

    @staticmethod
    def _scaled_laplacian(u, grad2, s):
        """Laplacian of Phi in units GM/rs^3 at ellipsoidal radius u = m/rs, given |grad m|^2."""
        d1, d2 = NFWHaloPotentialFlat._derivs(u)
        return (d2 - d1 / u) * grad2 + d1 / u * s

    def density(self, pos):
        p = _as_points(pos)
        v = self.values
        qy, qz, rs = v["q_y"], v["q_z"], v["r_s"]
        m = np.sqrt(p[:, 0] ** 2 + (p[:, 1] / qy) ** 2 + (p[:, 2] / qz) ** 2)
        grad2 = (p[:, 0] ** 2 + p[:, 1] ** 2 / qy**4 + p[:, 2] ** 2 / qz**4) / m**2
        s = 1.0 + 1.0 / qy**2 + 1.0 / qz**2
        lap = self._scaled_laplacian(m / rs, grad2, s)
        return lap * v["m_halo"] / rs**3 / (4.0 * np.pi)

    def enclosed_mass(self, r):
        if not self.is_spherical:
            return super().enclosed_mass(r)
        x = np.asarray(r, dtype=float) / self.values["r_s"]
        return self.values["m_halo"] * (np.log1p(x) - x / (1.0 + x))

    def negative_density_radius(self) -> dict:
        """Where the implied density first turns negative.

        At ellipsoidal radius m the density is lowest along the axis with the smallest axis
        ratio (the z axis for an oblate halo, the x axis, i.e. in the plane, when both q > 1):
        there ``|grad m|^2`` is largest.  Returns a dict with the ellipsoidal radius ``m`` (kpc),
        ``m_over_rs``, the ``axis`` ("x", "y" or "z") and the spherical radius ``r`` (kpc) of that
        first negative point; ``m`` and ``r`` are ``inf`` for a spherical halo.
        """
        v = self.values
        qs = {"x": 1.0, "y": v["q_y"], "z": v["q_z"]}
        axis = min(qs, key=qs.get)
        qa = qs[axis]
        s = 1.0 + 1.0 / v["q_y"] ** 2 + 1.0 / v["q_z"] ** 2
        u_neg = negative_density_radius_scaled(1.0 / qa**2, s)
        m = u_neg * v["r_s"]
        return {"m": m, "m_over_rs": u_neg, "axis": axis, "r": m * qa}


def negative_density_radius_scaled(grad2_max: float, s: float) -> float:
    """First root, in units of r_s, of the potential-flattened NFW density along the axis where
    ``|grad m|^2 = grad2_max``; ``s = 1 + 1/q_y^2 + 1/q_z^2``.  ``inf`` when none below 1e8 r_s."""
    if grad2_max == 1.0 and s == 3.0:  # spherical: the NFW density is positive everywhere
        return math.inf

    def f(u):
        return NFWHaloPotentialFlat._scaled_laplacian(u, grad2_max, s)

    grid = np.logspace(-3, 8, 2200)
    vals = f(grid)
    # f > 0 (positive density) at small u; the first sign change marks negative density
    idx = np.nonzero(vals < 0.0)[0]
    if len(idx) == 0:
        return math.inf
    i = idx[0]
    if i == 0:
        return float(grid[0])
    return float(optimize.brentq(f, grid[i - 1], grid[i], xtol=1e-12, rtol=1e-12))
