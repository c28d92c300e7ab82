"""Chain Hamiltonians as lists of two-site terms, and disorder drawn from a seed.

Conventions (see README, "Conventions"): open chain of L spins-1/2, sites 0..L-1, local basis |0> = spin up
(Z = +1), |1> = spin down; two-site matrices act on |s_i s_{i+1}> with site i as the first (most significant)
factor. hbar = 1, time in units of 1/J.

* Disordered XXZ chain, spin-1/2 operators S = sigma/2::

      H = sum_i J_i (S^x_i S^x_{i+1} + S^y_i S^y_{i+1} + delta S^z_i S^z_{i+1}) + sum_i h_i S^z_i

  with h_i uniform in [-W, W] (box disorder), or given explicitly as ``fields``.
* Mixed-field Ising chain in Pauli units: ``H = sum_i J Z_i Z_{i+1} + g sum_i X_i + h sum_i Z_i``.
* A generic nearest-neighbour chain from user-given Hermitian 4x4 two-site and 2x2 one-site terms.

For the Trotter decomposition each one-site term is shared between the bonds that touch its site: weight 1/2
on each bond, weight 1 at the two chain ends (where only one bond touches the site). The sum of the bond
Hamiltonians is exactly H.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from numbers import Integral, Real

import numpy as np

from .conventions import PAULI, SPIN
from .errors import InputError

_I2, _X, _Y, _Z = PAULI

__all__ = ["Chain", "xxz_chain", "mixed_field_ising_chain", "nn_chain", "draw_fields", "PAULI", "SPIN"]


@dataclass(frozen=True, eq=False)
class Chain:
    """A nearest-neighbour spin-1/2 chain.

    Attributes
    ----------
    L : int
        Number of sites.
    bond_terms : ndarray, shape (L-1, 4, 4), complex
        Two-site term on bond (i, i+1), without the one-site terms.
    site_terms : ndarray, shape (L, 2, 2), complex
        One-site terms.
    kind : str
        ``"xxz"``, ``"mixed_field_ising"`` or ``"generic"``.
    params : dict
        The model parameters as given or drawn (J, delta, W, g, h, seed, ...), for output files.
    fields : ndarray or None
        Per-site fields h_i of the XXZ chain (S^z units), as used.
    couplings : ndarray or None
        Per-bond couplings J_i of the XXZ chain, as used.
    conserves_sz : bool
        True when H commutes with total S^z (XXZ); the Pauli-string parity of X/Y letters is then conserved.
    """

    L: int
    bond_terms: np.ndarray
    site_terms: np.ndarray
    kind: str = "generic"
    params: dict = field(default_factory=dict)
    fields: np.ndarray | None = None
    couplings: np.ndarray | None = None
    conserves_sz: bool = False

    def __repr__(self) -> str:
        shown = {k: v for k, v in self.params.items() if k not in ("fields", "couplings")}
        par = ", ".join(f"{k}={v:g}" if isinstance(v, float) else f"{k}={v!r}" for k, v in shown.items())
        extra = ""
        if self.fields is not None and np.size(self.fields):
            h = np.asarray(self.fields, dtype=float)
            extra += f", fields in [{h.min():.3g}, {h.max():.3g}]"
        if self.couplings is not None and np.size(self.couplings):
            j = np.asarray(self.couplings, dtype=float)
            if np.ptp(j):
                extra += f", couplings in [{j.min():.3g}, {j.max():.3g}]"
        return (f"Chain({self.kind}, L={self.L}{', ' + par if par else ''}{extra}"
                f"{', conserves S^z' if self.conserves_sz else ''})")

    __str__ = __repr__

    def site_share(self) -> tuple[np.ndarray, np.ndarray]:
        """Weights with which bond b takes the one-site terms of its left (b) and right (b+1) site."""
        nb = self.L - 1
        left = np.full(nb, 0.5)
        right = np.full(nb, 0.5)
        left[0] = 1.0
        right[-1] = 1.0
        return left, right

    def bond_hamiltonians(self) -> np.ndarray:
        """Bond Hamiltonians H_b, shape (L-1, 4, 4), whose sum is H (one-site terms shared, see module doc)."""
        left, right = self.site_share()
        hb = np.array(self.bond_terms, dtype=complex, copy=True)
        for b in range(self.L - 1):
            hb[b] += left[b] * np.kron(self.site_terms[b], _I2) + right[b] * np.kron(_I2, self.site_terms[b + 1])
        return hb

    def dense_hamiltonian(self) -> np.ndarray:
        """The full 2^L x 2^L Hamiltonian (small L only; used by the exact references)."""
        if self.L > 14:
            raise InputError(f"dense_hamiltonian: L = {self.L} is too large for a dense matrix (L <= 14)")
        dim = 2**self.L
        H = np.zeros((dim, dim), dtype=complex)
        for b, hb in enumerate(self.bond_hamiltonians()):
            H += np.kron(np.kron(np.eye(2**b), hb), np.eye(2 ** (self.L - b - 2)))
        return H


# ----------------------------------------------------------------------------------------------- validation
def _check_L(L) -> int:
    if isinstance(L, bool) or not isinstance(L, Integral):
        raise InputError(f"L must be an integer >= 2, got {L!r}")
    if L < 2:
        raise InputError(f"L must be an integer >= 2, got L = {L}")
    return int(L)


def _check_real(name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, Real) or not np.isfinite(value):
        raise InputError(f"{name} must be a finite real number, got {value!r}")
    return float(value)


def _check_vector(name: str, value, n: int) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=float)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a list of {n} real numbers, got {value!r}") from None
    if arr.shape != (n,):
        raise InputError(f"{name} must have length {n} (one value per {'site' if name == 'fields' else 'bond'}), "
                         f"got shape {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} must be finite, got non-finite entries at positions "
                         f"{np.flatnonzero(~np.isfinite(arr)).tolist()}")
    return arr


def _check_hermitian(name: str, value, n: int, count: int) -> np.ndarray:
    try:
        arr = np.asarray(value, dtype=complex)
    except (TypeError, ValueError):
        raise InputError(f"{name} must be a complex {n}x{n} matrix or a stack of {count} of them") from None
    if arr.shape == (n, n):
        arr = np.broadcast_to(arr, (count, n, n)).copy()
    if arr.shape != (count, n, n):
        raise InputError(f"{name} must have shape ({n}, {n}) or ({count}, {n}, {n}), got {arr.shape}")
    if not np.all(np.isfinite(arr)):
        raise InputError(f"{name} contains non-finite entries (nan or inf)")
    err = np.abs(arr - arr.conj().transpose(0, 2, 1)).max()
    if err > 1e-12 * max(1.0, np.abs(arr).max()):
        raise InputError(f"{name} must be Hermitian; largest |A - A^dagger| = {err:.3g}")
    return arr


def draw_fields(L: int, W: float, seed=None) -> np.ndarray:
    """Box disorder: L fields uniform in [-W, W] from ``numpy.random.default_rng(seed)``.

    ``seed`` may be an int, a sequence of ints, a ``numpy.random.SeedSequence`` or a ``Generator``.
    """
    L = _check_L(L)
    W = _check_real("W", W)
    if W < 0:
        raise InputError(f"W (disorder strength) must be >= 0, got W = {W}")
    rng = seed if isinstance(seed, np.random.Generator) else np.random.default_rng(seed)
    return rng.uniform(-W, W, size=L)


# ----------------------------------------------------------------------------------------------- models
def xxz_chain(L: int, J: float = 1.0, delta: float = 1.0, W: float = 0.0, fields=None, seed=None,
              couplings=None) -> Chain:
    """The disordered XXZ chain in spin-1/2 units (see module doc).

    Parameters
    ----------
    L : int
        Number of sites (>= 2).
    J : float
        Exchange coupling; ignored where ``couplings`` (one value per bond) is given.
    delta : float
        Anisotropy (delta = 1: Heisenberg chain, delta = 0: XX chain, free fermions).
    W : float
        Box disorder strength: h_i uniform in [-W, W], drawn from ``numpy.random.default_rng(seed)``.
    fields : array_like, shape (L,), optional
        Explicit fields h_i (S^z units); excludes W > 0.
    seed : int, SeedSequence or Generator, optional
        Seed of the disorder draw.
    couplings : array_like, shape (L-1,), optional
        Explicit per-bond couplings J_i.

    Examples
    --------
    >>> chain = xxz_chain(8, delta=1.0, W=2.0, seed=7)
    >>> chain.fields.shape
    (8,)
    """
    L = _check_L(L)
    J = _check_real("J", J)
    delta = _check_real("delta", delta)
    W = _check_real("W", W)
    if W < 0:
        raise InputError(f"W (disorder strength) must be >= 0, got W = {W}")
    if fields is not None and W != 0:
        raise InputError("give either W (random fields) or fields (explicit), not both")
    h = _check_vector("fields", fields, L) if fields is not None else draw_fields(L, W, seed) if W > 0 else np.zeros(L)
    Jb = _check_vector("couplings", couplings, L - 1) if couplings is not None else np.full(L - 1, J)
    sx, sy, sz = SPIN
    xx = np.kron(sx, sx) + np.kron(sy, sy)
    zz = np.kron(sz, sz)
    bond_terms = np.array([j * (xx + delta * zz) for j in Jb])
    site_terms = np.array([hi * sz for hi in h])
    params = {"J": J, "delta": delta, "W": W}
    if seed is not None and not isinstance(seed, np.random.Generator):
        params["seed"] = seed.entropy if isinstance(seed, np.random.SeedSequence) else seed
    return Chain(L=L, bond_terms=bond_terms, site_terms=site_terms, kind="xxz", params=params, fields=h,
                 couplings=Jb, conserves_sz=True)


def mixed_field_ising_chain(L: int, J: float = 1.0, g: float = 1.05, h: float = 0.5) -> Chain:
    """Mixed-field Ising chain in Pauli units: H = sum J Z_i Z_{i+1} + g sum X_i + h sum Z_i.

    The default (J, g, h) = (1, 1.05, 0.5) is the standard chaotic point (Banuls, Cirac, Hastings,
    PRL 106, 050405 (2011)).
    """
    L = _check_L(L)
    J = _check_real("J", J)
    g = _check_real("g", g)
    h = _check_real("h", h)
    bond_terms = np.broadcast_to(J * np.kron(_Z, _Z), (L - 1, 4, 4)).copy()
    site_terms = np.broadcast_to(g * _X + h * _Z, (L, 2, 2)).copy()
    return Chain(L=L, bond_terms=bond_terms, site_terms=site_terms, kind="mixed_field_ising",
                 params={"J": J, "g": g, "h": h})


def nn_chain(L: int, two_site, one_site=None) -> Chain:
    """A generic nearest-neighbour chain.

    Parameters
    ----------
    L : int
        Number of sites (>= 2).
    two_site : array_like, shape (4, 4) or (L-1, 4, 4)
        Hermitian two-site term(s) acting on |s_i s_{i+1}>.
    one_site : array_like, shape (2, 2) or (L, 2, 2), optional
        Hermitian one-site term(s).
    """
    L = _check_L(L)
    bond_terms = _check_hermitian("two_site", two_site, 4, L - 1)
    site_terms = (_check_hermitian("one_site", one_site, 2, L) if one_site is not None
                  else np.zeros((L, 2, 2), dtype=complex))
    return Chain(L=L, bond_terms=bond_terms, site_terms=site_terms, kind="generic", params={})
