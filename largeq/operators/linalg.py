"""Vector updates shared by the engines.

largeq's own operators (``largeq.operators``) provide an in-place fused product
``op.fused_update(x, y, alpha, beta, gamma)`` meaning ``y <- alpha*(H@x) + beta*x + gamma*y``
with no temporary vector.  Any other LinearOperator, scipy sparse matrix or dense array
works too through the slower fallback below, so engines can be tested on plain matrices.
"""

from __future__ import annotations

import numpy as np

__all__ = ["fused_update", "apply_into", "result_dtype"]


def result_dtype(op, x: np.ndarray) -> np.dtype:
    """dtype of op @ x."""
    return np.result_type(getattr(op, "dtype", np.float64), x.dtype)


def fused_update(op, x: np.ndarray, y: np.ndarray, alpha, beta, gamma) -> np.ndarray:
    """In place: ``y <- alpha * (op @ x) + beta * x + gamma * y``; returns ``y``.

    ``x`` and ``y`` must be distinct arrays.  With ``gamma == 0`` the old content of ``y``
    is ignored (it may hold garbage or NaN).
    """
    if x is y:
        raise ValueError("fused_update needs distinct input and output vectors")
    method = getattr(op, "fused_update", None)
    if method is not None:
        method(x, y, alpha, beta, gamma)
        return y
    hx = op @ x
    if gamma == 0:
        y[...] = alpha * hx
    else:
        y *= gamma
        y += alpha * hx
    if beta != 0:
        y += beta * x
    return y


def apply_into(op, x: np.ndarray, out: np.ndarray) -> np.ndarray:
    """``out <- op @ x`` without allocating when ``op`` is one of largeq's operators."""
    return fused_update(op, x, out, 1.0, 0.0, 0.0)
