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


def test_round_trip_and_equality():
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
    ],
)
def test_bad_cuts(kwargs, fragment):
    with pytest.raises(ValueError, match=fragment):
        Selection(**kwargs)


def test_unknown_key_suggests():
    with pytest.raises(ValueError, match="did you mean 'r_max'"):
        Selection.from_dict({"r_mx": 3.0})
