"""Field continuity across body surfaces: with no surface current, the normal
component of B and the tangential components of H are continuous (Maxwell's
interface conditions, e.g. Jackson, Classical Electrodynamics, 3rd ed., sec. 5.9)."""
import numpy as np
import pytest
import trimesh

import volmag as vm
from volmag import operators


def boundary_pairs(model, count=40, eps=1e-6):
    """Points just inside and just outside `count` boundary faces, and normals."""
    mesh = model.mesh
    rng = np.random.default_rng(1)
    if mesh.cell_type == "tet":
        topo = operators.tet_topology(mesh.nodes, mesh.cells)
        b = np.flatnonzero(topo.neighbour < 0)
        pick = rng.choice(b, size=min(count, len(b)), replace=False)
        tri = mesh.nodes[topo.faces[pick]]
        centre = tri.mean(axis=1)
        n = topo.normals[pick]
    else:
        # faces on the top of the voxel body (+z) and on its +x side
        c, h = mesh.centroids(), np.asarray(mesh.cell_size) / 2
        top = c[c[:, 2] == c[:, 2].max()][:count // 2] + [0, 0, h[2]]
        side = c[c[:, 0] == c[:, 0].max()][:count // 2] + [h[0], 0, 0]
        centre = np.vstack([top, side])
        n = np.vstack([np.tile([0, 0, 1.0], (len(top), 1)), np.tile([1.0, 0, 0], (len(side), 1))])
        centre = centre + 0.13 * h * np.cross(n, [0.3, 0.5, 0.7])  # off the quad diagonals
    size = np.ptp(mesh.nodes, axis=0).max()
    return centre - eps * size * n, centre + eps * size * n, n


def check_interface(model, chi_field=(0.3, 0.4, 1.0)):
    sol = vm.solve(model, [vm.UniformField(tuple(1e3 * np.array(chi_field)))])
    inside, outside, n = boundary_pairs(model)
    Hi, Bi = sol.field(inside)
    Ho, Bo = sol.field(outside)
    scale = np.linalg.norm(Bi, axis=1).max()
    Bn_jump = np.abs(np.einsum("ij,ij->i", Bi - Bo, n))
    Ht_jump = np.linalg.norm(np.cross(Hi - Ho, n), axis=1)
    assert Bn_jump.max() < 1e-4 * scale
    assert Ht_jump.max() < 1e-4 * scale / vm.MU0
    # and the interface carries a real jump of H.n (charge), so the check has teeth
    assert np.abs(np.einsum("ij,ij->i", Hi - Ho, n)).max() > 1e-2 * scale / vm.MU0


def body(shape, element="tet", size=0.15, **kw):
    return vm.Body("b", shape, vm.LinearMaterial("steel-like", 50.0), mesh=vm.MeshSpec(element, size), **kw)


def test_box_interface():
    check_interface(vm.Model.build([body(vm.Box((1.0, 0.7, 0.5)))]))


def test_cylinder_interface():
    check_interface(vm.Model.build([body(vm.Cylinder(0.4, 1.0))]))


def test_surface_file_interface(tmp_path):
    path = tmp_path / "pebble.stl"
    trimesh.creation.icosphere(subdivisions=2, radius=0.5).apply_scale((1.0, 0.8, 0.6)).export(path)
    check_interface(vm.Model.build([body(vm.SurfaceFile(path))]))


def test_hex_box_interface():
    check_interface(vm.Model.build([body(vm.Box((1.0, 0.6, 0.4)), "hex", 0.1)]))


def test_field_far_from_sphere_is_dipole():
    """Outside a uniformly magnetised sphere the field is that of a point
    dipole of moment m = V M (e.g. Jackson, 3rd ed., sec. 5.10)."""
    chi = 5.0
    model = vm.Model.build([body(vm.Sphere(0.5), size=0.12)])
    model = vm.Model((vm.Body("b", vm.Sphere(0.5), vm.LinearMaterial("m", chi)),), model.mesh, model.mesh_stats)
    sol = vm.solve(model, [vm.UniformField((0.0, 0.0, 1.0))])
    m = sol.moment()
    r = np.array([[0.0, 0.0, 3.0], [2.0, 1.0, 2.0]])
    H, _ = sol.field(r)
    d = np.linalg.norm(r, axis=1)[:, None]
    Hd = (3 * r * (r @ m)[:, None] / d ** 2 - m) / (4 * np.pi * d ** 3) + [0, 0, 1.0]
    assert np.abs(H - Hd).max() < 2e-3 * np.abs(Hd).max()
