"""Tests of swerve.training: designs, seeds, resumable parallel runs, run folders.

The physics of a design point is not under test here: toy tasks stand in for it. They draw
random numbers from their seed and do a little numpy (or numba) work, so any change in the
seed a point gets, in the order of floating-point work or in what is written shows up as a
bitwise difference.
"""

from __future__ import annotations

import functools
import json
import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

import numba
import numpy as np
import pytest

import swerve
from swerve.training import (
    PointTaskError,
    collect,
    make_design,
    point_seed,
    run_design,
    run_status,
)

BOUNDS = {"q_y": (0.8, 1.2), "q_z": (0.6, 1.4), "log10_m": (11.5, 12.5)}
HASH = "0123456789abcdef" * 4
MASTER = 20261201


# --------------------------------------------------------------------------------------
# toy tasks (top-level, so worker processes can import them)
# --------------------------------------------------------------------------------------


def toy_task(theta, seed, *, log=None, sleep=0.0):
    """Deterministic toy: Gaussian draws scaled by theta, a few summaries of them."""
    if log is not None:
        with open(log, "a") as fh:  # one short append per call: a call counter
            fh.write(f"{int(seed.spawn_key[1])}\n")
    if sleep:
        time.sleep(sleep)
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(400, 3)) * np.array([theta["q_y"], theta["q_z"], 1.0])
    x[:, 2] += theta["log10_m"]
    return {
        "quantiles": np.quantile(x, [0.16, 0.5, 0.84], axis=0),  # (3, 3) float
        "noise": x.std(axis=0) / np.sqrt(x.shape[0]),  # (3,) float
        "n_pos": np.array((x[:, 0] > 0).sum()),  # () int
    }


@numba.njit(cache=False)
def _leapfrog(pos, vel, q, n_steps, dt):
    """Leapfrog orbits in a flattened logarithmic potential (toy numba kernel)."""
    out = np.empty(pos.shape[0])
    for i in range(pos.shape[0]):
        x, z = pos[i, 0], pos[i, 1]
        vx, vz = vel[i, 0], vel[i, 1]
        for _ in range(n_steps):
            m2 = 1.0 + x * x + (z / q) ** 2
            vx -= 0.5 * dt * 2.0 * x / m2
            vz -= 0.5 * dt * 2.0 * z / (q * q * m2)
            x += dt * vx
            z += dt * vz
            m2 = 1.0 + x * x + (z / q) ** 2
            vx -= 0.5 * dt * 2.0 * x / m2
            vz -= 0.5 * dt * 2.0 * z / (q * q * m2)
        out[i] = 0.5 * (vx * vx + vz * vz) + np.log(1.0 + x * x + (z / q) ** 2)
    return out


def numba_task(theta, seed):
    """Toy with a compiled kernel: energies of random orbits after integration."""
    rng = np.random.default_rng(seed)
    pos = rng.normal(size=(50, 2))
    vel = rng.normal(size=(50, 2)) * 0.3
    energy = _leapfrog(pos, vel, theta["q_z"], 200, 0.01)
    return {"energy": energy, "mean_energy": np.array(energy.mean())}


def failing_task(theta, seed, *, bad_index):
    if int(seed.spawn_key[1]) == bad_index:
        raise RuntimeError("boom")
    return toy_task(theta, seed)


def _design(n=12, **kw):
    return make_design(BOUNDS, n, seed=MASTER, **kw)


def _assert_same_outputs(a, b):
    names_a, theta_a, out_a = a
    names_b, theta_b, out_b = b
    assert names_a == names_b
    assert np.array_equal(theta_a, theta_b)
    assert sorted(out_a) == sorted(out_b)
    for key in out_a:
        assert out_a[key].dtype == out_b[key].dtype, key
        assert np.array_equal(out_a[key], out_b[key]), key  # bitwise, no tolerance


def _mtimes(run_dir):
    return {p.name: p.stat().st_mtime_ns for p in (Path(run_dir) / "points").glob("point_*.npz")}


# --------------------------------------------------------------------------------------
# designs
# --------------------------------------------------------------------------------------


@pytest.mark.parametrize("method", ["sobol", "lhs"])
@pytest.mark.parametrize("n", [16, 13])  # 13: not a power of 2, must not warn (warnings=errors)
def test_design_shape_bounds_deterministic(method, n):
    names, pts = make_design(BOUNDS, n, method=method, seed=5)
    assert names == list(BOUNDS)
    assert pts.shape == (n, 3)
    for j, (lo, hi) in enumerate(BOUNDS.values()):
        assert np.all(pts[:, j] >= lo) and np.all(pts[:, j] < hi)
        # spread over the whole range, not bunched in a corner
        assert np.ptp(pts[:, j]) > 0.7 * (hi - lo)
    assert np.array_equal(pts, make_design(BOUNDS, n, method=method, seed=5)[1])
    assert not np.allclose(pts, make_design(BOUNDS, n, method=method, seed=6)[1])


def test_sobol_first_points_are_prefix():
    # A non-power-of-2 Sobol' design is the prefix of the next power of 2 (documented).
    _, p13 = make_design(BOUNDS, 13, seed=5)
    _, p16 = make_design(BOUNDS, 16, seed=5)
    assert np.array_equal(p13, p16[:13])


@pytest.mark.parametrize("method", ["sobol", "lhs"])
def test_held_out_design_differs_and_is_deterministic(method):
    _, train = make_design(BOUNDS, 32, method=method, seed=9)
    _, held = make_design(BOUNDS, 32, method=method, seed=9, held_out=True)
    _, held2 = make_design(BOUNDS, 32, method=method, seed=9, held_out=True)
    assert np.array_equal(held, held2)
    # no held-out point coincides with a training point (smallest distance is not ~0)
    d = np.linalg.norm(train[:, None, :] - held[None, :, :], axis=-1)
    assert d.min() > 1e-6


def test_designs_are_space_filling():
    # Centred L2 discrepancy (scipy.stats.qmc.discrepancy) of the unit-cube designs is lower
    # than that of uniform random points: Sobol' below every one of 30 random designs, LHS
    # below their median. Fixed seeds.
    from scipy.stats import qmc  # imported here: worker processes import this module

    n, d = 64, 3
    unit = {"a": (0.0, 1.0), "b": (0.0, 1.0), "c": (0.0, 1.0)}
    rng = np.random.default_rng(3)
    random_disc = [qmc.discrepancy(rng.random((n, d))) for _ in range(30)]
    sobol = qmc.discrepancy(make_design(unit, n, method="sobol", seed=1)[1])
    lhs = qmc.discrepancy(make_design(unit, n, method="lhs", seed=1)[1])
    assert sobol < min(random_disc)
    assert lhs < np.median(random_disc)


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"bounds": {}}, "bounds must be a non-empty"),
        ({"bounds": {"q_z": (1.0, 1.0)}}, r"bounds\['q_z'\].*low < high"),
        ({"bounds": {"q_z": (0.5, np.inf)}}, r"bounds\['q_z'\].*finite"),
        ({"bounds": {"q_z": 1.0}}, r"bounds\['q_z'\] must be a pair"),
        ({"n": 0}, "n must be a positive integer"),
        ({"method": "grid"}, "method must be one of"),
        ({"seed": -1}, "seed must be a non-negative integer"),
    ],
)
def test_design_bad_input(kwargs, match):
    args = {"bounds": BOUNDS, "n": 8, "method": "sobol", "seed": 1} | kwargs
    with pytest.raises(ValueError, match=match):
        make_design(**args)


# --------------------------------------------------------------------------------------
# seeds and files
# --------------------------------------------------------------------------------------


def test_point_seeds_distinct_and_recorded(tmp_path):
    s = [point_seed(MASTER, i).generate_state(4) for i in range(5)]
    assert len({tuple(v) for v in s}) == 5
    assert not np.array_equal(
        point_seed(MASTER, 2).generate_state(4),
        point_seed(MASTER, 2, held_out=True).generate_state(4),
    )
    names, pts = _design(4)
    run_design(toy_task, pts, names, tmp_path / "r", HASH, MASTER, backend="serial",
               progress=False)
    with np.load(tmp_path / "r" / "points" / "point_00002.npz", allow_pickle=False) as f:
        assert list(f["_spawn_key"]) == [0, 2, 0]
        assert str(f["_master_seed"]) == str(MASTER)
        assert str(f["_config_hash"]) == HASH
        assert np.array_equal(f["_theta"], pts[2])
        # the point's result is the task run by hand with point_seed
        direct = toy_task(dict(zip(names, pts[2], strict=True)), point_seed(MASTER, 2))
        assert np.array_equal(f["quantiles"], direct["quantiles"])
    rec = json.loads((tmp_path / "r" / "run.json").read_text())
    assert rec["config_hash"] == HASH and rec["names"] == names
    assert rec["master_seed"] == MASTER and rec["held_out"] is False
    assert np.array_equal(np.array(rec["design"]), pts)  # exact JSON round trip
    assert rec["swerve_version"] == swerve.__version__
    assert rec["created_utc"].endswith("+00:00")


def test_held_out_run_uses_other_seeds(tmp_path):
    names, pts = _design(3)
    run_design(toy_task, pts, names, tmp_path / "a", HASH, MASTER, backend="serial",
               progress=False)
    run_design(toy_task, pts, names, tmp_path / "b", HASH, MASTER, backend="serial",
               progress=False, held_out=True)
    qa = collect(tmp_path / "a")[2]["quantiles"]
    qb = collect(tmp_path / "b")[2]["quantiles"]
    assert not np.array_equal(qa, qb)
    assert run_status(tmp_path / "b").held_out is True


# --------------------------------------------------------------------------------------
# determinism across backends
# --------------------------------------------------------------------------------------


def test_serial_and_loky_bitwise_identical(tmp_path):
    names, pts = _design(12)
    s1 = run_design(toy_task, pts, names, tmp_path / "serial", HASH, MASTER,
                    backend="serial", progress=False)
    s2 = run_design(toy_task, pts, names, tmp_path / "loky", HASH, MASTER,
                    backend="loky", n_jobs=2, progress=False)
    assert (s1.n_computed, s2.n_computed) == (12, 12)
    _assert_same_outputs(collect(tmp_path / "serial"), collect(tmp_path / "loky"))
    out = collect(tmp_path / "serial")[2]
    assert out["quantiles"].shape == (12, 3, 3) and out["n_pos"].shape == (12,)
    assert out["n_pos"].dtype.kind == "i"
    # points differ from each other (each got its own seed and theta)
    assert len(np.unique(out["quantiles"][:, 1, 0])) == 12


def test_numba_task_serial_and_loky_identical(tmp_path):
    names, pts = _design(6)
    run_design(numba_task, pts, names, tmp_path / "s", HASH, MASTER, backend="serial",
               progress=False)
    run_design(numba_task, pts, names, tmp_path / "l", HASH, MASTER, backend="loky",
               n_jobs=2, progress=False)
    _assert_same_outputs(collect(tmp_path / "s"), collect(tmp_path / "l"))
    # the kernel really ran: leapfrog conserves energy to O(dt^2), so the energy after
    # 200 steps matches the initial energy (computed here in numpy) to ~1e-3 relative
    names_, theta, out = collect(tmp_path / "s")
    rng = np.random.default_rng(point_seed(MASTER, 0))
    pos, vel, q = rng.normal(size=(50, 2)), rng.normal(size=(50, 2)) * 0.3, theta[0, 1]
    e0 = 0.5 * (vel**2).sum(1) + np.log(1 + pos[:, 0] ** 2 + (pos[:, 1] / q) ** 2)
    np.testing.assert_allclose(out["energy"][0], e0, rtol=2e-3)


# The only test with real Dask worker processes (spawned by the runner's LocalCluster).
# No warning filter: distributed 2026.8 emits none here at cluster start or close.
def test_dask_local_cluster_bitwise_identical(tmp_path):
    names, pts = _design(8)
    run_design(toy_task, pts, names, tmp_path / "serial", HASH, MASTER, backend="serial",
               progress=False)
    s = run_design(toy_task, pts, names, tmp_path / "dask", HASH, MASTER, backend="dask",
                   dask_local_workers=2, progress=False)
    assert s.n_computed == 8 and s.backend == "dask"
    _assert_same_outputs(collect(tmp_path / "serial"), collect(tmp_path / "dask"))


def test_dask_scheduler_address_bitwise_identical(tmp_path):
    from dask.distributed import LocalCluster

    names, pts = _design(8)
    run_design(toy_task, pts, names, tmp_path / "serial", HASH, MASTER, backend="serial",
               progress=False)
    # threads instead of processes: quick to start; worker processes are tested above
    with LocalCluster(n_workers=2, threads_per_worker=1, processes=False,
                      dashboard_address=None) as cluster:
        s = run_design(toy_task, pts, names, tmp_path / "dask", HASH, MASTER,
                       backend="dask", dask_address=cluster.scheduler_address,
                       progress=False)
    assert s.n_computed == 8
    _assert_same_outputs(collect(tmp_path / "serial"), collect(tmp_path / "dask"))


# --------------------------------------------------------------------------------------
# crash safety and resuming
# --------------------------------------------------------------------------------------


_CRASH_SCRIPT = """
import functools, sys
sys.path.insert(0, {tests_dir!r})
import test_training as t
from swerve.training import run_design
names, pts = t._design({n})
run_design(functools.partial(t.toy_task, log={log!r}, sleep=0.15), pts, names, {run_dir!r},
           t.HASH, t.MASTER, backend="loky", n_jobs=2, progress=False)
"""


def test_sigkill_then_resume_loses_and_repeats_nothing(tmp_path):
    n = 16
    run_dir = tmp_path / "run"
    log1, log2 = tmp_path / "calls1.log", tmp_path / "calls2.log"
    script = tmp_path / "crash.py"
    script.write_text(textwrap.dedent(_CRASH_SCRIPT).format(
        tests_dir=str(Path(__file__).parent), n=n, log=str(log1), run_dir=str(run_dir)))
    # own session: SIGKILL to the group kills the runner and its loky workers at once
    proc = subprocess.Popen([sys.executable, str(script)], start_new_session=True,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    try:
        deadline = time.monotonic() + 60
        while len(_mtimes(run_dir)) < 4:  # glob of a missing folder is empty
            if proc.poll() is not None or time.monotonic() > deadline:
                pytest.fail(f"runner ended or stalled before the kill: {proc.communicate()}")
            time.sleep(0.02)
        os.killpg(proc.pid, signal.SIGKILL)
    finally:
        proc.wait(timeout=30)
        proc.stdout.close()
        proc.stderr.close()
    assert proc.returncode == -signal.SIGKILL
    before = _mtimes(run_dir)
    done_before = sorted(int(k[6:11]) for k in before)
    assert 4 <= len(before) < n, "the kill must land halfway"
    contents = {k: (run_dir / "points" / k).read_bytes() for k in before}

    names, pts = _design(n)
    summary = run_design(functools.partial(toy_task, log=log2), pts, names, run_dir, HASH,
                         MASTER, backend="serial", progress=False)
    assert summary.n_skipped == len(before)
    assert summary.n_computed == n - len(before) and summary.n_invalid == 0
    # the restart called the task exactly once for each missing point, never for a
    # finished one, and left finished files untouched
    calls = sorted(int(v) for v in log2.read_text().split())
    assert calls == sorted(set(range(n)) - set(done_before))
    after = _mtimes(run_dir)
    assert all(after[k] == before[k] for k in before)
    assert all((run_dir / "points" / k).read_bytes() == contents[k] for k in before)
    assert not list((run_dir / "points").glob(".point_*"))  # no temporary file of a killed write left
    # and the result equals an uninterrupted run
    run_design(toy_task, pts, names, tmp_path / "clean", HASH, MASTER, backend="serial",
               progress=False)
    _assert_same_outputs(collect(run_dir), collect(tmp_path / "clean"))
    # a third run finds everything done and computes nothing
    again = run_design(toy_task, pts, names, run_dir, HASH, MASTER, backend="serial",
                       progress=False)
    assert (again.n_skipped, again.n_computed) == (n, 0)


def test_damaged_point_files_are_recomputed(tmp_path):
    names, pts = _design(6)
    run_dir = tmp_path / "run"
    run_design(toy_task, pts, names, run_dir, HASH, MASTER, backend="serial", progress=False)
    reference = collect(run_dir)
    points = run_dir / "points"
    # a truncated file, a file of garbage, and a file from another configuration
    data = (points / "point_00001.npz").read_bytes()
    (points / "point_00001.npz").write_bytes(data[: len(data) // 2])
    (points / "point_00003.npz").write_bytes(b"not a zip file")
    run_design(toy_task, pts, names, tmp_path / "other", "f" * 64, MASTER, backend="serial",
               progress=False)
    (points / "point_00004.npz").write_bytes(
        (tmp_path / "other" / "points" / "point_00004.npz").read_bytes())
    # stale temp files from killed writes (swerve.fileio's naming, and an older one's)
    (points / ".point_00005.npz.abc123.npz").write_bytes(b"partial")
    (points / ".point_00005.npz.abc123.tmp").write_bytes(b"partial")
    status = run_status(run_dir)
    assert status.missing == (1, 3, 4) and status.finished == (0, 2, 5)
    assert "unreadable" in status.problems[1] and "config hash" in status.problems[4]
    with pytest.raises(ValueError, match=r"3 of 6 points missing or damaged \(indices 1, 3, 4\)"):
        collect(run_dir)
    partial_names, partial_theta, partial_out = collect(run_dir, allow_missing=True)
    assert np.array_equal(partial_theta, pts[[0, 2, 5]])
    assert partial_out["quantiles"].shape == (3, 3, 3)

    kept = {k: v for k, v in _mtimes(run_dir).items() if k not in
            {"point_00001.npz", "point_00003.npz", "point_00004.npz"}}
    summary = run_design(toy_task, pts, names, run_dir, HASH, MASTER, backend="serial",
                         progress=False)
    assert (summary.n_invalid, summary.n_computed, summary.n_skipped) == (3, 3, 3)
    assert all(_mtimes(run_dir)[k] == t for k, t in kept.items())
    assert not list(points.glob(".point_*"))
    _assert_same_outputs(collect(run_dir), reference)


def test_task_error_names_point_and_keeps_finished(tmp_path):
    names, pts = _design(6)
    run_dir = tmp_path / "run"
    with pytest.raises(PointTaskError, match=r"design point 3 .*RuntimeError: boom"):
        run_design(functools.partial(failing_task, bad_index=3), pts, names, run_dir, HASH,
                   MASTER, backend="serial", progress=False)
    assert run_status(run_dir).finished == (0, 1, 2)
    summary = run_design(toy_task, pts, names, run_dir, HASH, MASTER, backend="serial",
                         progress=False)
    assert (summary.n_skipped, summary.n_computed) == (3, 3)


# --------------------------------------------------------------------------------------
# refusals
# --------------------------------------------------------------------------------------


def test_other_configuration_is_refused(tmp_path):
    names, pts = _design(3)
    run_dir = tmp_path / "run"
    run_design(toy_task, pts, names, run_dir, HASH, MASTER, backend="serial", progress=False)
    with pytest.raises(ValueError, match=r"different configuration.*new --out folder"):
        run_design(toy_task, pts, names, run_dir, "e" * 64, MASTER, backend="serial",
                   progress=False)
    with pytest.raises(ValueError, match="different design, names, master seed"):
        run_design(toy_task, pts, names, run_dir, HASH, MASTER + 1, backend="serial",
                   progress=False)
    with pytest.raises(ValueError, match="different design, names, master seed"):
        run_design(toy_task, pts[:2], names, run_dir, HASH, MASTER, backend="serial",
                   progress=False)
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("mine")
    with pytest.raises(ValueError, match="not a swerve run folder"):
        run_design(toy_task, pts, names, foreign, HASH, MASTER, backend="serial",
                   progress=False)
    assert sorted(p.name for p in foreign.iterdir()) == ["notes.txt"]


@pytest.mark.parametrize(
    ("kwargs", "match"),
    [
        ({"backend": "mpi"}, "backend must be one of"),
        ({"backend": "dask"}, "exactly one of dask_address"),
        ({"backend": "dask", "dask_address": "tcp://x:1", "dask_local_workers": 2},
         "exactly one of dask_address"),
        ({"backend": "dask", "dask_local_workers": 0}, "dask_local_workers must be"),
        ({"backend": "loky", "dask_address": "tcp://x:1"}, "need backend='dask'"),
        ({"n_jobs": 0}, "n_jobs must be"),
        ({"master_seed": -3}, "master_seed must be a non-negative integer"),
        ({"config_hash": ""}, "config_hash must be a non-empty string"),
        ({"points": np.zeros((2, 2))}, r"points must have shape \(n_points >= 1, 3\)"),
    ],
)
def test_run_bad_arguments(tmp_path, kwargs, match):
    names, pts = _design(2)
    args = {"task": toy_task, "points": pts, "names": names, "run_dir": tmp_path / "r",
            "config_hash": HASH, "master_seed": MASTER, "backend": "serial",
            "progress": False} | kwargs
    with pytest.raises(ValueError, match=match):
        run_design(**args)
    assert not (tmp_path / "r").exists()  # nothing written before the arguments are valid


def _object_task(theta, seed):
    return {"bad": np.array(["a", None], dtype=object)}


def _shape_task(theta, seed):
    return {"x": np.zeros(int(seed.spawn_key[1]) + 1)}


def test_bad_task_outputs(tmp_path):
    names, pts = _design(2)
    with pytest.raises(ValueError, match="'bad' at design point 0 must be a numeric array"):
        run_design(_object_task, pts, names, tmp_path / "a", HASH, MASTER, backend="serial",
                   progress=False)
    with pytest.raises(ValueError, match="must be a dict name -> array"):
        run_design(lambda th, s: [1.0], pts, names, tmp_path / "b", HASH, MASTER,
                   backend="serial", progress=False)
    with pytest.raises(ValueError, match="name '_theta' at design point 0"):
        run_design(lambda th, s: {"_theta": np.zeros(2)}, pts, names, tmp_path / "c", HASH,
                   MASTER, backend="serial", progress=False)
    run_design(_shape_task, pts, names, tmp_path / "d", HASH, MASTER, backend="serial",
               progress=False)
    with pytest.raises(ValueError, match=r"point_00001.npz has outputs .* unlike the first"):
        collect(tmp_path / "d")


def test_collect_refuses_non_run_folder(tmp_path):
    with pytest.raises(ValueError, match="not a swerve run folder"):
        collect(tmp_path)


def test_progress_bar_on_stderr(tmp_path, capsys):
    names, pts = _design(3)
    run_design(toy_task, pts, names, tmp_path / "r", HASH, MASTER, backend="serial",
               progress=True)
    err = capsys.readouterr().err
    assert "design points" in err and "3/3" in err
