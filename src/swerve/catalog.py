"""Observed catalogs: reading and validation.

Reading
-------
:func:`read_catalog` reads ECSV, FITS, VOTable and CSV files through :mod:`astropy.table`
(the format comes from the file name's extension, see :data:`FORMATS`); :func:`catalog_from_table`
does the same for an in-memory :class:`astropy.table.Table` (a mock catalog, for instance).
The columns swerve reads are listed in :data:`COLUMNS`:

==========================  ================  ==========  ========================================
column                      physical type     default     meaning
==========================  ================  ==========  ========================================
``id``                      (string or int)   --          star identifier, unique
``ra``, ``dec``             angle             deg         ICRS position; ra in [0, 360), dec in [-90, 90]
``distance``                length            kpc         heliocentric distance, > 0
``distance_err``            length            kpc         its 1-sigma uncertainty, > 0
``parallax``                angle             mas         parallax (may be <= 0: a measurement)
``parallax_err``            angle             mas         its 1-sigma uncertainty, > 0
``pmra``, ``pmra_err``      angle / time      mas / yr    proper motion in ra, *including* cos(dec)
``pmdec``, ``pmdec_err``    angle / time      mas / yr    proper motion in dec
``vlos``, ``vlos_err``      velocity          km / s      heliocentric line-of-sight velocity
``corr_pmra_pmdec``         dimensionless     --          correlation coefficient, optional (0)
``corr_parallax_pmra``      dimensionless     --          optional (0)
``corr_parallax_pmdec``     dimensionless     --          optional (0)
==========================  ================  ==========  ========================================

A catalog needs ``distance`` + ``distance_err`` or ``parallax`` + ``parallax_err`` (or both; with
both, a row may leave one pair empty). A parallax may be zero or negative: it is used as a
measurement under a distance prior (:func:`swerve.measurement.draw_samples`);
``parallax_zero_point`` corrects every parallax for a zero point. ``columns="gaia"`` reads
Gaia's own column names (:data:`COLUMN_PRESETS`). Other columns are never an error: they are carried
along, unvalidated, in :attr:`Catalog.extra`. Units come from the file where it has them and
are converted to the units above; a unit of the wrong physical type is a problem. Where the
file has none (CSV) the ``units`` argument (``{"distance": "pc"}``, or the string
``"distance=pc,pmra=mas/yr"``, see :func:`parse_units`) or else the default above applies.
A ``units`` entry for a quantity also applies to its ``_err`` column unless that has its own
entry; likewise an ``_err`` column without a unit in the file takes its quantity's unit from
the file. For formats that carry units (ECSV, FITS,
VOTable) a quantity column with no unit in the file and none in ``units`` is a problem unless
``require_units=False``. Other column names are mapped with ``columns``
(``{"ra": "RA_deg"}``, or ``"ra=RA_deg,dec=DE_deg"``, see :func:`parse_columns`; a config
file's ``[catalog]`` table goes through :func:`options_from_config`).

Validation
----------
Every problem in a file is collected before anything is refused: a :class:`CatalogError`
(a ``ValueError``) carries the list of :class:`Problem` records, one line each in its message.
With ``drop_invalid=True`` rows with problems are dropped instead, and the problems are
returned in :attr:`Catalog.problems` (and logged at WARNING level); problems that concern a
whole column (a missing column, a wrong unit) still refuse the file. Unreadable files raise a
one-line :class:`CatalogError` naming the file (also a directory, and a CSV or ECSV header that
names a column twice). Rows are numbered from the first data row (row 1) in every format.

Values that are numbers in range but implausible are refused too: ra and dec that all look
like radians (ra <= 2 pi, |dec| <= pi/2, three rows or more) or distances above 1 Mpc, where
the unit was not stated (the default was assumed: state it with ``units``; where the file
states the unit they are only warned about, in :attr:`Catalog.hints`), and any speed at or
above the speed of light (a line-of-sight velocity, a proper motion faster than light beyond
1 pc, or the total speed at the star's distance).

What the measurements mean (error samples of each star's true observables, distance priors)
is the measurement model's, :mod:`swerve.measurement`.
"""

from __future__ import annotations

import csv
import logging
import math
import os
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
from astropy import units as u
from astropy.table import Table

__all__ = [
    "COLUMNS",
    "COLUMN_PRESETS",
    "FORMATS",
    "Catalog",
    "CatalogError",
    "Problem",
    "catalog_from_table",
    "options_from_config",
    "parse_columns",
    "parse_units",
    "read_catalog",
]

logger = logging.getLogger(__name__)


@dataclass(frozen=True)
class ColumnSpec:
    """One column swerve reads: its physical type, default unit and whether it is required."""

    name: str
    physical_type: str | None  # None: not a quantity (the id)
    unit: str | None  # default (and internal) unit; None for the id
    required: bool
    description: str


def _spec(name, ptype, unit, required, description):
    return ColumnSpec(name, ptype, unit, required, description)


#: The columns swerve reads, in order, with their physical types and default (internal) units.
COLUMNS: dict[str, ColumnSpec] = {
    s.name: s
    for s in (
        _spec("id", None, None, True, "star identifier (string or integer), unique"),
        _spec("ra", "angle", "deg", True, "ICRS right ascension, in [0, 360)"),
        _spec("dec", "angle", "deg", True, "ICRS declination, in [-90, 90]"),
        _spec("distance", "length", "kpc", False, "heliocentric distance, > 0"),
        _spec("distance_err", "length", "kpc", False, "1-sigma uncertainty of distance, > 0"),
        _spec("parallax", "angle", "mas", False, "parallax"),
        _spec("parallax_err", "angle", "mas", False, "1-sigma uncertainty of parallax, > 0"),
        _spec("pmra", "angular velocity", "mas/yr", True, "proper motion in ra, including cos(dec)"),
        _spec("pmra_err", "angular velocity", "mas/yr", True, "1-sigma uncertainty of pmra, > 0"),
        _spec("pmdec", "angular velocity", "mas/yr", True, "proper motion in dec"),
        _spec("pmdec_err", "angular velocity", "mas/yr", True, "1-sigma uncertainty of pmdec, > 0"),
        _spec("vlos", "velocity", "km/s", True, "heliocentric line-of-sight velocity"),
        _spec("vlos_err", "velocity", "km/s", True, "1-sigma uncertainty of vlos, > 0"),
        _spec("corr_pmra_pmdec", "dimensionless", "", False, "correlation of pmra and pmdec, in [-1, 1]"),
        _spec("corr_parallax_pmra", "dimensionless", "", False, "correlation of parallax and pmra"),
        _spec("corr_parallax_pmdec", "dimensionless", "", False, "correlation of parallax and pmdec"),
    )
}

_QUANTITIES = [name for name, s in COLUMNS.items() if s.physical_type is not None]
_CORRS = ("corr_pmra_pmdec", "corr_parallax_pmra", "corr_parallax_pmdec")
_ERR_OF = {"distance_err": "distance", "parallax_err": "parallax", "pmra_err": "pmra",
           "pmdec_err": "pmdec", "vlos_err": "vlos"}

#: File-name endings (lower case) and the astropy format each is read with.
FORMATS: dict[str, str] = {
    ".ecsv": "ascii.ecsv",
    ".fits": "fits",
    ".fits.gz": "fits",
    ".fit": "fits",
    ".fts": "fits",
    ".vot": "votable",
    ".votable": "votable",
    ".xml": "votable",
    ".csv": "ascii.csv",
    ".txt": "ascii.csv",
}
_UNIT_FORMATS = {"ascii.ecsv", "fits", "votable"}

#: Built-in column mappings ``{our_name: file_column}``, used as ``columns="gaia"``.
#:
#: ``"gaia"``: the column names of Gaia DR3's ``gaia_source`` table (Gaia DR3 documentation,
#: gaia_source data model; names from memory): ``source_id`` (kept whole as the id: a 64-bit
#: integer, never passed through a float), ``ra``, ``dec`` (deg), ``parallax``,
#: ``parallax_error`` (mas), ``pmra``, ``pmra_error``, ``pmdec``, ``pmdec_error`` (mas/yr,
#: pmra including cos(dec)), ``radial_velocity``, ``radial_velocity_error`` (km/s) and the
#: correlations ``pmra_pmdec_corr``, ``parallax_pmra_corr``, ``parallax_pmdec_corr``. Gaia's
#: units are swerve's defaults, so a CSV export needs no ``units``. Gaia's parallaxes are not
#: corrected for their zero point: see ``parallax_zero_point`` of :func:`read_catalog`.
COLUMN_PRESETS: dict[str, dict[str, str]] = {
    "gaia": {
        "id": "source_id",
        "parallax_err": "parallax_error",
        "pmra_err": "pmra_error",
        "pmdec_err": "pmdec_error",
        "vlos": "radial_velocity",
        "vlos_err": "radial_velocity_error",
        "corr_pmra_pmdec": "pmra_pmdec_corr",
        "corr_parallax_pmra": "parallax_pmra_corr",
        "corr_parallax_pmdec": "parallax_pmdec_corr",
    },
}

#: Speed of light, km/s (exact, SI definition).
SPEED_OF_LIGHT_KMS = 299792.458

_PHYSICAL = {
    "angle": u.deg,
    "length": u.kpc,
    "angular velocity": u.mas / u.yr,
    "velocity": u.km / u.s,
    "dimensionless": u.dimensionless_unscaled,
}


# --------------------------------------------------------------------------------------------
# problems


def _fmt_value(value) -> str:
    if value is None:
        return "missing"
    if isinstance(value, (float, np.floating)):
        return f"value {float(value):.6g}"
    if isinstance(value, (int, np.integer)):
        return f"value {int(value)}"
    if isinstance(value, (bytes, np.bytes_)):
        return f"value {bytes(value)!r}"
    text = str(value)
    if len(text) > 60:
        text = text[:57] + "..."
    return f"value {text!r}"


@dataclass(frozen=True)
class Problem:
    """One thing wrong with a catalog.

    Attributes
    ----------
    file : str
        The file (or the source label of an in-memory table).
    row : int or None
        1-based data row (the header is not counted); None for a problem with a whole column
        or the whole file.
    id : str or None
        The star's id where the row has a readable one.
    column : str or None
        swerve's column name (see :data:`COLUMNS`); None for the whole file.
    value : object
        The offending value (None when missing).
    expected : str
        What was expected instead.
    what : str
        How the value is described in the message (default: ``"value <value>"``, or
        ``"missing"`` when ``value`` is None).
    source_column : str or None
        The file's name for the column where ``columns`` mapped it to another name.
    """

    file: str
    row: int | None
    id: str | None
    column: str | None
    value: object
    expected: str
    what: str = ""
    source_column: str | None = None

    def __str__(self) -> str:
        where = []
        if self.row is not None:
            where.append(f"row {self.row}" + (f" (id {self.id!r})" if self.id is not None else ""))
        if self.column is not None:
            col = f"column {self.column!r}"
            if self.source_column is not None and self.source_column != self.column:
                col += f" (file column {self.source_column!r})"
            where.append(col)
        head = f"{self.file}: " + (", ".join(where) + ": " if where else "")
        return f"{head}{self.what or _fmt_value(self.value)}, expected {self.expected}"


class CatalogError(ValueError):
    """A catalog that cannot be used; ``problems`` lists every :class:`Problem` found.

    Its message is one line per problem.
    """

    def __init__(self, problems: Sequence[Problem]):
        self.problems = list(problems)
        super().__init__("\n".join(str(p) for p in self.problems))


def _file_error(file: str, what: str, expected: str) -> CatalogError:
    return CatalogError([Problem(file, None, None, None, None, expected, what=what)])


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    if len(text) > 160:
        text = text[:157] + "..."
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


# --------------------------------------------------------------------------------------------
# options


def _parse_pairs(text: str, option: str) -> dict[str, str]:
    if not isinstance(text, str):
        raise ValueError(f"{option}: expected a string like 'a=b,c=d', got {type(text).__name__}")
    out: dict[str, str] = {}
    for item in text.split(","):
        item = item.strip()
        if not item:
            continue
        key, sep, value = item.partition("=")
        key, value = key.strip(), value.strip()
        if not sep or not key or not value:
            raise ValueError(f"{option}: entry {item!r} is not of the form name=value")
        if key in out:
            raise ValueError(f"{option}: {key!r} given twice")
        out[key] = value
    return out


def _check_names(mapping: Mapping, option: str) -> None:
    unknown = [k for k in mapping if k not in COLUMNS]
    if unknown:
        raise ValueError(
            f"{option}: unknown column name(s) {', '.join(map(repr, unknown))}; expected some of "
            f"{', '.join(COLUMNS)}"
        )


def _split_preset(text: str) -> tuple[dict[str, str], str]:
    """A leading preset name in a ``columns`` string: (its mapping, the rest of the string)."""
    head, sep, rest = text.strip().partition(",")
    head = head.strip()
    if head and "=" not in head:
        if head.lower() not in COLUMN_PRESETS:
            raise ValueError(f"columns: {head!r} is neither name=value nor a preset; the presets are "
                             f"{', '.join(COLUMN_PRESETS)}")
        return dict(COLUMN_PRESETS[head.lower()]), rest
    return {}, text


def parse_columns(spec) -> dict[str, str]:
    """Column mapping ``{our_name: file_column}`` from a dict or a string ``"ra=RA_deg,dec=DE"``.

    The string may start with a preset name from :data:`COLUMN_PRESETS` (``"gaia"``, or
    ``"gaia,vlos=rv_template"`` to change one of its entries).

    Raises
    ------
    ValueError
        On a malformed entry, an unknown preset or a name that is not one of :data:`COLUMNS`.

    Examples
    --------
    >>> parse_columns("gaia,vlos=rv_template")["vlos"]
    'rv_template'
    >>> parse_columns("gaia")["id"]
    'source_id'
    """
    if spec is None:
        return {}
    if isinstance(spec, str):
        base, rest = _split_preset(spec)
        base.update(_parse_pairs(rest, "columns"))
        mapping = base
    else:
        mapping = spec
    if not isinstance(mapping, Mapping):
        raise ValueError(f"columns: expected a mapping or a string, got {type(spec).__name__}")
    _check_names(mapping, "columns")
    out = {}
    for key, value in mapping.items():
        if not isinstance(value, str) or not value:
            raise ValueError(f"columns: {key!r} must map to a column name (string), got {value!r}")
        out[key] = value
    targets = list(out.values())
    dup = sorted({t for t in targets if targets.count(t) > 1})
    if dup:
        raise ValueError(f"columns: file column(s) {', '.join(map(repr, dup))} mapped to more than one name")
    return out


def parse_units(spec) -> dict[str, u.UnitBase]:
    """Units mapping ``{our_name: unit}`` from a dict or a string ``"distance=pc,pmra=mas/yr"``.

    Each unit must parse (astropy's unit syntax) and have the column's physical type.

    Raises
    ------
    ValueError
        On a malformed entry, an unknown column name, an unknown unit or a wrong physical type.
    """
    if spec is None:
        return {}
    mapping = _parse_pairs(spec, "units") if isinstance(spec, str) else spec
    if not isinstance(mapping, Mapping):
        raise ValueError(f"units: expected a mapping or a string, got {type(spec).__name__}")
    _check_names(mapping, "units")
    out = {}
    for key, value in mapping.items():
        spec_ = COLUMNS[key]
        if spec_.physical_type is None:
            raise ValueError(f"units: column {key!r} takes no unit")
        try:
            unit = value if isinstance(value, u.UnitBase) else u.Unit(value, parse_strict="raise")
        except (ValueError, TypeError):
            raise ValueError(f"units: {key}={value!r} is not a unit astropy understands") from None
        target = _PHYSICAL[spec_.physical_type]
        if not unit.is_equivalent(target):
            raise ValueError(f"units: {key}={value!r} is not a {spec_.physical_type} (like {spec_.unit})")
        out[key] = unit
    return out


def options_from_config(table: Mapping) -> dict:
    """Reading options from a config file's ``[catalog]`` table (already parsed TOML).

    Accepted keys: ``columns`` (table or string, possibly a preset such as ``"gaia"``),
    ``units`` (table or string), ``drop_invalid`` (bool), ``require_units`` (bool),
    ``parallax_zero_point`` (number, mas). Returns a dict of keyword arguments for
    :func:`read_catalog`.

    Examples
    --------
    >>> options_from_config({"columns": {"ra": "RA_deg"}, "units": "distance=pc"})["columns"]
    {'ra': 'RA_deg'}
    """
    if not isinstance(table, Mapping):
        raise ValueError(f"[catalog]: expected a table, got {type(table).__name__}")
    allowed = {"columns", "units", "drop_invalid", "require_units", "parallax_zero_point"}
    extra = sorted(set(table) - allowed)
    if extra:
        raise ValueError(f"[catalog]: unknown key(s) {', '.join(extra)}; "
                         f"expected some of {', '.join(sorted(allowed))}")
    out: dict = {}
    if "columns" in table:
        out["columns"] = parse_columns(table["columns"])
    if "units" in table:
        out["units"] = parse_units(table["units"])
    for key in ("drop_invalid", "require_units"):
        if key in table:
            if not isinstance(table[key], bool):
                raise ValueError(f"[catalog] {key}: expected true or false, got {table[key]!r}")
            out[key] = table[key]
    if "parallax_zero_point" in table:
        out["parallax_zero_point"] = _zero_point(table["parallax_zero_point"],
                                                 "[catalog] parallax_zero_point")
    return out


# --------------------------------------------------------------------------------------------
# the catalog


@dataclass
class Catalog:
    """A validated catalog in swerve's units; every array has shape (n,).

    Attributes
    ----------
    ids : array of str
        Star identifiers.
    ra, dec : array of float
        ICRS position, deg.
    distance, distance_err : array of float
        Heliocentric distance and uncertainty, kpc; NaN where the star has none.
    parallax, parallax_err : array of float
        Parallax and uncertainty, mas; NaN where the star has none. The parallax may be zero
        or negative (a measurement); it is corrected by ``parallax_zero_point`` where one was
        given to :func:`read_catalog`.
    pmra, pmra_err, pmdec, pmdec_err : array of float
        Proper motions (pmra includes cos(dec)) and uncertainties, mas/yr.
    vlos, vlos_err : array of float
        Line-of-sight velocity and uncertainty, km/s.
    corr_pmra_pmdec, corr_parallax_pmra, corr_parallax_pmdec : array of float
        Correlation coefficients (0 where the file has no such column).
    rows : array of int
        The 1-based data row of each star in the source.
    source : str
        The file (or label) read.
    problems : tuple of Problem
        Problems found; with ``drop_invalid=True`` the rows they name were dropped.
    dropped_rows : tuple of int
        1-based data rows dropped (empty unless ``drop_invalid=True``).
    units : dict
        The unit each column was read in (before conversion), as strings.
    meta : dict
        The file's metadata (astropy ``Table.meta``).
    extra : dict of str to array
        The file's other columns (kept rows only), unvalidated, as numpy arrays (masked
        arrays where the file masks values).
    hints : tuple of str
        Plausibility warnings that did not refuse the file (values that look like radians or
        pc although the file states degrees or kpc); also logged at WARNING level.
    """

    ids: np.ndarray
    ra: np.ndarray
    dec: np.ndarray
    distance: np.ndarray
    distance_err: np.ndarray
    parallax: np.ndarray
    parallax_err: np.ndarray
    pmra: np.ndarray
    pmra_err: np.ndarray
    pmdec: np.ndarray
    pmdec_err: np.ndarray
    vlos: np.ndarray
    vlos_err: np.ndarray
    corr_pmra_pmdec: np.ndarray
    corr_parallax_pmra: np.ndarray
    corr_parallax_pmdec: np.ndarray
    rows: np.ndarray
    source: str
    problems: tuple = ()
    dropped_rows: tuple = ()
    units: dict = field(default_factory=dict)
    meta: dict = field(default_factory=dict)
    extra: dict = field(default_factory=dict)
    hints: tuple = ()

    @property
    def n(self) -> int:
        """Number of stars."""
        return int(self.ids.shape[0])

    @property
    def has_distance(self) -> np.ndarray:
        """Boolean array (n,): the star has a distance and its uncertainty."""
        return np.isfinite(self.distance) & np.isfinite(self.distance_err)

    @property
    def has_parallax(self) -> np.ndarray:
        """Boolean array (n,): the star has a parallax and its uncertainty."""
        return np.isfinite(self.parallax) & np.isfinite(self.parallax_err)

    def covariance(self) -> np.ndarray:
        """Measurement covariance of (parallax, pmra, pmdec), shape (n, 3, 3), mas and mas/yr.

        Rows and columns of a star without a parallax are NaN in the parallax entries.
        """
        sig = np.stack([self.parallax_err, self.pmra_err, self.pmdec_err], axis=-1)
        corr = np.broadcast_to(np.eye(3), (self.n, 3, 3)).copy()
        corr[:, 0, 1] = corr[:, 1, 0] = self.corr_parallax_pmra
        corr[:, 0, 2] = corr[:, 2, 0] = self.corr_parallax_pmdec
        corr[:, 1, 2] = corr[:, 2, 1] = self.corr_pmra_pmdec
        return corr * sig[:, :, None] * sig[:, None, :]


def _format_of(path: str) -> str | None:
    low = path.lower()
    for ending in sorted(FORMATS, key=len, reverse=True):
        if low.endswith(ending):
            return FORMATS[ending]
    return None


def read_catalog(
    path,
    *,
    columns=None,
    units=None,
    drop_invalid: bool = False,
    require_units: bool | None = None,
    parallax_zero_point=0.0,
) -> Catalog:
    """Read and validate an observed catalog.

    Parameters
    ----------
    path : str or os.PathLike
        ECSV, FITS, VOTable or CSV file; the format comes from the extension (:data:`FORMATS`).
    columns : dict or str, optional
        ``{our_name: file_column}`` for columns named otherwise in the file, or the string form
        ``"ra=RA_deg,dec=DE_deg"`` (:func:`parse_columns`).
    units : dict or str, optional
        Units of columns that have none in the file, ``{"distance": "pc"}`` or
        ``"distance=pc,pmra=mas/yr"`` (:func:`parse_units`). Otherwise the defaults of
        :data:`COLUMNS` apply to unit-less CSV columns.
    drop_invalid : bool
        False (default): any problem refuses the file. True: rows with problems are dropped and
        the problems returned in :attr:`Catalog.problems`.
    require_units : bool, optional
        Whether a quantity column needs a unit in the file or in ``units``. Default: True for
        ECSV, FITS and VOTable, False for CSV.
    parallax_zero_point : float or Quantity ['angle']
        Parallax zero point Z, mas: every parallax is replaced by ``parallax - Z`` (the
        uncertainties are unchanged). Default 0: nothing is applied unless asked. For Gaia
        EDR3/DR3, Lindegren et al. 2021 (A&A 649, A4) find a global offset of about
        -0.017 mas from quasars (so ``parallax_zero_point=-0.017`` adds 0.017 mas); their
        correction depends on magnitude, colour and position, which swerve does not model.
        Recorded in :attr:`Catalog.meta` as ``swerve_parallax_zero_point_mas``.

    Returns
    -------
    Catalog

    Raises
    ------
    CatalogError
        Listing every problem found, or (one line) when the file cannot be read at all: not a
        file (a directory, a missing path), an unknown extension, or a CSV/ECSV header that
        names a column twice.
    ValueError
        For a malformed ``columns`` or ``units`` option.

    Notes
    -----
    Rows are numbered in swerve's own way in every message and in :attr:`Catalog.rows`: the
    first data row is row 1, whatever the format (header and comment lines are not counted;
    in a CSV with a one-line header, row N is line N + 1 of the file).
    """
    columns = parse_columns(columns)
    units = parse_units(units)
    zp = _zero_point(parallax_zero_point, "parallax_zero_point")
    name = os.fspath(path) if isinstance(path, (str, os.PathLike)) else None
    if name is None:
        raise ValueError(f"path: expected a file name, got {type(path).__name__}")
    if os.path.isdir(name):
        raise _file_error(name, "a directory, not a catalog file",
                          "a catalog file (" + ", ".join(sorted(FORMATS)) + ")")
    fmt = _format_of(name)
    if fmt is None:
        raise _file_error(name, "unknown file type",
                          "a name ending in " + ", ".join(sorted(FORMATS)))
    if not os.path.isfile(name):
        raise _file_error(name, "no such file", "an existing catalog file")
    if os.path.getsize(name) == 0:
        raise _file_error(name, "empty file", f"a table ({fmt})")
    if fmt in ("ascii.csv", "ascii.ecsv"):
        _check_header_names(name, fmt)
    table = _read_table(name, fmt)
    if require_units is None:
        require_units = fmt in _UNIT_FORMATS
    return catalog_from_table(table, columns=columns, units=units, drop_invalid=drop_invalid,
                              require_units=require_units, source=name, parallax_zero_point=zp)


def _zero_point(value, option: str) -> float:
    """A parallax zero point in mas (a number or an angle Quantity), finite."""
    if isinstance(value, u.Quantity):
        if not value.unit.is_equivalent(u.mas) or not value.isscalar:
            raise ValueError(f"{option}: expected an angle (like 'mas'), got {value!r}")
        value = float(value.to_value(u.mas))
    if isinstance(value, bool) or not isinstance(value, (int, float, np.number)) or not math.isfinite(value):
        raise ValueError(f"{option}: expected a finite number of mas, got {value!r}")
    return float(value)


def _check_header_names(name: str, fmt: str) -> None:
    """Refuse a CSV/ECSV file whose header names a column twice (astropy would rename the second
    one, ``ra`` -> ``ra_1``, and the file would be read as if nothing were wrong)."""
    try:
        with open(name, encoding="utf-8", newline="") as fh:
            for line in fh:
                if line.strip() and not line.lstrip().startswith("#"):
                    break
            else:
                return
    except (OSError, UnicodeDecodeError):
        return  # reported by the reader, with its own message
    if fmt == "ascii.csv" or "," in line:
        names = next(csv.reader([line]), [])
    else:
        names = next(csv.reader([line], delimiter=" ", skipinitialspace=True), [])
    names = [n.strip() for n in names if n.strip()]
    seen: set[str] = set()
    for col in names:
        if col in seen:
            raise CatalogError([Problem(name, None, None, None, None,
                                        "a header naming each column once",
                                        what=f"header: column {col!r} appears {names.count(col)} times")])
        seen.add(col)


def _read_table(name: str, fmt: str):
    try:
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            if fmt == "ascii.csv":
                # Read the bytes ourselves so that a non-UTF-8 file fails here with a clear message.
                with open(name, "rb") as fh:
                    text = fh.read().decode("utf-8")
                table = Table.read(text, format=fmt)
            else:
                table = Table.read(name, format=fmt)
    except UnicodeDecodeError as exc:
        raise _file_error(name, f"not UTF-8 text (byte {exc.start})", "a UTF-8 CSV table") from None
    except Exception as exc:  # noqa: BLE001 - astropy's readers raise many types; none may leak
        raise _file_error(name, f"cannot be read ({_one_line(exc)})", f"a valid {fmt} table") from None
    if caught:
        table.meta = dict(table.meta)
        table.meta.setdefault("swerve_read_warnings", [str(w.message)[:200] for w in caught])
    return table


def catalog_from_table(
    table,
    *,
    columns=None,
    units=None,
    drop_invalid: bool = False,
    require_units: bool = False,
    source: str = "<table>",
    parallax_zero_point=0.0,
) -> Catalog:
    """Validate an in-memory astropy Table and make a :class:`Catalog`.

    Parameters are those of :func:`read_catalog`; ``source`` labels the table in messages.
    Quantity columns (astropy ``QTable``) and columns with a ``unit`` attribute are converted.
    """
    columns = parse_columns(columns)
    units = parse_units(units)
    zp = _zero_point(parallax_zero_point, "parallax_zero_point")
    try:
        names = list(table.colnames)
        nrows = len(table)
    except Exception as exc:  # noqa: BLE001 - not a table; report instead of a traceback
        raise _file_error(source, f"not a table ({_one_line(exc)})", "an astropy Table") from None
    if not names:
        raise _file_error(source, "no columns", "a table with the columns " + ", ".join(
            n for n, s in COLUMNS.items() if s.required))
    if nrows == 0:
        raise _file_error(source, "no data rows", "at least one star")
    v = _Validator(table, source, columns, units, require_units)
    v.zero_point = zp
    return v.run(drop_invalid)


class _Validator:
    """Collects every problem of a table; builds the Catalog."""

    def __init__(self, table, source, columns, units, require_units):
        self.table = table
        self.source = source
        self.columns = columns
        self.units = units
        self.require_units = require_units
        self.n = len(table)
        self.col_problems: list[Problem] = []
        self.row_problems: list[Problem] = []
        self.ids: list[str | None] = [None] * self.n
        self.values: dict[str, np.ndarray] = {}
        self.missing: dict[str, np.ndarray] = {}  # masked / NaN / empty per row
        self.bad: dict[str, np.ndarray] = {}  # unreadable or infinite per row (already reported)
        self.unit_used: dict[str, str] = {}
        self.unit_stated: dict[str, bool] = {}  # unit from the file or units=, not the default
        self.hints: list[str] = []
        self.zero_point = 0.0
        self.pending: dict[str, list] = {}  # missing-value problems, possibly waived

    # helpers ---------------------------------------------------------------------------------
    def file_name(self, ours):
        return self.columns.get(ours, ours)

    def present(self, ours):
        return self.file_name(ours) in self.table.colnames

    def col_problem(self, ours, value, expected, what=""):
        self.col_problems.append(Problem(self.source, None, None, ours, value, expected, what,
                                         self.file_name(ours)))

    def row_problem(self, i, ours, value, expected, what=""):
        self.row_problems.append(Problem(self.source, i + 1, self.ids[i], ours, value, expected,
                                         what, self.file_name(ours)))

    # reading columns -------------------------------------------------------------------------
    def read_ids(self):
        if not self.present("id"):
            self.col_problem("id", None, "a column of star identifiers", what="missing column")
            return
        col = self.table[self.file_name("id")]
        mask = np.ma.getmaskarray(col)
        data = np.ma.getdata(col)
        if data.ndim != 1:
            self.col_problem("id", None, "one identifier per row", what=f"column of shape {data.shape}")
            return
        idbad = []
        for i in range(self.n):
            x = data[i]
            if mask[i] or x is None:
                idbad.append((i, None))
                continue
            if isinstance(x, (bytes, np.bytes_)):
                try:
                    x = bytes(x).decode("utf-8")
                except UnicodeDecodeError:
                    idbad.append((i, x))
                    continue
            if isinstance(x, (float, np.floating)):
                if not math.isfinite(x) or abs(x) > 2.0**53:
                    # above 2**53 a float cannot hold every integer: a 64-bit id (Gaia's
                    # source_id) stored as a float has lost digits
                    idbad.append((i, float(x)))
                    continue
                s = str(int(x)) if float(x).is_integer() else repr(float(x))
            elif isinstance(x, (bool, np.bool_)):
                idbad.append((i, x))
                continue
            else:
                s = str(x).strip()
            if not s:
                idbad.append((i, None))
                continue
            self.ids[i] = s
        for i, x in idbad:
            if isinstance(x, float) and math.isfinite(x):
                self.row_problem(i, "id", x, "an integer or string identifier (a floating-point id above "
                                 "2**53 has lost digits: store it as an integer or a string)")
            else:
                self.row_problem(i, "id", x, "a star identifier (string or integer)")
        first: dict[str, int] = {}
        for i, s in enumerate(self.ids):
            if s is None:
                continue
            if s in first:
                self.row_problem(i, "id", s, f"a unique id (also in row {first[s] + 1})")
            else:
                first[s] = i

    def unit_for(self, ours, col):
        """The unit a column's values are in, or None after reporting a problem."""
        spec = COLUMNS[ours]
        target = _PHYSICAL[spec.physical_type]
        file_unit = getattr(col, "unit", None)
        base = _ERR_OF.get(ours)
        if file_unit is None and base is not None and self.present(base):
            file_unit = getattr(self.table[self.file_name(base)], "unit", None)
        if file_unit is not None:
            if isinstance(file_unit, u.UnrecognizedUnit):
                self.col_problem(ours, str(file_unit), f"a {spec.physical_type} unit like {spec.unit!r}",
                                 what=f"unit {str(file_unit)!r} not understood")
                return None
            if not file_unit.is_equivalent(target):
                self.col_problem(ours, str(file_unit), f"a {spec.physical_type} unit like {spec.unit!r}",
                                 what=f"unit {str(file_unit)!r}")
                return None
            given = self.units.get(ours) or (self.units.get(base) if base else None)
            if given is not None and not _same_unit(given, file_unit):
                self.col_problem(ours, str(file_unit), f"the unit given in units= ({given})",
                                 what=f"file unit {str(file_unit)!r} disagrees with units=")
                return None
            self.unit_stated[ours] = True
            return file_unit
        given = self.units.get(ours) or (self.units.get(base) if base else None)
        if given is not None:
            self.unit_stated[ours] = True
            return given
        self.unit_stated[ours] = False
        if spec.physical_type == "dimensionless":
            return u.dimensionless_unscaled
        if self.require_units:
            self.col_problem(ours, None, f"a {spec.physical_type} unit like {spec.unit!r} in the "
                             "file or in units=", what="no unit")
            return None
        return u.Unit(spec.unit)

    def read_quantity(self, ours):
        spec = COLUMNS[ours]
        col = self.table[self.file_name(ours)]
        unit = self.unit_for(ours, col)
        mask = np.ma.getmaskarray(col)
        data = np.ma.getdata(col)
        if data.ndim != 1:
            self.col_problem(ours, None, "one number per row", what=f"column of shape {data.shape}")
            return
        if unit is None:
            return
        kind = data.dtype.kind
        vals = np.full(self.n, np.nan)
        bad = np.zeros(self.n, dtype=bool)
        if kind in "fiu":
            with np.errstate(all="ignore"):
                vals = data.astype(float)
        elif kind in "USO":
            for i in range(self.n):
                if mask[i]:
                    continue
                x = data[i]
                try:
                    if isinstance(x, (bytes, np.bytes_)):
                        x = bytes(x).decode("utf-8")
                    if isinstance(x, (bool, np.bool_)):
                        raise TypeError
                    if isinstance(x, str) and not x.strip():
                        continue  # an empty field: missing
                    vals[i] = float(x)
                except (TypeError, ValueError, OverflowError, UnicodeDecodeError):
                    bad[i] = True
                    self.row_problem(i, ours, x, "a number")
        else:
            self.col_problem(ours, None, "numbers", what=f"column of type {data.dtype}")
            return
        vals = np.where(mask, np.nan, vals)
        missing = np.isnan(vals) & ~bad
        inf = np.isinf(vals)
        for i in np.flatnonzero(inf):
            self.row_problem(i, ours, vals[i], "a finite number")
        # Missing values are reported later (a row may leave its distance or parallax pair empty).
        self.pending[ours] = [i for i in np.flatnonzero(missing)]
        self.missing[ours] = missing
        self.bad[ours] = bad | inf
        factor = (1.0 * unit).to_value(u.Unit(spec.unit))  # to the documented unit
        with np.errstate(all="ignore"):
            self.values[ours] = vals * factor
        self.unit_used[ours] = str(unit)

    # checks ----------------------------------------------------------------------------------
    def run(self, drop_invalid) -> Catalog:
        self.read_ids()
        for ours in ("ra", "dec", "pmra", "pmra_err", "pmdec", "pmdec_err", "vlos", "vlos_err"):
            if not self.present(ours):
                self.col_problem(ours, None, f"a column of {COLUMNS[ours].description} "
                                 f"({COLUMNS[ours].unit})", what="missing column")
        has_d = self.present("distance") or self.present("distance_err")
        has_p = self.present("parallax") or self.present("parallax_err")
        if not has_d and not has_p:
            self.col_problem("distance", None, "columns 'distance' and 'distance_err' (kpc) or "
                             "'parallax' and 'parallax_err' (mas)", what="missing column")
        for a, b in (("distance", "distance_err"), ("parallax", "parallax_err")):
            for x, y in ((a, b), (b, a)):
                if self.present(x) and not self.present(y):
                    self.col_problem(y, None, f"a column {y!r} beside {x!r}", what="missing column")
        for ours in _QUANTITIES:
            if ours.startswith("corr_parallax") and not has_p:
                continue  # meaningless without a parallax; ignored like any extra column
            if self.present(ours):
                self.read_quantity(ours)
        self.check_missing()
        self.check_values()
        self.check_covariance()
        return self.build(drop_invalid)

    def pair_complete(self, a, b):
        if a not in self.values or b not in self.values:
            return np.zeros(self.n, dtype=bool)
        return ~(self.missing[a] | self.bad[a] | self.missing[b] | self.bad[b])

    def pair_empty(self, a, b):
        if a not in self.values or b not in self.values:
            return np.ones(self.n, dtype=bool)
        return self.missing[a] & self.missing[b]

    def check_missing(self):
        d_ok = self.pair_complete("distance", "distance_err")
        p_ok = self.pair_complete("parallax", "parallax_err")
        waive = {
            "distance": p_ok & self.pair_empty("distance", "distance_err"),
            "distance_err": p_ok & self.pair_empty("distance", "distance_err"),
            "parallax": d_ok & self.pair_empty("parallax", "parallax_err"),
            "parallax_err": d_ok & self.pair_empty("parallax", "parallax_err"),
        }
        no_plx = ~p_ok
        waive["corr_parallax_pmra"] = no_plx
        waive["corr_parallax_pmdec"] = no_plx
        for ours, rows in self.pending.items():
            w = waive.get(ours)
            for i in rows:
                if w is not None and w[i]:
                    continue
                self.row_problem(i, ours, None, "a number", what="missing (empty, masked or NaN)")

    def usable(self, ours):
        v = self.values[ours]
        return np.isfinite(v)

    def check_values(self):
        V = self.values
        if "ra" in V:
            for i in np.flatnonzero(self.usable("ra") & ~((V["ra"] >= 0) & (V["ra"] < 360))):
                self.row_problem(i, "ra", V["ra"][i], "a right ascension in [0, 360) deg")
        if "dec" in V:
            for i in np.flatnonzero(self.usable("dec") & ~((V["dec"] >= -90) & (V["dec"] <= 90))):
                self.row_problem(i, "dec", V["dec"][i], "a declination in [-90, 90] deg")
        for err in _ERR_OF:
            if err in V:
                for i in np.flatnonzero(self.usable(err) & ~(V[err] > 0)):
                    self.row_problem(i, err, V[err][i], "a positive uncertainty")
        if "distance" in V:
            for i in np.flatnonzero(self.usable("distance") & ~(V["distance"] > 0)):
                self.row_problem(i, "distance", V["distance"][i], "a positive distance")
        # A parallax may be negative or zero: it is a measurement, and draw_samples uses it as one
        # under a distance prior (refusing such rows would bias the sample toward near stars).
        self.check_plausible()
        for c in _CORRS:
            if c in V:
                for i in np.flatnonzero(self.usable(c) & ~(np.abs(V[c]) <= 1)):
                    self.row_problem(i, c, V[c][i], "a correlation coefficient in [-1, 1]")

    def check_covariance(self):
        V = self.values
        present = [c for c in _CORRS if c in V]
        if not present:
            return
        rho = {c: np.where(np.isfinite(V[c]), V[c], 0.0) if c in V else np.zeros(self.n) for c in _CORRS}
        in_range = np.ones(self.n, dtype=bool)
        for c in present:
            in_range &= ~(np.isfinite(V[c]) & (np.abs(V[c]) > 1))
        p_ok = self.pair_complete("parallax", "parallax_err")
        R = np.broadcast_to(np.eye(3), (self.n, 3, 3)).copy()
        R[:, 0, 1] = R[:, 1, 0] = np.where(p_ok, rho["corr_parallax_pmra"], 0.0)
        R[:, 0, 2] = R[:, 2, 0] = np.where(p_ok, rho["corr_parallax_pmdec"], 0.0)
        R[:, 1, 2] = R[:, 2, 1] = rho["corr_pmra_pmdec"]
        with np.errstate(all="ignore"):
            lam = np.linalg.eigvalsh(R)[:, 0]
        label = "/".join(present)
        for i in np.flatnonzero(in_range & ~(lam > 1e-10)):
            self.row_problem(i, label, float(lam[i]),
                             "correlations that make a positive-definite covariance of "
                             "(parallax, pmra, pmdec)",
                             what=f"smallest correlation-matrix eigenvalue {lam[i]:.3g}")

    def check_plausible(self):
        """Values that are numbers in range but cannot be what the file means: coordinates in
        radians, distances in pc read as kpc, speeds at or above the speed of light."""
        V = self.values
        c = SPEED_OF_LIGHT_KMS
        if "ra" in V and "dec" in V:
            ra, dec = V["ra"][self.usable("ra")], V["dec"][self.usable("dec")]
            if (ra.size >= 3 and np.all(np.abs(ra) <= 2 * math.pi) and np.all(np.abs(dec) <= math.pi / 2)):
                what = (f"every ra <= 2 pi and every |dec| <= pi/2 (largest ra {ra.max():.4g}, "
                        f"largest |dec| {np.abs(dec).max():.4g}): radians read as degrees?")
                if self.unit_stated.get("ra") or self.unit_stated.get("dec"):
                    self.hints.append(f"{self.source}: {what} (the file states "
                                      f"{self.unit_used.get('ra')!r}; check it)")
                else:
                    self.col_problem("ra", None, "ra and dec in degrees; state the unit with units= "
                                     "(--units ra=rad,dec=rad, or ra=deg,dec=deg if degrees are meant)",
                                     what=what)
        for name in ("distance", "distance_err"):
            if name not in V:
                continue
            d = V[name]
            far = self.usable(name) & (d > 1000.0)
            if far.any():
                label = "distances" if name == "distance" else "distance uncertainties"
                what = (f"{int(far.sum())} of {self.n} {label} above 1 Mpc (largest {np.nanmax(d[far]):.4g} "
                        f"kpc): pc read as kpc?")
                if self.unit_stated.get(name):
                    self.hints.append(f"{self.source}: column {name!r}: {what} (the unit "
                                      f"{self.unit_used.get(name)!r} is stated; check it)")
                else:
                    self.col_problem(name, None, "kpc; state the unit with units= (--units distance=pc, "
                                     "or distance=kpc if kpc is meant)", what=what)
        # speeds: a line-of-sight velocity (or its error) at or above c; a proper motion above
        # c / (kappa * 1 pc) is faster than light at any distance beyond 1 pc; with a distance,
        # the total speed it implies.
        kappa = 4.740470463533348  # km/s per (kpc mas/yr)
        pm_max = c / (kappa * 1e-3)
        for name, limit, expected in (
                ("vlos", c, "a speed below the speed of light (299792.458 km/s)"),
                ("vlos_err", c, "an uncertainty below the speed of light (299792.458 km/s)"),
                ("pmra", pm_max, f"a proper motion below {pm_max:.3g} mas/yr (faster than light beyond 1 pc)"),
                ("pmdec", pm_max, f"a proper motion below {pm_max:.3g} mas/yr (faster than light beyond 1 pc)"),
                ("pmra_err", pm_max, f"an uncertainty below {pm_max:.3g} mas/yr"),
                ("pmdec_err", pm_max, f"an uncertainty below {pm_max:.3g} mas/yr")):
            if name in V:
                with np.errstate(all="ignore"):
                    over = self.usable(name) & (np.abs(V[name]) >= limit)
                for i in np.flatnonzero(over):
                    self.row_problem(i, name, V[name][i], expected)
        if all(n in V for n in ("pmra", "pmdec", "vlos")):
            with np.errstate(all="ignore"):
                pm = np.hypot(V["pmra"], V["pmdec"])
                plx_d = np.full(self.n, np.nan)
                if "parallax" in V and "parallax_err" in V:
                    good = (V["parallax"] > 0) & (V["parallax"] >= 5 * V["parallax_err"])
                    plx_d = np.where(good, 1.0 / V["parallax"], np.nan)
                dist = V["distance"] if "distance" in V else np.full(self.n, np.nan)
                from_d = np.isfinite(dist) & (dist > 0)
                dist = np.where(from_d, dist, plx_d)
                speed = np.hypot(kappa * dist * pm, V["vlos"])
                ok = np.isfinite(speed) & (np.abs(V["vlos"]) < c) & (pm < pm_max)
            for i in np.flatnonzero(ok & (speed >= c)):
                src = "distance" if from_d[i] else "distance 1/parallax"
                self.row_problem(i, "pmra/pmdec", float(speed[i]), "a speed below the speed of light "
                                 "(299792.458 km/s)", what=f"total speed {speed[i]:.4g} km/s at the "
                                 f"{src} = {dist[i]:.4g} kpc")

    # result ----------------------------------------------------------------------------------
    def build(self, drop_invalid) -> Catalog:
        problems = self.col_problems + sorted(self.row_problems, key=lambda p: (p.row, _col_order(p.column)))
        if self.col_problems or (problems and not drop_invalid):
            raise CatalogError(problems)
        bad_rows = sorted({int(p.row) for p in self.row_problems})
        keep = np.ones(self.n, dtype=bool)
        keep[[r - 1 for r in bad_rows]] = False
        if not keep.any():
            raise CatalogError(problems + [Problem(self.source, None, None, None, None,
                                                   "at least one valid star",
                                                   what="every row has a problem")])
        if problems:
            for p in problems:
                logger.warning("dropped: %s", p)

        def arr(name, default=np.nan):
            a = self.values.get(name)
            if a is None:
                a = np.full(self.n, default)
            a = a[keep].astype(float)
            return a

        out = {name: arr(name) for name in _QUANTITIES if name not in _CORRS}
        if self.zero_point:
            out["parallax"] = out["parallax"] - self.zero_point  # NaN stays NaN
        for c in _CORRS:
            a = arr(c, 0.0)
            out[c] = np.where(np.isfinite(a), a, 0.0)  # only where the row has no parallax
        # A pair the row left empty stays NaN; a non-positive parallax beside a distance is kept.
        meta = dict(getattr(self.table, "meta", {}) or {})
        if self.zero_point:
            meta["swerve_parallax_zero_point_mas"] = self.zero_point
        for h in self.hints:
            logger.warning("%s", h)
        used = {self.file_name(c) for c in COLUMNS}
        extra = {}
        for name in self.table.colnames:
            if name not in used:
                col = self.table[name]
                data = np.ma.asarray(col) if np.ma.is_masked(col) else np.asarray(col)
                extra[name] = data[keep]
        return Catalog(
            ids=np.array([s for s, k in zip(self.ids, keep) if k], dtype=object).astype(str),
            rows=np.flatnonzero(keep) + 1,
            source=self.source,
            problems=tuple(problems),
            dropped_rows=tuple(bad_rows),
            units=dict(self.unit_used),
            meta=meta,
            hints=tuple(self.hints),
            extra=extra,
            **out,
        )


def _same_unit(a, b) -> bool:
    try:
        return math.isclose((1.0 * a).to_value(b), 1.0, rel_tol=1e-12)
    except u.UnitConversionError:
        return False


def _col_order(column):
    names = list(COLUMNS)
    return names.index(column) if column in names else len(names)
