"""U(1) charge blocks: the TEBD engine for chains that conserve total S^z, block by block over charge sectors.

When H commutes with total S^z, W(t) keeps the U(1) charge of W (for W = Z: charge 0). The operator is held in
the single-site basis

    e_I = I,   e_Z = Z,   e_+ = (X + iY) / sqrt 2 = sqrt 2 S^+,   e_- = (X - iY) / sqrt 2 = sqrt 2 S^-

(letter order I, Z, +, -; charges 0, 0, +1, -1), orthonormal under <A, B> = Tr(A^dag B) / 2, so the coefficients
d_S of W(t) = sum_S d_S e_S are complex with sum_S |d_S|^2 the Frobenius weight, and the two-site Heisenberg
gates G_c = T2 G T2^dag (G the real Pauli transfer matrix of :mod:`mpo_fronts.pauli`, T2 the two-site change of
basis) are unitary 16 x 16 matrices, block diagonal in the charge of the letter pair (block sizes 1, 4, 6, 4, 1
for pair charge -2..2). Every bond index carries the charge of the left part of the string (the sum of the
letter charges to its left); bond indices are kept sorted by charge, and a site tensor A[l, a, r] vanishes
unless q_r = q_l + c(a). The Z2 grading of :mod:`mpo_fronts.evolve` is the parity of this charge.

**Hermitian gauge.** W(t) is Hermitian: with the letter swap a -> abar (+ <-> -), d_{Sbar} = conj(d_S). The engine
keeps the MPS in a gauge where this holds tensor by tensor: on every bond the sectors q and -q have the same
dimension, index j of sector q is paired with index j of sector -q (``pi``; sector 0 is paired with itself), and

    A[pi(l), abar, pi(r)] = conj(A[l, a, r]).

The gates respect it (G_c[Sbar', Sbar] = conj(G_c[S', S]), since the Heisenberg map commutes with Hermitian
conjugation), so every decomposition of a gate or of a centre move is computed for charges v >= 0 only: the
v < 0 factors are the conjugates of the v > 0 ones (their singular values are the same), and the v = 0 block,
which carries the conjugation as an antilinear involution of its rows and columns, is brought to a *real*
matrix of the same size by a fixed unitary change of basis (pairs (x + y) / sqrt 2, i (x - y) / sqrt 2) and
decomposed in real arithmetic. One truncation across the blocks then keeps, within chi bond indices, the
largest weight that never separates a (v, -v) pair (a v != 0 value stands for two indices): the operator stays
U(1)-symmetric and Hermitian in the gauge above; the discarded weight is the sum of the squares dropped, which is
the norm loss exactly.

Only W = Z is evolved (charge 0; X and Y are not charge eigenstates). The single-site Pauli weights, the OTOCs of
every probe X, Y, Z and the right-weight profile follow from the charge-basis weights (:func:`charge_profiles`);
for a charge-0 operator the strings with e_+ and with e_- at one site and the same letters elsewhere have total
charges that differ by 2, so the cross terms between them vanish and the weights of X and of Y at a site are each
half the summed weight of e_+ and e_-. :meth:`ChargeTEBD.real_pauli_arrays` gives the same operator as a real MPS
over Pauli letters in the same canonical form, which every function of :mod:`mpo_fronts.readout` accepts.
"""

from __future__ import annotations

from typing import Any, Sequence

import numpy as np

from .errors import InputError
from .evolve import BrickworkEngine, check_site, check_w, keep_freed_memory
from .models import Chain
from .pauli import bond_propagators, transfer_matrices
from .settings import EvolutionSettings
from .truncation import SVD_FLOOR, TruncationLedger

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
#: Truncation routes ChargeTEBD accepts: its own blockwise SVD (LAPACK gesdd) in the Hermitian gauge.
COMPLEX_ROUTES = ("svd",)
_SWAP = np.array([0, 1, 3, 2], dtype=np.int64)  # Hermitian conjugation of a letter: e_+ <-> e_-
_PAIR_CHARGE = (LETTER_CHARGE[:, None] + LETTER_CHARGE[None, :]).reshape(16)
_PAIRS = {c: np.flatnonzero(_PAIR_CHARGE == c) for c in range(-2, 3)}  # letter pairs a*4+b of pair charge c
_GATE_LEAK_TOL = 1e-10  # largest charge-violating gate entry tolerated (then set to exactly zero)
_CACHE_SIZE = 512  # index maps kept per engine (keyed by the charges of the bonds around a site or a gate)
#: With gate_update = "qr": every QR_SVD_EVERY-th gate of a bond at chi is an SVD, which re-selects the sector
#: sizes (scripts/bench/u1_qr_gate.py measured 12).
QR_SVD_EVERY = 12
#: Subspace iterations of a QR gate (scripts/bench/u1_qr_gate.py measured 1, 2 and 3: the second one brings the
#: truncation error near the SVD's, a third one adds cost and little accuracy).
QR_ITERATIONS = 2


def charge_gates(h_bonds: np.ndarray, tau: float) -> np.ndarray:
    """Heisenberg gates of exp(-i H_b tau) in the charge basis, (n, 16, 16) complex, block diagonal in charge.

    G_c = T2 G T2^dag with G the Pauli transfer matrix (c' = G c) and T2 = TO_CHARGE (x) TO_CHARGE, so that
    d' = G_c d. Entries between letter pairs of different charge are set to exactly zero; an InputError naming
    ``chain`` is raised when they are not zero to rounding (a bond Hamiltonian that does not conserve S^z).
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


def _sectors(q: np.ndarray) -> dict[int, tuple[int, int]]:
    """{charge: (start, stop)} of a sorted charge array."""
    vals, a, z = _runs(q)
    return {v: (i, j) for v, i, j in zip(vals, a, z)}


def _partner(q: np.ndarray) -> np.ndarray:
    """The pairing pi of a sorted, charge-symmetric bond: index j of sector q <-> index j of sector -q."""
    first = np.searchsorted(q, q, side="left")
    return np.searchsorted(q, -q, side="left") + (np.arange(q.size) - first)


class _Side:
    """The row (or column) index of a site matrix, grouped by charge, with its Hermitian pairing.

    ``groups[v]``: the flat indices of charge v (ascending, except in group 0: first the self-paired indices, then
    the pairs i < k as [i...] followed by [k...], so that the real change of basis of the v = 0 block works on
    slices); ``pos``: position of every index in its group; ``partner``: the paired index (charge -v);
    ``pgroups[v]``: ``partner[groups[v]]``; ``real0``: (number self-paired, number of pairs) in group 0.
    """

    __slots__ = ("groups", "pos", "partner", "pgroups", "real0")

    def __init__(self, fq: np.ndarray, fp: np.ndarray):
        perm = np.argsort(fq, kind="stable")
        sq = fq[perm]
        pos = np.empty(fq.size, dtype=np.int64)
        pos[perm] = np.arange(fq.size) - np.searchsorted(sq, sq, side="left")
        vals, a, z = _runs(sq)
        groups = {v: perm[i:j] for v, i, j in zip(vals, a, z)}
        self.real0 = None
        g0 = groups.get(0)
        if g0 is not None:
            pp = pos[fp[g0]]
            ar = np.arange(g0.size)
            F, I = np.flatnonzero(pp == ar), np.flatnonzero(pp > ar)
            g0 = np.concatenate([g0[F], g0[I], g0[pp[I]]])
            groups[0] = g0
            pos[g0] = np.arange(g0.size)
            self.real0 = (F.size, I.size)
        self.groups = groups
        self.pos = pos
        self.partner = fp
        self.pgroups = {v: fp[g] for v, g in groups.items()}


def _to_real(M: np.ndarray, rows, cols) -> np.ndarray:
    """The real matrix T_r^dag M T_c of a v = 0 block (``rows``/``cols``: the ``real0`` counts of the sides, or
    None for a side whose indices are all self-paired, the bond sector 0 of a centre move)."""
    if rows is not None:
        f, n = rows
        MI, MK = M[f:f + n], M[f + n:]
        M = np.concatenate([M[:f], (MI + MK) * _S, (MI - MK) * (-1j * _S)])
    if cols is None:
        return np.ascontiguousarray(M.real)
    f, n = cols
    YI, YK = M[:, f:f + n], M[:, f + n:]
    return np.concatenate([M[:, :f].real, (YI + YK).real * _S, (YI - YK).imag * (-_S)], axis=1)


def _from_real_rows(u: np.ndarray, rows) -> np.ndarray:
    """T_r u: rows of a real factor back to the charge basis (complex), in group order."""
    f, n = rows
    out = np.empty(u.shape, dtype=complex)
    out[:f] = u[:f]
    a, b = u[f:f + n], u[f + n:] * 1j
    np.multiply(a + b, _S, out=out[f:f + n])
    np.multiply(a - b, _S, out=out[f + n:])
    return out


def _from_real_cols(vt: np.ndarray, cols) -> np.ndarray:
    """vt T_c^dag: columns of a real factor back to the charge basis (complex), in group order."""
    f, n = cols
    out = np.empty(vt.shape, dtype=complex)
    out[:, :f] = vt[:, :f]
    a, b = vt[:, f:f + n], vt[:, f + n:] * 1j
    np.multiply(a - b, _S, out=out[:, f:f + n])
    np.multiply(a + b, _S, out=out[:, f + n:])
    return out


_LAPACK: dict = {}


def _lapack(names: tuple, dtype) -> tuple:
    fns = _LAPACK.get((names, dtype))
    if fns is None:
        from scipy.linalg import lapack

        fns = lapack.get_lapack_funcs(names, dtype=dtype)
        _LAPACK[(names, dtype)] = fns
    return fns


_LWORK: dict = {}


def _svd(m: np.ndarray):
    """Thin SVD (u, s, vt) by LAPACK gesdd (gesvd if it fails to converge), called directly: at the block sizes
    of the engine scipy's argument handling and workspace query cost a noticeable part of the call."""
    key = (m.dtype.char, m.shape)
    lw = _LWORK.get(key)
    gesdd, gesdd_lwork = _lapack(("gesdd", "gesdd_lwork"), m.dtype)
    if lw is None:
        from scipy.linalg.lapack import _compute_lwork

        lw = _compute_lwork(gesdd_lwork, m.shape[0], m.shape[1], compute_uv=1, full_matrices=0)
        if len(_LWORK) > 4096:
            _LWORK.clear()
        _LWORK[key] = lw
    u, s, vt, info = gesdd(m, compute_uv=1, full_matrices=0, lwork=lw)
    if info != 0:  # pragma: no cover - rare convergence failure of gesdd
        import scipy.linalg

        return scipy.linalg.svd(m, full_matrices=False, lapack_driver="gesvd", check_finite=False)
    return u, s, vt


def _qr(m: np.ndarray):
    """Thin QR (q, r) by LAPACK geqrf and orgqr/ungqr, called directly (see :func:`_svd`)."""
    rows, cols = m.shape
    if rows < cols:
        return np.linalg.qr(m)
    geqrf, orgqr = _lapack(("geqrf", "orgqr" if m.dtype.kind == "f" else "ungqr"), m.dtype)
    qr, tau, _, info = geqrf(m)
    if info != 0:  # pragma: no cover
        return np.linalg.qr(m)
    r = np.triu(qr[:cols])
    q, _, info = orgqr(qr, tau)
    if info != 0:  # pragma: no cover
        return np.linalg.qr(m)
    return q, r


def _keep(svals: list[np.ndarray], mult: list[int], chi: int, cutoff: float):
    """How many values of each block a truncation keeps, and the weight it drops.

    ``svals``: descending singular values per block, ``mult``: how many bond indices each value of the block
    stands for (1 for the v = 0 block, 2 for a (v, -v) pair). Values at or below ``SVD_FLOOR`` times the largest
    are numerical zeros. Of the others, the selection with the largest kept weight whose indices fit in ``chi``
    is kept, pairs whole: the largest p pairs and the largest s single values, p chosen by trying every count
    (with 2 p + s <= chi the kept weight is largest for prefixes of both sorted lists; more pairs on a tie).
    Then the smallest kept values are dropped while their summed weight stays at or below ``cutoff``. At least
    one value is kept. Returns (values kept per block, weight dropped = sum over the others of mult * s^2).
    """
    sizes = [s.size for s in svals]
    s_all = np.concatenate(svals)
    m_all = np.repeat(np.asarray(mult, dtype=np.int64), sizes)
    w_all = s_all * s_all * m_all
    order = np.argsort(-s_all, kind="stable")
    smax = s_all[order[0]]
    order = order[s_all[order] > SVD_FLOOR * smax] if smax > 0 else order[:1]
    single, pair = order[m_all[order] == 1], order[m_all[order] == 2]
    # one more pair gains its weight and loses the 0, 1 or 2 smallest single values that no longer fit; the gains
    # decrease with p (concave total), so the best p is the number of gains >= 0 (compared value by value, not
    # as differences of cumulative sums, which would hide values below the rounding of the total)
    n_p = min(pair.size, chi // 2)
    s = np.minimum(single.size, chi - 2 * np.arange(n_p + 1))
    ws = np.concatenate((w_all[single], [0.0, 0.0]))
    lose = np.where(s[:-1] > s[1:], ws[s[1:]], 0.0) + np.where(s[:-1] > s[1:] + 1, ws[s[1:] + 1], 0.0)
    best = int(np.count_nonzero(w_all[pair[:n_p]] >= lose))
    kept = np.concatenate((pair[:best], single[:s[best]]))
    if kept.size == 0:  # pragma: no cover - chi >= 2 always fits the largest value
        kept = order[:1]
    if cutoff > 0 and kept.size > 1:
        kept = kept[np.argsort(s_all[kept], kind="stable")[::-1]]  # descending
        tail = np.cumsum(w_all[kept[::-1]])
        kept = kept[:max(1, kept.size - int(np.searchsorted(tail, cutoff, side="right")))]
    mask = np.ones(s_all.size, dtype=bool)
    mask[kept] = False
    block = np.repeat(np.arange(len(svals)), sizes)
    counts = np.bincount(block[kept], minlength=len(svals)).tolist()  # a block keeps its largest values
    return counts, float(np.sum(w_all[mask]))


class _GateMap:
    """Index maps of one two-site block theta[(l, a), (b, r)] for given outer bond charges (cached).

    The nonzero entries are stored block by block over the charge v of the middle bond (rows (l, a) with
    q_l + c(a) = v, columns (b, r) with q_r - c(b) = v), blocks concatenated in one flat buffer; the gate mixes
    entries with the same (l, r) whose letter pairs have the charge c = q_r - q_l: ``pair_maps`` holds, for every
    c, the buffer positions (k_c, n_c) of those entries (rows in the order of :data:`_PAIRS` [c]).
    """

    __slots__ = ("rows", "cols", "blocks", "size", "pair_maps")

    def __init__(self, ql: np.ndarray, qr: np.ndarray, rows: _Side, cols: _Side):
        Dl, Dr = ql.size, qr.size
        self.rows, self.cols = rows, cols
        blocks, off = [], 0
        rowoff = np.zeros(Dl * 4, dtype=np.int64)
        for v in sorted(rows.groups):
            ridx, cidx = rows.groups[v], cols.groups.get(v)
            if cidx is None:
                continue
            nr, nc = ridx.size, cidx.size
            blocks.append((v, ridx, cidx, off, nr, nc))
            rowoff[ridx] = off + rows.pos[ridx] * nc
            off += nr * nc
        self.blocks = blocks
        self.size = off
        diff = qr[None, :] - ql[:, None]
        maps = []
        for c, pairs in _PAIRS.items():
            li, ri = np.nonzero(diff == c)
            if li.size == 0:
                continue
            a, b = pairs // 4, pairs % 4
            idx = rowoff[li[None, :] * 4 + a[:, None]] + cols.pos[b[:, None] * Dr + ri[None, :]]
            maps.append((c, idx))
        self.pair_maps = maps


# -------------------------------------------------------------------------------------------- engine
class ChargeTEBD(BrickworkEngine):
    """Heisenberg-picture TEBD of W = Z with U(1) charge blocks, for chains that conserve total S^z.

    The same evolution interface as :class:`mpo_fronts.evolve.OperatorTEBD` (``run``, ``state_dict``,
    ``load_state_dict``, ``norm2``, ``ledger``, ``discarded_weight``, ``t``, ``center``, ``max_bond``,
    ``max_step``, ``blocks_done``, ``splits``); results equal it to rounding where neither truncates. With
    truncation both keep the largest singular values of each two-site block, but where the cut falls inside a
    degenerate pair (v, -v) this engine keeps or drops the pair whole (the operator stays U(1)-symmetric, so
    C_X = C_Y exactly as in the exact evolution), while the Z2 engine keeps one combination of it (which
    breaks the symmetry slightly); the two then differ by an amount of the order of the truncation error.

    Parameters
    ----------
    chain : Chain
        A chain with ``conserves_sz`` (the XXZ chain of :func:`mpo_fronts.models.xxz_chain`).
    w : {'Z'}
        The evolved operator; only Z (charge 0) is supported.
    site : int or 'center'
        Where W sits at t = 0.
    settings : EvolutionSettings, optional
        chi (at least 2), dt (a number: resolve ``"auto"`` first), order, cutoff, chunk, truncation (one of
        :data:`COMPLEX_ROUTES`) and, where the settings have it, splitting (see
        :class:`mpo_fronts.settings.EvolutionSettings`).
    **options
        Instead of ``settings``, the same fields as keywords.

    Attributes
    ----------
    arrays : list of ndarray (D_left, 4, D_right), complex
        The operator MPS in the charge basis (letters I, Z, +, -; see the module doc), mixed canonical around
        ``center``, in the Hermitian gauge; :meth:`real_pauli_arrays` gives it as a real Pauli-basis MPS.
    charges : list of ndarray (D_b,), int
        Charge of every index of bond b (between sites b and b + 1), ascending, symmetric under q -> -q.
    ledger : TruncationLedger
        Discarded weight: total (``discarded_weight``, the norm loss 1 - sum_S |d_S|^2), per bond, gates per
        route.

    Examples
    --------
    >>> from mpo_fronts.models import xxz_chain
    >>> eng = ChargeTEBD(xxz_chain(10, W=1.0, seed=1), w="Z", site=5, chi=16, dt=0.1)
    >>> for k, e in eng.run([0.5, 1.0]):
    ...     pass
    >>> round(e.t, 12), e.max_bond <= 16, e.profiles()["weights"].shape
    (1.0, True, (10, 4))
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
                             f"(its blocks are complex and split in pairs), got {settings.truncation!r}",
                             arg="truncation")
        if settings.chi < 2:
            raise InputError(f"chi must be at least 2 for ChargeTEBD (singular values of charges v and -v are kept "
                             f"in pairs), got {settings.chi}", arg="chi")
        if not isinstance(settings.dt, float):
            raise InputError(f"dt must be a number for ChargeTEBD, got {settings.dt!r}; resolve dt = 'auto' to a "
                             f"step first (mpo_fronts.stepsize.auto_dt)", arg="dt")
        self.settings = settings
        self.chain = chain
        self.L = chain.L
        self.w = "Z"
        self.site = check_site(site, self.L)
        self.chi, self.dt, self.order = settings.chi, settings.dt, settings.order
        self.cutoff, self.chunk, self.truncation = settings.cutoff, settings.chunk, settings.truncation
        self.splitting = getattr(settings, "splitting", "standard")
        self.ledger = TruncationLedger.empty(self.L - 1)
        keep_freed_memory()
        self._hb = chain.bond_hamiltonians()
        self._gates: dict[float, list] = {}
        self._maps: dict[Any, Any] = {}
        ident = np.zeros((1, 4, 1), dtype=complex)
        ident[0, 0, 0] = 1.0
        self.arrays: list[np.ndarray] = [ident.copy() for _ in range(self.L)]
        self.arrays[self.site] = np.zeros((1, 4, 1), dtype=complex)
        self.arrays[self.site][0, 1, 0] = 1.0  # e_Z = Z
        self.charges: list[np.ndarray] = [np.zeros(1, dtype=np.int64) for _ in range(self.L - 1)]
        self._edge = np.zeros(1, dtype=np.int64)  # W = Z has total charge 0: both chain ends carry charge 0
        self.center = self.site
        self.lo = self.hi = self.site
        self.t = 0.0
        self.blocks_done = 0
        self.max_step = 0.0
        self._qr_every = QR_SVD_EVERY if getattr(settings, "gate_update", "svd") == "qr" else 0  # see _qr_gate
        self._qr_count: dict[int, int] = {}
        self._qr_iters = QR_ITERATIONS

    # ------------------------------------------------------------------ bookkeeping
    def norm2(self) -> float:
        """Frobenius weight sum_S |d_S|^2 = Tr(W(t)^2) / 2^L (from the orthogonality centre)."""
        A = self.arrays[self.center]
        return float(np.vdot(A, A).real)

    def sector_dims(self, b: int) -> dict[int, int]:
        """Dimension of every charge sector of bond b (between sites b and b + 1)."""
        return {v: j - i for v, (i, j) in _sectors(self.charges[b]).items()}

    def pauli_arrays(self) -> list[np.ndarray]:
        """The operator MPS in the Pauli basis I, X, Y, Z (complex tensors, the same canonical form).

        A_P[l, p, r] = sum_a A[l, a, r] conj(TO_CHARGE[a, p]); the contracted coefficients are the real Pauli
        coefficients of W(t) (to rounding). :meth:`real_pauli_arrays` gives real tensors.
        """
        Tc = TO_CHARGE.conj()
        return [np.einsum("lar,ap->lpr", A, Tc) for A in self.arrays]

    def real_pauli_arrays(self) -> list[np.ndarray]:
        """The operator as a real MPS over Pauli letters I, X, Y, Z, mixed canonical around ``center``.

        Each bond gets the unitary change of basis that pairs its indices j of sectors q and -q into
        (x + y) / sqrt 2 and i (x - y) / sqrt 2 (sector 0 stays); in the Hermitian gauge the tensors then become
        real (their imaginary parts are rounding, dropped). This is the layout of
        :class:`mpo_fronts.evolve.OperatorTEBD`, so every function of :mod:`mpo_fronts.readout`
        (``read_operator(arrays, center)``, ``product_state_otoc``) and
        :func:`mpo_fronts.evolve.bond_entropies` accept it.
        """
        Tc = TO_CHARGE.conj()
        Ts = [np.ones((1, 1), dtype=complex)] + [_bond_real_basis(q) for q in self.charges] + \
             [np.ones((1, 1), dtype=complex)]
        out = []
        for k, A in enumerate(self.arrays):
            AP = np.einsum("lar,ap->lpr", A, Tc)
            AP = np.tensordot(Ts[k].conj(), AP, axes=(0, 0))  # (m, p, r)
            AP = np.tensordot(AP, Ts[k + 1], axes=(2, 0))  # (m, p, s)
            out.append(np.ascontiguousarray(AP.real))
        return out

    def profiles(self) -> dict[str, np.ndarray]:
        """``weights`` (L, 4) single-site Pauli weights (I, X, Y, Z; rows sum to 1), ``right_weight`` (L,)."""
        return charge_profiles(self)

    def state_dict(self) -> dict:
        """Everything needed to continue the evolution (numpy arrays and numbers only)."""
        return {"engine": "u1", "arrays": [A.copy() for A in self.arrays], "t": self.t, **self.ledger.state(),
                "blocks_done": self.blocks_done, "center": self.center, "lo": self.lo, "hi": self.hi,
                "max_step": self.max_step, "charges": [q.copy() for q in self.charges],
                "qr_count": np.array([self._qr_count.get(b, 0) for b in range(self.L - 1)], dtype=np.int64)}

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
        counts = np.asarray(state.get("qr_count", np.zeros(0)), dtype=np.int64)
        self._qr_count = {b: int(n) for b, n in enumerate(counts) if n}

    # ------------------------------------------------------------------ evolution
    def _build_gates(self, d: float) -> list:
        """Per bond: {pair charge c: the (k_c, k_c) block of the charge-basis gate} for a layer of length d."""
        return [{c: np.ascontiguousarray(g[np.ix_(p, p)]) for c, p in _PAIRS.items()}
                for g in charge_gates(self._hb, d)]

    # ------------------------------------------------------------------ index maps (cached)
    def _q(self, k: int) -> np.ndarray:
        """Charges of bond k; k = -1 and L - 1 are the chain's edges."""
        if k < 0 or k >= self.L - 1:
            return self._edge
        return self.charges[k]

    def _cached(self, key, build):
        m = self._maps.get(key)
        if m is None:
            if len(self._maps) >= _CACHE_SIZE:
                self._maps.clear()
            m = build()
            self._maps[key] = m
        return m

    def _rows(self, q: np.ndarray) -> _Side:
        """Rows (l, a) of a site matrix (D_left * 4, D_right) whose left bond has charges q."""
        def build():
            fq = (q[:, None] + LETTER_CHARGE[None, :]).reshape(-1)
            fp = (_partner(q)[:, None] * 4 + _SWAP[None, :]).reshape(-1)
            return _Side(fq, fp)
        return self._cached(("r", q.tobytes()), build)

    def _cols(self, q: np.ndarray) -> _Side:
        """Columns (b, r) of a site matrix (D_left, 4 * D_right) whose right bond has charges q."""
        def build():
            fq = (q[None, :] - LETTER_CHARGE[:, None]).reshape(-1)
            fp = (_SWAP[:, None] * q.size + _partner(q)[None, :]).reshape(-1)
            return _Side(fq, fp)
        return self._cached(("c", q.tobytes()), build)

    def _gate_map(self, ql: np.ndarray, qr: np.ndarray) -> _GateMap:
        return self._cached(("g", ql.tobytes(), qr.tobytes()),
                            lambda: _GateMap(ql, qr, self._rows(ql), self._cols(qr)))

    # ------------------------------------------------------------------ centre moves and gates
    def _move_center(self, target: int) -> None:
        arrays = self.arrays
        c = self.center
        while c < target:  # A = Q R per sector of bond c (v >= 0; v < 0 by conjugation); R into site c + 1
            A, B = arrays[c], arrays[c + 1]
            Dl, _, Dm = A.shape
            rows = self._rows(self._q(c - 1))
            Q, labs, parts = _block_qr(A.reshape(Dl * 4, Dm), rows, self.charges[c], right=True)
            B2 = B.reshape(Dm, -1)
            newB = np.empty((Q.shape[1], B2.shape[1]), dtype=complex)
            for o, (i, j), r in parts:
                np.matmul(r, B2[i:j], out=newB[o:o + r.shape[0]])
            arrays[c] = Q.reshape(Dl, 4, -1)
            arrays[c + 1] = newB.reshape(-1, 4, B.shape[2])
            self.charges[c] = labs
            c += 1
        while c > target:  # A^T = Q R per sector of bond c - 1; R^T into site c - 1
            A, P = arrays[c], arrays[c - 1]
            Dl, _, Dr = A.shape
            cols = self._cols(self._q(c))
            Q, labs, parts = _block_qr(A.reshape(Dl, 4 * Dr).T, cols, self.charges[c - 1], right=False)
            P2 = P.reshape(-1, Dl)
            newP = np.empty((P2.shape[0], Q.shape[1]), dtype=complex)
            for o, (i, j), r in parts:
                np.matmul(P2[:, i:j], r.T, out=newP[:, o:o + r.shape[0]])
            arrays[c] = Q.T.reshape(-1, 4, Dr)
            arrays[c - 1] = newP.reshape(P.shape[0], 4, -1)
            self.charges[c - 1] = labs
            c -= 1
        self.center = c

    def _gate(self, b: int, G: dict, to_right: bool) -> None:
        A, B = self.arrays[b], self.arrays[b + 1]
        Dl, _, Dm = A.shape
        Dr = B.shape[2]
        gm = self._gate_map(self._q(b - 1), self._q(b + 1))
        rows, cols = gm.rows, gm.cols
        A2 = A.reshape(Dl * 4, Dm)
        B2 = B.reshape(Dm, 4 * Dr)
        mid = _sectors(self.charges[b])
        # theta block by block over the middle charge (the same blocks before and after the gate)
        pre = np.zeros(gm.size, dtype=complex)
        for v, ridx, cidx, o, nr, nc in gm.blocks:
            s = mid.get(v)
            if s is not None:
                i, j = s
                np.matmul(A2[ridx, i:j], B2[i:j, cidx], out=pre[o:o + nr * nc].reshape(nr, nc))
        post = np.empty_like(pre)
        for c, idx in gm.pair_maps:  # the gate: entries of one (l, r) whose letter pairs have charge c
            post[idx] = G[c] @ pre[idx]
        if self._qr_every and self._qr_gate(b, gm, post, mid, A2, B2, Dl, Dr, to_right):
            return
        # decompositions for v >= 0; v = 0 in real arithmetic
        dec = []
        for v, ridx, cidx, o, nr, nc in gm.blocks:
            if v < 0:
                continue
            M = post[o:o + nr * nc].reshape(nr, nc)
            if v == 0:
                u, s, vt = _svd(_to_real(M, rows.real0, cols.real0))
            else:
                u, s, vt = _svd(M)
            dec.append((v, ridx, cidx, u, s, vt))
        counts, disc = _keep([x[4] for x in dec], [1 if x[0] == 0 else 2 for x in dec], self.chi, self.cutoff)
        self.ledger.add(b, disc, "svd")
        sizes = {}
        for (v, *_), kp in zip(dec, counts):
            if kp:
                sizes[v] = kp
                if v:
                    sizes[-v] = kp
        labs = np.concatenate([np.full(sizes[v], v, dtype=np.int64) for v in sorted(sizes)])
        offs, o = {}, 0
        for v in sorted(sizes):
            offs[v] = o
            o += sizes[v]
        parts = []
        for (v, ridx, cidx, u, s, vt), kp in zip(dec, counts):
            if kp:
                u, s, vt = u[:, :kp], s[:kp], vt[:kp]
                parts.append((v, ridx, cidx, *((u, s[:, None] * vt) if to_right else (u * s, vt))))
        self._place(b, rows, cols, parts, offs, labs, Dl, Dr, to_right)

    def _place(self, b, rows, cols, parts, offs, labs, Dl, Dr, to_right) -> None:
        """Write sites b, b + 1 from the factors of a gate: ``parts`` holds (v, rows, columns, left, right) for
        v >= 0 (v = 0 in the real basis of :func:`_to_real`); sector v starts at ``offs[v]`` of the new bond
        with charges ``labs``, and sector -v gets the conjugates (the Hermitian gauge)."""
        k = labs.size
        newA = np.zeros((Dl * 4, k), dtype=complex)
        newB = np.zeros((k, 4 * Dr), dtype=complex)
        for v, ridx, cidx, left, right in parts:
            kp = left.shape[1]
            if v == 0:
                if rows.real0 is not None:
                    left = _from_real_rows(left, rows.real0)
                if cols.real0 is not None:
                    right = _from_real_cols(right, cols.real0)
            o = offs[v]
            newA[ridx, o:o + kp] = left
            newB[o:o + kp, cidx] = right
            if v:
                o = offs[-v]
                newA[rows.pgroups[v], o:o + kp] = left.conj()
                newB[o:o + kp, cols.pgroups[v]] = right.conj()
        self.arrays[b] = newA.reshape(Dl, 4, k)
        self.arrays[b + 1] = newB.reshape(k, 4, Dr)
        self.charges[b] = labs
        self.center = b + 1 if to_right else b

    def _qr_gate(self, b, gm, post, mid, A2, B2, Dl, Dr, to_right) -> bool:
        """gate_update = "qr" (``_qr_every`` > 0; scripts/bench/u1_qr_gate.py): truncate the gate's blocks by
        ``_qr_iters`` (:data:`QR_ITERATIONS`) subspace iterations started from the old bond basis, each
        closed by a QR, instead of an SVD, keeping the sector sizes of bond b (the QR-based update of J. Unfried, J. Hauschild, F. Pollmann, Phys. Rev. B 107, 155133 (2023), cited
        from memory, here without its bond growth). Falls back (returns False) to the SVD when the bond is
        below chi or on every ``_qr_every``-th gate of the bond, which re-selects the sector sizes. The per-bond
        gate counts are part of the checkpoint state, so a resumed run repeats the uninterrupted one."""
        n = self._qr_count.get(b, 0)
        self._qr_count[b] = n + 1
        if self.charges[b].size < self.chi or n % self._qr_every == 0:
            return False
        rows, cols = gm.rows, gm.cols
        parts, disc = [], 0.0
        for v, ridx, cidx, o, nr, nc in gm.blocks:
            if v < 0:
                continue
            M = post[o:o + nr * nc].reshape(nr, nc)
            sec = mid.get(v)
            w = float(np.vdot(M, M).real)
            if sec is None:
                disc += w * (1 if v == 0 else 2)
                continue
            i, j = sec
            real = v == 0
            if to_right:
                R0 = B2[i:j, cidx]
                if real:
                    M, R0 = _to_real(M, rows.real0, cols.real0), _to_real(R0, None, cols.real0)
                q, _ = _qr(M @ R0.conj().T)
                for _ in range(self._qr_iters - 1):
                    q, _ = _qr(M @ (M.conj().T @ q))
                left, right = q, q.conj().T @ M
            else:
                L0 = A2[ridx, i:j]
                if real:
                    M, L0 = _to_real(M, rows.real0, cols.real0), _to_real(L0, rows.real0, None)
                q, _ = _qr(M.conj().T @ L0)
                for _ in range(self._qr_iters - 1):
                    q, _ = _qr(M.conj().T @ (M @ q))
                left, right = M @ q, q.conj().T
            kept = float(np.vdot(right, right).real if to_right else np.vdot(left, left).real)
            disc += max(w - kept, 0.0) * (1 if v == 0 else 2)
            parts.append((v, ridx, cidx, left, right))
        self.ledger.add(b, disc, "qr")
        self._place(b, rows, cols, parts, {v: i for v, (i, _) in mid.items()}, self.charges[b], Dl, Dr, to_right)
        return True


def _block_qr(m: np.ndarray, side: _Side, q: np.ndarray, right: bool):
    """Blockwise QR of m (rows grouped by ``side``, columns = the bond with sorted charges ``q``), Hermitian gauge.

    Returns Q (rows, k) with the new bond's sectors in ascending charge, their charges, and ``(offset, (start,
    stop), R)`` for every new sector: R (k_v, d_v) acts on the old bond's sector [start, stop). Sectors v > 0 are
    factorized, v < 0 are their conjugates, v = 0 is done in real arithmetic; old sectors without rows are zero
    and leave the bond.
    """
    sec = _sectors(q)
    dec = {}
    for v, (i, j) in sec.items():
        if v < 0:
            continue
        ridx = side.groups.get(v)
        if ridx is None:
            continue
        M = m[ridx, i:j]
        if v == 0:
            Qv, Rv = _qr(_to_real(M, side.real0, None))
            Qv = _from_real_rows(Qv, side.real0)
        else:
            Qv, Rv = _qr(M)
        dec[v] = (ridx, Qv, Rv)
    vs = sorted(set(dec) | {-v for v in dec})
    sizes = {v: dec[abs(v)][1].shape[1] for v in vs}
    k = sum(sizes.values())
    Q = np.zeros((m.shape[0], k), dtype=complex)
    parts, o = [], 0
    for v in vs:
        kp = sizes[v]
        ridx, Qv, Rv = dec[abs(v)]
        if v < 0:
            Q[side.pgroups[-v], o:o + kp] = Qv.conj()
            parts.append((o, sec[v], Rv.conj()))
        else:
            Q[ridx, o:o + kp] = Qv
            parts.append((o, sec[v], Rv))
        o += kp
    labs = np.concatenate([np.full(sizes[v], v, dtype=np.int64) for v in vs])
    return Q, labs, parts


def _bond_real_basis(q: np.ndarray) -> np.ndarray:
    """Unitary T (D, D) of a bond with charges q: columns e_j (sector 0), (e_j + e_pj) / sqrt 2 and
    i (e_j - e_pj) / sqrt 2 for the pairs j (sector q > 0), pj = pi(j) (sector -q)."""
    D = q.size
    T = np.zeros((D, D), dtype=complex)
    p = _partner(q)
    ar = np.arange(D)
    zero = q == 0
    T[ar[zero], ar[zero]] = 1.0
    pos = np.flatnonzero(q > 0)
    T[pos, pos] = _S
    T[p[pos], pos] = _S
    T[pos, p[pos]] = 1j * _S
    T[p[pos], p[pos]] = -1j * _S
    return T


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
    whose rightmost non-identity letter is at r, normalised to sum 1. The OTOC of probe V at site r is
    C(r, t) = 2 * (sum of the weights of the letters anticommuting with V) (:func:`mpo_fronts.readout.otoc_from_weights`).
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
