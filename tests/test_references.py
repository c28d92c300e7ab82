"""The S^z-sector exact references and the reference files under data/references/.

External references used here:
* dense exact evolution W(t) = expm(iHt) W expm(-iHt) with ``scipy.linalg.expm``, H built in this file term by
  term from Pauli matrices (independent of mpo_fronts.models), and C(r, t) = 1 - Re Tr[W V W V] / 2^L, or,
  for relative accuracy at tiny C, C = ||[W(t), V_r]||_F^2 / (2 * 2^L) (the same quantity written as a sum of
  positive terms; definition of the infinite-temperature OTOC);
* the second moment of Haar-random states, Var <psi|O|psi> = (Tr O^dag O / D - |Tr O / D|^2) / (D + 1)
  (textbook random-state result, from memory), for the typicality error bound;
* small-t expansion, derived here: W(t) = Z_i + i t [H, Z_i] + O(t^2) with, for the XXZ bond
  (J/4)(XX + YY + delta ZZ), [H, Z_i] = (iJ/2)(X_i Y_{i+1} - Y_i X_{i+1}) (+ the same on the left bond), so
  C_Z(i +- 1, t) = (J t)^2 + O(t^4) and C_X(i +- 1, t) = (J t)^2 / 2 + O(t^4), whatever delta and the fields;
  C(i + d, t) ~ t^(2d) at small t (lowest order of the commutator series; common practice).
"""

from __future__ import annotations

import importlib.util
import sys
from functools import reduce
from pathlib import Path

import numpy as np
import pytest
import scipy.linalg

import mpo_fronts as mf
from mpo_fronts.errors import InputError
from mpo_fronts.models import Chain
from mpo_fronts.references import (SectorSpectrum, reference_arrays, reference_from_arrays, sector_blocks,
                                   sector_otoc, sector_otocs, typicality_error_bound)

ROOT = Path(__file__).resolve().parents[1]
REF_DIR = ROOT / "data" / "references"

I2 = np.eye(2)
PX = np.array([[0, 1], [1, 0]], dtype=complex)
PY = np.array([[0, -1j], [1j, 0]], dtype=complex)
PZ = np.array([[1, 0], [0, -1]], dtype=complex)
P = {"X": PX, "Y": PY, "Z": PZ}


def op(L, site, m):
    """m at `site` of an L-site chain, site 0 the leftmost (most significant) factor."""
    return reduce(np.kron, [m if k == site else I2 for k in range(L)])


def dense_xxz(L, J, delta, h, dm=0.0):
    """H = sum_i (J/4)(X X + Y Y + delta Z Z) + (dm/4)(X Y - Y X) + sum_i (h_i/2) Z_i, from Pauli matrices."""
    H = sum(h[i] / 2 * op(L, i, PZ) for i in range(L))
    for i in range(L - 1):
        XX = op(L, i, PX) @ op(L, i + 1, PX)
        YY = op(L, i, PY) @ op(L, i + 1, PY)
        ZZ = op(L, i, PZ) @ op(L, i + 1, PZ)
        XY = op(L, i, PX) @ op(L, i + 1, PY) - op(L, i, PY) @ op(L, i + 1, PX)
        H = H + J / 4 * (XX + YY + delta * ZZ) + dm / 4 * XY
    return H


def dense_otoc(H, L, site, times, v, commutator=False):
    """C(r, t) at every r by dense expm evolution of W = Z at `site`."""
    W0 = op(L, site, PZ)
    out = np.empty((len(times), L))
    for k, t in enumerate(times):
        U = scipy.linalg.expm(-1j * H * t)
        Wt = U.conj().T @ W0 @ U
        for r in range(L):
            V = op(L, r, P[v])
            if commutator:
                K = Wt @ V - V @ Wt
                out[k, r] = np.vdot(K, K).real / (2 * 2**L)
            else:
                out[k, r] = 1 - np.trace(Wt @ V @ Wt @ V).real / 2**L
    return out


# ------------------------------------------------------------------------------------------ against dense ED
@pytest.mark.parametrize("L, delta, site", [(6, 1.0, 0), (7, 0.6, "center"), (7, 1.0, 6)])
def test_sector_otoc_matches_dense_expm(L, delta, site):
    h = np.random.default_rng(L).uniform(-1.5, 1.5, L)
    chain = mf.xxz_chain(L, delta=delta, fields=h)
    times = [0.0, 0.4, 1.3, 5.0]
    res = sector_otoc(chain, site=site, times=times)
    H = dense_xxz(L, 1.0, delta, h)
    i = L // 2 if site == "center" else site
    for v in "XYZ":
        np.testing.assert_allclose(res.otoc(v), dense_otoc(H, L, i, times, v), atol=1e-12, rtol=0)
    assert np.allclose(res.weights.sum(axis=-1), 1.0, atol=1e-13)
    assert res.meta["method"] == "sector_exact" and np.all(res.discarded_weight == 0)


def test_sector_otoc_relative_accuracy_ahead_of_the_front():
    # tiny C far from W: compare with the commutator-norm form of the dense reference (no 1 - (1 - C) loss)
    L = 8
    h = np.random.default_rng(5).uniform(-1.0, 1.0, L)
    times = [0.15, 0.4]
    res = sector_otoc(mf.xxz_chain(L, fields=h), site=0, times=times, probes=("Z",))
    ref = dense_otoc(dense_xxz(L, 1.0, 1.0, h), L, 0, times, "Z", commutator=True)
    C = res.otoc("Z")
    small = (ref > 1e-14) & (ref < 1e-4)
    assert small.sum() >= 6  # the comparison really covers tiny values
    np.testing.assert_allclose(C[small], ref[small], rtol=1e-7)
    # probes=('Z',) skips the I/Z split: the Z probe is complete, the I and Z weights are flagged unknown
    assert np.all(np.isnan(res.weights[..., [0, 3]])) and np.all(np.isfinite(C))


def test_sector_otoc_complex_u1_chain_matches_dense_expm():
    # a chain with a Dzyaloshinskii-Moriya term (complex, still conserving total S^z): the complex code path
    L = 6
    h = np.random.default_rng(2).uniform(-1.0, 1.0, L)
    dm = 0.7
    sx, sy, sz = (m / 2 for m in (PX, PY, PZ))
    bond = np.kron(sx, sx) + np.kron(sy, sy) + 0.8 * np.kron(sz, sz) + dm * (np.kron(sx, sy) - np.kron(sy, sx))
    chain = Chain(L=L, bond_terms=np.array([bond] * (L - 1)), site_terms=np.array([hi * sz for hi in h]),
                  kind="generic", conserves_sz=True)
    times = [0.7, 2.0]
    res = sector_otoc(chain, site=2, times=times)
    H = dense_xxz(L, 1.0, 0.8, h, dm=dm)
    assert not SectorSpectrum(chain).real
    for v in "XZ":
        np.testing.assert_allclose(res.otoc(v), dense_otoc(H, L, 2, times, v), atol=1e-12, rtol=0)


def test_sector_blocks_reassemble_the_dense_hamiltonian():
    L = 6
    h = np.random.default_rng(9).uniform(-2, 2, L)
    states, blocks = sector_blocks(mf.xxz_chain(L, delta=0.4, fields=h))
    H = np.zeros((2**L, 2**L))
    for st, B in zip(states, blocks):
        H[np.ix_(st, st)] = B
    np.testing.assert_allclose(H, dense_xxz(L, 1.0, 0.4, h).real, atol=1e-14)
    assert [s.size for s in states] == [1, 6, 15, 20, 15, 6, 1]  # binom(6, m)


@pytest.mark.parametrize("site", [0, "center"])
def test_sector_otoc_matches_exact_otoc_array_to_array(site):
    chain = mf.xxz_chain(10, W=1.0, seed=4)
    times = [0.0, 0.5, 2.0, 9.0]
    a = sector_otoc(chain, site=site, times=times)
    b = mf.exact_otoc(chain, w="Z", site=site, times=times)
    np.testing.assert_allclose(a.weights, b.weights, atol=1e-12, rtol=0)
    for v in "XYZ":
        np.testing.assert_allclose(a.otoc(v), b.otoc(v), atol=1e-12, rtol=0)


def test_sector_otocs_shares_work_and_repeats_single_site_results():
    chain = mf.xxz_chain(8, W=2.0, seed=1)
    spec = SectorSpectrum(chain)
    both = sector_otocs(chain, [1, "center"], [0.3, 3.0], spectrum=spec)
    one = sector_otoc(chain, site=4, times=[0.3, 3.0])
    np.testing.assert_allclose(both[1].weights, one.weights, atol=1e-13)
    assert both[0].meta["site"] == 1 and both[1].meta["site"] == 4


def test_sector_and_typicality_agree_within_the_statistical_error():
    # two exact methods against each other: the typicality estimate must lie within a few of its standard
    # deviations (bounded by typicality_error_bound, derived from the Haar second moment) of the sector result
    from mpo_fronts.exact import typicality_otoc

    L, n = 10, 6
    chain = mf.xxz_chain(L, W=0.5, seed=3)
    times = [0.5, 1.5, 4.0]
    ex = sector_otoc(chain, site=0, times=times).otoc("Z")
    typ = typicality_otoc(chain, w="Z", site=0, v="Z", times=times, seed=1, n_states=n)
    bound = typicality_error_bound(ex, L, n)
    z = np.abs(typ.otoc - ex) / (bound + 1e-15)
    assert z.max() < 5.0
    assert np.all(bound <= typ.expected_error + 1e-15)  # the worst case (C = 1) is the package's figure
    assert np.median(typ.stderr[ex > 1e-2] / bound[ex > 1e-2]) < 1.5  # the bound is not wildly loose...
    assert np.median(typ.stderr[ex > 1e-2] / bound[ex > 1e-2]) > 0.3  # ...nor violated


def test_sector_references_reject_what_they_cannot_do():
    chain = mf.xxz_chain(6, W=1.0, seed=1)
    with pytest.raises(InputError, match="w = 'X' is not supported") as e:
        sector_otoc(chain, w="X", site=0)
    assert e.value.arg == "w"
    with pytest.raises(InputError, match="does not conserve total S\\^z") as e:
        sector_otoc(mf.mixed_field_ising_chain(6), site=0)
    assert e.value.arg == "chain"
    leaky = Chain(L=4, bond_terms=np.array([np.kron(PX, I2)] * 3), site_terms=np.zeros((4, 2, 2)),
                  conserves_sz=True)
    with pytest.raises(InputError, match="different S\\^z"):
        sector_otoc(leaky, site=0)
    with pytest.raises(InputError, match="site"):
        sector_otoc(chain, site=6)
    with pytest.raises(InputError, match="strictly increasing"):
        sector_otoc(chain, times=[1.0, 0.5])
    with pytest.raises(InputError, match="probes"):
        sector_otoc(chain, probes=("Q",))
    with pytest.raises(InputError, match="spectrum"):
        sector_otoc(chain, spectrum=SectorSpectrum(mf.xxz_chain(4)))


def test_reference_arrays_round_trip_and_refuse_missing_provenance():
    chain = mf.xxz_chain(6, W=1.0, seed=2)
    res = sector_otoc(chain, site=0, times=[0.0, 1.0])
    with pytest.raises(InputError, match="command"):
        reference_arrays(res, chain, {"git_commit": "x"})
    arr = reference_arrays(res, chain, {"command": "test", "git_commit": "abc"})
    ref = reference_from_arrays(arr)
    np.testing.assert_array_equal(ref["otoc"]["Z"], res.otoc("Z"))
    np.testing.assert_array_equal(ref["fields"], chain.fields)
    assert ref["meta"]["model"]["kind"] == "xxz" and ref["meta"]["site"] == 0 and ref["stderr"] == {}
    with pytest.raises(InputError, match="not an mpo_fronts reference"):
        reference_from_arrays({"times": np.zeros(1)})


# ------------------------------------------------------------------------------------------ the stored files
def _script():
    spec = importlib.util.spec_from_file_location("_references_script", ROOT / "scripts" / "references.py")
    mod = importlib.util.module_from_spec(spec)
    sys.modules.setdefault(spec.name, mod)
    spec.loader.exec_module(mod)
    return mod


FILES = sorted(REF_DIR.glob("*.npz"))


def test_reference_files_exist():
    assert any(f.name.startswith("heisenberg_L14") and "_typ_" not in f.name for f in FILES), FILES
    assert any("_typ_" in f.name for f in FILES), FILES


@pytest.mark.parametrize("path", FILES, ids=[f.name for f in FILES])
def test_reference_file_loads_with_its_provenance(path):
    ref = _script().load_reference(path)
    m = ref["meta"]
    for key in ("command", "git_commit", "model", "method", "w", "site", "probes", "error", "conventions",
                "seconds", "package_version", "created_utc"):
        assert key in m, key
    assert m["command"].startswith("python scripts/references.py")
    L = m["model"]["L"]
    n_t = ref["times"].size
    assert n_t >= 20 and np.all(np.diff(ref["times"]) > 0)
    for v, C in ref["otoc"].items():
        assert C.shape == (n_t, ref["sites"].size)
        assert np.all(C > -1e-12) and np.all(C < 2 + 1e-12)
    if m["model"]["kind"] == "xxz":
        assert ref["fields"].shape == (L,) and np.all(np.abs(ref["fields"]) <= m["model"]["params"]["W"])
    if m["method"] == "typicality":
        v = m["probes"][0]
        assert m["expected_error"] == pytest.approx(1 / np.sqrt((2**L + 1) * m["n_states"]))
        # the statistical error is well below C where crossing times are read (thresholds 1e-3 .. 0.5)
        C, bound = ref["otoc"][v], ref["error_bound"][v]
        np.testing.assert_allclose(bound, typicality_error_bound(C, L, m["n_states"]), rtol=1e-12)
        at = (C >= 1e-3) & (C <= 0.5)
        assert at.any() and np.all(bound[at] < 0.3 * C[at])
    else:
        assert ref["weights"].shape == (n_t, L, 4)
        np.testing.assert_allclose(ref["otoc"]["X"], ref["otoc"]["Y"], atol=1e-12)  # W = Z conserves S^z


@pytest.mark.parametrize("path", [f for f in FILES if "_typ_" not in f.name and "L10" not in f.name],
                         ids=lambda f: f.name)
def test_stored_sector_curves_follow_the_small_t_expansion(path):
    # checks of the large stored curves that need no recomputation: C(t = 0) exactly as W = Z at its site,
    # C_Z(i +- 1, t) = (J t)^2 (1 + O(t^2)) and C_X = (J t)^2 / 2 there, and C(i + d) ~ t^(2d) at small t (derived /
    # common practice, see the module docstring)
    ref = _script().load_reference(path)
    m = ref["meta"]
    i, L, J = m["site"], m["model"]["L"], m["model"]["params"]["J"]
    t, CZ, CX = ref["times"], ref["otoc"]["Z"], ref["otoc"]["X"]
    assert t[0] == 0.0
    assert abs(CX[0, i] - 2.0) < 1e-12 and abs(CZ[0, i]) < 1e-12
    away = [r for r in range(L) if r != i]
    assert np.all(np.abs(CZ[0, away]) < 1e-20) and m["rounding_floor"] < 1e-20
    # C / t^2 = c0 (1 + a t^2 + O(t^4)) with a set by the fields (large at W = 6): extrapolate c0 from the two
    # smallest times (Richardson), leaving an O(t^4) ~ 1e-4 relative error
    t1, t2 = t[1], t[2]
    for r in (i - 1, i + 1):
        if 0 <= r < L:
            for C, c0 in ((CZ, J**2), (CX, J**2 / 2)):
                f1, f2 = C[1, r] / t1**2, C[2, r] / t2**2
                assert (f1 * t2**2 - f2 * t1**2) / (t2**2 - t1**2) == pytest.approx(c0, rel=2e-3)
    for d in (1, 2, 3):
        r = i + d if i + d < L else i - d
        # log C = log c + p log t + b t^2 + O(t^4) through the three smallest times (b absorbs the field terms)
        A = np.stack([np.ones(3), np.log(t[1:4]), t[1:4] ** 2], axis=1)
        p = np.linalg.solve(A, np.log(CZ[1:4, r]))[1]
        assert p == pytest.approx(2 * d, abs=0.05)


def test_smallest_stored_sector_curve_is_reproduced():
    small = [f for f in FILES if f.name.startswith("heisenberg_L10") and "_typ_" not in f.name]
    assert small, "data/references needs its small L = 10 sector case"
    mod = _script()
    ref = mod.load_reference(small[0])
    chain = mod.reference_chain(ref)
    res = sector_otoc(chain, site=ref["meta"]["site"], times=ref["times"])
    np.testing.assert_allclose(res.weights, ref["weights"], atol=1e-12, rtol=0)
    ex = mf.exact_otoc(chain, w="Z", site=ref["meta"]["site"], times=ref["times"][::4])  # and dense ED
    np.testing.assert_allclose(ex.otoc("Z"), ref["otoc"]["Z"][::4], atol=1e-12, rtol=0)


def test_smallest_stored_typicality_curve_is_reproduced_and_consistent_with_exact():
    from mpo_fronts.exact import typicality_otoc

    small = [f for f in FILES if "_L10_" in f.name and "_typ_" in f.name]
    assert small, "data/references needs its small L = 10 typicality case"
    mod = _script()
    ref = mod.load_reference(small[0])
    m = ref["meta"]
    v = m["probes"][0]
    chain = mod.reference_chain(ref)
    # the first random state of the same seed, at the first times (the rest costs minutes, not seconds)
    again = typicality_otoc(chain, w="Z", site=m["site"], v=v, times=ref["times"][:6], seed=m["seed"],
                            n_states=1, probe_sites=ref["sites"].tolist())
    np.testing.assert_allclose(again.samples[0], ref["samples"][v][0, :6], atol=1e-10, rtol=0)
    np.testing.assert_allclose(ref["samples"][v].mean(axis=0), ref["otoc"][v], atol=1e-14)
    ex = mf.exact_otoc(chain, w="Z", site=m["site"], times=ref["times"][::3]).otoc(v)[:, ref["sites"]]
    bound = typicality_error_bound(ex, m["model"]["L"], m["n_states"])
    assert np.all(np.abs(ref["otoc"][v][::3] - ex) < 5 * bound + 1e-12)


def _typicality_file(prefix: str):
    found = [f for f in FILES if f.name.startswith(prefix) and "_typ_" in f.name]
    assert found, f"data/references needs {prefix}*_typ_*.npz"
    return _script().load_reference(found[0])


def test_stored_heisenberg_typicality_agrees_with_the_sector_reference_before_the_far_end_matters():
    # L = 18 by typicality against L = 14 by sector evolution, same first 14 fields (one disorder draw, seed 11:
    # numpy's uniform stream is a prefix), W = Z at site 0: at t <= 2 the sites r <= 6 cannot feel the chain
    # beyond site 13 (C at distance 13 is < 1e-9 there, see the stored sector curve), so the two agree within the
    # statistical error of the typicality estimate
    typ = _typicality_file("heisenberg_L18_W0.5_seed11_site0")
    ex = _script().load_reference(REF_DIR / "heisenberg_L14_W0.5_seed11_site0.npz")
    np.testing.assert_array_equal(typ["fields"][:14], ex["fields"])
    t_common = [t for t in typ["times"] if t <= 2.0 + 1e-12 and np.any(np.isclose(ex["times"], t, atol=1e-12))]
    assert len(t_common) >= 8
    kt = [int(np.flatnonzero(np.isclose(typ["times"], t, atol=1e-12))[0]) for t in t_common]
    ke = [int(np.flatnonzero(np.isclose(ex["times"], t, atol=1e-12))[0]) for t in t_common]
    assert ex["otoc"]["Z"][ke, 13].max() < 1e-9
    cols = [j for j, r in enumerate(typ["sites"]) if r <= 6]
    rs = typ["sites"][cols]
    C_typ = typ["otoc"]["Z"][np.ix_(kt, cols)]
    C_ex = ex["otoc"]["Z"][np.ix_(ke, rs)]
    bound = typicality_error_bound(C_ex, 18, typ["meta"]["n_states"])
    assert np.all(np.abs(C_typ - C_ex) < 5 * bound + 1e-9)


def test_stored_mfi_typicality_agrees_with_dense_ed_at_early_times():
    # L = 16 by typicality against dense exact evolution at L = 10 with W = Z at the same distance from the left
    # end (site 5 of 10 vs the stored site): at t <= 1 and distances <= 2 the far parts of the chains do not
    # matter yet (dense L = 10 and L = 12 results differ by < 1e-9 there; measured once by exact_otoc), so the
    # two agree within the statistical error of the typicality estimate
    typ = _typicality_file("mfi_L16_center")
    m = typ["meta"]
    v = m["probes"][0]
    i = m["site"]
    keep = [k for k, t in enumerate(typ["times"]) if t <= 1.0 + 1e-12]
    cols = [j for j, r in enumerate(typ["sites"]) if abs(r - i) <= 2]
    assert len(keep) >= 6 and len(cols) >= 3
    L_small, i_small = 10, 5
    ex = mf.exact_otoc(mf.mixed_field_ising_chain(L_small, **{k: m["model"]["params"][k] for k in "Jgh"}), w="Z",
                       site=i_small, times=typ["times"][keep]).otoc(v)
    C_ex = ex[:, [i_small + (typ["sites"][j] - i) for j in cols]]
    C_typ = typ["otoc"][v][np.ix_(keep, cols)]
    bound = typicality_error_bound(C_ex, m["model"]["L"], m["n_states"])
    assert np.all(np.abs(C_typ - C_ex) < 5 * bound + 1e-8)
