"""Configuration sets: several basis states of a product-state run, computed side by side, stored with their
bitstrings, and summarized per state. The product-state OTOCs are checked against an independent dense
construction (Kronecker-product H, scipy expm; C_s = 1 - Re <s|W(t) V_r W(t) V_r|s>)."""

import types

import numpy as np
import pytest
import scipy.linalg as sla

import mpo_fronts as mf
from mpo_fronts.analysis import CROSSED, crossing_times
from mpo_fronts.config import parse_description
from mpo_fronts.ensemble import run_ensemble
from mpo_fronts.report import configuration_crossings, format_summary, summarize

RAW = {"model": {"kind": "xxz", "L": 6, "W": 1.0, "delta": 0.8},
       "operators": {"w": "Z", "site": 0, "v": ["X", "Z"]},
       "state": {"kind": "product", "bits": "001101", "configurations": ["all_up", "neel", "domain_wall", "random"]},
       "times": {"values": [0.25, 0.5, 1.0, 1.5, 2.0, 3.0]}, "evolution": {"chi": 64, "dt": 0.01, "order": 4},
       "ensemble": {"realizations": 2, "seed": 9}}

P = {"X": np.array([[0, 1], [1, 0]]), "Y": np.array([[0, -1j], [1j, 0]]), "Z": np.array([[1, 0], [0, -1]])}


def op(letter, i, L):
    out = np.array([[1.0]])
    for j in range(L):
        out = np.kron(out, P[letter] if j == i else np.eye(2))
    return out


def dense_state_otoc(fields, delta, bits, v, times):
    L = len(fields)
    H = sum(0.25 * (op("X", i, L) @ op("X", i + 1, L) + op("Y", i, L) @ op("Y", i + 1, L)
                    + delta * op("Z", i, L) @ op("Z", i + 1, L)) for i in range(L - 1))
    H = H + sum(0.5 * h * op("Z", i, L) for i, h in enumerate(fields))
    s = np.zeros(2 ** L)
    s[int(bits, 2)] = 1.0  # '0' = spin up = Z = +1 = the first basis vector of each site
    out = np.empty((len(times), L))
    for k, t in enumerate(times):
        U = sla.expm(-1j * H * t)
        Wt = U.conj().T @ op("Z", 0, L) @ U
        for r in range(L):
            V = op(v, r, L)
            out[k, r] = 1 - np.real(s @ Wt @ V @ Wt @ V @ s)
    return out


@pytest.fixture(scope="module")
def run(tmp_path_factory):
    out = tmp_path_factory.mktemp("conf") / "R"
    run_ensemble(parse_description(RAW), out, progress="none")
    return mf.load(out)


def test_every_configuration_matches_dense_exact_evolution(run):
    assert run.state_names == ("001101", "all_up", "neel", "domain_wall", "random")
    assert run.bits.shape == (2, 5)
    assert tuple(run.bits[0, :4]) == ("001101", "000000", "010101", "000111")
    for k in range(2):  # 'random': drawn from realization k's generator after its fields (documented scheme)
        rng = np.random.default_rng(np.random.SeedSequence([k, 9]))
        rng.uniform(-1.0, 1.0, size=6)
        assert run.bits[k, 4] == "".join("01"[b] for b in rng.integers(0, 2, size=6))
    for i in range(2):
        for s, bits in enumerate(run.bits[i]):
            for v in ("X", "Z"):
                ref = dense_state_otoc(run.fields[i], 0.8, bits, v, RAW["times"]["values"])
                np.testing.assert_allclose(run.state_otoc(v)[i, s], ref, atol=2e-6)
    # the fully polarized state is an eigenstate of this H (S^z-conserving, diagonal fields): Z(t) = Z there,
    # so Z-Z commutes and C = 0 (common practice)
    np.testing.assert_allclose(run.state_otoc("Z")[:, 1], 0.0, atol=1e-10)


def test_summary_lists_crossing_times_per_configuration(run):
    s = summarize(run, threshold=0.3, probe="X", n_boot=20)
    confs = s["configurations"]
    assert [c["name"] for c in confs] == list(run.state_names)
    assert confs[2]["bits"] == "010101" and not confs[2]["bits_vary"]
    for i, c in enumerate(confs):
        ref = crossing_times(run.times, run.state_otoc("X")[:, i].mean(axis=0), 0.3)
        expect = np.where(ref.status == CROSSED, ref.tstar, np.nan)
        got = np.array([np.nan if x is None else x for x in c["tstar"]], dtype=float)
        np.testing.assert_allclose(got, expect, rtol=1e-12)
    assert np.isfinite(np.array([x if x is not None else np.nan for x in confs[2]["tstar"]], float)).any()
    text = format_summary(s)
    assert "per basis state" in text and "neel" in text and "random: drawn per realization" in text
    assert configuration_crossings(types.SimpleNamespace(state="infinite_temperature"), 0.3, "X") is None
