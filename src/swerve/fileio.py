"""Writing files safely, one way for the whole package.

Every file swerve writes appears complete or not at all: it is written to a uniquely named
temporary file in the target's folder, flushed to disk, given the permissions a normally created
file would have, and renamed onto the target (``os.replace``, atomic on POSIX and Windows). On any
error the temporary file is removed, so a failed or interrupted write leaves nothing behind.

Also here: the one JSON encoding of swerve's outputs (numpy scalars and arrays, paths, astropy
quantities) and the one "did you mean" helper for misspelt names.
"""

from __future__ import annotations

import contextlib
import difflib
import json
import math
import os
import tempfile
from collections.abc import Callable, Iterable, Iterator
from pathlib import Path

import numpy as np

__all__ = [
    "atomic_path",
    "did_you_mean",
    "file_mode",
    "jsonable",
    "write_atomic",
    "write_bytes",
    "write_json",
    "write_text",
]


def file_mode() -> int:
    """Permissions of a new file under the current umask (``mkstemp`` alone gives 0o600)."""
    mask = os.umask(0o022)
    os.umask(mask)
    return 0o666 & ~mask


@contextlib.contextmanager
def atomic_path(path, *, suffix: str | None = None) -> Iterator[Path]:
    """A temporary path beside ``path``; on a clean exit it is renamed onto ``path``.

    For writers that need a file name rather than a file object (astropy's table writers,
    h5py). The temporary name keeps ``path``'s suffix (or ``suffix``), so writers that choose a
    format by extension still do. On an exception the temporary file is removed and ``path`` is
    left as it was.

    Examples
    --------
    >>> with atomic_path(folder / "summary.ecsv") as tmp:      # doctest: +SKIP
    ...     table.write(tmp, format="ascii.ecsv", overwrite=True)
    """
    path = Path(path)
    folder = path.parent if str(path.parent) else Path(".")
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=path.suffix if suffix is None else suffix, dir=folder)
    os.close(fd)
    tmp = Path(tmp)
    try:
        yield tmp
        os.chmod(tmp, file_mode())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(FileNotFoundError):
            os.unlink(tmp)
        raise


def write_atomic(path, write: Callable) -> Path:
    """Write ``path`` all at once: ``write(fh)`` into a binary temporary file beside it, synced, then renamed."""
    path = Path(path)
    with atomic_path(path) as tmp:
        with open(tmp, "wb") as fh:
            write(fh)
            fh.flush()
            os.fsync(fh.fileno())
    return path


def write_bytes(path, data: bytes) -> Path:
    """Write ``data`` to ``path`` atomically."""
    return write_atomic(path, lambda fh: fh.write(data))


def write_text(path, text: str) -> Path:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    return write_bytes(path, text.encode("utf-8"))


def jsonable(obj):
    """``obj`` as plain JSON data: numpy scalars and arrays, paths, quantities, sets and tuples converted.

    Non-finite floats become ``None`` (JSON has no NaN), so every file swerve writes is strict JSON.
    """
    if isinstance(obj, dict):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple, set, frozenset)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        value = float(obj)
        return value if math.isfinite(value) else None
    if isinstance(obj, str) or obj is None:
        return obj
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if hasattr(obj, "unit") and hasattr(obj, "value"):  # astropy Quantity: value in its own unit, stated
        return {"value": jsonable(np.asarray(obj.value)), "unit": str(obj.unit)}
    if isinstance(obj, os.PathLike):
        return os.fspath(obj)
    return str(obj)


def write_json(path, obj, *, indent: int | None = 2) -> Path:
    """Write ``obj`` as strict JSON (see :func:`jsonable`) to ``path`` atomically."""
    return write_text(path, json.dumps(jsonable(obj), indent=indent, allow_nan=False) + "\n")


def did_you_mean(name: str, options: Iterable[str], *, list_all: bool = False, cutoff: float = 0.6) -> str:
    """A hint for a misspelt ``name``: ``"; did you mean 'size'?"``.

    With no close match, ``""``, or with ``list_all`` the list of valid ``options``.
    """
    options = sorted(map(str, options))
    close = difflib.get_close_matches(str(name), options, n=1, cutoff=cutoff)
    if close:
        return f"; did you mean {close[0]!r}?"
    return f"; expected one of {options}" if list_all else ""
