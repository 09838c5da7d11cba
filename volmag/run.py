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
  probes.<probe>.max_abs_B                   T, largest |B| over the points

dB = B - B_applied is the field of the magnetised bodies alone.
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

from .post import demag_tensor
from .progress import QUIET, Progress
from .solve import Model, Solution, solve
from .sources import total_source_field
from .units import MU0

_AXES = {"x": 0, "y": 1, "z": 2}

#: Scalar results under `solver`.
SOLVER_QUANTITIES = ("iterations", "residual", "unknowns", "seconds", "converged")
#: Results per named body or probe: field -> (number of component letters, SI unit).
QUANTITY_FIELDS = {
    "bodies": {"volume": (0, "m^3"), "mean_M": (1, "A/m"), "moment": (1, "A m^2"), "max_abs_B": (0, "T")},
    "demag": {"N": (2, "1"), "chi": (2, "1"), "apparent_susceptibility": (2, "1"), "fluxmetric": (0, "1")},
    "probes": {"H": (1, "A/m"), "B": (1, "T"), "B_applied": (1, "T"), "dB": (1, "T"), "max_abs_B": (0, "T")},
}
QUANTITY_ROOTS = ("solver",) + tuple(QUANTITY_FIELDS)
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
        probes = {name: {"points": len(p["points"]),
                         **{k: v.mean(axis=0).tolist() for k, v in probe_values(p).items()},
                         "max_abs_B": float(np.linalg.norm(p["B"], axis=1).max())}
                  for name, p in self.probes.items()}
        return {"title": self.case.title, "case_sha256": self.case.sha256, "converged": self.converged,
                "solver": self.solver_summary(),
                "mesh": [dict(s.as_dict(), summary=s.summary()) for s in self.model.mesh_stats], "bodies": bodies,
                "demag": demag, "probes": probes, "expect": self.expect, "warnings": self.warnings(),
                "provenance": self.provenance}

    def warnings(self) -> list[str]:
        """Plain-language warnings about the solved state (magnets past their knee)."""
        out = []
        if self.solution is None:
            return out
        for i, b in enumerate(self.model.bodies):
            if getattr(b.material, "knee_field", None) is None:
                continue
            own = self.model.mesh.body_id == i
            bad = b.material.knee_violations(self.solution.H[own], b.placement.rotation_matrix())
            if bad.any():
                share = self.model.mesh.volumes()[own][bad].sum() / self.model.mesh.volumes()[own].sum()
                out.append(f"body {b.name}: the field opposing the remanence exceeds the knee field "
                           f"({b.material.knee_field:g} A/m) in {100 * share:.1f} % of its volume; "
                           "irreversible demagnetisation is likely there")
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
    if m.group(2) is not None and root != "probes":
        raise ValueError(f"{text!r}: only probe values take a point index [i]")
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
    entry = summary[q.root].get(q.name)
    if entry is None:
        what = {"bodies": "body", "probes": "probe", "demag": "demagnetising tensor of"}[q.root]
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
    (|got - value| <= max(abs_tol, rel_tol |value|)), the case-file line and,
    when the quantity could not be resolved, error."""
    out = []
    for e in expects:
        tol = max(e.abs_tol or 0.0, (e.rel_tol or 0.0) * abs(e.value))
        row = {"quantity": e.quantity, "value": e.value, "got": None, "ok": False, "rel_tol": e.rel_tol,
               "abs_tol": e.abs_tol, "tolerance": tol, "line": e.line}
        try:
            row["got"] = got = lookup(summary, e.quantity, probes)
            row["ok"] = bool(abs(got - e.value) <= tol)
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
        pts = np.asarray(p.points, float)
        Ha = total_source_field(case.sources, pts)
        if solution is not None:
            H, B = solution.field(pts)
        else:
            H, B = Ha, MU0 * Ha
        probes[p.name] = {"points": pts, "H": H, "B": B, "B_applied": MU0 * Ha}
    run = Run(case, model, solution, demag, probes, provenance())
    run.expect = check_expectations(run.summary(), case.expects, probes)
    return run
