"""Tests of swerve.frames against astropy and published values (see shared REFERENCES.md)."""

import json

import numpy as np
import pytest
from astropy import units as u
from astropy.coordinates import ICRS, Galactic, Galactocentric, SkyCoord

from swerve import frames
from swerve.frames import (
    DEFAULT_SOLAR,
    SolarParameters,
    folded_v_theta,
    galactic_coordinates,
    galactic_latitude,
    galacto_to_helio,
    helio_to_galacto,
    spherical_components,
)


def _random_stars(n, seed):
    rng = np.random.default_rng(seed)
    return dict(
        ra=rng.uniform(0.0, 360.0, n),
        dec=np.rad2deg(np.arcsin(rng.uniform(-1.0, 1.0, n))),
        distance=rng.uniform(0.5, 120.0, n),
        pmra=rng.normal(0.0, 2.0, n),
        pmdec=rng.normal(0.0, 2.0, n),
        vlos=rng.normal(0.0, 300.0, n),
    )


def _astropy_galacto(s, frame):
    c = SkyCoord(
        ra=s["ra"] * u.deg,
        dec=s["dec"] * u.deg,
        distance=s["distance"] * u.kpc,
        pm_ra_cosdec=s["pmra"] * u.mas / u.yr,
        pm_dec=s["pmdec"] * u.mas / u.yr,
        radial_velocity=s["vlos"] * u.km / u.s,
    ).transform_to(frame)
    return c.cartesian.xyz.to_value(u.kpc).T, c.velocity.d_xyz.to_value(u.km / u.s).T


# --- solar parameters -------------------------------------------------------------------------


def test_default_solar_parameters_are_astropy_v4():
    # astropy's "v4.0" set, as listed in REFERENCES.md.
    s = SolarParameters.from_name(DEFAULT_SOLAR)
    assert DEFAULT_SOLAR == "v4.0"
    assert s.name == "v4.0"
    assert s.galcen_distance_kpc == pytest.approx(8.122, rel=1e-12)
    assert s.galcen_v_sun_kms == pytest.approx((12.9, 245.6, 7.78), rel=1e-12)
    assert s.z_sun_kpc == pytest.approx(0.0208, rel=1e-12)
    assert s.roll_deg == 0.0
    pre = SolarParameters.from_name("pre-v4.0")
    assert pre.galcen_distance_kpc == pytest.approx(8.3, rel=1e-12)
    assert pre.galcen_v_sun_kms == pytest.approx((11.1, 232.24, 7.25), rel=1e-12)


def test_solar_dict_round_trip_is_json_safe():
    for s in (SolarParameters.from_name("v4.0"), SolarParameters.custom(galcen_distance_kpc=8.3, roll_deg=1.0)):
        d = json.loads(json.dumps(s.to_dict()))
        back = SolarParameters.from_dict(d)
        assert back == s
        assert back.to_dict() == s.to_dict()


def test_custom_accepts_quantities():
    s = SolarParameters.custom(galcen_distance_kpc=8200 * u.pc, z_sun_kpc=25 * u.pc, galcen_v_sun_kms=[10, 240, 7] * u.km / u.s)
    assert s.galcen_distance_kpc == pytest.approx(8.2, rel=1e-14)
    assert s.z_sun_kpc == pytest.approx(0.025, rel=1e-14)
    assert s.galcen_v_sun_kms == (10.0, 240.0, 7.0)
    assert s.name == "custom"


def test_to_astropy_matches_astropy_registry():
    from astropy.coordinates import galactocentric_frame_defaults

    for name in ("v4.0", "pre-v4.0"):
        frame = SolarParameters.from_name(name).to_astropy()
        assert isinstance(frame, Galactocentric)
        ref = Galactocentric(**galactocentric_frame_defaults.get_from_registry(name)["parameters"])
        c = SkyCoord(ra=[10.0, 250.0] * u.deg, dec=[-30.0, 60.0] * u.deg, distance=[3.0, 40.0] * u.kpc,
                     pm_ra_cosdec=[1.0, -2.0] * u.mas / u.yr, pm_dec=[0.5, 0.1] * u.mas / u.yr,
                     radial_velocity=[100.0, -300.0] * u.km / u.s)
        a, b = c.transform_to(frame), c.transform_to(ref)
        np.testing.assert_allclose(a.cartesian.xyz.value, b.cartesian.xyz.value, rtol=1e-14)
        np.testing.assert_allclose(a.velocity.d_xyz.value, b.velocity.d_xyz.value, rtol=1e-14)


def test_bad_solar_name_lists_known_names():
    with pytest.raises(ValueError, match=r"v4\.0.*") as err:
        SolarParameters.from_name("v9.9")
    assert "v9.9" in str(err.value) and "pre-v4.0" in str(err.value) and "v4.0" in str(err.value)
    with pytest.raises(ValueError, match="known names"):
        helio_to_galacto(0.0, 0.0, 1.0, 0.0, 0.0, 0.0, solar="latest")


def test_bad_solar_values_raise():
    with pytest.raises(ValueError, match="galcen_distance_kpc"):
        SolarParameters.custom(galcen_distance_kpc=-1.0)
    with pytest.raises(ValueError, match="galcen_v_sun_kms"):
        SolarParameters.custom(galcen_v_sun_kms=(1.0, 2.0))
    with pytest.raises(ValueError, match="unknown keys"):
        SolarParameters.from_dict({**SolarParameters.from_name().to_dict(), "colour": 1})


# --- transforms against astropy ---------------------------------------------------------------


@pytest.mark.parametrize("solar", ["v4.0", "pre-v4.0", SolarParameters.custom(galcen_distance_kpc=8.0, z_sun_kpc=0.05, roll_deg=3.0, galcen_v_sun_kms=(-11.0, 250.0, 9.0))])
def test_helio_to_galacto_matches_astropy(solar):
    s = _random_stars(3000, seed=11)
    pos, vel = helio_to_galacto(s["ra"], s["dec"], s["distance"], s["pmra"], s["pmdec"], s["vlos"], solar=solar)
    p_ref, v_ref = _astropy_galacto(s, frames.resolve_solar(solar).to_astropy())
    assert pos.shape == (3000, 3) and vel.shape == (3000, 3)
    rel_p = np.linalg.norm(pos - p_ref, axis=1) / np.linalg.norm(p_ref, axis=1)
    rel_v = np.linalg.norm(vel - v_ref, axis=1) / np.linalg.norm(v_ref, axis=1)
    assert rel_p.max() < 1e-9
    assert rel_v.max() < 1e-9


def test_galacto_to_helio_matches_astropy():
    rng = np.random.default_rng(5)
    pos = rng.normal(0.0, 40.0, (2000, 3))
    vel = rng.normal(0.0, 400.0, (2000, 3))
    h = galacto_to_helio(pos, vel)
    c = SkyCoord(
        x=pos[:, 0] * u.kpc, y=pos[:, 1] * u.kpc, z=pos[:, 2] * u.kpc,
        v_x=vel[:, 0] * u.km / u.s, v_y=vel[:, 1] * u.km / u.s, v_z=vel[:, 2] * u.km / u.s,
        frame=SolarParameters.from_name().to_astropy(),
    ).transform_to(ICRS())
    cosd = np.cos(np.deg2rad(h["dec"]))
    dra = (h["ra"] - c.ra.deg + 180.0) % 360.0 - 180.0
    assert np.max(np.abs(dra) * cosd) < 1e-9
    np.testing.assert_allclose(h["dec"], c.dec.deg, rtol=0, atol=1e-9)
    np.testing.assert_allclose(h["distance"], c.distance.to_value(u.kpc), rtol=1e-12)
    np.testing.assert_allclose(h["parallax"], 1.0 / c.distance.to_value(u.kpc), rtol=1e-12)
    scale_pm = np.max(np.abs(c.pm_dec.to_value(u.mas / u.yr)))
    np.testing.assert_allclose(h["pmra"], c.pm_ra_cosdec.to_value(u.mas / u.yr), rtol=1e-9, atol=1e-10 * scale_pm)
    np.testing.assert_allclose(h["pmdec"], c.pm_dec.to_value(u.mas / u.yr), rtol=1e-9, atol=1e-10 * scale_pm)
    np.testing.assert_allclose(h["vlos"], c.radial_velocity.to_value(u.km / u.s), rtol=1e-9, atol=1e-9)


def test_round_trip_helio_galacto_helio():
    s = _random_stars(100_000, seed=3)
    pos, vel = helio_to_galacto(s["ra"], s["dec"], s["distance"], s["pmra"], s["pmdec"], s["vlos"])
    h = galacto_to_helio(pos, vel)
    cosd = np.cos(np.deg2rad(s["dec"]))
    dra = (h["ra"] - s["ra"] + 180.0) % 360.0 - 180.0
    assert np.max(np.abs(dra) * cosd) < 1e-9  # deg on the sky (ra is ill-defined at the poles)
    np.testing.assert_allclose(h["dec"], s["dec"], rtol=0, atol=1e-9)
    np.testing.assert_allclose(h["distance"], s["distance"], rtol=1e-9)
    for key, scale in (("pmra", 2.0), ("pmdec", 2.0), ("vlos", 300.0)):
        np.testing.assert_allclose(h[key], s[key], rtol=1e-9, atol=1e-9 * scale)


def test_astropy_doctest_position():
    # astropy Galactocentric doctest: ICRS (158.3122, -17.3) deg at 11.5 kpc.
    pos, vel = helio_to_galacto(158.3122, -17.3, 11.5, 0.0, 0.0, 0.0)
    np.testing.assert_allclose(pos[0], [-9.43489286, -9.40062188, 6.51345359], rtol=0, atol=6e-9)
    # and with Quantities at the boundary
    pos_q, _ = helio_to_galacto(158.3122 * u.deg, -17.3 * u.deg, 11.5e3 * u.pc, 0 * u.mas / u.yr, 0 * u.mas / u.yr, 0 * u.km / u.s)
    np.testing.assert_allclose(pos_q, pos, rtol=1e-14)
    with pytest.raises(ValueError, match="pmra_masyr"):
        helio_to_galacto(158.3, -17.3, 11.5, 1 * u.km / u.s, 0.0, 0.0)


def test_galactic_centre_at_rest_reflex_motion():
    # A point at rest at the Galactic Centre seen with "v4.0": computed with astropy
    # (REFERENCES.md): mu_l cos b = -6.3789, mu_b = -0.2029 mas/yr, v_r = -12.88 km/s.
    # Reid & Brunthaler 2020 (ApJ 892, 39) measure -6.411 +- 0.008 and -0.219 +- 0.007 mas/yr.
    h = galacto_to_helio(np.zeros((1, 3)), np.zeros((1, 3)))
    assert h["distance"][0] == pytest.approx(8.122, rel=1e-12)
    assert h["vlos"][0] == pytest.approx(-12.88, abs=0.005)
    g = SkyCoord(
        ra=h["ra"] * u.deg, dec=h["dec"] * u.deg, distance=h["distance"] * u.kpc,
        pm_ra_cosdec=h["pmra"] * u.mas / u.yr, pm_dec=h["pmdec"] * u.mas / u.yr,
        radial_velocity=h["vlos"] * u.km / u.s,
    ).transform_to(Galactic())
    mul = g.pm_l_cosb.to_value(u.mas / u.yr)[0]
    mub = g.pm_b.to_value(u.mas / u.yr)[0]
    assert mul == pytest.approx(-6.3789, abs=5e-4)
    assert mub == pytest.approx(-0.2029, abs=5e-4)
    # within ~0.5% and 0.02 mas/yr of the measurement (the solar parameters are not fit to it)
    assert abs(mul - (-6.411)) < 0.05 and abs(mub - (-0.219)) < 0.03


def test_a_million_stars_vectorised():
    """A million stars in one call (the speed itself is measured in benchmarks/frames.py)."""
    s = _random_stars(1_000_000, seed=1)
    pos, vel = helio_to_galacto(s["ra"], s["dec"], s["distance"], s["pmra"], s["pmdec"], s["vlos"])
    h = galacto_to_helio(pos, vel)
    assert h["ra"].shape == (1_000_000,)
    np.testing.assert_allclose(h["distance"], s["distance"], rtol=1e-9)


def test_bad_inputs_raise():
    with pytest.raises(ValueError, match="distance_kpc"):
        helio_to_galacto(10.0, 0.0, -1.0, 0.0, 0.0, 0.0)
    with pytest.raises(ValueError, match=r"pos: expected an array of shape \(n, 3\)"):
        galacto_to_helio(np.zeros((4, 2)), np.zeros((4, 2)))
    with pytest.raises(ValueError, match="vel"):
        galacto_to_helio(np.zeros((4, 3)), np.zeros((3, 3)))


# --- spherical components ---------------------------------------------------------------------


def test_spherical_radial_velocity_equals_speed():
    rng = np.random.default_rng(2)
    pos = rng.normal(0.0, 30.0, (1000, 3))
    speed = rng.uniform(100.0, 2000.0, 1000)
    vel = pos / np.linalg.norm(pos, axis=1)[:, None] * speed[:, None]
    c = spherical_components(pos, vel)
    np.testing.assert_allclose(c["v_r"], speed, rtol=1e-13)
    np.testing.assert_allclose(c["v_theta"], 0.0, atol=1e-10)
    np.testing.assert_allclose(c["v_phi"], 0.0, atol=1e-10)
    np.testing.assert_allclose(folded_v_theta(pos, vel), 0.0, atol=1e-10)
    np.testing.assert_allclose(c["r"], np.linalg.norm(pos, axis=1), rtol=1e-14)


def test_spherical_analytic_cases():
    # In the plane on +x: theta = pi/2, phi = 0; theta-hat = -z, phi-hat = +y.
    c = spherical_components([[5.0, 0.0, 0.0], [0.0, 5.0, 0.0]], [[1.0, 2.0, 3.0], [1.0, 2.0, 3.0]])
    np.testing.assert_allclose(c["theta"], [np.pi / 2, np.pi / 2], atol=1e-15)
    np.testing.assert_allclose(c["phi"], [0.0, np.pi / 2], atol=1e-15)
    np.testing.assert_allclose(c["v_r"], [1.0, 2.0], atol=1e-14)
    np.testing.assert_allclose(c["v_theta"], [-3.0, -3.0], atol=1e-14)
    np.testing.assert_allclose(c["v_phi"], [2.0, -1.0], atol=1e-14)
    # At 45 deg latitude above +x: theta-hat = (cos45, 0, -sin45).
    c = spherical_components([1.0, 0.0, 1.0], [1.0, 0.0, -1.0])
    assert c["theta"][0] == pytest.approx(np.pi / 4, abs=1e-15)
    assert c["v_theta"][0] == pytest.approx(np.sqrt(2.0), rel=1e-14)
    assert c["v_r"][0] == pytest.approx(0.0, abs=1e-14)
    # Circular motion in the plane: v_phi = speed.
    phi = np.linspace(-3, 3, 7)
    pos = np.stack([8 * np.cos(phi), 8 * np.sin(phi), np.zeros(7)], axis=1)
    vel = np.stack([-220 * np.sin(phi), 220 * np.cos(phi), np.zeros(7)], axis=1)
    np.testing.assert_allclose(spherical_components(pos, vel)["v_phi"], 220.0, rtol=1e-14)
    np.testing.assert_allclose(spherical_components(pos, vel)["phi"], phi, atol=1e-14)


def test_spherical_against_astropy_representation():
    from astropy.coordinates import (
        CartesianDifferential,
        CartesianRepresentation,
        PhysicsSphericalDifferential,
        PhysicsSphericalRepresentation,
    )

    rng = np.random.default_rng(8)
    pos = rng.normal(0, 20, (500, 3))
    vel = rng.normal(0, 300, (500, 3))
    rep = CartesianRepresentation(pos.T * u.kpc, differentials=CartesianDifferential(vel.T * u.km / u.s))
    sph = rep.represent_as(PhysicsSphericalRepresentation, PhysicsSphericalDifferential)
    d = sph.differentials["s"]
    r = sph.r.to_value(u.kpc)
    v_theta = (d.d_theta * sph.r).to_value(u.km / u.s, equivalencies=u.dimensionless_angles())
    v_phi = (d.d_phi * sph.r * np.sin(sph.theta)).to_value(u.km / u.s, equivalencies=u.dimensionless_angles())
    c = spherical_components(pos, vel)
    np.testing.assert_allclose(c["theta"], sph.theta.to_value(u.rad), rtol=1e-12)
    np.testing.assert_allclose(c["v_r"], d.d_r.to_value(u.km / u.s), rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(c["v_theta"], v_theta, rtol=1e-10, atol=1e-10)
    np.testing.assert_allclose(c["v_phi"], v_phi, rtol=1e-10, atol=1e-10)
    assert r.shape == c["r"].shape


def test_folded_v_theta_toward_plane_is_positive():
    # North (z > 0) moving toward the plane (-z), south moving toward the plane (+z): both +.
    pos = np.array([[10.0, 0.0, 10.0], [10.0, 0.0, -10.0], [10.0, 0.0, 10.0], [10.0, 0.0, -10.0]])
    vel = np.array([[0.0, 0.0, -1.0], [0.0, 0.0, 1.0], [0.0, 0.0, 1.0], [0.0, 0.0, -1.0]])
    f = folded_v_theta(pos, vel)
    np.testing.assert_allclose(f, [np.sqrt(0.5), np.sqrt(0.5), -np.sqrt(0.5), -np.sqrt(0.5)], rtol=1e-14)
    # z == 0 counts as northern: folded equals v_theta (here -3, moving toward +z).
    assert folded_v_theta([8.0, 0.0, 0.0], [0.0, 0.0, 3.0])[0] == pytest.approx(-3.0, rel=1e-14)


def test_spherical_at_origin_is_nan():
    c = spherical_components(np.zeros((1, 3)), np.ones((1, 3)))
    assert c["r"][0] == 0.0
    assert np.isnan(c["theta"][0]) and np.isnan(c["v_r"][0]) and np.isnan(c["v_theta"][0])


# --- galactic latitude --------------------------------------------------------------------------


def test_galactic_coordinates_match_astropy():
    s = _random_stars(5000, seed=4)
    l, b = galactic_coordinates(s["ra"], s["dec"])
    g = SkyCoord(ra=s["ra"] * u.deg, dec=s["dec"] * u.deg).galactic
    np.testing.assert_allclose(b, g.b.deg, rtol=0, atol=1e-10)
    dl = (l - g.l.deg + 180.0) % 360.0 - 180.0
    assert np.max(np.abs(dl) * np.cos(np.deg2rad(b))) < 1e-10
    np.testing.assert_allclose(galactic_latitude(s["ra"], s["dec"]), b, rtol=0, atol=0)
    # North Galactic pole (ICRS 192.8595, 27.1283, from astropy) has b close to 90.
    assert galactic_latitude(192.85948, 27.12825) == pytest.approx(90.0, abs=1e-3)
