"""Every figure swerve draws. Matplotlib with the non-interactive Agg backend."""

from __future__ import annotations

import numpy as np


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


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
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path
