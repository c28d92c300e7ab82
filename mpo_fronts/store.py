"""The on-disk layout of runs (HDF5), atomic writes, claims, resume, checkpoints, merge and loading.

A run directory holds::

    run.json                  the resolved run description, its fingerprint, the package version
    realizations/r00007.h5    one file per finished realization (see "Realization files" below)
    claims/r00007.claim       present while a process computes realization 7 (host, pid, run id, progress)
    checkpoints/r00007.h5     the evolving operator of an unfinished realization, saved every few minutes
    .lock                     taken (``fcntl.flock``) for the short moments of creating or taking over claims

Every file is written to a temporary name in the same folder, flushed, fsynced and renamed into place, so a
killed process never leaves a half-written result; a realization file that exists is complete.

Claims make concurrent runs on one directory safe: a realization is computed only by the process that holds its
claim. A claim is taken over when its owner is dead (same host, process gone), when its heartbeat (the file's
modification time, refreshed every few seconds by a thread of the owner) is older than ``run.claim_timeout``
seconds, or when it belongs to the same run (a task that Dask retried after its worker died).

Realization files hold ``times``; per probe ``otoc/<v>`` = C[t, r] (the mean over the basis states for
product-state runs, with the individual states in ``state_otoc/<v>`` of shape (samples, n_t, L) and the
bitstrings in ``bits``); ``weights`` (n_t, L, 4) single-site Pauli weights (I, X, Y, Z); ``right_weight``
(n_t, L); ``discarded_weight`` and ``max_bond`` (n_t,); ``bond_discarded`` and ``bond_entropy`` (n_t, L-1),
the discarded weight and the operator entanglement entropy per bond (from 0.2 on); ``fields`` (L,) in S^z
units (NaN for the mixed-field Ising chain, which has no per-site fields); ``couplings`` (L-1,); ``seed`` (k, ensemble seed); ``wall_time``
(seconds, summed over restarts); and as attributes the package version, :data:`mpo_fronts.CONVENTIONS`, the
resolved description (JSON), and the engine settings (chi, dt, Trotter order, cutoff, chunk, and ``max_step``,
the largest Trotter step actually used). Every dataset carries the attributes ``axes``, ``units`` and ``meaning``
(:data:`DATASETS`).

:func:`load` reads a run directory, a merged file (:func:`merge`), or a convergence study directory (written by
``fronts converge``), and returns an :class:`Ensemble`.

The code lives in three modules, re-exported here: :mod:`mpo_fronts.atomic` (atomic writes),
:mod:`mpo_fronts.rundir` (the run directory: run.json, results, claims, checkpoints, status) and
:mod:`mpo_fronts.results` (loading, merging, the :class:`Ensemble`).
"""

from __future__ import annotations

from .atomic import atomic_h5
from .results import (Ensemble, _write_convergence_group, convergence_runs, load, merge,  # noqa: F401
                      read_convergence, write_convergence_group)
from .rundir import (CHECKPOINT_FORMAT, CONVERGENCE_FILE, DATASETS, MERGED_FORMAT, RESULT_FORMAT,  # noqa: F401
                     RUN_FILE, Claim, ClaimInfo, RunDirectory, RunStatus, run_status)

__all__ = ["RunDirectory", "Claim", "ClaimInfo", "Ensemble", "load", "merge", "run_status", "atomic_h5",
           "RUN_FILE", "RESULT_FORMAT", "MERGED_FORMAT", "CONVERGENCE_FILE", "DATASETS", "convergence_runs",
           "read_convergence", "write_convergence_group", "RunStatus"]
