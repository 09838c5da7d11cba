"""Rectangular-cell interaction tensor (volmag.newell) and the reference
formulas in tests/reference.py.

Sources: Newell, Williams & Dunlop, J. Geophys. Res. 98, 9551 (1993), the
tensor itself, evaluated in 40-80 digits with mpmath as the reference;
Aharoni, J. Appl. Phys. 83, 3432 (1998), prism demagnetising factors; Osborn,
Phys. Rev. 67, 351 (1945), ellipsoids; Chen, Brug & Goldfarb, IEEE Trans.
Magn. 27, 3601 (1991), cylinders.
"""
import math

import mpmath
import numpy as np
import pytest
from scipy import integrate, special

from reference import (cylinder_demag_magnetometric, ellipsoid_apparent_susceptibility,
                       ellipsoid_demag_factors, newell_f_mp, newell_g_mp, newell_tensor_mp,
                       oblate_spheroid_axial_factor, prism_demag_factor, prism_demag_tensor,
                       prolate_spheroid_axial_factor)
from volmag import newell

CUBE = (1.0, 1.0, 1.0)
NEEDLE = (10.0, 1.0, 1.0)       # aspect 10:1, the worst case for the closed form
PLATE = (1.0, 1.0, 0.1)
BRICK = (1.0, 2.0, 5.0)


def rel_err(T, ref):
    return np.abs(T - ref).max() / np.abs(ref).max()


def mp_reference(offset, cell):
    """Newell (1993) in enough digits: the closed form loses ~6 digits per decade."""
    cells_away = np.linalg.norm(offset) / min(cell)
    return newell_tensor_mp(offset, cell, dps=int(40 + 7 * math.log10(max(cells_away, 1.0))))


# ------------------------------------------------------------ the reference itself
@pytest.mark.parametrize("p", [(0.3, 0.7, 1.1), (-1.3, 0.4, -0.9), (2.0, -0.5, 0.6)])
def test_extended_precision_f_and_g_solve_their_defining_equations(p):
    """Newell's f and g (from memory) are checked against what the stencil
    needs: d^2/dy^2 d^2/dz^2 f = 1/r and d/dx d/dy d^2/dz^2 g = 1/r."""
    with mpmath.workdps(30):
        mp = mpmath.mp
        x, y, z = (mpmath.mpf(v) for v in p)
        inv_r = 1 / mpmath.sqrt(x * x + y * y + z * z)
        f_yyzz = mpmath.diff(lambda b, c: newell_f_mp(mp, x, b, c), (y, z), (2, 2))
        g_xyzz = mpmath.diff(lambda a, b, c: newell_g_mp(mp, a, b, c), (x, y, z), (1, 1, 2))
        assert abs(f_yyzz / inv_r - 1) < 1e-15
        assert abs(g_xyzz / inv_r - 1) < 1e-15


# --------------------------------------------------------------- tensor properties
@pytest.mark.parametrize("cell", [CUBE, NEEDLE, PLATE, BRICK])
def test_self_tensor_has_trace_minus_one(cell):
    T = newell.cell_tensor(np.zeros(3), np.array(cell))
    assert np.trace(T) == pytest.approx(-1.0, abs=1e-13)
    assert np.abs(T - np.diag(np.diag(T))).max() < 1e-15
    if cell == CUBE:  # -I/3 by symmetry
        assert np.allclose(T, -np.eye(3) / 3, rtol=0, atol=1e-15)


# Offsets in cells, one per zone at least: touching, separated, distant.
OFFSETS = [(1, 0, 0), (1, -1, 1), (0.7, 1.1, -0.2), (2, 0, 1), (3, -2, 5), (-7, 4, 2),
           (30, -11, 4), (4e3, 1e3, -2.5e3)]


@pytest.mark.parametrize("cell", [CUBE, NEEDLE, BRICK])
def test_tensor_is_symmetric_even_traceless_and_covariant(cell):
    d = np.array(cell)
    perm = [2, 0, 1]
    P = np.eye(3)[perm]
    for u in OFFSETS:
        X = np.array(u, float) * d
        T = newell.cell_tensor(X, d)
        scale = np.abs(T).max()
        assert np.array_equal(T, T.T)
        assert np.abs(newell.cell_tensor(-X, d) - T).max() <= 5e-11 * scale
        assert abs(np.trace(T)) <= 5e-11 * scale          # separate cells: div H = 0
        # Relabelling the axes permutes the tensor: T(PX; Pd) = P T P^T.
        Tp = newell.cell_tensor(X[perm], d[perm])
        assert np.abs(Tp - P @ T @ P.T).max() <= 5e-11 * scale


def test_batch_matches_single_and_rejects_bad_cells():
    d = np.array(BRICK)
    X = np.array(OFFSETS, float) * d
    batch = newell.cell_tensors(X, d)
    assert batch.shape == (len(X), 3, 3)
    for i in range(len(X)):
        assert np.array_equal(batch[i], newell.cell_tensor(X[i], d))
    with pytest.raises(ValueError):
        newell.cell_tensor(np.ones(3), np.array([1.0, 0.0, 1.0]))
    with pytest.raises(ValueError):
        newell.cell_tensors(X, np.array([1.0, -1.0, 1.0]))


# ------------------------------------------------------- accuracy vs 40-80 digits
def _accuracy_offsets():
    """Offsets in cells: all touching neighbours (half: T is even), off-grid near
    ones, and grid offsets from 2 to 1e6 cells in an axial and a skew direction."""
    near = [np.array(np.unravel_index(i, (3, 3, 3))) - 1.0 for i in range(14)]
    near += [np.array(u) for u in [(1.2, 0.3, -1.1), (-0.4, 1.25, 0.9), (1.25, 1.25, 0.0)]]
    far = []
    for dist in [2, 3, 5, 10, 30, 100, 1e3, 1e4, 1e5, 1e6]:
        far.append(np.array([dist, 0.0, 1.0]))
        far.append(np.round(dist * np.array([0.37, -1.0, 0.64])))
    return near, far


@pytest.mark.parametrize("cell", [CUBE, NEEDLE, PLATE, BRICK])
def test_tensor_matches_extended_precision_from_0_to_1e6_cells(cell):
    d = np.array(cell)
    near, far = _accuracy_offsets()
    worst_near = max(rel_err(newell.cell_tensor(u * d, d), mp_reference(u * d, d)) for u in near)
    worst_far = max(rel_err(newell.cell_tensor(u * d, d), mp_reference(u * d, d)) for u in far)
    # Measured: near 3e-14 (cube) .. 2.4e-11 (needle); separated 2e-13.
    assert worst_near < (5e-11 if cell == NEEDLE else 3e-12)
    assert worst_far < 1e-12


@pytest.mark.parametrize("cell", [CUBE, NEEDLE, PLATE])
def test_zone_switches_are_continuous(cell):
    """Either side of each switch (closed form | quadrature | series) the
    tensor agrees with itself to the accuracy of the worse side."""
    d = np.array(cell)
    tol = 5e-11 if cell == NEEDLE else 3e-12
    near_edge = np.array([newell.NEAR, 0.3, -0.6]) * d
    far_edge = newell.FAR * np.linalg.norm(d) * np.array([0.48, -0.8, 0.36])
    for X in (near_edge, far_edge):
        inside = newell.cell_tensor(X * (1 - 1e-14), d)
        outside = newell.cell_tensor(X * (1 + 1e-14), d)
        assert rel_err(inside, outside) < tol
        assert rel_err(outside, mp_reference(X, d)) < tol


def dipole_tensor(X, V):
    r = np.linalg.norm(X)
    return V / (4 * np.pi) * (3 * np.outer(X, X) - r * r * np.eye(3)) / r ** 5


@pytest.mark.parametrize("cell, order, dists", [(BRICK, 2, [30, 300, 3000]),
                                                (CUBE, 4, [15, 45, 135])])
def test_far_field_tends_to_point_dipole(cell, order, dists):
    """T -> V/(4 pi) (3 r r^T - r^2 I)/r^5, the relative difference falling as
    (cell/distance)^2, and as (cell/distance)^4 for cubes, whose second-order
    term vanishes (the Laplacian of the dipole kernel is zero)."""
    d = np.array(cell)
    u = np.array([0.6, -0.48, 0.64])
    errs = [rel_err(newell.cell_tensor(s * u, d), dipole_tensor(s * u, d.prod())) for s in dists]
    slopes = np.diff(np.log(errs)) / np.diff(np.log(dists))
    assert np.allclose(slopes, -order, atol=0.05)
    # The same at the first distance against the extended-precision closed form.
    ref = mp_reference(dists[0] * u, d)
    assert rel_err(ref, dipole_tensor(dists[0] * u, d.prod())) == pytest.approx(errs[0], rel=1e-3)


# ------------------------------------------------------- whole box vs Aharoni 1998
@pytest.mark.parametrize("size", [(1e-3, 1e-3, 1e-3), (1e-3, 2e-3, 5e-3), (10e-3, 1e-3, 1e-3)])
@pytest.mark.parametrize("counts", [(1, 1, 1), (3, 4, 5), (6, 2, 3)])
def test_box_tensor_matches_aharoni(size, counts):
    N = newell.box_demag_tensor(size, counts)
    ref = prism_demag_tensor(size)
    assert np.trace(N) == pytest.approx(1.0, abs=1e-12)
    assert rel_err(N, ref) < 1e-11           # measured <= 4e-14


# --------------------------------------------------------- reference self-checks
def test_aharoni_prism_factors():
    """Aharoni (1998): cube 1/3, D_x + D_y + D_z = 1, thin plate -> 1, long rod -> 0."""
    assert prism_demag_factor(1, 1, 1) == pytest.approx(1 / 3, abs=1e-15)
    for size in [(1, 2, 5), (0.1, 3, 7), (4, 4, 0.01)]:
        assert np.trace(prism_demag_tensor(size)) == pytest.approx(1.0, abs=1e-13)
    thin = [prism_demag_factor(1, 1, t) for t in 10.0 ** -np.arange(1, 7)]
    assert np.all(np.diff(thin) > 0) and 1 - thin[-1] < 1e-4
    # Along a long rod D ~ w/L (the formula loses ~3 digits per decade of L/w).
    rod = [prism_demag_factor(t, t, 1) for t in 10.0 ** -np.arange(1, 4)]
    assert np.all(np.diff(rod) < 0) and rod[-1] < 1e-3


def test_osborn_ellipsoid_factors():
    """Osborn (1945): sum 1, sphere 1/3, and Carlson R_D agrees with the
    prolate and oblate spheroid closed forms."""
    assert np.allclose(ellipsoid_demag_factors(2, 2, 2), 1 / 3, rtol=0, atol=1e-15)
    for axes in [(1, 2, 3), (5, 0.2, 1), (1, 1, 40)]:
        assert ellipsoid_demag_factors(*axes).sum() == pytest.approx(1.0, abs=1e-13)
    for m in [1.01, 1.5, 3.0, 10.0, 1e3]:
        assert ellipsoid_demag_factors(m, 1, 1)[0] == pytest.approx(prolate_spheroid_axial_factor(m),
                                                                    rel=1e-10)
        assert ellipsoid_demag_factors(m, m, 1)[2] == pytest.approx(oblate_spheroid_axial_factor(m),
                                                                    rel=1e-10)


def test_apparent_susceptibility_of_sphere():
    """chi / (1 + N chi): linear for small chi, 1/N = 3 for a sphere as chi -> inf."""
    assert ellipsoid_apparent_susceptibility(1e-6, 1 / 3) == pytest.approx(1e-6, rel=1e-6)
    assert ellipsoid_apparent_susceptibility(1e12, 1 / 3) == pytest.approx(3.0, rel=1e-11)
    assert ellipsoid_apparent_susceptibility(1000.0, 1 / 3) == pytest.approx(1000 / (1 + 1000 / 3))


def test_cylinder_factors():
    """Disc/rod limits; the Bessel-integral form of Joseph (1966, from memory),
    (2a/L) [4/(3 pi) - int_0^inf J1(u)^2 exp(-uL/a)/u^2 du], with
    int_0^inf J1^2/u^2 du = 4/(3 pi) (Gradshteyn & Ryzhik 6.574.2, from
    memory); and N = 0.3116 for height = diameter (Chen, Brug & Goldfarb
    1991, table, from memory)."""
    for L in [0.5, 2.0, 7.0]:
        damped = integrate.quad(lambda u: special.j1(u) ** 2 * math.exp(-u * L) / u ** 2,
                                0, np.inf, epsabs=1e-14, limit=400)[0]
        bessel = 2 / L * (4 / (3 * math.pi) - damped)
        n_rad, n_ax = cylinder_demag_magnetometric(1.0, L)
        assert n_ax == pytest.approx(bessel, rel=1e-9)
        assert 2 * n_rad + n_ax == pytest.approx(1.0, abs=1e-15)
    assert cylinder_demag_magnetometric(1.0, 2.0)[1] == pytest.approx(0.3116, abs=1e-4)
    assert cylinder_demag_magnetometric(1.0, 1e-5)[1] == pytest.approx(1.0, abs=1e-4)
    L = 1e4  # long rod: N -> 8a/(3 pi L)
    assert cylinder_demag_magnetometric(1.0, L)[1] == pytest.approx(8 / (3 * math.pi * L), rel=1e-3)
