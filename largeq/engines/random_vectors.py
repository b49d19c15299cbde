"""Random vectors for stochastic traces and typical states (Gaussian or random-phase entries)."""

from __future__ import annotations

import numpy as np

from largeq.operators.vectors import norm

__all__ = ["random_state", "child_generators", "VECTOR_KINDS"]

VECTOR_KINDS = ("gaussian", "phase")


def random_state(
    dim: int,
    rng: np.random.Generator,
    *,
    kind: str = "gaussian",
    dtype=complex,
    normalize: bool = True,
    out: np.ndarray | None = None,
) -> np.ndarray:
    """A random vector of length ``dim``; 1 full-size vector (written into ``out`` if given).

    kind='gaussian': i.i.d. Gaussian entries with ``E|r_i|^2 = 1`` (complex: real and imaginary
    parts of variance 1/2; real if ``dtype`` is real).  kind='phase': ``e^{2 pi i u}`` (random
    signs if real).  With ``normalize`` the vector is scaled to unit norm (for Gaussian entries
    this is a Haar-random state).
    """
    if int(dim) != dim or dim < 1:
        raise ValueError(f"dim must be a positive integer, got {dim!r}")
    if kind not in VECTOR_KINDS:
        raise ValueError(f"kind must be one of {VECTOR_KINDS}, got {kind!r}")
    if not isinstance(rng, np.random.Generator):
        raise ValueError(f"rng must be a numpy.random.Generator, got {type(rng).__name__}")
    dtype = np.dtype(dtype)
    if dtype not in (np.dtype(np.complex128), np.dtype(np.float64)):
        raise ValueError(f"dtype must be complex128 or float64, got {dtype}")
    dim = int(dim)
    if out is None:
        out = np.empty(dim, dtype=dtype)
    elif out.shape != (dim,) or out.dtype != dtype or not out.flags.c_contiguous:
        raise ValueError(f"out must be a contiguous ({dim},) {dtype} array")
    is_complex = dtype.kind == "c"
    if kind == "gaussian":
        flat = out.view(np.float64)
        rng.standard_normal(out=flat)
        if is_complex:
            flat *= np.sqrt(0.5)
    else:  # random phases / signs, in chunks so that no full-size temporary is made
        chunk = 1 << 20
        for s0 in range(0, dim, chunk):
            u = rng.random(min(chunk, dim - s0))
            if is_complex:
                out[s0 : s0 + u.size] = np.exp(2j * np.pi * u)
            else:
                out[s0 : s0 + u.size] = np.where(u < 0.5, -1.0, 1.0)
    if normalize:
        out /= norm(out)
    return out


def child_generators(rng, n: int) -> list[np.random.Generator]:
    """``n`` independent generators derived from ``rng`` without changing it.

    ``rng`` is a seed (int, sequence, SeedSequence) or a numpy Generator.  For a Generator the children
    equal those ``rng.spawn(n)`` would give, but the caller's generator is left as it was (its seed
    sequence is copied, not advanced), so the same ``rng`` always yields the same children.
    """
    if int(n) != n or n < 0:
        raise ValueError(f"n must be a non-negative integer, got {n!r}")
    if isinstance(rng, np.random.Generator):
        ss = rng.bit_generator.seed_seq
        if not isinstance(ss, np.random.SeedSequence):
            raise ValueError("rng must be seeded from a numpy SeedSequence (e.g. numpy.random.default_rng(seed))")
        copy = np.random.SeedSequence(ss.entropy, spawn_key=ss.spawn_key, pool_size=ss.pool_size,
                                      n_children_spawned=ss.n_children_spawned)
        kind = type(rng.bit_generator)
        return [np.random.Generator(kind(child)) for child in copy.spawn(int(n))]
    return np.random.default_rng(rng).spawn(int(n))
