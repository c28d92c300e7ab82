"""Stopping a run on a signal: the first SIGINT or SIGTERM stops it cleanly, the second exits at once.

Ctrl-C sends SIGINT to the whole foreground process group; batch schedulers send SIGTERM at the wall-time
limit (to the job's processes, or only to its main process). One scheme covers both:

* Worker processes (local pools, local Dask clusters) are started with SIGINT and SIGTERM ignored, so only
  the main process sees a signal; nothing in a worker is interrupted half-way (no tracebacks, no torn files).
* On the first signal the main process writes a *stop file* in the run directory, ``claims/stop-<run id>``.
  Every realization of that run looks for it at the end of each block of Trotter steps (at most every
  ``POLL`` seconds): a running one writes a checkpoint and returns, a queued one returns before it starts.
  The serial runner, computing in the main process, sees the flag directly. The file also reaches Dask
  workers on other machines (they need the run directory on a shared file system anyway).
* On the second signal the main process kills its worker processes and exits at once (exit code
  128 + signal number, as shells report). Their claims become stale; the next run takes them over and
  resumes from the last checkpoint.

:func:`requested` is what a computation polls; :func:`handlers` is what a runner installs around its loop.
"""

from __future__ import annotations

import contextlib
import os
import signal
import threading
import time
from pathlib import Path

from .errors import FrontsError

#: Signals that stop a run.
SIGNALS = (signal.SIGINT, signal.SIGTERM)
#: Seconds between two looks at the stop file.
POLL = 0.2

_NAMES = {signal.SIGINT: "SIGINT", signal.SIGTERM: "SIGTERM"}


class RunStopped(FrontsError):
    """A run stopped cleanly on a signal; ``exit_code`` is 128 + the signal number."""

    def __init__(self, signum: int, message: str):
        super().__init__(message)
        self.signum = int(signum)
        self.exit_code = 128 + self.signum

    def __reduce__(self):
        return (type(self), (self.signum, str(self)))


def signal_name(signum: int) -> str:
    return _NAMES.get(signum, f"signal {signum}")


def stop_file(run_dir, run_id: str) -> Path:
    """The stop file of one run (one ``run_ensemble`` call) in a run directory."""
    return Path(run_dir) / "claims" / f"stop-{run_id}"


class _State:
    """What this process knows: a signal seen here (main process), and the stop file it should watch."""

    def __init__(self):
        self.signum: int | None = None
        self.count = 0
        self.watch: Path | None = None
        self.seen = False
        self.last_look = -float("inf")


_STATE = _State()


def watch(path: Path | None) -> None:
    """Poll ``path`` (a stop file) from now on in :func:`requested`; ``None`` stops watching."""
    _STATE.watch = Path(path) if path is not None else None
    _STATE.seen = False
    _STATE.last_look = -float("inf")


def requested() -> bool:
    """True once this run was asked to stop (a signal in this process, or the stop file it watches)."""
    if _STATE.signum is not None or _STATE.seen:
        return True
    if _STATE.watch is not None:
        now = time.monotonic()
        if now - _STATE.last_look >= POLL:
            _STATE.last_look = now
            _STATE.seen = _STATE.watch.exists()
    return _STATE.seen


def signalled() -> int | None:
    """The signal that stopped this process's run, if any."""
    return _STATE.signum


@contextlib.contextmanager
def ignored():
    """Ignore the stop signals while child processes are started (they inherit the disposition)."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    old = {s: signal.signal(s, signal.SIG_IGN) for s in SIGNALS}
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)


def _say(text: str) -> None:
    with contextlib.suppress(OSError):
        os.write(2, (text.rstrip("\n") + "\n").encode())


def _kill_children(extra_pids=()) -> None:
    import multiprocessing as mp

    pids = set(extra_pids)
    with contextlib.suppress(Exception):
        pids |= {p.pid for p in mp.active_children() if p.pid}
    pids.discard(os.getpid())
    for pid in pids:
        with contextlib.suppress(OSError):
            os.kill(pid, signal.SIGKILL)


@contextlib.contextmanager
def handlers(stop_path: Path, *, exit_at_once: bool, worker_pids=lambda: (), label: str = "fronts run"):
    """Install the two-stage stop for the duration of a run (main thread only; elsewhere a no-op).

    Parameters
    ----------
    stop_path : Path
        The stop file to write on the first signal (removed on the way out).
    exit_at_once : bool
        On the second signal, exit the process (``os._exit``, the command line) rather than raise
        KeyboardInterrupt (a library call, for example in a notebook).
    worker_pids : callable
        Returns process ids to kill on the second signal besides this process's children (the owners of
        this run's claims on this host).
    """
    if threading.current_thread() is not threading.main_thread():
        watch(stop_path)
        try:
            yield
        finally:
            watch(None)
        return
    _STATE.signum, _STATE.count = None, 0

    def on_signal(signum, frame):
        _STATE.count += 1
        if _STATE.count == 1:
            _STATE.signum = signum
            with contextlib.suppress(OSError):
                stop_path.parent.mkdir(parents=True, exist_ok=True)
                stop_path.write_text(f"{signal_name(signum)} {time.time():.3f}\n")
            _say(f"{label}: {signal_name(signum)} received, stopping cleanly: queued realizations are cancelled, "
                 "running ones write a checkpoint at the end of their current block (send it again to exit at "
                 "once)")
            return
        _say(f"{label}: second signal, exiting at once; finished realizations are kept, the running ones "
             "continue from their last checkpoint when the same command is run again")
        try:
            pids = tuple(worker_pids())
        except Exception:  # noqa: BLE001 - exiting anyway
            pids = ()
        _kill_children(pids)
        if exit_at_once:
            os._exit(128 + (_STATE.signum or signum))
        raise KeyboardInterrupt

    old = {s: signal.signal(s, on_signal) for s in SIGNALS}
    watch(stop_path)
    try:
        yield
    finally:
        for s, h in old.items():
            signal.signal(s, h)
        watch(None)
        with contextlib.suppress(OSError):
            stop_path.unlink()


def reset() -> None:
    """Forget a signal seen earlier (the next run in this process starts afresh)."""
    _STATE.signum, _STATE.count = None, 0
    watch(None)
