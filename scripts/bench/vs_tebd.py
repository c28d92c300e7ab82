"""Benchmark 1: the engine against a plain complex TEBD of the vectorised operator with quimb's TEBD class.

Usage:  python scripts/bench/vs_tebd.py [--L 32] [--chis 32 64 128] [--t 4] [--dt 0.05] [--chains mfi heis]
                                       [--truncations svd rsvd eigh] [--name vs_tebd]

Same chain, times (t/4, t/2, t), Trotter order (2), step and truncation (at most chi values, relative floor
1e-13) in both; W = Z at the centre. Chains: mixed-field Ising (J, g, h) = (1, 1.05, 0.5) and random-field
Heisenberg W = 1 (seed 1). Prints wall times, the ratio quimb / engine, max |dC| between the two over the
probes X and Z, and writes data/benchmarks/vs_tebd.json. With several engine truncation routes, each route after
the first is also compared with the first one's C (max |dC| and the largest relative change where
1e-10 < C_Z < 1e-4, ahead of the front). The peer is described in scripts/bench/common.py.
Single BLAS thread (set OPENBLAS_NUM_THREADS to override). A benchmark, not a test.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import mpo_fronts as mf  # noqa: E402
import mpo_fronts.evolve  # noqa: E402,F401
from common import limit_blas, side_by_side, table, warm_up, write_json  # noqa: E402

CHAINS = {"mfi": ("mixed-field Ising", lambda L: mf.mixed_field_ising_chain(L)),
          "heis": ("Heisenberg W=1", lambda L: mf.xxz_chain(L, delta=1.0, W=1.0, seed=1))}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--L", type=int, default=32)
    ap.add_argument("--chis", type=int, nargs="+", default=[32, 64, 128])
    ap.add_argument("--t", type=float, default=4.0)
    ap.add_argument("--dt", type=float, default=0.05)
    ap.add_argument("--chains", nargs="+", default=list(CHAINS), choices=list(CHAINS))
    ap.add_argument("--truncations", nargs="+", default=["svd"], choices=list(mf.truncation.route_names()),
                    help="engine truncation routes, each against the same quimb run")
    ap.add_argument("--name", default="vs_tebd", help="JSON file name under data/benchmarks/")
    args = ap.parse_args(argv)
    import quimb.tensor  # noqa: F401
    _blas = limit_blas(int(os.environ["OPENBLAS_NUM_THREADS"]))  # noqa: F841

    warm_up()  # numba compilation in quimb, gate caches
    site = args.L // 2
    times = [args.t / 4, args.t / 2, args.t]
    rows = []
    for key in args.chains:
        label, make = CHAINS[key]
        chain = make(args.L)
        for chi in args.chis:
            peer = first = None
            for truncation in args.truncations:
                row, peer, res = side_by_side(chain, site, times, chi, args.dt, truncation=truncation, peer=peer,
                                              reference=first)
                first = res if first is None else first
                row.update(chain=label, L=args.L,
                           graded=bool(chain.conserves_sz and chi >= getattr(mf.evolve, "GRADED_MIN_CHI", 10**9)))
                rows.append(row)
                t_e, t_q, dC = row["t_engine_s"], row["t_quimb_s"], row["max|dC|"]
                vs = (f", vs {args.truncations[0]} max|dC| {row['max|dC| vs ref']:.1e}, ahead "
                      f"{row['rel dC ahead vs ref']:.1e}" if "max|dC| vs ref" in row else "")
                print(f"{label}, chi {chi}, engine truncation {truncation}: engine {t_e:.2f} s, quimb {t_q:.2f} s, "
                      f"ratio {t_q / t_e:.2f}x, max|dC| {dC:.1e}{vs}", flush=True)
    print()
    print(f"L = {args.L}, W = Z at site {site}, times {times}, dt = {args.dt}, order 2, "
          f"BLAS threads {os.environ['OPENBLAS_NUM_THREADS']}")
    print(table(rows, ["chain", "chi", "truncation", "t_engine_s", "t_quimb_s", "ratio", "ratio_evolve_only", "max|dC|",
                       "max|dC| vs ref", "rel dC ahead vs ref", "engine_discarded", "engine_max_bond",
                       "quimb_max_bond"]))
    path = write_json(args.name, {"settings": vars(args), "site": site, "times": times, "rows": rows})
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
