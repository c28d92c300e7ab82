"""Before/after of keeping freed memory in the heap (evolve.keep_freed_memory): the same run in fresh processes
with MPO_FRONTS_KEEP_MEMORY=0 and =1, alternating, side by side in one command.

Usage: python scripts/bench_memory.py [--L 32] [--chi 64] [--t 4] [--repeat 3] [--chains heis mfi]
Random-field Heisenberg chain (W = 1, seed 1; Z2-graded at chi >= 32) and mixed-field Ising chain, W = Z at the
centre, order 2, dt = 0.05, one BLAS thread. Each process evolves to t and prints its wall time and a hash of
the weights; the table gives the best time of each setting, their ratio, and whether the results are
bit-identical. Writes data/benchmarks/memory.json. A benchmark, not a test.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent / "bench"))
from common import table, write_json  # noqa: E402

CHILD = """
import hashlib, json, sys, time
import numpy as np, mpo_fronts as mf
from mpo_fronts.evolve import OperatorTEBD, keep_freed_memory
L, chi, t, kind = int(sys.argv[1]), int(sys.argv[2]), float(sys.argv[3]), sys.argv[4]
chain = mf.xxz_chain(L, W=1.0, seed=1) if kind == "heis" else mf.mixed_field_ising_chain(L)
OperatorTEBD(chain, chi=8, dt=0.1).run([0.2]).__next__()  # warm-up (gate cache, imports)
eng = OperatorTEBD(chain, w="Z", site=L // 2, chi=chi, dt=0.05)
t0 = time.perf_counter()
w = np.array([mf.readout.pauli_weights(e.arrays) for _, e in eng.run([t / 2, t])])
wall = time.perf_counter() - t0
print(json.dumps({"wall_s": wall, "kept": keep_freed_memory(), "graded": eng.graded,
                  "hash": hashlib.sha256(w.tobytes()).hexdigest()[:16], "discarded": eng.discarded_weight}))
"""


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--L", type=int, default=32)
    ap.add_argument("--chi", type=int, default=64)
    ap.add_argument("--t", type=float, default=4.0)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--chains", nargs="+", default=["heis", "mfi"], choices=["heis", "mfi"])
    a = ap.parse_args()
    rows = []
    for kind in a.chains:
        res = {"0": [], "1": []}
        for _ in range(a.repeat):
            for flag in ("0", "1"):
                env = {**os.environ, "MPO_FRONTS_KEEP_MEMORY": flag, "OPENBLAS_NUM_THREADS": "1",
                       "OMP_NUM_THREADS": "1"}
                out = subprocess.run([sys.executable, "-c", CHILD, str(a.L), str(a.chi), str(a.t), kind],
                                     capture_output=True, text=True, env=env, check=True)
                res[flag].append(json.loads(out.stdout.strip().splitlines()[-1]))
        off, on = min(r["wall_s"] for r in res["0"]), min(r["wall_s"] for r in res["1"])
        same = len({r["hash"] for r in res["0"] + res["1"]}) == 1
        rows.append({"chain": "Heisenberg W=1" if kind == "heis" else "mixed-field Ising", "L": a.L, "chi": a.chi,
                     "graded": res["1"][0]["graded"], "t_default_alloc_s": off, "t_keep_memory_s": on,
                     "speedup": off / on, "bit_identical": same, "all_walls": res})
        print(f"{rows[-1]['chain']}: default allocator {off:.2f} s, keep freed memory {on:.2f} s, "
              f"{off / on:.2f}x, bit-identical {same}", flush=True)
    print(table(rows, ["chain", "L", "chi", "graded", "t_default_alloc_s", "t_keep_memory_s", "speedup",
                       "bit_identical"]))
    print(f"wrote {write_json('memory', {'settings': vars(a), 'rows': rows})}")


if __name__ == "__main__":
    main()
