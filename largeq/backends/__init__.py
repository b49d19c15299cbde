"""Compute backends: the compiled numba CPU path (default) and the optional jax accelerator path.

``make_operator(pauli, basis, backend="numba")`` returns :class:`largeq.operators.PauliOperator`;
``backend="jax"`` returns :class:`largeq.backends.jax_backend.JaxPauliOperator` (jax is imported
only then).  :func:`get_backend` gives the operator class and the matching engines of one backend.

Nothing here imports jax at module import time; installing largeq without jax works, and asking
for the jax backend without jax raises :class:`BackendUnavailable` with the install command.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass
from typing import Any, Callable

__all__ = ["BACKENDS", "Backend", "BackendUnavailable", "get_backend", "make_operator", "available_backends"]

#: allowed backend names, default first
BACKENDS = ("numba", "jax")

JAX_INSTALL_HINT = ('install it with  pip install "largeq[jax]"  (CPU: pip install "jax[cpu]"; '
                    'NVIDIA GPU: pip install "jax[cuda12]")')


class BackendUnavailable(ImportError):
    """The requested backend's package is not installed."""


@dataclass(frozen=True)
class Backend:
    """One backend: its operator class and engines with the numba path's contracts.

    Attributes
    ----------
    name : str
    operator : type
        ``operator(pauli, basis, **options)``.
    evolve_chebyshev : callable
        ``evolve_chebyshev(op, psi0, times, bounds=None, tol=1e-10, on_output=None, ...)``.
    chebyshev_moments : callable
        ``chebyshev_moments(op, v, n_moments, bounds, *, eps=0.01)``.
    """

    name: str
    operator: type
    evolve_chebyshev: Callable[..., Any]
    chebyshev_moments: Callable[..., Any]


def _check_name(name) -> str:
    if not isinstance(name, str) or name.lower() not in BACKENDS:
        raise ValueError(f"backend: got {name!r}; allowed: {', '.join(repr(b) for b in BACKENDS)}")
    return name.lower()


def _numba_evolve(op, psi0, times, bounds=None, tol=1e-10, on_output=None, **kw):
    from largeq.engines.propagate import evolve

    return evolve(op, psi0, times, method="chebyshev", bounds=bounds, tol=tol, block=1, on_output=on_output, **kw)


def get_backend(name: str = "numba") -> Backend:
    """The backend called ``name`` (one of :data:`BACKENDS`).

    Raises
    ------
    ValueError
        Unknown name (the message lists the allowed values).
    BackendUnavailable
        ``"jax"`` asked for but jax cannot be imported (the message says how to install it).
    """
    name = _check_name(name)
    if name == "numba":
        from largeq.engines.kpm import chebyshev_moments
        from largeq.operators.pauli_operator import PauliOperator

        return Backend("numba", PauliOperator, _numba_evolve, chebyshev_moments)
    try:
        mod = importlib.import_module(".jax_backend", __name__)
    except ImportError as exc:
        raise BackendUnavailable(f"backend 'jax' needs the jax package, which could not be imported ({exc}); "
                                 f"{JAX_INSTALL_HINT}") from exc
    return Backend("jax", mod.JaxPauliOperator, mod.evolve_jax, mod.chebyshev_moments_jax)


def make_operator(pauli, basis, backend: str = "numba", **options):
    """The Pauli sum ``pauli`` on ``basis`` as a matrix-free operator of ``backend``.

    ``options`` go to the jax operator (``dtype=numpy.complex64``, ``sharding=...``); the numba
    operator takes none.
    """
    b = get_backend(backend)
    if b.name == "numba" and options:
        raise ValueError(f"backend 'numba' takes no options, got {sorted(options)}")
    return b.operator(pauli, basis, **options)


def available_backends() -> tuple[str, ...]:
    """Backends whose packages import here (numba always; jax when installed)."""
    out = ["numba"]
    try:
        get_backend("jax")
        out.append("jax")
    except BackendUnavailable:
        pass
    return tuple(out)
