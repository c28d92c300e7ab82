"""Run directories: atomic files, claims, description checks, checkpoints, loading and merging."""

import json
import os
import socket
import subprocess
import sys
import time

import h5py
import numpy as np
import pytest

import mpo_fronts as mf
from mpo_fronts.config import parse_description
from mpo_fronts.ensemble import run_ensemble
from mpo_fronts.errors import MissingDependencyError, RunDirectoryError
from mpo_fronts.evolve import OperatorTEBD
from mpo_fronts.rundir import RunStatus
from mpo_fronts.store import Claim, ClaimInfo, RunDirectory, atomic_h5, load, merge, run_status

RAW = {
    "model": {"kind": "xxz", "L": 6, "W": 1.5},
    "operators": {"w": "Z", "site": 1, "v": ["X", "Z"]},
    "times": {"values": [0.4, 1.0]},
    "engine": {"chi": 8, "dt": 0.1},
    "ensemble": {"realizations": 3, "seed": 11},
}


def desc(**changes):
    d = parse_description(RAW)
    return d.replace(**changes) if changes else d


def test_atomic_h5_leaves_nothing_when_the_writer_fails(tmp_path):
    target = tmp_path / "r.h5"

    def bad(f):
        f.create_dataset("x", data=np.arange(3))
        raise RuntimeError("killed mid-write")

    with pytest.raises(RuntimeError):
        atomic_h5(target, bad)
    assert list(tmp_path.iterdir()) == []
    atomic_h5(target, lambda f: f.create_dataset("x", data=np.arange(3)))
    with h5py.File(target) as f:
        np.testing.assert_array_equal(f["x"][()], np.arange(3))
    assert [p.name for p in tmp_path.iterdir()] == ["r.h5"]


def test_create_refuses_other_descriptions_and_foreign_directories(tmp_path):
    run = tmp_path / "run"
    RunDirectory.create(run, desc())
    before = (run / "run.json").read_bytes()
    with pytest.raises(RunDirectoryError, match="evolution.chi: stored 8, given 9"):
        RunDirectory.create(run, desc(engine__chi=9))
    assert (run / "run.json").read_bytes() == before  # nothing overwritten
    RunDirectory.create(run, desc(run__checkpoint_interval=5.0))  # how, not what: accepted
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "notes.txt").write_text("mine")
    with pytest.raises(RunDirectoryError, match="not a run directory"):
        RunDirectory.create(foreign, desc())
    assert sorted(p.name for p in foreign.iterdir()) == ["notes.txt"]
    (tmp_path / "file").write_text("")
    with pytest.raises(RunDirectoryError, match="not a directory"):
        RunDirectory.create(tmp_path / "file", desc())


def test_more_realizations_extend_the_directory(tmp_path):
    RunDirectory.create(tmp_path / "r", desc())
    rd = RunDirectory.create(tmp_path / "r", desc(ensemble__realizations=5))
    assert json.loads((tmp_path / "r" / "run.json").read_text())["description"]["ensemble"]["realizations"] == 5
    rd = RunDirectory.create(tmp_path / "r", desc(ensemble__realizations=2))  # fewer: the record keeps 5
    assert rd.description.realizations == 5


def test_claims(tmp_path):
    rd = RunDirectory.create(tmp_path / "r", desc())
    c = rd.claim(0, "run-a")
    assert isinstance(c, Claim) and rd.claim_path(0).is_file()
    other = rd.claim(0, "run-b")
    assert isinstance(other, ClaimInfo) and other.pid == os.getpid() and other.run_id == "run-a"
    # the same run takes over (a task retried after its worker died)
    c2 = rd.claim(0, "run-a")
    assert isinstance(c2, Claim)
    c.release()  # the replaced claim must not remove its successor's file
    assert rd.claim_path(0).is_file()
    c2.release()
    assert not rd.claim_path(0).exists()

    # a claim of a dead process on this host is stale at once
    proc = subprocess.Popen([sys.executable, "-c", "pass"])
    proc.wait()
    rd.claim_path(1).write_text(json.dumps({"k": 1, "host": socket.gethostname(), "pid": proc.pid,
                                            "run_id": "dead", "started": time.time(), "t": 0.3}))
    c3 = rd.claim(1, "run-b")
    assert isinstance(c3, Claim)
    c3.release()
    # a claim from another host goes stale when its heartbeat is older than run.claim_timeout
    path = rd.claim_path(2)
    path.write_text(json.dumps({"k": 2, "host": "elsewhere.invalid", "pid": 1, "run_id": "far",
                                "started": time.time(), "t": 0.0}))
    assert isinstance(rd.claim(2, "run-b"), ClaimInfo)
    old = time.time() - rd.description.run_options["claim_timeout"] - 5
    os.utime(path, (old, old))
    c4 = rd.claim(2, "run-b")
    assert isinstance(c4, Claim)
    c4.release()


def test_claim_heartbeat_refreshes_the_file(tmp_path, monkeypatch):
    monkeypatch.setattr(Claim, "HEARTBEAT_S", 0.05)
    rd = RunDirectory.create(tmp_path / "r", desc())
    c = rd.claim(0, "a")
    old = time.time() - 1000
    os.utime(rd.claim_path(0), (old, old))
    c.progress(0.75)
    time.sleep(0.4)
    info = rd.claim_infos()[0]
    assert time.time() - info.heartbeat < 100 and info.t == 0.75
    c.release()


def test_checkpoint_round_trip_is_exact(tmp_path):
    d = desc(engine__chunk=2)
    rd = RunDirectory.create(tmp_path / "r", d)
    chain = d.realization(0).chain
    ts = [0.3, 0.6, 1.0]
    full = OperatorTEBD(chain, "Z", 1, chi=8, dt=0.1, chunk=2)
    for _ in full.run(ts):
        pass
    part = OperatorTEBD(chain, "Z", 1, chi=8, dt=0.1, chunk=2)
    run = part.run(ts)
    next(run)  # stop after the first output
    outputs = {"weights": np.random.default_rng(0).random((3, 6, 4)), "state_otoc": {"Z": np.ones((2, 3, 6))}}
    rd.save_checkpoint(0, part.state_dict(), outputs, n_done=1, wall_time=1.5, restarts=0)
    ck = rd.load_checkpoint(0)
    state = part.state_dict()
    assert ck["n_done"] == 1 and ck["wall_time"] == 1.5
    for A, B in zip(ck["state"]["arrays"], state["arrays"]):
        np.testing.assert_array_equal(A, B)
    np.testing.assert_array_equal(ck["outputs"]["weights"], outputs["weights"][:1])
    assert ck["outputs"]["state_otoc"]["Z"].shape == (2, 1, 6)
    resumed = OperatorTEBD(chain, "Z", 1, chi=8, dt=0.1, chunk=2)
    resumed.load_state_dict(ck["state"])
    for _ in resumed.run(ts):
        pass
    for A, B in zip(resumed.arrays, full.arrays):
        np.testing.assert_allclose(A, B, rtol=0, atol=1e-12)
    # a checkpoint of another description is ignored
    other = RunDirectory(tmp_path / "r", desc(engine__chi=7))
    assert other.load_checkpoint(0) is None


@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    out = tmp_path_factory.mktemp("store") / "run"
    run_ensemble(desc(), out, progress="none")
    return out


def test_load_directory_and_merged_file_agree(small_run, tmp_path):
    ens = load(small_run)
    assert ens.otoc("X").shape == (3, 2, 6) and ens.weights.shape == (3, 2, 6, 4)
    assert ens.fields.shape == (3, 6) and ens.discarded_weight.shape == (3, 2) and ens.max_bond.shape == (3, 2)
    assert ens.site == 1 and ens.w == "Z" and ens.probes == ("X", "Z") and ens.L == 6
    np.testing.assert_array_equal(ens.realizations, [0, 1, 2])
    np.testing.assert_array_equal(ens.seeds, [[0, 11], [1, 11], [2, 11]])
    assert ens.engine["order"] == 2 and 0 < ens.engine["max_step"] <= 0.1 and ens.missing == []
    assert np.all(ens.wall_time > 0)
    # fields are the documented draws: numpy's generator seeded with SeedSequence([k, seed])
    for i, k in enumerate(ens.realizations):
        ref = np.random.default_rng(np.random.SeedSequence([int(k), 11])).uniform(-1.5, 1.5, 6)
        np.testing.assert_array_equal(ens.fields[i], ref)
    # Y is not stored, but at infinite temperature it follows from the weights
    assert ens.otoc("Y").shape == (3, 2, 6)
    path, merged = merge([small_run], tmp_path / "all.h5")
    again = mf.load(path)
    for name in ("weights", "right_weight", "discarded_weight", "max_bond", "fields", "couplings", "seeds",
                 "wall_time"):
        np.testing.assert_array_equal(getattr(again, name), getattr(ens, name))
    np.testing.assert_array_equal(again.otoc("X"), ens.otoc("X"))
    assert again.description == ens.description and again.engine == ens.engine
    with h5py.File(path) as f:
        assert f.attrs["conventions"] == mf.CONVENTIONS and f.attrs["version"] == mf.__version__
    with pytest.raises(RunDirectoryError, match="exists") as info:
        merge([small_run], path)
    # the library names its argument, not a command-line flag (the CLI adds --force from .arg)
    assert info.value.arg == "overwrite" and "overwrite=True" in str(info.value) and "--" not in str(info.value)
    with pytest.raises(RunDirectoryError, match="exists") as info:
        again.write(path)
    assert info.value.arg == "overwrite" and "--" not in str(info.value)


def test_result_file_contents(small_run):
    with h5py.File(small_run / "realizations" / "r00001.h5") as f:
        assert json.loads(f.attrs["description"]) == json.loads((small_run / "run.json").read_text())["description"]
        eng = json.loads(f.attrs["evolution"])  # the evolution settings ("engine" before 0.2)
        assert eng["chi"] == 8 and eng["order"] == 2 and eng["dt"] == 0.1 and eng["max_step"] <= 0.1
        assert eng["truncation"] == "svd" and eng["graded"] is False  # how the truncation was done
        assert f.attrs["conventions"] == mf.CONVENTIONS
        np.testing.assert_array_equal(f["seed"][()], [1, 11])
        assert set(f["otoc"]) == {"X", "Z"} and f["couplings"].shape == (5,)
        assert float(f["wall_time"][()]) > 0


def test_status_of_a_partial_run(small_run, tmp_path):
    st = run_status(small_run)
    assert st["done"] == [0, 1, 2] and st["missing"] == [] and st["max_bond"] <= 8
    assert isinstance(st, RunStatus) and st.done == [0, 1, 2] and st.n_realizations == 3
    out = tmp_path / "partial"
    run_ensemble(desc(), out, realizations=[1], progress="none")
    st = run_status(out)
    assert st["done"] == [1] and st["missing"] == [0, 2]
    ens = load(out)
    assert ens.missing == [0, 2] and ens.otoc("Z").shape == (1, 2, 6)


def test_run_status_is_typed_and_reads_as_the_old_dict(small_run):
    """RunStatus: frozen fields, the 0.1.0 dict keys (and their old names) by index, the JSON form."""
    import dataclasses

    st = run_status(small_run)
    with pytest.raises(dataclasses.FrozenInstanceError):
        st.done = []
    with pytest.raises(KeyError):
        st["no_such_key"]
    # the keys of the 0.1.0 dict, in its order, with the same values
    old_keys = ["path", "realizations", "done", "running", "stale", "checkpointed", "missing", "wall_time",
                "largest_discarded_weight", "largest_bond", "max_discarded_weight", "max_bond", "description"]
    assert list(st.keys())[:len(old_keys)] == old_keys
    assert st["realizations"] == st.n_realizations == 3
    assert st["max_discarded_weight"] == st["largest_discarded_weight"] == st.largest_discarded_weight
    assert st["max_bond"] == st["largest_bond"] == st.largest_bond and 1 <= st.largest_bond <= 8
    assert st.wall_time > 0 and st["wall_time"] == st.wall_time and st.get("nothing", 7) == 7
    dw, bond = [], []
    for k in range(3):
        with h5py.File(small_run / "realizations" / f"r{k:05d}.h5") as f:
            dw.append(float(np.max(f["discarded_weight"][()])))
            bond.append(int(np.max(f["max_bond"][()])))
    assert st.largest_discarded_weight == max(dw) and st.largest_bond == max(bond)
    d = dict(st)  # mapping protocol: keys() and []
    assert d["done"] == [0, 1, 2] and d["description"] == st.description
    js = json.loads(json.dumps(st.to_dict()))
    assert js["max_bond"] == st.largest_bond and js["n_realizations"] == 3 and js["checkpointed"] == {}


def test_to_xarray(small_run, monkeypatch):
    """Every array, coordinate and attribute of the Dataset equals the Ensemble's (xarray is in the test extra,
    so this runs in CI); without xarray the error names the install command."""
    ens = load(small_run)
    ds = ens.to_xarray()
    for v in ens.probes:
        np.testing.assert_array_equal(ds[f"otoc_{v}"].values, ens.otoc(v))
    for name in ("weights", "right_weight", "discarded_weight", "max_bond", "bond_discarded", "bond_entropy",
                 "fields", "couplings", "wall_time"):
        np.testing.assert_array_equal(ds[name].values, getattr(ens, name), err_msg=name)
    np.testing.assert_array_equal(ds["realization"].values, ens.realizations)
    np.testing.assert_array_equal(ds["time"].values, ens.times)
    assert list(ds["letter"].values) == ["I", "X", "Y", "Z"] and ds.sizes["site"] == ens.L
    assert json.loads(ds.attrs["description"]) == ens.description
    assert json.loads(ds.attrs["evolution"]) == json.loads(json.dumps(ens.evolution))
    assert ds.attrs["w"] == ens.w and ds.attrs["w_site"] == ens.site
    monkeypatch.setitem(sys.modules, "xarray", None)  # import xarray now raises ImportError
    with pytest.raises(MissingDependencyError, match="pip install"):
        ens.to_xarray()


def test_ensemble_names_before_0_2(small_run):
    """Ensemble.engine and .state: the names before 0.2 of .evolution and .state_kind, the same objects."""
    ens = load(small_run)
    assert ens.engine is ens.evolution and ens.evolution["chi"] == 8
    assert ens.state == ens.state_kind == "infinite_temperature"


def test_load_errors(tmp_path):
    with pytest.raises(RunDirectoryError, match="no such"):
        load(tmp_path / "nothing")
    (tmp_path / "empty").mkdir()
    with pytest.raises(RunDirectoryError, match="not a run directory"):
        load(tmp_path / "empty")
    (tmp_path / "x.h5").write_bytes(b"not hdf5")
    with pytest.raises(RunDirectoryError, match="cannot read"):
        load(tmp_path / "x.h5")


def test_bond_arrays_round_trip_through_directory_merge_and_xarray(small_run, tmp_path):
    """bond_discarded and bond_entropy: stored per realization, equal to a direct evolution of the same
    realization, carried through merge (also of two shards) and to_xarray."""
    ens = load(small_run)
    assert ens.bond_discarded.shape == (3, 2, 5) and ens.bond_entropy.shape == (3, 2, 5)
    d = desc()
    real = d.realization(1)
    direct = mf.evolve_otoc(real.chain, "Z", d.site, d.times, settings=d.settings)
    np.testing.assert_allclose(ens.bond_discarded[1], direct.bond_discarded, rtol=1e-12, atol=1e-15)
    np.testing.assert_allclose(ens.bond_entropy[1], direct.bond_entropy, rtol=1e-12, atol=1e-14)
    # the per-bond ledger adds up to the whole-chain one
    np.testing.assert_allclose(ens.bond_discarded.sum(-1), ens.discarded_weight, rtol=1e-10, atol=1e-15)
    a, b = tmp_path / "a", tmp_path / "b"
    run_ensemble(desc(), a, realizations=[0, 2], progress="none")
    run_ensemble(desc(), b, realizations=[1], progress="none")
    path, _ = merge([a, b], tmp_path / "m.h5")
    again = load(path)
    for name in ("bond_discarded", "bond_entropy"):
        np.testing.assert_array_equal(getattr(again, name), getattr(ens, name))
    ds = again.to_xarray()
    assert ds["bond_entropy"].dims == ("realization", "time", "bond")
    np.testing.assert_array_equal(ds["bond_discarded"].values, ens.bond_discarded)


def test_files_without_bond_arrays_still_load(small_run, tmp_path):
    import shutil

    old = tmp_path / "old"
    shutil.copytree(small_run, old)
    for p in (old / "realizations").glob("*.h5"):
        with h5py.File(p, "a") as f:
            del f["bond_discarded"], f["bond_entropy"]
    ens = load(old)
    assert ens.bond_discarded is None and ens.bond_entropy is None
    path, _ = merge([old], tmp_path / "old.h5")
    assert load(path).bond_entropy is None
    np.testing.assert_array_equal(load(path).otoc("Z"), ens.otoc("Z"))


def test_every_dataset_names_its_axes_units_and_meaning(small_run, tmp_path):
    path, _ = merge([small_run], tmp_path / "all.h5")
    for file, merged in ((small_run / "realizations" / "r00000.h5", False), (path, True)):
        with h5py.File(file) as f:
            seen = []

            def visit(name, obj):
                if isinstance(obj, h5py.Dataset):
                    seen.append(name)
                    axes = obj.attrs["axes"].split(",") if obj.attrs["axes"] else []
                    assert len(axes) == obj.ndim, (file, name, axes, obj.shape)
                    assert obj.attrs["meaning"] and "units" in obj.attrs
            f.visititems(visit)
            assert "weights" in seen and "otoc/Z" in seen
            assert f["weights"].attrs["letters"] == "I,X,Y,Z"
            assert f["otoc/Z"].attrs["probe"] == "Z"
            assert f["bond_entropy"].attrs["units"] == "nats"
            assert f["weights"].attrs["axes"].startswith("realization,") == merged


def test_files_written_before_0_2_keep_loading(small_run, tmp_path):
    """Result files whose settings attribute is still called 'engine' (0.1.0) load with the same settings."""
    import shutil

    old = tmp_path / "old"
    shutil.copytree(small_run, old)
    for p in (old / "realizations").glob("*.h5"):
        with h5py.File(p, "a") as f:
            f.attrs["engine"] = f.attrs["evolution"]
            del f.attrs["evolution"]
    assert load(old).engine == load(small_run).engine
    st = run_status(old)
    assert st["largest_discarded_weight"] == st["max_discarded_weight"] == run_status(small_run)["max_discarded_weight"]


def test_an_ensemble_reports_the_steps_of_all_its_realizations_not_the_last_ones(tmp_path):
    # dt = "auto" picks a step per realization (each has its own fields); the ensemble used to report the last
    # realization's dt_used, Trotter estimate and split counts as if they held for every realization
    raw = {"model": {"kind": "xxz", "L": 8, "W": 6.0}, "operators": {"w": "Z", "site": "center", "v": ["Z"]},
           "times": {"values": [0.5, 1.5]},
           "evolution": {"chi": 8, "dt": "auto", "order": 4, "splitting": "blanes_moan"},
           "ensemble": {"realizations": 3, "seed": 5}}
    run = tmp_path / "run"
    run_ensemble(parse_description(raw), run)
    per = []
    for k in range(3):
        with h5py.File(run / "realizations" / f"r{k:05d}.h5") as f:
            per.append(json.loads(f.attrs["evolution"]))
    dts = [e["dt_used"] for e in per]
    assert len(set(dts)) > 1  # the premise: the realizations did use different steps
    worst = max(per, key=lambda e: e["trotter_estimate"]["predicted_error"])
    ens = load(run)
    path, _ = merge([run], tmp_path / "all.h5")
    for ev in (ens.evolution, mf.load(path).evolution):
        assert ev["dt_used"] == max(dts) and ev["dt_used_range"] == [min(dts), max(dts)]
        assert ev["trotter_estimate"] == worst["trotter_estimate"]  # the realization with the largest claim
        assert ev["splits"] == {r: sum(e["splits"][r] for e in per) for r in per[0]["splits"]}
        assert ev["max_step"] == max(e["max_step"] for e in per)
        assert ev["symmetry_used"] == per[0]["symmetry_used"]
    from mpo_fronts.report import format_summary, summarize

    s = summarize(ens, threshold=0.1)
    assert s["evolution"]["dt_used_range"] == [min(dts), max(dts)]
    assert f"dt_used = {max(dts):g}" in format_summary(s) and "dt_used_range" in format_summary(s)
