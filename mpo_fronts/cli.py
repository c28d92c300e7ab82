"""The ``fronts`` command line: a thin layer that parses options and calls config, ensemble, store, analysis.

Commands: ``run``, ``status``, ``merge``, ``check``, ``converge``, ``summary``, ``plot``, ``demo``
(``fronts COMMAND --help`` explains each option with its default). User errors (a bad description, option or
directory) print a one-paragraph message and exit with code 2, without a traceback, before anything is
written; a check that fails its tolerance exits with 1.
"""

from __future__ import annotations

import argparse
import json
import sys
import textwrap
from pathlib import Path
from typing import Sequence

from .errors import FrontsError, InputError, UserError, require
from .stopping import RunStopped

__all__ = ["main", "build_parser"]

EXIT_USER_ERROR = 2
_DEMOS = ("thermal", "localized")


# ------------------------------------------------------------------------------------------- option types
class _Parser(argparse.ArgumentParser):
    """argparse with one-paragraph errors and exit code 2."""

    def error(self, message: str):  # pragma: no cover - exercised through subprocess tests
        self.exit(EXIT_USER_ERROR, f"{self.prog}: error: {message} (see '{self.prog} --help')\n")


def _positive_int(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        v = 0
    if v < 1:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}")
    return v


def _positive_float(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        v = -1.0
    if not v > 0 or v != v or v == float("inf"):
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}")
    return v


def _shard(text: str):
    from .ensemble import parse_shard

    try:
        return parse_shard(text)
    except InputError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None


def _dask(text: str) -> str:
    from .ensemble import parse_dask

    try:
        parse_dask(text)
    except InputError as exc:
        raise argparse.ArgumentTypeError(str(exc)) from None
    return text


def _chi_list(text: str) -> list[int]:
    try:
        vals = [int(x) for x in text.split(",") if x.strip()]
    except ValueError:
        vals = []
    if len(vals) < 2 or min(vals) < 1 or len(set(vals)) != len(vals):
        raise argparse.ArgumentTypeError(f"expected at least two distinct positive bond dimensions separated by "
                                         f"commas (for example 16,32,64), got {text!r}")
    return sorted(vals)


def _probe(text: str) -> str:
    if text.upper() not in ("X", "Y", "Z"):
        raise argparse.ArgumentTypeError(f"expected X, Y or Z, got {text!r}")
    return text.upper()


def _threshold(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        v = -1.0
    if not 0 < v < 2:
        raise argparse.ArgumentTypeError(f"expected a number in (0, 2) (C lies in [0, 2]), got {text!r}")
    return v


def _realization_list(text: str) -> list[int]:
    out: list[int] = []
    try:
        for part in text.split(","):
            if "-" in part:
                a, b = part.split("-")
                out += list(range(int(a), int(b) + 1))
            elif part.strip():
                out.append(int(part))
    except ValueError:
        out = []
    if not out or min(out) < 0:
        raise argparse.ArgumentTypeError(f"expected realization indices like 0,3,5-9, got {text!r}")
    return sorted(set(out))


# ------------------------------------------------------------------------------------------- parser
def _add_executor_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--workers", type=_positive_int, default=1, metavar="N",
                   help="local worker processes, one BLAS thread each (default: 1, serial in this process)")
    p.add_argument("--dask", type=_dask, default=None, metavar="SPEC",
                   help="run on Dask instead: local:N starts a LocalCluster of N worker processes; "
                        "tcp://HOST:PORT uses a running scheduler whose workers see the output directory at "
                        "the same path (default: not used)")
    p.add_argument("--progress", choices=("auto", "bar", "log", "none"), default="auto",
                   help="progress display: a bar over realizations and evolution time on a terminal, plain "
                        "log lines otherwise (default: auto)")
    p.add_argument("--log-interval", type=_positive_float, default=30.0, metavar="S",
                   help="seconds between progress log lines when not on a terminal (default: 30)")


def build_parser() -> argparse.ArgumentParser:
    """The ``fronts`` argument parser (every option documented with its default)."""
    parser = _Parser(prog="fronts", description="OTOC light cones in 1D spin chains by Heisenberg-picture MPO "
                     "TEBD: production runs, checks, summaries and figures.",
                     epilog="Start with 'fronts demo'. Every command has --help.")
    from .conventions import __version__

    parser.add_argument("--version", action="version", version=f"mpo_fronts {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    p = sub.add_parser("run", help="compute the realizations of a run description into a run directory",
                       description="Compute the missing realizations of RUN.toml into DIR. Rerunning the same "
                       "command continues where it stopped (finished realizations are kept; long ones resume "
                       "from their checkpoint). A different description is refused for an existing DIR.")
    p.add_argument("description", metavar="RUN.toml", help="the run description (see data/production_example.toml)")
    p.add_argument("--out", "-o", required=True, metavar="DIR", help="run directory (created if missing; required)")
    _add_executor_options(p)
    p.add_argument("--shard", type=_shard, default=None, metavar="K/N",
                   help="compute only realizations K, K+N, K+2N, ... (K counts from 0; for cluster job arrays "
                        "writing into one shared DIR) (default: all)")
    p.add_argument("--realizations", type=_realization_list, default=None, metavar="LIST",
                   help="compute only these realization indices, for example 0,3,5-9 (default: all)")
    p.add_argument("--checkpoint-interval", type=_positive_float, default=None, metavar="S",
                   help="seconds between checkpoints of a running realization (default: run.checkpoint_interval "
                        "of the description, 300)")
    p.add_argument("--no-checkpoints", action="store_true",
                   help="do not write checkpoints (default: write them, unless run.checkpoints = false)")
    p.add_argument("--wait", action="store_true",
                   help="also wait for realizations held by another live run on the same DIR, and take them "
                        "over if that run dies (default: leave them to it)")

    p = sub.add_parser("status", help="what is done, running and missing in a run directory",
                       description="Realizations done, running (with their evolution time), checkpointed, "
                       "missing; total wall time; largest discarded weight and bond dimension.")
    p.add_argument("directory", metavar="DIR", help="run directory")
    p.add_argument("--json", action="store_true", help="print JSON instead of a table (default: table)")

    p = sub.add_parser("merge", help="merge run directories into one HDF5 file",
                       description="Write every finished realization of one or more run directories (or merged "
                       "files) of the same description into one HDF5 file, readable by mpo_fronts.load.")
    p.add_argument("sources", nargs="+", metavar="DIR", help="run directories or merged files (same description)")
    p.add_argument("--output", "-o", required=True, metavar="FILE.h5", help="the merged file (required)")
    p.add_argument("--force", action="store_true", help="overwrite an existing FILE.h5 (default: refuse)")

    p = sub.add_parser("check", help="compare the engine with exact evolution at a small L",
                       description="Run the description at a small chain length with dense exact evolution "
                       "beside the engine, on identical disorder (the first L fields and bits of each "
                       "realization; W keeps its relative position), and print the largest deviation of C. "
                       "Exit code 1 if it exceeds --tol.")
    p.add_argument("description", metavar="RUN.toml", help="the run description")
    p.add_argument("--L", type=_positive_int, default=10, help="chain length of the check, 2..12 (default: 10)")
    p.add_argument("--realizations", type=_positive_int, default=2, metavar="N",
                   help="realizations compared (default: 2)")
    p.add_argument("--tol", type=_positive_float, default=1e-2,
                   help="largest acceptable |C_engine - C_exact| (default: 0.01)")
    p.add_argument("--json", action="store_true", help="print JSON (default: text)")
    p.add_argument("--eigenstates", default=None, metavar="FILE.h5",
                   help="also compute the eigenstate-resolved OTOC C_n(r, t) = 1 - Re <n|W(t) V_r W(t) V_r|n> of "
                        "every eigenstate at this L, write it to FILE.h5 and print it by energy density beside "
                        "the infinite-temperature average (default: not computed)")
    p.add_argument("--probe", type=_probe, default=None,
                   help="probe V of the eigenstate-resolved OTOC (default: Z if stored, else the first of "
                        "operators.v)")

    p = sub.add_parser("converge", help="run a description at several bond dimensions and compare",
                       description="Run the description at each bond dimension into DIR/chi_016, DIR/chi_032, ... "
                       "(same seeds, identical disorder), then store the bond-dimension convergence arrays "
                       "(largest change of C between successive chi, trusted map) in DIR/convergence.h5. "
                       "mpo_fronts.load(DIR) loads the largest chi with .convergence attached.")
    p.add_argument("description", metavar="RUN.toml", help="the run description")
    p.add_argument("--chi", type=_chi_list, required=True, metavar="LIST",
                   help="bond dimensions, comma separated, for example 16,32,64,128 (required)")
    p.add_argument("--out", "-o", required=True, metavar="DIR", help="study directory (required)")
    p.add_argument("--dt", type=_positive_float, default=None,
                   help="Trotter step for every chi (default: engine.dt of the description)")
    p.add_argument("--probe", type=_probe, default=None,
                   help="probe V whose C is compared (default: Z if stored, else the first of operators.v)")
    p.add_argument("--tol", type=_positive_float, default=1e-6,
                   help="absolute part of the tolerance: a point (t, r) counts as trusted when C changed by less "
                        "than TOL + REL_TOL * C between the two largest chi (default: 1e-06)")
    p.add_argument("--rel-tol", type=float, default=0.05, metavar="REL_TOL",
                   help="relative part of the tolerance, 0..1 (default: 0.05); crossing times are trusted by "
                        "their own change, see 'fronts summary'")
    _add_executor_options(p)

    p = sub.add_parser("summary", help="light-cone velocities, fits and error information of a run",
                       description="Summarize a finished run (directory or merged file): butterfly velocity and "
                       "logarithmic light cone fits with intervals, crossings, front width, distributions, "
                       "trust, discarded weight.")
    p.add_argument("directory", metavar="DIR", help="run directory, merged file or convergence study")
    p.add_argument("--threshold", type=_threshold, default=0.5, metavar="THETA",
                   help="threshold theta of C in [0, 2] defining the light cone (default: 0.5)")
    p.add_argument("--probe", type=_probe, default=None,
                   help="probe V (default: Z if stored, else the first of operators.v)")
    p.add_argument("--json", action="store_true", help="print JSON (default: a table)")
    p.add_argument("--trotter", default=None, metavar="DIR2",
                   help="the same description run at a second evolution.dt: its difference estimates the Trotter "
                        "error of each crossing time (Richardson), added to the error bars (default: none, the "
                        "summary says the Trotter error is not included)")

    p = sub.add_parser("plot", help="write the figures of a run",
                       description="Write the figures of a finished run (heat map, distribution, light cone, "
                       "convergence, front, growth, bond entropy, discarded weight per bond) as files into FIGDIR.")
    p.add_argument("directory", metavar="DIR", help="run directory, merged file or convergence study")
    p.add_argument("--out", "-o", required=True, metavar="FIGDIR", help="folder for the figures (required)")
    p.add_argument("--only", default=None, metavar="NAME",
                   help="only this figure, or several separated by commas (default: all that apply)")
    p.add_argument("--threshold", type=_threshold, default=0.5, metavar="THETA",
                   help="threshold theta of C for contours and crossing times (default: 0.5)")
    p.add_argument("--probe", type=_probe, default=None,
                   help="probe V (default: Z if stored, else the first of operators.v)")
    p.add_argument("--color-scale", choices=("linear", "log"), default="linear",
                   help="colour scale of the heat map; log shows fronts at C ~ 1e-3..0.1 (default: linear)")

    p = sub.add_parser("demo", help="run the two demo ensembles, summarize them and draw their figures",
                       description="Run the built-in demo_thermal.toml (W = 0.5) and demo_localized.toml (W = 5), "
                       "XXZ chains of L = 32 with invented demo parameters, then write summaries and figures. "
                       "Rerunning reuses what is done.")
    p.add_argument("--out", "-o", default="fronts_demo", metavar="DIR",
                   help="folder for runs, summaries and figures (default: fronts_demo)")
    p.add_argument("--workers", type=_positive_int, default=2, metavar="N",
                   help="local worker processes (default: 2)")
    p.add_argument("--progress", choices=("auto", "bar", "log", "none"), default="auto",
                   help="progress display (default: auto)")
    p.add_argument("--data", default=None, metavar="FOLDER",
                   help="folder holding demo_thermal.toml and demo_localized.toml (default: the ones installed "
                        "with the package, mpo_fronts/demo)")
    return parser


# ------------------------------------------------------------------------------------------- commands
def _say(*lines: str) -> None:
    for line in lines:
        print(line)


def _fmt_s(seconds: float) -> str:
    s = int(round(seconds))
    return f"{s // 3600}h{s // 60 % 60:02d}m{s % 60:02d}s" if s >= 3600 else f"{s // 60}m{s % 60:02d}s"


def _check_output(path, option: str) -> None:
    """Refuse, before any work, an output path that cannot be created: the first existing folder above it must
    be a folder this process can write in (missing folders below it are created when needed)."""
    import os

    p = Path(path).absolute()
    probe = p
    while not probe.exists() and probe.parent != probe:
        probe = probe.parent
    if probe == p and p.is_dir():
        probe_dir = p
    elif probe != p and not probe.is_dir():
        raise InputError(f"{option} {path}: cannot be created, {probe} is a file, not a folder; choose another "
                         f"{option}")
    else:
        probe_dir = probe if probe.is_dir() else probe.parent
    if not os.access(probe_dir, os.W_OK | os.X_OK):
        raise InputError(f"{option} {path}: no permission to write in {probe_dir}; choose another {option}")


def _cmd_run(args) -> int:
    from .config import read_description
    from .ensemble import run_ensemble

    desc = read_description(args.description)
    _check_output(args.out, "--out")
    changes = {}
    if args.checkpoint_interval is not None:
        changes["run__checkpoint_interval"] = args.checkpoint_interval
    if args.no_checkpoints:
        changes["run__checkpoints"] = False
    if changes:
        desc = desc.replace(**changes)
    if args.dask is not None and args.workers > 1:
        raise InputError("give either --workers N (local processes) or --dask SPEC (Dask), not both")
    rep = run_ensemble(desc, args.out, workers=args.workers, dask=args.dask, shard=args.shard,
                       realizations=args.realizations, wait=args.wait, progress=args.progress,
                       log_interval=args.log_interval, exit_on_second_signal=True)
    _say(f"run directory: {rep.path}",
         f"computed now: {len(rep.computed)}; already done: {len(rep.existing)}; selected: {len(rep.selected)}"
         f"; elapsed {_fmt_s(rep.elapsed)}")
    if rep.resumed:
        _say("resumed from checkpoints: " + ", ".join(f"r{k} (t={t:g})" for k, t in sorted(rep.resumed.items())))
    if rep.busy:
        _say(f"held by another live run ({len(rep.busy)}): " + ", ".join(
            f"r{k} ({o['host']} pid {o['pid']})" for k, o in sorted(rep.busy.items())[:10])
            + "; see 'fronts status', or rerun with --wait")
    if rep.computed:
        from .store import run_status

        _discarded_warning(run_status(args.out).largest_discarded_weight)
    _say(f"next: fronts status {args.out}; fronts merge {args.out} -o merged.h5; "
         f"python -c \"import mpo_fronts as mf; ens = mf.load('{args.out}')\"")
    return 0


def _cmd_status(args) -> int:
    from .store import RUN_FILE, convergence_runs

    runs = convergence_runs(args.directory) if not (Path(args.directory) / RUN_FILE).is_file() else {}
    if runs:  # a convergence study: one status per bond dimension
        for chi, path in runs.items():
            if not args.json:
                print(f"chi = {chi}:")
            _status_one(path, args.json)
        return 0
    return _status_one(args.directory, args.json)


def _status_one(directory, as_json: bool) -> int:
    from .store import run_status

    st = run_status(directory)
    if as_json:
        print(json.dumps(st.to_dict(), indent=1))
        return 0
    d = st.description
    ev = d.get("evolution", d.get("engine"))  # [engine] before 0.2
    n_done = len(st.done)

    def ks(items, limit=12):
        items = list(items)
        return ", ".join(f"r{k}" for k in items[:limit]) + (" ..." if len(items) > limit else "")

    try:
        from .config import parse_description

        site = parse_description(d).site
    except Exception:  # noqa: BLE001 - a description of another version: show what is stored
        site = d["operators"]["site"]
    m = d["model"]
    disorder = f", disorder W = {m['W']:g}" if isinstance(m.get("W"), (int, float)) else ""
    _say(f"run directory: {st.path}",
         f"  {m['kind']} L={m['L']}{disorder}; operator {d['operators']['w']} at site {site}"
         + (f" ({d['operators']['site']})" if str(d["operators"]["site"]) != str(site) else "")
         + f"; chi={ev['chi']}, dt={ev['dt']}, order {ev['order']}, "
         f"{len(d['times']['values'])} times up to t={d['times']['values'][-1]:g}",
         f"  done:         {n_done} of {st.n_realizations}"
         + (f" (wall time {_fmt_s(st.wall_time)} total, {_fmt_s(st.wall_time / n_done)} per realization)"
            if n_done else ""),
         f"  running:      {len(st.running)}" + ("  " + ", ".join(
             f"r{e['k']} t={e['t']:.3g}/{e['t_final']:g} ({e['host']} pid {e['pid']})" for e in st.running[:8])
             if st.running else ""),
         f"  checkpointed: {len(st.checkpointed)}" + ("  " + ", ".join(
             f"r{k} t={t:.3g}" for k, t in sorted(st.checkpointed.items())[:8]) if st.checkpointed else ""),
         f"  stale claims: {len(st.stale)}" + (f"  {ks(e['k'] for e in st.stale)} (owner gone; a rerun "
                                              "takes them over)" if st.stale else ""),
         f"  missing:      {len(st.missing)}" + (f"  {ks(st.missing)}" if st.missing else ""),
         f"  largest discarded weight: {st.largest_discarded_weight:.3g}; largest bond dimension: "
         f"{st.largest_bond}"
         if n_done else "  (no finished realization yet)")
    if n_done:
        _discarded_warning(st.largest_discarded_weight)
    return 0


def _discarded_warning(dw: float) -> None:
    """A loud line when a run lost more than LARGE_DISCARDED_WEIGHT of W's Frobenius weight."""
    from .errors import LARGE_DISCARDED_WEIGHT

    if dw is not None and float(dw) > LARGE_DISCARDED_WEIGHT:
        _say(_paragraph(f"WARNING: a realization lost {float(dw):.3g} of W's Frobenius weight to truncation "
                        f"(more than {LARGE_DISCARDED_WEIGHT:g}); C is normalised by the weight that remains, so "
                        "values behind the front are not meaningful there. Raise evolution.chi, or trust only the "
                        "front and ahead of it after a bond-dimension comparison (fronts converge)."))


def _cmd_merge(args) -> int:
    from .store import merge

    _check_output(args.output, "--output")
    path, ens = merge(args.sources, args.output, overwrite=args.force)
    _say(f"merged {len(ens)} realization(s) into {path}")
    if ens.missing:
        _say(f"note: {len(ens.missing)} realization(s) of the description are not finished yet: "
             + ", ".join(f"r{k}" for k in ens.missing[:12]) + (" ..." if len(ens.missing) > 12 else ""))
    return 0


def _cmd_check(args) -> int:
    from .config import read_description
    from .workflows import check_against_exact

    from .exact import MAX_DENSE_L

    desc = read_description(args.description)
    if args.L > MAX_DENSE_L:
        raise InputError(f"--L = {args.L}: the exact check uses dense evolution (memory and time grow as 4^L), "
                         f"so --L must be at most {MAX_DENSE_L}; for larger chains compare with "
                         "mpo_fronts.typicality_otoc (sparse, L up to about 24)")
    if args.L > desc.L:
        raise InputError(f"--L = {args.L} exceeds model.L = {desc.L}: the check runs the description's model "
                         f"on a shorter chain; give --L between 2 and {min(desc.L, MAX_DENSE_L)}")
    if args.eigenstates is not None:
        _check_output(args.eigenstates, "--eigenstates")
    res = check_against_exact(desc, L=args.L, realizations=args.realizations,
                              progress=None if args.json else (lambda msg: print("  " + msg, flush=True)))
    ok = res.max_deviation <= args.tol
    eig = None
    if args.eigenstates is not None:
        from .workflows import eigenstate_study

        eig = eigenstate_study(desc, L=args.L, realizations=args.realizations, probe=args.probe,
                               out=args.eigenstates)
    if args.json:
        extra = {}
        if eig is not None:
            extra["eigenstates"] = {k: (v.tolist() if hasattr(v, "tolist") else v) for k, v in eig.items()}
        print(json.dumps({**res.to_dict(), "tol": args.tol, "ok": ok, **extra}, indent=1, allow_nan=False,
                         default=str).replace("NaN", "null"))
    else:
        w = res.where
        e = res.evolution
        _say(f"check at L = {res.L} (W at site {res.site}), chi={e['chi']}, dt={e['dt']}, order {e['order']}, "
             f"cutoff {e['cutoff']:g}, {len(res.per_realization)} realization(s) against dense exact evolution",
             f"largest |C_engine - C_exact| = {res.max_deviation:.3g} (realization {w['realization']}, probe "
             f"{w['probe']}, t = {w['t']:g}, r = {w['r']}); tolerance {args.tol:g}: {'OK' if ok else 'EXCEEDED'}",
             _exceeded_line(res, args.tol),
             "largest discarded weight: "
             f"{max(p['discarded_weight'] for p in res.per_realization):.3g} (a deviation with no discarded "
             "weight is Trotter error: lower evolution.dt or use evolution.order = 4)")
        if eig is not None:
            _say(*_eigenstate_lines(eig))
    return 0 if ok else 1


def _eigenstate_lines(eig: dict) -> list[str]:
    """The eigenstate-resolved OTOC at the last time, by energy density, beside the infinite-temperature mean."""
    import numpy as np

    ds = [d for d in eig["distances"] if d >= 1][:8]
    head = "  energy density      states " + "".join(f"{f'd={d}':>10}" for d in ds)
    lines = [f"eigenstate-resolved OTOC, probe {eig['probe']}, at t = {eig['times'][-1]:g} (L = {eig['L']}, W at "
             f"site {eig['site']}, {len(eig['realizations'])} realization(s)); written to {eig['path']}", head]
    edges = eig["bins"]
    for b in range(len(edges) - 1):
        row = eig["by_energy"][b, -1]
        lines.append(f"  [{edges[b]:.1f}, {edges[b + 1]:.1f}]{'':8}{eig['counts'][b]:>8} "
                     + "".join(f"{row[d]:>10.4f}" if np.isfinite(row[d]) else f"{'-':>10}" for d in ds))
    inf = eig["infinite_temperature"][-1]
    lines.append(f"  all (infinite T){'':3}{sum(eig['counts']):>8} " + "".join(f"{inf[d]:>10.4f}" for d in ds))
    sp = eig["spread"][-1]
    lines.append(f"  spread over states{'':10}" + "".join(f"{sp[d]:>10.4f}" for d in ds))
    return lines


def _exceeded_line(res, tol: float) -> str:
    over = [t for t, d in zip(res.times, res.deviation_by_time) if d > tol]
    if not over:
        return f"every time point is within the tolerance (t up to {res.times[-1]:g})"
    ok = [t for t, d in zip(res.times, res.deviation_by_time) if t < over[0]]
    return (f"within the tolerance up to t = {ok[-1]:g}; exceeded from t = {over[0]:g} on" if ok
            else f"exceeded already at the first time t = {over[0]:g}")


def _cmd_converge(args) -> int:
    from .config import read_description
    from .workflows import converge

    desc = read_description(args.description)
    _check_output(args.out, "--out")
    if args.dask is not None and args.workers > 1:
        raise InputError("give either --workers N (local processes) or --dask SPEC (Dask), not both")
    _need_analysis("bond_convergence", "trust")
    conv = converge(desc, args.chi, args.out, dt=args.dt, probe=args.probe, tol=args.tol, rel_tol=args.rel_tol,
                    workers=args.workers,
                    dask=args.dask, progress=args.progress, log_interval=args.log_interval, exit_on_second_signal=True)
    import numpy as np

    trusted = np.asarray(conv.get("trusted"))
    _say(f"convergence study in {args.out}: chi = {', '.join(str(c) for c in args.chi)}, probe "
         f"{conv.get('probe')}, tolerance {args.tol:g} + {args.rel_tol:g} C")
    if "max_dC" in conv:
        md = np.asarray(conv["max_dC"])
        for i in range(md.shape[0]):
            _say(f"  chi {args.chi[i]} -> {args.chi[i + 1]}: largest change of C {np.nanmax(md[i]):.3g}")
    if trusted.size > 1:
        _say(f"  trusted (t, r) points at chi = {args.chi[-1]}: {100 * trusted.mean():.1f}%")
    _say(f"load it with mpo_fronts.load('{args.out}') (largest chi, with .convergence)")
    return 0


def _need_analysis(name: str, module: str = "analysis"):
    import importlib

    try:
        mod = importlib.import_module(f"mpo_fronts.{module}")
        return getattr(mod, name)
    except (ImportError, AttributeError):
        raise UserError(f"this installation of mpo_fronts has no mpo_fronts.{module}.{name}; update the "
                        "package") from None


def _default_probe(ens, probe):
    from .conventions import default_probe

    return probe if probe is not None else default_probe(ens.probes)


def _load(path):
    from .store import load

    ens = load(path)
    if len(ens) == 0:
        raise UserError(f"{path}: no finished realization yet; run 'fronts run' first (or see 'fronts status')")
    return ens


def _summary_text(summary: dict) -> str:
    return _need_analysis("format_summary", "report")(summary)


def _cmd_summary(args) -> int:
    summarize = _need_analysis("summarize", "report")
    ens = _load(args.directory)
    probe = _default_probe(ens, args.probe)
    trotter = _trotter_estimate(ens, args.trotter, probe) if args.trotter else None
    s = summarize(ens, threshold=args.threshold, probe=probe, trotter=trotter)
    print(json.dumps(s, indent=1) if args.json else _summary_text(s))
    return 0


def _trotter_estimate(ens, other_path, probe: str) -> dict:
    """trust.trotter_convergence of a run against the same run at a second time step (another directory)."""
    import numpy as np

    from .trust import trotter_convergence

    other = _load(other_path)
    a, b = dict(ens.description), dict(other.description)
    ea, eb = dict(a.get("evolution", a.get("engine", {}))), dict(b.get("evolution", b.get("engine", {})))
    ev, ev_other = ens.evolution, other.evolution
    if ev.get("dt_used", ev.get("dt")) == ev_other.get("dt_used", ev_other.get("dt")):
        raise InputError(f"--trotter {other_path}: it ran at the same time step as {ens.path}; give a run of the "
                         "same description at a different evolution.dt (for example half of it)")
    for x in (ea, eb):
        for key in ("dt", "trotter_tol", "chunk"):
            x.pop(key, None)
    same = {k: v for k, v in a.items() if k not in ("evolution", "engine", "run", "ensemble")} == \
        {k: v for k, v in b.items() if k not in ("evolution", "engine", "run", "ensemble")} and ea == eb
    if not same:
        raise InputError(f"--trotter {other_path}: not the same description as {ens.path} apart from "
                         "evolution.dt; run the same description with only dt changed")
    common = np.intersect1d(ens.realizations, other.realizations)
    if common.size == 0:
        raise InputError(f"--trotter {other_path}: no realization in common with {ens.path}")
    ia = np.searchsorted(ens.realizations, common)
    ib = np.searchsorted(other.realizations, common)
    from .analysis import probe_otoc

    return trotter_convergence(probe_otoc(ens, probe)[ia], probe_otoc(other, probe)[ib],
                               float(ev.get("dt_used", ev["dt"])),
                               float(ev_other.get("dt_used", ev_other["dt"])), int(ev["order"]))


def _cmd_plot(args) -> int:
    write_figures = _need_analysis("write_figures", "plots")
    ens = _load(args.directory)
    _check_output(args.out, "--out")
    only = args.only.split(",") if args.only and "," in args.only else args.only
    paths = write_figures(ens, args.out, only=only, threshold=args.threshold, probe=_default_probe(ens, args.probe),
                          color_scale=args.color_scale)
    _say(f"wrote {len(paths)} file(s) to {args.out}:", *(f"  {p}" for p in paths))
    return 0


def demo_folder() -> Path:
    """Where the demo descriptions are installed (package data, mpo_fronts/demo)."""
    from importlib.resources import files

    return Path(str(files("mpo_fronts") / "demo"))


def _demo_data(folder) -> Path:
    p = Path(folder) if folder is not None else demo_folder()
    missing = [n for n in _DEMOS if not (p / f"demo_{n}.toml").is_file()]
    if missing:
        raise UserError(f"cannot find {', '.join(f'demo_{n}.toml' for n in missing)} in {p}; reinstall "
                        "mpo_fronts (they ship with the package) or pass --data FOLDER")
    return p


# The demo: each scenario is a small bond-dimension convergence study, so that its summary and figures can use
# a real trust map. Thresholds: the localized chain stays far below saturation for t <= 100, so its light cone
# is read on a low contour (a user choice, stated in the summary).
_DEMO_CHIS = (8, 16)
_DEMO_TOL = 0.02
_DEMO_THRESHOLDS = {"thermal": 0.5, "localized": 0.05}


def _cmd_demo(args) -> int:
    from .config import read_description
    from .workflows import converge
    from .store import RunDirectory

    data = _demo_data(args.data)
    summarize = _need_analysis("summarize", "report")
    write_figures = _need_analysis("write_figures", "plots")
    require("matplotlib", "plot")  # the figures come last: fail before any work, not after it
    out = Path(args.out)
    _check_output(out, "--out")
    descs = {n: read_description(data / f"demo_{n}.toml") for n in _DEMOS}
    for n, d in descs.items():  # validate every target before any work
        for chi in _DEMO_CHIS:
            RunDirectory.check_target(out / "runs" / n / f"chi_{chi:03d}", d.replace(engine__chi=chi))
    written: list[str] = []
    for n, d in descs.items():
        _say(f"[demo] {n}: {d.realizations} realizations of the XXZ chain, L = {d.L}, W = "
             f"{d['model'].get('W')}, t up to {d.times[-1]:g}, chi = {', '.join(map(str, _DEMO_CHIS))} "
             "(invented demo parameters)")
        converge(d, _DEMO_CHIS, out / "runs" / n, tol=_DEMO_TOL, workers=args.workers, progress=args.progress,
                 exit_on_second_signal=True)
    for n in _DEMOS:
        ens = _load(out / "runs" / n)
        theta = _DEMO_THRESHOLDS[n]
        probe = _default_probe(ens, None)  # the probe of the convergence study, so that its trust map applies
        s = summarize(ens, threshold=theta, probe=probe)
        (out / "summary").mkdir(parents=True, exist_ok=True)
        (out / "summary" / f"{n}.json").write_text(json.dumps(s, indent=1) + "\n")
        text = _summary_text(s)
        (out / "summary" / f"{n}.txt").write_text(text + "\n")
        _say("", f"[demo] summary of {n} (threshold {theta:g}):", text)
        paths = write_figures(ens, out / "figures" / n, threshold=theta, probe=probe)
        written += [str(p) for p in paths]
    _say("", f"[demo] everything is in {out}:",
         f"  runs:      {out / 'runs' / 'thermal'}, {out / 'runs' / 'localized'} (convergence studies at chi = "
         f"{', '.join(map(str, _DEMO_CHIS))}; load with mpo_fronts.load)",
         f"  summaries: {out / 'summary'} (*.txt, *.json)",
         f"  figures:   {out / 'figures'} ({len(written)} files)",
         "  demo parameters are invented and the bond dimensions small: the trust map (tol "
         f"{_DEMO_TOL:g} on |dC| between chi = {_DEMO_CHIS[0]} and {_DEMO_CHIS[1]}) says which points count")
    return 0


_COMMANDS = {"run": _cmd_run, "status": _cmd_status, "merge": _cmd_merge, "check": _cmd_check,
             "converge": _cmd_converge, "summary": _cmd_summary, "plot": _cmd_plot, "demo": _cmd_demo}


def _paragraph(message: str) -> str:
    return textwrap.fill(" ".join(str(message).split()), width=100, subsequent_indent="  ")


#: Library argument names (InputError.arg) -> the command-line option that sets them, for error messages.
_FLAGS = {"L": "--L", "realizations": "--realizations", "chis": "--chi", "probe": "--probe", "shard": "--shard",
          "dask": "--dask", "workers": "--workers", "overwrite": "--force", "tol": "--tol", "rel_tol": "--rel-tol",
          "dt": "--dt",
          "threshold": "--threshold", "only": "--only", "out": "--out"}


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the ``fronts`` console script; returns the exit code."""
    parser = build_parser()
    args = parser.parse_args(argv)
    try:
        return _COMMANDS[args.command](args)
    except RunStopped as exc:
        print(_paragraph(f"fronts {args.command}: {exc}"), file=sys.stderr)
        return exc.exit_code
    except UserError as exc:
        flag = _FLAGS.get(getattr(exc, "arg", None) or "")
        where = f" (command-line option {flag})" if flag else ""
        print(_paragraph(f"fronts {args.command}: error: {exc}{where}"), file=sys.stderr)
        return EXIT_USER_ERROR
    except FrontsError as exc:
        print(_paragraph(f"fronts {args.command}: {exc}"), file=sys.stderr)
        return 1
    except OSError as exc:  # a file system refusal the checks above did not foresee: one line, no traceback
        if isinstance(exc, BrokenPipeError):  # output piped into head & co.
            import os

            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
            return 0
        what = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        print(_paragraph(f"fronts {args.command}: error: {exc.strerror or exc}{what}"), file=sys.stderr)
        return EXIT_USER_ERROR
    except KeyboardInterrupt:
        print(f"fronts {args.command}: interrupted; finished realizations and checkpoints are kept, run the same "
              "command again to continue", file=sys.stderr)
        return 130


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
