"""``swerve validate``: check an emulator against held-out full simulations.

Writes to ``--out``: ``validation.json`` (sections ``settings``, ``accuracy``, ``calibration``,
``power``; layout in :func:`swerve.validation.run_validation`), ``accuracy.png``,
``accuracy_map.png``, ``calibration.png``, ``power.png`` and ``power.md`` (the power table).
"""

from __future__ import annotations

from ..config import load_config, template
from ._common import EXIT_OK, METAVAR, CommandError, add_template_flag, emulator_option, worker_pool


def add_parser(sub):
    p = sub.add_parser(
        "validate",
        help="check an emulator against held-out full simulations: accuracy, calibration, power",
        description=(
            "Validate an emulator against a held-out run (swerve train CONFIG --out DIR --held-out): "
            "emulator accuracy (emulated vs simulated summaries normalised by both uncertainties), "
            "simulation-based calibration (rank histograms and 68%/95% coverage with binomial error bars, "
            "from catalogs drawn from the held-out full simulations) and power against sample size "
            "(how often the posterior median of q_z, rounded to a grid, is the true value), side by side "
            "with the KS-test baseline. Settings come from a TOML file (--config; see --template); "
            "the defaults are the full run, which takes hours: training/validate-ci.toml is a small one."
        ),
    )
    p.add_argument("--emulator", metavar=METAVAR["emulator"],
                   help="emulator folder made by swerve train (default: the shipped default emulator, or "
                        "$SWERVE_EMULATOR)")
    p.add_argument("--held-out", metavar=METAVAR["out_dir"], help="held-out run folder of the same training configuration")
    p.add_argument("--out", metavar=METAVAR["out_dir"], help="report folder (created)")
    p.add_argument("--config", metavar=METAVAR["config"], help="validation settings (default: the full run)")
    add_template_flag(p, help="print the settings template (with --config's values) and exit")
    p.add_argument("--jobs", type=int, default=None, metavar=METAVAR["jobs"], help="worker processes for the fits (overrides n_jobs)")
    p.add_argument("--seed", type=int, default=None, metavar=METAVAR["seed"], help="master seed (overrides seed)")
    p.set_defaults(func=run)


def run(args) -> int:
    from ..validation import VALIDATE_SCHEMA, load_validate_config, run_validation  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    if args.template:
        print(template(VALIDATE_SCHEMA, load_config(args.config, VALIDATE_SCHEMA) if args.config else None))
        return EXIT_OK
    for opt, val in (("--held-out", args.held_out), ("--out", args.out)):
        if not val:
            raise CommandError(f"{opt} is required")
    emulator = emulator_option(args.emulator)
    cfg = load_validate_config(args.config)
    if args.jobs is not None:
        if args.jobs < 1:
            raise CommandError(f"--jobs {args.jobs}: expected a positive number of workers")
        cfg["n_jobs"] = args.jobs
    if args.seed is not None:
        if args.seed < 0:
            raise CommandError(f"--seed {args.seed}: expected a non-negative integer")
        cfg["seed"] = args.seed
    with worker_pool():
        doc = run_validation(emulator, args.held_out, args.out, cfg, log=lambda m: print(f"swerve validate: {m}"))
    cal = doc["calibration"]
    if "pass" in cal:
        print(f"swerve validate: calibration {'PASS' if cal['pass'] else 'FAIL'} "
              f"({cal['n_fitted']} catalogs; " + ", ".join(
                  f"{n}: 68% {v['coverage68']['observed']:.2f}, 95% {v['coverage95']['observed']:.2f}, "
                  f"ranks p = {v['rank_test']['chi2_p']:.2g}" for n, v in cal["parameters"].items()) + ")")
    print(f"swerve validate: report in {args.out} ({doc['settings']['timing_s']['total']:.0f} s)")
    return EXIT_OK
