"""The batch orbit engine: adaptive Dormand–Prince 8(5,3) integration of many orbits at once.

Every orbit of a batch is integrated independently, in parallel over all cores (numba
``prange`` over groups of orbits), entirely in compiled code (no Python per step), in a static
Galaxy given by its compiled form ``(kinds, pars, aux)`` (see :mod:`swerve.galaxy.kernels`).

Within a group, eight orbits step together, one per SIMD lane (:mod:`swerve.orbit_lanes`,
written with :mod:`swerve.simd`): the force and the stepper's arithmetic run as eight-wide
vector instructions, while each orbit keeps its own time, step size, accept/reject decision,
events and outputs (scalar bookkeeping per lane), and a lane takes the next orbit of its group
as soon as its own is over.  An orbit's result is therefore bit-for-bit the same whichever
orbits share its group (``tests/test_orbit_lanes.py``).  On the standard HVS workload, one core,
this made whole orbits 1.75-2.0x faster than one orbit at a time in the potential-flattened halo
and 1.9-2.3x in the density-flattened one (with its fast form cut from 29 to 21 nodes at the same
time), measured side by side (``benchmarks/RESULTS.md``).

Method
------
* **Stepper**: the explicit Runge–Kutta pair DOP853 of Hairer, Nørsett & Wanner (1993,
  *Solving Ordinary Differential Equations I*, 2nd ed., §II.10), 12 force evaluations per
  step (first-same-as-last), its coefficients read once from
  ``scipy.integrate._ivp.dop853_coefficients`` and unrolled into the code below (a test checks
  one step against scipy's own ``rk_step``).  Error estimate: Hairer's combination of the
  5th- and 3rd-order embedded estimates, ``err = |h| e5^2 / sqrt(2 (e5^2 + 0.01 e3^2))``.
* **Error norm** (cheaper than component-wise RMS, and rotation invariant): the position
  part of each embedded error vector is measured in units of ``atol + rtol * max(|x|, |x_new|)``
  (vector norms, kpc) and the velocity part in units of ``atol + rtol * max(|v|, |v_new|)``
  (km/s); a step is accepted when ``err <= 1``.  Relative to the *size* of r and v, not to each
  Cartesian component, so a radial orbit along an axis is not forced to resolve its zero
  components to ``atol``.
* **Step control**: ``h_new = h * clip(0.9 err^(-1/8), 0.2, 10)``, no growth right after a
  rejection (as in Hairer's code).  First step from the local dynamical time
  ``rtol^(1/8) * min(r/|v|, |v|/|a|, sqrt(r/|a|))``, which is right for a launch at 3 pc where
  the point mass dominates.
* **Dense output**: a quintic Hermite interpolant through (x, v, a) at both ends of each step
  (no extra force evaluations; DOP853's own 7th-order dense output would cost 3 per step).
  Its error against direct integration to the output times, measured on HVS orbits from
  3 pc at the default tolerances (``tests/test_orbits.py``, ``benchmarks/RESULTS.md``): below
  1e-9 relative in position and 5e-8 relative in velocity (measured 6.6e-10 and 3.2e-8, i.e.
  2e-5 km/s), where direct integration itself is good to ~1e-10.  Velocities are the
  interpolant's derivative (error order h^5), hence the weaker figure.  Event times and
  states (below) do not depend on the interpolant's accuracy.
* **Events**, first located on the interpolant (Illinois false position on [0, 1] within the
  step), then Newton-corrected by direct DOP853 steps from the step start (12 force
  evaluations per iteration, 2-3 iterations, only in steps that hold an event), so event times
  and states have the integrator's accuracy:
  an outward crossing of ``r_stop`` (early stop; the end state is the integrated state at the
  crossing), and the pericentres and apocentres (sign changes of x·v) that refine ``r_min``,
  ``t_r_min`` and ``r_max`` between steps.
* **Failures are flagged, never silent**: step-size underflow, too many step attempts, or a
  non-finite state/energy set ``status`` (see :data:`status_names`); the public
  :func:`integrate` warns (:class:`OrbitFailureWarning`) or raises (:class:`OrbitIntegrationError`).

Time runs in the internal unit ``T = 1 kpc/(km/s)`` inside (so dx/dt = v, dv/dt = a); all times
at the public boundary are in Myr.  Negative end times integrate backward.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numba as nb
import numpy as np
from numba import literal_unroll

from . import orbit_lanes, simd, units
from .galaxy import kernels

__all__ = [
    "DEFAULT_ATOL",
    "DEFAULT_MAX_STEPS",
    "DEFAULT_RTOL",
    "OrbitFailureWarning",
    "OrbitIntegrationError",
    "OrbitResult",
    "STATUS_MAX_STEPS",
    "STATUS_NON_FINITE",
    "STATUS_OK",
    "STATUS_STEP_UNDERFLOW",
    "STATUS_STOPPED",
    "integrate",
    "integrate_arrays",
    "integrate_batch_kernel",
    "status_names",
    "as_vectors",
    "failure_summary",
]

STATUS_OK = 0
STATUS_STOPPED = 1
STATUS_MAX_STEPS = 2
STATUS_STEP_UNDERFLOW = 3
STATUS_NON_FINITE = 4

status_names = {
    STATUS_OK: "ok",
    STATUS_STOPPED: "stopped at r_stop",
    STATUS_MAX_STEPS: "max_steps exceeded",
    STATUS_STEP_UNDERFLOW: "step size underflow",
    STATUS_NON_FINITE: "non-finite state",
}

DEFAULT_RTOL = 1e-11
DEFAULT_ATOL = 1e-14
DEFAULT_MAX_STEPS = 100_000

_F_T, _F_DE, _F_RMAX, _F_RMIN, _F_TRMIN = 0, 1, 2, 3, 4
_NF = 5
_I_STATUS, _I_STEPS, _I_REJ, _I_FORCE = 0, 1, 2, 3
_NI = 4

_EPS = 2.220446049250313e-16
# groups of orbits per work chunk handed to a thread (dynamic scheduling of the prange loop)
_CHUNK = 1

_FLAGS = dict(cache=True, error_model="numpy", fastmath={"contract"})
_inline = nb.njit(**_FLAGS)


@_inline
def _accel(kinds, pars, aux, x, y, z):
    """The Galaxy's acceleration, compiled once here (``kernels.accel`` is inlined into this one
    function only, which keeps compilation of the unrolled stepper fast; LLVM inlines it back)."""
    return kernels.accel(kinds, pars, aux, x, y, z)


@_inline
def _dop853_step(kinds, pars, aux, x, y, z, vx, vy, vz, ax0, ay0, az0, h, rtol, atol):
    """One DOP853 step of size ``h`` from (x, v) with a = a(x) given.

    Returns (x, y, z, vx, vy, vz, ax, ay, az) at t + h (a evaluated there, for the next step:
    first same as last) and the scaled error ``err`` (accept when <= 1).  11 new force
    evaluations inside the step plus 1 at the new point.
    """
    vx0 = vx
    vy0 = vy
    vz0 = vz
    px = x + h * (0.05260015195876773 * vx0)
    py = y + h * (0.05260015195876773 * vy0)
    pz = z + h * (0.05260015195876773 * vz0)
    vx1 = vx + h * (0.05260015195876773 * ax0)
    vy1 = vy + h * (0.05260015195876773 * ay0)
    vz1 = vz + h * (0.05260015195876773 * az0)
    ax1, ay1, az1 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (0.0197250569845379 * vx0 + 0.0591751709536137 * vx1)
    py = y + h * (0.0197250569845379 * vy0 + 0.0591751709536137 * vy1)
    pz = z + h * (0.0197250569845379 * vz0 + 0.0591751709536137 * vz1)
    vx2 = vx + h * (0.0197250569845379 * ax0 + 0.0591751709536137 * ax1)
    vy2 = vy + h * (0.0197250569845379 * ay0 + 0.0591751709536137 * ay1)
    vz2 = vz + h * (0.0197250569845379 * az0 + 0.0591751709536137 * az1)
    ax2, ay2, az2 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (0.02958758547680685 * vx0 + 0.08876275643042054 * vx2)
    py = y + h * (0.02958758547680685 * vy0 + 0.08876275643042054 * vy2)
    pz = z + h * (0.02958758547680685 * vz0 + 0.08876275643042054 * vz2)
    vx3 = vx + h * (0.02958758547680685 * ax0 + 0.08876275643042054 * ax2)
    vy3 = vy + h * (0.02958758547680685 * ay0 + 0.08876275643042054 * ay2)
    vz3 = vz + h * (0.02958758547680685 * az0 + 0.08876275643042054 * az2)
    ax3, ay3, az3 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (0.2413651341592667 * vx0 + -0.8845494793282861 * vx2 + 0.924834003261792 * vx3)
    py = y + h * (0.2413651341592667 * vy0 + -0.8845494793282861 * vy2 + 0.924834003261792 * vy3)
    pz = z + h * (0.2413651341592667 * vz0 + -0.8845494793282861 * vz2 + 0.924834003261792 * vz3)
    vx4 = vx + h * (0.2413651341592667 * ax0 + -0.8845494793282861 * ax2 + 0.924834003261792 * ax3)
    vy4 = vy + h * (0.2413651341592667 * ay0 + -0.8845494793282861 * ay2 + 0.924834003261792 * ay3)
    vz4 = vz + h * (0.2413651341592667 * az0 + -0.8845494793282861 * az2 + 0.924834003261792 * az3)
    ax4, ay4, az4 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (0.037037037037037035 * vx0 + 0.17082860872947386 * vx3 + 0.12546768756682242 * vx4)
    py = y + h * (0.037037037037037035 * vy0 + 0.17082860872947386 * vy3 + 0.12546768756682242 * vy4)
    pz = z + h * (0.037037037037037035 * vz0 + 0.17082860872947386 * vz3 + 0.12546768756682242 * vz4)
    vx5 = vx + h * (0.037037037037037035 * ax0 + 0.17082860872947386 * ax3 + 0.12546768756682242 * ax4)
    vy5 = vy + h * (0.037037037037037035 * ay0 + 0.17082860872947386 * ay3 + 0.12546768756682242 * ay4)
    vz5 = vz + h * (0.037037037037037035 * az0 + 0.17082860872947386 * az3 + 0.12546768756682242 * az4)
    ax5, ay5, az5 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (0.037109375 * vx0 + 0.17025221101954405 * vx3 + 0.06021653898045596 * vx4 + -0.017578125 * vx5)
    py = y + h * (0.037109375 * vy0 + 0.17025221101954405 * vy3 + 0.06021653898045596 * vy4 + -0.017578125 * vy5)
    pz = z + h * (0.037109375 * vz0 + 0.17025221101954405 * vz3 + 0.06021653898045596 * vz4 + -0.017578125 * vz5)
    vx6 = vx + h * (0.037109375 * ax0 + 0.17025221101954405 * ax3 + 0.06021653898045596 * ax4 + -0.017578125 * ax5)
    vy6 = vy + h * (0.037109375 * ay0 + 0.17025221101954405 * ay3 + 0.06021653898045596 * ay4 + -0.017578125 * ay5)
    vz6 = vz + h * (0.037109375 * az0 + 0.17025221101954405 * az3 + 0.06021653898045596 * az4 + -0.017578125 * az5)
    ax6, ay6, az6 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (0.03709200011850479 * vx0 + 0.17038392571223998 * vx3 + 0.10726203044637328 * vx4 + -0.015319437748624402 * vx5 + 0.008273789163814023 * vx6)
    py = y + h * (0.03709200011850479 * vy0 + 0.17038392571223998 * vy3 + 0.10726203044637328 * vy4 + -0.015319437748624402 * vy5 + 0.008273789163814023 * vy6)
    pz = z + h * (0.03709200011850479 * vz0 + 0.17038392571223998 * vz3 + 0.10726203044637328 * vz4 + -0.015319437748624402 * vz5 + 0.008273789163814023 * vz6)
    vx7 = vx + h * (0.03709200011850479 * ax0 + 0.17038392571223998 * ax3 + 0.10726203044637328 * ax4 + -0.015319437748624402 * ax5 + 0.008273789163814023 * ax6)
    vy7 = vy + h * (0.03709200011850479 * ay0 + 0.17038392571223998 * ay3 + 0.10726203044637328 * ay4 + -0.015319437748624402 * ay5 + 0.008273789163814023 * ay6)
    vz7 = vz + h * (0.03709200011850479 * az0 + 0.17038392571223998 * az3 + 0.10726203044637328 * az4 + -0.015319437748624402 * az5 + 0.008273789163814023 * az6)
    ax7, ay7, az7 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (0.6241109587160757 * vx0 + -3.3608926294469414 * vx3 + -0.868219346841726 * vx4 + 27.59209969944671 * vx5 + 20.154067550477894 * vx6 + -43.48988418106996 * vx7)
    py = y + h * (0.6241109587160757 * vy0 + -3.3608926294469414 * vy3 + -0.868219346841726 * vy4 + 27.59209969944671 * vy5 + 20.154067550477894 * vy6 + -43.48988418106996 * vy7)
    pz = z + h * (0.6241109587160757 * vz0 + -3.3608926294469414 * vz3 + -0.868219346841726 * vz4 + 27.59209969944671 * vz5 + 20.154067550477894 * vz6 + -43.48988418106996 * vz7)
    vx8 = vx + h * (0.6241109587160757 * ax0 + -3.3608926294469414 * ax3 + -0.868219346841726 * ax4 + 27.59209969944671 * ax5 + 20.154067550477894 * ax6 + -43.48988418106996 * ax7)
    vy8 = vy + h * (0.6241109587160757 * ay0 + -3.3608926294469414 * ay3 + -0.868219346841726 * ay4 + 27.59209969944671 * ay5 + 20.154067550477894 * ay6 + -43.48988418106996 * ay7)
    vz8 = vz + h * (0.6241109587160757 * az0 + -3.3608926294469414 * az3 + -0.868219346841726 * az4 + 27.59209969944671 * az5 + 20.154067550477894 * az6 + -43.48988418106996 * az7)
    ax8, ay8, az8 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (0.47766253643826434 * vx0 + -2.4881146199716677 * vx3 + -0.590290826836843 * vx4 + 21.230051448181193 * vx5 + 15.279233632882423 * vx6 + -33.28821096898486 * vx7 + -0.020331201708508627 * vx8)
    py = y + h * (0.47766253643826434 * vy0 + -2.4881146199716677 * vy3 + -0.590290826836843 * vy4 + 21.230051448181193 * vy5 + 15.279233632882423 * vy6 + -33.28821096898486 * vy7 + -0.020331201708508627 * vy8)
    pz = z + h * (0.47766253643826434 * vz0 + -2.4881146199716677 * vz3 + -0.590290826836843 * vz4 + 21.230051448181193 * vz5 + 15.279233632882423 * vz6 + -33.28821096898486 * vz7 + -0.020331201708508627 * vz8)
    vx9 = vx + h * (0.47766253643826434 * ax0 + -2.4881146199716677 * ax3 + -0.590290826836843 * ax4 + 21.230051448181193 * ax5 + 15.279233632882423 * ax6 + -33.28821096898486 * ax7 + -0.020331201708508627 * ax8)
    vy9 = vy + h * (0.47766253643826434 * ay0 + -2.4881146199716677 * ay3 + -0.590290826836843 * ay4 + 21.230051448181193 * ay5 + 15.279233632882423 * ay6 + -33.28821096898486 * ay7 + -0.020331201708508627 * ay8)
    vz9 = vz + h * (0.47766253643826434 * az0 + -2.4881146199716677 * az3 + -0.590290826836843 * az4 + 21.230051448181193 * az5 + 15.279233632882423 * az6 + -33.28821096898486 * az7 + -0.020331201708508627 * az8)
    ax9, ay9, az9 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (-0.9371424300859873 * vx0 + 5.186372428844064 * vx3 + 1.0914373489967295 * vx4 + -8.149787010746927 * vx5 + -18.52006565999696 * vx6 + 22.739487099350505 * vx7 + 2.4936055526796523 * vx8 + -3.0467644718982196 * vx9)
    py = y + h * (-0.9371424300859873 * vy0 + 5.186372428844064 * vy3 + 1.0914373489967295 * vy4 + -8.149787010746927 * vy5 + -18.52006565999696 * vy6 + 22.739487099350505 * vy7 + 2.4936055526796523 * vy8 + -3.0467644718982196 * vy9)
    pz = z + h * (-0.9371424300859873 * vz0 + 5.186372428844064 * vz3 + 1.0914373489967295 * vz4 + -8.149787010746927 * vz5 + -18.52006565999696 * vz6 + 22.739487099350505 * vz7 + 2.4936055526796523 * vz8 + -3.0467644718982196 * vz9)
    vx10 = vx + h * (-0.9371424300859873 * ax0 + 5.186372428844064 * ax3 + 1.0914373489967295 * ax4 + -8.149787010746927 * ax5 + -18.52006565999696 * ax6 + 22.739487099350505 * ax7 + 2.4936055526796523 * ax8 + -3.0467644718982196 * ax9)
    vy10 = vy + h * (-0.9371424300859873 * ay0 + 5.186372428844064 * ay3 + 1.0914373489967295 * ay4 + -8.149787010746927 * ay5 + -18.52006565999696 * ay6 + 22.739487099350505 * ay7 + 2.4936055526796523 * ay8 + -3.0467644718982196 * ay9)
    vz10 = vz + h * (-0.9371424300859873 * az0 + 5.186372428844064 * az3 + 1.0914373489967295 * az4 + -8.149787010746927 * az5 + -18.52006565999696 * az6 + 22.739487099350505 * az7 + 2.4936055526796523 * az8 + -3.0467644718982196 * az9)
    ax10, ay10, az10 = _accel(kinds, pars, aux, px, py, pz)
    px = x + h * (2.273310147516538 * vx0 + -10.53449546673725 * vx3 + -2.0008720582248625 * vx4 + -17.9589318631188 * vx5 + 27.94888452941996 * vx6 + -2.8589982771350235 * vx7 + -8.87285693353063 * vx8 + 12.360567175794303 * vx9 + 0.6433927460157636 * vx10)
    py = y + h * (2.273310147516538 * vy0 + -10.53449546673725 * vy3 + -2.0008720582248625 * vy4 + -17.9589318631188 * vy5 + 27.94888452941996 * vy6 + -2.8589982771350235 * vy7 + -8.87285693353063 * vy8 + 12.360567175794303 * vy9 + 0.6433927460157636 * vy10)
    pz = z + h * (2.273310147516538 * vz0 + -10.53449546673725 * vz3 + -2.0008720582248625 * vz4 + -17.9589318631188 * vz5 + 27.94888452941996 * vz6 + -2.8589982771350235 * vz7 + -8.87285693353063 * vz8 + 12.360567175794303 * vz9 + 0.6433927460157636 * vz10)
    vx11 = vx + h * (2.273310147516538 * ax0 + -10.53449546673725 * ax3 + -2.0008720582248625 * ax4 + -17.9589318631188 * ax5 + 27.94888452941996 * ax6 + -2.8589982771350235 * ax7 + -8.87285693353063 * ax8 + 12.360567175794303 * ax9 + 0.6433927460157636 * ax10)
    vy11 = vy + h * (2.273310147516538 * ay0 + -10.53449546673725 * ay3 + -2.0008720582248625 * ay4 + -17.9589318631188 * ay5 + 27.94888452941996 * ay6 + -2.8589982771350235 * ay7 + -8.87285693353063 * ay8 + 12.360567175794303 * ay9 + 0.6433927460157636 * ay10)
    vz11 = vz + h * (2.273310147516538 * az0 + -10.53449546673725 * az3 + -2.0008720582248625 * az4 + -17.9589318631188 * az5 + 27.94888452941996 * az6 + -2.8589982771350235 * az7 + -8.87285693353063 * az8 + 12.360567175794303 * az9 + 0.6433927460157636 * az10)
    ax11, ay11, az11 = _accel(kinds, pars, aux, px, py, pz)
    xn = x + h * (0.054293734116568765 * vx0 + 4.450312892752409 * vx5 + 1.8915178993145003 * vx6 + -5.801203960010585 * vx7 + 0.3111643669578199 * vx8 + -0.1521609496625161 * vx9 + 0.20136540080403034 * vx10 + 0.04471061572777259 * vx11)
    yn = y + h * (0.054293734116568765 * vy0 + 4.450312892752409 * vy5 + 1.8915178993145003 * vy6 + -5.801203960010585 * vy7 + 0.3111643669578199 * vy8 + -0.1521609496625161 * vy9 + 0.20136540080403034 * vy10 + 0.04471061572777259 * vy11)
    zn = z + h * (0.054293734116568765 * vz0 + 4.450312892752409 * vz5 + 1.8915178993145003 * vz6 + -5.801203960010585 * vz7 + 0.3111643669578199 * vz8 + -0.1521609496625161 * vz9 + 0.20136540080403034 * vz10 + 0.04471061572777259 * vz11)
    vxn = vx + h * (0.054293734116568765 * ax0 + 4.450312892752409 * ax5 + 1.8915178993145003 * ax6 + -5.801203960010585 * ax7 + 0.3111643669578199 * ax8 + -0.1521609496625161 * ax9 + 0.20136540080403034 * ax10 + 0.04471061572777259 * ax11)
    vyn = vy + h * (0.054293734116568765 * ay0 + 4.450312892752409 * ay5 + 1.8915178993145003 * ay6 + -5.801203960010585 * ay7 + 0.3111643669578199 * ay8 + -0.1521609496625161 * ay9 + 0.20136540080403034 * ay10 + 0.04471061572777259 * ay11)
    vzn = vz + h * (0.054293734116568765 * az0 + 4.450312892752409 * az5 + 1.8915178993145003 * az6 + -5.801203960010585 * az7 + 0.3111643669578199 * az8 + -0.1521609496625161 * az9 + 0.20136540080403034 * az10 + 0.04471061572777259 * az11)
    axn, ayn, azn = _accel(kinds, pars, aux, xn, yn, zn)
    e5xx = 0.01312004499419488 * vx0 + -1.2251564463762044 * vx5 + -0.4957589496572502 * vx6 + 1.6643771824549864 * vx7 + -0.35032884874997366 * vx8 + 0.3341791187130175 * vx9 + 0.08192320648511571 * vx10 + -0.022355307863886294 * vx11
    e5xy = 0.01312004499419488 * vy0 + -1.2251564463762044 * vy5 + -0.4957589496572502 * vy6 + 1.6643771824549864 * vy7 + -0.35032884874997366 * vy8 + 0.3341791187130175 * vy9 + 0.08192320648511571 * vy10 + -0.022355307863886294 * vy11
    e5xz = 0.01312004499419488 * vz0 + -1.2251564463762044 * vz5 + -0.4957589496572502 * vz6 + 1.6643771824549864 * vz7 + -0.35032884874997366 * vz8 + 0.3341791187130175 * vz9 + 0.08192320648511571 * vz10 + -0.022355307863886294 * vz11
    e5vx = 0.01312004499419488 * ax0 + -1.2251564463762044 * ax5 + -0.4957589496572502 * ax6 + 1.6643771824549864 * ax7 + -0.35032884874997366 * ax8 + 0.3341791187130175 * ax9 + 0.08192320648511571 * ax10 + -0.022355307863886294 * ax11
    e5vy = 0.01312004499419488 * ay0 + -1.2251564463762044 * ay5 + -0.4957589496572502 * ay6 + 1.6643771824549864 * ay7 + -0.35032884874997366 * ay8 + 0.3341791187130175 * ay9 + 0.08192320648511571 * ay10 + -0.022355307863886294 * ay11
    e5vz = 0.01312004499419488 * az0 + -1.2251564463762044 * az5 + -0.4957589496572502 * az6 + 1.6643771824549864 * az7 + -0.35032884874997366 * az8 + 0.3341791187130175 * az9 + 0.08192320648511571 * az10 + -0.022355307863886294 * az11
    e3xx = -0.18980075407240762 * vx0 + 4.450312892752409 * vx5 + 1.8915178993145003 * vx6 + -5.801203960010585 * vx7 + -0.4226823213237919 * vx8 + -0.1521609496625161 * vx9 + 0.20136540080403034 * vx10 + 0.02265179219836082 * vx11
    e3xy = -0.18980075407240762 * vy0 + 4.450312892752409 * vy5 + 1.8915178993145003 * vy6 + -5.801203960010585 * vy7 + -0.4226823213237919 * vy8 + -0.1521609496625161 * vy9 + 0.20136540080403034 * vy10 + 0.02265179219836082 * vy11
    e3xz = -0.18980075407240762 * vz0 + 4.450312892752409 * vz5 + 1.8915178993145003 * vz6 + -5.801203960010585 * vz7 + -0.4226823213237919 * vz8 + -0.1521609496625161 * vz9 + 0.20136540080403034 * vz10 + 0.02265179219836082 * vz11
    e3vx = -0.18980075407240762 * ax0 + 4.450312892752409 * ax5 + 1.8915178993145003 * ax6 + -5.801203960010585 * ax7 + -0.4226823213237919 * ax8 + -0.1521609496625161 * ax9 + 0.20136540080403034 * ax10 + 0.02265179219836082 * ax11
    e3vy = -0.18980075407240762 * ay0 + 4.450312892752409 * ay5 + 1.8915178993145003 * ay6 + -5.801203960010585 * ay7 + -0.4226823213237919 * ay8 + -0.1521609496625161 * ay9 + 0.20136540080403034 * ay10 + 0.02265179219836082 * ay11
    e3vz = -0.18980075407240762 * az0 + 4.450312892752409 * az5 + 1.8915178993145003 * az6 + -5.801203960010585 * az7 + -0.4226823213237919 * az8 + -0.1521609496625161 * az9 + 0.20136540080403034 * az10 + 0.02265179219836082 * az11
    # error norm: vector norms of the position and velocity parts, each relative to its size
    r0 = math.sqrt(x * x + y * y + z * z)
    r1 = math.sqrt(xn * xn + yn * yn + zn * zn)
    w0 = math.sqrt(vx * vx + vy * vy + vz * vz)
    w1 = math.sqrt(vxn * vxn + vyn * vyn + vzn * vzn)
    sx = atol + rtol * max(r0, r1)
    sv = atol + rtol * max(w0, w1)
    isx2 = 1.0 / (sx * sx)
    isv2 = 1.0 / (sv * sv)
    e5 = (e5xx * e5xx + e5xy * e5xy + e5xz * e5xz) * isx2 + (e5vx * e5vx + e5vy * e5vy + e5vz * e5vz) * isv2
    e3 = (e3xx * e3xx + e3xy * e3xy + e3xz * e3xz) * isx2 + (e3vx * e3vx + e3vy * e3vy + e3vz * e3vz) * isv2
    deno = e5 + 0.01 * e3
    if deno > 0.0:
        err = abs(h) * e5 / math.sqrt(2.0 * deno)
    else:
        err = 0.0
    return xn, yn, zn, vxn, vyn, vzn, axn, ayn, azn, err


@_inline
def _hermite(p0, d0, s0, p1, d1, s1, h, th):
    """Quintic Hermite interpolant on a step of size h at fraction ``th`` in [0, 1].

    ``p``, ``d``, ``s``: value, first and second time derivative at both ends.  Returns the
    value and its first time derivative (error O(h^6) and O(h^5)).
    """
    t2 = th * th
    t3 = t2 * th
    t4 = t3 * th
    t5 = t4 * th
    h00 = 1.0 - 10.0 * t3 + 15.0 * t4 - 6.0 * t5
    h10 = th - 6.0 * t3 + 8.0 * t4 - 3.0 * t5
    h20 = 0.5 * t2 - 1.5 * t3 + 1.5 * t4 - 0.5 * t5
    h21 = 0.5 * t3 - t4 + 0.5 * t5
    h11 = -4.0 * t3 + 7.0 * t4 - 3.0 * t5
    h01 = 10.0 * t3 - 15.0 * t4 + 6.0 * t5
    g00 = -30.0 * t2 + 60.0 * t3 - 30.0 * t4
    g10 = 1.0 - 18.0 * t2 + 32.0 * t3 - 15.0 * t4
    g20 = th - 4.5 * t2 + 6.0 * t3 - 2.5 * t4
    g21 = 1.5 * t2 - 4.0 * t3 + 2.5 * t4
    g11 = -12.0 * t2 + 28.0 * t3 - 15.0 * t4
    g01 = -g00
    hh = h * h
    p = h00 * p0 + h01 * p1 + h * (h10 * d0 + h11 * d1) + hh * (h20 * s0 + h21 * s1)
    d = (g00 * p0 + g01 * p1) / h + (g10 * d0 + g11 * d1) + h * (g20 * s0 + g21 * s1)
    return p, d


@_inline
def _interp(buf, h, th, out):
    """Interpolated state at fraction ``th`` of the step stored in ``buf`` (2, 9): rows are the
    (x, v, a) at both ends.  Writes (x, y, z, vx, vy, vz) into ``out``."""
    for q in range(3):
        p, d = _hermite(buf[0, q], buf[0, q + 3], buf[0, q + 6],
                        buf[1, q], buf[1, q + 3], buf[1, q + 6], h, th)
        out[q] = p
        out[q + 3] = d


@_inline
def _event_g(kind, buf, h, th, r2, out):
    """Event function on the interpolant: kind 0: x·v (radial extrema); kind 1: r^2 - r2."""
    _interp(buf, h, th, out)
    if kind == 0:
        return out[0] * out[3] + out[1] * out[4] + out[2] * out[5]
    return out[0] * out[0] + out[1] * out[1] + out[2] * out[2] - r2


@_inline
def _find_root(kind, buf, h, g0, g1, r2, out):
    """Root in [0, 1] of the event function given opposite signs g0 at 0 and g1 at 1
    (Illinois false position, safeguarded).  Returns the fraction of the step."""
    a = 0.0
    b = 1.0
    ga = g0
    gb = g1
    side = 0
    c = 0.5
    for _ in range(80):
        denom = gb - ga
        if denom != 0.0:
            c = (a * gb - b * ga) / denom
        if not (c > a and c < b):
            c = 0.5 * (a + b)
        gc = _event_g(kind, buf, h, c, r2, out)
        if gc == 0.0:
            return c
        if (gc > 0.0) == (gb > 0.0):
            b = c
            gb = gc
            if side == 1:
                ga *= 0.5
            side = 1
        else:
            a = c
            ga = gc
            if side == -1:
                gb *= 0.5
            side = -1
        if b - a < 4.0 * _EPS:
            break
    return c


@_inline
def _refine_event(kind, kinds, pars, aux, buf, h, th, r2, rtol, atol, out):
    """Newton-correct an event first located on the interpolant, by direct DOP853 steps of
    size ``th * h`` from the step start (so events have the integrator's accuracy, not the
    interpolant's).  Writes the state at the event into ``out[:6]``; returns
    (theta, force evaluations used)."""
    nf = 0
    th_used = th
    for it in range(3):
        (x, y, z, vx, vy, vz, ax, ay, az, err) = _dop853_step(
            kinds, pars, aux, buf[0, 0], buf[0, 1], buf[0, 2], buf[0, 3], buf[0, 4], buf[0, 5],
            buf[0, 6], buf[0, 7], buf[0, 8], th * h, rtol, atol)
        nf += 12
        th_used = th
        out[0] = x
        out[1] = y
        out[2] = z
        out[3] = vx
        out[4] = vy
        out[5] = vz
        if kind == 0:
            g = x * vx + y * vy + z * vz
            dg = vx * vx + vy * vy + vz * vz + x * ax + y * ay + z * az
        else:
            g = x * x + y * y + z * z - r2
            dg = 2.0 * (x * vx + y * vy + z * vz)
        if not (dg != 0.0 and math.isfinite(g) and math.isfinite(dg)):
            break
        th_new = min(max(th - g / (dg * h), 0.0), 1.0)
        if abs(th_new - th) <= 4.0 * _EPS or it == 2:
            break
        th = th_new
    return th_used, nf


# lane state: float rows of LF (row, lane)
_L_T, _L_H, _L_S, _L_TEND, _L_R, _L_RMAX, _L_RMIN, _L_TRMIN, _L_E0, _L_PHI0, _L_RSTOP2, _L_HS = (
    0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11)
_NLF = 12
# int rows of LI
_L_ORB, _L_IO, _L_NACC, _L_NREJ, _L_NF, _L_REJ, _L_LAST, _L_STATUS = 0, 1, 2, 3, 4, 5, 6, 7
_NLI = 8
W = simd.W
# orbits per work unit of the parallel loop: each thread fills its 8 lanes from one unit
_GROUP = 64


@_inline
def _write_outputs_at_start(st, l, i, t_out, order, n_out, pos_out, vel_out, LI):
    io = 0
    while io < n_out[i] and t_out[i, order[i, io]] == 0.0:
        j = order[i, io]
        for q in range(3):
            pos_out[i, j, q] = st[q, l]
            vel_out[i, j, q] = st[q + 3, l]
        io += 1
    LI[_L_IO, l] = io


@_inline
def _finish(kinds, pars, aux, st, l, LF, LI, y_final, res_f, res_i):
    """Energy error and results of the orbit in lane l; frees the lane."""
    i = LI[_L_ORB, l]
    x = st[0, l]
    y = st[1, l]
    z = st[2, l]
    vx = st[3, l]
    vy = st[4, l]
    vz = st[5, l]
    status = LI[_L_STATUS, l]
    phi0 = LF[_L_PHI0, l]
    e0 = LF[_L_E0, l]
    e1 = 0.5 * (vx * vx + vy * vy + vz * vz) + kernels.potential(kinds, pars, aux, x, y, z)
    # relative to |Phi(x0)|; in a massless Galaxy (Phi = 0) relative to the kinetic energy
    scale = abs(phi0) if phi0 != 0.0 else max(abs(e0), 1e-300)
    de = abs(e1 - e0) / scale
    if status <= STATUS_STOPPED and not math.isfinite(de):
        status = STATUS_NON_FINITE
    for q in range(6):
        y_final[i, q] = st[q, l]
    res_f[i, _F_T] = LF[_L_T, l]
    res_f[i, _F_DE] = de
    res_f[i, _F_RMAX] = LF[_L_RMAX, l]
    res_f[i, _F_RMIN] = LF[_L_RMIN, l]
    res_f[i, _F_TRMIN] = LF[_L_TRMIN, l]
    res_i[i, _I_STATUS] = status
    res_i[i, _I_STEPS] = LI[_L_NACC, l]
    res_i[i, _I_REJ] = LI[_L_NREJ, l]
    res_i[i, _I_FORCE] = LI[_L_NF, l]
    LI[_L_ORB, l] = -1


@_inline
def _start(kinds, pars, aux, i, st, l, LF, LI, y0, t_end, t_out, order, n_out, r_stop, rtol,
           pos_out, vel_out, y_final, res_f, res_i):
    """Load orbit i into lane l.  Returns True when it needs steps (False: it was finished at
    once, t_end = 0 or a non-finite start, and the lane is free again)."""
    x = y0[i, 0]
    y = y0[i, 1]
    z = y0[i, 2]
    vx = y0[i, 3]
    vy = y0[i, 4]
    vz = y0[i, 5]
    ax, ay, az = _accel(kinds, pars, aux, x, y, z)
    st[0, l] = x
    st[1, l] = y
    st[2, l] = z
    st[3, l] = vx
    st[4, l] = vy
    st[5, l] = vz
    st[6, l] = ax
    st[7, l] = ay
    st[8, l] = az
    phi0 = kernels.potential(kinds, pars, aux, x, y, z)
    e0 = 0.5 * (vx * vx + vy * vy + vz * vz) + phi0
    r = math.sqrt(x * x + y * y + z * z)
    te = t_end[i]
    LI[_L_ORB, l] = i
    LI[_L_NACC, l] = 0
    LI[_L_NREJ, l] = 0
    LI[_L_NF, l] = 1
    LI[_L_REJ, l] = 0
    LI[_L_STATUS, l] = STATUS_OK
    LF[_L_T, l] = 0.0
    LF[_L_S, l] = 1.0 if te >= 0.0 else -1.0
    LF[_L_TEND, l] = te
    LF[_L_R, l] = r
    LF[_L_RMAX, l] = r
    LF[_L_RMIN, l] = r
    LF[_L_TRMIN, l] = 0.0
    LF[_L_E0, l] = e0
    LF[_L_PHI0, l] = phi0
    LF[_L_RSTOP2, l] = r_stop[i] * r_stop[i]
    _write_outputs_at_start(st, l, i, t_out, order, n_out, pos_out, vel_out, LI)
    if not (math.isfinite(e0) and math.isfinite(ax) and math.isfinite(ay) and math.isfinite(az)):
        LI[_L_STATUS, l] = STATUS_NON_FINITE
    elif te != 0.0:
        # first step from the local dynamical time
        w = math.sqrt(vx * vx + vy * vy + vz * vz)
        acc = math.sqrt(ax * ax + ay * ay + az * az)
        tdyn = math.inf
        if w > 0.0:
            tdyn = r / w
        if acc > 0.0:
            tdyn = min(tdyn, w / acc, math.sqrt(r / acc))
        h = rtol ** 0.125 * tdyn
        if not (h > 0.0 and math.isfinite(h)):
            h = 1e-6 * abs(te)
        LF[_L_H, l] = LF[_L_S, l] * min(h, abs(te))
        return True
    _finish(kinds, pars, aux, st, l, LF, LI, y_final, res_f, res_i)
    return False


@_inline
def _after_step(kinds, pars, aux, l, st, nw, LF, LI, buf, tmp, t_out, order, n_out, rtol,
                atol, pos_out, vel_out):
    """Accept or reject the step just taken in lane l (new state and error in ``nw``), with
    the events and outputs inside it, and choose the next step.  Returns True when the orbit
    is over (end time, stop or failure: ``LI[_L_STATUS]`` says which)."""
    i = LI[_L_ORB, l]
    err = nw[9, l]
    h = LF[_L_HS, l]
    t = LF[_L_T, l]
    s = LF[_L_S, l]
    LI[_L_NF, l] += 12
    if err <= 1.0:
        for q in range(9):
            if not math.isfinite(nw[q, l]):
                LI[_L_STATUS, l] = STATUS_NON_FINITE
                return True
        LI[_L_NACC, l] += 1
        last = LI[_L_LAST, l] == 1
        tn = LF[_L_TEND, l] if last else t + h
        for q in range(9):
            buf[0, q] = st[q, l]
            buf[1, q] = nw[q, l]
        hs = tn - t
        x = st[0, l]
        y = st[1, l]
        z = st[2, l]
        xn = nw[0, l]
        yn = nw[1, l]
        zn = nw[2, l]
        r = LF[_L_R, l]
        rn = math.sqrt(xn * xn + yn * yn + zn * zn)
        # radial extrema inside the step (sign change of x·v in the traversal direction)
        g0 = s * (x * st[3, l] + y * st[4, l] + z * st[5, l])
        g1 = s * (xn * nw[3, l] + yn * nw[4, l] + zn * nw[5, l])
        if (g0 < 0.0 and g1 > 0.0) or (g0 > 0.0 and g1 < 0.0):
            th = _find_root(0, buf, hs, g0, g1, 0.0, tmp)
            th, k = _refine_event(0, kinds, pars, aux, buf, hs, th, 0.0, rtol, atol, tmp)
            LI[_L_NF, l] += k
            re = math.sqrt(tmp[0] * tmp[0] + tmp[1] * tmp[1] + tmp[2] * tmp[2])
            if re < LF[_L_RMIN, l]:
                LF[_L_RMIN, l] = re
                LF[_L_TRMIN, l] = t + th * hs
            if re > LF[_L_RMAX, l]:
                LF[_L_RMAX, l] = re
        # early stop at the outward crossing of r_stop
        r_stop2 = LF[_L_RSTOP2, l]
        if r * r < r_stop2 and rn * rn >= r_stop2:
            g0 = r * r - r_stop2
            g1 = rn * rn - r_stop2
            th = _find_root(1, buf, hs, g0, g1, r_stop2, tmp)
            th, k = _refine_event(1, kinds, pars, aux, buf, hs, th, r_stop2, rtol, atol, tmp)
            LI[_L_NF, l] += k
            t_stop = t + th * hs
            ev = tmp.copy()
            # outputs up to the stop
            io = LI[_L_IO, l]
            while io < n_out[i] and s * (t_out[i, order[i, io]] - t_stop) <= 0.0:
                j = order[i, io]
                _interp(buf, hs, (t_out[i, j] - t) / hs, tmp)
                for q in range(3):
                    pos_out[i, j, q] = tmp[q]
                    vel_out[i, j, q] = tmp[q + 3]
                io += 1
            LI[_L_IO, l] = io
            for q in range(6):
                st[q, l] = ev[q]
            LF[_L_T, l] = t_stop
            LF[_L_RMAX, l] = max(LF[_L_RMAX, l], math.sqrt(ev[0] * ev[0] + ev[1] * ev[1] + ev[2] * ev[2]))
            LI[_L_STATUS, l] = STATUS_STOPPED
            return True
        if rn > LF[_L_RMAX, l]:
            LF[_L_RMAX, l] = rn
        if rn < LF[_L_RMIN, l]:
            LF[_L_RMIN, l] = rn
            LF[_L_TRMIN, l] = tn
        io = LI[_L_IO, l]
        while io < n_out[i] and s * (t_out[i, order[i, io]] - tn) <= 0.0:
            j = order[i, io]
            th = (t_out[i, j] - t) / hs
            th = min(max(th, 0.0), 1.0)
            _interp(buf, hs, th, tmp)
            for q in range(3):
                pos_out[i, j, q] = tmp[q]
                vel_out[i, j, q] = tmp[q + 3]
            io += 1
        LI[_L_IO, l] = io
        for q in range(9):
            st[q, l] = nw[q, l]
        LF[_L_R, l] = rn
        LF[_L_T, l] = tn
        if last:
            return True
        if err > 0.0:
            fac = min(10.0, 0.9 * err ** -0.125)
        else:
            fac = 10.0
        if LI[_L_REJ, l] == 1:
            fac = min(fac, 1.0)
        LI[_L_REJ, l] = 0
    else:
        LI[_L_NREJ, l] += 1
        if err > 0.0:  # finite and > 1
            fac = max(0.2, 0.9 * err ** -0.125)
        else:  # NaN: a force blew up inside the step; shrink hard
            fac = 0.2
        LI[_L_REJ, l] = 1
    h = h * fac
    LF[_L_H, l] = h
    if abs(h) <= 10.0 * _EPS * abs(LF[_L_T, l]):
        LI[_L_STATUS, l] = STATUS_STEP_UNDERFLOW
        return True
    return False


@_inline
def _lane(a, row):
    """Row ``row`` of a (rows, W) array as a lane vector."""
    return (a[row, 0], a[row, 1], a[row, 2], a[row, 3], a[row, 4], a[row, 5], a[row, 6], a[row, 7])


@_inline
def _store_lane(a, row, v):
    """Write the lane vector ``v`` into row ``row`` of a (rows, W) array."""
    a[row, 0] = v[0]
    a[row, 1] = v[1]
    a[row, 2] = v[2]
    a[row, 3] = v[3]
    a[row, 4] = v[4]
    a[row, 5] = v[5]
    a[row, 6] = v[6]
    a[row, 7] = v[7]


@_inline
def _integrate_group(kinds, pars, aux, i0, i1, y0, t_end, t_out, order, n_out, r_stop, rtol,
                     atol, max_steps, pos_out, vel_out, y_final, res_f, res_i):
    """Integrate orbits i0 <= i < i1, eight at a time: each lane takes the next orbit as soon
    as its own is over, and all lanes step together (each with its own step size)."""
    st = np.zeros((9, W))
    st[0, :] = 1.0  # idle lanes step a harmless state (r = 1, v = 0) with h = 0
    nw = np.empty((10, W))
    H = np.zeros((1, W))
    LF = np.zeros((_NLF, W))
    LI = np.zeros((_NLI, W), dtype=np.int64)
    LI[_L_ORB, :] = -1
    buf = np.empty((2, 9))
    tmp = np.empty(6)
    nxt = i0
    while True:
        active = 0
        for l in range(W):
            # fill a free lane; finish orbits at their step cap
            while LI[_L_ORB, l] >= 0 or nxt < i1:
                if LI[_L_ORB, l] < 0:
                    ok = _start(kinds, pars, aux, nxt, st, l, LF, LI, y0, t_end, t_out, order,
                                n_out, r_stop, rtol, pos_out, vel_out, y_final, res_f, res_i)
                    nxt += 1
                    if not ok:
                        continue
                if LI[_L_NACC, l] + LI[_L_NREJ, l] >= max_steps:
                    LI[_L_STATUS, l] = STATUS_MAX_STEPS
                    _finish(kinds, pars, aux, st, l, LF, LI, y_final, res_f, res_i)
                    continue
                break
            if LI[_L_ORB, l] < 0:
                H[0, l] = 0.0
                continue
            active += 1
            t = LF[_L_T, l]
            h = LF[_L_H, l]
            te = LF[_L_TEND, l]
            if LF[_L_S, l] * (t + h - te) >= 0.0:
                h = te - t
                LI[_L_LAST, l] = 1
            else:
                LI[_L_LAST, l] = 0
            LF[_L_HS, l] = h
            H[0, l] = h
        if active == 0:
            break
        out = orbit_lanes.dop853_step_lanes(
            kinds, pars, aux, _lane(st, 0), _lane(st, 1), _lane(st, 2), _lane(st, 3),
            _lane(st, 4), _lane(st, 5), _lane(st, 6), _lane(st, 7), _lane(st, 8), _lane(H, 0),
            rtol, atol)
        for q in literal_unroll((0, 1, 2, 3, 4, 5, 6, 7, 8, 9)):
            _store_lane(nw, q, out[q])
        for l in range(W):
            if LI[_L_ORB, l] >= 0:
                if _after_step(kinds, pars, aux, l, st, nw, LF, LI, buf, tmp, t_out, order,
                               n_out, rtol, atol, pos_out, vel_out):
                    _finish(kinds, pars, aux, st, l, LF, LI, y_final, res_f, res_i)


def group_size(n: int) -> int:
    """Orbits per work unit of :func:`integrate_batch_kernel` for a batch of ``n``: ``_GROUP``,
    fewer for small batches (at least four units per thread), a whole number of lanes."""
    threads = nb.get_num_threads()
    per = -(-n // (4 * threads))
    return int(min(_GROUP, max(W, -(-per // W) * W)))


@nb.njit(parallel=True, **_FLAGS)
def integrate_batch_kernel(kinds, pars, aux, y0, t_end, t_out, order, n_out, r_stop,
                           rtol, atol, max_steps, pos_out, vel_out, y_final, res_f, res_i, group):
    """Integrate a batch of orbits in parallel (compiled entry point for other modules).

    Parameters (internal units: kpc, km/s, T = kpc/(km/s)), with a leading orbit axis
    ----------
    kinds, pars, aux : arrays
        The compiled Galaxy (``Galaxy.kernel_args``).
    y0 : float64 array (n, 6)
        Initial (x, y, z, vx, vy, vz).
    t_end : float64 array (n,)
        End times (negative: backward).
    t_out : float64 array (n, k)
        Output times (any order; only those listed in ``order[i, :n_out[i]]`` are used).
    order : int64 array (n, k)
        Indices into ``t_out[i]`` of the valid output times, sorted in the direction of
        integration (times between 0 and ``t_end`` inclusive); ``n_out`` (n,): how many.
    r_stop : float64 array (n,)
        Stop at the first outward crossing of this radius (``inf``: never).
    rtol, atol : float
        Tolerances (see the module docstring); ``max_steps``: cap on step attempts per orbit.
    pos_out, vel_out : float64 arrays (n, k, 3)
        Filled at the output times reached (other rows are left untouched; pre-fill with NaN).
    y_final : float64 array (n, 6)
        End state (at ``t_end``, at the stop, or at the last good step of a failed orbit).
    res_f : float64 array (n, 5)
        t_final, |E - E0| / |Phi(x0)|, r_max, r_min, t_r_min.
    res_i : int64 array (n, 4)
        status, accepted steps, rejected steps, force evaluations.
    group : int
        Orbits per work unit of the parallel loop (:func:`group_size`).

    Orbits are taken in groups of up to ``_GROUP`` per thread and stepped eight at a time (one SIMD
    lane each, :mod:`swerve.orbit_lanes`); every orbit keeps its own step size, so its result
    does not depend on which orbits share its group.
    """
    n = y0.shape[0]
    n_groups = (n + group - 1) // group
    for g in nb.prange(n_groups):
        i0 = g * group
        _integrate_group(kinds, pars, aux, i0, min(n, i0 + group), y0, t_end, t_out, order,
                         n_out, r_stop, rtol, atol, max_steps, pos_out, vel_out, y_final,
                         res_f, res_i)


# --------------------------------------------------------------------------------------------
# Python API
# --------------------------------------------------------------------------------------------
class OrbitFailureWarning(UserWarning):
    """Some orbits of a batch failed (see ``OrbitResult.status``)."""


class OrbitIntegrationError(RuntimeError):
    """Some orbits of a batch failed and ``on_failure="raise"`` was asked for."""


@dataclass
class OrbitResult:
    """Result of a batch integration (plain arrays, internal units, times in Myr).

    Attributes
    ----------
    t_final : array (n,)
        Time reached, Myr: ``t_end``, the stop time, or the last good step of a failed orbit.
    pos, vel : arrays (n, 3)
        State at ``t_final`` (kpc, km/s).
    t_out : array (n, k) or None
        The output times asked for (Myr), broadcast to one row per orbit.
    pos_out, vel_out : arrays (n, k, 3) or None
        State at the output times (kpc, km/s); NaN rows for times outside [0, t_end], NaN
        padding, times after an early stop or after a failure.
    status : int array (n,)
        :data:`STATUS_OK`, :data:`STATUS_STOPPED` (successes) or a failure code; names in
        :data:`status_names`.
    n_steps, n_rejected, n_force : int arrays (n,)
        Accepted steps, rejected steps, force evaluations.
    energy_error : array (n,)
        ``|E(t_final) - E(0)| / |Phi(x0)|`` (divided by ``|E(0)|`` instead where Φ(x0) = 0, as in
        a massless Galaxy).
    r_max, r_min : arrays (n,)
        Largest and smallest galactocentric radius reached (kpc), located between steps on the
        dense output.
    t_r_min : array (n,)
        Time of the smallest radius (Myr).
    rtol, atol : float
        Tolerances used.
    """

    t_final: np.ndarray
    pos: np.ndarray
    vel: np.ndarray
    t_out: np.ndarray | None
    pos_out: np.ndarray | None
    vel_out: np.ndarray | None
    status: np.ndarray
    n_steps: np.ndarray
    n_rejected: np.ndarray
    n_force: np.ndarray
    energy_error: np.ndarray
    r_max: np.ndarray
    r_min: np.ndarray
    t_r_min: np.ndarray
    rtol: float
    atol: float

    @property
    def ok(self) -> np.ndarray:
        """Boolean (n,): the orbit reached its end time or stopped at r_stop."""
        return self.status <= STATUS_STOPPED

    @property
    def stopped(self) -> np.ndarray:
        """Boolean (n,): the orbit stopped early at r_stop."""
        return self.status == STATUS_STOPPED

    @property
    def n_orbits(self) -> int:
        return int(self.status.shape[0])

    def failure_summary(self) -> str:
        """One line counting the failed orbits by kind ('' when none failed)."""
        return failure_summary(self.status)


def failure_summary(status) -> str:
    """One line counting failed orbits by kind from their ``status`` codes ('' when none failed)."""
    status = np.asarray(status)
    bad = status > STATUS_STOPPED
    if not np.any(bad):
        return ""
    parts = []
    for code, name in status_names.items():
        k = int(np.sum(status == code))
        if code > STATUS_STOPPED and k:
            first = int(np.flatnonzero(status == code)[0])
            parts.append(f"{k} {name} (first: orbit {first})")
    return f"{int(bad.sum())} of {status.shape[0]} orbits failed: " + "; ".join(parts)


def as_vectors(value, kind, name, n=None):
    arr = units.to_internal(value, kind, name)
    arr = np.asarray(arr, dtype=float)
    if arr.ndim == 1 and arr.shape[0] == 3:
        arr = arr[None, :]
    if arr.ndim != 2 or arr.shape[1] != 3:
        raise ValueError(f"{name}: expected an array of shape (n, 3), got shape {np.shape(arr)}")
    if n is not None and arr.shape[0] != n:
        raise ValueError(f"{name}: expected {n} rows (one per orbit), got {arr.shape[0]}")
    if not np.all(np.isfinite(arr)):
        bad = int(np.flatnonzero(~np.all(np.isfinite(arr), axis=1))[0])
        raise ValueError(f"{name}: expected finite values, got NaN or infinity (first in row {bad})")
    return arr


def _per_orbit(value, kind, name, n, allow_inf=False):
    arr = units.to_internal(value, kind, name)
    arr = np.asarray(arr, dtype=float)
    if arr.ndim == 0:
        arr = np.full(n, float(arr))
    if arr.shape != (n,):
        raise ValueError(f"{name}: expected a scalar or an array of shape ({n},), got shape {arr.shape}")
    ok = np.isfinite(arr) | (allow_inf & (arr == np.inf))
    if not np.all(ok):
        raise ValueError(f"{name}: expected finite values, got NaN or infinity (first at index "
                         f"{int(np.flatnonzero(~ok)[0])})")
    return arr


def _output_order(t_out, t_end):
    """Valid output times (between 0 and t_end inclusive, finite) sorted in the direction of
    integration: (order (n, k) int64, n_out (n,) int64)."""
    s = np.where(t_end >= 0.0, 1.0, -1.0)[:, None]
    with np.errstate(invalid="ignore"):
        key = s * t_out
        valid = np.isfinite(t_out) & (key >= 0.0) & (key <= np.abs(t_end)[:, None])
    key = np.where(valid, key, np.inf)
    order = np.ascontiguousarray(np.argsort(key, axis=1, kind="stable"), dtype=np.int64)
    return order, valid.sum(axis=1).astype(np.int64)


def integrate_arrays(kinds, pars, aux, pos0, vel0, t_end, t_out=None, *, r_stop=None,
                     rtol=DEFAULT_RTOL, atol=DEFAULT_ATOL, max_steps=DEFAULT_MAX_STEPS):
    """Integrate orbits in a compiled Galaxy ``(kinds, pars, aux)``: plain arrays, no checks
    of the Galaxy, no warnings (the caller looks at ``status``).

    Parameters
    ----------
    kinds, pars, aux : arrays
        ``Galaxy.kernel_args``.
    pos0 : float array (n, 3), kpc
    vel0 : float array (n, 3), km/s
    t_end : float or float array (n,), Myr
        End time of each orbit; negative integrates backward.
    t_out : float array (k,) or (n, k), Myr, optional
        Output times, shared or per orbit, any order; NaN padding allowed.
    r_stop : float or float array (n,), kpc, optional
        Stop each orbit at its first outward crossing of this radius.
    rtol, atol : float
        Relative tolerance and absolute floor (kpc for positions, km/s for velocities) of the
        error norm (module docstring).
    max_steps : int
        Cap on step attempts per orbit.

    Returns
    -------
    OrbitResult
    """
    pos0 = as_vectors(pos0, "length", "pos0")
    n = pos0.shape[0]
    vel0 = as_vectors(vel0, "velocity", "vel0", n)
    t_end_myr = _per_orbit(t_end, "time", "t_end", n)
    r_stop_arr = (np.full(n, np.inf) if r_stop is None
                  else _per_orbit(r_stop, "length", "r_stop", n, allow_inf=True))
    if np.any(r_stop_arr <= 0.0):
        raise ValueError("r_stop: expected positive radii in kpc")
    rtol = float(rtol)
    atol = float(atol)
    if not (rtol > 0.0 and math.isfinite(rtol)) or rtol < 1e-15:
        raise ValueError(f"rtol: expected a finite relative tolerance >= 1e-15, got {rtol}")
    if not (atol > 0.0 and math.isfinite(atol)):
        raise ValueError(f"atol: expected a finite positive absolute tolerance, got {atol}")
    if int(max_steps) != max_steps or max_steps < 1:
        raise ValueError(f"max_steps: expected a positive integer, got {max_steps!r}")
    if t_out is None:
        t_out_myr = np.full((n, 0), np.nan)
    else:
        t_out_myr = np.asarray(units.to_internal(t_out, "time", "t_out"), dtype=float)
        if t_out_myr.ndim == 0:
            t_out_myr = t_out_myr.reshape(1)
        if t_out_myr.ndim == 1:
            t_out_myr = np.broadcast_to(t_out_myr, (n, t_out_myr.shape[0]))
        if t_out_myr.ndim != 2 or t_out_myr.shape[0] != n:
            raise ValueError(f"t_out: expected shape (k,) or ({n}, k), got {np.shape(t_out)}")
        if np.any(np.isinf(t_out_myr)):
            raise ValueError("t_out: expected finite times (NaN allowed as padding), got infinity")
    k = t_out_myr.shape[1]
    order, n_out = _output_order(t_out_myr, t_end_myr)
    y0 = np.ascontiguousarray(np.concatenate([pos0, vel0], axis=1))
    t_end_int = np.ascontiguousarray(units.myr_to_internal(t_end_myr))
    t_out_int = np.ascontiguousarray(units.myr_to_internal(t_out_myr))
    pos_out = np.full((n, k, 3), np.nan)
    vel_out = np.full((n, k, 3), np.nan)
    y_final = np.empty((n, 6))
    res_f = np.empty((n, _NF))
    res_i = np.empty((n, _NI), dtype=np.int64)
    if n:
        # dynamic scheduling in chunks: orbit costs differ (flight times, early stops)
        with nb.parallel_chunksize(_CHUNK):
            integrate_batch_kernel(
                np.asarray(kinds, dtype=np.int64), np.ascontiguousarray(pars, dtype=float),
                np.ascontiguousarray(aux, dtype=float), y0, t_end_int, t_out_int, order, n_out,
                np.ascontiguousarray(r_stop_arr), rtol, atol, int(max_steps), pos_out, vel_out,
                y_final, res_f, res_i, group_size(n))
    return OrbitResult(
        t_final=units.internal_to_myr(res_f[:, _F_T]),
        pos=y_final[:, :3],
        vel=y_final[:, 3:],
        t_out=None if t_out is None else np.array(t_out_myr),
        pos_out=None if t_out is None else pos_out,
        vel_out=None if t_out is None else vel_out,
        status=res_i[:, _I_STATUS].copy(),
        n_steps=res_i[:, _I_STEPS].copy(),
        n_rejected=res_i[:, _I_REJ].copy(),
        n_force=res_i[:, _I_FORCE].copy(),
        energy_error=res_f[:, _F_DE].copy(),
        r_max=res_f[:, _F_RMAX].copy(),
        r_min=res_f[:, _F_RMIN].copy(),
        t_r_min=units.internal_to_myr(res_f[:, _F_TRMIN]),
        rtol=rtol,
        atol=atol,
    )


def integrate(galaxy, pos0, vel0, t_end, t_out=None, *, r_stop=None, rtol=DEFAULT_RTOL,
              atol=DEFAULT_ATOL, max_steps=DEFAULT_MAX_STEPS, check_density=True,
              on_failure="warn") -> OrbitResult:
    """Integrate a batch of orbits in a Galaxy, in parallel, with dense output.

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
    pos0 : array (n, 3) or (3,), kpc (Quantity accepted)
        Initial positions, galactocentric Cartesian.
    vel0 : array (n, 3) or (3,), km/s (Quantity accepted)
        Initial velocities.
    t_end : float or array (n,), Myr (Quantity accepted)
        End time of each orbit; negative integrates backward in time.
    t_out : array (k,) or (n, k), Myr (Quantity accepted), optional
        Output times, shared by all orbits or one row per orbit, any order, NaN padding
        allowed.  Times outside [0, t_end], after an early stop or after a failure give NaN
        rows in ``pos_out``/``vel_out``.  Sampled on the dense output: no extra steps.
    r_stop : float or array (n,), kpc, optional
        Stop each orbit at its first outward crossing of r_stop (located on the dense output;
        status :data:`STATUS_STOPPED`).  Orbits starting outside r_stop stop only after they
        come back in and cross it outward.
    rtol, atol : float
        Relative tolerance and absolute floor of the error norm (module docstring).  The
        defaults keep max |dE|/|Phi(r0)| <= 1e-10 on HVS orbits launched from 3 pc.
    max_steps : int
        Cap on step attempts (accepted + rejected) per orbit.
    check_density : bool
        Call ``galaxy.check_domain`` on the orbits' largest radii: a NegativeDensityWarning
        when they reach the negative-density region of a potential-flattened halo.
    on_failure : {"warn", "raise", "ignore"}
        What to do when an orbit fails (status > STATUS_STOPPED): warn
        (:class:`OrbitFailureWarning`), raise (:class:`OrbitIntegrationError`) or nothing.
        Failed orbits are always flagged in ``status``.

    Returns
    -------
    OrbitResult

    Examples
    --------
    >>> from swerve.galaxy import Galaxy
    >>> res = integrate(Galaxy.default(), [0.003, 0.0, 0.0], [1500.0, 0.0, 0.0], 100.0)
    >>> bool(res.ok[0]), bool(res.energy_error[0] < 1e-10)
    (True, True)
    """
    if on_failure not in ("warn", "raise", "ignore"):
        raise ValueError(f"on_failure: expected 'warn', 'raise' or 'ignore', got {on_failure!r}")
    kinds, pars, aux = galaxy.kernel_args
    res = integrate_arrays(kinds, pars, aux, pos0, vel0, t_end, t_out, r_stop=r_stop,
                           rtol=rtol, atol=atol, max_steps=max_steps)
    if check_density and res.n_orbits:
        galaxy.check_domain(res.r_max, what="orbits")
    msg = res.failure_summary()
    if msg:
        msg += "; see OrbitResult.status (failed orbits keep their last good state)"
        if on_failure == "raise":
            raise OrbitIntegrationError(msg)
        if on_failure == "warn":
            warnings.warn(msg, OrbitFailureWarning, stacklevel=2)
    return res
