"""Running a case: mesh, solve, demagnetising tensors, probes, expectations."""
from __future__ import annotations

import platform
from dataclasses import dataclass, field

import numpy as np

from .post import demag_tensor
from .progress import QUIET, Progress
from .solve import Model, Solution, solve
from .sources import total_source_field
from .units import MU0

_AXES = {"x": 0, "y": 1, "z": 2}


@dataclass
class Run:
    """Everything a case run produced."""
    case: object
    model: Model
    solution: Solution | None
    demag: dict
    probes: dict
    provenance: dict
    expect: list = field(default_factory=list)

    @property
    def converged(self) -> bool:
        return self.solution is None or self.solution.converged

    def solver_summary(self) -> dict:
        s = self.solution
        if s is None:
            return {"method": "dense", "unknowns": 0, "iterations": 0, "residual": 0.0,
                    "seconds": 0.0, "converged": True}
        return {"method": s.method, "unknowns": int(s.unknowns), "iterations": int(s.iterations),
                "residual": float(s.residual), "seconds": float(s.seconds), "converged": bool(s.converged)}

    def residual_history(self) -> list:
        return [] if self.solution is None else list(self.solution.history)

    def summary(self) -> dict:
        """The JSON summary (plain Python types)."""
        bodies = {}
        for i, b in enumerate(self.model.bodies):
            vol = float(self.model.mesh.volumes()[self.model.mesh.body_id == i].sum())
            if self.solution is not None:
                mean_M, moment = self.solution.mean_M(b.name), self.solution.moment(b.name)
            else:
                mean_M = moment = np.zeros(3)
            bodies[b.name] = {"volume": vol, "mean_M": mean_M.tolist(), "moment": moment.tolist()}
        demag = {}
        for name, d in self.demag.items():
            entry = {"N": d.N.tolist(), "chi": _scalar_or_tensor(d.chi)}
            if d.apparent_susceptibility is not None:
                entry["apparent_susceptibility"] = d.apparent_susceptibility.tolist()
            if d.fluxmetric is not None:
                entry["fluxmetric"] = {"axis": d.fluxmetric_axis, "N": d.fluxmetric}
            demag[name] = entry
        probes = {name: {"points": len(p["points"]), "H": p["H"].mean(axis=0).tolist(),
                         "B": p["B"].mean(axis=0).tolist(),
                         "max_abs_B": float(np.linalg.norm(p["B"], axis=1).max())}
                  for name, p in self.probes.items()}
        return {"title": self.case.title, "converged": self.converged, "solver": self.solver_summary(),
                "mesh": [dict(s.as_dict(), summary=s.summary()) for s in self.model.mesh_stats], "bodies": bodies,
                "demag": demag, "probes": probes, "expect": self.expect}


def _scalar_or_tensor(chi: np.ndarray):
    return float(chi[0, 0]) if np.allclose(chi, chi[0, 0] * np.eye(3)) else chi.tolist()


def lookup(summary: dict, quantity: str) -> float:
    """Scalar named by a dotted path, e.g. "demag.sample.N.zz",
    "bodies.bar.mean_M.z", "solver.iterations", "probes.p1.B.z"."""
    parts = quantity.split(".")
    node = summary
    for i, key in enumerate(parts):
        if isinstance(node, list):
            idx = [_AXES[c] for c in key] if all(c in _AXES for c in key) else None
            if idx is None:
                raise KeyError(f"{quantity}: {key!r} is not a component (x, y, z, xx, xy, ...)")
            for k in idx:
                node = node[k]
        elif isinstance(node, dict) and key in node:
            node = node[key]
        else:
            raise KeyError(f"{quantity}: no {key!r} in the results")
    if isinstance(node, dict) and "N" in node:
        node = node["N"]
    if not isinstance(node, (int, float)):
        raise KeyError(f"{quantity}: names a {type(node).__name__}, not a number")
    return float(node)


def check_expectations(summary: dict, expects) -> list:
    out = []
    for e in expects:
        try:
            got = lookup(summary, e.quantity)
        except KeyError as err:
            out.append({"quantity": e.quantity, "value": e.value, "got": None, "ok": False, "error": str(err)})
            continue
        tol = max(e.abs_tol or 0.0, (e.rel_tol or 0.0) * abs(e.value))
        out.append({"quantity": e.quantity, "value": e.value, "got": got, "ok": bool(abs(got - e.value) <= tol),
                    "rel_tol": e.rel_tol, "abs_tol": e.abs_tol})
    return out


def provenance() -> dict:
    import h5py, numba, scipy, gmsh
    from . import __version__
    from threadpoolctl import threadpool_info
    threads = max((p.get("num_threads", 1) for p in threadpool_info()), default=1)
    return {"volmag": __version__, "python": platform.python_version(), "numpy": np.__version__,
            "scipy": scipy.__version__, "numba": numba.__version__, "h5py": h5py.__version__,
            "gmsh": gmsh.__version__, "blas_threads": int(threads),
            "numba_threads": int(numba.get_num_threads()), "mesh_seed": 0}


def run_case(case, progress: Progress = QUIET) -> Run:
    """Mesh, solve and post-process a parsed case (see :mod:`volmag.case`)."""
    model = Model.build(case.bodies, progress)
    solution = None
    if case.sources and any(b.material.is_magnetic for b in case.bodies):
        progress(f"solving: {model.mesh.n_cells} elements")
        solution = solve(model, case.sources, case.solver, progress)
    demag = {}
    if case.demag is not None:
        for name in case.demag.bodies:
            progress(f"demagnetising tensor of {name}")
            demag[name] = demag_tensor(model, name, case.solver, case.demag.fluxmetric, progress)
    probes = {}
    for p in case.probes:
        pts = np.asarray(p.points, float)
        Ha = total_source_field(case.sources, pts)
        if solution is not None:
            H, B = solution.field(pts)
        else:
            H, B = Ha, MU0 * Ha
        probes[p.name] = {"points": pts, "H": H, "B": B, "B_applied": MU0 * Ha}
    run = Run(case, model, solution, demag, probes, provenance())
    run.expect = check_expectations(run.summary(), case.expects)
    return run
