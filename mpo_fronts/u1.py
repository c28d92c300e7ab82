"""U(1) charge blocks: the TEBD engine for chains that conserve total S^z, block by block over charge sectors.

When H commutes with total S^z, conjugation by exp(-i theta S^z_tot) commutes with the Heisenberg evolution,
so W(t) keeps the U(1) charge of W. The operator is held in the single-site basis

    e_I = I,   e_Z = Z,   e_+ = (X + iY) / sqrt 2 = sqrt 2 S^+,   e_- = (X - iY) / sqrt 2 = sqrt 2 S^-

(letter order I, Z, +, -; charges 0, 0, +1, -1), orthonormal under <A, B> = Tr(A^dag B) / 2, so the coefficients
d_S of W(t) = sum_S d_S e_S are complex with sum_S |d_S|^2 the Frobenius weight, and the two-site Heisenberg
gates G_c = T2 G T2^dag (G the real Pauli transfer matrix of :mod:`mpo_fronts.pauli`, T2 the two-site change
of basis) are unitary 16 x 16 matrices that are block diagonal in the charge of the letter pair (block sizes 1,
4, 6, 4, 1 for charge -2..2). Every bond index carries the charge of the left part of the string (the sum of
the letter charges to its left); bond indices are kept sorted by charge, and a site tensor A[l, a, r] vanishes
unless q_r = q_l + c(a). Every contraction, QR and truncation works block by block over the charge sectors
of the bond it acts on (the Z2 grading of :mod:`mpo_fronts.evolve` is the parity of this charge), and the
truncation keeps the globally largest singular values across the blocks, so the discarded-weight ledger is the
norm loss exactly, as in the Z2 engine.

Only W = Z is evolved (charge 0; X and Y are not charge eigenstates). For a charge-0 operator the strings with
e_+ and with e_- at one site and the same letters elsewhere have total charges that differ by 2, so the cross
terms between them vanish and the single-site weights of X and of Y are each half the summed weight of e_+
and e_- (:func:`charge_profiles`). The C(r, t) of W = X follows from the z-rotation symmetry of these chains
by other means; it is not computed here.
"""

from __future__ import annotations

from numbers import Integral
from typing import Any, Callable, Iterator, Sequence

import numpy as np

from .errors import InputError
from .evolve import check_site, check_w, keep_freed_memory
from .models import Chain
from .pauli import bond_propagators, transfer_matrices
from .schedules import block_layers, step_plan
from .settings import EvolutionSettings
from .truncation import TruncationLedger, route

__all__ = ["ChargeTEBD", "CHARGE_LETTERS", "LETTER_CHARGE", "TO_CHARGE", "charge_gates", "charge_weights",
           "charge_profiles", "COMPLEX_ROUTES"]

#: Letters of the charge basis, in the order of the letter axis of :attr:`ChargeTEBD.arrays`.
CHARGE_LETTERS = ("I", "Z", "+", "-")
#: U(1) charge of each letter of the charge basis.
LETTER_CHARGE = np.array([0, 0, 1, -1], dtype=np.int64)
LETTER_CHARGE.setflags(write=False)
_S = 1.0 / np.sqrt(2.0)
#: d = TO_CHARGE @ c: charge-basis coefficients (I, Z, +, -) from Pauli coefficients (I, X, Y, Z); unitary.
TO_CHARGE = np.array([[1, 0, 0, 0],
                      [0, 0, 0, 1],
                      [0, _S, -1j * _S, 0],
                      [0, _S, 1j * _S, 0]], dtype=complex)
TO_CHARGE.setflags(write=False)
#: Truncation routes that handle complex blocks (the randomized and Gram routes transpose without conjugating).
COMPLEX_ROUTES = ("svd",)
_PAIR_CHARGE = (LETTER_CHARGE[:, None] + LETTER_CHARGE[None, :]).reshape(16)
_GATE_LEAK_TOL = 1e-10  # largest charge-violating gate entry tolerated (then set to exactly zero)
_EMPTY = np.zeros(0, dtype=np.int64)


def charge_gates(h_bonds: np.ndarray, tau: float) -> np.ndarray:
    """Heisenberg gates of exp(-i H_b tau) in the charge basis, (n, 16, 16) complex, block diagonal in charge.

    G_c = T2 G T2^dag with G the Pauli transfer matrix (c' = G c) and T2 = TO_CHARGE (x) TO_CHARGE, so that
    d' = G_c d. Entries between letter pairs of different charge are set to exactly zero; an InputError is raised
    when they are not zero to rounding (a bond Hamiltonian that does not conserve S^z).
    """
    G = transfer_matrices(bond_propagators(h_bonds, tau))
    T2 = np.kron(TO_CHARGE, TO_CHARGE)
    Gc = T2[None] @ G @ T2.conj().T[None]
    off = _PAIR_CHARGE[:, None] != _PAIR_CHARGE[None, :]
    leak = float(np.abs(Gc[:, off]).max()) if Gc.size else 0.0
    if leak > _GATE_LEAK_TOL:
        raise InputError(f"chain: a bond Hamiltonian does not conserve total S^z (charge-violating gate entry "
                         f"{leak:.3g}); use OperatorTEBD for this chain", arg="chain")
    Gc[:, off] = 0.0
    return Gc


def _runs(q: np.ndarray):
    """Charges and [start, stop) of the runs of a sorted charge array, as Python lists."""
    n = q.size
    if n == 0:
        return [], [], []
    cut = np.flatnonzero(q[1:] != q[:-1]) + 1
    starts = np.concatenate(([0], cut))
    stops = np.concatenate((cut, [n]))
    return q[starts].tolist(), starts.tolist(), stops.tolist()


def _grouped(q: np.ndarray):
    """Index groups of an unsorted charge array: {charge: indices with that charge (ascending)}."""
    perm = np.argsort(q, kind="stable")
    vals, a, b = _runs(q[perm])
    return {v: perm[i:j] for v, i, j in zip(vals, a, b)}


# -------------------------------------------------------------------------------------------- engine
class ChargeTEBD:
    """Heisenberg-picture TEBD of W = Z with U(1) charge blocks, for chains that conserve total S^z.

    The same interface as :class:`mpo_fronts.evolve.OperatorTEBD` (``run``, ``state_dict``, ``norm2``, the
    ledger, ``t``, ``center``, ``max_bond``, ``max_step``, ``blocks_done``); results equal it to rounding where
    neither truncates, and with truncation both keep the globally largest singular values of each two-site
    block (the U(1) blocks are a refinement of the Z2 blocks, so they may differ only where singular values are
    degenerate at the cut).

    Parameters
    ----------
    chain : Chain
        A chain with ``conserves_sz`` (the XXZ chain of :func:`mpo_fronts.models.xxz_chain`).
    w : {'Z'}
        The evolved operator; only Z (charge 0) is supported.
    site : int or 'center'
        Where W sits at t = 0.
    settings : EvolutionSettings, optional
        chi, dt, order, cutoff, chunk, truncation (see :class:`mpo_fronts.settings.EvolutionSettings`);
        ``truncation`` must be one of :data:`COMPLEX_ROUTES`.
    **options
        Instead of ``settings``, the same fields as keywords.

    Attributes
    ----------
    arrays : list of ndarray (D_left, 4, D_right), complex
        The operator MPS in the charge basis (letters I, Z, +, -; see the module doc), mixed canonical around
        ``center``; :meth:`pauli_arrays` gives it in the Pauli basis.
    charges : list of ndarray (D_b,), int
        Charge of every index of bond b (between sites b and b + 1), ascending.
    ledger : TruncationLedger
        Discarded weight: total (``discarded_weight``), per bond, gates per route.

    Examples
    --------
    >>> from mpo_fronts.models import xxz_chain
    >>> eng = ChargeTEBD(xxz_chain(10, W=1.0, seed=1), w="Z", site=5, chi=16, dt=0.1)
    >>> for k, e in eng.run([0.5, 1.0]):
    ...     pass
    >>> round(e.t, 12), e.max_bond <= 16
    (1.0, True)
    """

    graded = "u1"

    def __init__(self, chain: Chain, w: str = "Z", site=0, settings: EvolutionSettings | None = None,
                 **options):
        if not isinstance(chain, Chain):
            raise InputError(f"chain must be a Chain (from xxz_chain or nn_chain), got {type(chain).__name__}",
                             arg="chain")
        if not chain.conserves_sz:
            raise InputError(f"chain: ChargeTEBD needs a chain that conserves total S^z (chain.conserves_sz is "
                             f"False for this {chain.kind!r} chain); use OperatorTEBD for it", arg="chain")
        if settings is None:
            settings = EvolutionSettings(**options)
        elif options:
            raise InputError(f"give either settings or keyword settings ({', '.join(sorted(options))}), not both",
                             arg=sorted(options)[0])
        elif not isinstance(settings, EvolutionSettings):
            raise InputError(f"settings must be an EvolutionSettings, got {type(settings).__name__}", arg="settings")
        if check_w(w) != "Z":
            raise InputError(f"w: ChargeTEBD evolves W = 'Z' only (a charge eigenstate; X and Y mix charges +1 "
                             f"and -1), got {w!r}; use OperatorTEBD for W = X or Y", arg="w")
        if settings.truncation not in COMPLEX_ROUTES:
            raise InputError(f"truncation must be one of {', '.join(map(repr, COMPLEX_ROUTES))} for ChargeTEBD "
                             f"(its blocks are complex), got {settings.truncation!r}", arg="truncation")
        self.settings = settings
        self.chain = chain
        self.L = chain.L
        self.w = "Z"
        self.site = check_site(site, self.L)
        self.chi, self.dt, self.order = settings.chi, settings.dt, settings.order
        self.cutoff, self.chunk, self.truncation = settings.cutoff, settings.chunk, settings.truncation
        self.ledger = TruncationLedger.empty(self.L - 1)
        keep_freed_memory()
        self._hb = chain.bond_hamiltonians()
        self._gates: dict[float, np.ndarray] = {}
        ident = np.zeros((1, 4, 1), dtype=complex)
        ident[0, 0, 0] = 1.0
        self.arrays: list[np.ndarray] = [ident.copy() for _ in range(self.L)]
        self.arrays[self.site] = np.zeros((1, 4, 1), dtype=complex)
        self.arrays[self.site][0, 1, 0] = 1.0  # e_Z = Z
        self.charges: list[np.ndarray] = [np.zeros(1, dtype=np.int64) for _ in range(self.L - 1)]
        self._edge = (np.zeros(1, dtype=np.int64), np.zeros(1, dtype=np.int64))  # W = Z has total charge 0
        self.center = self.site
        self.lo = self.hi = self.site
        self.t = 0.0
        self.blocks_done = 0
        self.max_step = 0.0
        self._split = route(self.truncation).split_blocks

    # ------------------------------------------------------------------ bookkeeping
    @property
    def max_bond(self) -> int:
        """Largest bond dimension of the operator now."""
        return max(A.shape[2] for A in self.arrays)

    @property
    def discarded_weight(self) -> float:
        """Cumulative discarded weight: the norm loss 1 - sum_S |d_S|^2 (see :attr:`ledger`)."""
        return self.ledger.total

    @property
    def splits(self) -> dict[str, int]:
        """Gates per truncation route that actually ran."""
        return self.ledger.splits

    def norm2(self) -> float:
        """Frobenius weight sum_S |d_S|^2 = Tr(W(t)^2) / 2^L (from the orthogonality centre)."""
        A = self.arrays[self.center]
        return float(np.vdot(A, A).real)

    def sector_dims(self, b: int) -> dict[int, int]:
        """Dimension of every charge sector of bond b (between sites b and b + 1)."""
        vals, a, z = _runs(self.charges[b])
        return {v: j - i for v, i, j in zip(vals, a, z)}

    def pauli_arrays(self) -> list[np.ndarray]:
        """The operator MPS in the Pauli basis I, X, Y, Z (complex tensors, the same canonical form).

        A_P[l, p, r] = sum_a A[l, a, r] conj(TO_CHARGE[a, p]); the contracted coefficients are the real Pauli
        coefficients of W(t) (to rounding). Sweeps over these tensors must conjugate one layer (or, as the
        bilinear sweeps of :mod:`mpo_fronts.readout` do, make no use of the canonical form).
        """
        Tc = TO_CHARGE.conj()
        return [np.einsum("lar,ap->lpr", A, Tc) for A in self.arrays]

    def profiles(self) -> dict[str, np.ndarray]:
        """``weights`` (L, 4) single-site Pauli weights (I, X, Y, Z; rows sum to 1), ``right_weight`` (L,)."""
        return charge_profiles(self)

    def state_dict(self) -> dict:
        """Everything needed to continue the evolution (numpy arrays and numbers only)."""
        return {"engine": "u1", "arrays": [A.copy() for A in self.arrays], "t": self.t, **self.ledger.state(),
                "blocks_done": self.blocks_done, "center": self.center, "lo": self.lo, "hi": self.hi,
                "max_step": self.max_step, "charges": [q.copy() for q in self.charges]}

    def load_state_dict(self, state: dict) -> None:
        """Restore a state saved by :meth:`state_dict` (same chain, operator and engine settings)."""
        if "charges" not in state:
            raise InputError("state: this checkpoint was not written by ChargeTEBD (no bond charges); resume it "
                             "with the engine that wrote it", arg="state")
        arrays = [np.asarray(A, dtype=complex) for A in state["arrays"]]
        if len(arrays) != self.L:
            raise InputError(f"state: checkpoint holds {len(arrays)} sites, the chain has L = {self.L}",
                             arg="state")
        self.arrays = arrays
        self.charges = [np.asarray(q, dtype=np.int64) for q in state["charges"]]
        self.t = float(state["t"])
        self.ledger = TruncationLedger.from_state(state, self.L - 1)
        self.blocks_done = int(state["blocks_done"])
        self.center = int(state["center"])
        self.lo, self.hi = int(state["lo"]), int(state["hi"])
        self.max_step = float(state.get("max_step", 0.0))

    # ------------------------------------------------------------------ evolution
    def run(self, times: Sequence[float], hook: Callable[["ChargeTEBD"], None] | None = None
            ) -> Iterator[tuple[int, "ChargeTEBD"]]:
        """Evolve to each requested time in turn, yielding ``(k, self)`` at times[k].

        Resumes after ``blocks_done`` blocks of the plan (for a restored checkpoint). ``hook(self)`` is called
        after every block, when the operator is a physical state at time ``self.t``.
        """
        plan = step_plan(times, self.dt, self.chunk)
        ts = np.asarray(times, dtype=float).reshape(-1)
        for i, (k, n, tau) in enumerate(plan):
            if i < self.blocks_done:
                continue
            if n:
                for parity, d in block_layers(self.order, n, tau):
                    self._apply_layer(parity, d)
                self.max_step = max(self.max_step, tau)
            self.blocks_done = i + 1
            last = i + 1 == len(plan) or plan[i + 1][0] != k
            self.t = float(ts[k]) if last else self.t + n * tau
            if hook is not None:
                hook(self)
            if last:
                yield k, self

    def _layer_gates(self, d: float) -> np.ndarray:
        key = float(d)
        G = self._gates.get(key)
        if G is None:
            if len(self._gates) > 16:
                self._gates.clear()
            G = charge_gates(self._hb, d)
            self._gates[key] = G
        return G

    def _apply_layer(self, parity: int, d: float) -> None:
        bonds = [b for b in range(parity, self.L - 1, 2) if b <= self.hi and b + 1 >= self.lo]
        if not bonds:
            return
        G = self._layer_gates(d)
        if abs(self.center - bonds[0]) <= abs(self.center - bonds[-1] - 1):
            for b in bonds:
                self._move_center(b)
                self._gate(b, G[b], to_right=True)
        else:
            for b in reversed(bonds):
                self._move_center(b + 1)
                self._gate(b, G[b], to_right=False)
        self.lo = min(self.lo, bonds[0])
        self.hi = max(self.hi, bonds[-1] + 1)

    def _q(self, k: int) -> np.ndarray:
        """Charges of bond k; k = -1 and L - 1 are the chain's edges."""
        if k < 0:
            return self._edge[0]
        if k >= self.L - 1:
            return self._edge[1]
        return self.charges[k]

    def _move_center(self, target: int) -> None:
        arrays = self.arrays
        c = self.center
        while c < target:  # A = Q R per sector of bond c; R goes into site c + 1
            A, B = arrays[c], arrays[c + 1]
            Dl, _, Dr = A.shape
            m = A.reshape(Dl * 4, Dr)
            rows = _grouped((self._q(c - 1)[:, None] + LETTER_CHARGE[None, :]).reshape(-1))
            vals, a, z = _runs(self.charges[c])
            B2 = B.reshape(Dr, -1)
            qs, rs, labs, off = [], [], [], 0
            for v, i, j in zip(vals, a, z):
                r_idx = rows.get(v)
                if r_idx is None:
                    continue  # no row can carry this charge: these bond indices hold zeros and leave
                q, r = np.linalg.qr(m[r_idx, i:j])
                qs.append((r_idx, off, q))
                rs.append(r @ B2[i:j])
                labs.append(np.full(q.shape[1], v, dtype=np.int64))
                off += q.shape[1]
            newA = np.zeros((Dl * 4, off), dtype=complex)
            for r_idx, o, q in qs:
                newA[r_idx, o:o + q.shape[1]] = q
            arrays[c] = newA.reshape(Dl, 4, off)
            arrays[c + 1] = np.concatenate(rs).reshape(off, 4, -1)
            self.charges[c] = np.concatenate(labs)
            c += 1
        while c > target:  # A^T = Q R per sector of bond c - 1; R^T goes into site c - 1
            A, P = arrays[c], arrays[c - 1]
            Dl, _, Dr = A.shape
            m = A.reshape(Dl, 4 * Dr)
            cols = _grouped((self._q(c)[None, :] - LETTER_CHARGE[:, None]).reshape(-1))
            vals, a, z = _runs(self.charges[c - 1])
            P2 = P.reshape(-1, Dl)
            qs, rs, labs, off = [], [], [], 0
            for v, i, j in zip(vals, a, z):
                c_idx = cols.get(v)
                if c_idx is None:
                    continue
                q, r = np.linalg.qr(m[i:j, c_idx].T)
                qs.append((c_idx, off, q))
                rs.append(P2[:, i:j] @ r.T)
                labs.append(np.full(q.shape[1], v, dtype=np.int64))
                off += q.shape[1]
            newA = np.zeros((off, 4 * Dr), dtype=complex)
            for c_idx, o, q in qs:
                newA[o:o + q.shape[1], c_idx] = q.T
            arrays[c] = newA.reshape(off, 4, Dr)
            arrays[c - 1] = np.concatenate(rs, axis=1).reshape(P.shape[0], 4, off)
            self.charges[c - 1] = np.concatenate(labs)
            c -= 1
        self.center = c

    def _gate(self, b: int, G: np.ndarray, to_right: bool) -> None:
        A, B = self.arrays[b], self.arrays[b + 1]
        Dl, _, Dm = A.shape
        Dr = B.shape[2]
        ncol = 4 * Dr
        # rows (l, a) of theta carry q_l + c(a), columns (b, r) carry q_r - c(b): the charge of the middle bond
        rows = _grouped((self._q(b - 1)[:, None] + LETTER_CHARGE[None, :]).reshape(-1))
        cols = _grouped((self._q(b + 1)[None, :] - LETTER_CHARGE[:, None]).reshape(-1))
        A2 = A.reshape(Dl * 4, Dm)
        B2 = B.reshape(Dm, ncol)
        flat = {}
        theta = np.zeros(Dl * 4 * ncol, dtype=complex)
        vals, a, z = _runs(self.charges[b])
        for v, i, j in zip(vals, a, z):  # theta block by block over the old middle charge
            r_idx, c_idx = rows.get(v), cols.get(v)
            if r_idx is None or c_idx is None:
                continue
            f = (r_idx * ncol)[:, None] + c_idx[None, :]
            flat[v] = f
            theta[f] = A2[r_idx, i:j] @ B2[i:j, c_idx]
        theta = np.matmul(G, theta.reshape(Dl, 16, Dr)).reshape(-1)
        blocks = []
        for v, r_idx in rows.items():  # after the gate: blocks over the new middle charge
            c_idx = cols.get(v)
            if c_idx is None:
                continue
            f = flat.get(v)
            if f is None:
                f = (r_idx * ncol)[:, None] + c_idx[None, :]
            blocks.append((v, r_idx, c_idx, theta[f]))
        parts, disc, used = self._split(blocks, self.chi, self.cutoff, to_right, (Dl * 4, ncol))
        self.ledger.add(b, disc, used)
        k = sum(left.shape[1] for left, _ in parts)
        newA = np.zeros((Dl * 4, k), dtype=complex)
        newB = np.zeros((k, ncol), dtype=complex)
        labs, off = [], 0
        for (v, r_idx, c_idx, _), (left, right) in zip(blocks, parts):
            kp = left.shape[1]
            if kp == 0:
                continue
            newA[r_idx, off:off + kp] = left
            newB[off:off + kp, c_idx] = right
            labs.append(np.full(kp, v, dtype=np.int64))
            off += kp
        self.arrays[b] = newA.reshape(Dl, 4, k)
        self.arrays[b + 1] = newB.reshape(k, 4, Dr)
        self.charges[b] = np.concatenate(labs)
        self.center = b + 1 if to_right else b


# -------------------------------------------------------------------------------------------- readout
def _step_left(e, A):
    """E'[r, r'] = sum conj(A[l, a, r]) e[l, l'] A[l', a, r'] (e None: the identity)."""
    Dl, _, Dr = A.shape
    A2 = A.reshape(Dl * 4, Dr)
    t = A2 if e is None else (e @ A.reshape(Dl, 4 * Dr)).reshape(Dl * 4, Dr)
    return A2.conj().T @ t


def _step_right(f, A):
    """F'[l, l'] = sum conj(A[l, a, r]) f[r, r'] A[l', a, r'] (f None: the identity)."""
    Dl, _, Dr = A.shape
    A2 = A.reshape(Dl, 4 * Dr)
    t = A2 if f is None else (A.reshape(Dl * 4, Dr) @ f.T).reshape(Dl, 4 * Dr)
    return A2.conj() @ t.T


def _envs(arrays: Sequence[np.ndarray], center: int):
    """Left environments E[k] (sites < k) and right environments F[k] (sites >= k); None is the identity
    (left of the centre every site is left-isometric, right of it right-isometric)."""
    L = len(arrays)
    E: list[Any] = [None] * (L + 1)
    F: list[Any] = [None] * (L + 1)
    e = None
    for k in range(center, L):
        e = _step_left(e, arrays[k])
        E[k + 1] = e
    f = None
    for k in range(center, -1, -1):
        f = _step_right(f, arrays[k])
        F[k] = f
    return E, F


def charge_weights(arrays: Sequence[np.ndarray], center: int) -> np.ndarray:
    """Single-site weights q[r, a] = sum of |d_S|^2 over strings with letter a (I, Z, +, -) at site r.

    ``arrays`` in the charge basis (complex), mixed canonical around ``center``. Not normalised: every row sums
    to the Frobenius weight.
    """
    L = len(arrays)
    E, F = _envs(arrays, center)
    out = np.empty((L, 4))
    for r, A in enumerate(arrays):
        X = A
        if E[r] is not None:
            X = (E[r] @ X.reshape(X.shape[0], -1)).reshape(X.shape)
        if F[r + 1] is not None:
            X = (X.reshape(-1, X.shape[2]) @ F[r + 1].T).reshape(X.shape)
        out[r] = np.einsum("lar,lar->a", A.conj(), X).real
    return out


def charge_profiles(engine: ChargeTEBD) -> dict[str, np.ndarray]:
    """``weights`` (L, 4) single-site Pauli weights (I, X, Y, Z; rows sum to 1) and ``right_weight`` (L,).

    The same quantities as :func:`mpo_fronts.driver.operator_profiles` for the Pauli-basis engine, read from the
    charge-basis MPS with conjugated sweeps. p(X) = p(Y) = (q(+) + q(-)) / 2: W(t) has charge 0, so the cross
    terms between e_+ and e_- at one site vanish (module doc). The right-weight profile is the weight of strings
    whose rightmost non-identity letter is at r, normalised to sum 1.
    """
    arrays, center = engine.arrays, engine.center
    q = charge_weights(arrays, center)
    p = np.stack([q[:, 0], 0.5 * (q[:, 2] + q[:, 3]), 0.5 * (q[:, 2] + q[:, 3]), q[:, 1]], axis=1)
    p /= p.sum(axis=1, keepdims=True)
    L = len(arrays)
    E, _ = _envs(arrays, center)
    fid: list[Any] = [None] * (L + 1)
    f = np.ones((1, 1), dtype=complex)
    fid[L] = f
    for k in range(L - 1, -1, -1):
        A0 = arrays[k][:, 0, :]
        f = A0.conj() @ f @ A0.T
        fid[k] = f
    rho = np.empty(L)
    for r, A in enumerate(arrays):
        Bn = A[:, 1:, :]
        X = Bn
        if E[r] is not None:
            X = np.einsum("lm,mar->lar", E[r], X)
        X = np.einsum("lar,sr->las", X, fid[r + 1])
        rho[r] = np.einsum("lar,lar->", Bn.conj(), X).real
    total = rho.sum()
    return {"weights": p, "right_weight": rho / total if total > 0 else rho}
