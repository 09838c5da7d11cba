"""Sweep throughput on a local Dask cluster of 1 and 2 workers.

A mid-size case (a sphere of ~2000 nodes, chi swept over 8 values) is run
as a sweep on a fresh local cluster of each size, into a fresh folder (no
point resumed). Prints points per minute with and without the cluster's
start-up, the mean wall time of a point on its worker, and the speed-up
over one worker. Wall times include meshing,
assembly and solve of each point, one solver thread per worker.

    python benchmarks/bench_sweep.py [--points N] [--size H] [--surface HS]
"""
import argparse
import os
import tempfile
import time
from pathlib import Path

from volmag import sweep as sw
from volmag.machine import usable_cores

CASE = """\
title = "sweep throughput: sphere"
[[material]]
name = "sample"
susceptibility = 10.0
[[body]]
name = "ball"
material = "sample"
shape = {{ type = "sphere", radius = 1.0 }}
mesh = {{ element = "tet", size = {size}, surface_size = {surface} }}
[[source]]
type = "uniform"
H = [0.0, 0.0, 1.0]
"""


def main():
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--points", type=int, default=8)
    ap.add_argument("--size", type=float, default=0.5)
    ap.add_argument("--surface", type=float, default=0.1)
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2])
    args = ap.parse_args()
    chis = [round(1.5 ** k, 6) for k in range(args.points)]
    rows = []
    with tempfile.TemporaryDirectory() as tmp:
        case = Path(tmp) / "ball.toml"
        case.write_text(CASE.format(size=args.size, surface=args.surface))
        plan = sw.plan(case, {"material.sample.susceptibility": chis})
        for n in args.workers:
            t0 = time.perf_counter()
            with sw.cluster(workers=n) as client:
                t1 = time.perf_counter()
                table = sw.run_sweep(plan, Path(tmp) / f"w{n}", client)
                t2 = time.perf_counter()
            assert all(r["status"] == "ok" for r in table), [r["error"] for r in table]
            rows.append((n, t1 - t0, t2 - t1, table[0]["solver.unknowns"], sum(r["seconds"] for r in table)))
    print(f"\nsweep of {args.points} points, sphere with {rows[0][3]:.0f} unknowns "
          f"(size {args.size}, surface {args.surface}); {usable_cores()} cores, load average "
          f"{os.getloadavg()[0]:.1f} (other work on the machine slows the larger cluster most)")
    print(f"{'workers':>7} {'start s':>8} {'sweep s':>8} {'points/min':>11} {'incl. start':>12} "
          f"{'s/point':>8} {'speed-up':>9}")
    base = rows[0][2]
    for n, start, run, _, busy in rows:
        print(f"{n:>7} {start:8.1f} {run:8.1f} {60 * args.points / run:11.1f} "
              f"{60 * args.points / (start + run):12.1f} {busy / args.points:8.1f} {base / run:9.2f}")


if __name__ == "__main__":
    main()
