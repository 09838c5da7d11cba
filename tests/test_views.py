"""Views, HTML report and VTK export of results files."""
import re
import subprocess
from pathlib import Path

import numpy as np
import pytest

from volmag.case import parse_case
from volmag.cli import main as cli_main
from volmag.export import write_vtu
from volmag.report import report_html
from volmag.results import read_results, write_results
from volmag.run import run_case
from volmag.slices import Plane, default_plane, plane_fields, results_mesh
from volmag.views import VIEWS, render

SIZE = (400, 300)
CHROMIUM = Path("/usr/bin/chromium")

# Invented demo bodies, small enough to solve in a second.
TET_CASE = """title = "small drilled bar (tets)"
length_unit = "mm"
[[material]]
name = "ferrite"
susceptibility = 15.0
[[body]]
name = "bar"
material = "ferrite"
mesh = { element = "tet", size = 1.0 }
[body.shape]
type = "box"
size = [4.0, 2.0, 1.0]
subtract = [{ type = "cylinder", radius = 0.6, height = 1.2, position = [0.8, 0.0, 0.0] }]
[[source]]
type = "uniform"
B = [0.0, 0.0, 1e-3]
[demag]
bodies = ["bar"]
[[probe]]
name = "above"
line = { start = [-3.0, 0.0, 1.0], end = [3.0, 0.0, 1.0], n = 9 }
[[expect]]
quantity = "demag.bar.N.zz"
value = 0.45
rel_tol = 0.2
"""

HEX_CASE = """title = "small steel plate (hexes)"
length_unit = "mm"
[[material]]
name = "steel"
susceptibility = 100.0
[[body]]
name = "plate"
material = "steel"
shape = { type = "box", size = [80.0, 40.0, 20.0] }
mesh = { element = "hex", size = 10.0 }
[[source]]
type = "uniform"
B = [50e-6, 0.0, 0.0]
[demag]
bodies = ["plate"]
[[probe]]
name = "section"
plane = { origin = [-100.0, 0.0, -60.0], u = [200.0, 0.0, 0.0], v = [0.0, 0.0, 120.0], n = [6, 4] }
[[probe]]
name = "above"
line = { start = [-100.0, 0.0, 25.0], end = [100.0, 0.0, 25.0], n = 11 }
[[expect]]
quantity = "demag.plate.N.xx"
value = 0.2
rel_tol = 0.5
[[expect]]
quantity = "demag.plate.N.xx"
value = 0.9
rel_tol = 0.01
"""


def _results(tmp_path_factory, name, text):
    case = parse_case(text, f"{name}.toml", Path.cwd())
    out = tmp_path_factory.mktemp(name) / f"{name}.h5"
    write_results(out, run_case(case), "test")
    return out


@pytest.fixture(scope="module")
def files(tmp_path_factory):
    return {"tet": _results(tmp_path_factory, "tet", TET_CASE), "hex": _results(tmp_path_factory, "hex", HEX_CASE)}


@pytest.fixture(scope="module")
def fields(files):
    """Coarse plane fields for the slice and map views (the report and the
    command line below exercise the default planes)."""
    out = {}
    for kind, f in files.items():
        res = read_results(f)
        out[kind] = plane_fields(res, default_plane(res, n=24))
    return out


@pytest.fixture(scope="module")
def reports(files):
    """Reports with coarse field maps (the command-line test uses the default)."""
    return {kind: report_html(read_results(f), SIZE, samples=30) for kind, f in files.items()}


def _colours(png: Path, box=(0.15, 0.15, 0.85, 0.85)) -> tuple[tuple, int]:
    """(size, number of distinct colours) of a PNG, colours quantised to 5 bits
    per channel, counted in the central `box` (fractions) where the model is."""
    from PIL import Image
    im = Image.open(png).convert("RGB")
    w, h = im.size
    a = np.asarray(im.crop((int(box[0] * w), int(box[1] * h), int(box[2] * w), int(box[3] * h))))
    return (w, h), len(np.unique(a.reshape(-1, 3) >> 3, axis=0))


@pytest.mark.parametrize("kind", ["tet", "hex"])
@pytest.mark.parametrize("what", VIEWS)
def test_view_renders_png_of_requested_size_not_blank(files, fields, tmp_path, kind, what):
    options = {"fields": fields[kind]} if what in ("slice", "map") else {}
    out = render(read_results(files[kind]), what, tmp_path / f"{what}.png", SIZE, **options)
    size, colours = _colours(out)
    assert size == SIZE
    assert colours >= 8, f"{kind} {what}: only {colours} colours in the model region"


def test_blank_png_has_too_few_colours(tmp_path):
    """The non-blank criterion above rejects a uniform picture."""
    from PIL import Image
    Image.new("RGB", SIZE, "white").save(tmp_path / "blank.png")
    assert _colours(tmp_path / "blank.png")[1] == 1


def test_hex_grid_recovered_from_nodes(files):
    """Files written without the hex grid datasets get the same grid back from the nodes."""
    res = read_results(files["hex"])
    stored = results_mesh(res)
    for k in ("cell_size", "grid_index", "grid_origin"):
        del res["mesh"][k]
    recovered = results_mesh(res)
    assert np.array_equal(recovered.grid_index, stored.grid_index)
    assert np.allclose(recovered.cell_size, stored.cell_size, rtol=1e-12)
    assert np.allclose(recovered.grid_origin, stored.grid_origin, rtol=0, atol=1e-12)


def test_plane_fields_match_dipole_of_permeable_sphere(tmp_path_factory):
    """Outside a sphere of susceptibility chi in a uniform B0 the body's field is
    that of a dipole of moment V M with M = 3 chi / (chi + 3) H0, so on the
    field axis |B - B0| / |B0| = 2 chi / (chi + 3) (a / r)^3 (Jackson, Classical
    Electrodynamics, 3rd ed. 1999, sec. 5.11; from memory).  Scaled by the
    meshed / exact volume, the faceted mesh's own moment."""
    chi, a = 3.0, 10.0
    text = (f'title = "sphere"\nlength_unit = "mm"\n[[material]]\nname = "m"\nsusceptibility = {chi}\n'
            f'[[body]]\nname = "s"\nmaterial = "m"\nshape = {{type = "sphere", radius = {a}}}\n'
            'mesh = {element = "tet", size = 3.5}\n[[source]]\ntype = "uniform"\nB = [0.0, 0.0, 1e-3]\n')
    res = read_results(_results(tmp_path_factory, "sphere", text))
    mm = 1e-3
    plane = Plane((0.0, 0.0, 1.5 * a * mm), (0.0, 0.0, 3 * a * mm), (1e-6 * mm, 0.0, 0.0), 3, 1)
    pf = plane_fields(res, plane)                           # samples at r = 2a, 3a, 4a on the axis
    r = np.array([2.0, 3.0, 4.0]) * a
    vol = res["summary"]["bodies"]["s"]["volume"] / (4 / 3 * np.pi * (a * mm) ** 3)
    expected = 2 * chi / (chi + 3) * (a / r) ** 3 * vol
    got = pf.values("ppm")[:, 0] * 1e-6
    assert not pf.inside.any()
    np.testing.assert_allclose(got, expected, rtol=0.02)


def test_report_holds_tensors_outcomes_and_embedded_images(files, reports):
    for kind in ("tet", "hex"):
        res = read_results(files[kind])
        page = reports[kind]
        for d in res["demag"].values():
            if isinstance(d, dict) and "N" in d:
                for v in np.asarray(d["N"]).ravel():
                    assert f"{v:.6f}" in page
        for e in res["summary"]["expect"]:
            assert e["quantity"] in page
        outcomes = re.findall(r'class="(pass|fail)">(pass|FAIL)<', page)
        assert [o[1] for o in outcomes] == ["pass" if e["ok"] else "FAIL" for e in res["summary"]["expect"]]
        assert page.count('src="data:image/png;base64,') >= 4
        for bad in ("http:", "https:", 'src="file', "<script", "<link"):
            assert bad not in page
        assert res["attrs"]["case_sha256"] in page
    assert "1 of 2 hold" in reports["hex"]


def test_report_cautions_only_where_field_reaches_half_millitesla(files, reports):
    """1 mT applied (tet case): cautions; 50 uT near a small plate (hex case,
    peak below 0.5 mT on its probes and map): none.  0.5 mT is the limit usually
    posted for implanted medical devices (common practice)."""
    tet = reports["tet"]
    assert "implanted medical devices" in tet and "pinch" in tet and "local codes" in tet.lower()
    hex_res = read_results(files["hex"])
    assert max(np.linalg.norm(p["B"], axis=1).max() for n, p in hex_res["probes"].items() if n != "attrs") < 0.5e-3
    assert "implanted medical devices" not in reports["hex"]


@pytest.mark.skipif(not CHROMIUM.exists(), reason="/usr/bin/chromium is not installed "
                    "(scripts/setup-env.sh installs it where apt-get is available)")
def test_report_renders_in_headless_chromium(reports, tmp_path):
    page = tmp_path / "report.html"
    page.write_text(reports["tet"], encoding="utf-8")
    shot = tmp_path / "shot.png"
    cmd = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", f"--screenshot={shot}", "--window-size=900,1600",
           page.as_uri()]
    subprocess.run(cmd, capture_output=True, timeout=120, check=False)
    assert shot.exists(), "chromium wrote no screenshot"
    size, colours = _colours(shot, box=(0, 0, 1, 1))
    assert size == (900, 1600)
    assert colours >= 50


@pytest.mark.parametrize("kind", ["tet", "hex"])
def test_vtu_round_trip(files, tmp_path, kind):
    import pyvista as pv
    res = read_results(files[kind])
    out = write_vtu(res, tmp_path / "m.vtu")
    back = pv.read(out)
    assert back.n_cells == len(res["mesh"]["cells"])
    np.testing.assert_array_equal(back.cell_data["M"], res["solution"]["M"])
    np.testing.assert_array_equal(back.cell_data["body_id"], res["mesh"]["body_id"])
    np.testing.assert_array_equal(back.points, res["mesh"]["nodes"])
    want = pv.CellType.TETRA if kind == "tet" else pv.CellType.HEXAHEDRON
    assert set(back.celltypes) == {want}


def test_cli_view_report_export(files, tmp_path, capsys):
    h5 = files["hex"]
    assert cli_main(["view", str(h5), "--what", "probes", "--out", str(tmp_path / "m.png"),
                     "--size", "300,200"]) == 0
    assert _colours(tmp_path / "m.png")[0] == (300, 200)
    assert cli_main(["report", str(h5), "--out", str(tmp_path / "r.html")]) == 0
    assert "<h2>Demagnetising tensors</h2>" in (tmp_path / "r.html").read_text()
    assert cli_main(["export", str(h5), "--vtu", str(tmp_path / "m.vtu")]) == 0
    assert (tmp_path / "m.vtu").stat().st_size > 0
    assert cli_main(["view", str(tmp_path / "missing.h5"), "--out", str(tmp_path / "x.png")]) == 2
    assert "no such results file" in capsys.readouterr().err


def test_viz_script_renders_views(files, tmp_path, capsys):
    import runpy
    import sys
    script = Path(__file__).resolve().parents[1] / "viz" / "render_all.py"
    argv = [str(script), str(files["hex"]), str(tmp_path), "--size", "300,200", "--what", "surface,residual",
            "--no-report"]
    old, sys.argv = sys.argv, argv
    try:
        with pytest.raises(SystemExit) as done:
            runpy.run_path(str(script), run_name="__main__")
    finally:
        sys.argv = old
    assert done.value.code == 0
    assert _colours(tmp_path / "surface.png")[0] == (300, 200) and (tmp_path / "residual.png").exists()
