"""Fast face-charge operators (volmag.fmm) against exact sums.

Table 1: field at 1e3..1e5 probe points (a box around and through the body)
of a solved tetrahedral sphere (chi = 10, uniform field), exact sum
(kernels.face_field_at_points) against the FMM path (fmm.field_of_faces),
with the FMM error against the exact sum on up to 1000 of the points.  Exact
times above 1e4 points are extrapolated from the measured ns per (point, face).

Table 2: FaceChargeFMM, potentials at the nodes of charges on all faces of
tetrahedral spheres of 1e3..4e5 faces: setup and product time, memory, pairs
per face, error against the dense sum (operators.potentials_at_nodes) on up to
400 nodes, the dense product time (measured, or extrapolated from ns per
(node, face) above 2e9 pairs) and fmm.estimate()'s prediction.  A
precorrected-FFT operator (volmag.pfft.PrecorrectedFFT, same interface) is
timed at the same tolerance when it exists.

Table 3: accuracy against the dense sum per tol, and of each quadrature rule
and near radius alone.

    python benchmarks/bench_field_points.py [--quick] [--tol 1e-6] [--field] [--operators]
                                            [--accuracy] [--sizes 0.4,0.2]

(no table flag: all three; --sizes: tetrahedron sizes, m, of the unit spheres
of table 2.)
"""
import sys
import time

import numpy as np

import volmag as vm
from volmag import fmm, kernels, operators, post


def sphere_mesh(h):
    body = vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 10.0), mesh=vm.MeshSpec("tet", h))
    return vm.Model.build([body])


def rel(x, ref):
    return np.linalg.norm(x - ref) / np.linalg.norm(ref)


def field_table(h, counts, tol):
    model = sphere_mesh(h)
    t0 = time.perf_counter()
    sol = vm.solve(model, [vm.UniformField((0.0, 0.0, 1.0))])
    tris, sigma = post.charged_faces(model.mesh, sol.M)
    tris = np.ascontiguousarray(tris)
    print(f"\nfield at points: sphere, {model.mesh.n_cells} tets, {len(sigma)} charged faces "
          f"(solved in {time.perf_counter() - t0:.1f} s), tol {tol:g}")
    print(f"{'points':>8} {'exact s':>9} {'fmm s':>8} {'speed-up':>9} {'error':>9} {'locate s':>9}")
    rng = np.random.default_rng(0)
    ns_pair = None
    for n in counts:
        P = rng.uniform(-1.5, 1.5, (n, 3))
        sub = P[:1000]
        t = time.perf_counter()
        ref = kernels.face_field_at_points(sub, tris, sigma)
        t_sub = time.perf_counter() - t
        ns_pair = t_sub / (len(sub) * len(sigma))
        if n <= 10_000:
            t = time.perf_counter()
            kernels.face_field_at_points(P, tris, sigma) if n > len(sub) else None
            t_exact = (time.perf_counter() - t) if n > len(sub) else t_sub
            mark = " "
        else:
            t_exact, mark = ns_pair * n * len(sigma), "*"
        t = time.perf_counter()
        H = fmm.field_of_faces(P, tris, sigma, tol)
        t_fmm = time.perf_counter() - t
        t = time.perf_counter()
        post.locate(model.mesh, P)
        t_loc = time.perf_counter() - t
        print(f"{n:8d} {t_exact:8.1f}{mark} {t_fmm:8.1f} {t_exact / t_fmm:9.1f} {rel(H[:1000], ref):9.1e} "
              f"{t_loc:9.1f}", flush=True)
    print(f"(* extrapolated at {ns_pair * 1e9:.0f} ns per point and face)")


def operator_table(sizes, tol):
    try:
        from volmag.pfft import PrecorrectedFFT
    except ImportError:
        PrecorrectedFFT = None
    print(f"\nFaceChargeFMM, tol {tol:g} (degree, radius, eps = {fmm.settings(tol)}); "
          f"pfft: {'present' if PrecorrectedFFT else 'absent'}")
    head = (f"{'faces':>8} {'nodes':>7} {'pairs/f':>8} {'setup s':>8} {'prod s':>7} {'MB':>7} {'error':>8} "
            f"{'dense s':>8} {'est MB':>7} {'est set':>8} {'est prod':>8}")
    if PrecorrectedFFT:
        head += f" {'pfft set':>8} {'pfft prod':>9} {'pfft err':>8} {'pfft MB':>8}"
    print(head)
    rng = np.random.default_rng(1)
    for h in sizes:
        mesh = sphere_mesh(h).mesh
        topo = operators.tet_topology(mesh.nodes, mesh.cells)
        n, nf = len(mesh.nodes), len(topo.faces)
        sig = rng.normal(size=nf)
        t = time.perf_counter()
        F = fmm.FaceChargeFMM(mesh.nodes, topo.faces, tol)
        t_set = time.perf_counter() - t
        t = time.perf_counter()
        phi = F(sig)
        t_prod = time.perf_counter() - t
        pick = rng.choice(n, min(n, 400), replace=False)
        tmesh = kernels.triangle_mesh(mesh.nodes, topo.faces)
        t = time.perf_counter()
        ref = kernels.mesh_potentials_at_points(mesh.nodes[pick], tmesh, sig[:, None])[:, 0]
        t_ref = time.perf_counter() - t
        if n * nf <= 2e9:
            t = time.perf_counter()
            operators.potentials_at_nodes(mesh.nodes, topo, sig[:, None])
            t_dense, mark = time.perf_counter() - t, " "
        else:
            t_dense, mark = t_ref * n / len(pick), "*"
        est = fmm.estimate(n, nf, tol)
        row = (f"{nf:8d} {n:7d} {F.near.nnz / nf:8.0f} {t_set:8.2f} {t_prod:7.2f} {F.nbytes() / 1e6:7.0f} "
               f"{rel(phi[pick], ref):8.1e} {t_dense:7.1f}{mark} {est[0] / 1e6:7.0f} {est[1]:8.2f} {est[2]:8.2f}")
        if PrecorrectedFFT:
            t = time.perf_counter()
            G = PrecorrectedFFT(mesh.nodes, topo.faces, tol)
            g_set = time.perf_counter() - t
            t = time.perf_counter()
            psi = G(sig)
            g_prod = time.perf_counter() - t
            row += f" {g_set:8.2f} {g_prod:9.2f} {rel(psi[pick], ref):8.1e} {G.nbytes() / 1e6:8.0f}"
        print(row, flush=True)
    print("(* dense product extrapolated from the reference rows)")


def accuracy_table(h, tols, degrees=(1, 2, 4, 5), radii=(1.5, 2.0, 3.0, 4.0, 6.0)):
    """Error of FaceChargeFMM against the dense sum for each tol (its own
    settings), then of each (rule degree, near radius) at FMM eps 1e-13."""
    mesh = sphere_mesh(h).mesh
    topo = operators.tet_topology(mesh.nodes, mesh.cells)
    sig = np.random.default_rng(2).normal(size=(len(topo.faces), 1))
    ref = operators.potentials_at_nodes(mesh.nodes, topo, sig)[:, 0]
    print(f"\naccuracy: sphere, {len(mesh.cells)} tets, {len(topo.faces)} faces, random charges")
    print(f"{'tol':>7} {'degree':>6} {'radius':>6} {'eps':>7} {'error':>8} {'setup s':>8} {'prod s':>7}")
    for tol in tols:
        t = time.perf_counter()
        F = fmm.FaceChargeFMM(mesh.nodes, topo.faces, tol)
        t_set = time.perf_counter() - t
        t = time.perf_counter()
        phi = F(sig[:, 0])
        t_prod = time.perf_counter() - t
        print(f"{tol:7.0e} {F.degree:6d} {F.radius:6.1f} {F.eps:7.0e} {rel(phi, ref):8.1e} {t_set:8.2f} {t_prod:7.2f}",
              flush=True)
    print(f"{'degree':>6} " + " ".join(f"{'R=' + str(r):>8}" for r in radii) + "   (quadrature error alone)")
    for d in degrees:
        errs = [rel(fmm.FaceChargeFMM(mesh.nodes, topo.faces, degree=d, radius=r, eps=1e-13)(sig[:, 0]), ref)
                for r in radii]
        print(f"{d:6d} " + " ".join(f"{e:8.1e}" for e in errs), flush=True)


if __name__ == "__main__":
    quick = "--quick" in sys.argv
    tol = float(sys.argv[sys.argv.index("--tol") + 1]) if "--tol" in sys.argv else 1e-6
    parts = [p for p in ("--field", "--operators", "--accuracy") if p in sys.argv] or \
        ["--field", "--operators", "--accuracy"]
    if "--field" in parts:
        field_table(0.3 if quick else 0.1, [1000, 3000] if quick else [1000, 10_000, 100_000], tol)
    if "--operators" in parts:
        sizes = [0.4, 0.2] if quick else [0.4, 0.2, 0.12, 0.08, 0.055, 0.042]
        if "--sizes" in sys.argv:
            sizes = [float(x) for x in sys.argv[sys.argv.index("--sizes") + 1].split(",")]
        operator_table(sizes, tol)
    if "--accuracy" in parts:
        accuracy_table(0.3 if quick else 0.15, [1e-3, 1e-4, 1e-5, 1e-6, 1e-7, 1e-8, 1e-9, 1e-10],
                       (1, 2) if quick else (1, 2, 4, 5), (2.0, 3.0) if quick else (1.5, 2.0, 3.0, 4.0, 6.0))
