"""Run directories: run.json, one HDF5 file per finished realization, claims, checkpoints and the status.

See :mod:`mpo_fronts.store` for the layout; this module writes and reads it for one run.
"""

from __future__ import annotations

import contextlib
import fcntl
import json
import os
import socket
import threading
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Callable, ClassVar

import numpy as np

from .atomic import atomic_text, to_json, package_info, tmp_name, atomic_h5
from .config import RunDescription, parse_description
from .errors import RunDirectoryError

__all__ = ["RunDirectory", "Claim", "ClaimInfo", "RunStatus", "run_status", "RUN_FILE", "RESULT_FORMAT",
           "MERGED_FORMAT", "CHECKPOINT_FORMAT", "CONVERGENCE_FILE", "LETTER_AXIS", "DATASETS", "OPTIONAL",
           "describe_dataset", "description_diff", "evolution_attr"]

RUN_FILE = "run.json"
RESULT_FORMAT = "mpo_fronts.realization/1"
MERGED_FORMAT = "mpo_fronts.merged/1"
CHECKPOINT_FORMAT = "mpo_fronts.checkpoint/1"
CONVERGENCE_FILE = "convergence.h5"
LETTER_AXIS = ("I", "X", "Y", "Z")


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
        tmp = tmp_name(path)
        self._fd = os.open(tmp, os.O_RDWR | os.O_CREAT | os.O_EXCL, 0o644)
        self._write()
        os.replace(tmp, path)  # the caller holds the directory lock
        self._thread = threading.Thread(target=self._beat, name=f"fronts-claim-{k}", daemon=True)
        self._thread.start()

    SIZE = 512  # fixed-size content: one pwrite replaces it whole, so a reader never sees a mixture

    def _content(self) -> bytes:
        text = to_json({"k": self.k, "host": socket.gethostname(), "pid": os.getpid(), "run_id": self.run_id,
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
def description_diff(a, b, prefix: str = "", names: tuple[str, str] = ("stored", "given")) -> list[str]:
    """Dotted keys where two nested dicts differ, with both values (shortened)."""
    out = []
    if isinstance(a, dict) and isinstance(b, dict):
        for key in sorted(set(a) | set(b)):
            out += description_diff(a.get(key, "<unset>"), b.get(key, "<unset>"), f"{prefix}.{key}" if prefix else key, names)
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
    def read_run_file(path: Path) -> dict:
        """The parsed run.json of a run directory (:class:`RunDirectoryError` when it cannot be read)."""
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
        meta = cls.read_run_file(p)
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
            raise RunDirectoryError(f"{p}: exists and is not a directory; choose another output directory",
                                    arg="out")
        if p.is_dir() and not (p / RUN_FILE).is_file():
            # a run being created right now holds only our lock file and the temporary run.json
            if any(not (child.name == ".lock" or child.name.startswith(f".{RUN_FILE}.")) for child in p.iterdir()):
                raise RunDirectoryError(f"{p}: exists, is not empty and is not a run directory (no {RUN_FILE}); "
                                        "choose a new or empty output directory", arg="out")
            return
        if p.is_dir():
            meta = RunDirectory.read_run_file(p)
            if meta.get("fingerprint") != description.fingerprint():
                stored = meta.get("description", {})
                new = description.to_dict()
                for d in (stored, new):
                    if isinstance(d, dict):
                        d.pop("run", None)
                        d.get("ensemble", {}).pop("realizations", None)
                lines = description_diff(stored, new) or ["(the descriptions differ)"]
                raise RunDirectoryError(f"{p} holds a run of a different description; nothing was changed. "
                                        f"Differences: {'; '.join(lines[:6])}"
                                        f"{' ...' if len(lines) > 6 else ''}. Use another output directory, "
                                        f"or resume the stored run with its own description, {p / RUN_FILE} "
                                        f"(on the command line: fronts run {p / RUN_FILE} --out {p})")

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
        version, conventions = package_info()
        if (p / RUN_FILE).is_file():
            stored = parse_description(self.read_run_file(p)["description"])
            if description.realizations <= stored.realizations:
                # keep the stored (larger) count; this session's [run] options apply
                self.description = description.replace(ensemble__realizations=stored.realizations)
                return
        atomic_text(p / RUN_FILE, json.dumps({
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
        version, conventions = package_info()

        def write(f):
            f.attrs["format"] = RESULT_FORMAT
            f.attrs["version"] = version
            f.attrs["conventions"] = conventions
            f.attrs["description"] = to_json(desc.to_dict())
            f.attrs["fingerprint"] = desc.fingerprint()
            f.attrs["realization"] = k
            f.attrs["evolution"] = to_json(result["engine"])  # evolution settings ("engine" before 0.2)
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


def describe_dataset(ds, name: str, merged: bool = False) -> None:
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
        describe_dataset(f.create_dataset(name, data=data), name)

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
def evolution_attr(f) -> dict:
    """The evolution settings stored in a result or merged file (attribute ``evolution``; ``engine`` before 0.2)."""
    return json.loads(f.attrs["evolution"] if "evolution" in f.attrs else f.attrs["engine"])


@dataclass(frozen=True)
class RunStatus:
    """What a run directory holds now (the result of :func:`run_status`).

    Attributes
    ----------
    path : str
        The run directory.
    n_realizations : int
        Realizations the description asks for (indices 0 .. n_realizations - 1).
    done : list of int
        Indices with a finished result file.
    running : list of dict
        Live claims: ``k``, ``host``, ``pid``, ``t`` (progress), ``t_final``, ``heartbeat_age_s``.
    stale : list of dict
        Claims whose owner is gone or silent (same keys); a rerun takes them over.
    checkpointed : dict
        Index -> time t reached by the checkpoint of an unfinished realization.
    missing : list of int
        Indices neither done nor held by a live claim.
    wall_time : float
        Wall time summed over the done realizations (s).
    largest_discarded_weight : float
        Largest cumulative discarded weight over the done realizations and times (fraction of the Frobenius
        weight).
    largest_bond : int
        Largest bond dimension reached by a done realization.
    description : dict
        The resolved run description (``RunDescription.to_dict()``).

    Read access by key (``st["done"]``) keeps the dict spelling of 0.1.0 working, including its names
    ``realizations`` (= ``n_realizations``), ``max_discarded_weight`` and ``max_bond``; :meth:`to_dict` is the
    JSON form (``fronts status --json``), with those names too.
    """

    path: str
    n_realizations: int
    done: list
    running: list
    stale: list
    checkpointed: dict
    missing: list
    wall_time: float
    largest_discarded_weight: float
    largest_bond: int
    description: dict

    #: Names of 0.1.0 -> field.
    ALIASES: ClassVar[dict[str, str]] = {"realizations": "n_realizations",
                                         "max_discarded_weight": "largest_discarded_weight",
                                         "max_bond": "largest_bond"}

    def keys(self) -> list[str]:
        """The field names, then the names of 0.1.0 (in the order of the 0.1.0 dict, then the new ones)."""
        return ["path", "realizations", "done", "running", "stale", "checkpointed", "missing", "wall_time",
                "largest_discarded_weight", "largest_bond", "max_discarded_weight", "max_bond", "description",
                "n_realizations"]

    def __getitem__(self, key: str):
        if not isinstance(key, str) or key not in self.keys():
            raise KeyError(key)
        return getattr(self, self.ALIASES.get(key, key))

    def __contains__(self, key) -> bool:
        return key in self.keys()

    def get(self, key: str, default=None):
        return self[key] if key in self else default

    def to_dict(self) -> dict[str, Any]:
        """A JSON-able dict under every name of :meth:`keys` (the ``checkpointed`` keys as strings)."""
        d = {k: self[k] for k in self.keys()}
        d["checkpointed"] = {str(k): t for k, t in self.checkpointed.items()}
        return d


def run_status(path) -> RunStatus:
    """Summary of a run directory: done, running, stale, missing realizations, wall time, largest errors.

    Returns a :class:`RunStatus` (read by attribute, or by key as the dict of 0.1.0).
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
    return RunStatus(path=str(rd.path), n_realizations=desc.realizations, done=done, running=running, stale=stale,
                     checkpointed=ckpt, missing=missing, wall_time=wall, largest_discarded_weight=max_dw,
                     largest_bond=max_b, description=desc.to_dict())
