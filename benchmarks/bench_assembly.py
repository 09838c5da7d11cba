"""Assembly of the dense nodal operator: one triangle_potential per (node,
face) pair (the previous assembly, kept here as the baseline) against the
shared-edge evaluation of operators.nodal_potential_matrix; then the surface
potentials of the chi = 0 demagnetising tensor (kernels.face_potentials_at_points
against kernels.mesh_potentials_at_points).  Sphere of radius 1 m, chi = 10.

Both variants run in the same process, alternately, each `--repeat` times;
the table shows the fastest run of each (wall clock, all numba threads), so
other load on the machine penalises both alike.  `diff` is the largest
difference over the largest entry.

    python benchmarks/bench_assembly.py [--quick] [--repeat N]
"""
import sys
import time

import numpy as np
from numba import njit, prange

import volmag as vm
from volmag import kernels, operators


@njit(parallel=True, cache=True)
def baseline_rows(points, nodes, faces, indptr, indices, data, out):
    """out[i, :] -= (1/4pi) sum_f I_f(points[i]) C[f, :], one triangle_potential
    per pair."""
    inv4pi = 1.0 / (4.0 * np.pi)
    for i in prange(points.shape[0]):
        p = points[i]
        for f in range(faces.shape[0]):
            if indptr[f + 1] == indptr[f]:
                continue
            s = inv4pi * kernels.triangle_potential(p, nodes[faces[f, 0]], nodes[faces[f, 1]],
                                                    nodes[faces[f, 2]])
            for k in range(indptr[f], indptr[f + 1]):
                out[i, indices[k]] -= s * data[k]


def baseline_matrix(nodes, topo, C):
    A = np.eye(len(nodes))
    baseline_rows(nodes, nodes, topo.faces, C.indptr, C.indices, C.data, A)
    return A


def fastest(fns, repeat):
    """Alternate the calls; (best time of each, last result of each)."""
    best, out = [np.inf] * len(fns), [None] * len(fns)
    for _ in range(repeat):
        for k, fn in enumerate(fns):
            t0 = time.perf_counter()
            out[k] = fn()
            best[k] = min(best[k], time.perf_counter() - t0)
    return best, out


def sphere(h):
    model = vm.Model.build([vm.Body("s", vm.Sphere(1.0), vm.LinearMaterial("m", 10.0),
                                    mesh=vm.MeshSpec("tet", h))])
    topo = operators.tet_topology(model.mesh.nodes, model.mesh.cells)
    return model, topo


def operator_table(sizes, repeat):
    print("\nnodal operator A = I - S C (sphere R = 1 m, chi = 10)")
    print(f"{'h m':>6} {'nodes':>7} {'faces':>7} {'old s':>8} {'new s':>8} {'ratio':>6} {'diff':>9}")
    for h in sizes:
        model, topo = sphere(h)
        nodes = model.mesh.nodes
        C = operators.charge_operator(topo, model.mesh.cells, model.element_chi(), len(nodes))
        (t_old, t_new), (A_old, A_new) = fastest(
            [lambda: baseline_matrix(nodes, topo, C),
             lambda: operators.nodal_potential_matrix(nodes, topo, C)], repeat)
        off = A_old - np.eye(len(nodes))
        diff = np.abs(A_new - A_old).max() / np.abs(off).max()
        print(f"{h:6.3f} {len(nodes):7d} {len(topo.faces):7d} {t_old:8.2f} {t_new:8.2f} "
              f"{t_old / t_new:6.2f} {diff:9.1e}", flush=True)


def surface_table(sizes, repeat):
    print("\nsurface potentials at 7 points per boundary face (chi = 0 demag tensor)")
    print(f"{'h m':>6} {'points':>7} {'faces':>7} {'old s':>8} {'new s':>8} {'ratio':>6} {'diff':>9}")
    for h in sizes:
        model, topo = sphere(h)
        boundary = topo.neighbour < 0
        used, local = np.unique(topo.faces[boundary], return_inverse=True)
        surface = kernels.triangle_mesh(model.mesh.nodes[used], local.reshape(-1, 3))
        tri = surface.nodes[surface.faces]
        sigmas = np.ascontiguousarray(topo.normals[boundary])
        qp = np.einsum("qk,fkd->fqd", kernels.TRI_RULE_POINTS, tri).reshape(-1, 3)
        (t_old, t_new), (old, new) = fastest(
            [lambda: kernels.face_potentials_at_points(qp, tri, sigmas),
             lambda: kernels.mesh_potentials_at_points(qp, surface, sigmas)], repeat)
        diff = np.abs(new - old).max() / np.abs(old).max()
        print(f"{h:6.3f} {len(qp):7d} {len(tri):7d} {t_old:8.2f} {t_new:8.2f} "
              f"{t_old / t_new:6.2f} {diff:9.1e}", flush=True)


if __name__ == "__main__":
    quick = "--quick" in sys.argv
    repeat = int(sys.argv[sys.argv.index("--repeat") + 1]) if "--repeat" in sys.argv else 3
    operator_table([0.3, 0.2] if quick else [0.2, 0.15, 0.1], repeat)
    surface_table([0.3, 0.2] if quick else [0.15, 0.1, 0.07], repeat)
