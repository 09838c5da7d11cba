"""Running a case: mesh, solve, demagnetising tensors, probes, expectations.

Expectations name scalar results by dotted paths (:func:`parse_quantity`, the
grammar; :func:`lookup`, the one place that resolves them):

  solver.<iterations|residual|unknowns|seconds|converged>
  bodies.<body>.volume                       m^3
  bodies.<body>.<mean_M|moment>.<x|y|z>      A/m, A m^2
  demag.<body>.<N|chi|apparent_susceptibility>.<xx|xy|...|zz>   dimensionless
  demag.<body>.fluxmetric                    dimensionless
  probes.<probe>.<H|B|B_applied|dB>.<x|y|z>  A/m or T, mean over the probe's points
  probes.<probe>.<H|B|B_applied|dB>.<x|y|z>[i]   the same at point i (0-based)
  probes.<probe>.<max_abs_B|max_dB>          T, over the points
  probes.<probe>.<max_distortion_ppm|homogeneity_ppm>   ppm, over the points
  probes.<probe>.component_homogeneity_ppm.<x|y|z>      ppm, over the points
  forces.<body>.<F|torque>.<x|y|z>           N, N m

dB = B - B_applied is the field of the magnetised bodies alone; the region
metrics are defined in :mod:`volmag.distortion`.
"""
from __future__ import annotations

import contextlib
import importlib.metadata
import json
import platform
import re
import signal
import threading
from dataclasses import dataclass, field

import numpy as np

from .cautions import run_cautions
from .distortion import METRICS, probe_fields, region_metrics
from .forces import ForceResult, body_forces
from .post import demag_tensor
from .progress import QUIET, Progress
from .solve import Model, Solution, solve

_AXES = {"x": 0, "y": 1, "z": 2}

#: Scalar results under `solver`.
SOLVER_QUANTITIES = ("iterations", "residual", "unknowns", "seconds", "converged")
#: Results per named body or probe: field -> (number of component letters, SI unit).
QUANTITY_FIELDS = {
    "bodies": {"volume": (0, "m^3"), "mean_M": (1, "A/m"), "moment": (1, "A m^2"), "max_abs_B": (0, "T")},
    "demag": {"N": (2, "1"), "chi": (2, "1"), "apparent_susceptibility": (2, "1"), "fluxmetric": (0, "1")},
    "probes": {"H": (1, "A/m"), "B": (1, "T"), "B_applied": (1, "T"), "dB": (1, "T"), **METRICS},
    "forces": {"F": (1, "N"), "torque": (1, "N m")},
}
QUANTITY_ROOTS = ("solver",) + tuple(QUANTITY_FIELDS)
#: Probe results that exist at each point (and so take a point index [i]).
PROBE_POINT_FIELDS = ("H", "B", "B_applied", "dB")
#: How forces and torques are computed (stored with them in results files).
FORCE_METHOD = ("charge model: F = mu0 sum_f sigma_f int_f H_other dS over the body's charged element faces, "
                "H_other the field of the sources and of the other bodies (Furlani, Permanent Magnet and "
                "Electromechanical Devices, Academic Press 2001, ch. 3)")
_COMPONENT = re.compile(r"^([xyz]{1,2})(?:\[(\d+)\])?$")


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
    forces: dict = field(default_factory=dict)  # body name -> ForceResult

    @property
    def converged(self) -> bool:
        return self.solution is None or self.solution.converged

    def solver_summary(self) -> dict:
        s = self.solution
        if s is None:
            return {"method": "dense", "unknowns": 0, "iterations": 0, "residual": 0.0,
                    "seconds": 0.0, "converged": True}
        return {"method": s.method, "unknowns": int(s.unknowns), "iterations": int(s.iterations),
                "residual": float(s.residual), "seconds": float(s.seconds), "converged": bool(s.converged),
                "method_reason": str(s.stats.get("method_reason", ""))}

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
            if self.solution is not None:
                B = np.linalg.norm(self.solution.B[self.model.mesh.body_id == i], axis=1)
                bodies[b.name]["max_abs_B"] = float(B.max())
        demag = {}
        for name, d in self.demag.items():
            entry = {"N": d.N.tolist(), "chi": _scalar_or_tensor(d.chi)}
            if d.apparent_susceptibility is not None:
                entry["apparent_susceptibility"] = d.apparent_susceptibility.tolist()
            if d.fluxmetric is not None:
                entry["fluxmetric"] = {"axis": d.fluxmetric_axis, "N": d.fluxmetric}
            demag[name] = entry
        probes = {name: self.probe_summary(name) for name in self.probes}
        forces = {name: {"F": f.force.tolist(), "torque": f.torque.tolist(), "about": f.about.tolist()}
                  for name, f in self.forces.items()}
        peak = max((p["max_abs_B"] or 0.0 for p in probes.values()), default=0.0)
        return {"title": self.case.title, "case_sha256": self.case.sha256, "converged": self.converged,
                "solver": self.solver_summary(),
                "mesh": [dict(s.as_dict(), summary=s.summary()) for s in self.model.mesh_stats], "bodies": bodies,
                "demag": demag, "probes": probes, "forces": forces, "expect": self.expect,
                "cautions": list(run_cautions(peak, bool(self.forces))), "warnings": self.warnings(),
                "provenance": self.provenance}

    def probe_summary(self, name: str) -> dict:
        """One probe in the summary: kind, number of points, mean H, B,
        B_applied, dB, the region metrics and, if the case sets one, the
        tolerance with its outcome."""
        p = self.probes[name]
        kind = {q.name: q.kind for q in self.case.probes}.get(name)
        out = {"kind": kind, "points": len(p["points"]),
               **{k: v.mean(axis=0).tolist() for k, v in probe_values(p).items()}, **region_metrics(p)}
        tol = self.case.tolerances.get(name)
        if tol is not None:
            (row,) = check_expectations({"probes": {name: out}}, [tol])
            out["tolerance"] = {"quantity": tol.quantity.split(".", 2)[2], "max": tol.value,
                                **{k: row[k] for k in ("got", "ok", "error") if k in row}}
        return out

    def warnings(self) -> list[str]:
        """Plain-language warnings about the solved state (magnets past their
        knee) and about probe points where the field is not finite."""
        out = []
        for i, b in enumerate(self.model.bodies if self.solution is not None else ()):
            if getattr(b.material, "knee_field", None) is None:
                continue
            own = self.model.mesh.body_id == i
            bad = b.material.knee_violations(self.solution.H[own], b.placement.rotation_matrix())
            if bad.any():
                share = self.model.mesh.volumes()[own][bad].sum() / self.model.mesh.volumes()[own].sum()
                out.append(f"body {b.name}: the field opposing the remanence exceeds the knee field "
                           f"({b.material.knee_field:g} A/m) in {100 * share:.1f} % of its volume; "
                           "irreversible demagnetisation is likely there")
        for name, p in self.probes.items():
            bad = int((~np.all(np.isfinite(p["B"]), axis=1)).sum())
            if bad:
                out.append(f"probe {name}: the field is not finite at {bad} of its points (on a current "
                           "filament?); they are left out of its metrics")
        return out


def probe_values(p: dict) -> dict:
    """Per-point vector results (n, 3) of one probe: H (A/m); B, B_applied and
    dB = B - B_applied (T)."""
    return {"H": p["H"], "B": p["B"], "B_applied": p["B_applied"], "dB": p["B"] - p["B_applied"]}


def summary_json(summary: dict) -> str:
    """The summary as one line of JSON (numpy scalars and arrays as plain numbers)."""
    return json.dumps(summary, default=_plain)


def _plain(x):
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, np.ndarray):
        return x.tolist()
    raise TypeError(f"{type(x).__name__} is not JSON serialisable")


def _scalar_or_tensor(chi: np.ndarray):
    return float(chi[0, 0]) if np.allclose(chi, chi[0, 0] * np.eye(3)) else chi.tolist()


@dataclass(frozen=True)
class Quantity:
    """A parsed result path (see the module docstring). `name` is None under
    `solver`; `component` holds axis indices (0, 1, 2), one per letter; `index`
    is a probe point or None for the mean over the points."""
    root: str
    name: str | None
    field: str
    component: tuple = ()
    index: int | None = None


def parse_quantity(text: str) -> Quantity:
    """Parse a dotted result path; ValueError says what is wrong with it."""
    parts = text.split(".")
    root = parts[0]
    if root not in QUANTITY_ROOTS:
        raise ValueError(f"{text!r} must start with one of {', '.join(QUANTITY_ROOTS)}")
    if root == "solver":
        if len(parts) != 2 or parts[1] not in SOLVER_QUANTITIES:
            raise ValueError(f"{text!r}: use solver.<{'|'.join(SOLVER_QUANTITIES)}>")
        return Quantity(root, None, parts[1])
    fields = QUANTITY_FIELDS[root]
    if len(parts) < 3:
        raise ValueError(f"{text!r} is incomplete: {root}.<name>.<{'|'.join(fields)}>[.<component>]")
    name, fname = parts[1], parts[2]
    if fname not in fields or len(parts) > 4:
        raise ValueError(f"{text!r}: after {root}.{name} comes one of {', '.join(fields)}"
                         + (" and at most a component" if fname in fields else ""))
    letters = fields[fname][0]
    if letters == 0:
        if len(parts) == 4:
            raise ValueError(f"{text!r}: {fname} is a scalar, it takes no component")
        return Quantity(root, name, fname)
    want = "x, y or z" if letters == 1 else "xx, xy, xz, yx, ..., zz"
    m = _COMPONENT.match(parts[3]) if len(parts) == 4 else None
    if m is None or len(m.group(1)) != letters:
        raise ValueError(f"{text!r}: {fname} needs a component ({want})"
                         + (", optionally with a point index such as z[3]" if root == "probes" else ""))
    if m.group(2) is not None and fname not in PROBE_POINT_FIELDS:
        raise ValueError(f"{text!r}: only probe values at points ({', '.join(PROBE_POINT_FIELDS)}) "
                         "take a point index [i]")
    index = None if m.group(2) is None else int(m.group(2))
    return Quantity(root, name, fname, tuple(_AXES[c] for c in m.group(1)), index)


def lookup(summary: dict, quantity: str, probes: dict | None = None) -> float:
    """The scalar result named by `quantity` (e.g. "demag.sample.N.zz",
    "bodies.bar.mean_M.z", "solver.iterations", "probes.p1.dB.z[3]"), in SI
    units, from a run summary; a probe point index also needs the per-point
    probe arrays `probes` (:attr:`Run.probes`). KeyError says what is missing."""
    try:
        q = parse_quantity(quantity)
    except ValueError as e:
        raise KeyError(str(e)) from None
    if q.root == "solver":
        return float(summary["solver"][q.field])
    entry = summary.get(q.root, {}).get(q.name)
    if entry is None:
        what = {"bodies": "body", "probes": "probe", "demag": "demagnetising tensor of",
                "forces": "force on"}[q.root]
        raise KeyError(f"{quantity}: no {what} {q.name!r} in the results")
    if q.index is not None:
        if probes is None or q.name not in probes:
            raise KeyError(f"{quantity}: per-point probe values are not available here")
        values = probe_values(probes[q.name])[q.field]
        if q.index >= len(values):
            raise KeyError(f"{quantity}: probe {q.name!r} has {len(values)} points (0 to {len(values) - 1})")
        return float(values[q.index][q.component[0]])
    if q.field not in entry:
        why = {"apparent_susceptibility": " (not computed at chi = 0)",
               "fluxmetric": " (ask for it with fluxmetric = \"x\"|\"y\"|\"z\" in [demag])"}.get(q.field, "")
        raise KeyError(f"{quantity}: no {q.field} in the results{why}")
    node = entry[q.field]
    if node is None:  # a probe metric without meaning here
        why = ("the applied field vanishes at a point of the probe" if q.field == "max_distortion_ppm"
               else "the field is zero or not finite over the probe")
        raise KeyError(f"{quantity}: not defined ({why})")
    if q.field == "fluxmetric":
        node = node["N"]
    if isinstance(node, (int, float)) and q.component:  # a scalar chi stands for chi times identity
        return float(node) if len(set(q.component)) == 1 else 0.0
    for k in q.component:
        node = node[k]
    return float(node)


def check_expectations(summary: dict, expects, probes: dict | None = None) -> list:
    """Outcome of each expectation (:class:`volmag.case.Expectation`): a dict
    with quantity, value, got, ok, rel_tol, abs_tol, the tolerance applied
    (|got - value| <= max(abs_tol, rel_tol |value|); 0 for a bound), bound
    ("min", "max" or None: got >= value, got <= value), the case-file line
    and, when the quantity could not be resolved, error."""
    out = []
    for e in expects:
        bound = e.bound
        tol = 0.0 if bound else max(e.abs_tol or 0.0, (e.rel_tol or 0.0) * abs(e.value))
        row = {"quantity": e.quantity, "value": e.value, "got": None, "ok": False, "rel_tol": e.rel_tol,
               "abs_tol": e.abs_tol, "tolerance": tol, "bound": bound, "line": e.line}
        try:
            row["got"] = got = lookup(summary, e.quantity, probes)
            row["ok"] = bool({"max": got <= e.value, "min": got >= e.value}.get(bound, abs(got - e.value) <= tol))
        except KeyError as err:
            row["error"] = err.args[0]
        out.append(row)
    return out


_DEPENDENCIES = ("numpy", "scipy", "numba", "gmsh", "h5py", "trimesh", "manifold3d")


def provenance() -> dict:
    """What the numbers depend on besides the case: versions of volmag, Python
    and its dependencies, the BLAS library, thread counts, and the mesher's
    random seed and thread count (read back from gmsh as the mesher sets them)."""
    import numba
    import gmsh
    from threadpoolctl import threadpool_info
    from . import __version__
    from .meshing import _gmsh_session
    out = {"volmag": __version__, "python": platform.python_version(), "platform": platform.platform()}
    for name in _DEPENDENCIES:
        try:
            out[name] = importlib.metadata.version(name)
        except importlib.metadata.PackageNotFoundError:
            out[name] = "absent"
    pools = threadpool_info()
    blas = [p for p in pools if p.get("user_api") == "blas"]
    out["blas"] = ", ".join(f"{p.get('internal_api')} {p.get('version')} ({p.get('architecture')})"
                            for p in blas) or "unknown"
    out["blas_threads"] = int(max((p.get("num_threads", 1) for p in blas), default=1))
    out["numba_threads"] = int(numba.get_num_threads())
    with _python_signal_handlers(), _gmsh_session(False):
        out["mesh_seed"] = int(gmsh.option.getNumber("Mesh.RandomSeed"))
        out["mesh_threads"] = int(gmsh.option.getNumber("General.NumThreads"))
    return out


@contextlib.contextmanager
def _python_signal_handlers():
    """Keep the Python handlers of SIGINT and SIGTERM across a block that
    initialises gmsh: gmsh installs its own C-level SIGTERM handler, which
    would end the process without unwinding (temporary files left behind)."""
    main = threading.current_thread() is threading.main_thread()
    saved = {s: signal.getsignal(s) for s in (signal.SIGINT, signal.SIGTERM)} if main else {}
    try:
        yield
    finally:
        for sig, handler in saved.items():
            if handler is not None:
                signal.signal(sig, handler)


def run_case(case, progress: Progress = QUIET) -> Run:
    """Mesh, solve and post-process a parsed case (see :mod:`volmag.case`)."""
    with _python_signal_handlers():
        model = Model.build(case.bodies, progress)
    solution = None
    has_magnets = any(np.any(b.material.remanence_vector()) for b in case.bodies)
    if (case.sources or has_magnets) and any(b.material.is_magnetic for b in case.bodies):
        progress(f"solving: {model.mesh.n_cells} elements")
        solution = solve(model, case.sources, case.solver, progress)
    demag = {}
    if case.demag is not None:
        for name in case.demag.bodies:
            progress(f"demagnetising tensor of {name}")
            demag[name] = demag_tensor(model, name, case.solver, case.demag.fluxmetric, progress)
    probes = {}
    for p in case.probes:
        progress(f"probe {p.name}: {len(p.points)} points")
        probes[p.name] = probe_fields(p.points, case.sources, solution)
    forces = {}
    request = case.forces
    for name in request.bodies if request is not None else ():
        progress(f"force on {name}")
        forces[name] = (body_forces(solution, name, request.about) if solution is not None
                        else _no_force(model, name, request.about))
    run = Run(case, model, solution, demag, probes, provenance(), forces=forces)
    run.expect = check_expectations(run.summary(), case.expects, probes)
    return run


def _no_force(model: Model, body: str, about) -> ForceResult:
    """Force on a body when nothing is magnetised: zero, about its centroid
    (m) unless `about` says otherwise."""
    if about is None:
        own = model.mesh.body_id == model.body_index(body)
        vol = model.mesh.volumes()[own]
        about = vol @ model.mesh.centroids()[own] / vol.sum()
    return ForceResult(body, np.zeros(3), np.zeros(3), np.asarray(about, float))
