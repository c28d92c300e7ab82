"""Exact OTOC references beyond dense ED: evolution in the sectors of total S^z, and the reference-file format.

Conventions as in the rest of the package (README, "Conventions"): spin-1/2 chain, sites 0..L-1, basis
|0> = spin up (Z = +1), site 0 is the most significant bit of a basis-state index, hbar = 1, time in units of
1/J, W(t) = e^{iHt} W e^{-iHt}, and

    C(r, t) = 1 - Re Tr[W(t) V_r W(t) V_r] / 2^L          (infinite temperature)

for W = Z at ``site`` and a Pauli probe V in {X, Y, Z} at r, exactly as :func:`mpo_fronts.exact.exact_otoc`
(same single-site Pauli weights, same normalisation, same array layout), but for chains that conserve total
S^z (``Chain.conserves_sz``: the XXZ and random-field Heisenberg chains) at L up to 14 on a small machine.

* :class:`SectorSpectrum` diagonalises H block by block in the L + 1 sectors of total S^z.
* :func:`sector_otoc` / :func:`sector_otocs` evolve W = Z exactly in every sector and read out the
  single-site Pauli weights p_r(a) of W(t), hence C(r, t) for every probe site r and every probe V.
* :func:`reference_arrays` / :func:`reference_from_arrays` encode and decode one reference curve as a flat
  dict of numpy arrays plus JSON metadata (the ``.npz`` files under ``data/references/``); the file is read and
  written by ``scripts/references.py`` (``load_reference``), since this module opens no files.

How the sector evolution works
------------------------------
H is block-diagonal in the sectors m = number of up spins (sizes binom(L, m)), and Z_i = 2 Pi - 1 with Pi the
projector on the basis states whose site i is up (or Z_i = 1 - 2 Pi with Pi on the down states; the smaller
of the two sets is used in each sector). Within a sector, with U = e^{-iHt} = V e^{-iEt} V^T from the
eigendecomposition of the block,

    P(t) = U^dag Pi U = Y^dag Y,    Y = U[S, :]   (the rows of U on the |S| states of Pi),

so W(t) = +-(2 P(t) - 1) sector by sector. For V = Z the readout is a sum of positive terms,
C_Z(r, t) = (2 / 2^L) sum over (a, b) with site r up in a and down in b of |W_ab(t)|^2 (times 2 for the two
orders), which keeps its relative accuracy far ahead of the front (no 1 - (1 - C) cancellation). For V = X, Y
the I/Z split of site r pairs sector m with sector m - 1 (flipping site r); it is also computed as a sum of
squares, ||T_00 - T_11||^2 with T_ij the blocks of W whose site-r row/column states are i/j. X and Y weights are
equal (W = Z conserves S^z), so C_X = C_Y.

Why eigendecomposition (``scipy.linalg.eigh`` of each sector block) rather than Krylov
(``scipy.sparse.linalg.expm_multiply``): the readout needs the whole operator P(t) (|S| x n columns of U and
an n x n product Y^dag Y per time), which costs O(n^3) per time either way, and the eigendecomposition makes
U(t) exact to rounding at any time for the same price, while a Krylov propagation costs in proportion to the
total time (t up to 10^3 for the localized chain at W = 6 would need ~10^5 sparse products per sector). One
eigendecomposition per sector is shared by all times and all sites of W.

Cost (one BLAS thread): per time, about 2 n^3 flops per sector for U (real symmetric products, see
``_symmetric_product``) plus 4 |S| n^2 <= 2 n^3 per sector and site for P; L = 12: ~7e9 flops per
(time, site), L = 14: ~2.5e11; the largest sector of L = 16 (n = 12870) would need ~1e13 per time, which is
out of reach here. Memory: a few n x n float64 matrices of the largest sector (L = 14: n = 3432, ~0.1 GB each).
"""

from __future__ import annotations

import json
from typing import Any, Mapping, Sequence

import numpy as np

from .conventions import CONVENTIONS, PROBES, __version__
from .errors import InputError
from .evolve import check_site, check_w
from .models import Chain
from .readout import OtocResult
from .schedules import check_times

__all__ = ["SectorSpectrum", "sector_otoc", "sector_otocs", "sector_blocks", "reference_arrays",
           "reference_from_arrays", "typicality_error_bound", "MAX_SECTOR_L", "REFERENCE_FORMAT"]

#: Largest L accepted by the sector references (memory: all sector eigenvector blocks, binom(2L, L) float64).
MAX_SECTOR_L = 16

#: Format tag written into every reference file's metadata (bump when the keys change).
REFERENCE_FORMAT = "mpo_fronts-reference-1"


# --------------------------------------------------------------------------------------------- sectors
def _check_u1_chain(chain, what: str) -> Chain:
    if not isinstance(chain, Chain):
        raise InputError(f"chain must be a Chain (xxz_chain for the sector references), got {type(chain).__name__}",
                         arg="chain")
    if not chain.conserves_sz:
        raise InputError(f"{what}: chain (kind {chain.kind!r}) does not conserve total S^z, so its Hamiltonian "
                         f"has no S^z sectors; use an xxz_chain, or exact_otoc (L <= 12) / typicality_otoc for "
                         f"other chains", arg="chain")
    if chain.L > MAX_SECTOR_L:
        raise InputError(f"{what}: L = {chain.L} is too large for the sector references (L <= {MAX_SECTOR_L}; "
                         f"L = 14 takes minutes per time point); use typicality_otoc or the MPO engine",
                         arg="chain")
    return chain


def _popcount(x: np.ndarray) -> np.ndarray:
    c = np.zeros(x.shape, dtype=np.int64)
    y = x.copy()
    while np.any(y):
        c += y & 1
        y >>= 1
    return c


def sector_blocks(chain: Chain) -> tuple[list[np.ndarray], list[np.ndarray]]:
    """The Hamiltonian of a chain that conserves total S^z, block by block.

    Parameters
    ----------
    chain : Chain
        With ``conserves_sz`` (``xxz_chain``), L <= ``MAX_SECTOR_L``.

    Returns
    -------
    states : list of ndarray (int64)
        ``states[m]``: the basis-state indices (site 0 = most significant bit, bit 0 = spin up) with m spins
        up, ascending, m = 0..L.
    blocks : list of ndarray
        ``blocks[m]``: the dense block <a|H|b> for a, b in ``states[m]`` (float64 when H is real, else
        complex128). Built from ``chain.bond_hamiltonians()``, whose sum is H.

    Raises
    ------
    InputError
        If the chain is not flagged ``conserves_sz``, or a bond term connects different sectors.
    """
    chain = _check_u1_chain(chain, "sector_blocks")
    L = chain.L
    hb = chain.bond_hamiltonians()
    real = not np.any(hb.imag)
    hb = hb.real if real else hb
    ups_of_pair = np.array([2, 1, 1, 0])  # two-site index 2 s_b + s_{b+1}, s = 0 (up) / 1 (down)
    leak = [(b, a2, a) for b in range(L - 1) for a in range(4) for a2 in range(4)
            if hb[b][a2, a] != 0 and ups_of_pair[a2] != ups_of_pair[a]]
    if leak:
        b, a2, a = leak[0]
        raise InputError(f"chain is flagged conserves_sz but bond {b} connects two-site states {a} -> {a2} with "
                         f"different S^z (|{hb[b][a2, a]:.3g}| > 0); build it with conserves_sz=False",
                         arg="chain")
    n_all = np.arange(2**L, dtype=np.int64)
    ups = L - _popcount(n_all)
    states = [n_all[ups == m] for m in range(L + 1)]
    pos = np.empty(2**L, dtype=np.int64)
    for st in states:
        pos[st] = np.arange(st.size)
    blocks = []
    for st in states:
        H = np.zeros((st.size, st.size), dtype=hb.dtype)
        cols_all = np.arange(st.size)
        for b in range(L - 1):
            shift = L - 2 - b  # bit position of site b + 1; site b is the bit above it
            pair = (st >> shift) & 3
            for a in range(4):
                sel = pair == a
                if not np.any(sel):
                    continue
                cols = cols_all[sel]
                for a2 in range(4):
                    val = hb[b][a2, a]
                    if val != 0:
                        H[pos[st[sel] + ((a2 - a) << shift)], cols] += val
        blocks.append(H)
    return states, blocks


class SectorSpectrum:
    """Eigendecomposition of H in every sector of total S^z (``scipy.linalg.eigh`` per block).

    Build it once per chain and pass it to :func:`sector_otoc` / :func:`sector_otocs` for several sites or time
    grids; the eigendecomposition dominates the set-up (L = 14: the n = 3432 block takes ~15 s here).

    Attributes
    ----------
    L : int
    states : list of ndarray
        Basis-state indices of each sector m (m spins up), as in :func:`sector_blocks`.
    energies : list of ndarray
        Eigenvalues of each block, ascending.
    vecs : list of ndarray
        Eigenvectors (columns) of each block; real when H is real.
    real : bool
        True when every block is real symmetric (the XXZ chain).
    """

    def __init__(self, chain: Chain):
        import scipy.linalg as sla

        self.states, blocks = sector_blocks(chain)
        self.L = chain.L
        self.energies, self.vecs = [], []
        for H in blocks:
            e, v = sla.eigh(H, overwrite_a=True, check_finite=False)
            self.energies.append(e)
            self.vecs.append(np.asfortranarray(v))
        self.real = all(np.isrealobj(v) for v in self.vecs)

    @property
    def sizes(self) -> list[int]:
        return [s.size for s in self.states]

    def __repr__(self) -> str:
        return f"SectorSpectrum(L={self.L}, largest sector {max(self.sizes)})"


def _symmetric_product(V: np.ndarray, f: np.ndarray) -> np.ndarray:
    """V diag(f) V^dag for real f, as two rank-k updates (syrk/herk): n^3 flops instead of 2 n^3 for a gemm."""
    from scipy.linalg import blas

    n = V.shape[0]
    real = np.isrealobj(V)
    rk = blas.dsyrk if real else blas.zherk
    out = np.zeros((n, n), dtype=V.dtype)
    for sign in (1.0, -1.0):
        sel = sign * f > 0
        if not np.any(sel):
            continue
        B = np.asfortranarray(V[:, sel] * np.sqrt(sign * f[sel]))
        out += sign * rk(1.0, B, trans=0, lower=0)  # upper triangle of B B^dag
    diag = np.diagonal(out).copy()
    out = out + (out.conj().T if not real else out.T)
    np.fill_diagonal(out, diag)  # (the diagonal was added twice)
    return out


def _site_mask(states: np.ndarray, site: int, L: int) -> np.ndarray:
    """True where site ``site`` is down (bit 1) in each of ``states``."""
    return ((states >> (L - 1 - site)) & 1).astype(bool)


class _Readout:
    """Accumulates the single-site Pauli weights of W(t) = Z_i(t) over the sectors, in ascending m."""

    def __init__(self, spec: SectorSpectrum, need_iz: bool):
        self.spec = spec
        self.L = spec.L
        self.need_iz = need_iz
        L = self.L
        # per sector: down-indicator matrix (n, L) and, for the I/Z split, the pairs (m, m - 1) flipping site r
        self.down = [np.stack([_site_mask(st, r, L) for r in range(L)], axis=1).astype(float)
                     for st in spec.states]
        self.pairs = []
        pos = np.empty(2**L, dtype=np.int64)
        for st in spec.states:
            pos[st] = np.arange(st.size)
        for m, st in enumerate(spec.states):
            row = []
            for r in range(L):
                up = np.flatnonzero(~_site_mask(st, r, L)) if m >= 1 else np.empty(0, dtype=np.int64)
                row.append((up, pos[st[up] + (1 << (L - 1 - r))]))  # partner: site r flipped to down, sector m-1
            self.pairs.append(row)

    def start(self) -> None:
        L = self.L
        self.total = 0.0
        self.off = np.zeros(L)  # ||T_01||^2 + ||T_10||^2 (site-r letters X, Y)
        self.pz = np.zeros(L)  # ||T_00 - T_11||^2 (site-r letter Z)
        self.prev: np.ndarray | None = None

    def add(self, m: int, Wm: np.ndarray) -> None:
        A = Wm.real**2 + Wm.imag**2 if np.iscomplexobj(Wm) else Wm**2
        self.total += float(A.sum())
        D = self.down[m]
        AD = A @ D  # AD[a, r] = sum_b A_ab [site r down in b]
        self.off += 2.0 * np.einsum("ar,ar->r", 1.0 - D, AD)
        if self.need_iz:
            for r, (up, partner) in enumerate(self.pairs[m]):
                if up.size == 0:
                    continue
                X = Wm[np.ix_(up, up)] - self.prev[np.ix_(partner, partner)]
                self.pz[r] += np.vdot(X, X).real
        self.prev = Wm

    def weights(self) -> np.ndarray:
        """p_r(a), a = (I, X, Y, Z), rows summing to 1 (NaN for I and Z when the I/Z split was skipped)."""
        diag = self.total - self.off
        pz = self.pz if self.need_iz else np.full(self.L, np.nan)
        p = np.stack([2 * diag - pz, self.off, self.off, pz], axis=1)
        return p / (2.0 * self.total)


def sector_otocs(chain: Chain, sites: Sequence, times: Sequence[float] = (1.0,), w: str = "Z",
                 spectrum: SectorSpectrum | None = None, probes: Sequence[str] = PROBES) -> list[OtocResult]:
    """Exact infinite-temperature OTOCs of W = Z at several sites, by evolution in the S^z sectors.

    One eigendecomposition of every sector block and one propagator U(t) per time are shared by all sites.

    Parameters
    ----------
    chain : Chain
        A chain that conserves total S^z (``xxz_chain``), L <= 16 (L = 14: minutes per time point).
    sites : sequence of int or 'center'
        Sites of W.
    times : sequence of float
        Strictly increasing times >= 0 (units 1/J); any spacing and any size cost the same per point.
    w : {'Z'}
        The evolved operator; only W = Z keeps W(t) block-diagonal in the sectors.
    spectrum : SectorSpectrum, optional
        A precomputed ``SectorSpectrum(chain)`` (of this chain) to reuse.
    probes : sequence of {'X', 'Y', 'Z'}
        Probes that will be read out. With only 'Z' the I/Z split of the site weights is skipped (the weights
        of I and Z are then NaN, so only ``.otoc('Z')`` is available) and the readout is cheaper.

    Returns
    -------
    list of OtocResult
        One per site, in the layout of :func:`mpo_fronts.exact.exact_otoc`: ``weights`` (n_t, L, 4) single-site
        Pauli weights (I, X, Y, Z), ``.otoc(v)`` (n_t, L); ``discarded_weight`` zeros, ``max_bond`` -1 (not
        computed). ``right_weight`` is NaN (the right-weight profile mixes sectors and is not computed here).
        ``meta["method"] == "sector_exact"``.

    Raises
    ------
    InputError
        For w other than 'Z' (argument ``w``), a chain without S^z conservation or too long (``chain``), bad
        sites or times.
    """
    w = check_w(w)
    if w != "Z":
        raise InputError(f"w = {w!r} is not supported by the sector references: W = X or Y moves between S^z "
                         f"sectors, so W(t) is not block-diagonal; use w='Z' here, or exact_otoc (L <= 12) / "
                         f"typicality_otoc for w = {w!r}", arg="w")
    chain = _check_u1_chain(chain, "sector_otocs")
    L = chain.L
    if isinstance(sites, (str, int, np.integer)):
        sites = [sites]
    site_list = [check_site(s, L) for s in sites]
    if not site_list:
        raise InputError("sites must name at least one site of W", arg="sites")
    ts = check_times(times)
    try:
        probe_set = {str(v).upper() for v in probes}
    except TypeError:
        raise InputError(f"probes must be a sequence of 'X', 'Y', 'Z', got {probes!r}", arg="probes") from None
    if not probe_set or probe_set - set(PROBES):
        raise InputError(f"probes must be a non-empty sequence of 'X', 'Y', 'Z', got {probes!r}", arg="probes")
    if spectrum is None:
        spectrum = SectorSpectrum(chain)
    elif not isinstance(spectrum, SectorSpectrum) or spectrum.L != L:
        raise InputError("spectrum must be SectorSpectrum(chain) of this chain (same L)", arg="spectrum")
    from scipy.linalg import blas

    spec = spectrum
    need_iz = bool(probe_set - {"Z"})
    readers = [_Readout(spec, need_iz) for _ in site_list]
    # per sector and site: the rows S (the smaller of site-i-up / site-i-down) and the sign of Z_i = s (2 Pi - 1)
    rows = []
    for st in spec.states:
        per_site = []
        for i in site_list:
            down = _site_mask(st, i, L)
            if down.sum() <= st.size - down.sum():
                per_site.append((np.flatnonzero(down), -1.0))
            else:
                per_site.append((np.flatnonzero(~down), 1.0))
        rows.append(per_site)
    n_t = ts.size
    weights = np.empty((len(site_list), n_t, L, 4))
    for k, t in enumerate(ts):
        for rd in readers:
            rd.start()
        for m in range(L + 1):
            V, E = spec.vecs[m], spec.energies[m]
            n = E.size
            Ur = _symmetric_product(V, np.cos(E * t))  # U = V e^{-iEt} V^dag = Ur - i Us
            Us = _symmetric_product(V, np.sin(E * t))
            for j, rd in enumerate(readers):
                S, sign = rows[m][j]
                if S.size == 0:
                    Wm = np.eye(n) * (-sign)  # Pi = 0: W = -s 1 in this sector
                elif spec.real:
                    Yr, Yi = Ur[S], -Us[S]  # Y = U[S, :] = Yr + i Yi
                    Ystack = np.vstack([Yr, Yi])
                    Pr = blas.dsyrk(1.0, Ystack.T, trans=0, lower=0)  # upper triangle of Yr^T Yr + Yi^T Yi
                    Pr = np.triu(Pr) + np.triu(Pr, 1).T
                    G = Yr.T @ Yi
                    Wm = (2.0 * sign) * (Pr + 1j * (G - G.T))
                    Wm[np.diag_indices(n)] -= sign
                else:
                    Y = (Ur - 1j * Us)[S]
                    Wm = (2.0 * sign) * (Y.conj().T @ Y)
                    Wm[np.diag_indices(n)] -= sign
                rd.add(m, Wm)
        for j, rd in enumerate(readers):
            weights[j, k] = rd.weights()
    out = []
    for j, i in enumerate(site_list):
        meta = {"method": "sector_exact", "w": w, "site": i, "state": None, "L": L, "chi": None, "dt": None,
                "order": None, "cutoff": None, "probes": sorted(probe_set),
                "evolution": "scipy.linalg.eigh of each S^z sector block; W(t) = +-(2 U^dag Pi U - 1)",
                "note": "exact evolution in the S^z sectors; discarded_weight = 0, max_bond = -1 (not "
                        "computed), right_weight = NaN (not computed)"}
        out.append(OtocResult(times=ts.copy(), weights=weights[j], right_weight=np.full((n_t, L), np.nan),
                              discarded_weight=np.zeros(n_t), max_bond=np.full(n_t, -1, dtype=int), meta=meta))
    return out


def sector_otoc(chain: Chain, w: str = "Z", site=0, times: Sequence[float] = (1.0,),
                spectrum: SectorSpectrum | None = None, probes: Sequence[str] = PROBES) -> OtocResult:
    """Exact infinite-temperature OTOCs of W = Z for a chain that conserves total S^z (L <= 16).

    C(r, t) = 1 - Re Tr[W(t) V_r W(t) V_r] / 2^L with the conventions and output layout of
    :func:`mpo_fronts.exact.exact_otoc` (compare ``.weights`` or ``.otoc(v)`` array to array), computed by
    exact evolution in the sectors of total S^z (see the module notes); no truncation, no Trotter error.

    Parameters
    ----------
    chain : Chain
        ``xxz_chain`` (random-field Heisenberg, XXZ), L <= 16 (L = 14: minutes per time point).
    w : {'Z'}
        The evolved operator (only Z is supported: X and Y leave the sectors).
    site : int or 'center'
        Site of W.
    times : sequence of float
        Strictly increasing times >= 0 (units 1/J).
    spectrum : SectorSpectrum, optional
        Reuse a precomputed ``SectorSpectrum(chain)``.
    probes : sequence of {'X', 'Y', 'Z'}
        Probes to be read out (``('Z',)`` skips the I/Z split and is cheaper).

    Returns
    -------
    OtocResult
        ``weights`` (n_t, L, 4), ``.otoc(v)`` (n_t, L); ``meta["method"] == "sector_exact"``;
        ``right_weight`` NaN (not computed).

    Examples
    --------
    >>> import mpo_fronts as mf
    >>> res = sector_otoc(mf.xxz_chain(6, W=1.0, seed=1), site=0, times=[0.5, 1.0])
    >>> res.otoc("Z").shape
    (2, 6)
    """
    return sector_otocs(chain, [site], times, w=w, spectrum=spectrum, probes=probes)[0]


# --------------------------------------------------------------------------------------------- typicality error
def typicality_error_bound(C: np.ndarray, L: int, n_states: int) -> np.ndarray:
    """Upper bound on the standard deviation of the typicality estimate of C(r, t), point by point.

    For a Haar-random state |psi> in dimension D = 2^L and any operator O,
    Var <psi|O|psi> = (Tr[O^dag O] / D - |Tr O / D|^2) / (D + 1) (second moment of Haar states, a textbook
    result). With O = W(t) V_r W(t) V_r unitary and Tr O / D = 1 - C real, the variance of the complex estimate
    is C (2 - C) / (D + 1), which bounds the variance of its real part, so the mean of ``n_states``
    independent states has

        std(C_est) <= sqrt(C (2 - C) / ((D + 1) n_states)),

    a relative error of about sqrt(2 / (C D n_states)) for small C (the worst case, at C = 1, is
    :attr:`mpo_fronts.exact.TypicalityResult.expected_error`).

    Parameters
    ----------
    C : array_like
        The OTOC values (exact or estimated; clipped to [0, 2]).
    L : int
        Chain length.
    n_states : int
        Number of independent random states averaged.

    Returns
    -------
    ndarray
        The bound, same shape as ``C``.
    """
    C = np.clip(np.asarray(C, dtype=float), 0.0, 2.0)
    return np.sqrt(C * (2.0 - C) / ((2.0**L + 1.0) * n_states))


# --------------------------------------------------------------------------------------------- file format
def reference_arrays(result, chain: Chain, meta: Mapping[str, Any], probes: Sequence[str] = PROBES
                     ) -> dict[str, np.ndarray]:
    """One reference curve as a flat dict of arrays, ready for ``numpy.savez_compressed``.

    Parameters
    ----------
    result : OtocResult or mpo_fronts.exact.TypicalityResult
        A sector result (all probe sites, weights kept) or a typicality result (one probe, its sites).
    chain : Chain
        The chain it was computed for (its fields and couplings are stored).
    meta : mapping
        Provenance written as JSON: at least ``command`` and ``git_commit``; anything else JSON-serialisable
        (timings, machine, error statement). Model, method, L, w, site and the conventions are added here.
    probes : sequence of str
        Probes to store for an OtocResult (a typicality result stores its own probe).

    Returns
    -------
    dict of ndarray
        Keys (see :func:`reference_from_arrays`): ``times``, ``sites``, ``otoc_<V>`` for each probe V,
        ``stderr_<V>`` and ``samples_<V>`` for typicality, ``weights`` for sector results, ``fields`` and
        ``couplings`` for XXZ chains, ``meta_json``.
    """
    for key in ("command", "git_commit"):
        if key not in meta:
            raise InputError(f"meta must record {key!r} (how the reference was made)", arg="meta")
    out: dict[str, np.ndarray] = {}
    info = dict(meta)
    info.update({"format": REFERENCE_FORMAT, "package_version": __version__, "conventions": CONVENTIONS,
                 "model": {"kind": chain.kind, "L": chain.L, "params": _jsonable(chain.params),
                           "conserves_sz": chain.conserves_sz}})
    if isinstance(result, OtocResult):
        m = result.meta
        out["times"] = np.asarray(result.times, dtype=float)
        out["sites"] = np.arange(result.L)
        out["weights"] = np.asarray(result.weights, dtype=float)
        stored = [str(v).upper() for v in probes]
        for v in stored:
            out[f"otoc_{v}"] = result.otoc(v)
        info.update({"method": m.get("method"), "w": m.get("w"), "site": m.get("site"), "probes": stored,
                     "evolution": m.get("evolution")})
    elif type(result).__name__ == "TypicalityResult":
        m = result.meta
        v = m["v"]
        out["times"] = np.asarray(result.times, dtype=float)
        out["sites"] = np.asarray(result.sites, dtype=int)
        out[f"otoc_{v}"] = np.asarray(result.otoc, dtype=float)
        out[f"stderr_{v}"] = np.asarray(result.stderr, dtype=float)
        out[f"samples_{v}"] = np.asarray(result.samples, dtype=float)
        info.update({"method": m.get("method"), "w": m.get("w"), "site": m.get("site"), "probes": [v],
                     "n_states": int(m.get("n_states")), "seed": m.get("seed"),
                     "expected_error": float(result.expected_error), "evolution": m.get("evolution")})
    else:
        raise InputError(f"result must be an OtocResult or a TypicalityResult, got {type(result).__name__}",
                         arg="result")
    if chain.fields is not None:
        out["fields"] = np.asarray(chain.fields, dtype=float)
    if chain.couplings is not None:
        out["couplings"] = np.asarray(chain.couplings, dtype=float)
    out["meta_json"] = np.array(json.dumps(_jsonable(info), sort_keys=True))
    return out


def reference_from_arrays(arrays: Mapping[str, np.ndarray]) -> dict[str, Any]:
    """Decode the arrays of one reference file (``numpy.load(path)`` of a ``data/references/*.npz``).

    Returns
    -------
    dict
        ``times`` (n_t,) ; ``sites`` (n_r,) probe sites r ; ``otoc`` {V: (n_t, n_r)} C(r, t) for each stored
        probe V ; ``stderr`` {V: (n_t, n_r)} standard error over random states (typicality; empty for exact
        methods) ; ``samples`` {V: (n_states, n_t, n_r)} (typicality) ; ``weights`` (n_t, L, 4) single-site
        Pauli weights (I, X, Y, Z) or None ; ``fields`` (L,) and ``couplings`` (L-1,) or None ; ``meta`` dict:
        ``format``, ``method`` ('sector_exact', 'exact' or 'typicality'), ``model`` {kind, L, params,
        conserves_sz}, ``w``, ``site``, ``probes``, ``command``, ``git_commit``, ``package_version``,
        ``conventions``, ``error`` (a statement of the method's error), and for typicality ``n_states``,
        ``seed``, ``expected_error`` (worst-case statistical error 1 / sqrt((2^L + 1) n_states)); anything else
        the writer recorded (``seconds``, ``machine``, ...).

    Raises
    ------
    InputError
        If the arrays are not a reference of this format.
    """
    keys = set(arrays.keys()) if hasattr(arrays, "keys") else set()
    if not {"meta_json", "times", "sites"} <= keys:
        raise InputError(f"not an mpo_fronts reference (needs meta_json, times, sites; has {sorted(keys)})",
                         arg="arrays")
    meta = json.loads(str(np.asarray(arrays["meta_json"])[()]))
    if meta.get("format") != REFERENCE_FORMAT:
        raise InputError(f"reference format {meta.get('format')!r} is not {REFERENCE_FORMAT!r}", arg="arrays")

    def group(prefix: str) -> dict[str, np.ndarray]:
        return {k[len(prefix):]: np.asarray(arrays[k]) for k in sorted(keys) if k.startswith(prefix)}

    return {"times": np.asarray(arrays["times"]), "sites": np.asarray(arrays["sites"]),
            "otoc": group("otoc_"), "stderr": group("stderr_"), "samples": group("samples_"),
            "weights": np.asarray(arrays["weights"]) if "weights" in keys else None,
            "fields": np.asarray(arrays["fields"]) if "fields" in keys else None,
            "couplings": np.asarray(arrays["couplings"]) if "couplings" in keys else None,
            "meta": meta}


def _jsonable(x):
    if isinstance(x, Mapping):
        return {str(k): _jsonable(v) for k, v in x.items()}
    if isinstance(x, (list, tuple)):
        return [_jsonable(v) for v in x]
    if isinstance(x, np.ndarray):
        return x.tolist()
    if isinstance(x, np.generic):
        return x.item()
    return x
