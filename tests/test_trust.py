"""Tests of mpo_fronts.trust: bond-dimension convergence, trust masks, crossing-time errors and their coverage."""

import numpy as np
import pytest

from mpo_fronts import report
from mpo_fronts import trust as tr
from mpo_fronts.errors import InputError
from synthetic_fronts import ballistic_ensemble, fake_ensemble


def test_bond_convergence_max_over_realizations_and_mask():
    rng = np.random.default_rng(0)
    base = rng.uniform(0, 1, (3, 4, 5))
    d1 = np.zeros_like(base)
    d1[1, 2, 3] = 5e-3  # one realization differs at one point between chi = 16 and 32
    d2 = np.zeros_like(base)
    d2[2, 0, 0] = -2e-3  # and at another point between chi = 32 and 64
    res = tr.bond_convergence({64: base + d1 + d2, 16: base, 32: base + d1}, tol=1e-3)
    assert res["chis"] == [16, 32, 64]
    assert res["max_dC"].shape == (2, 4, 5)
    assert res["max_dC"][0, 2, 3] == pytest.approx(5e-3) and res["max_dC"][1, 0, 0] == pytest.approx(2e-3)
    expected = np.ones((4, 5), bool)
    expected[0, 0] = False
    np.testing.assert_array_equal(res["trusted"], expected)
    with pytest.raises(InputError, match="otoc_by_chi"):
        tr.bond_convergence({16: base})
    with pytest.raises(InputError, match=r"otoc_by_chi\[32\]"):
        tr.bond_convergence({16: base, 32: base[:, :2]})


def test_trust_fallback_to_discarded_weight():
    t, C = ballistic_ensemble(R=4)
    dw = np.zeros((4, t.size))
    dw[1, 60:] = 1e-2  # one realization truncates heavily from time index 60 on
    ens = fake_ensemble(t, C, 2, discarded=dw)
    mask, info = tr.trust_mask(ens)
    assert info["source"] == "discarded_weight" and "discarded weight" in info["criterion"]
    assert info["n_untrusted"] == (t.size - 60) * C.shape[2]
    assert not mask[1, 60:].any() and mask[0].all()
    s = report.summarize(ens, n_boot=50)
    assert s["trust"]["source"] == "discarded_weight"
    assert s["trusted_fraction"] == pytest.approx(1 - (t.size - 60) / (4 * t.size))
    assert s["largest_discarded_weight"] == pytest.approx(1e-2)
