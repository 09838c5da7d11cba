"""The FFT path for hexahedral grids against the dense Newell operator,
Aharoni's prism, the uniformly magnetised sphere, and the method choice."""
import json
import subprocess
import sys

import numpy as np
import pytest

import volmag as vm
from volmag import fft, operators
from volmag.krylov import gmres
from volmag.solve import DenseSystem, GridFFTSystem, make_system

from reference import prism_demag_tensor

FIELD = [vm.UniformField((0.0, 0.0, 1.0))]


def holed_two_material_model(cell=0.1):
    """A drilled plate and a separate bar of another, anisotropic material on
    one grid: holes and gaps are zeros of the mask."""
    plate = vm.Body("plate", vm.Box((1.2, 0.8, 0.3)), vm.LinearMaterial("steel", 300.0),
                    cuts=(vm.Cut(vm.Cylinder(0.2, 0.5)),), mesh=vm.MeshSpec("hex", cell))
    chi_bar = np.array([[5.0, 1.0, 0.0], [1.0, 3.0, 0.0], [0.0, 0.0, 2.0]])
    bar = vm.Body("bar", vm.Box((0.3, 0.3, 0.9)), vm.LinearMaterial("ferrite", chi_bar),
                  mesh=vm.MeshSpec("hex", cell), placement=vm.Placement((0.0, 0.0, 0.8)))
    return vm.Model.build([plate, bar])


def test_fft_product_equals_dense_product_with_holes_and_two_materials():
    """Exactness of the convolution: same Newell tensors, summed by FFT."""
    model = holed_two_material_model()
    mesh = model.mesh
    assert len(set(mesh.body_id)) == 2
    shape = fft.grid_shape(mesh.grid_index)
    assert mesh.n_cells < np.prod(shape)                      # there are holes and gaps
    M = np.random.default_rng(1).standard_normal((mesh.n_cells, 3))
    dense = (operators.grid_tensor_blocks(mesh.grid_index, mesh.cell_size) @ M.ravel()).reshape(-1, 3)
    for precision, tol in (("double", 1e-12), ("single", 1e-6)):
        K = fft.GridOperator(mesh.grid_index, mesh.cell_size, precision)
        err = np.linalg.norm(K(M) - dense) / np.linalg.norm(dense)
        assert err < tol, (precision, err)
    # and the whole system, with both materials' susceptibilities
    opts = vm.SolverOptions(method="dense")
    A = DenseSystem(model, opts).A
    fast = GridFFTSystem(model, vm.SolverOptions(method="fft"))
    x = M.ravel()
    assert np.linalg.norm(fast.matvec(x) - A @ x) / np.linalg.norm(A @ x) < 1e-12


@pytest.mark.parametrize("size,cells", [((1.0, 1.0, 1.0), (12, 12, 12)), ((1.0, 2.0, 5.0), (4, 8, 20)),
                                        ((10.0, 1.0, 1.0), (40, 4, 4))])
def test_prism_demag_tensor_by_fft_against_aharoni(size, cells):
    """Aharoni, J. Appl. Phys. 83, 3432 (1998): the Newell cells tile the prism
    exactly, so the FFT sum must reproduce the closed form to rounding."""
    idx = np.stack(np.meshgrid(*[np.arange(n) for n in cells], indexing="ij"), -1).reshape(-1, 3)
    cell = np.array(size) / np.array(cells)
    N = fft.uniform_demag(idx, cell)
    assert np.allclose(N, prism_demag_tensor(size), rtol=1e-9, atol=1e-12)
    body = vm.Body("b", vm.Box(size), vm.LinearMaterial("m", 0.0), mesh=vm.MeshSpec("hex", min(cell)))
    assert np.allclose(vm.demag_tensor(vm.Model.build([body]), "b").N, prism_demag_tensor(size),
                       rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("chi", [10.0, 1000.0])
def test_sphere_dense_and_fft_agree(chi):
    """Same discretisation, two methods: apparent susceptibilities agree to the
    solver tolerance; both near chi / (1 + chi/3) (uniformly magnetised sphere,
    e.g. Jackson, Classical Electrodynamics, 3rd ed., 5.10) within the
    staircase error of a coarse voxel sphere."""
    body = vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", chi), mesh=vm.MeshSpec("hex", 0.16))
    model = vm.Model.build([body])
    dense = vm.solve(model, FIELD, vm.SolverOptions(method="dense", tolerance=1e-10))
    fast = vm.solve(model, FIELD, vm.SolverOptions(method="fft", tolerance=1e-10))
    assert dense.method == "dense" and fast.method == "fft" and fast.converged
    xd, xf = dense.mean_M()[2], fast.mean_M()[2]
    assert abs(xf / xd - 1) < 1e-8, (xd, xf)
    assert np.abs(fast.M - dense.M).max() < 1e-7 * np.abs(dense.M).max()
    # staircase error of a voxel sphere of radius 6 cells: measured 5.5 % at chi = 1000
    assert abs(xf / (chi / (1 + chi / 3)) - 1) < 0.08


def test_diamagnetic_and_anisotropic_bodies_by_fft_equal_dense():
    """chi < 0 (not positive definite: GMRES) and a symmetric anisotropic chi
    beside it; the FFT solve equals the dense one."""
    dia = vm.Body("bismuth", vm.Box((1.0, 0.6, 0.4)), vm.LinearMaterial("bi", -0.4), mesh=vm.MeshSpec("hex", 0.1))
    chi = np.array([[40.0, 5.0, 0.0], [5.0, 20.0, 0.0], [0.0, 0.0, 10.0]])
    aniso = vm.Body("ferrite", vm.Box((0.4, 0.4, 0.4)), vm.LinearMaterial("fe", chi), mesh=vm.MeshSpec("hex", 0.1),
                    placement=vm.Placement((0.0, 0.0, 0.6)))
    for bodies in ([dia], [aniso], [dia, aniso]):
        model = vm.Model.build(bodies)
        dense = vm.solve(model, FIELD, vm.SolverOptions(method="dense"))
        fast = vm.solve(model, FIELD, vm.SolverOptions(method="fft"))
        assert fast.converged
        assert np.abs(fast.M - dense.M).max() < 1e-7 * np.abs(dense.M).max()


@pytest.mark.parametrize("chi_r", [0.0, 0.05])
def test_magnet_and_steel_by_fft_equal_dense(chi_r):
    """Remanence on the right-hand side, no other source: a magnet block above
    a steel plate; the FFT solve equals the dense one (chi_r = 0 is not
    positive definite: GMRES; 0.05 with the steel: conjugate gradients)."""
    from volmag.materials import PermanentMagnet
    magnet = vm.Body("magnet", vm.Box((0.3, 0.3, 0.2)), PermanentMagnet("ndfeb", (0.0, 0.0, 1.2), chi_r),
                     mesh=vm.MeshSpec("hex", 0.1), placement=vm.Placement((0.0, 0.0, 0.3)))
    plate = vm.Body("plate", vm.Box((1.0, 1.0, 0.1)), vm.LinearMaterial("steel", 25.0), mesh=vm.MeshSpec("hex", 0.1))
    model = vm.Model.build([magnet, plate])
    dense = vm.solve(model, [], vm.SolverOptions(method="dense"))
    fast = vm.solve(model, [], vm.SolverOptions(method="fft"))
    assert fast.converged and np.abs(dense.M[:, 2]).max() > 1e5
    assert np.abs(fast.M - dense.M).max() < 1e-7 * np.abs(dense.M).max()


def test_magnet_and_steel_on_tetrahedra_by_pfft_equal_dense():
    """The same on tetrahedra: the precorrected FFT (operator tolerance 1e-6)
    against the dense operator, element by element."""
    from volmag.materials import PermanentMagnet
    magnet = vm.Body("magnet", vm.Box((0.3, 0.3, 0.2)), PermanentMagnet("ndfeb", (0.0, 0.0, 1.2), 0.05),
                     mesh=vm.MeshSpec("tet", 0.08), placement=vm.Placement((0.0, 0.0, 0.3)))
    plate = vm.Body("plate", vm.Box((1.0, 1.0, 0.1)), vm.LinearMaterial("steel", 25.0), mesh=vm.MeshSpec("tet", 0.08))
    model = vm.Model.build([magnet, plate])
    dense = vm.solve(model, [], vm.SolverOptions(method="dense"))
    fast = vm.solve(model, [], vm.SolverOptions(method="fft"))
    assert fast.converged and fast.method == "fft"
    assert np.abs(fast.M - dense.M).max() < 1e-5 * np.abs(dense.M).max()     # measured 3e-7


def test_single_precision_solve_within_its_tolerance():
    body = vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 1000.0), mesh=vm.MeshSpec("hex", 0.2))
    model = vm.Model.build([body])
    double = vm.solve(model, FIELD, vm.SolverOptions(method="fft"))
    single = vm.solve(model, FIELD, vm.SolverOptions(method="fft", precision="single"))
    assert single.converged and single.residual <= 1e-6
    assert abs(single.mean_M()[2] / double.mean_M()[2] - 1) < 1e-5


@pytest.mark.parametrize("shape", [vm.Sphere(1.0), vm.Box((2.0, 1.0, 0.5)), vm.Box((4.0, 4.0, 0.2))])
def test_multilevel_preconditioner_cuts_iterations_at_high_chi(shape):
    """chi = 1000: the multilevel cycle must need at most a quarter of the
    iterations of plain GMRES on the same operator, and fewer than 40."""
    body = vm.Body("s", shape, vm.LinearMaterial("m", 1000.0), mesh=vm.MeshSpec("hex", 0.1))
    model = vm.Model.build([body])
    opts = vm.SolverOptions(method="fft", tolerance=1e-8)
    system = GridFFTSystem(model, opts)
    sol = system.solve(FIELD)
    assert sol.converged and sol.iterations < 40, sol.iterations
    b = system.rhs([system.source_field(FIELD)])[:, 0]
    plain = gmres(system.matvec, b, tol=1e-8, maxiter=400)
    assert plain.iterations > 4 * sol.iterations, (plain.iterations, sol.iterations)
    # same system: the solutions agree to (residual tolerance) x (condition number)
    assert np.linalg.norm(plain.x - sol.M.ravel()) < 1e-5 * np.linalg.norm(plain.x)


def test_auto_picks_dense_small_and_fft_beyond_memory_limit():
    model = vm.Model.build([vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 10.0),
                                    mesh=vm.MeshSpec("hex", 0.25))])
    lines = []
    assert make_system(model, vm.SolverOptions(), lines.append).method == "dense"
    assert any("method dense" in line for line in lines)
    limit = 0.5 * 20.0 * (3 * model.mesh.n_cells) ** 2      # half the dense estimate
    lines.clear()
    system = make_system(model, vm.SolverOptions(memory_limit=limit), lines.append)
    assert system.method == "fft" and any("method fft" in line for line in lines)
    with pytest.raises(vm.SolverError, match="'fft'"):
        make_system(model, vm.SolverOptions(method="dense", memory_limit=limit))


def run_steel_case(tmp_path, shape, cell, solver):
    """`volmag run --json` on one hex steel body in a uniform field."""
    case = tmp_path / "case.toml"
    case.write_text('title = "steel"\n[[material]]\nname = "steel"\nsusceptibility = 1000\n'
                    f'[[body]]\nname = "part"\nmaterial = "steel"\nshape = {shape}\n'
                    f'mesh = {{element = "hex", size = {cell}}}\n'
                    f'[[source]]\ntype = "uniform"\nH = [0, 0, 1000]\n[solver]\n{solver}\n')
    return subprocess.run([sys.executable, "-m", "volmag", "run", str(case), "--json", "--quiet"],
                          capture_output=True, text=True, timeout=300)


def test_forced_dense_on_large_grid_exits_2_before_allocating(tmp_path):
    """64,000 cells: a dense operator would need ~700 GiB; the run must refuse
    at once (no assembly), naming the method to use."""
    run = run_steel_case(tmp_path, '{type = "box", size = [0.4, 0.4, 0.4]}', 0.01, 'method = "dense"')
    assert run.returncode == 2, run.stderr
    assert "dense" in run.stderr and "GiB" in run.stderr and "'fft'" in run.stderr


def test_memory_limit_key_in_case_file_is_used(tmp_path):
    run = run_steel_case(tmp_path, '{type = "sphere", radius = 1}', 0.2, "memory_limit_gib = 0.02")
    assert run.returncode == 0, run.stderr
    assert json.loads(run.stdout)["solver"]["method"] == "fft"


def test_auto_picks_fast_tetrahedral_method_beyond_memory_limit():
    """Tetrahedra (18k): dense while it fits; under a limit below the dense
    estimate, the fast method that fits; a forced dense is refused, naming it."""
    from volmag.methods import choose, estimates
    model = vm.Model.build([vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 100.0),
                                    mesh=vm.MeshSpec("tet", 0.1))])
    est = {e.method: e for e in estimates(model.mesh, vm.SolverOptions())}
    assert choose(model.mesh, vm.SolverOptions(memory_limit=64e9))[0] == "dense"
    limit = 0.8 * est["dense"].bytes
    fits = [m for m in ("fft", "fmm") if est[m].bytes <= limit]
    assert fits
    assert choose(model.mesh, vm.SolverOptions(memory_limit=limit))[0] in fits
    with pytest.raises(vm.SolverError, match=f"'{fits[0]}'|'{fits[-1]}'"):
        choose(model.mesh, vm.SolverOptions(method="dense", memory_limit=limit))
