"""The emulator's safe file format: :func:`save`, :func:`load`, :func:`content_hash`, :func:`describe`.

An emulator is a file people share, so loading must not run code. :func:`save` writes a
folder ::

    emulator.json      format, version, parameters and bounds, kernel hyperparameters, PCA
                       information, array manifest (dtype, shape), caller's metadata
    arrays.npz         every numeric array (float64 only), read with allow_pickle=False
    checksums.sha256   SHA-256 of the two files above, in ``sha256sum -c`` format

and :func:`load` verifies the checksums, the format version, the manifest and every array's
shape before it builds anything. No pickle and no joblib anywhere on that path. The checksums
detect truncation and corruption, not a deliberate forgery of all three files (that needs a
signature, which is out of scope).

The format knows emulator types only through a table (:func:`register`): a type supplies
``emulator_type``, ``_state()`` (JSON-able header and float64 arrays) and
``_from_state(doc, arrays, where)``, which checks every shape and raises
:class:`EmulatorFileError`. :class:`swerve.emulate.GPEmulator` registers itself.
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import os
import shutil
import tempfile
import uuid
import zipfile
import zlib
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from .. import __version__
from ..fileio import write_atomic, write_bytes

__all__ = [  # noqa: RUF022 - in reading order
    "FORMAT_NAME",
    "FORMAT_VERSION",
    "JSON_FILE",
    "ARRAYS_FILE",
    "CHECKSUMS_FILE",
    "EmulatorFileError",
    "check_json",
    "register",
    "save",
    "load",
    "describe",
    "content_hash",
]


#: Value of the ``format`` entry of ``emulator.json``.
FORMAT_NAME = "swerve-emulator"
#: Highest format version this swerve writes and reads.
FORMAT_VERSION = 1
JSON_FILE = "emulator.json"
ARRAYS_FILE = "arrays.npz"
CHECKSUMS_FILE = "checksums.sha256"


class EmulatorFileError(ValueError):
    """An emulator folder that is missing, damaged, tampered with or of an unknown format."""


def check_json(name, value):
    """Refuse ``value`` (ValueError naming ``name``) unless it is plain, finite JSON data."""
    try:
        json.dumps(value, allow_nan=False)
    except (TypeError, ValueError) as exc:
        raise ValueError(f"{name}: must be plain JSON data (dict, list, str, number, bool, None): {exc}") from None


#: emulator type in emulator.json -> class (a table: new types join it with :func:`register`)
_TYPES: dict[str, type] = {}
#: the only dtypes an arrays file may hold
_SAFE_DTYPES = {"<f8": np.dtype("<f8")}
#: words that mark a pickled file or an object array: refused wherever the JSON names a file or dtype
_PICKLE_FILE_WORDS = ("pickle", "pkl", "joblib", "dill")
_OBJECT_DTYPE_WORDS = ("object", "pickle", "|o", "<o", ">o")


def register(cls):
    """Add an emulator class to the types :func:`load` builds (keyed by its ``emulator_type``)."""
    name = getattr(cls, "emulator_type", None)
    if not isinstance(name, str) or not name:
        raise ValueError(f"register: {cls!r} has no emulator_type string")
    if _TYPES.get(name, cls) is not cls:
        raise ValueError(f"register: emulator_type {name!r} is already taken by {_TYPES[name].__name__}")
    _TYPES[name] = cls
    return cls


def _sha256(path: Path) -> str:
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            h.update(chunk)
    return h.hexdigest()


def save(emulator, folder, metadata: Mapping | None = None, overwrite: bool = False) -> Path:
    """Write a fitted emulator to ``folder`` (created atomically).

    Parameters
    ----------
    emulator : GPEmulator
        Fitted (or any registered emulator type).
    folder : path-like
        The emulator folder to create.
    metadata : mapping, optional
        Free-form JSON data merged over ``emulator.metadata`` (e.g. ``selection``,
        ``summaries``, ``galaxy``, ``solar``, ``provenance``: configuration hash, seed, ...).
    overwrite : bool
        Replace an existing folder (the old one is removed only after the new one is in place).

    Returns
    -------
    Path
        ``folder``.

    Notes
    -----
    The folder is built in a temporary folder beside the target (each file written and synced
    by :mod:`swerve.fileio`) and the folder is renamed into place, so a crash never leaves a
    half-written emulator under the target name; with ``overwrite`` the old folder is moved
    aside first and removed only after the new one is in place.
    """
    target = Path(folder)
    if getattr(emulator, "emulator_type", None) not in _TYPES:
        raise ValueError(f"emulator: expected a fitted emulator of a registered type {sorted(_TYPES)}, "
                         f"got {type(emulator).__name__}")
    if target.exists() and not overwrite:
        raise FileExistsError(f"{target}: already exists; pass overwrite=True to replace it")
    meta = dict(emulator.metadata or {})
    if metadata is not None:
        meta.update(metadata)
    check_json("metadata", meta)
    header, arrays = emulator._state()
    doc = {
        "format": FORMAT_NAME,
        "format_version": FORMAT_VERSION,
        "swerve_version": __version__,
        "emulator_type": emulator.emulator_type,
        "created": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
        **header,
        "arrays_file": ARRAYS_FILE,
        "arrays": {k: {"dtype": v.dtype.str, "shape": list(v.shape)} for k, v in arrays.items()},
        "metadata": meta,
    }
    text = json.dumps(doc, indent=2, allow_nan=False) + "\n"

    target.parent.mkdir(parents=True, exist_ok=True)
    tmp = Path(tempfile.mkdtemp(prefix=f".{target.name}.", suffix=".tmp", dir=target.parent))
    try:
        write_atomic(tmp / ARRAYS_FILE, lambda fh: np.savez_compressed(fh, **arrays))
        write_bytes(tmp / JSON_FILE, text.encode("utf-8"))
        sums = "".join(f"{_sha256(tmp / f)}  {f}\n" for f in (JSON_FILE, ARRAYS_FILE))
        write_bytes(tmp / CHECKSUMS_FILE, sums.encode("ascii"))
        os.chmod(tmp, 0o755)
        if target.exists():
            old = target.with_name(f".{target.name}.old-{uuid.uuid4().hex[:8]}")
            os.rename(target, old)
            os.rename(tmp, target)
            shutil.rmtree(old, ignore_errors=True)
        else:
            os.rename(tmp, target)
    except BaseException:
        shutil.rmtree(tmp, ignore_errors=True)
        raise
    return target


def _read_checksums(folder: Path) -> dict[str, str]:
    path = folder / CHECKSUMS_FILE
    try:
        text = path.read_text(encoding="ascii")
    except FileNotFoundError:
        raise EmulatorFileError(f"{folder}: missing {CHECKSUMS_FILE}; not a complete emulator folder") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise EmulatorFileError(f"{folder}: cannot read {CHECKSUMS_FILE} ({exc})") from None
    sums = {}
    for i, line in enumerate(text.splitlines(), 1):
        parts = line.split()
        if len(parts) != 2 or len(parts[0]) != 64 or "/" in parts[1] or "\\" in parts[1]:
            raise EmulatorFileError(f"{folder / CHECKSUMS_FILE}: line {i} is not '<sha256>  <file name>'")
        sums[parts[1].lstrip("*")] = parts[0].lower()
    for need in (JSON_FILE, ARRAYS_FILE):
        if need not in sums:
            raise EmulatorFileError(f"{folder / CHECKSUMS_FILE}: no checksum for {need}")
    return sums


def _verify(folder: Path) -> dict[str, str]:
    sums = _read_checksums(folder)
    for name, want in sums.items():
        path = folder / name
        if not path.is_file():
            raise EmulatorFileError(f"{folder}: missing file {name}")
        got = _sha256(path)
        if got != want:
            raise EmulatorFileError(
                f"{path}: SHA-256 mismatch (file is truncated, damaged or was modified); refusing to load"
            )
    return sums


def _refuse_pickle(folder, doc):
    arrays_file = doc.get("arrays_file", ARRAYS_FILE)
    manifest = doc.get("arrays")
    if not isinstance(arrays_file, str) or not isinstance(manifest, dict):
        raise EmulatorFileError(f"{folder / JSON_FILE}: 'arrays_file' and 'arrays' entries are required")
    low = arrays_file.lower()
    if any(w in low for w in _PICKLE_FILE_WORDS) or not low.endswith(".npz"):
        raise EmulatorFileError(
            f"{folder / JSON_FILE}: arrays_file {arrays_file!r} is not a .npz array file; swerve never loads pickles"
        )
    if arrays_file != ARRAYS_FILE:
        raise EmulatorFileError(f"{folder / JSON_FILE}: arrays_file must be {ARRAYS_FILE!r}, got {arrays_file!r}")
    for key, spec in manifest.items():
        dtype = spec.get("dtype") if isinstance(spec, dict) else None
        if not isinstance(dtype, str) or any(w in dtype.lower() for w in _OBJECT_DTYPE_WORDS) or dtype.upper() == "O":
            raise EmulatorFileError(
                f"{folder / JSON_FILE}: array {key!r} has dtype {dtype!r}; "
                "only float64 is allowed (no object or pickled arrays)"
            )
        if dtype not in _SAFE_DTYPES:
            raise EmulatorFileError(
                f"{folder / JSON_FILE}: array {key!r} has dtype {dtype!r}; only float64 ('<f8') is allowed")


def _read_doc(folder: Path) -> dict:
    try:
        doc = json.loads((folder / JSON_FILE).read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError) as exc:
        raise EmulatorFileError(f"{folder / JSON_FILE}: cannot read ({exc})") from None
    except json.JSONDecodeError as exc:
        raise EmulatorFileError(f"{folder / JSON_FILE}: invalid JSON at line {exc.lineno}: {exc.msg}") from None
    if not isinstance(doc, dict) or doc.get("format") != FORMAT_NAME:
        raise EmulatorFileError(f"{folder / JSON_FILE}: not a swerve emulator (format is not {FORMAT_NAME!r})")
    version = doc.get("format_version")
    if not isinstance(version, int) or isinstance(version, bool) or version < 1:
        raise EmulatorFileError(f"{folder / JSON_FILE}: format_version must be a positive int, got {version!r}")
    if version > FORMAT_VERSION:
        raise EmulatorFileError(
            f"{folder / JSON_FILE}: format version {version} is newer than this swerve "
            f"({__version__}) reads (up to {FORMAT_VERSION}); upgrade swerve"
        )
    if doc.get("emulator_type") not in _TYPES:
        raise EmulatorFileError(
            f"{folder / JSON_FILE}: unknown emulator_type {doc.get('emulator_type')!r}; "
            f"expected one of {sorted(_TYPES)}"
        )
    _refuse_pickle(folder, doc)
    return doc


def load(folder):
    """Load an emulator folder written by :func:`save`, verifying it first.

    Checks, in order: the checksums of every file, the JSON format and version, that the
    manifest names only float64 arrays in a ``.npz`` file, that the arrays file holds exactly
    those arrays with those dtypes and shapes (read with ``allow_pickle=False``), and that the
    shapes agree with the parameters, outputs and training points. Nothing is unpickled.

    Raises
    ------
    EmulatorFileError
        One line naming the file and the problem.
    """
    folder = Path(folder)
    if not folder.is_dir():
        raise EmulatorFileError(f"{folder}: no such emulator folder")
    _verify(folder)
    doc = _read_doc(folder)
    manifest = doc["arrays"]
    arrays = {}
    try:
        with np.load(folder / ARRAYS_FILE, allow_pickle=False) as npz:
            names = set(npz.files)
            if names != set(manifest):
                raise EmulatorFileError(
                    f"{folder / ARRAYS_FILE}: holds arrays {sorted(names)}, the manifest lists {sorted(manifest)}"
                )
            for key in sorted(names):
                a = npz[key]
                spec = manifest[key]
                if a.dtype != _SAFE_DTYPES[spec["dtype"]] or list(a.shape) != list(spec["shape"]):
                    raise EmulatorFileError(
                        f"{folder / ARRAYS_FILE}: array {key!r} is {a.dtype.str} {a.shape}; "
                        f"the manifest says {spec['dtype']} {tuple(spec['shape'])}"
                    )
                if not np.all(np.isfinite(a)):
                    raise EmulatorFileError(f"{folder / ARRAYS_FILE}: array {key!r} holds non-finite values")
                arrays[key] = a
    except EmulatorFileError:
        raise
    except (ValueError, OSError, EOFError, KeyError, zipfile.BadZipFile, zlib.error) as exc:
        why = " ".join(str(exc).split())
        raise EmulatorFileError(
            f"{folder / ARRAYS_FILE}: unreadable array file ({type(exc).__name__}: {why})") from None
    return _TYPES[doc["emulator_type"]]._from_state(doc, arrays, str(folder))


def content_hash(folder) -> str:
    """SHA-256 (hex) identifying an emulator folder's content (the hash of its verified
    checksums file); record it in every inference output."""
    folder = Path(folder)
    _verify(folder)
    return _sha256(folder / CHECKSUMS_FILE)


# --------------------------------------------------------------------------------------------
# description
# --------------------------------------------------------------------------------------------


def _flatten(prefix, value, lines, depth=0):
    if isinstance(value, dict) and value and depth < 3:
        for k, v in value.items():
            _flatten(f"{prefix}.{k}" if prefix else str(k), v, lines, depth + 1)
    else:
        text = json.dumps(value) if not isinstance(value, str) else value
        if len(text) > 100:
            text = text[:97] + "..."
        lines.append(f"    {prefix}: {text}")


def describe(source) -> str:
    """Multi-line description of an emulator folder or a fitted emulator (for ``swerve info``).

    Parameters
    ----------
    source : path-like or GPEmulator

    Returns
    -------
    str
        Type and format, parameter domain, outputs, kernel, PCA, training provenance and
        metadata (and, for a folder, the verified content hash).
    """
    if isinstance(source, tuple(_TYPES.values())):
        header, _ = source._state()
        doc = {"format": FORMAT_NAME, "format_version": FORMAT_VERSION, "swerve_version": __version__,
               "emulator_type": source.emulator_type, "created": "(not saved)", **header,
               "metadata": dict(source.metadata or {})}
        title, digest = "swerve emulator (in memory)", None
    else:
        folder = Path(source)
        em = load(folder)  # full verification
        doc = _read_doc(folder)
        del em
        title, digest = f"swerve emulator {folder}", content_hash(folder)
    k = doc["kernel"]
    lines = [
        title,
        (f"  type: {doc['emulator_type']} (format {doc['format']} v{doc['format_version']}, "
         f"written by swerve {doc['swerve_version']} on {doc['created']})"),
        f"  parameters ({len(doc['parameters'])}):",
    ]
    for p in doc["parameters"]:
        unit = f" {p['unit']}" if p["unit"] else ""
        lines.append(f"    {p['name']:<16s} [{p['low']:.6g}, {p['high']:.6g}]{unit}")
    out = doc["outputs"]
    names = out.get("names")
    shown = "" if not names else ": " + ", ".join(names[:8]) + (", ..." if len(names) > 8 else "")
    lines.append(f"  outputs: {out['n_outputs']}{shown}")
    if doc.get("pca"):
        pca = doc["pca"]
        lines.append(
            f"  PCA: {pca['n_components']} components, {100 * sum(pca['explained_variance_ratio']):.4g}% "
            f"of the standardised variance; truncation residual (sum over outputs) "
            f"{pca['residual_variance_total']:.3g}"
        )
    so = doc["settings"].get("scaled_outputs")
    if so:
        lines.append(f"  scaled outputs: {len(so['linear'])} linear and {len(so['log'])} log outputs "
                     f"emulated divided by s = 1/{so['parameter']}^2 - 1 (zero at {so['parameter']} = 1)")
    ls = np.asarray(k["length_scale"])
    lines.append(
        f"  kernel: {k['family']}, {k['n_components']} component GPs; length scales (unit cube) "
        f"{ls.min():.3g} to {ls.max():.3g}; noise levels up to {max(k['noise_level']):.3g}"
    )
    tr = doc["training"]
    st = doc["settings"]
    lines.append(
        f"  training: {tr['n_points']} points, random_state {st.get('random_state')}, "
        f"restarts {st.get('n_restarts')}, simulation variances {'given' if tr.get('has_y_var') else 'not given'}, "
        f"{len(tr.get('fit_warnings', []))} optimizer warnings"
    )
    meta = doc.get("metadata") or {}
    if meta:
        lines.append("  metadata:")
        _flatten("", meta, lines)
    if digest:
        lines.append(f"  content hash (sha256): {digest}")
    return "\n".join(lines)
