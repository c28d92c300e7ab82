"""Coverage of the crossing-time intervals on the stored exact references (L = 14 S^z-sector, L = 10 dense).

Usage:  nice -n 10 python scripts/bench/coverage_references.py [--chis 16 32 64 128] [--cache DIR]
                                                             [--out coverage_references]

The CI test of the error budget (tests/test_trust.py) and scripts/coverage.py work at L = 10 with chi 2, 4, 8
against dense exact evolution. This benchmark asks the same question where the tool is meant to be used: bond
dimensions 16 ... 128 and the L = 14 references of data/references (random-field Heisenberg chain, seed 11,
W = 0.5 and 1, W = Z at site 0 and at the centre, exact by S^z-sector evolution), plus the L = 10 cases of the
accuracy study (Heisenberg W = 1 site 0, sector; mixed-field Ising centre, dense). Cases, engine runs and their
cache are those of scripts/bench/accuracy.py (imported, not copied): order 2, dt 0.05, truncation 'svd'.

For every case and probe, :func:`mpo_fronts.trust.interval_coverage` is called with
  * 'study': the convergence study of all chi (the interval of the largest chi from the change between the two
    largest), for the chi sets (16, 32, 64) and (16, 32, 64, 128) where all runs exist;
  * 'fallback chi=X': one run alone, its truncation error from the per-bond discarded-weight ledger.
No Trotter comparison run is given (the accuracy study measured the Trotter error of order 2 at dt 0.05 as a
median relative error of C of about 3e-3 ahead of the front, and under 5e-4 on t*), so the intervals hold the
truncation and interpolation errors only. Each side of W with at least two sites counts separately; a case is a (side, d, theta) with d >= 1 whose exact curve crosses
theta on the reference's time grid; coverage = covered / trusted, trusted share = trusted / cases.
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

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "scripts" / "bench"))
sys.path.insert(0, str(ROOT))

from accuracy import CASES, THETAS, engine_run, load_case  # noqa: E402
from common import write_json  # noqa: E402
from mpo_fronts import trust as tr  # noqa: E402
from mpo_fronts.readout import otoc_from_weights  # noqa: E402


def case_rows(name: str, chis, cache: Path | None, tmax_w1: float) -> list[dict]:
    """Every route's coverage for one reference case, per probe."""
    case = load_case(name, tmax_w1)
    runs = {chi: engine_run(case, "o2_dt0.05", "svd", chi, cache) for chi in chis}
    rows = []
    for v in case["probes"]:
        ex = case["exact"][v]
        C = {chi: otoc_from_weights(r["weights"], v) for chi, r in runs.items()}
        routes = {f"study chi={','.join(map(str, chis[:k]))}": dict(C_engine_by_chi={c: C[c] for c in chis[:k]})
                  for k in range(3, len(chis) + 1)}
        for chi in chis:
            # the tool's fallback without a study (trust.ensemble_light_cone): C shifted by 2 eps / (1 - eps),
            # eps the local discarded weight; the point mask without the bond-entropy condition (the cache
            # holds no entropies), so this trusts at least as many points as the tool would
            bd = runs[chi]["bond_discarded"][None]
            loc = tr.local_discarded(bd, case["times"])
            mask = tr.trust_from_bonds(bd, case["times"], case["site"], tr.DEFAULT_MAX_DISCARDED)
            mask = mask & (runs[chi]["discarded_weight"] <= tr.LARGE_DISCARDED_WEIGHT)[None, :, None]
            routes[f"fallback chi={chi}"] = dict(C_engine_by_chi={chi: C[chi]}, trusted=mask,
                                                 fallback_dC=2 * loc / (1 - np.minimum(loc, 0.999)))
        site, L = case["site"], case["L"]
        sides = [s for s, n in (("left", site), ("right", L - 1 - site)) if n >= 2]
        for (route, kw), side in ((rk, s) for rk in routes.items() for s in sides):
            cov = tr.interval_coverage(case["times"], C_exact=ex, site=site, thresholds=THETAS, side=side, **kw)
            miss = [c for c in cov.cases if c["trusted"] and not c["covered"]]
            rows.append({"case": name, "L": L, "site": site, "side": side, "probe": v, "route": route,
                         "reference": case["reference_method"], "coverage": cov.coverage,
                         "trusted_share": cov.trusted_share, "n_cases": cov.n_cases, "n_trusted": cov.n_trusted,
                         "n_covered": cov.n_covered,
                         "by_threshold": {str(k): val for k, val in cov.by_threshold.items()},
                         "misses": miss,
                         "median_rel_halfwidth": float(np.nanmedian([c["rel_halfwidth"] for c in cov.cases
                                                                     if c["trusted"]] or [np.nan]))})
            print(f"{name:<22} {v} {side:<5} {route:<24} trusted {cov.n_trusted:>3}/{cov.n_cases:<3} covered "
                  f"{cov.n_covered:>3} ({cov.coverage:.3f})", flush=True)
    return rows


def totals(rows: list[dict]) -> dict:
    """Pooled coverage per route kind ('study' of the largest chi set, each 'fallback chi=X')."""
    out = {}
    for r in rows:
        key = r["route"]
        t = out.setdefault(key, {"n_cases": 0, "n_trusted": 0, "n_covered": 0,
                                 "by_threshold": {str(th): {"n_cases": 0, "n_trusted": 0, "n_covered": 0}
                                                  for th in THETAS}})
        for k in ("n_cases", "n_trusted", "n_covered"):
            t[k] += r[k]
            for th, b in r["by_threshold"].items():
                t["by_threshold"][th][k] += b[k]
    for t in out.values():
        t["coverage"] = t["n_covered"] / t["n_trusted"] if t["n_trusted"] else None
        t["trusted_share"] = t["n_trusted"] / t["n_cases"] if t["n_cases"] else None
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--chis", type=int, nargs="+", default=[16, 32, 64, 128])
    ap.add_argument("--cases", nargs="+", default=list(CASES), choices=list(CASES))
    ap.add_argument("--cache", default="/tmp/mpo_fronts_accuracy_cache")
    ap.add_argument("--tmax-w1", type=float, default=40.0)
    ap.add_argument("--out", default="coverage_references", help="writes data/benchmarks/<out>.json")
    args = ap.parse_args(argv)
    chis = sorted(set(args.chis))
    if len(chis) < 3:
        ap.error("--chis needs at least three bond dimensions")
    t0 = time.perf_counter()
    cache = Path(args.cache) if args.cache else None
    rows = [r for name in args.cases for r in case_rows(name, chis, cache, args.tmax_w1)]
    tot = totals(rows)
    print("\npooled over cases and probes:")
    for route, t in tot.items():
        cov = "n/a" if t["coverage"] is None else f"{t['coverage']:.3f}"
        print(f"  {route:<26} trusted {t['n_trusted']:>4}/{t['n_cases']:<4} covered {t['n_covered']:>4} ({cov})  "
              + "  ".join(f"theta={th}: {b['n_covered']}/{b['n_trusted']}/{b['n_cases']}"
                          for th, b in t["by_threshold"].items()))
    write_json(args.out, {"command": "nice -n 10 python scripts/bench/coverage_references.py "
                                 + " ".join(sys.argv[1:] if argv is None else argv),
                                 "chis": chis, "trotter": "order 2, dt 0.05, no Trotter comparison run",
                                 "seconds": time.perf_counter() - t0, "totals": tot, "rows": rows})
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
