"""Gaia-style input, parallaxes as data and implausible values (issues #23.3, #23.4, #24.3, #24.5).

Gaia column names are those of the Gaia DR3 documentation, gaia_source data model (from
memory): source_id, ra, dec, parallax, parallax_error, pmra, pmra_error, pmdec, pmdec_error,
radial_velocity, radial_velocity_error, pmra_pmdec_corr, parallax_pmra_corr,
parallax_pmdec_corr; units deg, mas, mas/yr, km/s.
"""

from __future__ import annotations

import csv
import math

import numpy as np
import pytest
from astropy import units as u
from astropy.table import Table

from swerve.catalog import COLUMN_PRESETS, CatalogError, catalog_from_table, parse_columns, read_catalog
from swerve.cli import main

# 64-bit source ids that a float64 cannot hold (their neighbours differ in the last digits)
BIG_IDS = [6917528997577384321, 6917528997577384323, 4295806720, 2**62 + 1, 5937083312263887616 + 7]

GAIA_COLUMNS = ["source_id", "ra", "dec", "parallax", "parallax_error", "pmra", "pmra_error", "pmdec",
                "pmdec_error", "radial_velocity", "radial_velocity_error", "pmra_pmdec_corr",
                "parallax_pmra_corr", "parallax_pmdec_corr", "phot_g_mean_mag"]


def gaia_rows(n=5, seed=3):
    """A Gaia-like list of candidates (invented values): parallaxes of S/N about 0-3, some < 0."""
    rng = np.random.default_rng(seed)
    rows = []
    for i in range(n):
        plx = [0.05, -0.04, 0.01, 0.12, -0.2][i % 5]
        rows.append([BIG_IDS[i % len(BIG_IDS)] + 10 * (i // len(BIG_IDS)), (20.0 + 60.0 * i) % 360.0,
                     -30.0 + 15.0 * i, plx, 0.08, rng.normal(0, 0.5), 0.1, rng.normal(0, 0.5), 0.09,
                     400.0 + 50.0 * i, 8.0, 0.2, -0.1, 0.05, 17.0 + 0.1 * i])
    return rows


def write_gaia_csv(path, rows, columns=GAIA_COLUMNS):
    with open(path, "w", newline="") as fh:
        w = csv.writer(fh)
        w.writerow(columns)
        w.writerows(rows)
    return path


# ------------------------------------------------------------------------- the gaia preset ---
def test_gaia_preset_names():
    m = parse_columns("gaia")
    assert m == COLUMN_PRESETS["gaia"]
    assert m["id"] == "source_id" and m["vlos"] == "radial_velocity" and m["vlos_err"] == "radial_velocity_error"
    assert (m["parallax_err"], m["pmra_err"], m["pmdec_err"]) == ("parallax_error", "pmra_error", "pmdec_error")
    assert (m["corr_pmra_pmdec"], m["corr_parallax_pmra"], m["corr_parallax_pmdec"]) == (
        "pmra_pmdec_corr", "parallax_pmra_corr", "parallax_pmdec_corr")
    assert parse_columns("gaia, vlos=rv_template")["vlos"] == "rv_template"  # one entry changed
    assert parse_columns("GAIA")["id"] == "source_id"
    with pytest.raises(ValueError, match="preset"):
        parse_columns("hipparcos")


def test_gaia_csv_read_with_ids_kept_whole(tmp_path):
    rows = gaia_rows(5)
    path = write_gaia_csv(tmp_path / "gaia.csv", rows)
    cat = read_catalog(path, columns="gaia")
    assert list(cat.ids) == [str(r[0]) for r in rows]  # every digit, not via a float
    assert str(float(BIG_IDS[0])) != str(BIG_IDS[0]) and int(float(BIG_IDS[0])) != BIG_IDS[0]
    np.testing.assert_allclose(cat.parallax, [r[3] for r in rows])  # negatives kept
    np.testing.assert_allclose(cat.vlos, [r[9] for r in rows])
    np.testing.assert_allclose(cat.corr_parallax_pmra, -0.1)
    np.testing.assert_allclose(cat.corr_pmra_pmdec, 0.2)
    assert cat.units["parallax"] == "mas" and cat.units["vlos"] == "km / s"  # Gaia's units = defaults
    assert "phot_g_mean_mag" in cat.extra
    # ECSV (integer column) and FITS (int64 column) keep them too
    t = Table(rows=rows, names=GAIA_COLUMNS)
    for name, unit in (("ra", u.deg), ("dec", u.deg), ("parallax", u.mas), ("parallax_error", u.mas),
                       ("pmra", u.mas / u.yr), ("pmra_error", u.mas / u.yr), ("pmdec", u.mas / u.yr),
                       ("pmdec_error", u.mas / u.yr), ("radial_velocity", u.km / u.s),
                       ("radial_velocity_error", u.km / u.s)):
        t[name].unit = unit
    assert t["source_id"].dtype == np.int64
    for ext, fmt in (("ecsv", "ascii.ecsv"), ("fits", "fits")):
        t.write(tmp_path / f"gaia.{ext}", format=fmt)
        assert list(read_catalog(tmp_path / f"gaia.{ext}", columns="gaia").ids) == list(cat.ids)


def test_float_source_id_that_lost_digits_is_refused():
    t = Table(rows=gaia_rows(2), names=GAIA_COLUMNS)
    t["source_id"] = t["source_id"].astype(float)  # what a spreadsheet round trip does
    with pytest.raises(CatalogError) as info:
        catalog_from_table(t, columns="gaia", source="g")
    p = info.value.problems[0]
    assert (p.row, p.column, p.source_column) == (1, "id", "source_id") and "2**53" in p.expected
    t["source_id"] = [1.0, 2.0]  # small integral floats are exact: read as "1", "2"
    assert list(catalog_from_table(t, columns="gaia").ids) == ["1", "2"]


# ----------------------------------------------------------------------- plausibility hints ---
def radians_table(n=4):
    t = Table(rows=gaia_rows(n), names=GAIA_COLUMNS)
    t["ra"] = np.radians(t["ra"])
    t["dec"] = np.radians(t["dec"])
    return t


def test_ra_in_radians_is_refused_unless_the_unit_is_stated(tmp_path):
    path = tmp_path / "rad.csv"
    radians_table().write(path, format="ascii.csv")
    with pytest.raises(CatalogError) as info:
        read_catalog(path, columns="gaia")
    (p,) = info.value.problems
    assert p.row is None and p.column == "ra" and "radians read as degrees?" in str(p)
    assert "--units ra=rad,dec=rad" in p.expected
    cat = read_catalog(path, columns="gaia", units="ra=rad,dec=rad")  # converted to degrees
    np.testing.assert_allclose(cat.ra, np.degrees(np.asarray(radians_table()["ra"])), rtol=1e-12)
    cat = read_catalog(path, columns="gaia", units="ra=deg,dec=deg")  # degrees really meant: a hint only
    assert len(cat.hints) == 1 and "radians" in cat.hints[0]
    # two stars near (0, 0) in degrees are not enough to call it radians
    t = radians_table(2)
    assert catalog_from_table(t, columns="gaia").hints == ()


def test_distance_above_a_megaparsec_hints_at_pc(tmp_path):
    t = Table({"id": ["a", "b"], "ra": [10.0, 20.0], "dec": [5.0, -5.0], "distance": [40.0, 52000.0],
               "distance_err": [4.0, 5000.0], "pmra": [0.1, 0.0001], "pmra_err": [0.05, 0.05],
               "pmdec": [0.0, 0.0], "pmdec_err": [0.05, 0.05], "vlos": [500.0, 600.0], "vlos_err": [5.0, 5.0]})
    t.write(tmp_path / "d.csv", format="ascii.csv")
    with pytest.raises(CatalogError) as info:
        read_catalog(tmp_path / "d.csv")
    p = info.value.problems[0]
    assert p.column == "distance" and "1 of 2 distances above 1 Mpc" in str(p) and "pc read as kpc?" in str(p)
    cat = read_catalog(tmp_path / "d.csv", units="distance=kpc")  # stated: a hint, not a refusal
    assert "above 1 Mpc" in cat.hints[0]


@pytest.mark.parametrize("column,value,what", [
    ("radial_velocity", 1e300, "speed below the speed of light"),
    ("radial_velocity", -299792.458, "speed below the speed of light"),
    ("radial_velocity_error", 3e5, "uncertainty below the speed of light"),
    ("pmra", 7e7, "faster than light beyond 1 pc"),
])
def test_speed_of_light_refused(column, value, what):
    t = Table(rows=gaia_rows(3), names=GAIA_COLUMNS)
    t[column][1] = value
    with pytest.raises(CatalogError) as info:
        catalog_from_table(t, columns="gaia", source="g")
    (p,) = info.value.problems
    assert p.row == 2 and p.source_column == column and what in p.expected


def test_total_speed_at_the_distance_refused():
    # 1 mas/yr at 80 Mpc... and, within range, 200 mas/yr at 400 kpc: 3.8e5 km/s
    t = Table({"id": ["a", "b"], "ra": [10.0, 20.0], "dec": [5.0, -5.0], "distance": [40.0, 400.0],
               "distance_err": [4.0, 40.0], "pmra": [0.1, 200.0], "pmra_err": [0.05, 0.05],
               "pmdec": [0.0, 0.0], "pmdec_err": [0.05, 0.05], "vlos": [500.0, 600.0], "vlos_err": [5.0, 5.0]})
    with pytest.raises(CatalogError) as info:
        catalog_from_table(t)
    (p,) = info.value.problems
    kappa = 4.740470463533348  # km/s per kpc mas/yr (common practice)
    assert p.row == 2 and "total speed" in str(p)
    assert float(p.value) == pytest.approx(math.hypot(kappa * 400.0 * 200.0, 600.0), rel=1e-9)


# --------------------------------------------------------------- files that are not catalogs ---
def test_duplicate_column_name_refused(tmp_path):
    text = ("id,ra,ra,dec,distance,distance_err,pmra,pmra_err,pmdec,pmdec_err,vlos,vlos_err\n"
            "a,10,11,5,40,4,0.1,0.05,0.0,0.05,500,5\n")
    (tmp_path / "dup.csv").write_text(text)
    with pytest.raises(CatalogError) as info:
        read_catalog(tmp_path / "dup.csv")
    msg = str(info.value)
    assert "\n" not in msg and "dup.csv" in msg and "column 'ra' appears 2 times" in msg
    # ECSV: the header line names it twice as well
    t = Table({"id": ["a"], "ra": [10.0] * u.deg})
    t.write(tmp_path / "one.ecsv", format="ascii.ecsv")
    lines = (tmp_path / "one.ecsv").read_text().splitlines()
    head = [i for i, ln in enumerate(lines) if not ln.startswith("#")][0]
    lines[head] = "id ra ra"
    lines[head + 1] = lines[head + 1] + " 11.0"
    (tmp_path / "dup.ecsv").write_text("\n".join(lines) + "\n")
    with pytest.raises(CatalogError, match="column 'ra' appears 2 times"):
        read_catalog(tmp_path / "dup.ecsv")


def test_directory_named_as_such(tmp_path):
    (tmp_path / "stars.csv").mkdir()
    with pytest.raises(CatalogError, match="a directory, not a catalog file"):
        read_catalog(tmp_path / "stars.csv")
    with pytest.raises(CatalogError, match="a directory, not a catalog file"):
        read_catalog(tmp_path)


def test_row_numbers_are_the_same_in_every_format(tmp_path):
    """Row 1 is the first data row in CSV, ECSV and FITS alike (the header is not counted)."""
    t = Table(rows=gaia_rows(4), names=GAIA_COLUMNS)
    t["pmra_error"][2] = -0.1  # the third data row
    t["pmra_error"].unit = t["pmra"].unit = t["pmdec"].unit = t["pmdec_error"].unit = u.mas / u.yr
    for name in ("ra", "dec"):
        t[name].unit = u.deg
    t["parallax"].unit = t["parallax_error"].unit = u.mas
    t["radial_velocity"].unit = t["radial_velocity_error"].unit = u.km / u.s
    rows = set()
    for ext, fmt in (("csv", "ascii.csv"), ("ecsv", "ascii.ecsv"), ("fits", "fits")):
        t.write(tmp_path / f"r.{ext}", format=fmt)
        with pytest.raises(CatalogError) as info:
            read_catalog(tmp_path / f"r.{ext}", columns="gaia")
        (p,) = info.value.problems
        assert p.column == "pmra_err" and str(p).count("row 3 (id '") == 1
        rows.add(p.row)
    assert rows == {3}
    # in the CSV, row 3 is the file's fourth line (one header line)
    line = (tmp_path / "r.csv").read_text().splitlines()[3]
    assert line.startswith(str(t["source_id"][2]) + ",")


# ------------------------------------------------------------------------- the command line ---
def test_fit_refuses_faster_than_light_in_one_line(tmp_path, capsys):
    rows = gaia_rows(3)
    rows[1][9] = 1e300
    path = write_gaia_csv(tmp_path / "c.csv", rows)
    out = tmp_path / "fit-out"
    assert main(["fit", str(path), "--columns", "gaia", "--out", str(out)]) == 1
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "row 2" in err[0] and "radial_velocity" in err[0] and "speed of light" in err[0]
    assert not out.exists()


def test_fit_with_duplicate_column_and_directory(tmp_path, capsys):
    (tmp_path / "dup.csv").write_text("id,ra,ra\na,1,2\n")
    assert main(["fit", str(tmp_path / "dup.csv"), "--out", str(tmp_path / "o")]) == 1
    err = capsys.readouterr().err
    assert "dup.csv" in err and "'ra' appears 2 times" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "o").exists()
    (tmp_path / "stars.csv").mkdir()
    assert main(["fit", str(tmp_path / "stars.csv"), "--out", str(tmp_path / "o")]) == 1
    err = capsys.readouterr().err
    assert "stars.csv" in err and ("folder" in err or "directory" in err) and len(err.strip().splitlines()) == 1


def test_fit_warns_when_distances_are_prior_dominated(tmp_path, capsys):
    """A parallax-only catalog of S/N < 5: `swerve fit` says how many distances are set by the
    prior before it starts; under --distance-prior none such stars are refused, naming the fix."""
    path = write_gaia_csv(tmp_path / "g.csv", gaia_rows(5))
    out = tmp_path / "o"
    assert main(["fit", str(path), "--columns", "gaia", "--distance-prior", "none", "--out", str(out),
                 "--no-progress"]) == 1
    cap = capsys.readouterr()
    text = cap.out + cap.err
    assert "most distances are prior-dominated: 5 of 5 stars" in text and "(2 of them <= 0)" in text
    assert "--distance-prior" in cap.err and "5 of 5 parallax star(s)" in cap.err


def test_fit_distance_options_reach_the_configuration(capsys):
    from swerve.cli import build_parser
    from swerve.commands.fit import _overrides

    args = build_parser().parse_args(["fit", "c.csv", "--distance-prior", "exponential-length",
                                      "--length-scale", "15", "--parallax-zero-point", "-0.017"])
    o = _overrides(args)
    assert o["errors"] == {"distance_prior": "exponential-length", "length_scale": 15.0}
    assert o["catalog"]["parallax_zero_point"] == -0.017
    with pytest.raises(SystemExit):
        build_parser().parse_args(["fit", "c.csv", "--distance-prior", "flat"])
    capsys.readouterr()
    sub = next(a for a in build_parser()._actions if a.__class__.__name__ == "_SubParsersAction").choices
    choices = {name: next(a.choices for a in sub[name]._actions if "--distance-prior" in a.option_strings)
               for name in ("fit", "trace")}
    assert tuple(choices["fit"]) == tuple(choices["trace"]) == ("none", "uniform-volume", "exponential-length")


def test_fit_template_documents_the_new_keys(capsys):
    assert main(["fit", "--template"]) == 0
    text = capsys.readouterr().out
    assert "parallax_zero_point" in text and "-0.017" in text and "'gaia'" in text


def test_trace_reads_gaia_names_and_negative_parallaxes(tmp_path, capsys):
    path = write_gaia_csv(tmp_path / "g.csv", gaia_rows(3))
    out = tmp_path / "t.ecsv"
    rc = main(["trace", str(path), "--columns", "gaia", "--distance-prior", "exponential-length",
               "--parallax-zero-point", "-0.017", "--samples", "8", "--max-time", "5", "--no-plot",
               "--no-progress", "--out", str(out)])
    cap = capsys.readouterr()
    assert rc == 0, cap.err
    assert "3 of 3 stars have no independent distance" in cap.err
    t = Table.read(out)
    assert [str(x) for x in t["id"]] == [str(r[0]) for r in gaia_rows(3)]
    assert np.all(np.isfinite(t["distance"]))
