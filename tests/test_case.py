"""Case files: every malformed case is a CaseError naming file, key path and
line; a valid case becomes SI objects.

In the malformed texts below the line the error must point at carries the
comment ``# <-``; a text without the marker must be reported at line 1 (a
problem with the document as a whole). Expected key paths are written by hand.
"""
import hashlib
import math
import textwrap

import numpy as np
import pytest

from volmag.case import CaseError, load_case, parse_case
from volmag.geometry import Box, Cylinder, Sphere, SurfaceFile, Tube
from volmag.probes import Probe

HEAD = """\
title = "test"
length_unit = "mm"
[[material]]
name = "steel"
susceptibility = 1000
"""
BODY = """\
[[body]]
name = "a"
material = "steel"
shape = {type = "sphere", radius = 1}
"""
SOURCE = """\
[[source]]
type = "uniform"
H = [0, 0, 1000]
"""


def case(*parts):
    return "".join(textwrap.dedent(p) for p in parts)


# (id, text, key path, words the message must contain)
MALFORMED = [
    ("wrong type", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "sphere", radius = "3"}  # <-
        """, SOURCE), "body[0].shape.radius", "expected a number"),
    ("boolean is not a number", case(HEAD.replace("1000", "true  # <-"), BODY, SOURCE),
     "material[0].susceptibility", "expected a number"),
    ("missing key falls back to the table header", case(HEAD, """\
        [[body]]  # <-
        name = "a"
        shape = {type = "sphere", radius = 3}
        """, SOURCE), "body[0].material", "missing required key"),
    ("missing title", case(HEAD.replace('title = "test"\n', ""), BODY, SOURCE),
     "title", "missing required key"),
    ("unknown key with hint, inside an inline table", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "sphere", radus = 3}  # <-
        """, SOURCE), "body[0].shape.radus", "did you mean 'radius'?"),
    ("unknown top-level key", case("titel = 'x'  # <-\n", HEAD, BODY, SOURCE),
     "titel", "did you mean 'title'?"),
    ("misspelt shape type key", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {typ = "sphere", radius = 3}  # <-
        """, SOURCE), "body[0].shape.typ", "did you mean 'type'?"),
    ("unknown shape type", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "sphear", radius = 3}  # <-
        """, SOURCE), "body[0].shape.type", "did you mean 'sphere'?"),
    ("negative size, element of a multi-line array", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "box", size = [
            1,
            -2,  # <-
            3]}
        """, SOURCE), "body[0].shape.size[1]", "must be > 0"),
    ("zero radius", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"

        [body.shape]
        type = "cylinder"
        height = 2
        radius = 0  # <-
        """, SOURCE), "body[0].shape.radius", "must be > 0"),
    ("not finite", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "sphere", radius = nan}  # <-
        """, SOURCE), "body[0].shape.radius", "finite"),
    ("inner radius >= outer radius", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "tube", inner_radius = 2, outer_radius = 2, height = 1}  # <-
        """, SOURCE), "body[0].shape.inner_radius", "smaller than outer_radius"),
    ("chi <= -1", case(HEAD.replace("1000", "-1  # <-"), BODY, SOURCE),
     "material[0].susceptibility", "> -1"),
    ("tensor not symmetric", case(HEAD.replace("1000", "[[1, 2, 0], [0, 1, 0], [0, 0, 1]]  # <-"),
                                  BODY, SOURCE), "material[0].susceptibility", "symmetric"),
    ("tensor eigenvalue <= -1", case(HEAD.replace("1000", "[[0, 2, 0], [2, 0, 0], [0, 0, 1]]  # <-"),
                                     BODY, SOURCE), "material[0].susceptibility", "eigenvalues"),
    ("missing B-H curve file", case(HEAD.replace("susceptibility = 1000", 'bh_curve = "iron.csv"  # <-'),
                                    BODY, SOURCE), "material[0].bh_curve", "not found"),
    ("zero remanence", case(HEAD, 'remanence = [0, 0, 0]  # <-\n', BODY, SOURCE),
     "material[0].remanence", "zero vector"),
    ("zero rotation axis", case(HEAD, BODY, """\
        rotation = {axis = [0, 0, 0], angle_deg = 30}  # <-
        """, SOURCE), "body[0].rotation.axis", "must not be zero"),
    ("unknown material with hint", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steal"  # <-
        shape = {type = "sphere", radius = 1}
        """, SOURCE), "body[0].material", "did you mean 'steel'?"),
    ("duplicate body name", case(HEAD, BODY, """\
        position = [-5, 0, 0]
        [[body]]
        name = "a"  # <-
        material = "steel"
        shape = {type = "sphere", radius = 1}
        position = [5, 0, 0]
        """, SOURCE), "body[1].name", "duplicate"),
    ("name unusable in paths", case(HEAD, BODY.replace('"a"', '"a.b"  # <-'), SOURCE),
     "body[0].name", "letters, digits"),
    ("overlapping bodies", case(HEAD, BODY, """\
        [[body]]
        name = "b"
        material = "steel"
        shape = {type = "box", size = [1, 1, 1]}
        position = [0, 0, 1.4]  # <-
        """, SOURCE), "body[1].position", "overlaps body 'a'"),
    ("overlap found through rotation, third body", case(HEAD, BODY, """\
        [[body]]
        name = "far"
        material = "steel"
        shape = {type = "sphere", radius = 1}
        position = [10, 0, 0]
        [[body]]
        name = "plate"
        material = "steel"
        shape = {type = "box", size = [10, 0.2, 0.2]}
        rotation = {axis = [0, 0, 1], angle_deg = 90}
        position = [0, 4.0, 0]  # <-
        """, SOURCE), "body[2].position", "overlaps body 'a'"),
    ("missing mesh file", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "file", path = "no_such_part.stl"}  # <-
        """, SOURCE), "body[0].shape.path", "no such file"),
    ("surface file of unknown kind", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "file", path = "part.step"}  # <-
        """, SOURCE), "body[0].shape.path", ".stl"),
    ("broken TOML", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "sphere", radius = }  # <-
        """, SOURCE), "body[0].shape.radius", "TOML syntax error"),
    ("duplicate TOML key", case(HEAD, BODY, 'name = "b"  # <-\n', SOURCE),
     "body[0].name", "TOML syntax error"),
    ("bad unit name", case(HEAD.replace('"mm"', '"cm"  # <-'), BODY, SOURCE),
     "length_unit", "not one of m, mm, um"),
    ("empty model", case(HEAD, SOURCE), "body", "no [[body]]"),
    ("single table where an array of tables belongs", case(HEAD, """\
        [body]  # <-
        name = "a"
        """, SOURCE), "body", "array of tables"),
    ("magnetic body, nothing drives it", case(HEAD, BODY), "source", "no [[source]]"),
    ("key of another source type", case(HEAD, BODY, """\
        [[source]]
        type = "loop"
        center = [0, 0, 0]
        normal = [0, 0, 1]
        radius = 10
        current = 1
        axis = [0, 0, 1]  # <-
        """), "source[0].axis", "does not apply to a loop source"),
    ("misspelt source type", case(HEAD, BODY, """\
        [[source]]
        type = "unifrom"  # <-
        """), "source[0].type", "did you mean 'uniform'?"),
    ("both H and B", case(HEAD, BODY, SOURCE, "B = [0, 0, 1e-3]  # <-\n"), "source[0].B", "not both"),
    ("bad probe n", case(HEAD, BODY, SOURCE, """\
        [[probe]]
        name = "axis"
        line = {start = [0, 0, 2], end = [0, 0, 9], n = 1}  # <-
        """), "probe[0].line.n", ">= 2"),
    ("probe with two kinds", case(HEAD, BODY, SOURCE, """\
        [[probe]]
        name = "p"
        points = [[0, 0, 5]]
        line = {start = [0, 0, 2], end = [0, 0, 9], n = 3}  # <-
        """), "probe[0].line", "exactly one of"),
    ("probe point with two coordinates", case(HEAD, BODY, SOURCE, """\
        [[probe]]
        name = "p"
        points = [
            [0, 0, 5],
            [1, 2],  # <-
        ]
        """), "probe[0].points[1]", "3 numbers"),
    ("parallel plane vectors", case(HEAD, BODY, SOURCE, """\
        [[probe]]
        name = "p"
        plane = {origin = [0, 0, 5], u = [1, 0, 0], v = [-2, 0, 0], n = [3, 3]}  # <-
        """), "probe[0].plane.v", "parallel"),
    ("empty probe box", case(HEAD, BODY, SOURCE, """\
        [[probe]]
        name = "p"
        box = {min = [0, 0, 5], max = [1, 1, 5], n = [2, 2, 2]}  # <-
        """), "probe[0].box.max", "exceed"),
    ("bad expect quantity root", case(HEAD, BODY, SOURCE, """\
        [[expect]]
        quantity = "body.a.mean_M.z"  # <-
        value = 1
        rel_tol = 0.01
        """), "expect[0].quantity", "did you mean 'bodies'?"),
    ("expect names an unknown body", case(HEAD, BODY, SOURCE, """\
        [[expect]]
        quantity = "bodies.b.moment.x"  # <-
        value = 1
        abs_tol = 0.01
        """), "expect[0].quantity", "no body 'b'"),
    ("expect names an unknown probe", case(HEAD, BODY, SOURCE, """\
        [[probe]]
        name = "axis"
        points = [[0, 0, 5]]
        [[expect]]
        quantity = "probes.axes.B.z"  # <-
        value = 1e-3
        rel_tol = 0.01
        """), "expect[0].quantity", "did you mean 'axis'?"),
    ("expect on a body left out of [demag]", case(HEAD, BODY, """\
        position = [-5, 0, 0]
        [[body]]
        name = "b"
        material = "steel"
        shape = {type = "sphere", radius = 1}
        position = [5, 0, 0]
        [demag]
        bodies = ["b"]
        [[expect]]
        quantity = "demag.a.N.zz"  # <-
        value = 0.333
        rel_tol = 0.01
        """), "expect[0].quantity", "[demag] bodies has no 'a'"),
    ("expect on demag without [demag]", case(HEAD, BODY, SOURCE, """\
        [[expect]]
        value = 0.333
        quantity = "demag.a.N.zz"  # <-
        rel_tol = 0.01
        """), "expect[0].quantity", "needs a [demag] table"),
    ("expect without tolerance", case(HEAD, BODY, SOURCE, """\
        [[expect]]  # <-
        quantity = "solver.iterations"
        value = 10
        """), "expect[0].rel_tol", "rel_tol or abs_tol"),
    ("expect on a result a body does not have", case(HEAD, BODY, SOURCE, """\
        [[expect]]
        quantity = "bodies.a.weight.z"  # <-
        value = 1
        rel_tol = 0.01
        """), "expect[0].quantity", "one of volume, mean_M, moment"),
    ("expect without a component", case(HEAD, BODY, SOURCE, """\
        [[expect]]
        quantity = "bodies.a.moment"  # <-
        value = 1
        rel_tol = 0.01
        """), "expect[0].quantity", "needs a component (x, y or z)"),
    ("expect on a probe point out of range", case(HEAD, BODY, SOURCE, """\
        [[probe]]
        name = "p"
        points = [[0, 0, 5], [0, 0, 6]]
        [[expect]]
        quantity = "probes.p.dB.z[2]"  # <-
        value = 1e-6
        abs_tol = 1e-7
        """), "expect[0].quantity", "has 2 points"),
    ("expect on a fluxmetric factor not asked for", case(HEAD, BODY, """\
        [demag]
        [[expect]]
        quantity = "demag.a.fluxmetric"  # <-
        value = 0.3
        rel_tol = 0.01
        """), "expect[0].quantity", "needs fluxmetric"),
    ("solver tolerance too loose", case(HEAD, BODY, SOURCE, """\
        [solver]
        method = "dense"
        tolerance = 0.5  # <-
        """), "solver.tolerance", "below 0.1"),
    ("solver method", case(HEAD, BODY, SOURCE, """\
        [solver]
        method = "gmres"  # <-
        """), "solver.method", "not one of auto, dense, fft, fmm"),
    ("solver iteration cap", case(HEAD, BODY, SOURCE, """\
        [solver]
        max_iterations = 0  # <-
        """), "solver.max_iterations", ">= 1"),
    ("demag names an unknown body", case(HEAD, BODY, """\
        [demag]
        bodies = [
          "a",
          "sample",  # <-
        ]
        """), "demag.bodies[1]", "unknown body 'sample'"),
    ("fluxmetric axis", case(HEAD, BODY, """\
        [demag]
        fluxmetric = "w"  # <-
        """), "demag.fluxmetric", "not one of x, y, z"),
    ("mesh element", case(HEAD, BODY, """\
        mesh = {element = "prism", size = 0.1}  # <-
        """, SOURCE), "body[0].mesh.element", "not one of tet, hex"),
    ("error inside a subtracted shape", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "box", size = [4, 4, 4], subtract = [
            {type = "cylinder", radius = 0.5, height = 5},
            {type = "sphere", radius = -1},  # <-
        ]}
        """, SOURCE), "body[0].shape.subtract[1].radius", "must be > 0"),
    ("subtracted shape outside the body", case(HEAD, """\
        [[body]]
        name = "a"
        material = "steel"
        shape = {type = "box", size = [4, 4, 4], subtract = [{type = "sphere", radius = 1, position = [9, 0, 0]}]}  # <-
        """, SOURCE), "body[0].shape.subtract[0].position", "outside the body"),
    ("strings and comments do not confuse the line count", case('''\
        title = """a title
        with [[body]] and # inside"""  # a comment with "quotes" and [brackets]
        length_unit = 'mm'
        [[material]]
        name = "steel"
        susceptibility = 1000
        ''', BODY, """\
        [[body]]
        "name" = 'b'
        material = "steel"
        shape = {type = "sphere", radius = 1}
        position = [0.5, 0, 0]  # <-
        """, SOURCE), "body[1].position", "overlaps"),
]


def _expected_line(text):
    marked = [i for i, line in enumerate(text.splitlines(), 1) if "# <-" in line]
    assert len(marked) <= 1, "at most one marked line per text"
    return marked[0] if marked else 1


@pytest.mark.parametrize("text, key, words", [m[1:] for m in MALFORMED], ids=[m[0] for m in MALFORMED])
def test_malformed_case_names_file_key_and_line(text, key, words, tmp_path):
    line = _expected_line(text)
    with pytest.raises(CaseError) as info:
        parse_case(text, path="model.toml", base_dir=tmp_path)
    e = info.value
    assert (e.file, e.key, e.line) == ("model.toml", key, line), str(e)
    assert str(e).startswith(f"model.toml:{line}: {key}: "), str(e)
    assert words in e.message, str(e)


def test_many_malformed_cases():
    assert len(MALFORMED) >= 20


def test_unreadable_case_file(tmp_path):
    with pytest.raises(CaseError) as info:
        load_case(tmp_path / "absent.toml")
    assert "absent.toml" in str(info.value)
    bad = tmp_path / "latin1.toml"
    bad.write_bytes(b'title = "ok"\ntitle2 = "\xe9"\n')
    with pytest.raises(CaseError) as info:
        load_case(bad)
    assert info.value.line == 2


VALID = """\
title = "drilled bar and a sphere"
length_unit = "mm"

[[material]]
name = "steel"
susceptibility = 1000

[[material]]
name = "crystal"
susceptibility = [[0.5, 0.1, 0], [0.1, 0.25, 0], [0, 0, 0.1]]

[[body]]
name = "bar"
material = "steel"
shape = {type = "box", size = [40, 10, 5], subtract = [
    {type = "cylinder", radius = 2, height = 5, position = [10, 0, 0]},
]}
position = [0, 0, 3.5]
rotation = {axis = [0, 0, 1], angle_deg = 90}
mesh = {element = "hex", size = 0.5}

[[body]]
name = "sample"
material = "crystal"
shape = {type = "sphere", radius = 2.5}
position = [10, 0, 3.5]

[[body]]
name = "ring"
material = "steel"
shape = {type = "tube", inner_radius = 30, outer_radius = 32, height = 6}

[[source]]
type = "uniform"
B = [0, 0, 0.001]

[[probe]]
name = "axis"
line = {start = [0, 0, 10], end = [0, 0, 20], n = 11}

[[probe]]
name = "map"
plane = {origin = [-5, -5, 10], u = [10, 0, 0], v = [0, 10, 0], n = [3, 2]}

[[probe]]
name = "few"
points = [[1, 2, 3], [4, 5, 6]]

[solver]
tolerance = 1e-8

[demag]
bodies = ["sample"]
fluxmetric = "z"

[[expect]]
quantity = "demag.sample.N.zz"
value = 0.3333
rel_tol = 0.003

[[expect]]
quantity = "probes.axis.B.z"
value = 1e-3
abs_tol = 1e-5
"""


def test_valid_case_converts_mm_to_metres():
    c = parse_case(VALID)
    assert c.title == "drilled bar and a sphere" and c.length_unit == "mm"
    bar, sample, ring = c.bodies
    assert bar.shape == Box((0.04, 0.01, 0.005))
    assert bar.placement.position == (0.0, 0.0, 0.0035)
    assert bar.mesh.element == "hex" and bar.mesh.size == 0.0005
    (cut,) = bar.cuts
    assert cut.shape == Cylinder(0.002, 0.005) and cut.placement.position == (0.01, 0.0, 0.0)
    assert sample.shape == Sphere(0.0025) and sample.mesh.size is None
    assert ring.shape == Tube(0.03, 0.032, 0.006)
    axis, plane, few = c.probes
    assert axis.kind == "line" and axis.points.shape == (11, 3)
    np.testing.assert_allclose(axis.points[[0, 1, -1]], [[0, 0, 0.010], [0, 0, 0.011], [0, 0, 0.020]],
                               rtol=1e-15)
    assert axis.spec == {"start": [0.0, 0.0, 0.01], "end": [0.0, 0.0, 0.02], "n": 11}
    assert plane.grid_shape == (3, 2)
    np.testing.assert_allclose(plane.points[[0, 1, 5]], [[-0.005, -0.005, 0.01], [-0.005, 0.005, 0.01],
                                                         [0.005, 0.005, 0.01]], rtol=1e-15)
    np.testing.assert_allclose(few.points, [[0.001, 0.002, 0.003], [0.004, 0.005, 0.006]], rtol=1e-15)


def test_valid_case_rotation_materials_and_requests():
    c = parse_case(VALID)
    bar = c.bodies[0]
    # 90 degrees about +z turns the bar's long local x axis onto model +y.
    R = bar.placement.rotation_matrix()
    np.testing.assert_allclose(R @ [1, 0, 0], [0, 1, 0], atol=1e-15)
    lo, hi = bar.bounds()
    np.testing.assert_allclose(hi - lo, [0.01, 0.04, 0.005], rtol=1e-12)
    assert c.materials["steel"].susceptibility == 1000.0
    assert c.bodies[1].material is c.materials["crystal"]
    assert c.materials["crystal"].susceptibility[0] == (0.5, 0.1, 0.0)
    # B = 1 mT in free space is H = B/mu0 = 795.77 A/m (mu0 = 4e-7 pi H/m).
    assert c.sources[0].H == pytest.approx((0, 0, 1e-3 / (4e-7 * math.pi)), rel=1e-15)
    assert c.solver.tolerance == 1e-8 and c.solver.method == "auto"
    assert c.demag.bodies == ("sample",) and c.demag.fluxmetric == "z"
    e, f = c.expects
    assert (e.quantity, e.value, e.rel_tol, e.abs_tol) == ("demag.sample.N.zz", 0.3333, 0.003, None)
    assert (f.quantity, f.value, f.rel_tol, f.abs_tol) == ("probes.axis.B.z", 1e-3, None, 1e-5)
    lines = VALID.splitlines()
    assert e.line == lines.index("[[expect]]") + 1
    assert f.line == lines.index("[[expect]]", e.line) + 1


def test_sha256_is_of_the_case_bytes_and_changes_with_one_character(tmp_path):
    c = parse_case(VALID)
    assert c.text == VALID
    assert c.sha256 == hashlib.sha256(VALID.encode()).hexdigest()
    assert parse_case(VALID.replace("value = 0.3333", "value = 0.3334")).sha256 != c.sha256
    f = tmp_path / "bar.toml"
    f.write_bytes(VALID.replace("\n", "\r\n").encode())  # verbatim: line ends included
    loaded = load_case(f)
    assert loaded.sha256 == hashlib.sha256(f.read_bytes()).hexdigest() != c.sha256
    assert loaded.text == f.read_bytes().decode() and loaded.path == str(f)


def test_defaults_touching_bodies_and_demag_of_all(tmp_path):
    # Stacked boxes share a face, so do two cubes turned 45 degrees side by
    # side (the overlap sampling grid lands on that face: they touch, no
    # more); two spheres have overlapping bounding boxes but centres 2.3 > 2
    # radii apart.
    text = case(HEAD.replace('length_unit = "mm"\n', ""), """\
        [[body]]
        name = "low"
        material = "steel"
        shape = {type = "box", size = [1, 1, 1]}
        position = [-5, 0, 0]
        [[body]]
        name = "high"
        material = "steel"
        shape = {type = "box", size = [1, 1, 1]}
        position = [-5, 0, 1]
        [[body]]
        name = "tilted1"
        material = "steel"
        shape = {type = "box", size = [1, 1, 1]}
        rotation = {axis = [0, 0, 1], angle_deg = 45}
        [[body]]
        name = "tilted2"
        material = "steel"
        shape = {type = "box", size = [1, 1, 1]}
        rotation = {axis = [0, 0, 1], angle_deg = 45}
        position = [0.7071067811865476, 0.7071067811865475, 0]
        [[body]]
        name = "s1"
        material = "steel"
        shape = {type = "sphere", radius = 1}
        position = [5, 0, 0]
        [[body]]
        name = "s2"
        material = "steel"
        shape = {type = "sphere", radius = 1}
        position = [6.6263, 1.6263, 0]
        [demag]
        """)
    c = parse_case(text, base_dir=tmp_path)
    assert c.length_unit == "m" and c.sources == () and c.probes == () and c.expects == ()
    assert c.bodies[1].placement.position == (-5.0, 0.0, 1.0)
    assert c.demag.bodies == ("low", "high", "tilted1", "tilted2", "s1", "s2") and c.demag.fluxmetric is None
    assert c.solver.method == "auto"


def test_surface_file_relative_to_case_folder(tmp_path):
    trimesh = pytest.importorskip("trimesh")
    (tmp_path / "parts").mkdir()
    trimesh.creation.box(extents=[2, 2, 2]).export(tmp_path / "parts" / "cube.stl")
    body = case(HEAD, """\
        [[body]]
        name = "part"
        material = "steel"
        shape = {type = "file", path = "parts/cube.stl"}
        """, SOURCE)
    f = tmp_path / "model.toml"
    f.write_text(body)
    c = load_case(f)
    assert c.bodies[0].shape == SurfaceFile((tmp_path / "parts" / "cube.stl").resolve(), 1e-3)
    # A sphere reaching 0.2 mm into the 2 mm cube (half-width 1 mm) overlaps it.
    f.write_text(body + case("""\
        [[body]]
        name = "ball"
        material = "steel"
        shape = {type = "sphere", radius = 0.5}
        position = [0, 0, 1.3]  # <-
        """))
    with pytest.raises(CaseError) as info:
        load_case(f)
    assert (info.value.key, info.value.line) == ("body[1].position", _expected_line(f.read_text()))


def test_open_surface_is_refused(tmp_path):
    trimesh = pytest.importorskip("trimesh")
    cube = trimesh.creation.box(extents=[1, 1, 1])
    trimesh.Trimesh(cube.vertices, cube.faces[:-1]).export(tmp_path / "open.stl")
    text = case(HEAD, """\
        [[body]]
        name = "part"
        material = "steel"
        shape = {type = "file", path = "open.stl"}  # <-
        """, SOURCE)
    with pytest.raises(CaseError) as info:
        parse_case(text, base_dir=tmp_path)
    assert (info.value.key, info.value.line) == ("body[0].shape.path", _expected_line(text))


def test_probe_constructors():
    line = Probe.line("l", [0, 0, 0], [1, 2, 3], 4)
    np.testing.assert_allclose(line.points, [[0, 0, 0], [1 / 3, 2 / 3, 1], [2 / 3, 4 / 3, 2], [1, 2, 3]])
    plane = Probe.plane("p", [0, 0, 1], [2, 0, 0], [0, 1, 0], 3, 2)
    assert plane.points.shape == (6, 3) and plane.grid_shape == (3, 2)
    np.testing.assert_allclose(plane.points.reshape(3, 2, 3)[2, 1], [2, 1, 1])
    box = Probe.box("b", [0, 0, 0], [1, 2, 4], (2, 3, 5))
    assert box.grid_shape == (2, 3, 5)
    np.testing.assert_allclose(box.points.reshape(2, 3, 5, 3)[1, 2, 3], [1, 2, 3])
    pts = Probe.from_points("q", [[1, 2, 3]])
    assert pts == Probe.from_points("q", [(1.0, 2.0, 3.0)]) and pts != Probe.from_points("q", [[1, 2, 4]])
    assert not pts.points.flags.writeable
    with pytest.raises(ValueError):
        Probe.line("l", [0, 0, 0], [1, 0, 0], 1)
    with pytest.raises(ValueError):
        Probe.plane("p", [0, 0, 0], [1, 0], [0, 1, 0], 2, 2)
