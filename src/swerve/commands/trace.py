"""``swerve trace CATALOG``: trace every candidate back to the Galactic Centre (or not)."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path

from ..vocabulary import (
    DEFAULT_LAUNCH_RADIUS,
    DEFAULT_LMC_RADIUS,
    DEFAULT_MAX_TIME,
    DEFAULT_RADIUS,
    DISTANCE_PRIORS,
    LMC_TRACE_COLUMNS,
    TRACE_COLUMNS,
)
from ._common import (
    EXIT_ERROR,
    EXIT_OK,
    METAVAR,
    CommandError,
    DeprecatedAlias,
    existing_catalog,
    parse_param_list,
)


def add_parser(sub):
    p = sub.add_parser(
        "trace",
        help="trace candidates back in time: origin probability, flight time, launch speed, boundness",
        description=(
            "Read and validate CATALOG (ECSV, FITS, VOTable or CSV), draw K samples of each star from its "
            "measurement errors, integrate every sample backward in the Galaxy until its path has passed "
            "within --radius of the Galactic Centre (or for --max-time), and report per star: the probability "
            "that the path passes within the radius (p_origin), the flight time since the closest approach "
            "(median and 16-84% interval) of the paths that do, their implied launch speed at "
            "--launch-radius (energy conservation), the probability of being unbound (speed above the local "
            "escape speed) and the median closest approach. Samples are weighted by the distance prior only. "
            "Writes an ECSV table (units; meta with the Galaxy, solar parameters, K, seed, version) and a "
            "plot of flight time against distance coloured by p_origin. With --lmc the paths are integrated in "
            "the Galaxy perturbed by the Large Magellanic Cloud (a moving Hernquist sphere on its past orbit, "
            "with dynamical friction and the Milky Way's reflex), every column comes from that integration, "
            "and the LMC is reported as a second origin: p_lmc (a path within --lmc-radius of the LMC's "
            "centre), the closest approach to it and its time, and the flight time and speed relative to "
            "the LMC of the passing paths; the plot gets a second panel."
        ),
        epilog="Table columns: " + ", ".join(
            f"{name} [{unit.replace(' ', '')}]" if unit else name for name, (unit, _) in TRACE_COLUMNS.items()
        ) + "; with --lmc also " + ", ".join(
            f"{name} [{unit.replace(' ', '')}]" if unit else name for name, (unit, _) in LMC_TRACE_COLUMNS.items()
        ) + " (*_lo, *_hi: 16th and 84th percentiles). Exit codes: 0 done, 1 bad input (every catalog "
            "problem is listed, nothing is written), 2 bad usage.",
    )
    p.add_argument("catalog", metavar="CATALOG", help="observed (or mock) catalog")
    p.add_argument("--model", default=None, metavar="NAME", help="named Galaxy model (default: the package default)")
    p.add_argument("--param", action="append", metavar=METAVAR["param"], default=[],
                   help="change one Galaxy parameter, e.g. --param q_z=0.9 (repeatable; see `swerve galaxy`)")
    p.add_argument("--galaxy-param", dest="param", action=DeprecatedAlias, new="--param", append=True,
                   help=argparse.SUPPRESS)  # the old spelling, still accepted
    p.add_argument("--halo-flattening", default=None, choices=("potential", "density"),
                   help="flatten the halo in the potential (fast, analytic) or in the density (physical)")
    p.add_argument("--samples", type=int, default=500, metavar="K",
                   help="error samples per star (default: %(default)s)")
    p.add_argument("--radius", type=float, default=DEFAULT_RADIUS, metavar="KPC",
                   help="a path passing within this distance of the Galactic Centre counts as an origin there "
                        "(default: %(default)s kpc)")
    p.add_argument("--max-time", type=float, default=DEFAULT_MAX_TIME, metavar="MYR",
                   help="longest backward integration; paths stop earlier once they have passed within "
                        "--radius (default: %(default)s Myr)")
    p.add_argument("--launch-radius", type=float, default=DEFAULT_LAUNCH_RADIUS, metavar="KPC",
                   help="radius at which the implied launch speed is evaluated (default: %(default)s kpc = 3 pc)")
    p.add_argument("--lmc", action="store_true",
                   help="trace in the Galaxy perturbed by the Large Magellanic Cloud (its past orbit with dynamical "
                        "friction and the Milky Way's reflex) and report the LMC as a second origin (p_lmc); paths "
                        "that recede, unbound, from both the Galactic Centre and the LMC stop early")
    p.add_argument("--lmc-mass", type=float, default=None, metavar="MSUN",
                   help="LMC mass for --lmc (default 1.38e11 Msun, Erkal et al. 2019; range 0-2.5e11); implies --lmc")
    p.add_argument("--lmc-radius", type=float, default=None, metavar="KPC",
                   help=f"a path passing within this distance of the LMC's centre counts as an origin there "
                        f"(default: {DEFAULT_LMC_RADIUS:g} kpc, about three scale lengths of the LMC's disk); "
                        "implies --lmc")
    p.add_argument("--out", metavar="TABLE.ecsv", default=None,
                   help="per-star table (default: trace-<catalog name>.ecsv in the current folder)")
    p.add_argument("--plot", metavar="FILE.png", default=None,
                   help="summary plot (default: trace-<catalog name>.png in the current folder)")
    p.add_argument("--no-plot", action="store_true", help="do not draw the plot")
    p.add_argument("--columns", default=None, metavar=METAVAR["columns"], help="column mapping, e.g. ra=RA_deg,dec=DE_deg")
    p.add_argument("--units", default=None, metavar=METAVAR["units"], help="units of unit-less CSV columns, e.g. distance=pc")
    p.add_argument("--drop-invalid", action="store_true", help="drop invalid rows (reported) instead of refusing")
    p.add_argument("--seed", type=int, default=0, metavar=METAVAR["seed"], help="seed of the error samples (default: %(default)s; recorded)")
    p.add_argument("--distance-prior", default="none", choices=DISTANCE_PRIORS,
                   help="distance prior of stars whose distance comes from the parallax (default: %(default)s)")
    p.add_argument("--length-scale", type=float, default=10.0, metavar="KPC",
                   help="length scale L of --distance-prior exponential-length (default: %(default)s kpc)")
    p.add_argument("--parallax-zero-point", type=float, default=0.0, metavar="MAS",
                   help="subtract this zero point from every parallax (default: %(default)s; e.g. -0.017 for "
                        "Gaia EDR3's global offset)")
    p.add_argument("--solar", default=None, metavar="NAME", help="solar-parameter set (default v4.0)")
    p.add_argument("--top", type=int, default=20, metavar="N",
                   help="stars listed in the terminal summary, by origin probability (default: %(default)s)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def _check_out(path: Path, option: str, suffixes) -> Path:
    if path.suffix.lower() not in suffixes:
        raise CommandError(f"{option} {path}: expected a file name ending in {' or '.join(suffixes)}")
    if not path.parent.exists():
        raise CommandError(f"{option} {path}: folder {path.parent} does not exist")
    return path


def run(args) -> int:
    from ..catalog import CatalogError, read_catalog  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..frames import resolve_solar  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..galaxy import Galaxy  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..galaxy.lmc import LMC  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..galaxy.model import DEFAULT_GALAXY  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..measurement import distance_warning  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..plots import trace_plot  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..trace import trace_catalog, trace_summary, write_trace_table  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    if args.samples < 1:
        raise CommandError(f"--samples {args.samples}: expected a positive number of samples per star")
    for option, value in (("--radius", args.radius), ("--max-time", args.max_time),
                          ("--launch-radius", args.launch_radius), ("--length-scale", args.length_scale),
                          ("--lmc-radius", DEFAULT_LMC_RADIUS if args.lmc_radius is None else args.lmc_radius)):
        if not value > 0 or value == float("inf"):
            raise CommandError(f"{option} {value}: expected a positive number")
    lmc = None
    if args.lmc or args.lmc_mass is not None or args.lmc_radius is not None:
        try:
            lmc = LMC() if args.lmc_mass is None else LMC(m_lmc=args.lmc_mass)
        except ValueError as exc:
            raise CommandError(f"--lmc-mass {args.lmc_mass:g}: {exc}") from None
    if args.seed < 0:
        raise CommandError(f"--seed {args.seed}: expected a non-negative integer")
    if args.top < 0:
        raise CommandError(f"--top {args.top}: expected a non-negative integer")
    existing_catalog(args.catalog)
    stem = Path(args.catalog).name.split(".")[0] or "catalog"
    out = _check_out(Path(args.out) if args.out else Path(f"trace-{stem}.ecsv"), "--out", (".ecsv",))
    plot = None
    if not args.no_plot:
        plot = _check_out(Path(args.plot) if args.plot else Path(f"trace-{stem}.png"), "--plot",
                          (".png", ".pdf", ".svg"))
    params = parse_param_list(args.param, option="--param")
    galaxy = Galaxy.from_name(args.model or DEFAULT_GALAXY, halo_flattening=args.halo_flattening, **params)
    solar = resolve_solar(args.solar)
    try:
        catalog = read_catalog(args.catalog, columns=args.columns, units=args.units,
                               drop_invalid=args.drop_invalid, parallax_zero_point=args.parallax_zero_point)
    except CatalogError as exc:
        problems = exc.problems or [str(exc)]
        for problem in problems:
            print(f"swerve trace: error: {problem}", file=sys.stderr)
        if len(problems) > 1:
            print(f"swerve trace: {len(problems)} problems; nothing written", file=sys.stderr)
        return EXIT_ERROR
    for hint in catalog.hints + (distance_warning(catalog, args.distance_prior),):
        if hint:
            print(f"swerve trace: warning: {hint}", file=sys.stderr)

    from tqdm import tqdm  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    with tqdm(total=catalog.n * args.samples, unit="path", desc="tracing", disable=args.no_progress,
              file=sys.stderr) as bar:
        def progress(done, total):
            bar.update(done - bar.n)

        lmc_options = {} if lmc is None else {
            "lmc": lmc, "lmc_radius": DEFAULT_LMC_RADIUS if args.lmc_radius is None else args.lmc_radius}
        result = trace_catalog(catalog, galaxy, args.samples, args.seed, distance_prior=args.distance_prior,
                               solar=solar, length_scale=args.length_scale, radius=args.radius,
                               max_time=args.max_time, launch_radius=args.launch_radius, progress=progress,
                               **lmc_options)
    if catalog.problems:
        result.meta["dropped_problems"] = [str(problem) for problem in catalog.problems]
    write_trace_table(result, out)
    if plot is not None:
        trace_plot(result, plot)
    print(trace_summary(result, top=args.top))
    if catalog.problems:
        print(f"  {len(catalog.problems)} problem(s) in the catalog: those rows were dropped (--drop-invalid; "
              "listed in the table's meta)")
    print(f"  table written to {out}" + (f", plot to {plot}" if plot is not None else ""))
    return EXIT_OK
