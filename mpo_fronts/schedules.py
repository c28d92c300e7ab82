"""Trotter schedules and step plans: which layers a time step applies, and how steps land on output times.

A time step tau applies, bond by bond, the gates of exp(-i H_b tau') in a brickwork pattern: all even bonds
(0,1), (2,3), ... (parity 0), then all odd bonds (parity 1), following the schedule of the chosen order:

* order 2 (symmetric splitting): E(tau/2) O(tau) E(tau/2);
* order 4: five second-order steps of lengths p, p, 1-4p, p, p (times tau) with p = 1/(4 - 4^(1/3))
  (Suzuki's fractal composition), adjacent half layers merged.

Consecutive layers of the same parity are merged, so a second-order step costs two layers. The step plan
depends only on the requested times, dt and chunk, so a run resumed from a checkpoint repeats the
uninterrupted one exactly.
"""

from __future__ import annotations

from numbers import Integral, Real

import numpy as np

from .errors import InputError

__all__ = ["ORDERS", "DEFAULT_CHUNK", "step_layers", "block_layers", "step_plan", "time_grid", "check_times",
           "check_positive"]

ORDERS = (2, 4)
DEFAULT_CHUNK = 20
_P4 = 1.0 / (4.0 - 4.0 ** (1.0 / 3.0))


def step_layers(order: int) -> list[tuple[int, float]]:
    """Layers of one Trotter step as (parity, fraction of tau); parity 0 = even bonds (0,1), (2,3), ..."""
    if order == 2:
        return [(0, 0.5), (1, 1.0), (0, 0.5)]
    if order == 4:
        out: list[tuple[int, float]] = []
        for c in (_P4, _P4, 1.0 - 4.0 * _P4, _P4, _P4):
            out += [(0, 0.5 * c), (1, c), (0, 0.5 * c)]
        return _merge(out)
    raise InputError(f"order must be 2 or 4 (Trotter order), got {order!r}")


def _merge(layers: list[tuple[int, float]]) -> list[tuple[int, float]]:
    out: list[tuple[int, float]] = []
    for parity, c in layers:
        if out and out[-1][0] == parity:
            out[-1] = (parity, out[-1][1] + c)
        else:
            out.append((parity, c))
    return out


def block_layers(order: int, n_steps: int, tau: float) -> list[tuple[int, float]]:
    """The merged layer sequence (parity, duration) of ``n_steps`` Trotter steps of length tau."""
    one = step_layers(order)
    return [(p, c * tau) for p, c in _merge(one * n_steps)]


def check_times(times, t0: float = 0.0) -> np.ndarray:
    try:
        ts = np.asarray(times, dtype=float).reshape(-1)
    except (TypeError, ValueError):
        raise InputError(f"times must be a sequence of real numbers, got {times!r}") from None
    if ts.size == 0:
        raise InputError("times must contain at least one time")
    if not np.all(np.isfinite(ts)):
        raise InputError("times must be finite (no nan or inf)")
    if ts[0] < t0 - 1e-12:
        raise InputError(f"times must be >= {t0} (the start time), got {ts[0]}")
    if np.any(np.diff(ts) <= 0):
        k = int(np.flatnonzero(np.diff(ts) <= 0)[0])
        raise InputError(f"times must be strictly increasing; times[{k}] = {ts[k]} >= times[{k + 1}] = {ts[k + 1]}")
    return ts


def step_plan(times, dt: float, chunk: int = DEFAULT_CHUNK, t0: float = 0.0) -> list[tuple[int, int, float]]:
    """Blocks of equal Trotter steps that land exactly on every requested time.

    The interval between consecutive output times (starting from t0) is cut into n = ceil(length / dt) equal
    steps of tau = length / n <= dt, grouped into blocks of at most ``chunk`` steps.

    Returns
    -------
    list of (k, n_steps, tau)
        ``k`` is the index of the output time that the block leads to; output k is due after its last block.
        An output at t0 has a block with n_steps = 0.
    """
    ts = check_times(times, t0)
    dt = check_positive("dt", dt)
    plan: list[tuple[int, int, float]] = []
    prev = t0
    for k, t in enumerate(ts):
        length = t - prev
        n = int(np.ceil(length / dt - 1e-9)) if length > 0 else 0
        if n == 0:
            plan.append((k, 0, 0.0))
        else:
            tau = length / n
            left = n
            while left > 0:
                m = min(chunk, left)
                plan.append((k, m, tau))
                left -= m
        prev = t
    return plan


def time_grid(start: float, stop: float, num: int, spacing: str = "log") -> np.ndarray:
    """An output time grid: ``num`` times from start to stop, log- or linearly spaced (start > 0 for log)."""
    if spacing not in ("log", "linear"):
        raise InputError(f"spacing must be 'log' or 'linear', got {spacing!r}")
    if not (isinstance(num, Integral) and num >= 1):
        raise InputError(f"num must be a positive integer, got {num!r}")
    if spacing == "log":
        if not start > 0:
            raise InputError(f"a log-spaced time grid needs start > 0, got start = {start}")
        return np.geomspace(start, stop, num)
    return np.linspace(start, stop, num)


def check_positive(name: str, value) -> float:
    if isinstance(value, bool) or not isinstance(value, Real) or not np.isfinite(value) or value <= 0:
        raise InputError(f"{name} must be a positive finite number, got {value!r}")
    return float(value)
