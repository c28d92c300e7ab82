"""The U(1) engine's QR gate (``evolution.gate_update = "qr"``, ``ChargeTEBD._qr_gate``) against its SVD gate:
speed and accuracy, at equal chi and at the chi where the QR gate is as accurate as the SVD at chi 64.

Usage:  nice -n 10 python scripts/bench/u1_qr_gate.py [--iters 2] [--every 12] [--qr-chi 64 68 72] [--t 12]
                                                       [--repeat 2] [--tmax 112] [--files NAME ...]
                                                       [--name u1_qr_gate]

About half of a U(1) step is gesdd on the charge blocks (scripts/bench/u1_profile.py). Once a bond is at chi,
the QR gate replaces the SVD of each block M_v by ``--iters`` subspace iterations started from the block's
old basis (M_v B_old^dag, or M_v^dag A_old, then (M_v M_v^dag) Q, each followed by a QR), which keeps the
sector sizes of the bond; every ``--every``-th gate of a bond still uses the SVD, which re-selects them. The
discarded weight is the exact norm loss of the projection.

1. Speed: random-field Heisenberg chain, L = 32, W = 6, seed 1, W = Z at the centre, order 4 Blanes-Moan,
   dt = 0.1859, t = 0 to ``--t``, on one BLAS thread: the SVD gate at chi 64 and the QR gate at every chi of
   ``--qr-chi``, interleaved ``--repeat`` times in this process; ratios of median CPU times.
2. Accuracy: the same configurations against the L = 14, W = 6 S^z-sector references (site 0 and centre),
   dt = "auto" as the fast path picks it, to ``--tmax``: max |dC| over all sites, probes and times, discarded
   weight.
3. Matched: the smallest QR chi whose max |dC| is at most the SVD's at chi 64 on every reference, and its
   speed ratio (none if no QR chi is that accurate).

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

SVD_CHI = 64


def evolve(chain, site, times, settings, every, iters=1):
    """ChargeTEBD, its QR gate on (``every`` = 0: the SVD gate only), ``iters`` subspace iterations per QR gate."""
    eng = ChargeTEBD(chain, "Z", site, settings)
    eng._qr_every = every
    eng._qr_iters = iters
    out = []
    t0 = time.process_time()
    for _k, e in eng.run(times):
        w = charge_profiles(e)["weights"]
        out.append({v: otoc_from_weights(w, v) for v in ("X", "Z")})
    return eng, out, time.process_time() - t0


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--iters", type=int, default=2)
    ap.add_argument("--every", type=int, default=12)
    ap.add_argument("--qr-chi", type=int, nargs="+", default=[64, 68, 72])
    ap.add_argument("--t", type=float, default=12.0)
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--tmax", type=float, default=112.0)
    ap.add_argument("--files", nargs="+",
                    default=["heisenberg_L14_W6_seed11_site0.npz", "heisenberg_L14_W6_seed11_center.npz"])
    ap.add_argument("--name", default="u1_qr_gate")
    args = ap.parse_args()
    settings = mf.EvolutionSettings(chi=SVD_CHI, dt=0.1859, order=4, splitting="blanes_moan")
    configs = [("svd", SVD_CHI, 0)] + [(f"qr chi {c}", c, args.every) for c in args.qr_chi]
    chain = mf.xxz_chain(32, W=6.0, seed=1)
    evolve(mf.xxz_chain(8, W=1.0, seed=1), 4, [0.5], settings.replace(chi=8), 0)  # imports
    cpu = {label: [] for label, _, _ in configs}
    discarded = {}
    for _ in range(args.repeat):
        for label, chi, every in configs:
            eng, _out, c = evolve(chain, 16, [args.t], settings.replace(chi=chi), every, args.iters)
            cpu[label].append(c)
            discarded[label] = eng.discarded_weight
            print(f"speed {label}: {c:.1f} CPU s, discarded {eng.discarded_weight:.4e}", flush=True)
    speedup = {label: float(np.median(cpu["svd"]) / np.median(cpu[label])) for label in cpu}
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
        for label, chi, every in configs:
            eng, out, c = evolve(ch, site, times[keep], settings.replace(dt=dt, chi=chi), every, args.iters)
            err = max(float(np.abs(np.array([o[v] for o in out]) - np.asarray(ref["otoc"][v])[keep]).max())
                      for v in ("X", "Z"))
            rows.append({"file": name, "mode": label, "chi": chi, "dt": dt, "tmax": float(times[keep][-1]),
                         "max|dC|": err, "discarded": eng.discarded_weight, "cpu_s": c})
            print(f"accuracy {name} {label}: max|dC| {err:.2e}, discarded {eng.discarded_weight:.3e}, "
                  f"{c:.0f} CPU s", flush=True)
    worst = {label: [r["max|dC|"] for r in rows if r["mode"] == label] for label in cpu}
    matched = next((label for label, _, _ in configs[1:]
                    if all(q <= s for q, s in zip(worst[label], worst["svd"]))), None)
    print("speed-up over the SVD gate at chi 64: " + ", ".join(f"{k} {v:.2f}x" for k, v in speedup.items()))
    print(f"as accurate as the SVD at chi {SVD_CHI} on every reference: {matched or 'none of the QR settings'}"
          + (f" ({speedup[matched]:.2f}x)" if matched else ""))
    write_json(args.name, {
        "setting": {"iters": args.iters, "every": args.every, "qr_chi": args.qr_chi, "svd_chi": SVD_CHI,
                    "t": args.t, "tmax": args.tmax},
        "speed_cpu_s": cpu, "speedup_over_svd": speedup, "discarded_at_t": discarded, "accuracy": rows,
        "matched": matched, "matched_speedup": speedup[matched] if matched else None})


if __name__ == "__main__":
    main()
