"""Truncation of a two-site block: one registry of routes, the optimal SVD and its faster relatives, the ledger.

Every gate of the engine ends in :func:`split`, which factorizes the (possibly Z2 block-diagonal) two-site
matrix ``theta`` and keeps at most ``chi`` singular values (:func:`keep_count`). How it is factorized is a
*route*: a function registered in :data:`ROUTES` under a name, with one signature::

    split_blocks(blocks, chi, cutoff, to_right, shape) -> (parts, discarded, used)

``blocks`` are ``(label, rows, cols, matrix)`` (one block when ungraded), ``parts`` one ``(left, right)`` pair
per block, ``discarded`` the weight not kept (exactly: the ledger must equal the norm loss), ``used`` the name of
the route that actually ran. The engine's settings, the run-description check, the per-route counters and the
benchmarks all derive from :data:`ROUTES` (:func:`route_names`); a benchmark that wants to observe or replace
a route registers a wrapped one with :func:`register_route` instead of patching private functions.

:class:`TruncationLedger` is the record of what truncation removed: the total (summed in gate order, so that
resumed runs repeat uninterrupted ones bit for bit), the same weight per bond, and how many gates took each
route.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from .errors import InputError

__all__ = ["split", "keep_count", "rsvd_samples", "Route", "ROUTES", "register_route", "unregister_route", "route", "route_names",
           "TruncationLedger", "svd_route", "SVD_FLOOR", "EIGH_TRUST", "EIGH_MIN_DIM", "RSVD_OVERSAMPLE", "RSVD_POWER",
           "RSVD_SEED"]

SVD_FLOOR = 1e-13
EIGH_TRUST = 1e-10  # one Gram eigendecomposition pass resolves eigenvalues down to this fraction of its largest
EIGH_MIN_DIM = 48  # below this matrix size the SVD is cheap and the Gram route gains nothing
RSVD_OVERSAMPLE = 16  # columns of the randomized range finder beyond the chi it must capture
RSVD_POWER = 2  # subspace iterations of the randomized route
RSVD_SEED = 20261202  # its test matrices are fixed: runs, resumed runs and workers repeat each other exactly


# -------------------------------------------------------------------------------------------- registry
@dataclass(frozen=True)
class Route:
    """A named way of splitting a two-site block (see the module doc for the signature of ``split_blocks``)."""

    name: str
    split_blocks: Callable
    summary: str = ""


#: Route name -> :class:`Route`. Read it through :func:`route` and :func:`route_names`.
ROUTES: dict[str, Route] = {}


def register_route(name: str, split_blocks: Callable, summary: str = "", *, replace: bool = False) -> Route:
    """Register a truncation route under ``name`` (``replace=True`` to wrap or swap an existing one)."""
    if not isinstance(name, str) or not name.isidentifier():
        raise InputError(f"a truncation route needs a name that is an identifier, got {name!r}", arg="name")
    if name in ROUTES and not replace:
        raise InputError(f"truncation route {name!r} is registered already; pass replace=True to swap it",
                         arg="replace")
    r = Route(name, split_blocks, summary)
    ROUTES[name] = r
    return r


def unregister_route(name: str) -> None:
    """Remove a registered route (benchmarks remove the wrapped routes they registered)."""
    ROUTES.pop(name, None)


def route_names() -> tuple[str, ...]:
    """Names of the registered routes, sorted."""
    return tuple(sorted(ROUTES))


def route(name: str) -> Route:
    """The registered route ``name``; an InputError naming the argument ``truncation`` otherwise."""
    r = ROUTES.get(name) if isinstance(name, str) else None
    if r is None:
        raise InputError(f"truncation must be one of {', '.join(map(repr, route_names()))}, got {name!r}",
                         arg="truncation")
    return r


# -------------------------------------------------------------------------------------------- ledger
@dataclass
class TruncationLedger:
    """What truncation removed: total weight, the same weight per bond, gates per route.

    ``total`` is summed in gate order (not ``by_bond.sum()``, which rounds differently), so a run resumed from
    a checkpoint repeats the uninterrupted one bit for bit; ``by_bond[b]`` is the weight dropped at bond b
    (between sites b and b + 1) and sums to ``total`` to rounding.
    """

    by_bond: np.ndarray
    total: float = 0.0
    splits: dict[str, int] = field(default_factory=dict)

    @classmethod
    def empty(cls, n_bonds: int) -> "TruncationLedger":
        return cls(np.zeros(max(n_bonds, 0)), 0.0, {name: 0 for name in route_names()})

    def add(self, bond: int, weight: float, used: str) -> None:
        self.total += weight
        self.by_bond[bond] += weight
        self.splits[used] = self.splits.get(used, 0) + 1

    def state(self) -> dict:
        return {"discarded_weight": self.total, "bond_discarded": self.by_bond.copy(), "splits": dict(self.splits)}

    @classmethod
    def from_state(cls, state: dict, n_bonds: int) -> "TruncationLedger":
        """Rebuild from :meth:`state` (a checkpoint without per-bond weights gets zeros there)."""
        led = cls.empty(n_bonds)
        led.total = float(state["discarded_weight"])
        if state.get("bond_discarded") is not None:
            led.by_bond = np.array(state["bond_discarded"], dtype=float).reshape(-1)
        led.splits.update({k: int(v) for k, v in dict(state.get("splits") or {}).items()})
        return led


# -------------------------------------------------------------------------------------------- truncation
def keep_count(s: np.ndarray, chi: int, cutoff: float = 0.0) -> int:
    """How many of the descending singular values ``s`` a truncation keeps (at least one).

    At most ``chi``; values at or below ``SVD_FLOOR * s[0]`` are numerical zeros; then the smallest kept values are
    dropped while their summed square stays at or below ``cutoff``.
    """
    k = min(chi, int(np.count_nonzero(s > SVD_FLOOR * s[0]))) if s[0] > 0 else 1
    if cutoff > 0 and k > 1:
        tail = np.cumsum((s[k - 1::-1] ** 2))  # tail[j] = sum of the j+1 smallest kept values squared
        extra = int(np.searchsorted(tail, cutoff, side="right"))
        k = max(1, k - extra)
    return max(k, 1)


def split(theta: np.ndarray, chi: int, cutoff: float, to_right: bool, row_par=None, col_par=None,
          truncation: str = "svd"):
    """Truncated factorization ``theta ~ left @ right`` by the registered route ``truncation``.

    ``to_right``: ``left`` has orthonormal columns and ``right`` carries the weight (the orthogonality centre
    moves right); otherwise ``right`` has orthonormal rows. ``row_par``/``col_par``: Z2 parities of the rows and
    columns of a block-diagonal ``theta`` (graded engine), or None.

    The routes (see :data:`ROUTES`): ``'svd'``, LAPACK gesdd (gesvd on failure), the optimal rank-k projection;
    ``'rsvd'``, :func:`_rsvd` on every block at least twice as large (both sides) as the ``chi +
    RSVD_OVERSAMPLE`` columns it samples, the SVD on the others, the weight outside the sampled subspace joining
    the discarded weight, so the ledger stays the norm loss; ``'eigh'``, eigendecomposition of the Gram matrix on
    the shorter side of each block (after a QR when the isometric side is the longer one), refined in the
    orthogonal complement until the kept spectrum is resolved (:func:`_gram_top`), the weight-carrying factor the
    exact projection of theta on the kept vectors (no division by singular values); matrices smaller than
    ``EIGH_MIN_DIM`` go to the SVD.

    Returns ``left, right, labels, discarded, route``: labels are the parities of the kept bond index (None when
    ungraded), discarded is the summed squared singular values (eigenvalues) dropped plus any weight the route
    did not sample, route is the name of the route that actually ran (a fallback reports 'svd').
    """
    blocks = _blocks(theta, row_par, col_par)
    parts, disc, used = route(truncation).split_blocks(blocks, chi, cutoff, to_right, theta.shape)
    return (*_assemble(theta.shape, blocks, parts, graded=row_par is not None), disc, used)


def _blocks(theta, row_par, col_par):
    """``[(label, rows, cols, matrix)]``: the nonzero Z2 blocks of theta, or one block that is theta itself."""
    if row_par is None:
        return [(0, None, None, theta)]
    out = []
    for p in (0, 1):
        r, c = np.flatnonzero(row_par == p), np.flatnonzero(col_par == p)
        if r.size and c.size:
            out.append((p, r, c, theta.take(r, axis=0).take(c, axis=1)))  # take: cheaper than ix_ here
    return out


def _split_svd(blocks, chi, cutoff, to_right, randomized=False, svd=None):
    l = chi + RSVD_OVERSAMPLE
    svd = _svd if svd is None else svd
    sampled = [randomized and rsvd_samples(m.shape, chi) for *_, m in blocks]
    svds = [_rsvd(m, l) if r else (*svd(m), 0.0) for r, (*_, m) in zip(sampled, blocks)]
    s_all = np.concatenate([x[1] for x in svds])
    order = np.argsort(-s_all, kind="stable")
    k = keep_count(s_all[order], chi, cutoff)
    kept = np.zeros(s_all.size, dtype=bool)
    kept[order[:k]] = True
    disc = float(np.sum(s_all[~kept] ** 2)) + sum(x[3] for x in svds)
    parts, off = [], 0
    for u, s, vt, _ in svds:
        kp = int(np.count_nonzero(kept[off:off + s.size]))  # a block's kept values are its largest ones
        off += s.size
        u, s, vt = u[:, :kp], s[:kp], vt[:kp]
        parts.append((u, s[:, None] * vt) if to_right else (u * s, vt))
    return parts, disc, any(sampled)


def rsvd_samples(shape, chi: int) -> bool:
    """Whether the randomized route samples a block of this shape (both sides >= 2 (chi + RSVD_OVERSAMPLE));
    smaller blocks take the SVD, which is faster there (the crossover was measured; see the README, Performance)."""
    return min(shape) >= 2 * (chi + RSVD_OVERSAMPLE)


def _test_matrix(n: int, l: int) -> np.ndarray:
    """The fixed Gaussian test matrix (n, l) of the randomized route.

    One array per l, grown when a larger n is asked for; rows are drawn in order from a generator seeded by
    ``(RSVD_SEED, l)``, so the (n, l) matrix is the first n rows whatever was asked before: the truncation of a
    given block does not depend on the history of the process (resumed runs and workers agree bit for bit).
    """
    om = _TEST_MATRICES.get(l)
    if om is None or om.shape[0] < n:
        om = np.random.default_rng([RSVD_SEED, l]).standard_normal((max(n, 4 * l), l))
        _TEST_MATRICES[l] = om
    return om[:n]


_TEST_MATRICES: dict[int, np.ndarray] = {}


def _rsvd(m: np.ndarray, l: int):
    """SVD of m restricted to an l-dimensional subspace found by randomized subspace iteration.

    Halko, Martinsson & Tropp, SIAM Rev. 53, 217 (2011), Algorithm 4.4 (randomized subspace iteration): Y = m
    Omega for a Gaussian Omega (n, l), then ``RSVD_POWER`` times Y = m basis(m^T basis(Y)), every product
    re-based so that small singular values are not lost to rounding as in plain powers (m m^T)^q m Omega. The
    intermediate bases are the unit lower-trapezoidal LU factors with partial pivoting (same column space, well
    conditioned, cheaper than a QR; LU re-basing as in Li et al., ACM TOMS 43, 28 (2017),
    "Algorithm 971", cited from memory), the last one a QR, Q = orth(Y); then the exact SVD of the small
    projection B = Q^T m = u s vt. Returns ``Q u, s, vt, rest`` with rest = |m|^2 - |B|^2, the weight of m
    outside span(Q), which the truncation adds to the discarded weight: |m - Q u_k s_k vt_k|^2 = rest +
    sum_{i>k} s_i^2 exactly (rest is a difference of weights of order |m|^2, exact to rounding of that size).
    The singular values s are those of B, lower bounds of m's. With l = chi + 16 and two iterations, on the
    gate matrices of the engine at L = 32, chi = 32-128, the truncation error exceeds the optimal one by at
    most 2.2e-11 (absolute weight; ``scripts/bench/floor.py``, column rsvd_err).
    """
    from scipy.linalg import lu

    q = m @ _test_matrix(m.shape[1], l)
    for _ in range(RSVD_POWER):
        q = lu(q, permute_l=True, overwrite_a=True, check_finite=False)[0]
        q = lu(m.T @ q, permute_l=True, overwrite_a=True, check_finite=False)[0]
        q = m @ q
    q = np.linalg.qr(q)[0]
    b = q.T @ m
    u, s, vt = _svd(b)
    rest = max(float(np.sum(m * m)) - float(np.sum(s * s)), 0.0)
    return q @ u, s, vt, rest


def _gram_top(m: np.ndarray, chi: int, floor2: float):
    """Top left singular vectors of m (at most chi) and their squared singular values, from Gram matrices.

    One eigendecomposition of m m^T resolves the eigenvalues down to ``EIGH_TRUST`` of the largest (below that,
    rounding of order eps * lambda_max dominates). If more vectors are needed, the rest of the spectrum is
    resolved in the orthogonal complement of the vectors taken: m is projected on it and the step repeats, each
    pass reaching ``EIGH_TRUST`` deeper, until chi vectors are taken or what is left is below ``floor2``
    (numerical zeros, like the SVD's floor). Returns (vectors (rows, k), eigenvalues (k,), weight not taken).
    """
    vecs, lams = [], []
    need = min(chi, m.shape[0])
    basis = None  # orthonormal basis of the current complement, in the original row space (None: all rows)
    x = m
    while True:
        lam, vec = np.linalg.eigh(x @ x.T)
        lam, vec = lam[::-1], vec[:, ::-1]
        top = lam[0]
        if not top > floor2:  # only numerical zeros remain
            return _stack(vecs, lams, m.shape[0]), max(float(np.sum(np.clip(lam, 0.0, None))), 0.0)
        take = min(need, int(np.count_nonzero(lam >= EIGH_TRUST * top)))
        v = vec[:, :take]
        vecs.append(v if basis is None else basis @ v)
        lams.append(lam[:take])
        need -= take
        if need == 0 or take == lam.size:
            rest = float(np.sum(np.clip(lam[take:], 0.0, None)))
            return _stack(vecs, lams, m.shape[0]), rest
        comp = vec[:, take:]
        basis = comp if basis is None else basis @ comp
        x = comp.T @ x


def _stack(vecs, lams, rows):
    if not vecs:
        return np.zeros((rows, 0)), np.zeros(0)
    return np.ascontiguousarray(np.hstack(vecs)), np.concatenate(lams)


def _split_eigh(blocks, chi, cutoff, to_right):
    mats = [m if to_right else m.T for *_, m in blocks]  # the rows of each matrix get the isometry
    floor2 = (SVD_FLOOR ** 2) * max(float(np.sum(m * m)) for m in mats)
    reduced = []
    for m in mats:
        if m.shape[0] > m.shape[1]:  # the Gram matrix on the shorter side: m = q r, decompose r
            q, r = np.linalg.qr(m)
            reduced.append((q, r))
        else:
            reduced.append((None, m))
    tops = [_gram_top(r, chi, floor2) for _, r in reduced]
    lam_all = np.concatenate([lam for (_, lam), _ in tops])
    order = np.argsort(-lam_all, kind="stable")
    lam_sorted = np.clip(lam_all[order], 0.0, None)
    if lam_sorted.size == 0 or not lam_sorted[0] > 0:  # pragma: no cover - theta has unit weight
        return None
    k = keep_count(np.sqrt(lam_sorted), chi, cutoff)
    kept = np.zeros(lam_all.size, dtype=bool)
    kept[order[:k]] = True
    disc = float(np.sum(lam_sorted[k:])) + sum(rest for _, rest in tops)
    parts, off = [], 0
    for (q, r), ((vec, lam), _) in zip(reduced, tops):
        sel = kept[off:off + lam.size]
        off += lam.size
        v = vec[:, sel]
        w = v.T @ r  # the exact projection of the block on the kept vectors: no division by singular values
        if q is not None:
            v = q @ v
        parts.append((v, w) if to_right else (w.T, v.T))
    return parts, disc


def _assemble(shape, blocks, parts, graded):
    """Put the blockwise factors into full ``left (m, k)``, ``right (k, n)``; labels of the kept bond index."""
    if not graded:
        return parts[0][0], parts[0][1], None
    ks = [left.shape[1] for left, _ in parts]
    k = sum(ks)
    left = np.zeros((shape[0], k))
    right = np.zeros((k, shape[1]))
    lab = np.empty(k, dtype=np.int8)
    off = 0
    for (p, r, c, _), (lp, rp), kp in zip(blocks, parts, ks):
        left[r, off:off + kp] = lp
        right[off:off + kp, c] = rp
        lab[off:off + kp] = p
        off += kp
    if k == 0:  # pragma: no cover - theta has unit weight, some block is nonzero
        raise RuntimeError("empty truncation")
    return left, right, lab


def _svd(m: np.ndarray):
    try:
        return np.linalg.svd(m, full_matrices=False)
    except np.linalg.LinAlgError:  # pragma: no cover - rare convergence failure of gesdd
        import scipy.linalg

        return scipy.linalg.svd(m, full_matrices=False, lapack_driver="gesvd")


# -------------------------------------------------------------------------------------------- the routes
def svd_route(svd: Callable, name: str = "svd") -> Callable:
    """A route function that splits every block with ``svd(m) -> (u, s, vt)`` instead of LAPACK's (benchmarks
    plug other decompositions in this way; ``s`` descending, and any weight the decomposition does not return
    must be in ``s`` for the ledger to stay the norm loss). The route reports itself as ``name``."""
    def split_blocks(blocks, chi, cutoff, to_right, shape):
        parts, disc, _ = _split_svd(blocks, chi, cutoff, to_right, svd=svd)
        return parts, disc, name
    return split_blocks


def _route_svd(blocks, chi, cutoff, to_right, shape):
    parts, disc, _ = _split_svd(blocks, chi, cutoff, to_right)
    return parts, disc, "svd"


def _route_rsvd(blocks, chi, cutoff, to_right, shape):
    parts, disc, randomized = _split_svd(blocks, chi, cutoff, to_right, randomized=True)
    return parts, disc, "rsvd" if randomized else "svd"


def _route_eigh(blocks, chi, cutoff, to_right, shape):
    if min(shape) >= EIGH_MIN_DIM:
        out = _split_eigh(blocks, chi, cutoff, to_right)
        if out is not None:
            return out[0], out[1], "eigh"
    return _route_svd(blocks, chi, cutoff, to_right, shape)


register_route("svd", _route_svd, "LAPACK SVD (gesdd, gesvd on failure): the optimal truncation")
register_route("rsvd", _route_rsvd, "randomized subspace iteration on saturated blocks, then the SVD of the "
                                    "projection; sampled-out weight in the ledger")
register_route("eigh", _route_eigh, "Gram-matrix eigendecompositions with refinement passes, exact projection")
