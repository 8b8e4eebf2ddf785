"""Survey forecasts: how many stars, at which precision, to tell an oblate from a prolate halo?

For each sample size N, synthetic catalogs of N stars with a survey's errors are drawn at a
chosen truth and fitted against the emulator (in memory, by swerve fit's path: :func:`swerve.inference.fit_catalog`);
reported are the expected posterior widths of q_z and q_y (the median over catalogs of the
half-width of the 68% central credible interval, with the 16–84% spread over catalogs) and the
probability of a decisive answer: the fraction of catalogs with P(q_z < 1) > ``threshold``
(truth q_z < 1; P(q_z > 1) for a prolate truth).

The synthetic catalogs come from the **full simulation** (one trajectory bank at the truth,
:func:`swerve.population.make_mock`), not from the emulator's own Gaussian cell model: the
forecast then includes whatever the emulator gets wrong, which a survey plan should know
about. Truth: every emulator parameter at the midpoint of its bounds, overridden by
``truth`` (default q_z = 0.85).

Configuration: :data:`FORECAST_SCHEMA` (``swerve forecast --template``).
"""

from __future__ import annotations

import hashlib
import json
import os
import time
from pathlib import Path

import numpy as np

from . import __version__, plots
from .config import Key, Schema, Section, defaults, load_config, validate
from .emulate import content_hash, load
from .fileio import jsonable
from .measurement import parse_error_model
from .simulate import training_setup_from_dict
from .validation import VALIDATE_SCHEMA, draw_catalogs, fit_many, validation_bank, write_json

FORECAST_SCHEMA = Schema("forecast", (
    Section("", (
        Key("n_stars", "list[int]", [50, 100, 200, 400, 800], min=2, doc="sample sizes"),
        Key("errors", "str", "pm=0.02,vlos=5,dist=0.1",
            doc="error model: 'pm=MAS_YR,vlos=KM_S,dist=FRACTION[,plx=MAS,corr=RHO]', 'none' or a .toml file"),
        Key("truth", "table", {"q_z": 0.85}, doc="true parameters (others at the midpoints of the emulator's bounds)"),
        Key("catalogs", "int", 8, min=1, doc="synthetic catalogs per sample size"),
        Key("threshold", "float", 0.95, min=0.5, max=1.0, exclusive_max=True,
            doc="a catalog tells oblate from prolate when P(q_z<1) (or P(q_z>1)) exceeds this"),
        Key("seed", "int", 1, min=0, doc="master seed"),
        Key("n_jobs", "int", 2, min=1, doc="worker processes for the fits"),
        Key("solar", "str", "v4.0", doc="solar-parameter set"),
    )),
    VALIDATE_SCHEMA.section("fit"),
    VALIDATE_SCHEMA.section("bank"),
), doc="swerve forecast configuration")


def load_forecast_config(path=None, overrides: dict | None = None) -> dict:
    """The forecast configuration (defaults when ``path`` is None), top-level keys overridden."""
    cfg = load_config(path, FORECAST_SCHEMA) if path else defaults(FORECAST_SCHEMA)
    if overrides:
        cfg = {k: dict(v) for k, v in cfg.items()}
        cfg[""].update({k: v for k, v in overrides.items() if v is not None})
        cfg = validate(cfg, FORECAST_SCHEMA, source=str(path or "<options>"))
    return {**{k: v for k, v in cfg.items() if k}, **cfg[""]}


def truth_point(emu, truth: dict) -> dict:
    """Every emulator parameter: the midpoint of its bounds unless ``truth`` gives it (checked)."""
    names = list(emu.parameter_names)
    bounds = dict(zip(names, np.asarray(emu.bounds, dtype=float)))
    for k, v in truth.items():
        if k not in bounds:
            raise ValueError(f"truth: unknown parameter {k!r}; the emulator's parameters are {names}")
        lo, hi = bounds[k]
        if not lo <= float(v) <= hi:
            raise ValueError(f"truth: {k} = {float(v):g} lies outside the emulator's domain [{lo:g}, {hi:g}]")
    return {n: float(truth.get(n, 0.5 * (bounds[n][0] + bounds[n][1]))) for n in names}


def run_forecast(emulator_dir, out_dir, cfg: dict, log=None) -> dict:
    """Run the forecast, writing ``out_dir/forecast.json`` and ``forecast.png`` as each row finishes.

    Every finished sample size is written at once (atomically, :mod:`swerve.fileio`), with
    ``settings["complete"]`` false until the last; rerunning with the same settings into the
    same folder resumes: rows already there are kept, only the missing sample sizes are fitted.
    Each sample size draws from its own seed (``[seed, 1, N]``), so a resumed forecast equals
    an uninterrupted one. A folder holding a forecast of other settings is refused.

    Returns the document: ``settings`` (configuration, truth, emulator hash, error model,
    timing, ``complete``, ``key``) and ``rows``, one per N: ``n_stars``, ``width68_q_z`` /
    ``width68_q_y`` (median, p16, p84 over catalogs of the 68% half-width), ``p_decisive``
    (fraction of catalogs with P(q_z on the true side of 1) > threshold), ``mean_p_true_side``,
    ``converged_fraction``.
    """
    t0 = time.perf_counter()
    if not Path(emulator_dir).is_dir():
        raise ValueError(f"--emulator: folder {emulator_dir} does not exist")
    emu = load(emulator_dir)
    if "config" not in (emu.metadata or {}):
        raise ValueError(f"--emulator: {emulator_dir} records no training configuration; it was not made by swerve train")
    if "q_z" not in emu.parameter_names:
        raise ValueError(f"--emulator: {emulator_dir} does not infer q_z")
    setup = training_setup_from_dict(emu.metadata["config"], source=f"{emulator_dir} (training configuration)")
    em = parse_error_model(cfg["errors"])
    truth = truth_point(emu, cfg["truth"])
    oblate = truth["q_z"] < 1.0
    out_dir = Path(out_dir)
    if out_dir.exists() and not out_dir.is_dir():
        raise ValueError(f"--out {out_dir}: a file is there, not a folder")
    emu_hash = content_hash(emulator_dir)
    # what the rows depend on (not the worker count): a resumed forecast must match it
    keyed = {k: v for k, v in cfg.items() if k not in ("n_jobs", "n_stars")}
    key = hashlib.sha256(json.dumps(jsonable({"cfg": keyed, "truth": truth, "emulator": emu_hash,
                                              "errors": em.to_dict(), "version": __version__}),
                                    sort_keys=True).encode()).hexdigest()
    done = _previous_rows(out_dir / "forecast.json", key)
    settings = {"config": cfg, "truth": truth, "side": "q_z<1" if oblate else "q_z>1",
                "emulator": os.fspath(emulator_dir), "emulator_hash": emu_hash,
                "error_model": em.to_dict(), "catalog_source": "full simulation (one bank at the truth)",
                "low_ess_warnings": 0, "swerve_version": __version__, "key": key, "complete": False,
                "seconds": 0.0}
    if done:
        settings["low_ess_warnings"] = done["settings"].get("low_ess_warnings", 0)
        settings["seconds"] = float(done["settings"].get("seconds") or 0.0)
    rows_done = {int(r["n_stars"]): r for r in (done or {}).get("rows", [])}
    todo = [int(n) for n in cfg["n_stars"] if int(n) not in rows_done]
    if rows_done and log:
        log(f"forecast: resuming in {out_dir}: {len(rows_done)} sample size(s) already done, {len(todo)} to go")
    bank = None
    if todo:
        gal = setup.galaxy_at({n: truth[n] for n in setup.galaxy_names})
        launch = setup.launch_at({n: truth[n] for n in setup.launch_names})
        bank_rng = np.random.default_rng([cfg["seed"], 0])
        bank = validation_bank(setup, gal, int(bank_rng.integers(2 ** 31)), cfg["bank"]["n_orbits"])

    def document(t_start):
        rows = [rows_done[int(n)] for n in cfg["n_stars"] if int(n) in rows_done]
        settings["complete"] = len(rows) == len(cfg["n_stars"])
        settings["seconds"] = round(settings["seconds"] + time.perf_counter() - t_start, 1)
        return {"settings": settings, "rows": rows}

    t_mark = t0
    for n in todo:
        rng = np.random.default_rng([cfg["seed"], 1, n])  # this sample size's own stream
        tabs, nw = draw_catalogs(setup, gal, launch, bank, em, int(n), cfg["catalogs"], rng, solar=cfg["solar"])
        settings["low_ess_warnings"] += nw
        fits = fit_many(emulator_dir, [(t, int(rng.integers(2 ** 31)), None) for t in tabs], cfg["fit"],
                        n_jobs=cfg["n_jobs"], solar=cfg["solar"])
        row = _row(n, fits, emu, oblate, cfg["threshold"])
        rows_done[int(n)] = row
        doc = document(t_mark)
        t_mark = time.perf_counter()
        out_dir.mkdir(parents=True, exist_ok=True)  # created with the first finished row
        write_json(out_dir / "forecast.json", doc)
        if log:
            wz = row.get("width68_q_z", {}).get("median", float("nan"))
            log(f"forecast: N = {n}: q_z 68% half-width {wz:.3f}, decisive in {row.get('p_decisive', float('nan')):.2f}")
    doc = document(t_mark)
    out_dir.mkdir(parents=True, exist_ok=True)
    plots.forecast_plot(doc, out_dir / "forecast.png")
    write_json(out_dir / "forecast.json", doc)
    return doc


def _row(n, fits, emu, oblate, threshold) -> dict:
    """One sample size's row of the forecast from its catalogs' fits."""
    ok = [r for r in fits if "error" not in r]
    row = {"n_stars": int(n), "n_catalogs": len(fits), "n_failed": len(fits) - len(ok)}
    for q in ("q_z", "q_y"):
        if q in emu.parameter_names and ok:
            w = np.array([0.5 * (r["hi68"][r["names"].index(q)] - r["lo68"][r["names"].index(q)]) for r in ok])
            row[f"width68_{q}"] = dict(zip(("p16", "median", "p84"), np.percentile(w, [16, 50, 84]).tolist()))
    if ok:
        p_side = np.array([r["p_below_1"]["q_z"] if oblate else 1.0 - r["p_below_1"]["q_z"] for r in ok])
        row["p_decisive"] = float(np.mean(p_side > threshold))
        row["mean_p_true_side"] = float(np.mean(p_side))
        row["converged_fraction"] = float(np.mean([r["converged"] for r in ok]))
    return row


def _previous_rows(path: Path, key: str) -> dict | None:
    """The document of an earlier forecast of the same settings at ``path`` (None if there is none).

    A readable forecast of other settings is a ValueError: it is not overwritten."""
    if not path.is_file():
        return None
    try:
        doc = json.loads(path.read_text())
    except (OSError, ValueError) as exc:
        raise ValueError(f"{path}: unreadable ({exc}); move it away or choose another --out") from None
    if not isinstance(doc, dict) or doc.get("settings", {}).get("key") != key:
        raise ValueError(f"{path} holds a forecast of other settings (or of an older swerve); "
                         "choose another --out folder")
    return doc
