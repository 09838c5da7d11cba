"""Results files (HDF5): written atomically, read back with h5py or volmag.

Layout (format version 1):
  root attributes  volmag_version, format_version, case_sha256, title,
                   length_unit, created (UTC, ISO 8601), converged,
                   expect_passed, expect_total, cautions (the safety
                   wording of volmag.cautions the run carries, possibly
                   empty), and provenance_<item> for each item of
                   :func:`volmag.run.provenance` (versions, BLAS, thread
                   counts, mesh seed)
  /case            the case text, verbatim
  /summary         the run summary as JSON text (what `volmag run --json` prints)
  /mesh            nodes (m), cells, body_id; attributes cell_type, body_names
                   hex meshes also cell_size (m), grid_index, grid_origin (m)
  /solution        M, H (A/m) and B (T) per element
  /demag/<body>    N (3x3), chi (3x3), apparent_susceptibility; attribute fluxmetric
  /probes/<name>   points (m), H (A/m), B, B_applied, dB (T), distortion_ppm
                   (nan where B_applied = 0); attributes kind, grid_shape, the
                   region metrics of volmag.distortion (nan where undefined)
                   and, with a tolerance, tolerance_quantity, tolerance_max,
                   tolerance_ok
  /forces/<body>   F (N), torque (N m), about (m); group attribute method
  /solver          attributes method, unknowns, iterations, residual, seconds,
                   converged; datasets residual_history and, for nonlinear
                   materials, newton_history (residual, step, GMRES its, dM)
"""
from __future__ import annotations

import datetime as _dt
import json
import os
import tempfile
from pathlib import Path

import h5py
import numpy as np

from . import __version__
from .distortion import METRICS
from .run import FORCE_METHOD, summary_json

FORMAT_VERSION = 1
_REQUIRED = ("case", "summary", "mesh", "solver")  # members every results file has


class ResultsError(ValueError):
    """A results file that cannot be read: missing, damaged, not written by
    volmag, or of a newer format than this version reads."""


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
    summary = run.summary()
    f.attrs.update(volmag_version=version, format_version=FORMAT_VERSION, case_sha256=case.sha256,
                   title=case.title, length_unit=case.length_unit,
                   created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                   converged=bool(summary["converged"]),
                   expect_passed=sum(bool(e["ok"]) for e in summary["expect"]),
                   expect_total=len(summary["expect"]),
                   cautions=np.array(summary["cautions"], dtype=h5py.string_dtype()))
    for k, v in run.provenance.items():
        f.attrs[f"provenance_{k}"] = v
    f.create_dataset("case", data=case.text, dtype=h5py.string_dtype())
    f.create_dataset("summary", data=summary_json(summary), dtype=h5py.string_dtype())
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
    if run.solution is not None and "newton_history" in run.solution.stats:
        # one row per Newton step: residual, step length, GMRES iterations, relative change of M
        s.create_dataset("newton_history", data=np.asarray(run.solution.stats["newton_history"], float))
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
    kinds = {pr.name: pr for pr in case.probes}
    for name, pr in run.probes.items():
        g = p.create_group(name)
        if name in kinds:
            g.attrs.update(kind=kinds[name].kind, grid_shape=list(kinds[name].grid_shape))
        for k in ("points", "H", "B", "B_applied", "dB", "distortion_ppm"):
            g.create_dataset(k, data=pr[k])
        entry = summary["probes"][name]
        g.attrs.update({k: entry[k] if entry[k] is not None else np.full(3, np.nan) if n else np.nan
                        for k, (n, _) in METRICS.items()})
        if "tolerance" in entry:
            t = entry["tolerance"]
            g.attrs.update(tolerance_quantity=t["quantity"], tolerance_max=t["max"], tolerance_ok=t["ok"])
    fg = f.create_group("forces")
    fg.attrs["method"] = FORCE_METHOD
    for name, res in summary["forces"].items():
        g = fg.create_group(name)
        for k in ("F", "torque", "about"):
            g.create_dataset(k, data=np.asarray(res[k], float))


def read_results(path) -> dict:
    """Read a results file into a dict: "attrs" (root attributes), "case"
    (text), "summary" (the run summary, a dict) and one dict per group with
    its arrays and an "attrs" dict. Raises :class:`ResultsError` for a file
    that is missing, damaged (truncated, unreadable data), not a volmag
    results file, or of a newer format version; nothing is returned half-read."""
    path = Path(path)
    if not path.is_file():
        raise ResultsError(f"{path}: no such results file")
    try:
        with h5py.File(path, "r") as f:
            if "format_version" not in f.attrs:
                raise ResultsError(f"{path}: not a volmag results file (no format_version attribute)")
            version = int(f.attrs["format_version"])
            if version > FORMAT_VERSION:
                raise ResultsError(f"{path}: results format version {version} is newer than this volmag "
                                   f"{__version__} reads (version {FORMAT_VERSION}); "
                                   "upgrade volmag to read it")
            missing = [k for k in _REQUIRED if k not in f]
            if missing:
                raise ResultsError(f"{path}: incomplete results file (no {', '.join(missing)})")
            out = _to_dict(f)
        out["summary"] = json.loads(out["summary"])
    except ResultsError:
        raise
    except (OSError, RuntimeError, KeyError, ValueError) as e:  # h5py's ways of meeting damage
        raise ResultsError(f"{path}: damaged or unreadable results file ({e})") from None
    return out


def _to_dict(g) -> dict:
    out = {"attrs": {k: v for k, v in g.attrs.items()}}
    for k, v in g.items():
        if isinstance(v, h5py.Group):
            out[k] = _to_dict(v)
        else:
            data = v[()]
            out[k] = data.decode() if isinstance(data, bytes) else data
    return out
