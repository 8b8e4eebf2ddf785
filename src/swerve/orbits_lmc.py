"""Time-dependent orbits: stars in the Galaxy perturbed by the moving LMC, with the reflex.

The static orbit engine (:mod:`swerve.orbits`) integrates in a fixed Galaxy, so an orbit's
result does not depend on when it starts.  With the LMC it does: here each orbit of a batch has
its own start time (a launch epoch, Myr before the present, negative) and end time, and is
integrated in the Galactic Centre's (non-inertial) frame under

    a(x, t) = a_MW(x) - grad Phi_L(x - X(t)) - A_0(t),

``a_MW`` the static Galaxy's force (the compiled kernels of :mod:`swerve.galaxy.kernels`),
``Phi_L`` the LMC's Hernquist potential about its tabulated position ``X(t)`` relative to the
Galactic Centre, and ``A_0 = -grad Phi_L(-X(t))`` the LMC's pull on the Galactic Centre
(the Milky Way is rigid; without the reflex ``A_0 = 0``).  ``X(t)`` is the quintic Hermite
interpolant of the track's positions, velocities and accelerations (:class:`LMCTrack
<swerve.galaxy.lmc.LMCTrack>`, C^2 across grid nodes), and ``A_0`` is computed from it, so the
frame's acceleration is the LMC's pull on the centre exactly.

Method
------
* **Stepper**: DOP853 (Hairer, Norsett & Wanner 1993, §II.10) with stage times ``t + c_i h``,
  coefficients read from ``scipy.integrate._ivp.dop853_coefficients``; the same error norm,
  step control and first-step rule as :mod:`swerve.orbits` (position and velocity errors each
  relative to the size of r and v), the same default tolerances.  One orbit at a time per
  thread (no SIMD lanes), parallel over orbits with numba ``prange``.
* **Energy-like check**: in a time-dependent potential ``E = v^2/2 + Phi(x, t)`` changes by
  ``int dPhi/dt dt`` along the path, with ``Phi = Phi_MW(x) + Phi_L(x - X(t)) + A_0(t) . x``
  (the last term the potential of the frame's fictitious force).  The integral is carried
  along with the stepper's own quadrature (its weights ``b_i`` on the stage values of
  ``dPhi/dt``, as for an extra state component), so ``J = E - int dPhi/dt dt`` is a constant of
  the exact solution; ``energy_error = |J(t_end) - J(t_0)| / |Phi_MW(x_0)|``.
* **Closest approaches**, to the Galactic Centre and to the LMC's centre: at each accepted step
  the sign of ``d . d_dot`` (``d`` the offset from the centre) is checked at both ends and a
  change is located by bisection on the step's quintic Hermite interpolant (of x, v and a at
  both ends, no extra force evaluations) and on the track's interpolant.  With each closest
  approach to the Galactic Centre the running integral ``W = int dPhi/dt dt`` is kept (linear
  within the step), so the energy there is ``E(t0) + W`` (``LMCOrbitResult.w_r_min``).
* **Early stops** (off by default; :func:`integrate_lmc`'s ``r_stop`` and ``no_return``, used
  by ``swerve trace --lmc``), checked at the end of each accepted step:

  - *the Galactic Centre passed*: the path has come within ``r_stop`` of the Galactic Centre
    (the closest approach so far, between steps included) and is outside that sphere again;
  - *no return*: the path recedes from the Galactic Centre and from the LMC's centre in the
    direction of integration (``sign(dt) x . v > 0`` and ``sign(dt) d . d_dot > 0``), and is
    unbound from both: ``v^2/2 + Phi_MW(x) > 0`` (the static Galaxy) and
    ``|d_dot|^2/2 - G m_lmc / (|d| + a_lmc) > 0``.  In the static Galaxy alone (spherical) such
    a path never comes back; with the LMC's tide and the frame's acceleration it is an
    approximation, checked against full integration in tests/test_trace_lmc.py and
    benchmarks/RESULTS.md ("Trace with the LMC").  Bound paths are never stopped by it, nor
    paths that have been within ``r_stop`` (they stop on leaving that sphere).

  An orbit stopped early has status :data:`swerve.orbits.STATUS_STOPPED` and its reason in
  ``LMCOrbitResult.stop_reason``; its closest approaches are those of the integrated part.
* **Failures** are flagged in ``status`` (codes of :mod:`swerve.orbits`), never silent.

Units: kpc, km/s, Myr at the public boundary; inside, time in ``kpc/(km/s)``.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numba as nb
import numpy as np
from numba import prange
from scipy.integrate._ivp import dop853_coefficients as _dc

from . import units
from .galaxy import Galaxy, kernels
from .galaxy.lmc import LMCTrack, hernquist_acceleration, hernquist_potential, lmc_orbit
from .orbits import (
    DEFAULT_ATOL,
    DEFAULT_MAX_STEPS,
    DEFAULT_RTOL,
    STATUS_MAX_STEPS,
    STATUS_NON_FINITE,
    STATUS_OK,
    STATUS_STEP_UNDERFLOW,
    STATUS_STOPPED,
    OrbitFailureWarning,
    OrbitIntegrationError,
    as_vectors,
    failure_summary,
)
from .vocabulary import DEFAULT_LMC_RADIUS

__all__ = [
    "DEFAULT_LMC_RADIUS",
    "LMCEncounter",
    "LMCOrbitResult",
    "STOP_GC",
    "STOP_NONE",
    "STOP_NO_RETURN",
    "frame_potential",
    "integrate_lmc",
    "lmc_encounter",
    "lmc_origin_stats",
    "stop_names",
]


_NS = 12
_A = np.ascontiguousarray(_dc.A[:_NS, :_NS], dtype=np.float64)
_B = np.ascontiguousarray(_dc.B, dtype=np.float64)
_C = np.ascontiguousarray(_dc.C[:_NS], dtype=np.float64)
_E3 = np.ascontiguousarray(_dc.E3, dtype=np.float64)
_E5 = np.ascontiguousarray(_dc.E5, dtype=np.float64)

_FLAGS = dict(cache=True, error_model="numpy", fastmath={"contract"})
_inline = nb.njit(**_FLAGS)

# result columns
_F_T, _F_DE, _F_RMIN, _F_TRMIN, _F_DMIN, _F_TDMIN, _F_VREL, _F_WRMIN, _F_RMAX = 0, 1, 2, 3, 4, 5, 6, 7, 8
_NF = 9
_I_STATUS, _I_STEPS, _I_REJ, _I_FORCE, _I_STOP = 0, 1, 2, 3, 4
_NI = 5
# stop settings (the kernel's ``stop`` array): radius about the Galactic Centre (inf: off) and
# the no-return rule (1.0: on)
_S_RGC, _S_NORETURN = 0, 1

#: Why an orbit stopped early (``LMCOrbitResult.stop_reason``): not at all (it reached its end
#: time, or failed), after a passage within ``r_stop`` of the Galactic Centre, or by the
#: no-return rule.
STOP_NONE, STOP_GC, STOP_NO_RETURN = 0, 1, 2
stop_names = {STOP_NONE: "not stopped early", STOP_GC: "passed the Galactic Centre",
              STOP_NO_RETURN: "receding, unbound, from both centres"}


@_inline
def _hermite_weights(th, h):
    """Quintic Hermite weights at fraction ``th`` of an interval of length ``h``: of the value
    (h0..h5) and of the derivative (g0..g5), for (x0, x0', x0'', x1, x1', x1'')."""
    t2 = th * th
    t3 = t2 * th
    t4 = t3 * th
    t5 = t4 * th
    h0 = 1.0 - 10.0 * t3 + 15.0 * t4 - 6.0 * t5
    h1 = (th - 6.0 * t3 + 8.0 * t4 - 3.0 * t5) * h
    h2 = 0.5 * (t2 - 3.0 * t3 + 3.0 * t4 - t5) * h * h
    h3 = 10.0 * t3 - 15.0 * t4 + 6.0 * t5
    h4 = (-4.0 * t3 + 7.0 * t4 - 3.0 * t5) * h
    h5 = 0.5 * (t3 - 2.0 * t4 + t5) * h * h
    g0 = (-30.0 * t2 + 60.0 * t3 - 30.0 * t4) / h
    g1 = 1.0 - 18.0 * t2 + 32.0 * t3 - 15.0 * t4
    g2 = 0.5 * (2.0 * th - 9.0 * t2 + 12.0 * t3 - 5.0 * t4) * h
    g3 = (30.0 * t2 - 60.0 * t3 + 30.0 * t4) / h
    g4 = -12.0 * t2 + 28.0 * t3 - 15.0 * t4
    g5 = 0.5 * (3.0 * t2 - 8.0 * t3 + 5.0 * t4) * h
    return h0, h1, h2, h3, h4, h5, g0, g1, g2, g3, g4, g5


@_inline
def _track(table, tp, t):
    """LMC position and velocity relative to the Galactic Centre at internal time ``t``:
    quintic Hermite on the grid cell holding ``t`` (clamped to the grid)."""
    n = table.shape[0]
    h = tp[1]
    u = (t - tp[0]) / h
    i = int(math.floor(u))
    if i < 0:
        i = 0
    if i > n - 2:
        i = n - 2
    th = u - i
    h0, h1, h2, h3, h4, h5, g0, g1, g2, g3, g4, g5 = _hermite_weights(th, h)
    a = table[i]
    b = table[i + 1]
    X = h0 * a[0] + h1 * a[3] + h2 * a[6] + h3 * b[0] + h4 * b[3] + h5 * b[6]
    Y = h0 * a[1] + h1 * a[4] + h2 * a[7] + h3 * b[1] + h4 * b[4] + h5 * b[7]
    Z = h0 * a[2] + h1 * a[5] + h2 * a[8] + h3 * b[2] + h4 * b[5] + h5 * b[8]
    VX = g0 * a[0] + g1 * a[3] + g2 * a[6] + g3 * b[0] + g4 * b[3] + g5 * b[6]
    VY = g0 * a[1] + g1 * a[4] + g2 * a[7] + g3 * b[1] + g4 * b[4] + g5 * b[7]
    VZ = g0 * a[2] + g1 * a[5] + g2 * a[8] + g3 * b[2] + g4 * b[5] + g5 * b[8]
    return X, Y, Z, VX, VY, VZ


@_inline
def _frame_accel(tp, X, Y, Z, VX, VY, VZ):
    """The Galactic Centre's acceleration A_0 = -grad Phi_L(-X) and its time derivative."""
    gm = tp[2] * tp[4]
    a = tp[3]
    r = math.sqrt(X * X + Y * Y + Z * Z)
    if r == 0.0 or gm == 0.0:
        return 0.0, 0.0, 0.0, 0.0, 0.0, 0.0
    ra = r + a
    f = -gm / (r * ra * ra)
    # A_0 = f(r) d with d = -X; d_dot = -V; df/dr = gm (1/(r^2 ra^2) + 2/(r ra^3))
    dfdr = gm * (1.0 / (r * r * ra * ra) + 2.0 / (r * ra * ra * ra))
    rdot = (X * VX + Y * VY + Z * VZ) / r
    return (-f * X, -f * Y, -f * Z,
            -f * VX - X * dfdr * rdot, -f * VY - Y * dfdr * rdot, -f * VZ - Z * dfdr * rdot)


@_inline
def _force(kinds, pars, aux, table, tp, x, y, z, t):
    """Acceleration in the Galactic Centre's frame and dPhi/dt at (x, t)."""
    ax, ay, az = kernels.accel(kinds, pars, aux, x, y, z)
    X, Y, Z, VX, VY, VZ = _track(table, tp, t)
    dx = x - X
    dy = y - Y
    dz = z - Z
    r = math.sqrt(dx * dx + dy * dy + dz * dz)
    gm = tp[2]
    if r > 0.0 and gm != 0.0:
        ra = r + tp[3]
        f = -gm / (r * ra * ra)
    else:
        f = 0.0
    lx = f * dx
    ly = f * dy
    lz = f * dz
    A0x, A0y, A0z, J0x, J0y, J0z = _frame_accel(tp, X, Y, Z, VX, VY, VZ)
    dphidt = lx * VX + ly * VY + lz * VZ + J0x * x + J0y * y + J0z * z
    return ax + lx - A0x, ay + ly - A0y, az + lz - A0z, dphidt


@_inline
def _potential(kinds, pars, aux, table, tp, x, y, z, t):
    """Phi_MW(x) + Phi_L(x - X(t)) + A_0(t) . x, and Phi_MW(x) alone."""
    phi_mw = kernels.potential(kinds, pars, aux, x, y, z)
    X, Y, Z, VX, VY, VZ = _track(table, tp, t)
    dx = x - X
    dy = y - Y
    dz = z - Z
    r = math.sqrt(dx * dx + dy * dy + dz * dz)
    A0x, A0y, A0z, _a, _b, _c = _frame_accel(tp, X, Y, Z, VX, VY, VZ)
    return phi_mw - tp[2] / (r + tp[3]) + A0x * x + A0y * y + A0z * z, phi_mw


@_inline
def _hermite_state(s0, s1, acc0, acc1, h, th, out):
    """Quintic Hermite of position (out[0:3]) and velocity (out[3:6]) on a step."""
    h0, h1, h2, h3, h4, h5, g0, g1, g2, g3, g4, g5 = _hermite_weights(th, h)
    for k in range(3):
        out[k] = h0 * s0[k] + h1 * s0[3 + k] + h2 * acc0[k] + h3 * s1[k] + h4 * s1[3 + k] + h5 * acc1[k]
        out[3 + k] = (g0 * s0[k] + g1 * s0[3 + k] + g2 * acc0[k] + g3 * s1[k] + g4 * s1[3 + k]
                      + g5 * acc1[k])


@_inline
def _offset_g(table, tp, s0, s1, acc0, acc1, t, h, th, lmc, tmp):
    """d . d_dot and |d|^2 and |d_dot| at fraction th of the step, for the offset d from the
    Galactic Centre (lmc False) or from the LMC's centre (lmc True)."""
    _hermite_state(s0, s1, acc0, acc1, h, th, tmp)
    if lmc:
        X, Y, Z, VX, VY, VZ = _track(table, tp, t + th * h)
        tmp[0] -= X
        tmp[1] -= Y
        tmp[2] -= Z
        tmp[3] -= VX
        tmp[4] -= VY
        tmp[5] -= VZ
    g = tmp[0] * tmp[3] + tmp[1] * tmp[4] + tmp[2] * tmp[5]
    d2 = tmp[0] * tmp[0] + tmp[1] * tmp[1] + tmp[2] * tmp[2]
    w = math.sqrt(tmp[3] * tmp[3] + tmp[4] * tmp[4] + tmp[5] * tmp[5])
    return g, d2, w


@_inline
def _closest(table, tp, s0, s1, acc0, acc1, t, h, lmc, best, tmp, W, dW):
    """Update best = [d_min, t_min, speed, W] with the step's ends and any minimum inside it
    (W: the running integral of dPhi/dt, ``W`` at the step's start and ``W + dW`` at its end,
    linear in between)."""
    g0, d0, w0 = _offset_g(table, tp, s0, s1, acc0, acc1, t, h, 0.0, lmc, tmp)
    g1, d1, w1 = _offset_g(table, tp, s0, s1, acc0, acc1, t, h, 1.0, lmc, tmp)
    if d1 < best[0] * best[0]:
        best[0] = math.sqrt(d1)
        best[1] = t + h
        best[2] = w1
        best[3] = W + dW
    if d0 < best[0] * best[0]:
        best[0] = math.sqrt(d0)
        best[1] = t
        best[2] = w0
        best[3] = W
    if g0 * g1 < 0.0:
        lo = 0.0
        hi = 1.0
        glo = g0
        for _ in range(48):
            mid = 0.5 * (lo + hi)
            gm_, _d, _w = _offset_g(table, tp, s0, s1, acc0, acc1, t, h, mid, lmc, tmp)
            if (gm_ < 0.0) == (glo < 0.0):
                lo = mid
                glo = gm_
            else:
                hi = mid
        th = 0.5 * (lo + hi)
        _g, dm, wm = _offset_g(table, tp, s0, s1, acc0, acc1, t, h, th, lmc, tmp)
        if dm < best[0] * best[0]:
            best[0] = math.sqrt(dm)
            best[1] = t + th * h
            best[2] = wm
            best[3] = W + th * dW


@nb.njit(**_FLAGS)
def _integrate_one(kinds, pars, aux, table, tp, y0, t0, t1, stop, rtol, atol, max_steps, y_out, res_f,
                   res_i):
    A = _A
    B = _B
    C = _C
    E3 = _E3
    E5 = _E5
    kx = np.empty((13, 3))  # velocities at the stages
    ka = np.empty((13, 3))  # accelerations at the stages
    kw = np.empty(13)       # dPhi/dt at the stages
    s0 = np.empty(6)
    s1 = np.empty(6)
    acc0 = np.empty(3)
    acc1 = np.empty(3)
    tmp = np.empty(6)
    best_gc = np.empty(4)
    best_l = np.empty(4)
    for k in range(6):
        s0[k] = y0[k]
    t = t0
    ax, ay, az, w0 = _force(kinds, pars, aux, table, tp, s0[0], s0[1], s0[2], t)
    n_force = 1
    acc0[0] = ax
    acc0[1] = ay
    acc0[2] = az
    phi0, phimw0 = _potential(kinds, pars, aux, table, tp, s0[0], s0[1], s0[2], t)
    J0 = 0.5 * (s0[3] * s0[3] + s0[4] * s0[4] + s0[5] * s0[5]) + phi0
    W = 0.0
    best_gc[0] = np.inf
    best_l[0] = np.inf
    best_gc[1] = t
    best_l[1] = t
    best_gc[2] = 0.0
    best_l[2] = 0.0
    best_gc[3] = 0.0
    best_l[3] = 0.0
    r_max = math.sqrt(s0[0] * s0[0] + s0[1] * s0[1] + s0[2] * s0[2])
    r_stop = stop[_S_RGC]
    no_return = stop[_S_NORETURN] != 0.0
    stop_reason = 0
    status = STATUS_OK
    n_steps = 0
    n_rej = 0
    span = t1 - t0
    direction = 1.0 if span >= 0.0 else -1.0
    # first step from the local dynamical time (as swerve.orbits)
    r = math.sqrt(s0[0] * s0[0] + s0[1] * s0[1] + s0[2] * s0[2])
    v = math.sqrt(s0[3] * s0[3] + s0[4] * s0[4] + s0[5] * s0[5])
    a = math.sqrt(ax * ax + ay * ay + az * az)
    tdyn = np.inf
    if v > 0.0:
        tdyn = min(tdyn, max(r, 1e-6) / v)
        if a > 0.0:
            tdyn = min(tdyn, v / a)
    if a > 0.0:
        tdyn = min(tdyn, math.sqrt(max(r, 1e-6) / a))
    if not math.isfinite(tdyn):
        tdyn = abs(span)
    h = min(rtol ** 0.125 * tdyn, abs(span))
    rejected_last = False
    if span != 0.0:
        while True:
            remaining = t1 - t
            if abs(remaining) <= 1e-14 * max(abs(t1), abs(t0), 1e-3):
                break
            if n_steps + n_rej >= max_steps:
                status = STATUS_MAX_STEPS
                break
            last = h >= abs(remaining)
            hs = remaining if last else direction * h
            if not last and h <= 1e-13 * max(abs(t), 1e-3):
                status = STATUS_STEP_UNDERFLOW
                break
            # stages
            for k in range(3):
                kx[0, k] = s0[3 + k]
                ka[0, k] = acc0[k]
            kw[0] = w0
            for s in range(1, _NS):
                px = s0[0]
                py = s0[1]
                pz = s0[2]
                vx = s0[3]
                vy = s0[4]
                vz = s0[5]
                for j in range(s):
                    c = hs * A[s, j]
                    if c != 0.0:
                        px += c * kx[j, 0]
                        py += c * kx[j, 1]
                        pz += c * kx[j, 2]
                        vx += c * ka[j, 0]
                        vy += c * ka[j, 1]
                        vz += c * ka[j, 2]
                kx[s, 0] = vx
                kx[s, 1] = vy
                kx[s, 2] = vz
                gx, gy, gz, gw = _force(kinds, pars, aux, table, tp, px, py, pz, t + C[s] * hs)
                ka[s, 0] = gx
                ka[s, 1] = gy
                ka[s, 2] = gz
                kw[s] = gw
            for k in range(6):
                s1[k] = s0[k]
            dW = 0.0
            for j in range(_NS):
                c = hs * B[j]
                if c != 0.0:
                    for k in range(3):
                        s1[k] += c * kx[j, k]
                        s1[3 + k] += c * ka[j, k]
                    dW += c * kw[j]
            gx, gy, gz, gw = _force(kinds, pars, aux, table, tp, s1[0], s1[1], s1[2], t + hs)
            n_force += _NS
            ka[12, 0] = gx
            ka[12, 1] = gy
            ka[12, 2] = gz
            kx[12, 0] = s1[3]
            kx[12, 1] = s1[4]
            kx[12, 2] = s1[5]
            kw[12] = gw
            # error norm (as swerve.orbits)
            e5x = 0.0
            e5v = 0.0
            e3x = 0.0
            e3v = 0.0
            for k in range(3):
                ex5 = 0.0
                ev5 = 0.0
                ex3 = 0.0
                ev3 = 0.0
                for j in range(13):
                    ex5 += E5[j] * kx[j, k]
                    ev5 += E5[j] * ka[j, k]
                    ex3 += E3[j] * kx[j, k]
                    ev3 += E3[j] * ka[j, k]
                e5x += ex5 * ex5
                e5v += ev5 * ev5
                e3x += ex3 * ex3
                e3v += ev3 * ev3
            r0 = math.sqrt(s0[0] * s0[0] + s0[1] * s0[1] + s0[2] * s0[2])
            r1 = math.sqrt(s1[0] * s1[0] + s1[1] * s1[1] + s1[2] * s1[2])
            v0 = math.sqrt(s0[3] * s0[3] + s0[4] * s0[4] + s0[5] * s0[5])
            v1 = math.sqrt(s1[3] * s1[3] + s1[4] * s1[4] + s1[5] * s1[5])
            sx = atol + rtol * max(r0, r1)
            sv = atol + rtol * max(v0, v1)
            e5 = e5x / (sx * sx) + e5v / (sv * sv)
            e3 = e3x / (sx * sx) + e3v / (sv * sv)
            deno = e5 + 0.01 * e3
            err = abs(hs) * e5 / math.sqrt(2.0 * deno) if deno > 0.0 else 0.0
            if not math.isfinite(err):
                status = STATUS_NON_FINITE
                break
            if err <= 1.0:
                acc1[0] = gx
                acc1[1] = gy
                acc1[2] = gz
                _closest(table, tp, s0, s1, acc0, acc1, t, hs, False, best_gc, tmp, W, dW)
                _closest(table, tp, s0, s1, acc0, acc1, t, hs, True, best_l, tmp, W, dW)
                t = t1 if last else t + hs
                for k in range(6):
                    s0[k] = s1[k]
                for k in range(3):
                    acc0[k] = acc1[k]
                w0 = gw
                W += dW
                n_steps += 1
                r1 = math.sqrt(s0[0] * s0[0] + s0[1] * s0[1] + s0[2] * s0[2])
                if r1 > r_max:
                    r_max = r1
                if last:
                    break
                # early stops (module docstring, "Early stops")
                if best_gc[0] < r_stop and r1 > r_stop:
                    stop_reason = 1
                elif (no_return and best_gc[0] >= r_stop
                      and direction * (s0[0] * s0[3] + s0[1] * s0[4] + s0[2] * s0[5]) > 0.0):
                    X, Y, Z, VX, VY, VZ = _track(table, tp, t)
                    dx = s0[0] - X
                    dy = s0[1] - Y
                    dz = s0[2] - Z
                    dvx = s0[3] - VX
                    dvy = s0[4] - VY
                    dvz = s0[5] - VZ
                    if direction * (dx * dvx + dy * dvy + dz * dvz) > 0.0:
                        v2 = s0[3] * s0[3] + s0[4] * s0[4] + s0[5] * s0[5]
                        e_mw = 0.5 * v2 + kernels.potential(kinds, pars, aux, s0[0], s0[1], s0[2])
                        d1 = math.sqrt(dx * dx + dy * dy + dz * dz)
                        e_l = 0.5 * (dvx * dvx + dvy * dvy + dvz * dvz) - tp[2] / (d1 + tp[3])
                        if e_mw > 0.0 and e_l > 0.0:
                            stop_reason = 2
                if stop_reason != 0:
                    status = STATUS_STOPPED
                    break
                fac = 10.0 if err == 0.0 else min(10.0, max(0.2, 0.9 * err ** -0.125))
                if rejected_last:
                    fac = min(fac, 1.0)
                h = h * fac
                rejected_last = False
            else:
                n_rej += 1
                h = h * max(0.2, 0.9 * err ** -0.125)
                rejected_last = True
    phi1, _p = _potential(kinds, pars, aux, table, tp, s0[0], s0[1], s0[2], t)
    J1 = 0.5 * (s0[3] * s0[3] + s0[4] * s0[4] + s0[5] * s0[5]) + phi1 - W
    scale = abs(phimw0) if phimw0 != 0.0 else abs(J0)
    de = abs(J1 - J0) / scale if scale > 0.0 else 0.0
    if status <= STATUS_STOPPED and not math.isfinite(de):
        status = STATUS_NON_FINITE
    for k in range(6):
        y_out[k] = s0[k]
    res_f[_F_T] = t
    res_f[_F_DE] = de
    res_f[_F_RMIN] = best_gc[0]
    res_f[_F_TRMIN] = best_gc[1]
    res_f[_F_DMIN] = best_l[0]
    res_f[_F_TDMIN] = best_l[1]
    res_f[_F_VREL] = best_l[2]
    res_f[_F_WRMIN] = best_gc[3]
    res_f[_F_RMAX] = r_max
    res_i[_I_STATUS] = status
    res_i[_I_STEPS] = n_steps
    res_i[_I_REJ] = n_rej
    res_i[_I_FORCE] = n_force
    res_i[_I_STOP] = stop_reason


@nb.njit(parallel=True, **_FLAGS)
def integrate_lmc_kernel(kinds, pars, aux, table, tp, y0, t0, t1, stop, rtol, atol, max_steps,
                         y_out, res_f, res_i):
    """Integrate orbits ``y0`` (n, 6) from internal times ``t0`` (n,) to ``t1`` (n,) in the
    LMC-perturbed Galaxy, in parallel, with the early stops ``stop`` = [radius about the Galactic
    Centre (inf: off), no-return rule (1.0: on)]; results into
    ``y_out`` (n, 6), ``res_f`` (n, 9), ``res_i`` (n, 5)."""
    for i in prange(y0.shape[0]):
        _integrate_one(kinds, pars, aux, table, tp, y0[i], t0[i], t1[i], stop, rtol, atol, max_steps,
                       y_out[i], res_f[i], res_i[i])


# --------------------------------------------------------------------------------------------
# Python API
@dataclass
class LMCOrbitResult:
    """Result of :func:`integrate_lmc` (plain arrays; kpc, km/s, Myr).

    Attributes
    ----------
    t0, t_final : arrays (n,)
        Start time and time reached (the end time, or the last good step of a failed orbit).
    pos, vel : arrays (n, 3)
        State at ``t_final`` in the Galactic Centre's frame.
    status : int array (n,)
        :data:`swerve.orbits.STATUS_OK` or a failure code (:data:`swerve.orbits.status_names`).
    n_steps, n_rejected, n_force : int arrays (n,)
    energy_error : array (n,)
        ``|J(t_final) - J(t0)| / |Phi_MW(x0)|`` with ``J = E - int dPhi/dt dt`` (module docstring).
    r_min, t_r_min : arrays (n,)
        Closest approach to the Galactic Centre (kpc) and its time (Myr).
    d_lmc_min, t_d_lmc_min : arrays (n,)
        Closest approach to the LMC's centre (kpc) and its time (Myr).
    v_rel_lmc : array (n,)
        Speed relative to the LMC's centre at that closest approach, km/s.
    rtol, atol : float
    track : dict
        Provenance of the LMC track (:meth:`LMCTrack.to_dict`).
    w_r_min : array (n,)
        ``W = int_0^t dPhi/dt dt`` ((km/s)^2, along the path from its start) at the closest
        approach to the Galactic Centre, so that the specific energy there is
        ``E(t0) + w_r_min`` (module docstring, "Energy-like check").
    r_max : array (n,)
        Largest Galactocentric radius at the accepted steps, kpc.
    stop_reason : int array (n,)
        :data:`STOP_NONE`, :data:`STOP_GC` or :data:`STOP_NO_RETURN`
        (:data:`stop_names`); an orbit stopped early has status :data:`swerve.orbits.STATUS_STOPPED`.
    """

    t0: np.ndarray
    t_final: np.ndarray
    pos: np.ndarray
    vel: np.ndarray
    status: np.ndarray
    n_steps: np.ndarray
    n_rejected: np.ndarray
    n_force: np.ndarray
    energy_error: np.ndarray
    r_min: np.ndarray
    t_r_min: np.ndarray
    d_lmc_min: np.ndarray
    t_d_lmc_min: np.ndarray
    v_rel_lmc: np.ndarray
    rtol: float
    atol: float
    track: dict
    w_r_min: np.ndarray | None = None
    r_max: np.ndarray | None = None
    stop_reason: np.ndarray | None = None

    @property
    def ok(self) -> np.ndarray:
        return self.status <= STATUS_STOPPED

    @property
    def n_orbits(self) -> int:
        return int(self.status.shape[0])

    def failure_summary(self) -> str:
        """One line counting the failed orbits by kind ('' when none failed)."""
        return failure_summary(self.status)


def _vectors(value, kind, name, n=None):
    """(n, 3) finite vectors in internal units (swerve.orbits.as_vectors), C-contiguous for the kernel."""
    return np.ascontiguousarray(as_vectors(value, kind, name, n))


def _stop_radius(value, name):
    """A stop radius in kpc (inf when None)."""
    if value is None:
        return math.inf
    v = units.to_internal(value, "length", name)
    if isinstance(v, bool) or not isinstance(v, (int, float)) or math.isnan(v) or v <= 0:
        raise ValueError(f"{name}: expected a positive radius in kpc, got {value!r}")
    return float(v)


def _times(value, name, n, track):
    arr = np.asarray(units.to_internal(value, "time", name), dtype=float)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape != (n,):
        raise ValueError(f"{name}: expected a scalar or an array of shape ({n},), got shape {arr.shape}")
    bad = ~np.isfinite(arr) | (arr < track.t[0] - 1e-9) | (arr > track.t[-1] + 1e-9)
    if np.any(bad):
        i = int(np.flatnonzero(bad)[0])
        raise ValueError(
            f"{name}: row {i} is {arr[i]!r} Myr, outside the LMC track [{track.t[0]:g}, "
            f"{track.t[-1]:g}] Myr; make the track with lmc_orbit(..., t_min=...) reaching it")
    return np.clip(arr, track.t[0], track.t[-1])


def integrate_lmc(galaxy, track: LMCTrack, pos0, vel0, t0, t_end=0.0, *, r_stop=None, no_return=False, rtol=DEFAULT_RTOL, atol=DEFAULT_ATOL, max_steps=DEFAULT_MAX_STEPS,
                  on_failure="warn") -> LMCOrbitResult:
    """Integrate a batch of orbits in the LMC-perturbed Galaxy, each from its own start time.

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
        The static Milky Way (the same one the track was made in, for a consistent model).
    track : swerve.galaxy.lmc.LMCTrack
        The LMC's tabulated orbit (:func:`swerve.galaxy.lmc.lmc_orbit`).
    pos0 : array (n, 3) or (3,), kpc (Quantity accepted)
        Start positions in the Galactic Centre's frame.
    vel0 : array (n, 3) or (3,), km/s (Quantity accepted)
        Start velocities.
    t0 : float or array (n,), Myr (Quantity accepted)
        Start time of each orbit (a launch epoch: negative, before the present), within the track.
    t_end : float or array (n,), Myr
        End time of each orbit (default 0, the present); earlier than ``t0`` integrates backward.
    r_stop : float or Quantity ['length'], optional
        Stop an orbit once it has come within ``r_stop`` kpc of the Galactic Centre and is
        outside it again (checked at accepted steps; module docstring, "Early stops").
    no_return : bool
        Stop an orbit once it recedes from both centres, unbound from both (module docstring).
    rtol, atol : float
        Tolerances of the error norm (as :func:`swerve.orbits.integrate`).
    max_steps : int
        Cap on step attempts per orbit.
    on_failure : {"warn", "raise", "ignore"}

    Returns
    -------
    LMCOrbitResult

    Examples
    --------
    >>> from swerve.galaxy import Galaxy
    >>> from swerve.galaxy.lmc import lmc_orbit
    >>> g = Galaxy.default()
    >>> tr = lmc_orbit(g, t_min=-300.0)
    >>> res = integrate_lmc(g, tr, [0.003, 0.0, 0.0], [1500.0, 0.0, 0.0], -200.0)
    >>> bool(res.ok[0]), bool(res.energy_error[0] < 1e-9)
    (True, True)
    """
    if on_failure not in ("warn", "raise", "ignore"):
        raise ValueError(f"on_failure: expected 'warn', 'raise' or 'ignore', got {on_failure!r}")
    if not isinstance(track, LMCTrack):
        raise ValueError(f"track: expected a swerve.galaxy.lmc.LMCTrack, got {type(track).__name__}")
    pos0 = _vectors(pos0, "length", "pos0")
    n = pos0.shape[0]
    vel0 = _vectors(vel0, "velocity", "vel0", n)
    t0_myr = _times(t0, "t0", n, track)
    t1_myr = _times(t_end, "t_end", n, track)
    rtol = float(rtol)
    atol = float(atol)
    if not (math.isfinite(rtol) and rtol >= 1e-15):
        raise ValueError(f"rtol: expected a finite relative tolerance >= 1e-15, got {rtol}")
    if not (math.isfinite(atol) and atol > 0.0):
        raise ValueError(f"atol: expected a finite positive absolute tolerance, got {atol}")
    if isinstance(max_steps, bool) or int(max_steps) != max_steps or max_steps < 1:
        raise ValueError(f"max_steps: expected a positive integer, got {max_steps!r}")
    stop = np.array([_stop_radius(r_stop, "r_stop"), 1.0 if no_return else 0.0])
    kinds, pars, aux = galaxy.kernel_args
    table, tp = track.kernel_args()
    y0 = np.ascontiguousarray(np.concatenate([pos0, vel0], axis=1))
    y_out = np.empty((n, 6))
    res_f = np.empty((n, _NF))
    res_i = np.empty((n, _NI), dtype=np.int64)
    if n:
        with nb.parallel_chunksize(1):
            integrate_lmc_kernel(kinds, pars, aux, table, tp, y0,
                                 np.ascontiguousarray(units.myr_to_internal(t0_myr)),
                                 np.ascontiguousarray(units.myr_to_internal(t1_myr)), stop,
                                 rtol, atol, int(max_steps), y_out, res_f, res_i)
    res = LMCOrbitResult(
        t0=t0_myr, t_final=units.internal_to_myr(res_f[:, _F_T]), pos=y_out[:, :3], vel=y_out[:, 3:],
        status=res_i[:, _I_STATUS].copy(), n_steps=res_i[:, _I_STEPS].copy(),
        n_rejected=res_i[:, _I_REJ].copy(), n_force=res_i[:, _I_FORCE].copy(),
        energy_error=res_f[:, _F_DE].copy(), r_min=res_f[:, _F_RMIN].copy(),
        t_r_min=units.internal_to_myr(res_f[:, _F_TRMIN]), d_lmc_min=res_f[:, _F_DMIN].copy(),
        t_d_lmc_min=units.internal_to_myr(res_f[:, _F_TDMIN]), v_rel_lmc=res_f[:, _F_VREL].copy(),
        rtol=rtol, atol=atol, track=track.to_dict(), w_r_min=res_f[:, _F_WRMIN].copy(),
        r_max=res_f[:, _F_RMAX].copy(), stop_reason=res_i[:, _I_STOP].copy(),
    )
    msg = res.failure_summary()
    if msg:
        msg += "; see LMCOrbitResult.status (failed orbits keep their last good state)"
        if on_failure == "raise":
            raise OrbitIntegrationError(msg)
        if on_failure == "warn":
            warnings.warn(msg, OrbitFailureWarning, stacklevel=2)
    return res


# --------------------------------------------------------------------------------------------
# the LMC as a second origin
@dataclass
class LMCEncounter:
    """Closest approaches of back-integrated paths to the LMC's centre (and to the Galactic
    Centre, in the same LMC-perturbed Galaxy).  Per-star arrays (n,), per-sample (n, k); kpc,
    km/s, Myr.

    Attributes
    ----------
    p_lmc : array (n,)
        Weighted fraction of the usable paths that pass within ``radius`` of the LMC's centre.
    n_pass : int array (n,)
    d_min : array (n,)
        Weighted median closest approach to the LMC's centre.
    t_flight, t_flight_lo, t_flight_hi : arrays (n,)
        Weighted median, 16th and 84th percentiles of the time since the closest approach of the
        passing paths (NaN where none passes).
    v_ejection, v_ejection_lo, v_ejection_hi : arrays (n,)
        The same for the speed relative to the LMC's centre at the closest approach.
    p_gc : array (n,)
        Weighted fraction of the usable paths passing within ``radius_gc`` of the Galactic
        Centre in the LMC-perturbed Galaxy.
    n_failed : int array (n,)
    weights : array (n, k)
        Normalised weights (0 for left-out paths).
    sample_d_min, sample_t_d_min, sample_v_rel : arrays (n, k)
        Closest approach to the LMC's centre, its time (negative), relative speed there.
    sample_r_min, sample_t_r_min : arrays (n, k)
        Closest approach to the Galactic Centre and its time.
    sample_pass, usable : bool arrays (n, k)
    meta : dict
    """

    p_lmc: np.ndarray
    n_pass: np.ndarray
    d_min: np.ndarray
    t_flight: np.ndarray
    t_flight_lo: np.ndarray
    t_flight_hi: np.ndarray
    v_ejection: np.ndarray
    v_ejection_lo: np.ndarray
    v_ejection_hi: np.ndarray
    p_gc: np.ndarray
    n_failed: np.ndarray
    weights: np.ndarray
    sample_d_min: np.ndarray
    sample_t_d_min: np.ndarray
    sample_v_rel: np.ndarray
    sample_r_min: np.ndarray
    sample_t_r_min: np.ndarray
    sample_pass: np.ndarray
    usable: np.ndarray
    meta: dict


def frame_potential(galaxy, track: LMCTrack, x, t) -> np.ndarray:
    """The potential whose time derivative the engine integrates, ``Phi_MW(x) + Phi_L(x - X(t))
    + A_0(t) . x`` ((km/s)^2; module docstring), at positions ``x`` (m, 3) kpc in the Galactic
    Centre's frame and times ``t`` (m,) Myr within the track.  With ``W`` of
    :class:`LMCOrbitResult` the specific energy ``v^2/2 + frame_potential`` at time ``t`` equals
    its value at the start plus ``W``."""
    x = np.asarray(x, dtype=float)
    X, _ = track.interpolate(np.broadcast_to(np.asarray(t, dtype=float), x.shape[:-1]))
    gm, a = track.lmc.gm, track.lmc.a_lmc
    phi = galaxy.potential(x.reshape(-1, 3)).reshape(x.shape[:-1]) + hernquist_potential(x - X, gm, a)
    if track.reflex:
        phi = phi + np.sum(hernquist_acceleration(-X, gm, a) * x, axis=-1)
    return phi


def lmc_origin_stats(weights, usable, d_min, t_d_min, v_rel, radius) -> dict:
    """Per-star summaries of the LMC origin from per-path closest approaches to its centre.

    Parameters
    ----------
    weights : array (n, k)
        Normalised weights, 0 for left-out paths.
    usable : bool array (n, k)
    d_min, t_d_min, v_rel : arrays (n, k)
        Closest approach to the LMC's centre (kpc), its time (Myr, negative) and the speed
        relative to the LMC's centre there (km/s).
    radius : float
        A path *passes* when ``d_min < radius`` (kpc).

    Returns
    -------
    dict of arrays (n,)
        ``p_lmc`` (weighted fraction of passing paths), ``n_pass_lmc``, ``d_lmc_min`` and
        ``t_lmc_min`` (weighted medians over the usable paths of the closest approach and of the
        time since it), ``t_flight_lmc``, ``v_eject_lmc`` with ``_lo``/``_hi`` (weighted median
        and 16th/84th percentiles over the passing paths of the time since the closest approach
        and of the relative speed there; NaN where none passes); and ``sample_pass`` (n, k).
        NaN for stars without usable paths.
    """
    from .trace import weighted_quantile  # noqa: PLC0415 - import cycle: swerve.trace imports this module

    n = weights.shape[0]
    passes = usable & (d_min < radius)
    out = {name: np.full(n, np.nan) for name in (
        "p_lmc", "d_lmc_min", "t_lmc_min", "t_flight_lmc", "t_flight_lmc_lo", "t_flight_lmc_hi",
        "v_eject_lmc", "v_eject_lmc_lo", "v_eject_lmc_hi")}
    qs = [0.5, 0.16, 0.84]
    for i in range(n):
        wi = weights[i]
        if not np.any(wi > 0):
            continue
        u = usable[i]
        p = passes[i]
        out["p_lmc"][i] = float(np.sum(wi[p]))
        out["d_lmc_min"][i] = weighted_quantile(d_min[i][u], wi[u], 0.5)
        out["t_lmc_min"][i] = weighted_quantile(-t_d_min[i][u], wi[u], 0.5)
        if np.any(wi[p] > 0):
            out["t_flight_lmc"][i], out["t_flight_lmc_lo"][i], out["t_flight_lmc_hi"][i] = \
                weighted_quantile(-t_d_min[i][p], wi[p], qs)
            out["v_eject_lmc"][i], out["v_eject_lmc_lo"][i], out["v_eject_lmc_hi"][i] = \
                weighted_quantile(v_rel[i][p], wi[p], qs)
    out["n_pass_lmc"] = passes.sum(axis=1)
    out["sample_pass"] = passes
    return out


def _positive(value, kind, name):
    v = units.to_internal(value, kind, name)
    if isinstance(v, bool) or not isinstance(v, float) or not (math.isfinite(v) and v > 0):
        raise ValueError(f"{name}: expected a positive finite number, got {value!r}")
    return v


def lmc_encounter(positions, velocities, times=-1000.0, *, galaxy=None, track=None, lmc=None,
                  weights=None, radius=DEFAULT_LMC_RADIUS, radius_gc=1.0, launch_radius=0.003,
                  rtol=DEFAULT_RTOL, atol=DEFAULT_ATOL, chunk=8192, progress=None) -> LMCEncounter:
    """Trace present-day samples of stars backward in the LMC-perturbed Galaxy and measure how
    close each path came to the LMC's centre: the LMC as a second place of origin.

    This is the plain, full-length form (each path to its own ``times``, no early stop).
    ``swerve trace --lmc`` uses :func:`swerve.trace.trace_orbits` with ``lmc=...`` instead: the
    same engine and per-star statistics (:func:`lmc_origin_stats`), with the Galactic-Centre
    columns, the launch speed and the early stops.

    Each path is integrated from the present (t = 0) back to ``times`` in the Galactic Centre's
    frame (:func:`integrate_lmc`); its closest approach to the moving LMC centre (located between
    steps on the dense output) decides whether it *passes* (``d_min < radius``).  The same
    integration gives the closest approach to the Galactic Centre, so ``p_gc`` is the
    Galactic-Centre origin in the same perturbed Galaxy.  Weights as in :mod:`swerve.trace`
    (e.g. ``exp(ErrorSamples.log_prior)``), normalised per star over the usable paths.  A path
    that fails to integrate is left out and counted, unless it had already come within
    ``launch_radius`` of the Galactic Centre (it reached the centre, as in :mod:`swerve.trace`).

    Parameters
    ----------
    positions : array (n, k, 3) or (n, 3), kpc
        Present Galactocentric positions: k samples of n stars (``ErrorSamples.position``).
    velocities : array like ``positions``, km/s
    times : float or array (n, k), Myr
        Time each path is traced back to (negative; default -1000, ``swerve.trace``'s default
        ``max_time``).
    galaxy : swerve.galaxy.Galaxy, optional
        Default ``Galaxy.default()``.
    track : swerve.galaxy.lmc.LMCTrack, optional
        The LMC's orbit; made with :func:`swerve.galaxy.lmc.lmc_orbit` (from ``lmc``) when None.
    lmc : swerve.galaxy.lmc.LMC, optional
        Used only when ``track`` is None (default ``LMC()``).
    weights : array (n, k), optional
        Non-negative weights (default equal).
    radius : float, kpc
        LMC-origin radius (default :data:`DEFAULT_LMC_RADIUS`).
    radius_gc : float, kpc
        Galactic-Centre origin radius (default 1, as ``swerve.trace``).
    launch_radius : float, kpc
        A failed path that came this close to the Galactic Centre is kept.
    rtol, atol : float
        Integrator tolerances.
    chunk : int
        Paths per integration batch.
    progress : callable, optional
        ``progress(done, total)`` after each batch.

    Returns
    -------
    LMCEncounter
    """
    pos = np.asarray(units.to_internal(positions, "length", "positions"), dtype=float)
    vel = np.asarray(units.to_internal(velocities, "velocity", "velocities"), dtype=float)
    if pos.ndim == 2:
        pos = pos[:, None, :]
        vel = vel[:, None, :] if vel.ndim == 2 else vel
    if pos.ndim != 3 or pos.shape[2] != 3:
        raise ValueError(f"positions: expected an array of shape (n, k, 3) or (n, 3), got shape {np.shape(positions)}")
    if vel.shape != pos.shape:
        raise ValueError(f"velocities: expected the shape of positions {pos.shape}, got {np.shape(velocities)}")
    n, k = pos.shape[:2]
    if n == 0 or k == 0:
        raise ValueError(f"positions: expected at least one star and one sample, got shape {pos.shape}")
    if not (np.all(np.isfinite(pos)) and np.all(np.isfinite(vel))):
        raise ValueError("positions, velocities: expected finite values, got NaN or infinity")
    t_back = np.asarray(units.to_internal(times, "time", "times"), dtype=float)
    t_back = np.broadcast_to(t_back, (n, k)) if t_back.ndim == 0 else t_back
    if t_back.shape != (n, k):
        raise ValueError(f"times: expected a scalar or shape ({n}, {k}), got {t_back.shape}")
    if not np.all(np.isfinite(t_back)) or np.any(t_back > 0):
        raise ValueError("times: expected finite times <= 0 Myr (the past)")
    w_in = np.ones((n, k)) if weights is None else np.asarray(weights, dtype=float)
    if w_in.shape != (n, k):
        raise ValueError(f"weights: expected shape ({n}, {k}), got {w_in.shape}")
    if not np.all(np.isfinite(w_in)) or np.any(w_in < 0):
        raise ValueError("weights: expected finite non-negative values")
    radius = _positive(radius, "length", "radius")
    radius_gc = _positive(radius_gc, "length", "radius_gc")
    launch_radius = _positive(launch_radius, "length", "launch_radius")
    if isinstance(chunk, bool) or not isinstance(chunk, (int, np.integer)) or chunk < 1:
        raise ValueError(f"chunk: expected a positive integer, got {chunk!r}")
    galaxy = Galaxy.default() if galaxy is None else galaxy
    if track is None:
        t_min = min(float(t_back.min()), -1.0)
        track = lmc_orbit(galaxy, lmc, t_min=t_min - 1.0)

    fp = pos.reshape(-1, 3)
    fv = vel.reshape(-1, 3)
    ft = np.ascontiguousarray(t_back.reshape(-1))
    m = fp.shape[0]
    cols = {name: np.empty(m) for name in ("d", "td", "vr", "r", "tr")}
    status = np.empty(m, dtype=np.int64)
    for start in range(0, m, int(chunk)):
        stop = min(start + int(chunk), m)
        res = integrate_lmc(galaxy, track, fp[start:stop], fv[start:stop], 0.0, ft[start:stop],
                            rtol=rtol, atol=atol, on_failure="ignore")
        cols["d"][start:stop] = res.d_lmc_min
        cols["td"][start:stop] = res.t_d_lmc_min
        cols["vr"][start:stop] = res.v_rel_lmc
        cols["r"][start:stop] = res.r_min
        cols["tr"][start:stop] = res.t_r_min
        status[start:stop] = res.status
        if progress is not None:
            progress(stop, m)
    ok = status <= STATUS_STOPPED
    reached_centre = ~ok & (cols["r"] <= launch_radius)
    usable = (ok | reached_centre).reshape(n, k)
    d_min = cols["d"].reshape(n, k)
    t_d = cols["td"].reshape(n, k)
    v_rel = cols["vr"].reshape(n, k)
    r_min = cols["r"].reshape(n, k)
    w = np.where(usable, w_in, 0.0)
    sums = w.sum(axis=1, keepdims=True)
    w = np.divide(w, sums, out=np.zeros_like(w), where=sums > 0)
    out = lmc_origin_stats(w, usable, d_min, t_d, v_rel, radius)
    passes = out["sample_pass"]
    out["p_gc"] = np.where(np.any(w > 0, axis=1), np.sum(np.where(usable & (r_min < radius_gc), w, 0.0), axis=1),
                           np.nan)
    meta = {"radius_kpc": radius, "radius_gc_kpc": radius_gc, "launch_radius_kpc": launch_radius,
            "rtol": float(rtol), "atol": float(atol), "samples_per_star": int(k),
            "lmc_track": track.to_dict(), "galaxy": galaxy.to_dict(),
            "quantiles": "weighted, Hazen definition; *_lo/*_hi are the 16th/84th percentiles"}
    return LMCEncounter(
        p_lmc=out["p_lmc"], n_pass=out["n_pass_lmc"], d_min=out["d_lmc_min"], t_flight=out["t_flight_lmc"],
        t_flight_lo=out["t_flight_lmc_lo"], t_flight_hi=out["t_flight_lmc_hi"], v_ejection=out["v_eject_lmc"],
        v_ejection_lo=out["v_eject_lmc_lo"], v_ejection_hi=out["v_eject_lmc_hi"], p_gc=out["p_gc"],
        n_failed=(~usable).sum(axis=1), weights=w, sample_d_min=d_min, sample_t_d_min=t_d,
        sample_v_rel=v_rel, sample_r_min=r_min, sample_t_r_min=cols["tr"].reshape(n, k),
        sample_pass=passes, usable=usable, meta=meta)
