"""u1.py: the U(1) charge-block engine against the Z2-graded engine, dense exact evolution and its own invariants."""

import dataclasses

import numpy as np
import pytest
import scipy.linalg

import mpo_fronts as mf
from interrupting import interrupt_repeatedly
from mpo_fronts.conventions import PAULI
from mpo_fronts.errors import InputError
from mpo_fronts.evolve import OperatorTEBD, bond_entropies
from mpo_fronts.readout import otoc_from_weights, product_state_otoc, read_operator
from mpo_fronts.u1 import _SWAP, QR_ITERATIONS, TO_CHARGE, ChargeTEBD, _partner, charge_gates

PROBES = "XYZ"


def run_z2(chain, site, times, chi, dt, order=2):
    """The Z2-graded Pauli-basis engine: (otoc (n_t, 3, L), weights, right_weight, discarded) at every time."""
    eng = OperatorTEBD(chain, "Z", site, chi=chi, dt=dt, order=order, graded=True)
    out = []
    for _, e in eng.run(times):
        r = read_operator(e.arrays, e.center)
        out.append((np.stack([otoc_from_weights(r["weights"], v) for v in PROBES]), r["weights"], r["right_weight"],
                    e.discarded_weight))
    return [np.array(x) for x in zip(*out)]


def run_u1(chain, site, times, chi, dt, order=2):
    eng = ChargeTEBD(chain, "Z", site, chi=chi, dt=dt, order=order)
    out = []
    for _, e in eng.run(times):
        p = e.profiles()
        out.append((np.stack([otoc_from_weights(p["weights"], v) for v in PROBES]), p["weights"], p["right_weight"],
                    e.discarded_weight))
    return [np.array(x) for x in zip(*out)] + [eng]


# ---------------------------------------------------------------------------------------- no truncation
@pytest.mark.parametrize("L, delta, W, site, order", [(6, 1.0, 2.0, 2, 2), (6, 0.4, 1.5, 0, 4), (7, 0.4, 1.5, 6, 2), (8, 1.7, 3.0, 4, 2),
                                                      (8, 0.0, 1.0, 7, 2)])
def test_equals_z2_engine_without_truncation(L, delta, W, site, order):
    # chi = 4^(L//2) is the largest operator Schmidt rank on L sites: nothing but numerical zeros is dropped
    chain = mf.xxz_chain(L, delta=delta, W=W, seed=10 + L)
    times = [0.2, 0.7, 1.5, 3.0]
    chi = 4 ** (L // 2)
    cz, wz, rz, dz = run_z2(chain, site, times, chi, dt=0.1, order=order)
    cu, wu, ru, du, eng = run_u1(chain, site, times, chi, dt=0.1, order=order)
    assert np.abs(cu - cz).max() < 1e-10  # C(r, t) for probes X, Y, Z, every site and time
    assert np.abs(wu - wz).max() < 1e-10
    assert np.abs(ru - rz).max() < 1e-10
    assert np.all(du < 1e-20) and np.all(dz < 1e-20)  # only values below the SVD floor (1e-13 of the largest)
    assert abs(eng.norm2() - 1.0) < 1e-12
    assert cz[-1].max() > 0.5  # the front has spread: the comparison is not between two near-empty profiles


def test_matches_dense_exact_evolution():
    # outside reference: dense exact evolution of W(t) (exact.exact_otoc, eigendecomposition of H); order 4 at
    # dt = 0.05 leaves a Trotter error of 1.4e-7 here (measured), below the tolerance
    chain = mf.xxz_chain(6, delta=0.6, W=2.5, seed=4)
    times = [0.3, 1.0, 2.0]
    ref = mf.exact_otoc(chain, w="Z", site=2, times=times)
    cu, wu, ru, du, _ = run_u1(chain, 2, times, chi=64, dt=0.05, order=4)
    for i, v in enumerate(PROBES):
        assert np.abs(cu[:, i] - ref.otoc(v)).max() < 1e-6
    assert np.abs(wu - ref.weights).max() < 1e-6
    assert np.abs(ru - ref.right_weight).max() < 1e-6
    assert ref.otoc("X").max() > 0.3


def test_real_pauli_arrays_feed_the_pauli_readout():
    # the real Pauli-basis MPS of ChargeTEBD in the layout of OperatorTEBD: the readout of mpo_fronts.readout, the
    # product-state OTOC and the bond entropies agree with the Z2 engine's
    chain = mf.xxz_chain(7, delta=0.9, W=1.0, seed=2)
    a = OperatorTEBD(chain, "Z", 3, chi=64, dt=0.1, graded=True)
    b = ChargeTEBD(chain, "Z", 3, chi=64, dt=0.1)
    for (_, ea), (_, eb) in zip(a.run([1.0, 2.5]), b.run([1.0, 2.5])):
        arr = eb.real_pauli_arrays()
        assert all(x.dtype == np.float64 for x in arr)
        ra, rb = read_operator(ea.arrays, ea.center), read_operator(arr, eb.center)
        assert np.abs(ra["weights"] - rb["weights"]).max() < 1e-10
        assert np.abs(rb["weights"] - eb.profiles()["weights"]).max() < 1e-10
        for v in PROBES:
            sa = product_state_otoc(ea.arrays, "0110100", v)
            assert np.abs(sa - product_state_otoc(arr, "0110100", v)).max() < 1e-10
        assert np.abs(bond_entropies(ea.arrays, ea.center) - bond_entropies(eb.arrays, eb.center)).max() < 1e-8


# ---------------------------------------------------------------------------------------- truncation
def test_truncation_ledger_is_the_norm_loss_and_stays_close_to_z2():
    # reference: the untruncated run (chi = 256 = 4^4 at L = 8). Measured (seed 5, t = 1..3): chi = 12 drops
    # 6.6e-3 of the weight, max |dC| vs the reference 0.101 (Z2 engine at the same chi: 6.4e-3 and 0.093), the two
    # engines differ by 0.016 (where the cut splits a degenerate (v, -v) pair, ChargeTEBD keeps or drops it
    # whole); at chi = 16 the cut falls between pairs and the engines agree to rounding.
    chain = mf.xxz_chain(8, delta=0.8, W=1.0, seed=5)
    times = [1.0, 2.0, 3.0]
    ref = run_z2(chain, 4, times, 256, dt=0.1)[0]
    for chi, same in ((12, False), (16, True)):
        cz, *_, dz = run_z2(chain, 4, times, chi, dt=0.1)
        cu, *_, du, eng = run_u1(chain, 4, times, chi, dt=0.1)
        assert du[-1] > 1e-4  # truncation matters here
        assert abs(eng.discarded_weight - (1.0 - eng.norm2())) < 1e-12
        assert abs(eng.ledger.by_bond.sum() - eng.discarded_weight) < 1e-14
        assert eng.max_bond <= chi
        err_u, err_z = np.abs(cu - ref).max(), np.abs(cz - ref).max()
        assert err_u <= 1.5 * err_z
        assert abs(du[-1] - dz[-1]) <= 0.1 * dz[-1]
        assert np.abs(cu - cz).max() < (1e-10 if same else 0.03)


def test_cutoff_and_hermitian_gauge_are_kept():
    # the invariants the engine relies on: sectors q and -q of every bond have one dimension, and
    # A[pi(l), abar, pi(r)] = conj(A[l, a, r]) (W(t) Hermitian, tensor by tensor); the cutoff bounds each drop
    chain = mf.xxz_chain(10, delta=1.0, W=2.0, seed=8)
    eng = ChargeTEBD(chain, "Z", 5, chi=40, dt=0.1, cutoff=1e-6)
    for _ in eng.run([2.0]):
        pass
    assert 0 < eng.discarded_weight and abs(eng.discarded_weight - (1.0 - eng.norm2())) < 1e-12
    for b in range(chain.L - 1):
        dims = eng.sector_dims(b)
        assert all(dims[q] == dims.get(-q) for q in dims)
    for k, A in enumerate(eng.arrays):
        pl, pr = _partner(eng._q(k - 1)), _partner(eng._q(k))
        assert np.abs(A[pl][:, _SWAP][:, :, pr] - A.conj()).max() < 1e-14
    # every gate dropped at most 1e-6 (the ledger counts gates per route)
    assert eng.discarded_weight <= 1e-6 * eng.splits["svd"]


def test_checkpoint_resume_repeats_the_uninterrupted_run():
    chain = mf.xxz_chain(10, W=3.0, seed=1)
    times = [0.5, 1.0, 1.5]
    full = ChargeTEBD(chain, "Z", 4, chi=20, dt=0.05, chunk=4)
    states = {}
    cs = [e.profiles()["weights"] for _, e in full.run(times)]

    first = ChargeTEBD(chain, "Z", 4, chi=20, dt=0.05, chunk=4)
    it = first.run(times, hook=lambda e: states.setdefault(e.blocks_done, e.state_dict()))
    next(it)
    resumed = ChargeTEBD(chain, "Z", 4, chi=20, dt=0.05, chunk=4)
    resumed.load_state_dict(states[3])
    out = [e.profiles()["weights"] for _, e in resumed.run(times)]
    assert np.array_equal(out[-1], cs[-1])
    assert resumed.discarded_weight == full.discarded_weight


# ---------------------------------------------------------------------------------------- gates
def test_charge_gates_match_the_trace_formula():
    # derived here: with e_a = (I, Z, sqrt2 S+, sqrt2 S-) orthonormal under Tr(A^dag B)/2, the Heisenberg gate in
    # this basis is G[S', S] = Tr(e_S'^dag U^dag e_S U) / 4 for U = exp(-i H_b tau); built from dense matrices
    chain = mf.xxz_chain(3, delta=0.7, W=2.0, seed=3)
    tau = 0.37
    hb = chain.bond_hamiltonians()
    e1 = np.einsum("ap,pij->aij", TO_CHARGE.conj(), PAULI)  # e_a = sum_p conj(T[a, p]) P_p
    e2 = np.einsum("aij,bkl->abikjl", e1, e1).reshape(16, 4, 4)
    G = charge_gates(hb, tau)
    for b in range(2):
        U = scipy.linalg.expm(-1j * tau * hb[b])
        ref = np.einsum("mji,jk,nkl,li->mn", e2.conj(), U.conj().T, e2, U) / 4
        assert np.abs(G[b] - ref).max() < 1e-13
        assert np.abs(G[b] @ G[b].conj().T - np.eye(16)).max() < 1e-13
        sw = (_SWAP[:, None] * 4 + _SWAP[None, :]).reshape(16)
        assert np.abs(G[b][np.ix_(sw, sw)] - G[b].conj()).max() < 1e-13  # Hermiticity is kept


# ---------------------------------------------------------------------------------------- errors
def test_chain_without_sz_conservation_is_refused():
    with pytest.raises(InputError, match="conserves total S\\^z") as info:
        ChargeTEBD(mf.mixed_field_ising_chain(6), "Z", 2, chi=16)
    assert info.value.arg == "chain" and "OperatorTEBD" in str(info.value)
    # a chain that claims conservation but does not have it is caught at its first gate
    liar = dataclasses.replace(mf.mixed_field_ising_chain(6), conserves_sz=True)
    eng = ChargeTEBD(liar, "Z", 2, chi=16, dt=0.1)
    with pytest.raises(InputError, match="does not conserve total S\\^z") as info:
        for _ in eng.run([0.1]):
            pass
    assert info.value.arg == "chain"


@pytest.mark.parametrize("kwargs, arg, word", [
    ({"w": "X"}, "w", "Z' only"), ({"w": "Y"}, "w", "Z' only"), ({"w": "Q"}, "w", "one of"),
    ({"truncation": "rsvd"}, "truncation", "'svd'"), ({"chi": 1}, "chi", "at least 2"),
])
def test_bad_arguments_raise_input_errors_naming_them(kwargs, arg, word):
    chain = mf.xxz_chain(6, W=1.0, seed=1)
    w = kwargs.pop("w", "Z")
    with pytest.raises(InputError, match=word) as info:
        ChargeTEBD(chain, w, 2, **{"chi": 16, **kwargs})
    assert info.value.arg == arg


# ---------------------------------------------------------------------------------------- the selection
@pytest.mark.parametrize("seed", range(6))
def test_pair_selection_is_the_best_within_chi(seed):
    # brute force over every choice of a prefix per block (block 0: single values, the others: (v, -v) pairs of
    # two indices each) that fits in chi: _keep finds the largest kept weight and reports the rest as dropped
    import itertools

    from mpo_fronts.u1 import _keep

    rng = np.random.default_rng(seed)
    svals = [np.sort(rng.random(n))[::-1] for n in (5, 4, 3)]
    mult = [1, 2, 2]
    total = sum(m * np.sum(s * s) for s, m in zip(svals, mult))
    for chi in (2, 3, 5, 8, 11):
        counts, disc = _keep(svals, mult, chi, 0.0)
        assert sum(c * m for c, m in zip(counts, mult)) <= chi
        best = max(sum(m * np.sum(s[:c] ** 2) for s, m, c in zip(svals, mult, cs))
                   for cs in itertools.product(*(range(s.size + 1) for s in svals))
                   if sum(c * m for c, m in zip(cs, mult)) <= chi)
        kept = sum(m * np.sum(s[:c] ** 2) for s, m, c in zip(svals, mult, counts))
        assert abs(kept - best) < 1e-12 and abs(disc - (total - kept)) < 1e-12


# ---------------------------------------------------------------------------------------- through the driver
def test_driver_with_u1_equals_z2_without_truncation():
    # the whole driver path (mf.evolve_otoc): every measurement it records (OTOCs of every probe, weights,
    # right-weight profile, truncation record, bond entropies, product-state OTOCs) from ChargeTEBD equals the
    # Z2 engine's where neither truncates (chi = 4^3, the largest operator Schmidt rank at L = 7)
    chain = mf.xxz_chain(7, delta=0.8, W=1.5, seed=3)
    times = [0.5, 1.0, 2.5]
    kw = dict(w="Z", site=3, times=times, chi=64, dt=0.1, state="0110100")
    z2 = mf.evolve_otoc(chain, **kw)
    u1 = mf.evolve_otoc(chain, **kw, symmetry="u1")
    assert z2.meta["symmetry_used"] == "z2" and z2.meta["engine"] == "OperatorTEBD"
    assert u1.meta["symmetry_used"] == "u1" and u1.meta["engine"] == "ChargeTEBD" and u1.meta["symmetry"] == "u1"
    for v in PROBES:
        assert np.abs(u1.otoc(v) - z2.otoc(v)).max() < 1e-10
        assert np.abs(u1.state_otoc[v] - z2.state_otoc[v]).max() < 1e-10
    assert np.abs(u1.weights - z2.weights).max() < 1e-10
    assert np.abs(u1.right_weight - z2.right_weight).max() < 1e-10
    assert np.abs(u1.bond_entropy - z2.bond_entropy).max() < 1e-8
    assert u1.bond_discarded.shape == z2.bond_discarded.shape == (3, 6)
    assert np.all(u1.bond_discarded < 1e-20) and np.array_equal(u1.max_bond, z2.max_bond)
    assert z2.otoc("X")[-1].max() > 0.3  # the front has spread
    # the infinite-temperature readout too, on the same run
    inf = mf.evolve_otoc(chain, "Z", 3, times, chi=64, dt=0.1, symmetry="u1")
    z2i = mf.evolve_otoc(chain, "Z", 3, times, chi=64, dt=0.1)
    assert np.abs(inf.otoc("X") - z2i.otoc("X")).max() < 1e-10


def _fake_auto_dt(chain, w, site, t_final, order, splitting, tol):
    """Stands in for mpo_fronts.stepsize.auto_dt (tested in test_stepsize.py), which takes tens of seconds."""
    return 0.1, {"A": 0.0, "window": 6, "t_pilot": 1.0, "ratio": 16.0, "predicted_error": 0.0, "safety": 0.5,
                 "tol": tol}


def test_auto_symmetry_picks_u1_only_with_dt_auto_for_z_on_conserving_chains(monkeypatch):
    from mpo_fronts import stepsize
    from mpo_fronts.settings import EvolutionSettings

    from mpo_fronts.settings import U1_MIN_CHI

    xxz, ising = mf.xxz_chain(6, W=1.0, seed=1), mf.mixed_field_ising_chain(6)
    auto = EvolutionSettings(dt="auto")
    assert auto.symmetry == "auto" and auto.engine_symmetry(xxz, "Z") == "u1"
    assert auto.engine_symmetry(xxz, "X") == "z2" and auto.engine_symmetry(ising, "Z") == "z2"
    assert auto.replace(truncation="rsvd").engine_symmetry(xxz, "Z") == "z2"
    assert auto.replace(chi=U1_MIN_CHI - 1).engine_symmetry(xxz, "Z") == "z2"  # small chi: Z2 is cheaper
    assert auto.replace(chi=U1_MIN_CHI - 1, symmetry="u1").engine_symmetry(xxz, "Z") == "u1"
    assert EvolutionSettings(dt=0.1).engine_symmetry(xxz, "Z") == "z2"  # a numeric dt: today's engine
    assert EvolutionSettings(dt=0.1, symmetry="u1").engine_symmetry(xxz, "Z") == "u1"
    monkeypatch.setattr(stepsize, "auto_dt", _fake_auto_dt)
    res = mf.evolve_otoc(xxz, "Z", 2, [0.5], chi=32, dt="auto")
    assert res.meta["symmetry_used"] == "u1" and res.meta["symmetry"] == "auto" and res.meta["order"] == 4
    assert res.meta["engine"] == "ChargeTEBD" and res.meta["dt_used"] == 0.1
    for chain, w, kw in ((xxz, "X", {}), (ising, "Z", {}), (xxz, "Z", {"dt": 0.1}), (xxz, "Z", {"chi": 16})):
        assert mf.evolve_otoc(chain, w, 2, [0.5], **{"chi": 32, "dt": "auto", **kw}).meta["symmetry_used"] == "z2"


@pytest.mark.parametrize("chain, w, kw", [
    (mf.mixed_field_ising_chain(6), "Z", {}),
    (mf.xxz_chain(6, W=1.0, seed=1), "X", {}),
    (mf.xxz_chain(6, W=1.0, seed=1), "Y", {"dt": "auto"}),
])
def test_u1_symmetry_is_refused_where_it_cannot_work(chain, w, kw):
    with pytest.raises(InputError, match="symmetry = 'u1'") as info:
        mf.evolve_otoc(chain, w, 2, [0.5], chi=16, symmetry="u1", **kw)
    assert info.value.arg == "symmetry" and "'z2'" in str(info.value)


def test_u1_settings_errors_name_the_key():
    from mpo_fronts.settings import EvolutionSettings

    for kw, word in (({"symmetry": "u2"}, "\"auto\", \"z2\" or \"u1\""), ({"symmetry": 1}, "symmetry must"),
                     ({"symmetry": "u1", "truncation": "rsvd"}, "truncation = 'svd'"),
                     ({"symmetry": "u1", "chi": 1}, "chi >= 2")):
        with pytest.raises(InputError, match=word) as info:
            EvolutionSettings(**kw)
        assert info.value.arg == "symmetry"
    for kw, word in (({"gate_update": "QR"}, "\"svd\" or \"qr\""),
                     ({"gate_update": "qr", "symmetry": "z2"}, "option of the U\\(1\\) engine")):
        with pytest.raises(InputError, match=word) as info:
            EvolutionSettings(**kw)
        assert info.value.arg == "gate_update"
    with pytest.raises(InputError, match="this run uses the Z2 engine") as info:  # numeric dt keeps Z2
        mf.evolve_otoc(mf.xxz_chain(6, W=1.0, seed=1), "Z", 2, [0.5], chi=32, dt=0.1, gate_update="qr")
    assert info.value.arg == "gate_update"
    from mpo_fronts.driver import evolve

    with pytest.raises(InputError, match="graded") as info:
        evolve(mf.xxz_chain(6, W=1.0, seed=1), "Z", 2, [0.5],
                         EvolutionSettings(chi=8, dt=0.1, symmetry="u1"), graded=True)
    assert info.value.arg == "graded"


def _u1_description(**evolution):
    from mpo_fronts.config import parse_description

    return parse_description({"model": {"kind": "xxz", "L": 6, "W": 1.0, "delta": 0.7},
                              "operators": {"w": "Z", "site": 2, "v": ["X", "Z"]},
                              "state": {"kind": "random_product", "samples": 2},
                              "times": {"values": [0.3, 0.8, 1.2]},
                              "evolution": {"chi": 8, "dt": 0.05, "chunk": 2, "symmetry": "u1", **evolution},
                              "ensemble": {"realizations": 1, "seed": 5},
                              "run": {"checkpoint_interval": 1e-6}})


@pytest.mark.parametrize("gate_update", ["svd", "qr"])
def test_ensemble_checkpoint_resume_with_u1_repeats_the_uninterrupted_run(tmp_path, gate_update):
    # through the run directory (HDF5 checkpoints with complex tensors and bond charges), interrupted three times;
    # with gate_update = "qr" the per-bond gate counts that decide SVD or QR are part of the checkpoint
    from mpo_fronts.ensemble import compute_realization, run_ensemble
    from mpo_fronts.store import RunDirectory

    d = _u1_description(gate_update=gate_update)
    run_ensemble(d, tmp_path / "ref", progress="none")
    rd = RunDirectory.create(tmp_path / "ck", d)

    for _ in interrupt_repeatedly(rd, d):  # interrupt three times, each after a few blocks
        ck = rd.load_checkpoint(0)
        assert ck is not None and ck["state"]["engine"] == "u1" and np.iscomplexobj(ck["state"]["arrays"][0])
    res = compute_realization(str(rd.path), d.to_dict(), 0, "final")
    assert res["status"] == "done" and res["resumed_from"] > 0
    a, b = mf.load(tmp_path / "ck"), mf.load(tmp_path / "ref")
    assert b.engine["symmetry_used"] == "u1" and a.engine["symmetry_used"] == "u1"
    for name in ("weights", "right_weight", "discarded_weight", "max_bond"):
        assert np.array_equal(getattr(a, name), getattr(b, name)), name
    for v in ("X", "Z"):
        assert np.array_equal(a.otoc(v), b.otoc(v))
    assert b.discarded_weight[0, -1] > 0  # chi = 8 truncates: the resume repeats the truncations too
    assert (a.engine["splits"].get("qr", 0) > 0) == (gate_update == "qr")  # the QR path ran, or never


def test_driver_resume_with_auto_symmetry_follows_the_checkpoint(monkeypatch):
    # with symmetry = "auto" a checkpoint is resumed by the engine that wrote it, bit for bit: a Z2 checkpoint of
    # an older dt = "auto" run by OperatorTEBD, a U(1) checkpoint by ChargeTEBD; an explicit other symmetry is an
    # error naming resume
    from mpo_fronts import stepsize
    from mpo_fronts.driver import Observer, evolve
    from mpo_fronts.settings import EvolutionSettings

    monkeypatch.setattr(stepsize, "auto_dt", _fake_auto_dt)
    chain = mf.xxz_chain(10, W=1.0, seed=2)
    times = [0.5, 3.0]

    class Save(Observer):
        def __init__(self):
            self.ck = None

        def after_block(self, engine, evolution):
            if engine.blocks_done == 3:
                self.ck = {"state": engine.state_dict(), "n_done": evolution.n_done, "wall_time": 0.0,
                           "restarts": 0, "outputs": {k: v.copy() for k, v in evolution.outputs().items()}}

    for dt, written, other in (("auto", "z2", "u1"), (0.1, "u1", "z2")):
        s = EvolutionSettings(chi=32, dt=dt, chunk=2)
        save = Save()
        full = evolve(chain, "Z", 4, times, s.replace(symmetry=written), observers=[save])
        resumed = evolve(chain, "Z", 4, times, s, resume=save.ck)
        assert s.engine_symmetry(chain, "Z") == other  # what a fresh run would have used
        assert resumed.engine["symmetry_used"] == written and resumed.restarts == 1
        assert full.arrays["discarded_weight"][-1] > 0
        for name in full.arrays:
            assert np.array_equal(full.arrays[name], resumed.arrays[name]), name
        with pytest.raises(InputError, match=f"checkpoint was written by the '{written}' engine") as info:
            evolve(chain, "Z", 4, times, s.replace(symmetry=other), resume=save.ck)
        assert info.value.arg == "resume"


def test_fronts_run_of_a_u1_description_end_to_end(tmp_path, capsys):
    from mpo_fronts.cli import main

    toml = tmp_path / "run.toml"
    toml.write_text('[model]\nkind = "xxz"\nL = 6\nW = 1.0\n\n[operators]\nw = "Z"\nsite = 2\n\n'
                    '[times]\nvalues = [0.5, 1.0]\n\n[evolution]\nchi = 16\ndt = 0.1\nsymmetry = "u1"\n\n'
                    '[ensemble]\nrealizations = 1\nseed = 4\n')
    assert main(["run", str(toml), "--out", str(tmp_path / "out"), "--progress", "none"]) == 0
    ens = mf.load(tmp_path / "out")
    assert ens.engine["symmetry"] == "u1" and ens.engine["symmetry_used"] == "u1"
    chain = mf.xxz_chain(6, fields=ens.fields[0])
    ref = mf.evolve_otoc(chain, "Z", 2, [0.5, 1.0], chi=16, dt=0.1)  # the Z2 engine, nothing truncated at L = 6
    assert np.abs(ens.otoc("X")[0] - ref.otoc("X")).max() < 1e-10
    # a description asking for u1 where it cannot work exits 2 naming the key, before anything is written
    bad = tmp_path / "bad.toml"
    bad.write_text(toml.read_text().replace('w = "Z"', 'w = "X"'))
    capsys.readouterr()
    assert main(["run", str(bad), "--out", str(tmp_path / "bad")]) == 2
    err = " ".join(capsys.readouterr().err.split())
    assert "evolution.symmetry" in err and "'Z' only" in err and not (tmp_path / "bad").exists()


def test_qr_gate_keeps_the_invariants_and_matches_the_svd_with_two_subspace_iterations():
    # ChargeTEBD._qr_gate (gate_update = "qr"; scripts/bench/u1_qr_gate.py): once a bond is at chi, a gate is
    # truncated by QR_ITERATIONS subspace iterations from the old bond basis, each closed by a QR. Reference:
    # the untruncated run (chi = 256 = 4^4 at L = 8, no truncation, equal to dense exact evolution by the tests
    # above). Measured (seed 5, t = 1..3, chi = 16, a QR gate on 3 of every 4 gates of a saturated bond): the
    # SVD route drops 4.5324e-4 of the weight and is off by 7.211e-4; one iteration drops 4.559e-4 and is off
    # by 7.44e-4; two iterations (the default) drop 4.5324e-4 and are off by 7.211e-4, the SVD's to 1e-8
    assert QR_ITERATIONS == 2
    chain = mf.xxz_chain(8, delta=0.8, W=1.0, seed=5)
    times = [1.0, 2.0, 3.0]
    ref = run_z2(chain, 4, times, 256, dt=0.1)[0]
    cs, *_, ds, _ = run_u1(chain, 4, times, 16, dt=0.1)

    def qr_run(iters):
        eng = ChargeTEBD(chain, "Z", 4, chi=16, dt=0.1, gate_update="qr")
        assert eng._qr_iters == QR_ITERATIONS
        eng._qr_every, eng._qr_iters = 4, iters
        out = []
        for _, e in eng.run(times):
            w = e.profiles()["weights"]
            out.append([otoc_from_weights(w, v) for v in PROBES])
        return np.array(out), eng

    err_s = np.abs(cs - ref).max()
    assert err_s > 5e-4
    one, eng1 = qr_run(1)
    assert ds[-1] * 1.003 < eng1.discarded_weight <= 1.05 * ds[-1]  # one iteration: measurably above the SVD
    assert err_s < np.abs(one - ref).max() <= 1.1 * err_s
    cq, eng = qr_run(QR_ITERATIONS)
    assert sum(eng._qr_count.values()) > 3 * len(eng._qr_count)  # the QR path ran (most gates after saturation)
    assert abs(eng.discarded_weight - (1.0 - eng.norm2())) < 1e-12  # the ledger is still the norm loss
    assert ds[-1] <= eng.discarded_weight <= 1.0001 * ds[-1]  # the optimal truncation's weight, nearly
    assert abs(np.abs(cq - ref).max() - err_s) < 1e-3 * err_s
    assert np.abs(cq[:, 0] - cq[:, 1]).max() < 1e-12  # C_X = C_Y: the Hermitian gauge survives
    for b in range(chain.L - 1):
        dims = eng.sector_dims(b)
        assert all(dims[q] == dims.get(-q) for q in dims)
    again, _ = qr_run(QR_ITERATIONS)
    np.testing.assert_array_equal(again, cq)  # deterministic
