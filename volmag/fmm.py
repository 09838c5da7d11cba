"""Fast potentials and fields of charged planar faces: fast multipole method
(Greengard & Rokhlin, J. Comput. Phys. 73, 325, 1987; the FMM3D library through
fmm3dpy) for the far part, exact triangle integrals for the near part.

A face f with uniform charge sigma_f (A/m) has potential sigma_f I_f / 4pi and
field sigma_f g_f / 4pi (see :mod:`volmag.kernels`).  Far from the face both
are replaced by point charges w_q A_f sigma_f at the points of a triangle
quadrature rule, summed by the FMM.  For the pairs (target, face) closer than
`radius` face diameters (longest edge) to the face's centroid, the quadrature
contributions are subtracted again and the exact closed forms added, so
targets on the faces, at their vertices and inside the elements get exact
near values ("precorrection", as in precorrected-FFT methods).

Error sources, both controlled by `tol` (relative to the norm of the result):
the FMM itself (fmm3dpy eps), and the quadrature of faces just beyond the
near radius, which falls as (radius)^-(degree + 1) for a rule of the given
degree (measured: x9.5, x40, x67 from radius 2 to 4 for degrees 2, 4, 5).
The rule and radius per tol come from measurements on tetrahedral meshes
(see :data:`SETTINGS`).

fmm3dpy 2.1 as installed from its wheel links no OpenMP runtime: it runs on
one thread whatever OMP_NUM_THREADS says (measured: CPU time = wall time,
the same with OMP_NUM_THREADS 1 and unset), and it rebuilds its tree at
every call.  The near part runs on all threads (numba).  The FMM's time is not monotone in the number of points or in eps
(its tree depth moves in steps): expect +-2x around :func:`estimate`.
"""
from __future__ import annotations

import math
import time

import numpy as np
import scipy.sparse as sp
from numba import njit, prange
from scipy.spatial import cKDTree

from . import kernels

INV_4PI = 1.0 / (4.0 * math.pi)

# Symmetric triangle rules, barycentric points and weights summing to 1, by
# polynomial degree.  Degree 1: the centroid.  Degree 2: Strang & Fix, An
# Analysis of the Finite Element Method, 1973 (from memory).  Degree 4: the
# 6-point rule of Dunavant (Int. J. Numer. Methods Eng. 21, 1129, 1985, from
# memory).  Degree 5: Radon's 7-point rule (kernels.TRI_RULE_*).  Each rule's
# degree is checked in the tests against the exact monomial integrals.
_D4_A, _D4_WA = 0.445948490915965, 0.223381589678011
_D4_B, _D4_WB = 0.091576213509771, 0.109951743655322


def _orbit(a):
    return [[a, a, 1 - 2 * a], [a, 1 - 2 * a, a], [1 - 2 * a, a, a]]


RULES = {
    1: (np.array([[1 / 3, 1 / 3, 1 / 3]]), np.array([1.0])),
    2: (np.array(_orbit(1 / 6)), np.full(3, 1 / 3)),
    4: (np.array(_orbit(_D4_A) + _orbit(_D4_B)), np.array([_D4_WA] * 3 + [_D4_WB] * 3)),
    5: (kernels.TRI_RULE_POINTS, kernels.TRI_RULE_WEIGHTS),
}

#: (tol, rule degree, near radius in face diameters, fmm3dpy eps): the first
#: row with tol >= its first entry is used.  Measured on a sphere of 5k tets
#: (11k faces) with random charges, relative error in the 2-norm: quadrature
#: alone (fmm eps 1e-13) at (degree, radius) = (2, 2) 2.2e-5, (2, 3) 6.4e-6, (4, 1.5) 9e-7,
#: (4, 2) 2.3e-7, (4, 3) 3.1e-8, (5, 4) 1.2e-9, (5, 6) 6.5e-11; the FMM alone
#: (fmm3dpy 2.1) gives 1.2e-5 for eps = 1e-3, 1.5e-8 for eps = 1e-4 to 1e-6
#: and 6e-11 for eps = 1e-7 to 1e-10 (its expansion order moves in steps);
#: within a step the time is not monotone in eps; the eps used were the faster.
SETTINGS = (
    (1e-3, 2, 2.0, 1e-3),
    (1e-4, 2, 3.0, 1e-3),
    (1e-5, 4, 1.5, 1e-4),
    (1e-6, 4, 2.0, 1e-4),
    (1e-7, 4, 3.0, 1e-7),
    (1e-8, 5, 4.0, 1e-7),
    (0.0, 5, 6.0, 1e-9),
)


def settings(tol: float) -> tuple[int, float, float]:
    """(rule degree, near radius in face diameters, fmm3dpy eps) for a
    relative tolerance tol; below 1e-9 the error stays near 1e-10."""
    for bound, degree, radius, eps in SETTINGS:
        if tol >= bound:
            return degree, radius, eps
    return SETTINGS[-1][1:]


def _geometry(tri: np.ndarray):
    """Centroids (m, 3), diameters (m,) (longest edge) and areas (m,) of
    triangles tri (m, 3, 3), lengths in m."""
    e = np.stack([tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 1], tri[:, 0] - tri[:, 2]], axis=1)
    diam = np.sqrt((e * e).sum(axis=2).max(axis=1))
    area = 0.5 * np.linalg.norm(np.cross(e[:, 0], -e[:, 2]), axis=1)
    return tri.mean(axis=1), diam, area


def quadrature_points(tri: np.ndarray, degree: int) -> tuple[np.ndarray, np.ndarray]:
    """Points (m * q, 3), m, and weights (m * q,), m^2, of the degree-`degree`
    rule on every triangle of tri (m, 3, 3), face-major."""
    bary, w = RULES[degree]
    _, _, area = _geometry(tri)
    pts = np.einsum("qk,fkd->fqd", bary, tri).reshape(-1, 3)
    return pts, (area[:, None] * w[None, :]).ravel()


def near_pairs(targets: np.ndarray, centroids: np.ndarray, reach: np.ndarray):
    """All pairs (target i, face f) with |x_i - c_f| <= reach_f (m), as index
    arrays (rows, cols) sorted by target (rows)."""
    hits = cKDTree(targets).query_ball_point(centroids, reach, return_sorted=False)
    lens = np.fromiter((len(h) for h in hits), np.int64, len(hits))
    cols = np.repeat(np.arange(len(hits)), lens)
    rows = np.fromiter((i for h in hits for i in h), np.int64, int(lens.sum())) if lens.sum() else \
        np.zeros(0, np.int64)
    order = np.argsort(rows, kind="stable")
    return rows[order], cols[order]


@njit(parallel=True, cache=True)
def _pair_potentials(points, tri, rows, cols, qpts, qw, nq):
    """Exact I_f(x_i)/4pi and its quadrature approximation, per pair (m)."""
    n = rows.shape[0]
    exact, quad = np.empty(n), np.empty(n)
    for k in prange(n):
        i, f = rows[k], cols[k]
        p = points[i]
        exact[k] = INV_4PI * kernels.triangle_potential(p, tri[f, 0], tri[f, 1], tri[f, 2])
        acc = 0.0
        for q in range(f * nq, (f + 1) * nq):
            dx, dy, dz = p[0] - qpts[q, 0], p[1] - qpts[q, 1], p[2] - qpts[q, 2]
            r = math.sqrt(dx * dx + dy * dy + dz * dz)
            if r > 0.0:             # FMM drops coincident sources: do the same
                acc += qw[q] / r
        quad[k] = INV_4PI * acc
    return exact, quad


@njit(parallel=True, cache=True)
def _pair_fields(points, tri, sigma, rows, cols, qpts, qw, nq):
    """sigma_f (g_f(x_i) - its quadrature approximation) / 4pi per pair (A/m)."""
    n = rows.shape[0]
    out = np.empty((n, 3))
    for k in prange(n):
        i, f = rows[k], cols[k]
        p = points[i]
        g = kernels.triangle_field(p, tri[f, 0], tri[f, 1], tri[f, 2])
        for q in range(f * nq, (f + 1) * nq):
            dx, dy, dz = p[0] - qpts[q, 0], p[1] - qpts[q, 1], p[2] - qpts[q, 2]
            r2 = dx * dx + dy * dy + dz * dz
            if r2 > 0.0:
                w = qw[q] / (r2 * math.sqrt(r2))
                g[0] -= w * dx
                g[1] -= w * dy
                g[2] -= w * dz
        s = sigma[f] * INV_4PI
        out[k, 0], out[k, 1], out[k, 2] = s * g[0], s * g[1], s * g[2]
    return out


def _fmm(sources, charges, targets, eps, grad=False):
    """Sum of charges (k, s) / (4 pi r) over sources (s, 3) at targets (t, 3):
    potentials (k, t), or gradients (k, 3, t) when grad (fmm3dpy.lfmm3d, whose
    kernel is 1/(4 pi r), checked in the tests)."""
    import fmm3dpy
    k = charges.shape[0]
    src = np.asfortranarray(sources.T)
    trg = np.asfortranarray(targets.T)
    c = np.ascontiguousarray(charges[0] if k == 1 else charges)
    out = fmm3dpy.lfmm3d(eps=eps, sources=src, charges=c, targets=trg, pgt=2 if grad else 1, nd=k)
    if grad:
        return out.gradtarg.reshape(k, 3, -1)
    return out.pottarg.reshape(k, -1)


class FaceChargeFMM:
    """Potentials at the mesh nodes of charges on the mesh's triangles:
    phi(x_i) = (1/4pi) sum_f sigma_f I_f(x_i), the product S sigma of
    operators.potentials_at_nodes, to a relative tolerance `tol` (in the norm
    of the result) in O(n + nf) time per product.

    nodes (n, 3) m, faces (nf, 3) node indices.  Attributes: `near`, the
    exact S restricted to the near pairs (n x nf CSR, m); `degree`, `radius`
    (face diameters) and `eps` (FMM precision) in use; `setup_seconds`."""

    def __init__(self, nodes: np.ndarray, faces: np.ndarray, tol: float = 1e-6, *,
                 degree: int | None = None, radius: float | None = None, eps: float | None = None):
        t0 = time.perf_counter()
        self.nodes = np.ascontiguousarray(nodes, dtype=float)
        self.faces = np.ascontiguousarray(faces, dtype=np.int64)
        self.tol = tol
        d, r, e = settings(tol)
        self.degree = degree or d
        self.radius = radius or r
        self.eps = eps or e
        tri = np.ascontiguousarray(self.nodes[self.faces])
        centroids, diam, _ = _geometry(tri)
        self.qpts, self.qw = quadrature_points(tri, self.degree)
        nq = len(RULES[self.degree][1])
        rows, cols = near_pairs(self.nodes, centroids, self.radius * diam)
        exact, quad = _pair_potentials(self.nodes, tri, rows, cols, self.qpts, self.qw, nq)
        n, nf = len(self.nodes), len(self.faces)
        indptr = np.concatenate([[0], np.cumsum(np.bincount(rows, minlength=n))])
        self.near = sp.csr_matrix((exact, cols, indptr), shape=(n, nf))
        self._correction = sp.csr_matrix((exact - quad, cols, indptr), shape=(n, nf))
        self.setup_seconds = time.perf_counter() - t0

    @property
    def shape(self) -> tuple[int, int]:
        return len(self.nodes), len(self.faces)

    def nbytes(self) -> int:
        """Memory held (bytes): near matrices and quadrature points."""
        mats = sum(m.data.nbytes + m.indices.nbytes + m.indptr.nbytes for m in (self.near, self._correction))
        return int(mats + self.qpts.nbytes + self.qw.nbytes)

    def __call__(self, sigmas: np.ndarray) -> np.ndarray:
        """Potentials (n,) or (n, k), A, at the nodes of face charges sigmas
        (nf,) or (nf, k), A/m."""
        sig = np.asarray(sigmas, dtype=float)
        flat = sig.ndim == 1
        sig2 = sig[:, None] if flat else sig
        nq = len(RULES[self.degree][1])
        charges = (np.repeat(sig2, nq, axis=0) * self.qw[:, None]).T      # (k, nf * nq)
        phi = _fmm(self.qpts, charges, self.nodes, self.eps).T + self._correction @ sig2
        return phi[:, 0] if flat else phi


def field_of_faces(points: np.ndarray, tri: np.ndarray, sigma: np.ndarray, tol: float = 1e-6, *,
                   degree: int | None = None, radius: float | None = None, eps: float | None = None,
                   chunk_pairs: int = 4_000_000) -> np.ndarray:
    """H (p, 3), A/m, at points (p, 3), m, of uniform surface charges sigma
    (m,), A/m, on triangles tri (m, 3, 3), m — the numbers of
    kernels.face_field_at_points to a relative tolerance tol (in the norm of
    the result).  Rectangles (faces of hexahedral cells) enter as their two
    triangles, as post.charged_faces gives them.  Points on faces, at edges
    and inside elements get the exact near field, with the same conventions
    as kernels.triangle_field.  Points within COINCIDENT_RATIO face
    diameters of a quadrature point (a face centroid, for the degree-1 and
    -5 rules) are summed exactly over all faces.  The near part runs over
    chunks of points of about `chunk_pairs` pairs, to bound memory."""
    points = np.ascontiguousarray(points, dtype=float)
    keep = np.asarray(sigma) != 0
    tri = np.ascontiguousarray(np.asarray(tri, dtype=float)[keep])
    sigma = np.ascontiguousarray(np.asarray(sigma, dtype=float)[keep])
    H = np.zeros((len(points), 3))
    if not len(sigma) or not len(points):
        return H
    d, r, e = settings(tol)
    degree, radius, eps = degree or d, radius or r, eps or e
    nq = len(RULES[degree][1])
    qpts, qw = quadrature_points(tri, degree)
    centroids, diam, _ = _geometry(tri)
    # A point within COINCIDENT_RATIO face diameters of a quadrature point
    # would get the near correction as the difference of two huge numbers:
    # such points take the exact sum over all faces instead.
    close = _close_to(points, qpts, COINCIDENT_RATIO * np.repeat(diam, nq))
    if close.any():
        H[close] = kernels.face_field_at_points(points[close], tri, sigma)
        if close.all():
            return H
        rest = np.flatnonzero(~close)
        H[rest] = field_of_faces(points[rest], tri, sigma, tol, degree=degree, radius=radius, eps=eps,
                                 chunk_pairs=chunk_pairs)
        return H
    H -= _fmm(qpts, (np.repeat(sigma, nq) * qw)[None], points, eps, grad=True)[0].T
    reach = radius * diam
    # points per chunk from the mean number of faces near a point
    per_point = max(1.0, _mean_near_count(points, centroids, reach))
    step = min(50_000, max(1, int(chunk_pairs / per_point)))
    for start in range(0, len(points), step):
        P = points[start:start + step]
        rows, cols = near_pairs(P, centroids, reach)
        vals = _pair_fields(P, tri, sigma, rows, cols, qpts, qw, nq)
        for k in range(3):
            H[start:start + len(P), k] += np.bincount(rows, weights=vals[:, k], minlength=len(P))
    return H


#: Points closer than this many face diameters to a quadrature point of that
#: face are summed exactly (see field_of_faces): the cancellation there loses
#: ~ eps_machine / ratio^2 relative, 1e-10 at this ratio.
COINCIDENT_RATIO = 1e-3


def _close_to(points, qpts, dist):
    """Mask (p,) of points whose nearest quadrature point qpts[q] lies within
    dist[q]."""
    d, j = cKDTree(qpts).query(points, distance_upper_bound=dist.max())
    found = np.isfinite(d)
    close = np.zeros(len(points), bool)
    close[found] = d[found] <= dist[j[found]]
    return close


def _mean_near_count(points, centroids, reach, samples=200):
    """Mean number of near faces per point, from a sample of points."""
    rng = np.random.default_rng(0)
    P = points[rng.choice(len(points), min(samples, len(points)), replace=False)]
    rows, _ = near_pairs(P, centroids, reach)
    return len(rows) / len(P)


# Calibration of estimate(), benchmarks/bench_field_points.py on tetrahedral
# spheres of 1.5k to 230k faces (2 cores shared with other jobs, fmm3dpy on
# one thread) at tol 1e-6: 55-75 near pairs per face at radius 2 (the
# smallest meshes fewer), ~1 us of set-up per pair (wall time, both threads),
# 10-35 us of FMM per quadrature point, ~2 kB per face.
_PAIRS_PER_FACE = {1.5: 34.0, 2.0: 74.0, 3.0: 205.0, 4.0: 400.0, 6.0: 850.0}
_SECONDS_PER_PAIR = 1.0e-6        # exact + quadrature near entries, set-up
_SECONDS_PER_SOURCE = 2.2e-5      # FMM, per quadrature point or target
_SECONDS_PER_NNZ = 5e-9           # sparse correction product


def estimate(n_nodes: int, n_faces: int, tol: float = 1e-6) -> tuple[float, float, float]:
    """(bytes, setup seconds, seconds per product) of FaceChargeFMM on a
    tetrahedral mesh of n_nodes nodes and n_faces faces at tolerance tol.
    Measured times scatter by +-2x around it (see the module notes)."""
    degree, radius, _ = settings(tol)
    nq = len(RULES[degree][1])
    pairs = _PAIRS_PER_FACE.get(radius, 205.0 * (radius / 3.0) ** 3) * n_faces
    nbytes = pairs * 24 + 8 * 2 * (n_nodes + 1) + 32 * nq * n_faces
    setup = _SECONDS_PER_PAIR * pairs
    product = _SECONDS_PER_SOURCE * (nq * n_faces + n_nodes) + _SECONDS_PER_NNZ * pairs
    return float(nbytes), float(setup), float(product)
