"""Randomness: every random draw in swerve comes from an explicit numpy Generator."""

from __future__ import annotations

import numpy as np


def as_generator(rng) -> tuple[np.random.Generator, int | None]:
    """``(Generator, seed)`` from a Generator (seed None) or an integer seed (recorded)."""
    if isinstance(rng, (int, np.integer)) and not isinstance(rng, bool):
        return np.random.default_rng(int(rng)), int(rng)
    if isinstance(rng, np.random.Generator):
        return rng, None
    raise ValueError("rng: expected a numpy Generator or an integer seed")
