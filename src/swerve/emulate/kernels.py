"""The emulator's covariance kernels: scikit-learn builders (fit) and compiled cross-kernels (predict).

One table, :data:`KERNELS`, maps each kernel name of :class:`~swerve.emulate.GPEmulator` to the
code of its compiled form and its scikit-learn builder, so both sides always agree on the
formula. The compiled side takes inputs already divided by each component's length scales
(``xs`` (G, q, d) and the training points transposed, ``XsT`` (G, d, n)) and computes, for every
component GP g, ``k_g(x, X) = constant_g · k(|x − X|)`` with

* Matérn 5/2: ``k(r) = (1 + √5 r + 5 r²/3) exp(−√5 r)``,
* RBF: ``k(r) = exp(−r²/2)``,

the squared distance summed over dimensions in order, as scipy's ``cdist`` does, so that
:func:`cross_kernel` reproduces scikit-learn's cross-covariance to round-off.
"""

from __future__ import annotations

import math
import threading

import numba as nb
import numpy as np
from sklearn.gaussian_process.kernels import RBF, Matern

from ..fastmath import fast_exp, prefer_512

__all__ = ["KERNELS", "cross_kernel", "cross_kernel_workspace", "mean_fused"]


def _sk_matern52(length_scale, bounds):
    return Matern(length_scale=length_scale, length_scale_bounds=bounds, nu=2.5)


def _sk_rbf(length_scale, bounds):
    return RBF(length_scale=length_scale, length_scale_bounds=bounds)

_SQRT5 = math.sqrt(5.0)


@nb.njit(cache=True, inline="always")
def _squared_distances(xs, XsT, g, i, o):  # pragma: no cover - compiled
    """``o[j]`` = squared distance between point i and training point j for component g
    (pre-scaled inputs, as in :func:`_scaled_distance`), summed over dimensions in order."""
    o[:] = 0.0
    for k in range(xs.shape[2]):
        xk = xs[g, i, k]
        row = XsT[g, k]
        for j in range(o.shape[0]):
            diff = xk - row[j]
            o[j] += diff * diff


@nb.njit(cache=True)
def _scaled_distance(xs, XsT, family, out):  # pragma: no cover - compiled
    """Distances between pre-scaled points, in the form each kernel needs.

    ``xs`` (G, q, d) and ``XsT`` (G, d, n) are inputs divided by each component's length
    scales. ``out[g, i, j]`` = ``sqrt(5) r`` (Matérn 5/2) or ``-r²/2`` (RBF), ``r`` the
    Euclidean distance, summed over dimensions in order, as scipy's ``cdist`` does.
    """
    G, q, _ = xs.shape
    n = XsT.shape[2]
    for g in range(G):
        for i in range(q):
            o = out[g, i]
            _squared_distances(xs, XsT, g, i, o)
            if family == 0:
                for j in range(n):
                    o[j] = math.sqrt(o[j]) * _SQRT5
            else:
                for j in range(n):
                    o[j] = -0.5 * o[j]


@nb.njit(cache=True)
def _matern52_from(r5, e, constant, out):  # pragma: no cover - compiled
    """out = constant (1 + r5 + r5²/3) e, with r5 = sqrt(5) r and e = exp(-r5)."""
    G, q, n = r5.shape
    for g in range(G):
        c = constant[g]
        for i in range(q):
            for j in range(n):
                x = r5[g, i, j]
                out[g, i, j] = c * ((1.0 + x + x * x / 3.0) * e[g, i, j])


@nb.njit(parallel=True, fastmath=True, cache=True)
def mean_fused(xs, XsT, constant, alpha, family, out):  # pragma: no cover - compiled
    """``out[i, g] = Σ_j k_g(x_i, X_j) α_g[j]``: every component GP's mean at q points, the
    cross-covariance never stored (the sampler's path: predict without variance).

    The same kernel arithmetic as :func:`_scaled_distance` and :func:`_matern52_from`, with
    :func:`swerve.fastmath.fast_exp` (relative error < 1e-13) in place of numpy's exp so that
    the loop over training points vectorises, and the sum over them in the compiler's order
    (``tests/test_emulate.py``: within 1e-14 of Σ_j |k_j α_j| of scikit-learn's, the round-off
    of that cancelling sum). 512-bit vectors where the CPU has them
    (:func:`swerve.fastmath.prefer_512`)."""
    G, q, _ = xs.shape
    n = XsT.shape[2]
    for g in nb.prange(G):
        prefer_512()
        c = constant[g]
        a = alpha[g]
        s = np.empty(n)
        for i in range(q):
            _squared_distances(xs, XsT, g, i, s)
            acc = 0.0
            if family == 0:
                for j in range(n):
                    r5 = math.sqrt(s[j]) * _SQRT5
                    acc += (1.0 + r5 + r5 * r5 / 3.0) * fast_exp(-r5) * a[j]
            else:
                for j in range(n):
                    acc += fast_exp(-0.5 * s[j]) * a[j]
            out[i, g] = c * acc


def cross_kernel(xs, XsT, constant, family, work=None):
    """Cross-covariance (G, q, n) of every component GP, the same arithmetic as scikit-learn
    (``exp`` by numpy, as there). ``work``: optional pair of float arrays of that shape to
    compute in (the result is one of them)."""
    G, q, _ = xs.shape
    shape = (G, q, XsT.shape[2])
    r, e = work if work is not None else (np.empty(shape), np.empty(shape) if family == 0 else None)
    _scaled_distance(xs, XsT, family, r)
    if family == 0:
        np.negative(r, out=e)
        np.exp(e, out=e)
        _matern52_from(r, e, constant, e)
        return e
    np.exp(r, out=r)
    r *= constant[:, None, None]
    return r


#: largest cross-covariance (floats) computed in a reused per-thread buffer: the sampler's
#: predictions for a few dozen θ would otherwise spend more on fresh pages than on arithmetic
_WORK_MAX = 1 << 21
_WORK = threading.local()  # .buf: this thread's pair of scratch arrays (used within one predict call)


def cross_kernel_workspace(shape):
    """This thread's pair of scratch arrays of ``shape`` (G, q, n) for :func:`cross_kernel`'s
    ``work``, or None when the cross-covariance is too big to keep (then it is allocated)."""
    if math.prod(shape) > _WORK_MAX:
        return None
    buf = getattr(_WORK, "buf", None)
    if buf is None or buf[0].shape != shape:
        buf = _WORK.buf = (np.empty(shape), np.empty(shape))
    return buf


#: kernel name -> (code of the compiled kernel, scikit-learn builder ``(length_scale, bounds)``)
KERNELS = {"matern52": (0, _sk_matern52), "rbf": (1, _sk_rbf)}
