"""Solve for the magnetisation of the bodies in the applied field.

The discrete operator (see :mod:`volmag.operators`) is assembled dense and the
system is solved by right-preconditioned GMRES (:mod:`volmag.krylov`).  The
preconditioner is an LU factorisation of the operator in single precision: its
backward error (~1e-7 x condition) makes GMRES converge in a few steps to a
double-precision residual, at half the memory and time of a double factor
(mixed-precision GMRES-based iterative refinement, Carson & Higham, SIAM J.
Sci. Comput. 2018).  When the operator is too ill-conditioned for a single
precision factor (GMRES stalls), the factor is redone in double precision.
"""
from __future__ import annotations

import os
import time
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla

from . import operators
from .krylov import gmres
from .meshing import Mesh, mesh_model
from .progress import QUIET, Progress
from .sources import total_source_field
from .units import MU0


@dataclass(frozen=True)
class SolverOptions:
    """How to solve. `method`: "auto" | "dense" | "fft" | "fmm" (only "auto"
    and "dense" are available in this version); `tolerance`: relative residual
    at which the Krylov iteration stops; `max_iterations`: iteration cap;
    `memory_limit`: bytes the dense operator may use (None: 70 % of the memory
    available when the solve starts)."""
    method: str = "auto"
    tolerance: float = 1e-10
    max_iterations: int = 500
    memory_limit: float | None = None


class SolverError(RuntimeError):
    """The requested solve cannot be done (too large, method unavailable)."""


@dataclass(frozen=True, eq=False)
class Model:
    """Bodies and their mesh. Build with :meth:`Model.build`."""
    bodies: tuple
    mesh: Mesh
    mesh_stats: tuple

    @classmethod
    def build(cls, bodies, progress: Progress = QUIET) -> "Model":
        """Mesh the bodies (lengths in m) and return the model."""
        bodies = tuple(bodies)
        names = [b.name for b in bodies]
        if len(set(names)) != len(names):
            raise ValueError(f"body names must be unique: {names}")
        mesh, stats = mesh_model(bodies)
        for s in stats:
            progress(f"mesh: {s.summary()}")
        return cls(bodies, mesh, tuple(stats))

    def body_index(self, name: str) -> int:
        for i, b in enumerate(self.bodies):
            if b.name == name:
                return i
        raise KeyError(f"no body named {name!r}; bodies: {[b.name for b in self.bodies]}")

    def element_chi(self) -> np.ndarray:
        """Susceptibility tensor (ne, 3, 3) of every element, model axes."""
        per_body = np.array([b.material.chi_tensor(b.placement.rotation_matrix()) for b in self.bodies])
        return per_body[self.mesh.body_id]

    def element_remanence(self) -> np.ndarray:
        """Remanent magnetisation (ne, 3), A/m, of every element, model axes."""
        per_body = np.array([b.material.remanence_vector(b.placement.rotation_matrix()) for b in self.bodies])
        return per_body[self.mesh.body_id]

    @property
    def is_linear(self) -> bool:
        """True when every material is linear (M = M0 + chi H)."""
        return all(b.material.is_linear for b in self.bodies)

    def only(self, name: str) -> "Model":
        """The model restricted to one body (for that body's own demag tensor)."""
        i = self.body_index(name)
        return Model((self.bodies[i],), self.mesh.subset(self.mesh.body_id == i, new_body_id=0),
                     (self.mesh_stats[i],))


@dataclass(frozen=True, eq=False)
class Solution:
    """Solved state. Per element: M, H (A/m) and B (T), arrays (ne, 3);
    `potential`: for tetrahedral meshes the nodal scalar potential (A) of the
    magnetisation alone (H = H_applied - grad potential)."""
    model: Model
    sources: tuple
    M: np.ndarray
    H: np.ndarray
    potential: np.ndarray | None
    converged: bool
    iterations: int
    residual: float
    history: tuple
    method: str
    unknowns: int
    seconds: float
    stats: dict = field(default_factory=dict)

    @property
    def B(self) -> np.ndarray:
        return MU0 * (self.H + self.M)

    def _mask(self, body: str | None) -> np.ndarray:
        if body is None:
            return np.ones(self.model.mesh.n_cells, bool)
        return self.model.mesh.body_id == self.model.body_index(body)

    def volume(self, body: str | None = None) -> float:
        """Meshed volume (m^3) of one body, or of all."""
        return float(self.model.mesh.volumes()[self._mask(body)].sum())

    def moment(self, body: str | None = None) -> np.ndarray:
        """Magnetic moment (A m^2) of one body, or of all."""
        m = self._mask(body)
        return self.model.mesh.volumes()[m] @ self.M[m]

    def mean_M(self, body: str | None = None) -> np.ndarray:
        """Volume-averaged magnetisation (A/m)."""
        return self.moment(body) / self.volume(body)

    def field(self, points) -> tuple[np.ndarray, np.ndarray]:
        """(H in A/m, B in T) at points (n, 3) in m, inside or outside bodies."""
        from .post import field_at_points
        return field_at_points(self, np.atleast_2d(np.asarray(points, float)))


def available_memory() -> float:
    """Bytes of memory available now (Linux /proc/meminfo; else total RAM)."""
    try:
        with open("/proc/meminfo") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return float(line.split()[1]) * 1024
    except OSError:
        pass
    return float(os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES"))


def dense_memory_estimate(mesh: Mesh) -> tuple[int, float]:
    """(unknowns, bytes) the dense path needs: operator in double precision,
    its single-precision factor, and the assembly temporaries for hex grids."""
    if mesh.cell_type == "tet":
        n = len(mesh.nodes)
        return n, 12.0 * n * n
    n = 3 * mesh.n_cells
    return n, 20.0 * n * n    # K and A in double, the factor in single


def check_method(mesh: Mesh, options: SolverOptions) -> str:
    """Pick the method, refusing (before allocating) what cannot fit."""
    if options.method in ("fft", "fmm"):
        raise SolverError(f"solver method {options.method!r} is not available in this version; "
                          "use 'dense' (or 'auto')")
    unknowns, need = dense_memory_estimate(mesh)
    limit = options.memory_limit if options.memory_limit is not None else 0.7 * available_memory()
    if need > limit:
        raise SolverError(
            f"the dense operator for {unknowns} unknowns needs {need / 2**30:.1f} GiB, over the "
            f"limit of {limit / 2**30:.1f} GiB; use a coarser mesh (larger mesh size), or fewer "
            "elements on the parts far from the region of interest")
    return "dense"


class DenseSystem:
    """The assembled operator of a model, factorised once, solvable for many
    right-hand sides (the three field directions of a demag tensor)."""

    def __init__(self, model: Model, options: SolverOptions = SolverOptions(), progress: Progress = QUIET):
        self.model, self.options, self.progress = model, options, progress
        self.method = check_method(model.mesh, options)
        mesh = model.mesh
        chi = model.element_chi()
        t0 = time.perf_counter()
        if mesh.cell_type == "tet":
            self.topo = operators.tet_topology(mesh.nodes, mesh.cells)
            self.chi = chi
            C = operators.charge_operator(self.topo, mesh.cells, chi, len(mesh.nodes))
            progress(f"assembling nodal operator: {len(mesh.nodes)} unknowns, {len(self.topo.faces)} faces")
            self.A = operators.nodal_potential_matrix(mesh.nodes, self.topo, C)
        else:
            progress(f"assembling cell operator: {3 * mesh.n_cells} unknowns")
            self.K = operators.grid_tensor_blocks(mesh.grid_index, mesh.cell_size)
            self.A = _identity_minus_chi_K(chi, self.K)
        self.assembly_seconds = time.perf_counter() - t0
        progress(f"assembled in {self.assembly_seconds:.1f} s")
        self._factor(np.float32)

    def _factor(self, dtype) -> None:
        t0 = time.perf_counter()
        self.lu = sla.lu_factor(self.A.astype(dtype), check_finite=False)
        self.factor_dtype = np.dtype(dtype).name
        self.factor_seconds = time.perf_counter() - t0
        self.progress(f"factorised ({self.factor_dtype}) in {self.factor_seconds:.1f} s")

    def _precond(self, r):
        return sla.lu_solve(self.lu, r.astype(self.lu[0].dtype), check_finite=False).astype(float)

    def source_field(self, sources) -> np.ndarray:
        """Applied field averaged over each element (ne, 3), A/m; for tets,
        projected onto gradients of the P1 potential (see
        operators.gradient_projection)."""
        Hs = operators.element_average(self.model.mesh, lambda p: total_source_field(sources, p))
        if self.model.mesh.cell_type == "tet" and not _all_uniform(sources):
            Hs = operators.gradient_projection(self.model.mesh, self.topo, Hs)
        return Hs

    def rhs(self, source_fields) -> np.ndarray:
        """Right-hand sides (unknowns, k) for k element-averaged applied fields.
        Tets: potential at the nodes of the charges of chi H_s (reduced
        potential formulation); hexes: chi H_s per cell."""
        chi, M0 = self.model.element_chi(), self.model.element_remanence()
        m = [np.einsum("eij,ej->ei", chi, Hs) + M0 for Hs in source_fields]
        if self.model.mesh.cell_type == "tet":
            sigma = np.stack([operators.face_charges(self.topo, mk) for mk in m], axis=1)
            return operators.potentials_at_nodes(self.model.mesh.nodes, self.topo, sigma)
        return np.stack([mk.ravel() for mk in m], axis=1)

    def solve(self, sources) -> Solution:
        """Solve for one set of sources."""
        return self.solve_many([sources])[0]

    def solve_many(self, source_sets) -> list[Solution]:
        """Solve for several sets of sources with one factorisation (and, for
        tets, one pass over the mesh for all right-hand sides)."""
        t0 = time.perf_counter()
        source_sets = [tuple(s) for s in source_sets]
        fields = [self.source_field(s) for s in source_sets]
        B = self.rhs(fields)
        out = []
        for k, sources in enumerate(source_sets):
            x, result, history = self._krylov(B[:, k])
            M, H = self.fields(x, fields[k])
            out.append(Solution(self.model, sources, M, H, x if self.model.mesh.cell_type == "tet" else None,
                                result.converged, len(history) - 1, result.residual, tuple(history),
                                self.method, len(x),
                                time.perf_counter() - t0 + self.assembly_seconds + self.factor_seconds,
                                {"assembly_seconds": self.assembly_seconds,
                                 "factor_seconds": self.factor_seconds,
                                 "factor_precision": self.factor_dtype}))
        return out

    def _krylov(self, b: np.ndarray):
        """GMRES preconditioned by the LU factor; refactorise in double
        precision if the single-precision factor is not good enough."""
        opts = self.options

        def report(it, res):
            self.progress(f"  GMRES {it:4d}  residual {res:.3e}")

        result = gmres(lambda x: self.A @ x, b, self._precond, tol=opts.tolerance,
                       maxiter=min(opts.max_iterations, 40), callback=report)
        history = list(result.history)
        if not result.converged and self.factor_dtype == "float32":
            self.progress("single-precision factor not accurate enough; refactorising in double")
            self._factor(np.float64)
            result = gmres(lambda x: self.A @ x, b, self._precond, x0=result.x, tol=opts.tolerance,
                           maxiter=opts.max_iterations, callback=report)
            history += list(result.history[1:])
        return result.x, result, history

    def fields(self, x: np.ndarray, Hs: np.ndarray):
        """Per-element M and H (A/m) from the unknowns and the element-averaged
        applied field Hs. Tets: H = Hs - grad(phi_M); hexes: H = Hs + K M."""
        mesh = self.model.mesh
        if mesh.cell_type == "tet":
            H = Hs - np.einsum("eik,ek->ei", self.topo.grads, x[mesh.cells])
            return np.einsum("eij,ej->ei", self.chi, H) + self.model.element_remanence(), H
        M = x.reshape(-1, 3)
        return M, Hs + (self.K @ x).reshape(-1, 3)


def _all_uniform(sources) -> bool:
    from .sources import UniformField
    return all(isinstance(s, UniformField) for s in sources)


def _identity_minus_chi_K(chi: np.ndarray, K: np.ndarray, rows: int = 256) -> np.ndarray:
    """I - blockdiag(chi) K, built a few cells at a time."""
    n = len(chi)
    A = np.empty_like(K)
    for start in range(0, n, rows):
        stop = min(start + rows, n)
        Kr = K[3 * start:3 * stop].reshape(stop - start, 3, -1)
        A[3 * start:3 * stop] = -np.einsum("eij,ejk->eik", chi[start:stop], Kr).reshape(-1, 3 * n)
    A[np.diag_indices(3 * n)] += 1.0
    return A


def solve(model: Model, sources, options: SolverOptions = SolverOptions(),
          progress: Progress = QUIET) -> Solution:
    """Magnetisation of the model's bodies in the field of `sources` (linear
    materials: one Krylov solve; nonlinear: Newton, see volmag.nonlinear)."""
    if not model.is_linear:
        from .nonlinear import solve_nonlinear
        return solve_nonlinear(model, tuple(sources), options, progress)
    return DenseSystem(model, options, progress).solve(tuple(sources))
