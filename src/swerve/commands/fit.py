"""``swerve fit CATALOG``: infer the halo shape and mass from a catalog with an emulator."""

from __future__ import annotations

import os
from pathlib import Path

from ..cli import EXIT_OK, CommandError

DEFAULT_EMULATOR = Path(__file__).resolve().parents[3] / "emulators" / "default"


def default_emulator() -> Path:
    """The shipped default emulator: $SWERVE_EMULATOR, else ./emulators/default (a clone of the
    repository), else emulators/default beside an editable install's sources."""
    env = os.environ.get("SWERVE_EMULATOR")
    if env:
        return Path(env)
    here = Path("emulators") / "default"
    return here if here.exists() else DEFAULT_EMULATOR


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
    p.add_argument("--emulator", metavar="PATH", default=None,
                   help="emulator folder (default: the shipped emulators/default or $SWERVE_EMULATOR)")
    p.add_argument("--config", metavar="FIT.toml", help="fit configuration (priors, errors, sampler); see --template")
    p.add_argument("--out", metavar="DIR", default=None, help="run folder (default: fit-<catalog name>)")
    p.add_argument("--variants", metavar="VARIANTS.toml", help="run the listed nuisance variants and compare them")
    p.add_argument("--seed", type=int, default=None, help="sampler seed (overrides [sampler] seed)")
    p.add_argument("--max-steps", type=int, default=None, help="step cap (overrides [sampler] max_steps)")
    p.add_argument("--samples", type=int, default=None, help="distance samples per star (overrides [errors] samples)")
    p.add_argument("--columns", default=None, help="column mapping, e.g. ra=RA_deg,dec=DE_deg")
    p.add_argument("--units", default=None, help="units of unit-less CSV columns, e.g. distance=pc")
    p.add_argument("--drop-invalid", action="store_true", help="drop invalid rows (reported) instead of refusing")
    p.add_argument("--jobs", type=int, default=1, help="variants run in parallel (with --variants)")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.add_argument("--template", "--print-config", dest="template", action="store_true",
                   help="print a documented fit configuration and exit")
    p.set_defaults(func=run)


def _overrides(args) -> dict:
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
    return o


def run(args) -> int:
    from ..config import template
    from ..fit import FIT_SCHEMA, load_fit_config, run_fit

    if args.template:
        print(template(FIT_SCHEMA))
        return EXIT_OK
    if args.catalog is None:
        raise CommandError("expected a CATALOG file (or --template)")
    if not Path(args.catalog).exists():
        raise CommandError(f"{args.catalog}: no such catalog file")
    emulator = Path(args.emulator) if args.emulator else default_emulator()
    if not emulator.exists():
        raise CommandError(f"{emulator}: no emulator folder there (train one with `swerve train`, or pass --emulator)")
    out = Path(args.out) if args.out else Path(f"fit-{Path(args.catalog).stem}")
    cfg = load_fit_config(args.config, _overrides(args))
    if args.variants:
        from ..variants import run_variants

        text = run_variants(args.catalog, emulator, out, cfg, args.variants, jobs=args.jobs,
                            overrides=_overrides(args))
        print(text)
        return EXIT_OK
    outcome = run_fit(args.catalog, emulator, out, cfg, progress=not args.no_progress)
    print(outcome.terminal)
    print(f"  results in {out}/ (summary.json, summary.ecsv, stars.ecsv, corner.png, ppc.png, chain.h5)")
    return EXIT_OK
