"""Built-in model presets, expanded into explicit couplings and fields (S units).

Every preset is turned into the same :class:`~largeq.scenario.Coupling` and
:class:`~largeq.scenario.Field` records a user could write by hand, so that model building has a
single code path.  Couplings multiply S^a S^b with S = sigma / 2; fields multiply S^a.  The chain
length and boundary come from the scenario's ``[chain]`` table (every preset works on a ring or an
open chain).

Presets
-------
``j1j2_ring`` (params ``j1 = 1``, ``j2 = 0``, ``delta1 = 1``, ``delta2 = 1``)
    H = sum_{r=1,2} J_r sum_j (S^x_j S^x_{j+r} + S^y_j S^y_{j+r} + Delta_r S^z_j S^z_{j+r}).
    Range-2 terms are left out when j2 = 0.
``mixed_field_ising`` (params ``j = 1``, ``g = -1.05``, ``h = 0.5``)
    Given in Pauli units, as usually published: H = sum_j J s^z_j s^z_{j+1} + sum_j (g s^x_j + h s^z_j)
    with s = sigma.  In S units: zz coupling 4J, x field 2g, z field 2h.
``random_field_heisenberg`` (params ``j = 1``, ``w`` required, ``seed`` drawn and recorded if absent)
    H = J sum_j S_j . S_{j+1} + sum_j h_j S^z_j with h_j uniform in [-W, W]
    (``numpy.random.default_rng(seed).uniform(-W, W, L)``).
``xx_chain`` (param ``j = 1``)
    H = J sum_j (S^x_j S^x_{j+1} + S^y_j S^y_{j+1}).
"""

from __future__ import annotations

from largeq.scenario.terms import Coupling, Field

__all__ = ["expand", "PRESET_DOCS"]

PRESET_DOCS = {
    "j1j2_ring": "H = sum_{r=1,2} J_r sum_j (S^x_j S^x_{j+r} + S^y_j S^y_{j+r} + Delta_r S^z_j S^z_{j+r})",
    "mixed_field_ising": "H = sum_j J s^z_j s^z_{j+1} + g s^x_j + h s^z_j (Pauli units s = sigma; "
                         "in S units zz = 4J, field x = 2g, field z = 2h)",
    "random_field_heisenberg": "H = J sum_j S_j.S_{j+1} + sum_j h_j S^z_j, h_j uniform in [-W, W]",
    "xx_chain": "H = J sum_j (S^x_j S^x_{j+1} + S^y_j S^y_{j+1})",
}


def j1j2_ring(j1: float, j2: float, delta1: float, delta2: float) -> tuple[list[Coupling], list[Field]]:
    """J1-J2 XXZ chain: range-1 coupling (xy = J1, zz = J1 Delta1), range-2 (xy = J2, zz = J2 Delta2)."""
    cs = [Coupling(1, j1, j1, j1 * delta1, "xxz")]
    if j2 != 0:
        cs.append(Coupling(2, j2, j2, j2 * delta2, "xxz"))
    return cs, []


def mixed_field_ising(j: float, g: float, h: float) -> tuple[list[Coupling], list[Field]]:
    """Mixed-field Ising chain, Pauli-unit parameters translated to S units (4J, 2g, 2h)."""
    cs = [Coupling(1, 0.0, 0.0, 4.0 * j, "xxz")]
    fs = []
    if g != 0:
        fs.append(Field("x", "uniform", 2.0 * g))
    if h != 0:
        fs.append(Field("z", "uniform", 2.0 * h))
    return cs, fs


def random_field_heisenberg(j: float, w: float, seed: int) -> tuple[list[Coupling], list[Field]]:
    """Heisenberg chain J S.S plus random z fields h_j in [-W, W] (seeded)."""
    return [Coupling(1, j, j, j, "xxz")], [Field("z", "random", float(w), int(seed))]


def xx_chain(j: float) -> tuple[list[Coupling], list[Field]]:
    """XX chain: range-1 coupling xy = J, zz = 0."""
    return [Coupling(1, j, j, 0.0, "xxz")], []


_BUILDERS = {
    "j1j2_ring": j1j2_ring,
    "mixed_field_ising": mixed_field_ising,
    "random_field_heisenberg": random_field_heisenberg,
    "xx_chain": xx_chain,
}


def expand(name: str, params: dict) -> tuple[list[Coupling], list[Field]]:
    """Couplings and fields of preset ``name`` with (validated, complete) ``params``."""
    return _BUILDERS[name](**params)
