"""Probes and what a run reads from them: sphere and CSV point sets, the field
at each point, distortion and homogeneity over a probe, tolerances that fail
a run, and the safety cautions at 0.5 mT. Each numerical check names its
source."""
import json
import math

import h5py
import mpmath
import numpy as np
import pytest
from scipy.special import eval_legendre

from volmag import cli
from volmag.case import CaseError, parse_case
from volmag.cautions import STRAY_FIELD_CAUTIONS
from volmag.probes import Probe
from volmag.run import lookup, parse_quantity, run_case
from volmag.units import MU0

from test_sources import dipole_field

AIR = """\
title = "probes"
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


# ---------------------------------------------------------------- point sets

def test_sphere_probe_points_lie_on_the_sphere_and_share_its_area():
    """The surface average of z^2 over a sphere is r^2/3 and of x, y, z zero
    (exact integrals); equal-area points must reproduce them."""
    c, r, n = np.array([0.1, -0.2, 0.3]), 0.05, 500
    p = Probe.sphere("s", c, r, n)
    d = p.points - c
    assert p.points.shape == (n, 3) and p.grid_shape == (n,)
    assert np.abs(np.linalg.norm(d, axis=1) / r - 1).max() < 1e-14
    assert len(np.unique(np.round(d / r, 12), axis=0)) == n
    assert np.abs(d.mean(axis=0)).max() < 1e-3 * r
    assert np.abs((d ** 2).mean(axis=0) / (r * r / 3) - 1).max() < 1e-3


def test_sphere_probe_from_a_case_is_in_metres():
    case = parse_case(AIR + '[[source]]\ntype = "uniform"\nH = [0, 0, 1]\n'
                            '[[probe]]\nname = "ball"\nsphere = {center = [0, 0, 10], radius = 25, n = 40}\n')
    (p,) = case.probes
    assert p.kind == "sphere" and len(p.points) == 40
    assert np.allclose(np.linalg.norm(p.points - [0, 0, 0.01], axis=1), 0.025, rtol=1e-14)


def test_points_file_in_the_case_unit(tmp_path):
    (tmp_path / "pts.csv").write_text("x,y,z\n# sensors\n1, 2, 3\n\n-4,5.5,6e1\n")
    text = AIR + '[[source]]\ntype = "uniform"\nH = [0, 0, 1]\n[[probe]]\nname = "s"\npoints_file = "pts.csv"\n'
    (p,) = parse_case(text, base_dir=tmp_path).probes
    assert p.kind == "points" and p.spec == {"points_file": str(tmp_path / "pts.csv")}
    assert np.array_equal(p.points, [[0.001, 0.002, 0.003], [-0.004, 0.0055, 0.06]])


@pytest.mark.parametrize("content, words", [("1,2,3\n4,5\n", "line 2"), ("x,y,z\n1,2,zz\n", "line 2"),
                                            ("", "no points"), ("1,2,3\n4,5,nan\n", "finite")])
def test_bad_points_file_names_key_and_row(tmp_path, content, words):
    (tmp_path / "pts.csv").write_text(content)
    text = AIR + '[[source]]\ntype = "uniform"\nH = [0, 0, 1]\n[[probe]]\nname = "s"\npoints_file = "pts.csv"\n'
    with pytest.raises(CaseError) as info:
        parse_case(text, base_dir=tmp_path)
    assert info.value.key == "probe[0].points_file" and words in info.value.message, str(info.value)
    (tmp_path / "pts.csv").unlink()
    with pytest.raises(CaseError, match="not found"):
        parse_case(text, base_dir=tmp_path)


# ---------------------------------------------------------------- metrics on known fields

def test_no_magnetic_body_means_no_distortion():
    """With nothing magnetised the total field is the applied field: dB = 0,
    distortion 0, and a uniform field is perfectly homogeneous."""
    run = run_case(parse_case(AIR + '[[source]]\ntype = "uniform"\nB = [1e-4, 0, 3e-4]\n'
                                    '[[probe]]\nname = "box"\nbox = {min = [-5, -5, -5], max = [5, 5, 5], n = [3, 3, 3]}\n'))
    p = run.summary()["probes"]["box"]
    assert p["max_dB"] == 0 and p["max_distortion_ppm"] == 0 and p["homogeneity_ppm"] == 0
    assert p["component_homogeneity_ppm"] == [0.0, 0.0, 0.0]
    assert p["max_abs_B"] == pytest.approx(math.hypot(1e-4, 3e-4), rel=1e-15)
    assert np.array_equal(run.probes["box"]["distortion_ppm"], np.zeros(27))


def helmholtz_axis_coefficients(R, NI, order):
    """Taylor coefficients b_n (T / m^n) about the centre of the on-axis B_z of
    two coaxial loops at z = +-R/2, from the loop's on-axis field
    mu0 NI R^2 / (2 (R^2 + z^2)^(3/2)) (Jackson, 3rd ed., sec. 5.5), by
    mpmath's Taylor expansion at 30 digits."""
    mpmath.mp.dps = 30
    R = mpmath.mpf(R)
    f = lambda z: sum(MU0 * NI * R ** 2 / (2 * (R ** 2 + (z + s) ** 2) ** 1.5) for s in (-R / 2, R / 2))
    return [float(b) for b in mpmath.taylor(f, 0, order)]


def test_helmholtz_pair_homogeneity_over_a_sphere():
    """An axisymmetric field with no sources near the centre has
    B_z(r, theta) = sum_n b_n r^n P_n(cos theta), b_n the on-axis Taylor
    coefficients (the Legendre expansion of axisymmetric harmonic functions,
    Jackson, 3rd ed., sec. 3.3); for the Helmholtz pair b_0 = 8 mu0 NI/(5^1.5 R)
    and b_2 = 0, b_4 = -144/125 b_0/R^4 (the Helmholtz pair, e.g. Jackson,
    3rd ed., ch. 5 problems -- from memory; checked here against the series).
    The peak to peak of B_z over a sphere probe must equal that of the series
    at its points."""
    R, NI, r = 500.0, 200.0, 50.0
    loops = "".join(f'[[source]]\ntype = "loop"\ncenter = [0, 0, {z}]\nnormal = [0, 0, 1]\nradius = {R}\n'
                    f'current = 2\nturns = {NI / 2}\n' for z in (-R / 2, R / 2))
    run = run_case(parse_case(AIR + loops + f'[[probe]]\nname = "ball"\nsphere = {{center = [0, 0, 0], '
                                            f'radius = {r}, n = 600}}\n'))
    p = run.summary()["probes"]["ball"]
    b = helmholtz_axis_coefficients(R * 1e-3, NI, 8)
    assert b[0] == pytest.approx(8 * MU0 * NI / (5 ** 1.5 * R * 1e-3), rel=1e-14)
    assert abs(b[2]) < 1e-12 * b[0] and b[4] == pytest.approx(-144 / 125 * b[0] / (R * 1e-3) ** 4, rel=1e-12)
    pts = run.probes["ball"]["points"]
    c = pts[:, 2] / np.linalg.norm(pts, axis=1)
    Bz = sum(bn * (r * 1e-3) ** n * eval_legendre(n, c) for n, bn in enumerate(b))
    ref_ppm = 1e6 * np.ptp(Bz) / b[0]
    assert p["component_homogeneity_ppm"][2] == pytest.approx(ref_ppm, rel=1e-4)
    assert p["homogeneity_ppm"] == pytest.approx(ref_ppm, rel=1e-4)   # |B| = B_z to (B_rho/B_z)^2 ~ 1e-8
    # the Fibonacci points' mean is the surface mean, which is the centre value for a harmonic field
    assert p["B_applied"][2] == pytest.approx(b[0], rel=1e-6)
    assert p["max_dB"] == 0.0


SPHERE = """\
title = "magnetised sphere"
length_unit = "mm"
[[material]]
name = "ferrite"
susceptibility = 5.0
[[body]]
name = "ball"
material = "ferrite"
shape = {type = "sphere", radius = 10}
mesh = {element = "tet", size = 3.0, surface_size = 1.5}
[[source]]
type = "uniform"
B = [0, 0, 1e-3]
[[probe]]
name = "near"
points = [[0, 0, 15], [15, 0, 0], [8, 6, 9]]
[[probe]]
name = "shell"
sphere = {center = [0, 0, 0], radius = 20, n = 400}
tolerance = {quantity = "max_distortion_ppm", max = %s}
"""


@pytest.fixture(scope="module")
def sphere_run():
    return run_case(parse_case(SPHERE % "1e9"))


def sphere_dipole(points):
    """Field (T) of the sphere's magnetisation outside it: a point dipole of
    moment V M, M = 3 chi/(3 + chi) H0 (magnetised sphere in a uniform field:
    Jackson, 3rd ed., secs. 5.10-5.11 -- from memory; N = 1/3, Osborn 1945)."""
    chi, R, H0 = 5.0, 0.01, 1e-3 / MU0
    m = np.array([0, 0, 4 / 3 * math.pi * R ** 3 * 3 * chi / (3 + chi) * H0])
    return MU0 * dipole_field(m, points)


def test_magnetised_sphere_outside_field_is_the_dipole(sphere_run):
    """dB at 1.5 radii equals the exact dipole field within 1 %."""
    p = sphere_run.probes["near"]
    ref = sphere_dipole(p["points"])
    assert np.all(np.linalg.norm(p["dB"] - ref, axis=1) < 0.01 * np.linalg.norm(ref, axis=1))
    assert np.allclose(p["B_applied"], [0, 0, 1e-3], rtol=0, atol=1e-18)
    assert np.allclose(p["distortion_ppm"], 1e9 * np.linalg.norm(p["dB"], axis=1), rtol=1e-12)


def test_region_metrics_of_the_magnetised_sphere(sphere_run):
    """Metrics over a concentric sphere probe at 2 radii against the same
    metrics of the exact field (applied + dipole) at the same points."""
    s = sphere_run.summary()["probes"]["shell"]
    pts = sphere_run.probes["shell"]["points"]
    dB = sphere_dipole(pts)
    B = dB + [0, 0, 1e-3]
    absB = np.linalg.norm(B, axis=1)
    assert s["max_dB"] == pytest.approx(np.linalg.norm(dB, axis=1).max(), rel=0.01)
    assert s["max_distortion_ppm"] == pytest.approx(1e6 * np.linalg.norm(dB, axis=1).max() / 1e-3, rel=0.01)
    assert s["homogeneity_ppm"] == pytest.approx(1e6 * np.ptp(absB) / absB.mean(), rel=0.01)
    for k in range(3):
        assert s["component_homogeneity_ppm"][k] == pytest.approx(1e6 * np.ptp(B[:, k]) / absB.mean(), rel=0.015)
    # on the lattice the largest |dB| sits near a pole: 2 mu0 m / (4 pi r^3) there
    assert s["max_dB"] == pytest.approx(np.linalg.norm(sphere_dipole(np.array([[0, 0, 0.02]]))), rel=0.02)


def test_lookup_resolves_the_metrics(sphere_run):
    summary = sphere_run.summary()
    s = summary["probes"]["shell"]
    assert lookup(summary, "probes.shell.max_dB") == s["max_dB"]
    assert lookup(summary, "probes.shell.homogeneity_ppm") == s["homogeneity_ppm"]
    assert lookup(summary, "probes.shell.component_homogeneity_ppm.y") == s["component_homogeneity_ppm"][1]
    assert lookup(summary, "probes.shell.max_distortion_ppm") == s["max_distortion_ppm"]
    with pytest.raises(KeyError, match="only probe values at points"):
        lookup(summary, "probes.shell.component_homogeneity_ppm.z[3]")
    assert parse_quantity("probes.shell.max_dB").field == "max_dB"


def test_undefined_distortion_is_reported_not_faked():
    """Without applied field (a magnet alone) the distortion has no meaning:
    an expectation on it fails with the reason."""
    text = AIR.replace('susceptibility = 0.0', 'remanence = [0, 0, 1.0]').replace(
        "radius = 1}", "radius = 2}\nmesh = {element = \"hex\", size = 1.0}").replace(
        "position = [0, 0, 5000]", "") + \
        '[[probe]]\nname = "p"\npoints = [[0, 0, 10]]\n[[expect]]\nquantity = "probes.p.max_distortion_ppm"\nmax = 1\n'
    run = run_case(parse_case(text))
    (row,) = run.expect
    assert not row["ok"] and "applied field vanishes" in row["error"]
    assert run.summary()["probes"]["p"]["max_distortion_ppm"] is None


# ---------------------------------------------------------------- tolerance, exit status, results file

def test_tolerance_passes_and_fails_the_run(tmp_path, capsys, sphere_run):
    """At its poles the shell sees the sphere's dipole field 2 M/(3 H0) (R/r)^3
    = 2/3 * 15/8 / 8 = 0.156 of the applied field (Jackson 5.10-5.11, M/H0 =
    3 chi/(3 + chi)): a 1e6 ppm tolerance holds, 1e4 ppm fails."""
    got = sphere_run.summary()["probes"]["shell"]["max_distortion_ppm"]
    assert 0.14e6 < got < 0.16e6
    for limit, status in (("1e6", 0), ("1e4", 1)):
        (tmp_path / "c.toml").write_text(SPHERE % limit)
        assert cli.main(["run", str(tmp_path / "c.toml"), "--out", str(tmp_path / "c.h5"), "--quiet"]) == status
        out = capsys.readouterr().out
        verdict = "pass" if status == 0 else "FAIL"
        assert f"tolerance max_distortion_ppm <= {float(limit):g}: {verdict}" in out, out
        assert f"{verdict}  probes.shell.max_distortion_ppm" in out
        with h5py.File(tmp_path / "c.h5") as f:
            g = f["probes/shell"]
            assert bool(g.attrs["tolerance_ok"]) is (status == 0)
            assert g.attrs["tolerance_quantity"] == "max_distortion_ppm"
            assert f.attrs["expect_total"] == 1 and f.attrs["expect_passed"] == 1 - status
    assert cli.main(["check", str(tmp_path)]) == 1
    assert "FAIL probes.shell.max_distortion_ppm" in capsys.readouterr().out


def test_results_file_holds_every_probe_array_and_metric(tmp_path, sphere_run):
    from volmag.results import write_results
    out = write_results(tmp_path / "r.h5", sphere_run, "test")
    s = sphere_run.summary()["probes"]["shell"]
    with h5py.File(out) as f:
        g = f["probes/shell"]
        for k in ("points", "H", "B", "B_applied", "dB"):
            assert g[k].shape == (400, 3), k
        assert g["distortion_ppm"].shape == (400,)
        assert np.array_equal(g["dB"][()], g["B"][()] - g["B_applied"][()])
        assert g.attrs["kind"] == "sphere" and g.attrs["max_dB"] == s["max_dB"]
        assert np.array_equal(g.attrs["component_homogeneity_ppm"], s["component_homogeneity_ppm"])
        assert len(f.attrs["cautions"]) == len(STRAY_FIELD_CAUTIONS)   # |B| ~ 1.2 mT on the probes


@pytest.mark.parametrize("B, cautioned", [(0.4e-3, False), (0.6e-3, True)])
def test_caution_at_and_above_half_a_millitesla(tmp_path, capsys, B, cautioned):
    """0.5 mT: the limit usually posted for implanted medical devices (common
    practice). Cautions in the text, the JSON summary and the results file."""
    (tmp_path / "c.toml").write_text(AIR + f'[[source]]\ntype = "uniform"\nB = [0, 0, {B}]\n'
                                           '[[probe]]\nname = "p"\npoints = [[0, 0, 0]]\n')
    assert cli.main(["run", str(tmp_path / "c.toml"), "--out", str(tmp_path / "c.h5"), "--json", "--quiet"]) == 0
    summary = json.loads(capsys.readouterr().out)
    assert summary["cautions"] == (list(STRAY_FIELD_CAUTIONS) if cautioned else [])
    with h5py.File(tmp_path / "c.h5") as f:
        assert len(f.attrs["cautions"]) == (len(STRAY_FIELD_CAUTIONS) if cautioned else 0)
    assert cli.main(["run", str(tmp_path / "c.toml"), "--out", str(tmp_path / "c.h5"), "--quiet"]) == 0
    text = capsys.readouterr().out
    assert ("CAUTION (|B| reaches 0.5 mT or more at probes (p 0.6 mT)):" in text) is cautioned
    assert ("local codes" in text.lower()) is cautioned
