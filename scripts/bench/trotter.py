"""Trotter error of every splitting against exact evolution, and its cost at matched accuracy.

Usage: nice -n 10 python scripts/bench/trotter.py

Random-field Heisenberg chains (L = 8, seeds 1-3, W = Z at the centre) at W = 2, 6, 10. Trotter error alone:
dense Trotter products of the engine's own splittings (the engine without truncation equals them to 1e-10,
tests/test_stepsize.py) against dense exact evolution, max |dC| over sites, probes X, Y, Z and 10 times up to
t = 100, at dt = 0.05 and 0.1. Cost at matched accuracy: the step dt = "auto" picks for |dC| <= 1e-3 up to
t = 1000 and the gate layers per unit time it implies (cost per layer is the same for every splitting).
Writes data/benchmarks/trotter.json and prints a table.
"""

import os
import sys
from pathlib import Path

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "scripts" / "bench"))
sys.path.insert(0, str(ROOT))

import numpy as np  # noqa: E402

import mpo_fronts as mf  # noqa: E402
from common import table, write_json  # noqa: E402
from mpo_fronts.schedules import layers_per_step  # noqa: E402
from mpo_fronts.stepsize import auto_dt, exact_window_otoc, splittings, trotter_otoc  # noqa: E402


def main() -> None:
    rows = []
    for W in (2.0, 6.0, 10.0):
        for order, splitting in splittings():
            errs = {0.05: [], 0.1: []}
            dts, lay = [], []
            for seed in (1, 2, 3):
                chain = mf.xxz_chain(8, W=W, seed=seed)
                for dt in errs:
                    steps = np.round(np.linspace(100 / dt / 10, 100 / dt, 10)).astype(int)
                    tr = trotter_otoc(chain, "Z", 4, dt, steps, order, splitting)
                    ex = exact_window_otoc(chain, "Z", 4, steps * dt)
                    errs[dt].append(max(float(np.abs(tr[v] - ex[v]).max()) for v in tr))
                d, info = auto_dt(chain, "Z", 4, 1000.0, order, splitting, 1e-3)
                dts.append(d)
                lay.append(layers_per_step(order, splitting) / d)
            rows.append({"W": W, "order": order, "splitting": splitting,
                         "layers_per_step": layers_per_step(order, splitting),
                         "err_dt0.05_t100": max(errs[0.05]), "err_dt0.1_t100": max(errs[0.1]),
                         "auto_dt_tol1e-3_t1000": min(dts), "layers_per_unit_time": max(lay)})
            print(rows[-1], flush=True)
    for W in (2.0, 6.0, 10.0):
        base = next(r for r in rows if r["W"] == W and r["order"] == 2 and r["splitting"] == "standard")
        for r in rows:
            if r["W"] == W:
                r["cost_vs_strang"] = r["layers_per_unit_time"] / base["layers_per_unit_time"]
    print(table(rows, ["W", "order", "splitting", "layers_per_step", "err_dt0.05_t100", "err_dt0.1_t100",
                       "auto_dt_tol1e-3_t1000", "layers_per_unit_time", "cost_vs_strang"]))
    write_json("trotter", {"setting": "xxz L = 8, seeds 1-3, W = Z at site 4, max |dC| over X, Y, Z, all sites, "
                           "10 times to t = 100; auto dt for tol 1e-3 up to t = 1000 (worst seed)",
                           "rows": rows})


if __name__ == "__main__":
    main()
