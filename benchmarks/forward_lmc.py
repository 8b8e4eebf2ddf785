"""The forward model with the LMC (swerve.bank_lmc) side by side with the static bank.

One run, one machine: a static octant bank (swerve.bank.build_bank) and LMC banks (one orbit per
present-day star, whole sky) with m_lmc = 0 and with the default LMC, all of the same Galaxy;
each reweighted to the default emulator's launch model and selection. Reports the build time,
the selected population's effective sample size (ESS) and ESS per second, the expected number
of stars per unit ejection rate (must agree: the reweighting is the same formula), the weighted
mean folded deflection v_theta' (with its standard error), and, launch by launch, the rms change
of v_theta' that the LMC makes (same Sobol launches with and without it).

    python benchmarks/forward_lmc.py [--static 2000] [--lmc 40000] [--q-z 0.9]
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from swerve.bank import build_bank
from swerve.bank_lmc import build_lmc_bank
from swerve.frames import folded_v_theta
from swerve.galaxy import Galaxy
from swerve.galaxy.lmc import LMC
from swerve.launch import BoundedPowerLawSpeed
from swerve.population import population_from_bank
from swerve.selection import Selection


def _wmean(p, x):
    w = p.weight / p.weight.sum()
    m = float(np.sum(w * x))
    return m, float(np.sqrt(np.sum(w**2 * (x - m) ** 2)))


def _total_se(bank, pop):
    per_orbit = np.zeros(bank.n_orbits)
    np.add.at(per_orbit, pop.orbit, pop.weight)
    return float(np.sqrt(bank.n_orbits) * per_orbit.std())


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--static", type=int, default=2000, help="orbits of the static octant bank")
    ap.add_argument("--lmc", type=int, default=40000, help="orbits of each LMC bank")
    ap.add_argument("--q-z", type=float, default=0.9)
    ap.add_argument("--r-max", type=float, default=100.0)
    args = ap.parse_args()
    g = Galaxy.default(q_z=args.q_z)
    launch = BoundedPowerLawSpeed(700.0, 3000.0, -0.5)
    sel = Selection(r_min=10.0, r_max=args.r_max, outgoing=True)
    # warm-up (compilation) outside the timings
    build_bank(g, 16, 1, r_max=args.r_max)
    build_lmc_bank(g, 16, 1, r_max=args.r_max)

    rows = []
    t = time.perf_counter()
    sb = build_bank(g, args.static, 3, t_max=300.0, dt=1.0, r_min_store=10.0, r_max=args.r_max)
    rows.append(("static octant bank", sb, time.perf_counter() - t))
    for label, lmc in (("LMC bank, m_lmc = 0", LMC(m_lmc=0.0)), ("LMC bank, m_lmc = 1.38e11", LMC())):
        t = time.perf_counter()
        b = build_lmc_bank(g, args.lmc, 4, lmc=lmc, r_max=args.r_max)
        rows.append((label, b, time.perf_counter() - t))

    print(f"Galaxy {g.name}, selection 10 < r < {args.r_max:g} kpc outgoing, launch v^-0.5 on 700-3000 km/s")
    print("| bank | orbits | build (s) | stored samples | population ESS | ESS / s | stars per unit rate (Myr) "
          "| mean v_theta' (km/s) |")
    print("|---|---|---|---|---|---|---|---|")
    pops = []
    for label, b, secs in rows:
        p = population_from_bank(b, launch, selection=sel)
        pops.append(p)
        ess = float(p.weight.sum() ** 2 / np.sum(p.weight**2))
        m, se = _wmean(p, p.folded_v_theta().astype(float))
        tot = f"{p.total_weight:.3f}" + ("" if b.directions == "octant" else f" ± {_total_se(b, p):.3f}")
        print(f"| {label} | {b.n_orbits} | {secs:.2f} | {b.n_stored} | {ess:.0f} | {ess / secs:.0f} | {tot} "
              f"| {m:.3f} ± {se:.3f} |")

    b0, b1 = rows[1][1], rows[2][1]
    common = np.intersect1d(b0.orbit, b1.orbit)
    i0, i1 = np.searchsorted(b0.orbit, common), np.searchsorted(b1.orbit, common)

    p0, p1 = b0.pos[i0].astype(float), b1.pos[i1].astype(float)
    d = folded_v_theta(p1, b1.vel[i1].astype(float)) - folded_v_theta(p0, b0.vel[i0].astype(float))
    far = np.linalg.norm(p0, axis=1) > 50.0
    print(f"same launches with and without the LMC ({len(common)} stars stored in both): rms change of v_theta' "
          f"{np.sqrt(np.mean(d**2)):.2f} km/s, beyond 50 kpc {np.sqrt(np.mean(d[far]**2)):.2f} km/s "
          f"({int(far.sum())} stars); position change median "
          f"{np.median(np.linalg.norm(b1.pos[i1] - b0.pos[i0], axis=1)):.2f} kpc")


if __name__ == "__main__":
    main()
