"""evolve.py: the TEBD engine against dense exact evolution, closed forms and Bessel functions."""

import numpy as np
import pytest
import scipy.special

import mpo_fronts as mf
from mpo_fronts.errors import InputError
from mpo_fronts.evolve import OperatorTEBD
from mpo_fronts.schedules import block_layers, step_layers, step_plan
import mpo_fronts.readout
import mpo_fronts.truncation
from mpo_fronts.exact import free_fermion_otoc

BIG = 4096  # bond dimension never reached at these sizes: no truncation beyond numerical zeros


def max_dev(a, b):
    return max(np.abs(a.otoc(v) - b.otoc(v)).max() for v in "XYZ")


# ---------------------------------------------------------------------------------------- exactness
CASES = [
    ("xxz", 8, "Z", 0), ("xxz", 8, "Z", 4), ("xxz", 8, "X", 0), ("xxz", 8, "X", 3), ("xxz", 10, "Z", 0),
    ("mfi", 10, "Z", 0), ("mfi", 10, "X", 5), ("mfi", 9, "X", 0), ("mfi", 9, "Z", 4),
]


def make_chain(kind, L):
    if kind == "xxz":
        return mf.xxz_chain(L, delta=1.0, W=1.5, seed=L)
    return mf.mixed_field_ising_chain(L)


@pytest.mark.parametrize("kind, L, w, site", CASES)
def test_engine_matches_dense_exact(kind, L, w, site):
    # reference: dense exact evolution with scipy/numpy eigendecomposition (exact.py)
    chain = make_chain(kind, L)
    ts = [0.3, 0.8]
    res = mf.evolve_otoc(chain, w=w, site=site, times=ts, chi=BIG, dt=0.02, order=4)
    ref = mf.exact_otoc(chain, w=w, site=site, times=ts)
    assert max_dev(res, ref) <= 1e-6
    assert np.all(res.discarded_weight < 1e-20)


def trotter_error(chain, order, dt, t=1.0):
    res = mf.evolve_otoc(chain, w="Z", site=0, times=[t], chi=BIG, dt=dt, order=order)
    ref = mf.exact_otoc(chain, w="Z", site=0, times=[t])
    return max_dev(res, ref)


@pytest.mark.parametrize("order, dt, expected", [(2, 0.1, 4.0), (4, 0.2, 16.0)])
def test_measured_trotter_order(order, dt, expected):
    # error ratio when dt halves: 2^order for an order-`order` schedule (common practice)
    chain = mf.mixed_field_ising_chain(6)
    ratio = trotter_error(chain, order, dt) / trotter_error(chain, order, dt / 2)
    assert expected * 0.85 < ratio < expected * 1.15, ratio


def test_schedules_are_consistent():
    for order in (2, 4):
        layers = step_layers(order)
        for parity in (0, 1):
            assert abs(sum(c for p, c in layers if p == parity) - 1.0) < 1e-14
        merged = block_layers(order, 5, 0.1)
        assert all(merged[i][0] != merged[i + 1][0] for i in range(len(merged) - 1))
        assert abs(sum(d for p, d in merged if p == 0) - 0.5) < 1e-13
    # output times are hit exactly, steps never exceed dt
    plan = step_plan([0.0, 0.25, 1.0, 3.7], dt=0.1, chunk=7)
    assert max(tau for _, n, tau in plan if n) <= 0.1 + 1e-15
    for k, t in enumerate([0.0, 0.25, 1.0, 3.7]):
        assert abs(sum(n * tau for kk, n, tau in plan if kk <= k) - t) < 1e-12
    assert all(n <= 7 for _, n, _ in plan)


# ---------------------------------------------------------------------------------------- closed forms
def test_free_fermions_large_chain_trotterized_closed_form():
    # Trotterized free-fermion closed form (Jordan-Wigner: the same schedule of single-particle bond exponentials
    # gives the exact Trotterized C_ZZ = 4|G|^2(1-|G|^2), derived in exact.free_fermion_otoc): isolates truncation error at L = 64
    L, dt, order = 64, 0.05, 2
    chain = mf.xxz_chain(L, delta=0.0, W=1.0, seed=64)
    ts = [0.5, 1.0, 2.0, 4.0]
    res = mf.evolve_otoc(chain, w="Z", site=20, times=ts, chi=16, dt=dt, order=order)
    ref = free_fermion_otoc(chain, site=20, times=ts, dt=dt, order=order)
    assert np.abs(res.otoc("Z") - ref).max() <= 1e-9
    assert res.max_bond.max() < 16  # the free-fermion operator has a small exact bond dimension


def test_clean_xx_chain_bessel_values():
    # infinite XX chain: |G_0r(t)|^2 = J_r(Jt)^2 (hopping J/2: G_0r = i^r J_r(Jt), a standard Bessel identity);
    # C_ZZ = 4 |G|^2 (1 - |G|^2) (Lin & Motrunich, PRB 98, 134305 (2018))
    L, i = 40, 20
    chain = mf.xxz_chain(L, delta=0.0)
    ts = [0.5, 1.0, 4.0, 5.0]
    res = mf.evolve_otoc(chain, w="Z", site=i, times=ts, chi=16, dt=0.05, order=4)  # Trotter error ~4e-9
    C = res.otoc("Z")
    for k, t in enumerate(ts):
        for r in range(0, 11):
            g2 = scipy.special.jv(r, t) ** 2
            assert abs(C[k, i + r] - 4 * g2 * (1 - g2)) < 1e-8
    # check values: 4 J_r(t)^2 (1 - J_r(t)^2) evaluated with scipy.special.jv
    listed = {(1, 0.5): 0.2209960772, (3, 1.0): 0.0015303134, (5, 4.0): 0.0685699637, (10, 5.0): 8.6177599e-06}
    for (r, t), val in listed.items():
        assert abs(C[ts.index(t), i + r] - val) < 1e-8 * max(1.0, val * 1e3)


def test_early_time_growth_exponent():
    # C(r, t) ~ t^(2|r - i|) at early times (common practice: lowest order of the BCH series); in the
    # Heisenberg chain every order of t moves the operator by one site
    chain = mf.xxz_chain(8, W=1.0, seed=1)
    i = 3
    t1, t2 = 0.01, 0.02
    res = mf.evolve_otoc(chain, w="Z", site=i, times=[t1, t2], chi=BIG, dt=1e-4, order=2)
    C = res.otoc("X")
    for r in (0, 1, 2, 4, 5, 6, 7):
        slope = np.log(C[1, r] / C[0, r]) / np.log(t2 / t1)
        d = abs(r - i)
        assert abs(slope - 2 * d) < (0.01 if d <= 3 else 0.1), (r, slope)


# ---------------------------------------------------------------------------------------- truncation
def test_discarded_weight_equals_norm_loss_and_error_shrinks_with_chi():
    chain = mf.mixed_field_ising_chain(10)
    ts = [1.0, 2.5]
    ref = mf.exact_otoc(chain, w="Z", site=5, times=ts)
    errors = []
    for chi in (4, 8, 16, 48):
        eng = OperatorTEBD(chain, w="Z", site=5, chi=chi, dt=0.05, order=2)
        for _ in eng.run(ts):
            pass
        assert eng.max_bond <= chi
        # orthogonal gates conserve the Frobenius weight: the ledger is the norm loss
        assert abs(eng.discarded_weight - (1.0 - eng.norm2())) < 1e-12
        res = mf.evolve_otoc(chain, w="Z", site=5, times=ts, chi=chi, dt=0.05, order=2)
        if chi <= 8:
            assert res.discarded_weight[-1] > 1e-6
        assert np.all(np.diff(res.discarded_weight) >= 0)
        errors.append(max_dev(res, ref))
    assert errors[0] > errors[1] > errors[2] > errors[3]
    assert errors[-1] < 1e-2


def test_cutoff_truncates_by_discarded_weight():
    chain = mf.mixed_field_ising_chain(8)
    r_full = mf.evolve_otoc(chain, w="Z", site=4, times=[1.5], chi=BIG, dt=0.05)
    r_cut = mf.evolve_otoc(chain, w="Z", site=4, times=[1.5], chi=BIG, dt=0.05, cutoff=1e-10)
    assert r_cut.max_bond[-1] < r_full.max_bond[-1] / 2
    eps = r_cut.discarded_weight[-1]
    assert 0 < eps < 1e-10 * 30 * 7  # at most the cutoff per truncation (30 steps x 7 bonds x 2 layers / 2)
    # an operator error of weight eps moves C by O(sqrt(eps)) at most
    assert max_dev(r_cut, r_full) < 2 * np.sqrt(eps)


@pytest.mark.parametrize("graded, truncation", [(False, "svd"), (True, "svd"), (False, "rsvd")])
def test_checkpoint_restore_reproduces_uninterrupted_run(graded, truncation):
    chain = mf.xxz_chain(12, W=2.0, seed=1) if truncation == "svd" else mf.mixed_field_ising_chain(12)
    ts = [0.5, 1.0, 1.5, 2.0] if truncation == "svd" else [1.0, 2.0, 2.5, 3.0]  # rsvd: bonds saturated by then
    kw = dict(w="Z", site=0 if truncation == "svd" else 6, chi=16, dt=0.05, chunk=5, graded=graded,
              truncation=truncation)
    full = OperatorTEBD(chain, **kw)
    for _ in full.run(ts):
        pass
    if truncation == "rsvd":
        assert full.splits["rsvd"] > 0
    saved = {}
    part = OperatorTEBD(chain, **kw)
    at = 3 if truncation == "svd" else 6  # mid-way between outputs 0 and 1

    def hook(e):
        if e.blocks_done == at:
            saved.setdefault(at, e.state_dict())

    for k, e in part.run(ts, hook=hook):
        if k == 1:
            break
    again = OperatorTEBD(chain, **kw)
    again.load_state_dict(saved[at])
    rest = {k: e for k, e in again.run(ts)}
    assert min(rest) == 1  # continues after the blocks done; does not repeat output 0
    if truncation == "rsvd":
        assert again.splits["rsvd"] > 0  # the resumed part took the randomized route
    assert abs(again.discarded_weight - full.discarded_weight) < 1e-15
    assert all(np.array_equal(a, b) for a, b in zip(again.arrays, full.arrays))


def test_product_state_average_over_basis_equals_infinite_temperature():
    # averaging C_s over all 2^L basis states gives the infinite-temperature OTOC (sum_s <s|A|s> = Tr A; common practice)
    L = 4
    chain = mf.xxz_chain(L, W=1.0, seed=3)
    ts = [0.7, 1.4]
    inf = mf.evolve_otoc(chain, w="X", site=1, times=ts, chi=BIG, dt=0.05)
    acc = {v: 0.0 for v in "XYZ"}
    for n in range(2**L):
        bits = format(n, f"0{L}b")
        r = mf.evolve_otoc(chain, w="X", site=1, times=ts, chi=BIG, dt=0.05, state=bits)
        for v in acc:
            acc[v] = acc[v] + r.otoc(v) / 2**L
    for v in "XYZ":
        assert np.abs(acc[v] - inf.otoc(v)).max() < 1e-12


def test_product_state_otoc_matches_dense_exact():
    chain = mf.xxz_chain(8, W=2.0, seed=8)
    ts = [0.4, 0.9]
    for bits, w, site in [("01101001", "Z", 3), ("00001111", "X", 0)]:
        res = mf.evolve_otoc(chain, w=w, site=site, times=ts, chi=BIG, dt=0.02, order=4, state=bits)
        ref = mf.exact_otoc(chain, w=w, site=site, times=ts, state=bits)
        assert max_dev(res, ref) < 1e-6


def test_right_weight_front_profile_matches_exact():
    chain = mf.mixed_field_ising_chain(9)
    res = mf.evolve_otoc(chain, w="Z", site=0, times=[0.5, 1.0], chi=BIG, dt=0.02, order=4)
    ref = mf.exact_otoc(chain, w="Z", site=0, times=[0.5, 1.0])
    assert np.abs(res.right_weight - ref.right_weight).max() < 1e-6
    assert np.allclose(res.right_weight.sum(axis=1), 1.0)


def test_quimb_mps_boundary():
    eng = OperatorTEBD(mf.xxz_chain(6), w="Z", site=2, chi=8, dt=0.1)
    for _ in eng.run([0.5]):
        pass
    mps = eng.to_mps()
    assert mps.L == 6 and mps.phys_dim() == 4
    assert abs(mps.H @ mps - eng.norm2()) < 1e-12


# ---------------------------------------------------------------------------------------- bad input
@pytest.mark.parametrize(
    "kwargs, word",
    [
        ({"w": "Q"}, "w"),
        ({"site": 12}, "site"),
        ({"site": -1}, "site"),
        ({"chi": 0}, "chi"),
        ({"chi": 2.5}, "chi"),
        ({"dt": -0.1}, "dt"),
        ({"dt": float("nan")}, "dt"),
        ({"order": 3}, "order"),
        ({"cutoff": -1e-3}, "cutoff"),
        ({"times": [1.0, 0.5]}, "increasing"),
        ({"times": [-1.0]}, "times"),
        ({"times": [np.inf]}, "finite"),
        ({"times": []}, "times"),
        ({"state": "0101"}, "state"),
        ({"state": "01010101012x"}, "state"),
    ],
)
def test_bad_engine_inputs_raise_clear_errors(kwargs, word):
    chain = mf.xxz_chain(12)
    args = dict(w="Z", site=0, times=[1.0], chi=8, dt=0.1)
    args.update(kwargs)
    with pytest.raises(InputError, match=word):
        mf.evolve_otoc(chain, **args)


def test_chain_must_be_a_chain():
    with pytest.raises(InputError, match="chain"):
        mf.evolve_otoc("xxz", times=[1.0])


# ---------------------------------------------------------------------------------------- Z2 grading
@pytest.mark.parametrize("w, site", [("Z", 0), ("X", 3), ("Y", 5)])
def test_graded_blocks_equal_dense_engine(w, site):
    # optimization check: the Z2-graded engine gives the ungraded engine's results (no truncation: 1e-10;
    # with truncation the same singular values are kept: the ledgers agree to 1e-7 relative)
    chain = mf.xxz_chain(10, delta=0.7, W=2.0, seed=4)
    ts = [0.5, 1.0]
    runs = {}
    for graded in (False, True):
        eng = OperatorTEBD(chain, w=w, site=site, chi=BIG, dt=0.05, graded=graded)
        runs[graded] = [mf.readout.pauli_weights(e.arrays) for _, e in eng.run(ts)]
    assert np.abs(np.array(runs[True]) - np.array(runs[False])).max() < 1e-10
    led = {}
    for graded in (False, True):
        eng = OperatorTEBD(chain, w=w, site=site, chi=12, dt=0.05, graded=graded)
        for _ in eng.run([2.0]):
            pass
        led[graded] = eng.discarded_weight
    assert led[True] > 1e-6 and abs(led[True] - led[False]) < 1e-7 * led[False]


def test_graded_needs_conservation():
    with pytest.raises(InputError, match="graded"):
        OperatorTEBD(mf.mixed_field_ising_chain(6), graded=True)


# ---------------------------------------------------------------------------------------- truncation routes
def _matrix(rng, m, n, s):
    """m x n matrix with singular values s (random orthogonal factors)."""
    u, _ = np.linalg.qr(rng.normal(size=(m, s.size)))
    v, _ = np.linalg.qr(rng.normal(size=(n, s.size)))
    return (u * s) @ v.T


@pytest.mark.parametrize("m, n", [(96, 96), (160, 64), (64, 160)])
@pytest.mark.parametrize("to_right", [True, False])
def test_eigh_split_is_the_optimal_truncation(m, n, to_right):
    # check against numpy's SVD (LAPACK gesdd): a spectrum falling over 10-14 decades needs refinement passes of
    # the Gram route (one pass resolves about 5 decades of singular values); the kept singular values, their
    # subspace and the discarded weight must be those of the optimal rank-chi truncation
    rng = np.random.default_rng(m + 7 * n + to_right)
    s = 10.0 ** (-0.15 * np.arange(min(m, n)))  # 10 to 14 decades
    s /= np.sqrt(np.sum(s ** 2))
    theta = _matrix(rng, m, n, s)
    chi = 50
    left, right, lab, disc, route = mf.truncation.split(theta, chi, 0.0, to_right, truncation="eigh")
    assert route == "eigh" and lab is None and left.shape[1] == chi
    iso = left.T @ left if to_right else right @ right.T
    assert np.abs(iso - np.eye(chi)).max() < 1e-12
    # discarded weight to 1e-10 relative, or 1e-21 of the total weight (the SVD's own s^2 carry eps * s_max * s)
    assert abs(disc - np.sum(s[chi:] ** 2)) <= 1e-10 * np.sum(s[chi:] ** 2) + 1e-21
    err = np.sum((theta - left @ right) ** 2)
    assert abs(err - disc) <= 1e-8 * disc + 1e-21
    kept = np.linalg.svd(left @ right, compute_uv=False)[:chi]
    assert np.abs(kept / s[:chi] - 1).max() < 1e-6  # down to s = 5e-8 of the largest
    u, _, vt = np.linalg.svd(theta)
    exact = u[:, :chi] @ u[:, :chi].T if to_right else vt[:chi].T @ vt[:chi]
    mine = left @ left.T if to_right else right.T @ right
    # the cut lies where s is 3e-8 of its largest, 30 % gaps: even the SVD fixes this subspace only to about
    # eps * s_max / gap = 2e-8
    assert np.abs(mine - exact).max() < 1e-6


def test_eigh_split_graded_blocks_and_cutoff_match_svd():
    # the Z2-graded split and the cutoff rule give the SVD route's kept values, labels and discarded weight
    rng = np.random.default_rng(5)
    m, n = 120, 100
    row_par = rng.integers(0, 2, m).astype(np.int8)
    col_par = rng.integers(0, 2, n).astype(np.int8)
    theta = np.zeros((m, n))
    for p in (0, 1):
        r, c = np.flatnonzero(row_par == p), np.flatnonzero(col_par == p)
        s = 10.0 ** -np.linspace(p * 0.5, 9 + p, min(r.size, c.size))
        theta[np.ix_(r, c)] = _matrix(rng, r.size, c.size, s)
    theta /= np.linalg.norm(theta)
    for cutoff in (0.0, 1e-9):
        out = {tr: mf.truncation.split(theta, 40, cutoff, True, row_par, col_par, truncation=tr) for tr in ("svd", "eigh")}
        assert out["eigh"][4] == "eigh" and out["svd"][4] == "svd"
        assert sorted(out["eigh"][2]) == sorted(out["svd"][2])
        assert abs(out["eigh"][3] - out["svd"][3]) <= 1e-8 * out["svd"][3]
        for left, right, lab, *_ in out.values():
            assert np.all(theta[row_par == 0][:, col_par == 1] == 0)
            assert np.abs(left.T @ left - np.eye(left.shape[1])).max() < 1e-12
            # left vectors of parity p live on the rows of parity p
            assert np.all(left[row_par != 0][:, lab == 0] == 0) and np.all(left[row_par != 1][:, lab == 1] == 0)
        sv = {tr: np.sort(np.linalg.svd(o[0] @ o[1], compute_uv=False)[: o[0].shape[1]]) for tr, o in out.items()}
        assert np.abs(sv["eigh"] / sv["svd"] - 1).max() < 1e-6


def test_small_matrices_always_take_the_svd():
    theta = np.random.default_rng(0).normal(size=(40, 200))
    assert mf.truncation.split(theta, 8, 0.0, True, truncation="eigh")[4] == "svd"


def _svd_and(kind, L, chi, route, graded):
    """Weights at t = 1.5, 3, ledger, route counts and ledger-minus-norm-loss of the SVD engine and of ``route``."""
    chain = mf.mixed_field_ising_chain(L) if kind == "mfi" else mf.xxz_chain(L, delta=1.0, W=1.0, seed=3)
    out = {}
    for tr in ("svd", route):
        eng = OperatorTEBD(chain, w="Z", site=L // 2, chi=chi, dt=0.05, truncation=tr, graded=graded)
        w = np.array([mf.readout.pauli_weights(e.arrays).copy() for _, e in eng.run([1.5, 3.0])])
        out[tr] = (w, eng.discarded_weight, dict(eng.splits), eng.discarded_weight - (1.0 - eng.norm2()))
    return out


@pytest.mark.parametrize("kind, graded", [("mfi", False), ("xxz", False), ("xxz", True)])
def test_eigh_engine_equals_svd_engine(kind, graded):
    # the Gram route gives the SVD engine's C and ledger: measured differences at these sizes are about 1e-11
    # (|dw|, relative ahead of the front, ledger relative); tolerances 1e-8 leave a 100x+ margin
    out = _svd_and(kind, 12, 16, "eigh", graded)
    assert out["eigh"][2]["eigh"] > 100 and out["svd"][2]["eigh"] == 0
    a, b = out["svd"][0], out["eigh"][0]
    assert np.abs(a - b).max() < 1e-8
    ahead = (a > 1e-10) & (a < 1e-4)
    assert ahead.sum() > 5 and (np.abs(a - b)[ahead] / a[ahead]).max() < 1e-7
    assert out["svd"][1] > 1e-5 and abs(out["eigh"][1] - out["svd"][1]) < 1e-8 * out["svd"][1]


@pytest.mark.parametrize("to_right", [True, False])
@pytest.mark.parametrize("decay", ["steep", "flat"])
def test_rsvd_split_against_the_optimal_truncation(to_right, decay):
    # check against numpy's SVD (LAPACK gesdd). steep: 12 decades, the sampled subspace is exact to rounding and
    # the kept values and discarded weight are the optimal ones; flat (s_i = 0.97^i, the severe-truncation
    # regime): the sampled subspace is approximate, and the ledger must still be the true error, no smaller than
    # the optimal one and within 1 % of it (Halko et al. 2011, Thm 10.7 bounds the excess; measured 1e-3 and
    # 3e-3 here, kept values 2e-3 and 6e-3 low; on the engine's gate matrices the excess is about 1e-7)
    rng = np.random.default_rng(11 + to_right)
    m, n, chi = 300, 260, 50
    s = 10.0 ** (-0.15 * np.arange(n)) if decay == "steep" else 0.97 ** np.arange(n)
    s /= np.sqrt(np.sum(s ** 2))
    theta = _matrix(rng, m, n, s)
    left, right, lab, disc, route = mf.truncation.split(theta, chi, 0.0, to_right, truncation="rsvd")
    assert route == "rsvd" and lab is None and left.shape[1] == chi
    iso = left.T @ left if to_right else right @ right.T
    assert np.abs(iso - np.eye(chi)).max() < 1e-12
    err = np.sum((theta - left @ right) ** 2)
    optimal = np.sum(s[chi:] ** 2)
    # the ledger is the error actually made; its sampled-out part |m|^2 - |B|^2 is a difference of unit-scale
    # weights, exact to rounding of the total weight, hence the absolute term: 4e-15, about 20 ulps of 1 (the
    # OpenBLAS kernels of one CPU gave 1.1e-15 here, another less; the steep case's optimum is itself 1e-15)
    rounding = 4e-15
    assert abs(err - disc) <= 1e-10 * disc + rounding
    assert disc >= optimal * (1 - 1e-10) - rounding
    kept = np.linalg.svd(left @ right, compute_uv=False)[:chi]
    if decay == "steep":
        assert disc <= optimal * (1 + 1e-8) + rounding
        assert np.abs(kept / s[:chi] - 1).max() < 1e-6  # down to s = 3e-8 of the largest
    else:
        assert disc <= 1.01 * optimal
        assert np.all(kept <= s[:chi] * (1 + 1e-12)) and np.abs(kept / s[:chi] - 1).max() < 2e-2


def test_rsvd_split_graded_blocks_and_small_blocks():
    # graded: each Z2 block large enough (both sides >= 2 (chi + RSVD_OVERSAMPLE)) is sampled, the others take
    # the SVD; labels and kept values are the SVD route's; a small matrix takes the SVD route
    rng = np.random.default_rng(8)
    m, n, chi = 420, 380, 40
    row_par = (np.arange(m) >= 160).astype(np.int8)  # block sizes 160 x 150 (sampled) and 260 x 230 (sampled)
    col_par = (np.arange(n) >= 150).astype(np.int8)
    theta = np.zeros((m, n))
    for p in (0, 1):
        r, c = np.flatnonzero(row_par == p), np.flatnonzero(col_par == p)
        theta[np.ix_(r, c)] = _matrix(rng, r.size, c.size, 10.0 ** -np.linspace(p * 0.5, 10 + p, min(r.size, c.size)))
    theta /= np.linalg.norm(theta)
    out = {tr: mf.truncation.split(theta, chi, 0.0, True, row_par, col_par, truncation=tr) for tr in ("svd", "rsvd")}
    assert out["rsvd"][4] == "rsvd" and out["svd"][4] == "svd"
    assert sorted(out["rsvd"][2]) == sorted(out["svd"][2])
    assert abs(out["rsvd"][3] - out["svd"][3]) <= 1e-8 * out["svd"][3]
    sv = {tr: np.sort(np.linalg.svd(o[0] @ o[1], compute_uv=False)[: o[0].shape[1]]) for tr, o in out.items()}
    assert np.abs(sv["rsvd"] / sv["svd"] - 1).max() < 1e-6
    small = np.random.default_rng(0).normal(size=(100, 200))  # 100 < 2 (40 + 16)
    assert mf.truncation.split(small, 40, 0.0, True, truncation="rsvd")[4] == "svd"


@pytest.mark.parametrize("kind", ["mfi", "xxz"])
def test_rsvd_engine_equals_svd_engine(kind):
    # the randomized route gives the SVD engine's C and ledger: measured at these sizes |dw| 1e-10 (mixed-field
    # Ising) and 5e-13 (Heisenberg), relative ahead of the front 2e-12, ledger relative 2e-10; tolerances leave
    # 40x+ margin. At L = 32, chi = 64, 128 the changes are larger (README, Performance)
    out = _svd_and(kind, 14, 16, "rsvd", False)
    assert all(abs(o[3]) < 1e-12 for o in out.values())  # the ledger is the norm loss
    assert out["rsvd"][2]["rsvd"] > 100 and out["svd"][2]["rsvd"] == 0
    a, b = out["svd"][0], out["rsvd"][0]
    assert np.abs(a - b).max() < 1e-8
    ahead = (a > 1e-10) & (a < 1e-4)
    assert ahead.sum() > 5 and (np.abs(a - b)[ahead] / a[ahead]).max() < 1e-9
    assert out["svd"][1] > 1e-5 and abs(out["rsvd"][1] - out["svd"][1]) < 1e-8 * out["svd"][1]


def test_rsvd_test_matrix_does_not_depend_on_history():
    # the (n, l) test matrix is the same whether or not larger ones were drawn before: resumed runs and workers
    # truncate every block identically
    mf.truncation._TEST_MATRICES.clear()
    small = mf.truncation._test_matrix(50, 20).copy()
    mf.truncation._TEST_MATRICES.clear()
    mf.truncation._test_matrix(500, 20)
    assert np.array_equal(mf.truncation._test_matrix(50, 20), small)


def test_truncation_must_be_known():
    with pytest.raises(InputError, match="truncation"):
        OperatorTEBD(mf.xxz_chain(6), truncation="qr")


def test_keep_freed_memory_leaves_results_bit_identical():
    # optimization check: the allocator setting changes no arithmetic; the same run in two fresh processes,
    # with and without it, gives bit-identical weights and ledgers
    import subprocess
    import sys

    code = ("import numpy as np, mpo_fronts as mf, mpo_fronts.evolve as ev\n"
            "e = ev.OperatorTEBD(mf.xxz_chain(10, W=1.0, seed=2), w='Z', site=5, chi=32, dt=0.05)\n"
            "w = [mf.readout.pauli_weights(x.arrays).copy() for _, x in e.run([0.5, 1.0])]\n"
            "print(ev.keep_freed_memory(), np.array(w).tobytes().hex(), repr(e.discarded_weight))\n")
    out = {}
    for flag in ("0", "1"):
        env = {**__import__("os").environ, "MPO_FRONTS_KEEP_MEMORY": flag, "OPENBLAS_NUM_THREADS": "1"}
        res = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, check=True)
        out[flag] = res.stdout.split()
    assert out["0"][0] == "False"
    if sys.platform.startswith("linux"):
        assert out["1"][0] == "True"
    assert out["0"][1:] == out["1"][1:]
