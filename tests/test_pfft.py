"""Precorrected-FFT single-layer product and the fast tetrahedral system.

References: the dense evaluation of the same potentials in this code base
(operators.potentials_at_nodes, kernels.mesh_single_layer_matrix, the dense
solve DenseSystem), and the uniformly magnetised sphere, X_app = chi / (1 +
chi / 3) (Clausius-Mossotti; Jackson, Classical Electrodynamics, 3rd ed.,
sec. 5.10)."""
import numpy as np
import pytest

import volmag as vm
from volmag import kernels, operators
from volmag.pfft import PrecorrectedFFT, parameters, subdivided_rule
from volmag.solve import DenseSystem, SolverOptions
from volmag.tetfast import TetFastSystem


def _model(body):
    return vm.Model.build([body])


@pytest.fixture(scope="module")
def meshes():
    sphere = vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 1000.0), mesh=vm.MeshSpec("tet", 0.15))
    drill = vm.Cut(vm.Cylinder(0.25, 2.0), vm.Placement(axis=(1, 0, 0), angle_deg=90))
    box = vm.Body("d", vm.Box((2.0, 1.0, 1.0)), vm.LinearMaterial("m", 1000.0), cuts=(drill,),
                  mesh=vm.MeshSpec("tet", 0.15))
    out = []
    for body in (sphere, box):
        m = _model(body)
        topo = operators.tet_topology(m.mesh.nodes, m.mesh.cells)
        C = operators.charge_operator(topo, m.mesh.cells, m.element_chi(), len(m.mesh.nodes))
        rng = np.random.default_rng(7)
        # charges of a random nodal potential (rough: the hardest case) and of
        # a uniform magnetisation (surface charges only)
        sig = np.column_stack([C @ rng.standard_normal(len(m.mesh.nodes)),
                               operators.face_charges(topo, np.tile([0.3, -0.2, 1.0], (m.mesh.n_cells, 1)))])
        ref = operators.potentials_at_nodes(m.mesh.nodes, topo, sig)
        out.append((m, topo, sig, ref))
    return out


def _rel_err(out, ref):
    return np.linalg.norm(out - ref, axis=0) / np.linalg.norm(ref, axis=0)


TOLS = (1e-3, 1e-4, 1e-6)


@pytest.fixture(scope="module")
def products(meshes):
    """{(mesh index, tol): (operator, relative errors per charge set)}."""
    out = {}
    for k, (m, topo, sig, ref) in enumerate(meshes):
        for tol in TOLS:
            if k == 0 and tol == 1e-4:
                continue
            P = PrecorrectedFFT(m.mesh.nodes, topo.faces, tol=tol)
            out[k, tol] = P, _rel_err(P(sig), ref)
    return out


@pytest.mark.parametrize("tol", [1e-3, 1e-6])
def test_product_within_tolerance(meshes, products, tol):
    """pFFT product against the dense evaluation, both meshes, both charge sets."""
    for k, (m, topo, sig, ref) in enumerate(meshes):
        P, err = products[k, tol]
        assert np.all(err <= tol), (m.bodies[0].name, tol, err)
        # one column at a time gives the same numbers
        assert np.allclose(P(sig[:, 1]), P(sig)[:, 1], rtol=1e-12, atol=1e-12 * np.abs(ref[:, 1]).max())


def test_error_falls_as_tolerance_tightens(products):
    """Error against the dense evaluation falls with each tighter row."""
    errs = [products[1, t][1].max() for t in TOLS]
    assert errs[0] > errs[1] > errs[2]
    assert errs[2] < errs[0] / 100


def test_near_block_is_exact(meshes, products):
    """Entries of `near` equal the dense single-layer matrix (kernels)."""
    m, topo, _, _ = meshes[0]
    P = products[0, 1e-3][0]
    rows = np.arange(0, len(m.mesh.nodes), 97)
    S = kernels.mesh_single_layer_matrix(m.mesh.nodes[rows], kernels.triangle_mesh(m.mesh.nodes, topo.faces))
    near = P.near[rows].toarray()
    mask = near != 0
    assert mask.sum() > 100 * len(rows)
    assert np.allclose(near[mask], S[mask], rtol=1e-12, atol=0)
    # every face that touches a node is near it (the singular pairs)
    touch = np.zeros_like(mask)
    for k, i in enumerate(rows):
        touch[k, np.flatnonzero((topo.faces == i).any(axis=1))] = True
    assert np.all(mask[touch])


def test_subdivided_rule_integrates_degree_5():
    """Monomials up to degree 5 on the reference triangle: int x^a y^b =
    a! b! / (a + b + 2)! (area 1/2)."""
    from math import factorial
    for levels in (0, 1):
        qp, qw = subdivided_rule(levels)
        x, y = qp[:, 1], qp[:, 2]
        for a in range(6):
            for b in range(6 - a):
                exact = factorial(a) * factorial(b) / factorial(a + b + 2)
                assert 0.5 * np.sum(qw * x ** a * y ** b) == pytest.approx(exact, rel=1e-13)


def test_parameters_rule():
    """Tighter tolerances use higher orders; beyond the calibrated range refuse."""
    assert parameters(1e-3).order < parameters(1e-6).order
    with pytest.raises(ValueError):
        parameters(1e-12)


def test_sphere_high_chi_fast_equals_dense(meshes, products):
    """chi = 1000 sphere: the fast system's X_app equals the dense solve's
    within the operator tolerance, and both are within 0.5 % of chi/(1+chi/3)."""
    chi = 1000.0
    model = meshes[0][0]
    assert model.bodies[0].material.chi_tensor(np.eye(3))[2, 2] == chi
    opts = SolverOptions(tolerance=1e-9)
    src = [vm.UniformField((0.0, 0.0, 1.0))]
    dense = DenseSystem(model, opts).solve(src)
    fast_sys = TetFastSystem(model, opts, operator_tol=1e-6, S=products[0, 1e-6][0])
    fast = fast_sys.solve(src)
    assert fast.converged and fast.method == "fft"
    x_dense, x_fast = dense.mean_M()[2], fast.mean_M()[2]
    # operator tolerance 1e-6 (measured difference: 3e-9)
    assert abs(x_fast - x_dense) <= 1e-6 * abs(x_dense)
    exact = chi / (1.0 + chi / 3.0)
    assert abs(x_dense / exact - 1) < 5e-3 and abs(x_fast / exact - 1) < 5e-3
    assert fast.iterations <= 10          # jacobi + coarse: 4 measured
    assert np.allclose(fast.potential, dense.potential, rtol=0, atol=1e-6 * np.abs(dense.potential).max())
    st = fast_sys.stats()
    assert st["near_pairs"] > 0 and st["operator_bytes"] > 0


def test_far_apart_bodies_refused_before_allocating(meshes):
    """Two copies of a mesh 1 km apart: the grid would be enormous."""
    m, topo, _, _ = meshes[0]
    n = len(m.mesh.nodes)
    nodes = np.vstack([m.mesh.nodes, m.mesh.nodes + [1000.0, 0, 0]])
    faces = np.vstack([topo.faces, topo.faces + n])
    from volmag.pfft import MAX_GRID_POINTS, grid_points
    assert grid_points(nodes, faces) > MAX_GRID_POINTS
    with pytest.raises(ValueError, match="FMM"):
        PrecorrectedFFT(nodes, faces, tol=1e-6)
