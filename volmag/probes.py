"""Probes: sets of points (m) at which the field is reported.

A probe is a named, fixed set of points in model coordinates, with the
parameters it was built from kept in `spec` so that a results file can record
how the points came about and viewers can reshape the values on a grid.
Points may also come from a CSV file (:func:`read_points_csv`); they are
then an ordinary "points" probe whose spec names the file.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

KINDS = ("points", "line", "plane", "box", "sphere")


def _vec3(v, what: str) -> np.ndarray:
    a = np.asarray(v, float)
    if a.shape != (3,):
        raise ValueError(f"{what} must be 3 numbers (m), got shape {a.shape}")
    return a


def _count(n, what: str) -> int:
    if isinstance(n, bool) or int(n) != n or n < 2:
        raise ValueError(f"{what} must be an integer >= 2, got {n!r}")
    return int(n)


@dataclass(frozen=True, eq=False)
class Probe:
    """Named points (n, 3) in metres. `kind` is "points", "line", "plane" or
    "box"; `spec` holds the constructor's parameters (lengths in m, counts as
    ints, plain lists) for the results file. The points array is read-only.
    Two probes are equal when name, kind, spec and points are equal."""
    name: str
    kind: str
    points: np.ndarray
    spec: dict = field(default_factory=dict)

    def __post_init__(self):
        if self.kind not in KINDS:
            raise ValueError(f"probe kind must be one of {', '.join(KINDS)}, got {self.kind!r}")
        pts = np.array(self.points, dtype=float).reshape(-1, 3)
        if len(pts) == 0:
            raise ValueError("a probe needs at least one point")
        pts.setflags(write=False)
        object.__setattr__(self, "points", pts)

    def __eq__(self, other):
        if not isinstance(other, Probe):
            return NotImplemented
        return (self.name, self.kind, self.spec) == (other.name, other.kind, other.spec) \
            and np.array_equal(self.points, other.points)

    def __hash__(self):
        return hash((self.name, self.kind, len(self.points)))

    @property
    def grid_shape(self) -> tuple[int, ...]:
        """Shape for reshaping per-point values: (n,) for points, lines and
        spheres, (nu, nv) for planes, (nx, ny, nz) for boxes (C order, last
        index fastest)."""
        if self.kind in ("plane", "box"):
            return tuple(self.spec["n"])
        return (len(self.points),)

    @classmethod
    def from_points(cls, name: str, pts) -> "Probe":
        """Probe at explicit points `pts` (n, 3), metres."""
        pts = np.asarray(pts, float).reshape(-1, 3)
        return cls(name, "points", pts, {"points": pts.tolist()})

    @classmethod
    def from_file(cls, name: str, path, metres_per_unit: float = 1.0) -> "Probe":
        """Probe at the points of the CSV file `path` (see :func:`read_points_csv`),
        coordinates in units of `metres_per_unit` m."""
        pts = read_points_csv(path) * metres_per_unit
        return cls(name, "points", pts, {"points_file": str(path)})

    @classmethod
    def line(cls, name: str, start, end, n: int) -> "Probe":
        """`n` >= 2 evenly spaced points from `start` to `end` (m), both ends included."""
        a, b = _vec3(start, "start"), _vec3(end, "end")
        n = _count(n, "n")
        t = np.linspace(0.0, 1.0, n)[:, None]
        return cls(name, "line", a + t * (b - a), {"start": a.tolist(), "end": b.tolist(), "n": n})

    @classmethod
    def plane(cls, name: str, origin, u, v, nu: int, nv: int) -> "Probe":
        """Parallelogram grid origin + i/(nu-1) u + j/(nv-1) v (m), i < nu, j < nv;
        point (i, j) is at index i*nv + j."""
        o, u, v = _vec3(origin, "origin"), _vec3(u, "u"), _vec3(v, "v")
        nu, nv = _count(nu, "nu"), _count(nv, "nv")
        s, t = np.meshgrid(np.linspace(0, 1, nu), np.linspace(0, 1, nv), indexing="ij")
        pts = o + s.reshape(-1, 1) * u + t.reshape(-1, 1) * v
        return cls(name, "plane", pts, {"origin": o.tolist(), "u": u.tolist(), "v": v.tolist(),
                                         "n": [nu, nv]})

    @classmethod
    def box(cls, name: str, lo, hi, n=(2, 2, 2)) -> "Probe":
        """Regular grid filling the axis-aligned box [lo, hi] (m), n = (nx, ny, nz)
        points per axis (each >= 2, ends included); point (i, j, k) is at index
        (i*ny + j)*nz + k."""
        lo, hi = _vec3(lo, "lo"), _vec3(hi, "hi")
        if len(n) != 3:
            raise ValueError(f"n must be 3 integers, got {n!r}")
        n = [_count(k, "n") for k in n]
        axes = [np.linspace(lo[d], hi[d], n[d]) for d in range(3)]
        pts = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
        return cls(name, "box", pts, {"min": lo.tolist(), "max": hi.tolist(), "n": n})

    @classmethod
    def sphere(cls, name: str, center, radius: float, n: int) -> "Probe":
        """`n` >= 2 points spread evenly over the sphere of `radius` (m) about
        `center` (m): the Fibonacci lattice, point i at height
        z_i = 1 - (2i + 1)/n and azimuth 2 pi i / phi^2 (phi the golden ratio;
        Gonzalez, Math. Geosci. 42, 49 (2010) -- from memory). Each point
        stands for an equal area 4 pi radius^2 / n."""
        c = _vec3(center, "center")
        if not (math.isfinite(radius) and radius > 0):
            raise ValueError(f"radius must be > 0 (m), got {radius!r}")
        n = _count(n, "n")
        i = np.arange(n)
        z = 1.0 - (2.0 * i + 1.0) / n
        rho = np.sqrt(1.0 - z * z)
        phi = 2.0 * math.pi * i * (2.0 - (1.0 + math.sqrt(5.0)) / 2.0)  # 2 - phi = 1/phi^2
        unit = np.stack([rho * np.cos(phi), rho * np.sin(phi), z], axis=1)
        return cls(name, "sphere", c + radius * unit, {"center": c.tolist(), "radius": float(radius), "n": n})


def read_points_csv(path) -> np.ndarray:
    """Points (n, 3) from a CSV file: three comma-separated numbers x, y, z a
    line, in whatever unit the caller says; a first line of column names is
    allowed, blank lines and lines starting with '#' are skipped.
    ValueError names the line of a bad row."""
    rows, first = [], True
    for k, line in enumerate(Path(path).read_text(encoding="utf-8").splitlines(), 1):
        text = line.strip()
        if not text or text.startswith("#"):
            continue
        try:
            values = [float(c) for c in text.split(",")]
        except ValueError:
            if first:  # column names
                first = False
                continue
            raise ValueError(f"line {k}: expected three numbers x, y, z, got {text!r}") from None
        first = False
        if len(values) != 3 or not all(math.isfinite(v) for v in values):
            raise ValueError(f"line {k}: expected three finite numbers x, y, z, got {text!r}")
        rows.append(values)
    if not rows:
        raise ValueError("no points in the file")
    return np.array(rows)
