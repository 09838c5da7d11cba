"""Results files: provenance, bit-for-bit reproducibility, nothing lost on
interruption, refusal of damaged or newer files, `volmag show`; and the
result paths that expectations name."""
import hashlib
import json
import os
import shutil
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

from volmag import cli
from volmag.case import Expectation
from volmag.results import FORMAT_VERSION, ResultsError, read_results
from volmag.run import check_expectations, lookup, parse_quantity

# A small ball (about 650 tetrahedra) with a probe and a demagnetising tensor:
# every part of the results file, in about a second of solving.
SMALL = """\
# a comment, so that one character can change without changing the model
title = "reproducibility check"
[[material]]
name = "iron"
susceptibility = 1000.0
[[body]]
name = "ball"
material = "iron"
shape = { type = "sphere", radius = 1.0 }
mesh = { element = "tet", size = 0.4 }
[[source]]
type = "uniform"
H = [0.0, 0.0, 1000.0]
[[probe]]
name = "axis"
line = { start = [0.0, 0.0, 1.5], end = [0.0, 0.0, 3.0], n = 4 }
[demag]
"""


def volmag(*args, **kw):
    return subprocess.Popen([sys.executable, "-m", "volmag.cli", *map(str, args)], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, **kw)


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """Three separate processes: the same case twice, and the case with one
    character of its comment changed. Returns {name: (case file, results file)}."""
    d = tmp_path_factory.mktemp("repro")
    texts = {"a": SMALL, "b": SMALL, "c": SMALL.replace("a comment", "a commend")}
    procs = {}
    for name, text in texts.items():
        (d / f"{name}.toml").write_text(text)
        procs[name] = volmag("run", d / f"{name}.toml", "--out", d / f"{name}.h5", "--quiet")
    for name, p in procs.items():
        out, err = p.communicate(timeout=300)
        assert p.returncode == 0, err
    return {name: (d / f"{name}.toml", d / f"{name}.h5") for name in texts}


def _arrays(path):
    """Every dataset of a results file, by its HDF5 path."""
    out = {}

    def keep(name, item):
        if isinstance(item, h5py.Dataset):
            out[name] = item[()]

    with h5py.File(path) as f:
        f.visititems(keep)
    return out


def test_same_case_twice_gives_identical_numbers(runs):
    a, b = _arrays(runs["a"][1]), _arrays(runs["b"][1])
    assert a.keys() == b.keys()
    for k in ("solution/M", "solution/H", "solution/B", "mesh/nodes", "mesh/cells", "demag/ball/N",
              "probes/axis/B"):
        assert k in a, k
    for k in a:
        if k == "summary":  # holds the wall-clock times
            continue
        if isinstance(a[k], np.ndarray):
            assert a[k].dtype == b[k].dtype and a[k].tobytes() == b[k].tobytes(), k  # bit for bit
        else:
            assert a[k] == b[k], k
    with h5py.File(runs["a"][1]) as fa, h5py.File(runs["b"][1]) as fb:
        assert fa.attrs["provenance_blas_threads"] == fb.attrs["provenance_blas_threads"]
        assert fa.attrs["provenance_numba_threads"] == fb.attrs["provenance_numba_threads"]


def test_stored_sha256_is_of_the_case_bytes_and_follows_one_character(runs):
    sha = {}
    for name, (case, out) in runs.items():
        res = read_results(out)
        sha[name] = res["attrs"]["case_sha256"]
        assert sha[name] == hashlib.sha256(case.read_bytes()).hexdigest()
        assert res["case"] == case.read_text()  # the case text, verbatim
        assert res["summary"]["case_sha256"] == sha[name]
    assert sha["a"] == sha["b"] != sha["c"]
    # a comment changed: the hash sees it, the numbers do not
    np.testing.assert_array_equal(_arrays(runs["a"][1])["solution/M"], _arrays(runs["c"][1])["solution/M"])


def test_provenance_is_stored(runs):
    attrs = read_results(runs["a"][1])["attrs"]
    for key in ("volmag", "python", "numpy", "scipy", "numba", "gmsh", "h5py", "blas", "blas_threads",
                "numba_threads", "mesh_seed", "mesh_threads"):
        assert f"provenance_{key}" in attrs, key
    import gmsh
    import numpy
    assert attrs["provenance_numpy"] == numpy.__version__ and attrs["provenance_gmsh"] == gmsh.__version__
    # the mesher's settings as gmsh reports them while volmag meshes
    assert attrs["provenance_mesh_seed"] == 1 and attrs["provenance_mesh_threads"] == 1
    assert attrs["format_version"] == FORMAT_VERSION and attrs["expect_total"] == 0


def test_show_prints_the_summary(runs, capsys):
    path = runs["a"][1]
    assert cli.main(["show", str(path)]) == 0
    out = capsys.readouterr().out
    sha = read_results(path)["attrs"]["case_sha256"]
    for words in (sha, "reproducibility check", "mesh seed 1", "numpy", "demagnetising tensor of ball",
                  "probe axis", "unknowns"):
        assert words in out, words
    assert cli.main(["show", str(path), "--json"]) == 0
    assert json.loads(capsys.readouterr().out)["case_sha256"] == sha


def _show_fails(path, capsys, *words):
    assert cli.main(["show", str(path)]) == 2
    err = capsys.readouterr().err
    assert "Traceback" not in err
    for w in words:
        assert w in err, err
    with pytest.raises(ResultsError):
        read_results(path)


def test_newer_format_is_refused(runs, tmp_path, capsys):
    newer = tmp_path / "newer.h5"
    shutil.copy(runs["a"][1], newer)
    with h5py.File(newer, "a") as f:
        f.attrs["format_version"] = FORMAT_VERSION + 1
    _show_fails(newer, capsys, f"format version {FORMAT_VERSION + 1} is newer", "upgrade volmag")


def test_damaged_and_foreign_files_are_reported_not_half_read(runs, tmp_path, capsys):
    data = runs["a"][1].read_bytes()
    cut = tmp_path / "truncated.h5"
    cut.write_bytes(data[: len(data) // 2])
    _show_fails(cut, capsys, "damaged or unreadable")
    garbage = tmp_path / "garbage.h5"
    garbage.write_bytes(b"not hdf5 at all\n" * 100)
    _show_fails(garbage, capsys, "damaged or unreadable")
    foreign = tmp_path / "foreign.h5"
    with h5py.File(foreign, "w") as f:
        f["x"] = np.zeros(3)
    _show_fails(foreign, capsys, "not a volmag results file")
    partial = tmp_path / "partial.h5"
    shutil.copy(runs["a"][1], partial)
    with h5py.File(partial, "a") as f:
        del f["summary"]
    _show_fails(partial, capsys, "incomplete", "summary")
    _show_fails(tmp_path / "absent.h5", capsys, "no such results file")


def test_a_write_that_fails_midway_leaves_the_old_file(runs, tmp_path, monkeypatch):
    """Interrupt the writer after it has begun filling the temporary file."""
    from volmag import results
    from volmag.case import load_case
    from volmag.run import run_case
    target = tmp_path / "out.h5"
    shutil.copy(runs["a"][1], target)
    before = target.read_bytes()
    fill = results._fill

    def fill_then_interrupt(f, run, version):
        fill(f, run, version)
        raise KeyboardInterrupt

    run = run_case(load_case(runs["a"][0]))
    monkeypatch.setattr(results, "_fill", fill_then_interrupt)
    with pytest.raises(KeyboardInterrupt):
        results.write_results(target, run, "test")
    assert target.read_bytes() == before
    assert sorted(p.name for p in tmp_path.iterdir()) == ["out.h5"]  # no temporary file left
    monkeypatch.setattr(results, "_fill", fill)
    results.write_results(target, run, "test")  # and a complete write replaces it
    assert read_results(target)["attrs"]["volmag_version"] == "test"


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
def test_a_run_interrupted_mid_solve_keeps_the_previous_results(runs, tmp_path, sig):
    case = tmp_path / "bigger.toml"  # about 3000 tetrahedra: several seconds of solving
    case.write_text(SMALL.replace('size = 0.4 }', 'size = 0.3, surface_size = 0.15 }'))
    out = tmp_path / "results.h5"
    shutil.copy(runs["a"][1], out)
    before = out.read_bytes()
    p = volmag("run", case, "--out", out, "--progress", stdin=subprocess.DEVNULL)
    seen = []
    for line in p.stderr:  # wait until the solve has started
        seen.append(line)
        if "assembling" in line:
            break
    assert p.poll() is None, "".join(seen)
    time.sleep(0.3)
    os.kill(p.pid, sig)
    stdout, rest = p.communicate(timeout=120)
    err = "".join(seen) + rest
    assert p.returncode == 130, err
    assert "interrupted" in err and "Traceback" not in err, err
    assert out.read_bytes() == before
    assert sorted(x.name for x in tmp_path.iterdir()) == ["bigger.toml", "results.h5"]  # no .part file


# ---------------------------------------------------------------------------
# Result paths (the grammar expectations use)

SUMMARY = {
    "solver": {"iterations": 3, "residual": 1e-12, "unknowns": 10, "seconds": 0.5, "converged": True},
    "bodies": {"bar": {"volume": 2e-9, "mean_M": [1.0, 2.0, 3.0], "moment": [4.0, 5.0, 6.0]}},
    "demag": {"bar": {"N": [[0.1, 0.01, 0.0], [0.01, 0.3, 0.0], [0.0, 0.0, 0.6]], "chi": 15.0,
                      "apparent_susceptibility": [[8.0, 0.0, 0.0], [0.0, 3.0, 0.0], [0.0, 0.0, 1.5]],
                      "fluxmetric": {"axis": "z", "N": 0.55}},
              "dry": {"N": [[0.2, 0, 0], [0, 0.3, 0], [0, 0, 0.5]], "chi": 0.0}},
    "probes": {"p": {"points": 3, "B": [0.0, 0.0, 2.0], "dB": [0.0, 0.0, 1.0], "max_abs_B": 3.0}},
}
PROBES = {"p": {"points": np.zeros((3, 3)), "H": np.zeros((3, 3)),
                "B": np.array([[0, 0, 1.0], [0, 0, 2.0], [0, 0, 3.0]]),
                "B_applied": np.full((3, 3), 0.5)}}


@pytest.mark.parametrize("path, value", [
    ("solver.iterations", 3), ("solver.converged", 1), ("bodies.bar.volume", 2e-9),
    ("bodies.bar.mean_M.y", 2.0), ("bodies.bar.moment.z", 6.0), ("demag.bar.N.xy", 0.01),
    ("demag.bar.N.zz", 0.6), ("demag.bar.chi.xx", 15.0), ("demag.bar.chi.xz", 0.0),
    ("demag.bar.apparent_susceptibility.yy", 3.0), ("demag.bar.fluxmetric", 0.55),
    ("probes.p.B.z", 2.0), ("probes.p.max_abs_B", 3.0),
    ("probes.p.B.z[2]", 3.0), ("probes.p.dB.z[0]", 0.5), ("probes.p.B_applied.x[1]", 0.5),
])
def test_lookup(path, value):
    assert lookup(SUMMARY, path, PROBES) == value


@pytest.mark.parametrize("path, words", [
    ("bodies.rod.moment.z", "no body 'rod'"),
    ("demag.dry.apparent_susceptibility.xx", "chi = 0"),
    ("probes.p.B.z[3]", "has 3 points"),
    ("bodies.bar.mean_M", "needs a component"),
    ("bodies.bar.mean_M.z[1]", "only probe values"),
    ("solver.time", "use solver."),
    ("bodies.bar.weight.z", "one of volume, mean_M, moment"),
])
def test_lookup_says_what_is_missing(path, words):
    with pytest.raises(KeyError) as info:
        lookup(SUMMARY, path, PROBES)
    assert words in info.value.args[0]


def test_parse_quantity():
    q = parse_quantity("probes.sensor.dB.z[12]")
    assert (q.root, q.name, q.field, q.component, q.index) == ("probes", "sensor", "dB", (2,), 12)
    assert parse_quantity("demag.s.N.yx").component == (1, 0)


def test_expectations_outcomes():
    exps = [Expectation("probes.p.B.z[2]", 3.1, rel_tol=0.05), Expectation("demag.bar.N.zz", 0.5, abs_tol=0.01),
            Expectation("bodies.gone.volume", 1.0, rel_tol=0.1, line=7)]
    out = check_expectations(SUMMARY, exps, PROBES)
    assert [e["ok"] for e in out] == [True, False, False]
    assert out[0]["tolerance"] == pytest.approx(0.155) and out[1]["tolerance"] == 0.01
    assert out[2]["got"] is None and "no body 'gone'" in out[2]["error"] and out[2]["line"] == 7
    table = cli.format_expectations(out)
    assert "1 of 3 pass" in table and table.count("FAIL") == 2 and "error: " in table
