"""Can the localized demo show the logarithmic light cone over more distances in its few-minute budget?

Usage:  nice -n 10 python scripts/bench/localized_demo.py [--variants base long_edge] [--workers 1]

Runs the installed mpo_fronts/demo/demo_localized.toml the way ``fronts demo`` does (a convergence study at
chi = 8 and 16, trust tolerance 0.02), as it ships (``base``: L = 32, W at the centre, order 2, dt = 0.25,
t <= 100) and with the changes of a candidate extension (``long_edge``: L = 16, W at site 0, so that the
operator entangles one bond side only, order 4 Blanes-Moan with dt = "auto" at trotter_tol = 1e-2, t <= 300),
one after the other in this command. For each: wall and CPU time of the study, the median final discarded
weight, and at thresholds 0.05 ... 0.001 the trusted crossing distances with their t*, the log light-cone fit
(xi) and which law (ballistic or logarithmic) has the smaller rms log residual (mpo_fronts.report.summarize,
probe Z). Runs go to a temporary folder. Writes data/benchmarks/localized_demo.json. A benchmark, not a test.
"""

from __future__ import annotations

import os

for _var in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "NUMBA_NUM_THREADS"):
    os.environ.setdefault(_var, "1")

import argparse  # noqa: E402
import resource  # noqa: E402
import sys  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
import tomllib  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parent))
import mpo_fronts as mf  # noqa: E402
from common import write_json  # noqa: E402
from mpo_fronts.cli import _DEMO_CHIS as CHIS, _DEMO_TOL as TOL, demo_folder  # noqa: E402  (fronts demo's own)
from mpo_fronts.config import parse_description  # noqa: E402
from mpo_fronts.report import summarize  # noqa: E402
from mpo_fronts.workflows import converge  # noqa: E402

VARIANTS = {
    "base": {},
    "long_edge": {"model.L": 16, "operators.site": 0, "times.stop": 300.0, "evolution.dt": "auto",
                  "evolution.order": 4, "evolution.splitting": "blanes_moan", "evolution.trotter_tol": 0.01},
}
THRESHOLDS = (0.05, 0.02, 0.01, 0.005, 0.002, 0.001)


def _cpu() -> float:
    """CPU seconds of this process and its finished children (worker processes)."""
    a, b = resource.getrusage(resource.RUSAGE_SELF), resource.getrusage(resource.RUSAGE_CHILDREN)
    return a.ru_utime + a.ru_stime + b.ru_utime + b.ru_stime


def one(name: str, workers: int, tmp: Path) -> dict:
    raw = tomllib.loads((demo_folder() / "demo_localized.toml").read_text())
    for key, value in VARIANTS[name].items():
        table, field = key.split(".")
        raw[table][field] = value
    desc = parse_description(raw)
    w0, c0 = time.time(), _cpu()
    converge(desc, CHIS, tmp / name, tol=TOL, workers=workers)
    row = {"variant": name, "changes": VARIANTS[name], "wall_s": time.time() - w0, "cpu_s": _cpu() - c0}
    ens = mf.load(tmp / name)
    row["median_final_discarded"] = float(np.median(np.asarray(ens.discarded_weight)[:, -1]))
    row["thresholds"] = []
    for theta in THRESHOLDS:
        s = summarize(ens, threshold=theta, probe="Z")
        cr = s["crossings"]
        trusted = [(int(d), float(t)) for d, t, st in zip(cr["distances"], cr["tstar"], cr["status"])
                   if st == "crossed" and d > 0]
        fit, law = s.get("log_light_cone") or {}, s.get("law_comparison") or {}
        row["thresholds"].append({"threshold": theta, "trusted_d_tstar": trusted,
                                  "xi": fit.get("value"), "xi_ci": [fit.get("ci_low"), fit.get("ci_high")],
                                  "law_smaller_residual": law.get("smaller"),
                                  "rms_log_ballistic": law.get("rms_log_residual_ballistic"),
                                  "rms_log_log": law.get("rms_log_residual_log")})
        print(f"{name} theta {theta:g}: trusted (d, t*) {[(d, round(t, 2)) for d, t in trusted]}, "
              f"smaller residual: {law.get('smaller')}", flush=True)
    print(f"{name}: {row['wall_s']:.0f} s wall, {row['cpu_s']:.0f} CPU s", flush=True)
    return row


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--variants", nargs="+", default=list(VARIANTS), choices=list(VARIANTS))
    ap.add_argument("--workers", type=int, default=1)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory(prefix="fronts_locdemo_") as tmp:
        rows = [one(n, args.workers, Path(tmp)) for n in args.variants]
    write_json("localized_demo", {"chis": CHIS, "tol": TOL, "workers": args.workers, "rows": rows})


if __name__ == "__main__":
    main()
