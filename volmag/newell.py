"""Cell-averaged magnetostatic interaction of two identical rectangular cells.

For cells of edge lengths d = (dx, dy, dz) (m) whose centres differ by X
(target minus source, m), the average over the target cell of the field H
(A/m) of the source cell, uniformly magnetised with M (A/m), is T(X) @ M.
T is dimensionless, symmetric, even in X, with trace -1 when the cells
coincide and 0 when they do not overlap.  T = -N, N the tensor of Newell,
Williams & Dunlop, J. Geophys. Res. 98, 9551 (1993).

The autocorrelation of a box is a product of triangle functions, so T is one
integral over the difference vector s of target and source points:

    T(X) = int_{|s_k| <= d_k} K(X + s) prod_k (1 - |s_k| / d_k) ds,
    K(r) = (3 r r^T - |r|^2 I) / (4 pi |r|^5)       (point-dipole kernel).

Newell's closed form integrates this exactly, but as a sixth difference of
functions of size |X|^3 it loses about 6 log10(|X|/d) digits to cancellation
(against 60-digit mpmath: 1e-11 relative at 3 cells for cubes, 3e-9 at 8,
3e-6 at 24; 3e-10 at 2 cells for needle cells 10:1:1).  So T is evaluated in
three zones:

* near, every |X_k| <= NEAR d_k (touching or overlapping cells): closed form;
* far, |X| >= FAR |d| (|d| the cell diagonal): the Taylor series of the
  integral about X, to the order its truncation error needs;
* in between: tensor-product Gauss-Legendre quadrature of the integral, with
  panels no longer than the gap between the cells allows.

Worst relative error max|T - T_ref| / max|T_ref| measured against the closed
form in 40-80 digits (cells with aspect ratios up to 1:10, offsets from 0 to
1e6 cells, grid and off-grid): closed-form zone 2e-12 for cubes and plates,
2.4e-11 for needle cells (10:1:1; 1e-11 for touching grid neighbours), which
is what the closed form gives in double precision; quadrature zone 1.2e-13;
series zone 1.5e-15.
"""
from __future__ import annotations

import math

import numpy as np
from numba import njit, prange

#: Closed form while every |X_k| <= NEAR d_k: touching and overlapping cells.
NEAR = 1.25
#: Taylor series once |X| >= FAR * cell diagonal (series order <= 8 there).
FAR = 8.0
#: Target of the a-priori error estimates of the quadrature and the series.
QUAD_TOL = 1e-15
SERIES_TOL = 1e-16

# Gauss-Legendre panels have half-length h <= gap / _PANEL_Q; then the
# Bernstein-ellipse bound needs at most _NMAX points (for t = gap/h >= 0.5).
_PANEL_Q = 0.5
_NMAX = 36
_GL_X = np.zeros((_NMAX + 1, _NMAX))
_GL_W = np.zeros((_NMAX + 1, _NMAX))
for _n in range(1, _NMAX + 1):
    _GL_X[_n, :_n], _GL_W[_n, :_n] = np.polynomial.legendre.leggauss(_n)


# ---------------------------------------------------------------- closed form
@njit(cache=True)
def _newell_f(x, y, z):
    """Newell et al. (1993) f, with d^2/dy^2 d^2/dz^2 f = 1/r; even in x, y, z."""
    x, y, z = abs(x), abs(y), abs(z)
    x2, y2, z2 = x * x, y * y, z * z
    r = math.sqrt(x2 + y2 + z2)
    s = (2.0 * x2 - y2 - z2) * r / 6.0
    rxz = math.sqrt(x2 + z2)
    rxy = math.sqrt(x2 + y2)
    # Terms whose prefactor vanishes are skipped: their asinh/atan may be 0/0.
    if y > 0.0 and rxz > 0.0:
        s += 0.5 * y * (z2 - x2) * math.asinh(y / rxz)
    if z > 0.0 and rxy > 0.0:
        s += 0.5 * z * (y2 - x2) * math.asinh(z / rxy)
    if x > 0.0 and y > 0.0 and z > 0.0:
        s -= x * y * z * math.atan(y * z / (x * r))
    return s


@njit(cache=True)
def _newell_g(x, y, z):
    """Newell et al. (1993) g, with d/dx d/dy d^2/dz^2 g = 1/r; odd in x and y."""
    sign = 1.0
    if x < 0.0:
        sign = -sign
    if y < 0.0:
        sign = -sign
    x, y, z = abs(x), abs(y), abs(z)
    x2, y2, z2 = x * x, y * y, z * z
    r = math.sqrt(x2 + y2 + z2)
    rxy = math.sqrt(x2 + y2)
    ryz = math.sqrt(y2 + z2)
    rxz = math.sqrt(x2 + z2)
    s = -x * y * r / 3.0
    if z > 0.0 and rxy > 0.0:
        s += x * y * z * math.asinh(z / rxy)
    if x > 0.0 and ryz > 0.0:
        s += y / 6.0 * (3.0 * z2 - y2) * math.asinh(x / ryz)
    if y > 0.0 and rxz > 0.0:
        s += x / 6.0 * (3.0 * z2 - x2) * math.asinh(y / rxz)
    if z > 0.0:
        s -= z2 * z / 6.0 * math.atan(x * y / (z * r))
        if y > 0.0:
            s -= 0.5 * z * y2 * math.atan(x * z / (y * r))
        if x > 0.0:
            s -= 0.5 * z * x2 * math.atan(y * z / (x * r))
    return sign * s


@njit(cache=True)
def _second_difference(use_g, a, b, c, da, db, dc):
    """prod_k (2 u(x_k) - u(x_k + d_k) - u(x_k - d_k)) applied to f or g: the
    27-point stencil with weights 8, -4, 2, -1."""
    s = 0.0
    for i in range(-1, 2):
        wi = 2.0 if i == 0 else -1.0
        for j in range(-1, 2):
            wj = 2.0 if j == 0 else -1.0
            for k in range(-1, 2):
                w = wi * wj * (2.0 if k == 0 else -1.0)
                if use_g:
                    s += w * _newell_g(a + i * da, b + j * db, c + k * dc)
                else:
                    s += w * _newell_f(a + i * da, b + j * db, c + k * dc)
    return s


# Axis orders (a, b, c) giving T_xx, T_yy, T_zz from f and T_xy, T_xz, T_yz from g.
_AXIS_ORDERS = np.array([[0, 1, 2], [1, 0, 2], [2, 1, 0], [0, 1, 2], [0, 2, 1], [1, 2, 0]])


@njit(cache=True)
def _closed_form(X, d):
    """Newell, Williams & Dunlop (1993): T_xx = -D(f)/(4 pi V), T_xy = -D(g)/(4 pi V),
    the other components by permuting the axes."""
    a = np.empty(6)
    for m in range(6):
        i, j, k = _AXIS_ORDERS[m, 0], _AXIS_ORDERS[m, 1], _AXIS_ORDERS[m, 2]
        a[m] = _second_difference(m >= 3, X[i], X[j], X[k], d[i], d[j], d[k])
    return _symmetric(a, -1.0 / (4.0 * math.pi * d[0] * d[1] * d[2]))


# ----------------------------------------------------------------- quadrature
@njit(cache=True)
def _triangle_rule(d, gap):
    """Nodes and weights for int_{-d}^{d} u(s) (1 - |s|/d) ds, u analytic at
    distance >= gap from the interval: composite Gauss-Legendre on each half,
    with the point count from the Bernstein-ellipse bound rho^(-2n) <= QUAD_TOL
    (e.g. Trefethen, Approximation Theory and Approximation Practice, 2013)."""
    m = max(1, int(math.ceil(_PANEL_Q * d / (2.0 * gap))))
    h = d / (2.0 * m)
    t = gap / h
    rho = t + math.sqrt(1.0 + t * t)
    n = int(math.ceil(-math.log(QUAD_TOL) / (2.0 * math.log(rho))))
    n = min(max(n, 1), _NMAX)
    s = np.empty(2 * m * n)
    w = np.empty(2 * m * n)
    for j in range(m):
        for i in range(n):
            sj = h * (2 * j + 1 + _GL_X[n, i])
            wj = h * _GL_W[n, i] * (1.0 - sj / d)
            s[2 * (j * n + i)], w[2 * (j * n + i)] = sj, wj
            s[2 * (j * n + i) + 1], w[2 * (j * n + i) + 1] = -sj, wj
    return s, w


@njit(cache=True)
def _quadrature(X, d):
    """The triangle-weighted dipole integral by tensor-product quadrature;
    needs a gap between the cells (some |X_k| > d_k)."""
    gap2 = 0.0
    for k in range(3):
        e = abs(X[k]) - d[k]
        if e > 0.0:
            gap2 += e * e
    gap = math.sqrt(gap2)
    sx, wx = _triangle_rule(d[0], gap)
    sy, wy = _triangle_rule(d[1], gap)
    sz, wz = _triangle_rule(d[2], gap)
    a = np.zeros(6)
    for i in range(sx.size):
        x = X[0] + sx[i]
        for j in range(sy.size):
            y = X[1] + sy[j]
            wxy = wx[i] * wy[j]
            for k in range(sz.size):
                z = X[2] + sz[k]
                r2 = x * x + y * y + z * z
                c = wxy * wz[k] / (r2 * r2 * math.sqrt(r2))
                a[0] += c * (3.0 * x * x - r2)
                a[1] += c * (3.0 * y * y - r2)
                a[2] += c * (3.0 * z * z - r2)
                a[3] += c * 3.0 * x * y
                a[4] += c * 3.0 * x * z
                a[5] += c * 3.0 * y * z
    return _symmetric(a, 1.0 / (4.0 * math.pi))


# --------------------------------------------------------------- Taylor series
@njit(cache=True)
def _inverse_distance_derivatives(X, L):
    """D[i, j, k] = d^(i+j+k) / dx^i dy^j dz^k (1/|X|) for i + j + k <= L, by the
    recurrence obtained from |X+s|^2 (s . grad) phi = -(X.s + |s|^2) phi for
    phi = 1/|X+s| (the same recurrence as in Cartesian treecodes, e.g. Duan &
    Krasny, J. Comput. Chem. 2001, from memory; derived here independently)."""
    D = np.zeros((L + 1, L + 1, L + 1))
    r2 = X[0] * X[0] + X[1] * X[1] + X[2] * X[2]
    D[0, 0, 0] = 1.0 / math.sqrt(r2)
    for n in range(1, L + 1):
        for i in range(n + 1):
            for j in range(n - i + 1):
                k = n - i - j
                s = 0.0
                if i > 0:
                    s += (2 * n - 1) * i * X[0] * D[i - 1, j, k]
                if j > 0:
                    s += (2 * n - 1) * j * X[1] * D[i, j - 1, k]
                if k > 0:
                    s += (2 * n - 1) * k * X[2] * D[i, j, k - 1]
                if i > 1:
                    s += (n - 1) * i * (i - 1) * D[i - 2, j, k]
                if j > 1:
                    s += (n - 1) * j * (j - 1) * D[i, j - 2, k]
                if k > 1:
                    s += (n - 1) * k * (k - 1) * D[i, j, k - 2]
                D[i, j, k] = -s / (n * r2)
    return D


@njit(cache=True)
def _factorial(n):
    f = 1.0
    for i in range(2, n + 1):
        f *= i
    return f


@njit(cache=True)
def _series(X, d):
    """Taylor expansion of the integral about X (our derivation):

        T = V/(4 pi) sum_{p even} prod_k [2 d_k^p_k / (p_k + 2)!] d^p grad grad (1/|X|),

    p over multi-indices with even entries, d^p = prod_k (d/dX_k)^p_k; the
    factors are the moments of the triangle weight, int s^2m (1 - |s|/d) ds =
    2 d^(2m+1) / ((2m+1)(2m+2)), over (2m)!.  p = 0 is the point dipole
    V/(4 pi) grad grad (1/r); the |p| = 2 term, V/(4 pi) (1/12) sum_k d_k^2
    (d/dX_k)^2 grad grad (1/r), vanishes for cubes (Laplace).  Donahue &
    Porter, Physica B 2007, expand the same tensor to a few orders (from
    memory; not transcribed).  The terms of order |p| are at most about
    (|d| / |X|)^|p| (measured), so we keep all |p| <= 2P with
    (|X| / |d|)^-(2P+2) <= SERIES_TOL, and at least P = 1."""
    rho = math.sqrt((X[0] ** 2 + X[1] ** 2 + X[2] ** 2) / (d[0] ** 2 + d[1] ** 2 + d[2] ** 2))
    P = max(1, int(math.ceil(0.5 * (-math.log(SERIES_TOL) / math.log(rho) - 2.0))))
    D = _inverse_distance_derivatives(X, 2 * P + 2)
    a = np.zeros(6)
    for p in range(0, 2 * P + 1, 2):
        for q in range(0, 2 * P + 1 - p, 2):
            for r in range(0, 2 * P + 1 - p - q, 2):
                c = (8.0 * d[0] ** p * d[1] ** q * d[2] ** r
                     / (_factorial(p + 2) * _factorial(q + 2) * _factorial(r + 2)))
                a[0] += c * D[p + 2, q, r]
                a[1] += c * D[p, q + 2, r]
                a[2] += c * D[p, q, r + 2]
                a[3] += c * D[p + 1, q + 1, r]
                a[4] += c * D[p + 1, q, r + 1]
                a[5] += c * D[p, q + 1, r + 1]
    return _symmetric(a, d[0] * d[1] * d[2] / (4.0 * math.pi))


@njit(cache=True)
def _symmetric(a, scale):
    """3x3 symmetric matrix from (xx, yy, zz, xy, xz, yz) times scale."""
    T = np.empty((3, 3))
    T[0, 0], T[1, 1], T[2, 2] = scale * a[0], scale * a[1], scale * a[2]
    T[0, 1] = T[1, 0] = scale * a[3]
    T[0, 2] = T[2, 0] = scale * a[4]
    T[1, 2] = T[2, 1] = scale * a[5]
    return T


# --------------------------------------------------------------------- public
@njit(cache=True)
def _check_cell(cell):
    if cell.shape[0] != 3 or not (cell[0] > 0.0 and cell[1] > 0.0 and cell[2] > 0.0):
        raise ValueError("cell must hold three positive edge lengths")


@njit(cache=True)
def cell_tensor(offset, cell):
    """Cell-averaged interaction tensor T (3, 3), dimensionless, of two cells
    of edge lengths `cell` (3,) m whose centres differ by `offset` (3,) m
    (target minus source): <H>_target = T @ M_source.  T = -N of Newell,
    Williams & Dunlop (1993); T(0) of a cube is -I/3."""
    _check_cell(cell)
    # Every zone is scale-free: work in units of the cell diagonal.
    ell = math.sqrt(cell[0] ** 2 + cell[1] ** 2 + cell[2] ** 2)
    X = np.empty(3)
    d = np.empty(3)
    near = True
    for k in range(3):
        X[k] = offset[k] / ell
        d[k] = cell[k] / ell
        if abs(X[k]) > NEAR * d[k]:
            near = False
    if near:
        return _closed_form(X, d)
    if X[0] * X[0] + X[1] * X[1] + X[2] * X[2] >= FAR * FAR:
        return _series(X, d)
    return _quadrature(X, d)


@njit(cache=True, parallel=True)
def cell_tensors(offsets, cell):
    """cell_tensor for each row of `offsets` (k, 3) m; returns (k, 3, 3)."""
    _check_cell(cell)  # here: an exception inside prange would be lost
    out = np.empty((offsets.shape[0], 3, 3))
    for i in prange(offsets.shape[0]):
        out[i] = cell_tensor(offsets[i], cell)
    return out


def box_demag_tensor(size, counts) -> np.ndarray:
    """Magnetometric demagnetising tensor N (3, 3) of a rectangular box of edge
    lengths `size` (3,) m, from its subdivision into counts[0]*counts[1]*counts[2]
    equal cells: N = -(1/n) sum over cell pairs of T.  Each distinct offset is
    evaluated once, weighted by the number of pairs that share it.  Newell's
    tensor being exact, the result does not depend on `counts`."""
    size = np.asarray(size, dtype=float)
    counts = np.asarray(counts)
    if size.shape != (3,) or counts.shape != (3,) or np.any(size <= 0) or np.any(counts < 1):
        raise ValueError("box_demag_tensor needs three positive sizes and three counts >= 1")
    counts = counts.astype(np.int64)
    cell = size / counts
    axes = [np.arange(1 - c, c) for c in counts]
    grid = np.meshgrid(*axes, indexing="ij")
    steps = np.stack([g.ravel() for g in grid], axis=1)
    pairs = np.prod(counts - np.abs(steps), axis=1).astype(float)
    T = cell_tensors(steps * cell, cell)
    return -np.einsum("k,kij->ij", pairs, T) / np.prod(counts)
