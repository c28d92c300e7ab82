"""Exact references for the OTOC: dense evolution, eigenstate-resolved OTOCs, free fermions, typicality.

Conventions as in the rest of the package (README, "Conventions"): spin-1/2 chain, sites 0..L-1, basis
|0> = spin up (Z = +1), site 0 is the most significant factor of a dense state index, hbar = 1, time in units
of 1/J, W(t) = e^{iHt} W e^{-iHt}, and

    C(r, t) = 1 - Re Tr[W(t) V_r W(t) V_r] / 2^L          (infinite temperature)
    C_s(r, t) = 1 - Re <s| W(t) V_r W(t) V_r |s>           (basis state |s>, '0' = spin up)

for Pauli operators W (at ``site``) and V (at r).

* :func:`exact_otoc` evolves the dense 2^L x 2^L operator W(t) from the eigendecomposition of H (L <= 12) and
  reads out everything :func:`mpo_fronts.readout.evolve_otoc` does (single-site Pauli weights, right-weight
  profile, product-state OTOCs), without any truncation or Trotter error.
* :func:`eigenstate_otoc` resolves C over all eigenstates |n>; their average is the infinite-temperature C.
* :func:`free_fermion_otoc` is the closed form of C_ZZ for the XX chain (delta = 0) with any fields and
  couplings, at any L, either for the exact evolution or for exactly the engine's Trotter schedule.
* :func:`typicality_otoc` estimates C with Haar-random states and sparse Krylov evolution (L up to ~22 here).

Local Pauli operators are always applied by reshaping and sign flips of the state index, never as 2^L x 2^L
matrices.
"""

from __future__ import annotations

from typing import Sequence

import numpy as np

from .errors import InputError
from .evolve import check_site, check_w as _check_w
from .schedules import DEFAULT_CHUNK, ORDERS, block_layers, step_plan
from .schedules import check_times as _check_times
from .models import Chain
from .readout import PROBES, OtocResult, check_bits, check_probe

__all__ = ["exact_otoc", "eigenstate_otoc", "free_fermion_otoc", "typicality_otoc", "TypicalityResult",
           "sparse_hamiltonian", "apply_pauli", "MAX_DENSE_L", "MAX_SPARSE_L"]

#: Largest chain length handled by the dense references (4^L complex numbers per operator).
MAX_DENSE_L = 12



# --------------------------------------------------------------------------------------------- helpers
def _check_chain(chain, what: str, max_L: int | None = None) -> Chain:
    if not isinstance(chain, Chain):
        raise InputError(f"chain must be a Chain (from xxz_chain, mixed_field_ising_chain, nn_chain), "
                         f"got {type(chain).__name__}")
    if max_L is not None and chain.L > max_L:
        raise InputError(f"{what}: L = {chain.L} is too large for a dense exact computation (L <= {max_L}); "
                         f"use typicality_otoc (sparse, L <~ 22) or the MPO engine evolve_otoc")
    return chain


def _check_request(chain, what: str, max_L: int, w, site, times) -> tuple[Chain, str, int, np.ndarray]:
    """The checks shared by the exact references: chain and size, operator, site, output times."""
    chain = _check_chain(chain, what, max_L)
    return chain, _check_w(w), check_site(site, chain.L), _check_times(times)


def apply_pauli(vecs: np.ndarray, letter: str, site: int, L: int) -> np.ndarray:
    """Apply the Pauli ``letter`` at ``site`` to the rows of ``vecs`` (shape (2^L,) or (2^L, m)).

    Works by reshaping the row index into (2^site, 2, 2^(L-site-1)) (site 0 = most significant bit) and
    flipping / signing the middle axis; returns a new array (complex for Y).
    """
    shape = vecs.shape
    a = vecs.reshape((2**site, 2, 2 ** (L - site - 1)) + shape[1:])
    if letter == "I":
        out = a.copy()
    elif letter == "Z":
        out = a.copy()
        out[:, 1] *= -1
    elif letter == "X":
        out = a[:, ::-1].copy()
    elif letter == "Y":  # Y|0> = i|1>, Y|1> = -i|0>: (Y v)_0 = -i v_1, (Y v)_1 = i v_0
        out = np.empty(a.shape, dtype=complex)
        out[:, 0] = -1j * a[:, 1]
        out[:, 1] = 1j * a[:, 0]
    else:  # pragma: no cover - internal misuse
        raise ValueError(letter)
    return out.reshape(shape)


def _flip_phase(bits: str, letter: str, r: int) -> tuple[complex, str]:
    """V_r |s> = lam |s'> for a basis state s: returns (lam, s')."""
    b = int(bits[r])
    if letter == "Z":
        return (-1.0) ** b, bits
    flipped = bits[:r] + str(1 - b) + bits[r + 1:]
    if letter == "X":
        return 1.0, flipped
    return 1j * (-1.0) ** b, flipped


class _Spectrum:
    """Eigendecomposition of the dense H, in real arithmetic when H is real (XXZ, mixed-field Ising)."""

    def __init__(self, chain: Chain):
        H = chain.dense_hamiltonian()
        if np.abs(H.imag).max() == 0.0:
            H = np.ascontiguousarray(H.real)
        self.energies, self.vecs = np.linalg.eigh(H)
        self.L = chain.L
        self.real = np.isrealobj(self.vecs)

    def to_eigenbasis(self, letter: str, site: int) -> np.ndarray:
        """V^dag P_site V, Hermitian (dim, dim)."""
        PV = apply_pauli(self.vecs, letter, site, self.L)
        return self.vecs.conj().T @ PV

    def phases(self, t: float) -> np.ndarray:
        """Phi[m, n] = exp(i (E_m - E_n) t), so that W(t) in the eigenbasis is Phi * W_eig."""
        p = np.exp(1j * self.energies * t)
        return p[:, None] * p.conj()[None, :]

    def heisenberg(self, W_eig: np.ndarray, t: float) -> np.ndarray:
        """The dense W(t) = V (Phi * W_eig) V^dag in the computational basis."""
        M = self.phases(t) * W_eig
        V = self.vecs
        if self.real:  # two real products per part: half the flops of complex ones
            re = (V @ M.real) @ V.T
            im = (V @ M.imag) @ V.T
            return re + 1j * im
        return (V @ M) @ V.conj().T


class _SectorSpectrum:
    """Eigendecomposition of H block by block in the sectors of total S^z (chains with ``conserves_sz``).

    A local Pauli letter maps sector m to m (I, Z) or to m +- 1 (X, Y), so W(t) is assembled from blocks
    V_a (Phi_ab * W_ab) V_b^dag between connected sectors only, and identical results to rounding. Flop count
    (not a timing): the two products per block cost n_a n_b (n_a + n_b) for sector sizes n_a = binom(L, a),
    against 2 (2^L)^3 for the dense route; at L = 12 that is 19x fewer for X, Y and 34x fewer for I, Z.
    """

    def __init__(self, chain: Chain):
        self.L = chain.L
        H = sparse_hamiltonian(chain)
        n = np.arange(2**self.L)
        ups = self.L - np.array([bin(k).count("1") for k in n])  # spins up ('0' bits), 0..L
        self.index = [np.flatnonzero(ups == m) for m in range(self.L + 1)]
        self.energies, self.vecs = [], []
        for idx in self.index:
            block = H[idx][:, idx].toarray()
            e, v = np.linalg.eigh(block)
            self.energies.append(e)
            self.vecs.append(v)
        self.real = all(np.isrealobj(v) for v in self.vecs)

    def _pairs(self, letter: str) -> list[tuple[int, int]]:
        M = self.L + 1
        if letter in "IZ":
            return [(a, a) for a in range(M)]
        return [(a, b) for a in range(M) for b in (a - 1, a + 1) if 0 <= b < M]

    def to_eigenbasis(self, letter: str, site: int) -> dict:
        """Blocks W_ab = V_a^dag P[a, b] V_b of the Pauli letter at site, between connected sectors."""
        dim = 2**self.L
        out = {}
        for a, b in self._pairs(letter):
            emb = np.zeros((dim, self.index[b].size), dtype=self.vecs[b].dtype)
            emb[self.index[b]] = self.vecs[b]
            PV = apply_pauli(emb, letter, site, self.L)[self.index[a]]
            out[(a, b)] = self.vecs[a].conj().T @ PV
        return out

    def heisenberg(self, W_eig: dict, t: float) -> np.ndarray:
        """The dense W(t) in the computational basis, assembled from the sector blocks."""
        dim = 2**self.L
        Wt = np.zeros((dim, dim), dtype=complex)
        ph = [np.exp(1j * e * t) for e in self.energies]
        for (a, b), Wab in W_eig.items():
            M = (ph[a][:, None] * ph[b].conj()[None, :]) * Wab
            Va, Vb = self.vecs[a], self.vecs[b]
            if self.real:
                blk = (Va @ M.real) @ Vb.T + 1j * ((Va @ M.imag) @ Vb.T)
            else:
                blk = (Va @ M) @ Vb.conj().T
            Wt[np.ix_(self.index[a], self.index[b])] = blk
        return Wt


def _site_weights(Wt: np.ndarray, L: int) -> np.ndarray:
    """Single-site Pauli weights p[r, a] of a dense operator W (rows sum to 1).

    With W = sum_a P_a^(r) (x) B_a and T_ij the blocks of W with site-r row index i and column index j:
    B_I, B_Z = (T_00 +- T_11) / 2, B_X = (T_10 + T_01) / 2, B_Y = i (T_01 - T_10) / 2, and
    p_r(a) is proportional to ||B_a||_F^2. Only two real inner products per site are needed beyond the norms;
    they are taken on strided views of W.real and W.imag (no copies of the 4^L numbers).
    """
    parts = (Wt.real, Wt.imag) if np.iscomplexobj(Wt) else (Wt,)
    total = sum(float(np.einsum("ij,ij->", x, x)) for x in parts)
    p = np.empty((L, 4))
    for r in range(L):
        A, B = 2**r, 2 ** (L - r - 1)
        T = [x.reshape(A, 2, B * A, 2, B) for x in parts]

        def inner(i, j, k, l):  # Re <T_ij, T_kl>
            return sum(float(np.einsum("xyw,xyw->", t[:, i, :, j, :], t[:, k, :, l, :])) for t in T)

        diag = inner(0, 0, 0, 0) + inner(1, 1, 1, 1)
        c_iz = inner(0, 0, 1, 1)
        c_xy = inner(0, 1, 1, 0)
        p[r] = (diag + 2 * c_iz, total - diag + 2 * c_xy, total - diag - 2 * c_xy, diag - 2 * c_iz)
    return p / p.sum(axis=1, keepdims=True)


def _right_weight(Wt: np.ndarray, L: int) -> np.ndarray:
    """Weight of Pauli strings whose rightmost non-identity letter is at r, normalised to sum 1.

    N_r = weight of the strings supported on sites 0..r = ||Tr_{>r} W / 2^(L-r-1)||_F^2 / 2^(r+1), computed by
    tracing out sites from the right; rho_r = N_r - N_{r-1}, with N_{-1} the identity-string weight.
    """
    N = np.empty(L + 1)  # N[r + 1] = weight supported on 0..r; N[0] = identity string
    X = Wt
    for r in range(L - 1, -1, -1):
        d = 2 ** (r + 1)
        N[r + 1] = np.vdot(X, X).real / d
        X = np.trace(X.reshape(d // 2, 2, d // 2, 2), axis1=1, axis2=3) / 2.0
    N[0] = abs(complex(X.reshape(-1)[0])) ** 2
    rho = np.diff(N)
    total = rho.sum()
    return rho / total if total > 0 else rho


def _state_otoc(Wt: np.ndarray, L: int, bits: str, v: str) -> np.ndarray:
    """C_s(r) = 1 - Re <s|W V_r W V_r|s> = 1 - Re lam (W|s>)^dag V_r W|s'> for every r (W Hermitian)."""
    s = int(bits, 2)
    ws = Wt[:, s]
    out = np.empty(L)
    for r in range(L):
        lam, flipped = _flip_phase(bits, v, r)
        wf = Wt[:, int(flipped, 2)]
        out[r] = 1.0 - (lam * np.vdot(ws, apply_pauli(wf, v, r, L))).real
    return out


# --------------------------------------------------------------------------------------------- dense exact
def exact_otoc(chain: Chain, w: str = "Z", site=0, times: Sequence[float] = (1.0,),
               state: str | None = None) -> OtocResult:
    """OTOCs by dense exact evolution of W(t) = e^{iHt} W e^{-iHt} (L <= 12; no truncation, no Trotter error).

    Parameters
    ----------
    chain : Chain
        The model, L <= 12 (``xxz_chain``, ``mixed_field_ising_chain``, ``nn_chain``).
    w : {'X', 'Y', 'Z'}
        The evolved Pauli operator W.
    site : int or 'center'
        Site of W.
    times : sequence of float
        Strictly increasing times >= 0 (units 1/J).
    state : str, optional
        None for infinite temperature, or a basis state ('0' = spin up, Z = +1) of length L for the
        product-state OTOC C_s(r, t) = 1 - Re <s|W(t) V_r W(t) V_r|s>.

    Returns
    -------
    OtocResult
        Same layout as :func:`mpo_fronts.readout.evolve_otoc`: ``weights`` (n_t, L, 4) single-site Pauli
        weights, ``right_weight`` (n_t, L) front profile, ``state_otoc`` for a given state.
        ``discarded_weight`` is zero (nothing is truncated) and ``max_bond`` is -1 at every time (the operator
        Schmidt rank is not computed by the dense reference); ``meta["method"] == "exact"``.

    Notes
    -----
    Cost: one dense diagonalisation of H (2^L x 2^L) and four real (two complex for complex H)
    2^L x 2^L matrix products per time; for chains that conserve total S^z (XXZ) both are done block by block
    in the S^z sectors (19-34x fewer flops at L = 12 by the count in ``_SectorSpectrum``). Memory: a few dense
    2^L x 2^L complex matrices (L = 12: ~0.3 GB each).

    Examples
    --------
    >>> import mpo_fronts as mf
    >>> res = exact_otoc(mf.xxz_chain(6, W=1.0, seed=1), w="Z", site=0, times=[0.5, 1.0])
    >>> res.otoc("X").shape
    (2, 6)
    """
    chain, w, site, ts = _check_request(chain, "exact_otoc", MAX_DENSE_L, w, site, times)
    L = chain.L
    if state is not None:
        state = check_bits(state, L)
    spec = _SectorSpectrum(chain) if chain.conserves_sz else _Spectrum(chain)
    W_eig = spec.to_eigenbasis(w, site)
    n_t = ts.size
    weights = np.empty((n_t, L, 4))
    right = np.empty((n_t, L))
    sotoc = {v: np.empty((n_t, L)) for v in PROBES} if state is not None else {}
    for k, t in enumerate(ts):
        Wt = spec.heisenberg(W_eig, float(t))
        weights[k] = _site_weights(Wt, L)
        right[k] = _right_weight(Wt, L)
        for v in sotoc:
            sotoc[v][k] = _state_otoc(Wt, L, state, v)
    meta = {"method": "exact", "w": w, "site": site, "state": state, "L": L, "chi": None, "dt": None,
            "order": None, "cutoff": None,
            "note": "dense exact evolution; discarded_weight = 0, max_bond = -1 (not computed)"}
    return OtocResult(times=ts, weights=weights, right_weight=right, discarded_weight=np.zeros(n_t),
                      max_bond=np.full(n_t, -1, dtype=int), state_otoc=sotoc, meta=meta)


def eigenstate_otoc(chain: Chain, w: str = "Z", site=0, v: str = "Z", times: Sequence[float] = (1.0,)
                    ) -> tuple[np.ndarray, np.ndarray]:
    """Eigenstate-resolved OTOCs C_n(r, t) = 1 - Re <n| W(t) V_r W(t) V_r |n> over all eigenstates (L <= 12).

    Parameters
    ----------
    chain : Chain
        The model, L <= 12.
    w, v : {'X', 'Y', 'Z'}
        The evolved operator W and the probe V.
    site : int or 'center'
        Site of W.
    times : sequence of float
        Strictly increasing times >= 0 (units 1/J).

    Returns
    -------
    energies : ndarray (2^L,)
        Eigenvalues of H, ascending.
    C : ndarray (n_t, 2^L, L)
        C[k, n, r]. The mean over n is the infinite-temperature C(r, t). Inside degenerate eigenspaces the
        eigenvectors (and hence the individual C_n) are those returned by ``numpy.linalg.eigh``.

    Notes
    -----
    Works in the eigenbasis: W(t) -> Phi * W_eig, V_r -> V^dag V_r V; one 2^L x 2^L product per (time, site).
    """
    chain, w, site, ts = _check_request(chain, "eigenstate_otoc", MAX_DENSE_L, w, site, times)
    L = chain.L
    v = check_probe(v)
    spec = _Spectrum(chain)
    W_eig = spec.to_eigenbasis(w, site)
    A = [spec.phases(float(t)) * W_eig for t in ts]
    C = np.empty((ts.size, spec.energies.size, L))
    for r in range(L):
        Br = spec.to_eigenbasis(v, r)
        for k in range(ts.size):
            M = A[k] @ Br
            C[k, :, r] = 1.0 - np.einsum("nm,mn->n", M, M).real
    return spec.energies, C


# --------------------------------------------------------------------------------------------- free fermions
def _single_particle(chain: Chain) -> tuple[np.ndarray, np.ndarray]:
    """Bond single-particle matrices (L-1, 2, 2) [[ls h_b, J_b/2], [J_b/2, rs h_{b+1}]] and the full h_sp."""
    h = np.asarray(chain.fields, dtype=float)
    J = np.asarray(chain.couplings, dtype=float)
    ls, rs = chain.site_share()
    hb = np.empty((chain.L - 1, 2, 2))
    hb[:, 0, 0] = ls * h[:-1]
    hb[:, 1, 1] = rs * h[1:]
    hb[:, 0, 1] = hb[:, 1, 0] = J / 2.0
    hsp = np.diag(h) + np.diag(J / 2.0, 1) + np.diag(J / 2.0, -1)
    return hb, hsp


def _layer_propagator(hb: np.ndarray, parity: int, d: float, L: int) -> np.ndarray:
    """exp(-i d sum_{b of this parity} h_b) as an L x L matrix (a direct sum of 2x2 blocks)."""
    g = np.eye(L, dtype=complex)
    e, u = np.linalg.eigh(hb[parity::2])
    blocks = np.einsum("kij,kj,klj->kil", u, np.exp(-1j * d * e), u)
    for k, b in enumerate(range(parity, L - 1, 2)):
        g[b:b + 2, b:b + 2] = blocks[k]
    return g


def free_fermion_otoc(chain: Chain, site=0, times: Sequence[float] = (1.0,), dt: float | None = None,
                      order: int = 2, chunk: int | None = None) -> np.ndarray:
    """Closed-form C_ZZ(r, t) of the XX chain (delta = 0) with any fields and couplings, at any L.

    By Jordan-Wigner the chain is free fermions with hopping J_b / 2 and on-site energy h_i; with
    G = exp(-i h_sp t) (h_sp: diagonal h_i, off-diagonal J_b / 2),

        C_ZZ(r, t) = 4 |G_{ir}|^2 (1 - |G_{ir}|^2),   i = site

    (derived from Wick's theorem for the Jordan-Wigner fermions; consistent with Lin & Motrunich, PRB 98, 134305
    (2018); also at r = i). With ``dt`` given, G is instead the product of the
    single-particle bond exponentials of exactly the engine's Trotter schedule
    (:func:`mpo_fronts.schedules.step_plan`, :func:`mpo_fronts.schedules.block_layers`, one-site terms shared as in
    ``chain.site_share()``), so the result equals an untruncated :func:`mpo_fronts.evolve_otoc` with the same
    dt, order and chunk: the difference to the engine isolates its truncation error.

    Parameters
    ----------
    chain : Chain
        An ``xxz_chain`` with delta = 0.
    site : int or 'center'
        Site of W = Z.
    times : sequence of float
        Strictly increasing times >= 0 (units 1/J).
    dt : float, optional
        None for the exact evolution; else the engine's largest Trotter step.
    order : {2, 4}
        Trotter order (with ``dt``).
    chunk : int, optional
        Steps per block as in the engine (default ``mpo_fronts.evolve.DEFAULT_CHUNK``).

    Returns
    -------
    ndarray (n_t, L)
        C_ZZ(r, t) at infinite temperature.

    Examples
    --------
    >>> import mpo_fronts as mf
    >>> C = free_fermion_otoc(mf.xxz_chain(40, delta=0.0), site=20, times=[1.0])
    >>> from scipy.special import jv  # infinite clean XX chain: |G_{i,i+1}|^2 = J_1(t)^2
    >>> bool(abs(C[0, 21] - 4 * jv(1, 1.0) ** 2 * (1 - jv(1, 1.0) ** 2)) < 1e-12)
    True
    """
    chain = _check_chain(chain, "free_fermion_otoc")
    if chain.kind != "xxz" or chain.params.get("delta") != 0.0:
        raise InputError("free_fermion_otoc needs an XX chain: xxz_chain(..., delta=0.0) "
                         f"(got kind={chain.kind!r}, delta={chain.params.get('delta')!r})")
    L = chain.L
    site = check_site(site, L)
    ts = _check_times(times)
    hb, hsp = _single_particle(chain)
    rows = np.empty((ts.size, L))
    if dt is None:
        e, u = np.linalg.eigh(hsp)
        for k, t in enumerate(ts):
            rows[k] = np.abs((u[site] * np.exp(-1j * e * t)) @ u.T) ** 2
    else:
        if order not in ORDERS:
            raise InputError(f"order must be 2 or 4 (Trotter order), got {order!r}")
        plan = step_plan(ts, dt, chunk or DEFAULT_CHUNK)
        row = np.zeros(L, dtype=complex)
        row[site] = 1.0  # row `site` of G = g_1 g_2 ... g_n (layers in the order the engine applies them)
        cache: dict[tuple[int, float], np.ndarray] = {}
        for i, (k, n, tau) in enumerate(plan):
            for parity, d in (block_layers(order, n, tau) if n else []):
                key = (parity, round(d, 14))
                if key not in cache:
                    cache[key] = _layer_propagator(hb, parity, d, L)
                row = row @ cache[key]
            if i + 1 == len(plan) or plan[i + 1][0] != k:
                rows[k] = np.abs(row) ** 2
    return 4.0 * rows * (1.0 - rows)


# --------------------------------------------------------------------------------------------- typicality
#: Largest chain length for the sparse typicality reference (memory: ~ (L + 2) * 2^L nonzeros of H).
MAX_SPARSE_L = 24


def sparse_hamiltonian(chain: Chain):
    """The chain Hamiltonian as a ``scipy.sparse.csr_array`` (2^L x 2^L), built directly in sparse form.

    Real (float64) when every bond term is real, else complex. Site 0 is the most significant bit of the
    state index, as in ``chain.dense_hamiltonian()``. Never forms a dense 2^L x 2^L matrix.
    """
    import scipy.sparse as sp

    chain = _check_chain(chain, "sparse_hamiltonian", MAX_SPARSE_L)
    L = chain.L
    dim = 2**L
    hb = chain.bond_hamiltonians()
    real = np.abs(hb.imag).max() == 0.0
    hb = hb.real if real else hb
    n = np.arange(dim, dtype=np.int64)
    diag = np.zeros(dim, dtype=hb.dtype)
    rows, cols, vals = [], [], []
    for b in range(L - 1):
        shift = L - 2 - b  # bit position of site b + 1; site b is one above
        pair = (n >> shift) & 3  # two-site index s_b * 2 + s_{b+1}
        diag += hb[b][pair, pair]
        for a in range(4):
            src = n[pair == a]
            for a2 in range(4):
                val = hb[b][a2, a]
                if a2 == a or val == 0:
                    continue
                rows.append((src + ((a2 - a) << shift)).astype(np.int32 if dim < 2**31 else np.int64))
                cols.append(src.astype(rows[-1].dtype))
                vals.append(np.full(src.size, val))
    rows.append(n.astype(rows[0].dtype if rows else np.int64))
    cols.append(rows[-1])
    vals.append(diag)
    H = sp.coo_array((np.concatenate(vals), (np.concatenate(rows), np.concatenate(cols))), shape=(dim, dim))
    return H.tocsr()


class TypicalityResult:
    """OTOCs estimated with random states (or computed for one basis state) by sparse Krylov evolution.

    Attributes
    ----------
    times : ndarray (n_t,)
    sites : ndarray (n_r,), int
        Probe sites r.
    otoc : ndarray (n_t, n_r)
        Mean over the random states of C_psi(r, t) = 1 - Re <psi|W(t) V_r W(t) V_r|psi>.
    stderr : ndarray (n_t, n_r)
        Standard error of the mean over states (NaN for a single state, zeros for a basis state).
    samples : ndarray (n_states, n_t, n_r)
        The individual estimates.
    expected_error : float
        Typical statistical error of one Haar-random state, 1 / sqrt(2^L + 1) (W V W V is unitary), divided by
        sqrt(n_states); zero for a basis state.
    meta : dict
        method ("typicality" or "sparse_state"), w, site, v, L, n_states, seed, state.
    """

    def __init__(self, times, sites, samples, expected_error, meta):
        self.times = np.asarray(times, dtype=float)
        self.sites = np.asarray(sites, dtype=int)
        self.samples = samples
        self.otoc = samples.mean(axis=0)
        n = samples.shape[0]
        self.stderr = (samples.std(axis=0, ddof=1) / np.sqrt(n) if n > 1
                       else np.zeros_like(self.otoc) if meta.get("state") else np.full_like(self.otoc, np.nan))
        self.expected_error = float(expected_error)
        self.meta = meta

    def __repr__(self) -> str:
        return (f"TypicalityResult(L={self.meta['L']}, n_states={self.samples.shape[0]}, "
                f"n_t={self.times.size}, sites={self.sites.tolist()})")


def _evolver(H):
    """Functions e^{-iHt} X and e^{+iHt} X on blocks of vectors, by scipy's expm_multiply (Al-Mohy-Higham)."""
    from scipy.sparse.linalg import expm_multiply

    A = (-1j * H).tocsr()
    traceA = complex(A.trace())
    Aback = None if np.isrealobj(H.data) else (1j * H).tocsr()

    # One call per interval on the rescaled matrix (t A): scipy's single-time algorithm, which chooses its
    # Taylor degree and number of sub-steps once per call (its interval mode would choose them twice here).
    def forward(X, t):
        if t == 0:
            return X
        return expm_multiply(A * t, X, traceA=traceA * t)

    def backward(X, t):
        if t == 0:
            return X
        if Aback is None:  # real H: e^{iHt} X = conj(e^{-iHt} conj(X))
            return forward(X.conj(), t).conj()
        return expm_multiply(Aback * t, X, traceA=-traceA * t)

    return forward, backward


def _sparse_otoc(forward, backward, psi, L, w, site, v, sites, ts, block):
    """C_psi(r, t) for one normalised state psi, probe sites in blocks of ``block`` columns."""
    out = np.empty((ts.size, len(sites)))
    for j0 in range(0, len(sites), block):
        part = sites[j0:j0 + block]
        X = np.empty((psi.size, 1 + len(part)), dtype=complex)
        X[:, 0] = psi
        for j, r in enumerate(part):
            X[:, 1 + j] = apply_pauli(psi, v, r, L)
        t_prev = 0.0
        for k, t in enumerate(ts):
            X = forward(X, float(t) - t_prev)  # e^{-iHt} [psi, V_r psi]
            t_prev = float(t)
            Z = backward(apply_pauli(X, w, site, L), float(t))  # W(t) [psi, V_r psi]
            for j, r in enumerate(part):  # <psi| W(t) V_r W(t) V_r |psi> = <W(t) psi| V_r |W(t) V_r psi>
                out[k, j0 + j] = 1.0 - np.vdot(Z[:, 0], apply_pauli(Z[:, 1 + j], v, r, L)).real
    return out


def typicality_otoc(chain: Chain, w: str = "Z", site=0, v: str = "Z", times: Sequence[float] = (1.0,),
                    seed=None, n_states: int = 1, probe_sites: Sequence[int] | None = None,
                    state: str | None = None, block: int | None = None) -> TypicalityResult:
    """Infinite-temperature OTOCs by dynamical typicality with sparse Krylov evolution (L up to ~22-24).

    For a Haar-random state |psi> (normalised complex Gaussian vector),
    <psi| W(t) V_r W(t) V_r |psi> = Tr[W(t) V_r W(t) V_r] / 2^L + O(2^(-L/2)), so
    C_psi(r, t) = 1 - Re <psi|W(t) V_r W(t) V_r|psi> estimates C(r, t) with a statistical error of about
    1 / sqrt(2^L + 1) per state. The vectors [psi, V_r psi] are evolved forward to each requested time
    incrementally, W is applied, and the results are evolved back to t = 0 (``scipy.sparse.linalg.expm_multiply``
    on the sparse H of :func:`sparse_hamiltonian`; nothing dense of size 4^L is formed).

    Parameters
    ----------
    chain : Chain
        The model (L <= 24; memory grows as 2^L: L = 22 needs a few GB).
    w, v : {'X', 'Y', 'Z'}
        Evolved operator W (at ``site``) and probe V.
    site : int or 'center'
        Site of W.
    times : sequence of float
        Strictly increasing times >= 0 (units 1/J). Cost grows with max(times) + sum(times).
    seed : int, SeedSequence or Generator, optional
        Seed of the random states (``numpy.random.default_rng(seed)``).
    n_states : int
        Number of independent random states averaged (the error falls as 1 / sqrt(n_states)).
    probe_sites : sequence of int, optional
        Probe sites r (default: all sites). Cost grows linearly with their number.
    state : str, optional
        Instead of random states, one basis state ('0' = spin up): the product-state OTOC
        C_s(r, t) = 1 - Re <s|W(t) V_r W(t) V_r|s>, exact up to the Krylov tolerance (n_states, seed ignored).
    block : int, optional
        Probe sites evolved together as one block of vectors (default: all, up to ~1 GB of vectors).

    Returns
    -------
    TypicalityResult
        ``.otoc`` (n_t, n_r), ``.stderr``, ``.samples``, ``.expected_error``, ``.sites``, ``.meta``.

    Examples
    --------
    >>> import mpo_fronts as mf
    >>> res = typicality_otoc(mf.xxz_chain(8, W=1.0, seed=2), w="Z", site=0, v="Z", times=[1.0], seed=1)
    >>> res.otoc.shape
    (1, 8)
    """
    chain, w, site, ts = _check_request(chain, "typicality_otoc", MAX_SPARSE_L, w, site, times)
    L = chain.L
    v = check_probe(v)
    if isinstance(n_states, bool) or not isinstance(n_states, (int, np.integer)) or n_states < 1:
        raise InputError(f"n_states (number of random states) must be a positive integer, got {n_states!r}")
    if probe_sites is None:
        sites = list(range(L))
    else:
        try:
            sites = [check_site(int(r) if not isinstance(r, str) else r, L) for r in probe_sites]
        except (TypeError, ValueError):
            raise InputError(f"probe_sites must be a list of integers in 0..{L - 1}, got {probe_sites!r}") from None
        if not sites:
            raise InputError("probe_sites must name at least one site")
    if state is not None:
        state = check_bits(state, L)
    dim = 2**L
    if block is None:
        block = max(1, min(len(sites), int(2**30 // (16 * dim)) - 1))
    elif isinstance(block, bool) or not isinstance(block, (int, np.integer)) or block < 1:
        raise InputError(f"block must be a positive integer, got {block!r}")
    forward, backward = _evolver(sparse_hamiltonian(chain))
    if state is not None:
        psis = [np.zeros(dim, dtype=complex)]
        psis[0][int(state, 2)] = 1.0
        expected = 0.0
    else:
        rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
        psis = []
        for _ in range(n_states):
            psi = rng.standard_normal(dim) + 1j * rng.standard_normal(dim)
            psis.append(psi / np.linalg.norm(psi))
        expected = 1.0 / np.sqrt((dim + 1) * n_states)
    samples = np.stack([_sparse_otoc(forward, backward, psi, L, w, site, v, sites, ts, int(block))
                        for psi in psis])
    meta = {"method": "sparse_state" if state is not None else "typicality", "w": w, "site": site, "v": v,
            "L": L, "n_states": len(psis), "state": state,
            "seed": seed if isinstance(seed, (int, type(None))) else repr(seed),
            "evolution": "scipy.sparse.linalg.expm_multiply"}
    return TypicalityResult(ts, sites, samples, expected, meta)
