"""Command line: `volmag run CASE [--out FILE.h5] [--json] [--quiet] [--debug]`,
`volmag check DIR`, `volmag show FILE.h5`,
`volmag view FILE.h5`, `volmag report FILE.h5`, `volmag export FILE.h5 --vtu OUT`,
`volmag sweep CASE --set KEY=V1,V2`, `volmag sweep-plot DIR --x KEY --y QUANTITY`,
`volmag demag CASE` (N(chi) tables), `volmag correct CASE --body NAME --data FILE.csv
--out OUT.csv` (measured -> intrinsic curve).

Exit status: 0 converged and every expectation holds; 1 an expectation failed
or the solve did not converge; 2 bad input (case file, mesh file, a model too
large for the chosen method, an unreadable results file); 130 interrupted
(Ctrl-C or SIGTERM) -- no results file is changed then.
"""
from __future__ import annotations

import argparse
import json
import signal
import sys
import time
from pathlib import Path

import numpy as np

from . import __version__

EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT, EXIT_INTERRUPTED = 0, 1, 2, 130


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="volmag", description=__doc__.split("\n")[0])
    parser.add_argument("--version", action="version", version=f"volmag {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    run = sub.add_parser("run", help="run a case file")
    run.add_argument("case", type=Path)
    run.add_argument("--out", type=Path, help="results file (HDF5); default: CASE name with .h5, here")
    run.add_argument("--json", action="store_true", help="print one JSON summary object on stdout")
    run.add_argument("--quiet", action="store_true", help="no progress on stderr")
    run.add_argument("--progress", action="store_true", help="progress on stderr even when it is not a terminal")
    run.add_argument("--debug", action="store_true", help="show tracebacks")
    run.set_defaults(func=cmd_run)
    add_check_parser(sub)
    add_show_parser(sub)
    add_view_parsers(sub)
    add_sweep_parsers(sub)
    add_correction_parsers(sub)
    args = parser.parse_args(argv)
    # SIGTERM (a CI time-out) unwinds like Ctrl-C, so temporary files are removed.
    previous = signal.signal(signal.SIGTERM, _interrupt)
    try:
        return args.func(args)
    except KeyboardInterrupt:
        print("volmag: interrupted; no results file was changed", file=sys.stderr)
        return EXIT_INTERRUPTED
    finally:
        signal.signal(signal.SIGTERM, previous)


def _interrupt(signum, frame):
    raise KeyboardInterrupt


def cmd_run(args) -> int:
    from .case import CaseError, load_case
    from .progress import Progress
    from .results import write_results
    from .run import run_case, summary_json
    from .solve import SolverError
    progress = Progress(True if args.progress else False if args.quiet else None)
    try:
        case = load_case(args.case)
        run = run_case(case, progress)
    except (CaseError, SolverError, ValueError, FileNotFoundError) as e:
        if args.debug:
            raise
        print(f"volmag: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    out = args.out or Path(args.case.stem + ".h5")
    try:
        write_results(out, run, __version__)
    except OSError as e:
        if args.debug:
            raise
        print(f"volmag: error: cannot write the results file {out} ({e.strerror or e})", file=sys.stderr)
        return EXIT_BAD_INPUT
    progress(f"results written to {out}")
    summary = run.summary()
    if args.json:
        print(summary_json(summary))
    else:
        print(format_summary(summary))
    return EXIT_OK if _passed(summary) else EXIT_FAILED


def _passed(summary: dict) -> bool:
    """Converged, and every expectation holds."""
    return bool(summary["converged"]) and all(e["ok"] for e in summary["expect"])


def format_summary(s: dict) -> str:
    """Human-readable run summary."""
    lines = [s["title"], ""]
    sv = s["solver"]
    solved = sv["unknowns"] > 0  # 0: nothing to solve for beyond the demagnetising tensors
    lines.append(f"solver: {sv['method']}, {sv['unknowns']} unknowns, {sv['iterations']} iterations, "
                 f"residual {sv['residual']:.2e}, {sv['seconds']:.1f} s, "
                 f"{'converged' if s['converged'] else 'NOT CONVERGED'}" if solved else
                 "solver: no applied-field solve (no source, or no magnetic body)")
    for m in s["mesh"]:
        lines.append(f"mesh: {m['summary']}")
    for name, b in s["bodies"].items():
        lines.append(f"body {name}: volume {b['volume']:.6g} m^3" + (
            f", mean M [{', '.join(f'{v:.6g}' for v in b['mean_M'])}] A/m, moment "
            f"[{', '.join(f'{v:.6g}' for v in b['moment'])}] A m^2, max |B| {b['max_abs_B']:.3g} T"
            if solved else ""))
    for name, d in s["demag"].items():
        lines.append(f"demagnetising tensor of {name} (chi = {d['chi']}):")
        lines += ["  " + "  ".join(f"{v:+.6f}" for v in row) for row in d["N"]]
        if "fluxmetric" in d:
            lines.append(f"  fluxmetric factor along {d['fluxmetric']['axis']}: {d['fluxmetric']['N']:.6f}")
    for name, p in s["probes"].items():
        lines.append(f"probe {name}: {p['points']} points, mean B "
                     f"[{', '.join(f'{v:.6g}' for v in p['B'])}] T, of which from the bodies "
                     f"[{', '.join(f'{v:.6g}' for v in p.get('dB', [np.nan] * 3))}] T")
        lines += _probe_metric_lines(p)
    for name, f in s.get("forces", {}).items():
        lines.append(f"force on {name}: F [{', '.join(f'{v:.6g}' for v in f['F'])}] N, torque "
                     f"[{', '.join(f'{v:.6g}' for v in f['torque'])}] N m about "
                     f"[{', '.join(f'{v:.6g}' for v in f['about'])}] m")
    lines += [f"WARNING: {w}" for w in s.get("warnings", [])]
    if s.get("cautions"):
        lines += ["", "CAUTION" + _caution_reason(s)] + [f"  - {c}" for c in s["cautions"]]
    if s["expect"]:
        lines += ["", format_expectations(s["expect"])]
    return "\n".join(lines)


def _probe_metric_lines(p: dict) -> list[str]:
    """Region metrics of one probe (summary entry) and its tolerance outcome."""
    if p.get("max_dB") is None:  # older results files, or no finite point
        return []
    ppm = p.get("max_distortion_ppm")
    comp = p.get("component_homogeneity_ppm")
    out = [f"  max |B| {p['max_abs_B']:.4g} T, max |dB| {p['max_dB']:.4g} T, max distortion "
           + ("- (the applied field vanishes at a point)" if ppm is None else f"{ppm:.4g} ppm")
           + (f"; peak-to-peak over mean |B|: |B| {p['homogeneity_ppm']:.4g} ppm, Bx/By/Bz "
              + "/".join(f"{v:.4g}" for v in comp) + " ppm" if comp is not None else "")]
    t = p.get("tolerance")
    if t is not None:
        got = "-" if t["got"] is None else f"{t['got']:.4g}"
        out.append(f"  tolerance {t['quantity']} <= {t['max']:g}: {'pass' if t['ok'] else 'FAIL'} (got {got})")
    return out


def _caution_reason(s: dict) -> str:
    """Why a run carries cautions: probes at or above 0.5 mT, forces computed."""
    from .cautions import IMPLANT_LIMIT_T
    high = [f"{n} {p['max_abs_B'] * 1e3:.3g} mT" for n, p in s["probes"].items()
            if (p.get("max_abs_B") or 0.0) >= IMPLANT_LIMIT_T]
    why = ([f"|B| reaches 0.5 mT or more at probes ({', '.join(high)})"] if high else []) \
        + (["forces on bodies were computed"] if s.get("forces") else [])
    return f" ({'; '.join(why)}):" if why else ":"


def _expected(e: dict) -> str:
    """The expected value of an outcome row, or its bound ("<= 50")."""
    return {"max": "<= ", "min": ">= "}.get(e.get("bound"), "") + f"{e['value']:.6g}"


def format_expectations(expect: list) -> str:
    """Pass/fail table of expectation outcomes (see :func:`volmag.run.check_expectations`)."""
    rows = [("", "quantity", "expected", "got", "tolerance", "line")]
    for e in expect:
        got = "-" if e.get("got") is None else f"{e['got']:.6g}"
        tol = f"{e['tolerance']:.3g}" if "tolerance" in e else "-"
        rows.append(("pass" if e["ok"] else "FAIL", e["quantity"], _expected(e), got,
                     "-" if e.get("bound") else tol, str(e.get("line") or "")))
    widths = [max(len(r[k]) for r in rows) for k in range(len(rows[0]))]
    passed = sum(bool(e["ok"]) for e in expect)
    lines = [f"expectations: {passed} of {len(expect)} pass"]
    for i, r in enumerate(rows):
        lines.append("  " + "  ".join(c.ljust(w) if k < 2 else c.rjust(w)
                                      for k, (c, w) in enumerate(zip(r, widths))).rstrip())
        if i and expect[i - 1].get("error"):
            lines.append(f"        error: {expect[i - 1]['error']}")
    return "\n".join(lines)


# ---------------------------------------------------------------------------
# volmag check DIR: a folder of case files as a regression suite

def add_check_parser(sub) -> None:
    p = sub.add_parser("check", help="run every case file (*.toml) in a folder and report each outcome")
    p.add_argument("folder", type=Path)
    p.add_argument("--out", type=Path, metavar="DIR", help="also write each case's results file into DIR")
    p.add_argument("--json", action="store_true", help="print one JSON object on stdout instead of the lines")
    p.add_argument("--progress", action="store_true", help="progress of each run on stderr")
    p.add_argument("--debug", action="store_true", help="stop at the first error and show its traceback")
    p.set_defaults(func=cmd_check)


def cmd_check(args) -> int:
    """Run each case of the folder in name order; one line per case (name,
    outcome pass | FAIL | ERROR, expectations passed/total, seconds), the
    failing expectations and errors below it. Exit 0 when every case passes,
    2 when one could not run (ERROR), else 1."""
    folder = args.folder
    files = sorted(folder.glob("*.toml")) if folder.is_dir() else []
    if not files:
        why = "is not a folder" if not folder.is_dir() else "holds no case files (*.toml)"
        print(f"volmag: error: {folder} {why}", file=sys.stderr)
        return EXIT_BAD_INPUT
    width = max(len(f.name) for f in files)
    t0 = time.perf_counter()
    results = []
    for f in files:
        r = check_case(f, args)
        results.append(r)
        if not args.json:
            print(_check_line(r, width), flush=True)
    counts = {k: sum(r["outcome"] == k for r in results) for k in ("pass", "FAIL", "ERROR")}
    status = EXIT_BAD_INPUT if counts["ERROR"] else EXIT_FAILED if counts["FAIL"] else EXIT_OK
    if args.json:
        print(json.dumps({"folder": str(folder), "ok": status == EXIT_OK, **counts, "cases": results}))
    else:
        print(f"{len(results)} cases: {counts['pass']} pass, {counts['FAIL']} FAIL, {counts['ERROR']} ERROR "
              f"in {time.perf_counter() - t0:.1f} s")
    return status


def check_case(path: Path, args) -> dict:
    """Run one case file; its outcome as a dict (case, title, outcome,
    passed, total, seconds, expect, error)."""
    from .case import CaseError, load_case
    from .progress import Progress
    from .results import write_results
    from .run import run_case
    from .solve import SolverError
    t0 = time.perf_counter()
    row = {"case": path.name, "title": None, "outcome": "ERROR", "passed": 0, "total": 0, "expect": []}
    try:
        case = load_case(path)
        row["title"], row["total"] = case.title, len(case.expects)
        run = run_case(case, Progress(bool(args.progress)))
        if args.out is not None:
            write_results(args.out / (path.stem + ".h5"), run, __version__)
        summary = run.summary()
        row.update(expect=summary["expect"], passed=sum(bool(e["ok"]) for e in summary["expect"]),
                   outcome="pass" if _passed(summary) else "FAIL")
        if not summary["converged"]:
            row["error"] = "the solve did not converge"
    except (CaseError, SolverError, ValueError, FileNotFoundError, OSError) as e:
        if args.debug:
            raise
        row["error"] = str(e)
    except Exception as e:  # one broken case must not hide the others' outcomes
        if args.debug:
            raise
        row["error"] = f"internal error: {type(e).__name__}: {e} (rerun with --debug for the traceback)"
    row["seconds"] = time.perf_counter() - t0
    return row


def _check_line(r: dict, width: int) -> str:
    line = (f"{r['case']:<{width}}  {r['outcome']:<5}  {r['passed']:>3}/{r['total']:<3} expectations  "
            f"{r['seconds']:6.1f} s")
    details = [f"    FAIL {e['quantity']}: got {'-' if e['got'] is None else format(e['got'], '.6g')}, "
               f"expected {_expected(e)}" + ("" if e.get("bound") else f" +- {e['tolerance']:.3g}")
               + (f" ({e['error']})" if e.get("error") else "")
               for e in r["expect"] if not e["ok"]]
    if r.get("error"):
        details.append(f"    {r['error']}")
    return "\n".join([line] + details)


# ---------------------------------------------------------------------------
# volmag show FILE.h5: what a results file holds

def add_show_parser(sub) -> None:
    p = sub.add_parser("show", help="print the summary of a results file")
    p.add_argument("results", type=Path)
    p.add_argument("--json", action="store_true", help="print the stored JSON summary")
    p.set_defaults(func=cmd_show)


def cmd_show(args) -> int:
    from .results import ResultsError, read_results
    from .run import summary_json
    try:
        res = read_results(args.results)
    except ResultsError as e:
        print(f"volmag: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if args.json:
        print(summary_json(res["summary"]))
    else:
        print(format_results(res, args.results))
    return EXIT_OK


def format_results(res: dict, path) -> str:
    """Human-readable account of a results file (dict of
    :func:`volmag.results.read_results`): provenance, then the run summary."""
    a = res["attrs"]
    prov = res["summary"].get("provenance") or {k[len("provenance_"):]: v for k, v in a.items()
                                                if k.startswith("provenance_")}
    versions = ", ".join(f"{k} {prov[k]}" for k in prov
                         if k not in ("platform", "blas", "blas_threads", "numba_threads", "mesh_seed",
                                      "mesh_threads"))
    lines = [f"results file {path} (format version {a['format_version']}, written {a['created']} "
             f"by volmag {a['volmag_version']})",
             f"case sha256 {a['case_sha256']} ({len(str(res['case']).splitlines())} lines stored in /case)",
             f"versions: {versions}",
             f"BLAS: {prov.get('blas', '?')}; threads: BLAS {prov.get('blas_threads', '?')}, "
             f"numba {prov.get('numba_threads', '?')}; mesh seed {prov.get('mesh_seed', '?')} "
             f"({prov.get('mesh_threads', '?')} mesher thread); {prov.get('platform', '?')}",
             ""]
    return "\n".join(lines) + format_summary(res["summary"])


# ---------------------------------------------------------------------------
# volmag view / report / export: pictures, an HTML report and VTK files of a results file

def add_view_parsers(sub) -> None:
    from .views import DEFAULT_TOLERANCE_PPM, VIEWS
    v = sub.add_parser("view", help="draw a results file: a window where a display exists, else a PNG")
    v.add_argument("results", type=Path)
    v.add_argument("--what", choices=VIEWS, default="surface",
                   help="surface: bodies coloured by |M|; arrows: magnetisation; slice: 3D plane of the field; "
                        "map: the same plane as a contour map; probes: B along probe lines; "
                        "residual: solver history (default: surface)")
    v.add_argument("--out", type=Path, help="write this PNG instead of opening a window")
    v.add_argument("--size", type=_size, default=(1200, 900), metavar="W,H", help="pixels (default 1200,900)")
    v.add_argument("--quantity", choices=("B", "dB", "ppm"), default="ppm",
                   help="slice and map: |B|, |B - B_applied| or distortion in ppm (default ppm)")
    v.add_argument("--tolerance", type=float, default=DEFAULT_TOLERANCE_PPM, metavar="PPM",
                   help=f"slice and map: distortion tolerance line, ppm (default {DEFAULT_TOLERANCE_PPM:g})")
    v.add_argument("--samples", type=int, metavar="N",
                   help="slice and map: samples along the plane's longer side (default: by mesh size, 30 to 80)")
    v.add_argument("--component", choices=("magnitude", "x", "y", "z"), default="magnitude",
                   help="surface: which part of M colours it (default magnitude)")
    v.add_argument("--debug", action="store_true", help="show tracebacks")
    v.set_defaults(func=cmd_view)
    r = sub.add_parser("report", help="write a self-contained HTML report of a results file")
    r.add_argument("results", type=Path)
    r.add_argument("--out", type=Path, help="HTML file (default: RESULTS name with .html, here)")
    r.add_argument("--quantity", choices=("B", "dB", "ppm"), default="ppm", help="field map quantity (default ppm)")
    r.add_argument("--tolerance", type=float, default=DEFAULT_TOLERANCE_PPM, metavar="PPM",
                   help=f"distortion tolerance line on the map, ppm (default {DEFAULT_TOLERANCE_PPM:g})")
    r.add_argument("--samples", type=int, metavar="N",
                   help="field map: samples along the plane's longer side (default: by mesh size, 30 to 80)")
    r.add_argument("--debug", action="store_true", help="show tracebacks")
    r.set_defaults(func=cmd_report)
    e = sub.add_parser("export", help="write the elements and their M, H, B as a VTK file")
    e.add_argument("results", type=Path)
    e.add_argument("--vtu", type=Path, required=True, help="VTK unstructured grid file to write (.vtu)")
    e.add_argument("--debug", action="store_true", help="show tracebacks")
    e.set_defaults(func=cmd_export)


def _size(text: str) -> tuple[int, int]:
    try:
        w, h = (int(x) for x in text.split(","))
    except ValueError:
        raise argparse.ArgumentTypeError(f"size must be W,H in pixels, e.g. 1200,900 (got {text!r})") from None
    if not (16 <= w <= 8000 and 16 <= h <= 8000):
        raise argparse.ArgumentTypeError(f"size {w},{h}: each side must be 16 to 8000 pixels")
    return w, h


def _with_results(args, action) -> int:
    """Read the results file and run `action(res)`; plain messages, exit 2, on bad input."""
    from .results import ResultsError, read_results
    try:
        return action(read_results(args.results))
    except (ResultsError, ValueError, OSError) as e:
        if args.debug:
            raise
        print(f"volmag: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT


def cmd_view(args) -> int:
    from .views import has_display, render

    def draw(res):
        out = args.out
        if out is None and not has_display():
            out = Path(f"{args.results.stem}_{args.what}.png")
        field = dict(quantity=args.quantity, tolerance_ppm=args.tolerance)
        if args.samples and args.what in ("slice", "map"):
            from .slices import default_plane
            field["plane"] = default_plane(res, n=args.samples)
        options = {"surface": dict(component=args.component), "slice": field, "map": field}.get(args.what, {})
        written = render(res, args.what, out, args.size, **options)
        if written is not None:
            print(f"volmag: {args.what} view written to {written}", file=sys.stderr)
        return EXIT_OK
    return _with_results(args, draw)


def cmd_report(args) -> int:
    from .report import write_report

    def report(res):
        out = write_report(res, args.out or Path(args.results.stem + ".html"), quantity=args.quantity,
                           tolerance_ppm=args.tolerance, samples=args.samples)
        print(f"volmag: report written to {out}", file=sys.stderr)
        return EXIT_OK
    return _with_results(args, report)


def cmd_export(args) -> int:
    from .export import write_vtu

    def export(res):
        out = write_vtu(res, args.vtu)
        print(f"volmag: VTK file written to {out}", file=sys.stderr)
        return EXIT_OK
    return _with_results(args, export)


# ---------------------------------------------------------------------------
# volmag sweep CASE --set KEY=V1,V2: many points of one case on a Dask cluster

def add_sweep_parsers(sub) -> None:
    s = sub.add_parser("sweep", help="run a case over lists of values of its keys, on a Dask cluster")
    s.add_argument("case", type=Path)
    s.add_argument("--set", action="append", default=[], metavar="KEY=V1,V2,...", dest="sets",
                   help="a case key path (material.sample.susceptibility, body.cabinet.position[0]) and its "
                        "values; repeat for more keys (replaces the case file's [sweep] table)")
    mode = s.add_mutually_exclusive_group()
    mode.add_argument("--grid", action="store_const", const="grid", dest="mode",
                      help="every combination of the values (the default)")
    mode.add_argument("--zip", action="store_const", const="zip", dest="mode",
                      help="the i-th values of all keys together")
    s.add_argument("--out", type=Path, metavar="DIR", help="folder of the results (default: CASE name + _sweep)")
    s.add_argument("--scheduler", metavar="ADDRESS", help="use the running Dask scheduler at ADDRESS "
                                                          "(default: a local cluster)")
    s.add_argument("--workers", type=int, metavar="N", help="local cluster size (default: one per core)")
    s.add_argument("--quiet", action="store_true", help="no progress on stderr")
    s.add_argument("--progress", action="store_true", help="progress on stderr even when it is not a terminal")
    s.set_defaults(func=cmd_sweep)
    p = sub.add_parser("sweep-plot", help="plot a result of a sweep against a swept key (PNG)")
    p.add_argument("folder", type=Path, metavar="DIR")
    p.add_argument("--x", required=True, metavar="KEY", help="swept key for the horizontal axis")
    p.add_argument("--y", required=True, metavar="QUANTITY", help="result column, e.g. bodies.ball.mean_M.z")
    p.add_argument("--out", type=Path, help="PNG file (default: DIR/<QUANTITY>.png)")
    p.set_defaults(func=cmd_sweep_plot)


def cmd_sweep(args) -> int:
    """Exit 0 when every point is ok, 1 when a point failed, did not converge
    or missed an expectation, 2 for a bad case, key or cluster address."""
    from . import sweep as sw
    from .case import CaseError
    from .machine import usable_cores
    from .progress import Progress
    progress = Progress(True if args.progress else False if args.quiet else None)
    out = args.out or Path(args.case.stem + "_sweep")
    if args.workers is not None and args.workers < 1:
        print("volmag: error: --workers must be at least 1", file=sys.stderr)
        return EXIT_BAD_INPUT
    try:
        plan = sw.plan(args.case, dict(sw.parse_set(s) for s in args.sets), args.mode)
    except (CaseError, sw.SweepError) as e:
        print(f"volmag: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    if all(p.error for p in plan.points):
        print(f"volmag: error: no point of the sweep is a valid case: {plan.points[0].error}", file=sys.stderr)
        return EXIT_BAD_INPUT
    pending = sw.pending(plan, out)
    try:
        if pending:
            workers = args.workers or (None if args.scheduler else min(len(pending), usable_cores()))
            with sw.cluster(args.scheduler, workers) as client:
                progress(f"Dask scheduler {client.scheduler.address}, "
                         f"{len(client.scheduler_info()['workers'])} workers")
                rows = sw.run_sweep(plan, out, client, progress)
        else:
            rows = sw.run_sweep(plan, out, None, progress)
    except KeyboardInterrupt:
        print(f"volmag: interrupted; finished points are kept in {out}, run the sweep again to resume",
              file=sys.stderr)
        return EXIT_INTERRUPTED
    except OSError as e:  # no scheduler at that address, or the folder cannot be written
        print(f"volmag: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    counts = {k: sum(r["status"] == k for r in rows) for k in sw.STATUSES}
    print(f"{len(rows)} points: " + ", ".join(f"{n} {k}" for k, n in counts.items() if n)
          + f" ({sum(r['resumed'] for r in rows)} from earlier runs); table in {out / 'sweep.csv'}")
    for r in rows:
        if r["status"] != "ok":
            print(f"  point {r['point']} {r['status']}: {r['error']}")
    return EXIT_OK if counts["ok"] == len(rows) else EXIT_FAILED


def cmd_sweep_plot(args) -> int:
    from .sweeptable import plot_sweep
    out = args.out or args.folder / (args.y.replace("/", "_") + ".png")
    try:
        written = plot_sweep(args.folder, args.x, args.y, out)
    except ImportError as e:
        print(f"volmag: error: sweep-plot needs matplotlib (pip install 'volmag[viz]'): {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except (OSError, ValueError, KeyError) as e:
        print(f"volmag: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    print(f"volmag: plot written to {written}", file=sys.stderr)
    return EXIT_OK


# ---------------------------------------------------------------------------
# volmag demag CASE: N(chi) tables;  volmag correct CASE: measured -> intrinsic curve

def add_correction_parsers(sub) -> None:
    d = sub.add_parser("demag", help="demagnetising tensor of each body across susceptibility, N(chi)")
    d.add_argument("case", type=Path)
    d.add_argument("--chi", default="0,1,10,100,1000,inf",
                   help="susceptibilities, comma-separated; inf is the ideal soft limit (default 0,1,10,100,1000,inf)")
    d.add_argument("--body", action="append", help="only this body (repeatable; default: every body)")
    d.add_argument("--fluxmetric", choices=("x", "y", "z"),
                   help="also the mid-plane fluxmetric factor along this axis (default: the case's [demag] fluxmetric)")
    d.add_argument("--out", type=Path, help="CSV table to write (default: CASE name with _demag.csv, here)")
    c = sub.add_parser("correct", help="intrinsic curve M(H_internal) of a sample from its measured moment curve")
    c.add_argument("case", type=Path)
    c.add_argument("--body", required=True, help="the sample: a body of the case")
    c.add_argument("--data", type=Path, required=True,
                   help="CSV: applied field, moment (along the case's uniform field), one point a line")
    c.add_argument("--field-unit", help="A/m, kA/m, Oe, kOe, T or mT (T: mu0 H); or a units row in the data")
    c.add_argument("--moment-unit", help="A*m^2 or emu; or a units row in the data")
    c.add_argument("--volume", type=float, metavar="M3", help="sample volume, m^3 (default: the body's shape volume)")
    c.add_argument("--mass", type=float, metavar="KG", help="sample mass, kg (with --density)")
    c.add_argument("--density", type=float, metavar="KG_M3", help="sample density, kg/m^3 (with --mass)")
    c.add_argument("--out", type=Path, required=True, help="corrected curve to write (CSV)")
    c.add_argument("--results", type=Path, help="HDF5 results file (default: OUT with .h5)")
    c.add_argument("--plot", type=Path, help="PNG plot (default: OUT with .png)")
    c.add_argument("--tolerance", type=float, default=1e-3,
                   help="largest relative mismatch of the simulated apparent curve (default 1e-3)")
    c.add_argument("--max-iterations", type=int, default=12, help="curve updates at most (default 12)")
    c.add_argument("--linear-tolerance", type=float, default=0.01,
                   help="linear region: chord susceptibility within this of the first point's (default 0.01)")
    for p in (d, c):
        p.add_argument("--refine", type=int, default=0, metavar="LEVELS",
                       help="refinement study on LEVELS >= 3 meshes (sizes x0.7 per level): error bars")
        p.add_argument("--cgs", action="store_true", help="also give cgs values (4 pi N, chi / 4 pi, Oe, emu/cm^3)")
        p.add_argument("--json", action="store_true", help="print one JSON object on stdout")
        p.add_argument("--quiet", action="store_true", help="no progress on stderr")
        p.add_argument("--progress", action="store_true", help="progress on stderr even when it is not a terminal")
        p.add_argument("--debug", action="store_true", help="show tracebacks")
    d.set_defaults(func=cmd_demag)
    c.set_defaults(func=cmd_correct)


def _bad_input(args, e) -> int:
    if args.debug:
        raise e
    print(f"volmag: error: {e}", file=sys.stderr)
    return EXIT_BAD_INPUT


def cmd_demag(args) -> int:
    from .case import CaseError, load_case
    from .demagtable import demag_table, format_table, parse_chis, refinement_study, table_json, write_table_csv
    from .progress import Progress
    from .run import _python_signal_handlers
    from .solve import Model, SolverError
    progress = Progress(True if args.progress else False if args.quiet else None)
    try:
        if args.refine and args.refine < 3:
            raise ValueError(f"--refine needs at least 3 meshes (got {args.refine})")
        chis = parse_chis(args.chi)
        case = load_case(args.case)
        bodies = {b.name: b for b in case.bodies}
        unknown = [n for n in args.body or () if n not in bodies]
        if unknown:
            raise ValueError(f"no body named {unknown[0]!r}; bodies: {', '.join(bodies)}")
        flux = args.fluxmetric or (case.demag.fluxmetric if case.demag else None)
        tables = []
        with _python_signal_handlers():
            for name in args.body or bodies:
                if args.refine:
                    tables.append(refinement_study(bodies[name], chis, args.refine, options=case.solver,
                                                   fluxmetric_axis=flux, progress=progress))
                else:
                    model = Model.build([bodies[name]], progress)
                    tables.append(demag_table(model, name, chis, case.solver, flux, progress))
        out = write_table_csv(args.out or Path(args.case.stem + "_demag.csv"), tables, args.cgs)
    except (CaseError, SolverError, ValueError, FileNotFoundError, OSError) as e:
        return _bad_input(args, e)
    progress(f"table written to {out}")
    if args.json:
        print(json.dumps({t.body: table_json(t, args.cgs) for t in tables}))
    else:
        print("\n\n".join(format_table(t, args.cgs) for t in tables))
    return EXIT_OK


def cmd_correct(args) -> int:
    from .case import CaseError, load_case
    from .correction import (correct_curve, correction_summary, field_direction, format_correction,
                             plot_correction, read_curve, sample_volume, write_corrected_csv,
                             write_correction_results)
    from .progress import Progress
    from .run import _python_signal_handlers
    from .solve import Model, SolverError
    progress = Progress(True if args.progress else False if args.quiet else None)
    try:
        if args.refine and args.refine < 3:
            raise ValueError(f"--refine needs at least 3 meshes (got {args.refine})")
        case = load_case(args.case)
        body = next((b for b in case.bodies if b.name == args.body), None)
        if body is None:
            raise ValueError(f"no body named {args.body!r}; bodies: {', '.join(b.name for b in case.bodies)}")
        curve = read_curve(args.data, args.field_unit, args.moment_unit)
        volume, how = sample_volume(body, args.volume, args.mass, args.density)
        u = field_direction(case.sources)
        with _python_signal_handlers():
            model = Model.build([body], progress)
            c = correct_curve(model, body.name, curve.H_applied, curve.moment, volume, u, case.solver,
                              tolerance=args.tolerance, max_iterations=args.max_iterations,
                              linear_tolerance=args.linear_tolerance, refine=args.refine, volume_from=how,
                              progress=progress)
        written = [write_corrected_csv(args.out, c, args.cgs),
                   write_correction_results(args.results or args.out.with_suffix(".h5"), c, body.name, case,
                                            curve, model, __version__),
                   plot_correction(args.plot or args.out.with_suffix(".png"), c, body.name)]
    except (CaseError, SolverError, ValueError, FileNotFoundError, OSError) as e:
        return _bad_input(args, e)
    progress("written: " + ", ".join(map(str, written)))
    if args.json:
        print(json.dumps(correction_summary(c, body.name, curve)))
    else:
        print(format_correction(c, body.name))
    return EXIT_OK if c.converged else EXIT_FAILED


if __name__ == "__main__":
    sys.exit(main())
