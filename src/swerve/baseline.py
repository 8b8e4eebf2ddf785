"""The published KS-test baseline of halo-shape inference from hypervelocity stars.

The method compared against in the validation harness: for a catalog, compute
every star's folded polar deflection ``v_θ' = v_θ · sign(z)`` from its *observed*
heliocentric values taken at face value (its measured distance, or 1/parallax when it has
none, moved to the Galactocentric frame), then, for every value ``q`` of a grid of halo
shapes, run the two-sample Kolmogorov–Smirnov test (:func:`scipy.stats.ks_2samp`) of the
catalog's v_θ' against each of many mock catalogs made at ``q`` (same size, same error model),
and choose the grid value with the largest *median* p-value.

The baseline ignores the measurement errors' structure (they enter only through the mocks)
and uses v_θ' alone, regardless of position: that is the method as published, not a swerve
choice.  Functions here are plain: arrays in, arrays out; the mocks are made by the caller
(:mod:`swerve.validation`), so this module knows nothing of banks or emulators.
"""

from __future__ import annotations

import numpy as np
from scipy.stats import ks_2samp

from .frames import folded_v_theta, helio_to_galacto


def observed_v_theta_folded(catalog, solar=None) -> np.ndarray:
    """Folded polar deflection v_θ' of every star from its observed values, km/s, shape (n,).

    Parameters
    ----------
    catalog : swerve.catalog.Catalog
        Stars with ``distance`` or ``parallax``; the measured distance is used where present,
        else 1/parallax (a non-positive parallax gives NaN, dropped by :func:`ks_choice`).
    solar : None, str or SolarParameters
        Solar parameters of the transform (default "v4.0").
    """
    d = np.asarray(catalog.distance, dtype=float).copy()
    plx = np.asarray(catalog.parallax, dtype=float)
    use_plx = ~np.isfinite(d)
    with np.errstate(divide="ignore", invalid="ignore"):
        d[use_plx] = np.where(plx[use_plx] > 0, 1.0 / plx[use_plx], np.nan)
    out = np.full(d.shape, np.nan)
    ok = np.isfinite(d) & (d > 0)
    if ok.any():
        pos, vel = helio_to_galacto(catalog.ra[ok], catalog.dec[ok], d[ok], catalog.pmra[ok], catalog.pmdec[ok],
                                    catalog.vlos[ok], solar=solar)
        out[ok] = folded_v_theta(pos, vel)
    return out


def ks_pvalues(sample, references) -> np.ndarray:
    """Two-sample KS p-values of ``sample`` against each reference sample.

    Parameters
    ----------
    sample : array of shape (n,)
        v_θ' of the catalog, km/s (NaN dropped).
    references : sequence of arrays
        v_θ' of each mock catalog of one grid value.

    Returns
    -------
    array of shape (n_references,)
    """
    x = np.asarray(sample, dtype=float)
    x = x[np.isfinite(x)]
    if x.size == 0:
        raise ValueError("sample: no finite v_theta' value to test")
    out = np.empty(len(references))
    for j, ref in enumerate(references):
        r = np.asarray(ref, dtype=float)
        r = r[np.isfinite(r)]
        if r.size == 0:
            raise ValueError(f"references[{j}]: no finite v_theta' value")
        out[j] = ks_2samp(x, r).pvalue
    return out


def ks_choice(sample, grid, references) -> tuple[float, np.ndarray]:
    """The baseline's estimate: the grid value whose mocks give the largest median KS p-value.

    Parameters
    ----------
    sample : array of shape (n,)
        The catalog's v_θ', km/s.
    grid : array of shape (n_grid,)
        Grid values (e.g. of q_z).
    references : sequence of length n_grid
        For each grid value, a sequence of mock-catalog v_θ' arrays.

    Returns
    -------
    choice : float
        The chosen grid value (the first of equal medians).
    median_p : array of shape (n_grid,)
        Median p-value per grid value.
    """
    grid = np.asarray(grid, dtype=float)
    if len(references) != grid.size:
        raise ValueError(f"references: expected one set of mocks per grid value ({grid.size}), got {len(references)}")
    med = np.array([np.median(ks_pvalues(sample, refs)) for refs in references])
    return float(grid[int(np.argmax(med))]), med
