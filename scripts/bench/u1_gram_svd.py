"""A lever of issue 12 that did not pay: the block decompositions of the U(1) engine by eigh of the Gram matrix
instead of LAPACK gesdd.

Usage:  nice -n 10 python scripts/bench/u1_gram_svd.py [--t 12] [--repeat 2] [--chi 64]

The profile (scripts/bench/u1_profile.py) puts about half of a U(1) step in gesdd on the charge blocks (80 x 80
real, 60 x 60 complex at chi = 64). On those blocks alone, eigh of M M^dag (or M^dag M, the smaller side) plus
one product is 1.5x faster than gesdd (common practice in TEBD codes, at the price of accuracy: singular
values below sqrt(eps) s_max are lost). This script swaps mpo_fronts.u1._svd for that variant and runs the
engine itself: random-field Heisenberg chain, L = 32, W = 6, seed 1, W = Z at the centre, order 4 Blanes-Moan
at dt = 0.1859 (the step dt = "auto" picks there for t = 1000), from t = 0 to ``--t``, the two variants
interleaved ``--repeat`` times in this one process on one BLAS thread. Records the CPU time of every run, the
ratio of the medians, and max |d weight| of the single-site Pauli weights between the variants at the end;
then times both decompositions on the blocks alone (the first 800 blocks the engine decomposes in two steps
after ``--t``, recorded, best of 3 passes).
Writes data/benchmarks/u1_gram_svd.json. A benchmark, not a test; the engine keeps gesdd.
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

sys.path.insert(0, str(Path(__file__).resolve().parent))
import mpo_fronts as mf  # noqa: E402
import mpo_fronts.u1 as u1  # noqa: E402
from common import write_json  # noqa: E402

_GESDD = u1._svd


def gram_svd(m: np.ndarray):
    """(u, s, vt) of m from eigh of the Gram matrix of its smaller side (s descending)."""
    tiny = np.finfo(float).tiny
    if m.shape[0] <= m.shape[1]:
        w, U = np.linalg.eigh(m @ m.conj().T)
        U, s = U[:, ::-1], np.sqrt(np.maximum(w[::-1], 0.0))
        vt = U.conj().T @ m
        ok = s > tiny
        vt[ok] /= s[ok, None]
        return U, s, vt
    w, V = np.linalg.eigh(m.conj().T @ m)
    V, s = V[:, ::-1], np.sqrt(np.maximum(w[::-1], 0.0))
    u = m @ V
    ok = s > tiny
    u[:, ok] /= s[ok]
    return u, s, V.conj().T


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--t", type=float, default=12.0)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--chi", type=int, default=64)
    args = ap.parse_args()
    chain = mf.xxz_chain(32, W=6.0, seed=1)
    settings = mf.EvolutionSettings(chi=args.chi, dt=0.1859, order=4, splitting="blanes_moan")
    u1.ChargeTEBD(mf.xxz_chain(8, W=1.0, seed=1), "Z", 4, settings.replace(chi=8))  # imports
    cpu: dict[str, list] = {"gesdd": [], "gram": []}
    weights, disc = {}, {}
    try:
        for _ in range(args.repeat):
            for name, fn in (("gesdd", _GESDD), ("gram", gram_svd)):
                u1._svd = fn
                eng = u1.ChargeTEBD(chain, "Z", 16, settings)
                t0 = time.process_time()
                for _k, e in eng.run([args.t]):
                    pass
                cpu[name].append(time.process_time() - t0)
                weights[name], disc[name] = e.profiles()["weights"], e.discarded_weight
                print(f"{name}: {cpu[name][-1]:.1f} CPU s, discarded {disc[name]:.6e}", flush=True)
    finally:
        u1._svd = _GESDD
    blocks = []

    def recording(m):
        if len(blocks) < 800:
            blocks.append(m.copy())
        return _GESDD(m)

    u1._svd = recording
    try:
        for _k, e in eng.run([args.t, args.t + 2 * settings.dt]):
            pass
    finally:
        u1._svd = _GESDD
    alone = {}
    for name, fn in (("gesdd", _GESDD), ("gram", gram_svd)):
        best = np.inf
        for _ in range(3):
            t0 = time.process_time()
            for m in blocks:
                fn(m)
            best = min(best, time.process_time() - t0)
        alone[name] = best
    print(f"blocks alone ({len(blocks)}): gesdd {alone['gesdd']:.3f} s, gram {alone['gram']:.3f} s", flush=True)
    ratio = float(np.median(cpu["gesdd"]) / np.median(cpu["gram"]))
    dw = float(np.abs(weights["gesdd"] - weights["gram"]).max())
    print(f"gesdd / gram CPU time: {ratio:.3f}; max |d weight| {dw:.2e}")
    write_json("u1_gram_svd", {
        "setting": {"model": "xxz", "L": 32, "W": 6.0, "seed": 1, "w": "Z", "site": 16, "chi": args.chi,
                    "order": 4, "splitting": "blanes_moan", "dt": 0.1859, "t": args.t},
        "cpu_s": cpu, "speedup_gram_over_gesdd": ratio,
        "blocks_alone_cpu_s": alone, "blocks_alone_speedup": alone["gesdd"] / alone["gram"], "n_blocks": len(blocks), "max_abs_d_weight": dw, "discarded": disc,
        "kept": "gesdd (the Gram variant does not pay in the engine and is less accurate)"})


if __name__ == "__main__":
    main()
