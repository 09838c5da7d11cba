"""Nonlinear soft materials and permanent magnets.

References: a sphere (ellipsoid) in a uniform field magnetises uniformly for
any M(H) law, so its interior state solves the scalar equation
H_in = H0 - N M(H_in) with N = 1/3 for the sphere and N from Osborn (Phys.
Rev. 67, 351, 1945) for an ellipsoid along a principal axis. The law
M = Ms H / (a + |H|) is the Froehlich-Kennelly law (e.g. Jiles, Introduction
to Magnetism and Magnetic Materials, 1998).
"""
import numpy as np
import pytest
from scipy.optimize import brentq

import volmag as vm
from volmag.materials import BHCurve, BHCurveError, FroehlichKennelly, PermanentMagnet
from reference import ellipsoid_demag_factors

LAW = FroehlichKennelly("fk-steel", saturation=1.6e6, half_field=2000.0)   # chi_initial = 800


def sampled_curve(law, n=60, h_max=2e6):
    """The law tabulated at log-spaced fields, as a B-H curve (H, B)."""
    H = np.concatenate([[0.0], np.geomspace(10.0, h_max, n)])
    return BHCurve("tabulated", H, vm.MU0 * (H + law.magnitude(H)))


def interior_state(mat, H0, N):
    h = brentq(lambda h: h - H0 + N * mat.magnitude(h), 0.0, H0)
    return mat.magnitude(h)


@pytest.fixture(scope="module")
def sphere_mesh():
    return vm.Model.build([vm.Body("s", vm.Sphere(0.1), LAW, mesh=vm.MeshSpec("tet", 0.04, 0.015))]).mesh


def solve_sphere(mesh, mat, H0):
    model = vm.Model((vm.Body("s", vm.Sphere(0.1), mat),), mesh, ())
    sol = vm.solve(model, [vm.UniformField((0.0, 0.0, H0))])
    assert sol.converged
    return sol


@pytest.mark.parametrize("H0", [30.0, 1e3, 1e4, 1e5, 2e6])
@pytest.mark.parametrize("kind", ["law", "table"])
def test_sphere_interior_state(sphere_mesh, kind, H0):
    mat = LAW if kind == "law" else sampled_curve(LAW)
    sol = solve_sphere(sphere_mesh, mat, H0)
    ref = interior_state(mat, H0, 1 / 3)
    assert abs(sol.mean_M()[2] / ref - 1) < 0.01, (sol.mean_M()[2], ref)
    w = sphere_mesh.volumes()
    assert np.sqrt(w @ (sol.M[:, 2] - ref) ** 2 / w.sum()) < 0.02 * ref


def test_table_sampled_from_law_matches_law(sphere_mesh):
    """Within interpolation error of the 60-point table (~1e-3 here)."""
    a = solve_sphere(sphere_mesh, LAW, 5e3).mean_M()[2]
    b = solve_sphere(sphere_mesh, sampled_curve(LAW), 5e3).mean_M()[2]
    assert abs(a / b - 1) < 2e-3


def test_prolate_ellipsoid_along_axis():
    axes = (0.2, 0.1, 0.1)
    N = ellipsoid_demag_factors(*axes)[0]
    body = vm.Body("e", vm.Ellipsoid(axes), LAW, mesh=vm.MeshSpec("tet", 0.04, 0.014))
    sol = vm.solve(vm.Model.build([body]), [vm.UniformField((2e4, 0.0, 0.0))])
    assert sol.converged
    ref = interior_state(LAW, 2e4, N)
    assert abs(sol.mean_M()[0] / ref - 1) < 0.01, (sol.mean_M()[0], ref)


def test_magnet_sphere_recoil_exact():
    """Linear recoil: M = (Mr + chi H0) / (1 + chi/3) (uniform sphere)."""
    Br, chi, H0 = 1.2, 0.05, -2e5
    magnet = PermanentMagnet("ndfeb-like", (0.0, 0.0, Br), chi)
    body = vm.Body("m", vm.Sphere(0.01), magnet, mesh=vm.MeshSpec("tet", 0.004, 0.0015))
    sol = vm.solve(vm.Model.build([body]), [vm.UniformField((0.0, 0.0, H0))])
    ref = (Br / vm.MU0 + chi * H0) / (1 + chi / 3)
    assert abs(sol.mean_M()[2] / ref - 1) < 1e-3
    assert np.abs(sol.M[:, 2] / ref - 1).max() < 2e-3


def test_magnetisation_monotone_and_saturates(sphere_mesh):
    fields = [1e2, 1e4, 3e5, 1e7]
    means = [solve_sphere(sphere_mesh, LAW, H0).mean_M()[2] for H0 in fields]
    assert np.all(np.diff(means) > 0)
    assert abs(means[-1] / LAW.saturation - 1) < 2e-3


@pytest.mark.parametrize("H0, tol", [(1e6, 0.02), (1e7, 5e-3)])
def test_hex_nonlinear_sphere(H0, tol):
    """Towards saturation, where the effective susceptibility is modest and
    the voxel staircase (+5 % volume at this size) matters less."""
    body = vm.Body("s", vm.Sphere(0.1), LAW, mesh=vm.MeshSpec("hex", 0.02))
    sol = vm.solve(vm.Model.build([body]), [vm.UniformField((0.0, 0.0, H0))])
    assert sol.converged
    ref = interior_state(LAW, H0, 1 / 3)
    assert abs(sol.mean_M()[2] / ref - 1) < tol


@pytest.mark.parametrize("H0", [3e3, 1e6])
def test_hex_nonlinear_fft_equals_dense(H0):
    """Same discretisation and Newton iteration, the Jacobian applied by FFT
    (with the multilevel preconditioner where the differential susceptibility
    is high): both solutions agree to the Newton tolerance."""
    body = vm.Body("s", vm.Sphere(0.1), LAW, mesh=vm.MeshSpec("hex", 0.025))
    model = vm.Model.build([body])
    field = [vm.UniformField((0.0, 0.0, H0))]
    dense = vm.solve(model, field, vm.SolverOptions(method="dense", tolerance=1e-9))
    fast = vm.solve(model, field, vm.SolverOptions(method="fft", tolerance=1e-9))
    assert dense.converged and fast.converged and fast.method == "fft"
    assert np.abs(fast.M - dense.M).max() < 1e-5 * np.abs(dense.M).max()


@pytest.mark.parametrize("text, row, words", [
    ("H,B\n0,0\n100,0.5\n50,0.6\n1000,1.2\n", 4, "H must increase"),
    ("0,0\n100,0.5\n200,0.4\n1000,1.2\n", 3, "B must increase"),
    ("0,0\n100,-0.1\n200,0.4\n1000,1.2\n", 2, "B must increase"),
    ("0,0\n100,0.5\n", None, "at least 4"),
    ("H,B\nOe,G\n0,0\n100,0.5\n200,0.8\n1000,1.2\n", 2, "units row"),
    ("0,0\n1e5,0.1\n2e5,0.2\n3e5,0.3\n", 2, "below mu0 H"),
    ("1,0\n100,0.5\n200,0.8\n1000,1.2\n", 1, "start at H = 0"),
    ("0,0\n100,abc\n200,0.8\n1000,1.2\n", 2, "not a number"),
])
def test_malformed_curves_name_the_row(tmp_path, text, row, words):
    path = tmp_path / "curve.csv"
    path.write_text(text)
    with pytest.raises(BHCurveError, match=words) as err:
        BHCurve.from_csv(path)
    assert err.value.row == row
    assert str(path) in str(err.value)


def test_units_row_accepted(tmp_path):
    path = tmp_path / "curve.csv"
    path.write_text("H,B\nA/m,T\n0,0\n100,0.5\n200,0.8\n1000,1.2\n")
    curve = BHCurve.from_csv(path)
    assert curve.flux_density(np.array([200.0]))[0] == pytest.approx(0.8)
    # beyond the table dB/dH = mu0 (saturation)
    assert curve.flux_density(np.array([2000.0]))[0] == pytest.approx(1.2 + vm.MU0 * 1000)


def test_knee_warning_when_opposing_field_exceeds_knee():
    """A magnet sphere in an opposing field H0: H_in = H0 - M/3 (uniform), so a
    knee below |H_in| must be reported (design rule, common practice)."""
    from volmag.case import parse_case
    from volmag.run import run_case
    text = """
title = "magnet in opposing field"
[[material]]
name = "grade"
remanence = [0.0, 0.0, 1.2]
susceptibility = 0.05
knee_field = 5e5
[[body]]
name = "m"
material = "grade"
shape = {type = "sphere", radius = 0.01}
mesh = {element = "tet", size = 0.006}
[[source]]
type = "uniform"
H = [0.0, 0.0, %g]
"""
    quiet = run_case(parse_case(text % -1e5)).summary()
    assert quiet["warnings"] == []                    # H_in = -1e5 - 3.2e5 = -4.2e5: above the knee
    loud = run_case(parse_case(text % -3e5)).summary()
    assert len(loud["warnings"]) == 1 and "knee" in loud["warnings"][0]   # H_in = -6.2e5


@pytest.mark.parametrize("H0", [1e3, 1e6])
def test_tet_nonlinear_fft_equals_dense(sphere_mesh, H0):
    """Matrix-free Newton on tetrahedra (precorrected-FFT single layer,
    operator tolerance 1e-6): the same discrete problem as the dense path
    (independent dense computation in this code base), so both agree far
    below the discretisation error, and both meet the exact scalar
    equation H_in = H0 - M(H_in)/3.  H0 = 1e3: differential chi ~ 100 at
    the interior state; 1e6: near saturation."""
    model = vm.Model((vm.Body("s", vm.Sphere(0.1), LAW),), sphere_mesh, ())
    field = [vm.UniformField((0.0, 0.0, H0))]
    dense = vm.solve(model, field, vm.SolverOptions(method="dense"))
    fast = vm.solve(model, field, vm.SolverOptions(method="fft"))
    assert dense.converged and fast.converged and fast.method == "fft"
    # measured: 2e-9 (H0 = 1e3) and 6e-13 (1e6)
    assert abs(fast.mean_M()[2] / dense.mean_M()[2] - 1) < 1e-5
    assert np.abs(fast.M - dense.M).max() < 1e-5 * np.abs(dense.M).max()
    ref = interior_state(LAW, H0, 1 / 3)
    assert abs(fast.mean_M()[2] / ref - 1) < 0.01, (fast.mean_M()[2], ref)
    w = sphere_mesh.volumes()
    assert np.sqrt(w @ (fast.M[:, 2] - ref) ** 2 / w.sum()) < 0.02 * ref


def test_tet_nonlinear_auto_avoids_dense_over_memory():
    """The dense nonlinear path stores S (nodes x faces), more than the linear
    dense estimate: a limit between the two (and above the fft estimate)
    makes `auto` take fft, whose solution meets the exact scalar equation,
    and a forced dense solve is refused naming 'fft'."""
    from volmag.methods import estimates
    from volmag.nonlinear import _dense_tet_bytes
    from volmag.solve import SolverError
    model = vm.Model.build([vm.Body("s", vm.Sphere(0.1), LAW, mesh=vm.MeshSpec("tet", 0.02, 0.01))])
    mesh = model.mesh
    need = _dense_tet_bytes(len(mesh.nodes), 2 * mesh.n_cells + 1)
    table = {e.method: e for e in estimates(mesh, vm.SolverOptions())}
    limit = 0.5 * (table["fft"].bytes + need)
    assert table["dense"].bytes < table["fft"].bytes < limit < need
    assert table["dense"].seconds < table["fft"].seconds        # without the limit, dense is chosen
    field = [vm.UniformField((0.0, 0.0, 1e4))]
    lines = []
    sol = vm.solve(model, field, vm.SolverOptions(memory_limit=limit), progress=lines.append)
    assert sol.converged and sol.method == "fft"
    assert any("method fft" in s and "dense nonlinear" in s for s in lines), lines
    assert abs(sol.mean_M()[2] / interior_state(LAW, 1e4, 1 / 3) - 1) < 0.01
    with pytest.raises(SolverError, match="'fft'"):
        vm.solve(model, field, vm.SolverOptions(method="dense", memory_limit=limit))


@pytest.mark.slow
def test_tet_nonlinear_fmm_equals_dense(sphere_mesh):
    """The face-charge FMM through the same matrix-free Newton path (about
    50 s here): agrees with the dense solve (independent dense computation
    in this code base; measured 2e-9 in mean M)."""
    model = vm.Model((vm.Body("s", vm.Sphere(0.1), LAW),), sphere_mesh, ())
    field = [vm.UniformField((0.0, 0.0, 1e3))]
    dense = vm.solve(model, field, vm.SolverOptions(method="dense"))
    fast = vm.solve(model, field, vm.SolverOptions(method="fmm"))
    assert fast.converged and fast.method == "fmm"
    assert abs(fast.mean_M()[2] / dense.mean_M()[2] - 1) < 1e-5
