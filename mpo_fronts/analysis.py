"""Analysis of OTOC arrays: statistics, distributions, crossing times, light-cone fits, front shape.

Everything here works on plain arrays, with the realizations on the first axis:

* ``times`` (n_t,) in units of 1/J, strictly increasing, ``>= 0``;
* ``C`` (R, n_t, L), the infinite-temperature OTOC C(r, t) on its natural [0, 2] scale;
* ``site``, the site i of W; distances are d = |r - i|, taken on one side of W only (by default the side
  with more sites, ties going right), so every distance appears once;
* trust masks, boolean arrays broadcastable to (R, n_t, L); ``True`` marks a point whose value is believed.

Which points are trusted is decided in :mod:`mpo_fronts.trust`, and the summary of a loaded ensemble is built in
:mod:`mpo_fronts.report`; this module only computes. :func:`probe_otoc` and :func:`ensemble_distribution` are
the only functions that take a loaded ensemble (the object returned by :func:`mpo_fronts.load`).

Conventions used throughout
---------------------------
Crossing time
    t*(d; theta) is the first output time at which C(d, t) >= theta, interpolated linearly in ln t between
    the two bracketing output times (linearly in t on an interval that starts at t = 0). A distance the
    curve never reaches is *unreached*: t* is NaN and the status says so; nothing is extrapolated.
Status codes
    ``CROSSED`` (0), ``UNREACHED`` (1, never reached within the data, all points trusted), ``EARLY`` (2,
    already at or above theta at the first output time, so t* is only bounded), ``UNTRUSTED`` (3, the
    crossing, or its absence, rests on at least one untrusted point at or before it, or its error is too
    large to fit). Only ``CROSSED`` distances enter fits.
Fits
    Ballistic: t* = d / v_B + t0 (v_B in sites per unit time 1/J). Logarithmic: ln t* = d / xi + c (xi in
    sites). Both are ordinary least-squares lines through the crossing times of one ensemble curve (the mean
    of C over realizations by default). Confidence intervals are percentile intervals of a bootstrap over
    realizations (seeded, reproducible): realizations are redrawn with replacement, the curve, its crossing
    times and the fit are recomputed. With a single realization the interval falls back to the
    least-squares standard error of the slope (Student t), which measures how well the law fits, not noise.
    Systematic errors of the crossing times (truncation, Trotter; see :mod:`mpo_fronts.trust`) enter through
    ``tstar_sys``: each bootstrap draw (or, with one realization, each of ``n_boot`` draws) shifts every
    t*(d) by an independent uniform draw within its systematic interval, so the fitted intervals carry them.
Bimodality
    Sarle's bimodality coefficient b = (g^2 + 1) / (k + 3 (n - 1)^2 / ((n - 2)(n - 3))) with the
    bias-corrected sample skewness g and excess kurtosis k (SAS Institute, SAS/STAT User's Guide, PROC
    CLUSTER; discussed by Pfister et al., Front. Psychol. 4, 700 (2013)). b = 1/3 for a normal, 5/9 for a
    uniform distribution; b > 5/9 hints at two modes.
"""

from __future__ import annotations

import warnings
from dataclasses import dataclass, field, fields
from numbers import Integral, Real
from typing import Any, Sequence

import numpy as np

from .errors import InputError

__all__ = [
    "CROSSED", "UNREACHED", "EARLY", "UNTRUSTED", "STATUS_NAMES", "TYPICAL_FLOOR", "LAWS", "CURVES",
    "Record", "Crossings", "LawFit", "LightCone", "WidthFit", "FrontShape",
    "check_times", "check_otoc", "check_threshold", "check_ci", "check_count", "check_curve", "trusted_array",
    "one_side", "typical_value", "ensemble_curve", "ensemble_statistics", "sarle_bimodality", "distribution",
    "crossing_times", "fit_line", "fit_range", "bootstrap_crossings", "light_cone", "front_moments",
    "front_shape", "front_sites", "probe_otoc", "ensemble_distribution", "reached_site", "DISTRIBUTION_REACH",
    "evolution_settings",
]

CROSSED, UNREACHED, EARLY, UNTRUSTED = 0, 1, 2, 3
STATUS_NAMES = {CROSSED: "crossed", UNREACHED: "unreached", EARLY: "early", UNTRUSTED: "untrusted"}
#: Values of C below this floor count as this floor in ln C (the typical value); C is a weight in [0, 2] and
#: values near 1e-15 are at the level of floating-point noise.
TYPICAL_FLOOR = 1e-15
#: The two light-cone laws: name -> (formula, parameter name, units).
LAWS = {
    "ballistic": ("t* = d / v_B + t0", "v_B", "sites per unit time (1/J)"),
    "log": ("ln t* = d / xi + c", "xi", "sites"),
}
#: The ensemble curves whose crossing times can be fitted.
CURVES = ("mean", "median", "typical")
_BOOT_BLOCK = 2e7  # numbers held at once while bootstrapping medians
_NAN = float("nan")


# ------------------------------------------------------------------------------------------ typed results
class Record:
    """Read access by key to the fields of a result dataclass: ``res["value"]``, ``res.get("value")``.

    The results of :func:`light_cone` and :func:`front_shape` are dataclasses; this keeps the older
    dictionary spelling working for readers that index them.
    """

    def keys(self) -> list[str]:
        return [f.name for f in fields(self)]

    def __getitem__(self, key: str):
        if isinstance(key, str) and key in self.keys():
            return getattr(self, key)
        raise KeyError(key)

    def __contains__(self, key) -> bool:
        return key in self.keys()

    def get(self, key: str, default=None):
        return getattr(self, key) if key in self.keys() else default

    def to_dict(self) -> dict[str, Any]:
        """The fields as a (shallow) dict."""
        return {k: getattr(self, k) for k in self.keys()}


# ------------------------------------------------------------------------------------------ validation
def check_times(times) -> np.ndarray:
    """Output times as a float array: non-empty, finite, >= 0, strictly increasing (units 1/J)."""
    t = np.asarray(times, dtype=float).reshape(-1)
    if t.size < 1 or not np.all(np.isfinite(t)) or np.any(t < 0) or np.any(np.diff(t) <= 0):
        raise InputError("times must be a non-empty, strictly increasing array of finite times >= 0 (units 1/J)",
                         arg="times")
    return t


def check_otoc(C, n_t: int | None = None, name: str = "C") -> np.ndarray:
    """An array of shape (R, n_t, L) (realizations, times, sites), with ``n_t`` times when given."""
    a = np.asarray(C, dtype=float)
    if a.ndim != 3:
        raise InputError(f"{name} must have shape (R, n_t, L) (realizations, times, sites), got shape {a.shape}",
                         arg=name)
    if n_t is not None and a.shape[1] != n_t:
        raise InputError(f"{name} has {a.shape[1]} times but times has {n_t}; they must match", arg=name)
    return a


def check_threshold(threshold) -> float:
    """A threshold theta strictly between 0 and 2 (the scale of C)."""
    if isinstance(threshold, bool) or not isinstance(threshold, Real) or not 0 < float(threshold) < 2:
        raise InputError(f"threshold must be a number strictly between 0 and 2 (C is on the [0, 2] scale), "
                         f"got {threshold!r}", arg="threshold")
    return float(threshold)


def check_ci(ci) -> float:
    """A confidence level strictly between 0 and 1."""
    if isinstance(ci, bool) or not isinstance(ci, Real) or not 0 < float(ci) < 1:
        raise InputError(f"ci (the confidence level) must be strictly between 0 and 1, e.g. 0.95, got {ci!r}",
                         arg="ci")
    return float(ci)


def check_count(name: str, value, low: int = 0) -> int:
    """An integer argument ``name`` >= ``low``."""
    if isinstance(value, bool) or not isinstance(value, Integral) or value < low:
        raise InputError(f"{name} must be an integer >= {low}, got {value!r}", arg=name)
    return int(value)


def check_curve(curve) -> str:
    """One of :data:`CURVES`."""
    if curve not in CURVES:
        raise InputError(f"curve must be one of {', '.join(repr(c) for c in CURVES)}, got {curve!r}", arg="curve")
    return curve


def trusted_array(trusted, shape: tuple[int, ...]) -> np.ndarray:
    """A trust mask broadcast to ``shape`` (all True for None)."""
    if trusted is None:
        return np.ones(shape, dtype=bool)
    m = np.asarray(trusted, dtype=bool)
    try:
        return np.broadcast_to(m, shape)
    except ValueError:
        raise InputError(f"trusted must be a boolean mask broadcastable to {shape}, got shape {m.shape}",
                         arg="trusted") from None


def _check_site(site, L: int) -> int:
    if isinstance(site, bool) or not isinstance(site, Integral) or not 0 <= site < L:
        raise InputError(f"site must be an integer in 0..{L - 1}, got {site!r}", arg="site")
    return int(site)


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
    L = check_count("L", L, 1)
    _check_site(site, L)
    if side not in ("auto", "right", "left"):
        raise InputError(f"side must be 'auto', 'right' or 'left', got {side!r}", arg="side")
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
    curve = check_curve(curve)
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
    a = check_otoc(C)
    q = np.asarray(quantiles, dtype=float).reshape(-1)
    if np.any((q < 0) | (q > 1)):
        raise InputError(f"quantiles must lie in [0, 1], got {list(quantiles)}", arg="quantiles")
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
        raise InputError(f"C_r must have shape (R, n_t) (realizations, times at one site), got {a.shape}",
                         arg="C_r")
    lo, hi = value_range
    if not hi > lo:
        raise InputError(f"value_range must be (low, high) with high > low, got {value_range!r}", arg="value_range")
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
        out["times"] = check_times(times)
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
    t = check_times(times)
    theta = check_threshold(threshold)
    a = np.asarray(C, dtype=float)
    if a.ndim < 2 or a.shape[-2] != t.size:
        raise InputError(f"C must have time on its second-to-last axis with {t.size} entries, got shape {a.shape}",
                         arg="C")
    ok = trusted_array(trusted, a.shape) & np.isfinite(a)
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
    if n < 2 or np.ptp(x) == 0:
        return {"slope": _NAN, "intercept": _NAN, "slope_se": _NAN, "intercept_se": _NAN,
                "residuals": np.full(n, np.nan), "r2": _NAN, "n": n}
    xm, ym = x.mean(), y.mean()
    sxx = np.sum((x - xm) ** 2)
    slope = np.sum((x - xm) * (y - ym)) / sxx
    intercept = ym - slope * xm
    res = y - (slope * x + intercept)
    ss_tot = np.sum((y - ym) ** 2)
    r2 = 1.0 - np.sum(res ** 2) / ss_tot if ss_tot > 0 else _NAN
    if n > 2:
        s2 = np.sum(res ** 2) / (n - 2)
        slope_se = np.sqrt(s2 / sxx)
        intercept_se = np.sqrt(s2 * (1.0 / n + xm ** 2 / sxx))
    else:
        slope_se = intercept_se = _NAN
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
        return _NAN, _NAN
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


def bootstrap_crossings(times, C, theta: float, *, trusted=None, curve: str = "mean", n_boot: int = 500,
                        seed: int = 0) -> np.ndarray:
    """Crossing times of the ensemble curve of ``n_boot`` resamples of the realizations (with replacement).

    Parameters
    ----------
    times : array_like (n_t,)
    C : array_like (R, n_t, n_d)
        Realizations of the curves (R >= 2).
    theta : float
    trusted : bool array broadcastable to C, optional
    curve : {'mean', 'median', 'typical'}
    n_boot, seed
        Number of resamples and the seed of numpy's default_rng (equal inputs give equal draws).

    Returns
    -------
    ndarray (n_boot, n_d)
        t* of each resampled curve (NaN where it has no trusted crossing).
    """
    t = check_times(times)
    a = check_otoc(C, t.size)
    ok = trusted_array(trusted, a.shape) & np.isfinite(a)
    R = a.shape[0]
    cnt = _boot_counts(np.random.default_rng(seed), n_boot, R)
    per = max(1, int(_BOOT_BLOCK // max(1, (R if curve == "median" else 1) * a.shape[1] * a.shape[2])))
    tb = np.empty((n_boot, a.shape[2]))
    for s in range(0, n_boot, per):
        cb, okb = _boot_curves(a, ok, cnt[s:s + per], curve)
        tb[s:s + per] = crossing_times(t, cb, theta, okb).tstar
    return tb


def _column_std(tb: np.ndarray | None, n: int) -> np.ndarray:
    """Standard deviation (ddof 1) of the finite entries of each column; NaN for fewer than 2."""
    if tb is None:
        return np.full(n, np.nan)
    fin = np.isfinite(tb)
    nf = fin.sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        mb = np.where(fin, tb, 0.0).sum(axis=0) / nf
        var = np.where(fin, (tb - mb) ** 2, 0.0).sum(axis=0) / (nf - 1)
    return np.where(nf >= 2, np.sqrt(var), np.nan)


def fit_range(d: np.ndarray, cross: Crossings, r_range: tuple[int, int] | None, d_min: int) -> tuple[int, int]:
    """Inclusive fit range (d_low, d_high): ``r_range`` checked, or d_min .. the farthest crossed distance."""
    if r_range is None:
        hit = np.flatnonzero((cross.status == CROSSED) & (d >= d_min))
        return (d_min, int(d[hit].max())) if hit.size else (d_min, d_min - 1)
    try:
        lo, hi = (int(r_range[0]), int(r_range[1]))
    except (TypeError, ValueError, IndexError):
        raise InputError(f"r_range must be a pair of distances (d_low, d_high), got {r_range!r}",
                         arg="r_range") from None
    if lo < 0 or hi < lo:
        raise InputError(f"r_range must satisfy 0 <= d_low <= d_high, got {r_range!r}", arg="r_range")
    return lo, hi


def _exclusion_counts(d: np.ndarray, status: np.ndarray, lo: int, hi: int) -> dict[str, int]:
    """Distances left out of a fit: untrusted and unreached ones from d_low outwards, early ones in the range."""
    beyond = d >= lo
    in_range = beyond & (d <= hi)
    return {"n_excluded_untrusted": int(np.sum(beyond & (status == UNTRUSTED))),
            "n_unreached": int(np.sum(beyond & (status == UNREACHED))),
            "n_early": int(np.sum(in_range & (status == EARLY)))}


@dataclass(eq=False)
class LawFit(Record):
    """One light-cone law fitted to the crossing times of an ensemble curve (see :func:`light_cone`).

    Attributes
    ----------
    law, parameter, units : str
        The formula (``LAWS``), the name of the fitted parameter (v_B or xi) and its units.
    value, ci_low, ci_high : float
        v_B (sites per 1/J) or xi (sites) and its interval at level ``ci`` (``ci_method`` says how).
    slope, intercept : float
        The least-squares line (t* or ln t* against d); ``intercept_name`` is t0 or c.
    slope_ci, intercept_ci : list of two floats
    distances, tstar : ndarray
        The points fitted (distances d and their t*, units 1/J).
    residuals : ndarray
        In t (ballistic) or ln t (log).
    rms_residual, rms_log_residual, r2 : float
        ``rms_log_residual`` is in ln t for both laws, so the two compare.
    n_points : int
    d_range : list of two ints
        Inclusive fit range of distances d = |r - i|; ``r_range`` is the same (its older name).
    n_excluded_untrusted, n_unreached, n_early : int
        Distances left out: untrusted or unreached from d_low outwards, early within the range.
    n_boot_valid : int
        Bootstrap draws with a valid fit (0 for the least-squares interval).
    band : dict
        ``d``, ``low``, ``high``, ``fit`` of t on a grid of distances.
    systematic : bool
        Whether the interval includes the systematic (truncation, Trotter) errors of t*.
    """

    law: str
    parameter: str
    units: str
    value: float
    slope: float
    intercept: float
    intercept_name: str
    distances: np.ndarray
    tstar: np.ndarray
    residuals: np.ndarray
    rms_residual: float
    rms_log_residual: float
    r2: float
    n_points: int
    d_range: list
    ci: float
    n_excluded_untrusted: int
    n_unreached: int
    n_early: int
    ci_low: float = _NAN
    ci_high: float = _NAN
    slope_ci: list = field(default_factory=lambda: [_NAN, _NAN])
    intercept_ci: list = field(default_factory=lambda: [_NAN, _NAN])
    n_boot_valid: int = 0
    ci_method: str = ""
    band: dict = field(default_factory=dict)
    systematic: bool = False

    @property
    def r_range(self) -> list:
        """The fit range of distances (older name of :attr:`d_range`)."""
        return self.d_range

    def keys(self) -> list[str]:
        return super().keys() + ["r_range"]


@dataclass(eq=False)
class LightCone(Record):
    """The light cone t*(d; theta) of one ensemble curve and its two fits (the result of :func:`light_cone`).

    Attributes
    ----------
    d, cols : ndarray of int
        Distances d = |r - i| and their sites r, on ``side`` of W at ``site``.
    threshold : float
    curve : str
        The ensemble curve ('mean', 'median', 'typical').
    times : ndarray (n_t,)
    crossings : Crossings
        Of the curve, over d.
    realization_crossings : Crossings
        Of each realization, (R, n_d).
    tstar_boot_std : ndarray (n_d,)
        Bootstrap standard deviation of t* over realizations (NaN without a bootstrap).
    tstar_low, tstar_high : ndarray (n_d,)
        Interval of each crossed t*: the statistical interval (bootstrap percentiles at level ``ci``) widened
        by the systematic half-widths ``tstar_sys`` added in quadrature; NaN where there is no crossing.
    tstar_sys : ndarray (2, n_d)
        Systematic errors below and above t* that were given (zeros when none).
    curve_values, curve_trusted : ndarray (n_t, n_d)
    fits : dict
        'ballistic' and 'log' -> :class:`LawFit`.
    R : int
    probe : str or None
        Set by :func:`mpo_fronts.trust.ensemble_light_cone`.
    trust : dict or None
        The trust criterion used (set by :func:`mpo_fronts.trust.ensemble_light_cone`).
    errors : object or None
        The systematic error budget of the crossing times (a :class:`mpo_fronts.trust.CrossingErrors`), when
        the light cone was computed with one (:func:`mpo_fronts.trust.trusted_light_cone`).
    """

    d: np.ndarray
    cols: np.ndarray
    side: str
    site: int
    threshold: float
    curve: str
    times: np.ndarray
    crossings: Crossings
    realization_crossings: Crossings
    tstar_boot_std: np.ndarray
    curve_values: np.ndarray
    curve_trusted: np.ndarray
    fits: dict
    R: int
    tstar_low: np.ndarray | None = None
    tstar_high: np.ndarray | None = None
    tstar_sys: np.ndarray | None = None
    ci: float = 0.95
    probe: str | None = None
    trust: dict | None = None
    errors: Any = None


def _no_fit(f: dict) -> dict:
    """Two points always fit a line; report no fit rather than a fit without a test."""
    if f["n"] < 3:
        f.update(slope=_NAN, intercept=_NAN, r2=_NAN, residuals=np.full(f["n"], np.nan))
    return f


def _boot_interval(law: str, d: np.ndarray, tb: np.ndarray, d_band: np.ndarray, alpha: float) -> dict[str, Any]:
    """Percentile intervals of the parameter, the line and the band from bootstrap crossing times (n_b, n_d)."""
    yb = tb if law == "ballistic" else np.log(tb)
    sl, ic = _batch_lines(d.astype(float), np.nan_to_num(yb), np.isfinite(yb))
    good = np.isfinite(sl)
    out: dict[str, Any] = {"n_boot_valid": int(good.sum())}
    if good.sum() < 2:
        return out
    s_lo, s_hi = np.percentile(sl[good], [alpha, 100 - alpha])
    i_lo, i_hi = np.percentile(ic[good], [alpha, 100 - alpha])
    out["ci_low"], out["ci_high"] = _reciprocal_interval(s_lo, s_hi)
    out["slope_ci"] = [float(s_lo), float(s_hi)]
    out["intercept_ci"] = [float(i_lo), float(i_hi)]
    yb_band = sl[good, None] * d_band[None, :] + ic[good, None]
    band_lo, band_hi = np.percentile(yb_band, [alpha, 100 - alpha], axis=0)
    if law == "log":
        band_lo, band_hi = np.exp(band_lo), np.exp(band_hi)
    out["band"] = (band_lo, band_hi)
    return out


def _least_squares_interval(law: str, f: dict, x: np.ndarray, d_band: np.ndarray, alpha: float) -> dict[str, Any]:
    """Student-t intervals from the least-squares standard errors (no bootstrap)."""
    from scipy import stats

    out: dict[str, Any] = {"n_boot_valid": 0}
    if not (f["n"] >= 3 and np.isfinite(f["slope_se"])):
        return out
    slope, icpt = f["slope"], f["intercept"]
    q = stats.t.ppf(1 - alpha / 100, f["n"] - 2)
    s_lo, s_hi = slope - q * f["slope_se"], slope + q * f["slope_se"]
    i_lo, i_hi = icpt - q * f["intercept_se"], icpt + q * f["intercept_se"]
    out["ci_low"], out["ci_high"] = _reciprocal_interval(s_lo, s_hi)
    out["slope_ci"], out["intercept_ci"] = [float(s_lo), float(s_hi)], [float(i_lo), float(i_hi)]
    y_band = slope * d_band + icpt
    half = q * np.sqrt(f["slope_se"] ** 2 * (d_band - x.mean()) ** 2 + (f["intercept_se"] ** 2
                       - f["slope_se"] ** 2 * x.mean() ** 2))
    half = np.nan_to_num(half)
    band_lo, band_hi = y_band - half, y_band + half
    if law == "log":
        band_lo, band_hi = np.exp(band_lo), np.exp(band_hi)
    out["band"] = (band_lo, band_hi)
    return out


def _combined_interval(law: str, f: dict, x: np.ndarray, sys_iv: dict, lsq_iv: dict) -> dict[str, Any]:
    """One realization with systematic errors: the half-widths of the slope from the systematic draws and from
    least squares (the misfit of the law) added in quadrature, on each side; the same for the intercept."""
    if "slope_ci" not in sys_iv or "slope_ci" not in lsq_iv:
        return sys_iv if "slope_ci" in sys_iv else lsq_iv
    out: dict[str, Any] = {"n_boot_valid": sys_iv["n_boot_valid"]}
    for key, centre in (("slope_ci", f["slope"]), ("intercept_ci", f["intercept"])):
        (a_lo, a_hi), (b_lo, b_hi) = sys_iv[key], lsq_iv[key]
        out[key] = [float(centre - np.hypot(centre - a_lo, centre - b_lo)),
                    float(centre + np.hypot(a_hi - centre, b_hi - centre))]
    out["ci_low"], out["ci_high"] = _reciprocal_interval(*out["slope_ci"])
    (sl, sh), (ll, lh) = sys_iv["band"], lsq_iv["band"]
    if law == "log":
        sl, sh, ll, lh = np.log(sl), np.log(sh), np.log(ll), np.log(lh)
    mid = 0.5 * (ll + lh)  # the least-squares line itself
    lo, hi = mid - np.hypot(mid - sl, mid - ll), mid + np.hypot(sh - mid, lh - mid)
    out["band"] = (np.exp(lo), np.exp(hi)) if law == "log" else (lo, hi)
    return out


_LSQ_METHOD = ("least-squares standard error of the slope (Student t); no bootstrap (a single realization or "
               "n_boot = 0): it measures the misfit of the law")


def _fit_law(law: str, d: np.ndarray, use: np.ndarray, tstar: np.ndarray, tb: np.ndarray | None,
             d_band: np.ndarray, lo: int, hi: int, ci: float, counts: dict[str, int], method: str,
             systematic: bool, sys_only: bool = False) -> LawFit:
    """Fit one law to the crossing times ``tstar[use]``, with intervals from ``tb`` (draws) or least squares."""
    formula, pname, units = LAWS[law]
    x = d[use].astype(float)
    ts_use = tstar[use]
    y = ts_use if law == "ballistic" else np.log(ts_use)
    f = _no_fit(fit_line(x, y))
    slope, icpt = f["slope"], f["intercept"]
    value = 1.0 / slope if np.isfinite(slope) and slope > 0 else _NAN
    pred_t = slope * x + icpt if law == "ballistic" else np.exp(slope * x + icpt)
    with np.errstate(invalid="ignore", divide="ignore"):
        log_res = np.log(ts_use) - np.log(np.where(pred_t > 0, pred_t, np.nan))
    alpha = 100 * (1 - ci) / 2
    if tb is not None and x.size >= 3 and sys_only:
        iv = _combined_interval(law, f, x, _boot_interval(law, d, tb, d_band, alpha),
                                _least_squares_interval(law, f, x, d_band, alpha))
        ci_method = method
    elif tb is not None and x.size >= 3:
        iv = _boot_interval(law, d, tb, d_band, alpha)
        ci_method = method
    else:
        iv = _least_squares_interval(law, f, x, d_band, alpha)
        ci_method = _LSQ_METHOD
        systematic = False
    if x.size < 3:
        ci_method = "no fit: fewer than 3 distances with a trusted crossing in the fit range"
    band_lo, band_hi = iv.pop("band", (np.full(d_band.size, np.nan),) * 2)
    fit = (slope * d_band + icpt) if law == "ballistic" else np.exp(slope * d_band + icpt)
    return LawFit(
        law=formula, parameter=pname, units=units, value=value, slope=slope, intercept=icpt,
        intercept_name="t0" if law == "ballistic" else "c", distances=d[use], tstar=ts_use,
        residuals=f["residuals"],
        rms_residual=float(np.sqrt(np.mean(f["residuals"] ** 2))) if f["n"] >= 3 else _NAN,
        rms_log_residual=float(np.sqrt(np.nanmean(log_res ** 2))) if f["n"] >= 3 else _NAN,
        r2=f["r2"], n_points=int(f["n"]), d_range=[int(lo), int(hi)], ci=ci, **counts, **iv,
        ci_method=ci_method, band={"d": d_band, "low": band_lo, "high": band_hi, "fit": fit},
        systematic=bool(systematic and x.size >= 3))


def _check_sys(tstar_sys, n_d: int) -> np.ndarray:
    """Systematic errors of t* as (2, n_d) (below, above), non-negative; NaN marks an unknown error."""
    if tstar_sys is None:
        return np.zeros((2, n_d))
    s = np.asarray(tstar_sys, dtype=float)
    if s.shape == (n_d,):
        s = np.stack([s, s])
    if s.shape != (2, n_d) or np.any(s < 0):
        raise InputError(f"tstar_sys must hold non-negative errors of t*, shape ({n_d},) or (2, {n_d}) (below, "
                         f"above), one per distance on the side used, got shape {s.shape}", arg="tstar_sys")
    return s


def _systematic_draws(tstar: np.ndarray, sys: np.ndarray, n: int, rng: np.random.Generator) -> np.ndarray:
    """t* shifted by independent uniform draws within [t* - below, t* + above], shape (n, n_d)."""
    u = rng.uniform(0.0, 1.0, size=(n, tstar.size))
    return tstar[None, :] - sys[0][None, :] + u * (sys[0] + sys[1])[None, :]


def _distrust_crossings(cross: Crossings, crossing_trusted, sys: np.ndarray, given: bool) -> np.ndarray:
    """Mark crossings UNTRUSTED where ``crossing_trusted`` is False or (when ``given``) the systematic error is
    unknown (non-finite); returns the systematic errors with those entries set to 0."""
    n_d = cross.status.shape[-1]
    bad = np.zeros(n_d, bool)
    if crossing_trusted is not None:
        ct = np.asarray(crossing_trusted, dtype=bool).reshape(-1)
        if ct.size != n_d:
            raise InputError(f"crossing_trusted must have one entry per distance on the side used ({n_d}), "
                             f"got {ct.size}", arg="crossing_trusted")
        bad |= ~ct
    if given:
        bad |= ~np.isfinite(sys).all(axis=0)
    bad &= cross.status == CROSSED
    cross.status = np.where(bad, UNTRUSTED, cross.status).astype(np.int8)
    cross.tstar = np.where(bad, np.nan, cross.tstar)
    return np.where(np.isfinite(sys), sys, 0.0)


def _tstar_intervals(cross: Crossings, tb: np.ndarray | None, sys: np.ndarray, ci: float
                     ) -> tuple[np.ndarray, np.ndarray]:
    """[t_low, t_high] of each crossed t*: bootstrap percentiles (if any) and systematic errors in quadrature."""
    alpha = 100 * (1 - ci) / 2
    ts = cross.tstar
    if tb is not None:
        with warnings.catch_warnings():  # columns without any crossing: 'All-NaN slice'
            warnings.simplefilter("ignore", RuntimeWarning)
            q_lo, q_hi = np.nanpercentile(np.where(np.isfinite(tb), tb, np.nan), [alpha, 100 - alpha], axis=0)
        s_lo, s_hi = np.maximum(ts - q_lo, 0.0), np.maximum(q_hi - ts, 0.0)
    else:
        s_lo = s_hi = np.zeros(ts.size)
    crossed = cross.status == CROSSED
    with np.errstate(invalid="ignore"):
        t_low = np.where(crossed, ts - np.sqrt(np.nan_to_num(s_lo) ** 2 + sys[0] ** 2), np.nan)
        t_high = np.where(crossed, ts + np.sqrt(np.nan_to_num(s_hi) ** 2 + sys[1] ** 2), np.nan)
    return t_low, t_high


def _systematic_shifts(ts: np.ndarray, tb: np.ndarray | None, use: np.ndarray, sys: np.ndarray, n_boot: int,
                       seed: int, method: str) -> tuple[np.ndarray, str]:
    """Draws of t* with every crossing shifted uniformly within its systematic interval (on top of the
    bootstrap draws ``tb``, or of t* itself when there are none), and the words for the interval method."""
    rng = np.random.default_rng([seed, 1])
    if tb is None:
        n_draw = n_boot if n_boot > 0 else 500
        tb = np.where(use[None, :], np.broadcast_to(ts, (n_draw, ts.size)), np.nan)
        method = (f"no statistical draws (one realization or n_boot = 0): {n_draw} draws of every t* within its "
                  f"systematic interval (truncation, Trotter), percentile interval, seed = {seed}, combined in "
                  "quadrature with the least-squares interval (Student t), which measures the misfit of the law")
    else:
        method += "; every t* also shifted within its systematic interval (truncation, Trotter) in each draw"
    return tb - ts[None, :] + _systematic_draws(ts, sys, tb.shape[0], rng), method


def light_cone(times, C, site: int, threshold: float = 0.5, *, trusted=None, curve: str = "mean",
               side: str = "auto", r_range: tuple[int, int] | None = None, d_min: int = 1, n_boot: int = 500,
               ci: float = 0.95, seed: int = 0, n_band: int = 60, tstar_sys=None,
               crossing_trusted=None) -> LightCone:
    """Light cone t*(d; theta) with ballistic and logarithmic fits and their intervals.

    The steps: the ensemble curve and its crossings (:func:`crossing_times`), the fit range
    (:func:`fit_range`), the bootstrap over realizations (:func:`bootstrap_crossings`), the per-distance
    intervals of t*, then one least-squares line per law with its interval.

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
        Trust mask (see :func:`mpo_fronts.trust.trust_mask`); a point of an ensemble curve is trusted when it
        is trusted in every realization that enters it.
    curve : {'mean', 'median', 'typical'}
        The ensemble curve whose crossing times are fitted.
    r_range : (int, int), optional
        Inclusive range of distances d used in the fits; default from ``d_min`` to the farthest distance
        with a trusted crossing of the curve.
    d_min : int
        Smallest distance in the default range.
    n_boot : int
        Bootstrap resamples over realizations (0 to skip; skipped for R = 1 unless ``tstar_sys`` is given,
        whose draws then make the interval).
    ci : float
        Confidence level of the intervals (default 0.95).
    seed : int
        Seed of the bootstrap generator (numpy default_rng): equal inputs give equal intervals.
    n_band : int
        Number of distances on which the fitted bands are evaluated.
    tstar_sys : array_like (n_d,) or (2, n_d), optional
        Systematic errors (units 1/J) of the crossing time of the curve below and above it at each distance
        of the side used (truncation and Trotter error, see :func:`mpo_fronts.trust.crossing_errors`).
        They widen the per-distance intervals (in quadrature with the statistical half-widths) and enter the
        fits as uniform shifts drawn within them in every bootstrap draw. NaN entries are left out of the fits.
    crossing_trusted : bool array (n_d,), optional
        Distances whose crossing is trusted; the others get status ``UNTRUSTED`` and are not fitted.

    Returns
    -------
    LightCone
    """
    t = check_times(times)
    a = check_otoc(C, t.size)
    theta = check_threshold(threshold)
    curve = check_curve(curve)
    ci = check_ci(ci)
    n_boot = check_count("n_boot", n_boot)
    d_min = check_count("d_min", d_min)
    seed = check_count("seed", seed)
    R, _, L = a.shape
    cols, d, side = one_side(L, site, side)
    sys = _check_sys(tstar_sys, d.size)
    Cs = a[:, :, cols]
    ok_s = trusted_array(trusted, a.shape)[:, :, cols] & np.isfinite(Cs)

    # 1. the ensemble curve, its crossings and those of every realization
    centre = ensemble_curve(Cs, curve)
    ok_c = ok_s.all(axis=0)
    cross = crossing_times(t, centre, theta, ok_c)
    sys = _distrust_crossings(cross, crossing_trusted, sys, tstar_sys is not None)
    real = crossing_times(t, Cs, theta, ok_s)

    # 2. the fit range and what it leaves out
    lo, hi = fit_range(d, cross, r_range, d_min)
    use = (d >= lo) & (d <= hi) & (cross.status == CROSSED)
    counts = _exclusion_counts(d, cross.status, lo, hi)

    # 3. statistical draws of t*: bootstrap over realizations
    tb = None
    method = ""
    if R >= 2 and n_boot > 0:
        tb = np.where(use[None, :], bootstrap_crossings(t, Cs, theta, trusted=ok_s, curve=curve, n_boot=n_boot,
                                                        seed=seed), np.nan)
        method = f"bootstrap over realizations, percentile interval, n_boot = {n_boot}, seed = {seed}"
    tstar_boot_std = _column_std(tb, d.size)

    # 4. per-distance intervals of t*: statistical percentiles, widened by the systematic errors
    t_low, t_high = _tstar_intervals(cross, tb, sys, ci)

    # 5. systematic errors enter the fits as uniform shifts in every draw
    has_sys = tstar_sys is not None and bool(np.any(sys[:, use] > 0))
    sys_only = has_sys and tb is None  # no statistical draws: the misfit of the law enters by least squares
    if has_sys:
        tb, method = _systematic_shifts(cross.tstar, tb, use, sys, n_boot, seed, method)

    d_band = np.linspace(lo, hi, n_band) if hi >= lo else np.empty(0)
    fits = {law: _fit_law(law, d, use, cross.tstar, tb, d_band, lo, hi, ci, counts, method, has_sys, sys_only)
            for law in LAWS}
    return LightCone(d=d, cols=cols, side=side, site=int(site), threshold=theta, curve=curve, times=t,
                     crossings=cross, realization_crossings=real, tstar_boot_std=tstar_boot_std,
                     curve_values=centre, curve_trusted=ok_c, fits=fits, R=R, tstar_low=t_low, tstar_high=t_high,
                     tstar_sys=sys, ci=ci)


# ------------------------------------------------------------------------------------------ front shape
def front_moments(rho: np.ndarray, x: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Mean and standard deviation of x under the (unnormalized) profiles ``rho`` along the last axis."""
    tot = rho.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        pos = (rho * x).sum(axis=-1) / tot
        var = (rho * (x - pos[..., None]) ** 2).sum(axis=-1) / tot
    return pos, np.sqrt(np.maximum(var, 0.0))


@dataclass(eq=False)
class WidthFit(Record):
    """The width-growth exponent beta of w ~ a t^beta (see :func:`front_shape`).

    Attributes
    ----------
    value, ci_low, ci_high : float
        beta and its interval at level ``ci`` (``ci_method`` says how).
    prefactor : float
        a (sites).
    t_range : list of two floats
        Times fitted (units 1/J); ``times`` lists them.
    n_points, n_excluded_times : int
        Times fitted, and times of the window left out as untrusted.
    residuals : ndarray
        In ln w.
    r2 : float
    law : str
    """

    value: float
    prefactor: float
    t_range: list
    n_points: int
    residuals: np.ndarray
    r2: float
    times: np.ndarray
    law: str
    ci: float
    n_excluded_times: int
    ci_low: float = _NAN
    ci_high: float = _NAN
    ci_method: str = ""


@dataclass(eq=False)
class FrontShape(Record):
    """Front position and width of the right-weight profile over time (the result of :func:`front_shape`).

    Attributes
    ----------
    times : ndarray (n_t,)
    x : ndarray (L,)
        r - i (sites to the right of W).
    site : int
    profile : ndarray (n_t, L)
        Ensemble-mean right-weight profile.
    position, width : ndarray (n_t,)
        Of the mean profile (sites).
    position_r, width_r : ndarray (R, n_t)
        Per realization.
    edge_weight : ndarray (n_t,)
        Weight on the last ``edge_sites`` sites.
    width_exponent : WidthFit
    R : int
    """

    times: np.ndarray
    x: np.ndarray
    site: int
    profile: np.ndarray
    position: np.ndarray
    width: np.ndarray
    position_r: np.ndarray
    width_r: np.ndarray
    edge_weight: np.ndarray
    width_exponent: WidthFit
    R: int


def _width_window(t: np.ndarray, wid: np.ndarray, edge: np.ndarray, tt: np.ndarray, t_range, min_width: float,
                  edge_tol: float) -> tuple[np.ndarray, list, int]:
    """Times of the width fit (bool (n_t,)), their range and the number left out as untrusted."""
    if t_range is None:
        sel = (t > 0) & (wid >= min_width) & (edge < edge_tol)
        rng_t = [float(t[sel].min()), float(t[sel].max())] if sel.any() else [_NAN] * 2
    else:
        try:
            t_lo, t_hi = float(t_range[0]), float(t_range[1])
        except (TypeError, ValueError, IndexError):
            raise InputError(f"t_range must be a pair of times (t_low, t_high), got {t_range!r}",
                             arg="t_range") from None
        sel = (t >= t_lo) & (t <= t_hi) & (t > 0) & (wid > 0)
        rng_t = [t_lo, t_hi]
    n_excl = int(np.sum(sel & ~tt))
    sel = sel & tt
    if t_range is None:
        rng_t = [float(t[sel].min()), float(t[sel].max())] if sel.any() else [_NAN] * 2
    return sel, rng_t, n_excl


def _fit_width(t: np.ndarray, wid: np.ndarray, a: np.ndarray, x: np.ndarray, sel: np.ndarray, rng_t: list,
               n_excl: int, n_boot: int, ci: float, seed: int) -> WidthFit:
    """ln w against ln t on the selected times, with a bootstrap (R >= 2) or least-squares interval."""
    R = a.shape[0]
    lt, lw = np.log(t[sel]), np.log(wid[sel])
    f = _no_fit(fit_line(lt, lw))
    alpha = 100 * (1 - ci) / 2
    out = WidthFit(value=f["slope"], prefactor=float(np.exp(f["intercept"])) if np.isfinite(f["intercept"]) else
                   _NAN, t_range=rng_t, n_points=int(f["n"]), residuals=f["residuals"], r2=f["r2"], times=t[sel],
                   law="w = a t^beta", ci=ci, n_excluded_times=n_excl)
    if R >= 2 and n_boot > 0 and f["n"] >= 3:
        rng = np.random.default_rng(seed)
        cnt = _boot_counts(rng, n_boot, R)
        pb = np.einsum("br,rtl->btl", cnt / R, a[:, sel, :])
        _, wb = front_moments(pb, x)
        with np.errstate(divide="ignore"):
            lwb = np.log(wb)
        sl, _ = _batch_lines(lt, np.nan_to_num(lwb, neginf=0.0), np.isfinite(lwb))
        good = np.isfinite(sl)
        out.ci_low, out.ci_high = (np.percentile(sl[good], [alpha, 100 - alpha]).tolist() if good.sum() >= 2
                                   else [_NAN] * 2)
        out.ci_method = f"bootstrap over realizations, percentile interval, n_boot = {n_boot}, seed = {seed}"
    elif f["n"] >= 3 and np.isfinite(f["slope_se"]):
        from scipy import stats

        q = stats.t.ppf(1 - alpha / 100, f["n"] - 2)
        out.ci_low, out.ci_high = f["slope"] - q * f["slope_se"], f["slope"] + q * f["slope_se"]
        out.ci_method = "least-squares standard error of the slope (Student t); no bootstrap"
    else:
        out.ci_method = "fewer than 3 usable times"
    return out


def front_shape(times, rho, site: int, *, t_range: tuple[float, float] | None = None, edge_tol: float = 1e-3,
                edge_sites: int = 2, min_width: float = 0.5, trusted_times=None, n_boot: int = 500,
                ci: float = 0.95, seed: int = 0) -> FrontShape:
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
    FrontShape
    """
    t = check_times(times)
    a = np.asarray(rho, dtype=float)
    if a.ndim == 2:
        a = a[None]
    a = check_otoc(a, t.size, name="rho")
    ci = check_ci(ci)
    n_boot = check_count("n_boot", n_boot)
    R, _, L = a.shape
    _check_site(site, L)
    x = np.arange(L) - site
    prof = a.mean(axis=0)
    pos, wid = front_moments(prof, x)
    pos_r, wid_r = front_moments(a, x)
    tot = prof.sum(axis=-1)
    with np.errstate(invalid="ignore", divide="ignore"):
        edge = prof[:, L - edge_sites:].sum(axis=-1) / tot
    tt = np.ones(t.size, bool) if trusted_times is None else np.asarray(trusted_times, dtype=bool).reshape(-1)
    if tt.size != t.size:
        raise InputError(f"trusted_times must have one entry per time ({t.size}), got {tt.size}",
                         arg="trusted_times")
    sel, rng_t, n_excl = _width_window(t, wid, edge, tt, t_range, min_width, edge_tol)
    we = _fit_width(t, wid, a, x, sel, rng_t, n_excl, n_boot, ci, seed)
    return FrontShape(times=t, x=x, site=int(site), profile=prof, position=pos, width=wid, position_r=pos_r,
                      width_r=wid_r, edge_weight=edge, width_exponent=we, R=R)


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


# ------------------------------------------------------------------------------------------ loaded ensembles
def probe_otoc(ens, probe: str) -> np.ndarray:
    """C(r, t) of a loaded ensemble for probe V in {'X', 'Y', 'Z'}, as a float array (R, n_t, L)."""
    if not isinstance(probe, str) or probe.upper() not in ("X", "Y", "Z"):
        stored = ", ".join(getattr(ens, "probes", ()))
        raise InputError(f"probe must be one of 'X', 'Y', 'Z' (this run stores {stored}), got {probe!r}",
                         arg="probe")
    return np.asarray(ens.otoc(probe.upper()), dtype=float)  # the ensemble says if it cannot provide it


def evolution_settings(ens) -> dict:
    """The evolution settings of a loaded ensemble (``ens.evolution``; ``ens.engine`` for objects that only have
    the name before 0.2); an empty dict when it has neither."""
    ev = getattr(ens, "evolution", None)
    if ev is None:
        ev = getattr(ens, "engine", None)
    return dict(ev or {})


#: Default level that the ensemble-median C must reach at a distance for the distribution figure to use it.
DISTRIBUTION_REACH = 0.1


def reached_site(C, site: int, reach: float = DISTRIBUTION_REACH) -> int:
    """The default site of the distribution of C: a distance that the front reaches within the data.

    On the longer side of W (:func:`one_side`), d_reach is the largest distance d >= 1 at which the median of C
    over realizations reaches ``reach`` (default 0.1, on the [0, 2] scale) at some output time (d = 1 when none
    does), and d_half the distance halfway along that side. The site at distance min(d_half, d_reach) is
    returned: halfway along the chain when the front gets there, else the farthest distance it reaches, so the
    distribution is not drawn where C stays zero at every time.
    """
    a = check_otoc(C)
    if isinstance(reach, bool) or not isinstance(reach, Real) or not 0 < reach <= 2:
        raise InputError(f"reach must be a number in (0, 2] on the scale of C, got {reach!r}", arg="reach")
    cols, d, _ = one_side(a.shape[2], site)
    if cols.size == 1:
        return int(cols[0])
    reached = np.flatnonzero(np.max(np.median(a[:, :, cols], axis=0), axis=0) >= reach)
    reached = reached[reached >= 1]
    d_reach = int(reached.max()) if reached.size else 1
    return int(cols[min(len(cols) // 2, d_reach)])


def ensemble_distribution(ens, r: int | None = None, probe: str = "Z", *, reach: float = DISTRIBUTION_REACH,
                          **opts) -> dict[str, Any]:
    """:func:`distribution` of C at site ``r``.

    The default ``r`` is halfway along the longer side of W, or nearer where the front does not get that far:
    the farthest distance at which the ensemble-median C reaches ``reach`` (default 0.1) within the data (see
    :func:`reached_site`).
    """
    C = probe_otoc(ens, probe)
    L = C.shape[2]
    if r is None:
        r = reached_site(C, int(ens.site), reach)
    if isinstance(r, bool) or not isinstance(r, Integral) or not 0 <= r < L:
        raise InputError(f"r (the probe site) must be an integer in 0..{L - 1}, got {r!r}", arg="r")
    out = distribution(C[:, :, int(r)], ens.times, **opts)
    out["r"] = int(r)
    out["d"] = abs(int(r) - int(ens.site))
    out["probe"] = probe.upper()
    return out
