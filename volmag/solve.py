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

import time
from dataclasses import dataclass, field

import numpy as np
import scipy.linalg as sla

from . import operators
from .krylov import cg, gmres
from .meshing import Mesh, mesh_model
from .progress import QUIET, Progress
from .sources import total_source_field
from .units import MU0


@dataclass(frozen=True)
class SolverOptions:
    """How to solve. `method`: "auto" | "dense" | "fft" | "fmm" (see
    :mod:`volmag.methods`; "auto" takes the fastest that fits in memory);
    `tolerance`: relative residual at which the Krylov iteration stops;
    `max_iterations`: iteration cap; `memory_limit`: bytes the solve may use
    (None: 70 % of the memory available when the solve starts); `precision`:
    "double" | "single", storage and transforms of the fast operators (single
    halves their memory and limits the residual to ~1e-6)."""
    method: str = "auto"
    tolerance: float = 1e-10
    max_iterations: int = 500
    memory_limit: float | None = None
    precision: str = "double"

    def __post_init__(self):
        if self.method not in METHODS:
            raise ValueError(f"method must be one of {METHODS}, not {self.method!r}")
        if self.precision not in ("double", "single"):
            raise ValueError(f"precision must be 'double' or 'single', not {self.precision!r}")


METHODS = ("auto", "dense", "fft", "fmm")


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

    def body_chi(self) -> np.ndarray:
        """Susceptibility tensor (nb, 3, 3) of every body, model axes."""
        return np.array([b.material.chi_tensor(b.placement.rotation_matrix()) for b in self.bodies])

    def element_chi(self) -> np.ndarray:
        """Susceptibility tensor (ne, 3, 3) of every element, model axes."""
        return self.body_chi()[self.mesh.body_id]

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


class LinearSystem:
    """What every method shares: applied fields, right-hand sides, the Krylov
    loop and the fields from the unknowns.  Subclasses provide the operator
    (`matvec`), the preconditioner (`precond`) and, for hexes, the product
    with the interaction tensor (`apply_K`); for tets, `potentials`, the
    potential at the nodes of face charges."""
    method = "?"
    reason = "requested"          # why this method: set by make_system
    model: Model
    options: SolverOptions
    progress: Progress

    def matvec(self, x: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def precond(self, r: np.ndarray) -> np.ndarray:
        return r

    def apply_K(self, M: np.ndarray) -> np.ndarray:
        """Cell-averaged field (m, 3), A/m, of the cell magnetisations M (m, 3)."""
        raise NotImplementedError

    def potentials(self, sigmas: np.ndarray) -> np.ndarray:
        """Potentials (n, k), A, at the nodes of face charges (nf, k), A/m."""
        return operators.potentials_at_nodes(self.model.mesh.nodes, self.topo, sigmas)

    def stats(self) -> dict:
        return {}

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
            return self.potentials(sigma)
        return np.stack([mk.ravel() for mk in m], axis=1)

    def solve(self, sources) -> Solution:
        """Solve for one set of sources."""
        return self.solve_many([sources])[0]

    def solve_many(self, source_sets) -> list[Solution]:
        """Solve for several sets of sources with one operator (and, for tets,
        one pass over the mesh for all right-hand sides)."""
        t0 = time.perf_counter()
        source_sets = [tuple(s) for s in source_sets]
        fields = [self.source_field(s) for s in source_sets]
        B = self.rhs(fields)
        out = []
        for k, sources in enumerate(source_sets):
            x, result, history = self._krylov(B[:, k])
            M, H = self.fields(x, fields[k])
            stats = {**self.stats(), "method_reason": self.reason}
            setup = stats.get("assembly_seconds", 0.0) + stats.get("factor_seconds", 0.0)
            out.append(Solution(self.model, sources, M, H, x if self.model.mesh.cell_type == "tet" else None,
                                result.converged, len(history) - 1, result.residual, tuple(history),
                                self.method, len(x), time.perf_counter() - t0 + setup, stats))
        return out

    def _report(self, it, res):
        self.progress(f"  GMRES {it:4d}  residual {res:.3e}")

    def _krylov(self, b: np.ndarray):
        opts = self.options
        result = gmres(self.matvec, b, self.precond, tol=opts.tolerance,
                       maxiter=opts.max_iterations, callback=self._report)
        return result.x, result, list(result.history)

    def fields(self, x: np.ndarray, Hs: np.ndarray):
        """Per-element M and H (A/m) from the unknowns and the element-averaged
        applied field Hs. Tets: H = Hs - grad(phi_M); hexes: H = Hs + K M."""
        mesh = self.model.mesh
        if mesh.cell_type == "tet":
            H = Hs - np.einsum("eik,ek->ei", self.topo.grads, x[mesh.cells])
            return np.einsum("eij,ej->ei", self.chi, H) + self.model.element_remanence(), H
        M = x.reshape(-1, 3)
        return M, Hs + self.apply_K(M)


class DenseSystem(LinearSystem):
    """The assembled operator of a model, factorised once, solvable for many
    right-hand sides (the three field directions of a demag tensor)."""

    def __init__(self, model: Model, options: SolverOptions = SolverOptions(), progress: Progress = QUIET):
        self.model, self.options, self.progress = model, options, progress
        self.method = "dense"
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

    def matvec(self, x):
        return self.A @ x

    def precond(self, r):
        return sla.lu_solve(self.lu, r.astype(self.lu[0].dtype), check_finite=False).astype(float)

    def apply_K(self, M):
        return (self.K @ M.ravel()).reshape(-1, 3)

    def stats(self) -> dict:
        return {"assembly_seconds": self.assembly_seconds, "factor_seconds": self.factor_seconds,
                "factor_precision": self.factor_dtype}

    def _krylov(self, b: np.ndarray):
        """GMRES preconditioned by the LU factor; refactorise in double
        precision if the single-precision factor is not good enough."""
        opts = self.options
        result = gmres(self.matvec, b, self.precond, tol=opts.tolerance,
                       maxiter=min(opts.max_iterations, 40), callback=self._report)
        history = list(result.history)
        if not result.converged and self.factor_dtype == "float32":
            self.progress("single-precision factor not accurate enough; refactorising in double")
            self._factor(np.float64)
            result = gmres(self.matvec, b, self.precond, x0=result.x, tol=opts.tolerance,
                           maxiter=opts.max_iterations, callback=self._report)
            history += list(result.history[1:])
        return result.x, result, history


class GridFFTSystem(LinearSystem):
    """Hexahedral grid, matrix-free: the Newell convolution by FFT
    (:class:`volmag.fft.GridOperator`) preconditioned by the multilevel
    line-smoother/coarse-grid cycle (:mod:`volmag.multilevel`).  Memory grows
    with the grid's bounding box, not with its square."""

    def __init__(self, model: Model, options: SolverOptions = SolverOptions(), progress: Progress = QUIET):
        from .fft import GridOperator
        from .multilevel import preconditioner_for
        self.model, self.options, self.progress = model, options, progress
        self.method = "fft"
        mesh = model.mesh
        self.chi = model.element_chi()
        # symmetric positive definite chi everywhere: conjugate gradients apply
        self.spd = _symmetric_positive(model.body_chi())
        self.chi_inv = None
        t0 = time.perf_counter()
        self.K = GridOperator(mesh.grid_index, mesh.cell_size, options.precision)
        progress(f"FFT operator: {mesh.n_cells} cells on a {'x'.join(map(str, self.K.shape))} grid, "
                 f"padded {'x'.join(map(str, self.K.padded))}, {options.precision} precision")
        self.assembly_seconds = time.perf_counter() - t0
        t0 = time.perf_counter()
        self.P = preconditioner_for(mesh.grid_index, mesh.cell_size, self.chi, options.precision, self.K)
        if self.P is not None:
            progress(f"multilevel preconditioner: levels {self.P.describe()} cells, "
                     f"{self.P.nbytes() / 2**20:.0f} MiB")
        self.factor_seconds = time.perf_counter() - t0
        progress(f"set up in {self.assembly_seconds + self.factor_seconds:.1f} s, "
                 f"operator {self.K.nbytes() / 2**20:.0f} MiB")
        if options.precision == "single" and options.tolerance < SINGLE_TOLERANCE:
            progress(f"single precision: stopping at residual {SINGLE_TOLERANCE:g} "
                     f"instead of {options.tolerance:g}")

    def matvec(self, x):
        M = x.reshape(-1, 3)
        return (M - np.einsum("eij,ej->ei", self.chi, self.K(M))).ravel()

    def precond(self, r):
        return r if self.P is None else self.P(r)

    def apply_K(self, M):
        return self.K(M)

    def stats(self) -> dict:
        return {"assembly_seconds": self.assembly_seconds, "factor_seconds": self.factor_seconds,
                "precision": self.options.precision, "grid": list(self.K.shape),
                "padded_grid": list(self.K.padded), "levels": self.P.describe() if self.P else "none"}

    def _krylov(self, b):
        """GMRES with the multilevel cycle where it applies; otherwise (or
        when the cycle stalls) conjugate gradients on the symmetric form, or
        plain GMRES when some chi is not symmetric positive definite."""
        opts = self.options
        tol = max(opts.tolerance, SINGLE_TOLERANCE) if opts.precision == "single" else opts.tolerance
        history, x0 = [], None
        if self.P is not None:
            result = gmres(self.matvec, b, self.precond, tol=tol, maxiter=min(opts.max_iterations, 60),
                           callback=self._report)
            history, x0 = list(result.history), result.x
            if result.converged or opts.max_iterations <= 60:
                return result.x, result, history
            self.progress("multilevel preconditioner stalled; continuing without it")
        left = opts.max_iterations - max(len(history) - 1, 0)
        if self.spd:
            result = self._cg(b, tol, x0, left)
        else:
            result = gmres(self.matvec, b, None, x0=x0, tol=tol, maxiter=left, restart=PLAIN_RESTART,
                           callback=self._report)
        history += list(result.history[1:] if history else result.history)
        return result.x, result, history

    def _cg(self, b, tol, x0, maxiter):
        """Conjugate gradients on the symmetric form (chi^-1 - K) M = chi^-1 b,
        preconditioned by chi: the same residual as I - chi K, one product per
        iteration and no Krylov basis (Galerkin Newell tensors make K
        symmetric; chi symmetric positive definite in every cell)."""
        if self.chi_inv is None:          # once per system: solve_many calls this per field
            self.chi_inv = np.linalg.inv(self.model.body_chi())[self.model.mesh.body_id]
        inv = self.chi_inv

        def matvec(x):
            M = x.reshape(-1, 3)
            return (np.einsum("eij,ej->ei", inv, M) - self.K(M)).ravel()

        def precond(r):
            return np.einsum("eij,ej->ei", self.chi, r.reshape(-1, 3)).ravel()

        bs = np.einsum("eij,ej->ei", inv, b.reshape(-1, 3)).ravel()
        return cg(matvec, bs, precond, x0=x0, tol=tol, maxiter=maxiter, callback=self._report)


#: Restart length of unpreconditioned GMRES: the basis is the only big array
#: (8 bytes x unknowns x restart), and short restarts cost many iterations at
#: high chi.
PLAIN_RESTART = 150

#: Residual a single-precision fast operator can reach reliably.
SINGLE_TOLERANCE = 1e-6


def make_system(model: Model, options: SolverOptions = SolverOptions(), progress: Progress = QUIET) -> LinearSystem:
    """The linear system of a model by the method `options.method` names, or
    for "auto" the fastest that fits in memory (:func:`volmag.methods.choose`);
    refuses, before allocating, what cannot fit."""
    from .methods import choose
    method, why = choose(model.mesh, options, _symmetric_positive(model.body_chi()))
    progress(f"method {method}: {why}")
    if method == "dense":
        system = DenseSystem(model, options, progress)
    elif model.mesh.cell_type == "hex":
        system = GridFFTSystem(model, options, progress)
    else:
        from .tetfast import TetFastSystem
        system = TetFastSystem(model, options, progress, operator=method)
    system.reason = why
    return system


def _symmetric_positive(chi: np.ndarray) -> bool:
    """Every susceptibility tensor (k, 3, 3) symmetric positive definite."""
    return bool(np.allclose(chi, chi.transpose(0, 2, 1)) and np.linalg.eigvalsh(chi).min() > 0)


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
    return make_system(model, options, progress).solve(tuple(sources))
