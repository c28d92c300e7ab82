"""Tests of mpo_fronts.exact against references built here from scratch (full 2^L matrices, scipy.linalg.expm,
scipy.special.jv) and against free-fermion closed forms (Jordan-Wigner; consistent with Lin & Motrunich,
PRB 98, 134305 (2018))."""

from functools import reduce

import numpy as np
import pytest
import scipy.linalg
from scipy.special import jv

import mpo_fronts as mf
from mpo_fronts.errors import InputError
from mpo_fronts.exact import (eigenstate_otoc, exact_otoc, free_fermion_otoc, sparse_hamiltonian,
                              typicality_otoc)

# Pauli matrices written out here (not taken from the package) for the brute-force references.
I2 = np.eye(2, dtype=complex)
SX = np.array([[0, 1], [1, 0]], dtype=complex)
SY = np.array([[0, -1j], [1j, 0]], dtype=complex)
SZ = np.array([[1, 0], [0, -1]], dtype=complex)
P = {"I": I2, "X": SX, "Y": SY, "Z": SZ}


def local(op, r, L):
    """op at site r (site 0 = leftmost kron factor) as a full 2^L x 2^L matrix."""
    return reduce(np.kron, [op if k == r else I2 for k in range(L)])


def brute_xxz(L, J, delta, h):
    """H = sum J_b (SxSx + SySy + delta SzSz) + sum h_i Sz_i with S = sigma / 2, full matrix."""
    H = np.zeros((2**L, 2**L), dtype=complex)
    for b in range(L - 1):
        for op, c in ((SX, 1.0), (SY, 1.0), (SZ, delta)):
            H += J[b] * c * local(op / 2, b, L) @ local(op / 2, b + 1, L)
    for i in range(L):
        H += h[i] * local(SZ / 2, i, L)
    return H


def brute_heisenberg(H, W, t):
    U = scipy.linalg.expm(-1j * H * t)
    return U.conj().T @ W @ U  # W(t) = e^{iHt} W e^{-iHt}


def pauli_coefficients(Wt, L):
    """c[a_0, ..., a_{L-1}] = Tr(P_a0 (x) ... (x) P_a(L-1) W) / 2^L, by full traces (slow, L <= 6)."""
    c = np.empty((4,) * L)
    for idx in np.ndindex(*(4,) * L):
        S = reduce(np.kron, [P["IXYZ"[a]] for a in idx])
        c[idx] = np.sum(S * Wt.T).real / 2**L  # Tr(S W)
    return c


def brute_readout(Wt, L):
    """Single-site weights (L, 4) and right-weight profile (L,) from the full Pauli decomposition."""
    c2 = pauli_coefficients(Wt, L) ** 2
    weights = np.array([[np.take(c2, a, axis=r).sum() for a in range(4)] for r in range(L)])
    right = np.zeros(L)
    for idx in np.ndindex(*c2.shape):
        nz = [k for k, a in enumerate(idx) if a]
        if nz:
            right[nz[-1]] += c2[idx]
    return weights / weights.sum(axis=1, keepdims=True), right / right.sum()


def brute_otoc(Wt, L, v, state=None):
    out = np.empty(L)
    for r in range(L):
        Vr = local(P[v], r, L)
        M = Wt @ Vr @ Wt @ Vr
        if state is None:
            out[r] = 1 - np.trace(M).real / 2**L
        else:
            s = int(state, 2)
            out[r] = 1 - M[s, s].real
    return out


# ----------------------------------------------------------------------------------------------- dense exact
@pytest.mark.parametrize("w, site, state", [("Z", 0, None), ("X", 2, "011010"), ("Y", 5, "100110")])
def test_exact_otoc_matches_brute_force_xxz(w, site, state):
    L = 6
    rng = np.random.default_rng(11)
    h = rng.uniform(-1.5, 1.5, L)
    J = rng.uniform(0.5, 1.5, L - 1)
    chain = mf.xxz_chain(L, delta=0.7, fields=h, couplings=J)
    H = brute_xxz(L, J, 0.7, h)
    times = [0.0, 0.4, 1.3]
    res = exact_otoc(chain, w=w, site=site, times=times, state=state)
    assert res.meta["method"] == "exact"
    assert np.all(res.discarded_weight == 0) and np.all(res.max_bond == -1)
    for k, t in enumerate(times):
        Wt = brute_heisenberg(H, local(P[w], site, L), t)
        weights, right = brute_readout(Wt, L)
        np.testing.assert_allclose(res.weights[k], weights, atol=1e-11)
        np.testing.assert_allclose(res.right_weight[k], right, atol=1e-11)
        for v in "XYZ":
            np.testing.assert_allclose(otoc_inf := mf.readout.otoc_from_weights(res.weights[k], v),
                                       brute_otoc(Wt, L, v), atol=1e-11)
            assert otoc_inf.min() > -1e-12
            if state is not None:
                np.testing.assert_allclose(res.state_otoc[v][k], brute_otoc(Wt, L, v, state), atol=1e-11)
    # t = 0: W itself, so C_Z = 2 exactly at the site of W when W anticommutes with Z, and 0 elsewhere
    expected = 2.0 * (np.arange(L) == site) * (w != "Z")
    np.testing.assert_allclose(mf.readout.otoc_from_weights(res.weights[0], "Z"), expected, atol=1e-12)


def test_exact_otoc_complex_hamiltonian():
    """A chain with a complex (Dzyaloshinskii-Moriya) bond term exercises the complex eigenvector path."""
    L = 5
    dm = np.kron(SX, SY) - np.kron(SY, SX)  # Hermitian, purely imaginary
    two = 0.8 * np.kron(SZ, SZ) + 0.5 * dm
    one = 0.6 * SX + 0.3 * SZ
    chain = mf.nn_chain(L, two, one)
    H = sum(local(SZ, b, L) @ local(SZ, b + 1, L) * 0.8 + 0.5 * (local(SX, b, L) @ local(SY, b + 1, L)
            - local(SY, b, L) @ local(SX, b + 1, L)) for b in range(L - 1))
    H = H + sum(local(one, i, L) for i in range(L))
    res = exact_otoc(chain, w="Y", site=2, times=[0.9], state="01011")
    Wt = brute_heisenberg(H, local(SY, 2, L), 0.9)
    for v in "XYZ":
        np.testing.assert_allclose(res.otoc(v)[0], brute_otoc(Wt, L, v, "01011"), atol=1e-11)
        np.testing.assert_allclose(mf.readout.otoc_from_weights(res.weights[0], v), brute_otoc(Wt, L, v),
                                   atol=1e-11)


def test_product_state_average_is_infinite_temperature():
    """Averaging C_s over all 2^L basis states gives the trace: sum_s <s|A|s> = Tr A (common practice)."""
    L = 5
    chain = mf.mixed_field_ising_chain(L)
    times = [0.3, 1.1]
    inf = exact_otoc(chain, w="X", site=1, times=times)
    acc = {v: np.zeros((2, L)) for v in "XYZ"}
    for s in range(2**L):
        res = exact_otoc(chain, w="X", site=1, times=times, state=format(s, f"0{L}b"))
        for v in acc:
            acc[v] += res.state_otoc[v] / 2**L
    for v in acc:
        np.testing.assert_allclose(acc[v], inf.otoc(v), atol=1e-12)


def test_eigenstate_average_is_infinite_temperature():
    L = 6
    chain = mf.xxz_chain(L, delta=1.0, W=2.0, seed=5)
    times = [0.5, 2.0]
    E, C = eigenstate_otoc(chain, w="Z", site=2, v="X", times=times)
    assert E.shape == (2**L,) and C.shape == (2, 2**L, L) and np.all(np.diff(E) >= 0)
    inf = exact_otoc(chain, w="Z", site=2, times=times)
    np.testing.assert_allclose(C.mean(axis=1), inf.otoc("X"), atol=1e-12)
    # one eigenstate against the brute force: <n|W(t) V_r W(t) V_r|n> with numpy's own eigenvector
    H = brute_xxz(L, np.ones(L - 1), 1.0, chain.fields)
    e, vecs = np.linalg.eigh(H)
    np.testing.assert_allclose(E, e, atol=1e-10)
    n = 17
    assert min(abs(e[n] - e[n - 1]), abs(e[n + 1] - e[n])) > 1e-6  # non-degenerate: the state is unique
    Wt = brute_heisenberg(H, local(SZ, 2, L), 2.0)
    ref = [1 - (vecs[:, n].conj() @ Wt @ local(SX, r, L) @ Wt @ local(SX, r, L) @ vecs[:, n]).real
           for r in range(L)]
    np.testing.assert_allclose(C[1, n], ref, atol=1e-10)


# ----------------------------------------------------------------------------------------------- free fermions
def test_free_fermions_match_dense_exact():
    L = 8
    rng = np.random.default_rng(3)
    chain = mf.xxz_chain(L, delta=0.0, fields=rng.uniform(-2, 2, L), couplings=rng.uniform(0.5, 1.5, L - 1))
    times = [0.0, 0.7, 2.5, 6.0]
    for site in (0, 3):
        ff = free_fermion_otoc(chain, site=site, times=times)
        ex = exact_otoc(chain, w="Z", site=site, times=times).otoc("Z")
        np.testing.assert_allclose(ff, ex, atol=1e-11)  # includes r = site
        assert ff[2, site] > 0.1


@pytest.mark.parametrize("order, chunk", [(2, None), (4, 3)])
def test_trotterized_free_fermions_match_untruncated_engine(order, chunk):
    """Same schedule, no truncation (chi = 4^(L/2)): the engine equals the closed form to rounding."""
    L = 8
    rng = np.random.default_rng(8)
    chain = mf.xxz_chain(L, delta=0.0, fields=rng.uniform(-1, 1, L), couplings=rng.uniform(0.5, 1.5, L - 1))
    times = [0.3, 1.0, 2.2]
    ff = free_fermion_otoc(chain, site=2, times=times, dt=0.2, order=order, chunk=chunk)
    eng = mf.evolve_otoc(chain, w="Z", site=2, times=times, chi=256, dt=0.2, order=order, chunk=chunk)
    np.testing.assert_allclose(ff, eng.otoc("Z"), atol=1e-12)
    exact = free_fermion_otoc(chain, site=2, times=times)
    trotter_error = np.abs(ff - exact).max()
    assert 1e-9 < trotter_error < (1e-2 if order == 2 else 1e-4)


def test_clean_xx_chain_bessel():
    """Infinite clean XX chain: |G_0r(t)|^2 = J_r(t)^2 (scipy.special.jv); the ends are far from the front."""
    L, i = 80, 40
    chain = mf.xxz_chain(L, delta=0.0)
    times = [0.5, 1.0, 4.0, 5.0]
    C = free_fermion_otoc(chain, site=i, times=times)
    for k, t in enumerate(times):
        g = jv(np.arange(-i, L - i), t) ** 2
        np.testing.assert_allclose(C[k], 4 * g * (1 - g), atol=1e-12)
    # check values C_ZZ = 4 J_r(t)^2 (1 - J_r(t)^2) of the infinite XX chain, from scipy.special.jv (Bessel)
    np.testing.assert_allclose(C[0, i + 1], 0.2209960772, rtol=1e-9)
    np.testing.assert_allclose(C[1, i + 3], 0.0015303134, rtol=1e-7)
    np.testing.assert_allclose(C[2, i + 5], 0.0685699637, rtol=1e-9)
    np.testing.assert_allclose(C[3, i + 10], 8.6177599e-06, rtol=1e-7)


# ----------------------------------------------------------------------------------------------- typicality
def dm_chain(L):
    """A chain with a complex (Dzyaloshinskii-Moriya) bond term and a transverse field."""
    return mf.nn_chain(L, 0.8 * np.kron(SZ, SZ) + 0.5 * (np.kron(SX, SY) - np.kron(SY, SX)), 0.6 * SX + 0.3 * SZ)


def test_sparse_hamiltonian_matches_dense():
    L = 6
    rng = np.random.default_rng(4)
    h, J = rng.uniform(-2, 2, L), rng.uniform(0.5, 1.5, L - 1)
    H = sparse_hamiltonian(mf.xxz_chain(L, delta=0.6, fields=h, couplings=J))
    assert H.dtype == np.float64
    np.testing.assert_allclose(H.toarray(), brute_xxz(L, J, 0.6, h), atol=1e-14)
    for chain in (mf.mixed_field_ising_chain(L), dm_chain(L)):
        np.testing.assert_allclose(sparse_hamiltonian(chain).toarray(), chain.dense_hamiltonian(), atol=1e-14)


@pytest.mark.parametrize("chain", [mf.xxz_chain(8, delta=0.8, W=1.5, seed=9), dm_chain(8)],
                         ids=["xxz", "complex"])
def test_sparse_evolution_basis_state_is_exact(chain):
    """With a basis state instead of random states, the sparse route is the product-state OTOC itself."""
    times = [0.0, 0.6, 2.1]
    s = "01101001"
    ex = exact_otoc(chain, w="Y", site=3, times=times, state=s)
    for v in "XZ":
        res = typicality_otoc(chain, w="Y", site=3, v=v, times=times, state=s)
        assert res.meta["method"] == "sparse_state" and res.expected_error == 0
        np.testing.assert_allclose(res.otoc, ex.otoc(v), atol=1e-10)


def test_typicality_agrees_with_exact_within_statistics():
    """Haar-random states: <psi|O|psi> - Tr O / 2^L has standard deviation <= 1/sqrt(2^L + 1) for unitary O
    (here O = W(t) V W(t) V), so 5 standard deviations of the mean over n_states bound the deviation."""
    L, n_states = 10, 4
    chain = mf.xxz_chain(L, delta=1.0, W=1.0, seed=2)
    times = [0.5, 1.5, 3.0]
    ex = exact_otoc(chain, w="X", site=4, times=times).otoc("Z")
    res = typicality_otoc(chain, w="X", site=4, v="Z", times=times, seed=7, n_states=n_states,
                          probe_sites=[1, 4, 6, 9])
    sigma = 1 / np.sqrt((2**L + 1) * n_states)
    assert res.expected_error == pytest.approx(sigma)
    assert res.otoc.shape == (3, 4) and res.samples.shape == (n_states, 3, 4)
    dev = np.abs(res.otoc - ex[:, [1, 4, 6, 9]])
    assert dev.max() < 5 * sigma
    assert 0 < np.nanmax(res.stderr) < 5 * sigma
    again = typicality_otoc(chain, w="X", site=4, v="Z", times=times, seed=7, n_states=n_states,
                            probe_sites=[1, 4, 6, 9], block=1)
    np.testing.assert_allclose(again.otoc, res.otoc, atol=1e-12)  # same seed, other blocking: same numbers


# ----------------------------------------------------------------------------------------------- bad input
def test_bad_input_raises_clear_errors():
    small = mf.xxz_chain(4)
    with pytest.raises(InputError, match="L <= 12"):
        exact_otoc(mf.xxz_chain(13), times=[1.0])
    with pytest.raises(InputError, match="w"):
        exact_otoc(small, w="Q", times=[1.0])
    with pytest.raises(InputError, match="site"):
        exact_otoc(small, site=4, times=[1.0])
    with pytest.raises(InputError, match="state"):
        exact_otoc(small, times=[1.0], state="01")
    with pytest.raises(InputError, match="increasing"):
        exact_otoc(small, times=[1.0, 0.5])
    with pytest.raises(InputError, match="probe"):
        eigenstate_otoc(small, v="A", times=[1.0])
    with pytest.raises(InputError, match="delta=0"):
        free_fermion_otoc(mf.xxz_chain(6, delta=1.0), times=[1.0])
    with pytest.raises(InputError, match="order"):
        free_fermion_otoc(mf.xxz_chain(6, delta=0.0), times=[1.0], dt=0.1, order=3)
    with pytest.raises(InputError, match="chain"):
        exact_otoc("not a chain", times=[1.0])
    with pytest.raises(InputError, match="n_states"):
        typicality_otoc(small, times=[1.0], n_states=0)
    with pytest.raises(InputError, match="probe_sites"):
        typicality_otoc(small, times=[1.0], probe_sites=[7])
    with pytest.raises(InputError, match="L <= 24"):
        typicality_otoc(mf.xxz_chain(25), times=[1.0])
