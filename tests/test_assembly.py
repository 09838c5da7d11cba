"""The nodal collocation matrix and the surface potentials assembled with
shared edge logarithms (kernels.mesh_potentials_at) against the same numbers
evaluated one triangle at a time (kernels.triangle_potential, itself checked
against scipy quadrature and 40-digit mpmath in test_kernels.py), and a few
entries directly against scipy quadrature (Duffy, SIAM J. Numer. Anal. 19,
1260, 1982, via test_kernels.quad_triangle)."""
import numpy as np
import pytest

import volmag as vm
from volmag import kernels, operators
from test_kernels import quad_triangle


def assembled(bodies):
    model = vm.Model.build(bodies)
    nodes, tets = model.mesh.nodes, model.mesh.cells
    topo = operators.tet_topology(nodes, tets)
    C = operators.charge_operator(topo, tets, model.element_chi(), len(nodes))
    return nodes, topo, C


def tet(name, shape, chi, size, position=(0.0, 0.0, 0.0)):
    return vm.Body(name, shape, vm.LinearMaterial("m" + name, chi), vm.Placement(position),
                   mesh=vm.MeshSpec("tet", size))


def far_pairs(points, tri):
    """(point, face) pairs beyond the kernels' quadrature cross-over."""
    centroid = tri.mean(axis=1)
    edge2 = np.max([np.sum((tri[:, i] - tri[:, (i + 1) % 3]) ** 2, axis=1) for i in range(3)], axis=0)
    dist2 = np.sum((points[:, None] - centroid[None]) ** 2, axis=2)
    return dist2 > kernels.TRIANGLE_FAR_RATIO ** 2 * edge2[None]


CASES = {
    "sphere": [tet("s", vm.Sphere(1.0), 10.0, 0.3)],
    # Several faces of the far box lie beyond the quadrature cross-over seen
    # from the sphere, others inside it; the chi = 0 cylinder's faces carry no
    # charge.
    "three bodies": [tet("s", vm.Sphere(0.3), 10.0, 0.12),
                     tet("b", vm.Box((0.4, 0.3, 0.3)), 1000.0, 0.12, (5.0, 0.0, 0.0)),
                     tet("c", vm.Cylinder(0.1, 0.3), 0.0, 0.1, (0.0, 0.8, 0.0))],
}


@pytest.mark.parametrize("case", CASES)
def test_nodal_matrix_equals_triangle_by_triangle(case):
    nodes, topo, C = assembled(CASES[case])
    tri = nodes[topo.faces]
    # Row by row, one triangle_potential per (node, face): S C with
    # S[i, f] = I_f(x_i) / 4pi.  Every node is a vertex of some faces and lies
    # on edges of others: the singular cases are in every row.
    ref = kernels.face_potentials_at_points(nodes, tri, C.toarray())
    A = operators.nodal_potential_matrix(nodes, topo, C)
    SC = np.eye(len(nodes)) - A
    assert np.max(np.abs(SC - ref)) <= 1e-13 * np.max(np.abs(ref))
    if case == "three bodies":
        charged = np.diff(C.indptr) > 0
        far = far_pairs(nodes, tri)[:, charged]
        assert far.any() and not far.all()
        assert not charged.all()


@pytest.fixture(scope="module")
def surface():
    """Boundary triangles of a coarse sphere mesh, renumbered to their nodes."""
    nodes, topo, _ = assembled(CASES["sphere"])
    faces = topo.faces[topo.neighbour < 0]
    used, local = np.unique(faces, return_inverse=True)
    return kernels.triangle_mesh(nodes[used], local.reshape(-1, 3))


def test_surface_potentials_at_vertices_edges_faces_and_far(surface):
    tri = surface.nodes[surface.faces]
    nrm = np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0])
    nrm /= np.linalg.norm(nrm, axis=1)[:, None]
    mids = surface.nodes[surface.edges].mean(axis=1)
    rng = np.random.default_rng(1)
    far = rng.normal(size=(20, 3))
    far *= (60.0 * 0.3 + 3.0 * rng.random(20))[:, None] / np.linalg.norm(far, axis=1)[:, None]
    points = np.concatenate([
        surface.nodes,                                      # at vertices
        mids,                                               # on edges
        tri.mean(axis=1),                                   # inside faces
        tri.mean(axis=1) + 1e-9 * nrm,                      # just off a face
        np.einsum("qk,fkd->fqd", kernels.TRI_RULE_POINTS, tri).reshape(-1, 3)[::5],
        far,                                                # quadrature side
    ])
    assert far_pairs(far, tri).any()
    sigmas = np.eye(len(tri))                               # one column per face
    ref = kernels.face_potentials_at_points(points, tri, sigmas)
    new = kernels.mesh_potentials_at_points(points, surface, sigmas)
    np.testing.assert_allclose(new, ref, rtol=1e-13, atol=1e-16 * np.abs(ref).max())
    # Charges on a few faces only: the others are skipped, their edges too.
    sparse = sigmas[:, ::7]
    np.testing.assert_allclose(kernels.mesh_potentials_at_points(points, surface, sparse),
                               ref[:, ::7], rtol=1e-13, atol=1e-16 * np.abs(ref).max())


def test_surface_potentials_against_quadrature(surface):
    """At a face's own vertex, on its edge, at a neighbouring face's far
    vertex (off the plane) and at its centroid, against scipy quadrature."""
    f = 0
    a, b, c = surface.nodes[surface.faces[f]]
    shared = np.flatnonzero(np.isin(surface.faces, surface.faces[f, :2]).sum(axis=1) == 2)
    other = surface.faces[shared[shared != f][0]]
    apex = surface.nodes[other[~np.isin(other, surface.faces[f])][0]]
    points = np.array([a, 0.5 * (b + c), apex, (a + b + c) / 3])
    got = kernels.mesh_potentials_at_points(points, surface, np.eye(len(surface.faces))[:, [f]])[:, 0]
    ref = [quad_triangle(p, a, b, c) * kernels.INV_4PI for p in points]
    np.testing.assert_allclose(got, ref, rtol=1e-9)


def test_flat_faces_give_zero_and_leave_the_others_alone():
    """Zero-area faces (collinear nodes, a repeated node) give 0, as
    triangle_potential does (area 0), without disturbing their neighbours."""
    nodes = np.array([[0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.2, 0.9, 0.1], [0.5, 0.0, 0.0],
                      [0.3, -0.8, 0.2]])
    faces = np.array([[0, 1, 2], [0, 3, 1], [1, 2, 2], [0, 4, 1], [3, 4, 2]])
    surf = kernels.triangle_mesh(nodes, faces)
    points = np.concatenate([nodes, [[0.4, 0.3, 0.5], [0.25, 0.0, 0.0]]])
    sigmas = np.eye(len(faces))
    got = kernels.mesh_potentials_at_points(points, surf, sigmas)
    ref = np.array([[kernels.triangle_potential(p, *nodes[f]) for f in faces] for p in points])
    assert np.all(got[:, [1, 2]] == 0.0)
    np.testing.assert_allclose(got, ref * kernels.INV_4PI, rtol=1e-13, atol=1e-16)
