"""The command-line shell: ``swerve <command> ...``.

A thin layer: it parses options, calls library functions, prints, and turns library errors into
one-line messages with a non-zero exit code. Tests call :func:`main` with an argument list.
"""

from __future__ import annotations

import argparse
import importlib
import logging
import os
import signal
import sys
import warnings

from . import __version__

# shared with the command modules, which import them from swerve.commands._common (not from here)
from .commands._common import EXIT_ERROR, EXIT_OK, EXIT_USAGE, CommandError, parse_param_list  # noqa: F401

log = logging.getLogger("swerve")


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
    previous = _on_sigterm(_Terminated.raise_it)
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
    except _Terminated:
        print(f"swerve {args.command}: terminated", file=sys.stderr)
        return 128 + signal.SIGTERM
    except KeyboardInterrupt:
        print(f"swerve {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into e.g. `head`, which closed early
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return EXIT_OK
    finally:
        if previous is not None:
            _on_sigterm(previous)


class _Terminated(KeyboardInterrupt):
    """SIGTERM (e.g. from `timeout`) during a command: unwound like Ctrl-C, so that open files are
    removed and worker pools shut down (a plain SIGTERM kills the process with no cleanup, and
    joblib's resource tracker then reports leaked semaphores)."""

    @staticmethod
    def raise_it(signum, frame):
        raise _Terminated()


def _on_sigterm(handler):
    """Install ``handler`` for SIGTERM (main thread only); return the previous one, or None."""
    try:
        return signal.signal(signal.SIGTERM, handler)
    except (ValueError, OSError, AttributeError):  # not the main thread, or no SIGTERM here
        return None


def _show_warning(message, category, filename, lineno, file=None, line=None):
    print(f"swerve: warning: {message}", file=sys.stderr)


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
