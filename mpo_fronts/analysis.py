"""Analysis of OTOC ensembles: statistics, distributions, light-cone contours, fits with error bars.

Everything here works on plain arrays, with the realizations on the first axis:

* ``times`` (n_t,) in units of 1/J, strictly increasing, ``>= 0``;
* ``C`` (R, n_t, L), the infinite-temperature OTOC C(r, t) on its natural [0, 2] scale;
* ``site``, the site i of W; distances are d = |r - i|, taken on one side of W only (by default the side
  with more sites, ties going right), so every distance appears once;
* trust masks, boolean arrays broadcastable to (R, n_t, L); ``True`` marks a point whose value is believed.

The functions whose names start with ``ensemble_`` and :func:`summarize` take a loaded ensemble (the object
returned by :func:`mpo_fronts.load`) and only pick the arrays out of it.

Conventions used throughout
---------------------------
Crossing time
    t*(d; theta) is the first output time at which C(d, t) >= theta, interpolated linearly in ln t between
    the two bracketing output times (linearly in t on an interval that starts at t = 0). A distance the
    curve never reaches is *unreached*: t* is NaN and the status says so; nothing is extrapolated.
Status codes
    ``CROSSED`` (0), ``UNREACHED`` (1, never reached within the data, all points trusted), ``EARLY`` (2,
    already at or above theta at the first output time, so t* is only bounded), ``UNTRUSTED`` (3, the
    crossing, or its absence, rests on at least one untrusted point at or before it). Only ``CROSSED``
    distances enter fits.
Fits
    Ballistic: t* = d / v_B + t0 (v_B in sites per unit time 1/J). Logarithmic: ln t* = d / xi + c (xi in
    sites). Both are ordinary least-squares lines through the crossing times of one ensemble curve (the mean
    of C over realizations by default). Confidence intervals are percentile intervals of a bootstrap over
    realizations (seeded, reproducible): realizations are redrawn with replacement, the curve, its crossing
    times and the fit are recomputed. With a single realization the interval falls back to the
    least-squares standard error of the slope (Student t), which measures how well the law fits, not noise.
Trust
    :func:`trust_mask` uses the bond-dimension convergence mask when the ensemble has one (see
    :func:`bond_convergence`); otherwise a point is trusted when the cumulative discarded weight of its
    realization at that time is at most ``max_discarded`` (default 1e-3). The discarded weight is a
    property of the whole operator, so this fallback is conservative ahead of the front and gives no
    guarantee behind it; the convergence mask is the better criterion.
Bimodality
    Sarle's bimodality coefficient b = (g^2 + 1) / (k + 3 (n - 1)^2 / ((n - 2)(n - 3))) with the
    bias-corrected sample skewness g and excess kurtosis k (SAS Institute, SAS/STAT User's Guide, PROC
    CLUSTER; discussed by Pfister et al., Front. Psychol. 4, 700 (2013)). b = 1/3 for a normal, 5/9 for a
    uniform distribution; b > 5/9 hints at two modes.
"""

from __future__ import annotations

from dataclasses import dataclass
from numbers import Integral, Real
from typing import Any, Mapping, Sequence

import numpy as np

from .errors import InputError

__all__ = [
    "CROSSED", "UNREACHED", "EARLY", "UNTRUSTED", "STATUS_NAMES", "DEFAULT_MAX_DISCARDED", "TYPICAL_FLOOR",
    "Crossings", "one_side", "typical_value", "ensemble_curve", "ensemble_statistics", "sarle_bimodality",
    "distribution", "crossing_times", "fit_line", "light_cone", "front_shape", "bond_convergence",
    "trust_from_discarded", "trust_mask", "ensemble_light_cone", "ensemble_front", "ensemble_distribution",
    "front_sites", "summarize", "format_summary", "LAWS",
]

CROSSED, UNREACHED, EARLY, UNTRUSTED = 0, 1, 2, 3
STATUS_NAMES = {CROSSED: "crossed", UNREACHED: "unreached", EARLY: "early", UNTRUSTED: "untrusted"}
#: Fallback trust criterion: largest cumulative discarded weight of a trusted point.
DEFAULT_MAX_DISCARDED = 1e-3
#: Values of C below this floor count as this floor in ln C (the typical value); C is a weight in [0, 2] and
#: values near 1e-15 are at the level of floating-point noise.
TYPICAL_FLOOR = 1e-15
#: The two light-cone laws: name -> (formula, parameter name, units).
LAWS = {
    "ballistic": ("t* = d / v_B + t0", "v_B", "sites per unit time (1/J)"),
    "log": ("ln t* = d / xi + c", "xi", "sites"),
}
_CURVES = ("mean", "median", "typical")
_BOOT_BLOCK = 2e7  # numbers held at once while bootstrapping medians


# ------------------------------------------------------------------------------------------ validation
def _check_times(times) -> np.ndarray:
    t = np.asarray(times, dtype=float).reshape(-1)
    if t.size < 1 or not np.all(np.isfinite(t)) or np.any(t < 0) or np.any(np.diff(t) <= 0):
        raise InputError("times must be a non-empty, strictly increasing array of finite times >= 0 (units 1/J)")
    return t


def _check_C(C, n_t: int | None = None, name: str = "C") -> np.ndarray:
    a = np.asarray(C, dtype=float)
    if a.ndim != 3:
        raise InputError(f"{name} must have shape (R, n_t, L) (realizations, times, sites), got shape {a.shape}")
    if n_t is not None and a.shape[1] != n_t:
        raise InputError(f"{name} has {a.shape[1]} times but times has {n_t}; they must match")
    return a


def _check_threshold(threshold) -> float:
    if isinstance(threshold, bool) or not isinstance(threshold, Real) or not 0 < float(threshold) < 2:
        raise InputError(f"threshold must be a number strictly between 0 and 2 (C is on the [0, 2] scale), "
                         f"got {threshold!r}")
    return float(threshold)


def _check_ci(ci) -> float:
    if isinstance(ci, bool) or not isinstance(ci, Real) or not 0 < float(ci) < 1:
        raise InputError(f"ci (the confidence level) must be strictly between 0 and 1, e.g. 0.95, got {ci!r}")
    return float(ci)


def _check_int(name: str, value, low: int = 0) -> int:
    if isinstance(value, bool) or not isinstance(value, Integral) or value < low:
        raise InputError(f"{name} must be an integer >= {low}, got {value!r}")
    return int(value)


def _check_curve(curve) -> str:
    if curve not in _CURVES:
        raise InputError(f"curve must be one of {', '.join(repr(c) for c in _CURVES)}, got {curve!r}")
    return curve


def _trusted_array(trusted, shape: tuple[int, ...]) -> np.ndarray:
    if trusted is None:
        return np.ones(shape, dtype=bool)
    m = np.asarray(trusted, dtype=bool)
    try:
        return np.broadcast_to(m, shape)
    except ValueError:
        raise InputError(f"trusted must be a boolean mask broadcastable to {shape}, got shape {m.shape}") from None


# ------------------------------------------------------------------------------------------ geometry
def one_side(L: int, site: int, side: str = "auto") -> tuple[np.ndarray, np.ndarray, str]:
    """Sites on one side of W and their distances from it.

    Parameters
    ----------
    L : int
        Number of sites.
    site : int
        Site i of W.
    side : {'auto', 'right', 'left'}
        'auto' takes the side with more sites (right on a tie).

    Returns
    -------
    cols : ndarray of int
        Site indices i, i +- 1, ... up to the chain end.
    d : ndarray of int
        Distances |r - i| = 0, 1, ...
    side : str
        The side used, 'right' or 'left'.
    """
    L = _check_int("L", L, 1)
    if isinstance(site, bool) or not isinstance(site, Integral) or not 0 <= site < L:
        raise InputError(f"site must be an integer in 0..{L - 1}, got {site!r}")
    if side not in ("auto", "right", "left"):
        raise InputError(f"side must be 'auto', 'right' or 'left', got {side!r}")
    if side == "auto":
        side = "right" if L - 1 - site >= site else "left"
    n = L - 1 - site if side == "right" else site
    d = np.arange(n + 1)
    cols = site + d if side == "right" else site - d
    return cols, d, side


# ------------------------------------------------------------------------------------------ statistics
def typical_value(C, axis: int = 0, floor: float = TYPICAL_FLOOR) -> np.ndarray:
    """Typical value exp(<ln C>) over ``axis``; values below ``floor`` (zeros included) count as ``floor``."""
    a = np.asarray(C, dtype=float)
    return np.exp(np.mean(np.log(np.maximum(a, floor)), axis=axis))


def ensemble_curve(C, curve: str = "mean", axis: int = 0) -> np.ndarray:
    """One summary curve over realizations: 'mean', 'median' or 'typical' (exp <ln C>)."""
    curve = _check_curve(curve)
    a = np.asarray(C, dtype=float)
    if curve == "mean":
        return a.mean(axis=axis)
    if curve == "median":
        return np.median(a, axis=axis)
    return typical_value(a, axis=axis)


def ensemble_statistics(C, quantiles: Sequence[float] = (0.1, 0.25, 0.75, 0.9),
                        floor: float = TYPICAL_FLOOR) -> dict[str, Any]:
    """Statistics over realizations (axis 0) of C(r, t) at every (t, r).

    Parameters
    ----------
    C : array_like (R, n_t, L)
        OTOCs of R realizations.
    quantiles : sequence of float in [0, 1]
    floor : float
        Floor for ln C in the typical value (zeros are clamped to it; ``n_clamped`` counts them).

    Returns
    -------
    dict
        ``mean``, ``std`` (ddof 1; NaN for R = 1), ``sem``, ``median``, ``typical`` (each (n_t, L)),
        ``quantiles`` {q: (n_t, L)}, ``n_clamped`` (n_t, L) and ``R``.
    """
    a = _check_C(C)
    q = np.asarray(quantiles, dtype=float).reshape(-1)
    if np.any((q < 0) | (q > 1)):
        raise InputError(f"quantiles must lie in [0, 1], got {list(quantiles)}")
    R = a.shape[0]
    std = a.std(axis=0, ddof=1) if R > 1 else np.full(a.shape[1:], np.nan)
    qs = np.quantile(a, q, axis=0) if q.size else np.empty((0,) + a.shape[1:])
    return {
        "R": R,
        "mean": a.mean(axis=0),
        "std": std,
        "sem": std / np.sqrt(R),
        "median": np.median(a, axis=0),
        "typical": typical_value(a, floor=floor),
        "n_clamped": np.sum(a < floor, axis=0),
        "quantiles": {float(v): qs[j] for j, v in enumerate(q)},
    }


def sarle_bimodality(x, axis: int = -1) -> np.ndarray:
    """Sarle's bimodality coefficient of samples along ``axis`` (NaN for fewer than 4 or constant samples).

    b = (g^2 + 1) / (k + 3 (n - 1)^2 / ((n - 2)(n - 3))), g and k the bias-corrected sample skewness and
    excess kurtosis (source: SAS/STAT User's Guide, PROC CLUSTER; Pfister et al., Front. Psychol. 4, 700
    (2013)). Population values: 1/3 (normal), 5/9 (uniform), 1 (two equal point masses); b > 5/9 suggests
    bimodality.
    """
    from scipy import stats

    a = np.moveaxis(np.asarray(x, dtype=float), axis, -1)
    n = a.shape[-1]
    if n < 4:
        return np.full(a.shape[:-1], np.nan)
    spread = np.ptp(a, axis=-1)
    scale = np.maximum(np.max(np.abs(a), axis=-1), 1e-300)
    const = spread <= 1e-12 * scale
    safe = np.where(const[..., None], np.arange(n, dtype=float), a)  # avoid scipy's precision warnings
    g = stats.skew(safe, axis=-1, bias=False)
    k = stats.kurtosis(safe, axis=-1, bias=False, fisher=True)
    b = (g ** 2 + 1.0) / (k + 3.0 * (n - 1) ** 2 / ((n - 2) * (n - 3)))
    return np.where(const, np.nan, b)


def distribution(C_r, times=None, bins: int | Sequence[float] = 40, value_range: tuple[float, float] = (0.0, 2.0),
                 floor: float = TYPICAL_FLOOR) -> dict[str, Any]:
    """Distribution over realizations of C at one site, as histogram densities over time.

    Parameters
    ----------
    C_r : array_like (R, n_t)
        C(r, t) at a fixed r for each realization.
    times : array_like (n_t,), optional
        Carried into the output for convenience.
    bins : int or sequence of bin edges
        Histogram bins over ``value_range`` (default 40 equal bins on the [0, 2] scale of C).
    value_range : (float, float)

    Returns
    -------
    dict
        ``edges`` (n_bins + 1,), ``density`` (n_t, n_bins) (each row integrates to 1 over C),
        ``mean``, ``median``, ``typical``, ``q10``, ``q90`` and ``bimodality`` (Sarle's coefficient), each
        (n_t,), and ``R``.
    """
    a = np.asarray(C_r, dtype=float)
    if a.ndim != 2:
        raise InputError(f"C_r must have shape (R, n_t) (realizations, times at one site), got {a.shape}")
    lo, hi = value_range
    if not hi > lo:
        raise InputError(f"value_range must be (low, high) with high > low, got {value_range!r}")
    edges = np.histogram_bin_edges(a, bins=bins, range=(lo, hi)) if np.ndim(bins) == 0 else np.asarray(bins, float)
    dens = np.empty((a.shape[1], edges.size - 1))
    for k in range(a.shape[1]):
        h, _ = np.histogram(np.clip(a[:, k], edges[0], edges[-1]), bins=edges)
        dens[k] = h / (h.sum() * np.diff(edges)) if h.sum() else 0.0
    out = {
        "R": a.shape[0], "edges": edges, "density": dens, "mean": a.mean(axis=0), "median": np.median(a, axis=0),
        "typical": typical_value(a, floor=floor), "q10": np.quantile(a, 0.1, axis=0),
        "q90": np.quantile(a, 0.9, axis=0), "bimodality": sarle_bimodality(a, axis=0),
    }
    if times is not None:
        out["times"] = _check_times(times)
    return out


# ------------------------------------------------------------------------------------------ crossings
@dataclass
class Crossings:
    """Crossing times t*(d; theta) of curves C(t) (last two axes of the input: time, distance).

    Attributes
    ----------
    tstar : ndarray (..., n_d)
        Interpolated crossing time (units 1/J) where ``status == CROSSED``, NaN elsewhere.
    tstar_any : ndarray (..., n_d)
        The same interpolation ignoring trust (NaN where unreached or early); for drawing excluded points.
    status : ndarray of int (..., n_d)
        ``CROSSED``, ``UNREACHED``, ``EARLY`` or ``UNTRUSTED`` (see the module docstring).
    threshold : float
    """

    tstar: np.ndarray
    tstar_any: np.ndarray
    status: np.ndarray
    threshold: float

    def counts(self) -> dict[str, int]:
        """How many entries have each status, by name."""
        return {name: int(np.sum(self.status == code)) for code, name in STATUS_NAMES.items()}


def crossing_times(times, C, threshold: float = 0.5, trusted=None) -> Crossings:
    """First times at which C reaches ``threshold``, interpolated on the log-time axis.

    Parameters
    ----------
    times : array_like (n_t,)
        Output times (>= 0, strictly increasing, units 1/J).
    C : array_like (..., n_t, n_d)
        Curves with time on the second-to-last axis (for example (R, n_t, L) or (n_t, L)).
    threshold : float
        Level theta on the [0, 2] scale of C.
    trusted : array_like of bool, broadcastable to C, optional
        Trust mask; a crossing preceded by (or resting on) an untrusted point gets status ``UNTRUSTED``.
        Non-finite values of C always count as untrusted.

    Returns
    -------
    Crossings
    """
    t = _check_times(times)
    theta = _check_threshold(threshold)
    a = np.asarray(C, dtype=float)
    if a.ndim < 2 or a.shape[-2] != t.size:
        raise InputError(f"C must have time on its second-to-last axis with {t.size} entries, got shape {a.shape}")
    ok = _trusted_array(trusted, a.shape) & np.isfinite(a)
    above = np.nan_to_num(a, nan=-np.inf) >= theta
    reached = above.any(axis=-2)
    k = np.argmax(above, axis=-2)
    km = np.maximum(k - 1, 0)
    c1 = np.take_along_axis(a, k[..., None, :], axis=-2)[..., 0, :]
    c0 = np.take_along_axis(a, km[..., None, :], axis=-2)[..., 0, :]
    t1, t0 = t[k], t[km]
    with np.errstate(divide="ignore", invalid="ignore"):
        frac = np.clip((theta - c0) / (c1 - c0), 0.0, 1.0)
        logt = np.exp(np.log(np.where(t0 > 0, t0, 1.0)) + frac * (np.log(t1) - np.log(np.where(t0 > 0, t0, 1.0))))
    interp = np.where(t0 > 0, logt, t0 + frac * (t1 - t0))
    prefix = np.logical_and.accumulate(ok, axis=-2)
    ok_at_k = np.take_along_axis(prefix, k[..., None, :], axis=-2)[..., 0, :]
    all_ok = prefix[..., -1, :]
    status = np.where(~reached, np.where(all_ok, UNREACHED, UNTRUSTED),
                      np.where(~ok_at_k, UNTRUSTED, np.where(k == 0, EARLY, CROSSED))).astype(np.int8)
    tstar_any = np.where(reached & (k > 0), interp, np.nan)
    tstar = np.where(status == CROSSED, tstar_any, np.nan)
    return Crossings(tstar=tstar, tstar_any=tstar_any, status=status, threshold=theta)


# ------------------------------------------------------------------------------------------ fits
def fit_line(x, y) -> dict[str, Any]:
    """Ordinary least-squares line y = slope * x + intercept.

    Returns
    -------
    dict
        ``slope``, ``intercept``, ``slope_se``, ``intercept_se`` (standard errors from the residual variance,
        NaN for fewer than 3 points), ``residuals`` (y - fit), ``r2``, ``n``.
    """
    x = np.asarray(x, dtype=float).reshape(-1)
    y = np.asarray(y, dtype=float).reshape(-1)
    n = x.size
    nan = float("nan")
    if n < 2 or np.ptp(x) == 0:
        return {"slope": nan, "intercept": nan, "slope_se": nan, "intercept_se": nan,
                "residuals": np.full(n, np.nan), "r2": nan, "n": n}
    xm, ym = x.mean(), y.mean()
    sxx = np.sum((x - xm) ** 2)
    slope = np.sum((x - xm) * (y - ym)) / sxx
    intercept = ym - slope * xm
    res = y - (slope * x + intercept)
    ss_tot = np.sum((y - ym) ** 2)
    r2 = 1.0 - np.sum(res ** 2) / ss_tot if ss_tot > 0 else nan
    if n > 2:
        s2 = np.sum(res ** 2) / (n - 2)
        slope_se = np.sqrt(s2 / sxx)
        intercept_se = np.sqrt(s2 * (1.0 / n + xm ** 2 / sxx))
    else:
        slope_se = intercept_se = nan
    return {"slope": float(slope), "intercept": float(intercept), "slope_se": float(slope_se),
            "intercept_se": float(intercept_se), "residuals": res, "r2": float(r2), "n": n}


def _batch_lines(x: np.ndarray, y: np.ndarray, w: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least-squares lines of many data sets at once: y[b, j] vs x[j] with 0/1 weights w[b, j] (>= 3 points)."""
    y = np.where(w, y, 0.0)
    sw = w.sum(axis=1)
    sx = (w * x).sum(axis=1)
    sy = y.sum(axis=1)
    sxx = (w * x * x).sum(axis=1)
    sxy = (y * x).sum(axis=1)
    den = sw * sxx - sx ** 2
    good = (sw >= 3) & (den > 0)
    with np.errstate(divide="ignore", invalid="ignore"):
        slope = np.where(good, (sw * sxy - sx * sy) / den, np.nan)
        icpt = np.where(good, (sy - slope * sx) / sw, np.nan)
    return slope, icpt


def _reciprocal_interval(lo: float, hi: float) -> tuple[float, float]:
    """Interval of 1/a given an interval [lo, hi] of a slope a (a <= 0 means an unbounded parameter)."""
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= 0:
        return float("nan"), float("nan")
    if lo <= 0:
        return 1.0 / hi, float("inf")
    return 1.0 / hi, 1.0 / lo


def _boot_counts(rng: np.random.Generator, n_boot: int, R: int) -> np.ndarray:
    idx = rng.integers(0, R, size=(n_boot, R))
    counts = np.zeros((n_boot, R))
    np.add.at(counts, (np.repeat(np.arange(n_boot), R), idx.reshape(-1)), 1.0)
    return counts


def _boot_curves(C: np.ndarray, ok: np.ndarray, counts: np.ndarray, curve: str):
    """Bootstrap-resampled ensemble curves (n_b, n_t, n_d) and their trust masks from realization counts."""
    R = C.shape[0]
    w = counts / R
    if curve == "mean":
        cb = np.einsum("br,rtd->btd", w, C)
    elif curve == "typical":
        cb = np.exp(np.einsum("br,rtd->btd", w, np.log(np.maximum(C, TYPICAL_FLOOR))))
    else:
        cb = np.empty((counts.shape[0],) + C.shape[1:])
        for b, c in enumerate(counts):
            cb[b] = np.median(np.repeat(C, c.astype(int), axis=0), axis=0)
    okb = np.einsum("br,rtd->btd", (counts > 0).astype(float), (~ok).astype(float)) == 0
    return cb, okb


def light_cone(times, C, site: int, threshold: float = 0.5, *, trusted=None, curve: str = "mean",
               side: str = "auto", r_range: tuple[int, int] | None = None, d_min: int = 1, n_boot: int = 500,
               ci: float = 0.95, seed: int = 0, n_band: int = 60) -> dict[str, Any]:
    """Light cone t*(d; theta) with ballistic and logarithmic fits and bootstrap intervals.

    Parameters
    ----------
    times : array_like (n_t,)
        Output times (units 1/J).
    C : array_like (R, n_t, L)
        OTOCs of R realizations (one W site, one probe).
    site : int
        Site i of W; distances d = |r - i| on one ``side`` (see :func:`one_side`).
    threshold : float
        theta on the [0, 2] scale of C.
    trusted : bool array broadcastable to (R, n_t, L), optional
        Trust mask (see :func:`trust_mask`); a point of an ensemble curve is trusted when it is trusted in
        every realization that enters it.
    curve : {'mean', 'median', 'typical'}
        The ensemble curve whose crossing times are fitted.
    r_range : (int, int), optional
        Inclusive range of distances d used in the fits; default from ``d_min`` to the farthest distance
        with a trusted crossing of the curve.
    d_min : int
        Smallest distance in the default range.
    n_boot : int
        Bootstrap resamples over realizations (0 to skip; always skipped for R = 1).
    ci : float
        Confidence level of the intervals (default 0.95).
    seed : int
        Seed of the bootstrap generator (numpy default_rng): equal inputs give equal intervals.
    n_band : int
        Number of distances on which the fitted bands are evaluated.

    Returns
    -------
    dict
        ``d``, ``cols``, ``side``, ``threshold``, ``curve``; ``crossings`` (:class:`Crossings` of the curve,
        over d), ``realization_crossings`` (:class:`Crossings`, (R, n_d)), ``tstar_boot_std`` (n_d,);
        ``fits`` {'ballistic', 'log'}: each with ``value`` (v_B or xi), ``ci_low``, ``ci_high``,
        ``slope``, ``intercept`` (t0 or c) with its interval, ``distances``, ``tstar``, ``residuals`` (in t
        for ballistic, in ln t for log), ``rms_residual``, ``rms_log_residual`` (ln t* - ln t_fit for both
        laws, so they compare), ``r2``, ``n_points``, ``r_range``, ``band`` (d, low, high of t), counts of
        excluded distances, ``n_boot_valid`` and ``ci_method``.
    """
    t = _check_times(times)
    a = _check_C(C, t.size)
    theta = _check_threshold(threshold)
    curve = _check_curve(curve)
    ci = _check_ci(ci)
    n_boot = _check_int("n_boot", n_boot)
    d_min = _check_int("d_min", d_min)
    seed = _check_int("seed", seed)
    R, _, L = a.shape
    cols, d, side = one_side(L, site, side)
    Cs = a[:, :, cols]
    ok_s = _trusted_array(trusted, a.shape)[:, :, cols] & np.isfinite(Cs)

    centre = ensemble_curve(Cs, curve)
    ok_c = ok_s.all(axis=0)
    cross = crossing_times(t, centre, theta, ok_c)
    real = crossing_times(t, Cs, theta, ok_s)

    if r_range is None:
        hit = np.flatnonzero((cross.status == CROSSED) & (d >= d_min))
        lo, hi = (d_min, int(d[hit].max())) if hit.size else (d_min, d_min - 1)
    else:
        try:
            lo, hi = (int(r_range[0]), int(r_range[1]))
        except (TypeError, ValueError, IndexError):
            raise InputError(f"r_range must be a pair of distances (d_low, d_high), got {r_range!r}") from None
        if lo < 0 or hi < lo:
            raise InputError(f"r_range must satisfy 0 <= d_low <= d_high, got {r_range!r}")
    in_range = (d >= lo) & (d <= hi)
    use = in_range & (cross.status == CROSSED)
    beyond = d >= lo  # distances from the start of the range outwards, for the exclusion counts
    counts = {
        "n_excluded_untrusted": int(np.sum(beyond & (cross.status == UNTRUSTED))),
        "n_unreached": int(np.sum(beyond & (cross.status == UNREACHED))),
        "n_early": int(np.sum(in_range & (cross.status == EARLY))),
    }

    # Bootstrap over realizations.
    boot_ok = R >= 2 and n_boot > 0
    if boot_ok:
        rng = np.random.default_rng(seed)
        cnt = _boot_counts(rng, n_boot, R)
        per = max(1, int(_BOOT_BLOCK // max(1, (R if curve == "median" else 1) * Cs.shape[1] * Cs.shape[2])))
        tb = np.empty((n_boot, d.size))
        for s in range(0, n_boot, per):
            cb, okb = _boot_curves(Cs, ok_s, cnt[s:s + per], curve)
            tb[s:s + per] = crossing_times(t, cb, theta, okb).tstar
        tb = np.where(use[None, :], tb, np.nan)
        fin = np.isfinite(tb)
        nf = fin.sum(axis=0)
        with np.errstate(invalid="ignore", divide="ignore"):
            mb = np.where(fin, tb, 0.0).sum(axis=0) / nf
            var = np.where(fin, (tb - mb) ** 2, 0.0).sum(axis=0) / (nf - 1)
        tstar_boot_std = np.where(nf >= 2, np.sqrt(var), np.nan)
    else:
        tb = None
        tstar_boot_std = np.full(d.size, np.nan)

    alpha = 100 * (1 - ci) / 2
    x = d[use].astype(float)
    ts_use = cross.tstar[use]
    d_band = np.linspace(lo, hi, n_band) if hi >= lo else np.empty(0)
    fits = {}
    for law, (formula, pname, units) in LAWS.items():
        y = ts_use if law == "ballistic" else np.log(ts_use)
        f = fit_line(x, y)
        if f["n"] < 3:  # two points always fit a line; report no fit rather than a fit without a test
            f.update(slope=float("nan"), intercept=float("nan"), r2=float("nan"), residuals=np.full(f["n"], np.nan))
        slope, icpt = f["slope"], f["intercept"]
        value = 1.0 / slope if np.isfinite(slope) and slope > 0 else float("nan")
        pred_t = slope * x + icpt if law == "ballistic" else np.exp(slope * x + icpt)
        with np.errstate(invalid="ignore", divide="ignore"):
            log_res = np.log(ts_use) - np.log(np.where(pred_t > 0, pred_t, np.nan))
        entry: dict[str, Any] = {
            "law": formula, "parameter": pname, "units": units, "value": value,
            "slope": slope, "intercept": icpt, "intercept_name": "t0" if law == "ballistic" else "c",
            "distances": d[use], "tstar": ts_use, "residuals": f["residuals"],
            "rms_residual": float(np.sqrt(np.mean(f["residuals"] ** 2))) if f["n"] >= 3 else float("nan"),
            "rms_log_residual": float(np.sqrt(np.nanmean(log_res ** 2))) if f["n"] >= 3 else float("nan"),
            "r2": f["r2"], "n_points": int(f["n"]), "r_range": [int(lo), int(hi)], "ci": ci, **counts,
        }
        band_lo = band_hi = np.full(d_band.size, np.nan)
        if boot_ok and x.size >= 3:
            yb = tb if law == "ballistic" else np.log(tb)
            sl, ic = _batch_lines(d.astype(float), np.nan_to_num(yb), np.isfinite(yb))
            good = np.isfinite(sl)
            entry["n_boot_valid"] = int(good.sum())
            entry["ci_method"] = (f"bootstrap over realizations, percentile interval, n_boot = {n_boot}, "
                                  f"seed = {seed}")
            if good.sum() >= 2:
                s_lo, s_hi = np.percentile(sl[good], [alpha, 100 - alpha])
                i_lo, i_hi = np.percentile(ic[good], [alpha, 100 - alpha])
                entry["ci_low"], entry["ci_high"] = _reciprocal_interval(s_lo, s_hi)
                entry["slope_ci"] = [float(s_lo), float(s_hi)]
                entry["intercept_ci"] = [float(i_lo), float(i_hi)]
                yb_band = sl[good, None] * d_band[None, :] + ic[good, None]
                band_lo, band_hi = np.percentile(yb_band, [alpha, 100 - alpha], axis=0)
                if law == "log":
                    band_lo, band_hi = np.exp(band_lo), np.exp(band_hi)
            else:
                entry["ci_low"] = entry["ci_high"] = float("nan")
                entry["slope_ci"] = entry["intercept_ci"] = [float("nan")] * 2
        else:
            from scipy import stats

            entry["n_boot_valid"] = 0
            entry["ci_method"] = ("least-squares standard error of the slope (Student t); no bootstrap "
                                  "(a single realization or n_boot = 0): it measures the misfit of the law")
            if f["n"] >= 3 and np.isfinite(f["slope_se"]):
                q = stats.t.ppf(1 - alpha / 100, f["n"] - 2)
                s_lo, s_hi = slope - q * f["slope_se"], slope + q * f["slope_se"]
                i_lo, i_hi = icpt - q * f["intercept_se"], icpt + q * f["intercept_se"]
                entry["ci_low"], entry["ci_high"] = _reciprocal_interval(s_lo, s_hi)
                entry["slope_ci"], entry["intercept_ci"] = [float(s_lo), float(s_hi)], [float(i_lo), float(i_hi)]
                y_band = slope * d_band + icpt
                half = q * np.sqrt(f["slope_se"] ** 2 * (d_band - x.mean()) ** 2 + (f["intercept_se"] ** 2
                                   - f["slope_se"] ** 2 * x.mean() ** 2))
                half = np.nan_to_num(half)
                band_lo, band_hi = y_band - half, y_band + half
                if law == "log":
                    band_lo, band_hi = np.exp(band_lo), np.exp(band_hi)
            else:
                entry["ci_low"] = entry["ci_high"] = float("nan")
                entry["slope_ci"] = entry["intercept_ci"] = [float("nan")] * 2
        if x.size < 3:
            entry["ci_method"] = "no fit: fewer than 3 distances with a trusted crossing in the fit range"
        entry["band"] = {"d": d_band, "low": band_lo, "high": band_hi,
                         "fit": (slope * d_band + icpt) if law == "ballistic" else np.exp(slope * d_band + icpt)}
        fits[law] = entry
    return {"d": d, "cols": cols, "side": side, "site": int(site), "threshold": theta, "curve": curve,
            "times": t, "crossings": cross, "realization_crossings": real, "tstar_boot_std": tstar_boot_std,
            "curve_values": centre, "curve_trusted": ok_c, "fits": fits, "R": R}


# ------------------------------------------------------------------------------------------ front shape
def _moments(rho: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    tot = rho.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        pos = (rho * x).sum(axis=-1) / tot
        var = (rho * (x - pos[..., None]) ** 2).sum(axis=-1) / tot
    return pos, np.sqrt(np.maximum(var, 0.0))


def front_shape(times, rho, site: int, *, t_range: tuple[float, float] | None = None, edge_tol: float = 1e-3,
                edge_sites: int = 2, min_width: float = 0.5, trusted_times=None, n_boot: int = 500,
                ci: float = 0.95, seed: int = 0) -> dict[str, Any]:
    """Front position and width from the right-weight profile, and the width-growth exponent.

    The right weight rho(r, t) is the weight of Pauli strings whose rightmost non-identity letter sits at r
    (a probability over r). Position x(t) = sum_r (r - i) rho / sum rho (sites to the right of W) and width
    w(t) = the standard deviation of r under rho, both of the ensemble-mean profile. The exponent beta of
    w ~ t^beta is the slope of ln w against ln t, fitted over ``t_range``; by default the times t > 0 with
    w >= ``min_width`` (the front is resolved on the lattice) and with less than ``edge_tol`` of the weight
    on the last ``edge_sites`` sites (the front has not met the right end of the chain).

    Parameters
    ----------
    times : array_like (n_t,)
    rho : array_like (R, n_t, L) or (n_t, L)
        Right-weight profiles.
    site : int
        Site i of W. The right weight describes the right end of the operator only.
    trusted_times : bool array (n_t,), optional
        Times allowed in the exponent fit (default all); ``n_excluded_times`` counts those left out.
    n_boot, ci, seed
        Bootstrap over realizations for the interval of beta (least-squares standard error when R = 1).

    Returns
    -------
    dict
        ``times``, ``position`` and ``width`` (n_t,) of the mean profile, ``position_r`` and ``width_r``
        (R, n_t) per realization, ``profile`` (n_t, L) mean profile, ``x`` (r - i), ``edge_weight`` (n_t,),
        and ``width_exponent`` with ``value``, ``ci_low``, ``ci_high``, ``t_range``, ``n_points``,
        ``residuals`` (in ln w), ``r2``, ``ci_method``.
    """
    t = _check_times(times)
    a = np.asarray(rho, dtype=float)
    if a.ndim == 2:
        a = a[None]
    a = _check_C(a, t.size, name="rho")
    ci = _check_ci(ci)
    n_boot = _check_int("n_boot", n_boot)
    R, _, L = a.shape
    if isinstance(site, bool) or not isinstance(site, Integral) or not 0 <= site < L:
        raise InputError(f"site must be an integer in 0..{L - 1}, got {site!r}")
    x = np.arange(L) - site
    prof = a.mean(axis=0)
    pos, wid = _moments(prof, x)
    pos_r, wid_r = _moments(a, x)
    tot = prof.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        edge = prof[:, L - edge_sites:].sum(axis=-1) / tot
    tt = np.ones(t.size, bool) if trusted_times is None else np.asarray(trusted_times, dtype=bool).reshape(-1)
    if tt.size != t.size:
        raise InputError(f"trusted_times must have one entry per time ({t.size}), got {tt.size}")
    if t_range is None:
        sel = (t > 0) & (wid >= min_width) & (edge < edge_tol)
        rng_t = [float(t[sel].min()), float(t[sel].max())] if sel.any() else [float("nan")] * 2
    else:
        try:
            t_lo, t_hi = float(t_range[0]), float(t_range[1])
        except (TypeError, ValueError, IndexError):
            raise InputError(f"t_range must be a pair of times (t_low, t_high), got {t_range!r}") from None
        sel = (t >= t_lo) & (t <= t_hi) & (t > 0) & (wid > 0)
        rng_t = [t_lo, t_hi]
    n_excl = int(np.sum(sel & ~tt))
    sel = sel & tt
    if t_range is None:
        rng_t = [float(t[sel].min()), float(t[sel].max())] if sel.any() else [float("nan")] * 2
    lt, lw = np.log(t[sel]), np.log(wid[sel])
    f = fit_line(lt, lw)
    if f["n"] < 3:  # two points always fit a line; report no fit
        f.update(slope=float("nan"), intercept=float("nan"), r2=float("nan"), residuals=np.full(f["n"], np.nan))
    alpha = 100 * (1 - ci) / 2
    out = {"value": f["slope"], "prefactor": float(np.exp(f["intercept"])) if np.isfinite(f["intercept"]) else
           float("nan"), "t_range": rng_t, "n_points": int(f["n"]), "residuals": f["residuals"], "r2": f["r2"],
           "times": t[sel], "law": "w = a t^beta", "ci": ci, "n_excluded_times": n_excl}
    if R >= 2 and n_boot > 0 and f["n"] >= 3:
        rng = np.random.default_rng(seed)
        cnt = _boot_counts(rng, n_boot, R)
        pb = np.einsum("br,rtl->btl", cnt / R, a[:, sel, :])
        _, wb = _moments(pb, x)
        with np.errstate(divide="ignore"):
            lwb = np.log(wb)
        sl, _ = _batch_lines(lt, np.nan_to_num(lwb, neginf=0.0), np.isfinite(lwb))
        good = np.isfinite(sl)
        out["ci_low"], out["ci_high"] = (np.percentile(sl[good], [alpha, 100 - alpha]).tolist() if good.sum() >= 2
                                         else [float("nan")] * 2)
        out["ci_method"] = f"bootstrap over realizations, percentile interval, n_boot = {n_boot}, seed = {seed}"
    elif f["n"] >= 3 and np.isfinite(f["slope_se"]):
        from scipy import stats

        q = stats.t.ppf(1 - alpha / 100, f["n"] - 2)
        out["ci_low"], out["ci_high"] = f["slope"] - q * f["slope_se"], f["slope"] + q * f["slope_se"]
        out["ci_method"] = "least-squares standard error of the slope (Student t); no bootstrap"
    else:
        out["ci_low"] = out["ci_high"] = float("nan")
        out["ci_method"] = "fewer than 3 usable times"
    return {"times": t, "x": x, "site": int(site), "profile": prof, "position": pos, "width": wid,
            "position_r": pos_r, "width_r": wid_r, "edge_weight": edge, "width_exponent": out, "R": R}


# ------------------------------------------------------------------------------------------ convergence and trust
def bond_convergence(otoc_by_chi: Mapping[int, Any], tol: float = 1e-3) -> dict[str, Any]:
    """Largest change of C between successive bond dimensions, and the trust mask it implies.

    Parameters
    ----------
    otoc_by_chi : mapping int -> array_like (R, n_t, L)
        C(r, t) of the same realizations and times evolved at each bond dimension chi (at least two).
    tol : float
        A point (t, r) is trusted when the change between the two largest chi is below ``tol`` in every
        realization.

    Returns
    -------
    dict
        ``chis`` (sorted list), ``max_dC`` (n_chi - 1, n_t, L): max over realizations of
        |C_{chi_{k+1}} - C_{chi_k}|, ``trusted`` (n_t, L) bool, ``tol``.
    """
    if not isinstance(otoc_by_chi, Mapping) or len(otoc_by_chi) < 2:
        raise InputError("otoc_by_chi must map at least two bond dimensions chi to arrays (R, n_t, L); "
                         "run the same realizations at two or more chi")
    for chi in otoc_by_chi:
        if isinstance(chi, bool) or not isinstance(chi, Integral) or chi < 1:
            raise InputError(f"otoc_by_chi keys must be positive integer bond dimensions, got {chi!r}")
    if isinstance(tol, bool) or not isinstance(tol, Real) or not float(tol) > 0:
        raise InputError(f"tol must be a positive number, got {tol!r}")
    chis = sorted(int(c) for c in otoc_by_chi)
    arrs = [_check_C(otoc_by_chi[c], name=f"otoc_by_chi[{c}]") for c in chis]
    shape = arrs[0].shape
    for c, arr in zip(chis, arrs):
        if arr.shape != shape:
            raise InputError(f"otoc_by_chi[{c}] has shape {arr.shape}, but otoc_by_chi[{chis[0]}] has {shape}; "
                             f"every chi must cover the same realizations, times and sites")
    diffs = np.stack([np.abs(arrs[k + 1] - arrs[k]).max(axis=0) for k in range(len(arrs) - 1)])
    diffs = np.where(np.isfinite(diffs), diffs, np.inf)
    return {"chis": chis, "max_dC": diffs, "trusted": diffs[-1] < float(tol), "tol": float(tol)}


def trust_from_discarded(discarded_weight, L: int, max_discarded: float = DEFAULT_MAX_DISCARDED) -> np.ndarray:
    """Fallback trust mask (R, n_t, L): cumulative discarded weight of the realization <= ``max_discarded``."""
    dw = np.asarray(discarded_weight, dtype=float)
    if dw.ndim != 2:
        raise InputError(f"discarded_weight must have shape (R, n_t), got {dw.shape}")
    if isinstance(max_discarded, bool) or not isinstance(max_discarded, Real) or not float(max_discarded) >= 0:
        raise InputError(f"max_discarded must be a number >= 0, got {max_discarded!r}")
    ok = np.nan_to_num(dw, nan=np.inf) <= float(max_discarded)
    return np.broadcast_to(ok[:, :, None], dw.shape + (int(L),))


def trust_mask(ens, use_trust: bool = True, max_discarded: float = DEFAULT_MAX_DISCARDED, probe: str | None = None
               ) -> tuple[np.ndarray | None, dict[str, Any]]:
    """Trust mask of a loaded ensemble and a description of the criterion used.

    With convergence data the mask of the convergence study is used for every probe; ``probe`` (the one
    being analysed) only enters the description, which says when the study was made with another probe.

    Returns
    -------
    mask : ndarray of bool broadcastable to (R, n_t, L), or None when ``use_trust`` is False
    info : dict
        ``source`` ('convergence', 'discarded_weight' or 'none'), ``criterion`` (words), ``trusted_fraction``
        (fraction of the (R, n_t, L) points trusted) and ``n_untrusted`` (number of such points).
    """
    R, n_t, L = len(ens.realizations), len(ens.times), int(ens.L)
    if not use_trust:
        return None, {"source": "none", "criterion": "trust mask not applied (all points used)",
                      "trusted_fraction": 1.0, "n_untrusted": 0}
    conv = getattr(ens, "convergence", None)
    if conv is not None:
        m = np.asarray(conv["trusted"], dtype=bool)
        if m.shape != (n_t, L):
            raise InputError(f"the convergence mask has shape {m.shape} but the ensemble has (n_t, L) = "
                             f"{(n_t, L)}; rerun 'fronts converge' on this run description")
        chis = [int(c) for c in np.asarray(conv.get("chis", [])).reshape(-1)]
        cprobe = conv.get("probe")
        other = (f" (study made with probe {cprobe}, applied to probe {probe.upper()})"
                 if cprobe and probe and str(cprobe).upper() != probe.upper() else "")
        info = {"source": "convergence",
                "criterion": f"max |dC| between chi = {chis[-2] if len(chis) > 1 else '?'} and "
                             f"{chis[-1] if chis else '?'} below tol = {float(conv.get('tol', float('nan'))):g}"
                             + other}
        mask = m[None]
    else:
        mask = trust_from_discarded(ens.discarded_weight, L, max_discarded)
        info = {"source": "discarded_weight",
                "criterion": f"cumulative discarded weight <= {float(max_discarded):g} (no convergence data; "
                             f"conservative ahead of the front, no guarantee behind it)"}
    full = np.broadcast_to(mask, (R, n_t, L))
    info["trusted_fraction"] = float(full.mean())
    info["n_untrusted"] = int((~full).sum())
    return mask, info


# ------------------------------------------------------------------------------------------ ensemble wrappers
def _probe_otoc(ens, probe: str) -> np.ndarray:
    if not isinstance(probe, str) or probe.upper() not in ("X", "Y", "Z"):
        stored = ", ".join(getattr(ens, "probes", ()))
        raise InputError(f"probe must be one of 'X', 'Y', 'Z' (this run stores {stored}), got {probe!r}")
    return np.asarray(ens.otoc(probe.upper()), dtype=float)  # the ensemble says if it cannot provide it


def ensemble_light_cone(ens, threshold: float = 0.5, probe: str = "Z", *, use_trust: bool = True,
                        max_discarded: float = DEFAULT_MAX_DISCARDED, **opts) -> dict[str, Any]:
    """:func:`light_cone` of a loaded ensemble, with its trust mask; ``out['trust']`` describes the mask."""
    mask, info = trust_mask(ens, use_trust, max_discarded, probe if isinstance(probe, str) else None)
    out = light_cone(ens.times, _probe_otoc(ens, probe), int(ens.site), threshold, trusted=mask, **opts)
    out["trust"] = info
    out["probe"] = probe.upper()
    return out


def ensemble_front(ens, *, use_trust: bool = True, max_discarded: float = DEFAULT_MAX_DISCARDED,
                   **opts) -> dict[str, Any]:
    """:func:`front_shape` of a loaded ensemble's right-weight profiles, fitted on trusted times only.

    A time is trusted for the front when the trust mask (:func:`trust_mask`) holds in every realization at
    every site from one width behind the mean front position to the right end of the chain.
    """
    rho = np.asarray(ens.right_weight, dtype=float)
    site = int(ens.site)
    if use_trust and "trusted_times" not in opts:
        mask, info = trust_mask(ens, True, max_discarded)
        R, n_t, L = rho.shape
        m = np.broadcast_to(mask, (R, n_t, L)).all(axis=0)
        pos, wid = _moments(rho.mean(axis=0), np.arange(L) - site)
        start = np.clip(site + np.floor(np.nan_to_num(pos - wid)).astype(int), 0, L - 1)
        opts["trusted_times"] = np.array([m[k, start[k]:].all() for k in range(n_t)])
    out = front_shape(ens.times, rho, site, **opts)
    return out


def ensemble_distribution(ens, r: int | None = None, probe: str = "Z", **opts) -> dict[str, Any]:
    """:func:`distribution` of C at site ``r`` (default: halfway along the longer side of W)."""
    C = _probe_otoc(ens, probe)
    L = C.shape[2]
    if r is None:
        cols, _, _ = one_side(L, int(ens.site))
        r = int(cols[len(cols) // 2])
    if isinstance(r, bool) or not isinstance(r, Integral) or not 0 <= r < L:
        raise InputError(f"r (the probe site) must be an integer in 0..{L - 1}, got {r!r}")
    out = distribution(C[:, :, int(r)], ens.times, **opts)
    out["r"] = int(r)
    out["d"] = abs(int(r) - int(ens.site))
    out["probe"] = probe.upper()
    return out


def front_sites(curve_values: np.ndarray, threshold: float, ahead: int = 3, behind: int = 3
                ) -> dict[str, np.ndarray]:
    """Masks (n_t, n_d) of points at, ahead of and behind the threshold contour of one curve over distances.

    At each time the contour sits at the farthest distance d_f with C >= threshold; 'front' marks d_f and
    d_f + 1, 'behind' the distances d <= d_f - ``behind``, 'ahead' those d >= d_f + ``ahead``. Times at which
    no distance has reached the threshold mark everything but d = 0 as ahead.
    """
    c = np.asarray(curve_values, dtype=float)
    n_t, n_d = c.shape
    d = np.arange(n_d)[None, :]
    above = c >= threshold
    df = np.where(above.any(axis=1), n_d - 1 - np.argmax(above[:, ::-1], axis=1), -1)[:, None]
    front = (d >= df) & (d <= df + 1) & (df >= 0)
    behind_m = d <= df - behind
    ahead_m = d >= np.maximum(df + ahead, 1)
    return {"front": front, "behind": behind_m, "ahead": ahead_m, "d_front": df[:, 0]}


# ------------------------------------------------------------------------------------------ summary
def _jsonable(obj):
    if isinstance(obj, Mapping):
        return {str(k): _jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_jsonable(v) for v in obj.tolist()]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (Integral, np.integer)):
        return int(obj)
    if isinstance(obj, (Real, np.floating)):
        v = float(obj)
        return v if np.isfinite(v) else None
    if obj is None or isinstance(obj, str):
        return obj
    return str(obj)


_FIT_KEYS = ("law", "parameter", "units", "value", "ci_low", "ci_high", "ci", "ci_method", "r_range",
             "n_points", "r2", "rms_residual", "rms_log_residual", "slope", "intercept", "intercept_name",
             "slope_ci", "intercept_ci", "n_excluded_untrusted", "n_unreached", "n_early", "n_boot_valid",
             "distances", "tstar", "residuals")


def summarize(ens, threshold: float = 0.5, probe: str = "Z", *, curve: str = "mean", side: str = "auto",
              r_range: tuple[int, int] | None = None, d_min: int = 1, n_boot: int = 500, ci: float = 0.95,
              seed: int = 0, use_trust: bool = True, max_discarded: float = DEFAULT_MAX_DISCARDED
              ) -> dict[str, Any]:
    """The numbers a researcher wants from a finished ensemble, as a JSON-able dict.

    Parameters
    ----------
    ens : loaded ensemble (see :func:`mpo_fronts.load`)
    threshold : float
        theta on the [0, 2] scale of C (default 0.5).
    probe : {'X', 'Y', 'Z'}
        Probe V of C(r, t).
    curve, side, r_range, d_min, n_boot, ci, seed
        See :func:`light_cone`.
    use_trust : bool
        Use only trusted points (convergence mask, else the discarded-weight criterion); default True.
    max_discarded : float
        Discarded-weight criterion when the ensemble has no convergence data.

    Returns
    -------
    dict
        Top-level ``threshold``, ``probe``; ``butterfly_velocity`` and ``log_light_cone``, each with
        ``value``, ``ci_low``, ``ci_high``, ``r_range`` (inclusive distances d = |r - i|), fit quality
        (``r2``, ``rms_residual``, ``rms_log_residual``), ``n_points``, exclusion counts and the residuals;
        ``law_comparison``; ``crossings`` (distances, t* of the curve, status names, per-realization status
        counts); ``front`` (width exponent); ``distribution`` (largest bimodality at one site); ``trust``
        (criterion, trusted fraction); ``largest_discarded_weight``, ``largest_bond``, ``engine``,
        ``description``. Non-finite numbers become None.

    Examples
    --------
    >>> import json, mpo_fronts as mf                                   # doctest: +SKIP
    >>> s = mf.analysis.summarize(mf.load("runs/demo"), threshold=0.5)  # doctest: +SKIP
    >>> print(json.dumps(s)[:40])                                       # doctest: +SKIP
    """
    lc = ensemble_light_cone(ens, threshold, probe, use_trust=use_trust, max_discarded=max_discarded,
                             curve=curve, side=side, r_range=r_range, d_min=d_min, n_boot=n_boot, ci=ci, seed=seed)
    fits = {law: {k: lc["fits"][law].get(k) for k in _FIT_KEYS} for law in LAWS}
    rb, rl = fits["ballistic"]["rms_log_residual"], fits["log"]["rms_log_residual"]
    smaller = None
    if np.isfinite(rb) and np.isfinite(rl):
        smaller = "ballistic" if rb < rl else "log"
    fr = ensemble_front(ens, use_trust=use_trust, max_discarded=max_discarded, n_boot=n_boot, ci=ci, seed=seed)
    we = fr["width_exponent"]
    dist = ensemble_distribution(ens, probe=probe)
    bim = dist["bimodality"]
    k_max = int(np.nanargmax(bim)) if np.any(np.isfinite(bim)) else None
    cross = lc["crossings"]
    dw = np.asarray(ens.discarded_weight, dtype=float)
    mb = np.asarray(ens.max_bond)
    out = {
        "threshold": lc["threshold"],
        "probe": lc["probe"],
        "curve": curve,
        "ci_level": ci,
        "site": lc["site"],
        "side": lc["side"],
        "L": int(ens.L),
        "n_realizations": lc["R"],
        "n_times": int(len(ens.times)),
        "t_range": [float(ens.times[0]), float(ens.times[-1])],
        "distance": "d = |r - site| on the side of W named in 'side'; t* in units of 1/J",
        "butterfly_velocity": fits["ballistic"],
        "log_light_cone": fits["log"],
        "law_comparison": {"rms_log_residual_ballistic": rb, "rms_log_residual_log": rl, "smaller": smaller},
        "crossings": {"distances": lc["d"], "tstar": cross.tstar,
                      "status": [STATUS_NAMES[int(s)] for s in cross.status],
                      "tstar_boot_std": lc["tstar_boot_std"],
                      "realization_counts": lc["realization_crossings"].counts()},
        "front": {"width_exponent": {k: we[k] for k in ("value", "ci_low", "ci_high", "ci_method", "t_range",
                                                        "n_points", "r2", "law", "n_excluded_times")},
                  "final_position": fr["position"][-1], "final_width": fr["width"][-1],
                  "note": "from the right-weight profile: the right end of W(t)"},
        "distribution": {"r": dist["r"], "d": dist["d"], "measure": "Sarle's bimodality coefficient "
                         "(SAS/STAT PROC CLUSTER; Pfister et al. 2013); > 5/9 suggests two modes",
                         "max_bimodality": bim[k_max] if k_max is not None else None,
                         "t_at_max": float(ens.times[k_max]) if k_max is not None else None},
        "trust": lc["trust"],
        "trusted_fraction": lc["trust"]["trusted_fraction"],
        "largest_discarded_weight": float(np.nanmax(dw)) if dw.size else None,
        "largest_bond": int(mb.max()) if mb.size else None,
        "engine": dict(getattr(ens, "engine", {}) or {}),
        "description": dict(getattr(ens, "description", {}) or {}),
    }
    return _jsonable(out)


def _fmt(v, spec: str = ".4g") -> str:
    return "-" if v is None else format(v, spec) if isinstance(v, (int, float)) else str(v)


def format_summary(d: Mapping[str, Any]) -> str:
    """The summary of :func:`summarize` as a plain-text table."""
    lvl = d.get("ci_level", 0.95)
    lines = [
        f"OTOC light cone: probe V = {d.get('probe')}, W at site {d.get('site')} of L = {d.get('L')}, "
        f"{d.get('side')} side, {d.get('n_realizations')} realization(s), t in [{_fmt(d['t_range'][0])}, "
        f"{_fmt(d['t_range'][1])}] (1/J)",
        f"threshold theta = {_fmt(d.get('threshold'))} on C in [0, 2]; crossing times of the ensemble "
        f"{d.get('curve')} of C, interpolated in ln t",
        "",
        f"{'quantity':<26}{'value':>10}  {f'{int(round(lvl * 100))}% interval':<22}{'range':<15}{'points':>6}"
        f"{'R^2':>8}{'rms ln':>9}",
    ]
    for key, name in (("butterfly_velocity", "v_B (sites per 1/J)"), ("log_light_cone", "xi (sites)")):
        f = d.get(key) or {}
        rr = f.get("r_range") or [None, None]
        interval = f"[{_fmt(f.get('ci_low'))}, {_fmt(f.get('ci_high'))}]"
        lines.append(f"{name:<26}{_fmt(f.get('value')):>10}  {interval:<22}{f'd {rr[0]}..{rr[1]}':<15}"
                     f"{_fmt(f.get('n_points')):>6}{_fmt(f.get('r2'), '.3f'):>8}"
                     f"{_fmt(f.get('rms_log_residual'), '.3f'):>9}")
    we = (d.get("front") or {}).get("width_exponent") or {}
    tr = we.get("t_range") or [None, None]
    interval = f"[{_fmt(we.get('ci_low'))}, {_fmt(we.get('ci_high'))}]"
    lines.append(f"{'width exponent beta':<26}{_fmt(we.get('value')):>10}  {interval:<22}"
                 f"{'t ' + _fmt(tr[0], '.3g') + '..' + _fmt(tr[1], '.3g'):<15}{_fmt(we.get('n_points')):>6}"
                 f"{_fmt(we.get('r2'), '.3f'):>8}{'':>9}")
    bv = d.get("butterfly_velocity") or {}
    lc = d.get("law_comparison") or {}
    lines += [
        "",
        f"fits: {bv.get('law')} and {(d.get('log_light_cone') or {}).get('law')}; smaller rms ln-residual: "
        f"{lc.get('smaller')}",
        f"distances beyond d_low: {bv.get('n_unreached')} unreached, {bv.get('n_excluded_untrusted')} excluded "
        f"as untrusted; intervals: {bv.get('ci_method')}",
        f"trust: {(d.get('trust') or {}).get('criterion')}; trusted fraction {_fmt(d.get('trusted_fraction'), '.3f')}",
        f"largest discarded weight {_fmt(d.get('largest_discarded_weight'), '.3g')}, largest bond "
        f"{_fmt(d.get('largest_bond'))}",
    ]
    dist = d.get("distribution") or {}
    lines.append(f"bimodality at r = {dist.get('r')} (d = {dist.get('d')}): max "
                 f"{_fmt(dist.get('max_bimodality'), '.3f')} at t = {_fmt(dist.get('t_at_max'), '.3g')} "
                 "(Sarle's coefficient, > 5/9 suggests two modes)")
    eng = d.get("engine") or {}
    if eng:
        lines.append("engine: " + ", ".join(f"{k} = {v}" for k, v in eng.items()))
    return "\n".join(lines)
