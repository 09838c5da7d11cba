"""Precorrected FFT product of the triangle single-layer operator at mesh nodes.

S sigma: potential (A) at the nodes of uniform charge densities sigma (A/m) on
flat triangles, (S sigma)_i = (1/4pi) sum_f sigma_f I_f(x_i), the product that
:func:`volmag.operators.potentials_at_nodes` evaluates in O(n nf).  The
precorrected-FFT method (Phillips & White, IEEE Trans. Comput.-Aided Des. 16,
1059, 1997, from memory) does it in O(n + nf + N log N):

1. Projection: each face's charge becomes point charges on a (p+1)^3 stencil
   of an auxiliary cubic grid (spacing h) around its centroid, chosen so the
   stencil's moments equal the face's (transposed tensor Lagrange
   interpolation at the points of a degree-5 triangle rule).
2. Convolution of the grid charges with 1/(4 pi r) on the grid by
   zero-padded real FFTs (the kernel transform is cached).
3. Interpolation of the grid potential at each node from its own (p+1)^3
   stencil (tensor Lagrange, the transpose of 1.).
4. Precorrection: for every near pair (node, face) -- centroid within r_near
   of the node -- the grid's contribution is replaced by the exact integral
   (kernels.triangle_potential).  The grid term of a pair,
   w_node^T G(anchor offset) w_face, depends on the two stencils' offset
   only; per node the grid potential of its stencil is tabulated once on the
   box its near faces occupy, and each face's term is then one dot product.

The exact near block `near` (n x nf CSR, S on the near pairs) is kept: it is
the local part of the operator that preconditioners factorise.

Parameters from the tolerance (rule `_RULE`, :func:`parameters`): the
relative error of the product (2-norm against the dense evaluation; charges
of a random nodal potential, the hardest case, and of a uniform
magnetisation) falls as (h / r_near)^(p+1) with the stencil order p and the
near radius in grid steps, until the projection rule's own error,
~(face size / r_near)^6, takes over (then the rule is applied on
sub-triangles).  h is a fraction of the mean face edge a and r_near a
multiple of a (at least twice the face's longest edge, for the large faces
of graded meshes).  Measured worst errors per row, sphere 5k / 18k / 46k
tets and drilled box 3.8k tets, all below the row's tol:

    tol    p   h/a    r_near/a  error
    1e-3   3   0.50   2.5       3.7e-4
    1e-4   3   0.35   2.5       7.5e-5
    1e-5   5   0.35   2.5       4.9e-6
    1e-6   5   0.25   2.5       7.1e-7
    1e-7   6   0.20   3.5       1.9e-8 (4 sub-triangles)

Cost at tol 1e-6 (two shared cores): ~1000 near pairs per node, set-up
0.6-2 us per pair (the exact integrals and the stencil terms; 26 s at 176k
tets), 0.1-0.4 s per product at 46k tets (the FFT of a 192^3 padded grid),
0.6-1.6 s at 176k; memory ~40 bytes per near pair plus 1.7 kB per face for
the stencil weights (1.4 GB held at 176k tets, 4.3 GB peak while setting
up); :func:`estimate` holds the fitted model.
"""
from __future__ import annotations

import functools
import math
import time
from dataclasses import dataclass

import numpy as np
import scipy.fft as sfft
import scipy.sparse as sp
from numba import njit, prange

from . import kernels
from .machine import usable_cores

INV_4PI = 1.0 / (4.0 * math.pi)


@dataclass(frozen=True)
class PFFTParameters:
    """order: stencil order p (p + 1 grid points per axis); spacing: grid
    spacing h over the mean face edge length a; near: near radius over a
    (at least twice the face's longest edge); subdivide: the degree-5
    triangle rule is applied on 4^subdivide sub-triangles for the
    projection."""
    order: int
    spacing: float
    near: float
    subdivide: int = 0


# tol -> parameters, loosest first: the cheapest setting whose measured worst
# relative error (random nodal potentials' charges, the hardest case) stays
# below tol on spheres (1.3k to 18k tets) and a drilled box (3.8k tets):
#                      sphere   box
#   (3, 0.50, 2.5)     3.7e-4   3.0e-4
#   (3, 0.35, 2.5)     7.5e-5   6.3e-5
#   (5, 0.35, 2.5)     4.9e-6   3.5e-6
#   (5, 0.25, 2.5)     7.1e-7   6.1e-7
#   (6, 0.20, 3.5, 1)  1.4e-8   1.9e-8   (without subdivision: 1.7e-7, the
#                                          face rule's degree limits it)
# Errors fall as (h / r_near)^(p+1) until the projection rule's own error,
# (face size / r_near)^6, takes over.
_RULE = (
    (1e-3, PFFTParameters(3, 0.5, 2.5)),
    (1e-4, PFFTParameters(3, 0.35, 2.5)),
    (1e-5, PFFTParameters(5, 0.35, 2.5)),
    (1e-6, PFFTParameters(5, 0.25, 2.5)),
    (1e-7, PFFTParameters(6, 0.2, 3.5, 1)),
)


def parameters(tol: float) -> PFFTParameters:
    """Stencil order, spacing, near radius and projection rule for a
    requested relative tolerance (dimensionless; 1e-7 <= tol, looser values
    than 1e-3 use the 1e-3 row)."""
    if not tol > 0:
        raise ValueError(f"tolerance must be positive, not {tol!r}")
    for t, prm in _RULE:
        if tol >= t * 0.999:
            return prm
    raise ValueError(f"pFFT tolerance {tol:g} is below the tightest calibrated value "
                     f"{_RULE[-1][0]:g}; use the dense operator")


def subdivided_rule(levels: int) -> tuple[np.ndarray, np.ndarray]:
    """The degree-5 triangle rule (kernels.TRI_RULE_*) on the 4^levels
    sub-triangles of midpoint subdivision: barycentric points and weights
    summing to 1."""
    qp, qw = kernels.TRI_RULE_POINTS, kernels.TRI_RULE_WEIGHTS
    V = np.eye(3)
    mid = lambda i, j: 0.5 * (V[i] + V[j])
    subs = [np.array(t) for t in ((V[0], mid(0, 1), mid(0, 2)), (mid(0, 1), V[1], mid(1, 2)),
                                  (mid(0, 2), mid(1, 2), V[2]), (mid(1, 2), mid(0, 2), mid(0, 1)))]
    for _ in range(levels):
        qp = np.vstack([qp @ t for t in subs])
        qw = np.concatenate([qw / 4.0] * 4)
    return np.ascontiguousarray(qp), np.ascontiguousarray(qw)


# ---------------------------------------------------------------- stencils --

@njit(cache=True)
def _lagrange(s, p, out):
    """Lagrange weights out[0..p] of the points 0..p at abscissa s."""
    for j in range(p + 1):
        w = 1.0
        for m in range(p + 1):
            if m != j:
                w *= (s - m) / (j - m)
        out[j] = w


@njit(cache=True)
def _anchor(t, p):
    """First stencil index of p + 1 points centred on grid coordinate t."""
    return int(math.floor(t - 0.5 * p + 0.5))


@njit(parallel=True, cache=True)
def _point_stencils(points, origin, h, p):
    """Anchors (m, 3) and tensor Lagrange weights (m, (p+1)^3) of points."""
    m, q = points.shape[0], p + 1
    anchors = np.empty((m, 3), np.int64)
    weights = np.empty((m, q * q * q))
    for i in prange(m):
        wx, wy, wz = np.empty(q), np.empty(q), np.empty(q)
        t0 = (points[i, 0] - origin[0]) / h
        t1 = (points[i, 1] - origin[1]) / h
        t2 = (points[i, 2] - origin[2]) / h
        a0, a1, a2 = _anchor(t0, p), _anchor(t1, p), _anchor(t2, p)
        anchors[i, 0], anchors[i, 1], anchors[i, 2] = a0, a1, a2
        _lagrange(t0 - a0, p, wx)
        _lagrange(t1 - a1, p, wy)
        _lagrange(t2 - a2, p, wz)
        k = 0
        for x in range(q):
            for y in range(q):
                for z in range(q):
                    weights[i, k] = wx[x] * wy[y] * wz[z]
                    k += 1
    return anchors, weights


@njit(parallel=True, cache=True)
def _face_stencils(nodes, faces, origin, h, p, qp, qw):
    """Anchors (nf, 3) at the centroids and weights (nf, (p+1)^3), m^2: the
    grid charges per unit sigma whose moments (per-axis degree <= p) equal
    those of the face, integrated by the rule (qp barycentric, qw)."""
    nf, q = faces.shape[0], p + 1
    anchors = np.empty((nf, 3), np.int64)
    weights = np.zeros((nf, q * q * q))
    for f in prange(nf):
        wx, wy, wz = np.empty(q), np.empty(q), np.empty(q)
        a, b, c = nodes[faces[f, 0]], nodes[faces[f, 1]], nodes[faces[f, 2]]
        e1, e2 = b - a, c - a
        nx = e1[1] * e2[2] - e1[2] * e2[1]
        ny = e1[2] * e2[0] - e1[0] * e2[2]
        nz = e1[0] * e2[1] - e1[1] * e2[0]
        area = 0.5 * math.sqrt(nx * nx + ny * ny + nz * nz)
        anc = np.empty(3, np.int64)
        for d in range(3):
            anc[d] = _anchor(((a[d] + b[d] + c[d]) / 3.0 - origin[d]) / h, p)
            anchors[f, d] = anc[d]
        for r in range(qw.shape[0]):
            y0 = qp[r, 0] * a[0] + qp[r, 1] * b[0] + qp[r, 2] * c[0]
            y1 = qp[r, 0] * a[1] + qp[r, 1] * b[1] + qp[r, 2] * c[1]
            y2 = qp[r, 0] * a[2] + qp[r, 1] * b[2] + qp[r, 2] * c[2]
            _lagrange((y0 - origin[0]) / h - anc[0], p, wx)
            _lagrange((y1 - origin[1]) / h - anc[1], p, wy)
            _lagrange((y2 - origin[2]) / h - anc[2], p, wz)
            s = area * qw[r]
            k = 0
            for x in range(q):
                for y in range(q):
                    for z in range(q):
                        weights[f, k] += s * wx[x] * wy[y] * wz[z]
                        k += 1
    return anchors, weights


@njit(cache=True)
def _spread(anchors, weights, sigmas, p, grid):
    """grid (k, N0, N1, N2) += stencil charges of sigmas (nf, k)."""
    q = p + 1
    for f in range(anchors.shape[0]):
        a0, a1, a2 = anchors[f, 0], anchors[f, 1], anchors[f, 2]
        for j in range(sigmas.shape[1]):
            s = sigmas[f, j]
            if s == 0.0:
                continue
            k = 0
            for x in range(q):
                for y in range(q):
                    for z in range(q):
                        grid[j, a0 + x, a1 + y, a2 + z] += s * weights[f, k]
                        k += 1


@njit(parallel=True, cache=True)
def _gather(anchors, weights, grid, p, out):
    """out (n, k) = stencil interpolation of grid (k, N0, N1, N2)."""
    q = p + 1
    for i in prange(anchors.shape[0]):
        a0, a1, a2 = anchors[i, 0], anchors[i, 1], anchors[i, 2]
        for j in range(grid.shape[0]):
            acc = 0.0
            k = 0
            for x in range(q):
                for y in range(q):
                    for z in range(q):
                        acc += weights[i, k] * grid[j, a0 + x, a1 + y, a2 + z]
                        k += 1
            out[i, j] = acc


# ------------------------------------------------------------- near pairs --

@njit(cache=True)
def _bin_points(points, lo, size, nb):
    """Cell-list of points: order (m,) and start (nb0*nb1*nb2 + 1,)."""
    m = points.shape[0]
    cell = np.empty(m, np.int64)
    for i in range(m):
        c = 0
        for d in range(3):
            k = int((points[i, d] - lo[d]) / size)
            k = min(max(k, 0), nb[d] - 1)
            c = c * nb[d] + k
        cell[i] = c
    order = np.argsort(cell, kind="mergesort")
    start = np.zeros(nb[0] * nb[1] * nb[2] + 1, np.int64)
    for i in range(m):
        start[cell[i] + 1] += 1
    for c in range(start.shape[0] - 1):
        start[c + 1] += start[c]
    return order, start


@njit(parallel=True, cache=True)
def _near_search(nodes, centroids, radius, lo, size, nb, order, start, counts, fill, indptr, out):
    """Nodes within radius[f] of each face centroid.  Pass 1 (fill False):
    counts[f]; pass 2: node indices into out[indptr[f]:indptr[f+1]]."""
    for f in prange(centroids.shape[0]):
        r = radius[f]
        r2 = r * r
        klo = np.empty(3, np.int64)
        khi = np.empty(3, np.int64)
        for d in range(3):
            klo[d] = max(int((centroids[f, d] - r - lo[d]) / size), 0)
            khi[d] = min(int((centroids[f, d] + r - lo[d]) / size), nb[d] - 1)
        n = 0
        pos = indptr[f] if fill else 0
        for x in range(klo[0], khi[0] + 1):
            for y in range(klo[1], khi[1] + 1):
                for z in range(klo[2], khi[2] + 1):
                    c = (x * nb[1] + y) * nb[2] + z
                    for t in range(start[c], start[c + 1]):
                        i = order[t]
                        dx = nodes[i, 0] - centroids[f, 0]
                        dy = nodes[i, 1] - centroids[f, 1]
                        dz = nodes[i, 2] - centroids[f, 2]
                        if dx * dx + dy * dy + dz * dz <= r2:
                            if fill:
                                out[pos + n] = i
                            n += 1
        if not fill:
            counts[f] = n


@njit(parallel=True, cache=True)
def _near_values(nodes, faces, indptr, indices, origin, h, f_anchor, f_weight, p, table, reach,
                 exact, grid):
    """Per near pair (CSR over nodes): exact[k] = S_if, m, and grid[k] =
    the grid's approximation of it, w_i^T G(offset) w_f.  table holds
    G = 1/(4 pi h |d|) at offsets d in [-reach, reach]^3 (index d + reach)."""
    q = p + 1
    for i in prange(nodes.shape[0]):
        k0, k1 = indptr[i], indptr[i + 1]
        if k1 == k0:
            continue
        wx, wy, wz = np.empty(q), np.empty(q), np.empty(q)
        t0 = (nodes[i, 0] - origin[0]) / h
        t1 = (nodes[i, 1] - origin[1]) / h
        t2 = (nodes[i, 2] - origin[2]) / h
        n0, n1, n2 = _anchor(t0, p), _anchor(t1, p), _anchor(t2, p)
        _lagrange(t0 - n0, p, wx)
        _lagrange(t1 - n1, p, wy)
        _lagrange(t2 - n2, p, wz)
        lo0 = lo1 = lo2 = 1 << 40
        hi0 = hi1 = hi2 = -(1 << 40)
        for k in range(k0, k1):
            f = indices[k]
            o0, o1, o2 = f_anchor[f, 0] - n0, f_anchor[f, 1] - n1, f_anchor[f, 2] - n2
            lo0, lo1, lo2 = min(lo0, o0), min(lo1, o1), min(lo2, o2)
            hi0, hi1, hi2 = max(hi0, o0 + p), max(hi1, o1 + p), max(hi2, o2 + p)
        s0, s1, s2 = hi0 - lo0 + 1, hi1 - lo1 + 1, hi2 - lo2 + 1
        # v(b) = sum_a w_i[a] G(b - a): grid potential of node i's stencil
        # (b relative to its anchor) on the box its faces occupy; the node's
        # weights are a tensor product, so one axis at a time
        t1a = np.zeros((s0 + p, s1 + p, s2))
        for i0 in range(s0 + p):
            for i1 in range(s1 + p):
                for j2 in range(s2):
                    acc = 0.0
                    for z in range(q):
                        acc += wz[z] * table[lo0 - p + i0 + reach, lo1 - p + i1 + reach, lo2 + j2 - z + reach]
                    t1a[i0, i1, j2] = acc
        t2a = np.zeros((s0 + p, s1, s2))
        for i0 in range(s0 + p):
            for j1 in range(s1):
                for j2 in range(s2):
                    acc = 0.0
                    for y in range(q):
                        acc += wy[y] * t1a[i0, j1 + p - y, j2]
                    t2a[i0, j1, j2] = acc
        v = np.zeros((s0, s1, s2))
        for j0 in range(s0):
            for j1 in range(s1):
                for j2 in range(s2):
                    acc = 0.0
                    for x in range(q):
                        acc += wx[x] * t2a[j0 + p - x, j1, j2]
                    v[j0, j1, j2] = acc
        p_i = nodes[i]
        for k in range(k0, k1):
            f = indices[k]
            exact[k] = INV_4PI * kernels.triangle_potential(p_i, nodes[faces[f, 0]], nodes[faces[f, 1]],
                                                            nodes[faces[f, 2]])
            o0 = f_anchor[f, 0] - n0 - lo0
            o1 = f_anchor[f, 1] - n1 - lo1
            o2 = f_anchor[f, 2] - n2 - lo2
            acc = 0.0
            kk = 0
            for x in range(q):
                for y in range(q):
                    for z in range(q):
                        acc += f_weight[f, kk] * v[o0 + x, o1 + y, o2 + z]
                        kk += 1
            grid[k] = acc


@njit(cache=True)
def _max_offset(indptr, indices, n_anchor, f_anchor):
    """Largest |anchor offset| (grid steps, any axis) over the near pairs."""
    m = 0
    for i in range(indptr.shape[0] - 1):
        for k in range(indptr[i], indptr[i + 1]):
            for d in range(3):
                m = max(m, abs(f_anchor[indices[k], d] - n_anchor[i, d]))
    return m


# ------------------------------------------------------------------ kernel --

def _green(d2, h):
    """1/(4 pi h |d|), 1/m, from squared integer offsets d2; 0 at d = 0 (any
    value works: every pair whose stencils can overlap is precorrected)."""
    with np.errstate(divide="ignore"):
        g = INV_4PI / (h * np.sqrt(d2))
    g[d2 == 0] = 0.0
    return g


@functools.lru_cache(maxsize=4)
def _kernel_spectrum(shape, h, workers):
    """rfftn of the cyclic Green's function on the padded grid (cached)."""
    L = padded_shape(shape)
    axes = []
    for k in range(3):
        i = np.arange(L[k])
        axes.append(np.minimum(i, L[k] - i).astype(float) ** 2)
    d2 = axes[0][:, None, None] + axes[1][None, :, None] + axes[2][None, None, :]
    # even in every axis: the transform is real
    return sfft.rfftn(_green(d2, h), workers=workers).real.copy()


def padded_shape(shape) -> tuple[int, int, int]:
    """FFT lengths >= 2 N - 1 per axis (fast sizes for scipy.fft)."""
    return tuple(int(sfft.next_fast_len(2 * n - 1, real=True)) for n in shape)


def _offset_table(reach, h):
    """_green on the offsets [-reach, reach]^3 (index offset + reach)."""
    r = np.arange(-reach, reach + 1, dtype=float) ** 2
    return _green(r[:, None, None] + r[None, :, None] + r[None, None, :], h)


# -------------------------------------------------------------- operator --

#: Largest padded grid (points) a PrecorrectedFFT accepts: ~16 bytes a point
#: for the transform and its temporaries.
MAX_GRID_POINTS = 2e8


def grid_points(nodes, faces, tol: float = 1e-6) -> float:
    """Padded FFT grid points a PrecorrectedFFT of this mesh would use:
    the actual bounding box, for method choices on bodies far apart."""
    prm = parameters(tol)
    nodes = np.asarray(nodes, float)
    tri = nodes[np.asarray(faces)]
    h = prm.spacing * float(np.linalg.norm(tri - np.roll(tri, 1, axis=1), axis=2).mean())
    shape = np.ceil(np.ptp(nodes, axis=0) / h + prm.order + 3).astype(int)
    return float(np.prod(padded_shape(shape), dtype=float))

class PrecorrectedFFT:
    """Matrix-free S: potentials (A) at `nodes` (n, 3), m, of uniform charge
    densities (A/m) on the triangles `faces` (nf, 3) (node indices), to a
    relative tolerance `tol` (2-norm, relative to the result's norm).

    `params` overrides the rule of :func:`parameters`; `workers` sets the FFT
    threads; a padded grid of more than `max_grid` points (bodies far apart
    for their element size) is refused with ValueError before allocating.
    Attributes after construction: h (m), shape (grid points), near (n x nf
    CSR, m: exact S on the near pairs), setup_seconds."""

    def __init__(self, nodes, faces, tol: float = 1e-6, params: PFFTParameters | None = None,
                 workers: int | None = None, progress=None, max_grid: float = MAX_GRID_POINTS):
        t0 = time.perf_counter()
        self.nodes = np.ascontiguousarray(nodes, dtype=float)
        self.faces = np.ascontiguousarray(faces, dtype=np.int64)
        self.tol = float(tol)
        self.params = params or parameters(tol)
        self.workers = workers or usable_cores()
        p = self.params.order
        self.order = p
        tri = self.nodes[self.faces]
        edges = np.linalg.norm(tri - np.roll(tri, 1, axis=1), axis=2)
        self.edge = float(edges.mean())
        self.h = float(self.params.spacing * self.edge)
        lo, hi = self.nodes.min(axis=0), self.nodes.max(axis=0)
        margin = (0.5 * p + 1.0) * self.h
        self.origin = lo - margin
        self.shape = tuple(int(v) for v in np.ceil((hi - self.origin + margin) / self.h) + 1)
        self.padded = padded_shape(self.shape)
        if float(np.prod(self.padded, dtype=float)) > max_grid:
            raise ValueError(f"the pFFT grid {'x'.join(map(str, self.padded))} (padded) exceeds "
                             f"{max_grid:.3g} points: the bodies span {np.ptp(self.nodes, axis=0)} m "
                             f"for a mean edge of {self.edge:.3g} m; use the FMM or the dense operator")
        self.n_anchor, self.n_weight = _point_stencils(self.nodes, self.origin, self.h, p)
        qp, qw = subdivided_rule(self.params.subdivide)
        self.f_anchor, self.f_weight = _face_stencils(self.nodes, self.faces, self.origin, self.h, p, qp, qw)
        self.spectrum = _kernel_spectrum(self.shape, self.h, self.workers)
        # near radius: the rule's multiple of the mean edge, and at least
        # twice the face's longest edge (large faces of graded meshes)
        centroids = tri.mean(axis=1)
        diam = edges.max(axis=1)
        radius = np.maximum(self.params.near * self.edge, 2.0 * diam)
        self.near, self._correction = self._precorrect(centroids, radius)
        self.setup_seconds = time.perf_counter() - t0
        if progress is not None:
            progress(f"pFFT: grid {self.shape[0]}x{self.shape[1]}x{self.shape[2]} (padded "
                     f"{'x'.join(map(str, self.padded))}), h = {self.h:.3g} m, order {p}, "
                     f"{self.near.nnz} near pairs, {self.nbytes() / 2**20:.0f} MiB, "
                     f"setup {self.setup_seconds:.1f} s")

    def _precorrect(self, centroids, radius):
        size = float(radius.min())
        lo = self.nodes.min(axis=0) - 1e-9 * size
        nb = np.maximum(np.ceil((self.nodes.max(axis=0) - lo) / size).astype(np.int64), 1)
        order, start = _bin_points(self.nodes, lo, size, nb)
        nf = len(self.faces)
        counts = np.zeros(nf, np.int64)
        dummy = np.zeros(1, np.int64)
        _near_search(self.nodes, centroids, radius, lo, size, nb, order, start, counts, False,
                     np.zeros(nf + 1, np.int64), dummy)
        indptr = np.zeros(nf + 1, np.int64)
        np.cumsum(counts, out=indptr[1:])
        rows = np.empty(indptr[-1], np.int64)
        _near_search(self.nodes, centroids, radius, lo, size, nb, order, start, counts, True, indptr, rows)
        # pattern by faces (CSC) -> by nodes (CSR), sorted indices
        pattern = sp.csc_matrix((np.ones(len(rows), np.float32), rows, indptr),
                                shape=(len(self.nodes), nf)).tocsr()
        pattern.sort_indices()
        del rows
        reach = _max_offset(pattern.indptr, pattern.indices, self.n_anchor, self.f_anchor) + self.order + 1
        table = _offset_table(reach, self.h)
        exact = np.empty(pattern.nnz)
        grid = np.empty(pattern.nnz)
        _near_values(self.nodes, self.faces, pattern.indptr, pattern.indices, self.origin, self.h,
                     self.f_anchor, self.f_weight, self.order, table, reach, exact, grid)
        grid -= exact
        grid *= -1.0
        shape = (len(self.nodes), nf)
        near = sp.csr_matrix((exact, pattern.indices, pattern.indptr), shape=shape)
        corr = sp.csr_matrix((grid, pattern.indices, pattern.indptr), shape=shape)
        return near, corr

    def grid_product(self, sigmas: np.ndarray) -> np.ndarray:
        """The uncorrected grid approximation (n, k), A, of S sigmas (nf, k)."""
        k = sigmas.shape[1]
        grid = np.zeros((k,) + self.shape)
        _spread(self.f_anchor, self.f_weight, sigmas, self.order, grid)
        g = sfft.rfftn(grid, s=self.padded, axes=(1, 2, 3), workers=self.workers)
        del grid
        g *= self.spectrum
        pot = sfft.irfftn(g, s=self.padded, axes=(1, 2, 3), workers=self.workers, overwrite_x=True)
        pot = pot[:, :self.shape[0], :self.shape[1], :self.shape[2]]
        out = np.empty((len(self.nodes), k))
        _gather(self.n_anchor, self.n_weight, np.ascontiguousarray(pot), self.order, out)
        return out

    def __call__(self, sigmas: np.ndarray) -> np.ndarray:
        """Potentials (n,) or (n, k), A, at the nodes of charge densities
        sigmas (nf,) or (nf, k), A/m."""
        s = np.asarray(sigmas, dtype=float)
        flat = s.ndim == 1
        s2 = np.ascontiguousarray(s.reshape(len(self.faces), -1))
        out = self.grid_product(s2) + self._correction @ s2
        return out[:, 0] if flat else out

    def nbytes(self) -> int:
        """Memory held by the operator, bytes (stencils, kernel transform,
        near and correction matrices)."""
        m = self.near
        return int(self.n_weight.nbytes + self.f_weight.nbytes + self.n_anchor.nbytes
                   + self.f_anchor.nbytes + self.spectrum.nbytes + m.data.nbytes + m.indices.nbytes
                   + m.indptr.nbytes + self._correction.data.nbytes)


def estimate(n_nodes: int, n_faces: int, tol: float = 1e-6) -> tuple[float, float, float]:
    """(peak bytes, setup seconds, seconds per product) of a PrecorrectedFFT
    on a compact body (bounding box ~ its volume x 2) meshed with n_nodes
    nodes and n_faces faces (a tet mesh has n_faces ~ 10 n_nodes), fitted
    to benchmarks/bench_tet_fast.py on this machine (2 cores shared with
    other work: the same runs took 1x to 4x these times depending on the
    load).  Rough; elongated or sparse arrangements of bodies have larger
    grids (see :func:`grid_points`)."""
    prm = parameters(tol)
    q = prm.order + 1
    # near pairs per node: ~1000 at r_near = 2.5 mean edges on large meshes
    pairs = n_nodes * _PAIRS_PER_NODE * (prm.near / 2.5) ** 3
    pairs = min(pairs, float(n_nodes) * n_faces)
    grid = _BOX_PER_NODE * n_nodes / prm.spacing ** 3
    padded = 8.0 * grid
    held = 20.0 * pairs + 8.0 * q ** 3 * (n_nodes + n_faces) + 4.0 * padded
    transient = 60.0 * pairs + 16.0 * padded
    box = (2.0 * prm.near / prm.spacing + prm.order) ** 3
    setup = pairs * (_C_PAIR + _C_PAIR_STENCIL * q ** 3) + _C_BOX * n_nodes * 3 * q * box \
        + _C_FFT * padded * math.log2(max(padded, 2.0))
    product = _C_FFT * padded * math.log2(max(padded, 2.0)) + _C_SPMV * pairs \
        + _C_STENCIL * q ** 3 * (n_nodes + n_faces)
    return float(held + transient), float(setup), float(product)


# Calibration of estimate() (bench_tet_fast.py, spheres of 1.4k to 176k tets,
# 2 shared cores): near pairs per node at r_near = 2.5 mean edges (600 at
# 400 nodes, 970 at 9k); grid bounding box per node in mean edges cubed
# (1.0 for a sphere); seconds per near pair (exact integral + grid term),
# per pair and stencil weight, per node-box point and weight, per padded
# FFT point and log2, per sparse entry, per stencil weight.
_PAIRS_PER_NODE = 1000.0
_BOX_PER_NODE = 1.0
_C_PAIR = 3.5e-7
_C_PAIR_STENCIL = 2.7e-9
_C_BOX = 0.7e-9
_C_FFT = 2.5e-9
_C_SPMV = 3e-9
_C_STENCIL = 2e-9
