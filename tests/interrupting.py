"""Interrupting one realization of a run directory in-process after a given number of progress calls."""

import pytest

from mpo_fronts.ensemble import compute_realization


class Stop(Exception):
    """Raised from the progress callback to interrupt a realization between blocks."""


def interrupt_repeatedly(rd, d, k: int = 0, stops=(3, 2, 4)):
    """Run realization k of run directory rd (description d) and stop it after stops[i] progress calls, once per
    entry; yields after each interrupt so the caller can inspect the checkpoint left behind."""
    for n_stop in stops:
        calls = {"n": 0}

        def prog(_k, _t, n_stop=n_stop):
            calls["n"] += 1
            if calls["n"] == n_stop:
                raise Stop

        with pytest.raises(Stop):
            compute_realization(str(rd.path), d.to_dict(), k, f"attempt-{n_stop}", progress=prog)
        yield n_stop
