"""Executors, resume, checkpoints and the exact check of the production layer (real processes, real Dask)."""

import os
import signal
import threading
import time

import numpy as np
import pytest

import mpo_fronts as mf
from interrupting import interrupt_repeatedly
from mpo_fronts.config import parse_description
from mpo_fronts.workflows import check_against_exact
from mpo_fronts.ensemble import (compute_realization, parse_dask, parse_shard, run_ensemble,
                                 shard_indices)
from mpo_fronts.errors import InputError, RunDirectoryError
from mpo_fronts.store import RunDirectory

ARRAYS = ("weights", "right_weight", "discarded_weight", "max_bond", "fields", "couplings", "seeds")


def small(**changes):
    raw = {
        "model": {"kind": "xxz", "L": 6, "W": 1.0, "delta": 0.7},
        "operators": {"w": "Z", "site": 2, "v": ["X", "Z"]},
        "state": {"kind": "random_product", "samples": 2},
        "times": {"values": [0.3, 0.8, 1.2]},
        "engine": {"chi": 64, "dt": 0.05, "chunk": 4},
        "ensemble": {"realizations": 4, "seed": 99},
    }
    d = parse_description(raw)
    return d.replace(**changes) if changes else d


def assert_same(a, b, atol=0.0):
    np.testing.assert_array_equal(a.realizations, b.realizations)
    for name in ARRAYS:
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=0, atol=atol, err_msg=name)
    for v in a.probes:
        np.testing.assert_allclose(a.otoc(v), b.otoc(v), rtol=0, atol=atol)
    if a.state != "infinite_temperature":
        np.testing.assert_array_equal(a.bits, b.bits)


def test_parsers():
    assert parse_shard("1/3") == (1, 3) and shard_indices(10, (1, 3)) == [1, 4, 7]
    assert sorted(shard_indices(10, (0, 2)) + shard_indices(10, (1, 2))) == list(range(10))
    for bad in ("3/3", "-1/2", "1", "a/b", "0/0"):
        with pytest.raises(InputError, match="shard") as info:  # the library names its argument, not a flag
            parse_shard(bad)
        assert info.value.arg == "shard"
    assert parse_dask("local:3") == ("local", 3) and parse_dask("tcp://10.0.0.1:8786")[0] == "address"
    for bad in ("local:0", "local:x", "10.0.0.1:8786", "tcp://"):
        with pytest.raises(InputError, match="dask") as info:
            parse_dask(bad)
        assert info.value.arg == "dask"


def test_option_errors_write_nothing(tmp_path):
    with pytest.raises(InputError, match="workers"):
        run_ensemble(small(), tmp_path / "a", workers=0)
    with pytest.raises(InputError, match="not both"):
        run_ensemble(small(), tmp_path / "a", workers=2, dask="local:2")
    with pytest.raises(InputError, match="outside"):
        run_ensemble(small(), tmp_path / "a", realizations=[7])
    assert not (tmp_path / "a").exists()


@pytest.fixture(scope="module")
def serial(tmp_path_factory):
    out = tmp_path_factory.mktemp("ens") / "serial"
    rep = run_ensemble(small(), out, progress="none")
    assert rep.computed == [0, 1, 2, 3]
    return mf.load(out)


def test_serial_run_matches_exact_product_state_otocs(serial):
    d = small()
    for i, k in enumerate(serial.realizations):
        chain = mf.xxz_chain(6, delta=0.7, fields=serial.fields[i])
        for s, bits in enumerate(serial.bits[i]):
            ex = mf.exact_otoc(chain, "Z", 2, d.times, state=str(bits))  # dense reference
            for v in ("X", "Z"):
                # chi = 64 is exact at L = 6 (4^3): only second-order Trotter error at dt = 0.05 remains
                np.testing.assert_allclose(serial.state_otoc(v)[i, s], ex.otoc(v), atol=2e-3)
        np.testing.assert_allclose(serial.otoc("Z")[i], serial.state_otoc("Z")[i].mean(axis=0), atol=1e-15)


def test_every_executor_gives_identical_arrays(serial, tmp_path):
    d = small()
    run_ensemble(d, tmp_path / "procs", workers=2, progress="none")
    assert_same(mf.load(tmp_path / "procs"), serial)
    rep = run_ensemble(d, tmp_path / "dask", dask="local:2", progress="none")
    assert rep.computed == [0, 1, 2, 3]
    assert_same(mf.load(tmp_path / "dask"), serial)
    run_ensemble(d, tmp_path / "s0", shard=(0, 2), progress="none")
    run_ensemble(d, tmp_path / "s1", shard=(1, 2), progress="none")
    assert mf.load(tmp_path / "s0").realizations.tolist() == [0, 2]
    path, _ = mf.store.merge([tmp_path / "s0", tmp_path / "s1"], tmp_path / "shards.h5")
    assert_same(mf.load(path), serial)


def test_truncation_route_reaches_the_engine_and_the_files(tmp_path):
    # engine.truncation = "eigh" / "rsvd" is passed to every realization and recorded; results equal the SVD
    # route's (tested in detail in test_evolve.py; 1e-8 here)
    runs = {}
    for tr in ("svd", "eigh", "rsvd"):
        d = small(model__L=10, engine__chi=16, ensemble__realizations=1, times__values=[1.0, 2.5],
                  engine__truncation=tr)
        run_ensemble(d, tmp_path / tr, progress="none")
        runs[tr] = mf.load(tmp_path / tr)
        assert runs[tr].engine["truncation"] == tr
    assert_same(runs["eigh"], runs["svd"], atol=1e-8)
    assert_same(runs["rsvd"], runs["svd"], atol=1e-8)


def test_resume_computes_only_what_is_missing(serial, tmp_path):
    d = small()
    out = tmp_path / "r"
    run_ensemble(d, out, realizations=[0, 2], progress="none")
    before = {k: os.stat(RunDirectory.open(out).result_path(k)).st_mtime_ns for k in (0, 2)}
    rep = run_ensemble(d, out, progress="none")
    assert rep.existing == [0, 2] and rep.computed == [1, 3]
    rd = RunDirectory.open(out)
    assert {k: os.stat(rd.result_path(k)).st_mtime_ns for k in (0, 2)} == before  # untouched
    assert_same(mf.load(out), serial)
    with pytest.raises(RunDirectoryError, match="different description"):
        run_ensemble(small(engine__chi=32), out, progress="none")


def test_checkpoint_resume_equals_uninterrupted(tmp_path):
    d = small(run__checkpoint_interval=1e-6, ensemble__realizations=1, engine__chunk=2)
    ref = tmp_path / "ref"
    run_ensemble(d, ref, progress="none")
    out = tmp_path / "ck"
    rd = RunDirectory.create(out, d)

    for _ in interrupt_repeatedly(rd, d):  # interrupt three times, each after a few blocks
        assert rd.load_checkpoint(0) is not None and not rd.has_result(0)
    res = compute_realization(str(rd.path), d.to_dict(), 0, "final")
    assert res["status"] == "done" and res["resumed_from"] > 0
    assert rd.load_checkpoint(0) is None  # removed once the result is in place
    assert_same(mf.load(out), mf.load(ref), atol=1e-12)


def test_busy_realizations_are_left_to_their_owner(tmp_path):
    d = small(ensemble__realizations=2)
    out = tmp_path / "b"
    rd = RunDirectory.create(out, d)
    claim = rd.claim(1, "another-run")  # held by a live process (this one) of another run
    rep = run_ensemble(d, out, progress="none")
    assert rep.computed == [0] and list(rep.busy) == [1] and not rd.has_result(1)
    assert rep.busy[1]["pid"] == os.getpid()
    claim.release()
    rep = run_ensemble(d, out, progress="none")
    assert rep.computed == [1] and rep.complete


def test_wait_takes_over_when_the_owner_lets_go(tmp_path):
    d = small(ensemble__realizations=2)
    out = tmp_path / "w"
    rd = RunDirectory.create(out, d)
    claim = rd.claim(1, "another-run")
    threading.Timer(1.0, claim.release).start()
    rep = run_ensemble(d, out, progress="none", wait=True)
    assert rep.computed == [0, 1] and rep.complete


def test_dask_worker_killed_mid_task(tmp_path):
    d = parse_description({
        "model": {"kind": "xxz", "L": 8, "W": 1.0},
        "operators": {"w": "Z", "site": 0, "v": ["Z"]},
        "times": {"values": [1.0, 2.0]},
        "engine": {"chi": 16, "dt": 0.01, "chunk": 5},
        "ensemble": {"realizations": 3, "seed": 5},
        "run": {"checkpoint_interval": 0.2},
    })
    out = tmp_path / "dask"
    result = {}
    t = threading.Thread(target=lambda: result.update(rep=run_ensemble(d, out, dask="local:2", progress="none")))
    t.start()
    killed = None
    deadline = time.monotonic() + 120
    while killed is None and time.monotonic() < deadline:
        time.sleep(0.1)
        if not (out / "run.json").is_file():
            continue
        rd = RunDirectory.open(out)
        for k, info in rd.claim_infos().items():
            if info.pid != os.getpid() and rd.checkpoint_path(k).is_file():  # mid-task, with a checkpoint
                os.kill(info.pid, signal.SIGKILL)
                killed = k
                break
    t.join(timeout=240)
    assert killed is not None, "no worker was seen computing"
    rep = result["rep"]
    assert rep.complete and sorted(rep.computed) == [0, 1, 2]
    assert killed in rep.resumed  # the retried task continued from the dead worker's checkpoint
    ens = mf.load(out)
    assert ens.realizations.tolist() == [0, 1, 2]
    ref = tmp_path / "ref"
    run_ensemble(d, ref, realizations=[killed], progress="none")
    i = ens.realizations.tolist().index(killed)
    np.testing.assert_allclose(ens.otoc("Z")[i], mf.load(ref).otoc("Z")[0], rtol=0, atol=1e-12)


def test_check_against_exact():
    d = parse_description({
        "model": {"kind": "xxz", "L": 20, "W": 2.0},
        "operators": {"w": "Z", "site": "center", "v": ["X", "Z"]},
        "times": {"values": [0.5, 1.0]},
        "engine": {"chi": 64, "dt": 0.05, "order": 4},
        "ensemble": {"realizations": 3, "seed": 1},
    })
    res = check_against_exact(d, L=6, realizations=2)
    assert res.L == 6 and res.site == 3 and len(res.per_realization) == 2
    # chi = 64 is exact at L = 6 (4^3); fourth-order Trotter error at dt = 0.05 is far below 1e-5
    assert res.max_deviation < 1e-5
    coarse = check_against_exact(d.replace(engine__dt=0.5, engine__order=2), L=6, realizations=1)
    assert coarse.max_deviation > 10 * res.max_deviation  # the check sees Trotter error
    with pytest.raises(InputError, match="L must be an integer in 2..12") as info:  # argument, not CLI flag
        check_against_exact(d, L=13)
    assert info.value.arg == "L"


def test_mixed_field_ising_pipeline_against_exact(tmp_path):
    d = parse_description({
        "model": {"kind": "mixed_field_ising", "L": 5},
        "operators": {"w": "X", "site": 0, "v": ["Y", "Z"]},
        "state": {"kind": "product", "bits": "01100"},
        "times": {"values": [0.2, 0.6]},
        "engine": {"chi": 32, "dt": 0.02, "order": 4},
    })
    run_ensemble(d, tmp_path / "mfi", progress="none")
    ens = mf.load(tmp_path / "mfi")
    assert np.all(np.isnan(ens.fields))
    ex = mf.exact_otoc(mf.mixed_field_ising_chain(5), "X", 0, d.times, state="01100")
    for v in ("Y", "Z"):
        np.testing.assert_allclose(ens.otoc(v)[0], ex.otoc(v), atol=1e-7)
