"""FFT path for hexahedral grids: product cost, scaling, iterations against chi.

Three tables:

1. Time of one FFT product against the bare padded transforms it needs
   (three forward and three inverse real transforms of the padded grid),
   measured in the same process: the ratio is the overhead of the
   convolution (target <= 1.5).
2. Scaling: voxel spheres from 1e3 to 1e6 cells (each size in its own
   process, for its peak memory): set-up time, time per product, iterations
   and total time at chi = 10 and 1000, peak memory, and the error of the
   apparent susceptibility against chi / (1 + chi/3) (exact for a sphere,
   e.g. Jackson, Classical Electrodynamics, 3rd ed., sec. 5.10; the voxel
   staircase dominates it).  Fitted exponent of time against cells.
3. GMRES iterations against chi (1 to 1e5) for a voxel sphere and a flat
   plate, with the multilevel preconditioner and without.

    python benchmarks/bench_fft.py [--quick] [--max-cells N] [--precision single|double]
"""
import argparse
import json
import subprocess
import sys
import time

import numpy as np

CHILD = r"""
import json, resource, sys, time
import numpy as np
import volmag as vm
from volmag.solve import GridFFTSystem
h, chi, precision = float(sys.argv[1]), float(sys.argv[2]), sys.argv[3]
t0 = time.perf_counter()
model = vm.Model.build([vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", chi), mesh=vm.MeshSpec("hex", h))])
t_mesh = time.perf_counter() - t0
opts = vm.SolverOptions(method="fft", precision=precision, tolerance=1e-6)
t0 = time.perf_counter()
system = GridFFTSystem(model, opts)
setup = time.perf_counter() - t0
x = np.random.default_rng(0).standard_normal(3 * model.mesh.n_cells)
system.K(x.reshape(-1, 3))
t0 = time.perf_counter()
for _ in range(3):
    system.K(x.reshape(-1, 3))
product = (time.perf_counter() - t0) / 3
t0 = time.perf_counter()
sol = system.solve([vm.UniformField((0, 0, 1.0))])
solve = time.perf_counter() - t0
ref = chi / (1 + chi / 3)
print(json.dumps(dict(cells=model.mesh.n_cells, grid=list(system.K.padded), mesh=t_mesh, setup=setup,
    product=product, iterations=sol.iterations, solve=solve, total=setup + solve,
    peak_MB=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
    error=abs(sol.mean_M()[2] / ref - 1), converged=bool(sol.converged))))
"""


def transform_overhead(sizes, precision):
    from volmag.fft import GridOperator
    print(f"\nFFT product against its bare transforms ({precision} precision)")
    print(f"{'grid':>12} {'padded':>14} {'product s':>10} {'transforms s':>13} {'ratio':>6}")
    for n in sizes:
        idx = np.stack(np.meshgrid(*[np.arange(n)] * 3, indexing="ij"), -1).reshape(-1, 3)
        K = GridOperator(idx, np.ones(3), precision)
        M = np.random.default_rng(0).standard_normal((len(idx), 3))
        K(M)
        K.transforms_only(M)
        tp = _best(lambda: K(M))
        tt = _best(lambda: K.transforms_only(M))
        print(f"{f'{n}^3':>12} {'x'.join(map(str, K.padded)):>14} {tp:10.3f} {tt:13.3f} {tp / tt:6.2f}")


def _best(f, repeat=3):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        f()
        times.append(time.perf_counter() - t0)
    return min(times)


def scaling(spacings, precision):
    print(f"\nVoxel sphere R = 1 m, {precision} precision, tolerance 1e-6 (own process per row)")
    head = (f"{'cells':>9} {'padded grid':>13} {'setup s':>8} {'s/product':>9} {'its@10':>6} {'s@10':>7} "
            f"{'its@1000':>8} {'s@1000':>7} {'peak MB':>8} {'err@1000':>9}")
    print(head)
    rows = []
    for h in spacings:
        r10, r1k = (run(h, chi, precision) for chi in (10.0, 1000.0))
        rows.append((r1k["cells"], r10["total"], r1k["total"]))
        print(f"{r1k['cells']:9d} {'x'.join(map(str, r1k['grid'])):>13} {r1k['setup']:8.2f} {r1k['product']:9.3f} "
              f"{r10['iterations']:6d} {r10['total']:7.1f} {r1k['iterations']:8d} {r1k['total']:7.1f} "
              f"{max(r10['peak_MB'], r1k['peak_MB']):8.0f} {r1k['error']:9.2e}", flush=True)
    if len(rows) >= 3:
        n, t10, t1k = (np.array(c, float) for c in zip(*rows))
        big = n >= 3e4            # fixed costs dominate the small ones
        if big.sum() >= 2:
            p10 = np.polyfit(np.log(n[big]), np.log(t10[big]), 1)[0]
            p1k = np.polyfit(np.log(n[big]), np.log(t1k[big]), 1)[0]
            print(f"fitted time ~ cells^p over cells >= 3e4: p = {p10:.2f} (chi = 10), {p1k:.2f} (chi = 1000)")
        base = rows[0]
        print("time / first row: " + ", ".join(f"{r[0]}: {r[2] / base[2]:.1f}" for r in rows))


def run(h, chi, precision):
    out = subprocess.run([sys.executable, "-c", CHILD, str(h), str(chi), precision],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def iterations_against_chi(h):
    import volmag as vm
    from volmag.krylov import gmres
    from volmag.solve import GridFFTSystem
    print(f"\nGMRES iterations to 1e-8 against chi (cell {h} m); plain: no preconditioner (cap 600)")
    print(f"{'body':>14} {'cells':>7} " + " ".join(f"{f'chi={c:g}':>17}" for c in CHIS))
    print(f"{'':>14} {'':>7} " + " ".join(f"{'multilevel/plain':>17}" for _ in CHIS))
    for name, shape in (("sphere", vm.Sphere(1.0)), ("plate 20:20:1", vm.Box((2.0, 2.0, 0.1)))):
        cells, cols = 0, []
        for chi in CHIS:
            model = vm.Model.build([vm.Body("b", shape, vm.LinearMaterial("m", chi), mesh=vm.MeshSpec("hex", h))])
            cells = model.mesh.n_cells
            system = GridFFTSystem(model, vm.SolverOptions(method="fft"))
            b = system.rhs([system.source_field([vm.UniformField((0, 0, 1.0))])])[:, 0]
            ml = gmres(system.matvec, b, lambda r: system.P(r) if system.P else r, tol=1e-8, maxiter=600)
            plain = gmres(system.matvec, b, tol=1e-8, maxiter=600)
            if system.P is None:            # low chi: the solver does not precondition; show the cycle anyway
                from volmag.multilevel import MultilevelPreconditioner
                P = MultilevelPreconditioner(model.mesh.grid_index, model.mesh.cell_size, system.chi, fine_op=system.K)
                ml = gmres(system.matvec, b, P, tol=1e-8, maxiter=600)
            cols.append(f"{ml.iterations:>8d}/{plain.iterations:<8d}")
        print(f"{name:>14} {cells:7d} " + " ".join(f"{c:>17}" for c in cols), flush=True)


CHIS = (1.0, 10.0, 100.0, 1000.0, 1e4, 1e5)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="small sizes only")
    ap.add_argument("--max-cells", type=float, default=1.1e6)
    ap.add_argument("--precision", default="double", choices=("double", "single"))
    a = ap.parse_args()
    transform_overhead((32, 64) if a.quick else (32, 64, 100), a.precision)
    spacings = [0.16, 0.08, 0.04, 0.02, 0.0161]
    if a.quick:
        spacings = spacings[:3]
    spacings = [h for h in spacings if 4.19 / h ** 3 <= a.max_cells]
    scaling(spacings, a.precision)
    iterations_against_chi(0.1 if a.quick else 0.05)


if __name__ == "__main__":
    main()
