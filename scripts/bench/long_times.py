"""Long times in localized chains: simulated time per CPU-second at matched Trotter accuracy, this tree against
commit f35581a (the state measured in the long-time issue), side by side in one command.

Usage: nice -n 10 python scripts/bench/long_times.py [--t-bench 20] [--t-final 1000] [--tol 1e-3]

Setting (from the issue): random-field Heisenberg chain, W = 6, L = 32, seed 1, W = Z at the centre, chi = 64.

Accuracy is matched on the Trotter error alone (truncation is the same at equal chi and is measured by the
exact references, not here): for every splitting, the step that keeps the estimated Trotter error of C below
``--tol`` up to ``--t-final`` comes from :func:`mpo_fronts.stepsize.auto_dt` (fitted on a 6-site window; the
estimate is tested against dense exact evolution in tests/test_stepsize.py). The old commit offers Strang
(order 2) and Suzuki (order 4) only; this tree adds Blanes-Moan (order 4), the dt = "auto" default, and the
U(1) charge-block engine (``symmetry = "u1"``, :class:`mpo_fronts.u1.ChargeTEBD`), which ``symmetry = "auto"``
picks with dt = "auto" on this chain (S^z-conserving, W = Z). The rows "dt = auto" run the step that
dt = "auto" resolves to for ``--t-final`` (given as that number, since the timed run stops at ``--t-bench``),
with the Z2 engine and with the U(1) engine; the headline ratio is the U(1) row's. A last row runs the U(1)
engine with the opt-in QR gate (``gate_update = "qr"``) at ``QR_CHI``, the chi at which its truncation error was
measured no larger than the SVD's at chi = 64; its ratio is reported separately.

Timing: each configuration evolves from t = 0 to ``--t-bench`` on one BLAS thread, the old commit in a
subprocess importing a temporary git worktree of f35581a, this tree in a subprocess too (same conditions).
The CPU time per unit of simulated time at the matched step is the measured CPU time per Trotter step (at the
step actually run) times the steps per unit time at the matched step: a step costs the same whatever its
length, since the bond dimensions reached depend on the simulated time, not on the step (checked: the
per-step cost of the two runs of this tree at different steps is printed).
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
os.environ.setdefault("OMP_NUM_THREADS", "1")
os.environ.setdefault("MKL_NUM_THREADS", "1")

ROOT = Path(__file__).resolve().parents[2]
sys.path.insert(0, str(ROOT / "scripts" / "bench"))
sys.path.insert(0, str(ROOT))

OLD = "f35581a"
L, W, SEED, CHI = 32, 6.0, 1, 64
# The QR gate's chi at matched truncation accuracy: the smallest chi whose max |dC| against both L = 14 W = 6
# references (W at site 0 and at the centre, t <= 112) is at most the SVD's at CHI, measured by
# scripts/bench/u1_qr_gate.py --name u1_qr_gate_iters2 (chi 64 was not: 2.19e-3 against 1.97e-3 at the centre).
QR_CHI = 68

RUNNER = r"""
import json, sys, time
sys.path.insert(0, {path!r})
import numpy as np
import mpo_fronts as mf
chain = mf.xxz_chain({L}, W={W}, seed={seed})
times = list(np.linspace({t_bench} / 8, {t_bench}, 8))
mf.evolve_otoc(mf.xxz_chain(8, W=1.0, seed=1), "Z", 4, [0.2], chi=8, dt=0.1)  # warm-up (imports, numba)
kw = dict(order={order})
if {splitting!r} != "standard":
    kw["splitting"] = {splitting!r}
if {symmetry!r} is not None:  # the old commit has no symmetry setting
    kw["symmetry"] = {symmetry!r}
if {gate_update!r} is not None:  # nor a gate_update setting
    kw["gate_update"] = {gate_update!r}
t0 = time.process_time()
res = mf.evolve_otoc(chain, "Z", {L} // 2, times, chi={chi}, dt={dt}, **kw)
cpu = time.process_time() - t0
print(json.dumps({{"cpu": cpu, "max_step": float(res.meta.get("max_step", {dt})),
                  "symmetry_used": res.meta.get("symmetry_used", "z2"),
                  "discarded": float(res.discarded_weight[-1]), "max_bond": int(res.max_bond.max()),
                  "C_Z": res.otoc("Z")[-1].tolist()}}))
"""


def run_one(path: Path, order: int, splitting: str, dt: float, t_bench: float, symmetry: str | None,
            chi: int, gate_update: str | None) -> dict:
    code = RUNNER.format(path=str(path), L=L, W=W, seed=SEED, t_bench=t_bench, order=order, splitting=splitting,
                         chi=chi, dt=dt, symmetry=symmetry, gate_update=gate_update)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         cwd=tempfile.gettempdir())
    res = json.loads(out.stdout.strip().splitlines()[-1])
    res["steps"] = t_bench / res["max_step"]
    res["cpu_per_step"] = res["cpu"] / res["steps"]
    return res


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--t-bench", type=float, default=20.0)
    ap.add_argument("--t-final", type=float, default=1000.0)
    ap.add_argument("--tol", type=float, default=1e-3)
    args = ap.parse_args()

    import mpo_fronts as mf
    from common import write_json  # noqa: E402
    from mpo_fronts.schedules import layers_per_step
    from mpo_fronts.stepsize import auto_dt

    chain = mf.xxz_chain(L, W=W, seed=SEED)
    auto_symmetry = mf.EvolutionSettings(chi=CHI, dt="auto").engine_symmetry(chain, "Z")
    print(f"symmetry = 'auto' with dt = 'auto' picks {auto_symmetry!r} here", flush=True)
    matched = {}
    for order, splitting in ((2, "standard"), (4, "standard"), (4, "blanes_moan")):
        dt, info = auto_dt(chain, "Z", L // 2, args.t_final, order, splitting, args.tol)
        matched[(order, splitting)] = (dt, info)
        print(f"order {order} {splitting:12s}: matched step {dt:.4g} (A = {info['A']:.3g}, "
              f"{layers_per_step(order, splitting)} layers per step)", flush=True)

    old_tree = Path(tempfile.mkdtemp(prefix="fronts_old_")) / "tree"
    subprocess.run(["git", "-C", str(ROOT), "worktree", "add", "--detach", str(old_tree), OLD], check=True,
                   capture_output=True)
    rows = []
    try:
        # (label, tree, order, splitting, step actually run, symmetry, chi, gate_update): the slow matched
        # steps are timed at a longer step and scaled by the number of steps (see the module doc); symmetry and
        # gate_update None: the old commit's (no such settings). The last row is the opt-in QR gate at QR_CHI.
        bm = matched[(4, "blanes_moan")][0]
        configs = [("f35581a, order 2 (Strang)", old_tree, 2, "standard", 0.05, None, CHI, None),
                   ("f35581a, order 4 (Suzuki)", old_tree, 4, "standard", 0.1, None, CHI, None),
                   ("this tree, order 2 (Strang)", ROOT, 2, "standard", 0.05, "z2", CHI, None),
                   ("this tree, order 4 (Blanes-Moan), dt = auto, Z2 engine", ROOT, 4, "blanes_moan", bm, "z2",
                    CHI, None),
                   ("this tree, order 4 (Blanes-Moan), half step, Z2 engine", ROOT, 4, "blanes_moan", 0.5 * bm,
                    "z2", CHI, None),
                   ("this tree, order 4 (Blanes-Moan), dt = auto, U(1) engine", ROOT, 4, "blanes_moan", bm, "u1",
                    CHI, None),
                   (f"this tree, order 4 (Blanes-Moan), dt = auto, U(1) engine, gate_update = qr, chi {QR_CHI}",
                    ROOT, 4, "blanes_moan", bm, "u1", QR_CHI, "qr")]
        for label, tree, order, splitting, dt_run, symmetry, chi, gate_update in configs:
            t0 = time.perf_counter()
            r = run_one(tree, order, splitting, dt_run, args.t_bench, symmetry, chi, gate_update)
            dt_m = matched[(order, splitting)][0]
            r.update(label=label, order=order, splitting=splitting, dt_run=dt_run, dt_matched=dt_m, chi=chi,
                     gate_update=gate_update or "svd",
                     predicted_error_at_dt_run=matched[(order, splitting)][1]["A"] * dt_run ** order * args.t_final,
                     cpu_per_unit_time_matched=r["cpu_per_step"] / dt_m, wall=time.perf_counter() - t0)
            r["sim_time_per_cpu_s_matched"] = 1.0 / r["cpu_per_unit_time_matched"]
            rows.append(r)
            print(f"{label:45s} dt run {dt_run:.4g}: {r['cpu']:.1f} CPU s for t = {args.t_bench:g} "
                  f"({r['cpu_per_step'] * 1e3:.1f} ms/step, discarded {r['discarded']:.2e}); at the matched step "
                  f"{dt_m:.4g}: {r['sim_time_per_cpu_s_matched']:.4f} simulated time per CPU s", flush=True)
    finally:
        subprocess.run(["git", "-C", str(ROOT), "worktree", "remove", "--force", str(old_tree)], check=False,
                       capture_output=True)
    best_old = max(r["sim_time_per_cpu_s_matched"] for r in rows if r["label"].startswith("f35581a"))
    new_z2 = next(r for r in rows if "dt = auto, Z2" in r["label"])
    new = next(r for r in rows if "dt = auto, U(1)" in r["label"])
    ratio = new["sim_time_per_cpu_s_matched"] / best_old
    ratio_z2 = new_z2["sim_time_per_cpu_s_matched"] / best_old
    u1_vs_z2 = new["sim_time_per_cpu_s_matched"] / new_z2["sim_time_per_cpu_s_matched"]
    u1_z2_cz = float(np.max(np.abs(np.asarray(new["C_Z"]) - np.asarray(new_z2["C_Z"]))))
    same = rows[0]["C_Z"], rows[2]["C_Z"]
    agree = float(np.max(np.abs(np.asarray(same[0]) - np.asarray(same[1]))))
    print(f"ratio at matched Trotter accuracy (tol {args.tol:g} up to t = {args.t_final:g}): {ratio:.2f}x over the "
          f"best option of f35581a with the U(1) engine ({ratio_z2:.2f}x with the Z2 engine; U(1) / Z2 "
          f"{u1_vs_z2:.2f}x, C_Z of the two differing by {u1_z2_cz:.1e} at t = {args.t_bench:g}, truncation); old "
          f"and new order-2 runs agree to {agree:.1e} in C_Z at t = {args.t_bench:g}")
    qr = next(r for r in rows if "gate_update = qr" in r["label"])
    ratio_qr = qr["sim_time_per_cpu_s_matched"] / best_old
    print(f"opt-in gate_update = 'qr' at chi {QR_CHI} (truncation error at most the SVD's at chi {CHI} on the L = 14 "
          f"references, data/benchmarks/u1_qr_gate_iters2.json): {ratio_qr:.2f}x over f35581a, "
          f"{qr['sim_time_per_cpu_s_matched'] / new['sim_time_per_cpu_s_matched']:.2f}x over the SVD row; "
          f"discarded at t = {args.t_bench:g}: {qr['discarded']:.2e} against {new['discarded']:.2e}")
    hours = args.t_final / new["sim_time_per_cpu_s_matched"] / 3600
    hours_qr = args.t_final / qr["sim_time_per_cpu_s_matched"] / 3600
    print(f"expected cost of t = {args.t_final:g} per realization with dt = auto (U(1)): {hours:.2f} CPU hours "
          f"(chi = {CHI}, bond dimension reached by t = {args.t_bench:g}: {new['max_bond']})")
    write_json("long_times", {
        "command": "nice -n 10 python scripts/bench/long_times.py " + " ".join(sys.argv[1:]),
        "setting": {"model": "xxz", "L": L, "W": W, "seed": SEED, "w": "Z", "site": L // 2, "chi": CHI,
                    "t_bench": args.t_bench, "t_final": args.t_final, "tol": args.tol},
        "matched_steps": {f"{o}/{s}": {"dt": d, "A": i["A"], "ratio": i["ratio"]} for (o, s), (d, i) in
                          matched.items()},
        "rows": [{k: v for k, v in r.items() if k != "C_Z"} for r in rows],
        "ratio_matched": ratio, "ratio_matched_z2_engine": ratio_z2, "u1_over_z2_at_dt_auto": u1_vs_z2,
        "ratio_matched_qr": ratio_qr, "qr_chi": QR_CHI, "hours_to_t_final_qr": hours_qr,
        "u1_z2_max_abs_dCZ_at_t_bench": u1_z2_cz, "auto_symmetry": auto_symmetry,
        "note": ("ratio_matched: the dt = auto U(1) row over the best f35581a row (simulated time per CPU second at "
                 "matched Trotter accuracy); ratio_matched_qr: the same for the opt-in QR gate at chi qr_chi, whose "
                 "truncation error was measured at most the SVD's at chi 64 (data/benchmarks/u1_qr_gate_iters2.json);"
                 " all rows measured one after another in this command"),
        "old_new_agreement_CZ": agree, "hours_to_t_final": hours})


if __name__ == "__main__":
    main()
