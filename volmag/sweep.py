"""Parameter sweeps: one case file, many points, solved on a Dask cluster.

A sweep sets case keys to lists of values (``--set KEY=V1,V2`` or a
``[sweep]`` table) and combines them as a grid (every combination) or zipped
(the i-th value of each key together).  A key is a path into the case file:
``material.sample.susceptibility`` (the ``[[material]]`` named sample),
``body.cabinet.position[0]``, or with indices, ``material[0].susceptibility``.

Each point is the case document with its values set, written out as TOML
(:mod:`volmag.tomlout`) and checked by :func:`volmag.case.parse_case` before
any point runs; its identity is the SHA-256 of that text.  Points run one
per Dask task, one solver thread per worker process (gmsh keeps
process-global state, and one thread makes the numbers the same bit for bit
wherever a point runs).  Each finished point's results file is stored as
``DIR/points/<sha256>.h5`` the moment it arrives, so a sweep run again
resumes: points with a results file are read back, the rest (new or failed
ones) run.  The table of all points goes to ``DIR/sweep.csv`` and
``DIR/sweep.h5`` (:mod:`volmag.sweeptable`).

Dask itself runs a task again when its worker dies (up to its
`allowed-failures`); `retries` covers unexpected errors inside a task (not
case or solver errors, which are recorded as the point's failure).
"""
from __future__ import annotations

import contextlib
import copy
import hashlib
import itertools
import json
import logging
import math
import os
import re
import signal
import tempfile
import time
import tomllib
from dataclasses import dataclass
from pathlib import Path

from distributed.diagnostics.plugin import WorkerPlugin

from . import __version__
from .case import KEYS, CaseError, _Context, _format_path, key_lines, parse_case
from .machine import usable_cores
from .progress import QUIET, Progress
from .run import summary_json
from .sweeptable import scalars, store, write_table
from .tomlout import to_toml, toml_value

MODES = ("grid", "zip")
#: Case keys whose string values name files (relative to the case file's folder).
FILE_KEYS = ("bh_curve", "path")
#: Point status: ok; expect-failed and not-converged have results all the same;
#: failed has none (invalid, or it raised) and runs again when the sweep is resumed.
STATUSES = ("ok", "expect-failed", "not-converged", "failed", "not-run")
#: Thread pools of the numeric libraries, one thread each in a sweep worker.
THREAD_VARIABLES = ("NUMBA_NUM_THREADS", "OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS")
TASK_RETRIES = 2
MAX_POINTS = 100_000
_PART = re.compile(r"^([A-Za-z0-9_-]+)((?:\[\d+\])*)$")


class SweepError(ValueError):
    """A sweep that cannot be planned: a key that addresses nothing, a value
    list that cannot be read, zipped lists of different lengths."""


@dataclass(frozen=True)
class Point:
    """One point of a sweep: `values` in the order of :attr:`Sweep.keys`;
    `text` the point's case text and `sha256` its digest; `error` why it
    cannot run (its case error), or None."""
    index: int
    values: tuple
    text: str
    sha256: str
    error: str | None = None


@dataclass(frozen=True)
class Sweep:
    """A planned sweep of the case file at `case_path` (`case_text` verbatim).
    `base` is its document without the [sweep] table; `paths` the swept
    `keys` resolved to concrete key paths of `base`; `inputs` the files the
    points read, as (relative path, bytes)."""
    case_path: str
    case_text: str
    keys: tuple
    mode: str
    base: dict
    paths: tuple
    points: tuple
    inputs: tuple


# ---------------------------------------------------------------------------
# Planning

def parse_set(text: str) -> tuple[str, list]:
    """``KEY=V1,V2,...`` -> (KEY, [values]). Values are TOML values (numbers,
    quoted strings, arrays such as [1, 2, 3]); a word that is not one is
    taken as a string."""
    key, sep, rhs = text.partition("=")
    key = key.strip()
    if not sep or not key or not rhs.strip():
        raise SweepError(f"--set {text!r}: expected KEY=V1,V2,...")
    try:
        values = tomllib.loads(f"v = [{rhs}]")["v"]
    except tomllib.TOMLDecodeError:
        values = [_word(v) for v in _split_top(rhs)]
    if not values:
        raise SweepError(f"--set {text!r}: no values")
    return key, values


def _word(text: str):
    try:
        return tomllib.loads(f"v = {text}")["v"]
    except tomllib.TOMLDecodeError:
        return text.strip()


def _split_top(text: str) -> list[str]:
    """Split at commas outside brackets and quotes."""
    out, depth, quote, start = [], 0, None, 0
    for i, c in enumerate(text):
        if quote:
            quote = None if c == quote else quote
        elif c in "\"'":
            quote = c
        elif c in "[{":
            depth += 1
        elif c in "]}":
            depth -= 1
        elif c == "," and depth == 0:
            out.append(text[start:i])
            start = i + 1
    out.append(text[start:])
    return [p.strip() for p in out if p.strip()]


def sweep_table(doc: dict, text: str, file: str) -> tuple[dict, str | None]:
    """The ``[sweep]`` table of a case document: ({key: [values]}, mode or
    None). Problems are :class:`CaseError` with key path and line. Keys may be
    quoted (``"material.sample.susceptibility" = [..]``) or written as nested
    TOML keys; both name the same case key."""
    if "sweep" not in doc:
        return {}, None
    ctx = _Context(file, key_lines(text), Path(file).parent)  # errors read like any case error
    path = ("sweep",)
    tab = ctx.table(doc, (), "sweep")
    ctx.keys(tab, path, KEYS["sweep"])
    mode = ctx.string(tab, path, "mode", choices=MODES, default=None)
    sets = {}

    def walk(node, where, key):
        if isinstance(node, dict) and node:
            for k, v in node.items():
                walk(v, where + (k,), f"{key}.{k}" if key else k)
        elif isinstance(node, list) and node:
            sets[key] = node
        else:
            raise ctx.error(where, "expected a non-empty array of values for this key")

    walk(ctx.table(tab, path, "set", default={}), path + ("set",), "")
    return sets, mode


def plan(case_path, sets: dict | None = None, mode: str | None = None) -> Sweep:
    """Plan the sweep of the case file at `case_path`: `sets` (key -> list of
    values) and `mode` ("grid" or "zip") replace those of the file's [sweep]
    table. Every point is checked; a point whose case is wrong gets its error
    (naming the line of the key in the case file), the others are not
    affected. Raises CaseError for an unreadable case or [sweep] table,
    SweepError for keys that address nothing."""
    case_path = Path(case_path)
    try:
        text = case_path.read_text(encoding="utf-8")
    except (OSError, UnicodeDecodeError) as e:
        raise CaseError(case_path, "", None, f"cannot read case file ({e})") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError:
        parse_case(text, str(case_path))  # raises the syntax error with its line
        raise
    file_sets, file_mode = sweep_table(doc, text, str(case_path))
    sets = dict(sets) if sets else file_sets
    mode = mode or file_mode or "grid"
    if not sets:
        raise SweepError(f"{case_path}: nothing to sweep: give --set KEY=V1,V2,... or a [sweep] table")
    if mode not in MODES:
        raise SweepError(f"mode {mode!r} is not one of {', '.join(MODES)}")
    base = {k: v for k, v in doc.items() if k != "sweep"}
    keys = tuple(sets)
    paths = tuple(resolve(base, k) for k in keys)
    if mode == "zip":
        lengths = {k: len(v) for k, v in sets.items()}
        if len(set(lengths.values())) > 1:
            raise SweepError("zipped keys need value lists of one length; got "
                             + ", ".join(f"{k}: {n}" for k, n in lengths.items()))
        combos = list(zip(*sets.values()))
    else:
        count = math.prod(len(v) for v in sets.values())
        if count > MAX_POINTS:
            raise SweepError(f"the grid has {count} points, more than the {MAX_POINTS} a sweep may have")
        combos = list(itertools.product(*sets.values()))
    ctx = _Context(str(case_path), key_lines(text), case_path.parent)
    points = []
    for i, values in enumerate(combos):
        try:
            ptext = point_text(base, paths, keys, values)
        except TypeError as e:  # a TOML date or time: no case key takes one
            raise SweepError(f"{case_path}: {e}") from None
        error = None
        try:
            parse_case(ptext, str(case_path), case_path.parent)
        except CaseError as e:  # say where the key is in the case file, not in the point's text
            error = str(CaseError(case_path, e.key, ctx.line_of(_parse_key(e.key)) if e.key else None, e.message))
        points.append(Point(i, tuple(values), ptext, hashlib.sha256(ptext.encode("utf-8")).hexdigest(), error))
    inputs = _inputs([p for p in points if p.error is None], case_path.parent)
    return Sweep(str(case_path), text, keys, mode, base, paths, tuple(points), inputs)


def resolve(doc: dict, key: str) -> tuple:
    """The concrete key path (strings and 0-based indices) that `key` names in
    the case document `doc`. A name after an array of tables picks the table
    with that `name`; keys missing from the document may be added (the
    point's check then says whether they are allowed)."""
    node, out = doc, []
    parts = key.split(".")
    for n, part in enumerate(parts):
        m = _PART.match(part)
        if m is None:
            raise SweepError(f"{key!r}: {part!r} is not a key (letters, digits, _ and -, then [i] indices)")
        name, indices = m.group(1), [int(i) for i in re.findall(r"\d+", m.group(2))]
        where = _format_path(tuple(out)) or "the case"
        if isinstance(node, list):
            names = [t.get("name") for t in node if isinstance(t, dict)]
            if name not in names:
                raise SweepError(f"{key!r}: {where} has no table named {name!r}"
                                 + (f" (names: {', '.join(map(str, names))})" if names else ""))
            out.append(names.index(name))
            node = node[out[-1]]
        elif isinstance(node, dict):
            out.append(name)
            node = node.get(name, {} if n < len(parts) - 1 and not indices else None)
        else:
            raise SweepError(f"{key!r}: {where} is a value, not a table")
        for i in indices:
            if not isinstance(node, list) or i >= len(node):
                size = f"has {len(node)} elements" if isinstance(node, list) else "is not an array"
                raise SweepError(f"{key!r}: {_format_path(tuple(out))} {size}, no index {i}")
            out.append(i)
            node = node[i]
    if out[0] == "sweep":
        raise SweepError(f"{key!r}: the [sweep] table itself cannot be swept")
    return tuple(out)


def _parse_key(text: str) -> tuple:
    """'body[2].shape.radius' -> ("body", 2, "shape", "radius") (as far as it
    is made of plain keys)."""
    out = []
    for part in text.split("."):
        m = _PART.match(part)
        if m is None:
            break
        out += [m.group(1)] + [int(i) for i in re.findall(r"\d+", m.group(2))]
    return tuple(out)


def point_text(base: dict, paths: tuple, keys: tuple, values: tuple) -> str:
    """The case text of one point: `base` with each of `paths` set to its value,
    the title marked with the values, and a first comment line naming them."""
    doc = copy.deepcopy(base)
    for path, value in zip(paths, values):
        node = doc
        for p in path[:-1]:
            node = node.setdefault(p, {}) if isinstance(node, dict) else node[p]
        node[path[-1]] = copy.deepcopy(value)
    label = _label(keys, values)
    if isinstance(doc.get("title"), str):
        doc["title"] = f"{doc['title']} [{label}]"
    return f"# sweep point: {label}\n" + to_toml(doc)


def _label(keys, values) -> str:
    return ", ".join(f"{k} = {toml_value(v)}" for k, v in zip(keys, values))


def _inputs(points, folder: Path) -> tuple:
    """(relative path, bytes) of every file the `points` name, read once."""
    names = {n for p in points for n in _file_names(tomllib.loads(p.text))}
    return tuple((n, (folder / n).read_bytes()) for n in sorted(names)
                 if not Path(n).is_absolute() and (folder / n).is_file())


def _file_names(node) -> list:
    if isinstance(node, dict):
        return [v for k, v in node.items() if k in FILE_KEYS and isinstance(v, str)] + \
               [n for v in node.values() for n in _file_names(v)]
    if isinstance(node, list):
        return [n for v in node for n in _file_names(v)]
    return []


# ---------------------------------------------------------------------------
# Running the points

def run_sweep(sweep: Sweep, out_dir, client=None, progress: Progress = QUIET) -> list[dict]:
    """Run the points of `sweep` that have no results in `out_dir` yet, on the
    Dask `client` (None: one after the other in this process), store each
    results file as it arrives and write the table; the table rows (one dict
    per point, see :func:`row`) are returned. The table is written even when
    the sweep is interrupted (points not run then have status not-run)."""
    out_dir = Path(out_dir)
    points_dir = out_dir / "points"
    points_dir.mkdir(parents=True, exist_ok=True)
    todo = pending(sweep, out_dir)
    waiting = {p.index for p in todo}
    rows = {p.index: row(sweep, p, error=p.error) if p.error is not None else
            row(sweep, p, stored_summary(points_dir / f"{p.sha256}.h5", p.sha256), resumed=True)
            for p in sweep.points if p.index not in waiting}
    invalid = sum(p.error is not None for p in sweep.points)
    progress(f"sweep of {sweep.case_path}: {len(sweep.points)} points: {len(todo)} to run, "
             f"{len(sweep.points) - len(todo) - invalid} done earlier, {invalid} invalid")
    done = 0

    def finish(p, result):
        nonlocal done
        if result.get("results") is not None:
            store(points_dir / f"{p.sha256}.h5", result["results"])
        rows[p.index] = row(sweep, p, result.get("summary"), error=result.get("error"),
                            seconds=result.get("seconds"))
        done += 1
        r = rows[p.index]
        progress(f"point {done}/{len(todo)} {r['status']}: {_label(sweep.keys, p.values)} "
                 f"({r['seconds'] or 0:.1f} s)" + (f": {r['error']}" if r["error"] else ""))

    try:
        if client is None:
            for p in todo:
                finish(p, solve_point(sweep.base, sweep.inputs, sweep.paths, sweep.keys, p.values, p.sha256))
        else:
            _run_on(client, sweep, todo, finish)
    finally:
        table = [rows.get(p.index) or row(sweep, p, status="not-run") for p in sweep.points]
        write_table(out_dir, table, {"case": sweep.case_path, "case_text": sweep.case_text,
                                     "keys": list(sweep.keys), "mode": sweep.mode})
    return table


def pending(sweep: Sweep, out_dir) -> list[Point]:
    """The valid points of `sweep` without a complete results file in `out_dir`."""
    return [p for p in sweep.points if p.error is None
            and stored_summary(Path(out_dir) / "points" / f"{p.sha256}.h5", p.sha256) is None]


def _run_on(client, sweep: Sweep, todo: list, finish) -> None:
    """Submit the points to the cluster (the case document and input files
    scattered once to every worker) and finish each as it completes."""
    from dask.distributed import as_completed
    if not todo:
        return
    base, inputs = client.scatter([sweep.base, sweep.inputs], broadcast=True)
    futures = {client.submit(solve_point, base, inputs, sweep.paths, sweep.keys, p.values, p.sha256,
                             key=f"volmag-point-{p.sha256}", retries=TASK_RETRIES, pure=False): p
               for p in todo}
    try:
        for fut in as_completed(futures):
            p = futures.pop(fut)
            try:
                result = fut.result()
            except Exception as e:  # raised after the retries, or the worker died too often
                result = {"error": _task_error(e)}
            finish(p, result)
            fut.release()
    finally:
        client.cancel(list(futures))


def _task_error(e: Exception) -> str:
    if type(e).__name__ == "KilledWorker":
        return "the workers running this point died repeatedly (out of memory?)"
    return f"internal error: {type(e).__name__}: {e}"


def solve_point(base: dict, inputs: tuple, paths: tuple, keys: tuple, values: tuple, sha256: str) -> dict:
    """Run one point (a Dask task): rebuild its case text, read it with the
    input files laid out in a private folder, solve it single-threaded and
    return {"summary", "results" (the results file's bytes), "seconds"}, or
    {"error", "seconds"} when the case or the solve fails."""
    from .results import write_results
    from .run import run_case
    from .solve import SolverError
    t0 = time.perf_counter()
    text = point_text(base, paths, keys, values)
    if hashlib.sha256(text.encode("utf-8")).hexdigest() != sha256:
        return {"error": "the case text differs on this worker (another volmag version?)", "seconds": 0.0}
    with tempfile.TemporaryDirectory(prefix="volmag-point-") as tmp:
        folder = _lay_out(Path(tmp), inputs)
        try:
            with _single_threaded():
                run = run_case(parse_case(text, "<sweep point>", folder))
                out = write_results(Path(tmp) / "point.h5", run, __version__)
        except (CaseError, SolverError, ValueError, FileNotFoundError) as e:
            return {"error": str(e), "seconds": time.perf_counter() - t0}
        return {"summary": json.loads(summary_json(run.summary())), "results": out.read_bytes(),
                "seconds": time.perf_counter() - t0}


def _lay_out(root: Path, inputs: tuple) -> Path:
    """Write the input files under `root` so that their relative paths (which
    may climb with '..') resolve from the folder returned."""
    climb = max((_ups(n) for n, _ in inputs), default=0)
    folder = root.joinpath("case", *["d"] * climb)
    folder.mkdir(parents=True)
    for name, data in inputs:
        target = (folder / name).resolve()
        target.parent.mkdir(parents=True, exist_ok=True)
        target.write_bytes(data)
    return folder


def _ups(name: str) -> int:
    """Number of leading '..' of a relative path."""
    parts = Path(os.path.normpath(name)).parts
    return next((i for i, p in enumerate(parts) if p != ".."), len(parts))


@contextlib.contextmanager
def _single_threaded():
    """One thread in numba's and the BLAS pools for the block: sweeps spread
    points over processes, and one thread gives the same bits everywhere."""
    import numba
    from threadpoolctl import threadpool_limits
    before = numba.get_num_threads()
    numba.set_num_threads(1)
    try:
        with threadpool_limits(1):
            yield
    finally:
        numba.set_num_threads(before)


def stored_summary(path: Path, sha256: str) -> dict | None:
    """The run summary in the results file at `path` if it is complete and
    holds the case with this SHA-256, else None."""
    if not path.is_file():
        return None
    import h5py
    try:
        with h5py.File(path, "r") as f:
            if f.attrs.get("case_sha256") != sha256 or "summary" not in f:
                return None
            data = f["summary"][()]
        return json.loads(data.decode() if isinstance(data, bytes) else data)
    except (OSError, ValueError, KeyError):
        return None


class _IgnoreInterrupt(WorkerPlugin):
    """Local workers ignore Ctrl-C, which reaches every process of the
    terminal's process group: the client stops them once it has written the
    table, instead of each worker dying with a traceback."""

    def setup(self, worker):
        signal.signal(signal.SIGINT, signal.SIG_IGN)


@contextlib.contextmanager
def cluster(scheduler: str | None = None, workers: int | None = None):
    """A Dask client: of the running scheduler at `scheduler`, or of a new
    local cluster of `workers` processes (default: one per usable core), each
    with one thread and the numeric libraries' thread pools set to one before
    the process starts. The local cluster listens on the loopback address only."""
    import dask
    from dask.distributed import Client, LocalCluster
    if scheduler:
        with Client(scheduler, timeout="20s") as client:
            yield client
        return
    n = workers or usable_cores()
    env = dict(dask.config.get("distributed.nanny.pre-spawn-environ"), **{v: 1 for v in THREAD_VARIABLES})
    saved = {v: os.environ.get(v) for v in env}  # the nanny sets them in this process too
    try:
        with dask.config.set({"distributed.nanny.pre-spawn-environ": env}), \
                LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                             dashboard_address=None, silence_logs=logging.ERROR) as lc, Client(lc) as client:
            client.register_plugin(_IgnoreInterrupt(), name="volmag-ignore-interrupt")
            yield client
    finally:
        for k, v in saved.items():
            if v is None:
                os.environ.pop(k, None)
            else:
                os.environ[k] = v


# ---------------------------------------------------------------------------
# Rows of the table

def row(sweep: Sweep, p: Point, summary: dict | None = None, error: str | None = None,
        seconds: float | None = None, resumed: bool = False, status: str | None = None) -> dict:
    """One table row: point, the swept values by key, case_sha256, status,
    error, expect_passed, expect_total, seconds (the task's wall time),
    resumed (1 when the results came from an earlier run), then every scalar
    result of the run summary (:func:`volmag.sweeptable.scalars`)."""
    r = {"point": p.index, **dict(zip(sweep.keys, p.values)), "case_sha256": p.sha256}
    expect = (summary or {}).get("expect", [])
    if status is None:
        status = "failed" if summary is None else "not-converged" if not summary["converged"] else \
            "expect-failed" if not all(e["ok"] for e in expect) else "ok"
    if status == "expect-failed" and error is None:
        error = "; ".join(f"{e['quantity']}: " + (e.get("error") or f"got {e['got']:.6g}, expected "
                                                   f"{e['value']:.6g} +- {e['tolerance']:.3g}")
                          for e in expect if not e["ok"])
    if status == "not-converged":
        error = "the solve did not converge"
    r.update(status=status, error=error or "", expect_passed=None, expect_total=None, seconds=seconds,
             resumed=int(resumed))
    if summary is not None:
        r.update(expect_passed=sum(bool(e["ok"]) for e in expect), expect_total=len(expect), **scalars(summary))
    return r
