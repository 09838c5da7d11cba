"""Demagnetising factors across susceptibility, with discretisation error bars.

The magnetometric tensor N of a body that is not an ellipsoid depends on its
susceptibility (e.g. Chen, Brug & Goldfarb, IEEE Trans. Magn. 27, 3601
(1991), for cylinders). :func:`demag_table` computes N(chi) of one body on
one mesh for a list of susceptibilities, the ideal soft limit included;
:func:`refinement_study` repeats it on successively finer meshes and
extrapolates every factor with its observed order of convergence
(Richardson extrapolation; Roache, Verification and Validation in
Computational Science and Engineering, Hermosa 1998), with an error bar.

The ideal soft limit chi = inf (inside the body H = 0 and N = X^-1, X the
apparent susceptibility) is solved at chi = :data:`CHI_SOFT`. N(chi) is a
smooth function of 1/chi there, so N(CHI_SOFT) differs from the limit by
O(1/CHI_SOFT), far below any discretisation error; a larger chi costs digits
in the linear solve (measured on a sphere: N moves by 2e-5 at chi = 1e8,
by less than 1e-7 between 1e5 and 1e6).
"""
from __future__ import annotations

import csv
import math
import time
from dataclasses import dataclass, replace
from pathlib import Path

import numpy as np

from . import operators
from .convergence import observed_order
from .materials import LinearMaterial
from .meshing import element_size
from .post import demag_tensor
from .progress import QUIET
from .solve import Model, SolverOptions

#: The susceptibility at which the ideal soft limit chi = inf is solved.
CHI_SOFT = 1e6
#: Mesh sizes of a refinement study shrink by this factor per level.
MESH_RATIO = 0.7
#: Safety factor of the grid convergence index for three-mesh studies with an
#: observed order (Roache 1998).
GCI_SAFETY = 1.25


@dataclass(frozen=True)
class DemagTable:
    """Magnetometric tensors N (k, 3, 3), dimensionless, model axes, of one
    body at the susceptibilities `chi` (k values, math.inf for the soft
    limit), all on one mesh of `n_cells` elements of mean size `h` (m, the
    cube root of the mean element volume). `fluxmetric` (k,) holds the
    mid-plane factors along `fluxmetric_axis` when asked for."""
    body: str
    chi: tuple
    N: np.ndarray
    fluxmetric: np.ndarray | None
    fluxmetric_axis: str | None
    n_cells: int
    h: float
    seconds: float


def parse_chis(text: str) -> tuple:
    """Susceptibilities from a comma-separated list such as "0,1,10,inf";
    "inf" is the ideal soft limit. ValueError for anything else, negative
    values at or below -1, or an empty list."""
    out = []
    for item in text.split(","):
        item = item.strip().lower()
        if not item:
            continue
        try:
            chi = math.inf if item in ("inf", "infinity") else float(item)
        except ValueError:
            raise ValueError(f"susceptibility {item!r} is not a number or 'inf'") from None
        if math.isnan(chi) or not chi > -1:
            raise ValueError(f"susceptibility {item!r} must be > -1")
        out.append(chi)
    if not out:
        raise ValueError("no susceptibility given (e.g. --chi 0,1,10,100,1000,inf)")
    return tuple(out)


def with_susceptibility(model: Model, chi: float) -> Model:
    """The one-body `model` with its material replaced by the linear
    susceptibility chi (math.inf: the soft limit, solved at CHI_SOFT), on the
    same mesh."""
    body = model.bodies[0]
    chi = CHI_SOFT if math.isinf(chi) else float(chi)
    return Model((replace(body, material=LinearMaterial(f"chi={chi:g}", chi)),), model.mesh, model.mesh_stats)


def mesh_size(model: Model) -> float:
    """Mesh size h (m) of refinement studies, measured rather than requested
    (the mesher need not follow the request exactly): for tetrahedra the
    square root of the mean area of the boundary triangles, where the error
    of the surface charges sits (graded meshes refine there); for hexahedra
    the largest cell edge."""
    mesh = model.mesh
    if mesh.cell_type == "hex":
        return float(np.max(mesh.cell_size))
    topo = operators.tet_topology(mesh.nodes, mesh.cells)
    tri = mesh.nodes[topo.faces[topo.neighbour < 0]]
    area = 0.5 * np.linalg.norm(np.cross(tri[:, 1] - tri[:, 0], tri[:, 2] - tri[:, 0]), axis=1)
    return float(np.sqrt(area.mean()))


def demag_table(model: Model, body: str, chis, options: SolverOptions = SolverOptions(),
                fluxmetric_axis: str | None = None, progress=QUIET) -> DemagTable:
    """N(chi) of `body` (a name in `model`) on the model's mesh, one solve
    per susceptibility (dimensionless; math.inf for the soft limit)."""
    t0 = time.perf_counter()
    sub = model.only(body)
    Ns, flux = [], []
    for chi in chis:
        progress(f"demagnetising tensor of {body} at chi = {chi:g}")
        res = demag_tensor(with_susceptibility(sub, chi), body, options, fluxmetric_axis, progress)
        Ns.append(res.N)
        flux.append(res.fluxmetric)
    return DemagTable(body, tuple(float(c) for c in chis), np.array(Ns),
                      np.array(flux, float) if fluxmetric_axis else None, fluxmetric_axis,
                      sub.mesh.n_cells, mesh_size(sub), time.perf_counter() - t0)


@dataclass(frozen=True)
class Extrapolated:
    """Values of a refinement study, any shape S. `value`: the extrapolated
    limit where an order of convergence was observed, else the finest-mesh
    value; `error`: its error bar (same units); `order`: the observed order
    (nan where none); `finest`: the finest-mesh value; `richardson`: True
    where `value` is extrapolated."""
    value: np.ndarray
    error: np.ndarray
    order: np.ndarray
    finest: np.ndarray
    richardson: np.ndarray


def extrapolate(h, q, min_order: float = 0.5, max_order: float = 4.0) -> Extrapolated:
    """Richardson extrapolation with the observed order (Roache 1998) of each
    component of `q` (levels, *S) over the mesh sizes `h` (levels, decreasing;
    the last three levels are used).

    Error bar: the grid convergence index of the finest mesh,
    GCI_SAFETY |q_fine - q_limit| (Roache 1998), which also bounds the
    extrapolated value. Where no order in [min_order, max_order] is observed
    (values not converging monotonically, or no change at all), the value is
    the finest one and the error bar the largest difference between it and a
    coarser level."""
    h, q = np.asarray(h, float), np.asarray(q, float)
    if len(h) < 3:
        raise ValueError("a refinement study needs at least three meshes")
    flat = q.reshape(len(h), -1)
    value, error, order = flat[-1].copy(), np.abs(flat - flat[-1]).max(axis=0), np.full(flat.shape[1], np.nan)
    used = np.zeros(flat.shape[1], bool)
    for k in range(flat.shape[1]):
        try:
            limit, p = observed_order(h[-3:], flat[-3:, k])
        except ValueError:
            continue
        order[k] = p
        if min_order <= p <= max_order:
            value[k], error[k], used[k] = limit, GCI_SAFETY * abs(flat[-1, k] - limit), True
    shape = q.shape[1:]
    return Extrapolated(value.reshape(shape), error.reshape(shape), order.reshape(shape),
                        flat[-1].reshape(shape), used.reshape(shape))


def refined(body, factor: float):
    """The body with its mesh sizes (element and surface) scaled by `factor`."""
    size = element_size(body)
    surface = body.mesh.surface_size
    return replace(body, mesh=replace(body.mesh, size=size * factor,
                                      surface_size=None if surface is None else surface * factor))


@dataclass(frozen=True)
class RefinedTable:
    """A refinement study of N(chi): one :class:`DemagTable` per mesh
    (`levels`, coarsest first) and the extrapolated tensors `N`
    (:class:`Extrapolated` of shape (k, 3, 3)) and fluxmetric factors."""
    body: str
    chi: tuple
    levels: tuple
    N: Extrapolated
    fluxmetric: Extrapolated | None

    @property
    def h(self) -> np.ndarray:
        """Mean element size (m) of each level."""
        return np.array([t.h for t in self.levels])


def refinement_study(body, chis, levels: int = 3, ratio: float = MESH_RATIO,
                     options: SolverOptions = SolverOptions(), fluxmetric_axis: str | None = None,
                     progress=QUIET) -> RefinedTable:
    """N(chi) of a :class:`volmag.Body` on `levels` meshes, the body's own
    first and each next one with sizes scaled by `ratio`; every factor
    extrapolated with its observed order and given an error bar
    (:func:`extrapolate`). ValueError if two levels give the same mesh."""
    if levels < 3:
        raise ValueError(f"a refinement study needs at least 3 meshes (got {levels})")
    tables = []
    for k in range(levels):
        model = Model.build([refined(body, ratio ** k)], progress)
        if tables and model.mesh.n_cells <= tables[-1].n_cells:
            raise ValueError(f"body {body.name!r}: refining the mesh by {ratio:g} did not add elements "
                             f"({model.mesh.n_cells} after {tables[-1].n_cells}); give a smaller mesh size")
        tables.append(demag_table(model, body.name, chis, options, fluxmetric_axis, progress))
    h = [t.h for t in tables]
    N = extrapolate(h, np.array([t.N for t in tables]))
    flux = extrapolate(h, np.array([t.fluxmetric for t in tables])) if fluxmetric_axis else None
    return RefinedTable(body.name, tables[0].chi, tuple(tables), N, flux)


# ------------------------------------------------------------ presentation --

def chi_json(chi: float):
    """A susceptibility for JSON, which has no infinity: the soft limit is the
    string "inf"."""
    return "inf" if math.isinf(chi) else chi


def table_json(table: DemagTable | RefinedTable, cgs: bool = False) -> dict:
    """One body's entry of `volmag demag --json`: {"chi": [...], "N": [3x3, ...]}
    (SI, chi = "inf" for the soft limit), plus "chi_solved" (the
    susceptibility actually solved), "mesh" and, when present, the fluxmetric
    factors, the refinement study ("N_error", "order", "extrapolated", "levels") and the cgs
    values ("N_cgs" = 4 pi N, "chi_cgs" = chi / 4 pi)."""
    study = table if isinstance(table, RefinedTable) else None
    base = study.levels[-1] if study else table
    N = study.N.value if study else table.N
    out = {"chi": [chi_json(c) for c in table.chi], "N": N.tolist(),
           "chi_solved": [CHI_SOFT if math.isinf(c) else c for c in table.chi],
           "mesh": {"cells": base.n_cells, "h": base.h}}
    if table.fluxmetric is not None:
        flux = study.fluxmetric.value if study else table.fluxmetric
        out["fluxmetric"] = {"axis": base.fluxmetric_axis, "N": flux.tolist()}
    if study:
        out["N_error"] = study.N.error.tolist()
        out["order"] = [[[None if np.isnan(p) else float(p) for p in row] for row in m] for m in study.N.order]
        out["extrapolated"] = study.N.richardson.tolist()
        out["levels"] = [{"cells": t.n_cells, "h": t.h, "N": t.N.tolist()} for t in study.levels]
        if study.fluxmetric is not None:
            out["fluxmetric"]["error"] = study.fluxmetric.error.tolist()
    if cgs:
        out["N_cgs"] = (4 * math.pi * N).tolist()
        out["chi_cgs"] = [chi_json(c / (4 * math.pi)) for c in table.chi]
    return out


def format_table(table: DemagTable | RefinedTable, cgs: bool = False) -> str:
    """Human-readable N(chi) of one body: the diagonal and the largest
    off-diagonal term of N per susceptibility, with error bars after a
    refinement study; `cgs` adds the cgs columns (N summing to 4 pi at chi = 0,
    chi in emu/(cm^3 Oe) = chi_SI / 4 pi)."""
    study = table if isinstance(table, RefinedTable) else None
    base = study.levels[-1] if study else table
    N = study.N.value if study else table.N
    lines = [f"body {table.body}: magnetometric demagnetising tensor N(chi), SI (trace 1 at chi = 0), "
             f"model axes"]
    if study:
        lines.append("  meshes: " + ", ".join(f"{t.n_cells} cells (h {t.h:.3g} m)" for t in study.levels)
                     + f"; N extrapolated (Richardson, observed order) with GCI error bars")
    else:
        lines.append(f"  mesh: {base.n_cells} cells (h {base.h:.3g} m)")
    head = f"  {'chi':>10}  {'N_xx':>10}  {'N_yy':>10}  {'N_zz':>10}  {'max|off|':>9}"
    if study:
        head += f"  {'+-xx':>8}  {'+-yy':>8}  {'+-zz':>8}  {'order zz':>8}"
    if table.fluxmetric is not None:
        head += f"  {'flux ' + base.fluxmetric_axis:>10}"
    if cgs:
        head += f"  | cgs: {'chi':>10}  {'4pi N_xx':>9}  {'4pi N_yy':>9}  {'4pi N_zz':>9}"
    lines.append(head)
    for k, chi in enumerate(table.chi):
        n = N[k]
        off = np.abs(n - np.diag(np.diag(n))).max()
        row = f"  {chi:>10.4g}  {n[0, 0]:>10.6f}  {n[1, 1]:>10.6f}  {n[2, 2]:>10.6f}  {off:>9.2e}"
        if study:
            e, p = study.N.error[k], study.N.order[k, 2, 2]
            order = "none" if np.isnan(p) else f"{p:.2f}" if study.N.richardson[k, 2, 2] else f"({p:.2f})"
            row += f"  {e[0, 0]:>8.1e}  {e[1, 1]:>8.1e}  {e[2, 2]:>8.1e}  {order:>8}"
        if table.fluxmetric is not None:
            row += f"  {(study.fluxmetric.value if study else table.fluxmetric)[k]:>10.6f}"
        if cgs:
            row += (f"  |      {chi / (4 * math.pi):>10.4g}  {4 * math.pi * n[0, 0]:>9.5f}  "
                    f"{4 * math.pi * n[1, 1]:>9.5f}  {4 * math.pi * n[2, 2]:>9.5f}")
        lines.append(row)
    if study and not study.N.richardson.all():
        lines.append("  (where no order in 0.5 to 4 is observed -- shown in brackets or as none -- N is the finest "
                     "mesh's value and its error bar the largest change over the meshes)")
    if any(math.isinf(c) for c in table.chi):
        lines.append(f"  (chi = inf: the ideal soft limit, solved at chi = {CHI_SOFT:g})")
    return "\n".join(lines)


def write_table_csv(path, tables, cgs: bool = False) -> Path:
    """N(chi) of several bodies as CSV, written atomically: one row per body
    and susceptibility, columns body, chi ("inf" for the soft limit), N_xx ...
    N_zz (SI), then their error bars, the fluxmetric factor and the cgs values
    when present."""
    from .correction import write_atomically
    comps = [f"{a}{b}" for a in "xyz" for b in "xyz"]
    study = isinstance(tables[0], RefinedTable)
    head = ["body", "chi"] + [f"N_{c}" for c in comps]
    if study:
        head += [f"N_{c}_error" for c in comps]
    if tables[0].fluxmetric is not None:
        head += ["fluxmetric"] + (["fluxmetric_error"] if study else [])
    if cgs:
        head += ["chi_cgs"] + [f"N_{c}_cgs" for c in comps]
    rows = [head]
    for t in tables:
        N = t.N.value if study else t.N
        flux = (t.fluxmetric.value if study else t.fluxmetric) if t.fluxmetric is not None else None
        for k, chi in enumerate(t.chi):
            row = [t.body, chi_json(chi)] + [repr(float(v)) for v in N[k].ravel()]
            if study:
                row += [repr(float(v)) for v in t.N.error[k].ravel()]
            if flux is not None:
                row += [repr(float(flux[k]))] + ([repr(float(t.fluxmetric.error[k]))] if study else [])
            if cgs:
                row += [chi_json(chi / (4 * math.pi))] + [repr(float(4 * math.pi * v)) for v in N[k].ravel()]
            rows.append(row)
    return write_atomically(path, lambda fh: csv.writer(fh).writerows(rows), text=True)
