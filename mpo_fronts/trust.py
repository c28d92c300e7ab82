"""Which points of an OTOC ensemble are believed: bond-dimension convergence and discarded-weight criteria.

:func:`bond_convergence` compares the same realizations evolved at several bond dimensions chi;
:func:`trust_mask` turns a loaded ensemble's convergence record (or, without one, its discarded weight) into a
boolean mask over (realization, time, site), and :func:`ensemble_light_cone` / :func:`ensemble_front` apply it
to the light cone and the front fits of :mod:`mpo_fronts.analysis`.

Trust
    :func:`trust_mask` uses the bond-dimension convergence mask when the ensemble has one (see
    :func:`bond_convergence`); otherwise a point is trusted when the cumulative discarded weight of its
    realization at that time is at most ``max_discarded`` (default 1e-3). The discarded weight is a
    property of the whole operator, so this fallback is conservative ahead of the front and gives no
    guarantee behind it; the convergence mask is the better criterion.
"""

from __future__ import annotations

from numbers import Integral, Real
from typing import Any, Mapping

import numpy as np

from .analysis import (FrontShape, LightCone, check_otoc, front_moments, front_shape, light_cone, probe_otoc)
from .errors import InputError

__all__ = ["DEFAULT_MAX_DISCARDED", "bond_convergence", "trust_from_discarded", "trust_mask",
           "ensemble_light_cone", "ensemble_front"]

#: Fallback trust criterion: largest cumulative discarded weight of a trusted point.
DEFAULT_MAX_DISCARDED = 1e-3


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
                         "run the same realizations at two or more chi", arg="otoc_by_chi")
    for chi in otoc_by_chi:
        if isinstance(chi, bool) or not isinstance(chi, Integral) or chi < 1:
            raise InputError(f"otoc_by_chi keys must be positive integer bond dimensions, got {chi!r}",
                             arg="otoc_by_chi")
    if isinstance(tol, bool) or not isinstance(tol, Real) or not float(tol) > 0:
        raise InputError(f"tol must be a positive number, got {tol!r}", arg="tol")
    chis = sorted(int(c) for c in otoc_by_chi)
    arrs = [check_otoc(otoc_by_chi[c], name=f"otoc_by_chi[{c}]") for c in chis]
    shape = arrs[0].shape
    for c, arr in zip(chis, arrs):
        if arr.shape != shape:
            raise InputError(f"otoc_by_chi[{c}] has shape {arr.shape}, but otoc_by_chi[{chis[0]}] has {shape}; "
                             f"every chi must cover the same realizations, times and sites", arg="otoc_by_chi")
    diffs = np.stack([np.abs(arrs[k + 1] - arrs[k]).max(axis=0) for k in range(len(arrs) - 1)])
    diffs = np.where(np.isfinite(diffs), diffs, np.inf)
    return {"chis": chis, "max_dC": diffs, "trusted": diffs[-1] < float(tol), "tol": float(tol)}


def trust_from_discarded(discarded_weight, L: int, max_discarded: float = DEFAULT_MAX_DISCARDED) -> np.ndarray:
    """Fallback trust mask (R, n_t, L): cumulative discarded weight of the realization <= ``max_discarded``."""
    dw = np.asarray(discarded_weight, dtype=float)
    if dw.ndim != 2:
        raise InputError(f"discarded_weight must have shape (R, n_t), got {dw.shape}", arg="discarded_weight")
    if isinstance(max_discarded, bool) or not isinstance(max_discarded, Real) or not float(max_discarded) >= 0:
        raise InputError(f"max_discarded must be a number >= 0, got {max_discarded!r}", arg="max_discarded")
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


def ensemble_light_cone(ens, threshold: float = 0.5, probe: str = "Z", *, use_trust: bool = True,
                        max_discarded: float = DEFAULT_MAX_DISCARDED, **opts) -> LightCone:
    """:func:`mpo_fronts.analysis.light_cone` of a loaded ensemble with its trust mask (``.trust`` says which)."""
    mask, info = trust_mask(ens, use_trust, max_discarded, probe if isinstance(probe, str) else None)
    out = light_cone(ens.times, probe_otoc(ens, probe), int(ens.site), threshold, trusted=mask, **opts)
    out.trust = info
    out.probe = probe.upper()
    return out


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
