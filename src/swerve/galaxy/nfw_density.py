"""NFW halo flattened in the density (a physical triaxial halo), its exact quadrature and the
node table of its fast compiled form.

Model
-----
``rho(m) = rho_0 / ((m/r_s) (1 + m/r_s)^2)`` with the ellipsoidal radius
``m^2 = x^2 + (y/q_y)^2 + (z/q_z)^2`` (axes aligned with the Galactocentric axes; q_z < 1
oblate, q_z > 1 prolate; the same parameters and meaning as
:class:`~swerve.galaxy.components.NFWHaloPotentialFlat`).

Normalisation (mass-preserving): ``rho_0 = M / (4 pi q_y q_z r_s^3)`` with ``M = m_halo``, so the
mass inside the ellipsoid of ellipsoidal radius ``m`` is ``M [ln(1 + m/r_s) - (m/r_s)/(1 + m/r_s)]``
for every ``q_y, q_z``: exactly the mass of the spherical NFW halo of scale mass ``M`` inside the
sphere ``r = m`` (see :meth:`NFWHaloDensityFlat.mass_within_ellipsoid`).  Changing the axis
ratios reshapes the halo at fixed mass profile instead of changing its mass (the density at a
given ellipsoidal radius scales as ``1/(q_y q_z)``).  galpy's ``TriaxialNFWPotential`` keeps the
density instead: galpy ``amp = M / (q_y q_z)`` is the same halo.

Potential and forces (Binney & Tremaine 2008, eq. 2.140 and the force formula that follows it;
Chandrasekhar 1969), with ``a = (1, q_y, q_z)``, ``Delta(tau) = sqrt(prod_i (a_i^2 + tau))``,
``u(tau)^2 = sum_i (x_i/r_s)^2 / (a_i^2 + tau)`` and, for the NFW profile,
``psi(inf) - psi(m) = 2 rho_0 r_s^2 / (1 + m/r_s)`` (finite: no divergent constant)::

    Phi(x) = -(G M / (2 r_s))    int_0^inf dtau / ((1 + u) Delta)
    a_i(x) = -(G M / (2 r_s^3)) x_i int_0^inf dtau / (u (1 + u)^2 (a_i^2 + tau) Delta)

(the force carries 2 pi G q_y q_z rho_0, not pi G q_y q_z rho_0: check with q = 1, where it gives
-G M(<r) x / r^3).  The potential vanishes at infinity.

Quadrature: with ``t = ln tau`` the integrands are analytic in a strip about the real axis and
decay exponentially at both ends, so the trapezoidal rule converges geometrically in the step.
Below ``tau_lo = e^t_lo`` the integrand is constant to O(tau_lo); above ``T = e^t_hi``,
``a_i^2 + tau ~ tau`` and the tail is the potential of a spherical NFW profile of scale radius
``r_s sqrt(T)``.  The reference (:func:`exact_scaled`) uses a fine step over a wide range
(about 1e-14 relative); the fast form (:func:`build_nodes`, evaluated by
:mod:`swerve.galaxy.expansion`) a coarse one (21 nodes; 3e-6 relative in force or better).
"""

from __future__ import annotations

import math
from functools import lru_cache

import numpy as np

from .. import units
from . import kernels
from .components import Component, NFWHaloPotentialFlat, _as_points

#: reference quadrature: step in ln(tau) and range
REFERENCE_STEP = 0.05
REFERENCE_T_RANGE = (-50.0, 50.0)
#: fast form: step in ln(tau) and range, 20 nodes plus one at tau = 0.  Measured against the
#: reference at 1e-3 to 2e4 kpc (r_s = 24.8 kpc), axis ratios 0.5-1.5: force within 3.2e-6,
#: potential within 2.2e-6 (the force error comes from the tau -> 0 end, the potential's from the
#: tail).  The former range (-12, 15), 29 nodes, gave 1.8e-6 and 8e-7 at 1.4x the cost;
#: tests/test_nfw_density.py holds the force to 1e-5 (the design target).
FAST_STEP = 1.0
FAST_T_RANGE = (-8.0, 11.0)


def _grid_end(step: float, t_lo: float, t_hi: float) -> tuple[int, float]:
    """Number of trapezoid nodes from t_lo and the last node's t (t_hi rounded to the grid)."""
    n = int(round((t_hi - t_lo) / step)) + 1
    return n, t_lo + step * (n - 1)


def _nodes(q_y: float, q_z: float, step: float, t_lo: float, t_hi: float) -> np.ndarray:
    """Node table (n, 4): 1/(a_i^2 + tau_k) for i = x, y, z and the weight w_k, such that
    ``int_0^T dtau f(tau) / (2 Delta) ~ sum_k w_k f(tau_k)`` for f smooth at tau = 0; the
    grid ends at ``T = exp(_grid_end(step, t_lo, t_hi)[1])``."""
    n, _ = _grid_end(step, t_lo, t_hi)
    t = t_lo + step * np.arange(n)
    tau = np.exp(t)
    w = step * tau
    w[0] *= 0.5
    w[-1] *= 0.5
    # below tau_lo the integrand is its value at tau = 0 (to O(tau_lo)): one node at tau = 0
    # carrying that integral, tau_lo, plus the Euler-Maclaurin end corrections of the
    # trapezoid at t_lo (where the integrand is tau_lo g(0) e^(t - t_lo), so every derivative
    # equals its value)
    h2 = step * step
    tau = np.concatenate([[0.0], tau])
    w = np.concatenate([[math.exp(t_lo) * (1.0 + h2 / 12.0 - h2 * h2 / 720.0)], w])
    a2 = np.array([1.0, q_y * q_y, q_z * q_z])
    c = 1.0 / (a2[None, :] + tau[:, None])
    delta = np.sqrt(np.prod(a2[None, :] + tau[:, None], axis=1))
    return np.column_stack([c, 0.5 * w / delta])


def _tail(rho: np.ndarray, L: float, step: float):
    """Scaled potential and -(1/rho) dPhi/drho of the part tau > T = L^2: the integral
    -ln(1 + rho/L)/rho, plus the Euler-Maclaurin end correction of the trapezoid at t_hi,
    -(step^2 / (48 L)) (1 + rho/L)^-2 (the integrand there is 0.5 s / (1 + rho s), s = e^(-t/2))."""
    x = rho / L
    small = x < 1e-3
    xs = np.where(small, 1.0, x)
    rs_ = np.where(rho > 0, rho, 1.0)
    phi = np.where(small, -(1.0 - 0.5 * x + x * x / 3.0) / L, -np.log1p(xs) / rs_)
    series = (0.5 + x * (-2.0 / 3.0 + x * (0.75 + x * (-0.8 + x * 5.0 / 6.0)))) / (L * L * rs_)
    full = (np.log1p(xs) / rs_**2 - 1.0 / (rs_ * (L + rs_))) / rs_
    g = -np.where(small, series, full)
    e = step * step / (48.0 * L)
    phi = phi - e / (1.0 + x) ** 2
    g = g - 2.0 * e / L / (1.0 + x) ** 3 / rs_
    return phi, g


def exact_scaled(xi, q_y: float, q_z: float, step: float = REFERENCE_STEP,
                 t_range: tuple[float, float] = REFERENCE_T_RANGE, chunk: int = 256):
    """Reference quadrature in scaled units (G M = r_s = 1).

    Parameters
    ----------
    xi : array of shape (n, 3)
        Positions in units of r_s.
    q_y, q_z : float
        Axis ratios of the density.
    step, t_range : float, (float, float)
        Trapezoid step and range in ln(tau).

    Returns
    -------
    phi : array (n,)
        Potential in units of G M / r_s (zero at infinity).
    acc : array (n, 3)
        Acceleration in units of G M / r_s^2 (zero at the origin).
    """
    xi = np.atleast_2d(np.asarray(xi, dtype=float))
    nodes = _nodes(q_y, q_z, step, *t_range)
    c, w = nodes[:, :3], nodes[:, 3]
    L = math.exp(0.5 * _grid_end(step, *t_range)[1])
    phi = np.empty(len(xi))
    acc = np.empty((len(xi), 3))
    for s in range(0, len(xi), chunk):
        p = xi[s:s + chunk]
        u = np.sqrt((p * p) @ c.T)  # (n, nodes)
        phi[s:s + chunk] = -(w / (1.0 + u)).sum(axis=1)
        with np.errstate(divide="ignore", invalid="ignore"):
            f = w / (u * (1.0 + u) ** 2)
            acc[s:s + chunk] = -p * (f @ c)
        rho = np.linalg.norm(p, axis=1)
        tphi, tg = _tail(rho, L, step)
        phi[s:s + chunk] += tphi
        acc[s:s + chunk] += tg[:, None] * p
    acc[np.all(xi == 0.0, axis=1)] = 0.0
    return phi, acc


@lru_cache(maxsize=256)
def build_nodes(q_y: float, q_z: float, step: float = FAST_STEP,
                t_range: tuple[float, float] = FAST_T_RANGE) -> np.ndarray:
    """The fast form's table for :mod:`swerve.galaxy.expansion` (read-only, cached per shape).

    Depends on the shape only (the table is dimensionless), so halos that differ in mass or
    scale radius share it.  Layout: ``[n, (c_x, c_y, c_z, w) * n]``.
    """
    nodes = _nodes(float(q_y), float(q_z), step, *t_range)
    out = np.concatenate([[float(len(nodes))], nodes.ravel()])
    out.setflags(write=False)
    return out


class NFWHaloDensityFlat(Component):
    """NFW halo flattened in the density, at fixed mass inside each ellipsoid.

    ``rho = M / (4 pi q_y q_z r_s^3) / ((m/r_s)(1 + m/r_s)^2)``,
    ``m^2 = x^2 + (y/q_y)^2 + (z/q_z)^2``; ``M = m_halo`` is the spherical scale mass and the mass
    inside ellipsoidal radius m does not depend on q_y, q_z (module docstring).  The density is
    positive everywhere, unlike :class:`~swerve.galaxy.components.NFWHaloPotentialFlat`.

    Forces and potential of the compiled form come from a fixed trapezoidal quadrature of the
    ellipsoidal-shell integrals (21 nodes, 3e-6 relative in force or better, conservative); :meth:`exact_potential`
    and :meth:`exact_acceleration` evaluate the reference quadrature (~1e-14).  At
    ``q_y = q_z = 1`` both are the analytic spherical NFW halo.

    References
    ----------
    Chandrasekhar S., 1969, *Ellipsoidal Figures of Equilibrium*; Binney J., Tremaine S., 2008,
    *Galactic Dynamics*, 2nd ed., §2.5.
    """

    kind_name = "nfw_density_flattened"
    halo_flattening = "density"
    always_spherical = False
    parameters = NFWHaloPotentialFlat.parameters

    @property
    def is_spherical(self) -> bool:
        return self.values["q_y"] == 1.0 and self.values["q_z"] == 1.0

    def _compile(self):
        v = self.values
        gm, rs = units.G * v["m_halo"], v["r_s"]
        if self.is_spherical:
            return kernels.KIND_NFW_DENSITY_FLAT, [gm, rs, 0.0, rs, 1.0 / rs, 0.0], np.zeros(0)
        L = rs * math.exp(0.5 * _grid_end(FAST_STEP, *FAST_T_RANGE)[1])
        aux = build_nodes(v["q_y"], v["q_z"])
        e = FAST_STEP**2 / 48.0
        return kernels.KIND_NFW_DENSITY_FLAT, [gm, rs, 1.0, L, 1.0 / rs, e], aux

    def _ellipsoidal_radius(self, p):
        v = self.values
        return np.sqrt(p[:, 0] ** 2 + (p[:, 1] / v["q_y"]) ** 2 + (p[:, 2] / v["q_z"]) ** 2)

    def density(self, pos):
        """Mass density in Msun/kpc^3 at positions (n, 3) in kpc (infinite at the centre)."""
        p = _as_points(pos)
        v = self.values
        rho0 = v["m_halo"] / (4.0 * np.pi * v["q_y"] * v["q_z"] * v["r_s"] ** 3)
        u = self._ellipsoidal_radius(p) / v["r_s"]
        with np.errstate(divide="ignore"):
            return rho0 / (u * (1.0 + u) ** 2)

    def mass_within_ellipsoid(self, m) -> np.ndarray:
        """Mass (Msun) inside ellipsoidal radius ``m`` (kpc); independent of q_y, q_z."""
        x = np.asarray(units.to_internal(m, "length", "m"), dtype=float) / self.values["r_s"]
        return self.values["m_halo"] * (np.log1p(x) - x / (1.0 + x))

    def enclosed_mass(self, r):
        if not self.is_spherical:
            return super().enclosed_mass(r)
        return self.mass_within_ellipsoid(r)

    # --- reference quadrature ----------------------------------------------------------------
    def _exact(self, pos):
        p = _as_points(pos)
        v = self.values
        rs, gm = v["r_s"], units.G * v["m_halo"]
        phi, acc = exact_scaled(p / rs, v["q_y"], v["q_z"])
        return phi * gm / rs, acc * gm / rs**2

    def exact_potential(self, pos) -> np.ndarray:
        """Potential (km/s)^2 by the reference quadrature at positions (n, 3) in kpc."""
        return self._exact(pos)[0]

    def exact_acceleration(self, pos) -> np.ndarray:
        """Acceleration (km/s)^2/kpc by the reference quadrature; returns (n, 3)."""
        return self._exact(pos)[1]
