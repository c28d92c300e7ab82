"""Workflows built from many evolutions: the exact check on a small chain and the bond-dimension convergence study.

:func:`check_against_exact` runs a description at a small L beside dense exact evolution on identical disorder
(the built-in check of Trotter and truncation error); :func:`converge` runs it at several bond dimensions into
one directory and stores the convergence arrays that the trust map is built from.
"""

from __future__ import annotations

import contextlib
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any, Callable, Sequence

import numpy as np

from .config import RunDescription
from .conventions import default_probe
from .ensemble import evolve_realization, run_ensemble
from .errors import InputError
from .store import RunDirectory

__all__ = ["check_against_exact", "converge", "ExactCheck", "eigenstate_study", "ENERGY_BINS"]


@dataclass(frozen=True)
class ExactCheck:
    """The result of :func:`check_against_exact`.

    Attributes
    ----------
    max_deviation : float
        Largest |C_engine - C_exact| over realizations, probes, times and sites.
    where : dict
        Realization, probe, state, t and r of that largest deviation.
    per_realization : list of dict
        ``{k, max_deviation, discarded_weight, max_bond}`` per realization.
    L, site : int
        The small chain's length and the site of W on it.
    evolution : dict
        The evolution settings used (those of the description); also as ``engine``, its name before 0.2.
    times, deviation_by_time : list of float
        Output times and the largest deviation at each.
    """

    max_deviation: float
    where: dict
    per_realization: list
    L: int
    site: int
    evolution: dict
    times: list = field(default_factory=list)
    deviation_by_time: list = field(default_factory=list)

    @property
    def engine(self) -> dict:
        """The evolution settings (:attr:`evolution`) under their name before 0.2."""
        return self.evolution

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)


def check_against_exact(description: RunDescription, L: int = 10, realizations: int = 2,
                        progress: Callable[[str], None] | None = None) -> ExactCheck:
    """Run the description at a small L with exact evolution beside the engine, on identical disorder.

    Realization k keeps the first ``L`` fields, couplings and basis-state bits of its full-size draw; the site
    of W keeps its relative position (:meth:`RunDescription.site_at`). Engine settings (chi, dt, order, cutoff)
    are those of the description, so the deviation measures Trotter and truncation error together.

    Returns
    -------
    ExactCheck
    """
    from .exact import MAX_DENSE_L, exact_otoc

    _check_small(description, L, realizations, MAX_DENSE_L, "for the exact check (dense exact evolution holds 4^L "
                 "numbers per operator)")
    site = description.site_at(L)
    times = description.times
    worst = {"max_deviation": -1.0}
    per = []
    by_time = np.zeros(times.size)
    with contextlib.ExitStack() as stack:
        from threadpoolctl import threadpool_limits

        stack.enter_context(threadpool_limits(limits=1))
        for k in range(min(realizations, description.realizations)):
            real = description.truncated_realization(k, L)
            res = evolve_realization(real.chain, w=description.w, site=site, times=times,
                                     settings=description.settings, probes=description.probes, bits=real.bits)
            dev_k = 0.0
            states = real.bits if real.bits is not None else [None]
            for s, bits in enumerate(states):
                ex = exact_otoc(real.chain, description.w, site, times, state=bits)
                for v in description.probes:
                    mine = res["state_otoc"][v][s] if bits is not None else res["otoc"][v]
                    dev = np.abs(mine - ex.otoc(v))
                    by_time = np.maximum(by_time, dev.max(axis=1))
                    i = np.unravel_index(int(np.argmax(dev)), dev.shape)
                    if dev[i] > worst["max_deviation"]:
                        worst = {"max_deviation": float(dev[i]), "where": {
                            "realization": k, "probe": v, "state": bits, "t": float(times[i[0]]), "r": int(i[1])}}
                    dev_k = max(dev_k, float(dev.max()))
            per.append({"k": k, "max_deviation": dev_k, "discarded_weight": float(res["discarded_weight"][-1]),
                        "max_bond": int(res["max_bond"].max())})
            if progress is not None:
                progress(f"realization {k}: largest deviation {dev_k:.3g}, discarded weight "
                         f"{per[-1]['discarded_weight']:.3g}")
    return ExactCheck(max_deviation=worst["max_deviation"], where=worst.get("where", {}), per_realization=per,
                      L=L, site=site, evolution=description.engine, times=times.tolist(),
                      deviation_by_time=by_time.tolist())


def _check_small(description: RunDescription, L, realizations, max_L: int, why: str) -> None:
    """The chain length and realization count of a dense check at small L (errors name L / realizations)."""
    if isinstance(L, bool) or not isinstance(L, int) or not 2 <= L <= max_L:
        raise InputError(f"L must be an integer in 2..{max_L} {why}, got {L!r}", arg="L")
    if L > description.L:
        raise InputError(f"L = {L} exceeds the chain length of the description (model.L = {description.L})",
                         arg="L")
    if isinstance(realizations, bool) or not isinstance(realizations, int) or realizations < 1:
        raise InputError(f"realizations must be a positive integer, got {realizations!r}", arg="realizations")


#: Energy-density bins of :func:`eigenstate_study`: epsilon = (E - E_min) / (E_max - E_min) in [0, 1].
ENERGY_BINS = (0.0, 0.2, 0.4, 0.6, 0.8, 1.0)


def eigenstate_study(description: RunDescription, L: int = 10, realizations: int = 1, probe: str | None = None,
                     out=None, bins: Sequence[float] = ENERGY_BINS) -> dict[str, Any]:
    """Eigenstate-resolved OTOCs of a description at a small L, beside the infinite-temperature average.

    For realization k (its first ``L`` fields, as :func:`check_against_exact`), every eigenstate |n> of H gives
    C_n(r, t) = 1 - Re <n|W(t) V_r W(t) V_r|n> (:func:`mpo_fronts.exact.eigenstate_otoc`, dense, L <= 12). The
    mean over all n is the infinite-temperature C(r, t) (the trace in the eigenbasis). Eigenstates are grouped
    by energy density epsilon = (E_n - E_min) / (E_max - E_min) into ``bins``.

    Parameters
    ----------
    out : path, optional
        An HDF5 file to write (atomically): ``energies`` (R, 2^L), ``otoc`` (R, n_t, 2^L, L) = C_n(r, t),
        ``times``, ``fields`` (R, L), and the description, L, site, probe as attributes.

    Returns
    -------
    dict
        ``L``, ``site``, ``probe``, ``times``, ``distances`` (d = 0 .. L-1-site, to the right of W),
        ``infinite_temperature`` (n_t, n_d): the mean over eigenstates and realizations, ``by_energy``
        (n_bins, n_t, n_d): the mean within each energy-density bin, ``spread`` (n_t, n_d): the standard deviation
        over eigenstates, ``bins``, ``counts`` (n_bins,), ``path`` (or None).
    """
    from .conventions import default_probe
    from .exact import MAX_DENSE_L, eigenstate_otoc

    _check_small(description, L, realizations, MAX_DENSE_L, "for eigenstate-resolved OTOCs (dense "
                 "diagonalization of 2^L states)")
    probe = (probe or default_probe(description.probes)).upper()
    edges = np.asarray(bins, dtype=float)
    if edges.ndim != 1 or edges.size < 2 or np.any(np.diff(edges) <= 0) or edges[0] < 0 or edges[-1] > 1:
        raise InputError(f"bins must be increasing energy densities in [0, 1], got {list(bins)!r}", arg="bins")
    site = description.site_at(L)
    times = description.times
    ks = list(range(min(realizations, description.realizations)))
    energies, C, fields = [], [], []
    for k in ks:
        real = description.truncated_realization(k, L)
        e, c = eigenstate_otoc(real.chain, description.w, site, probe, times)
        energies.append(e)
        C.append(c)
        fields.append(np.asarray(real.chain.fields if real.chain.fields is not None else np.full(L, np.nan)))
    E, C = np.stack(energies), np.stack(C)  # (R, 2^L), (R, n_t, 2^L, L)
    right = np.arange(site, L)
    Cd = C[..., right]  # distances d = 0 .. L-1-site
    eps = (E - E.min(axis=1, keepdims=True)) / np.maximum(np.ptp(E, axis=1, keepdims=True), 1e-300)
    which = np.clip(np.searchsorted(edges, eps, side="right") - 1, 0, edges.size - 2)
    by_energy = np.full((edges.size - 1, times.size, right.size), np.nan)
    counts = np.zeros(edges.size - 1, dtype=int)
    for b in range(edges.size - 1):
        sel = which == b  # (R, 2^L)
        counts[b] = int(sel.sum())
        if counts[b]:
            by_energy[b] = np.einsum("rn,rtnd->td", sel, Cd) / counts[b]
    result = {"L": L, "site": site, "probe": probe, "times": times.tolist(), "distances": list(range(right.size)),
              "infinite_temperature": Cd.mean(axis=(0, 2)), "by_energy": by_energy,
              "spread": Cd.transpose(1, 3, 0, 2).reshape(times.size, right.size, -1).std(axis=-1),
              "bins": edges.tolist(), "counts": counts.tolist(), "realizations": ks, "path": None}
    if out is not None:
        import json

        from .store import atomic_h5

        def write(f):
            f.attrs["description"] = json.dumps(description.to_dict())
            f.attrs.update({"L": L, "site": site, "w": description.w, "probe": probe,
                            "meaning": "C_n(r, t) = 1 - Re <n|W(t) V_r W(t) V_r|n> for every eigenstate n of H "
                                       "(realization k restricted to its first L sites)"})
            f.create_dataset("times", data=times)
            f.create_dataset("realizations", data=np.asarray(ks))
            f.create_dataset("energies", data=E).attrs["axes"] = "realization,eigenstate"
            f.create_dataset("otoc", data=C, compression="gzip", shuffle=True).attrs["axes"] = \
                "realization,time,eigenstate,site"
            f.create_dataset("fields", data=np.stack(fields)).attrs["axes"] = "realization,site"

        Path(out).parent.mkdir(parents=True, exist_ok=True)
        result["path"] = str(atomic_h5(out, write))
    return result


def converge(description: RunDescription, chis: Sequence[int], out, *, dt: float | None = None,
             probe: str | None = None, tol: float = 1e-2, rel_tol: float = 0.0, **run_kwargs) -> dict:
    """Run the description at each bond dimension into ``out/chi_016`` ... and store the convergence arrays.

    Every chi uses the same seeds (identical disorder). The OTOCs of ``probe`` (default: Z if stored, else the
    first stored probe) go to :func:`mpo_fronts.trust.bond_convergence` (with ``tol`` and ``rel_tol``), whose
    result is written to ``out/convergence.h5``; ``mpo_fronts.load(out)`` then loads the largest chi with
    ``.convergence`` attached.

    Returns
    -------
    dict
        The convergence arrays (see :func:`mpo_fronts.trust.bond_convergence`).
    """
    from .store import atomic_h5, load, CONVERGENCE_FILE, RUN_FILE
    from .results import write_convergence_group

    chis = sorted({int(c) for c in chis})
    if len(chis) < 2 or chis[0] < 1:
        raise InputError(f"chis needs at least two distinct positive bond dimensions, got {list(chis)}", arg="chis")
    probe = probe or default_probe(description.probes)
    if probe not in description.probes and description.state_kind != "infinite_temperature":
        raise InputError(f"probe {probe!r} is not stored by the description (operators.v = "
                         f"{list(description.probes)})", arg="probe")
    out = Path(out)
    if (out / RUN_FILE).is_file():
        raise InputError(f"{out} is a run directory; give converge a new directory (it creates chi_* inside)",
                         arg="out")
    descs = {chi: description.replace(engine__chi=chi, **({"engine__dt": dt} if dt is not None else {}))
             for chi in chis}
    for chi, d in descs.items():  # check every target before any work starts
        RunDirectory.check_target(out / f"chi_{chi:03d}", d)
    from .trust import bond_convergence, check_tolerances

    check_tolerances(tol, rel_tol)  # before any work

    otoc_by_chi = {}
    for chi, d in descs.items():
        run_ensemble(d, out / f"chi_{chi:03d}", **run_kwargs)
        otoc_by_chi[chi] = load(out / f"chi_{chi:03d}").otoc(probe)
    conv = dict(bond_convergence(otoc_by_chi, tol, rel_tol=rel_tol))
    conv.setdefault("probe", probe)
    conv.setdefault("tol", tol)
    atomic_h5(out / CONVERGENCE_FILE, lambda f: write_convergence_group(f, conv))
    return conv
