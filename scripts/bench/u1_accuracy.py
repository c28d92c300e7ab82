"""The fast path of issue 12 against exact evolution: mf.evolve_otoc(..., dt="auto") with its defaults (order 4
Blanes-Moan, symmetry "auto", which picks the U(1) charge-block engine for W = Z on the XXZ chain) at chi = 128,
against the L = 14, W = 6 S^z-sector references in data/references (exact to rounding).

Usage:  nice -n 10 python scripts/bench/u1_accuracy.py [--tmax 100] [--chi 128] [--files NAME ...]
                                                       [--z2] [--name u1_accuracy]

For every reference file (default: heisenberg_L14_W6_seed11_site0.npz and ..._center.npz; the chain is rebuilt
from the stored fields, the reference's own times up to --tmax) it records max |dC| over all sites, stored
probes (X, Y, Z) and times, the same per time, the discarded weight, the step dt = "auto" chose and the engine
used. ``--z2`` adds the same run with symmetry = "z2" (the Pauli-basis engine at the same step). The
requirement of issue 12: max |dC| <= 2e-3 up to t = 100 at chi = 128. One BLAS thread; writes
data/benchmarks/<name>.json. A benchmark, not a test.
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
from common import ROOT, limit_blas, write_json  # noqa: E402
from mpo_fronts.references import reference_from_arrays  # noqa: E402

FILES = ("heisenberg_L14_W6_seed11_site0.npz", "heisenberg_L14_W6_seed11_center.npz")


def one(path: Path, tmax: float, chi: int, symmetry: str) -> dict:
    ref = reference_from_arrays(np.load(path))
    meta = ref["meta"]
    p, L = meta["model"]["params"], int(meta["model"]["L"])
    chain = mf.xxz_chain(L, J=p["J"], delta=p["delta"], fields=ref["fields"])
    times = np.asarray(ref["times"], dtype=float)
    keep = (times > 0) & (times <= tmax)
    times = times[keep]
    sites = np.asarray(ref["sites"], dtype=int)
    c0 = time.process_time()
    res = mf.evolve_otoc(chain, meta["w"], int(meta["site"]), times, chi=chi, dt="auto", symmetry=symmetry)
    cpu = time.process_time() - c0
    per_t = np.zeros(times.size)
    per_probe, relative = {}, {}
    for v, exact in ref["otoc"].items():
        ex = np.asarray(exact)[keep]
        d = np.abs(res.otoc(v)[:, sites] - ex)
        per_t = np.maximum(per_t, d.max(axis=1))
        per_probe[v] = float(d.max())
        # relative error ahead of the front (1e-6 < C_exact < 1e-2) and at it (1e-2 <= C_exact <= 0.5)
        relative[v] = {}
        for region, m in (("ahead", (ex > 1e-6) & (ex < 1e-2)), ("front", (ex >= 1e-2) & (ex <= 0.5))):
            rel = d[m] / ex[m]
            relative[v][region] = ({"n": int(m.sum()), "median": float(np.median(rel)),
                                    "p90": float(np.percentile(rel, 90)), "max": float(rel.max())}
                                   if m.any() else {"n": 0})
    return {"file": path.name, "L": L, "site": int(meta["site"]), "chi": chi, "tmax": float(times[-1]),
            "symmetry": symmetry, "symmetry_used": res.meta["symmetry_used"], "dt_used": res.meta["dt_used"],
            "order": res.meta["order"], "splitting": res.meta["splitting"],
            "max|dC|": float(per_t.max()), "max|dC| per probe": per_probe, "relative_error": relative,
            "times": times.tolist(), "max|dC| per time": per_t.tolist(),
            "discarded_weight": float(res.discarded_weight[-1]), "max_bond": int(res.max_bond.max()),
            "max|C_X - C_Y|": float(np.abs(res.otoc("X") - res.otoc("Y")).max()), "cpu_s": cpu}


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--tmax", type=float, default=100.0)
    ap.add_argument("--chi", type=int, default=128)
    ap.add_argument("--files", nargs="+", default=list(FILES))
    ap.add_argument("--z2", action="store_true", help="also run symmetry = 'z2' at the same settings")
    ap.add_argument("--name", default="u1_accuracy")
    args = ap.parse_args(argv)
    _blas = limit_blas(int(os.environ["OPENBLAS_NUM_THREADS"]))  # noqa: F841
    rows = []
    for name in args.files:
        for symmetry in ("auto", "z2") if args.z2 else ("auto",):
            r = one(ROOT / "data" / "references" / name, args.tmax, args.chi, symmetry)
            rows.append(r)
            print(f"{name} symmetry {symmetry} ({r['symmetry_used']}), chi {r['chi']}, dt = auto -> {r['dt_used']:.4g} "
                  f"(order {r['order']} {r['splitting']}): max|dC| up to t = {r['tmax']:g}: {r['max|dC|']:.2e} "
                  f"{'<=' if r['max|dC|'] <= 2e-3 else '>'} 2e-3; discarded {r['discarded_weight']:.2e}; "
                  f"max|C_X - C_Y| {r['max|C_X - C_Y|']:.1e}; {r['cpu_s']:.0f} CPU s", flush=True)
            for reg in ("ahead", "front"):
                z = r["relative_error"]["Z"][reg]
                if z["n"]:
                    print(f"  probe Z {reg}: relative error median {z['median']:.1e}, p90 {z['p90']:.1e}, "
                          f"max {z['max']:.1e} (n {z['n']})", flush=True)
    path = write_json(args.name, {"command": "nice -n 10 python scripts/bench/u1_accuracy.py " + " ".join(sys.argv[1:]),
                                  "requirement": "max |dC| <= 2e-3 up to t = 100 at chi = 128 (issue 12)",
                                  "rows": rows})
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
