"""Tests of mpo_fronts.analysis: synthetic data with known answers, and one real engine run (clean XX chain)."""

import numpy as np
import pytest

from mpo_fronts import analysis as an
from mpo_fronts import report
from mpo_fronts.errors import InputError
from synthetic_fronts import ballistic_ensemble, fake_ensemble, logistic_front


# ------------------------------------------------------------------------------------------ crossings
def test_crossing_time_is_interpolated_on_log_time():
    # C = a ln t + b is linear in ln t, so log-time interpolation is exact: t* = exp((theta - b) / a)
    # for any grid (closed form). A linear-in-t interpolation would miss it on this coarse grid.
    t = np.geomspace(0.5, 50.0, 7)
    a, b = np.array([0.2, 0.3]), np.array([0.1, -0.2])
    C = a[None, :] * np.log(t)[:, None] + b[None, :]
    cr = an.crossing_times(t, C, 0.5)
    np.testing.assert_allclose(cr.tstar, np.exp((0.5 - b) / a), rtol=1e-12)
    assert list(cr.status) == [an.CROSSED, an.CROSSED]


def test_crossing_from_time_zero_uses_linear_interval():
    # On an interval starting at t = 0 (no log), C = t / 4 reaches 0.5 at t = 2 exactly (closed form).
    t = np.array([0.0, 4.0, 8.0])
    cr = an.crossing_times(t, (t / 4.0)[:, None], 0.5)
    assert cr.tstar[0] == pytest.approx(2.0)


def test_unreached_and_early_distances_are_flagged_not_extrapolated():
    # Front at t*(d) = d / v + t0 with t0 = 1, v = 0.8 and a sharp edge; data stop at t_max = 12, so every
    # distance with d / v + t0 > 12 + margin (d >= 10 here) is never reached. d = 0 starts above threshold.
    t, C = ballistic_ensemble(R=6, L=24, site=0, noise=0.05, tau=0.1, t_max=12.0)
    C[:, :, 0] = 1.0
    lc = an.light_cone(t, C, 0, 0.5, n_boot=50)
    cross = lc["crossings"]
    d = lc["d"]
    arrival = d / 0.8 + 1.0  # the true crossing time of the synthetic front
    far, near = arrival > 12.0 + 0.6, arrival < 12.0 - 0.6
    unreached = cross.status == an.UNREACHED
    assert np.all(unreached[far]) and not np.any(unreached[near])
    assert np.all(np.isnan(cross.tstar[unreached]))
    assert np.all(np.isfinite(cross.tstar[near & (d > 0)]))
    assert cross.status[0] == an.EARLY and np.isnan(cross.tstar[0])
    fit = lc["fits"]["ballistic"]
    assert fit["n_unreached"] == int(unreached.sum()) >= int(far.sum())
    assert fit["r_range"][1] < d[unreached].min()
    assert not np.any(np.isin(fit["distances"], d[unreached]))
    assert np.all(lc["realization_crossings"].status[:, far] == an.UNREACHED)


def test_untrusted_points_are_excluded_and_counted():
    t, C = ballistic_ensemble(R=8)
    site = 2
    trusted = np.ones(C.shape[1:], dtype=bool)
    cols_bad = [site + 5, site + 6]  # these distances lose their early times
    trusted[:10, cols_bad] = False
    full = an.light_cone(t, C, site, 0.5, n_boot=50)
    part = an.light_cone(t, C, site, 0.5, trusted=trusted[None], n_boot=50)
    st = part["crossings"].status
    assert list(st[[5, 6]]) == [an.UNTRUSTED, an.UNTRUSTED]
    assert part["fits"]["ballistic"]["n_excluded_untrusted"] == 2
    assert part["fits"]["ballistic"]["n_points"] == full["fits"]["ballistic"]["n_points"] - 2
    assert 5 not in part["fits"]["ballistic"]["distances"]


# ------------------------------------------------------------------------------------------ fits
def test_ballistic_front_gives_velocity_inside_interval():
    v_true = 0.8
    t, C = ballistic_ensemble(v=v_true)
    lc = an.light_cone(t, C, 2, 0.5, n_boot=400, seed=3)
    f = lc["fits"]["ballistic"]
    assert f["ci_low"] <= v_true <= f["ci_high"]
    assert f["ci_high"] - f["ci_low"] < 0.05 * v_true  # the interval is informative, not just wide
    assert f["intercept_ci"][0] - 0.2 <= 1.0 <= f["intercept_ci"][1] + 0.2  # t0 = 1 (interval plus slack)
    # the data are ballistic: the ballistic law leaves the smaller residuals in ln t
    assert f["rms_log_residual"] < lc["fits"]["log"]["rms_log_residual"]
    assert len(f["residuals"]) == f["n_points"] == len(f["distances"])
    # the median and typical curves cross 1/2 at d / v + t0 + const (the same shift at every d): same v_B
    for curve in ("median", "typical"):
        g = an.light_cone(t, C, 2, 0.5, curve=curve, n_boot=100, seed=3)["fits"]["ballistic"]
        assert g["ci_low"] - 0.01 <= v_true <= g["ci_high"] + 0.01, curve
    # seeded bootstrap: reproducible
    again = an.light_cone(t, C, 2, 0.5, n_boot=400, seed=3)["fits"]["ballistic"]
    assert (again["ci_low"], again["ci_high"]) == (f["ci_low"], f["ci_high"])


def test_logarithmic_light_cone_gives_xi():
    # ln t*(d) = d / xi + c with per-realization scatter; C is a logistic in ln t around t*.
    xi, c = 2.5, 0.3
    rng = np.random.default_rng(7)
    R, L, site = 16, 16, 0
    t = np.geomspace(1e-2, 1e4, 200)
    d = np.arange(L)
    ln_ts = d[None, None, :] / xi + c + rng.normal(0.0, 0.3, (R, 1, L))
    C = logistic_front(t[None, :, None], d, np.exp(ln_ts), 0.4, log_time=True)
    lc = an.light_cone(t, C, site, 0.5, n_boot=400, seed=1)
    f = lc["fits"]["log"]
    assert f["ci_low"] <= xi <= f["ci_high"]
    assert f["ci_high"] - f["ci_low"] < 0.3 * xi
    assert f["rms_log_residual"] < lc["fits"]["ballistic"]["rms_log_residual"]


def test_single_realization_uses_least_squares_interval():
    t, C = ballistic_ensemble(R=1, noise=0.3)
    f = an.light_cone(t, C, 2, 0.5)["fits"]["ballistic"]
    assert "least-squares" in f["ci_method"] and f["n_boot_valid"] == 0
    assert f["ci_low"] < f["value"] < f["ci_high"]


def test_fit_line_matches_numpy_polyfit():
    rng = np.random.default_rng(0)
    x = np.arange(10.0)
    y = 1.7 * x - 0.4 + rng.normal(0, 0.1, 10)
    f = an.fit_line(x, y)
    slope, icpt = np.polyfit(x, y, 1)  # numpy's own least squares
    assert f["slope"] == pytest.approx(slope) and f["intercept"] == pytest.approx(icpt)
    cov = np.polyfit(x, y, 1, cov="unscaled")[1] * np.sum(f["residuals"] ** 2) / (10 - 2)
    assert f["slope_se"] == pytest.approx(np.sqrt(cov[0, 0]))


# ------------------------------------------------------------------------------------------ statistics
def test_statistics_typical_median_and_zero_guard():
    rng = np.random.default_rng(2)
    mu, s = -3.0, 1.0
    C = np.exp(rng.normal(mu, s, (4000, 2, 3)))
    st = an.ensemble_statistics(C, quantiles=(0.5,))
    # lognormal: exp<ln C> = median = e^mu, mean = e^(mu + s^2/2) (closed forms)
    np.testing.assert_allclose(st["typical"], np.exp(mu), rtol=0.05)
    np.testing.assert_allclose(st["median"], np.exp(mu), rtol=0.08)
    np.testing.assert_allclose(st["mean"], np.exp(mu + s ** 2 / 2), rtol=0.08)
    np.testing.assert_array_equal(st["quantiles"][0.5], st["median"])
    Z = np.zeros((3, 1, 1))
    Z[0] = 1.0
    st0 = an.ensemble_statistics(Z)
    assert np.isfinite(st0["typical"]).all() and st0["n_clamped"][0, 0] == 2
    assert st0["typical"][0, 0] == pytest.approx(an.TYPICAL_FLOOR ** (2 / 3))


def _sarle_by_hand(x):
    # bias-corrected sample skewness G1 and excess kurtosis G2 (Joanes & Gill, The Statistician 47, 183 (1998))
    n = x.size
    m2 = np.mean((x - x.mean()) ** 2)
    m3 = np.mean((x - x.mean()) ** 3)
    m4 = np.mean((x - x.mean()) ** 4)
    g1, g2 = m3 / m2 ** 1.5, m4 / m2 ** 2 - 3
    G1 = g1 * np.sqrt(n * (n - 1)) / (n - 2)
    G2 = (n - 1) / ((n - 2) * (n - 3)) * ((n + 1) * g2 + 6)
    return (G1 ** 2 + 1) / (G2 + 3 * (n - 1) ** 2 / ((n - 2) * (n - 3)))


def test_sarle_bimodality_coefficient():
    rng = np.random.default_rng(5)
    x = rng.exponential(size=17)
    assert an.sarle_bimodality(x) == pytest.approx(_sarle_by_hand(x), rel=1e-10)
    # population values (Pfister et al., Front. Psychol. 4, 700 (2013)): normal 1/3, uniform 5/9
    assert an.sarle_bimodality(rng.normal(size=200000)) == pytest.approx(1 / 3, abs=0.01)
    assert an.sarle_bimodality(rng.uniform(size=200000)) == pytest.approx(5 / 9, abs=0.01)
    two = np.concatenate([rng.normal(0.05, 0.02, 50), rng.normal(1.0, 0.05, 50)])
    assert an.sarle_bimodality(two) > 5 / 9
    assert np.isnan(an.sarle_bimodality(np.ones(10))) and np.isnan(an.sarle_bimodality(np.arange(3.0)))


def test_distribution_densities_are_normalised():
    rng = np.random.default_rng(4)
    Cr = rng.uniform(0, 2, (50, 6))
    dist = an.distribution(Cr, bins=20)
    widths = np.diff(dist["edges"])
    np.testing.assert_allclose((dist["density"] * widths).sum(axis=1), 1.0)
    np.testing.assert_allclose(dist["mean"], Cr.mean(axis=0))
    assert dist["bimodality"].shape == (6,)


# ------------------------------------------------------------------------------------------ front shape
def test_front_width_exponent_inside_interval():
    # Gaussian right-weight profiles of width a_r t^beta (a_r scattered per realization), centre v t.
    rng = np.random.default_rng(8)
    beta, v, R, L, site = 0.5, 0.5, 10, 80, 0
    t = np.geomspace(1.0, 60.0, 40)
    x = np.arange(L) - site
    # widths scattered per realization and time by a factor 1 + 0.1 eps: the mean variance stays ~ t^(2 beta)
    w = 0.8 * (1 + 0.1 * rng.normal(size=(R, t.size, 1))) * t[None, :, None] ** beta
    rho = np.exp(-(x[None, None, :] - 5 - v * t[None, :, None]) ** 2 / (2 * w ** 2))
    rho /= rho.sum(-1, keepdims=True)
    fr = an.front_shape(t, rho, site, n_boot=300)
    we = fr["width_exponent"]
    assert we["ci_low"] <= beta <= we["ci_high"]
    assert we["ci_high"] - we["ci_low"] < 0.1
    np.testing.assert_allclose(fr["position"], 5 + v * t, atol=0.05)
    assert we["t_range"][1] <= t[-1] and we["n_points"] >= 10
    late_bad = t < 20.0  # distrust the times from t = 20 on
    part = an.front_shape(t, rho, site, n_boot=50, trusted_times=late_bad)["width_exponent"]
    assert part["t_range"][1] < 20.0 and part["n_excluded_times"] == we["n_points"] - part["n_points"] > 0


def test_bad_arguments_name_themselves():
    t, C = ballistic_ensemble(R=3)
    with pytest.raises(InputError, match="threshold"):
        an.light_cone(t, C, 2, threshold=2.5)
    with pytest.raises(InputError, match="r_range"):
        an.light_cone(t, C, 2, r_range=(5, 2))
    with pytest.raises(InputError, match="curve"):
        an.light_cone(t, C, 2, curve="average")
    with pytest.raises(InputError, match="times"):
        an.light_cone(t[:-1], C, 2)
    ens = fake_ensemble(t, C, 2)
    with pytest.raises(InputError, match="probe"):
        report.summarize(ens, probe="Q")


# ------------------------------------------------------------------------------------------ physics
def test_clean_xx_chain_front_moves_at_group_velocity():
    """Clean XX chain (delta = 0, W = 0), W = Z at the left end: a small-threshold contour moves at v = J.

    Maximum group velocity v = J in this convention: hopping w = J/2, band -J cos k, v = max |dE/dk| = J
    (derived). The crossing times of
    the engine run are also checked against the free-fermion closed form C = 4|G|^2 (1 - |G|^2) with
    G = exp(-i h_sp t) from scipy.linalg.expm (free fermions by Jordan-Wigner; Lin & Motrunich, PRB 98, 134305
    (2018)).
    """
    import mpo_fronts as mf
    from scipy.linalg import expm

    L, J = 40, 1.0
    t = np.geomspace(0.5, 30.0, 60)
    res = mf.evolve_otoc(mf.xxz_chain(L, J=J, delta=0.0, W=0.0), w="Z", site=0, times=t, chi=8, dt=0.1)
    assert res.discarded_weight.max() < 1e-12  # a free-fermion operator: nothing is truncated at chi = 8
    theta, r_range = 0.05, (8, 28)  # the front stays clear of the far end (site 39) up to t = 30
    lc = an.light_cone(t, res.otoc("Z")[None], 0, theta, r_range=r_range)
    fit = lc["fits"]["ballistic"]
    assert fit["n_points"] == 21  # every distance 8..28 is crossed within t <= 30

    h = np.diag(np.full(L - 1, J / 2), 1)
    h = h + h.T
    G2 = np.array([np.abs(expm(-1j * h * tk)[0]) ** 2 for tk in t])
    C_ref = 4 * G2 * (1 - G2)
    ref = an.crossing_times(t, C_ref, theta)
    np.testing.assert_allclose(lc["crossings"].tstar[8:29], ref.tstar[8:29], rtol=3e-3)  # Trotter error only
    v_ref = an.light_cone(t, C_ref[None], 0, theta, r_range=r_range)["fits"]["ballistic"]["value"]
    assert fit["value"] == pytest.approx(v_ref, rel=2e-3)
    # the contour moves at v = J up to the finite-distance (Airy) correction of the front shape, which is at
    # the percent level for d = 8..28
    assert fit["value"] == pytest.approx(J, rel=0.03)
