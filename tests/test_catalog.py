"""Tests of swerve.catalog: reading, validation, error propagation."""

from __future__ import annotations

import math

import numpy as np
import pytest
import tomllib
from astropy import units as u
from astropy.table import MaskedColumn, Table
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from swerve.catalog import (
    COLUMNS,
    Catalog,
    CatalogError,
    Problem,
    catalog_from_table,
    options_from_config,
    parse_columns,
    parse_units,
    read_catalog,
)
from swerve.measurement import draw_samples

WRITE_FORMAT = {"ecsv": "ascii.ecsv", "fits": "fits", "vot": "votable", "csv": "ascii.csv"}


def make_table(n=4, *, parallax=False, distance=True, units=True, corr=True):
    """A valid catalog table with astropy units (values chosen by hand)."""
    t = Table()
    t["id"] = [f"hvs{i + 1}" for i in range(n)]
    ra = np.linspace(10.0, 350.0, n)
    dec = np.linspace(-60.0, 70.0, n)

    def add(name, values, unit):
        t[name] = np.asarray(values, dtype=float) * (unit if units else 1)

    add("ra", ra, u.deg)
    add("dec", dec, u.deg)
    if distance:
        add("distance", np.linspace(20.0, 80.0, n), u.kpc)
        add("distance_err", np.linspace(1.0, 4.0, n), u.kpc)
    if parallax:
        add("parallax", np.linspace(0.5, 0.2, n), u.mas)
        add("parallax_err", np.full(n, 0.02), u.mas)
    add("pmra", np.linspace(-1.0, 1.0, n), u.mas / u.yr)
    add("pmra_err", np.full(n, 0.05), u.mas / u.yr)
    add("pmdec", np.linspace(0.5, -0.5, n), u.mas / u.yr)
    add("pmdec_err", np.full(n, 0.04), u.mas / u.yr)
    add("vlos", np.linspace(300.0, 600.0, n), u.km / u.s)
    add("vlos_err", np.full(n, 5.0), u.km / u.s)
    if corr:
        t["corr_pmra_pmdec"] = np.linspace(-0.3, 0.4, n)
        if parallax:
            t["corr_parallax_pmra"] = np.full(n, 0.2)
            t["corr_parallax_pmdec"] = np.full(n, -0.1)
    return t


def write(tmp_path, table, ext="ecsv", name="demo"):
    path = tmp_path / f"{name}.{ext}"
    table.write(path, format=WRITE_FORMAT[ext], overwrite=True)
    return path


def problems_of(path_or_table, **kw):
    with pytest.raises(CatalogError) as info:
        if isinstance(path_or_table, Table):
            catalog_from_table(path_or_table, source="demo", **kw)
        else:
            read_catalog(path_or_table, **kw)
    return info.value.problems


# ------------------------------------------------------------------------------------------
# reading


@pytest.mark.parametrize("ext", ["ecsv", "fits", "vot", "csv"])
def test_round_trip(tmp_path, ext):
    t = make_table(5, parallax=True)
    t["mag_g"] = np.arange(5.0)  # an extra column
    cat = read_catalog(write(tmp_path, t, ext))
    assert isinstance(cat, Catalog)
    assert cat.n == 5
    assert list(cat.ids) == list(t["id"])
    for name in ("ra", "dec", "distance", "distance_err", "parallax", "parallax_err", "pmra",
                 "pmra_err", "pmdec", "pmdec_err", "vlos", "vlos_err", "corr_pmra_pmdec",
                 "corr_parallax_pmra", "corr_parallax_pmdec"):
        np.testing.assert_allclose(getattr(cat, name), np.asarray(t[name]), rtol=1e-12, err_msg=name)
    np.testing.assert_array_equal(cat.extra["mag_g"], np.arange(5.0))
    np.testing.assert_array_equal(cat.rows, np.arange(1, 6))
    assert cat.problems == () and cat.dropped_rows == ()
    assert cat.source.endswith(f"demo.{ext}")


def test_integer_ids_and_missing_corr_default_to_zero(tmp_path):
    t = make_table(3, corr=False)
    t["id"] = [7, 8, 9]
    cat = read_catalog(write(tmp_path, t, "fits"))
    assert list(cat.ids) == ["7", "8", "9"]
    np.testing.assert_array_equal(cat.corr_pmra_pmdec, 0.0)


def test_txt_is_read_as_csv(tmp_path):
    path = tmp_path / "demo.txt"
    make_table(2, units=False).write(path, format="ascii.csv")
    cat = read_catalog(path)
    np.testing.assert_allclose(cat.vlos, np.asarray(make_table(2)["vlos"]))


def test_covariance_matrix():
    cat = catalog_from_table(make_table(2, parallax=True))
    cov = cat.covariance()
    assert cov.shape == (2, 3, 3)
    # (parallax_err, pmra_err, pmdec_err) = (0.02, 0.05, 0.04); corr_parallax_pmra = 0.2
    assert math.isclose(cov[0, 0, 1], 0.2 * 0.02 * 0.05, rel_tol=1e-12)
    assert math.isclose(cov[1, 2, 1], 0.4 * 0.05 * 0.04, rel_tol=1e-12)
    assert math.isclose(cov[0, 2, 2], 0.04**2, rel_tol=1e-12)


def test_units_converted_from_file(tmp_path):
    t = make_table(3, parallax=True)
    t["distance"] = t["distance"].to(u.pc)
    t["distance_err"] = t["distance_err"].to(u.pc)
    t["parallax"] = t["parallax"].to(u.arcsec)
    t["parallax_err"] = t["parallax_err"].to(u.uas)
    t["pmra"] = t["pmra"].to(u.arcsec / u.yr)
    t["vlos"] = t["vlos"].to(u.m / u.s)
    t["ra"] = t["ra"].to(u.rad)
    cat = read_catalog(write(tmp_path, t, "ecsv"))
    ref = make_table(3, parallax=True)
    for name in ("distance", "distance_err", "parallax", "parallax_err", "pmra", "vlos", "ra"):
        np.testing.assert_allclose(getattr(cat, name), np.asarray(ref[name]), rtol=1e-12, err_msg=name)
    assert cat.units["distance"] == "pc"
    assert cat.units["vlos"] == "m / s"


def test_csv_units_option_and_defaults(tmp_path):
    t = make_table(3, units=False)
    t["distance"] = np.asarray(t["distance"]) * 1000.0  # pc in the file
    t["distance_err"] = np.asarray(t["distance_err"]) * 1000.0
    path = write(tmp_path, t, "csv")
    ref = make_table(3)
    for units in ("distance=pc", {"distance": "pc"}, {"distance": u.pc, "distance_err": "pc"}):
        cat = read_catalog(path, units=units)
        np.testing.assert_allclose(cat.distance, np.asarray(ref["distance"]), rtol=1e-12)
        np.testing.assert_allclose(cat.distance_err, np.asarray(ref["distance_err"]), rtol=1e-12)
        np.testing.assert_allclose(cat.pmra, np.asarray(ref["pmra"]), rtol=1e-12)  # default mas/yr
    # the documented default kpc would make them 20-80 Mpc away: refused with a hint at pc
    probs = problems_of(path)
    assert probs[0].column == "distance" and "pc read as kpc" in str(probs[0])
    assert "--units distance=pc" in probs[0].expected


def test_column_mapping(tmp_path):
    t = make_table(3)
    t.rename_columns(["ra", "dec", "pmra_err"], ["RA_deg", "DE_deg", "e_pmRA"])
    path = write(tmp_path, t, "ecsv")
    ref = make_table(3)
    for columns in ("ra=RA_deg,dec=DE_deg,pmra_err=e_pmRA",
                    {"ra": "RA_deg", "dec": "DE_deg", "pmra_err": "e_pmRA"}):
        cat = read_catalog(path, columns=columns)
        np.testing.assert_allclose(cat.ra, np.asarray(ref["ra"]))
        np.testing.assert_allclose(cat.pmra_err, np.asarray(ref["pmra_err"]))
    probs = problems_of(path)  # without the mapping: three missing columns
    assert {(p.column, p.what) for p in probs} == {
        ("ra", "missing column"), ("dec", "missing column"), ("pmra_err", "missing column")}


def test_options_from_toml_config(tmp_path):
    text = """
    [catalog]
    columns = { ra = "RA_deg" }
    units = "distance=pc"
    drop_invalid = true
    """
    opts = options_from_config(tomllib.loads(text)["catalog"])
    assert opts["columns"] == {"ra": "RA_deg"}
    assert opts["units"]["distance"] == u.pc
    assert opts["drop_invalid"] is True
    t = make_table(2, units=False)
    t.rename_column("ra", "RA_deg")
    t["distance"] = np.asarray(t["distance"]) * 1000.0
    cat = read_catalog(write(tmp_path, t, "csv"), **opts)
    np.testing.assert_allclose(cat.distance, np.asarray(make_table(2)["distance"]))
    with pytest.raises(ValueError, match="unknown key"):
        options_from_config({"colums": {}})
    with pytest.raises(ValueError, match="drop_invalid"):
        options_from_config({"drop_invalid": "yes"})


def test_option_parsing_errors():
    assert parse_columns("ra=RA, dec = DE") == {"ra": "RA", "dec": "DE"}
    assert parse_units("pmra=mas/yr")["pmra"] == u.mas / u.yr
    with pytest.raises(ValueError, match="neither name=value nor a preset"):
        parse_columns("ra")
    with pytest.raises(ValueError, match="not of the form"):
        parse_columns("dec=DE,ra")
    with pytest.raises(ValueError, match="unknown column name"):
        parse_columns("rightasc=RA")
    with pytest.raises(ValueError, match="not a unit"):
        parse_units("distance=parsecs_of_doom")
    with pytest.raises(ValueError, match="is not a length"):
        parse_units("distance=km/s")
    with pytest.raises(ValueError, match="more than one"):
        parse_columns("ra=X,dec=X")


# ------------------------------------------------------------------------------------------
# validation: each problem type


def one_problem(table_or_path, **kw):
    probs = problems_of(table_or_path, **kw)
    assert len(probs) == 1, [str(p) for p in probs]
    return probs[0]


def test_problem_message_format():
    t = make_table(4)
    t["pmra_err"][2] = -0.1
    p = one_problem(t)
    assert (p.row, p.id, p.column) == (3, "hvs3", "pmra_err")
    assert str(p) == "demo: row 3 (id 'hvs3'), column 'pmra_err': value -0.1, expected a positive uncertainty"


def test_missing_required_column():
    t = make_table(3)
    t.remove_column("vlos_err")
    p = one_problem(t)
    assert p.column == "vlos_err" and p.row is None and p.what == "missing column"


def test_missing_distance_and_parallax():
    t = make_table(3)
    t.remove_columns(["distance", "distance_err"])
    p = one_problem(t)
    assert p.column == "distance" and "parallax" in p.expected


def test_missing_error_column_of_a_pair():
    t = make_table(3)
    t.remove_column("distance_err")
    p = one_problem(t)
    assert p.column == "distance_err" and p.what == "missing column"


def test_wrong_unit(tmp_path):
    t = make_table(3)
    t["vlos"] = np.asarray(t["vlos"]) * u.kpc
    p = one_problem(write(tmp_path, t, "fits"))
    assert p.column == "vlos" and p.row is None and "velocity" in p.expected


def test_missing_unit_required_in_ecsv(tmp_path):
    t = make_table(3)
    t["distance"] = np.asarray(t["distance"])  # no unit
    path = write(tmp_path, t, "ecsv")
    p = one_problem(path)
    assert p.column == "distance" and p.what == "no unit"
    cat = read_catalog(path, units="distance=kpc")
    np.testing.assert_allclose(cat.distance, np.asarray(make_table(3)["distance"]))
    cat = read_catalog(path, require_units=False)  # documented default kpc
    np.testing.assert_allclose(cat.distance, np.asarray(make_table(3)["distance"]))


def test_units_option_disagreeing_with_file(tmp_path):
    # the units= entry for pmdec also applies to pmdec_err, so both disagree with the file
    probs = problems_of(write(tmp_path, make_table(3), "ecsv"), units="pmdec=arcsec/yr")
    assert [p.column for p in probs] == ["pmdec", "pmdec_err"]
    assert all("disagrees" in p.what and p.row is None for p in probs)
    cat = read_catalog(write(tmp_path, make_table(3), "ecsv"), units="pmdec=mas/yr")  # agrees
    assert cat.n == 3


def test_unrecognised_unit(tmp_path):
    path = tmp_path / "u.ecsv"
    write(tmp_path, make_table(2), "ecsv", name="u")
    text = path.read_text().replace("unit: km / s", "unit: furlongs_per_fortnight", 1)
    path.write_text(text)
    probs = problems_of(path)
    assert any(p.column == "vlos" and "not understood" in p.what for p in probs)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_nan_and_infinite_values(bad):
    t = make_table(3)
    t["vlos"][1] = bad
    p = one_problem(t)
    assert (p.row, p.column) == (2, "vlos")
    assert ("missing" in p.what) if np.isnan(bad) else ("finite" in p.expected)


def test_masked_value_and_empty_csv_field(tmp_path):
    t = make_table(3)
    t["pmdec"] = MaskedColumn(np.asarray(t["pmdec"]), mask=[False, False, True], unit=u.mas / u.yr)
    p = one_problem(t)
    assert (p.row, p.column) == (3, "pmdec") and "missing" in p.what
    lines = write(tmp_path, make_table(3, units=False), "csv").read_text().splitlines()
    header = lines[0].split(",")
    cells = lines[2].split(",")
    cells[header.index("pmra")] = ""
    lines[2] = ",".join(cells)
    path = tmp_path / "holes.csv"
    path.write_text("\n".join(lines) + "\n")
    p = one_problem(path)
    assert (p.row, p.column) == (2, "pmra")


def test_text_in_numeric_column(tmp_path):
    t = make_table(3, units=False)
    t["ra"] = ["10.0", "abc", "30"]
    p = one_problem(t)
    assert (p.row, p.column, p.value) == (2, "ra", "abc") and p.expected == "a number"


@pytest.mark.parametrize("err", ["distance_err", "pmra_err", "pmdec_err", "vlos_err"])
def test_non_positive_uncertainty(err):
    t = make_table(3)
    t[err][0] = 0.0
    p = one_problem(t)
    assert (p.row, p.column, p.value) == (1, err, 0.0)


def test_non_positive_parallax_is_a_measurement():
    """A parallax <= 0 is data (Gaia-like catalogs have many): read, not refused, with or
    without a distance; draw_samples decides what it can do with it."""
    t = make_table(3, parallax=True, distance=False)
    t["parallax"][1] = -0.3
    t["parallax"][2] = 0.0
    cat = catalog_from_table(t)
    np.testing.assert_array_equal(cat.parallax, [0.5, -0.3, 0.0])
    assert cat.has_parallax.all()
    t = make_table(3, parallax=True, distance=True)
    t["parallax"][1] = -0.3  # fine beside a distance
    cat = catalog_from_table(t)
    assert cat.parallax[1] == -0.3


def test_row_may_leave_one_pair_empty():
    t = make_table(3, parallax=True)
    t["distance"] = MaskedColumn(np.asarray(t["distance"]), mask=[True, False, False], unit=u.kpc)
    t["distance_err"] = MaskedColumn(np.asarray(t["distance_err"]), mask=[True, False, False], unit=u.kpc)
    cat = catalog_from_table(t)
    np.testing.assert_array_equal(cat.has_distance, [False, True, True])
    np.testing.assert_array_equal(cat.has_parallax, [True, True, True])
    # but not both pairs
    t["parallax"] = MaskedColumn(np.asarray(t["parallax"]), mask=[True, False, False], unit=u.mas)
    t["parallax_err"] = MaskedColumn(np.asarray(t["parallax_err"]), mask=[True, False, False], unit=u.mas)
    probs = problems_of(t)
    assert {p.row for p in probs} == {1}
    assert {p.column for p in probs} == {"distance", "distance_err", "parallax", "parallax_err"}


def test_duplicate_id():
    t = make_table(4)
    t["id"][3] = "hvs2"
    p = one_problem(t)
    assert (p.row, p.column, p.value) == (4, "id", "hvs2") and "row 2" in p.expected


@pytest.mark.parametrize("col,value", [("ra", 360.0), ("ra", -0.1), ("dec", 90.5), ("dec", -91.0)])
def test_coordinates_out_of_range(col, value):
    t = make_table(3)
    t[col][2] = value
    p = one_problem(t)
    assert (p.row, p.column, p.value) == (3, col, value)


def test_dec_edges_allowed():
    t = make_table(3)
    t["dec"][0], t["dec"][1], t["ra"][2] = -90.0, 90.0, 0.0
    assert catalog_from_table(t).n == 3


def test_correlation_out_of_range():
    t = make_table(3)
    t["corr_pmra_pmdec"][0] = 1.2
    p = one_problem(t)
    assert (p.row, p.column, p.value) == (1, "corr_pmra_pmdec", 1.2)


def test_covariance_not_positive_definite():
    # each correlation is in [-1, 1], but together they are impossible
    t = make_table(3, parallax=True)
    t["corr_pmra_pmdec"][1] = -0.9
    t["corr_parallax_pmra"][1] = 0.9
    t["corr_parallax_pmdec"][1] = 0.9
    p = one_problem(t)
    assert p.row == 2 and "positive-definite" in p.expected
    lam = np.linalg.eigvalsh(np.array([[1, 0.9, 0.9], [0.9, 1, -0.9], [0.9, -0.9, 1]]))[0]
    assert lam < 0 and math.isclose(p.value, lam, rel_tol=1e-9)
    t = make_table(3)
    t["corr_pmra_pmdec"][0] = 1.0  # singular 2x2
    assert one_problem(t).row == 1


def test_all_problems_listed_at_once(tmp_path):
    t = make_table(6)
    t["pmra_err"][0] = -0.1
    t["dec"][1] = 100.0
    t["vlos"][2] = np.nan
    t["id"][4] = "hvs4"
    t["corr_pmra_pmdec"][5] = -3.0
    t.remove_column("vlos_err")
    with pytest.raises(CatalogError) as info:
        read_catalog(write(tmp_path, t, "ecsv"))
    probs = info.value.problems
    got = {(p.row, p.column) for p in probs}
    assert got == {(None, "vlos_err"), (1, "pmra_err"), (2, "dec"), (3, "vlos"), (5, "id"),
                   (6, "corr_pmra_pmdec")}
    lines = str(info.value).splitlines()
    assert len(lines) == len(probs) == 6
    assert all(line.startswith(str(tmp_path / "demo.ecsv") + ": ") for line in lines)
    assert isinstance(info.value, ValueError)


def test_drop_invalid_reports_dropped_rows(tmp_path):
    t = make_table(5)
    t["pmra_err"][1] = -0.1
    t["ra"][3] = 400.0
    t["vlos"][3] = np.inf
    cat = read_catalog(write(tmp_path, t, "ecsv"), drop_invalid=True)
    assert cat.n == 3
    assert list(cat.ids) == ["hvs1", "hvs3", "hvs5"]
    np.testing.assert_array_equal(cat.rows, [1, 3, 5])
    assert cat.dropped_rows == (2, 4)
    assert [(p.row, p.column) for p in cat.problems] == [(2, "pmra_err"), (4, "ra"), (4, "vlos")]
    np.testing.assert_allclose(cat.pmra_err, 0.05)


def test_drop_invalid_still_refuses_column_problems_and_all_bad():
    t = make_table(3)
    t.remove_column("pmdec")
    assert one_problem(t, drop_invalid=True).column == "pmdec"
    t = make_table(2)
    t["vlos_err"] = [-1.0, -2.0] * u.km / u.s
    probs = problems_of(t, drop_invalid=True)
    assert "every row" in probs[-1].what


# ------------------------------------------------------------------------------------------
# unreadable files


def assert_one_line_error(path, fragment):
    with pytest.raises(CatalogError) as info:
        read_catalog(path)
    msg = str(info.value)
    assert "\n" not in msg and msg.startswith(str(path)) and fragment in msg, msg
    # no astropy traceback chained to it
    assert info.value.__cause__ is None
    assert info.value.__context__ is None or info.value.__suppress_context__


def test_unreadable_files(tmp_path):
    (tmp_path / "empty.csv").write_bytes(b"")
    assert_one_line_error(tmp_path / "empty.csv", "empty file")
    (tmp_path / "header.csv").write_text("id,ra,dec,distance,distance_err\n")
    assert_one_line_error(tmp_path / "header.csv", "no data rows")
    (tmp_path / "latin.csv").write_bytes("id,ra\nSt\xe9phane,1\n".encode("latin-1"))
    assert_one_line_error(tmp_path / "latin.csv", "not UTF-8")
    (tmp_path / "junk.fits").write_bytes(b"\x00\x01 definitely not FITS \x02" * 10)
    assert_one_line_error(tmp_path / "junk.fits", "cannot be read")
    (tmp_path / "junk.vot").write_bytes(b"<VOTABLE><RESOURCE><TABLE>")
    assert_one_line_error(tmp_path / "junk.vot", "cannot be read")
    (tmp_path / "junk.ecsv").write_text("# %ECSV 1.0\n# ---\n# datatype: [oops\n")
    assert_one_line_error(tmp_path / "junk.ecsv", "cannot be read")
    (tmp_path / "cat.parquet2").write_text("x")
    assert_one_line_error(tmp_path / "cat.parquet2", "unknown file type")
    assert_one_line_error(tmp_path / "absent.csv", "no such file")


# ------------------------------------------------------------------------------------------
# property-based: malformed input only ever gives CatalogError

_cell = st.one_of(
    st.floats(allow_nan=True, allow_infinity=True).map(repr),
    st.integers(min_value=-10**30, max_value=10**30).map(str),
    st.sampled_from(["", "nan", "inf", "-inf", "1e400", "-1e-400", "abc", "True", '"a,b"', "0x1F", " "]),
    st.text(alphabet=st.characters(blacklist_categories=("Cs",), blacklist_characters=",\n\r\""),
            max_size=6),
)
_names = st.lists(st.sampled_from(list(COLUMNS) + ["extra", "RA"]), min_size=0, max_size=14, unique=True)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(names=_names, nrows=st.integers(0, 4), data=st.data(), junk=st.binary(max_size=40),
       mode=st.sampled_from(["table", "bytes", "prefix"]))
def test_malformed_csv_only_catalog_error(tmp_path, names, nrows, data, junk, mode):
    path = tmp_path / "fuzz.csv"
    if mode == "bytes":
        raw = junk
    else:
        rows = [",".join(names)]
        for _ in range(nrows):
            rows.append(",".join(data.draw(_cell) for _ in names))
        raw = ("\n".join(rows) + "\n").encode("utf-8")
        if mode == "prefix":
            raw = junk + raw
    path.write_bytes(raw)
    try:
        cat = read_catalog(path, drop_invalid=data.draw(st.booleans()))
    except CatalogError as exc:
        assert str(exc)  # a message
        assert all(isinstance(p, Problem) for p in exc.problems)
    else:
        assert isinstance(cat, Catalog) and cat.n >= 1
        assert np.all((cat.ra >= 0) & (cat.ra < 360)) and np.all(cat.pmra_err > 0)


@settings(max_examples=40, deadline=None)
@given(ext=st.sampled_from(["ecsv", "fits", "vot"]), drop=st.sampled_from(list(COLUMNS)),
       bad=st.sampled_from([np.nan, np.inf, -1e308, 1e308, 0.0, -1.0]), row=st.integers(0, 2),
       col=st.sampled_from([c for c in COLUMNS if c != "id"]))
def test_malformed_unit_tables_only_catalog_error(tmp_path_factory, ext, drop, bad, row, col):
    t = make_table(3, parallax=True)
    if col in t.colnames:
        t[col][row] = bad
    if drop in t.colnames and drop != col:
        t.remove_column(drop)
    path = write(tmp_path_factory.mktemp("u"), t, ext)
    try:
        read_catalog(path)
    except CatalogError as exc:
        assert exc.problems


@settings(max_examples=20, deadline=None)
@given(extra=st.dictionaries(
    st.text(alphabet="abcdefghijklmnopqrstuvwxyz_", min_size=1, max_size=8).filter(
        lambda s: s not in COLUMNS),
    st.sampled_from(["float", "str", "int", "nan"]), max_size=4))
def test_valid_table_with_extra_columns_is_read(tmp_path_factory, extra):
    t = make_table(3, parallax=True)
    fill = {"float": [1.5, 2.5, 3.5], "str": ["a", "", "c"], "int": [1, 2, 3], "nan": [np.nan] * 3}
    for name, kind in extra.items():
        t[name] = fill[kind]
    cat = read_catalog(write(tmp_path_factory.mktemp("x"), t, "ecsv"))
    assert cat.n == 3 and set(cat.extra) == set(extra)


# ------------------------------------------------------------------------------------------
# error samples


def single_star(**over):
    t = make_table(1, parallax=True)
    for key, value in over.items():
        t[key][0] = value
    return catalog_from_table(t)


def test_sampled_pm_correlation_matches_input():
    cat = single_star(corr_pmra_pmdec=0.6, pmra_err=0.3, pmdec_err=0.1)
    s = draw_samples(cat, 40000, np.random.default_rng(1))
    r = np.corrcoef(s.pmra[0], s.pmdec[0])[0, 1]
    # standard error of r is (1 - rho^2)/sqrt(k) = 0.0013; 5 sigma
    assert abs(r - 0.6) < 5 * (1 - 0.36) / math.sqrt(40000)
    np.testing.assert_allclose(s.pmra[0].std(), 0.3, rtol=0.02)
    np.testing.assert_allclose(s.pmdec[0].std(), 0.1, rtol=0.02)
    np.testing.assert_allclose(s.vlos[0].std(), 5.0, rtol=0.02)
    np.testing.assert_allclose(s.pmra[0].mean(), cat.pmra[0], atol=5 * 0.3 / 200)
    assert not s.from_parallax[0]
    np.testing.assert_array_equal(s.log_prior, 0.0)


def test_sampled_parallax_correlations_match_input():
    cat = single_star(corr_pmra_pmdec=0.3, corr_parallax_pmra=0.5, corr_parallax_pmdec=-0.4,
                      parallax=0.5, parallax_err=0.02)
    s = draw_samples(cat, 40000, np.random.default_rng(2), distance_source="parallax")
    plx = 1.0 / s.distance[0]
    c = np.corrcoef(np.vstack([plx, s.pmra[0], s.pmdec[0]]))
    tol = 5 / math.sqrt(40000)
    assert abs(c[0, 1] - 0.5) < tol and abs(c[0, 2] + 0.4) < tol and abs(c[1, 2] - 0.3) < tol
    np.testing.assert_allclose(plx.std(), 0.02, rtol=0.02)
    assert s.from_parallax[0]
    np.testing.assert_array_equal(s.log_prior, 0.0)  # "none": flat in parallax
    kappa = 4.740470463533348  # km/s per kpc mas/yr (IAU year conventions, common practice)
    np.testing.assert_allclose(s.log_jacobian, 2 * np.log(kappa * s.distance), rtol=1e-9)


def test_truncated_distance_gaussian_matches_analytic_mean():
    from scipy.stats import truncnorm

    cat = single_star(distance=1.0, distance_err=0.8)
    s = draw_samples(cat, 50000, np.random.default_rng(3))
    assert np.all(s.distance > 0)
    ref = truncnorm.mean(-1.0 / 0.8, np.inf, loc=1.0, scale=0.8)
    sd = truncnorm.std(-1.25, np.inf, loc=1.0, scale=0.8)
    assert abs(s.distance.mean() - ref) < 5 * sd / math.sqrt(5e4)


def test_none_prior_refuses_poor_parallax():
    cat = single_star(parallax=0.1, parallax_err=0.05)
    with pytest.raises(ValueError, match=r"star 'hvs1'.*fractional error 0.5"):
        draw_samples(cat, 10, np.random.default_rng(0), distance_source="parallax")


@pytest.mark.parametrize("prior,kw", [("exponential-length", {"length_scale": 5.0}),
                                      ("uniform-volume", {"max_distance": 20.0})])
def test_prior_weights_reproduce_posterior_of_distance(prior, kw):
    """Weighted samples of d must follow pi(d) N(plx | 1/d, sigma) J(d), computed by quadrature."""
    from scipy.integrate import quad

    plx, sig = 0.15, 0.05  # fractional error 1/3: a poor parallax
    cat = single_star(parallax=plx, parallax_err=sig, corr_parallax_pmra=0.0, corr_parallax_pmdec=0.0)
    s = draw_samples(cat, 200000, np.random.default_rng(4), distance_prior=prior,
                     distance_source="parallax", **kw)
    w = s.weights()[0]
    d = s.distance[0]
    dmax = kw.get("max_distance", np.inf)

    def target(x):
        prior_d = x**2 * math.exp(-x / kw["length_scale"]) if prior == "exponential-length" else x**2
        return prior_d * math.exp(-0.5 * ((plx - 1 / x) / sig) ** 2) * x**2  # J(d) ~ d^2

    hi = min(dmax, 200.0)
    z = quad(target, 0.5, hi, limit=200)[0]
    mean = quad(lambda x: x * target(x), 0.5, hi, limit=200)[0] / z
    ess = s.effective_sample_size()[0]
    assert ess > 1000
    assert abs(np.sum(w * d) - mean) < 0.02 * mean
    assert d.max() <= dmax * (1 + 1e-12)


def test_samples_reproducible_and_shapes():
    cat = catalog_from_table(make_table(4, parallax=True))
    a = draw_samples(cat, 7, np.random.default_rng(5))
    b = draw_samples(cat, 7, np.random.default_rng(5))
    assert a.position.shape == (4, 7, 3) and a.velocity.shape == (4, 7, 3)
    assert a.log_weight.shape == (4, 7)
    np.testing.assert_array_equal(a.velocity, b.velocity)
    np.testing.assert_allclose(a.weights().sum(axis=1), 1.0)
    assert a.settings["solar"]["name"] == "v4.0"
    with pytest.raises(ValueError, match="rng"):
        draw_samples(cat, 7, 5)
    with pytest.raises(ValueError, match="k:"):
        draw_samples(cat, 0, np.random.default_rng(5))
    with pytest.raises(ValueError, match="distance_prior"):
        draw_samples(cat, 7, np.random.default_rng(5), distance_prior="flat")
    # Quantities at the boundary: 5000 pc is the same length scale as 5 kpc
    kw = {"distance_prior": "exponential-length", "distance_source": "parallax"}
    q = draw_samples(cat, 7, np.random.default_rng(5), length_scale=5000 * u.pc, **kw)
    f = draw_samples(cat, 7, np.random.default_rng(5), length_scale=5.0, **kw)
    np.testing.assert_allclose(q.log_weight, f.log_weight, rtol=1e-12)
    assert q.settings["length_scale_kpc"] == pytest.approx(5.0)
    with pytest.raises(ValueError, match="length_scale"):
        draw_samples(cat, 7, np.random.default_rng(5), length_scale=5 * u.km / u.s, **kw)


def test_galactocentric_samples_agree_with_astropy():
    """The same draws pushed through astropy's SkyCoord (v4.0 Galactocentric)."""
    from astropy.coordinates import (
        Galactocentric,
        SkyCoord,
        galactocentric_frame_defaults,
    )

    cat = catalog_from_table(make_table(3, parallax=True))
    s = draw_samples(cat, 2000, np.random.default_rng(6))
    n, k = s.n, s.k
    c = SkyCoord(ra=np.repeat(s.ra, k) * u.deg, dec=np.repeat(s.dec, k) * u.deg,
                 distance=s.distance.ravel() * u.kpc, pm_ra_cosdec=s.pmra.ravel() * u.mas / u.yr,
                 pm_dec=s.pmdec.ravel() * u.mas / u.yr, radial_velocity=s.vlos.ravel() * u.km / u.s,
                 frame="icrs")
    with galactocentric_frame_defaults.set("v4.0"):
        g = c.transform_to(Galactocentric())
    pos = g.cartesian.xyz.to_value(u.kpc).T.reshape(n, k, 3)
    vel = g.velocity.d_xyz.to_value(u.km / u.s).T.reshape(n, k, 3)
    np.testing.assert_allclose(s.position, pos, rtol=0, atol=1e-9)
    np.testing.assert_allclose(s.velocity, vel, rtol=0, atol=1e-7)
    for i in range(n):
        np.testing.assert_allclose(s.velocity[i].mean(axis=0), vel[i].mean(axis=0), atol=1e-8)
        np.testing.assert_allclose(np.cov(s.velocity[i].T), np.cov(vel[i].T), rtol=1e-8, atol=1e-6)


@pytest.mark.parametrize("prior", ["exponential-length", "none"])
def test_weighted_mean_is_the_marginal_likelihood(prior):
    """End to end: for a Gaussian model of the Galactocentric velocity, the weighted mean over a
    star's samples must match, up to a theta-independent factor, the marginal likelihood
    integral p(v | theta) J(d) p(data | d, mu, vlos) pi(d), done here independently: the
    (pmra, pmdec, vlos) integral is analytic at fixed d (v is linear in them; J cancels the
    determinant), the distance integral by quadrature."""
    from scipy.integrate import quad
    from scipy.stats import multivariate_normal

    plx, sig = (0.1, 0.03) if prior != "none" else (0.1, 0.019)
    cat = single_star(ra=150.0, dec=30.0, parallax=plx, parallax_err=sig, corr_parallax_pmra=0.0,
                      corr_parallax_pmdec=0.0, pmra=-0.5, pmra_err=0.05, pmdec=0.3, pmdec_err=0.05,
                      vlos=400.0, vlos_err=10.0, corr_pmra_pmdec=0.3)
    L = 10.0
    s = draw_samples(cat, 200000, np.random.default_rng(8), distance_prior=prior,
                     distance_source="parallax", length_scale=L)
    S = np.diag([120.0, 80.0, 100.0]) ** 2  # model velocity covariance, km/s
    thetas = [np.array([0.0, 0.0, 0.0]), np.array([60.0, -40.0, 30.0])]

    def mc(v0):
        return np.sum(s.weights()[0] * multivariate_normal(v0, S).pdf(s.velocity[0]))

    # The linear map at fixed distance, from astropy (v4.0): v = M diag(kappa d, kappa d, 1) eta + w
    from astropy.coordinates import (
        Galactocentric,
        SkyCoord,
        galactocentric_frame_defaults,
    )

    kappa = 4.740470463533348  # km/s per kpc mas/yr (common practice)
    basis = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]])
    c = SkyCoord(ra=[150.0] * 4 * u.deg, dec=[30.0] * 4 * u.deg, distance=[1.0] * 4 * u.kpc,
                 pm_ra_cosdec=basis[:, 0] * u.mas / u.yr, pm_dec=basis[:, 1] * u.mas / u.yr,
                 radial_velocity=basis[:, 2] * u.km / u.s)
    with galactocentric_frame_defaults.set("v4.0"):
        vg = c.transform_to(Galactocentric()).velocity.d_xyz.to_value(u.km / u.s).T
    w = vg[0]
    M = (vg[1:] - w).T / np.array([kappa, kappa, 1.0])
    eta = np.array([-0.5, 0.3, 400.0])
    C = np.array([[0.05**2, 0.3 * 0.05 * 0.05, 0], [0.3 * 0.05 * 0.05, 0.05**2, 0], [0, 0, 100.0]])

    def ref(v0):
        def f(d):
            A = M * np.array([kappa * d, kappa * d, 1.0])
            Ai = np.linalg.inv(A)
            g = multivariate_normal(Ai @ (v0 - w), Ai @ S @ Ai.T + C).pdf(eta)
            pi = d**2 * math.exp(-d / L) if prior == "exponential-length" else 1.0 / d**2
            return pi * math.exp(-0.5 * ((plx - 1.0 / d) / sig) ** 2) * g
        return quad(f, 1.0, 100.0 * L, limit=400, points=[10.0, 30.0])[0]

    r_mc = mc(thetas[1]) / mc(thetas[0])
    r_ref = ref(thetas[1]) / ref(thetas[0])
    assert abs(r_ref - 1.0) > 0.3  # the two models differ enough to test anything
    assert abs(r_mc / r_ref - 1.0) < 0.01  # MC error about 0.1% at this K (measured)


def test_distance_source_choice():
    t = make_table(3, parallax=True)
    t["distance"] = MaskedColumn(np.asarray(t["distance"]), mask=[True, False, False], unit=u.kpc)
    t["distance_err"] = MaskedColumn(np.asarray(t["distance_err"]), mask=[True, False, False], unit=u.kpc)
    cat = catalog_from_table(t)
    s = draw_samples(cat, 50, np.random.default_rng(9))  # auto
    np.testing.assert_array_equal(s.from_parallax, [True, False, False])
    # a distance star's distance is its Gaussian: mean 50 kpc, sd 2.5 kpc here (row 2)
    assert abs(s.distance[1].mean() - 50.0) < 5 * 2.5 / math.sqrt(50)
    with pytest.raises(ValueError, match=r"star 'hvs1' \(row 1\) has no distance"):
        draw_samples(cat, 5, np.random.default_rng(9), distance_source="distance")
    t2 = make_table(2, parallax=True)
    t2["parallax"][1] = -0.1  # allowed beside a distance, but cannot give one
    with pytest.raises(ValueError, match=r"star 'hvs2'.*not positive"):
        draw_samples(catalog_from_table(t2), 5, np.random.default_rng(9), distance_source="parallax")


# ------------------------------------------------------------------------------------------
# parallaxes as data: negative and low signal-to-noise parallaxes under a distance prior


def _quadrature_posterior(plx, sig, prior, L=10.0, dmax=300.0):
    """Posterior of the distance, pi(d) N(plx | 1/d, sig), normalised by direct quadrature on
    the prior's support, written here independently of swerve (Bailer-Jones 2015, PASP 127,
    994: uniform-volume and exponentially decreasing space density priors)."""
    from scipy.integrate import quad

    hi = dmax if prior == "uniform-volume" else 100.0 * L

    def dens(d):
        pr = d * d * math.exp(-d / L) if prior == "exponential-length" else d * d
        return pr * math.exp(-0.5 * ((plx - 1.0 / d) / sig) ** 2)

    # break points where the integrand changes fastest: near 1/plx and the prior's scale
    pts = sorted({x for x in (1.0 / plx if plx > 0 else None, L, 2 * L, 4 * L) if x and 0 < x < hi})
    z = quad(dens, 0.0, hi, points=pts, limit=500, epsabs=0)[0]

    def cdf(x):
        return quad(dens, 0.0, x, points=[p for p in pts if p < x], limit=500, epsabs=0)[0] / z

    return dens, z, cdf


@pytest.mark.parametrize("prior", ["exponential-length", "uniform-volume"])
@pytest.mark.parametrize("plx,sig", [(-0.12, 0.1), (0.0, 0.05), (0.03, 0.06), (0.15, 0.05), (0.08, 0.004)])
def test_parallax_posterior_samples_match_quadrature(prior, plx, sig):
    """Weighted draws of d (weights exp(log_prior)) follow pi(d) N(plx | 1/d, sig): compared
    with the posterior CDF by quadrature at five distances, for negative, zero, low and high
    signal-to-noise parallaxes. The proposal is tabulated from the posterior, so the weights
    are nearly even (effective sample size > 95% of K)."""
    L, dmax, k = 10.0, 300.0, 40000
    cat = single_star(parallax=plx, parallax_err=sig, corr_parallax_pmra=0.0, corr_parallax_pmdec=0.0)
    s = draw_samples(cat, k, np.random.default_rng(11), distance_prior=prior, distance_source="parallax",
                     length_scale=L, max_distance=dmax)
    w = np.exp(s.log_prior[0] - s.log_prior[0].max())
    w /= w.sum()
    assert 1.0 / np.sum(w * w) > 0.95 * k
    d = s.distance[0]
    assert d.min() > 0 and d.max() <= (dmax if prior == "uniform-volume" else 100 * L) * (1 + 1e-12)
    _, _, cdf = _quadrature_posterior(plx, sig, prior, L, dmax)
    order = np.argsort(d)
    cum = np.cumsum(w[order])
    for q in (0.1, 0.3, 0.5, 0.7, 0.9):
        x = d[order][np.searchsorted(cum, q)]  # the weighted sample quantile q
        # the CDF of the exact posterior at the sample quantile: q within sampling error
        # (sd of a quantile's CDF value sqrt(q(1-q)/K) <= 0.0025; 5 sd)
        assert abs(cdf(x) - q) < 0.0125, (q, x, cdf(x))


@pytest.mark.parametrize("plx,sig,L", [(-0.05, 0.1, 1.35), (0.1, 0.05, 10.0), (0.02, 0.04, 30.0),
                                       (0.5, 0.02, 10.0), (-0.3, 0.2, 5.0)])
def test_exponential_prior_mode_is_bailer_jones_cubic_root(plx, sig, L):
    """The mode of the distance posterior under the exponentially decreasing space density
    prior solves d^3/L - 2 d^2 + (plx/sig^2) d - 1/sig^2 = 0 (Bailer-Jones 2015, PASP 127, 994;
    the cubic from memory, and checked: setting d/dd [2 ln d - d/L - (plx - 1/d)^2 / (2 sig^2)]
    = 0 and multiplying by -d^3 gives it). swerve's posterior density (parallax_log_posterior
    moved to distance) and its weighted samples must peak there."""
    from swerve.measurement import parallax_log_posterior

    roots = np.roots([1.0 / L, -2.0, plx / sig**2, -1.0 / sig**2])
    real = roots[np.abs(roots.imag) < 1e-9].real
    real = real[(real > 0) & (real < 100 * L)]

    def logp(d):
        return parallax_log_posterior(1.0 / d, plx, sig, "exponential-length", length_scale=L) - 2 * np.log(d)

    mode = real[np.argmax(logp(real))]  # with three real roots, the higher of the two maxima
    grid = np.geomspace(1e-3, 100 * L, 400001)
    g = grid[np.argmax(logp(grid))]
    assert abs(g - mode) < 3e-5 * mode  # the grid's relative spacing is 2.3e-5
    # and the weighted samples' distance posterior puts its highest density there too
    cat = single_star(parallax=plx, parallax_err=sig, corr_parallax_pmra=0.0, corr_parallax_pmdec=0.0)
    s = draw_samples(cat, 200000, np.random.default_rng(12), distance_prior="exponential-length",
                     distance_source="parallax", length_scale=L)
    w = np.exp(s.log_prior[0] - s.log_prior[0].max())
    edges = np.geomspace(mode / 3, mode * 3, 41)
    h, _ = np.histogram(s.distance[0], bins=edges, weights=w)
    dens = h / np.diff(edges)
    peak = np.sqrt(edges[:-1] * edges[1:])[np.argmax(dens)]
    assert abs(np.log(peak / mode)) < 2 * np.log(3) / 40 + 1e-12  # within two bins


def test_none_prior_refuses_negative_parallax_and_names_the_fix():
    cat = single_star(parallax=-0.2, parallax_err=0.1, distance=np.nan, distance_err=np.nan)
    with pytest.raises(ValueError, match=r"not positive.*--distance-prior.*1 of 1 parallax star"):
        draw_samples(cat, 10, np.random.default_rng(0))
    # the same star under a volume prior: its distance is drawn, weighted
    s = draw_samples(cat, 10, np.random.default_rng(0), distance_prior="exponential-length")
    assert s.from_parallax[0] and np.all(np.isfinite(s.log_weight))


def test_parallax_zero_point(tmp_path):
    t = make_table(3, parallax=True, distance=False)
    path = write(tmp_path, t, "ecsv")
    ref = read_catalog(path)
    cat = read_catalog(path, parallax_zero_point=-0.017)  # Gaia EDR3's global offset (Lindegren+ 2021)
    np.testing.assert_allclose(cat.parallax, ref.parallax + 0.017, rtol=0, atol=1e-15)
    np.testing.assert_array_equal(cat.parallax_err, ref.parallax_err)
    assert cat.meta["swerve_parallax_zero_point_mas"] == -0.017
    assert "swerve_parallax_zero_point_mas" not in ref.meta  # nothing applied by default
    q = read_catalog(path, parallax_zero_point=-17 * u.uas)
    np.testing.assert_allclose(q.parallax, cat.parallax, rtol=1e-12)
    assert options_from_config({"parallax_zero_point": -0.017})["parallax_zero_point"] == -0.017
    for bad in (float("nan"), "0.01", 1 * u.km, True):
        with pytest.raises(ValueError, match="parallax_zero_point"):
            read_catalog(path, parallax_zero_point=bad)
    # the samples see the corrected parallax: same draws, shifted true parallax mean
    a = draw_samples(ref, 20000, np.random.default_rng(3), distance_source="parallax")
    b = draw_samples(cat, 20000, np.random.default_rng(3), distance_source="parallax")
    shift = np.mean(1 / b.distance, axis=1) - np.mean(1 / a.distance, axis=1)
    np.testing.assert_allclose(shift, 0.017, atol=5 * 0.02 / math.sqrt(20000))


def test_distance_information_counts_prior_dominated_stars():
    from swerve.measurement import distance_information, distance_warning

    t = make_table(6, parallax=True)
    t["parallax"] = [0.5, 0.04, -0.02, 0.0, 0.3, 0.05]
    t["parallax_err"] = [0.02, 0.02, 0.02, 0.02, 0.1, 0.01]  # S/N 25, 2, -1, 0, 3, 5
    t["distance"] = MaskedColumn(np.asarray(t["distance"]), mask=[True, True, True, True, False, True],
                                 unit=u.kpc)
    t["distance_err"] = MaskedColumn(np.asarray(t["distance_err"]), mask=t["distance"].mask, unit=u.kpc)
    cat = catalog_from_table(t)
    info = distance_information(cat)
    assert (info["from_distance"], info["from_parallax"], info["prior_dominated"],
            info["non_positive_parallax"]) == (1, 5, 3, 2)
    assert info["prior_dominated_ids"] == ["hvs2", "hvs3", "hvs4"]
    text = distance_warning(cat, "exponential-length")
    assert text.startswith("3 of 6 stars") and "exponential-length" in text  # half: not "most"
    assert distance_info_most(cat, distance_warning)
    assert distance_warning(catalog_from_table(make_table(3)), "none") is None  # distances only
    with pytest.raises(ValueError, match="distance_source"):
        distance_information(cat, "nearest")


def distance_info_most(cat, distance_warning):
    text = distance_warning(cat, "uniform-volume", distance_source="parallax", min_snr=30.0)
    return text.startswith("most distances are prior-dominated: 6 of 6 stars") and "--distance-prior" in text
