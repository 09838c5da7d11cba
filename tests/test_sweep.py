"""Parameter sweeps: planning points from key paths, running them on a local
Dask cluster, resuming, surviving a dead worker, the table and its plot.

The physical check is the sphere: in a uniform field H0 a sphere of
susceptibility chi is magnetised uniformly, M = chi H0 / (1 + chi/3)
(Jackson, Classical Electrodynamics, 3rd ed., 1999, section 5.10; the
demagnetising factor 1/3 of Osborn, Phys. Rev. 67, 351 (1945))."""
import hashlib
import os
import signal
import subprocess
import sys
import threading
import time
import tomllib
from pathlib import Path

import cloudpickle
import h5py
import numpy as np
import pytest

from volmag import cli
from volmag import sweep as sw
from volmag.case import CaseError, parse_case
from volmag.sweeptable import plot_sweep, read_table
from volmag.tomlout import to_toml

ROOT = Path(__file__).resolve().parents[1]
# Faults are injected into the workers by functions of this module: send them by value.
cloudpickle.register_pickle_by_value(sys.modules[__name__])

SPHERE = """\
# a ball in a unit field along z
title = "ball"

[[material]]
name = "sample"
susceptibility = 10.0

[[body]]
name = "ball"
material = "sample"
shape = { type = "sphere", radius = 1.0 }
mesh = { element = "tet", size = %s }

[[source]]
type = "uniform"
H = [0.0, 0.0, 1.0]
"""
# ~800 nodes with a refined surface: mean M within 0.5 % of the exact value (measured)
FINE = SPHERE % "0.5, surface_size = 0.15"
COARSE = SPHERE % "0.5"   # ~300 nodes, for the mechanics
CHIS = [0.5, 5.0, 50.0]


@pytest.fixture(scope="module")
def client():
    with sw.cluster(workers=2) as c:
        yield c


@pytest.fixture(scope="module")
def sphere_sweep(client, tmp_path_factory):
    folder = tmp_path_factory.mktemp("sphere")
    case = folder / "ball.toml"
    case.write_text(FINE + f'\n[sweep]\nset = {{ "material.sample.susceptibility" = {CHIS} }}\n')
    rows = sw.run_sweep(sw.plan(case), folder / "cluster", client)
    return case, folder, rows


# ---------------------------------------------------------------------------
# Planning (no cluster)

def test_values_of_set():
    assert sw.parse_set("material.sample.susceptibility=1,10,1e3") == \
        ("material.sample.susceptibility", [1, 10, 1e3])
    assert sw.parse_set("body.b.position=[0, 0, 1], [0, 0, 2]") == ("body.b.position", [[0, 0, 1], [0, 0, 2]])
    assert sw.parse_set("body.b.shape.type = box, sphere") == ("body.b.shape.type", ["box", "sphere"])
    with pytest.raises(sw.SweepError):
        sw.parse_set("material.sample.susceptibility")


def test_key_paths_by_name_and_index():
    doc = tomllib.loads(COARSE)
    assert sw.resolve(doc, "material.sample.susceptibility") == ("material", 0, "susceptibility")
    assert sw.resolve(doc, "material[0].susceptibility") == ("material", 0, "susceptibility")
    assert sw.resolve(doc, "body.ball.shape.radius") == ("body", 0, "shape", "radius")
    assert sw.resolve(doc, "source[0].H[2]") == ("source", 0, "H", 2)
    assert sw.resolve(doc, "body.ball.mesh.surface_size") == ("body", 0, "mesh", "surface_size")  # added
    with pytest.raises(sw.SweepError, match="is not an array, no index 0"):
        sw.resolve(doc, "body.ball.position[0]")  # absent: nothing to index
    with pytest.raises(sw.SweepError, match="no table named 'steel'.*names: sample"):
        sw.resolve(doc, "material.steel.susceptibility")
    with pytest.raises(sw.SweepError, match="has 3 elements, no index 3"):
        sw.resolve(doc, "source[0].H[3]")


def test_grid_zip_and_the_point_texts(tmp_path):
    case = tmp_path / "ball.toml"
    case.write_text(COARSE)
    sets = {"material.sample.susceptibility": [1, 10], "body.ball.shape.radius": [1.0, 2.0]}
    grid = sw.plan(case, sets)
    assert [p.values for p in grid.points] == [(1, 1.0), (1, 2.0), (10, 1.0), (10, 2.0)]
    zipped = sw.plan(case, sets, "zip")
    assert [p.values for p in zipped.points] == [(1, 1.0), (10, 2.0)]
    with pytest.raises(sw.SweepError, match="one length"):
        sw.plan(case, {"material.sample.susceptibility": [1, 10, 100], "body.ball.shape.radius": [1.0]}, "zip")
    p = grid.points[3]
    c = parse_case(p.text)
    assert c.sha256 == p.sha256 == hashlib.sha256(p.text.encode()).hexdigest()
    assert c.materials["sample"].susceptibility == 10 and c.bodies[0].shape.radius == 2.0
    # the same sweep planned again gives the same points (resuming relies on it)
    assert [q.sha256 for q in sw.plan(case, sets).points] == [q.sha256 for q in grid.points]
    assert len({q.sha256 for q in grid.points}) == 4


def test_sweep_table_in_the_case_file(tmp_path):
    case = tmp_path / "ball.toml"
    case.write_text(COARSE + '\n[sweep]\nmode = "zip"\n[sweep.set]\n'
                             '"material.sample.susceptibility" = [1, 2]\nbody.ball.shape.radius = [1.0, 1.5]\n')
    plan = sw.plan(case)
    assert plan.keys == ("material.sample.susceptibility", "body.ball.shape.radius") and plan.mode == "zip"
    assert "[sweep]" not in plan.points[0].text
    parse_case(case.read_text())  # a single run accepts the table and ignores it
    case.write_text(COARSE + '\n[sweep]\nmode = "diagonal"\n')
    with pytest.raises(CaseError) as e:
        sw.plan(case)
    assert e.value.key == "sweep.mode" and e.value.line == 19


def test_an_impossible_point_names_the_key_and_line_of_the_case_file(tmp_path):
    case = tmp_path / "ball.toml"
    case.write_text(COARSE)
    plan = sw.plan(case, {"material.sample.susceptibility": [1.0, -2.0]})
    assert plan.points[0].error is None
    assert plan.points[1].error == f"{case}:6: material[0].susceptibility: must be > -1 (got -2)"


@pytest.mark.parametrize("args, message", [
    (["--set", "material.steel.susceptibility=1,2"], "no table named 'steel'"),
    ([], "nothing to sweep"),
    (["--set", "material.sample.susceptibility=-2,-3"], "no point of the sweep is a valid case"),
    (["--set", "material.sample.susceptibility=1,2", "--set", "body.ball.shape.radius=1", "--zip"], "one length"),
])
def test_a_sweep_that_cannot_start_exits_2(args, message, tmp_path, capsys):
    case = tmp_path / "ball.toml"
    case.write_text(COARSE)
    assert cli.main(["sweep", str(case), "--out", str(tmp_path / "out"), "--quiet"] + args) == 2
    err = capsys.readouterr().err
    assert message in err and "Traceback" not in err
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("name", sorted(p.name for p in (ROOT / "cases").glob("*.toml")))
def test_case_documents_survive_the_way_out_to_toml(name):
    """Every library case written back by to_toml reads as the same document
    (types included) and the same case."""
    text = (ROOT / "cases" / name).read_text()
    doc = tomllib.loads(text)
    again = tomllib.loads(to_toml(doc))
    assert _typed(again) == _typed(doc)
    a = parse_case(text, str(ROOT / "cases" / name))
    b = parse_case(to_toml(doc), str(ROOT / "cases" / name))
    for field in ("title", "materials", "bodies", "sources", "probes", "solver", "demag"):
        assert repr(getattr(a, field)) == repr(getattr(b, field)), field
    assert [(e.quantity, e.value, e.rel_tol, e.abs_tol) for e in a.expects] == \
        [(e.quantity, e.value, e.rel_tol, e.abs_tol) for e in b.expects]


def test_awkward_strings_survive_the_way_out_to_toml():
    doc = {"title": 'quote " backslash \\ tab \t newline \n del \x7f é', "key with space": {"a.b": [1, 2.5]}}
    assert _typed(tomllib.loads(to_toml(doc))) == _typed(doc)


def _typed(x):
    if isinstance(x, dict):
        return {k: _typed(v) for k, v in x.items()}
    if isinstance(x, list):
        return [_typed(v) for v in x]
    return (type(x).__name__, x)


def test_input_files_are_read_once_and_laid_out_for_a_worker(tmp_path):
    data = tmp_path / "shared" / "steel.csv"
    data.parent.mkdir()
    data.write_text("H,B\n0,0\n")
    (tmp_path / "cases").mkdir()
    case = tmp_path / "cases" / "m.toml"
    case.write_text('title = "t"\n[[material]]\nname = "steel"\nbh_curve = "../shared/steel.csv"\n')
    inputs = sw._inputs([sw.Point(0, (), case.read_text(), "")], case.parent)
    assert inputs == (("../shared/steel.csv", b"H,B\n0,0\n"),)
    folder = sw._lay_out(tmp_path / "worker", inputs)
    assert (folder / "../shared/steel.csv").resolve().read_bytes() == b"H,B\n0,0\n"
    assert (tmp_path / "worker") in (folder / "../shared/steel.csv").resolve().parents


# ---------------------------------------------------------------------------
# On the cluster

def test_sphere_sweep_on_two_workers_is_exact_and_matches_a_serial_run(sphere_sweep, client):
    case, folder, rows = sphere_sweep
    assert len(client.scheduler_info()["workers"]) == 2
    assert [r["status"] for r in rows] == ["ok"] * len(CHIS)
    for r in rows:
        chi = r["material.sample.susceptibility"]
        exact = chi / (1 + chi / 3)  # H0 = 1 A/m (Jackson 3rd ed. 5.10)
        assert r["bodies.ball.mean_M.z"] == pytest.approx(exact, rel=0.01), chi
        assert abs(r["bodies.ball.mean_M.x"]) < 1e-3 * exact
    # the same sweep, one point after the other in a fresh process with one numeric thread
    env = dict(os.environ, **{v: "1" for v in sw.THREAD_VARIABLES})
    script = "import sys; from volmag import sweep as sw; sw.run_sweep(sw.plan(sys.argv[1]), sys.argv[2])"
    subprocess.run([sys.executable, "-c", script, case, folder / "serial"], env=env, check=True, timeout=300)
    serial = read_table(folder / "serial")
    cluster = read_table(folder / "cluster")
    assert list(serial["case_sha256"]) == [r["case_sha256"] for r in rows]
    timing = ("seconds", "solver.seconds")
    for col in cluster["columns"]:
        if cluster[col].dtype.kind == "f" and col not in timing:
            assert np.array_equal(cluster[col], serial[col], equal_nan=True), col
    for sha in serial["case_sha256"]:
        with h5py.File(folder / "cluster" / "points" / f"{sha}.h5") as a, \
                h5py.File(folder / "serial" / "points" / f"{sha}.h5") as b:
            assert np.array_equal(a["solution/M"][()], b["solution/M"][()])
            assert a.attrs["provenance_numba_threads"] == b.attrs["provenance_numba_threads"] == 1


def _patch_runs(fail_chi=None, delay=0.0):
    """In a worker: make runs of susceptibility `fail_chi` raise (an injected
    fault) and every run wait `delay` s first; no arguments restore run_case."""
    import volmag.run
    original = volmag.run.__dict__.setdefault("_unpatched_run_case", volmag.run.run_case)

    def patched(case, *args, **kwargs):
        time.sleep(delay)
        if case.materials["sample"].susceptibility == fail_chi:
            raise ValueError("injected fault")
        return original(case, *args, **kwargs)
    volmag.run.run_case = patched if (fail_chi is not None or delay) else original


def test_failed_points_are_recorded_and_only_they_run_again(client, tmp_path, capsys):
    case = tmp_path / "ball.toml"
    case.write_text(COARSE)
    out = tmp_path / "out"
    argv = ["sweep", str(case), "--set", "material.sample.susceptibility=2,20,-2", "--out", str(out),
            "--scheduler", client.scheduler.address, "--quiet"]
    client.run(_patch_runs, 20.0)
    try:
        assert cli.main(argv) == 1
    finally:
        client.run(_patch_runs)
    first = {r["material.sample.susceptibility"]: r for r in _csv_rows(out)}
    assert [first[c]["status"] for c in ("2", "20", "-2")] == ["ok", "failed", "failed"]
    assert first["20"]["error"] == "injected fault"
    assert "material[0].susceptibility: must be > -1 (got -2)" in first["-2"]["error"]
    assert "3 points: 1 ok, 2 failed" in capsys.readouterr().out
    files = {p.name: p.stat().st_mtime_ns for p in (out / "points").glob("*.h5")}
    assert list(files) == [first["2"]["case_sha256"] + ".h5"]

    time.sleep(0.05)
    assert cli.main(argv) == 1
    again = {r["material.sample.susceptibility"]: r for r in _csv_rows(out)}
    assert [again[c]["status"] for c in ("2", "20", "-2")] == ["ok", "ok", "failed"]
    assert [again[c]["resumed"] for c in ("2", "20")] == ["1", "0"]   # only the failed point ran
    assert all((out / "points" / n).stat().st_mtime_ns == t for n, t in files.items())
    assert len(list((out / "points").glob("*.h5"))) == 2
    assert "3 points: 2 ok, 1 failed (1 from earlier runs)" in capsys.readouterr().out


def _csv_rows(folder):
    import csv
    with open(folder / "sweep.csv") as f:
        return list(csv.DictReader(f))


def test_a_worker_killed_mid_sweep_has_its_point_run_again(client, tmp_path):
    case = tmp_path / "ball.toml"
    case.write_text(COARSE)
    plan = sw.plan(case, {"material.sample.susceptibility": [1.0, 3.0, 5.0, 7.0]})
    pids = client.run(os.getpid)
    client.run(_patch_runs, delay=2.0)  # each run long enough to be killed in the middle
    result = {}
    runner = threading.Thread(target=lambda: result.update(rows=sw.run_sweep(plan, tmp_path / "out", client)))
    runner.start()
    victim = None
    deadline = time.monotonic() + 60
    while victim is None and time.monotonic() < deadline:
        busy = [w for w, tasks in client.processing().items() if tasks]
        victim = busy[0] if busy else None
        time.sleep(0.2)
    assert victim is not None
    time.sleep(0.5)   # inside the slowed run
    os.kill(pids[victim], signal.SIGKILL)
    runner.join(timeout=120)
    assert not runner.is_alive()
    assert [r["status"] for r in result["rows"]] == ["ok"] * 4
    client.wait_for_workers(2, timeout=60)
    assert pids[victim] not in client.run(os.getpid).values()
    client.run(_patch_runs)   # leave no slowed worker behind


def test_sweep_plot(sphere_sweep, tmp_path):
    _, folder, _ = sphere_sweep
    png = plot_sweep(folder / "cluster", "material.sample.susceptibility", "bodies.ball.mean_M.z",
                     tmp_path / "plot.png")
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n" and png.stat().st_size > 10_000
    with pytest.raises(ValueError, match="not a column"):
        plot_sweep(folder / "cluster", "material.sample.susceptibility", "bodies.ball.mean_M.w",
                   tmp_path / "x.png")
    assert cli.main(["sweep-plot", str(folder / "cluster"), "--x", "material.sample.susceptibility",
                     "--y", "demag.ball.N.zz"]) == 2   # not computed: no [demag] in the case
    assert cli.main(["sweep-plot", str(folder / "cluster"), "--x", "material.sample.susceptibility",
                     "--y", "solver.iterations", "--out", str(tmp_path / "its.png")]) == 0
    assert (tmp_path / "its.png").is_file()
    h5 = read_table(folder / "cluster")
    assert list(h5["material.sample.susceptibility"]) == CHIS and list(h5["status"]) == ["ok"] * len(CHIS)
