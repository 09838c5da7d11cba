"""Fields on a plane through the model, rebuilt from a results file.

A results file holds the solved magnetisation per element and the case text;
the field anywhere is the applied field of the case's sources plus the field
of the face charges of M (see :mod:`volmag.post`), so a plane can be sampled
after the run at any resolution.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .units import MU0, length_scale

QUANTITIES = ("B", "dB", "ppm")


@dataclass(frozen=True)
class Plane:
    """The parallelogram origin + s u + t v (m), s and t in [0, 1], sampled at
    the centres of an nu x nv grid of cells; `label` names it in figures."""
    origin: tuple[float, float, float]
    u: tuple[float, float, float]
    v: tuple[float, float, float]
    nu: int
    nv: int
    label: str = ""

    def st(self) -> tuple[np.ndarray, np.ndarray]:
        """Fractional coordinates s, t (nu, nv) of the sample points."""
        s = (np.arange(self.nu) + 0.5) / self.nu
        t = (np.arange(self.nv) + 0.5) / self.nv
        return np.meshgrid(s, t, indexing="ij")

    def points(self) -> np.ndarray:
        """Sample points (nu, nv, 3), m."""
        s, t = self.st()
        o, u, v = (np.asarray(a, float) for a in (self.origin, self.u, self.v))
        return o + s[..., None] * u + t[..., None] * v

    def normal(self) -> np.ndarray:
        """Unit normal u x v / |u x v|."""
        n = np.cross(self.u, self.v)
        return n / np.linalg.norm(n)


@dataclass(frozen=True, eq=False)
class PlaneFields:
    """Fields on a :class:`Plane`: B and the sources-only B_applied (T),
    arrays (nu, nv, 3); `inside` (nu, nv) marks points inside a body."""
    plane: Plane
    B: np.ndarray
    B_applied: np.ndarray
    inside: np.ndarray

    def values(self, quantity: str) -> np.ma.MaskedArray:
        """|B| (T), |B - B_applied| ("dB", T) or the distortion
        |B - B_applied| / |B_applied| ("ppm", parts per million) on the grid;
        points inside bodies (and, for ppm, where B_applied = 0) are masked."""
        if quantity == "B":
            out = np.linalg.norm(self.B, axis=-1)
        elif quantity in ("dB", "ppm"):
            out = np.linalg.norm(self.B - self.B_applied, axis=-1)
            if quantity == "ppm":
                ref = np.linalg.norm(self.B_applied, axis=-1)
                with np.errstate(divide="ignore", invalid="ignore"):
                    out = np.where(ref > 0, 1e6 * out / ref, np.nan)
        else:
            raise ValueError(f"unknown quantity {quantity!r}; use one of {', '.join(QUANTITIES)}")
        return np.ma.masked_invalid(np.ma.masked_where(self.inside, out))


def results_case(res: dict, base_dir=None):
    """The case stored in a results dict, parsed again (lengths in m); files it
    names are looked up relative to `base_dir` (default: the current folder)."""
    from .case import CaseError, parse_case
    try:
        return parse_case(str(res["case"]), "<case stored in the results file>", base_dir or Path.cwd())
    except CaseError as e:
        raise ValueError(f"cannot rebuild the model from the stored case text: {e}") from None


def results_mesh(res: dict):
    """The :class:`volmag.meshing.Mesh` of a results dict.  Hex grids are read
    from /mesh/cell_size, grid_index, grid_origin, or recovered from the nodes
    of files written without them."""
    from .meshing import Mesh
    m = res["mesh"]
    kind = str(m["attrs"]["cell_type"])
    nodes, cells = np.asarray(m["nodes"], float), np.asarray(m["cells"], np.int64)
    grid = {}
    if kind == "hex":
        if "grid_index" in m:
            grid = {k: m[k] for k in ("cell_size", "grid_index", "grid_origin")}
        else:  # all cells equal, smallest grid index 0 on each axis
            size = nodes[cells[0]].max(axis=0) - nodes[cells[0]].min(axis=0)
            centres = nodes[cells].mean(axis=1)
            origin = centres.min(axis=0)
            grid = dict(cell_size=size, grid_origin=origin,
                        grid_index=np.rint((centres - origin) / size).astype(np.int64))
    return Mesh(nodes, cells, kind, m["body_id"], **grid)


def results_solution(res: dict, case=None, mesh=None):
    """A :class:`volmag.solve.Solution` rebuilt from a results dict (M and H
    per element as stored; M = 0 when the file holds no solution), so that
    fields at points come from the same code as during the run."""
    from .solve import Model, Solution
    case = case or results_case(res)
    mesh = mesh or results_mesh(res)
    model = Model(case.bodies, mesh, ())
    sol = res.get("solution")
    M = np.asarray(sol["M"], float) if sol else np.zeros((mesh.n_cells, 3))
    H = np.asarray(sol["H"], float) if sol else np.zeros((mesh.n_cells, 3))
    s = res.get("solver", {}).get("attrs", {})
    return Solution(model, case.sources, M, H, None, bool(s.get("converged", True)),
                    int(s.get("iterations", 0)), float(s.get("residual", 0.0)),
                    tuple(res.get("solver", {}).get("residual_history", ())), str(s.get("method", "")),
                    int(s.get("unknowns", 0)), float(s.get("seconds", 0.0)))


def plane_fields(res: dict, plane: Plane, case=None) -> PlaneFields:
    """B and B_applied (T) on the sample points of `plane` from a results dict."""
    from .post import locate
    from .sources import total_source_field
    case = case or results_case(res)
    solution = results_solution(res, case)
    P = plane.points().reshape(-1, 3)
    _, B = solution.field(P)
    Ba = MU0 * total_source_field(case.sources, P)
    inside = locate(solution.model.mesh, P) >= 0
    shape = (plane.nu, plane.nv)
    return PlaneFields(plane, B.reshape(shape + (3,)), Ba.reshape(shape + (3,)), inside.reshape(shape))


def default_plane(res: dict, case=None, n: int | None = None) -> Plane:
    """The first plane probe of the case, else the plane through the model's
    centre that contains the applied field's main axis and the longest other
    extent, reaching half the model size beyond it on every side; about `n`
    samples along the longer side, square cells (default: :func:`sampling`)."""
    from .sources import total_source_field
    case = case or results_case(res)
    n = n or sampling(res)
    for p in case.probes:
        if p.kind == "plane":
            s = p.spec
            return _sampled(s["origin"], s["u"], s["v"], n, f"plane probe {p.name!r}")
    nodes = np.asarray(res["mesh"]["nodes"], float)
    lo, hi = nodes.min(axis=0), nodes.max(axis=0)
    centre, extent = 0.5 * (lo + hi), hi - lo
    H0 = total_source_field(case.sources, centre[None])[0]
    a = int(np.argmax(np.abs(H0))) if np.any(H0) else int(np.argmax(extent))
    b = max((k for k in range(3) if k != a), key=lambda k: extent[k])
    u_axis, v_axis = sorted((a, b))
    normal = 3 - a - b
    pad = 0.5 * extent.max()
    origin = centre.copy()
    origin[normal] += 1e-9 * extent.max()  # keep samples off mesh faces lying in a symmetry plane
    u, v = np.zeros(3), np.zeros(3)
    u[u_axis], v[v_axis] = extent[u_axis] + 2 * pad, extent[v_axis] + 2 * pad
    origin[u_axis], origin[v_axis] = lo[u_axis] - pad, lo[v_axis] - pad
    unit = str(res["attrs"].get("length_unit", "m"))
    at = centre[normal] / length_scale(unit)
    return _sampled(origin, u, v, n, f"plane {'xyz'[normal]} = {at:.4g} {display_unit(unit)}")


def sampling(res: dict, budget: float = 1e7) -> int:
    """Samples along the longer side of a default plane: 80, fewer for large
    meshes so that samples x charged faces stays near `budget` (each pair is
    one closed-form triangle integral), never below 30."""
    cells = len(res["mesh"]["cells"])
    faces = cells * (2 if str(res["mesh"]["attrs"]["cell_type"]) == "tet" else 12)
    return int(np.clip(np.sqrt(1.6 * budget / max(faces, 1)), 30, 80))


def display_unit(unit: str) -> str:
    """A case length unit as printed in figures ("um" as the micro sign)."""
    return "\u00b5m" if unit == "um" else unit


def _sampled(origin, u, v, n: int, label: str) -> Plane:
    lu, lv = np.linalg.norm(u), np.linalg.norm(v)
    h = max(lu, lv) / n
    return Plane(tuple(map(float, origin)), tuple(map(float, u)), tuple(map(float, v)),
                 max(8, int(round(lu / h))), max(8, int(round(lv / h))), label)
