"""Triangle and tetrahedron kernels against sources outside the code under test:
adaptive numerical quadrature (scipy), the same closed forms evaluated at 40
digits (mpmath), elementary closed forms, Gauss's theorem and the point
dipole field."""
import itertools
import math

import mpmath as mp
import numpy as np
import pytest
from scipy import integrate

from volmag import kernels as K

TRI = np.array([[0.0, 0.0, 0.0], [1.0, 0.2, 0.0], [0.3, 0.9, 0.1]])
TET = np.array([[0.0, 0.0, 0.0], [1.0, 0.1, 0.0], [0.2, 0.9, 0.1], [0.3, 0.2, 0.8]])


def longest_edge(v):
    return max(np.linalg.norm(v[i] - v[j]) for i in range(len(v)) for j in range(i))


def unit_dirs(n, seed):
    d = np.random.default_rng(seed).normal(size=(n, 3))
    return d / np.linalg.norm(d, axis=1)[:, None]


def outward_faces(v):
    """Faces of tet v as (a, b, c, outward unit normal)."""
    out = []
    for f in range(4):
        a, b, c = (v[(f + k) % 4] for k in (1, 2, 3))
        n = np.cross(b - a, c - a)
        n /= np.linalg.norm(n)
        if np.dot(v[f] - a, n) > 0:
            a, c, n = c, a, -n
        out.append((a, b, c, n))
    return out


def rel(x, ref):
    return np.linalg.norm(np.asarray(x) - ref) / np.linalg.norm(ref)


# ------------------------------------------------------------ references --

def quad_triangle(p, a, b, c, vector=False):
    """int_T 1/R (or (p - r')/R^3) by scipy dblquad, singularity removed by
    splitting T into three signed sub-triangles with apex at the projection
    of p and mapping each to the unit square (Duffy, SIAM J. Numer. Anal.
    19, 1260, 1982): the Jacobian u cancels 1/R at the apex."""
    n = np.cross(b - a, c - a)
    n /= np.linalg.norm(n)
    rho = p - np.dot(p - a, n) * n
    total = np.zeros(3) if vector else 0.0
    for r1, r2 in ((a, b), (b, c), (c, a)):
        jac = np.dot(np.cross(r1 - rho, r2 - rho), n)   # signed 2 x area
        if abs(jac) < 1e-14:
            continue

        def point(v, u):
            return rho + u * ((r1 - rho) + v * (r2 - r1))

        if vector:
            for k in range(3):
                def f(v, u, k=k):
                    d = p - point(v, u)
                    return u * d[k] / np.linalg.norm(d) ** 3
                total[k] += jac * integrate.dblquad(f, 0, 1, 0, 1, epsabs=1e-13, epsrel=1e-12)[0]
        else:
            def f(v, u):
                return u / np.linalg.norm(p - point(v, u))
            total += jac * integrate.dblquad(f, 0, 1, 0, 1, epsabs=1e-13, epsrel=1e-12)[0]
    return total


def mp_triangle(p, a, b, c, dps=40, as_mp=False):
    """I and g of Wilton et al. (IEEE Trans. Antennas Propag. 1984) evaluated
    at `dps` digits in its textbook form: ln((R+ + l+)/(R- + l-)) edge terms
    and the arctangent sum for the solid angle (not Van Oosterom-Strackee),
    from the float64 inputs taken as exact.  Returns (I, g) as floats, or
    (g, n) at full precision with as_mp."""
    with mp.workdps(dps):
        P, A, B, C = ([mp.mpf(float(t)) for t in x] for x in (p, a, b, c))
        sub = lambda x, y: [x[i] - y[i] for i in range(3)]
        dot = lambda x, y: sum(x[i] * y[i] for i in range(3))
        cross = lambda x, y: [x[1] * y[2] - x[2] * y[1], x[2] * y[0] - x[0] * y[2], x[0] * y[1] - x[1] * y[0]]
        unit = lambda x: [t / mp.sqrt(dot(x, x)) for t in x]
        n = unit(cross(sub(B, A), sub(C, A)))
        d = dot(sub(P, A), n)
        rho = [P[i] - d * n[i] for i in range(3)]
        I, beta, g = mp.mpf(0), mp.mpf(0), [mp.mpf(0)] * 3
        for r1, r2 in ((A, B), (B, C), (C, A)):
            t = unit(sub(r2, r1))
            u = cross(t, n)
            lm, lp = dot(sub(r1, rho), t), dot(sub(r2, rho), t)
            p0 = dot(sub(r1, rho), u)
            r0s = p0 ** 2 + d ** 2
            rm, rp = mp.sqrt(dot(sub(P, r1), sub(P, r1))), mp.sqrt(dot(sub(P, r2), sub(P, r2)))
            rl = lambda r, l: r + l if l >= 0 else r0s / (r - l)    # same number, no cancellation
            L = mp.log(rl(rp, lp) / rl(rm, lm))
            I += p0 * L
            g = [g[i] + u[i] * L for i in range(3)]
            beta += mp.atan(p0 * lp / (r0s + abs(d) * rp)) - mp.atan(p0 * lm / (r0s + abs(d) * rm))
        I -= abs(d) * beta
        g = [g[i] + mp.sign(d) * beta * n[i] for i in range(3)]
        if as_mp:
            return g, n
        return float(I), np.array([float(x) for x in g])


def mp_tet(p, v, dps=40):
    """(1/4pi) sum_f g_f n_f^T with g_f from mp_triangle, all at `dps` digits
    (the face fields cancel to one order less: normals must not be rounded)."""
    with mp.workdps(dps):
        T = mp.matrix(3, 3)
        for a, b, c, _ in outward_faces(v):
            g, n = mp_triangle(p, a, b, c, dps=dps, as_mp=True)
            for i in range(3):
                for j in range(3):
                    T[i, j] += g[i] * n[j] / (4 * mp.pi)
        return np.array(T.tolist(), dtype=float)


def dipole_tensor(p, v):
    """Point dipole at the centroid (e.g. Jackson, Classical Electrodynamics,
    3rd ed. 1999, eq. 5.56): V (3 r r^T - r^2 I) / (4 pi r^5)."""
    vol = abs(np.linalg.det(v[1:] - v[0])) / 6
    r = p - v.mean(axis=0)
    r2 = r @ r
    return vol * (3 * np.outer(r, r) - r2 * np.eye(3)) / (4 * math.pi * r2 ** 2.5)


# ------------------------------------------------------- quadrature rules --

def simplex_monomial_mean(alpha):
    """Mean over a simplex of prod lambda_i^alpha_i = dim! prod(alpha_i!) /
    (|alpha| + dim)! (the Dirichlet integral; e.g. Zienkiewicz & Taylor,
    The Finite Element Method, from memory)."""
    dim = len(alpha) - 1
    return math.factorial(dim) * math.prod(map(math.factorial, alpha)) / math.factorial(sum(alpha) + dim)


@pytest.mark.parametrize("points, weights, degree", [
    (K.TRI_RULE_POINTS, K.TRI_RULE_WEIGHTS, 5),
    (K.TET_RULE_POINTS, K.TET_RULE_WEIGHTS, 7),
])
def test_quadrature_rules_reach_their_degree(points, weights, degree):
    dim = points.shape[1]
    for q in (degree, degree + 1):
        worst = max(abs(weights @ np.prod(points ** np.array(al), axis=1) - simplex_monomial_mean(al))
                    for al in itertools.product(range(q + 1), repeat=dim) if sum(al) == q)
        if q == degree:
            assert worst < 1e-15
        else:
            assert worst > 1e-6           # and no more than that
    assert np.all(weights > 0) and np.all(points >= 0)


# ------------------------------------------------------ triangle_potential --

SPECIAL_POINTS = {
    "generic above": np.array([0.3, 0.2, 0.5]),
    "generic aside": np.array([2.0, -1.0, 0.3]),
    "close to plane": np.array([0.4, 0.3, 0.03]),
    "vertex a": TRI[0],
    "vertex b": TRI[1],
    "vertex c": TRI[2],
    "edge ab": 0.3 * TRI[0] + 0.7 * TRI[1],
    "edge ca": 0.5 * TRI[2] + 0.5 * TRI[0],
    "inside": TRI.mean(axis=0),
    "plane outside": 1.6 * TRI[1] - 0.3 * TRI[0] - 0.3 * TRI[2],
    "edge line beyond b": 1.5 * TRI[1] - 0.5 * TRI[0],
    "above vertex": TRI[2] + np.array([0.0, 0.0, 0.2]),
}


@pytest.mark.parametrize("where", SPECIAL_POINTS)
def test_triangle_potential_matches_quadrature(where):
    # scipy dblquad with the Duffy (1982) transform
    p = SPECIAL_POINTS[where]
    got = K.triangle_potential(p, *TRI)
    assert np.isfinite(got)
    assert got == pytest.approx(quad_triangle(p, *TRI), rel=1e-10)


def test_potential_at_right_angle_vertex_and_rectangle_corner():
    # Polar integration about the point (elementary): an edge at distance h,
    # seen from the foot of the perpendicular over tangents t1, t2, adds
    # h (asinh t1 + asinh t2).  Right triangle with legs a, b at its right
    # angle: h = ab/c, t = a/b and b/a.  A rectangle a x b at a corner (the
    # right triangle plus its complement) gives a asinh(b/a) + b asinh(a/b)
    # (e.g. Durand, Electrostatique, 1964; from memory).
    a, b = 0.7, 1.9
    tri = np.array([[0.0, 0.0, 0.0], [a, 0.0, 0.0], [0.0, b, 0.0]])
    ref = a * b / math.hypot(a, b) * (math.asinh(a / b) + math.asinh(b / a))
    for i in range(3):     # every cyclic vertex order
        assert K.triangle_potential(tri[0], *np.roll(tri, i, axis=0)) == pytest.approx(ref, rel=1e-14)
    other = np.array([[a, 0.0, 0.0], [a, b, 0.0], [0.0, b, 0.0]])
    rect = K.triangle_potential(tri[0], *tri) + K.triangle_potential(tri[0], *other)
    assert rect == pytest.approx(a * math.asinh(b / a) + b * math.asinh(a / b), rel=1e-14)


def test_potential_at_centre_of_equilateral_triangle():
    # Same polar integration: three edges at the inradius s/(2 sqrt 3),
    # each seen over +-60 degrees: I = 6 s/(2 sqrt 3) asinh(sqrt 3)
    # = sqrt(3) s ln(2 + sqrt 3).
    s = 2.5
    tri = np.array([[0.0, 0.0, 0.0], [s, 0.0, 0.0], [s / 2, s * math.sqrt(3) / 2, 0.0]]) + [0.1, -2.0, 3.0]
    ref = math.sqrt(3) * s * math.log(2 + math.sqrt(3))
    assert K.triangle_potential(tri.mean(axis=0), *tri) == pytest.approx(ref, rel=1e-14)


def test_potential_finite_on_random_vertices_and_edges():
    # The collocation points of a mesh are triangle vertices: every vertex,
    # and points on edges, must give the quadrature value (scipy, Duffy 1982).
    rng = np.random.default_rng(5)
    for _ in range(3):
        tri = rng.normal(size=(3, 3))
        for p in (*tri, 0.25 * tri[1] + 0.75 * tri[2]):
            got = K.triangle_potential(p, *tri)
            assert got == pytest.approx(quad_triangle(p, *tri), rel=1e-10)


def test_potential_scales_as_length_and_degenerate_is_zero():
    # Dimensional analysis: I(s p; s T) = s I(p; T).
    p = np.array([0.3, -0.4, 0.7])
    for s in (1e-6, 1e3):
        assert K.triangle_potential(s * p, *(s * TRI)) == pytest.approx(s * K.triangle_potential(p, *TRI), rel=1e-13)
    flat = np.array([[0.0, 0, 0], [1.0, 1, 1], [2.0, 2, 2]])
    assert K.triangle_potential(p, *flat) == 0.0
    assert np.all(K.triangle_field(p, *flat) == 0.0)


@pytest.mark.parametrize("r", [0.5, 3.0, 30.0, 300.0, 1e4, 1e6])
def test_triangle_against_40_digit_closed_form(r):
    # mpmath at 40 digits (same closed form, textbook arrangement).
    c, h = TRI.mean(axis=0), longest_edge(TRI)
    dirs = np.vstack([unit_dirs(4, 11), [[0.6, 0.8, 0.0]]])      # incl. in the plane
    for d in dirs:
        p = c + r * h * d
        I, g = mp_triangle(p, *TRI)
        assert K.triangle_potential(p, *TRI) == pytest.approx(I, rel=2e-13)
        assert rel(K.triangle_field(p, *TRI), g) < 2e-13


def test_triangle_close_to_edges_and_vertices_against_40_digits():
    # mpmath at 40 digits.  At a distance delta from an edge or vertex the
    # rounding of p - r_i alone costs ~ eps * size / delta (conditioning).
    n = np.cross(TRI[1] - TRI[0], TRI[2] - TRI[0])
    n /= np.linalg.norm(n)
    mid = 0.5 * (TRI[0] + TRI[1])
    u = np.cross(TRI[1] - TRI[0], n)
    u /= np.linalg.norm(u)                      # in-plane, out of the triangle
    delta = 1e-6
    off_plane = [mid + delta * n, mid - delta * (u + n) / math.sqrt(2), TRI[2] + delta * n,
                 1.5 * TRI[1] - 0.5 * TRI[0] + delta * n]
    # In the plane (up to rounding) the side, hence the normal part, is
    # undefined inside the triangle: compare the in-plane part there.
    in_plane = [mid + delta * u, mid - delta * u, TRI[2] + delta * (TRI.mean(axis=0) - TRI[2])]
    drop_normal = np.eye(3) - np.outer(n, n)
    for p in off_plane + in_plane:
        I, g = mp_triangle(p, *TRI)
        assert K.triangle_potential(p, *TRI) == pytest.approx(I, rel=1e-12)
        P = np.eye(3) if any(p is q for q in off_plane) else drop_normal
        assert rel(P @ K.triangle_field(p, *TRI), P @ g) < 1e-9


# ---------------------------------------------------------- triangle_field --

@pytest.mark.parametrize("where", ["generic above", "generic aside", "close to plane", "above vertex",
                                   "plane outside", "edge line beyond b"])
def test_triangle_field_is_minus_gradient_of_potential(where):
    # Central differences of triangle_potential, Richardson-extrapolated.
    p = SPECIAL_POINTS[where]
    g = K.triangle_field(p, *TRI)
    grad = np.zeros(3)
    for k in range(3):
        e = np.eye(3)[k]
        cd = lambda s: (K.triangle_potential(p + s * e, *TRI) - K.triangle_potential(p - s * e, *TRI)) / (2 * s)
        grad[k] = (4 * cd(5e-4) - cd(1e-3)) / 3
    assert rel(g, -grad) < 1e-8


@pytest.mark.parametrize("where", ["generic above", "close to plane", "generic aside"])
def test_triangle_field_matches_quadrature(where):
    # scipy dblquad of (p - r')/R^3, Duffy (1982) transform.
    p = SPECIAL_POINTS[where]
    assert rel(K.triangle_field(p, *TRI), quad_triangle(p, *TRI, vector=True)) < 1e-9


def test_solid_angles_of_closed_surface():
    # Gauss's theorem: the outward solid angles of a closed surface add up
    # to -4 pi seen from inside (g.n_out < 0 there) and 0 from outside.
    rng = np.random.default_rng(3)
    for _ in range(20):
        lam = rng.dirichlet(np.ones(4))
        inside = lam @ TET
        outside = TET.mean(axis=0) + rng.normal(size=3) * 2.0
        for p, ref in ((inside, -4 * math.pi), (outside, 0.0)):
            total = sum(K.triangle_field(p, a, b, c) @ n for a, b, c, n in outward_faces(TET))
            if ref == 0.0 and np.all(np.linalg.solve((TET[1:] - TET[0]).T, p - TET[0]) >= 0):
                continue        # the random 'outside' point fell inside
            assert total == pytest.approx(ref, abs=1e-12)


def test_normal_part_on_and_near_the_plane():
    # One-sided limits of the solid angle (Van Oosterom & Strackee 1983):
    # +-2 pi just above/below the interior, 0 outside; 0 (their mean) on it.
    n = np.cross(TRI[1] - TRI[0], TRI[2] - TRI[0])
    n /= np.linalg.norm(n)
    c = TRI.mean(axis=0)
    assert K.triangle_field(c + 1e-12 * n, *TRI) @ n == pytest.approx(2 * math.pi, rel=1e-9)
    assert K.triangle_field(c - 1e-12 * n, *TRI) @ n == pytest.approx(-2 * math.pi, rel=1e-9)
    assert abs(K.triangle_field(SPECIAL_POINTS["plane outside"] + 1e-12 * n, *TRI) @ n) < 1e-9
    flat = TRI * [1.0, 1.0, 0.0]                   # in z = 0: heights are exactly 0
    for p in (flat.mean(axis=0), flat[1], 0.5 * (flat[0] + flat[2])):
        g = K.triangle_field(p, *flat)
        assert np.all(np.isfinite(g)) and g[2] == 0.0


# -------------------------------------------------------------- tet_tensor --

def test_trace_minus_one_inside_zero_outside():
    # T = Hess(Newtonian potential)/4pi: Laplacian -4pi inside, 0 outside.
    # A distance delta from an edge or vertex costs ~ eps * size / delta
    # (rounding of p - r_i): 1e-7 size leaves ~1e-9.
    rng = np.random.default_rng(7)
    for l in rng.dirichlet(np.ones(4), size=10):
        assert np.trace(K.tet_tensor(l @ TET, TET)) == pytest.approx(-1.0, abs=1e-13)
    e = 1e-7
    near = [[1 - 3 * e, e, e, e], [e, e, e, 1 - 3 * e],      # vertices
            [0.3, 0.3, 0.4 - e, e],                          # a face
            [0.5 - e, 0.5 - e, e, e], [e, 0.5 - e, 0.5 - e, e]]   # edges
    for l in np.array(near):
        assert np.trace(K.tet_tensor(l @ TET, TET)) == pytest.approx(-1.0, abs=1e-9)
        l_out = l.copy()
        l_out[l_out.argmin()] = -e
        l_out /= l_out.sum()
        assert abs(np.trace(K.tet_tensor(l_out @ TET, TET))) < 1e-9
    for r in (1.0, 3.0, 30.0, 1e3, 1e6):
        for d in unit_dirs(5, 8):
            T = K.tet_tensor(TET.mean(axis=0) + r * d, TET)
            assert abs(np.trace(T)) < 1e-12 * np.linalg.norm(T)


def test_tensor_symmetric_and_independent_of_vertex_order():
    # Hessians are symmetric; the body does not depend on how it is listed.
    points = [np.array([0.3, 0.25, 0.2]), np.array([1.5, -0.4, 0.9]), np.array([30.0, 20.0, -10.0])]
    for p in points:
        ref = K.tet_tensor(p, TET)
        assert np.abs(ref - ref.T).max() < 1e-14 * np.abs(ref).max()
        for perm in itertools.permutations(range(4)):
            assert np.abs(K.tet_tensor(p, TET[list(perm)]) - ref).max() < 1e-13 * np.abs(ref).max()


def test_tensor_scale_and_translation_invariant():
    # Dimensional analysis: T is scale free.
    p = np.array([0.5, 0.4, 0.6])
    ref = K.tet_tensor(p, TET)
    for s, shift in ((1e-6, 0.0), (1e3, 0.0), (1e-3, 1.0)):
        assert np.abs(K.tet_tensor(s * p + shift, s * TET + shift) - ref).max() < 1e-10


def test_far_field_tends_to_point_dipole_as_inverse_square():
    # Dipole term about the centroid exact: the remainder is the quadrupole,
    # relative size (size/distance)^2.
    h = longest_edge(TET)
    d = unit_dirs(1, 9)[0]
    rs = np.logspace(1, 3, 9)
    err = [rel(K.tet_tensor(TET.mean(axis=0) + r * h * d, TET), dipole_tensor(TET.mean(axis=0) + r * h * d, TET))
           for r in rs]
    slope = np.polyfit(np.log(rs), np.log(err), 1)[0]
    assert slope == pytest.approx(-2.0, abs=0.05)
    # At 10^6 sizes the dipole error is ~1e-12: the kernel must match it.
    for d in unit_dirs(6, 10):
        p = TET.mean(axis=0) + 1e6 * h * d
        assert rel(K.tet_tensor(p, TET), dipole_tensor(p, TET)) < 1e-11


@pytest.mark.parametrize("r", [0.7, 2.0, 6.0, 11.0, 13.0, 100.0, 1e4, 1e6])
def test_tet_tensor_against_40_digit_closed_form(r):
    # mpmath at 40 digits; the float64 closed form alone is off by 3e-3 at 10^6.
    h = longest_edge(TET)
    for d in unit_dirs(3, 12):
        p = TET.mean(axis=0) + r * h * d
        assert rel(K.tet_tensor(p, TET), mp_tet(p, TET)) < 1e-12


# ----------------------------------------------------------- cross-overs --

def tet_closed(p, v):
    """(1/4pi) sum_f g_f n_f^T with the closed-form face fields."""
    T = np.zeros((3, 3))
    for a, b, c, n in outward_faces(v):
        g = np.zeros(3)
        K._add_triangle_field_closed(p, a, b, c, 1.0, g)
        T += np.outer(g, n) / (4 * math.pi)
    return T


def test_continuity_across_far_field_switch():
    # Both forms at the same points on the switch sphere agree to within the
    # documented error, and the public kernels switch there.
    for d in unit_dirs(8, 13):
        c, h = TRI.mean(axis=0), longest_edge(TRI)
        p = c + K.TRIANGLE_FAR_RATIO * h * d
        near, far = K._triangle_potential_closed(p, *TRI), K._triangle_potential_far(p, *TRI)
        assert abs(far - near) < 2e-13 * abs(near)
        g_near, g_far = np.zeros(3), np.zeros(3)
        K._add_triangle_field_closed(p, *TRI, 1.0, g_near)
        K._add_triangle_field_far(p, *TRI, 1.0, g_far)
        assert rel(g_far, g_near) < 2e-13
        inner, outer = c + 0.999 * (p - c), c + 1.001 * (p - c)
        assert K.triangle_potential(inner, *TRI) == K._triangle_potential_closed(inner, *TRI)
        assert K.triangle_potential(outer, *TRI) == K._triangle_potential_far(outer, *TRI)

        c, h = TET.mean(axis=0), longest_edge(TET)
        p = c + K.TET_FAR_RATIO * h * d
        T_far = np.zeros((3, 3))
        K._tet_tensor_far(p, TET, T_far)
        assert rel(T_far, tet_closed(p, TET)) < 1e-12
        inner, outer = c + 0.999 * (p - c), c + 1.001 * (p - c)
        for q, inside in ((inner, True), (outer, False)):
            T_far = np.zeros((3, 3))
            K._tet_tensor_far(q, TET, T_far)
            assert np.array_equal(K.tet_tensor(q, TET), T_far) != inside


# ----------------------------------------------------------------- batches --

def test_face_field_of_tet_charges_equals_tensor():
    # sigma = M.n on the four faces is the same body as the tensor (any vertex order).
    rng = np.random.default_rng(14)
    M = np.array([0.3, -1.2, 0.8])
    faces = []
    for a, b, c, n in outward_faces(TET):
        faces.append(((c, b, a) if rng.random() < 0.5 else (a, b, c), M @ n))
    tri = np.array([f for f, _ in faces])
    sigma = np.array([s for _, s in faces])
    pts = np.vstack([rng.dirichlet(np.ones(4), size=5) @ TET,
                     TET.mean(axis=0) + rng.normal(size=(5, 3)) * 2,
                     TET.mean(axis=0) + 50 * unit_dirs(2, 15)])
    H = K.face_field_at_points(pts, tri, sigma)
    for p, h in zip(pts, H):
        assert rel(h, K.tet_tensor(p, TET) @ M) < 1e-11


def test_face_potential_batch_is_potential_of_field():
    # H = -grad phi (central differences) and the loop equals the batch.
    rng = np.random.default_rng(16)
    tri = rng.normal(size=(6, 3, 3))
    sigma = rng.normal(size=6)
    pts = rng.normal(size=(4, 3)) * 3
    phi = K.face_potential_at_points(pts, tri, sigma)
    direct = [sum(s * K.triangle_potential(p, *t) for s, t in zip(sigma, tri)) / (4 * math.pi) for p in pts]
    assert np.allclose(phi, direct, rtol=1e-14, atol=0)
    H = K.face_field_at_points(pts, tri, sigma)
    eps = 1e-4
    for k in range(3):
        dp = K.face_potential_at_points(pts + eps * np.eye(3)[k], tri, sigma)
        dm = K.face_potential_at_points(pts - eps * np.eye(3)[k], tri, sigma)
        assert np.allclose(-(dp - dm) / (2 * eps), H[:, k], rtol=1e-6, atol=1e-8 * np.abs(H).max())
