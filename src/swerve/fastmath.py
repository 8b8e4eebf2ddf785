"""Compiled elementary functions for the hot kernels (likelihood, emulator).

numba's wheels have no vector maths library, so ``math.exp`` in a compiled loop is a scalar
library call and the loop does not vectorise; :func:`fast_exp` is a polynomial form the compiler
vectorises, accurate to < 1e-13 relative (``tests/test_likelihood.py``).
"""

from __future__ import annotations

import math

import numba as nb
import numpy as np
from llvmlite import ir
from numba import types
from numba.extending import intrinsic


@intrinsic
def _bits_to_float(typingctx, bits):
    """Reinterpret the bits of an int64 as a float64 (LLVM ``bitcast``; vectorises)."""
    sig = types.float64(types.int64)

    def codegen(context, builder, signature, args):
        return builder.bitcast(args[0], ir.DoubleType())

    return sig, codegen


_LOG2E = 1.4426950408889634
_LN2_HI = 6.93147180369123816490e-01  # ln 2 split so that t * _LN2_HI is exact (fdlibm's split)
_LN2_LO = 1.90821492927058770002e-10
#: below this argument :func:`fast_exp` returns 0 (exp(-708) ≈ 3.3e-308, just above the smallest normal double)
FAST_EXP_MIN = -708.0


@nb.njit(fastmath=True, inline="always", cache=True)
def fast_exp(x):
    """exp(x) for x ≤ 0, relative error < 1e-13 (``tests/test_likelihood.py``), in a form
    the compiler vectorises (``math.exp`` is a scalar library call; numba's wheels have no
    vector maths library). Cody–Waite reduction ``x = t ln 2 + r``, ``|r| ≤ ln 2 / 2``, the
    polynomial of degree 9 interpolating ``exp(r)`` at the 10 Chebyshev nodes of that interval
    (near-minimax: 1.9e-14 relative, two multiply-adds fewer than the degree-11 Taylor series
    of the same accuracy), and ``2^t`` assembled in
    the exponent bits. Returns 0 below :data:`FAST_EXP_MIN` (no subnormals)."""
    xc = max(x, FAST_EXP_MIN)
    t = math.floor(xc * _LOG2E + 0.5)
    r = (xc - t * _LN2_HI) - t * _LN2_LO
    p = 2.7632640675430236e-06  # degree 9, interpolating exp at the Chebyshev nodes of |r| <= ln 2 / 2
    p = p * r + 2.4884459751751116e-05
    p = p * r + 0.0001984119064754424
    p = p * r + 0.0013888801749656543
    p = p * r + 0.008333333367311603
    p = p * r + 0.04166666704055191
    p = p * r + 0.16666666666615648
    p = p * r + 0.4999999999943859
    p = p * r + 1.0000000000000013
    p = p * r + 1.0000000000000135
    e = p * _bits_to_float((np.int64(t) + 1023) << 52)
    return e if x > FAST_EXP_MIN else 0.0


#: LLVM's function attribute for the widest vector registers its vectoriser may use
_WIDE_VECTORS = '"prefer-vector-width"="512"'


@intrinsic
def prefer_512(typingctx):
    """Let LLVM vectorise the compiled function this is called in with 512-bit registers.

    On some CPUs with AVX-512 (Intel's server cores), LLVM uses 256-bit vectors unless told otherwise (512-bit instructions
    lowered the clock of early AVX-512 parts); numba can only change that for a whole process
    (``NUMBA_CPU_FEATURES``), and that made the orbit engine slower here (14,300 -> 11,000
    orbits/s on one core, benchmarks/RESULTS.md) while the likelihood kernel ran 1.3x faster.
    This sets the attribute on the one function instead (call it first thing in a ``prange``
    body: the body is compiled as a function of its own). No effect on CPUs without AVX-512; no change in the arithmetic, only
    in how many lanes run at once. ``tests/test_likelihood.py`` checks that the attribute reaches
    the compiled function and changes no result; ``benchmarks/vector_width.py`` shows which width
    LLVM then picks on the CPU at hand (its tuning, so never asserted in a test)."""
    sig = types.none()

    def codegen(context, builder, signature, args):
        attrs = builder.function.attributes
        # a string attribute, which llvmlite's checked ``add`` does not know; it prints the set's
        # members as they are
        set.add(attrs, _WIDE_VECTORS)
        return context.get_dummy_value()

    return sig, codegen
