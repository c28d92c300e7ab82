"""models.py: Hamiltonians against hand-built dense matrices, disorder drawing, input validation."""

import numpy as np
import pytest

import mpo_fronts as mf
from mpo_fronts.errors import InputError
from mpo_fronts.conventions import PAULI, SPIN

X, Y, Z = PAULI[1:]


def site_op(op, i, L):
    return np.kron(np.kron(np.eye(2**i), op), np.eye(2 ** (L - i - 1)))


def test_xxz_dense_matches_definition():
    # H = sum J (SxSx + SySy + delta SzSz) + sum h_i Sz_i, built term by term (README, Conventions: S = sigma/2, box disorder)
    L, J, delta = 5, 0.7, 1.3
    chain = mf.xxz_chain(L, J=J, delta=delta, W=2.0, seed=11)
    H = sum(J * (site_op(SPIN[0], i, L) @ site_op(SPIN[0], i + 1, L) + site_op(SPIN[1], i, L) @ site_op(SPIN[1], i + 1, L)
                 + delta * site_op(SPIN[2], i, L) @ site_op(SPIN[2], i + 1, L)) for i in range(L - 1))
    H = H + sum(h * site_op(SPIN[2], i, L) for i, h in enumerate(chain.fields))
    assert np.abs(chain.dense_hamiltonian() - H).max() < 1e-13
    assert np.all(np.abs(chain.fields) <= 2.0)


def test_mixed_field_ising_dense_matches_definition():
    L, J, g, h = 4, 1.0, 1.05, 0.5
    chain = mf.mixed_field_ising_chain(L, J=J, g=g, h=h)
    H = sum(J * site_op(Z, i, L) @ site_op(Z, i + 1, L) for i in range(L - 1))
    H = H + sum(g * site_op(X, i, L) + h * site_op(Z, i, L) for i in range(L))
    assert np.abs(chain.dense_hamiltonian() - H).max() < 1e-13


def test_disorder_is_reproducible_and_box_distributed():
    a = mf.xxz_chain(200, W=3.0, seed=5).fields
    b = mf.xxz_chain(200, W=3.0, seed=5).fields
    c = mf.xxz_chain(200, W=3.0, seed=6).fields
    assert np.array_equal(a, b) and not np.array_equal(a, c)
    assert a.min() >= -3.0 and a.max() <= 3.0
    # uniform on [-W, W]: variance W^2/3; 200 samples put the sample variance within ~20 % (4 sigma)
    assert abs(a.var() / 3.0 - 1.0) < 0.35
    gen = np.random.default_rng(5)
    assert np.array_equal(mf.xxz_chain(200, W=3.0, seed=gen).fields, a)


def test_explicit_fields_couplings_and_generic_chain_agree():
    L = 4
    h = [0.1, -0.3, 0.2, 0.5]
    Jb = [1.0, 0.5, 2.0]
    xxz = mf.xxz_chain(L, delta=0.4, fields=h, couplings=Jb)
    two = [j * (np.kron(SPIN[0], SPIN[0]) + np.kron(SPIN[1], SPIN[1]) + 0.4 * np.kron(SPIN[2], SPIN[2])) for j in Jb]
    one = [hi * SPIN[2] for hi in h]
    gen = mf.nn_chain(L, two, one)
    assert np.abs(xxz.dense_hamiltonian() - gen.dense_hamiltonian()).max() < 1e-14
    assert np.allclose(xxz.couplings, Jb) and np.allclose(xxz.fields, h)
    # the bond Hamiltonians sum to H (one-site terms shared between bonds)
    hb = xxz.bond_hamiltonians()
    H = sum(np.kron(np.kron(np.eye(2**b), hb[b]), np.eye(2 ** (L - b - 2))) for b in range(L - 1))
    assert np.abs(H - xxz.dense_hamiltonian()).max() < 1e-14


@pytest.mark.parametrize(
    "call, word",
    [
        (lambda: mf.xxz_chain(1), "L"),
        (lambda: mf.xxz_chain(4.5), "L"),
        (lambda: mf.xxz_chain(4, W=-1.0), "W"),
        (lambda: mf.xxz_chain(4, W=1.0, fields=[0, 0, 0, 0]), "fields"),
        (lambda: mf.xxz_chain(4, fields=[0, 0, 0]), "fields"),
        (lambda: mf.xxz_chain(4, fields=[0, np.nan, 0, 0]), "fields"),
        (lambda: mf.xxz_chain(4, couplings=[1, 1]), "couplings"),
        (lambda: mf.xxz_chain(4, J=float("inf")), "J"),
        (lambda: mf.xxz_chain(4, delta="big"), "delta"),
        (lambda: mf.mixed_field_ising_chain(4, g=np.nan), "g"),
        (lambda: mf.nn_chain(4, np.triu(np.ones((4, 4)))), "Hermitian"),
        (lambda: mf.nn_chain(4, np.eye(3)), "two_site"),
        (lambda: mf.nn_chain(4, np.eye(4), np.full((2, 2), np.inf)), "one_site"),
    ],
)
def test_bad_model_inputs_name_the_argument(call, word):
    with pytest.raises(InputError, match=word):
        call()


def test_errors_pickle():
    import pickle

    from mpo_fronts.errors import ConfigError

    e = pickle.loads(pickle.dumps(ConfigError("engine.chi", "must be positive")))
    assert isinstance(e, ValueError) and e.key == "engine.chi" and "engine.chi" in str(e)
    e2 = pickle.loads(pickle.dumps(InputError("L must be >= 2")))
    assert str(e2) == "L must be >= 2"
    from mpo_fronts.errors import RunDirectoryError

    e3 = pickle.loads(pickle.dumps(RunDirectoryError("x.h5: exists", arg="overwrite")))
    assert isinstance(e3, FileExistsError) and str(e3) == "x.h5: exists" and e3.arg == "overwrite"
    assert RunDirectoryError("no arg").arg is None


def test_chain_repr_is_one_short_line():
    """print(chain) of a long disordered chain: one line naming the model, not hundreds of array rows."""
    c = mf.xxz_chain(100, W=2.0, seed=3)
    text = repr(c)
    assert "\n" not in text and len(text) < 200
    assert "L=100" in text and "W=2" in text and "fields in [" in text
    assert str(mf.mixed_field_ising_chain(10)).startswith("Chain(mixed_field_ising, L=10")
