"""Window descriptors: one strictly positive definite matrix per time window.

Input windows are arrays ``(n_windows, n_samples, n_channels)`` of float64, already standardised per channel by
the caller. Every estimator here is batched over windows (no Python loop over windows) and matches its
scikit-learn counterpart window by window.
"""

from __future__ import annotations

import numpy as np

from fleetsift.errors import InputError
from fleetsift.profile import Descriptor
from fleetsift.vocabulary import DESCRIPTOR_KINDS, SHRINKAGE_ESTIMATORS

__all__ = ["RIDGE_RANGE", "baseline_ridge", "ledoit_wolf", "oas", "rbf_kernel_matrix", "lagged_covariance",
           "lagged_groups", "gaussian_embedding", "describe"]

_SRC = "fleetsift.featurizers.descriptors"


def _windows(X, min_samples: int = 1) -> np.ndarray:
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 3 or X.shape[2] < 1:
        raise InputError(_SRC, "X", "windows of shape (n_windows, n_samples, n_channels)", f"shape {X.shape}")
    if X.shape[1] < min_samples:
        raise InputError(_SRC, "X", f"at least {min_samples} samples per window", f"{X.shape[1]} samples")
    if not np.all(np.isfinite(X)):
        raise InputError(_SRC, "X", "finite values", f"{int(np.sum(~np.isfinite(X)))} non-finite samples")
    return X


def _empirical(X: np.ndarray):
    Xc = X - X.mean(axis=1, keepdims=True)
    emp = np.swapaxes(Xc, 1, 2) @ Xc / X.shape[1]
    return Xc, emp


def _shrink(emp: np.ndarray, s: np.ndarray, mu: np.ndarray) -> np.ndarray:
    out = (1.0 - s)[:, None, None] * emp
    idx = np.arange(emp.shape[-1])
    out[:, idx, idx] += (s * mu)[:, None]
    return out


def _lw_shrinkage(Xc: np.ndarray, emp: np.ndarray) -> np.ndarray:
    # Ledoit & Wolf 2004 (J. Multivariate Anal. 88), in the form scikit-learn's ledoit_wolf_shrinkage computes.
    n, p = Xc.shape[1], Xc.shape[2]
    X2 = Xc ** 2
    tr = np.sum(X2, axis=1) / n  # diagonal of the empirical covariance
    mu = np.sum(tr, axis=1) / p
    beta_ = np.sum(np.sum(X2, axis=2) ** 2, axis=1)  # = sum of the entries of X2^T X2
    delta_ = np.sum(emp ** 2, axis=(1, 2))  # = sum((X^T X)^2) / n^2
    beta = (beta_ / n - delta_) / (p * n)
    delta = (delta_ - 2.0 * mu * tr.sum(axis=1) + p * mu ** 2) / p
    beta = np.minimum(beta, delta)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.where((beta == 0) | (delta <= 0), 0.0, beta / delta)
    return s, mu


def ledoit_wolf(X) -> np.ndarray:
    """Ledoit-Wolf shrunk covariance of each window -> ``(n_windows, c, c)``.

    Equal, window by window, to ``sklearn.covariance.ledoit_wolf(x, assume_centered=False)[0]`` (Ledoit & Wolf
    2004): ``(1 - s) S + s mu I`` with ``S`` the biased empirical covariance and ``mu = tr(S) / c``.
    """
    X = _windows(X)
    Xc, emp = _empirical(X)
    if X.shape[2] == 1:
        return emp
    s, mu = _lw_shrinkage(Xc, emp)
    return _shrink(emp, s, mu)


def oas(X) -> np.ndarray:
    """Oracle Approximating Shrinkage covariance of each window -> ``(n_windows, c, c)``.

    Equal, window by window, to ``sklearn.covariance.oas(x)[0]`` (Chen, Wiesel, Eldar & Hero 2010, in
    scikit-learn's formulation: shrinkage ``min((a + mu^2) / ((n + 1)(a - mu^2 / c)), 1)`` with ``a`` the mean
    squared entry of S).
    """
    X = _windows(X)
    _, emp = _empirical(X)
    n, p = X.shape[1], X.shape[2]
    if p == 1:
        return emp
    alpha = np.mean(emp ** 2, axis=(1, 2))
    mu = np.trace(emp, axis1=1, axis2=2) / p
    num = alpha + mu ** 2
    den = (n + 1) * (alpha - mu ** 2 / p)
    with np.errstate(divide="ignore", invalid="ignore"):
        s = np.where(den == 0, 1.0, np.minimum(num / den, 1.0))
    return _shrink(emp, s, mu)


def rbf_kernel_matrix(X, gamma=None, ridge: float = 1e-6) -> np.ndarray:
    """RBF (Gaussian) kernel between the channels of each window, plus ``ridge * I`` -> ``(n_windows, c, c)``.

    Each channel's sample vector (length n_samples) is one point: ``K_ij = exp(-gamma ||x_i - x_j||^2)``, i.e.
    ``sklearn.metrics.pairwise.rbf_kernel(x.T, gamma=gamma) + ridge * I`` per window.

    ``gamma=None`` uses the median heuristic per window: ``gamma = 1 / median(||x_i - x_j||^2 over i < j)``
    (squared distances, distinct channel pairs; common practice). If that median is 0 (channels all identical),
    ``gamma = 1``. ``gamma`` may also be a scalar or one value per window. The kernel is positive semi-definite
    (Schoenberg); the ridge makes it strictly positive definite even with duplicated channels.
    """
    X = _windows(X)
    Z = np.swapaxes(X, 1, 2)  # (w, c, n): channels as points
    sq = np.einsum("wcn,wcn->wc", Z, Z)
    D2 = sq[:, :, None] + sq[:, None, :] - 2.0 * (Z @ np.swapaxes(Z, 1, 2))
    np.maximum(D2, 0.0, out=D2)
    c = X.shape[2]
    idx = np.arange(c)
    D2[:, idx, idx] = 0.0
    if gamma is None:
        if c > 1:
            iu = np.triu_indices(c, 1)
            med = np.median(D2[:, iu[0], iu[1]], axis=1)
        else:
            med = np.zeros(len(X))
        g = np.where(med > 0, 1.0 / np.where(med > 0, med, 1.0), 1.0)
    else:
        g = np.broadcast_to(np.asarray(gamma, dtype=np.float64), (len(X),))
        if not np.all(np.isfinite(g)) or np.any(g <= 0):
            raise InputError(_SRC, "gamma", "a positive finite number (or one per window)", repr(gamma))
    K = np.exp(-g[:, None, None] * D2)
    K[:, idx, idx] += float(ridge)
    return K


def lagged_groups(n_channels: int, lags: int) -> np.ndarray:
    """Channel index of each dimension of the delay embedding ``[x(t), x(t-1), ..., x(t-L)]``.

    Dimensions are lag-major: dim ``l * n_channels + ch`` is channel ``ch`` delayed by ``l`` samples.
    """
    return np.tile(np.arange(int(n_channels)), int(lags) + 1)


def _delay_embed(X: np.ndarray, lags: int) -> np.ndarray:
    n = X.shape[1]
    return np.concatenate([X[:, lags - l:n - l, :] for l in range(lags + 1)], axis=2)


def lagged_covariance(X, lags: int = Descriptor.lags, shrinkage: str = Descriptor.shrinkage) -> np.ndarray:
    """Shrunk covariance of the delay embedding ``[x(t), x(t-1), ..., x(t-L)]`` -> ``(w, c(L+1), c(L+1))``.

    Captures the windows' dynamics (auto- and cross-covariances up to lag L) as well as their spread. Rows are
    the ``n_samples - L`` time steps with a full history; ``shrinkage`` is ``"ledoit_wolf"`` or ``"oas"``.
    The channel of each dimension is :func:`lagged_groups`.
    """
    lags = int(lags)
    if lags < 0:
        raise InputError(_SRC, "lags", "an integer >= 0", lags)
    X = _windows(X, min_samples=lags + 2)
    E = _delay_embed(X, lags)
    if shrinkage == SHRINKAGE_ESTIMATORS[0]:
        return ledoit_wolf(E)
    if shrinkage == SHRINKAGE_ESTIMATORS[1]:
        return oas(E)
    raise InputError(_SRC, "shrinkage", f"one of {SHRINKAGE_ESTIMATORS}", repr(shrinkage))


def gaussian_embedding(mean, cov) -> np.ndarray:
    """Embed Gaussians ``N(mean, cov)`` into SPD(c+1): ``[[cov + mu mu^T, mu], [mu^T, 1]]`` (Calvo & Oller 1990).

    ``mean (..., c)``, ``cov (..., c, c)``. The result is positive definite exactly when ``cov`` is (its Schur
    complement on the last entry is ``cov``), and ``det`` equals ``det(cov)``.
    """
    mu = np.asarray(mean, dtype=np.float64)
    cov = np.asarray(cov, dtype=np.float64)
    c = cov.shape[-1]
    if mu.shape[-1] != c or cov.shape[-2] != c:
        raise InputError(_SRC, "mean", f"vectors of length {c} matching cov", f"shape {mu.shape}")
    shape = np.broadcast_shapes(mu.shape[:-1], cov.shape[:-2])
    out = np.empty(shape + (c + 1, c + 1))
    out[..., :c, :c] = cov + mu[..., :, None] * mu[..., None, :]
    out[..., :c, c] = mu
    out[..., c, :c] = mu
    out[..., c, c] = 1.0
    return out


# Bounds of the automatic ridge, in units of a channel's variance over the baseline (our choice): exactly dependent
# or constant channels never remove the floor, and the floor never exceeds a channel's own variance.
RIDGE_RANGE = (0.05, 1.0)


def baseline_ridge(samples) -> float:
    """The automatic noise floor of the descriptors: the smallest eigenvalue of the baseline's channel
    correlation matrix, clipped to :data:`RIDGE_RANGE`.

    ``samples (n, c)`` are the baseline's samples; channels constant over them are left out. In the standardised
    units the descriptors are computed in (every channel of variance 1 over the baseline), the correlation
    matrix is the samples' covariance, and its smallest eigenvalue is the variance of the direction in which normal operation varies least; a window
    covariance that varies less than that in some direction is floored there instead of letting that direction's
    estimation noise dominate the affine-invariant distance. Chosen without labels: it depends only on the
    baseline's own spectrum.
    """
    x = np.asarray(samples, dtype=np.float64)
    if x.ndim != 2 or x.shape[0] < 2:
        raise InputError(_SRC, "samples", "baseline samples of shape (n >= 2, channels)", f"shape {x.shape}")
    x = x[np.all(np.isfinite(x), axis=1)]
    var = x.var(axis=0)
    live = var > 1e-9
    lo, hi = RIDGE_RANGE
    if live.sum() == 0 or len(x) < 2:
        return lo
    C = np.corrcoef(x[:, live], rowvar=False).reshape(int(live.sum()), int(live.sum()))
    return float(np.clip(np.linalg.eigvalsh(C)[0], lo, hi))


def describe(X, kind: str = Descriptor.kind, include_mean: bool = Descriptor.include_mean, lags: int = Descriptor.lags,
             ridge: float | str = Descriptor.ridge, shrinkage: str = Descriptor.shrinkage):
    """SPD descriptor of every window -> ``(descriptors (n, d, d), groups (d,))``.

    ``kind``: ``"covariance"`` (shrunk covariance, c x c), ``"rbf"`` (kernel between channels,
    :func:`rbf_kernel_matrix` with the median heuristic), ``"lagged"`` (:func:`lagged_covariance`,
    c(L+1) x c(L+1)); ``shrinkage`` (``"ledoit_wolf"``, Ledoit & Wolf 2004, or ``"oas"``, Chen et al. 2010) is the
    estimator of both covariance kinds. ``ridge * I`` is added to every matrix so each is strictly positive
    definite (smallest eigenvalue >= ridge) even for windows with more channels than samples, constant or
    duplicated channels; ``ridge="auto"`` takes :func:`baseline_ridge` of the windows' own samples (the windows
    are then their own baseline).

    ``include_mean`` embeds the window mean: ``[[C + mu mu^T, mu], [mu^T, 1]]`` (Calvo & Oller 1990) with ``C``
    the matrix above (for ``rbf`` this is the same block construction around the kernel matrix, without the
    Gaussian interpretation; for ``lagged`` ``mu`` is the mean of the embedded vectors).

    ``groups`` maps each dimension to its channel index, ``-1`` for the extra dimension of the mean embedding.
    """
    if kind not in DESCRIPTOR_KINDS:
        raise InputError(_SRC, "kind", f"one of {DESCRIPTOR_KINDS}", repr(kind))
    if shrinkage not in SHRINKAGE_ESTIMATORS:
        raise InputError(_SRC, "shrinkage", f"one of {SHRINKAGE_ESTIMATORS}", repr(shrinkage))
    X = _windows(X, min_samples=(int(lags) + 2) if kind == "lagged" else 2)
    if isinstance(ridge, str):
        if ridge != "auto":
            raise InputError(_SRC, "ridge", 'a positive finite number or "auto"', repr(ridge))
        ridge = baseline_ridge(X.reshape(-1, X.shape[2]))
    ridge = float(ridge)
    if not np.isfinite(ridge) or ridge <= 0:
        raise InputError(_SRC, "ridge", "a positive finite number", ridge)
    c = X.shape[2]
    if kind == DESCRIPTOR_KINDS[0]:
        C = ledoit_wolf(X) if shrinkage == SHRINKAGE_ESTIMATORS[0] else oas(X)
        mu, groups = X.mean(axis=1), np.arange(c)
    elif kind == "rbf":
        C, mu, groups = rbf_kernel_matrix(X, None, ridge=0.0), X.mean(axis=1), np.arange(c)
    else:
        C = lagged_covariance(X, lags=lags, shrinkage=shrinkage)
        mu = _delay_embed(X, int(lags)).mean(axis=1)
        groups = lagged_groups(c, lags)
    C = 0.5 * (C + np.swapaxes(C, 1, 2))
    d = C.shape[-1]
    C[:, np.arange(d), np.arange(d)] += ridge
    if include_mean:
        C = gaussian_embedding(mu, C)
        groups = np.concatenate([groups, [-1]])
    return C, groups.astype(np.int64)
