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
