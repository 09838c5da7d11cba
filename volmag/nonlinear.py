"""Nonlinear materials: Newton's method on the same discrete operator.

Unknowns x are those of the linear solver (nodal potential of M for tets, M
per cell for hexes). With the element law M = M(H) the residual is

    tets:  R(x) = x - S sigma(M(H_s - G x))      (S: single-layer, sigma: face charges)
    hexes: R(x) = x - M(H_s + K x)

and its exact Jacobian replaces chi in the linear operator by dM/dH per
element: the differential susceptibility along H and the chord
susceptibility across it. Each Newton correction is solved by GMRES from
zero (a warm start from the previous, quadratically larger, correction
costs iterations in the last steps), preconditioned by an LU factor of the
current Jacobian (single precision) on the dense paths, or matrix-free: hex
grids by FFT with the multilevel cycle, tetrahedra by the precorrected FFT
(or FMM) of S, built once, with the Jacobi + per-body coarse correction of
each Jacobian (:mod:`volmag.tetfast`). A backtracking line search on |R|
guards each step, with a damped fixed-point step as the fallback
(Kelley, Solving Nonlinear Equations with Newton's Method, SIAM 2003).
Convergence needs both the residual and the change in M below tolerance;
otherwise the best state reached is returned marked as not converged.
"""
from __future__ import annotations

import time

import numpy as np
import scipy.linalg as sla

from . import kernels, operators
from .krylov import gmres
from .progress import QUIET
from .machine import available_memory
from .solve import SolverError, Solution, _all_uniform
from .sources import total_source_field


class ElementLaw:
    """M(H) and dM/dH for every element of a model, body by body."""

    def __init__(self, model):
        self.parts = []
        for i, body in enumerate(model.bodies):
            R = body.placement.rotation_matrix()
            self.parts.append((np.flatnonzero(model.mesh.body_id == i), body.material, R))

    def magnetisation(self, H):
        M = np.zeros_like(H)
        for idx, mat, R in self.parts:
            if mat.is_linear:
                M[idx] = H[idx] @ mat.chi_tensor(R).T + mat.remanence_vector(R)
            else:
                M[idx] = mat.magnetisation(H[idx])
        return M

    def jacobian(self, H):
        J = np.zeros(H.shape + (3,))
        for idx, mat, R in self.parts:
            J[idx] = mat.chi_tensor(R) if mat.is_linear else mat.jacobian(H[idx])
        return J


def _dense_tet_bytes(n_nodes: int, n_faces: int) -> float:
    """Bytes of the dense nonlinear tet path: S (nodes x faces) and the
    Jacobian with its single-precision factor."""
    return 8.0 * n_nodes * n_faces + 20.0 * n_nodes * n_nodes


class _TetProblem:
    def __init__(self, model, Hs, progress, limit=None):
        mesh = model.mesh
        self.mesh, self.Hs = mesh, Hs
        self.topo = operators.tet_topology(mesh.nodes, mesh.cells)
        n, nf = len(mesh.nodes), len(self.topo.faces)
        need = _dense_tet_bytes(n, nf)
        limit = 0.7 * available_memory() if limit is None else limit
        if need > limit:
            raise SolverError(f"the dense nonlinear solve of {n} unknowns needs {need / 2**30:.1f} GiB "
                              f"(single-layer matrix and Jacobian), over the limit of {limit / 2**30:.1f} GiB; "
                              "use method 'fft' (or 'auto'), or a coarser mesh")
        progress(f"assembling single-layer matrix: {n} nodes x {nf} faces")
        tri = kernels.triangle_mesh(mesh.nodes, self.topo.faces)
        self.S = kernels.mesh_single_layer_matrix(tri.nodes, tri)
        self.n = n

    def field(self, x):
        return self.Hs - np.einsum("eik,ek->ei", self.topo.grads, x[self.mesh.cells])

    def residual(self, x, M):
        return x - self.S @ operators.face_charges(self.topo, M)

    def jacobian(self, JM):
        C = operators.charge_operator(self.topo, self.mesh.cells, JM, self.n)
        A = -(C.T @ self.S.T).T
        A[np.diag_indices(self.n)] += 1.0
        return A

    def linear_step(self, JM):
        return _dense_step(self.jacobian(JM))


class _TetFastProblem(_TetProblem):
    """Tetrahedra, matrix-free: S by a fast product (precorrected FFT, or
    the face-charge FMM), built once; each Newton step applies
    v -> v - S C_J v (C_J the face charges of dM/dH) and is preconditioned
    by the Jacobi + per-body coarse correction of that Jacobian (the default
    of the linear fast solve, see :mod:`volmag.tetfast`)."""

    def __init__(self, model, Hs, progress, operator: str = "fft", operator_tol: float | None = None):
        from .tetfast import DEFAULT_OPERATOR_TOL
        mesh = model.mesh
        self.model, self.mesh, self.Hs, self.progress = model, mesh, Hs, progress
        self.topo = operators.tet_topology(mesh.nodes, mesh.cells)
        self.n = len(mesh.nodes)
        tol = DEFAULT_OPERATOR_TOL if operator_tol is None else float(operator_tol)
        progress(f"fast nodal operator ({operator}): {self.n} unknowns, {len(self.topo.faces)} faces")
        if operator == "fft":
            from .pfft import PrecorrectedFFT
            self.S = PrecorrectedFFT(mesh.nodes, self.topo.faces, tol=tol, progress=progress)
        else:
            from .fmm import FaceChargeFMM
            self.S = FaceChargeFMM(mesh.nodes, self.topo.faces, tol=tol)
            progress(f"FMM: {self.S.near.nnz} near pairs, {self.S.nbytes() / 2**20:.0f} MiB")

    def residual(self, x, M):
        return x - self.S(operators.face_charges(self.topo, M))

    def jacobian(self, JM):
        raise NotImplementedError("the fast tetrahedral Jacobian is applied, never assembled")

    def linear_step(self, JM):
        from .tetfast import jacobi_coarse_preconditioner
        C = operators.charge_operator(self.topo, self.mesh.cells, JM, self.n)
        P = jacobi_coarse_preconditioner(self.S, C, self.mesh, len(self.model.bodies))
        return (lambda v: v - self.S(C @ v)), P


class _HexProblem:
    def __init__(self, model, Hs, progress):
        progress(f"assembling cell operator: {3 * model.mesh.n_cells} unknowns")
        self.K = operators.grid_tensor_blocks(model.mesh.grid_index, model.mesh.cell_size)
        self.Hs, self.n = Hs, 3 * model.mesh.n_cells

    def field(self, x):
        return self.Hs + (self.K @ x).reshape(-1, 3)

    def residual(self, x, M):
        return x - M.ravel()

    def jacobian(self, JM):
        from .solve import _identity_minus_chi_K
        return _identity_minus_chi_K(JM, self.K)

    def linear_step(self, JM):
        return _dense_step(self.jacobian(JM))


class _HexFFTProblem(_HexProblem):
    """Hexahedral grid, matrix-free: the FFT product and, for the Newton
    steps, the multilevel preconditioner built on the differential
    susceptibility (same rules as the linear FFT solve)."""

    def __init__(self, model, Hs, options, progress):
        from .fft import GridOperator
        mesh = model.mesh
        self.K = GridOperator(mesh.grid_index, mesh.cell_size, options.precision)
        progress(f"FFT operator: {mesh.n_cells} cells, padded grid {'x'.join(map(str, self.K.padded))}")
        self.Hs, self.n, self.mesh, self.options = Hs, 3 * mesh.n_cells, mesh, options

    def field(self, x):
        return self.Hs + self.K(x.reshape(-1, 3))

    def linear_step(self, JM):
        from .multilevel import preconditioner_for
        P = preconditioner_for(self.mesh.grid_index, self.mesh.cell_size, JM, self.options.precision, self.K)
        return (lambda v: v - np.einsum("eij,ej->ei", JM, self.K(v.reshape(-1, 3))).ravel()), P


def _dense_step(A):
    """(matvec, preconditioner) of a dense Jacobian: float32 LU."""
    lu = sla.lu_factor(A.astype(np.float32), check_finite=False)

    def precond(r):
        return sla.lu_solve(lu, r.astype(np.float32), check_finite=False).astype(float)

    return (lambda v: A @ v), precond


def _method(model, options, progress) -> str:
    """The linear solve's choice (:func:`volmag.methods.choose`); for
    tetrahedra "auto" passes over dense when its nonlinear path (S stored,
    nodes x faces) does not fit, taking the fastest fast method that does."""
    from .methods import choose, estimates, memory_limit
    method, why = choose(model.mesh, options)
    mesh = model.mesh
    if mesh.cell_type == "tet" and method == "dense" and options.method == "auto":
        limit = memory_limit(options)
        need = _dense_tet_bytes(len(mesh.nodes), 2 * mesh.n_cells + 1)
        if need > limit:
            table = estimates(mesh, options)
            fast = sorted((e for e in table if e.method != "dense" and not e.unavailable and e.bytes <= limit),
                          key=lambda e: e.seconds)
            if not fast:
                table = "; ".join(e.describe() for e in table)
                raise SolverError(f"no solver method fits the nonlinear solve of {mesh.n_cells} tetrahedra in "
                                  f"{limit / 2**30:.1f} GiB ({table}); use a coarser mesh")
            method = fast[0].method
            why = (f"the dense nonlinear solve needs ~{need / 2**30:.2f} GiB (single-layer matrix and "
                   f"Jacobian), over the limit of {limit / 2**30:.2f} GiB; {fast[0].describe()}")
    progress(f"method {method}: {why}")
    return method


def solve_nonlinear(model, sources, options, progress=QUIET, max_steps: int = 60,
                    m_tolerance: float = 1e-6) -> Solution:
    """Newton solve for models with nonlinear materials. `options.tolerance`
    bounds the relative residual |R| / |x|; `m_tolerance` the relative change
    of M in the last step."""
    t0 = time.perf_counter()
    mesh = model.mesh
    Hs = operators.element_average(mesh, lambda p: total_source_field(sources, p))
    method = _method(model, options, progress)
    if mesh.cell_type == "tet" and method == "dense":
        from .methods import memory_limit
        problem = _TetProblem(model, Hs, progress, memory_limit(options))
    elif mesh.cell_type == "tet":
        problem = _TetFastProblem(model, Hs, progress, operator=method)
    elif method == "fft":
        problem = _HexFFTProblem(model, Hs, options, progress)
    else:
        problem = _HexProblem(model, Hs, progress)
    if mesh.cell_type == "tet" and not _all_uniform(sources):
        problem.Hs = Hs = operators.gradient_projection(mesh, problem.topo, Hs)
    law = ElementLaw(model)
    x = np.zeros(problem.n)
    history, best = [], None
    converged = False
    for step in range(max_steps + 1):
        H = problem.field(x)
        M = law.magnetisation(H)
        R = problem.residual(x, M)
        scale = max(np.linalg.norm(x), np.linalg.norm(R), 1e-300)
        res = np.linalg.norm(R) / scale
        if best is None or res < best[0]:
            best = (res, x.copy(), M, H)
        if history:
            history[-1]["residual"] = res
            dM = history[-1]["dM"]
            progress(f"  Newton {step:3d}  residual {res:.3e}  dM {dM:.2e}  "
                     f"step {history[-1]['step']:.3g}  GMRES {history[-1]['linear_iterations']}")
            if res <= options.tolerance and dM <= m_tolerance:
                converged = True
                break
        if step == max_steps:
            break
        matvec, precond = problem.linear_step(law.jacobian(H))
        # forcing term 0.1 res, floored at 1e-8 (reached only once res < 1e-7,
        # where the next residual is far below tolerance anyway): GMRES on a
        # fast operator would otherwise chase round-off
        lin = gmres(matvec, -R, precond, tol=min(1e-3, max(0.1 * res, 1e-8)) if step else 1e-6,
                    maxiter=200, restart=60 if precond is not None else 150)
        dx, t = lin.x, 1.0
        rnorm = np.linalg.norm(R)
        while t > 1 / 64:
            xt = x + t * dx
            if np.linalg.norm(problem.residual(xt, law.magnetisation(problem.field(xt)))) < (1 - 1e-4 * t) * rnorm:
                break
            t /= 2
        else:   # Newton direction failed: damped fixed-point step x <- x - R/2
            dx, t = -R, 0.5
        x_new = x + t * dx
        M_new = law.magnetisation(problem.field(x_new))
        dM = np.linalg.norm(M_new - M) / max(np.linalg.norm(M_new), 1e-300)
        history.append({"step": t, "linear_iterations": lin.iterations, "dM": dM, "residual": np.nan})
        x = x_new
    res, x, M, H = best
    if not converged:
        progress(f"Newton did not converge: best residual {res:.3e}")
    seconds = time.perf_counter() - t0
    newton = [(h["residual"], h["step"], h["linear_iterations"], h["dM"]) for h in history]
    return Solution(model, tuple(sources), M, H, x if mesh.cell_type == "tet" else None, converged,
                    len(history), float(res), tuple(h["residual"] for h in history), method, problem.n,
                    seconds, {"newton_history": newton, "nonlinear": True})
