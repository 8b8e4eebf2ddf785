"""Every figure swerve draws. Matplotlib with the non-interactive Agg backend."""

from __future__ import annotations

import numpy as np


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def save_figure(fig, path, dpi=110):
    """Write ``fig`` to ``path`` atomically (format from the extension; :mod:`swerve.fileio`) and close it."""
    from .fileio import atomic_path

    try:
        with atomic_path(path) as tmp:
            fig.savefig(tmp, dpi=dpi)
    finally:
        _pyplot().close(fig)


def sample_size_axis(ax, sizes):
    """A logarithmic x axis of sample sizes, labelled at exactly those sizes (plain numbers)."""
    from matplotlib.ticker import NullFormatter, NullLocator

    ax.set_xscale("log")
    sizes = sorted({int(v) for v in sizes})
    ax.xaxis.set_minor_locator(NullLocator())
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xticks(sizes, [str(v) for v in sizes])
    ax.set_xlabel("stars N")


def galaxy_curves(galaxy, path, r_min=0.5, r_max=200.0, measurements=()):
    """Circular velocity and escape speed of ``galaxy`` against radius, with measurements.

    Parameters
    ----------
    galaxy : swerve.galaxy.Galaxy
    path : str or Path
        Output image (format from the extension).
    measurements : sequence of swerve.galaxy.measurements.Measurement
    """
    plt = _pyplot()
    r = np.geomspace(r_min, r_max, 300)
    vc = galaxy.circular_velocity(r)
    vesc = galaxy.escape_speed_at_radius(r)
    fig, axes = plt.subplots(1, 2, figsize=(10, 4.2), constrained_layout=True)
    for ax, y, qty, label in (
        (axes[0], vc, "circular_velocity", r"$v_c(R)$ in the plane [km/s]"),
        (axes[1], vesc, "escape_speed", r"$v_{\rm esc}(r)$ along $+x$ [km/s]"),
    ):
        ax.plot(r, y, color="0.15", lw=2, label=galaxy.name)
        markers = iter("osD^v")
        for m in measurements:
            if m.quantity != qty:
                continue
            ax.errorbar(
                m.radius_kpc, m.value, yerr=[[m.err_low], [m.err_high]], fmt=next(markers),
                ms=5, capsize=3, label=m.label or m.source,
            )
        ax.set_xscale("log")
        ax.set_xlabel("radius [kpc]")
        ax.set_ylabel(label)
        ax.grid(alpha=0.3, which="both")
        ax.legend(fontsize=7, loc="lower left" if qty == "escape_speed" else "lower right")
    fig.suptitle(f"Galaxy model {galaxy.name}", fontsize=10)
    save_figure(fig, path, dpi=120)
    return path


_LABELS = {
    "q_y": r"$q_y$", "q_z": r"$q_z$", "m_halo": r"$M_{\rm halo}$ [$10^{12}$ M$_\odot$]",
    "m_disk": r"$M_{\rm disk}$ [$10^{11}$ M$_\odot$]",
    "r_s": r"$r_s$ [kpc]", "slope": r"launch slope", "v_min": r"$v_{\rm min}$", "v_max": r"$v_{\rm max}$",
}


#: plotted in these units (the labels say so)
_SCALE = {"m_halo": 1e12, "m_disk": 1e11}


def corner_plot(samples, names, path, truths=None, weights=None):
    """Corner plot of posterior samples (the corner package), with true values if known and
    importance weights if the samples carry them."""
    import corner

    _pyplot()  # the non-interactive backend, before corner imports pyplot's figures
    labels = [_LABELS.get(n, n) for n in names]
    scale = np.array([_SCALE.get(n, 1.0) for n in names])
    samples = np.asarray(samples) / scale
    if truths is not None:
        truths = [None if t is None else t / s_ for t, s_ in zip(truths, scale)]
    fig = corner.corner(
        samples, weights=weights, labels=labels, truths=truths, quantiles=[0.16, 0.5, 0.84], show_titles=True,
        title_fmt=".3g", levels=(0.393, 0.865), plot_datapoints=False, fill_contours=True,
        color="#1f4e79", truth_color="#c0392b",
    )
    save_figure(fig, path, dpi=110)
    return path


def posterior_predictive(stars, mu, sig, spec, path):
    """Observed against emulated folded deflections v_θ' in each position cell.

    ``stars``: table with ``cell``, ``v_tf_obs``, ``v_tf_err`` (weighted over each star's
    samples); ``mu``/``sig``: emulated cell means and covariances of posterior draws,
    (n_draws, n_cells, 3) and (n_draws, n_cells, 3, 3).
    """
    plt = _pyplot()
    n_cells = spec.n_cells
    m = mu[..., 1]
    sd = np.sqrt(sig[..., 1, 1])
    fig, ax = plt.subplots(figsize=(max(7, 0.6 * n_cells + 2), 4.5), constrained_layout=True)
    x = np.arange(n_cells)
    lo, hi = np.percentile(m, [16, 84], axis=0)
    ax.fill_between(x, np.median(m - sd, 0), np.median(m + sd, 0), step="mid", color="#9ecae1", alpha=0.5,
                    label="emulated population: mean ± intrinsic sd")
    ax.errorbar(x, np.median(m, 0), yerr=[np.median(m, 0) - lo, hi - np.median(m, 0)], fmt="s", color="#08519c",
                ms=5, capsize=3, label="emulated mean (68% of posterior)")
    cell = np.asarray(stars["cell"])
    rng = np.random.default_rng(0)
    jit = rng.uniform(-0.25, 0.25, len(cell))
    ax.errorbar(cell + jit, stars["v_tf_obs"], yerr=stars["v_tf_err"], fmt=".", color="0.35", alpha=0.35,
                elinewidth=0.6, label="stars (measured, ±1σ)")
    means = [np.average(stars["v_tf_obs"][cell == c], weights=1 / np.asarray(stars["v_tf_err"][cell == c]) ** 2)
             if np.any(cell == c) else np.nan for c in range(n_cells)]
    ax.plot(x, means, "D", color="#d95f02", ms=6, label="stars: inverse-variance mean")
    ax.set_xticks(x)
    ax.set_xticklabels(spec.cell_labels(), rotation=60, ha="right", fontsize=7)
    ax.set_ylabel(r"folded deflection $v_\theta\,\mathrm{sign}(z)$ [km/s]")
    span = np.nanmax(np.abs(np.concatenate([hi, lo, np.nan_to_num(np.asarray(means))]))) * 3 + 5
    ax.set_ylim(-span, span)
    ax.axhline(0, color="0.6", lw=0.8)
    ax.legend(fontsize=7, loc="upper right")
    save_figure(fig, path, dpi=110)
    return path


def variants_plot(rows, path):
    """Medians and 68% intervals of the shape parameters, one row per variant."""
    plt = _pyplot()
    params = [p for p in ("q_y", "q_z", "m_halo", "m_disk") if np.isfinite(rows[0].get(f"{p}_median", np.nan))]
    fig, axes = plt.subplots(1, len(params), figsize=(3.2 * len(params), 0.45 * len(rows) + 1.6),
                             sharey=True, constrained_layout=True, squeeze=False)
    y = np.arange(len(rows))[::-1]
    for ax, p in zip(axes[0], params):
        sc = _SCALE.get(p, 1.0)
        med = np.array([r[f"{p}_median"] for r in rows]) / sc
        lo = np.array([r[f"{p}_lo68"] for r in rows]) / sc
        hi = np.array([r[f"{p}_hi68"] for r in rows]) / sc
        ax.errorbar(med, y, xerr=[med - lo, hi - med], fmt="o", color="#1f4e79", capsize=3)
        if p in ("q_y", "q_z"):
            ax.axvline(1.0, color="0.6", ls="--", lw=0.8)
        ax.set_xlabel(_LABELS.get(p, p))
        ax.grid(alpha=0.3)
    axes[0][0].set_yticks(y)
    axes[0][0].set_yticklabels([r["variant"] for r in rows], fontsize=8)
    save_figure(fig, path, dpi=110)
    return path
