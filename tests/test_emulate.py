"""The GP emulator and its safe file format.

Outside references: analytic test functions (exact values at held-out points) and
scikit-learn's own ``GaussianProcessRegressor.predict`` (the fast path must reproduce it).
"""

import hashlib
import json
import os
import zipfile

import numpy as np
import pytest
from scipy.stats import qmc
from sklearn.base import clone

from swerve.emulate import (
    FORMAT_VERSION,
    EmulatorFileError,
    GPEmulator,
    content_hash,
    describe,
    load,
    register,
    save,
)
from swerve.emulate.kernels import cross_kernel

NAMES = ["q_y", "q_z", "a", "b"]
BOUNDS = np.array([[0.7, 1.3], [0.7, 1.3], [0.0, 1.5], [0.0, 1.5]])


def to_x(theta):
    """Map θ to [0, 1.5]^4, the domain of the analytic functions."""
    return (theta - BOUNDS[:, 0]) / (BOUNDS[:, 1] - BOUNDS[:, 0]) * 1.5


def analytic(theta):
    """y0 = sin(2 x0) + x1² - x2 x3, y1 = cos(x0 + x1) x2: smooth, known everywhere."""
    x = to_x(theta)
    return np.stack([np.sin(2 * x[:, 0]) + x[:, 1] ** 2 - x[:, 2] * x[:, 3],
                     np.cos(x[:, 0] + x[:, 1]) * x[:, 2]], axis=1)


def design(n, seed=1):
    u = qmc.Sobol(4, seed=seed).random(128)[:n]
    return qmc.scale(u, BOUNDS[:, 0], BOUNDS[:, 1])


def held_out(rng, q=300):
    return rng.uniform(BOUNDS[:, 0], BOUNDS[:, 1], size=(q, 4))


@pytest.fixture(scope="module")
def training():
    theta = design(64)
    return theta, analytic(theta)


@pytest.fixture(scope="module")
def em_rbf(training):
    theta, y = training
    return GPEmulator(NAMES, BOUNDS, kernel="rbf", n_restarts=1, random_state=3,
                      units=["", "", "kpc", ""], output_names=["y0", "y1"]).fit(theta, y)


@pytest.fixture(scope="module")
def em_matern(training):
    theta, y = training
    return GPEmulator(NAMES, BOUNDS, kernel="matern52", n_restarts=1, random_state=3).fit(theta, y)


def pca_family(theta):
    """12 outputs spanned by three smooth functions plus a small fourth one (rank 4)."""
    x = to_x(theta)
    basis = np.stack([np.sin(x[:, 0]) + x[:, 1], x[:, 2] * x[:, 3], np.cos(x[:, 1] - x[:, 2]),
                      0.03 * np.sin(3 * x[:, 3])], axis=1)
    t = np.linspace(0.0, 1.0, 12)
    coef = np.stack([1 + t, np.sin(3 * t), t**2 - 0.5, np.cos(5 * t)])  # (4, 12)
    return basis @ coef


@pytest.fixture(scope="module")
def em_pca():
    theta = design(64, seed=2)
    return GPEmulator(NAMES, BOUNDS, kernel="rbf", n_restarts=0, n_pca=3,
                      random_state=5).fit(theta, pca_family(theta))


# ----------------------------------------------------------------------------- accuracy


def normalised_residuals(em, rng):
    th = held_out(rng)
    mean, std = em.predict(th, return_std=True)
    return (mean - analytic(th)) / std


def test_rbf_recovers_analytic_function_within_its_uncertainty(em_rbf, rng):
    r = normalised_residuals(em_rbf, rng)
    rms = np.sqrt(np.mean(r**2, axis=0))
    assert np.all((rms > 0.5) & (rms < 2.0)), rms
    assert np.mean(np.abs(r) > 3) <= 0.02


def test_matern_recovers_analytic_function_within_its_uncertainty(em_matern, rng):
    # Matérn 5/2 is less smooth than these analytic functions, so its error bars are
    # conservative (RMS below 1 is expected); it must never be overconfident.
    r = normalised_residuals(em_matern, rng)
    rms = np.sqrt(np.mean(r**2, axis=0))
    assert np.all((rms > 0.2) & (rms < 2.0)), rms
    assert np.mean(np.abs(r) > 3) <= 0.01
    th = held_out(rng)
    err = np.abs(em_matern.predict(th) - analytic(th))
    assert err.max() < 0.1  # absolute accuracy on outputs of range ~3


def test_noise_free_emulator_interpolates_training_points(em_rbf, em_matern, training):
    theta, y = training
    # without a WhiteKernel (noise-free simulations) the GP interpolates its training points
    exact = GPEmulator(NAMES, BOUNDS, kernel="matern52", n_restarts=0, white_noise=False,
                       random_state=2).fit(theta, y)
    mean, std = exact.predict(theta, return_std=True)
    np.testing.assert_allclose(mean, y, rtol=0, atol=1e-6)
    assert std.max() < 1e-4 * y.std(axis=0).min()
    assert np.all(exact.noise_level_ == 0)
    # with one, the fitted noise is tiny: nearly interpolates
    for em in (em_rbf, em_matern):
        mean, std = em.predict(theta, return_std=True)
        assert np.all(np.abs(mean - y).max(axis=0) < 1e-3 * y.std(axis=0))
        assert np.all(em.noise_level_ < 1e-6)


@pytest.mark.parametrize("which", ["em_rbf", "em_matern", "em_pca"])
def test_fast_predict_equals_sklearn(which, request, rng):
    em = request.getfixturevalue(which)
    th = held_out(rng, 200)
    x = (th - BOUNDS[:, 0]) / (BOUNDS[:, 1] - BOUNDS[:, 0])  # the emulator's own unit cube
    sk = [gp.predict(x, return_std=True) for gp in em.gps_]
    sk_mean = np.stack([m for m, _ in sk], axis=1)
    sk_var = np.stack([s**2 for _, s in sk], axis=1)
    mean, std = em.predict(th, return_std=True, include_noise=True)
    # The mean alone takes the fused compiled path (no stored cross-covariance, a polynomial
    # exp, the sum over training points in the compiler's order). A near-interpolating GP's mean
    # is a sum that cancels strongly (large alpha), so its round-off is bounded relative to
    # sum_j |k_j alpha_j|, not to the result: asserted at 1e-14 of that (measured 0.5-6e-16 on
    # these three emulators).
    mean_only = em.predict(th)
    xs = np.ascontiguousarray(x[None, :, :] / em.length_scale_[:, None, :])
    K = cross_kernel(xs, em._XsT, em.constant_, em._code)
    cond = np.abs(K * em.alpha_[:, None, :]).sum(axis=2).T  # (q, G)
    if em.components_ is not None:
        cond = cond @ np.abs(em.components_ * em.score_scale_[:, None])
    np.testing.assert_array_less(np.abs((mean_only - mean) / em.y_scale_), 1e-14 * cond + 1e-15)
    if em.components_ is None:
        np.testing.assert_allclose((mean - em.y_mean_) / em.y_scale_, sk_mean, rtol=0, atol=1e-10)
        np.testing.assert_allclose(std / em.y_scale_, np.sqrt(sk_var), rtol=0, atol=1e-10)
        # without the WhiteKernel noise: sklearn's variance minus the fitted noise level
        _, std0 = em.predict(th, return_std=True)
        np.testing.assert_allclose((std0 / em.y_scale_) ** 2, np.maximum(sk_var - em.noise_level_, 0),
                                   rtol=0, atol=1e-10)
    else:  # map sklearn's component predictions back through the PCA by hand
        W = em.components_ * em.score_scale_[:, None]
        np.testing.assert_allclose((mean - em.y_mean_) / em.y_scale_, sk_mean @ W, rtol=0, atol=1e-10)
        np.testing.assert_allclose((std / em.y_scale_) ** 2, sk_var @ W**2 + em.residual_var_,
                                   rtol=0, atol=1e-10)


def test_pca_path_accuracy_and_truncation_residual(em_pca, rng):
    th = held_out(rng, 200)
    truth = pca_family(th)
    mean, std = em_pca.predict(th, return_std=True)
    assert em_pca.n_components_ == 3 and em_pca.components_.shape == (3, 12)
    # rank 4 data with a small 4th direction: 3 components explain nearly everything
    assert 0.99 < em_pca.explained_variance_ratio_.sum() < 1.0
    resid_sd = np.sqrt(em_pca.residual_var_) * em_pca.y_scale_
    assert np.all(resid_sd > 0)
    assert np.all(std >= resid_sd - 1e-15)  # the discarded variance is part of every std
    r = (mean - truth) / std
    assert np.sqrt(np.mean(r**2)) < 2.0 and np.mean(np.abs(r) > 3) <= 0.02
    # the covariance between outputs has the stds on its diagonal, and is not diagonal
    mean_c, cov = em_pca.predict(th[:5], return_cov=True)
    np.testing.assert_allclose(mean_c, mean[:5], rtol=0, atol=1e-8)  # round-off only
    # the two paths compute a variance as prior minus explained variance, a cancelling difference:
    # compare on the variance's own scale (as above), not relatively (the CPU's BLAS kernels set
    # the last digits; a Zen 5 machine differed by 8e-8 of a small std)
    np.testing.assert_allclose(np.diagonal(cov, axis1=1, axis2=2) / em_pca.y_scale_**2,
                               (std[:5] / em_pca.y_scale_) ** 2, rtol=0, atol=1e-10)
    assert np.abs(cov[0, 0, 1]) > 1e-6 * cov[0, 0, 0]
    np.testing.assert_allclose(cov, np.swapaxes(cov, 1, 2), rtol=0, atol=1e-15)


def test_pca_fraction_and_single_theta():
    theta = design(32, seed=4)
    em = GPEmulator(NAMES, BOUNDS, kernel="rbf", n_restarts=0, n_pca=0.999, random_state=1)
    em.fit(theta, pca_family(theta))
    assert 3 <= em.n_components_ <= 4
    m1, s1 = em.predict(theta[3], return_std=True)
    m2, _ = em.predict(theta[3:4], return_std=True)
    assert m1.shape == (12,) and s1.shape == (12,)
    np.testing.assert_array_equal(m1, m2[0])


def test_many_theta_predicted_in_blocks_equal_one_by_one(em_rbf, rng):
    th = held_out(rng, 1500)  # more than one internal block
    mean, std = em_rbf.predict(th, return_std=True)
    # equal up to round-off: K @ alpha sums terms of size ~constant * |alpha| (~1e7 here),
    # so a different order of summation (dot vs gemv) moves the result at the ~1e-8 level
    for i in (0, 1023, 1024, 1499):
        m, s = em_rbf.predict(th[i], return_std=True)
        np.testing.assert_allclose(m, mean[i], rtol=0, atol=1e-6)
        # the variance is prior minus explained variance: its round-off is on the prior's scale
        np.testing.assert_allclose((s / em_rbf.y_scale_) ** 2, (std[i] / em_rbf.y_scale_) ** 2, rtol=0, atol=1e-10)


def test_known_simulation_noise_enters_as_alpha(training, rng):
    theta, y = training
    y_var = np.full_like(y, 1e-4)
    noisy = y + rng.normal(0.0, 1e-2, size=y.shape)
    em = GPEmulator(NAMES, BOUNDS, kernel="rbf", n_restarts=0, random_state=0).fit(theta, noisy, y_var=y_var)
    for c, gp in enumerate(em.gps_):
        np.testing.assert_allclose(gp.alpha, y_var[:, c] / em.y_scale_[c] ** 2 + 1e-10, rtol=1e-12)
    # smoothing, not interpolation: the noisy training values are not reproduced exactly
    assert np.abs(em.predict(theta) - noisy).max() > 1e-3
    th = held_out(rng)
    assert np.abs(em.predict(th) - analytic(th)).max() < 0.1


# ----------------------------------------------------------------------------- contract


def test_estimator_contract(em_rbf, training):
    bounds = [[0.7, 1.3], [0.7, 1.3], [0.0, 1.5], [0.0, 1.5]]
    em = GPEmulator(NAMES, bounds, n_restarts=0)
    params = em.get_params()
    assert params["bounds"] is bounds and params["kernel"] == "matern52"
    assert not hasattr(em, "alpha_")
    c = clone(em_rbf)
    assert not hasattr(c, "alpha_") and c.get_params()["kernel"] == "rbf"
    theta, y = training
    em.fit(theta[:20], y[:20])
    assert params["bounds"] is bounds and bounds[0] == [0.7, 1.3]  # arguments untouched
    assert em.alpha_.shape == (2, 20) and em.L_.shape == (2, 20, 20)
    assert em.length_scale_.shape == (2, 4) and np.all(em.length_scale_ > 0)


def test_fit_is_reproducible_from_its_seed(training):
    theta, y = training
    a = GPEmulator(NAMES, BOUNDS, n_restarts=2, random_state=11).fit(theta[:24], y[:24])
    b = GPEmulator(NAMES, BOUNDS, n_restarts=2, random_state=11).fit(theta[:24], y[:24])
    np.testing.assert_array_equal(a.length_scale_, b.length_scale_)
    np.testing.assert_array_equal(a.alpha_, b.alpha_)


def test_parallel_fit_equals_serial_fit():
    # the components fitted side by side in two processes: the same hyperparameters and predictions
    theta = design(40, seed=4)
    y = pca_family(theta)
    kw = dict(kernel="matern52", n_restarts=1, n_pca=4, random_state=9)
    a = GPEmulator(NAMES, BOUNDS, **kw).fit(theta, y)
    b = GPEmulator(NAMES, BOUNDS, **kw).fit(theta, y, n_jobs=2)
    np.testing.assert_allclose(b.length_scale_, a.length_scale_, rtol=1e-8)
    np.testing.assert_allclose(b.constant_, a.constant_, rtol=1e-8)
    th = design(16, seed=8)
    np.testing.assert_allclose(b.predict(th), a.predict(th), rtol=1e-9, atol=1e-12)


def test_theta_outside_bounds_is_refused_naming_the_parameter(em_rbf):
    th = np.array([[1.0, 1.42, 0.5, 0.5]])
    with pytest.raises(ValueError, match=r"^q_z = 1\.42 is outside the emulator's training bounds \[0\.7, 1\.3\]$"):
        em_rbf.predict(th)
    many = np.tile([1.0, 1.0, 0.5, 0.5], (5, 1))
    many[3, 0] = 0.6
    with pytest.raises(ValueError, match=r"q_y = 0\.6 is outside .*\[0\.7, 1\.3\] \(theta row 3\)"):
        em_rbf.predict(many, return_std=True)
    with pytest.raises(ValueError, match="expected shape"):
        em_rbf.predict(np.ones((3, 5)))
    with pytest.raises(ValueError, match="non-finite q_y"):
        em_rbf.predict([np.nan, 1.0, 0.5, 0.5])


@pytest.mark.parametrize(
    "kwargs, fit_args, match",
    [
        ({"kernel": "cubic"}, None, "kernel: expected one of"),
        ({"bounds": [[0, 1]] * 3}, None, r"bounds: expected shape \(4, 2\)"),
        ({"bounds": [[1, 0]] * 4}, None, "bounds of q_y: expected finite low < high"),
        ({"random_state": None}, None, "random_state"),
        ({"n_pca": 99}, None, "n_pca = 99"),
        ({}, "outside", r"q_y = 2 is outside .* \(theta row 0\)"),
        ({}, "rows", "theta has 10 rows but y has 9"),
        ({}, "negvar", "y_var: negative variance"),
        ({}, "y1d", r"y: expected shape \(n, m\)"),
    ],
)
def test_fit_refuses_bad_input(kwargs, fit_args, match, training):
    theta, y = training
    theta, y = theta[:10].copy(), y[:10].copy()
    args = {"parameter_names": NAMES, "bounds": BOUNDS, "n_restarts": 0}
    args.update(kwargs)
    em = GPEmulator(**args)
    y_var = None
    if fit_args == "outside":
        theta[0, 0] = 2.0
    elif fit_args == "rows":
        y = y[:9]
    elif fit_args == "negvar":
        y_var = np.full_like(y, 1e-4)
        y_var[2, 1] = -1.0
    elif fit_args == "y1d":
        y = y[:, 0]
    with pytest.raises(ValueError, match=match):
        em.fit(theta, y, y_var=y_var)


# ----------------------------------------------------------------------------- files


META = {
    "selection": {"r_min_kpc": 10.0, "outgoing": True},
    "summaries": ["median v_theta' in 4 cells"],
    "provenance": {"config_hash": "ab" * 32, "n_points": 64, "seed": 3, "date": "2026-12-01"},
}


@pytest.fixture
def saved(em_rbf, tmp_path):
    return save(em_rbf, tmp_path / "emu", metadata=META)


def test_save_load_round_trip_gives_identical_predictions(em_rbf, em_pca, saved, tmp_path, rng):
    th = held_out(rng, 64)
    em2 = load(saved)
    for kw in ({}, {"return_std": True}, {"return_std": True, "include_noise": True}):
        a, b = em_rbf.predict(th, **kw), em2.predict(th, **kw)
        for u, v in zip(np.atleast_1d(a) if not isinstance(a, tuple) else a,
                        np.atleast_1d(b) if not isinstance(b, tuple) else b):
            np.testing.assert_array_equal(u, v)
    assert em2.metadata == META and em2.output_names == ["y0", "y1"]
    assert em2.units == ["", "", "kpc", ""] and not hasattr(em2, "gps_")
    np.testing.assert_array_equal(em2.theta_train_, em_rbf.theta_train_)
    # PCA emulator too
    p = save(em_pca, tmp_path / "pca")
    np.testing.assert_array_equal(load(p).predict(th, return_cov=True)[1], em_pca.predict(th, return_cov=True)[1])
    # only the three files, no temp folders left behind
    assert sorted(os.listdir(saved)) == ["arrays.npz", "checksums.sha256", "emulator.json"]
    assert sorted(os.listdir(tmp_path)) == ["emu", "pca"]


def test_file_contents_are_plain(saved):
    doc = json.loads((saved / "emulator.json").read_text())
    assert doc["format"] == "swerve-emulator" and doc["format_version"] == FORMAT_VERSION
    assert [p["name"] for p in doc["parameters"]] == NAMES
    assert doc["parameters"][1]["low"] == 0.7 and doc["parameters"][1]["high"] == 1.3
    assert doc["kernel"]["family"] == "rbf" and len(doc["kernel"]["length_scale"]) == 2
    assert doc["metadata"]["provenance"]["config_hash"] == "ab" * 32
    assert all(spec["dtype"] == "<f8" for spec in doc["arrays"].values())
    with zipfile.ZipFile(saved / "arrays.npz") as z:
        assert sorted(z.namelist()) == sorted(f"{k}.npy" for k in doc["arrays"])
    # the checksum file is in `sha256sum -c` format
    for line in (saved / "checksums.sha256").read_text().splitlines():
        digest, name = line.split()
        assert hashlib.sha256((saved / name).read_bytes()).hexdigest() == digest


def test_save_refuses_to_overwrite_unless_asked(em_rbf, em_matern, saved, rng):
    with pytest.raises(FileExistsError, match="overwrite=True"):
        save(em_matern, saved)
    save(em_matern, saved, overwrite=True)
    th = held_out(rng, 8)
    np.testing.assert_array_equal(load(saved).predict(th), em_matern.predict(th))
    assert sorted(os.listdir(saved.parent)) == ["emu"]


def test_describe_lists_domain_outputs_and_provenance(saved, em_pca):
    text = describe(saved)
    assert "q_z" in text and "[0.7, 1.3]" in text and "outputs: 2: y0, y1" in text
    assert "config_hash: " + "ab" * 32 in text and "64 points" in text
    assert content_hash(saved) in text
    assert "PCA: 3 components" in describe(em_pca)


def rewrite_checksums(folder):
    lines = [f"{hashlib.sha256((folder / f).read_bytes()).hexdigest()}  {f}\n"
             for f in ("emulator.json", "arrays.npz")]
    (folder / "checksums.sha256").write_text("".join(lines))


def test_flipped_byte_is_refused(saved):
    path = saved / "arrays.npz"
    data = bytearray(path.read_bytes())
    data[len(data) // 2] ^= 0x01
    path.write_bytes(bytes(data))
    with pytest.raises(EmulatorFileError, match="arrays.npz: SHA-256 mismatch"):
        load(saved)
    # even with the checksum "repaired", the damaged zip member is refused
    rewrite_checksums(saved)
    with pytest.raises(EmulatorFileError, match="arrays.npz"):
        load(saved)


def test_truncated_and_missing_files_are_refused(saved, tmp_path):
    path = saved / "arrays.npz"
    path.write_bytes(path.read_bytes()[:-100])
    with pytest.raises(EmulatorFileError, match="SHA-256 mismatch"):
        load(saved)
    path.unlink()
    with pytest.raises(EmulatorFileError, match="missing file arrays.npz"):
        load(saved)
    (saved / "checksums.sha256").unlink()
    with pytest.raises(EmulatorFileError, match="missing checksums.sha256"):
        load(saved)
    with pytest.raises(EmulatorFileError, match="no such emulator folder"):
        load(tmp_path / "nothing")


def edit_json(folder, change):
    doc = json.loads((folder / "emulator.json").read_text())
    change(doc)
    (folder / "emulator.json").write_text(json.dumps(doc))
    rewrite_checksums(folder)


def test_json_naming_a_pickle_is_refused(saved):
    edit_json(saved, lambda d: d.update(arrays_file="arrays.pkl"))
    with pytest.raises(EmulatorFileError, match="never loads pickles"):
        load(saved)


def test_object_dtype_in_manifest_is_refused(saved):
    edit_json(saved, lambda d: d["arrays"]["alpha"].update(dtype="|O"))
    with pytest.raises(EmulatorFileError, match="no object or pickled arrays"):
        load(saved)


def test_object_array_in_npz_is_refused_without_unpickling(saved):
    arrays = dict(np.load(saved / "arrays.npz"))
    arrays["alpha"] = np.array([{"x": 1}, None], dtype=object)
    with open(saved / "arrays.npz", "wb") as fh:
        np.savez(fh, **arrays)
    rewrite_checksums(saved)
    with pytest.raises(EmulatorFileError, match="unreadable array file"):
        load(saved)


def test_newer_format_version_is_refused(saved):
    edit_json(saved, lambda d: d.update(format_version=FORMAT_VERSION + 1))
    with pytest.raises(EmulatorFileError, match="newer than this swerve"):
        load(saved)
    edit_json(saved, lambda d: d.update(format_version="1"))
    with pytest.raises(EmulatorFileError, match="positive int"):
        load(saved)


def test_wrong_shapes_are_refused(saved):
    arrays = dict(np.load(saved / "arrays.npz"))
    arrays["alpha"] = arrays["alpha"][:, :-1]
    with open(saved / "arrays.npz", "wb") as fh:
        np.savez(fh, **arrays)
    rewrite_checksums(saved)
    with pytest.raises(EmulatorFileError, match=r"array 'alpha' is <f8 \(2, 63\); the manifest says"):
        load(saved)
    edit_json(saved, lambda d: d["arrays"]["alpha"].update(shape=[2, 63]))
    with pytest.raises(EmulatorFileError, match=r"array 'alpha' has shape \(2, 63\); expected \(2, 64\)"):
        load(saved)


def test_malformed_json_is_refused(saved):
    edit_json(saved, lambda d: d.pop("kernel"))
    with pytest.raises(EmulatorFileError, match=r"malformed emulator.json \(KeyError"):
        load(saved)
    (saved / "emulator.json").write_text("{not json")
    rewrite_checksums(saved)
    with pytest.raises(EmulatorFileError, match="invalid JSON at line 1"):
        load(saved)


def test_metadata_must_be_json(em_rbf, tmp_path):
    with pytest.raises(ValueError, match="metadata: must be plain JSON"):
        save(em_rbf, tmp_path / "x", metadata={"when": object()})
    assert not (tmp_path / "x").exists()


# ------------------------------------------------------------------------- scaled outputs


def linear_response(theta):
    """Outputs that vanish at q_y = 1 as a linear response to s = 1/q_y² − 1 does (the azimuthal
    statistics of the summaries): y0 = s (1 + x1²), y1 = log|s| + 0.3 x2 (the log of a scatter
    ∝ |s|), y2 = sin(x1) + x3 (unscaled); exact everywhere."""
    x = to_x(theta)
    s = 1.0 / theta[:, 0] ** 2 - 1.0
    with np.errstate(divide="ignore"):
        return np.stack([s * (1 + x[:, 1] ** 2), np.log(np.abs(s)) + 0.3 * x[:, 2], np.sin(x[:, 1]) + x[:, 3]], 1)


SCALED = {"parameter": "q_y", "linear": [0], "log": [1]}


@pytest.fixture(scope="module")
def em_scaled():
    theta = design(64, seed=4)
    y = linear_response(theta)
    v = np.full_like(y, 1e-8)
    v[:, 0] *= (1.0 / theta[:, 0] ** 2 - 1.0) ** 2  # the noise of a linear response scales with it
    return GPEmulator(NAMES, BOUNDS, kernel="rbf", n_restarts=0, n_pca=3, random_state=5,
                      scaled_outputs=SCALED).fit(theta, y, y_var=v)


def test_scaled_outputs_vanish_exactly_at_one_and_follow_the_analytic_response(em_scaled, rng):
    """Analytic reference: the linear output is zero at q_y = 1 (to SCALE_FLOOR) and the log
    output at log(SCALE_FLOOR) + its smooth part, where an unscaled GP smooths over the zero;
    elsewhere both match the analytic response."""
    from swerve.emulate import SCALE_FLOOR

    th = held_out(rng, 200)
    th[:50, 0] = 1.0
    mean, std = em_scaled.predict(th, return_std=True)
    x = to_x(th)
    assert np.all(np.abs(mean[:50, 0]) <= 10 * SCALE_FLOOR) and np.all(std[:50, 0] <= 10 * SCALE_FLOOR)
    np.testing.assert_allclose(mean[:50, 1], np.log(SCALE_FLOOR) + 0.3 * x[:50, 2], atol=0.01)
    off = np.abs(th[:, 0] - 1.0) > 0.02
    truth = linear_response(th[off])
    np.testing.assert_allclose(mean[off], truth, atol=0.02)
    # the unscaled GP of the same data: a clearly non-zero value at q_y = 1
    theta = em_scaled.theta_train_
    plain = GPEmulator(NAMES, BOUNDS, kernel="rbf", n_restarts=0, random_state=5)
    plain.fit(theta, em_scaled.y_train_[:, [0, 2]])
    assert np.max(np.abs(plain.predict(th[:50])[:, 0])) > 100 * np.max(np.abs(mean[:50, 0]))


def test_scaled_outputs_std_cov_and_file_round_trip(em_scaled, tmp_path, rng):
    th = held_out(rng, 40)
    m1, sd = em_scaled.predict(th, return_std=True)
    m2, cov = em_scaled.predict(th, return_cov=True)
    np.testing.assert_array_equal(m1, m2)
    np.testing.assert_allclose(np.sqrt(np.diagonal(cov, axis1=1, axis2=2)), sd, rtol=1e-10)
    em2 = load(save(em_scaled, tmp_path / "scaled"))
    assert em2.scaled_outputs == SCALED
    text = describe(tmp_path / "scaled")
    assert "scaled outputs: 1 linear and 1 log outputs emulated divided by s = 1/q_y^2 - 1" in text
    for kw in ({}, {"return_std": True}, {"return_cov": True}):
        a, b = em_scaled.predict(th, **kw), em2.predict(th, **kw)
        for u, v in zip(a if isinstance(a, tuple) else (a,), b if isinstance(b, tuple) else (b,)):
            np.testing.assert_array_equal(u, v)


@pytest.mark.parametrize("so, match", [
    ({"parameter": "q_x", "linear": [0]}, "not one of"),
    ({"parameter": "q_y", "linear": [0], "log": [0]}, "distinct output indices"),
    ({"parameter": "q_y", "linear": [7]}, "distinct output indices"),
    ({"parameter": "q_y", "lin": [0]}, "expected a table"),
])
def test_bad_scaled_outputs_are_refused(so, match):
    theta = design(8)
    with pytest.raises(ValueError, match=match):
        GPEmulator(NAMES, BOUNDS, n_restarts=0, scaled_outputs=so).fit(theta, analytic(theta))


def test_package_keeps_the_old_import_names():
    """emulate.py became a package (kernels, gp, files): the names imported from
    ``swerve.emulate`` before the split are the same objects."""
    import swerve.emulate as E
    from swerve.emulate import files, gp, kernels

    assert E._cross_kernel is kernels.cross_kernel
    assert E.SCALE_FLOOR is gp.SCALE_FLOOR and E.JITTER is gp.JITTER
    assert E.load is files.load and E.EmulatorFileError is files.EmulatorFileError
    assert files._TYPES[GPEmulator.emulator_type] is GPEmulator


def test_file_format_refuses_unregistered_and_clashing_types(tmp_path):
    class Other:
        emulator_type = GPEmulator.emulator_type  # already taken

    with pytest.raises(ValueError, match="already taken by GPEmulator"):
        register(Other)
    assert register(GPEmulator) is GPEmulator  # registering again is harmless
    with pytest.raises(ValueError, match="registered type"):
        save(object(), tmp_path / "nothing")
    assert not (tmp_path / "nothing").exists()
