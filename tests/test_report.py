"""Tests of mpo_fronts.report: the summary of a loaded ensemble as JSON and as text."""

import json

from mpo_fronts import report
from mpo_fronts import trust as tr
from synthetic_fronts import ballistic_ensemble, fake_ensemble


def test_summarize_is_json_with_required_keys():
    t, C = ballistic_ensemble(R=6)
    conv = tr.bond_convergence({16: C, 32: C + 1e-5})
    ens = fake_ensemble(t, C, 2, convergence=conv)
    s = report.summarize(ens, threshold=0.5, probe="Z", n_boot=100)
    back = json.loads(json.dumps(s, allow_nan=False))
    assert back["threshold"] == 0.5
    for key in ("butterfly_velocity", "log_light_cone"):
        for sub in ("value", "ci_low", "ci_high", "r_range", "n_points", "r2", "n_excluded_untrusted"):
            assert sub in back[key], (key, sub)
    assert back["trust"]["source"] == "convergence" and back["trusted_fraction"] == 1.0
    assert back["evolution"]["chi"] == 32 and back["largest_bond"] == 8 and "engine" not in back
    text = report.format_summary(s)
    assert "v_B" in text and "xi" in text and f"{s['butterfly_velocity']['value']:.4g}" in text
    assert "evolution: chi = 32" in text
    # a summary written before 0.2 kept the settings under 'engine': the text is the same
    old = {("engine" if k == "evolution" else k): v for k, v in s.items()}
    assert report.format_summary(old) == text


def test_crossings_carry_intervals_one_per_distance():
    t, C = ballistic_ensemble(R=6, t_max=30.0)  # far distances are never reached by t = 30
    conv = tr.bond_convergence({16: C - 2e-3, 32: C})
    s = json.loads(json.dumps(report.summarize(fake_ensemble(t, C, 2, convergence=conv), n_boot=100)))
    cr = s["crossings"]
    n = len(cr["distances"])
    for key in ("distances", "tstar", "status", "t_low", "t_high", "tstar_boot_std"):  # old and new keys
        assert len(cr[key]) == n, key
    for ts, lo, hi, st in zip(cr["tstar"], cr["t_low"], cr["t_high"], cr["status"]):
        if st == "crossed":
            assert lo < ts < hi
        else:
            assert ts is None and lo is None and hi is None
    assert "unreached" in cr["status"] and cr["status"].count("crossed") >= 10
    # the truncation part: the curve moved by 2e-3 between chi, so t* by 2e-3 / slope (slope 1 / (4 tau) at
    # C = 1/2 for the logistic front of width tau = 0.6 and R realizations spread around it: at least that)
    trunc = [x for x, st in zip(cr["t_errors"]["truncation"], cr["status"]) if st == "crossed"]
    assert min(trunc) >= 2e-3 * 4 * 0.6 * 0.99
    assert s["butterfly_velocity"]["systematic"] is True
    assert s["butterfly_velocity"]["d_range"] == s["butterfly_velocity"]["r_range"]
    assert s["warnings"] == []


def test_text_summary_first_screen():
    import re

    t, C = ballistic_ensemble(R=1, L=20, site=8, t_max=20.0)
    desc = {"model": {"kind": "xxz", "L": 20, "W": 1.0}}
    one = report.summarize(fake_ensemble(t, C, 8, description=desc), n_boot=50)
    text = report.format_summary(one)
    assert "disorder W = 1" in text and "operator Z at site 8" in text
    assert "single realization" in text and "least-squares" in text  # says which interval it is
    assert "d_low = 1" in text  # the phrase is defined where it is used
    assert re.search(r"v_B \(sites per 1/J\)\s+\d+\.\d{4}\s+\[\d+\.\d{4}, \d+\.\d{4}\]", text)  # fixed decimals
    assert one["operator"] == "Z" and one["disorder_W"] == 1.0
    # nothing crosses: no fit, no law comparison, and still no raw None anywhere in the text
    none = report.format_summary(report.summarize(fake_ensemble(t, 0.1 * C, 8, description=desc), n_boot=20))
    assert "not compared" in none and "fit range: none" in none
    t2, C2 = ballistic_ensemble(R=6)
    conv = tr.bond_convergence({16: C2 - 1e-3, 32: C2})
    many = report.format_summary(report.summarize(fake_ensemble(t2, C2, 2, convergence=conv), n_boot=50))
    assert "bootstrap over realizations" in many and "t_low" in many
    for txt in (text, none, many):
        assert "None" not in txt and "nan" not in txt
