"""Formula declarations of the Galaxy's component kinds: force and potential of each, written once.

Each component kind's acceleration and potential are small scalar numba functions here (the
density-flattened halo's are in :mod:`swerve.galaxy.expansion`, beside its node table), and the
NFW helpers that the two halo kinds share (:func:`nfw_g`, :func:`nfw_phi`) are written once.
:data:`swerve.galaxy.kernels.COMPONENT_KINDS` is the table from kind code to these functions;
``dev/generate_lanes.py`` writes from that table both the scalar dispatch
(``swerve/galaxy/dispatch.py``) and the eight-lane force of the orbit engine
(``swerve/orbit_lanes.py``), translating each force function's statements into lane-vector
operations.

A force function the generator translates has the signature ``(p, aux, x, y, z)`` (``p`` the
kind's pars row, positions in kpc) and a body of

* assignments of arithmetic (``+ - * /``, ``math.sqrt``, ``math.log1p``, ``max``, ``abs``,
  ``a if u < c else b``) on scalars and ``p[i]``;
* optionally one guard ``if v == 0.0: return 0.0, 0.0, 0.0`` (the force at a singular point):
  in the lanes ``v`` is floored instead, at 1e-200 for a name ending in ``2`` (a squared length),
  else at 1e-100, so the lanes never branch and the force there is still 0;
* a final ``return gx, gy, gz``: the lanes add the three expressions to their sums.

A kind whose lane statements must differ from its scalar ones gives them in its table entry
(:class:`swerve.galaxy.kernels.KernelKind`): the two NFW halo kinds do, because their lane
form multiplies ``G M`` last while the scalar form multiplies it first (both kept as they were,
so that every result stays bit-identical; the difference is a rounding of the last bit).

Units: positions kpc, masses as G M in kpc (km/s)^2, potentials (km/s)^2, accelerations
(km/s)^2/kpc.
"""

from __future__ import annotations

import math

import numba as nb

_jit = nb.njit(cache=True, fastmath=False, inline="always")


# --- the NFW profile, shared by both flattened halos ------------------------------------------
@_jit
def nfw_g(m, rs, gm):
    """-(1/m) dPhi/dm of the NFW potential Phi(m) = -GM ln(1 + m/rs) / m, so that the force is
    ``nfw_g * grad(m^2 / 2)``; the series of ln(1+u)/u^2 - 1/(u(1+u)) below u = m/rs = 1e-3
    (stable as m -> 0)."""
    u = m / rs
    if u < 1e-3:
        # sum_n (-1)^n (n+1)/(n+2) u^n
        f = 0.5 + u * (-2.0 / 3.0 + u * (0.75 + u * (-0.8 + u * (5.0 / 6.0 + u * (-6.0 / 7.0)))))
        return -gm * f / (rs * rs * m)
    return -gm * (math.log1p(u) / (m * m) - 1.0 / (m * (rs + m))) / m


@_jit
def nfw_phi(m, rs, gm):
    """The NFW potential -GM ln(1 + m/rs) / m, its series below m/rs = 1e-6."""
    u = m / rs
    if u < 1e-6:
        return -gm / rs * (1.0 - 0.5 * u + u * u / 3.0)
    return -gm * math.log1p(u) / m


# --- point mass: pars [GM] ----------------------------------------------------------------------
@_jit
def point_mass_accel(p, aux, x, y, z):
    """Keplerian point mass: a = -GM x / r^3 (0 at the origin)."""
    r2 = x * x + y * y + z * z
    if r2 == 0.0:
        return 0.0, 0.0, 0.0
    r = math.sqrt(r2)
    f = -p[0] / (r2 * r)
    return f * x, f * y, f * z


@_jit
def point_mass_potential(p, aux, x, y, z):
    """Phi = -GM / r."""
    r = math.sqrt(x * x + y * y + z * z)
    return -p[0] / r


# --- Hernquist sphere: pars [GM, a] ---------------------------------------------------------------
@_jit
def hernquist_accel(p, aux, x, y, z):
    """Hernquist (1990) sphere: a = -GM x / (r (r + a)^2) (0 at the origin)."""
    r = math.sqrt(x * x + y * y + z * z)
    if r == 0.0:
        return 0.0, 0.0, 0.0
    s = r + p[1]
    f = -p[0] / (s * s * r)
    return f * x, f * y, f * z


@_jit
def hernquist_potential(p, aux, x, y, z):
    """Phi = -GM / (r + a)."""
    r = math.sqrt(x * x + y * y + z * z)
    return -p[0] / (r + p[1])


# --- Plummer sphere: pars [GM, b^2] -------------------------------------------------------------
@_jit
def plummer_accel(p, aux, x, y, z):
    """Plummer (1911) sphere: a = -GM x / (r^2 + b^2)^(3/2) (the Miyamoto-Nagai disk with a = 0)."""
    d2 = x * x + y * y + z * z + p[1]
    f = -p[0] / (d2 * math.sqrt(d2))
    return f * x, f * y, f * z


@_jit
def plummer_potential(p, aux, x, y, z):
    """Phi = -GM / sqrt(r^2 + b^2)."""
    return -p[0] / math.sqrt(x * x + y * y + z * z + p[1])


# --- Miyamoto-Nagai disk: pars [GM, a, b] ------------------------------------------------------------
@_jit
def miyamoto_nagai_accel(p, aux, x, y, z):
    """Miyamoto & Nagai (1975) disk, the gradient of the potential below."""
    zeta = math.sqrt(z * z + p[2] * p[2])
    q = p[1] + zeta
    d2 = x * x + y * y + q * q
    f = -p[0] / (d2 * math.sqrt(d2))
    return f * x, f * y, f * z * q / zeta


@_jit
def miyamoto_nagai_potential(p, aux, x, y, z):
    """Phi = -GM / sqrt(R^2 + (a + sqrt(z^2 + b^2))^2)."""
    zeta = math.sqrt(z * z + p[2] * p[2])
    q = p[1] + zeta
    return -p[0] / math.sqrt(x * x + y * y + q * q)


# --- NFW halo flattened in the potential: pars [GM, r_s, 1/q_y^2, 1/q_z^2] -------------------------
@_jit
def nfw_potential_flat_accel(p, aux, x, y, z):
    """Phi(m) of :func:`nfw_phi` at the ellipsoidal radius m^2 = x^2 + y^2/q_y^2 + z^2/q_z^2."""
    m = math.sqrt(x * x + y * y * p[2] + z * z * p[3])
    if m == 0.0:
        return 0.0, 0.0, 0.0
    g = nfw_g(m, p[1], p[0])
    return g * x, g * y * p[2], g * z * p[3]


@_jit
def nfw_potential_flat_potential(p, aux, x, y, z):
    """-GM ln(1 + m/r_s) / m at the ellipsoidal radius m."""
    m = math.sqrt(x * x + y * y * p[2] + z * z * p[3])
    return nfw_phi(m, p[1], p[0])


#: :func:`nfw_g` as a lane expression, with ``u = {m} / {rs}`` already assigned (G M is
#: multiplied last: see the module docstring)
NFW_G_LANES = (
    "-p[0] * ((0.5 + u * (-2.0 / 3.0 + u * (0.75 + u * (-0.8 + u * (5.0 / 6.0 + u * (-6.0 / 7.0))))))"
    " / ({rs} * {rs} * {m}) if u < 1e-3"
    " else (math.log1p(u) / ({m} * {m}) - 1.0 / ({m} * ({rs} + {m}))) / {m})"
)

#: lane statements of :func:`nfw_potential_flat_accel` (adding to the sums ax, ay, az)
NFW_POTENTIAL_FLAT_LANES = f"""
m = max(math.sqrt(x * x + y * y * p[2] + z * z * p[3]), _TINY)
u = m / p[1]
g = {NFW_G_LANES.format(m="m", rs="p[1]")}
ax += g * x
ay += g * y * p[2]
az += g * z * p[3]
"""
