"""``swerve fit CATALOG``: infer the halo shape and mass from a catalog with an emulator."""

from __future__ import annotations

from pathlib import Path

from ..config import template
from ..vocabulary import DISTANCE_PRIORS
from ._common import (
    EXIT_OK,
    METAVAR,
    CommandError,
    add_template_flag,
    check_option,
    emulator_option,
    existing_catalog,
)


def add_parser(sub):
    p = sub.add_parser(
        "fit",
        help="infer the halo axis ratios and mass from a catalog (emcee on the emulator)",
        description=(
            "Read and validate CATALOG (ECSV, FITS, VOTable or CSV; see the README's catalog section), "
            "draw each star's distance samples, and sample the posterior of the emulator's parameters "
            "with emcee until converged. Writes the chain, summary.json/.ecsv, stars.ecsv, corner.png, "
            "ppc.png and fit.json to --out. Rerunning into the same folder reuses every unchanged "
            "star's terms and resumes an interrupted chain; after stars are added to a converged fit it "
            "importance-reweights the existing chain by them (seconds) instead of sampling again, "
            "unless the weights are unreliable ([sampler] refit). With --variants, run several "
            "nuisance variants side by side."
        ),
    )
    p.add_argument("catalog", metavar="CATALOG", nargs="?", help="observed (or mock) catalog")
    p.add_argument("--emulator", metavar=METAVAR["emulator"], default=None,
                   help="emulator folder (default: the shipped default emulator, or $SWERVE_EMULATOR)")
    p.add_argument("--config", metavar=METAVAR["config"], help="fit configuration (priors, errors, sampler); see --template")
    p.add_argument("--out", metavar=METAVAR["out_dir"], default=None, help="run folder (default: fit-<catalog name>)")
    p.add_argument("--variants", metavar="VARIANTS.toml", help="run the listed nuisance variants and compare them")
    p.add_argument("--seed", type=int, default=None, metavar=METAVAR["seed"], help="sampler seed (overrides [sampler] seed)")
    p.add_argument("--max-steps", type=int, default=None, metavar="N", help="step cap (overrides [sampler] max_steps)")
    p.add_argument("--samples", type=int, default=None, metavar="K",
                   help="distance samples per star (overrides [errors] samples)")
    p.add_argument("--columns", default=None, metavar=METAVAR["columns"], help="column mapping, e.g. ra=RA_deg,dec=DE_deg")
    p.add_argument("--units", default=None, metavar=METAVAR["units"], help="units of unit-less CSV columns, e.g. distance=pc")
    p.add_argument("--drop-invalid", action="store_true", help="drop invalid rows (reported) instead of refusing")
    _add_distance_options(p)
    p.add_argument("--jobs", type=int, default=1, metavar=METAVAR["jobs"], help="variants run in parallel (with --variants)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    add_template_flag(p, help="print a documented fit configuration and exit")
    p.set_defaults(func=run)


#: command-line options that override a fit configuration key: option -> (section, key, attribute)
_OPTION_KEYS = {"--seed": ("sampler", "seed", "seed"), "--max-steps": ("sampler", "max_steps", "max_steps"),
                "--samples": ("errors", "samples", "samples"),
                "--length-scale": ("errors", "length_scale", "length_scale"),
                "--parallax-zero-point": ("catalog", "parallax_zero_point", "parallax_zero_point")}


def _add_distance_options(p):

    p.add_argument("--distance-prior", default=None, choices=DISTANCE_PRIORS,
                   help="distance prior of stars whose distance comes from the parallax (overrides [errors] "
                        "distance_prior; default none)")
    p.add_argument("--length-scale", type=float, default=None, metavar="KPC",
                   help="length scale L of --distance-prior exponential-length (overrides [errors] length_scale)")
    p.add_argument("--parallax-zero-point", type=float, default=None, metavar="MAS",
                   help="subtract this zero point from every parallax (overrides [catalog] parallax_zero_point; "
                        "default 0; e.g. -0.017 for Gaia EDR3's global offset)")


def _distance_overrides(args, o: dict) -> None:
    if args.distance_prior is not None:
        o.setdefault("errors", {})["distance_prior"] = args.distance_prior
    if args.length_scale is not None:
        o.setdefault("errors", {})["length_scale"] = args.length_scale
    if args.parallax_zero_point is not None:
        o.setdefault("catalog", {})["parallax_zero_point"] = args.parallax_zero_point


def _overrides(args) -> dict:
    from ..fit import FIT_SCHEMA  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    for option, (section, key, attr) in _OPTION_KEYS.items():  # each named by its flag when wrong
        check_option(option, getattr(args, attr), FIT_SCHEMA, section, key)
    o: dict = {}
    if args.seed is not None:
        o.setdefault("sampler", {})["seed"] = args.seed
    if args.max_steps is not None:
        o.setdefault("sampler", {})["max_steps"] = args.max_steps
    if args.samples is not None:
        o.setdefault("errors", {})["samples"] = args.samples
    if args.columns is not None:
        o.setdefault("catalog", {})["columns"] = args.columns
    if args.units is not None:
        o.setdefault("catalog", {})["units"] = args.units
    if args.drop_invalid:
        o.setdefault("catalog", {})["drop_invalid"] = True
    _distance_overrides(args, o)
    return o


def run(args) -> int:
    from ..fit import FIT_SCHEMA, load_fit_config, run_fit  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    if args.template:
        print(template(FIT_SCHEMA))
        return EXIT_OK
    if args.catalog is None:
        raise CommandError("expected a CATALOG file (or --template)")
    existing_catalog(args.catalog)
    if args.jobs < 1:
        raise CommandError(f"--jobs {args.jobs}: expected a positive number of worker processes")
    emulator = emulator_option(args.emulator)
    out = Path(args.out) if args.out else Path(f"fit-{Path(args.catalog).stem}")
    if out.exists() and not out.is_dir():
        raise CommandError(f"--out {out}: a file is there; expected a run folder (new or of an earlier fit)")
    cfg = load_fit_config(args.config, _overrides(args))
    if args.variants:
        from ..variants import run_variants  # noqa: PLC0415 - lazy: keeps the CLI's start fast

        text = run_variants(args.catalog, emulator, out, cfg, args.variants, jobs=args.jobs,
                            overrides=_overrides(args))
        print(text)
        return EXIT_OK
    outcome = run_fit(args.catalog, emulator, out, cfg, progress=not args.no_progress)
    print(outcome.terminal)
    chain = ", chain.h5" if (out / "chain.h5").exists() else ""
    print(f"  results in {out}/ (summary.json, summary.ecsv, stars.ecsv, corner.png, ppc.png{chain})")
    return EXIT_OK
