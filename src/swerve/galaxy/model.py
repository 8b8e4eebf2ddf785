"""The composite Galaxy, its named versioned defaults, and the negative-density check."""

from __future__ import annotations

import copy
import math
import warnings
from collections.abc import Iterable

import numpy as np

from .. import units
from . import kernels
from .components import COMPONENT_CLASSES, HALO_FLATTENINGS, Component, _as_points


class NegativeDensityWarning(UserWarning):
    """A requested domain or an orbit reaches a region where the model's density is negative."""


# HALO_FLATTENINGS (halo component classes by flattening) and COMPONENT_CLASSES (component
# classes by kind name) are filled by the component classes themselves (components.py)

#: the mass unit of Irrgang et al. 2013 and Bajkova & Bobylev 2016 (G = 1 with kpc and 10 km/s),
#: in Msun: (10 km/s)^2 kpc / G = 2.3251e7, quoted as 2.325e7 by those papers (from memory)
_M_GAL = 2.325e7
_BB16 = "Bajkova & Bobylev 2016, Astronomy Letters 42, 567, model III (from memory)"

#: Named, versioned Galaxy models. Each value of each model carries its source in the
#: component's parameter declaration; outputs record the resolved name, never "latest".
GALAXY_MODELS: dict[str, dict] = {
    "swerve-mw-1": {
        "description": (
            "Point-mass black hole, Hernquist bulge and Miyamoto-Nagai disk of Law & Majewski 2010 "
            "(ApJ 714, 229), NFW halo with scale mass 0.76e12 Msun and r_s = 24.8 kpc "
            "(Rossi et al. 2017, MNRAS 467, 1844; from memory)"
        ),
        "components": [
            ("point_mass", {"m_bh": 4.0e6}),
            ("hernquist", {"m_bulge": 3.4e10, "a_bulge": 0.7}),
            ("miyamoto_nagai", {"m_disk": 1.0e11, "a_disk": 6.5, "b_disk": 0.26}),
            ("halo", {"m_halo": 0.76e12, "r_s": 24.8, "q_y": 1.0, "q_z": 1.0}),
        ],
        "halo_flattening": "potential",
    },
    "swerve-mw-2": {
        "description": (
            "Point-mass black hole; Plummer bulge, Miyamoto-Nagai disk and NFW halo of model III "
            "of Bajkova & Bobylev 2016 (Astronomy Letters 42, 567; from memory), fitted to the "
            "rotation curve out to 200 kpc: their R0 = 8.3 kpc, v_c(R0) = 244 km/s; masses in their "
            "unit M_gal = 2.325e7 Msun. The halo is flattened in the density (positive everywhere)"
        ),
        "components": [
            ("point_mass", {"m_bh": 4.0e6}),
            ("plummer", {"m_bulge": 443 * _M_GAL, "b_bulge": 0.2672}),
            ("miyamoto_nagai", {"m_disk": 2798 * _M_GAL, "a_disk": 4.40, "b_disk": 0.3084}),
            ("halo", {"m_halo": 12474 * _M_GAL, "r_s": 7.7, "q_y": 1.0, "q_z": 1.0}),
        ],
        "sources": {
            "m_bulge": f"{_BB16}: 443 M_gal",
            "b_bulge": _BB16,
            "m_disk": f"{_BB16}: 2798 M_gal",
            "a_disk": _BB16,
            "b_disk": _BB16,
            "m_halo": f"{_BB16}: 12474 M_gal (NFW scale mass, Phi = -G M ln(1 + r/r_s) / r)",
            "r_s": _BB16,
        },
        "halo_flattening": "density",
    },
}

#: the name of the default Galaxy model
# swerve-mw-2 is to replace it (issue 21, item 6) once an emulator trained on it passes calibration:
# the first one failed on one of two seeds (training/default-mw2.toml; benchmarks/RESULTS.md, "A second Galaxy model")
DEFAULT_GALAXY = "swerve-mw-1"


def parameter_source(model: str, name: str, declared: str) -> str:
    """The source of parameter ``name``'s value in named model ``model`` (``declared``: the
    source in the parameter's declaration, used where the model names none)."""
    spec = GALAXY_MODELS.get(model.split("+")[0], {})
    return spec.get("sources", {}).get(name, declared)

#: former name of the registry of component classes by kind name
_COMPONENT_KINDS = COMPONENT_CLASSES


def component_class(kind: str) -> type[Component]:
    """The component class of a kind name (as written in files)."""
    try:
        return COMPONENT_CLASSES[kind]
    except KeyError:
        raise ValueError(
            f"unknown component kind {kind!r}; expected one of {sorted(COMPONENT_CLASSES)}"
        ) from None


class Galaxy:
    """A static model Galaxy: a sum of components with unique parameter names.

    Parameters
    ----------
    components : iterable of Component
    name : str, optional
        Model name recorded in outputs (e.g. ``"swerve-mw-1"`` or ``"swerve-mw-1+custom"``).

    Examples
    --------
    >>> g = Galaxy.from_name("swerve-mw-1", q_z=0.9)
    >>> round(float(Galaxy.default().circular_velocity(8.122)[0]), 1)  # km/s
    232.5
    """

    def __init__(self, components: Iterable[Component], name: str = "custom", halo_flattening=None):
        self.components = tuple(components)
        if not self.components:
            raise ValueError("Galaxy: expected at least one component")
        seen: dict[str, str] = {}
        for c in self.components:
            for p in c.parameters:
                if p.name in seen:
                    raise ValueError(
                        f"Galaxy: parameter {p.name!r} is declared by both {seen[p.name]} and "
                        f"{type(c).__name__}; parameter names must be unique"
                    )
                seen[p.name] = type(c).__name__
        self.name = name
        self.halo_flattening = halo_flattening
        self._kernel_args = None

    # --- construction --------------------------------------------------------------------
    @classmethod
    def from_name(cls, name: str = DEFAULT_GALAXY, halo_flattening: str | None = None, **params):
        """A named model, optionally with some parameters changed and the halo flattening chosen."""
        try:
            spec = GALAXY_MODELS[name]
        except KeyError:
            raise ValueError(
                f"unknown Galaxy model {name!r}; expected one of {sorted(GALAXY_MODELS)}"
            ) from None
        flat = halo_flattening or spec["halo_flattening"]
        if flat not in HALO_FLATTENINGS:
            raise ValueError(
                f"halo_flattening: expected one of {sorted(HALO_FLATTENINGS)}, got {flat!r}"
            )
        comps = []
        remaining = dict(params)
        for kind, values in spec["components"]:
            ccls = HALO_FLATTENINGS[flat] if kind == "halo" else COMPONENT_CLASSES[kind]
            vals = dict(values)
            for p in ccls.parameters:
                if p.name in remaining:
                    vals[p.name] = remaining.pop(p.name)
            comps.append(ccls(**vals))
        if remaining:
            known = sorted(p.name for c in comps for p in c.parameters)
            raise ValueError(f"unknown Galaxy parameter(s) {sorted(remaining)}; expected {known}")
        label = name if not params and flat == spec["halo_flattening"] else f"{name}+custom"
        return cls(comps, name=label, halo_flattening=flat)

    @classmethod
    def default(cls, **params):
        """The default Galaxy (:data:`DEFAULT_GALAXY`), with optional parameter changes."""
        return cls.from_name(DEFAULT_GALAXY, **params)

    def with_params(self, **params) -> Galaxy:
        """A copy with some parameters changed (validated)."""
        comps = []
        remaining = dict(params)
        for c in self.components:
            vals = dict(c.values)
            for p in c.parameters:
                if p.name in remaining:
                    vals[p.name] = remaining.pop(p.name)
            comps.append(type(c)(**vals))
        if remaining:
            raise ValueError(
                f"unknown Galaxy parameter(s) {sorted(remaining)}; expected {sorted(self.params)}"
            )
        name = self.name if self.name.endswith("+custom") or not params else self.name + "+custom"
        return Galaxy(comps, name=name, halo_flattening=self.halo_flattening)

    @property
    def params(self) -> dict[str, float]:
        """All parameter values by name."""
        out: dict[str, float] = {}
        for c in self.components:
            out.update(c.values)
        return out

    @property
    def parameters(self):
        """All parameter declarations, in order."""
        return tuple(p for c in self.components for p in c.parameters)

    def to_dict(self) -> dict:
        """JSON-safe description (recorded in every output)."""
        return {
            "name": self.name,
            "halo_flattening": self.halo_flattening,
            "components": [c.to_dict() for c in self.components],
        }

    @classmethod
    def from_dict(cls, d: dict) -> Galaxy:
        comps = [component_class(c["kind"])(**c["params"]) for c in d["components"]]
        return cls(comps, name=d.get("name", "custom"), halo_flattening=d.get("halo_flattening"))

    def __repr__(self) -> str:
        inner = ", ".join(repr(c) for c in self.components)
        return f"Galaxy(name={self.name!r}, [{inner}])"

    def component(self, kind_or_class) -> Component:
        """The (first) component of a kind name or class."""
        for c in self.components:
            if c.kind_name == kind_or_class or (isinstance(kind_or_class, type) and isinstance(c, kind_or_class)):
                return c
        raise ValueError(f"Galaxy {self.name!r} has no component {kind_or_class!r}")

    @property
    def halo(self) -> Component | None:
        for c in self.components:
            if "q_z" in c.values:
                return c
        return None

    @property
    def m_bh(self) -> float:
        """Mass of the central point mass (Msun), 0 if none."""
        return float(self.params.get("m_bh", 0.0))

    # --- compiled form -------------------------------------------------------------------
    @property
    def kernel_args(self) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """``(kinds, pars, aux)`` for the compiled kernels (see :mod:`swerve.galaxy.kernels`)."""
        if self._kernel_args is None:
            kinds, rows, auxes = [], [], []
            offset = 0
            for c in self.components:
                kind, row, aux = c.compile()
                row = row.copy()
                if len(aux):
                    # the component's aux slice starts at 'offset': by convention pars[-1]
                    row[-1] = offset
                kinds.append(kind)
                rows.append(row)
                auxes.append(aux)
                offset += len(aux)
            aux_all = np.concatenate(auxes) if offset else np.zeros(1)
            self._kernel_args = (
                np.array(kinds, dtype=np.int64),
                np.ascontiguousarray(np.vstack(rows)),
                np.ascontiguousarray(aux_all),
            )
        return self._kernel_args

    # --- physics ---------------------------------------------------------------------------
    def potential(self, pos) -> np.ndarray:
        """Potential in (km/s)^2 at positions (n, 3) in kpc (Quantity accepted)."""
        return kernels.potential_many(*self.kernel_args, _as_points(pos))

    def acceleration(self, pos) -> np.ndarray:
        """Acceleration in (km/s)^2/kpc at positions (n, 3) in kpc; returns (n, 3)."""
        return kernels.accel_many(*self.kernel_args, _as_points(pos))

    def density(self, pos) -> np.ndarray:
        """Total mass density in Msun/kpc^3 (sum of the components' analytic densities)."""
        p = _as_points(pos)
        return np.sum([c.density(p) for c in self.components], axis=0)

    def circular_velocity(self, R, phi: float = 0.0) -> np.ndarray:
        """Circular velocity (km/s) at cylindrical radius ``R`` (kpc) in the plane z = 0,
        from the radial force at azimuth ``phi`` (radians; 0 is the +x axis)."""
        R = np.atleast_1d(units.to_internal(R, "length", "R")).astype(float)
        if np.any(R <= 0):
            raise ValueError("R: expected positive radii in kpc")
        pos = np.stack([R * math.cos(phi), R * math.sin(phi), np.zeros_like(R)], axis=1)
        a = self.acceleration(pos)
        a_R = a[:, 0] * math.cos(phi) + a[:, 1] * math.sin(phi)
        return np.sqrt(np.maximum(-a_R * R, 0.0))

    def escape_speed(self, pos) -> np.ndarray:
        """Escape speed sqrt(-2 Phi) (km/s) at positions (n, 3); the potential is untruncated
        and vanishes at infinity."""
        return np.sqrt(np.maximum(-2.0 * self.potential(pos), 0.0))

    def escape_speed_at_radius(self, r, direction=(1.0, 0.0, 0.0)) -> np.ndarray:
        """Escape speed at spherical radius ``r`` (kpc) along a unit ``direction``."""
        r = np.atleast_1d(units.to_internal(r, "length", "r")).astype(float)
        d = np.asarray(direction, dtype=float)
        d = d / np.linalg.norm(d)
        return self.escape_speed(r[:, None] * d[None, :])

    def enclosed_mass(self, r) -> dict[str, np.ndarray]:
        """Mass (Msun) inside spherical radius ``r`` of each spherical component, and their
        sum under ``"spherical_total"``; non-spherical components are listed under
        ``"not_spherical"`` (their mass inside a sphere is not computed)."""
        r = np.atleast_1d(units.to_internal(r, "length", "r")).astype(float)
        out: dict = {}
        total = np.zeros_like(r)
        skipped = []
        for c in self.components:
            if c.is_spherical:
                m = np.asarray(c.enclosed_mass(r), dtype=float)
                out[c.kind_name] = m
                total = total + m
            else:
                skipped.append(c.kind_name)
        out["spherical_total"] = total
        out["not_spherical"] = skipped
        return out

    # --- negative density ------------------------------------------------------------------
    def negative_density_region(self) -> dict | None:
        """Where the halo's implied density first turns negative (see
        :meth:`NFWHaloPotentialFlat.negative_density_radius`), or None when the Galaxy has no
        potential-flattened halo or it is spherical."""
        h = self.halo
        if h is None or not hasattr(h, "negative_density_radius"):
            return None
        region = h.negative_density_radius()
        if not math.isfinite(region["r"]):
            return None
        return region

    def check_domain(self, r_max, what: str = "requested domain") -> bool:
        """Warn (:class:`NegativeDensityWarning`) when radii up to ``r_max`` (kpc; scalar or
        array, e.g. every orbit's largest radius) reach the negative-density region.
        Returns True when they do."""
        region = self.negative_density_region()
        if region is None:
            return False
        r_max = np.atleast_1d(np.asarray(r_max, dtype=float))
        n_bad = int(np.sum(r_max >= region["r"]))
        if n_bad:
            halo = self.halo.values
            msg = (
                f"{what}: {n_bad} of {r_max.size} reach r >= {region['r']:.4g} kpc, where the "
                f"potential-flattened halo (q_y={halo['q_y']:g}, q_z={halo['q_z']:g}) implies a "
                f"negative density (first along the {region['axis']} axis, m = "
                f"{region['m_over_rs']:.4g} r_s); consider halo_flattening='density'"
            )
            warnings.warn(msg, NegativeDensityWarning, stacklevel=2)
            return True
        return False

    def copy(self) -> Galaxy:
        return copy.deepcopy(self)
