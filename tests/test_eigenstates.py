"""Eigenstate-resolved OTOCs from a run description (``fronts check --eigenstates``), against an independent
dense construction: H built here from Kronecker products of Pauli matrices, W(t) = e^{iHt} W e^{-iHt} with
scipy.linalg.expm, and C_n(r, t) = 1 - Re <n|W(t) V_r W(t) V_r|n> for the ground state of one realization."""

import h5py
import numpy as np
import pytest
import scipy.linalg as sla

from mpo_fronts.cli import main
from mpo_fronts.config import parse_description
from mpo_fronts.workflows import eigenstate_study

RAW = {"model": {"kind": "xxz", "L": 12, "W": 2.0, "delta": 0.7},
       "operators": {"w": "Z", "site": 0, "v": ["X", "Z"]},
       "times": {"values": [0.5, 1.5]}, "evolution": {"chi": 16, "dt": 0.05},
       "ensemble": {"realizations": 2, "seed": 4}}

SX = np.array([[0, 1], [1, 0]]) / 2
SY = np.array([[0, -1j], [1j, 0]]) / 2
SZ = np.array([[1, 0], [0, -1]]) / 2


def op(single, i, L):
    out = np.array([[1.0]])
    for j in range(L):
        out = np.kron(out, single if j == i else np.eye(2))
    return out


def xxz_dense(fields, delta, J=1.0):
    L = len(fields)
    H = sum(J * (op(SX, i, L) @ op(SX, i + 1, L) + op(SY, i, L) @ op(SY, i + 1, L)
                 + delta * op(SZ, i, L) @ op(SZ, i + 1, L)) for i in range(L - 1))
    return H + sum(h * op(SZ, i, L) for i, h in enumerate(fields))


def test_ground_state_otoc_against_independent_dense_evolution(tmp_path):
    desc = parse_description(RAW)
    L = 6
    eig = eigenstate_study(desc, L=L, realizations=1, probe="X", out=tmp_path / "e.h5")
    with h5py.File(tmp_path / "e.h5") as f:
        E, C, fields = f["energies"][0], f["otoc"][0], f["fields"][0]
        assert f["otoc"].attrs["axes"] == "realization,time,eigenstate,site"
    np.testing.assert_allclose(fields, desc.truncated_realization(0, L).chain.fields)
    H = xxz_dense(fields, 0.7)
    e, vecs = np.linalg.eigh(H)
    np.testing.assert_allclose(E, e, atol=1e-10)
    assert e[1] - e[0] > 1e-6  # a non-degenerate ground state (disorder), so C_0 is basis independent
    g = vecs[:, 0]
    Wz = 2 * op(SZ, 0, L)
    for k, t in enumerate(RAW["times"]["values"]):
        U = sla.expm(-1j * H * t)
        Wt = U.conj().T @ Wz @ U
        for r in range(L):
            V = 2 * op(SX, r, L)
            ref = 1 - np.real(g.conj() @ Wt @ V @ Wt @ V @ g)
            assert C[k, 0, r] == pytest.approx(ref, abs=1e-9)
    # the mean over all eigenstates is the infinite-temperature trace (Tr in the eigenbasis)
    for k, t in enumerate(RAW["times"]["values"]):
        U = sla.expm(-1j * H * t)
        Wt = U.conj().T @ Wz @ U
        for d in range(L):
            V = 2 * op(SX, d, L)
            ref = 1 - np.real(np.trace(Wt @ V @ Wt @ V)) / 2 ** L
            assert eig["infinite_temperature"][k, d] == pytest.approx(ref, abs=1e-9)
    assert sum(eig["counts"]) == 2 ** L


def test_check_eigenstates_from_the_command_line(tmp_path, capsys):
    import json

    p = tmp_path / "run.toml"
    p.write_text("""
[model]
kind = "xxz"
L = 12
W = 2.0
[operators]
w = "Z"
site = "center"
[times]
values = [0.5, 1.5]
[evolution]
chi = 32
dt = 0.05
[ensemble]
realizations = 2
seed = 4
""")
    rc = main(["check", str(p), "--L", "6", "--eigenstates", str(tmp_path / "eig" / "e.h5")])
    out = capsys.readouterr().out
    assert rc == 0, out
    assert "eigenstate-resolved OTOC, probe Z" in out and "all (infinite T)" in out
    with h5py.File(tmp_path / "eig" / "e.h5") as f:
        assert f["otoc"].shape == (2, 2, 64, 6) and f.attrs["site"] == 3
    rc = main(["check", str(p), "--L", "6", "--json", "--eigenstates", str(tmp_path / "e2.h5")])
    data = json.loads(capsys.readouterr().out)
    assert data["eigenstates"]["probe"] == "Z" and len(data["eigenstates"]["counts"]) == 5
