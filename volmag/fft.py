"""Matrix-free Newell operator of hexahedral cells on one regular grid, by FFT.

The cell-averaged interaction tensor T of Newell, Williams & Dunlop (J.
Geophys. Res. 98, 9551, 1993; :mod:`volmag.newell`) depends only on the offset
between two cells of one grid, so the cell-averaged field of all cells,

    H_i = sum_j T(c_i - c_j) M_j,

is a discrete convolution over the grid's bounding box.  Zero-padded to at
least 2 n - 1 points per axis it becomes cyclic and is evaluated with real
FFTs (e.g. Press et al., Numerical Recipes, 3rd ed., 2007, sec. 13.1).  Cells
that are not material (holes, gaps between bodies) are zeros of a mask; any
number of bodies and materials share the grid.

T is symmetric (six components) and each component has a parity in each
offset coordinate (T_xx even in x, y, z; T_xy odd in x and y, even in z; ...),
so the transforms of the six components are real: they are computed once per
grid shape and cell size, kept in a small cache, and stored as real arrays in
the chosen precision ("double": float64, "single": float32; the transforms of
M are then complex128 or complex64).

Transforms are pruned: the forward transform runs along z over the n_x n_y
non-zero lines only, then along y over n_x planes, then along x; the inverse
keeps only the rows it returns.  This costs 7/12 of three full padded
transform pairs when every axis is padded to 2 n.
"""
from __future__ import annotations

import functools

import numpy as np
import scipy.fft as sfft
from numba import njit, prange

from . import newell
from .machine import usable_cores

PRECISIONS = {"double": (np.float64, np.complex128), "single": (np.float32, np.complex64)}

# Parity of each tensor component (xx, yy, zz, xy, xz, yz) in x, y, z.
_COMPONENTS = ((0, 0), (1, 1), (2, 2), (0, 1), (0, 2), (1, 2))
_PARITY = np.array([[1, 1, 1], [1, 1, 1], [1, 1, 1], [-1, -1, 1], [-1, 1, -1], [1, -1, -1]])


def padded_shape(shape) -> tuple[int, int, int]:
    """FFT lengths >= 2 n - 1 per axis (fast sizes for scipy.fft)."""
    return tuple(1 if n == 1 else int(sfft.next_fast_len(2 * n - 1, real=(ax == 2)))
                 for ax, n in enumerate(shape))


def spectrum_shape(shape) -> tuple[int, int, int]:
    L = padded_shape(shape)
    return L[0], L[1], L[2] // 2 + 1


def kernel_spectrum(shape, cell, precision: str = "double") -> np.ndarray:
    """Real transforms (6, L1, L2, L3 // 2 + 1) of the six components of T on a
    grid of `shape` (3,) cells of edge lengths `cell` (3,) m; cached per
    (shape, cell, precision).  Dimensionless."""
    shape = tuple(int(v) for v in shape)
    cell = tuple(float(v) for v in cell)
    if precision not in PRECISIONS:
        raise ValueError(f"precision must be one of {sorted(PRECISIONS)}, not {precision!r}")
    return _kernel_spectrum(shape, cell, precision)


@functools.lru_cache(maxsize=6)
def _kernel_spectrum(shape, cell, precision):
    L = padded_shape(shape)
    n = np.array(shape)
    axes = [np.arange(k) for k in shape]
    octant = np.stack(np.meshgrid(*axes, indexing="ij"), axis=-1).reshape(-1, 3)
    T = newell.cell_tensors(octant * np.array(cell), np.array(cell)).reshape(*shape, 3, 3)
    # Offsets -(n-1) .. n-1 sit at index offset mod L of the cyclic array.
    where = np.ix_(*[np.arange(1 - n[k], n[k]) % L[k] for k in range(3)])
    real = PRECISIONS[precision][0]
    out = np.empty((6,) + spectrum_shape(shape), real)
    padded = np.zeros(L)
    for c, (a, b) in enumerate(_COMPONENTS):
        full = T[..., a, b]
        for ax in range(3):   # reflect the octant with the component's parity
            mirror = np.flip(np.take(full, np.arange(1, shape[ax]), axis=ax), axis=ax)
            full = np.concatenate([_PARITY[c, ax] * mirror, full], axis=ax)
        padded[where] = full
        # even/odd symmetry makes the transform real; the imaginary part is rounding
        out[c] = sfft.rfftn(padded, workers=usable_cores()).real
    return out


def grid_shape(grid_index: np.ndarray) -> tuple[int, int, int]:
    """Bounding box (3,) in cells of integer grid indices (m, 3)."""
    return tuple(int(v) for v in grid_index.max(axis=0) - grid_index.min(axis=0) + 1)


class GridOperator:
    """K M: cell-averaged field (A/m) in every material cell of the
    magnetisation M (A/m) of all material cells, on one grid.

    grid_index (m, 3) integer cell coordinates; cell (3,) edge lengths, m;
    precision "double" | "single"; workers: threads of the transforms."""

    def __init__(self, grid_index, cell, precision: str = "double", workers: int | None = None):
        grid_index = np.asarray(grid_index, np.int64)
        self.shape = grid_shape(grid_index)
        self.cell = np.asarray(cell, float)
        self.precision = precision
        self.real, self.complex = PRECISIONS[precision]
        self.workers = workers or usable_cores()
        self.padded = padded_shape(self.shape)
        self.n_cells = len(grid_index)
        self.flat = np.ravel_multi_index((grid_index - grid_index.min(axis=0)).T, self.shape)
        self.spectrum = kernel_spectrum(self.shape, self.cell, precision)

    def __call__(self, M: np.ndarray) -> np.ndarray:
        """Field (m, 3) of M (m, 3), both A/m, as float64."""
        n1, n2, n3 = self.shape
        L1, L2, L3 = self.padded
        w = self.workers
        grid = np.zeros((3, n1 * n2 * n3), self.real)
        grid[:, self.flat] = np.asarray(M).T
        grid = grid.reshape(3, n1, n2, n3)
        # forward, pruned: z over the n1 n2 data lines, y over n1 planes, then x
        g = sfft.rfft(grid, n=L3, axis=3, workers=w)
        g = sfft.fft(g, n=L2, axis=2, workers=w, overwrite_x=True)
        g = sfft.fft(g, n=L1, axis=1, workers=w, overwrite_x=True)
        _multiply(g, self.spectrum)
        # inverse, pruned: keep the rows of the grid only
        g = sfft.ifft(g, axis=1, workers=w, overwrite_x=True)[:, :n1]
        g = sfft.ifft(g, axis=2, workers=w, overwrite_x=True)[:, :, :n2]
        g = sfft.irfft(g, n=L3, axis=3, workers=w, overwrite_x=True)[..., :n3]
        return g.reshape(3, -1)[:, self.flat].T.astype(float)

    def transforms_only(self, M: np.ndarray) -> None:
        """The bare padded transforms a product needs (3 forward and 3 inverse
        full rfftn/irfftn), for benchmarks."""
        grid = np.zeros((3,) + self.shape, self.real)
        g = sfft.rfftn(grid, s=self.padded, axes=(1, 2, 3), workers=self.workers)
        sfft.irfftn(g, s=self.padded, axes=(1, 2, 3), workers=self.workers)

    def nbytes(self) -> int:
        """Memory held by the operator (its kernel spectrum), bytes."""
        return self.spectrum.nbytes


def memory_estimate(shape, n_cells: int, precision: str = "double") -> float:
    """Bytes one GridOperator and one product need: the kernel spectrum, the
    transformed M (largest temporary, twice during a transform) and the
    cell-to-grid maps."""
    real = np.dtype(PRECISIONS[precision][0]).itemsize
    spec = float(np.prod(spectrum_shape(shape)))
    return 6 * spec * real + 3 * 2 * spec * 2 * real * 2 + float(np.prod(shape)) * 3 * real + 48.0 * n_cells


def uniform_demag(grid_index, cell, precision: str = "double") -> np.ndarray:
    """Magnetometric demagnetising tensor (3, 3), dimensionless, of the cells
    on one grid: N = -<K e_j> for uniform unit magnetisation along x, y, z,
    averaged over the cells (all cells have the same volume)."""
    K = GridOperator(grid_index, cell, precision)
    N = np.empty((3, 3))
    for j in range(3):
        M = np.zeros((K.n_cells, 3))
        M[:, j] = 1.0
        N[:, j] = -K(M).mean(axis=0)
    return N


@njit(parallel=True, cache=True)
def _multiply(g, s):
    """In place g <- S g at every frequency, S the symmetric 3x3 transform
    held as (xx, yy, zz, xy, xz, yz)."""
    n1, n2, n3 = g.shape[1], g.shape[2], g.shape[3]
    for i in prange(n1):
        for j in range(n2):
            for k in range(n3):
                x, y, z = g[0, i, j, k], g[1, i, j, k], g[2, i, j, k]
                g[0, i, j, k] = s[0, i, j, k] * x + s[3, i, j, k] * y + s[4, i, j, k] * z
                g[1, i, j, k] = s[3, i, j, k] * x + s[1, i, j, k] * y + s[5, i, j, k] * z
                g[2, i, j, k] = s[4, i, j, k] * x + s[5, i, j, k] * y + s[2, i, j, k] * z
