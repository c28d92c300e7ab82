"""Benchmark 5: ensemble throughput, realizations per hour with 1 and 2 local worker processes.

Usage:  python scripts/bench/throughput.py [--L 24] [--chi 32] [--W 1.0] [--t 4] [--realizations 8]
                                           [--workers 1 2]

Runs the production path (mpo_fronts.ensemble.run_ensemble: run directory, HDF5 store, one BLAS thread per
worker) on a random-field Heisenberg description into a fresh temporary directory for each worker count, and
reports wall time, realizations per hour and the speed-up over one worker. The machine's other load counts:
on a shared 2-core machine the 2-worker figure is a lower bound. Writes data/benchmarks/throughput.json.
A benchmark, not a test.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import table, write_json  # noqa: E402


def description(args) -> dict:
    return {"model": {"kind": "xxz", "L": args.L, "J": 1.0, "delta": 1.0, "W": args.W},
            "operators": {"w": "Z", "site": "center", "v": ["X", "Z"]},
            "state": {"kind": "infinite_temperature"},
            "times": {"start": 0.1, "stop": args.t, "num": 10, "spacing": "log"},
            "engine": {"chi": args.chi, "dt": 0.05, "order": 2, "cutoff": 0.0},
            "ensemble": {"realizations": args.realizations, "seed": 2718},
            "run": {"label": "throughput benchmark"}}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--L", type=int, default=24)
    ap.add_argument("--chi", type=int, default=32)
    ap.add_argument("--W", type=float, default=1.0)
    ap.add_argument("--t", type=float, default=4.0)
    ap.add_argument("--realizations", type=int, default=8)
    ap.add_argument("--workers", type=int, nargs="+", default=[1, 2])
    args = ap.parse_args(argv)
    from mpo_fronts.config import parse_description
    from mpo_fronts.ensemble import run_ensemble

    desc = parse_description(description(args), source="throughput benchmark")
    rows = []
    for n in args.workers:
        with tempfile.TemporaryDirectory() as tmp:
            t0 = time.perf_counter()
            rep = run_ensemble(desc, Path(tmp) / "run", workers=n, progress="none")
            wall = time.perf_counter() - t0
        done = len(rep.computed)
        rows.append({"workers": n, "realizations": done, "wall_s": wall, "per_hour": 3600.0 * done / wall})
        print(rows[-1], flush=True)
    for r in rows:
        r["speedup"] = r["per_hour"] / rows[0]["per_hour"]
    print()
    print(f"random-field Heisenberg L = {args.L}, W = {args.W}, chi = {args.chi}, t <= {args.t}, "
          f"{args.realizations} realizations, {os.cpu_count()} cores")
    print(table(rows, ["workers", "realizations", "wall_s", "per_hour", "speedup"]))
    path = write_json("throughput", {"settings": vars(args), "rows": rows})
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
