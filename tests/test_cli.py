"""Command line and results file contracts (DESIGN §4)."""
import json
import subprocess
import sys
from pathlib import Path

import h5py
import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]


def volmag(*args, cwd=None):
    return subprocess.run([sys.executable, "-m", "volmag.cli", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd)


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    out = tmp_path_factory.mktemp("demo") / "demo.h5"
    r = volmag("run", ROOT / "cases" / "drilled_sample.toml", "--json", "--out", out)
    return r, out


def test_demo_json_has_every_key(demo):
    r, _ = demo
    assert r.returncode == 0, r.stderr
    s = json.loads(r.stdout)
    for key in ("title", "converged", "solver", "bodies", "demag", "expect"):
        assert key in s
    for key in ("method", "unknowns", "iterations", "residual", "seconds"):
        assert key in s["solver"]
    for key in ("volume", "mean_M", "moment"):
        assert key in s["bodies"]["sample"]
    N = np.array(s["demag"]["sample"]["N"])
    assert N.shape == (3, 3) and s["demag"]["sample"]["chi"] == 15.0
    # a 4 x 2 x 1 bar: thinnest along z, so N_zz > N_yy > N_xx
    assert N[2, 2] > N[1, 1] > N[0, 0] > 0


def test_results_file_layout(demo):
    _, out = demo
    with h5py.File(out) as f:
        for key in ("volmag_version", "case_sha256", "title", "length_unit", "created"):
            assert key in f.attrs
        assert "[[body]]" in f["case"][()].decode()
        for key in ("mesh/nodes", "mesh/cells", "mesh/body_id", "solution/M", "solution/H",
                    "solution/B", "demag/sample/N", "probes/above/points", "probes/above/H",
                    "probes/above/B", "probes/above/B_applied", "solver/residual_history"):
            assert key in f, key
        assert f["solution/M"].shape == (len(f["mesh/cells"]), 3)
        for key in ("method", "unknowns", "iterations", "residual", "seconds"):
            assert key in f["solver"].attrs


def test_bad_case_exits_2_without_traceback(tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text('title = "x"\n[[material]]\nname = "m"\nsusceptibility = -3.0\n')
    r = volmag("run", bad, "--out", tmp_path / "r.h5")
    assert r.returncode == 2
    assert "Traceback" not in r.stderr and "susceptibility" in r.stderr and ":4:" in r.stderr
    assert not (tmp_path / "r.h5").exists()


def test_failed_expectation_exits_1(tmp_path):
    """N of a sphere is 1/3 (e.g. Osborn, Phys. Rev. 1945); expecting 0.5 must fail."""
    case = tmp_path / "sphere.toml"
    case.write_text('title = "sphere"\n[[material]]\nname = "m"\nsusceptibility = 0.0\n'
                    '[[body]]\nname = "s"\nmaterial = "m"\nshape = {type = "sphere", radius = 1.0}\n'
                    'mesh = {element = "tet", size = 0.4}\n[demag]\n'
                    '[[expect]]\nquantity = "demag.s.N.zz"\nvalue = 0.3333333\nrel_tol = 0.01\n'
                    '[[expect]]\nquantity = "demag.s.N.xx"\nvalue = 0.5\nrel_tol = 0.01\n')
    r = volmag("run", case, "--json", "--out", tmp_path / "s.h5")
    assert r.returncode == 1, r.stderr
    outcome = [e["ok"] for e in json.loads(r.stdout)["expect"]]
    assert outcome == [True, False]
