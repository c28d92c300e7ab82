"""Summaries of a loaded OTOC ensemble: the numbers a researcher wants, as JSON-able data and as text.

:func:`summarize` gathers the light cone (crossing times and both fits), the front width, the distribution at
one site and the error information (trust criterion, discarded weight, bond dimension, evolution settings) of
a loaded ensemble (:func:`mpo_fronts.load`); :func:`format_summary` prints it as a table; :func:`jsonable`
turns arrays and non-finite numbers into JSON values.
"""

from __future__ import annotations

from numbers import Integral, Real
from typing import Any, Mapping

import numpy as np

from .analysis import (CROSSED, LAWS, STATUS_NAMES, Record, crossing_times, ensemble_distribution,
                       evolution_settings, one_side)
from .growth import ensemble_growth, growth_summary
from .trust import (DEFAULT_MAX_DISCARDED, DEFAULT_TSTAR_TOL, LARGE_DISCARDED_WEIGHT, discarded_weight_warnings,
                    ensemble_front, ensemble_light_cone, trust_mask)

__all__ = ["summarize", "format_summary", "jsonable", "configuration_crossings"]


def jsonable(obj):
    """``obj`` with arrays as lists, numpy scalars as Python numbers and non-finite numbers as None."""
    if isinstance(obj, Record):
        obj = obj.to_dict()
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [jsonable(v) for v in obj.tolist()]
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
             "distances", "tstar", "residuals", "d_range", "systematic")


def _half_widths(err) -> np.ndarray:
    """Largest of the two sides of a (2, n_d) error array, per distance."""
    return np.max(np.asarray(err, dtype=float), axis=0)


def configuration_crossings(ens, threshold: float, probe: str, side: str = "auto", trusted=None
                            ) -> list[dict[str, Any]] | None:
    """Crossing times per basis state of a product-state run, side by side (None at infinite temperature).

    For each state s (named as in ``state.bits`` / ``state.configurations``), the mean over realizations of
    the product-state OTOC 1 - Re <s|W(t) V_r W(t) V_r|s> and its first crossing of ``threshold`` at each
    distance d on ``side`` of W (untrusted points as in the summary's trust mask).

    Returns
    -------
    list of dict or None
        ``name``, ``bits`` (of the first realization; ``random`` states differ between realizations, see
        ``bits_vary``), ``bits_vary``, ``distances``, ``tstar`` (None where C never reaches the threshold),
        ``status``.
    """
    if getattr(ens, "state", "infinite_temperature") == "infinite_temperature":
        return None
    S = np.asarray(ens.state_otoc(probe), dtype=float)  # (R, n_states, n_t, L)
    bits = np.asarray(ens.bits)
    names = list(getattr(ens, "state_names", None) or [f"state{i}" for i in range(S.shape[1])])
    cols, d, _ = one_side(int(ens.L), int(ens.site), side)
    mask = None if trusted is None else np.broadcast_to(trusted, S[:, 0].shape).all(axis=0)[:, cols]
    out = []
    for i, name in enumerate(names):
        curve = S[:, i].mean(axis=0)[:, cols]
        cr = crossing_times(ens.times, curve, threshold, trusted=mask)
        out.append({"name": name, "bits": str(bits[0, i]), "bits_vary": bool(np.any(bits[:, i] != bits[0, i])),
                    "distances": d, "tstar": np.where(cr.status == CROSSED, cr.tstar, np.nan),
                    "status": [STATUS_NAMES[int(x)] for x in cr.status]})
    return out


def summarize(ens, threshold: float = 0.5, probe: str = "Z", *, curve: str = "mean", side: str = "auto",
              r_range: tuple[int, int] | None = None, d_min: int = 1, n_boot: int = 500, ci: float = 0.95,
              seed: int = 0, use_trust: bool = True, max_discarded: float = DEFAULT_MAX_DISCARDED,
              tstar_tol: float = DEFAULT_TSTAR_TOL, trotter: Mapping | None = None,
              max_lost: float = LARGE_DISCARDED_WEIGHT) -> dict[str, Any]:
    """The numbers a researcher wants from a finished ensemble, as a JSON-able dict.

    Parameters
    ----------
    ens : loaded ensemble (see :func:`mpo_fronts.load`)
    threshold : float
        theta on the [0, 2] scale of C (default 0.5).
    probe : {'X', 'Y', 'Z'}
        Probe V of C(r, t).
    curve, side, r_range, d_min, n_boot, ci, seed
        See :func:`mpo_fronts.analysis.light_cone`.
    use_trust : bool
        Fit only trusted crossings and use only trusted points (see :mod:`mpo_fronts.trust`); default True.
    max_discarded : float
        Discarded-weight criterion of a point when the ensemble has no convergence study for ``probe``.
    tstar_tol : float
        Largest truncation plus Trotter error of a fitted crossing time, relative to t* (default 0.05).
    trotter : dict, optional
        :func:`mpo_fronts.trust.trotter_convergence` of this run against a run at a second time step; without
        it the Trotter error is not included (the summary says so).
    max_lost : float
        Discarded weight (fraction of W's weight) above which a realization's later times are never fitted
        and the summary warns (default 0.1).

    Returns
    -------
    dict
        Top-level ``threshold``, ``probe``, ``operator`` (W), ``site``, ``disorder_W`` (None for a model
        without disorder); ``butterfly_velocity`` and ``log_light_cone``, each with ``value``, ``ci_low``,
        ``ci_high``, ``d_range`` (inclusive distances d = |r - i|; also as ``r_range``, its older name), fit
        quality (``r2``, ``rms_residual``, ``rms_log_residual``), ``n_points``, exclusion counts, the
        residuals and ``systematic`` (whether the interval includes the systematic errors of t*);
        ``law_comparison``; ``crossings``: ``distances``, ``tstar`` of the curve, ``t_low`` and ``t_high``
        (the interval of each t*, None where there is no crossing), ``status`` names, ``t_errors`` (half-widths
        per part: statistical, truncation, trotter, interpolation), ``error_budget`` (words),
        ``tstar_boot_std``, per-realization status counts; ``front`` (width exponent); ``growth`` (per
        distance d >= 1, ``early_exponent``, ``early_exponent_ci``, ``stages``, ...; see
        :func:`mpo_fronts.growth.growth_summary`); ``configurations`` (product-state runs: crossing times per
        basis state side by side, :func:`configuration_crossings`; None at infinite temperature); ``distribution``
        (largest bimodality at one site); ``trust`` (criteria, trusted fraction); ``warnings`` (list of
        str, empty when nothing is wrong); ``largest_discarded_weight``, ``largest_bond``, ``engine``,
        ``description``. Non-finite numbers become None.

    Examples
    --------
    >>> import json, mpo_fronts as mf                                   # doctest: +SKIP
    >>> from mpo_fronts.report import summarize                        # doctest: +SKIP
    >>> s = summarize(mf.load("runs/demo"), threshold=0.5)              # doctest: +SKIP
    >>> print(json.dumps(s)[:40])                                       # doctest: +SKIP
    """
    lc = ensemble_light_cone(ens, threshold, probe, use_trust=use_trust, max_discarded=max_discarded,
                             tstar_tol=tstar_tol, trotter=trotter, max_lost=max_lost, curve=curve, side=side,
                             r_range=r_range, d_min=d_min, n_boot=n_boot, ci=ci, seed=seed)
    fits = {law: {k: lc["fits"][law].get(k) for k in _FIT_KEYS} for law in LAWS}
    rb, rl = fits["ballistic"]["rms_log_residual"], fits["log"]["rms_log_residual"]
    smaller = None
    if np.isfinite(rb) and np.isfinite(rl):
        smaller = "ballistic" if rb < rl else "log"
    fr = ensemble_front(ens, use_trust=use_trust, max_discarded=max_discarded, n_boot=n_boot, ci=ci, seed=seed)
    we = fr["width_exponent"]
    dist = ensemble_distribution(ens, probe=probe)
    g_mask, _ = trust_mask(ens, use_trust, max_discarded, probe, max_lost=max_lost)
    growth = growth_summary(ensemble_growth(ens, probe, side=lc["side"], trusted=g_mask), n_boot=n_boot, ci=ci,
                            seed=seed)
    bim = dist["bimodality"]
    k_max = int(np.nanargmax(bim)) if np.any(np.isfinite(bim)) else None
    cross = lc["crossings"]
    dw = np.asarray(ens.discarded_weight, dtype=float)
    mb = np.asarray(ens.max_bond)
    crossed = cross.status == CROSSED
    err = lc.errors
    if err is not None:
        sys_half = _half_widths(err.total)
        with np.errstate(invalid="ignore"):  # the statistical part alone, from the combined interval
            q_lo = np.sqrt(np.maximum((cross.tstar - lc.tstar_low) ** 2 - err.total[0] ** 2, 0.0))
            q_hi = np.sqrt(np.maximum((lc.tstar_high - cross.tstar) ** 2 - err.total[1] ** 2, 0.0))
        stat = np.where(crossed & np.isfinite(sys_half), np.maximum(q_lo, q_hi), np.nan)
        parts = {"statistical": stat}
        parts.update({k: np.where(crossed, _half_widths(getattr(err, k)), np.nan)
                      for k in ("truncation", "trotter", "interpolation")})
        budget = (f"t_low, t_high = t* -/+ (truncation + Trotter + interpolation error), with the "
                  f"{int(round(100 * ci))}% bootstrap interval over realizations added in quadrature"
                  + (" (none here: one realization)" if lc.R < 2 else "")
                  + "; see trust.truncation_error and trust.trotter_error")
    else:
        parts = {"statistical": np.where(crossed, np.maximum(cross.tstar - lc.tstar_low,
                                                             lc.tstar_high - cross.tstar), np.nan)}
        budget = (f"t_low, t_high: the statistical {int(round(100 * ci))}% bootstrap interval over realizations "
                  "only (trust not applied, so no systematic errors)")
    warnings = list(discarded_weight_warnings(dw, ens.times, max_lost))
    if (lc.trust or {}).get("note"):
        warnings.append(lc.trust["note"])
    n_fit = fits["ballistic"]["n_points"]
    if n_fit < 3:
        warnings.append(f"only {n_fit} distance(s) with a trusted crossing of C = {lc.threshold:g} in the fit "
                        "range: no light-cone fit")
    model = (getattr(ens, "description", None) or {}).get("model", {}) or {}
    out = {
        "threshold": lc["threshold"],
        "probe": lc["probe"],
        "operator": str(getattr(ens, "w", "") or "") or None,
        "curve": curve,
        "ci_level": ci,
        "site": lc["site"],
        "side": lc["side"],
        "L": int(ens.L),
        "model": model.get("kind"),
        "disorder_W": model.get("W"),
        "n_realizations": lc["R"],
        "n_times": int(len(ens.times)),
        "t_range": [float(ens.times[0]), float(ens.times[-1])],
        "distance": "d = |r - site| on the side of W named in 'side'; t* in units of 1/J",
        "butterfly_velocity": fits["ballistic"],
        "log_light_cone": fits["log"],
        "law_comparison": {"rms_log_residual_ballistic": rb, "rms_log_residual_log": rl, "smaller": smaller},
        "crossings": {"distances": lc["d"], "tstar": cross.tstar, "t_low": lc.tstar_low, "t_high": lc.tstar_high,
                      "status": [STATUS_NAMES[int(s)] for s in cross.status],
                      "t_errors": parts, "error_budget": budget,
                      "tstar_boot_std": lc["tstar_boot_std"],
                      "realization_counts": lc["realization_crossings"].counts()},
        "front": {"width_exponent": {k: we[k] for k in ("value", "ci_low", "ci_high", "ci_method", "t_range",
                                                        "n_points", "r2", "law", "n_excluded_times")},
                  "final_position": fr["position"][-1], "final_width": fr["width"][-1],
                  "note": "from the right-weight profile: the right end of W(t)"},
        "distribution": {"r": dist["r"], "d": dist["d"], "measure": "Sarle's bimodality coefficient "
                         "(SAS/STAT PROC CLUSTER; Pfister et al. 2013); > 5/9 suggests two modes",
                         "max_bimodality": bim[k_max] if k_max is not None else None,
                         "t_at_max": float(ens.times[k_max]) if k_max is not None else None,
                         "site_rule": "halfway along the longer side of W, or the farthest distance at which the "
                         "median C reaches 0.1 if nearer (analysis.reached_site)"},
        "growth": growth,
        "configurations": configuration_crossings(ens, lc["threshold"], lc["probe"], lc["side"], g_mask),
        "trust": lc["trust"],
        "trusted_fraction": lc["trust"]["trusted_fraction"],
        "warnings": warnings,
        "largest_discarded_weight": float(np.nanmax(dw)) if dw.size else None,
        "largest_bond": int(mb.max()) if mb.size else None,
        "evolution": evolution_settings(ens),
        "description": dict(getattr(ens, "description", {}) or {}),
    }
    return jsonable(out)


def _fmt(v, spec: str = ".4f", none: str = "-") -> str:
    """A number in a fixed format (``none`` for a missing one); other values as text."""
    if v is None:
        return none
    if isinstance(v, bool):
        return str(v)
    if isinstance(v, (int, float)):
        return format(v, spec) if np.isfinite(v) else ("inf" if v > 0 else "-inf")
    return str(v)


def _interval(lo, hi, spec: str = ".4f") -> str:
    return "-" if lo is None and hi is None else f"[{_fmt(lo, spec)}, {_fmt(hi, spec)}]"


def _model_text(d: Mapping[str, Any]) -> str:
    kind = d.get("model")
    name = {"xxz": "XXZ chain", "mixed_field_ising": "mixed-field Ising chain"}.get(kind, f"{kind} chain" if kind
                                                                                     else "chain")
    W = d.get("disorder_W")
    if kind == "xxz" and W is not None:
        name += f", disorder W = {_fmt(W, 'g')}" + (" (clean)" if W == 0 else "")
    return name


def _crossing_lines(d: Mapping[str, Any]) -> list[str]:
    """One line per distance with its t* and interval; trailing unreached distances on one line."""
    cr = d.get("crossings") or {}
    dist, status = cr.get("distances") or [], cr.get("status") or []
    if not dist:
        return []
    n = len(dist)
    while n > 0 and status[n - 1] == "unreached":
        n -= 1
    lines = [f"{'d':>4}{'t*':>10}{'t_low':>10}{'t_high':>10}  status"] if n else []
    for j in range(n):
        lines.append(f"{dist[j]:>4}{_fmt(cr['tstar'][j], '.3f'):>10}{_fmt(cr['t_low'][j], '.3f'):>10}"
                     f"{_fmt(cr['t_high'][j], '.3f'):>10}  {status[j]}")
    if n < len(dist):
        t_hi = (d.get("t_range") or [None, None])[1]
        lines.append(f"{'d = ' if n else 'every distance, d = '}{dist[n]}..{dist[-1]}: unreached within "
                     f"t <= {_fmt(t_hi, '.3f')}")
    return lines


def _configuration_lines(confs, threshold) -> list[str]:
    """Crossing times per basis state of a product-state run, one column per state."""
    if not confs:
        return []
    names = [c["name"] if len(c["name"]) <= 12 else c["name"][:11] + "~" for c in confs]
    out = ["", f"crossing times t* of C = {_fmt(threshold, 'g')} per basis state (mean over realizations of "
               "1 - Re <s|W(t) V_r W(t) V_r|s>; '-': not reached)",
           "      d " + "".join(f"{n:>13}" for n in names)]
    for j, dist in enumerate(confs[0]["distances"]):
        out.append(f"{int(dist):>7} " + "".join(f"{_fmt(c['tstar'][j], '.3f'):>13}" for c in confs))
    vary = [c["name"] for c in confs if c.get("bits_vary")]
    shown = ", ".join(f"{c['name']} = {c['bits']}" for c in confs if not c.get("bits_vary"))
    out.append(f"  states: {shown}" + (f"; {', '.join(vary)}: drawn per realization" if vary else ""))
    return out


def _growth_lines(g: Mapping[str, Any]) -> list[str]:
    """The growth stages per distance: early exponent against 2d, later exponent, stages of the median curve."""
    rows = g.get("distances") or []
    if not rows:
        return []
    lvl = f"{int(round(100 * g.get('ci_level', 0.95)))}%"
    n = len(rows)
    while n > 0 and not rows[n - 1].get("n_early"):
        n -= 1
    out = ["", f"growth stages (probe {g.get('probe')}; alpha = d ln C / d ln t, stages where alpha stays on a "
               f"plateau; see mpo_fronts.growth); 2d: the lowest-order exponent where W(t) reaches distance d at "
               "order t^d (XXZ chains)"]
    if n:
        out.append(f"{'d':>4}{'2d':>4}{'early':>9}  {f'{lvl} interval':<20}{'t range (1/J)':<16}{'later':>8}"
                   f"{'n':>4}  stages of the median curve (exponent over t range)")
    for r in rows[:n]:
        ci_ = r.get("early_exponent_ci") or [None, None]
        tr_ = r.get("early_t_range") or [None, None]
        le = r.get("later_exponent") or {}
        st = "; ".join(f"{_fmt(s.get('exponent'), '.2f')} over {_fmt(s.get('t_start'), '.3g')}.."
                       f"{_fmt(s.get('t_end'), '.3g')}" for s in r.get("stages") or []) or "-"
        out.append(f"{r['d']:>4}{r.get('lowest_order', ''):>4}{_fmt(r.get('early_exponent'), '.3f'):>9}  "
                   f"{_interval(ci_[0], ci_[1], '.3f'):<20}"
                   f"{_fmt(tr_[0], '.3g') + '..' + _fmt(tr_[1], '.3g'):<16}{_fmt(le.get('median'), '.3f'):>8}"
                   f"{_fmt(le.get('n'), 'd'):>4}  {st}")
    if n < len(rows):
        out.append(f"{'d = ' if n else 'every distance, d = '}{rows[n]['d']}..{rows[-1]['d']}: no early stage "
                   "(C below the floor, untrusted, or no plateau)")
    return out


def format_summary(d: Mapping[str, Any]) -> str:
    """The summary of :func:`summarize` as plain text: warnings, the fits, crossing times and error information.

    Numbers have fixed decimal places (parameters 4, times 3, fit quality 3, weights in e-notation with 2);
    a missing number prints as '-'.
    """
    lvl = d.get("ci_level", 0.95)
    pct = f"{int(round(lvl * 100))}%"
    tr_ = d.get("t_range") or [None, None]
    lines = [
        f"OTOC light cone of operator {d.get('operator') or 'W'} at site {d.get('site')} (probe V = "
        f"{d.get('probe')}); {_model_text(d)}, L = {d.get('L')}; {d.get('n_realizations')} realization(s); "
        f"t in [{_fmt(tr_[0], '.3f')}, {_fmt(tr_[1], '.3f')}] (1/J)",
        f"threshold theta = {_fmt(d.get('threshold'), 'g')} on C in [0, 2]; crossing times t* of the ensemble "
        f"{d.get('curve')} of C, interpolated in ln t; distances d = |r - {d.get('site')}| on the {d.get('side')} "
        "side",
    ]
    for w in d.get("warnings") or []:
        lines.append(f"WARNING: {w}")
    lines += ["", f"{'quantity':<26}{'value':>10}  {f'{pct} interval':<22}{'range':<15}{'points':>6}"
              f"{'R^2':>8}{'rms ln':>9}"]
    for key, name in (("butterfly_velocity", "v_B (sites per 1/J)"), ("log_light_cone", "xi (sites)")):
        f = d.get(key) or {}
        rr = f.get("d_range") or f.get("r_range") or [None, None]
        lines.append(f"{name:<26}{_fmt(f.get('value')):>10}  {_interval(f.get('ci_low'), f.get('ci_high')):<22}"
                     f"{f'd {rr[0]}..{rr[1]}':<15}{_fmt(f.get('n_points'), 'd'):>6}{_fmt(f.get('r2'), '.3f'):>8}"
                     f"{_fmt(f.get('rms_log_residual'), '.3f'):>9}")
    we = (d.get("front") or {}).get("width_exponent") or {}
    tw = we.get("t_range") or [None, None]
    lines.append(f"{'width exponent beta':<26}{_fmt(we.get('value')):>10}  "
                 f"{_interval(we.get('ci_low'), we.get('ci_high')):<22}"
                 f"{'t ' + _fmt(tw[0], '.2f') + '..' + _fmt(tw[1], '.2f'):<15}{_fmt(we.get('n_points'), 'd'):>6}"
                 f"{_fmt(we.get('r2'), '.3f'):>8}{'':>9}")
    bv = d.get("butterfly_velocity") or {}
    lg = d.get("log_light_cone") or {}
    lc = d.get("law_comparison") or {}
    rr = bv.get("d_range") or bv.get("r_range") or [None, None]
    if lc.get("smaller"):
        comparison = (f"smaller rms ln-residual: {lc['smaller']} ({_fmt(lc.get('rms_log_residual_ballistic'), '.3f')}"
                      f" ballistic, {_fmt(lc.get('rms_log_residual_log'), '.3f')} log)")
    else:
        comparison = "the laws are not compared (a fit needs at least 3 trusted crossings)"
    if "no fit" in str(bv.get("ci_method", "")):
        how = f"{pct} intervals: none ({bv.get('ci_method')})"
    elif d.get("n_realizations") == 1:
        how = (f"{pct} intervals: a single realization, so there is no spread over disorder to bootstrap; the fit "
               "intervals are least-squares intervals (Student t: how well the law fits)"
               + (", widened by the systematic errors of t*" if bv.get("systematic") else ""))
    elif bv.get("n_boot_valid"):
        how = f"{pct} intervals: {bv.get('ci_method')}"
    else:
        how = f"{pct} intervals: least-squares (no bootstrap): {bv.get('ci_method')}"
    fitted = rr[0] is not None and rr[1] is not None and rr[1] >= rr[0]
    lines += [
        "",
        f"fits: {bv.get('law')} and {lg.get('law')}; {comparison}",
        (f"fit range d = {rr[0]}..{rr[1]} (d_low = {rr[0]}, the smallest distance fitted); of the distances "
         f"d >= d_low, " if fitted else f"fit range: none; of the distances d >= d_low = {rr[0]}, ")
        + f"{_fmt(bv.get('n_unreached'), 'd')} never reach theta within t <= {_fmt(tr_[1], '.3f')} and "
        f"{_fmt(bv.get('n_excluded_untrusted'), 'd')} are untrusted (not fitted)",
        how,
    ]
    cr = d.get("crossings") or {}
    trust = d.get("trust") or {}
    eng = d.get("evolution") or d.get("engine") or {}  # 'engine' in summaries before 0.2
    if cr.get("t_low") is not None:
        budget = str(cr.get("error_budget", "")).split("; see ")[0]
        lines += ["", f"crossing times t* (1/J); {budget}"]
        if trust.get("truncation_error"):
            lines.append(f"  truncation error: {trust['truncation_error']}")
        trot = trust.get("trotter_error")
        if trot:
            if str(trot).startswith("not included"):
                steps = (f"order {_fmt(eng.get('order'), 'd', '?')}, dt = {_fmt(eng.get('dt'), 'g', '?')}, largest "
                         f"step {_fmt(eng.get('max_step'), 'g', '?')}")
                trot = f"{trot[:-1]}; {steps})" if str(trot).endswith(")") else f"{trot} ({steps})"
            lines.append(f"  Trotter error: {trot}")
        lines += _crossing_lines(d)
    lines += [
        "",
        f"trust of points: {trust.get('criterion')}; trusted fraction {_fmt(d.get('trusted_fraction'), '.3f')}",
    ]
    if trust.get("crossing_criterion"):
        lines.append(f"trust of crossings: {trust['crossing_criterion']}")
    lines.append(f"largest discarded weight {_fmt(d.get('largest_discarded_weight'), '.2e')}, largest bond "
                 f"{_fmt(d.get('largest_bond'), 'd')}")
    dist = d.get("distribution") or {}
    if dist.get("max_bimodality") is None:
        lines.append(f"bimodality at r = {dist.get('r')} (d = {dist.get('d')}): not defined (fewer than 4 "
                     "realizations, or identical values)")
    else:
        lines.append(f"bimodality at r = {dist.get('r')} (d = {dist.get('d')}): max "
                     f"{_fmt(dist.get('max_bimodality'), '.3f')} at t = {_fmt(dist.get('t_at_max'), '.3f')} "
                     "(Sarle's coefficient, > 5/9 suggests two modes)")
    lines += _growth_lines(d.get("growth") or {})
    lines += _configuration_lines(d.get("configurations"), d.get("threshold"))
    if eng:
        lines.append("evolution: " + ", ".join(f"{k} = {_fmt(v, 'g', 'none')}" for k, v in eng.items()))
    return "\n".join(lines)
