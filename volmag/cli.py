"""Command line: `volmag run CASE [--out FILE.h5] [--json] [--quiet] [--debug]`.

Exit status: 0 converged and every expectation holds; 1 an expectation failed
or the solve did not converge; 2 bad input (case file, mesh file, a model too
large for the chosen method).
"""
from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path

import numpy as np

from . import __version__

EXIT_OK, EXIT_FAILED, EXIT_BAD_INPUT = 0, 1, 2


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(prog="volmag", description=__doc__.split("\n")[0])
    parser.add_argument("--version", action="version", version=f"volmag {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)
    run = sub.add_parser("run", help="run a case file")
    run.add_argument("case", type=Path)
    run.add_argument("--out", type=Path, help="results file (HDF5); default: CASE name with .h5, here")
    run.add_argument("--json", action="store_true", help="print one JSON summary object on stdout")
    run.add_argument("--quiet", action="store_true", help="no progress on stderr")
    run.add_argument("--debug", action="store_true", help="show tracebacks")
    args = parser.parse_args(argv)
    try:
        return cmd_run(args)
    except KeyboardInterrupt:
        print("volmag: interrupted; no results file was changed", file=sys.stderr)
        return 130


def cmd_run(args) -> int:
    from .case import CaseError, load_case
    from .progress import Progress
    from .results import write_results
    from .run import run_case
    from .solve import SolverError
    progress = Progress(False if args.quiet else None)
    try:
        case = load_case(args.case)
        run = run_case(case, progress)
    except (CaseError, SolverError, ValueError, FileNotFoundError) as e:
        if args.debug:
            raise
        print(f"volmag: error: {e}", file=sys.stderr)
        return EXIT_BAD_INPUT
    out = args.out or Path(args.case.stem + ".h5")
    write_results(out, run, __version__)
    progress(f"results written to {out}")
    summary = run.summary()
    if args.json:
        print(json.dumps(summary, default=_plain))
    else:
        print(format_summary(summary))
    if not summary["converged"] or not all(e["ok"] for e in summary["expect"]):
        return EXIT_FAILED
    return EXIT_OK


def _plain(x):
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, np.ndarray):
        return x.tolist()
    raise TypeError(type(x))


def format_summary(s: dict) -> str:
    """Human-readable run summary."""
    lines = [s["title"], ""]
    sv = s["solver"]
    lines.append(f"solver: {sv['method']}, {sv['unknowns']} unknowns, {sv['iterations']} iterations, "
                 f"residual {sv['residual']:.2e}, {sv['seconds']:.1f} s, "
                 f"{'converged' if s['converged'] else 'NOT CONVERGED'}")
    for m in s["mesh"]:
        lines.append(f"mesh: {m['summary']}")
    for name, b in s["bodies"].items():
        lines.append(f"body {name}: volume {b['volume']:.6g} m^3, mean M "
                     f"[{', '.join(f'{v:.6g}' for v in b['mean_M'])}] A/m")
    for name, d in s["demag"].items():
        lines.append(f"demagnetising tensor of {name} (chi = {d['chi']}):")
        lines += ["  " + "  ".join(f"{v:+.6f}" for v in row) for row in d["N"]]
        if "fluxmetric" in d:
            lines.append(f"  fluxmetric factor along {d['fluxmetric']['axis']}: {d['fluxmetric']['N']:.6f}")
    for name, p in s["probes"].items():
        lines.append(f"probe {name}: {p['points']} points, mean B "
                     f"[{', '.join(f'{v:.6g}' for v in p['B'])}] T")
    if s["expect"]:
        lines.append("expectations:")
        for e in s["expect"]:
            got = "error: " + e["error"] if e.get("error") else f"{e['got']:.6g}"
            lines.append(f"  {'pass' if e['ok'] else 'FAIL'}  {e['quantity']} = {got} (expected {e['value']:.6g})")
    return "\n".join(lines)


if __name__ == "__main__":
    sys.exit(main())
