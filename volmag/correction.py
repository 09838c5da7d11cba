"""From a measured moment curve to the intrinsic curve M(H_internal).

A sample of volume V sits in a uniform applied field H_a along the unit
vector u; the magnetometer gives its moment m along u. The apparent
magnetisation is M = m / V. What the material does is the intrinsic curve,
M against the internal field. For an ellipsoid H_int = H_a - N M exactly
(Osborn, Phys. Rev. 67, 351 (1945)); for any other shape the internal field
is not uniform and the magnetometric factor that relates the mean M to H_a
depends on the susceptibility itself (Chen, Brug & Goldfarb, IEEE Trans.
Magn. 27, 3601 (1991)), so one textbook N is wrong exactly where the
correction matters.

- Linear region (the low-field points whose chord susceptibility M/H_a
  agrees with the first one): the apparent susceptibility X_app = M/H_a and
  the intrinsic chi solve X_app = chi / (1 + N_u(chi) chi), with N_u(chi) the
  body's magnetometric factor along u solved at chi itself
  (:func:`intrinsic_susceptibility`).
- Whole curve: the intrinsic curve is represented by nodes (H_int_i, M_i)
  at the measured magnetisation levels M_i. Starting from H_int_i =
  H_a_i - N_u M_i (N_u at the linear-region chi), the meshed sample is
  solved with that curve as a nonlinear material at every measured applied
  field; where the simulated apparent curve reaches M_i at an applied field
  H_sim instead of H_a_i, the node moves by H_a_i - H_sim
  (:func:`correct_curve`). For an ellipsoid one step is exact; otherwise the
  iteration repeats until the simulated apparent M matches every measured
  point within a relative tolerance.

Every M_i is the measured apparent M (the nodes sit at the measured levels);
H_internal_i is the field at which the intrinsic curve reaches it. Its
uncertainty from the mesh (optional) is |delta N_u| |M| with delta N_u from a
refinement study (:mod:`volmag.demagtable`). The curve must be single
valued: an initial or anhysteretic curve through the origin, M(-H) = -M(H)
(no remanence, no hysteresis).

Units are converted once, when the data are read (:func:`read_curve`):
1 Oe = 1000/(4 pi) A/m and 1 emu = 1e-3 A m^2 (common practice); a field
given in T is mu0 H.
"""
from __future__ import annotations

import csv
import datetime as _dt
import hashlib
import math
import os
import re
import tempfile
import time
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
from scipy.interpolate import PchipInterpolator
from threadpoolctl import threadpool_limits

from .demagtable import extrapolate, refinement_study, with_susceptibility, CHI_SOFT
from .materials import BHCurve
from .post import demag_tensor
from .progress import QUIET
from .solve import Model, SolverOptions, solve
from .sources import UniformField
from .units import MU0

#: A/m per oersted (common practice: 1 Oe = 1000/(4 pi) A/m).
OERSTED = 1000.0 / (4.0 * math.pi)
#: A m^2 per emu of moment (common practice: 1 emu = 1e-3 A m^2).
EMU = 1e-3
#: A/m per emu/cm^3 of magnetisation (common practice: 1 emu/cm^3 = 1e3 A/m).
EMU_PER_CM3 = 1e3

#: Field units: A/m per unit. "T" and "mT" give the field as mu0 H.
FIELD_UNITS = {"A/m": 1.0, "kA/m": 1e3, "Oe": OERSTED, "kOe": 1e3 * OERSTED, "T": 1.0 / MU0,
               "mT": 1e-3 / MU0}
#: Moment units: A m^2 per unit.
MOMENT_UNITS = {"A*m^2": 1.0, "emu": EMU}


class CurveError(ValueError):
    """A measured-curve file or its units that cannot be used; names the file
    and the line (1-based) where known."""

    def __init__(self, path, line, message):
        self.path, self.line = str(path), line
        super().__init__(f"{path}:{line}: {message}" if line else f"{path}: {message}")


def _canonical(text: str, units: dict) -> str | None:
    """The unit of `units` that `text` names (case, spaces, '*', '.' and
    brackets ignored; "m2" and "m²" read as "m^2"), or None."""
    def key(s):
        s = s.strip().strip("()[]").lower().replace("²", "^2")
        s = re.sub(r"[\s*.·]", "", s)
        return s.replace("m2", "m^2") if not s.endswith("^2") else s
    wanted = key(text)
    for name in units:
        if key(name) == wanted:
            return name
    return None


def field_unit(text: str) -> str:
    """Canonical field unit (a key of FIELD_UNITS) for `text`; ValueError if unknown."""
    unit = _canonical(text, FIELD_UNITS)
    if unit is None:
        raise ValueError(f"unknown field unit {text!r}; use one of {', '.join(FIELD_UNITS)}")
    return unit


def moment_unit(text: str) -> str:
    """Canonical moment unit (a key of MOMENT_UNITS) for `text`; ValueError if unknown."""
    unit = _canonical(text, MOMENT_UNITS)
    if unit is None:
        raise ValueError(f"unknown moment unit {text!r}; use one of {', '.join(MOMENT_UNITS)}")
    return unit


@dataclass(frozen=True)
class MeasuredCurve:
    """A measured curve in SI: applied field `H_applied` (A/m) along the field
    direction and the moment along it, `moment` (A m^2), in file order; the
    units they were given in, the file, its SHA-256 and text."""
    H_applied: np.ndarray
    moment: np.ndarray
    field_unit: str
    moment_unit: str
    source: str = "<arrays>"
    sha256: str = ""
    text: str = ""


_BRACKET_UNIT = re.compile(r"[\(\[]\s*([^\)\]]+?)\s*[\)\]]\s*$")


def read_curve(path, field_unit_name: str | None = None, moment_unit_name: str | None = None) -> MeasuredCurve:
    """Read a measured curve: two comma-separated columns, applied field and
    moment, one point a line. Before the data there may be a row of column
    names (units in brackets are read: "H (Oe), m (emu)") and a units row
    ("Oe, emu"); lines starting with '#' are comments. Units given both as
    arguments and in the file must agree; at least one must give them."""
    path = Path(path)
    try:
        raw = path.read_bytes()
        text = raw.decode("utf-8-sig")
    except OSError as e:
        raise CurveError(path, None, f"cannot read the data file ({e.strerror or e})") from None
    except UnicodeDecodeError:
        raise CurveError(path, None, "not UTF-8 text") from None
    units_in_file, values = [None, None], []
    for line, row in enumerate(csv.reader(text.splitlines()), start=1):
        cells = [c.strip() for c in row]
        if not any(cells) or cells[0].startswith("#"):
            continue
        if len(cells) != 2:
            raise CurveError(path, line, f"expected two columns (applied field, moment), got {len(cells)}")
        try:
            values.append((line, float(cells[0]), float(cells[1])))
            continue
        except ValueError:
            if values:
                raise CurveError(path, line, f"not a number: {','.join(cells)!r}") from None
        _read_units_row(path, line, cells, units_in_file)
    if not values:
        raise CurveError(path, None, "no data rows")
    units = []
    for k, (given, kind, table) in enumerate(((field_unit_name, "field", field_unit),
                                              (moment_unit_name, "moment", moment_unit))):
        given = table(given) if given else None
        found = units_in_file[k]
        if given and found and given != found:
            raise CurveError(path, None, f"the {kind} unit is {given} on the command line but {found} in the file")
        if not (given or found):
            raise CurveError(path, None, f"the {kind} unit is not given: use --{kind}-unit or a units row "
                                         f"(field: {', '.join(FIELD_UNITS)}; moment: {', '.join(MOMENT_UNITS)})")
        units.append(given or found)
    data = np.array([(h, m) for _, h, m in values])
    if not np.all(np.isfinite(data)):
        bad = next(line for line, h, m in values if not (math.isfinite(h) and math.isfinite(m)))
        raise CurveError(path, bad, "not a finite number")
    return MeasuredCurve(data[:, 0] * FIELD_UNITS[units[0]], data[:, 1] * MOMENT_UNITS[units[1]],
                         units[0], units[1], str(path), hashlib.sha256(raw).hexdigest(), text)


def _read_units_row(path, line, cells, found) -> None:
    """Units from a units row ("Oe, emu") or bracketed in column names
    ("H (Oe), m (emu)"), into `found`; plain column names give none."""
    whole = [_canonical(cells[0], FIELD_UNITS), _canonical(cells[1], MOMENT_UNITS)]
    brackets = [_BRACKET_UNIT.search(c) for c in cells]
    if any(whole):
        texts = cells
    elif any(brackets):
        texts = [b.group(1) if b else None for b in brackets]
    else:
        return
    for k, (t, table) in enumerate(zip(texts, (field_unit, moment_unit))):
        if t is None:
            continue
        if re.fullmatch(r"[-+.\deE]+", t):
            raise CurveError(path, line, f"not a number: {','.join(cells)!r}")
        try:
            unit = table(t)
        except ValueError as e:
            raise CurveError(path, line, str(e)) from None
        if found[k] and found[k] != unit:
            raise CurveError(path, line, f"unit {unit} contradicts {found[k]} given above")
        found[k] = unit


def sample_volume(body, volume: float | None = None, mass: float | None = None,
                  density: float | None = None) -> tuple[float, str]:
    """(V in m^3, how it was obtained): `volume` (m^3), else `mass` (kg) /
    `density` (kg/m^3), else the body's shape volume."""
    if volume is not None:
        if mass is not None or density is not None:
            raise ValueError("give the volume, or the mass and density, not both")
        if not volume > 0:
            raise ValueError(f"the volume must be > 0 (got {volume:g} m^3)")
        return float(volume), "given"
    if mass is not None or density is not None:
        if mass is None or density is None:
            raise ValueError("the mass needs the density (and the density the mass)")
        if not (mass > 0 and density > 0):
            raise ValueError(f"mass and density must be > 0 (got {mass:g} kg, {density:g} kg/m^3)")
        return float(mass) / float(density), "mass / density"
    return float(body.nominal_volume()), "shape of the body"


def field_direction(sources) -> np.ndarray:
    """Unit vector of the case's uniform applied field (its size does not
    matter: the measured fields are applied along it)."""
    if not sources:
        raise ValueError("the case has no [[source]]: a uniform source gives the direction of the applied field")
    others = [type(s).__name__ for s in sources if not isinstance(s, UniformField)]
    if others:
        raise ValueError(f"a measured curve is taken in a uniform field; the case also has {', '.join(others)}")
    H = np.sum([np.asarray(s.H, float) for s in sources], axis=0)
    size = np.linalg.norm(H)
    if not size > 0:
        raise ValueError("the case's uniform field is zero: it gives no direction")
    return H / size


# ------------------------------------------------------------------ physics --

def apparent_factor(N: np.ndarray, chi: float, u: np.ndarray) -> float:
    """Magnetometric factor along u for the moment along u in a field along u:
    N_u = 1/X_u - 1/chi with X_u = u.(N + I/chi)^-1.u (dimensionless; chi = 0
    gives u.N.u, chi = inf 1/(u.N^-1.u)). Equals N_uu for a field along a
    principal axis."""
    if chi == 0:
        return float(u @ N @ u)
    X = np.linalg.inv(N + np.eye(3) / chi)
    return float(1.0 / (u @ X @ u) - 1.0 / chi)


def linear_region(H: np.ndarray, M: np.ndarray, tolerance: float = 0.01) -> tuple[np.ndarray, float]:
    """(mask, X_app): the points, by increasing |H| (H in A/m, M in A/m), whose
    chord susceptibility M/H agrees with that of the lowest nonzero field
    within `tolerance` (relative), and the apparent susceptibility fitted
    through the origin over them (least squares)."""
    nz = np.flatnonzero(H != 0)
    if not len(nz):
        raise ValueError("the curve has no point at a nonzero field")
    order = nz[np.argsort(np.abs(H[nz]), kind="stable")]
    chord = M[order] / H[order]
    ok = np.abs(chord / chord[0] - 1) <= tolerance
    prefix = order[:np.argmin(ok) if not ok.all() else len(ok)]
    mask = np.zeros(len(H), bool)
    mask[prefix] = True
    X = float(H[prefix] @ M[prefix] / (H[prefix] @ H[prefix]))
    return mask, X


@dataclass(frozen=True)
class IntrinsicChi:
    """Intrinsic susceptibility `chi` of a linear sample from its apparent
    susceptibility `X_app` (both dimensionless), the factor `N_u` at chi, the
    factor `N_u_chi0` at chi = 0, and the (chi, N_u) pairs solved on the way."""
    chi: float
    X_app: float
    N_u: float
    N_u_chi0: float
    evaluations: tuple


def intrinsic_susceptibility(model: Model, body: str, X_app: float, u: np.ndarray,
                             options: SolverOptions = SolverOptions(), progress=QUIET,
                             rtol: float = 1e-5, max_solves: int = 20) -> IntrinsicChi:
    """Solve X_app = chi / (1 + N_u(chi) chi) for chi with N_u computed at chi
    itself. In s = 1/chi the equation F(s) = s + N_u(s) - 1/X_app = 0 is
    smooth and increasing; a fixed-point step and then secant steps find s
    (each evaluation is one linear solve on the body's mesh), stopping when s
    changes by less than `rtol` relative."""
    if not X_app > 0:
        raise ValueError(f"the apparent susceptibility must be > 0 (got {X_app:g})")
    sub = model.only(body)
    N0 = apparent_factor(demag_tensor(with_susceptibility(sub, 0.0), body, options).N, 0.0, u)
    seen = []

    def F(s):
        chi = 1.0 / s
        progress(f"intrinsic susceptibility: trying chi = {chi:.6g}")
        n = apparent_factor(demag_tensor(with_susceptibility(sub, chi), body, options).N, chi, u)
        seen.append((chi, n))
        return s + n - 1.0 / X_app

    s = 1.0 / X_app - N0
    if not s > 0:          # beyond the chi = 0 shape limit: start from the soft limit
        s = 1.0 / CHI_SOFT
    pts = [(s, F(s))]
    if pts[0][1] >= 0 and s == 1.0 / CHI_SOFT:
        raise ValueError(f"the apparent susceptibility {X_app:.6g} is at or above the largest this shape "
                         f"allows along the field (1/N_u = {1 / (pts[0][1] + 1 / X_app - s):.6g} at "
                         "chi -> inf): check the volume and the units")
    while True:
        (s0, f0), (s1, f1) = (pts[-2] if len(pts) > 1 else (None, None)), pts[-1]
        new = s1 - f1 if s0 is None or f1 == f0 else s1 - f1 * (s1 - s0) / (f1 - f0)
        if not new > 0:
            new = 0.5 * s1
        if abs(new - s1) <= rtol * new:   # N_u(s1) stands for N_u(new): they differ by O(rtol)
            break
        if len(pts) == max_solves:
            raise ValueError(f"the intrinsic susceptibility did not settle in {max_solves} solves")
        pts.append((new, F(new)))
    return IntrinsicChi(1.0 / new, X_app, seen[-1][1], N0, tuple(seen))


def simulate_apparent(model: Model, law, fields: np.ndarray, u: np.ndarray,
                      options: SolverOptions = SolverOptions(), progress=QUIET) -> tuple[np.ndarray, bool]:
    """(mean M along u in A/m at each applied field `fields` (A/m) along u,
    all Newton solves converged) for the one-body `model` made of `law`."""
    sample = Model((replace(model.bodies[0], material=law),), model.mesh, model.mesh_stats)
    out, ok = np.empty(len(fields)), True
    # Many small dense factorisations: one BLAS thread is as fast alone and
    # several times faster when the cores are shared with other work.
    with threadpool_limits(limits=1, user_api="blas"):
        for k, h in enumerate(fields):
            sol = solve(sample, [UniformField(tuple(h * u))], options)
            out[k] = sol.mean_M() @ u
            ok &= bool(sol.converged)
    return out, ok


def _increasing(h: np.ndarray, floor: float) -> np.ndarray:
    """`h` made positive and strictly increasing (a valid curve's abscissae)."""
    h = np.maximum(np.asarray(h, float), floor)
    for i in range(1, len(h)):
        h[i] = max(h[i], h[i - 1] * (1 + 1e-9))
    return h


#: Beyond the highest measured point the intrinsic curve is extended to these
#: multiples of its last field (then M stays constant, as in BHCurve).
EXTENSION = (1.5, 2.0, 3.0, 5.0, 10.0)


def _extended(H: np.ndarray, M: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Curve nodes (A/m) with the origin in front and, beyond the last point,
    the approach to saturation M = Ms - a/H fitted through the last two
    points (e.g. Chikazumi, Physics of Ferromagnetism, 2nd ed., 1997, from
    memory): inside a sample that is not an ellipsoid some elements see more
    than the highest internal field, and a curve held flat there would keep
    the simulated mean M from ever reaching the measured one."""
    a = (M[-1] - M[-2]) / (1 / H[-2] - 1 / H[-1])
    Hx = H[-1] * np.asarray(EXTENSION)
    Mx = M[-1] + a * (1 / H[-1] - 1 / Hx)
    return np.concatenate([[0.0], H, Hx]), np.concatenate([[0.0], M, Mx])


def _applied_at(M_sim: np.ndarray, fields: np.ndarray, levels: np.ndarray) -> np.ndarray:
    """Applied field (A/m) at which the simulated apparent curve (fields,
    M_sim), with the origin, reaches `levels`: monotone cubic interpolation
    (Fritsch & Carlson, SIAM J. Numer. Anal. 17, 238 (1980)) of H against M,
    extended beyond the last point along its last chord."""
    M = np.concatenate([[0.0], np.maximum.accumulate(M_sim)])
    M += np.arange(len(M)) * 1e-12 * max(M[-1], 1e-300)    # strictly increasing
    H = np.concatenate([[0.0], fields])
    out = PchipInterpolator(M, H, extrapolate=False)(np.minimum(levels, M[-1]))
    slope = (H[-1] - H[-2]) / (M[-1] - M[-2])
    return np.where(levels > M[-1], H[-1] + (levels - M[-1]) * slope, out)


@dataclass(frozen=True)
class Correction:
    """A measured curve corrected for the sample's shape. Per point, in file
    order (A/m): `H_applied`, `M_apparent` (measured m / V), `H_internal`,
    `M` (intrinsic; equal to M_apparent), `M_simulated` (apparent M of the
    meshed sample with the corrected intrinsic curve), `dH_internal` (mesh
    uncertainty of H_internal, or None), `linear` (in the linear region).
    Scalars: intrinsic `chi`, apparent `X_app`, `N_u` at chi and `N_u_chi0`
    at chi = 0 (dimensionless); `method` "linear" or "nonlinear"; `mismatch`
    the largest |M_simulated / M - 1| (for the linear method: how far the
    data stray from the linear law); `history` that mismatch per iteration;
    `direction` u; `volume` (m^3) and how it was obtained; `seconds`."""
    H_applied: np.ndarray
    M_apparent: np.ndarray
    H_internal: np.ndarray
    M: np.ndarray
    M_simulated: np.ndarray
    dH_internal: np.ndarray | None
    linear: np.ndarray
    chi: float
    X_app: float
    N_u: float
    N_u_chi0: float
    method: str
    converged: bool
    mismatch: float
    tolerance: float
    history: tuple
    direction: np.ndarray
    volume: float
    volume_from: str
    n_cells: int
    seconds: float
    chi_error: float | None = None
    refinement: dict | None = None
    warnings: tuple = field(default=())


def correct_curve(model: Model, body: str, H_applied: np.ndarray, moment: np.ndarray, volume: float,
                  direction, options: SolverOptions = SolverOptions(), *, tolerance: float = 1e-3,
                  max_iterations: int = 12, linear_tolerance: float = 0.01, refine: int = 0,
                  volume_from: str = "given", progress=QUIET) -> Correction:
    """Intrinsic curve of `body` (a name in `model`) from its measured moment
    `moment` (A m^2, along `direction`) in applied fields `H_applied` (A/m,
    along `direction`), sample volume `volume` (m^3).

    The linear-region chi comes from :func:`intrinsic_susceptibility`. If
    every point is in the linear region, H_internal = M / chi; otherwise the
    nodes of the intrinsic curve are iterated (see the module docstring)
    until max |M_simulated / M - 1| <= `tolerance`, at most `max_iterations`
    updates. `refine` >= 3 adds a refinement study of N_u at chi on that many
    meshes: dH_internal = (|N_u,mesh - N_u,limit| + error bar) |M|."""
    t0 = time.perf_counter()
    if not (tolerance > 0 and max_iterations >= 0 and linear_tolerance > 0):
        raise ValueError("the tolerances must be > 0 and the iteration limit >= 0")
    u = np.asarray(direction, float) / np.linalg.norm(direction)
    H = np.asarray(H_applied, float)
    M = np.asarray(moment, float) / volume
    sub = model.only(body)
    mask, X_app = linear_region(H, M, linear_tolerance)
    lin = intrinsic_susceptibility(sub, body, X_app, u, options, progress)
    progress(f"linear region: {mask.sum()} points, X_app = {X_app:.6g}, chi = {lin.chi:.6g}, N_u = {lin.N_u:.6f}")
    warnings = []
    shape_volume = sub.bodies[0].nominal_volume()
    if volume_from != "shape of the body" and shape_volume and abs(volume / shape_volume - 1) > 0.05:
        warnings.append(f"the sample volume {volume:.4g} m^3 differs from the body's shape volume "
                        f"{shape_volume:.4g} m^3 by {100 * (volume / shape_volume - 1):+.0f} %: only the "
                        "shape's proportions are used; check the case's length unit")
    if mask.sum() < 2:
        warnings.append("the linear region holds one point only: chi rests on the lowest-field point")
    nonzero = H != 0
    if mask[nonzero].all():
        H_int = M / lin.chi
        M_sim = H / (lin.N_u + 1 / lin.chi)      # the meshed sample's apparent curve at chi
        method, converged, history = "linear", True, (float(np.max(np.abs(M_sim[nonzero] / M[nonzero] - 1))),)
    else:
        H_int, M_sim, converged, history = _iterate(sub, H, M, u, lin.N_u, options, tolerance,
                                                    max_iterations, progress, warnings)
        method = "nonlinear"
    mismatch = history[-1]
    dH = refinement = chi_error = None
    if refine:
        refinement, dN = _mesh_uncertainty(sub.bodies[0], lin.chi, u, refine, options, progress)
        dH = dN * np.abs(M)
        chi_error = lin.chi ** 2 * dN        # d chi / d N_u = chi^2 at fixed X_app
    return Correction(H, M, H_int, M.copy(), M_sim, dH, mask, lin.chi, X_app, lin.N_u, lin.N_u_chi0,
                      method, converged, mismatch, tolerance, history, u, float(volume), volume_from,
                      sub.mesh.n_cells, time.perf_counter() - t0, chi_error, refinement, tuple(warnings))


def _iterate(sub, H, M, u, N_start, options, tolerance, max_iterations, progress, warnings):
    """The node iteration of :func:`correct_curve` on the distinct |H_a|;
    returns per point (H_internal, M_simulated), converged, history."""
    sign = np.sign(H)
    x, y = np.abs(H), sign * M
    zero = x == 0
    scale = np.abs(M).max()
    if np.any(np.abs(M[zero]) > 1e-6 * scale):
        raise ValueError("the moment is not zero at zero field: a remanent or hysteretic curve cannot be "
                         "corrected here (give an initial or anhysteretic curve)")
    if np.any(y[~zero] <= 0):
        raise ValueError("the moment must point along the applied field at every nonzero field")
    fields, inverse = np.unique(x[~zero], return_inverse=True)
    levels = np.bincount(inverse, y[~zero]) / np.bincount(inverse)
    bad = np.flatnonzero(np.diff(levels) <= 0)
    if len(bad):
        raise ValueError(f"the magnetisation must increase with the field; it does not after "
                         f"|H_a| = {fields[bad[0]]:.6g} A/m (smooth or drop noisy points)")
    if len(fields) < 3:
        raise ValueError("a nonlinear curve needs at least 3 distinct nonzero fields")
    floor = 1e-9 * fields[0]
    nodes = _increasing(fields - N_start * levels, floor)
    history = []
    for it in range(max_iterations + 1):
        Hn, Mn = _extended(nodes, levels)
        law = BHCurve("intrinsic", Hn, MU0 * (Hn + Mn))
        sim, solved = simulate_apparent(sub, law, fields, u, options, progress)
        if not solved:
            warnings.append(f"iteration {it}: a Newton solve did not converge")
        history.append(float(np.max(np.abs(sim / levels - 1))))
        progress(f"curve iteration {it}: largest mismatch {history[-1]:.2e}")
        if history[-1] <= tolerance or it == max_iterations:
            break
        nodes = _increasing(nodes + fields - _applied_at(sim, fields, levels), floor)
    H_int, M_sim = np.zeros_like(H), np.zeros_like(H)
    H_int[~zero] = sign[~zero] * nodes[inverse]
    M_sim[~zero] = sign[~zero] * sim[inverse]
    return H_int, M_sim, history[-1] <= tolerance, tuple(history)


def _mesh_uncertainty(body, chi, u, levels, options, progress) -> tuple[dict, float]:
    """Refinement study of N_u at chi: (summary dict, |N_u,mesh - N_u,limit| + error bar)."""
    study = refinement_study(body, [chi], levels, options=options, progress=progress)
    nu = np.array([apparent_factor(t.N[0], chi, u) for t in study.levels])
    ext = extrapolate(study.h, nu)
    dN = float(abs(nu[0] - ext.value) + ext.error)
    info = {"h": study.h.tolist(), "cells": [t.n_cells for t in study.levels], "N_u": nu.tolist(),
            "N_u_limit": float(ext.value), "N_u_error": float(ext.error),
            "order": None if np.isnan(ext.order) else float(ext.order), "extrapolated": bool(ext.richardson),
            "dN_u": dN}
    return info, dN


# ------------------------------------------------------------------ output --

def write_corrected_csv(path, c: Correction, cgs: bool = False) -> Path:
    """OUT.csv: one row per measured point in file order, columns H_internal
    and M (A/m) first, then H_applied, M_apparent, M_simulated (A/m),
    dH_internal (A/m, when a refinement study ran), linear (1/0); with `cgs`
    also H_internal_Oe and M_emu_cm3."""
    head = ["H_internal", "M", "H_applied", "M_apparent", "M_simulated"]
    cols = [c.H_internal, c.M, c.H_applied, c.M_apparent, c.M_simulated]
    if c.dH_internal is not None:
        head.append("dH_internal")
        cols.append(c.dH_internal)
    if cgs:
        head += ["H_internal_Oe", "M_emu_cm3"]
        cols += [c.H_internal / OERSTED, c.M / EMU_PER_CM3]
    rows = [[repr(float(v)) for v in r] + [int(l)] for r, l in zip(np.column_stack(cols), c.linear)]
    units = ["A/m"] * len(cols) + ["1"]
    if cgs:
        units[-3:-1] = ["Oe", "emu/cm^3"]

    def write(fh):
        w = csv.writer(fh)
        w.writerow(head + ["linear"])
        w.writerow(units)
        w.writerows(rows)
    return write_atomically(path, write, text=True)


def write_atomically(path, write, text: bool) -> Path:
    """Write a file through `write(handle)` under a temporary name in the same
    folder, renamed when complete."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fd, tmp = tempfile.mkstemp(prefix=f".{path.stem}.", suffix=f".part{path.suffix}", dir=path.parent)
    os.close(fd)
    try:
        if text:
            with open(tmp, "w", newline="") as fh:
                write(fh)
        else:
            write(tmp)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise
    return path


def correction_summary(c: Correction, body: str, curve: MeasuredCurve | None = None) -> dict:
    """The correction as plain JSON-able values (SI)."""
    out = {"body": body, "method": c.method, "converged": c.converged, "mismatch": c.mismatch,
           "tolerance": c.tolerance, "iterations": len(c.history) - 1 if c.method == "nonlinear" else 0,
           "history": list(c.history), "chi": c.chi, "chi_error": c.chi_error, "X_app": c.X_app,
           "N_u": c.N_u, "N_u_chi0": c.N_u_chi0, "linear_points": int(c.linear.sum()),
           "direction": c.direction.tolist(), "volume": c.volume, "volume_from": c.volume_from,
           "cells": c.n_cells, "seconds": c.seconds, "points": len(c.M), "warnings": list(c.warnings),
           "cgs": {"chi": c.chi / (4 * math.pi), "N_u": 4 * math.pi * c.N_u}}
    if c.refinement is not None:
        out["refinement"] = c.refinement
    if curve is not None:
        out["data"] = {"file": curve.source, "sha256": curve.sha256, "field_unit": curve.field_unit,
                       "moment_unit": curve.moment_unit}
    return out


def format_correction(c: Correction, body: str) -> str:
    """Human-readable account of a correction."""
    lines = [f"sample {body}: {len(c.M)} points, field along [{', '.join(f'{v:.4g}' for v in c.direction)}], "
             f"volume {c.volume:.6g} m^3 ({c.volume_from}), mesh {c.n_cells} cells",
             f"linear region: {int(c.linear.sum())} points, apparent susceptibility {c.X_app:.6g}",
             f"intrinsic susceptibility chi = {c.chi:.6g}" + (f" +- {c.chi_error:.2g} (mesh)" if c.chi_error else "")
             + f"   [cgs: {c.chi / (4 * math.pi):.6g} emu/(cm^3 Oe)]",
             f"demagnetising factor along the field: N_u = {c.N_u:.6f} at chi, {c.N_u_chi0:.6f} at chi = 0"
             f"   [cgs: 4 pi N_u = {4 * math.pi * c.N_u:.5f}]"]
    if c.refinement:
        r = c.refinement
        order = "no order observed" if r["order"] is None else f"observed order {r['order']:.2f}"
        lines.append(f"mesh study at chi: N_u = {', '.join(f'{v:.6f}' for v in r['N_u'])} on "
                     f"{', '.join(map(str, r['cells']))} cells; limit {r['N_u_limit']:.6f} +- "
                     f"{r['N_u_error']:.1e} ({order}); uncertainty of N_u on the correction mesh {r['dN_u']:.1e}")
    if c.method == "nonlinear":
        lines.append(f"nonlinear curve: {len(c.history) - 1} updates, largest mismatch of the simulated "
                     f"apparent curve {c.mismatch:.2e} (tolerance {c.tolerance:g})"
                     + ("" if c.converged else "  NOT CONVERGED"))
    else:
        lines.append("the whole curve is in the linear region: H_internal = M / chi")
    lines.append(f"time {c.seconds:.1f} s")
    lines += [f"WARNING: {w}" for w in c.warnings]
    return "\n".join(lines)


def write_correction_results(path, c: Correction, body: str, case, curve: MeasuredCurve, model: Model,
                             version: str) -> Path:
    """HDF5 results of a correction, written atomically. Root attributes
    volmag_version, kind = "correction", case_sha256, title, length_unit,
    created, body and the scalar results; /case and /data (the input texts),
    /summary (JSON), /curve (the per-point columns, A/m; moment in A m^2),
    /mesh (nodes in m, cells, cell_type) and /refinement when a study ran."""
    import json

    import h5py
    summary = correction_summary(c, body, curve)

    def write(tmp):
        with h5py.File(tmp, "w") as f:
            f.attrs.update(volmag_version=version, kind="correction", case_sha256=case.sha256, title=case.title,
                           length_unit=case.length_unit, body=body,
                           created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"),
                           method=c.method, converged=c.converged, chi=c.chi, X_app=c.X_app, N_u=c.N_u,
                           N_u_chi0=c.N_u_chi0, mismatch=c.mismatch, volume=c.volume, direction=c.direction)
            f.create_dataset("case", data=case.text, dtype=h5py.string_dtype())
            f.create_dataset("data", data=curve.text, dtype=h5py.string_dtype())
            f.create_dataset("summary", data=json.dumps(summary), dtype=h5py.string_dtype())
            g = f.create_group("curve")
            for k in ("H_applied", "M_apparent", "H_internal", "M", "M_simulated", "linear"):
                g.create_dataset(k, data=getattr(c, k))
            g.create_dataset("moment", data=c.M_apparent * c.volume)
            if c.dH_internal is not None:
                g.create_dataset("dH_internal", data=c.dH_internal)
            f.create_dataset("history", data=np.asarray(c.history, float))
            sub = model.only(body)
            m = f.create_group("mesh")
            m.create_dataset("nodes", data=sub.mesh.nodes)
            m.create_dataset("cells", data=sub.mesh.cells)
            m.attrs["cell_type"] = sub.mesh.cell_type
            if c.refinement is not None:
                r = f.create_group("refinement")
                for k, v in c.refinement.items():
                    r.attrs[k] = np.nan if v is None else v
    return write_atomically(path, write, text=False)


def plot_correction(path, c: Correction, body: str, size=(1200, 560)) -> Path:
    """PNG of the measured apparent curve, the simulated apparent curve and the
    corrected intrinsic curve (with its mesh uncertainty, when known), in kA/m:
    the whole range, and the low-field part up to half the largest M."""
    from matplotlib.figure import Figure
    fig = Figure(figsize=(size[0] / 100, size[1] / 100), dpi=100, layout="constrained")
    k = 1e-3
    a, b = np.argsort(c.H_applied, kind="stable"), np.argsort(c.H_internal, kind="stable")
    half = np.abs(c.M).max() / 2
    for ax, zoom in zip(fig.subplots(1, 2), (False, True)):
        ax.plot(k * c.H_applied[a], k * c.M_apparent[a], "o", mfc="none", color="tab:blue",
                label="measured: M = m/V against H applied")
        ax.plot(k * c.H_applied[a], k * c.M_simulated[a], "-", color="tab:blue", alpha=0.6,
                label="simulated apparent curve of the meshed sample")
        ax.plot(k * c.H_internal[b], k * c.M[b], "s-", ms=4, color="tab:red",
                label=f"intrinsic: M against H internal ({c.method})")
        if c.dH_internal is not None:
            ax.errorbar(k * c.H_internal[b], k * c.M[b], xerr=k * c.dH_internal[b], fmt="none",
                        ecolor="tab:red", alpha=0.7, capsize=2, label="mesh uncertainty of H internal")
        if zoom:
            low = np.abs(c.M_apparent) <= half
            low = low if low.sum() > 1 else np.abs(c.M_apparent) <= np.sort(np.abs(c.M_apparent))[1]
            hmax, mmax = np.abs(c.H_applied[low]).max(), np.abs(c.M_apparent[low]).max()
            ax.set_xlim(-0.05 * k * hmax if c.H_applied.min() >= 0 else -1.05 * k * hmax, 1.05 * k * hmax)
            ax.set_ylim(-0.05 * k * mmax if c.M.min() >= 0 else -1.05 * k * mmax, 1.05 * k * mmax)
            ax.set_title("low fields (M up to half its largest value)", fontsize=10)
        else:
            ax.set_title(f"{body}: chi = {c.chi:.4g} (linear region), N along the field {c.N_u:.4f} "
                         f"at chi, {c.N_u_chi0:.4f} at chi = 0", fontsize=10)
            ax.legend(loc="lower right", fontsize=8)
        ax.set_xlabel("H (kA/m)")
        ax.set_ylabel("M (kA/m)")
        ax.grid(True, alpha=0.3)
        ax.axhline(0, color="0.5", lw=0.5)
        ax.axvline(0, color="0.5", lw=0.5)
    return write_atomically(path, lambda tmp: fig.savefig(tmp, dpi=100, format="png"), text=False)
