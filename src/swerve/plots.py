"""Every figure swerve draws. Matplotlib with the non-interactive Agg backend."""

from __future__ import annotations

import math

import numpy as np

from .fileio import atomic_path


def _pyplot():
    """pyplot with the non-interactive Agg backend. matplotlib is imported here, when a figure is
    drawn, not with this module: swerve.fit, validation and forecast import this module, and
    neither matplotlib's import time nor the choice of its backend should come with them."""
    import matplotlib  # noqa: PLC0415 - lazy: matplotlib only when a figure is drawn (see above)

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt  # noqa: PLC0415 - lazy: after selecting the Agg backend

    return plt


def save_figure(fig, path, dpi=110):
    """Write ``fig`` to ``path`` atomically (format from the extension; :mod:`swerve.fileio`) and close it."""
    try:
        with atomic_path(path) as tmp:
            fig.savefig(tmp, dpi=dpi)
    finally:
        _pyplot().close(fig)


def sample_size_axis(ax, sizes):
    """A logarithmic x axis of sample sizes, labelled at exactly those sizes (plain numbers)."""
    from matplotlib.ticker import NullFormatter, NullLocator  # noqa: PLC0415 - lazy: matplotlib only when a figure is drawn

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
    import corner  # noqa: PLC0415 - lazy: corner imports matplotlib (only when a figure is drawn)

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


# ------------------------------------------------------------- validation and forecasts ----
def accuracy_plots(acc: dict, parameter_names, path_hist, path_map):
    """z histogram with N(0, 1), RMS per statistic; and worst |z| per point over parameter pairs."""
    plt = _pyplot()
    z = acc["z"][np.isfinite(acc["z"])]
    fig, ax = plt.subplots(1, 2, figsize=(10, 4))
    x = np.linspace(-5, 5, 200)
    ax[0].hist(np.clip(z, -5, 5), bins=40, density=True, alpha=0.7, label="held-out z")
    ax[0].plot(x, np.exp(-0.5 * x * x) / math.sqrt(2 * math.pi), "k-", label="N(0, 1)")
    ax[0].set_xlabel("z = (emulated − simulated) / sqrt(σ_emu² + σ_sim²)")
    ax[0].legend()
    st = acc["rms_z_by_stat"]
    ax[1].bar(range(len(st)), list(st.values()))
    ax[1].axhline(1.0, color="k", ls="--")
    ax[1].set_xticks(range(len(st)), list(st), rotation=45, ha="right")
    ax[1].set_ylabel("RMS z")
    fig.tight_layout()
    save_figure(fig, path_hist, dpi=100)
    th = acc["theta"]
    worst = np.array([w for w, _ in acc["worst"]])
    d = th.shape[1]
    pairs = [(a, b) for a in range(d) for b in range(a + 1, d)] or [(0, 0)]
    fig, axes = plt.subplots(1, len(pairs), figsize=(4 * len(pairs), 3.6), squeeze=False)
    for ax, (a, b) in zip(axes[0], pairs):
        sc = ax.scatter(th[:, a], th[:, b], c=worst, cmap="viridis", s=40)
        ax.set_xlabel(parameter_names[a])
        ax.set_ylabel(parameter_names[b])
        fig.colorbar(sc, ax=ax, label="worst |z|")
    fig.tight_layout()
    save_figure(fig, path_map, dpi=100)


def calibration_plot(cal: dict, path):
    """Rank histograms per parameter with the 99% band of uniform counts, and coverage."""
    from scipy.stats import binom  # noqa: PLC0415 - lazy: scipy.stats for this figure only (swerve trace and galaxy import this module)

    plt = _pyplot()
    names = list(cal["parameters"])
    fig, axes = plt.subplots(1, len(names) + 1, figsize=(3.6 * (len(names) + 1), 3.4), squeeze=False)
    for ax, n in zip(axes[0], names):
        h = np.array(cal["parameters"][n]["rank_test"]["histogram"])
        m = h.sum()
        lo, hi = binom.ppf([0.005, 0.995], m, 1.0 / len(h))
        ax.bar(range(len(h)), h, width=1.0, alpha=0.7)
        ax.axhspan(lo, hi, color="grey", alpha=0.3)
        ax.set_title(f"{n}: p = {cal['parameters'][n]['rank_test']['chi2_p']:.2g}")
        ax.set_xlabel("rank bin")
    ax = axes[0][-1]
    for k, (key, nom) in enumerate((("coverage68", 0.68), ("coverage95", 0.95))):
        obs = [cal["parameters"][n][key]["observed"] for n in names]
        sig = [cal["parameters"][n][key]["sigma"] for n in names]
        ax.errorbar(np.arange(len(names)) + 0.1 * k, obs, yerr=2 * np.array(sig), fmt="o", label=f"{nom:.0%}")
        ax.axhline(nom, color=f"C{k}", ls="--")
    ax.set_xticks(range(len(names)), names)
    ax.set_ylabel("coverage (±2σ binomial)")
    ax.legend()
    fig.tight_layout()
    save_figure(fig, path, dpi=100)


def power_plot(power: dict, path):
    """Success rate vs N, one panel per error model: swerve and the KS baseline (binomial
    standard errors as bars; the baseline's points shifted 3% right to keep the bars apart)."""
    from .validation import binomial_sigma  # noqa: PLC0415 - import cycle: swerve.validation imports this module

    plt = _pyplot()
    errs = power["errors"]
    fig, axes = plt.subplots(1, len(errs), figsize=(4.5 * len(errs), 3.6), squeeze=False)
    for ax, e in zip(axes[0], errs):
        for case, style in (("axisymmetric", "o-"), ("triaxial", "s:")):
            rows = [r for r in power["rows"] if r["errors"] == e and r["case"] == case]
            if not rows:
                continue
            n = np.array([r["n_stars"] for r in rows], dtype=float)

            sw = [r["swerve_success"] for r in rows]
            ax.errorbar(n, sw, yerr=[binomial_sigma(p, r["n_catalogs"]) for p, r in zip(sw, rows)],
                        fmt=style, capsize=2, label=f"swerve, {case}")
            if case == "axisymmetric":
                ks = [r["ks_success"] for r in rows]
                ax.errorbar(n * 1.03, ks, yerr=[binomial_sigma(p, r["n_catalogs"]) for p, r in zip(ks, rows)],
                            fmt="^--", capsize=2, label="KS baseline, axisymmetric")
        sample_size_axis(ax, [r["n_stars"] for r in power["rows"]])
        ax.set_ylim(0, 1.02)
        ax.set_ylabel("fraction with q_z on the true grid value")
        ax.set_title(f"errors: {e}")
        ax.legend(fontsize=8)
    fig.tight_layout()
    save_figure(fig, path, dpi=100)


# ---------------------------------------------------------------------------- driver --------


def forecast_plot(doc: dict, path):
    """Posterior half-widths of q_z and q_y against N, and the fraction of decisive catalogs."""
    plt = _pyplot()
    rows = doc["rows"]
    n = [r["n_stars"] for r in rows]
    fig, ax = plt.subplots(1, 2, figsize=(9, 3.6))
    for q, m in (("q_z", "o-"), ("q_y", "s--")):
        if all(f"width68_{q}" in r for r in rows):
            med = np.array([r[f"width68_{q}"]["median"] for r in rows])
            lo = np.array([r[f"width68_{q}"]["p16"] for r in rows])
            hi = np.array([r[f"width68_{q}"]["p84"] for r in rows])
            ax[0].errorbar(n, med, yerr=[med - lo, hi - med], fmt=m, label=q)
    sample_size_axis(ax[0], n)
    ax[0].set_ylabel("68% half-width")
    ax[0].legend()
    ax[1].plot(n, [r.get("p_decisive", np.nan) for r in rows], "o-")
    sample_size_axis(ax[1], n)
    ax[1].set_ylim(0, 1.02)
    thr = doc["settings"]["config"]["threshold"]
    ax[1].set_ylabel(f"fraction with P({doc['settings']['side']}) > {thr:g}")
    fig.suptitle(f"truth q_z = {doc['settings']['truth']['q_z']:g}")
    fig.tight_layout()
    save_figure(fig, path, dpi=100)


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


def trace_plot(result, path):
    """Flight time against heliocentric distance, coloured by the origin probability
    (:class:`swerve.trace.TraceResult`); with the LMC a second panel for the LMC origin.

    Stars with at least one passing path are drawn with their 16-84% flight-time interval; the
    number of stars with none is written in the corner of each panel. The format comes from the
    extension of ``path``, which is written atomically.
    """
    plt = _pyplot()
    d = result.distance if result.distance is not None else result.r_gc
    meta = result.meta
    panels = [("Galactic Centre", result.p_origin, result.t_flight, result.t_flight_lo, result.t_flight_hi,
               f"P(path within {meta.get('radius_kpc', float('nan')):g} kpc of the Galactic Centre)")]
    if result.has_lmc:
        panels.append(("LMC", result.p_lmc, result.t_flight_lmc, result.t_flight_lmc_lo, result.t_flight_lmc_hi,
                       f"P(path within {meta.get('lmc_radius_kpc', float('nan')):g} kpc of the LMC's centre)"))
    fig, axes = plt.subplots(1, len(panels), figsize=(6.4 * len(panels), 4.6), constrained_layout=True,
                             squeeze=False)
    for ax, (origin, p, t_f, lo, hi, label) in zip(axes[0], panels):
        has = np.isfinite(t_f)
        if has.any():
            t = t_f[has]
            ax.errorbar(d[has], t, yerr=[t - lo[has], hi[has] - t], fmt="none", ecolor="0.6", elinewidth=0.7,
                        zorder=1)
            sc = ax.scatter(d[has], t, c=p[has], cmap="viridis", vmin=0.0, vmax=1.0, s=22, edgecolors="k",
                            linewidths=0.3, zorder=2)
            fig.colorbar(sc, ax=ax, label=label)
        ax.set_title(f"{origin} origin: {int(has.sum())} stars with a passing path, {int(np.sum(~has))} with none "
                     "(not shown)", fontsize=8)
        ax.set_xlabel("heliocentric distance [kpc]" if result.distance is not None else "Galactocentric radius [kpc]")
        ax.set_ylabel(f"time since closest approach to the {origin} [Myr]")
        ax.grid(alpha=0.3)
    galaxy = meta.get("galaxy", {}).get("name", "")
    with_lmc = ""
    if result.has_lmc:
        with_lmc = f" + LMC {meta.get('lmc', {}).get('lmc', {}).get('m_lmc', float('nan')):.3g} Msun"
    fig.suptitle(f"swerve trace ({galaxy}{with_lmc}, {meta.get('samples_per_star', '?')} samples per star)",
                 fontsize=9)
    save_figure(fig, path, dpi=120)
    return path
