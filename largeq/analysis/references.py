"""Known analytic curves that a scenario can be compared with (drawn on its relaxation plot).

Only one case so far: the XX chain (H = J sum_j (S^x_j S^x_{j+1} + S^y_j S^y_{j+1}), S units, no
fields) started from a Néel state.  It maps to free fermions hopping with amplitude J/2, and on
the infinite chain every site magnetization follows

    <sigma^z_j(t)> = <sigma^z_j(0)> J0(2 J t)

(Flesch, Cramer, McCulloch, Schollwöck & Eisert, Phys. Rev. A 78, 033608 (2008)).  Every
observable that is a signed sum of sigma^z_j therefore follows A(0) J0(2 J t).  On a ring of L
sites the fastest fermions (speed J) meet their images after about t = L / (4 J): the
infinite-chain curve is a valid reference only before that time.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
from scipy.special import j0

__all__ = ["KnownCurve", "known_curves"]


@dataclass(frozen=True)
class KnownCurve:
    """An analytic reference ``value(t)`` for one observable, valid for ``t <= valid_until``."""

    label: str
    source: str
    value: Callable[[np.ndarray], np.ndarray]
    valid_until: float


def _xx_coupling(scenario) -> float | None:
    """J of a pure nearest-neighbour XX chain (x == y, z == 0, no fields, no bonds), else None."""
    if scenario.fields or scenario.bonds or len(scenario.couplings) != 1:
        return None
    c = scenario.couplings[0]
    if c.range != 1 or c.z != 0 or c.x != c.y or c.x == 0:
        return None
    return float(c.x)


def known_curves(scenario, initial_values: dict[str, float]) -> dict[str, KnownCurve]:
    """Analytic curves for the observables of ``scenario`` where one is known (see the module docstring).

    Parameters
    ----------
    scenario : Scenario
    initial_values : dict
        ⟨A(0)⟩ per observable name (the amplitude of the reference curve).
    """
    J = _xx_coupling(scenario)
    if J is None or scenario.start.state != "neel" or not scenario.chain.periodic:
        return {}  # on an open chain the edges reflect the fermions: no single closed form per site
    L = scenario.n_sites
    valid = L / (4.0 * abs(J))
    out = {}
    for spec in scenario.observables:
        if spec.kind not in ("site", "sum") or spec.axis != "z":
            continue
        a0 = float(initial_values.get(spec.name, np.nan))
        if not np.isfinite(a0):
            continue
        out[spec.name] = KnownCurve(
            label=f"{a0:+.3g}·J0(2Jt) (infinite chain)",
            source="free fermions: Flesch et al., Phys. Rev. A 78, 033608 (2008)",
            value=(lambda t, a0=a0: a0 * j0(2.0 * J * np.asarray(t, float))),
            valid_until=valid,
        )
    return out
