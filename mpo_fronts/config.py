"""Reading and validating a run description (TOML), and the model of each disorder realization.

A run description says which chain, which operators, which initial state, which output times, which engine
settings and how many disorder realizations to compute. Everything is validated before any work starts; every
error is a :class:`mpo_fronts.errors.ConfigError` whose ``key`` is the dotted key path (``engine.chi``), whose
message says what was expected and, for misspelt keys, suggests the closest valid one.

Tables and keys (defaults in brackets)::

    [model]       kind = "xxz" | "mixed_field_ising"    (required)
                  L                                      (required, integer >= 2)
                  xxz:  J [1.0], delta [1.0], W [0.0] (box disorder h_i in [-W, W], S^z units),
                        fields (one list of L values for all realizations, or one list per realization;
                        excludes W), couplings (one list of L-1 values, or one list per realization)
                  mixed_field_ising (Pauli units): J [1.0], g [1.05], h [0.5]
    [operators]   w ["Z"], site [0] (integer or "center" = L // 2), v [["X", "Y", "Z"]] (probes to store)
    [state]       kind ["infinite_temperature"] | "product" (bits = "0101..." or a list of bitstrings, '0' = spin
                  up, and/or configurations = named families, see CONFIGURATIONS; computed side by side)
                  | "random_product" (samples [1] random basis states per realization)
    [times]       values = [...] (strictly increasing, >= 0), or start, stop, num, spacing ["log"] | "linear"
    [evolution]   chi [64], dt [0.05], order [2], cutoff [0.0], chunk [20], truncation ["svd"] (or "rsvd", "eigh"),
                  symmetry ["auto"] (or "z2", "u1": the engine's symmetry blocks; "u1" for model.kind = "xxz"
                  and operators.w = "Z" only), gate_update ["svd"] (or "qr": the U(1) engine's faster gate
                  truncation, only where the U(1) engine runs)
                  (see mpo_fronts.settings.EvolutionSettings; the table's old name [engine] is still read)
    [ensemble]    realizations [1 without randomness, else required], seed [0]
    [run]         label [""], checkpoints [true], checkpoint_interval [300.0 s], claim_timeout [600.0 s]

Random numbers (sharding independent): realization k uses the generator
``numpy.random.default_rng(numpy.random.SeedSequence([k, seed]))``. For the XXZ chain with W > 0 it first draws
the L fields (``rng.uniform(-W, W, size=L)``); for ``state.kind = "random_product"`` it then draws the
``samples`` bitstrings (``rng.integers(0, 2, size=(samples, L))``, '0' = spin up), or for the ``random``
configuration of ``state.configurations`` one bitstring (``rng.integers(0, 2, size=L)``, after the fields). The
results therefore do not
depend on worker count, shard layout or order, and realization k of a longer run equals realization k of a
shorter one.

The ``[run]`` table controls how a run is executed, not what is computed: it is not part of the description's
fingerprint (:meth:`RunDescription.fingerprint`), and neither is ``ensemble.realizations``, so that a finished
run directory can be extended with more realizations.

Examples
--------
>>> desc = parse_description({"model": {"kind": "xxz", "L": 8, "W": 2.0},
...                           "times": {"values": [0.5, 1.0]}, "ensemble": {"realizations": 2, "seed": 5}})
>>> desc.realization(1).chain.fields.shape
(8,)
"""

from __future__ import annotations

import copy
import difflib
import hashlib
import json
import math
from dataclasses import dataclass
from numbers import Integral, Real
from pathlib import Path
from typing import Any, Mapping

import numpy as np

from .errors import ConfigError, InputError
from .models import Chain, mixed_field_ising_chain, xxz_chain
from .settings import NEW_DEFAULTS, SETTINGS_KEYS, EvolutionSettings

__all__ = ["RunDescription", "Realization", "read_description", "parse_description", "realization_rng",
           "SCHEMA", "MODEL_KINDS", "STATE_KINDS", "CONFIGURATIONS", "configuration_bits"]

MODEL_KINDS = ("xxz", "mixed_field_ising")
STATE_KINDS = ("infinite_temperature", "product", "random_product")
_MODEL_PARAMS = {"xxz": ("J", "delta", "W", "fields", "couplings"), "mixed_field_ising": ("J", "g", "h")}

#: Valid keys of every table.
SCHEMA: dict[str, tuple[str, ...]] = {
    "model": ("kind", "L", "J", "delta", "W", "fields", "couplings", "g", "h"),
    "operators": ("w", "site", "v"),
    "state": ("kind", "bits", "samples", "configurations"),
    "times": ("values", "start", "stop", "num", "spacing"),
    "evolution": SETTINGS_KEYS,
    "ensemble": ("realizations", "seed"),
    "run": ("label", "checkpoints", "checkpoint_interval", "claim_timeout"),
}
_REQUIRED_TABLES = ("model", "times")
#: Old table names still read: [engine] was renamed [evolution] (it holds evolution settings, not an engine).
TABLE_ALIASES = {"engine": "evolution"}


# ------------------------------------------------------------------------------------------------ helpers
def _suggest(word: str, options, cutoff: float = 0.6) -> str:
    match = difflib.get_close_matches(word, list(options), n=1, cutoff=cutoff)
    return f"; did you mean '{match[0]}'?" if match else ""


def _all_dotted() -> list[str]:
    return [f"{t}.{k}" for t, keys in SCHEMA.items() for k in keys]


def _key_hint(table: str | None, key: str, own) -> str:
    """Where a misplaced or misspelt key probably belongs."""
    elsewhere = [d for d in _all_dotted() if d.split(".")[1] == key and d.split(".")[0] != table]
    if elsewhere:
        return f"; '{key}' belongs in [{elsewhere[0].split('.')[0]}] ({elsewhere[0]})"
    hint = _suggest(key, own)
    if hint:
        return hint
    others = {d.split(".")[1]: d for d in _all_dotted() if d.split(".")[0] != table}
    match = difflib.get_close_matches(key, list(others), n=1, cutoff=0.75)
    return f"; did you mean '{others[match[0]]}'?" if match else ""


def _check_keys(table: str, given: Mapping, allowed) -> None:
    for key in given:
        if key not in allowed:
            raise ConfigError(f"{table}.{key}", f"unknown key{_key_hint(table, key, allowed)} "
                                                f"(valid keys of [{table}]: {', '.join(allowed)})")


def _typename(v) -> str:
    return type(v).__name__


def _int(key: str, v, lo: int | None = None, what: str = "an integer") -> int:
    if isinstance(v, bool) or not isinstance(v, Integral):
        raise ConfigError(key, f"expected {what}, got {v!r} ({_typename(v)})")
    if lo is not None and v < lo:
        raise ConfigError(key, f"expected {what}, got {v}")
    return int(v)


def _real(key: str, v, what: str = "a finite real number") -> float:
    if isinstance(v, bool) or not isinstance(v, Real) or not math.isfinite(v):
        raise ConfigError(key, f"expected {what}, got {v!r} ({_typename(v)})")
    return float(v)


def _str(key: str, v, choices=None) -> str:
    if not isinstance(v, str):
        raise ConfigError(key, f"expected a string{' (one of ' + ', '.join(map(repr, choices)) + ')' if choices else ''}, "
                               f"got {v!r} ({_typename(v)})")
    if choices is not None and v not in choices:
        raise ConfigError(key, f"expected one of {', '.join(map(repr, choices))}, got {v!r}{_suggest(v, choices)}")
    return v


def _bool(key: str, v) -> bool:
    if not isinstance(v, bool):
        raise ConfigError(key, f"expected true or false, got {v!r} ({_typename(v)})")
    return v


def _real_list(key: str, v, n: int, what: str) -> list[float]:
    if not isinstance(v, (list, tuple)):
        raise ConfigError(key, f"expected a list of {n} numbers ({what}), got {v!r}")
    if len(v) != n:
        raise ConfigError(key, f"expected {n} numbers ({what}), got {len(v)}")
    return [_real(f"{key}[{i}]", x) for i, x in enumerate(v)]


def _per_realization(key: str, v, n: int, what: str) -> list[list[float]] | list[float]:
    """One list of n numbers (shared by all realizations) or a list of such lists (one per realization)."""
    if isinstance(v, (list, tuple)) and v and all(isinstance(x, (list, tuple)) for x in v):
        return [_real_list(f"{key}[{i}]", x, n, what) for i, x in enumerate(v)]
    return _real_list(key, v, n, what)


def _table(raw: Mapping, name: str) -> dict:
    t = raw.get(name, {})
    if not isinstance(t, Mapping):
        raise ConfigError(name, f"expected a table [{name}], got {t!r} ({_typename(t)})")
    return dict(t)


# ------------------------------------------------------------------------------------------------ parsing
def _parse_model(m: dict) -> dict:
    _check_keys("model", m, SCHEMA["model"])
    if "kind" not in m:
        raise ConfigError("model.kind", f"missing; expected one of {', '.join(map(repr, MODEL_KINDS))}")
    kind = _str("model.kind", m["kind"], MODEL_KINDS)
    for key in m:
        if key not in ("kind", "L") and key not in _MODEL_PARAMS[kind]:
            raise ConfigError(f"model.{key}", f"not a parameter of the {kind} model (its parameters: "
                                              f"{', '.join(_MODEL_PARAMS[kind])})")
    if "L" not in m:
        raise ConfigError("model.L", "missing; expected the chain length, an integer >= 2")
    L = _int("model.L", m["L"], 2, "an integer >= 2 (chain length)")
    out: dict[str, Any] = {"kind": kind, "L": L}
    if kind == "xxz":
        out["J"] = _real("model.J", m.get("J", 1.0))
        out["delta"] = _real("model.delta", m.get("delta", 1.0))
        if "W" in m and "fields" in m:
            raise ConfigError("model.fields", "give either model.W (random box disorder) or model.fields "
                                              "(explicit fields), not both")
        if "fields" in m:
            out["fields"] = _per_realization("model.fields", m["fields"], L, f"one field per site, L = {L}")
        else:
            W = _real("model.W", m.get("W", 0.0), "a real number >= 0 (disorder strength)")
            if W < 0:
                raise ConfigError("model.W", f"expected a real number >= 0 (disorder strength), got {W}")
            out["W"] = W
        if "couplings" in m:
            out["couplings"] = _per_realization("model.couplings", m["couplings"], L - 1,
                                                f"one coupling per bond, L - 1 = {L - 1}")
    else:
        out["J"] = _real("model.J", m.get("J", 1.0))
        out["g"] = _real("model.g", m.get("g", 1.05))
        out["h"] = _real("model.h", m.get("h", 0.5))
    return out


#: Model kinds whose Hamiltonian commutes with total S^z (``Chain.conserves_sz``): where symmetry = "u1" works.
_SZ_CONSERVING = ("xxz",)


def _check_symmetry(symmetry: str, kind: str, w: str, prefix: str) -> None:
    """evolution.symmetry = "u1" needs an S^z-conserving model and W = Z (checked before any work starts)."""
    if symmetry != "u1":
        return
    if kind not in _SZ_CONSERVING:
        raise ConfigError(f"{prefix}.symmetry", f"'u1' needs a model that conserves total S^z (model.kind = "
                                                f"'xxz'); model.kind = {kind!r} does not. Use 'z2' or 'auto'")
    if w != "Z":
        raise ConfigError(f"{prefix}.symmetry", f"'u1' evolves operators.w = 'Z' only (X and Y are not charge "
                                                f"eigenstates); got operators.w = {w!r}. Use 'z2' or 'auto'")


def _check_gate_update(evolution: dict, kind: str, w: str, prefix: str) -> None:
    """evolution.gate_update = "qr" needs the U(1) engine (checked before any work starts)."""
    if evolution.get("gate_update") != "qr":
        return
    from types import SimpleNamespace

    chain = SimpleNamespace(conserves_sz=kind in _SZ_CONSERVING, kind=kind)
    try:
        EvolutionSettings(**evolution).engine_symmetry(chain, w)
    except InputError as exc:
        raise ConfigError(f"{prefix}.gate_update", str(exc)) from None


def _parse_operators(o: dict, L: int) -> dict:
    _check_keys("operators", o, SCHEMA["operators"])
    w = _str("operators.w", o.get("w", "Z"), ("X", "Y", "Z"))
    site = o.get("site", 0)
    if isinstance(site, str):
        _str("operators.site", site, ("center",))
    else:
        _int("operators.site", site, None, f"an integer in 0..{L - 1} or 'center'")
        if not 0 <= site < L:
            raise ConfigError("operators.site", f"site {site} is outside the chain: expected an integer in "
                                                f"0..{L - 1} (model.L = {L}) or 'center'")
    v = o.get("v", ["X", "Y", "Z"])
    if isinstance(v, str):
        v = [v]
    if not isinstance(v, (list, tuple)) or not v:
        raise ConfigError("operators.v", f"expected a non-empty list of probes from 'X', 'Y', 'Z', got {v!r}")
    probes = [_str(f"operators.v[{i}]", x, ("X", "Y", "Z")) for i, x in enumerate(v)]
    if len(set(probes)) != len(probes):
        raise ConfigError("operators.v", f"probes must not repeat, got {probes}")
    return {"w": w, "site": site, "v": probes}


#: Named basis-state families of ``state.configurations`` ('0' = spin up, '1' = spin down; names are ours).
CONFIGURATIONS = {
    "all_up": "every spin up (also every spin between W and any probe V)",
    "neel": "alternating, 0101...",
    "pairs": "pairs of equal spins, 0011 0011 ...",
    "domain_wall": "up on sites 0 .. L//2 - 1, down from L//2 on",
    "random": "one random basis state per realization, drawn from its seed after the fields",
}


def configuration_bits(name: str, L: int, rng: np.random.Generator | None = None) -> str:
    """The bitstring of a named configuration on L sites (``random`` needs the realization's generator)."""
    if name == "all_up":
        return "0" * L
    if name == "neel":
        return ("01" * L)[:L]
    if name == "pairs":
        return ("0011" * L)[:L]
    if name == "domain_wall":
        return "0" * (L // 2) + "1" * (L - L // 2)
    if name == "random":
        if rng is None:
            raise InputError("the 'random' configuration needs the realization's generator", arg="rng")
        return "".join("01"[b] for b in rng.integers(0, 2, size=L))
    raise InputError(f"unknown configuration {name!r}{_suggest(name, CONFIGURATIONS)} (named configurations: "
                     f"{', '.join(CONFIGURATIONS)})", arg="name")


def _check_bits(key: str, bits, L: int) -> str:
    if not isinstance(bits, str) or len(bits) != L or set(bits) - {"0", "1"}:
        raise ConfigError(key, f"expected a string of L = {L} characters '0' (spin up) / '1' (spin down), got "
                               f"{bits!r}")
    return bits


def _parse_state(s: dict, L: int) -> dict:
    _check_keys("state", s, SCHEMA["state"])
    kind = _str("state.kind", s.get("kind", "infinite_temperature"), STATE_KINDS)
    out: dict[str, Any] = {"kind": kind}
    if kind == "product":
        if "samples" in s:
            raise ConfigError("state.samples", "only used with state.kind = 'random_product'")
        if "bits" not in s and "configurations" not in s:
            raise ConfigError("state.bits", f"missing; state.kind = 'product' needs bits (a string of L = {L} "
                                            "characters '0' spin up / '1' spin down, or a list of them) or "
                                            f"configurations (a list among {', '.join(CONFIGURATIONS)})")
        if "bits" in s:
            bits = s["bits"]
            if isinstance(bits, list):
                if not bits:
                    raise ConfigError("state.bits", "an empty list; give at least one bitstring")
                out["bits"] = [_check_bits(f"state.bits[{i}]", b, L) for i, b in enumerate(bits)]
            else:
                out["bits"] = _check_bits("state.bits", bits, L)
        if "configurations" in s:
            names = s["configurations"]
            if isinstance(names, str):
                names = [names]
            if not isinstance(names, list) or not names or not all(isinstance(n, str) for n in names):
                raise ConfigError("state.configurations", f"expected a list of names among "
                                                          f"{', '.join(CONFIGURATIONS)}, got {names!r}")
            for i, n in enumerate(names):
                if n not in CONFIGURATIONS:
                    raise ConfigError(f"state.configurations[{i}]", f"unknown configuration {n!r}"
                                      f"{_suggest(n, CONFIGURATIONS)} (named configurations: "
                                      f"{', '.join(CONFIGURATIONS)})")
            if len(set(names)) != len(names):
                raise ConfigError("state.configurations", f"lists a configuration twice: {names!r}")
            out["configurations"] = list(names)
    elif kind == "random_product":
        for key in ("bits", "configurations"):
            if key in s:
                raise ConfigError(f"state.{key}", "only used with state.kind = 'product'")
        out["samples"] = _int("state.samples", s.get("samples", 1), 1,
                              "a positive integer (random basis states per realization)")
    else:
        for key in ("bits", "samples", "configurations"):
            if key in s:
                raise ConfigError(f"state.{key}", "not used with state.kind = 'infinite_temperature'")
    return out


def _parse_times(t: dict) -> list[float]:
    _check_keys("times", t, SCHEMA["times"])
    grid = [k for k in ("start", "stop", "num", "spacing") if k in t]
    if "values" in t:
        if grid:
            raise ConfigError(f"times.{grid[0]}", "give either times.values or times.start/stop/num/spacing, "
                                                  "not both")
        vals = t["values"]
        if not isinstance(vals, (list, tuple)) or not vals:
            raise ConfigError("times.values", f"expected a non-empty list of times, got {vals!r}")
        ts = [_real(f"times.values[{i}]", x) for i, x in enumerate(vals)]
    else:
        for k in ("start", "stop", "num"):
            if k not in t:
                raise ConfigError(f"times.{k}", "missing; give times.values = [...] or times.start, times.stop, "
                                                "times.num (and times.spacing = 'log' or 'linear')")
        spacing = _str("times.spacing", t.get("spacing", "log"), ("log", "linear"))
        start = _real("times.start", t["start"])
        stop = _real("times.stop", t["stop"])
        num = _int("times.num", t["num"], 1, "a positive integer (number of output times)")
        if spacing == "log" and start <= 0:
            raise ConfigError("times.start", f"a log-spaced grid needs start > 0, got {start}")
        if num > 1 and stop <= start:
            raise ConfigError("times.stop", f"expected stop > start = {start}, got {stop}")
        if num == 1 and stop != start:
            raise ConfigError("times.num", "num = 1 needs start = stop")
        ts = (np.geomspace(start, stop, num) if spacing == "log" else np.linspace(start, stop, num)).tolist()
    if ts[0] < 0:
        raise ConfigError("times.values" if "values" in t else "times.start", f"times must be >= 0, got {ts[0]}")
    for i in range(len(ts) - 1):
        if not ts[i + 1] > ts[i]:
            raise ConfigError("times.values" if "values" in t else "times.num",
                              f"times must be strictly increasing; times[{i}] = {ts[i]} >= times[{i + 1}] = {ts[i + 1]}")
    return [float(x) for x in ts]


def _parse_run(r: dict) -> dict:
    _check_keys("run", r, SCHEMA["run"])
    label = _str("run.label", r.get("label", ""))
    checkpoints = _bool("run.checkpoints", r.get("checkpoints", True))
    interval = _real("run.checkpoint_interval", r.get("checkpoint_interval", 300.0), "a positive number of seconds")
    if interval <= 0:
        raise ConfigError("run.checkpoint_interval", f"expected a positive number of seconds, got {interval}")
    timeout = _real("run.claim_timeout", r.get("claim_timeout", 600.0), "a number of seconds >= 10")
    if timeout < 10:
        raise ConfigError("run.claim_timeout", f"expected a number of seconds >= 10, got {timeout}")
    return {"label": label, "checkpoints": checkpoints, "checkpoint_interval": interval, "claim_timeout": timeout}


def parse_description(raw: Mapping, source: str | None = None) -> "RunDescription":
    """Validate a run description given as a (TOML-like) mapping and resolve every default.

    Parameters
    ----------
    raw : mapping
        Tables ``model``, ``operators``, ``state``, ``times``, ``evolution`` (or its old name ``engine``),
        ``ensemble``, ``run`` (see module doc).
    source : str, optional
        Where the description came from (file name), for messages.

    Raises
    ------
    ConfigError
        On the first problem found, naming the key path.
    """
    if not isinstance(raw, Mapping):
        raise ConfigError("", f"a run description must be a table of tables, got {_typename(raw)}")
    for old, new in TABLE_ALIASES.items():
        if old in raw and new in raw:
            raise ConfigError(old, f"give either [{new}] or its old name [{old}], not both")
    for name in raw:
        if name not in SCHEMA and name not in TABLE_ALIASES:
            hint = _suggest(name, [*SCHEMA, *TABLE_ALIASES]) or _key_hint(None, name, ())
            raise ConfigError(name, f"unknown table{hint} (valid tables: {', '.join(SCHEMA)})")
    for name in _REQUIRED_TABLES:
        if name not in raw:
            raise ConfigError(name, f"missing table [{name}]")
    model = _parse_model(_table(raw, "model"))
    L = model["L"]
    operators = _parse_operators(_table(raw, "operators"), L)
    state = _parse_state(_table(raw, "state"), L)
    times = _parse_times(_table(raw, "times"))
    evo_name = "engine" if "engine" in raw else "evolution"
    evolution = EvolutionSettings.from_table(_table(raw, evo_name), evo_name).to_dict()
    _check_symmetry(evolution["symmetry"], model["kind"], operators["w"], evo_name)
    _check_gate_update(evolution, model["kind"], operators["w"], evo_name)
    run = _parse_run(_table(raw, "run"))
    ens_raw = _table(raw, "ensemble")
    _check_keys("ensemble", ens_raw, SCHEMA["ensemble"])
    seed = _int("ensemble.seed", ens_raw.get("seed", 0), 0, "a non-negative integer")

    per_real = {k: len(model[k]) for k in ("fields", "couplings") if k in model and isinstance(model[k][0], list)}
    random = model.get("W", 0.0) > 0 or state["kind"] == "random_product"
    if "realizations" in ens_raw:
        R = _int("ensemble.realizations", ens_raw["realizations"], 1, "a positive integer")
    elif per_real:
        R = max(per_real.values())
    elif random:
        raise ConfigError("ensemble.realizations", "missing; the model is random (disorder W > 0 or random "
                                                   "product states), so say how many realizations to compute")
    else:
        R = 1
    for k, n in per_real.items():
        if n != R:
            raise ConfigError(f"model.{k}", f"gives {n} lists (one per realization) but ensemble.realizations = {R}")
    if R > 1 and not random and not per_real:
        raise ConfigError("ensemble.realizations", f"= {R}, but nothing is random (W = 0, no per-realization "
                                                   "fields, state not random_product): every realization would be "
                                                   "identical; set realizations = 1 or add disorder (model.W)")
    ensemble = {"realizations": R, "seed": seed}
    data = {"model": model, "operators": operators, "state": state, "times": {"values": times},
            "evolution": evolution, "ensemble": ensemble, "run": run}
    return RunDescription(data, source)


def read_description(path) -> "RunDescription":
    """Read and validate a run description: a TOML file, a JSON file written by :meth:`RunDescription.to_dict`,
    the ``run.json`` of a run directory, or the run directory itself (its stored description)."""
    import tomllib

    p = Path(path)
    if p.is_dir() and (p / "run.json").is_file():  # a run directory: its stored description
        p = p / "run.json"
    if not p.is_file():
        raise ConfigError("", f"{p}: no such run description file")
    try:
        text = p.read_text()
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError("", f"{p}: cannot read the file ({exc})") from None
    if p.suffix == ".json":
        try:
            raw = json.loads(text)
        except json.JSONDecodeError as exc:
            raise ConfigError("", f"{p}: not valid JSON ({exc})") from None
        if isinstance(raw, dict) and str(raw.get("format", "")).startswith("mpo_fronts.run/") \
                and isinstance(raw.get("description"), dict):
            raw = raw["description"]  # the run.json of a run directory: the resolved description it stores
    else:
        try:
            raw = tomllib.loads(text)
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError("", f"{p}: not valid TOML ({exc}); see data/production_example.toml") from None
    return parse_description(raw, source=str(p))


# ------------------------------------------------------------------------------------------------ realizations
def realization_rng(k: int, seed: int) -> np.random.Generator:
    """The generator of realization k: ``default_rng(SeedSequence([k, seed]))`` (sharding independent)."""
    return np.random.default_rng(np.random.SeedSequence([int(k), int(seed)]))


@dataclass(frozen=True)
class Realization:
    """Everything that differs between realizations: the chain and the basis states.

    Attributes
    ----------
    index : int
        Realization index k.
    chain : Chain
        The model with the fields and couplings actually used.
    bits : tuple of str or None
        Basis states ('0' = spin up) for product / random product states; None at infinite temperature.
    seed : tuple of int
        The SeedSequence entropy (k, ensemble.seed).
    """

    index: int
    chain: Chain
    bits: tuple[str, ...] | None
    seed: tuple[int, int]

    @property
    def fields(self) -> np.ndarray:
        """Fields h_i (S^z units) used; NaN for models without per-site fields (mixed-field Ising)."""
        return self.chain.fields if self.chain.fields is not None else np.full(self.chain.L, np.nan)

    @property
    def couplings(self) -> np.ndarray:
        """Per-bond couplings used (J for every bond of the mixed-field Ising chain)."""
        if self.chain.couplings is not None:
            return self.chain.couplings
        return np.full(self.chain.L - 1, self.chain.params.get("J", np.nan))


class RunDescription:
    """A validated, fully resolved run description (immutable; build it with :func:`parse_description`).

    ``to_dict()`` returns the resolved description (every default filled in, times as a list); parsing it again
    gives an equal description.
    """

    __slots__ = ("_data", "source")

    def __init__(self, data: dict, source: str | None = None):
        self._data = data
        self.source = source

    # ---------------------------------------------------------------- plain views
    def to_dict(self) -> dict:
        """The resolved description as plain JSON-able tables (a deep copy)."""
        return copy.deepcopy(self._data)

    def __getitem__(self, table: str) -> dict:
        return copy.deepcopy(self._data[table])

    def __eq__(self, other) -> bool:
        return isinstance(other, RunDescription) and _canonical(self._data) == _canonical(other._data)

    def __hash__(self) -> int:
        return hash(_canonical(self._data))

    def __repr__(self) -> str:
        m = self._data["model"]
        return (f"RunDescription({m['kind']}, L={m['L']}, realizations={self.realizations}, "
                f"chi={self._data['evolution']['chi']}, times={len(self._data['times']['values'])})")

    def fingerprint(self) -> str:
        """SHA-256 of what is computed: everything except the [run] table and ensemble.realizations."""
        d = self.to_dict()
        d.pop("run")
        d["ensemble"].pop("realizations")
        d["engine"] = d.pop("evolution")  # the table's name in 0.1.0: run directories written then still match
        for key, default in NEW_DEFAULTS.items():  # keys added later count only when they differ from the default
            if d["engine"].get(key) == default:
                d["engine"].pop(key)
        return hashlib.sha256(_canonical(d).encode()).hexdigest()

    # ---------------------------------------------------------------- convenience
    @property
    def L(self) -> int:
        return self._data["model"]["L"]

    @property
    def kind(self) -> str:
        return self._data["model"]["kind"]

    @property
    def times(self) -> np.ndarray:
        return np.asarray(self._data["times"]["values"], dtype=float)

    @property
    def w(self) -> str:
        return self._data["operators"]["w"]

    @property
    def site(self) -> int:
        """Site of W as an integer ('center' resolved to L // 2)."""
        s = self._data["operators"]["site"]
        return self.L // 2 if s == "center" else int(s)

    @property
    def probes(self) -> tuple[str, ...]:
        return tuple(self._data["operators"]["v"])

    @property
    def state_kind(self) -> str:
        return self._data["state"]["kind"]

    @property
    def state_names(self) -> tuple[str, ...] | None:
        """Names of the basis states of a product-state run, in the order of ``Realization.bits``: each given
        bitstring under its own bits, then the named configurations; ``random_product`` samples are
        ``sample0``, ``sample1``, ...; None at infinite temperature."""
        st = self._data["state"]
        if st["kind"] == "product":
            given = st.get("bits", [])
            given = [given] if isinstance(given, str) else list(given)
            return tuple(given) + tuple(st.get("configurations", []))
        if st["kind"] == "random_product":
            return tuple(f"sample{i}" for i in range(st["samples"]))
        return None

    @property
    def settings(self) -> EvolutionSettings:
        """The evolution settings (the ``[evolution]`` table) as the frozen object the engine takes."""
        return EvolutionSettings(**self._data["evolution"])

    @property
    def engine(self) -> dict:
        """The evolution settings as a plain dict (``settings.to_dict()``)."""
        return dict(self._data["evolution"])

    @property
    def realizations(self) -> int:
        return self._data["ensemble"]["realizations"]

    @property
    def seed(self) -> int:
        return self._data["ensemble"]["seed"]

    @property
    def run_options(self) -> dict:
        return dict(self._data["run"])

    def replace(self, **changes) -> "RunDescription":
        """A new, re-validated description with some keys changed, given as ``table__key=value``.

        Example: ``desc.replace(engine__chi=32, ensemble__realizations=4)``.
        """
        d = self.to_dict()
        for name, value in changes.items():
            table, _, key = name.partition("__")
            table = TABLE_ALIASES.get(table, table)
            if table not in SCHEMA or key not in SCHEMA[table]:
                raise ConfigError(f"{table}.{key}", "not a key of the run description")
            if value is None:
                d[table].pop(key, None)
            else:
                d[table][key] = value
            if table == "model" and key == "fields" and value is not None:
                d["model"].pop("W", None)
        return parse_description(d, self.source)

    # ---------------------------------------------------------------- realizations
    def realization(self, k: int) -> Realization:
        """The chain and basis states of realization k (see the module doc for the random-number scheme)."""
        if isinstance(k, bool) or not isinstance(k, Integral) or k < 0:
            raise ConfigError("ensemble.realizations", f"realization index must be a non-negative integer, got {k!r}")
        k = int(k)
        m, st = self._data["model"], self._data["state"]
        L = m["L"]
        rng = realization_rng(k, self.seed)
        if m["kind"] == "xxz":
            fields = m.get("fields")
            if fields is not None and isinstance(fields[0], list):
                fields = fields[k % len(fields)]
            couplings = m.get("couplings")
            if couplings is not None and isinstance(couplings[0], list):
                couplings = couplings[k % len(couplings)]
            W = m.get("W", 0.0)
            if fields is None:
                fields = rng.uniform(-W, W, size=L) if W > 0 else np.zeros(L)
            chain = xxz_chain(L, J=m["J"], delta=m["delta"], W=0.0, fields=fields, couplings=couplings)
            chain = _with_params(chain, W=W)
        else:
            chain = mixed_field_ising_chain(L, J=m["J"], g=m["g"], h=m["h"])
        if st["kind"] == "product":
            given = st.get("bits", [])
            bits: tuple[str, ...] | None = tuple([given] if isinstance(given, str) else given) + tuple(
                configuration_bits(n, L, rng) for n in st.get("configurations", []))
        elif st["kind"] == "random_product":
            draws = rng.integers(0, 2, size=(st["samples"], L))
            bits = tuple("".join("01"[b] for b in row) for row in draws)
        else:
            bits = None
        chain = _with_params(chain, seed=[k, self.seed])
        return Realization(index=k, chain=chain, bits=bits, seed=(k, self.seed))

    def truncated_realization(self, k: int, L: int) -> Realization:
        """Realization k restricted to the first ``L`` sites (fields, couplings and bits cut), for checks."""
        full = self.realization(k)
        if L > self.L:
            raise ConfigError("model.L", f"cannot extend a chain of L = {self.L} to L = {L}")
        c = full.chain
        if c.kind == "xxz":
            chain = xxz_chain(L, J=c.params["J"], delta=c.params["delta"], fields=c.fields[:L],
                              couplings=c.couplings[:L - 1])
            chain = _with_params(chain, W=c.params["W"])
        else:
            chain = mixed_field_ising_chain(L, J=c.params["J"], g=c.params["g"], h=c.params["h"])
        chain = _with_params(chain, seed=list(full.seed))
        bits = tuple(b[:L] for b in full.bits) if full.bits is not None else None
        return Realization(index=full.index, chain=chain, bits=bits, seed=full.seed)

    def site_at(self, L: int) -> int:
        """Site of W on a chain of length L with the same relative position (for checks at small L)."""
        s = self._data["operators"]["site"]
        if s == "center":
            return L // 2
        if self.L == 1:
            return 0
        return int(round(int(s) * (L - 1) / (self.L - 1)))


def _with_params(chain: Chain, **params) -> Chain:
    """A copy of the (frozen) chain whose recorded parameters include ``params``."""
    import dataclasses

    return dataclasses.replace(chain, params={**chain.params, **params})


def _canonical(d) -> str:
    return json.dumps(d, sort_keys=True, separators=(",", ":"), allow_nan=False)
