"""What the command modules and :mod:`swerve.cli` share: exit codes, the user-facing error, the
parsing of repeatable ``NAME=VALUE`` options, the hidden deprecated aliases of renamed options,
the check of one option against a configuration schema, and the shipped default emulator.

Both :mod:`swerve.cli` and every ``swerve.commands.*`` module import from here (never the
commands from ``swerve.cli``), so no module imports back from the shell that loads it.
"""

from __future__ import annotations

import argparse
import contextlib
import sys
from pathlib import Path

from .. import resources
from ..config import ConfigError, validate

#: exit codes
EXIT_OK = 0
EXIT_ERROR = 1
EXIT_USAGE = 2

#: metavars shared by every command, so the same kind of value reads the same everywhere
METAVAR = {
    "config": "FILE.toml",
    "out_dir": "DIR",
    "emulator": "DIR",
    "param": "NAME=VALUE",
    "jobs": "N",
    "seed": "SEED",
    "columns": "OURS=THEIRS,...",
    "units": "NAME=UNIT,...",
}


class CommandError(Exception):
    """A user-facing error: printed as one line, exit code 1."""


def parse_param_list(items, option="--param") -> dict[str, float]:
    """Parse ``["q_z=0.8", "m_disk=9e10"]`` into a dict of floats (``option`` names the flag in errors)."""
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


class DeprecatedAlias(argparse.Action):
    """A hidden old spelling of an option: still works, with a deprecation warning naming the new one.

    ``p.add_argument("--galaxy-param", dest="param", action=DeprecatedAlias, new="--param",
    append=True, help=argparse.SUPPRESS)``.
    """

    def __init__(self, option_strings, dest, new, append=False, nargs=None, **kwargs):
        self.new, self.append = new, append
        if nargs is None and kwargs.get("const") is not None:
            nargs = 0
        super().__init__(option_strings, dest, nargs=nargs, **kwargs)

    def __call__(self, parser, namespace, values, option_string=None):
        print(f"swerve: warning: {option_string} is deprecated; use {self.new}", file=sys.stderr)
        if self.nargs == 0:
            values = self.const
        if self.append:
            items = list(getattr(namespace, self.dest, None) or [])
            items.append(values)
            values = items
        setattr(namespace, self.dest, values)


def add_template_flag(p, help="print a documented configuration template and exit"):
    """``--template`` (print the documented configuration and exit) and its hidden alias ``--print-config``."""
    p.add_argument("--template", dest="template", action="store_true", help=help)
    p.add_argument("--print-config", dest="template", action=DeprecatedAlias, new="--template", const=True,
                   help=argparse.SUPPRESS)


def check_option(option: str, value, schema, section: str, key: str, shown=None):
    """Check one command-line value against its key of a configuration schema.

    Returns the value converted as the schema converts it; a bad one is a :class:`CommandError`
    naming the option, e.g. ``--max-steps 10: expected an integer >= 50``, never the
    configuration's section and key.
    """
    if value is None:
        return None
    try:
        return validate({section: {key: value}} if section else {key: value}, schema, source="")[section][key]
    except ConfigError as exc:
        text = str(exc)
        _, _, tail = text.partition("; expected ")
        hint = ""
        if "; did you mean" in tail:
            tail, _, hint = tail.partition("; did you mean")
            hint = "; did you mean" + hint
        shown = value if shown is None else shown
        raise CommandError(f"{option} {shown}: expected {tail}{hint}" if tail else f"{option} {shown}: {text}") from None


def existing_catalog(path) -> Path:
    """``path`` as a catalog file, or a :class:`CommandError` saying what is there instead."""
    p = Path(path)
    if p.is_dir():
        raise CommandError(f"{path} is a folder, not a catalog file")
    if not p.exists():
        raise CommandError(f"{path}: no such catalog file")
    return p


def default_emulator() -> Path:
    """The shipped default emulator (:func:`swerve.resources.default_emulator`)."""
    return Path(resources.default_emulator())


def emulator_option(value) -> Path:
    """The ``--emulator`` folder (the shipped default when not given), checked to exist."""
    emulator = Path(value) if value else default_emulator()
    if not emulator.is_dir():
        if emulator.exists():
            raise CommandError(f"--emulator {emulator}: a file, not an emulator folder")
        raise CommandError(f"{emulator}: no emulator folder there (train one with `swerve train`, or pass --emulator)")
    return emulator


@contextlib.contextmanager
def worker_pool():
    """Around a command that runs joblib's process pool (loky): shut the pool down when it ends.

    joblib keeps its worker processes alive for reuse after a parallel call; at interpreter exit
    they and their semaphores are torn down in no fixed order, and an interrupted command leaves
    busy workers behind, which the resource tracker then reports as leaked semaphore objects.
    Shutting the pool down here, killing the workers on an interruption or error, ends both
    cleanly.
    """
    ok = False
    try:
        yield
        ok = True
    finally:
        try:
            from joblib.externals.loky import reusable_executor  # noqa: PLC0415 - lazy: keeps the CLI's start fast
        except ImportError:  # pragma: no cover - joblib without loky
            reusable_executor = None
        executor = getattr(reusable_executor, "_executor", None)
        if executor is not None:
            executor.shutdown(wait=True, kill_workers=not ok)
