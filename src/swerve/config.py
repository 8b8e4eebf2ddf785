"""TOML configuration files: small declarative schemas, validation, canonical hashing.

A schema is data: a :class:`Schema` holds :class:`Section` s, each holding :class:`Key` s
with a type, a default (or :data:`REQUIRED`), an allowed range or set of choices and a
one-line doc. The same declaration validates a file, fills defaults, writes a commented
template (:func:`template`) and documents the options.

Every problem is one :class:`ConfigError` (a ``ValueError``) whose one-line message names
the file, the full key, the bad value and what was expected, and suggests the closest valid
name for a misspelt one::

    train.toml: unknown key [design] sise; did you mean 'size'?

:func:`config_hash` gives a SHA-256 of the canonical JSON form of a validated configuration:
training outputs are tagged with it, and a run folder made by a different configuration is
refused by comparing hashes.

Examples
--------
>>> schema = Schema("train", (
...     Section("design", (
...         Key("size", "int", 256, min=1, doc="number of design points"),
...         Key("method", "str", "sobol", choices=("sobol", "lhs"), doc="space-filling design"),
...     )),
... ))
>>> cfg = validate({"design": {"size": 64}}, schema, source="train.toml")
>>> cfg["design"]["method"]
'sobol'
"""

from __future__ import annotations

import hashlib
import json
import math
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from .fileio import did_you_mean

try:  # Python >= 3.11
    import tomllib
except ModuleNotFoundError:  # pragma: no cover - Python 3.10 needs the tomli backport
    import tomli as tomllib  # type: ignore[no-redef]

__all__ = [  # noqa: RUF022 - in reading order
    "REQUIRED",
    "ConfigError",
    "Key",
    "Section",
    "Schema",
    "validate",
    "load_config",
    "defaults",
    "canonical_json",
    "config_hash",
    "template",
]


class _Required:
    """Sentinel type: a key without a default must be given in the file."""

    _instance = None

    def __new__(cls):
        if cls._instance is None:
            cls._instance = super().__new__(cls)
        return cls._instance

    def __repr__(self) -> str:
        return "REQUIRED"


#: Default of a key that must be given.
REQUIRED = _Required()


class ConfigError(ValueError):
    """A configuration file or dictionary that does not satisfy its schema (one-line message)."""


_SCALAR_TYPES = ("int", "float", "str", "bool")
_LIST_TYPES = ("list[int]", "list[float]", "list[str]", "list[bool]")
#: ``"table"`` passes a free-form TOML table (dict of plain values) through unchecked.
KEY_TYPES = _SCALAR_TYPES + _LIST_TYPES + ("table",)


@dataclass(frozen=True)
class Key:
    """One key of a section.

    Parameters
    ----------
    name : str
        The key as written in the file.
    type : str
        One of ``"int"``, ``"float"``, ``"str"``, ``"bool"``, ``"list[int]"``,
        ``"list[float]"``, ``"list[str]"``, ``"list[bool]"``, ``"table"``. A TOML integer is
        accepted for a float key (and stored as float); a bool is never accepted as a number.
    default : object
        Value used when the key is absent, :data:`REQUIRED` if it must be given, or ``None``
        for "unset" (``None`` is then stored, and cannot be written in TOML).
    min, max : float, optional
        Allowed range of a number (of every element of a list), inclusive unless
        ``exclusive_min`` / ``exclusive_max``.
    choices : tuple, optional
        Allowed values (of every element of a list).
    length : int, optional
        Required length of a list.
    doc : str
        One-line meaning, with the unit.
    """

    name: str
    type: str
    default: Any = REQUIRED
    min: float | None = None
    max: float | None = None
    choices: tuple | None = None
    length: int | None = None
    doc: str = ""
    exclusive_min: bool = False
    exclusive_max: bool = False

    def __post_init__(self):
        if self.type not in KEY_TYPES:
            raise ValueError(f"Key {self.name!r}: type {self.type!r} is not one of {KEY_TYPES}")

    def expected(self) -> str:
        """A short phrase describing the allowed values, e.g. ``"an int >= 1"``."""
        base = self.type[5:-1] if self.type.startswith("list[") else self.type
        article = "an" if base[0] in "aeiou" else "a"
        what = f"{article} {base}"
        if self.choices is not None:
            what = "one of " + ", ".join(repr(c) for c in self.choices)
        parts = []
        if self.min is not None:
            parts.append(f"{'>' if self.exclusive_min else '>='} {self.min:g}")
        if self.max is not None:
            parts.append(f"{'<' if self.exclusive_max else '<='} {self.max:g}")
        if parts:
            what += " " + " and ".join(parts)
        if self.type.startswith("list["):
            n = f"{self.length} " if self.length is not None else ""
            what = f"a list of {n}values, each {what}"
        elif self.type == "table":
            what = "a table"
        return what


@dataclass(frozen=True)
class Section:
    """A ``[name]`` table of keys. ``name=""`` holds keys at the top level of the file."""

    name: str
    keys: tuple[Key, ...]
    doc: str = ""

    def __post_init__(self):
        names = [k.name for k in self.keys]
        if len(set(names)) != len(names):
            raise ValueError(f"Section {self.name!r}: duplicate key names in {names}")

    def key(self, name: str) -> Key:
        for k in self.keys:
            if k.name == name:
                return k
        raise KeyError(name)


@dataclass(frozen=True)
class Schema:
    """A named configuration schema: an ordered tuple of sections."""

    name: str
    sections: tuple[Section, ...]
    doc: str = ""
    _index: dict = field(init=False, repr=False, compare=False)

    def __post_init__(self):
        names = [s.name for s in self.sections]
        if len(set(names)) != len(names):
            raise ValueError(f"Schema {self.name!r}: duplicate section names in {names}")
        object.__setattr__(self, "_index", {s.name: s for s in self.sections})

    def section(self, name: str) -> Section:
        return self._index[name]


def _label(section: str, key: str | None = None) -> str:
    sec = f"[{section}]" if section else "top level"
    return sec if key is None else (f"{sec} {key}" if section else key)


def _suggest(name: str, options) -> str:
    return did_you_mean(name, options)


def _fmt(value) -> str:
    if isinstance(value, str):
        return json.dumps(value)
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, dict):
        return "a table"
    return repr(value) if not isinstance(value, float) else f"{value:g}"


def _check_scalar(value, base: str, key: Key, where: str, src: str, whole=None):
    """Type- and range-check one scalar; return it converted (int -> float for float keys)."""
    shown = _fmt(whole if whole is not None else value)
    if base == "bool":
        ok = isinstance(value, bool)
    elif base == "int":
        ok = isinstance(value, int) and not isinstance(value, bool)
    elif base == "float":
        ok = isinstance(value, (int, float)) and not isinstance(value, bool)
    else:  # str
        ok = isinstance(value, str)
    if not ok:
        raise ConfigError(f"{src}: {where} = {shown} has the wrong type; expected {key.expected()}")
    if base == "float":
        value = float(value)
        if not math.isfinite(value):
            raise ConfigError(f"{src}: {where} = {shown} is not finite; expected {key.expected()}")
    if key.choices is not None and value not in key.choices:
        raise ConfigError(
            f"{src}: {where} = {shown} is not allowed; expected {key.expected()}"
            + (_suggest(value, [str(c) for c in key.choices]) if isinstance(value, str) else "")
        )
    if base in ("int", "float"):
        low_bad = key.min is not None and (value <= key.min if key.exclusive_min else value < key.min)
        high_bad = key.max is not None and (value >= key.max if key.exclusive_max else value > key.max)
        if low_bad or high_bad:
            raise ConfigError(f"{src}: {where} = {shown} is out of range; expected {key.expected()}")
    return value


def _check_value(value, key: Key, where: str, src: str):
    if value is None and key.default is None:  # "unset" (TOML has no null; a JSON record of a filled config has)
        return None
    if key.type == "table":
        if not isinstance(value, dict):
            raise ConfigError(f"{src}: {where} = {_fmt(value)} has the wrong type; expected a table")
        return json.loads(json.dumps(value, default=str))  # plain deep copy (dates become text)
    if key.type.startswith("list["):
        if not isinstance(value, list):
            raise ConfigError(
                f"{src}: {where} = {_fmt(value)} has the wrong type; expected {key.expected()}"
            )
        if key.length is not None and len(value) != key.length:
            raise ConfigError(
                f"{src}: {where} has {len(value)} values; expected {key.expected()}"
            )
        base = key.type[5:-1]
        return [_check_scalar(v, base, key, where, src, whole=value) for v in value]
    return _check_scalar(value, key.type, key, where, src)


def _is_table_key(section: Section, name: str) -> bool:
    return any(k.name == name and k.type == "table" for k in section.keys)


def validate(config: Mapping, schema: Schema, source: str | os.PathLike = "<config>") -> dict:
    """Check ``config`` against ``schema`` and return a new dict with defaults filled in.

    Parameters
    ----------
    config : mapping
        Parsed TOML: section name -> {key: value}; top-level keys belong to section ``""``.
    schema : Schema
    source : str or path-like
        File name used in messages.

    Returns
    -------
    dict
        ``{section: {key: value}}`` for every section of the schema (top-level keys, if the
        schema has a ``""`` section, are stored under ``""``). ``config`` is not modified.

    Raises
    ------
    ConfigError
        Unknown section or key (with the closest valid name), a missing required key, a value
        of the wrong type or outside its range or choices.
    """
    src = str(source)
    if not isinstance(config, Mapping):
        raise ConfigError(f"{src}: expected a table of sections, got {type(config).__name__}")
    section_names = [s.name for s in schema.sections if s.name]
    root = schema._index.get("")
    given: dict[str, Mapping] = {}
    root_given: dict = {}
    for name, value in config.items():
        is_table = isinstance(value, Mapping)
        if name and name in schema._index:
            if not is_table:
                raise ConfigError(
                    f"{src}: {name} = {_fmt(value)} should be a section [{name}], not a value"
                )
            given[name] = value
        elif root is not None and name == "" and is_table:  # an already validated dict
            root_given.update(value)
        elif root is not None and (not is_table or _is_table_key(root, name)):
            root_given[name] = value
        elif is_table:
            raise ConfigError(f"{src}: unknown section [{name}]{_suggest(name, section_names)}")
        else:
            raise ConfigError(
                f"{src}: unknown top-level key {name}; keys belong in a section "
                f"({', '.join(f'[{n}]' for n in section_names)})"
            )
    if root is not None:
        given[""] = root_given

    out: dict[str, dict] = {}
    for section in schema.sections:
        values = given.get(section.name, {})
        valid = [k.name for k in section.keys]
        for name in values:
            if name not in valid:
                raise ConfigError(
                    f"{src}: unknown key {_label(section.name, name)}{_suggest(name, valid)}"
                )
        result = {}
        for key in section.keys:
            where = _label(section.name, key.name)
            if key.name in values:
                result[key.name] = _check_value(values[key.name], key, where, src)
            elif key.default is REQUIRED:
                doc = f" ({key.doc})" if key.doc else ""
                raise ConfigError(f"{src}: missing required key {where}; expected {key.expected()}{doc}")
            else:
                default = key.default
                result[key.name] = list(default) if isinstance(default, (list, tuple)) else default
        out[section.name] = result
    return out


def load_config(path: str | os.PathLike, schema: Schema) -> dict:
    """Read a TOML file and :func:`validate` it against ``schema``.

    Raises
    ------
    ConfigError
        Missing or unreadable file, a TOML syntax error (message names the file and line),
        or any validation error.
    """
    src = os.fspath(path)
    try:
        with open(src, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError(f"{src}: no such configuration file") from None
    except tomllib.TOMLDecodeError as exc:
        msg = " ".join(str(exc).split())
        raise ConfigError(f"{src}: TOML syntax error: {msg}") from None
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{src}: not UTF-8 text ({exc.reason} at byte {exc.start})") from None
    except OSError as exc:
        raise ConfigError(f"{src}: cannot read ({exc.strerror})") from None
    return validate(data, schema, source=src)


def defaults(schema: Schema) -> dict:
    """The configuration made of every default; raises ConfigError if a key is required."""
    return validate({}, schema, source=f"<defaults of {schema.name}>")


def canonical_json(config: Mapping) -> str:
    """Canonical JSON text of a validated configuration: sorted keys, no spaces, UTF-8.

    Floats use Python's shortest round-trip repr, so equal values give equal text. Non-finite
    numbers and non-JSON types are refused with a ConfigError.
    """
    try:
        return json.dumps(
            config, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
        )
    except (TypeError, ValueError) as exc:
        raise ConfigError(f"configuration cannot be hashed: {exc}") from None


def config_hash(config: Mapping) -> str:
    """SHA-256 (hex) of :func:`canonical_json` of a validated configuration.

    Independent of key order; any change of a value changes it. Validate first, so that a
    default left out and the same default written out give the same hash.
    """
    return hashlib.sha256(canonical_json(config).encode("utf-8")).hexdigest()


def _toml_value(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, (int, float)):
        return repr(value)
    if isinstance(value, str):
        return json.dumps(value, ensure_ascii=False)
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{json.dumps(str(k))} = {_toml_value(v)}" for k, v in value.items()) + "}"
    raise ConfigError(f"cannot write {value!r} as TOML")


def template(schema: Schema, config: Mapping | None = None) -> str:
    """TOML text of ``config`` (or of the defaults), each key preceded by its doc comment.

    Required keys without a value and keys whose value is ``None`` are written commented out.
    The text read back with :func:`load_config` gives ``config`` again.
    """
    lines = []
    if schema.doc:
        lines += [f"# {schema.doc}", ""]
    ordered = sorted(schema.sections, key=lambda s: s.name != "")  # top-level keys first
    for section in ordered:
        values = (config or {}).get(section.name, {})
        if section.name:
            if section.doc:
                lines.append(f"# {section.doc}")
            lines.append(f"[{section.name}]")
        for key in section.keys:
            lines.append(f"# {key.doc} ({key.expected()})" if key.doc else f"# {key.expected()}")
            value = values.get(key.name, key.default)
            if value is REQUIRED or value is None:
                lines.append(f"# {key.name} =   (required)" if value is REQUIRED else f"# {key.name} =")
            else:
                lines.append(f"{key.name} = {_toml_value(value)}")
        lines.append("")
    return "\n".join(lines)
