"""Results files (HDF5): written atomically, read back with h5py or volmag.

Layout (format version 1):
  root attributes  volmag_version, format_version, case_sha256, title,
                   length_unit, created (UTC, ISO 8601)
  /case            the case text, verbatim
  /mesh            nodes (m), cells, body_id; attributes cell_type, body_names
                   hex meshes also cell_size (m), grid_index, grid_origin (m)
  /solution        M, H (A/m) and B (T) per element
  /demag/<body>    N (3x3), chi (3x3), apparent_susceptibility; attribute fluxmetric
  /probes/<name>   points (m), H (A/m), B, B_applied (T)
  /solver          attributes method, unknowns, iterations, residual, seconds,
                   converged; dataset residual_history
"""
from __future__ import annotations

import datetime as _dt
import os
import tempfile
from pathlib import Path

import h5py
import numpy as np

FORMAT_VERSION = 1


def write_results(path, run, version: str) -> Path:
    """Write the results of a run to `path` atomically: a temporary file in the
    same folder, renamed over `path` only once complete."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    os.close(fd)
    try:
        with h5py.File(tmp, "w") as f:
            _fill(f, run, version)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def _fill(f: h5py.File, run, version: str) -> None:
    case = run.case
    f.attrs.update(volmag_version=version, format_version=FORMAT_VERSION, case_sha256=case.sha256,
                   title=case.title, length_unit=case.length_unit,
                   created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"))
    for k, v in run.provenance.items():
        f.attrs[f"provenance_{k}"] = v
    f.create_dataset("case", data=case.text, dtype=h5py.string_dtype())
    mesh = run.model.mesh
    g = f.create_group("mesh")
    g.create_dataset("nodes", data=mesh.nodes)
    g.create_dataset("cells", data=mesh.cells)
    g.create_dataset("body_id", data=mesh.body_id)
    g.attrs["cell_type"] = mesh.cell_type
    if mesh.cell_type == "hex":  # the regular grid, needed to locate points and rebuild faces
        for k in ("cell_size", "grid_index", "grid_origin"):
            g.create_dataset(k, data=getattr(mesh, k))
    g.attrs["body_names"] = [b.name for b in run.model.bodies]
    for s in run.model.mesh_stats:
        g.attrs[f"stats_{s.body}"] = s.summary()
    if run.solution is not None:
        sol = f.create_group("solution")
        sol.create_dataset("M", data=run.solution.M)
        sol.create_dataset("H", data=run.solution.H)
        sol.create_dataset("B", data=run.solution.B)
    s = f.create_group("solver")
    for k, v in run.solver_summary().items():
        s.attrs[k] = v
    s.create_dataset("residual_history", data=np.asarray(run.residual_history(), float))
    d = f.create_group("demag")
    for name, res in run.demag.items():
        b = d.create_group(name)
        b.create_dataset("N", data=res.N)
        b.create_dataset("chi", data=res.chi)
        if res.apparent_susceptibility is not None:
            b.create_dataset("apparent_susceptibility", data=res.apparent_susceptibility)
        if res.fluxmetric is not None:
            b.attrs["fluxmetric"] = res.fluxmetric
            b.attrs["fluxmetric_axis"] = res.fluxmetric_axis
    p = f.create_group("probes")
    for name, pr in run.probes.items():
        g = p.create_group(name)
        for k in ("points", "H", "B", "B_applied"):
            g.create_dataset(k, data=pr[k])


def read_results(path) -> dict:
    """Read a results file into a dict of numpy arrays and attributes.
    Refuses files of a newer format and reports damaged files plainly."""
    path = Path(path)
    try:
        with h5py.File(path, "r") as f:
            version = int(f.attrs.get("format_version", -1))
            if version > FORMAT_VERSION:
                raise ValueError(f"{path}: results format version {version} is newer than this volmag "
                                 f"reads ({FORMAT_VERSION}); upgrade volmag")
            return _to_dict(f)
    except OSError as e:
        raise ValueError(f"{path}: not a readable volmag results file ({e})") from None


def _to_dict(g) -> dict:
    out = {"attrs": {k: v for k, v in g.attrs.items()}}
    for k, v in g.items():
        if isinstance(v, h5py.Group):
            out[k] = _to_dict(v)
        else:
            data = v[()]
            out[k] = data.decode() if isinstance(data, bytes) else data
    return out
