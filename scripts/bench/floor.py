"""Benchmark 2: the engine against its own floor, the dense SVDs it cannot avoid.

Usage:  python scripts/bench/floor.py [--L 32] [--chis 32 64 128] [--t0 4] [--steps 5] [--no-e2e | --e2e-only]

For each chain (mixed-field Ising; random-field Heisenberg W = 1, graded and ungraded), truncation route
(svd, eigh, rsvd) and chi, the engine (W = Z at the centre, dt = 0.05, order 2) is evolved to t0, where the central
bonds sit at chi; then the wall time of single Trotter steps is measured (median of --steps) and compared with
the floor: the sum, over the gates of one step, of the time numpy.linalg.svd (gesdd) takes on matrices of the
same shapes, the very gate matrices the engine splits (captured during one extra step). For the graded engine
the SVDs of their Z2 blocks (what the graded SVD route decomposes) are reported too ("block floor"). The
captured blocks are also decomposed with other routines (scipy gesvd, quimb's svd_via_eig Gram-matrix route and
its randomized svd_rand_truncated, both limited to chi; the engine's randomized route), with their error
against the optimal rank-k truncation. An end-to-end check (unless --no-e2e) runs the ungraded engine with each
alternative plugged in, and with the engine's own truncation='eigh' and 'rsvd', at L = 32, chi = 64, t = t0/4, t0/2, t0, and reports max |dC|
against the gesdd engine and the largest relative error where 1e-10 < C < 1e-4 (ahead of the front).
Writes data/benchmarks/floor.json (floor_e2e.json with --e2e-only).
Single BLAS thread (set OPENBLAS_NUM_THREADS to override). A benchmark, not a test.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import scipy.linalg  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import mpo_fronts as mf  # noqa: E402
import mpo_fronts.evolve as ev  # noqa: E402
import mpo_fronts.truncation as tr  # noqa: E402
from common import limit_blas, table, write_json  # noqa: E402

OVERSAMPLE = 10


# ------------------------------------------------------------------------------------------ decompositions
def _gesdd(m, chi):
    return np.linalg.svd(m, full_matrices=False)


def _gesvd(m, chi):
    return scipy.linalg.svd(m, full_matrices=False, lapack_driver="gesvd", check_finite=False)


def _eig(m, chi):
    from quimb.tensor.decomp import svd_via_eig

    return svd_via_eig(m, absorb=None, max_bond=min(chi + OVERSAMPLE, min(m.shape)))


def _rand(m, chi):
    from quimb.tensor.decomp import svd_rand_truncated

    k = chi + OVERSAMPLE
    if min(m.shape) <= 2 * k:  # nothing to gain from a projection: exact SVD
        return np.linalg.svd(m, full_matrices=False)
    return svd_rand_truncated(m, k, absorb=None, oversample=OVERSAMPLE, num_iterations=2, seed=0)


def _engine_rsvd(m, chi):
    """The engine's randomized route (truncation._rsvd) where it applies, gesdd elsewhere (as the engine does)."""
    if not tr.rsvd_samples(m.shape, chi):
        return np.linalg.svd(m, full_matrices=False)
    return tr._rsvd(m, chi + tr.RSVD_OVERSAMPLE)[:3]


METHODS = {"gesdd": _gesdd, "gesvd": _gesvd, "eig (quimb svd_via_eig)": _eig, "randomized (quimb rsvd)": _rand,
           "rsvd (engine)": _engine_rsvd}


def _with_tail(fn, chi):
    """An engine-compatible _svd: the method's factors plus one entry carrying the weight it did not return,
    so that the engine's ledger (sum of dropped s^2) stays the exact norm loss."""
    def svd(m):
        u, s, vt = fn(m, chi)
        rest = max(float(np.sum(m * m)) - float(np.sum(s * s)), 0.0)
        if s.size < min(m.shape) and rest > 0:
            s = np.append(s, np.sqrt(rest))
            u = np.hstack([u, np.zeros((u.shape[0], 1))])
            vt = np.vstack([vt, np.zeros((1, vt.shape[1]))])
        return u, s, vt
    return svd


def time_call(fn, *args, repeat=3):
    best = np.inf
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn(*args)
        best = min(best, time.perf_counter() - t0)
    return best


# ------------------------------------------------------------------------------------------ measurement
def measure(chain, chi, t0, steps, graded, truncation="svd", dt=0.05):
    eng = ev.OperatorTEBD(chain, w="Z", site=chain.L // 2, chi=chi, dt=dt, order=2, graded=graded,
                          truncation=truncation)
    times = t0 + dt * np.arange(steps + 2)
    gen = eng.run(times)
    next(gen)  # evolve to t0
    step_times = []
    for _ in range(steps):
        t_a = time.perf_counter()
        next(gen)
        step_times.append(time.perf_counter() - t_a)
    captured = []  # (full gate matrix, its Z2 blocks) of one more step
    original = tr.route(truncation)

    def recorder(blocks, chi_, cutoff, to_right, shape):
        theta = np.zeros(shape)
        for _, rows, cols, m in blocks:
            if rows is None:
                theta = m.copy()
            else:
                theta[np.ix_(rows, cols)] = m
        captured.append((theta, [m.copy() for *_, m in blocks]))
        return original.split_blocks(blocks, chi_, cutoff, to_right, shape)

    tr.register_route(truncation, recorder, "captures the blocks of one step", replace=True)  # a wrapped route
    try:
        next(gen)
    finally:
        tr.register_route(truncation, original.split_blocks, original.summary, replace=True)
    dense = sum(time_call(_gesdd, th, chi) for th, _ in captured)
    blocks = [m for _, bl in captured for m in bl]
    keep = [min(chi, int(np.count_nonzero(s > tr.SVD_FLOOR * s[0]))) for s in
            (np.linalg.svd(m, compute_uv=False) for m in blocks)]
    floors, errors = {}, {}
    for name, fn in METHODS.items():
        floors[name] = sum(time_call(fn, m, chi) for m in blocks)
        worst = 0.0
        for m, k in zip(blocks, keep):
            s_opt = np.linalg.svd(m, compute_uv=False)
            u, s, vt = fn(m, chi)
            u, s, vt = u[:, :k], s[:k], vt[:k]
            err = np.sum((m - (u * s) @ vt) ** 2)  # squared Frobenius error of the rank-k truncation
            worst = max(worst, abs(err - np.sum(s_opt[k:] ** 2)))
        errors[name] = worst
    shapes = sorted({th.shape for th, _ in captured})
    return {"step_s": float(np.median(step_times)), "dense_floor_s": dense, "floor_s": floors,
            "extra_error": errors, "n_gates": len(captured), "n_blocks": len(blocks),
            "shapes": [list(s) for s in shapes[-3:]], "max_bond": eng.max_bond, "discarded": eng.discarded_weight,
            "splits": dict(eng.splits)}


def _run_engine(chain, chi, times, truncation="svd", dt=0.05):
    t_a = time.perf_counter()
    eng = ev.OperatorTEBD(chain, w="Z", site=chain.L // 2, chi=chi, dt=dt, order=2, graded=False,
                          truncation=truncation)
    res = {v: [] for v in "XZ"}
    for k, e in eng.run(times):
        w = mf.readout.pauli_weights(e.arrays, e.center)
        for v in res:
            res[v].append(mf.readout.otoc_from_weights(w, v))
    return {v: np.array(x) for v, x in res.items()}, time.perf_counter() - t_a, eng.discarded_weight


def end_to_end(chain, chi, t, dt=0.05):
    """Run the ungraded engine with each decomposition plugged in, and with truncation='eigh' and 'rsvd'; C and
    time against the gesdd engine."""
    out = []
    times = [t / 4, t / 2, t]
    runs = []
    for i, (name, fn) in enumerate(METHODS.items()):
        if name == "rsvd (engine)":
            continue  # run through the engine's own option below
        route_name = f"bench_method_{i}"  # a registered route that splits with this method
        tr.register_route(route_name, tr.svd_route(_with_tail(fn, chi), route_name), name, replace=True)
        try:
            runs.append((name, *_run_engine(chain, chi, times, route_name, dt=dt)))
        finally:
            tr.unregister_route(route_name)
    runs.append(("engine truncation='eigh'", *_run_engine(chain, chi, times, "eigh", dt=dt)))
    runs.append(("engine truncation='rsvd'", *_run_engine(chain, chi, times, "rsvd", dt=dt)))
    _, ref, t_ref, _ = runs[0]
    # ahead of the front (1e-10 < C < 1e-4 in the reference) the relative error matters
    tip = (ref["Z"] > 1e-10) & (ref["Z"] < 1e-4)
    for name, C, wall, disc in runs:
        dC = max(float(np.abs(C[v] - ref[v]).max()) for v in C)
        rel = float(np.max(np.abs(C["Z"][tip] - ref["Z"][tip]) / ref["Z"][tip])) if tip.any() else 0.0
        out.append({"method": name, "wall_s": wall, "speedup": t_ref / wall, "max|dC|": dC,
                    "max_rel_dC_ahead": rel, "n_ahead": int(tip.sum()), "discarded": disc})
    return out


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--L", type=int, default=32)
    ap.add_argument("--chis", type=int, nargs="+", default=[32, 64, 128])
    ap.add_argument("--t0", type=float, default=4.0)
    ap.add_argument("--steps", type=int, default=5)
    ap.add_argument("--no-e2e", action="store_true")
    ap.add_argument("--e2e-only", action="store_true", help="only the end-to-end comparison")
    args = ap.parse_args(argv)
    import quimb.tensor  # noqa: F401 - load all BLAS users before limiting threads
    _blas = limit_blas(int(os.environ["OPENBLAS_NUM_THREADS"]))  # noqa: F841

    heis = mf.xxz_chain(args.L, W=1.0, seed=1)
    mfi = mf.mixed_field_ising_chain(args.L)
    configs = [("mixed-field Ising", mfi, False, "svd"), ("mixed-field Ising", mfi, False, "eigh"),
               ("mixed-field Ising", mfi, False, "rsvd"),
               ("Heisenberg W=1 graded", heis, True, "svd"), ("Heisenberg W=1 graded", heis, True, "eigh"),
               ("Heisenberg W=1 ungraded", heis, False, "svd"), ("Heisenberg W=1 ungraded", heis, False, "rsvd")]
    rows = []
    for label, chain, graded, truncation in ([] if args.e2e_only else configs):
        for chi in args.chis:
            m = measure(chain, chi, args.t0, args.steps, graded, truncation)
            g, d = m["floor_s"]["gesdd"], m["dense_floor_s"]
            row = {"chain": label, "truncation": truncation, "chi": chi, "max_bond": m["max_bond"],
                   "n_gates": m["n_gates"], "n_blocks": m["n_blocks"], "step_s": m["step_s"],
                   "dense_floor_s": d, "step/dense_floor": m["step_s"] / d, "block_floor_s": g,
                   "step/block_floor": m["step_s"] / g, "splits": m["splits"]}
            for name in METHODS:
                if name != "gesdd":
                    row[f"{name.split()[0]}/gesdd"] = m["floor_s"][name] / g
                    row[f"{name.split()[0]}_err"] = m["extra_error"][name]
            row["largest_shapes"] = m["shapes"]
            rows.append(row)
            print(f"{label} ({truncation}), chi {chi}: step {m['step_s'] * 1e3:.1f} ms, dense SVD floor "
                  f"{d * 1e3:.1f} ms ({m['step_s'] / d:.2f}x), block SVD floor {g * 1e3:.1f} ms "
                  f"({m['step_s'] / g:.2f}x)", flush=True)
    cols = ["chain", "truncation", "chi", "max_bond", "n_gates", "step_s", "dense_floor_s", "step/dense_floor",
            "block_floor_s", "step/block_floor", "gesvd/gesdd", "eig/gesdd", "eig_err", "randomized/gesdd",
            "randomized_err", "rsvd/gesdd", "rsvd_err"]
    print()
    print(f"one Trotter step at t0 = {args.t0}, L = {args.L} (dense floor: numpy gesdd on the captured full gate "
          "matrices; block floor: on their Z2 blocks, = dense when ungraded; *_err: largest excess squared "
          "truncation error over the optimal rank-k truncation)")
    print(table(rows, cols))
    e2e = []
    if not args.no_e2e:
        for label, chain in (("mixed-field Ising", mfi), ("Heisenberg W=1", heis)):
            for r in end_to_end(chain, 64, args.t0):
                e2e.append({"chain": label, "chi": 64, **r})
        print()
        print(f"end to end, ungraded engine with each decomposition, L = {args.L}, chi = 64, "
              f"t = {args.t0 / 4:g}, {args.t0 / 2:g}, {args.t0:g}:")
        print(table(e2e, ["chain", "method", "wall_s", "speedup", "max|dC|", "max_rel_dC_ahead", "n_ahead",
                          "discarded"]))
    name = "floor_e2e" if args.e2e_only else "floor"
    path = write_json(name, {"settings": vars(args), "rows": rows, "end_to_end": e2e})
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
