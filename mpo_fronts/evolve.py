"""The TEBD engine: Trotter schedules, truncation, the discarded-weight ledger.

The operator W(t) = e^{iHt} W e^{-iHt} is held as an MPS over Pauli letters (local dimension 4, float64, tensors
of shape (D_left, 4, D_right)). One time step tau applies, bond by bond, the real orthogonal Pauli transfer
matrices of exp(-i H_b tau') (see :mod:`mpo_fronts.pauli`) in a brickwork pattern: all even bonds (0,1), (2,3),
... then all odd bonds, following the schedule of the chosen Trotter order:

* order 2 (symmetric splitting): E(tau/2) O(tau) E(tau/2);
* order 4: five second-order steps of lengths p, p, 1-4p, p, p (times tau) with p = 1/(4 - 4^(1/3))
  (Suzuki's fractal composition), adjacent half layers merged.

Consecutive layers of the same parity are merged, so a second-order step costs two layers. Merging stops at
every requested output time and after every ``chunk`` steps ("blocks"); the state between blocks is a physical
state at a definite time, where the caller may read out or checkpoint. The step plan depends only on the
requested times, dt and chunk, so a run resumed from a checkpoint repeats the uninterrupted one exactly.

Truncation happens in every gate, with the orthogonality centre inside the two-site block (it is tracked and
moved by QR, never by a full re-canonicalization): keep at most ``chi`` singular values and drop the smallest
ones while their summed square stays below ``cutoff``; values below ``1e-13`` of the largest are numerical
zeros and are always dropped. The decomposition (:func:`split`) is LAPACK's SVD by default; the opt-in
``truncation='rsvd'`` finds the kept subspace by randomized subspace iteration before an SVD of the projected
block (about 2x faster where the bond is saturated, see :func:`_rsvd`); the opt-in ``truncation='eigh'`` uses
eigendecompositions of the block's Gram matrix with refinement passes (faster only at chi >= 128). Because
every gate is orthogonal, the Frobenius weight sum_S c_S^2 only changes by truncation: the ledger of dropped
squared singular values (plus, for 'rsvd', the weight outside the sampled subspace) equals the norm loss
1 - sum_S c_S^2 exactly.

Gates are applied only on bonds that touch the support of W(t) (the sites that may carry non-identity
letters): a gate on two identity letters is the identity, so skipping it is exact.
"""

from __future__ import annotations

import os
from numbers import Integral, Real
from typing import Callable, Iterator, Sequence

import numpy as np

from .errors import InputError
from .models import Chain
from .conventions import LETTER_PARITY as _LETTER_PARITY, LETTERS
from .pauli import bond_propagators, transfer_matrices
from .schedules import (DEFAULT_CHUNK, ORDERS, block_layers, check_positive, check_times, step_layers,  # noqa: F401
                        step_plan, time_grid)

__all__ = ["OperatorTEBD", "step_plan", "step_layers", "block_layers", "time_grid", "split", "keep_count",
           "SVD_FLOOR", "EIGH_TRUST", "RSVD_OVERSAMPLE", "RSVD_POWER", "ORDERS", "TRUNCATIONS"]

SVD_FLOOR = 1e-13
EIGH_TRUST = 1e-10  # one Gram eigendecomposition pass resolves eigenvalues down to this fraction of its largest
EIGH_MIN_DIM = 48  # below this matrix size the SVD is cheap and the Gram route gains nothing
RSVD_OVERSAMPLE = 16  # columns of the randomized range finder beyond the chi it must capture
RSVD_POWER = 2  # subspace iterations of the randomized route
RSVD_SEED = 20261202  # its test matrices are fixed: runs, resumed runs and workers repeat each other exactly
TRUNCATIONS = ("eigh", "rsvd", "svd")
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
    gate pays page faults on first touch; on virtual machines these are slow (on this project's machine they
    made the gate application 2x slower and the Z2-graded engine 1.17x slower end to end at chi = 64,
    ``scripts/bench_memory.py``). Raising
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



def _check_w(w) -> str:
    if not isinstance(w, str) or w.upper() not in ("X", "Y", "Z"):
        raise InputError(f"w (the evolved operator) must be one of 'X', 'Y', 'Z', got {w!r}")
    return w.upper()


def check_site(site, L: int) -> int:
    """Validate the site of W: an integer in 0..L-1 or 'center' (site L // 2)."""
    if isinstance(site, str) and site == "center":
        return L // 2
    if isinstance(site, bool) or not isinstance(site, Integral) or not 0 <= site < L:
        raise InputError(f"site must be an integer in 0..{L - 1} or 'center', got {site!r}")
    return int(site)


# -------------------------------------------------------------------------------------------- engine
class OperatorTEBD:
    """Heisenberg-picture TEBD of a Pauli operator W on a nearest-neighbour chain.

    Parameters
    ----------
    chain : Chain
        The model (see :mod:`mpo_fronts.models`).
    w : {'X', 'Y', 'Z'}
        The evolved local operator.
    site : int or 'center'
        Where W sits at t = 0.
    chi : int
        Maximum bond dimension.
    dt : float
        Largest Trotter step (units of 1/J); the steps are shortened to land on every requested time.
    order : {2, 4}
        Trotter order.
    cutoff : float
        Largest summed squared singular value dropped per truncation (absolute weight; W has unit weight).
    chunk : int
        Steps per block (merging of half layers stops at block ends; checkpoints are taken there).
    graded : bool, optional
        Use Z2-graded blocks (two half-size SVDs per gate instead of one); default: when the chain conserves
        total S^z and chi >= 32. Results equal the ungraded engine to rounding.
    truncation : {'svd', 'rsvd', 'eigh'}
        How each gate is split and truncated (see :func:`split`): 'svd' (default, LAPACK gesdd, the optimal
        truncation); 'rsvd' (randomized subspace iteration on saturated bonds, then the SVD of the projected
        block; about 2x faster at chi >= 64 in chains without a conservation law, measured changes of C
        against 'svd' 1e-7 or less at L = 32; the sampled-out weight is in the ledger); or 'eigh' (Gram-matrix
        eigendecompositions with refinement passes for the small singular values; slightly faster at large
        chi; measured changes of C against 'svd' 1e-6 to 7e-5, see README, Performance). ``splits`` counts
        the gates that went each way (small matrices always go to the SVD).

    Examples
    --------
    >>> from mpo_fronts.models import xxz_chain
    >>> eng = OperatorTEBD(xxz_chain(10), w="Z", site=0, chi=16, dt=0.1)
    >>> for k, e in eng.run([0.5, 1.0]):
    ...     pass
    >>> round(e.t, 12), e.max_bond <= 16
    (1.0, True)
    """

    def __init__(self, chain: Chain, w: str = "Z", site=0, chi: int = 64, dt: float = 0.05, order: int = 2,
                 cutoff: float = 0.0, chunk: int = DEFAULT_CHUNK, graded: bool | None = None,
                 truncation: str = "svd"):
        if not isinstance(chain, Chain):
            raise InputError(f"chain must be a Chain (from xxz_chain, mixed_field_ising_chain, nn_chain), got {type(chain).__name__}")
        self.chain = chain
        self.L = chain.L
        self.w = _check_w(w)
        self.site = check_site(site, self.L)
        if isinstance(chi, bool) or not isinstance(chi, Integral) or chi < 1:
            raise InputError(f"chi (maximum bond dimension) must be a positive integer, got {chi!r}")
        self.chi = int(chi)
        self.dt = check_positive("dt", dt)
        if order not in ORDERS:
            raise InputError(f"order must be 2 or 4 (Trotter order), got {order!r}")
        self.order = int(order)
        if isinstance(cutoff, bool) or not isinstance(cutoff, Real) or not (0 <= cutoff < 1):
            raise InputError(f"cutoff (discarded weight per truncation) must be in [0, 1), got {cutoff!r}")
        self.cutoff = float(cutoff)
        if isinstance(chunk, bool) or not isinstance(chunk, Integral) or chunk < 1:
            raise InputError(f"chunk must be a positive integer, got {chunk!r}")
        self.chunk = int(chunk)
        if truncation not in TRUNCATIONS:
            raise InputError(f"truncation must be one of {', '.join(map(repr, TRUNCATIONS))}, got {truncation!r}")
        self.truncation = truncation
        self.splits = {route: 0 for route in TRUNCATIONS}
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
        self.discarded_weight = 0.0
        self.blocks_done = 0
        self.max_step = 0.0

    # ------------------------------------------------------------------ bookkeeping
    @property
    def max_bond(self) -> int:
        """Largest bond dimension of the operator now."""
        return max(A.shape[2] for A in self.arrays)

    def bond_dims(self) -> list[int]:
        return [A.shape[2] for A in self.arrays[:-1]]

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
        return {"arrays": [A.copy() for A in self.arrays], "t": self.t, "discarded_weight": self.discarded_weight,
                "blocks_done": self.blocks_done, "center": self.center, "lo": self.lo, "hi": self.hi,
                "max_step": self.max_step, "labels": [x.copy() for x in self.labels], "splits": dict(self.splits)}

    def load_state_dict(self, state: dict) -> None:
        """Restore a state saved by :meth:`state_dict` (same chain, operator and engine settings)."""
        arrays = [np.asarray(A, dtype=float) for A in state["arrays"]]
        if len(arrays) != self.L:
            raise InputError(f"checkpoint holds {len(arrays)} sites, the chain has L = {self.L}")
        self.arrays = arrays
        self.t = float(state["t"])
        self.discarded_weight = float(state["discarded_weight"])
        self.blocks_done = int(state["blocks_done"])
        self.center = int(state["center"])
        self.lo, self.hi = int(state["lo"]), int(state["hi"])
        self.max_step = float(state.get("max_step", 0.0))
        self.splits = {"eigh": 0, "svd": 0, **{k: int(v) for k, v in dict(state.get("splits", {})).items()}}
        if "labels" in state:
            self.labels = [np.asarray(x, dtype=np.int8) for x in state["labels"]]

    # ------------------------------------------------------------------ evolution
    def run(self, times: Sequence[float], hook: Callable[["OperatorTEBD"], None] | None = None
            ) -> Iterator[tuple[int, "OperatorTEBD"]]:
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
        key = float(d)  # exact: a resumed run must rebuild bit-identical gates
        G = self._gates.get(key)
        if G is None:
            if len(self._gates) > 16:
                self._gates.clear()
            G = transfer_matrices(bond_propagators(self._hb, d))
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
            arrays[c] = q.reshape(Dl, 4, -1)
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
            arrays[c] = q.T.reshape(-1, 4, Dr)
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
        self.discarded_weight += disc
        self.splits[route] += 1
        k = left.shape[1]
        if lab is not None:
            self.labels[b] = lab
        self.arrays[b] = left.reshape(Dl, 4, k)
        self.arrays[b + 1] = right.reshape(k, 4, Dr)
        self.center = b + 1 if to_right else b


# -------------------------------------------------------------------------------------------- truncation
def keep_count(s: np.ndarray, chi: int, cutoff: float = 0.0) -> int:
    """How many of the descending singular values ``s`` a truncation keeps (at least one).

    At most ``chi``; values at or below ``SVD_FLOOR * s[0]`` are numerical zeros; then the smallest kept values are
    dropped while their summed square stays at or below ``cutoff``.
    """
    k = min(chi, int(np.count_nonzero(s > SVD_FLOOR * s[0]))) if s[0] > 0 else 1
    if cutoff > 0 and k > 1:
        tail = np.cumsum((s[k - 1::-1] ** 2))  # tail[j] = sum of the j+1 smallest kept values squared
        extra = int(np.searchsorted(tail, cutoff, side="right"))
        k = max(1, k - extra)
    return max(k, 1)


def split(theta: np.ndarray, chi: int, cutoff: float, to_right: bool, row_par=None, col_par=None,
          truncation: str = "svd"):
    """Truncated factorization ``theta ~ left @ right`` with the optimal rank-k projection.

    ``to_right``: ``left`` has orthonormal columns and ``right`` carries the weight (the orthogonality centre
    moves right); otherwise ``right`` has orthonormal rows. ``row_par``/``col_par``: Z2 parities of the rows and
    columns of a block-diagonal ``theta`` (graded engine), or None.

    ``truncation='svd'``: LAPACK gesdd (gesvd on failure). ``truncation='eigh'``: eigendecomposition of the Gram
    matrix on the shorter side of each block (after a QR when the isometric side is the longer one), refined in
    the orthogonal complement until the kept spectrum is resolved (:func:`_gram_top`); the weight-carrying factor
    is the exact projection of theta on the kept vectors (no division by singular values), so the discarded
    weight (the dropped eigenvalues) equals the norm loss to rounding. Matrices smaller than ``EIGH_MIN_DIM`` go to the SVD.
    ``truncation='rsvd'``: :func:`_rsvd` on every block at least twice as large (both sides) as the
    ``chi + RSVD_OVERSAMPLE`` columns it samples, the SVD on the others; the weight outside the sampled subspace
    joins the discarded weight, so the ledger stays the norm loss.

    Returns ``left, right, labels, discarded, route``: labels are the parities of the kept bond index (None when
    ungraded), discarded is the summed squared singular values (eigenvalues) dropped, route is 'eigh', 'rsvd'
    (some block took the randomized route) or 'svd'.
    """
    blocks = _blocks(theta, row_par, col_par)
    if truncation == "eigh" and min(theta.shape) >= EIGH_MIN_DIM:
        out = _split_eigh(blocks, chi, cutoff, to_right)
        if out is not None:
            return (*_assemble(theta.shape, blocks, out[0], graded=row_par is not None), out[1], "eigh")
    parts, disc, randomized = _split_svd(blocks, chi, cutoff, to_right, truncation == "rsvd")
    route = "rsvd" if randomized else "svd"
    return (*_assemble(theta.shape, blocks, parts, graded=row_par is not None), disc, route)


def _blocks(theta, row_par, col_par):
    """``[(label, rows, cols, matrix)]``: the nonzero Z2 blocks of theta, or one block that is theta itself."""
    if row_par is None:
        return [(0, None, None, theta)]
    out = []
    for p in (0, 1):
        r, c = np.flatnonzero(row_par == p), np.flatnonzero(col_par == p)
        if r.size and c.size:
            out.append((p, r, c, theta.take(r, axis=0).take(c, axis=1)))  # take: 2x faster than ix_
    return out


def _split_svd(blocks, chi, cutoff, to_right, randomized=False):
    l = chi + RSVD_OVERSAMPLE
    sampled = [randomized and rsvd_samples(m.shape, chi) for *_, m in blocks]
    svds = [_rsvd(m, l) if r else (*_svd(m), 0.0) for r, (*_, m) in zip(sampled, blocks)]
    s_all = np.concatenate([x[1] for x in svds])
    order = np.argsort(-s_all, kind="stable")
    k = keep_count(s_all[order], chi, cutoff)
    kept = np.zeros(s_all.size, dtype=bool)
    kept[order[:k]] = True
    disc = float(np.sum(s_all[~kept] ** 2)) + sum(x[3] for x in svds)
    parts, off = [], 0
    for u, s, vt, _ in svds:
        kp = int(np.count_nonzero(kept[off:off + s.size]))  # a block's kept values are its largest ones
        off += s.size
        u, s, vt = u[:, :kp], s[:kp], vt[:kp]
        parts.append((u, s[:, None] * vt) if to_right else (u * s, vt))
    return parts, disc, any(sampled)


def rsvd_samples(shape, chi: int) -> bool:
    """Whether the randomized route samples a block of this shape (both sides >= 2 (chi + RSVD_OVERSAMPLE));
    smaller blocks take the SVD, which is faster there (measured crossover about 2-2.5x the sample size)."""
    return min(shape) >= 2 * (chi + RSVD_OVERSAMPLE)


def _test_matrix(n: int, l: int) -> np.ndarray:
    """The fixed Gaussian test matrix (n, l) of the randomized route.

    One array per l, grown when a larger n is asked for; rows are drawn in order from a generator seeded by
    ``(RSVD_SEED, l)``, so the (n, l) matrix is the first n rows whatever was asked before: the truncation of a
    given block does not depend on the history of the process (resumed runs and workers agree bit for bit).
    """
    om = _TEST_MATRICES.get(l)
    if om is None or om.shape[0] < n:
        om = np.random.default_rng([RSVD_SEED, l]).standard_normal((max(n, 4 * l), l))
        _TEST_MATRICES[l] = om
    return om[:n]


_TEST_MATRICES: dict[int, np.ndarray] = {}


def _rsvd(m: np.ndarray, l: int):
    """SVD of m restricted to an l-dimensional subspace found by randomized subspace iteration.

    Halko, Martinsson & Tropp, SIAM Rev. 53, 217 (2011), Algorithm 4.4 (randomized subspace iteration): Y = m
    Omega for a Gaussian Omega (n, l), then ``RSVD_POWER`` times Y = m basis(m^T basis(Y)), every product
    re-based so that small singular values are not lost to rounding as in plain powers (m m^T)^q m Omega. The
    intermediate bases are the unit lower-trapezoidal LU factors with partial pivoting (same column space, well
    conditioned, 4x cheaper than a QR at 512 x 144; LU re-basing as in Li et al., ACM TOMS 43, 28 (2017),
    "Algorithm 971", cited from memory), the last one a QR, Q = orth(Y); then the exact SVD of the small
    projection B = Q^T m = u s vt. Returns ``Q u, s, vt, rest`` with rest = |m|^2 - |B|^2, the weight of m
    outside span(Q), which the truncation adds to the discarded weight: |m - Q u_k s_k vt_k|^2 = rest +
    sum_{i>k} s_i^2 exactly (rest is a difference of weights of order |m|^2, exact to rounding of that size).
    The singular values s are those of B, lower bounds of m's. With l = chi + 16 and two iterations, on the
    gate matrices of the engine at L = 32, chi = 32-128, the truncation error exceeds the optimal one by at
    most 2.2e-11 (absolute weight; ``scripts/bench/floor.py``, column rsvd_err).
    """
    from scipy.linalg import lu

    q = m @ _test_matrix(m.shape[1], l)
    for _ in range(RSVD_POWER):
        q = lu(q, permute_l=True, overwrite_a=True, check_finite=False)[0]
        q = lu(m.T @ q, permute_l=True, overwrite_a=True, check_finite=False)[0]
        q = m @ q
    q = np.linalg.qr(q)[0]
    b = q.T @ m
    u, s, vt = _svd(b)
    rest = max(float(np.sum(m * m)) - float(np.sum(s * s)), 0.0)
    return q @ u, s, vt, rest


def _gram_top(m: np.ndarray, chi: int, floor2: float):
    """Top left singular vectors of m (at most chi) and their squared singular values, from Gram matrices.

    One eigendecomposition of m m^T resolves the eigenvalues down to ``EIGH_TRUST`` of the largest (below that,
    rounding of order eps * lambda_max dominates). If more vectors are needed, the rest of the spectrum is
    resolved in the orthogonal complement of the vectors taken: m is projected on it and the step repeats, each
    pass reaching ``EIGH_TRUST`` deeper, until chi vectors are taken or what is left is below ``floor2``
    (numerical zeros, like the SVD's floor). Returns (vectors (rows, k), eigenvalues (k,), weight not taken).
    """
    vecs, lams = [], []
    need = min(chi, m.shape[0])
    basis = None  # orthonormal basis of the current complement, in the original row space (None: all rows)
    x = m
    while True:
        lam, vec = np.linalg.eigh(x @ x.T)
        lam, vec = lam[::-1], vec[:, ::-1]
        top = lam[0]
        if not top > floor2:  # only numerical zeros remain
            return _stack(vecs, lams, m.shape[0]), max(float(np.sum(np.clip(lam, 0.0, None))), 0.0)
        take = min(need, int(np.count_nonzero(lam >= EIGH_TRUST * top)))
        v = vec[:, :take]
        vecs.append(v if basis is None else basis @ v)
        lams.append(lam[:take])
        need -= take
        if need == 0 or take == lam.size:
            rest = float(np.sum(np.clip(lam[take:], 0.0, None)))
            return _stack(vecs, lams, m.shape[0]), rest
        comp = vec[:, take:]
        basis = comp if basis is None else basis @ comp
        x = comp.T @ x


def _stack(vecs, lams, rows):
    if not vecs:
        return np.zeros((rows, 0)), np.zeros(0)
    return np.ascontiguousarray(np.hstack(vecs)), np.concatenate(lams)


def _split_eigh(blocks, chi, cutoff, to_right):
    mats = [m if to_right else m.T for *_, m in blocks]  # the rows of each matrix get the isometry
    floor2 = (SVD_FLOOR ** 2) * max(float(np.sum(m * m)) for m in mats)
    reduced = []
    for m in mats:
        if m.shape[0] > m.shape[1]:  # the Gram matrix on the shorter side: m = q r, decompose r
            q, r = np.linalg.qr(m)
            reduced.append((q, r))
        else:
            reduced.append((None, m))
    tops = [_gram_top(r, chi, floor2) for _, r in reduced]
    lam_all = np.concatenate([lam for (_, lam), _ in tops])
    order = np.argsort(-lam_all, kind="stable")
    lam_sorted = np.clip(lam_all[order], 0.0, None)
    if lam_sorted.size == 0 or not lam_sorted[0] > 0:  # pragma: no cover - theta has unit weight
        return None
    k = keep_count(np.sqrt(lam_sorted), chi, cutoff)
    kept = np.zeros(lam_all.size, dtype=bool)
    kept[order[:k]] = True
    disc = float(np.sum(lam_sorted[k:])) + sum(rest for _, rest in tops)
    parts, off = [], 0
    for (q, r), ((vec, lam), _) in zip(reduced, tops):
        sel = kept[off:off + lam.size]
        off += lam.size
        v = vec[:, sel]
        w = v.T @ r  # the exact projection of the block on the kept vectors: no division by singular values
        if q is not None:
            v = q @ v
        parts.append((v, w) if to_right else (w.T, v.T))
    return parts, disc


def _assemble(shape, blocks, parts, graded):
    """Put the blockwise factors into full ``left (m, k)``, ``right (k, n)``; labels of the kept bond index."""
    if not graded:
        return parts[0][0], parts[0][1], None
    ks = [left.shape[1] for left, _ in parts]
    k = sum(ks)
    left = np.zeros((shape[0], k))
    right = np.zeros((k, shape[1]))
    lab = np.empty(k, dtype=np.int8)
    off = 0
    for (p, r, c, _), (lp, rp), kp in zip(blocks, parts, ks):
        left[r, off:off + kp] = lp
        right[off:off + kp, c] = rp
        lab[off:off + kp] = p
        off += kp
    if k == 0:  # pragma: no cover - theta has unit weight, some block is nonzero
        raise RuntimeError("empty truncation")
    return left, right, lab


def _svd(m: np.ndarray):
    try:
        return np.linalg.svd(m, full_matrices=False)
    except np.linalg.LinAlgError:  # pragma: no cover - rare convergence failure of gesdd
        import scipy.linalg

        return scipy.linalg.svd(m, full_matrices=False, lapack_driver="gesvd")


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
