"""Solver mechanics: memory refusal, Krylov convergence and its history."""
import numpy as np
import pytest

import volmag as vm
from volmag.krylov import cg, gmres


def sphere_model(chi=100.0, size=0.5):
    return vm.Model.build([vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", chi), mesh=vm.MeshSpec("tet", size))])


def test_refuses_dense_operator_over_memory_limit():
    model = sphere_model()
    with pytest.raises(vm.SolverError, match="GiB"):
        vm.solve(model, [vm.UniformField((0, 0, 1.0))], vm.SolverOptions(memory_limit=1e5))


def test_method_for_other_element_kind_is_refused():
    hexes = vm.Model.build([vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 10.0), mesh=vm.MeshSpec("hex", 0.5))])
    with pytest.raises(vm.SolverError, match="tetrahedral meshes only"):
        vm.solve(hexes, [vm.UniformField((0, 0, 1.0))], vm.SolverOptions(method="fmm"))


def test_history_records_true_residual():
    sol = vm.solve(sphere_model(), [vm.UniformField((0, 0, 1.0))], vm.SolverOptions(tolerance=1e-12))
    assert sol.converged and sol.residual <= 1e-12
    assert sol.history[0] == pytest.approx(1.0) and sol.history[-1] == sol.residual
    assert len(sol.history) == sol.iterations + 1


def test_gmres_solves_nonsymmetric_system_without_preconditioner():
    """Against numpy's direct solve (LAPACK)."""
    rng = np.random.default_rng(0)
    A = np.eye(60) * 4 + rng.standard_normal((60, 60)) * 0.3
    b = rng.standard_normal(60)
    res = gmres(lambda x: A @ x, b, tol=1e-12, restart=15, maxiter=400)
    assert res.converged
    assert np.allclose(res.x, np.linalg.solve(A, b), rtol=1e-9, atol=1e-11)
    assert np.linalg.norm(b - A @ res.x) / np.linalg.norm(b) <= 1.01e-12


def test_cg_solves_spd_system_with_preconditioner():
    """Against numpy's direct solve (LAPACK); the recorded residual is the
    preconditioned one, |P (b - A x)| / |P b|."""
    rng = np.random.default_rng(1)
    G = rng.standard_normal((80, 80))
    A = G @ G.T / 80 + np.diag(np.linspace(0.01, 50.0, 80))
    b = rng.standard_normal(80)
    d = 1.0 / np.diag(A)
    res = cg(lambda x: A @ x, b, lambda r: d * r, tol=1e-12, maxiter=500)
    assert res.converged and len(res.history) == res.iterations + 1
    assert np.allclose(res.x, np.linalg.solve(A, b), rtol=1e-8, atol=1e-10)
    assert np.linalg.norm(d * (b - A @ res.x)) / np.linalg.norm(d * b) <= 1e-12


def test_linear_response_scales_with_field():
    """Linearity: doubling the applied field doubles M (superposition)."""
    model = sphere_model(chi=50.0)
    a = vm.solve(model, [vm.UniformField((0, 0, 1.0))])
    b = vm.solve(model, [vm.UniformField((0, 0, 1.0)), vm.UniformField((0, 0, 1.0))])
    assert np.allclose(b.M, 2 * a.M, rtol=1e-9, atol=1e-12)
