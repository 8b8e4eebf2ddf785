"""Compiled force kernels of the Galaxy components (numba).

A Galaxy compiles to three plain arrays, so one compiled routine serves every Galaxy and the
orbit engine never calls Python per step:

``kinds`` : int64 array (n_comp,)
    Component kind codes (the ``KIND_*`` constants below).
``pars`` : float64 array (n_comp, N_PAR)
    Per-component numbers, layout documented beside each kind; masses enter as G*M in
    kpc (km/s)^2.
``aux`` : float64 array (n_aux,)
    Extra tables (e.g. expansion coefficients of a density-flattened halo); components refer
    to slices of it through their ``pars`` row.

Units: positions kpc, potentials (km/s)^2, accelerations (km/s)^2 / kpc.
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np

from .expansion import expansion_accel as _density_flat_accel
from .expansion import expansion_potential as _density_flat_potential

N_PAR = 8

#: pars row: [GM]
KIND_POINT_MASS = 0
#: pars row: [GM, a]
KIND_HERNQUIST = 1
#: pars row: [GM, a, b]
KIND_MIYAMOTO_NAGAI = 2
#: pars row: [GM, r_s, 1/q_y^2, 1/q_z^2]; Phi = -GM ln(1 + m/r_s) / m, m^2 = x^2 + y^2/q_y^2 + z^2/q_z^2
KIND_NFW_POTENTIAL_FLAT = 3
#: pars row: layout owned by swerve.galaxy.expansion (a multipole expansion stored in aux)
KIND_NFW_DENSITY_FLAT = 4

_jit = nb.njit(cache=True, fastmath=False, inline="always")


@_jit
def _nfw_dphi_dm_over_m(m, rs, gm):
    """(1/m) dPhi/dm of Phi(m) = -GM ln(1+m/rs)/m, stable as m -> 0."""
    u = m / rs
    if u < 1e-3:
        # series of ln(1+u)/u^2 - 1/(u(1+u)) = sum_n (-1)^n (n+1)/(n+2) u^n
        f = 0.5 + u * (-2.0 / 3.0 + u * (0.75 + u * (-0.8 + u * (5.0 / 6.0 + u * (-6.0 / 7.0)))))
        return gm * f / (rs * rs * m)
    return gm * (math.log1p(u) / (m * m) - 1.0 / (m * (rs + m))) / m


@_jit
def _nfw_phi(m, rs, gm):
    u = m / rs
    if u < 1e-6:
        return -gm / rs * (1.0 - 0.5 * u + u * u / 3.0)
    return -gm * math.log1p(u) / m


@_jit
def component_accel(kind, p, aux, x, y, z):
    """Acceleration (ax, ay, az) of one component at (x, y, z)."""
    if kind == KIND_POINT_MASS:
        r2 = x * x + y * y + z * z
        if r2 == 0.0:
            return 0.0, 0.0, 0.0
        r = math.sqrt(r2)
        f = -p[0] / (r2 * r)
        return f * x, f * y, f * z
    elif kind == KIND_HERNQUIST:
        r = math.sqrt(x * x + y * y + z * z)
        if r == 0.0:
            return 0.0, 0.0, 0.0
        s = r + p[1]
        f = -p[0] / (s * s * r)
        return f * x, f * y, f * z
    elif kind == KIND_MIYAMOTO_NAGAI:
        zeta = math.sqrt(z * z + p[2] * p[2])
        az_ = p[1] + zeta
        d2 = x * x + y * y + az_ * az_
        f = -p[0] / (d2 * math.sqrt(d2))
        return f * x, f * y, f * z * az_ / zeta
    elif kind == KIND_NFW_POTENTIAL_FLAT:
        m = math.sqrt(x * x + y * y * p[2] + z * z * p[3])
        if m == 0.0:
            return 0.0, 0.0, 0.0
        g = -_nfw_dphi_dm_over_m(m, p[1], p[0])
        return g * x, g * y * p[2], g * z * p[3]
    elif kind == KIND_NFW_DENSITY_FLAT:
        return _density_flat_accel(p, aux, x, y, z)
    return math.nan, math.nan, math.nan


@_jit
def component_potential(kind, p, aux, x, y, z):
    """Potential of one component at (x, y, z)."""
    if kind == KIND_POINT_MASS:
        r = math.sqrt(x * x + y * y + z * z)
        return -p[0] / r
    elif kind == KIND_HERNQUIST:
        r = math.sqrt(x * x + y * y + z * z)
        return -p[0] / (r + p[1])
    elif kind == KIND_MIYAMOTO_NAGAI:
        zeta = math.sqrt(z * z + p[2] * p[2])
        az_ = p[1] + zeta
        return -p[0] / math.sqrt(x * x + y * y + az_ * az_)
    elif kind == KIND_NFW_POTENTIAL_FLAT:
        m = math.sqrt(x * x + y * y * p[2] + z * z * p[3])
        return _nfw_phi(m, p[1], p[0])
    elif kind == KIND_NFW_DENSITY_FLAT:
        return _density_flat_potential(p, aux, x, y, z)
    return math.nan


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
