"""Materials: how magnetisation responds to the local field.

Linear soft material: M = chi H, chi a scalar or a 3x3 tensor given in the
body's local frame (chi > -1; up to 1e5 and beyond for soft iron).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class LinearMaterial:
    """M = chi H. `susceptibility` is dimensionless: a scalar or a 3x3 tensor
    (nested tuples) in the body's local frame."""
    name: str
    susceptibility: float | tuple = 0.0

    def chi_tensor(self, rotation: np.ndarray | None = None) -> np.ndarray:
        """3x3 susceptibility in model axes for a body rotated by `rotation`."""
        chi = np.asarray(self.susceptibility, float)
        chi = chi * np.eye(3) if chi.ndim == 0 else chi
        if rotation is not None:
            chi = rotation @ chi @ rotation.T
        return chi

    @property
    def is_isotropic(self) -> bool:
        return np.ndim(self.susceptibility) == 0

    @property
    def is_magnetic(self) -> bool:
        return bool(np.any(np.asarray(self.susceptibility, float) != 0))


Material = LinearMaterial
