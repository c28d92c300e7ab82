"""Tests of mpo_fronts.plots: figures are written, non-empty, and carry the expected axis labels."""

import types

import numpy as np
import pytest

pytest.importorskip("matplotlib")

from mpo_fronts import plots  # noqa: E402
from mpo_fronts import trust  # noqa: E402
from mpo_fronts.errors import InputError  # noqa: E402


def synthetic_ensemble(with_convergence=True, R=6, L=20, site=3, bonds=True):
    """A duck-typed ensemble with a ballistic front (v = 0.9) and a convergence record that distrusts late times;
    ``bonds``: per-bond entropies and discarded weights (growing in time, loss from t = 3 on)."""
    rng = np.random.default_rng(0)
    t = np.geomspace(0.1, 30.0, 50)
    d = np.abs(np.arange(L) - site)
    centre = d[None, None, :] / 0.9 + 0.5 + rng.normal(0, 0.4, (R, 1, L))
    C = 1.0 / (1.0 + np.exp(-(t[None, :, None] - np.maximum(centre, 0.1)) / 0.7))
    x = np.arange(L) - site
    rho = np.exp(-np.abs(x[None, None, :] - 0.9 * t[None, :, None]) / (0.5 + 0.2 * np.sqrt(t))[None, :, None])
    rho = rho * (x >= 0)
    rho = np.broadcast_to(rho / rho.sum(-1, keepdims=True), C.shape)
    conv = None
    if with_convergence:
        late = 1e-4 * (t / 3.0) ** 2  # changes grow with time and cross tol = 1e-3 near t = 9.5
        conv = trust.bond_convergence({16: C, 32: C + late[None, :, None] * 3, 64: C + late[None, :, None] * 4})
    S = np.log1p(t)[None, :, None] * np.exp(-np.abs(np.arange(L - 1) + 0.5 - site) / 6.0)[None, None, :]
    S = S + 0.01 * rng.random((R, t.size, L - 1))
    lost = 1e-7 * np.clip(t - 3.0, 0, None)[None, :, None] * rng.random((R, 1, L - 1))
    return types.SimpleNamespace(
        times=t, L=L, site=site, w="Z", probes=("X", "Y", "Z"), otoc=lambda v: C, right_weight=rho,
        weights=None, fields=np.zeros((R, L)), discarded_weight=np.zeros((R, t.size)),
        max_bond=np.full((R, t.size), 16), realizations=np.arange(R), description={"kind": "synthetic"},
        engine={"chi": 64, "dt": 0.05, "order": 2, "cutoff": 0.0}, convergence=conv,
        bond_entropy=S if bonds else None, bond_discarded=lost if bonds else None)


def test_write_figures_writes_every_figure_in_both_formats(tmp_path):
    ens = synthetic_ensemble()
    paths = plots.write_figures(ens, tmp_path / "figs", n_boot=50)
    names = {p.name for p in paths}
    assert names == {f"{n}.{f}" for n in plots.FIGURES for f in ("png", "pdf")}
    for p in paths:
        assert p.exists() and p.stat().st_size > 2000
        head = p.read_bytes()[:8]
        assert head.startswith(b"%PDF") if p.suffix == ".pdf" else head == b"\x89PNG\r\n\x1a\n"


def test_axis_labels_read_back_from_figures():
    ens = synthetic_ensemble()
    fig = plots.plot_heatmap(ens, 0.5, "Z")
    ax = fig.axes[0]
    assert ax.get_xlabel() == "site r (W at site i = 3)" and ax.get_ylabel() == "time t (1/J)"
    assert ax.get_yscale() == "log"
    assert "ensemble mean of C(r, t), V = Z" in [a.get_ylabel() for a in fig.axes]  # the colour bar
    assert "untrusted" in [h.get_text() for h in fig.legends[0].get_texts()]  # late times are untrusted

    fig = plots.plot_light_cone(ens, 0.5, "Z", n_boot=50)
    left, right = fig.axes[:2]
    assert left.get_xlabel() == "distance d = |r - i| (sites)" and left.get_ylabel() == "crossing time t* (1/J)"
    assert right.get_yscale() == "log"
    legend = " ".join(t.get_text() for t in left.get_legend().get_texts())
    assert "v_B" in legend and "xi" in legend

    fig = plots.plot_distribution(ens, r=10, probe="Z")
    top, bottom = fig.axes[:2]
    assert top.get_ylabel() == "C(r, t) at r = 10 (d = 7)" and bottom.get_xlabel() == "time t (1/J)"
    assert top.get_xscale() == "log" and bottom.get_ylabel() == "Sarle's b"

    fig = plots.plot_convergence(ens, 0.5, "Z")
    ax = fig.axes[0]
    assert ax.get_xlabel() == "bond dimension chi (successive pairs)" and ax.get_yscale() == "log"
    assert [t.get_text() for t in ax.get_xticklabels()] == ["16->32", "32->64"]

    fig = plots.plot_front(ens, n_boot=50)
    a, b = fig.axes[:2]
    assert a.get_xlabel() == "r - i (sites to the right of W)"
    assert b.get_xlabel() == "time t (1/J)" and b.get_ylabel() == "front width w(t) (sites)"
    assert b.get_xscale() == "log" and b.get_yscale() == "log"


def test_only_and_missing_convergence(tmp_path):
    ens = synthetic_ensemble(with_convergence=False)
    paths = plots.write_figures(ens, tmp_path / "a", only="light_cone", formats=("png",), n_boot=20)
    assert [p.name for p in paths] == ["light_cone.png"]
    # without convergence data the default set leaves that figure out ...
    names = {p.stem for p in plots.write_figures(ens, tmp_path / "b", formats=("png",), n_boot=20)}
    assert names == set(plots.FIGURES) - {"convergence"}
    # ... and asking for it by name is an error that says what to run, with nothing written
    with pytest.raises(InputError, match="fronts converge"):
        plots.write_figures(ens, tmp_path / "c", only="convergence")
    assert not (tmp_path / "c").exists()
    with pytest.raises(InputError, match="only"):
        plots.write_figures(ens, tmp_path / "d", only="histogram")
    with pytest.raises(InputError, match="formats"):
        plots.write_figures(ens, tmp_path / "e", formats=("jpeg",))
    assert not (tmp_path / "d").exists() and not (tmp_path / "e").exists()


def test_light_cone_figure_when_nothing_crosses(tmp_path):
    # no distance ever reaches the threshold (C stays below 0.2): the figure is still written, on linear axes
    ens = synthetic_ensemble(with_convergence=False)
    C_low = 0.1 * ens.otoc("Z")
    ens.otoc = lambda v: C_low
    paths = plots.write_figures(ens, tmp_path, only="light_cone", threshold=0.5, formats=("png",), n_boot=20)
    assert [p.name for p in paths] == ["light_cone.png"] and paths[0].stat().st_size > 2000
    fig = plots.plot_light_cone(ens, 0.5, "Z", n_boot=20)
    assert fig.axes[1].get_yscale() == "linear"


def _texts(fig):
    return " ".join(t.get_text() for ax in fig.axes for t in ax.texts)


def test_one_realization_distribution_panel_says_why_it_is_empty():
    fig = plots.plot_distribution(synthetic_ensemble(R=1), r=8)
    assert "needs at least 4 realizations" in _texts(fig)
    assert not any(line.get_label() == "5/9 (uniform)" for line in fig.axes[1].lines)
    fig = plots.plot_distribution(synthetic_ensemble(R=6), r=8)
    assert "needs at least 4" not in _texts(fig)


def test_heatmap_log_colour_scale_and_legend_off_the_data():
    from matplotlib.colors import LogNorm

    ens = synthetic_ensemble()
    fig = plots.plot_heatmap(ens, color_scale="log", c_min=1e-3)
    mesh = fig.axes[0].collections[0]
    assert isinstance(mesh.norm, LogNorm) and mesh.norm.vmin == pytest.approx(1e-3)
    assert fig.axes[0].get_legend() is None and fig.legends, "the legend is outside the axes"
    assert not isinstance(plots.plot_heatmap(ens).axes[0].collections[0].norm, LogNorm)
    with pytest.raises(InputError, match="color_scale"):
        plots.plot_heatmap(ens, color_scale="logarithmic")


def test_light_cone_promises_bands_only_when_drawn():
    fig = plots.plot_light_cone(synthetic_ensemble(), n_boot=50)
    assert "bands of the fits" in fig._suptitle.get_text()
    assert any(type(c).__name__ in ("PolyCollection", "FillBetweenPolyCollection") for c in fig.axes[0].collections)
    one = plots.plot_light_cone(synthetic_ensemble(R=1), n_boot=50)
    drawn = any(type(c).__name__ in ("PolyCollection", "FillBetweenPolyCollection") for c in one.axes[0].collections)
    assert ("bands of the fits" in one._suptitle.get_text()) == drawn


def test_front_figure_renders_greek_symbols():
    fig = plots.plot_front(synthetic_ensemble(), n_boot=50)
    assert r"$\rho(r, t)$" in fig.axes[0].get_ylabel()
    labels = [t.get_text() for t in fig.axes[1].get_legend().get_texts()]
    assert any(r"$\beta$" in s for s in labels), labels


# ------------------------------------------------------------------ drawing into the caller's Axes (issue 10)
def _pyplot():
    plt = pytest.importorskip("matplotlib.pyplot")
    plt.switch_backend("agg")
    return plt


def _drawn(ax) -> int:
    return len(ax.collections) + len(ax.lines) + len(ax.patches) + len(ax.images)


# name -> (call with ax, number of Axes; None: a (2, 2) array for two sites)
AX_CALLS = {
    "heatmap": (lambda ens, ax: plots.plot_heatmap(ens, ax=ax), 1),
    "distribution": (lambda ens, ax: plots.plot_distribution(ens, r=[6, 10], ax=ax), None),
    "light_cone": (lambda ens, ax: plots.plot_light_cone(ens, n_boot=20, ax=ax), 2),
    "convergence": (lambda ens, ax: plots.plot_convergence(ens, ax=ax), 1),
    "front": (lambda ens, ax: plots.plot_front(ens, n_boot=20, ax=ax), 2),
    "growth": (lambda ens, ax: plots.plot_growth(ens, ax=ax), 2),
    "entropy": (lambda ens, ax: plots.plot_entropy(ens, ax=ax), 2),
    "discarded": (lambda ens, ax: plots.plot_discarded(ens, ax=ax), 1),
}


def test_every_figure_of_write_figures_takes_ax():
    assert set(AX_CALLS) == set(plots.FIGURES)


@pytest.mark.parametrize("name", list(AX_CALLS))
def test_plot_functions_draw_into_the_given_axes(name):
    plt = _pyplot()
    ens = synthetic_ensemble()
    call, n = AX_CALLS[name]
    # a user figure with a spare panel that must stay empty
    fig, grid = plt.subplots(3, 2, figsize=(10, 10))
    try:
        fig.suptitle("mine")
        given = grid[:2, :] if n is None else grid[0, :n]
        spare = grid[2, 1]
        before = plt.get_fignums()
        out = call(ens, given[0] if n == 1 else given)
        assert out is fig, "the return value is the figure drawn into"
        assert plt.get_fignums() == before, "no new pyplot figure"
        for ax in np.ravel(given):
            assert _drawn(ax) > 0, f"{name}: nothing drawn on {ax}"
        assert _drawn(spare) == 0 and not spare.get_title()
        assert fig._suptitle.get_text() == "mine" and not fig.legends  # the caller's figure keeps its own
    finally:
        plt.close(fig)


def test_drawing_into_axes_keeps_labels_and_puts_the_suptitle_in_the_title():
    plt = _pyplot()
    ens = synthetic_ensemble()
    fig, (a, b) = plt.subplots(1, 2)
    try:
        plots.plot_heatmap(ens, ax=a)
        assert a.get_xlabel() == "site r (W at site i = 3)" and a.get_ylabel() == "time t (1/J)"
        assert "trust: convergence" in a.get_title() and "operator Z at site 3" in a.get_title()
        assert "untrusted" in [t.get_text() for t in a.get_legend().get_texts()]
        assert _drawn(b) == 0
    finally:
        plt.close(fig)


def test_wrong_axes_are_an_input_error_naming_ax():
    plt = _pyplot()
    from matplotlib.figure import Figure

    ens = synthetic_ensemble()
    fig, axs = plt.subplots(1, 3)
    other = Figure().subplots()
    try:
        cases = [
            (lambda: plots.plot_heatmap(ens, ax=axs[:2]), "one matplotlib Axes .*got 2 Axes"),
            (lambda: plots.plot_light_cone(ens, n_boot=20, ax=axs[0]), "2 matplotlib Axes .*got 1 Axes"),
            (lambda: plots.plot_entropy(ens, ax=axs), "2 matplotlib Axes .*got 3 Axes"),
            (lambda: plots.plot_distribution(ens, r=[6, 10], ax=axs[:2]), "2 x 2 matplotlib Axes .*got 2 Axes"),
            (lambda: plots.plot_discarded(ens, ax=fig), "type Figure"),
            (lambda: plots.plot_front(ens, ax=[axs[0], other]), "one figure"),
            (lambda: plots.plot_growth(ens, fig=Figure(), ax=axs[:2]), "fig or ax"),
        ]
        for call, match in cases:
            with pytest.raises(InputError, match=match) as err:
                call()
            assert err.value.arg == "ax"
        assert all(_drawn(ax) == 0 for ax in axs), "nothing drawn before the check"
    finally:
        plt.close(fig)


def test_distribution_takes_a_flat_sequence_density_panels_first():
    from matplotlib.figure import Figure

    ens = synthetic_ensemble()
    fig = Figure()
    axs = list(fig.subplots(1, 4))
    plots.plot_distribution(ens, r=[6, 10], ax=axs)
    assert [ax.get_ylabel() for ax in axs] == ["C(r, t) at r = 6 (d = 3)", "C(r, t) at r = 10 (d = 7)",
                                               "Sarle's b", "Sarle's b"]


# ------------------------------------------------------------------ bond entropy and discarded weight (issue 11)
TINY = {"model": {"kind": "xxz", "L": 6, "W": 1.0}, "operators": {"w": "Z", "site": 2, "v": ["Z"]},
        "times": {"values": [0.25, 0.5, 1.0, 2.0]}, "evolution": {"chi": 4, "dt": 0.1},
        "ensemble": {"realizations": 2, "seed": 5}}


@pytest.fixture(scope="module")
def tiny_run(tmp_path_factory):
    """A real run small enough for a second: L = 6 at chi = 4, so the inner bonds truncate and the end bonds
    (dimension <= 4) never do."""
    from mpo_fronts.config import parse_description
    from mpo_fronts.ensemble import run_ensemble

    out = tmp_path_factory.mktemp("plots") / "run"
    run_ensemble(parse_description(TINY), out, progress="none")
    return out


def _mesh(ax):
    from matplotlib.collections import QuadMesh

    meshes = [c for c in ax.collections if isinstance(c, QuadMesh)]
    assert len(meshes) == 1
    return meshes[0]


def test_entropy_figure_draws_the_stored_mean_beside_the_otoc_map(tiny_run, tmp_path):
    import mpo_fronts as mf

    ens = mf.load(tiny_run)
    S = ens.bond_entropy
    assert S.shape == (2, 4, 5)
    fig = plots.plot_entropy(ens)
    cx, sx = fig.axes[:2]
    assert cx.get_xlabel() == "site r (W at site i = 2)"  # the C heat map on the left
    np.testing.assert_allclose(np.asarray(_mesh(cx).get_array()).reshape(4, 6), ens.otoc("Z").mean(axis=0))
    drawn = np.asarray(_mesh(sx).get_array()).reshape(4, 5)
    np.testing.assert_allclose(drawn, S.mean(axis=0), rtol=0, atol=0)
    assert sx.get_xlabel().startswith("bond b (between sites b and b + 1)") and sx.get_yscale() == "log"
    assert cx.get_ylabel() == "time t (1/J)"
    assert "mean over 2 realization(s)" in sx.get_title()
    assert any(np.allclose(ln.get_xdata(), 1.5) for ln in sx.lines), "W (site 2) marked between bonds 1 and 2"
    labels = [a.get_ylabel() for a in fig.axes]
    assert any("entropy S_b (nats)" in lab and "mean over 2" in lab for lab in labels)  # the colour bar
    assert "operator entanglement entropy" in fig._suptitle.get_text()
    legend = [t.get_text() for t in fig.legends[0].get_texts()]
    # chi = 4: the middle bonds come within 0.95 ln 4 of their ceiling by t = 2, so the contour is drawn
    assert "mean S_b = 0.95 ln chi (trust: bond saturated)" in legend
    assert "W at site i = 2 (between bonds 1 and 2)" in legend
    paths = plots.write_figures(ens, tmp_path, only=["entropy", "discarded"], formats=("png",))
    assert [p.name for p in paths] == ["entropy.png", "discarded.png"] and not paths.skipped
    assert all(p.stat().st_size > 2000 for p in paths)


def test_discarded_figure_draws_the_stored_mean_on_a_log_scale(tiny_run):
    import mpo_fronts as mf
    from matplotlib.colors import LogNorm

    ens = mf.load(tiny_run)
    D = ens.bond_discarded.mean(axis=0)
    assert D.shape == (4, 5) and np.all(D[:, [0, 4]] == 0) and np.all(D[:, 1:4] > 0)  # see tiny_run
    fig = plots.plot_discarded(ens)
    ax = fig.axes[0]
    mesh = _mesh(ax)
    assert isinstance(mesh.norm, LogNorm)
    arr = np.ma.asarray(mesh.get_array()).reshape(4, 5)
    np.testing.assert_array_equal(np.ma.getmaskarray(arr), D == 0)  # nothing lost: left blank, not coloured
    np.testing.assert_allclose(arr.filled(0.0), D, rtol=0, atol=0)
    assert ax.get_ylabel() == "time t (1/J)" and ax.get_yscale() == "log"
    assert "no weight discarded" in [t.get_text() for t in fig.legends[0].get_texts()]
    assert any("log scale" in a.get_ylabel() for a in fig.axes)
    worst = ens.bond_discarded.sum(axis=2).max()
    assert f"{worst:.3g}" in fig._suptitle.get_text() and "mean over 2 realization(s)" in fig._suptitle.get_text()


def test_old_files_without_bond_datasets_skip_those_figures(tiny_run, tmp_path):
    import shutil

    import h5py

    import mpo_fronts as mf

    old = tmp_path / "old"
    shutil.copytree(tiny_run, old)
    for p in (old / "realizations").glob("*.h5"):
        with h5py.File(p, "a") as f:
            del f["bond_discarded"], f["bond_entropy"]
    ens = mf.load(old)
    with pytest.warns(plots.FigureSkipped) as caught:
        paths = plots.write_figures(ens, tmp_path / "figs", formats=("png",), n_boot=20)
    said = sorted(str(w.message) for w in caught)
    assert len(said) == 2 and said[0].startswith("figure 'discarded' skipped: this ensemble has no 'bond_discarded'")
    assert said[1].startswith("figure 'entropy' skipped: this ensemble has no 'bond_entropy' dataset")
    assert {p.stem for p in paths} == set(plots.FIGURES) - {"entropy", "discarded", "convergence"}
    assert set(paths.skipped) == {"entropy", "discarded", "convergence"}
    assert "before mpo_fronts 0.2" in paths.skipped["discarded"] and "\n" not in paths.skipped["discarded"]
    # asked for by name: an error that says why, nothing written
    with pytest.raises(InputError, match="only names 'entropy'.*bond_entropy") as err:
        plots.write_figures(ens, tmp_path / "none", only=["heatmap", "entropy"])
    assert err.value.arg == "only" and not (tmp_path / "none").exists()
    with pytest.raises(InputError, match="bond_discarded"):
        plots.plot_discarded(ens)
    # a duck-typed ensemble whose per-bond attributes are None
    with pytest.raises(InputError, match="'entropy' figure needs per-bond data"):
        plots.plot_entropy(synthetic_ensemble(bonds=False))


def test_cli_plot_only_knows_the_new_figures(tiny_run, tmp_path, capsys):
    from mpo_fronts.cli import main

    assert main(["plot", str(tiny_run), "--out", str(tmp_path / "f"), "--only", "entropy,discarded"]) == 0
    assert sorted(p.name for p in (tmp_path / "f").iterdir()) == ["discarded.pdf", "discarded.png", "entropy.pdf",
                                                                  "entropy.png"]
    assert main(["plot", str(tiny_run), "--out", str(tmp_path / "g"), "--only", "entropie"]) == 2
    assert "did you mean 'entropy'" in capsys.readouterr().err
