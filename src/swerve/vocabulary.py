"""Names, defaults and column descriptions that the command-line parsers quote.

Plain data only, importing nothing heavy, so that building the parsers (every ``swerve`` call,
``--help`` included) does not load numba, astropy or scipy. The modules that own these values
(:mod:`swerve.trace`, :mod:`swerve.orbits_lmc`, :mod:`swerve.measurement`) import them from here
and export them under their old names.
"""

from __future__ import annotations

#: Distance priors of stars whose distance comes from the parallax (:mod:`swerve.measurement`).
DISTANCE_PRIORS = ("none", "uniform-volume", "exponential-length")

#: Default radius of the LMC-origin test, kpc.  A choice, stated: a little over three scale
#: lengths of the LMC's stellar disk (exponential scale length ~1.5 kpc, van der Marel 2001,
#: AJ 122, 1827; from memory), well inside the Hernquist scale radius of the whole LMC (16 kpc
#: for 1.38e11 Msun), and a few times the spread that a 10% distance error at 50 kpc gives a
#: traced path.
DEFAULT_LMC_RADIUS = 5.0

#: Default radius of the origin test, kpc.
DEFAULT_RADIUS = 1.0
#: Default longest backward integration, Myr.
DEFAULT_MAX_TIME = 1000.0
#: Radius at which the launch speed is evaluated, kpc (3 pc, common practice).
DEFAULT_LAUNCH_RADIUS = 0.003

#: Output columns: name -> (unit, description).
TRACE_COLUMNS: dict[str, tuple[str, str]] = {
    "id": ("", "star identifier"),
    "ra": ("deg", "ICRS right ascension"),
    "dec": ("deg", "ICRS declination"),
    "distance": ("kpc", "heliocentric distance, weighted median over the samples"),
    "r_gc": ("kpc", "present Galactocentric radius, weighted median"),
    "v_gc": ("km / s", "present Galactocentric speed, weighted median"),
    "p_origin": ("", "weighted fraction of the paths that pass within the radius of the Galactic Centre"),
    "n_pass": ("", "number of samples whose path passes within the radius"),
    "t_flight": ("Myr", "time since the closest approach of the passing paths, weighted median"),
    "t_flight_lo": ("Myr", "16th percentile of t_flight"),
    "t_flight_hi": ("Myr", "84th percentile of t_flight"),
    "v_launch": ("km / s", "implied speed at the launch radius (energy conservation) of the passing paths, median"),
    "v_launch_lo": ("km / s", "16th percentile of v_launch"),
    "v_launch_hi": ("km / s", "84th percentile of v_launch"),
    "p_unbound": ("", "weighted fraction of samples faster than the local escape speed"),
    "r_min": ("kpc", "closest approach to the Galactic Centre (first passage or within max_time), weighted median"),
    "ess": ("", "Kish effective sample size of the weights"),
    "n_failed": ("", "samples whose integration failed (left out)"),
}

#: Columns added with the LMC (``lmc=...``, ``swerve trace --lmc``), after ``r_min``:
#: name -> (unit, description).
LMC_TRACE_COLUMNS: dict[str, tuple[str, str]] = {
    "p_lmc": ("", "weighted fraction of the paths that pass within the LMC radius of the LMC's centre"),
    "n_pass_lmc": ("", "number of samples whose path passes within the LMC radius"),
    "d_lmc_min": ("kpc", "closest approach to the LMC's centre (integrated part of each path), weighted median"),
    "t_lmc_min": ("Myr", "time since the closest approach to the LMC's centre, weighted median over all paths"),
    "t_flight_lmc": ("Myr", "time since the closest approach to the LMC's centre of the paths passing it, "
                            "weighted median"),
    "t_flight_lmc_lo": ("Myr", "16th percentile of t_flight_lmc"),
    "t_flight_lmc_hi": ("Myr", "84th percentile of t_flight_lmc"),
    "v_eject_lmc": ("km / s", "speed relative to the LMC's centre at its closest approach, of the paths "
                              "passing it, weighted median"),
    "v_eject_lmc_lo": ("km / s", "16th percentile of v_eject_lmc"),
    "v_eject_lmc_hi": ("km / s", "84th percentile of v_eject_lmc"),
}
