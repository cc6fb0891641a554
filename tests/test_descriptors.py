"""Window descriptors: agreement with scikit-learn, published constructions, strict PD on degenerate windows."""

import numpy as np
import pytest
from scipy.spatial.distance import pdist
from sklearn.covariance import ledoit_wolf as sk_ledoit_wolf
from sklearn.covariance import oas as sk_oas
from sklearn.metrics.pairwise import rbf_kernel

from fleetsift.featurizers import descriptors as de
from fleetsift.errors import InputError
from fleetsift.vocabulary import DESCRIPTOR_KINDS


def windows(seed, n_windows=6, n_samples=80, n_channels=5):
    rng = np.random.default_rng(seed)
    mix = rng.standard_normal((n_channels, n_channels))
    return rng.standard_normal((n_windows, n_samples, n_channels)) @ mix + rng.standard_normal(n_channels)


@pytest.mark.parametrize("shape", [(5, 80, 5), (4, 6, 12), (3, 40, 1), (2, 2, 3)])
def test_ledoit_wolf_and_oas_match_sklearn(shape):
    # scikit-learn's ledoit_wolf (Ledoit & Wolf 2004) and oas (Chen et al. 2010), assume_centered=False.
    X = windows(1, *shape)
    lw, o = de.ledoit_wolf(X), de.oas(X)
    for i, x in enumerate(X):
        np.testing.assert_allclose(lw[i], sk_ledoit_wolf(x, assume_centered=False)[0], rtol=1e-10, atol=1e-13)
        np.testing.assert_allclose(o[i], sk_oas(x, assume_centered=False)[0], rtol=1e-10, atol=1e-13)


def test_rbf_kernel_matches_sklearn():
    # sklearn.metrics.pairwise.rbf_kernel with channels as points, plus ridge * I.
    X = windows(2, 4, 60, 6)
    K = de.rbf_kernel_matrix(X, gamma=0.01, ridge=1e-4)
    for i, x in enumerate(X):
        np.testing.assert_allclose(K[i], rbf_kernel(x.T, gamma=0.01) + 1e-4 * np.eye(6), rtol=1e-12, atol=1e-14)


def test_rbf_median_heuristic():
    # gamma = 1 / median of squared distances between distinct channels (scipy pdist as independent reference).
    X = windows(3, 3, 50, 7)
    K = de.rbf_kernel_matrix(X, ridge=1e-6)
    for i, x in enumerate(X):
        gamma = 1.0 / np.median(pdist(x.T, "sqeuclidean"))
        np.testing.assert_allclose(K[i], rbf_kernel(x.T, gamma=gamma) + 1e-6 * np.eye(7), rtol=1e-10, atol=1e-13)


def test_lagged_covariance_is_shrunk_covariance_of_delay_embedding():
    X = windows(4, 3, 40, 3)
    L = 2
    C = de.lagged_covariance(X, lags=L)
    assert C.shape == (3, 9, 9)
    for i, x in enumerate(X):
        # Rows t = L..n-1 of [x(t), x(t-1), x(t-2)], written out by hand.
        E = np.hstack([x[2:], x[1:-1], x[:-2]])
        np.testing.assert_allclose(C[i], sk_ledoit_wolf(E)[0], rtol=1e-10, atol=1e-13)
    np.testing.assert_array_equal(de.lagged_groups(3, 2), [0, 1, 2, 0, 1, 2, 0, 1, 2])
    Co = de.lagged_covariance(X, lags=1, shrinkage="oas")
    np.testing.assert_allclose(Co[0], sk_oas(np.hstack([X[0][1:], X[0][:-1]]))[0], rtol=1e-10, atol=1e-13)


def test_gaussian_embedding_is_second_moment_of_augmented_vector():
    # [[S + mu mu^T, mu], [mu^T, 1]] = E[(x, 1)(x, 1)^T] with the biased covariance S (Calvo & Oller 1990).
    X = windows(5, 2, 30, 4)
    mu = X.mean(axis=1)
    S = np.stack([np.cov(x.T, bias=True) for x in X])
    G = de.gaussian_embedding(mu, S)
    aug = np.concatenate([X, np.ones(X.shape[:2] + (1,))], axis=2)
    np.testing.assert_allclose(G, aug.transpose(0, 2, 1) @ aug / X.shape[1], rtol=1e-12, atol=1e-12)
    # det of the embedding = det(cov) (Schur complement on the last entry).
    np.testing.assert_allclose(np.linalg.det(G), np.linalg.det(S), rtol=1e-9)


def _degenerate_windows():
    rng = np.random.default_rng(6)
    wide = rng.standard_normal((3, 5, 10))  # more channels than samples
    const = rng.standard_normal((3, 40, 5))
    const[:, :, 2] = 0.0  # a constant channel (standardised by the caller -> 0)
    dup = rng.standard_normal((3, 40, 5))
    dup[:, :, 4] = dup[:, :, 1]  # two identical channels
    flat = np.zeros((2, 20, 4))  # nothing moves at all
    return {"wide": wide, "const": const, "dup": dup, "flat": flat}


@pytest.mark.parametrize("kind", DESCRIPTOR_KINDS)
@pytest.mark.parametrize("case", ["wide", "const", "dup", "flat"])
@pytest.mark.parametrize("include_mean", [False, True])
def test_describe_is_strictly_positive_definite_on_rank_deficient_windows(kind, case, include_mean):
    X = _degenerate_windows()[case]
    lags = 1 if case == "wide" else 3
    D, groups = de.describe(X, kind=kind, include_mean=include_mean, lags=lags, ridge=1e-6)
    c = X.shape[2]
    d = c * (lags + 1) if kind == "lagged" else c
    assert D.shape == (len(X), d + include_mean, d + include_mean)
    assert groups.shape == (d + include_mean,)
    assert groups.dtype.kind == "i"
    np.testing.assert_allclose(D, D.transpose(0, 2, 1), atol=0)
    w = np.linalg.eigvalsh(D)
    assert np.all(w > 0)
    np.linalg.cholesky(D)  # raises if not numerically PD
    if not include_mean:
        assert np.all(w >= 1e-6 * (1 - 1e-6))  # the ridge is a floor on the spectrum
    if include_mean:
        assert groups[-1] == -1
    assert set(groups[groups >= 0]) == set(range(c))


def test_describe_without_degeneracy_is_estimator_plus_ridge():
    X = windows(7, 3, 60, 4)
    D, g = de.describe(X, kind="covariance", shrinkage="oas", include_mean=False, ridge=1e-3)
    np.testing.assert_allclose(D, de.oas(X) + 1e-3 * np.eye(4), rtol=1e-13)
    np.testing.assert_array_equal(g, [0, 1, 2, 3])
    D2, g2 = de.describe(X, kind="covariance", include_mean=True, ridge=1e-3)
    np.testing.assert_allclose(D2, de.gaussian_embedding(X.mean(axis=1), de.ledoit_wolf(X) + 1e-3 * np.eye(4)),
                               rtol=1e-13)
    np.testing.assert_array_equal(g2, [0, 1, 2, 3, -1])


def test_bad_windows_raise_input_error():
    with pytest.raises(InputError):
        de.describe(np.zeros((10, 3)))
    bad = windows(8)
    bad[0, 3, 1] = np.nan
    with pytest.raises(InputError):
        de.describe(bad)
    with pytest.raises(InputError, match="kind"):  # an estimator is not a kind (it was before 0.3)
        de.describe(windows(8), kind="ledoit_wolf")
    with pytest.raises(InputError, match="shrinkage"):
        de.describe(windows(8), shrinkage="rbf")
    with pytest.raises(InputError):
        de.describe(windows(8, n_samples=3), kind="lagged", lags=3)
    with pytest.raises(InputError):
        de.describe(windows(8), ridge=0.0)
