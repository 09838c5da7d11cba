"""Refinement studies: observed order of convergence and extrapolated limit.

For three solutions on meshes of size h1 > h2 > h3 that follow
Q(h) = Q_inf + C h^p, the observed order p and the limit Q_inf follow from
the three values (Richardson extrapolation with an observed order; Roache,
Verification and Validation in Computational Science and Engineering, 1998).
"""
from __future__ import annotations

import numpy as np
from scipy.optimize import brentq


def observed_order(h, q) -> tuple[float, float]:
    """(Q_inf, p) from three sizes `h` (any length unit, decreasing) and
    values `q`. Raises ValueError when the values do not converge
    monotonically (no order can be observed)."""
    h, q = np.asarray(h, float), np.asarray(q, float)
    if len(h) != 3 or not (h[0] > h[1] > h[2] > 0):
        raise ValueError("need three decreasing mesh sizes")
    d1, d2 = q[0] - q[1], q[1] - q[2]
    if d1 == 0 or d2 == 0 or np.sign(d1) != np.sign(d2):
        raise ValueError(f"values {q.tolist()} do not converge monotonically")
    ratio = d1 / d2

    def mismatch(p):
        return (h[0] ** p - h[1] ** p) / (h[1] ** p - h[2] ** p) - ratio

    lo, hi = 0.05, 8.0
    if mismatch(lo) * mismatch(hi) > 0:
        raise ValueError(f"values {q.tolist()} show no order of convergence between {lo} and {hi}")
    p = brentq(mismatch, lo, hi)
    C = d2 / (h[1] ** p - h[2] ** p)
    return float(q[2] - C * h[2] ** p), float(p)
