"""Selection cuts: each against a direct computation, serialisation, bad input."""

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import CartesianDifferential, CartesianRepresentation, Galactocentric, SkyCoord

from swerve.galaxy import Galaxy
from swerve.selection import EmptySelectionError, Selection


@pytest.fixture
def stars(rng):
    n = 4000
    pos = rng.normal(size=(n, 3)) * 40.0
    vel = rng.normal(size=(n, 3)) * 400.0
    return pos, vel


def test_radius_and_outgoing(stars):
    pos, vel = stars
    sel = Selection(r_min=10.0, r_max=80.0, outgoing=True)
    mask, removed = sel.apply(pos, vel, report=True)
    r = np.linalg.norm(pos, axis=1)
    vr = np.sum(pos * vel, axis=1) / r
    expected = (r >= 10) & (r <= 80) & (vr > 0)
    np.testing.assert_array_equal(mask, expected)
    assert sum(removed.values()) == len(pos) - expected.sum()


def test_unbound_uses_galaxy_escape_speed(stars):
    pos, vel = stars
    g = Galaxy.default()
    sel = Selection(r_min=None, outgoing=False, unbound=True)
    mask = sel.apply(pos, vel, galaxy=g)
    vesc = np.sqrt(-2 * g.potential(pos))
    np.testing.assert_array_equal(mask, np.linalg.norm(vel, axis=1) > vesc)
    with pytest.raises(ValueError, match="needs a Galaxy"):
        sel.apply(pos, vel)


def test_heliocentric_cuts_agree_with_astropy(stars):
    """Distance, |b| and declination cuts agree with astropy SkyCoord (frame 'v4.0' defaults)."""
    pos, vel = stars
    sel = Selection(r_min=None, outgoing=False, d_min=5.0, d_max=60.0, abs_b_min=20.0, dec_min=-30.0)
    mask = sel.apply(pos, vel, solar="v4.0")
    gc = SkyCoord(
        CartesianRepresentation(pos.T * u.kpc, differentials=CartesianDifferential(vel.T * u.km / u.s)),
        frame=Galactocentric(),
    )
    icrs = gc.icrs
    b = icrs.galactic.b.deg
    d = icrs.distance.to_value(u.kpc)
    expected = (d >= 5) & (d <= 60) & (np.abs(b) >= 20) & (icrs.dec.deg >= -30)
    np.testing.assert_array_equal(mask, expected)


def test_vlos_cut_on_true_values_agrees_with_astropy(stars):
    """vlos_min on true values (a training population) against astropy's heliocentric radial
    velocity (frame 'v4.0' defaults), and the parts a mock splits it into."""
    pos, vel = stars
    sel = Selection(r_min=None, outgoing=False, vlos_min=150.0)
    assert sel.needs_heliocentric and sel.has_measured_cuts
    mask, removed = sel.apply(pos, vel, solar="v4.0", report=True)
    gc = SkyCoord(
        CartesianRepresentation(pos.T * u.kpc, differentials=CartesianDifferential(vel.T * u.km / u.s)),
        frame=Galactocentric(),
    )
    rv = gc.icrs.radial_velocity.to_value(u.km / u.s)
    np.testing.assert_array_equal(mask, rv >= 150.0)
    assert removed["vlos_min"] == int(np.sum(rv < 150.0)) > 0
    np.testing.assert_array_equal(sel.measured_mask(rv), rv >= 150.0)
    assert sel.true_value_cuts() == Selection(r_min=None, outgoing=False)
    assert not Selection(d_max=50.0, vlos_min=1.0).galactocentric().needs_heliocentric
    assert Selection().measured_mask(np.array([-1e3, 1e3])).all()


def test_round_trip_and_equality():
    old = Selection().to_dict()
    del old["vlos_min"]  # an emulator's selection written before the cut existed
    assert Selection.from_dict(old) == Selection()
    assert Selection.from_dict(Selection(vlos_min=400.0).to_dict()).vlos_min == 400.0
    sel = Selection(r_min=15.0, d_max=100.0, unbound=True)
    assert Selection.from_dict(sel.to_dict()) == sel
    assert Selection() != sel


def test_empty_selection_error(stars):
    pos, vel = stars
    sel = Selection(r_min=1e4)
    mask = sel.apply(pos, vel)
    with pytest.raises(EmptySelectionError, match="keeps no star"):
        sel.require_nonempty(mask)


@pytest.mark.parametrize(
    "kwargs, fragment",
    [
        ({"r_min": -1.0}, "r_min"),
        ({"r_min": 50.0, "r_max": 20.0}, "must be below"),
        ({"abs_b_min": 95.0}, "abs_b_min"),
        ({"dec_min": -100.0}, "dec_min"),
        ({"outgoing": "yes"}, "outgoing"),
        ({"v_min": float("nan")}, "v_min"),
        ({"vlos_min": "fast"}, "vlos_min: expected a number"),
        ({"vlos_min": float("inf")}, "vlos_min: expected a finite"),
    ],
)
def test_bad_cuts(kwargs, fragment):
    with pytest.raises(ValueError, match=fragment):
        Selection(**kwargs)


def test_unknown_key_suggests():
    with pytest.raises(ValueError, match="did you mean 'r_max'"):
        Selection.from_dict({"r_mx": 3.0})
