"""The 'saturated' estimator of C from a truncated operator (readout.estimate_otoc), against dense exact evolution.

The reference is mpo_fronts.exact.exact_otoc: dense eigendecomposition of H with numpy/scipy, exact up to rounding.
"""

import warnings

import numpy as np
import pytest

import mpo_fronts as mf
from mpo_fronts.errors import InputError
from mpo_fronts.readout import estimate_otoc


def test_saturated_is_the_formula_and_equals_normalized_without_truncation():
    rng = np.random.default_rng(0)
    C = rng.uniform(0, 1, size=(5, 7))
    eps = rng.uniform(0, 0.3, size=5)
    got = estimate_otoc(C, eps, "saturated")
    # written out independently of the implementation
    for k in range(5):
        want = C[k] * (1 - eps[k]) + eps[k] * C[k] / C[k].max()
        np.testing.assert_allclose(got[k], want, rtol=1e-14)
    np.testing.assert_array_equal(estimate_otoc(C, np.zeros(5), "saturated"), C)
    assert estimate_otoc(C, eps) is not None and np.array_equal(estimate_otoc(C, eps), C)
    # between the unnormalised C (1 - eps) C and the value with all lost weight fully scrambled, C (1 - eps) + eps
    e = eps[:, None]
    assert np.all(got >= C * (1 - e) - 1e-15) and np.all(got <= C * (1 - e) + e + 1e-15)


def test_saturated_reduces_the_error_behind_the_front():
    # random-field Heisenberg chain, L = 10, W = 0.5, chi = 8: about 30 % of the weight is discarded by t = 12
    chain = mf.xxz_chain(10, W=0.5, seed=3)
    t = np.linspace(2.0, 12.0, 6)
    exact = mf.exact_otoc(chain, "Z", 0, t).otoc("Z")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # the large-discarded-weight warning is the point here
        res = mf.evolve_otoc(chain, "Z", 0, t, chi=8, dt=0.1)
    assert res.discarded_weight[-1] > 0.1
    behind = exact > 0.5
    err = {e: np.median(np.abs(res.otoc("Z", e) - exact)[behind] / exact[behind]) for e in ("normalized", "saturated")}
    assert err["saturated"] < 0.8 * err["normalized"], err
    # ahead of the front (C_exact < 1e-2) the two differ by less than 1 % of C
    ahead = (exact > 1e-8) & (exact < 1e-2)
    assert ahead.any()
    rel = np.abs(res.otoc("Z", "saturated") - res.otoc("Z"))[ahead] / res.otoc("Z")[ahead]
    assert rel.max() < 1e-2


def test_estimator_errors():
    chain = mf.xxz_chain(6, W=0.5, seed=1)
    res = mf.evolve_otoc(chain, "Z", 0, [0.5, 1.0], chi=8, dt=0.1)
    with pytest.raises(InputError, match="estimator"):
        res.otoc("Z", "raw")
    with pytest.raises(InputError, match="one value per time"):
        estimate_otoc(np.ones((3, 4)), np.ones(4), "saturated")
    st = mf.evolve_otoc(chain, "Z", 0, [0.5, 1.0], chi=8, dt=0.1, state="010101")
    with pytest.raises(InputError, match="infinite temperature"):
        st.otoc("Z", "saturated")


def test_ensemble_otoc_saturated_equals_the_per_realization_formula(tmp_path):
    from mpo_fronts.readout import otoc_from_weights

    from mpo_fronts.config import parse_description
    from mpo_fronts.ensemble import run_ensemble

    desc = parse_description({"model": {"kind": "xxz", "L": 8, "W": 0.5},
                              "operators": {"w": "Z", "site": 0, "v": ["Z"]},
                              "times": {"values": [1.0, 2.0, 3.0, 4.0]}, "evolution": {"chi": 4, "dt": 0.1},
                              "ensemble": {"realizations": 2, "seed": 3}})
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # large discarded weight at chi 4: the point of the test
        run_ensemble(desc, tmp_path / "out")
    ens = mf.load(tmp_path / "out")
    got = ens.otoc("Z", estimator="saturated")
    assert ens.discarded_weight[:, -1].min() > 0
    for k in range(len(ens)):
        np.testing.assert_allclose(got[k], estimate_otoc(ens.otoc("Z")[k], ens.discarded_weight[k], "saturated"))
    # X is not stored: read from the weights, then corrected the same way
    np.testing.assert_allclose(ens.otoc("X", "saturated"),
                               estimate_otoc(otoc_from_weights(ens.weights, "X"), ens.discarded_weight, "saturated"))
    with pytest.raises(InputError, match="estimator"):
        ens.otoc("Z", estimator="sat")
