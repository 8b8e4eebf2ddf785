"""Nuisance variants: the same catalog fitted under several assumptions, side by side.

A variants file (TOML) lists ``[[variant]]`` tables, each with a ``name``, an optional
``emulator`` (another trained emulator: e.g. another launch model) and any fit-configuration
sections to override (``[variant.priors.parameters]``, ``[variant.selection]``,
``[variant.frame]``, ``[variant.errors]``, ...)::

    [[variant]]
    name = "baseline"

    [[variant]]
    name = "disk mass fixed"
    priors.parameters.m_disk = { kind = "fixed", value = 1.0e11 }

    [[variant]]
    name = "stars beyond 20 kpc"
    selection.r_min = 20.0

    [[variant]]
    name = "pre-v4.0 solar parameters"
    frame.solar = "pre-v4.0"

Each variant is a full fit in ``OUT/<slug>/``; ``OUT/variants.ecsv`` and ``OUT/variants.png``
compare the shape posteriors, and conclusions that change between variants are flagged: the
sign of the flattening (P(q < 1) above 0.95, below 0.05, or undecided) and medians that move by
more than the first variant's 68% half-width.
"""

from __future__ import annotations

import re
import shutil
from pathlib import Path

import numpy as np
from astropy.table import Table
from joblib import Parallel, delayed

from . import plots
from .config import validate
from .fileio import atomic_path, did_you_mean
from .fit import FIT_SCHEMA, run_fit

try:
    import tomllib
except ModuleNotFoundError:  # pragma: no cover
    import tomli as tomllib  # type: ignore[no-redef]

_ALLOWED = {"name", "emulator", "catalog", "errors", "priors", "selection", "sampler", "frame"}
SHAPE = ("q_y", "q_z", "m_halo", "m_disk")


def read_variants(path) -> list[dict]:
    """Parse and check a variants file (names unique, only known sections)."""
    try:
        with open(path, "rb") as fh:
            doc = tomllib.load(fh)
    except tomllib.TOMLDecodeError as exc:
        raise ValueError(f"{path}: not valid TOML ({exc})") from None
    unknown_top = set(doc) - {"variant"}
    if unknown_top:
        raise ValueError(f"{path}: unknown top-level key {sorted(unknown_top)[0]!r}; expected [[variant]] tables")
    vs = doc.get("variant")
    if not isinstance(vs, list) or not vs:
        raise ValueError(f"{path}: expected at least one [[variant]] table")
    names = set()
    for i, v in enumerate(vs, 1):
        if "name" not in v or not isinstance(v["name"], str) or not v["name"].strip():
            raise ValueError(f"{path}: variant {i} has no name")
        if v["name"] in names:
            raise ValueError(f"{path}: variant name {v['name']!r} is used twice")
        names.add(v["name"])
        bad = set(v) - _ALLOWED
        if bad:
            key = sorted(bad)[0]
            raise ValueError(f"{path}: variant {v['name']!r}: unknown key {key!r}"
                             f"{did_you_mean(key, _ALLOWED, list_all=True)}")
    return vs


def slug(name: str) -> str:
    return re.sub(r"[^A-Za-z0-9]+", "-", name).strip("-").lower() or "variant"


def _merge(cfg: dict, variant: dict) -> dict:
    merged = {k: dict(v) for k, v in cfg.items()}
    for sec, vals in variant.items():
        if sec in ("name", "emulator"):
            continue
        if sec == "priors":
            params = dict(merged["priors"].get("parameters", {}))
            params.update(vals.get("parameters", {}))
            merged["priors"] = {"parameters": params}
        else:
            merged.setdefault(sec, {}).update(vals)
    return validate(merged, FIT_SCHEMA, source=f"variant {variant['name']!r}")


def _one(args):
    catalog, emulator, out, cfg, name = args
    outcome = run_fit(catalog, emulator, out, cfg, progress=False)
    return name, str(emulator), outcome.summary


def classify(p_less_than_one: float) -> str:
    if p_less_than_one > 0.95:
        return "q < 1"
    if p_less_than_one < 0.05:
        return "q > 1"
    return "undecided"


def run_variants(catalog, emulator, out, cfg, variants_path, jobs: int = 1, overrides=None) -> str:
    """Fit every variant (in parallel with ``jobs``), write the comparison, return its text."""
    vs = read_variants(variants_path)
    out = Path(out)
    if out.exists() and not out.is_dir():
        raise ValueError(f"{out}: a file is there, not a folder for the variants")
    tasks = []
    for v in vs:
        vcfg = _merge(cfg, v)
        if overrides:
            vcfg = _merge(vcfg, {"name": v["name"], **overrides})
        emu = Path(v.get("emulator") or emulator)
        if not emu.exists():
            raise ValueError(f"{variants_path}: variant {v['name']!r}: no emulator folder at {emu}")
        tasks.append((catalog, emu, out / slug(v["name"]), vcfg, v["name"]))
    created = not out.exists()
    out.mkdir(parents=True, exist_ok=True)  # once every variant's configuration is known to be good
    try:
        results = Parallel(n_jobs=jobs)(delayed(_one)(t) for t in tasks)
    except Exception:
        if created:  # a failed run leaves nothing behind
            shutil.rmtree(out, ignore_errors=True)
        raise

    rows = []
    for name, emu, s in results:
        row = {"variant": name, "emulator": emu, "converged": s["sampler"]["converged"], "stars": s["stars"]["used"]}
        for p in SHAPE:
            if p in s["parameters"]:
                q = s["parameters"][p]
                row[f"{p}_median"], row[f"{p}_lo68"], row[f"{p}_hi68"] = q["median"], q["ci68"][0], q["ci68"][1]
            elif p in s["fixed"]:
                row[f"{p}_median"] = row[f"{p}_lo68"] = row[f"{p}_hi68"] = s["fixed"][p]
            else:
                row[f"{p}_median"] = row[f"{p}_lo68"] = row[f"{p}_hi68"] = np.nan
        for q in ("q_z", "q_y"):
            row[f"P({q}<1)"] = s["probabilities"].get(f"P({q}<1)", np.nan)
        rows.append(row)
    flags = _flags(rows)
    t = Table(rows=rows)
    t.meta = {"flags": flags, "catalog": str(catalog)}
    with atomic_path(out / "variants.ecsv") as tmp:
        t.write(tmp, format="ascii.ecsv", overwrite=True)
    plots.variants_plot(rows, out / "variants.png")

    lines = [f"swerve fit --variants: {len(rows)} variants of {catalog}", ""]
    head = f"  {'variant':<28}" + "".join(f"{p:>22}" for p in SHAPE if np.isfinite(rows[0][f'{p}_median'])) + \
        f"{'P(q_z<1)':>10}{'P(q_y<1)':>10}"
    lines.append(head)
    for r in rows:
        cells = "".join(
            f"{r[f'{p}_median']:>10.4g} [{r[f'{p}_lo68']:.3g},{r[f'{p}_hi68']:.3g}]".rjust(22)
            for p in SHAPE if np.isfinite(rows[0][f"{p}_median"]))
        lines.append(f"  {r['variant'][:28]:<28}{cells}{r['P(q_z<1)']:>10.3f}{r['P(q_y<1)']:>10.3f}"
                     + ("" if r["converged"] else "  (not converged)"))
    lines.append("")
    if flags:
        lines += [f"  FLAG: {f}" for f in flags]
    else:
        lines.append("  No conclusion changes between the variants.")
    lines.append(f"  results in {out}/ (variants.ecsv, variants.png, one folder per variant)")
    return "\n".join(lines)


def _flags(rows) -> list[str]:
    flags = []
    base = rows[0]
    for q in ("q_z", "q_y"):
        key = f"P({q}<1)"
        cls = {r["variant"]: classify(r[key]) for r in rows if np.isfinite(r[key])}
        if len(set(cls.values())) > 1:
            flags.append(f"the sign of {q} - 1 changes between variants: " +
                         ", ".join(f"{k}: {v}" for k, v in cls.items()))
    for p in SHAPE:
        half = 0.5 * (base[f"{p}_hi68"] - base[f"{p}_lo68"])
        if not np.isfinite(half) or half <= 0:
            continue
        for r in rows[1:]:
            d = r[f"{p}_median"] - base[f"{p}_median"]
            if np.isfinite(d) and abs(d) > half:
                flags.append(f"{p}: median moves by {d:+.3g} in {r['variant']!r} (more than the "
                             f"{base['variant']!r} 68% half-width {half:.3g})")
    return flags
