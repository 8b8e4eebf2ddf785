"""The Gaussian-process emulator: :class:`GPEmulator`.

A Gaussian-process regression (scikit-learn) of the summary vector as a function of the Galaxy
parameters θ, optionally compressed by PCA, that reports its own uncertainty.

Fitting uses scikit-learn; prediction does not: after :meth:`GPEmulator.fit` the kernel
hyperparameters, ``alpha = K⁻¹ y`` and the Cholesky factor of every component GP are kept as
plain arrays, and :meth:`GPEmulator.predict` evaluates the same formulas as scikit-learn's
``GaussianProcessRegressor.predict`` (same operations in the same order, so the results agree
to round-off) with the compiled cross-kernel of :mod:`swerve.emulate.kernels`, numpy's
vectorised ``exp`` and one BLAS triangular solve per component, vectorised over many θ; the
mean alone (the sampler's path) with the fused kernel, which never stores the
cross-covariance.

The emulator's state in and out of a file (:meth:`GPEmulator._state`,
:meth:`GPEmulator._from_state`) is the header and arrays that :mod:`swerve.emulate.files`
writes and verifies; this class registers itself there under its ``emulator_type``.
"""

from __future__ import annotations

import math
import warnings
from collections.abc import Mapping

import numpy as np
from joblib import Parallel, delayed
from scipy.linalg import cholesky
from scipy.linalg.blas import dtrsm as _dtrsm
from sklearn.base import BaseEstimator, RegressorMixin
from sklearn.exceptions import ConvergenceWarning
from sklearn.gaussian_process import GaussianProcessRegressor
from sklearn.gaussian_process.kernels import ConstantKernel, WhiteKernel
from sklearn.utils.validation import check_is_fitted

from .files import ARRAYS_FILE, JSON_FILE, EmulatorFileError, check_json, register
from .kernels import KERNELS, cross_kernel, cross_kernel_workspace, mean_fused

__all__ = ["JITTER", "SCALE_FLOOR", "GPEmulator"]


#: Jitter added to the diagonal of every training covariance (scikit-learn's default alpha).
JITTER = 1e-10
#: θ rows predicted per block (bounds the (components, block, n_train) cross-kernel).
_BLOCK = 1024
#: Smallest ``|1/p² − 1|`` of a scaled output's factor (``GPEmulator``'s ``scaled_outputs``): at
#: p = 1 a ``log`` output is predicted as log(1e-6) + its ratio, the floor the summaries put on
#: a vanishing Cholesky diagonal (:mod:`swerve.summaries`).
SCALE_FLOOR = 1e-6


def _fit_component(settings, X, t, alpha, seed):
    """Fit one component's Gaussian process (a picklable task for :meth:`GPEmulator.fit`).
    Returns the fitted regressor and the warnings raised, as (category, message) pairs."""
    kernel, d, cb, ls_bounds, nl_bounds, white_noise, n_restarts = settings
    kern = ConstantKernel(1.0, cb) * KERNELS[kernel][1](np.full(d, 0.5), ls_bounds)
    if white_noise:
        kern = kern + WhiteKernel(float(np.clip(1e-4, *nl_bounds)), nl_bounds)
    gp = GaussianProcessRegressor(kernel=kern, alpha=alpha, n_restarts_optimizer=n_restarts,
                                  normalize_y=False, random_state=seed)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always", ConvergenceWarning)
        gp.fit(X, t)
    return gp, [(w.category, str(w.message)) for w in caught]


class GPEmulator(RegressorMixin, BaseEstimator):
    """Gaussian-process emulator of a vector of summaries as a function of parameters θ.

    Follows the scikit-learn estimator contract: ``__init__`` stores its arguments, :meth:`fit`
    validates, learns and sets trailing-underscore attributes and returns ``self``.

    Every output component (each output, or each PCA component when ``n_pca`` is set) has its
    own GP with the explicit kernel ``C · k(θ, θ'; l) + W``: ``C`` a ConstantKernel, ``k`` an
    anisotropic Matérn (ν = 5/2) or RBF kernel with one length scale per parameter, on
    parameters mapped to the unit cube by the declared bounds, and ``W`` a WhiteKernel (fitted
    noise, optional). Known simulation noise ``y_var`` enters as the per-point ``alpha``.
    Hyperparameters maximise the log marginal likelihood (L-BFGS-B, ``n_restarts`` extra
    starts drawn from ``random_state``).

    Parameters
    ----------
    parameter_names : sequence of str, length d
        Names of the inputs, e.g. ``("q_y", "q_z", "log10_m_halo")``.
    bounds : array-like of shape (d, 2)
        Training domain ``[low, high]`` of each parameter, in its unit. Training points must
        lie inside; :meth:`predict` refuses points outside.
    kernel : {"matern52", "rbf"}
    n_restarts : int
        Extra optimizer starts per component GP (``n_restarts_optimizer``).
    n_pca : int, float or None
        None: one GP per output. An int k: PCA of the standardised outputs, keep k components.
        A float in (0, 1): keep the fewest components that explain that fraction of variance.
    normalize : bool
        Standardise every output (mean and standard deviation) before PCA and GP; if False
        outputs are only centred.
    random_state : int or numpy.random.Generator
        Seed of the optimizer restarts (never global state).
    units : sequence of str, optional
        Unit of each parameter (astropy unit string, ``""`` for none); written to the file.
    output_names : sequence of str, optional
        Name of each output (length m), written to the file.
    white_noise : bool
        Include a fitted WhiteKernel (noise or small misfit of the simulations).
    length_scale_bounds : (float, float)
        Bounds of each length scale, in units of the parameter range (unit cube).
    noise_level_bounds : (float, float)
        Bounds of the WhiteKernel's noise level, in units of the component's variance.
    constant_bounds : (float, float)
        Bounds of the ConstantKernel (signal variance, in units of the component's variance;
        smooth outputs drive it up together with the length scales).
    metadata : dict, optional
        Free-form JSON-able description (selection and summary definitions, fixed Galaxy and
        solar parameters, training provenance); written to the file and kept on load.
    scaled_outputs : dict, optional
        Outputs known to vanish where a parameter ``p`` equals 1, emulated divided by the factor
        ``s(p) = 1/p² − 1``: ``{"parameter": name, "linear": [indices], "log": [indices]}``.
        Each ``linear`` output is fitted as ``y / s`` and predicted as ``s ·`` (the GP's value),
        its standard deviation times ``|s|``; each ``log`` output (the log of a non-negative
        quantity proportional to ``|s|``) is fitted as ``y − log|s|`` and predicted as
        ``log|s| +`` (the GP's value). ``|s|`` is kept at least ``SCALE_FLOOR``. For the
        summaries, the azimuthal row of every cell's statistics (:mod:`swerve.summaries`):
        a radial orbit's v_φ is a linear response to the triaxial torque ``∝ (1/q_y² − 1)``, so
        it is zero at q_y = 1 exactly, while a GP of the raw statistics smooths that zero (the
        32-cell emulator fitted without the scaling predicted a v_φ scatter of 0.01-0.43 km/s
        at q_y = 1, where the simulations give the summaries' floor of 1e-6 km/s;
        benchmarks/RESULTS.md). The ratios are smooth through q_y = 1.

    Attributes
    ----------
    n_features_in_ : int
        d.
    n_outputs_ : int
        m.
    n_components_ : int
        Number of component GPs (m, or the number of PCA components kept).
    theta_train_ : ndarray (n, d)
    y_train_ : ndarray (n, m)
    X_train_ : ndarray (n, d)
        Training inputs mapped to the unit cube.
    y_mean_, y_scale_ : ndarray (m,)
        Standardisation of the outputs.
    components_ : ndarray (k, m) or None
        PCA components (rows, unit norm) in standardised-output space.
    score_scale_ : ndarray (n_components_,)
        Standard deviation of each PCA score (each GP is fitted to unit-variance scores).
    explained_variance_ratio_ : ndarray (k,) or None
    residual_var_ : ndarray (m,)
        Variance of the discarded PCA components, per standardised output (zero without PCA);
        added to every predicted variance.
    constant_, noise_level_ : ndarray (n_components_,)
    length_scale_ : ndarray (n_components_, d)
        Fitted hyperparameters (unit-cube length scales).
    alpha_ : ndarray (n_components_, n)
        ``(K + diag(alpha))⁻¹ t`` of every component GP.
    L_ : ndarray (n_components_, n, n)
        Lower Cholesky factors of ``K + diag(alpha)``.
    log_marginal_likelihood_ : ndarray (n_components_,)
    fit_warnings_ : list of str
        Optimizer convergence warnings (e.g. a noise level at its lower bound, normal for
        noise-free simulations), recorded instead of raised.
    gps_ : list of sklearn GaussianProcessRegressor
        The fitted scikit-learn models (only after :meth:`fit`, not after :func:`load`).
    """

    emulator_type = "gp"

    def __init__(
        self,
        parameter_names,
        bounds,
        kernel="matern52",
        n_restarts=3,
        n_pca=None,
        normalize=True,
        random_state=0,
        units=None,
        output_names=None,
        white_noise=True,
        length_scale_bounds=(1e-2, 1e2),
        noise_level_bounds=(1e-10, 1.0),
        constant_bounds=(1e-4, 1e4),
        metadata=None,
        scaled_outputs=None,
    ):
        self.parameter_names = parameter_names
        self.bounds = bounds
        self.kernel = kernel
        self.n_restarts = n_restarts
        self.n_pca = n_pca
        self.normalize = normalize
        self.random_state = random_state
        self.units = units
        self.output_names = output_names
        self.white_noise = white_noise
        self.length_scale_bounds = length_scale_bounds
        self.noise_level_bounds = noise_level_bounds
        self.constant_bounds = constant_bounds
        self.metadata = metadata
        self.scaled_outputs = scaled_outputs

    # ----------------------------------------------------------------------------- validation

    def _domain(self):
        names = list(self.parameter_names) if not isinstance(self.parameter_names, str) else None
        if not names or not all(isinstance(n, str) and n for n in names):
            raise ValueError("parameter_names: expected a non-empty sequence of non-empty strings")
        if len(set(names)) != len(names):
            raise ValueError(f"parameter_names: duplicate names in {names}")
        b = np.asarray(self.bounds, dtype=float)
        if b.shape != (len(names), 2):
            raise ValueError(
                f"bounds: expected shape ({len(names)}, 2) (one [low, high] per parameter), got {b.shape}"
            )
        for name, (lo, hi) in zip(names, b):
            if not (np.isfinite(lo) and np.isfinite(hi) and lo < hi):
                raise ValueError(f"bounds of {name}: expected finite low < high, got [{lo:g}, {hi:g}]")
        return names, b[:, 0].copy(), b[:, 1].copy()

    def _check_inside(self, theta, names, lo, hi, what):
        bad = (theta < lo) | (theta > hi)
        if bad.any():
            row, col = np.argwhere(bad)[0]
            where = f" ({what} row {row})" if theta.shape[0] > 1 else ""
            raise ValueError(
                f"{names[col]} = {theta[row, col]:.6g} is outside the emulator's training bounds "
                f"[{lo[col]:.6g}, {hi[col]:.6g}]{where}"
            )

    @staticmethod
    def _as_2d(a, name, ncol, colname):
        a = np.asarray(a, dtype=float)
        if a.ndim == 1 and ncol is not None and a.shape[0] == ncol:
            a = a[None, :]
        if a.ndim != 2 or (ncol is not None and a.shape[1] != ncol):
            raise ValueError(f"{name}: expected shape (n, {ncol if ncol else 'm'}) ({colname}), got {a.shape}")
        if not np.all(np.isfinite(a)):
            r, c = np.argwhere(~np.isfinite(a))[0]
            raise ValueError(f"{name}: non-finite value {a[r, c]} at row {r}, column {c}")
        return a

    def _scaling(self, names, m):
        """``(parameter column, linear indices, log indices)`` of ``scaled_outputs``, checked, or None."""
        so = self.scaled_outputs
        if so is None:
            return None
        if not isinstance(so, Mapping) or set(so) - {"parameter", "linear", "log"} or "parameter" not in so:
            raise ValueError("scaled_outputs: expected a table with 'parameter', 'linear' and 'log', "
                             f"got {so!r}")
        if so["parameter"] not in names:
            raise ValueError(f"scaled_outputs: parameter {so['parameter']!r} is not one of {names}")
        lin = np.asarray(so.get("linear", []), dtype=int).reshape(-1)
        log = np.asarray(so.get("log", []), dtype=int).reshape(-1)
        both = np.concatenate([lin, log])
        if both.size and (both.min() < 0 or both.max() >= m or len(set(both.tolist())) != both.size):
            raise ValueError(f"scaled_outputs: expected distinct output indices in 0..{m - 1}, got {so!r}")
        return names.index(so["parameter"]), lin, log

    @staticmethod
    def _factor(p):
        """``s(p) = 1/p² − 1`` with ``|s| >= SCALE_FLOOR`` (sign kept, + at p = 1)."""
        s = 1.0 / np.asarray(p, dtype=float) ** 2 - 1.0
        return np.where(s < 0, np.minimum(s, -SCALE_FLOOR), np.maximum(s, SCALE_FLOOR))

    def _to_fit_space(self, scaling, theta, y, y_var):
        """Training outputs (and their variances) divided by the factor (see ``scaled_outputs``)."""
        col, lin, log = scaling
        s = self._factor(theta[:, col])[:, None]
        y = y.copy()
        y[:, lin] /= s
        y[:, log] -= np.log(np.abs(s))
        if y_var is not None:
            y_var = y_var.copy()
            y_var[:, lin] /= s**2
        return y, y_var

    def _from_fit_space(self, th, res, want_cov):
        """Predictions (mean, and std or cov) of the GP -> outputs (see ``scaled_outputs``)."""
        col, lin, log = self._scale
        s = self._factor(th[:, col])[:, None]
        mean = res[0]
        mean[:, lin] *= s
        mean[:, log] += np.log(np.abs(s))
        if len(res) == 1:
            return res
        if not want_cov:
            res[1][:, lin] *= np.abs(s)
            return res
        D = np.ones(mean.shape)
        D[:, lin] = s
        return mean, res[1] * D[:, :, None] * D[:, None, :]

    # ------------------------------------------------------------------------------------ fit

    def fit(self, theta, y, y_var=None, n_jobs=1):
        """Fit the emulator.

        Parameters
        ----------
        theta : array-like of shape (n, d)
            Training parameters, inside ``bounds``, in the units of ``bounds``.
        y : array-like of shape (n, m)
            Summaries at the training points.
        y_var : array-like of shape (n, m), optional
            Simulation-noise variance of ``y`` (independent between outputs and points).
        n_jobs : int
            Processes that fit the independent Gaussian processes (one per principal component)
            side by side (joblib, loky; -1: all cores).  Each component has its own seed; the
            workers' single-threaded linear algebra rounds differently from a multi-threaded
            one, which the hyperparameter optimiser carries into its answer: on the default
            training set, length scales 2.5e-5 relative apart and predictions 2.5e-5 of the
            emulator's own standard deviation at most (benchmarks/RESULTS.md).

        Returns
        -------
        self
        """
        names, lo, hi = self._domain()
        d = len(names)
        if self.kernel not in KERNELS:
            raise ValueError(f"kernel: expected one of {sorted(KERNELS)}, got {self.kernel!r}")
        if not isinstance(self.n_restarts, (int, np.integer)) or self.n_restarts < 0:
            raise ValueError(f"n_restarts: expected an int >= 0, got {self.n_restarts!r}")
        theta = self._as_2d(theta, "theta", d, "one column per parameter")
        y = np.asarray(y, dtype=float)
        if y.ndim != 2:
            raise ValueError(f"y: expected shape (n, m), got {y.shape}; use y[:, None] for one output")
        y = self._as_2d(y, "y", None, "one column per output")
        n, m = y.shape
        if theta.shape[0] != n:
            raise ValueError(f"theta has {theta.shape[0]} rows but y has {n}; expected one row per training point")
        if n < 3:
            raise ValueError(f"theta: expected at least 3 training points, got {n}")
        self._check_inside(theta, names, lo, hi, "theta")
        if y_var is not None:
            y_var = self._as_2d(y_var, "y_var", None, "variance of y")
            if y_var.shape != y.shape:
                raise ValueError(f"y_var: expected the shape of y {y.shape}, got {y_var.shape}")
            if np.any(y_var < 0):
                r, c = np.argwhere(y_var < 0)[0]
                raise ValueError(f"y_var: negative variance {y_var[r, c]:g} at row {r}, column {c}")
        if self.units is not None and len(list(self.units)) != d:
            raise ValueError(f"units: expected {d} unit strings (one per parameter), got {len(list(self.units))}")
        if self.output_names is not None and len(list(self.output_names)) != m:
            raise ValueError(f"output_names: expected {m} names (one per output), got {len(list(self.output_names))}")
        if self.metadata is not None:
            check_json("metadata", self.metadata)
        ls_bounds = _check_pair("length_scale_bounds", self.length_scale_bounds)
        nl_bounds = _check_pair("noise_level_bounds", self.noise_level_bounds)
        cb = _check_pair("constant_bounds", self.constant_bounds)
        scaling = self._scaling(names, m)
        y_raw, y_var_raw = y, y_var
        if scaling is not None:
            y, y_var = self._to_fit_space(scaling, theta, y, y_var)

        X = (theta - lo) / (hi - lo)
        y_mean = y.mean(axis=0)
        y_scale = y.std(axis=0) if self.normalize else np.ones(m)
        y_scale = np.where(y_scale > 0, y_scale, 1.0)
        z = (y - y_mean) / y_scale
        z_var = None if y_var is None else y_var / y_scale**2

        k = self._n_keep(n, m, z)
        if k is None:
            components = evr = None
            t, t_var = z, z_var
            score_scale = np.ones(m)
            residual = np.zeros(m)
        else:
            _, s, vt = np.linalg.svd(z, full_matrices=False)
            sign = np.sign(vt[np.arange(vt.shape[0]), np.argmax(np.abs(vt), axis=1)])
            vt = vt * np.where(sign == 0, 1.0, sign)[:, None]  # largest loading positive
            components = vt[:k].copy()
            evr = (s**2 / np.sum(s**2))[:k]
            scores = z @ components.T
            score_scale = scores.std(axis=0)
            score_scale = np.where(score_scale > 0, score_scale, 1.0)
            t = scores / score_scale
            residual = np.mean((z - scores @ components) ** 2, axis=0)
            t_var = None if z_var is None else (z_var @ (components.T**2)) / score_scale**2
        G = t.shape[1]

        seeds = _component_seeds(self.random_state, G)
        settings = (self.kernel, d, cb, ls_bounds, nl_bounds, bool(self.white_noise), int(self.n_restarts))
        alphas = [JITTER if t_var is None else t_var[:, c] + JITTER for c in range(G)]
        if n_jobs == 1 or G == 1:
            fitted = [_fit_component(settings, X, t[:, c], alphas[c], int(seeds[c])) for c in range(G)]
        else:
            fitted = Parallel(n_jobs=n_jobs, backend="loky")(
                delayed(_fit_component)(settings, X, t[:, c], alphas[c], int(seeds[c])) for c in range(G))
        gps, records = [], []
        const = np.empty(G)
        lscale = np.empty((G, d))
        noise = np.zeros(G)
        alpha = np.empty((G, n))
        chol = np.empty((G, n, n))
        lml = np.empty(G)
        for c, (gp, caught) in enumerate(fitted):
            for category, message in caught:
                if issubclass(category, ConvergenceWarning):
                    records.append(f"component {c}: {' '.join(message.split())}")
                else:  # not ours to swallow
                    warnings.warn(message, category, stacklevel=2)
            kp = gp.kernel_.k1 if self.white_noise else gp.kernel_
            const[c] = kp.k1.constant_value
            lscale[c] = np.broadcast_to(kp.k2.length_scale, (d,))
            if self.white_noise:
                noise[c] = gp.kernel_.k2.noise_level
            alpha[c] = gp.alpha_
            chol[c] = gp.L_
            lml[c] = gp.log_marginal_likelihood_value_
            gps.append(gp)

        self.n_features_in_ = d
        self.n_outputs_ = m
        self.n_components_ = G
        self.theta_train_ = theta.copy()
        self.y_train_ = y_raw.copy()
        self.y_var_train_ = None if y_var_raw is None else y_var_raw.copy()
        self.X_train_ = X
        self.y_mean_ = y_mean
        self.y_scale_ = y_scale
        self.components_ = components
        self.score_scale_ = score_scale
        self.explained_variance_ratio_ = evr
        self.residual_var_ = residual
        self.constant_ = const
        self.length_scale_ = lscale
        self.noise_level_ = noise
        self.alpha_ = alpha
        self.L_ = chol
        self.log_marginal_likelihood_ = lml
        self.fit_warnings_ = records
        self.gps_ = gps
        self._prepare()
        return self

    def _n_keep(self, n, m, z):
        if self.n_pca is None:
            return None
        p = self.n_pca
        kmax = min(n, m)
        if isinstance(p, (bool, np.bool_)):
            raise ValueError(f"n_pca: expected None, an int or a fraction in (0, 1), got {p!r}")  # noqa: TRY004 - bad input is a ValueError here
        if isinstance(p, (int, np.integer)):
            if not 1 <= p <= kmax:
                raise ValueError(f"n_pca = {p}: expected 1 <= n_pca <= min(n_points, n_outputs) = {kmax}")
            return int(p)
        if isinstance(p, float) and 0.0 < p < 1.0:
            s = np.linalg.svd(z, compute_uv=False)
            ratio = np.cumsum(s**2) / np.sum(s**2)
            return int(min(np.searchsorted(ratio, p) + 1, kmax))
        raise ValueError(f"n_pca: expected None, an int or a fraction in (0, 1), got {p!r}")

    def _prepare(self):
        """Arrays used by predict, derived from the fitted (or loaded) state."""
        names, lo, hi = self._domain()
        self._names, self._lo, self._hi = names, lo, hi
        self._span = hi - lo
        self._scale = self._scaling(names, self.n_outputs_)
        Xs = self.X_train_[None, :, :] / self.length_scale_[:, None, :]
        self._XsT = np.ascontiguousarray(Xs.transpose(0, 2, 1))
        # Fortran order once, so that each predict is one BLAS triangular solve per component.
        # (Multiplying by a precomputed L⁻¹ is ~1.6x faster but loses accuracy when K is
        # ill-conditioned, as it is for noise-free simulations; the solve is what sklearn does.)
        self._Lf = [np.asfortranarray(L) for L in self.L_]
        self._code = KERNELS[self.kernel][0]
        self._alpha_c = np.ascontiguousarray(self.alpha_, dtype=float)
        if self.components_ is not None:
            self._W = self.components_ * self.score_scale_[:, None]  # scores -> standardised y
            self._W2 = self._W**2

    # -------------------------------------------------------------------------------- predict

    def predict(self, theta, return_std=False, return_cov=False, include_noise=False):
        """Emulated summaries at θ.

        Parameters
        ----------
        theta : array-like of shape (q, d) or (d,)
            Parameters inside the training bounds.
        return_std : bool
            Also return the predictive standard deviation of every output.
        return_cov : bool
            Also return the predictive covariance between the outputs at each θ (with PCA the
            components couple the outputs; without PCA it is diagonal). Not the covariance
            between different θ.
        include_noise : bool
            Add the fitted WhiteKernel noise to the variance (then the std equals
            scikit-learn's ``predict(return_std=True)``); default: uncertainty of the emulated
            mean only. The PCA truncation residual is always included.

        Returns
        -------
        mean : ndarray (q, m) or (m,)
        std : ndarray (q, m) or (m,), if ``return_std``
        cov : ndarray (q, m, m) or (m, m), if ``return_cov``

        Raises
        ------
        ValueError
            θ of the wrong shape, non-finite, or outside the training bounds (naming the
            parameter and its bounds).
        """
        check_is_fitted(self, "alpha_")
        if return_std and return_cov:
            raise ValueError("predict: ask for return_std or return_cov, not both")
        th = np.asarray(theta, dtype=float)
        single = th.ndim == 1
        d = self.n_features_in_
        if single:
            th = th[None, :]
        if th.ndim != 2 or th.shape[1] != d:
            raise ValueError(f"theta: expected shape (q, {d}) or ({d},) (one column per parameter {self._names}), "
                             f"got {np.shape(theta)}")
        if not np.all(np.isfinite(th)):
            r, c = np.argwhere(~np.isfinite(th))[0]
            raise ValueError(f"theta: non-finite {self._names[c]} = {th[r, c]} at row {r}")
        self._check_inside(th, self._names, self._lo, self._hi, "theta")
        q = th.shape[0]
        out = [np.empty((q, self.n_outputs_))]
        if return_std:
            out.append(np.empty((q, self.n_outputs_)))
        if return_cov:
            out.append(np.empty((q, self.n_outputs_, self.n_outputs_)))
        for start in range(0, q, _BLOCK):
            sl = slice(start, min(start + _BLOCK, q))
            res = self._predict_block(th[sl], return_std or return_cov, return_cov, include_noise)
            if self._scale is not None:
                res = self._from_fit_space(th[sl], res, return_cov)
            for o, r in zip(out, res):
                o[sl] = r
        if single:
            out = [o[0] for o in out]
        return out[0] if len(out) == 1 else tuple(out)

    def _workspace(self, G, q):
        """This thread's buffers for a (G, q, n_train) cross-covariance, or None when too big."""
        return cross_kernel_workspace((G, q, self._XsT.shape[2]))

    def _to_outputs(self, mt):
        """Component means (q, G) -> emulated summaries (q, n_outputs)."""
        z = mt @ self._W if self.components_ is not None else mt
        return self.y_mean_ + self.y_scale_ * z

    def _predict_block(self, th, want_var, want_cov, include_noise):
        G = self.alpha_.shape[0]
        x = (th - self._lo) / self._span
        xs = np.ascontiguousarray(x[None, :, :] / self.length_scale_[:, None, :])
        prior = self.constant_ + self.noise_level_ if include_noise else self.constant_
        mt = np.empty((x.shape[0], G))
        if not want_var:
            mean_fused(xs, self._XsT, self.constant_, self._alpha_c, self._code, mt)
            return (self._to_outputs(mt),)
        K = cross_kernel(xs, self._XsT, self.constant_, self._code, self._workspace(G, x.shape[0]))
        var_t = np.empty((G, x.shape[0])) if want_var else None
        for g in range(G):
            # one matrix-vector product per component, as sklearn does (K @ alpha cancels
            # strongly when alpha is large, so the order of summation matters at ~1e-7)
            mt[:, g] = K[g] @ self.alpha_[g]
            if want_var:
                v = _dtrsm(1.0, self._Lf[g], K[g].T, lower=1)  # L⁻¹ k*, shape (n, q)
                # the same order of operations as sklearn (the difference cancels when the
                # signal variance is large and the point is close to training points)
                var_t[g] = prior[g] - np.einsum("ij,ji->i", v.T, v)
        pca = self.components_ is not None
        mean = self._to_outputs(mt)
        var_t = np.maximum(var_t, 0.0).T  # (q, G)
        if not want_cov:
            var_z = (var_t @ self._W2 + self.residual_var_) if pca else var_t
            return mean, np.sqrt(var_z) * self.y_scale_
        if pca:
            cov_z = np.einsum("qg,gi,gj->qij", var_t, self._W, self._W)
            idx = np.arange(self.n_outputs_)
            cov_z[:, idx, idx] += self.residual_var_
        else:
            cov_z = np.zeros((var_t.shape[0], self.n_outputs_, self.n_outputs_))
            idx = np.arange(self.n_outputs_)
            cov_z[:, idx, idx] = var_t
        return mean, cov_z * self.y_scale_[None, :, None] * self.y_scale_[None, None, :]

    # ---------------------------------------------------------------------- state <-> files

    def _training_cholesky(self):
        """Cholesky factors of every component GP's training covariance, recomputed exactly as
        scikit-learn's fit computes them (``K = kernel_(X); K += diag(alpha); cholesky``) from
        the stored inputs and hyperparameters. Not stored: (n_components, n, n) floats would
        make a shared emulator tens of MB; recomputing them takes well under a second."""
        n = self.X_train_.shape[0]
        t_var = None
        if self.y_var_train_ is not None:
            y_var = self.y_var_train_
            scaling = self._scaling(self._domain()[0], self.n_outputs_)
            if scaling is not None:
                y_var = self._to_fit_space(scaling, self.theta_train_, self.y_train_, y_var)[1]
            z_var = y_var / self.y_scale_**2
            t_var = z_var if self.components_ is None else (z_var @ (self.components_.T**2)) / self.score_scale_**2
        builder = KERNELS[self.kernel][1]
        L = np.empty((self.n_components_, n, n))
        for c in range(self.n_components_):
            kern = ConstantKernel(float(self.constant_[c])) * builder(self.length_scale_[c].copy(), (1e-5, 1e5))
            if self.white_noise:
                kern = kern + WhiteKernel(float(self.noise_level_[c]))
            K = kern(self.X_train_)
            K[np.diag_indices_from(K)] += JITTER if t_var is None else t_var[:, c] + JITTER
            try:
                L[c] = cholesky(K, lower=True, check_finite=False)
            except np.linalg.LinAlgError:
                raise EmulatorFileError(
                    f"component {c}: the training covariance is not positive definite; the file is damaged"
                ) from None
        return L

    def _state(self):
        """(json-able header, dict of float64 arrays) of a fitted emulator."""
        check_is_fitted(self, "alpha_")
        names, lo, hi = self._domain()
        units = list(self.units) if self.units is not None else [""] * len(names)
        header = {
            "parameters": [
                {"name": nm, "unit": str(u), "low": float(a), "high": float(b)}
                for nm, u, a, b in zip(names, units, lo, hi)
            ],
            "outputs": {
                "n_outputs": int(self.n_outputs_),
                "names": None if self.output_names is None else [str(s) for s in self.output_names],
            },
            "settings": {
                "kernel": self.kernel,
                "n_restarts": int(self.n_restarts),
                "n_pca": self.n_pca if self.n_pca is None else (
                    int(self.n_pca) if isinstance(self.n_pca, (int, np.integer)) else float(self.n_pca)),
                "normalize": bool(self.normalize),
                "white_noise": bool(self.white_noise),
                "length_scale_bounds": [float(v) for v in self.length_scale_bounds],
                "noise_level_bounds": [float(v) for v in self.noise_level_bounds],
                "constant_bounds": [float(v) for v in self.constant_bounds],
                "random_state": int(self.random_state) if isinstance(self.random_state, (int, np.integer)) else None,
                "jitter": JITTER,
                "scaled_outputs": None if self.scaled_outputs is None else {
                    "parameter": str(self.scaled_outputs["parameter"]),
                    "factor": "1/p^2 - 1",
                    "linear": [int(i) for i in self.scaled_outputs.get("linear", [])],
                    "log": [int(i) for i in self.scaled_outputs.get("log", [])],
                },
            },
            "kernel": {
                "family": self.kernel,
                "form": "constant * k(|x - x'| / length_scale) + white, x in the unit cube of the bounds",
                "n_components": int(self.n_components_),
                "constant": self.constant_.tolist(),
                "length_scale": self.length_scale_.tolist(),
                "noise_level": self.noise_level_.tolist(),
                "log_marginal_likelihood": self.log_marginal_likelihood_.tolist(),
            },
            "pca": None if self.components_ is None else {
                "n_components": int(self.components_.shape[0]),
                "explained_variance_ratio": self.explained_variance_ratio_.tolist(),
                "residual_variance_total": float(np.sum(self.residual_var_)),
            },
            "training": {
                "n_points": int(self.theta_train_.shape[0]),
                "has_y_var": self.y_var_train_ is not None,
                "fit_warnings": list(self.fit_warnings_),
            },
        }
        arrays = {
            "theta_train": self.theta_train_,
            "y_train": self.y_train_,
            "x_train": self.X_train_,
            "y_mean": self.y_mean_,
            "y_scale": self.y_scale_,
            "score_scale": self.score_scale_,
            "residual_var": self.residual_var_,
            "alpha": self.alpha_,
        }
        if self.components_ is not None:
            arrays["pca_components"] = self.components_
        if self.y_var_train_ is not None:
            arrays["y_var_train"] = self.y_var_train_
        return header, {k: np.ascontiguousarray(v, dtype=np.float64) for k, v in arrays.items()}

    @classmethod
    def _from_state(cls, doc, arrays, where):
        """Build a fitted emulator from a verified header and arrays; check every shape."""
        try:
            params = doc["parameters"]
            st = doc["settings"]
            kern = doc["kernel"]
            names = [str(p["name"]) for p in params]
            bounds = [[float(p["low"]), float(p["high"])] for p in params]
            units = [str(p.get("unit", "")) for p in params]
            m = int(doc["outputs"]["n_outputs"])
            G = int(kern["n_components"])
            n = int(doc["training"]["n_points"])
            const = np.array(kern["constant"], dtype=float)
            lscale = np.array(kern["length_scale"], dtype=float)
            noise = np.array(kern["noise_level"], dtype=float)
            lml = np.array(kern["log_marginal_likelihood"], dtype=float)
            has_pca = doc.get("pca") is not None
            evr = np.array(doc["pca"]["explained_variance_ratio"], dtype=float) if has_pca else None
            has_y_var = bool(doc["training"].get("has_y_var"))
            fit_warnings = [str(w) for w in doc["training"].get("fit_warnings", [])]
            output_names = doc["outputs"].get("names")
            if not isinstance(st, dict):
                raise TypeError("settings must be a table")
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise EmulatorFileError(f"{where}: malformed {JSON_FILE} ({type(exc).__name__}: {exc})") from None
        if st.get("kernel") not in KERNELS:
            raise EmulatorFileError(f"{where}: unknown kernel {st.get('kernel')!r} in {JSON_FILE}")
        d = len(names)
        expected = {
            "theta_train": (n, d), "y_train": (n, m), "x_train": (n, d), "y_mean": (m,),
            "y_scale": (m,), "score_scale": (G,), "residual_var": (m,), "alpha": (G, n),
        }
        if has_pca:
            expected["pca_components"] = (G, m)
        if has_y_var:
            expected["y_var_train"] = (n, m)
        missing = sorted(set(expected) - set(arrays))
        extra = sorted(set(arrays) - set(expected))
        if missing or extra:
            raise EmulatorFileError(
                f"{where}: {ARRAYS_FILE} arrays do not match the emulator (missing {missing}, unexpected {extra})")
        for key, shape in expected.items():
            if arrays[key].shape != shape:
                raise EmulatorFileError(f"{where}: array {key!r} has shape {arrays[key].shape}; expected {shape}")
        for key, value, shape in (("constant", const, (G,)), ("length_scale", lscale, (G, d)),
                                  ("noise_level", noise, (G,)), ("log_marginal_likelihood", lml, (G,))):
            if value.shape != shape:
                raise EmulatorFileError(f"{where}: kernel {key} has shape {value.shape}; expected {shape}")
        if not (np.all(const > 0) and np.all(lscale > 0) and np.all(noise >= 0)):
            raise EmulatorFileError(f"{where}: kernel hyperparameters must be positive")
        npca = st.get("n_pca")
        em = cls(
            parameter_names=names, bounds=bounds, kernel=st["kernel"],
            n_restarts=int(st.get("n_restarts", 0)), n_pca=npca,
            normalize=bool(st.get("normalize", True)), random_state=st.get("random_state"),
            units=units, output_names=output_names,
            white_noise=bool(st.get("white_noise", True)),
            length_scale_bounds=tuple(st.get("length_scale_bounds", (1e-2, 1e2))),
            noise_level_bounds=tuple(st.get("noise_level_bounds", (1e-10, 1.0))),
            constant_bounds=tuple(st.get("constant_bounds", (1e-4, 1e4))),
            metadata=doc.get("metadata"),
            scaled_outputs=_scaled_from_doc(st.get("scaled_outputs"), where),
        )
        em.n_features_in_, em.n_outputs_, em.n_components_ = d, m, G
        em.theta_train_ = arrays["theta_train"]
        em.y_train_ = arrays["y_train"]
        em.y_var_train_ = arrays.get("y_var_train")
        em.X_train_ = arrays["x_train"]
        em.y_mean_ = arrays["y_mean"]
        em.y_scale_ = arrays["y_scale"]
        em.components_ = arrays.get("pca_components")
        em.score_scale_ = arrays["score_scale"]
        em.explained_variance_ratio_ = evr
        em.residual_var_ = arrays["residual_var"]
        em.constant_, em.length_scale_, em.noise_level_ = const, lscale, noise
        em.alpha_ = arrays["alpha"]
        em.log_marginal_likelihood_ = lml
        em.L_ = em._training_cholesky()
        em.fit_warnings_ = fit_warnings
        try:
            em._domain()
        except ValueError as exc:
            raise EmulatorFileError(f"{where}: {exc}") from None
        em._prepare()
        return em



def _scaled_from_doc(value, where):
    """``scaled_outputs`` of an emulator file (None when absent), its factor checked."""
    if value is None:
        return None
    if not isinstance(value, dict) or value.get("factor") != "1/p^2 - 1":
        raise EmulatorFileError(f"{where}: unknown scaled_outputs {value!r} in {JSON_FILE}")
    return {k: value[k] for k in ("parameter", "linear", "log") if k in value}


def _check_pair(name, value):
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise ValueError(f"{name}: expected (low, high), got {value!r}") from None
    if not (0 < lo < hi and math.isfinite(hi)):
        raise ValueError(f"{name}: expected 0 < low < high, got {value!r}")
    return (lo, hi)



def _component_seeds(random_state, count):
    if isinstance(random_state, np.random.Generator):
        return random_state.integers(0, 2**32 - 1, size=count)
    if isinstance(random_state, (int, np.integer)) and not isinstance(random_state, bool) and random_state >= 0:
        return [int(s.generate_state(1)[0]) for s in np.random.SeedSequence(int(random_state)).spawn(count)]
    raise ValueError(f"random_state: expected an int >= 0 or a numpy Generator, got {random_state!r}")


register(GPEmulator)
