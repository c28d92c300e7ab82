"""readout.py: weights and OTOCs of a random small MPS against brute force on the full Pauli vector."""

import itertools

import numpy as np
import pytest

import mpo_fronts as mf
from mpo_fronts.errors import InputError
from mpo_fronts.conventions import PAULI
from mpo_fronts.readout import (ANTICOMMUTES, otoc_from_weights, pauli_weights, product_state_otoc, read_operator,
                                right_weights)


def random_mps(L=4, D=3, seed=0):
    rng = np.random.default_rng(seed)
    dims = [1] + [D] * (L - 1) + [1]
    return [rng.normal(size=(dims[i], 4, dims[i + 1])) for i in range(L)]


def full_coefficients(arrays):
    psi = arrays[0]
    for A in arrays[1:]:
        psi = np.tensordot(psi, A, axes=(-1, 0))
    return psi.reshape([4] * len(arrays))


def dense_operator(c):
    L = c.ndim
    W = np.zeros((2**L, 2**L), dtype=complex)
    for idx in itertools.product(range(4), repeat=L):
        P = np.array([[1.0]])
        for a in idx:
            P = np.kron(P, PAULI[a])
        W += c[idx] * P
    return W


def test_single_site_weights_and_otoc_brute_force():
    arrays = random_mps()
    c = full_coefficients(arrays)
    L = c.ndim
    total = np.sum(c**2)
    p = pauli_weights(arrays)
    for r in range(L):
        want = np.array([np.sum(np.take(c, a, axis=r) ** 2) for a in range(4)]) / total
        assert np.allclose(p[r], want, atol=1e-13)
    # C_V(r) = 1 - Tr[W V W V] / (2^L Tr W^2 / 2^L) on the dense operator
    W = dense_operator(c)
    for vi, v in enumerate("XYZ", start=1):
        C = otoc_from_weights(p, v)
        for r in range(L):
            V = np.kron(np.kron(np.eye(2**r), PAULI[vi]), np.eye(2 ** (L - r - 1)))
            ref = 1 - np.real(np.trace(W @ V @ W @ V)) / np.real(np.trace(W @ W))
            assert abs(C[r] - ref) < 1e-12


def test_weights_with_known_center_equal_generic_sweep():
    arrays = random_mps(L=5, D=4, seed=3)
    # bring into mixed canonical form with centre 2 by QR from both sides
    for k in range(2):
        A = arrays[k]
        q, r = np.linalg.qr(A.reshape(-1, A.shape[2]))
        arrays[k] = q.reshape(A.shape[0], 4, -1)
        arrays[k + 1] = np.tensordot(r, arrays[k + 1], axes=(1, 0))
    for k in range(4, 2, -1):
        A = arrays[k]
        q, r = np.linalg.qr(A.reshape(A.shape[0], -1).T)
        arrays[k] = q.T.reshape(-1, 4, A.shape[2])
        arrays[k - 1] = np.tensordot(arrays[k - 1], r.T, axes=(2, 0))
    assert np.allclose(pauli_weights(arrays, center=2), pauli_weights(arrays), atol=1e-13)
    assert np.allclose(right_weights(arrays, center=2), right_weights(arrays), atol=1e-13)
    shared = read_operator(arrays, center=2)  # one left-environment sweep for both profiles
    assert np.allclose(shared["weights"], pauli_weights(arrays), atol=1e-13)
    assert np.allclose(shared["right_weight"], right_weights(arrays), atol=1e-13)


def test_right_weight_brute_force():
    arrays = random_mps(L=4, D=3, seed=5)
    c = full_coefficients(arrays)
    rho = right_weights(arrays)
    want = np.zeros(4)
    for idx in itertools.product(range(4), repeat=4):
        nz = [i for i, a in enumerate(idx) if a]
        if nz:
            want[nz[-1]] += c[idx] ** 2
    assert np.allclose(rho, want / want.sum(), atol=1e-13)


@pytest.mark.parametrize("bits", ["0000", "0110", "1011"])
def test_product_state_otoc_brute_force(bits):
    arrays = random_mps(L=4, D=2, seed=7)
    c = full_coefficients(arrays)
    W = dense_operator(c)
    W = W / np.sqrt(np.real(np.trace(W @ W)) / 16)  # unit Frobenius weight, as the readout assumes
    s = np.zeros(16)
    s[int(bits, 2)] = 1.0
    for vi, v in enumerate("XYZ", start=1):
        C = product_state_otoc(arrays, bits, v)
        for r in range(4):
            V = np.kron(np.kron(np.eye(2**r), PAULI[vi]), np.eye(2 ** (3 - r)))
            ref = 1 - np.real(s @ W @ V @ W @ V @ s)
            assert abs(C[r] - ref) < 1e-12


def test_anticommutation_table():
    for vi, v in enumerate("XYZ", start=1):
        for a in range(4):
            comm = PAULI[a] @ PAULI[vi] + PAULI[vi] @ PAULI[a]
            assert ANTICOMMUTES[v][a] == bool(np.allclose(comm, 0))


def test_evolve_otoc_limits_blas_threads_during_the_evolution():
    from threadpoolctl import threadpool_info, threadpool_limits

    seen = []

    def progress(t):
        seen.append(max(p["num_threads"] for p in threadpool_info()))

    with threadpool_limits(limits=2):
        before = max(p["num_threads"] for p in threadpool_info())
        res = mf.evolve_otoc(mf.xxz_chain(6, W=1.0, seed=1), times=[0.2, 0.4], chi=8, progress=progress)
        after = max(p["num_threads"] for p in threadpool_info())
    assert before == 2  # the outer limit is visible, so seeing one thread below is the evolution's doing
    assert seen and set(seen) == {1} and after == before
    assert res.meta["blas_threads"] == 1 and res.meta["truncation"] == "svd"
    with pytest.raises(InputError, match="threads"):
        mf.evolve_otoc(mf.xxz_chain(6), times=[0.2], threads=0)
