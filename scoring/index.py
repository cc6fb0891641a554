"""Exact k-nearest-neighbour search over reference sets of SPD matrices, pruned by cheap lower bounds.

Pure numpy (no Prefect). The distances and the per-matrix precomputation come from
:mod:`fleetsift.scoring.geometry`; this module adds the index that reuses them across queries.
"""

from __future__ import annotations

import numpy as np

from fleetsift.errors import InputError
from fleetsift.scoring.geometry import (_BLOCK_ENTRIES, _Prep, _as_spd, _check_metric, _karcher, _pair_exact,
                                        _sq_norms, invsqrtm)

__all__ = ["KNNIndex", "knn"]

_SRC = "fleetsift.scoring.index"


def _lb2_block(qv, qn, rv, rn):
    """Round-off-safe squared lower bounds ``(1 - 1e-9)(|q|^2 + |r|^2) - 2 q.r``, clipped at 0, by one GEMM.

    The cancellation error of ``|q|^2 + |r|^2 - 2 q.r`` is a few ulps of the norms (common practice bound); the
    1e-9 relative margin is far above it, so a pruned candidate can never be a true neighbour.
    """
    d2 = qv @ rv.T
    d2 *= -2.0
    d2 += (1.0 - 1e-9) * qn[:, None]
    d2 += (1.0 - 1e-9) * rn[None, :]
    np.maximum(d2, 0.0, out=d2)
    return d2


class KNNIndex:
    """Exact k-nearest-neighbour search over a reference set of SPD matrices, reusable across queries.

    Construction precomputes everything that depends on the references only. For ``riemann`` this is each
    reference's ``R_j^{-1/2}`` and the log-Euclidean coordinates of the references whitened by a fixed point
    ``W`` (default: a few Karcher iterations on the references). Because the affine-invariant distance is
    congruence invariant, ``d_R(Q, R) = d_R(W Q W, W R W) >= ||log(W Q W) - log(W R W)||_F`` (exponential metric
    increasing property, Bhatia 2007 ch. 6; equation number not checked), so one matrix product gives a lower
    bound of every query x reference distance. Candidates are then refined exactly, in order of their bound
    and in batched generalized eigenvalue problems, only while their bound is below the current k-th exact
    distance. The result equals brute force (up to round-off and ties). ``logeuclid``/``euclid`` use the same
    machinery with the exact distance as its own bound; ``wasserstein`` prunes with ``|sqrt(tr Q) - sqrt(tr R)|``;
    ``logdet`` is exhaustive.

    ``add`` appends references, ``drop_first`` removes the oldest ones; the whitening point stays fixed (any
    point keeps the bound valid).
    """

    def __init__(self, references, metric: str = "riemann", whiten_point=None):
        self.metric = _check_metric(metric)
        R = _as_spd(references, "references", 3)
        self.d = R.shape[-1]
        if metric == "riemann":
            if whiten_point is None:
                if len(R) == 0:
                    raise InputError(_SRC, "references", "at least one reference matrix", "0")
                whiten_point = _karcher(R, np.full(len(R), 1.0 / len(R)), tol=1e-6, max_iter=8, warn=False)
            self.W = invsqrtm(_as_spd(whiten_point, "whiten_point"))
        else:
            self.W = None
        self._r = _Prep(R, metric, self.W)
        self._rn = _sq_norms(self._r.lb)

    def __len__(self) -> int:
        return self._r.n

    @property
    def references(self) -> np.ndarray:
        return self._r.X

    def add(self, X) -> None:
        """Append references ``X (n, d, d)`` (or one ``(d, d)``)."""
        X = _as_spd(X, "X")
        X = X.reshape(-1, self.d, self.d)
        p = _Prep(X, self.metric, self.W)
        self._r.extend(p)
        self._rn = np.concatenate([self._rn, _sq_norms(p.lb)])

    def drop_first(self, n: int) -> None:
        """Remove the ``n`` oldest references."""
        keep = np.arange(int(n), self._r.n)
        self._r = self._r.take(keep)
        self._rn = self._rn[keep]

    def query(self, queries, k: int, exclude=None, approximate: bool = False, _self: bool = False):
        """k nearest references of each query -> ``(dist (n, k), idx (n, k))``, ascending.

        ``exclude`` is an optional bool array ``(n, m)``: True where reference j must not count for query i.
        Rows with fewer than k allowed references are padded with ``inf`` / ``-1``. ``approximate=True`` only
        refines the ``max(4k, 32)`` candidates with the smallest bounds (fast, not guaranteed exact).
        """
        Q = _as_spd(queries, "queries", 3)
        if Q.shape[-1] != self.d:
            raise InputError(_SRC, "queries", f"matrices of size {self.d}", f"size {Q.shape[-1]}")
        k = int(k)
        if k < 1:
            raise InputError(_SRC, "k", "an integer >= 1", k)
        n, m = len(Q), self._r.n
        if exclude is not None:
            exclude = np.asarray(exclude, dtype=bool)
            if exclude.shape != (n, m):
                raise InputError(_SRC, "exclude", f"bool array of shape {(n, m)}", f"shape {exclude.shape}")
        dist = np.full((n, k), np.inf)
        idx = np.full((n, k), -1, dtype=np.int64)
        if n == 0 or m == 0:
            return dist, idx
        if _self:
            qp, qn = self._r, self._rn  # queries are the references: reuse their preparation
        else:
            qp = _Prep(Q, self.metric, self.W)
            qn = _sq_norms(qp.lb)
        rb = max(1, _BLOCK_ENTRIES // m)
        for a in range(0, n, rb):
            b = min(n, a + rb)
            ex = None if exclude is None else exclude[a:b]
            dist[a:b], idx[a:b] = self._query_block(qp, qn, a, b, k, ex, approximate)
        return dist, idx

    def query_groups(self, queries, k: int, groups, exclude=None, _self: bool = False):
        """The closest allowed reference of each of the k nearest *groups* -> ``(dist (n, k), idx (n, k))``.

        ``groups (m,)`` labels every reference (its recording, say); column j holds the distance to, and the index
        of, the closest reference of the j-th nearest group, so no two columns of a row share a group. Exact: each
        of the k rounds is an exact 1-NN search (:meth:`query`) that also excludes the groups already found for
        that query. Rows with fewer than k allowed groups are padded with ``inf`` / ``-1``.
        """
        groups = np.asarray(groups).ravel()
        m = self._r.n
        if groups.shape != (m,):
            raise InputError(_SRC, "groups", f"one group label per reference ({m})", f"shape {groups.shape}")
        Q = self._r.X if _self else _as_spd(queries, "queries", 3)
        n = len(Q)
        ex = np.zeros((n, m), bool) if exclude is None else np.array(exclude, dtype=bool, copy=True)
        if ex.shape != (n, m):
            raise InputError(_SRC, "exclude", f"bool array of shape {(n, m)}", f"shape {ex.shape}")
        k = int(k)
        if k < 1:
            raise InputError(_SRC, "k", "an integer >= 1", k)
        _, codes = np.unique(groups, return_inverse=True)
        dist = np.full((n, k), np.inf)
        idx = np.full((n, k), -1, dtype=np.int64)
        for j in range(k):
            d1, i1 = self.query(Q, 1, exclude=ex, _self=_self)
            hit = i1[:, 0] >= 0
            if not hit.any():
                break
            dist[hit, j], idx[hit, j] = d1[hit, 0], i1[hit, 0]
            ex[hit] |= codes[None, :] == codes[i1[hit, 0]][:, None]  # that group is found for that query
        return dist, idx

    def _query_block(self, qp, qn, a, b, k, ex, approximate):
        r = self._r
        m = r.n
        nb = b - a
        lb2 = _lb2_block(qp.lb[a:b], qn[a:b], r.lb, self._rn)
        if ex is not None:
            lb2[ex] = np.inf
        rows = np.arange(nb)
        best_d = np.full((nb, k), np.inf)
        best_i = np.full((nb, k), -1, dtype=np.int64)

        def merge(ri, cj, dd):
            # Scatter new exact distances per row next to the current best and keep the k smallest.
            if len(ri) == 0:
                return
            order = np.lexsort((dd, ri))
            ri, cj, dd = ri[order], cj[order], dd[order]
            counts = np.bincount(ri, minlength=nb)
            width = int(counts.max())
            starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
            pos = np.arange(len(ri)) - starts[ri]
            nd = np.full((nb, width), np.inf)
            ni = np.full((nb, width), -1, dtype=np.int64)
            nd[ri, pos], ni[ri, pos] = dd, cj
            allD = np.concatenate([best_d, nd], axis=1)
            allI = np.concatenate([best_i, ni], axis=1)
            o = np.argsort(allD, axis=1, kind="stable")[:, :k]
            best_d[:] = np.take_along_axis(allD, o, 1)
            best_i[:] = np.take_along_axis(allI, o, 1)

        # Round 0: the c0 smallest bounds of every row.
        c0 = min(m, max(4 * k, 32) if approximate else max(2 * k, 16))
        if c0 < m:
            first = np.argpartition(lb2, c0 - 1, axis=1)[:, :c0]
        else:
            first = np.broadcast_to(np.arange(m), (nb, m))
        fl = np.take_along_axis(lb2, first, 1)
        ok = np.isfinite(fl)
        ri, cj = np.nonzero(ok)
        cj = first[ri, cj]
        merge(ri, cj, _pair_exact(qp, r, ri + a, cj))
        if approximate or c0 >= m:
            return best_d, best_i
        lb2[rows[:, None], first] = np.inf  # already exact

        # Remaining candidates: bound below the current k-th exact distance, refined in bound order in rounds
        # that double in size; the k-th distance shrinks as rounds go, pruning the tail.
        kth2 = best_d[:, -1] ** 2
        cand = lb2 < kth2[:, None]
        ri, cj = np.nonzero(cand)
        if len(ri) == 0:
            return best_d, best_i
        lbs = lb2[ri, cj]
        order = np.lexsort((lbs, ri))
        ri, cj, lbs = ri[order], cj[order], lbs[order]
        counts = np.bincount(ri, minlength=nb)
        starts = np.concatenate([[0], np.cumsum(counts)[:-1]])
        rank = np.arange(len(ri)) - starts[ri]
        p, step = 0, max(k, 8)
        while True:
            sel = (rank >= p) & (rank < p + step)
            if not sel.any():
                break
            kth2 = best_d[:, -1] ** 2
            sel &= lbs < kth2[ri]
            if sel.any():
                merge(ri[sel], cj[sel], _pair_exact(qp, r, ri[sel] + a, cj[sel]))
            # Rows whose next bound already exceeds their k-th distance are finished; drop them to keep masks small.
            kth2 = best_d[:, -1] ** 2
            alive = (rank >= p + step) & (lbs < kth2[ri])
            ri, cj, lbs, rank = ri[alive], cj[alive], lbs[alive], rank[alive]
            if len(ri) == 0:
                break
            p += step
            step *= 2
        return best_d, best_i


def knn(queries, references, k: int, metric: str = "riemann", exclude=None, approximate: bool = False):
    """Exact k nearest references of each query -> ``(dist (n, k), idx (n, k))``, ascending by distance.

    ``queries (n, d, d)``, ``references (m, d, d)``; ``exclude`` optional bool ``(n, m)``, True where reference j
    must not count for query i. With fewer than k allowed references a row is padded with ``inf`` distances and
    index ``-1``. For ``riemann`` the search prunes with a log-Euclidean lower bound in the space whitened by the
    references' Karcher mean and refines exactly (see :class:`KNNIndex`), so it returns the brute-force answer
    without computing all n*m eigenproblems. ``approximate=True`` skips the exact guarantee (see
    :meth:`KNNIndex.query`).
    """
    index = KNNIndex(references, metric)
    same = queries is references
    return index.query(index.references if same else queries, k, exclude=exclude, approximate=approximate,
                       _self=same)
