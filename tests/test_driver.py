"""driver.py: the one evolution loop (measurements, observers, resume) and the operator entanglement entropy."""

import numpy as np

import mpo_fronts as mf
from mpo_fronts.driver import DEFAULT_MEASUREMENTS, Observer, ProductStates, evolve
from mpo_fronts.evolve import OperatorTEBD, bond_entropies
from mpo_fronts.settings import EvolutionSettings


def _dense_coefficients(arrays):
    """All 4^L Pauli-string coefficients of the MPS, by brute-force contraction."""
    c = arrays[0]
    for A in arrays[1:]:
        c = np.tensordot(c, A, axes=(-1, 0))
    return c.reshape([4] * len(arrays))


def test_bond_entropies_equal_a_dense_operator_schmidt_decomposition():
    # Operator Schmidt decomposition of the coefficient tensor c_S across each bond, with numpy's SVD of the full
    # 4^(b+1) x 4^(L-b-1) matrix (independent of the engine's canonical form).
    chain = mf.xxz_chain(7, W=1.5, seed=4)
    eng = OperatorTEBD(chain, "Z", 3, chi=4096, dt=0.05)
    for _ in eng.run([1.3]):
        pass
    c = _dense_coefficients(eng.arrays)
    ref = []
    for b in range(6):
        s = np.linalg.svd(c.reshape(4 ** (b + 1), -1), compute_uv=False)
        p = s ** 2 / np.sum(s ** 2)
        p = p[p > 1e-300]
        ref.append(-np.sum(p * np.log(p)))
    got = bond_entropies(eng.arrays, eng.center)
    np.testing.assert_allclose(got, ref, atol=1e-10)
    assert got.max() > 0.1  # the operator did spread


def test_every_measurement_gets_a_time_axis_and_observers_see_every_block():
    chain = mf.mixed_field_ising_chain(8)
    blocks = []

    class Count(Observer):
        def after_block(self, engine, evolution):
            blocks.append((engine.t, evolution.n_done))

        def at_end(self, evolution):
            blocks.append("end")

    times = [0.3, 0.6, 1.0]
    evo = evolve(chain, "X", 2, times, EvolutionSettings(chi=16, dt=0.05, chunk=3),
                 measurements=[*DEFAULT_MEASUREMENTS, ProductStates(("01010101", "00000000"))],
                 observers=[Count()])
    assert evo.arrays["weights"].shape == (3, 8, 4) and evo.arrays["bond_entropy"].shape == (3, 7)
    assert evo.arrays["state_otoc_Z"].shape == (3, 2, 8) and evo.n_done == 3
    assert blocks[-1] == "end" and len(blocks) > 4  # several blocks per output time (chunk = 3 steps)
    assert evo.engine["splits"] and evo.engine["blas_threads"] == 1 and evo.engine["max_step"] <= 0.05


def test_api_and_ensemble_paths_give_identical_arrays_and_metadata(tmp_path):
    from mpo_fronts.config import parse_description
    from mpo_fronts.ensemble import run_ensemble

    desc = parse_description({"model": {"kind": "xxz", "L": 8, "W": 2.0}, "operators": {"site": 3},
                              "times": {"values": [0.5, 1.5]}, "evolution": {"chi": 8, "dt": 0.1},
                              "ensemble": {"realizations": 1, "seed": 3}})
    run_ensemble(desc, tmp_path / "run", progress="none")
    ens = mf.load(tmp_path / "run")
    chain = desc.realization(0).chain
    res = mf.evolve_otoc(chain, "Z", 3, [0.5, 1.5], settings=desc.settings)
    for v in "XYZ":
        assert np.array_equal(ens.otoc(v)[0], res.otoc(v))
    for key in ("splits", "blas_threads", "max_step", "truncation", "chi"):
        assert ens.engine[key] == res.meta[key], key


def test_a_run_that_loses_most_of_its_weight_warns_and_one_that_does_not_stays_quiet():
    import warnings

    import pytest

    from mpo_fronts.errors import TruncationWarning

    chain = mf.mixed_field_ising_chain(16)
    with pytest.warns(TruncationWarning, match="discarded weight"):
        lossy = mf.evolve_otoc(chain, "Z", 8, [2.0, 6.0], chi=2, dt=0.1)
    assert lossy.discarded_weight[-1] > 0.1 and lossy.meta["warnings"]
    with warnings.catch_warnings():
        warnings.simplefilter("error", TruncationWarning)
        fine = mf.evolve_otoc(chain, "Z", 8, [0.5, 1.0], chi=64, dt=0.1)
    assert fine.discarded_weight[-1] < 1e-6 and fine.meta["warnings"] == []


def test_numeric_dt_keeps_the_z2_engine_bit_for_bit():
    # symmetry = "auto" (the default) with a number for dt builds the engine of before the setting existed:
    # the same arrays as OperatorTEBD run directly, and as symmetry = "z2"
    from mpo_fronts.readout import read_operator

    chain = mf.xxz_chain(10, W=2.0, seed=6)
    times = [0.5, 1.5]
    res = mf.evolve_otoc(chain, "Z", 4, times, chi=32, dt=0.1)
    assert res.meta["symmetry"] == "auto" and res.meta["symmetry_used"] == "z2" and res.meta["graded"] is True
    eng = OperatorTEBD(chain, "Z", 4, chi=32, dt=0.1)
    direct = [read_operator(e.arrays, e.center)["weights"] for _, e in eng.run(times)]
    assert np.array_equal(res.weights, np.array(direct))
    assert np.array_equal(res.weights, mf.evolve_otoc(chain, "Z", 4, times, chi=32, dt=0.1, symmetry="z2").weights)
