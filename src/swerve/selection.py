"""Selection of present-day stars: composable cuts, stated as data.

A :class:`Selection` is a frozen dataclass of cut values (``None`` means "no cut"), so it can be
written into an emulator's metadata, read back and compared. :meth:`Selection.apply` returns a
boolean mask and, for reports, how many stars each cut removed.

Cuts (all optional, all combined with AND):

``r_min``, ``r_max``
    Galactocentric radius range, kpc.
``d_min``, ``d_max``
    Heliocentric distance range, kpc.
``outgoing``
    Keep only stars moving away from the Galactic Centre (v_r > 0).
``v_min``
    Minimum galactocentric speed, km/s.
``unbound``
    Keep only stars faster than the local escape speed of the Galaxy (needs a Galaxy).
``abs_b_min``
    Minimum absolute Galactic latitude |b|, deg (a footprint that avoids the disk).
``dec_min``, ``dec_max``
    Declination range, deg (a survey's sky footprint).
``vlos_min``
    Minimum heliocentric line-of-sight velocity, km/s, in the solar frame of the population
    (the training's ``[frame] solar``; a mock's ``solar``): a cut a survey makes on a
    **measured** quantity (:data:`MEASURED_CUTS`).

Cuts on measured quantities
---------------------------
Surveys of hypervelocity-star candidates commonly keep the stars whose *measured*
line-of-sight velocity exceeds a threshold. Such a cut is applied to the **true** value when a
training population is made (the training population has no errors: :meth:`Selection.apply`),
to the **measured** value in a mock catalog (:func:`swerve.population.make_mock`, through
:meth:`Selection.true_value_cuts` and :meth:`Selection.measured_mask`), and the likelihood
treats the difference (:mod:`swerve.likelihood`, "Selection on measured velocities"). A
catalog declares its selection in its meta (``selection``, as a mock does);
:func:`check_declared` refuses a catalog whose declared velocity cuts differ from an emulator's.
A cut on the measured Galactocentric speed is not offered: that speed is a nonlinear function
of the distance and proper-motion errors, so the truncation it makes has no one-dimensional
Gaussian form.
"""

from __future__ import annotations

import dataclasses
import json
import math
from dataclasses import dataclass

import numpy as np

from .fileio import did_you_mean
from .frames import galactic_latitude, galacto_to_helio

_FIELDS_DOC = {
    "r_min": "minimum galactocentric radius [kpc]",
    "r_max": "maximum galactocentric radius [kpc]",
    "d_min": "minimum heliocentric distance [kpc]",
    "d_max": "maximum heliocentric distance [kpc]",
    "outgoing": "keep only outgoing stars (v_r > 0)",
    "v_min": "minimum galactocentric speed [km/s]",
    "unbound": "keep only stars above the local escape speed",
    "abs_b_min": "minimum |Galactic latitude| [deg]",
    "dec_min": "minimum declination [deg]",
    "dec_max": "maximum declination [deg]",
    "vlos_min": "minimum heliocentric line-of-sight velocity [km/s] (measured, in a mock and a survey)",
}

#: cuts a survey makes on measured quantities: applied to true values in training populations,
#: to measured values in mocks (see the module docstring)
MEASURED_CUTS = ("vlos_min",)
#: cuts that change the velocity distribution at a position: a position-conditional likelihood
#: is biased unless the catalog and the emulator share them (:func:`check_declared`)
VELOCITY_CUTS = ("v_min", "unbound", "vlos_min")
#: cuts that need heliocentric observables
_HELIO_CUTS = ("d_min", "d_max", "abs_b_min", "dec_min", "dec_max", "vlos_min")


class EmptySelectionError(ValueError):
    """A selection kept no star."""


@dataclass(frozen=True)
class Selection:
    """Composable selection cuts; ``None`` disables a cut. See the module docstring."""

    r_min: float | None = 10.0
    r_max: float | None = None
    d_min: float | None = None
    d_max: float | None = None
    outgoing: bool = True
    v_min: float | None = None
    unbound: bool = False
    abs_b_min: float | None = None
    dec_min: float | None = None
    dec_max: float | None = None
    vlos_min: float | None = None

    def __post_init__(self):
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            if f.name in ("outgoing", "unbound"):
                if not isinstance(v, (bool, np.bool_)):
                    raise ValueError(f"selection {f.name}: expected true or false, got {v!r}")
                continue
            if v is None:
                continue
            try:
                fv = float(v)
            except (TypeError, ValueError):
                raise ValueError(f"selection {f.name}: expected a number ({_FIELDS_DOC[f.name]}), got {v!r}") from None
            if not math.isfinite(fv):
                raise ValueError(f"selection {f.name}: expected a finite number, got {v!r}")
            if f.name in ("r_min", "r_max", "d_min", "d_max", "v_min") and fv < 0:
                raise ValueError(f"selection {f.name}: expected a non-negative value ({_FIELDS_DOC[f.name]}), got {fv:g}")
            if f.name == "abs_b_min" and not 0 <= fv < 90:
                raise ValueError(f"selection abs_b_min: expected a latitude in [0, 90) deg, got {fv:g}")
            if f.name in ("dec_min", "dec_max") and not -90 <= fv <= 90:
                raise ValueError(f"selection {f.name}: expected a declination in [-90, 90] deg, got {fv:g}")
            object.__setattr__(self, f.name, fv)
        for lo, hi in (("r_min", "r_max"), ("d_min", "d_max"), ("dec_min", "dec_max")):
            a, b = getattr(self, lo), getattr(self, hi)
            if a is not None and b is not None and a >= b:
                raise ValueError(f"selection: {lo} = {a:g} must be below {hi} = {b:g}")

    # ---- serialisation ------------------------------------------------------------------
    def to_dict(self) -> dict:
        """JSON-safe dict of every cut (``None`` for disabled cuts)."""
        return {f.name: getattr(self, f.name) for f in dataclasses.fields(self)}

    @classmethod
    def from_dict(cls, d: dict, source: str = "selection") -> Selection:
        names = {f.name for f in dataclasses.fields(cls)}
        unknown = set(d) - names
        if unknown:
            key = sorted(unknown)[0]
            raise ValueError(f"{source}: unknown selection key {key!r}{did_you_mean(key, names, list_all=True)}")
        return cls(**d)

    @property
    def needs_heliocentric(self) -> bool:
        return any(getattr(self, k) is not None for k in _HELIO_CUTS)

    @property
    def has_measured_cuts(self) -> bool:
        """True when a cut is made on a measured quantity (:data:`MEASURED_CUTS`)."""
        return any(getattr(self, k) is not None for k in MEASURED_CUTS)

    def galactocentric(self) -> Selection:
        """This selection without its heliocentric cuts (those reflection-invariant, applied in
        the octant before mirroring)."""
        return dataclasses.replace(self, **{k: None for k in _HELIO_CUTS})

    def true_value_cuts(self) -> Selection:
        """This selection without its cuts on measured quantities: what a mock applies to its
        true stars before their errors are drawn."""
        return dataclasses.replace(self, **{k: None for k in MEASURED_CUTS})

    def measured_mask(self, vlos) -> np.ndarray:
        """Boolean mask of the stars whose measured line-of-sight velocity ``vlos`` (km/s)
        passes the measured cuts (all True without them)."""
        vlos = np.asarray(vlos, dtype=float)
        if self.vlos_min is None:
            return np.ones(vlos.shape, dtype=bool)
        return vlos >= self.vlos_min

    def describe(self) -> str:
        parts = []
        for f in dataclasses.fields(self):
            v = getattr(self, f.name)
            if v is None or v is False:
                continue
            parts.append(f"{f.name}={v:g}" if not isinstance(v, bool) else f.name)
        return ", ".join(parts) if parts else "no cuts"

    # ---- application ----------------------------------------------------------------------
    def apply(self, pos, vel, galaxy=None, solar=None, helio=None, report=False):
        """Boolean mask of the stars that pass every cut.

        Parameters
        ----------
        pos, vel : arrays of shape (n, 3)
            Galactocentric positions (kpc) and velocities (km/s).
        galaxy : swerve.galaxy.Galaxy, optional
            Needed by the ``unbound`` cut (local escape speed).
        solar : SolarParameters or name, optional
            Solar parameters for the heliocentric cuts (default: the frames module's default).
        helio : dict, optional
            Precomputed heliocentric observables (``distance``, ``ra``, ``dec``, ``vlos``) to reuse.
        report : bool
            Also return ``{cut name: number of stars it removed (applied in order)}``.
        """
        pos = np.asarray(pos, dtype=float)
        vel = np.asarray(vel, dtype=float)
        n = len(pos)
        mask = np.ones(n, dtype=bool)
        removed: dict[str, int] = {}

        def cut(name, keep):
            nonlocal mask
            new = mask & keep
            removed[name] = int(mask.sum() - new.sum())
            mask = new

        r = np.linalg.norm(pos, axis=1)
        if self.r_min is not None:
            cut("r_min", r >= self.r_min)
        if self.r_max is not None:
            cut("r_max", r <= self.r_max)
        if self.outgoing:
            cut("outgoing", np.einsum("ij,ij->i", pos, vel) > 0.0)
        speed = np.linalg.norm(vel, axis=1)
        if self.v_min is not None:
            cut("v_min", speed >= self.v_min)
        if self.unbound:
            if galaxy is None:
                raise ValueError("selection unbound: needs a Galaxy to compute the local escape speed")
            vesc = np.full(n, np.inf)
            if mask.any():
                vesc[mask] = galaxy.escape_speed(pos[mask])
            cut("unbound", speed > vesc)
        if self.needs_heliocentric:
            if helio is None:
                helio = galacto_to_helio(pos, vel, solar)
            if self.d_min is not None:
                cut("d_min", helio["distance"] >= self.d_min)
            if self.d_max is not None:
                cut("d_max", helio["distance"] <= self.d_max)
            if self.abs_b_min is not None:
                cut("abs_b_min", np.abs(galactic_latitude(helio["ra"], helio["dec"])) >= self.abs_b_min)
            if self.dec_min is not None:
                cut("dec_min", helio["dec"] >= self.dec_min)
            if self.dec_max is not None:
                cut("dec_max", helio["dec"] <= self.dec_max)
            if self.vlos_min is not None:  # a training population: the true value (no errors)
                cut("vlos_min", helio["vlos"] >= self.vlos_min)
        if report:
            return mask, removed
        return mask

    def require_nonempty(self, mask, what="population"):
        """Raise :class:`EmptySelectionError` naming the cuts when ``mask`` keeps no star."""
        if not np.any(mask):
            raise EmptySelectionError(
                f"{what}: the selection ({self.describe()}) keeps no star; loosen the cuts"
            )


# -------------------------------------------------------------------------- declared selections
def declared_selection(catalog_meta, source: str = "catalog") -> Selection | None:
    """The selection a catalog declares in its meta (``selection``, a table of cuts as
    :meth:`Selection.to_dict` writes it; a FITS mock's meta is read back from its ``SWMnnnnn``
    header cards), or None when it declares none."""
    meta = dict(catalog_meta or {})
    if "selection" not in meta:
        cards = sorted(k for k in meta if isinstance(k, str) and k.upper().startswith("SWM") and k[3:].isdigit())
        if cards:
            try:
                meta = json.loads("".join(str(meta[k]) for k in cards))
            except ValueError:
                raise ValueError(f"{source}: its SWM header cards do not hold the JSON meta of a swerve mock") from None
            if not isinstance(meta, dict):
                return None
    sel = meta.get("selection")
    if sel is None:
        return None
    if isinstance(sel, Selection):
        return sel
    if not isinstance(sel, dict):
        raise ValueError(f"{source}: meta 'selection': expected a table of cuts (name: value), got {sel!r:.60}")
    return Selection.from_dict(sel, source=f"{source} (meta 'selection')")


def _same(a, b) -> bool:
    if a is None or b is None or isinstance(a, bool) or isinstance(b, bool):
        return a == b
    return abs(float(a) - float(b)) <= 1e-9 * max(1.0, abs(float(a)), abs(float(b)))


def _show(name, value) -> str:
    if value is None or value is False:
        return f"no {name} cut"
    if value is True:
        return name
    unit = " km/s" if name in ("v_min", "vlos_min") else ""
    return f"{name} = {value:g}{unit}"


def check_declared(catalog_meta, emulator_selection, source: str = "catalog") -> None:
    """Refuse (ValueError, one line) a catalog whose declared selection differs from the
    emulator's in a cut that changes the velocity distribution at a position
    (:data:`VELOCITY_CUTS`: ``v_min``, ``unbound``, ``vlos_min``).

    ``catalog_meta``: the catalog's meta (its ``selection``, see :func:`declared_selection`);
    a catalog that declares no selection is not checked. ``emulator_selection``: the emulator
    metadata's ``selection`` (a dict as :meth:`Selection.to_dict` writes it, a Selection, or
    None for an emulator that records none: then no velocity cut). Spatial cuts (radius,
    distance, latitude, declination) and ``outgoing`` are not compared: the likelihood conditions
    on each star's position and excludes inward-moving stars itself.
    """
    declared = declared_selection(catalog_meta, source)
    if declared is None:
        return
    if emulator_selection is None:
        emu = Selection(r_min=None, outgoing=False)
    elif isinstance(emulator_selection, Selection):
        emu = emulator_selection
    else:
        emu = Selection.from_dict(dict(emulator_selection), source="emulator metadata (selection)")
    for name in VELOCITY_CUTS:
        a, b = getattr(declared, name), getattr(emu, name)
        if not _same(a, b):
            fix = (f"train an emulator with [selection] {name} = {a:g}" if a not in (None, False, True)
                   else f"train an emulator with [selection] {name} = true" if a is True
                   else f"train an emulator without the {name} cut")
            raise ValueError(f"{source}: the catalog declares {_show(name, a)} (meta 'selection') but the emulator "
                             f"was trained with {_show(name, b)}: a velocity cut changes the velocity "
                             f"distribution the emulator models; {fix}")
