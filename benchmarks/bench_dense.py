"""Dense-operator scaling study: a sphere at chi = 10 in a uniform field.

Prints elements, unknowns, assembly time, factor time, solve time, GMRES
iterations, peak memory (each size in its own process) and the error of the
apparent susceptibility against chi / (1 + chi/3) (exact for a sphere, e.g.
Jackson, Classical Electrodynamics, 3rd ed., sec. 5.10).  The first row of each
table is the baseline the ratios refer to.

    python benchmarks/bench_dense.py [--quick]
"""
import json
import subprocess
import sys

CHI = 10.0

CHILD = r"""
import json, resource, sys, time
import volmag as vm
kind, size, chi = sys.argv[1], float(sys.argv[2]), float(sys.argv[3])
t0 = time.perf_counter()
model = vm.Model.build([vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", chi), mesh=vm.MeshSpec(kind, size))])
t_mesh = time.perf_counter() - t0
sol = vm.solve(model, [vm.UniformField((0, 0, 1.0))])
ref = chi / (1 + chi / 3)
print(json.dumps(dict(elements=model.mesh.n_cells, unknowns=sol.unknowns, mesh=t_mesh,
    assembly=sol.stats["assembly_seconds"], factor=sol.stats["factor_seconds"], total=sol.seconds,
    iterations=sol.iterations, peak_MB=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
    error=abs(sol.mean_M()[2] / ref - 1))))
"""


def run(kind, size):
    out = subprocess.run([sys.executable, "-c", CHILD, kind, str(size), str(CHI)],
                         capture_output=True, text=True, check=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def table(kind, sizes):
    print(f"\n{kind}: sphere R = 1 m, chi = {CHI:g}")
    print(f"{'elements':>9} {'unknowns':>9} {'assembly s':>11} {'factor s':>9} {'solve s':>8} "
          f"{'iters':>6} {'peak MB':>8} {'error':>9} {'time/base':>10}")
    base = None
    for h in sizes:
        r = run(kind, h)
        base = base or r["total"]
        print(f"{r['elements']:9d} {r['unknowns']:9d} {r['assembly']:11.2f} {r['factor']:9.2f} "
              f"{r['total']:8.2f} {r['iterations']:6d} {r['peak_MB']:8.0f} {r['error']:9.2e} "
              f"{r['total'] / base:10.1f}", flush=True)


if __name__ == "__main__":
    quick = "--quick" in sys.argv
    table("tet", [0.4, 0.3] if quick else [0.4, 0.3, 0.22, 0.18, 0.15, 0.12, 0.1])
    table("hex", [0.25, 0.18] if quick else [0.25, 0.18, 0.14, 0.115, 0.095])
