"""What the real Pauli-basis arithmetic can gain over a complex TEBD at most: real vs complex SVD of the gate
matrices' shapes, side by side in one process.

Usage:  python scripts/bench/svd_dtype.py [--chis 32 64 128] [--repeat 5]

The two-site matrix of a saturated bond has shape (4 chi, 4 chi) in both codes (the engine's is real, the
vectorised-operator TEBD's complex). Without a symmetry to split it, both pay one such SVD per gate, so the time
ratio complex/real of numpy.linalg.svd (LAPACK zgesdd / dgesdd) on random matrices of that shape bounds the
speed-up an SVD-based engine can reach over the complex peer. Best of --repeat. Writes
data/benchmarks/svd_dtype.json. Single BLAS thread (set OPENBLAS_NUM_THREADS to override). A benchmark, not a test.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import sys  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
from common import best_of, table, write_json  # noqa: E402


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--chis", type=int, nargs="+", default=[32, 64, 128])
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args(argv)
    import mpo_fronts.evolve as ev

    ev.keep_freed_memory()  # as in an engine run (the benchmarks of the engine run with it)
    rng = np.random.default_rng(0)
    rows = []
    for chi in args.chis:
        n = 4 * chi
        a = rng.normal(size=(n, n))
        z = a + 1j * rng.normal(size=(n, n))
        t_r = best_of(lambda: np.linalg.svd(a, full_matrices=False), args.repeat)[0]
        t_c = best_of(lambda: np.linalg.svd(z, full_matrices=False), args.repeat)[0]
        rows.append({"chi": chi, "shape": [n, n], "t_real_s": t_r, "t_complex_s": t_c, "complex/real": t_c / t_r})
        print(f"chi {chi} ({n} x {n}): real {t_r * 1e3:.1f} ms, complex {t_c * 1e3:.1f} ms, "
              f"ratio {t_c / t_r:.2f}", flush=True)
    print(table(rows, ["chi", "shape", "t_real_s", "t_complex_s", "complex/real"]))
    print(f"wrote {write_json('svd_dtype', {'settings': vars(args), 'rows': rows})}")


if __name__ == "__main__":
    main()
