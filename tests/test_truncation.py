"""truncation.py: the route registry, the ledger (total and per bond) and what a checkpoint restores."""

import numpy as np
import pytest

import mpo_fronts as mf
from mpo_fronts import truncation as tr
from mpo_fronts.errors import InputError
from mpo_fronts.evolve import OperatorTEBD


def test_registry_is_the_single_list_of_routes():
    assert set(tr.route_names()) >= {"svd", "rsvd", "eigh"}
    eng = OperatorTEBD(mf.xxz_chain(6, W=1.0, seed=1), "Z", 2, chi=8, dt=0.1)
    assert set(eng.splits) == set(tr.route_names())  # the counters derive from the registry
    with pytest.raises(InputError, match="truncation must be one of") as info:
        mf.EvolutionSettings(truncation="qr")
    assert info.value.arg == "truncation"
    with pytest.raises(InputError, match="registered already"):
        tr.register_route("svd", tr.ROUTES["svd"].split_blocks)


def test_a_registered_route_is_accepted_everywhere_and_observes_every_gate():
    seen = []
    base = tr.route("svd")

    def counting(blocks, chi, cutoff, to_right, shape):
        seen.append(shape)
        return base.split_blocks(blocks, chi, cutoff, to_right, shape)

    tr.register_route("counting_test_route", counting, "counts gates")
    try:
        chain = mf.mixed_field_ising_chain(8)
        res = mf.evolve_otoc(chain, "Z", 4, [0.5, 1.0], chi=16, dt=0.1, truncation="counting_test_route")
        ref = mf.evolve_otoc(chain, "Z", 4, [0.5, 1.0], chi=16, dt=0.1)
        assert len(seen) == sum(res.meta["splits"].values()) > 0
        assert np.array_equal(res.otoc("X"), ref.otoc("X"))  # the same arithmetic, bit for bit
    finally:
        tr.unregister_route("counting_test_route")
    assert "counting_test_route" not in tr.route_names()


def test_checkpoint_without_split_counters_resumes_on_the_randomized_route():
    # A state saved before the counters were stored (no 'splits' entry) must restore a counter for every
    # registered route; it used to rebuild only 'eigh' and 'svd', so the next rsvd gate raised KeyError.
    chain = mf.mixed_field_ising_chain(24)
    times = [2.0, 3.0]
    eng = OperatorTEBD(chain, "Z", 12, chi=24, dt=0.1, truncation="rsvd", chunk=5)
    gen = eng.run(times)
    next(gen)
    state = eng.state_dict()
    state.pop("splits")
    again = OperatorTEBD(chain, "Z", 12, chi=24, dt=0.1, truncation="rsvd", chunk=5)
    again.load_state_dict(state)
    for _ in again.run(times):
        pass
    for _ in gen:
        pass
    assert again.splits["rsvd"] > 0  # rsvd gates after the resume were counted
    assert all(np.array_equal(a, b) for a, b in zip(again.arrays, eng.arrays))


def test_per_bond_ledger_sums_to_the_total_and_to_the_norm_loss():
    chain = mf.mixed_field_ising_chain(12)
    res = mf.evolve_otoc(chain, "Z", 6, [1.0, 2.0, 3.0], chi=6, dt=0.1)
    assert res.discarded_weight[-1] > 1e-6  # truncation happened
    np.testing.assert_allclose(res.bond_discarded.sum(axis=1), res.discarded_weight, rtol=1e-12, atol=1e-16)
    assert np.all(np.diff(res.bond_discarded, axis=0) >= 0)  # cumulative
    assert res.bond_discarded.shape == (3, 11) and np.all(res.bond_discarded >= 0)
    eng = OperatorTEBD(chain, "Z", 6, chi=6, dt=0.1)
    for _ in eng.run([3.0]):
        pass
    assert abs(eng.discarded_weight - (1.0 - eng.norm2())) < 1e-12
    assert abs(eng.ledger.by_bond.sum() - eng.discarded_weight) < 1e-14


def test_ledger_state_round_trip():
    led = tr.TruncationLedger.empty(4)
    led.add(1, 0.25, "svd")
    led.add(3, 0.125, "rsvd")
    back = tr.TruncationLedger.from_state(led.state(), 4)
    assert back.total == led.total and np.array_equal(back.by_bond, led.by_bond) and back.splits == led.splits
    old = tr.TruncationLedger.from_state({"discarded_weight": 0.5}, 4)  # a 0.1.0 checkpoint: total only
    assert old.total == 0.5 and np.all(old.by_bond == 0) and set(old.splits) == set(tr.route_names())
