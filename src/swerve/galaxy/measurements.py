"""Measured Milky Way circular and escape speeds, for plausibility checks of a model Galaxy.

Each entry: radius (kpc), value and asymmetric errors (km/s), source. Values as listed in the
project's reference notes; the authors of the Gnedin et al. entry are from memory.
"""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Measurement:
    quantity: str  # "circular_velocity" or "escape_speed"
    radius_kpc: float
    value: float
    err_low: float
    err_high: float
    source: str
    note: str = ""
    label: str = ""


MEASUREMENTS = (
    Measurement("circular_velocity", 8.122, 229.0, 0.2, 0.2,
                "Eilers, Hogg, Rix & Ness 2019, ApJ 871, 120",
                "statistical error; systematics 2-5%", "Eilers et al. 2019"),
    Measurement("circular_velocity", 80.0, 193.0, 18.0, 38.0,
                "Gnedin et al. 2010, ApJL 720, L108", "range 175-231 km/s", "Gnedin et al. 2010"),
    Measurement("escape_speed", 8.122, 521.0, 30.0, 46.0,
                "Williams, Belokurov, Casey & Evans 2017, MNRAS 468, 2359", "local", "Williams et al. 2017"),
    Measurement("escape_speed", 50.0, 379.0, 28.0, 34.0,
                "Williams, Belokurov, Casey & Evans 2017, MNRAS 468, 2359", "", "Williams et al. 2017"),
    Measurement("escape_speed", 8.122, 533.0, 41.0, 54.0,
                "Piffl et al. 2014, A&A 562, A91",
                "escape to 3 R340, not to infinity: lower than an untruncated model's",
                "Piffl et al. 2014 (to 3 R340)"),
)
