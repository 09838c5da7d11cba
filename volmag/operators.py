"""Discrete interaction operators: from unknowns to the field they produce.

Tetrahedra: reduced scalar potential with nodal unknowns (Carpentier, Chadebec,
Galopin, Meunier & Bannwarth, IEEE Trans. Magn. 2013, from memory).  The
potential phi of the magnetisation is piecewise linear on the mesh, the field
H = H_s - grad phi is constant per tetrahedron (H_s averaged over it) and
M = chi H.  Because the unknown part of H is the gradient of a continuous
potential, the charge-free (solenoidal) modes of a piecewise-constant M cannot
appear, which is what keeps interior M uniform at high susceptibility.  The
field of M is that of its face charges sigma_f = n_f . (M_1 - M_2), and the
equations are collocated at the nodes:

    phi(x_i) - (1/4pi) sum_f sigma_f(phi) I_f(x_i) = (1/4pi) sum_f sigma_f(H_s) I_f(x_i),

with I_f the single-layer integral of face f (:func:`kernels.triangle_potential`).

Hexahedra on a regular grid: one uniform M per cell and the cell-averaged
tensor of Newell, Williams & Dunlop (J. Geophys. Res. 1993), a Galerkin scheme
with M_i = chi_i (H_s,i + sum_j T(c_i - c_j) M_j).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.sparse as sp
from numba import njit, prange

from . import kernels, newell

# Local faces of a positively oriented tetrahedron, ordered so that the normal
# (b - a) x (c - a) points out of the element. Face k is opposite vertex k.
TET_FACES = np.array([[1, 2, 3], [0, 3, 2], [0, 1, 3], [0, 2, 1]])


@dataclass(frozen=True, eq=False)
class TetTopology:
    """Faces of a tetrahedral mesh and the P1 gradient of every element.

    faces (nf, 3) node indices, oriented outward of `owner`; owner/neighbour
    (nf,) element indices (-1: boundary face); normals (nf, 3) unit, outward
    of the owner; grads (ne, 3, 4): grad of the four barycentric functions
    (1/m); volumes (ne,) m^3."""
    faces: np.ndarray
    owner: np.ndarray
    neighbour: np.ndarray
    normals: np.ndarray
    grads: np.ndarray
    volumes: np.ndarray


def tet_topology(nodes: np.ndarray, tets: np.ndarray) -> TetTopology:
    """Unique faces, face-element adjacency and P1 gradients of a tet mesh."""
    local = tets[:, TET_FACES].reshape(-1, 3)           # (4 ne, 3), outward
    elem = np.repeat(np.arange(len(tets)), 4)
    _, first, inverse, counts = np.unique(np.sort(local, axis=1), axis=0, return_index=True,
                                          return_inverse=True, return_counts=True)
    if np.any(counts > 2):
        raise ValueError("non-manifold tetrahedral mesh: a face is shared by more than two elements")
    inverse = inverse.ravel()
    faces = local[first]
    owner = elem[first]
    neighbour = np.full(len(first), -1)
    other = np.ones(len(local), bool)
    other[first] = False
    neighbour[inverse[other]] = elem[other]
    a, b, c = (nodes[faces[:, k]] for k in range(3))
    n = np.cross(b - a, c - a)
    normals = n / np.linalg.norm(n, axis=1)[:, None]
    J = np.stack([nodes[tets[:, k]] - nodes[tets[:, 0]] for k in (1, 2, 3)], axis=2)  # columns
    volumes = np.linalg.det(J) / 6.0
    Jinv = np.linalg.inv(J)                              # rows: grad lambda_1..3
    grads = np.concatenate([-Jinv.sum(axis=1, keepdims=True), Jinv], axis=1).transpose(0, 2, 1)
    return TetTopology(faces, owner, neighbour, normals, grads, volumes)


def charge_operator(topo: TetTopology, tets: np.ndarray, chi: np.ndarray, n_nodes: int) -> sp.csr_matrix:
    """Sparse C with face charges sigma = C phi (A/m per A of potential... i.e.
    1/m), for M_e = -chi_e grad(phi) on each element; chi (ne, 3, 3)."""
    rows, cols, vals = [], [], []
    for side, sign in ((topo.owner, 1.0), (topo.neighbour, -1.0)):
        f = np.flatnonzero(side >= 0)
        e = side[f]
        # sigma contribution: sign * n_f . M_e = -sign * n_f^T chi_e G_e phi_e
        coef = -sign * np.einsum("fi,fij,fjk->fk", topo.normals[f], chi[e], topo.grads[e])
        rows.append(np.repeat(f, 4))
        cols.append(tets[e].ravel())
        vals.append(coef.ravel())
    C = sp.coo_matrix((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))),
                      shape=(len(topo.faces), n_nodes)).tocsr()
    C.sum_duplicates()
    C.eliminate_zeros()
    return C


@njit(parallel=True, cache=True)
def _potential_rows(points, mesh, indptr, indices, data, out):
    """out[i, :] -= (1/4pi) sum_f I_f(points[i]) C[f, :] for faces with charge.

    Rows are independent (each writes its own row of out); they run in
    parallel blocks, each with its own scratch.  Per row, every face's I_f
    comes from kernels.mesh_potentials_at, which shares the edge logarithms
    and vertex distances between the faces around them (several times fewer
    transcendental calls than one triangle_potential per face, same values
    to rounding)."""
    inv4pi = 1.0 / (4.0 * np.pi)
    n, nf = points.shape[0], mesh.faces.shape[0]
    active = indptr[1:] > indptr[:-1]
    reach2 = kernels.edge_reach2(mesh, active)
    block = kernels.MESH_ROW_BLOCK
    for blk in prange((n + block - 1) // block):
        dist, L, s = kernels.mesh_scratch(mesh)
        for i in range(blk * block, min(n, (blk + 1) * block)):
            kernels.mesh_potentials_at(points[i], mesh, active, reach2, dist, L, s)
            for f in range(nf):
                sf = inv4pi * s[f]
                for k in range(indptr[f], indptr[f + 1]):
                    out[i, indices[k]] -= sf * data[k]


def nodal_potential_matrix(nodes: np.ndarray, topo: TetTopology, C: sp.csr_matrix) -> np.ndarray:
    """Dense collocation matrix A = I - S C of the nodal formulation (n x n):
    nodes (n, 3) in m, C the face-charge operator of :func:`charge_operator`
    (1/m), S[i, f] = I_f(x_i) / 4pi (m).  A is dimensionless."""
    n = len(nodes)
    A = np.zeros((n, n))
    mesh = kernels.triangle_mesh(nodes, topo.faces)
    _potential_rows(mesh.nodes, mesh, C.indptr, C.indices, C.data, A)
    A[np.diag_indices(n)] += 1.0
    return A


def potential_of_charges(points: np.ndarray, nodes: np.ndarray, faces: np.ndarray,
                         sigma: np.ndarray) -> np.ndarray:
    """Scalar potential (A) at points (n,3) m of face charges sigma (A/m)."""
    tri = nodes[faces]
    return kernels.face_potential_at_points(np.ascontiguousarray(points, dtype=float), tri, sigma)


def grid_tensor_blocks(grid_index: np.ndarray, cell_size: np.ndarray, rows: int = 256) -> np.ndarray:
    """Dense Newell interaction matrix (3n x 3n) of hex cells on one grid:
    block (i, j) = T(c_i - c_j), the cell-averaged field in cell i of unit M in
    cell j (dimensionless).  Tensors depend on the offset only, so each
    distinct offset is evaluated once; the matrix is filled `rows` cells at a
    time to keep temporaries small."""
    n = len(grid_index)
    lo = grid_index.min(axis=0) - grid_index.max(axis=0)
    span = -2 * lo + 1
    ox, oy, oz = np.meshgrid(*(np.arange(lo[k], -lo[k] + 1) for k in range(3)), indexing="ij")
    offsets = np.stack([ox.ravel(), oy.ravel(), oz.ravel()], axis=1)
    table = newell.cell_tensors(offsets * np.asarray(cell_size, float), np.asarray(cell_size, float))
    K = np.empty((3 * n, 3 * n))
    for start in range(0, n, rows):
        i = slice(start, min(start + rows, n))
        d = grid_index[i, None, :] - grid_index[None, :, :] - lo
        block = table[np.ravel_multi_index(d.reshape(-1, 3).T, span)].reshape(-1, n, 3, 3)
        K[3 * i.start:3 * i.stop] = block.transpose(0, 2, 1, 3).reshape(-1, 3 * n)
    return K


# Degree-2 rule on the tetrahedron, 4 points, equal weights (Hammer, Marlowe
# & Stroud, Math. Tables Aids Comput. 1956).
_TET4_A, _TET4_B = 0.5854101966249685, 0.1381966011250105
_TET4 = np.full((4, 4), _TET4_B) + np.eye(4) * (_TET4_A - _TET4_B)
# 2 x 2 x 2 Gauss-Legendre points on the cell [-1/2, 1/2]^3, equal weights.
_HEX8 = np.array(np.meshgrid(*[[-0.5 / np.sqrt(3), 0.5 / np.sqrt(3)]] * 3, indexing="ij")).reshape(3, -1).T


def element_average(mesh, field) -> np.ndarray:
    """Average over each element of a vector field (ne, 3): `field(points
    (n, 3) m) -> (n, 3)`, integrated by a degree-2 (tets) or 2x2x2 Gauss
    (hexes) rule, exact for fields linear in the coordinates."""
    if mesh.cell_type == "tet":
        pts = np.einsum("qk,ekd->eqd", _TET4, mesh.nodes[mesh.cells])
    else:
        pts = mesh.centroids()[:, None, :] + _HEX8[None] * mesh.cell_size
    ne, nq = pts.shape[:2]
    return field(pts.reshape(-1, 3)).reshape(ne, nq, 3).mean(axis=1)


def face_charges(topo: TetTopology, M: np.ndarray) -> np.ndarray:
    """Surface charge (A/m) on every face of the topology of the element-wise
    uniform magnetisation M (ne, 3): sigma = n . (M_owner - M_neighbour)."""
    jump = M[topo.owner] - np.where(topo.neighbour[:, None] >= 0, M[np.maximum(topo.neighbour, 0)], 0.0)
    return np.einsum("fi,fi->f", topo.normals, jump)


def potentials_at_nodes(nodes: np.ndarray, topo: TetTopology, sigmas: np.ndarray) -> np.ndarray:
    """Scalar potentials (n, k), A, at the nodes of k sets of face charges
    sigmas (nf, k), A/m, on the topology's faces."""
    mesh = kernels.triangle_mesh(nodes, topo.faces)
    return kernels.mesh_potentials_at_points(mesh.nodes, mesh, np.ascontiguousarray(sigmas, dtype=float))


def gradient_projection(mesh, topo: TetTopology, Hs: np.ndarray) -> np.ndarray:
    """The element-wise field -grad(phi_s) closest to Hs (ne, 3), A/m, in the
    volume-weighted L2 sense, phi_s piecewise linear on the mesh.

    The applied field is curl-free inside the material, but its element
    averages are not exactly a discrete gradient; at high susceptibility the
    solve cancels the gradient part of H to O(1/chi) and would multiply the
    rest by chi. Projecting H_s onto P1 gradients first removes that part
    (the reduced-potential cancellation problem, Simkin & Trowbridge, Int. J.
    Numer. Methods Eng. 1979, from memory). Uniform fields are unchanged."""
    ne, n = len(mesh.cells), len(mesh.nodes)
    w = topo.volumes
    local = np.einsum("e,eik,eil->ekl", w, topo.grads, topo.grads)           # V G^T G
    rows = np.repeat(mesh.cells, 4, axis=1).ravel()
    cols = np.tile(mesh.cells, (1, 4)).ravel()
    K = sp.coo_matrix((local.ravel(), (rows, cols)), shape=(n, n)).tocsc()
    # a tiny mass term fixes the free constant of each body's potential
    mass = np.bincount(mesh.cells.ravel(), weights=np.repeat(w / 4, 4), minlength=n)
    K = K + sp.diags(1e-12 * K.diagonal().max() / max(mass.max(), 1e-300) * mass)
    b = -np.bincount(mesh.cells.ravel(), weights=np.einsum("e,eik,ei->ek", w, topo.grads, Hs).ravel(),
                     minlength=n)
    from scipy.sparse.linalg import splu
    phi = splu(K.tocsc()).solve(b)
    return -np.einsum("eik,ek->ei", topo.grads, phi[mesh.cells])
