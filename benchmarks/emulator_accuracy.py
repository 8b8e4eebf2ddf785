"""Held-out accuracy of an emulator: normalised residuals per statistic, and by distance of the
held-out point from the faces of the training domain.

    python benchmarks/emulator_accuracy.py --emulator emulators/default --held-out runs/default2-held-out
"""

import argparse

import numpy as np

from swerve.emulate import load
from swerve.simulate import training_setup_from_dict, training_table
from swerve.summaries import STAT_NAMES
from swerve.training import collect


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--emulator", default="emulators/default")
    ap.add_argument("--held-out", required=True)
    args = ap.parse_args()
    emu = load(args.emulator)
    setup = training_setup_from_dict(emu.metadata["config"])
    _, th, out = collect(args.held_out)
    X, Y, V = training_table(setup, th, out)
    m, sd = emu.predict(X, return_std=True)
    z = (m - Y) / np.sqrt(sd**2 + V)
    print(f"{len(X)} held-out rows; overall RMS z {np.sqrt(np.mean(z**2)):.2f}")
    nc, ng = setup.spec.n_cells, setup.spec.n_gauss

    def cells(a):
        return a[:, :ng].reshape(len(a), nc, 9)

    zz, err, sdd, nv = cells(z), cells(m - Y), cells(sd), cells(np.sqrt(V))
    for k, n in enumerate(STAT_NAMES):
        print(f"{n:10s} RMS z {np.sqrt(np.mean(zz[..., k]**2)):5.2f}  RMS error {np.sqrt(np.mean(err[..., k]**2)):8.3f}  "
              f"median emulator sd {np.median(sdd[..., k]):8.3f}  median simulation sd {np.median(nv[..., k]):8.3f}")
    if setup.spec.n_vbins:  # log(f + floor) of the v_r histogram bins, by bin
        nb = setup.spec.n_vbins
        zh = z[:, ng:].reshape(len(z), nc, nb)
        eh, sh, vh = [a[:, ng:].reshape(len(z), nc, nb) for a in (m - Y, sd, np.sqrt(V))]
        print(f"v_r histogram ({nb} bins x {nc} cells): RMS z {np.sqrt(np.mean(zh**2)):.2f}, "
              f"RMS error {np.sqrt(np.mean(eh**2)):.3f}, median emulator sd {np.median(sh):.3f}, "
              f"median simulation sd {np.median(vh):.3f}")
        print("  RMS z by bin: " + " ".join(f"{np.sqrt(np.mean(zh[..., b]**2)):.2f}" for b in range(nb)))
    # near the faces of the domain the GP has design points on one side only
    b = np.asarray(emu.bounds, dtype=float)
    u = (np.asarray(X, dtype=float) - b[:, 0]) / (b[:, 1] - b[:, 0])
    dmin = np.min(np.minimum(u, 1 - u), axis=1)
    for lo, hi in ((0.0, 1 / 16), (1 / 16, 1 / 8), (1 / 8, 1 / 2 + 1e-9)):
        sel = (dmin >= lo) & (dmin < hi)
        if sel.any():
            print(f"distance to the nearest face {lo:.3f}-{min(hi, 0.5):.3f} of the unit cube: {sel.sum():4d} rows, "
                  f"RMS z {np.sqrt(np.mean(z[sel]**2)):.2f}")
    for j, n in enumerate(emu.parameter_names):
        edge = (u[:, j] < 1 / 8) | (u[:, j] > 7 / 8)
        if edge.any() and (~edge).any():
            print(f"{n}: rows in the outer eighth of its range RMS z {np.sqrt(np.mean(z[edge]**2)):.2f} "
                  f"({edge.sum()} rows), the rest {np.sqrt(np.mean(z[~edge]**2)):.2f}")


if __name__ == "__main__":
    main()
