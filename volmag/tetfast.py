"""Matrix-free nodal-potential system for large tetrahedral meshes.

The collocation operator of :mod:`volmag.operators`, A phi = phi - S C phi
(C the sparse face-charge operator, S the single-layer potential of face
charges at the nodes), is applied without assembling S: its product comes
from a precorrected FFT (:class:`volmag.pfft.PrecorrectedFFT`) or the
face-charge FMM (:class:`volmag.fmm.FaceChargeFMM`); both keep the exact
near block S_near.  Right-hand sides use the same product, so the discrete
problem is the one the operator defines.

Preconditioning, measured (GMRES iterations to a relative residual of 1e-8,
uniform field, operator tolerance 1e-6; benchmarks/bench_tet_fast.py).
"coarse" is a two-level (multiplicative) correction on the potentials of
uniform magnetisation per body, the functions 1, x, y, z (e.g. Saad,
Iterative Methods for Sparse Linear Systems, 2nd ed., 2003, sec. 14.5, from
memory); "jacobi" the diagonal of A (exact: every face charged by node i
is near it); "local(r)" the ILU (scipy spilu, drop 1e-4) of I - S_r C, S_r
the exact near block restricted to face centroids within r mean edges of
the node (r = 1: ~28 entries a row; r = 2.5, all of `near`: ~150):

    cube 1.6 m, 9.7k tets        chi = 1   10    1000   1e5
    none                               8    13     16     16
    jacobi                             7    12     15     18
    jacobi + coarse                    6     9      8      5
    local(1) + coarse                 11    19     19     11
    LU of local(2.5) + coarse         11    20     17     10
    cube, 35k tets: none 16, jacobi + coarse 8 (chi 1000); none 16,
        local(1) + coarse 14 (chi 1e5)
    plate 1 x 1 x 0.08, 2.8k tets, field oblique    10   1000    1e5
    none                                            19     26     27
    jacobi + coarse                                 15     16      9
    sphere (chi 1000) and box (chi 50) side by side
                          4.6k tets   16k tets
    none                        37         36
    local(1) + coarse           16         21
    jacobi                      19          -
    jacobi + coarse              8          9

Without preconditioning the operator behaves like one of the second kind,
I + chi x (a demagnetising operator with spectrum in [0, 1]): iterations are
bounded in chi and flat in the mesh, but slow where susceptibilities differ
between bodies.  The diagonal equalises the bodies' scales and the coarse
correction removes the slow global modes of each body (uniform
magnetisation), the ones whose eigenvalues 1 + chi N spread most at high
chi.  Together they cost one batched product of 4 columns per body at
set-up and halve the iterations or better; the local factorisations cost
more and grow with refinement.  Default: jacobi + coarse.
"""
from __future__ import annotations

import time

import numpy as np
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from . import operators
from .pfft import PrecorrectedFFT
from .progress import QUIET, Progress
from .solve import LinearSystem, SolverOptions

#: Relative accuracy of the fast S product unless a caller asks otherwise.
DEFAULT_OPERATOR_TOL = 1e-6


class TetFastSystem(LinearSystem):
    """A phi = phi - S C phi (dimensionless) on a tetrahedral model, S by a
    fast product.

    operator: "fft" (:class:`volmag.pfft.PrecorrectedFFT`) or "fmm"
    (:class:`volmag.fmm.FaceChargeFMM`, same interface); operator_tol:
    relative accuracy of the S product (default DEFAULT_OPERATOR_TOL);
    preconditioner: "jacobi" (diagonal of A) | "ilu" | "lu" (of the local
    block) | "none", see the module docstring; coarse: add the per-body
    coarse correction (None: whenever a local part is used);
    precond_radius: the local block's reach in mean edges (ilu, lu); S: an
    already built product on the same mesh to reuse (it does not depend on
    chi)."""

    def __init__(self, model, options: SolverOptions = SolverOptions(), progress: Progress = QUIET,
                 operator: str = "fft", operator_tol: float | None = None,
                 preconditioner: str = "jacobi", coarse: bool | None = None, S=None,
                 precond_radius: float | None = 1.0):
        if model.mesh.cell_type != "tet":
            raise ValueError("TetFastSystem needs a tetrahedral mesh")
        if operator not in ("fft", "fmm"):
            raise ValueError(f"operator must be 'fft' or 'fmm', not {operator!r}")
        self.model, self.options, self.progress = model, options, progress
        self.method = operator
        mesh = model.mesh
        t0 = time.perf_counter()
        self.topo = operators.tet_topology(mesh.nodes, mesh.cells)
        self.chi = model.element_chi()
        self.C = operators.charge_operator(self.topo, mesh.cells, self.chi, len(mesh.nodes))
        n, nf = len(mesh.nodes), len(self.topo.faces)
        progress(f"fast nodal operator: {n} unknowns, {nf} faces")
        self.operator_tol = DEFAULT_OPERATOR_TOL if operator_tol is None else float(operator_tol)
        if S is not None:
            self.S = S
        elif operator == "fft":
            self.S = PrecorrectedFFT(mesh.nodes, self.topo.faces, tol=self.operator_tol, progress=progress)
        else:
            from .fmm import FaceChargeFMM
            self.S = FaceChargeFMM(mesh.nodes, self.topo.faces, tol=self.operator_tol)
            progress(f"FMM: {self.S.near.nnz} near pairs, {self.S.nbytes() / 2**20:.0f} MiB")
        self.assembly_seconds = time.perf_counter() - t0
        t0 = time.perf_counter()
        self.n_products = 0
        if coarse is None:
            coarse = preconditioner != "none"
        self.preconditioner = preconditioner
        self.precond_radius = precond_radius
        self._setup_precond(preconditioner, coarse)
        self.factor_seconds = time.perf_counter() - t0
        progress(f"preconditioner ({preconditioner}{' + coarse' if coarse else ''}) in "
                 f"{self.factor_seconds:.1f} s; operator memory {self.nbytes() / 2**20:.0f} MiB")

    # ------------------------------------------------------------ operator --
    def matvec(self, x: np.ndarray) -> np.ndarray:
        self.n_products += 1
        return x - self.S(self.C @ x)

    def potentials(self, sigmas: np.ndarray) -> np.ndarray:
        """Potentials (n, k), A, at the nodes of face charges sigmas (nf, k),
        A/m, by the same fast product as the operator."""
        return self.S(np.asarray(sigmas, dtype=float).reshape(len(self.topo.faces), -1))

    # ------------------------------------------------------ preconditioner --
    def near_operator(self, radius: float | None = None) -> sp.csc_matrix:
        """A_near = I - S_near C (n x n, sparse, dimensionless); with `radius`
        (in mean edge lengths) only the pairs whose face centroid lies that
        close to the node are kept (a sparser factor)."""
        nodes = self.model.mesh.nodes
        n = len(nodes)
        S = self.S.near
        if radius is not None:
            tri = nodes[self.topo.faces]
            edge = np.linalg.norm(tri - np.roll(tri, 1, axis=1), axis=2).mean()
            centroids = tri.mean(axis=1)
            keep = np.empty(S.nnz, bool)
            for start in range(0, n, 4096):     # by blocks of rows: bounded temporaries
                stop = min(n, start + 4096)
                k0, k1 = S.indptr[start], S.indptr[stop]
                rows = np.repeat(np.arange(start, stop), np.diff(S.indptr[start:stop + 1]))
                d = nodes[rows] - centroids[S.indices[k0:k1]]
                keep[k0:k1] = np.einsum("ij,ij->i", d, d) <= (radius * edge) ** 2
            counts = np.add.reduceat(keep, S.indptr[:-1]) if S.nnz else np.zeros(n, int)
            counts[np.diff(S.indptr) == 0] = 0        # reduceat on empty rows
            S = sp.csr_matrix((S.data[keep], S.indices[keep], np.concatenate([[0], np.cumsum(counts)])),
                              shape=S.shape)
        return (sp.identity(n, format="csr") - S @ self.C).tocsc()

    def _setup_precond(self, kind: str, coarse: bool) -> None:
        self._local = None
        if kind in ("ilu", "lu"):
            A = self.near_operator(self.precond_radius)
            self.near_nnz = A.nnz
            if kind == "lu":
                self._local = spla.splu(A, permc_spec="COLAMD")
            else:
                self._local = spla.spilu(A, drop_tol=1e-4, fill_factor=10, permc_spec="COLAMD")
        elif kind == "jacobi":
            self._local = _Diagonal(1.0 / operator_diagonal(self.S, self.C))
        elif kind != "none":
            raise ValueError(f"preconditioner must be 'ilu', 'lu', 'jacobi' or 'none', not {kind!r}")
        self._coarse = None
        if coarse:
            self._coarse = coarse_correction(self.S, self.C, self._coarse_basis())

    def _coarse_basis(self) -> np.ndarray:
        return body_coarse_basis(self.model.mesh, len(self.model.bodies))

    def precond(self, r: np.ndarray) -> np.ndarray:
        """Approximate A^-1 r: coarse solve, then the local factor on the
        remaining residual (the A Z products are stored, so no extra
        operator product is spent)."""
        return two_level(r, self._coarse, self._local)

    # --------------------------------------------------------------- report --
    def nbytes(self) -> int:
        """Memory held by the operator and the preconditioner, bytes."""
        total = self.S.nbytes() + self.C.data.nbytes + self.C.indices.nbytes
        if self._local is not None:
            total += 12 * (self._local.L.nnz + self._local.U.nnz)
        return int(total)

    def stats(self) -> dict:
        return {"assembly_seconds": self.assembly_seconds, "factor_seconds": self.factor_seconds,
                "operator": "pfft" if self.method == "fft" else "fmm",
                "operator_tol": self.operator_tol, "near_pairs": int(self.S.near.nnz),
                "preconditioner": self.preconditioner, "operator_bytes": self.nbytes(),
                "products": self.n_products,
                **({"grid": list(self.S.shape)} if self.method == "fft" else {})}


class _Diagonal:
    """x = d * r, with the interface of a scipy factor (solve, L, U)."""

    def __init__(self, d):
        self.d = d
        self.L = self.U = sp.diags(d)

    def solve(self, r):
        return self.d * r if r.ndim == 1 else self.d[:, None] * r


# ---------------------------------------------- preconditioner pieces --
def operator_diagonal(S, C) -> np.ndarray:
    """diag(I - S C) (n,), dimensionless, for a fast product S (with its
    exact near block S.near) and a face-charge operator C (nf x n): every
    face with C[f, i] != 0 touches node i, so it is near and exact."""
    return 1.0 - np.asarray(S.near.multiply(C.T.tocsr()).sum(axis=1)).ravel()


def body_coarse_basis(mesh, n_bodies: int) -> np.ndarray:
    """Columns 1, x, y, z restricted to the nodes of each body, scaled to
    unit norm (n, 4 * bodies), dimensionless."""
    n = len(mesh.nodes)
    cols = []
    for b in range(n_bodies):
        used = np.zeros(n, bool)
        used[mesh.cells[mesh.body_id == b].ravel()] = True
        if not used.any():
            continue
        x = mesh.nodes - mesh.nodes[used].mean(axis=0)
        for col in (np.ones(n), x[:, 0], x[:, 1], x[:, 2]):
            c = np.where(used, col, 0.0)
            norm = np.linalg.norm(c)
            if norm > 0:
                cols.append(c / norm)
    return np.column_stack(cols)


def coarse_correction(S, C, Z: np.ndarray) -> tuple:
    """(Z, A Z, (Z^T A Z)^+) of A = I - S C on the coarse basis Z (n, k):
    the stored pieces of the two-level correction (:func:`two_level`)."""
    # batched products, a few columns at a time (grid memory)
    AZ = np.column_stack([Z[:, k:k + 8] - S(C @ Z[:, k:k + 8]) for k in range(0, Z.shape[1], 8)])
    return Z, AZ, np.linalg.pinv(Z.T @ AZ)


def two_level(r: np.ndarray, coarse, local) -> np.ndarray:
    """Approximate A^-1 r: the coarse solve (pieces of
    :func:`coarse_correction`, or None), then the local factor (an object
    with .solve, or None) on the remaining residual."""
    if coarse is None:
        return r if local is None else local.solve(r)
    Z, AZ, E = coarse
    y = E @ (Z.T @ r)
    rest = r - AZ @ y
    return Z @ y + (rest if local is None else local.solve(rest))


def jacobi_coarse_preconditioner(S, C, mesh, n_bodies: int):
    """r -> approximate (I - S C)^-1 r, Jacobi + per-body coarse (1, x, y, z)
    correction (the default of TetFastSystem) for any face-charge operator C
    (e.g. built on a differential susceptibility); costs one batched product
    of 4 columns per body."""
    local = _Diagonal(1.0 / operator_diagonal(S, C))
    coarse = coarse_correction(S, C, body_coarse_basis(mesh, n_bodies))
    return lambda r: two_level(r, coarse, local)
