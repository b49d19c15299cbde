"""Basis layer: the full space, magnetization sectors, symmetry sectors (momentum, reflection, spin flip),
their dimensions by counting, and product states written in a basis."""

from largeq.basis.spaces import MAX_SITES, Basis, choose_basis, full_basis, magnetization_basis

__all__ = ["MAX_SITES", "Basis", "choose_basis", "full_basis", "magnetization_basis"]
