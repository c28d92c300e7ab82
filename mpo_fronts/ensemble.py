"""Realizations, seeds, executors (serial, local processes, Dask), shards, checks and convergence studies.

One realization is computed by :func:`compute_realization`: claim it in the run directory, rebuild its chain
from the description (:meth:`mpo_fronts.config.RunDescription.realization`; the seed scheme makes it
independent of where and when it runs), resume from its checkpoint if there is one, evolve W(t) through
:func:`mpo_fronts.driver.evolve` (with the engine that ``evolution.symmetry`` selects,
:class:`mpo_fronts.evolve.OperatorTEBD` or :class:`mpo_fronts.u1.ChargeTEBD`), read out every requested time,
write the result atomically, release the claim. Every executor runs exactly this function, with one BLAS thread
per process, so serial runs, local processes, Dask workers and shards give identical arrays. The run directory,
not the scheduler, is the record of what is done: rerunning computes only what is missing.

Executors
---------
* serial (``workers=1``): in this process.
* local processes (``workers=N``): a ``spawn`` process pool; ``OMP_NUM_THREADS`` and friends are set to 1
  before the children start, and ``threadpoolctl`` limits BLAS to one thread in each child.
* Dask (``dask="local:N"`` for a ``distributed.LocalCluster`` of N single-threaded worker processes, or
  ``dask="tcp://host:port"`` for a running scheduler). Tasks are submitted with ``pure=False`` (never
  deduplicated) and ``retries``; a task whose worker died is rescheduled by Dask and takes over the claim of
  its dead predecessor (same run id), continuing from the last checkpoint. Workers must see the run directory
  at the same path (a shared file system).
"""

from __future__ import annotations

import contextlib
import math
import os
import sys
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from .config import Realization, RunDescription, parse_description
from .driver import Observer
from .errors import FrontsError, InputError, UserError, require
from .settings import EvolutionSettings
from . import stopping
from .store import ClaimInfo, RunDirectory

__all__ = ["run_ensemble", "compute_realization", "evolve_realization", "shard_indices", "parse_shard",
           "parse_dask", "RunReport", "WorkerDied"]

_BLAS_VARS = ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS", "BLIS_NUM_THREADS",
              "VECLIB_MAXIMUM_THREADS", "NUMEXPR_NUM_THREADS")
_THREAD_LIMIT = None


class WorkerDied(FrontsError, RuntimeError):
    """A worker process died; finished realizations are kept and a rerun continues the rest."""


# ------------------------------------------------------------------------------------------- small parsers
def parse_shard(text: str) -> tuple[int, int]:
    """``"K/N"`` -> (K, N) with 0 <= K < N: realizations K, K+N, K+2N, ..."""
    try:
        k_s, n_s = str(text).split("/")
        k, n = int(k_s), int(n_s)
    except ValueError:
        raise InputError(f"shard must look like K/N (for example 0/4), got {text!r}", arg="shard") from None
    if n < 1 or not 0 <= k < n:
        raise InputError(f"shard K/N needs N >= 1 and 0 <= K < N (K counts from 0), got {text!r}", arg="shard")
    return k, n


def shard_indices(n_realizations: int, shard: tuple[int, int] | None = None) -> list[int]:
    """Realizations of one shard: K, K+N, ... below ``n_realizations`` (all of them for no shard)."""
    k, n = shard or (0, 1)
    return list(range(k, n_realizations, n))


def parse_dask(spec: str) -> tuple[str, Any]:
    """``"local:N"`` -> ("local", N); ``"tcp://host:port"`` (or tls://, ws://, inproc://) -> ("address", spec)."""
    if not isinstance(spec, str):
        raise InputError(f"dask must be local:N or a scheduler address like tcp://host:8786, got {spec!r}",
                         arg="dask")
    if spec.startswith("local:"):
        try:
            n = int(spec[6:])
        except ValueError:
            n = 0
        if n < 1:
            raise InputError(f"dask = local:N needs a positive number of workers N, got {spec!r}", arg="dask")
        return "local", n
    if "://" in spec and spec.split("://", 1)[0] in ("tcp", "tls", "ws", "wss", "inproc", "ucx") \
            and spec.split("://", 1)[1]:
        return "address", spec
    raise InputError(f"dask must be local:N (a local Dask cluster of N processes) or a scheduler address "
                     f"like tcp://host:8786, got {spec!r}", arg="dask")


# ------------------------------------------------------------------------------------------- threads
def limit_threads() -> None:
    """One BLAS/OpenMP thread in this process (threadpoolctl), for reproducible, non-oversubscribed runs."""
    global _THREAD_LIMIT
    if _THREAD_LIMIT is None:
        from threadpoolctl import threadpool_limits

        _THREAD_LIMIT = threadpool_limits(limits=1)


@contextlib.contextmanager
def _single_thread_env():
    """Set the BLAS thread variables to 1 while child processes are started (restored afterwards)."""
    old = {v: os.environ.get(v) for v in _BLAS_VARS}
    os.environ.update({v: "1" for v in _BLAS_VARS})
    try:
        yield
    finally:
        for v, val in old.items():
            if val is None:
                os.environ.pop(v, None)
            else:
                os.environ[v] = val


def _init_worker() -> None:
    limit_threads()


# ------------------------------------------------------------------------------------------- one realization
def evolve_realization(chain, *, w: str, site: int, times: Sequence[float], settings: EvolutionSettings,
                       probes: Sequence[str] = ("X", "Y", "Z"), bits: Sequence[str] | None = None,
                       resume: dict | None = None, observers: Sequence[Observer] = ()) -> dict:
    """One realization through the evolution driver (:func:`mpo_fronts.driver.evolve`), as the result dict
    that the run directory stores.

    Parameters
    ----------
    chain : Chain
    w, site : str, int
        The evolved operator and its site.
    times : sequence of float
        Output times (units 1/J).
    settings : EvolutionSettings
        Evolution settings (from the description's ``[evolution]`` table).
    probes : sequence of str
        Probes V whose OTOC is stored.
    bits : sequence of str, optional
        Basis states for product-state OTOCs ('0' = spin up); None for infinite temperature.
    resume : dict, optional
        A checkpoint (``state``, ``outputs``, ``n_done``, ``wall_time``, ``restarts``) to continue from.
    observers : sequence of Observer
        Called after every block (checkpoints, heartbeat, progress).

    Returns
    -------
    dict
        ``times``, ``otoc`` {v: (n_t, L)}, ``weights`` (n_t, L, 4), ``right_weight`` (n_t, L),
        ``discarded_weight`` (n_t,), ``bond_discarded`` (n_t, L-1), ``bond_entropy`` (n_t, L-1), ``max_bond``
        (n_t,), ``state_otoc`` {v: (S, n_t, L)} or None, ``bits``, ``engine`` (settings, ``max_step``,
        ``splits``, ...), ``wall_time`` (s, including resumed sessions), ``restarts``, ``resumed_from``
        (time of the checkpoint, or None).
    """
    from .driver import DEFAULT_MEASUREMENTS, evolve, product_states
    from .readout import otoc_from_weights

    states = product_states(bits, chain.L, probes)
    ms = list(DEFAULT_MEASUREMENTS) + ([states] if states is not None else [])
    evo = evolve(chain, w, site, times, settings, measurements=ms, observers=observers, resume=resume, threads=1)
    a = evo.arrays
    result: dict[str, Any] = {name: a[name] for name in ("weights", "right_weight", "discarded_weight",
                                                         "bond_discarded", "bond_entropy", "max_bond")}
    result["times"] = evo.times
    if bits is not None:
        result["state_otoc"] = {v: np.ascontiguousarray(np.moveaxis(a[f"state_otoc_{v}"], 1, 0)) for v in probes}
        result["otoc"] = {v: result["state_otoc"][v].mean(axis=0) for v in probes}
        result["bits"] = list(bits)
    else:
        result["otoc"] = {v: otoc_from_weights(a["weights"], v) for v in probes}
        result["state_otoc"] = None
        result["bits"] = None
    result["engine"] = evo.engine
    result["wall_time"] = evo.wall_time
    result["restarts"] = evo.restarts
    result["resumed_from"] = evo.resumed_from
    return result


class _Stop(Exception):
    """Raised by the checkpoint observer when the run is asked to stop (after writing the checkpoint)."""

    def __init__(self, t: float | None):
        super().__init__(t)
        self.t = t


class _Checkpoints(Observer):
    """After every block: heartbeat of the claim, progress, and a checkpoint every ``interval`` seconds."""

    def __init__(self, rd, k: int, claim, progress, interval: float | None):
        self.rd, self.k, self.claim, self.progress, self.interval = rd, k, claim, progress, interval
        self.last = time.monotonic()
        self.t_session = time.perf_counter()

    def after_block(self, engine, evolution) -> None:
        self.claim.progress(engine.t)
        if self.progress is not None:
            self.progress(self.k, engine.t)
        if stopping.requested():
            if self.interval is not None:
                self.save(engine, evolution)
            raise _Stop(engine.t if self.interval is not None else None)
        if self.interval is not None and time.monotonic() - self.last >= self.interval:
            self.save(engine, evolution)

    def save(self, engine, evolution) -> None:
        """Write a checkpoint now (the engine state and the outputs measured so far)."""
        self.rd.save_checkpoint(self.k, engine.state_dict(), evolution.outputs(), evolution.n_done,
                                evolution.wall_time + time.perf_counter() - self.t_session, evolution.restarts)
        self.last = time.monotonic()


def _realization_payload(desc: RunDescription, real: Realization, result: dict) -> dict:
    result = dict(result)
    result["fields"] = np.asarray(real.fields, dtype=float)
    result["couplings"] = np.asarray(real.couplings, dtype=float)
    result["seed"] = list(real.seed)
    return result


def compute_realization(run_dir: str, description: dict, k: int, run_id: str,
                        progress: Callable[[int, float], None] | None = None) -> dict:
    """Compute realization k of a run directory (claim, resume, evolve, write atomically, release).

    This is the task every executor runs. ``description`` is the resolved description as a dict (its [run]
    table decides checkpoints and claim timeouts).

    Returns
    -------
    dict
        ``{"k", "status"}`` with status ``"done"`` (computed now; also ``wall_time``, ``resumed_from``),
        ``"exists"`` (already finished) or ``"busy"`` (claimed by a live process of another run; ``owner``).
    """
    from threadpoolctl import threadpool_limits

    with threadpool_limits(limits=1):
        return _compute_realization(run_dir, description, k, run_id, progress)


def _compute_realization(run_dir, description, k, run_id, progress) -> dict:
    import socket

    from .store import RUN_FILE

    if not (Path(run_dir) / RUN_FILE).is_file():
        raise UserError(f"the worker on {socket.gethostname()} cannot see the run directory {run_dir}; Dask "
                        "workers on other machines need it on a shared file system, at the same path")
    stopping.watch(stopping.stop_file(run_dir, run_id))
    if stopping.requested():  # queued before the stop: do not start
        return {"k": k, "status": "cancelled"}
    desc = parse_description(description)
    rd = RunDirectory(run_dir, desc)
    claim = rd.claim(k, run_id)
    if claim == "done":
        return {"k": k, "status": "exists"}
    if isinstance(claim, ClaimInfo):
        return {"k": k, "status": "busy", "owner": {"host": claim.host, "pid": claim.pid, "run_id": claim.run_id,
                                                    "t": claim.t}}
    try:
        opts = desc.run_options
        real = desc.realization(k)
        ckpt = rd.load_checkpoint(k) if opts["checkpoints"] else None
        saver = _Checkpoints(rd, k, claim, progress, opts["checkpoint_interval"] if opts["checkpoints"] else None)
        try:
            result = evolve_realization(real.chain, w=desc.w, site=desc.site, times=desc.times,
                                        settings=desc.settings, probes=desc.probes, bits=real.bits, resume=ckpt,
                                        observers=[saver])
        except _Stop as stop:
            return {"k": k, "status": "stopped", "t": stop.t}
        rd.write_result(k, dict(_realization_payload(desc, real, result), run_id=run_id))
        rd.remove_checkpoint(k)
    finally:
        claim.release()
    return {"k": k, "status": "done", "wall_time": result["wall_time"], "resumed_from": result["resumed_from"]}


# ------------------------------------------------------------------------------------------- progress
class _Progress:
    """A tqdm bar over realizations and evolution time on a terminal; periodic log lines otherwise."""

    def __init__(self, mode: str, n_total: int, n_before: int, n_todo: int, t_final: float, stream,
                 log_interval: float, label: str = ""):
        if mode == "auto":
            mode = "bar" if getattr(stream, "isatty", lambda: False)() else "log"
        self.mode = mode
        self.stream = stream
        self.n_total, self.n_before, self.n_todo, self.t_final = n_total, n_before, n_todo, t_final
        self.log_interval = log_interval
        self.label = label
        self.t0 = time.monotonic()
        self.last_log = -math.inf
        self.done_now = 0
        self.running: dict[int, float] = {}
        if mode == "bar":
            from tqdm import tqdm

            self.bar_r = tqdm(total=n_total, initial=n_before, desc=f"{label}realizations", unit="real",
                              file=stream, position=0, leave=True, dynamic_ncols=True)
            self.bar_t = tqdm(total=round(n_todo * t_final, 3), desc=f"{label}evolution time", unit="t",
                              file=stream, position=1, leave=True, dynamic_ncols=True,
                              bar_format="{l_bar}{bar}| {n:.1f}/{total:.1f} [{elapsed}<{remaining}]")
        elif mode == "log":
            self._log(force=True)

    def _log(self, force: bool = False) -> None:
        now = time.monotonic()
        if not force and now - self.last_log < self.log_interval:
            return
        self.last_log = now
        run = ", ".join(f"r{k} t={t:.3g}" for k, t in sorted(self.running.items())[:6])
        more = " ..." if len(self.running) > 6 else ""
        el = int(now - self.t0)
        print(f"[fronts] {self.label}{self.n_before + self.done_now}/{self.n_total} realizations done"
              f"{f'; running: {run}{more} (of t={self.t_final:g})' if run else ''}; elapsed "
              f"{el // 3600}:{el // 60 % 60:02d}:{el % 60:02d}", file=self.stream, flush=True)

    def update(self, done_now: int | None = None, running: dict[int, float] | None = None) -> None:
        if done_now is not None:
            self.done_now = done_now
        if running is not None:
            self.running = dict(running)
        if self.mode == "bar":
            self.bar_r.n = self.n_before + self.done_now
            self.bar_r.refresh()
            self.bar_t.n = round(min(self.n_todo * self.t_final,
                                     self.done_now * self.t_final + sum(self.running.values())), 3)
            self.bar_t.refresh()
        elif self.mode == "log":
            self._log()

    def close(self) -> None:
        if self.mode == "bar":
            self.bar_r.close()
            self.bar_t.close()
        elif self.mode == "log":
            self.running = {}
            self._log(force=True)


# ------------------------------------------------------------------------------------------- the driver
@dataclass
class RunReport:
    """What one call of :func:`run_ensemble` did."""

    path: Path
    selected: list[int]
    computed: list[int] = field(default_factory=list)
    existing: list[int] = field(default_factory=list)
    busy: dict[int, dict] = field(default_factory=dict)
    resumed: dict[int, float] = field(default_factory=dict)
    stopped: dict[int, float | None] = field(default_factory=dict)
    cancelled: list[int] = field(default_factory=list)
    elapsed: float = 0.0

    @property
    def complete(self) -> bool:
        """True when every selected realization is finished."""
        return not self.busy


def _make_dask_client(spec: str):
    kind, arg = parse_dask(spec)
    distributed = require("distributed", "dask")
    import logging

    if kind == "local":
        with _single_thread_env(), stopping.ignored():  # the workers leave stop signals to this process
            cluster = distributed.LocalCluster(n_workers=arg, threads_per_worker=1, processes=True,
                                               dashboard_address=":0", silence_logs=logging.ERROR)
        return distributed.Client(cluster), cluster
    try:
        return distributed.Client(arg, timeout="15s"), None
    except (OSError, TimeoutError) as exc:
        raise UserError(f"cannot reach the Dask scheduler at {arg} ({exc}); start one with 'dask scheduler' "
                        "and workers with 'dask worker ADDRESS', or use a local cluster, 'local:N'") from None


def run_ensemble(description: RunDescription, out, *, workers: int = 1, dask: str | None = None,
                 shard: tuple[int, int] | None = None, realizations: Sequence[int] | None = None,
                 wait: bool = False, progress: str = "auto", log_interval: float = 30.0, stream=None,
                 retries: int = 2, poll: float = 0.25, exit_on_second_signal: bool = False) -> RunReport:
    """Compute the missing realizations of a description into a run directory.

    Parameters
    ----------
    description : RunDescription
        From :func:`mpo_fronts.config.read_description`.
    out : path
        Run directory (created; an existing one must hold the same description, see
        :meth:`mpo_fronts.store.RunDirectory.create`).
    workers : int
        Local worker processes (1: serial, in this process).
    dask : str, optional
        ``"local:N"`` or a scheduler address ``"tcp://host:port"``; excludes ``workers > 1``.
    shard : (K, N), optional
        Compute only realizations K, K+N, ... (cluster job arrays).
    realizations : sequence of int, optional
        Compute only these realization indices (within the description's count).
    wait : bool
        Wait for realizations that another live run holds, and take them over if their owner dies.
    progress : {'auto', 'bar', 'log', 'none'}
        Bar on a terminal, periodic log lines (every ``log_interval`` s) otherwise.
    retries : int
        Dask retries of a task that raised.
    exit_on_second_signal : bool
        What a second SIGINT/SIGTERM does: exit the process at once (the command line) or raise
        KeyboardInterrupt (default). The first one always stops cleanly (:mod:`mpo_fronts.stopping`).

    Returns
    -------
    RunReport

    Raises
    ------
    mpo_fronts.stopping.RunStopped
        After a clean stop on SIGINT or SIGTERM (running realizations checkpointed, queued ones not started);
        its message gives the true count of finished realizations.
    """
    if not isinstance(description, RunDescription):
        raise InputError("description must be a RunDescription (use mpo_fronts.config.read_description)")
    if isinstance(workers, bool) or not isinstance(workers, int) or workers < 1:
        raise InputError(f"workers must be a positive integer, got {workers!r}", arg="workers")
    if dask is not None:
        parse_dask(dask)
        if workers > 1:
            raise InputError("give either workers > 1 (local processes) or dask (a scheduler), not both", arg="workers")
    if progress not in ("auto", "bar", "log", "none"):
        raise InputError(f"progress must be 'auto', 'bar', 'log' or 'none', got {progress!r}")
    selected = shard_indices(description.realizations, shard)
    if realizations is not None:
        bad = [k for k in realizations if not 0 <= k < description.realizations]
        if bad:
            raise InputError(f"realizations {bad} are outside 0..{description.realizations - 1}")
        selected = [k for k in selected if k in set(realizations)]
    t0 = time.monotonic()
    RunDirectory.check_target(out, description)  # before anything is written or started
    client = _make_dask_client(dask) if dask is not None else None
    try:
        rd = RunDirectory.create(out, description)
    except BaseException:
        if client is not None:
            _close_dask(*client)
        raise
    drv = _Driver(rd, selected, progress, log_interval, stream if stream is not None else sys.stderr, poll)
    try:
        with stopping.handlers(stopping.stop_file(rd.path, drv.run_id), exit_at_once=exit_on_second_signal,
                               worker_pids=drv.local_worker_pids):
            if client is not None:
                drv.run_dask(client, retries, wait)
            elif workers > 1:
                drv.run_processes(workers, wait)
            else:
                drv.run_serial(wait)
    finally:
        drv.bar.close()
    drv.report.computed.sort()
    drv.report.existing.sort()
    drv.report.elapsed = time.monotonic() - t0
    if stopping.signalled() is not None:
        raise stopping.RunStopped(stopping.signalled(), drv.stop_message())
    return drv.report


class _Driver:
    """State of one run_ensemble call: what is selected, done, running; the progress display."""

    def __init__(self, rd: RunDirectory, selected: list[int], progress: str, log_interval: float, stream,
                 poll: float):
        self.rd = rd
        self.report = RunReport(path=rd.path, selected=selected)
        done0 = set(rd.done())
        self.report.existing = [k for k in selected if k in done0]
        self.todo = [k for k in selected if k not in done0]
        self.run_id = uuid.uuid4().hex
        self.desc_d = rd.description.to_dict()
        self.poll = poll
        self.running: dict[int, float] = {}
        self.bar = _Progress(progress, len(selected), len(self.report.existing), len(self.todo),
                             float(rd.description.times[-1]), stream, log_interval)

    def on_result(self, res: dict) -> None:
        k, status = res["k"], res["status"]
        self.running.pop(k, None)
        if status == "stopped":
            self.report.stopped[k] = res.get("t")
        elif status == "cancelled":
            self.report.cancelled.append(k)
        elif status == "busy":
            self.report.busy[k] = res["owner"]
        else:
            self.report.busy.pop(k, None)
            if status == "done":
                self.report.computed.append(k)
                if res.get("resumed_from") is not None:
                    self.report.resumed[k] = res["resumed_from"]
            else:
                self.report.existing.append(k)
        self.bar.update(done_now=len(self.report.computed), running=self.running)

    def poll_running(self) -> None:
        timeout = self.rd.description.run_options["claim_timeout"]
        for k, info in self.rd.claim_infos().items():
            if info.run_id == self.run_id:
                if info.alive(timeout):
                    self.running[k] = info.t
                else:
                    self.running.pop(k, None)
        self.bar.update(running=self.running)

    def local_worker_pids(self) -> list[int]:
        """Processes on this host that hold this run's claims (killed on a second signal)."""
        import socket

        host = socket.gethostname()
        return [info.pid for info in self.rd.claim_infos().values()
                if info.run_id == self.run_id and info.host == host]

    def stop_message(self) -> str:
        """The true state after a clean stop, as ``fronts status`` reports it."""
        n_done, n_total = len(self.rd.done()), self.rd.description.realizations
        stopped = ", ".join(f"r{k}" + (f" (t={t:.3g})" if t is not None else "")
                            for k, t in sorted(self.report.stopped.items())[:10])
        parts = [f"stopped by {stopping.signal_name(stopping.signalled())}: {n_done} of {n_total} realizations "
                 f"done ({len(self.report.computed)} in this run)"]
        if self.report.stopped:
            parts.append(f"checkpointed on the way out: {stopped}" if self.rd.description.run_options["checkpoints"]
                         else f"stopped without checkpoints (run.checkpoints = false): {stopped}")
        parts.append("run the same command again to continue")
        return "; ".join(parts)

    def rounds(self, one_round: Callable[[list[int]], None], wait: bool, interval: float = 2.0) -> None:
        """One round over everything to do; with ``wait``, retry what other live runs hold until done."""
        one_round(self.todo)
        while wait and self.report.busy and not stopping.requested():
            time.sleep(interval)
            one_round(sorted(self.report.busy))

    def collect(self, futures: dict, on_error: Callable[[BaseException], BaseException] | None = None) -> None:
        cancelled = False
        while futures:
            if not cancelled and stopping.requested():
                cancelled = True  # queued tasks that never started; started ones return at the stop file
                for f in list(futures):
                    if f.cancel():
                        futures.pop(f)
            for f in [f for f in futures if f.done()]:
                futures.pop(f)
                if f.cancelled():
                    continue
                try:
                    res = f.result()
                except BaseException as exc:  # noqa: BLE001 - translated or re-raised
                    raise (on_error(exc) if on_error is not None else exc) from None
                self.on_result(res)
            self.poll_running()
            if futures:
                time.sleep(self.poll)

    # ---------------------------------------------------------------- executors
    def run_serial(self, wait: bool) -> None:
        def prog(k, t):
            self.running[k] = t
            self.bar.update(running=self.running)

        def one_round(ks):
            for k in ks:
                if stopping.requested():
                    break
                self.on_result(compute_realization(str(self.rd.path), self.desc_d, k, self.run_id, progress=prog))

        self.rounds(one_round, wait)

    def run_processes(self, workers: int, wait: bool) -> None:
        import multiprocessing as mp
        from concurrent.futures import ProcessPoolExecutor
        from concurrent.futures.process import BrokenProcessPool

        def translate(exc):
            if isinstance(exc, BrokenProcessPool):
                return WorkerDied("a worker process died (killed, or out of memory); the finished realizations "
                                  "are kept: run the same command again to continue")
            return exc

        with _single_thread_env(), stopping.ignored():
            pool = ProcessPoolExecutor(max_workers=workers, mp_context=mp.get_context("spawn"),
                                       initializer=_init_worker)
        try:
            def one_round(ks):
                # children are started on demand, at submit: one BLAS thread, stop signals left to this process
                with _single_thread_env(), stopping.ignored():
                    futures = {pool.submit(compute_realization, str(self.rd.path), self.desc_d, k, self.run_id): k
                               for k in ks}
                self.collect(futures, translate)

            self.rounds(one_round, wait)
        finally:
            pool.shutdown(wait=True, cancel_futures=True)

    def run_dask(self, client_cluster, retries: int, wait: bool) -> None:
        client, cluster = client_cluster
        attempt = {"n": 0}
        try:
            def one_round(ks):
                attempt["n"] += 1
                futures = {client.submit(compute_realization, str(self.rd.path), self.desc_d, k, self.run_id,
                                         pure=False, retries=retries,
                                         key=f"fronts-{self.run_id[:8]}-{attempt['n']}-r{k:05d}"): k for k in ks}
                self.collect(futures)

            self.rounds(one_round, wait)
        finally:
            _close_dask(client, cluster)


def _close_dask(client, cluster) -> None:
    with contextlib.suppress(Exception):
        client.close()
    if cluster is not None:
        with contextlib.suppress(Exception):
            cluster.close()
