"""pauli.py: transfer matrices against dense conjugation U^dag W U."""

import numpy as np
import scipy.linalg
from scipy.stats import unitary_group

from mpo_fronts.pauli import PAULI2, bond_propagators, transfer_matrices, transfer_matrix


def test_transfer_matrix_is_real_orthogonal_and_conjugates():
    rng = np.random.default_rng(1)
    U = unitary_group.rvs(4, random_state=3)
    G = transfer_matrix(U)
    assert G.dtype == np.float64
    assert np.abs(G @ G.T - np.eye(16)).max() < 1e-13
    assert abs(G[0, 0] - 1) < 1e-14 and np.abs(G[0, 1:]).max() < 1e-14  # identity maps to identity
    c = rng.normal(size=16)
    W = np.einsum("n,nij->ij", c, PAULI2)
    W2 = U.conj().T @ W @ U
    c2 = np.einsum("mij,ji->m", PAULI2, W2) / 4
    assert np.abs(c2.imag).max() < 1e-14
    assert np.abs(c2.real - G @ c).max() < 1e-13


def test_bond_propagators_match_scipy_expm():
    rng = np.random.default_rng(2)
    A = rng.normal(size=(3, 4, 4)) + 1j * rng.normal(size=(3, 4, 4))
    H = A + A.conj().transpose(0, 2, 1)
    U = bond_propagators(H, 0.37)
    for k in range(3):
        assert np.abs(U[k] - scipy.linalg.expm(-0.37j * H[k])).max() < 1e-12
    assert transfer_matrices(U).shape == (3, 16, 16)
