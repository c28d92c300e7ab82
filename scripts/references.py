"""Write and read the exact OTOC reference files under data/references/ (compressed .npz, one curve per file).

Usage:
    python scripts/references.py sector --W 0.5 --L 14 --seed 11 --sites 0 center \\
        --grid 0 log:0.05:2:10 lin:2.5:22:27 26 32 [--probes X Y Z] [--out-dir data/references]
    python scripts/references.py typicality --model mfi --L 16 --site center --probe Z \\
        --probe-sites 9 11 13 15 --n-states 1 --state-seed 7 --grid log:0.05:13:30 [--W 0.5 --seed 11]
    python scripts/references.py show data/references/*.npz

``sector``: random-field Heisenberg chain (xxz_chain, delta = 1, J = 1, spin units, fields uniform in [-W, W]
drawn with ``numpy.random.default_rng(seed)``), W = Z at each of ``--sites``, infinite-temperature C(r, t) at
every r for the probes X, Y, Z by exact evolution in the S^z sectors (mpo_fronts.references.sector_otocs);
one file per site. ``typicality``: the mixed-field Ising chain ((J, g, h) = (1, 1.05, 0.5), Pauli units) or the
random-field Heisenberg chain, by dynamical typicality (mpo_fronts.exact.typicality_otoc), one probe, the
given probe sites. ``--grid``: time grid as numbers and segments log:a:b:n (geometric) / lin:a:b:n (linear),
joined and sorted.

Every file records the command line, the git commit (and whether the package differed from it), the machine,
the model parameters and fields, the method, the seconds taken and a statement of its error; see
``load_reference`` (below) for the keys. One BLAS thread (override with OPENBLAS_NUM_THREADS); run it under
``nice -n 10``.
"""

from __future__ import annotations

import os

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")

import argparse  # noqa: E402
import platform  # noqa: E402
import subprocess  # noqa: E402
import sys  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
OUT_DIR = ROOT / "data" / "references"

import mpo_fronts as mf  # noqa: E402
from mpo_fronts import references as refs  # noqa: E402

SECTOR_ERROR = ("exact evolution in the S^z sectors (scipy.linalg.eigh per sector): no truncation, no Trotter "
                "error; rounding only. Agreement with dense scipy.linalg.expm evolution and with exact_otoc is "
                "checked in tests/test_references.py; rounding floor of C: see rounding_floor (the largest C at "
                "t = 0 away from the site of W, which is exactly 0 in exact arithmetic).")
TYPICALITY_ERROR = ("statistical: one Haar-random state per sample (dimension D = 2^L); per point "
                    "std(C) <= sqrt(C (2 - C) / ((D + 1) n_states)) (error_bound_<V>, evaluated at the estimate); "
                    "worst case (C = 1) expected_error = 1 / sqrt((D + 1) n_states); stderr_<V> is the measured "
                    "standard error over states (NaN for one state). Krylov tolerance of "
                    "scipy.sparse.linalg.expm_multiply (double precision) is far below.")


# ------------------------------------------------------------------------------------------------ loader
def load_reference(path) -> dict:
    """Load one reference file; keys as in :func:`mpo_fronts.references.reference_from_arrays`.

    ``times`` (n_t,), ``sites`` (n_r,), ``otoc`` {V: (n_t, n_r)}, ``stderr`` {V: ...} (typicality),
    ``samples`` {V: (n_states, n_t, n_r)} (typicality), ``weights`` (n_t, L, 4) or None, ``fields`` (L,) or
    None, ``couplings`` or None, ``meta`` (command, git_commit, model, method, w, site, probes, error, ...),
    plus ``path`` (str) and, for typicality files, ``error_bound`` {V: (n_t, n_r)}.
    """
    with np.load(path, allow_pickle=False) as z:
        arrays = {k: z[k] for k in z.files}
    out = refs.reference_from_arrays(arrays)
    out["error_bound"] = {k[len("error_bound_"):]: v for k, v in arrays.items() if k.startswith("error_bound_")}
    out["path"] = str(path)
    return out


def reference_chain(ref: dict):
    """The Chain a loaded reference was computed for (from its stored model parameters and fields)."""
    model = ref["meta"]["model"]
    p = model["params"]
    if model["kind"] == "xxz":
        return mf.xxz_chain(model["L"], J=p["J"], delta=p["delta"], fields=ref["fields"],
                            couplings=ref["couplings"])
    if model["kind"] == "mixed_field_ising":
        return mf.mixed_field_ising_chain(model["L"], J=p["J"], g=p["g"], h=p["h"])
    raise ValueError(f"unknown model kind {model['kind']!r}")


# ------------------------------------------------------------------------------------------------ helpers
def parse_grid(items) -> np.ndarray:
    """Numbers and segments log:a:b:n / lin:a:b:n, joined, rounded to 1e-12 and sorted (duplicates dropped)."""
    ts = []
    for item in items:
        if ":" in item:
            kind, a, b, n = item.split(":")
            f = {"log": np.geomspace, "lin": np.linspace}[kind]
            ts.extend(f(float(a), float(b), int(n)).tolist())
        else:
            ts.append(float(item))
    return np.unique(np.round(np.asarray(ts, dtype=float), 12))


def provenance() -> dict:
    """Command line, git commit, whether (and which of) the package files or this script differ from it, the
    machine. The working tree is shared, so a dirty flag may come from files this computation does not use."""
    def git(*args):
        try:
            return subprocess.run(["git", *args], cwd=ROOT, capture_output=True, text=True, check=False)
        except OSError:
            return None

    head = git("rev-parse", "HEAD")
    diff = git("status", "--porcelain", "--", "mpo_fronts", "scripts/references.py")
    import scipy

    return {"command": " ".join(["python", "scripts/references.py", *sys.argv[1:]]),
            "git_commit": head.stdout.strip() if head and head.returncode == 0 else None,
            "git_dirty": bool(diff.stdout.strip()) if diff and diff.returncode == 0 else None,
            "git_dirty_files": ([line[3:] for line in diff.stdout.splitlines()] if diff and diff.returncode == 0
                                else None),
            "created_utc": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
            "machine": {"platform": platform.platform(), "cores": os.cpu_count(),
                        "blas_threads": os.environ.get("OPENBLAS_NUM_THREADS"), "python": platform.python_version(),
                        "numpy": np.__version__, "scipy": scipy.__version__}}


def write(path: Path, arrays: dict) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = path.with_name(path.name + ".tmp.npz")
    np.savez_compressed(tmp, **arrays)
    os.replace(tmp, path)
    print(f"wrote {path.relative_to(ROOT) if path.is_relative_to(ROOT) else path} "
          f"({path.stat().st_size / 1024:.1f} KiB)", flush=True)


def site_tag(site: int, L: int) -> str:
    return "center" if site == L // 2 else f"site{site}"


# ------------------------------------------------------------------------------------------------ commands
def cmd_sector(a) -> None:
    times = parse_grid(a.grid)
    chain = mf.xxz_chain(a.L, J=1.0, delta=1.0, W=a.W, seed=a.seed)
    sites = [mf.evolve.check_site(int(s) if s.lstrip("-").isdigit() else s, a.L) for s in a.sites]
    prov = provenance()
    t0 = time.perf_counter()
    spec = refs.SectorSpectrum(chain)
    t_eig = time.perf_counter() - t0
    print(f"L = {a.L}, W = {a.W}, seed {a.seed}: sectors diagonalised in {t_eig:.1f} s; "
          f"{times.size} times in [{times[0]:g}, {times[-1]:g}], sites {sites}", flush=True)
    t0 = time.perf_counter()
    results = refs.sector_otocs(chain, sites, times, spectrum=spec, probes=a.probes)
    t_ev = time.perf_counter() - t0
    print(f"evolution and readout: {t_ev:.1f} s ({t_ev / times.size:.1f} s per time, all sites)", flush=True)
    for i, res in zip(sites, results):
        C = res.otoc("Z")
        away = [r for r in range(a.L) if r != i]
        floor = float(np.abs(C[0, away]).max()) if times[0] == 0 else None
        meta = dict(prov, error=SECTOR_ERROR, rounding_floor=floor,
                    seconds={"eigh": t_eig, "evolution_all_sites": t_ev, "n_sites": len(sites)},
                    disorder={"W": a.W, "seed": a.seed, "draw": "numpy.random.default_rng(seed).uniform(-W, W, L)"},
                    title=f"random-field Heisenberg chain, L = {a.L}, W = {a.W}, seed {a.seed}, W = Z at site {i}")
        arrays = refs.reference_arrays(res, chain, meta, probes=a.probes)
        name = f"heisenberg_L{a.L}_W{a.W:g}_seed{a.seed}_{site_tag(i, a.L)}.npz"
        write(Path(a.out_dir) / name, arrays)


def cmd_typicality(a) -> None:
    from mpo_fronts.exact import typicality_otoc

    times = parse_grid(a.grid)
    if a.model == "mfi":
        chain = mf.mixed_field_ising_chain(a.L, J=1.0, g=1.05, h=0.5)
        stem = f"mfi_L{a.L}"
    else:
        chain = mf.xxz_chain(a.L, J=1.0, delta=1.0, W=a.W, seed=a.seed)
        stem = f"heisenberg_L{a.L}_W{a.W:g}_seed{a.seed}"
    site = mf.evolve.check_site(int(a.site) if a.site.lstrip("-").isdigit() else a.site, a.L)
    prov = provenance()
    t0 = time.perf_counter()
    res = typicality_otoc(chain, w="Z", site=site, v=a.probe, times=times, seed=a.state_seed, n_states=a.n_states,
                          probe_sites=a.probe_sites)
    secs = time.perf_counter() - t0
    print(f"{stem}: typicality, {a.n_states} state(s), {len(res.sites)} probe sites, {times.size} times in "
          f"[{times[0]:g}, {times[-1]:g}]: {secs:.1f} s; expected_error {res.expected_error:.2e}", flush=True)
    bound = refs.typicality_error_bound(res.otoc, a.L, a.n_states)
    meta = dict(prov, error=TYPICALITY_ERROR, seconds={"typicality": secs},
                title=f"{'mixed-field Ising' if a.model == 'mfi' else 'random-field Heisenberg'} chain, L = {a.L}, "
                      f"W = Z at site {site}, probe {a.probe}, dynamical typicality")
    if a.model != "mfi":
        meta["disorder"] = {"W": a.W, "seed": a.seed, "draw": "numpy.random.default_rng(seed).uniform(-W, W, L)"}
    arrays = refs.reference_arrays(res, chain, meta)
    arrays[f"error_bound_{res.meta['v']}"] = bound
    name = f"{stem}_{site_tag(site, a.L)}_typ_{res.meta['v']}.npz"
    write(Path(a.out_dir) / name, arrays)


def cmd_show(a) -> None:
    for p in a.files:
        ref = load_reference(p)
        m = ref["meta"]
        shapes = {v: c.shape for v, c in ref["otoc"].items()}
        print(f"{p}: {m.get('title')}\n  method {m['method']}, {ref['times'].size} times in "
              f"[{ref['times'][0]:g}, {ref['times'][-1]:g}], otoc {shapes}, commit {str(m.get('git_commit'))[:10]}"
              f"{' (dirty)' if m.get('git_dirty') else ''}, seconds {m.get('seconds')}\n  command: {m['command']}")
        if m["method"] == "typicality":
            print(f"  n_states {m['n_states']}, expected_error {m['expected_error']:.2e}")


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    sub = ap.add_subparsers(dest="cmd", required=True)
    s = sub.add_parser("sector", help="random-field Heisenberg chain by S^z-sector exact evolution")
    s.add_argument("--L", type=int, default=14)
    s.add_argument("--W", type=float, required=True)
    s.add_argument("--seed", type=int, default=11)
    s.add_argument("--sites", nargs="+", default=["0", "center"])
    s.add_argument("--grid", nargs="+", required=True)
    s.add_argument("--probes", nargs="+", default=["X", "Y", "Z"])
    s.add_argument("--out-dir", default=str(OUT_DIR))
    s.set_defaults(fn=cmd_sector)
    t = sub.add_parser("typicality", help="mixed-field Ising or Heisenberg chain by dynamical typicality")
    t.add_argument("--model", choices=["mfi", "heisenberg"], required=True)
    t.add_argument("--L", type=int, required=True)
    t.add_argument("--W", type=float, default=0.5)
    t.add_argument("--seed", type=int, default=11, help="disorder seed (heisenberg)")
    t.add_argument("--site", default="center")
    t.add_argument("--probe", default="Z")
    t.add_argument("--probe-sites", type=int, nargs="+", default=None)
    t.add_argument("--n-states", type=int, default=1)
    t.add_argument("--state-seed", type=int, default=7)
    t.add_argument("--grid", nargs="+", required=True)
    t.add_argument("--out-dir", default=str(OUT_DIR))
    t.set_defaults(fn=cmd_typicality)
    w = sub.add_parser("show", help="print what reference files contain")
    w.add_argument("files", nargs="+")
    w.set_defaults(fn=cmd_show)
    a = ap.parse_args(argv)
    a.fn(a)


if __name__ == "__main__":
    main()
