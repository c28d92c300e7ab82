"""Where the time of a U(1) step goes: cProfile of ChargeTEBD Trotter steps at a saturated bond dimension.

Usage:  nice -n 10 python scripts/bench/u1_profile.py [--chi 64] [--L 32] [--W 6] [--t-pre 8] [--steps 2]
                                                      [--dt 0.1859] [--top 25] [--gate-update svd]
                                                      [--name u1_profile]

Random-field Heisenberg chain (seed 1), W = Z at the centre. The engine first evolves to ``--t-pre`` (order 2,
dt 0.1, not profiled) so that the bonds near W have reached chi; then one warm-up step and ``--steps``
profiled steps of order 4 Blanes-Moan at ``--dt`` (the step dt = "auto" picks for this chain up to t = 1000,
scripts/bench/long_times.py), applied layer by layer as BrickworkEngine.run does, with the gate update of
``--gate-update`` (evolution.gate_update). Prints the functions by
own time (tottime) and by cumulative time, and the share of the step spent in LAPACK SVD/QR, in the gate
application (matmul) and in the rest. One BLAS thread; writes data/benchmarks/<name>.json. Shares of one
profile on a shared machine, not absolute times.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import cProfile  # noqa: E402
import io  # noqa: E402
import pstats  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import mpo_fronts as mf  # noqa: E402
from common import limit_blas, write_json  # noqa: E402
from mpo_fronts.schedules import block_layers  # noqa: E402
from mpo_fronts.u1 import ChargeTEBD  # noqa: E402


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--chi", type=int, default=64)
    ap.add_argument("--L", type=int, default=32)
    ap.add_argument("--W", type=float, default=6.0)
    ap.add_argument("--t-pre", type=float, default=8.0)
    ap.add_argument("--steps", type=int, default=2)
    ap.add_argument("--dt", type=float, default=0.1859)
    ap.add_argument("--top", type=int, default=25)
    ap.add_argument("--gate-update", choices=("svd", "qr"), default="svd")
    ap.add_argument("--name", default="u1_profile")
    args = ap.parse_args(argv)
    _blas = limit_blas(int(os.environ["OPENBLAS_NUM_THREADS"]))  # noqa: F841

    chain = mf.xxz_chain(args.L, W=args.W, seed=1)
    eng = ChargeTEBD(chain, "Z", args.L // 2, chi=args.chi, dt=0.1, order=2,
                     gate_update=args.gate_update)
    for _ in eng.run([args.t_pre]):
        pass
    dims = [A.shape[2] for A in eng.arrays[:-1]]
    print(f"after t = {args.t_pre}: bond dimensions {dims}, discarded {eng.discarded_weight:.2e}", flush=True)
    layers = block_layers(4, 1, args.dt, "blanes_moan")

    def step():
        for parity, d in layers:
            eng._apply_layer(parity, d)

    step()  # warm-up: gates of these layer lengths, index maps, LAPACK workspaces
    prof = cProfile.Profile()
    prof.enable()
    for _ in range(args.steps):
        step()
    prof.disable()
    st = pstats.Stats(prof)
    total = st.total_tt
    rows = []
    for (fname, line, func), (cc, nc, tt, ct, _) in st.stats.items():
        rows.append({"function": f"{Path(fname).name}:{line}({func})" if line else f"({func})", "calls": nc,
                     "tottime_share": tt / total, "cumtime_share": ct / total})
    rows.sort(key=lambda r: -r["tottime_share"])

    def share(*names):
        return sum(r["tottime_share"] for r in rows if r["function"].endswith(tuple(f"({n})" for n in names)))

    # the LAPACK routines are called through f2py wrappers, which cProfile does not see as calls: their time is
    # the own time of the function calling them (_svd: gesdd; _qr: geqrf and orgqr/ungqr)
    groups = {
        "_svd own time (LAPACK gesdd)": share("_svd"),
        "_qr own time (LAPACK geqrf, ungqr/orgqr) and triu": share("_qr", "triu", "tri"),
        "_gate own time (theta blocks, gate products, fancy indexing, assembly)": share("_gate"),
        "_move_center own time (R into the neighbour, assembly)": share("_move_center"),
        "_block_qr own time (sector loop, conjugate sectors)": share("_block_qr"),
        "_keep (truncation selection across sectors)": share("_keep"),
        "_to_real / _from_real_* (real v = 0 blocks)": share("_to_real", "_from_real_rows", "_from_real_cols"),
        "numpy.zeros (new tensors)": share("<built-in method numpy.zeros>"),
    }
    groups["everything else (Python and numpy overhead)"] = 1.0 - sum(groups.values())
    print(f"{args.steps} step(s) of {len(layers)} layers at chi {args.chi}: profiled; shares of own time:")
    out = io.StringIO()
    pstats.Stats(prof, stream=out).sort_stats("tottime").print_stats(args.top)
    print(out.getvalue())
    out = io.StringIO()
    pstats.Stats(prof, stream=out).sort_stats("cumulative").print_stats(args.top)
    print(out.getvalue())
    for k, v in groups.items():
        print(f"{k:75s} {100 * v:5.1f} %")
    n_gates = next(r["calls"] for r in rows if r["function"].endswith("(_gate)"))
    n_svd = next(r["calls"] for r in rows if r["function"].endswith("(_svd)"))
    print(f"{n_gates} gates, {n_svd} SVDs ({n_svd / n_gates:.1f} sector blocks decomposed per gate)")
    write_json(args.name, {"settings": vars(args), "bond_dims": dims, "layers_per_step": len(layers),
                              "groups_tottime_share": groups, "gates": n_gates, "svds": n_svd,
                              "total_profiled_s": total, "functions": rows[:60]})


if __name__ == "__main__":
    main()
