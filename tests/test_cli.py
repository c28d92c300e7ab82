"""The ``fronts`` command line, through real subprocesses where it matters (kill -9, concurrent runs)."""

import json
import os
import re
import signal
import subprocess
import sys
import time
from pathlib import Path

import h5py
import numpy as np
import pytest

import mpo_fronts as mf
from mpo_fronts.cli import build_parser, main
from mpo_fronts.config import read_description
from mpo_fronts.ensemble import run_ensemble

FRONTS = [sys.executable, "-m", "mpo_fronts.cli"]

SMALL = """
[model]
kind = "xxz"
L = 6
delta = 0.8
W = 1.5
[operators]
w = "Z"
site = 0
v = ["X", "Z"]
[times]
values = [0.4, 0.8, 1.2]
[engine]
chi = 64
dt = 0.05
order = 4
[ensemble]
realizations = 3
seed = 7
"""

# A description whose realizations take a few seconds each (for the kill -9 tests).
SLOW = """
[model]
kind = "xxz"
L = 8
W = 1.0
[operators]
w = "Z"
site = 0
v = ["Z"]
[times]
values = [1.0, 2.0]
[engine]
chi = 16
dt = 0.01
chunk = 5
[ensemble]
realizations = {R}
seed = 3
[run]
checkpoint_interval = {interval}
"""


def write(tmp_path, text, name="run.toml"):
    p = tmp_path / name
    p.write_text(text)
    return p


def fronts(*args, **kw):
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    return subprocess.run(FRONTS + [str(a) for a in args], capture_output=True, text=True, env=env, timeout=300,
                          **kw)


def popen(*args):
    env = dict(os.environ, OMP_NUM_THREADS="1", OPENBLAS_NUM_THREADS="1", MKL_NUM_THREADS="1")
    return subprocess.Popen(FRONTS + [str(a) for a in args], stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                            text=True, env=env)


def compare_runs(a, b, atol=0.0):
    np.testing.assert_array_equal(a.realizations, b.realizations)
    for name in ("weights", "right_weight", "discarded_weight", "max_bond", "fields"):
        np.testing.assert_allclose(getattr(a, name), getattr(b, name), rtol=0, atol=atol, err_msg=name)


# ------------------------------------------------------------------------------------------- help and errors
def test_every_option_of_every_command_documents_its_default():
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, type(parser._subparsers._group_actions[0])))
    assert set(sub.choices) == {"run", "status", "merge", "check", "converge", "summary", "plot", "demo"}
    for name, p in sub.choices.items():
        for action in p._actions:
            if action.option_strings and action.dest != "help":
                text = action.help or ""
                assert "default" in text or "required" in text, f"fronts {name} {action.option_strings[0]}"


def test_help_through_the_console_entry_point():
    res = fronts("run", "--help")
    text = " ".join(res.stdout.split())
    assert res.returncode == 0 and "--workers N local worker processes" in text and "(default: 1, serial" in text


BAD_TOML = [
    ('engine_chi_zero', SMALL.replace("chi = 64", "chi = 0"), "engine.chi"),
    ('typo_table', SMALL.replace("[engine]", "[engin]"), "engin"),
    ('typo_key', SMALL.replace("delta = 0.8", "dleta = 0.8"), "model.dleta"),
    ('site_outside', SMALL.replace("site = 0", "site = 6"), "operators.site"),
    ('times_not_increasing', SMALL.replace("[0.4, 0.8, 1.2]", "[0.4, 1.2, 0.8]"), "times.values"),
    ('W_and_fields', SMALL.replace("W = 1.5", "W = 1.5\nfields = [0, 0, 0, 0, 0, 0]"), "model.fields"),
    ('bits_length', SMALL + '[state]\nkind = "product"\nbits = "0101"\n', "state.bits"),
    ('model_kind', SMALL.replace('kind = "xxz"', 'kind = "heisenberg"'), "model.kind"),
    ('order', SMALL.replace("order = 4", "order = 3"), "engine.order"),
    ('realizations_missing', SMALL.replace("realizations = 3", ""), "ensemble.realizations"),
    ('not_toml', SMALL.replace('w = "Z"', "w = Z"), "not valid TOML"),
    ('dt_string', SMALL.replace("dt = 0.05", 'dt = "fast"'), "engine.dt"),
]


@pytest.mark.parametrize("case,text,key", BAD_TOML, ids=[c[0] for c in BAD_TOML])
def test_malformed_descriptions_exit_2_and_write_nothing(tmp_path, capsys, case, text, key):
    toml = write(tmp_path, text)
    out = tmp_path / "out"
    code = main(["run", str(toml), "--out", str(out)])
    err = " ".join(capsys.readouterr().err.split())
    assert code == 2 and key in err and "Traceback" not in err
    assert not out.exists()
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.toml"]


BAD_OPTIONS = [
    (["run", "{toml}", "--out", "{out}", "--workers", "0"], "--workers"),
    (["run", "{toml}", "--out", "{out}", "--shard", "3/2"], "--shard"),
    (["run", "{toml}", "--out", "{out}", "--shard", "1"], "--shard"),
    (["run", "{toml}", "--out", "{out}", "--dask", "somewhere"], "--dask"),
    (["run", "{toml}", "--out", "{out}", "--dask", "local:2", "--workers", "2"], "--dask"),
    (["run", "{toml}", "--out", "{out}", "--checkpoint-interval", "-1"], "--checkpoint-interval"),
    (["run", "{toml}", "--out", "{out}", "--realizations", "x"], "--realizations"),
    (["run", "{toml}", "--out", "{out}", "--realizations", "5"], "realizations [5]"),
    (["run", "{toml}"], "--out"),
    (["run", "{tmp}/absent.toml", "--out", "{out}"], "absent.toml"),
    (["check", "{toml}", "--L", "13"], "--L"),
    (["check", "{toml}", "--L", "7"], "--L"),
    (["converge", "{toml}", "--chi", "16", "--out", "{out}"], "--chi"),
    (["summary", "{out}", "--threshold", "3"], "--threshold"),
    (["summary", "{out}"], "no such run directory"),
    (["status", "{out}"], "not a run directory"),
    (["merge", "{out}", "-o", "{tmp}/m.h5"], "no such run directory"),
    (["plot", "{out}", "--out", "{tmp}/figs", "--probe", "W"], "--probe"),
    (["frobnicate"], "invalid choice"),
]


@pytest.mark.parametrize("argv,needle", BAD_OPTIONS, ids=[f"{a[0]}-{i}" for i, (a, _) in enumerate(BAD_OPTIONS)])
def test_malformed_options_exit_2_and_write_nothing(tmp_path, capsys, argv, needle):
    toml = write(tmp_path, SMALL)
    out = tmp_path / "out"
    args = [a.format(toml=toml, out=out, tmp=tmp_path) for a in argv]
    with pytest.raises(SystemExit) as info:
        raise SystemExit(main(args))
    err = " ".join(capsys.readouterr().err.split())
    assert info.value.code == 2, err
    assert needle in err and "Traceback" not in err
    assert sorted(p.name for p in tmp_path.iterdir()) == ["run.toml"]


def test_directory_errors_exit_2_and_change_nothing(tmp_path, capsys):
    toml = write(tmp_path, SMALL.replace("realizations = 3", "realizations = 1"))
    out = tmp_path / "out"
    assert main(["run", str(toml), "--out", str(out), "--progress", "none"]) == 0
    snapshot = {p: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file()}
    other = write(tmp_path, SMALL.replace("realizations = 3", "realizations = 1").replace("seed = 7", "seed = 8"),
                  "other.toml")
    assert main(["run", str(other), "--out", str(out)]) == 2
    err = " ".join(capsys.readouterr().err.split())
    assert "different description" in err and "ensemble.seed: stored 7, given 8" in err
    assert {p: p.stat().st_mtime_ns for p in out.rglob("*") if p.is_file()} == snapshot
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    (foreign / "keep.txt").write_text("x")
    assert main(["run", str(toml), "--out", str(foreign)]) == 2
    assert [p.name for p in foreign.iterdir()] == ["keep.txt"]
    # the library speaks of the output directory (argument out); the CLI adds its option
    err = " ".join(capsys.readouterr().err.split())
    assert "new or empty output directory (command-line option --out)" in err
    a_file = tmp_path / "a_file"
    a_file.write_text("x")
    assert main(["run", str(toml), "--out", str(a_file)]) == 2
    err = " ".join(capsys.readouterr().err.split())
    assert "not a directory; choose another output directory (command-line option --out)" in err
    assert a_file.read_text() == "x"


def test_console_script_error_has_no_traceback(tmp_path):
    toml = write(tmp_path, SMALL.replace("chi = 64", "chi = -3"))
    res = fronts("run", toml, "--out", tmp_path / "o")
    assert res.returncode == 2 and "engine.chi" in res.stderr and "Traceback" not in res.stderr
    assert not (tmp_path / "o").exists()


# ------------------------------------------------------------------------------------------- runs
@pytest.fixture(scope="module")
def small_run(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("cli")
    toml = write(tmp, SMALL)
    out = tmp / "run"
    res = fronts("run", toml, "--out", out, "--workers", "2")
    assert res.returncode == 0, res.stderr
    assert "computed now: 3" in res.stdout
    assert "[fronts]" in res.stderr  # plain log lines when not on a terminal
    return toml, out


def test_cli_ensemble_matches_exact_evolution_on_the_stored_fields(small_run):
    toml, out = small_run
    ens = mf.load(out)
    times = read_description(toml).times
    assert ens.realizations.tolist() == [0, 1, 2]
    for i in range(3):
        with h5py.File(out / "realizations" / f"r{i:05d}.h5") as f:
            fields = f["fields"][()]
        chain = mf.xxz_chain(6, delta=0.8, fields=fields)
        ex = mf.exact_otoc(chain, "Z", 0, times)  # dense exact evolution
        for v in ("X", "Z"):
            # chi = 64 is exact at L = 6; fourth-order Trotter error at dt = 0.05 is below 1e-6 here
            np.testing.assert_allclose(ens.otoc(v)[i], ex.otoc(v), rtol=0, atol=1e-6)
        np.testing.assert_allclose(ens.weights[i], ex.weights, rtol=0, atol=1e-6)


def test_status_and_merge(small_run, tmp_path, capsys):
    toml, out = small_run
    assert main(["status", str(out)]) == 0
    text = capsys.readouterr().out
    assert re.search(r"done:\s+3 of 3", text) and re.search(r"missing:\s+0", text)
    assert main(["status", str(out), "--json"]) == 0
    st = json.loads(capsys.readouterr().out)
    assert st["done"] == [0, 1, 2] and st["max_discarded_weight"] >= 0
    merged = tmp_path / "m.h5"
    assert main(["merge", str(out), "-o", str(merged)]) == 0
    compare_runs(mf.load(merged), mf.load(out))
    assert main(["merge", str(out), "-o", str(merged)]) == 2  # exists: refused
    assert main(["merge", str(out), "-o", str(merged), "--force"]) == 0


def test_summary_and_plot(small_run, tmp_path, capsys):
    pytest.importorskip("matplotlib")
    toml, out = small_run
    assert main(["summary", str(out), "--json", "--threshold", "0.3"]) == 0
    s = json.loads(capsys.readouterr().out)
    assert s["threshold"] == 0.3 and s["probe"] == "Z" and s["n_realizations"] == 3
    assert main(["summary", str(out), "--probe", "X"]) == 0
    assert "X" in capsys.readouterr().out
    figs = tmp_path / "figs"
    assert main(["plot", str(out), "--out", str(figs), "--only", "heatmap"]) == 0
    written = list(figs.iterdir())
    assert written and all(p.stat().st_size > 0 for p in written)
    assert {p.stem for p in written} == {"heatmap"}


def test_check_command(tmp_path, capsys):
    toml = write(tmp_path, SMALL.replace("L = 6", "L = 16").replace("site = 0", 'site = "center"'))
    assert main(["check", str(toml), "--L", "6", "--realizations", "1"]) == 0
    out = capsys.readouterr().out
    m = re.search(r"largest \|C_engine - C_exact\| = (\S+)", out)
    assert m and float(m.group(1)) < 1e-5 and "OK" in out
    coarse = write(tmp_path, SMALL.replace("dt = 0.05", "dt = 0.6").replace("order = 4", "order = 2"), "c.toml")
    assert main(["check", str(coarse), "--L", "6", "--realizations", "1", "--tol", "1e-6", "--json"]) == 1
    res = json.loads(capsys.readouterr().out)
    assert res["ok"] is False and res["max_deviation"] > 1e-6
    assert res["evolution"]["dt"] == 0.6 and res["evolution"]["order"] == 2  # the settings checked


def test_converge_command(tmp_path, capsys):
    toml = write(tmp_path, SMALL.replace("chi = 64", "chi = 2").replace("L = 6", "L = 7"))
    out = tmp_path / "conv"
    assert main(["converge", str(toml), "--chi", "4,2", "--out", str(out), "--probe", "X",
                 "--progress", "none"]) == 0
    assert (out / "chi_002" / "run.json").is_file() and (out / "chi_004" / "run.json").is_file()
    ens = mf.load(out)
    assert ens.evolution["chi"] == 4 and ens.convergence is not None
    a, b = mf.load(out / "chi_002"), mf.load(out / "chi_004")
    np.testing.assert_array_equal(a.fields, b.fields)  # same seeds, identical disorder
    expect = np.abs(b.otoc("X") - a.otoc("X")).max(axis=0)  # max over realizations, computed here
    np.testing.assert_allclose(ens.convergence["max_dC"], expect[None])
    assert ens.convergence["trusted"].shape == (3, 7)
    # rerunning reuses the finished runs
    assert main(["converge", str(toml), "--chi", "2,4", "--out", str(out), "--probe", "X",
                 "--progress", "none"]) == 0


def test_demo_command_with_small_descriptions(tmp_path, capsys):
    pytest.importorskip("matplotlib")
    data = tmp_path / "data"
    data.mkdir()
    for name, W in (("thermal", 0.5), ("localized", 1.0)):  # small stand-ins for the real demo files
        write(data, SMALL.replace("W = 1.5", f"W = {W}").replace("chi = 64", "chi = 8").replace(
            "values = [0.4, 0.8, 1.2]", "start = 0.2\nstop = 12.0\nnum = 8").replace("dt = 0.05", "dt = 0.2"),
            f"demo_{name}.toml")
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--data", str(data), "--workers", "1", "--progress", "none"]) == 0
    text = capsys.readouterr().out
    assert str(out) in text
    for name in ("thermal", "localized"):
        assert len(mf.load(out / "runs" / name)) == 3
        assert json.loads((out / "summary" / f"{name}.json").read_text())["n_realizations"] == 3
        assert any((out / "figures" / name).iterdir())


def test_real_demo_descriptions_are_valid():
    root = Path(__file__).resolve().parent.parent / "mpo_fronts" / "demo"
    for name in ("thermal", "localized"):
        d = read_description(root / f"demo_{name}.toml")
        assert d.L == 32 and d.realizations == 12
        assert d.times[-1] >= (90 if name == "localized" else 25)  # thermal: the front hits the ends near t = 16


# ------------------------------------------------------------------------------------------- kill -9 and concurrency
def wait_for(cond, timeout=120.0):
    t0 = time.monotonic()
    while time.monotonic() - t0 < timeout:
        if cond():
            return True
        time.sleep(0.05)
    return False


def all_readable(out: Path) -> None:
    for p in (out / "realizations").iterdir():
        assert not p.name.startswith("."), f"temporary file left behind: {p}"
        with h5py.File(p) as f:
            assert f["otoc"]["Z"].shape == (2, 8)


def test_kill_9_mid_run_then_rerun(tmp_path):
    toml = write(tmp_path, SLOW.format(R=3, interval=300.0))
    out = tmp_path / "run"
    proc = popen("run", toml, "--out", out)
    assert wait_for(lambda: (out / "realizations" / "r00000.h5").exists()
                    and (out / "claims" / "r00001.claim").exists())
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    done = sorted(p.name for p in (out / "realizations").iterdir())
    assert "r00002.h5" not in done
    all_readable(out)
    res = fronts("run", toml, "--out", out)
    assert res.returncode == 0, res.stderr
    assert f"already done: {len(done)}" in res.stdout
    all_readable(out)
    ref = tmp_path / "ref"
    run_ensemble(read_description(toml), ref, progress="none")
    compare_runs(mf.load(out), mf.load(ref))  # identical arrays, nothing lost
    np.testing.assert_array_equal(mf.load(out).otoc("Z"), mf.load(ref).otoc("Z"))


def test_kill_9_of_a_checkpointed_realization(tmp_path):
    toml = write(tmp_path, SLOW.format(R=1, interval=0.05))
    out = tmp_path / "run"
    proc = popen("run", toml, "--out", out)
    ckpt = out / "checkpoints" / "r00000.h5"

    def checkpoint_beyond_first_output():
        try:
            with h5py.File(ckpt) as f:
                return json.loads(f.attrs["engine_state"])["t"] > 1.2
        except (OSError, KeyError):
            return False

    assert wait_for(checkpoint_beyond_first_output)
    os.kill(proc.pid, signal.SIGKILL)
    proc.wait()
    assert not (out / "realizations" / "r00000.h5").exists()
    res = fronts("run", toml, "--out", out)
    assert res.returncode == 0, res.stderr
    assert "resumed from checkpoints: r0" in res.stdout
    with h5py.File(out / "realizations" / "r00000.h5") as f:
        assert f.attrs["restarts"] == 1 and f.attrs["resumed_from"] > 1.2
    assert not ckpt.exists()
    ref = tmp_path / "ref"
    run_ensemble(read_description(toml), ref, progress="none")
    compare_runs(mf.load(out), mf.load(ref), atol=1e-12)
    np.testing.assert_allclose(mf.load(out).otoc("Z"), mf.load(ref).otoc("Z"), rtol=0, atol=1e-12)


def test_two_runs_at_once_share_the_work(tmp_path):
    toml = write(tmp_path, SLOW.format(R=4, interval=300.0).replace("dt = 0.01", "dt = 0.02"))
    out = tmp_path / "run"
    procs = [popen("run", toml, "--out", out) for _ in range(2)]
    outs = [p.communicate(timeout=300) for p in procs]
    assert all(p.returncode == 0 for p in procs), [o[1] for o in outs]
    computed = [int(re.search(r"computed now: (\d+)", o[0]).group(1)) for o in outs]
    # every realization computed exactly once, by one of the two runs
    assert sum(computed) == 4
    run_ids = []
    for k in range(4):
        with h5py.File(out / "realizations" / f"r{k:05d}.h5") as f:
            run_ids.append(f.attrs["run_id"])
    assert len(run_ids) == 4
    res = fronts("status", out)
    assert re.search(r"done:\s+4 of 4", res.stdout)


def test_demo_without_matplotlib_fails_before_any_work(tmp_path, monkeypatch, capsys):
    # the figures come last; a missing optional dependency must stop the demo before it computes or writes
    import mpo_fronts.cli as cli
    from mpo_fronts.errors import MissingDependencyError

    def missing(module, extra):
        raise MissingDependencyError(f"the optional dependency '{module}' is not installed; "
                                     f"install it with \"pip install 'mpo-fronts[{extra}]'\"")

    monkeypatch.setattr(cli, "require", missing)
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out), "--progress", "none"]) == 2
    assert "mpo-fronts[plot]" in capsys.readouterr().err
    assert not out.exists()


def test_demo_descriptions_ship_with_a_non_editable_install(tmp_path):
    # Build the package as 'pip install .' would copy it (setuptools build_py with the project's pyproject, on a
    # copy of the sources, no network) and check that the demo descriptions are inside it, where 'fronts demo'
    # looks for them from any directory.
    import shutil

    root = Path(__file__).resolve().parents[1]
    src = tmp_path / "src"
    shutil.copytree(root / "mpo_fronts", src / "mpo_fronts", ignore=shutil.ignore_patterns("__pycache__"))
    shutil.copy(root / "pyproject.toml", src / "pyproject.toml")
    shutil.copy(root / "README.md", src / "README.md")
    res = subprocess.run([sys.executable, "-c", "from setuptools import setup; setup()", "-q", "build_py", "-d",
                          str(tmp_path / "built")], capture_output=True, text=True, timeout=300, cwd=src)
    assert res.returncode == 0, res.stderr
    for name in ("demo_thermal.toml", "demo_localized.toml"):
        assert (tmp_path / "built" / "mpo_fronts" / "demo" / name).is_file(), name
    from mpo_fronts.cli import _demo_data

    assert (_demo_data(None) / "demo_thermal.toml").is_file()
