"""Field sources: the applied field H_s (A/m) that the bodies respond to.

Every source is a small frozen dataclass in SI units (m, A, A m^2, A/m, T)
with ``field(points)``: H_s (A/m) at points (n, 3) m, vectorised over the
points.  Sources superpose: the applied field is the sum of their fields
(:func:`total_source_field`).  Sources with a single-valued scalar potential
(uniform field, point dipole) also give ``potential(points)`` (A), with
H_s = -grad(potential); current-carrying sources have none (their potential
is multivalued around the conductors).

Placement and orientation conventions
-------------------------------------
* Circular sources (loop, coil, arc) lie in the plane through ``center``
  normal to ``normal``/``axis``; current flows counter-clockwise seen from the
  tip of that vector (right-hand rule), so a loop's moment is
  turns * current * pi radius^2 * normal.  The vector is normalised on
  construction.
* In-plane angles (arc) and the direction of the straight sides (racetrack)
  are measured from ``reference``, projected onto the plane.  When it is not
  given, the global x axis is used, or the global y axis if the normal is
  within about 25 degrees of x.
* Straight conductors carry ``current`` from ``start`` to ``end``.

Accuracy
--------
Filament sources (loop, arc, segment, polyline) are closed forms, finite
everywhere except on the filament itself (points on it give inf/nan).
Finite-section windings (coil, racetrack) integrate filament fields over the
winding cross-section by an adaptive Gauss-Legendre rule whose error is below
``rel_tol`` relative to |H| (see :func:`_winding_average`); their field is
finite everywhere, inside the winding included.
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from functools import lru_cache

import numpy as np
from scipy import special

from .units import MU0

FOUR_PI = 4.0 * math.pi


# ---------------------------------------------------------------- frames
def _vector(v, what: str) -> tuple[float, float, float]:
    a = np.asarray(v, float)
    if a.shape != (3,) or not np.all(np.isfinite(a)):
        raise ValueError(f"{what} must be three finite numbers, got {v!r}")
    return tuple(float(x) for x in a)


def _unit(v, what: str) -> tuple[float, float, float]:
    a = np.asarray(_vector(v, what))
    n = np.linalg.norm(a)
    if n == 0.0:
        raise ValueError(f"{what} must not be the zero vector")
    return tuple(float(x) for x in a / n)


def _frame(normal, reference=None) -> np.ndarray:
    """Rows u, v, n: a right-handed orthonormal frame with n = normal and u
    along `reference` projected onto the plane normal to n (see the module
    docstring for the default)."""
    n = np.asarray(normal, float)
    if reference is None:
        reference = (1.0, 0.0, 0.0) if abs(n[0]) < 0.9 else (0.0, 1.0, 0.0)
    r = np.asarray(reference, float)
    u = r - (r @ n) * n
    if np.linalg.norm(u) <= 1e-9 * np.linalg.norm(r):
        raise ValueError(f"reference {tuple(reference)} is parallel to the normal {tuple(n)}")
    u /= np.linalg.norm(u)
    return np.array([u, np.cross(n, u), n])


def _points(points) -> np.ndarray:
    p = np.atleast_2d(np.asarray(points, float))
    if p.ndim != 2 or p.shape[1] != 3:
        raise ValueError(f"points must have shape (n, 3), got {p.shape}")
    return p


def _positive(value, what: str, allow_zero: bool = False) -> float:
    x = float(value)
    if not math.isfinite(x) or x < 0 or (x == 0 and not allow_zero):
        raise ValueError(f"{what} must be {'non-negative' if allow_zero else 'positive'}, got {value!r}")
    return x


# ---------------------------------------------------------------- circular filament
# P(m) = (F2 - F1)/m with F1 = int cos^2/D^3, F2 = int sin^2/D^3 over [0, pi/2],
# D^2 = 1 - m sin^2.  Expanding D^-3 binomially and integrating term by term
# with Wallis' integrals gives P(m) = sum_{n>=1} c_n m^(n-1), all c_n > 0,
# c_1 = 3 pi/16, c_{n+1}/c_n = (n+3/2)(n+1/2)/(n(n+2)).  The closed form
# ((1+m1) E - 2 m1 K)/(m^2 m1) loses digits as m -> 0, the series does not.
_SERIES_M = 0.3
_SERIES_C = [3 * math.pi / 16]
for _n in range(1, 36):
    _SERIES_C.append(_SERIES_C[-1] * (_n + 1.5) * (_n + 0.5) / (_n * (_n + 2)))


def _p_of_m(m: np.ndarray, m1: np.ndarray, K: np.ndarray, E: np.ndarray) -> np.ndarray:
    P = ((1.0 + m1) * E - 2.0 * m1 * K) / (m * m * m1)
    small = m < _SERIES_M
    if np.any(small):
        x = m[small]
        s = np.full_like(x, _SERIES_C[-1])
        for c in reversed(_SERIES_C[:-1]):
            s = s * x + c
        P[small] = s
    return P


def _loop_coefficients(rho, z, a):
    """Field of a unit-current circular filament of radius a (m) centred on
    the origin in the plane z = 0: H = cr * (x, y, 0) + hz * e_z (A/m per A),
    at cylindrical coordinates rho, z (m); arrays broadcast.

    From the Biot-Savart law with phi = pi - 2 psi (Jackson, Classical
    Electrodynamics, 3rd ed., 1999, sec. 5.5; equivalent to the E, K form of
    Simpson, Lane, Immer & Youngquist, NASA/TM-2013-217919, 2001 -- both from
    memory), with beta^2 = (a+rho)^2+z^2, alpha^2 = (a-rho)^2+z^2,
    m = 4 a rho/beta^2, m1 = alpha^2/beta^2 (computed directly, not as 1-m):

        hz = a/(pi beta^3) * (a E/m1 - rho m P(m))
        H_rho = 4 a^2 z rho P(m)/(pi beta^5)

    P(m) (see _p_of_m) carries the O(m) cancellation of H_rho analytically, so
    no 0/0 arises on the axis and no digits are lost near it or far away.
    """
    rho, z, a = np.broadcast_arrays(*(np.asarray(x, float) for x in (rho, z, a)))
    with np.errstate(divide="ignore", invalid="ignore"):
        b2 = (a + rho) ** 2 + z * z
        m = np.minimum(4.0 * a * rho / b2, 1.0)  # rounding can exceed 1 at the wire
        m1 = ((a - rho) ** 2 + z * z) / b2
        K, E = special.ellipkm1(m1), special.ellipe(m)
        P = _p_of_m(m, m1, K, E)
        k = a / (math.pi * b2 * np.sqrt(b2))
        hz = k * (a * E / m1 - rho * m * P)
        cr = 4.0 * k * a * z * P / b2
    return cr, hz


def _arc_antiderivatives(t, m, m1):
    """Integrals from psi = 0 to psi = (pi - t)/2 of D^-1, sin^2 D^-3 and
    2 sin cos D^-3 (D^2 = 1 - m sin^2 psi), by Carlson's symmetric forms
    (DLMF 19.25.5 and its D^-3 analogue, sin^3/3 R_D(cos^2, 1, D^2) -- from
    memory, checked against quadrature in the tests).  psi is reduced to
    [-pi/2, pi/2] plus k half-periods; k is returned so that callers add k
    complete integrals only where the arc really passes the point's azimuth.
    sin(psi) = cos(t/2) and cos(psi) = sin(t/2) keep full relative precision
    near the filament."""
    psi = 0.5 * (math.pi - t)
    k = np.floor(psi / math.pi + 0.5)
    s = np.where(k % 2 == 0, 1.0, -1.0) * np.cos(0.5 * t)
    c2 = np.sin(0.5 * t) ** 2
    d2 = c2 + m1 * s * s
    F = s * special.elliprf(c2, d2, 1.0)
    J2 = s ** 3 / 3.0 * special.elliprd(c2, 1.0, d2)
    d = np.sqrt(d2)
    G = 2.0 * s * s / (d * (1.0 + d))
    return k, F, J2, G


def _arc_field(x, y, z, a, phi1, phi2):
    """Unit-current circular arc of radius a (m) centred on the origin in the
    plane z = 0, current from angle phi1 to phi2 (rad, counter-clockwise about
    +z when phi2 > phi1, |phi2 - phi1| <= 2 pi): H components (A/m per A) at
    x, y, z (m); arrays broadcast.

    Biot-Savart integrated in closed form over the arc: with the point at
    azimuth phi_p, t = phi - phi_p and psi = (pi - t)/2,
      H_z   = a/(2 pi beta^3) [(a+rho) dJ0 - 2 rho dJ2]
      H_rho = a z/(2 pi beta^3) [2 dJ2 - dJ0]
      H_phi = a z/(2 pi beta^3) dG
    where d(.) is the antiderivative difference between the two ends and
    J0 = F + m J2 (incomplete elliptic integrals, _arc_antiderivatives)."""
    x, y, z, a = np.broadcast_arrays(*(np.asarray(v, float) for v in (x, y, z, a)))
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = np.hypot(x, y)
        phip = np.arctan2(y, x)
        b2 = (a + rho) ** 2 + z * z
        m = np.minimum(4.0 * a * rho / b2, 1.0)
        m1 = ((a - rho) ** 2 + z * z) / b2
        k1, F1, J21, G1 = _arc_antiderivatives(phi1 - phip, m, m1)
        k2, F2, J22, G2 = _arc_antiderivatives(phi2 - phip, m, m1)
        dk = k1 - k2
        F, J2, G = F1 - F2, J21 - J22, G1 - G2
        wraps = dk != 0
        if np.any(wraps):
            # Each half-period adds the complete integrals K = R_F(0, m1, 1)
            # and R_D(0, 1, m1)/3; only evaluated where needed because they
            # are infinite for points on the arc's circle.
            F[wraps] += 2.0 * dk[wraps] * special.elliprf(0.0, m1[wraps], 1.0)
            J2[wraps] += 2.0 * dk[wraps] * special.elliprd(0.0, 1.0, m1[wraps]) / 3.0
        J0 = F + m * J2
        c = a / (2.0 * math.pi * b2 * np.sqrt(b2))
        hz = c * ((a + rho) * J0 - 2.0 * rho * J2)
        hr = c * z * (2.0 * J2 - J0)
        hp = c * z * G
        cp, sp = np.cos(phip), np.sin(phip)
    return hr * cp - hp * sp, hr * sp + hp * cp, hz


# ---------------------------------------------------------------- straight filament
def _segment_field(p, a, b) -> np.ndarray:
    """Unit-current straight filament from a to b (m): H (A/m per A) at p (m).
    Arrays (..., 3) broadcast.

    Closed-form Biot-Savart in the compact form of Hanson & Hirshman, Phys.
    Plasmas 9, 4410 (2002) (from memory; re-derived from the textbook
    (cos theta_1 - cos theta_2)/(4 pi d) form):
        H = (R1 + R2) / (4 pi R1 R2 (R1 R2 + r1.r2)) (L x r1),
    r_i = p - end_i, L = b - a.  R1 R2 + r1.r2 = R1 R2 |r1/R1 + r2/R2|^2 / 2 is
    evaluated from the unit vectors, which keeps full precision on the
    filament's line beyond its ends (H = 0 there) and near the filament."""
    r1, r2 = p - a, p - b
    R1 = np.linalg.norm(r1, axis=-1)
    R2 = np.linalg.norm(r2, axis=-1)
    with np.errstate(divide="ignore", invalid="ignore"):
        u = r1 / R1[..., None] + r2 / R2[..., None]
        R12 = R1 * R2
        f = (R1 + R2) / (2.0 * math.pi * R12 * R12 * np.einsum("...i,...i->...", u, u))
    return f[..., None] * np.cross(b - a, r1)


# ---------------------------------------------------------------- winding cross-sections
_PMAX = 12       # largest Gauss-Legendre order per direction before a panel is split
_SAFETY = 100.0  # constant of the a-priori estimate: measured errors stay below 0.3 rel_tol
_DROP = 0.05     # panels smaller than _DROP * rel_tol * (winding size) around the point are neglected
_CHUNK = 1 << 18  # filament evaluations per vectorised call


@lru_cache(maxsize=None)
def _gauss(p: int):
    x, w = np.polynomial.legendre.leggauss(p)
    return x, w


def _winding_average(kernel, dm, hm, r0, width, height, rel_tol, core=0.0, ncomp=2):
    """Average over a winding cross-section of filament fields.

    The cross-section is [r0, r0 + width] x [-height/2, height/2] in the
    (offset r, height h) coordinates of the filaments; (dm, hm) (n,) are the
    points' coordinates in the same meridian plane, where the point's distance
    to a panel equals its distance (m) to the nearest filament of that panel.
    kernel(i, r, h) -> (k, ncomp) gives the field of filament (r, h) at points
    i; `core` (m) is the filament's size beyond its offset r (0 for circles,
    half the straight lengths for rounded rectangles).  Returns (n, ncomp),
    the cross-section average (uniform current).

    Adaptive tensor Gauss-Legendre: a filament field is analytic in (r, h)
    except where the filament passes through the point, i.e. in a Bernstein
    ellipse of parameter asinh(dist/half-size) around each panel, so a p-point
    rule errs by about exp(-2 p asinh(dist/half)) (Trefethen, Approximation
    Theory and Approximation Practice, SIAM 2013, thm 19.3 -- from memory).
    Radially the field also grows like (offset)^2 (the moment of the
    filament), which the factor (1 + dist/(r_c + core))^2 accounts for.  Each
    panel takes the order p per direction that meets rel_tol, or is bisected
    in the directions where p would exceed _PMAX (a quadtree refined towards
    the point).  Panels touching the point are refined until they are smaller
    than _DROP * rel_tol times the winding's smaller half-size and then left
    out: their share of the field is of that order.
    """
    n = len(dm)
    out = np.zeros((n, ncomp))
    HR, HH = 0.5 * width, 0.5 * height
    sizes = [s for s in (HR, HH) if s > 0]
    drop = _DROP * rel_tol * min(sizes) if sizes else np.inf
    log_c = math.log(_SAFETY / rel_tol)
    i = np.arange(n)
    cr, ch = np.full(n, r0 + HR), np.zeros(n)
    hr, hh = np.full(n, HR), np.full(n, HH)
    with np.errstate(divide="ignore", invalid="ignore"):
        while len(i):
            dist = np.hypot(np.maximum(np.abs(dm[i] - cr) - hr, 0.0),
                            np.maximum(np.abs(hm[i] - ch) - hh, 0.0))
            grow = 2.0 * np.log1p(dist / (cr + core))
            pr = np.maximum(np.ceil((log_c + grow) / (2.0 * np.arcsinh(dist / hr))), 1.0)
            pz = np.maximum(np.ceil(log_c / (2.0 * np.arcsinh(dist / hh))), 1.0)
            pr[hr == 0], pz[hh == 0] = 1.0, 1.0
            split_r, split_z = pr > _PMAX, pz > _PMAX
            ok = ~(split_r | split_z)
            _accumulate(out, kernel, i[ok], cr[ok], ch[ok], hr[ok], hh[ok],
                        pr[ok].astype(int), pz[ok].astype(int), HR, HH)
            keep = ~ok & (np.maximum(hr, hh) > drop)
            i, cr, ch, hr, hh = _bisect(i[keep], cr[keep], ch[keep], hr[keep], hh[keep],
                                        split_r[keep], split_z[keep])
    return out


def _bisect(i, cr, ch, hr, hh, split_r, split_z):
    """Children of panels split in half along r and/or h."""
    nr, nz = 1 + split_r, 1 + split_z
    count = nr * nz
    parent = np.repeat(np.arange(len(i)), count)
    j = np.arange(len(parent)) - np.repeat(np.cumsum(count) - count, count)
    nr, nz = nr[parent], nz[parent]
    jr, jz = j % nr, j // nr
    hr_c, hh_c = hr[parent] / nr, hh[parent] / nz
    return (i[parent], cr[parent] - hr[parent] + hr_c * (2 * jr + 1),
            ch[parent] - hh[parent] + hh_c * (2 * jz + 1), hr_c, hh_c)


def _accumulate(out, kernel, i, cr, ch, hr, hh, pr, pz, HR, HH):
    """Add the tensor Gauss-Legendre sums of the given panels to out[i]."""
    frac = (hr / HR if HR > 0 else np.ones_like(hr)) * (hh / HH if HH > 0 else 1.0)
    key = pr * 64 + pz
    for k in np.unique(key):
        sel = np.flatnonzero(key == k)
        (xr, wr), (xz, wz) = _gauss(int(k // 64)), _gauss(int(k % 64))
        w = 0.25 * np.outer(wr, wz).ravel()
        xr, xz = np.repeat(xr, len(xz)), np.tile(xz, len(xr))
        step = max(1, _CHUNK // len(w))
        for s in range(0, len(sel), step):
            q = sel[s:s + step]
            ii = np.repeat(i[q], len(w))
            r = (cr[q, None] + hr[q, None] * xr).ravel()
            h = (ch[q, None] + hh[q, None] * xz).ravel()
            vals = kernel(ii, r, h) * (frac[q, None] * w).ravel()[:, None]
            for c in range(out.shape[1]):
                out[:, c] += np.bincount(ii, weights=vals[:, c], minlength=len(out))


# ---------------------------------------------------------------- sources
@dataclass(frozen=True)
class UniformField:
    """A uniform applied field H (A/m)."""
    H: tuple[float, float, float]

    @classmethod
    def from_B(cls, B) -> "UniformField":
        """Uniform field from its flux density B (T) in free space."""
        return cls(tuple(float(b) / MU0 for b in B))

    def field(self, points: np.ndarray) -> np.ndarray:
        """H_s (A/m) at points (n, 3) m."""
        points = np.atleast_2d(points)
        return np.broadcast_to(np.asarray(self.H, float), points.shape).copy()

    def potential(self, points: np.ndarray) -> np.ndarray:
        """Scalar potential (A) with H_s = -grad(potential): -H.r."""
        return -np.atleast_2d(points) @ np.asarray(self.H, float)


@dataclass(frozen=True)
class CurrentLoop:
    """Circular filament: `radius` (m) in the plane through `center` (m)
    normal to `normal`, carrying `current` (A) in each of `turns` coincident
    turns, counter-clockwise about `normal`.  Exact field by complete
    elliptic integrals (see _loop_coefficients): a few 1e-16 relative on and
    off the axis and far away (against 30-digit quadrature); at distance d
    from the wire the rounding of the point's coordinates alone costs
    ~1e-16 radius/d.  Not finite on the filament itself."""
    center: tuple[float, float, float]
    normal: tuple[float, float, float]
    radius: float
    current: float
    turns: float = 1

    def __post_init__(self):
        object.__setattr__(self, "center", _vector(self.center, "center"))
        object.__setattr__(self, "normal", _unit(self.normal, "normal"))
        object.__setattr__(self, "radius", _positive(self.radius, "radius"))
        object.__setattr__(self, "turns", _positive(self.turns, "turns"))

    def field(self, points: np.ndarray) -> np.ndarray:
        """H (A/m) at points (n, 3) m."""
        n = np.asarray(self.normal)
        d = _points(points) - np.asarray(self.center)
        z = d @ n
        rvec = d - z[:, None] * n
        cr, hz = _loop_coefficients(np.linalg.norm(rvec, axis=1), z, self.radius)
        return self.turns * self.current * (cr[:, None] * rvec + hz[:, None] * n)


@dataclass(frozen=True)
class Coil:
    """Circular coil of rectangular winding cross-section: `turns` turns of
    `current` (A) spread uniformly over inner_radius <= r <= outer_radius and
    |axial offset| <= length/2 (m), centred on `center`, current
    counter-clockwise about `axis`.  Zero length and equal radii give the
    filament loop.

    The field is the cross-section average of loop fields by adaptive
    Gauss-Legendre quadrature (_winding_average): `rel_tol` bounds the
    quadrature error relative to |H| at each point, inside the winding too
    (where it is dominated by the neglected panels around the point).  Cost
    grows slowly as rel_tol falls: at 1e-8 a point one coil size from the
    centre takes ~35 loop evaluations, at five sizes ~12; a point inside the
    winding ~2e4 (about 10 ms)."""
    center: tuple[float, float, float]
    axis: tuple[float, float, float]
    inner_radius: float
    outer_radius: float
    length: float
    turns: float
    current: float
    rel_tol: float = 1e-8

    def __post_init__(self):
        object.__setattr__(self, "center", _vector(self.center, "center"))
        object.__setattr__(self, "axis", _unit(self.axis, "axis"))
        _check_winding(self.inner_radius, self.outer_radius, self.length, self.turns, self.rel_tol)

    def field(self, points: np.ndarray) -> np.ndarray:
        """H (A/m) at points (n, 3) m."""
        n = np.asarray(self.axis)
        d = _points(points) - np.asarray(self.center)
        z = d @ n
        rvec = d - z[:, None] * n
        rho = np.linalg.norm(rvec, axis=1)

        def kernel(i, r, h):
            return np.stack(_loop_coefficients(rho[i], z[i] - h, r), axis=1)

        avg = _winding_average(kernel, rho, z, self.inner_radius, self.outer_radius - self.inner_radius,
                               self.length, self.rel_tol)
        return self.turns * self.current * (avg[:, :1] * rvec + avg[:, 1:] * n)


@dataclass(frozen=True)
class Segment:
    """Straight filament carrying `current` (A) from `start` to `end` (m).
    Closed-form Biot-Savart (see _segment_field); not finite on the segment.
    Alone it is not a divergence-free current; use it as part of a circuit."""
    start: tuple[float, float, float]
    end: tuple[float, float, float]
    current: float

    def __post_init__(self):
        object.__setattr__(self, "start", _vector(self.start, "start"))
        object.__setattr__(self, "end", _vector(self.end, "end"))

    def field(self, points: np.ndarray) -> np.ndarray:
        """H (A/m) at points (n, 3) m."""
        return self.current * _segment_field(_points(points), np.asarray(self.start), np.asarray(self.end))


@dataclass(frozen=True)
class Polyline:
    """Straight filaments through `points` (k, 3) m in order, carrying
    `current` (A) from the first point to the last; `closed` adds the segment
    from the last point back to the first."""
    points: tuple
    current: float
    closed: bool = False

    def __post_init__(self):
        pts = tuple(_vector(p, "polyline point") for p in self.points)
        if len(pts) < 2:
            raise ValueError("a polyline needs at least two points")
        object.__setattr__(self, "points", pts)

    def field(self, points: np.ndarray) -> np.ndarray:
        """H (A/m) at points (n, 3) m."""
        p = _points(points)
        v = np.asarray(self.points)
        ends = np.vstack([v[1:], v[:1]]) if self.closed else v[1:]
        H = np.zeros_like(p)
        for a, b in zip(v, ends):
            H += _segment_field(p, a, b)
        return self.current * H


@dataclass(frozen=True)
class Arc:
    """Circular arc filament of `radius` (m) centred on `center` (m) in the
    plane normal to `normal`, from `start_angle` to `end_angle` (rad,
    counter-clockwise about `normal` from `reference`; |end - start| <= 2 pi),
    carrying `current` (A) from start to end.  Closed form by incomplete
    elliptic integrals in Carlson's form (see _arc_field); not finite on the
    arc."""
    center: tuple[float, float, float]
    normal: tuple[float, float, float]
    radius: float
    start_angle: float
    end_angle: float
    current: float
    reference: tuple[float, float, float] | None = None

    def __post_init__(self):
        object.__setattr__(self, "center", _vector(self.center, "center"))
        object.__setattr__(self, "normal", _unit(self.normal, "normal"))
        object.__setattr__(self, "radius", _positive(self.radius, "radius"))
        if self.reference is not None:
            object.__setattr__(self, "reference", _vector(self.reference, "reference"))
        _frame(self.normal, self.reference)
        if abs(self.end_angle - self.start_angle) > 2 * math.pi * (1 + 1e-15):
            raise ValueError("an arc spans at most 2 pi")

    def field(self, points: np.ndarray) -> np.ndarray:
        """H (A/m) at points (n, 3) m."""
        R = _frame(self.normal, self.reference)
        x, y, z = ((_points(points) - np.asarray(self.center)) @ R.T).T
        h = _arc_field(x, y, z, self.radius, float(self.start_angle), float(self.end_angle))
        return self.current * (np.stack(h, axis=1) @ R)


@dataclass(frozen=True)
class Racetrack:
    """Rounded-rectangle coil of rectangular winding cross-section.

    The winding surrounds a core rectangle of `straight_length` (along
    `reference`, projected onto the plane normal to `axis`) by
    `straight_width` (m; 0 gives the classic racetrack with two straight
    sides).  Each turn runs at offset r from the core rectangle: straight
    sides of the rectangle's lengths joined by quarter circles of radius r.
    `turns` turns of `current` (A), counter-clockwise about `axis`, are
    spread uniformly over inner_radius <= r <= outer_radius and
    |axial offset| <= height/2 (m) about `center`.  With no straight parts it
    is the circular :class:`Coil`.

    Field: cross-section average (adaptive Gauss-Legendre with `rel_tol`,
    as for :class:`Coil`) of filament fields, each the sum of closed-form
    segments and arcs."""
    center: tuple[float, float, float]
    axis: tuple[float, float, float]
    straight_length: float
    inner_radius: float
    outer_radius: float
    height: float
    turns: float
    current: float
    straight_width: float = 0.0
    reference: tuple[float, float, float] | None = None
    rel_tol: float = 1e-8

    def __post_init__(self):
        object.__setattr__(self, "center", _vector(self.center, "center"))
        object.__setattr__(self, "axis", _unit(self.axis, "axis"))
        if self.reference is not None:
            object.__setattr__(self, "reference", _vector(self.reference, "reference"))
        _frame(self.axis, self.reference)
        _positive(self.straight_length, "straight_length", allow_zero=True)
        _positive(self.straight_width, "straight_width", allow_zero=True)
        _check_winding(self.inner_radius, self.outer_radius, self.height, self.turns, self.rel_tol)

    def field(self, points: np.ndarray) -> np.ndarray:
        """H (A/m) at points (n, 3) m."""
        R = _frame(self.axis, self.reference)
        local = (_points(points) - np.asarray(self.center)) @ R.T
        a, b = 0.5 * self.straight_length, 0.5 * self.straight_width

        def kernel(i, r, h):
            p = local[i].copy()
            p[:, 2] -= h
            return _rounded_rectangle_field(p, r, a, b)

        # distance (m) in the plane to the core rectangle: the meridian coordinate
        dm = np.hypot(np.maximum(np.abs(local[:, 0]) - a, 0.0), np.maximum(np.abs(local[:, 1]) - b, 0.0))
        avg = _winding_average(kernel, dm, local[:, 2], self.inner_radius,
                               self.outer_radius - self.inner_radius, self.height, self.rel_tol,
                               core=a + b, ncomp=3)
        return self.turns * self.current * (avg @ R)


def _rounded_rectangle_field(p, r, a, b):
    """Unit-current filament in the plane z = 0 around the rectangle
    |x| <= a, |y| <= b (m) at offset r (m): sides of length 2b and 2a joined by
    quarter circles of radius r, counter-clockwise about +z.  H (A/m per A)
    at points p (k, 3) m, for r (k,)."""
    H = np.zeros_like(p)
    for cu, cv, t0, t1 in _corner_arcs(a, b):
        H += np.stack(_arc_field(p[:, 0] - cu, p[:, 1] - cv, p[:, 2], r, t0, t1), axis=1)
    zero = np.zeros_like(r)
    # sides: (start at r = 0, end at r = 0, outward normal); empty ones skipped
    for (u0, v0), (u1, v1), (nu, nv) in (((a, -b), (a, b), (1, 0)), ((a, b), (-a, b), (0, 1)),
                                         ((-a, b), (-a, -b), (-1, 0)), ((-a, -b), (a, -b), (0, -1))):
        if (u0, v0) != (u1, v1):
            s0 = np.stack([u0 + nu * r, v0 + nv * r, zero], axis=1)
            s1 = np.stack([u1 + nu * r, v1 + nv * r, zero], axis=1)
            H += _segment_field(p, s0, s1)
    return H


def _corner_arcs(a, b):
    """(centre x, centre y, start angle, end angle) of the corner arcs of the
    rounded rectangle around |x| <= a, |y| <= b, counter-clockwise; arcs with
    coincident centres are merged (two half circles when b = 0, one full
    circle when a = b = 0), which saves work and keeps the circular case
    identical to the loop."""
    arcs = []
    for k, (cu, cv) in enumerate([(a, b), (-a, b), (-a, -b), (a, -b)]):
        t0 = 0.5 * math.pi * k
        if arcs and arcs[-1][:2] == (cu, cv):
            arcs[-1] = (cu, cv, arcs[-1][2], t0 + 0.5 * math.pi)
        else:
            arcs.append((cu, cv, t0, t0 + 0.5 * math.pi))
    if len(arcs) > 1 and arcs[0][:2] == arcs[-1][:2]:
        last = arcs.pop()
        arcs[0] = (*arcs[0][:2], last[2] - 2 * math.pi, arcs[0][3])
    return arcs


@dataclass(frozen=True)
class PointDipole:
    """Point magnetic dipole of `moment` (A m^2) at `position` (m):
    H = (3 r (m.r)/r^5 - m/r^3)/(4 pi) (Jackson, Classical Electrodynamics,
    3rd ed., 1999, eq. 5.56); not finite at the position itself."""
    position: tuple[float, float, float]
    moment: tuple[float, float, float]

    def __post_init__(self):
        object.__setattr__(self, "position", _vector(self.position, "position"))
        object.__setattr__(self, "moment", _vector(self.moment, "moment"))

    def field(self, points: np.ndarray) -> np.ndarray:
        """H (A/m) at points (n, 3) m."""
        r = _points(points) - np.asarray(self.position)
        m = np.asarray(self.moment)
        r2 = np.einsum("ij,ij->i", r, r)
        with np.errstate(divide="ignore", invalid="ignore"):
            inv3 = 1.0 / (r2 * np.sqrt(r2))
            return (3.0 * (r @ m / r2)[:, None] * r - m) * (inv3 / FOUR_PI)[:, None]

    def potential(self, points: np.ndarray) -> np.ndarray:
        """Scalar potential (A) with H = -grad(potential): m.r/(4 pi r^3)."""
        r = _points(points) - np.asarray(self.position)
        r2 = np.einsum("ij,ij->i", r, r)
        with np.errstate(divide="ignore", invalid="ignore"):
            return (r @ np.asarray(self.moment)) / (FOUR_PI * r2 * np.sqrt(r2))


def _check_winding(inner, outer, length, turns, rel_tol) -> None:
    _positive(inner, "inner_radius", allow_zero=True)
    _positive(outer, "outer_radius")
    _positive(length, "winding length/height", allow_zero=True)
    _positive(turns, "turns")
    if outer < inner:
        raise ValueError(f"outer_radius {outer} is smaller than inner_radius {inner}")
    if not 1e-14 <= rel_tol < 1:
        raise ValueError(f"rel_tol must lie in [1e-14, 1), got {rel_tol!r}")


def total_source_field(sources, points: np.ndarray) -> np.ndarray:
    """Sum of all sources' H (A/m) at points (n, 3) m."""
    points = np.atleast_2d(np.asarray(points, float))
    H = np.zeros_like(points)
    for s in sources:
        H += s.field(points)
    return H
