"""Which numbers of an OTOC ensemble are believed, and how wrong the crossing times t*(d) may be.

Two questions are kept apart.

Points (t, r) -- the trust mask
    :func:`trust_mask` marks points whose value of C is believed: with a bond-dimension convergence study
    (:func:`bond_convergence`), where C changed by less than ``tol + rel_tol * C`` between the two largest chi
    in every realization; without one, where the discarded weight that can have reached the site
    (:func:`local_discarded`: weight lost at bonds within ``speed * (t - t')`` of it, from the per-bond ledger
    ``bond_discarded``) is at most ``max_discarded`` and the bond next to the site is not saturated (operator
    entanglement ``bond_entropy`` below ``entropy_fraction * ln chi``). Files without the per-bond arrays fall
    back to the whole-chain discarded weight of each realization. In every case nothing is trusted after a
    realization lost more than ``max_lost`` (10 %) of W's weight. The mask hatches the heat map and selects
    the times of the front fit.
Crossing times -- the error budget
    Every crossed t*(d) of the ensemble curve gets an interval [t_low, t_high] (:func:`crossing_errors`,
    :func:`trusted_light_cone`): t* minus / plus the sum of

    * truncation: how much earlier / later the curve shifted up / down by its estimated error reaches theta.
      With a study the error is the change of the curve between the two largest chi (``curve_dC_<curve>``;
      for older studies the largest change over realizations, ``max_dC``), i.e. the remaining error of the
      largest chi is taken to be at most the last change (an error that shrinks at least twofold per chi
      step). ``tail='geometric'`` instead scales it by q / (1 - q) when the ratio q of the last two changes
      exceeds 1/2 and gives no finite interval when q >= 1; measured on exact references
      (scripts/coverage.py) it called fewer crossings trusted at equal coverage, because convergence in chi
      is often not geometric (chi = 4 and 8 equally wrong, 16 right), so it is not the default. Without a
      study, C is shifted by 2 eps / (1 - eps), eps the local discarded weight: the largest change a
      truncation of weight eps makes to a normalised single-site weight at the moment it happens (a
      first-order estimate, not a bound: errors made earlier can grow);
    * Trotter: from a run at a second time step (:func:`trotter_convergence`), the change of the curve scaled
      to the error of the main run by Richardson's rule for order p; without one, not included (said so);
    * interpolation: the difference between the crossing interpolated linearly in ln t and as a power law
      between the same two output times;

    added in quadrature to the statistical interval over realizations (bootstrap percentiles) inside
    :func:`mpo_fronts.analysis.light_cone`, which also propagates all of them into v_B and xi. A crossing is
    *trusted* (fitted) when it rests on trusted points (the ``max_lost`` rule always; the point mask without
    a study), its interval is finite, its truncation plus Trotter error is at most ``tstar_tol``
    (default 5 %) of t*, and it does not lie before the first positive output time of a grid that starts at
    t = 0 (there the interval runs from the linear crossing to that time: any power law fits).

:func:`interval_coverage` measures how often those intervals contain exact crossing times (the tests run it
on dense exact evolution at L = 8-10; scripts/coverage.py at L = 10-12). The functions work on arrays;
:func:`ensemble_light_cone` and :func:`ensemble_front` apply them to a loaded ensemble.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from numbers import Integral, Real
from typing import Any, Mapping, Sequence

import numpy as np

from .analysis import (CROSSED, EARLY, UNREACHED, CURVES, FrontShape, LightCone, Record, check_curve, check_otoc,
                       check_threshold, check_times, crossing_times, ensemble_curve, front_moments, front_shape,
                       evolution_settings, light_cone, one_side, probe_otoc)
from .errors import LARGE_DISCARDED_WEIGHT, InputError

__all__ = ["DEFAULT_MAX_DISCARDED", "DEFAULT_TSTAR_TOL", "DEFAULT_ENTROPY_FRACTION", "DEFAULT_ERROR_SPEED",
           "LARGE_DISCARDED_WEIGHT",
           "check_tolerances", "bond_convergence", "trotter_convergence", "trust_from_discarded", "local_discarded",
           "trust_from_bonds", "trust_mask", "CrossingErrors", "crossing_errors", "truncation_change",
           "trusted_light_cone", "discarded_weight_warnings", "ensemble_light_cone", "ensemble_front",
           "Coverage", "interval_coverage", "COVERAGE_THRESHOLDS"]

#: Fallback trust criterion: largest discarded weight of a trusted point.
DEFAULT_MAX_DISCARDED = 1e-3
#: Largest truncation plus Trotter error of a fitted crossing time, relative to t*.
DEFAULT_TSTAR_TOL = 0.05
#: A bond whose operator entanglement exceeds this fraction of ln chi counts as saturated (fallback only).
DEFAULT_ENTROPY_FRACTION = 0.95
#: Upper estimate of the speed of truncation errors for the local fallback (sites per unit time 1/J).
DEFAULT_ERROR_SPEED = 4.0
#: The thresholds theta of the coverage study.
COVERAGE_THRESHOLDS = (1e-3, 1e-2, 0.1, 0.5)
_NOISE = 1e-12  # changes of C below this are floating-point noise, not a convergence signal


def _check_fraction(name: str, value, low_open: bool = True, high: float = 1.0) -> float:
    ok = isinstance(value, Real) and not isinstance(value, bool) and (
        (0 < float(value) if low_open else 0 <= float(value)) and float(value) <= high)
    if not ok:
        raise InputError(f"{name} must be a number in {'(' if low_open else '['}0, {high:g}], got {value!r}",
                         arg=name)
    return float(value)


# ------------------------------------------------------------------------------------------ convergence studies
def check_tolerances(tol, rel_tol=0.0) -> tuple[float, float]:
    """The tolerances of :func:`bond_convergence`: ``tol`` > 0 (absolute, C in [0, 2]) and 0 <= ``rel_tol`` <= 1."""
    if isinstance(tol, bool) or not isinstance(tol, Real) or not 0 < float(tol) <= 2:
        raise InputError(f"tol must be a number in (0, 2] (the absolute part; C lies in [0, 2]), got {tol!r}",
                         arg="tol")
    return float(tol), _check_fraction("rel_tol", rel_tol, low_open=False)


def bond_convergence(otoc_by_chi: Mapping[int, Any], tol: float = 1e-3, *, rel_tol: float = 0.0) -> dict[str, Any]:
    """Changes of C between successive bond dimensions, and the trust mask they imply.

    Parameters
    ----------
    otoc_by_chi : mapping int -> array_like (R, n_t, L)
        C(r, t) of the same realizations and times evolved at each bond dimension chi (at least two).
    tol : float
        Absolute part of the tolerance.
    rel_tol : float
        Relative part: a point (t, r) is trusted when |C_chi_max - C_chi_prev| < tol + rel_tol * C_chi_max in
        every realization (rel_tol = 0 is the purely absolute criterion).

    Returns
    -------
    dict
        ``chis`` (sorted list); ``max_dC`` (n_chi - 1, n_t, L): max over realizations of
        |C_{chi_{k+1}} - C_{chi_k}|; ``curve_dC_mean``, ``curve_dC_median``, ``curve_dC_typical`` (same shape):
        the change of each ensemble curve (what the crossing-time errors use); ``trusted`` (n_t, L) bool;
        ``tol``, ``rel_tol``.
    """
    if not isinstance(otoc_by_chi, Mapping) or len(otoc_by_chi) < 2:
        raise InputError("otoc_by_chi must map at least two bond dimensions chi to arrays (R, n_t, L); "
                         "run the same realizations at two or more chi", arg="otoc_by_chi")
    for chi in otoc_by_chi:
        if isinstance(chi, bool) or not isinstance(chi, Integral) or chi < 1:
            raise InputError(f"otoc_by_chi keys must be positive integer bond dimensions, got {chi!r}",
                             arg="otoc_by_chi")
    tol, rel_tol = check_tolerances(tol, rel_tol)
    chis = sorted(int(c) for c in otoc_by_chi)
    arrs = [check_otoc(otoc_by_chi[c], name=f"otoc_by_chi[{c}]") for c in chis]
    shape = arrs[0].shape
    for c, arr in zip(chis, arrs):
        if arr.shape != shape:
            raise InputError(f"otoc_by_chi[{c}] has shape {arr.shape}, but otoc_by_chi[{chis[0]}] has {shape}; "
                             f"every chi must cover the same realizations, times and sites", arg="otoc_by_chi")
    diffs = np.stack([np.abs(arrs[k + 1] - arrs[k]).max(axis=0) for k in range(len(arrs) - 1)])
    diffs = np.where(np.isfinite(diffs), diffs, np.inf)
    if rel_tol == 0.0:
        trusted = diffs[-1] < float(tol)
    else:
        with np.errstate(invalid="ignore"):
            trusted = (np.abs(arrs[-1] - arrs[-2]) < float(tol) + rel_tol * np.abs(arrs[-1])).all(axis=0)
    out: dict[str, Any] = {"chis": chis, "max_dC": diffs, "trusted": trusted, "tol": float(tol),
                           "rel_tol": rel_tol}
    for curve in CURVES:
        cv = [ensemble_curve(a, curve) for a in arrs]
        dc = np.stack([np.abs(cv[k + 1] - cv[k]) for k in range(len(cv) - 1)])
        out[f"curve_dC_{curve}"] = np.where(np.isfinite(dc), dc, np.inf)
    return out


def trotter_convergence(C, C_other, dt: float, dt_other: float, order: int) -> dict[str, Any]:
    """Estimated Trotter error of a run from the same run at a second time step (Richardson's rule).

    For a Trotter formula of order p the error of C at fixed t behaves as a dt^p for small dt, so the error of
    the run at ``dt`` is |C(dt) - C(dt_other)| dt^p / |dt^p - dt_other^p| (common practice; it assumes both
    steps are in the asymptotic regime).

    Parameters
    ----------
    C, C_other : array_like (R, n_t, L)
        The same realizations, times and bond dimension at time steps ``dt`` (the run being analysed) and
        ``dt_other``.
    dt, dt_other : float
        The two steps (units 1/J), different.
    order : int
        Trotter order p (``engine.order``).

    Returns
    -------
    dict
        ``dt``, ``dt_other``, ``order``, ``factor`` (dt^p / |dt^p - dt_other^p|), ``max_dC`` (n_t, L): the
        largest estimated error over realizations, ``curve_dC_<curve>`` (n_t, L) for each ensemble curve.
    """
    a = check_otoc(C, name="C")
    b = check_otoc(C_other, name="C_other")
    if a.shape != b.shape:
        raise InputError(f"C_other has shape {b.shape} but C has {a.shape}; run the same realizations, times "
                         "and sites at the second time step", arg="C_other")
    for name, v in (("dt", dt), ("dt_other", dt_other)):
        if isinstance(v, bool) or not isinstance(v, Real) or not float(v) > 0:
            raise InputError(f"{name} must be a positive time step, got {v!r}", arg=name)
    if isinstance(order, bool) or not isinstance(order, Integral) or order < 1:
        raise InputError(f"order must be a positive integer (the Trotter order), got {order!r}", arg="order")
    p = int(order)
    den = abs(float(dt) ** p - float(dt_other) ** p)
    if den == 0:
        raise InputError("dt_other must differ from dt", arg="dt_other")
    factor = float(dt) ** p / den
    out: dict[str, Any] = {"dt": float(dt), "dt_other": float(dt_other), "order": p, "factor": factor,
                           "max_dC": factor * np.abs(a - b).max(axis=0)}
    for curve in CURVES:
        out[f"curve_dC_{curve}"] = factor * np.abs(ensemble_curve(a, curve) - ensemble_curve(b, curve))
    return out


# ------------------------------------------------------------------------------------------ point masks
def trust_from_discarded(discarded_weight, L: int, max_discarded: float = DEFAULT_MAX_DISCARDED) -> np.ndarray:
    """Fallback trust mask (R, n_t, L): cumulative discarded weight of the realization <= ``max_discarded``."""
    dw = np.asarray(discarded_weight, dtype=float)
    if dw.ndim != 2:
        raise InputError(f"discarded_weight must have shape (R, n_t), got {dw.shape}", arg="discarded_weight")
    _check_max_discarded(max_discarded)
    ok = np.nan_to_num(dw, nan=np.inf) <= float(max_discarded)
    return np.broadcast_to(ok[:, :, None], dw.shape + (int(L),))


def _check_max_discarded(max_discarded) -> float:
    if isinstance(max_discarded, bool) or not isinstance(max_discarded, Real) or not float(max_discarded) >= 0:
        raise InputError(f"max_discarded must be a number >= 0, got {max_discarded!r}", arg="max_discarded")
    return float(max_discarded)


def local_discarded(bond_discarded, times, speed: float = DEFAULT_ERROR_SPEED) -> np.ndarray:
    """Discarded weight that can have reached each site: (..., n_t, L) from the per-bond ledger (..., n_t, L-1).

    An error made by truncating bond b at time t' spreads at most at a finite speed (Lieb-Robinson bound:
    Lieb & Robinson, Commun. Math. Phys. 28, 251 (1972)), so by time t it can affect site r only if the
    distance from the bond to the site is at most ``speed * (t - t')``. The weight lost at bond b between two
    output times is taken to be lost at the earlier one (conservative). The sum of those weights is the local
    discarded weight of (t, r); summed over every bond it is the whole-chain discarded weight.

    Parameters
    ----------
    bond_discarded : array_like (..., n_t, L-1)
        Cumulative discarded weight per bond (bond b between sites b and b + 1), as recorded by the engine.
    times : array_like (n_t,)
        The output times (units 1/J).
    speed : float
        Upper estimate of the speed at which truncation errors spread (sites per unit time 1/J). The default 4
        is about twice the butterfly velocities of the random-field Heisenberg chain (spin units) and of the
        mixed-field Ising chain (Pauli units) measured in the coverage study; larger is more conservative.
    """
    bd = np.asarray(bond_discarded, dtype=float)
    t = check_times(times)
    if bd.ndim < 2 or bd.shape[-2] != t.size:
        raise InputError(f"bond_discarded must have shape (..., n_t, L-1) with n_t = {t.size}, got {bd.shape}",
                         arg="bond_discarded")
    if isinstance(speed, bool) or not isinstance(speed, Real) or not float(speed) > 0:
        raise InputError(f"speed must be a positive number (sites per unit time), got {speed!r}", arg="speed")
    bd = np.nan_to_num(bd, nan=np.inf)
    n_t, nb = bd.shape[-2], bd.shape[-1]
    inc = np.maximum(np.diff(bd, axis=-2, prepend=0.0), 0.0)  # weight lost in (t_{k-1}, t_k]
    start = np.concatenate([[0.0], t[:-1]])
    pre = np.concatenate([np.zeros(bd.shape[:-1] + (1,)), np.cumsum(inc, axis=-1)], axis=-1)  # sum of bonds < b
    r = np.arange(nb + 1)
    out = np.empty(bd.shape[:-1] + (nb + 1,))
    for k in range(n_t):
        reach = float(speed) * (t[k] - start[:k + 1])  # how far each earlier loss can have travelled
        lo = np.clip(np.floor(r[None, :] - 1 - reach[:, None]).astype(int), 0, nb)  # bonds b >= r - 1 - reach
        hi = np.clip(np.floor(r[None, :] + reach[:, None]).astype(int) + 1, 0, nb)  # and b <= r + reach
        part = pre[..., :k + 1, :]
        out[..., k, :] = (np.take_along_axis(part, np.broadcast_to(hi, part.shape[:-1] + (r.size,)), axis=-1)
                          - np.take_along_axis(part, np.broadcast_to(lo, part.shape[:-1] + (r.size,)), axis=-1)
                          ).sum(axis=-2)
    return out


def trust_from_bonds(bond_discarded, times, site: int, max_discarded: float = DEFAULT_MAX_DISCARDED,
                     bond_entropy=None, chi: int | None = None, entropy_fraction: float = DEFAULT_ENTROPY_FRACTION,
                     speed: float = DEFAULT_ERROR_SPEED) -> np.ndarray:
    """Local fallback trust mask (R, n_t, L) from the per-bond ledger and, optionally, the bond entropies.

    A point is trusted when :func:`local_discarded` (with ``speed``) is at most ``max_discarded`` and, with
    ``bond_entropy`` and
    ``chi``, the operator entanglement entropy at the bond next to the site on W's side (both bonds at W) is
    below ``entropy_fraction * ln chi`` (ln chi is the largest entropy a bond of dimension chi holds: a bond
    near it is saturated and its truncation is active).
    """
    max_discarded = _check_max_discarded(max_discarded)
    loc = local_discarded(bond_discarded, times, speed)
    L = loc.shape[-1]
    if isinstance(site, bool) or not isinstance(site, Integral) or not 0 <= site < L:
        raise InputError(f"site must be an integer in 0..{L - 1}, got {site!r}", arg="site")
    ok = loc <= max_discarded
    if bond_entropy is not None and chi is not None:
        S = np.asarray(bond_entropy, dtype=float)
        if S.shape != np.shape(bond_discarded):
            raise InputError(f"bond_entropy has shape {S.shape} but bond_discarded has {np.shape(bond_discarded)}",
                             arg="bond_entropy")
        entropy_fraction = _check_fraction("entropy_fraction", entropy_fraction)
        cap = entropy_fraction * np.log(max(int(chi), 2))
        L = S.shape[-1] + 1
        r = np.arange(L)
        inner = np.clip(np.where(r > site, r - 1, r), 0, L - 2)  # the bond between r and W's side
        sat = np.nan_to_num(S, nan=np.inf)[..., inner] >= cap
        if 0 < site:
            sat[..., site] |= np.nan_to_num(S[..., site - 1], nan=np.inf) >= cap
        ok &= ~sat
    return ok


def _ensemble_array(ens, name: str):
    """An optional per-realization array of a loaded ensemble, or None (older files, duck-typed ensembles)."""
    try:
        value = getattr(ens, name, None)
    except (KeyError, InputError, OSError):
        return None
    return None if value is None else np.asarray(value, dtype=float)


def _lost_mask(ens, max_lost: float) -> np.ndarray:
    """(R, n_t, 1): True while a realization has lost at most ``max_lost`` of W's weight."""
    dw = np.asarray(ens.discarded_weight, dtype=float)
    return (np.nan_to_num(dw, nan=np.inf) <= max_lost)[:, :, None]


def _conv_for_probe(ens, probe: str | None):
    """The convergence record if it applies to ``probe`` (made for it, or for an unnamed probe), else None."""
    conv = getattr(ens, "convergence", None)
    if conv is None:
        return None
    cprobe = conv.get("probe")
    if cprobe and probe and str(cprobe).upper() != str(probe).upper():
        return None
    return conv


def _conv_criterion(conv: Mapping[str, Any]) -> str:
    chis = [int(c) for c in np.asarray(conv.get("chis", [])).reshape(-1)]
    pair = f"chi = {chis[-2] if len(chis) > 1 else '?'} and {chis[-1] if chis else '?'}"
    tol = float(conv.get("tol", float("nan")))
    rel = conv.get("rel_tol")
    if rel is None:  # a study written before relative tolerances existed
        return f"max |dC| between {pair} below tol = {tol:g}"
    if float(rel) == 0.0:
        return f"max |dC| between {pair} below tol = {tol:g} (absolute)"
    return f"|dC| between {pair} below {tol:g} + {float(rel):g} C in every realization"


def trust_mask(ens, use_trust: bool = True, max_discarded: float = DEFAULT_MAX_DISCARDED, probe: str | None = None,
               *, max_lost: float = LARGE_DISCARDED_WEIGHT, entropy_fraction: float = DEFAULT_ENTROPY_FRACTION
               ) -> tuple[np.ndarray | None, dict[str, Any]]:
    """Trust mask of a loaded ensemble's points (t, r) and a description of the criterion used.

    With a convergence study made for ``probe`` (or for no named probe; ``probe=None`` accepts any), its mask;
    otherwise the local discarded weight (:func:`trust_from_bonds`) when the ensemble carries ``bond_discarded``,
    else the whole-chain discarded weight of each realization (:func:`trust_from_discarded`). In every case a
    point of a realization that has lost more than ``max_lost`` (10 %) of W's weight is untrusted.

    Returns
    -------
    mask : ndarray of bool broadcastable to (R, n_t, L), or None when ``use_trust`` is False
    info : dict
        ``source`` ('convergence', 'bond_discarded', 'discarded_weight' or 'none'), ``criterion`` (words),
        ``trusted_fraction`` (fraction of the (R, n_t, L) points trusted), ``n_untrusted``, and ``note`` when a
        convergence study of another probe was left aside.
    """
    R, n_t, L = len(ens.realizations), len(ens.times), int(ens.L)
    if not use_trust:
        return None, {"source": "none", "criterion": "trust mask not applied (all points used)",
                      "trusted_fraction": 1.0, "n_untrusted": 0}
    max_lost = _check_fraction("max_lost", max_lost)
    conv = _conv_for_probe(ens, probe)
    info: dict[str, Any] = {}
    raw = getattr(ens, "convergence", None)
    if raw is not None and conv is None:
        info["note"] = (f"the convergence study was made with probe {raw.get('probe')}; it is not applied to "
                        f"probe {str(probe).upper()}, which uses the discarded-weight criterion")
    if conv is not None:
        m = np.asarray(conv["trusted"], dtype=bool)
        if m.shape != (n_t, L):
            raise InputError(f"the convergence mask has shape {m.shape} but the ensemble has (n_t, L) = "
                             f"{(n_t, L)}; rerun 'fronts converge' on this run description")
        info.update(source="convergence", criterion=_conv_criterion(conv))
        mask = m[None]
    else:
        bd = _ensemble_array(ens, "bond_discarded")
        if bd is not None and bd.shape == (R, n_t, L - 1):
            chi = evolution_settings(ens).get("chi")
            mask = trust_from_bonds(bd, ens.times, int(ens.site), max_discarded, _ensemble_array(ens, "bond_entropy"),
                                    chi, entropy_fraction)
            info.update(source="bond_discarded",
                        criterion=f"discarded weight that can have reached the site (bonds within "
                                  f"{DEFAULT_ERROR_SPEED:g} sites per 1/J of it since the loss) <= "
                                  f"{float(max_discarded):g}"
                                  + (f", bond entropy below {entropy_fraction:g} ln chi" if chi else "")
                                  + " (no convergence study; local per-bond ledger)")
        else:
            mask = trust_from_discarded(ens.discarded_weight, L, max_discarded)
            info.update(source="discarded_weight",
                        criterion=f"cumulative discarded weight <= {float(max_discarded):g} (no convergence data; "
                                  f"conservative ahead of the front, no guarantee behind it)")
    lost = _lost_mask(ens, max_lost)
    if not lost.all():
        mask = mask & lost
        info["criterion"] += f"; nothing after a realization lost more than {max_lost:g} of the weight"
    full = np.broadcast_to(mask, (R, n_t, L))
    info["trusted_fraction"] = float(full.mean())
    info["n_untrusted"] = int((~full).sum())
    return mask, info


# ------------------------------------------------------------------------------------------ crossing errors
@dataclass(eq=False)
class CrossingErrors(Record):
    """Systematic error budget of the crossing times t*(d) of one ensemble curve (see :func:`crossing_errors`).

    All errors are (2, n_d) arrays (below, above t*) in units of 1/J, NaN where the curve does not cross,
    inf where the error is unknown (the shifted curve never crosses, or the study shows no convergence).

    Attributes
    ----------
    d : ndarray (n_d,)
    tstar : ndarray (n_d,)
        Crossing time of the curve (before any trust selection).
    truncation, trotter, interpolation : ndarray (2, n_d)
    total : ndarray (2, n_d)
        Their sum.
    trusted : ndarray of bool (n_d,)
        Crossed with a finite interval and truncation plus Trotter error at most ``tstar_tol * t*``.
    tstar_tol : float
    truncation_source, trotter_source : str
        Where each estimate came from, in words.
    notes : list of str
    """

    d: np.ndarray
    tstar: np.ndarray
    truncation: np.ndarray
    trotter: np.ndarray
    interpolation: np.ndarray
    total: np.ndarray
    trusted: np.ndarray
    tstar_tol: float
    truncation_source: str
    trotter_source: str
    notes: list = field(default_factory=list)


def _shift_offsets(t: np.ndarray, curve: np.ndarray, theta: float, ts: np.ndarray, delta: np.ndarray) -> np.ndarray:
    """(2, n_d): how much earlier the curve + delta and how much later the curve - delta reach theta."""
    delta = np.where(np.isnan(delta), np.inf, delta)
    if not np.any(delta > 0):
        return np.where(np.isfinite(ts), 0.0, np.nan)[None].repeat(2, axis=0)
    with np.errstate(invalid="ignore"):
        up = crossing_times(t, np.where(np.isinf(delta), 2.0, curve + delta), theta)
        dn = crossing_times(t, np.where(np.isinf(delta), -1.0, curve - delta), theta)
    t_up = np.where(up.status == EARLY, 0.0, np.where(up.status == UNREACHED, ts, up.tstar_any))
    t_dn = np.where(dn.status == UNREACHED, np.inf, dn.tstar_any)
    below = np.maximum(ts - t_up, 0.0)
    above = np.maximum(t_dn - ts, 0.0)
    return np.where(np.isfinite(ts), np.stack([below, above]), np.nan)


def _interpolation_error(t: np.ndarray, curve: np.ndarray, theta: float, ts: np.ndarray) -> np.ndarray:
    """|t* (linear in ln t) - t* (power law between the same output times)|, symmetric, (2, n_d).

    A crossing in a first interval that starts at t = 0 is not resolved by the output times: any growth
    C = C(t1) (t / t1)^p with p >= 1 fits the two points, and its crossing lies anywhere between the linear one
    (p = 1, what :func:`~mpo_fronts.analysis.crossing_times` returns there) and t1, so the error is t1 - t*.
    """
    above = np.nan_to_num(curve, nan=-np.inf) >= theta
    k = np.argmax(above, axis=0)
    km = np.maximum(k - 1, 0)
    cols = np.arange(curve.shape[1])
    c0, c1, t0, t1 = curve[km, cols], curve[k, cols], t[km], t[k]
    with np.errstate(divide="ignore", invalid="ignore"):
        good = (c0 > 0) & (c1 > c0) & (t0 > 0) & (k > 0)
        frac = (np.log(theta) - np.log(c0)) / (np.log(c1) - np.log(c0))
        alt = np.exp(np.log(t0) + np.clip(frac, 0, 1) * (np.log(t1) - np.log(t0)))
    err = np.where(good, np.abs(alt - ts), 0.0)
    from_zero = (k > 0) & (t0 == 0)  # the crossing lies in [0, t1]
    err = np.where(from_zero, np.maximum(t1 - ts, 0.0), err)
    return np.where(np.isfinite(ts), np.stack([err, err]), np.nan)


def truncation_change(convergence: Mapping[str, Any], curve: str, cols, times, curve_values, threshold: float,
                      tail: str = "last") -> tuple[np.ndarray, str]:
    """Estimated truncation error of an ensemble curve, (n_t, n_d), from a convergence study.

    The change of the curve between the two largest chi (``curve_dC_<curve>``; ``max_dC`` for studies written
    before those existed, which bounds the change of the mean and the median), scaled per distance by
    q / (1 - q) when the ratio q of the last two changes (their largest values up to the crossing) exceeds
    1/2, and infinite where q >= 1 (see the module docstring).

    Returns
    -------
    delta : ndarray (n_t, n_d)
    source : str
        The estimate in words.
    """
    curve = check_curve(curve)
    cols = np.asarray(cols, dtype=int)
    key = f"curve_dC_{curve}"
    src_key = key if key in convergence else "max_dC"
    arr = np.asarray(convergence[src_key], dtype=float)
    c = np.asarray(curve_values, dtype=float)
    if arr.ndim != 3 or arr.shape[1] != c.shape[0] or arr.shape[2] <= int(cols.max()):
        raise InputError(f"the convergence study's {src_key} has shape {arr.shape}, which does not match the "
                         f"ensemble's {c.shape[0]} times; rerun 'fronts converge' on this run description",
                         arg="convergence")
    arr = np.where(np.isfinite(arr), arr, np.inf)[:, :, cols]
    chis = [int(x) for x in np.asarray(convergence.get("chis", [])).reshape(-1)]
    pair = f"chi {chis[-2]} -> {chis[-1]}" if len(chis) >= 2 else "the two largest chi"
    how = ("change of the ensemble curve" if src_key == key else
           "largest change over realizations (an older study; approximate for the typical curve)")
    last = arr[-1]
    if tail not in ("last", "geometric"):
        raise InputError(f"tail must be 'last' or 'geometric', got {tail!r}", arg="tail")
    if arr.shape[0] < 2 or tail == "last":
        return last, (f"{how} between {pair}, taken as the remaining error (assumes the error shrinks at least "
                      f"twofold per chi step; tested by the coverage study)")
    theta = check_threshold(threshold)
    prev = arr[-2]
    n_t = last.shape[0]
    above = np.nan_to_num(c, nan=-np.inf) >= theta
    k = np.where(above.any(axis=0), np.argmax(above, axis=0), n_t - 1)
    upto = np.arange(n_t)[:, None] <= k[None, :]
    num = np.where(upto, last, 0.0).max(axis=0)
    den = np.where(upto, prev, 0.0).max(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        q = np.where(num <= _NOISE, 0.0, num / den)
        factor = np.where(q <= 0.5, 1.0, np.where(q < 1.0, q / (1.0 - q), np.inf))
        delta = np.where(np.isinf(factor[None, :]), np.where(last > _NOISE, np.inf, last), last * factor[None, :])
    return delta, (f"{how} between {pair}, scaled by q / (1 - q) where the ratio q of the last two changes "
                   f"exceeds 1/2 (no finite error where q >= 1)")


def crossing_errors(times, curve_values, threshold: float, truncation_dC=None, trotter_dC=None, *,
                    tstar_tol: float = DEFAULT_TSTAR_TOL, truncation_source: str = "",
                    trotter_source: str = "") -> CrossingErrors:
    """Systematic errors of the crossing times of one curve, from error estimates of the curve itself.

    Parameters
    ----------
    times : array_like (n_t,)
    curve_values : array_like (n_t, n_d)
        The ensemble curve over distances d = 0, 1, ... (one side of W).
    threshold : float
    truncation_dC, trotter_dC : array_like (n_t, n_d), optional
        Estimated errors of the curve (>= 0; inf: unknown). The crossing-time error of each is how much
        earlier / later the curve shifted up / down by it reaches theta. None: not included (zero).
    tstar_tol : float
        Largest truncation plus Trotter error of a trusted crossing, relative to t*.
    truncation_source, trotter_source : str
        Recorded in the result.

    Returns
    -------
    CrossingErrors
    """
    t = check_times(times)
    theta = check_threshold(threshold)
    c = np.asarray(curve_values, dtype=float)
    if c.ndim != 2 or c.shape[0] != t.size:
        raise InputError(f"curve_values must have shape (n_t, n_d) with n_t = {t.size}, got {c.shape}",
                         arg="curve_values")
    tstar_tol = _check_fraction("tstar_tol", tstar_tol)
    base = crossing_times(t, c, theta)
    ts = np.where(base.status == CROSSED, base.tstar_any, np.nan)
    parts = {}
    for name, dC in (("truncation", truncation_dC), ("trotter", trotter_dC)):
        if dC is None:
            parts[name] = np.where(np.isfinite(ts), 0.0, np.nan)[None].repeat(2, axis=0)
            continue
        dC = np.asarray(dC, dtype=float)
        if dC.shape != c.shape:
            raise InputError(f"{name}_dC must have the shape of curve_values {c.shape}, got {dC.shape}",
                             arg=f"{name}_dC")
        parts[name] = _shift_offsets(t, c, theta, ts, dC)
    interp = _interpolation_error(t, c, theta, ts)
    total = parts["truncation"] + parts["trotter"] + interp
    model = parts["truncation"] + parts["trotter"]
    # a crossing before the first positive output time of a grid that starts at t = 0 is not resolved
    unresolved = np.isfinite(ts) & (t[0] == 0) & (t.size > 1) & (ts < (t[1] if t.size > 1 else np.inf))
    with np.errstate(invalid="ignore"):
        trusted = (np.isfinite(ts) & np.isfinite(total).all(axis=0) & (model.max(axis=0) <= tstar_tol * ts)
                   & ~unresolved)
    notes = []
    if unresolved.any():
        notes.append(f"{int(unresolved.sum())} crossing(s) before the first positive output time t = {t[1]:g} "
                     "are not resolved by the time grid and not trusted")
    if trotter_dC is None:
        notes.append("Trotter error not included (no run at a second time step)")
    return CrossingErrors(d=np.arange(c.shape[1]), tstar=ts, truncation=parts["truncation"],
                          trotter=parts["trotter"], interpolation=interp, total=total, trusted=trusted,
                          tstar_tol=tstar_tol, truncation_source=truncation_source or
                          ("not included" if truncation_dC is None else "given"),
                          trotter_source=trotter_source or ("not included (no run at a second time step)"
                                                            if trotter_dC is None else "given"),
                          notes=notes)


def trusted_light_cone(times, C, site: int, threshold: float = 0.5, *, convergence: Mapping | None = None,
                       trotter: Mapping | None = None, trusted=None, fallback_dC=None, curve: str = "mean",
                       side: str = "auto", tstar_tol: float = DEFAULT_TSTAR_TOL, tail: str = "last",
                       fallback_source: str = "", **opts) -> LightCone:
    """:func:`mpo_fronts.analysis.light_cone` with the error budget of every crossing time and trust from it.

    Parameters
    ----------
    times, C, site, threshold, curve, side
        As for :func:`mpo_fronts.analysis.light_cone` (C of the run analysed: the largest chi of a study).
    convergence : dict, optional
        :func:`bond_convergence` of the same realizations (its arrays (n_pairs, n_t, L)); gives the
        truncation error.
    trotter : dict, optional
        :func:`trotter_convergence` of the run analysed; gives the Trotter error.
    trusted : bool array broadcastable to (R, n_t, L), optional
        Point mask; a crossing resting on an untrusted point is not fitted.
    fallback_dC : array_like broadcastable to (R, n_t, L), optional
        Without ``convergence``: an estimate of the truncation error of C per realization (for example twice
        :func:`local_discarded`); its largest value over realizations is taken as the error of the curve.
    tstar_tol : float
        See :func:`crossing_errors`.
    tail : {'last', 'geometric'}
        See :func:`truncation_change`.
    fallback_source : str
        How ``fallback_dC`` was made, in words (recorded in ``errors.truncation_source``).
    **opts
        Passed to :func:`mpo_fronts.analysis.light_cone` (r_range, d_min, n_boot, ci, seed, n_band).

    Returns
    -------
    LightCone
        With ``errors`` (:class:`CrossingErrors`), ``tstar_low`` / ``tstar_high`` and fits whose intervals
        include the systematic errors.
    """
    t = check_times(times)
    a = check_otoc(C, t.size)
    curve = check_curve(curve)
    R, n_t, L = a.shape
    cols, d, side_used = one_side(L, site, side)
    centre = ensemble_curve(a[:, :, cols], curve)
    theta = check_threshold(threshold)
    if convergence is not None:
        trunc, tsrc = truncation_change(convergence, curve, cols, t, centre, theta, tail)
    elif fallback_dC is not None:
        f = np.broadcast_to(np.asarray(fallback_dC, dtype=float), a.shape)
        trunc = np.nan_to_num(f[:, :, cols], nan=np.inf).max(axis=0)
        tsrc = fallback_source or "C shifted by the given truncation estimate (largest over realizations)"
    else:
        trunc, tsrc = None, ""
    trot, rsrc = None, ""
    if trotter is not None:
        key = f"curve_dC_{curve}"
        arr = np.asarray(trotter[key] if key in trotter else trotter["max_dC"], dtype=float)
        if arr.shape != (n_t, L):
            raise InputError(f"the Trotter comparison has shape {arr.shape}, the ensemble (n_t, L) = {(n_t, L)}",
                             arg="trotter")
        trot = arr[:, cols]
        rsrc = (f"Richardson estimate from dt = {trotter.get('dt'):g} against dt = {trotter.get('dt_other'):g} "
                f"(order {trotter.get('order')})")
    err = crossing_errors(t, centre, theta, trunc, trot, tstar_tol=tstar_tol, truncation_source=tsrc,
                          trotter_source=rsrc)
    lc = light_cone(t, a, site, theta, trusted=trusted, curve=curve, side=side_used, tstar_sys=err.total,
                    crossing_trusted=err.trusted, **opts)
    lc.errors = err
    return lc


# ------------------------------------------------------------------------------------------ loaded ensembles
def discarded_weight_warnings(discarded_weight, times, threshold: float = LARGE_DISCARDED_WEIGHT) -> list[str]:
    """Warnings for an ensemble whose discarded weight passes ``threshold`` (default 10 %) in any realization."""
    dw = np.asarray(discarded_weight, dtype=float)
    if dw.ndim == 1:
        dw = dw[None]
    t = np.asarray(times, dtype=float).reshape(-1)
    over = np.nan_to_num(dw, nan=np.inf) > threshold
    if not over.any():
        return []
    first = float(t[np.argmax(over.any(axis=0))])
    n = int(over.any(axis=1).sum())
    return [f"discarded weight reaches {float(np.nanmax(dw)):.3g} (above {threshold:g} from t = {first:.3f} on, in "
            f"{n} of {dw.shape[0]} realization(s)): C is normalised by the weight that remains, so values behind "
            "the front are not meaningful there; those times are excluded from every fit. Raise chi and compare "
            "bond dimensions ('fronts converge')"]


def ensemble_light_cone(ens, threshold: float = 0.5, probe: str = "Z", *, use_trust: bool = True,
                        max_discarded: float = DEFAULT_MAX_DISCARDED, tstar_tol: float = DEFAULT_TSTAR_TOL,
                        trotter: Mapping | None = None, max_lost: float = LARGE_DISCARDED_WEIGHT,
                        **opts) -> LightCone:
    """The light cone of a loaded ensemble with the error budget of its crossing times and its trust.

    With a convergence study made for ``probe``, the truncation error comes from it and crossings are trusted by
    their error (:func:`crossing_errors`), not by the point mask; without one, from twice the local
    discarded weight (:func:`local_discarded`, or the whole-chain weight for files without the per-bond
    ledger), and crossings must also rest on trusted points (:func:`trust_mask`). Times after a realization
    lost more than ``max_lost`` of the weight are never fitted. ``use_trust=False`` gives the plain
    :func:`mpo_fronts.analysis.light_cone` of every point. ``.trust`` describes what was used.
    """
    C = probe_otoc(ens, probe)
    probe = probe.upper()
    mask, info = trust_mask(ens, use_trust, max_discarded, probe, max_lost=max_lost)
    if not use_trust:
        out = light_cone(ens.times, C, int(ens.site), threshold, **opts)
        out.trust, out.probe = info, probe
        return out
    conv = _conv_for_probe(ens, probe)
    site = int(ens.site)
    if conv is not None:
        lc = trusted_light_cone(ens.times, C, site, threshold, convergence=conv, trotter=trotter,
                                trusted=_lost_mask(ens, max_lost), tstar_tol=tstar_tol, **opts)
        crit = (f"truncation plus Trotter error of t* at most {tstar_tol:g} t* (from the convergence study), "
                f"nothing after a realization lost more than {max_lost:g} of the weight")
    else:
        bd = _ensemble_array(ens, "bond_discarded")
        R, n_t, L = C.shape
        if bd is not None and bd.shape == (R, n_t, L - 1):
            dw_loc = local_discarded(bd, ens.times)
            which = (f"the discarded weight that can have reached the site (per-bond ledger, errors spreading at "
                     f"{DEFAULT_ERROR_SPEED:g} sites per 1/J)")
        else:
            dw_loc = np.broadcast_to(np.asarray(ens.discarded_weight, dtype=float)[:, :, None], C.shape)
            which = "the whole-chain discarded weight (this file has no per-bond ledger)"
        fallback = 2.0 * dw_loc / np.maximum(1.0 - dw_loc, 1e-300)  # a truncation's effect on C, normalised
        lc = trusted_light_cone(ens.times, C, site, threshold, trotter=trotter, trusted=mask, fallback_dC=fallback,
                                tstar_tol=tstar_tol, fallback_source=f"no convergence study: C shifted by "
                                f"2 eps / (1 - eps), eps {which}, largest over realizations (a first-order "
                                "estimate)", **opts)
        crit = (f"every point up to the crossing trusted ({info['source']}), and its truncation plus Trotter "
                f"error (C shifted by 2 eps / (1 - eps), eps the discarded weight) at most {tstar_tol:g} t*")
    info = dict(info, crossing_criterion=crit, tstar_tol=tstar_tol,
                truncation_error=lc.errors.truncation_source,
                trotter_error=lc.errors.trotter_source)
    lc.trust, lc.probe = info, probe
    return lc


def ensemble_front(ens, *, use_trust: bool = True, max_discarded: float = DEFAULT_MAX_DISCARDED,
                   **opts) -> FrontShape:
    """:func:`mpo_fronts.analysis.front_shape` of a loaded ensemble's right-weight profiles, on trusted times.

    A time is trusted for the front when the trust mask (:func:`trust_mask`) holds in every realization at
    every site from one width behind the mean front position to the right end of the chain.
    """
    rho = np.asarray(ens.right_weight, dtype=float)
    site = int(ens.site)
    if use_trust and "trusted_times" not in opts:
        mask, info = trust_mask(ens, True, max_discarded)
        R, n_t, L = rho.shape
        m = np.broadcast_to(mask, (R, n_t, L)).all(axis=0)
        pos, wid = front_moments(rho.mean(axis=0), np.arange(L) - site)
        start = np.clip(site + np.floor(np.nan_to_num(pos - wid)).astype(int), 0, L - 1)
        opts["trusted_times"] = np.array([m[k, start[k]:].all() for k in range(n_t)])
    return front_shape(ens.times, rho, site, **opts)


# ------------------------------------------------------------------------------------------ coverage
@dataclass(eq=False)
class Coverage(Record):
    """How often the reported crossing-time intervals contain the exact crossing times.

    Attributes
    ----------
    coverage : float
        Fraction of the trusted cases whose [t_low, t_high] contains the exact t* (NaN without trusted cases).
    trusted_share : float
        Fraction of the cases called trusted.
    n_cases, n_trusted, n_covered : int
        Cases are the (d, theta) pairs with d >= d_min whose exact curve crosses theta within the times.
    cases : list of dict
        One per case: ``theta``, ``d``, ``tstar_exact``, ``tstar``, ``t_low``, ``t_high``, ``trusted``,
        ``covered``, ``rel_error`` (|t* - t*_exact| / t*_exact) and ``rel_halfwidth``.
    by_threshold : dict
        theta -> {n_cases, n_trusted, n_covered}.
    """

    coverage: float
    trusted_share: float
    n_cases: int
    n_trusted: int
    n_covered: int
    cases: list
    by_threshold: dict


def interval_coverage(times, C_engine_by_chi: Mapping[int, Any], C_exact, site: int,
                      thresholds: Sequence[float] = COVERAGE_THRESHOLDS, *, trotter: Mapping | None = None,
                      fallback_dC=None, trusted=None, side: str = "auto", d_min: int = 1,
                      tstar_tol: float = DEFAULT_TSTAR_TOL, curve: str = "mean", tail: str = "last") -> Coverage:
    """Coverage of the crossing-time intervals against exact crossing times (the test of the error budget).

    Parameters
    ----------
    times : array_like (n_t,)
    C_engine_by_chi : mapping chi -> array_like (n_t, L) or (R, n_t, L)
        Engine OTOCs of the same realization(s) at several bond dimensions; the largest chi is the run whose
        intervals are tested, and the study of all of them (:func:`bond_convergence`) gives their truncation
        error. With one chi, ``fallback_dC`` must be given.
    C_exact : array_like (n_t, L) or (R, n_t, L)
        Exact OTOCs of the same realization(s) and times (dense evolution, typicality, reference files).
    site : int
        Site of W.
    thresholds : sequence of float
        The thresholds theta tested (default 1e-3, 1e-2, 0.1, 0.5).
    trotter : dict, optional
        :func:`trotter_convergence` of the largest-chi run.
    fallback_dC, trusted
        The discarded-weight route of :func:`trusted_light_cone` (with a single chi).
    side, d_min, tstar_tol, curve
        As for :func:`trusted_light_cone`.

    Returns
    -------
    Coverage
    """
    if not isinstance(C_engine_by_chi, Mapping) or not C_engine_by_chi:
        raise InputError("C_engine_by_chi must map bond dimensions to engine OTOCs", arg="C_engine_by_chi")
    as3 = {int(k): np.asarray(v, dtype=float)[None] if np.ndim(v) == 2 else np.asarray(v, dtype=float)
           for k, v in C_engine_by_chi.items()}
    ex = np.asarray(C_exact, dtype=float)
    ex = ex[None] if ex.ndim == 2 else ex
    chi_max = max(as3)
    if len(as3) < 2 and fallback_dC is None:
        raise InputError("give at least two bond dimensions in C_engine_by_chi, or fallback_dC", arg="C_engine_by_chi")
    conv = bond_convergence(as3) if len(as3) >= 2 else None
    C = as3[chi_max]
    if ex.shape != C.shape:
        raise InputError(f"C_exact has shape {ex.shape} but the engine arrays {C.shape}", arg="C_exact")
    t = check_times(times)
    cols, d, _ = one_side(C.shape[2], site, side)
    cases, by = [], {}
    for theta in thresholds:
        theta = check_threshold(theta)
        lc = trusted_light_cone(t, C, site, theta, convergence=conv, trotter=trotter, trusted=trusted,
                                fallback_dC=fallback_dC, curve=curve, side=side, tstar_tol=tstar_tol, tail=tail,
                                n_boot=0)
        ref = crossing_times(t, ensemble_curve(ex[:, :, cols], curve), theta)
        row = {"n_cases": 0, "n_trusted": 0, "n_covered": 0}
        for j in range(d.size):
            if d[j] < d_min or ref.status[j] != CROSSED:
                continue
            te = float(ref.tstar_any[j])
            ok = bool(lc.crossings.status[j] == CROSSED)
            lo, hi = float(lc.tstar_low[j]), float(lc.tstar_high[j])
            ts = float(lc.crossings.tstar_any[j])
            covered = bool(ok and lo <= te <= hi)
            cases.append({"theta": theta, "d": int(d[j]), "tstar_exact": te, "tstar": ts, "t_low": lo, "t_high": hi,
                          "trusted": ok, "covered": covered, "rel_error": abs(ts - te) / te,
                          "rel_halfwidth": 0.5 * (hi - lo) / ts if ok else float("nan")})
            row["n_cases"] += 1
            row["n_trusted"] += ok
            row["n_covered"] += covered
        by[theta] = row
    n = len(cases)
    nt = sum(c["trusted"] for c in cases)
    nc = sum(c["covered"] for c in cases)
    return Coverage(coverage=nc / nt if nt else float("nan"), trusted_share=nt / n if n else float("nan"),
                    n_cases=n, n_trusted=nt, n_covered=nc, cases=cases, by_threshold=by)
