"""Experiment behind RESULTS.md ("Calibration"): does the emulator's error in the cell
*dispersions* explain the disk mass's too-narrow 95% intervals?

    python benchmarks/full_emulator_error.py CONFIG.toml OUT_DIR
    (RESULTS: python benchmarks/full_emulator_error.py training/validate-calibration-half.toml
    runs/calibration-fullerr)

The default likelihood marginalises the emulator's error in the 45 cell means only. This
experiment marginalises it in all 135 summaries (means, log standard deviations and Cholesky
off-diagonals of every cell) by the same catalog-level Gaussian integral: gradient in the cell
means from the kernel and in the other 90 summaries by forward differences; curvature: the
kernel's exact Fisher information of the means and the expected Gaussian Fisher information
of the covariance parameters, ½ tr(S⁻¹ ∂S S⁻¹ ∂S), at each star's most probable sample. On the
toy Gaussian emulator of tests/test_likelihood.py (error in the means only) it reproduces the
default likelihood exactly. It is ~40× slower than the default and not part of swerve: the
calibration run is swerve validate with the fits' likelihood replaced.
"""
import numpy as np

import swerve.likelihood as L
from swerve.summaries import stats_to_gaussian


class FullErrorLikelihood(L.Likelihood):
    """For emulators of the Gaussian-only cell model (no ``vr_edges``), such as the one of
    the third session's experiment; refuses others."""

    def __init__(self, emulator, stars, spec, **kw):
        if spec.n_vbins:
            raise SystemExit("full_emulator_error.py: written for emulators without a v_r histogram "
                             "(the experiment behind RESULTS 'Calibration', third session)")
        super().__init__(emulator, stars, spec, **kw)

    def _full_factor(self, theta):
        def factor(th):
            _, cov = self.emulator.predict(th, return_cov=True)
            E = np.asarray(cov, dtype=float)
            E = 0.5 * (E + np.swapaxes(E, -1, -2))
            n = E.shape[-1]
            E[:, np.arange(n), np.arange(n)] += 1e-12 * np.max(np.diagonal(E, axis1=-2, axis2=-1), axis=-1)[:, None] + 1e-300
            return np.linalg.cholesky(E)
        return self._cached(theta, "full_cov_factor", factor)

    def _per_star_psi(self, psi):
        """Per-star log-likelihoods (V, n_star) for summary vectors psi (V, 135)."""
        mu, sig = stats_to_gaussian(psi, self.spec.n_cells)
        for a in range(3):
            sig[..., a, a] += self.velocity_floor ** 2
        tri = np.ascontiguousarray(np.stack(
            [sig[..., 0, 0], sig[..., 1, 0], sig[..., 1, 1], sig[..., 2, 0], sig[..., 2, 1], sig[..., 2, 2]], -1))
        return L._run_kernels(self._packed, np.ascontiguousarray(mu), tri, False)[0]

    def __call__(self, theta):
        theta = np.asarray(theta, dtype=float)
        th2 = np.atleast_2d(theta)
        y = np.asarray(self.emulator.predict(th2), dtype=float)  # (W, m)
        W, m = y.shape
        nc = self.spec.n_cells
        # gradient of the catalog log-likelihood in all m summaries: forward differences
        idx = np.arange(m)
        cov_idx = np.array([9 * c + k for c in range(nc) for k in range(3, 9)])
        h = 1e-4 * np.maximum(1.0, np.abs(y[:, cov_idx]))
        nv = len(cov_idx)
        pert = np.repeat(y[:, None, :], nv + 1, axis=1)
        pert[:, np.arange(nv) + 1, cov_idx] += h
        ll = self._per_star_psi(pert.reshape(W * (nv + 1), m)).reshape(W, nv + 1, -1)
        base = ll[:, 0, :]
        g = np.zeros((W, m))
        g[:, cov_idx] = (ll[:, 1:, :].sum(axis=2) - base.sum(axis=1)[:, None]) / h
        # curvature: exact Fisher of the cell means (kernel), expected Fisher of the covariance
        # parameters (each star's most probable sample), no cross terms (Gaussian)
        mu, sig = self.cell_gaussians(th2, fold=False)
        tri = np.ascontiguousarray(np.stack(
            [sig[..., 0, 0], sig[..., 1, 0], sig[..., 1, 1], sig[..., 2, 0], sig[..., 2, 1], sig[..., 2, 2]], -1))
        _, grad, fisher = L._run_kernels(self._packed, mu, tri, True)
        mean_idx = np.array([9 * c + k for c in range(nc) for k in range(3)])
        g[:, mean_idx] = grad.reshape(W, -1)
        v = y.reshape(W, nc, 9)
        Lc = np.zeros((W, nc, 3, 3))
        Lc[..., 0, 0], Lc[..., 1, 1], Lc[..., 2, 2] = np.exp(v[..., 3]), np.exp(v[..., 4]), np.exp(v[..., 5])
        Lc[..., 1, 0], Lc[..., 2, 0], Lc[..., 2, 1] = v[..., 6], v[..., 7], v[..., 8]
        dL = np.zeros((W, nc, 6, 3, 3))
        for k, (r, c) in enumerate(((0, 0), (1, 1), (2, 2), (1, 0), (2, 0), (2, 1))):
            dL[:, :, k, r, c] = Lc[:, :, r, c] if r == c else 1.0
        dS = dL @ np.swapaxes(Lc, -1, -2)[:, :, None] + Lc[:, :, None] @ np.swapaxes(dL, -1, -2)  # (W, nc, 6, 3, 3)
        st = self.stars
        kmax = np.argmax(np.where(st.cell >= 0, st.log_w, -np.inf), axis=1)
        i = np.arange(st.n)
        ci, Ci = st.cell[i, kmax], st.cov[i, kmax]
        S = sig[:, ci] + Ci[None]  # (W, n, 3, 3)
        Si = np.linalg.inv(S)
        A = Si[:, :, None] @ dS[:, ci]  # (W, n, 6, 3, 3)
        I = 0.5 * np.einsum("wnkab,wnlba->wnkl", A, A)
        Icov = np.zeros((W, nc, 6, 6))
        np.add.at(Icov, (slice(None), ci), I)
        P = np.zeros((W, nc, 9, 9))
        for k, (a, b) in enumerate(((0, 0), (1, 0), (1, 1), (2, 0), (2, 1), (2, 2))):
            P[:, :, a, b] = P[:, :, b, a] = fisher[:, :, k]
        P[:, :, 3:, 3:] = Icov
        Pf = np.zeros((W, m, m))
        for c in range(nc):
            Pf[:, 9 * c:9 * c + 9, 9 * c:9 * c + 9] = P[:, c]
        Lf = np.broadcast_to(self._full_factor(th2), (W, m, m))
        C = np.swapaxes(Lf, -1, -2) @ Pf @ Lf
        C[:, idx, idx] += 1.0
        cvec = np.einsum("wji,wj->wi", Lf, g)
        Cc = np.linalg.cholesky(C)
        z = np.linalg.solve(Cc, cvec[..., None])[..., 0]
        corr = 0.5 * np.sum(z * z, axis=-1) - np.sum(np.log(np.diagonal(Cc, axis1=-2, axis2=-1)), axis=-1)
        tot = base.sum(axis=1) + corr
        return tot if theta.ndim == 2 else float(tot[0])


def worker(emulator_dir, table, fit_cfg, seed, priors, solar):
    import numba

    numba.set_num_threads(1)
    import swerve.likelihood
    swerve.likelihood.Likelihood = FullErrorLikelihood
    from swerve import validation
    return validation._fit_task(emulator_dir, table, fit_cfg, seed, priors, solar, True)


def fit_many(emulator_dir, tasks, fit_cfg, n_jobs=1, solar="v4.0"):
    from joblib import Parallel, delayed
    return Parallel(n_jobs=n_jobs, backend="loky")(
        delayed(worker)(emulator_dir, t, fit_cfg, s, p, solar) for t, s, p in tasks)


if __name__ == "__main__":
    import sys

    from swerve import validation

    validation.fit_many = fit_many
    cfg = validation.load_validate_config(sys.argv[1])
    doc = validation.run_validation("emulators/default", "runs/default2-held-out", sys.argv[2], cfg, log=print)
    cal = doc["calibration"]
    print("coverage 68/95:", {n: (round(p["coverage68"]["observed"], 3), round(p["coverage95"]["observed"], 3))
                              for n, p in cal["parameters"].items()})
