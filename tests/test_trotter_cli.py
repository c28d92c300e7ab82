"""fronts summary --trotter DIR2: the Trotter error from a second run at another dt, against exact evolution."""

import json

import numpy as np
import pytest

import mpo_fronts as mf
from mpo_fronts.cli import main

DESC = """
[model]
kind = "xxz"
L = 6
W = 3.0
[operators]
w = "Z"
site = 0
v = ["Z"]
[times]
values = [0.5, 1.0, 1.5, 2.0, 3.0, 4.0]
[evolution]
chi = 64
dt = {dt}
[ensemble]
realizations = 2
seed = 5
"""


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("trotter")
    out = {}
    for dt in (0.2, 0.1):
        p = tmp / f"dt{dt}.toml"
        p.write_text(DESC.format(dt=dt))
        out[dt] = tmp / f"R{dt}"
        assert main(["run", str(p), "--out", str(out[dt]), "--progress", "none"]) == 0
    return out


def test_richardson_estimate_brackets_the_true_trotter_error(runs):
    """Without truncation (chi 64 at L = 6) the whole error is Trotter error: the estimate from the two runs
    matches |C(dt) - C_exact| (dense exact evolution) to within 30 % where the error is not tiny (measured:
    the estimate from dt = 0.2 and 0.1 runs about 15 % low, the steps not being fully asymptotic at W = 3)."""
    from mpo_fronts.cli import _trotter_estimate

    ens = mf.load(runs[0.2])
    est = _trotter_estimate(ens, runs[0.1], "Z")
    true = np.zeros_like(est["max_dC"])
    for i, k in enumerate(ens.realizations):
        chain = mf.xxz_chain(6, W=0.0, fields=ens.fields[i])
        ref = mf.exact_otoc(chain, "Z", 0, ens.times).otoc("Z")
        true = np.maximum(true, np.abs(ens.otoc("Z")[i] - ref))
    big = true > 1e-4
    assert big.sum() >= 5
    np.testing.assert_allclose(est["max_dC"][big], true[big], rtol=0.3)


def test_summary_includes_the_trotter_term(runs, capsys):
    assert main(["summary", str(runs[0.2]), "--json", "--trotter", str(runs[0.1]), "--threshold", "0.2"]) == 0
    s = json.loads(capsys.readouterr().out)
    trot = s["crossings"]["t_errors"]["trotter"]
    assert any(x is not None and x > 0 for x in trot), s["crossings"]
    assert main(["summary", str(runs[0.2]), "--json", "--threshold", "0.2"]) == 0
    plain = json.loads(capsys.readouterr().out)
    assert all(x is None or x == 0 for x in plain["crossings"]["t_errors"]["trotter"])


def test_trotter_needs_the_same_description_at_another_step(runs, capsys, tmp_path):
    assert main(["summary", str(runs[0.2]), "--trotter", str(runs[0.2])]) == 2
    assert "same time step" in " ".join(capsys.readouterr().err.split())
    other = tmp_path / "o.toml"
    other.write_text(DESC.format(dt=0.1).replace("W = 3.0", "W = 2.0"))
    assert main(["run", str(other), "--out", str(tmp_path / "O"), "--progress", "none"]) == 0
    capsys.readouterr()
    assert main(["summary", str(runs[0.2]), "--trotter", str(tmp_path / "O")]) == 2
    assert "not the same description" in " ".join(capsys.readouterr().err.split())
