"""Trotter error of the engine's splittings, measured on a small window, and the step that meets a tolerance.

The engine's Trotter error is a property of the splitting alone (truncation aside): on a chain small enough
for dense matrices, one Trotter step is the unitary U = prod_layers prod_bonds exp(-i h_b d) built from the very
bond Hamiltonians the engine uses (:meth:`mpo_fronts.models.Chain.bond_hamiltonians`, one-site terms shared
between bonds), and W after n steps is (U^n)^dag W U^n. Diagonalizing U once (its Schur form, unitary even for
degenerate eigenvalues) gives every multiple of the step at the cost of one exact evolution.

:func:`trotter_otoc` computes C(r, t) that way and :func:`exact_window_otoc` the exact one (eigh of H);
:func:`estimate_trotter_error` runs both on a window of ``window`` sites around W (the chain's own fields and
couplings there) up to a pilot time, at a step and at half of it, and fits the model

    max_r |dC(r, t)| <= A dt^p t          (p = the order of the splitting),

the leading term of the error of a p-th order splitting, growing at most linearly in time for local
observables (the Trotterized evolution is exact evolution under H + O(dt^p) terms; common practice).
:func:`auto_dt` returns the largest step with A dt^p t_final * SAFETY below a tolerance. The window stands for
the chain because the Trotter error of C near the front is set by the local fields and couplings; the safety
factor covers windows that are not representative of the rest of the chain; the tests check the claim
against dense exact evolution of larger chains.
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from .conventions import LETTERS, PAULI
from .errors import InputError
from .models import Chain
from .schedules import SPLITTINGS, check_splitting, layers_per_step, step_layers

__all__ = ["trotter_otoc", "exact_window_otoc", "window_chain", "estimate_trotter_error", "auto_dt", "SAFETY",
           "DEFAULT_WINDOW", "DT_RANGE", "DEFAULT_TROTTER_TOL", "splittings", "trotter_step"]

#: Factor between the fitted error and the error dt = "auto" allows for (the window is a sample of the chain).
SAFETY = 3.0
#: Sites of the window on which the error is measured (dense matrices of 2^window).
DEFAULT_WINDOW = 6
#: Smallest and largest step dt = "auto" chooses (units of 1/J).
DT_RANGE = (1e-3, 0.5)
#: Default tolerance on |dC| (see EvolutionSettings.trotter_tol).
DEFAULT_TROTTER_TOL = 1e-3
_PILOT_T = 8.0
_PILOT_PROBES = ("X", "Z")  # Y behaves like X in these chains; two probes halve the pilot's cost
_MAX_DENSE = 10


def _op(letter: str, r: int, L: int) -> np.ndarray:
    """A Pauli letter at site r as a dense 2^L matrix (site 0 is the most significant factor)."""
    return np.kron(np.kron(np.eye(2 ** r), PAULI[LETTERS.index(letter)]), np.eye(2 ** (L - r - 1)))


def _check_dense(chain: Chain, w: str, site: int) -> None:
    if not isinstance(chain, Chain):
        raise InputError(f"chain must be a Chain, got {type(chain).__name__}", arg="chain")
    if chain.L > _MAX_DENSE:
        raise InputError(f"dense Trotter products need L <= {_MAX_DENSE}, got L = {chain.L}; use window_chain",
                         arg="chain")
    if w not in LETTERS[1:]:
        raise InputError(f"w must be 'X', 'Y' or 'Z', got {w!r}", arg="w")
    if not 0 <= int(site) < chain.L:
        raise InputError(f"site must be in 0..{chain.L - 1}, got {site!r}", arg="site")


def _otoc_in_basis(Z: np.ndarray, phases: Sequence[np.ndarray], w: str, site: int, L: int,
                   probes: Sequence[str]) -> dict[str, np.ndarray]:
    """C(r, t) = 1 - Re Tr[W(t) V_r W(t) V_r] / 2^L with W(t)_ij = conj(ph_i) W_ij ph_j in the basis Z."""
    We = Z.conj().T @ _op(w, site, L) @ Z
    out = {v: np.empty((len(phases), L)) for v in probes}
    Ve = {(v, r): Z.conj().T @ _op(v, r, L) @ Z for v in probes for r in range(L)}
    for k, ph in enumerate(phases):
        Wt = ph.conj()[:, None] * We * ph[None, :]
        for v in probes:
            for r in range(L):
                M = Wt @ Ve[(v, r)]
                out[v][k, r] = 1.0 - np.sum(M * M.T).real / 2 ** L  # Tr(M M)
    return out


def _bond_unitary(h: np.ndarray, d: float) -> np.ndarray:
    e, v = np.linalg.eigh(h)
    return (v * np.exp(-1j * d * e)) @ v.conj().T


def _layer(hb: np.ndarray, parity: int, d: float, L: int) -> np.ndarray:
    """exp(-i d sum_{b of this parity} h_b) as a dense 2^L matrix."""
    mats = []
    r = 0
    if parity == 1:
        mats.append(np.eye(2))
        r = 1
    while r < L:
        if r + 1 < L and r % 2 == parity:
            mats.append(_bond_unitary(hb[r], d))
            r += 2
        else:
            mats.append(np.eye(2))
            r += 1
    out = np.array([[1.0 + 0j]])
    for m in mats:
        out = np.kron(out, m)
    return out


def trotter_step(chain: Chain, tau: float, order: int = 2, splitting: str = "standard") -> np.ndarray:
    """One Trotter step of length tau of the engine's splitting, as a dense unitary (L <= 10)."""
    check_splitting(order, splitting)
    hb = chain.bond_hamiltonians()
    U = np.eye(2 ** chain.L, dtype=complex)
    for parity, c in step_layers(order, splitting):
        U = _layer(hb, parity, c * tau, chain.L) @ U
    return U


def trotter_otoc(chain: Chain, w: str, site: int, tau: float, steps: Sequence[int], order: int = 2,
                 splitting: str = "standard", probes: Sequence[str] = ("X", "Y", "Z")) -> dict[str, np.ndarray]:
    """C(r, t) after ``steps[k]`` Trotter steps of length tau (no truncation), dense; {probe: (n_t, L)}."""
    import scipy.linalg as sla

    _check_dense(chain, w, site)
    U = trotter_step(chain, tau, order, splitting)
    T, Z = sla.schur(U, output="complex")  # U normal: T is diagonal up to rounding, Z unitary
    lam = np.diag(T)
    lam = lam / np.abs(lam)
    # U^n = Z diag(lam^n) Z^dag, so (U^n)^dag W U^n has elements conj(lam_i^n) W_ij lam_j^n in the Z basis
    phases = [lam ** int(n) for n in steps]
    return _otoc_in_basis(Z, phases, w, int(site), chain.L, probes)


def exact_window_otoc(chain: Chain, w: str, site: int, times: Sequence[float],
                      probes: Sequence[str] = ("X", "Y", "Z")) -> dict[str, np.ndarray]:
    """Exact C(r, t) of a small chain (eigh of the dense H built from the same bond Hamiltonians)."""
    _check_dense(chain, w, site)
    L = chain.L
    hb = chain.bond_hamiltonians()
    H = np.zeros((2 ** L, 2 ** L), dtype=complex)
    for b in range(L - 1):
        H += np.kron(np.kron(np.eye(2 ** b), hb[b]), np.eye(2 ** (L - b - 2)))
    E, V = np.linalg.eigh(H)
    phases = [np.exp(-1j * E * float(t)) for t in times]
    return _otoc_in_basis(V, phases, w, int(site), L, probes)


def window_chain(chain: Chain, site: int, window: int = DEFAULT_WINDOW) -> tuple[Chain, int]:
    """The ``window`` sites around ``site`` as a chain of their own (same bond and site terms) and W's site
    in it."""
    L = chain.L
    n = min(int(window), L)
    a = int(np.clip(int(site) - n // 2, 0, L - n))
    sub = Chain(L=n, bond_terms=chain.bond_terms[a:a + n - 1], site_terms=chain.site_terms[a:a + n],
                kind=chain.kind, params=dict(chain.params),
                fields=None if chain.fields is None else np.asarray(chain.fields)[a:a + n],
                couplings=None if chain.couplings is None else np.asarray(chain.couplings)[a:a + n - 1],
                conserves_sz=chain.conserves_sz)
    return sub, int(site) - a


def estimate_trotter_error(chain: Chain, w: str, site: int, dt: float = 0.1, order: int = 2,
                           splitting: str = "standard", *, window: int = DEFAULT_WINDOW,
                           t_pilot: float = _PILOT_T, n_times: int = 8) -> dict[str, Any]:
    """Fit ``max_r |dC| <= A dt^p t`` on a window around W, at the step ``dt`` and at ``dt / 2``.

    Returns
    -------
    dict
        ``A`` (the larger of the two fits), ``order``, ``splitting``, ``window``, ``t_pilot``, ``dts``,
        ``errors`` (largest |dC| over sites, probes and pilot times at each step), ``ratio`` (error ratio when
        the step halves; 2^p in the asymptotic regime), ``asymptotic`` (ratio at least 0.6 * 2^p).
    """
    check_splitting(order, splitting)
    sub, s = window_chain(chain, site, window)
    fits, errs = [], []
    dts = (float(dt), float(dt) / 2)
    for d in dts:
        n_max = max(1, int(round(t_pilot / d)))
        steps = np.unique(np.round(np.linspace(n_max / n_times, n_max, n_times)).astype(int))
        steps = steps[steps >= 1]  # a short pilot rounds its first steps to 0: t = 0 has no Trotter error to fit
        times = steps * d
        tr = trotter_otoc(sub, w, s, d, steps, order, splitting, probes=_PILOT_PROBES)
        ex = exact_window_otoc(sub, w, s, times, probes=_PILOT_PROBES)
        e_t = np.max([np.abs(tr[v] - ex[v]).max(axis=1) for v in tr], axis=0)  # (n_t,)
        errs.append(float(e_t.max()))
        fits.append(float(np.max(e_t / (d ** order * times))))
    ratio = errs[0] / errs[1] if errs[1] > 0 else float("inf")
    return {"A": max(fits), "order": order, "splitting": splitting, "window": sub.L, "t_pilot": float(t_pilot),
            "dts": list(dts), "errors": errs, "ratio": ratio, "asymptotic": bool(ratio >= 0.6 * 2 ** order)}


def auto_dt(chain: Chain, w: str, site: int, t_final: float, order: int = 2, splitting: str = "standard",
            tol: float = DEFAULT_TROTTER_TOL, *, window: int = DEFAULT_WINDOW, safety: float = SAFETY
            ) -> tuple[float, dict[str, Any]]:
    """The largest step whose estimated Trotter error of C up to ``t_final`` stays below ``tol``.

    The fit of :func:`estimate_trotter_error` starts at dt = 0.2 and halves the step until the error ratio
    shows the asymptotic regime (at most four times); the step is then ``(tol / (safety A t_final))^(1/p)``,
    kept within :data:`DT_RANGE`.

    Returns
    -------
    dt : float
    info : dict
        The fit (see :func:`estimate_trotter_error`) plus ``dt``, ``tol``, ``t_final``, ``safety``,
        ``predicted_error`` (A dt^p t_final: the error the choice claims, before the safety factor),
        ``layers_per_unit_time`` (the cost), and ``limited`` when DT_RANGE bounded the step.
    """
    if not (isinstance(tol, (int, float)) and 0 < tol < 1):
        raise InputError(f"tol must be a number in (0, 1), got {tol!r}", arg="trotter_tol")
    if not (isinstance(t_final, (int, float)) and t_final > 0):
        raise InputError(f"t_final must be positive, got {t_final!r}", arg="times")
    dt0 = 0.2
    for _ in range(5):
        fit = estimate_trotter_error(chain, w, site, dt0, order, splitting, window=window,
                                     t_pilot=min(_PILOT_T, max(float(t_final), 4 * dt0)))
        if fit["asymptotic"] or max(fit["errors"]) < 1e-11:
            break
        dt0 /= 2
    A = max(fit["A"], 1e-16)
    dt = (tol / (safety * A * float(t_final))) ** (1.0 / order)
    limited = None
    if dt > DT_RANGE[1]:
        dt, limited = DT_RANGE[1], "largest step"
    elif dt < DT_RANGE[0]:
        dt, limited = DT_RANGE[0], "smallest step (the tolerance is not met at this step)"
    dt = float(f"{dt:.4g}")
    info = dict(fit, dt=dt, tol=float(tol), t_final=float(t_final), safety=float(safety),
                predicted_error=float(A * dt ** order * t_final),
                layers_per_unit_time=layers_per_step(order, splitting) / dt)
    if limited:
        info["limited"] = limited
    return dt, info


def splittings() -> list[tuple[int, str]]:
    """Every (order, splitting) pair the engine offers."""
    return [(o, s) for o, names in SPLITTINGS.items() for s in names]
