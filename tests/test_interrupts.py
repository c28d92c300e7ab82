"""Interrupting a real ``fronts run``: SIGINT / SIGTERM sent to its process group (as Ctrl-C and batch schedulers
do), once (stop cleanly: queued realizations cancelled, running ones checkpointed, the true count reported) and
twice (exit at once). Serial, local processes and a local Dask cluster behave alike.

The runs are small (L = 16, chi = 16) but their realizations take seconds, so that the signal lands mid-way.
"""

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import pytest

FRONTS = [sys.executable, "-m", "mpo_fronts.cli"]

# One realization takes about 2-3 s on one core; blocks of `chunk` Trotter steps end at every output time too.
DESC = """
[model]
kind = "xxz"
L = 16
W = 1.0
[operators]
w = "Z"
site = "center"
v = ["Z"]
[times]
values = {times}
[evolution]
chi = 16
dt = 0.02
chunk = {chunk}
[ensemble]
realizations = {R}
seed = 3
[run]
checkpoint_interval = 300.0
"""
TIMES = "[0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 3.5, 4.0]"
EXIT = {signal.SIGINT: 130, signal.SIGTERM: 143}


class Run:
    """A ``fronts run`` subprocess in its own session (so that killpg reaches it and its workers only)."""

    def __init__(self, tmp_path: Path, *opts, R: int = 8, chunk: int = 2, times: str = TIMES):
        self.toml = tmp_path / "run.toml"
        self.toml.write_text(DESC.format(R=R, chunk=chunk, times=times))
        self.out = tmp_path / "run"
        self.R = R
        self.opts = [str(o) for o in opts]
        self.stdout_path, self.stderr_path = tmp_path / "stdout.txt", tmp_path / "stderr.txt"
        env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
        with open(self.stdout_path, "w") as so, open(self.stderr_path, "w") as se:
            self.proc = subprocess.Popen(FRONTS + ["run", str(self.toml), "--out", str(self.out), "--progress",
                                                   "log", "--log-interval", "0.5", *self.opts],
                                         stdout=so, stderr=se, text=True, env=env, start_new_session=True)

    def signal(self, sig) -> None:
        os.killpg(self.proc.pid, sig)

    def wait(self, timeout: float = 60.0) -> int:
        try:
            return self.proc.wait(timeout=timeout)
        except subprocess.TimeoutExpired:
            with_children = f"{self.output}"
            os.killpg(self.proc.pid, signal.SIGKILL)
            self.proc.wait()
            pytest.fail(f"fronts run still alive {timeout:g} s after the signal:\n{with_children}")

    @property
    def output(self) -> str:
        return self.stdout_path.read_text() + self.stderr_path.read_text()

    def done(self) -> set[int]:
        return _indices(self.out / "realizations")

    def checkpointed(self) -> set[int]:
        return _indices(self.out / "checkpoints")

    def claims(self) -> dict[int, dict]:
        out = {}
        for k in _indices(self.out / "claims", ".claim"):
            try:
                out[k] = json.loads((self.out / "claims" / f"r{k:05d}.claim").read_text())
            except (OSError, ValueError):
                pass
        return out

    def kill_leftovers(self) -> None:
        try:
            os.killpg(self.proc.pid, signal.SIGKILL)
        except (ProcessLookupError, PermissionError):
            pass


def _indices(folder: Path, suffix: str = ".h5") -> set[int]:
    if not folder.is_dir():
        return set()
    return {int(p.name[1:-len(suffix)]) for p in folder.iterdir()
            if p.name.startswith("r") and p.name.endswith(suffix) and p.name[1:-len(suffix)].isdigit()}


def wait_for(cond, timeout: float = 90.0) -> bool:
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if cond():
            return True
        time.sleep(0.02)
    return False


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except OSError:
        return False


def status(out: Path) -> str:
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1")
    res = subprocess.run(FRONTS + ["status", str(out)], capture_output=True, text=True, env=env, timeout=60)
    assert res.returncode == 0, res.stderr
    return res.stdout


@pytest.fixture
def runs():
    started = []
    yield started
    for r in started:
        r.kill_leftovers()


def mid_realization(run: Run, n_running: int, min_done: int):
    """True once ``min_done`` results exist and ``n_running`` claims run, the youngest 0.3-1.2 s old (so at
    least one realization is far from finishing when the signal comes)."""
    def cond():
        if len(run.done()) < min_done:
            return False
        cl = run.claims()
        if len(cl) < n_running:
            return False
        youngest = time.time() - max(c["started"] for c in cl.values())
        return 0.3 <= youngest <= 1.2
    return cond


def interrupt_once(run: Run, sig, n_running: int, min_done: int = 1):
    """Signal the run's process group once mid-run; check the clean stop. Returns (checkpointed, done)."""
    assert wait_for(mid_realization(run, n_running, min_done)), run.output
    done_before = run.done()
    claimed = set(run.claims())
    run.signal(sig)
    claimed |= set(run.claims())
    rc = run.wait()
    text = run.output
    assert rc == EXIT[sig], text
    assert "Traceback" not in text, text
    running = claimed - done_before
    done_after, ckpt = run.done(), run.checkpointed()
    # no realization started after the interrupt: only those running then finished or were checkpointed
    assert done_after <= done_before | running, (done_before, running, done_after, text)
    assert ckpt <= running, (running, ckpt, text)
    # nothing lost: every running realization either finished or left a checkpoint
    assert running <= done_after | ckpt, (running, done_after, ckpt, text)
    assert ckpt, f"the signal should have caught a realization mid-way: {text}"
    assert not run.claims(), "claims are released on a clean stop"
    # the true count, as fronts status reports it
    m = re.search(r"(\d+) of (\d+) realizations done", text)
    assert m, text
    assert (int(m.group(1)), int(m.group(2))) == (len(done_after), run.R), text
    st = status(run.out)
    assert re.search(rf"done:\s+{len(done_after)} of {run.R}\b", st), st
    assert re.search(rf"checkpointed: {len(ckpt)}\b", st), st
    return ckpt, done_after


def resume(run: Run, ckpt: set[int], *opts) -> str:
    """Rerun only the checkpointed realizations; they must continue from their checkpoints."""
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    res = subprocess.run(FRONTS + ["run", str(run.toml), "--out", str(run.out), "--progress", "none",
                                   "--realizations", ",".join(map(str, sorted(ckpt))), *map(str, opts)],
                         capture_output=True, text=True, env=env, timeout=120)
    assert res.returncode == 0, res.stdout + res.stderr
    for k in ckpt:
        assert re.search(rf"\br{k} \(t=", res.stdout), res.stdout
        with h5py.File(run.out / "realizations" / f"r{k:05d}.h5") as f:
            assert f.attrs["restarts"] == 1 and f.attrs["resumed_from"] > 0
    assert not run.checkpointed() & ckpt
    return res.stdout


# ------------------------------------------------------------------------------------------- one signal
def test_sigint_with_two_workers_stops_cleanly_and_resumes(tmp_path, runs):
    run = Run(tmp_path, "--workers", 2)
    runs.append(run)
    ckpt, _ = interrupt_once(run, signal.SIGINT, n_running=2)
    resume(run, ckpt, "--workers", 2)


def test_sigterm_with_two_workers_stops_cleanly(tmp_path, runs):
    run = Run(tmp_path, "--workers", 2)
    runs.append(run)
    interrupt_once(run, signal.SIGTERM, n_running=2)


def test_sigint_serial_stops_cleanly_and_resumes_bit_for_bit(tmp_path, runs):
    import numpy as np

    import mpo_fronts as mf
    from mpo_fronts.config import read_description
    from mpo_fronts.ensemble import run_ensemble

    run = Run(tmp_path, "--workers", 1, R=4)
    runs.append(run)
    ckpt, _ = interrupt_once(run, signal.SIGINT, n_running=1)
    assert len(ckpt) == 1
    resume(run, ckpt)
    (k,) = ckpt
    ref = tmp_path / "ref"
    run_ensemble(read_description(run.toml), ref, realizations=[k], progress="none")
    got = mf.load(run.out)
    i = list(got.realizations).index(k)
    np.testing.assert_allclose(got.otoc("Z")[i], mf.load(ref).otoc("Z")[0], rtol=0, atol=1e-12)


def test_sigterm_serial_stops_cleanly(tmp_path, runs):
    run = Run(tmp_path, "--workers", 1, R=4)
    runs.append(run)
    interrupt_once(run, signal.SIGTERM, n_running=1)


def test_sigint_with_dask_local_cluster_stops_cleanly(tmp_path, runs):
    pytest.importorskip("distributed")
    run = Run(tmp_path, "--dask", "local:2")
    runs.append(run)
    ckpt, _ = interrupt_once(run, signal.SIGINT, n_running=2)
    resume(run, ckpt)


# ------------------------------------------------------------------------------------------- two signals
# Long blocks (975 Trotter steps, about 10 s): the clean stop waits for the end of a block, the second signal
# does not.
LONG_BLOCKS = dict(chunk=1000, times="[0.5, 20.0]")


@pytest.mark.parametrize("opts", [("--workers", 2), ("--workers", 1), ("--dask", "local:2")],
                         ids=["workers2", "serial", "dask"])
def test_second_signal_exits_at_once(tmp_path, runs, opts):
    if opts[0] == "--dask":
        pytest.importorskip("distributed")
    n = 1 if opts[1] == 1 else 2
    run = Run(tmp_path, *opts, R=4, **LONG_BLOCKS)
    runs.append(run)

    def inside_long_block():
        # every running realization past its first (short) block to t = 0.5, i.e. inside the long block to t = 20
        cl = run.claims()
        return len(cl) >= n and all(c.get("t", 0.0) >= 0.5 for c in cl.values())

    assert wait_for(inside_long_block), run.output
    pids = {c["pid"] for c in run.claims().values()}
    run.signal(signal.SIGINT)
    time.sleep(0.3)
    run.signal(signal.SIGINT)
    rc = run.wait(timeout=30)
    text = run.output
    assert rc == 130, text
    assert "Traceback" not in text, text
    assert not run.checkpointed(), "the second signal does not wait for the end of the block"
    assert not run.done()
    # no process keeps computing: the claim owners are gone, and a rerun would take their claims over
    assert wait_for(lambda: not any(_pid_alive(p) for p in pids), 10), pids
    assert re.search(r"stale claims: \d+", status(run.out))
