"""Analytic integrals over flat triangles and the interaction tensor of a
uniformly magnetised tetrahedron.

For a flat triangle T with vertices a, b, c (unit normal n = (b-a)x(c-a)/|..|,
right-hand rule on the vertex order) and a field point p:

    I(p) = int_T dS' / |p - r'|                  (m; single-layer potential)
    g(p) = int_T (p - r') / |p - r'|^3 dS'        (dimensionless; g = -grad I)

so a uniform surface charge sigma (A/m) on T has potential sigma I / 4pi (A)
and field sigma g / 4pi (A/m).  Closed forms: edge logarithms and the solid
angle (Wilton, Rao, Glisson, Schaubert, Al-Bundak & Butler, IEEE Trans.
Antennas Propag. 32, 276, 1984; Graglia, IEEE Trans. Antennas Propag. 41, 1448,
1993); the normal part of g is the signed solid angle of T seen from p (Van
Oosterom & Strackee, IEEE Trans. Biomed. Eng. 30, 125, 1983).

Lengths are in metres, though any consistent length unit works: I scales as
a length, g and the tetrahedron tensor are scale free.

Far from the source the closed forms cancel: the edge terms of a triangle
add up to something one order of size/distance smaller than each, and the
four face fields of a tetrahedron cancel by one order more.  Measured against
the same closed forms at 40 digits (mpmath), the relative error of the
float64 closed form grows as ~1e-15 r for triangles and ~5e-15 r^2 for
tetrahedra (r = |p - centroid| / longest edge): 1e-9 and 5e-3 at r = 10^6.
Beyond a cross-over ratio the kernels switch to a quadrature rule whose
moments are exact to degree 5 (triangle) or 7 (tetrahedron): the monopole
and dipole terms about the centroid are then exact and the remainder falls
as r^-6 (r^-8).  Each cross-over sits where the two measured errors meet;
the worst errors are stated with each function.

Close to an edge or a vertex (distance delta) the rounding of p - r_i alone
limits the accuracy to ~ eps * size / delta, which is the conditioning of
the integrals with respect to the input positions.
"""
import math
from typing import NamedTuple

import numpy as np
from numba import njit, prange
from scipy.special import roots_jacobi

INV_4PI = 1.0 / (4.0 * math.pi)

#: Triangles: closed form below, quadrature beyond this |p - centroid| / longest edge
#: (compiled into the kernels: changing it at run time has no effect).
TRIANGLE_FAR_RATIO = 50.0
#: Tetrahedra: closed form below, quadrature beyond this |p - centroid| / longest edge.
TET_FAR_RATIO = 12.0

# Radon's symmetric 7-point rule, exact to degree 5 (Radon, Monatsh. Math. 52,
# 286, 1948; listed as the degree-5 rule in Dunavant, Int. J. Numer. Methods
# Eng. 21, 1129, 1985): barycentric points and weights summing to 1.  From
# memory; its degree is checked in the tests.
_A1 = (6.0 - math.sqrt(15.0)) / 21.0
_A2 = (6.0 + math.sqrt(15.0)) / 21.0
_W1 = (155.0 - math.sqrt(15.0)) / 1200.0
_W2 = (155.0 + math.sqrt(15.0)) / 1200.0
TRI_RULE_POINTS = np.array([
    [1 / 3, 1 / 3, 1 / 3],
    [_A1, _A1, 1 - 2 * _A1], [_A1, 1 - 2 * _A1, _A1], [1 - 2 * _A1, _A1, _A1],
    [_A2, _A2, 1 - 2 * _A2], [_A2, 1 - 2 * _A2, _A2], [1 - 2 * _A2, _A2, _A2],
])
TRI_RULE_WEIGHTS = np.array([9 / 40, _W1, _W1, _W1, _W2, _W2, _W2])


def _conical_tet_rule(n):
    """Stroud's conical product rule on the tetrahedron (Stroud, Approximate
    Calculation of Multiple Integrals, Prentice-Hall 1971): Gauss-Jacobi
    points in collapsed coordinates, n^3 points exact to degree 2n - 1.
    Returns barycentric points (n^3, 4) and weights summing to 1."""
    rules = []
    for alpha in (2.0, 1.0, 0.0):   # Jacobian (1-u)^2 (1-v) of the collapse
        t, w = roots_jacobi(n, alpha, 0.0)
        rules.append(((1.0 + t) / 2.0, w / w.sum()))
    (u, wu), (v, wv), (s, ws) = rules
    U, V, S = np.meshgrid(u, v, s, indexing="ij")
    x = U
    y = (1 - U) * V
    z = (1 - U) * (1 - V) * S
    bary = np.stack([1 - x - y - z, x, y, z], axis=-1).reshape(-1, 4)
    weights = (wu[:, None, None] * wv[None, :, None] * ws[None, None, :]).ravel()
    return bary, weights


TET_RULE_POINTS, TET_RULE_WEIGHTS = _conical_tet_rule(4)


# ---------------------------------------------------------------- helpers --

@njit(cache=True)
def _edge_tangent(a, b):
    """Length le and unit tangent t of the segment a->b (as le, tx, ty, tz)."""
    ex, ey, ez = b[0] - a[0], b[1] - a[1], b[2] - a[2]
    le = math.sqrt(ex * ex + ey * ey + ez * ez)
    inv = 1.0 / le
    return le, ex * inv, ey * inv, ez * inv


@njit(cache=True)
def _edge_frame(a, b, nx, ny, nz):
    """Length le, unit tangent t and in-plane outward normal u = t x n of the
    edge a->b of a triangle with unit normal n (as le, tx, ty, tz, ux, uy, uz)."""
    le, tx, ty, tz = _edge_tangent(a, b)
    return le, tx, ty, tz, ty * nz - tz * ny, tz * nx - tx * nz, tx * ny - ty * nx


@njit(cache=True)
def _log_ratio(le, lm, lp, rm, rp, r0sq):
    """L = int_edge dl / |p - r'| = ln((R+ + l+) / (R- + l-)) (Wilton et al.
    1984) of a segment of length le whose ends lie at distances rm, rp from p
    and at signed abscissae lm, lp = lm + le along it (origin at the foot of
    p), r0sq the squared distance of p to the segment's line.  L is evaluated
    as log1p of an exact rewriting of the ratio minus one, which keeps full
    relative accuracy far from the edge, and with R + l = R0^2 / (R - l) where
    l < 0, which keeps it close to the edge line.  On the closed segment,
    where L is infinite, L = 0 is returned (see _edge_log).  Reversing the
    segment (lm, lp, rm, rp -> -lp, -lm, rp, rm) gives the same value: the
    branches below are mirror images of each other."""
    # R+ - R- = (l+ - l-)(l+ + l-)/(R+ + R-) and l+ - l- = le exactly.
    s = (lp + lm) / (rp + rm)
    if s >= 0.0:
        den = rm + lm if lm >= 0.0 else r0sq / (rm - lm)
        num = le * (1.0 + s)
    else:
        den = rp - lp if lp <= 0.0 else r0sq / (rp + lp)
        num = le * (1.0 - s)
    if den <= 0.0:
        return 0.0
    return math.log1p(num / den)


@njit(cache=True)
def _edge_log(p, a, b, nx, ny, nz, d):
    """Edge a->b of a triangle with unit normal n, seen from p at height d.

    Returns (P0, L, ux, uy, uz): u the in-plane unit normal of the
    edge pointing out of the triangle, P0 = (a - p).u the signed in-plane
    distance of p to the edge line (> 0 on the triangle's side), and
    L = int_edge dl / |p - r'| (see _log_ratio).  On the closed segment,
    where L is infinite, L = 0 is returned: the potential term P0 L tends to
    0 there, and the in-plane field of that edge is left out (see
    triangle_field)."""
    px, py, pz = p[0], p[1], p[2]
    ax, ay, az = a[0], a[1], a[2]
    bx, by, bz = b[0], b[1], b[2]
    le, tx, ty, tz, ux, uy, uz = _edge_frame(a, b, nx, ny, nz)
    qax, qay, qaz = ax - px, ay - py, az - pz
    qbx, qby, qbz = bx - px, by - py, bz - pz
    lm = qax * tx + qay * ty + qaz * tz
    lp = qbx * tx + qby * ty + qbz * tz
    p0 = qax * ux + qay * uy + qaz * uz
    rm = math.sqrt(qax * qax + qay * qay + qaz * qaz)
    rp = math.sqrt(qbx * qbx + qby * qby + qbz * qbz)
    r0sq = p0 * p0 + d * d
    return p0, _log_ratio(le, lm, lp, rm, rp, r0sq), ux, uy, uz


@njit(cache=True)
def _plane(a, b, c):
    """Unit normal (nx, ny, nz) and twice the area of triangle abc."""
    e1x, e1y, e1z = b[0] - a[0], b[1] - a[1], b[2] - a[2]
    e2x, e2y, e2z = c[0] - a[0], c[1] - a[1], c[2] - a[2]
    nx, ny, nz = e1y * e2z - e1z * e2y, e1z * e2x - e1x * e2z, e1x * e2y - e1y * e2x
    area2 = math.sqrt(nx * nx + ny * ny + nz * nz)
    if area2 == 0.0:
        return 0.0, 0.0, 0.0, 0.0
    return nx / area2, ny / area2, nz / area2, area2


@njit(cache=True)
def _solid_angle_of(r1x, r1y, r1z, r2x, r2y, r2z, r3x, r3y, r3z, n1, n2, n3, d, area2):
    """Signed solid angle of a triangle from its vertices' offsets r_k = v_k - p
    and their lengths n_k, p at signed height d (Van Oosterom & Strackee 1983):
    tan(Omega/2) = (triple product) / D.  The triple product r1.(r2 x r3)
    equals -d * area2, which stays accurate far away.  Zero on the plane
    (d == 0): the mean of the two one-sided limits, and the true value
    outside the triangle."""
    if d == 0.0:
        return 0.0
    den = (n1 * n2 * n3 + (r1x * r2x + r1y * r2y + r1z * r2z) * n3
           + (r1x * r3x + r1y * r3y + r1z * r3z) * n2 + (r2x * r3x + r2y * r3y + r2z * r3z) * n1)
    return 2.0 * math.atan2(d * area2, den)


@njit(cache=True)
def _solid_angle(p, a, b, c, d, area2):
    """Signed solid angle of triangle abc seen from p at signed height d."""
    r1x, r1y, r1z = a[0] - p[0], a[1] - p[1], a[2] - p[2]
    r2x, r2y, r2z = b[0] - p[0], b[1] - p[1], b[2] - p[2]
    r3x, r3y, r3z = c[0] - p[0], c[1] - p[1], c[2] - p[2]
    n1 = math.sqrt(r1x * r1x + r1y * r1y + r1z * r1z)
    n2 = math.sqrt(r2x * r2x + r2y * r2y + r2z * r2z)
    n3 = math.sqrt(r3x * r3x + r3y * r3y + r3z * r3z)
    return _solid_angle_of(r1x, r1y, r1z, r2x, r2y, r2z, r3x, r3y, r3z, n1, n2, n3, d, area2)


@njit(cache=True)
def _dist2(a, b):
    dx, dy, dz = a[0] - b[0], a[1] - b[1], a[2] - b[2]
    return dx * dx + dy * dy + dz * dz


@njit(cache=True)
def _triangle_far_data(a, b, c):
    """Centroid (cx, cy, cz) of triangle abc and the squared far distance
    (TRIANGLE_FAR_RATIO * longest edge)^2."""
    cx = (a[0] + b[0] + c[0]) / 3.0
    cy = (a[1] + b[1] + c[1]) / 3.0
    cz = (a[2] + b[2] + c[2]) / 3.0
    h2 = max(_dist2(a, b), _dist2(b, c), _dist2(c, a))
    return cx, cy, cz, TRIANGLE_FAR_RATIO * TRIANGLE_FAR_RATIO * h2


@njit(cache=True)
def _triangle_is_far(p, a, b, c):
    """|p - centroid| > TRIANGLE_FAR_RATIO * (longest edge)."""
    cx, cy, cz, far2 = _triangle_far_data(a, b, c)
    cx, cy, cz = cx - p[0], cy - p[1], cz - p[2]
    return cx * cx + cy * cy + cz * cz > far2


@njit(cache=True)
def _tet_is_far(p, verts):
    """|p - centroid| > TET_FAR_RATIO * (longest edge)."""
    cx = (verts[0, 0] + verts[1, 0] + verts[2, 0] + verts[3, 0]) / 4.0 - p[0]
    cy = (verts[0, 1] + verts[1, 1] + verts[2, 1] + verts[3, 1]) / 4.0 - p[1]
    cz = (verts[0, 2] + verts[1, 2] + verts[2, 2] + verts[3, 2]) / 4.0 - p[2]
    h2 = 0.0
    for i in range(4):
        for j in range(i):
            h2 = max(h2, _dist2(verts[i], verts[j]))
    return cx * cx + cy * cy + cz * cz > TET_FAR_RATIO * TET_FAR_RATIO * h2


# -------------------------------------------------- triangle, closed form --

@njit(cache=True)
def _edge_potential(p, a, b, nx, ny, nz, d):
    """P0 L of edge a->b (0 on the edge: P0 ln(1/R0) -> 0)."""
    p0, L, _, _, _ = _edge_log(p, a, b, nx, ny, nz, d)
    return p0 * L


@njit(cache=True)
def _add_edge_field(p, a, b, nx, ny, nz, d, scale, out):
    """out += scale * u L of edge a->b: the in-plane part of g is minus the
    in-plane gradient of I, i.e. the boundary integral of u/R (Gauss's
    theorem in the plane; Graglia 1993).  Left out on the edge itself."""
    _, L, ux, uy, uz = _edge_log(p, a, b, nx, ny, nz, d)
    out[0] += scale * L * ux
    out[1] += scale * L * uy
    out[2] += scale * L * uz


@njit(cache=True)
def _triangle_potential_closed(p, a, b, c):
    nx, ny, nz, area2 = _plane(a, b, c)
    if area2 == 0.0:
        return 0.0
    d = (p[0] - a[0]) * nx + (p[1] - a[1]) * ny + (p[2] - a[2]) * nz
    acc = (_edge_potential(p, a, b, nx, ny, nz, d) + _edge_potential(p, b, c, nx, ny, nz, d)
           + _edge_potential(p, c, a, nx, ny, nz, d))
    return acc - abs(d) * abs(_solid_angle(p, a, b, c, d, area2))


@njit(cache=True)
def _add_triangle_field_closed(p, a, b, c, scale, out):
    """out += scale * g(p), closed form."""
    nx, ny, nz, area2 = _plane(a, b, c)
    if area2 == 0.0:
        return
    d = (p[0] - a[0]) * nx + (p[1] - a[1]) * ny + (p[2] - a[2]) * nz
    om = scale * _solid_angle(p, a, b, c, d, area2)
    out[0] += om * nx
    out[1] += om * ny
    out[2] += om * nz
    _add_edge_field(p, a, b, nx, ny, nz, d, scale, out)
    _add_edge_field(p, b, c, nx, ny, nz, d, scale, out)
    _add_edge_field(p, c, a, nx, ny, nz, d, scale, out)


# ----------------------------------------------------- triangle, far field --

@njit(cache=True)
def _triangle_potential_far(p, a, b, c):
    _, _, _, area2 = _plane(a, b, c)
    acc = 0.0
    for k in range(TRI_RULE_WEIGHTS.shape[0]):
        l0, l1, l2 = TRI_RULE_POINTS[k, 0], TRI_RULE_POINTS[k, 1], TRI_RULE_POINTS[k, 2]
        dx = p[0] - (l0 * a[0] + l1 * b[0] + l2 * c[0])
        dy = p[1] - (l0 * a[1] + l1 * b[1] + l2 * c[1])
        dz = p[2] - (l0 * a[2] + l1 * b[2] + l2 * c[2])
        acc += TRI_RULE_WEIGHTS[k] / math.sqrt(dx * dx + dy * dy + dz * dz)
    return 0.5 * area2 * acc


@njit(cache=True)
def _add_triangle_field_far(p, a, b, c, scale, out):
    _, _, _, area2 = _plane(a, b, c)
    gx = gy = gz = 0.0
    for k in range(TRI_RULE_WEIGHTS.shape[0]):
        l0, l1, l2 = TRI_RULE_POINTS[k, 0], TRI_RULE_POINTS[k, 1], TRI_RULE_POINTS[k, 2]
        dx = p[0] - (l0 * a[0] + l1 * b[0] + l2 * c[0])
        dy = p[1] - (l0 * a[1] + l1 * b[1] + l2 * c[1])
        dz = p[2] - (l0 * a[2] + l1 * b[2] + l2 * c[2])
        r2 = dx * dx + dy * dy + dz * dz
        w = TRI_RULE_WEIGHTS[k] / (r2 * math.sqrt(r2))
        gx += w * dx
        gy += w * dy
        gz += w * dz
    f = 0.5 * area2 * scale
    out[0] += f * gx
    out[1] += f * gy
    out[2] += f * gz


# ------------------------------------------------------------ triangles --

@njit(cache=True)
def _add_triangle_field(p, a, b, c, scale, out):
    if _triangle_is_far(p, a, b, c):
        _add_triangle_field_far(p, a, b, c, scale, out)
    else:
        _add_triangle_field_closed(p, a, b, c, scale, out)


@njit(cache=True)
def triangle_potential(p, a, b, c):
    """Single-layer potential I(p) = int_T dS'/|p - r'| (m) of the flat
    triangle T = (a, b, c); p, a, b, c are (3,) positions in m.

    Closed form of Wilton et al. (IEEE Trans. Antennas Propag. 1984):
    I = sum_edges P0 ln((R+ + l+)/(R- + l-)) - |d| |Omega|, Omega the solid
    angle (Van Oosterom & Strackee 1983).  Finite and exact everywhere,
    including p on the plane, inside the triangle, on an edge and at a
    vertex: an edge whose line passes through p contributes nothing.  A
    degenerate (zero-area) triangle gives 0.

    Beyond TRIANGLE_FAR_RATIO (50) longest edges from the centroid, Radon's
    7-point degree-5 rule.  Worst relative error measured against the same
    closed form at 40 digits, 1 to 10^6 edge lengths: 7e-14, just inside
    the switch (the closed form alone: 1e-9 at 10^6)."""
    if _triangle_is_far(p, a, b, c):
        return _triangle_potential_far(p, a, b, c)
    return _triangle_potential_closed(p, a, b, c)


@njit(cache=True)
def triangle_field(p, a, b, c):
    """g(p) = int_T (p - r')/|p - r'|^3 dS' = -grad I(p) (dimensionless,
    shape (3,)) of the flat triangle T = (a, b, c), positions in m.

    Normal part: g.n = Omega, the signed solid angle (Van Oosterom &
    Strackee, IEEE Trans. Biomed. Eng. 1983), n = (b-a)x(c-a)/|..|, positive
    for p on the +n side.  In-plane part: sum over edges of u ln((R+ + l+) /
    (R- + l-)), u the outward in-plane edge normal (Wilton et al. 1984;
    Graglia 1993).

    Across the triangle the normal part jumps by 4 pi.  Where the computed
    signed height of p is exactly 0 the normal part returned is 0: the mean
    of the two one-sided limits inside the triangle, and the true value
    outside it.  A point on the plane only up to rounding gets the limit
    from the side it falls on.  On an edge or at a vertex the in-plane part
    is logarithmically infinite; the edges through p are then left out, so
    the result is finite but is not a field value there.

    Beyond TRIANGLE_FAR_RATIO (50) longest edges from the centroid, Radon's
    7-point degree-5 rule.  Worst relative error (vector norm) measured
    against the same closed form at 40 digits, 1 to 10^6 edge lengths:
    9e-14, just inside the switch (the closed form alone: 1.3e-9 at 10^6)."""
    out = np.zeros(3)
    _add_triangle_field(p, a, b, c, 1.0, out)
    return out


# ---------------------------------------------------------- tetrahedron --

@njit(cache=True)
def _tet_volume6(verts):
    """Six times the signed volume of the tetrahedron verts (4, 3)."""
    ax, ay, az = verts[1, 0] - verts[0, 0], verts[1, 1] - verts[0, 1], verts[1, 2] - verts[0, 2]
    bx, by, bz = verts[2, 0] - verts[0, 0], verts[2, 1] - verts[0, 1], verts[2, 2] - verts[0, 2]
    cx, cy, cz = verts[3, 0] - verts[0, 0], verts[3, 1] - verts[0, 1], verts[3, 2] - verts[0, 2]
    return ax * (by * cz - bz * cy) - ay * (bx * cz - bz * cx) + az * (bx * cy - by * cx)


@njit(cache=True)
def _tet_tensor_far(p, verts, out):
    """out += T by quadrature of the Hessian of the tet's Newtonian potential:
    the point dipole tensor (3 s s^T - s^2 I)/(4 pi s^5) at each rule point."""
    scale = abs(_tet_volume6(verts)) / 6.0 * INV_4PI
    xx = yy = zz = xy = xz = yz = 0.0
    for k in range(TET_RULE_WEIGHTS.shape[0]):
        l0, l1, l2, l3 = TET_RULE_POINTS[k, 0], TET_RULE_POINTS[k, 1], TET_RULE_POINTS[k, 2], TET_RULE_POINTS[k, 3]
        sx = p[0] - (l0 * verts[0, 0] + l1 * verts[1, 0] + l2 * verts[2, 0] + l3 * verts[3, 0])
        sy = p[1] - (l0 * verts[0, 1] + l1 * verts[1, 1] + l2 * verts[2, 1] + l3 * verts[3, 1])
        sz = p[2] - (l0 * verts[0, 2] + l1 * verts[1, 2] + l2 * verts[2, 2] + l3 * verts[3, 2])
        r2 = sx * sx + sy * sy + sz * sz
        w = TET_RULE_WEIGHTS[k] / (r2 * r2 * math.sqrt(r2))
        xx += w * (3.0 * sx * sx - r2)
        yy += w * (3.0 * sy * sy - r2)
        zz += w * (3.0 * sz * sz - r2)
        xy += w * 3.0 * sx * sy
        xz += w * 3.0 * sx * sz
        yz += w * 3.0 * sy * sz
    out[0, 0] += scale * xx
    out[1, 1] += scale * yy
    out[2, 2] += scale * zz
    out[0, 1] += scale * xy
    out[1, 0] += scale * xy
    out[0, 2] += scale * xz
    out[2, 0] += scale * xz
    out[1, 2] += scale * yz
    out[2, 1] += scale * yz


@njit(cache=True)
def tet_tensor(p, verts):
    """Interaction tensor T (3x3, dimensionless) of a tetrahedron: the field
    at p (m) of the tetrahedron verts (4, 3) (m), uniformly magnetised with
    M, is H(p) = T @ M (A/m for M in A/m).

    T = (1/4pi) sum_faces g_f n_f^T with n_f the outward unit normals
    (field of the surface charges sigma_f = M.n_f), whatever the vertex
    order.  T is the Hessian of the tet's Newtonian potential over 4pi, so
    it is symmetric and has trace -1 inside, 0 outside.  A flat
    (zero-volume) tetrahedron gives 0.  On a face T is the
    mean of the inside and outside values (see triangle_field); at an edge
    or a vertex H is infinite and the value returned is not a field value.

    Beyond TET_FAR_RATIO (12) longest edges from the centroid: Stroud's
    conical product rule (64 points, degree 7) applied to the point dipole
    tensor, which keeps the dipole term about the centroid exact.  Worst
    relative error (Frobenius norm) measured against the same closed form
    at 40 digits, 1 to 10^6 edge lengths: 8e-13 just inside the switch,
    1e-15 beyond it (the closed form alone: 5e-3 at 10^6).  The closed form
    loses more on flat elements (2.4e-12 for height/edge = 0.1)."""
    out = np.zeros((3, 3))
    if _tet_volume6(verts) == 0.0:
        return out
    if _tet_is_far(p, verts):
        _tet_tensor_far(p, verts, out)
        return out
    g = np.empty(3)
    for f in range(4):
        # Face opposite vertex f; g_f does not depend on the face orientation,
        # only n_f must point away from the opposite vertex.
        a, b, c = verts[(f + 1) % 4], verts[(f + 2) % 4], verts[(f + 3) % 4]
        nx, ny, nz, _ = _plane(a, b, c)
        side = (verts[f, 0] - a[0]) * nx + (verts[f, 1] - a[1]) * ny + (verts[f, 2] - a[2]) * nz
        sgn = -INV_4PI if side > 0.0 else INV_4PI
        g[:] = 0.0
        _add_triangle_field_closed(p, a, b, c, 1.0, g)
        for i in range(3):
            out[i, 0] += sgn * g[i] * nx
            out[i, 1] += sgn * g[i] * ny
            out[i, 2] += sgn * g[i] * nz
    return out


# ------------------------------------------------------------- batches --

@njit(parallel=True, cache=True)
def face_field_at_points(points, faces, sigma):
    """H (n, 3), A/m, at points (n, 3), m, of uniform surface charges sigma
    (m,), A/m, on triangles faces (m, 3, 3), m:
    H = (1/4pi) sum_f sigma_f g_f(p), g_f as in triangle_field.  The vertex
    order (face normal) does not enter: g_f is a property of the surface,
    sigma_f the charge density on it (for a magnetised body, M.n with n the
    outward normal).  Faces with sigma_f = 0 are skipped."""
    H = np.zeros((points.shape[0], 3))
    for i in prange(points.shape[0]):
        h = np.zeros(3)
        for f in range(faces.shape[0]):
            if sigma[f] != 0.0:
                _add_triangle_field(points[i], faces[f, 0], faces[f, 1], faces[f, 2],
                                    sigma[f] * INV_4PI, h)
        H[i] = h
    return H


@njit(parallel=True, cache=True)
def face_potential_at_points(points, faces, sigma):
    """Scalar potential phi (n,), A, at points (n, 3), m, of uniform surface
    charges sigma (m,), A/m, on triangles faces (m, 3, 3), m:
    phi = (1/4pi) sum_f sigma_f I_f(p), I_f as in triangle_potential."""
    phi = np.zeros(points.shape[0])
    for i in prange(points.shape[0]):
        acc = 0.0
        for f in range(faces.shape[0]):
            if sigma[f] != 0.0:
                acc += sigma[f] * triangle_potential(points[i], faces[f, 0], faces[f, 1], faces[f, 2])
        phi[i] = acc * INV_4PI
    return phi


@njit(parallel=True, cache=True)
def face_potentials_at_points(points, faces, sigmas):
    """Potentials (n, k), A, at points (n, 3), m, of k sets of uniform surface
    charges sigmas (m, k), A/m, on the same triangles faces (m, 3, 3), m: each
    triangle integral is evaluated once for all k charge sets."""
    k = sigmas.shape[1]
    phi = np.zeros((points.shape[0], k))
    for i in prange(points.shape[0]):
        for f in range(faces.shape[0]):
            s = triangle_potential(points[i], faces[f, 0], faces[f, 1], faces[f, 2]) * INV_4PI
            for j in range(k):
                phi[i, j] += sigmas[f, j] * s
    return phi


# ------------------------------------------- triangle meshes, shared edges --
#
# Seen from one point p, the closed form of a face is (Wilton et al. 1984)
#     I_f = sum_edges P0_e L_e - |d| |Omega|.
# L_e depends on p and the edge's segment only (not on the face, nor on the
# direction the face runs along it: _log_ratio is symmetric, so no orientation
# sign is needed), and |p - v| only on the vertex.  In a tetrahedral mesh each
# edge is shared by ~5 faces and each node by ~25, so a first pass evaluates L
# once per edge and |p - v| once per node, and a second pass assembles every
# face from them: per face there remain the height, three dot products for P0,
# the far test and the solid angle's atan2, and no square root.  P0, d, the
# solid angle and the far switch are the same floating-point operations as in
# triangle_potential; only R0^2 inside L (the squared distance to the edge
# line, used where l < 0) comes from the edge instead of the face, so the
# results agree to rounding.
#
# Measured on one thread (CPU time, sphere meshes of 5k to 67k faces): 42-60
# ns per (point, face) against 290-330 ns for triangle_potential.  Two
# alternatives were slower: computing each L on first use inside the face loop
# (1.8x: the data-dependent branch mispredicts), and rebuilding u from the
# shared edge tangent instead of storing it per face (10-30 %: the loop is
# bound by arithmetic, not by memory).


class TriangleMesh(NamedTuple):
    """Indexed triangle mesh with the per-face and per-edge data the shared-edge
    evaluation needs (built by :func:`triangle_mesh`; lengths in m).

    faces (nf, 3) node indices; face_edges (nf, 3) index of edges a->b, b->c,
    c->a in `edges` (ne, 2), the unique sorted node pairs; edge_length (ne,)
    and edge_tangent (ne, 3) of each edge run from its lower to its higher
    node, edge_midpoints (ne, 3); normals (nf, 3) and area2 (nf,) (twice the
    area, m^2) as in triangle_potential; edge_normals (nf, 3, 3) the in-plane
    outward unit normals u of a->b, b->c, c->a; centroids (nf, 3) and far2
    (nf,), m^2, the squared distance beyond which a face is integrated by
    quadrature."""
    nodes: np.ndarray
    faces: np.ndarray
    face_edges: np.ndarray
    edges: np.ndarray
    edge_length: np.ndarray
    edge_tangent: np.ndarray
    edge_midpoints: np.ndarray
    normals: np.ndarray
    area2: np.ndarray
    edge_normals: np.ndarray
    centroids: np.ndarray
    far2: np.ndarray


def triangle_mesh(nodes, faces) -> TriangleMesh:
    """Edges and per-face data of the triangles `faces` (nf, 3) (node indices,
    any orientation: the potential does not depend on it) over `nodes` (n, 3),
    m, for :func:`mesh_potentials_at_points`."""
    nodes = np.ascontiguousarray(nodes, dtype=float)
    faces = np.ascontiguousarray(faces, dtype=np.int64)
    pairs = np.sort(faces[:, [0, 1, 1, 2, 2, 0]].reshape(-1, 2), axis=1)
    edges, inverse = np.unique(pairs, axis=0, return_inverse=True)
    face_edges = np.ascontiguousarray(inverse.reshape(-1, 3))
    return TriangleMesh(nodes, faces, face_edges, np.ascontiguousarray(edges),
                        *_mesh_geometry(nodes, faces, edges))


@njit(cache=True)
def _mesh_geometry(nodes, faces, edges):
    """Per-edge and per-face arrays of TriangleMesh, from the same helpers as
    the single-triangle kernels (hence bit-identical to what they compute)."""
    ne, nf = edges.shape[0], faces.shape[0]
    length, tangent, mid = np.empty(ne), np.empty((ne, 3)), np.empty((ne, 3))
    for e in range(ne):
        a, b = nodes[edges[e, 0]], nodes[edges[e, 1]]
        mid[e] = 0.5 * (a + b)
        if _dist2(a, b) == 0.0:              # only on zero-area faces: never used
            length[e], tangent[e] = 0.0, 0.0
            continue
        length[e], tangent[e, 0], tangent[e, 1], tangent[e, 2] = _edge_tangent(a, b)
    normals, area2 = np.empty((nf, 3)), np.empty(nf)
    edge_normals, centroids, far2 = np.zeros((nf, 3, 3)), np.empty((nf, 3)), np.empty(nf)
    for f in range(nf):
        a, b, c = nodes[faces[f, 0]], nodes[faces[f, 1]], nodes[faces[f, 2]]
        nx, ny, nz, area2[f] = _plane(a, b, c)
        normals[f, 0], normals[f, 1], normals[f, 2] = nx, ny, nz
        centroids[f, 0], centroids[f, 1], centroids[f, 2], far2[f] = _triangle_far_data(a, b, c)
        if area2[f] == 0.0:
            continue
        for k in range(3):
            _, _, _, _, ux, uy, uz = _edge_frame(nodes[faces[f, k]], nodes[faces[f, (k + 1) % 3]],
                                                 nx, ny, nz)
            edge_normals[f, k, 0], edge_normals[f, k, 1], edge_normals[f, k, 2] = ux, uy, uz
    return length, tangent, mid, normals, area2, edge_normals, centroids, far2


@njit(cache=True)
def edge_reach2(mesh, active):
    """Squared radius (ne,), m^2, about each edge's midpoint beyond which
    every face on the edge that is active (active (nf,) bool) and not flat is
    surely far; -1 for edges of no such face, whose logarithm is then never
    computed (zero-length edges among them).  |p - c_f| >= |p - m_e| -
    |m_e - c_f| > sqrt(far2_f) whenever |p - m_e| > sqrt(far2_f) + |m_e - c_f|;
    the 1e-6 margin covers rounding, so an edge whose logarithm is skipped is
    never read by a closed-form face."""
    reach = np.full(mesh.edges.shape[0], -1.0)
    for f in range(mesh.faces.shape[0]):
        if not active[f] or mesh.area2[f] == 0.0:
            continue
        for k in range(3):
            e = mesh.face_edges[f, k]
            r = (math.sqrt(mesh.far2[f]) + math.sqrt(_dist2(mesh.edge_midpoints[e], mesh.centroids[f])))
            reach[e] = max(reach[e], r * (1.0 + 1e-6))
    for e in range(reach.shape[0]):
        if reach[e] > 0.0:
            reach[e] *= reach[e]
    return reach


@njit(cache=True)
def _segment_log(p, a, b, le, tx, ty, tz, ra, rb):
    """L of the segment a->b (unit tangent t, length le) seen from p, with
    ra = |a - p| and rb = |b - p| given (see _log_ratio).  R0^2 = |q x t|^2
    with q from the nearer end, the smaller of the two cancellations."""
    qax, qay, qaz = a[0] - p[0], a[1] - p[1], a[2] - p[2]
    qbx, qby, qbz = b[0] - p[0], b[1] - p[1], b[2] - p[2]
    lm = qax * tx + qay * ty + qaz * tz
    lp = qbx * tx + qby * ty + qbz * tz
    if ra <= rb:
        qx, qy, qz = qax, qay, qaz
    else:
        qx, qy, qz = qbx, qby, qbz
    cx, cy, cz = qy * tz - qz * ty, qz * tx - qx * tz, qx * ty - qy * tx
    return _log_ratio(le, lm, lp, ra, rb, cx * cx + cy * cy + cz * cz)


@njit(cache=True)
def mesh_potentials_at(p, mesh, active, reach2, dist, L, out):
    """out (nf,) = I_f(p), m, the single-layer potential of every face of the
    TriangleMesh `mesh` with active[f] (0 for the others) seen from the point
    p (3,), m: the numbers of triangle_potential up to rounding, with the same
    far-field switch.  reach2 from edge_reach2(mesh, active); the scratch
    dist (n_nodes,) and L (ne,) is overwritten."""
    nodes, faces, edges = mesh.nodes, mesh.faces, mesh.edges
    px, py, pz = p[0], p[1], p[2]
    for v in range(nodes.shape[0]):
        dx, dy, dz = nodes[v, 0] - px, nodes[v, 1] - py, nodes[v, 2] - pz
        dist[v] = math.sqrt(dx * dx + dy * dy + dz * dz)
    mid, tangent, length = mesh.edge_midpoints, mesh.edge_tangent, mesh.edge_length
    for e in range(edges.shape[0]):
        dx, dy, dz = mid[e, 0] - px, mid[e, 1] - py, mid[e, 2] - pz
        if dx * dx + dy * dy + dz * dz > reach2[e]:
            continue                         # all its active faces are far
        i0, i1 = edges[e, 0], edges[e, 1]
        L[e] = _segment_log(p, nodes[i0], nodes[i1], length[e], tangent[e, 0], tangent[e, 1],
                            tangent[e, 2], dist[i0], dist[i1])
    centroids, far2, area2, normals = mesh.centroids, mesh.far2, mesh.area2, mesh.normals
    face_edges, u = mesh.face_edges, mesh.edge_normals
    for f in range(faces.shape[0]):
        out[f] = 0.0
        if not active[f]:
            continue
        ia, ib, ic = faces[f, 0], faces[f, 1], faces[f, 2]
        cx, cy, cz = centroids[f, 0] - px, centroids[f, 1] - py, centroids[f, 2] - pz
        if cx * cx + cy * cy + cz * cz > far2[f]:
            out[f] = _triangle_potential_far(p, nodes[ia], nodes[ib], nodes[ic])
            continue
        if area2[f] == 0.0:
            continue
        r1x, r1y, r1z = nodes[ia, 0] - px, nodes[ia, 1] - py, nodes[ia, 2] - pz
        r2x, r2y, r2z = nodes[ib, 0] - px, nodes[ib, 1] - py, nodes[ib, 2] - pz
        r3x, r3y, r3z = nodes[ic, 0] - px, nodes[ic, 1] - py, nodes[ic, 2] - pz
        d = (px - nodes[ia, 0]) * normals[f, 0] + (py - nodes[ia, 1]) * normals[f, 1] \
            + (pz - nodes[ia, 2]) * normals[f, 2]
        # P0 of each edge is (start vertex - p).u, as in _edge_log.
        acc = ((r1x * u[f, 0, 0] + r1y * u[f, 0, 1] + r1z * u[f, 0, 2]) * L[face_edges[f, 0]]
               + (r2x * u[f, 1, 0] + r2y * u[f, 1, 1] + r2z * u[f, 1, 2]) * L[face_edges[f, 1]]
               + (r3x * u[f, 2, 0] + r3y * u[f, 2, 1] + r3z * u[f, 2, 2]) * L[face_edges[f, 2]])
        om = _solid_angle_of(r1x, r1y, r1z, r2x, r2y, r2z, r3x, r3y, r3z,
                             dist[ia], dist[ib], dist[ic], d, area2[f])
        out[f] = acc - abs(d) * abs(om)


@njit(cache=True)
def mesh_scratch(mesh):
    """Per-thread scratch of mesh_potentials_at: dist (n_nodes,), L (ne,)
    and out (nf,)."""
    return np.empty(mesh.nodes.shape[0]), np.empty(mesh.edges.shape[0]), np.empty(mesh.faces.shape[0])


#: Points per parallel chunk of the mesh batches: each chunk allocates its own
#: scratch once.
MESH_ROW_BLOCK = 16


@njit(parallel=True, cache=True)
def mesh_potentials_at_points(points, mesh, sigmas):
    """Potentials (n, k), A, at points (n, 3), m, of k sets of uniform surface
    charges sigmas (nf, k), A/m, on the faces of `mesh` (a TriangleMesh):
    the numbers of face_potentials_at_points on nodes[faces] up to rounding,
    computed with each edge's logarithm shared by the faces around it."""
    n, k = points.shape[0], sigmas.shape[1]
    active = np.zeros(sigmas.shape[0], dtype=np.bool_)
    for f in range(sigmas.shape[0]):
        for j in range(k):
            active[f] = active[f] or sigmas[f, j] != 0.0
    reach2 = edge_reach2(mesh, active)
    phi = np.zeros((n, k))
    for blk in prange((n + MESH_ROW_BLOCK - 1) // MESH_ROW_BLOCK):
        dist, L, s = mesh_scratch(mesh)
        for i in range(blk * MESH_ROW_BLOCK, min(n, (blk + 1) * MESH_ROW_BLOCK)):
            mesh_potentials_at(points[i], mesh, active, reach2, dist, L, s)
            for f in range(s.shape[0]):
                sf = s[f] * INV_4PI
                for j in range(k):
                    phi[i, j] += sigmas[f, j] * sf
    return phi


@njit(parallel=True, cache=True)
def mesh_single_layer_matrix(points, mesh):
    """S (n, nf) with S[i, f] = I_f(points[i]) / 4pi, m, for every face of the
    TriangleMesh (the dense single-layer operator, for nonlinear solves that
    re-use it at every Newton step)."""
    n, nf = points.shape[0], mesh.faces.shape[0]
    active = np.ones(nf, dtype=np.bool_)
    reach2 = edge_reach2(mesh, active)
    S = np.empty((n, nf))
    for blk in prange((n + MESH_ROW_BLOCK - 1) // MESH_ROW_BLOCK):
        dist, L, s = mesh_scratch(mesh)
        for i in range(blk * MESH_ROW_BLOCK, min(n, (blk + 1) * MESH_ROW_BLOCK)):
            mesh_potentials_at(points[i], mesh, active, reach2, dist, L, s)
            for f in range(nf):
                S[i, f] = s[f] * INV_4PI
    return S
