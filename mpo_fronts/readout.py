"""OTOC profiles and operator weights from an evolved operator; product-state OTOCs.

The operator W(t) = sum_S c_S S is held as an MPS over the Pauli letters I, X, Y, Z (index 0..3) with real
coefficients, normalised so that sum_S c_S^2 = 1 before truncation. For a Pauli probe V at site r,
V_r S V_r = -S when the site-r letter of S anticommutes with V, so

    C(r, t) = 2 * (weight of strings whose site-r letter anticommutes with V) / (total weight).

The single-site weights p_r(a) of every site come from one left and one right environment sweep. Dividing by
the total weight means C stays in [0, 2] after truncation; the weight lost to truncation is reported beside
every result as the discarded weight.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Sequence

import numpy as np

from .conventions import ANTICOMMUTES, PAULI, PROBES
from .errors import InputError

__all__ = ["OtocResult", "pauli_weights", "otoc_from_weights", "right_weights", "product_state_otoc",
           "estimate_otoc", "ESTIMATORS", "ANTICOMMUTES", "PROBES", "check_bits", "check_probe"]


def check_probe(v: str) -> str:
    if not isinstance(v, str) or v.upper() not in PROBES:
        raise InputError(f"probe v must be one of 'X', 'Y', 'Z', got {v!r}")
    return v.upper()


def check_bits(bits, L: int) -> str:
    """Validate a basis-state bitstring of length L ('0' = spin up, Z = +1)."""
    if not isinstance(bits, str) or len(bits) != L or set(bits) - {"0", "1"}:
        raise InputError(f"state must be None (infinite temperature) or a string of L = {L} characters '0'/'1' "
                         f"('0' = spin up), got {bits!r}")
    return bits


# --------------------------------------------------------------------------------------------- environments
def _left_envs(arrays: Sequence[np.ndarray], start: int = 0) -> list[np.ndarray]:
    """E[k] = contraction of sites < k with themselves (shape (D_k, D_k)), for k = 0..L."""
    L = len(arrays)
    envs: list[np.ndarray] = [None] * (L + 1)  # type: ignore[list-item]
    e = np.ones((1, 1))
    for k in range(L + 1):
        envs[k] = e
        if k == L:
            break
        A = arrays[k]
        if k < start:
            e = np.eye(A.shape[2])
        else:
            t = np.tensordot(e, A, axes=(0, 0))  # (l', a, r)
            e = np.tensordot(t, A, axes=([0, 1], [0, 1]))
    return envs


def _right_envs(arrays: Sequence[np.ndarray], stop: int | None = None) -> list[np.ndarray]:
    """F[k] = contraction of sites >= k with themselves (shape (D, D)), for k = 0..L."""
    L = len(arrays)
    stop = L if stop is None else stop
    envs: list[np.ndarray] = [None] * (L + 1)  # type: ignore[list-item]
    f = np.ones((1, 1))
    envs[L] = f
    for k in range(L - 1, -1, -1):
        A = arrays[k]
        if k >= stop:
            f = np.eye(A.shape[0])
        else:
            t = np.tensordot(A, f, axes=(2, 0))  # (l, a, r')
            f = np.tensordot(t, A, axes=([1, 2], [1, 2]))
        envs[k] = f
    return envs


def pauli_weights(arrays: Sequence[np.ndarray], center: int | None = None,
                  lenv: list[np.ndarray] | None = None) -> np.ndarray:
    """Single-site Pauli weights p[r, a], a in (I, X, Y, Z), normalised so that each row sums to 1.

    Parameters
    ----------
    arrays : sequence of ndarray, each (D_left, 4, D_right), real
        The operator MPS.
    center : int, optional
        Orthogonality centre if the MPS is in mixed canonical form (sites left of it left-isometric, right of it
        right-isometric); skips the trivial part of the environment sweeps. ``None`` makes no assumption.
    lenv : list of ndarray, optional
        Left environments already computed with the same ``center`` (see :func:`read_operator`).
    """
    L = len(arrays)
    c = center
    if lenv is None:
        lenv = _left_envs(arrays, start=c if c is not None else 0)
    renv = _right_envs(arrays, stop=c + 1 if c is not None else None)
    p = np.empty((L, 4))
    for r, A in enumerate(arrays):
        t = np.tensordot(lenv[r], A, axes=(0, 0))  # (l', a, r)
        t = np.tensordot(t, renv[r + 1], axes=(2, 0))  # (l', a, r')
        p[r] = np.einsum("lar,lar->a", t, A)
    norm = p.sum(axis=1, keepdims=True)
    return p / norm


def otoc_from_weights(weights: np.ndarray, v: str) -> np.ndarray:
    """Infinite-temperature C(r, t) = 2 * sum of the weights of letters anticommuting with v (last axis)."""
    v = check_probe(v)
    return 2.0 * weights[..., ANTICOMMUTES[v]].sum(axis=-1)


#: Estimators of C from a truncated operator (:func:`estimate_otoc`).
ESTIMATORS = ("normalized", "saturated")


def _check_estimator(estimator) -> str:
    if estimator not in ESTIMATORS:
        raise InputError(f"estimator must be one of {', '.join(map(repr, ESTIMATORS))}, got {estimator!r}",
                         arg="estimator")
    return estimator


def estimate_otoc(C, discarded_weight, estimator: str = "normalized") -> np.ndarray:
    """C(r, t) of a truncated operator by one of :data:`ESTIMATORS` (last axis r, the one before it t).

    ``'normalized'`` is C as read (the anticommuting weight divided by the weight that remains), returned
    unchanged. ``'saturated'`` adds back the discarded weight eps(t) as if it were fully scrambled where the kept
    profile has saturated and in proportion to the kept profile elsewhere:

        C_sat(r, t) = C(r, t) (1 - eps(t)) + eps(t) C(r, t) / max_r' C(r', t).

    Why: truncation removes the most entangled, most scrambled part of W(t), so the normalised C is biased low
    behind the front. Measured against exact references (``scripts/bench/accuracy.py``; the numbers are in the
    README, "What is and is not trustworthy"), 'saturated' cut the median error behind the front on every chain
    and chi of that study. Ahead of the front it multiplies C by 1 + eps (1 / max_r C - 1), which is 1 once the
    profile has saturated somewhere. It is a heuristic from those measurements, not a bound: it never replaces
    the trust criteria. Infinite temperature only.
    """
    estimator = _check_estimator(estimator)
    C = np.asarray(C, dtype=float)
    if estimator == "normalized":
        return C
    eps = np.asarray(discarded_weight, dtype=float)
    if eps.shape != C.shape[:-1]:
        raise InputError(f"discarded_weight has shape {eps.shape}, C has {C.shape}: give one value per time",
                         arg="discarded_weight")
    eps = eps[..., None]
    peak = C.max(axis=-1, keepdims=True)
    share = np.clip(C / np.where(peak > 0, peak, 1.0), 0.0, 1.0)
    return C * (1.0 - eps) + eps * share


def right_weights(arrays: Sequence[np.ndarray], center: int | None = None,
                  lenv: list[np.ndarray] | None = None) -> np.ndarray:
    """Right-weight (front) profile rho[r]: the weight of strings whose rightmost non-identity letter is at r.

    Normalised to sum 1 over r (the identity string, which has no right end, is not counted; W(t) of a
    traceless W has none). ``center`` and ``lenv`` as in :func:`pauli_weights`.
    """
    L = len(arrays)
    # Right environments restricted to identity letters on all sites >= k.
    fid: list[np.ndarray] = [None] * (L + 1)  # type: ignore[list-item]
    f = np.ones((1, 1))
    fid[L] = f
    for k in range(L - 1, -1, -1):
        A0 = arrays[k][:, 0, :]
        f = A0 @ f @ A0.T
        fid[k] = f
    if lenv is None:
        lenv = _left_envs(arrays, start=center if center is not None else 0)
    rho = np.empty(L)
    for r, A in enumerate(arrays):
        B = A[:, 1:, :]
        t = np.tensordot(lenv[r], B, axes=(0, 0))
        t = np.tensordot(t, fid[r + 1], axes=(2, 0))
        rho[r] = np.einsum("lar,lar->", t, B)
    total = rho.sum()
    return rho / total if total > 0 else rho


def _basis_products(bit: str) -> np.ndarray:
    """M[a, b] = <s| P_a P_b |s> for one site in basis state s ('0' up, '1' down)."""
    idx = int(bit)
    return np.einsum("aij,bjk->abik", PAULI, PAULI)[:, :, idx, idx]


def _frobenius_weight(arrays: Sequence[np.ndarray]) -> float:
    """sum_S c_S^2 of the MPS (Tr W^2 / 2^L)."""
    return float(_left_envs(arrays)[-1][0, 0])


def product_state_otoc(arrays: Sequence[np.ndarray], bits: str, v: str) -> np.ndarray:
    """Product-state OTOC C_s(r) = 1 - Re <s| W V_r W V_r |s> for every site r.

    W is divided by its Frobenius weight sum_S c_S^2 (1 before truncation), matching :func:`pauli_weights`.
    Cost: one left and one right sweep of complex transfer matrices, O(L chi^3).
    """
    v = check_probe(v)
    L = len(arrays)
    bits = check_bits(bits, L)
    sign = np.where(ANTICOMMUTES[v], -1.0, 1.0)
    Ms = {b: _basis_products(b) for b in "01"}

    def step_left(e, A, B, M):  # e[l, l'] -> sum A[l,a,r] B[l',b,r'] M[a,b]
        t = np.tensordot(e, A, axes=(0, 0))  # (l', a, r)
        t = np.tensordot(t, M, axes=(1, 0))  # (l', r, b)
        return np.einsum("lrb,lbs->rs", t, B)

    left = [np.ones((1, 1), dtype=complex)]
    for k in range(L):
        left.append(step_left(left[-1], arrays[k], arrays[k], Ms[bits[k]]))
    right = [np.ones((1, 1), dtype=complex)] * (L + 1)
    for k in range(L - 1, -1, -1):
        A = arrays[k]
        t = np.tensordot(A, right[k + 1], axes=(2, 0))  # (l, a, r')
        t = np.tensordot(Ms[bits[k]], t, axes=(0, 1))  # (b, l, r')
        right[k] = np.einsum("blr,mbr->lm", t, A)
    norm2 = _frobenius_weight(arrays)
    out = np.empty(L)
    for r in range(L):
        A = arrays[r]
        e = step_left(left[r], A, A * sign[None, :, None], Ms[bits[r]])
        out[r] = 1.0 - np.real(np.sum(e * right[r + 1])) / norm2
    return out


@dataclass
class OtocResult:
    """OTOCs of one evolved operator at the requested times.

    Attributes
    ----------
    times : ndarray (n_t,)
    weights : ndarray (n_t, L, 4)
        Single-site Pauli weights p_r(a), a in (I, X, Y, Z), rows sum to 1.
    right_weight : ndarray (n_t, L)
        Right-weight (front) profile.
    discarded_weight : ndarray (n_t,)
        Cumulative discarded weight (norm loss) up to each time; zeros for exact references.
    max_bond : ndarray (n_t,), int
        Largest bond dimension of the operator at each time.
    state_otoc : dict, probe -> ndarray (n_t, L)
        Product-state OTOCs when a basis state was given (empty for infinite temperature).
    bond_discarded : ndarray (n_t, L-1) or None
        Cumulative discarded weight per bond (where along the chain it was lost); sums to ``discarded_weight``.
    bond_entropy : ndarray (n_t, L-1) or None
        Operator entanglement entropy of W(t) at every bond (natural log).
    meta : dict
        How the result was obtained: method, chi, dt, order, cutoff, w, site, state, conventions.
    """

    times: np.ndarray
    weights: np.ndarray
    right_weight: np.ndarray
    discarded_weight: np.ndarray
    max_bond: np.ndarray
    state_otoc: dict[str, np.ndarray] = field(default_factory=dict)
    meta: dict[str, Any] = field(default_factory=dict)
    bond_discarded: np.ndarray | None = None
    bond_entropy: np.ndarray | None = None

    def __repr__(self) -> str:
        m = self.meta
        how = m.get("method", "?")
        if how == "mpo_tebd":
            how += (f", chi={m.get('chi')}, dt={m.get('dt')}, order={m.get('order')}, "
                    f"discarded weight {float(self.discarded_weight[-1]):.3g}" if self.times.size else "")
        state = f", state {m['state']}" if m.get("state") else ""
        return (f"<OtocResult: operator {m.get('w', '?')} at site {m.get('site', '?')}, L={self.L}, "
                f"{self.times.size} times in [{self.times.min():.4g}, {self.times.max():.4g}]{state}, {how}>"
                if self.times.size else f"<OtocResult: L={self.L}, no times>")

    @property
    def L(self) -> int:
        return self.weights.shape[1]

    def otoc(self, v: str = "Z", estimator: str = "normalized") -> np.ndarray:
        """C(r, t) with probe v at every site, shape (n_t, L): product-state OTOC if a state was given.

        ``estimator='saturated'`` gives :func:`estimate_otoc`'s correction for the discarded weight (infinite
        temperature only); the default is C as read from the truncated operator.
        """
        v = check_probe(v)
        estimator = _check_estimator(estimator)
        if self.state_otoc:
            if estimator != "normalized":
                raise InputError("estimator='saturated' is defined for infinite temperature only; this result is "
                                 f"for the state {self.meta.get('state')!r}", arg="estimator")
            return self.state_otoc[v]
        return estimate_otoc(otoc_from_weights(self.weights, v), self.discarded_weight, estimator)


def read_operator(arrays: Sequence[np.ndarray], center: int | None = None, state: str | None = None,
                  probes: Sequence[str] = PROBES) -> dict[str, Any]:
    """Everything measured at one time: single-site weights, right-weight profile, product-state OTOCs."""
    lenv = _left_envs(arrays, start=center if center is not None else 0)  # shared by both profiles
    out: dict[str, Any] = {"weights": pauli_weights(arrays, center, lenv),
                           "right_weight": right_weights(arrays, center, lenv)}
    if state is not None:
        out["state_otoc"] = {v: product_state_otoc(arrays, state, v) for v in probes}
    return out
