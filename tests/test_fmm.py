"""Fast face-charge operators (volmag.fmm) against independent dense sums in
this code base (operators.potentials_at_nodes, kernels.face_field_at_points,
both exact closed forms per pair), a direct numpy sum for the FMM kernel, the
exact monomial integrals over a triangle, and the point-dipole law."""
import math

import numpy as np
import pytest

import volmag as vm
from volmag import fmm, kernels, operators, post
from volmag.sources import total_source_field


def rel(x, ref):
    return np.linalg.norm(x - ref) / np.linalg.norm(ref)


@pytest.fixture(scope="module")
def tet_meshes():
    sphere = vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 10.0), mesh=vm.MeshSpec("tet", 0.22))
    holed = vm.Body("b", vm.Box((2.0, 1.2, 0.8)), vm.LinearMaterial("m", 10.0),
                    cuts=(vm.Cut(vm.Cylinder(0.3, 1.0)),), mesh=vm.MeshSpec("tet", 0.17))
    return {name: vm.Model.build([b]).mesh for name, b in (("sphere", sphere), ("holed box", holed))}


@pytest.mark.parametrize("degree", sorted(fmm.RULES))
def test_rule_degree(degree):
    """Each rule integrates l1^a l2^b l3^c exactly up to its degree:
    (1/A) int_T = 2 a! b! c! / (a + b + c + 2)! (e.g. Zienkiewicz, The
    Finite Element Method), and misses some monomial of the next degree."""
    bary, w = fmm.RULES[degree]
    assert np.isclose(w.sum(), 1.0, rtol=0, atol=1e-14)

    def err(a, b, c):
        exact = 2 * math.factorial(a) * math.factorial(b) * math.factorial(c) / math.factorial(a + b + c + 2)
        return abs(w @ (bary[:, 0] ** a * bary[:, 1] ** b * bary[:, 2] ** c) - exact)

    for n in range(degree + 1):
        for a in range(n + 1):
            for b in range(n - a + 1):
                assert err(a, b, n - a - b) < 1e-13
    nxt = degree + 1
    assert max(err(a, b, nxt - a - b) for a in range(nxt + 1) for b in range(nxt - a + 1)) > 1e-6


def test_fmm_kernel_is_one_over_4pi_r():
    """fmm3dpy's sums against a direct numpy sum of c / (4 pi r) and its gradient."""
    rng = np.random.default_rng(3)
    src, trg, c = rng.random((500, 3)), rng.random((40, 3)) + 1.5, rng.normal(size=(2, 500))
    d = trg[:, None, :] - src[None, :, :]
    r = np.linalg.norm(d, axis=2)
    phi = c @ (1 / (4 * np.pi * r)).T
    grad = -np.einsum("ks,tsd->kdt", c, d / (4 * np.pi * r[..., None] ** 3))
    assert rel(fmm._fmm(src, c, trg, 1e-12), phi) < 1e-10
    assert rel(fmm._fmm(src, c[:1], trg, 1e-12, grad=True), grad[:1]) < 1e-10


@pytest.mark.parametrize("name", ["sphere", "holed box"])
def test_potentials_match_dense(tet_meshes, name):
    """FaceChargeFMM = operators.potentials_at_nodes (exact dense sum) within
    tol, for random charges and the charges of a non-uniform M; the error
    falls as tol tightens; `near` holds the exact entries."""
    mesh = tet_meshes[name]
    topo = operators.tet_topology(mesh.nodes, mesh.cells)
    rng = np.random.default_rng(1)
    M = np.tile([0.2, 0.0, 1.0], (len(mesh.cells), 1)) + 0.1 * rng.normal(size=(len(mesh.cells), 3))
    sig = np.stack([rng.normal(size=len(topo.faces)), operators.face_charges(topo, M)], axis=1)
    ref = operators.potentials_at_nodes(mesh.nodes, topo, sig)
    errors = {}
    for tol in (1e-4, 1e-7):
        F = fmm.FaceChargeFMM(mesh.nodes, topo.faces, tol)
        phi = F(sig)
        errors[tol] = max(rel(phi[:, k], ref[:, k]) for k in range(2))
        assert errors[tol] < tol, (tol, errors[tol])
        assert np.allclose(F(sig[:, 1]), phi[:, 1], rtol=0, atol=1e-12 * np.abs(phi).max())
    assert errors[1e-7] < 0.1 * errors[1e-4]
    S = kernels.mesh_single_layer_matrix(mesh.nodes, kernels.triangle_mesh(mesh.nodes, topo.faces))
    rows, cols = F.near.nonzero()
    assert F.near.shape == S.shape and F.near.nnz > len(mesh.nodes)
    assert np.allclose(F.near[rows, cols].A1, S[rows, cols], rtol=1e-12, atol=0)
    assert F.nbytes() > F.near.data.nbytes


def _solved(kind, size):
    body = vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 10.0), mesh=vm.MeshSpec(kind, size))
    return vm.solve(vm.Model.build([body]), [vm.UniformField((0.0, 0.3, 1.0))])


def _probe_points(tris, n, seed):
    """Points in and around the body, plus face centroids (on faces; a
    quadrature point of the degree-1 and -5 rules) and face vertices."""
    rng = np.random.default_rng(seed)
    return np.concatenate([rng.uniform(-1.4, 1.4, (n, 3)), tris[:40].mean(axis=1), tris[40:60, 0]])


@pytest.mark.parametrize("kind,size", [("tet", 0.25), ("hex", 0.2)])
def test_field_matches_exact_sum(kind, size):
    """field_of_faces = kernels.face_field_at_points (exact sum) within tol at
    points outside, inside and on faces, and post.field_at_points' fast path
    equals its exact path."""
    sol = _solved(kind, size)
    tris, sigma = post.charged_faces(sol.model.mesh, sol.M)
    P = _probe_points(tris, 600, 2)
    ref = kernels.face_field_at_points(P, np.ascontiguousarray(tris), sigma)
    inside = post.locate(sol.model.mesh, P) >= 0
    assert inside.sum() > 100 and (~inside).sum() > 100
    errors = []
    for tol in (1e-4, 1e-8):            # 1e-8: a rule with the centroid among its points
        H = fmm.field_of_faces(P, tris, sigma, tol)
        errors.append(rel(H, ref))
        assert errors[-1] < tol
        assert rel(H[inside], ref[inside]) < tol
    assert errors[1] < 0.1 * errors[0]


def test_field_at_points_fast_path(monkeypatch):
    """post.field_at_points through the FMM equals its exact sum within tol."""
    sol = _solved("hex", 0.25)
    P = np.random.default_rng(5).uniform(-1.3, 1.3, (600, 3))
    H0, B0 = post.field_at_points(sol, P)
    monkeypatch.setattr(post, "FAST_FIELD_PAIRS", 0)
    monkeypatch.setattr(post, "FAST_FIELD_POINTS", 1)
    H1, B1 = post.field_at_points(sol, P, tol=1e-7)
    scale = np.linalg.norm(H0 - total_source_field(sol.sources, P))     # the charges' field
    assert np.linalg.norm(H1 - H0) < 1e-7 * scale
    assert np.linalg.norm(B1 - B0) < 1e-7 * np.linalg.norm(B0)


def test_far_point_is_dipole_field():
    """Far from the body the field is that of a point dipole m = sum V_e M_e
    at the centroid: H = (3 (m.u) u - m) / (4 pi r^3) (e.g. Jackson,
    Classical Electrodynamics, 3rd ed., eq. 5.56); the next multipole is
    (R/r)^2 = 1e-4 smaller at r = 100 R."""
    sol = _solved("tet", 0.25)
    mesh = sol.model.mesh
    tris, sigma = post.charged_faces(mesh, sol.M)
    vol = mesh.volumes()
    m, c = vol @ sol.M, vol @ mesh.centroids() / vol.sum()
    u = np.random.default_rng(4).normal(size=(6, 3))
    u /= np.linalg.norm(u, axis=1)[:, None]
    r = 100.0
    dip = (3 * (u @ m)[:, None] * u - m) / (4 * np.pi * r ** 3)
    H = fmm.field_of_faces(c + r * u, tris, sigma, 1e-8)
    assert np.all(np.linalg.norm(H - dip, axis=1) < 3e-4 * np.linalg.norm(dip, axis=1))


def test_estimate_grows_with_size():
    small, large = fmm.estimate(1000, 10_000, 1e-6), fmm.estimate(10_000, 100_000, 1e-6)
    assert all(b > a > 0 for a, b in zip(small, large))


def test_hex_faces_merged_exactly():
    """Merging the two sides of shared hex faces leaves the exact field
    (kernels.face_field_at_points on every cell's own faces) unchanged, and a
    uniform M keeps only the boundary faces (interior charges cancel)."""
    sol = _solved("hex", 0.3)
    mesh = sol.model.mesh
    tris, sigma = post.charged_faces(mesh, sol.M)
    mt, ms = post._merge_hex_faces(mesh, tris, sigma)
    assert len(ms) < 0.75 * len(sigma)
    P = np.random.default_rng(6).uniform(-1.3, 1.3, (300, 3))
    ref = kernels.face_field_at_points(P, np.ascontiguousarray(tris), sigma)
    assert rel(kernels.face_field_at_points(P, np.ascontiguousarray(mt), ms), ref) < 1e-12
    ut, us = post._merge_hex_faces(mesh, *post.charged_faces(mesh, np.tile([0.0, 0.0, 1.0], (mesh.n_cells, 1))))
    assert np.allclose(np.abs(us), 1.0) and np.all(np.abs(ut[:, :, 2] - ut[:, :1, 2]) < 1e-12)
