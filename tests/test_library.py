"""The case library and `volmag check`; the case-file reference against the
schema the parser accepts; every malformed case exits 2 from the command line."""
import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

from volmag import case as schema
from volmag import cli
from volmag.run import QUANTITY_FIELDS, SOLVER_QUANTITIES
from volmag.units import LENGTH_UNITS

from test_case import MALFORMED

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs" / "case-files.md"


def test_every_case_in_the_library_passes():
    """Each case states its expectations with their published source (see the
    comments at the top of each file)."""
    cases = sorted(p.name for p in (ROOT / "cases").glob("*.toml"))
    for name in ("drilled_sample.toml", "sphere.toml", "ellipsoid.toml", "steel_column.toml",
                 "two_spheres.toml", "coil_pair_column.toml", "ball_magnet_plate.toml"):
        assert name in cases
    r = subprocess.run([sys.executable, "-m", "volmag.cli", "check", ROOT / "cases"], capture_output=True,
                       text=True, timeout=600)
    assert r.returncode == 0, r.stdout + r.stderr
    lines = r.stdout.splitlines()
    for name in cases:
        (line,) = [ln for ln in lines if ln.startswith(name + " ")]
        assert line.split()[1] == "pass", r.stdout
    assert f"{len(cases)} cases: {len(cases)} pass, 0 FAIL, 0 ERROR" in lines[-1]
    # the cases with a published formula or bound check every expectation they state
    for name in ("sphere.toml", "ellipsoid.toml", "steel_column.toml", "two_spheres.toml",
                 "coil_pair_column.toml", "ball_magnet_plate.toml"):
        (line,) = [ln for ln in lines if ln.startswith(name + " ")]
        passed, total = map(int, re.search(r"(\d+)/(\d+)", line).groups())
        assert passed == total >= 3, line


SPHERE = """\
title = "sphere at chi = 0"
[[material]]
name = "m"
susceptibility = 0.0
[[body]]
name = "s"
material = "m"
shape = {type = "sphere", radius = 1.0}
mesh = {element = "tet", size = 0.4}
[demag]
[[expect]]
quantity = "demag.s.N.zz"
value = %s
rel_tol = 0.02
"""


def test_check_reports_each_case_and_exits_by_the_worst(tmp_path, capsys):
    """N = 1/3 for a sphere (Osborn, Phys. Rev. 1945); 0.5 must fail."""
    (tmp_path / "a_ok.toml").write_text(SPHERE % "0.3333333333333333")
    (tmp_path / "b_wrong.toml").write_text(SPHERE % "0.5")
    (tmp_path / "notes.txt").write_text("not a case")
    assert cli.main(["check", str(tmp_path)]) == 1
    out = capsys.readouterr().out.splitlines()
    assert out[0].split()[:3] == ["a_ok.toml", "pass", "1/1"]
    assert out[1].split()[:3] == ["b_wrong.toml", "FAIL", "0/1"]
    assert "FAIL demag.s.N.zz" in out[2] and "expected 0.5" in out[2]
    assert out[-1].startswith("2 cases: 1 pass, 1 FAIL, 0 ERROR")

    (tmp_path / "c_broken.toml").write_text(SPHERE.replace("radius = 1.0", "radius = -1.0") % "0.5")
    assert cli.main(["check", str(tmp_path), "--json"]) == 2
    report = json.loads(capsys.readouterr().out)
    assert (report["ok"], report["pass"], report["FAIL"], report["ERROR"]) == (False, 1, 1, 1)
    broken = report["cases"][2]
    assert broken["outcome"] == "ERROR" and "body[0].shape.radius" in broken["error"]

    (tmp_path / "b_wrong.toml").unlink()
    (tmp_path / "c_broken.toml").unlink()
    out_dir = tmp_path / "results"
    assert cli.main(["check", str(tmp_path), "--out", str(out_dir)]) == 0
    assert (out_dir / "a_ok.h5").is_file()


def test_check_of_an_empty_or_missing_folder_is_an_error(tmp_path, capsys):
    assert cli.main(["check", str(tmp_path)]) == 2
    assert "no case files" in capsys.readouterr().err
    assert cli.main(["check", str(tmp_path / "absent")]) == 2
    assert "not a folder" in capsys.readouterr().err


@pytest.mark.parametrize("text, key", [(m[1], m[2]) for m in MALFORMED], ids=[m[0] for m in MALFORMED])
def test_malformed_case_exits_2_naming_the_key(text, key, tmp_path, capsys):
    f = tmp_path / "model.toml"
    f.write_text(text)
    assert cli.main(["run", str(f), "--out", str(tmp_path / "r.h5"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert key in err and "Traceback" not in err, err
    assert not (tmp_path / "r.h5").exists()


def test_open_surface_exits_2(tmp_path, capsys):
    trimesh = pytest.importorskip("trimesh")
    cube = trimesh.creation.box(extents=[1, 1, 1])
    trimesh.Trimesh(cube.vertices, cube.faces[:-2]).export(tmp_path / "open.stl")
    (tmp_path / "model.toml").write_text(MALFORMED[0][1].replace(
        '{type = "sphere", radius = "3"}', '{type = "file", path = "open.stl"}'))
    assert cli.main(["run", str(tmp_path / "model.toml"), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert "body[0].shape.path" in err and "Traceback" not in err


# ---------------------------------------------------------------------------
# docs/case-files.md documents every key the parser accepts

def _sections(text: str) -> dict:
    """Reference sections by table path: '### `[[body]]`' -> 'body',
    '### `(top level)`' -> ''; each up to the next heading of any level."""
    out, name = {}, None
    for line in text.splitlines():
        m = re.match(r"^(#+) ", line)
        if m:
            label = re.match(r"^### `([^`]+)`", line)
            name = None if not label else label.group(1).strip("[]").replace("(top level)", "")
            if name is not None:
                out[name] = []
            continue
        if name is not None:
            out[name].append(line)
    return {k: "\n".join(v) for k, v in out.items()}


def _documented_keys(section: str) -> set:
    return set(re.findall(r"^\| `([A-Za-z_]+)` \|", section, flags=re.M))


def undocumented(keys: dict, text: str) -> list:
    """(table, key) pairs of `keys` (table -> accepted keys) missing from the
    reference text, plus keys it documents that the parser does not accept."""
    sections = _sections(text)
    missing = [(t, "(section)") for t in keys if t not in sections]
    for table, accepted in keys.items():
        doc = _documented_keys(sections.get(table, ""))
        missing += [(table, k) for k in accepted if k not in doc]
        missing += [(table, f"{k} (documented, not accepted)") for k in doc if k not in accepted]
    return missing


def test_reference_documents_every_key_of_the_schema():
    assert undocumented(schema.KEYS, DOCS.read_text()) == []


def test_reference_check_can_fail():
    text = DOCS.read_text()
    extra = dict(schema.KEYS, solver=schema.KEYS["solver"] + ("preconditioner",))
    assert undocumented(extra, text) == [("solver", "preconditioner")]
    fewer = dict(schema.KEYS, demag=("bodies",))
    assert undocumented(fewer, text) == [("demag", "fluxmetric (documented, not accepted)")]


def test_reference_documents_every_choice_and_result_path():
    text = DOCS.read_text()
    sections = _sections(text)
    choices = {"": LENGTH_UNITS, "body.shape": schema.SHAPE_SIZES, "body.mesh": schema.MESH_ELEMENTS,
               "source": schema.SOURCE_TYPES, "solver": schema.SOLVER_METHODS, "demag": schema.AXES}
    for table, values in choices.items():
        for v in values:
            assert f'"{v}"' in sections[table], (table, v)
    for kind, sizes in schema.SHAPE_SIZES.items():
        row = re.search(rf'^\| `"{kind}"` \| (.*)$', sections["body.shape"], flags=re.M)
        assert row and all(f"`{k}`" in row.group(1) for k in sizes), kind
    for q in SOLVER_QUANTITIES:
        assert f"`solver.{q}`" in text, q
    for root, fields in QUANTITY_FIELDS.items():
        for f in fields:
            assert re.search(rf"`{root}\.<\w+>\.{f}[`.]", text), (root, f)
