"""State vectors in a basis: product states (z-basis or tilted) and random states."""

from __future__ import annotations

import numpy as np
from numba import njit, prange

from largeq.basis.spaces import Basis

__all__ = ["product_state", "basis_state", "random_state"]


def _site_table(amp_down: np.ndarray, amp_up: np.ndarray, first: int, count: int) -> np.ndarray:
    """Amplitude of every ``count``-bit pattern of sites first .. first+count-1 (bit q = site first+q)."""
    table = np.ones(1, np.complex128)
    for q in range(count):
        j = first + q
        # new bit q is the most significant so far: pattern = old + bit * 2^q
        table = np.concatenate([table * amp_down[j], table * amp_up[j]])
    return table


@njit(parallel=True, cache=True)
def _fill(offset, lo_up, lo_start, lo_list, amp_hi, amp_lo, out):
    for hi in prange(offset.shape[0]):
        off = offset[hi]
        if off < 0:
            continue
        s0 = lo_start[lo_up[hi]]
        size = lo_start[lo_up[hi] + 1] - s0
        a = amp_hi[hi]
        for k in range(size):
            out[off + k] = a * amp_lo[lo_list[s0 + k]]


def product_state(basis: Basis, amp_down, amp_up, *, normalize: bool = True) -> tuple[np.ndarray, float]:
    """Vector of the product state prod_j (amp_down[j] |down>_j + amp_up[j] |up>_j) in ``basis``.

    In a magnetization sector this is the projection onto the sector.  Returns the vector
    (complex128, one full-size vector) and the weight ||P psi||^2 the basis captured (1 for
    the full space and a normalised state).
    """
    L = basis.n_sites
    amp_down = np.asarray(amp_down, dtype=np.complex128).reshape(-1)
    amp_up = np.asarray(amp_up, dtype=np.complex128).reshape(-1)
    if amp_down.shape != (L,) or amp_up.shape != (L,):
        raise ValueError(f"product_state: need {L} amplitudes per spin state, got {amp_down.shape} and {amp_up.shape}")
    norms = np.abs(amp_down) ** 2 + np.abs(amp_up) ** 2
    if np.any(norms == 0):
        raise ValueError("product_state: a site has zero amplitude for both up and down")
    amp_down = amp_down / np.sqrt(norms)
    amp_up = amp_up / np.sqrt(norms)
    amp_lo = _site_table(amp_down, amp_up, 0, basis.n_lo)
    amp_hi = _site_table(amp_down, amp_up, basis.n_lo, basis.n_hi)
    out = np.empty(basis.dim, np.complex128)
    _fill(basis.block_offset, basis.block_lo_up, basis.lo_start, basis.lo_list, amp_hi, amp_lo, out)
    weight = float(np.vdot(out, out).real)
    if weight < 1e-300:
        raise ValueError("product_state: the state has no weight in this basis")
    if normalize:
        out /= np.sqrt(weight)
    return out, weight


def basis_state(basis: Basis, bits: int, dtype=np.complex128) -> np.ndarray:
    """The z-basis product state |bits> (bit j = site j, 1 = up)."""
    idx = int(basis.index([bits])[0])
    if idx < 0:
        raise ValueError(f"basis state {bits:#b} is not in the basis ({basis.label})")
    v = np.zeros(basis.dim, dtype=dtype)
    v[idx] = 1.0
    return v


def random_state(dim: int, rng: np.random.Generator, *, real: bool = False) -> np.ndarray:
    """A normalised Gaussian random vector (Haar-random for complex); one full-size vector."""
    if real:
        v = rng.standard_normal(dim)
    else:
        v = rng.standard_normal(dim) + 1j * rng.standard_normal(dim)
    v /= np.linalg.norm(v)
    return v
