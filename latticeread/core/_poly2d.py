"""Low-order 2-D polynomials in normalised frame coordinates (shared by the field models).

A point ``(x, y)`` in pixels becomes ``u = (x - cx) / s``, ``v = (y - cy) / s`` with a centre
``(cx, cy)`` and a length ``s`` (pixels), so that the coefficients of a polynomial are of
comparable size over the frame; monomials ``u**i * v**j`` are listed by total degree
``i + j``, then by decreasing ``i``.
"""

from __future__ import annotations

import numpy as np

from latticeread.errors import CalibrationError

__all__ = ["poly_terms", "poly_design"]


def poly_terms(order: int, *, min_degree: int = 0) -> tuple[tuple[int, int], ...]:
    """Exponent pairs ``(i, j)`` of the monomials ``u**i v**j`` with ``min_degree <= i + j <= order``."""
    order, min_degree = int(order), int(min_degree)
    if order < min_degree or order > 6:
        raise CalibrationError(f"polynomial order {order} is outside {min_degree}..6")
    return tuple((d - j, j) for d in range(min_degree, order + 1) for j in range(d + 1))


def poly_design(x, y, *, centre, scale: float, terms) -> np.ndarray:
    """The (N, len(terms)) matrix of monomials at points ``x, y`` (pixels)."""
    u = (np.asarray(x, float).ravel() - float(centre[0])) / float(scale)
    v = (np.asarray(y, float).ravel() - float(centre[1])) / float(scale)
    if not terms:
        return np.zeros((u.size, 0))
    return np.stack([u ** i * v ** j for i, j in terms], axis=1)
