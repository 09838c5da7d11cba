"""Multilevel preconditioner for I - X K on a regular grid of hexahedral cells.

At high susceptibility the spectrum of A = I - X K spreads over [1, 1 + chi]
(-K has its eigenvalues in [0, 1]) and unpreconditioned GMRES needs ~100
iterations at chi = 1000 even on small voxel spheres.  The self block of a
cube is I/3, so block-diagonal scaling changes nothing.  The slow modes are of
two kinds, and each has its remedy:

* Nearly charge-free modes: M_c constant along a grid line in direction c,
  varying across lines, charged only at the two ends of each line.  Their
  field is local, so a *line smoother* captures them: for every component c
  and every run of consecutive material cells along axis c, the block of A
  coupling M_c on that run (a Toeplitz matrix on uniform runs) is inverted
  exactly.  Runs with the same parameters share one inverse.
* Smooth, body-scale modes (the uniform magnetisation with its demagnetising
  field, vortices): a *coarse-grid correction* with piecewise-constant M on
  aggregates of 2 x 2 x 2 cells.  The coarse operator approximates the
  Galerkin product P^T A P: between aggregates it is the Newell tensor of the
  doubled cell weighted by the aggregates' filling (exact for full ones, since
  the Newell tensor of a cell is the average of those of its sub-cells), and
  each aggregate's self block is summed exactly from its children.  It is
  again a masked convolution plus 3x3 blocks, applied by FFT, and it is
  coarsened again until a few hundred cells remain, which are solved densely.

Each level applies, to a residual r, z = P (coarse cycle of P^T r), then
z += S (r - A z) with S the line smoother (a V-cycle with one post-smoothing
step).  This is the two-level scheme of additive-Schwarz/multigrid theory
(e.g. Toselli & Widlund, Domain Decomposition Methods, Springer 2005, ch. 2;
Trottenberg, Oosterlee & Schueller, Multigrid, Academic Press 2001) with a
line relaxation in the role of the smoother; the choice of lines follows from
the charge-free modes above (our analysis).  It is not symmetric, so it is
used with right-preconditioned (flexible) GMRES.

Measured limits (voxel spheres, chi = 1000, GMRES to 1e-6): the line
relaxation alone is not a convergent smoother (largest eigenvalue of S A ~36
at 7k cells), so the cycle works as a preconditioner only while the coarse
corrections catch those modes: 18-34 iterations from 7k to 113k cells
(against 150-200 unpreconditioned), but at 382k cells it stagnates near 1e-1
(with two or four cells per aggregate, with more or fewer inner steps), and
pre-smoothing, damping, additive combination, a plain Richardson smoother or
runs cut to 8-16 cells all make it worse.  (Nor do cheaper global remedies
help unpreconditioned GMRES at chi = 1000: a two-level correction on M =
constant, linear or quadratic per body took 151-164 iterations against 116
plain on 33k cells, and starting from the Galerkin coarse solution 117
against 125 on 113k.)  :func:`preconditioner_for` therefore offers it up to
``MAX_CELLS`` only.  A smoother that is convergent for the
charged modes is the missing piece.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg as sla
import scipy.sparse as sp
from numba import njit, prange

from . import newell, operators
from .fft import GridOperator


#: Above this susceptibility the hex FFT solves use the cycle; below, plain
#: Krylov iterations are faster (measured on voxel spheres: chi = 10 needs 27
#: plain iterations, 16 preconditioned ones at ~5x the cost).
MIN_CHI = 30.0
#: ... and up to this many cells, where it is measured to work (see above);
#: beyond, the solves go without it.
MAX_CELLS = 120_000

#: Below this many cells a level is solved with a dense LU factor.
COARSE_CELLS = 2000


@dataclass(eq=False)
class _Level:
    """One grid level: A v = n v - chi (w K(w v) + C v), per cell 3-vectors.

    index (m, 3) grid indices, cell (3,) m, n (m,) Galerkin mass, w (m,)
    filling weights, chi (m, 3, 3), C (3m, 3m) sparse near-field correction
    (None on the fine level, where n = w = 1), full (m,) cells whose every
    fine cell is material."""
    index: np.ndarray
    cell: np.ndarray
    n: np.ndarray
    w: np.ndarray
    chi: np.ndarray
    C: sp.csr_matrix | None
    full: np.ndarray
    op: GridOperator | None = None
    parent: np.ndarray | None = None      # coarse cell of each cell of this level
    smoother: "_LineSmoother | None" = None
    lu: tuple | None = None

    def apply(self, v: np.ndarray) -> np.ndarray:
        """A v for v (m, 3)."""
        if self.C is None:
            return v - np.einsum("eij,ej->ei", self.chi, self.op(v))
        G = self.w[:, None] * self.op(self.w[:, None] * v) + (self.C @ v.ravel()).reshape(-1, 3)
        return self.n[:, None] * v - np.einsum("eij,ej->ei", self.chi, G)


def preconditioner_for(grid_index, cell, chi, precision: str = "double", fine_op: GridOperator | None = None):
    """The cycle for cells `grid_index` (m, 3) of edge lengths `cell` (3,) m
    with susceptibilities `chi` (m, 3, 3), or None where it does not pay or
    is not known to work (chi <= MIN_CHI, more than MAX_CELLS cells)."""
    if np.abs(chi).max() <= MIN_CHI or len(grid_index) > MAX_CELLS:
        return None
    return MultilevelPreconditioner(grid_index, cell, chi, precision, fine_op=fine_op)


class MultilevelPreconditioner:
    """Approximate inverse of I - X K on the grid cells `grid_index` (m, 3) of
    edge lengths `cell` (3,) m with susceptibilities `chi` (m, 3, 3).  Call it
    on a residual (3m,) to get the correction (3m,).  `inner`, `inner_deep`,
    `inner_tol`: flexible GMRES steps on the first coarse level, on the deeper
    ones, and their relative tolerance (measured on voxel spheres of 33k and
    113k cells at chi = 1000: 4 and 6 steps cost ~4.5 fine products per
    application and cut the iterations from 180-200 to 29-34; 2 steps on the
    deeper levels lose convergence altogether)."""

    def __init__(self, grid_index, cell, chi, precision: str = "double", fine_op: GridOperator | None = None,
                 coarse_cells: int = COARSE_CELLS, inner: int = 4, inner_deep: int = 6, inner_tol: float = 0.02):
        self.inner, self.inner_deep, self.inner_tol = inner, inner_deep, inner_tol
        index = np.asarray(grid_index, np.int64)
        index = index - index.min(axis=0)
        m = len(index)
        level = _Level(index, np.asarray(cell, float), np.ones(m), np.ones(m), np.asarray(chi, float),
                       None, np.ones(m, bool))
        self.levels = [level]
        while len(level.index) > coarse_cells and np.any(level.index.max(axis=0) > 0):
            level = _coarsen(level)
            self.levels.append(level)
        for k, lv in enumerate(self.levels):
            if k == len(self.levels) - 1:
                lv.lu = _dense_factor(lv)
            else:
                lv.op = fine_op if (k == 0 and fine_op is not None) else GridOperator(lv.index, lv.cell, precision)
                lv.smoother = _LineSmoother(lv)

    def __call__(self, r: np.ndarray) -> np.ndarray:
        return self._cycle(0, np.asarray(r, float).reshape(-1, 3)).ravel()

    def _cycle(self, k: int, r: np.ndarray) -> np.ndarray:
        lv = self.levels[k]
        if lv.lu is not None:
            return sla.lu_solve(lv.lu, r.ravel().astype(np.float32), check_finite=False).reshape(-1, 3).astype(float)
        coarse = self.levels[k + 1]
        rc = np.stack([np.bincount(lv.parent, r[:, c], len(coarse.index)) for c in range(3)], axis=1)
        z = self._coarse_solve(k + 1, rc)[lv.parent]
        return z + lv.smoother(r - lv.apply(z))

    def _coarse_solve(self, k: int, r: np.ndarray) -> np.ndarray:
        """Approximate solve on level k: a few flexible GMRES steps
        preconditioned by the level's own cycle (a K-cycle; Notay &
        Vassilevski, Numer. Linear Algebra Appl. 15, 2008, from memory)."""
        lv = self.levels[k]
        if lv.lu is not None or self.inner == 0:
            return self._cycle(k, r)
        steps = self.inner if k == 1 else self.inner_deep
        x = _fgmres(lambda v: lv.apply(v.reshape(-1, 3)).ravel(), r.ravel(),
                    lambda v: self._cycle(k, v.reshape(-1, 3)).ravel(), steps, self.inner_tol)
        return x.reshape(-1, 3)

    def describe(self) -> str:
        """One line: the cells of every level."""
        return " -> ".join(str(len(lv.index)) for lv in self.levels)

    def nbytes(self) -> int:
        """Memory held (operators of the coarse levels, smoothers, factor), bytes."""
        total = 0
        for k, lv in enumerate(self.levels):
            total += lv.chi.nbytes + lv.index.nbytes + 3 * lv.n.nbytes
            if lv.C is not None:
                total += lv.C.data.nbytes + lv.C.indices.nbytes + lv.C.indptr.nbytes
            if lv.op is not None and k > 0:
                total += lv.op.nbytes()
            if lv.smoother is not None:
                total += lv.smoother.nbytes()
            if lv.lu is not None:
                total += lv.lu[0].nbytes
        return total


def _fgmres(matvec, b, precond, steps: int, tol: float) -> np.ndarray:
    """At most `steps` steps of flexible GMRES from x = 0 (Saad, SIAM J. Sci.
    Comput. 14, 1993), stopping at relative residual `tol`.  Unlike
    :func:`volmag.krylov.gmres` it neither applies the operator to the zero
    start nor recomputes the true residual: two products fewer per call,
    which is what the coarse solves of every cycle need."""
    beta = np.linalg.norm(b)
    if beta == 0.0:
        return np.zeros_like(b)
    V, Z = [b / beta], []
    H = np.zeros((steps + 1, steps))
    e1 = np.zeros(steps + 1)
    e1[0] = beta
    for k in range(steps):
        Z.append(precond(V[k]))
        w = matvec(Z[k])
        for j in range(k + 1):                    # modified Gram-Schmidt
            H[j, k] = V[j] @ w
            w -= H[j, k] * V[j]
        H[k + 1, k] = np.linalg.norm(w)
        y, *_ = np.linalg.lstsq(H[:k + 2, :k + 1], e1[:k + 2], rcond=None)
        if H[k + 1, k] <= 1e-14 * beta or np.linalg.norm(e1[:k + 2] - H[:k + 2, :k + 1] @ y) <= tol * beta:
            break
        V.append(w / H[k + 1, k])
    return np.stack(Z, axis=1) @ y


#: Aggregates closer than this (in coarse cells, per axis) get exact corrections.
NEAR = 2
_NEIGHBOURS = np.stack(np.meshgrid(*[np.arange(-NEAR, NEAR + 1)] * 3, indexing="ij"), -1).reshape(-1, 3)


def _coarsen(lv: _Level, factor: int = 2) -> _Level:
    """Aggregate `factor` cells per axis (1 along axes one cell thick).

    Between aggregates I and J the Galerkin block sum_{i in I, j in J} G(i, j)
    is w_I w_J T_2h(C_I - C_J) + C(I, J), with w the sum of the children's
    weights over sqrt(8): exact for full aggregates.  C holds the exact
    remainder for neighbouring aggregates (|C_I - C_J| <= one coarse cell per
    axis) where either is not full, plus the projection of the children's own
    corrections; farther remainders (a multipole error of partial aggregates)
    are dropped."""
    f = np.where(lv.index.max(axis=0) > 0, factor, 1)
    cindex, parent = np.unique(lv.index // f, axis=0, return_inverse=True)
    parent = parent.ravel()
    lv.parent = parent
    mc = len(cindex)
    n = np.bincount(parent, lv.n, mc)
    chi = np.zeros((mc, 3, 3))
    np.add.at(chi, parent, lv.n[:, None, None] * lv.chi)
    chi /= n[:, None, None]
    w = np.bincount(parent, lv.w, mc) / math.sqrt(np.prod(f))
    slots = int(np.prod(f))
    full = np.bincount(parent, lv.full, mc) == slots
    pos = np.stack(np.meshgrid(*[np.arange(k) for k in f], indexing="ij"), -1).reshape(-1, 3)
    wloc = np.zeros((mc, slots))
    wloc[parent, np.ravel_multi_index((lv.index - cindex[parent] * f).T, f)] = lv.w
    cell = lv.cell * f
    # fine-level tensors for every child offset f*D + p - q, D one of the 27 neighbour steps
    reach = factor * NEAR + factor - 1
    span = np.arange(-reach, reach + 1)
    table = newell.cell_tensors(np.stack(np.meshgrid(span, span, span, indexing="ij"), -1).reshape(-1, 3)
                                * lv.cell, lv.cell).reshape(len(span), len(span), len(span), 3, 3)
    coarse_T = newell.cell_tensors(_NEIGHBOURS * cell, cell)
    ids = -np.ones(cindex.max(axis=0) + 1, np.int64)
    ids[tuple(cindex.T)] = np.arange(mc)
    rows, cols, blocks = [], [], []
    for D, TD in zip(_NEIGHBOURS, coarse_T):
        other = cindex + D
        ok = np.all((other >= 0) & (other < ids.shape), axis=1)
        I = np.flatnonzero(ok)
        J = ids[tuple(other[I].T)]
        keep = (J >= 0) & ~(full[I] & full[np.maximum(J, 0)])
        I, J = I[keep], J[keep]
        if len(I) == 0:
            continue
        d = pos[:, None, :] - pos[None, :, :] - f * D + reach    # c_i - c_j, J = I + D
        Tpq = table[d[..., 0], d[..., 1], d[..., 2]]
        B = np.einsum("ip,pqab,iq->iab", wloc[I], Tpq, wloc[J]) - (w[I] * w[J])[:, None, None] * TD
        rows.append(I)
        cols.append(J)
        blocks.append(B)
    if rows:
        C = _block_sparse(np.concatenate(rows), np.concatenate(cols), np.concatenate(blocks), mc)
    else:                          # every aggregate full: the coarse tensor is exact
        C = sp.csr_matrix((3 * mc, 3 * mc))
    if lv.C is not None:
        P = sp.csr_matrix((np.ones(3 * len(parent)), (np.arange(3 * len(parent)),
                           (3 * parent[:, None] + np.arange(3)).ravel())), shape=(3 * len(parent), 3 * mc))
        C = (C + P.T @ lv.C @ P).tocsr()
    return _Level(cindex, cell, n, w, chi, C, full)


def _block_sparse(I, J, blocks, m) -> sp.csr_matrix:
    """(3m, 3m) sparse matrix with 3x3 blocks at (I, J)."""
    r = (3 * I[:, None, None] + np.arange(3)[None, :, None]) + 0 * np.arange(3)[None, None, :]
    c = (3 * J[:, None, None] + np.arange(3)[None, None, :]) + 0 * np.arange(3)[None, :, None]
    return sp.csr_matrix((blocks.ravel(), (r.ravel(), c.ravel())), shape=(3 * m, 3 * m))


def _dense_factor(lv: _Level):
    """LU factor of the level's operator, assembled densely; single precision
    is ample for a preconditioner and halves time and memory."""
    m = len(lv.index)
    G = operators.grid_tensor_blocks(lv.index, lv.cell)
    w3 = np.repeat(lv.w, 3)
    G *= w3[:, None] * w3[None, :]
    if lv.C is not None:
        G += lv.C.toarray()
    A = -np.einsum("eij,ejf->eif", lv.chi, G.reshape(m, 3, 3 * m)).reshape(3 * m, 3 * m)
    A[np.diag_indices(3 * m)] += np.repeat(lv.n, 3)
    return sla.lu_factor(A.astype(np.float32), check_finite=False)


class _LineSmoother:
    """Exact solves of the blocks of A coupling M_c along runs of consecutive
    cells in direction c, for c = x, y, z.  Whole runs: cutting them would
    put a false charge at every cut (measured: 2x the iterations)."""

    def __init__(self, lv: _Level):
        runs, comps = [], []
        for c in range(3):
            for run in _runs(lv.index, c):
                runs.append(run)
                comps.append(c)
        lengths = np.array([len(r) for r in runs])
        comps = np.array(comps)
        self.ptr = np.concatenate([[0], np.cumsum(lengths)])
        self.unknowns = np.concatenate([3 * r + c for r, c in zip(runs, comps)])
        self.inv_id = np.empty(len(runs), np.int64)
        blocks = []
        for c in range(3):
            Tline = newell.cell_tensors(np.outer(np.arange(lengths.max()), np.eye(3)[c] * lv.cell[c]),
                                        lv.cell)[:, c, c]
            for L in np.unique(lengths[comps == c]):
                sel = np.flatnonzero((lengths == L) & (comps == c))
                cells = np.stack([runs[s] for s in sel])
                params = _run_parameters(lv, cells, c)
                uniq, which = np.unique(params.reshape(len(sel), -1), axis=0, return_inverse=True)
                u = uniq.reshape(len(uniq), 5, L)
                i = np.arange(L)
                B = -u[:, 1, :, None] * Tline[np.abs(i[:, None] - i[None, :])][None] * u[:, 2, None, :]
                B[:, i, i] += u[:, 0]
                B[:, i[1:], i[:-1]] += u[:, 3, 1:]
                B[:, i[:-1], i[1:]] += u[:, 4, :-1]
                self.inv_id[sel] = len(blocks) + which.ravel()
                blocks.extend(np.linalg.inv(B))
        sizes = np.array([b.shape[0] ** 2 for b in blocks])
        self.inv_ptr = np.concatenate([[0], np.cumsum(sizes)])
        self.inv = np.concatenate([b.ravel() for b in blocks])

    def __call__(self, r: np.ndarray) -> np.ndarray:
        out = np.empty(r.size)
        _apply_runs(r.ravel(), out, self.unknowns, self.ptr, self.inv_id, self.inv, self.inv_ptr)
        return out.reshape(-1, 3)

    def nbytes(self) -> int:
        return self.inv.nbytes + self.unknowns.nbytes + self.inv_id.nbytes + self.ptr.nbytes


def _run_parameters(lv: _Level, cells: np.ndarray, c: int) -> np.ndarray:
    """(k, 5, L) per run of L cells along axis c: diagonal, row factor chi_cc w,
    column factor w, sub- and super-diagonal corrections of the M_c block
    B = diag - row T col^T + corrections (T the Newell line tensor T_cc)."""
    k, L = cells.shape
    out = np.zeros((k, 5, L))
    out[:, 0] = lv.n[cells]
    out[:, 1] = lv.chi[cells, c, c] * lv.w[cells]
    out[:, 2] = lv.w[cells]
    if lv.C is None:
        return out
    for slot, shift in ((0, 0), (3, -1), (4, 1)):
        src = cells if shift == 0 else np.roll(cells, -shift, axis=1)
        valid = np.ones((k, L), bool)
        if shift == -1:
            valid[:, 0] = False
        elif shift == 1:
            valid[:, -1] = False
        a, b = cells[valid], src[valid]
        if len(a):
            out[:, slot][valid] -= sum(lv.chi[a, c, d] * np.asarray(lv.C[3 * a + d, 3 * b + c], float).ravel()
                                       for d in range(3))
    return out


def _runs(index: np.ndarray, axis: int) -> list[np.ndarray]:
    """Cell numbers of the runs of consecutive cells along `axis`."""
    a, b = [k for k in range(3) if k != axis]
    order = np.lexsort((index[:, axis], index[:, b], index[:, a]))
    s = index[order]
    new = np.ones(len(s), bool)
    new[1:] = (s[1:, a] != s[:-1, a]) | (s[1:, b] != s[:-1, b]) | (s[1:, axis] != s[:-1, axis] + 1)
    return np.split(order, np.flatnonzero(new)[1:])


@njit(parallel=True, cache=True)
def _apply_runs(r, out, unknowns, ptr, inv_id, inv, inv_ptr):
    """out[run] = inverse(run) @ r[run] for every run (gathered once per run)."""
    for k in prange(len(ptr) - 1):
        a, L = ptr[k], ptr[k + 1] - ptr[k]
        base = inv_ptr[inv_id[k]]
        buf = np.empty(L)
        for j in range(L):
            buf[j] = r[unknowns[a + j]]
        for i in range(L):
            row = base + i * L
            s = 0.0
            for j in range(L):
                s += inv[row + j] * buf[j]
            out[unknowns[a + i]] = s
