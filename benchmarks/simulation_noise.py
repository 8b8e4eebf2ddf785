"""Simulation noise of the training summaries: the spread of independent banks at one Galaxy
against the noise estimate the training stage records (replicate sub-banks, or the Poisson
bootstrap over orbits with --replicates 1).

    python benchmarks/simulation_noise.py [--replicates 4] [--banks 4]
"""

import argparse

import numpy as np

from swerve.emulate import load
from swerve.simulate import simulate_point


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--emulator", default="emulators/default")
    ap.add_argument("--replicates", type=int, default=4)
    ap.add_argument("--banks", type=int, default=4)
    args = ap.parse_args()
    emu = load(args.emulator)
    cfg = {k: dict(v) for k, v in emu.metadata["config"].items()}
    cfg["launch"]["points_per_galaxy"] = 1
    cfg["launch"]["infer"] = {"slope": [-0.5000001, -0.4999999]}
    cfg["bank"]["replicates"] = args.replicates
    th = {"q_y": 1.0, "q_z": 0.9, "m_halo": 0.8e12, "m_disk": 1.0e11}
    outs = [simulate_point(cfg, th, s) for s in range(args.banks)]
    nc = len(emu.metadata["summaries"]["r_edges"]) - 1
    nc *= len(emu.metadata["summaries"]["lat_edges"]) - 1
    v = np.array([o["values"][0] for o in outs]).reshape(args.banks, nc, 9)
    nv = np.array([o["noise_var"][0] for o in outs]).reshape(args.banks, nc, 9)
    for k, name in ((0, "mean v_r [km/s]"), (1, "mean v_theta' [km/s]")):
        print(f"{name}: spread of {args.banks} independent banks (sd) per cell:", v[..., k].std(0, ddof=1).round(2))
        print(f"{name}: recorded noise sd per cell (replicates={args.replicates}):  ", np.sqrt(nv[..., k].mean(0)).round(2))


if __name__ == "__main__":
    main()
