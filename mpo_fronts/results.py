"""Loading and merging results: :class:`Ensemble` (every realization of a run, loaded lazily), :func:`load`
(run directory, merged file or convergence study) and :func:`merge`."""

from __future__ import annotations

import contextlib
import json
from pathlib import Path
from typing import Any, Iterable, Sequence

import numpy as np

from .atomic import to_json, package_info, atomic_h5
from .config import parse_description
from .errors import InputError, RunDirectoryError, require
from .rundir import (CONVERGENCE_FILE, LETTER_AXIS, MERGED_FORMAT, OPTIONAL, RESULT_FORMAT, RUN_FILE, RunDirectory,
                     describe_dataset, description_diff, evolution_attr)

__all__ = ["Ensemble", "load", "merge", "convergence_runs", "read_convergence", "write_convergence_group",
           "read_convergence_group", "combine_evolution"]


def combine_evolution(base: dict, records: Sequence[dict]) -> dict:
    """The evolution record of an ensemble from those of its realizations (or of merged ensembles).

    Settings (chi, order, ...) are the same in every realization; what the driver chose per realization is not:
    with dt = "auto" each realization gets its own step. The combined record keeps the worst case and the
    range: ``max_step`` and ``dt_used`` are the largest, ``dt_used_range`` is [smallest, largest],
    ``trotter_estimate`` is that of the realization claiming the largest Trotter error, ``splits`` are summed,
    and an engine (``symmetry_used``, ``engine``) that differs between realizations is listed as "a+b".
    ``base`` (the description's settings) is updated; records may themselves be combined ones.
    """
    out = dict(base)
    if not records:
        return out
    for r in records:
        out.update({k: v for k, v in r.items() if k not in ("max_step", "dt_used", "dt_used_range", "splits",
                                                            "trotter_estimate", "symmetry_used", "engine")})
    out["max_step"] = max(float(r.get("max_step", 0.0)) for r in records)
    ranges = [r.get("dt_used_range") or [r["dt_used"]] * 2 for r in records if "dt_used" in r]
    if ranges:
        out["dt_used"] = max(hi for _, hi in ranges)
        out["dt_used_range"] = [min(lo for lo, _ in ranges), out["dt_used"]]
    if any("splits" in r for r in records):
        total: dict = {}
        for r in records:
            for k, v in dict(r.get("splits") or {}).items():
                total[k] = total.get(k, 0) + int(v)
        out["splits"] = total
    est = [r["trotter_estimate"] for r in records if r.get("trotter_estimate")]
    if est:
        out["trotter_estimate"] = max(est, key=lambda e: float(e.get("predicted_error", 0.0)))
    for key in ("symmetry_used", "engine"):
        vals = sorted({p for r in records if key in r for p in str(r[key]).split("+")})
        if vals:
            out[key] = "+".join(vals)
    return out


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
                    parts.append(evolution_attr(f)["max_step"])
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
    evolution : dict
        The evolution settings (chi, dt, order, cutoff, chunk, truncation, ...), ``max_step`` (largest Trotter
        step used) and what the driver recorded (``dt_used``, ``symmetry_used``, ``splits``, ...); also under
        its name before 0.2, ``engine``.
    state_kind : str
        The kind of initial state (``description["state"]["kind"]``: 'infinite_temperature', ...); also under
        its name before 0.2, ``state``.
    convergence : dict or None
        Arrays of a bond-dimension convergence study (``fronts converge``), else None.
    missing : list of int
        Realizations of the description not (yet) present.
    """

    def __init__(self, source: _Source, realizations: np.ndarray, description: dict, evolution: dict, meta: dict,
                 path: Path | None = None, convergence: dict | None = None):
        self._source = source
        self._cache: dict[str, np.ndarray] = {}
        self.realizations = np.asarray(realizations, dtype=int)
        self.description = description
        self._desc = parse_description(description)
        self.evolution = evolution
        self.meta = meta
        self.path = path
        self.convergence = convergence
        self.times = self._desc.times
        self.L = self._desc.L
        self.site = self._desc.site
        self.w = self._desc.w
        self.probes = self._desc.probes
        self.state_kind = self._desc.state_kind
        self.state_names = self._desc.state_names
        self.model = self._desc.kind
        self.version = meta.get("version")
        self.conventions = meta.get("conventions")
        self.missing = [k for k in range(self._desc.realizations) if k not in set(self.realizations.tolist())]

    @property
    def engine(self) -> dict:
        """The evolution settings (:attr:`evolution`) under their name before 0.2."""
        return self.evolution

    @property
    def state(self) -> str:
        """The kind of initial state (:attr:`state_kind`) under its name before 0.2."""
        return self.state_kind

    def __len__(self) -> int:
        return int(self.realizations.size)

    def __repr__(self) -> str:
        return (f"<Ensemble {self.model} L={self.L} w={self.w} site={self.site}: {len(self)} of "
                f"{self._desc.realizations} realizations, {self.times.size} times up to t={self.times[-1]:g}, "
                f"chi={self.evolution.get('chi')}{', with convergence study' if self.convergence else ''}>")

    def _get(self, name: str) -> np.ndarray:
        if name not in self._cache:
            if len(self) == 0:
                raise InputError("the ensemble holds no realizations yet")
            self._cache[name] = self._source.get(name)
        return self._cache[name]

    # ---------------------------------------------------------------- arrays
    def otoc(self, v: str = "Z", estimator: str = "normalized") -> np.ndarray:
        """C(r, t) with probe v, shape (R, n_t, L) (the mean over basis states for product-state runs).

        ``estimator='saturated'`` applies :func:`mpo_fronts.readout.estimate_otoc` to every realization (the
        discarded weight counted as scrambled where the kept profile has saturated; infinite temperature only);
        the default is C as stored.
        """
        from .readout import ESTIMATORS, estimate_otoc, otoc_from_weights

        if not isinstance(v, str) or v.upper() not in ("X", "Y", "Z"):
            raise InputError(f"probe v must be one of 'X', 'Y', 'Z', got {v!r}")
        if estimator not in ESTIMATORS:
            raise InputError(f"estimator must be one of {', '.join(map(repr, ESTIMATORS))}, got {estimator!r}",
                             arg="estimator")
        if estimator != "normalized" and self.state_kind != "infinite_temperature":
            raise InputError("estimator='saturated' is defined for infinite temperature only; this run is "
                             f"{self.state_kind!r}", arg="estimator")
        v = v.upper()
        if v not in self.probes:
            if self.state_kind != "infinite_temperature":
                raise InputError(f"probe {v!r} was not stored; this run stores {', '.join(self.probes)} "
                                 "(operators.v of the description)")
            C = otoc_from_weights(self.weights, v)
        else:
            C = self._get(f"otoc/{v}")
        return C if estimator == "normalized" else estimate_otoc(C, self.discarded_weight, estimator)

    def state_otoc(self, v: str = "Z") -> np.ndarray:
        """Product-state OTOCs of each basis state, shape (R, samples, n_t, L) (product-state runs only)."""
        if self.state_kind == "infinite_temperature":
            raise InputError("this run is at infinite temperature; it has no product-state OTOCs")
        if v not in self.probes:
            raise InputError(f"probe {v!r} was not stored; this run stores {', '.join(self.probes)}")
        return self._get(f"state_otoc/{v}")

    @property
    def bits(self) -> np.ndarray | None:
        """Basis states of product-state runs, shape (R, samples), str; None at infinite temperature."""
        if self.state_kind == "infinite_temperature":
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
                          attrs={"description": to_json(self.description), "evolution": to_json(self.evolution),
                                 "version": str(self.version), "conventions": str(self.conventions),
                                 "w": self.w, "w_site": self.site})

    def write(self, path, overwrite: bool = False) -> Path:
        """Write everything into one merged HDF5 file (readable by :func:`load`)."""
        path = Path(path)
        if path.exists() and not overwrite:
            raise RunDirectoryError(f"{path}: exists; choose another output file, or replace it with "
                                    "overwrite=True; nothing was written", arg="overwrite")
        if len(self) == 0:
            raise InputError("nothing to merge: the run holds no finished realizations yet")
        version, conventions = package_info()
        names = [f"otoc/{v}" for v in self.probes] + ["weights", "right_weight", "discarded_weight",
                                                      "max_bond", "fields", "couplings", "seed"]
        names += [n for n in OPTIONAL if self._optional(n) is not None]
        if self.state_kind != "infinite_temperature":
            names += ["bits"] + [f"state_otoc/{v}" for v in self.probes]

        def write(f):
            f.attrs["format"] = MERGED_FORMAT
            f.attrs["version"] = version
            f.attrs["conventions"] = conventions
            f.attrs["description"] = to_json(self.description)
            f.attrs["fingerprint"] = self._desc.fingerprint()
            f.attrs["evolution"] = to_json(self.evolution)
            f.attrs["source_versions"] = to_json(sorted({str(x) for x in self.meta.get("versions", [self.version])}))
            for name, data in (("times", self.times), ("realizations", self.realizations),
                               ("wall_time", self.wall_time), ("max_step", self._get("max_step"))):
                describe_dataset(f.create_dataset(name, data=data), name, merged=True)
            for name in names:
                describe_dataset(f.create_dataset(name, data=self._get(name), compression="gzip", shuffle=True), name,
                          merged=True)
            if self.convergence is not None:
                write_convergence_group(f.create_group("convergence"), self.convergence)

        return atomic_h5(path, write)


def write_convergence_group(g, conv: dict) -> None:
    """Write the arrays of a convergence study (:func:`mpo_fronts.trust.bond_convergence`) into an HDF5 group:
    numeric arrays as datasets, numbers as attributes, anything else as JSON attributes."""
    for key, value in conv.items():
        arr = np.asarray(value)
        if arr.dtype.kind in "biuf" and arr.ndim >= 1:
            g.create_dataset(key, data=arr)
        elif arr.dtype.kind in "biuf":
            g.attrs[key] = arr[()]
        else:
            g.attrs[key] = to_json(value if not isinstance(value, np.ndarray) else value.tolist())


def read_convergence_group(g) -> dict:
    """The convergence arrays of an HDF5 group written by :func:`write_convergence_group`."""
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


_write_convergence_group = write_convergence_group  # its private name, still re-exported by store.py


def _load_dir(path: Path) -> Ensemble:
    import h5py

    rd = RunDirectory.open(path)
    done = rd.done()
    files = [rd.result_path(k) for k in done]
    meta = RunDirectory.read_run_file(rd.path)
    evolution = dict(rd.description.engine)
    versions = set()
    if files:
        records = []
        for p in files:
            with h5py.File(p, "r") as f:
                records.append(evolution_attr(f))
                versions.add(str(f.attrs["version"]))
        evolution = combine_evolution(evolution, records)
    info = {"version": meta.get("version"), "conventions": meta.get("conventions"), "versions": sorted(versions)}
    return Ensemble(_Source(files=files), np.asarray(done, dtype=int), meta["description"], evolution, info,
                    path=rd.path)


def _load_merged(path: Path) -> Ensemble:
    import h5py

    try:
        with h5py.File(path, "r") as f:
            fmt = f.attrs.get("format")
            if fmt == RESULT_FORMAT:  # a single realization file
                desc = json.loads(f.attrs["description"])
                evolution = evolution_attr(f)
                k = int(f.attrs["realization"])
                meta = {"version": f.attrs["version"], "conventions": f.attrs["conventions"]}
                return Ensemble(_Source(files=[path]), np.array([k]), desc, evolution, meta, path=path)
            if fmt != MERGED_FORMAT:
                raise RunDirectoryError(f"{path}: not a file written by mpo_fronts (format {fmt!r})")
            desc = json.loads(f.attrs["description"])
            evolution = evolution_attr(f)
            evolution["max_step"] = float(np.max(f["max_step"][()])) if f["max_step"].size else 0.0
            reals = f["realizations"][()]
            meta = {"version": f.attrs["version"], "conventions": f.attrs["conventions"],
                    "versions": json.loads(f.attrs.get("source_versions", "[]"))}
            conv = read_convergence_group(f["convergence"]) if "convergence" in f else None
    except OSError as exc:
        raise RunDirectoryError(f"{path}: cannot read the file as HDF5 ({exc})") from None
    return Ensemble(_Source(merged=path), reals, desc, evolution, meta, path=path, convergence=conv)


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
        return read_convergence_group(f)


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
        raise RunDirectoryError(f"{out}: exists; choose another output file, or replace it with overwrite=True; "
                                "nothing was written", arg="overwrite")
    ens = [load(s) for s in sources]
    descs = [parse_description(e.description) for e in ens]
    for src, e, d in zip(sources[1:], ens[1:], descs[1:]):
        if d.fingerprint() != descs[0].fingerprint():
            a, b = (dict(x.to_dict()) for x in (descs[0], d))
            for x in (a, b):
                x.pop("run", None)
                x["ensemble"] = {k: v for k, v in x.get("ensemble", {}).items() if k != "realizations"}
            lines = description_diff(a, b, names=(str(sources[0]), str(src))) or ["(the descriptions differ)"]
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
    if ens[0].state_kind != "infinite_temperature":
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
    evolution = combine_evolution(ens[0].evolution, [e.evolution for e in ens])
    meta = {"version": ens[0].version, "conventions": ens[0].conventions,
            "versions": sorted({str(v) for e in ens for v in e.meta.get("versions", [e.version])})}
    return Ensemble(_Source(arrays=arrays), np.asarray(ks), desc, evolution, meta, path=None)
