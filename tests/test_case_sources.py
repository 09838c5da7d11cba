"""Sources written in case files: each type's keys give the field of the
matching volmag.sources object, with lengths converted from the file's unit
once, and the closed forms that exist (sources named beside each check)."""
import math
import textwrap

import numpy as np
import pytest

from volmag.case import CaseError, SOURCE_KEYS, parse_case
from volmag.sources import Arc, Coil, CurrentLoop, PointDipole, Polyline, Racetrack, Segment

from test_sources import dipole_field, loop_on_axis, thick_solenoid_on_axis

HEAD = """\
title = "sources"
length_unit = "mm"
[[material]]
name = "air"
susceptibility = 0.0
[[body]]
name = "far"
material = "air"
shape = {type = "sphere", radius = 1}
position = [0, 0, 5000]
"""


def sources(*tables: str):
    """The sources of a case (mm) holding the given [[source]] tables."""
    text = HEAD + "".join("[[source]]\n" + textwrap.dedent(t) for t in tables)
    return parse_case(text).sources


def rel(a, b):
    return np.abs(np.asarray(a) - np.asarray(b)).max() / np.abs(np.asarray(b)).max()


def test_loop_keys_give_the_on_axis_closed_form():
    """H_z = N I a^2 / (2 (a^2 + z^2)^(3/2)) on the axis (Biot-Savart;
    Jackson, Classical Electrodynamics, 3rd ed., sec. 5.5); lengths in mm."""
    (loop,) = sources("""\
        type = "loop"
        center = [10, -20, 30]
        normal = [0, 0, 2]
        radius = 50
        current = 1.5
        turns = 40
        """)
    assert loop == CurrentLoop((0.01, -0.02, 0.03), (0, 0, 1), 0.05, 1.5, 40)
    z = np.array([-0.2, -0.03, 0.0, 0.01, 0.5])
    H = loop.field(np.column_stack([np.full(5, 0.01), np.full(5, -0.02), 0.03 + z]))
    assert rel(H[:, 2], loop_on_axis(40 * 1.5, 0.05, z)) < 1e-13
    assert np.abs(H[:, :2]).max() < 1e-12 * np.abs(H[:, 2]).max()


def test_turns_default_to_one():
    (loop,) = sources('type = "loop"\ncenter = [0, 0, 0]\nnormal = [1, 0, 0]\nradius = 5\ncurrent = 2\n')
    assert loop.turns == 1 and loop.normal == (1.0, 0.0, 0.0)


def test_coil_keys_give_the_thick_solenoid_on_axis():
    """Uniform current density over radii a..b, length L: the on-axis field of
    Montgomery, Solenoid Magnet Design (1969) (from memory; verified in
    test_sources by integrating the loop)."""
    (coil,) = sources("""\
        type = "coil"
        center = [0, 0, 0]
        axis = [0, 0, 1]
        inner_radius = 20
        outer_radius = 30
        length = 40
        turns = 200
        current = 0.5
        rel_tol = 1e-10
        """)
    assert coil == Coil((0, 0, 0), (0, 0, 1), 0.02, 0.03, 0.04, 200, 0.5, rel_tol=1e-10)
    z = np.array([0.0, 0.01, 0.05, 0.2])
    H = coil.field(np.column_stack([np.zeros(4), np.zeros(4), z]))
    assert rel(H[:, 2], thick_solenoid_on_axis(100.0, 0.02, 0.03, 0.04, z)) < 1e-8


def test_segment_and_closed_square_give_the_textbook_fields():
    """A finite straight wire: H = I (cos t1 - cos t2) / (4 pi d), on its
    perpendicular bisector I L / (2 pi d sqrt(L^2 + 4 d^2)); at the centre of a
    square loop of side s, H = 2 sqrt(2) I / (pi s), four such sides (Biot-Savart;
    e.g. Griffiths, Introduction to Electrodynamics, ch. 5 -- from memory)."""
    seg, square = sources("""\
        type = "segment"
        start = [0, -40, 0]
        end = [0, 40, 0]
        current = 3
        """, """\
        type = "polyline"
        points = [[-30, -30, 0], [30, -30, 0], [30, 30, 0], [-30, 30, 0]]
        current = 2
        closed = true
        """)
    assert seg == Segment((0, -0.04, 0), (0, 0.04, 0), 3)
    d, L = 0.025, 0.08
    H = seg.field([[d, 0, 0]])[0]
    assert abs(np.linalg.norm(H) / (3 * L / (2 * math.pi * d * math.hypot(L, 2 * d))) - 1) < 1e-13
    assert square == Polyline(((-0.03, -0.03, 0), (0.03, -0.03, 0), (0.03, 0.03, 0), (-0.03, 0.03, 0)), 2, True)
    H = square.field([[0, 0, 0]])[0]
    assert abs(H[2] / (2 * math.sqrt(2) * 2 / (math.pi * 0.06)) - 1) < 1e-13   # counter-clockwise: +z


def test_arc_keys_take_degrees():
    """At the centre of a circular arc of angle phi, H = I phi / (4 pi a) along
    the normal (the Biot-Savart integral of a loop's centre field, Jackson,
    3rd ed., sec. 5.5, taken over the arc's angle alone)."""
    (arc,) = sources("""\
        type = "arc"
        center = [0, 0, 0]
        normal = [0, 0, 1]
        radius = 20
        start_angle_deg = 30
        end_angle_deg = 120
        current = 4
        reference = [1, 0, 0]
        """)
    assert arc == Arc((0, 0, 0), (0, 0, 1), 0.02, math.radians(30), math.radians(120), 4, (1, 0, 0))
    H = arc.field([[0, 0, 0]])[0]
    assert abs(H[2] / (4 * (math.pi / 2) / (4 * math.pi * 0.02)) - 1) < 1e-12


def test_racetrack_keys_match_the_object():
    (track,) = sources("""\
        type = "racetrack"
        center = [0, 0, 10]
        axis = [0, 0, 1]
        straight_length = 100
        straight_width = 20
        inner_radius = 10
        outer_radius = 15
        height = 8
        turns = 50
        current = 2
        reference = [1, 1, 0]
        rel_tol = 1e-7
        """)
    assert track == Racetrack((0, 0, 0.01), (0, 0, 1), 0.1, 0.01, 0.015, 0.008, 50, 2, straight_width=0.02,
                              reference=(1, 1, 0), rel_tol=1e-7)


def test_dipole_moment_is_not_scaled_by_the_length_unit():
    """H on the axis of a dipole: 2 m / (4 pi r^3) (Jackson, 3rd ed., eq. 5.56):
    the position is in mm, the moment stays in A m^2."""
    (dip,) = sources('type = "dipole"\nposition = [0, 0, -14]\nmoment = [0, 0, 4]\n')
    assert dip == PointDipole((0, 0, -0.014), (0, 0, 4))
    p = np.array([[0.03, 0.02, 0.086]])
    assert rel(dip.field(p), dipole_field(np.array([0, 0, 4.0]), p - [0, 0, -0.014])) < 1e-14


def test_every_source_type_is_covered_here():
    assert set(SOURCE_KEYS) == {"uniform", "loop", "coil", "segment", "polyline", "arc", "racetrack", "dipole"}


@pytest.mark.parametrize("table, key, words", [
    ('type = "coil"\ncenter = [0, 0, 0]\naxis = [0, 0, 1]\ninner_radius = 30\nouter_radius = 20\n'
     'length = 1\nturns = 1\ncurrent = 1\n', "source[0].inner_radius", "must not exceed outer_radius"),
    ('type = "loop"\ncenter = [0, 0, 0]\nnormal = [0, 0, 0]\nradius = 1\ncurrent = 1\n',
     "source[0].normal", "zero vector"),
    ('type = "loop"\ncenter = [0, 0, 0]\nnormal = [0, 0, 1]\nradius = 1\n', "source[0].current",
     "missing required key"),
    ('type = "arc"\ncenter = [0, 0, 0]\nnormal = [0, 0, 1]\nradius = 1\nstart_angle_deg = 10\n'
     'end_angle_deg = 10\ncurrent = 1\n', "source[0].end_angle_deg", "more than 0"),
    ('type = "arc"\ncenter = [0, 0, 0]\nnormal = [0, 0, 1]\nradius = 1\nstart_angle_deg = 0\n'
     'end_angle_deg = 90\ncurrent = 1\nreference = [0, 0, 5]\n', "source[0].reference", "parallel to normal"),
    ('type = "polyline"\npoints = [[0, 0, 0], [1, 0, 0]]\ncurrent = 1\nclosed = true\n',
     "source[0].points", "at least three"),
    ('type = "polyline"\npoints = [[0, 0, 0], [1, 0, 0]]\ncurrent = 1\nclosed = 1\n',
     "source[0].closed", "true or false"),
    ('type = "segment"\nstart = [1, 2, 3]\nend = [1, 2, 3]\ncurrent = 1\n', "source[0].end", "different"),
    ('type = "coil"\ncenter = [0, 0, 0]\naxis = [0, 0, 1]\ninner_radius = 1\nouter_radius = 2\n'
     'length = 1\nturns = 1\ncurrent = 1\nrel_tol = 0.5\n', "source[0].rel_tol", "[1e-14, 0.1)"),
    ('type = "dipole"\nposition = [0, 0, 0]\nmoment = [0, 0, 1]\nradius = 3\n', "source[0].radius",
     "does not apply to a dipole source"),
])
def test_bad_source_keys_name_the_key(table, key, words):
    with pytest.raises(CaseError) as info:
        sources(table)
    assert info.value.key == key and words in info.value.message, str(info.value)
