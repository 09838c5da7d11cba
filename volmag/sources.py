"""Field sources: the applied field H_s (A/m) that the bodies respond to.

Every source provides `H(points)` for points (n, 3) in metres and, because the
nodal formulation needs it, the reduced scalar potential `potential(points)`
(A) with H_s = -grad(potential) inside the magnetic material.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .units import MU0


@dataclass(frozen=True)
class UniformField:
    """A uniform applied field H (A/m)."""
    H: tuple[float, float, float]

    @classmethod
    def from_B(cls, B) -> "UniformField":
        """Uniform field from its flux density B (T) in free space."""
        return cls(tuple(float(b) / MU0 for b in B))

    def field(self, points: np.ndarray) -> np.ndarray:
        """H_s (A/m) at points (n, 3) m."""
        points = np.atleast_2d(points)
        return np.broadcast_to(np.asarray(self.H, float), points.shape).copy()

    def potential(self, points: np.ndarray) -> np.ndarray:
        """Scalar potential (A) with H_s = -grad(potential): -H.r."""
        return -np.atleast_2d(points) @ np.asarray(self.H, float)


def total_source_field(sources, points: np.ndarray) -> np.ndarray:
    """Sum of all sources' H (A/m) at points (n, 3) m."""
    points = np.atleast_2d(np.asarray(points, float))
    H = np.zeros_like(points)
    for s in sources:
        H += s.field(points)
    return H


def total_source_potential(sources, points: np.ndarray) -> np.ndarray:
    """Sum of all sources' scalar potentials (A) at points (n, 3) m."""
    points = np.atleast_2d(np.asarray(points, float))
    phi = np.zeros(len(points))
    for s in sources:
        phi += s.potential(points)
    return phi
