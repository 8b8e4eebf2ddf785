"""``swerve train CONFIG --out RUN_DIR``: simulate a design of Galaxies and fit the emulator."""

from __future__ import annotations

import functools
import itertools
import json
import time
from pathlib import Path

import numpy as np

from ..config import template
from ._common import EXIT_OK, METAVAR, CommandError, add_template_flag


def add_parser(sub):
    p = sub.add_parser(
        "train",
        help="run the training simulations of a configuration and fit its emulator",
        description=(
            "Integrate one trajectory bank per Galaxy design point of CONFIG (a TOML training "
            "configuration), compute the summaries at several launch-model points of each by "
            "reweighting, and fit a Gaussian-process emulator to them, written to RUN_DIR/emulator. "
            "Every finished design point is kept in RUN_DIR/points; rerunning the same command "
            "resumes, and a RUN_DIR made by another configuration is refused. With --held-out, "
            "simulate the separate held-out design instead (for `swerve validate`) and fit nothing."
        ),
    )
    p.add_argument("config", nargs="?", help="training configuration (TOML); see --template")
    p.add_argument("--out", metavar="RUN_DIR", help="run folder (created; resumed when it exists)")
    p.add_argument("--held-out", action="store_true", help="simulate the held-out design instead")
    p.add_argument("--jobs", type=int, default=-1, metavar=METAVAR["jobs"],
                   help="local worker processes (default: all cores; 1 runs serially)")
    g = p.add_mutually_exclusive_group()
    g.add_argument("--dask", metavar="ADDRESS", help="run on an existing dask.distributed scheduler")
    g.add_argument("--dask-local", type=int, metavar="N", help="start a local Dask cluster of N workers")
    p.add_argument("--emulator-out", metavar=METAVAR["out_dir"], help="write the emulator here (default RUN_DIR/emulator)")
    p.add_argument("--no-fit", action="store_true", help="simulate only; do not fit the emulator")
    add_template_flag(p, help="print a documented configuration with every default and exit")
    p.add_argument("--no-progress", action="store_true", help="no progress bar")
    p.set_defaults(func=run)


def run(args) -> int:
    from ..simulate import TRAIN_SCHEMA, load_training_config, simulate_point, simulation_hash, training_table  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..training import collect, make_design, run_design  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    if args.template:
        print(template(TRAIN_SCHEMA))
        return EXIT_OK
    if not args.config or not args.out:
        raise CommandError("expected a CONFIG file and --out RUN_DIR (or --template)")
    if not Path(args.config).is_file():
        raise CommandError(f"{args.config}: no such configuration file")
    setup = load_training_config(args.config)
    cfg = setup.cfg
    if cfg["emulator"]["scale_azimuthal"] and "q_y" not in setup.parameter_names:
        raise CommandError(f"{args.config}: [emulator] scale_azimuthal needs q_y among the inferred "
                           "parameters ([galaxy] infer)")
    d = cfg["design"]
    n = d["held_out_size"] if args.held_out else d["size"]
    names, points = make_design(setup.galaxy_infer, n, method=d["method"], seed=d["seed"], held_out=args.held_out)
    backend = "dask" if (args.dask or args.dask_local) else ("serial" if args.jobs == 1 else "loky")
    task = functools.partial(simulate_point, cfg)
    t0 = time.perf_counter()
    summary = run_design(
        task, points, names, args.out, simulation_hash(cfg), d["seed"], n_jobs=args.jobs, backend=backend,
        dask_address=args.dask, dask_local_workers=args.dask_local, progress=not args.no_progress,
        held_out=args.held_out,
    )
    wall = time.perf_counter() - t0
    print(f"swerve train: {summary.n_points} design points in {args.out} "
          f"({summary.n_computed} computed, {summary.n_skipped} already done) in {wall:.1f} s")
    if args.held_out or args.no_fit:
        return EXIT_OK
    _fit_emulator(setup, args, collect, training_table, wall, summary.n_computed)
    return EXIT_OK


def _fit_emulator(setup, args, collect, training_table, wall, n_computed):
    from ..emulate import GPEmulator, save  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..summaries import azimuthal_outputs  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    names, theta, outputs = collect(args.out)
    X, Y, V = training_table(setup, theta, outputs)
    if not np.all(np.isfinite(Y)):
        raise CommandError("training summaries contain NaN: enlarge [bank] n_orbits or merge cells")
    e = setup.cfg["emulator"]
    scaled = {"parameter": "q_y", **azimuthal_outputs(setup.spec)} if e["scale_azimuthal"] else None
    t0 = time.perf_counter()
    emu = GPEmulator(
        setup.parameter_names, setup.bounds, kernel=e["kernel"], n_restarts=e["n_restarts"],
        n_pca=e["n_pca"] or None, random_state=setup.cfg["design"]["seed"], units=setup.units,
        output_names=setup.spec.output_names(), scaled_outputs=scaled,
    ).fit(X, Y, y_var=V, n_jobs=args.jobs)
    fit_s = time.perf_counter() - t0
    meta = setup.metadata()
    meta["provenance"] = {
        "config_file": str(args.config),
        "run_dir": str(args.out),
        "n_design_points": int(len(theta)),
        "n_training_rows": int(len(X)),
        "master_seed": setup.cfg["design"]["seed"],
        # this invocation only: a resumed run computes just the missing points
        "simulation_wall_s_this_invocation": round(wall, 1),
        "points_computed_this_invocation": int(n_computed),
        "fit_wall_s": round(fit_s, 1),
        "bank_seconds_median": float(np.median(outputs["bank_seconds"])),
        "max_energy_error": float(np.max(outputs["max_energy_error"])),
        "median_noise_sd_mean_vtf": float(np.median(np.sqrt(
            V[:, :setup.spec.n_gauss].reshape(len(V), setup.spec.n_cells, -1)[..., 1]))),
        "trained_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
    }
    if setup.cfg["galaxy"]["halo_flattening"] == "potential":
        meta["negative_density"] = _negative_density_report(setup)
    out = Path(args.emulator_out) if args.emulator_out else Path(args.out) / "emulator"
    save(emu, out, metadata=meta, overwrite=True)
    print(f"swerve train: emulator of {len(setup.parameter_names)} parameters x {Y.shape[1]} outputs "
          f"fitted to {len(X)} rows in {fit_s:.1f} s, written to {out}")
    print(json.dumps({"parameters": setup.parameter_names, "bounds": setup.bounds.tolist()}))


def _negative_density_report(setup):
    """Where a potential-flattened halo's density is negative inside the selection volume,
    at the corners of the training domain (recorded in the emulator, shown by `swerve info`)."""
    r_max = setup.spec.r_edges[-1]
    corners = []
    names = setup.galaxy_names
    for combo in itertools.product(*[setup.galaxy_infer[n] for n in names]):
        theta = dict(zip(names, combo))
        region = setup.galaxy_at(theta).negative_density_region()
        if region is not None and region["r"] < r_max:
            corners.append({"theta": theta, "r_negative_kpc": region["r"], "axis": region["axis"]})
    return {
        "selection_r_max_kpc": r_max,
        "corners_with_negative_density_inside": corners,
        "note": "potential-flattened halo: the density is negative beyond r_negative at these corners",
    }
