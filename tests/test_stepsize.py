"""Trotter splittings and dt = "auto".

* Every splitting has the order it claims: on random Hermitian A, B (independent of the package) the error of
  exp(-i(A+B)T) over T = 1 drops by 2^p when the step halves (Omelyan et al., CPC 146, 188 (2002); Blanes and
  Moan, J. Comput. Appl. Math. 142, 313 (2002); Suzuki, Phys. Lett. A 146, 319 (1990)).
* The engine without truncation equals the dense Trotter product of the same splitting (so the dense
  product measures Trotter error alone), and the dense exact reference equals scipy-based exact evolution.
* dt = "auto" is never less accurate than it claims: on chains larger than the window it measures, the
  Trotter error of C at the step it chose stays below trotter_tol up to the last time (dense exact evolution).
"""

import numpy as np
import pytest
import scipy.linalg as sla

import mpo_fronts as mf
from mpo_fronts.errors import InputError
from mpo_fronts.schedules import SPLITTINGS, layers_per_step, step_layers
from mpo_fronts.stepsize import auto_dt, estimate_trotter_error, exact_window_otoc, trotter_otoc

PAIRS = [(o, s) for o, names in SPLITTINGS.items() for s in names]


@pytest.mark.parametrize("order, splitting", PAIRS)
def test_every_splitting_has_its_order(order, splitting):
    rng = np.random.default_rng(0)
    A, B = (x + x.conj().T for x in (rng.normal(size=(6, 6)) + 1j * rng.normal(size=(6, 6)) for _ in range(2)))
    exact = sla.expm(-1j * (A + B))
    errs = []
    for n in (20, 40, 80):
        tau = 1.0 / n
        U = np.eye(6)
        for parity, c in step_layers(order, splitting):
            U = sla.expm(-1j * c * tau * (A if parity == 0 else B)) @ U
        errs.append(np.linalg.norm(np.linalg.matrix_power(U, n) - exact))
    for a, b in zip(errs, errs[1:]):
        assert a / b == pytest.approx(2 ** order, rel=0.1), errs
    # each parity's durations add up to the whole step
    assert sum(c for p, c in step_layers(order, splitting) if p == 0) == pytest.approx(1.0, abs=1e-14)
    assert sum(c for p, c in step_layers(order, splitting) if p == 1) == pytest.approx(1.0, abs=1e-14)


def test_costs_per_step():
    assert [layers_per_step(o, s) for o, s in PAIRS] == [2, 4, 10, 12]


@pytest.mark.parametrize("order, splitting", PAIRS)
def test_engine_without_truncation_equals_the_dense_trotter_product(order, splitting):
    chain = mf.xxz_chain(6, W=4.0, delta=0.7, seed=3)
    tau, steps = 0.1, [3, 7, 12]
    dense = trotter_otoc(chain, "Z", 2, tau, steps, order, splitting)
    res = mf.evolve_otoc(chain, "Z", 2, [tau * n for n in steps], chi=64, dt=tau, order=order, splitting=splitting)
    for v in "XYZ":
        np.testing.assert_allclose(res.otoc(v), dense[v], atol=1e-10)


def test_dense_exact_reference_matches_exact_otoc():
    chain = mf.mixed_field_ising_chain(6)
    ex = exact_window_otoc(chain, "X", 1, [0.5, 2.0])
    ref = mf.exact_otoc(chain, "X", 1, [0.5, 2.0])
    for v in "XYZ":
        np.testing.assert_allclose(ex[v], ref.otoc(v), atol=1e-12)


@pytest.mark.parametrize("W", [2.0, 6.0, 10.0])
@pytest.mark.parametrize("order, splitting", [(2, "standard"), (4, "blanes_moan")])
def test_auto_dt_meets_its_tolerance_on_a_larger_chain(W, order, splitting):
    chain = mf.xxz_chain(8, W=W, seed=5)
    for t_final, tol in ((20.0, 1e-3), (500.0, 1e-3), (20.0, 1e-4)):
        dt, info = auto_dt(chain, "Z", 4, t_final, order, splitting, tol)
        assert info["window"] == 6 < chain.L  # the estimate saw a part of the chain only
        n = int(np.ceil(t_final / dt))
        tau = t_final / n
        steps = np.unique(np.round(np.linspace(n / 5, n, 5)).astype(int))
        tr = trotter_otoc(chain, "Z", 4, tau, steps, order, splitting)
        ex = exact_window_otoc(chain, "Z", 4, steps * tau)
        err = max(np.abs(tr[v] - ex[v]).max() for v in tr)
        assert err <= tol, (W, order, splitting, t_final, dt, err)


def test_fit_is_in_the_asymptotic_regime():
    fit = estimate_trotter_error(mf.xxz_chain(8, W=6.0, seed=1), "Z", 4, 0.1, 4, "blanes_moan")
    assert fit["asymptotic"] and fit["ratio"] == pytest.approx(16, rel=0.3)


def test_evolve_otoc_with_dt_auto_against_exact_evolution():
    chain = mf.xxz_chain(6, W=6.0, seed=2)
    times = [1.0, 5.0, 20.0]
    res = mf.evolve_otoc(chain, "Z", 3, times, chi=64, dt="auto", trotter_tol=1e-4)
    ref = mf.exact_otoc(chain, "Z", 3, times)
    err = max(np.abs(res.otoc(v) - ref.otoc(v)).max() for v in "XYZ")
    assert err <= 1e-4
    m = res.meta
    assert m["dt"] == "auto" and m["order"] == 4 and m["splitting"] == "blanes_moan"
    assert 0 < m["dt_used"] <= 0.5 and m["trotter_estimate"]["tol"] == 1e-4
    assert m["trotter_estimate"]["predicted_error"] <= 1e-4


def test_engine_refuses_an_unresolved_auto_step():
    with pytest.raises(InputError, match="auto"):
        mf.OperatorTEBD(mf.xxz_chain(6), "Z", 0, mf.EvolutionSettings(dt="auto"))


def test_a_short_pilot_gives_a_finite_fit():
    # t_pilot / dt = 1.5 steps: the evenly spaced pilot steps round to 0 and 1; the step count 0 (t = 0) used to
    # divide the rounding-level error by zero and report A = inf, which made auto_dt fall to its smallest step.
    import warnings

    chain = mf.xxz_chain(8, W=6.0, seed=1)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)
        fit = estimate_trotter_error(chain, "Z", 4, 0.2, 4, "blanes_moan", t_pilot=0.3)
    assert np.isfinite(fit["A"]) and fit["A"] > 0
