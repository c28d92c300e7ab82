"""Recovery paths a new user hits: the advice of an error message works, outputs land where expected, one
default probe everywhere, and every refusal says what to do (issue: interrupts, recovery paths, first screens).
"""

import json

import numpy as np
import pytest

import mpo_fronts as mf
from mpo_fronts.cli import main

SMALL = """
[model]
kind = "xxz"
L = 6
W = 1.0
[operators]
w = "Z"
site = 0
v = [{probes}]
[times]
values = [0.5, 1.0, 1.5]
[evolution]
chi = 16
dt = 0.05
[ensemble]
realizations = 2
seed = {seed}
"""


def desc(tmp_path, name="run.toml", probes='"X", "Z"', seed=3):
    p = tmp_path / name
    p.write_text(SMALL.format(probes=probes, seed=seed))
    return p


@pytest.fixture(scope="module")
def run_dir(tmp_path_factory):
    tmp = tmp_path_factory.mktemp("recovery")
    assert main(["run", str(desc(tmp)), "--out", str(tmp / "R"), "--progress", "none"]) == 0
    return tmp / "R"


def one_line_error(capsys, rc, code=2):
    out = capsys.readouterr()
    assert rc == code, out
    assert "Traceback" not in out.err
    return out.err


# ------------------------------------------------------------------ the stored description runs again
def test_refusal_advice_works_run_json_and_directory(run_dir, tmp_path, capsys):
    other = desc(tmp_path, seed=4)
    err = one_line_error(capsys, main(["run", str(other), "--out", str(run_dir), "--progress", "none"]))
    assert "ensemble.seed" in err and "run.json" in err
    # the advice: run the stored description again (as run.json or as the directory itself)
    for source in (run_dir / "run.json", run_dir):
        rc = main(["run", str(source), "--out", str(run_dir), "--progress", "none"])
        out = capsys.readouterr()
        assert rc == 0, out.err
        assert "already done: 2" in out.out


def test_stored_description_reads_back_identically(run_dir):
    from mpo_fronts.config import read_description

    a = read_description(run_dir / "run.json")
    b = read_description(run_dir.parent / "run.toml")
    assert a.fingerprint() == b.fingerprint()


# ------------------------------------------------------------------ where outputs go
def test_merge_creates_missing_parent_folders(run_dir, tmp_path, capsys):
    out = tmp_path / "results" / "deep" / "x.h5"
    assert main(["merge", str(run_dir), "-o", str(out)]) == 0
    assert mf.load(out).otoc("Z").shape == (2, 3, 6)


def test_second_merge_names_force(run_dir, tmp_path, capsys):
    out = tmp_path / "x.h5"
    assert main(["merge", str(run_dir), "-o", str(out)]) == 0
    before = out.read_bytes()
    err = one_line_error(capsys, main(["merge", str(run_dir), "-o", str(out)]))
    assert "--force" in err
    assert out.read_bytes() == before
    assert main(["merge", str(run_dir), "-o", str(out), "--force"]) == 0


def test_merge_of_different_descriptions_lists_differences(run_dir, tmp_path, capsys):
    other = tmp_path / "O"
    assert main(["run", str(desc(tmp_path, seed=5)), "--out", str(other), "--progress", "none"]) == 0
    err = one_line_error(capsys, main(["merge", str(run_dir), str(other), "-o", str(tmp_path / "m.h5")]))
    assert "ensemble.seed" in err and "3" in err and "5" in err
    assert not (tmp_path / "m.h5").exists()


@pytest.mark.parametrize("command", ["run", "plot", "converge", "merge"])
def test_unwritable_output_is_one_line_exit_2(run_dir, tmp_path, capsys, command):
    pytest.importorskip("matplotlib")
    blocker = tmp_path / "a_file"
    blocker.write_text("not a folder")
    target = blocker / "sub"
    argv = {"run": ["run", str(desc(tmp_path)), "--out", str(target), "--progress", "none"],
            "plot": ["plot", str(run_dir), "--out", str(target)],
            "converge": ["converge", str(desc(tmp_path)), "--chi", "4,8", "--out", str(target), "--progress",
                         "none"],
            "merge": ["merge", str(run_dir), "-o", str(target / "x.h5")]}[command]
    err = one_line_error(capsys, main(argv))
    assert "a_file" in err and ("not a folder" in err or "not a directory" in err.lower())
    assert blocker.read_text() == "not a folder"


# ------------------------------------------------------------------ one default probe
def test_converge_defaults_to_the_probe_summary_and_plot_use(tmp_path, capsys):
    out = tmp_path / "C"
    assert main(["converge", str(desc(tmp_path, probes='"X", "Z"')), "--chi", "4,8", "--out", str(out),
                 "--progress", "none"]) == 0
    text = capsys.readouterr().out
    assert "probe Z" in text
    assert mf.load(out).convergence["probe"] == "Z"
    assert main(["summary", str(out), "--json"]) == 0
    s = json.loads(capsys.readouterr().out)
    assert s["probe"] == "Z" and s["trust"]["source"] == "convergence"


def test_heatmap_applies_a_trust_map_only_to_its_probe(tmp_path):
    pytest.importorskip("matplotlib")
    from mpo_fronts.plots import plot_heatmap

    out = tmp_path / "C"
    assert main(["converge", str(desc(tmp_path)), "--chi", "4,8", "--out", str(out), "--progress", "none",
                 "--probe", "X"]) == 0
    ens = mf.load(out)
    assert "trust: convergence" in plot_heatmap(ens, probe="X")._suptitle.get_text()
    assert "trust: convergence" not in plot_heatmap(ens, probe="Z")._suptitle.get_text()


# ------------------------------------------------------------------ refusals that say what to do
def test_plot_only_suggests_the_figure_meant(run_dir, tmp_path, capsys):
    pytest.importorskip("matplotlib")
    err = one_line_error(capsys, main(["plot", str(run_dir), "--out", str(tmp_path / "f"), "--only",
                                       "lightcone"]))
    assert "did you mean 'light_cone'" in err
    assert not (tmp_path / "f").exists()


def test_converge_rejects_a_tolerance_outside_the_range_of_C(tmp_path, capsys):
    err = one_line_error(capsys, main(["converge", str(desc(tmp_path)), "--chi", "4,8", "--out",
                                       str(tmp_path / "C"), "--tol", "5", "--progress", "none"]))
    assert "--tol" in err and "(0, 2]" in err
    assert not (tmp_path / "C").exists()


def test_check_names_the_real_limit(tmp_path, capsys):
    err = one_line_error(capsys, main(["check", str(desc(tmp_path)), "--L", "20"]))
    assert "12" in err and "dense" in err and "model.L" not in err


def test_exact_size_advice_names_reachable_functions():
    chain = mf.xxz_chain(14, W=1.0, seed=1)
    with pytest.raises(mf.InputError) as e:
        mf.exact_otoc(chain, "Z", 0, [1.0])
    assert "typicality_otoc" in str(e.value)
    res = mf.typicality_otoc(mf.xxz_chain(6, W=1.0, seed=1), "Z", 0, "Z", [0.5], n_states=2, seed=1)
    assert np.all(np.isfinite(res.otoc))
    assert callable(mf.eigenstate_otoc) and callable(mf.free_fermion_otoc)


# ------------------------------------------------------------------ first screens
def test_status_names_site_and_disorder_and_flags_lost_weight(run_dir, tmp_path, capsys):
    assert main(["status", str(run_dir)]) == 0
    text = capsys.readouterr().out
    assert "disorder W = 1" in text and "operator Z at site 0" in text
    assert "WARNING" not in text  # chi = 16 at L = 6 keeps everything
    lossy = tmp_path / "lossy.toml"
    lossy.write_text(SMALL.format(probes='"Z"', seed=3).replace("chi = 16", "chi = 1")
                     .replace("[0.5, 1.0, 1.5]", "[1.0, 2.0, 4.0]").replace('site = 0', 'site = "center"'))
    assert main(["run", str(lossy), "--out", str(tmp_path / "L"), "--progress", "none"]) == 0
    run_text = capsys.readouterr().out
    assert main(["status", str(tmp_path / "L")]) == 0
    text = capsys.readouterr().out
    assert "operator Z at site 3 (center)" in text
    dw = float(mf.load(tmp_path / "L").discarded_weight.max())
    assert dw > 0.1, "the test needs a run that loses more than 10 % of the weight"
    for t in (run_text, text):
        assert "WARNING" in t and "Frobenius weight" in t
