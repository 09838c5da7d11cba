"""Meshing: volumes, orientation, placement, reproducibility, surface files, voxels.

Reference volumes are geometry (closed-form volumes of the shapes, or a scipy
quadrature where a cut makes the closed form awkward); each check says which.
"""
import math

import gmsh
import numpy as np
import pytest
import trimesh
from scipy import integrate

from volmag.geometry import (Body, Box, Cut, Cylinder, Ellipsoid, MeshSpec, Placement, Sphere,
                             SurfaceFile, Tube)
from volmag.meshing import (Mesh, element_size, hex_grid, load_surface, mesh_model, orient_tets,
                            tet_quality, voxelise, winding_numbers)


def body(shape, element="tet", size=None, **kw):
    return Body(kw.pop("name", "b"), shape, None, mesh=MeshSpec(element, size), **kw)


def mesh_one(shape, element="tet", size=None, **kw):
    mesh, (stats,) = mesh_model([body(shape, element, size, **kw)])
    return mesh, stats


def sphere_deficit(h, R):
    """Leading-order relative volume deficit of a polyhedron inscribed in a
    sphere of radius R with equilateral facets of edge h (geometry, derived
    here): a facet's sagitta at distance s from its circumcentre is
    (rho^2 - s^2)/(2R), rho^2 = h^2/3 and the facet mean of s^2 is h^2/12,
    so the mean gap is h^2/(8R); times 4 pi R^2 over 4/3 pi R^3: 3h^2/(8R^2)."""
    return 3 * h ** 2 / (8 * R ** 2)


# ---------------------------------------------------------------- tet volumes

@pytest.mark.parametrize("shape, h, exact", [
    # exact volumes are the shapes' closed forms (geometry)
    (Box((0.3, 0.5, 0.7)), 0.1, 0.3 * 0.5 * 0.7),
    (Ellipsoid((1.0, 0.7, 0.5)), 0.15, 4 / 3 * math.pi * 0.35),
    (Cylinder(0.5, 1.0), 0.12, math.pi * 0.25),
    (Tube(0.3, 0.6, 0.5), 0.1, math.pi * (0.36 - 0.09) * 0.5),
])
def test_primitive_tet_volumes(shape, h, exact):
    mesh, stats = mesh_one(shape, size=h)
    v = mesh.volumes().sum()
    assert stats.exact_volume == pytest.approx(exact, rel=1e-12)
    assert stats.volume == pytest.approx(v, rel=1e-12)
    if isinstance(shape, Box):
        assert v == pytest.approx(exact, rel=1e-12)  # planar faces are meshed exactly
    else:
        # facets inscribed in curved faces lose volume; Tube's hole gains some back
        r_min = min(shape.half_extents()[:2]) if not isinstance(shape, Tube) else shape.inner_radius
        assert abs(v / exact - 1) < 2 * sphere_deficit(h, r_min)
        if not isinstance(shape, Tube):
            assert v < exact


def test_sphere_volume_error_falls_with_h():
    """All surface nodes lie on the sphere, so the mesh is an inscribed
    polyhedron: volume below 4/3 pi R^3, deficit about 3h^2/(8R^2)."""
    R, exact = 1.0, 4 / 3 * math.pi
    errs = []
    for h in (0.4, 0.2, 0.1):
        mesh, stats = mesh_one(Sphere(R), size=h)
        err = mesh.volumes().sum() / exact - 1
        assert -2 * sphere_deficit(h, R) < err < 0
        errs.append(err)
    assert abs(errs[0]) > abs(errs[1]) > abs(errs[2])
    assert abs(errs[2]) < 0.005


def test_tets_positively_oriented_and_quality():
    mesh, stats = mesh_one(Sphere(0.01), size=0.004,
                           placement=Placement((0.1, 0, 0), (0, 1, 0), 123.0))
    p = mesh.nodes[mesh.cells]
    det = np.einsum("ij,ij->i", np.cross(p[:, 1] - p[:, 0], p[:, 2] - p[:, 0]), p[:, 3] - p[:, 0])
    assert np.all(det > 0)
    assert mesh.cells.dtype == np.int64 and mesh.body_id.dtype == np.int32
    assert 0.2 < stats.quality_min <= stats.quality_mean < 1


def test_orient_tets():
    nodes = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0, 0, 1]], float)
    _, tets = orient_tets(nodes, np.array([[0, 1, 2, 3], [0, 2, 1, 3]]))
    assert np.array_equal(tets, [[0, 1, 2, 3], [0, 1, 2, 3]])
    with pytest.raises(ValueError, match="zero volume"):
        orient_tets(np.vstack([nodes, [[1, 1, 0]]]), np.array([[0, 1, 2, 4]]))


def test_tet_quality_measure():
    # regular tetrahedron: r_in / r_circ = 1/3 exactly (geometry)
    regular = np.array([[1, 1, 1], [1, -1, -1], [-1, 1, -1], [-1, -1, 1]], float)
    assert tet_quality(regular, np.array([[0, 1, 2, 3]]))[0] == pytest.approx(1, rel=1e-12)
    flat = np.array([[0, 0, 0], [1, 0, 0], [0, 1, 0], [0.3, 0.3, 1e-6]])
    assert tet_quality(flat, np.array([[0, 1, 2, 3]]))[0] < 1e-4


# ---------------------------------------------------------------- cut bodies

def test_drilled_bar():
    """Box 4 x 1 x 1 drilled through along y by a cylinder r = 0.25 that sticks
    out of both faces: removed volume pi r^2 * 1 (geometry)."""
    r = 0.25
    drill = Cut(Cylinder(r, 2.0), Placement(axis=(1, 0, 0), angle_deg=90))
    mesh, stats = mesh_one(Box((4.0, 1.0, 1.0)), size=0.15, cuts=(drill,))
    exact = 4.0 - math.pi * r ** 2 * 1.0
    assert stats.exact_volume == pytest.approx(exact, rel=1e-12)
    v = mesh.volumes().sum()
    assert 0 < v / exact - 1 < 0.005  # the faceted hole is smaller than the round one
    c = mesh.centroids()
    assert not np.any(c[:, 0] ** 2 + c[:, 2] ** 2 < (0.9 * r) ** 2)  # the hole is empty


def test_hollow_sphere():
    mesh, stats = mesh_one(Sphere(1.0), size=0.2, cuts=(Cut(Sphere(0.5)),))
    exact = 4 / 3 * math.pi * (1 - 0.5 ** 3)  # geometry
    assert stats.exact_volume == pytest.approx(exact, rel=1e-12)
    assert abs(stats.volume_error) < 2 * sphere_deficit(0.2, 0.5)
    radius = np.linalg.norm(mesh.nodes, axis=1)
    assert radius.min() == pytest.approx(0.5, rel=1e-9)
    assert radius.max() == pytest.approx(1.0, rel=1e-9)


def test_notched_disc():
    """Disc r = 1, thickness 0.2, with a 0.4 x 0.2 slot centred on the rim at
    x = 1.  Removed area: integral over |y| < 0.1 of sqrt(1 - y^2) - 0.8,
    by scipy quadrature."""
    notch = Cut(Box((0.4, 0.2, 1.0)), Placement((1.0, 0.0, 0.0)))
    mesh, stats = mesh_one(Cylinder(1.0, 0.2), size=0.1, cuts=(notch,))
    removed, _ = integrate.quad(lambda y: math.sqrt(1 - y * y) - 0.8, -0.1, 0.1, epsabs=1e-14)
    exact = (math.pi - removed) * 0.2
    assert stats.exact_volume == pytest.approx(exact, rel=1e-10)
    assert abs(stats.volume_error) < 0.01
    c = mesh.centroids()
    assert not np.any((c[:, 0] > 0.8) & (np.abs(c[:, 1]) < 0.1))


def test_cut_that_removes_everything():
    with pytest.raises(ValueError, match="empty"):
        mesh_one(Sphere(0.5), cuts=(Cut(Box((2.0, 2.0, 2.0))),))


# ---------------------------------------------------------------- placement

def second_moment(nodes, tets):
    """Integral of x x^T over a tet mesh: V/20 (sum_k v_k v_k^T + s s^T) per
    tet, s = sum of the corners (Tonon, J. Math. Stat. 1, 8 (2004); from
    memory, and checked below against the unrotated box's diag(V a_i^2 / 12))."""
    p = nodes[tets]
    a, b, c = p[:, 1] - p[:, 0], p[:, 2] - p[:, 0], p[:, 3] - p[:, 0]
    vol = np.einsum("ij,ij->i", a, np.cross(b, c)) / 6
    s = p.sum(axis=1)
    outer = np.einsum("tki,tkj->tij", p, p) + np.einsum("ti,tj->tij", s, s)
    return np.einsum("t,tij->ij", vol / 20, outer)


def moments(mesh):
    v = mesh.volumes()
    centre = v @ mesh.centroids() / v.sum()
    shifted = mesh.nodes - centre
    return v.sum(), centre, second_moment(shifted, mesh.cells)


def test_placement_of_a_box():
    size = np.array([0.3, 0.2, 0.1])
    V = np.prod(size)
    box_moment = np.diag(V * size ** 2 / 12)  # geometry
    mesh, _ = mesh_one(Box(tuple(size)), size=0.05)
    vol, centre, J = moments(mesh)
    assert np.allclose(centre, 0, atol=1e-15) and np.allclose(J, box_moment, rtol=1e-12, atol=1e-18)

    place = Placement((1.0, -2.0, 0.5), (1.0, 1.0, 1.0), 30.0)
    mesh, _ = mesh_one(Box(tuple(size)), size=0.05, placement=place)
    vol, centre, J = moments(mesh)
    R = place.rotation_matrix()
    assert vol == pytest.approx(V, rel=1e-12)
    assert np.allclose(centre, place.position, rtol=0, atol=1e-13)
    assert np.allclose(J, R @ box_moment @ R.T, rtol=0, atol=1e-12 * box_moment.max())
    # principal axes of the moment are the rotated box axes
    w, vecs = np.linalg.eigh(J)
    for k, axis in zip(np.argsort(-w), range(3)):  # largest moment about the longest edge
        assert abs(vecs[:, k] @ R[:, axis]) == pytest.approx(1, abs=1e-9)


def test_rotation_of_cut_inside_body():
    """A slot placed in the body's local frame moves with the body."""
    slot = Cut(Box((0.2, 2.0, 2.0)), Placement((0.5, 0, 0)))
    place = Placement((0, 0, 0), (0, 0, 1), 90.0)
    mesh, stats = mesh_one(Box((2.0, 1.0, 1.0)), size=0.2, cuts=(slot,), placement=place)
    assert stats.volume == pytest.approx(2.0 - 0.2, rel=1e-12)  # geometry
    c = mesh.centroids()  # the slot is now at y = 0.5 +- 0.1
    assert not np.any(np.abs(c[:, 1] - 0.5) < 0.1)


# ---------------------------------------------------------------- reproducibility

def test_meshes_are_reproducible(tmp_path):
    stl = tmp_path / "ico.stl"
    trimesh.creation.icosphere(2, 1.0).export(stl)
    bodies = [body(Sphere(1.0), size=0.3, name="s", placement=Placement((3, 0, 0))),
              body(Box((4.0, 1.0, 1.0)), size=0.25, name="bar",
                   cuts=(Cut(Cylinder(0.25, 2.0), Placement(axis=(1, 0, 0), angle_deg=90)),)),
              body(SurfaceFile(stl), size=0.3, name="f", placement=Placement((-3, 0, 0)))]
    a, sa = mesh_model(bodies)
    b, sb = mesh_model(bodies)
    for name in ("nodes", "cells", "body_id"):
        assert np.array_equal(getattr(a, name), getattr(b, name))
    assert [s.n_cells for s in sa] == [s.n_cells for s in sb]
    assert np.array_equal(np.unique(a.body_id), [0, 1, 2])
    for i, s in enumerate(sa):  # concatenation keeps each body's cells and volume
        assert np.sum(a.body_id == i) == s.n_cells
        assert a.volumes()[a.body_id == i].sum() == pytest.approx(s.volume, rel=1e-12)


def test_gmsh_left_as_found():
    """mesh_model works whether or not the caller has gmsh running, and leaves it so."""
    assert not gmsh.isInitialized()
    mesh_one(Sphere(1.0), size=0.5)
    assert not gmsh.isInitialized()
    gmsh.initialize(readConfigFiles=False, interruptible=False)
    try:
        gmsh.model.add("mine")
        mesh_one(Sphere(1.0), size=0.5)
        assert gmsh.isInitialized() and gmsh.model.getCurrent() == "mine"
    finally:
        gmsh.finalize()


# ---------------------------------------------------------------- surface files

def test_stl_round_trip(tmp_path):
    # a box written in mm and read with scale 1e-3: volume 10*20*30 mm^3 (geometry)
    path = tmp_path / "box.stl"
    trimesh.creation.box((10.0, 20.0, 30.0)).export(path)
    surf = SurfaceFile(path, scale=1e-3)
    assert surf.volume() == pytest.approx(6e-6, rel=1e-12)
    mesh, stats = mesh_one(surf, size=4e-3)
    assert mesh.volumes().sum() == pytest.approx(6e-6, rel=1e-12)
    assert stats.exact_volume == pytest.approx(6e-6, rel=1e-12)
    assert np.allclose(mesh.nodes.min(axis=0), [-5e-3, -10e-3, -15e-3], atol=1e-15)

    # icosphere: new surface nodes lie on the file's facets, so the volume is
    # below the file's and approaches it as h falls
    path = tmp_path / "ico.ply"
    trimesh.creation.icosphere(3, 1.0).export(path)
    file_volume = trimesh.load_mesh(path).volume  # of the stored (float32) vertices
    errs = []
    for h in (0.3, 0.15):
        mesh, stats = mesh_one(SurfaceFile(path), size=h)
        assert stats.exact_volume == pytest.approx(file_volume, rel=1e-12)
        errs.append(stats.volume_error)
    assert errs[1] < 0 and abs(errs[1]) < abs(errs[0]) < 2 * sphere_deficit(0.3, 1.0)


def test_surface_with_cut_and_placement(tmp_path):
    """A surface body minus a sphere (faceted at about h by manifold3d)."""
    path = tmp_path / "block.stl"
    trimesh.creation.box((2.0, 2.0, 2.0)).export(path)
    place = Placement((0, 0, 5.0), (0, 1, 0), 45.0)
    mesh, stats = mesh_one(SurfaceFile(path), size=0.25, cuts=(Cut(Sphere(0.5)),), placement=place)
    cavity = 4 / 3 * math.pi * 0.125
    exact = 8 - cavity  # geometry
    assert stats.exact_volume == pytest.approx(exact, rel=1e-12)
    # the cavity is faceted twice (manifold3d, then gmsh's remesh on the facets)
    assert 0 < stats.volume_error < 2 * 2 * sphere_deficit(0.25, 0.5) * cavity / exact
    r = np.linalg.norm(mesh.nodes - place.position, axis=1).min()
    assert 0.5 * (1 - 2 * sphere_deficit(0.25, 0.5)) < r <= 0.5


def test_open_surface_is_rejected(tmp_path):
    ico = trimesh.creation.icosphere(2)
    ico.update_faces(np.arange(len(ico.faces)) != 0)
    path = tmp_path / "holed.stl"
    ico.export(path)
    with pytest.raises(ValueError, match="holed.stl.*not closed"):
        load_surface(SurfaceFile(path))
    with pytest.raises(ValueError, match="holed.stl"):
        mesh_one(SurfaceFile(path))


def test_inconsistent_winding_is_rejected(tmp_path):
    ico = trimesh.creation.icosphere(2)
    faces = ico.faces.copy()
    faces[:5] = faces[:5, ::-1]
    path = tmp_path / "flipped.obj"
    trimesh.Trimesh(ico.vertices, faces, process=False).export(path)
    with pytest.raises(ValueError, match="flipped.obj.*winding"):
        load_surface(SurfaceFile(path))


def test_inward_surface_is_turned_outward(tmp_path):
    ico = trimesh.creation.icosphere(2)
    ico.invert()
    path = tmp_path / "inward.stl"
    ico.export(path)
    assert load_surface(SurfaceFile(path)).volume > 0


def test_self_intersecting_surfaces_are_rejected(tmp_path):
    # two overlapping closed boxes put in one file without a boolean union
    a = trimesh.creation.box((1.0, 1.0, 1.0))
    b = a.copy()
    b.apply_translation((0.5, 0.5, 0.5))
    path = tmp_path / "two_boxes.stl"
    trimesh.util.concatenate([a, b]).export(path)
    with pytest.raises(ValueError, match="two_boxes.stl.*intersects itself"):
        load_surface(SurfaceFile(path))
    # one shell with a vertex pulled through the opposite side
    ico = trimesh.creation.icosphere(2)
    v = ico.vertices.copy()
    v[np.argmax(v[:, 0])] = (-1.5, 0.0, 0.0)
    path = tmp_path / "spike.stl"
    trimesh.Trimesh(v, ico.faces, process=False).export(path)
    with pytest.raises(ValueError, match="spike.stl.*intersects itself"):
        mesh_one(SurfaceFile(path), element="hex", size=0.2)


def test_nested_shells(tmp_path):
    """A hollow sphere file (inner shell facing in) is fine; with the inner
    shell facing out it is rejected."""
    outer, inner = trimesh.creation.icosphere(2, 1.0), trimesh.creation.icosphere(2, 0.5)
    inner.invert()
    path = tmp_path / "hollow.stl"
    trimesh.util.concatenate([outer, inner]).export(path)
    mesh, stats = mesh_one(SurfaceFile(path), size=0.25)
    assert stats.exact_volume == pytest.approx(trimesh.load_mesh(path).volume, rel=1e-12)
    assert stats.exact_volume == pytest.approx(outer.volume + inner.volume, rel=1e-6)
    assert np.linalg.norm(mesh.centroids(), axis=1).min() > 0.45
    inner.invert()
    path = tmp_path / "stacked.stl"
    trimesh.util.concatenate([outer, inner]).export(path)
    with pytest.raises(ValueError, match="stacked.stl.*nested"):
        load_surface(SurfaceFile(path))


def test_missing_file():
    with pytest.raises(ValueError, match="nowhere.stl"):
        load_surface(SurfaceFile("/nonexistent/nowhere.stl"))


def test_winding_numbers_on_edges_and_vertices():
    """Points whose vertical ray passes exactly through facet edges and
    vertices of a box's triangulation are still classified right
    (reference: the box's own inequalities)."""
    box = trimesh.creation.box((1.0, 2.0, 3.0))
    t = np.linspace(-0.45, 0.45, 10)
    z = np.array([-2.0, -1.7, -1.2, 0.0, 1.2, 1.7, 2.0])  # none on the faces z = +-1.5
    xy = np.vstack([np.column_stack([t, 2 * t]), np.column_stack([t, -2 * t]),
                    np.column_stack([0 * t, 2 * t]), box.vertices[:, :2] * 0.999])
    pts = np.array([(x, y, zz) for x, y in xy for zz in z])
    inside = (np.abs(pts[:, 2]) < 1.5) & (np.abs(pts[:, 0]) < 0.5) & (np.abs(pts[:, 1]) < 1.0)
    assert np.array_equal(winding_numbers(box.vertices, box.faces, pts) > 0, inside)
    # and random points against trimesh's ray test (a general-purpose library)
    ico = trimesh.creation.icosphere(3)
    pts = np.random.default_rng(1).uniform(-1.1, 1.1, (3000, 3))
    assert np.array_equal(winding_numbers(ico.vertices, ico.faces, pts) > 0, ico.contains(pts))


# ---------------------------------------------------------------- hexahedra

@pytest.mark.parametrize("place", [Placement((0.01, -0.02, 0.3)),
                                   Placement((0.0, 0.0, 0.0), (0, 1, 0), -90.0)])
def test_hex_box_is_exact(place):
    size = (0.3, 0.5, 0.7)
    mesh, stats = mesh_one(Box(size), "hex", 0.09, placement=place)
    exact = 0.3 * 0.5 * 0.7  # geometry
    assert mesh.volumes().sum() == pytest.approx(exact, rel=1e-12)
    assert abs(stats.volume_error) < 1e-12
    extent = np.abs(place.rotation_matrix()) @ size
    assert np.allclose(mesh.nodes.max(axis=0) - mesh.nodes.min(axis=0), extent, rtol=1e-12)
    assert np.allclose(mesh.nodes.mean(axis=0), place.position, atol=1e-12)
    n = np.round(extent / mesh.cell_size).astype(int)
    assert mesh.n_cells == np.prod(n) and np.array_equal(mesh.grid_index.max(axis=0), n - 1)
    assert np.array_equal(mesh.grid_index.min(axis=0), [0, 0, 0])
    # centroids on the grid; VTK corner order: corner 6 opposite corner 0
    assert np.allclose(mesh.centroids(), mesh.nodes[mesh.cells].mean(axis=1), atol=1e-14)
    d = mesh.nodes[mesh.cells[:, 6]] - mesh.nodes[mesh.cells[:, 0]]
    assert np.allclose(d, mesh.cell_size, rtol=1e-12)


def test_hex_sphere_volume_error_falls_with_h():
    errs = []
    for h in (0.25, 0.125, 0.0625):
        mesh, stats = mesh_one(Sphere(1.0), "hex", h)
        assert stats.exact_volume == pytest.approx(4 / 3 * math.pi, rel=1e-12)  # geometry
        assert mesh.volumes().sum() == pytest.approx(stats.volume, rel=1e-12)
        assert mesh.n_cells % 8 == 0  # a grid node at the centre: octant-symmetric voxels
        errs.append(abs(stats.volume_error))
    assert errs[0] > errs[1] > errs[2] and errs[2] < 0.01


def test_hex_bodies_share_one_grid():
    a = body(Box((0.4, 0.2, 0.2)), "hex", 0.05, name="a")
    b = body(Box((0.2, 0.2, 0.1)), "hex", 0.05, name="b", placement=Placement((0.5, 0.0, 0.05)))
    c = body(Sphere(0.1), "hex", 0.05, name="c", placement=Placement((0, 0.5, 0)))
    mesh, stats = mesh_model([a, b, c])
    assert [s.n_cells for s in stats] == [np.sum(mesh.body_id == i) for i in range(3)]
    assert stats[1].volume == pytest.approx(0.004, rel=1e-12)  # b lies on a's grid: exact
    assert np.array_equal(mesh.grid_index.min(axis=0), [0, 0, 0])
    centres = mesh.grid_origin + mesh.grid_index * mesh.cell_size
    assert np.allclose(centres, mesh.centroids())
    sub = mesh.subset(mesh.body_id == 1, new_body_id=0)
    assert sub.n_cells == stats[1].n_cells and np.all(sub.body_id == 0)
    assert sub.volumes().sum() == pytest.approx(0.004, rel=1e-12)


def test_overlapping_hex_bodies_are_rejected():
    a = body(Box((0.4, 0.2, 0.2)), "hex", 0.05, name="a")
    b = body(Sphere(0.1), "hex", 0.05, name="b")
    with pytest.raises(ValueError, match="overlap.*a, b"):
        mesh_model([a, b])


def test_hex_surface_matches_primitive(tmp_path):
    """Voxelising a box file and the Box primitive gives the same cells."""
    path = tmp_path / "box.stl"
    trimesh.creation.box((0.3, 0.5, 0.7)).export(path)
    prim = body(Box((0.3, 0.5, 0.7)), "hex", 0.1, placement=Placement((0.2, 0, 0)))
    cell, origin = hex_grid(prim, 0.1)
    from_file = body(SurfaceFile(path), "hex", 0.1, placement=Placement((0.2, 0, 0)))
    a, b = voxelise(prim, cell, origin), voxelise(from_file, cell, origin)
    assert len(a) == 3 * 5 * 7 and np.array_equal(a, b)


def test_hex_cuts():
    """Hollow sphere of voxels: no cell centre in the cavity."""
    mesh, stats = mesh_one(Sphere(1.0), "hex", 0.1, cuts=(Cut(Sphere(0.5)),))
    r = np.linalg.norm(mesh.centroids(), axis=1)
    assert r.min() > 0.5 and r.max() <= 1.0
    assert abs(stats.volume_error) < 0.03


def test_mixed_element_types_are_rejected():
    with pytest.raises(ValueError, match="same mesh element.*tet: core.*hex: yoke"):
        mesh_model([body(Sphere(1.0), "tet", name="core"), body(Box((1, 1, 1)), "hex", name="yoke")])


def test_default_size_and_stats():
    mesh, stats = mesh_one(Sphere(0.02))
    assert stats.size == pytest.approx(0.04 / 6)
    plate = body(Box((1.0, 1.0, 0.01)), "hex")  # coarsened, but not beyond the thickness
    assert element_size(plate) == pytest.approx(0.01)
    assert 0.01 / 6 < element_size(body(Box((1.0, 1.0, 0.01)))) <= 0.01
    assert stats.n_cells == mesh.n_cells and stats.n_nodes == len(mesh.nodes)
    d = stats.as_dict()
    assert d["body"] == "b" and d["element"] == "tet"
    assert "b: " in stats.summary() and "tet" in stats.summary()
    with pytest.raises(ValueError, match="cell_type"):
        Mesh(np.zeros((0, 3)), np.zeros((0, 4)), "wedge", np.zeros(0))
