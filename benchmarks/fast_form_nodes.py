"""Accuracy of the density-flattened halo's fast form against its node count: the trapezoid step
and range in ln(tau) (swerve.galaxy.nfw_density.FAST_STEP, FAST_T_RANGE) scanned against the
reference quadrature, at 1e-3 to 2e4 kpc (r_s = 24.8 kpc), axis ratios 0.5-1.5.

Usage::

    python benchmarks/fast_form_nodes.py [--max-nodes 22]

Prints, for every (step, t_lo, t_hi) with at most ``--max-nodes`` nodes whose largest relative
force error is below 5e-6, the node count and the largest relative force and potential errors,
fewest nodes first; then the shipped choice.  A script, not a test.
"""

import argparse
import math

import numpy as np

from swerve.galaxy.nfw_density import FAST_STEP, FAST_T_RANGE, _grid_end, exact_scaled

RS = 24.8
SHAPES = [(0.5, 0.5), (1.5, 1.5), (0.5, 1.5), (1.5, 0.5), (1.0, 0.5), (1.0, 1.5), (0.8, 1.2),
          (0.9, 0.7), (1.2, 0.6)]


def points(rng, n, lo, hi):
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    r = 10 ** rng.uniform(math.log10(lo), math.log10(hi), n)
    axes = np.concatenate([np.eye(3)[i] * np.geomspace(lo, hi, 12)[:, None] for i in range(3)])
    return np.concatenate([d * r[:, None], axes]) / RS


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--max-nodes", type=int, default=22)
    args = ap.parse_args()
    P = points(np.random.default_rng(5), 600, 1e-3, 2e4)
    ref = {s: exact_scaled(P, *s) for s in SHAPES}

    def errors(step, lo, hi):
        fe = pe = 0.0
        for s in SHAPES:
            phi, acc = exact_scaled(P, *s, step=step, t_range=(lo, hi))
            p0, a0 = ref[s]
            fe = max(fe, np.max(np.linalg.norm(acc - a0, axis=1) / np.linalg.norm(a0, axis=1)))
            pe = max(pe, np.max(np.abs(phi - p0) / np.abs(p0)))
        return fe, pe

    rows = []
    for step in (0.9, 0.95, 1.0, 1.05, 1.1, 1.2, 1.3):
        for lo in (-7.0, -7.5, -8.0, -8.5, -9.0):
            for hi in (10.0, 10.5, 11.0, 11.5, 12.0):
                n = _grid_end(step, lo, hi)[0] + 1  # plus the node at tau = 0
                if n > args.max_nodes:
                    continue
                fe, pe = errors(step, lo, hi)
                if fe < 5e-6:
                    rows.append((n, fe, pe, step, lo, hi))
    for n, fe, pe, step, lo, hi in sorted(rows):
        print(f"{n:3d} nodes: step {step:<5g} t in ({lo:g}, {hi:g}): force {fe:.2e}, potential {pe:.2e}")
    fe, pe = errors(FAST_STEP, *FAST_T_RANGE)
    n = _grid_end(FAST_STEP, *FAST_T_RANGE)[0] + 1
    print(f"shipped: {n} nodes, step {FAST_STEP:g}, t in {FAST_T_RANGE}: force {fe:.2e}, potential {pe:.2e}")
    fe, pe = errors(1.0, -12.0, 15.0)
    print(f"before 2026-12-03: 29 nodes, step 1, t in (-12, 15): force {fe:.2e}, potential {pe:.2e}")


if __name__ == "__main__":
    main()
