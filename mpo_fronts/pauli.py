"""Pauli basis and Pauli transfer matrices of two-site unitaries.

A Hermitian operator on two sites is W = sum_{ab} c_{ab} P_a (x) P_b with real c and P in (I, X, Y, Z); the
two-site index is a*4 + b (site i is the first factor). Conjugation W -> U^dag W U (Heisenberg picture, U the
time-step propagator) acts on c by the real orthogonal 16x16 matrix

    G[m, n] = Tr[P_m U^dag P_n U] / 4,   c' = G c.
"""

from __future__ import annotations

import numpy as np

from .conventions import LETTERS, PAULI

__all__ = ["PAULI", "PAULI2", "transfer_matrix", "transfer_matrices", "bond_propagators", "pauli_vector",
           "LETTERS"]

#: Two-site Pauli strings P_a (x) P_b, shape (16, 4, 4), index a*4 + b.
PAULI2 = np.einsum("aij,bkl->abikjl", PAULI, PAULI).reshape(16, 4, 4)


def transfer_matrices(U: np.ndarray) -> np.ndarray:
    """Pauli transfer matrices of a stack of two-site unitaries U (n, 4, 4) -> real (n, 16, 16).

    G[m, n] = Tr[P_m U^dag P_n U] / 4, so that the coefficient vector of U^dag W U is G @ c(W).
    """
    U = np.asarray(U, dtype=complex)
    single = U.ndim == 2
    U = U[None] if single else U
    # B[k, n] = U^dag P_n U for every n; G[m, n] = sum_ij P_m[i, j] B[n][j, i] / 4.
    B = np.einsum("kji,njl,klm->knim", U.conj(), PAULI2, U)
    G = np.einsum("mij,knji->kmn", PAULI2, B).real / 4.0
    return G[0] if single else G


def transfer_matrix(U: np.ndarray) -> np.ndarray:
    """Pauli transfer matrix of one two-site unitary (4, 4) -> real orthogonal (16, 16)."""
    return transfer_matrices(np.asarray(U)[None])[0]


def bond_propagators(h_bonds: np.ndarray, tau: float) -> np.ndarray:
    """exp(-i H_b tau) for a stack of Hermitian bond Hamiltonians (n, 4, 4)."""
    e, v = np.linalg.eigh(h_bonds)
    return np.einsum("kij,kj,klj->kil", v, np.exp(-1j * tau * e), v.conj())


def pauli_vector(op: np.ndarray) -> np.ndarray:
    """Real coefficients c_a = Tr(P_a op) / 2 of a Hermitian single-site operator (2, 2)."""
    return np.einsum("aij,ji->a", PAULI, op).real / 2.0
