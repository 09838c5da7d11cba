"""Post-processing: fields at points, demagnetising tensors, fluxmetric factors.

Fields at arbitrary points are the applied field plus the field of the face
charges of the solved magnetisation (exact for the discrete M, inside and
outside the bodies); B = mu0 (H + M) with M of the element containing the point.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy.spatial import cKDTree

from . import kernels, operators
from .sources import total_source_field
from .units import MU0

# Outward faces of an axis-aligned cell as corner sign patterns, two
# triangles each, counter-clockwise seen from outside.
_QUADS = {(0, -1): [(-1, -1, -1), (-1, -1, 1), (-1, 1, 1), (-1, 1, -1)],
          (0, 1): [(1, -1, -1), (1, 1, -1), (1, 1, 1), (1, -1, 1)],
          (1, -1): [(-1, -1, -1), (1, -1, -1), (1, -1, 1), (-1, -1, 1)],
          (1, 1): [(-1, 1, -1), (-1, 1, 1), (1, 1, 1), (1, 1, -1)],
          (2, -1): [(-1, -1, -1), (-1, 1, -1), (1, 1, -1), (1, -1, -1)],
          (2, 1): [(-1, -1, 1), (1, -1, 1), (1, 1, 1), (-1, 1, 1)]}


def charged_faces(mesh, M: np.ndarray, topo=None) -> tuple[np.ndarray, np.ndarray]:
    """Triangles (m, 3, 3) in m and their surface charge sigma (A/m) that
    together produce the field of the element-wise uniform M (ne, 3)."""
    if mesh.cell_type == "tet":
        topo = topo or operators.tet_topology(mesh.nodes, mesh.cells)
        sigma = operators.face_charges(topo, M)
        keep = sigma != 0
        return mesh.nodes[topo.faces[keep]], sigma[keep]
    centres, half = mesh.centroids(), 0.5 * np.asarray(mesh.cell_size)
    tris, sig = [], []
    for (axis, side), corners in _QUADS.items():
        q = centres[:, None, :] + np.array(corners)[None] * half           # (n, 4, 3)
        s = side * M[:, axis]
        tris += [q[:, [0, 1, 2]], q[:, [0, 2, 3]]]
        sig += [s, s]
    tris, sig = np.concatenate(tris), np.concatenate(sig)
    keep = sig != 0
    return tris[keep], sig[keep]


def locate(mesh, points: np.ndarray) -> np.ndarray:
    """Index of the element containing each point (m), -1 outside all bodies."""
    points = np.atleast_2d(points)
    if mesh.cell_type == "hex":
        ijk = np.rint((points - mesh.grid_origin) / mesh.cell_size).astype(np.int64)
        lookup = {tuple(g): i for i, g in enumerate(mesh.grid_index)}
        return np.array([lookup.get(tuple(g), -1) for g in ijk])
    cells = mesh.cells
    corners = mesh.nodes[cells]
    centroid = corners.mean(axis=1)
    radius = np.linalg.norm(corners - centroid[:, None], axis=2).max(axis=1)
    tree = cKDTree(centroid)
    J = np.stack([corners[:, k] - corners[:, 0] for k in (1, 2, 3)], axis=2)
    Jinv = np.linalg.inv(J)
    found = np.full(len(points), -1)
    for i, p in enumerate(points):
        for e in tree.query_ball_point(p, radius.max()):
            lam = Jinv[e] @ (p - corners[e, 0])
            if lam.min() >= -1e-12 and lam.sum() <= 1 + 1e-12:
                found[i] = e
                break
    return found


#: field_at_points sums exactly while points x faces stays below this (or
#: there are fewer than FAST_FIELD_POINTS points) and uses the FMM
#: (volmag.fmm.field_of_faces) above it.  Measured (benchmarks/
#: bench_field_points.py, 2 shared cores, tol 1e-6): the exact sum costs
#: 0.3-0.9 us per point and face; the FMM path 1.5 s for 1k points x 1.9k
#: faces, 5 s for 1k x 11k (exact: 1.9 s, 7.8 s), 23 s for 100k x 38k
#: (exact: ~1000 s).  Tighter tolerances widen the FMM's near zone: below
#: 1e-7 the threshold is 4x higher.
FAST_FIELD_PAIRS = 5e6
FAST_FIELD_POINTS = 1000


def field_at_points(solution, points: np.ndarray, tol: float = 1e-6) -> tuple[np.ndarray, np.ndarray]:
    """(H in A/m, B in T) at points (n, 3) in m.  The field of the face
    charges is summed exactly for small problems and by the fast multipole
    method (volmag.fmm) for large ones, then to a relative error tol in the
    norm of the charges' field over all the points."""
    mesh = solution.model.mesh
    points = np.ascontiguousarray(points, dtype=float)
    tris, sigma = charged_faces(mesh, solution.M)
    if mesh.cell_type == "hex":
        tris, sigma = _merge_hex_faces(mesh, tris, sigma)
    H = total_source_field(solution.sources, points)
    if len(sigma):
        threshold = FAST_FIELD_PAIRS * (4.0 if tol < 1e-7 else 1.0)
        if len(points) >= FAST_FIELD_POINTS and len(points) * len(sigma) > threshold:
            from .fmm import field_of_faces
            H = H + field_of_faces(points, tris, sigma, tol)
        else:
            H = H + kernels.face_field_at_points(points, np.ascontiguousarray(tris), sigma)
    inside = locate(mesh, points)
    M = np.where(inside[:, None] >= 0, solution.M[np.maximum(inside, 0)], 0.0)
    return H, MU0 * (H + M)


def _merge_hex_faces(mesh, tris: np.ndarray, sigma: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Sum the charges of coincident triangles (the two sides of a face
    shared by neighbouring cells, which charged_faces lists once per cell),
    dropping faces whose charges cancel exactly.  Corners are matched on the
    grid of half cells, not by floating-point equality."""
    key = np.rint((tris - mesh.grid_origin) / (0.5 * np.asarray(mesh.cell_size))).astype(np.int64)
    key = np.sort(key.view([("x", np.int64), ("y", np.int64), ("z", np.int64)])[..., 0], axis=1)
    key = key.view(np.int64).reshape(len(tris), 9)
    _, first, inverse = np.unique(key, axis=0, return_index=True, return_inverse=True)
    net = np.bincount(inverse.ravel(), weights=sigma)
    keep = net != 0
    return tris[first[keep]], net[keep]


@dataclass(frozen=True)
class DemagResult:
    """Magnetometric demagnetising tensor N (dimensionless, model axes) of a
    body at susceptibility `chi`; `apparent_susceptibility` is X_app with
    <M> = X_app H0 (None at chi = 0); `fluxmetric` the mid-plane factor along
    `fluxmetric_axis` when asked."""
    body: str
    chi: np.ndarray
    N: np.ndarray
    apparent_susceptibility: np.ndarray | None = None
    fluxmetric: float | None = None
    fluxmetric_axis: str | None = None


def demag_tensor(model, body: str, options=None, fluxmetric_axis: str | None = None,
                 progress=None) -> DemagResult:
    """Magnetometric demagnetising tensor of one body alone, at its material's
    susceptibility.

    chi = 0: N = -<H> for a uniform unit M (computed directly).  chi > 0: unit
    applied fields along x, y, z give X_app from <M>; N = X_app^-1 - chi^-1
    (e.g. Chen, Brug & Goldfarb, IEEE Trans. Magn. 1991)."""
    from .progress import QUIET
    from .solve import SolverOptions, make_system
    from .sources import UniformField
    progress = progress or QUIET
    sub = model.only(body)
    chi = sub.element_chi()[0]
    if not np.any(chi):
        N = _uniform_demag(sub)
        flux = _fluxmetric_uniform(sub, fluxmetric_axis) if fluxmetric_axis else None
        return DemagResult(body, chi, N, None, flux, fluxmetric_axis)
    system = make_system(sub, options or SolverOptions(), progress)
    solutions = system.solve_many([[UniformField(tuple(np.eye(3)[j]))] for j in range(3)])
    for s in solutions:
        if not s.converged:
            raise RuntimeError(f"demag solve of body {body!r} did not converge (residual {s.residual:.2e})")
    X = np.stack([s.mean_M() for s in solutions], axis=1)
    N = np.linalg.inv(X) - np.linalg.inv(chi)
    flux = None
    if fluxmetric_axis:
        a = "xyz".index(fluxmetric_axis)
        flux = _fluxmetric_solved(solutions[a], a)
    return DemagResult(body, chi, N, X, flux, fluxmetric_axis)


def _uniform_demag(model) -> np.ndarray:
    """N = -<H> of a uniform unit M, consistent with the solver's discretisation."""
    mesh = model.mesh
    vol = mesh.volumes()
    if mesh.cell_type == "hex":      # equal cells: the FFT product, O(n log n), exact to rounding
        from .fft import uniform_demag
        return uniform_demag(mesh.grid_index, mesh.cell_size)
    # N[:, j] = (1/V) surface-integral of phi_j n dS (Gauss' theorem on <H>), with
    # phi_j the exact potential of the boundary charges n_j, integrated by a
    # degree-5 rule on each boundary triangle: exact N of the meshed polyhedron.
    # The boundary triangles share edges: evaluate the potentials with the
    # shared-edge kernel, on the boundary nodes alone.
    topo = operators.tet_topology(mesh.nodes, mesh.cells)
    boundary = topo.neighbour < 0
    used, local = np.unique(topo.faces[boundary], return_inverse=True)
    surface = kernels.triangle_mesh(mesh.nodes[used], local.reshape(-1, 3))
    tri = surface.nodes[surface.faces]
    normals = topo.normals[boundary]
    area = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    qp = np.einsum("qk,fkd->fqd", kernels.TRI_RULE_POINTS, tri).reshape(-1, 3)
    qw = (area[:, None] * kernels.TRI_RULE_WEIGHTS[None, :]).ravel()
    qn = np.repeat(normals, len(kernels.TRI_RULE_WEIGHTS), axis=0)
    phi = kernels.mesh_potentials_at_points(qp, surface, np.ascontiguousarray(normals))   # (q, 3)
    return (qn * qw[:, None]).T @ phi / vol.sum()


def section_points(model, axis: int, n: int = 80) -> np.ndarray:
    """Points (m) on the mid-plane of the model perpendicular to `axis` that lie
    inside the material, on an n x n grid over the bounding box; the plane is
    nudged by 1e-9 of the size so that no point sits on a mesh face."""
    lo, hi = model.mesh.nodes.min(axis=0), model.mesh.nodes.max(axis=0)
    centre = model.mesh.volumes() @ model.mesh.centroids() / model.mesh.volumes().sum()
    u, v = [k for k in range(3) if k != axis]
    gu = lo[u] + (np.arange(n) + 0.5) / n * (hi[u] - lo[u])
    gv = lo[v] + (np.arange(n) + 0.5) / n * (hi[v] - lo[v])
    P = np.zeros((n * n, 3))
    P[:, u], P[:, v] = np.repeat(gu, n), np.tile(gv, n)
    P[:, axis] = centre[axis] + 1e-9 * np.max(hi - lo)
    return P[locate(model.mesh, P) >= 0]


def _fluxmetric_uniform(model, axis_name: str) -> float:
    """Fluxmetric factor at chi = 0: -<H_axis> over the mid-plane section for a
    uniform unit M along the axis."""
    a = "xyz".index(axis_name)
    mesh = model.mesh
    M = np.zeros((mesh.n_cells, 3))
    M[:, a] = 1.0
    P = section_points(model, a)
    tris, sigma = charged_faces(mesh, M)
    H = kernels.face_field_at_points(P, np.ascontiguousarray(tris), sigma)
    return float(-H[:, a].mean())


def _fluxmetric_solved(solution, a: int) -> float:
    """Fluxmetric factor (H0 - <H>)/<M> over the mid-plane section, unit H0."""
    P = section_points(solution.model, a)
    idx = locate(solution.model.mesh, P)
    H, M = solution.H[idx, a].mean(), solution.M[idx, a].mean()
    return float((1.0 - H) / M)
