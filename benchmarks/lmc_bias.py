"""Issue 21, result (a): mocks made with the LMC, fitted with the static default emulator.

For each seed, two mocks of the same scenario through the LMC forward model
(`swerve mock --lmc-mass M`, swerve.bank_lmc): one with the LMC of mass M and one with m_lmc = 0
(the same exact scheme without the LMC: the control), each fitted by `swerve fit` on the shipped
static emulator. Prints each fit's medians and 95% intervals and, per parameter, the mean shift
of the median (LMC minus control) in units of the control's posterior sd.

    python benchmarks/lmc_bias.py [--n 1000] [--seeds 1 2 3 4] [--m-lmc 1.5e11] [--out runs/lmc-bias]

The scenario is the demo's (examples/make_demo.py) on the default Galaxy: q_y = 1.1, q_z = 0.85,
p(v) ∝ v^-0.5 on 700-3000 km/s, 10 < r < 100 kpc outgoing, the demo's errors.
"""

from __future__ import annotations

import argparse
import json
from pathlib import Path

import numpy as np

from swerve.cli import main as swerve

TRUTH = {"q_y": 1.1, "q_z": 0.85}
ERRORS = ["--error-parallax", "0.02", "--error-distance-frac", "0.1", "--error-pm", "0:0.01:1",
          "--error-pm-corr", "0.1", "--error-vlos", "5"]


def run(out: Path, n: int, seed: int, m_lmc: float) -> dict:
    cat = out / f"mock-s{seed}-m{m_lmc:.3g}.ecsv"
    if not cat.exists():
        rc = swerve(["mock", "--lmc-mass", f"{m_lmc:g}", "--n", str(n), "--seed", str(seed), "--out", str(cat),
                     "--param", f"q_y={TRUTH['q_y']}", "--param", f"q_z={TRUTH['q_z']}",
                     "--cut", "r_max=100", *ERRORS])
        assert rc == 0, rc
    fit_dir = out / f"fit-s{seed}-m{m_lmc:.3g}"
    if not (fit_dir / "summary.json").exists():
        rc = swerve(["fit", str(cat), "--out", str(fit_dir), "--no-progress"])
        assert rc == 0, rc
    return json.loads((fit_dir / "summary.json").read_text())


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=1000)
    ap.add_argument("--seeds", type=int, nargs="+", default=[1, 2, 3, 4])
    ap.add_argument("--m-lmc", type=float, default=1.5e11)
    ap.add_argument("--out", default="runs/lmc-bias")
    args = ap.parse_args()
    out = Path(args.out)
    out.mkdir(parents=True, exist_ok=True)
    shifts: dict[str, list[float]] = {}
    for seed in args.seeds:
        for m in (0.0, args.m_lmc):
            s = run(out, args.n, seed, m)
            line = ", ".join(f"{k} {p['median']:.4g} [{p['ci95'][0]:.4g}, {p['ci95'][1]:.4g}]"
                             for k, p in s["parameters"].items())
            print(f"seed {seed} m_lmc {m:.3g}: {line}")
        c, w = run(out, args.n, seed, 0.0)["parameters"], run(out, args.n, seed, args.m_lmc)["parameters"]
        for k in c:
            sd = (c[k]["ci68"][1] - c[k]["ci68"][0]) / 2.0
            shifts.setdefault(k, []).append((w[k]["median"] - c[k]["median"]) / sd)
    print("shift of the median, LMC minus control, in control posterior sd (per seed; mean):")
    for k, v in shifts.items():
        print(f"  {k}: {', '.join(f'{x:+.2f}' for x in v)}; mean {np.mean(v):+.2f}")


if __name__ == "__main__":
    main()
