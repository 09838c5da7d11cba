"""Krylov solver: restarted GMRES with right preconditioning.

Right preconditioning makes the Arnoldi residual the true residual of the
original system, so the recorded history is |b - A x| / |b| at every step
(Saad & Schultz, SIAM J. Sci. Stat. Comput. 1986; Saad, Iterative Methods for
Sparse Linear Systems, 2nd ed., 2003, alg. 9.5).
"""
from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class KrylovResult:
    x: np.ndarray
    converged: bool
    iterations: int
    residual: float                       # final relative residual |b - Ax|/|b|
    history: list[float] = field(default_factory=list)


def gmres(matvec, b: np.ndarray, precond=None, x0=None, tol=1e-10, maxiter=500,
          restart=60, callback=None) -> KrylovResult:
    """Solve A x = b. `matvec(x)` -> A x, `precond(r)` -> approx A^-1 r (None:
    no preconditioner, and no second basis is stored).
    `callback(iteration, relative_residual)` is called after every step."""
    b = np.asarray(b, float)
    bnorm = np.linalg.norm(b)
    x = np.zeros_like(b) if x0 is None else np.array(x0, float)
    if bnorm == 0.0:
        return KrylovResult(np.zeros_like(b), True, 0, 0.0, [0.0])
    r = b - matvec(x)
    history = [np.linalg.norm(r) / bnorm]
    it = 0
    while history[-1] > tol and it < maxiter:
        beta = np.linalg.norm(r)
        m = min(restart, maxiter - it)
        # np.zeros maps untouched pages lazily: memory follows the iterations done
        V = np.zeros((m + 1, len(b)))
        Z = V if precond is None else np.zeros((m, len(b)))
        V[0] = r / beta
        Hs = np.zeros((m + 1, m))
        g = np.zeros(m + 1)
        g[0] = beta
        cs, sn = np.zeros(m), np.zeros(m)
        k = 0
        for k in range(m):
            if precond is not None:
                Z[k] = precond(V[k])
            w = matvec(Z[k])
            # classical Gram-Schmidt in matrix-vector (BLAS) operations, repeated
            # only when the first pass cancelled most of w (the criterion of
            # Daniel, Gragg, Kaufman & Stewart, Math. Comp. 1976): as stable as
            # modified Gram-Schmidt at about half the memory traffic of two passes
            Vk = V[:k + 1]
            before = np.linalg.norm(w)
            h = Vk @ w
            w = w - h @ Vk
            Hs[:k + 1, k] = h
            if np.linalg.norm(w) < 0.7 * before:
                h2 = Vk @ w
                w -= h2 @ Vk
                Hs[:k + 1, k] += h2
            Hs[k + 1, k] = np.linalg.norm(w)
            if Hs[k + 1, k] > 0:
                V[k + 1] = w / Hs[k + 1, k]
            for j in range(k):                           # apply earlier rotations
                Hs[j, k], Hs[j + 1, k] = (cs[j] * Hs[j, k] + sn[j] * Hs[j + 1, k],
                                          -sn[j] * Hs[j, k] + cs[j] * Hs[j + 1, k])
            d = np.hypot(Hs[k, k], Hs[k + 1, k])
            cs[k], sn[k] = (1.0, 0.0) if d == 0 else (Hs[k, k] / d, Hs[k + 1, k] / d)
            Hs[k, k], Hs[k + 1, k] = d, 0.0
            g[k + 1] = -sn[k] * g[k]
            g[k] = cs[k] * g[k]
            it += 1
            history.append(abs(g[k + 1]) / bnorm)
            if callback:
                callback(it, history[-1])
            if history[-1] <= tol or Hs[k, k] == 0:
                break
        y = np.linalg.solve(np.triu(Hs[:k + 1, :k + 1]), g[:k + 1])
        x = x + y @ Z[:k + 1]
        r = b - matvec(x)
        history[-1] = np.linalg.norm(r) / bnorm       # true residual at restart
        if len(history) > 3 and history[-1] >= history[-2 - k] * 0.999:
            break                                      # stagnation over a full cycle
    return KrylovResult(x, history[-1] <= tol, it, history[-1], history)


def cg(matvec, b: np.ndarray, precond=None, x0=None, tol=1e-10, maxiter=500, callback=None) -> KrylovResult:
    """Preconditioned conjugate gradients for a symmetric positive definite A
    and preconditioner (Hestenes & Stiefel, J. Res. NBS 1952; Saad 2003,
    alg. 9.1).  Convergence is measured in the preconditioned residual,
    |P (b - A x)| / |P b|: with P = chi and A = chi^-1 - K that is the residual
    of the unscaled system I - chi K.  Short recurrences: no basis to store
    or orthogonalise against, which is what makes long solves cheap.  The
    recurrence residual is checked against the true one at the end and the
    iteration restarted from there if they differ."""
    P = (lambda r: r) if precond is None else precond
    b = np.asarray(b, float)
    x = np.zeros_like(b) if x0 is None else np.array(x0, float)
    bnorm = np.linalg.norm(P(b))
    if bnorm == 0.0:
        return KrylovResult(np.zeros_like(b), True, 0, 0.0, [0.0])
    r = b - matvec(x)
    z = P(r)
    history = [np.linalg.norm(z) / bnorm]
    it = 0
    while history[-1] > tol and it < maxiter:
        p, rz = z.copy(), r @ z
        while it < maxiter:
            Ap = matvec(p)
            alpha = rz / (p @ Ap)
            x += alpha * p
            r -= alpha * Ap
            z = P(r)
            it += 1
            history.append(np.linalg.norm(z) / bnorm)
            if callback:
                callback(it, history[-1])
            if history[-1] <= tol:
                break
            rz, rz_old = r @ z, rz
            p = z + (rz / rz_old) * p
        r = b - matvec(x)                       # true residual
        z = P(r)
        history[-1] = np.linalg.norm(z) / bnorm
    return KrylovResult(x, history[-1] <= tol, it, history[-1], history)
