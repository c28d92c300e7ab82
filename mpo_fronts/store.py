"""The on-disk layout of runs (HDF5), atomic writes, claims, resume, checkpoints, merge and loading.

A run directory holds::

    run.json                  the resolved run description, its fingerprint, the package version
    realizations/r00007.h5    one file per finished realization (see "Realization files" below)
    claims/r00007.claim       present while a process computes realization 7 (host, pid, run id, progress)
    checkpoints/r00007.h5     the evolving operator of an unfinished realization, saved every few minutes
    .lock                     taken (``fcntl.flock``) for the short moments of creating or taking over claims

Every file is written to a temporary name in the same folder, flushed, fsynced and renamed into place, so a
killed process never leaves a half-written result; a realization file that exists is complete.

Claims make concurrent runs on one directory safe: a realization is computed only by the process that holds its
claim. A claim is taken over when its owner is dead (same host, process gone), when its heartbeat (the file's
modification time, refreshed every few seconds by a thread of the owner) is older than ``run.claim_timeout``
seconds, or when it belongs to the same run (a task that Dask retried after its worker died).

Realization files hold ``times``; per probe ``otoc/<v>`` = C[t, r] (the mean over the basis states for
product-state runs, with the individual states in ``state_otoc/<v>`` of shape (samples, n_t, L) and the
bitstrings in ``bits``); ``weights`` (n_t, L, 4) single-site Pauli weights (I, X, Y, Z); ``right_weight``
(n_t, L); ``discarded_weight`` and ``max_bond`` (n_t,); ``bond_discarded`` and ``bond_entropy`` (n_t, L-1),
the discarded weight and the operator entanglement entropy per bond (from 0.2 on); ``fields`` (L,) in S^z
units (NaN for the mixed-field Ising chain, which has no per-site fields); ``couplings`` (L-1,); ``seed`` (k, ensemble seed); ``wall_time``
(seconds, summed over restarts); and as attributes the package version, :data:`mpo_fronts.CONVENTIONS`, the
resolved description (JSON), and the engine settings (chi, dt, Trotter order, cutoff, chunk, and ``max_step``,
the largest Trotter step actually used). Every dataset carries the attributes ``axes``, ``units`` and ``meaning``
(:data:`DATASETS`).

:func:`load` reads a run directory, a merged file (:func:`merge`), or a convergence study directory (written by
``fronts converge``), and returns an :class:`Ensemble`.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import socket
import threading
import time
import uuid
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, Iterable, Sequence

import numpy as np

from .config import RunDescription, parse_description
from .errors import InputError, RunDirectoryError, require

__all__ = ["RunDirectory", "Claim", "ClaimInfo", "Ensemble", "load", "merge", "run_status", "atomic_h5",
           "RUN_FILE", "RESULT_FORMAT", "MERGED_FORMAT", "CONVERGENCE_FILE"]

RUN_FILE = "run.json"
RESULT_FORMAT = "mpo_fronts.realization/1"
MERGED_FORMAT = "mpo_fronts.merged/1"
CHECKPOINT_FORMAT = "mpo_fronts.checkpoint/1"
CONVERGENCE_FILE = "convergence.h5"
LETTER_AXIS = ("I", "X", "Y", "Z")


def _package_info() -> tuple[str, str]:
    from .conventions import CONVENTIONS, __version__

    return __version__, CONVENTIONS


# ------------------------------------------------------------------------------------------- atomic writing
def _fsync_dir(path: Path) -> None:
    try:
        fd = os.open(path, os.O_RDONLY)
    except OSError:  # pragma: no cover - platforms without directory fds
        return
    try:
        os.fsync(fd)
    except OSError:  # pragma: no cover
        pass
    finally:
        os.close(fd)


def _tmp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}.{os.getpid()}.{uuid.uuid4().hex[:8]}.tmp")


def _atomic_replace(path: Path, write_tmp: Callable[[Path], None]) -> Path:
    """Let ``write_tmp(tmp)`` write a temporary sibling of path, fsync it, rename it into place, fsync the folder.

    A killed process leaves at most a stray temporary file, never a half-written ``path``.
    """
    tmp = _tmp_name(path)
    try:
        write_tmp(tmp)
        with open(tmp, "rb") as fh:
            os.fsync(fh.fileno())
        os.replace(tmp, path)
    except BaseException:
        with contextlib.suppress(OSError):
            tmp.unlink()
        raise
    _fsync_dir(path.parent)
    return path


def atomic_h5(path, write: Callable[[Any], None]) -> Path:
    """Write an HDF5 file through ``write(h5file)`` to a temporary name, fsync it and rename it into place."""
    import h5py

    def write_tmp(tmp: Path) -> None:
        with h5py.File(tmp, "w") as f:
            write(f)
            f.flush()

    return _atomic_replace(Path(path), write_tmp)


def _atomic_text(path: Path, text: str) -> None:
    _atomic_replace(path, lambda tmp: tmp.write_text(text))


def _json(obj) -> str:
    return json.dumps(obj, sort_keys=True, allow_nan=False)


# ------------------------------------------------------------------------------------------- claims
@dataclass
class ClaimInfo:
    """What a claim file says about the process computing a realization."""

    k: int
    host: str
    pid: int
    run_id: str
    started: float
    heartbeat: float
    t: float
    t_final: float

    def alive(self, timeout: float) -> bool:
        """False when the owner is known dead (same host, no such process) or silent for ``timeout`` seconds."""
        if self.host == socket.gethostname() and not _pid_alive(self.pid):
            return False
        return time.time() - self.heartbeat < timeout


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # pragma: no cover - another user's process
        return True
    # a zombie (killed, not yet reaped by its parent) is dead for our purposes
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"
    except (OSError, IndexError):
        return True


class Claim:
    """A held claim on one realization; a daemon thread refreshes its heartbeat until :meth:`release`."""

    HEARTBEAT_S = 2.0

    def __init__(self, path: Path, k: int, run_id: str, t_final: float, lock: Callable):
        self.path = path
        self.k = k
        self.run_id = run_id
        self.t = 0.0
        self.t_final = t_final
        self._lock = lock
        self._stop = threading.Event()
        self.started = time.time()
        tmp = _tmp_name(path)
        self._fd = os.open(tmp, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o644)
        self._write()
        os.replace(tmp, path)  # the caller holds the directory lock
        self._thread = threading.Thread(target=self._beat, name=f"fronts-claim-{k}", daemon=True)
        self._thread.start()

    SIZE = 512  # fixed-size content: one pwrite replaces it whole, so a reader never sees a mixture

    def _content(self) -> bytes:
        text = _json({"k": self.k, "host": socket.gethostname(), "pid": os.getpid(), "run_id": self.run_id,
                      "started": self.started, "t": self.t, "t_final": self.t_final})
        return (text.ljust(self.SIZE - 1) + "\n").encode()

    def _write(self) -> None:
        os.pwrite(self._fd, self._content(), 0)
        os.utime(self._fd)

    def _beat(self) -> None:
        while not self._stop.wait(self.HEARTBEAT_S):
            with contextlib.suppress(OSError):
                self._write()

    def progress(self, t: float) -> None:
        """Record the evolution time reached (written with the next heartbeat)."""
        self.t = float(t)

    def release(self) -> None:
        """Stop the heartbeat and remove the claim file if it is still ours."""
        self._stop.set()
        self._thread.join(timeout=5)
        with self._lock():
            with contextlib.suppress(OSError):
                if os.fstat(self._fd).st_ino == os.stat(self.path).st_ino:
                    os.unlink(self.path)
        with contextlib.suppress(OSError):
            os.close(self._fd)


def _read_claim(path: Path) -> ClaimInfo | None:
    try:
        st = os.stat(path)
        d = json.loads(path.read_text() or "{}")
        return ClaimInfo(k=int(d["k"]), host=str(d["host"]), pid=int(d["pid"]), run_id=str(d["run_id"]),
                         started=float(d["started"]), heartbeat=st.st_mtime, t=float(d.get("t", 0.0)),
                         t_final=float(d.get("t_final", 0.0)))
    except (OSError, ValueError, KeyError, TypeError):
        return None


# ------------------------------------------------------------------------------------------- run directory
def _diff(a, b, prefix: str = "", names: tuple[str, str] = ("stored", "given")) -> list[str]:
    """Dotted keys where two nested dicts differ, with both values (shortened)."""
    out = []
    if isinstance(a, dict) and isinstance(b, dict):
        for key in sorted(set(a) | set(b)):
            out += _diff(a.get(key, "<unset>"), b.get(key, "<unset>"), f"{prefix}.{key}" if prefix else key, names)
    elif a != b:
        sa, sb = repr(a), repr(b)
        out.append(f"{prefix}: {names[0]} {sa[:40] + ('...' if len(sa) > 40 else '')}, "
                   f"{names[1]} {sb[:40] + ('...' if len(sb) > 40 else '')}")
    return out


class RunDirectory:
    """A run directory (see the module doc). Create or reopen one with :meth:`create` / :meth:`open`."""

    def __init__(self, path, description: RunDescription):
        self.path = Path(path).resolve()
        self.description = description
        self.results = self.path / "realizations"
        self.claims = self.path / "claims"
        self.checkpoints = self.path / "checkpoints"

    # ---------------------------------------------------------------- opening
    @staticmethod
    def _read_run_file(path: Path) -> dict:
        try:
            return json.loads((path / RUN_FILE).read_text())
        except (OSError, ValueError) as exc:
            raise RunDirectoryError(f"{path}: cannot read {RUN_FILE} ({exc}); is this a run directory written "
                                    "by 'fronts run'?") from None

    @classmethod
    def open(cls, path) -> "RunDirectory":
        """Open an existing run directory."""
        p = Path(path)
        if not (p / RUN_FILE).is_file():
            raise RunDirectoryError(f"{p}: not a run directory (no {RUN_FILE}); create one with "
                                    "'fronts run RUN.toml --out DIR'")
        meta = cls._read_run_file(p)
        try:
            desc = parse_description(meta["description"], source=str(p / RUN_FILE))
        except Exception as exc:  # noqa: BLE001 - a damaged or foreign run.json
            raise RunDirectoryError(f"{p / RUN_FILE}: the stored description is not valid ({exc})") from None
        return cls(p, desc)

    @staticmethod
    def check_target(path, description: RunDescription) -> None:
        """Raise :class:`RunDirectoryError` if ``path`` cannot hold a run of ``description``; writes nothing."""
        p = Path(path)
        if p.exists() and not p.is_dir():
            raise RunDirectoryError(f"{p}: exists and is not a directory; choose another --out")
        if p.is_dir() and not (p / RUN_FILE).is_file():
            # a run being created right now holds only our lock file and the temporary run.json
            if any(not (child.name == ".lock" or child.name.startswith(f".{RUN_FILE}.")) for child in p.iterdir()):
                raise RunDirectoryError(f"{p}: exists, is not empty and is not a run directory (no {RUN_FILE}); "
                                        "choose a new or empty --out directory")
            return
        if p.is_dir():
            meta = RunDirectory._read_run_file(p)
            if meta.get("fingerprint") != description.fingerprint():
                stored = meta.get("description", {})
                new = description.to_dict()
                for d in (stored, new):
                    if isinstance(d, dict):
                        d.pop("run", None)
                        d.get("ensemble", {}).pop("realizations", None)
                lines = _diff(stored, new) or ["(the descriptions differ)"]
                raise RunDirectoryError(f"{p} holds a run of a different description; nothing was changed. "
                                        f"Differences: {'; '.join(lines[:6])}"
                                        f"{' ...' if len(lines) > 6 else ''}. Use another output directory, "
                                        f"or resume the stored run with its own description: fronts run "
                                        f"{p / RUN_FILE} --out {p}")

    @classmethod
    def create(cls, path, description: RunDescription) -> "RunDirectory":
        """Create a run directory, or reopen one holding the same description (realizations may grow)."""
        cls.check_target(path, description)
        p = Path(path)
        p.mkdir(parents=True, exist_ok=True)
        rd = cls(p, description)
        with rd.lock():
            cls.check_target(p, description)  # again, under the lock
            rd._write_run_file(description)
            for sub in (rd.results, rd.claims, rd.checkpoints):
                sub.mkdir(exist_ok=True)
        return rd

    def _write_run_file(self, description: RunDescription) -> None:
        """Write run.json (first of all files), or keep the stored one if it already has more realizations."""
        p = self.path
        version, conventions = _package_info()
        if (p / RUN_FILE).is_file():
            stored = parse_description(self._read_run_file(p)["description"])
            if description.realizations <= stored.realizations:
                # keep the stored (larger) count; this session's [run] options apply
                self.description = description.replace(ensemble__realizations=stored.realizations)
                return
        _atomic_text(p / RUN_FILE, json.dumps({
            "format": "mpo_fronts.run/1", "version": version, "conventions": conventions,
            "fingerprint": description.fingerprint(), "description": description.to_dict(),
            "source": description.source}, indent=1, sort_keys=True) + "\n")

    @contextlib.contextmanager
    def lock(self):
        """Exclusive lock of the directory for short critical sections (claims, run.json)."""
        fd = os.open(self.path / ".lock", os.O_RDWR | os.O_CREAT, 0o644)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX)
            yield
        finally:
            with contextlib.suppress(OSError):
                fcntl.flock(fd, fcntl.LOCK_UN)
            os.close(fd)

    # ---------------------------------------------------------------- paths and listings
    def result_path(self, k: int) -> Path:
        return self.results / f"r{k:05d}.h5"

    def claim_path(self, k: int) -> Path:
        return self.claims / f"r{k:05d}.claim"

    def checkpoint_path(self, k: int) -> Path:
        return self.checkpoints / f"r{k:05d}.h5"

    @staticmethod
    def _indices(folder: Path, suffix: str) -> list[int]:
        out = []
        with contextlib.suppress(OSError):
            for name in os.listdir(folder):
                if name.startswith("r") and name.endswith(suffix) and name[1:-len(suffix)].isdigit():
                    out.append(int(name[1:-len(suffix)]))
        return sorted(out)

    def done(self) -> list[int]:
        """Indices of finished realizations."""
        return self._indices(self.results, ".h5")

    def has_result(self, k: int) -> bool:
        return self.result_path(k).is_file()

    def claim_infos(self) -> dict[int, ClaimInfo]:
        out = {}
        for k in self._indices(self.claims, ".claim"):
            info = _read_claim(self.claim_path(k))
            if info is not None:
                out[k] = info
        return out

    def checkpointed(self) -> list[int]:
        return self._indices(self.checkpoints, ".h5")

    # ---------------------------------------------------------------- claims
    def claim(self, k: int, run_id: str) -> "Claim | str | ClaimInfo":
        """Try to claim realization k: returns a :class:`Claim`, ``"done"``, or the live owner's ClaimInfo."""
        timeout = self.description.run_options["claim_timeout"]
        with self.lock():
            if self.has_result(k):
                return "done"
            path = self.claim_path(k)
            if path.exists():
                info = _read_claim(path)
                if info is None:  # unreadable: respect it until its modification time is older than the timeout
                    with contextlib.suppress(OSError):
                        if time.time() - os.stat(path).st_mtime < timeout:
                            return ClaimInfo(k=k, host="?", pid=-1, run_id="?", started=0.0,
                                             heartbeat=os.stat(path).st_mtime, t=0.0, t_final=0.0)
                elif info.run_id != run_id and info.alive(timeout):
                    return info
            return Claim(path, k, run_id, float(self.description.times[-1]), self.lock)

    # ---------------------------------------------------------------- results
    def write_result(self, k: int, result: dict) -> Path:
        """Write realization k atomically (see the module doc for the contents)."""
        desc = self.description
        version, conventions = _package_info()

        def write(f):
            f.attrs["format"] = RESULT_FORMAT
            f.attrs["version"] = version
            f.attrs["conventions"] = conventions
            f.attrs["description"] = _json(desc.to_dict())
            f.attrs["fingerprint"] = desc.fingerprint()
            f.attrs["realization"] = k
            f.attrs["engine"] = _json(result["engine"])
            f.attrs["wall_time"] = result["wall_time"]
            f.attrs["restarts"] = result.get("restarts", 0)
            f.attrs["host"] = socket.gethostname()
            f.attrs["pid"] = os.getpid()
            f.attrs["run_id"] = str(result.get("run_id", ""))
            if result.get("resumed_from") is not None:
                f.attrs["resumed_from"] = float(result["resumed_from"])
            f.attrs["created"] = time.strftime("%Y-%m-%dT%H:%M:%S%z")
            _write_arrays(f, result)

        return atomic_h5(self.result_path(k), write)

    # ---------------------------------------------------------------- checkpoints
    def save_checkpoint(self, k: int, state: dict, outputs: dict, n_done: int, wall_time: float,
                        restarts: int) -> Path:
        """Save the engine state and the outputs of the first ``n_done`` times, atomically."""
        fingerprint = self.description.fingerprint()

        def write(f):
            f.attrs["format"] = CHECKPOINT_FORMAT
            f.attrs["fingerprint"] = fingerprint
            f.attrs["realization"] = k
            f.attrs["n_done"] = n_done
            f.attrs["wall_time"] = wall_time
            f.attrs["restarts"] = restarts
            scalars = {}
            lists = f.create_group("engine_lists")
            for key, value in state.items():
                if isinstance(value, (list, tuple)) and all(isinstance(x, np.ndarray) for x in value):
                    g = lists.create_group(key)
                    for i, A in enumerate(value):
                        g.create_dataset(f"{i:05d}", data=A)
                elif isinstance(value, np.ndarray):
                    f.require_group("engine_arrays").create_dataset(key, data=value)
                else:
                    scalars[key] = value.item() if isinstance(value, np.generic) else value
            f.attrs["engine_state"] = json.dumps(scalars)
            o = f.create_group("outputs")
            for name, arr in outputs.items():
                if isinstance(arr, dict):
                    sub = o.create_group(name)
                    for v, a in arr.items():
                        sub.create_dataset(v, data=a[:, :n_done])  # (samples, n_t, L)
                else:
                    o.create_dataset(name, data=arr[:n_done])

        return atomic_h5(self.checkpoint_path(k), write)

    def load_checkpoint(self, k: int) -> dict | None:
        """The checkpoint of realization k, or None (missing, unreadable or from another description)."""
        import h5py

        path = self.checkpoint_path(k)
        if not path.is_file():
            return None
        try:
            with h5py.File(path, "r") as f:
                if f.attrs.get("fingerprint") != self.description.fingerprint():
                    return None
                state = json.loads(f.attrs["engine_state"])
                for key, g in f["engine_lists"].items():
                    state[key] = [g[name][()] for name in sorted(g)]
                if "engine_arrays" in f:
                    for key, a in f["engine_arrays"].items():
                        state[key] = a[()]
                outputs: dict[str, Any] = {}
                for name, item in f["outputs"].items():
                    outputs[name] = ({v: a[()] for v, a in item.items()} if isinstance(item, h5py.Group)
                                     else item[()])
                return {"state": state, "outputs": outputs, "n_done": int(f.attrs["n_done"]),
                        "wall_time": float(f.attrs["wall_time"]), "restarts": int(f.attrs["restarts"])}
        except (OSError, KeyError, ValueError):
            return None

    def remove_checkpoint(self, k: int) -> None:
        with contextlib.suppress(FileNotFoundError):
            self.checkpoint_path(k).unlink()


#: What each stored dataset is: its axes (without the leading ``realization`` axis of merged files), units and
#: meaning. Written as the attributes ``axes``, ``units`` and ``meaning`` of every dataset.
DATASETS: dict[str, tuple[tuple[str, ...], str, str]] = {
    "times": (("time",), "1/J", "output times"),
    "otoc": (("time", "site"), "dimensionless, in [0, 2]",
             "C(r, t) = 1 - Re Tr[W(t) V_r W(t) V_r] / 2^L, normalised by the Frobenius weight kept"),
    "state_otoc": (("state", "time", "site"), "dimensionless, in [0, 2]",
                   "1 - Re <s|W(t) V_r W(t) V_r|s> for each basis state s of `bits`"),
    "weights": (("time", "site", "letter"), "fraction of the Frobenius weight",
                "single-site Pauli weights of W(t); letter axis I, X, Y, Z"),
    "right_weight": (("time", "site"), "fraction of the Frobenius weight",
                     "weight of the Pauli strings whose rightmost non-identity letter sits at the site"),
    "discarded_weight": (("time",), "fraction of the Frobenius weight",
                         "cumulative weight dropped by truncation up to the time (all bonds)"),
    "bond_discarded": (("time", "bond"), "fraction of the Frobenius weight",
                       "cumulative weight dropped at bond (b, b+1) up to the time"),
    "bond_entropy": (("time", "bond"), "nats",
                     "operator entanglement entropy of W(t) across bond (b, b+1) (normalised Schmidt weights)"),
    "max_bond": (("time",), "count", "largest bond dimension of W(t)"),
    "fields": (("site",), "J (S^z units)", "fields h_i used; NaN for the mixed-field Ising chain"),
    "couplings": (("bond",), "J", "couplings J_i used"),
    "seed": (("entropy",), "", "numpy SeedSequence entropy [k, ensemble seed] of the realization"),
    "wall_time": ((), "s", "wall time of the realization"),
    "max_step": ((), "1/J", "largest Trotter step used"),
    "bits": (("state",), "", "basis states, '0' = spin up (Z = +1)"),
    "realizations": (("realization",), "", "realization indices"),
}


def _describe(ds, name: str, merged: bool = False) -> None:
    """The axes, units and meaning attributes of a dataset (see DATASETS)."""
    key = name.split("/")[0]
    if key not in DATASETS:
        return
    axes, units, meaning = DATASETS[key]
    if merged and key not in ("times", "realizations"):
        axes = ("realization",) + axes
    ds.attrs["axes"] = ",".join(axes)
    ds.attrs["units"] = units
    ds.attrs["meaning"] = meaning
    if "letter" in axes:
        ds.attrs["letters"] = ",".join(LETTER_AXIS)
    if key in ("otoc", "state_otoc"):
        ds.attrs["probe"] = name.split("/")[-1]


#: Per-realization arrays a result file may lack (written from version 0.2 on).
OPTIONAL = ("bond_discarded", "bond_entropy")


def _write_arrays(f, result: dict) -> None:
    def put(name, data):
        _describe(f.create_dataset(name, data=data), name)

    put("times", np.asarray(result["times"], dtype=float))
    for v, a in result["otoc"].items():
        put(f"otoc/{v}", a)
    for name in ("weights", "right_weight", "discarded_weight", "max_bond", "fields", "couplings"):
        put(name, result[name])
    for name in OPTIONAL:
        if result.get(name) is not None:
            put(name, np.asarray(result[name], dtype=float))
    put("seed", np.asarray(result["seed"], dtype=np.int64))
    put("wall_time", float(result["wall_time"]))
    if result.get("bits") is not None:
        put("bits", np.asarray([b.encode() for b in result["bits"]]))
        for v, a in result["state_otoc"].items():
            put(f"state_otoc/{v}", a)


# ------------------------------------------------------------------------------------------- status
def run_status(path) -> dict:
    """Summary of a run directory: done, running, stale, missing realizations, wall time, largest errors.

    Returns a JSON-able dict with keys ``realizations`` (total), ``done``, ``running`` (list of dicts with k,
    host, pid, t, t_final), ``stale`` (claims of dead owners), ``checkpointed`` ({k: t}), ``missing``,
    ``wall_time`` (summed over done realizations, s), ``max_discarded_weight``, ``max_bond``, ``description``.
    """
    import h5py

    rd = RunDirectory.open(path)
    desc = rd.description
    done = rd.done()
    timeout = desc.run_options["claim_timeout"]
    running, stale = [], []
    for k, info in rd.claim_infos().items():
        if k in done:
            continue
        entry = {"k": k, "host": info.host, "pid": info.pid, "t": info.t, "t_final": info.t_final,
                 "heartbeat_age_s": round(time.time() - info.heartbeat, 1)}
        (running if info.alive(timeout) else stale).append(entry)
    ckpt = {}
    for k in rd.checkpointed():
        if k in done:
            continue
        with contextlib.suppress(OSError, KeyError, ValueError):
            with h5py.File(rd.checkpoint_path(k), "r") as f:
                ckpt[k] = float(json.loads(f.attrs["engine_state"])["t"])
    wall, max_dw, max_b = 0.0, 0.0, 0
    for k in done:
        with h5py.File(rd.result_path(k), "r") as f:
            wall += float(f.attrs["wall_time"])
            max_dw = max(max_dw, float(np.max(f["discarded_weight"][()])))
            max_b = max(max_b, int(np.max(f["max_bond"][()])))
    busy = {e["k"] for e in running}
    missing = [k for k in range(desc.realizations) if k not in done and k not in busy]
    return {"path": str(rd.path), "realizations": desc.realizations, "done": done, "running": running,
            "stale": stale, "checkpointed": ckpt, "missing": missing, "wall_time": wall,
            "max_discarded_weight": max_dw, "max_bond": max_b, "description": desc.to_dict()}


# ------------------------------------------------------------------------------------------- loading
class _Source:
    """Where an Ensemble's arrays come from: a list of realization files or one merged file."""

    def __init__(self, files: Sequence[Path] | None = None, merged: Path | None = None,
                 arrays: dict | None = None):
        self.files = list(files or [])
        self.merged = merged
        self.arrays = arrays

    def get(self, name: str) -> np.ndarray:
        import h5py

        if self.arrays is not None:
            return self.arrays[name]
        if self.merged is not None:
            with h5py.File(self.merged, "r") as f:
                if name not in f:
                    raise KeyError(name)
                return f[name][()]
        parts = []
        for p in self.files:
            with h5py.File(p, "r") as f:
                if name == "max_step":
                    parts.append(json.loads(f.attrs["engine"])["max_step"])
                elif name == "wall_time":
                    parts.append(float(f.attrs["wall_time"]))
                else:
                    if name not in f:
                        raise KeyError(name)
                    parts.append(f[name][()])
        return np.stack(parts) if parts else np.empty((0,))


class Ensemble:
    """All realizations of one run (a run directory or a merged file), loaded lazily.

    Attributes
    ----------
    times : ndarray (n_t,)
        Output times (units 1/J).
    L, site, w, probes
        Chain length, site of W (int), evolved operator, probes stored.
    realizations : ndarray (R,), int
        Realization indices present (sorted).
    weights : ndarray (R, n_t, L, 4)
        Single-site Pauli weights (I, X, Y, Z).
    right_weight : ndarray (R, n_t, L)
        Right-weight (front) profile.
    fields : ndarray (R, L)
        Fields h_i used (S^z units); zeros for the clean XXZ chain, NaN for the mixed-field Ising chain.
    couplings : ndarray (R, L-1)
    discarded_weight, max_bond : ndarray (R, n_t)
        Cumulative discarded weight and largest bond dimension per time.
    seeds : ndarray (R, 2)
        SeedSequence entropy (k, ensemble seed) of each realization.
    wall_time : ndarray (R,)
        Seconds per realization.
    description : dict
        The resolved run description.
    engine : dict
        chi, dt, order, cutoff, chunk, max_step (largest Trotter step used), svd_floor.
    convergence : dict or None
        Arrays of a bond-dimension convergence study (``fronts converge``), else None.
    missing : list of int
        Realizations of the description not (yet) present.
    """

    def __init__(self, source: _Source, realizations: np.ndarray, description: dict, engine: dict, meta: dict,
                 path: Path | None = None, convergence: dict | None = None):
        self._source = source
        self._cache: dict[str, np.ndarray] = {}
        self.realizations = np.asarray(realizations, dtype=int)
        self.description = description
        self._desc = parse_description(description)
        self.engine = engine
        self.meta = meta
        self.path = path
        self.convergence = convergence
        self.times = self._desc.times
        self.L = self._desc.L
        self.site = self._desc.site
        self.w = self._desc.w
        self.probes = self._desc.probes
        self.state = self._desc.state_kind
        self.state_names = self._desc.state_names
        self.model = self._desc.kind
        self.version = meta.get("version")
        self.conventions = meta.get("conventions")
        self.missing = [k for k in range(self._desc.realizations) if k not in set(self.realizations.tolist())]

    def __len__(self) -> int:
        return int(self.realizations.size)

    def __repr__(self) -> str:
        return (f"<Ensemble {self.model} L={self.L} w={self.w} site={self.site}: {len(self)} of "
                f"{self._desc.realizations} realizations, {self.times.size} times up to t={self.times[-1]:g}, "
                f"chi={self.engine.get('chi')}{', with convergence study' if self.convergence else ''}>")

    def _get(self, name: str) -> np.ndarray:
        if name not in self._cache:
            if len(self) == 0:
                raise InputError("the ensemble holds no realizations yet")
            self._cache[name] = self._source.get(name)
        return self._cache[name]

    # ---------------------------------------------------------------- arrays
    def otoc(self, v: str = "Z") -> np.ndarray:
        """C(r, t) with probe v, shape (R, n_t, L) (the mean over basis states for product-state runs)."""
        if not isinstance(v, str) or v.upper() not in ("X", "Y", "Z"):
            raise InputError(f"probe v must be one of 'X', 'Y', 'Z', got {v!r}")
        v = v.upper()
        if v not in self.probes:
            if self.state == "infinite_temperature":
                from .readout import otoc_from_weights

                return otoc_from_weights(self.weights, v)
            raise InputError(f"probe {v!r} was not stored; this run stores {', '.join(self.probes)} "
                             "(operators.v of the description)")
        return self._get(f"otoc/{v}")

    def state_otoc(self, v: str = "Z") -> np.ndarray:
        """Product-state OTOCs of each basis state, shape (R, samples, n_t, L) (product-state runs only)."""
        if self.state == "infinite_temperature":
            raise InputError("this run is at infinite temperature; it has no product-state OTOCs")
        if v not in self.probes:
            raise InputError(f"probe {v!r} was not stored; this run stores {', '.join(self.probes)}")
        return self._get(f"state_otoc/{v}")

    @property
    def bits(self) -> np.ndarray | None:
        """Basis states of product-state runs, shape (R, samples), str; None at infinite temperature."""
        if self.state == "infinite_temperature":
            return None
        raw = self._get("bits")
        return np.vectorize(lambda b: b.decode() if isinstance(b, bytes) else str(b))(raw)

    weights = property(lambda self: self._get("weights"), doc="(R, n_t, L, 4) single-site Pauli weights")
    right_weight = property(lambda self: self._get("right_weight"), doc="(R, n_t, L) right-weight profile")
    fields = property(lambda self: self._get("fields"), doc="(R, L) fields used (S^z units; NaN: none)")
    couplings = property(lambda self: self._get("couplings"), doc="(R, L-1) couplings used")
    discarded_weight = property(lambda self: self._get("discarded_weight"), doc="(R, n_t) discarded weight")
    max_bond = property(lambda self: self._get("max_bond"), doc="(R, n_t) largest bond dimension")

    def _optional(self, name: str) -> np.ndarray | None:
        try:
            return self._get(name)
        except KeyError:  # files written before these arrays existed
            return None

    bond_discarded = property(lambda self: self._optional("bond_discarded"),
                              doc="(R, n_t, L-1) cumulative discarded weight per bond, or None (older files)")
    bond_entropy = property(lambda self: self._optional("bond_entropy"),
                            doc="(R, n_t, L-1) operator entanglement entropy per bond (nats), or None")
    seeds = property(lambda self: self._get("seed"), doc="(R, 2) SeedSequence entropy (k, seed)")
    wall_time = property(lambda self: np.asarray(self._get("wall_time"), dtype=float), doc="(R,) seconds")

    # ---------------------------------------------------------------- export
    def to_xarray(self):
        """An ``xarray.Dataset`` with dims (realization, time, site, letter); needs the ``xarray`` extra."""
        xr = require("xarray", "xarray")
        R = self.realizations
        data = {f"otoc_{v}": (("realization", "time", "site"), self.otoc(v)) for v in self.probes}
        data.update({
            "weights": (("realization", "time", "site", "letter"), self.weights),
            "right_weight": (("realization", "time", "site"), self.right_weight),
            "discarded_weight": (("realization", "time"), self.discarded_weight),
            "max_bond": (("realization", "time"), self.max_bond),
            **{name: (("realization", "time", "bond"), a) for name in OPTIONAL
               if (a := self._optional(name)) is not None},
            "fields": (("realization", "site"), self.fields),
            "couplings": (("realization", "bond"), self.couplings),
            "wall_time": (("realization",), self.wall_time),
        })
        return xr.Dataset(data, coords={"realization": R, "time": self.times, "site": np.arange(self.L),
                                        "bond": np.arange(self.L - 1), "letter": list(LETTER_AXIS)},
                          attrs={"description": _json(self.description), "engine": _json(self.engine),
                                 "version": str(self.version), "conventions": str(self.conventions),
                                 "w": self.w, "w_site": self.site})

    def write(self, path, overwrite: bool = False) -> Path:
        """Write everything into one merged HDF5 file (readable by :func:`load`)."""
        path = Path(path)
        if path.exists() and not overwrite:
            raise RunDirectoryError(f"{path}: exists; choose another output file, or replace it with "
                                    "overwrite=True (fronts merge --force); nothing was written")
        if len(self) == 0:
            raise InputError("nothing to merge: the run holds no finished realizations yet")
        version, conventions = _package_info()
        names = [f"otoc/{v}" for v in self.probes] + ["weights", "right_weight", "discarded_weight",
                                                      "max_bond", "fields", "couplings", "seed"]
        names += [n for n in OPTIONAL if self._optional(n) is not None]
        if self.state != "infinite_temperature":
            names += ["bits"] + [f"state_otoc/{v}" for v in self.probes]

        def write(f):
            f.attrs["format"] = MERGED_FORMAT
            f.attrs["version"] = version
            f.attrs["conventions"] = conventions
            f.attrs["description"] = _json(self.description)
            f.attrs["fingerprint"] = self._desc.fingerprint()
            f.attrs["engine"] = _json(self.engine)
            f.attrs["source_versions"] = _json(sorted({str(x) for x in self.meta.get("versions", [self.version])}))
            for name, data in (("times", self.times), ("realizations", self.realizations),
                               ("wall_time", self.wall_time), ("max_step", self._get("max_step"))):
                _describe(f.create_dataset(name, data=data), name, merged=True)
            for name in names:
                _describe(f.create_dataset(name, data=self._get(name), compression="gzip", shuffle=True), name,
                          merged=True)
            if self.convergence is not None:
                _write_convergence_group(f.create_group("convergence"), self.convergence)

        return atomic_h5(path, write)


def _write_convergence_group(g, conv: dict) -> None:
    for key, value in conv.items():
        arr = np.asarray(value)
        if arr.dtype.kind in "biuf" and arr.ndim >= 1:
            g.create_dataset(key, data=arr)
        elif arr.dtype.kind in "biuf":
            g.attrs[key] = arr[()]
        else:
            g.attrs[key] = _json(value if not isinstance(value, np.ndarray) else value.tolist())


def _read_convergence_group(g) -> dict:
    out: dict[str, Any] = {key: g[key][()] for key in g}
    for key, value in g.attrs.items():
        if isinstance(value, str):
            try:
                out[key] = json.loads(value)
            except ValueError:
                out[key] = value
        else:
            out[key] = value.item() if hasattr(value, "item") else value
    return out


def _load_dir(path: Path) -> Ensemble:
    import h5py

    rd = RunDirectory.open(path)
    done = rd.done()
    files = [rd.result_path(k) for k in done]
    meta = RunDirectory._read_run_file(rd.path)
    engine = dict(rd.description.engine)
    versions = set()
    if files:
        max_step = 0.0
        for p in files:
            with h5py.File(p, "r") as f:
                e = json.loads(f.attrs["engine"])
                max_step = max(max_step, float(e.get("max_step", 0.0)))
                versions.add(str(f.attrs["version"]))
        engine.update({k: v for k, v in e.items() if k != "max_step"})
        engine["max_step"] = max_step
    info = {"version": meta.get("version"), "conventions": meta.get("conventions"), "versions": sorted(versions)}
    return Ensemble(_Source(files=files), np.asarray(done, dtype=int), meta["description"], engine, info,
                    path=rd.path)


def _load_merged(path: Path) -> Ensemble:
    import h5py

    try:
        with h5py.File(path, "r") as f:
            fmt = f.attrs.get("format")
            if fmt == RESULT_FORMAT:  # a single realization file
                desc = json.loads(f.attrs["description"])
                engine = json.loads(f.attrs["engine"])
                k = int(f.attrs["realization"])
                meta = {"version": f.attrs["version"], "conventions": f.attrs["conventions"]}
                return Ensemble(_Source(files=[path]), np.array([k]), desc, engine, meta, path=path)
            if fmt != MERGED_FORMAT:
                raise RunDirectoryError(f"{path}: not a file written by mpo_fronts (format {fmt!r})")
            desc = json.loads(f.attrs["description"])
            engine = json.loads(f.attrs["engine"])
            engine["max_step"] = float(np.max(f["max_step"][()])) if f["max_step"].size else 0.0
            reals = f["realizations"][()]
            meta = {"version": f.attrs["version"], "conventions": f.attrs["conventions"],
                    "versions": json.loads(f.attrs.get("source_versions", "[]"))}
            conv = _read_convergence_group(f["convergence"]) if "convergence" in f else None
    except OSError as exc:
        raise RunDirectoryError(f"{path}: cannot read the file as HDF5 ({exc})") from None
    return Ensemble(_Source(merged=path), reals, desc, engine, meta, path=path, convergence=conv)


def convergence_runs(path) -> dict[int, Path]:
    """The chi -> run directory map of a convergence study directory (``chi_016`` ...)."""
    out = {}
    p = Path(path)
    with contextlib.suppress(OSError):
        for child in p.iterdir():
            if child.is_dir() and child.name.startswith("chi_") and child.name[4:].isdigit() \
                    and (child / RUN_FILE).is_file():
                out[int(child.name[4:])] = child
    return dict(sorted(out.items()))


def read_convergence(path) -> dict | None:
    """The arrays of DIR/convergence.h5, or None."""
    import h5py

    f_path = Path(path) / CONVERGENCE_FILE
    if not f_path.is_file():
        return None
    with h5py.File(f_path, "r") as f:
        return _read_convergence_group(f)


def load(path) -> Ensemble:
    """Load a run directory, a merged file, a realization file, or a convergence study directory.

    Parameters
    ----------
    path : str or Path
        A run directory (``fronts run --out DIR``), a merged file (``fronts merge``), or a convergence study
        directory (``fronts converge --out DIR``: the largest chi is loaded and ``.convergence`` attached).

    Returns
    -------
    Ensemble
        See :class:`Ensemble`; arrays are read on first access.

    Examples
    --------
    >>> ens = load("runs/thermal")                              # doctest: +SKIP
    >>> ens.otoc("X").shape  # (realizations, times, sites)    # doctest: +SKIP
    """
    p = Path(path)
    if not p.exists():
        raise RunDirectoryError(f"{p}: no such run directory or file")
    if p.is_dir():
        if (p / RUN_FILE).is_file():
            return _load_dir(p)
        runs = convergence_runs(p)
        if runs:
            ens = _load_dir(runs[max(runs)])
            ens.convergence = read_convergence(p)
            ens.path = p.resolve()
            return ens
        raise RunDirectoryError(f"{p}: not a run directory (no {RUN_FILE}) nor a convergence study (no chi_* "
                                "folders)")
    return _load_merged(p)


def merge(sources: Iterable, out, overwrite: bool = False) -> tuple[Path, Ensemble]:
    """Merge run directories / merged files of the same description into one file.

    Realizations present in several sources must agree (identical arrays); they are stored once.

    Returns
    -------
    (path, ensemble)
        The file written and the merged :class:`Ensemble` (in memory).
    """
    sources = [Path(s) for s in sources]
    if not sources:
        raise InputError("merge needs at least one run directory or file")
    out = Path(out)
    if out.exists() and not overwrite:
        raise RunDirectoryError(f"{out}: exists; choose another output file, or replace it with overwrite=True "
                                "(fronts merge --force); nothing was written")
    ens = [load(s) for s in sources]
    descs = [parse_description(e.description) for e in ens]
    for src, e, d in zip(sources[1:], ens[1:], descs[1:]):
        if d.fingerprint() != descs[0].fingerprint():
            a, b = (dict(x.to_dict()) for x in (descs[0], d))
            for x in (a, b):
                x.pop("run", None)
                x["ensemble"] = {k: v for k, v in x.get("ensemble", {}).items() if k != "realizations"}
            lines = _diff(a, b, names=(str(sources[0]), str(src))) or ["(the descriptions differ)"]
            raise RunDirectoryError(f"{sources[0]} and {src} hold runs of different descriptions and cannot be "
                                    f"merged; nothing was written. Differences: {'; '.join(lines[:6])}"
                                    f"{' ...' if len(lines) > 6 else ''}")
    out.parent.mkdir(parents=True, exist_ok=True)
    if len(ens) == 1:
        merged = ens[0]
    else:
        merged = _combine(ens)
    return merged.write(out, overwrite=overwrite), merged


def _combine(ens: list[Ensemble]) -> Ensemble:
    names = [f"otoc/{v}" for v in ens[0].probes] + ["weights", "right_weight", "discarded_weight", "max_bond",
                                                    "fields", "couplings", "seed", "wall_time", "max_step"]
    names += [n for n in OPTIONAL if all(e._optional(n) is not None for e in ens)]
    if ens[0].state != "infinite_temperature":
        names += ["bits"] + [f"state_otoc/{v}" for v in ens[0].probes]
    order: dict[int, tuple[int, int]] = {}
    for i, e in enumerate(ens):
        for j, k in enumerate(e.realizations.tolist()):
            if k in order:
                a, b = order[k]
                for name in (f"otoc/{v}" for v in e.probes):
                    if not np.array_equal(ens[a]._get(name)[b], e._get(name)[j]):
                        raise RunDirectoryError(f"realization {k} differs between {ens[a].path} and {e.path}; "
                                                "the sources were not computed identically")
            else:
                order[k] = (i, j)
    ks = sorted(order)
    arrays = {}
    for name in names:
        arrays[name] = np.stack([np.asarray(ens[order[k][0]]._get(name))[order[k][1]] for k in ks]) if ks \
            else np.empty((0,))
    desc = dict(ens[0].description)
    desc["ensemble"] = dict(desc["ensemble"], realizations=max(e._desc.realizations for e in ens))
    engine = dict(ens[0].engine, max_step=max(float(e.engine.get("max_step", 0.0)) for e in ens))
    meta = {"version": ens[0].version, "conventions": ens[0].conventions,
            "versions": sorted({str(v) for e in ens for v in e.meta.get("versions", [e.version])})}
    return Ensemble(_Source(arrays=arrays), np.asarray(ks), desc, engine, meta, path=None)
