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
    assert back["engine"]["chi"] == 32 and back["largest_bond"] == 8
    text = report.format_summary(s)
    assert "v_B" in text and "xi" in text and f"{s['butterfly_velocity']['value']:.4g}" in text
