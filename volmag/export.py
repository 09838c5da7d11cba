"""VTK export: the elements of a results file as an unstructured grid (.vtu)
with M, H (A/m), B (T) and body_id as cell data, for any VTK-based viewer."""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np


def unstructured_grid(res: dict, scale: float = 1.0):
    """pyvista UnstructuredGrid of the mesh in a results dict (from
    :func:`volmag.results.read_results`): node coordinates in m times `scale`
    (1.0 keeps metres), cell data body_id and, when the file holds a solution,
    M, H (A/m) and B (T) per element."""
    import pyvista as pv
    mesh = res["mesh"]
    kind = {"tet": pv.CellType.TETRA, "hex": pv.CellType.HEXAHEDRON}[str(mesh["attrs"]["cell_type"])]
    grid = pv.UnstructuredGrid({kind: np.asarray(mesh["cells"], np.int64)},
                               np.asarray(mesh["nodes"], float) * scale)
    grid.cell_data["body_id"] = np.asarray(mesh["body_id"], np.int32)
    for k in ("M", "H", "B"):
        if "solution" in res:
            grid.cell_data[k] = np.asarray(res["solution"][k], float)
    return grid


def write_vtu(res: dict, out) -> Path:
    """Write the mesh and per-element fields of a results dict to the VTU file
    `out` (coordinates in m; field data records the unit, title and case hash).
    Written to a temporary name and renamed when complete."""
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    grid = unstructured_grid(res)
    attrs = res["attrs"]
    grid.field_data["length_unit"] = ["m"]
    grid.field_data["body_names"] = [str(n) for n in res["mesh"]["attrs"].get("body_names", [])] or [""]
    for k in ("title", "case_sha256", "volmag_version"):
        grid.field_data[k] = [str(attrs.get(k, ""))]
    tmp = out.with_name(f".{out.stem}.part.vtu")  # the writer is chosen by the suffix
    try:
        grid.save(tmp, binary=True)
        os.replace(tmp, out)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return out
