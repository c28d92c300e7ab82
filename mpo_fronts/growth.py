"""Growth stages of C(d, t): the local growth exponent, the stage map and its summary over realizations.

In a disordered chain a single realization's C(d, t) at a fixed distance d grows in stages: an early power law
t^(2d) (the lowest order of the Baker-Campbell-Hausdorff / Taylor series of W(t) reaches distance d at order t^d,
so its weight there is of order t^(2d); common practice), then slower stages, then saturation. The ensemble
mean hides this; the functions here read it out of every stored realization.

Definitions used throughout
---------------------------
Local growth exponent
    alpha(d, t) = d ln C(d, t) / d ln t, estimated at each output time t_k > 0 as the ordinary least-squares
    slope of ln C against ln t over the *window* of output times t_j with |ln t_j - ln t_k| <= ``window``
    (a half-width in ln t, default 0.25, i.e. a factor e^0.5 ~ 1.65 in t across the window). The window is
    defined in ln t, not in a number of points, so log-spaced, linear and irregular grids are treated alike;
    where fewer than 3 output times fall inside it (a coarse grid), the 3 output times nearest to t_k in ln t
    form the window instead. A point is *valid* when t > 0, C is finite and above ``floor`` (default 1e-14,
    where C of a double-precision weight is noise) and, with a trust mask, trusted. alpha(t_k) is NaN where
    t_k itself is not valid or fewer than 2 valid points are in its window; invalid neighbours are left out of
    the fit, never filled in. This is a local linear (first-order Savitzky-Golay-like) regression: on a
    symmetric window it is exact for a pure power law and has an O(window^2) bias where alpha bends.
Stages
    Along each curve alpha(t), a stage is a maximal run of consecutive valid output times whose alpha stays
    within ``tol * max(1, |m|)`` (default tol = 0.15) of the running mean m of the stage's alpha so far; a
    point outside starts a new run, an invalid point ends it. Runs with fewer than ``min_points`` (3) points
    or spanning less than ``min_span`` (0.5) in ln t are crossovers, not stages. Points with C >= ``c_max``
    (default 0.5, half of the infinite-temperature saturation value 1 of C in a chaotic chain) are left out of
    stages: near saturation alpha falls to 0 and says nothing about growth. The *exponent* of a stage is the
    least-squares slope of ln C against ln t over the stage's points (with its standard error), not the mean
    of the smoothed alpha. The first stage of a curve is its *early* stage when fewer than ``min_points`` defined
    values of alpha precede it, without a gap (otherwise the early growth lies below the floor, on untrusted
    points or in a crossover the data do not resolve, and the curve has no early stage); the last stage of a
    curve with two or more is its *later* stage.

Arrays follow :mod:`mpo_fronts.analysis`: ``times`` (n_t,) in units of 1/J, ``C`` (R, n_t, L) or, for
distances on one side of W, (R, n_t, n_d); a 1-D (n_t,) or 2-D (n_t, n) array has its time axis first (as the
exact references return it). :func:`ensemble_growth` takes a loaded ensemble (see :func:`mpo_fronts.load`).
"""

from __future__ import annotations

from dataclasses import dataclass
from numbers import Real
from typing import Any

import numpy as np

from .analysis import Record, check_ci, check_count, check_times, one_side, probe_otoc, trusted_array
from .errors import InputError

__all__ = [
    "DEFAULT_WINDOW", "DEFAULT_FLOOR", "DEFAULT_TOL", "DEFAULT_MIN_SPAN", "DEFAULT_MIN_POINTS", "DEFAULT_C_MAX",
    "local_exponent", "power_law_slope", "find_stages", "StageMap", "Growth", "ensemble_growth", "growth_summary",
]

#: Half-width of the fit window of alpha, in ln t.
DEFAULT_WINDOW = 0.25
#: Values of C at or below this floor are not used (double-precision noise of a weight normalised to 1).
DEFAULT_FLOOR = 1e-14
#: Relative tolerance of a plateau of alpha (see the module docstring).
DEFAULT_TOL = 0.15
#: Shortest stage, in ln t.
DEFAULT_MIN_SPAN = 0.5
#: Fewest output times in a stage.
DEFAULT_MIN_POINTS = 3
#: Points with C at or above this value are left out of stages (approach to saturation).
DEFAULT_C_MAX = 0.5
_WINDOW_POINTS = 3  # output times in a window at least (nearest in ln t on coarse grids)
_NAN = float("nan")


# ------------------------------------------------------------------------------------------ validation
def _positive(name: str, value, allow_zero: bool = False) -> float:
    if isinstance(value, bool) or not isinstance(value, Real) or not np.isfinite(value) or value < 0 \
            or (value == 0 and not allow_zero):
        need = ">= 0" if allow_zero else "> 0"
        raise InputError(f"{name} must be a finite number {need}, got {value!r}", arg=name)
    return float(value)


def _series_of(a: np.ndarray) -> np.ndarray:
    """(n_t,), (n_t, n) or (R, n_t, n) as (R * n, n_t) curves."""
    a3 = a.reshape(1, -1, 1) if a.ndim == 1 else (a[None] if a.ndim == 2 else a)
    R, n_t, n = a3.shape
    return np.moveaxis(a3, 1, 2).reshape(R * n, n_t)


def _as_series(times, C, trusted=None, name: str = "C") -> tuple[np.ndarray, np.ndarray, np.ndarray, tuple]:
    """(times, C as (S, n_t) curves, trusted as (S, n_t), layout) of a (n_t,), (n_t, n) or (R, n_t, n) array."""
    t = check_times(times)
    a = np.asarray(C, dtype=float)
    if a.ndim not in (1, 2, 3):
        raise InputError(f"{name} must have 1 to 3 axes ((n_t,), (n_t, n) or (R, n_t, n)), got shape {a.shape}",
                         arg=name)
    n_t = a.shape[1] if a.ndim == 3 else a.shape[0]
    if n_t != t.size:
        raise InputError(f"{name} has {n_t} times on its time axis but times has {t.size}; the time axis "
                         "is the first of a 1-D or 2-D array and the second of an (R, n_t, n) one", arg=name)
    R, n = (a.shape[0], a.shape[2]) if a.ndim == 3 else (1, a.shape[1] if a.ndim == 2 else 1)
    ok = _series_of(np.asarray(trusted_array(trusted, a.shape), dtype=bool))
    return t, _series_of(a), ok, (a.shape, R, n_t, n)


def _back(values: np.ndarray, info: tuple) -> np.ndarray:
    """(S, n_t) series back to the input layout."""
    shape, R, n_t, n = info
    return np.moveaxis(values.reshape(R, n, n_t), 2, 1).reshape(shape)


def _valid(t: np.ndarray, series: np.ndarray, ok: np.ndarray, floor: float, c_max: float | None = None):
    with np.errstate(invalid="ignore"):
        v = ok & np.isfinite(series) & (series > floor) & (t[None, :] > 0)
        if c_max is not None:
            v &= series < c_max
    return v


# ------------------------------------------------------------------------------------------ alpha
def _window_matrix(x: np.ndarray, window: float) -> np.ndarray:
    """W[k, j] = 1 where output time j is in the fit window of output time k (positive times, x = ln t)."""
    n = x.size
    dist = np.abs(x[:, None] - x[None, :])
    w = dist <= window * (1.0 + 1e-12)
    if n:
        near = np.argsort(dist, axis=1, kind="stable")[:, :min(_WINDOW_POINTS, n)]
        w[np.arange(n)[:, None], near] = True
    return w.astype(float)


def _local_slopes(t: np.ndarray, series: np.ndarray, valid: np.ndarray, window: float) -> np.ndarray:
    out = np.full(series.shape, np.nan)
    pos = np.flatnonzero(t > 0)
    if pos.size < 2:
        return out
    x = np.log(t[pos])
    W = _window_matrix(x, window)
    X = (x[None, :] - x[:, None]) * W  # X[k, j] = (x_j - x_k) on the window of k
    v = valid[:, pos].astype(float)
    y = np.where(valid[:, pos], np.log(np.where(valid[:, pos], series[:, pos], 1.0)), 0.0)
    s0, s1, s2 = v @ W.T, v @ X.T, v @ (X * X).T
    sy, sxy = (v * y) @ W.T, (v * y) @ X.T
    den = s0 * s2 - s1 * s1
    good = valid[:, pos] & (s0 >= 2) & (den > 1e-12 * np.maximum(s0 * s2, 1e-300))
    with np.errstate(invalid="ignore", divide="ignore"):
        slope = (s0 * sxy - s1 * sy) / den
    out[:, pos] = np.where(good, slope, np.nan)
    return out


def local_exponent(times, C, *, window: float = DEFAULT_WINDOW, floor: float = DEFAULT_FLOOR, trusted=None
                   ) -> np.ndarray:
    """Local growth exponent alpha = d ln C / d ln t at every output time, as a windowed least-squares slope.

    Parameters
    ----------
    times : array_like (n_t,)
        Output times (units 1/J), strictly increasing, >= 0; any spacing.
    C : array_like (n_t,), (n_t, n) or (R, n_t, n)
        C(r, t) (or any positive curve); the time axis is the first of a 1-D or 2-D array, the second of a
        3-D one.
    window : float
        Half-width of the fit window in ln t (default 0.25); at least 3 output times nearest in ln t are used.
    floor : float
        Values of C at or below ``floor`` (default 1e-14) are not used.
    trusted : boolean array broadcastable to C's shape, optional
        Untrusted points are not used.

    Returns
    -------
    ndarray, the shape of C
        alpha (dimensionless); NaN at t = 0, where C is not valid, or where fewer than 2 valid points are in the
        window (see the module docstring for the method).

    Examples
    --------
    >>> import numpy as np
    >>> t = np.geomspace(0.1, 10.0, 21)
    >>> np.allclose(local_exponent(t, 3.0 * t ** 2.5), 2.5)
    True
    """
    window = _positive("window", window)
    floor = _positive("floor", floor, allow_zero=True)
    t, series, ok, info = _as_series(times, C, trusted)
    return _back(_local_slopes(t, series, _valid(t, series, ok, floor), window), info)


def _range_sums(x: np.ndarray, y: np.ndarray, v: np.ndarray):
    """Prefix sums (S, n_t + 1) of the least-squares moments of valid points."""
    z = np.zeros((v.shape[0], 1))
    vf = v.astype(float)
    yv = np.where(v, y, 0.0)
    return [np.concatenate([z, np.cumsum(a, axis=1)], axis=1)
            for a in (vf, vf * x[None, :], vf * x[None, :] ** 2, yv, yv * x[None, :], yv * yv)]


def _fit_ranges(sums, rows: np.ndarray, lo: np.ndarray, hi: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Least-squares slope, its standard error and the point count of valid points lo..hi (inclusive)."""
    n, sx, sxx, sy, sxy, syy = (s[rows, hi + 1] - s[rows, lo] for s in sums)
    with np.errstate(invalid="ignore", divide="ignore"):
        dxx = sxx - sx * sx / n
        slope = (sxy - sx * sy / n) / dxx
        dyy = syy - sy * sy / n
        rss = np.maximum(dyy - slope * (sxy - sx * sy / n), 0.0)
        se = np.where(n > 2, np.sqrt(rss / (n - 2) / dxx), np.nan)
        bad = (n < 2) | ~(dxx > 1e-12 * np.maximum(sxx, 1e-300))
    return np.where(bad, np.nan, slope), np.where(bad, np.nan, se), n.astype(int)


def power_law_slope(times, C, t_low: float, t_high: float, *, floor: float = DEFAULT_FLOOR, trusted=None
                    ) -> np.ndarray:
    """Least-squares slope of ln C against ln t over the valid output times in [t_low, t_high].

    ``C`` and ``trusted`` as in :func:`local_exponent`; returns an array of C's shape without its time axis
    (NaN where fewer than 2 valid points lie in the interval).
    """
    t, series, ok, (shape, R, n_t, n) = _as_series(times, C, trusted)
    lo_t, hi_t = _positive("t_low", t_low), _positive("t_high", t_high)
    if not hi_t > lo_t:
        raise InputError(f"t_high must exceed t_low, got [{t_low!r}, {t_high!r}]", arg="t_high")
    v = _valid(t, series, ok, _positive("floor", floor, allow_zero=True)) & (t >= lo_t)[None] & (t <= hi_t)[None]
    x = np.log(np.where(t > 0, t, 1.0))
    y = np.log(np.where(v, series, 1.0))
    rows = np.arange(series.shape[0])
    slope, _, _ = _fit_ranges(_range_sums(x, y, v), rows, np.zeros_like(rows), np.full_like(rows, n_t - 1))
    return slope.reshape({1: (), 2: (n,), 3: (R, n)}[len(shape)])


# ------------------------------------------------------------------------------------------ stages
@dataclass
class StageMap(Record):
    """The stages of many curves alpha(t), as flat arrays with one entry per stage.

    Stages of one curve are numbered in time order (``index`` 0 is the early stage). Curves are (realization,
    column) pairs of an (R, n_t, n) input; a 1-D or 2-D input is one realization.

    Attributes
    ----------
    times : ndarray (n_t,)
    realization, column, index : ndarray of int (n_stages,)
        Which curve, and the stage's place among that curve's stages.
    i_start, i_end : ndarray of int (n_stages,)
        First and last output-time index of the stage (inclusive).
    t_start, t_end : ndarray (n_stages,)
        Their times (units 1/J).
    exponent, exponent_se : ndarray (n_stages,)
        Least-squares slope of ln C against ln t over the stage's points, and its standard error.
    mean_alpha : ndarray (n_stages,)
        Mean of the smoothed alpha over the stage.
    is_early : ndarray of bool (n_stages,)
        Whether the stage is its curve's early stage (see the module docstring).
    n_points : ndarray of int (n_stages,)
    n_stages : ndarray of int (R, n)
        Stages per curve.
    settings : dict
        ``window``, ``floor``, ``tol``, ``min_span``, ``min_points``, ``c_max``.
    """

    times: np.ndarray
    realization: np.ndarray
    column: np.ndarray
    index: np.ndarray
    i_start: np.ndarray
    i_end: np.ndarray
    t_start: np.ndarray
    t_end: np.ndarray
    exponent: np.ndarray
    exponent_se: np.ndarray
    mean_alpha: np.ndarray
    is_early: np.ndarray
    n_points: np.ndarray
    n_stages: np.ndarray
    settings: dict

    def _per_curve(self, select: np.ndarray, values: np.ndarray) -> np.ndarray:
        out = np.full(self.n_stages.shape, np.nan)
        out[self.realization[select], self.column[select]] = values[select]
        return out

    def early(self, key: str = "exponent") -> np.ndarray:
        """``key`` (a per-stage attribute) of each curve's early stage, (R, n); NaN where a curve has none."""
        return self._per_curve(self.is_early, np.asarray(getattr(self, key), dtype=float))

    def later(self, key: str = "exponent") -> np.ndarray:
        """``key`` of each curve's last stage where it has two or more stages, (R, n); NaN elsewhere."""
        last = self.n_stages[self.realization, self.column] - 1
        return self._per_curve((self.index == last) & (last >= 1), np.asarray(getattr(self, key), dtype=float))

    def of(self, realization: int = 0, column: int = 0) -> list[dict[str, Any]]:
        """The stages of one curve as a list of dicts (``t_start``, ``t_end``, ``exponent``, ...), in time order."""
        sel = np.flatnonzero((self.realization == realization) & (self.column == column))
        keys = ("t_start", "t_end", "exponent", "exponent_se", "mean_alpha", "n_points", "is_early")
        return [{k: getattr(self, k)[j].item() for k in keys} for j in sel[np.argsort(self.index[sel])]]


def _check_stage_options(tol, min_span, min_points, c_max) -> tuple[float, float, int, float | None]:
    tol = _positive("tol", tol)
    min_span = _positive("min_span", min_span, allow_zero=True)
    min_points = check_count("min_points", min_points, 2)
    if c_max is not None:
        c_max = _positive("c_max", c_max)
    return tol, min_span, min_points, c_max


def find_stages(times, C, *, alpha=None, window: float = DEFAULT_WINDOW, floor: float = DEFAULT_FLOOR,
                tol: float = DEFAULT_TOL, min_span: float = DEFAULT_MIN_SPAN, min_points: int = DEFAULT_MIN_POINTS,
                c_max: float | None = DEFAULT_C_MAX, trusted=None) -> StageMap:
    """Stages of every curve C(t): time windows where alpha = d ln C / d ln t stays near a plateau.

    Parameters
    ----------
    times : array_like (n_t,)
        Output times (units 1/J), any spacing.
    C : array_like (n_t,), (n_t, n) or (R, n_t, n)
        The curves (time axis as in :func:`local_exponent`).
    alpha : array_like, optional
        Precomputed :func:`local_exponent` of C with the same ``window``, ``floor`` and ``trusted``.
    window, floor, trusted
        As in :func:`local_exponent`.
    tol : float
        A point stays in the current stage while |alpha - m| <= tol * max(1, |m|), m the stage's running mean
        of alpha (default 0.15).
    min_span : float
        Shortest stage in ln t (default 0.5, a factor ~1.65 in t).
    min_points : int
        Fewest output times in a stage (default 3).
    c_max : float or None
        Points with C >= c_max are left out of stages (default 0.5); None keeps them.

    Returns
    -------
    StageMap

    Examples
    --------
    >>> import numpy as np
    >>> t = np.geomspace(0.01, 100.0, 81)
    >>> C = np.where(t < 1.0, 1e-3 * t ** 4, 1e-3 * t ** 1.5)   # continuous at t = 1
    >>> st = find_stages(t, C)
    >>> [round(float(e), 2) for e in st.exponent]
    [4.0, 1.5]
    """
    window = _positive("window", window)
    floor = _positive("floor", floor, allow_zero=True)
    tol, min_span, min_points, c_max = _check_stage_options(tol, min_span, min_points, c_max)
    t, series, ok, (shape, R, n_t, n) = _as_series(times, C, trusted)
    valid = _valid(t, series, ok, floor)
    if alpha is None:
        A = _local_slopes(t, series, valid, window)
    else:
        a = np.asarray(alpha, dtype=float)
        if a.shape != tuple(shape):
            raise InputError(f"alpha must have the shape of C {tuple(shape)}, got {a.shape}", arg="alpha")
        A = _series_of(a)
    use = valid & np.isfinite(A) & _valid(t, series, ok, floor, c_max)
    A = np.where(use, A, np.nan)
    x = np.log(np.where(t > 0, t, 1.0))
    S = series.shape[0]
    start = np.zeros(S, dtype=int)
    cnt = np.zeros(S, dtype=int)
    tot = np.zeros(S)
    rows, lo, hi = [], [], []

    def close(sel: np.ndarray, end: int) -> None:
        idx = np.flatnonzero(sel)
        if idx.size:
            rows.append(idx)
            lo.append(start[idx].copy())
            hi.append(np.full(idx.size, end))

    for k in range(n_t):
        a = A[:, k]
        ok_k = np.isfinite(a)
        with np.errstate(invalid="ignore", divide="ignore"):
            m = tot / np.maximum(cnt, 1)
            inside = ok_k & (cnt > 0) & (np.abs(a - m) <= tol * np.maximum(1.0, np.abs(m)))
        ended = (cnt > 0) & ~inside
        close(ended, k - 1)
        cnt[ended], tot[ended] = 0, 0.0
        new = ok_k & ~inside
        start[new], cnt[new], tot[new] = k, 1, a[new]
        cnt[inside] += 1
        tot[inside] += a[inside]
    close(cnt > 0, n_t - 1)
    rows_a = np.concatenate(rows) if rows else np.zeros(0, dtype=int)
    lo_a = np.concatenate(lo) if lo else np.zeros(0, dtype=int)
    hi_a = np.concatenate(hi) if hi else np.zeros(0, dtype=int)
    n_pts = hi_a - lo_a + 1
    keep = (n_pts >= min_points) & (x[hi_a] - x[lo_a] >= min_span * (1.0 - 1e-12))
    rows_a, lo_a, hi_a = rows_a[keep], lo_a[keep], hi_a[keep]
    order = np.lexsort((lo_a, rows_a))
    rows_a, lo_a, hi_a = rows_a[order], lo_a[order], hi_a[order]
    y = np.log(np.where(use, series, 1.0))
    slope, se, npts = _fit_ranges(_range_sums(x, y, use), rows_a, lo_a, hi_a)
    csum = np.concatenate([np.zeros((S, 1)), np.cumsum(np.nan_to_num(A), axis=1)], axis=1)
    mean_alpha = (csum[rows_a, hi_a + 1] - csum[rows_a, lo_a]) / np.maximum(npts, 1)
    first = np.ones(rows_a.size, dtype=bool)
    first[1:] = rows_a[1:] != rows_a[:-1]
    index = np.arange(rows_a.size) - np.maximum.accumulate(np.where(first, np.arange(rows_a.size), 0))
    n_st = np.bincount(rows_a, minlength=S).reshape(R, n)
    defined = np.isfinite(A)
    first_def = np.argmax(defined, axis=1)  # the curve's first defined alpha (a curve with a stage has one)
    gaps = np.concatenate([np.zeros((S, 1), dtype=int), np.cumsum(~defined, axis=1)], axis=1)
    is_early = ((index == 0) & (gaps[rows_a, lo_a] == gaps[rows_a, first_def[rows_a]])
                & (lo_a - first_def[rows_a] < min_points))
    return StageMap(times=t, realization=rows_a // n, column=rows_a % n, index=index, i_start=lo_a, i_end=hi_a,
                    t_start=t[lo_a], t_end=t[hi_a], exponent=slope, exponent_se=se, mean_alpha=mean_alpha,
                    is_early=is_early, n_points=npts, n_stages=n_st,
                    settings={"window": window, "floor": floor, "tol": tol, "min_span": min_span,
                              "min_points": min_points, "c_max": c_max})


# ------------------------------------------------------------------------------------------ ensembles
@dataclass
class Growth(Record):
    """Growth exponents and stages of a loaded ensemble at the distances on one side of W (:func:`ensemble_growth`).

    Attributes
    ----------
    times : ndarray (n_t,)
    d, sites : ndarray of int (n_d,)
        Distances d = |r - i| and their sites r, on ``side`` of W's site ``site``.
    site, side, probe
    alpha : ndarray (R, n_t, n_d)
        alpha of every realization (:func:`local_exponent`).
    median, q25, q75 : ndarray (n_t, n_d)
        Median and quartiles of alpha over the realizations where it is defined; NaN where fewer than
        ``min_valid`` of them (a fraction) are.
    n_valid : ndarray of int (n_t, n_d)
    stages : StageMap
        Stages of every realization (``column`` indexes ``d``).
    median_stages : StageMap
        Stages of the ensemble-median curve of C (one realization).
    C : ndarray (R, n_t, n_d)
        C at the distances ``d``.
    trusted : ndarray of bool (R, n_t, n_d) or None
        The trust mask applied (None: every point used).
    R : int
    min_valid : float
    trusted_source : str
        'given' when a trust mask was applied, else 'none'.
    """

    times: np.ndarray
    d: np.ndarray
    sites: np.ndarray
    site: int
    side: str
    probe: str
    alpha: np.ndarray
    median: np.ndarray
    q25: np.ndarray
    q75: np.ndarray
    n_valid: np.ndarray
    stages: StageMap
    median_stages: StageMap
    C: np.ndarray
    trusted: np.ndarray | None
    R: int
    min_valid: float
    trusted_source: str


def _alpha_quantiles(alpha: np.ndarray, min_valid: float) -> tuple[np.ndarray, ...]:
    """Median, 25 % and 75 % quantiles of alpha over realizations (axis 0), and the count of defined values."""
    R = alpha.shape[0]
    n_valid = np.sum(np.isfinite(alpha), axis=0)
    enough = n_valid >= max(1, int(np.ceil(min_valid * R)))
    q = np.full((3,) + alpha.shape[1:], np.nan)
    if enough.any():
        q[:, enough] = np.nanquantile(alpha[:, enough], [0.25, 0.5, 0.75], axis=0)
    return q[1], q[0], q[2], n_valid


def ensemble_growth(ens, probe: str = "Z", *, side: str = "auto", trusted=None, window: float = DEFAULT_WINDOW,
                    floor: float = DEFAULT_FLOOR, tol: float = DEFAULT_TOL, min_span: float = DEFAULT_MIN_SPAN,
                    min_points: int = DEFAULT_MIN_POINTS, c_max: float | None = DEFAULT_C_MAX,
                    min_valid: float = 0.5) -> Growth:
    """Local growth exponents and stages of every realization of a loaded ensemble, for one probe.

    Parameters
    ----------
    ens : loaded ensemble (see :func:`mpo_fronts.load`)
    probe : {'X', 'Y', 'Z'}
        Probe V of C(r, t).
    side : {'auto', 'right', 'left'}
        Side of W whose distances are used (see :func:`mpo_fronts.analysis.one_side`).
    trusted : boolean array broadcastable to (R, n_t, L), optional
        Trust mask (for example from :func:`mpo_fronts.trust.trust_mask`); untrusted points are not used.
    window, floor, tol, min_span, min_points, c_max
        See :func:`find_stages`.
    min_valid : float in (0, 1]
        Fraction of realizations at which alpha must be defined for its median and quartiles (default 0.5).

    Returns
    -------
    Growth

    Examples
    --------
    >>> import mpo_fronts as mf                                          # doctest: +SKIP
    >>> g = ensemble_growth(mf.load("runs/demo"), probe="Z")               # doctest: +SKIP
    >>> g.stages.early()[:, 1]    # early exponent of every realization at d = 1  # doctest: +SKIP
    """
    C_all = probe_otoc(ens, probe)
    R, n_t, L = C_all.shape
    cols, d, side = one_side(L, int(ens.site), side)
    if isinstance(min_valid, bool) or not isinstance(min_valid, Real) or not 0 < min_valid <= 1:
        raise InputError(f"min_valid must be a fraction in (0, 1], got {min_valid!r}", arg="min_valid")
    C = C_all[:, :, cols]
    m = None
    if trusted is not None:
        m = np.array(trusted_array(trusted, C_all.shape)[:, :, cols])
    times = np.asarray(ens.times, dtype=float)
    alpha = local_exponent(times, C, window=window, floor=floor, trusted=m)
    stages = find_stages(times, C, alpha=alpha, window=window, floor=floor, tol=tol, min_span=min_span,
                         min_points=min_points, c_max=c_max, trusted=m)
    med_C = np.median(C, axis=0)
    med_trust = None if m is None else np.all(m, axis=0)
    median_stages = find_stages(times, med_C, window=window, floor=floor, tol=tol, min_span=min_span,
                                min_points=min_points, c_max=c_max, trusted=med_trust)
    med, q25, q75, n_valid = _alpha_quantiles(alpha, float(min_valid))
    return Growth(times=times, d=d, sites=cols, site=int(ens.site), side=side, probe=probe.upper(), alpha=alpha,
                  median=med, q25=q25, q75=q75, n_valid=n_valid, stages=stages, median_stages=median_stages, C=C,
                  trusted=m, R=R, min_valid=float(min_valid), trusted_source="none" if m is None else "given")


def _median_interval(values: np.ndarray, se: np.ndarray, npts: np.ndarray, n_boot: int, ci: float,
                     rng: np.random.Generator) -> tuple[float, float, str]:
    """Interval of the median of ``values``: percentile bootstrap (>= 2 values) or Student t of one fit."""
    n = values.size
    if n == 0:
        return _NAN, _NAN, "none (no realization has a stage at this distance)"
    if n == 1:
        from scipy import stats

        dof = int(npts[0]) - 2
        if dof < 1 or not np.isfinite(se[0]):
            return _NAN, _NAN, "none (one realization; its stage fit has no residual degrees of freedom)"
        half = float(stats.t.ppf(0.5 + ci / 2.0, dof) * se[0])
        return (float(values[0]) - half, float(values[0]) + half,
                "least-squares (Student t) interval of the one realization's stage slope: how well a power law "
                "fits, not disorder spread")
    idx = rng.integers(0, n, size=(n_boot, n))
    meds = np.median(values[idx], axis=1)
    a = (1.0 - ci) / 2.0
    lo, hi = np.quantile(meds, [a, 1.0 - a])
    return float(lo), float(hi), f"percentile bootstrap over realizations ({n_boot} resamples) of the median"


def _quartiles(v: np.ndarray) -> dict[str, Any]:
    v = v[np.isfinite(v)]
    if v.size == 0:
        return {"median": None, "q25": None, "q75": None, "n": 0}
    q = np.quantile(v, [0.25, 0.5, 0.75])
    return {"median": float(q[1]), "q25": float(q[0]), "q75": float(q[2]), "n": int(v.size)}


def growth_summary(g: Growth, *, d_min: int = 1, n_boot: int = 500, ci: float = 0.95, seed: int = 0
                   ) -> dict[str, Any]:
    """The growth stages of :func:`ensemble_growth` as JSON-able numbers, per distance d >= ``d_min``.

    Returns
    -------
    dict
        ``probe``, ``site``, ``side``, ``method`` (words), ``settings``, ``ci_level``, ``n_realizations``,
        ``distances``: one dict per distance with ``d``, ``r``, ``lowest_order`` (2d: the exponent of the
        lowest order of the series where W(t) reaches distance d at order t^d, as in XXZ chains; other chains or
        operators can start at a higher order), ``early_exponent`` (median over realizations of the
        exponent of each realization's early stage), ``early_exponent_ci`` ([low, high]), ``early_ci_method``,
        ``early_t_range`` (median start and end of the early stage, 1/J), ``n_early`` (realizations with an
        early stage), ``later_exponent`` ({``median``, ``q25``, ``q75``, ``n``} of each realization's last stage
        where it has two or more), ``stages`` (the stages of the ensemble-median curve of C: ``t_start``,
        ``t_end``, ``exponent``, ``exponent_se``, ``n_points`` and ``realizations`` (median, quartiles and count
        of the per-realization slopes over the same window)). Missing numbers are NaN.
    """
    d_min = check_count("d_min", d_min, 0)
    n_boot = check_count("n_boot", n_boot, 1)
    ci = check_ci(ci)
    rng = np.random.default_rng(seed)
    st = g.stages
    early = st.early()
    early_se = st.early("exponent_se")
    early_n = st.early("n_points")
    t0, t1 = st.early("t_start"), st.early("t_end")
    later = st.later()
    ms = g.median_stages
    rows = []
    for j, dd in enumerate(g.d):
        if dd < d_min:
            continue
        e = early[:, j]
        ok = np.isfinite(e)
        lo, hi, how = _median_interval(e[ok], early_se[ok, j], early_n[ok, j], n_boot, ci, rng)
        stage_list = []
        for s in ms.of(0, j):
            slopes = power_law_slope(g.times, g.C[:, :, j:j + 1], s["t_start"], s["t_end"],
                                     floor=ms.settings["floor"],
                                     trusted=None if g.trusted is None else g.trusted[:, :, j:j + 1])[:, 0]
            stage_list.append({**{k: s[k] for k in ("t_start", "t_end", "exponent", "exponent_se", "n_points")},
                               "realizations": _quartiles(slopes)})
        rows.append({
            "d": int(dd), "r": int(g.sites[j]), "lowest_order": int(2 * dd),
            "early_exponent": float(np.median(e[ok])) if ok.any() else _NAN,
            "early_exponent_ci": [lo, hi], "early_ci_method": how,
            "early_t_range": [float(np.median(t0[ok, j])) if ok.any() else _NAN,
                              float(np.median(t1[ok, j])) if ok.any() else _NAN],
            "n_early": int(ok.sum()),
            "later_exponent": _quartiles(later[:, j]),
            "stages": stage_list,
        })
    s = st.settings
    method = (f"alpha = d ln C / d ln t as the least-squares slope of ln C vs ln t over |ln t' - ln t| <= "
              f"{s['window']:g} (at least {_WINDOW_POINTS} output times), C > {s['floor']:g}; a stage is a run of "
              f"at least {s['min_points']} output times spanning >= {s['min_span']:g} in ln t with alpha within "
              f"{s['tol']:g} * max(1, |mean|) of its running mean"
              + (f", C < {s['c_max']:g}" if s["c_max"] is not None else "")
              + "; a stage's exponent is the least-squares slope of ln C vs ln t over it")
    return {"probe": g.probe, "site": g.site, "side": g.side, "n_realizations": g.R, "ci_level": ci,
            "trust": g.trusted_source, "method": method, "settings": dict(s), "distances": rows}
