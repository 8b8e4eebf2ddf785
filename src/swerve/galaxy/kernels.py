"""Compiled force kernels of the Galaxy components (numba).

A Galaxy compiles to three plain arrays, so one compiled routine serves every Galaxy and the
orbit engine never calls Python per step:

``kinds`` : int64 array (n_comp,)
    Component kind codes: the index of the kind in :data:`COMPONENT_KINDS` (the ``KIND_*``
    constants).
``pars`` : float64 array (n_comp, N_PAR)
    Per-component numbers, layout documented beside each kind; masses enter as G*M in
    kpc (km/s)^2.
``aux`` : float64 array (n_aux,)
    Extra tables (e.g. expansion coefficients of a density-flattened halo); components refer
    to slices of it through their ``pars`` row.

Units: positions kpc, potentials (km/s)^2, accelerations (km/s)^2 / kpc.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numba as nb
import numpy as np

from . import expansion, formulas
from .dispatch import (  # generated from COMPONENT_KINDS by dev/generate_lanes.py
    KIND_HERNQUIST,
    KIND_MIYAMOTO_NAGAI,
    KIND_NFW_DENSITY_FLAT,
    KIND_NFW_POTENTIAL_FLAT,
    KIND_PLUMMER,
    KIND_POINT_MASS,
    component_accel,
    component_potential,
)

__all__ = [
    "COMPONENT_KINDS",
    "KIND_HERNQUIST",
    "KIND_MIYAMOTO_NAGAI",
    "KIND_NFW_DENSITY_FLAT",
    "KIND_NFW_POTENTIAL_FLAT",
    "KIND_PLUMMER",
    "KIND_POINT_MASS",
    "N_PAR",
    "KernelKind",
    "accel",
    "accel_many",
    "component_accel",
    "component_potential",
    "potential",
    "potential_many",
]

N_PAR = 8


@dataclass(frozen=True)
class KernelKind:
    """One component kind of the compiled Galaxy: a row of :data:`COMPONENT_KINDS`.

    Parameters
    ----------
    name : str
        Name of its code constant (``KIND_...``, written into :mod:`swerve.galaxy.dispatch`);
        the code is the row's index.
    pars : str
        Layout of its ``pars`` row.
    accel, potential : numba functions ``(p, aux, x, y, z)``
        Its scalar acceleration (returns ``(ax, ay, az)``) and potential.
    lanes : str or dict or None
        Its lane form for ``dev/generate_lanes.py``: None to translate ``accel`` (the rules are
        in :mod:`swerve.galaxy.formulas`), a string of lane statements, or, for a kind that
        reads a node table from ``aux``, a dict of statement strings ``spherical`` (when
        ``p[2] == 0``), ``head``, ``node`` (once per node row ``c1, c2, c3, wk`` of
        ``aux[int(p[7]) + 1:]``, ``int(aux[int(p[7])])`` rows) and ``tail``.
    """

    name: str
    pars: str
    accel: Callable
    potential: Callable
    lanes: str | dict | None = None


#: The component kinds, in code order: the one table from kind code to kernels.  The scalar
#: dispatch (:mod:`swerve.galaxy.dispatch`) and the orbit engine's lanes
#: (:mod:`swerve.orbit_lanes`) are generated from it by ``dev/generate_lanes.py``.
COMPONENT_KINDS: tuple[KernelKind, ...] = (
    KernelKind("KIND_POINT_MASS", "[GM]",
               formulas.point_mass_accel, formulas.point_mass_potential),
    KernelKind("KIND_HERNQUIST", "[GM, a]",
               formulas.hernquist_accel, formulas.hernquist_potential),
    KernelKind("KIND_MIYAMOTO_NAGAI", "[GM, a, b]",
               formulas.miyamoto_nagai_accel, formulas.miyamoto_nagai_potential),
    KernelKind("KIND_NFW_POTENTIAL_FLAT", "[GM, r_s, 1/q_y^2, 1/q_z^2]",
               formulas.nfw_potential_flat_accel, formulas.nfw_potential_flat_potential,
               lanes=formulas.NFW_POTENTIAL_FLAT_LANES),
    KernelKind("KIND_NFW_DENSITY_FLAT", "layout owned by swerve.galaxy.expansion",
               expansion.expansion_accel, expansion.expansion_potential,
               lanes={"spherical": expansion.LANES_SPHERICAL, "head": expansion.LANES_HEAD,
                      "node": expansion.LANES_NODE, "tail": expansion.LANES_TAIL}),
    KernelKind("KIND_PLUMMER", "[GM, b^2]",
               formulas.plummer_accel, formulas.plummer_potential),
)

_jit = nb.njit(cache=True, fastmath=False, inline="always")

# the NFW helpers under their former names (formulas.nfw_g is the force factor, negative)
_density_flat_accel = expansion.expansion_accel
_density_flat_potential = expansion.expansion_potential
_nfw_phi = formulas.nfw_phi


@_jit
def _nfw_dphi_dm_over_m(m, rs, gm):
    """(1/m) dPhi/dm of Phi(m) = -GM ln(1+m/rs)/m, stable as m -> 0 (``-formulas.nfw_g``)."""
    return -formulas.nfw_g(m, rs, gm)


@_jit
def accel(kinds, pars, aux, x, y, z):
    """Total acceleration of a compiled Galaxy at one point."""
    ax = 0.0
    ay = 0.0
    az = 0.0
    for i in range(kinds.shape[0]):
        gx, gy, gz = component_accel(kinds[i], pars[i], aux, x, y, z)
        ax += gx
        ay += gy
        az += gz
    return ax, ay, az


@_jit
def potential(kinds, pars, aux, x, y, z):
    """Total potential of a compiled Galaxy at one point."""
    phi = 0.0
    for i in range(kinds.shape[0]):
        phi += component_potential(kinds[i], pars[i], aux, x, y, z)
    return phi


@nb.njit(cache=True)
def accel_many(kinds, pars, aux, pos):
    """Acceleration at many points, ``pos`` of shape (n, 3); returns (n, 3)."""
    n = pos.shape[0]
    out = np.empty((n, 3))
    for j in range(n):
        ax, ay, az = accel(kinds, pars, aux, pos[j, 0], pos[j, 1], pos[j, 2])
        out[j, 0] = ax
        out[j, 1] = ay
        out[j, 2] = az
    return out


@nb.njit(cache=True)
def potential_many(kinds, pars, aux, pos):
    """Potential at many points, ``pos`` of shape (n, 3); returns (n,)."""
    n = pos.shape[0]
    out = np.empty(n)
    for j in range(n):
        out[j] = potential(kinds, pars, aux, pos[j, 0], pos[j, 1], pos[j, 2])
    return out
