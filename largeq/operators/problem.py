"""From a scenario to the objects the engines need: basis, operators, initial vector.

This is the one place where the scenario meets the numerical layer; engines never see a
scenario.  Data flows one way: scenario -> model (Pauli sums) -> basis -> operators.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING
from functools import cached_property

import numpy as np

from largeq.model import build as model
from largeq.basis.spaces import Basis, choose_basis
from largeq.model.pauli import PauliSum
from largeq.scenario.spec import Scenario
from largeq.basis.states import product_state

if TYPE_CHECKING:
    from largeq.operators.pauli_operator import PauliOperator

__all__ = ["Problem", "build_problem", "spin_conventions"]


def spin_conventions() -> dict[str, str]:
    """The conventions written into every result file (docs/conventions.md)."""
    return {
        "units": "hbar = 1; energies in units of the couplings given in the scenario; time in inverse energy units",
        "sites": "sites j = 0 .. L-1",
        "basis": "basis state = L-bit integer b; bit j = 1 means site j is up (sigma^z_j = +1)",
        "hamiltonian": "couplings and fields multiply spin operators S^a = sigma^a / 2",
        "observables": "observables are Pauli operators sigma^a (eigenvalues +-1)",
        "y_phase": "sigma^y |up> = i |down>",
    }


@dataclass(frozen=True, eq=False)
class Problem:
    """Everything a run needs, built from one scenario (no state vectors held).

    Attributes
    ----------
    scenario : Scenario
    hamiltonian : PauliSum
    basis : Basis
    basis_reason : str
        Why this basis was chosen, in words.
    symmetries : dict
    observables : dict[str, model.Observable]
    start : model.ProductState
    """

    scenario: Scenario
    hamiltonian: PauliSum
    basis: Basis
    basis_reason: str
    symmetries: dict
    observables: dict
    start: model.ProductState
    _ops: dict = field(default_factory=dict, repr=False)

    @cached_property
    def operator(self) -> PauliOperator:
        """The Hamiltonian on the chosen basis (matrix-free)."""
        from largeq.operators.pauli_operator import PauliOperator  # compiled kernels: imported when first needed

        return PauliOperator(self.hamiltonian, self.basis)

    def observable_operator(self, name: str) -> PauliOperator:
        if name not in self._ops:
            from largeq.operators.pauli_operator import PauliOperator

            self._ops[name] = PauliOperator(self.observables[name].pauli, self.basis)
        return self._ops[name]

    def initial_vector(self) -> tuple[np.ndarray, float]:
        """The initial state in the basis (complex, normalised) and the weight the basis captured."""
        sp = self.start.spinors
        return product_state(self.basis, sp[:, 0], sp[:, 1])

    @cached_property
    def group(self):
        """The symmetry group of H among T^j R^r F^f (``largeq.model.symmetry``), products included."""
        from largeq.model.symmetry import symmetry_group_of

        return symmetry_group_of(self.hamiltonian, self.scenario.chain.periodic)

    @property
    def n_sites(self) -> int:
        return self.basis.n_sites


def build_problem(scenario: Scenario) -> Problem:
    """Hamiltonian, observables, initial state and the smallest basis that holds them."""
    H = model.hamiltonian(scenario)
    sym = model.symmetries(scenario, H)
    start = model.initial_state(scenario)
    requested = scenario.sector.up_spins
    requested = None if requested == "auto" else int(requested)
    choice = choose_basis(
        scenario.n_sites,
        conserves_magnetization=sym["conserves_magnetization"],
        state_up_spins=start.up_spins,
        requested_up_spins=requested,
    )
    obs = model.observables(scenario, H)
    return Problem(scenario, H, choice.basis, choice.reason, sym, obs, start)
