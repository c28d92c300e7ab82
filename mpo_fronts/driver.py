"""The one evolution loop: run the engine to every output time, measure, notify observers, resume from a state.

Both the Python API (:func:`mpo_fronts.evolve_otoc`) and the production runner (one disorder realization in
:mod:`mpo_fronts.ensemble`) call :func:`evolve`. It

* builds the engine from one :class:`~mpo_fronts.settings.EvolutionSettings`: the Pauli-basis
  :class:`~mpo_fronts.evolve.OperatorTEBD` (Z2 blocks) or the charge-block :class:`~mpo_fronts.u1.ChargeTEBD`
  (U(1) blocks), as ``settings.symmetry`` says (:meth:`~mpo_fronts.settings.EvolutionSettings.engine_symmetry`);
* restores a checkpoint (``resume``) when given one, and measures an output whose last block was already done;
* at every output time calls each *measurement* ``m(engine) -> {name: array}`` and stores the arrays with a
  leading time axis (adding a measurement is one function, not an edit of this loop);
* after every block calls each *observer*'s ``after_block(engine, evolution)`` (checkpoints, heartbeat,
  progress), and ``at_end(evolution)`` when done;
* limits BLAS threads during the evolution (threadpoolctl; one thread by default) and records the count.

Measurements provided here: :func:`operator_profiles` (single-site Pauli weights and the right-weight profile
from one environment sweep), :func:`truncation_record` (cumulative discarded weight, per bond too, and the
largest bond dimension), :func:`entanglement` (operator entanglement entropy per bond) and
:class:`ProductStates` (product-state OTOCs for a list of basis states). Each works with both engines. A
measurement of your own receives the engine: ``engine.arrays`` are real Pauli-basis tensors for OperatorTEBD
but complex charge-basis tensors for ChargeTEBD; :func:`pauli_arrays` gives the real Pauli-basis MPS of either.
"""

from __future__ import annotations

import time
import warnings
from dataclasses import dataclass, field
from typing import Any, Callable, Mapping, Sequence

import numpy as np

from .conventions import PROBES
from .errors import LARGE_DISCARDED_WEIGHT, InputError, TruncationWarning
from .evolve import BrickworkEngine, OperatorTEBD, bond_entropies, check_site, check_w
from .readout import OtocResult, check_bits, product_state_otoc, read_operator
from .schedules import check_times, step_plan
from .settings import EvolutionSettings
from .truncation import SVD_FLOOR
from .u1 import ChargeTEBD

__all__ = ["evolve", "evolve_otoc", "truncation_warnings", "Evolution", "operator_profiles", "truncation_record",
           "entanglement", "ProductStates",
           "DEFAULT_MEASUREMENTS", "Observer", "OnBlock", "build_engine", "pauli_arrays"]

Measurement = Callable[[BrickworkEngine], Mapping[str, Any]]


# ------------------------------------------------------------------------------------------- measurements
def pauli_arrays(e: BrickworkEngine) -> list[np.ndarray]:
    """The operator of either engine as a real MPS over Pauli letters I, X, Y, Z, mixed canonical around
    ``e.center`` (the layout every function of :mod:`mpo_fronts.readout` takes)."""
    return e.real_pauli_arrays() if isinstance(e, ChargeTEBD) else e.arrays


def operator_profiles(e: BrickworkEngine) -> dict[str, np.ndarray]:
    """``weights`` (L, 4): single-site Pauli weights, rows summing to 1; ``right_weight`` (L,): front profile."""
    if isinstance(e, ChargeTEBD):  # read from the charge basis directly (mpo_fronts.u1.charge_profiles)
        return e.profiles()
    return read_operator(e.arrays, e.center)


def truncation_record(e: BrickworkEngine) -> dict[str, Any]:
    """``discarded_weight`` (cumulative norm loss), ``bond_discarded`` (L-1,) (the same per bond), ``max_bond``."""
    return {"discarded_weight": e.discarded_weight, "bond_discarded": e.ledger.by_bond.copy(),
            "max_bond": e.max_bond}


def entanglement(e: BrickworkEngine) -> dict[str, np.ndarray]:
    """``bond_entropy`` (L-1,): operator entanglement entropy of W(t) at every bond (natural log).

    The Schmidt values of a bond do not depend on the local basis (the charge basis is a unitary change of the
    Pauli one), so ChargeTEBD's complex tensors go in as they are."""
    return {"bond_entropy": bond_entropies(e.arrays, e.center)}


@dataclass(frozen=True)
class ProductStates:
    """Product-state OTOCs C_s(r) = 1 - Re <s|W V_r W V_r|s> for basis states ``bits`` and ``probes``.

    Returns ``state_otoc_<V>`` of shape (S, L) for every probe V (S = number of states).
    """

    bits: tuple[str, ...]
    probes: tuple[str, ...] = PROBES

    def __call__(self, e: BrickworkEngine) -> dict[str, np.ndarray]:
        arrays = pauli_arrays(e)
        return {f"state_otoc_{v}": np.stack([product_state_otoc(arrays, b, v) for b in self.bits])
                for v in self.probes}


#: What every evolution measures unless told otherwise.
DEFAULT_MEASUREMENTS: tuple[Measurement, ...] = (operator_profiles, truncation_record, entanglement)


# ------------------------------------------------------------------------------------------- observers
class Observer:
    """Called by :func:`evolve` at fixed moments; override what you need (all do nothing here)."""

    def after_block(self, engine: BrickworkEngine, evolution: "Evolution") -> None:
        """After every block of Trotter steps: the operator is a physical state at ``engine.t``."""

    def at_end(self, evolution: "Evolution") -> None:
        """After the last output time was measured."""


class OnBlock(Observer):
    """An observer from a function ``fn(engine, evolution)`` called after every block (progress, heartbeat)."""

    def __init__(self, fn: Callable[[BrickworkEngine, "Evolution"], None]):
        self.fn = fn

    def after_block(self, engine, evolution):
        self.fn(engine, evolution)


# ------------------------------------------------------------------------------------------- the record
@dataclass
class Evolution:
    """What one evolution produced, filled in as it goes (observers see it part-way).

    Attributes
    ----------
    times : ndarray (n_t,)
        Output times (units 1/J).
    arrays : dict of name -> ndarray (n_t, ...)
        Every measured quantity with a leading time axis; rows ``n_done`` and beyond are not filled yet.
    n_done : int
        Output times measured so far.
    settings : EvolutionSettings
    engine : dict
        How the operator was computed: ``method``, the settings as requested (``settings.to_dict()``, so
        ``symmetry`` may read ``"auto"`` and ``dt`` ``"auto"``), ``dt_used``, ``symmetry_used`` (``"z2"`` or
        ``"u1"``: the symmetry blocks the engine used), ``engine`` (``"OperatorTEBD"`` or ``"ChargeTEBD"``),
        ``max_step`` (largest Trotter step used), ``svd_floor``, ``graded`` (block-diagonal gates: Z2 grading
        for OperatorTEBD as it chose, always True for ChargeTEBD, whose charge blocks refine it), ``splits``
        (gates per truncation route), ``blas_threads``.
    wall_time : float
        Seconds, summed over resumed sessions.
    restarts : int
        How many times this evolution was resumed from a checkpoint.
    resumed_from : float or None
        Time t of the checkpoint this session started from.
    """

    times: np.ndarray
    settings: EvolutionSettings
    arrays: dict[str, np.ndarray] = field(default_factory=dict)
    n_done: int = 0
    engine: dict[str, Any] = field(default_factory=dict)
    wall_time: float = 0.0
    restarts: int = 0
    resumed_from: float | None = None

    def outputs(self) -> dict[str, np.ndarray]:
        """The measured arrays (first ``n_done`` rows meaningful): what a checkpoint stores."""
        return self.arrays

    def _store(self, k: int, values: Mapping[str, Any]) -> None:
        n_t = self.times.size
        for name, v in values.items():
            a = np.asarray(v)
            buf = self.arrays.get(name)
            if buf is None:
                buf = np.zeros((n_t, *a.shape), dtype=np.int64 if a.dtype.kind in "iu" else float)
                self.arrays[name] = buf
            buf[k] = a


def _restore_outputs(evo: Evolution, outputs: Mapping[str, Any], n_done: int) -> None:
    """Fill the first ``n_done`` rows from a checkpoint's outputs (also the layout before the one driver:
    ``state_otoc`` as {probe: (S, n_t, L)})."""
    n_t = evo.times.size
    for name, arr in outputs.items():
        if isinstance(arr, Mapping):
            for v, a in arr.items():
                a = np.moveaxis(np.asarray(a), 1, 0)  # (S, n_done, L) -> (n_done, S, L)
                buf = evo.arrays.setdefault(f"{name}_{v}", np.zeros((n_t, *a.shape[1:])))
                buf[:n_done] = a[:n_done]
            continue
        a = np.asarray(arr)
        dtype = np.int64 if a.dtype.kind in "iu" else float
        buf = evo.arrays.setdefault(name, np.zeros((n_t, *a.shape[1:]), dtype=dtype))
        buf[:n_done] = a[:n_done]


# ------------------------------------------------------------------------------------------- the engine
def build_engine(chain, w: str, site, settings: EvolutionSettings, *, symmetry: str | None = None,
                 graded: bool | None = None) -> BrickworkEngine:
    """The engine for ``settings`` (dt a number): OperatorTEBD for symmetry ``"z2"``, ChargeTEBD for ``"u1"``.

    ``symmetry`` is the resolved choice (default: ``settings.engine_symmetry(chain, w)``); ``graded`` is
    OperatorTEBD's option and is refused with ``"u1"``.
    """
    sym = settings.engine_symmetry(chain, w) if symmetry is None else symmetry
    if sym == "u1":
        if graded is not None:
            raise InputError("graded is an option of the Z2 engine (OperatorTEBD); with symmetry = 'u1' leave it "
                             "None, or use symmetry = 'z2'", arg="graded")
        return ChargeTEBD(chain, w=w, site=site, settings=settings)
    return OperatorTEBD(chain, w=w, site=site, settings=settings, graded=graded)


def _resolve_symmetry(requested: EvolutionSettings, chain, w: str, resume, graded) -> str:
    """The symmetry of this evolution: the settings' choice; with ``"auto"``, the engine that wrote a
    checkpoint being resumed (so that a resumed run repeats the uninterrupted one), and ``"z2"`` when
    ``graded`` (an OperatorTEBD option) is given."""
    sym = requested.engine_symmetry(chain, w)
    written = None
    if resume is not None:
        state = resume.get("state") if isinstance(resume, Mapping) else None
        if isinstance(state, Mapping):
            written = "u1" if state.get("engine") == "u1" or "charges" in state else "z2"
    if requested.symmetry == "auto":
        if written is not None:
            return written
        if graded is not None:
            return "z2"
    elif written is not None and written != sym:
        raise InputError(f"resume: the checkpoint was written by the {written!r} engine but symmetry = "
                         f"{requested.symmetry!r}; resume it with symmetry = {written!r} (or 'auto')", arg="resume")
    return sym


# ------------------------------------------------------------------------------------------- the loop
def evolve(chain, w: str, site, times: Sequence[float], settings: EvolutionSettings, *,
           measurements: Sequence[Measurement] = DEFAULT_MEASUREMENTS, observers: Sequence[Observer] = (),
           resume: Mapping[str, Any] | None = None, threads: int | None = 1,
           graded: bool | None = None) -> Evolution:
    """Evolve W at ``site`` on ``chain`` to every output time and measure there.

    Parameters
    ----------
    chain : Chain
    w : {'X', 'Y', 'Z'}
        The evolved operator.
    site : int or 'center'
        Its site.
    times : sequence of float
        Strictly increasing output times >= 0 (units 1/J).
    settings : EvolutionSettings
        Bond dimension, Trotter step and order, cutoff, steps per block, truncation route.
    measurements : sequence of callables
        Each ``m(engine) -> {name: array}`` at every output time (default :data:`DEFAULT_MEASUREMENTS`).
    observers : sequence of Observer
        Called after every block and at the end (checkpoints, heartbeat, progress).
    resume : mapping, optional
        A checkpoint ``{"state", "outputs", "n_done", "wall_time", "restarts"}`` to continue from; the result
        then equals the uninterrupted evolution bit for bit.
    threads : int or None
        BLAS threads during the evolution (default 1: the gate matrices are small, and several threads on a
        shared machine slow them down); None leaves the BLAS setting alone.
    graded : bool, optional
        Z2-graded blocks of OperatorTEBD (default: the engine's choice, see
        :class:`~mpo_fronts.evolve.OperatorTEBD`); giving it with ``settings.symmetry = "auto"`` selects the Z2
        engine, with ``"u1"`` it is an error.

    Returns
    -------
    Evolution
    """
    from threadpoolctl import threadpool_limits

    if not isinstance(settings, EvolutionSettings):
        raise InputError(f"settings must be an EvolutionSettings, got {type(settings).__name__}", arg="settings")
    if threads is not None and (isinstance(threads, bool) or not isinstance(threads, int) or threads < 1):
        raise InputError(f"threads (BLAS threads) must be a positive integer or None, got {threads!r}",
                         arg="threads")
    t_start = time.perf_counter()
    ts = check_times(times)
    requested, auto_info = settings, None
    symmetry = _resolve_symmetry(requested, chain, check_w(w), resume, graded)  # before dt = "auto" is resolved
    if settings.auto:  # the step from the Trotter tolerance, measured on a window around W
        from .stepsize import auto_dt

        with threadpool_limits(limits=threads):
            dt, auto_info = auto_dt(chain, check_w(w), check_site(site, chain.L),
                                    float(ts[-1]) if ts[-1] > 0 else 1.0, settings.order, settings.splitting,
                                    settings.trotter_tol)
        settings = settings.replace(dt=dt)
    eng = build_engine(chain, w, site, settings, symmetry=symmetry, graded=graded)
    evo = Evolution(times=ts, settings=settings)

    def measure(k: int) -> None:
        for m in measurements:
            evo._store(k, m(eng))
        evo.n_done = k + 1

    with threadpool_limits(limits=threads):  # limits=None leaves the BLAS setting as it is
        if resume is not None:
            eng.load_state_dict(resume["state"])
            n_done = int(resume["n_done"])
            _restore_outputs(evo, resume["outputs"], n_done)
            evo.n_done = n_done
            evo.wall_time = float(resume["wall_time"])
            evo.restarts = int(resume["restarts"]) + 1
            evo.resumed_from = eng.t
            # outputs whose blocks are all done; the checkpoint may predate the readout of the last one
            last_block = {kk: i for i, (kk, _, _) in enumerate(step_plan(ts, eng.dt, eng.chunk))}
            complete = sum(1 for i in last_block.values() if i < eng.blocks_done)
            if complete - n_done > 1:
                raise InputError(f"checkpoint is inconsistent: {n_done} outputs stored, {complete} due",
                                 arg="resume")
            if complete == n_done + 1:
                measure(n_done)

        def hook(e) -> None:
            for ob in observers:
                ob.after_block(e, evo)

        for k, _ in eng.run(ts, hook=hook):
            measure(k)
    evo.engine = {"method": "mpo_tebd", **requested.to_dict(), "dt_used": settings.dt, "symmetry_used": symmetry,
                  "engine": type(eng).__name__, "max_step": eng.max_step, "svd_floor": SVD_FLOOR,
                  "graded": True if symmetry == "u1" else bool(eng.graded), "splits": dict(eng.splits),
                  "blas_threads": threads}
    if auto_info is not None:
        evo.engine["trotter_estimate"] = {k: auto_info[k] for k in ("A", "window", "t_pilot", "ratio",
                                                                    "predicted_error", "safety", "tol")}
    evo.wall_time += time.perf_counter() - t_start
    for ob in observers:
        ob.at_end(evo)
    return evo


def product_states(bits: Sequence[str] | None, L: int, probes: Sequence[str] = PROBES) -> ProductStates | None:
    """The product-state measurement for basis states ``bits`` (validated), or None for infinite temperature."""
    if bits is None:
        return None
    return ProductStates(tuple(check_bits(b, L) for b in bits), tuple(probes))


def truncation_warnings(discarded_weight, times, threshold: float = LARGE_DISCARDED_WEIGHT) -> list[str]:
    """Warnings for a run whose cumulative discarded weight passes ``threshold`` (default 10 %).

    C is read as weights divided by the weight that remains, so it stays in [0, 2] however much was lost; once a
    large part of W(t) is gone, the saturated region behind the front is not meaningful, only the front and
    what lies ahead of it (compare bond dimensions before trusting even those).
    """
    dw = np.asarray(discarded_weight, dtype=float).reshape(-1)
    over = np.flatnonzero(dw > threshold)
    if over.size == 0:
        return []
    t = np.asarray(times, dtype=float).reshape(-1)
    return [f"discarded weight {dw[-1]:.3g} at t = {t[-1]:g} (above {threshold:g} from t = {t[over[0]]:g} on): "
            "C is normalised by the weight that remains, so values behind the front are not meaningful there; "
            "raise chi or use only the front and ahead of it, after a bond-dimension comparison"]


# ------------------------------------------------------------------------------------------- Python API
def evolve_otoc(chain, w: str = "Z", site=0, times=(1.0,), chi: int = 64, dt: float | str = 0.05,
                order: int | None = None,
                cutoff: float = 0.0, state: str | None = None, chunk: int | None = None,
                progress: Callable[[float], None] | None = None, truncation: str = "svd",
                threads: int | None = 1, settings: EvolutionSettings | None = None, splitting: str | None = None,
                trotter_tol: float = 1e-3, symmetry: str = "auto", gate_update: str = "svd") -> OtocResult:
    """OTOCs C(r, t) of W at ``site`` with every probe site r, by Heisenberg-picture MPO TEBD.

    Parameters
    ----------
    chain : Chain
        The model (``xxz_chain``, ``mixed_field_ising_chain``, ``nn_chain``).
    w : {'X', 'Y', 'Z'}
        The evolved operator W.
    site : int or 'center'
        Site of W.
    times : sequence of float
        Strictly increasing output times (>= 0, units 1/J); any spacing.
    chi, dt, order, cutoff, chunk, truncation, splitting, trotter_tol, symmetry, gate_update
        Evolution settings (see :class:`mpo_fronts.settings.EvolutionSettings`); or give ``settings``.
        ``dt="auto"`` chooses the largest step whose estimated Trotter error of C stays below ``trotter_tol``
        (with order 4, Blanes-Moan splitting unless ``order``/``splitting`` say otherwise); the step used is
        ``res.meta["dt_used"]`` and the estimate ``res.meta["trotter_estimate"]``. With ``dt="auto"`` the
        default ``symmetry="auto"`` also evolves with U(1) charge blocks (ChargeTEBD) when the chain conserves
        total S^z and W = Z; with a numeric dt it keeps the Z2 engine unless ``symmetry="u1"``. The engine used
        is ``res.meta["symmetry_used"]``.
    state : str, optional
        None for infinite temperature, or a basis-state bitstring of length L ('0' = spin up) for the
        product-state OTOC C_s(r, t) = 1 - Re <s|W(t) V_r W(t) V_r|s>.
    progress : callable, optional
        Called as ``progress(t)`` after every block of steps.
    threads : int or None
        BLAS threads during the evolution (threadpoolctl; default 1: the gate matrices are small, and several
        threads on a shared machine slow them down). None leaves the BLAS setting as it is.
    settings : EvolutionSettings, optional
        All evolution settings at once (then chi, dt, order, cutoff, chunk, truncation, splitting,
        trotter_tol, symmetry, gate_update are not used).

    Returns
    -------
    OtocResult
        ``res.otoc("X")`` is C(r, t) of shape (n_t, L); ``res.discarded_weight``, ``res.bond_discarded``,
        ``res.max_bond`` and ``res.bond_entropy`` carry the truncation error information; ``res.meta`` the
        settings, the largest step used and the gates per truncation route.

    Examples
    --------
    >>> import mpo_fronts as mf
    >>> res = mf.evolve_otoc(mf.xxz_chain(12, W=1.0, seed=3), w="Z", site=0, times=[1.0, 2.0], chi=32)
    >>> res.otoc("X").shape
    (2, 12)
    """
    if settings is None:
        settings = EvolutionSettings(chi=chi, dt=dt, order=order, cutoff=cutoff,
                                     **({"chunk": chunk} if chunk is not None else {}), truncation=truncation,
                                     splitting=splitting, trotter_tol=trotter_tol, symmetry=symmetry,
                                     gate_update=gate_update)
    if state is not None:
        check_bits(state, chain.L)
    ms = list(DEFAULT_MEASUREMENTS) + ([ProductStates((state,))] if state is not None else [])
    obs = [OnBlock(lambda e, _: progress(e.t))] if progress is not None else []
    evo = evolve(chain, w, site, times, settings, measurements=ms, observers=obs, threads=threads)
    a = evo.arrays
    sotoc = {v: a[f"state_otoc_{v}"][:, 0] for v in PROBES} if state is not None else {}
    meta = {**evo.engine, "w": w.upper() if isinstance(w, str) else w,
            "site": site if not isinstance(site, str) else chain.L // 2, "state": state,
            "warnings": truncation_warnings(a["discarded_weight"], evo.times)}
    for text in meta["warnings"]:
        warnings.warn(text, TruncationWarning, stacklevel=2)
    return OtocResult(times=evo.times, weights=a["weights"], right_weight=a["right_weight"],
                      discarded_weight=a["discarded_weight"], max_bond=a["max_bond"], state_otoc=sotoc, meta=meta,
                      bond_discarded=a["bond_discarded"], bond_entropy=a["bond_entropy"])
