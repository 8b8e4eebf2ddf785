"""Selection on a measured line-of-sight velocity (``vlos_min``): mocks cut on the measured
value, the first-order balance the likelihood's scheme rests on, the refusals, and a small
train-mock-fit round trip."""

import json

import numpy as np
import pytest
from astropy.table import Table
from scipy.stats import norm

from swerve.bank import build_bank
from swerve.cli import main
from swerve.galaxy import Galaxy
from swerve.launch import BoundedPowerLawSpeed
from swerve.measurement import ErrorLaw, ErrorModel
from swerve.population import make_mock, population_from_bank
from swerve.selection import Selection, check_declared

CUT = 700.0
SEL = Selection(r_min=10.0, r_max=60.0, outgoing=True, vlos_min=CUT)


@pytest.fixture(scope="module")
def world():
    g = Galaxy.from_name("swerve-mw-1", q_z=0.9)
    bank = build_bank(g, 600, 5, t_max=200.0, dt=2.0, r_min_store=10.0, r_max=60.0)
    launch = BoundedPowerLawSpeed(600.0, 2500.0, -0.5)
    pop = population_from_bank(bank, launch, selection=SEL.true_value_cuts(), solar="v4.0",
                               rng=np.random.default_rng(3))
    return g, bank, launch, pop, pop.helio("v4.0")["vlos"], pop.weight / pop.total_weight


def _errors(sigma):
    return ErrorModel(distance_frac=0.1, pm=ErrorLaw(0.0, 0.01, 1.0), vlos=float(sigma))


@pytest.mark.parametrize("sigma", [10.0, 150.0])
def test_mock_cuts_the_measured_vlos_at_the_gaussian_tail_rate(world, sigma):
    """Every kept star's measured vlos passes the cut, and the share kept is the population's
    mean Gaussian tail probability P(vlos + e >= c) = sum_i w_i Phi((vlos_i - c) / sigma)
    (scipy.stats.norm), within the binomial error."""
    g, bank, launch, pop, vlos_true, w = world
    t = make_mock(g, launch, SEL, _errors(sigma), 3000, 11, bank=bank, solar="v4.0", include_truth=True)
    assert np.all(t["vlos"] >= CUT)
    expected = float(np.sum(w * norm.sf(CUT, loc=vlos_true, scale=sigma)))
    got = t.meta["measured_cut_pass_fraction"]
    examined = 3000 / got
    assert abs(got - expected) < 4.0 * np.sqrt(expected * (1 - expected) / examined)
    assert 0.2 < expected < 0.8  # a strong cut
    # stars whose true vlos is below the cut scatter in (a true-value cut would drop them), at the
    # rate of the Gaussian tail: sum over true vlos < c of w_i Phi((vlos_i - c) / sigma), per kept star
    lo = vlos_true < CUT
    share_in = float(np.sum(w[lo] * norm.sf(CUT, loc=vlos_true[lo], scale=sigma))) / expected
    below = int(np.sum(t["true_vlos"] < CUT))
    assert below > 0 and abs(below - 3000 * share_in) < 4.0 * np.sqrt(3000 * share_in) + 1
    assert t.meta["selection"]["vlos_min"] == CUT
    assert "vlos_min to the measured value" in t.meta["selection_applied_to"]
    assert t.meta["selection_removed"]["vlos_min (measured)"] == round(examined) - 3000


def test_scattering_across_the_cut_balances_to_first_order(world):
    """The scheme of swerve.likelihood ("Selection on measured velocities"): on the mock
    population, the share kept by the measured cut, Z, equals the share kept by the true-value
    cut the emulator is trained with, F, to second order in the error, while the share each way
    scattered across the cut is first order (so renormalising by the out-scattered share alone
    would be the larger error). Both from the Gaussian tail (scipy.stats.norm)."""
    *_, vlos_true, w = world
    above = vlos_true >= CUT
    F = float(np.sum(w[above]))
    for sigma in (10.0, 30.0, 100.0):
        Z = float(np.sum(w * norm.sf(CUT, loc=vlos_true, scale=sigma)))
        out = float(np.sum(w[above] * norm.cdf(CUT, loc=vlos_true[above], scale=sigma)))
        into = float(np.sum(w[~above] * norm.sf(CUT, loc=vlos_true[~above], scale=sigma)))
        assert out > 0 and into > 0
        assert abs(Z - F) == pytest.approx(abs(into - out), abs=1e-12)
        assert abs(Z - F) < 0.25 * out, (sigma, Z - F, out)


def test_selection_of_a_mock_round_trips_through_its_ecsv(world, tmp_path):
    from swerve.population import write_mock
    from swerve.selection import declared_selection

    g, bank, launch, *_ = world
    t = make_mock(g, launch, SEL, _errors(10.0), 50, 2, bank=bank, solar="v4.0")
    for ext in ("ecsv", "fits"):
        write_mock(t, tmp_path / f"m.{ext}")
        assert declared_selection(Table.read(tmp_path / f"m.{ext}").meta) == SEL


def test_mock_refuses_a_cut_that_keeps_no_star(world):
    g, bank, launch, *_ = world
    with pytest.raises(ValueError, match="vlos_min = 9000: only 0 of .* measured stars pass"):
        make_mock(g, launch, Selection(r_min=10.0, r_max=60.0, vlos_min=9000.0), _errors(10.0), 5, 1, bank=bank)


def test_mock_without_a_measured_cut_is_unchanged(world):
    """No measured cut: the catalog says its selection was applied to true values only and
    records no measured-cut pass fraction."""
    g, bank, launch, *_ = world
    plain = Selection(r_min=10.0, r_max=60.0)
    a = make_mock(g, launch, plain, _errors(10.0), 30, 4, bank=bank)
    assert "measured_cut_pass_fraction" not in a.meta
    assert a.meta["selection_applied_to"] == "true positions and velocities"


# ------------------------------------------------------------------------------------ refusals
def test_declared_selection_must_match_the_emulators():
    emu_none = Selection().to_dict()
    emu_800 = Selection(vlos_min=800.0).to_dict()
    check_declared({"selection": Selection(vlos_min=800.0).to_dict()}, emu_800, "cat.ecsv")
    check_declared({}, emu_800, "cat.ecsv")  # nothing declared: nothing to check
    check_declared({"selection": Selection(r_min=20.0, d_max=50.0).to_dict()}, emu_none)  # spatial cuts differ: fine
    for meta, emu, words in (
        ({"selection": {"vlos_min": 400.0}}, emu_none, "declares vlos_min = 400 km/s .* trained with no vlos_min cut"),
        ({"selection": {"vlos_min": 400.0}}, emu_800, "trained with vlos_min = 800 km/s: .*; train an emulator with "
                                                      r"\[selection\] vlos_min = 400"),
        ({"selection": {}}, emu_800, "declares no vlos_min cut .* without the vlos_min cut"),
        ({"selection": {"v_min": 600.0}}, emu_none, "v_min = 600 km/s"),
        ({"selection": {"vlos_min": 400.0}}, None, "no vlos_min cut"),
    ):
        with pytest.raises(ValueError, match=words) as e:
            check_declared(meta, emu, "cat.ecsv")
        assert str(e.value).startswith("cat.ecsv: ") and "\n" not in str(e.value)
    with pytest.raises(ValueError, match="expected a table of cuts"):
        check_declared({"selection": "vlos>400"}, emu_none, "cat.ecsv")
    with pytest.raises(ValueError, match="unknown selection key 'vlos_mn'.*vlos_min"):
        check_declared({"selection": {"vlos_mn": 400.0}}, emu_none, "cat.ecsv")


class _Emu:
    parameter_names = ["a"]
    bounds = np.array([[0.0, 1.0]])

    def __init__(self, metadata):
        self.metadata = metadata


def test_likelihood_keyword_checks_the_emulators_cut():
    from swerve.likelihood import check_measured_cut

    assert check_measured_cut(_Emu({"selection": {"vlos_min": 800.0}}), 800) == 800.0
    assert check_measured_cut(_Emu({}), None) is None
    for meta, words in (({"selection": {"vlos_min": None}}, "trained with no vlos_min cut"),
                        ({"selection": {"vlos_min": 700.0}}, "trained with vlos_min = 700 km/s"),
                        ({}, "records no selection")):
        with pytest.raises(ValueError, match=words):
            check_measured_cut(_Emu(meta), 800.0)
    with pytest.raises(ValueError, match="finite"):
        check_measured_cut(_Emu({"selection": {}}), float("nan"))


def test_stars_measured_below_the_cut_are_excluded_with_the_reason(world):
    from swerve.catalog import catalog_from_table
    from swerve.likelihood import prepare_stars
    from swerve.measurement import draw_samples
    from swerve.summaries import SummarySpec

    g, bank, launch, *_ = world
    t = make_mock(g, launch, Selection(r_min=10.0, r_max=60.0), _errors(10.0), 40, 6, bank=bank, solar="v4.0")
    cat = catalog_from_table(t, source="mock")
    spec = SummarySpec(r_edges=(10.0, 60.0), lat_edges=(0.0, 90.0))
    rng = np.random.default_rng(1)
    terms = prepare_stars(cat, draw_samples(cat, 4, rng, solar="v4.0"), spec, solar="v4.0", vlos_min=CUT,
                          allow_empty=True)
    low = {str(i) for i, v in zip(t["id"], t["vlos"]) if v < CUT}
    assert 0 < len(low) < len(t)
    why = {e["id"]: e["reason"] for e in terms.excluded}
    assert low <= set(why) and all("below the selection's vlos_min = 700 km/s" in why[i] for i in low)
    assert not low & set(map(str, terms.ids))


# ----------------------------------------------------------------------------- end to end
TINY = """
[galaxy]
model = "swerve-mw-1"
halo_flattening = "density"
infer = {{ q_z = [0.8, 1.2] }}
[launch]
model = "power-law"
infer = {{ slope = [-1.0, 0.0] }}
fixed = {{ v_min = 700.0, v_max = 3000.0 }}
points_per_galaxy = 2
[selection]
r_min = 10.0
r_max = 100.0
outgoing = true
{cut}
[summaries]
r_edges = [10.0, 30.0, 100.0]
lat_edges = [0.0, 90.0]
min_ess = 20.0
n_boot = 8
[bank]
n_orbits = 400
dt = 2.0
replicates = 2
[design]
size = 6
held_out_size = 2
seed = 3
[emulator]
n_restarts = 0
"""


@pytest.fixture(scope="module")
def tiny_cut_emulator(tmp_path_factory):
    """A two-parameter emulator trained with ``[selection] vlos_min = 800`` (a few seconds)."""
    d = tmp_path_factory.mktemp("tinycut")
    (d / "t.toml").write_text(TINY.format(cut="vlos_min = 800.0"))
    assert main(["train", str(d / "t.toml"), "--out", str(d / "run"), "--no-progress", "--jobs", "1"]) == 0
    return d / "run" / "emulator"


def test_train_mock_and_refusal_round_trip(tiny_cut_emulator, tmp_path):
    """``swerve train`` records the cut; ``swerve mock --cut vlos_min=800`` declares it; the
    declared selection matches that emulator and is refused by one trained without the cut."""
    meta = json.loads((tiny_cut_emulator / "emulator.json").read_text())["metadata"]
    assert meta["selection"]["vlos_min"] == 800.0 and meta["config"]["selection"]["vlos_min"] == 800.0
    out = tmp_path / "m.ecsv"
    assert main(["mock", "--n", "60", "--seed", "2", "--out", str(out), "--cut", "r_max=100",
                 "--cut", "vlos_min=800", "--error-vlos", "20", "--bank-size", "300"]) == 0
    t = Table.read(out)
    assert np.all(t["vlos"] >= 800.0) and t.meta["selection"]["vlos_min"] == 800.0
    check_declared(t.meta, meta["selection"], str(out))
    with pytest.raises(ValueError, match="trained with no vlos_min cut"):
        check_declared(t.meta, dict(meta["selection"], vlos_min=None), str(out))
    # the likelihood's keywords with that emulator: stars and cut checked, a finite log-likelihood
    from swerve.catalog import read_catalog
    from swerve.emulate import load
    from swerve.likelihood import Likelihood, prepare_stars
    from swerve.measurement import draw_samples
    from swerve.summaries import SummarySpec

    emu = load(tiny_cut_emulator)
    spec = SummarySpec.from_dict(meta["summaries"])
    cat = read_catalog(out)
    terms = prepare_stars(cat, draw_samples(cat, 8, np.random.default_rng(0), solar="v4.0"), spec, solar="v4.0",
                          vlos_min=800.0)
    like = Likelihood(emu, terms, spec, vlos_min=800.0)
    assert np.isfinite(like(np.mean(emu.bounds, axis=1)))
    with pytest.raises(ValueError, match="trained with vlos_min = 800 km/s"):
        Likelihood(emu, terms, spec, vlos_min=700.0)


@pytest.mark.slow
def test_fit_of_a_measured_cut_mock_covers_the_truth(tiny_cut_emulator):
    """A 400-star mock cut at vlos_min = 800 km/s on the measured vlos (errors 30 km/s), fitted
    with the emulator trained with that cut on the true vlos and the plain likelihood: the truth
    lies inside the 95% intervals."""
    from swerve import inference
    from swerve.catalog import catalog_from_table
    from swerve.emulate import load
    from swerve.fit import load_fit_config

    emu = load(tiny_cut_emulator)
    g = Galaxy.from_name("swerve-mw-1", halo_flattening="density", q_z=0.95)
    launch = BoundedPowerLawSpeed(700.0, 3000.0, -0.5)
    sel = Selection(r_min=10.0, r_max=100.0, outgoing=True, vlos_min=800.0)
    t = make_mock(g, launch, sel, _errors(30.0), 400, 8, bank_size=2000, solar="v4.0")
    check_declared(t.meta, emu.metadata["selection"], "mock")
    cfg = load_fit_config(None, {"sampler": {"method": "laplace-is"}})
    res = inference.fit_catalog(catalog_from_table(t, source="mock"), emu, cfg)
    for name, true in (("q_z", 0.95), ("slope", -0.5)):
        lo, hi = res.interval(name, 95)
        assert lo <= true <= hi, (name, lo, hi)
