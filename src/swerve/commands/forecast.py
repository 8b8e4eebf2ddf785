"""``swerve forecast``: expected posterior widths of q_z, q_y and the chance of telling an oblate
from a prolate halo, against sample size, for a survey's errors (:mod:`swerve.forecast`)."""

from __future__ import annotations

from ..config import template
from ._common import (
    EXIT_OK,
    METAVAR,
    CommandError,
    add_template_flag,
    check_option,
    emulator_option,
    parse_param_list,
    worker_pool,
)


def add_parser(sub):
    p = sub.add_parser(
        "forecast",
        help="plan a survey: posterior widths of q_z, q_y and P(oblate vs prolate) against N",
        description=(
            "Forecast for survey planning: for each sample size, fit synthetic catalogs drawn from the full "
            "simulation at a true halo (one trajectory bank; not from the emulator) against the emulator, and "
            "report the expected 68% half-widths of q_z and q_y and the fraction of catalogs with "
            "P(q_z<1) > threshold (P(q_z>1) for a prolate truth). Writes forecast.json and forecast.png. "
            "Options override the TOML file (--config; see --template)."
        ),
    )
    p.add_argument("--emulator", metavar=METAVAR["emulator"],
                   help="emulator folder made by swerve train (default: the shipped default emulator, or "
                        "$SWERVE_EMULATOR)")
    p.add_argument("--n", default=None, metavar="N1,N2,...", help="sample sizes, e.g. 50,100,200,400,800 (the default)")
    p.add_argument("--errors", default=None, metavar="ERROR_MODEL",
                   help="survey errors: 'pm=MAS_YR,vlos=KM_S,dist=FRACTION' with optional plx=MAS (parallax) and "
                        "corr=RHO (pmra-pmdec); a value A:B:P means sigma(d) = A + B (d/10 kpc)^P; 'none' for "
                        "error-free; or a .toml file with keys pm, vlos, distance_frac, parallax, corr_pmra_pmdec "
                        "(default pm=0.02,vlos=5,dist=0.1)")
    p.add_argument("--truth", action="append", default=[], metavar=METAVAR["param"],
                   help="a true parameter (repeatable; default q_z=0.85, the others at the midpoints of the bounds)")
    p.add_argument("--catalogs", type=int, default=None, metavar="K", help="synthetic catalogs per sample size (default 8)")
    p.add_argument("--threshold", type=float, default=None, metavar="P",
                   help="probability a catalog needs on the true side of q_z = 1 to count as decisive (default 0.95)")
    p.add_argument("--out", metavar=METAVAR["out_dir"],
                   help="output folder (created; each finished sample size is written at once, and a rerun "
                        "with the same settings resumes)")
    p.add_argument("--config", metavar=METAVAR["config"], help="forecast settings, incl. [fit] and [bank]")
    add_template_flag(p, help="print the settings template (with the options given) and exit")
    p.add_argument("--jobs", type=int, default=None, metavar=METAVAR["jobs"], help="worker processes for the fits (default 2)")
    p.add_argument("--seed", type=int, default=None, metavar=METAVAR["seed"], help="master seed (default 1)")
    p.set_defaults(func=run)


def _int_list(text, option):
    try:
        vals = [int(v) for v in text.split(",") if v.strip()]
    except ValueError:
        raise CommandError(f"{option} {text!r}: expected integers separated by commas, e.g. 50,100,200") from None
    if not vals:
        raise CommandError(f"{option} {text!r}: expected at least one sample size")
    return vals


def run(args) -> int:
    from ..forecast import FORECAST_SCHEMA, load_forecast_config, run_forecast  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    over = {"n_stars": _int_list(args.n, "--n") if args.n else None, "errors": args.errors,
            "catalogs": args.catalogs, "threshold": args.threshold, "n_jobs": args.jobs, "seed": args.seed}
    if args.truth:
        over["truth"] = parse_param_list(args.truth, "--truth")
    for option, key, shown in (("--n", "n_stars", args.n), ("--catalogs", "catalogs", args.catalogs),
                               ("--threshold", "threshold", args.threshold), ("--jobs", "n_jobs", args.jobs),
                               ("--seed", "seed", args.seed)):
        check_option(option, over[key], FORECAST_SCHEMA, "", key, shown=shown)  # named by its flag
    cfg = load_forecast_config(args.config, over)
    if args.template:
        top = {k: v for k, v in cfg.items() if k not in ("fit", "bank")}
        print(template(FORECAST_SCHEMA, {"": top, "fit": cfg["fit"], "bank": cfg["bank"]}))
        return EXIT_OK
    if not args.out:
        raise CommandError("--out is required")
    emulator = emulator_option(args.emulator)
    with worker_pool():
        doc = run_forecast(emulator, args.out, cfg, log=lambda m: print(f"swerve forecast: {m}"))
    print(f"swerve forecast: results in {args.out} ({doc['settings']['seconds']:.0f} s)")
    return EXIT_OK
