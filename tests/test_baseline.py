"""The KS-test baseline (swerve.baseline)."""

import numpy as np
import pytest
from scipy import stats

from swerve.baseline import ks_choice, ks_pvalues, observed_v_theta_folded


@pytest.fixture(scope="module")
def small_bank():
    from swerve.bank import build_bank
    from swerve.galaxy import Galaxy
    from swerve.launch import BoundedPowerLawSpeed
    from swerve.selection import Selection

    gal = Galaxy.from_name("swerve-mw-1", halo_flattening="potential", q_z=0.9)
    bank = build_bank(gal, 600, 3, t_max=300.0, dt=2.0, r_min_store=10.0, r_max=250.0)
    return gal, BoundedPowerLawSpeed(v_min=700.0, v_max=3000.0, slope=-0.5), Selection(r_min=10.0, r_max=250.0), bank


def _mock(small_bank, n, rng, errors, truth=False):
    from swerve.catalog import catalog_from_table
    from swerve.population import make_mock

    gal, launch, sel, bank = small_bank
    t = make_mock(gal, launch, sel, errors, n, rng, bank=bank, flight_time_max=300.0, include_truth=truth)
    return t, catalog_from_table(t, source="mock")


def test_observed_v_theta_matches_truth_for_tiny_errors(small_bank, rng):
    """With errors far below the signal, v_theta' from the observed values equals the mock's truth."""
    from swerve.measurement import ErrorModel

    t, cat = _mock(small_bank, 200, rng, ErrorModel(distance_frac=1e-7, pm=1e-8, vlos=1e-5), truth=True)
    v = observed_v_theta_folded(cat)
    np.testing.assert_allclose(v, np.asarray(t["true_v_theta_folded"]), atol=0.01)


def test_ks_pvalues_uniform_for_catalogs_of_one_simulation(small_bank, rng):
    """KS p-values of two catalogs drawn from the same simulation are U(0, 1) (common knowledge of
    statistics): KS test of 300 p-values against the uniform. Sizes 40 and 67 keep the two-sample
    statistic's lattice fine enough for the p-values to be nearly continuous."""
    from swerve.measurement import ErrorModel

    em = ErrorModel(distance_frac=0.05, pm=0.02, vlos=5.0)
    n_pairs, na, nb = 300, 40, 67
    _, cat = _mock(small_bank, n_pairs * (na + nb), rng, em)
    v = observed_v_theta_folded(cat)
    p = []
    for i in range(n_pairs):
        blk = v[i * (na + nb):(i + 1) * (na + nb)]
        p.append(ks_pvalues(blk[:na], [blk[na:]])[0])
    p = np.array(p)
    assert stats.kstest(p, "uniform").pvalue > 0.01
    # and the false-alarm rate at 5% within 3 binomial sigma
    assert abs(np.mean(p < 0.05) - 0.05) < 3 * np.sqrt(0.05 * 0.95 / n_pairs)


def test_ks_choice_picks_the_right_grid_value(rng):
    """Analytic toy: a sample of N(1, 1) against mocks of N(mu, 1), mu in {0, 1, 2}."""
    grid = [0.0, 1.0, 2.0]
    refs = [[rng.normal(mu, 1.0, 200) for _ in range(20)] for mu in grid]
    choice, med = ks_choice(rng.normal(1.0, 1.0, 200), grid, refs)
    assert choice == 1.0
    assert med[1] > 0.05 and med[0] < 1e-3 and med[2] < 1e-3


def test_ks_bad_input():
    with pytest.raises(ValueError, match="one set of mocks per grid value"):
        ks_choice(np.ones(5), [0.9, 1.0], [[np.ones(5)]])
    with pytest.raises(ValueError, match="no finite"):
        ks_pvalues(np.full(3, np.nan), [np.ones(3)])
