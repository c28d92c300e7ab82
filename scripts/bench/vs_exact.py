"""Benchmark 3: the engine against the exact peers, dense exact evolution and dynamical typicality.

Usage:  python scripts/bench/vs_exact.py [--Ws 6 1] [--Ls 8 10 12 14 16 18 20] [--dense-max 12]
                                         [--typ-full-max 20] [--tol 1e-3] [--out NAME]

Random-field Heisenberg chain (delta = 1), one disorder realization per W: the fields of L sites are the first
L of a draw for 24 sites (seed 5), so every L sees the same fields near the left end. W = Z at site L // 2,
output C_Z(r, t) at every site r on a log time grid (W = 6: 0.5 ... 16, six times; W = 1: 0.25 ... 4, five).
Matched accuracy |dC| <= tol:
  * engine: order 4, dt = 0.1, and the smallest chi in (8, 16, 32, 64, 128) whose max |dC| against dense
    exact evolution at L = 12 is <= tol (chosen per W, then used at every L);
  * typicality: error 1/sqrt((2^L + 1) n) for n Haar states, so n = ceil(1 / (tol^2 (2^L + 1))) states; the
    measured time of one state (all probe sites in one block of vectors) times n. Above --typ-full-max the
    time of one state is extrapolated geometrically from the last two measured L (marked "extrapolated").
  * dense: exact, measured for L <= --dense-max.
Prints one table per W with the crossover L (smallest L from which the engine beats the fastest exact peer)
and the ratio typicality / engine at L = 20; writes data/benchmarks/vs_exact_W<..>.json.
Single BLAS thread (set OPENBLAS_NUM_THREADS to override). A benchmark, not a test.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import math  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import mpo_fronts as mf  # noqa: E402
from mpo_fronts.exact import exact_otoc, typicality_otoc  # noqa: E402
from common import limit_blas, table, write_json  # noqa: E402

GRIDS = {6.0: np.geomspace(0.5, 16.0, 6), 1.0: np.geomspace(0.25, 4.0, 5)}
CHIS = (8, 16, 32, 64, 128)
ORDER, DT = 4, 0.1


def chain_for(L: int, W: float, seed: int = 5):
    fields = mf.models.draw_fields(24, W, seed)[:L]
    return mf.xxz_chain(L, delta=1.0, fields=fields)


def timed(fn):
    t0 = time.perf_counter()
    out = fn()
    return time.perf_counter() - t0, out


def engine(chain, times, chi):
    return timed(lambda: mf.evolve_otoc(chain, w="Z", site=chain.L // 2, times=times, chi=chi, dt=DT,
                                        order=ORDER))


def typicality(chain, times, sites):
    return timed(lambda: typicality_otoc(chain, w="Z", site=chain.L // 2, v="Z", times=times, seed=0,
                                         n_states=1, probe_sites=sites))


def run_W(W: float, Ls, dense_max: int, typ_full_max: int, tol: float) -> dict:
    times = GRIDS[W]
    # 1. engine chi for the tolerance, against dense exact at L = 12
    ref_chain = chain_for(12, W)
    t_ref, ref = timed(lambda: exact_otoc(ref_chain, w="Z", site=6, times=times))
    chi_sel, conv = None, []
    for chi in CHIS:
        t_e, res = engine(ref_chain, times, chi)
        err = float(np.abs(res.otoc("Z") - ref.otoc("Z")).max())
        conv.append({"chi": chi, "max|dC|": err, "t_s": t_e})
        if err <= tol:
            chi_sel = chi
            break
    if chi_sel is None:
        chi_sel = CHIS[-1]
    print(f"W = {W}: engine chi = {chi_sel} (order {ORDER}, dt {DT}) from L = 12: {conv}", flush=True)
    rows, per_state = [], {}
    for L in Ls:
        chain = chain_for(L, W)
        row: dict = {"L": L}
        t_e, res = engine(chain, times, chi_sel)
        row.update(engine_s=t_e, engine_max_bond=int(res.max_bond.max()),
                   engine_discarded=float(res.discarded_weight[-1]))
        if L <= dense_max:
            t_d, ex = timed(lambda: exact_otoc(chain, w="Z", site=L // 2, times=times))
            row["dense_s"] = t_d
            row["engine_err_vs_dense"] = float(np.abs(res.otoc("Z") - ex.otoc("Z")).max())
        n_states = math.ceil(1.0 / (tol**2 * (2**L + 1)))
        if L <= typ_full_max:
            t_1, typ = typicality(chain, times, None)  # one state, every probe site in one block
            per_state[L] = t_1
            if L > 12:
                row["engine_vs_typ_max|dC|"] = float(np.abs(res.otoc("Z") - typ.otoc).max())
                row["typ_sigma"] = typ.expected_error
        else:  # geometric extrapolation from the last two measured lengths
            done = sorted(per_state)
            a, b = done[-2], done[-1]
            per_state[L] = per_state[b] * (per_state[b] / per_state[a]) ** ((L - b) / (b - a))
        row["typ_state_s"] = per_state[L]
        row["typ_s"] = per_state[L] * n_states
        row["typ_est"] = "measured" if (L <= typ_full_max and n_states == 1) else (
            f"1 state x {n_states}" if L <= typ_full_max else "extrapolated")
        row["typ_states"] = n_states
        exact_best = min(v for v in (row.get("dense_s"), row["typ_s"]) if v is not None)
        row["exact_best/engine"] = exact_best / t_e
        rows.append(row)
        print(f"  L = {L}: {row}", flush=True)
    crossover = next((r["L"] for i, r in enumerate(rows) if all(x["exact_best/engine"] > 1 for x in rows[i:])),
                     None)
    at20 = next((r["typ_s"] / r["engine_s"] for r in rows if r["L"] == 20), None)
    return {"W": W, "times": times, "chi": chi_sel, "order": ORDER, "dt": DT, "convergence_L12": conv,
            "dense_L12_s": t_ref, "rows": rows, "crossover_L": crossover, "typ_over_engine_L20": at20,
            "typ_full_max": typ_full_max}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--Ws", type=float, nargs="+", default=[6.0, 1.0])
    ap.add_argument("--Ls", type=int, nargs="+", default=[8, 10, 12, 14, 16, 18, 20])
    ap.add_argument("--dense-max", type=int, default=12)
    ap.add_argument("--typ-full-max", type=int, default=20,
                    help="largest L where one typicality state is timed (above: extrapolated)")
    ap.add_argument("--tol", type=float, default=1e-3)
    ap.add_argument("--out", default=None, help="JSON name under data/benchmarks (default vs_exact_W<..>)")
    args = ap.parse_args(argv)
    import quimb.tensor  # noqa: F401
    _blas = limit_blas(int(os.environ["OPENBLAS_NUM_THREADS"]))  # noqa: F841
    out = []
    for W in args.Ws:
        r = run_W(W, args.Ls, args.dense_max, args.typ_full_max, args.tol)
        out.append(r)
        print()
        print(f"W = {W}: times {np.round(r['times'], 3).tolist()}, engine chi {r['chi']} order {ORDER} dt {DT}; "
              f"typicality n_states for sigma <= {args.tol}")
        print(table(r["rows"], ["L", "engine_s", "dense_s", "typ_state_s", "typ_states", "typ_s", "typ_est",
                                "exact_best/engine",
                                "engine_err_vs_dense", "engine_vs_typ_max|dC|", "engine_max_bond"]))
        print(f"crossover L = {r['crossover_L']}; typicality / engine at L = 20: {r['typ_over_engine_L20']}")
        print(flush=True)
    name = args.out or "vs_exact_" + "_".join(f"W{W:g}" for W in args.Ws)
    path = write_json(name, {"settings": vars(args), "results": out})
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
