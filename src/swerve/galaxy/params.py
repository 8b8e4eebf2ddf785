"""Parameter declarations: each physical parameter is declared once, with its name, unit,
default, allowed range and the source of its default value.

The same declaration drives validation, ``repr``, serialisation, the Galaxy's flat parameter
dictionary and (later) prior bounds and emulator input columns.
"""

from __future__ import annotations

import math
from dataclasses import dataclass


@dataclass(frozen=True)
class Parameter:
    """One declared physical parameter.

    Parameters
    ----------
    name : str
        Unique name, e.g. ``"q_z"``; used on the command line and in every file.
    unit : str
        Internal unit as an astropy unit string (``"Msun"``, ``"kpc"``, ``""`` for none).
    default : float
        Default value in ``unit``.
    low, high : float
        Allowed range (closed unless ``low_open``/``high_open``).
    doc : str
        One-line meaning.
    source : str
        Where the default value comes from.
    """

    name: str
    unit: str
    default: float
    low: float
    high: float
    doc: str = ""
    source: str = ""
    low_open: bool = False
    high_open: bool = False
    kind: str = "dimensionless"

    def describe_range(self) -> str:
        lo = "(" if self.low_open else "["
        hi = ")" if self.high_open else "]"
        unit = f" {self.unit}" if self.unit else ""
        return f"{lo}{self.low:g}, {self.high:g}{hi}{unit}"

    def validate(self, value) -> float:
        """Return ``value`` as a float, or raise ValueError naming the parameter and its range."""
        try:
            v = float(value)
        except (TypeError, ValueError):
            raise ValueError(
                f"parameter {self.name}: expected a number in {self.describe_range()}, got {value!r}"
            ) from None
        if not math.isfinite(v):
            raise ValueError(
                f"parameter {self.name}: expected a finite number in {self.describe_range()}, got {v!r}"
            )
        too_low = v <= self.low if self.low_open else v < self.low
        too_high = v >= self.high if self.high_open else v > self.high
        if too_low or too_high:
            raise ValueError(
                f"parameter {self.name} = {v:g} is outside its allowed range {self.describe_range()}"
            )
        return v

    def to_dict(self) -> dict:
        return {
            "name": self.name,
            "unit": self.unit,
            "default": self.default,
            "low": self.low,
            "high": self.high,
            "doc": self.doc,
            "source": self.source,
        }
