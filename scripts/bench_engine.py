"""First benchmark: the engine (mf.evolve_otoc) against a plain complex TEBD of the vectorised operator
written with quimb's own TEBD class (see scripts/bench/common.py), on the same chain, times and accuracy.

Usage:  python scripts/bench_engine.py [--L 32] [--chis 32 64] [--t 4] [--dt 0.05]

BLAS runs single-threaded in both codes (OPENBLAS_NUM_THREADS etc. default to 1 here; set them to override).

Random-field Heisenberg chain (delta = 1, W = 1, seed 1), W = Z at the centre site, C(r, t) at t = 1, 2, 4 for
the probes X and Z, second-order Trotter in both (a verification step first checks that each code converges
to dense exact evolution at L = 6 with the expected order). Prints the wall times, the ratio peer / engine and
max |dC| between the two, and writes data/benchmarks/bench_engine.json. A benchmark, not a test.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")  # before numpy / scipy / numba load their thread pools

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent / "bench"))
import mpo_fronts as mf  # noqa: E402
from common import limit_blas, quimb_tebd_otoc, side_by_side, table, warm_up, write_json  # noqa: E402


def verify_orders() -> list[dict]:
    """Both codes against dense exact evolution at L = 6: error ratio when dt halves (4 for order 2)."""
    chain = mf.xxz_chain(6, W=1.0, seed=3)
    ref = mf.exact_otoc(chain, "Z", 2, [1.0])
    rows = []
    for name in ("engine", "quimb TEBD"):
        for order in (2, 4):
            errs = []
            for dt in (0.2, 0.1):
                if name == "engine":
                    res = mf.evolve_otoc(chain, "Z", 2, [1.0], chi=256, dt=dt, order=order)
                    c = {v: res.otoc(v) for v in "XZ"}
                else:
                    c = quimb_tebd_otoc(chain, "Z", 2, [1.0], chi=256, dt=dt, order=order)["otoc"]
                errs.append(max(np.abs(c[v] - ref.otoc(v)).max() for v in "XZ"))
            rows.append({"code": name, "order": order, "err(dt=0.2)": errs[0], "err(dt=0.1)": errs[1],
                         "ratio": errs[0] / errs[1], "expected": 2.0**order})
    return rows


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--L", type=int, default=32)
    ap.add_argument("--chis", type=int, nargs="+", default=[32, 64])
    ap.add_argument("--t", type=float, default=4.0)
    ap.add_argument("--dt", type=float, default=0.05)
    ap.add_argument("--W", type=float, default=1.0)
    ap.add_argument("--seed", type=int, default=1)
    args = ap.parse_args(argv)
    import quimb.tensor  # noqa: F401 - load every BLAS/LAPACK user before fixing the thread count
    _blas = limit_blas(int(os.environ["OPENBLAS_NUM_THREADS"]))  # noqa: F841 - keep the limit alive

    print("verification at L = 6 against dense exact evolution (t = 1, max |dC| over X, Z probes):")
    vrows = verify_orders()
    print(table(vrows, ["code", "order", "err(dt=0.2)", "err(dt=0.1)", "ratio", "expected"]))

    chain = mf.xxz_chain(args.L, delta=1.0, W=args.W, seed=args.seed)
    site = args.L // 2
    times = [args.t / 4, args.t / 2, args.t]
    warm_up()  # quimb's first use compiles (numba) and caches; the engine builds its gate cache

    rows = []
    for chi in args.chis:
        row, _, _ = side_by_side(chain, site, times, chi, args.dt)
        row["L"] = args.L
        rows.append(row)
        t_e, t_q, dC = row["t_engine_s"], row["t_quimb_s"], row["max|dC|"]
        print(f"chi = {chi}: engine {t_e:.2f} s, quimb TEBD {t_q:.2f} s "
              f"(evolution {row['t_quimb_evolve_s']:.2f} s), ratio {t_q / t_e:.2f}x, max|dC| = {dC:.2e}",
              flush=True)
    print()
    print(f"random-field Heisenberg L = {args.L}, W = {args.W}, seed {args.seed}, W = Z at site {site}, "
          f"times {times}, dt = {args.dt}, order 2, BLAS threads {os.environ['OPENBLAS_NUM_THREADS']}")
    print(table(rows, ["L", "chi", "t_engine_s", "t_quimb_s", "ratio", "ratio_evolve_only", "max|dC|",
                       "engine_discarded", "engine_max_bond", "quimb_max_bond"]))
    path = write_json("bench_engine", {"settings": vars(args), "site": site, "times": times,
                                       "verification": vrows, "rows": rows,
                                       "when": time.strftime("%Y-%m-%d %H:%M:%S")})
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
