"""Fast tetrahedral operators: precorrected FFT (volmag.pfft) and, when
present, the face-charge FMM (volmag.fmm), on spheres of 1e3 to 2e5 tets.

Per row (own process, so the peak memory is the row's): tets, nodes, faces,
operator set-up seconds, seconds per product (one charge column), relative
error of the product against the dense evaluation (operators.potentials_at_
nodes; on a sample of nodes beyond a few thousand), GMRES iterations of the
fast system at chi = 10 and 1000 (uniform field, relative residual 1e-8), the
apparent susceptibility's error against chi / (1 + chi / 3) at chi = 1000
(Jackson, Classical Electrodynamics, 3rd ed., sec. 5.10), peak memory.

    python benchmarks/bench_tet_fast.py [--big] [--tol 1e-6] [--shape sphere|cube]
        [--precond jacobi|ilu|lu|none] [--ops fft,fmm]
"""
import argparse
import json
import subprocess
import sys

CHILD = r"""
import json, resource, sys, time
import numpy as np
import volmag as vm
from dataclasses import replace
from volmag import kernels, operators
from volmag.solve import SolverOptions
from volmag.tetfast import TetFastSystem
shape, size, op, tol, pc = sys.argv[1], float(sys.argv[2]), sys.argv[3], float(sys.argv[4]), sys.argv[5]
body = vm.Body("b", vm.Sphere(1.0) if shape == "sphere" else vm.Box((1.6, 1.6, 1.6)),
               vm.LinearMaterial("m", 10.0), mesh=vm.MeshSpec("tet", size))
model = vm.Model.build([body])
nodes = model.mesh.nodes
topo = operators.tet_topology(nodes, model.mesh.cells)
C = operators.charge_operator(topo, model.mesh.cells, model.element_chi(), len(nodes))
rng = np.random.default_rng(3)
sig = np.column_stack([C @ rng.standard_normal(len(nodes)),
                       operators.face_charges(topo, np.tile([0.0, 0.0, 1.0], (model.mesh.n_cells, 1)))])
t0 = time.perf_counter()
if op == "fft":
    from volmag.pfft import PrecorrectedFFT
    S = PrecorrectedFFT(nodes, topo.faces, tol=tol)
else:
    from volmag.fmm import FaceChargeFMM
    S = FaceChargeFMM(nodes, topo.faces, tol=tol)
setup = time.perf_counter() - t0
S(sig[:, 0])
t0 = time.perf_counter()
for _ in range(3):
    S(sig[:, 0])
product = (time.perf_counter() - t0) / 3
out = S(sig)
rows = np.arange(len(nodes)) if len(nodes) <= 4000 else np.sort(rng.choice(len(nodes), 400, replace=False))
ref = kernels.mesh_potentials_at_points(nodes[rows], kernels.triangle_mesh(nodes, topo.faces), sig)
err = float(np.max(np.linalg.norm(out[rows] - ref, axis=0) / np.linalg.norm(ref, axis=0)))
its, xerr = {}, None
for chi in (10.0, 1000.0):
    m = vm.Model((replace(body, material=vm.LinearMaterial("m", chi)),), model.mesh, model.mesh_stats)
    s = TetFastSystem(m, SolverOptions(tolerance=1e-8, max_iterations=300), operator=op,
                      operator_tol=tol, preconditioner=pc,
                      coarse=pc != "none", S=S)
    sol = s.solve([vm.UniformField((0, 0, 1.0))])
    its[chi] = sol.iterations
    if shape == "sphere":
        xerr = float(abs(sol.mean_M()[2] / (chi / (1 + chi / 3)) - 1))
print(json.dumps(dict(tets=model.mesh.n_cells, nodes=len(nodes), faces=len(topo.faces), setup=setup,
    product=product, error=err, it10=its[10.0], it1000=its[1000.0], xerr=xerr, pairs=int(S.near.nnz),
    op_MB=S.nbytes() / 2**20, peak_MB=resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)))
"""

SIZES = {"sphere": [0.26, 0.15, 0.095, 0.07], "cube": [0.22, 0.13, 0.08, 0.06]}
BIG = {"sphere": [0.044], "cube": [0.037]}


def run(shape, size, op, tol, pc):
    out = subprocess.run([sys.executable, "-c", CHILD, shape, str(size), op, str(tol), pc],
                         capture_output=True, text=True)
    if out.returncode:
        return {"failed": out.stderr.strip().splitlines()[-1][:80]}
    return json.loads(out.stdout.strip().splitlines()[-1])


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--big", action="store_true", help="add the ~2e5-tet mesh")
    ap.add_argument("--tol", type=float, default=1e-6)
    ap.add_argument("--shape", default="sphere", choices=sorted(SIZES))
    ap.add_argument("--precond", default="jacobi", choices=["jacobi", "none", "ilu", "lu"],
                    help="local part (with the coarse correction unless none)")
    ap.add_argument("--ops", default="fft,fmm")
    args = ap.parse_args()
    ops = [o for o in args.ops.split(",") if o != "fmm" or _has_fmm()]
    print(f"{args.shape}, operator tolerance {args.tol:g}, preconditioner {args.precond}"
          + (" + coarse" if args.precond != "none" else ""))
    head = (f"{'op':>4} {'tets':>7} {'nodes':>6} {'faces':>7} {'setup s':>8} {'s/prod':>7} {'error':>8} "
            f"{'it@10':>5} {'it@1e3':>6} {'Xapp err':>8} {'pairs':>9} {'op MB':>6} {'peak MB':>7}")
    print(head)
    for size in SIZES[args.shape] + (BIG[args.shape] if args.big else []):
        for op in ops:
            r = run(args.shape, size, op, args.tol, args.precond)
            if "failed" in r:
                print(f"{op:>4} size {size}: failed: {r['failed']}")
                continue
            xe = f"{r['xerr']:8.1e}" if r["xerr"] is not None else f"{'-':>8}"
            print(f"{op:>4} {r['tets']:7d} {r['nodes']:6d} {r['faces']:7d} {r['setup']:8.1f} {r['product']:7.3f} "
                  f"{r['error']:8.1e} {r['it10']:5d} {r['it1000']:6d} {xe} {r['pairs']:9d} {r['op_MB']:6.0f} "
                  f"{r['peak_MB']:7.0f}", flush=True)


def _has_fmm():
    try:
        import volmag.fmm  # noqa: F401
        return True
    except ImportError:
        return False


if __name__ == "__main__":
    main()
