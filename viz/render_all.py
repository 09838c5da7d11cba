"""Render every view of a results file to PNGs, plus the HTML report.

    python viz/render_all.py RESULTS.h5 OUTDIR [--size W,H] [--quantity B|dB|ppm] [--tolerance PPM]
                             [--what VIEW,VIEW,...] [--no-report]

Writes OUTDIR/<view>.png for each view the file supports (all views, or those
named by --what) and OUTDIR/report.html; views with nothing to show (e.g. no
probe lines) are skipped with a note.
"""
import argparse
import sys
import time
from pathlib import Path

from volmag.report import write_report
from volmag.results import read_results
from volmag.views import DEFAULT_TOLERANCE_PPM, VIEWS, render


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("results", type=Path)
    ap.add_argument("outdir", type=Path)
    ap.add_argument("--size", default="1200,900", help="W,H in pixels")
    ap.add_argument("--quantity", choices=("B", "dB", "ppm"), default="ppm")
    ap.add_argument("--tolerance", type=float, default=DEFAULT_TOLERANCE_PPM, help="ppm")
    ap.add_argument("--what", default=",".join(VIEWS), help="comma-separated views (default: all)")
    ap.add_argument("--no-report", action="store_true", help="skip the HTML report")
    args = ap.parse_args(argv)
    size = tuple(int(x) for x in args.size.split(","))
    res = read_results(args.results)
    args.outdir.mkdir(parents=True, exist_ok=True)
    field = dict(quantity=args.quantity, tolerance_ppm=args.tolerance)
    for what in args.what.split(","):
        t0 = time.perf_counter()
        try:
            out = render(res, what, args.outdir / f"{what}.png", size, **(field if what in ("slice", "map") else {}))
        except ValueError as e:
            print(f"{what}: skipped ({e})")
            continue
        print(f"{what}: {out} ({time.perf_counter() - t0:.1f} s)")
    if args.no_report:
        return 0
    t0 = time.perf_counter()
    out = write_report(res, args.outdir / "report.html", **field)
    print(f"report: {out} ({time.perf_counter() - t0:.1f} s)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
