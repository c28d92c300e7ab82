"""Tests of mpo_fronts.plots: figures are written, non-empty, and carry the expected axis labels."""

import types

import numpy as np
import pytest

pytest.importorskip("matplotlib")

from mpo_fronts import analysis as an  # noqa: E402
from mpo_fronts import plots  # noqa: E402
from mpo_fronts import trust  # noqa: E402
from mpo_fronts.errors import InputError  # noqa: E402


def synthetic_ensemble(with_convergence=True, R=6, L=20, site=3):
    """A duck-typed ensemble with a ballistic front (v = 0.9) and a convergence record that distrusts late times."""
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
    return types.SimpleNamespace(
        times=t, L=L, site=site, w="Z", probes=("X", "Y", "Z"), otoc=lambda v: C, right_weight=rho,
        weights=None, fields=np.zeros((R, L)), discarded_weight=np.zeros((R, t.size)),
        max_bond=np.full((R, t.size), 16), realizations=np.arange(R), description={"kind": "synthetic"},
        engine={"chi": 64, "dt": 0.05, "order": 2, "cutoff": 0.0}, convergence=conv)


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
