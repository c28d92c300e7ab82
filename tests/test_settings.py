"""settings.py: one validated, frozen settings object for keyword arguments and run descriptions."""

import dataclasses

import pytest

import mpo_fronts as mf
from mpo_fronts.errors import ConfigError, InputError
from mpo_fronts.settings import SETTINGS_KEYS, EvolutionSettings


@pytest.mark.parametrize("kw,arg", [
    (dict(chi=0), "chi"), (dict(chi=2.5), "chi"), (dict(chi=True), "chi"), (dict(dt=0), "dt"),
    (dict(dt=float("nan")), "dt"), (dict(order=3), "order"), (dict(cutoff=1.0), "cutoff"),
    (dict(chunk=0), "chunk"), (dict(truncation="qr"), "truncation"),
])
def test_bad_settings_name_the_argument(kw, arg):
    with pytest.raises(InputError) as info:
        EvolutionSettings(**kw)
    assert info.value.arg == arg and arg in str(info.value)


def test_settings_are_frozen_and_round_trip():
    s = EvolutionSettings(chi=12, dt=0.1, order=4, cutoff=1e-10, chunk=7, truncation="rsvd")
    with pytest.raises(dataclasses.FrozenInstanceError):
        s.chi = 3
    assert EvolutionSettings(**s.to_dict()) == s
    assert tuple(s.to_dict()) == SETTINGS_KEYS
    assert s.replace(chi=20).chi == 20 and s.replace(chi=None) == s


def test_table_errors_name_the_dotted_key():
    with pytest.raises(ConfigError) as info:
        EvolutionSettings.from_table({"chi": 0}, "evolution")
    assert info.value.key == "evolution.chi"
    with pytest.raises(ConfigError) as info:
        EvolutionSettings.from_table({"cutof": 1e-9}, "engine")
    assert info.value.key == "engine.cutof" and "did you mean 'cutoff'" in str(info.value)
    with pytest.raises(ConfigError) as info:
        EvolutionSettings.from_table({"chi": 16.0}, "evolution")  # a float where TOML should have an integer
    assert info.value.key == "evolution.chi"


def test_the_same_settings_reach_engine_result_and_file(tmp_path):
    from mpo_fronts.config import parse_description
    from mpo_fronts.ensemble import run_ensemble

    desc = parse_description({"model": {"kind": "xxz", "L": 6, "W": 1.0}, "times": {"values": [0.5, 1.0]},
                              "evolution": {"chi": 8, "dt": 0.1, "order": 4, "truncation": "rsvd"},
                              "ensemble": {"realizations": 1}})
    assert desc.settings == EvolutionSettings(chi=8, dt=0.1, order=4, truncation="rsvd")
    run_ensemble(desc, tmp_path / "run", progress="none")
    ens = mf.load(tmp_path / "run")
    for key, value in desc.settings.to_dict().items():
        assert ens.engine[key] == value, key
    # the old table name is still read and describes the same computation (same fingerprint)
    old = parse_description({"model": {"kind": "xxz", "L": 6, "W": 1.0}, "times": {"values": [0.5, 1.0]},
                             "engine": {"chi": 8, "dt": 0.1, "order": 4, "truncation": "rsvd"},
                             "ensemble": {"realizations": 1}})
    assert old == desc and old.fingerprint() == desc.fingerprint()
    with pytest.raises(ConfigError, match="not both"):
        parse_description({"model": {"kind": "xxz", "L": 6}, "times": {"values": [1.0]}, "engine": {},
                           "evolution": {}})


def test_symmetry_setting_defaults_validates_and_keeps_old_fingerprints():
    from mpo_fronts.config import parse_description
    from mpo_fronts.settings import NEW_DEFAULTS, SYMMETRIES

    assert EvolutionSettings().symmetry == "auto" and NEW_DEFAULTS["symmetry"] == "auto"
    assert SYMMETRIES == ("auto", "z2", "u1") and EvolutionSettings(symmetry="U1").symmetry == "u1"
    raw = {"model": {"kind": "xxz", "L": 6, "W": 1.0}, "times": {"values": [0.5, 1.0]},
           "evolution": {"chi": 8, "dt": 0.1, "order": 4}, "ensemble": {"realizations": 2, "seed": 3}}
    # the fingerprints of these two descriptions as computed before the key existed (commit b2f1019)
    old = {0.1: "a7cf4d3e8df53decff952a5d4da6a7f963226dda74fbcc070d45bdb6cda1bf13",
           "auto": "cac44903847f7e9aeb2a2dbd9aa0f07a391a921a2cb07ce7232e7bd1903cefbc"}
    for dt, fp in old.items():
        evo = {"chi": 8, "dt": dt} if dt == "auto" else raw["evolution"]
        d = parse_description({**raw, "evolution": evo})
        assert d.settings.symmetry == "auto" and d.fingerprint() == fp
        assert parse_description({**raw, "evolution": {**evo, "symmetry": "auto"}}).fingerprint() == fp
        assert parse_description({**raw, "evolution": {**evo, "symmetry": "u1"}}).fingerprint() != fp
        assert parse_description({**raw, "evolution": {**evo, "symmetry": "z2"}}).fingerprint() != fp


@pytest.mark.parametrize("evolution, model, w, needle", [
    ({"symmetry": "u2"}, "xxz", "Z", '"auto", "z2" or "u1"'),
    ({"symmetry": 1}, "xxz", "Z", '"auto", "z2" or "u1"'),
    ({"symmetry": "u1", "truncation": "rsvd"}, "xxz", "Z", "truncation = 'svd'"),
    ({"symmetry": "u1"}, "mixed_field_ising", "Z", "conserves total S^z"),
    ({"symmetry": "u1"}, "xxz", "X", "operators.w = 'Z' only"),
])
def test_symmetry_errors_in_descriptions_name_the_key(evolution, model, w, needle):
    from mpo_fronts.config import parse_description

    raw = {"model": {"kind": model, "L": 6}, "operators": {"w": w}, "times": {"values": [1.0]},
           "evolution": {"chi": 8, "dt": 0.1, **evolution}}
    with pytest.raises(ConfigError) as info:
        parse_description(raw)
    assert info.value.key == "evolution.symmetry" and needle in str(info.value), str(info.value)
