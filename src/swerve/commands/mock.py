"""``swerve mock``: a mock catalog of hypervelocity stars with survey errors.

Every option can also be given in a TOML file (``--config``); options on the command line win
over the file. The file's schema is :data:`MOCK_SCHEMA` (validated by :mod:`swerve.config`;
``swerve mock --template`` writes a commented template).
"""

from __future__ import annotations

import dataclasses
import logging
import time
from pathlib import Path

import numpy as np

from ..config import Key, Schema, Section, load_config, template, validate
from ._common import EXIT_OK, METAVAR, CommandError, add_template_flag, check_option, parse_param_list

log = logging.getLogger("swerve")


#: The shipped default emulator's model (training/default.toml), so that a mock made with the
#: defaults lies inside the emulator's model and `swerve fit` on it should recover the truth:
#: a density-flattened halo, p(v) ∝ v^-0.5 on 700-3000 km/s (the middle of the emulator's slope
#: range), stars at 10-250 kpc moving outward. tests/test_mock.py checks these against the shipped
#: emulator's recorded configuration.
EMULATOR_MODEL_DEFAULTS = {
    "halo_flattening": "density",
    "launch_params": {"v_min": 700.0, "v_max": 3000.0, "slope": -0.5},
    "r_min": 10.0,
    "r_max": 250.0,
    "outgoing": True,
}


def _schema():
    from ..selection import _FIELDS_DOC, Selection  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    sel_keys = []
    for f in dataclasses.fields(Selection):
        if f.name in ("outgoing", "unbound"):
            sel_keys.append(Key(f.name, "bool", bool(f.default), doc=_FIELDS_DOC[f.name]))
        else:
            nonneg = f.name in ("r_min", "r_max", "d_min", "d_max", "v_min", "abs_b_min")
            default = EMULATOR_MODEL_DEFAULTS.get(f.name, f.default)
            sel_keys.append(Key(f.name, "float", default, min=0.0 if nonneg else None, doc=_FIELDS_DOC[f.name]))
    law = "[A, B, P]: sigma(d) = A + B (d/10 kpc)**P at the true heliocentric distance d"
    return Schema("mock", (
        Section("", (
            Key("n", "int", 300, min=1, doc="number of stars in the catalog"),
            Key("seed", "int", 0, min=0, doc="seed of every random draw (recorded)"),
            Key("out", "str", None, doc="output file (.ecsv, .fits or .csv)"),
            Key("solar", "str", "v4.0", doc="solar-parameter set of the heliocentric transform"),
            Key("include_truth", "bool", False, doc="also write the true values as true_* columns"),
        )),
        Section("galaxy", (
            Key("model", "str", None, doc="named Galaxy model (default: the package default)"),
            Key("halo_flattening", "str", EMULATOR_MODEL_DEFAULTS["halo_flattening"], choices=("potential", "density"),
                doc="flatten the halo in the potential or in the density (default: the shipped emulator's)"),
            Key("params", "table", None, doc="Galaxy parameters, e.g. {q_z = 0.85, q_y = 1.1}"),
        ), doc="the Galaxy"),
        Section("launch", (
            Key("model", "str", "power-law", choices=("power-law", "hills"),
                doc="launch model: bounded power law in speed, or the Hills mechanism"),
            Key("imf", "str", "kroupa", choices=("kroupa", "salpeter"), doc="IMF of the Hills model"),
            Key("params", "table", None, doc="launch parameters (power law, default the shipped emulator's: {v_min = 700, v_max = 3000, slope = -0.5}), e.g. {v_min = 600, v_max = 2200, slope = -1}"),
            Key("flight_time_max", "float", 300.0, min=0.0, exclusive_min=True,
                doc="longest flight time, Myr (flight times uniform up to it)"),
            Key("mass_range", "list[float]", None, length=2, min=0.0,
                doc="Hills only: keep ejected stars with mass in [lo, hi] Msun"),
        ), doc="the launch model"),
        Section("selection", tuple(sel_keys), doc="cuts on the true present-day stars, except vlos_min: on the "
                "measured line-of-sight velocity (stars whose measurement fails it are dropped, as a survey drops them)"),
        Section("errors", (
            Key("parallax", "list[float]", [0.02], min=0.0, doc=f"parallax uncertainty, mas ({law}); [] for none"),
            Key("distance_frac", "list[float]", [0.1], min=0.0, doc=f"fractional distance uncertainty ({law}); [] for none"),
            Key("pm", "list[float]", [0.0, 0.01, 1.0], min=0.0, doc=f"proper-motion uncertainty, mas/yr ({law})"),
            Key("corr_pmra_pmdec", "float", 0.0, min=-1.0, max=1.0, exclusive_min=True, exclusive_max=True,
                doc="correlation of the pmra and pmdec errors"),
            Key("vlos", "list[float]", [5.0], min=0.0, doc=f"line-of-sight velocity uncertainty, km/s ({law})"),
        ), doc="measurement errors"),
        Section("bank", (
            Key("size", "int", 4000, min=1, doc="orbits in the trajectory bank (positive octant)"),
            Key("file", "str", None, doc="use this saved bank (.npz) instead of building one"),
            Key("save", "str", None, doc="save the bank built here to this .npz file"),
            Key("dt", "float", 1.0, min=0.0, exclusive_min=True, doc="flight-time step, Myr"),
            Key("v_lo", "float", 500.0, min=0.0, exclusive_min=True, doc="lowest proposal launch speed, km/s"),
            Key("v_hi", "float", 5000.0, min=0.0, exclusive_min=True, doc="highest proposal launch speed, km/s"),
        ), doc="the trajectory bank"),
        Section("lmc", (
            Key("enabled", "bool", False, doc="make the mock in the Galaxy perturbed by the LMC (time-dependent: one "
                "orbit per present-day star, launched at its own epoch; swerve.bank_lmc)"),
            Key("m_lmc", "float", None, min=0.0, doc="LMC mass, Msun (default 1.38e11, Erkal et al. 2019)"),
            Key("orbits", "int", 40000, min=1, doc="orbits of the LMC bank (whole sky; each gives at most one star)"),
        ), doc="the Large Magellanic Cloud"),
    ), doc="swerve mock configuration")


def add_parser(sub):
    p = sub.add_parser(
        "mock",
        help="make a mock catalog of hypervelocity stars with survey errors",
        description=(
            "Draw a mock catalog: integrate a trajectory bank for the Galaxy (or load one), reweight it "
            "to the launch model, select the present-day stars, draw N of them, add measurement errors "
            "and write a catalog (ECSV, FITS or CSV, from the file name) with the columns and units every "
            "other swerve command reads; the true parameters and all settings go into the table's meta. "
            "Every option can be set in a TOML file (--config; see --template); the command line wins. "
            "Error laws are A or A:B:P: sigma(d) = A + B (d/10 kpc)^P at the true heliocentric distance."
        ),
    )
    p.add_argument("--config", metavar=METAVAR["config"], help="read options from a TOML file")
    add_template_flag(p, help="print the configuration template (with the options given) and exit")
    p.add_argument("--n", type=int, default=None, metavar="N", help="number of stars (default 300)")
    p.add_argument("--seed", type=int, default=None, metavar=METAVAR["seed"],
                   help="seed of every random draw (default 0; recorded)")
    p.add_argument("--out", metavar="FILE", help="output catalog: .ecsv, .fits or .csv")
    p.add_argument("--model", default=None, metavar="NAME", help="named Galaxy model (default: the package default)")
    p.add_argument("--halo-flattening", default=None, choices=("potential", "density"),
                   help="flatten the halo in the potential (fast, analytic) or in the density (physical)")
    p.add_argument("--param", action="append", metavar=METAVAR["param"], default=[],
                   help="a Galaxy or launch-model parameter by its declared name, e.g. q_z=0.85, q_y=1.1, "
                        "v_min=900 (repeatable)")
    p.add_argument("--launch", default=None, choices=("power-law", "hills"),
                   help="launch model: bounded power law p(v) ~ v^slope on [v_min, v_max], or the Hills mechanism")
    p.add_argument("--imf", default=None, choices=("kroupa", "salpeter"), help="IMF of the Hills model")
    p.add_argument("--flight-time-max", type=float, default=None, metavar="MYR",
                   help="longest flight time in Myr (default 300)")
    p.add_argument("--mass-range", default=None, metavar="LO,HI",
                   help="Hills only: keep ejected stars with mass in [LO, HI] Msun")
    p.add_argument("--cut", action="append", metavar="NAME=VALUE", default=[],
                   help="a selection cut, e.g. r_min=10, outgoing=true, unbound=true, d_max=60 (repeatable; "
                        "default: the shipped emulator's selection, r_min=10, r_max=250 and outgoing); "
                        "vlos_min=KMS cuts the MEASURED line-of-sight velocity, as a survey does (fit such a "
                        "mock with an emulator trained with [selection] vlos_min = KMS)")
    p.add_argument("--error-parallax", default=None, metavar="A[:B:P]|none", help="parallax error law, mas (default 0.02)")
    p.add_argument("--error-distance-frac", default=None, metavar="A[:B:P]|none",
                   help="fractional error law of an independent (spectrophotometric) distance (default 0.1); "
                        "with 'none' only parallaxes are written (some observed ones <= 0, as in a survey): fit and "
                        "trace such a catalog under a distance prior (--distance-prior)")
    p.add_argument("--error-pm", default=None, metavar="A[:B:P]", help="proper-motion error law, mas/yr (default 0:0.01:1)")
    p.add_argument("--error-pm-corr", type=float, default=None, metavar="RHO", help="pmra-pmdec error correlation (default 0)")
    p.add_argument("--error-vlos", default=None, metavar="A[:B:P]", help="line-of-sight velocity error law, km/s (default 5)")
    p.add_argument("--bank-size", type=int, default=None, metavar="N", help="orbits in the trajectory bank (default 4000)")
    p.add_argument("--bank-file", default=None, metavar="FILE.npz", help="use a saved trajectory bank")
    p.add_argument("--save-bank", default=None, metavar="FILE.npz", help="save the bank built here")
    p.add_argument("--bank-dt", type=float, default=None, metavar="MYR", help="flight-time step of the bank (default 1)")
    p.add_argument("--lmc", action="store_true", default=None,
                   help="make the mock in the Galaxy perturbed by the Large Magellanic Cloud (its past orbit with "
                        "dynamical friction and the Milky Way's reflex): every star integrated from its own launch "
                        "epoch over the whole sky, 40000 orbits by default ([lmc] orbits; about 10 s)")
    p.add_argument("--lmc-mass", type=float, default=None, metavar="MSUN",
                   help="LMC mass (default 1.38e11 Msun, Erkal et al. 2019; range 0-2.5e11); implies --lmc")
    p.add_argument("--solar", default=None, metavar="NAME", help="solar-parameter set (default v4.0)")
    p.add_argument("--truth", action="store_true", default=None, help="also write true values (true_* columns)")
    p.set_defaults(func=run)


def _law_list(text, option):
    """The numbers of an error law given on the command line: ``A`` or ``A:B:P``
    (:func:`swerve.measurement.parse_error_law`), or [] for 'none'."""
    from ..measurement import parse_error_law  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    if text.strip().lower() == "none":
        return []
    try:
        return parse_error_law(text, option)
    except ValueError as exc:
        raise CommandError(str(exc)) from None


def _parse_cut(item):
    name, sep, value = item.partition("=")
    if not sep or not name.strip():
        raise CommandError(f"--cut {item!r}: expected NAME=VALUE, e.g. r_min=10")
    v = value.strip().lower()
    if v in ("true", "yes", "on"):
        return name.strip(), True
    if v in ("false", "no", "off"):
        return name.strip(), False
    if v == "none":
        return name.strip(), None
    try:
        return name.strip(), float(value)
    except ValueError:
        raise CommandError(f"--cut {item!r}: value {value!r} is not a number or true/false/none") from None


def _config(args):
    schema = _schema()
    for option, section, key, value in (("--n", "", "n", args.n), ("--seed", "", "seed", args.seed),
                                        ("--flight-time-max", "launch", "flight_time_max", args.flight_time_max),
                                        ("--error-pm-corr", "errors", "corr_pmra_pmdec", args.error_pm_corr),
                                        ("--bank-size", "bank", "size", args.bank_size),
                                        ("--bank-dt", "bank", "dt", args.bank_dt),
                                        ("--lmc-mass", "lmc", "m_lmc", args.lmc_mass)):
        check_option(option, value, schema, section, key)  # a bad value named by its flag
    cfg = load_config(args.config, schema) if args.config else validate({}, schema, source="<defaults>")
    top, gal, lau, sel, err, bank = (cfg[k] for k in ("", "galaxy", "launch", "selection", "errors", "bank"))
    if args.lmc or args.lmc_mass is not None:
        cfg["lmc"]["enabled"] = True
    if args.lmc_mass is not None:
        cfg["lmc"]["m_lmc"] = args.lmc_mass
    for opt, key in (("n", "n"), ("seed", "seed"), ("out", "out"), ("solar", "solar"), ("truth", "include_truth")):
        if getattr(args, opt) is not None:
            top[key] = getattr(args, opt)
    if args.model is not None:
        gal["model"] = args.model
    if args.halo_flattening is not None:
        gal["halo_flattening"] = args.halo_flattening
    if args.launch is not None:
        lau["model"] = args.launch
    if args.imf is not None:
        lau["imf"] = args.imf
    if args.flight_time_max is not None:
        lau["flight_time_max"] = args.flight_time_max
    if args.mass_range is not None:
        try:
            lo, hi = (float(x) for x in args.mass_range.split(","))
        except ValueError:
            raise CommandError(f"--mass-range {args.mass_range!r}: expected LO,HI in Msun") from None
        lau["mass_range"] = [lo, hi]
    params = parse_param_list(args.param)
    gal["params"] = dict(gal["params"] or {})
    lau["params"] = dict(lau["params"] or {})
    for item in args.cut:
        name, value = _parse_cut(item)
        if name not in sel:
            raise CommandError(f"--cut {item!r}: unknown cut {name!r}; expected one of {sorted(sel)}")
        sel[name] = value
    for opt, key in (("error_parallax", "parallax"), ("error_distance_frac", "distance_frac"),
                     ("error_pm", "pm"), ("error_vlos", "vlos")):
        if getattr(args, opt) is not None:
            err[key] = _law_list(getattr(args, opt), "--" + opt.replace("_", "-"))
    if args.error_pm_corr is not None:
        err["corr_pmra_pmdec"] = args.error_pm_corr
    for opt, key in (("bank_size", "size"), ("bank_file", "file"), ("save_bank", "save"), ("bank_dt", "dt")):
        if getattr(args, opt) is not None:
            bank[key] = getattr(args, opt)
    # re-validate the merged configuration (ranges of the command-line values too)
    merged = {sec: {k: v for k, v in vals.items() if v is not None} for sec, vals in cfg.items()}
    cfg = validate(merged, schema, source="command line")
    return cfg, params, schema


def _build(cfg, params):
    from ..galaxy import DEFAULT_GALAXY, Galaxy  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..launch import BoundedPowerLawSpeed, HillsLaunch  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..measurement import ErrorLaw, ErrorModel  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..selection import Selection  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    gal, lau = cfg["galaxy"], cfg["launch"]
    name = gal["model"] or DEFAULT_GALAXY
    base = Galaxy.from_name(name, halo_flattening=gal["halo_flattening"])
    launch_cls = HillsLaunch if lau["model"] == "hills" else BoundedPowerLawSpeed
    launch_names = {p.name for p in launch_cls.PARAMETERS}
    g_params = {k: float(v) for k, v in (gal["params"] or {}).items()}
    l_params = {k: float(v) for k, v in (lau["params"] or {}).items()}
    if lau["model"] == "power-law":  # the shipped emulator's launch model unless told otherwise
        l_params = {**EMULATOR_MODEL_DEFAULTS["launch_params"], **l_params}
    for k, v in params.items():
        if k in base.params:
            g_params[k] = v
        elif k in launch_names:
            l_params[k] = v
        else:
            raise CommandError(f"--param {k}: unknown parameter; Galaxy parameters are {sorted(base.params)}, "
                               f"{lau['model']} launch parameters are {sorted(launch_names)}")
    unknown = set(l_params) - launch_names
    if unknown:
        raise CommandError(f"[launch] params: unknown {lau['model']} parameter(s) {sorted(unknown)}; "
                           f"expected some of {sorted(launch_names)}")
    galaxy = Galaxy.from_name(name, halo_flattening=gal["halo_flattening"], **g_params)
    launch = HillsLaunch(imf=lau["imf"], **l_params) if lau["model"] == "hills" else BoundedPowerLawSpeed(**l_params)
    if lau["mass_range"] is not None and lau["model"] != "hills":
        raise CommandError("--mass-range: only meaningful with --launch hills")
    selection = Selection(**cfg["selection"])
    err = cfg["errors"]
    laws = {}
    for key in ("parallax", "distance_frac", "pm", "vlos"):
        vals = err[key]
        if vals:
            if len(vals) > 3:
                raise CommandError(f"[errors] {key}: expected one to three numbers [A, B, P], got {vals}")
            laws[key] = ErrorLaw(*vals)
        elif key in ("pm", "vlos"):
            raise CommandError(f"[errors] {key}: an uncertainty is required")
    errors = ErrorModel(corr_pmra_pmdec=err["corr_pmra_pmdec"], **laws)
    return galaxy, launch, selection, errors


def run(args) -> int:
    from ..bank import build_bank, load_bank, save_bank  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..population import bank_region, make_mock, write_mock  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    cfg, params, schema = _config(args)
    if args.template:
        print(template(schema, cfg))
        return EXIT_OK
    top, lau, bcfg = cfg[""], cfg["launch"], cfg["bank"]
    if not top["out"]:
        raise CommandError("--out: an output file is required (.ecsv, .fits or .csv)")
    out = Path(top["out"])
    if out.suffix.lower() not in (".ecsv", ".fits", ".csv"):
        raise CommandError(f"--out {out}: expected a file name ending in .ecsv, .fits or .csv")
    if not (out.parent if str(out.parent) else Path(".")).is_dir():
        raise CommandError(f"--out {out}: folder {out.parent} does not exist")
    galaxy, launch, selection, errors = _build(cfg, params)
    t0 = time.perf_counter()
    rng = np.random.default_rng(top["seed"])
    lcfg = cfg["lmc"]
    if bcfg["file"]:
        bank = load_bank(bcfg["file"])
    else:
        r_min, r_max = bank_region(selection, top["solar"])
        bank_seed = int(rng.integers(2 ** 31 - 1))
        if lcfg["enabled"]:  # the time-dependent forward model: one orbit per present-day star
            from ..bank_lmc import build_lmc_bank  # noqa: PLC0415 - lazy: keeps the CLI's start fast
            from ..galaxy.lmc import LMC  # noqa: PLC0415 - lazy: keeps the CLI's start fast

            try:
                lmc = LMC() if lcfg["m_lmc"] is None else LMC(m_lmc=lcfg["m_lmc"])
            except ValueError as exc:
                raise CommandError(f"[lmc] m_lmc / --lmc-mass: {exc}") from None
            bank = build_lmc_bank(galaxy, lcfg["orbits"], bank_seed, lmc=lmc, t_max=lau["flight_time_max"],
                                  v_lo=bcfg["v_lo"], v_hi=bcfg["v_hi"], r_min_store=r_min, r_max=r_max,
                                  solar=top["solar"])
        else:
            bank = build_bank(galaxy, bcfg["size"], bank_seed, t_max=lau["flight_time_max"], dt=bcfg["dt"],
                              v_lo=bcfg["v_lo"], v_hi=bcfg["v_hi"], r_min_store=r_min, r_max=r_max)
        if bcfg["save"]:
            save_bank(bank, bcfg["save"])
    log.info(bank.summary())
    table = make_mock(galaxy, launch, selection, errors, top["n"], rng, bank=bank, solar=top["solar"],
                      flight_time_max=lau["flight_time_max"], mass_range=lau["mass_range"],
                      include_truth=top["include_truth"])
    table.meta["seed"] = top["seed"]
    table.meta["config"] = {(k or "top"): v for k, v in cfg.items()}
    fmt = write_mock(table, out)
    print(f"swerve mock: {top['n']} stars written to {out} ({fmt}); {bank.summary()}; population ESS "
          f"{table.meta['population_ess']:.0f}; {time.perf_counter() - t0:.1f} s")
    return EXIT_OK
