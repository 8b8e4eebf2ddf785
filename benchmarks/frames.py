"""Benchmark: heliocentric <-> galactocentric transforms of a million stars (swerve.frames)
against astropy's SkyCoord on the same stars.

    python benchmarks/frames.py [--n 1000000]
"""

import argparse
import time

import numpy as np
from astropy import units as u
from astropy.coordinates import ICRS, Galactocentric, SkyCoord

from swerve.frames import galacto_to_helio, helio_to_galacto


def main():
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--n", type=int, default=1_000_000)
    n = ap.parse_args().n
    rng = np.random.default_rng(1)
    ra, dec = rng.uniform(0, 360, n), np.degrees(np.arcsin(rng.uniform(-1, 1, n)))
    d, pmra, pmdec, vlos = rng.uniform(1, 100, n), rng.normal(0, 1, n), rng.normal(0, 1, n), rng.normal(0, 300, n)
    helio_to_galacto(ra[:10], dec[:10], d[:10], pmra[:10], pmdec[:10], vlos[:10])  # derive the cached map
    t0 = time.perf_counter()
    pos, vel = helio_to_galacto(ra, dec, d, pmra, pmdec, vlos)
    t1 = time.perf_counter()
    galacto_to_helio(pos, vel)
    t2 = time.perf_counter()
    sc = SkyCoord(ra=ra * u.deg, dec=dec * u.deg, distance=d * u.kpc, pm_ra_cosdec=pmra * u.mas / u.yr,
                  pm_dec=pmdec * u.mas / u.yr, radial_velocity=vlos * u.km / u.s, frame=ICRS())
    t3 = time.perf_counter()
    sc.transform_to(Galactocentric())
    t4 = time.perf_counter()
    print(f"n = {n}")
    print(f"swerve helio_to_galacto: {t1 - t0:.3f} s; galacto_to_helio: {t2 - t1:.3f} s")
    print(f"astropy SkyCoord -> Galactocentric: {t4 - t3:.3f} s  (ratio {(t4 - t3) / (t1 - t0):.1f}x)")


if __name__ == "__main__":
    main()
