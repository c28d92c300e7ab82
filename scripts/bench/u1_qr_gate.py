"""An experiment on the U(1) engine's remaining cost: truncating the gates by a QR from the old bond basis
instead of an SVD (``ChargeTEBD._qr_gate``, off by default).

Usage:  nice -n 10 python scripts/bench/u1_qr_gate.py [--every 12] [--t 12] [--repeat 2] [--tmax 112]
                                                       [--files NAME ...] [--name u1_qr_gate]

About half of a U(1) step is gesdd on the charge blocks (scripts/bench/u1_profile.py). Once a bond is at chi,
the experiment replaces the SVD of each block M_v by one subspace iteration from the block's old basis
(M_v B_old^dag, or M_v^dag A_old, then a QR), which keeps the sector sizes of the bond; every ``--every``-th
gate of a bond still uses the SVD, which re-selects them. The discarded weight is the exact norm loss of
the projection.

1. Speed: random-field Heisenberg chain, L = 32, W = 6, seed 1, W = Z at the centre, chi = 64, order 4
   Blanes-Moan, dt = 0.1859, t = 0 to ``--t``, SVD and QR modes interleaved ``--repeat`` times in this
   process (one BLAS thread); the ratio of median CPU times, and max |dC| between the modes at the end.
2. Accuracy: both modes against the L = 14, W = 6 S^z-sector references (site 0 and centre) at chi = 64,
   dt = "auto" as the fast path picks it, to ``--tmax``: max |dC| over all sites, probes and times, discarded
   weight.

Writes data/benchmarks/<name>.json (default u1_qr_gate). A benchmark, not a test.
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
from common import ROOT, write_json  # noqa: E402
from mpo_fronts.readout import otoc_from_weights  # noqa: E402
from mpo_fronts.references import reference_from_arrays  # noqa: E402
from mpo_fronts.stepsize import auto_dt  # noqa: E402
from mpo_fronts.u1 import ChargeTEBD, charge_profiles  # noqa: E402


def evolve(chain, site, times, settings, every):
    eng = ChargeTEBD(chain, "Z", site, settings)
    eng._qr_every = every
    out = []
    t0 = time.process_time()
    for _k, e in eng.run(times):
        w = charge_profiles(e)["weights"]
        out.append({v: otoc_from_weights(w, v) for v in ("X", "Z")})
    return eng, out, time.process_time() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--every", type=int, default=12)
    ap.add_argument("--t", type=float, default=12.0)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--tmax", type=float, default=112.0)
    ap.add_argument("--files", nargs="+",
                    default=["heisenberg_L14_W6_seed11_site0.npz", "heisenberg_L14_W6_seed11_center.npz"])
    ap.add_argument("--name", default="u1_qr_gate")
    args = ap.parse_args()
    settings = mf.EvolutionSettings(chi=64, dt=0.1859, order=4, splitting="blanes_moan")
    chain = mf.xxz_chain(32, W=6.0, seed=1)
    evolve(mf.xxz_chain(8, W=1.0, seed=1), 4, [0.5], settings.replace(chi=8), 0)  # imports
    cpu = {"svd": [], "qr": []}
    last = {}
    for _ in range(args.repeat):
        for mode, every in (("svd", 0), ("qr", args.every)):
            eng, out, c = evolve(chain, 16, [args.t], settings, every)
            cpu[mode].append(c)
            last[mode] = (out[-1], eng.discarded_weight)
            print(f"speed {mode}: {c:.1f} CPU s, discarded {eng.discarded_weight:.4e}", flush=True)
    ratio = float(np.median(cpu["svd"]) / np.median(cpu["qr"]))
    d_modes = max(float(np.abs(last["svd"][0][v] - last["qr"][0][v]).max()) for v in ("X", "Z"))
    print(f"svd / qr CPU: {ratio:.3f}; max |dC| between modes at t = {args.t:g}: {d_modes:.2e}", flush=True)
    rows = []
    for name in args.files:
        ref = reference_from_arrays(np.load(ROOT / "data" / "references" / name))
        meta = ref["meta"]
        p = meta["model"]["params"]
        ch = mf.xxz_chain(14, J=p["J"], delta=p["delta"], fields=ref["fields"])
        times = np.asarray(ref["times"], dtype=float)
        keep = (times > 0) & (times <= args.tmax)
        site = int(meta["site"])
        dt, _ = auto_dt(ch, "Z", site, float(times[keep][-1]), 4, "blanes_moan", 1e-3)
        for mode, every in (("svd", 0), ("qr", args.every)):
            eng, out, c = evolve(ch, site, times[keep], settings.replace(dt=dt), every)
            err = max(float(np.abs(np.array([o[v] for o in out]) - np.asarray(ref["otoc"][v])[keep]).max())
                      for v in ("X", "Z"))
            rows.append({"file": name, "mode": mode, "dt": dt, "tmax": float(times[keep][-1]), "max|dC|": err,
                         "discarded": eng.discarded_weight, "cpu_s": c})
            print(f"accuracy {name} {mode}: max|dC| {err:.2e}, discarded {eng.discarded_weight:.3e}, "
                  f"{c:.0f} CPU s", flush=True)
    write_json(args.name, {"setting": {"every": args.every, "t": args.t, "chi": 64, "tmax": args.tmax},
                              "speed_cpu_s": cpu, "speedup_qr_over_svd": ratio, "max_abs_dC_between_modes": d_modes,
                              "discarded_at_t": {m: last[m][1] for m in last}, "accuracy": rows,
                              "kept": "svd (the experiment is off by default)"})


if __name__ == "__main__":
    main()
