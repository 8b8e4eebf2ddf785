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
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

import numpy as np

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
}


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
            from .fileio import did_you_mean

            key = sorted(unknown)[0]
            raise ValueError(f"{source}: unknown selection key {key!r}{did_you_mean(key, names, list_all=True)}")
        return cls(**d)

    @property
    def needs_heliocentric(self) -> bool:
        return any(getattr(self, k) is not None for k in ("d_min", "d_max", "abs_b_min", "dec_min", "dec_max"))

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
            Precomputed heliocentric observables (``distance``, ``ra``, ``dec``) to reuse.
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
                from .frames import galacto_to_helio

                helio = galacto_to_helio(pos, vel, solar)
            if self.d_min is not None:
                cut("d_min", helio["distance"] >= self.d_min)
            if self.d_max is not None:
                cut("d_max", helio["distance"] <= self.d_max)
            if self.abs_b_min is not None:
                from .frames import galactic_latitude

                cut("abs_b_min", np.abs(galactic_latitude(helio["ra"], helio["dec"])) >= self.abs_b_min)
            if self.dec_min is not None:
                cut("dec_min", helio["dec"] >= self.dec_min)
            if self.dec_max is not None:
                cut("dec_max", helio["dec"] <= self.dec_max)
        if report:
            return mask, removed
        return mask

    def require_nonempty(self, mask, what="population"):
        """Raise :class:`EmptySelectionError` naming the cuts when ``mask`` keeps no star."""
        if not np.any(mask):
            raise EmptySelectionError(
                f"{what}: the selection ({self.describe()}) keeps no star; loosen the cuts"
            )
