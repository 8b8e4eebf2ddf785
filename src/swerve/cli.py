"""The command-line shell: ``swerve <command> ...``.

A thin layer: it parses options, calls library functions, prints, and turns library errors into
one-line messages with a non-zero exit code. Tests call :func:`main` with an argument list.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import os
import sys
import tempfile
import warnings
from pathlib import Path

from . import __version__

log = logging.getLogger("swerve")

#: exit codes
EXIT_OK = 0
EXIT_ERROR = 1
EXIT_USAGE = 2


class CommandError(Exception):
    """A user-facing error: printed as one line, exit code 1."""


def parse_param_list(items, option="--param") -> dict[str, float]:
    """Parse ``["q_z=0.8", "m_disk=9e10"]`` into a dict of floats."""
    out: dict[str, float] = {}
    for item in items or ():
        name, sep, value = item.partition("=")
        if not sep or not name.strip():
            raise CommandError(f"{option} {item!r}: expected NAME=VALUE, e.g. q_z=0.8")
        try:
            out[name.strip()] = float(value)
        except ValueError:
            raise CommandError(f"{option} {item!r}: value {value!r} is not a number") from None
    return out


def atomic_write_path(path: Path):
    """A temporary path beside ``path``; rename it onto ``path`` when complete."""
    path = Path(path)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=path.suffix, dir=path.parent or ".")
    os.close(fd)
    return Path(tmp)


# ------------------------------------------------------------------------------- main -------
#: subcommand modules under swerve.commands; each has ``add_parser(subparsers)`` that sets ``func``
COMMANDS = ["galaxy", "mock", "train", "info", "fit", "validate", "forecast", "trace"]


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="swerve",
        description=(
            "swerve: infer the shape of the Milky Way's dark-matter halo from hypervelocity stars, "
            "with emulator-accelerated inference."
        ),
    )
    parser.add_argument("--version", action="version", version=f"swerve {__version__}")
    parser.add_argument("-v", "--verbose", action="count", default=0, help="more log output (-vv for debug)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    for name in COMMANDS:
        importlib.import_module(f"swerve.commands.{name}").add_parser(sub)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(
        level=[logging.WARNING, logging.INFO, logging.DEBUG][min(args.verbose, 2)],
        format="swerve: %(message)s",
    )
    if not getattr(args, "func", None):
        parser.print_help()
        return EXIT_USAGE
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("default")
            warnings.showwarning = _show_warning
            return int(args.func(args) or 0)
    except (CommandError, ValueError, FileNotFoundError, PermissionError, IsADirectoryError) as exc:
        lines = str(exc).splitlines() or [type(exc).__name__]
        if not getattr(exc, "problems", None):  # a catalog's report lists every problem, one per line
            lines = lines[:1]
        for line in lines:
            print(f"swerve {args.command}: error: {line}", file=sys.stderr)
        if len(lines) > 1:
            print(f"swerve {args.command}: {len(lines)} problems; nothing was written", file=sys.stderr)
        return EXIT_ERROR
    except KeyboardInterrupt:
        print(f"swerve {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into e.g. `head`, which closed early
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return EXIT_OK


def _show_warning(message, category, filename, lineno, file=None, line=None):
    print(f"swerve: warning: {message}", file=sys.stderr)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
