"""Tests of the engine's eight-lane SIMD kernels (swerve.simd, swerve.orbit_lanes) against
numpy, against the scalar force kernels of swerve.galaxy, and against scipy's own DOP853 step,
and of the lane driver: an orbit's result does not depend on the orbits that share its lanes."""

import math

import numba as nb
import numpy as np
import pytest

from swerve import orbit_lanes, orbits, simd
from swerve.galaxy import Galaxy, PointMass

W = simd.W


@nb.njit(cache=False)
def _ops(a, b):
    return (simd.add(a, b), simd.sub(a, b), simd.mul(a, b), simd.div(a, b), simd.sqrt(a),
            simd.fabs(b), simd.maximum(a, b), simd.where_less(a, b, a, b), simd.log1p(a),
            simd.splat(2.5))


def test_simd_ops_match_numpy():
    a = np.array([0.3, 1.0, 2.5e-8, 7.0, 1e300, 4.0, 0.0, 9.0])
    b = np.array([-2.0, 3.0, 1e-9, 7.0, 2.0, np.nan, 5.0, -0.5])
    out = [np.array(t) for t in _ops(tuple(a), tuple(b))]
    with np.errstate(invalid="ignore"):
        expect = [a + b, a - b, a * b, a / b, np.sqrt(a), np.abs(b), np.fmax(a, b),
                  np.where(a < b, a, b), np.log1p(a), np.full(W, 2.5)]
    for got, want in zip(out, expect):
        np.testing.assert_array_equal(got, want)  # IEEE operations: exact


@nb.njit(cache=False)
def _accel_lanes(kinds, pars, aux, pos):
    out = np.empty_like(pos)
    for s in range(0, pos.shape[0], W):
        X = (pos[s, 0], pos[s + 1, 0], pos[s + 2, 0], pos[s + 3, 0], pos[s + 4, 0], pos[s + 5, 0],
             pos[s + 6, 0], pos[s + 7, 0])
        Y = (pos[s, 1], pos[s + 1, 1], pos[s + 2, 1], pos[s + 3, 1], pos[s + 4, 1], pos[s + 5, 1],
             pos[s + 6, 1], pos[s + 7, 1])
        Z = (pos[s, 2], pos[s + 1, 2], pos[s + 2, 2], pos[s + 3, 2], pos[s + 4, 2], pos[s + 5, 2],
             pos[s + 6, 2], pos[s + 7, 2])
        ax, ay, az = orbit_lanes.accel_lanes(kinds, pars, aux, X, Y, Z)
        for l in range(W):
            out[s + l, 0] = ax[l]
            out[s + l, 1] = ay[l]
            out[s + l, 2] = az[l]
    return out


GALAXIES = {
    "potential-flattened": lambda: Galaxy.default(q_y=1.1, q_z=0.8),
    "swerve-mw-2 (Plummer bulge)": lambda: Galaxy.from_name("swerve-mw-2", q_y=1.1, q_z=0.8),
    "density-flattened": lambda: Galaxy.default(q_y=0.9, q_z=1.3, halo_flattening="density"),
    "density, spherical": lambda: Galaxy.default(halo_flattening="density"),
    "point mass": lambda: Galaxy([PointMass(m_bh=4e6)]),
}


@pytest.mark.parametrize("name", sorted(GALAXIES))
def test_lane_force_matches_scalar_kernels(name):
    g = GALAXIES[name]()
    rng = np.random.default_rng(3)
    d = rng.normal(size=(200, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    # 1e-5 to 1e3 kpc: through the NFW series branch (r < 1e-3 r_s) and the analytic one
    pos = d * 10 ** rng.uniform(-5, 3, 200)[:, None]
    pos[:8] = [[0.0, 0.0, 0.0], [1e-3, 0, 0], [0, 1e-3, 0], [0, 0, 1e-3], [30.0, 0, 0],
               [0, 0, 30.0], [0, 20.0, 0], [5.0, 5.0, 0.0]]
    got = _accel_lanes(*g.kernel_args, pos)
    want = g.acceleration(pos)
    np.testing.assert_array_equal(got[0], 0.0)  # the origin: zero, as the scalar kernel
    rel = np.linalg.norm(got[1:] - want[1:], axis=1) / np.linalg.norm(want[1:], axis=1)
    # the scalar node sums are reassociated (fastmath): rounding differences only
    assert np.max(rel) < 1e-13


@nb.njit(cache=False)
def _step_lanes(kinds, pars, aux, y, a, h, rtol, atol):
    out = orbit_lanes.dop853_step_lanes(
        kinds, pars, aux, (y[0, 0], y[1, 0], y[2, 0], y[3, 0], y[4, 0], y[5, 0], y[6, 0], y[7, 0]),
        (y[0, 1], y[1, 1], y[2, 1], y[3, 1], y[4, 1], y[5, 1], y[6, 1], y[7, 1]),
        (y[0, 2], y[1, 2], y[2, 2], y[3, 2], y[4, 2], y[5, 2], y[6, 2], y[7, 2]),
        (y[0, 3], y[1, 3], y[2, 3], y[3, 3], y[4, 3], y[5, 3], y[6, 3], y[7, 3]),
        (y[0, 4], y[1, 4], y[2, 4], y[3, 4], y[4, 4], y[5, 4], y[6, 4], y[7, 4]),
        (y[0, 5], y[1, 5], y[2, 5], y[3, 5], y[4, 5], y[5, 5], y[6, 5], y[7, 5]),
        (a[0, 0], a[1, 0], a[2, 0], a[3, 0], a[4, 0], a[5, 0], a[6, 0], a[7, 0]),
        (a[0, 1], a[1, 1], a[2, 1], a[3, 1], a[4, 1], a[5, 1], a[6, 1], a[7, 1]),
        (a[0, 2], a[1, 2], a[2, 2], a[3, 2], a[4, 2], a[5, 2], a[6, 2], a[7, 2]),
        (h[0], h[1], h[2], h[3], h[4], h[5], h[6], h[7]), rtol, atol)
    res = np.empty((W, 10))
    for q in range(10):
        for l in range(W):
            res[l, q] = out[q][l]
    return res


@pytest.mark.parametrize("flattening", ["potential", "density"])
def test_lane_step_matches_scipy_dop853_step(flattening):
    # each lane's step vs scipy's own DOP853 rk_step (Hairer's coefficients), eight different
    # states and step sizes at once
    from scipy.integrate._ivp import dop853_coefficients as c
    from scipy.integrate._ivp.rk import rk_step

    g = Galaxy.default(q_y=1.1, q_z=0.8, halo_flattening=flattening)

    def f(t, y):
        return np.concatenate([y[3:], g.acceleration(y[None, :3])[0]])

    def ref(yl, hl):
        K = np.empty((c.N_STAGES + 1, 6))
        y_ref, f_ref = rk_step(f, 0.0, yl, f(0.0, yl), hl, c.A[: c.N_STAGES, : c.N_STAGES],
                               c.B, c.C[: c.N_STAGES], K)
        err5, err3 = K.T @ c.E5, K.T @ c.E3
        sx = 1e-17 + 1e-13 * max(np.linalg.norm(yl[:3]), np.linalg.norm(y_ref[:3]))
        sv = 1e-17 + 1e-13 * max(np.linalg.norm(yl[3:]), np.linalg.norm(y_ref[3:]))
        e5 = np.sum(err5[:3] ** 2) / sx**2 + np.sum(err5[3:] ** 2) / sv**2
        e3 = np.sum(err3[:3] ** 2) / sx**2 + np.sum(err3[3:] ** 2) / sv**2
        return y_ref, f_ref, abs(hl) * e5 / math.sqrt(2.0 * (e5 + 0.01 * e3))

    rng = np.random.default_rng(11)
    y = np.column_stack([rng.normal(size=(W, 3)) * 20.0, rng.normal(size=(W, 3)) * 400.0])
    y[0, :3] = [0.003, 0.0, 0.0]
    h = np.full(W, 3e-3)
    h[0] = 5e-7  # at 3 pc
    h[1] = -h[1]  # backward
    # step sizes where the embedded error is ~1e-7 |y| (err ~ 1e6 at rtol 1e-13): far above
    # round-off, so the error estimates compare to 1e-6 (err scales as h^8)
    for l in range(W):
        for _ in range(4):
            h[l] *= (1e6 / ref(y[l], h[l])[2]) ** 0.125
    a = g.acceleration(y[:, :3])
    out = _step_lanes(*g.kernel_args, y, a, h, 1e-13, 1e-17)
    for l in range(W):
        y_ref, f_ref, err = ref(y[l], h[l])
        assert 1e4 < err < 1e8
        # relative to the size of each vector (a near-zero component carries its rounding)
        for sl in (slice(0, 3), slice(3, 6)):
            assert np.max(np.abs(out[l, sl] - y_ref[sl])) <= 1e-13 * np.linalg.norm(y_ref[sl])
        assert np.max(np.abs(out[l, 6:9] - f_ref[3:])) <= 1e-12 * np.linalg.norm(f_ref[3:])
        assert out[l, 9] == pytest.approx(err, rel=1e-6)


def test_orbit_result_independent_of_its_lane_companions():
    # the same orbits alone, in a batch, and in a batch in another order: bit-identical results
    g = Galaxy.default(q_z=0.8, halo_flattening="density")
    rng = np.random.default_rng(5)
    n = 21  # not a multiple of the lane count
    d = rng.normal(size=(n, 3))
    d /= np.linalg.norm(d, axis=1)[:, None]
    pos0, vel0 = 0.003 * d, rng.uniform(800, 2500, n)[:, None] * d
    t_end = rng.uniform(0, 300, n)
    t_end[3] = 0.0
    t_end[4] = -50.0  # backward, from a non-radial state far out
    pos0[4], vel0[4] = [30.0, 5.0, -3.0], [50.0, 180.0, 40.0]
    kw = dict(t_out=np.linspace(0, 300, 7), r_stop=np.where(np.arange(n) % 3 == 0, 40.0, np.inf),
              check_density=False)
    batch = orbits.integrate(g, pos0, vel0, t_end, **kw)
    perm = rng.permutation(n)
    kw_p = dict(kw, r_stop=kw["r_stop"][perm])
    shuffled = orbits.integrate(g, pos0[perm], vel0[perm], t_end[perm], **kw_p)
    for i in (0, 3, 4, 7):
        alone = orbits.integrate(g, pos0[i], vel0[i], t_end[i], t_out=kw["t_out"],
                                 r_stop=kw["r_stop"][i], check_density=False)
        for field in ("pos", "vel", "t_final", "energy_error", "r_max", "r_min", "n_force"):
            np.testing.assert_array_equal(getattr(alone, field)[0], getattr(batch, field)[i])
        np.testing.assert_array_equal(alone.pos_out[0], batch.pos_out[i])
    inv = np.argsort(perm)
    for field in ("pos", "vel", "t_final", "status", "n_steps", "r_min"):
        np.testing.assert_array_equal(getattr(shuffled, field)[inv], getattr(batch, field))
    assert batch.status[3] == orbits.STATUS_OK and batch.t_final[3] == 0.0
    stop = batch.stopped
    assert stop.any() and np.all(np.isfinite(kw["r_stop"][stop]))
    np.testing.assert_allclose(np.linalg.norm(batch.pos[stop], axis=1), 40.0, rtol=1e-12)
    assert np.all(batch.r_max[np.isfinite(kw["r_stop"]) & ~stop] < 40.0)


def test_generated_lane_kernels_are_up_to_date():
    # src/swerve/orbit_lanes.py is generated by dev/generate_lanes.py: they must agree
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "dev" / "generate_lanes.py"
    spec = importlib.util.spec_from_file_location("generate_lanes", path)
    gen = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(gen)
    assert Path(orbit_lanes.__file__).read_text() == gen.render()
    # and so is the scalar dispatch over the table of component kinds
    from swerve.galaxy import dispatch

    assert Path(dispatch.__file__).read_text() == gen.render_dispatch()


def _generator():
    import importlib.util
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "dev" / "generate_lanes.py"
    spec = importlib.util.spec_from_file_location("generate_lanes", path)
    gen = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(gen)
    return gen


class _ScalarLanes:
    """The lane operations on single floats (IEEE: each the same rounding as the scalar code)."""

    add = staticmethod(lambda a, b: a + b)
    sub = staticmethod(lambda a, b: a - b)
    mul = staticmethod(lambda a, b: a * b)
    div = staticmethod(lambda a, b: a / b)
    sqrt = staticmethod(math.sqrt)
    log1p = staticmethod(math.log1p)
    maximum = staticmethod(max)
    fabs = staticmethod(abs)
    splat = staticmethod(float)
    where_less = staticmethod(lambda u, c, a, b: a if u < c else b)


@pytest.mark.parametrize("code", [0, 1, 2])
def test_translated_declarations_are_the_scalar_formulas(code):
    # the generator's translation of a kind's scalar force declaration, run on single floats:
    # the same values as the declaration itself (bit for bit away from the origin; 0 at it,
    # where the guard became a floor)
    from swerve.galaxy import kernels

    gen = _generator()
    k = kernels.COMPONENT_KINDS[code]
    assert k.lanes is None
    lines = gen.Lanes({"X", "Y", "Z", "ax", "ay", "az"}).stmts(gen.translate_accel(k.accel), "")
    body = "\n".join(lines)
    p = np.array([4.0e5, 0.7, 0.26])
    rng = np.random.default_rng(8)
    pts = rng.normal(size=(50, 3)) * 10 ** rng.uniform(-4, 2, (50, 1))
    for x, y, z in [(0.0, 0.0, 0.0), *pts]:
        env = {"S": _ScalarLanes, "math": math, "p": p, "X": x, "Y": y, "Z": z,
               "ax": 0.0, "ay": 0.0, "az": 0.0, "_TINY": 1e-100, "_TINY2": 1e-200}
        exec(body, env)
        want = k.accel.py_func(p, None, x, y, z)
        assert (env["ax"], env["ay"], env["az"]) == want


def test_translation_refuses_what_it_cannot_lower():
    gen = _generator()

    def calls_a_helper(p, aux, x, y, z):
        g = helper(x)  # noqa: F821
        return g * x, g * y, g * z

    def branches(p, aux, x, y, z):
        if x < 1.0:
            return 1.0, 0.0, 0.0
        return 0.0, 0.0, 0.0

    with pytest.raises(ValueError, match="cannot translate the call helper"):
        gen.translate_accel(calls_a_helper)
    with pytest.raises(ValueError, match="cannot translate"):
        gen.translate_accel(branches)


def test_group_size_is_whole_lanes_and_bounded():
    for n in (1, 7, 8, 20, 100, 513, 2000, 10**6):
        g = orbits.group_size(n)
        assert g % W == 0 and W <= g <= orbits._GROUP
    assert orbits.group_size(10**6) == orbits._GROUP
