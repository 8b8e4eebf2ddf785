"""``swerve galaxy``: show a Galaxy model, its circular and escape speeds, measured values."""

from __future__ import annotations

import json
from pathlib import Path

from .. import __version__
from ._common import EXIT_OK, METAVAR, CommandError, parse_param_list


def add_parser(sub):
    p = sub.add_parser(
        "galaxy",
        help="show a Galaxy model: components, parameters, circular and escape speeds",
        description=(
            "Print a Galaxy model (components, parameters with units and sources, version), its "
            "circular velocity and escape speed at a few radii beside measured Milky Way values, "
            "and where a potential-flattened halo's density turns negative. With --plot, draw "
            "both curves with the measurements and their error bars."
        ),
    )
    p.add_argument("--model", default=None, metavar="NAME", help="named Galaxy model (default: the package default)")
    p.add_argument("--param", action="append", metavar=METAVAR["param"], default=[],
                   help="change one Galaxy parameter, e.g. --param q_z=0.8 (repeatable)")
    p.add_argument("--halo-flattening", choices=None, default=None, metavar="{potential,density}",
                   help="flatten the halo in the potential (fast, analytic) or in the density (physical)")
    p.add_argument("--radii", default="8.122,20,50,100", metavar="R1,R2,...",
                   help="radii in kpc at which to report speeds (default: %(default)s)")
    p.add_argument("--plot", metavar="FILE.png", help="draw v_c(R) and v_esc(r) with measurements")
    p.add_argument("--json", action="store_true", help="print the model and speeds as JSON instead")
    p.add_argument("--lmc", action="store_true",
                   help="also show the Large Magellanic Cloud: its parameters and sources, present state and "
                        "past orbit in this Galaxy (with dynamical friction and the Milky Way's reflex) beside "
                        "published values")
    p.add_argument("--lmc-mass", type=float, default=None, metavar="MSUN",
                   help="LMC mass for --lmc (default 1.38e11 Msun, Erkal et al. 2019)")
    p.set_defaults(func=run)


def _lmc_summary(galaxy, args) -> dict:
    from ..galaxy.lmc import LMC, lmc_summary  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    lmc = LMC() if args.lmc_mass is None else LMC(m_lmc=args.lmc_mass)
    return lmc_summary(galaxy, lmc)


def _print_lmc(s: dict) -> None:
    print("  Large Magellanic Cloud (a moving Hernquist sphere; rigid Milky Way with its reflex):")
    for name, p in s["parameters"].items():
        print(f"    {name:<10} = {p['value']:<11.5g} {p['unit']:<9} {p['doc']}")
        print(f"    {'':<10}   source: {p['source']}")
    pr, o, pub = s["present"], s["orbit"], s["published"]
    print(f"    present: r = {pr['r_kpc']:.2f} kpc from the Galactic Centre, v_r = {pr['v_r_kms']:+.1f} km/s, "
          f"v_t = {pr['v_t_kms']:.1f} km/s")
    print(f"    last pericentre: {o['r_peri_kpc']:.1f} kpc at {o['t_peri_myr']:.1f} Myr "
          f"(published ~{pub['r_peri_kpc']['value']:g} kpc, ~{-pub['t_peri_myr']['value']:g} Myr ago: "
          f"{pub['r_peri_kpc']['source']})")
    print(f"    speed the Galactic Centre gained toward it since -500 Myr: "
          f"{o['gc_speed_gained_since_500myr_kms']:.1f} km/s (measured reflex {pub['reflex_kms']['value']:g} km/s: "
          f"{pub['reflex_kms']['source']})")
    print()


def run(args) -> int:
    from ..galaxy import DEFAULT_GALAXY, GALAXY_MODELS, Galaxy, parameter_source  # noqa: PLC0415 - lazy: keeps the CLI's start fast
    from ..galaxy.measurements import MEASUREMENTS  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    try:
        radii = [float(x) for x in args.radii.split(",") if x.strip()]
    except ValueError:
        raise CommandError(f"--radii {args.radii!r}: expected comma-separated numbers in kpc") from None
    if not radii or any(r <= 0 for r in radii):
        raise CommandError(f"--radii {args.radii!r}: expected positive radii in kpc")
    params = parse_param_list(args.param)
    name = args.model or DEFAULT_GALAXY
    g = Galaxy.from_name(name, halo_flattening=args.halo_flattening, **params)
    vc = g.circular_velocity(radii)
    vesc = g.escape_speed_at_radius(radii)
    region = g.negative_density_region()
    lmc = _lmc_summary(g, args) if (args.lmc or args.lmc_mass is not None) else None
    if args.json:
        out = {
            "swerve_version": __version__,
            "galaxy": g.to_dict(),
            "radii_kpc": radii,
            "circular_velocity_kms": vc.tolist(),
            "escape_speed_kms": vesc.tolist(),
            "negative_density_region": region,
        }
        if lmc is not None:
            out["lmc"] = {k: v for k, v in lmc.items() if k != "track"}
        print(json.dumps(out, indent=2))
    else:
        print(f"Galaxy model {g.name}  (swerve {__version__}; halo flattened in the {g.halo_flattening})")
        if g.name.split("+")[0] in GALAXY_MODELS:
            print(f"  {GALAXY_MODELS[g.name.split('+')[0]]['description']}")
        print()
        for c in g.components:
            print(f"  {type(c).__name__}")
            for p in c.parameters:
                val = c.values[p.name]
                unit = p.unit or ""
                changed = "  (changed)" if p.name in params else ""
                print(f"    {p.name:<8} = {val:<11.5g} {unit:<5} {p.doc}{changed}")
                source = parameter_source(g.name, p.name, p.source)
                if source and not changed:
                    print(f"    {'':<8}   source: {source}")
        print()
        if lmc is not None:
            _print_lmc(lmc)
        print(f"  {'r [kpc]':>8}  {'v_c [km/s]':>10}  {'v_esc [km/s]':>12}")
        for r, a, b in zip(radii, vc, vesc):
            print(f"  {r:8.3f}  {a:10.1f}  {b:12.1f}")
        print()
        print("  Measured (for comparison):")
        for m in MEASUREMENTS:
            model_v = (g.circular_velocity(m.radius_kpc)[0] if m.quantity == "circular_velocity"
                       else g.escape_speed_at_radius(m.radius_kpc)[0])
            what = "v_c  " if m.quantity == "circular_velocity" else "v_esc"
            note = f"; {m.note}" if m.note else ""
            print(f"    {what}({m.radius_kpc:g} kpc) = {m.value:g} -{m.err_low:g}/+{m.err_high:g} km/s"
                  f"   model {model_v:.1f}   [{m.source}{note}]")
        print()
        if region is None:
            print("  Halo density is positive everywhere.")
        else:
            print(f"  WARNING: the potential-flattened halo's density is negative beyond r = {region['r']:.1f} kpc"
                  f" (along the {region['axis']} axis, m = {region['m_over_rs']:.3g} r_s).")
    if args.plot:
        from ..plots import galaxy_curves  # noqa: PLC0415 - lazy: keeps the CLI's start fast

        out_path = Path(args.plot)
        if not out_path.parent.exists():
            raise CommandError(f"--plot {args.plot}: folder {out_path.parent} does not exist")
        galaxy_curves(g, out_path, measurements=MEASUREMENTS)  # written atomically
        if not args.json:
            print(f"  Plot written to {out_path}")
    return EXIT_OK
