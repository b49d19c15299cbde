"""Compiled bit helpers shared by every basis and operator kernel (64-bit basis states)."""

from __future__ import annotations

from numba import njit

__all__ = ["popcount", "zsign"]


@njit(inline="always", cache=True)
def popcount(v):
    v = v - ((v >> 1) & 0x5555555555555555)
    v = (v & 0x3333333333333333) + ((v >> 2) & 0x3333333333333333)
    v = (v + (v >> 4)) & 0x0F0F0F0F0F0F0F0F
    return ((v * 0x0101010101010101) >> 56) & 0xFF


@njit(inline="always", cache=True)
def zsign(z, b):
    """(-1)^{popcount(z & ~b)}: +1 or -1."""
    return 1 - 2 * (popcount(z & ~b) & 1)
