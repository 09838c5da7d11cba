"""Field sources against references outside the code under test: textbook
closed forms (named beside each check), direct numerical Biot-Savart
integration along the conductor (scipy.integrate.quad), adaptive cubature
(scipy.integrate.cubature), Ampere's law, and the vanishing divergence and
curl of a magnetostatic field by finite differences."""
import math
import time

import numpy as np
import pytest
from scipy import integrate, optimize

import volmag.sources as S
from volmag.sources import (Arc, Coil, CurrentLoop, PointDipole, Polyline, Racetrack, Segment,
                            UniformField, total_source_field)

RNG = np.random.default_rng(20240611)


def rel(x, ref):
    return np.linalg.norm(np.asarray(x) - ref, axis=-1) / np.linalg.norm(ref, axis=-1)


def plane_frame(n, ref=None):
    """u, v with (u, v, n) right-handed; u along ref projected on the plane."""
    n = np.asarray(n, float) / np.linalg.norm(n)
    ref = np.array([1.0, 0.0, 0.0]) if ref is None else np.asarray(ref, float)
    u = ref - ref @ n * n
    u /= np.linalg.norm(u)
    return u, np.cross(n, u)


def random_dirs(n):
    d = RNG.normal(size=(n, 3))
    return d / np.linalg.norm(d, axis=1)[:, None]


# ------------------------------------------------------------ references --

def biot_savart(pieces, p):
    """H (A/m) at p of a filament circuit by the Biot-Savart law
    H = (I/4 pi) int dl x (p - r)/|p - r|^3, each piece (r(t), r'(t), t0, t1,
    I) integrated by scipy.integrate.quad, with break points graded towards
    the point of the piece nearest to p so near-wire peaks are resolved."""
    H = np.zeros(3)
    for pos, der, t0, t1, current in pieces:
        ts = np.linspace(t0, t1, 401)
        k = int(np.argmin([np.linalg.norm(p - pos(t)) for t in ts]))
        t_near = optimize.minimize_scalar(lambda t: np.linalg.norm(p - pos(t)), method="bounded",
                                          bounds=(ts[max(k - 1, 0)], ts[min(k + 1, 400)]),
                                          options={"xatol": 1e-12 * abs(t1 - t0)}).x
        # break points graded geometrically towards the nearest point
        grade = t_near + np.outer([-1, 1], np.geomspace(1e-6, 1, 13) * (t1 - t0)).ravel()
        brk = [t for t in np.append(grade, t_near) if t0 < t < t1]

        def f(t, j):
            R = p - pos(t)
            c = np.cross(der(t), R)
            return (c[j] if j < 3 else np.linalg.norm(c)) / np.linalg.norm(R) ** 3
        # components to 1e-13 of the integral of |dl x R|/R^3 (a zero
        # component cannot be had to a relative tolerance)
        scale = integrate.quad(f, t0, t1, args=(3,), points=brk, epsrel=1e-6, limit=400)[0]
        for j in range(3):
            H[j] += current / (4 * math.pi) * integrate.quad(
                f, t0, t1, args=(j,), points=brk, epsabs=1e-13 * scale, epsrel=1e-12, limit=400)[0]
    return H


def circle_piece(c, n, a, t0, t1, current, ref=None):
    u, v = plane_frame(n, ref)
    c = np.asarray(c, float)
    return (lambda t: c + a * (math.cos(t) * u + math.sin(t) * v),
            lambda t: a * (-math.sin(t) * u + math.cos(t) * v), t0, t1, current)


def line_piece(p0, p1, current):
    p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
    return (lambda t: p0 + t * (p1 - p0), lambda t: p1 - p0, 0.0, 1.0, current)


def dipole_field(m, r):
    """Point dipole H = (3 r (m.r)/r^5 - m/r^3)/(4 pi): Jackson, Classical
    Electrodynamics, 3rd ed. (1999), eq. 5.56."""
    r = np.atleast_2d(r)
    rn = np.linalg.norm(r, axis=1)[:, None]
    return (3 * r * (r @ m)[:, None] / rn ** 5 - m / rn ** 3) / (4 * math.pi)


def loop_on_axis(current, a, z):
    """On-axis field of a circular loop, H_z = I a^2 / (2 (a^2 + z^2)^(3/2))
    (Biot-Savart; Jackson, Classical Electrodynamics, 3rd ed., 1999, sec. 5.5)."""
    return current * a * a / (2 * (a * a + z * z) ** 1.5)


def thick_solenoid_on_axis(NI, a, b, L, z):
    """On-axis H_z of a coil of uniform current density, radii a..b, length L
    (Montgomery, Solenoid Magnet Design, 1969, from memory).  Verified here by
    integrating loop_on_axis over the winding:
      int_{z-L/2}^{z+L/2} r^2 du / (2 (r^2 + u^2)^(3/2)) = [u / (2 sqrt(r^2 + u^2))]
      int_a^b u / sqrt(r^2 + u^2) dr = u ln((b + sqrt(b^2+u^2)) / (a + sqrt(a^2+u^2)))
    times the current density NI / ((b - a) L)."""
    def g(u):
        return u * np.log((b + np.hypot(b, u)) / (a + np.hypot(a, u)))
    return NI / (2 * L * (b - a)) * (g(z + L / 2) - g(z - L / 2))


def jacobian(field, p, h):
    """dH_i/dx_j at p by fourth-order central differences with step h."""
    J = np.zeros((3, 3))
    for j in range(3):
        e = np.zeros(3)
        e[j] = h
        pts = np.array([p - 2 * e, p - e, p + e, p + 2 * e])
        Hm2, Hm1, Hp1, Hp2 = field(pts)
        J[:, j] = (Hm2 - 8 * Hm1 + 8 * Hp1 - Hp2) / (12 * h)
    return J


def circulation(field, path_corners, n=24):
    """Line integral of H along a closed polygon (Gauss-Legendre per side)."""
    x, w = np.polynomial.legendre.leggauss(n)
    total = 0.0
    for p0, p1 in zip(path_corners, path_corners[1:] + path_corners[:1]):
        p0, p1 = np.asarray(p0, float), np.asarray(p1, float)
        pts = 0.5 * (p0 + p1) + 0.5 * np.outer(x, p1 - p0)
        total += 0.5 * w @ (field(pts) @ (p1 - p0))
    return total


# ------------------------------------------------------------ current loop --

TILT = np.array([0.3, -0.5, 0.8]) / np.linalg.norm([0.3, -0.5, 0.8])
C0 = np.array([0.1, -0.2, 0.05])


def test_loop_on_axis_matches_biot_savart_closed_form():
    a, I, N = 0.37, 2.5, 3
    loop = CurrentLoop(C0, TILT, a, I, turns=N)
    z = np.concatenate([-np.geomspace(1e-6, 1e3, 20), [0.0], np.geomspace(1e-6, 1e3, 20)])
    u, _ = plane_frame(TILT)
    for rho in (0.0, 1e-12 * a):
        H = loop.field(C0 + np.outer(z, TILT) + rho * u)
        Hz = loop_on_axis(N * I, a, z)
        assert np.max(rel(H, np.outer(Hz, TILT))) < 1e-12


def loop_points(a):
    """Cylindrical (rho, z) around a loop of radius a: axis, near axis, near
    the wire (down to 1e-3 a), in the plane, far away."""
    rho = a * np.array([0.0, 1e-7, 1e-3, 0.3, 0.9, 0.999, 1.0, 1.001, 1.2, 3.0, 30.0])
    z = a * np.array([0.0, 1e-3, 0.05, 0.7, 4.0, 40.0])
    R, Z = np.meshgrid(rho, z)
    keep = ~((R == a) & (Z == 0))
    return R[keep], Z[keep]


def test_loop_off_axis_matches_numerical_biot_savart():
    a, I = 0.37, 1.7
    loop = CurrentLoop(C0, TILT, a, I)
    u, v = plane_frame(TILT)
    rho, z = loop_points(a)
    az = RNG.uniform(0, 2 * math.pi, len(rho))
    P = C0 + (rho * np.cos(az))[:, None] * u + (rho * np.sin(az))[:, None] * v + z[:, None] * TILT
    ref = np.array([biot_savart([circle_piece(C0, TILT, a, 0, 2 * math.pi, I)], p) for p in P])
    err = rel(loop.field(P), ref)
    assert err.max() < 1e-10, (err.max(), P[err.argmax()])


def test_loop_far_field_is_its_dipole():
    # m = N I pi a^2 along the normal (right-hand rule); the next multipole is
    # smaller by (a/r)^2, so the deviation must fall a hundredfold per decade.
    a, I, N = 0.2, 3.0, 5
    loop = CurrentLoop(C0, TILT, a, I, turns=N)
    m = N * I * math.pi * a * a * TILT
    d = random_dirs(30)
    dev = {}
    for r in (1e2 * a, 1e3 * a, 1e5 * a):
        e = rel(loop.field(C0 + r * d), dipole_field(m, r * d))
        assert e.max() < 3 * (a / r) ** 2
        dev[r] = e.max()
    assert 80 < dev[1e2 * a] / dev[1e3 * a] < 120
    assert dev[1e5 * a] < 1e-9   # no cancellation far away


@pytest.mark.parametrize("source", [
    CurrentLoop(C0, TILT, 0.3, 2.0),
    Coil(C0, TILT, 0.2, 0.3, 0.15, 40, 1.5, rel_tol=1e-12),
    Racetrack(C0, TILT, 0.4, 0.1, 0.15, 0.1, 30, 1.0, straight_width=0.1, reference=(0, 1, 0), rel_tol=1e-12),
    Polyline([(0, 0, 0), (0.5, 0, 0.1), (0.4, 0.6, 0), (-0.1, 0.4, 0.2)], 1.3, closed=True),
    Arc(C0, TILT, 0.3, 0.2, 0.2 + 2 * math.pi, 2.0),
], ids=["loop", "coil", "racetrack", "closed polyline", "full arc"])
def test_closed_circuits_have_zero_divergence_and_curl(source):
    """Off the conductors a magnetostatic field has div H = 0 and curl H = 0."""
    for p in C0 + np.array([[0.05, 0.02, 0.03], [0.31, -0.2, 0.1], [0.9, 0.4, -0.7], [0.0, 0.0, 0.28]]):
        J = jacobian(source.field, p, 1e-4)
        scale = np.linalg.norm(J)
        assert abs(np.trace(J)) < 1e-8 * scale
        assert np.linalg.norm(J - J.T) < 1e-8 * scale


def test_loop_ampere_law_around_the_wire():
    """Ampere's law: the circulation of H around a path linking the wire
    once is the current, around a path not linking it zero."""
    a, I, N = 0.3, 2.0, 4
    loop = CurrentLoop(C0, TILT, a, I, turns=N)
    u, _ = plane_frame(TILT)
    t = np.linspace(0, 2 * math.pi, 257)[:-1]
    for eps, centre_rho, expected in ((1e-3 * a, a, N * I), (0.2 * a, a, N * I), (0.2 * a, 0.5 * a, 0.0)):
        # circle in the (u, normal) half-plane turning from normal to u, i.e.
        # right-handed about v = normal x u, the current's direction there
        P = C0 + (centre_rho + eps * np.sin(t))[:, None] * u + (eps * np.cos(t))[:, None] * TILT
        dl = (eps * np.cos(t))[:, None] * u - (eps * np.sin(t))[:, None] * TILT
        circ = np.sum(np.einsum("ij,ij->i", loop.field(P), dl)) * (2 * math.pi / len(t))
        assert circ == pytest.approx(expected, abs=1e-10 * N * I)


def test_loop_vectorised_1e5_points_in_under_a_second():
    loop = CurrentLoop(C0, TILT, 0.3, 2.0)
    P = RNG.normal(size=(100_000, 3))
    t0 = time.perf_counter()
    H = loop.field(P)
    assert time.perf_counter() - t0 < 1.0
    assert H.shape == (100_000, 3) and np.all(np.isfinite(H))


def test_loop_is_not_finite_only_on_the_filament():
    a = 0.3
    loop = CurrentLoop((0, 0, 0), (0, 0, 1), a, 1.0)
    H = loop.field([[a, 0, 0], [a * (1 + 1e-9), 0, 0], [0, a * (1 - 1e-9), 1e-9]])
    assert not np.all(np.isfinite(H[0]))
    assert np.all(np.isfinite(H[1:]))


def test_helmholtz_pair_centre_field_and_homogeneity():
    """Helmholtz pair (loops of radius R at +-R/2): H(0) = 8 N I / (5^1.5 R)
    (common textbook result, e.g. Jackson 3rd ed. problem 5.5 -- from memory);
    the second derivative vanishes by design, so H_z(z) - H_z(0) ~ z^4."""
    R, N, I = 0.25, 50, 1.2
    pair = [CurrentLoop((0, 0, s * R / 2), (0, 0, 1), R, I, turns=N) for s in (-1, 1)]
    H0 = total_source_field(pair, [0, 0, 0])[0]
    assert H0 == pytest.approx([0, 0, 8 * N * I / (5 ** 1.5 * R)], rel=1e-13)
    dev = [total_source_field(pair, [0, 0, z])[0, 2] - H0[2] for z in (R / 20, R / 40)]
    assert dev[0] / dev[1] == pytest.approx(16, rel=0.02)


# ------------------------------------------------------------ straight conductors --

def test_long_segment_tends_to_infinite_wire():
    """Infinite straight wire: H = I / (2 pi d), azimuthal (Ampere)."""
    I, d = 3.0, 0.01
    for L in (1e3, 1e5):
        seg = Segment((0, 0, -L / 2), (0, 0, L / 2), I)
        H = seg.field([[d, 0, 0], [0, d, 0.3]])
        assert H[0] == pytest.approx([0, I / (2 * math.pi * d), 0], rel=3 * (d / L) ** 2, abs=1e-20)
        assert H[1] == pytest.approx([-I / (2 * math.pi * d), 0, 0], rel=3 * (d / L) ** 2, abs=1e-20)


def test_segment_matches_textbook_finite_wire_formula():
    """Finite straight wire: H = I/(4 pi s) (sin theta2 - sin theta1), the
    angles seen from the foot of the perpendicular (Griffiths, Introduction
    to Electrodynamics, 4th ed., 2013, example 5.5)."""
    I, L = 2.0, 0.8
    seg = Segment((0.1, 0.2, 0.0), (0.1, 0.2, L), I)
    for s, z in [(0.05, 0.4), (0.3, -0.5), (1e-3, 0.79), (2.0, 3.0), (0.2, 1.5)]:
        H = seg.field([0.1 + s, 0.2, z])[0]
        expect = I / (4 * math.pi * s) * ((L - z) / math.hypot(s, L - z) + z / math.hypot(s, z))
        assert H == pytest.approx([0, expect, 0], rel=1e-13, abs=1e-16 * abs(expect))


def test_segment_near_its_line_beyond_the_ends_keeps_precision():
    """Beyond the end, at distance s along the line and d << s off it, the
    Griffiths form cancels; its expansion H = I d/(8 pi) (1/s^2 - 1/(s+L)^2)
    (1 + O(d^2/s^2)) is the reference; on the line the field is zero."""
    I, L, s = 1.0, 0.5, 0.2
    seg = Segment((0, 0, 0), (0, 0, L), I)
    for d in (1e-5, 1e-8, 1e-12):
        H = seg.field([d, 0, L + s])[0]
        assert H[1] == pytest.approx(I * d / (8 * math.pi) * (1 / s ** 2 - 1 / (s + L) ** 2), rel=1e-8)
    assert np.all(seg.field([0, 0, L + s]) == 0)


def square(side, c=(0, 0, 0)):
    u, v = plane_frame(TILT)
    return [np.asarray(c) + side / 2 * (sx * u + sy * v) for sx, sy in ((1, -1), (1, 1), (-1, 1), (-1, -1))]


def test_closed_square_polyline_matches_numerical_biot_savart():
    side, I = 0.4, 2.2
    corners = square(side, C0)
    poly = Polyline(corners, I, closed=True)
    pieces = [line_piece(a, b, I) for a, b in zip(corners, corners[1:] + corners[:1])]
    P = np.vstack([C0 + 0.6 * RNG.normal(size=(12, 3)),
                   corners[0] + 1e-3 * side * random_dirs(3),       # near a corner
                   0.5 * (corners[1] + corners[2]) + 1e-4 * side * np.cross(TILT, corners[2] - corners[1])])
    ref = np.array([biot_savart(pieces, p) for p in P])
    assert np.max(rel(poly.field(P), ref)) < 1e-11


def test_square_loop_far_field_is_dipole_of_current_times_area():
    side, I = 0.4, 2.2
    poly = Polyline(square(side, C0), I, closed=True)
    m = I * side * side * TILT
    d = random_dirs(20)
    for r in (1e2 * side, 1e4 * side):
        assert np.max(rel(poly.field(C0 + r * d), dipole_field(m, r * d))) < 2 * (side / r) ** 2 + 1e-11


def test_open_polyline_is_sum_of_segments_and_ampere_holds():
    pts = [(0, 0, 0), (0.3, 0.1, 0), (0.5, 0.5, 0.2)]
    P = RNG.normal(size=(10, 3))
    poly = Polyline(pts, 1.5)
    both = Segment(pts[0], pts[1], 1.5).field(P) + Segment(pts[1], pts[2], 1.5).field(P)
    assert np.allclose(poly.field(P), both, rtol=1e-15, atol=0)
    # circulation around the middle of a long straight conductor: the current (Ampere)
    wire = Segment((0, 0, -100), (0, 0, 100), 4.0)
    path = [(0.01 * math.cos(t), 0.01 * math.sin(t), 0.0) for t in np.linspace(0, 2 * math.pi, 65)[:-1]]
    assert circulation(wire.field, path) == pytest.approx(4.0, rel=1e-4)


# ------------------------------------------------------------ arcs --

def test_full_arc_equals_loop():
    a, I = 0.3, 1.7
    loop = CurrentLoop(C0, TILT, a, I)
    P = np.vstack([C0 + RNG.normal(size=(30, 3)), C0 + 1e-9 * random_dirs(2)])
    for start in (0.0, 1.3, -4.0):
        for ref in (None, (0, 0, 1)):
            arc = Arc(C0, TILT, a, start, start + 2 * math.pi, I, reference=ref)
            assert np.max(rel(arc.field(P), loop.field(P))) < 1e-13
    reverse = Arc(C0, TILT, a, 2 * math.pi, 0.0, I)
    assert np.max(rel(-reverse.field(P), loop.field(P))) < 1e-13


@pytest.mark.parametrize("start, end", [(0.3, 2.0), (5.0, 5.0 + 4.5), (2.0, -1.0), (-3.0, 3.2)])
def test_arc_closed_by_two_segments_matches_numerical_biot_savart(start, end):
    """A pie-slice circuit: centre -> arc start, arc, arc end -> centre."""
    a, I, ref = 0.3, 1.2, (0.2, 1.0, 0.0)
    u, v = plane_frame(TILT, ref)
    p0 = C0 + a * (math.cos(start) * u + math.sin(start) * v)
    p1 = C0 + a * (math.cos(end) * u + math.sin(end) * v)
    circuit = [Segment(C0, p0, I), Arc(C0, TILT, a, start, end, I, reference=ref), Segment(p1, C0, I)]
    pieces = [line_piece(C0, p0, I), circle_piece(C0, TILT, a, start, end, I, ref), line_piece(p1, C0, I)]
    if end < start:   # quad runs the arc from its start to its end either way
        pieces[1] = circle_piece(C0, TILT, a, end, start, -I, ref)
    mid = 0.5 * (start + end)
    P = np.vstack([C0 + 0.5 * RNG.normal(size=(8, 3)),
                   C0 + a * (1 + 1e-4) * (math.cos(mid) * u + math.sin(mid) * v),  # near the arc
                   C0 + 1.3 * a * (math.cos(end) * u + math.sin(end) * v) + 0.01 * TILT])
    ref_H = np.array([biot_savart(pieces, p) for p in P])
    assert np.max(rel(total_source_field(circuit, P), ref_H)) < 1e-10
    assert np.max(rel(circuit[1].field(P), np.array([biot_savart(pieces[1:2], p) for p in P]))) < 1e-10


def test_arc_field_finite_on_its_circle_beyond_its_ends():
    arc = Arc((0, 0, 0), (0, 0, 1), 1.0, 0.0, 1.0, 1.0)
    p = np.array([[math.cos(2.5), math.sin(2.5), 0.0]])
    H = arc.field(p)
    ref = biot_savart([circle_piece((0, 0, 0), (0, 0, 1), 1.0, 0.0, 1.0, 1.0)], p[0])
    assert np.all(np.isfinite(H)) and rel(H[0], ref) < 1e-12


# ------------------------------------------------------------ coils --

COIL = dict(inner_radius=0.05, outer_radius=0.08, length=0.06, turns=200, current=1.5)


def coil_cubature(a, b, L, NI, p):
    """Reference: scipy.integrate.cubature of the loop field over the winding."""
    rho = math.hypot(p[0], p[1])

    def f(x):
        cr, hz = S._loop_coefficients(rho, p[2] - x[:, 1], x[:, 0])
        return np.stack([cr, hz], axis=1)
    avg = integrate.cubature(f, [a, -L / 2], [b, L / 2], rtol=1e-13, atol=0).estimate / ((b - a) * L)
    return NI * np.array([avg[0] * p[0], avg[0] * p[1], avg[1]])


def test_coil_thin_limit_equals_n_loops():
    loop = CurrentLoop(C0, TILT, 0.1, 2.0, turns=75)
    thin = Coil(C0, TILT, 0.1, 0.1, 0.0, 75, 2.0)
    P = C0 + 0.3 * RNG.normal(size=(40, 3))
    assert np.max(rel(thin.field(P), loop.field(P))) < 1e-14
    # a small square winding of side w approaches its mean loop as (w/l)^2,
    # l = min(radius, distance to the wire): second-order terms of the
    # cross-section average (far away the moment differs by (w/a)^2/12)
    z = (P - C0) @ TILT
    ell = np.minimum(np.hypot(np.linalg.norm(P - C0 - np.outer(z, TILT), axis=1) - 0.1, z), 0.1)
    dev = {}
    for w in (1e-2, 1e-3):
        small = Coil(C0, TILT, 0.1 - w / 2, 0.1 + w / 2, w, 75, 2.0, rel_tol=1e-12)
        dev[w] = rel(small.field(P), loop.field(P))
        assert np.all(dev[w] < 0.2 * (w / ell) ** 2)
    assert np.allclose(dev[1e-2] / dev[1e-3], 100, rtol=0.05)   # up to O((w/l)^4) terms


@pytest.mark.parametrize("tol", [1e-4, 1e-7, 1e-10])
def test_coil_on_axis_matches_thick_solenoid_formula(tol):
    a, b, L, N, I = (COIL[k] for k in ("inner_radius", "outer_radius", "length", "turns", "current"))
    coil = Coil(C0, TILT, a, b, L, N, I, rel_tol=tol)
    z = np.linspace(-5 * 2 * b, 5 * 2 * b, 101)
    H = coil.field(C0 + np.outer(z, TILT))
    ref = thick_solenoid_on_axis(N * I, a, b, L, z)
    assert np.max(rel(H, np.outer(ref, TILT))) < tol


def coil_points(size, n):
    """Points at distances 1 to 5 coil sizes from the centre, any direction."""
    return random_dirs(n) * RNG.uniform(1, 5, n)[:, None] * size


def test_coil_accuracy_control_is_honoured_off_axis():
    a, b, L, N, I = (COIL[k] for k in ("inner_radius", "outer_radius", "length", "turns", "current"))
    P = coil_points(2 * b, 12)
    ref = np.array([coil_cubature(a, b, L, N * I, p) for p in P])
    errors = {}
    for tol in (1e-3, 1e-6, 1e-9):
        errors[tol] = rel(Coil((0, 0, 0), (0, 0, 1), a, b, L, N, I, rel_tol=tol).field(P), ref).max()
        assert errors[tol] < tol
    assert errors[1e-3] > 1e4 * errors[1e-9]   # the order really adapts to the tolerance


def test_coil_inside_the_winding_long_solenoid_and_ampere():
    """Inside the winding of a very long coil, mid-plane: H_z = J (b - r)
    (Ampere's law for an infinite thick solenoid), the end fields being
    ~(b/L)^2 smaller.  Around a rectangle cutting the winding, the
    circulation of H equals the enclosed current J x area (Ampere)."""
    a, b, L = 0.05, 0.08, 2000.0
    NI = 1e6
    J = NI / ((b - a) * L)
    r = np.linspace(a + 0.002, b - 0.002, 5)
    H = Coil((0, 0, 0), (0, 0, 1), a, b, L, NI, 1.0, rel_tol=1e-9).field(np.stack([r, 0 * r, 0 * r], axis=1))
    assert np.allclose(H[:, 2], J * (b - r), rtol=0, atol=1e-7 * J * (b - a))
    assert np.allclose(H[:, :2], 0, atol=1e-9 * J * (b - a))

    a, b, L, N, I = (COIL[k] for k in ("inner_radius", "outer_radius", "length", "turns", "current"))
    coil = Coil((0, 0, 0), (0, 0, 1), a, b, L, N, I, rel_tol=1e-10)
    r1, r2, z1, z2 = 0.5 * a, 0.5 * (a + b), -L, 0.0
    # corners chosen so every side is smooth: sides split where they cross the winding
    path = [(r1, 0, z1), (r1, 0, z2), (a, 0, z2), (r2, 0, z2), (r2, 0, -L / 2), (r2, 0, z1)]
    enclosed = N * I / ((b - a) * L) * (r2 - a) * (z2 + L / 2)
    assert circulation(coil.field, path) == pytest.approx(enclosed, rel=1e-9)


def test_coil_curl_inside_winding_is_current_density():
    a, b, L, N, I = (COIL[k] for k in ("inner_radius", "outer_radius", "length", "turns", "current"))
    coil = Coil((0, 0, 0), (0, 0, 1), a, b, L, N, I, rel_tol=1e-12)
    p = np.array([0.0, 0.066, 0.01])     # azimuthal direction -x here
    Jac = jacobian(coil.field, p, 1e-4)
    curl = np.array([Jac[2, 1] - Jac[1, 2], Jac[0, 2] - Jac[2, 0], Jac[1, 0] - Jac[0, 1]])
    J = N * I / ((b - a) * L)
    assert curl == pytest.approx([-J, 0, 0], abs=1e-7 * J)
    assert abs(np.trace(Jac)) < 1e-7 * J


def test_coil_far_field_is_dipole_of_mean_area():
    """Uniform current over a..b: m = N I pi <r^2> = N I pi (a^2 + ab + b^2)/3."""
    a, b, L, N, I = (COIL[k] for k in ("inner_radius", "outer_radius", "length", "turns", "current"))
    coil = Coil(C0, TILT, a, b, L, N, I, rel_tol=1e-10)
    m = N * I * math.pi * (a * a + a * b + b * b) / 3 * TILT
    r = 1e3 * 2 * b
    d = random_dirs(20)
    assert np.max(rel(coil.field(C0 + r * d), dipole_field(m, r * d))) < 3e-6


# ------------------------------------------------------------ racetracks --

RT = dict(straight_length=0.3, inner_radius=0.04, outer_radius=0.07, height=0.05, turns=120, current=2.0)


def racetrack_path(lu, lv, r, c, n, ref, I):
    """Filament at corner radius r: four sides and four quarter circles."""
    u, v = plane_frame(n, ref)
    c = np.asarray(c, float)
    A, B = lu / 2, lv / 2

    def pt(x, y):
        return c + x * u + y * v
    pieces = []
    for k, (cx, cy) in enumerate([(A, B), (-A, B), (-A, -B), (A, -B)]):
        centre = pt(cx, cy)
        t0 = k * math.pi / 2
        pieces.append(circle_piece(centre, n, r, t0, t0 + math.pi / 2, I, ref))
    sides = [line_piece(pt(A + r, -B), pt(A + r, B), I), line_piece(pt(A, B + r), pt(-A, B + r), I),
             line_piece(pt(-A - r, B), pt(-A - r, -B), I), line_piece(pt(-A, -B - r), pt(A, -B - r), I)]
    return pieces + sides


def test_racetrack_filament_matches_numerical_biot_savart():
    lu, lv, r, I, ref = 0.4, 0.1, 0.05, 3.0, (1, 1, 0)
    track = Racetrack(C0, TILT, lu, r, r, 0.0, 1, I, straight_width=lv, reference=ref)
    pieces = racetrack_path(lu, lv, r, C0, TILT, ref, I)
    u, v = plane_frame(TILT, ref)
    P = np.vstack([C0 + 0.3 * RNG.normal(size=(10, 3)),
                   C0 + (lu / 2 + r * (1 + 1e-3)) * u + 0.01 * v])     # close to a straight side
    H_ref = np.array([biot_savart(pieces, p) for p in P])
    assert np.max(rel(track.field(P), H_ref)) < 1e-11


def test_racetrack_without_straights_equals_coil():
    k = {key: RT[key] for key in ("inner_radius", "outer_radius", "turns", "current")}
    coil = Coil(C0, TILT, length=RT["height"], rel_tol=1e-8, **k)
    track = Racetrack(C0, TILT, 0.0, height=RT["height"], rel_tol=1e-8, reference=(0, 1, 1), **k)
    P = np.vstack([C0 + 0.4 * RNG.normal(size=(30, 3)),
                   C0 + 0.055 * plane_frame(TILT)[0]])      # inside the winding
    assert np.max(rel(track.field(P), coil.field(P))) < 1e-8


def test_racetrack_far_field_is_dipole_of_mean_rounded_rectangle():
    """A turn at corner radius r encloses lu lv + 2 r (lu + lv) + pi r^2;
    averaged over r uniform in [ri, ro]: lu lv + (lu + lv)(ri + ro)
    + pi (ri^2 + ri ro + ro^2)/3.  (The rounded rectangle of the mean radius
    would differ by pi (ro - ri)^2 / 12, 2e-3 relative here -- resolvable.)"""
    lu, lv = RT["straight_length"], 0.05
    ri, ro, N, I = RT["inner_radius"], RT["outer_radius"], RT["turns"], RT["current"]
    track = Racetrack(C0, TILT, lu, ri, ro, RT["height"], N, I, straight_width=lv, rel_tol=1e-10)
    area = lu * lv + (lu + lv) * (ri + ro) + math.pi * (ri * ri + ri * ro + ro * ro) / 3
    r = 1e3 * (lu + 2 * ro)
    d = random_dirs(20)
    assert np.max(rel(track.field(C0 + r * d), dipole_field(N * I * area * TILT, r * d))) < 3e-6


def test_racetrack_accuracy_control_is_honoured():
    """Reference: tensor Gauss-Legendre (20 x 20) over the winding of
    single-filament racetracks (whose field is checked above against
    numerical Biot-Savart); at 1-5 sizes the rule is converged to ~1e-14."""
    lu, lv, ri, ro, hgt = RT["straight_length"], 0.05, RT["inner_radius"], RT["outer_radius"], RT["height"]
    P = coil_points(lu + 2 * ro, 5)
    x, w = np.polynomial.legendre.leggauss(20)
    ref = np.zeros_like(P)
    for xr, wr in zip(x, w):
        for xz, wz in zip(x, w):
            r, h = ri + (ro - ri) * (1 + xr) / 2, hgt * xz / 2
            ref += wr * wz / 4 * Racetrack((0, 0, h), (0, 0, 1), lu, r, r, 0.0, 1, 1.0, straight_width=lv).field(P)
    for tol in (1e-3, 1e-6, 1e-9):
        track = Racetrack((0, 0, 0), (0, 0, 1), lu, ri, ro, hgt, 1, 1.0, straight_width=lv, rel_tol=tol)
        assert rel(track.field(P), ref).max() < tol


# ------------------------------------------------------------ dipoles and sums --

def test_point_dipole_is_far_field_of_small_loop():
    a, I = 1e-3, 2.0
    m = I * math.pi * a * a * TILT
    dip = PointDipole(C0, m)
    d = random_dirs(20)
    H_loop = CurrentLoop(C0, TILT, a, I).field(C0 + d)
    assert np.max(rel(dip.field(C0 + d), H_loop)) < 3 * a * a
    # on the axis 2m/(4 pi r^3), in the equator -m/(4 pi r^3)  (Jackson eq. 5.56)
    u, _ = plane_frame(TILT)
    mm = np.linalg.norm(m)
    H = dip.field(C0 + np.array([2 * TILT, 2 * u]))
    assert H[0] == pytest.approx(2 * m / (4 * math.pi * 8), rel=1e-14)
    assert H[1] == pytest.approx(-m / (4 * math.pi * 8), rel=1e-14, abs=1e-18 * mm)


def test_point_dipole_potential_gradient_is_minus_field():
    dip = PointDipole(C0, (0.3, -1.0, 0.4))
    p, h = C0 + np.array([0.2, 0.1, -0.3]), 1e-5
    grad = [(dip.potential([p + h * e]) - dip.potential([p - h * e]))[0] / (2 * h) for e in np.eye(3)]
    assert np.allclose(-np.array(grad), dip.field(p)[0], rtol=1e-8)


def test_sources_superpose():
    sources = [UniformField((1.0, 2.0, 3.0)), CurrentLoop(C0, TILT, 0.3, 2.0), PointDipole((1, 1, 1), (0, 0, 1))]
    P = RNG.normal(size=(7, 3))
    assert np.allclose(total_source_field(sources, P), sum(s.field(P) for s in sources), rtol=1e-15, atol=0)


@pytest.mark.parametrize("make", [
    lambda: CurrentLoop((0, 0, 0), (0, 0, 0), 1.0, 1.0),
    lambda: CurrentLoop((0, 0, 0), (0, 0, 1), -1.0, 1.0),
    lambda: Coil((0, 0, 0), (0, 0, 1), 0.2, 0.1, 0.1, 10, 1.0),
    lambda: Coil((0, 0, 0), (0, 0, 1), 0.1, 0.2, 0.1, 10, 1.0, rel_tol=0.0),
    lambda: Arc((0, 0, 0), (0, 0, 1), 1.0, 0.0, 7.0, 1.0),
    lambda: Arc((0, 0, 0), (0, 0, 1), 1.0, 0.0, 1.0, 1.0, reference=(0, 0, 2)),
    lambda: Polyline([(0, 0, 0)], 1.0),
    lambda: Racetrack((0, 0, 0), (0, 0, 1), -0.1, 0.1, 0.2, 0.1, 10, 1.0),
], ids=["zero normal", "negative radius", "outer < inner", "zero tolerance", "arc > 2 pi",
        "reference along normal", "one-point polyline", "negative straight length"])
def test_impossible_sources_are_rejected(make):
    with pytest.raises(ValueError):
        make()
