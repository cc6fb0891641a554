"""SPD geometry: closed forms, invariances, agreement with scipy / pyriemann 0.12, exact kNN."""

import warnings

import numpy as np
import pytest
import scipy.linalg as sla
from hypothesis import given, settings
from hypothesis import strategies as st

from fleetsift.scoring import geometry
from fleetsift.scoring import index as knn_index
from fleetsift.scoring.index import KNNIndex, knn
from fleetsift.vocabulary import SPD_METRICS
from fleetsift.errors import InputError

warnings.filterwarnings("ignore", category=DeprecationWarning, module="pyriemann")
pr_dist = pytest.importorskip("pyriemann.geometry.distance")
pr_mean = pytest.importorskip("pyriemann.geometry.mean")


def random_spd(rng, n, d, lo=-1.5, hi=1.5):
    """Random orthogonal eigenvectors and log-uniform eigenvalues in [e^lo, e^hi]."""
    Q = np.linalg.qr(rng.standard_normal((n, d, d)))[0]
    w = np.exp(rng.uniform(lo, hi, (n, d)))
    return (Q * w[:, None, :]) @ Q.transpose(0, 2, 1)


A2 = np.array([[2.0, 1.0], [1.0, 2.0]])
B2 = np.diag([1.0, 4.0])


# ------------------------------------------------------------------------------------------- closed forms

def test_riemann_scalar_multiple_of_identity():
    # d_R(I, cI) = sqrt(n) |ln c| (Bhatia 2007, ch. 6: eigenvalues of the pencil are all c).
    assert geometry.distance(np.eye(2), 2 * np.eye(2)) == pytest.approx(np.sqrt(2) * np.log(2), abs=1e-14)
    assert geometry.distance(np.eye(5), 2 * np.eye(5)) == pytest.approx(np.sqrt(5) * np.log(2), abs=1e-14)


def test_riemann_to_identity_is_norm_of_log():
    # eig([[2,1],[1,2]]) = {3, 1}, so d_R(A, I) = ||(ln 3, ln 1)|| = ln 3 (Bhatia 2007, ch. 6).
    assert geometry.distance(A2, np.eye(2)) == pytest.approx(np.log(3), abs=1e-14)


def test_brief_numbers_for_A_B():
    # Independent check with scipy first: generalized eigenvalues for riemann, scipy.linalg.logm for logeuclid
    # (definitions: Pennec et al. 2006; Arsigny et al. 2007). The brief's values agree to 10 decimals.
    ref_r = np.sqrt(np.sum(np.log(sla.eigh(A2, B2, eigvals_only=True)) ** 2))
    ref_le = np.linalg.norm(np.real(sla.logm(A2)) - np.real(sla.logm(B2)), "fro")
    assert ref_r == pytest.approx(1.3028482876, abs=1e-10)
    assert ref_le == pytest.approx(1.2671862514, abs=1e-10)
    assert geometry.distance(A2, B2, "riemann") == pytest.approx(ref_r, abs=1e-13)
    assert geometry.distance(A2, B2, "logeuclid") == pytest.approx(ref_le, abs=1e-13)


def test_geodesic_midpoint_of_commuting_matrices():
    # For commuting matrices A #_1/2 B = (AB)^1/2 (Bhatia 2007, ch. 4/6): I # diag(4,1) = diag(2,1).
    np.testing.assert_allclose(geometry.geodesic(np.eye(2), np.diag([4.0, 1.0]), 0.5), np.diag([2.0, 1.0]),
                               atol=1e-14)


def test_geodesic_endpoints_and_distance_fraction():
    rng = np.random.default_rng(1)
    A, B = random_spd(rng, 2, 4)
    for m in ("riemann", "logeuclid", "euclid", "wasserstein"):
        np.testing.assert_allclose(geometry.geodesic(A, B, 0.0, m), A, atol=1e-12)
        np.testing.assert_allclose(geometry.geodesic(A, B, 1.0, m), B, atol=1e-11)
        # Geodesics are constant speed: d(A, G(t)) = t d(A, B) (definition of a minimising geodesic).
        G = geometry.geodesic(A, B, 0.3, m)
        assert geometry.distance(A, G, m) == pytest.approx(0.3 * geometry.distance(A, B, m), rel=1e-9)
    with pytest.raises(ValueError):
        geometry.geodesic(A, B, 0.5, "logdet")


def test_karcher_mean_of_two_is_midpoint():
    # Two-point Karcher mean = geodesic midpoint A #_1/2 B (Bhatia 2007, ch. 6); compare with pyriemann's
    # iterative mean_riemann, which does not special-case two matrices.
    rng = np.random.default_rng(2)
    X = random_spd(rng, 2, 5)
    M = geometry.frechet_mean(X, "riemann")
    np.testing.assert_allclose(M, geometry.geodesic(X[0], X[1], 0.5), atol=1e-12)
    np.testing.assert_allclose(M, pr_mean.mean_riemann(X, tol=1e-13, maxiter=200), atol=1e-9)
    # Weighted: t = w_B.
    Mw = geometry.frechet_mean(X, "riemann", weights=[1.0, 3.0])
    np.testing.assert_allclose(Mw, geometry.geodesic(X[0], X[1], 0.75), atol=1e-12)


def test_logeuclid_mean_and_karcher_mean_share_determinant():
    # det expm(mean log X) = exp(mean log det X) (trace of log = log det), and the Karcher mean satisfies
    # sum log(M^-1/2 X M^-1/2) = 0 whose trace gives the same geometric mean of determinants (Bhatia 2007, ch. 6;
    # Arsigny et al. 2007). Verified numerically before asserting.
    rng = np.random.default_rng(3)
    X = random_spd(rng, 7, 4)
    gm = np.exp(np.mean(np.linalg.slogdet(X)[1]))
    assert np.linalg.det(geometry.frechet_mean(X, "logeuclid")) == pytest.approx(gm, rel=1e-10)
    assert np.linalg.det(geometry.frechet_mean(X, "riemann")) == pytest.approx(gm, rel=1e-9)


# ------------------------------------------------------------------------------------- matrix functions

def test_matrix_functions_match_scipy():
    rng = np.random.default_rng(4)
    X = random_spd(rng, 3, 5)
    for x in X:
        np.testing.assert_allclose(geometry.sqrtm(x), np.real(sla.sqrtm(x)), atol=1e-12)
        np.testing.assert_allclose(geometry.logm(x), np.real(sla.logm(x)), atol=1e-12)
        np.testing.assert_allclose(geometry.expm(geometry.logm(x)), x, atol=1e-12)
        np.testing.assert_allclose(geometry.expm(x - x.mean()), sla.expm(x - x.mean()), rtol=1e-12)
        np.testing.assert_allclose(geometry.invsqrtm(x), np.linalg.inv(np.real(sla.sqrtm(x))), atol=1e-11)
        np.testing.assert_allclose(geometry.powm(x, 1.7), np.real(sla.fractional_matrix_power(x, 1.7)), rtol=1e-11)
    # Batched equals one by one.
    np.testing.assert_allclose(geometry.logm(X), np.stack([geometry.logm(x) for x in X]), atol=0)


def test_vec_is_isometric_and_invertible():
    rng = np.random.default_rng(5)
    S = rng.standard_normal((4, 6, 6))
    S = S + S.transpose(0, 2, 1)
    np.testing.assert_allclose(np.linalg.norm(geometry.vec(S), axis=1), np.linalg.norm(S, axis=(1, 2)), rtol=1e-14)
    np.testing.assert_allclose(geometry.unvec(geometry.vec(S)), S, atol=1e-14)


def test_log_exp_maps():
    rng = np.random.default_rng(6)
    X = random_spd(rng, 4, 4)
    ref = random_spd(rng, 1, 4)[0]
    for m in ("riemann", "logeuclid", "euclid"):
        np.testing.assert_allclose(geometry.exp_map(geometry.log_map(X, ref, m), ref, m), X, atol=1e-11)
    # ||ref^-1/2 Log_ref(X) ref^-1/2||_F = d_R(ref, X) (Pennec et al. 2006, affine-invariant metric at ref).
    W = geometry.invsqrtm(ref)
    T = geometry.log_map(X, ref)
    np.testing.assert_allclose(np.linalg.norm(W @ T @ W, axis=(1, 2)), geometry.distance(X, ref), rtol=1e-11)


# ---------------------------------------------------------------------------------- pyriemann agreement

@pytest.mark.parametrize("metric", SPD_METRICS)
def test_distances_match_pyriemann(metric):
    # pyriemann 0.12 (test-only reference implementation).
    rng = np.random.default_rng(7)
    X, Y = random_spd(rng, 25, 6), random_spd(rng, 17, 6)
    np.testing.assert_allclose(geometry.pairwise_distance(X, Y, metric), pr_dist.pairwise_distance(X, Y, metric),
                               atol=1e-10)
    np.testing.assert_allclose(geometry.pairwise_distance(X, metric=metric), pr_dist.pairwise_distance(X, None, metric),
                               atol=1e-10)
    np.testing.assert_allclose(geometry.distance(X, Y[0], metric), pr_dist.distance(X, Y[0], metric)[:, 0], atol=1e-10)
    np.testing.assert_allclose(geometry.distance(X[:17], Y, metric), [pr_dist.distance(a, b, metric)
                                                                 for a, b in zip(X[:17], Y)], atol=1e-10)
    # Also through pyriemann's deprecated alias module named in the brief.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        from pyriemann.utils import distance as old
    assert geometry.distance(X[0], Y[0], metric) == pytest.approx(old.distance(X[0], Y[0], metric), abs=1e-10)


@pytest.mark.parametrize("metric,ref,kw", [
    ("riemann", "mean_riemann", dict(tol=1e-13, maxiter=500)),
    ("logeuclid", "mean_logeuclid", {}),
    ("euclid", "mean_euclid", {}),
    ("logdet", "mean_logdet", dict(tol=1e-13, maxiter=1000)),
    ("wasserstein", "mean_wasserstein", dict(tol=1e-13, maxiter=1000)),
])
def test_means_match_pyriemann(metric, ref, kw):
    rng = np.random.default_rng(8)
    X = random_spd(rng, 12, 5)
    w = rng.uniform(0.5, 2.0, 12)
    f = getattr(pr_mean, ref)
    np.testing.assert_allclose(geometry.frechet_mean(X, metric, tol=1e-13, max_iter=1000), f(X, **kw), atol=1e-9)
    np.testing.assert_allclose(geometry.frechet_mean(X, metric, weights=w, tol=1e-13, max_iter=1000),
                               f(X, sample_weight=w / w.sum(), **kw), atol=1e-9)


@pytest.mark.parametrize("metric", ["logdet", "wasserstein"])
def test_fixed_point_means_one_step_by_hand(metric):
    # The Stein and Bures-Wasserstein means share one fixed-point loop: stopped after one step (with the warning
    # that it did not converge) it must give one step of each published iteration from the weighted arithmetic
    # mean, computed here with scipy.linalg (Chebbi & Moakher 2012; Alvarez-Esteban et al. 2016).
    rng = np.random.default_rng(21)
    X = random_spd(rng, 6, 4)
    w = rng.uniform(0.5, 2.0, 6)
    w = w / w.sum()
    A = np.tensordot(w, X, axes=1)
    if metric == "logdet":
        want = sla.inv(sum(wi * sla.inv((A + Xi) / 2) for wi, Xi in zip(w, X)))
    else:
        A12 = sla.sqrtm(A).real
        Am12 = sla.inv(A12)
        S = sum(wi * sla.sqrtm(A12 @ Xi @ A12).real for wi, Xi in zip(w, X))
        want = Am12 @ S @ S @ Am12
    with pytest.warns(geometry.ConvergenceWarning, match=f"frechet_mean\\({metric}\\) did not converge in 1 "):
        got = geometry.frechet_mean(X, metric, weights=w, max_iter=1)
    np.testing.assert_allclose(got, want, rtol=1e-10, atol=1e-12)
    with warnings.catch_warnings():
        warnings.simplefilter("error", geometry.ConvergenceWarning)  # the default budget converges quietly
        geometry.frechet_mean(X, metric, weights=w)


def test_distance_broadcasts_leading_axes():
    rng = np.random.default_rng(9)
    A = random_spd(rng, 6, 3).reshape(2, 3, 3, 3)
    B = random_spd(rng, 3, 3)
    for m in SPD_METRICS:
        D = geometry.distance(A, B, m)
        assert D.shape == (2, 3)
        assert D[1, 2] == pytest.approx(float(geometry.distance(A[1, 2], B[2], m)), abs=1e-13)
        assert geometry.distance(A[:, :, None], B[None, None], m).shape == (2, 3, 3)


# ----------------------------------------------------------------------------------- property tests

spd_seeds = st.integers(0, 2 ** 31 - 1)
dims = st.integers(2, 6)


@settings(max_examples=25, deadline=None)
@given(spd_seeds, dims)
def test_riemann_metric_axioms_and_invariances(seed, d):
    rng = np.random.default_rng(seed)
    A, B, C = random_spd(rng, 3, d)
    G = rng.standard_normal((d, d)) + 3 * np.eye(d)  # invertible in practice
    dab = geometry.distance(A, B)
    assert geometry.distance(B, A) == pytest.approx(dab, rel=1e-9, abs=1e-12)  # symmetry
    assert dab <= geometry.distance(A, C) + geometry.distance(C, B) + 1e-10  # triangle inequality
    # Congruence invariance d(GAG^T, GBG^T) = d(A, B) and inversion invariance d(A^-1, B^-1) = d(A, B)
    # (Pennec et al. 2006).
    assert geometry.distance(G @ A @ G.T, G @ B @ G.T) == pytest.approx(dab, rel=1e-7, abs=1e-9)
    assert geometry.distance(np.linalg.inv(A), np.linalg.inv(B)) == pytest.approx(dab, rel=1e-8, abs=1e-10)
    # Exponential metric increasing property: d_logeuclid <= d_riemann (Bhatia 2007, ch. 6).
    assert geometry.distance(A, B, "logeuclid") <= dab + 1e-10
    for m in ("logeuclid", "euclid", "logdet", "wasserstein"):
        assert geometry.distance(A, B, m) == pytest.approx(geometry.distance(B, A, m), rel=1e-9, abs=1e-12)
        assert geometry.distance(A, B, m) <= geometry.distance(A, C, m) + geometry.distance(C, B, m) + 1e-10


@settings(max_examples=15, deadline=None)
@given(spd_seeds, dims, st.integers(3, 8))
def test_karcher_mean_properties(seed, d, n):
    rng = np.random.default_rng(seed)
    X = random_spd(rng, n, d)
    M = geometry.frechet_mean(X, "riemann", tol=1e-12, max_iter=300)
    # det of the Karcher mean = geometric mean of determinants (Bhatia 2007, ch. 6).
    assert np.linalg.slogdet(M)[1] == pytest.approx(np.mean(np.linalg.slogdet(X)[1]), abs=1e-9)
    # Self-duality: mean(X^-1)^-1 = mean(X) (Bhatia 2007, ch. 6; follows from inversion invariance).
    Minv = geometry.frechet_mean(np.linalg.inv(X), "riemann", tol=1e-12, max_iter=300)
    np.testing.assert_allclose(np.linalg.inv(Minv), M, rtol=1e-8, atol=1e-10)
    # First-order condition: the whitened logs sum to zero (Pennec et al. 2006).
    W = geometry.invsqrtm(M)
    assert np.linalg.norm(geometry.logm(W @ X @ W).mean(axis=0)) < 1e-10


# --------------------------------------------------------------------------------------------- kNN

def brute_knn(Q, R, k, metric, exclude=None):
    D = geometry.pairwise_distance(Q, R, metric)
    if exclude is not None:
        D = np.where(exclude, np.inf, D)
    idx = np.argsort(D, axis=1, kind="stable")[:, :k]
    dist = np.take_along_axis(D, idx, 1)
    if dist.shape[1] < k:
        pad = k - dist.shape[1]
        dist = np.pad(dist, ((0, 0), (0, pad)), constant_values=np.inf)
        idx = np.pad(idx, ((0, 0), (0, pad)), constant_values=-1)
    idx = np.where(np.isfinite(dist), idx, -1)
    return dist, idx


def assert_same_knn(got, want):
    (gd, gi), (wd, wi) = got, want
    assert gd.shape == wd.shape and gi.shape == wi.shape
    np.testing.assert_array_equal(np.isfinite(gd), np.isfinite(wd))
    fin = np.isfinite(wd)
    np.testing.assert_allclose(gd[fin], wd[fin], atol=1e-10, rtol=0)
    np.testing.assert_array_equal(gi, wi)  # random continuous data: no ties
    assert np.all(np.diff(np.where(np.isfinite(gd), gd, 1e300), axis=1) >= 0)


@pytest.mark.parametrize("metric", SPD_METRICS)
@pytest.mark.parametrize("k", [1, 4, 12])
def test_knn_equals_brute_force(metric, k):
    rng = np.random.default_rng(10 + k)
    Q, R = random_spd(rng, 40, 5), random_spd(rng, 70, 5)
    assert_same_knn(knn(Q, R, k, metric), brute_knn(Q, R, k, metric))
    ex = rng.random((40, 70)) < 0.6
    ex[0] = True  # no allowed reference at all
    ex[1, 3:] = True  # only 3 allowed: padding when k > 3
    assert_same_knn(knn(Q, R, k, metric, exclude=ex), brute_knn(Q, R, k, metric, ex))


@pytest.mark.parametrize("lo,hi", [(-0.3, 0.3), (-4.0, 4.0)])
def test_knn_riemann_exact_with_tight_and_loose_bounds(lo, hi):
    # Wide eigenvalue spreads make the log-Euclidean bound loose, so several refinement rounds run; clustered
    # data make it tight. Both must equal brute force.
    rng = np.random.default_rng(11)
    centres = random_spd(rng, 3, 8, lo, hi)
    G = np.linalg.cholesky(centres[rng.integers(0, 3, 260)])
    X = G @ random_spd(rng, 260, 8, -0.5, 0.5) @ G.transpose(0, 2, 1)
    Q, R = X[:60], X[60:]
    for k in (1, 5, 25):
        assert_same_knn(knn(Q, R, k), brute_knn(Q, R, k, "riemann"))
    # Self-search with the diagonal excluded (leave-one-out).
    ex = np.eye(len(R), dtype=bool)
    assert_same_knn(knn(R, R, 5, exclude=ex), brute_knn(R, R, 5, "riemann", ex))


def test_knn_riemann_prunes_exact_eigenproblems(monkeypatch):
    # The point of the lower bound: far fewer than n*m exact generalized eigenproblems (structural, not timing).
    rng = np.random.default_rng(17)
    Q, R = random_spd(rng, 50, 6, -0.5, 0.5), random_spd(rng, 400, 6, -0.5, 0.5)
    counted = []
    orig = knn_index._pair_exact
    monkeypatch.setattr(knn_index, "_pair_exact", lambda q, r, a, b: (counted.append(len(a)), orig(q, r, a, b))[1])
    got = knn(Q, R, 5)
    monkeypatch.setattr(knn_index, "_pair_exact", orig)
    assert sum(counted) < 0.25 * len(Q) * len(R)
    assert_same_knn(got, brute_knn(Q, R, 5, "riemann"))


def test_knn_padding_when_fewer_references_than_k():
    rng = np.random.default_rng(12)
    Q, R = random_spd(rng, 4, 3), random_spd(rng, 3, 3)
    d, i = knn(Q, R, 5)
    assert np.all(np.isinf(d[:, 3:])) and np.all(i[:, 3:] == -1)
    assert_same_knn((d, i), brute_knn(Q, R, 5, "riemann"))


def test_knn_index_add_and_drop():
    rng = np.random.default_rng(13)
    R, Q = random_spd(rng, 50, 4), random_spd(rng, 10, 4)
    index = KNNIndex(R[:30])
    index.add(R[30:])
    assert_same_knn(index.query(Q, 3), brute_knn(Q, R, 3, "riemann"))
    index.drop_first(20)
    assert len(index) == 30
    assert_same_knn(index.query(Q, 3), brute_knn(Q, R[20:], 3, "riemann"))


def test_knn_approximate_returns_true_distances():
    rng = np.random.default_rng(14)
    Q, R = random_spd(rng, 20, 4), random_spd(rng, 200, 4)
    d, i = knn(Q, R, 3, approximate=True)
    np.testing.assert_allclose(d, geometry.distance(Q[:, None], R[i]), atol=1e-12)
    exact, _ = knn(Q, R, 3)
    assert np.all(d >= exact - 1e-12)


# ------------------------------------------------------------------------------------- numerical safety

def test_singular_input_is_clipped_with_one_warning():
    X = np.diag([1.0, 1.0, 0.0])
    with pytest.warns(geometry.SPDWarning) as rec:
        L = geometry.logm(np.stack([X, X, X]))
    assert len(rec) == 1
    assert np.all(np.isfinite(L))
    assert L[0, 2, 2] == pytest.approx(np.log(geometry.EIG_FLOOR))


def test_bad_inputs_raise_input_error():
    with pytest.raises(InputError):
        geometry.distance(np.ones((2, 3)), np.eye(3))
    with pytest.raises(InputError):
        geometry.distance(np.full((2, 2), np.nan), np.eye(2))
    with pytest.raises(InputError):
        geometry.logm(-np.eye(3))
    with pytest.raises(InputError):
        geometry.distance(np.eye(2), np.eye(2), "cosine")
    with pytest.raises(InputError):
        geometry.frechet_mean(np.stack([np.eye(2)] * 3), weights=[1, -1, 1])
    with pytest.raises(InputError):
        knn(np.stack([np.eye(2)]), np.stack([np.eye(2)]), 1, exclude=np.zeros((2, 2), bool))


def test_inputs_are_symmetrised():
    rng = np.random.default_rng(15)
    A, B = random_spd(rng, 2, 4)
    skew = rng.standard_normal((4, 4)) * 1e-3
    skew = skew - skew.T
    assert geometry.distance(A + skew, B) == pytest.approx(float(geometry.distance(A, B)), abs=1e-14)


def test_convergence_warning():
    rng = np.random.default_rng(16)
    X = random_spd(rng, 10, 5, -3, 3)
    with pytest.warns(geometry.ConvergenceWarning):
        geometry.frechet_mean(X, "riemann", tol=1e-15, max_iter=2)
