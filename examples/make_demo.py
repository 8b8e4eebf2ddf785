"""Make examples/demo.ecsv: an invented mock catalog of 300 hypervelocity stars.

True parameters of this invented scenario (also written into the table's meta):

* Galaxy: swerve's default model (swerve-mw-1) with a triaxial halo, q_y = 1.1, q_z = 0.85,
  every other parameter at its default. The halo is flattened in the density when
  ``halo_flattening="density"`` is available in this swerve, otherwise in the potential
  (the script prints which; the meta records it). The selection stops at 100 kpc, inside
  the region where a potential-flattened halo of these axis ratios keeps a positive density
  (it turns negative beyond ~124 kpc), so both variants are physical.
* Launch: bounded power law in launch speed, p(v) ∝ v^-0.5 on 700–3000 km/s, radial from
  3 pc, isotropic; constant ejection rate, flight times uniform on 0–300 Myr. (The launch
  family and its fixed speed range are those of the default emulator, training/default.toml,
  so the demo lies inside the emulator's model: a fit should recover the truth.)
* Selection (on the true stars): 10 kpc < r < 100 kpc and outgoing (v_r > 0). No cut on
  the speed: the likelihood conditions on position only, so a velocity cut would have to be
  part of the emulator's training selection too.
* Errors (optimistic future survey), σ(d) = a + b (d / 10 kpc)^p at the true distance d:
  parallax ±0.02 mas (constant); an independent spectrophotometric distance ±10%;
  proper motions ±0.01 mas/yr at 10 kpc growing linearly with distance (a = 0, b = 0.01,
  p = 1), pmra–pmdec correlation 0.1; line-of-sight velocity ±5 km/s.
* 300 stars, seed 20261201, solar parameters "v4.0"; bank of 8000 octant orbits, Δt = 1 Myr.

Run: ``python examples/make_demo.py`` (about 10 s on 2 cores).
"""

from pathlib import Path

import numpy as np

from swerve.galaxy import HALO_FLATTENINGS, Galaxy
from swerve.launch import BoundedPowerLawSpeed
from swerve.measurement import ErrorLaw, ErrorModel
from swerve.population import make_mock, write_mock
from swerve.selection import Selection

SEED = 20261201
N_STARS = 300
FLATTENING = "density" if "density" in HALO_FLATTENINGS else "potential"
GALAXY = Galaxy.from_name(halo_flattening=FLATTENING, q_y=1.1, q_z=0.85)
LAUNCH = BoundedPowerLawSpeed(v_min=700.0, v_max=3000.0, slope=-0.5)
FLIGHT_TIME_MAX = 300.0  # Myr
SELECTION = Selection(r_min=10.0, r_max=100.0, outgoing=True)
ERRORS = ErrorModel(parallax=ErrorLaw(0.02), distance_frac=ErrorLaw(0.10),
                    pm=ErrorLaw(0.0, 0.01, 1.0), corr_pmra_pmdec=0.1, vlos=ErrorLaw(5.0))


def main(out=None):
    out = Path(__file__).with_name("demo.ecsv") if out is None else Path(out)
    print(f"halo flattened in the {FLATTENING}")
    table = make_mock(GALAXY, LAUNCH, SELECTION, ERRORS, N_STARS, SEED, solar="v4.0",
                      flight_time_max=FLIGHT_TIME_MAX, bank_size=8000, bank_options={"dt": 1.0})
    table.meta["scenario"] = ("invented demo scenario of swerve: see examples/make_demo.py for the true "
                              "parameters, selection and error model")
    table.meta["halo_flattening_note"] = (
        "density flattening was not available; the halo is flattened in the potential"
        if FLATTENING == "potential" else "halo flattened in the density")
    write_mock(table, out)
    d = np.asarray(table["distance"])
    print(f"{len(table)} stars -> {out}; population ESS {table.meta['population_ess']:.0f}; "
          f"observed distance median {np.median(d):.1f} kpc (range {d.min():.1f}-{d.max():.1f})")
    print("removed by each cut (bank samples):", table.meta["selection_removed"])


if __name__ == "__main__":
    main()
