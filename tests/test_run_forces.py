"""Forces from case files: the [forces] table, the summary, expectations on
forces.<body>.F.<c>, the results file and the caution a force computation
carries. Reference: a uniformly magnetised sphere feels, in the field of a
point dipole, the force on a point dipole at its centre (its field is exactly
a dipole's, Jackson, Classical Electrodynamics, 3rd ed., sec. 5.10, and
action equals reaction); two coaxial parallel dipoles m1, m2 a distance d
apart attract with F = 3 mu0 m1 m2 / (2 pi d^4) (e.g. Furlani, Permanent
Magnet and Electromechanical Devices, 2001, ch. 3 -- from memory)."""
import json
import math

import h5py
import numpy as np
import pytest

from volmag import cli
from volmag.case import CaseError, parse_case
from volmag.cautions import STRAY_FIELD_CAUTIONS
from volmag.run import FORCE_METHOD, lookup
from volmag.units import MU0

MAGNET = """\
title = "magnet ball above a dipole"
length_unit = "mm"
[[material]]
name = "rigid"
remanence = [0, 0, 1.0]
[[body]]
name = "ball"
material = "rigid"
shape = {type = "sphere", radius = 5}
mesh = {element = "tet", size = 2.0, surface_size = 1.0}
[[source]]
type = "dipole"
position = [0, 0, -30]
moment = [0, 0, 0.5]
[forces]
bodies = ["ball"]
about = [10, 0, 0]
[[expect]]
quantity = "forces.ball.F.z"
value = %s
rel_tol = 0.02
"""
# exact sphere: m1 = Br V / mu0 = 1 * (4/3) pi (5 mm)^3 / (4e-7 pi) = 0.4166... A m^2
M1 = 1.0 * 4 / 3 * math.pi * 0.005 ** 3 / MU0
F_EXACT = -3 * MU0 * M1 * 0.5 / (2 * math.pi * 0.03 ** 4)


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    d = tmp_path_factory.mktemp("forces")
    (d / "c.toml").write_text(MAGNET % F_EXACT)
    code = cli.main(["run", str(d / "c.toml"), "--out", str(d / "c.h5"), "--json", "--quiet"])
    return code, d / "c.h5"


def test_force_on_a_magnet_ball_is_the_dipole_force(run, capsys):
    code, out = run
    with h5py.File(out) as f:
        summary = json.loads(f["summary"][()])
    assert code == 0
    (row,) = summary["expect"]
    assert row["ok"] and row["quantity"] == "forces.ball.F.z"
    F = np.array(summary["forces"]["ball"]["F"])
    m1 = summary["bodies"]["ball"]["moment"][2]          # the faceted ball's moment, exact M = Mr
    ref = -3 * MU0 * m1 * 0.5 / (2 * math.pi * 0.03 ** 4)
    assert abs(F[2] / ref - 1) < 5e-3, (F, ref)
    assert np.abs(F[:2]).max() < 1e-3 * abs(ref)
    assert lookup(summary, "forces.ball.F.z") == F[2]
    # torque about (10, 0, 0) mm of a force along the axis: (c - about) x F, c the centre
    T = np.array(summary["forces"]["ball"]["torque"])
    assert summary["forces"]["ball"]["about"] == pytest.approx([0.01, 0, 0])
    assert T[1] == pytest.approx(0.01 * F[2], rel=1e-3) and abs(lookup(summary, "forces.ball.torque.y")) > 0


def test_forces_in_the_results_file_and_the_caution(run):
    _, out = run
    with h5py.File(out) as f:
        g = f["forces/ball"]
        assert g["F"].shape == (3,) and g["torque"].shape == (3,)
        assert np.allclose(g["about"][()], [0.01, 0, 0])
        assert f["forces"].attrs["method"] == FORCE_METHOD and "Furlani" in FORCE_METHOD
        # no probe: the caution comes from computing forces alone
        assert [c for c in f.attrs["cautions"]] == list(STRAY_FIELD_CAUTIONS)


def test_force_text_output_and_failed_force_expectation(tmp_path, capsys):
    """Expecting twice the exact force must fail the run (exit 1)."""
    (tmp_path / "c.toml").write_text(MAGNET % (2 * F_EXACT))
    assert cli.main(["run", str(tmp_path / "c.toml"), "--out", str(tmp_path / "c.h5"), "--quiet"]) == 1
    text = capsys.readouterr().out
    assert "force on ball: F [" in text and "N m about [0.01, 0, 0] m" in text
    assert "CAUTION (forces on bodies were computed):" in text
    assert "FAIL  forces.ball.F.z" in text


@pytest.mark.parametrize("edit, key, words", [
    (("bodies = [\"ball\"]", "bodies = [\"bal\"]"), "forces.bodies[0]", "did you mean 'ball'?"),
    (("about = [10, 0, 0]", "about = [10, 0]"), "forces.about", "expected 3 numbers"),
    (("[forces]\nbodies = [\"ball\"]\nabout = [10, 0, 0]\n", ""), "expect[0].quantity", "needs a [forces] table"),
    (("bodies = [\"ball\"]", "bodies = [\"ball\"]\ntorque = 1"), "forces.torque", "unknown key"),
])
def test_bad_forces_table(edit, key, words):
    with pytest.raises(CaseError) as info:
        parse_case((MAGNET % F_EXACT).replace(*edit))
    assert info.value.key == key and words in info.value.message, str(info.value)
