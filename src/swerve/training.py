"""Training stage: experiment designs and resumable parallel runs over design points.

The training stage simulates one *design point* per set of inferred Galaxy parameters
(for example ``q_y``, ``q_z``, ``log10_m_halo``). This module knows nothing of the physics:
it takes a *task*, a function of one design point, and runs it over a design, locally with
joblib or on a Dask cluster, writing each finished point to its own file as soon as it is
done, so a killed run resumes where it stopped and loses nothing.

Designs
-------
:func:`make_design` gives space-filling points (scrambled Sobol' or Latin hypercube,
``scipy.stats.qmc``) scaled to declared bounds. ``held_out=True`` draws a second,
independent design from the same master seed (for validation against full simulations).

Seeds
-----
Every task gets its own :class:`numpy.random.SeedSequence`,
``SeedSequence(master_seed, spawn_key=(0, index, held_out))`` (see :func:`point_seed`), so a
point's result depends only on the master seed, its index and the held-out flag: never on
the order points finish in, the number of workers or the backend. Designs use the stream
``spawn_key=(1, held_out)`` of the same master seed, so design and task streams never meet.

Tasks
-----
A task is a plain, importable (top-level) function::

    def task(theta: dict[str, float], seed: numpy.random.SeedSequence) -> dict[str, numpy.ndarray]

``theta`` maps the design's parameter names to floats; ``seed`` feeds
``numpy.random.default_rng(seed)`` (or ``int(seed.generate_state(1)[0])`` for code that needs
an integer). It returns plain numeric arrays (summaries, their noise, diagnostics) with the
same names, shapes and dtypes at every point. Names must start with a letter or digit
(names starting with ``_`` are reserved for the run's bookkeeping).

Run folders
-----------
::

    <run_dir>/
      run.json               config hash, parameter names, design array, master seed,
                             held-out flag, swerve version, creation date (UTC)
      points/
        point_00000.npz      one finished design point: the task's arrays plus
        point_00001.npz      _index, _theta, _names, _config_hash, _master_seed,
        ...                  _spawn_key, _held_out (loaded with allow_pickle=False)

Each point file is written to a temporary file in ``points/`` and renamed into place
(``os.replace``), so a file either is complete or does not exist. Rerunning the same
command on the same folder resumes: finished points are verified (they load, their config
hash and theta match) and skipped; a damaged file is recomputed, never trusted. A folder
made by a different configuration is refused. Only the process that calls
:func:`run_design` writes files, so workers (local or remote) need no access to the run
folder. Run one :func:`run_design` per folder at a time.

:func:`collect` stacks all finished points in index order for the emulator fit;
:func:`run_status` says which points are finished and which are missing.

Running on a batch cluster (SLURM, PBS, ...)
--------------------------------------------
Start a Dask cluster with dask-jobqueue (``pip install dask-jobqueue``) from the login node
(or a small job), scale it, and pass its scheduler address::

    from dask_jobqueue import SLURMCluster
    from swerve.training import run_design

    cluster = SLURMCluster(
        cores=1, processes=1, memory="4GB", walltime="04:00:00",
        queue="normal", account="my-project",   # your site's partition and allocation
    )
    cluster.scale(jobs=64)                       # 64 single-core workers
    summary = run_design(
        task, points, names, "runs/train-v1", config_hash, master_seed,
        backend="dask", dask_address=cluster.scheduler_address,
    )
    cluster.close()

Every worker needs the same swerve (and numpy, numba, ...) versions installed as the
calling process. Results are bitwise identical to a local run with the same master seed.
If the allocation ends before the run does, run the same command again: finished points
are kept. Any other scheduler works the same way (``PBSCluster``, ``SGECluster``, or a
``dask scheduler`` started by hand): all :func:`run_design` needs is its address.
"""

from __future__ import annotations

import contextlib
import datetime as _dt
import json
import math
import re
import time
import zipfile
from collections.abc import Callable, Iterator, Mapping, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
from joblib import Parallel, delayed, parallel_config
from scipy.stats import qmc
from tqdm import tqdm

from . import __version__
from .fileio import write_atomic

__all__ = [
    "RUN_FORMAT_VERSION",
    "PointTaskError",
    "RunStatus",
    "RunSummary",
    "collect",
    "make_design",
    "point_seed",
    "run_design",
    "run_status",
]

#: Version of the run-folder layout written to ``run.json``.
RUN_FORMAT_VERSION = 1

_POINT_STREAM = 0  # spawn_key prefix of task seeds
_DESIGN_STREAM = 1  # spawn_key prefix of design seeds
_METHODS = ("sobol", "lhs")
_BACKENDS = ("loky", "serial", "dask")
_OUTPUT_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9_.\-]*$")
_META_KEYS = (
    "_index",
    "_theta",
    "_names",
    "_config_hash",
    "_master_seed",
    "_spawn_key",
    "_held_out",
)

Task = Callable[[dict, np.random.SeedSequence], Mapping[str, np.ndarray]]


class PointTaskError(RuntimeError):
    """A task raised an exception at one design point (the message names the point)."""


# --------------------------------------------------------------------------------------
# designs and seeds
# --------------------------------------------------------------------------------------


def _check_seed(seed, what: str) -> int:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise ValueError(f"{what} must be a non-negative integer, got {seed!r}")
    return int(seed)


def _check_bounds(bounds) -> tuple[list[str], np.ndarray, np.ndarray]:
    if not isinstance(bounds, Mapping) or len(bounds) == 0:
        raise ValueError("bounds must be a non-empty dict name -> (low, high)")
    names, lows, highs = [], [], []
    for name, pair in bounds.items():
        if not isinstance(name, str) or not name:
            raise ValueError(f"bounds: parameter name must be a non-empty string, got {name!r}")
        try:
            low, high = (float(v) for v in pair)
        except (TypeError, ValueError):
            raise ValueError(
                f"bounds[{name!r}] must be a pair of numbers (low, high), got {pair!r}"
            ) from None
        if not (math.isfinite(low) and math.isfinite(high) and low < high):
            raise ValueError(
                f"bounds[{name!r}] must be finite with low < high, got ({low}, {high})"
            )
        names.append(name)
        lows.append(low)
        highs.append(high)
    return names, np.array(lows), np.array(highs)


def make_design(
    bounds: Mapping[str, tuple[float, float]],
    n: int,
    method: str = "sobol",
    seed: int = 0,
    held_out: bool = False,
) -> tuple[list[str], np.ndarray]:
    """Space-filling design points inside box bounds.

    Parameters
    ----------
    bounds : dict of str -> (float, float)
        Parameter name -> (low, high), in the parameter's own units; the order of the dict
        is the order of the design's columns.
    n : int
        Number of design points (>= 1). Sobol' designs are most balanced when ``n`` is a
        power of 2; other ``n`` take the first ``n`` points of the next power of 2 (still
        low-discrepancy, no warning).
    method : {"sobol", "lhs"}
        Scrambled Sobol' sequence or Latin hypercube (``scipy.stats.qmc``).
    seed : int
        Master seed (non-negative). The design is a deterministic function of
        (bounds, n, method, seed, held_out).
    held_out : bool
        Draw the held-out (validation) design: an independent scramble from the same master
        seed, so it differs from the training design.

    Returns
    -------
    names : list of str
        Parameter names, the design's columns.
    points : ndarray of shape (n, len(bounds))
        Design points, each column inside its [low, high).

    Examples
    --------
    >>> names, pts = make_design({"q_z": (0.7, 1.3), "q_y": (0.8, 1.2)}, 8, seed=1)
    >>> names, pts.shape
    (['q_z', 'q_y'], (8, 2))
    """
    names, lows, highs = _check_bounds(bounds)
    if isinstance(n, bool) or not isinstance(n, (int, np.integer)) or n < 1:
        raise ValueError(f"n must be a positive integer, got {n!r}")
    n = int(n)
    seed = _check_seed(seed, "seed")
    if method not in _METHODS:
        raise ValueError(f"method must be one of {_METHODS}, got {method!r}")
    ss = np.random.SeedSequence(seed, spawn_key=(_DESIGN_STREAM, int(bool(held_out))))
    rng = np.random.default_rng(ss)
    d = len(names)
    if method == "sobol":
        sampler = qmc.Sobol(d, scramble=True, rng=rng)
        unit = sampler.random_base2(max(0, math.ceil(math.log2(n))))[:n]
    else:
        unit = qmc.LatinHypercube(d, rng=rng).random(n)
    return names, qmc.scale(unit, lows, highs)


def point_seed(master_seed: int, index: int, held_out: bool = False) -> np.random.SeedSequence:
    """The seed of one design point's task.

    Parameters
    ----------
    master_seed : int
        The run's master seed (non-negative).
    index : int
        Row of the design point.
    held_out : bool
        Whether the point belongs to the held-out design.

    Returns
    -------
    numpy.random.SeedSequence
        ``SeedSequence(master_seed, spawn_key=(0, index, held_out))``.
    """
    master_seed = _check_seed(master_seed, "master_seed")
    index = _check_seed(index, "index")
    return np.random.SeedSequence(
        master_seed, spawn_key=(_POINT_STREAM, index, int(bool(held_out)))
    )


# --------------------------------------------------------------------------------------
# run folders
# --------------------------------------------------------------------------------------


def _point_path(points_dir: Path, index: int) -> Path:
    return points_dir / f"point_{index:05d}.npz"


def _atomic_write(path: Path, write: Callable) -> None:
    """Write ``path`` all at once (:func:`swerve.fileio.write_atomic`): ``write(fh)`` into a
    temporary file ``.<name>.<random><suffix>`` beside it, synced, then renamed."""
    write_atomic(path, write)


def _swerve_version() -> str:
    return __version__


def _check_points(points, names) -> tuple[list[str], np.ndarray]:
    if isinstance(names, str) or not isinstance(names, Sequence) or len(names) == 0:
        raise ValueError("names must be a non-empty list of parameter names")
    names = [str(v) for v in names]
    if len(set(names)) != len(names):
        raise ValueError(f"names must be unique, got {names}")
    pts = np.asarray(points, dtype=float)
    if pts.ndim != 2 or pts.shape[1] != len(names) or pts.shape[0] == 0:
        raise ValueError(
            f"points must have shape (n_points >= 1, {len(names)}) to match names, "
            f"got {pts.shape}"
        )
    if not np.all(np.isfinite(pts)):
        raise ValueError("points must be finite")
    return names, pts


def _run_record(config_hash, names, points, master_seed, held_out) -> dict:
    return {
        "format": "swerve-training-run",
        "format_version": RUN_FORMAT_VERSION,
        "config_hash": config_hash,
        "names": list(names),
        "design": points.tolist(),
        "master_seed": master_seed,
        "held_out": bool(held_out),
        "swerve_version": _swerve_version(),
        "created_utc": _dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
    }


def _read_run_json(run_dir: Path) -> dict:
    path = run_dir / "run.json"
    try:
        rec = json.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ValueError(f"{run_dir} is not a swerve run folder (no run.json)") from None
    except (OSError, ValueError) as exc:
        raise ValueError(f"{path} is unreadable: {exc}") from None
    keys = ("config_hash", "names", "design", "master_seed", "held_out")
    if not isinstance(rec, dict) or rec.get("format") != "swerve-training-run" or any(
        k not in rec for k in keys
    ):
        raise ValueError(f"{path} is not a swerve training-run record")
    if rec.get("format_version") != RUN_FORMAT_VERSION:
        raise ValueError(
            f"{path} has run format version {rec.get('format_version')!r}; this swerve "
            f"reads version {RUN_FORMAT_VERSION}"
        )
    return rec


def _open_run_dir(run_dir: Path, config_hash, names, points, master_seed, held_out) -> None:
    """Create the run folder, or check that an existing one belongs to this configuration."""
    record = run_dir / "run.json"
    if record.exists():
        rec = _read_run_json(run_dir)
        if rec["config_hash"] != config_hash:
            raise ValueError(
                f"run folder {run_dir} was made by a different configuration (hash "
                f"{str(rec['config_hash'])[:12]}..., this one {config_hash[:12]}...); "
                "choose a new --out folder, or delete this one to start over"
            )
        same = (
            rec["names"] == list(names)
            and rec["master_seed"] == master_seed
            and bool(rec["held_out"]) == bool(held_out)
            and np.array_equal(np.asarray(rec["design"], dtype=float), points)
        )
        if not same:
            raise ValueError(
                f"run folder {run_dir} has the same config hash but a different design, "
                "names, master seed or held-out flag; choose a new --out folder"
            )
    else:
        # a temp file of an interrupted first write of run.json does not count
        if run_dir.exists() and any(
            not f.name.startswith(".run.json.")
            for f in run_dir.iterdir()
        ):
            raise ValueError(
                f"{run_dir} exists, is not empty and is not a swerve run folder (no "
                "run.json); choose a new --out folder"
            )
        run_dir.mkdir(parents=True, exist_ok=True)
        text = json.dumps(_run_record(config_hash, names, points, master_seed, held_out), indent=1)
        _atomic_write(record, lambda fh: fh.write(text.encode("utf-8")))
    (run_dir / "points").mkdir(exist_ok=True)


def _load_point(path: Path) -> dict[str, np.ndarray]:
    """Load every array of a point file (forces the zip CRC checks). Raises ValueError."""
    try:
        # open the file here: np.load leaks its own handle when the zip is damaged
        with open(path, "rb") as fh, np.load(fh, allow_pickle=False) as npz:
            data = {k: npz[k] for k in npz.files}
    except (OSError, ValueError, EOFError, zipfile.BadZipFile, KeyError) as exc:
        raise ValueError(f"point file {path} is unreadable ({type(exc).__name__}: {exc})") from None
    missing = [k for k in _META_KEYS if k not in data]
    if missing:
        raise ValueError(f"point file {path} lacks the bookkeeping entries {missing}")
    return data


def _point_problem(path: Path, index: int, rec: dict, theta: np.ndarray) -> str | None:
    """None when the point file is a valid result of this run, else why not."""
    try:
        data = _load_point(path)
    except ValueError as exc:
        return str(exc)
    if str(data["_config_hash"]) != rec["config_hash"]:
        return f"point file {path} has a different config hash"
    if int(data["_index"]) != index or not np.array_equal(data["_theta"], theta):
        return f"point file {path} holds a different design point"
    if str(data["_master_seed"]) != str(rec["master_seed"]) or bool(data["_held_out"]) != bool(
        rec["held_out"]
    ):
        return f"point file {path} has a different seed"
    return None


def _clean_temp_files(points_dir: Path) -> None:
    for tmp in points_dir.glob(".point_*.npz.*"):  # temporary files of interrupted writes
        with contextlib.suppress(FileNotFoundError):
            tmp.unlink()


def _check_outputs(index: int, out) -> dict[str, np.ndarray]:
    if not isinstance(out, Mapping):
        raise ValueError(
            f"task output at design point {index} must be a dict name -> array, "
            f"got {type(out).__name__}"
        )
    arrays = {}
    for key, value in out.items():
        if not isinstance(key, str) or not _OUTPUT_NAME.match(key):
            raise ValueError(
                f"task output name {key!r} at design point {index} must start with a letter "
                "or digit and use only letters, digits, '_', '.', '-'"
            )
        arr = np.asarray(value)
        if arr.dtype.kind not in "biufc":
            raise ValueError(
                f"task output {key!r} at design point {index} must be a numeric array, "
                f"got dtype {arr.dtype}"
            )
        arrays[key] = arr
    return arrays


def _write_point(points_dir, index, theta, names, config_hash, master_seed, held_out, arrays):
    meta = {
        "_index": np.int64(index),
        "_theta": np.asarray(theta, dtype=float),
        "_names": np.array(names, dtype=str),
        "_config_hash": np.array(config_hash),
        "_master_seed": np.array(str(master_seed)),
        "_spawn_key": np.array([_POINT_STREAM, index, int(bool(held_out))], dtype=np.int64),
        "_held_out": np.bool_(held_out),
    }
    payload = {**arrays, **meta}
    _atomic_write(_point_path(points_dir, index), lambda fh: np.savez(fh, **payload))


# --------------------------------------------------------------------------------------
# running
# --------------------------------------------------------------------------------------


def _compute(task, index, theta_row, names, master_seed, held_out):
    """Run the task at one design point (in a worker). Returns (index, outputs)."""
    theta = {name: float(v) for name, v in zip(names, theta_row, strict=True)}
    seed = point_seed(master_seed, index, held_out)
    try:
        out = task(theta, seed)
    except Exception as exc:
        raise PointTaskError(
            f"task failed at design point {index} (theta={theta}): {type(exc).__name__}: {exc}"
        ) from exc
    return index, out


@dataclass(frozen=True)
class RunSummary:
    """What one :func:`run_design` call did.

    Attributes
    ----------
    run_dir : pathlib.Path
        The run folder.
    n_points : int
        Points in the design.
    n_computed : int
        Points computed by this call.
    n_skipped : int
        Points already finished and verified before this call (not recomputed).
    n_invalid : int
        Point files found damaged or foreign before this call and recomputed.
    elapsed_s : float
        Wall-clock time of this call [s].
    backend : str
        Backend used.
    """

    run_dir: Path
    n_points: int
    n_computed: int
    n_skipped: int
    n_invalid: int
    elapsed_s: float
    backend: str


@contextlib.contextmanager
def _dask_client(dask_address, dask_local_workers):
    try:
        from dask.distributed import Client, LocalCluster  # noqa: PLC0415 - optional (the dask extra), backend='dask' only
    except ImportError:  # pragma: no cover - depends on the installation
        raise ValueError(
            "backend='dask' needs dask.distributed: pip install 'swerve[dask]'"
        ) from None
    if dask_address is not None:
        with Client(dask_address, set_as_default=False) as client:
            yield client
    else:
        with LocalCluster(
            n_workers=dask_local_workers,
            threads_per_worker=1,
            processes=True,
            dashboard_address=None,
        ) as cluster, Client(cluster, set_as_default=False) as client:
            yield client


def _execute(task, todo, pts, names, master_seed, held_out, backend, n_jobs,
             dask_address, dask_local_workers) -> Iterator[tuple[int, object]]:
    """Yield (index, outputs) for each design point in ``todo`` as it finishes."""
    if backend == "serial":
        for i in todo:
            yield _compute(task, i, pts[i], names, master_seed, held_out)
        return
    calls = (delayed(_compute)(task, i, pts[i], names, master_seed, held_out) for i in todo)
    if backend == "loky":
        with parallel_config(backend="loky", n_jobs=n_jobs):
            yield from Parallel(return_as="generator_unordered", batch_size=1)(calls)
        return
    with _dask_client(dask_address, dask_local_workers) as client:
        with parallel_config(backend="dask", client=client):
            yield from Parallel(n_jobs=-1, return_as="generator_unordered", batch_size=1)(calls)


def run_design(
    task: Task,
    points,
    names: Sequence[str],
    run_dir,
    config_hash: str,
    master_seed: int,
    *,
    n_jobs: int = 1,
    backend: str = "loky",
    dask_address: str | None = None,
    dask_local_workers: int | None = None,
    progress: bool = True,
    held_out: bool = False,
) -> RunSummary:
    """Run a task at every design point, writing each result as soon as it is done.

    Resumable: rerunning with the same arguments skips verified finished points and
    recomputes missing or damaged ones. Results do not depend on ``backend`` or ``n_jobs``.

    Parameters
    ----------
    task : callable
        ``task(theta: dict[str, float], seed: SeedSequence) -> dict[str, ndarray]``, an
        importable top-level function (see the module docstring).
    points : array_like of shape (n_points, n_params)
        The design (from :func:`make_design`).
    names : sequence of str, length n_params
        Parameter names, the design's columns.
    run_dir : str or path
        Run folder; created if missing. An existing folder must have been made by this
        same configuration.
    config_hash : str
        Hash of the configuration that defines the task (e.g. ``swerve.config.config_hash``);
        written into every file and compared when resuming.
    master_seed : int
        Non-negative master seed; point ``i`` gets :func:`point_seed` (master_seed, i, held_out).
    n_jobs : int
        Worker processes for ``backend="loky"`` (-1: all cores). Ignored otherwise.
    backend : {"loky", "serial", "dask"}
        ``"loky"``: joblib processes on this machine; ``"serial"``: this process, in order;
        ``"dask"``: joblib's Dask backend, on the scheduler at ``dask_address`` or on a
        local cluster of ``dask_local_workers`` single-threaded worker processes that this
        call starts and closes.
    dask_address : str, optional
        Address of a running Dask scheduler (``"tcp://host:8786"``;
        ``cluster.scheduler_address`` of a dask-jobqueue cluster).
    dask_local_workers : int, optional
        Number of worker processes of a local Dask cluster (when no address is given).
    progress : bool
        Show a tqdm progress bar (on stderr).
    held_out : bool
        The design is a held-out (validation) design; changes the seeds.

    Returns
    -------
    RunSummary

    Raises
    ------
    ValueError
        Bad arguments, a run folder made by another configuration, a task output that is
        not a dict of numeric arrays.
    PointTaskError
        The task raised at some design point; points finished before stay written.
    """
    names, pts = _check_points(points, names)
    if not isinstance(config_hash, str) or not config_hash:
        raise ValueError(f"config_hash must be a non-empty string, got {config_hash!r}")
    master_seed = _check_seed(master_seed, "master_seed")
    if backend not in _BACKENDS:
        raise ValueError(f"backend must be one of {_BACKENDS}, got {backend!r}")
    if not callable(task):
        raise ValueError(f"task must be callable, got {type(task).__name__}")
    if isinstance(n_jobs, bool) or not isinstance(n_jobs, (int, np.integer)) or not (
        n_jobs >= 1 or n_jobs == -1
    ):
        raise ValueError(f"n_jobs must be a positive integer or -1, got {n_jobs!r}")
    if backend == "dask":
        if (dask_address is None) == (dask_local_workers is None):
            raise ValueError(
                "backend='dask' needs exactly one of dask_address (a running scheduler) "
                "or dask_local_workers (start a local cluster)"
            )
        if dask_local_workers is not None and (
            isinstance(dask_local_workers, bool)
            or not isinstance(dask_local_workers, (int, np.integer))
            or dask_local_workers < 1
        ):
            raise ValueError(
                f"dask_local_workers must be a positive integer, got {dask_local_workers!r}"
            )
    elif dask_address is not None or dask_local_workers is not None:
        raise ValueError(
            f"dask_address / dask_local_workers need backend='dask', got backend={backend!r}"
        )

    t0 = time.perf_counter()
    run_dir = Path(run_dir)
    _open_run_dir(run_dir, config_hash, names, pts, master_seed, held_out)
    points_dir = run_dir / "points"
    _clean_temp_files(points_dir)
    rec = {"config_hash": config_hash, "master_seed": master_seed, "held_out": held_out}
    todo, n_invalid = [], 0
    for i in range(pts.shape[0]):
        path = _point_path(points_dir, i)
        if not path.exists():
            todo.append(i)
        elif _point_problem(path, i, rec, pts[i]) is not None:
            todo.append(i)
            n_invalid += 1
    n_skipped = pts.shape[0] - len(todo)

    n_computed = 0
    with tqdm(
        total=pts.shape[0], initial=n_skipped, unit="point", desc="design points",
        disable=not progress,
    ) as bar:
        if todo:
            # closing(): on an error below, stop the workers (and a local cluster) now,
            # not when the suspended generator is garbage-collected
            with contextlib.closing(
                _execute(task, todo, pts, names, master_seed, held_out, backend,
                         int(n_jobs), dask_address, dask_local_workers)
            ) as results:
                for index, out in results:
                    arrays = _check_outputs(index, out)
                    _write_point(points_dir, index, pts[index], names, config_hash,
                                 master_seed, held_out, arrays)
                    n_computed += 1
                    bar.update(1)
    return RunSummary(
        run_dir=run_dir,
        n_points=int(pts.shape[0]),
        n_computed=n_computed,
        n_skipped=n_skipped,
        n_invalid=n_invalid,
        elapsed_s=time.perf_counter() - t0,
        backend=backend,
    )


# --------------------------------------------------------------------------------------
# reading results
# --------------------------------------------------------------------------------------


@dataclass(frozen=True)
class RunStatus:
    """Which points of a run folder are finished.

    Attributes
    ----------
    names : list of str
        Parameter names.
    design : ndarray of shape (n_points, n_params)
        The run's design.
    config_hash : str
        Configuration hash of the run.
    held_out : bool
        Whether the design is a held-out design.
    finished : tuple of int
        Indices of valid finished points, ascending.
    missing : tuple of int
        Indices of points not written yet or whose files are damaged, ascending.
    problems : dict of int -> str
        For damaged files among ``missing``: what is wrong.
    """

    names: list
    design: np.ndarray
    config_hash: str
    held_out: bool
    finished: tuple
    missing: tuple
    problems: dict


def run_status(run_dir) -> RunStatus:
    """Inspect a run folder: which design points are finished, which missing.

    Parameters
    ----------
    run_dir : str or path
        A folder written by :func:`run_design`.

    Returns
    -------
    RunStatus
    """
    run_dir = Path(run_dir)
    rec = _read_run_json(run_dir)
    design = np.asarray(rec["design"], dtype=float)
    finished, missing, problems = [], [], {}
    for i in range(design.shape[0]):
        path = _point_path(run_dir / "points", i)
        if not path.exists():
            missing.append(i)
            continue
        why = _point_problem(path, i, rec, design[i])
        if why is None:
            finished.append(i)
        else:
            missing.append(i)
            problems[i] = why
    return RunStatus(
        names=list(rec["names"]),
        design=design,
        config_hash=str(rec["config_hash"]),
        held_out=bool(rec["held_out"]),
        finished=tuple(finished),
        missing=tuple(missing),
        problems=problems,
    )


def collect(run_dir, *, allow_missing: bool = False):
    """Stack the results of all finished design points, in index order.

    Parameters
    ----------
    run_dir : str or path
        A folder written by :func:`run_design`.
    allow_missing : bool
        If False (default), refuse an incomplete run, naming the missing points. If True,
        return the finished points only (their indices are ``run_status(run_dir).finished``).

    Returns
    -------
    names : list of str
        Parameter names.
    theta : ndarray of shape (n_finished, n_params)
        Design points of the finished points.
    outputs : dict of str -> ndarray of shape (n_finished, ...)
        Each task output stacked over points.

    Raises
    ------
    ValueError
        Missing points (unless ``allow_missing``), no finished point, or points whose
        outputs differ in names, shapes or dtypes.
    """
    run_dir = Path(run_dir)
    status = run_status(run_dir)
    if status.missing and not allow_missing:
        shown = ", ".join(str(i) for i in status.missing[:10])
        more = " ..." if len(status.missing) > 10 else ""
        raise ValueError(
            f"run {run_dir} is incomplete: {len(status.missing)} of {status.design.shape[0]} "
            f"points missing or damaged (indices {shown}{more}); rerun the same command to "
            "finish it"
        )
    if not status.finished:
        raise ValueError(f"run {run_dir} has no finished design point")
    stacks: dict[str, list] = {}
    ref = None
    for i in status.finished:
        path = _point_path(run_dir / "points", i)
        data = _load_point(path)
        out = {k: v for k, v in data.items() if not k.startswith("_")}
        sig = {k: (v.shape, v.dtype.str) for k, v in out.items()}
        if ref is None:
            ref = sig
        elif sig != ref:
            raise ValueError(
                f"point file {path} has outputs {sig}, unlike the first point's {ref}"
            )
        for k, v in out.items():
            stacks.setdefault(k, []).append(v)
    theta = status.design[list(status.finished)]
    return status.names, theta, {k: np.stack(v) for k, v in stacks.items()}
