"""PCA of frame embeddings (numpy only, so the fleet step never imports torch)."""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from fleetsift.errors import InputError


def fit_pca(X: np.ndarray, n_components: int) -> dict[str, np.ndarray]:
    """Principal components of the rows of ``X`` by SVD of the centred data (float64).

    Returns ``dict(mean (d,), components (k, d), explained_variance (k,))`` with the sign convention of
    scikit-learn >= 1.5 (the largest-magnitude entry of each component is positive), variance with ddof=1.
    """
    X = np.asarray(X, dtype=np.float64)
    if X.ndim != 2 or not np.all(np.isfinite(X)):
        raise InputError("embeddings", "X", "a finite 2-D array", f"shape {X.shape}")
    n, d = X.shape
    k = int(n_components)
    if not 1 <= k <= min(n, d):
        raise InputError("profile", "pca_dim", f"an integer in [1, min(n_samples, n_features)] = [1, {min(n, d)}]", k)
    mean = X.mean(axis=0)
    _, s, vt = np.linalg.svd(X - mean, full_matrices=False)
    comps = vt[:k]
    signs = np.sign(comps[np.arange(k), np.argmax(np.abs(comps), axis=1)])
    signs[signs == 0] = 1.0
    comps = comps * signs[:, None]
    var = s[:k] ** 2 / max(n - 1, 1)
    return {"mean": mean, "components": np.ascontiguousarray(comps), "explained_variance": var}


def apply_pca(X: np.ndarray, pca: Mapping[str, np.ndarray]) -> np.ndarray:
    """Project rows of ``X`` onto a fitted PCA basis: ``(X - mean) @ components.T`` (float64)."""
    X = np.asarray(X, dtype=np.float64)
    mean, comps = np.asarray(pca["mean"]), np.asarray(pca["components"])
    if X.ndim != 2 or X.shape[1] != mean.shape[0]:
        raise InputError("embeddings", "X", f"a 2-D array with {mean.shape[0]} columns", f"shape {X.shape}")
    return (X - mean) @ comps.T
