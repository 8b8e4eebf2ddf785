"""Fast form of the density-flattened NFW halo: compiled kernels reading a node table.

The potential of a density-stratified ellipsoid ``rho(m^2)`` is a one-dimensional integral over
the ellipsoidal-shell parameter ``tau`` (Chandrasekhar 1969; Binney & Tremaine 2008, eq. 2.140).
After the substitution ``t = ln tau`` the integrand is analytic in a strip about the real axis
and decays exponentially at both ends, so the trapezoidal rule on a fixed grid of ``t``
converges geometrically.  The fast form is that rule on a coarse grid built once per halo
(:func:`swerve.galaxy.nfw_density.build_nodes`): at each node the per-axis factors
``1/(a_i^2 + tau_k)`` and the weight are precomputed, so one evaluation costs one square root and
one division per node.  The part ``tau > T`` is integrated analytically with ``a_i^2 + tau ~ tau``;
it is the potential of a spherical NFW profile of scale radius ``r_s sqrt(T)``.

The acceleration is the exact gradient of the fast potential (the sum is differentiated term by
term), so the fast form is a conservative field: an orbit integrator conserves its energy.

Layout (see :data:`swerve.galaxy.kernels.KIND_NFW_DENSITY_FLAT`)::

    pars: [G M, r_s, mode, L = r_s sqrt(T), 1/r_s, e = step^2/48, -, aux offset]
          mode 0: spherical (q_y = q_z = 1): the analytic NFW, no aux
          mode 1: node table in aux
    aux[off]                      : n, the number of nodes
    aux[off + 1 + 4k : off+5+4k]  : 1/(1+tau_k), 1/(q_y^2+tau_k), 1/(q_z^2+tau_k), w_k

with the potential ``Phi = -(G M/r_s) sum_k w_k / (1 + u_k) - G M ln(1 + r/L) / r
- (G M e / L) (1 + r/L)^-2``, ``u_k^2 = sum_i (x_i/r_s)^2 / (a_i^2 + tau_k)``; the last term is the
Euler-Maclaurin end correction of the trapezoidal rule at ``tau = T``.

Units: positions kpc, potentials (km/s)^2, accelerations (km/s)^2/kpc.
"""

import math

import numba as nb

from .formulas import NFW_G_LANES, nfw_g, nfw_phi

_jit = nb.njit(cache=True, inline="always")


@nb.njit(cache=True, fastmath=True, error_model="numpy")
def _node_sums(aux, j0, n, x2, y2, z2):
    """The node sums of :func:`expansion_accel`, ``Σ_k f_k c_ik`` for the three axes.

    A function of its own, compiled with ``fastmath`` (reassociation lets the compiler
    vectorise the sums over nodes, several square roots and divisions per instruction) and
    ``error_model="numpy"`` (numba's default Python error model checks every division for
    zero, which kept the loop scalar: ``inspect_asm`` showed ``vsqrtsd``/``vdivsd`` only; with
    the numpy model, ``vsqrtpd``/``vdivpd`` on zmm registers), called, not inlined, from the
    strict Galaxy kernel.  The orbit engine uses the eight-lane form of this loop
    (:mod:`swerve.orbit_lanes`); this one serves point evaluations (``Galaxy.acceleration``)
    and the engine's event refinement."""
    sx = 0.0
    sy = 0.0
    sz = 0.0
    j = j0
    for _ in range(n):
        c1 = aux[j]
        c2 = aux[j + 1]
        c3 = aux[j + 2]
        u = math.sqrt(x2 * c1 + y2 * c2 + z2 * c3)
        t = u + 1.0
        f = aux[j + 3] / (u * t * t)
        sx += f * c1
        sy += f * c2
        sz += f * c3
        j += 4
    return sx, sy, sz


@_jit
def expansion_accel(p, aux, x, y, z):
    """Acceleration (ax, ay, az) of the density-flattened NFW halo at (x, y, z) (kpc)."""
    r2 = x * x + y * y + z * z
    if r2 == 0.0:
        return 0.0, 0.0, 0.0
    r = math.sqrt(r2)
    if p[2] == 0.0:
        g = nfw_g(r, p[1], p[0])
        return g * x, g * y, g * z
    L = p[3]
    b = 1.0 / (1.0 + r / L)
    g = nfw_g(r, L, p[0]) - 2.0 * p[0] * p[5] / (L * L) * b * b * b / r
    inv = p[4]
    x2 = x * x * inv * inv
    y2 = y * y * inv * inv
    z2 = z * z * inv * inv
    off = int(p[7])
    sx, sy, sz = _node_sums(aux, off + 1, int(aux[off]), x2, y2, z2)
    k = -p[0] * inv * inv * inv
    return g * x + k * sx * x, g * y + k * sy * y, g * z + k * sz * z


@_jit
def expansion_potential(p, aux, x, y, z):
    """Potential of the density-flattened NFW halo at (x, y, z) (kpc), zero at infinity."""
    r = math.sqrt(x * x + y * y + z * z)
    if p[2] == 0.0:
        return nfw_phi(r, p[1], p[0])
    inv = p[4]
    x2 = x * x * inv * inv
    y2 = y * y * inv * inv
    z2 = z * z * inv * inv
    off = int(p[7])
    n = int(aux[off])
    s = 0.0
    j = off + 1
    for _ in range(n):
        u = math.sqrt(x2 * aux[j] + y2 * aux[j + 1] + z2 * aux[j + 2])
        s += aux[j + 3] / (1.0 + u)
        j += 4
    L = p[3]
    b = 1.0 / (1.0 + r / L)
    return -p[0] * inv * s + nfw_phi(r, L, p[0]) - p[0] * p[5] / L * b * b


# --- lane form (dev/generate_lanes.py): spherical mode, then the node-table mode as the statements
# before the loop over nodes, the statements per node (c1, c2, c3, wk: that node's row) and the
# statements after it; the same formulas as above, G M and 1/r_s multiplied in another order
LANES_SPHERICAL = f"""
r = max(math.sqrt(x * x + y * y + z * z), _TINY)
u = r / p[1]
g = {NFW_G_LANES.format(m="r", rs="p[1]")}
ax += g * x
ay += g * y
az += g * z
"""
LANES_HEAD = f"""
r = max(math.sqrt(x * x + y * y + z * z), _TINY)
u = r / p[3]
b = 1.0 / (1.0 + u)
g = {NFW_G_LANES.format(m="r", rs="p[3]")} - 2.0 * p[0] * p[5] / (p[3] * p[3]) * b * b * b / r
x2 = x * x * (p[4] * p[4])
y2 = y * y * (p[4] * p[4])
z2 = z * z * (p[4] * p[4])
sx = 0.0 * x
sy = 0.0 * x
sz = 0.0 * x
"""
LANES_NODE = """
v = max(math.sqrt(x2 * c1 + y2 * c2 + z2 * c3), _TINY)
t = v + 1.0
f = wk / (v * t * t)
sx += f * c1
sy += f * c2
sz += f * c3
"""
LANES_TAIL = """
k = -p[0] * p[4] * (p[4] * p[4])
ax += (g + k * sx) * x
ay += (g + k * sy) * y
az += (g + k * sz) * z
"""
