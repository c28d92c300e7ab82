"""The TEBD engine: the operator W(t) as an MPS over Pauli letters, gates, the orthogonality centre, checkpoints.

The operator W(t) = e^{iHt} W e^{-iHt} is held as an MPS over Pauli letters (local dimension 4, float64, tensors
of shape (D_left, 4, D_right)). One time step applies, bond by bond, the real orthogonal Pauli transfer
matrices of exp(-i H_b tau') (see :mod:`mpo_fronts.pauli`) in the brickwork pattern of the chosen Trotter
schedule (:mod:`mpo_fronts.schedules`). Merging of layers stops at every requested output time and after every
``chunk`` steps ("blocks"); the state between blocks is a physical state at a definite time, where the caller
may read out or checkpoint. The step plan depends only on the requested times, dt and chunk, so a run resumed
from a checkpoint repeats the uninterrupted one exactly.

Truncation happens in every gate, with the orthogonality centre inside the two-site block (it is tracked and
moved by QR, never by a full re-canonicalization), by the route the settings name
(:mod:`mpo_fronts.truncation`). Because every gate is orthogonal, the Frobenius weight sum_S c_S^2 only changes
by truncation: the ledger (:class:`~mpo_fronts.truncation.TruncationLedger`, total and per bond) equals the
norm loss 1 - sum_S c_S^2 exactly.

Gates are applied only on bonds that touch the support of W(t) (the sites that may carry non-identity
letters): a gate on two identity letters is the identity, so skipping it is exact.
"""

from __future__ import annotations

import os
from numbers import Integral
from typing import Callable, Iterator, Sequence

import numpy as np

from .conventions import LETTER_PARITY as _LETTER_PARITY, LETTERS, PROBES
from .errors import InputError
from .models import Chain
from .pauli import bond_propagators, transfer_matrices
from .schedules import block_layers, step_plan
from .settings import EvolutionSettings
from .truncation import TruncationLedger, split

__all__ = ["OperatorTEBD", "check_w", "check_site", "keep_freed_memory", "bond_entropies", "GRADED_MIN_CHI"]

GRADED_MIN_CHI = 32


# -------------------------------------------------------------------------------------------- memory
KEEP_MEMORY_ENV = "MPO_FRONTS_KEEP_MEMORY"
_MMAP_THRESHOLD = 64 * 2 ** 20  # allocations below this come from the heap, not from fresh mmap pages
_TRIM_THRESHOLD = 256 * 2 ** 20  # freed heap memory is kept up to this size before it is returned
_kept_memory: bool | None = None


def keep_freed_memory() -> bool:
    """Let glibc's malloc keep freed memory for reuse (``mallopt``), once per process; True if set.

    Every gate allocates fresh temporaries of a few MiB (the two-site matrix, the gated matrix, SVD factors).
    By default glibc hands allocations above 128 KiB out as new mmap pages and returns them on free, so every
    gate pays page faults on first touch; on virtual machines these are slow (measured by
    ``scripts/bench_memory.py``, data/benchmarks/memory.json). Raising
    the mmap and trim thresholds keeps that memory in the heap; results are bit-identical. The process then keeps
    up to 256 MiB of freed memory. Set ``MPO_FRONTS_KEEP_MEMORY=0`` to leave the allocator alone; a no-op
    where the C library is not glibc.
    """
    global _kept_memory
    if _kept_memory is None:
        _kept_memory = False
        if os.environ.get(KEEP_MEMORY_ENV, "1").strip() not in ("0", "false", "no", "off"):
            try:
                import ctypes

                libc = ctypes.CDLL("libc.so.6")
                m_trim_threshold, m_mmap_threshold = -1, -3  # <malloc.h>
                _kept_memory = bool(libc.mallopt(m_mmap_threshold, _MMAP_THRESHOLD)) and bool(
                    libc.mallopt(m_trim_threshold, _TRIM_THRESHOLD))
            except (OSError, AttributeError):  # not glibc (macOS, musl without mallopt): nothing to do
                _kept_memory = False
    return _kept_memory



def check_w(w) -> str:
    """Validate the evolved operator W: one of 'X', 'Y', 'Z' (case-insensitive)."""
    if not isinstance(w, str) or w.upper() not in PROBES:
        raise InputError(f"w (the evolved operator) must be one of 'X', 'Y', 'Z', got {w!r}", arg="w")
    return w.upper()


def check_site(site, L: int) -> int:
    """Validate the site of W: an integer in 0..L-1 or 'center' (site L // 2)."""
    if isinstance(site, str) and site == "center":
        return L // 2
    if isinstance(site, bool) or not isinstance(site, Integral) or not 0 <= site < L:
        raise InputError(f"site must be an integer in 0..{L - 1} or 'center', got {site!r}", arg="site")
    return int(site)


# -------------------------------------------------------------------------------------------- engine
class BrickworkEngine:
    """What every engine shares: the brickwork loop over blocks of Trotter steps, the gate cache and the
    truncation bookkeeping. A subclass sets ``L``, ``dt``, ``order``, ``splitting``, ``chunk``, ``ledger``,
    ``arrays``, ``center``, ``lo``, ``hi``, ``t``, ``blocks_done``, ``max_step``, ``_gates`` and implements
    ``_build_gates(d)`` (one gate per bond for a layer of length d), ``_move_center(site)`` and
    ``_gate(b, G_b, to_right)``."""

    @property
    def max_bond(self) -> int:
        """Largest bond dimension of the operator now."""
        return max(A.shape[2] for A in self.arrays)

    @property
    def discarded_weight(self) -> float:
        """Cumulative discarded weight: the norm loss of W(t) (see :attr:`ledger`)."""
        return self.ledger.total

    @property
    def splits(self) -> dict[str, int]:
        """Gates per truncation route that actually ran."""
        return self.ledger.splits

    def run(self, times: Sequence[float], hook: Callable[["BrickworkEngine"], None] | None = None
            ) -> Iterator[tuple[int, "BrickworkEngine"]]:
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
                for parity, d in block_layers(self.order, n, tau, self.splitting):
                    self._apply_layer(parity, d)
                self.max_step = max(self.max_step, tau)
            self.blocks_done = i + 1
            last = i + 1 == len(plan) or plan[i + 1][0] != k
            self.t = float(ts[k]) if last else self.t + n * tau
            if hook is not None:
                hook(self)
            if last:
                yield k, self

    def _layer_gates(self, d: float):
        key = float(d)  # exact: a resumed run must rebuild bit-identical gates
        G = self._gates.get(key)
        if G is None:
            if len(self._gates) > 16:
                self._gates.clear()
            G = self._build_gates(d)
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


class OperatorTEBD(BrickworkEngine):
    """Heisenberg-picture TEBD of a Pauli operator W on a nearest-neighbour chain.

    Parameters
    ----------
    chain : Chain
        The model (see :mod:`mpo_fronts.models`).
    w : {'X', 'Y', 'Z'}
        The evolved local operator.
    site : int or 'center'
        Where W sits at t = 0.
    settings : EvolutionSettings, optional
        Bond dimension, Trotter step and order, cutoff, steps per block, truncation route (see
        :class:`mpo_fronts.settings.EvolutionSettings`); validated once there.
    **options
        Instead of ``settings``, the same fields as keywords (``chi=32, dt=0.1``), for interactive use; they
        build the settings object.
    graded : bool, optional
        Use Z2-graded blocks (two half-size SVDs per gate instead of one); default: when the chain conserves
        total S^z and chi >= 32. Results equal the ungraded engine to rounding.

    Attributes
    ----------
    ledger : TruncationLedger
        What truncation removed: total (``discarded_weight``), per bond, and gates per route (``splits``).

    Examples
    --------
    >>> from mpo_fronts.models import xxz_chain
    >>> eng = OperatorTEBD(xxz_chain(10), w="Z", site=0, chi=16, dt=0.1)
    >>> for k, e in eng.run([0.5, 1.0]):
    ...     pass
    >>> round(e.t, 12), e.max_bond <= 16
    (1.0, True)
    """

    def __init__(self, chain: Chain, w: str = "Z", site=0, settings: EvolutionSettings | None = None, *,
                 graded: bool | None = None, **options):
        if not isinstance(chain, Chain):
            raise InputError(f"chain must be a Chain (from xxz_chain, mixed_field_ising_chain, nn_chain), got "
                             f"{type(chain).__name__}", arg="chain")
        if settings is None:
            settings = EvolutionSettings(**options)
        elif options:
            raise InputError(f"give either settings or keyword settings ({', '.join(sorted(options))}), not both",
                             arg=sorted(options)[0])
        elif not isinstance(settings, EvolutionSettings):
            raise InputError(f"settings must be an EvolutionSettings, got {type(settings).__name__}", arg="settings")
        self.settings = settings
        self.chain = chain
        self.L = chain.L
        self.w = check_w(w)
        self.site = check_site(site, self.L)
        if settings.auto:
            raise InputError('dt = "auto" is resolved by mpo_fronts.driver.evolve (or evolve_otoc); give the '
                             'engine a number (mpo_fronts.stepsize.auto_dt computes it)', arg="dt")
        self.chi, self.dt, self.order = settings.chi, settings.dt, settings.order
        self.splitting = settings.splitting
        self.cutoff, self.chunk, self.truncation = settings.cutoff, settings.chunk, settings.truncation
        self.ledger = TruncationLedger.empty(self.L - 1)
        keep_freed_memory()
        self._hb = chain.bond_hamiltonians()
        self._gates: dict[float, np.ndarray] = {}
        ident = np.zeros((1, 4, 1))
        ident[0, 0, 0] = 1.0
        self.arrays: list[np.ndarray] = [ident.copy() for _ in range(self.L)]
        self.arrays[self.site] = np.zeros((1, 4, 1))
        self.arrays[self.site][0, LETTERS.index(self.w), 0] = 1.0
        self.center = self.site
        # Z2 grading: with H commuting with total S^z, the parity of X/Y letters of W(t) is conserved, every
        # bond index carries the parity of the string to its left and gates/QRs split into two blocks.
        # Python overhead of the split outweighs the SVD saving at small bond dimension: the default grades
        # only runs that may reach chi >= GRADED_MIN_CHI.
        self.graded = (bool(chain.conserves_sz) and self.chi >= GRADED_MIN_CHI) if graded is None else bool(graded)
        if self.graded and not chain.conserves_sz:
            raise InputError("graded=True needs a chain that conserves total S^z (chain.conserves_sz)")
        p_w = _LETTER_PARITY[LETTERS.index(self.w)]
        self.labels: list[np.ndarray] = [np.array([0 if k < self.site else p_w], dtype=np.int8)
                                         for k in range(self.L - 1)]
        self._edge = (np.zeros(1, dtype=np.int8), np.array([p_w], dtype=np.int8))
        self.lo = self.hi = self.site  # support: sites that may carry non-identity letters
        self.t = 0.0
        self.blocks_done = 0
        self.max_step = 0.0

    # ------------------------------------------------------------------ bookkeeping
    def norm2(self) -> float:
        """Frobenius weight sum_S c_S^2 (from the orthogonality centre)."""
        A = self.arrays[self.center]
        return float(np.sum(A * A))

    def to_mps(self):
        """The operator as a quimb ``MatrixProductState`` (physical dimension 4, Pauli basis I, X, Y, Z)."""
        import quimb.tensor as qtn

        arrs = [self.arrays[0][0]] + list(self.arrays[1:-1]) + [self.arrays[-1][:, :, 0]]
        return qtn.MatrixProductState(arrs, shape="lpr")

    def state_dict(self) -> dict:
        """Everything needed to continue the evolution (numpy arrays and numbers only)."""
        return {"arrays": [A.copy() for A in self.arrays], "t": self.t, **self.ledger.state(),
                "blocks_done": self.blocks_done, "center": self.center, "lo": self.lo, "hi": self.hi,
                "max_step": self.max_step, "labels": [x.copy() for x in self.labels]}

    def load_state_dict(self, state: dict) -> None:
        """Restore a state saved by :meth:`state_dict` (same chain, operator and engine settings)."""
        arrays = [np.asarray(A, dtype=float) for A in state["arrays"]]
        if len(arrays) != self.L:
            raise InputError(f"checkpoint holds {len(arrays)} sites, the chain has L = {self.L}", arg="state")
        self.arrays = arrays
        self.t = float(state["t"])
        self.ledger = TruncationLedger.from_state(state, self.L - 1)
        self.blocks_done = int(state["blocks_done"])
        self.center = int(state["center"])
        self.lo, self.hi = int(state["lo"]), int(state["hi"])
        self.max_step = float(state.get("max_step", 0.0))
        if "labels" in state:
            self.labels = [np.asarray(x, dtype=np.int8) for x in state["labels"]]

    # ------------------------------------------------------------------ evolution
    def _build_gates(self, d: float) -> np.ndarray:
        return transfer_matrices(bond_propagators(self._hb, d))

    def _bond_labels(self, k: int) -> np.ndarray:
        """Parity labels of bond k (between sites k and k+1); k = -1 and L-1 are the chain's edges."""
        if k < 0:
            return self._edge[0]
        if k >= self.L - 1:
            return self._edge[1]
        return self.labels[k]

    def _row_parity(self, k: int) -> np.ndarray:
        """Parity of the rows (l, a) of site k's tensor reshaped to (D_left * 4, D_right)."""
        return (self._bond_labels(k - 1)[:, None] ^ _LETTER_PARITY[None, :]).reshape(-1)

    def _col_parity(self, k: int) -> np.ndarray:
        """Parity of the columns (a, r) of site k's tensor reshaped to (D_left, 4 * D_right)."""
        return (_LETTER_PARITY[:, None] ^ self._bond_labels(k)[None, :]).reshape(-1)

    def _move_center(self, target: int) -> None:
        arrays = self.arrays
        c = self.center
        while c < target:
            A = arrays[c]
            Dl, _, Dr = A.shape
            m = A.reshape(Dl * 4, Dr)
            if self.graded:
                q, r, lab = _graded_qr(m, self._row_parity(c), self._bond_labels(c))
                self.labels[c] = lab
            else:
                q, r = np.linalg.qr(m)
            arrays[c] = np.ascontiguousarray(q.reshape(Dl, 4, -1))
            arrays[c + 1] = np.tensordot(r, arrays[c + 1], axes=(1, 0))
            c += 1
        while c > target:
            A = arrays[c]
            Dl, _, Dr = A.shape
            m = A.reshape(Dl, 4 * Dr).T
            if self.graded:
                q, r, lab = _graded_qr(m, self._col_parity(c), self._bond_labels(c - 1))
                self.labels[c - 1] = lab
            else:
                q, r = np.linalg.qr(m)
            arrays[c] = np.ascontiguousarray(q.T.reshape(-1, 4, Dr))
            arrays[c - 1] = np.tensordot(arrays[c - 1], r.T, axes=(2, 0))
            c -= 1
        self.center = c

    def _gate(self, b: int, G: np.ndarray, to_right: bool) -> None:
        A, B = self.arrays[b], self.arrays[b + 1]
        Dl, Dr = A.shape[0], B.shape[2]
        theta = (A.reshape(Dl * 4, A.shape[2]) @ B.reshape(B.shape[0], 4 * Dr)).reshape(Dl, 16, Dr)
        theta = np.matmul(G, theta).reshape(Dl * 4, 4 * Dr)
        rp, cp = (self._row_parity(b), self._col_parity(b + 1)) if self.graded else (None, None)
        left, right, lab, disc, route = split(theta, self.chi, self.cutoff, to_right, rp, cp, self.truncation)
        self.ledger.add(b, disc, route)
        k = left.shape[1]
        if lab is not None:
            self.labels[b] = lab
        # C-contiguous like a restored checkpoint's arrays: BLAS's last bits depend on the memory layout,
        # and a resumed run must repeat the uninterrupted one bit for bit (tests/test_evolve.py)
        self.arrays[b] = np.ascontiguousarray(left.reshape(Dl, 4, k))
        self.arrays[b + 1] = np.ascontiguousarray(right.reshape(k, 4, Dr))
        self.center = b + 1 if to_right else b


def _graded_qr(m: np.ndarray, row_par: np.ndarray, col_lab: np.ndarray):
    """Blockwise QR of a Z2 block-diagonal matrix: m = q @ r with q isometric; labels of q's columns.

    Columns of a parity that has no rows are zero and leave the bond (exact).
    """
    rmask = (row_par == 0, row_par == 1)
    cmask = (col_lab == 0, col_lab == 1)
    parts = [np.linalg.qr(m[rmask[p]][:, cmask[p]]) if rmask[p].any() and cmask[p].any() else None
             for p in (0, 1)]
    k = [0 if x is None else x[0].shape[1] for x in parts]
    q = np.zeros((m.shape[0], k[0] + k[1]))
    r = np.zeros((k[0] + k[1], m.shape[1]))
    lab = np.zeros(k[0] + k[1], dtype=np.int8)
    lab[k[0]:] = 1
    for p, off in ((0, 0), (1, k[0])):
        if parts[p] is not None:
            q[rmask[p], off:off + k[p]] = parts[p][0]
            r[off:off + k[p], cmask[p]] = parts[p][1]
    return q, r, lab


def bond_entropies(arrays: Sequence[np.ndarray], center: int) -> np.ndarray:
    """Operator entanglement entropy of W(t) at every bond b (between sites b and b + 1), natural log.

    With the MPS in mixed canonical form around ``center`` (sites left of it left-isometric, right of it
    right-isometric), the Schmidt values of bond b are the singular values of the R factor met when the centre is
    swept across that bond; the sweep here works on copies (the operator is unchanged). With p = s^2 / sum s^2,
    S_b = -sum p ln p (0 for a bond of dimension 1). Cost: one QR per bond, O(L chi^3).
    """
    L = len(arrays)
    out = np.zeros(max(L - 1, 0))

    def entropy(r: np.ndarray) -> float:
        if r.shape[0] == 1 or r.shape[1] == 1:
            return 0.0
        s = np.linalg.svd(r, compute_uv=False)
        p = s * s
        p = p[p > 0] / p.sum()
        return float(-np.sum(p * np.log(p)))

    A = arrays[center]
    for b in range(center, L - 1):  # sweep right: A = Q R, carry R into site b + 1
        Dl, _, Dr = A.shape
        r = np.linalg.qr(A.reshape(Dl * 4, Dr), mode="r")
        out[b] = entropy(r)
        A = np.tensordot(r, arrays[b + 1], axes=(1, 0))
    A = arrays[center]
    for b in range(center - 1, -1, -1):  # sweep left: A^T = Q R, carry R^T into site b
        Dl, _, Dr = A.shape
        r = np.linalg.qr(A.reshape(Dl, 4 * Dr).T, mode="r")
        out[b] = entropy(r)
        A = np.tensordot(arrays[b], r.T, axes=(2, 0))
    return out
