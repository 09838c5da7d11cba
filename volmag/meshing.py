"""Meshing bodies into volume elements: tetrahedra (gmsh) or hexahedra (voxels).

Tetrahedra.  Primitive shapes are built as exact CAD solids in gmsh's
OpenCASCADE kernel (an ellipsoid is a dilated sphere, a tube is a cylinder
minus a cylinder), cuts are OCC boolean differences, and gmsh fills them
(HXT, then Netgen's optimiser), with sizes refined where the surface curves.
A triangulated surface file, or any body with a surface-file part, is
combined with manifold3d on triangulated shapes (curved primitives are then
faceted at about the element size); gmsh remeshes each closed shell of the
result at the element size with its new nodes on the old triangles, and fills
the volume.  Meshing is deterministic: one thread and a fixed random seed.

Hexahedra.  Cells of a regular grid aligned with the model axes; a cell is
material when its centre is inside the body.  All hex bodies of a model share
one grid, so interactions depend only on integer cell offsets.  An
axis-aligned box that sets the grid is represented exactly: the cell edge per
axis is size_i / round(size_i / h) and the grid planes fall on its faces.

All lengths are metres, volumes m^3.
"""
from __future__ import annotations

import contextlib
import functools
import math
import time
import warnings
from dataclasses import dataclass
from pathlib import Path

import gmsh
import numpy as np
import trimesh

from .geometry import (Body, Box, Cylinder, Ellipsoid, Sphere, SurfaceFile, Tube,
                       characteristic_length)

#: Default element size is the body's characteristic length over this
#: (voxels need more: their staircase error is first order in h).
DEFAULT_DIVISIONS = {"tet": 6, "hex": 10}
#: ... coarsened so that a default mesh has at most about this many elements
#: (the dense solver stores (3n)^2 numbers for n hexes, less for tets' nodes).
DEFAULT_MAX_ELEMENTS = {"tet": 20000, "hex": 4000}
#: Mean volume of a gmsh tetrahedron of target edge h is about h^3/5
#: (measured on spheres and boxes; the regular tetrahedron has h^3/8.5).
TET_VOLUME_FACTOR = 0.2
#: Curvature-adapted sizing: at least this many elements per 2*pi radians.
CURVATURE_POINTS = 12
#: Curvature refinement never goes below this fraction of the target size.
MIN_SIZE_FRACTION = 0.2
#: Candidate cells tested per block when voxelising (bounds memory).
VOXEL_BLOCK = 1_000_000

#: VTK hexahedron corner order as offsets (di, dj, dk) from the cell's low corner.
HEX_CORNERS = np.array([[0, 0, 0], [1, 0, 0], [1, 1, 0], [0, 1, 0],
                        [0, 0, 1], [1, 0, 1], [1, 1, 1], [0, 1, 1]], np.int64)


# ----------------------------------------------------------------------------
# data


@dataclass(frozen=True, eq=False)
class Mesh:
    """Volume mesh of all bodies. Treat the arrays as read-only.

    nodes (n, 3) float64, m; cells (m, 4) int64 positively oriented tets or
    (m, 8) int64 hexes in VTK corner order; cell_type "tet" | "hex"; body_id
    (m,) int32 index into the model's body list.  Hex meshes also carry
    cell_size (3,) m (all cells equal), grid_index (m, 3) int64 integer cell
    coordinates (smallest index 0 per axis over the whole model) and
    grid_origin (3,) m, the centre of cell (0, 0, 0): a cell's centre is
    grid_origin + grid_index * cell_size.
    """
    nodes: np.ndarray
    cells: np.ndarray
    cell_type: str
    body_id: np.ndarray
    cell_size: np.ndarray | None = None
    grid_index: np.ndarray | None = None
    grid_origin: np.ndarray | None = None

    def __post_init__(self):
        if self.cell_type not in ("tet", "hex"):
            raise ValueError(f"cell_type must be 'tet' or 'hex', not {self.cell_type!r}")
        width = 4 if self.cell_type == "tet" else 8
        fix = {"nodes": np.asarray(self.nodes, np.float64).reshape(-1, 3),
               "cells": np.asarray(self.cells, np.int64).reshape(-1, width),
               "body_id": np.asarray(self.body_id, np.int32).reshape(-1)}
        if self.cell_type == "hex":
            if self.cell_size is None or self.grid_index is None or self.grid_origin is None:
                raise ValueError("a hex mesh needs cell_size, grid_index and grid_origin")
            fix.update(cell_size=np.asarray(self.cell_size, np.float64).reshape(3),
                       grid_index=np.asarray(self.grid_index, np.int64).reshape(-1, 3),
                       grid_origin=np.asarray(self.grid_origin, np.float64).reshape(3))
        for k, v in fix.items():
            object.__setattr__(self, k, v)
        if len(self.body_id) != len(self.cells):
            raise ValueError("body_id must have one entry per cell")

    @property
    def n_cells(self) -> int:
        return len(self.cells)

    def centroids(self) -> np.ndarray:
        """Cell centroids (m, 3), m."""
        if self.cell_type == "hex":
            return self.grid_origin + self.grid_index * self.cell_size
        return self.nodes[self.cells].mean(axis=1)

    def volumes(self) -> np.ndarray:
        """Cell volumes (m,), m^3, positive."""
        if self.cell_type == "hex":
            return np.full(self.n_cells, float(np.prod(self.cell_size)))
        return tet_signed_volumes(self.nodes, self.cells)

    def subset(self, mask: np.ndarray, new_body_id: int | None = None) -> "Mesh":
        """The cells selected by `mask` (bool (m,) or indices), with unused
        nodes dropped; body_id set to `new_body_id` when given.  Hex grid
        indices and origin are kept, so offsets stay those of the full grid."""
        cells = self.cells[mask]
        used, inverse = np.unique(cells, return_inverse=True)
        body = self.body_id[mask] if new_body_id is None else np.full(len(cells), new_body_id)
        grid = {}
        if self.cell_type == "hex":
            grid = dict(cell_size=self.cell_size, grid_index=self.grid_index[mask],
                        grid_origin=self.grid_origin)
        return Mesh(self.nodes[used], inverse.reshape(cells.shape), self.cell_type, body, **grid)


@dataclass(frozen=True)
class MeshStats:
    """What meshing one body produced.

    volume and exact_volume in m^3; volume_error = (volume - exact) / exact;
    quality_min / quality_mean: normalised radius ratio 3 r_in / r_circ of
    the tetrahedra (1 for a regular one; None for hexes); size: target edge
    length for tets, or the largest hex cell edge (m); seconds: wall time.
    """
    body: str
    element: str
    n_cells: int
    n_nodes: int
    volume: float
    exact_volume: float | None
    volume_error: float | None
    quality_min: float | None
    quality_mean: float | None
    size: float
    seconds: float

    def summary(self) -> str:
        """One line for logs."""
        exact = ("exact unknown" if self.exact_volume is None else
                 f"exact {self.exact_volume:.6g}, error {self.volume_error:+.2e}")
        quality = ("" if self.quality_min is None else
                   f", quality min {self.quality_min:.3f} mean {self.quality_mean:.3f}")
        return (f"{self.body}: {self.n_cells} {self.element} cells, {self.n_nodes} nodes, "
                f"size {self.size:.4g} m, volume {self.volume:.6g} m^3 ({exact}){quality}, "
                f"{self.seconds:.2f} s")

    def as_dict(self) -> dict:
        """Plain-Python dict (JSON-ready)."""
        return dict(self.__dict__)


# ----------------------------------------------------------------------------
# the model


def mesh_model(bodies, *, verbose: bool = False) -> tuple[Mesh, list[MeshStats]]:
    """Mesh every body (lengths in m) and concatenate them; body_id indexes
    `bodies`.  Each body is meshed on its own (no nodes shared between bodies).
    All bodies must use the same element type.  `verbose` lets gmsh print and
    prints one summary line per body."""
    bodies = list(bodies)
    if not bodies:
        raise ValueError("no bodies to mesh")
    kinds: dict[str, list[str]] = {}
    for b in bodies:
        if b.mesh.element not in ("tet", "hex"):
            raise ValueError(f"body {b.name!r}: mesh element must be 'tet' or 'hex', "
                             f"not {b.mesh.element!r}")
        kinds.setdefault(b.mesh.element, []).append(b.name)
    if len(kinds) > 1:
        listing = "; ".join(f"{k}: {', '.join(v)}" for k, v in kinds.items())
        raise ValueError(f"all bodies must use the same mesh element type ({listing})")
    mesh, stats = (_mesh_tets if "tet" in kinds else _mesh_hexes)(bodies, verbose)
    if verbose:
        for s in stats:
            print(s.summary())
    return mesh, stats


def element_size(body: Body) -> float:
    """Element edge length (m) for a body: its MeshSpec.size, or by default
    characteristic_length / DEFAULT_DIVISIONS, coarsened when that would give
    more than about DEFAULT_MAX_ELEMENTS elements, but never beyond the
    characteristic length (a thin body keeps an element through its thickness)."""
    if body.mesh.size is not None:
        if not body.mesh.size > 0:
            raise ValueError(f"body {body.name!r}: mesh size must be positive, got {body.mesh.size}")
        return float(body.mesh.size)
    element = body.mesh.element
    length = characteristic_length(body.shape)
    h = length / DEFAULT_DIVISIONS[element]
    per_cell = h ** 3 * (TET_VOLUME_FACTOR if element == "tet" else 1.0)
    n = body.shape.volume() / per_cell
    if n > DEFAULT_MAX_ELEMENTS[element]:
        h *= (n / DEFAULT_MAX_ELEMENTS[element]) ** (1 / 3)
    return min(h, length)


def exact_volume(body: Body) -> float | None:
    """Volume of the described body (m^3): Body.nominal_volume(), except that a
    cut body built only of boxes, spheres, cylinders and tubes uses the volume
    of OCC's exact boolean result (so a hole running out of the body is right).
    None when cuts overlap the body's boundary and no exact value is known."""
    nominal = body.nominal_volume()
    if not body.cuts or _uses_surface(body):
        return nominal
    with _gmsh_session(False):
        _add_occ_body(body)
        cad = sum(gmsh.model.occ.getMass(3, t) for _, t in gmsh.model.getEntities(3))
    if not _uses_ellipsoid(body):
        return cad  # analytic surfaces: OCC integrates them to rounding error
    # OCC's dilated sphere is a B-spline, its volume good to ~1e-3 only
    return nominal if abs(cad - nominal) <= 1e-3 * abs(cad) else None


def _stats(body, element, nodes, cells, volume, h, t0, quality=None) -> MeshStats:
    exact = exact_volume(body)
    err = None if exact is None else (volume - exact) / exact
    qmin, qmean = (None, None) if quality is None else (float(quality.min()), float(quality.mean()))
    return MeshStats(body.name, element, len(cells), len(nodes), float(volume), exact, err,
                     qmin, qmean, float(h), time.perf_counter() - t0)


# ----------------------------------------------------------------------------
# tetrahedra

def _mesh_tets(bodies, verbose):
    all_nodes, all_cells, ids, stats, offset = [], [], [], [], 0
    for i, body in enumerate(bodies):
        t0 = time.perf_counter()
        h = element_size(body)
        nodes, tets = mesh_body_tets(body, h, verbose=verbose)
        vols = tet_signed_volumes(nodes, tets)
        stats.append(_stats(body, "tet", nodes, tets, vols.sum(), h, t0, tet_quality(nodes, tets)))
        all_nodes.append(nodes)
        all_cells.append(tets + offset)
        ids.append(np.full(len(tets), i, np.int32))
        offset += len(nodes)
    return Mesh(np.vstack(all_nodes), np.vstack(all_cells), "tet", np.concatenate(ids)), stats


def mesh_body_tets(body: Body, h: float, *, verbose: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Tetrahedralise one body with target edge `h` (m); returns nodes (n, 3)
    in model coordinates (m) and positively oriented tets (m, 4)."""
    hs = min(h, body.mesh.surface_size or h)
    boundary = _boundary_triangulation(body, hs, verbose) if _uses_surface(body) else None
    with _gmsh_session(verbose):
        _set_mesh_options(h, hs)
        if boundary is not None:
            _add_discrete_volume(*boundary)
        else:
            _add_occ_body(body)
        if not gmsh.model.getEntities(3):
            raise ValueError(f"body {body.name!r} is empty after its cuts")
        if hs < h:
            _grade_from_surface(hs, h)
        try:
            gmsh.model.mesh.generate(3)
            gmsh.model.mesh.optimize("Netgen")
        except Exception as e:  # gmsh raises plain Exception with its last error
            raise ValueError(f"body {body.name!r}{_file_note(body)}: gmsh could not mesh "
                             f"the volume ({e})") from None
        nodes, tets = _gmsh_tets()
    if len(tets) == 0:
        raise ValueError(f"body {body.name!r}: gmsh produced no tetrahedra")
    return orient_tets(body.placement.apply(nodes), tets)


@contextlib.contextmanager
def _gmsh_session(verbose: bool):
    """A fresh gmsh model, deterministic and silent unless verbose.  gmsh keeps
    global state, so it is initialised and finalised around each use (or, if
    the caller already initialised it, a scratch model is added and removed)."""
    owner = not gmsh.isInitialized()
    if owner:
        gmsh.initialize(readConfigFiles=False, interruptible=False)
    else:
        previous = gmsh.model.getCurrent()
    gmsh.option.setNumber("General.Terminal", 1 if verbose else 0)
    gmsh.option.setNumber("General.Verbosity", 5 if verbose else 1)
    gmsh.option.setNumber("General.NumThreads", 1)
    gmsh.option.setNumber("Mesh.RandomSeed", 1)
    gmsh.model.add("volmag")
    try:
        yield
    finally:
        if owner:
            gmsh.finalize()
        else:
            gmsh.model.remove()
            gmsh.model.setCurrent(previous)


def _grade_from_surface(hs: float, h: float) -> None:
    """Element size hs on the body's surfaces, growing linearly to h over a
    distance of 3 h into the body (gmsh Distance + Threshold fields)."""
    field = gmsh.model.mesh.field
    dist = field.add("Distance")
    field.setNumbers(dist, "SurfacesList", [t for _, t in gmsh.model.getEntities(2)])
    field.setNumber(dist, "Sampling", 50)
    ramp = field.add("Threshold")
    for key, value in (("InField", dist), ("SizeMin", hs), ("SizeMax", h), ("DistMin", 0.0),
                       ("DistMax", 3.0 * h)):
        field.setNumber(ramp, key, value)
    field.setAsBackgroundMesh(ramp)
    gmsh.option.setNumber("Mesh.MeshSizeExtendFromBoundary", 0)


def _set_mesh_options(h: float, hs: float | None = None) -> None:
    opt = gmsh.option.setNumber
    opt("Mesh.MeshSizeMax", h)
    opt("Mesh.MeshSizeMin", MIN_SIZE_FRACTION * min(h, hs or h))
    opt("Mesh.MeshSizeFromCurvature", CURVATURE_POINTS)
    # HXT, then Netgen's optimiser (see mesh_body_tets): as good as Delaunay +
    # Netgen on round bodies, and unlike it leaves no slivers in thin plates
    opt("Mesh.Algorithm3D", 10)
    opt("Mesh.Optimize", 1)
    opt("Mesh.OptimizeNetgen", 0)
    opt("Mesh.ElementOrder", 1)


def _occ_shape(shape) -> list[tuple[int, int]]:
    """Add a primitive (local frame) to the OCC model; returns its dim-tags."""
    occ = gmsh.model.occ
    if isinstance(shape, Box):
        sx, sy, sz = map(float, shape.size)
        return [(3, occ.addBox(-sx / 2, -sy / 2, -sz / 2, sx, sy, sz))]
    if isinstance(shape, Sphere):
        return [(3, occ.addSphere(0, 0, 0, shape.radius))]
    if isinstance(shape, Ellipsoid):
        tags = [(3, occ.addSphere(0, 0, 0, 1.0))]
        occ.dilate(tags, 0, 0, 0, *map(float, shape.semi_axes))
        return tags
    if isinstance(shape, Cylinder):
        return [(3, occ.addCylinder(0, 0, -shape.height / 2, 0, 0, shape.height, shape.radius))]
    if isinstance(shape, Tube):
        outer = occ.addCylinder(0, 0, -shape.height / 2, 0, 0, shape.height, shape.outer_radius)
        if shape.inner_radius <= 0:
            return [(3, outer)]
        inner = occ.addCylinder(0, 0, -shape.height / 2, 0, 0, shape.height, shape.inner_radius)
        out, _ = occ.cut([(3, outer)], [(3, inner)])
        return out
    raise TypeError(f"not a CAD primitive: {shape!r}")


def _occ_place(tags, placement) -> None:
    """Rigid motion of OCC entities (rotation then translation, as Placement)."""
    occ = gmsh.model.occ
    if placement.angle_deg % 360 != 0:
        occ.rotate(tags, 0, 0, 0, *map(float, placement.axis), math.radians(placement.angle_deg))
    if any(placement.position):
        occ.translate(tags, *map(float, placement.position))


def _add_occ_body(body: Body) -> None:
    """The body's shape minus its cuts, in its local frame, synchronised."""
    occ = gmsh.model.occ
    tags = _occ_shape(body.shape)
    tools = []
    for c in body.cuts:
        t = _occ_shape(c.shape)
        _occ_place(t, c.placement)
        tools += t
    if tools:
        occ.cut(tags, tools)
    occ.synchronize()


def _add_discrete_volume(verts: np.ndarray, faces: np.ndarray) -> None:
    """Volumes bounded by a closed triangulation, used as the boundary mesh:
    one volume per outward shell, with the cavity shells inside it as holes."""
    shells = surface_shells(verts, faces)
    loops, first = [], 1  # gmsh node tags are global: each shell numbers after the last
    for tri, _, _ in shells:
        surf = gmsh.model.addDiscreteEntity(2)
        used, local = np.unique(faces[tri], return_inverse=True)
        gmsh.model.mesh.addNodes(2, surf, np.arange(first, first + len(used)), verts[used].ravel())
        gmsh.model.mesh.addElementsByType(surf, 2, [], local.ravel() + first)
        first += len(used)
        loops.append(gmsh.model.geo.addSurfaceLoop([surf]))
    for k, (_, sign, _) in enumerate(shells):
        if sign > 0:
            holes = [loops[j] for j, (_, _, parent) in enumerate(shells) if parent == k]
            gmsh.model.geo.addVolume([loops[k], *holes])
    gmsh.model.geo.synchronize()


def surface_shells(verts: np.ndarray, faces: np.ndarray) -> list[tuple[np.ndarray, int, int | None]]:
    """Connected shells of a closed oriented triangulation: (face indices,
    +1 outward / -1 cavity, index of the innermost shell enclosing it or
    None).  Raises ValueError unless bodies and cavities alternate (a cavity
    inside a body, a body inside a cavity...), which the winding-number
    definition of inside needs."""
    from scipy.sparse import coo_matrix
    from scipy.sparse.csgraph import connected_components
    verts, faces = np.asarray(verts, float), np.asarray(faces, np.int64)
    n = len(verts)
    graph = coo_matrix((np.ones(2 * len(faces)), (faces[:, [0, 1]].ravel(), faces[:, [1, 2]].ravel())),
                       shape=(n, n))
    _, label = connected_components(graph, directed=False)
    face_label = label[faces[:, 0]]
    groups = [np.flatnonzero(face_label == k) for k in np.unique(face_label)]
    tri = verts[faces]
    volume = np.einsum("ij,ij->i", tri[:, 0], np.cross(tri[:, 1], tri[:, 2])) / 6
    vols = np.array([volume[g].sum() for g in groups])
    probes = verts[faces[[g[0] for g in groups], 0]]  # one vertex of each shell
    # encloses[j, k]: shell j winds around shell k
    encloses = np.array([winding_numbers(verts, faces[g], probes) != 0 for g in groups])
    np.fill_diagonal(encloses, False)
    parents = []
    for k in range(len(groups)):
        around = np.flatnonzero(encloses[:, k])
        parent = int(around[np.argmin(np.abs(vols[around]))]) if len(around) else None
        parent_sign = 0 if parent is None else np.sign(vols[parent])
        if vols[k] > 0 and parent_sign > 0 or vols[k] < 0 and parent_sign <= 0:
            raise ValueError("shells are wrongly nested or oriented: bodies and cavities must "
                             "alternate, with cavity surfaces facing into the cavity")
        parents.append(parent)
    return [(g, int(np.sign(v)), p) for g, v, p in zip(groups, vols, parents)]


def _gmsh_tets() -> tuple[np.ndarray, np.ndarray]:
    """Nodes (only those used) and 4-node tetrahedra of the current model."""
    types, _, node_tags = gmsh.model.mesh.getElements(3)
    if any(t != 4 for t in types):
        raise RuntimeError(f"gmsh produced non-tetrahedral elements of types {list(types)}")
    tet_tags = node_tags[0].reshape(-1, 4) if len(types) else np.zeros((0, 4), np.uint64)
    tags, coords, _ = gmsh.model.mesh.getNodes()
    order = np.argsort(tags)
    tags, coords = tags[order], coords.reshape(-1, 3)[order]
    used, tets = np.unique(tet_tags, return_inverse=True)
    nodes = coords[np.searchsorted(tags, used)]
    return nodes, tets.reshape(-1, 4).astype(np.int64)


def tet_signed_volumes(nodes: np.ndarray, tets: np.ndarray) -> np.ndarray:
    """Signed volumes (m^3) of tets (m, 4): positive when (b-a, c-a, d-a) is right-handed."""
    p = nodes[tets]
    return np.einsum("ij,ij->i", np.cross(p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]), p[:, 3] - p[:, 0]) / 6


def orient_tets(nodes: np.ndarray, tets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Swap two corners of negatively oriented tets; a degenerate tet is an error."""
    vol = tet_signed_volumes(nodes, tets)
    tets = tets.copy()
    flip = vol < 0
    tets[flip] = tets[flip][:, [0, 2, 1, 3]]
    if np.any(vol == 0):
        raise ValueError(f"{int(np.sum(vol == 0))} tetrahedra have zero volume")
    return nodes, tets


def tet_quality(nodes: np.ndarray, tets: np.ndarray) -> np.ndarray:
    """Normalised radius ratio 3 r_in / r_circ per tet (1 regular, -> 0 degenerate)."""
    p = nodes[tets]
    u, v, w = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0], p[:, 3] - p[:, 0]
    six_vol = np.abs(np.einsum("ij,ij->i", u, np.cross(v, w)))
    # circumcentre offset from corner 0 (standard closed form)
    uu, vv, ww = (np.einsum("ij,ij->i", a, a)[:, None] for a in (u, v, w))
    num = uu * np.cross(v, w) + vv * np.cross(w, u) + ww * np.cross(u, v)
    r_circ = np.linalg.norm(num, axis=1) / (2 * six_vol)
    area = sum(0.5 * np.linalg.norm(np.cross(p[:, b] - p[:, a], p[:, c] - p[:, a]), axis=1)
               for a, b, c in ((0, 1, 2), (0, 1, 3), (0, 2, 3), (1, 2, 3)))
    r_in = 0.5 * six_vol / area  # 3 V / A
    return 3 * r_in / r_circ


# ----------------------------------------------------------------------------
# triangulated surfaces

def load_surface(shape: SurfaceFile) -> trimesh.Trimesh:
    """Read a closed triangulated surface (STL/OBJ/PLY), coordinates times
    `shape.scale` (to m), outward-oriented.  Raises ValueError naming the file
    when it cannot be read, is not watertight, has inconsistent winding or
    intersects itself.  Returns a copy the caller may modify."""
    return _surface(*_surface_key(shape)).copy()


def surface_contains(shape: SurfaceFile, points: np.ndarray) -> np.ndarray:
    """True for points (n, 3), m, in the surface's local frame, enclosed by it."""
    mesh = _surface(*_surface_key(shape))
    return winding_numbers(mesh.vertices, mesh.faces, points) > 0


def winding_numbers(verts: np.ndarray, faces: np.ndarray, points: np.ndarray) -> np.ndarray:
    """Winding number (int, (n,)) of a closed, outward-oriented triangulation
    about points (n, 3), m: 1 inside, 0 outside, more for nested shells.

    Counted along vertical rays: every triangle whose xy-projection covers a
    point's (x, y) crosses its ray once, entering (+1) where the outward
    normal points down.  Coverage of (x, y) on a shared edge or vertex is
    decided by the top-left fill rule of rasterisers, with each edge's
    function evaluated in one canonical vertex order, so exactly one of the
    triangles meeting there counts and no crossing is lost or doubled."""
    import rtree
    verts, faces = np.asarray(verts, float), np.asarray(faces, np.int64)
    points = np.reshape(np.asarray(points, float), (-1, 3))
    if len(points) == 0:
        return np.zeros(0, np.int64)
    xy, column = np.unique(points[:, :2], axis=0, return_inverse=True)
    column = column.ravel()
    tri = verts[faces]
    prop = rtree.index.Property()
    prop.dimension = 2
    tree = rtree.index.Index(((i, (x, y, x, y), None) for i, (x, y) in enumerate(xy)), properties=prop)
    ids, counts = tree.intersection_v(tri[:, :, :2].min(axis=1), tri[:, :, :2].max(axis=1))
    t = np.repeat(np.arange(len(faces)), counts.astype(np.int64))
    c = ids.astype(np.int64)
    t, c, z, w = _ray_crossings(verts, faces, t, c, xy)
    # count crossings below each point: sort by (column, z) with z replaced by
    # its exact rank, then a cumulative sum per column
    _, rank = np.unique(np.concatenate([z, points[:, 2]]), return_inverse=True)
    rank = rank.ravel()
    span = int(rank.max()) + 2
    key = c * span + rank[:len(z)]
    order = np.argsort(key, kind="stable")
    key, cum = key[order], np.concatenate([[0], np.cumsum(w[order])])
    below = np.searchsorted(key, column * span + rank[len(z):], side="left")
    start = np.searchsorted(key, column * span, side="left")
    return cum[below] - cum[start]


def _ray_crossings(verts, faces, t, c, xy):
    """Of candidate (triangle t, column c) pairs keep those where the vertical
    line through xy[c] crosses the triangle (top-left rule on ties); returns
    t, c, the crossing height z (m) and +1 entering / -1 leaving."""
    a, b, d = (verts[faces[t, k]] for k in range(3))
    area = _edge_function(a, b, d[:, :2]) if len(t) else np.zeros(0)
    keep = area != 0  # vertical triangles are never crossed transversally
    covered = np.ones(len(t), bool)
    bary = []
    for p, q in ((b, d), (d, a), (a, b)):  # edge opposite a, b, d in turn
        e = _edge_function(p, q, xy[c]) * np.sign(area)  # >0 inside for either winding
        dxy = (q - p)[:, :2] * np.sign(area)[:, None]  # the edge as in the ccw-ordered triangle
        top_left = (dxy[:, 1] < 0) | ((dxy[:, 1] == 0) & (dxy[:, 0] < 0))
        covered &= (e > 0) | ((e == 0) & top_left)
        bary.append(np.abs(e))
    keep &= covered
    ea, eb, ed = (x[keep] for x in bary)
    z = (ea * a[keep, 2] + eb * b[keep, 2] + ed * d[keep, 2]) / np.abs(area[keep])
    return t[keep], c[keep], z, np.where(area[keep] < 0, 1, -1)


def _edge_function(p: np.ndarray, q: np.ndarray, x: np.ndarray) -> np.ndarray:
    """2D cross product (q - p) x (x - p), computed with the endpoints in
    lexicographic order and the sign restored, so the two triangles sharing
    the edge get bit-identical magnitudes."""
    p2, q2 = p[:, :2], q[:, :2]
    swap = (p2[:, 0] > q2[:, 0]) | ((p2[:, 0] == q2[:, 0]) & (p2[:, 1] > q2[:, 1]))
    u = np.where(swap[:, None], q2, p2)
    v = np.where(swap[:, None], p2, q2)
    val = (v[:, 0] - u[:, 0]) * (x[:, 1] - u[:, 1]) - (v[:, 1] - u[:, 1]) * (x[:, 0] - u[:, 0])
    return np.where(swap, -val, val)


def _surface_key(shape: SurfaceFile):
    path = Path(shape.path).expanduser().resolve()
    try:
        st = path.stat()
    except OSError as e:
        raise ValueError(f"surface file {shape.path}: cannot read it ({e.strerror})") from None
    return str(path), float(shape.scale), st.st_mtime_ns, st.st_size


@functools.lru_cache(maxsize=16)
def _surface(path: str, scale: float, _mtime: int, _size: int) -> trimesh.Trimesh:
    """Loaded and checked surface, cached per file version (do not modify)."""
    try:
        mesh = trimesh.load_mesh(path, process=True)
    except Exception as e:  # trimesh raises many kinds for bad files
        raise ValueError(f"surface file {path}: cannot read it ({e})") from None
    if not isinstance(mesh, trimesh.Trimesh) or len(mesh.faces) == 0:
        raise ValueError(f"surface file {path}: no triangles found")
    if not scale > 0:
        raise ValueError(f"surface file {path}: scale must be positive, got {scale}")
    mesh.apply_scale(scale)
    mesh.remove_unreferenced_vertices()
    if not mesh.is_watertight:
        raise ValueError(f"surface file {path}: the surface is not closed (watertight); "
                         "every edge must be shared by exactly two triangles")
    if not mesh.is_winding_consistent:
        raise ValueError(f"surface file {path}: triangle winding is inconsistent "
                         "(some normals point in, some out)")
    pair = first_self_intersection(mesh.vertices, mesh.faces)
    if pair is not None:
        raise ValueError(f"surface file {path}: the surface intersects itself "
                         f"(triangles {pair[0]} and {pair[1]})")
    if mesh.volume < 0:
        mesh.invert()  # consistently inward: flip to outward
    try:
        surface_shells(mesh.vertices, mesh.faces)
    except ValueError as e:
        raise ValueError(f"surface file {path}: {e}") from None
    return mesh


def first_self_intersection(verts: np.ndarray, faces: np.ndarray) -> tuple[int, int] | None:
    """A pair of triangles that intersect although they are not neighbours,
    or None.  Candidates come from an R-tree of triangle bounding boxes; a
    non-coplanar pair intersects iff an edge of one pierces the other (the
    intersection segment ends on edges), touching counts.  Pairs sharing a
    corner are tested with the edges opposite to it; pairs sharing an edge and
    coplanar overlaps are not detected (gmsh rejects those when meshing)."""
    import rtree
    verts, faces = np.asarray(verts, float), np.asarray(faces, np.int64)
    tri = verts[faces]
    lo, hi = tri.min(axis=1), tri.max(axis=1)
    pad = 1e-9 * float(np.ptp(verts, axis=0).max())
    lo, hi = lo - pad, hi + pad
    prop = rtree.index.Property()
    prop.dimension = 3
    tree = rtree.index.Index(((i, (*lo[i], *hi[i]), None) for i in range(len(faces))), properties=prop)
    ids, counts = tree.intersection_v(lo, hi)
    a = np.repeat(np.arange(len(faces)), counts.astype(np.int64))
    b = ids.astype(np.int64)
    keep = a < b
    a, b = a[keep], b[keep]
    same = faces[a][:, :, None] == faces[b][:, None, :]  # (pairs, 3, 3)
    n_shared = same.sum(axis=(1, 2))
    hit = np.zeros(len(a), bool)
    free = np.flatnonzero(n_shared == 0)
    ta, tb = tri[a[free]], tri[b[free]]
    for k in range(3):
        e0, e1 = k, (k + 1) % 3
        hit[free] |= _segment_hits_triangle(ta[:, e0], ta[:, e1], tb)
        hit[free] |= _segment_hits_triangle(tb[:, e0], tb[:, e1], ta)
    one = np.flatnonzero(n_shared == 1)
    ka = np.argmax(same[one].any(axis=2), axis=1)  # corner of a that b shares
    kb = np.argmax(same[one].any(axis=1), axis=1)
    ta, tb, r = tri[a[one]], tri[b[one]], np.arange(len(one))
    hit[one] |= _segment_hits_triangle(ta[r, (ka + 1) % 3], ta[r, (ka + 2) % 3], tb)
    hit[one] |= _segment_hits_triangle(tb[r, (kb + 1) % 3], tb[r, (kb + 2) % 3], ta)
    first = np.flatnonzero(hit)
    return None if len(first) == 0 else (int(a[first[0]]), int(b[first[0]]))


def _segment_hits_triangle(p: np.ndarray, q: np.ndarray, tri: np.ndarray) -> np.ndarray:
    """Vectorised: does segment p-q meet triangle tri (k, 3, 3), touching
    included?  Signs of tetrahedron volumes; a segment lying in the
    triangle's plane is not counted.  Tolerance relative to the pair's size."""
    def vol(w, x, y, z):
        return np.einsum("ij,ij->i", x - w, np.cross(y - w, z - w))
    a, b, c = tri[:, 0], tri[:, 1], tri[:, 2]
    size = np.maximum(np.linalg.norm(q - p, axis=1), np.ptp(tri, axis=1).max(axis=1))
    eps = 1e-10 * size ** 3
    sp, sq = vol(p, a, b, c), vol(q, a, b, c)
    zp, zq = np.abs(sp) <= eps, np.abs(sq) <= eps
    crosses = ((sp * sq < 0) & ~zp & ~zq) | (zp ^ zq)
    e1, e2, e3 = vol(p, q, a, b), vol(p, q, b, c), vol(p, q, c, a)
    within = (((e1 >= -eps) & (e2 >= -eps) & (e3 >= -eps))
              | ((e1 <= eps) & (e2 <= eps) & (e3 <= eps)))
    return crosses & within


def _boundary_triangulation(body: Body, h: float, verbose: bool) -> tuple[np.ndarray, np.ndarray]:
    """Closed boundary triangulation (local frame, m) of a body with a surface
    file part, with triangles of about size h: each shell is remeshed by gmsh
    (classified into smooth patches at 40 degree edges, reparametrised, new
    nodes on the old triangles), or, if gmsh cannot, its triangles are kept
    and split down to h."""
    verts, faces = _faceted_surface(body, h)
    parts, offset = [], 0
    for tri, sign, _ in surface_shells(verts, faces):
        used, local = np.unique(faces[tri], return_inverse=True)
        v, f = verts[used], local.reshape(-1, 3)
        try:
            v, f = remesh_surface(v, f, h, sign, verbose)
        except ValueError as e:
            warnings.warn(f"body {body.name!r}{_file_note(body)}: {e}; keeping its triangles, "
                          f"split to at most {h:.3g} m", stacklevel=2)
            v, f = subdivide(v, f, h)
        parts.append((v, f + offset))
        offset += len(v)
    return np.vstack([v for v, _ in parts]), np.vstack([f for _, f in parts])


def remesh_surface(verts: np.ndarray, faces: np.ndarray, h: float, sign: int = 1,
                   verbose: bool = False) -> tuple[np.ndarray, np.ndarray]:
    """Remesh one closed shell to triangles of edge about h (m) with gmsh;
    `sign` +1 returns it outward-, -1 inward-oriented.  ValueError when gmsh
    fails or the result is not a closed shell."""
    with _gmsh_session(verbose):
        _set_mesh_options(h)
        # curvature sizing on facets sees every facet edge as a kink
        gmsh.option.setNumber("Mesh.MeshSizeFromCurvature", 0)
        surf = gmsh.model.addDiscreteEntity(2)
        gmsh.model.mesh.addNodes(2, surf, np.arange(1, len(verts) + 1), np.ravel(verts))
        gmsh.model.mesh.addElementsByType(surf, 2, [], np.ravel(faces) + 1)
        try:
            gmsh.model.mesh.classifySurfaces(math.radians(40), True, True, math.pi)
            gmsh.model.mesh.createGeometry()
            # without a sync gmsh sizes the new mesh from the old triangles, not h
            gmsh.model.geo.synchronize()
            gmsh.model.mesh.generate(2)
        except Exception as e:  # gmsh raises plain Exception with its last error
            raise ValueError(f"gmsh could not remesh the surface ({e})") from None
        tags, coords, _ = gmsh.model.mesh.getNodes()
        tri_tags = np.concatenate([gmsh.model.mesh.getElementsByType(2, t)[1]
                                   for _, t in gmsh.model.getEntities(2)])
    order = np.argsort(tags)
    used, tri = np.unique(tri_tags, return_inverse=True)
    out = trimesh.Trimesh(coords.reshape(-1, 3)[order][np.searchsorted(tags[order], used)],
                          tri.reshape(-1, 3), process=False)
    trimesh.repair.fix_winding(out)  # gmsh's patches need not share one orientation
    if not (out.is_watertight and out.is_winding_consistent):
        raise ValueError("gmsh's remeshed surface is not closed")
    if np.sign(out.volume) != sign:
        out.invert()
    return np.asarray(out.vertices, float), np.asarray(out.faces, np.int64)


def subdivide(verts: np.ndarray, faces: np.ndarray, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Split triangles until every edge is at most `h` (m); the surface, and so
    the enclosed volume, is unchanged."""
    verts, faces = trimesh.remesh.subdivide_to_size(verts, faces, max_edge=h)
    return np.asarray(verts, float), np.asarray(faces, np.int64)


def _uses_surface(body: Body) -> bool:
    return isinstance(body.shape, SurfaceFile) or any(isinstance(c.shape, SurfaceFile) for c in body.cuts)


def _uses_ellipsoid(body: Body) -> bool:
    return isinstance(body.shape, Ellipsoid) or any(isinstance(c.shape, Ellipsoid) for c in body.cuts)


def _file_note(body: Body) -> str:
    files = [s.path for s in (body.shape, *(c.shape for c in body.cuts)) if isinstance(s, SurfaceFile)]
    return f" (surface file {', '.join(map(str, files))})" if files else ""


def _faceted_surface(body: Body, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Closed triangulation of a body with a surface-file part, local frame.
    Without cuts the file's own triangles; with cuts a manifold3d boolean
    difference of triangulated shapes (curved ones faceted at about h)."""
    if not body.cuts:
        mesh = _surface(*_surface_key(body.shape))
        return np.asarray(mesh.vertices, float), np.asarray(mesh.faces, np.int64)
    solid = _manifold(body.shape, h)
    for c in body.cuts:
        solid = solid - _manifold(c.shape, h).transform(c.placement.matrix())
    if solid.is_empty():
        raise ValueError(f"body {body.name!r}{_file_note(body)} is empty after its cuts")
    out = solid.to_mesh64()
    return (np.asarray(out.vert_properties, float)[:, :3].copy(),
            np.asarray(out.tri_verts, np.int64).copy())


def _manifold(shape, h: float):
    """manifold3d solid of a shape in its local frame; curved surfaces get
    max(CURVATURE_POINTS, 2 pi r / h) segments around."""
    from manifold3d import Error, Manifold, Mesh64

    def segments(r):
        return int(max(CURVATURE_POINTS, math.ceil(2 * math.pi * r / h)))

    if isinstance(shape, SurfaceFile):
        mesh = _surface(*_surface_key(shape))
        solid = Manifold(Mesh64(vert_properties=np.ascontiguousarray(mesh.vertices, np.float64),
                                tri_verts=np.ascontiguousarray(mesh.faces, np.uint64)))
        if solid.status() != Error.NoError:
            raise ValueError(f"surface file {shape.path}: not a closed oriented manifold "
                             f"({solid.status().name})")
        return solid
    if isinstance(shape, Box):
        return Manifold.cube(tuple(map(float, shape.size)), True)
    if isinstance(shape, Sphere):
        return Manifold.sphere(shape.radius, segments(shape.radius))
    if isinstance(shape, Ellipsoid):
        a = tuple(map(float, shape.semi_axes))
        return Manifold.sphere(1.0, segments(max(a))).scale(a)
    if isinstance(shape, Cylinder):
        return Manifold.cylinder(shape.height, shape.radius, shape.radius, segments(shape.radius), True)
    if isinstance(shape, Tube):
        n = segments(shape.outer_radius)
        outer = Manifold.cylinder(shape.height, shape.outer_radius, shape.outer_radius, n, True)
        if shape.inner_radius <= 0:
            return outer
        # the hole is taller so the boolean sees no coplanar end faces
        inner = Manifold.cylinder(2 * shape.height, shape.inner_radius, shape.inner_radius, n, True)
        return outer - inner
    raise TypeError(f"unknown shape {shape!r}")


# ----------------------------------------------------------------------------
# hexahedra


def _mesh_hexes(bodies, verbose):
    first = bodies[0]
    h = element_size(first)
    cell, origin = hex_grid(first, h)
    for b in bodies[1:]:
        if b.mesh.size is not None and not np.isclose(b.mesh.size, h, rtol=1e-9):
            warnings.warn(f"body {b.name!r}: hex size {b.mesh.size} m ignored; all hex bodies "
                          f"share the grid of {first.name!r} (cell {cell.tolist()} m)", stacklevel=3)
    indices, stats = [], []
    for b in bodies:
        t0 = time.perf_counter()
        ijk = voxelise(b, cell, origin)
        if len(ijk) == 0:
            raise ValueError(f"body {b.name!r}: no hex cell centre falls inside it; "
                             f"use a mesh size below {cell.min():.3g} m")
        indices.append(ijk)
        stats.append((b, len(ijk), t0))
    _check_overlaps(bodies, indices)
    shift = np.vstack(indices).min(axis=0)  # make the smallest index 0 on each axis
    origin = origin + shift * cell
    all_nodes, all_cells, offset, out_stats = [], [], 0, []
    for (b, n, t0), ijk in zip(stats, indices):
        ijk -= shift
        nodes, cells = hex_cells(ijk, cell, origin)
        out_stats.append(_stats(b, "hex", nodes, cells, n * float(np.prod(cell)), cell.max(), t0))
        all_nodes.append(nodes)
        all_cells.append(cells + offset)
        offset += len(nodes)
    body_id = np.concatenate([np.full(len(ijk), i, np.int32) for i, ijk in enumerate(indices)])
    mesh = Mesh(np.vstack(all_nodes), np.vstack(all_cells), "hex", body_id,
                cell_size=cell, grid_index=np.vstack(indices), grid_origin=origin)
    return mesh, out_stats


def hex_grid(body: Body, h: float) -> tuple[np.ndarray, np.ndarray]:
    """Cell size (3,) and the centre (3,) of one cell of a grid for `body`,
    both m.  An uncut or cut box whose faces are parallel to the model planes
    gets cell edges size_i / round(size_i / h) with grid planes on its faces;
    anything else cubic cells of edge h with a grid node at its local origin."""
    R = body.placement.rotation_matrix()
    position = np.asarray(body.placement.position, float)
    if isinstance(body.shape, Box) and _is_axis_permutation(R):
        extent = np.abs(R) @ np.asarray(body.shape.size, float)
        n = np.maximum(1, np.round(extent / h))
        cell = extent / n
        return cell, position - extent / 2 + cell / 2
    cell = np.full(3, float(h))
    return cell, position + cell / 2


def _is_axis_permutation(R: np.ndarray) -> bool:
    """Rotation by multiples of 90 degrees about model axes (a signed permutation)."""
    Q = np.round(R)
    return bool(np.allclose(R, Q, atol=1e-12) and np.all(np.abs(Q).sum(axis=0) == 1))


def voxelise(body: Body, cell: np.ndarray, origin: np.ndarray) -> np.ndarray:
    """Integer indices (k, 3) of the grid cells whose centre is inside the body;
    cell centre = origin + index * cell (m).  Ordered with x fastest, then y, z."""
    lo, hi = body.bounds()
    i0 = np.floor((lo - origin) / cell).astype(np.int64) - 1
    i1 = np.ceil((hi - origin) / cell).astype(np.int64) + 1
    nx, ny, nz = i1 - i0 + 1
    slab = max(1, VOXEL_BLOCK // (nx * ny))
    ii, jj = np.meshgrid(np.arange(nx), np.arange(ny), indexing="xy")
    plane = np.column_stack([ii.ravel(), jj.ravel()])  # x fastest
    found = []
    for k0 in range(0, nz, slab):
        ks = np.arange(k0, min(nz, k0 + slab))
        ijk = np.column_stack([np.tile(plane, (len(ks), 1)), np.repeat(ks, len(plane))]) + i0
        inside = body.inside(origin + ijk * cell)
        found.append(ijk[inside])
    return np.vstack(found)


def hex_cells(ijk: np.ndarray, cell: np.ndarray, origin: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Nodes (n, 3), m, and VTK-ordered hexes (k, 8) of grid cells `ijk`,
    corners shared between neighbouring cells."""
    corners = (ijk[:, None, :] + HEX_CORNERS[None]).reshape(-1, 3)
    unique, cells = np.unique(corners, axis=0, return_inverse=True)
    nodes = origin - cell / 2 + unique * cell
    return nodes, cells.reshape(-1, 8).astype(np.int64)


def _check_overlaps(bodies, indices) -> None:
    """Two hex bodies claiming the same cell would put material there twice."""
    if len(indices) < 2:
        return
    all_ijk = np.vstack(indices)
    owner = np.concatenate([np.full(len(x), i) for i, x in enumerate(indices)])
    _, inverse, counts = np.unique(all_ijk, axis=0, return_inverse=True, return_counts=True)
    if np.all(counts == 1):
        return
    dup = counts[inverse.ravel()] > 1
    names = sorted({bodies[i].name for i in owner[dup]})
    raise ValueError(f"hex bodies overlap in {int(np.sum(counts > 1))} cells: {', '.join(names)}")
