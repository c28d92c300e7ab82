"""The evolution settings: one frozen, validated object from the keyword arguments or the ``[evolution]`` table.

:class:`EvolutionSettings` holds what decides how W(t) is computed: bond dimension, Trotter step and order,
cutoff, steps per block, truncation route. It is validated once where it enters (keyword arguments of
:func:`mpo_fronts.evolve_otoc`, a run description's ``[evolution]`` table, a command-line override), handed
unchanged to the engine and written unchanged into every result file (:meth:`EvolutionSettings.to_dict`).
Errors raised for keyword arguments are :class:`~mpo_fronts.errors.InputError` naming the argument; for a run
description :meth:`EvolutionSettings.from_table` turns them into :class:`~mpo_fronts.errors.ConfigError`
naming the dotted key (``evolution.chi``).
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from numbers import Integral, Real
from typing import Any, Mapping

import numpy as np

from .errors import ConfigError, InputError
from .schedules import DEFAULT_CHUNK, ORDERS, SPLITTINGS, check_splitting
from .truncation import route, route_names

__all__ = ["EvolutionSettings", "SETTINGS_KEYS", "NEW_DEFAULTS", "SYMMETRIES", "U1_MIN_CHI"]

_WHAT = {
    "chi": "a positive integer (maximum bond dimension)",
    "dt": "a positive number (largest Trotter step, units of 1/J) or \"auto\"",
    "order": "2 or 4 (Trotter order)",
    "splitting": "\"standard\" or, for order 2, \"omelyan\", for order 4, \"blanes_moan\"",
    "trotter_tol": "a number in (0, 1) (Trotter error of C that dt = \"auto\" aims below)",
    "cutoff": "a number in [0, 1) (discarded weight per truncation)",
    "chunk": "a positive integer (Trotter steps per block)",
    "symmetry": "\"auto\", \"z2\" or \"u1\" (symmetry blocks of the engine)",
    "gate_update": "\"svd\" or \"qr\" (how the U(1) engine truncates a gate on a bond at chi)",
}

#: Values of ``symmetry``: ``"z2"`` the Pauli-basis engine (:class:`mpo_fronts.evolve.OperatorTEBD`, Z2-graded
#: where it grades today), ``"u1"`` the charge-block engine (:class:`mpo_fronts.u1.ChargeTEBD`), ``"auto"``
#: the choice of :meth:`EvolutionSettings.engine_symmetry`.
SYMMETRIES = ("auto", "z2", "u1")
#: Smallest chi at which ``symmetry = "auto"`` takes the U(1) engine: below it the Python work per charge sector
#: outweighs the smaller decompositions (data/benchmarks/u1_blocks_small_chi.json), as for the Z2 grading
#: (:data:`mpo_fronts.evolve.GRADED_MIN_CHI`).
U1_MIN_CHI = 32


@dataclass(frozen=True)
class EvolutionSettings:
    """How W(t) is evolved and truncated.

    Parameters
    ----------
    chi : int
        Maximum bond dimension (default 64).
    dt : float or 'auto'
        Largest Trotter step, units of 1/J (default 0.05); steps are shortened to land on every output time.
        ``"auto"``: the largest step whose estimated Trotter error of C up to the last output time stays below
        ``trotter_tol`` (:func:`mpo_fronts.stepsize.auto_dt`, resolved when the evolution starts; the value
        used is recorded as ``dt_used`` in the outputs).
    order : {2, 4}
        Trotter order (default 2; with ``dt = "auto"``, 4).
    splitting : str
        The splitting of that order (:data:`mpo_fronts.schedules.SPLITTINGS`): ``"standard"`` (Strang, order 2;
        Suzuki, order 4), ``"omelyan"`` (order 2), ``"blanes_moan"`` (order 4; the cheapest per accuracy in
        scripts/bench/trotter.py, and the default with ``dt = "auto"``).
    trotter_tol : float
        Target of ``dt = "auto"``: largest |dC| from the Trotter splitting up to the last time (default 1e-3).
    cutoff : float
        Largest summed squared singular value dropped per truncation, absolute weight (W has unit weight);
        default 0 (only ``chi`` limits the bond).
    chunk : int
        Trotter steps per block: merging of half layers stops, checkpoints and progress happen at block ends
        (default 20).
    truncation : str
        A registered truncation route (:func:`mpo_fronts.truncation.route_names`): 'svd' (default), 'rsvd',
        'eigh'.
    symmetry : {'auto', 'z2', 'u1'}
        The symmetry blocks of the engine.

        * ``"z2"``: the Pauli-basis engine :class:`~mpo_fronts.evolve.OperatorTEBD` (real tensors; Z2-graded
          blocks when the chain conserves total S^z and chi >= 32, as before this setting existed).
        * ``"u1"``: :class:`~mpo_fronts.u1.ChargeTEBD`, blocks of the U(1) charge (total S^z) in the basis
          I, Z, S+, S-; only for a chain that conserves total S^z (the XXZ chain), W = Z, truncation
          ``"svd"`` and chi >= 2; anything else raises an InputError naming ``symmetry``.
        * ``"auto"`` (default): ``"u1"`` when ``dt = "auto"``, the chain conserves S^z, W = Z, truncation is
          ``"svd"`` and chi >= :data:`U1_MIN_CHI`; ``"z2"`` otherwise. With a numeric dt it is always
          ``"z2"``, so that every run that gives dt as a number computes exactly what it computed before the
          setting existed (same engine, same results, same run fingerprint); with ``dt = "auto"`` it is the
          fast path of :func:`mpo_fronts.evolve_otoc` (order 4 Blanes-Moan with charge blocks).

        The two engines agree to rounding where neither truncates. With truncation they differ by an amount
        of the order of the truncation error: ChargeTEBD keeps or drops degenerate (v, -v) pairs of singular
        values whole (the operator stays U(1)-symmetric, C_X = C_Y exactly), so at equal chi it may discard
        slightly more. The engine used is recorded as ``symmetry_used`` (and ``engine``) in the outputs;
        :meth:`engine_symmetry` resolves the choice.
    gate_update : {'svd', 'qr'}
        How the U(1) engine truncates a gate once the bond is at chi. ``"svd"`` (default): the SVD of every
        charge block, the optimal truncation. ``"qr"``: :data:`mpo_fronts.u1.QR_ITERATIONS` subspace iterations
        from the bond's old basis and a QR (the sector sizes are kept), with the SVD on every
        :data:`mpo_fronts.u1.QR_SVD_EVERY`-th gate of the bond to re-select them. Measured
        (scripts/bench/u1_qr_gate.py --name u1_qr_gate_iters2, README "Performance"): at chi = 68 no larger
        error than the SVD at chi = 64 on the two L = 14 references, 1.7x-1.8x faster; at equal chi slightly
        more error (2.19e-3 against 1.97e-3 at the centre), so raise chi by about 6 % when switching. Only
        with the U(1) engine: anything else raises an InputError naming ``gate_update``.

    Examples
    --------
    >>> s = EvolutionSettings(chi=32, dt=0.1)
    >>> s.replace(chi=64).chi, s.to_dict()["truncation"]
    (64, 'svd')
    """

    chi: int = 64
    dt: float = 0.05
    order: int | None = None
    cutoff: float = 0.0
    chunk: int = DEFAULT_CHUNK
    truncation: str = "svd"
    splitting: str | None = None
    trotter_tol: float = 1e-3
    symmetry: str = "auto"
    gate_update: str = "svd"

    def __post_init__(self):
        def setv(name, value):
            object.__setattr__(self, name, value)

        setv("chi", _positive_int("chi", self.chi))
        dt = self.dt
        if dt != "auto":
            if isinstance(dt, bool) or not isinstance(dt, Real) or not np.isfinite(dt) or dt <= 0:
                raise InputError(f"dt must be {_WHAT['dt']}, got {dt!r}", arg="dt")
            setv("dt", float(dt))
        auto = self.dt == "auto"
        if self.order is None:  # dt = "auto" defaults to the cheapest splitting per accuracy
            setv("order", 4 if auto and self.splitting in (None, "blanes_moan") else 2)
        if self.splitting is None:
            setv("splitting", "blanes_moan" if auto and self.order == 4 else "standard")
        if isinstance(self.order, bool) or self.order not in ORDERS:
            raise InputError(f"order must be {_WHAT['order']}, got {self.order!r}", arg="order")
        setv("order", int(self.order))
        if not isinstance(self.splitting, str) or self.splitting not in SPLITTINGS[self.order]:
            raise InputError(f"splitting must be {_WHAT['splitting']}, got {self.splitting!r} for order "
                             f"{self.order}", arg="splitting")
        check_splitting(self.order, self.splitting)
        tol = self.trotter_tol
        if isinstance(tol, bool) or not isinstance(tol, Real) or not (0 < tol < 1):
            raise InputError(f"trotter_tol must be {_WHAT['trotter_tol']}, got {tol!r}", arg="trotter_tol")
        setv("trotter_tol", float(tol))
        c = self.cutoff
        if isinstance(c, bool) or not isinstance(c, Real) or not (0 <= c < 1):
            raise InputError(f"cutoff must be {_WHAT['cutoff']}, got {c!r}", arg="cutoff")
        setv("cutoff", float(c))
        setv("chunk", _positive_int("chunk", self.chunk))
        route(self.truncation)  # raises an InputError naming 'truncation' and the registered routes
        if not isinstance(self.symmetry, str) or self.symmetry.lower() not in SYMMETRIES:
            raise InputError(f"symmetry must be {_WHAT['symmetry']}, got {self.symmetry!r}", arg="symmetry")
        setv("symmetry", self.symmetry.lower())
        if self.gate_update not in ("svd", "qr"):
            raise InputError(f"gate_update must be {_WHAT['gate_update']}, got {self.gate_update!r}",
                             arg="gate_update")
        if self.gate_update == "qr" and self.symmetry == "z2":
            raise InputError("gate_update = 'qr' is an option of the U(1) engine, but symmetry = 'z2'; use "
                             "symmetry = 'u1' or 'auto' (with dt = 'auto'), or gate_update = 'svd'",
                             arg="gate_update")
        if self.symmetry == "u1":
            if self.truncation != "svd":  # mpo_fronts.u1.COMPLEX_ROUTES (u1 comes after this module)
                raise InputError(f"symmetry = 'u1' splits its blocks with truncation = 'svd' only, got truncation "
                                 f"= {self.truncation!r}; use truncation = 'svd' or symmetry = 'z2'", arg="symmetry")
            if self.chi < 2:
                raise InputError(f"symmetry = 'u1' needs chi >= 2 (singular values of charges v and -v are kept in "
                                 f"pairs), got chi = {self.chi}; raise chi or use symmetry = 'z2'", arg="symmetry")

    # ---------------------------------------------------------------- construction
    @classmethod
    def from_table(cls, table: Mapping[str, Any] | None, prefix: str = "evolution") -> "EvolutionSettings":
        """Settings from a run description's table; errors are ConfigErrors naming ``prefix.key``."""
        table = dict(table or {})
        unknown = sorted(set(table) - set(SETTINGS_KEYS))
        if unknown:
            import difflib

            close = difflib.get_close_matches(unknown[0], SETTINGS_KEYS, n=1, cutoff=0.6)
            hint = f"; did you mean '{close[0]}'?" if close else f"; valid keys: {', '.join(SETTINGS_KEYS)}"
            raise ConfigError(f"{prefix}.{unknown[0]}", f"unknown key{hint}")
        for key in ("chi", "chunk"):  # TOML integers only: 16.0 or "16" are typing mistakes worth naming
            if key in table and (isinstance(table[key], bool) or not isinstance(table[key], Integral)):
                raise ConfigError(f"{prefix}.{key}", f"expected {_WHAT[key]}, got {table[key]!r}")
        if "symmetry" in table and not isinstance(table["symmetry"], str):
            raise ConfigError(f"{prefix}.symmetry", f"expected {_WHAT['symmetry']}, got {table['symmetry']!r}")
        for key in ("dt", "cutoff", "trotter_tol"):
            if key == "dt" and table.get(key) == "auto":
                continue
            if key in table and (isinstance(table[key], bool) or not isinstance(table[key], Real)):
                raise ConfigError(f"{prefix}.{key}", f"expected {_WHAT[key]}, got {table[key]!r}")
        try:
            return cls(**table)
        except InputError as exc:
            key = exc.arg or ""
            what = _WHAT.get(key)
            msg = f"expected {what}, got {table.get(key)!r}" if what else str(exc)
            if key == "truncation":
                routes = ", ".join(f'"{t}"' for t in route_names())
                msg = f"expected one of {routes} (how gates are truncated), got {table.get(key)!r}"
            if key == "symmetry":
                msg = str(exc) if str(table.get(key)).lower() in SYMMETRIES else msg
            raise ConfigError(f"{prefix}.{key}" if key else prefix, msg) from None

    def replace(self, **changes) -> "EvolutionSettings":
        """A new, validated copy with some settings changed (``None`` values are ignored)."""
        return dataclasses.replace(self, **{k: v for k, v in changes.items() if v is not None})

    def to_dict(self) -> dict[str, Any]:
        """The settings as plain numbers and strings (what result files and run descriptions store)."""
        return dataclasses.asdict(self)

    def engine_symmetry(self, chain, w: str) -> str:
        """The engine's symmetry blocks for this chain and operator: ``"z2"`` or ``"u1"`` (see ``symmetry``).

        Raises an InputError naming ``symmetry`` when ``"u1"`` was asked for a chain that does not conserve total
        S^z or for W other than Z.
        """
        w = w.upper() if isinstance(w, str) else w
        conserving = bool(getattr(chain, "conserves_sz", False))
        if self.symmetry == "u1":
            if not conserving:
                raise InputError(f"symmetry = 'u1' needs a chain that conserves total S^z (the XXZ chain); this "
                                 f"{getattr(chain, 'kind', type(chain).__name__)!r} chain does not. Use symmetry "
                                 f"= 'z2' (or 'auto')", arg="symmetry")
            if w != "Z":
                raise InputError(f"symmetry = 'u1' evolves W = 'Z' only (a charge eigenstate; X and Y mix charges "
                                 f"+1 and -1), got w = {w!r}. Use symmetry = 'z2' (or 'auto') for W = X or Y",
                                 arg="symmetry")
            return "u1"
        if self.symmetry == "auto" and self.auto and conserving and w == "Z" and self.truncation == "svd" \
                and self.chi >= U1_MIN_CHI:
            return "u1"
        if self.gate_update == "qr":
            raise InputError(f"gate_update = 'qr' is an option of the U(1) engine, and this run uses the Z2 engine "
                             f"(symmetry = {self.symmetry!r} takes U(1) only with dt = 'auto', an S^z-conserving "
                             f"chain, W = Z, truncation 'svd' and chi >= {U1_MIN_CHI}); use symmetry = 'u1' or "
                             f"gate_update = 'svd'", arg="gate_update")
        return "z2"

    @property
    def auto(self) -> bool:
        """True when the step is chosen from ``trotter_tol`` (``dt = "auto"``)."""
        return self.dt == "auto"


#: Keys added after version 0.1.0 and their defaults: left out of run-description fingerprints while they hold
#: the default, so that run directories written by 0.1.0 still resume.
NEW_DEFAULTS = {"splitting": "standard", "trotter_tol": 1e-3, "symmetry": "auto", "gate_update": "svd"}


#: The keys of the ``[evolution]`` table, in the order of :class:`EvolutionSettings`.
SETTINGS_KEYS = tuple(f.name for f in dataclasses.fields(EvolutionSettings))


def _positive_int(name: str, value) -> int:
    if isinstance(value, bool) or not isinstance(value, Integral) or value < 1:
        raise InputError(f"{name} must be {_WHAT[name]}, got {value!r}", arg=name)
    return int(value)
