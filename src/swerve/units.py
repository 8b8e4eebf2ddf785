"""The internal unit system: kpc, km/s, Msun, Myr.

Inside kernels every value is a plain float in these units. Public functions accept astropy
Quantities (converted here, once) or plain floats, which are taken to be in internal units.

Orbit integration uses the natural time unit ``T = 1 kpc / (1 km/s)`` (about 977.8 Myr) so that
``dx/dt = v`` and ``dv/dt = a`` need no conversion factor; :func:`myr_to_internal` and
:func:`internal_to_myr` convert at the boundary.
"""

from __future__ import annotations

import math

import numpy as np
from astropy import constants as const
from astropy import units as u

LENGTH = u.kpc
VELOCITY = u.km / u.s
MASS = u.Msun
TIME = u.Myr
POTENTIAL = VELOCITY**2
ACCELERATION = VELOCITY**2 / LENGTH
DENSITY = MASS / LENGTH**3

#: Newton's constant in kpc (km/s)^2 / Msun, from astropy.constants (CODATA), converted once.
G = float(const.G.to_value(LENGTH * VELOCITY**2 / MASS))

#: One internal time unit (kpc / (km/s)) in Myr.
TIME_UNIT_MYR = float((1.0 * LENGTH / VELOCITY).to_value(TIME))

#: 1 km/s in kpc/Myr.
KMS_TO_KPC_PER_MYR = float((1.0 * VELOCITY).to_value(LENGTH / TIME))

_UNIT_OF = {
    "length": LENGTH,
    "velocity": VELOCITY,
    "mass": MASS,
    "time": TIME,
    "potential": POTENTIAL,
    "acceleration": ACCELERATION,
    "density": DENSITY,
    "angle": u.deg,
    "dimensionless": u.dimensionless_unscaled,
}


def unit_of(kind: str) -> u.UnitBase:
    """The internal astropy unit of a physical kind (``"length"``, ``"mass"``, ...)."""
    try:
        return _UNIT_OF[kind]
    except KeyError:
        raise ValueError(f"unknown physical kind {kind!r}; expected one of {sorted(_UNIT_OF)}") from None


def to_internal(value, kind: str, name: str = "value") -> np.ndarray | float:
    """Convert ``value`` to the internal unit of ``kind``.

    A Quantity is converted (a wrong physical type raises a ValueError naming ``name``); a plain
    number or array is taken to be in internal units already.
    """
    unit = unit_of(kind)
    if isinstance(value, u.Quantity):
        try:
            out = value.to_value(unit)
        except u.UnitConversionError:
            raise ValueError(
                f"{name}: expected a {kind} (convertible to {unit}), got unit {value.unit}"
            ) from None
    else:
        out = value
    if np.ndim(out) == 0:
        return float(out)
    return np.asarray(out, dtype=float)


def myr_to_internal(t_myr):
    """Myr to the internal time unit kpc/(km/s)."""
    return np.asarray(t_myr, dtype=float) / TIME_UNIT_MYR


def internal_to_myr(t):
    """The internal time unit kpc/(km/s) to Myr."""
    return np.asarray(t, dtype=float) * TIME_UNIT_MYR


def positive_float(name: str, value, unit: str, what: str = "a positive number") -> float:
    """``value`` as a finite positive float, or a one-line ValueError naming ``name``."""
    try:
        v = float(value)
    except (TypeError, ValueError):
        v = math.nan
    if not (math.isfinite(v) and v > 0):
        raise ValueError(f"{name}: expected {what} in {unit}, got {value!r}")
    return v
