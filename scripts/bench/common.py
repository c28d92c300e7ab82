"""Shared pieces of the benchmark scripts: the plain quimb TEBD peer, timing, machine info, JSON output.

Not part of the library API. The peer is the straightforward thing a user of a general tensor-network library
would write: the operator W(t) vectorised into a complex MPS of local dimension 4 (vec(W), row-major per site,
local index 2 a + b for ket a and bra b), evolved with quimb's own ``TEBD`` class under the superoperator of
the Heisenberg equation dW/dt = i[H, W].
"""

from __future__ import annotations

import json
import os
import platform
import resource
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[2]
OUT_DIR = ROOT / "data" / "benchmarks"

_I2 = np.eye(2, dtype=complex)
_PAULI = {"I": _I2, "X": np.array([[0, 1], [1, 0]], dtype=complex),
          "Y": np.array([[0, -1j], [1j, 0]], dtype=complex), "Z": np.array([[1, 0], [0, -1]], dtype=complex)}


# ------------------------------------------------------------------------------------------------ peer
def bond_superoperators(chain) -> dict:
    """quimb 'Hamiltonian' terms of the vectorised Heisenberg equation, one 16x16 matrix per bond.

    d vec(W)/dt = i K vec(W) with K = H (x) 1 - 1 (x) H^T on (ket, bra); quimb evolves d psi/dt = -i H_q psi,
    so H_q = -K, with the two-site (ket_i ket_j, bra_i bra_j) index reordered to (ket_i bra_i, ket_j bra_j).
    """
    I4 = np.eye(4)
    out = {}
    for b, h in enumerate(chain.bond_hamiltonians()):
        K = np.kron(h, I4) - np.kron(I4, h.T)
        K = K.reshape([2] * 8).transpose(0, 2, 1, 3, 4, 6, 5, 7).reshape(16, 16)
        out[(b, b + 1)] = -K
    return out


def vectorised_pauli_mps(L: int, w: str, site: int):
    """vec(W) / sqrt(2^L) as a complex quimb MPS with bond dimension 1 (unit norm)."""
    import quimb.tensor as qtn

    arrays = [(_PAULI[w] if k == site else _I2).reshape(4) / np.sqrt(2) for k in range(L)]
    return qtn.MPS_product_state(arrays)


def probe_terms(L: int, v: str) -> dict:
    """Local operators G_r = V (x) V^T on (ket, bra): <vec W| G_r |vec W> = Tr(W V_r W V_r)."""
    G = np.kron(_PAULI[v], _PAULI[v].T)
    return {r: G for r in range(L)}


def quimb_tebd_otoc(chain, w: str, site: int, times, chi: int, dt: float, order: int = 2,
                    probes=("X", "Z"), cutoff: float = 1e-13) -> dict:
    """C(r, t) from the plain quimb TEBD peer. Singular values below cutoff * s_max are dropped (as the
    engine's SVD floor), at most chi kept. Returns otoc {v: (n_t, L)}, max_bond, t_evolve, t_readout (s)."""
    import quimb.tensor as qtn

    L = chain.L
    H = qtn.LocalHam1D(L, H2=bond_superoperators(chain))
    tebd = qtn.TEBD(vectorised_pauli_mps(L, w, site), H, dt=dt, progbar=False,
                    split_opts={"max_bond": chi, "cutoff": cutoff, "cutoff_mode": "rel"})
    terms = {v: probe_terms(L, v) for v in probes}
    otoc = {v: np.empty((len(times), L)) for v in probes}
    t_ev = t_ro = 0.0
    max_bond = []
    for k, t in enumerate(times):
        t0 = time.perf_counter()
        if t > tebd.t:
            tebd.update_to(float(t), dt=dt, order=order)
        t1 = time.perf_counter()
        psi = tebd.pt
        for v in probes:
            F = psi.compute_local_expectation(terms[v], return_all=True, normalized=True)
            otoc[v][k] = [1.0 - np.real(F[r]) for r in range(L)]
        t_ro += time.perf_counter() - t1
        t_ev += t1 - t0
        max_bond.append(int(psi.max_bond()))
    return {"otoc": otoc, "max_bond": max_bond, "t_evolve": t_ev, "t_readout": t_ro}


def engine_otoc(chain, w, site, times, chi, dt, order=2, **kw) -> dict:
    """The engine end to end (mf.evolve_otoc), timed; evolution and readout are not separated here."""
    import mpo_fronts as mf

    t0 = time.perf_counter()
    res = mf.evolve_otoc(chain, w=w, site=site, times=times, chi=chi, dt=dt, order=order, **kw)
    return {"result": res, "t_total": time.perf_counter() - t0}


# ------------------------------------------------------------------------------------------------ utilities
def warm_up() -> None:
    """First use of quimb compiles numba kernels and fills caches: run both codes once on a tiny chain."""
    import mpo_fronts as mf

    small = mf.xxz_chain(8, W=1.0, seed=0)
    quimb_tebd_otoc(small, "Z", 4, [0.2], chi=8, dt=0.1)
    engine_otoc(small, "Z", 4, [0.2], chi=8, dt=0.1)


def side_by_side(chain, site: int, times, chi: int, dt: float, order: int = 2, truncation: str = "svd",
                 peer: dict | None = None, reference=None) -> tuple[dict, dict, object]:
    """The engine and the plain quimb TEBD on the same chain, times, chi and order: (row of times, ratios,
    max |dC|; the quimb run; the engine's OtocResult). ``peer``: a quimb run of the same settings to reuse
    instead of a new one. ``reference``: an engine OtocResult (another truncation route, same settings) to
    compare with: max |dC| and the largest relative change where 1e-10 < C_Z < 1e-4 (ahead of the front).
    """
    e = engine_otoc(chain, "Z", site, times, chi=chi, dt=dt, order=order, truncation=truncation)
    q = peer if peer is not None else quimb_tebd_otoc(chain, "Z", site, times, chi=chi, dt=dt, order=order)
    res = e["result"]
    t_q = q["t_evolve"] + q["t_readout"]
    row = {"chi": chi, "t_engine_s": e["t_total"], "t_quimb_s": t_q, "t_quimb_evolve_s": q["t_evolve"],
            "ratio": t_q / e["t_total"], "ratio_evolve_only": q["t_evolve"] / e["t_total"],
            "max|dC|": max(np.abs(res.otoc(v) - q["otoc"][v]).max() for v in "XZ"),
            "engine_discarded": float(res.discarded_weight[-1]), "engine_max_bond": int(res.max_bond[-1]),
            "quimb_max_bond": q["max_bond"][-1], "truncation": truncation}
    if reference is not None:
        row["max|dC| vs ref"] = max(float(np.abs(res.otoc(v) - reference.otoc(v)).max()) for v in "XZ")
        ref = reference.otoc("Z")
        tip = (ref > 1e-10) & (ref < 1e-4)
        rel = np.abs(res.otoc("Z")[tip] - ref[tip]) / ref[tip]
        row["rel dC ahead vs ref"] = float(rel.max()) if tip.any() else 0.0
        row["n_ahead"] = int(tip.sum())
    return row, q, res


def limit_blas(threads: int = 1):
    """Limit BLAS threads in this process (returns the threadpoolctl context, kept alive by the caller)."""
    from threadpoolctl import threadpool_limits

    return threadpool_limits(limits=threads)


def best_of(fn, repeat: int):
    """Run fn() `repeat` times; return (min wall time in s, last return value)."""
    best, out = np.inf, None
    for _ in range(repeat):
        t0 = time.perf_counter()
        out = fn()
        best = min(best, time.perf_counter() - t0)
    return best, out


def peak_rss_mib() -> float:
    """Peak resident set size of this process so far (MiB; Linux reports KiB)."""
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0


def machine() -> dict:
    import mpo_fronts as mf
    import quimb
    import scipy

    try:
        cpu = next(line.split(":", 1)[1].strip() for line in open("/proc/cpuinfo") if line.startswith("model name"))
    except (OSError, StopIteration):
        cpu = platform.processor()
    return {"cpu": cpu, "cores": os.cpu_count(), "python": sys.version.split()[0], "numpy": np.__version__,
            "scipy": scipy.__version__, "quimb": quimb.__version__, "mpo_fronts": mf.__version__,
            "platform": platform.platform()}


def write_json(name: str, payload: dict) -> Path:
    """Write data/benchmarks/<name>.json (with the machine description and the command line)."""
    OUT_DIR.mkdir(parents=True, exist_ok=True)
    payload = {"benchmark": name, "command": " ".join([Path(sys.executable).name] + sys.argv),
               "machine": machine(), **payload}
    path = OUT_DIR / f"{name}.json"
    tmp = path.with_suffix(".json.tmp")
    tmp.write_text(json.dumps(payload, indent=1, default=_jsonable) + "\n")
    os.replace(tmp, path)
    return path


def _jsonable(x):
    if isinstance(x, np.ndarray):
        return x.tolist()
    if isinstance(x, np.generic):
        return x.item()
    raise TypeError(type(x))


def table(rows: list[dict], cols: list[str]) -> str:
    """A plain fixed-width text table."""
    def fmt(v):
        if isinstance(v, float):
            return f"{v:.4g}"
        return str(v)
    cells = [[fmt(r.get(c, "")) for c in cols] for r in rows]
    widths = [max([len(c)] + [len(row[i]) for row in cells]) for i, c in enumerate(cols)]
    lines = ["  ".join(c.rjust(w) for c, w in zip(cols, widths)), "  ".join("-" * w for w in widths)]
    lines += ["  ".join(v.rjust(w) for v, w in zip(row, widths)) for row in cells]
    return "\n".join(lines)
