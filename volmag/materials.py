"""Materials: how magnetisation M (A/m) responds to the local field H (A/m).

- :class:`LinearMaterial`: M = chi H, chi a scalar or a 3x3 tensor in the
  body's local frame (chi > -1; up to 1e5 and beyond for soft iron).
- :class:`PermanentMagnet`: M = Mr + chi_r H in the recoil region, with
  Mr = Br / mu0 along a direction in the body's local frame.
- :class:`BHCurve`: isotropic soft material from a measured B(H) curve.
- :class:`FroehlichKennelly`: isotropic soft material, M = Ms H / (a + |H|)
  (Froehlich 1881; Kennelly 1891; e.g. Jiles, Introduction to Magnetism and
  Magnetic Materials, 2nd ed. 1998).

Linear materials (the first two) are solved in one linear solve; the others
by Newton's method (:mod:`volmag.nonlinear`), which needs M(H) and its
Jacobian dM/dH for arrays of fields (n, 3).
"""
from __future__ import annotations

import csv
import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
from scipy.interpolate import PchipInterpolator

from .units import MU0


def _rotated(tensor_or_vector, rotation, is_tensor):
    a = np.asarray(tensor_or_vector, float)
    if rotation is None:
        return a
    return rotation @ a @ rotation.T if is_tensor else rotation @ a


@dataclass(frozen=True)
class LinearMaterial:
    """M = chi H. `susceptibility` is dimensionless: a scalar or a 3x3 tensor
    (nested tuples) in the body's local frame."""
    name: str
    susceptibility: float | tuple = 0.0
    is_linear = True

    def chi_tensor(self, rotation: np.ndarray | None = None) -> np.ndarray:
        """3x3 susceptibility in model axes for a body rotated by `rotation`."""
        chi = np.asarray(self.susceptibility, float)
        return _rotated(chi * np.eye(3) if chi.ndim == 0 else chi, rotation, True)

    def remanence_vector(self, rotation: np.ndarray | None = None) -> np.ndarray:
        """Remanent magnetisation (A/m) in model axes: none."""
        return np.zeros(3)

    @property
    def is_isotropic(self) -> bool:
        return np.ndim(self.susceptibility) == 0

    @property
    def is_magnetic(self) -> bool:
        return bool(np.any(np.asarray(self.susceptibility, float) != 0))


@dataclass(frozen=True)
class PermanentMagnet:
    """M = Mr + chi_r H (recoil line). `remanence` is Br (T) as a vector in the
    body's local frame; `recoil_susceptibility` chi_r (dimensionless, ~0.05
    for sintered NdFeB, common practice). `knee_field` (A/m, > 0, optional):
    the magnitude of the field opposing Mr beyond which irreversible loss is
    likely; the run warns when an element goes past it."""
    name: str
    remanence: tuple[float, float, float]
    recoil_susceptibility: float = 0.0
    knee_field: float | None = None
    is_linear = True

    def chi_tensor(self, rotation: np.ndarray | None = None) -> np.ndarray:
        return self.recoil_susceptibility * np.eye(3)

    def remanence_vector(self, rotation: np.ndarray | None = None) -> np.ndarray:
        """Mr = Br / mu0 (A/m) in model axes."""
        return _rotated(np.asarray(self.remanence, float) / MU0, rotation, False)

    @property
    def is_magnetic(self) -> bool:
        return True

    def knee_violations(self, H: np.ndarray, rotation: np.ndarray | None = None) -> np.ndarray:
        """Boolean mask of fields (n, 3) A/m whose component against Mr exceeds
        the knee field (irreversible demagnetisation likely)."""
        if self.knee_field is None:
            return np.zeros(len(H), bool)
        mr = self.remanence_vector(rotation)
        along = H @ (mr / np.linalg.norm(mr))
        return along < -self.knee_field


class _IsotropicSoft:
    """Shared Newton interface of isotropic nonlinear laws M = m(|H|) H/|H|."""
    is_linear = False

    def magnetisation(self, H: np.ndarray) -> np.ndarray:
        """M (n, 3), A/m, for fields H (n, 3), A/m."""
        h = np.linalg.norm(H, axis=1)
        chord = self.chord(h)
        return chord[:, None] * H

    def jacobian(self, H: np.ndarray) -> np.ndarray:
        """dM/dH (n, 3, 3): differential susceptibility along H, chord
        susceptibility m/|H| across it."""
        h = np.linalg.norm(H, axis=1)
        chord, diff = self.chord(h), self.differential(h)
        u = np.where(h[:, None] > 0, H / np.where(h > 0, h, 1.0)[:, None], 0.0)
        uu = u[:, :, None] * u[:, None, :]
        return chord[:, None, None] * np.eye(3) + (diff - chord)[:, None, None] * uu

    def chi_tensor(self, rotation=None) -> np.ndarray:
        """Initial susceptibility (as a 3x3), used for a first linear guess."""
        return self.differential(np.zeros(1))[0] * np.eye(3)

    def remanence_vector(self, rotation=None) -> np.ndarray:
        return np.zeros(3)

    @property
    def is_magnetic(self) -> bool:
        return True


@dataclass(frozen=True)
class FroehlichKennelly(_IsotropicSoft):
    """M = Ms H / (a + |H|): saturation magnetisation Ms (A/m) and the field
    a (A/m) at which M reaches Ms/2; initial susceptibility Ms/a."""
    name: str
    saturation: float
    half_field: float

    def magnitude(self, h):
        return self.saturation * h / (self.half_field + h)

    def chord(self, h):
        return self.saturation / (self.half_field + h)

    def differential(self, h):
        return self.saturation * self.half_field / (self.half_field + h) ** 2


class BHCurveError(ValueError):
    """A malformed B-H curve; names the file and the row (1-based)."""

    def __init__(self, path, row, message):
        self.path, self.row = path, row
        super().__init__(f"{path}:{row}: {message}" if row else f"{path}: {message}")


@dataclass(frozen=True, eq=False)
class BHCurve(_IsotropicSoft):
    """Soft material from a measured curve: `H` (A/m) and `B` (T), starting at
    (0, 0), increasing. Interpolated by a monotone piecewise-cubic Hermite
    spline (Fritsch & Carlson, SIAM J. Numer. Anal. 1980: no overshoot);
    beyond the last point B grows as mu0 H (M stays at its last value,
    dB/dH = mu0), the physical saturation limit."""
    name: str
    H: np.ndarray
    B: np.ndarray
    source: str = "<arrays>"
    _spline: PchipInterpolator = field(init=False, repr=False)

    def __post_init__(self):
        H, B = np.asarray(self.H, float), np.asarray(self.B, float)
        check_bh(H, B, self.source)
        object.__setattr__(self, "H", H)
        object.__setattr__(self, "B", B)
        object.__setattr__(self, "_spline", PchipInterpolator(H, B, extrapolate=False))

    @classmethod
    def from_csv(cls, path, name: str | None = None) -> "BHCurve":
        """Read a two-column CSV (H in A/m, B in T); an optional first row of
        column names and an optional units row ("A/m", "T") are allowed."""
        H, B = read_bh_csv(path)
        return cls(name or Path(path).stem, H, B, str(path))

    def flux_density(self, h):
        """B (T) for field magnitudes h (A/m) >= 0."""
        h = np.asarray(h, float)
        inside = self._spline(np.minimum(h, self.H[-1]))
        return np.where(h <= self.H[-1], inside, self.B[-1] + MU0 * (h - self.H[-1]))

    def magnitude(self, h):
        return self.flux_density(h) / MU0 - h

    def chord(self, h):
        h = np.asarray(h, float)
        small = h < 1e-12 * self.H[1]
        safe = np.where(small, 1.0, h)
        return np.where(small, self.differential(np.zeros_like(h)), self.magnitude(safe) / safe)

    def differential(self, h):
        """dM/dH along H (dimensionless)."""
        h = np.asarray(h, float)
        slope = self._spline.derivative()(np.minimum(h, self.H[-1]))
        return np.where(h < self.H[-1], slope / MU0 - 1.0, 0.0)


def check_bh(H: np.ndarray, B: np.ndarray, source: str = "<arrays>") -> None:
    """Raise BHCurveError unless the curve starts at the origin, H and B
    increase strictly, B >= mu0 H (M >= 0) and there are at least 4 points.
    Rows are reported 1-based counting data rows."""
    if len(H) != len(B) or len(H) < 4:
        raise BHCurveError(source, None, f"a B-H curve needs at least 4 points (got {len(H)})")
    for i in range(len(H)):
        if not (math.isfinite(H[i]) and math.isfinite(B[i])):
            raise BHCurveError(source, i + 1, "not a finite number")
    if H[0] != 0 or B[0] != 0:
        raise BHCurveError(source, 1, f"the curve must start at H = 0, B = 0 (got {H[0]:g}, {B[0]:g})")
    for i in range(1, len(H)):
        if not H[i] > H[i - 1]:
            raise BHCurveError(source, i + 1, f"H must increase (H = {H[i]:g} A/m after {H[i-1]:g})")
        if not B[i] > B[i - 1]:
            raise BHCurveError(source, i + 1, f"B must increase (B = {B[i]:g} T after {B[i-1]:g})")
        if B[i] < MU0 * H[i] * (1 - 1e-12):
            raise BHCurveError(source, i + 1, f"B = {B[i]:g} T is below mu0 H = {MU0 * H[i]:g} T "
                               "(negative magnetisation)")


def read_bh_csv(path) -> tuple[np.ndarray, np.ndarray]:
    """(H in A/m, B in T) from a CSV file; rows in errors count file lines."""
    path = Path(path)
    H, B, lines = [], [], []
    with open(path, newline="") as fh:
        rows = [(i + 1, r) for i, r in enumerate(csv.reader(fh)) if r and any(c.strip() for c in r)]
    for k, (line, row) in enumerate(rows):
        cells = [c.strip() for c in row]
        if len(cells) != 2:
            raise BHCurveError(path, line, f"expected two columns (H in A/m, B in T), got {len(cells)}")
        try:
            h, b = float(cells[0]), float(cells[1])
        except ValueError:
            if k < 2 and not H and _is_header(cells, line, path):
                continue
            raise BHCurveError(path, line, f"not a number: {','.join(cells)!r}") from None
        H.append(h)
        B.append(b)
        lines.append(line)
    H, B = np.array(H), np.array(B)
    try:
        check_bh(H, B, str(path))
    except BHCurveError as e:
        raise BHCurveError(path, lines[e.row - 1] if e.row else None, str(e).split(": ", 2)[-1]) from None
    return H, B


def _is_header(cells, line, path) -> bool:
    """Column names, or a units row that must say A/m and T."""
    low = [c.lower().replace(" ", "") for c in cells]
    if any(u in ("a/m", "t", "oe", "g", "ka/m", "mt", "gauss", "tesla") for u in low):
        if low != ["a/m", "t"]:
            raise BHCurveError(path, line, f"units row must be 'A/m, T' (got {', '.join(cells)!r})")
    return True


Material = LinearMaterial | PermanentMagnet | BHCurve | FroehlichKennelly
