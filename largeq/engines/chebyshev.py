"""Chebyshev series of an operator: the rescaling into [-1, 1] and ``sum_n c_n T_n(Ht) v``.

Shared by the KPM densities, the typical-state filters and propagation.  Rescaling and recursion as in
A. Weisse, G. Wellein, A. Alvermann & H. Fehske, Rev. Mod. Phys. 78, 275 (2006).
"""

from __future__ import annotations

import numpy as np

from largeq.operators.linalg import fused_update, result_dtype
from largeq.operators.vectors import axpy

__all__ = ["chebyshev_scale", "check_vector", "apply_chebyshev_series", "apply_scaled_series"]


def chebyshev_scale(bounds, eps: float = 0.01) -> tuple[float, float]:
    """Rescaling ``(a, b)`` that maps the spectrum into [-1, 1].

    ``a = (E_max - E_min) / (2 - eps)``, ``b = (E_max + E_min) / 2`` (energy units).

    Parameters
    ----------
    bounds : tuple (e_min, e_max) or object with ``e_min`` and ``e_max`` attributes
        Bounds that enclose the whole spectrum of the operator (energy units).
    eps : float
        Safety margin, 0 < eps < 1; the spectrum then lies in [-1 + eps/2, 1 - eps/2].
    """
    if hasattr(bounds, "e_min") and hasattr(bounds, "e_max"):
        e_min, e_max = float(bounds.e_min), float(bounds.e_max)
    else:
        try:
            e_min, e_max = (float(x) for x in bounds)
        except (TypeError, ValueError):
            raise ValueError(
                f"bounds must be (e_min, e_max) or have e_min/e_max attributes, got {bounds!r}"
            ) from None
    if not (np.isfinite(e_min) and np.isfinite(e_max)) or not e_max > e_min:
        raise ValueError(f"bounds must be finite with e_max > e_min, got ({e_min}, {e_max})")
    if not 0.0 < eps < 1.0:
        raise ValueError(f"eps must lie in (0, 1), got {eps}")
    return (e_max - e_min) / (2.0 - eps), 0.5 * (e_max + e_min)


def check_vector(op, v: np.ndarray, name: str = "v") -> np.ndarray:
    """``v`` as a 1-d array whose length matches the operator (ValueError naming ``name`` otherwise)."""
    v = np.asarray(v)
    if v.ndim != 1:
        raise ValueError(f"{name} must be a 1-d vector, got shape {v.shape}")
    shape = getattr(op, "shape", None)
    if shape is not None and (shape[0] != shape[1] or shape[1] != v.shape[0]):
        raise ValueError(f"{name} has length {v.shape[0]} but the operator has shape {shape}")
    return v


def apply_chebyshev_series(
    op,
    v: np.ndarray,
    coeffs: np.ndarray,
    bounds,
    *,
    eps: float = 0.01,
    overwrite: bool = False,
    work: np.ndarray | None = None,
    out: np.ndarray | None = None,
) -> np.ndarray:
    """``w = sum_n coeffs[n] T_n(Ht) v`` with ``Ht = (H - b)/a`` (see :func:`chebyshev_scale`).

    Costs ``len(coeffs) - 1`` products.  Holds 3 full-size vectors (the recursion pair and
    the sum) besides ``v``; with ``overwrite=True`` ``v`` itself serves as the first recursion
    vector (destroyed) and the function holds 2 more.  ``work`` and ``out`` may supply those
    buffers (same shape and a dtype that can hold the result; distinct from ``v``).
    """
    a, b = chebyshev_scale(bounds, eps)
    return apply_scaled_series(op, v, coeffs, a, b, overwrite=overwrite, work=work, out=out)


def apply_scaled_series(op, v, coeffs, a, b, *, overwrite=False, work=None, out=None):
    """:func:`apply_chebyshev_series` with the rescaling ``(a, b)`` given directly."""
    coeffs = np.asarray(coeffs)
    if coeffs.ndim != 1 or coeffs.size < 1:
        raise ValueError(f"coeffs must be a non-empty 1-d array, got shape {coeffs.shape}")
    v = check_vector(op, v)
    dtype = np.result_type(result_dtype(op, v), coeffs.dtype)
    if overwrite and v.dtype == dtype and v.flags.writeable:
        prev = v
    else:
        prev = np.array(v, dtype=dtype, copy=True)
    cur = work if work is not None else np.empty_like(prev)
    acc = out if out is not None else np.empty_like(prev)
    for name, buf in (("work", cur), ("out", acc)):
        if buf.shape != prev.shape or np.result_type(buf.dtype, dtype) != buf.dtype:
            raise ValueError(f"{name} must have shape {prev.shape} and hold dtype {dtype}")
        if buf is prev or np.may_share_memory(buf, prev):
            raise ValueError(f"{name} must not share memory with v")
    np.multiply(prev, coeffs[0], out=acc)
    if coeffs.size == 1:
        return acc
    fused_update(op, prev, cur, 1.0 / a, -b / a, 0.0)
    axpy(coeffs[1], cur, acc)
    for n in range(2, coeffs.size):
        fused_update(op, cur, prev, 2.0 / a, -2.0 * b / a, -1.0)
        prev, cur = cur, prev
        axpy(coeffs[n], cur, acc)
    return acc
