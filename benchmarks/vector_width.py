"""Which vector width LLVM gives swerve's kernels on this CPU, with and without ``prefer_512``.

A diagnostic, not a test: the width LLVM picks for plain code is its tuning for the CPU model
(256 bits on Intel's AVX-512 server cores; 512 bits on AMD Zen 4 and Zen 5 with the LLVM of
numba 0.68, as measured here), so it cannot be asserted portably. What ``prefer_512`` should do
everywhere with AVX-512 is make the marked loop use 512-bit (zmm) registers.

    python benchmarks/vector_width.py

prints the host CPU name, whether it has AVX-512, and for a loop shaped like the likelihood
kernel's (a ``prange`` task loop around an inner loop) the number of fused multiply-adds on zmm
and ymm registers with and without the attribute.
"""

from __future__ import annotations

import re

import llvmlite.binding as llvm
import numba as nb
import numpy as np

from swerve.fastmath import fast_exp, prefer_512


def wide(x, out):
    for t in nb.prange(4):
        prefer_512()
        for i in range(t * 256, (t + 1) * 256):
            out[i] = fast_exp(-x[i]) * x[i]


def plain(x, out):
    for t in nb.prange(4):
        for i in range(t * 256, (t + 1) * 256):
            out[i] = fast_exp(-x[i]) * x[i]


def fma_counts(f) -> dict[str, int]:
    asm = "".join(f.inspect_asm().values())
    return {reg: len(re.findall(rf"vfmadd\w+\s[^\n]*{reg}", asm)) for reg in ("zmm", "ymm")}


def main() -> int:
    fw = nb.njit(parallel=True, fastmath=True)(wide)
    fp = nb.njit(parallel=True, fastmath=True)(plain)
    x = np.linspace(0.0, 50.0, 1024)
    a, b = np.empty_like(x), np.empty_like(x)
    fw(x, a)
    fp(x, b)
    same = np.array_equal(a, b)
    features = llvm.get_host_cpu_features().flatten().split(",")
    print(f"host CPU (LLVM): {llvm.get_host_cpu_name()}; AVX-512: {'+avx512f' in features}; numba {nb.__version__}")
    print(f"with prefer_512:    FMA instructions {fma_counts(fw)}")
    print(f"without (LLVM's own choice): FMA instructions {fma_counts(fp)}")
    print(f"results identical: {same}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
