"""Tests of mpo_fronts.growth: the local growth exponent, the stage map, the summary's ``growth`` key, the growth
figure, and the default distance of the distribution (mpo_fronts.analysis.reached_site)."""

import json

import numpy as np
import pytest
from scipy.special import jv, jvp

import mpo_fronts as mf
from mpo_fronts import analysis as an
from mpo_fronts import growth as gr
from mpo_fronts import report
from mpo_fronts.errors import InputError
from mpo_fronts.exact import exact_otoc, free_fermion_otoc
from synthetic_fronts import ballistic_ensemble, fake_ensemble


def _resolved(t, h=gr.DEFAULT_WINDOW):
    """Output times whose fit window lies inside the grid with a neighbour within h in ln t on both sides."""
    x = np.log(t)
    gap = np.diff(x)
    out = np.zeros(t.size, bool)
    out[1:-1] = (gap[:-1] <= h) & (gap[1:] <= h)
    return out & (x - x[0] >= h) & (x[-1] - x >= h)


def _grids(n=25, lo=0.02, hi=0.3, seed=4):
    """A log-spaced, a linear and an irregular (random in ln t) grid on [lo, hi]."""
    rng = np.random.default_rng(seed)
    irregular = np.sort(np.exp(rng.uniform(np.log(lo), np.log(hi), n)))
    return {"log": np.geomspace(lo, hi, n), "linear": np.linspace(lo, hi, n), "irregular": irregular}


# ------------------------------------------------------------------------------------------ alpha
@pytest.mark.parametrize("kind", ["log", "linear", "irregular"])
def test_alpha_of_a_power_law_is_its_exponent_on_any_grid(kind):
    t = _grids(40, 0.05, 50.0)[kind]
    C = 3e-6 * t ** 2.5
    a = gr.local_exponent(t, C)
    np.testing.assert_allclose(a, 2.5, atol=1e-9)  # a least-squares line through exact ln C vs ln t points
    # t = 0 and points at or below the floor get no exponent, and are not used by their neighbours
    t0 = np.concatenate([[0.0], t])
    C0 = np.concatenate([[0.0], C])
    C0[5] = 1e-20
    a0 = gr.local_exponent(t0, C0)
    assert np.isnan(a0[0]) and np.isnan(a0[5])
    np.testing.assert_allclose(a0[np.isfinite(a0)], 2.5, atol=1e-9)
    assert np.isfinite(a0).sum() == t.size - 1


def test_alpha_follows_a_bending_curve_within_the_window_bias():
    # C = t^3 / (1 + t^2): alpha = 3 - 2 t^2 / (1 + t^2) (derived here), bending from 3 to 1 around t = 1
    for kind, t in _grids(60, 0.05, 20.0).items():
        a = gr.local_exponent(t, t ** 3 / (1 + t ** 2))
        exact = 3 - 2 * t ** 2 / (1 + t ** 2)
        inside = _resolved(t)
        # local linear fit over |dln t| <= 0.25, symmetric: bias O(h^2 f''') with |f'''| <= 1.6 here, so < 0.03
        # (on the irregular grid the window is lopsided: bias O(h |f''|) <= 0.25, f'' = -4 t^2 / (1 + t^2)^2)
        bound = 0.25 if kind == "irregular" else 0.03
        assert inside.sum() > 20 and np.max(np.abs(a - exact)[inside]) < bound, kind
        # one-sided windows at the ends, and windows of the 3 nearest times where the grid is coarser than h in
        # ln t (the early times of the linear grid): bias O(width |f''|), |f''| <= 1
        assert np.max(np.abs(a - exact)) < 1.0, kind


def test_alpha_uses_the_trust_mask_and_validates_its_arguments():
    t = np.geomspace(0.1, 10, 30)
    C = np.broadcast_to((1e-3 * t ** 2)[None, :, None], (2, 30, 3)).copy()
    C[1, 10:, 1] = 0.5  # garbage on untrusted points
    trusted = np.ones(C.shape, bool)
    trusted[1, 10:, 1] = False
    a = gr.local_exponent(t, C, trusted=trusted)
    assert np.all(np.isnan(a[1, 10:, 1]))
    np.testing.assert_allclose(a[np.isfinite(a)], 2.0, atol=1e-9)
    with pytest.raises(InputError, match="window"):
        gr.local_exponent(t, C, window=0.0)
    with pytest.raises(InputError, match="time axis"):
        gr.local_exponent(t[:-1], C)


def test_alpha_2d_at_early_times_clean_xx_chain_against_bessel_closed_form():
    """Clean XX chain (J = 1, delta = 0, no fields): by Jordan-Wigner the chain is free fermions with hopping 1/2,
    so on the infinite chain |G_{i,i+d}(t)|^2 = J_d(t)^2 and C_ZZ(d, t) = 4 J_d(t)^2 (1 - J_d(t)^2) (derived in
    mpo_fronts.exact.free_fermion_otoc from Wick's theorem; consistent with Lin & Motrunich, PRB 98, 134305 (2018)).
    The ends of L = 40 are 20 sites from W: at t <= 0.3 their effect is of order J_20(0.3)^2 ~ 1e-60.
    Lowest order (Baker-Campbell-Hausdorff / Taylor series; common practice): alpha -> 2d. From the series
    J_d(t) = (t/2)^d / d! (1 - t^2 / (4 (d + 1)) + ...) (scipy.special.jv / Abramowitz & Stegun 9.1.10):
    alpha = 2d - t^2 / (d + 1) + O(t^4) for d >= 2, and 2 - t^2 + O(t^4) for d = 1 (the 1 - J_1^2 factor adds
    -t^2 / 2; derived here)."""
    for kind, t in _grids().items():
        C = free_fermion_otoc(mf.xxz_chain(40, delta=0.0), site=20, times=t)
        interior = _resolved(t)
        for d in (1, 2, 3):
            Jd, dJ = jv(d, t), jvp(d, t)
            bessel = 4 * Jd ** 2 * (1 - Jd ** 2)
            np.testing.assert_allclose(C[:, 20 + d], bessel, rtol=1e-8)  # the project's closed form vs scipy
            exact_alpha = 2 * t * dJ / Jd * (1 - 2 * Jd ** 2) / (1 - Jd ** 2)  # t d/dt ln[J^2 (1 - J^2)]
            a = gr.local_exponent(t, C[:, 20 + d])
            curv = t ** 2 / (d + 1)
            # window bias: O(h^2 |f'''|) inside (f''' = -4 t^2 / (d + 1) at lowest order), O(h |f''|) at the ends
            assert np.all(np.abs(a - exact_alpha)[interior] <= 0.5 * curv[interior] + 1e-7), (kind, d)
            assert np.all(np.abs(a - exact_alpha) <= 3.0 * curv + 1e-7), (kind, d)
            if kind == "log":  # the series coefficient itself: (alpha - 2d) / t^2 -> -1/(d+1) (d >= 2) or -1
                coef = ((a - 2 * d) / t ** 2)[interior & (t < 0.15)]
                np.testing.assert_allclose(coef, -1.0 if d == 1 else -1.0 / (d + 1), rtol=0.1)
        st = gr.find_stages(t, C[:, 21:24])  # one early stage per distance, at 2d within the t^2 / (d+1) bend
        assert list(st.column) == [0, 1, 2] and np.all(st.is_early) and np.all(st.index == 0)
        for j, d in enumerate((1, 2, 3)):
            assert abs(st.exponent[j] - 2 * d) < 0.3 ** 2 / (d + 1) + (0.3 ** 2 if d == 1 else 0), (kind, d)


def test_alpha_2d_at_early_times_small_random_chain_against_dense_exact():
    """Random-field XXZ chains (L = 8) by dense exact evolution (scipy eigendecomposition, no truncation, no
    Trotter error): alpha -> 2d as t -> 0 for probes X and Z at d = 1..3, W = Z at site 0 (lowest order of the
    series; common practice). C(3, t) near 1e-12 at t = 0.03 is still 3 orders above dense round-off."""
    t = np.geomspace(0.03, 0.2, 12)
    for chain in (mf.xxz_chain(8, delta=1.0, W=2.0, seed=3), mf.xxz_chain(8, delta=0.6, W=1.0, seed=5)):
        res = exact_otoc(chain, w="Z", site=0, times=t)
        for v in ("X", "Z"):
            C = res.otoc(v)
            a = gr.local_exponent(t, C)
            for d in (1, 2, 3):
                dev = np.abs(a[:, d] - 2 * d)
                assert dev[0] < 0.01, (v, d, a[:, d])
                assert np.all(dev < 0.05), (v, d, a[:, d])
                assert dev[0] < dev[-1], (v, d)  # the deviation shrinks as t -> 0
            st = gr.find_stages(t, C[:, 1:4])
            assert np.all(st.is_early) and list(st.column) == [0, 1, 2]
            np.testing.assert_allclose(st.exponent, [2, 4, 6], atol=0.05)


# ------------------------------------------------------------------------------------------ stages
def _two_stage(t, p1=4.0, p2=1.5, t1=1.0, a=1e-4):
    """C = a t^p1 for t < t1, then the continuous continuation a t1^(p1 - p2) t^p2."""
    return np.where(t < t1, a * t ** p1, a * t1 ** (p1 - p2) * t ** p2)


@pytest.mark.parametrize("kind", ["log", "irregular"])
def test_stages_of_a_curve_with_two_known_exponents(kind):
    t = _grids(90, 0.01, 100.0)[kind]
    C = _two_stage(t, t1=1.0)
    st = gr.find_stages(t, C)
    assert st.n_stages.tolist() == [[2]]
    np.testing.assert_allclose(st.exponent, [4.0, 1.5], atol=1e-6)  # stages hold only points of one branch
    assert st.is_early.tolist() == [True, False]
    assert st.t_end[0] < 1.0 < st.t_start[1]
    # the crossover left out is at most the fit window on each side of the break
    assert st.t_end[0] > np.exp(-0.6) and st.t_start[1] < np.exp(0.6)
    assert st.t_start[0] == t[0]
    np.testing.assert_allclose(st.early(), [[4.0]], atol=1e-6)
    np.testing.assert_allclose(st.later(), [[1.5]], atol=1e-6)
    assert [s["exponent"] for s in st.of(0, 0)] == pytest.approx([4.0, 1.5], abs=1e-6)


def test_stages_with_noise_and_saturation():
    rng = np.random.default_rng(7)
    t = np.geomspace(0.01, 100.0, 120)
    C = _two_stage(t, 6.0, 0.8, t1=0.7, a=1e-2) * np.exp(rng.normal(0, 0.01, t.size))
    st = gr.find_stages(t, C)
    np.testing.assert_allclose(st.exponent, [6.0, 0.8], atol=0.05)
    # a saturated tail (C -> 1) is left out with c_max = 0.5, and becomes an alpha ~ 0 stage without it
    sat = np.minimum(1e-2 * t ** 2, 1.0)
    st = gr.find_stages(t, sat)
    np.testing.assert_allclose(st.exponent, [2.0], atol=1e-9)
    assert st.t_end[0] < np.sqrt(0.5 / 1e-2)
    st = gr.find_stages(t, sat, c_max=None)
    assert st.n_stages[0, 0] == 2 and abs(st.exponent[1]) < 1e-9


def test_a_plateau_after_an_unresolved_rise_is_not_an_early_stage():
    # below the floor at first, then a rise whose alpha falls from 14 at 20 per unit ln t (no plateau on a grid of
    # 0.1 in ln t), then alpha = 1.5: the early t^(2d) growth was hidden below the floor, so no early stage
    x = np.arange(-2.0, 4.0, 0.1)
    x0 = 0.5
    slope = np.where(x < x0, 14.0, np.maximum(1.5, 14.0 - 20.0 * (x - x0)))
    lnC = np.log(1e-13) + np.concatenate([[0.0], np.cumsum(0.5 * (slope[1:] + slope[:-1]) * np.diff(x))])
    lnC -= lnC[np.searchsorted(x, x0)] - np.log(2e-14)  # C crosses the floor 1e-14 just before x0
    st = gr.find_stages(np.exp(x), np.exp(lnC))
    assert st.n_stages[0, 0] == 1 and st.exponent[0] == pytest.approx(1.5, abs=0.01)
    assert not st.is_early[0] and np.isnan(st.early()[0, 0]) and np.isnan(st.later()[0, 0])
    assert st.t_start[0] > np.exp(x0 + 0.5)


def test_later_stage_distribution_over_realizations():
    rng = np.random.default_rng(3)
    R, t = 9, np.geomspace(0.01, 100.0, 100)
    p_late = rng.uniform(0.3, 1.2, R)
    t1 = rng.uniform(0.3, 1.0, R)
    C = np.stack([_two_stage(t, 6.0, p, tb, 1e-3)[:, None] for p, tb in zip(p_late, t1)])  # (R, n_t, 1)
    st = gr.find_stages(t, C)
    np.testing.assert_allclose(st.early()[:, 0], 6.0, atol=1e-6)
    np.testing.assert_allclose(st.later()[:, 0], p_late, atol=1e-6)


def test_stage_options_are_checked():
    t = np.geomspace(0.1, 10, 20)
    with pytest.raises(InputError, match="tol"):
        gr.find_stages(t, t ** 2, tol=-1)
    with pytest.raises(InputError, match="min_points"):
        gr.find_stages(t, t ** 2, min_points=1)
    with pytest.raises(InputError, match="alpha"):
        gr.find_stages(t, t ** 2, alpha=np.zeros(3))


# ------------------------------------------------------------------------------------------ ensembles, summary
def _staged_ensemble(R=8, L=10, site=0, seed=2):
    """C(d, t) = c_d (t / t1)^(2d) for t < t1 = 0.4 d, then c_d (t / t1)^p_r: an early stage 2d and a slow stage
    p_r drawn per realization (a localized-like caricature), with c_d = 1e-3 e^(-d); d = 0 is flat."""
    rng = np.random.default_rng(seed)
    t = np.geomspace(0.02, 100.0, 90)
    p = rng.uniform(0.2, 0.9, R)
    C = np.zeros((R, t.size, L))
    for d in range(1, L - site):
        t1 = 0.4 * d
        for r in range(R):
            C[r, :, site + d] = 1e-3 * np.exp(-d) * np.where(t < t1, (t / t1) ** (2 * d), (t / t1) ** p[r])
    C[:, :, site] = 0.3
    return t, C, p


def test_summary_json_growth_key_and_text():
    t, C, p = _staged_ensemble()
    ens = fake_ensemble(t, C, 0)
    s = report.summarize(ens, threshold=0.5, probe="Z", n_boot=100)
    back = json.loads(json.dumps(s, allow_nan=False))
    g = back["growth"]
    assert g["probe"] == "Z" and g["side"] == "right" and g["n_realizations"] == 8
    rows = {row["d"]: row for row in g["distances"]}
    assert sorted(rows) == list(range(1, 10))
    for d in (1, 2, 3, 4):
        row = rows[d]
        assert row["lowest_order"] == 2 * d and row["n_early"] == 8
        assert row["early_exponent"] == pytest.approx(2 * d, abs=1e-6)
        lo, hi = row["early_exponent_ci"]
        assert lo <= 2 * d + 1e-6 and hi >= 2 * d - 1e-6
        assert row["later_exponent"]["n"] == 8
        assert row["later_exponent"]["median"] == pytest.approx(np.median(p), abs=1e-6)
        assert row["later_exponent"]["q25"] == pytest.approx(np.quantile(p, 0.25), abs=1e-6)
        stages = row["stages"]  # of the median curve: the early stage first, then the slow one
        assert stages[0]["exponent"] == pytest.approx(2 * d, abs=1e-6)
        assert stages[-1]["t_start"] > 0.4 * d and stages[-1]["realizations"]["n"] == 8
        assert 0.2 <= stages[-1]["exponent"] <= 0.9
    text = report.format_summary(s)
    assert "growth stages (probe Z" in text and f"{rows[2]['early_exponent']:.3f}" in text


def test_one_realization_interval_is_least_squares():
    t, C, _ = _staged_ensemble(R=1)
    g = gr.growth_summary(gr.ensemble_growth(fake_ensemble(t, C, 0), "Z"))
    row = g["distances"][1]
    assert "Student t" in row["early_ci_method"]
    lo, hi = row["early_exponent_ci"]
    assert lo <= row["early_exponent"] <= hi


def test_ensemble_growth_statistics_and_trust():
    t, C, p = _staged_ensemble(R=5)
    ens = fake_ensemble(t, C, 0)
    trusted = np.ones(C.shape, bool)
    trusted[:, 60:, :] = False
    g = gr.ensemble_growth(ens, "Z", trusted=trusted)
    assert g.alpha.shape == (5, t.size, 10) and list(g.d) == list(range(10))
    assert np.all(np.isnan(g.alpha[:, 60:, :])) and np.all(np.isnan(g.median[60:]))
    k = np.searchsorted(t, 0.1)  # early times at d = 1: every realization has alpha = 2
    np.testing.assert_allclose(g.median[k, 1], 2.0, atol=1e-6)
    k = np.searchsorted(t, 5.0)  # slow stage at d = 1: median and quartiles of the drawn p
    np.testing.assert_allclose([g.q25[k, 1], g.median[k, 1], g.q75[k, 1]], np.quantile(p, [0.25, 0.5, 0.75]),
                               atol=1e-6)
    with pytest.raises(InputError, match="min_valid"):
        gr.ensemble_growth(ens, "Z", min_valid=0)


# ------------------------------------------------------------------------------------------ distribution distance
def _localized_like(R=10, L=30, site=2, xi=1.5, tau=3.0, seed=0):
    """C(d, t) = e^(-d / xi) (1 - e^(-t / tau)) times a per-realization factor in [0.9, 1.1]: bounded by a
    profile decaying with distance, no light cone (the Anderson-localized picture)."""
    rng = np.random.default_rng(seed)
    t = np.geomspace(0.1, 30.0, 40)
    d = np.abs(np.arange(L) - site)
    C = np.exp(-d / xi)[None, None, :] * (1 - np.exp(-t / tau))[None, :, None] * rng.uniform(0.9, 1.1, (R, 1, 1))
    return t, C


def test_distribution_default_is_a_distance_the_front_reaches():
    t, C = _localized_like()
    ens = fake_ensemble(t, C, 2)
    # median factor ~ 1: the largest d with e^(-d / 1.5) (1 - e^(-10)) >= 0.1 is floor(1.5 ln 10) = 3 (derived)
    expect = int(np.floor(1.5 * np.log(0.1 ** -1 * (1 - np.exp(-10.0)))))
    dist = an.ensemble_distribution(ens, probe="Z")
    assert dist["d"] == expect == 3 and dist["r"] == 2 + expect
    assert np.max(dist["median"]) >= an.DISTRIBUTION_REACH
    half = an.one_side(30, 2)[0][14]  # the old default (halfway) sees C ~ e^-9 only
    assert np.max(np.median(C[:, :, half], axis=0)) < 1e-3
    assert an.ensemble_distribution(ens, probe="Z", reach=0.5)["d"] == 1  # e^(-1/1.5) = 0.51 >= 0.5
    assert an.ensemble_distribution(ens, probe="Z", reach=1.9)["d"] == 1  # nothing reaches: the nearest
    with pytest.raises(InputError, match="reach"):
        an.ensemble_distribution(ens, reach=0.0)
    # a front that gets past halfway keeps the halfway default
    tb, Cb = ballistic_ensemble(R=6, t_max=60.0)
    cols = an.one_side(30, 2)[0]
    assert an.ensemble_distribution(fake_ensemble(tb, Cb, 2))["r"] == cols[len(cols) // 2]


# ------------------------------------------------------------------------------------------ figures
def test_growth_figure_and_several_distances_in_the_distribution_figure(tmp_path):
    pytest.importorskip("matplotlib")
    from matplotlib.figure import Figure

    from mpo_fronts import plots

    t, C, _ = _staged_ensemble()
    ens = fake_ensemble(t, C, 0)
    fig = plots.plot_growth(ens, "Z", distances=[1, 2, 4])
    ax, bx = fig.axes[:2]
    assert ax.get_xscale() == "log" and "ln C" in ax.get_ylabel()
    assert [ln.get_label() for ln in ax.get_lines() if not ln.get_label().startswith("_")] == ["d = 1", "d = 2",
                                                                                              "d = 4"]
    labels = [tx.get_text() for tx in bx.get_legend().get_texts()]
    assert labels == ["early stages (24)", "later stages (24)"]  # 8 realizations x 3 distances, each two stages
    own = Figure()
    assert plots.plot_growth(ens, "Z", fig=own) is own and len(own.axes) == 2
    with pytest.raises(InputError, match="distances"):
        plots.plot_growth(ens, "Z", distances=[40])
    assert "growth" in plots.FIGURES
    paths = plots.write_figures(ens, tmp_path, only="growth", formats=("png",))
    assert [p.name for p in paths] == ["growth.png"] and paths[0].stat().st_size > 2000

    tl, Cl = _localized_like()
    ensl = fake_ensemble(tl, Cl, 2)
    fig = plots.plot_distribution(ensl, r=[3, 5, 7], probe="Z")
    ylabels = [a.get_ylabel() for a in fig.axes]
    for r in (3, 5, 7):
        assert f"C(r, t) at r = {r} (d = {r - 2})" in ylabels
    fig = plots.plot_distribution(ensl, probe="Z")
    assert "C(r, t) at r = 5 (d = 3)" in [a.get_ylabel() for a in fig.axes]
