"""Case files: a whole model in one TOML file, checked before anything is meshed.

:func:`load_case` reads a file, :func:`parse_case` a string; both return a
:class:`Case` whose lengths are all in metres (converted once, here, from the
file's `length_unit`; surface files are read in that unit too).  Every problem
with the file -- TOML syntax, unknown keys, wrong types, impossible values,
missing files, dangling names, overlapping bodies -- is a :class:`CaseError`
that names the file, the key path (``body[2].shape.radius``, 0-based indices)
and the line, never a traceback.

tomllib gives values without positions, so :class:`_Locator` scans the text
once more and records the line of every key, table header and array element.
"""
from __future__ import annotations

import difflib
import hashlib
import math
import re
import tomllib
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from .geometry import (Body, Box, Cut, Cylinder, Ellipsoid, MeshSpec, Placement, Sphere,
                       SurfaceFile, Tube, local_bounds)
from .materials import BHCurve, BHCurveError, LinearMaterial, PermanentMagnet
from .distortion import METRICS as PROBE_METRICS
from .probes import KINDS as PROBE_KINDS, Probe
from .run import QUANTITY_ROOTS, parse_quantity
from .solve import SolverOptions
from .sources import Arc, Coil, CurrentLoop, PointDipole, Polyline, Racetrack, Segment, UniformField
from .units import LENGTH_UNITS

# Material laws besides the linear susceptibility (nonlinear B-H curve,
# permanent magnet); each excludes the others (see _material).
MATERIAL_LAW_KEYS = ("bh_curve", "remanence", "knee_field")

#: Source types and their keys: (required, optional). Lengths are in the
#: file's unit, currents in A, moments in A m^2, angles in degrees; a
#: uniform source takes exactly one of H (A/m) and B (T).
SOURCE_KEYS = {
    "uniform": ((), ("H", "B")),
    "loop": (("center", "normal", "radius", "current"), ("turns",)),
    "coil": (("center", "axis", "inner_radius", "outer_radius", "length", "turns", "current"), ("rel_tol",)),
    "segment": (("start", "end", "current"), ()),
    "polyline": (("points", "current"), ("closed",)),
    "arc": (("center", "normal", "radius", "start_angle_deg", "end_angle_deg", "current"), ("reference",)),
    "racetrack": (("center", "axis", "straight_length", "inner_radius", "outer_radius", "height", "turns",
                   "current"), ("straight_width", "reference", "rel_tol")),
    "dipole": (("position", "moment"), ()),
}
SOURCE_TYPES = tuple(SOURCE_KEYS)
_SOURCE_LENGTHS = ("center", "radius", "inner_radius", "outer_radius", "length", "height", "straight_length",
                   "straight_width", "start", "end", "position")  # and each of `points`
_SOURCE_DIRECTIONS = ("normal", "axis", "reference")  # need not be normalised; not converted

#: Shape types and the size keys each one needs (lengths in the file's unit).
SHAPE_SIZES = {
    "box": ("size",),
    "sphere": ("radius",),
    "ellipsoid": ("semi_axes",),
    "cylinder": ("radius", "height"),
    "tube": ("inner_radius", "outer_radius", "height"),
    "file": ("path",),
}
_SIZE_KEYS = tuple(dict.fromkeys(k for keys in SHAPE_SIZES.values() for k in keys))

#: Every key a case file may hold, by table ("" is the top level; indices of
#: arrays of tables are left out; rotation tables of bodies and of subtracted
#: shapes share "body.rotation"). The parser accepts nothing else, and
#: docs/case-files.md documents every one of them (a test holds the two together).
KEYS = {
    "": ("title", "length_unit", "material", "body", "source", "probe", "solver", "demag", "forces", "expect", "sweep"),
    "material": ("name", "susceptibility") + MATERIAL_LAW_KEYS,
    "body": ("name", "material", "shape", "position", "rotation", "mesh"),
    "body.shape": ("type",) + _SIZE_KEYS + ("subtract",),
    "body.shape.subtract": ("type",) + _SIZE_KEYS + ("position", "rotation"),
    "body.rotation": ("axis", "angle_deg"),
    "body.mesh": ("element", "size", "surface_size"),
    "source": ("type",) + tuple(dict.fromkeys(k for req, opt in SOURCE_KEYS.values() for k in req + opt)),
    "probe": ("name",) + PROBE_KINDS + ("points_file", "tolerance"),
    "probe.line": ("start", "end", "n"),
    "probe.plane": ("origin", "u", "v", "n"),
    "probe.box": ("min", "max", "n"),
    "probe.sphere": ("center", "radius", "n"),
    "probe.tolerance": ("quantity", "max"),
    "solver": ("method", "tolerance", "max_iterations", "precision", "memory_limit_gib"),
    "demag": ("bodies", "fluxmetric"),
    "forces": ("bodies", "about"),
    "expect": ("quantity", "value", "rel_tol", "abs_tol", "min", "max"),
    "sweep": ("set", "mode"),  # read by volmag.sweep; a single run ignores it
}
SOLVER_METHODS = ("auto", "dense", "fft", "fmm")
MESH_ELEMENTS = ("tet", "hex")
AXES = ("x", "y", "z")
_SURFACE_SUFFIXES = (".stl", ".obj", ".ply")
_MAX_PROBE_POINTS = 10_000_000
_PROBE_WAYS = PROBE_KINDS + ("points_file",)  # the keys that give a probe its points
_NAME_RE = re.compile(r"^[A-Za-z0-9_-]+$")   # names end up in dotted paths and HDF5 groups
_COMPONENT_RE = re.compile(r"^[A-Za-z0-9_-]+(\[\d+\])?$")
_BARE_KEY = frozenset("ABCDEFGHIJKLMNOPQRSTUVWXYZabcdefghijklmnopqrstuvwxyz0123456789_-")


class CaseError(Exception):
    """A problem in a case file. `file`: the case file; `key`: key path such as
    ``body[2].shape.radius`` ("" when unknown); `line`: 1-based line or None;
    `message`: what is wrong. ``str()`` is ``FILE:LINE: KEY: MESSAGE``."""

    def __init__(self, file, key: str, line: int | None, message: str):
        self.file, self.key, self.line, self.message = str(file), key, line, message
        super().__init__(str(self))

    def __str__(self):
        where = f"{self.file}:{self.line}" if self.line else self.file
        return ": ".join(p for p in (where, self.key, self.message) if p)


@dataclass(frozen=True)
class DemagRequest:
    """Bodies whose demagnetising tensors are wanted, and the optional
    fluxmetric axis ("x", "y" or "z")."""
    bodies: tuple[str, ...]
    fluxmetric: str | None = None


@dataclass(frozen=True)
class ForceRequest:
    """Bodies whose force (N) and torque (N m) are wanted, and the torque
    reference point `about` (m; None: each body's centroid)."""
    bodies: tuple[str, ...]
    about: tuple[float, float, float] | None = None


@dataclass(frozen=True)
class Expectation:
    """A checked result. `quantity` is a dotted path into the run summary
    (``demag.sample.N.zz``); `value` is in SI units (ppm for the ppm metrics).
    With `bound` None it holds when |got - value| <= max(abs_tol, rel_tol*|value|);
    with `bound` "max" when got <= value, with "min" when got >= value.
    `line` is where it is in the case file."""
    quantity: str
    value: float
    rel_tol: float | None = None
    abs_tol: float | None = None
    line: int | None = None
    bound: str | None = None


@dataclass(frozen=True)
class Case:
    """A parsed, checked case. All lengths in metres; `length_unit` is the unit
    the file was written in; `text` is the file verbatim and `sha256` the hex
    digest of its bytes (UTF-8)."""
    title: str
    length_unit: str
    path: str
    text: str
    sha256: str
    materials: dict
    bodies: tuple
    sources: tuple
    probes: tuple
    solver: SolverOptions
    demag: DemagRequest | None
    expects: tuple
    forces: ForceRequest | None = None
    tolerances: dict = field(default_factory=dict)  # probe name -> its tolerance, an Expectation


def load_case(path) -> Case:
    """Read and check the case file at `path`; relative surface-file paths are
    taken from the case file's folder."""
    path = Path(path)
    try:
        data = path.read_bytes()
    except OSError as e:
        raise CaseError(path, "", None, f"cannot read case file ({e.strerror or e})") from None
    try:
        text = data.decode("utf-8")
    except UnicodeDecodeError as e:
        raise CaseError(path, "", data[:e.start].count(b"\n") + 1, "not UTF-8 text") from None
    return _parse(text, str(path), path.parent, data)


def parse_case(text: str, path: str = "<string>", base_dir=None) -> Case:
    """Check the case `text`; `path` names it in messages; relative surface-file
    paths are taken from `base_dir` (default: the folder of `path` if it is a
    file, else the current folder)."""
    if base_dir is None:
        p = Path(path)
        base_dir = p.parent if p.is_file() else Path.cwd()
    return _parse(text, str(path), Path(base_dir), text.encode("utf-8"))


def key_lines(text: str) -> dict:
    """1-based line of every key, table and array element of TOML `text`, by
    key path such as ("body", 2, "shape", "radius") (first occurrence)."""
    return _Locator(text).locate()


def _parse(text: str, path: str, base_dir: Path, data: bytes) -> Case:
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise _syntax_error(text, path, e) from None
    ctx = _Context(path, _Locator(text).locate(), base_dir)
    return _case(ctx, doc, text, hashlib.sha256(data).hexdigest())


# ---------------------------------------------------------------------------
# The schema

def _case(ctx: "_Context", doc: dict, text: str, sha: str) -> Case:
    ctx.keys(doc, (), KEYS[""], required=("title",))
    title = ctx.string(doc, (), "title")
    unit = ctx.string(doc, (), "length_unit", choices=tuple(LENGTH_UNITS), default="m")
    ctx.unit = unit

    materials = {m.name: m for m in _named(ctx, doc, "material", _material)}
    bodies = _named(ctx, doc, "body", lambda c, t, p: _body(c, t, p, materials))
    if not bodies:
        raise ctx.error(("body",), "the model has no [[body]]: nothing to solve")
    sources = tuple(_source(ctx, tab, ("source", i)) for i, tab in enumerate(ctx.tables(doc, "source")))
    probes = _named(ctx, doc, "probe", _probe)

    solver = _solver(ctx, ctx.table(doc, (), "solver", default={}))
    names = [b.name for b in bodies]
    demag = _demag(ctx, ctx.table(doc, (), "demag"), names) if "demag" in doc else None
    forces = _forces(ctx, ctx.table(doc, (), "forces"), names) if "forces" in doc else None

    magnets = any(np.any(b.material.remanence_vector()) for b in bodies)  # they drive themselves
    if not sources and demag is None and not magnets:
        magnetic = [b.name for b in bodies if b.material.is_magnetic]
        if magnetic:
            raise ctx.error(("source",), f"body {magnetic[0]!r} is magnetic but there is no [[source]] "
                                         "and no [demag] table: nothing drives it")

    known = _Known(names, {p.name: len(p.points) for p in probes}, demag, forces)
    expects = tuple(_expect(ctx, tab, ("expect", i), known) for i, tab in enumerate(ctx.tables(doc, "expect")))
    tolerances = {p.name: _tolerance(ctx, ctx.table(tab, ("probe", i), "tolerance"), ("probe", i, "tolerance"),
                                     p.name, known)
                  for i, (p, tab) in enumerate(zip(probes, ctx.tables(doc, "probe"))) if "tolerance" in tab}
    _check_overlaps(ctx, bodies)
    return Case(title=title, length_unit=unit, path=ctx.file, text=text, sha256=sha,
                materials=materials, bodies=tuple(bodies), sources=sources, probes=tuple(probes),
                solver=solver, demag=demag, expects=expects + tuple(tolerances.values()), forces=forces,
                tolerances=tolerances)


def _named(ctx, doc, key, build) -> list:
    """Objects built by `build(ctx, table, path)` from each [[key]] table;
    their names must be unique."""
    out = []
    for i, tab in enumerate(ctx.tables(doc, key)):
        item = build(ctx, tab, (key, i))
        if any(item.name == o.name for o in out):
            raise ctx.error((key, i, "name"), f"duplicate {key} name {item.name!r}")
        out.append(item)
    return out


def _material(ctx, tab, path):
    ctx.keys(tab, path, KEYS["material"], required=("name",))
    name = ctx.string(tab, path, "name")
    if "bh_curve" in tab:
        for other in ("susceptibility", "remanence", "knee_field"):
            if other in tab:
                raise ctx.error(path + (other,), "cannot be combined with bh_curve")
        rel = ctx.string(tab, path, "bh_curve")
        file = (ctx.base_dir / rel).resolve()
        if not file.is_file():
            raise ctx.error(path + ("bh_curve",), f"B-H curve file not found: {file}")
        try:
            return BHCurve.from_csv(file, name)
        except (BHCurveError, OSError, UnicodeDecodeError) as e:
            raise ctx.error(path + ("bh_curve",), f"bad B-H curve: {e}") from None
    if "remanence" in tab:
        Br = ctx.vector(tab["remanence"], path + ("remanence",))
        if not np.any(Br):
            raise ctx.error(path + ("remanence",), "must not be the zero vector")
        chi = ctx.number(tab["susceptibility"], path + ("susceptibility",)) if "susceptibility" in tab else 0.0
        if not chi > -1:
            raise ctx.error(path + ("susceptibility",), f"must be > -1 (got {chi:g})")
        knee = (ctx.number(tab["knee_field"], path + ("knee_field",), positive=True)
                if "knee_field" in tab else None)
        return PermanentMagnet(name, Br, chi, knee)
    if "knee_field" in tab:
        raise ctx.error(path + ("knee_field",), "applies to permanent magnets (with remanence) only")
    if "susceptibility" not in tab:
        raise ctx.error(path + ("susceptibility",), "missing required key")
    return LinearMaterial(name, _susceptibility(ctx, tab["susceptibility"], path + ("susceptibility",)))


def _susceptibility(ctx, value, path):
    """Scalar chi > -1, or a symmetric 3x3 tensor with eigenvalues > -1
    (mu_r = 1 + chi must be positive definite for a passive material)."""
    if not isinstance(value, list):
        chi = ctx.number(value, path)
        if not chi > -1:
            raise ctx.error(path, f"must be > -1 (got {chi:g})")
        return chi
    if len(value) != 3:
        raise ctx.error(path, f"a tensor must be 3 rows of 3 numbers (got {len(value)} rows)")
    rows = tuple(ctx.vector(r, path + (i,)) for i, r in enumerate(value))
    chi = np.array(rows)
    if np.abs(chi - chi.T).max() > 1e-12 * max(1.0, np.abs(chi).max()):
        raise ctx.error(path, "the susceptibility tensor must be symmetric")
    low = np.linalg.eigvalsh(chi).min()
    if not low > -1:
        raise ctx.error(path, f"the tensor's eigenvalues must be > -1 (smallest is {low:g})")
    return rows


def _body(ctx, tab, path, materials) -> Body:
    ctx.keys(tab, path, KEYS["body"], required=("name", "material", "shape"))
    name = ctx.name(tab, path)
    mat = ctx.string(tab, path, "material")
    if mat not in materials:
        raise ctx.error(path + ("material",), f"unknown material {mat!r}{_hint(mat, materials)}")
    shape_tab = ctx.table(tab, path, "shape")
    shape = _shape(ctx, shape_tab, path + ("shape",))
    cuts = tuple(_cut(ctx, t, path + ("shape", "subtract", k), shape)
                 for k, t in enumerate(ctx.tables(shape_tab, "subtract", path + ("shape",))))
    return Body(name, shape, materials[mat], _placement(ctx, tab, path), cuts, _mesh(ctx, tab, path))


def _shape(ctx, tab, path, table="body.shape"):
    """A shape table in the case's length unit -> geometry shape in metres;
    `table` is its entry in KEYS."""
    if "type" not in tab:  # a misspelt "type" is best reported as such
        ctx.keys(tab, path, KEYS[table])
    kind = ctx.string(tab, path, "type", choices=tuple(SHAPE_SIZES))
    required = ("type",) + SHAPE_SIZES[kind]
    ctx.keys(tab, path, required + tuple(k for k in KEYS[table] if k not in required + _SIZE_KEYS), required)
    if kind == "box":
        return Box(ctx.metres(ctx.vector(tab["size"], path + ("size",), positive=True)))
    if kind == "ellipsoid":
        return Ellipsoid(ctx.metres(ctx.vector(tab["semi_axes"], path + ("semi_axes",), positive=True)))
    if kind == "file":
        return _surface_file(ctx, tab, path)
    size = {k: ctx.metres(ctx.number(tab[k], path + (k,), positive=True)) for k in SHAPE_SIZES[kind]}
    if kind == "tube" and not size["inner_radius"] < size["outer_radius"]:
        raise ctx.error(path + ("inner_radius",), "must be smaller than outer_radius")
    return {"sphere": Sphere, "cylinder": Cylinder, "tube": Tube}[kind](**size)


def _surface_file(ctx, tab, path) -> SurfaceFile:
    key = path + ("path",)
    rel = ctx.string(tab, path, "path")
    file = (ctx.base_dir / rel).resolve()
    if file.suffix.lower() not in _SURFACE_SUFFIXES:
        raise ctx.error(key, f"surface file must be {', '.join(_SURFACE_SUFFIXES)} (got {rel!r})")
    if not file.is_file():
        raise ctx.error(key, f"no such file: {file}")
    shape = SurfaceFile(file, LENGTH_UNITS[ctx.unit])
    from .meshing import load_surface  # gmsh and trimesh are only needed for file shapes
    try:
        load_surface(shape)  # readable, closed, consistently wound, not self-intersecting
    except ValueError as e:
        raise ctx.error(key, str(e)) from None
    return shape


def _cut(ctx, tab, path, parent) -> Cut:
    shape = _shape(ctx, tab, path, table="body.shape.subtract")
    cut = Cut(shape, _placement(ctx, tab, path))
    lo, hi = local_bounds(parent)
    clo, chi = Body("cut", shape, None, cut.placement).bounds()  # the cut as if a body, parent frame
    if np.any(clo >= hi) or np.any(chi <= lo):
        raise ctx.error(path + ("position",), "the subtracted shape lies entirely outside the body")
    return cut


def _placement(ctx, tab, path) -> Placement:
    pos = ctx.metres(ctx.vector(tab.get("position", [0, 0, 0]), path + ("position",)))
    if "rotation" not in tab:
        return Placement(pos)
    rpath = path + ("rotation",)
    rot = ctx.table(tab, path, "rotation")
    ctx.keys(rot, rpath, KEYS["body.rotation"], required=KEYS["body.rotation"])
    axis = ctx.vector(rot["axis"], rpath + ("axis",))
    if not np.linalg.norm(axis) > 0:
        raise ctx.error(rpath + ("axis",), "the rotation axis must not be zero")
    return Placement(pos, axis, ctx.number(rot["angle_deg"], rpath + ("angle_deg",)))


def _mesh(ctx, tab, path) -> MeshSpec:
    if "mesh" not in tab:
        return MeshSpec()
    mpath = path + ("mesh",)
    m = ctx.table(tab, path, "mesh")
    ctx.keys(m, mpath, KEYS["body.mesh"])
    element = ctx.string(m, mpath, "element", choices=MESH_ELEMENTS, default="tet")
    size, surface = (ctx.metres(ctx.number(m[k], mpath + (k,), positive=True)) if k in m else None
                     for k in ("size", "surface_size"))
    if surface is not None and element == "hex":
        raise ctx.error(mpath + ("surface_size",), "surface_size applies to tet meshes only")
    if surface is not None and size is not None and surface > size:
        raise ctx.error(mpath + ("surface_size",), f"must not exceed size ({size:g} m)")
    return MeshSpec(element, size, surface)


def _source(ctx, tab, path):
    """A [[source]] table -> a source object of volmag.sources, in SI units."""
    if "type" not in tab:  # a misspelt "type" is best reported as such
        ctx.keys(tab, path, KEYS["source"])
    kind = ctx.string(tab, path, "type", choices=SOURCE_TYPES)
    required, optional = SOURCE_KEYS[kind]
    for k in tab:
        if k in KEYS["source"] and k not in ("type",) + required + optional:
            raise ctx.error(path + (k,), f"does not apply to a {kind} source (its keys: "
                                         f"{', '.join(required + optional)})")
    ctx.keys(tab, path, ("type",) + required + optional, required)
    if kind == "uniform":
        if "H" in tab and "B" in tab:
            raise ctx.error(path + ("B",), "give either H (A/m) or B (T), not both")
        if "H" in tab:
            return UniformField(ctx.vector(tab["H"], path + ("H",)))
        if "B" in tab:
            return UniformField.from_B(ctx.vector(tab["B"], path + ("B",)))
        raise ctx.error(path + ("H",), "missing: give H = [..] (A/m) or B = [..] (T)")
    v = {k: _source_value(ctx, tab[k], path + (k,), k) for k in required + optional if k in tab}
    _check_source(ctx, kind, v, path)
    try:
        if kind == "arc":
            return Arc(v["center"], v["normal"], v["radius"], math.radians(v["start_angle_deg"]),
                       math.radians(v["end_angle_deg"]), v["current"], v.get("reference"))
        return _SOURCE_CLASSES[kind](**v)
    except ValueError as e:  # a condition the checks here missed: still name the table
        raise ctx.error(path, str(e)) from None


_SOURCE_CLASSES = {"loop": CurrentLoop, "coil": Coil, "segment": Segment, "polyline": Polyline,
                   "racetrack": Racetrack, "dipole": PointDipole}  # keys are the constructors' names


def _source_value(ctx, value, path, key):
    """One source key's value; lengths converted to metres."""
    if key == "points":
        if not isinstance(value, list) or len(value) < 2:
            raise ctx.error(path, "must be an array of at least two [x, y, z]")
        return tuple(ctx.metres(ctx.vector(p, path + (i,))) for i, p in enumerate(value))
    if key == "closed":
        return ctx.boolean(value, path)
    if key in ("center", "start", "end", "position", "moment") + _SOURCE_DIRECTIONS:
        vec = ctx.vector(value, path)
        if key in _SOURCE_DIRECTIONS and not np.linalg.norm(vec) > 0:
            raise ctx.error(path, "must not be the zero vector")
        return ctx.metres(vec) if key in _SOURCE_LENGTHS else vec
    x = ctx.number(value, path, positive=key in ("radius", "outer_radius", "turns", "rel_tol"))
    if key in ("inner_radius", "length", "height", "straight_length", "straight_width") and x < 0:
        raise ctx.error(path, f"must be >= 0 (got {x:g})")
    if key == "rel_tol" and not 1e-14 <= x < 0.1:
        raise ctx.error(path, f"must lie in [1e-14, 0.1) (got {x:g})")
    return ctx.metres(x) if key in _SOURCE_LENGTHS else x


def _check_source(ctx, kind, v, path):
    """Conditions between the keys of one source."""
    if "inner_radius" in v and v["inner_radius"] > v["outer_radius"]:
        raise ctx.error(path + ("inner_radius",), "must not exceed outer_radius")
    if kind == "segment" and v["start"] == v["end"]:
        raise ctx.error(path + ("end",), "a segment needs two different end points")
    if kind == "polyline" and v.get("closed") and len(v["points"]) < 3:
        raise ctx.error(path + ("points",), "a closed polyline needs at least three points")
    if kind == "arc":
        span = v["end_angle_deg"] - v["start_angle_deg"]
        if not 0 < abs(span) <= 360:
            raise ctx.error(path + ("end_angle_deg",),
                            f"the arc must span more than 0 and at most 360 degrees (spans {span:g})")
    if "reference" in v:
        axis = "normal" if "normal" in v else "axis"
        r, a = np.asarray(v["reference"]), np.asarray(v[axis])
        if np.linalg.norm(np.cross(r, a)) <= 1e-9 * np.linalg.norm(r) * np.linalg.norm(a):
            raise ctx.error(path + ("reference",), f"must not be parallel to {axis}")


def _probe(ctx, tab, path) -> Probe:
    ctx.keys(tab, path, KEYS["probe"], required=("name",))
    name = ctx.name(tab, path)
    given = [k for k in _PROBE_WAYS if k in tab]
    if len(given) != 1:
        where = path + (given[1],) if len(given) > 1 else path
        raise ctx.error(where, f"a probe needs exactly one of {', '.join(_PROBE_WAYS)}")
    kind, m = given[0], ctx.metres
    kpath = path + (kind,)
    if kind == "points":
        if not isinstance(tab["points"], list) or not tab["points"]:
            raise ctx.error(kpath, "must be a non-empty array of [x, y, z]")
        _check_count(ctx, kpath, len(tab["points"]))
        return Probe.from_points(name, [m(ctx.vector(p, kpath + (i,))) for i, p in enumerate(tab["points"])])
    if kind == "points_file":
        return _points_file(ctx, tab, path, name)
    spec = ctx.table(tab, path, kind)
    ctx.keys(spec, kpath, KEYS[f"probe.{kind}"], required=KEYS[f"probe.{kind}"])
    if kind == "line":
        a, b = (ctx.vector(spec[k], kpath + (k,)) for k in ("start", "end"))
        n = ctx.counts(spec, kpath, 1)[0]
        if a == b:
            raise ctx.error(kpath + ("end",), "a line needs two different end points")
        return Probe.line(name, m(a), m(b), n)
    if kind == "plane":
        o, u, v = (ctx.vector(spec[k], kpath + (k,)) for k in ("origin", "u", "v"))
        nu, nv = ctx.counts(spec, kpath, 2)
        cross = np.linalg.norm(np.cross(u, v))
        if not cross > 1e-12 * np.linalg.norm(u) * np.linalg.norm(v):
            raise ctx.error(kpath + ("v",), "u and v must be non-zero and not parallel")
        return Probe.plane(name, m(o), m(u), m(v), nu, nv)
    if kind == "sphere":
        c = ctx.vector(spec["center"], kpath + ("center",))
        r = ctx.number(spec["radius"], kpath + ("radius",), positive=True)
        return Probe.sphere(name, m(c), m(r), ctx.counts(spec, kpath, 1)[0])
    lo, hi = (ctx.vector(spec[k], kpath + (k,)) for k in ("min", "max"))
    n = ctx.counts(spec, kpath, 3)
    if not all(h > l for l, h in zip(lo, hi)):
        raise ctx.error(kpath + ("max",), "each component of max must exceed that of min")
    return Probe.box(name, m(lo), m(hi), n)


def _points_file(ctx, tab, path, name) -> Probe:
    key = path + ("points_file",)
    rel = ctx.string(tab, path, "points_file")
    file = (ctx.base_dir / rel).resolve()
    if not file.is_file():
        raise ctx.error(key, f"points file not found: {file}")
    try:
        probe = Probe.from_file(name, file, ctx.metres(1.0))
    except (ValueError, OSError, UnicodeDecodeError) as e:
        raise ctx.error(key, f"bad points file {rel}: {e}") from None
    _check_count(ctx, key, len(probe.points))
    return probe


def _check_count(ctx, path, n):
    if n > _MAX_PROBE_POINTS:
        raise ctx.error(path, f"{n} points is more than the {_MAX_PROBE_POINTS} a probe may have")


def _solver(ctx, tab) -> SolverOptions:
    path = ("solver",)
    ctx.keys(tab, path, KEYS["solver"])
    d = SolverOptions()
    method = ctx.string(tab, path, "method", choices=SOLVER_METHODS, default=d.method)
    tol = d.tolerance
    if "tolerance" in tab:
        tol = ctx.number(tab["tolerance"], path + ("tolerance",), positive=True)
        if not tol < 0.1:
            raise ctx.error(path + ("tolerance",), f"must be below 0.1 (got {tol:g})")
    iters = ctx.integer(tab["max_iterations"], path + ("max_iterations",), minimum=1) \
        if "max_iterations" in tab else d.max_iterations
    precision = ctx.string(tab, path, "precision", choices=("double", "single"), default=d.precision)
    limit = d.memory_limit
    if "memory_limit_gib" in tab:
        limit = ctx.number(tab["memory_limit_gib"], path + ("memory_limit_gib",), positive=True) * 2**30
    return SolverOptions(method=method, tolerance=tol, max_iterations=iters, precision=precision,
                         memory_limit=limit)


def _demag(ctx, tab, names) -> DemagRequest:
    path = ("demag",)
    ctx.keys(tab, path, KEYS["demag"])
    chosen = _body_names(ctx, tab, path, names)
    return DemagRequest(chosen, ctx.string(tab, path, "fluxmetric", choices=AXES, default=None))


def _forces(ctx, tab, names) -> ForceRequest:
    path = ("forces",)
    ctx.keys(tab, path, KEYS["forces"])
    chosen = _body_names(ctx, tab, path, names)
    about = ctx.metres(ctx.vector(tab["about"], path + ("about",))) if "about" in tab else None
    return ForceRequest(chosen, about)


def _body_names(ctx, tab, path, names) -> tuple:
    """The `bodies` array of a table (default: every body), each a known body, once."""
    if "bodies" not in tab:
        return tuple(names)
    bpath = path + ("bodies",)
    if not isinstance(tab["bodies"], list) or not tab["bodies"]:
        raise ctx.error(bpath, "must be a non-empty array of body names")
    chosen = tuple(ctx.string_value(b, bpath + (i,)) for i, b in enumerate(tab["bodies"]))
    for i, b in enumerate(chosen):
        if b not in names:
            raise ctx.error(bpath + (i,), f"unknown body {b!r}{_hint(b, names)}")
        if b in chosen[:i]:
            raise ctx.error(bpath + (i,), f"body {b!r} is listed twice")
    return chosen


@dataclass(frozen=True)
class _Known:
    """What result paths may name: bodies, probes (name -> number of points),
    and the bodies of the [demag] and [forces] requests (None: no table)."""
    bodies: list
    probes: dict
    demag: DemagRequest | None
    forces: ForceRequest | None


def _expect(ctx, tab, path, known: _Known) -> Expectation:
    ctx.keys(tab, path, KEYS["expect"], required=("quantity",))
    q = ctx.string(tab, path, "quantity")
    _check_quantity(ctx, q, path + ("quantity",), known)
    given = [k for k in ("value", "min", "max") if k in tab]
    if len(given) != 1:
        raise ctx.error(path + ((given[1],) if given else ()),
                        "give exactly one of value (with rel_tol or abs_tol), min or max")
    kind = given[0]
    value = ctx.number(tab[kind], path + (kind,))
    tols = {k: ctx.number(tab[k], path + (k,), positive=True) for k in ("rel_tol", "abs_tol") if k in tab}
    if kind != "value":
        if tols:
            raise ctx.error(path + (next(iter(tols)),), f"a bound ({kind}) takes no tolerance")
        return Expectation(q, value, line=ctx.line_of(path), bound=kind)
    if not tols:
        raise ctx.error(path + ("rel_tol",), "missing: give rel_tol or abs_tol (or both)")
    return Expectation(q, value, tols.get("rel_tol"), tols.get("abs_tol"), ctx.line_of(path))


def _tolerance(ctx, tab, path, probe: str, known: _Known) -> Expectation:
    """A probe's tolerance: an upper bound on one of its region metrics."""
    ctx.keys(tab, path, KEYS["probe.tolerance"], required=KEYS["probe.tolerance"])
    q = ctx.string(tab, path, "quantity")
    metric = q.split(".")[0]
    if metric not in PROBE_METRICS:
        raise ctx.error(path + ("quantity",), f"{q!r} is not one of {', '.join(PROBE_METRICS)}"
                                              f"{_hint(metric, PROBE_METRICS, None)}")
    full = f"probes.{probe}.{q}"
    _check_quantity(ctx, full, path + ("quantity",), known)
    limit = ctx.number(tab["max"], path + ("max",))
    if limit < 0:
        raise ctx.error(path + ("max",), f"must be >= 0 (got {limit:g})")
    return Expectation(full, limit, line=ctx.line_of(path), bound="max")


def _check_quantity(ctx, q, path, known: _Known):
    """A dotted result path (grammar in :func:`volmag.run.parse_quantity`) that
    names an existing body, probe (point index in range), [demag] or [forces] body."""
    parts = q.split(".")
    if not all(_COMPONENT_RE.match(p) for p in parts):
        raise ctx.error(path, f"{q!r} is not a dotted path such as 'bodies.sample.mean_M.z'")
    if parts[0] not in QUANTITY_ROOTS:
        raise ctx.error(path, f"{q!r} must start with one of {', '.join(QUANTITY_ROOTS)}"
                              f"{_hint(parts[0], QUANTITY_ROOTS)}")
    for root in ("demag", "forces"):
        if parts[0] == root and getattr(known, root) is None:
            raise ctx.error(path, f"{q!r} needs a [{root}] table")
    try:
        quantity = parse_quantity(q)
    except ValueError as e:
        raise ctx.error(path, str(e)) from None
    if quantity.root == "solver":
        return
    names, what = {"bodies": (known.bodies, "no body"), "probes": (known.probes, "no probe"),
                   "demag": (known.demag and known.demag.bodies, "[demag] bodies has no"),
                   "forces": (known.forces and known.forces.bodies, "[forces] bodies has no")}[quantity.root]
    if quantity.name not in names:
        raise ctx.error(path, f"{what} {quantity.name!r}{_hint(quantity.name, names)}")
    if quantity.field == "fluxmetric" and known.demag.fluxmetric is None:
        raise ctx.error(path, f"{q!r} needs fluxmetric = \"x\"|\"y\"|\"z\" in [demag]")
    count = known.probes.get(quantity.name)
    if quantity.index is not None and quantity.index >= count:
        raise ctx.error(path, f"{q!r}: probe {quantity.name!r} has {count} points, indices 0 to {count - 1}")


# ---------------------------------------------------------------------------
# Checking values, with the key path and line of each

class _Context:
    """The file being checked: makes errors that point into it, and reads typed
    values (lengths come out in the file's unit; :meth:`metres` converts them)."""

    def __init__(self, file: str, lines: dict, base_dir: Path):
        self.file, self.lines, self.base_dir = file, lines, base_dir
        self.unit = "m"

    def metres(self, x):
        """A length or a tuple of lengths in the file's unit -> metres. Dividing
        by the exact number of units per metre keeps 3.5 mm -> 0.0035 correctly
        rounded (multiplying by 1e-3 can be off by one ulp)."""
        per_metre = round(1 / LENGTH_UNITS[self.unit])
        return tuple(v / per_metre for v in x) if isinstance(x, tuple) else x / per_metre

    def line_of(self, path: tuple) -> int:
        """Line of the deepest part of `path` present in the text; 1 for the document."""
        for k in range(len(path), 0, -1):
            if path[:k] in self.lines:
                return self.lines[path[:k]]
        return 1

    def error(self, path: tuple, message: str) -> CaseError:
        return CaseError(self.file, _format_path(path), self.line_of(path), message)

    def keys(self, tab: dict, path, allowed, required=()):
        """Refuse keys of `tab` not in `allowed` and report missing `required` ones."""
        for k in tab:
            if k not in allowed:
                raise self.error(path + (k,), f"unknown key{_hint(k, allowed, 'allowed here')}")
        for k in required:
            if k not in tab:
                raise self.error(path + (k,), "missing required key")

    def table(self, tab, path, key, default=None) -> dict:
        if key not in tab:
            if default is None:
                raise self.error(path + (key,), "missing required key")
            return default
        if not isinstance(tab[key], dict):
            raise self.error(path + (key,), f"expected a table, got {_type_name(tab[key])}")
        return tab[key]

    def tables(self, tab, key, path=()) -> list:
        """An array of tables ([[key]] or key = [{..}, ..]); [] when absent."""
        value = tab.get(key, [])
        if not isinstance(value, list):
            raise self.error(path + (key,), f"expected an array of tables ([[{key}]]), "
                                            f"got {_type_name(value)}")
        for i, t in enumerate(value):
            if not isinstance(t, dict):
                raise self.error(path + (key, i), f"expected a table, got {_type_name(t)}")
        return value

    def string_value(self, value, path) -> str:
        if not isinstance(value, str):
            raise self.error(path, f"expected a string, got {_type_name(value)}")
        return value

    def string(self, tab, path, key, choices=None, default=...):
        if key not in tab:
            if default is ...:
                raise self.error(path + (key,), "missing required key")
            return default
        v = self.string_value(tab[key], path + (key,))
        if choices is not None and v not in choices:
            raise self.error(path + (key,), f"{v!r} is not one of {', '.join(choices)}"
                                            f"{_hint(v, choices, None)}")
        return v

    def name(self, tab, path) -> str:
        v = self.string(tab, path, "name")
        if not _NAME_RE.match(v):
            raise self.error(path + ("name",), f"{v!r}: use letters, digits, '_' and '-' only")
        return v

    def number(self, value, path, positive=False) -> float:
        """A finite number (integer or float, not boolean); > 0 if `positive`."""
        if isinstance(value, bool) or not isinstance(value, (int, float)):
            raise self.error(path, f"expected a number, got {_type_name(value)}")
        if not math.isfinite(value):
            raise self.error(path, f"must be finite (got {value})")
        if positive and not value > 0:
            raise self.error(path, f"must be > 0 (got {value:g})")
        return float(value)

    def boolean(self, value, path) -> bool:
        if not isinstance(value, bool):
            raise self.error(path, f"expected true or false, got {_type_name(value)}")
        return value

    def integer(self, value, path, minimum) -> int:
        if isinstance(value, bool) or not isinstance(value, int):
            raise self.error(path, f"expected an integer, got {_type_name(value)}")
        if value < minimum:
            raise self.error(path, f"must be >= {minimum} (got {value})")
        return value

    def vector(self, value, path, positive=False) -> tuple:
        """Three finite numbers."""
        if not isinstance(value, list) or len(value) != 3:
            got = f"{len(value)} values" if isinstance(value, list) else _type_name(value)
            raise self.error(path, f"expected 3 numbers [x, y, z], got {got}")
        return tuple(self.number(v, path + (i,), positive) for i, v in enumerate(value))

    def counts(self, spec, path, dims) -> tuple:
        """Grid counts `n`: an integer >= 2 (dims 1) or `dims` such integers."""
        npath = path + ("n",)
        n = spec["n"]
        if dims == 1:
            n = (self.integer(n, npath, 2),)
        else:
            if not isinstance(n, list) or len(n) != dims:
                got = f"{len(n)} values" if isinstance(n, list) else _type_name(n)
                raise self.error(npath, f"expected {dims} integers, got {got}")
            n = tuple(self.integer(k, npath + (i,), 2) for i, k in enumerate(n))
        _check_count(self, npath, math.prod(n))
        return n


def _type_name(v) -> str:
    if isinstance(v, bool):
        return "a boolean"
    for t, name in ((int, "an integer"), (float, "a float"), (str, "a string"),
                    (list, "an array"), (dict, "a table")):
        if isinstance(v, t):
            return f"{name} ({v!r})" if t in (int, float, str) else name
    return "a date/time"


def _hint(word: str, choices, listing: str | None = "defined") -> str:
    """' (did you mean 'x'?)' for a near miss, else the list of choices."""
    choices = list(choices)
    close = difflib.get_close_matches(word, choices, n=1)
    if close:
        return f" (did you mean {close[0]!r}?)"
    if listing and choices:
        return f" ({listing}: {', '.join(choices)})"
    return ""


def _format_path(path: tuple) -> str:
    out = ""
    for p in path:
        if isinstance(p, int):
            out += f"[{p}]"
        else:
            key = p if p and set(p) <= _BARE_KEY else '"' + p.replace('"', '\\"') + '"'
            out += ("." if out else "") + key
    return out


def _syntax_error(text: str, file: str, e: tomllib.TOMLDecodeError) -> CaseError:
    msg = str(e)
    m = re.search(r"\s*\(at line (\d+), column (\d+)\)$", msg)
    if m:
        line = int(m.group(1))
        msg = f"{msg[:m.start()]} (column {m.group(2)})"
    else:
        line = text.count("\n") + 1
        msg = re.sub(r"\s*\(at end of document\)$", " (at end of file)", msg)
    # Name the key being written on that line, if the scanner can tell.
    scan = _Locator("".join(text.splitlines(keepends=True)[:line]))
    scan.locate()
    here = [p for p, n in scan.seen if n == line]
    return CaseError(file, _format_path(here[-1]) if here else "", line, f"TOML syntax error: {msg}")


# ---------------------------------------------------------------------------
# Where each key is: a lenient scan of TOML text

class _Locator:
    """Records the 1-based line of every table header, key and array element in
    TOML text, as key paths like ("body", 2, "shape", "radius"). The text has
    already been parsed (or failed to parse) by tomllib, so the scan does not
    validate; on text it cannot follow it returns what it found so far."""

    def __init__(self, text: str):
        self.s, self.i, self.line = text, 0, 1
        self.lines: dict[tuple, int] = {}  # first line of each path
        self.seen: list[tuple[tuple, int]] = []  # every (path, line) met, in order

    def locate(self) -> dict:
        try:
            self._document()
        except (IndexError, RecursionError):  # malformed text: a partial map is still useful
            pass
        return self.lines

    def _document(self):
        table, counts = (), {}
        while True:
            self._skip(newlines=True)
            if self.i >= len(self.s):
                return
            line = self.line
            if self.s[self.i] == "[":
                array = self.s.startswith("[[", self.i)
                self.i += 2 if array else 1
                table = self._header(self._key(), array, counts, line)
                self.i += 2 if array else 1
            else:
                keys = self._key()
                self._skip()
                self.i += 1  # "="
                self._skip()
                self._record(table, keys, line)
                self._value(table + keys)

    def _header(self, keys, array, counts, line) -> tuple:
        path = ()
        for k in keys[:-1]:
            path += (k,)
            if path in counts:  # [[a]] then [a.b]: b belongs to the latest a
                path += (counts[path] - 1,)
        path += keys[-1:]
        if array:
            self._mark(path, line)
            counts[path] = counts.get(path, 0) + 1
            path += (counts[path] - 1,)
        self._mark(path, line)
        return path

    def _mark(self, path, line):
        self.lines.setdefault(path, line)
        self.seen.append((path, line))

    def _record(self, base, keys, line):
        for k in range(1, len(keys) + 1):
            self._mark(base + keys[:k], line)

    def _value(self, path):
        s = self.s
        c = s[self.i] if self.i < len(s) else ""
        if c in "{[":
            close, n = ("}" if c == "{" else "]"), 0
            self.i += 1
            while self.i < len(s):
                self._skip(newlines=True)
                start = self.i
                if s[self.i] == close:
                    self.i += 1
                    return
                if s[self.i] == ",":
                    self.i, n = self.i + 1, n + 1
                    continue
                if c == "{":
                    line, keys = self.line, self._key()
                    self._skip()
                    self.i += s[self.i] == "="
                    self._skip()
                    self._record(path, keys, line)
                    self._value(path + keys)
                else:
                    self._mark(path + (n,), self.line)
                    self._value(path + (n,))
                if self.i == start:
                    self.i += 1
        elif c in "\"'":
            self._string()
        else:
            while self.i < len(s) and s[self.i] not in ",]}\n#":
                self.i += 1

    def _key(self) -> tuple:
        parts = []
        while True:
            self._skip()
            s = self.s
            if self.i < len(s) and s[self.i] in "\"'":
                raw = self._string()
                try:
                    parts.append(tomllib.loads(f"k = {raw}")["k"])
                except tomllib.TOMLDecodeError:
                    parts.append(raw.strip("\"'"))
            else:
                j = self.i
                while j < len(s) and s[j] in _BARE_KEY:
                    j += 1
                parts.append(s[self.i:j])
                self.i = j
            self._skip()
            if self.i < len(self.s) and self.s[self.i] == ".":
                self.i += 1
                continue
            return tuple(parts)

    def _string(self) -> str:
        s, start = self.s, self.i
        q = s[start]
        delim = q * 3 if s.startswith(q * 3, start) else q
        j = start + len(delim)
        while j < len(s):
            if q == '"' and s[j] == "\\":
                j += 2
            elif s.startswith(delim, j):
                j += len(delim)
                if len(delim) == 3:  # up to two quotes may end the content itself
                    for _ in range(2):
                        j += j < len(s) and s[j] == q
                break
            elif len(delim) == 1 and s[j] == "\n":
                break
            else:
                j += 1
        self.line += s.count("\n", start, j)
        self.i = j
        return s[start:j]

    def _skip(self, newlines=False):
        s = self.s
        while self.i < len(s):
            c = s[self.i]
            if c in " \t\r":
                self.i += 1
            elif c == "#":
                while self.i < len(s) and s[self.i] != "\n":
                    self.i += 1
            elif c == "\n" and newlines:
                self.i += 1
                self.line += 1
            else:
                return


# ---------------------------------------------------------------------------
# Overlap of bodies: bounding boxes first, then sampling with inside tests

_OVERLAP_SAMPLES = 24  # per axis, in the intersection of two bounding boxes


def _check_overlaps(ctx, bodies):
    """Refuse bodies that share volume. Bounding boxes rule out most pairs; the
    rest are sampled on a grid of cell centres in the boxes' intersection, so a
    sliver thinner than 1/24 of that intersection can go unnoticed. A sample
    in both bodies counts only if its six neighbours at a distance of 1e-6 of
    the intersection's size are too, so that bodies merely touching (a shared
    face sampled exactly) are accepted."""
    boxes = [b.bounds() for b in bodies]
    k = (np.arange(_OVERLAP_SAMPLES) + 0.5) / _OVERLAP_SAMPLES
    t = np.stack(np.meshgrid(k, k, k, indexing="ij"), axis=-1).reshape(-1, 3)
    for j in range(len(bodies)):
        for i in range(j):
            lo = np.maximum(boxes[i][0], boxes[j][0])
            hi = np.minimum(boxes[i][1], boxes[j][1])
            if np.any(lo >= hi):
                continue
            p = lo + t * (hi - lo)
            p = p[bodies[i].inside(p)]
            p = p[bodies[j].inside(p)][:1000]
            if not len(p):
                continue
            step = 1e-6 * float(np.max(hi - lo)) * np.vstack([np.eye(3), -np.eye(3)])
            q = (p[:, None, :] + step).reshape(-1, 3)
            if np.any((bodies[i].inside(q) & bodies[j].inside(q)).reshape(-1, 6).all(axis=1)):
                raise ctx.error(("body", j, "position"),
                                f"body {bodies[j].name!r} overlaps body {bodies[i].name!r}")
