"""Benchmark 4: scaling of the engine with L and chi, and peak memory against the operator's tensor bytes.

Usage:  python scripts/bench/scaling.py [--Ls 25 50 100 200] [--chi 32] [--chis 16 32 64 128] [--L-chi 50]
                                        [--steps 3]

Each configuration runs in a fresh subprocess (so that its peak RSS is its own): the engine on the
mixed-field Ising chain is loaded with a random right-canonical operator MPS at bond dimension chi on every
bond (support = the whole chain, so every gate of a step is applied and truncates 4 chi -> chi, as in a
saturated run), and single second-order steps (dt = 0.05) are timed (median of --steps). Reports time per step
(expect linear in L, cubic in chi; fitted exponents printed), per-bond time, the tensor bytes of the operator,
and the peak RSS of the subprocess minus its RSS right after the imports. Writes data/benchmarks/scaling.json.
Single BLAS thread. A benchmark, not a test.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import peak_rss_mib, table, write_json  # noqa: E402


def random_operator(L: int, chi: int, rng) -> list[np.ndarray]:
    """A random MPS (D_k, 4, D_{k+1}), D_k = min(chi, 4^k, 4^(L-k)), right-canonical, unit norm."""
    dims = [min(chi, 4**k, 4 ** (L - k)) for k in range(L + 1)]
    arrays = [rng.standard_normal((dims[k], 4, dims[k + 1])) for k in range(L)]
    for k in range(L - 1, 0, -1):  # right-canonicalize by LQ (QR of the transpose)
        A = arrays[k]
        q, r = np.linalg.qr(A.reshape(A.shape[0], -1).T)
        arrays[k] = q.T.reshape(-1, 4, A.shape[2])
        arrays[k - 1] = np.tensordot(arrays[k - 1], r.T, axes=(2, 0))
        arrays[k - 1] /= np.linalg.norm(arrays[k - 1])  # keep the carried norm finite at large L
    arrays[0] /= np.linalg.norm(arrays[0])
    return arrays


def child(L: int, chi: int, steps: int) -> dict:
    import mpo_fronts as mf
    from mpo_fronts.evolve import OperatorTEBD

    rss0 = _current_rss_mib()
    chain = mf.mixed_field_ising_chain(L)
    eng = OperatorTEBD(chain, w="Z", site=L // 2, chi=chi, dt=0.05, order=2)
    state = eng.state_dict()
    state.update(arrays=random_operator(L, chi, np.random.default_rng(0)), center=0, lo=0, hi=L - 1)
    eng.load_state_dict(state)
    tensor_bytes = sum(A.nbytes for A in eng.arrays)
    gen = eng.run(0.05 * np.arange(1, steps + 2))
    next(gen)  # first step: warms the gate cache
    ts = []
    for _ in range(steps):
        t0 = time.perf_counter()
        next(gen)
        ts.append(time.perf_counter() - t0)
    return {"L": L, "chi": chi, "step_s": float(np.median(ts)), "per_bond_ms": 1e3 * float(np.median(ts)) / (L - 1),
            "tensor_MiB": tensor_bytes / 2**20, "max_tensor_MiB": max(A.nbytes for A in eng.arrays) / 2**20,
            "rss_growth_MiB": peak_rss_mib() - rss0, "max_bond": eng.max_bond}


def _current_rss_mib() -> float:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmRSS:"):
                return int(line.split()[1]) / 1024.0
    return float("nan")


def run_child(L: int, chi: int, steps: int) -> dict:
    out = subprocess.run([sys.executable, __file__, "--child", str(L), str(chi), str(steps)], check=True,
                         capture_output=True, text=True)
    return json.loads(out.stdout.strip().splitlines()[-1])


def exponent(xs, ys) -> float:
    return float(np.polyfit(np.log(xs), np.log(ys), 1)[0])


def main(argv=None) -> None:
    if argv is None and len(sys.argv) > 1 and sys.argv[1] == "--child":
        L, chi, steps = map(int, sys.argv[2:5])
        print(json.dumps(child(L, chi, steps)))
        return
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--Ls", type=int, nargs="+", default=[25, 50, 100, 200])
    ap.add_argument("--chi", type=int, default=32)
    ap.add_argument("--chis", type=int, nargs="+", default=[16, 32, 64, 128])
    ap.add_argument("--L-chi", type=int, default=50)
    ap.add_argument("--steps", type=int, default=3)
    args = ap.parse_args(argv)
    rows_L = []
    for L in args.Ls:
        rows_L.append(run_child(L, args.chi, args.steps))
        print(rows_L[-1], flush=True)
    rows_chi = []
    for chi in args.chis:
        rows_chi.append(run_child(args.L_chi, chi, args.steps))
        print(rows_chi[-1], flush=True)
    cols = ["L", "chi", "step_s", "per_bond_ms", "tensor_MiB", "rss_growth_MiB", "max_bond"]
    eL = exponent([r["L"] for r in rows_L], [r["step_s"] for r in rows_L])
    big = [r for r in rows_chi if r["chi"] >= 32] or rows_chi
    echi = exponent([r["chi"] for r in big], [r["step_s"] for r in big])
    print()
    print(f"time per step against L (chi = {args.chi}); fitted exponent {eL:.2f} (expected 1)")
    print(table(rows_L, cols))
    print()
    print(f"time per step against chi (L = {args.L_chi}); fitted exponent over chi >= 32: {echi:.2f} (expected 3)")
    print(table(rows_chi, cols))
    path = write_json("scaling", {"settings": vars(args), "vs_L": rows_L, "vs_chi": rows_chi,
                                  "exponent_L": eL, "exponent_chi": echi})
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
