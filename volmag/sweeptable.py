"""The table of a sweep: one row per point, written as CSV and HDF5, read
back, and plotted.

Rows are dicts (see :func:`volmag.sweep.row`); the columns are the union of
their keys in order of first appearance. The scalar results of a run are
named by their result paths (:mod:`volmag.run`), in SI units.
"""
from __future__ import annotations

import csv
import datetime as _dt
import io
import os
import tempfile
from pathlib import Path

import numpy as np

from . import __version__
from .run import QUANTITY_FIELDS, SOLVER_QUANTITIES, lookup, parse_quantity
from .tomlout import toml_value


def scalars(summary: dict) -> dict:
    """Every scalar result of a run summary by its result path
    (``bodies.ball.mean_M.z``, ``demag.ball.N.zz``, ``probes.p.max_abs_B``,
    ``forces.bar.F.z``, ...), in SI units."""
    out = {f"solver.{q}": float(summary["solver"][q]) for q in SOLVER_QUANTITIES}
    for root, fields in QUANTITY_FIELDS.items():
        for name in summary.get(root) or {}:
            for field, (letters, _) in fields.items():
                for comp in _components(letters):
                    path = ".".join((root, name, field) + ((comp,) if comp else ()))
                    try:
                        out[path] = lookup(summary, path)
                    except (KeyError, TypeError, IndexError):  # not computed for this run
                        pass
    return out


def _components(letters: int) -> list:
    return [""] if letters == 0 else list("xyz") if letters == 1 else [a + b for a in "xyz" for b in "xyz"]


def store(path: Path, data: bytes) -> None:
    """Write `data` to `path` through a temporary file in the same folder and
    a rename: `path` is never seen half written."""
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
    try:
        with os.fdopen(fd, "wb") as f:
            f.write(data)
        os.replace(tmp, path)
    except BaseException:
        Path(tmp).unlink(missing_ok=True)
        raise


def write_table(out_dir, rows: list, attrs: dict) -> tuple[Path, Path]:
    """Write `rows` to DIR/sweep.csv and DIR/sweep.h5, each atomically.
    sweep.h5: group /table with one dataset per column (numbers as float64,
    NaN where a row has none; anything else as text) and attribute `columns`
    (their order); root attributes `attrs`, volmag_version and created."""
    import h5py
    out_dir = Path(out_dir)
    columns = list(dict.fromkeys(k for r in rows for k in r))
    text = io.StringIO()
    w = csv.writer(text, lineterminator="\n")
    w.writerow(columns)
    for r in rows:
        w.writerow([_cell(r.get(c)) for c in columns])
    store(out_dir / "sweep.csv", text.getvalue().encode("utf-8"))
    data = io.BytesIO()
    with h5py.File(data, "w") as f:
        f.attrs.update(attrs, volmag_version=__version__,
                       created=_dt.datetime.now(_dt.timezone.utc).isoformat(timespec="seconds"))
        g = f.create_group("table")
        g.attrs["columns"] = columns
        for c in columns:
            values = [r.get(c) for r in rows]
            if all(v is None or (isinstance(v, (int, float)) and not isinstance(v, bool)) for v in values):
                g.create_dataset(c, data=np.array([np.nan if v is None else v for v in values], float))
            else:
                g.create_dataset(c, data=[_cell(v) for v in values], dtype=h5py.string_dtype())
    store(out_dir / "sweep.h5", data.getvalue())
    return out_dir / "sweep.csv", out_dir / "sweep.h5"


def _cell(v) -> str:
    if v is None:
        return ""
    if isinstance(v, (list, dict, bool)):
        return toml_value(v)
    return repr(float(v)) if isinstance(v, float) else str(v)


def read_table(path) -> dict:
    """The table of a sweep folder (or of its sweep.h5): {column: numpy array,
    ..., "columns": [names in order], "attrs": {root attributes}}."""
    import h5py
    path = Path(path)
    if path.is_dir():
        path = path / "sweep.h5"
    if not path.is_file():
        raise FileNotFoundError(f"{path}: no sweep table (run `volmag sweep` first)")
    with h5py.File(path, "r") as f:
        g = f["table"]
        columns = [str(c) for c in g.attrs["columns"]]
        out = {c: g[c][()] for c in columns}
        attrs = dict(f.attrs)
    out = {c: np.array([s.decode() for s in v]) if v.dtype.kind in "OS" else v for c, v in out.items()}
    return dict(out, columns=columns, attrs=attrs)


def _unit(quantity: str) -> str | None:
    """SI unit of a result path; None for other columns and pure numbers."""
    try:
        q = parse_quantity(quantity)
    except ValueError:
        return None
    unit = None if q.root == "solver" else QUANTITY_FIELDS[q.root][q.field][1]
    return None if unit == "1" else unit


def plot_sweep(folder, x: str, y: str, out) -> Path:
    """Draw column `y` of a sweep folder's table against swept key `x`, one
    line per combination of the other swept keys, into the PNG `out`. Points
    whose expectations missed or whose solve did not converge get a red
    cross; failed points are left out. The x axis is logarithmic for positive
    values spanning two decades or more. Returns `out`."""
    import matplotlib
    matplotlib.use("Agg")
    import matplotlib.pyplot as plt
    t = read_table(folder)
    keys = [str(k) for k in t["attrs"]["keys"]]
    for name in (x, y):
        if name not in t["columns"]:
            results = [c for c in t["columns"] if "." in c and c not in keys]
            raise ValueError(f"{name!r} is not a column of the sweep table (swept keys: {', '.join(keys)}; "
                             f"results: {', '.join(results) or 'none'})")
    if t[x].dtype.kind != "f" or t[y].dtype.kind != "f":
        raise ValueError(f"{x!r} and {y!r} must both be numeric columns")
    others = [k for k in keys if k != x]
    groups = {}
    for i in range(len(t["point"])):
        if t["status"][i] != "failed" and np.isfinite(t[y][i]):
            groups.setdefault(tuple(t[k][i] for k in others), []).append(i)
    fig, ax = plt.subplots(figsize=(7, 4.5), dpi=120)
    for group, idx in groups.items():
        idx = sorted(idx, key=lambda i: t[x][i])
        label = ", ".join(f"{k} = {v:g}" if isinstance(v, float) else f"{k} = {v}" for k, v in zip(others, group))
        ax.plot(t[x][idx], t[y][idx], "o-", label=label or None)
        bad = [i for i in idx if t["status"][i] != "ok"]
        if bad:
            ax.plot(t[x][bad], t[y][bad], "x", color="red", ms=10, mew=2)
    xs = t[x][np.isfinite(t[x])]
    if len(xs) and xs.min() > 0 and xs.max() >= 100 * xs.min():
        ax.set_xscale("log")
    unit = _unit(y)
    ax.set_xlabel(x)
    ax.set_ylabel(f"{y} ({unit})" if unit else y)
    ax.set_title(str(t["attrs"].get("case", "")), fontsize=9)
    ax.grid(True, alpha=0.3)
    if others and groups:
        ax.legend(fontsize=8)
    fig.tight_layout()
    out = Path(out)
    fig.savefig(out)
    plt.close(fig)
    return out
