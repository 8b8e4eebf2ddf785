"""``swerve info EMULATOR``: print an emulator's metadata, domain and provenance."""

from __future__ import annotations

from ._common import EXIT_OK


def add_parser(sub):
    p = sub.add_parser(
        "info",
        help="describe an emulator folder (domain, outputs, provenance)",
        description=(
            "Verify an emulator folder (checksums, format version) and print its parameters and "
            "training bounds, outputs, kernel, the selection and summary definitions, the fixed "
            "Galaxy and solar parameters, its training provenance and, for a potential-flattened "
            "halo, where the halo's density is negative inside the selection volume."
        ),
    )
    p.add_argument("emulator", metavar="EMULATOR", help="emulator folder, e.g. emulators/default")
    p.set_defaults(func=run)


def run(args) -> int:
    from ..emulate import describe, load  # noqa: PLC0415 - lazy: keeps the CLI's start fast

    emu = load(args.emulator)
    print(describe(args.emulator))
    meta = emu.metadata or {}
    neg = meta.get("negative_density")
    if neg:
        corners = neg.get("corners_with_negative_density_inside", [])
        print()
        if corners:
            print(f"WARNING: potential-flattened halo: negative density inside the selection volume "
                  f"(r <= {neg['selection_r_max_kpc']:g} kpc) at {len(corners)} corner(s) of the domain:")
            for c in corners:
                th = ", ".join(f"{k}={v:g}" for k, v in c["theta"].items())
                print(f"  {th}: beyond r = {c['r_negative_kpc']:.1f} kpc along {c['axis']}")
        else:
            print("Potential-flattened halo: density positive inside the selection volume over the whole domain.")
    return EXIT_OK
