"""Coverage of the crossing-time intervals: do the reported [t_low, t_high] contain the exact t*(d; theta)?

Usage:
    python scripts/coverage.py [--L 10 12] [--chis 4,8,16] [--sites 0 center] [--models heisenberg mfi]
                               [--probes Z X] [--fallback] [--json data/benchmarks/coverage.json]

For each chain (random-field Heisenberg chain, W = 0.5, seed 3, spin units; mixed-field Ising chain
(J, g, h) = (1, 1.05, 0.5), Pauli units), each L and each site of W, the engine runs at every chi (dt = 0.05,
order 2) plus once at the largest chi with dt = 0.1 (the Trotter comparison), dense exact evolution gives the
reference, and :func:`mpo_fronts.trust.interval_coverage` counts, over theta in {1e-3, 1e-2, 0.1, 0.5} and every
distance d >= 1 whose exact curve crosses theta, the cases the tool trusts and those whose interval contains the
exact t*. Routes: 'study' (the convergence study of all chi, error = the change between the two largest),
'study-geometric' (the same with the geometric tail of three chi), 'study-no-trotter', and with --fallback the
discarded-weight route of each single chi (local per-bond ledger, no study). Prints one line per case and the
totals; --json writes everything.

The same function takes any (times, C_engine_by_chi, C_exact): to test on stored exact references, load their
arrays and call ``mpo_fronts.trust.interval_coverage`` directly.
"""

from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402

import numpy as np  # noqa: E402

import mpo_fronts as mf  # noqa: E402
from mpo_fronts import trust as tr  # noqa: E402


def chain_for(model: str, L: int):
    if model == "heisenberg":
        return mf.xxz_chain(L, delta=1.0, W=0.5, seed=3), 2.5
    return mf.mixed_field_ising_chain(L), 1.6


def run_case(model: str, L: int, site: int, chis, probes, dt: float = 0.05, order: int = 2, n_t: int = 50,
             fallback: bool = False) -> list[dict]:
    """Every route's coverage for one chain, L and site of W."""
    chain, tmax = chain_for(model, L)
    span = max(site, L - 1 - site)
    t = np.geomspace(0.1, tmax * span, n_t)
    t0 = time.perf_counter()
    ex = mf.exact_otoc(chain, w="Z", site=site, times=t)
    t_exact = time.perf_counter() - t0
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the large-discarded-weight warning of small chi is expected here
        runs = {chi: mf.evolve_otoc(chain, w="Z", site=site, times=t, chi=chi, dt=dt, order=order) for chi in chis}
        other = mf.evolve_otoc(chain, w="Z", site=site, times=t, chi=chis[-1], dt=2 * dt, order=order)
    t_engine = time.perf_counter() - t0
    rows = []
    for v in probes:
        C = {chi: r.otoc(v) for chi, r in runs.items()}
        trot = tr.trotter_convergence(C[chis[-1]][None], other.otoc(v)[None], dt, 2 * dt, order)
        routes = {"study": dict(C_engine_by_chi={c: C[c] for c in chis[-2:]}, trotter=trot),
                  "study-no-trotter": dict(C_engine_by_chi={c: C[c] for c in chis[-2:]})}
        if len(chis) >= 3:
            routes["study-geometric"] = dict(C_engine_by_chi=C, trotter=trot, tail="geometric")
        if fallback:
            for chi in chis:
                r = runs[chi]
                loc = tr.local_discarded(r.bond_discarded[None], t)
                mask = tr.trust_from_bonds(r.bond_discarded[None], t, site, tr.DEFAULT_MAX_DISCARDED,
                                           r.bond_entropy[None], chi)
                mask = mask & (r.discarded_weight <= tr.LARGE_DISCARDED_WEIGHT)[None, :, None]
                routes[f"fallback chi={chi}"] = dict(
                    C_engine_by_chi={chi: C[chi]}, fallback_dC=2 * loc / (1 - np.minimum(loc, 0.999)),
                    trusted=mask, trotter=trot if chi == chis[-1] else None)
        for name, kw in routes.items():
            cov = tr.interval_coverage(t, C_exact=ex.otoc(v), site=site, **kw)
            rows.append({"model": model, "L": L, "site": site, "probe": v, "chis": list(chis), "route": name,
                         "coverage": cov.coverage, "trusted_share": cov.trusted_share, "n_cases": cov.n_cases,
                         "n_trusted": cov.n_trusted, "n_covered": cov.n_covered,
                         "by_threshold": {str(k): val for k, val in cov.by_threshold.items()},
                         "misses": [c for c in cov.cases if c["trusted"] and not c["covered"]],
                         "seconds_exact": t_exact, "seconds_engine": t_engine,
                         "final_discarded_weight": {str(c): float(r.discarded_weight[-1]) for c, r in runs.items()}})
    return rows


def main() -> None:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--L", type=int, nargs="+", default=[10])
    p.add_argument("--chis", default="4,8,16")
    p.add_argument("--sites", nargs="+", default=["0", "center"])
    p.add_argument("--models", nargs="+", default=["heisenberg", "mfi"], choices=["heisenberg", "mfi"])
    p.add_argument("--probes", nargs="+", default=["Z", "X"])
    p.add_argument("--fallback", action="store_true", help="also the discarded-weight route of each chi")
    p.add_argument("--json", default=None, help="write all rows to this file")
    a = p.parse_args()
    chis = sorted(int(c) for c in a.chis.split(","))
    rows = []
    for model in a.models:
        for L in a.L:
            for s in a.sites:
                site = L // 2 if s == "center" else int(s)
                for row in run_case(model, L, site, chis, a.probes, fallback=a.fallback):
                    rows.append(row)
                    print(f"{model:10s} L={L:2d} site={site:2d} V={row['probe']} {row['route']:18s} coverage "
                          f"{row['coverage']:.3f} ({row['n_covered']}/{row['n_trusted']}), trusted share "
                          f"{row['trusted_share']:.3f} ({row['n_trusted']}/{row['n_cases']})", flush=True)
    print("\ntotals by route:")
    for route in sorted({r["route"] for r in rows}):
        sel = [r for r in rows if r["route"] == route]
        nc, nt, n = (sum(r[k] for r in sel) for k in ("n_covered", "n_trusted", "n_cases"))
        print(f"  {route:18s} coverage {nc / max(nt, 1):.3f} ({nc}/{nt}), trusted share {nt / max(n, 1):.3f} "
              f"({nt}/{n})")
    if a.json:
        with open(a.json, "w") as f:
            json.dump({"command": "python scripts/coverage.py " + " ".join(os.sys.argv[1:]), "rows": rows,
                       "version": mf.__version__}, f, indent=1)


if __name__ == "__main__":
    main()
