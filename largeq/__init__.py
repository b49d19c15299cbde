"""largeq: relaxation of isolated spin-1/2 chains beyond full diagonalization."""

__version__ = "0.1.0"
