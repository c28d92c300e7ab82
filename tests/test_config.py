"""Run descriptions: parsing, defaults, validation messages, the per-realization random-number scheme."""

import copy
import json
import pickle
from pathlib import Path

import numpy as np
import pytest

from mpo_fronts.config import SCHEMA, parse_description, read_description, realization_rng
from mpo_fronts.errors import ConfigError

DATA = Path(__file__).resolve().parent.parent / "data"

BASE = {
    "model": {"kind": "xxz", "L": 8, "J": 1.0, "delta": 1.0, "W": 2.0},
    "operators": {"w": "Z", "site": 0, "v": ["X", "Z"]},
    "times": {"values": [0.5, 1.0, 2.0]},
    "engine": {"chi": 16, "dt": 0.05, "order": 2, "cutoff": 1e-12},
    "ensemble": {"realizations": 4, "seed": 20261201},
}


def base(**changes):
    """BASE with some keys changed: table__key=value (value None deletes the key)."""
    d = copy.deepcopy(BASE)
    for name, value in changes.items():
        table, _, key = name.partition("__")
        d.setdefault(table, {})
        if value is None:
            d[table].pop(key, None)
        else:
            d[table][key] = value
    return d


@pytest.mark.parametrize("name", ["demo_thermal.toml", "demo_localized.toml", "production_example.toml"])
def test_data_files_parse_and_round_trip(name):
    from mpo_fronts.cli import demo_folder

    desc = read_description((demo_folder() if name.startswith("demo_") else DATA) / name)
    again = parse_description(desc.to_dict())
    assert again == desc
    assert again.fingerprint() == desc.fingerprint()
    # through JSON too (run.json stores the resolved description this way)
    assert parse_description(json.loads(json.dumps(desc.to_dict()))) == desc


def test_defaults_are_resolved():
    desc = parse_description({"model": {"kind": "xxz", "L": 6}, "times": {"values": [1.0]}})
    d = desc.to_dict()
    assert d["model"] == {"kind": "xxz", "L": 6, "J": 1.0, "delta": 1.0, "W": 0.0}
    assert d["operators"] == {"w": "Z", "site": 0, "v": ["X", "Y", "Z"]}
    assert d["state"] == {"kind": "infinite_temperature"}
    assert d["evolution"] == {"chi": 64, "dt": 0.05, "order": 2, "cutoff": 0.0, "chunk": 20,
                              "truncation": "svd", "splitting": "standard",
                              "trotter_tol": 1e-3, "symmetry": "auto",
                              "gate_update": "svd"}  # the table [engine] is now [evolution]
    assert d["ensemble"] == {"realizations": 1, "seed": 0}
    assert d["run"]["checkpoints"] is True and d["run"]["checkpoint_interval"] > 0
    ising = parse_description({"model": {"kind": "mixed_field_ising", "L": 6}, "times": {"values": [1.0]}})
    # the standard chaotic point of Banuls, Cirac, Hastings, PRL 106, 050405 (2011) is the default
    assert ising["model"] == {"kind": "mixed_field_ising", "L": 6, "J": 1.0, "g": 1.05, "h": 0.5}


def test_time_grid_matches_numpy():
    desc = parse_description(base(times__values=None, times__start=0.1, times__stop=100.0, times__num=7))
    # log spacing: t_k = 0.1 * 1000^(k/6) = 10^(k/2 - 1), endpoints exact
    np.testing.assert_allclose(desc.times, 10.0 ** (np.arange(7) / 2 - 1), rtol=1e-13)
    assert desc.times[0] == 0.1 and desc.times[-1] == 100.0
    lin = parse_description(base(times__values=None, times__start=0.0, times__stop=2.0, times__num=5,
                                 times__spacing="linear"))
    np.testing.assert_allclose(lin.times, [0.0, 0.5, 1.0, 1.5, 2.0], rtol=0, atol=1e-15)


def test_site_center_and_probes():
    desc = parse_description(base(operators__site="center", operators__v="Y"))
    assert desc.site == 4 and desc.probes == ("Y",)
    assert desc.site_at(5) == 2


# (description changes, key path the error must name)
MALFORMED = [
    (dict(engine__chi=0), "engine.chi"),
    (dict(engine__chi=16.5), "engine.chi"),
    (dict(engine__chi="64"), "engine.chi"),
    (dict(engine__dt=-0.1), "engine.dt"),
    (dict(engine__order=3), "engine.order"),
    (dict(engine__cutoff=1.5), "engine.cutoff"),
    (dict(engine__chunk=0), "engine.chunk"),
    (dict(engine__truncation="qr"), "engine.truncation"),
    (dict(engine__cutof=1e-12), "engine.cutof"),
    (dict(model__kind="heisenberg"), "model.kind"),
    (dict(model__kind=None), "model.kind"),
    (dict(model__L=1), "model.L"),
    (dict(model__L=True), "model.L"),
    (dict(model__W=-1.0), "model.W"),
    (dict(model__fields=[0.0] * 8), "model.fields"),  # together with W
    (dict(model__W=None, model__fields=[0.0] * 7), "model.fields"),
    (dict(model__W=None, model__fields=[[0.0] * 8] * 3), "model.fields"),  # 3 lists, 4 realizations
    (dict(model__couplings=[1.0] * 8), "model.couplings"),
    (dict(model__g=1.0), "model.g"),  # not an XXZ parameter
    (dict(model__chi=32), "model.chi"),
    (dict(operators__site=8), "operators.site"),
    (dict(operators__site=-1), "operators.site"),
    (dict(operators__site="middle"), "operators.site"),
    (dict(operators__w="Q"), "operators.w"),
    (dict(operators__v=["X", "X"]), "operators.v"),
    (dict(operators__v=[]), "operators.v"),
    (dict(state__kind="thermal"), "state.kind"),
    (dict(state__kind="product"), "state.bits"),
    (dict(state__kind="product", state__bits="0101"), "state.bits"),
    (dict(state__kind="product", state__bits="01012101"), "state.bits"),
    (dict(state__kind="random_product", state__samples=0), "state.samples"),
    (dict(state__samples=3), "state.samples"),
    (dict(times__values=[1.0, 0.5]), "times.values"),
    (dict(times__values=[1.0, 1.0]), "times.values"),
    (dict(times__values=[-1.0, 0.5]), "times.values"),
    (dict(times__values=[]), "times.values"),
    (dict(times__start=0.1), "times.start"),
    (dict(times__values=None, times__start=0.0, times__stop=1.0, times__num=4), "times.start"),
    (dict(times__values=None, times__start=1.0, times__stop=0.5, times__num=4), "times.stop"),
    (dict(times__values=None, times__start=1.0, times__stop=2.0, times__num=0), "times.num"),
    (dict(times__values=None, times__start=1.0, times__stop=2.0, times__num=3, times__spacing="geometric"),
     "times.spacing"),
    (dict(ensemble__realizations=0), "ensemble.realizations"),
    (dict(ensemble__realizations=None), "ensemble.realizations"),  # random model needs a count
    (dict(ensemble__seed=-5), "ensemble.seed"),
    (dict(ensemble__seeds=3), "ensemble.seeds"),
    (dict(model__W=0.0), "ensemble.realizations"),  # 4 identical realizations
    (dict(run__checkpoint_interval=0), "run.checkpoint_interval"),
    (dict(run__claim_timeout=1), "run.claim_timeout"),
    (dict(run__checkpoints="yes"), "run.checkpoints"),
]


@pytest.mark.parametrize("changes,key", MALFORMED, ids=[f"{k}-{i}" for i, (_, k) in enumerate(MALFORMED)])
def test_malformed_descriptions_name_the_key(changes, key):
    with pytest.raises(ConfigError) as info:
        parse_description(base(**changes))
    assert info.value.key == key
    assert str(info.value).startswith(key + ":")


@pytest.mark.parametrize("raw,key,hint", [
    (base(engine__cutof=1e-12), "engine.cutof", "did you mean 'cutoff'"),
    (base(model__dleta=1.0), "model.dleta", "did you mean 'delta'"),
    (base(model__chi=8), "model.chi", "evolution.chi"),  # [engine] is now [evolution]
    ({**base(), "engin": {"chi": 4}}, "engin", "did you mean 'engine'"),
    (base(model__kind="xzz"), "model.kind", "did you mean 'xxz'"),
])
def test_typos_get_the_closest_valid_key(raw, key, hint):
    with pytest.raises(ConfigError) as info:
        parse_description(raw)
    assert info.value.key == key and hint in str(info.value)


def test_missing_tables_and_bad_files(tmp_path):
    with pytest.raises(ConfigError) as info:
        parse_description({"model": {"kind": "xxz", "L": 4}})
    assert info.value.key == "times"
    bad = tmp_path / "bad.toml"
    bad.write_text("[model]\nkind = xxz\n")  # unquoted string: not TOML
    with pytest.raises(ConfigError, match="not valid TOML"):
        read_description(bad)
    with pytest.raises(ConfigError, match="no such run description"):
        read_description(tmp_path / "absent.toml")


def test_config_error_pickles():
    err = ConfigError("engine.chi", "expected a positive integer")
    again = pickle.loads(pickle.dumps(err))
    assert isinstance(again, ConfigError) and again.key == "engine.chi" and str(again) == str(err)


# A valid value, different from the default, for every key of the schema (the test below fails when a key is
# added to the schema without an entry here, or when the parser accepts a key but ignores it).
_NON_DEFAULT = {
    "model": {"kind": "mixed_field_ising", "L": 9, "J": 0.5, "delta": 0.5, "W": 1.5,
              "fields": [0.1] * 8, "couplings": [0.9] * 7, "g": 0.7, "h": 0.2},
    "operators": {"w": "X", "site": 3, "v": ["Y"]},
    "state": {"kind": "random_product", "bits": "01010101", "samples": 2, "configurations": ["neel"]},
    "times": {"values": [0.25, 0.5], "start": 0.2, "stop": 3.0, "num": 5, "spacing": "linear"},
    "evolution": {"chi": 7, "dt": 0.02, "order": 4, "cutoff": 1e-9, "chunk": 3, "truncation": "rsvd",
                  "splitting": "omelyan", "trotter_tol": 1e-4, "symmetry": "z2", "gate_update": "qr"},
    "ensemble": {"realizations": 3, "seed": 11},
    "run": {"label": "x", "checkpoints": False, "checkpoint_interval": 5.0, "claim_timeout": 60.0},
}


def _minimal_with(table, key, value):
    """The smallest description in which table.key can be set (keys that need a partner get it)."""
    d = {"model": {"kind": "xxz", "L": 8}, "times": {"values": [0.5, 1.0]}}
    if table == "model" and key in ("g", "h"):
        d["model"]["kind"] = "mixed_field_ising"
    if table == "state" and key in ("bits", "configurations") and value is not None:
        d["state"] = {"kind": "product"}
    if table == "times" and key != "values":
        d["times"] = {"start": 0.1, "stop": 2.0, "num": 4}
    if (value is not None and table == "model" and key == "W") or (table == "state" and key == "samples") \
            or (value is not None and table == "state" and key == "kind"):
        d["ensemble"] = {"realizations": 2}
    if table == "state" and key == "samples":
        d["state"] = {"kind": "random_product"}
    if table == "evolution" and key == "gate_update":
        d["evolution"] = {"dt": "auto", "chi": 32}  # "qr" needs the U(1) engine, which dt = "auto" takes here
    if table == "ensemble" and key == "realizations":
        d["model"]["W"] = 1.0
        value = 2 if value is None else value  # required with disorder: compare with another count
    if value is not None:
        d.setdefault(table, {})[key] = value
    return d


def test_schema_lists_every_key_the_parser_reads():
    # every key of the schema is read: setting it to a non-default value changes the resolved description
    assert set(SCHEMA) == set(_NON_DEFAULT)
    for table, keys in SCHEMA.items():
        assert set(keys) == set(_NON_DEFAULT[table]), table
        for key in keys:
            plain = _minimal_with(table, key, None)  # without the key, or with the minimal value of a required one
            changed = parse_description(_minimal_with(table, key, _NON_DEFAULT[table][key])).to_dict()
            assert changed != parse_description(plain).to_dict(), f"{table}.{key} is accepted but ignored"


def test_realization_fields_follow_the_documented_seed_scheme():
    desc = parse_description(base())
    for k in (0, 3):
        # reference: numpy's generator seeded as documented, independent of the package
        ref = np.random.default_rng(np.random.SeedSequence([k, 20261201])).uniform(-2.0, 2.0, size=8)
        np.testing.assert_array_equal(desc.realization(k).chain.fields, ref)
    # independent of which other realizations exist, and of their order
    more = parse_description(base(ensemble__realizations=40))
    np.testing.assert_array_equal(more.realization(3).chain.fields, desc.realization(3).chain.fields)
    assert not np.array_equal(desc.realization(0).fields, desc.realization(1).fields)


def test_random_product_bits_come_after_the_fields():
    desc = parse_description(base(state__kind="random_product", state__samples=3))
    rng = np.random.default_rng(np.random.SeedSequence([2, 20261201]))
    fields = rng.uniform(-2.0, 2.0, size=8)
    bits = ["".join("01"[b] for b in row) for row in rng.integers(0, 2, size=(3, 8))]
    real = desc.realization(2)
    np.testing.assert_array_equal(real.fields, fields)
    assert list(real.bits) == bits
    assert realization_rng(2, 20261201).uniform() == np.random.default_rng(
        np.random.SeedSequence([2, 20261201])).uniform()


def test_explicit_fields_per_realization_and_couplings():
    fields = [[0.1 * i + j for i in range(8)] for j in range(3)]
    desc = parse_description(base(model__W=None, model__fields=fields, ensemble__realizations=None,
                                  model__couplings=[1.0, 0.9, 1.1, 1.0, 0.8, 1.2, 1.0]))
    assert desc.realizations == 3
    np.testing.assert_array_equal(desc.realization(2).fields, fields[2])
    np.testing.assert_array_equal(desc.realization(1).couplings, [1.0, 0.9, 1.1, 1.0, 0.8, 1.2, 1.0])
    shared = parse_description(base(model__W=None, model__fields=[0.5] * 8, ensemble__realizations=1))
    np.testing.assert_array_equal(shared.realization(0).fields, [0.5] * 8)


def test_ising_realization_has_no_fields():
    desc = parse_description({"model": {"kind": "mixed_field_ising", "L": 5, "g": 0.9},
                              "times": {"values": [1.0]}})
    real = desc.realization(0)
    assert np.all(np.isnan(real.fields)) and real.chain.kind == "mixed_field_ising"
    np.testing.assert_array_equal(real.couplings, np.ones(4))


def test_fingerprint_ignores_how_not_what():
    a = parse_description(base())
    assert a.fingerprint() == parse_description(base(run__checkpoint_interval=7.0)).fingerprint()
    assert a.fingerprint() == parse_description(base(ensemble__realizations=9)).fingerprint()
    assert a.fingerprint() != parse_description(base(engine__truncation="eigh")).fingerprint()
    assert a.fingerprint() != parse_description(base(engine__chi=17)).fingerprint()
    assert a.fingerprint() != parse_description(base(ensemble__seed=1)).fingerprint()


def test_replace_revalidates():
    a = parse_description(base())
    assert a.replace(engine__chi=8).engine["chi"] == 8
    with pytest.raises(ConfigError, match="evolution.chi"):  # the resolved table's name
        a.replace(engine__chi=-1)


def test_truncated_realization_keeps_the_first_sites():
    desc = parse_description(base(state__kind="random_product", state__samples=2))
    full, small = desc.realization(1), desc.truncated_realization(1, 5)
    np.testing.assert_array_equal(small.fields, full.fields[:5])
    assert small.bits == tuple(b[:5] for b in full.bits) and small.chain.L == 5


def test_production_example_documents_every_key():
    """data/production_example.toml names every key of every table (set, or shown commented out)."""
    import re

    from mpo_fronts.config import SCHEMA

    text = (DATA / "production_example.toml").read_text()
    tables = re.split(r"^\[(\w+)\]", text, flags=re.M)
    body = {tables[i]: tables[i + 1] for i in range(1, len(tables), 2)}
    assert set(body) == set(SCHEMA), set(SCHEMA) ^ set(body)
    for table, keys in SCHEMA.items():
        for key in keys:
            assert re.search(rf"^(# )?{key} = ", body[table], flags=re.M), f"{table}.{key} is not documented"


def with_state(state):
    d = base()
    d["state"] = state
    return d


def test_configuration_sets_resolve_to_named_bitstrings():
    """state.configurations: named families beside given bitstrings; the bitstrings follow the documented
    definitions (written out here by hand for L = 8), 'random' is drawn from the realization's generator after
    the fields."""
    d = parse_description(with_state({"kind": "product", "bits": ["00001111", "01100110"],
                                       "configurations": ["all_up", "neel", "pairs", "domain_wall", "random"]}))
    assert d.state_names == ("00001111", "01100110", "all_up", "neel", "pairs", "domain_wall", "random")
    real = d.realization(3)
    assert real.bits[:6] == ("00001111", "01100110", "00000000", "01010101", "00110011", "00001111")
    rng = np.random.default_rng(np.random.SeedSequence([3, 20261201]))
    rng.uniform(-2.0, 2.0, size=8)  # the fields come first
    assert real.bits[6] == "".join("01"[b] for b in rng.integers(0, 2, size=8))
    # a single bitstring keeps its old resolved form (and fingerprint)
    old = parse_description(with_state({"kind": "product", "bits": "01010101"}))
    assert old.to_dict()["state"] == {"kind": "product", "bits": "01010101"} and old.state_names == ("01010101",)


@pytest.mark.parametrize("state, key, needle", [
    ({"kind": "product", "configurations": ["neal"]}, "state.configurations[0]", "did you mean 'neel'"),
    ({"kind": "product", "configurations": ["neel", "neel"]}, "state.configurations", "twice"),
    ({"kind": "product", "bits": []}, "state.bits", "empty"),
    ({"kind": "product", "bits": ["0101"]}, "state.bits[0]", "L = 8"),
    ({"kind": "random_product", "configurations": ["neel"]}, "state.configurations", "product"),
])
def test_configuration_set_errors_name_the_key(state, key, needle):
    with pytest.raises(ConfigError) as e:
        parse_description(with_state(state))
    assert e.value.key == key and needle in str(e.value)


def test_dt_auto_and_splittings_in_descriptions():
    d = parse_description(base(engine__dt="auto", engine__order=None))
    assert d.settings.auto and d.settings.order == 4 and d.settings.splitting == "blanes_moan"
    assert parse_description(base(engine__dt="auto")).settings.splitting == "standard"  # order 2 given
    plain = parse_description(base())
    # keys added after 0.1.0 at their defaults leave the fingerprint of 0.1.0 descriptions unchanged
    assert plain.fingerprint() == parse_description(base(engine__splitting="standard",
                                                         engine__trotter_tol=1e-3)).fingerprint()
    assert plain.fingerprint() != parse_description(base(engine__splitting="omelyan")).fingerprint()
    for key, value, needle in (("splitting", "blanes_moan", "for order 2"), ("trotter_tol", 2.0, "(0, 1)"),
                               ("dt", "fast", "auto")):
        with pytest.raises(ConfigError) as e:
            parse_description(base(**{f"engine__{key}": value}))
        assert e.value.key == f"engine.{key}" and needle in str(e.value), str(e.value)  # the table as given


def test_gate_update_qr_needs_the_u1_engine_before_any_work():
    # "qr" is an option of the U(1) engine: a description that would run the Z2 engine is refused, naming the key
    ok = parse_description(base(engine__dt="auto", engine__chi=32, engine__gate_update="qr"))
    assert ok.settings.gate_update == "qr"
    for changes in ({"engine__dt": 0.1}, {"operators__w": "X", "engine__dt": "auto"},
                    {"engine__dt": "auto", "engine__chi": 16}):
        with pytest.raises(ConfigError, match="engine.gate_update") as info:
            parse_description(base(engine__gate_update="qr", **changes))
        assert "U(1) engine" in str(info.value)
    with pytest.raises(ConfigError, match="engine.gate_update"):
        parse_description(base(engine__gate_update="fast"))
