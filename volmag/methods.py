"""Which solution method fits a mesh: memory and time estimates, and the choice.

Methods:

* ``dense``: the assembled operator and its LU factor (any mesh).  Memory
  grows as n^2 and the factor as n^3: unbeatable for a few thousand
  unknowns, impossible beyond ~20k.
* ``fft``: hexahedral grids, the Newell convolution by FFT
  (:mod:`volmag.fft`) with the multilevel preconditioner
  (:mod:`volmag.multilevel`); tetrahedra, the precorrected FFT of the face
  charges (:mod:`volmag.pfft`).  Memory grows as n.
* ``fmm``: tetrahedra, the fast multipole method of the face charges
  (:mod:`volmag.fmm`, fmm3dpy).

``auto`` estimates bytes and seconds for each method that applies, keeps those
that fit the memory limit and takes the fastest.  A forced method that does not
fit is refused before anything is allocated, naming one that would fit.  The
constants below were measured on a 2-core machine (see benchmarks/README.md);
they steer a choice between methods that differ by orders of magnitude, not a
promise of wall time.
"""
from __future__ import annotations

import importlib
import math
from dataclasses import dataclass

import numpy as np

from .machine import available_memory, usable_cores

#: Seconds per flop of an LU factor in single precision (2 cores, measured).
_FACTOR_SECONDS_PER_FLOP = 1 / 2.5e10
#: Seconds per node-face pair of the dense tet assembly (per core, measured).
_TET_PAIR_SECONDS = 55e-9
#: Seconds per (cell pair x 9) of the dense hex assembly (measured).
_HEX_ENTRY_SECONDS = 4e-9
#: Seconds per padded grid point and log2 of the grid size, for one FFT product.
_FFT_POINT_SECONDS = 2.2e-9
#: Fine-grid products per iteration and iterations at high chi: with the
#: multilevel preconditioner (up to its cell limit), plain GMRES (products
#: counted with the orthogonalisation against a long basis) and conjugate
#: gradients; measured on voxel spheres at chi = 1000.
_FFT_WORK_MULTILEVEL, _FFT_WORK_PLAIN, _FFT_WORK_CG = 5 * 35, 1.5 * 250, 1.2 * 150

#: Products of a fast tetrahedral solve (set-up of the preconditioner and 2-10
#: iterations per right-hand side, measured from chi = 10 to 1000).
_FAST_TET_PRODUCTS = 20

#: Fixed cost of the FFT path: kernel transform, multilevel set-up, dispatch.
_FFT_SETUP_SECONDS = 0.5

#: Bytes the Krylov basis needs per unknown: restart length x 2 (V and Z) x 8.
KRYLOV_BYTES_PER_UNKNOWN = 2 * 60 * 8


@dataclass(frozen=True)
class Estimate:
    """What one method would need: `bytes` of memory and `seconds` of time
    (setup and solve, rough), or why it does not apply (`unavailable`)."""
    method: str
    bytes: float
    seconds: float
    unavailable: str = ""

    def describe(self) -> str:
        if self.unavailable:
            return f"{self.method}: {self.unavailable}"
        return f"{self.method}: ~{self.bytes / 2**30:.2f} GiB, ~{_duration(self.seconds)}"


def memory_limit(options) -> float:
    """Bytes a solve may use: the option, or 70 % of the memory available now."""
    return options.memory_limit if options.memory_limit is not None else 0.7 * available_memory()


def estimates(mesh, options, symmetric: bool = False) -> list[Estimate]:
    """Estimates for dense, fft and fmm on `mesh` with solver `options`;
    `symmetric`: every susceptibility symmetric positive definite (the FFT
    path then needs no Krylov basis beyond the multilevel range)."""
    if mesh.cell_type == "hex":
        return [_dense_hex(mesh), _fft_hex(mesh, options.precision, symmetric),
                Estimate("fmm", 0, 0, "applies to tetrahedral meshes only (hexahedral grids use fft)")]
    return [_dense_tet(mesh), _fast_tet(mesh, "fft", "pfft"), _fast_tet(mesh, "fmm", "fmm")]


def choose(mesh, options, symmetric: bool = False) -> tuple[str, str]:
    """(method, reason): the forced method if it fits, else the fastest that
    fits.  Raises SolverError (before allocating) when nothing fits or the
    forced method does not."""
    from .solve import SolverError
    limit = memory_limit(options)
    table = {e.method: e for e in estimates(mesh, options, symmetric)}
    fits = sorted((e for e in table.values() if not e.unavailable and e.bytes <= limit), key=lambda e: e.seconds)
    summary = "; ".join(e.describe() for e in table.values())
    if options.method != "auto":
        e = table[options.method]
        if e.unavailable:
            raise SolverError(f"solver method {e.method!r} {e.unavailable}; use "
                              + (f"{fits[0].method!r} (or 'auto')" if fits else "'auto'"))
        if e.bytes > limit:
            raise SolverError(
                f"solver method {e.method!r} needs ~{e.bytes / 2**30:.1f} GiB for {_size(mesh)}, over the "
                f"limit of {limit / 2**30:.1f} GiB; "
                + (f"use method = {fits[0].method!r} (~{fits[0].bytes / 2**30:.2f} GiB) or 'auto'"
                   if fits else "use a coarser mesh (larger mesh size)"))
        return e.method, f"requested ({summary})"
    if not fits:
        raise SolverError(f"no solver method fits {_size(mesh)} in {limit / 2**30:.1f} GiB ({summary}); "
                          "use a coarser mesh (larger mesh size), or fewer elements far from the region of interest")
    return fits[0].method, f"fastest that fits {limit / 2**30:.1f} GiB ({summary})"


def _size(mesh) -> str:
    return f"{mesh.n_cells} {'tetrahedra' if mesh.cell_type == 'tet' else 'cells'}"


def _duration(s: float) -> str:
    return f"{s:.0f} s" if s < 120 else f"{s / 60:.0f} min" if s < 7200 else f"{s / 3600:.0f} h"


def _dense_hex(mesh) -> Estimate:
    n = 3.0 * mesh.n_cells
    seconds = _HEX_ENTRY_SECONDS * n * n + _FACTOR_SECONDS_PER_FLOP * n ** 3 / 1.5
    return Estimate("dense", 20.0 * n * n, seconds)        # K and A in double, the factor in single


def _dense_tet(mesh) -> Estimate:
    n = float(len(mesh.nodes))
    faces = 2.0 * mesh.n_cells + 1
    seconds = _TET_PAIR_SECONDS * n * faces / usable_cores() + _FACTOR_SECONDS_PER_FLOP * n ** 3 / 1.5
    return Estimate("dense", 12.0 * n * n, seconds)


def _fft_hex(mesh, precision: str, symmetric: bool = False) -> Estimate:
    from . import fft
    from .multilevel import COARSE_CELLS, MAX_CELLS
    from .solve import PLAIN_RESTART
    shape = fft.grid_shape(mesh.grid_index)
    m = mesh.n_cells
    L = float(np.prod(fft.padded_shape(shape)))
    product = _FFT_POINT_SECONDS * L * math.log2(max(L, 2.0))
    coarse = 3.0 * min(m, COARSE_CELLS)     # unknowns of the preconditioner's dense coarsest level
    multilevel = m <= MAX_CELLS
    seconds = _FFT_SETUP_SECONDS + _FACTOR_SECONDS_PER_FLOP * coarse ** 3 / 1.5 + 20 * product \
        + (_FFT_WORK_MULTILEVEL if multilevel else _FFT_WORK_CG if symmetric else _FFT_WORK_PLAIN) * product
    # operator, the preconditioner's coarse levels and smoothers (~ a third of
    # another operator plus 200 B a cell), Krylov basis, fields
    basis = KRYLOV_BYTES_PER_UNKNOWN if multilevel else 5 * 8.0 if symmetric else 8.0 * PLAIN_RESTART
    bytes_ = 1.4 * fft.memory_estimate(shape, m, precision) + 200.0 * m + basis * 3 * m + 3 * 8 * 9 * m
    return Estimate("fft", bytes_, seconds)


def _fast_tet(mesh, method: str, module: str) -> Estimate:
    try:
        mod = importlib.import_module(f".{module}", __package__)
    except ImportError as e:
        return Estimate(method, 0, 0, f"is not available here ({e})")
    if module == "pfft":
        # the auxiliary grid spans the bounding box of all bodies: bodies far
        # apart for their element size make it too large (one triangle per tet
        # gives the mean edge length)
        points = mod.grid_points(mesh.nodes, mesh.cells[:, :3])
        if points > mod.MAX_GRID_POINTS:
            return Estimate(method, 0, 0, f"would need an auxiliary grid of {points:.2g} points (bodies far "
                                          "apart for their element size); use 'fmm'")
    n, faces = len(mesh.nodes), 2 * mesh.n_cells + 1
    nbytes, setup, product = mod.estimate(n, faces, 1e-6)
    return Estimate(method, nbytes + KRYLOV_BYTES_PER_UNKNOWN * n, setup + _FAST_TET_PRODUCTS * product)

