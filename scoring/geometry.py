"""Geometry of symmetric positive definite (SPD) matrices: distances, means, log/exp maps, geodesics.

The exact kNN search built on these distances is :mod:`fleetsift.scoring.index`.

Pure numpy (no Prefect). Every function works in float64, symmetrises its inputs and accepts stacks of matrices
with arbitrary leading axes ``(..., d, d)``.

Metrics (``metric=``):

- ``"riemann"``: affine-invariant Riemannian distance, ``||log(B^-1/2 A B^-1/2)||_F`` (Pennec et al. 2006;
  Bhatia 2007, ch. 6).
- ``"logeuclid"``: log-Euclidean distance, ``||log A - log B||_F`` (Arsigny et al. 2007).
- ``"euclid"``: Frobenius distance ``||A - B||_F``.
- ``"logdet"``: square root of the Jensen-Bregman LogDet (Stein) divergence,
  ``sqrt(logdet((A+B)/2) - 0.5 logdet(AB))`` (Sra 2012).
- ``"wasserstein"``: Bures-Wasserstein distance, ``sqrt(tr A + tr B - 2 tr (A^1/2 B A^1/2)^1/2)``
  (Bhatia, Jain & Lim 2019).

Eigenvalues below ``EIG_FLOOR * max eigenvalue`` are clipped to that floor with an :class:`SPDWarning`; a matrix
whose largest eigenvalue is not positive, or that holds non-finite values, raises
:class:`fleetsift.errors.InputError`.
"""

from __future__ import annotations

import warnings

import numpy as np

from fleetsift.errors import InputError
from fleetsift.vocabulary import SPD_METRICS

__all__ = [
    "SPD_METRICS", "EIG_FLOOR", "SPDWarning", "ConvergenceWarning",
    "sqrtm", "invsqrtm", "logm", "expm", "powm",
    "distance", "pairwise_distance", "frechet_mean", "geodesic", "log_map", "exp_map",
    "vec", "unvec",
]

EIG_FLOOR = 1e-12
_SRC = "fleetsift.scoring.geometry"
# Pair batches for the exact kernels: ~8k 14x14 matrices is ~12 MB per temporary, well inside cache-friendly sizes.
_PAIR_CHUNK = 8192
# Entries of the (queries x references) bound matrix held at once.
_BLOCK_ENTRIES = 1 << 22


class SPDWarning(RuntimeWarning):
    """A matrix was not numerically positive definite and its eigenvalues were clipped at the floor."""


class ConvergenceWarning(RuntimeWarning):
    """An iterative mean stopped at ``max_iter`` before reaching ``tol``."""


# --------------------------------------------------------------------------------------------- input checks

def _as_spd(X, name: str = "X", min_ndim: int = 2) -> np.ndarray:
    X = np.asarray(X, dtype=np.float64)
    if X.ndim < min_ndim or X.shape[-1] != X.shape[-2] or X.shape[-1] == 0:
        want = "(d, d)" if min_ndim == 2 else "(n, d, d)"
        raise InputError(_SRC, name, f"square matrices of shape {want} or (..., d, d)", f"shape {X.shape}")
    if not np.all(np.isfinite(X)):
        raise InputError(_SRC, name, "finite values", f"{int(np.sum(~np.isfinite(X)))} non-finite entries")
    return 0.5 * (X + np.swapaxes(X, -1, -2))


def _check_metric(metric: str) -> str:
    if metric not in SPD_METRICS:
        raise InputError(_SRC, "metric", f"one of {SPD_METRICS}", repr(metric))
    return metric


def _clip(w: np.ndarray, what: str = "matrix") -> np.ndarray:
    """Clip eigenvalues (last axis) at EIG_FLOOR * max; warn once per call when anything was clipped."""
    wmax = w.max(axis=-1, keepdims=True) if w.size else w
    if w.size and np.any(wmax <= 0):
        raise InputError(_SRC, what, "positive definite matrices", "a matrix with no positive eigenvalue")
    floor = EIG_FLOOR * wmax
    bad = w < floor
    if np.any(bad):
        n_bad = int(np.count_nonzero(bad.any(axis=-1)))
        warnings.warn(f"{n_bad} {what}(s) not numerically positive definite: eigenvalues clipped at "
                      f"{EIG_FLOOR:g} x largest eigenvalue", SPDWarning, stacklevel=3)
        w = np.maximum(w, floor)
    return w


def _eigh_spd(X: np.ndarray):
    w, V = np.linalg.eigh(X)
    return _clip(w), V


def _from_eig(w: np.ndarray, V: np.ndarray) -> np.ndarray:
    return (V * w[..., None, :]) @ np.swapaxes(V, -1, -2)


# ---------------------------------------------------------------------------------------- matrix functions

def sqrtm(X) -> np.ndarray:
    """Principal square root of SPD matrices ``(..., d, d)`` via a batched eigendecomposition."""
    w, V = _eigh_spd(_as_spd(X))
    return _from_eig(np.sqrt(w), V)


def invsqrtm(X) -> np.ndarray:
    """Inverse principal square root ``X^{-1/2}`` of SPD matrices ``(..., d, d)``."""
    w, V = _eigh_spd(_as_spd(X))
    return _from_eig(1.0 / np.sqrt(w), V)


def logm(X) -> np.ndarray:
    """Principal matrix logarithm of SPD matrices ``(..., d, d)`` (a symmetric matrix)."""
    w, V = _eigh_spd(_as_spd(X))
    return _from_eig(np.log(w), V)


def expm(T) -> np.ndarray:
    """Matrix exponential of symmetric matrices ``(..., d, d)`` (the result is SPD)."""
    T = _as_spd(T, "T")
    w, V = np.linalg.eigh(T)
    return _from_eig(np.exp(w), V)


def powm(X, p: float) -> np.ndarray:
    """Real power ``X^p`` of SPD matrices ``(..., d, d)``."""
    w, V = _eigh_spd(_as_spd(X))
    return _from_eig(w ** float(p), V)


def _sqrt_invsqrt(X: np.ndarray):
    w, V = _eigh_spd(X)
    s = np.sqrt(w)
    return _from_eig(s, V), _from_eig(1.0 / s, V)


# ------------------------------------------------------------------------------------ vectorisation helpers

def _triu(d: int):
    iu = np.triu_indices(d)
    wts = np.where(iu[0] == iu[1], 1.0, np.sqrt(2.0))
    return iu, wts


def vec(S) -> np.ndarray:
    """Upper-triangle vector of symmetric matrices with off-diagonals scaled by sqrt(2).

    The Euclidean norm of ``vec(S)`` equals the Frobenius norm of ``S``, so Frobenius distances become plain
    Euclidean distances between vectors of length d(d+1)/2.
    """
    S = np.asarray(S, dtype=np.float64)
    iu, wts = _triu(S.shape[-1])
    return S[..., iu[0], iu[1]] * wts


def unvec(v, d: int | None = None) -> np.ndarray:
    """Inverse of :func:`vec`: symmetric matrices ``(..., d, d)`` from vectors ``(..., d(d+1)/2)``."""
    v = np.asarray(v, dtype=np.float64)
    p = v.shape[-1]
    if d is None:
        d = int(round((np.sqrt(8 * p + 1) - 1) / 2))
    if d * (d + 1) // 2 != p:
        raise InputError(_SRC, "v", "vectors of length d(d+1)/2", f"length {p}")
    iu, wts = _triu(d)
    S = np.zeros(v.shape[:-1] + (d, d))
    S[..., iu[0], iu[1]] = v / wts
    S[..., iu[1], iu[0]] = v / wts
    return S


# --------------------------------------------------------------------------------------------- distances

def _riemann_from_pencil(S: np.ndarray) -> np.ndarray:
    """Riemannian distance from the whitened matrices S = B^-1/2 A B^-1/2 (eigenvalues = pencil (A, B))."""
    lam = _clip(np.linalg.eigvalsh(S), "matrix pencil")
    return np.sqrt(np.sum(np.log(lam) ** 2, axis=-1))


def _logdet_chol(X: np.ndarray) -> np.ndarray:
    try:
        L = np.linalg.cholesky(X)
        return 2.0 * np.sum(np.log(np.diagonal(L, axis1=-2, axis2=-1)), axis=-1)
    except np.linalg.LinAlgError:
        return np.sum(np.log(_clip(np.linalg.eigvalsh(X))), axis=-1)


def _wasserstein_from(trA, trB, A12BA12) -> np.ndarray:
    lam = np.clip(np.linalg.eigvalsh(A12BA12), 0.0, None)
    d2 = trA + trB - 2.0 * np.sum(np.sqrt(lam), axis=-1)
    return np.sqrt(np.clip(d2, 0.0, None))


def distance(A, B, metric: str = "riemann") -> np.ndarray:
    """Distance between SPD matrices ``A (..., d, d)`` and ``B (..., d, d)`` (leading axes broadcast).

    Returns an array of the broadcast leading shape (a 0-d array for two single matrices).
    """
    _check_metric(metric)
    A, B = _as_spd(A, "A"), _as_spd(B, "B")
    if A.shape[-1] != B.shape[-1]:
        raise InputError(_SRC, "B", f"matrices of size {A.shape[-1]}", f"size {B.shape[-1]}")
    if metric == "riemann":
        P = invsqrtm(B)
        return _riemann_from_pencil(P @ A @ P)
    if metric == "logeuclid":
        return np.sqrt(np.sum((logm(A) - logm(B)) ** 2, axis=(-2, -1)))
    if metric == "euclid":
        return np.sqrt(np.sum((A - B) ** 2, axis=(-2, -1)))
    if metric == "logdet":
        d2 = _logdet_chol(0.5 * (A + B)) - 0.5 * (_logdet_chol(A) + _logdet_chol(B))
        return np.sqrt(np.clip(d2, 0.0, None))
    # wasserstein
    A12 = sqrtm(A)
    return _wasserstein_from(np.trace(A, axis1=-2, axis2=-1), np.trace(B, axis1=-2, axis2=-1), A12 @ B @ A12)


class _Prep:
    """Per-metric precomputation for one set of matrices, so that pair kernels do no per-matrix work.

    ``lb`` are vectors whose Euclidean distances are lower bounds of the metric (or the metric itself for the
    flat metrics): the kNN search prunes with them and refines exactly.
    """

    def __init__(self, X: np.ndarray, metric: str, whiten: np.ndarray | None = None, lb: bool = True):
        self.metric = metric
        self.X = X
        self.n = len(X)
        if metric == "riemann":
            self.P = invsqrtm(X) if len(X) else X.copy()  # X_j^{-1/2}: the pencil side when X is the reference set
            if lb:
                W = whiten
                self.lb = vec(logm(W @ X @ W)) if len(X) else np.zeros((0, X.shape[-1] * (X.shape[-1] + 1) // 2))
        elif metric == "logeuclid":
            self.v = vec(logm(X)) if len(X) else np.zeros((0, X.shape[-1] * (X.shape[-1] + 1) // 2))
            self.lb = self.v
        elif metric == "euclid":
            self.v = vec(X)
            self.lb = self.v
        elif metric == "logdet":
            self.ld = _logdet_chol(X) if len(X) else np.zeros(0)
            # No cheap lower bound is used for the Stein divergence: zero vectors make the search exhaustive.
            self.lb = np.zeros((len(X), 1))
        else:  # wasserstein
            self.tr = np.trace(X, axis1=-2, axis2=-1)
            self.S = sqrtm(X) if len(X) else X.copy()
            # |sqrt(tr A) - sqrt(tr B)| <= d_W(A, B): d_W = min_U ||A^1/2 - B^1/2 U||_F and the reverse triangle
            # inequality of the Frobenius norm (||A^1/2||_F^2 = tr A).
            self.lb = np.sqrt(np.clip(self.tr, 0.0, None))[:, None]

    def take(self, idx: np.ndarray) -> "_Prep":
        out = object.__new__(_Prep)
        out.metric, out.n = self.metric, len(idx)
        for name in ("X", "P", "lb", "v", "ld", "tr", "S"):
            if hasattr(self, name):
                setattr(out, name, getattr(self, name)[idx])
        return out

    def extend(self, other: "_Prep") -> None:
        for name in ("X", "P", "lb", "v", "ld", "tr", "S"):
            if hasattr(self, name):
                setattr(self, name, np.concatenate([getattr(self, name), getattr(other, name)]))
        self.n += other.n


def _pair_exact(q: _Prep, r: _Prep, qi: np.ndarray, rj: np.ndarray) -> np.ndarray:
    """Exact distances between q.X[qi] and r.X[rj] (1-d index arrays of equal length), in pair chunks."""
    out = np.empty(len(qi))
    m = q.metric
    for s in range(0, len(qi), _PAIR_CHUNK):
        a, b = qi[s:s + _PAIR_CHUNK], rj[s:s + _PAIR_CHUNK]
        if m == "riemann":
            P = r.P[b]
            out[s:s + len(a)] = _riemann_from_pencil(P @ q.X[a] @ P)
        elif m in ("logeuclid", "euclid"):
            out[s:s + len(a)] = np.sqrt(np.sum((q.v[a] - r.v[b]) ** 2, axis=-1))
        elif m == "logdet":
            d2 = _logdet_chol(0.5 * (q.X[a] + r.X[b])) - 0.5 * (q.ld[a] + r.ld[b])
            out[s:s + len(a)] = np.sqrt(np.clip(d2, 0.0, None))
        else:
            S = r.S[b]
            out[s:s + len(a)] = _wasserstein_from(q.tr[a], r.tr[b], S @ q.X[a] @ S)
    return out


def _sq_norms(v: np.ndarray) -> np.ndarray:
    return np.einsum("ij,ij->i", v, v)


def pairwise_distance(X, Y=None, metric: str = "riemann") -> np.ndarray:
    """Distances between all pairs of ``X (n, d, d)`` and ``Y (m, d, d)`` -> ``(n, m)``.

    With ``Y=None`` the symmetric matrix of ``X`` against itself is returned; only the upper triangle is computed
    (the diagonal is exactly zero). Riemannian, LogDet and Wasserstein distances are computed exactly in batched
    eigen/Cholesky problems; Euclidean and log-Euclidean ones by one matrix product, with entries prone to
    cancellation recomputed exactly.
    """
    _check_metric(metric)
    X = _as_spd(X, "X", 3)
    sym = Y is None
    Y = X if sym else _as_spd(Y, "Y", 3)
    if Y.shape[-1] != X.shape[-1]:
        raise InputError(_SRC, "Y", f"matrices of size {X.shape[-1]}", f"size {Y.shape[-1]}")
    n, m = len(X), len(Y)
    rp = _Prep(Y, metric, lb=False)
    qp = rp if sym else _Prep(X, metric, lb=False)
    D = np.zeros((n, m))
    if n == 0 or m == 0:
        return D
    if metric in ("euclid", "logeuclid"):
        qn, rn = _sq_norms(qp.v), _sq_norms(rp.v)
        rb = max(1, _BLOCK_ENTRIES // m)
        for a in range(0, n, rb):
            qb, qnb = qp.v[a:a + rb], qn[a:a + rb]
            d2 = qb @ rp.v.T
            d2 *= -2.0
            d2 += qnb[:, None]
            d2 += rn[None, :]
            # Where d^2 is small against the norms the expansion loses digits: recompute by direct difference.
            ii, jj = np.nonzero(d2 < 1e-3 * (qnb[:, None] + rn[None, :]))
            d = np.sqrt(np.clip(d2, 0.0, None))
            d[ii, jj] = _pair_exact(qp, rp, ii + a, jj)
            D[a:a + rb] = d
        if sym:
            D = np.triu(D, 1)
            D = D + D.T
        return D
    rb = max(1, _BLOCK_ENTRIES // m)
    for a in range(0, n, rb):
        b = min(n, a + rb)
        if sym:
            ii, jj = np.nonzero(np.arange(a, b)[:, None] < np.arange(m)[None, :])
        else:
            ii, jj = np.divmod(np.arange((b - a) * m), m)
        ii = ii + a
        D[ii, jj] = _pair_exact(qp, rp, ii, jj)
    if sym:
        D = D + D.T
    return D


# ------------------------------------------------------------------------------------------ maps, geodesics

def log_map(X, ref, metric: str = "riemann") -> np.ndarray:
    """Tangent vectors at ``ref (d, d)`` of ``X (..., d, d)``.

    riemann: ``ref^1/2 logm(ref^-1/2 X ref^-1/2) ref^1/2`` (Pennec et al. 2006); logeuclid:
    ``logm(X) - logm(ref)``; euclid: ``X - ref``.
    """
    X, ref = _as_spd(X), _as_spd(ref, "ref")
    if metric == "riemann":
        R12, Rm12 = _sqrt_invsqrt(ref)
        return R12 @ logm(Rm12 @ X @ Rm12) @ R12
    if metric == "logeuclid":
        return logm(X) - logm(ref)
    if metric == "euclid":
        return X - ref
    raise InputError(_SRC, "metric", "riemann, logeuclid or euclid", repr(metric))


def exp_map(T, ref, metric: str = "riemann") -> np.ndarray:
    """Inverse of :func:`log_map`: SPD matrices from symmetric tangent vectors ``T (..., d, d)`` at ``ref``."""
    T, ref = _as_spd(T, "T"), _as_spd(ref, "ref")
    if metric == "riemann":
        R12, Rm12 = _sqrt_invsqrt(ref)
        return R12 @ expm(Rm12 @ T @ Rm12) @ R12
    if metric == "logeuclid":
        return expm(T + logm(ref))
    if metric == "euclid":
        return T + ref
    raise InputError(_SRC, "metric", "riemann, logeuclid or euclid", repr(metric))


def geodesic(A, B, t, metric: str = "riemann") -> np.ndarray:
    """Point at position ``t`` (0 -> A, 1 -> B) of the geodesic from ``A`` to ``B``.

    riemann: ``A^1/2 (A^-1/2 B A^-1/2)^t A^1/2`` (the weighted geometric mean ``A #_t B``, Bhatia 2007,
    ch. 6); logeuclid: ``expm((1-t) log A + t log B)``; euclid: ``(1-t) A + t B``; wasserstein:
    ``((1-t) I + t T) A ((1-t) I + t T)`` with ``T`` the optimal transport map from A to B (Bhatia, Jain & Lim
    2019). logdet has no closed-form geodesic here and raises.
    """
    _check_metric(metric)
    A, B = _as_spd(A, "A"), _as_spd(B, "B")
    t = np.asarray(t, dtype=np.float64)[..., None, None]
    if metric == "riemann":
        A12, Am12 = _sqrt_invsqrt(A)
        w, V = _eigh_spd(Am12 @ B @ Am12)
        return A12 @ _from_eig(w ** t[..., 0], V) @ A12
    if metric == "logeuclid":
        return expm((1 - t) * logm(A) + t * logm(B))
    if metric == "euclid":
        return (1 - t) * A + t * B
    if metric == "wasserstein":
        A12, Am12 = _sqrt_invsqrt(A)
        T = Am12 @ sqrtm(A12 @ B @ A12) @ Am12
        eye = np.eye(A.shape[-1])
        G = (1 - t) * eye + t * T
        return G @ A @ np.swapaxes(G, -1, -2)
    raise ValueError("geodesic: no closed-form geodesic for metric 'logdet'; use riemann, logeuclid, euclid "
                     "or wasserstein")


# -------------------------------------------------------------------------------------------------- means

def _weights(weights, n: int) -> np.ndarray:
    if weights is None:
        return np.full(n, 1.0 / n)
    w = np.asarray(weights, dtype=np.float64).reshape(-1)
    if w.shape != (n,) or not np.all(np.isfinite(w)) or np.any(w < 0) or w.sum() <= 0:
        raise InputError(_SRC, "weights", f"{n} finite non-negative weights with a positive sum",
                         f"shape {w.shape}" if w.shape != (n,) else "invalid values")
    return w / w.sum()


def frechet_mean(X, metric: str = "riemann", weights=None, tol: float = 1e-10, max_iter: int = 100) -> np.ndarray:
    """Weighted Fréchet mean (minimiser of sum_i w_i d(M, X_i)^2) of ``X (n, d, d)``.

    - euclid: weighted arithmetic mean (closed form).
    - logeuclid: ``expm(sum_i w_i logm X_i)`` (closed form, Arsigny et al. 2007).
    - riemann: the Karcher mean. Two matrices -> their geodesic point at ``t = w_2``; otherwise the Riemannian
      gradient fixed point ``M <- M^1/2 expm(nu sum_i w_i logm(M^-1/2 X_i M^-1/2)) M^1/2`` (Pennec et al. 2006),
      started at the log-Euclidean mean, with step ``nu`` halved whenever the gradient norm grows. Stops when the
      gradient norm (Frobenius, in whitened coordinates) is below ``tol``.
    - logdet: the Stein (S-)mean by the fixed point ``M <- (sum_i w_i ((M + X_i)/2)^-1)^-1`` (Chebbi & Moakher
      2012); stops when the relative change is below ``tol``.
    - wasserstein: the Bures-Wasserstein barycentre by the fixed point
      ``M <- M^-1/2 (sum_i w_i (M^1/2 X_i M^1/2)^1/2)^2 M^-1/2`` (Álvarez-Esteban et al. 2016); stops when the
      relative change is below ``tol``.

    Emits :class:`ConvergenceWarning` when an iterative mean stops at ``max_iter``.
    """
    _check_metric(metric)
    X = _as_spd(X, "X", 3)
    n = len(X)
    if n == 0:
        raise InputError(_SRC, "X", "at least one matrix", "0 matrices")
    w = _weights(weights, n)
    if metric == "euclid":
        return np.tensordot(w, X, axes=1)
    if metric == "logeuclid":
        return expm(np.tensordot(w, logm(X), axes=1))
    nz = np.flatnonzero(w > 0)
    if len(nz) == 1:
        return X[nz[0]].copy()
    if metric == "riemann" and len(nz) == 2:
        i, j = nz
        return geodesic(X[i], X[j], w[j] / (w[i] + w[j]), "riemann")
    X, w = X[nz], w[nz]
    if metric == "riemann":
        return _karcher(X, w, tol, max_iter)
    if metric == "logdet":
        eye = np.eye(X.shape[-1])

        def stein_step(M):  # (sum_i w_i ((M + X_i) / 2)^-1)^-1
            return np.linalg.solve(np.tensordot(w, np.linalg.solve(0.5 * (M + X), eye), axes=1), eye)

        return _fixed_point_mean(X, w, stein_step, "logdet", tol, max_iter)

    def bures_step(M):  # M^-1/2 (sum_i w_i (M^1/2 X_i M^1/2)^1/2)^2 M^-1/2
        M12, Mm12 = _sqrt_invsqrt(M)
        S = np.tensordot(w, sqrtm(M12 @ X @ M12), axes=1)
        return Mm12 @ S @ S @ Mm12

    return _fixed_point_mean(X, w, bures_step, "wasserstein", tol, max_iter)


def _fixed_point_mean(X: np.ndarray, w: np.ndarray, step, metric: str, tol: float, max_iter: int) -> np.ndarray:
    """Iterate ``M <- step(M)`` (symmetrised) from the weighted arithmetic mean until the relative change
    ``||M_new - M||_F / ||M||_F`` is at most ``tol``; warns when ``max_iter`` steps do not get there."""
    M = np.tensordot(w, X, axes=1)
    crit = np.inf
    for _ in range(max_iter):
        M_new = step(M)
        M_new = 0.5 * (M_new + M_new.T)
        crit = np.linalg.norm(M_new - M) / np.linalg.norm(M)
        M = M_new
        if crit <= tol:
            return M
    _warn_conv(metric, max_iter, crit, tol, stacklevel=4)
    return M


def _warn_conv(metric, max_iter, crit, tol, stacklevel=3):
    warnings.warn(f"frechet_mean({metric}) did not converge in {max_iter} iterations "
                  f"(criterion {crit:.3g} > tol {tol:.3g})", ConvergenceWarning, stacklevel=stacklevel)


def _karcher(X: np.ndarray, w: np.ndarray, tol: float, max_iter: int, warn: bool = True) -> np.ndarray:
    M = expm(np.tensordot(w, logm(X), axes=1))
    nu, prev = 1.0, np.inf
    crit = np.inf
    for _ in range(max_iter):
        M12, Mm12 = _sqrt_invsqrt(M)
        J = np.tensordot(w, logm(Mm12 @ X @ Mm12), axes=1)
        crit = float(np.linalg.norm(J))
        if crit <= tol:
            return M
        if crit > prev:
            nu *= 0.5  # overshoot: the fixed-point step is too long for this spread of data
        prev = crit
        M = M12 @ expm(nu * J) @ M12
        M = 0.5 * (M + M.T)
    if warn:
        _warn_conv("riemann", max_iter, crit, tol)
    return M

