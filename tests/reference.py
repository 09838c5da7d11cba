"""Published closed forms that tests compare volmag against.

Plain numpy/scipy (mpmath for the extended-precision Newell tensor); nothing
here imports volmag.  Each function names its source and whether the formula
was transcribed from memory.  All demagnetising factors are dimensionless and
magnetometric (volume-averaged) unless stated otherwise; lengths are in metres
but only their ratios matter.
"""
from __future__ import annotations

import math

import numpy as np
from scipy import integrate, special


# ---------------------------------------------------------------- prisms
def prism_demag_factor(a: float, b: float, c: float) -> float:
    """Magnetometric demagnetising factor D_z of a rectangular prism
    2a x 2b x 2c magnetised along c: Aharoni, J. Appl. Phys. 83, 3432 (1998),
    eq. (1), transcribed from memory:

      pi D_z = (b^2-c^2)/(2bc) ln[(R-a)/(R+a)] + (a^2-c^2)/(2ac) ln[(R-b)/(R+b)]
             + b/(2c) ln[(r_ab+a)/(r_ab-a)] + a/(2c) ln[(r_ab+b)/(r_ab-b)]
             + c/(2a) ln[(r_bc-b)/(r_bc+b)] + c/(2b) ln[(r_ac-a)/(r_ac+a)]
             + 2 arctan[ab/(cR)] + (a^3+b^3-2c^3)/(3abc)
             + (a^2+b^2-2c^2) R/(3abc) + c (r_ac + r_bc)/(ab)
             - (r_ab^3 + r_bc^3 + r_ac^3)/(3abc),

    R = sqrt(a^2+b^2+c^2), r_ab = sqrt(a^2+b^2) etc.  Each logarithm is
    evaluated through ln[(r-u)/(r+u)] = -2 asinh(u / sqrt(r^2-u^2)), which is
    the same number with less cancellation.  Against 50-digit evaluation, the
    large factors stay accurate (normal to a plate: 1e-11 at thickness 1e-5),
    small ones do not: along a rod 1.5e-13, 1.4e-10, 1.5e-7 relative at
    10:1, 100:1, 1000:1; in the plane of a plate 2e-13, 5e-11, 2e-9 at
    100:1, 1000:1, 10^4:1."""
    a, b, c = float(a), float(b), float(c)
    R = math.sqrt(a * a + b * b + c * c)
    rab, rbc, rac = math.hypot(a, b), math.hypot(b, c), math.hypot(a, c)
    pi_d = (-(b * b - c * c) / (b * c) * math.asinh(a / rbc)
            - (a * a - c * c) / (a * c) * math.asinh(b / rac)
            + b / c * math.asinh(a / b) + a / c * math.asinh(b / a)
            - c / a * math.asinh(b / c) - c / b * math.asinh(a / c)
            + 2.0 * math.atan(a * b / (c * R))
            + (a ** 3 + b ** 3 - 2.0 * c ** 3) / (3.0 * a * b * c)
            + (a * a + b * b - 2.0 * c * c) * R / (3.0 * a * b * c)
            + c * (rac + rbc) / (a * b)
            - (rab ** 3 + rbc ** 3 + rac ** 3) / (3.0 * a * b * c))
    return pi_d / math.pi


def prism_demag_tensor(size) -> np.ndarray:
    """diag(D_x, D_y, D_z) of a box with edge lengths `size` (Aharoni 1998,
    eq. (1), with the axes permuted)."""
    a, b, c = (0.5 * float(s) for s in size)
    return np.diag([prism_demag_factor(b, c, a), prism_demag_factor(c, a, b),
                    prism_demag_factor(a, b, c)])


# ------------------------------------------------------------ ellipsoids
def ellipsoid_demag_factors(a: float, b: float, c: float) -> np.ndarray:
    """(N_a, N_b, N_c) of an ellipsoid with semi-axes a, b, c: Osborn, Phys.
    Rev. 67, 351 (1945), N_a = (abc/2) int_0^inf ds / ((s+a^2)^(3/2)
    (s+b^2)^(1/2) (s+c^2)^(1/2)), written with Carlson's symmetric integral
    R_D (Carlson, Numer. Algorithms 10, 13 (1995)) as N_a = (abc/3) R_D(b^2,
    c^2, a^2)."""
    a2, b2, c2 = float(a) ** 2, float(b) ** 2, float(c) ** 2
    k = float(a) * float(b) * float(c) / 3.0
    return k * np.array([special.elliprd(b2, c2, a2), special.elliprd(c2, a2, b2),
                         special.elliprd(a2, b2, c2)])


def prolate_spheroid_axial_factor(m: float) -> float:
    """N along the long axis of a prolate spheroid with axis ratio m > 1:
    Osborn (1945), from memory: N = [m/sqrt(m^2-1) ln(m + sqrt(m^2-1)) - 1] / (m^2-1)."""
    q = math.sqrt(m * m - 1.0)
    return (m / q * math.log(m + q) - 1.0) / (m * m - 1.0)


def oblate_spheroid_axial_factor(m: float) -> float:
    """N along the short (symmetry) axis of an oblate spheroid with axis ratio
    m > 1: Osborn (1945), from memory:
    N = m^2/(m^2-1) [1 - arcsin(sqrt(m^2-1)/m) / sqrt(m^2-1)]."""
    q = math.sqrt(m * m - 1.0)
    return m * m / (m * m - 1.0) * (1.0 - math.asin(q / m) / q)


def ellipsoid_apparent_susceptibility(chi, N):
    """Apparent susceptibility chi / (1 + N chi) of an ellipsoid along a
    principal axis with factor N: exact because M is uniform (Osborn 1945;
    Chen, Brug & Goldfarb, IEEE Trans. Magn. 27, 3601 (1991))."""
    chi = np.asarray(chi, dtype=float)
    return chi / (1.0 + np.asarray(N, dtype=float) * chi)


# -------------------------------------------------------------- cylinders
def cylinder_demag_magnetometric(radius: float, height: float) -> tuple[float, float]:
    """(N_radial, N_axial) magnetometric factors of a solid circular cylinder
    of radius a and height L.

    Axially magnetised, the cylinder is two uniformly charged discs, so
    N_axial = (W(0) - W(L)) / (2 pi V), with W(z) the double integral of
    1/|r - r'| over two coaxial discs at distance z.  Since the
    autocorrelation of a disc is the lens area
    A(p) = 2a^2 acos(p/2a) - (p/2) sqrt(4a^2 - p^2),

        N_axial = (1/V) int_0^{2a} A(p) (1 - p / sqrt(p^2 + L^2)) dp,

    a smooth integral.  Derived here (no transcription); the Bessel-integral
    form N_axial = (2a/L) int_0^inf J1(u)^2 (1 - exp(-uL/a)) / u^2 du of
    Joseph, J. Appl. Phys. 37, 4639 (1966) (from memory) is the same number,
    which the tests check.  N_radial = (1 - N_axial)/2 because the trace is 1.
    Limits: N_axial -> 1 for a thin disc, ~ 8a/(3 pi L) for a long rod."""
    a, L = float(radius), float(height)

    def lens_weight(p):
        lens = 2 * a * a * math.acos(p / (2 * a)) - 0.5 * p * math.sqrt(4 * a * a - p * p)
        r = math.hypot(p, L)
        return lens * L * L / (r * (r + p))  # = A(p) (1 - p/r) without cancellation

    # Split at p = L, where the weight changes from ~ A(p) to ~ A(p) L^2/2p^2.
    pts = [L] if L < 2 * a else None
    integral = integrate.quad(lens_weight, 0.0, 2 * a, points=pts, epsabs=0.0, epsrel=1e-13,
                              limit=200)[0]
    n_axial = integral / (math.pi * a * a * L)
    return 0.5 * (1.0 - n_axial), n_axial


# ---------------------------------------------- Newell tensor, extended precision
def newell_f_mp(mp, x, y, z):
    """Newell, Williams & Dunlop, J. Geophys. Res. 98, 9551 (1993), f (from
    memory; tests check d^2/dy^2 d^2/dz^2 f = 1/r)."""
    x, y, z = abs(x), abs(y), abs(z)
    r = mp.sqrt(x * x + y * y + z * z)
    s = (2 * x * x - y * y - z * z) * r / 6
    if y and (x or z):
        s += y / 2 * (z * z - x * x) * mp.asinh(y / mp.sqrt(x * x + z * z))
    if z and (x or y):
        s += z / 2 * (y * y - x * x) * mp.asinh(z / mp.sqrt(x * x + y * y))
    if x and y and z:
        s -= x * y * z * mp.atan(y * z / (x * r))
    return s


def newell_g_mp(mp, x, y, z):
    """Newell et al. (1993) g (from memory; tests check
    d/dx d/dy d^2/dz^2 g = 1/r)."""
    sign = mp.sign(x) * mp.sign(y)
    x, y, z = abs(x), abs(y), abs(z)
    r = mp.sqrt(x * x + y * y + z * z)
    s = -x * y * r / 3
    if z and (x or y):
        s += x * y * z * mp.asinh(z / mp.sqrt(x * x + y * y))
    if x and (y or z):
        s += y / 6 * (3 * z * z - y * y) * mp.asinh(x / mp.sqrt(y * y + z * z))
    if y and (x or z):
        s += x / 6 * (3 * z * z - x * x) * mp.asinh(y / mp.sqrt(x * x + z * z))
    if z:
        s -= z ** 3 / 6 * mp.atan(x * y / (z * r))
        if y:
            s -= z * y * y / 2 * mp.atan(x * z / (y * r))
        if x:
            s -= z * x * x / 2 * mp.atan(y * z / (x * r))
    return sign * s


def newell_tensor_mp(offset, cell, dps: int = 60) -> np.ndarray:
    """T = -N (3, 3) of Newell, Williams & Dunlop (1993) for two cells of edge
    lengths `cell` whose centres differ by `offset`, evaluated in `dps` decimal
    digits with mpmath and rounded to float.  The closed form loses about
    6 log10(|offset|/cell) digits to cancellation; choose dps accordingly."""
    import mpmath

    with mpmath.workdps(dps):
        mp = mpmath.mp
        X = [mpmath.mpf(float(v)) for v in offset]
        d = [mpmath.mpf(float(v)) for v in cell]

        def stencil(fun, i, j, k):
            s = 0
            for a in (-1, 0, 1):
                for b in (-1, 0, 1):
                    for c in (-1, 0, 1):
                        w = (2 if a == 0 else -1) * (2 if b == 0 else -1) * (2 if c == 0 else -1)
                        s += w * fun(mp, X[i] + a * d[i], X[j] + b * d[j], X[k] + c * d[k])
            return s

        scale = -1 / (4 * mpmath.pi * d[0] * d[1] * d[2])
        xx, yy, zz = (stencil(newell_f_mp, *p) for p in ((0, 1, 2), (1, 0, 2), (2, 1, 0)))
        xy, xz, yz = (stencil(newell_g_mp, *p) for p in ((0, 1, 2), (0, 2, 1), (1, 2, 0)))
        T = [[xx, xy, xz], [xy, yy, yz], [xz, yz, zz]]
        return np.array([[float(scale * v) for v in row] for row in T])
