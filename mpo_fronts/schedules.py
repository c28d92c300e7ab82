"""Trotter schedules and step plans: which layers a time step applies, and how steps land on output times.

A time step tau applies, bond by bond, the gates of exp(-i H_b tau') in a brickwork pattern: all even bonds
(0,1), (2,3), ... (parity 0), then all odd bonds (parity 1), following the schedule of the chosen order:

* order 2, splitting ``standard`` (Strang's symmetric splitting): E(tau/2) O(tau) E(tau/2);
* order 2, splitting ``omelyan``: E(a tau) O(tau/2) E((1-2a) tau) O(tau/2) E(a tau) with
  a = 0.1931833275037836, the second-order two-stage scheme with the smallest leading error norm
  (I. P. Omelyan, I. M. Mryglod, R. Folk, Comput. Phys. Commun. 146, 188 (2002), eq. (20); value from memory,
  its order is verified in tests/test_schedules.py); two layers of each parity per step;
* order 4, splitting ``standard``: five second-order steps of lengths p, p, 1-4p, p, p (times tau) with
  p = 1/(4 - 4^(1/3)) (Suzuki's fractal composition, M. Suzuki, Phys. Lett. A 146, 319 (1990)), adjacent half
  layers merged;
* order 4, splitting ``blanes_moan``: the six-stage fourth-order scheme S6 of S. Blanes and P. C. Moan,
  J. Comput. Appl. Math. 142, 313 (2002), Table 2 (coefficients from memory; their order is verified in
  tests/test_schedules.py), with much smaller error constants than Suzuki's composition.

Consecutive layers of the same parity are merged, so a second-order step costs two layers. The step plan
depends only on the requested times, dt and chunk, so a run resumed from a checkpoint repeats the
uninterrupted one exactly.
"""

from __future__ import annotations

from numbers import Integral, Real

import numpy as np

from .errors import InputError

__all__ = ["ORDERS", "SPLITTINGS", "DEFAULT_CHUNK", "step_layers", "block_layers", "step_plan", "time_grid",
           "check_times", "check_positive", "check_splitting", "layers_per_step"]

ORDERS = (2, 4)
#: Splittings available for each order (``standard`` first: Strang for order 2, Suzuki for order 4).
SPLITTINGS = {2: ("standard", "omelyan"), 4: ("standard", "blanes_moan")}
DEFAULT_CHUNK = 20
_P4 = 1.0 / (4.0 - 4.0 ** (1.0 / 3.0))
_OMELYAN = 0.1931833275037836
# Blanes & Moan (2002) S6, order 4: a_1..a_4 (first operator), b_1..b_3 (second), symmetric.
_BM_A = (0.0792036964311957, 0.353172906049774, -0.0420650803577195)
_BM_B = (0.209515106613362, -0.143851773179818)


def check_splitting(order: int, splitting: str) -> str:
    if isinstance(order, bool) or order not in ORDERS:
        raise InputError(f"order must be 2 or 4 (Trotter order), got {order!r}", arg="order")
    if splitting not in SPLITTINGS[order]:
        raise InputError(f"splitting must be one of {', '.join(repr(x) for x in SPLITTINGS[order])} for order "
                         f"{order}, got {splitting!r}", arg="splitting")
    return splitting


def step_layers(order: int, splitting: str = "standard") -> list[tuple[int, float]]:
    """Layers of one Trotter step as (parity, fraction of tau); parity 0 = even bonds (0,1), (2,3), ..."""
    check_splitting(order, splitting)
    if order == 2 and splitting == "standard":
        return [(0, 0.5), (1, 1.0), (0, 0.5)]
    if order == 2:
        a = _OMELYAN
        return [(0, a), (1, 0.5), (0, 1.0 - 2.0 * a), (1, 0.5), (0, a)]
    if splitting == "standard":
        out: list[tuple[int, float]] = []
        for c in (_P4, _P4, 1.0 - 4.0 * _P4, _P4, _P4):
            out += [(0, 0.5 * c), (1, c), (0, 0.5 * c)]
        return _merge(out)
    a1, a2, a3 = _BM_A
    a4 = 1.0 - 2.0 * (a1 + a2 + a3)
    b1, b2 = _BM_B
    b3 = 0.5 - (b1 + b2)
    return [(0, a1), (1, b1), (0, a2), (1, b2), (0, a3), (1, b3), (0, a4), (1, b3), (0, a3), (1, b2), (0, a2),
            (1, b1), (0, a1)]


def layers_per_step(order: int, splitting: str = "standard") -> int:
    """Gate layers per Trotter step once the end layers of consecutive steps are merged (the cost per step)."""
    return len(_merge(step_layers(order, splitting) * 2)) // 2


def _merge(layers: list[tuple[int, float]]) -> list[tuple[int, float]]:
    out: list[tuple[int, float]] = []
    for parity, c in layers:
        if out and out[-1][0] == parity:
            out[-1] = (parity, out[-1][1] + c)
        else:
            out.append((parity, c))
    return out


def block_layers(order: int, n_steps: int, tau: float, splitting: str = "standard") -> list[tuple[int, float]]:
    """The merged layer sequence (parity, duration) of ``n_steps`` Trotter steps of length tau."""
    one = step_layers(order, splitting)
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
