"""U(1) charge blocks (mpo_fronts.u1.ChargeTEBD) against the Z2-graded engine (OperatorTEBD, graded=True).

Usage:  nice -n 10 python scripts/bench/u1_blocks.py [--runs 64:10 128:4] [--window 256:3:0.5] [--L 32]
                                                     [--W 6] [--seed 1] [--dt 0.05] [--every 0.5]
                                                     [--name u1_blocks]

Random-field Heisenberg chain (delta = 1, fields uniform in [-W, W], seed 1), W = Z at the centre, order 2,
one BLAS thread. Side by side in one process, after a warm-up run of both engines on a small chain:

* ``--runs chi:t_final``: both engines from t = 0 to t_final (outputs every ``--every``); CPU seconds of the
  evolution (output readout timed apart), simulated time per CPU second, their ratio, max |dC| between the
  engines over all output times, sites and probes X, Y, Z, and both discarded weights.
* ``--window chi:t_start:length``: ChargeTEBD evolves alone to t_start; its state is handed to both engines
  (the Z2 engine gets the same operator as a real Pauli-basis MPS with parity labels, see
  ``ChargeTEBD.real_pauli_arrays``), which then run ``length`` further in time, timed as above. This measures
  the saturated regime at a bond dimension whose run from t = 0 would take too long for the Z2 engine.
* ``--accuracy-L 14``: both engines against exact evolution in the S^z sectors
  (:func:`mpo_fronts.references.sector_otoc`) at that L, same W and seed, for ``--accuracy-chis`` at
  ``--accuracy-times`` (order 4, dt 0.05 by default, so that truncation dominates): max |dC| over sites and probes
  per time, discarded weights, and max |C_X - C_Y| (zero in the exact result, W = Z conserves S^z).

Prints a table and writes data/benchmarks/<name>.json with the command, git commit and machine description.
A benchmark, not a test: timings on a shared machine are noisy, only the ratio in one run means something.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import mpo_fronts as mf  # noqa: E402
from common import ROOT, limit_blas, table, write_json  # noqa: E402
from mpo_fronts.evolve import OperatorTEBD  # noqa: E402
from mpo_fronts.readout import otoc_from_weights, read_operator  # noqa: E402
from mpo_fronts.u1 import ChargeTEBD  # noqa: E402

PROBES = "XYZ"


def _profile(eng) -> np.ndarray:
    """C(r) for probes X, Y, Z, shape (3, L)."""
    w = eng.profiles()["weights"] if isinstance(eng, ChargeTEBD) else read_operator(eng.arrays, eng.center)["weights"]
    return np.stack([otoc_from_weights(w, v) for v in PROBES])


def timed_run(eng, times) -> dict:
    """Evolve to every time; CPU seconds of the evolution and of the readout apart; C at every time."""
    cpu_ev = cpu_ro = 0.0
    wall0 = time.perf_counter()
    t0 = time.process_time()
    out = []
    for _, e in eng.run(times):
        t1 = time.process_time()
        cpu_ev += t1 - t0
        out.append(_profile(e))
        t0 = time.process_time()
        cpu_ro += t0 - t1
    return {"C": np.array(out), "cpu_evolve_s": cpu_ev, "cpu_readout_s": cpu_ro,
            "wall_s": time.perf_counter() - wall0, "discarded": float(eng.discarded_weight),
            "max_bond": int(eng.max_bond)}


def z2_from_u1(chain, site, settings, u1: ChargeTEBD) -> OperatorTEBD:
    """An OperatorTEBD (graded) holding the operator of ``u1``: real Pauli arrays, parity labels q mod 2."""
    z2 = OperatorTEBD(chain, "Z", site, settings=settings, graded=True)
    st = u1.state_dict()
    st = {**st, "arrays": u1.real_pauli_arrays(), "labels": [(q % 2).astype(np.int8) for q in u1.charges]}
    z2.load_state_dict(st)
    return z2


def row_of(chi, t_from, t_to, z2, u1, kind) -> dict:
    span = t_to - t_from
    r = {"kind": kind, "chi": chi, "t_from": t_from, "t_to": t_to,
         "z2_cpu_s": z2["cpu_evolve_s"], "u1_cpu_s": u1["cpu_evolve_s"],
         "z2_t_per_cpu_s": span / z2["cpu_evolve_s"], "u1_t_per_cpu_s": span / u1["cpu_evolve_s"],
         "ratio": z2["cpu_evolve_s"] / u1["cpu_evolve_s"],
         "z2_readout_cpu_s": z2["cpu_readout_s"], "u1_readout_cpu_s": u1["cpu_readout_s"],
         "z2_wall_s": z2["wall_s"], "u1_wall_s": u1["wall_s"],
         "max|dC|": float(np.abs(z2["C"] - u1["C"]).max()),
         "z2_discarded": z2["discarded"], "u1_discarded": u1["discarded"],
         "z2_max_bond": z2["max_bond"], "u1_max_bond": u1["max_bond"]}
    return r


def accuracy(args) -> list[dict]:
    """Both engines against exact S^z-sector evolution at L = args.accuracy_L (see the module doc)."""
    from mpo_fronts.references import sector_otoc

    chain = mf.xxz_chain(args.accuracy_L, delta=1.0, W=args.W, seed=args.seed)
    times = list(args.accuracy_times)
    c0 = time.process_time()
    ref = sector_otoc(chain, "Z", "center", times)
    print(f"exact reference at L = {args.accuracy_L}: {time.process_time() - c0:.0f} CPU s", flush=True)
    R = np.stack([np.stack([ref.otoc(v)[k] for v in PROBES]) for k in range(len(times))])
    out = []
    for chi in args.accuracy_chis:
        s = mf.EvolutionSettings(chi=chi, dt=args.accuracy_dt, order=args.accuracy_order)
        site = args.accuracy_L // 2
        for name, eng in (("z2", OperatorTEBD(chain, "Z", site, settings=s, graded=True)),
                          ("u1", ChargeTEBD(chain, "Z", site, settings=s))):
            res = timed_run(eng, times)
            C = res["C"]
            row = {"L": args.accuracy_L, "chi": chi, "engine": name, "order": args.accuracy_order,
                   "dt": args.accuracy_dt, "times": times,
                   "max|dC| vs exact": np.abs(C - R).max(axis=(1, 2)).tolist(),
                   "discarded": res["discarded"], "max|C_X - C_Y|": float(np.abs(C[:, 0] - C[:, 1]).max()),
                   "cpu_evolve_s": res["cpu_evolve_s"]}
            out.append(row)
            print(f"L = {args.accuracy_L}, chi {chi}, {name}: max|dC| vs exact at t = {times}: "
                  f"{', '.join(f'{x:.2e}' for x in row['max|dC| vs exact'])}; discarded {row['discarded']:.2e}; "
                  f"max|C_X - C_Y| {row['max|C_X - C_Y|']:.1e}", flush=True)
    return out


def git_commit() -> str:
    try:
        head = subprocess.run(["git", "rev-parse", "HEAD"], cwd=ROOT, capture_output=True, text=True).stdout.strip()
        dirty = subprocess.run(["git", "status", "--porcelain", "--", "mpo_fronts/u1.py", "mpo_fronts/evolve.py",
                                "mpo_fronts/truncation.py", "scripts/bench/u1_blocks.py"],
                               cwd=ROOT, capture_output=True, text=True).stdout.strip()
        return head + (" (engine files modified)" if dirty else "")
    except OSError:
        return "unknown"


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    ap.add_argument("--runs", nargs="*", default=["64:10", "128:4"], help="chi:t_final, runs from t = 0")
    ap.add_argument("--window", nargs="*", default=[], help="chi:t_start:length, both from one state")
    ap.add_argument("--L", type=int, default=32)
    ap.add_argument("--W", type=float, default=6.0)
    ap.add_argument("--seed", type=int, default=1)
    ap.add_argument("--dt", type=float, default=0.05)
    ap.add_argument("--every", type=float, default=0.5, help="output spacing (units 1/J)")
    ap.add_argument("--accuracy-L", type=int, default=0, help="L of the exact comparison (0: none)")
    ap.add_argument("--accuracy-chis", type=int, nargs="+", default=[16, 32])
    ap.add_argument("--accuracy-times", type=float, nargs="+", default=[2.0, 5.0, 10.0, 20.0])
    ap.add_argument("--accuracy-order", type=int, default=4)
    ap.add_argument("--accuracy-dt", type=float, default=0.05)
    ap.add_argument("--name", default="u1_blocks", help="JSON file name under data/benchmarks/")
    args = ap.parse_args(argv)
    _blas = limit_blas(int(os.environ["OPENBLAS_NUM_THREADS"]))  # noqa: F841

    chain = mf.xxz_chain(args.L, delta=1.0, W=args.W, seed=args.seed)
    site = args.L // 2
    small = mf.xxz_chain(10, W=1.0, seed=0)  # warm-up: imports, LAPACK workspaces, the allocator setting
    for eng in (OperatorTEBD(small, "Z", 5, chi=16, dt=0.1, graded=True), ChargeTEBD(small, "Z", 5, chi=16, dt=0.1)):
        timed_run(eng, [0.5, 1.0])

    def grid(t0, t1):
        n = max(1, int(round((t1 - t0) / args.every)))
        return list(t0 + (t1 - t0) * np.arange(1, n + 1) / n)

    rows = []
    for spec in args.runs:
        chi, t_final = int(spec.split(":")[0]), float(spec.split(":")[1])
        s = mf.EvolutionSettings(chi=chi, dt=args.dt, order=2)
        times = grid(0.0, t_final)
        z2 = timed_run(OperatorTEBD(chain, "Z", site, settings=s, graded=True), times)
        u1 = timed_run(ChargeTEBD(chain, "Z", site, settings=s), times)
        rows.append(row_of(chi, 0.0, t_final, z2, u1, "from t=0"))
        print(f"chi {chi}, t 0 -> {t_final}: Z2 {z2['cpu_evolve_s']:.1f} s, U(1) {u1['cpu_evolve_s']:.1f} s, ratio "
              f"{rows[-1]['ratio']:.2f}, max|dC| {rows[-1]['max|dC|']:.2e}", flush=True)
    for spec in args.window:
        chi, t_start, length = int(spec.split(":")[0]), float(spec.split(":")[1]), float(spec.split(":")[2])
        s = mf.EvolutionSettings(chi=chi, dt=args.dt, order=2)
        pre = ChargeTEBD(chain, "Z", site, settings=s)
        c0 = time.process_time()
        for _ in pre.run([t_start]):
            pass
        prep = time.process_time() - c0
        times = [t_start] + grid(t_start, t_start + length)
        z2_eng = z2_from_u1(chain, site, s, pre)
        u1_eng = ChargeTEBD(chain, "Z", site, settings=s)
        u1_eng.load_state_dict(pre.state_dict())
        z2 = timed_run(z2_eng, times)
        u1 = timed_run(u1_eng, times)
        r = row_of(chi, t_start, t_start + length, z2, u1, "window")
        r["u1_prep_cpu_s"] = prep
        r["discarded_at_start"] = float(pre.discarded_weight)
        rows.append(r)
        print(f"chi {chi}, t {t_start} -> {t_start + length} from one state: Z2 {z2['cpu_evolve_s']:.1f} s, U(1) "
              f"{u1['cpu_evolve_s']:.1f} s, ratio {r['ratio']:.2f}, max|dC| {r['max|dC|']:.2e}", flush=True)
    acc = accuracy(args) if args.accuracy_L else []
    print()
    print(f"random-field Heisenberg, L = {args.L}, W = {args.W:g}, seed {args.seed}, W = Z at site {site}, order 2, "
          f"dt = {args.dt}, BLAS threads {os.environ['OPENBLAS_NUM_THREADS']}; ratio = Z2 CPU s / U(1) CPU s")
    print(table(rows, ["kind", "chi", "t_from", "t_to", "z2_cpu_s", "u1_cpu_s", "ratio", "z2_t_per_cpu_s",
                       "u1_t_per_cpu_s", "max|dC|", "z2_discarded", "u1_discarded", "u1_max_bond"]))
    path = write_json(args.name, {
        "git_commit": git_commit(),
        "settings": vars(args),
        "model": {"kind": "xxz", "L": args.L, "delta": 1.0, "W": args.W, "seed": args.seed, "w": "Z", "site": site},
        "note": ("CPU seconds (time.process_time) of the evolution only, one BLAS thread, both engines in one "
                 "process; readout timed apart; max|dC| over all output times, sites and probes X, Y, Z. The "
                 "machine is shared with other jobs: ratios are meaningful, absolute times are not."),
        "rows": rows, "accuracy": acc})
    print(f"wrote {path}")


if __name__ == "__main__":
    main()
