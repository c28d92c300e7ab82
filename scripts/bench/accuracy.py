"""Accuracy study: the engine's C(r, t) and crossing times t*(d; theta) against exact references.

Usage:  nice -n 10 python scripts/bench/accuracy.py [--cases NAME ...] [--chis 16 32 64 128]
                                                    [--rsvd-chis 16 32 64 128] [--rsvd-cases NAME ...]
                                                    [--trotter-chis 32] [--cache DIR]
                                                    [--out accuracy] [--md data/benchmarks/accuracy.md]

References (data/references/*.npz, read with mpo_fronts.references.reference_from_arrays; the chain is rebuilt
from the stored fields): the random-field Heisenberg chain (J = 1, delta = 1, spin units, seed 11) at L = 14,
W = 0.5 and 1, W = Z at site 0 and at the centre, by S^z-sector exact evolution (rounding floor of C ~1e-25),
probes Z and X; the same chain at L = 10, W = 1, site 0 (sector); the mixed-field Ising chain (J, g, h) =
(1, 1.05, 0.5) at L = 10, W = Z at the centre, probe X, against dense exact evolution (mpo_fronts.exact.
exact_otoc, computed here on the stored file's times; the stored typicality file is checked against it within
its statistical bound). The W = 1 files run to t = 200; the study stops at t = 40 (--tmax-w1).

Engine runs (mf.evolve_otoc on the reference's own time grid):
  * truncation 'svd', order 2 (Strang), dt = 0.05 at every chi of --chis;
  * truncation 'rsvd', order 2, dt = 0.05 at --rsvd-chis on --rsvd-cases (the mixed-field Ising chain), and
    on one Heisenberg chain at chi 32 to show that its Z2-graded blocks never take the randomized path;
  * truncation 'svd' at --trotter-chis with order 4 (Suzuki) dt = 0.1 and with dt = 'auto' (order 4
    Blanes-Moan, trotter_tol 1e-3).
Before anything is compared, each run's small-time agreement is recorded (max |dC| and the largest relative
error with C_exact > 1e-6 at t <= 1), where truncation has not yet acted.

Measured, per run and probe, for each estimator of C:
  * relative error |C_est - C_exact| / C_exact over (t, r) AHEAD of the front (1e-6 < C_exact < 1e-2), AT the
    front (1e-2 <= C_exact <= 0.5) and BEHIND it (C_exact > 0.5): n, median, 90th percentile, max, and the
    median signed error (C_est - C_exact) / C_exact;
  * crossing times t*(d; theta), theta in 1e-3, 1e-2, 0.1, 0.5, with mpo_fronts.analysis.crossing_times on
    each side of W (distance d = |r - site|), same time grid for both; relative error |t*_est - t*| / t* over
    the (side, d, theta) cases where the exact curve crosses; a case where the estimate does not cross is
    counted as missed. 'clear' crossings: the exact curve's largest value in the window is >= 1.2 theta (a curve
    that saturates just above theta makes t* ill-conditioned).
Estimators: 'norm' = the engine's C (weight anticommuting at r divided by the remaining Frobenius weight
1 - discarded_weight(t)); 'raw' = norm * (1 - discarded_weight(t)) (out of the original unit weight);
'local' = norm * (1 - D_between(r, t)), where D_between is the cumulative weight discarded at the bonds
between W's site and r (res.bond_discarded): weight lost there is taken to have stopped short of r, weight
lost elsewhere to look like the kept weight at r; 'fill' = raw + (discarded_weight - D_between) * 1: the same
split, but weight lost beyond r taken as saturated (C = 1, a random string anticommutes with V half the time);
'sat' = raw + discarded_weight * min(1, norm(r) / max_r' norm(r')): all the lost weight taken as scrambled
(C = 1) where the kept profile has saturated, in proportion to the kept profile elsewhere.

Writes data/benchmarks/<out>.json (command, git commit, machine, every number, per-case crossing times) and
the markdown tables to --md. One BLAS thread. A benchmark, not a test. Engine runs are cached in --cache
(keyed by case and settings) so that an interrupted study resumes; delete the folder to recompute.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import json  # noqa: E402
import re  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
import warnings  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "scripts" / "bench"))
sys.path.insert(0, str(ROOT))

import mpo_fronts as mf  # noqa: E402
from common import limit_blas, write_json  # noqa: E402
from mpo_fronts.analysis import crossing_times  # noqa: E402
from mpo_fronts.exact import exact_otoc  # noqa: E402
from mpo_fronts.references import reference_from_arrays  # noqa: E402

REF_DIR = ROOT / "data" / "references"
CASES = {
    "heis_L14_W0.5_site0": {"file": "heisenberg_L14_W0.5_seed11_site0.npz", "probes": ("Z", "X")},
    "heis_L14_W0.5_center": {"file": "heisenberg_L14_W0.5_seed11_center.npz", "probes": ("Z", "X")},
    "heis_L14_W1_site0": {"file": "heisenberg_L14_W1_seed11_site0.npz", "probes": ("Z", "X"), "w1": True},
    "heis_L14_W1_center": {"file": "heisenberg_L14_W1_seed11_center.npz", "probes": ("Z", "X"), "w1": True},
    "heis_L10_W1_site0": {"file": "heisenberg_L10_W1_seed11_site0.npz", "probes": ("Z", "X")},
    "mfi_L10_center": {"file": "mfi_L10_center_typ_X.npz", "probes": ("X",), "dense": True},
}
TROTTER = {"o2_dt0.05": {"order": 2, "dt": 0.05}, "o4_dt0.1": {"order": 4, "dt": 0.1},
           "auto": {"order": None, "dt": "auto"}}
REGIONS = {"ahead": "1e-6 < C_exact < 1e-2", "front": "1e-2 <= C_exact <= 0.5",
           "front_rising": "1e-2 <= C_exact <= 0.5 and t before C_exact(r, t) first reaches min(0.5, 0.8 max_t C_exact(r, t))",
           "behind": "C_exact > 0.5"}
THETAS = (1e-3, 1e-2, 0.1, 0.5)
ESTIMATORS = ("norm", "raw", "local", "fill", "sat")
PAIRED = ("extrap",)  # needs the run at chi / 2 as well
KEEP_CASES = ("norm", "sat")  # estimators whose per-case crossing times go into the JSON (main probe)
SMALL_T = 1.0
CLEAR = 1.2  # a crossing is 'clear' when max_t C_exact(r, t) >= CLEAR * theta


# ------------------------------------------------------------------------------------------------ inputs
def load_case(name: str, tmax_w1: float) -> dict:
    """The reference of one case: chain rebuilt from the stored fields, times, site, exact C per probe."""
    spec = CASES[name]
    ref = reference_from_arrays(np.load(REF_DIR / spec["file"]))
    meta = ref["meta"]
    model, L = meta["model"], int(meta["model"]["L"])
    p = model["params"]
    if model["kind"] == "xxz":
        chain = mf.xxz_chain(L, J=p["J"], delta=p["delta"], fields=ref["fields"])
    elif model["kind"] == "mixed_field_ising":
        chain = mf.mixed_field_ising_chain(L, J=p["J"], g=p["g"], h=p["h"])
    else:
        raise ValueError(model["kind"])
    times = np.asarray(ref["times"], dtype=float)
    keep = times <= (tmax_w1 if spec.get("w1") else np.inf)
    times = times[keep]
    site = int(meta["site"])
    sites = np.asarray(ref["sites"], dtype=int)
    out = {"name": name, "file": spec["file"], "chain": chain, "L": L, "site": site, "w": meta["w"],
           "times": times, "probes": spec["probes"], "model": model, "method": meta["method"]}
    if spec.get("dense"):
        t0 = time.perf_counter()
        ex = exact_otoc(chain, meta["w"], site, times)
        out["exact_seconds"] = time.perf_counter() - t0
        out["exact"] = {v: ex.otoc(v) for v in spec["probes"]}
        out["reference_method"] = "dense exact evolution (mpo_fronts.exact.exact_otoc), computed here"
        # the stored typicality file against the dense curve, in units of its stated statistical bound
        checks = {}
        for v in spec["probes"]:
            typ = ref["otoc"][v][keep]
            bound = ref["stderr"].get(v)
            eb = np.sqrt(np.clip(typ * (2 - typ), 0, None) / ((2 ** L + 1) * meta["n_states"]))
            dense = out["exact"][v][:, sites]
            z = np.abs(typ - dense) / np.where(eb > 0, eb, np.inf)
            checks[v] = {"max_abs_diff": float(np.abs(typ - dense).max()),
                         "share_within_2_bounds": float(np.mean(z <= 2)), "share_within_3_bounds": float(np.mean(z <= 3)),
                         "stored_stderr_present": bound is not None}
        out["typicality_file_vs_dense"] = checks
    else:
        if not np.array_equal(sites, np.arange(L)):
            raise ValueError(f"{name}: the study needs every probe site")
        out["exact"] = {v: np.asarray(ref["otoc"][v])[keep] for v in spec["probes"]}
        out["reference_method"] = f"{meta['method']} (stored file data/references/{spec['file']})"
    out["masks"] = {v: region_masks(times, out["exact"][v], site) for v in spec["probes"]}
    return out


# ------------------------------------------------------------------------------------------------ engine
def run_key(case: str, trotter: str, route: str, chi: int) -> str:
    return f"{case}__{trotter}__{route}__chi{chi}"


def engine_run(case: dict, trotter: str, route: str, chi: int, cache: Path | None) -> dict:
    """One engine run on the case's time grid (cached by key): weights, ledgers, meta, seconds."""
    key = run_key(case["name"], trotter, route, chi)
    path = cache / f"{key}.npz" if cache is not None else None
    if path is not None and path.exists():
        z = np.load(path)
        if np.array_equal(z["times"], case["times"]):
            return {"weights": z["weights"], "discarded_weight": z["discarded_weight"],
                    "bond_discarded": z["bond_discarded"], "max_bond": z["max_bond"],
                    "meta": json.loads(str(z["meta_json"][()])), "seconds": float(z["seconds"]), "cached": True}
    tr = TROTTER[trotter]
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        res = mf.evolve_otoc(case["chain"], case["w"], case["site"], case["times"], chi=chi, dt=tr["dt"],
                             order=tr["order"], truncation=route)
    seconds = time.perf_counter() - t0
    meta = {k: (v.item() if isinstance(v, np.generic) else v) for k, v in res.meta.items()
            if k in ("chi", "dt", "order", "splitting", "truncation", "trotter_tol", "dt_used", "max_step", "splits",
                     "trotter_estimate", "warnings", "cutoff")}
    out = {"weights": res.weights, "discarded_weight": res.discarded_weight, "bond_discarded": res.bond_discarded,
           "max_bond": res.max_bond, "meta": meta, "seconds": seconds, "cached": False}
    if path is not None:
        path.parent.mkdir(parents=True, exist_ok=True)
        tmp = path.with_suffix(".tmp.npz")
        np.savez_compressed(tmp, times=case["times"], weights=res.weights, discarded_weight=res.discarded_weight,
                            bond_discarded=res.bond_discarded, max_bond=res.max_bond, seconds=seconds,
                            meta_json=json.dumps(meta, default=_plain))
        os.replace(tmp, path)
    return out


def _rounded(x, digits: int = 5):
    """Floats to `digits` significant digits (the JSON stays small; the study's numbers need no more)."""
    if isinstance(x, dict):
        return {k: _rounded(v, digits) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_rounded(v, digits) for v in x]
    if isinstance(x, np.ndarray):
        return _rounded(x.tolist(), digits)
    if isinstance(x, (float, np.floating)):
        return float(f"{float(x):.{digits}g}") if np.isfinite(x) else None
    if isinstance(x, np.integer):
        return int(x)
    return x


def _plain(x):
    if isinstance(x, np.generic):
        return x.item()
    if isinstance(x, np.ndarray):
        return x.tolist()
    return str(x)


def estimates(run: dict, site: int, v: str) -> dict[str, np.ndarray]:
    """C(r, t) of probe v by each estimator, shape (n_t, L)."""
    from mpo_fronts.readout import otoc_from_weights

    norm = otoc_from_weights(run["weights"], v)
    dw = np.asarray(run["discarded_weight"])[:, None]
    bd = np.asarray(run["bond_discarded"])  # (n_t, L-1), bond b between sites b and b+1
    L = norm.shape[1]
    cum = np.concatenate([np.zeros((bd.shape[0], 1)), np.cumsum(bd, axis=1)], axis=1)  # cum[:, k] = sum b<k
    r = np.arange(L)
    lo, hi = np.minimum(r, site), np.maximum(r, site)
    between = cum[:, hi] - cum[:, lo]  # bonds lo .. hi-1
    raw = norm * (1.0 - dw)
    cmax = norm.max(axis=1, keepdims=True)
    share = np.clip(norm / np.where(cmax > 0, cmax, 1.0), 0.0, 1.0)
    return {"norm": norm, "raw": raw, "local": norm * (1.0 - between), "fill": raw + (dw - between) * 1.0,
            "sat": raw + dw * share}


# ------------------------------------------------------------------------------------------------ metrics
def region_masks(times, exact: np.ndarray, site: int) -> dict[str, np.ndarray]:
    """(n_t, L) masks of the regions. 'front_rising' is the part of 'front' before the exact curve C(r, .)
    first reaches min(0.5, 0.8 x its largest value in the window): the advancing front itself, not the
    relaxation behind it (C_ZZ of the Heisenberg chain saturates below 1 and can fall back below 0.5)."""
    t = np.asarray(times)
    level = np.minimum(0.5, 0.8 * exact.max(axis=0))  # (L,)
    reached = exact >= level[None, :]
    k = np.where(reached.any(axis=0), np.argmax(reached, axis=0), t.size)
    before = np.arange(t.size)[:, None] < k[None, :]
    m = {"ahead": (exact > 1e-6) & (exact < 1e-2), "front": (exact >= 1e-2) & (exact <= 0.5),
         "behind": exact > 0.5}
    m["front_rising"] = m["front"] & before
    return m


def region_stats(est: np.ndarray, exact: np.ndarray, masks: dict) -> dict:
    out = {}
    for name, m in masks.items():
        if not m.any():
            out[name] = {"n": 0}
            continue
        signed = (est[m] - exact[m]) / exact[m]
        rel = np.abs(signed)
        out[name] = {"n": int(m.sum()), "median": float(np.median(rel)), "p90": float(np.percentile(rel, 90)),
                     "max": float(rel.max()), "median_signed": float(np.median(signed)),
                     "share_over": float(np.mean(signed > 0))}
    return out


def sides(L: int, site: int) -> dict[str, np.ndarray]:
    """Probe sites on each side of W, ordered by distance 1, 2, ..."""
    out = {}
    if site < L - 1:
        out["right"] = np.arange(site + 1, L)
    if site > 0:
        out["left"] = np.arange(site - 1, -1, -1)
    return out


def crossing_cases(times, est, exact, L, site) -> list[dict]:
    """Every (side, d, theta) where the exact curve crosses theta: exact t*, estimated t* (None if missed)."""
    rows = []
    for side, cols in sides(L, site).items():
        for theta in THETAS:
            ce = crossing_times(times, exact[:, cols], theta)
            cx = crossing_times(times, est[:, cols], theta)
            for j, r in enumerate(cols):
                te = ce.tstar[j]
                if not np.isfinite(te):
                    continue
                tx = cx.tstar_any[j]
                rows.append({"side": side, "d": int(abs(r - site)), "theta": theta, "tstar_exact": float(te),
                             "margin": float(exact[:, r].max() / theta),
                             "tstar": float(tx) if np.isfinite(tx) else None,
                             "rel_err": float(abs(tx - te) / te) if np.isfinite(tx) else None})
    return rows


def crossing_stats(rows: list[dict]) -> dict:
    out = {}
    for theta in THETAS:
        sel = [r for r in rows if r["theta"] == theta]
        errs = np.array([r["rel_err"] for r in sel if r["rel_err"] is not None])
        allerr = np.array([np.inf if r["rel_err"] is None else r["rel_err"] for r in sel])
        out[f"{theta:g}"] = {"n_cases": len(sel), "n_missed": int(sum(r["rel_err"] is None for r in sel)),
                             "p90_missed_as_inf": float(np.quantile(allerr, 0.9, method="inverted_cdf")) if allerr.size else None,
                             **({"median": float(np.median(errs)), "p90": float(np.percentile(errs, 90)),
                                 "max": float(errs.max())} if errs.size else {})}
    return out


def small_t_check(times, est, exact) -> dict:
    m = times <= SMALL_T
    d = np.abs(est[m] - exact[m])
    rel_mask = exact[m] > 1e-6
    return {"t_max": SMALL_T, "max_abs": float(d.max()),
            "max_rel_C_gt_1e-6": float((d[rel_mask] / exact[m][rel_mask]).max()) if rel_mask.any() else None}


def analyse(case: dict, run: dict) -> dict:
    out = {"seconds": run["seconds"], "cached": run["cached"], "meta": run["meta"],
           "discarded_weight_final": float(run["discarded_weight"][-1]),
           "discarded_weight_at": {f"{t:g}": float(w) for t, w in zip(case["times"], run["discarded_weight"])},
           "max_bond_final": int(run["max_bond"][-1]), "probes": {}}
    for v in case["probes"]:
        ex = case["exact"][v]
        est = estimates(run, case["site"], v)
        pv = {"small_t": small_t_check(case["times"], est["norm"], ex), "estimators": {}}
        for name in ESTIMATORS:
            rows = crossing_cases(case["times"], est[name], ex, case["L"], case["site"])
            pv["estimators"][name] = {"regions": region_stats(est[name], ex, case["masks"][v]),
                                      "crossings": crossing_stats(rows), "crossing_cases": rows}
        out["probes"][v] = pv
    return out


def add_paired(results: dict, cases: dict) -> None:
    """For each run with a partner at chi / 2 (same case, Trotter setting, route): the estimator 'extrap'
    (C linear in the discarded weight of each time, extrapolated to zero discarded weight) and how often the
    difference to the chi / 2 run bounds the true error (|C_chi - C_chi/2| >= |C_chi - C_exact|)."""
    runs = results["runs"]
    for key, r in runs.items():
        partner = runs.get(run_key(r["case"], r["trotter"], r["route"], r["chi"] // 2))
        if partner is None:
            continue
        case = cases[r["case"]]
        dwa = np.asarray(r["_dw"])[:, None]
        dwb = np.asarray(partner["_dw"])[:, None]
        gap = dwb - dwa
        factor = np.where(gap > 1e-12, dwa / np.where(gap > 1e-12, gap, 1.0), 0.0)
        r["analysis"]["paired_with_chi"] = partner["chi"]
        for v in case["probes"]:
            ca, cb = r["_est"][v]["norm"], partner["_est"][v]["norm"]
            ex = case["exact"][v]
            est = ca + (ca - cb) * factor
            r["_est"][v]["extrap"] = est
            rows = crossing_cases(case["times"], est, ex, case["L"], case["site"])
            r["analysis"]["probes"][v]["estimators"]["extrap"] = {
                "regions": region_stats(est, ex, case["masks"][v]), "crossings": crossing_stats(rows),
                "crossing_cases": rows}
            conv = {}
            for name, m in case["masks"][v].items():
                if not m.any():
                    conv[name] = {"n": 0}
                    continue
                diff = np.abs(ca[m] - cb[m])
                err = np.abs(ca[m] - ex[m])
                ratio = err / np.where(diff > 0, diff, np.nan)
                conv[name] = {"n": int(m.sum()), "share_diff_bounds_error": float(np.mean(diff >= err)),
                              "median_error_over_diff": float(np.nanmedian(ratio)) if np.isfinite(ratio).any() else None,
                              "p90_error_over_diff": float(np.nanpercentile(ratio, 90)) if np.isfinite(ratio).any() else None}
            r["analysis"]["probes"][v]["chi_half_difference"] = conv


# ------------------------------------------------------------------------------------------------ tables
def fmt(x) -> str:
    if x is not None and np.isinf(x):
        return "miss"
    if x is None or (isinstance(x, float) and not np.isfinite(x)):
        return "-"
    if x == 0:
        return "0"
    return f"{x:.1e}" if (x < 1e-2 or x >= 10) else f"{x:.3f}"


def _cell(vals: np.ndarray, full: bool = False) -> str:
    if not vals.size:
        return "-"
    q = lambda p: np.quantile(vals, p, method="inverted_cdf")  # noqa: E731  (no interpolation: inf stays inf)
    parts = [q(0.5), q(0.9)] + ([vals.max()] if full else [])
    return " / ".join(fmt(float(x)) for x in parts)


MAIN = {"trotter": "o2_dt0.05", "route": "svd"}


def _is_main(r, chi=None) -> bool:
    return r["trotter"] == MAIN["trotter"] and r["route"] == MAIN["route"] and (chi is None or r["chi"] == chi)


def markdown(results: dict, cases: dict, command: str) -> str:
    runs = results["runs"]
    lines = [f"Reproduce: `{command}` (one BLAS thread; engine seconds below are on a shared 2-core machine).\n"]
    lines.append("### The references and the check at small times\n")
    lines.append("Each chain is rebuilt from the fields stored in its reference file. small t: largest |C - C_exact| "
                 "over t <= 1 and every site (before truncation acts), for each Trotter setting at chi 32: the "
                 "rebuilt chains agree to the Trotter error. Crossings: the number of (side of W, d) cases where the "
                 "exact curve crosses theta inside the time window, and in brackets how many of them are clear "
                 "(max_t C_exact >= 1.2 theta).\n")
    lines.append("| chain | reference | L | site | probe | t_max | small t: o2 dt 0.05 / o4 dt 0.1 / auto | "
                 + " | ".join(f"crossings theta = {t:g}" for t in THETAS) + " |")
    lines.append("| --- | --- | --- | --- | --- | --- | --- |" + " --- |" * len(THETAS))
    for name, case in cases.items():
        v = case["probes"][0]
        small = []
        for trot in TROTTER:
            r = runs.get(run_key(name, trot, "svd", 32))
            small.append(fmt(r["analysis"]["probes"][v]["small_t"]["max_abs"]) if r else "-")
        base = runs.get(run_key(name, MAIN["trotter"], MAIN["route"], 32)) or next(
            r for r in runs.values() if r["case"] == name)
        rows = base["analysis"]["probes"][v]["estimators"]["norm"]["crossing_cases"]
        counts = [f"{sum(x['theta'] == t for x in rows)} ({sum(x['theta'] == t and x['margin'] >= CLEAR for x in rows)})"
                  for t in THETAS]
        ref = case["reference_method"].split(" (")[0]
        lines.append(f"| {name} | {ref} | {case['L']} | {case['site']} | {v} | {case['times'][-1]:g} | "
                     + " / ".join(small) + " | " + " | ".join(counts) + " |")
        if "typicality_file_vs_dense" in case:
            chk = case["typicality_file_vs_dense"][v]
            typ_note = (f"{name}: the stored typicality file ({case['file']}) against the dense curve: largest "
                        f"difference {fmt(chk['max_abs_diff'])}, {100 * chk['share_within_2_bounds']:.1f} % of the "
                        f"points within 2 and {100 * chk['share_within_3_bounds']:.1f} % within 3 of its "
                        f"statistical bound.")
    lines.append("")
    if "typ_note" in locals():
        lines.append(typ_note + "\n")
    lines.append("### Relative error of C by region against chi (svd, order 2 Strang, dt 0.05, the engine's C)\n")
    lines.append("Cells: median / 90th percentile / max of |C - C_exact| / C_exact (percentiles without interpolation) over the (t, r) points of the "
                 "region (count n). Ahead: 1e-6 < C_exact < 1e-2; front: 1e-2 <= C_exact <= 0.5, of which "
                 "'rising' is before C_exact(r) first reaches min(0.5, 0.8 max_t C_exact(r)); behind: C_exact > 0.5. dw: discarded weight "
                 "at the last time.\n")
    lines.append("| chain | probe | chi | ahead | front, rising | front, all | behind | dw | s |")
    lines.append("| --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    for name, case in cases.items():
        v = case["probes"][0]
        for key, r in runs.items():
            if r["case"] != name or not _is_main(r):
                continue
            cells = []
            for region in ("ahead", "front_rising", "front", "behind"):
                vals = _relerrs(r, case, v, region, "norm")
                cells.append(f"{_cell(vals, True)} (n {vals.size})" if vals.size else "-")
            an = r["analysis"]
            lines.append(f"| {name} | {v} | {r['chi']} | " + " | ".join(cells)
                         + f" | {fmt(an['discarded_weight_final'])} | {an['seconds']:.0f} |")
    chis = sorted({r["chi"] for r in runs.values() if _is_main(r)})
    lines.append("")
    lines.append("### Relative error of t*(d; theta) against chi (svd, order 2, dt 0.05, the engine's C)\n")
    lines.append("Cells: median / 90th percentile / max of |t* - t*_exact| / t*_exact over the (chain, side of W, "
                 "d) cases where the exact curve crosses theta, both interpolated on the reference's time grid "
                 "(crossing_times); [cases, missed = the engine's curve does not cross]. A missed crossing counts as an "
                 "infinite error in the percentiles ('miss').\n")
    groups = {"Heisenberg L = 14": [n for n in cases if n.startswith("heis_L14")],
              "all chains": list(cases)}
    for gname, members in groups.items():
        if not members:
            continue
        lines.append(f"{gname} ({', '.join(members)}):\n")
        lines.append("| chi | " + " | ".join(f"theta = {t:g}" for t in THETAS) + " |")
        lines.append("| --- |" + " --- |" * len(THETAS))
        for chi in chis:
            cells = []
            for theta in THETAS:
                errs, n, missed = pooled_tstar(results, cases, lambda r: _is_main(r, chi) and r["case"] in members,
                                               theta, "norm")
                cells.append(f"{_cell(errs, True)} [{n}{f', {missed} missed' if missed else ''}]")
            lines.append(f"| {chi} | " + " | ".join(cells) + " |")
        lines.append("")
    lines.append("### Estimators of C (svd, order 2, dt 0.05), all chains pooled: median / 90th percentile of the "
                 "relative error\n")
    lines.append("norm: the engine's C (divided by the remaining weight 1 - dw(t)); raw: norm * (1 - dw(t)); local: "
                 "norm * (1 - weight discarded at the bonds between W and r); fill: raw + 1 x (weight discarded "
                 "elsewhere); sat: raw + dw(t) x min(1, norm(r) / max_r' norm(r')) (the lost weight taken as "
                 "scrambled, C = 1, where the kept profile has saturated); extrap: norm at chi and chi / 2 "
                 "extrapolated linearly in dw(t) to dw = 0 (needs both runs). Signed: median of "
                 "(C_est - C_exact) / C_exact behind the front.\n")
    lines.append("| chi | estimator | ahead | front, rising | front, all | behind | behind, signed |")
    lines.append("| --- | --- | --- | --- | --- | --- | --- |")
    for chi in chis:
        for est in ESTIMATORS + PAIRED:
            sel = lambda r, c=chi: _is_main(r, c)  # noqa: E731
            if not any(est in r["_est"][cases[r["case"]]["probes"][0]] for r in runs.values() if sel(r)):
                continue
            cells = [_cell(pooled_rel(results, cases, sel, region, est))
                     for region in ("ahead", "front_rising", "front", "behind")]
            signed = pooled_rel(results, cases, sel, "behind", est, signed=True)
            med = float(np.median(signed)) if signed.size else None
            cells.append("-" if med is None else (fmt(med) if med >= 0 else f"-{fmt(-med)}"))
            lines.append(f"| {chi} | {est} | " + " | ".join(cells) + " |")
    lines.append("")
    lines.append("t* by estimator (same runs): median / 90th percentile of the relative error, a missed crossing "
                 "counted as infinite ('miss') [missed/cases]. theta = 1e-3 "
                 "and 1e-2 are left out: there dw is small and every estimator gives the same t* to 1e-4.\n")
    lines.append("| chi | estimator | theta = 0.1 | theta = 0.5, all | theta = 0.5, clear |")
    lines.append("| --- | --- | --- | --- | --- |")
    for chi in chis:
        for est in ("norm", "raw", "sat") + PAIRED:
            sel = lambda r, c=chi: _is_main(r, c)  # noqa: E731
            cells = []
            for theta, clear in ((0.1, None), (0.5, None), (0.5, True)):
                errs, n, missed = pooled_tstar(results, cases, sel, theta, est, clear)
                if n:
                    cells.append(f"{_cell(errs)} [{missed}/{n}]")
            if cells:
                lines.append(f"| {chi} | {est} | " + " | ".join(cells) + " |")
    lines.append("")
    lines.append("### Truncation route and Trotter setting (the engine's C): median / 90th percentile of the relative "
                 "error; each setting beside svd, order 2, dt 0.05 at the same chi on the same chains\n")
    lines.append("small t: largest |C - C_exact| at t <= 1. t*: all theta pooled [missed/cases].\n")
    lines.append("| route | Trotter | chi | chains | ahead | front, rising | behind | t* | small t | dw (t_max), median "
                 "| s |")
    lines.append("| --- | --- | --- | --- | --- | --- | --- | --- | --- | --- | --- |")
    combos = sorted({(r["route"], r["trotter"], r["chi"]) for r in runs.values() if not _is_main(r)})

    def row(route, trot, chi, members, label=None):
        sel = lambda r: (r["route"] == route and r["trotter"] == trot and r["chi"] == chi  # noqa: E731
                         and r["case"] in members)
        chosen = [r for r in runs.values() if sel(r)]
        cells = [_cell(pooled_rel(results, cases, sel, region, "norm")) for region in ("ahead", "front_rising", "behind")]
        tt = [pooled_tstar(results, cases, sel, t, "norm") for t in THETAS]
        errs = np.concatenate([x[0] for x in tt])
        cells.append(f"{_cell(errs)} [{sum(x[2] for x in tt)}/{sum(x[1] for x in tt)}]")
        small = max(r["analysis"]["probes"][cases[r["case"]]["probes"][0]]["small_t"]["max_abs"] for r in chosen)
        dws = np.median([r["analysis"]["discarded_weight_final"] for r in chosen])
        secs = sum(r["analysis"]["seconds"] for r in chosen)
        return (f"| {label or route} | {label and '(same chains)' or trot} | {chi} | {len(chosen)} | "
                + " | ".join(cells) + f" | {fmt(small)} | {fmt(float(dws))} | {secs:.0f} |")

    for route, trot, chi in combos:
        members = sorted(r["case"] for r in runs.values() if (r["route"], r["trotter"], r["chi"]) == (route, trot, chi))
        lines.append(row(route, trot, chi, members))
        lines.append(row(MAIN["route"], MAIN["trotter"], chi, members, label="svd, order 2, dt 0.05"))
    lines.append("")
    conv_lines = []
    for chi in chis:
        shares, ratios = {}, {}
        for region in ("ahead", "front_rising", "behind"):
            num = den = 0
            for r in runs.values():
                if not _is_main(r, chi):
                    continue
                c = r["analysis"]["probes"][cases[r["case"]]["probes"][0]].get("chi_half_difference", {}).get(region)
                if c and c.get("n"):
                    num += c["share_diff_bounds_error"] * c["n"]
                    den += c["n"]
                    ratios.setdefault(region, []).append(c["median_error_over_diff"])
            shares[region] = num / den if den else None
        if any(x is not None for x in shares.values()):
            conv_lines.append(f"| {chi} vs {chi // 2} | " + " | ".join(
                f"{fmt(shares[k])} ({fmt(float(np.median([x for x in ratios.get(k, []) if x is not None])))})"
                if shares[k] is not None else "-" for k in shares) + " |")
    if conv_lines:
        lines.append("### Does |C(chi) - C(chi/2)| bound the true error? Share of points where it does, and in "
                     "brackets the median over chains of the median of |C(chi) - C_exact| / |C(chi) - C(chi/2)| "
                     "(svd, order 2, dt 0.05, all chains; ahead of the front the error is mostly Trotter error, "
                     "which no change of chi reveals)\n")
        lines.append("| chi | ahead | front, rising | behind |")
        lines.append("| --- | --- | --- | --- |")
        lines += conv_lines
    return "\n".join(lines) + "\n"


def _relerrs(run: dict, case: dict, v: str, region: str, est: str, signed: bool = False) -> np.ndarray:
    ex = case["exact"][v]
    m = case["masks"][v][region]
    e = run["_est"][v][est]
    d = (e[m] - ex[m]) / ex[m]
    return d if signed else np.abs(d)


def pooled_rel(results, cases, sel, region, est, signed: bool = False) -> np.ndarray:
    vals = [_relerrs(r, cases[r["case"]], cases[r["case"]]["probes"][0], region, est, signed)
            for r in results["runs"].values() if sel(r) and est in r["_est"][cases[r["case"]]["probes"][0]]]
    return np.concatenate(vals) if vals else np.array([])


def pooled_tstar(results, cases, sel, theta, est, clear: bool | None = None):
    errs, n, missed = [], 0, 0
    for r in results["runs"].values():
        if not sel(r):
            continue
        v = cases[r["case"]]["probes"][0]
        e = r["analysis"]["probes"][v]["estimators"].get(est)
        if e is None:
            continue
        for row in e["crossing_cases"]:
            if row["theta"] != theta or (clear is not None and (row["margin"] >= CLEAR) != clear):
                continue
            n += 1
            if row["rel_err"] is None:
                missed += 1
                errs.append(np.inf)  # a missed crossing counts as an infinite error in the percentiles
            else:
                errs.append(row["rel_err"])
    return np.array(errs), n, missed


def write_markdown(path: Path, md: str) -> None:
    """Replace the tables between the markers, keeping any text written around them."""
    begin, end = "<!-- accuracy tables: begin (written by scripts/bench/accuracy.py) -->", "<!-- accuracy tables: end -->"
    block = f"{begin}\n{md}{end}\n"
    old = path.read_text() if path.exists() else ""
    if begin in old and end in old:
        new = old[:old.index(begin)] + block + old[old.index(end) + len(end) + 1:]
    else:
        new = old + ("\n" if old else "") + block
    path.write_text(new)


# ------------------------------------------------------------------------------------------------ main
def plan(args) -> list[tuple[str, str, str, int]]:
    runs = []
    cap = dict(item.split("=") for item in args.max_chi)
    for case in args.cases:
        runs += [(case, "o2_dt0.05", "svd", chi) for chi in args.chis if chi <= int(cap.get(case, chi))]
        if case in args.rsvd_cases:
            runs += [(case, "o2_dt0.05", "rsvd", chi) for chi in args.rsvd_chis]
        elif case == args.rsvd_graded_check:
            runs += [(case, "o2_dt0.05", "rsvd", 32)]
        for chi in args.trotter_chis:
            runs += [(case, t, "svd", chi) for t in args.trotter
                     if t != "o2_dt0.05" and (t == "auto" or case not in args.no_o4)]
    return runs


def git_commit() -> dict:
    def git(*a):
        return subprocess.run(["git", *a], cwd=ROOT, capture_output=True, text=True).stdout.strip()
    mine = ["scripts/bench/accuracy.py"]
    return {"commit": git("rev-parse", "HEAD"), "accuracy_py_dirty": bool(git("status", "--porcelain", *mine)),
            "package_dirty_files": git("status", "--porcelain", "mpo_fronts").splitlines()}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--cases", nargs="+", default=list(CASES), choices=list(CASES))
    ap.add_argument("--chis", nargs="+", type=int, default=[16, 32, 64, 128])
    ap.add_argument("--rsvd-chis", nargs="*", type=int, default=[16, 32, 64, 128])
    ap.add_argument("--rsvd-cases", nargs="*", default=["mfi_L10_center"], choices=list(CASES))
    ap.add_argument("--rsvd-graded-check", default="heis_L10_W1_site0",
                    help="one Z2-graded case run with rsvd at chi 32 only: the Heisenberg chain with W = Z is graded, "
                         "its blocks never reach the size at which 'rsvd' samples (truncation.rsvd_samples), so rsvd "
                         "equals svd there (splits['rsvd'] = 0)")
    ap.add_argument("--trotter-chis", nargs="*", type=int, default=[32])
    ap.add_argument("--trotter", nargs="+", default=list(TROTTER), choices=list(TROTTER))
    ap.add_argument("--tmax-w1", type=float, default=40.0)
    ap.add_argument("--max-chi", nargs="*", default=["heis_L14_W1_site0=64"], metavar="CASE=CHI",
                    help="largest chi of the svd scan for a case (compute budget: the W = 1, site 0 case at chi 128 "
                         "would take about 400 s here)")
    ap.add_argument("--no-o4", nargs="*", default=["heis_L14_W1_site0", "heis_L14_W1_center"], choices=list(CASES),
                    help="cases run without the order 4, dt 0.1 setting (compute budget)")
    ap.add_argument("--cache", default="/tmp/mpo_fronts_accuracy_cache")
    ap.add_argument("--out", default="accuracy")
    ap.add_argument("--md", default=str(ROOT / "data" / "benchmarks" / "accuracy.md"))
    ap.add_argument("--only-runs", action="store_true", help="compute (and cache) the runs, write nothing")
    args = ap.parse_args()
    _ctx = limit_blas(1)  # noqa: F841
    cache = Path(args.cache) if args.cache else None
    t_start = time.perf_counter()
    cases = {name: load_case(name, args.tmax_w1) for name in args.cases}
    results = {"runs": {}}
    for case_name, trot, route, chi in plan(args):
        case = cases[case_name]
        run = engine_run(case, trot, route, chi, cache)
        key = run_key(case_name, trot, route, chi)
        an = analyse(case, run)
        results["runs"][key] = {"case": case_name, "trotter": trot, "route": route, "chi": chi, "analysis": an,
                                "_est": {v: estimates(run, case["site"], v) for v in case["probes"]},
                                "_dw": np.asarray(run["discarded_weight"])}
        v = case["probes"][0]
        reg = an["probes"][v]["estimators"]["norm"]["regions"]
        print(f"{key}: {an['seconds']:.1f} s{' (cached)' if run['cached'] else ''}, dw {an['discarded_weight_final']:.3g}, "
              f"small-t max|dC| {an['probes'][v]['small_t']['max_abs']:.2g}, median rel err ahead "
              f"{reg['ahead'].get('median', float('nan')):.2g} front {reg['front'].get('median', float('nan')):.2g} "
              f"behind {reg['behind'].get('median', float('nan')):.2g}", flush=True)
    if args.only_runs:
        return
    add_paired(results, cases)
    command = "nice -n 10 python " + " ".join(["scripts/bench/accuracy.py"] + sys.argv[1:])
    md = markdown(results, cases, command)
    print(md)
    payload = {
        "description": __doc__,
        "git": git_commit(),
        "machine_note": ("shared 2-core machine, about 8 users at once, one BLAS thread, nice -n 10: seconds are "
                         "indicative only"),
        "wall_seconds": time.perf_counter() - t_start,
        "engine_seconds_total": sum(r["analysis"]["seconds"] for r in results["runs"].values()),
        "regions": REGIONS, "thetas": list(THETAS), "estimators": list(ESTIMATORS) + list(PAIRED),
        "trotter_settings": TROTTER, "small_t": SMALL_T,
        "cases": {name: {k: c[k] for k in ("file", "L", "site", "w", "probes", "model", "reference_method")}
                  | {"times": c["times"], **({"typicality_file_vs_dense": c["typicality_file_vs_dense"],
                                               "exact_seconds": c["exact_seconds"]} if "exact_seconds" in c else {})}
                  for name, c in cases.items()},
        "runs": {k: {kk: vv for kk, vv in r.items() if not kk.startswith("_")} for k, r in results["runs"].items()},
    }
    for r in payload["runs"].values():
        for v, pv in r["analysis"]["probes"].items():
            if v != cases[r["case"]]["probes"][0]:  # second probe: the estimators of the recommendation only
                pv["estimators"] = {k: e for k, e in pv["estimators"].items() if k in KEEP_CASES + ("raw",)}
            for name, e in pv["estimators"].items():
                rows = e.pop("crossing_cases")
                if name in KEEP_CASES and v == cases[r["case"]]["probes"][0]:
                    e["crossing_cases"] = {k: [row[k] for row in rows] for k in
                                           ("side", "d", "theta", "margin", "tstar_exact", "tstar")}
    path = write_json(args.out, _rounded(payload))
    flat = lambda m: m.group(0)[0] + re.sub(r"\s*\n\s*", " ", m.group(1)) + m.group(0)[-1]  # noqa: E731
    text = re.sub(r"\[\s*([^\[\]{}]*?)\s*\]", flat, path.read_text())  # lists of numbers on one line
    text = re.sub(r"\{\s*([^\[\]{}]*?)\s*\}", flat, text)  # innermost objects on one line
    path.write_text(text)
    write_markdown(Path(args.md), md)
    print(f"wrote {path} and {args.md}")


if __name__ == "__main__":
    main()
