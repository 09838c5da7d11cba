"""Shapes and bodies: what the magnetic material looks like and where it is.

All lengths here are in metres; case files and scripts convert from their
length unit once (see :mod:`volmag.units`).  A shape is described in its own
local frame (centred on the origin; cylinders and tubes have their axis along
local z); a :class:`Placement` moves it into the model.  Holes are made by
subtracting shapes that carry their own placement in the parent's local frame.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np


@dataclass(frozen=True)
class Placement:
    """Rigid motion: rotate by `angle_deg` about `axis` (through the local
    origin), then translate by `position` (m)."""
    position: tuple[float, float, float] = (0.0, 0.0, 0.0)
    axis: tuple[float, float, float] = (0.0, 0.0, 1.0)
    angle_deg: float = 0.0

    def rotation_matrix(self) -> np.ndarray:
        """3x3 rotation matrix (Rodrigues' formula)."""
        k = np.asarray(self.axis, float)
        k = k / np.linalg.norm(k)
        t = math.radians(self.angle_deg)
        K = np.array([[0, -k[2], k[1]], [k[2], 0, -k[0]], [-k[1], k[0], 0]])
        return np.eye(3) + math.sin(t) * K + (1 - math.cos(t)) * K @ K

    def apply(self, points: np.ndarray) -> np.ndarray:
        """Map local points (n, 3) to model coordinates (n, 3), metres."""
        return np.asarray(points, float) @ self.rotation_matrix().T + np.asarray(self.position, float)

    def to_local(self, points: np.ndarray) -> np.ndarray:
        """Inverse of :meth:`apply`: model points (n, 3) to local coordinates (n, 3), metres."""
        return (np.asarray(points, float) - np.asarray(self.position, float)) @ self.rotation_matrix()

    def matrix(self) -> np.ndarray:
        """3x4 affine matrix [R | t] of the motion (translation in m)."""
        return np.hstack([self.rotation_matrix(), np.reshape(self.position, (3, 1))])


@dataclass(frozen=True)
class Box:
    """Rectangular block with edge lengths `size` (m) along local x, y, z."""
    size: tuple[float, float, float]

    def volume(self) -> float:
        return float(np.prod(self.size))

    def half_extents(self) -> np.ndarray:
        """Half-widths (m) of the local axis-aligned bounding box."""
        return 0.5 * np.asarray(self.size, float)

    def inside(self, p: np.ndarray) -> np.ndarray:
        """True for local points (n, 3), m, inside or on the shape."""
        return np.all(np.abs(p) <= self.half_extents(), axis=1)


@dataclass(frozen=True)
class Sphere:
    radius: float  # m

    def volume(self) -> float:
        return 4.0 / 3.0 * math.pi * self.radius ** 3

    def half_extents(self) -> np.ndarray:
        return np.full(3, float(self.radius))

    def inside(self, p: np.ndarray) -> np.ndarray:
        return np.einsum("ij,ij->i", p, p) <= self.radius ** 2


@dataclass(frozen=True)
class Ellipsoid:
    semi_axes: tuple[float, float, float]  # m, along local x, y, z

    def volume(self) -> float:
        return 4.0 / 3.0 * math.pi * float(np.prod(self.semi_axes))

    def half_extents(self) -> np.ndarray:
        return np.asarray(self.semi_axes, float)

    def inside(self, p: np.ndarray) -> np.ndarray:
        return np.sum((p / self.half_extents()) ** 2, axis=1) <= 1.0


@dataclass(frozen=True)
class Cylinder:
    """Solid circular cylinder, axis along local z, centred on the origin."""
    radius: float  # m
    height: float  # m

    def volume(self) -> float:
        return math.pi * self.radius ** 2 * self.height

    def half_extents(self) -> np.ndarray:
        return np.array([self.radius, self.radius, 0.5 * self.height], float)

    def inside(self, p: np.ndarray) -> np.ndarray:
        return (p[:, 0] ** 2 + p[:, 1] ** 2 <= self.radius ** 2) & (np.abs(p[:, 2]) <= 0.5 * self.height)


@dataclass(frozen=True)
class Tube:
    """Hollow circular cylinder, axis along local z, centred on the origin."""
    inner_radius: float  # m
    outer_radius: float  # m
    height: float  # m

    def volume(self) -> float:
        return math.pi * (self.outer_radius ** 2 - self.inner_radius ** 2) * self.height

    def half_extents(self) -> np.ndarray:
        return np.array([self.outer_radius, self.outer_radius, 0.5 * self.height], float)

    def inside(self, p: np.ndarray) -> np.ndarray:
        rho2 = p[:, 0] ** 2 + p[:, 1] ** 2
        return ((rho2 <= self.outer_radius ** 2) & (rho2 >= self.inner_radius ** 2)
                & (np.abs(p[:, 2]) <= 0.5 * self.height))


@dataclass(frozen=True)
class SurfaceFile:
    """Closed triangulated surface read from STL/OBJ/PLY. `scale` converts the
    file's coordinates to metres. The volume is that of the surface."""
    path: Path
    scale: float = 1.0

    def volume(self) -> float:
        from .meshing import load_surface
        return float(load_surface(self).volume)

    def bounds(self) -> np.ndarray:
        """Local axis-aligned bounding box, (2, 3) array [min, max] in m."""
        from .meshing import load_surface
        return np.asarray(load_surface(self).bounds, float)

    def inside(self, p: np.ndarray) -> np.ndarray:
        """True for local points (n, 3), m, enclosed by the surface."""
        from .meshing import surface_contains
        return surface_contains(self, p)


Shape = Box | Sphere | Ellipsoid | Cylinder | Tube | SurfaceFile


def local_bounds(shape: Shape) -> np.ndarray:
    """Axis-aligned bounding box of a shape in its local frame, (2, 3) [min, max], m."""
    if isinstance(shape, SurfaceFile):
        return shape.bounds()
    h = shape.half_extents()
    return np.array([-h, h])


@dataclass(frozen=True)
class Cut:
    """A shape removed from a body, placed in the body's local frame."""
    shape: Shape
    placement: Placement = Placement()


@dataclass(frozen=True)
class MeshSpec:
    """How to mesh a body: "tet" (gmsh) or "hex" (regular voxel grid).
    `size` is the target element edge length (m); None picks one from the body.
    `surface_size` (m, tets only) refines the elements at the body's surface,
    growing to `size` inside: the surface charges carry most of the error, so
    a graded mesh reaches a given accuracy with several times fewer elements."""
    element: str = "tet"
    size: float | None = None
    surface_size: float | None = None


@dataclass(frozen=True)
class Body:
    """A piece of magnetic material: a shape, minus cuts, placed in the model."""
    name: str
    shape: Shape
    material: "object"  # volmag.materials.Material
    placement: Placement = Placement()
    cuts: tuple[Cut, ...] = ()
    mesh: MeshSpec = MeshSpec()

    def nominal_volume(self) -> float | None:
        """Exact volume of the shape (m^3), or None when a cut overlaps in a way
        that has no simple closed form (cuts are assumed inside the parent and
        disjoint; meshing reports the meshed volume anyway)."""
        v = self.shape.volume()
        for c in self.cuts:
            v -= c.shape.volume()
        return v

    def inside(self, points: np.ndarray) -> np.ndarray:
        """True for model points (n, 3), m, in the material: inside the shape
        and outside every cut (a point on a cut's surface counts as removed)."""
        local = self.placement.to_local(np.reshape(points, (-1, 3)))
        keep = self.shape.inside(local)
        for c in self.cuts:
            idx = np.flatnonzero(keep)
            keep[idx] = ~c.shape.inside(c.placement.to_local(local[idx]))
        return keep

    def bounds(self) -> np.ndarray:
        """Model-frame axis-aligned box (2, 3) [min, max], m, enclosing the body."""
        lo, hi = local_bounds(self.shape)
        corners = np.array([[x, y, z] for x in (lo[0], hi[0]) for y in (lo[1], hi[1])
                            for z in (lo[2], hi[2])])
        world = self.placement.apply(corners)
        return np.array([world.min(axis=0), world.max(axis=0)])


def characteristic_length(shape: Shape) -> float:
    """A typical size of the shape (m), used to choose default mesh sizes."""
    if isinstance(shape, Box):
        return float(min(shape.size))
    if isinstance(shape, Sphere):
        return 2 * shape.radius
    if isinstance(shape, Ellipsoid):
        return 2 * float(min(shape.semi_axes))
    if isinstance(shape, Cylinder):
        return float(min(2 * shape.radius, shape.height))
    if isinstance(shape, Tube):
        return float(min(shape.outer_radius - shape.inner_radius, shape.height))
    return float(shape.volume() ** (1 / 3))
