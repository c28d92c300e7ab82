"""Synthetic OTOC ensembles with known answers, shared by the analysis, trust and report tests (not a test file)."""

import types

import numpy as np


def logistic_front(t, d, centre, width, log_time=False):
    """C = 1 / (1 + exp(-(t - centre) / width)) (or in ln t): a front with C = 1/2 exactly at t = centre."""
    x = (np.log(t) - np.log(centre)) if log_time else (t - centre)
    return 1.0 / (1.0 + np.exp(-x / width))


def ballistic_ensemble(R=12, L=30, site=2, v=0.8, t0=1.0, tau=0.6, noise=0.5, t_max=60.0, seed=1):
    """Realizations of a ballistic front: C(d, t) = logistic((t - d / v - t0 - eps) / tau), eps ~ N(0, noise)."""
    rng = np.random.default_rng(seed)
    t = np.geomspace(0.1, t_max, 120)
    d = np.abs(np.arange(L) - site)
    centre = d[None, None, :] / v + t0 + rng.normal(0.0, noise, (R, 1, L))
    C = logistic_front(t[None, :, None], d, np.maximum(centre, 0.2), tau)
    return t, C


def fake_ensemble(times, C, site, rho=None, convergence=None, discarded=None, bond_discarded=None,
                  bond_entropy=None, description=None):
    """A duck-typed stand-in for a loaded ensemble (the attributes analysis and plots read)."""
    R, n_t, L = C.shape
    if rho is None:
        x = np.arange(L) - site
        rho = np.exp(-np.abs(x[None, None, :] - 0.8 * times[None, :, None])) * (x >= 0)
        rho = np.broadcast_to(rho / rho.sum(-1, keepdims=True), C.shape)
    return types.SimpleNamespace(
        times=np.asarray(times), L=L, site=site, w="Z", probes=("X", "Y", "Z"), otoc=lambda v: C,
        weights=None, right_weight=rho, fields=np.zeros((R, L)),
        discarded_weight=np.zeros((R, n_t)) if discarded is None else discarded,
        max_bond=np.full((R, n_t), 8), realizations=np.arange(R),
        description={"kind": "synthetic"} if description is None else description,
        engine={"chi": 32, "dt": 0.05, "order": 2, "cutoff": 0.0, "max_step": 0.05}, convergence=convergence,
        bond_discarded=bond_discarded, bond_entropy=bond_entropy)
