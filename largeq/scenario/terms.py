"""The terms a Hamiltonian is written with: translation-invariant couplings, explicit bonds and on-site
fields (S units, S = sigma / 2).  Shared by the scenario schema and the model presets."""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["Coupling", "Bond", "Field"]


@dataclass(frozen=True)
class Coupling:
    """Translation-invariant two-spin coupling at distance ``range`` (S units).

    Term: sum over bonds (j, j + range) of ``x S^x S^x + y S^y S^y + z S^z S^z``.
    ``style`` records how it was written: 'xxz' (keys xy/zz, x == y) or 'xyz' (keys x/y/z).
    """

    range: int
    x: float
    y: float
    z: float
    style: str = "xxz"


@dataclass(frozen=True)
class Bond:
    """An explicit bond between two sites: ``x S^x_i S^x_j + y S^y_i S^y_j + z S^z_i S^z_j``."""

    sites: tuple[int, int]
    x: float
    y: float
    z: float
    style: str = "xxz"


@dataclass(frozen=True)
class Field:
    """On-site field term ``sum_j h_j S^axis_j`` (S units).

    Attributes
    ----------
    axis : str
        'x', 'y' or 'z'.
    pattern : str
        'uniform' (h_j = h), 'staggered' (h_j = (-1)^j h), 'random' (h_j uniform in [-W, W],
        drawn with ``numpy.random.default_rng(seed).uniform(-W, W, L)``) or 'values' (explicit list).
    strength : float
        h, or W for 'random'; unused (0.0) for 'values'.
    seed : int or None
        Seed of the random pattern (always recorded, drawn if the user gave none).
    values : tuple of float or None
        Explicit per-site values for pattern 'values'.
    """

    axis: str
    pattern: str
    strength: float = 0.0
    seed: int | None = None
    values: tuple[float, ...] | None = None

    def site_values(self, n_sites: int) -> np.ndarray:
        """Per-site field h_j as a float array of length ``n_sites``."""
        if self.pattern == "uniform":
            return np.full(n_sites, float(self.strength))
        if self.pattern == "staggered":
            return float(self.strength) * (1.0 - 2.0 * (np.arange(n_sites) % 2))
        if self.pattern == "random":
            rng = np.random.default_rng(self.seed)
            return rng.uniform(-float(self.strength), float(self.strength), n_sites)
        return np.array(self.values, dtype=float)
